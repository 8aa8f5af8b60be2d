"""``swarmaudit check``: the CI gate on conserved totals."""

from __future__ import annotations

import sys

from ..audit.tables import check
from ..core.errors import OptionError


def _quantities(text):
    if not text:
        return None
    names = [q.strip() for q in str(text).split(",") if q.strip()]
    if not names:
        raise OptionError(f"--quantities takes comma-separated names, got '{text}'")
    return names


def run_check(ctx, args, out=None, err=None) -> int:
    """Exit 0 when every checked total stays within ``--rtol`` of the first snapshot, 1 when not.

    Bad input raises InputError/OptionError (the CLI turns that into exit 2).
    """
    out = out or sys.stdout
    err = err or sys.stderr
    result = check(ctx, args.rtol, _quantities(getattr(args, "quantities", None)))
    for line in result.lines:
        print(line, file=out)
    for note in ctx.notes:
        print(f"note: {note}", file=err)
    return 0 if result.ok else 1
