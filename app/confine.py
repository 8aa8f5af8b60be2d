"""Which snapshot files a served run may read: only those inside the folders the user named."""

from __future__ import annotations

import os


def _inside(path: str, real_roots: list[str]) -> bool:
    rp = os.path.realpath(path)
    return any(rp == r or rp.startswith(r.rstrip(os.sep) + os.sep) for r in real_roots)


def outside_note(ref, roots: list[str]) -> str | None:
    """A note when a snapshot's files resolve outside the run folders, else None."""
    real_roots = [os.path.realpath(r) for r in roots if os.path.isdir(r)]
    if not real_roots or all(_inside(p, real_roots) for p in ref.paths):
        return None
    return f"{ref.label}: left out, it points outside the run folder"
