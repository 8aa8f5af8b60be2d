"""A run: an ordered series of snapshots, opened on demand."""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from typing import Callable

from .frame import Snapshot
from .roles import RoleMap


@dataclass
class SnapshotRef:
    """Where one snapshot lives: one file, or the per-rank files of one step."""

    label: str                 # what the user sees (file or folder name)
    paths: list[str]           # one path, or the per-rank parts in rank order
    ranks: list[int] | None = None   # rank number of each part, when known from names
    order_key: tuple = ()

    @property
    def path(self) -> str:
        return self.paths[0] if len(self.paths) == 1 else os.path.dirname(self.paths[0])

    def signature(self) -> tuple:
        """(path, size, mtime_ns) of every part: changes when a file is rewritten."""
        sig = []
        for p in self.paths:
            try:
                st = os.stat(p)
                sig.append((os.path.abspath(p), st.st_size, st.st_mtime_ns))
            except OSError:
                sig.append((os.path.abspath(p), -1, -1))
        return tuple(sig)


@dataclass
class Run:
    """Snapshots in run order. ``run[i]`` opens snapshot ``i`` (metadata only) once."""

    refs: list[SnapshotRef]
    opener: Callable[[SnapshotRef, RoleMap], Snapshot]
    role_map: RoleMap = field(default_factory=RoleMap)
    source: str = ""
    skipped: list[str] = field(default_factory=list)   # notes on files left out (e.g. still being written)
    _open: dict = field(default_factory=dict, repr=False)

    def __len__(self) -> int:
        return len(self.refs)

    def __getitem__(self, i: int) -> Snapshot:
        if i < 0:
            i += len(self.refs)
        if i not in self._open:
            self._open[i] = self.opener(self.refs[i], self.role_map)
        return self._open[i]

    def __iter__(self):
        for i in range(len(self)):
            yield self[i]

    @property
    def labels(self) -> list[str]:
        return [r.label for r in self.refs]

    def species_names(self) -> list[str]:
        names: list[str] = []
        for snap in self:
            for s in snap.species:
                if s not in names:
                    names.append(s)
        return names

    def forget(self, i: int | None = None) -> None:
        """Drop opened snapshots (and their cached columns)."""
        if i is None:
            self._open.clear()
        else:
            self._open.pop(i, None)
