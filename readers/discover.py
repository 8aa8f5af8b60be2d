"""From what the user typed (a folder, a glob, files) to an ordered Run."""

from __future__ import annotations

import glob
import os
import re
import time
from collections import defaultdict
from dataclasses import dataclass, field

from ..core import interrupt
from ..core.errors import InputError, SwarmAuditError
from ..core.frame import Snapshot, concat_frames
from ..core.outputs import only_our_output
from ..core.roles import RoleMap, last_integer
from ..core.run import Run, SnapshotRef
from . import registry

#: names of sidecar files in a run folder that are not snapshots
SIDECAR_NAMES = re.compile(r"^(layout|blocks|columns|roles|map)[^/]*\.(csv|toml|json)$", re.I)
#: a token naming the rank of a per-rank file
RANK_TOKEN = re.compile(r"(?:^|[._-])(?:rank|proc|cpu|part|r)[_-]?(\d+)(?=[._-]|$)", re.I)

#: a file modified this recently that fails to open is taken to be still being written
FRESH_SECONDS = 120.0


def _is_snapshot_file(path: str, known: set[str]) -> bool:
    name = os.path.basename(path)
    if name.startswith(".") or SIDECAR_NAMES.match(name):
        return False
    low = name.lower()
    return any(low.endswith(s) for s in known)


def _group_per_rank(files: list[str]) -> list[SnapshotRef]:
    """Files whose names differ only in a rank token are parts of one snapshot."""
    groups: dict[str, list[tuple[int, str]]] = defaultdict(list)
    plain: list[str] = []
    for f in files:
        base = os.path.basename(f)
        m = list(RANK_TOKEN.finditer(base))
        if m:
            last = m[-1]
            key = os.path.join(os.path.dirname(f), base[: last.start()] + "#" + base[last.end():])
            groups[key].append((int(last.group(1)), f))
        else:
            plain.append(f)
    refs = [SnapshotRef(os.path.basename(f), [f]) for f in plain]
    for key, members in groups.items():
        members.sort()
        if len(members) == 1 and len(groups) > 1 and all(len(v) == 1 for v in groups.values()):
            # every file has a single "r12"-like token: those are steps, not ranks
            refs.append(SnapshotRef(os.path.basename(members[0][1]), [members[0][1]]))
            continue
        label = os.path.basename(key).replace("#", "*")
        refs.append(SnapshotRef(label, [f for _, f in members], [r for r, _ in members]))
    return refs


def find_snapshots(spec, notes: list | None = None) -> tuple[list[SnapshotRef], str]:
    """SnapshotRefs for a folder, a glob, or a list of files/folders (unordered).

    A sub-folder holding only swarmaudit's own tables (an export written into the run folder
    by an older version, or by hand) is not a snapshot: it is left out, with a note in ``notes``.
    """
    items = [spec] if isinstance(spec, (str, os.PathLike)) else list(spec)
    if not items:
        raise InputError(None, "no run given: name a folder, a glob or snapshot files")
    known = registry.suffixes()
    files: list[str] = []
    folders: list[str] = []
    for item in map(os.fspath, items):
        if os.path.isdir(item):
            folders.append(item)
        elif os.path.exists(item):
            files.append(item)
        elif any(ch in item for ch in "*?["):
            hits = sorted(glob.glob(item))
            if not hits:
                raise InputError(item, "the pattern matches no file")
            for h in hits:
                (folders if os.path.isdir(h) else files).append(h)
        else:
            raise InputError(item, "no such file or folder")
    refs: list[SnapshotRef] = _group_per_rank(files) if files else []
    for folder in folders:
        entries = sorted(os.listdir(folder))
        sub_files = [os.path.join(folder, e) for e in entries
                     if os.path.isfile(os.path.join(folder, e)) and _is_snapshot_file(e, known)]
        sub_dirs = [os.path.join(folder, e) for e in entries
                    if os.path.isdir(os.path.join(folder, e)) and not e.startswith(".")]
        if sub_files:
            refs.extend(_group_per_rank(sub_files))
        # a sub-folder holding snapshot files is one snapshot split over ranks
        for d in sub_dirs:
            parts = sorted(os.path.join(d, e) for e in os.listdir(d)
                           if os.path.isfile(os.path.join(d, e)) and _is_snapshot_file(e, known))
            if not parts:
                continue
            if only_our_output(os.path.basename(p) for p in parts):
                if notes is not None:
                    notes.append(f"{os.path.basename(d)}: left out, it holds swarmaudit's own "
                                 "tables, not a snapshot")
                continue
            ranks = [last_integer(os.path.basename(p)) for p in parts]
            if None in ranks or len(set(ranks)) != len(ranks):
                ranks = list(range(len(parts)))
            order = sorted(range(len(parts)), key=lambda i: ranks[i])
            refs.append(SnapshotRef(os.path.basename(d), [parts[i] for i in order],
                                    [ranks[i] for i in order]))
        if not sub_files and not refs:
            raise InputError(folder, "holds no snapshot files",
                             "known endings: " + ", ".join(sorted(known)))
    source = ", ".join(map(os.fspath, items))
    return refs, source


def split_runs(spec) -> list:
    """What the user named, as one spec per run.

    Each folder named is a run of its own (``serve A B`` shows two runs); files and globs
    name the snapshots of one run. Folders mixed with files or globs are refused: which run
    would the files belong to?
    """
    items = [spec] if isinstance(spec, (str, os.PathLike)) else list(spec)
    folders, seen = [], set()
    for item in map(os.fspath, items):
        if os.path.isdir(item) and os.path.realpath(item) not in seen:
            seen.add(os.path.realpath(item))
            folders.append(item)
    if len(folders) < 2:
        return [spec]
    others = [os.fspath(i) for i in items if not os.path.isdir(i)]
    if others:
        raise InputError(others[0], "is named beside several run folders",
                         "give run folders (each is a run of its own) or the files or glob "
                         "of one run, not both")
    return folders


def scan_paths(paths) -> list | SwarmAuditError:
    """The scans (:func:`registry.scan_file`) of one snapshot's files, or the error that stopped
    them. Plain data in and out, so the opening of a run can be spread over processes or machines
    (``open_run``'s ``scan_map``); only the first part's stored layout is read (it is the snapshot's)."""
    try:
        return [registry.scan_file(p, layout=k == 0) for k, p in enumerate(paths)]
    except SwarmAuditError as exc:
        return exc


def open_ref(ref: SnapshotRef, role_map: RoleMap | None = None, columns=None, scans=None) -> Snapshot:
    """Open the file(s) of one snapshot into one Snapshot (per-rank parts joined).

    ``scans``: what :func:`scan_paths` gave for ``ref.paths`` (else they are scanned here).
    """
    role_map = role_map or RoleMap()
    scans = scan_paths(ref.paths) if scans is None else scans
    if isinstance(scans, SwarmAuditError):
        raise scans
    snaps = [registry.from_scan(sc, columns) for sc in scans]
    first = snaps[0]
    if len(snaps) == 1:
        return first.with_role_map(role_map)
    species: dict = {}
    names: list[str] = []
    for s in snaps:
        for k in s.species:
            if k not in names:
                names.append(k)
    warnings = []
    for s in snaps:
        warnings.extend(s.warnings)
    steps = {s.step for s in snaps}
    if len(steps) > 1:
        raise InputError(ref.path, f"the per-rank files of this snapshot carry different steps "
                         f"{sorted(x for x in steps if x is not None)}")
    for name in names:
        parts, ranks = [], []
        for i, s in enumerate(snaps):
            if name in s.species:
                parts.append(s.species[name].with_role_map(role_map))
                ranks.append(ref.ranks[i] if ref.ranks else i)
        species[name] = concat_frames(parts, species=name, rank_values=ranks, source=ref.path)
    return Snapshot(ref.path, species, first.step, first.time, dict(first.meta), first.layout,
                    warnings, list(ref.paths), first.time_unit)


def _is_fresh(ref: SnapshotRef, now: float) -> bool:
    try:
        return any(now - os.stat(p).st_mtime < FRESH_SECONDS for p in ref.paths)
    except OSError:
        return True


def _usual_parts(refs: list[SnapshotRef]) -> int:
    """The most per-rank files any snapshot of the run has (0: no per-rank snapshots)."""
    return max((len(r.paths) for r in refs if r.ranks is not None), default=0)


def _missing_ranks(ref: SnapshotRef, usual: int) -> str | None:
    """Why a per-rank snapshot looks unfinished (fewer files than the others), or None."""
    if ref.ranks is None or len(ref.paths) >= usual:
        return None
    return f"has {len(ref.paths)} of the {usual} per-rank files the other snapshots have"


def _try_open(ref, role_map, usual, follow, now, scans=None) -> tuple[Snapshot | None, str | None]:
    """(snapshot, None), or (None, note) for a snapshot left out for now; raises when not following.

    ``scans``: the snapshot's :func:`scan_paths` when they were made already (elsewhere)."""
    short = _missing_ranks(ref, usual)
    if short is not None and follow and _is_fresh(ref, now):
        return None, f"{ref.label}: skipped for now, it looks like it is still being written ({short})"
    try:
        snap = open_ref(ref, role_map, scans=scans)
    except SwarmAuditError as exc:
        if follow and _is_fresh(ref, now):
            return None, (f"{ref.label}: skipped for now, it looks like it is still being "
                          f"written ({_why(exc)})")
        raise
    return snap, None


def _scanned(refs, usual, follow, now, scan_map):
    """Each ref with its :func:`scan_paths` (None where it is skipped before opening), in order.

    ``scan_map(fn, items)`` gives ``fn(item)`` of every item, in order, as they are done (a pool
    of processes, a cluster); without one the files are scanned here, one ref at a time.
    """
    if scan_map is None:
        for ref in refs:
            yield ref, None
        return
    todo = [ref for ref in refs
            if not (follow and _missing_ranks(ref, usual) is not None and _is_fresh(ref, now))]
    wanted = {id(ref) for ref in todo}
    got = iter(scan_map(scan_paths, [ref.paths for ref in todo]))
    try:
        for ref in refs:
            yield ref, (next(got) if id(ref) in wanted else None)
    finally:
        close = getattr(got, "close", None)
        if close is not None:
            close()


def _why(exc: SwarmAuditError) -> str:
    """The problem of an error, naming the file only by its name (the note names the snapshot)."""
    path, problem = getattr(exc, "path", None), getattr(exc, "problem", None)
    if problem is None:
        return str(exc)
    return f"{os.path.basename(path)}: {problem}" if path else problem


def _order_key(ref: SnapshotRef, snap: Snapshot, by_step: bool) -> tuple:
    if by_step and snap.step is not None:
        return (0, snap.step, ref.label)
    n = last_integer(ref.label)
    return (1, n if n is not None else -1, ref.label)


def open_run(spec, role_map: RoleMap | None = None, *, follow: bool = True, scan_map=None,
             on_open=None) -> Run:
    """Find, order and (lazily) open the snapshots of a run.

    Snapshots are ordered by their ``step``, else by the last integer in the
    name, which is then their step too (``Run.step_rule``). With ``follow``, a snapshot that cannot be opened yet, or a
    per-rank snapshot with fewer files than the others, written in the last
    ``FRESH_SECONDS`` is left out with a note: the simulation is most likely
    still writing it (:func:`rescan_run` picks it up later).

    The snapshots are opened in the order of their names. ``scan_map(fn, items)``
    (see :func:`_scanned`) reads their files' metadata elsewhere; ``on_open(k, total,
    ref, snapshot)`` hears of each snapshot as it opens (``k``: its place in that order;
    ``snapshot`` None for one left out for now).
    """
    role_map = role_map or RoleMap()
    skipped: list[str] = []
    refs, source = find_snapshots(spec, skipped)
    # opened in name order: the first snapshots are known first (the run's order is by step,
    # when every snapshot stores one, which is nearly always the same order)
    refs.sort(key=lambda r: _order_key(r, None, False))
    opened: list[tuple[SnapshotRef, Snapshot]] = []
    now = time.time()
    usual = _usual_parts(refs)
    stamps = {id(ref): ref.signature() for ref in refs}   # before opening: a write meanwhile shows later
    for k, (ref, scans) in enumerate(_scanned(refs, usual, follow, now, scan_map)):
        interrupt.check()
        snap, note = _try_open(ref, role_map, usual, follow, now, scans)
        if note is not None:
            skipped.append(note)
            if on_open is not None:
                on_open(k, len(refs), ref, None)
            continue
        ref.stamp = stamps[id(ref)]
        short = _missing_ranks(ref, usual)
        if short is not None:
            skipped.append(f"{ref.label}: {short} (kept: it was last written more than "
                           f"{FRESH_SECONDS:.0f} s ago)")
        opened.append((ref, snap))
        if on_open is not None:
            on_open(k, len(refs), ref, snap)
    if not opened:
        if skipped:
            # nothing opens at all: a file being written is the less likely story, so say what
            # is wrong with the first one plainly
            for ref in refs:
                try:
                    open_ref(ref, role_map)
                except InputError as exc:
                    hint = "; ".join(h for h in (exc.hint, "if the simulation is still writing it, "
                                                 "try again when it is done") if h)
                    raise InputError(exc.path or ref.path, exc.problem, hint) from None
            raise InputError(source, "no snapshot can be opened yet: " + "; ".join(skipped))
        raise InputError(source, "holds no snapshot files")
    have_steps = all(s.step is not None for _, s in opened)
    for ref, snap in opened:
        ref.order_key = _order_key(ref, snap, have_steps)
    opened.sort(key=lambda item: item[0].order_key)
    run = Run([r for r, _ in opened], lambda ref, rm: open_ref(ref, rm), role_map, source, skipped,
              spec=spec, follow=follow, sidecar=lambda: find_sidecar_layout(run))
    for i, (_, snap) in enumerate(opened):
        run._open[i] = snap
    if not have_steps:
        # no step stored (or not in every file): the integer that orders the names is the step
        run.steps_stored = False
        run.take_steps("names")
    return run


def find_sidecar_layout(run: Run):
    """A ``layout.csv`` or ``blocks.csv`` beside the first snapshot (or one folder up), else None."""
    from .layout_files import read_layout_csv
    folders = []
    for ref in run.refs[:1]:
        p = ref.paths[0]
        folders += [os.path.dirname(p), os.path.dirname(os.path.dirname(p))]
    for folder in folders:
        for name in ("layout.csv", "blocks.csv"):
            cand = os.path.join(folder or ".", name)
            if os.path.isfile(cand):
                return read_layout_csv(cand)
    return None


# ---------------------------------------------------------------------------------------
def ref_key(ref: SnapshotRef) -> tuple:
    """What names one snapshot across rescans (its folder and label; its parts may grow)."""
    return (os.path.dirname(os.path.abspath(ref.paths[0])), ref.label)


@dataclass
class Rescan:
    """What one :func:`rescan_run` changed."""

    added: list[str] = field(default_factory=list)      # labels of snapshots new to the run
    changed: list[str] = field(default_factory=list)    # labels whose files changed (re-opened)
    removed: list[str] = field(default_factory=list)    # labels no longer in the run
    moved: dict = field(default_factory=dict)           # old position -> new position (kept ones)
    notes: list[str] = field(default_factory=list)      # snapshots left out for now, and why

    @property
    def any(self) -> bool:
        return bool(self.added or self.changed or self.removed
                    or any(a != b for a, b in self.moved.items()))


def rescan_run(run: Run, allow=None, now: float | None = None) -> Rescan:
    """Bring ``run`` up to date with its folders, in place (for a run still being written).

    Unchanged snapshots (same files, sizes and mtimes) are not touched, so
    their read columns stay; a snapshot whose files changed is re-opened (its
    old columns are dropped); new ones are opened (metadata only) and sorted
    in. A snapshot that cannot be opened is left out with a note and tried
    again once its files change. ``allow(ref) -> note or None`` may leave
    snapshots out (the server's confinement to the run folders).
    Raises InputError when the run's folders cannot be listed any more.
    """
    out = Rescan()
    if run.spec is None:
        return out
    now = time.time() if now is None else now
    refs, _ = find_snapshots(run.spec, out.notes)
    failed: dict = run.__dict__.setdefault("_failed", {})   # key -> (signature, note) of misses
    with run._lock:
        old_refs = list(run.refs)
        old_open = dict(run._open)
    old = {ref_key(r): (i, r) for i, r in enumerate(old_refs)}
    by_step = all(r.order_key[:1] == (0,) for r in old_refs)
    usual = max(_usual_parts(refs), _usual_parts(old_refs))
    keep: list[tuple[SnapshotRef, Snapshot | None, int | None]] = []   # (ref, new snap, old index)
    seen = set()
    for ref in refs:
        key = ref_key(ref)
        seen.add(key)
        if allow is not None:
            note = allow(ref)
            if note:
                out.notes.append(note)
                continue
        sig = ref.signature()
        if key in old and old[key][1].stamp == sig and len(old[key][1].paths) == len(ref.paths):
            keep.append((old[key][1], None, old[key][0]))
            continue
        if key in failed and failed[key][0] == sig:
            out.notes.append(failed[key][1])          # no change since it failed: not retried
            continue
        try:
            snap, note = _try_open(ref, run.role_map, usual, True, now)
        except SwarmAuditError as exc:
            note = f"{ref.label}: left out, it cannot be opened ({_why(exc)})"
            snap = None
        if snap is None:
            failed[key] = (sig, note)
            out.notes.append(note)
            if key in old:
                out.removed.append(ref.label)     # being rewritten: back once complete
            continue
        failed.pop(key, None)
        ref.stamp = sig
        ref.order_key = _order_key(ref, snap, by_step)
        keep.append((ref, snap, None))
        (out.changed if key in old else out.added).append(ref.label)
    out.removed += [r.label for k, (_, r) in old.items() if k not in seen]
    for k in [k for k in failed if k not in seen]:
        del failed[k]
    if not out.added and not out.changed and not out.removed:
        run.skipped = list(out.notes)
        return out
    keep.sort(key=lambda item: item[0].order_key)
    new_open = {}
    for j, (ref, snap, i) in enumerate(keep):
        if i is not None:
            out.moved[i] = j
            if i in old_open:
                new_open[j] = old_open[i]
        else:
            new_open[j] = snap
    with run._lock:
        run.refs = [ref for ref, _, _ in keep]
        run._open = new_open
        run.skipped = list(out.notes)
    return out
