"""From what the user typed (a folder, a glob, files) to an ordered Run."""

from __future__ import annotations

import glob
import os
import re
import time
from collections import defaultdict

from ..core.errors import InputError, SwarmAuditError
from ..core.frame import Snapshot, concat_frames
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


def find_snapshots(spec) -> tuple[list[SnapshotRef], str]:
    """SnapshotRefs for a folder, a glob, or a list of files/folders (unordered)."""
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


def open_ref(ref: SnapshotRef, role_map: RoleMap | None = None, columns=None) -> Snapshot:
    """Open the file(s) of one snapshot into one Snapshot (per-rank parts joined)."""
    role_map = role_map or RoleMap()
    snaps = [registry.open_snapshot(p, columns=columns) for p in ref.paths]
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
    for name in names:
        parts, ranks = [], []
        for i, s in enumerate(snaps):
            if name in s.species:
                parts.append(s.species[name].with_role_map(role_map))
                ranks.append(ref.ranks[i] if ref.ranks else i)
        steps = {s.step for s in snaps}
        if len(steps) > 1:
            raise InputError(ref.path, f"the per-rank files of this snapshot carry different steps "
                             f"{sorted(x for x in steps if x is not None)}")
        species[name] = concat_frames(parts, species=name, rank_values=ranks, source=ref.path)
    return Snapshot(ref.path, species, first.step, first.time, dict(first.meta), first.layout,
                    warnings, list(ref.paths), first.time_unit)


def _is_fresh(ref: SnapshotRef, now: float) -> bool:
    try:
        return any(now - os.stat(p).st_mtime < FRESH_SECONDS for p in ref.paths)
    except OSError:
        return True


def open_run(spec, role_map: RoleMap | None = None, *, follow: bool = True) -> Run:
    """Find, order and (lazily) open the snapshots of a run.

    Snapshots are ordered by their ``step``, else by the last integer in the
    name. With ``follow``, a snapshot that cannot be opened yet and was
    written in the last ``FRESH_SECONDS`` is left out with a note: the
    simulation is most likely still writing it.
    """
    role_map = role_map or RoleMap()
    refs, source = find_snapshots(spec)
    opened: list[tuple[SnapshotRef, Snapshot]] = []
    skipped: list[str] = []
    now = time.time()
    for ref in refs:
        try:
            snap = open_ref(ref, role_map)
        except SwarmAuditError as exc:
            if follow and _is_fresh(ref, now):
                skipped.append(f"{ref.label}: skipped for now, it looks like it is still being "
                               f"written ({exc})")
                continue
            raise
        opened.append((ref, snap))
    if not opened:
        if skipped:
            raise InputError(source, "no snapshot can be opened yet: " + "; ".join(skipped))
        raise InputError(source, "holds no snapshot files")
    have_steps = all(s.step is not None for _, s in opened)

    def key(item):
        ref, snap = item
        if have_steps:
            return (0, snap.step, ref.label)
        n = last_integer(ref.label)
        return (1, n if n is not None else -1, ref.label)

    opened.sort(key=key)
    for ref, snap in opened:
        ref.order_key = key((ref, snap))
    run = Run([r for r, _ in opened], lambda ref, rm: open_ref(ref, rm), role_map, source, skipped)
    for i, (_, snap) in enumerate(opened):
        run._open[i] = snap
    return run
