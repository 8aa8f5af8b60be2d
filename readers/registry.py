"""Reader plug-ins, found through the ``swarmaudit.readers`` entry-point group.

A reader is a class with

* ``name`` — a short word shown to users (``hdf5``),
* ``suffixes`` — file endings it claims (``(".h5", ".hdf5")``),
* ``can_open(path) -> bool`` — a cheap look at the file (magic bytes, header),
* ``open(path, columns=None) -> Snapshot`` — metadata now, columns on demand.

The built-in readers register exactly as a third party's would, in
``pyproject.toml``; nothing here names them.
"""

from __future__ import annotations

import os
from importlib.metadata import entry_points
from typing import Protocol, runtime_checkable

from ..core.errors import InputError, SwarmAuditError
from ..core.frame import Snapshot

GROUP = "swarmaudit.readers"


@runtime_checkable
class Reader(Protocol):
    name: str
    suffixes: tuple[str, ...]

    def can_open(self, path: str) -> bool: ...

    def open(self, path: str, columns=None) -> Snapshot: ...


_READERS: list | None = None


def readers() -> list:
    """Instances of every registered reader, in entry-point order."""
    global _READERS
    if _READERS is None:
        found = []
        for ep in sorted(entry_points(group=GROUP), key=lambda e: e.name):
            try:
                cls = ep.load()
            except Exception as exc:  # a broken third-party plug-in must not stop the tool
                import warnings
                warnings.warn(f"reader plug-in '{ep.name}' failed to load: {exc}")
                continue
            found.append(cls())
        _READERS = found
    return _READERS


def register(reader) -> None:
    """Add a reader at run time (tests, notebooks); entry points are the normal way."""
    readers().insert(0, reader)


def suffixes() -> set[str]:
    out = set()
    for r in readers():
        out.update(s.lower() for s in r.suffixes)
    return out


def reader_for(path: str):
    """The reader that claims ``path``: by suffix first, then by asking each."""
    if not os.path.exists(path):
        raise InputError(path, "no such file or folder")
    if os.path.isdir(path):
        raise InputError(path, "is a folder, not a snapshot file")
    if os.path.getsize(path) == 0:
        raise InputError(path, "is an empty file", "it may still be being written")
    low = path.lower()
    by_suffix = [r for r in readers() if any(low.endswith(s.lower()) for s in r.suffixes)]
    for r in by_suffix + [r for r in readers() if r not in by_suffix]:
        try:
            if r.can_open(path):
                return r
        except SwarmAuditError:
            raise
        except OSError as exc:
            raise InputError(path, f"cannot be read: {exc.strerror or exc}") from None
    if by_suffix:
        raise InputError(path, f"is not a valid {by_suffix[0].name} file (it may be truncated "
                         "or still being written)")
    raise InputError(path, "no reader recognises this file",
                     "known endings: " + ", ".join(sorted(suffixes())))


def open_snapshot(path: str, columns=None) -> Snapshot:
    return reader_for(path).open(path, columns=columns)
