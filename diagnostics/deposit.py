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


def shape_weights(frac, order):
    """Stencil of each particle along one axis.

    ``frac`` is the particle's position inside its cell, in ``[0, 1)`` (cell
    units). Returns ``(shift, weights)``: the stencil covers cells
    ``cell + shift + k`` for ``k = 0..K-1`` with ``weights[:, k]``; K is 1
    (NGP), 2 (CIC) or 3 (TSC), and each row sums to one.
    """
    p = _order(order)
    f = np.asarray(frac, dtype=np.float64)
    t = f - 0.5          # offset from the centre of the particle's own cell, in [-½, ½)
    if p == 0:
        return np.zeros(f.shape, dtype=np.int64), np.ones(f.shape + (1,))
    if p == 1:
        shift = np.floor(t).astype(np.int64)      # -1 left of the centre, 0 right of it
        d = t - shift                              # distance past the left cell centre, [0, 1)
        return shift, np.stack([1.0 - d, d], axis=-1)
    w = np.stack([0.5 * (0.5 - t) ** 2, 0.75 - t * t, 0.5 * (0.5 + t) ** 2], axis=-1)
    return np.full(f.shape, -1, dtype=np.int64), w


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
    idx0, stencils = [], []
    for a in range(d):
        s = (np.asarray(cols[a], dtype=np.float64) - layout.domain_lower[a]) / layout.cell_size[a]
        good &= np.isfinite(s)
        s = np.where(np.isfinite(s), s, 0.0)
        if per[a]:
            s = np.mod(s, cells[a])
        cell = np.floor(s).astype(np.int64)
        frac = s - cell
        if per[a]:   # np.mod can round up to exactly cells[a]
            cell = np.where(cell >= cells[a], cell - cells[a], cell)
        shift, w = shape_weights(frac, p)
        idx0.append(cell + shift)
        stencils.append(w)
    if not good.all():
        v = np.where(good, v, 0.0)
    flat_size = int(np.prod(cells))
    grid = np.zeros(flat_size, dtype=np.float64)
    k = p + 1
    # a loop over the K**d stencil points, each one vectorised over all particles
    for combo in itertools.product(range(k), repeat=d):
        flat = np.zeros(n, dtype=np.int64)
        wt = v.copy()
        keep = None
        stride = 1
        for a in range(d - 1, -1, -1):   # C order [ix, iy, iz]: z fastest
            i = idx0[a] + combo[a]
            if per[a]:
                i = np.mod(i, cells[a])
            else:
                inside = (i >= 0) & (i < cells[a])
                if outside == "drop":
                    keep = inside if keep is None else keep & inside
                i = np.clip(i, 0, cells[a] - 1)
            flat += i * stride
            stride *= cells[a]
            wt *= stencils[a][:, combo[a]]
        if keep is not None:
            wt = np.where(keep, wt, 0.0)
        grid += np.bincount(flat, weights=wt, minlength=flat_size)
    return grid.reshape(cells)
