"""Depositing particle quantities onto the level-0 cells: NGP, CIC and TSC shapes.

Cell ``i`` spans ``[i, i+1)`` in cell units and its centre is ``i + ½``.
On periodic axes the stencil wraps around. On other axes the part of a
stencil that falls outside the domain is *clamped* into the edge cell (and a
particle outside the domain is clamped onto the edge), so the deposited total
always equals the sum of the values; ``outside="drop"`` leaves those parts
out instead. Particles with a non-finite position or value are never
deposited.

:class:`Deposit` is the one definition: an accumulator (see :mod:`.accumulate`)
whose state is the flat mesh; a piece's particles are spread onto it and the
meshes of two row ranges add. :func:`deposit` runs it on whole arrays.
"""

from __future__ import annotations

import itertools

import numpy as np

from ..core.layout import BlockLayout, _as_columns
from .accumulate import Accumulator, one_piece

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
    if p == 0:
        return 0, [np.ones(f.shape)]
    t = f - 0.5          # offset from the centre of the particle's own cell, in [-½, ½)
    if p == 1:
        left = t < 0                              # left of the centre: cells -1 and 0
        t += left                                 # distance past the left cell centre, [0, 1)
        return -left.astype(np.int64), [1.0 - t, t]
    t2 = t * t
    return -1, [0.5 * (0.25 - t + t2), 0.75 - t2, 0.5 * (0.25 + t + t2)]


def shape_weights(frac, order):
    """Stencil of each particle along one axis.

    ``frac`` is the particle's position inside its cell, in ``[0, 1)`` (cell
    units). Returns ``(shift, weights)``: the stencil covers cells
    ``cell + shift + k`` for ``k = 0..K-1`` with ``weights[:, k]``; K is 1
    (NGP), 2 (CIC) or 3 (TSC), and each row sums to one.
    """
    f = np.asarray(frac, dtype=np.float64)
    shift, w = _stencil(f, _order(order))
    return np.broadcast_to(np.asarray(shift, dtype=np.int64), f.shape).copy(), np.stack(w, axis=-1)


class Deposit(Accumulator):
    """Sum of a value spread over the layout's level-0 cells with an NGP, CIC or TSC shape.

    ``positions`` names the position columns (one per layout axis); ``value``
    is a column name, one number for every particle, or None (1).
    ``periodic`` overrides the layout's periodic axes; ``outside`` is
    ``clamp`` or ``drop`` (see the module). ``finish`` gives the mesh, shape
    ``tuple(layout.cells)`` indexed ``[ix, iy, iz]`` like ``numpy.histogramdd``.
    """

    reads_once = True

    def __init__(self, layout: BlockLayout, positions, value=None, *, order="cic", periodic=None,
                 outside: str = "clamp"):
        if outside not in ("clamp", "drop"):
            raise ValueError("outside must be 'clamp' or 'drop'")
        self.layout = layout
        self.positions = tuple(positions)
        d = layout.ndim
        if len(self.positions) != d:
            raise ValueError(f"{len(self.positions)} position axes for a {d}-D layout")
        self.order = _order(order)
        self.periodic = (tuple(layout.periodic) if periodic is None
                         else tuple(bool(x) for x in periodic) + (False,) * d)[:d]
        self.outside = outside
        if value is None or isinstance(value, str):
            self.value, self.scale = value, 1.0
        else:
            self.value, self.scale = None, float(value)
        self.columns = tuple(dict.fromkeys(self.positions + ((self.value,) if self.value else ())))

    @classmethod
    def of_frame(cls, frame, layout: BlockLayout, order="cic"):
        """The deposit of a frame's weight (its weight role, else the species attribute, else 1)."""
        weight = frame.column_for("weight")
        if weight is None:
            weight = frame.per_particle("weight", 1.0)
        return cls(layout, frame.position_names, weight, order=order)

    def start(self):
        return np.zeros(int(np.prod([int(c) for c in self.layout.cells])), dtype=np.float64)

    def add(self, state, piece):
        if len(piece):
            values = piece[self.value] if self.value else None
            _spread(state, [piece[c] for c in self.positions], values, self.layout, self.order,
                    self.periodic, self.outside)
        return state

    def merge(self, a, b):
        a += b
        return a

    def finish(self, state):
        # a common value multiplies the mesh once, at the end
        grid = state * self.scale if self.scale != 1.0 else state
        return grid.reshape([int(c) for c in self.layout.cells])


def deposit(positions, values, layout: BlockLayout, order="cic", periodic=None, outside: str = "clamp") -> np.ndarray:
    """Sum of ``values`` spread over the layout's level-0 cells with the given shape.

    Returns an array of shape ``tuple(layout.cells)`` indexed ``[ix, iy, iz]``
    (like ``numpy.histogramdd``). ``values`` is a per-particle array or a
    scalar; ``periodic`` overrides the layout's periodic axes. :class:`Deposit`
    run on the arrays as one piece.
    """
    cols = _as_columns(positions)
    d = layout.ndim
    if len(cols) != d:
        raise ValueError(f"{len(cols)} position axes for a {d}-D layout")
    n = cols[0].shape[0] if cols else 0
    arrays = {f"_p{a}": np.asarray(c) for a, c in enumerate(cols)}
    v = np.asarray(values, dtype=np.float64)
    if v.ndim == 0:
        value = float(v)
    else:
        if v.shape != (n,):
            raise ValueError(f"values have shape {v.shape}, expected ({n},)")
        arrays["_v"] = v
        value = "_v"
    acc = Deposit(layout, list(arrays)[:d], value, order=order, periodic=periodic, outside=outside)
    return one_piece(acc, arrays)


def _spread(grid, cols, v, layout: BlockLayout, p: int, per, outside: str) -> None:
    """Add the stencils of one piece's particles (value ``v`` each, or 1 when None) to ``grid``."""
    d = layout.ndim
    cells = [int(c) for c in layout.cells]
    n = cols[0].shape[0] if cols else 0
    if v is not None:
        v = np.asarray(v, dtype=np.float64)
    good = np.isfinite(v) if v is not None else np.ones(n, dtype=bool)
    k = p + 1
    strides = np.cumprod([1] + cells[::-1][:-1])[::-1]   # C order [ix, iy, iz]: z fastest
    # per axis and stencil point: the (wrapped or clamped) cell times its stride, and the weight;
    # d*K arrays, combined below for each of the K**d stencil points. In-place arithmetic where
    # it can be: at ten million particles every fresh temporary costs more than the arithmetic.
    offsets, weights, keeps = [], [], []
    for a in range(d):
        s = np.subtract(cols[a], layout.domain_lower[a], dtype=np.float64)
        s /= layout.cell_size[a]
        finite = np.isfinite(s)
        if not finite.all():
            good &= finite
            s[~finite] = 0.0
        cell = np.floor(s)
        s -= cell                          # the position inside the cell, [0, 1)
        cell = cell.astype(np.int64)
        if per[a] and (cell.min(initial=0) < 0 or cell.max(initial=0) >= cells[a]):
            cell = np.mod(cell, cells[a])   # only particles outside the box need it
        shift, w_a = _stencil(s, p)
        del s
        cell += shift
        off_a, keep_a = [], []
        for j in range(k):
            i = cell if j == k - 1 else cell.copy()
            if j:
                i += j
            if per[a]:
                # a stencil reaches at most one period out: one add or subtract wraps it
                i[i < 0] += cells[a]
                i[i >= cells[a]] -= cells[a]
                keep_a.append(None)
            else:
                keep_a.append(((i >= 0) & (i < cells[a])) if outside == "drop" else None)
                np.clip(i, 0, cells[a] - 1, out=i)
            if strides[a] != 1:
                i *= int(strides[a])
            off_a.append(i)
        offsets.append(off_a)
        weights.append(w_a)
        keeps.append(keep_a)
    if v is not None:
        v = np.where(good, v, 0.0) if not good.all() else v
    elif not good.all():
        v = good.astype(np.float64)   # non-finite positions: weight 0
    flat = np.empty(n, dtype=np.int64) if d > 1 else None
    wt = np.empty(n, dtype=np.float64)
    # a loop over the K**d stencil points, each one vectorised over all particles
    for combo in itertools.product(range(k), repeat=d):
        if d > 1:
            np.add(offsets[0][combo[0]], offsets[1][combo[1]], out=flat)
            for a in range(2, d):
                flat += offsets[a][combo[a]]
            index = flat
        else:
            index = offsets[0][combo[0]]
        if v is None:
            np.copyto(wt, weights[0][combo[0]])
        else:
            np.multiply(v, weights[0][combo[0]], out=wt)
        keep = keeps[0][combo[0]]
        for a in range(1, d):
            wt *= weights[a][combo[a]]
            if keeps[a][combo[a]] is not None:
                keep = keeps[a][combo[a]] if keep is None else keep & keeps[a][combo[a]]
        if keep is not None:
            wt[~keep] = 0.0
        # added in place, in particle order: no mesh-sized temporary per piece (a bincount's
        # would cost more than the piece when the mesh is large), and faster than one anyway
        np.add.at(grid, index, wt)
