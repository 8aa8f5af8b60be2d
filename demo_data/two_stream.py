"""The main demo run: the two-stream instability of :mod:`.pic2d`, dumped per rank.

Each snapshot is a folder ``step_NNNNNN/`` with one HDF5 file per rank
(``rank_000.h5`` ...). A rank's file holds the particles in the blocks it
owns, both beams as species groups (``position/x`` style component
groups, float32 like most production dumps), and the whole layout as a
``blocks`` group. The decomposition is 4 × 4 level-0 blocks handed out by
x column (rank = column) plus two level-1 blocks near the box centre,
where the bunch sits when the instability saturates. Half-way through the
run the blocks are handed out again by particle count (a load rebalance).
"""

from __future__ import annotations

import os

import numpy as np

from . import pic2d
from .blocks import balance_ranks, demo_layout, particle_ranks, split_by_rank, with_ranks, write_blocks_group

SPECIES = ("beam_right", "beam_left")
RANKS = 4
BLOCKS = (4, 4)
LENGTH_UNIT = "v0/omega_p"
VELOCITY_UNIT = "v0"
TIME_UNIT = "1/omega_p"
#: id and weight compress well (sorted integers, a constant); coordinates do not
PACKED = dict(compression="gzip", compression_opts=1, shuffle=True)


def snapshot_steps(steps: int, snapshots: int) -> np.ndarray:
    """``snapshots`` step numbers spread evenly over ``0..steps``, both ends included."""
    return np.unique(np.round(np.linspace(0, steps, max(1, snapshots))).astype(np.int64))


def two_stream_layout(setup: pic2d.TwoStreamSetup, blocks=BLOCKS, ranks: int = RANKS):
    nx, ny = setup.nx, setup.ny
    dx, dy = setup.grid.dx, setup.grid.dy
    # level-1 blocks over level-0 cells [3/8, 5/8) of x, lower and upper half of y
    x0, x1 = (3 * nx // 8) * dx, (5 * nx // 8) * dx
    refined = [((x0, 0.0), (x1, (ny // 2) * dy)), ((x0, (ny // 2) * dy), (x1, setup.ly))]
    return demo_layout((0.0, setup.lx, 0.0, setup.ly), (nx, ny), blocks,
                       rank_of_block=lambda ix, iy: ix * ranks // blocks[0],
                       refined=refined, refined_ranks=(1 % ranks, 2 % ranks), periodic=("x", "y"))


def cell_order(setup: pic2d.TwoStreamSetup) -> np.ndarray:
    """The loaded particles sorted by the cell they start in (as a cell-sorting code holds them)."""
    x, y, _, _ = pic2d.load_beams(setup)
    cell = (np.floor(x / setup.grid.dx).astype(np.int64) % setup.nx
            + setup.nx * (np.floor(y / setup.grid.dy).astype(np.int64) % setup.ny))
    return np.argsort(cell, kind="stable")


def _below(limit: float) -> np.float32:
    """The largest float32 whose value is below ``limit`` (keeps stored positions in [0, L))."""
    top = np.float32(limit)
    while float(top) >= limit:
        top = np.nextafter(top, np.float32(0))
    return top


def write_two_stream(folder: str, particles: int, snapshots: int, progress=print,
                     steps: int | None = None, *, dt: float | None = None, ranks: int = RANKS,
                     blocks=BLOCKS, at_steps=None, sort_by_cell: bool = False,
                     label: str = "two_stream") -> dict:
    """Run the two-stream PIC and write its snapshots under ``folder``; return a summary.

    The variants of the demo change one thing each: ``ranks``/``blocks`` and
    ``sort_by_cell`` (the particles held in another order, so sums round
    differently), or ``dt`` with ``steps`` (a different time step to the same
    end time). ``at_steps`` names the snapshot steps instead of ``snapshots``.
    """
    extra = {} if steps is None else {"steps": steps}
    if dt is not None:
        extra["dt"] = dt
    setup = pic2d.TwoStreamSetup(particles=particles, **extra)
    wanted = (np.unique(np.asarray(at_steps, dtype=np.int64)) if at_steps is not None
              else snapshot_steps(setup.steps, snapshots))
    layout = two_stream_layout(setup, blocks, ranks)
    order = cell_order(setup) if sort_by_cell else None
    ids = order if order is not None else np.arange(2 * setup.per_beam, dtype=np.int64)
    rebalance_at = int(wanted[len(wanted) // 2]) if len(wanted) >= 4 else None
    n_right = setup.per_beam
    state = {"layout": layout, "done": 0}
    xmax, ymax = _below(setup.lx), _below(setup.ly)

    def on_snapshot(step, time, x, y, vx, vy, we):
        x32 = np.minimum(x.astype(np.float32), xmax)
        y32 = np.minimum(y.astype(np.float32), ymax)
        # blocks from the stored (float32) coordinates, so a reader sees each
        # particle in a block of the rank whose file holds it
        lay = state["layout"]
        if step == rebalance_at:
            block, _ = particle_ranks((x32, y32), lay)
            load = np.bincount(lay.block_index(block), minlength=lay.nblocks)
            lay = state["layout"] = with_ranks(lay, balance_ranks(load, ranks))
        _, rank = particle_ranks((x32, y32), lay)
        sub = os.path.join(folder, f"step_{step:06d}")
        os.makedirs(sub, exist_ok=True)
        vx32 = vx.astype(np.float32)
        vy32 = vy.astype(np.float32)
        for r, idx in enumerate(split_by_rank(rank, ranks)):
            right = ids[idx] < n_right
            _write_rank_file(os.path.join(sub, f"rank_{r:03d}.h5"), step, time, we, lay,
                             [(SPECIES[0], idx[right]), (SPECIES[1], idx[~right])],
                             x32, y32, vx32, vy32, setup.weight, ids)
        state["done"] += 1
        if progress and (state["done"] % 10 == 0 or state["done"] == len(wanted)):
            progress(f"  {label}: {state['done']}/{len(wanted)} snapshots (t = {time:.1f}/omega_p)")

    history = pic2d.run_two_stream(setup, wanted, on_snapshot, order=order)
    return {
        "particles": 2 * setup.per_beam,
        "snapshots": int(len(wanted)),
        "steps": setup.steps,
        "dt": setup.dt,
        "cells": [setup.nx, setup.ny],
        "box": [setup.lx, setup.ly],
        "k_v0": setup.k_v0,
        "drift": setup.drift,
        "theory_growth_rate": setup.growth_rate,
        "rebalance_step": rebalance_at,
        "history": history,
    }


def _write_rank_file(path, step, time, we, layout, parts, x32, y32, vx32, vy32, weight, ids):
    import h5py
    with h5py.File(path, "w") as fh:
        fh.attrs["step"] = np.int64(step)
        fh.attrs["time"] = float(time)
        fh.attrs["field_energy"] = float(we)
        fh.attrs["time_unit"] = TIME_UNIT
        for name, idx in parts:
            g = fh.create_group(name)
            g.attrs["mass"] = pic2d.MASS
            g.attrs["charge"] = pic2d.CHARGE
            for group, (cx, cy), unit in (("position", (x32, y32), LENGTH_UNIT),
                                          ("velocity", (vx32, vy32), VELOCITY_UNIT)):
                sub = g.create_group(group)
                for axis, col in (("x", cx), ("y", cy)):
                    ds = sub.create_dataset(axis, data=col[idx])
                    ds.attrs["units"] = unit
            ds = g.create_dataset("id", data=ids[idx].astype(np.int64), **(PACKED if idx.size else {}))
            ds.attrs["units"] = "1"
            ds = g.create_dataset("weight", data=np.full(idx.size, weight), **(PACKED if idx.size else {}))
            ds.attrs["units"] = "1"
        write_blocks_group(fh, layout)
