"""Depositing particle quantities onto the level-0 cells: NGP, CIC and TSC shapes.

Cell ``i`` spans ``[i, i+1)`` in cell units and its centre is ``i + ½``.
On periodic axes the stencil wraps around. On other axes the part of a
stencil that falls outside the domain is *clamped* into the edge cell (and a
particle outside the domain is clamped onto the edge), so the deposited total
always equals the sum of the values; ``outside="drop"`` leaves those parts
out instead. Particles with a non-finite position or value are never
deposited.
"""

from __future__ import annotations

import itertools

import numpy as np

from ..core.layout import BlockLayout, _as_columns

ORDERS = {"ngp": 0, "cic": 1, "tsc": 2}


def _order(order) -> int:
    if isinstance(order, str):
        try:
            return ORDERS[order.lower()]
        except KeyError:
            raise ValueError(f"unknown shape '{order}' (ngp, cic or tsc)") from None
    if order in (0, 1, 2):
        return int(order)
    raise ValueError(f"unknown shape order {order!r} (0, 1 or 2)")


def _stencil(frac, p: int):
    """(shift, [w_0 .. w_K-1]) with one contiguous weight array per stencil cell."""
    f = np.asarray(frac, dtype=np.float64)
    t = f - 0.5          # offset from the centre of the particle's own cell, in [-½, ½)
    if p == 0:
        return np.zeros(f.shape, dtype=np.int64), [np.ones(f.shape)]
    if p == 1:
        left = t < 0                              # left of the centre: cells -1 and 0
        d = np.where(left, t + 1.0, t)            # distance past the left cell centre, [0, 1)
        return -left.astype(np.int64), [1.0 - d, d]
    return np.full(f.shape, -1, dtype=np.int64), [0.5 * (0.5 - t) ** 2, 0.75 - t * t,
                                                   0.5 * (0.5 + t) ** 2]


def shape_weights(frac, order):
    """Stencil of each particle along one axis.

    ``frac`` is the particle's position inside its cell, in ``[0, 1)`` (cell
    units). Returns ``(shift, weights)``: the stencil covers cells
    ``cell + shift + k`` for ``k = 0..K-1`` with ``weights[:, k]``; K is 1
    (NGP), 2 (CIC) or 3 (TSC), and each row sums to one.
    """
    shift, w = _stencil(frac, _order(order))
    return shift, np.stack(w, axis=-1)


def deposit(positions, values, layout: BlockLayout, order="cic", periodic=None, outside: str = "clamp") -> np.ndarray:
    """Sum of ``values`` spread over the layout's level-0 cells with the given shape.

    Returns an array of shape ``tuple(layout.cells)`` indexed ``[ix, iy, iz]``
    (like ``numpy.histogramdd``). ``values`` is a per-particle array or a
    scalar; ``periodic`` overrides the layout's periodic axes.
    """
    if outside not in ("clamp", "drop"):
        raise ValueError("outside must be 'clamp' or 'drop'")
    p = _order(order)
    cols = _as_columns(positions)
    d = layout.ndim
    if len(cols) != d:
        raise ValueError(f"{len(cols)} position axes for a {d}-D layout")
    per = layout.periodic if periodic is None else tuple(bool(x) for x in periodic) + (False,) * d
    cells = [int(c) for c in layout.cells]
    n = cols[0].shape[0] if cols else 0
    v = np.asarray(values, dtype=np.float64)
    if v.ndim == 0:
        v = np.full(n, float(v))
    if v.shape != (n,):
        raise ValueError(f"values have shape {v.shape}, expected ({n},)")
    good = np.isfinite(v)
    k = p + 1
    strides = np.cumprod([1] + cells[::-1][:-1])[::-1]   # C order [ix, iy, iz]: z fastest
    # per axis and stencil point: the (wrapped or clamped) cell times its stride, and the weight;
    # d*K arrays, combined below for each of the K**d stencil points
    offsets, weights, keeps = [], [], []
    for a in range(d):
        s = (np.asarray(cols[a], dtype=np.float64) - layout.domain_lower[a]) / layout.cell_size[a]
        finite = np.isfinite(s)
        if not finite.all():
            good &= finite
            s = np.where(finite, s, 0.0)
        fl = np.floor(s)
        frac = s - fl                    # in [0, 1) whatever the wrap below does to the cell
        cell = fl.astype(np.int64)
        if per[a] and (cell.min(initial=0) < 0 or cell.max(initial=0) >= cells[a]):
            cell = np.mod(cell, cells[a])   # only particles outside the box need it
        shift, w_a = _stencil(frac, p)
        first = cell + shift
        off_a, keep_a = [], []
        for j in range(k):
            i = first + j if j else first
            if per[a]:
                # a stencil reaches at most one period out: one add or subtract wraps it
                i = np.where(i < 0, i + cells[a], np.where(i >= cells[a], i - cells[a], i))
                keep_a.append(None)
            else:
                keep_a.append(((i >= 0) & (i < cells[a])) if outside == "drop" else None)
                i = np.clip(i, 0, cells[a] - 1)
            off_a.append(i * int(strides[a]) if strides[a] != 1 else i)
        offsets.append(off_a)
        weights.append(w_a)
        keeps.append(keep_a)
    if not good.all():
        v = np.where(good, v, 0.0)
    flat_size = int(np.prod(cells))
    grid = np.zeros(flat_size, dtype=np.float64)
    # a loop over the K**d stencil points, each one vectorised over all particles
    for combo in itertools.product(range(k), repeat=d):
        flat = offsets[0][combo[0]].copy()
        wt = v * weights[0][combo[0]]
        keep = keeps[0][combo[0]]
        for a in range(1, d):
            flat += offsets[a][combo[a]]
            wt *= weights[a][combo[a]]
            if keeps[a][combo[a]] is not None:
                keep = keeps[a][combo[a]] if keep is None else keep & keeps[a][combo[a]]
        if keep is not None:
            wt[~keep] = 0.0
        grid += np.bincount(flat, weights=wt, minlength=flat_size)
    return grid.reshape(cells)
