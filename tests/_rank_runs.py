"""Frames and runs split over ranks, as a parallel code writes them.

:func:`split_frame` joins in-memory parts the way per-rank files are joined. On disk: one
folder per snapshot, one HDF5 file per rank, a group per species, the block layout in a
``blocks`` group.

:func:`write_rank_snapshot` writes one snapshot; :func:`write_moving_run` writes a run of several
snapshots with what the engines must all get right: a refined (non-regular) layout over three
ranks with a periodic x axis, float32 and float64 columns, particles lost and created between
snapshots, uneven step gaps, and marked particles that move exactly ``steps`` level-0 cells
between two snapshots (not over one cell per step) or a hair more (over).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np

from swarmaudit.core.column import Column
from swarmaudit.core.frame import Frame, concat_frames
from swarmaudit.core.layout import BlockLayout, assign_blocks, regular_layout


def memory_frame(arrays, species="e", attrs=None, rows=True) -> Frame:
    """A frame over in-memory arrays; ``rows``: its columns read row ranges (so pieces cut it)."""
    n = len(next(iter(arrays.values())))
    loaders = {}
    for c, a in arrays.items():
        load = (lambda a=a: a.copy())
        loaders[c] = (Column(load, rows=lambda s, e, a=a: a[s:e].copy(), dtype=a.dtype, length=len(a))
                      if rows else load)
    return Frame(species, n, loaders, attrs=attrs or {})


def split_frame(arrays, cuts, attrs=None, rows=True, ranks=None, species="e") -> Frame:
    """The arrays as per-rank parts cut at ``cuts`` (joined like per-rank files are)."""
    edges = [0, *cuts, len(next(iter(arrays.values())))]
    parts = [memory_frame({c: a[lo:hi] for c, a in arrays.items()}, species, attrs=attrs, rows=rows)
             for lo, hi in zip(edges[:-1], edges[1:])]
    return concat_frames(parts, species=species, rank_values=ranks)


def ranks_from_cuts(n: int, cuts) -> np.ndarray:
    """Rank of each of ``n`` rows when consecutive parts end at ``cuts``."""
    edges = [0, *cuts, n]
    return np.repeat(np.arange(len(edges) - 1), np.diff(edges))


def write_blocks_group(fh, layout: BlockLayout) -> None:
    """The layout as DESIGN's HDF5 ``blocks`` group."""
    b = fh.create_group("blocks")
    b.create_dataset("lower", data=layout.lower)
    b.create_dataset("upper", data=layout.upper)
    b.create_dataset("level", data=layout.level)
    b.create_dataset("rank", data=layout.rank)
    b.create_dataset("id", data=layout.block_id)
    b.attrs["domain_lower"] = layout.domain_lower
    b.attrs["domain_upper"] = layout.domain_upper
    b.attrs["cells"] = layout.cells
    b.attrs["periodic"] = ",".join(a for a, p in zip("xyz", layout.periodic) if p)


def write_rank_snapshot(folder, step: int, species: dict, nranks: int | None = None, *,
                        layout: BlockLayout | None = None, scalars: dict | None = None) -> str:
    """``folder/step_NNNNNN/rank_RRR.h5``: ``species`` maps a name to ``(columns, attrs, rank of
    each row)``; every rank's file holds every species (zero rows where it has none)."""
    import h5py
    sub = os.path.join(os.fspath(folder), f"step_{step:06d}")
    os.makedirs(sub)
    top = max(int(np.max(r, initial=0)) for _, _, r in species.values()) + 1
    for r in range(max(top, nranks or 0)):
        with h5py.File(os.path.join(sub, f"rank_{r:03d}.h5"), "w") as fh:
            fh.attrs["step"] = step
            for k, v in (scalars or {}).items():
                fh.attrs[k] = v
            for name, (columns, attrs, rank) in species.items():
                g = fh.create_group(name)
                for k, v in attrs.items():
                    g.attrs[k] = v
                mine = np.asarray(rank) == r
                for c, a in columns.items():
                    g.create_dataset(c, data=np.asarray(a)[mine])
            if layout is not None:
                write_blocks_group(fh, layout)
    return sub


# the moving run ---------------------------------------------------------------------------
#: level-0 cells of 1/8 in both axes: whole-cell moves are exact in binary floating point
DOMAIN = (0.0, 2.0, 0.0, 1.0)
CELLS = (16, 8)
STEPS = (0, 4, 10, 12)            # 4, 6 and 2 steps apart: each move under half the periodic box
HAIR = {np.float64: 2.0 ** -30, np.float32: 2.0 ** -12}   # cells: a few units in the last place


def refined_layout() -> BlockLayout:
    """4 x 2 level-0 blocks dealt to 3 ranks by column, two level-1 blocks on top; block ids that
    are not row numbers; x periodic, y not."""
    base = regular_layout(DOMAIN, CELLS, (4, 2), periodic=("x",))
    lower = np.concatenate([base.lower, [[0.25, 0.25], [1.25, 0.5]]])
    upper = np.concatenate([base.upper, [[0.75, 0.5], [1.5, 1.0]]])
    level = [0] * 8 + [1, 1]
    rank = [ix * 3 // 4 for iy in range(2) for ix in range(4)] + [2, 0]
    lay = BlockLayout(lower, upper, level, rank, base.domain_lower, base.domain_upper, base.cells,
                      base.periodic, block_id=[3 * k + 1 for k in range(10)])
    lay.validate()
    return lay


@dataclass
class Marked:
    """Particles of one species moved by whole cells on purpose: ``exact`` ids move exactly
    ``steps`` cells between each pair of snapshots, ``hair`` ids a hair more."""

    exact: list = field(default_factory=list)
    hair: list = field(default_factory=list)


# (axis, direction, start) of the marked particles: +x, -x, +x across the periodic edge, +y
_MARKED_MOVES = [(0, 1, (0.5, 0.375)), (0, -1, (1.5, 0.625)), (0, 1, (1.75, 0.875)),
                 (1, 1, (1.0, 0.0625))]


def _species_states(rng, n, dtype, weight: bool):
    lx, ly = DOMAIN[1], DOMAIN[3]
    h = lx / CELLS[0]
    x = rng.uniform(0, lx, n)
    y = rng.uniform(0.05, 0.95, n) * ly
    # velocities in cells per step: most well under one, a few fast ones over
    vx = rng.normal(0, 0.3, n)
    vy = rng.normal(0, 0.05, n)
    fast = rng.random(n) < 0.03
    vx[fast] = rng.choice([-1, 1], fast.sum()) * rng.uniform(1.2, 3.0, fast.sum())
    cols = {"id": np.arange(n, dtype=np.int64), "x": x, "y": y, "vx": vx * h, "vy": vy * h}
    if weight:
        cols["weight"] = rng.uniform(0.5, 2.0, n)
    return cols, dtype


def _moving_snapshots(seed=7, electrons=3000, ions=2000):
    """Per snapshot, ``{species: columns}`` (stored dtypes), and the marked particles."""
    rng = np.random.default_rng(seed)
    lx = DOMAIN[1]
    h = lx / CELLS[0]
    states = {"electrons": _species_states(rng, electrons, np.float64, True),
              "ions": _species_states(rng, ions, np.float32, False)}
    marked = {}
    for name, (cols, dtype) in states.items():
        m = Marked(exact=list(range(len(_MARKED_MOVES))),
                   hair=list(range(len(_MARKED_MOVES), 2 * len(_MARKED_MOVES))))
        for k, (_, _, start) in enumerate(_MARKED_MOVES * 2):
            cols["x"][k], cols["y"][k] = start
            cols["vx"][k] = cols["vy"][k] = 0.0
        marked[name] = m
    next_id = {name: len(cols["id"]) for name, (cols, _) in states.items()}
    out = []
    for k, step in enumerate(STEPS):
        if k:
            steps = step - STEPS[k - 1]
            for name, (cols, dtype) in states.items():
                x, y = cols["x"], cols["y"]
                x += cols["vx"] * steps
                y += cols["vy"] * steps
                for j, (axis, sign, _) in enumerate(_MARKED_MOVES * 2):
                    hair = HAIR[dtype] if j >= len(_MARKED_MOVES) else 0.0
                    (x if axis == 0 else y)[j] += sign * (steps + hair) * h
                np.mod(x, lx, out=x)
                # a few particles lost (never the marked ones), a few created past the last id
                n = len(x)
                keep = (rng.random(n) > 0.03) | (np.arange(n) < 2 * len(_MARKED_MOVES))
                fresh = int(0.02 * n)
                new, _ = _species_states(rng, fresh, dtype, "weight" in cols)
                new["id"] = np.arange(next_id[name], next_id[name] + fresh, dtype=np.int64)
                next_id[name] += fresh
                for c in cols:
                    cols[c] = np.concatenate([cols[c][keep], new[c]])
        snap = {}
        for name, (cols, dtype) in states.items():
            stored = {c: (v if c in ("id", "weight") else v.astype(dtype)) for c, v in cols.items()}
            # a dump writes the marked positions exactly: round them to the stored dtype first
            for c in ("x", "y"):
                cols[c] = stored[c].astype(np.float64)
            snap[name] = stored
        out.append(snap)
    return out, marked


ATTRS = {"electrons": {"mass": 1.0, "charge": -1.0}, "ions": {"mass": 1836.0, "charge": 1.0}}


def write_moving_run(folder, seed=7, electrons=3000, ions=2000):
    """The moving run in ``folder``: returns ``(snapshots, marked, layout)``, the stored columns
    of every snapshot and species (row order shuffled into the rank files as written)."""
    layout = refined_layout()
    snaps, marked = _moving_snapshots(seed, electrons, ions)
    rng = np.random.default_rng(seed + 1)
    written = []
    for k, (step, snap) in enumerate(zip(STEPS, snaps)):
        species = {}
        kept = {}
        for name, cols in snap.items():
            order = rng.permutation(len(cols["id"]))
            cols = {c: v[order] for c, v in cols.items()}
            blocks = assign_blocks([cols["x"], cols["y"]], layout)
            owner = np.append(layout.rank, 0)[layout.block_index(blocks)]   # outside: rank 0
            species[name] = (cols, ATTRS[name], owner)
            kept[name] = cols
        write_rank_snapshot(folder, step, species, 3, layout=layout,
                            scalars={"time": 0.25 * step, "field_energy": 1.0 + 0.01 * k})
        written.append(kept)
    return written, marked, layout
