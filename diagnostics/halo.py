"""Halo (ghost-layer) load: the particles of a block that other blocks need as ghosts.

Each block *owns* the part of space where it is the finest block (a particle
belongs to the block of the highest level that contains it); a coarse block
with refined blocks inside owns its box minus theirs. Block N needs, within a
halo width of ``width_cells`` level-0 cells, every particle of another block
closer than that to the part of space N owns (Chebyshev distance: the open
cube of that half-width around the particle overlaps N's part in a volume).
A particle of block B is in **B's halo** when at least one other block
needs it: a neighbour on the same level, a coarser block around B (the
particle is near B's boundary), or a finer block inside or beside B (a
coarse particle near a refined block). Each particle is counted once, for
its own block, however many blocks need it. On periodic axes distances use
the minimum image and a block is its own neighbour across a periodic face;
space in no block, and the far side of a non-periodic domain face, need
nothing.
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd

from ..core.layout import BlockLayout, _as_columns, assign_blocks
from .accumulate import Accumulator

#: (particle, neighbour) pairs tested at a time: bounds the temporary arrays
_PAIRS_AT_ONCE = 1 << 21


def _images(layout: BlockLayout, reach: np.ndarray):
    """Block boxes and their periodic images that come within ``reach`` of the domain.

    Returns ``(row, lower, upper, unshifted)``: the block row of each box, its
    corners and whether it is the block itself rather than a periodic image.
    """
    d = layout.ndim
    shifts = itertools.product(*[(-1, 0, 1) if layout.periodic[a] else (0,) for a in range(d)])
    rows, lows, ups, same = [], [], [], []
    for s in shifts:
        off = np.asarray(s, dtype=np.float64) * layout.extent
        lo, up = layout.lower + off, layout.upper + off
        keep = np.all((lo < layout.domain_upper + reach) & (up > layout.domain_lower - reach), axis=1)
        if not any(s):
            keep[:] = True
        idx = np.flatnonzero(keep)
        rows.append(idx)
        lows.append(lo[idx])
        ups.append(up[idx])
        same.append(np.full(idx.size, not any(s)))
    return np.concatenate(rows), np.concatenate(lows), np.concatenate(ups), np.concatenate(same)


def _neighbours(layout: BlockLayout, reach: np.ndarray):
    """For each block row, the boxes (blocks or images) a particle of it may be close to:
    CSR ``(start, count)`` per block into ``(row, lower, upper)`` of those boxes."""
    img_row, img_lo, img_up, unshifted = _images(layout, reach)
    n = layout.nblocks
    # blocks in order of their lower x, a run of them at a time against the boxes whose lower x
    # falls in the run's window (a sweep along x: each block meets few boxes, not all of them)
    order = np.argsort(layout.lower[:, 0], kind="stable")
    by_x = np.argsort(img_lo[:, 0], kind="stable")
    img_x = img_lo[by_x, 0]
    widest = float(np.max(img_up[:, 0] - img_lo[:, 0], initial=0.0))
    owner, other = [], []
    for b0 in range(0, n, 64):
        b = order[b0:b0 + 64]
        lo_b, up_b = layout.lower[b] - reach, layout.upper[b] + reach
        j = by_x[np.searchsorted(img_x, lo_b[:, 0].min() - widest, "left"):
                 np.searchsorted(img_x, up_b[:, 0].max(), "left")]
        near = np.all((img_lo[j][None] < up_b[:, None]) & (img_up[j][None] > lo_b[:, None]), axis=2)
        near &= ~(unshifted[j][None] & (img_row[j][None] == b[:, None]))     # not the block itself
        i, k = np.nonzero(near)
        owner.append(b[i])
        other.append(j[k])
    owner = np.concatenate(owner) if owner else np.zeros(0, np.int64)
    other = np.concatenate(other) if other else np.zeros(0, np.int64)
    by_owner = np.argsort(owner, kind="stable")
    owner, other = owner[by_owner], other[by_owner]
    count = np.bincount(owner, minlength=n)
    start = np.concatenate([[0], np.cumsum(count)[:-1]])
    return start, count, img_row[other], img_lo[other], img_up[other]


def _expand(start, count, which):
    """``(who, pair)``: for each ``which[i]``, the indices ``start .. start + count`` of it."""
    k = count[which]
    who = np.repeat(np.arange(which.size), k)
    pair = np.arange(int(k.sum())) - np.repeat(np.cumsum(k) - k, k) + np.repeat(start[which], k)
    return who, pair


def halo_mask(positions, block_ids, layout: BlockLayout, width_cells: float = 1) -> np.ndarray:
    """True for each particle that another block needs within ``width_cells`` (module doc)."""
    cols = _as_columns(positions)
    if len(cols) != layout.ndim:
        raise ValueError(f"{len(cols)} position axes for a {layout.ndim}-D layout")
    if width_cells < 0:
        raise ValueError("width_cells must not be negative")
    rows = layout.block_index(np.asarray(block_ids))
    halo = np.zeros(rows.shape[0], dtype=bool)
    if rows.shape[0] == 0 or layout.nblocks == 0 or width_cells == 0:
        return halo
    d, nb = layout.ndim, layout.nblocks
    reach = float(width_cells) * layout.cell_size
    start, count, nb_row, nb_lo, nb_up = _neighbours(layout, reach)
    owners = np.repeat(np.arange(nb), count)
    own_lo, own_up = layout.lower[owners], layout.upper[owners]
    coarser = layout.level[nb_row] < layout.level[owners]
    # Which faces of its block a particle is near (bit a: the lower face on axis a, bit d + a:
    # the upper one), and which faces a neighbour lies beyond: a neighbour can only be close to
    # particles near the faces it lies beyond. A neighbour that touches those faces and spans
    # the block on the other axes is close to every such particle ("sure"), with no measuring:
    # on a plain tiling every neighbour is.
    beyond = np.zeros(owners.size, dtype=np.int64)
    sure = ~coarser
    for a in range(d):
        below, above = nb_up[:, a] <= own_lo[:, a], nb_lo[:, a] >= own_up[:, a]
        beyond |= below.astype(np.int64) << a
        beyond |= above.astype(np.int64) << (d + a)
        spans = (nb_lo[:, a] <= own_lo[:, a]) & (nb_up[:, a] >= own_up[:, a])
        sure &= np.where(below, nb_up[:, a] == own_lo[:, a],
                         np.where(above, nb_lo[:, a] == own_up[:, a], spans))
    # per-axis copies: gathering from a contiguous vector is several times faster than a column
    lo_ax = [np.ascontiguousarray(layout.lower[:, a]) for a in range(d)]
    up_ax = [np.ascontiguousarray(layout.upper[:, a]) for a in range(d)]
    inb = np.flatnonzero(rows >= 0)
    r_in = rows[inb]
    near = np.zeros(inb.size, dtype=np.int64)
    with np.errstate(invalid="ignore"):
        for a in range(d):
            c = cols[a][inb]
            near |= (c - lo_ax[a][r_in] < reach[a]).astype(np.int64) << a
            near |= (up_ax[a][r_in] - c < reach[a]).astype(np.int64) << (d + a)
    # per (face pattern, block): whether a sure neighbour is close, and the other neighbours
    # that may be (measured per particle below)
    patterns = 1 << (2 * d)
    sure_of = np.zeros((patterns, nb), dtype=bool)
    res_count = np.zeros((patterns, nb), dtype=np.int64)
    res_start = np.zeros((patterns, nb), dtype=np.int64)
    residual, at = [], 0
    for m in np.flatnonzero(np.bincount(near, minlength=patterns)):
        ok = (beyond & ~m) == 0
        sure_of[m, owners[ok & sure]] = True
        rest = np.flatnonzero(ok & ~sure)          # in block order: the pairs are
        res_count[m] = np.bincount(owners[rest], minlength=nb)
        res_start[m] = at + np.cumsum(res_count[m]) - res_count[m]
        residual.append(rest)
        at += rest.size
    residual = np.concatenate(residual) if residual else np.zeros(0, np.int64)
    group = near * nb + r_in
    halo[inb] = sure_of.reshape(-1)[group]
    res_count, res_start = res_count.reshape(-1), res_start.reshape(-1)
    cand = np.flatnonzero(~halo[inb] & (res_count[group] > 0))
    per = res_count[group[cand]]
    step = max(1, _PAIRS_AT_ONCE // max(1, int(per.max(initial=1))))
    for c0 in range(0, cand.size, step):
        ci = cand[c0:c0 + step]
        who, k = _expand(res_start, res_count, group[ci])
        pr = residual[k]
        pi = inb[ci][who]
        rw = rows[pi]
        meets = np.ones(pr.size, dtype=bool)
        leaves = np.zeros(pr.size, dtype=bool)
        for a in range(d):
            p = cols[a][pi].astype(np.float64)
            lo, up = nb_lo[pr, a], nb_up[pr, a]
            meets &= (p - reach[a] < up) & (p + reach[a] > lo)
            # a coarser box counts where the cube overlaps it outside the particle's own block
            leaves |= ((np.maximum(p - reach[a], lo) < lo_ax[a][rw])
                       | (np.minimum(p + reach[a], up) > up_ax[a][rw]))
        halo[pi[meets & (~coarser[pr] | leaves)]] = True
    return halo


def _count(state, positions, block_ids, layout: BlockLayout, width_cells: float):
    rows = layout.block_index(np.asarray(block_ids))
    mask = halo_mask(positions, block_ids, layout, width_cells)
    shifted = rows + 1                         # slot 0: in no block
    state["count"] += np.bincount(shifted, minlength=layout.nblocks + 1)
    state["halo"] += np.bincount(shifted[mask], minlength=layout.nblocks + 1)
    return state


def _table(state, layout: BlockLayout) -> pd.DataFrame:
    count, halo = state["count"], state["halo"]
    df = pd.DataFrame({"block": layout.block_id.astype(np.int64), "count": count[1:].astype(np.int64),
                       "halo": halo[1:].astype(np.int64)})
    if count[0]:
        df = pd.concat([df, pd.DataFrame({"block": [-1], "count": [int(count[0])], "halo": [0]})],
                       ignore_index=True)
    return df


def _empty(layout: BlockLayout) -> dict:
    n = layout.nblocks + 1
    return {"count": np.zeros(n, np.int64), "halo": np.zeros(n, np.int64)}


def halo_counts(positions, block_ids, layout: BlockLayout, width_cells: float = 1) -> pd.DataFrame:
    """Per block: particles (``count``) and those other blocks need within ``width_cells`` (``halo``).

    Every layout block gets a row; a ``-1`` row (halo 0) collects particles in no block.
    """
    return _table(_count(_empty(layout), positions, block_ids, layout, width_cells), layout)


class Halo(Accumulator):
    """:func:`halo_counts` of a frame fed in pieces: whether a particle is in a halo depends
    on it alone (its position and the layout), so the counts of the pieces add up."""

    reads_once = True

    def __init__(self, layout: BlockLayout, positions, width_cells: float = 1):
        self.layout = layout
        self.columns = tuple(positions)
        self.width_cells = float(width_cells)

    def start(self):
        return _empty(self.layout)

    def add(self, state, piece):
        pos = [piece[c] for c in self.columns]
        return _count(state, pos, assign_blocks(pos, self.layout), self.layout, self.width_cells)

    def merge(self, a, b):
        return {k: a[k] + b[k] for k in a}

    def finish(self, state) -> pd.DataFrame:
        return _table(state, self.layout)
