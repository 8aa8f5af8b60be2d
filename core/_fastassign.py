"""Compiled kernels behind :func:`core.layout.assign_blocks` for large inputs.

The numpy path makes several full-size temporaries per axis (scaled
coordinate, floor, int cast, masks); at ten million particles that costs
about a second, a hundred times one pass over the data. These kernels do the
same arithmetic, in the same order and the same float64 precision, one
particle at a time, so their answers are identical to the numpy path (tests
compare both).

numba is optional: when it cannot be imported the numpy path is used.
"""

from __future__ import annotations

import math

import numpy as np

import importlib.util
import threading

#: below this many particles the numpy path is fast enough and avoids a compile
MIN_PARTICLES = 200_000

# numba is declared; still, never require it, and import it only when
# a large input needs it (it adds half a second to every command's start)
available = importlib.util.find_spec("numba") is not None
_kernels: dict = {}
_lock = threading.Lock()   # the partitioned engine calls in from several threads at once


def _axis(c, lo, hi, scale, last):
    # floor((c - lo) * scale) clipped to [0, last]; int() is floor because c >= lo when inside
    c = np.float64(c)
    inside = (c >= lo) & (c < hi)
    f = (c - lo) * scale
    i = np.int64(f) if inside else np.int64(0)
    return min(i, last), inside


def _regular1(x, lo, hi, scale, nb, out):
    for k in range(x.shape[0]):
        i, a = _axis(x[k], lo[0], hi[0], scale[0], nb[0] - 1)
        out[k] = i if a else -1


def _regular2(x, y, lo, hi, scale, nb, out):
    l0, l1, h0, h1, s0, s1 = lo[0], lo[1], hi[0], hi[1], scale[0], scale[1]
    m0, m1, n0 = nb[0] - 1, nb[1] - 1, nb[0]
    for k in range(x.shape[0]):
        i, a = _axis(x[k], l0, h0, s0, m0)
        j, b = _axis(y[k], l1, h1, s1, m1)
        out[k] = i + n0 * j if (a & b) else -1


def _regular3(x, y, z, lo, hi, scale, nb, out):
    l0, l1, l2, h0, h1, h2 = lo[0], lo[1], lo[2], hi[0], hi[1], hi[2]
    s0, s1, s2 = scale[0], scale[1], scale[2]
    m0, m1, m2, n0, n01 = nb[0] - 1, nb[1] - 1, nb[2] - 1, nb[0], nb[0] * nb[1]
    for k in range(x.shape[0]):
        i, a = _axis(x[k], l0, h0, s0, m0)
        j, b = _axis(y[k], l1, h1, s1, m1)
        m, c = _axis(z[k], l2, h2, s2, m2)
        out[k] = i + n0 * j + n01 * m if (a & b & c) else -1


def _cell(c, origin, h, n):
    # the level cell of one coordinate: floor((c - origin) / h), valid when in [0, n)
    f = math.floor((np.float64(c) - origin) / h)
    inside = (f >= 0.0) & (f < n)
    return (np.int64(f) if inside else np.int64(0)), inside


def _grid1(x, origin, h, shape, grid, block_id, out):
    for k in range(x.shape[0]):
        i, a = _cell(x[k], origin[0], h[0], shape[0])
        # branch-free: random particle order would defeat the branch predictor
        row = grid[i] if a else -1
        out[k] = block_id[max(row, 0)] if row >= 0 else out[k]   # higher levels overwrite


def _grid2(x, y, origin, h, shape, grid, block_id, out):
    o0, o1, h0, h1, n0, n1 = origin[0], origin[1], h[0], h[1], shape[0], shape[1]
    for k in range(x.shape[0]):
        i, a = _cell(x[k], o0, h0, n0)
        j, b = _cell(y[k], o1, h1, n1)
        row = grid[i + n0 * j] if (a & b) else -1
        out[k] = block_id[max(row, 0)] if row >= 0 else out[k]


def _grid3(x, y, z, origin, h, shape, grid, block_id, out):
    o0, o1, o2, h0, h1, h2 = origin[0], origin[1], origin[2], h[0], h[1], h[2]
    n0, n1, n2 = shape[0], shape[1], shape[2]
    for k in range(x.shape[0]):
        i, a = _cell(x[k], o0, h0, n0)
        j, b = _cell(y[k], o1, h1, n1)
        m, c = _cell(z[k], o2, h2, n2)
        row = grid[i + n0 * (j + n1 * m)] if (a & b & c) else -1
        out[k] = block_id[max(row, 0)] if row >= 0 else out[k]


def _compiled(kind: str, d: int):
    """The jitted kernel (compiled once per process, cached on disk by numba)."""
    with _lock:
        if not _kernels:
            _build()
    return _kernels[(kind, d)]


def _build() -> None:
    import numba
    g = globals()
    g["_axis"] = numba.njit(nogil=True, inline="always")(_axis)
    g["_cell"] = numba.njit(nogil=True, inline="always")(_cell)
    built = {}
    for name, fns in (("regular", (_regular1, _regular2, _regular3)),
                      ("grid", (_grid1, _grid2, _grid3))):
        for dim, fn in enumerate(fns, start=1):
            built[(name, dim)] = numba.njit(cache=True, nogil=True)(fn)
    _kernels.update(built)


def _contiguous(cols):
    return [c if c.flags.c_contiguous else np.ascontiguousarray(c) for c in cols]


def usable(cols) -> bool:
    if not available or not cols or cols[0].shape[0] < MIN_PARTICLES or len(cols) > 3:
        return False
    return all(c.dtype.kind in "fiu" and c.dtype.itemsize <= 8 for c in cols)


def assign_regular(cols, lo, hi, nb) -> np.ndarray:
    lo = np.asarray(lo, dtype=np.float64)
    hi = np.asarray(hi, dtype=np.float64)
    nb = np.asarray(nb, dtype=np.int64)
    scale = np.array([nb[a] / (hi[a] - lo[a]) for a in range(len(cols))], dtype=np.float64)
    out = np.empty(cols[0].shape[0], dtype=np.int64)
    _compiled("regular", len(cols))(*_contiguous(cols), lo, hi, scale, nb, out)
    return out


def assign_grid_level(cols, origin, h, shape, grid, block_id, out) -> None:
    _compiled("grid", len(cols))(*_contiguous(cols), np.asarray(origin, dtype=np.float64),
              np.asarray(h, dtype=np.float64), np.asarray(shape, dtype=np.int64),
              np.ascontiguousarray(grid).reshape(-1), np.asarray(block_id, dtype=np.int64), out)
