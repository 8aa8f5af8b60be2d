"""Block layouts and the assignment of particles to blocks.

A block is a half-open box ``[lower, upper)`` with a refinement level and an
owner rank. A particle belongs to the block of the highest level that
contains it; a particle in no block gets ``-1``. Blocks of a regular
decomposition are numbered with x fastest: ``ix + nbx*(iy + nby*iz)``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import _fastassign
from .errors import OptionError
from .roles import AXES

#: largest lookup grid (cells) built per level for arithmetic assignment
_MAX_LOOKUP_CELLS = 1 << 26


@dataclass
class BlockLayout:
    """The blocks of a snapshot plus domain bounds, level-0 cells and periodic axes."""

    lower: np.ndarray            # (n, d) physical lower corners
    upper: np.ndarray            # (n, d) physical upper corners (exclusive)
    level: np.ndarray            # (n,) refinement level, 0 = coarsest
    rank: np.ndarray             # (n,) owner rank
    domain_lower: np.ndarray     # (d,)
    domain_upper: np.ndarray     # (d,)
    cells: np.ndarray            # (d,) level-0 cells across the domain
    periodic: tuple[bool, ...]   # (d,)
    block_id: np.ndarray | None = None   # (n,) ids used in tables; default 0..n-1
    ratio: int = 2               # refinement ratio between levels
    regular: tuple[int, ...] | None = None   # blocks per axis when the layout is a regular grid
    source: str | None = None
    _lookup: dict = field(default_factory=dict, repr=False, compare=False)

    def __post_init__(self):
        self.lower = np.atleast_2d(np.asarray(self.lower, dtype=np.float64))
        self.upper = np.atleast_2d(np.asarray(self.upper, dtype=np.float64))
        n, d = self.lower.shape
        self.level = np.broadcast_to(np.asarray(self.level, dtype=np.int64), (n,)).copy()
        self.rank = np.broadcast_to(np.asarray(self.rank, dtype=np.int64), (n,)).copy()
        self.domain_lower = np.asarray(self.domain_lower, dtype=np.float64).reshape(d)
        self.domain_upper = np.asarray(self.domain_upper, dtype=np.float64).reshape(d)
        self.cells = np.asarray(self.cells, dtype=np.int64).reshape(d)
        self.periodic = tuple(bool(p) for p in self.periodic) + (False,) * (d - len(self.periodic))
        self.block_id = (np.arange(n, dtype=np.int64) if self.block_id is None
                         else np.asarray(self.block_id, dtype=np.int64).reshape(n))
        if self.upper.shape != (n, d):
            raise OptionError("block lower and upper corners have different shapes")

    def __getstate__(self):
        # the lookup grids are a cache, rebuilt on first use: another process gets the blocks only
        state = dict(self.__dict__)
        state["_lookup"] = {}
        return state

    # shape facts ---------------------------------------------------------
    @property
    def ndim(self) -> int:
        return self.lower.shape[1]

    @property
    def nblocks(self) -> int:
        return self.lower.shape[0]

    @property
    def axes(self) -> tuple[str, ...]:
        return AXES[: self.ndim]

    @property
    def extent(self) -> np.ndarray:
        return self.domain_upper - self.domain_lower

    @property
    def cell_size(self) -> np.ndarray:
        """Level-0 cell size per axis (displacements are measured in these)."""
        return self.extent / self.cells

    @property
    def levels(self) -> np.ndarray:
        return np.unique(self.level)

    @property
    def nranks(self) -> int:
        return int(self.rank.max()) + 1 if self.nblocks else 0

    def block_index(self, block_ids: np.ndarray) -> np.ndarray:
        """Row in this layout of each block id (-1 stays -1)."""
        ids = np.asarray(block_ids)
        if np.array_equal(self.block_id, np.arange(self.nblocks)):
            return ids.astype(np.int64, copy=False)
        order = np.argsort(self.block_id)
        pos = np.searchsorted(self.block_id[order], ids)
        pos = np.clip(pos, 0, self.nblocks - 1)
        out = order[pos]
        return np.where((ids >= 0) & (self.block_id[out] == ids), out, -1)

    def summary(self) -> dict:
        return {
            "ndim": self.ndim,
            "blocks": self.nblocks,
            "levels": [int(v) for v in self.levels],
            "ranks": self.nranks,
            "domain_lower": self.domain_lower.tolist(),
            "domain_upper": self.domain_upper.tolist(),
            "cells": self.cells.tolist(),
            "periodic": [a for a, p in zip(self.axes, self.periodic) if p],
            "regular": list(self.regular) if self.regular else None,
            "source": self.source,
        }

    # checks ----------------------------------------------------------------
    def validate(self) -> None:
        """Raise OptionError for empty blocks or blocks overlapping on one level."""
        bad = np.any(self.upper <= self.lower, axis=1)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise OptionError(f"block {int(self.block_id[i])} of the layout has no volume "
                              f"(lower {self.lower[i].tolist()}, upper {self.upper[i].tolist()})")
        if len(np.unique(self.block_id)) != self.nblocks:
            raise OptionError("the layout numbers two blocks the same")
        for lev in self.levels:
            self._level_lookup(int(lev))  # painting the lookup grid finds overlaps


def regular_layout(domain, cells, blocks, periodic=(), ranks: int = 1) -> BlockLayout:
    """A regular decomposition of ``domain`` into ``blocks`` boxes per axis.

    ``domain`` is ``(lo0, hi0, lo1, hi1, ...)``. Blocks go to ``ranks`` ranks
    in contiguous runs of block number, the way a simple decomposition
    hands them out.
    """
    domain = np.asarray(domain, dtype=np.float64)
    if domain.ndim != 1 or domain.size % 2 or domain.size == 0 or domain.size > 6:
        raise OptionError("--domain takes XLO,XHI,YLO,YHI[,ZLO,ZHI]")
    d = domain.size // 2
    lo, hi = domain[0::2], domain[1::2]
    if np.any(hi <= lo) or not np.all(np.isfinite(domain)):
        raise OptionError("--domain needs each upper bound above its lower bound")
    cells = np.asarray(cells if cells is not None else blocks, dtype=np.int64).reshape(-1)
    blocks = np.asarray(blocks if blocks is not None else [1] * d, dtype=np.int64).reshape(-1)
    if cells.size != d or blocks.size != d:
        raise OptionError(f"--cells and --blocks need {d} numbers for a {d}-D --domain")
    if np.any(cells < 1) or np.any(blocks < 1):
        raise OptionError("--cells and --blocks take positive whole numbers")
    if np.any(cells % blocks):
        raise OptionError("--cells must be a multiple of --blocks on every axis "
                          f"(cells {cells.tolist()}, blocks {blocks.tolist()})")
    if ranks < 1:
        raise OptionError("--ranks takes a positive whole number")
    idx = np.indices(blocks[::-1]).reshape(d, -1)[::-1].T   # x fastest
    width = (hi - lo) / blocks
    lower = lo + idx * width
    upper = lo + (idx + 1) * width
    upper[idx == blocks - 1] = np.broadcast_to(hi, upper.shape)[idx == blocks - 1]
    n = lower.shape[0]
    rank = (np.arange(n) * ranks) // n
    per = tuple(a in periodic for a in AXES[:d]) if periodic and isinstance(next(iter(periodic)), str) \
        else tuple(bool(p) for p in periodic)
    return BlockLayout(lower, upper, 0, rank, lo, hi, cells, per, regular=tuple(int(b) for b in blocks),
                       source="options")


def _as_columns(positions) -> list[np.ndarray]:
    if isinstance(positions, np.ndarray) and positions.ndim == 2:
        return [positions[:, i] for i in range(positions.shape[1])]
    return [np.asarray(p) for p in positions]


def assign_blocks(positions, layout: BlockLayout) -> np.ndarray:
    """Block id of every particle (highest level wins; -1 when in no block).

    ``positions`` is a sequence of d coordinate arrays or an ``(N, d)`` array.
    NaN coordinates land in no block.
    """
    cols = _as_columns(positions)
    if len(cols) != layout.ndim:
        raise OptionError(f"the particles have {len(cols)} position axes but the layout has "
                          f"{layout.ndim}")
    n = cols[0].shape[0] if cols else 0
    if layout.regular is not None:
        return _assign_regular(cols, layout)
    out = np.full(n, -1, dtype=np.int64)
    fast = _fastassign.usable(cols)
    for lev in layout.levels:
        kind, grid, a1, a2 = layout._level_lookup(int(lev))
        if fast and kind == "grid":
            origin = [layout.domain_lower[a] + a1[a] * a2[a] for a in range(len(cols))]
            _fastassign.assign_grid_level(cols, origin, a2, grid.shape[::-1], grid,
                                          layout.block_id, out)
            continue
        hit = _assign_level(cols, layout, int(lev))
        np.copyto(out, hit, where=hit >= 0)
    return out


def _assign_regular(cols, layout: BlockLayout) -> np.ndarray:
    nb = np.asarray(layout.regular)
    if _fastassign.usable(cols):
        flat = _fastassign.assign_regular(cols, layout.domain_lower, layout.domain_upper, nb)
        ids = layout.block_id
        if np.array_equal(ids, np.arange(layout.nblocks)):
            return flat
        return np.where(flat >= 0, ids[np.clip(flat, 0, None)], -1)
    n = cols[0].shape[0]
    flat = np.zeros(n, dtype=np.int64)
    inside = np.ones(n, dtype=bool)
    stride = 1
    for a, c in enumerate(cols):
        lo, hi = layout.domain_lower[a], layout.domain_upper[a]
        # float64 arithmetic on float32 input keeps edges exact to the layout's bounds
        f = (c - lo) * (nb[a] / (hi - lo))
        with np.errstate(invalid="ignore"):
            inside &= (c >= lo) & (c < hi)
        with np.errstate(invalid="ignore"):   # NaN casts to garbage here; masked out below
            i = np.floor(f, out=f).astype(np.int64) if f.dtype.kind == "f" else f.astype(np.int64)
        np.clip(i, 0, nb[a] - 1, out=i)
        flat += i * stride
        stride *= int(nb[a])
    flat[~inside] = -1
    ids = layout.block_id
    if np.array_equal(ids, np.arange(layout.nblocks)):
        return flat
    return np.where(flat >= 0, ids[np.clip(flat, 0, None)], -1)


def _level_lookup(self: BlockLayout, lev: int):
    """Per-level lookup: either a uniform grid of block rows or sorted edges per axis."""
    if lev in self._lookup:
        return self._lookup[lev]
    rows = np.flatnonzero(self.level == lev)
    lo, up = self.lower[rows], self.upper[rows]
    d = self.ndim
    # candidate uniform spacing: the level's cell size
    h = self.cell_size / float(self.ratio) ** lev
    uniform = True
    for a in range(d):
        e = np.concatenate([lo[:, a], up[:, a]])
        k = (e - self.domain_lower[a]) / h[a]
        if not np.allclose(k, np.round(k), rtol=0, atol=1e-6):
            uniform = False
            break
    if uniform:
        glo = np.floor((lo.min(axis=0) - self.domain_lower) / h + 0.5).astype(np.int64)
        ghi = np.floor((up.max(axis=0) - self.domain_lower) / h + 0.5).astype(np.int64)
        shape = ghi - glo
        if np.prod(shape.astype(float)) <= _MAX_LOOKUP_CELLS:
            grid = np.full(tuple(shape[::-1]), -1, dtype=np.int64)   # index [z, y, x]
            ilo = np.floor((lo - self.domain_lower) / h + 0.5).astype(np.int64) - glo
            ihi = np.floor((up - self.domain_lower) / h + 0.5).astype(np.int64) - glo
            _paint(grid, rows, ilo, ihi, self)
            entry = ("grid", grid, glo, h)
            self._lookup[lev] = entry
            return entry
    edges = [np.unique(np.concatenate([lo[:, a], up[:, a]])) for a in range(d)]
    shape = [len(e) - 1 for e in edges]
    grid = np.full(tuple(shape[::-1]), -1, dtype=np.int64)
    ilo = np.stack([np.searchsorted(edges[a], lo[:, a]) for a in range(d)], axis=1)
    ihi = np.stack([np.searchsorted(edges[a], up[:, a]) for a in range(d)], axis=1)
    _paint(grid, rows, ilo, ihi, self)
    entry = ("edges", grid, edges, None)
    self._lookup[lev] = entry
    return entry


def _paint(grid, rows, ilo, ihi, layout):
    # a loop over blocks (not particles): each block fills its cells once
    for r, a, b in zip(rows, ilo, ihi):
        sl = tuple(slice(int(a[k]), int(b[k])) for k in reversed(range(len(a))))
        view = grid[sl]
        if np.any(view >= 0):
            other = int(layout.block_id[int(view[view >= 0].flat[0])])
            raise OptionError(f"blocks {other} and {int(layout.block_id[r])} of the layout overlap "
                              f"on level {int(layout.level[r])}"
                              + (f" ({layout.source})" if layout.source else ""))
        view[...] = r


BlockLayout._level_lookup = _level_lookup


def _assign_level(cols, layout: BlockLayout, lev: int) -> np.ndarray:
    kind, grid, a1, a2 = layout._level_lookup(lev)
    n = cols[0].shape[0]
    flat = np.zeros(n, dtype=np.int64)
    inside = np.ones(n, dtype=bool)
    stride = 1
    shape = grid.shape[::-1]
    for a, c in enumerate(cols):
        if kind == "grid":
            f = (c - (layout.domain_lower[a] + a1[a] * a2[a])) / a2[a]
            with np.errstate(invalid="ignore"):
                i = np.floor(f)
                inside &= (i >= 0) & (i < shape[a])
            i = np.nan_to_num(i, nan=-1.0, posinf=-1.0, neginf=-1.0).astype(np.int64)
        else:
            e = a1[a]
            i = np.searchsorted(e, c, side="right") - 1
            with np.errstate(invalid="ignore"):
                inside &= (i >= 0) & (i < shape[a]) & ~np.isnan(c)
        np.clip(i, 0, shape[a] - 1, out=i)
        flat += i * stride
        stride *= int(shape[a])
    rows = grid.reshape(-1)[flat]   # grid is C-ordered [z, y, x]; x fastest matches flat
    rows[~inside] = -1
    return np.where(rows >= 0, layout.block_id[np.clip(rows, 0, None)], -1)


def cell_index(positions, layout: BlockLayout, clip: bool = True) -> np.ndarray:
    """Flat level-0 cell number (x fastest) of each particle; -1 outside the domain."""
    cols = _as_columns(positions)
    n = cols[0].shape[0]
    flat = np.zeros(n, dtype=np.int64)
    inside = np.ones(n, dtype=bool)
    stride = 1
    for a, c in enumerate(cols):
        f = (c - layout.domain_lower[a]) / layout.cell_size[a]
        with np.errstate(invalid="ignore"):
            i = np.floor(f)
            inside &= (i >= 0) & (i < layout.cells[a])
        i = np.nan_to_num(i, nan=0.0, posinf=0.0, neginf=0.0).astype(np.int64)
        np.clip(i, 0, layout.cells[a] - 1, out=i)
        flat += i * stride
        stride *= int(layout.cells[a])
    if not clip:
        flat[~inside] = -1
    return flat


def nonfinite_rows(cols, n: int | None = None) -> np.ndarray:
    """True for each particle with a NaN or infinite value in any of ``cols`` (integers never are)."""
    cols = _as_columns(cols)
    n = (cols[0].shape[0] if cols else 0) if n is None else n
    bad = np.zeros(n, dtype=bool)
    for c in cols:
        if c.dtype.kind in "fc":
            bad |= ~np.isfinite(c)
    return bad


def bounding_layout(positions, axes_count: int | None = None, cells: int = 64) -> BlockLayout:
    """One block around the particles, for runs that come with no layout at all.

    Particles with a NaN or infinite coordinate are left out of the box (an infinite
    bound would make every cell infinitely wide); they land in no block, so in ``-1``.
    """
    cols = _as_columns(positions)
    bad = nonfinite_rows(cols)
    if bad.any():
        cols = [c[~bad] for c in cols]
    lo = np.array([np.min(c) if c.size else 0.0 for c in cols], dtype=np.float64)
    hi = np.array([np.max(c) if c.size else 1.0 for c in cols], dtype=np.float64)
    span = np.where(hi > lo, hi - lo, 1.0)
    hi = hi + span * 1e-9 + np.where(hi > lo, 0.0, 1.0)   # half-open: the largest particle inside
    d = len(cols)
    return BlockLayout(lo[None, :], hi[None, :], 0, 0, lo, hi, [cells] * d, (False,) * d,
                       regular=(1,) * d, source="particle bounding box")
