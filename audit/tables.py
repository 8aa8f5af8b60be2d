"""Run-level tables: census, imbalance, migration, drift, and the ``check`` gate.

Each function takes an :class:`AuditContext` and reads only the columns it
needs. Per-snapshot reductions all go through the context's one cache
(:func:`audit.cache.context_cache`: memory backed by disk, stale when a
snapshot's files, the options or the code change).
"""

from __future__ import annotations

import math
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..diagnostics import census as _census
from ..diagnostics import drift as _drift
from ..diagnostics.halo import Halo
from ..diagnostics.migration import DuplicateKeyError, Migration, MigrationResult
from ..diagnostics.rebalance import rebalance_whatif
from .cache import cached_reduction, context_cache, has_files, layout_fingerprint
from ..core.context import AuditContext
from ..engine.pieces import read_in_pieces
from ..engine.reduce import reduce, reduce_many
from ..core.errors import InputError, OptionError
from ..core.frame import is_clock_scalar, transient_columns
from ..core.layout import assign_blocks
from ..core.roles import SPECIES_CONSTANTS

CENSUS_COLUMNS = ["snapshot", "step", "time", "species", "block", "level", "rank", "count", "weight"]
RANK_COLUMNS = ["snapshot", "step", "time", "species", "rank", "count", "weight", "blocks"]
IMBALANCE_COLUMNS = ["snapshot", "step", "time", "species", "by", "max_over_mean", "cv", "max",
                     "mean", "min", "n"]
MIGRATION_COLUMNS = ["from_snapshot", "to_snapshot", "species", "from_block", "to_block", "count"]
SUMMARY_COLUMNS = ["from_snapshot", "to_snapshot", "species", "matched", "migrated", "created", "lost",
                   "max_displacement_cells", "over_one_cell"]
TRAFFIC_COLUMNS = ["from_snapshot", "to_snapshot", "species", "rank", "send", "receive"]
DRIFT_COLUMNS = list(_drift.DRIFT_COLUMNS)

ALL = "all"

#: quantities ``check`` judges when none are named: totals a closed run conserves
DEFAULT_CHECK = {"count": "each", "weight": "each", "charge": "each",
                 "momentum_x": ALL, "momentum_y": ALL, "momentum_z": ALL, "total_energy": ALL}


# helpers -----------------------------------------------------------------------------
def _note(ctx: AuditContext, text: str) -> None:
    if text not in ctx.notes:
        ctx.notes.append(text)


def _positions(ctx: AuditContext, snapshots) -> list[int]:
    n = len(ctx.run)
    if snapshots is None:
        return list(range(n))
    if isinstance(snapshots, (int, np.integer)):
        snapshots = [snapshots]
    out = []
    for s in snapshots:
        i = int(s)
        j = i + n if i < 0 else i
        if not 0 <= j < n:
            raise OptionError(f"snapshot {i} does not exist: the run has {n} snapshots (0 to {n - 1})")
        out.append(j)
    return out


def row_stamp(ctx: AuditContext, i: int, prefix: str = "") -> dict:
    """The columns that begin every row about snapshot ``i``: snapshot, step, time (``prefix``
    names the run when a row is about two: ``ref_``, ``cand_``)."""
    snap = ctx.run[i]
    return {f"{prefix}snapshot": i, f"{prefix}step": snap.step,
            f"{prefix}time": np.nan if snap.time is None else float(snap.time)}


_STEP_COLUMNS = ("step", "ref_step", "cand_step")
_SNAPSHOT_COLUMNS = ("snapshot", "from_snapshot", "to_snapshot", "ref_snapshot", "cand_snapshot")


def finish_table(rows_or_frames, columns, frames: bool = False) -> pd.DataFrame:
    """A table from rows (dicts) or from data frames, in ``columns`` order, with the DESIGN's
    column types: steps nullable integers (a run may store none), snapshots integers."""
    if frames:
        parts = [f for f in rows_or_frames if len(f)]
        df = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=columns)
    else:
        df = pd.DataFrame(list(rows_or_frames), columns=columns)
    df = df[columns]
    for col in _STEP_COLUMNS:
        if col in df:
            df[col] = pd.array(df[col], dtype="Int64")
    for col in _SNAPSHOT_COLUMNS:
        if col in df:
            df[col] = df[col].astype(np.int64)
    return df


def _present_species(ctx: AuditContext, i: int) -> list[str]:
    snap = ctx.run[i]
    return [s for s in ctx.species_names() if s in snap.species]


_transient = transient_columns


@contextmanager
def _held_open(*frames):
    """Keep the frames' files open while one reduction reads several of their columns.

    A reader offers this as ``Column.hold()``; other columns open per read as before.
    """
    with ExitStack() as stack:
        for f in frames:
            for name in f.columns:
                stack.enter_context(f.loader(name).hold())
        yield


def _check_axes(ctx: AuditContext, frame, layout, where: str) -> None:
    """Positions that fit the layout, or a block column, or a note that all go to block -1;
    an error for position axes that do not fit the layout."""
    if frame.ndim == layout.ndim and frame.ndim > 0:
        return
    if frame.ndim == 0:
        if frame.column_for("block") is None:
            _note(ctx, f"{where}: species '{frame.species}' has no position columns; its particles are "
                       "counted in block -1")
        return
    raise OptionError(f"{where}: species '{frame.species}' has {frame.ndim} position axes but the block "
                      f"layout has {layout.ndim} (check --domain/--layout or the column roles)")


def _where(ctx: AuditContext, i: int) -> str:
    return f"snapshot {i} ({ctx.run.refs[i].label})"


# the one door for per-snapshot reductions ----------------------------------------------
def _reduce(ctx: AuditContext, i: int, kind: str):
    """A per-snapshot reduction (``census`` or ``totals``), computed once per file version
    (the context's cache: memory, backed by disk)."""
    layout = ctx.layout(i) if kind == "census" else None
    return cached_reduction(ctx, i, kind, _params(layout), lambda: _COMPUTE[kind](ctx, i, layout))


def _params(layout) -> dict:
    """What a per-snapshot reduction depends on besides the files and the context: the layout
    (census); totals depend on nothing more. Every lookup of an entry uses this."""
    return {"layout": layout_fingerprint(layout)} if layout is not None else {}


def _compute_census(ctx: AuditContext, i: int, layout) -> dict:
    snap = ctx.run[i]
    out = {}
    for s in _present_species(ctx, i):
        frame = snap.species[s]
        _check_axes(ctx, frame, layout, _where(ctx, i))
        acc = _census.Census.of_frame(frame, layout)
        if acc is None:    # no positions and no block column: every particle in block -1
            got = _census.census_of_arrays(np.full(len(frame), -1, np.int64), layout,
                                           frame.per_particle("weight", 1.0),
                                           particle_rank=frame.role("rank"))
        else:
            with _held_open(frame):
                got = reduce(acc, frame, ctx)
        out[s] = (got["block"], got["rank"])
        bad = int(got.get("nonfinite", 0))
        if bad:
            _note(ctx, f"{_where(ctx, i)}: {bad:,} particle(s) of species '{s}' with a NaN or "
                       "infinite position are counted in block -1")
    return out


#: snapshots whose totals are computed together when one of them is asked for and the next
#: ones are not known yet either (a pass over a run): their pieces share the threads
TOTALS_AHEAD = 8


def _compute_totals(ctx: AuditContext, i: int, layout) -> dict:
    cache = context_cache(ctx)
    # together only what is read in pieces: a batch must not hold several snapshots' columns
    later = [j for j in range(i + 1, min(i + TOTALS_AHEAD, len(ctx.run)))
             if not cache.has(j, "totals", _params(None)) and _in_pieces(ctx, j)] if _in_pieces(ctx, i) else []
    if later:
        try:
            done = _totals_of(ctx, [i] + later)
        except Exception:   # SwarmAuditError or otherwise: a later snapshot must not fail this one
            done = None
        if done is not None:
            for j in later:
                cache.put(j, "totals", _params(None), done[j])
            return done[i]
    return _totals_of(ctx, [i])[i]


def _in_pieces(ctx: AuditContext, j: int) -> bool:
    """Whether snapshot ``j``'s totals keep no full column of it in memory (see TOTALS_AHEAD)."""
    try:
        snap = ctx.run[j]
        for s in _present_species(ctx, j):
            frame = snap.species[s]
            if not read_in_pieces(frame, _drift.Totals.of_frame(frame).columns):
                return False
        return True
    except Exception:   # SwarmAuditError or otherwise: it is computed (and reported) on its own
        return False


def _totals_of(ctx: AuditContext, indices) -> dict:
    """``{snapshot: {species: (values, nonfinite)}}``: the totals of all of them reduced together
    (their pieces share the workers, :func:`engine.reduce.reduce_many`)."""
    out: dict = {i: {} for i in indices}
    jobs, keys = [], []
    for i in indices:
        snap = ctx.run[i]
        for s in _present_species(ctx, i):
            frame = snap.species[s]
            jobs.append((_drift.Totals.of_frame(frame, ctx.relativistic, ctx.c), frame))
            keys.append((i, s))
    frames = [f for _, f in jobs]
    with _transient(frames), _held_open(*frames):
        results = reduce_many(jobs, ctx)
    for (i, s), got in zip(keys, results):
        out[i][s] = got
    return out


_COMPUTE = {"census": _compute_census, "totals": _compute_totals}


def _sum_block_tables(tables) -> pd.DataFrame:
    """The census of all species: per-species tables share the layout's block order."""
    first = tables[0]
    blocks = first["block"].to_numpy()
    nb = int(np.count_nonzero(blocks >= 0))
    same = all(len(t) >= nb and np.array_equal(t["block"].to_numpy()[:nb], blocks[:nb]) for t in tables)
    if not same:   # not from one layout: fall back to matching rows by block
        df = pd.concat(tables, ignore_index=True)
        g = df.groupby(["block", "level", "rank"], sort=False)[["count", "weight"]].sum().reset_index()
        return pd.concat([g[g["block"] >= 0], g[g["block"] < 0]], ignore_index=True)
    count = np.sum([t["count"].to_numpy()[:nb] for t in tables], axis=0).astype(np.int64)
    weight = np.sum([t["weight"].to_numpy(dtype=np.float64)[:nb] for t in tables], axis=0)
    out_n = int(sum(t["count"].to_numpy()[nb:].sum() for t in tables))
    out_w = float(sum(t["weight"].to_numpy(dtype=np.float64)[nb:].sum() for t in tables))
    cols = {"block": blocks[:nb], "level": first["level"].to_numpy()[:nb],
            "rank": first["rank"].to_numpy()[:nb], "count": count, "weight": weight}
    if out_n:
        cols = {k: np.append(v, x) for (k, v), x in zip(cols.items(), (-1, -1, -1, out_n, out_w))}
    return pd.DataFrame(cols)


def _stack(parts, columns) -> pd.DataFrame:
    """One table from (stamp, species, table) parts, built once (pandas is slow on many small appends)."""
    if not parts:
        return finish_table([], columns)
    data = {}
    sizes = [len(t) for _, _, t in parts]
    for c in columns:
        if c in ("snapshot", "step", "time"):
            data[c] = np.repeat([stamp[c] for stamp, _, _ in parts], sizes)
        elif c == "species":
            data[c] = np.repeat(np.array([s for _, s, _ in parts], dtype=object), sizes)
        else:
            data[c] = np.concatenate([t[c].to_numpy() for _, _, t in parts])
    steps = [stamp["step"] for stamp, _, _ in parts]
    if any(x is None for x in steps):
        data["step"] = np.repeat(np.array(steps, dtype=object), sizes)
    return finish_table([pd.DataFrame(data)], columns, frames=True)


def _sum_rank_tables(tables) -> pd.DataFrame:
    df = pd.concat(tables, ignore_index=True)
    g = df.groupby("rank", sort=True).agg(count=("count", "sum"), weight=("weight", "sum"),
                                          blocks=("blocks", "max")).reset_index()
    return pd.concat([g[g["rank"] >= 0], g[g["rank"] < 0]], ignore_index=True)


# census ------------------------------------------------------------------------------
def census_table(ctx: AuditContext, snapshots=None) -> pd.DataFrame:
    """Particles and weight per block, per snapshot, for each species and ``all``."""
    parts = []
    for i in _positions(ctx, snapshots):
        per = _reduce(ctx, i, "census")
        if not per:
            continue
        stamp = row_stamp(ctx, i)
        tables = {s: bc for s, (bc, _) in per.items()}
        tables[ALL] = _sum_block_tables(list(tables.values()))
        parts.extend((stamp, s, bc) for s, bc in tables.items())
    return _stack(parts, CENSUS_COLUMNS)


def rank_table(ctx: AuditContext, i: int) -> pd.DataFrame:
    """Particles, weight and owned blocks per rank at snapshot ``i``, per species and ``all``.

    Particles carrying a rank column are counted at that rank; others at
    their block's owner.
    """
    (i,) = _positions(ctx, [i])
    per = _reduce(ctx, i, "census")
    if not per:
        return finish_table([], RANK_COLUMNS, frames=True)
    stamp = row_stamp(ctx, i)
    tables = {s: rc for s, (_, rc) in per.items()}
    tables[ALL] = _sum_rank_tables(list(tables.values()))
    return _stack([(stamp, s, t) for s, t in tables.items()], RANK_COLUMNS)


def imbalance_table(ctx: AuditContext, snapshots=None) -> pd.DataFrame:
    """Load imbalance (particle counts) over ranks and over blocks, per snapshot and species."""
    rows = []
    for i in _positions(ctx, snapshots):
        per = _reduce(ctx, i, "census")
        if not per:
            continue
        stamp = row_stamp(ctx, i)
        blocks = {s: bc for s, (bc, _) in per.items()}
        ranks = {s: rc for s, (_, rc) in per.items()}
        blocks[ALL] = _sum_block_tables(list(blocks.values()))
        ranks[ALL] = _sum_rank_tables(list(ranks.values()))
        for s in blocks:
            for by, t, col in (("rank", ranks[s], "rank"), ("block", blocks[s], "block")):
                loads = t.loc[t[col] >= 0, "count"].to_numpy()   # particles in no block load nobody
                rows.append({**stamp, "species": s, "by": by, **_census.imbalance(loads)})
    return finish_table(rows, IMBALANCE_COLUMNS)


def rebalance_table(ctx: AuditContext, i: int, nranks: int | None = None) -> pd.DataFrame:
    """Rank imbalance of snapshot ``i`` (all species) now and under other block-to-rank maps."""
    (i,) = _positions(ctx, [i])
    per = _reduce(ctx, i, "census")
    layout = ctx.layout(i)
    if not per:
        return rebalance_whatif(np.zeros(layout.nblocks), layout, nranks)
    return rebalance_whatif(_sum_block_tables([bc for bc, _ in per.values()]), layout, nranks)


def halo_table(ctx: AuditContext, i: int, width_cells: float = 1) -> pd.DataFrame:
    """Per block: particles and those within ``width_cells`` of a shared face, per species and all."""
    (i,) = _positions(ctx, [i])
    snap = ctx.run[i]
    layout = ctx.layout(i)
    parts = []
    for s in _present_species(ctx, i):
        frame = snap.species[s]
        if frame.ndim != layout.ndim:
            _note(ctx, f"{_where(ctx, i)}: species '{s}' has no positions matching the layout; "
                       "left out of the halo table")
            continue
        with _transient([frame]):
            parts.append(reduce(Halo(layout, frame.position_names, width_cells), frame, ctx)
                         .assign(species=s))
    if not parts:
        return pd.DataFrame(columns=["snapshot", "species", "block", "count", "halo"])
    total = (pd.concat(parts).groupby("block", sort=False)[["count", "halo"]].sum().reset_index()
             .assign(species=ALL))
    df = pd.concat(parts + [total], ignore_index=True).assign(snapshot=i)
    return df[["snapshot", "species", "block", "count", "halo"]]


# migration ---------------------------------------------------------------------------
def _pairs(ctx: AuditContext, pairs) -> list[tuple[int, int]]:
    n = len(ctx.run)
    if pairs is None:
        return [(i, i + 1) for i in range(n - 1)]
    out = []
    for a, b in pairs:
        (a2, b2) = _positions(ctx, [a, b])
        out.append((a2, b2))
    return out


def _migration_pair(ctx: AuditContext, a: int, b: int) -> dict:
    """species -> MigrationResult for one pair (cached like the reductions)."""
    la, lb = ctx.layout(a), ctx.layout(b)
    sig_b = ctx.run.refs[b].signature()
    steps = [ctx.run[a].step, ctx.run[b].step]     # taken from the names or an option when not stored
    params = {"with": [list(t) for t in sig_b], "layout_a": layout_fingerprint(la),
              "layout_b": layout_fingerprint(lb), "periodic": [list(la.periodic), list(lb.periodic)],
              "steps": steps}
    # kept on disk only when the second snapshot has files to key on too
    return cached_reduction(ctx, a, "migration", params, lambda: _compute_migration(ctx, a, b, la, lb),
                            persist=has_files(sig_b))


def _compute_migration(ctx: AuditContext, a: int, b: int, la, lb) -> dict:
    sa, sb = ctx.run[a], ctx.run[b]
    steps = (sb.step - sa.step) if (sa.step is not None and sb.step is not None) else None
    results: dict[str, MigrationResult] = {}
    pair = f"snapshots {a} -> {b}"
    for s in ctx.species_names():
        fa, fb = sa.species.get(s), sb.species.get(s)
        if fa is None and fb is None:
            continue
        if fa is None or fb is None:
            # the species appears or vanishes as a whole: no ids needed
            _note(ctx, f"species '{s}' is in only one of {pair}: counted as "
                       f"{'created' if fa is None else 'lost'}")
            n = len(fb) if fa is None else len(fa)
            empty_t = pd.DataFrame({c: np.zeros(0, np.int64) for c in MIGRATION_COLUMNS[3:]})
            empty_r = pd.DataFrame({c: np.zeros(0, np.int64) for c in ("rank", "send", "receive")})
            results[s] = MigrationResult(0, 0, n if fa is None else 0, n if fb is None else 0,
                                         np.nan, 0, 1, empty_t, empty_r)
            continue
        ka_cols, kb_cols = fa.key_columns(), fb.key_columns()
        if not ka_cols or not kb_cols:
            which = a if not ka_cols else b
            _note(ctx, f"{_where(ctx, which)}: species '{s}' has no id column, so migration between "
                       f"{pair} is skipped for it (name one with --role id=NAME or --id COLS)")
            continue
        if len(ka_cols) != len(kb_cols):
            _note(ctx, f"species '{s}': the id columns differ between {pair}; migration skipped")
            continue
        try:
            for f, lay, k in ((fa, la, a), (fb, lb, b)):
                _check_axes(ctx, f, lay, _where(ctx, k))
            with _held_open(fa, fb):
                res = reduce(Migration.of_frames(fa, fb, la, lb, steps), [fa, fb], ctx)
        except DuplicateKeyError as exc:
            _note(ctx, f"species '{s}', {pair}: {exc}; migration skipped for it")
            continue
        for text in res.notes:
            _note(ctx, f"species '{s}', {pair}: {text}")
        results[s] = res
    return results


def _combine(results: dict[str, MigrationResult]) -> dict:
    disp = [r.max_displacement_cells for r in results.values() if np.isfinite(r.max_displacement_cells)]
    return {"matched": sum(r.matched for r in results.values()),
            "migrated": sum(r.migrated for r in results.values()),
            "created": sum(r.created for r in results.values()),
            "lost": sum(r.lost for r in results.values()),
            "max_displacement_cells": max(disp) if disp else np.nan,
            "over_one_cell": sum(r.over_one_cell for r in results.values())}


def migration_tables(ctx: AuditContext, pairs=None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(migration, summary): block-to-block moves and per-pair totals, per species and ``all``.

    Default pairs are consecutive snapshots. A species without ids in one of
    the two snapshots is skipped for that pair (with a note in ``ctx.notes``).
    """
    moves, summary = [], []
    for a, b in _pairs(ctx, pairs):
        results = _migration_pair(ctx, a, b)
        if not results:
            continue
        head = {"from_snapshot": a, "to_snapshot": b}
        for s, r in results.items():
            summary.append({**head, "species": s, **r.summary()})
            if len(r.transfer):
                moves.append(r.transfer.assign(species=s, **head))
        summary.append({**head, "species": ALL, **_combine(results)})
        tr = [r.transfer for r in results.values() if len(r.transfer)]
        if tr:
            total = (pd.concat(tr, ignore_index=True).groupby(["from_block", "to_block"], sort=True)["count"]
                     .sum().reset_index())
            moves.append(total.assign(species=ALL, **head))
    mig = finish_table(moves, MIGRATION_COLUMNS, frames=True)
    for col in ("from_block", "to_block", "count"):
        mig[col] = mig[col].astype(np.int64)
    summ = finish_table(summary, SUMMARY_COLUMNS)
    for col in ("matched", "migrated", "created", "lost", "over_one_cell"):
        summ[col] = summ[col].astype(np.int64)
    summ["max_displacement_cells"] = summ["max_displacement_cells"].astype(np.float64)
    return mig, summ


def traffic_table(ctx: AuditContext, pairs=None) -> pd.DataFrame:
    """Per rank: matched particles sent away and received between snapshot pairs."""
    frames = []
    for a, b in _pairs(ctx, pairs):
        results = _migration_pair(ctx, a, b)
        head = {"from_snapshot": a, "to_snapshot": b}
        per = []
        for s, r in results.items():
            if len(r.traffic):
                per.append(r.traffic)
                frames.append(r.traffic.assign(species=s, **head))
        if per:
            total = pd.concat(per).groupby("rank", sort=True)[["send", "receive"]].sum().reset_index()
            frames.append(total.assign(species=ALL, **head))
    df = finish_table(frames, TRAFFIC_COLUMNS, frames=True)
    for col in ("rank", "send", "receive"):
        df[col] = df[col].astype(np.int64)
    return df


# drift -------------------------------------------------------------------------------
def _meta_scalars(snap) -> dict[str, float]:
    """The stored scalars that are drift rows: not the clock (time, step; see
    :func:`core.frame.is_clock_scalar`), not a species' mass or charge."""
    out = {}
    for k, v in (snap.meta or {}).items():
        if isinstance(v, (bool, np.bool_)) or is_clock_scalar(k) or str(k).strip().lower() in SPECIES_CONSTANTS:
            continue
        try:
            f = float(v)
        except (TypeError, ValueError):
            continue
        if np.ndim(v) == 0:
            name = f"meta_{k}" if k in _drift.PARTICLE_QUANTITIES or k == "total_energy" else k
            out[name] = f
    return out


def _energy_meta(names) -> list[str]:
    return sorted(n for n in names if n.endswith("_energy") and not n.startswith("meta_"))


def drift_rows(ctx: AuditContext) -> list[dict]:
    """Rows for :func:`diagnostics.drift.drift_table`: every total of every snapshot."""
    rows: list[dict] = []
    species = ctx.species_names()
    n = len(ctx.run)
    present = {s: [i for i in range(n) if s in ctx.run[i].species] for s in species}
    for s, where in present.items():
        if where and len(where) < n:
            _note(ctx, f"species '{s}' is in {len(where)} of {n} snapshots only: its totals are "
                       f"compared from snapshot {where[0]} on")
    metas = [_meta_scalars(ctx.run[i]) for i in range(n)]
    energy_names = _energy_meta(set().union(*metas) if metas else set())
    if not energy_names:
        _note(ctx, "no field or potential energy is stored beside the particles, so total_energy "
                   "is not formed (kinetic_energy is still tabulated)")
    for i in range(n):
        stamp = row_stamp(ctx, i)
        per = _reduce(ctx, i, "totals")
        sums: dict[str, list] = {}
        for s, (values, bad) in per.items():
            scales = {k: values.get(k, np.nan) for k in _drift.SCALE_QUANTITIES}
            for q in _drift.PARTICLE_QUANTITIES:
                if q in values:
                    rows.append({**stamp, "species": s, "quantity": q, "value": values[q],
                                 "nonfinite": bad.get(q, 0), **scales})
            for q in list(_drift.PARTICLE_QUANTITIES) + list(_drift.SCALE_QUANTITIES):
                sums.setdefault(q, []).append((values.get(q), bad.get(q, 0)))
        missing_for_all = []
        all_values: dict[str, tuple[float, int]] = {}
        for q, items in sums.items():
            if any(v is None for v, _ in items):
                if any(v is not None for v, _ in items) and q in _drift.PARTICLE_QUANTITIES:
                    missing_for_all.append(q)
                continue
            all_values[q] = (float(sum(v for v, _ in items)), int(sum(b for _, b in items)))
        if missing_for_all:
            _note(ctx, f"{_where(ctx, i)}: {', '.join(missing_for_all)} cannot be formed for every "
                       "species (no mass, charge or momentum columns), so there is no 'all' total of it")
        if per:
            scales = {k: all_values.get(k, (np.nan, 0))[0] for k in _drift.SCALE_QUANTITIES}
            for q in _drift.PARTICLE_QUANTITIES:
                if q in all_values:
                    v, b = all_values[q]
                    rows.append({**stamp, "species": ALL, "quantity": q, "value": v, "nonfinite": b,
                                 **scales})
        meta = metas[i]
        for name, v in meta.items():
            rows.append({**stamp, "species": ALL, "quantity": name, "value": v,
                         "nonfinite": 0 if math.isfinite(v) else 1})
        if energy_names and "kinetic_energy" in all_values:
            if all(e in meta for e in energy_names):
                ke, b = all_values["kinetic_energy"]
                rows.append({**stamp, "species": ALL, "quantity": "total_energy",
                             "value": ke + sum(meta[e] for e in energy_names),
                             "nonfinite": b + sum(0 if math.isfinite(meta[e]) else 1 for e in energy_names)})
            else:
                _note(ctx, f"{_where(ctx, i)} lacks {', '.join(e for e in energy_names if e not in meta)}: "
                           "no total_energy there")
    return rows


def drift_details(ctx: AuditContext) -> pd.DataFrame:
    """The drift table plus ``nonfinite``, ``scale`` and ``note`` columns."""
    df = _drift.drift_table(drift_rows(ctx))
    df["step"] = pd.array(df["step"], dtype="Int64")
    df["snapshot"] = df["snapshot"].astype(np.int64)
    for note in sorted(set(df["note"]) - {""}):
        _note(ctx, note)
    bad = df[df["nonfinite"] > 0]
    for _, r in bad.drop_duplicates(["species", "quantity"]).iterrows():
        _note(ctx, f"{r['quantity']} of species {r['species']}: {int(r['nonfinite'])} non-finite value(s) "
                   f"at snapshot {int(r['snapshot'])} were left out of the total")
    return df


def drift_table(ctx: AuditContext, details: bool = False) -> pd.DataFrame:
    """``snapshot,step,time,species,quantity,value,reference,relative_drift`` for every total.

    Per species and ``all``: count, weight, charge, momentum_x/y/z,
    kinetic_energy; numeric per-snapshot scalars (``field_energy``...) as
    species ``all``; ``total_energy`` = kinetic energy of all species plus
    the energy-like scalars (names ending in ``_energy``).
    """
    df = drift_details(ctx)
    return df if details else df[DRIFT_COLUMNS].copy()


# check -------------------------------------------------------------------------------
def validate_snapshots(ctx: AuditContext, allow_empty: bool = False) -> None:
    """Refuse (InputError) what the export would refuse in snapshots ``check`` judges.

    Every snapshot must hold particles unless ``allow_empty`` (``check --allow-empty``), and
    the position and id columns, which the totals do not read, must read cleanly (numbers in
    every row, rows as long as the header): one extra read of those columns per snapshot file
    version, remembered in the reduction cache like any other per-snapshot answer.
    """
    names = ctx.species_names()
    for i in range(len(ctx.run)):
        snap = ctx.run[i]
        frames = [snap.species[s] for s in names if s in snap.species]
        if not allow_empty and sum(f.length for f in frames) == 0:
            raise InputError(snap.path, "holds no particles",
                             "if the run may be empty at some snapshots, pass --allow-empty")
        cached_reduction(ctx, i, "readable", {}, lambda frames=frames: _read_cleanly(frames))


def _read_cleanly(frames) -> bool:
    for f in frames:
        names = list(dict.fromkeys(list(f.position_names) + list(f.key_columns() or ())))
        with _held_open(f.select(names)):     # each file opened once for all of them
            for c in names:
                f.read_uncached(c)
    return True


@dataclass
class CheckResult:
    ok: bool
    failures: list = field(default_factory=list)
    lines: list[str] = field(default_factory=list)
    table: pd.DataFrame | None = None


def _select(df: pd.DataFrame, quantities) -> pd.DataFrame:
    if quantities:
        wanted = [q.strip() for q in quantities if q and q.strip()]
        known = list(dict.fromkeys(df["quantity"]))
        unknown = [q for q in wanted if q not in known]
        if unknown:
            raise OptionError(f"--quantities: no total called {', '.join(unknown)} in this run; "
                              f"there are: {', '.join(known) or 'none'}")
        return df[df["quantity"].isin(wanted)]
    keep = np.zeros(len(df), dtype=bool)
    for q, who in DEFAULT_CHECK.items():
        m = df["quantity"].to_numpy() == q
        if who == ALL:
            m &= df["species"].to_numpy() == ALL
        keep |= m
    return df[keep]


def checked_pairs(drift_df: pd.DataFrame, quantities=None) -> list[tuple[str, str]]:
    """The (species, quantity) pairs ``check`` judges in a drift table (the default set unless named)."""
    sel = _select(drift_df, quantities)
    return list(dict.fromkeys(zip(sel["species"].astype(str), sel["quantity"].astype(str))))


def _pct(x: float) -> str:
    if not np.isfinite(x):
        return "n/a"
    if x == 0:
        return "0 %"
    return f"{x:+.3g} %" if abs(x) < 1 else f"{x:+.1f} %"


def check(ctx: AuditContext, rtol: float, quantities=None) -> CheckResult:
    """Does every checked total stay within ``rtol`` of the first snapshot?

    Judged: ``|value - reference| <= rtol * scale`` where the scale is
    ``|reference|``; for momentum components the reference Σ|momentum|; for
    a zero reference Σ|w q| (charge) or the largest value in the run. A
    non-finite total, or non-finite particle values, leave the band too.
    Default quantities: count, weight and charge of every species and of
    ``all``; momentum and total_energy of ``all``.
    """
    try:
        rtol = float(rtol)
    except (TypeError, ValueError):
        raise OptionError(f"--rtol takes a positive number, got '{rtol}'") from None
    if not (rtol > 0 and math.isfinite(rtol)):
        raise OptionError(f"--rtol takes a positive number, got '{rtol}'")
    if isinstance(quantities, str):
        quantities = quantities.split(",")
    df = drift_details(ctx)
    sel = _select(df, quantities).reset_index(drop=True)
    nsnap = len(ctx.run)
    if nsnap < 2:
        _note(ctx, "the run has a single snapshot: there is nothing to compare it with")
    if sel.empty:
        return CheckResult(True, [], ["ok: nothing to check (no totals could be formed)"], sel)
    out = _drift.violations(sel, rtol).to_numpy()
    with np.errstate(invalid="ignore", divide="ignore"):
        judged = ((sel["value"] - sel["reference"]) / sel["scale"]).to_numpy(dtype=np.float64) * 100
    sel = sel.assign(judged_pct=judged, out=out)
    summary, failures = [], []
    for (s, q), g in sel.groupby(["species", "quantity"], sort=False):
        worst_i = int(np.nanargmax(np.abs(g["judged_pct"].to_numpy()))) if np.isfinite(
            g["judged_pct"].to_numpy()).any() else 0
        worst = g.iloc[worst_i]
        bad = g[g["out"]]
        row = {"quantity": q, "species": s, "worst": float(worst["judged_pct"]),
               "at": int(worst["snapshot"]), "first_out": int(bad.iloc[0]["snapshot"]) if len(bad) else None}
        summary.append(row)
        if len(bad):
            b = bad.iloc[0]
            reason = "non-finite" if (not np.isfinite(b["value"]) or b["nonfinite"] > 0) else "drift"
            failures.append({"quantity": q, "species": s, "snapshot": int(b["snapshot"]),
                             "step": None if pd.isna(b["step"]) else int(b["step"]),
                             "time": float(b["time"]), "value": float(b["value"]),
                             "reference": float(b["reference"]), "drift_pct": float(b["judged_pct"]),
                             "reference_snapshot": int(b["reference_snapshot"]),
                             "nonfinite": int(b["nonfinite"]), "reason": reason})
    order = {q: k for k, q in enumerate(dict.fromkeys(sel["quantity"]))}
    # earliest first; a named species before 'all', which only echoes it
    failures.sort(key=lambda f: (f["snapshot"], order[f["quantity"]], f["species"] == ALL))
    band = f"±{rtol * 100:.3g} %"
    lines = []
    if failures:
        f = failures[0]
        step = f" (step {f['step']})" if f["step"] is not None else ""
        if f["reason"] == "non-finite":
            what = (f"has {f['nonfinite']} non-finite particle value(s)" if f["nonfinite"]
                    else "is not a finite number")
            lines.append(f"FAIL: {f['quantity']} of species {f['species']} {what} at snapshot "
                         f"{f['snapshot']}{step}")
        else:
            lines.append(f"FAIL: {f['quantity']} of species {f['species']} left the {band} band at "
                         f"snapshot {f['snapshot']}{step}: {f['value']:.9g} against {f['reference']:.9g} "
                         f"at snapshot {f['reference_snapshot']} ({_pct(f['drift_pct'])})")
        if len(failures) > 1:
            lines.append(f"{len(failures) - 1} more total(s) left the band too (see the table)")
    else:
        worst = max(summary, key=lambda r: abs(r["worst"]) if np.isfinite(r["worst"]) else -1)
        lines.append(f"ok: {len(summary)} total(s) over {nsnap} snapshot(s) stay within {band} of the "
                     f"first snapshot (largest: {worst['quantity']} of {worst['species']}, "
                     f"{_pct(worst['worst'])} at snapshot {worst['at']})")
    table = pd.DataFrame(summary)
    table["status"] = np.where(table["first_out"].isna(), "ok", "FAIL")
    table = table.sort_values(["status", "first_out"], ascending=[True, True], kind="stable",
                              key=lambda c: c.map({"FAIL": 0, "ok": 1}) if c.name == "status" else c)
    lines.extend(_format_table(table, limit=20))
    return CheckResult(not failures, failures, lines, table.reset_index(drop=True))


def _format_table(table: pd.DataFrame, limit: int) -> list[str]:
    head = f"{'quantity':<18} {'species':<14} {'largest drift':>14} {'at':>5} {'first out':>9}  status"
    lines = [head]
    for _, r in table.head(limit).iterrows():
        first = "-" if pd.isna(r["first_out"]) else str(int(r["first_out"]))
        lines.append(f"{r['quantity']:<18} {str(r['species']):<14} {_pct(r['worst']):>14} "
                     f"{int(r['at']):>5} {first:>9}  {r['status']}")
    if len(table) > limit:
        lines.append(f"... {len(table) - limit} more (all within the band)"
                     if (table["status"].iloc[limit:] == "ok").all() else f"... {len(table) - limit} more")
    return lines


def snapshot_census(ctx: AuditContext, i: int, species: str = ALL, census_df: pd.DataFrame | None = None):
    """(blocks, ranks, rank imbalance facts) of snapshot ``i`` for one species or ``all``.

    What the census figures of the screen and the report draw; ``census_df``
    (a ``census_table``) spares a second pass when the caller has it.
    """
    blocks = census_df if census_df is not None else census_table(ctx, [i])
    blocks = blocks[(blocks["snapshot"] == i) & (blocks["species"].astype(str) == species)]
    ranks = rank_table(ctx, i)
    ranks = ranks[ranks["species"].astype(str) == species]
    imb = imbalance_table(ctx, [i])
    row = imb[(imb["species"].astype(str) == species) & (imb["by"] == "rank")] if len(imb) else imb
    facts = row.iloc[0].to_dict() if len(row) else None
    return blocks, ranks, facts


def pair_displacements(ctx: AuditContext, a: int, b: int, species) -> tuple[np.ndarray, int | None]:
    """Displacement in level-0 cells of every particle matched between snapshots a and b.

    ``species`` is a list of names; species without a key (or with repeated
    keys, which the migration tables note) are left out. Returns the
    displacements and the steps between the snapshots (None when unknown).
    """
    from ..diagnostics.migration import Displacements
    sa, sb = ctx.run[a], ctx.run[b]
    layout = ctx.layout(a)
    steps = (sb.step - sa.step) if (sa.step is not None and sb.step is not None) else None
    parts = []
    for sp in species:
        fa, fb = sa.species.get(sp), sb.species.get(sp)
        if fa is None or fb is None or fa.ndim != layout.ndim or fb.ndim != layout.ndim:
            continue
        ka, kb = fa.key_columns(), fb.key_columns()
        if not ka or not kb or len(ka) != len(kb):
            continue
        acc = Displacements((ka, kb), (fa.position_names, fb.position_names), layout)
        with transient_columns([fa, fb]):
            try:
                parts.append(reduce(acc, [fa, fb], ctx))
            except DuplicateKeyError:
                continue
    disp = np.concatenate(parts) if parts else np.zeros(0)
    return disp, (int(steps) if steps is not None and steps > 0 else None)
