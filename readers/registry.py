"""Reader plug-ins, found through the ``swarmaudit.readers`` entry-point group.

A reader is a class with

* ``name`` — a short word shown to users (``hdf5``),
* ``suffixes`` — file endings it claims (``(".h5", ".hdf5")``),
* ``can_open(path) -> bool`` — a cheap look at the file (magic bytes, header),
* ``open(path, columns=None) -> Snapshot`` — metadata now, columns on demand.

A reader may also split ``open`` in two, so that the metadata of many files can be
read elsewhere (another process or machine) and the snapshots made here:

* ``scan(path, layout=True)`` — the metadata as plain data that pickles; with
  ``layout=False`` a stored block layout may be left unread (the other per-rank
  parts of a snapshot whose first part gives its layout);
* ``from_scan(scan, columns=None) -> Snapshot`` — what ``open`` would have given.

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


def open_snapshot(path: str, columns=None, layout: bool = True) -> Snapshot:
    """The snapshot in ``path``; ``layout=False``: its stored layout is not needed (a reader that
    scans may leave it unread, the others read it as usual)."""
    return from_scan(scan_file(path, layout), columns)


def scan_file(path: str, layout: bool = True) -> tuple:
    """``(reader name, scan)`` of a reader that scans, else ``(reader name, path)`` for
    :func:`from_scan` to open. Plain data either way (it pickles)."""
    reader = reader_for(path)
    if callable(getattr(reader, "scan", None)):
        return reader.name, reader.scan(path, layout=layout)
    return reader.name, path


def from_scan(scanned: tuple, columns=None) -> Snapshot:
    """The Snapshot of :func:`scan_file`'s answer."""
    name, got = scanned
    reader = next(r for r in readers() if r.name == name)
    if isinstance(got, (str, os.PathLike)):
        return reader.open(got, columns=columns)
    return reader.from_scan(got, columns=columns)
