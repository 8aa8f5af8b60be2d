"""A run: an ordered series of snapshots, opened on demand."""

from __future__ import annotations

import os
import threading
from dataclasses import dataclass, field
from typing import Callable

from .errors import OptionError
from .frame import Snapshot
from .roles import RoleMap, last_integer

#: how the steps of a run are taken when its files store none (``Run.step_rule``)
STEP_RULES = ("names", "index")
#: the rule a run falls back to when its names do not number its snapshots either
BY_POSITION = "positions"


def parse_step_rule(value):
    """``--steps-per-snapshot``: ``names`` (the integer that orders each file name), ``index``
    (count snapshots) or a whole number K >= 1 of steps between snapshots; None stays None."""
    if value is None:
        return None
    text = str(value).strip().lower()
    if text in STEP_RULES:
        return text
    if isinstance(value, bool) or not text.isdigit() or int(text) < 1:
        raise OptionError(f"--steps-per-snapshot takes a whole number of at least 1, 'index' or "
                          f"'names', got '{value}'")
    return int(text)


@dataclass
class SnapshotRef:
    """Where one snapshot lives: one file, or the per-rank files of one step."""

    label: str                 # what the user sees (file or folder name)
    paths: list[str]           # one path, or the per-rank parts in rank order
    ranks: list[int] | None = None   # rank number of each part, when known from names
    order_key: tuple = ()
    stamp: tuple = ()          # signature() when it was last opened (a live run re-opens on change)

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
    spec: object = None        # what the user named (folder, glob, files): rescanned for a live run
    follow: bool = True        # a fresh snapshot that cannot be opened is left out, not an error
    # finds a layout file stored beside the snapshots (set by the reader layer); None: there is none
    sidecar: Callable[[], object] | None = field(default=None, repr=False, compare=False)
    # a live rescan replaces refs and _open together; a reader must not pair one with the other
    _lock: threading.RLock = field(default_factory=threading.RLock, repr=False, compare=False)
    _species: tuple = field(default=(None, None), repr=False, compare=False)   # (key, names)
    _version: int = field(default=0, repr=False, compare=False)
    # Steps: when not every snapshot stores one, each snapshot's step is taken by ``step_rule``
    # ("names": the integer that orders its file name, "index": its position, K: K × its
    # position), so the steps between two snapshots are known however the files were written
    steps_stored: bool = True
    step_rule: object = "names"

    def take_steps(self, rule) -> None:
        """Take the steps by ``rule`` when the files store none (``names`` falls back to
        positions when the names do not number the snapshots)."""
        if rule == "names" and not self.names_number_snapshots():
            rule = BY_POSITION
        self.step_rule = rule

    def __len__(self) -> int:
        return len(self.refs)

    def __getitem__(self, i: int) -> Snapshot:
        with self._lock:
            if i < 0:
                i += len(self.refs)
            snap = self._open.get(i)
            ref = self.refs[i]
        if snap is None:
            snap = self.opener(ref, self.role_map)
            with self._lock:
                # a rescan may have moved or replaced the ref meanwhile: keep only a matching result
                if i < len(self.refs) and self.refs[i] is ref:
                    snap = self._open.setdefault(i, snap)
        if not self.steps_stored:
            # set on every look-up: a rescan may move the snapshot, the rule may change
            snap.step, snap.step_taken = self.taken_step(i, ref), True
        return snap

    def taken_step(self, i: int, ref: SnapshotRef | None = None) -> int | None:
        """The step of snapshot ``i`` by ``step_rule`` (used when the files store none)."""
        rule = self.step_rule
        if rule == "names":
            return last_integer((ref or self.refs[i]).label)
        return i * (1 if rule in ("index", BY_POSITION) else int(rule))

    def names_number_snapshots(self) -> bool:
        """Whether every snapshot's name holds an integer and no two the same (steps by name)."""
        nums = [last_integer(r.label) for r in self.refs]
        return None not in nums and len(set(nums)) == len(nums)

    def steps_source(self) -> str:
        """Where the steps come from, in words (for notes and reports)."""
        if self.steps_stored:
            return "stored in the files"
        rule = self.step_rule
        if rule == "names":
            return "taken from the file names"
        if rule == "index":
            return "counted by snapshot (--steps-per-snapshot index)"
        if rule == BY_POSITION:
            return "counted by snapshot (the file names do not number the snapshots)"
        return f"{int(rule)} per snapshot (--steps-per-snapshot {int(rule)})"

    def steps_note(self) -> str | None:
        """The one note saying that the steps were taken, not read, and which they are."""
        if self.steps_stored or not self.refs:
            return None
        shown = [self.taken_step(i) for i in range(min(3, len(self.refs)))]
        listed = ", ".join(str(v) for v in shown) + (", …" if len(self.refs) > 3 else "")
        return f"no step stored; steps {self.steps_source()} ({listed})"

    def __iter__(self):
        for i in range(len(self)):
            yield self[i]

    @property
    def labels(self) -> list[str]:
        return [r.label for r in self.refs]

    def species_names(self) -> list[str]:
        """Every species of the run, in order of first appearance (kept until the run changes)."""
        with self._lock:
            key = (id(self.refs), id(self._open), len(self.refs), self._version)
            if self._species[0] == key:
                return list(self._species[1])
        names: list[str] = []
        for snap in self:
            for s in snap.species:
                if s not in names:
                    names.append(s)
        with self._lock:
            if key == (id(self.refs), id(self._open), len(self.refs), self._version):
                self._species = (key, tuple(names))
        return names

    def forget(self, i: int | None = None) -> None:
        """Drop opened snapshots (and their cached columns)."""
        with self._lock:
            self._version += 1
            if i is None:
                self._open.clear()
            else:
                self._open.pop(i, None)
