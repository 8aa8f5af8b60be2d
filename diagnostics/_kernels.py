"""Compiled loops for the migration diagnostics, where numpy would need several passes.

Optional: numba comes with datashader; when it is missing, or an input is
small, callers use their numpy path (same answers; tests compare both).
Kernels compile on first use and numba caches them on disk.

Matching two snapshots of N particles is bound by random memory access
(looking ids up, gathering the second snapshot's blocks and positions). The
kernels avoid numpy's full-size temporaries and extra passes.
"""

from __future__ import annotations

import importlib.util
import threading

import numpy as np

#: below this size the numpy path is used (no compile, and fast enough)
MIN_SIZE = 200_000

available = importlib.util.find_spec("numba") is not None
_compiled: dict = {}
_lock = threading.Lock()


def _axis_cells(a, b, h, periodic, n):
    # |b - a| in cells, minimum image on a periodic axis
    t = (np.float64(b) - np.float64(a)) / h
    if periodic:
        t -= n * np.rint(t / n)
    return abs(t)


def _wider(m, t):
    # the larger of two displacements; NaN on either side wins, as with np.maximum
    return m if (m > t or m != m) else t


def _dense(ka, kb, span, pos_b, ia, ib, lost, created):
    # pos_b[key]: row of b (>= 0), -1 never seen, -2 matched by a, -3 seen only in a
    nb = kb.shape[0]
    for j in range(nb):   # write-only scatter: no read stalls on the random access
        pos_b[kb[j]] = j
    filled = 0
    for k in range(span):
        filled += pos_b[k] >= 0
    if filled != nb:
        return -(nb - filled), 0, 0, 0
    m = 0
    nl = 0
    dup_a = 0
    for i in range(ka.shape[0]):
        k = ka[i]
        j = pos_b[k]
        if j >= 0:
            ia[m] = i
            ib[m] = j
            m += 1
            pos_b[k] = -2
        elif j == -1:
            lost[nl] = i
            nl += 1
            pos_b[k] = -3
        else:
            dup_a += 1
    if dup_a:
        return 0, dup_a, 0, 0
    nc = 0
    for j in range(nb):
        if pos_b[kb[j]] >= 0:
            created[nc] = j
            nc += 1
    return 1, m, nl, nc


# Gathering the second snapshot's block and coordinates in a separate pass over the matched
# pairs (not inside the matching loop) keeps the random reads independent of each other, so
# the memory system overlaps them. The cell facts go into scalars before the loop: read from
# arrays inside it they would be reloaded every iteration (the outputs might alias them).
def _pairs(ia, ib, want_block, block_b, tb, d, xa, ya, za, xb, yb, zb, h, per, n, disp):
    h0, h1, h2, p0, p1, p2, n0, n1, n2 = h[0], h[1], h[2], per[0], per[1], per[2], n[0], n[1], n[2]
    for k in range(ia.shape[0]):
        i = ia[k]
        j = ib[k]
        if want_block:
            tb[k] = block_b[j]
        w = _axis_cells(xa[i], xb[j], h0, p0, n0)
        if d > 1:
            w = _wider(w, _axis_cells(ya[i], yb[j], h1, p1, n1))
        if d > 2:
            w = _wider(w, _axis_cells(za[i], zb[j], h2, p2, n2))
        disp[k] = w


def _get(name):
    with _lock:
        if name not in _compiled:
            import numba
            g = globals()
            for helper in ("_axis_cells", "_wider"):
                if not hasattr(g[helper], "py_func"):
                    g[helper] = numba.njit(nogil=True, inline="always")(g[helper])
            _compiled[name] = numba.njit(cache=True, nogil=True)(g["_" + name])
    return _compiled[name]


def _geometry(pa, pb, layout):
    """Three coordinate arrays per side (unused axes repeat x) in one dtype, and the cell facts."""
    if pa is None or layout is None:
        z = np.zeros(1)
        return 0, (z, z, z), (z, z, z), np.ones(3), np.zeros(3, np.bool_), np.ones(3)
    d = len(pa)
    dt = np.result_type(*[p.dtype for p in pa], *[p.dtype for p in pb])
    pa = [np.ascontiguousarray(p, dtype=dt) for p in pa]
    pb = [np.ascontiguousarray(p, dtype=dt) for p in pb]
    pa, pb = (pa + [pa[0]] * 3)[:3], (pb + [pb[0]] * 3)[:3]
    h = np.ones(3)
    per = np.zeros(3, np.bool_)
    n = np.ones(3)
    h[:d] = layout.cell_size
    per[:d] = layout.periodic[:d]
    n[:d] = layout.cells
    return d, tuple(pa), tuple(pb), h, per, n


def _blocks(block_b, size):
    if block_b is None:
        return False, np.zeros(1, np.int64), np.zeros(1, np.int64)
    return True, np.ascontiguousarray(block_b, dtype=np.int64), np.empty(size, np.int64)


def dense_match(ka: np.ndarray, kb: np.ndarray, span: int):
    """(ia, ib, lost, created) for keys in ``[0, span)``, or ("dup", side, count)."""
    na, nb = ka.shape[0], kb.shape[0]
    idx_t = np.int32 if max(na, nb) < 2 ** 31 - 1 else np.int64
    pos = np.full(span, -1, dtype=idx_t)
    ia = np.empty(min(na, nb), dtype=np.int64)
    ib = np.empty(min(na, nb), dtype=np.int64)
    lost = np.empty(na, dtype=np.int64)
    created = np.empty(nb, dtype=np.int64)
    status, m, nl, nc = _get("dense")(np.ascontiguousarray(ka), np.ascontiguousarray(kb), span, pos,
                                      ia, ib, lost, created)
    if status < 0:
        return ("dup", "second", -status)
    if status == 0:
        return ("dup", "first", m)
    return _trim(ia, m), _trim(ib, m), _trim(lost, nl), _trim(created, nc)


def matched_pairs(ia, ib, block_b, pa, pb, layout):
    """(block in b or None, displacement in cells) of each matched pair (ia[k], ib[k])."""
    ia = np.asarray(ia, dtype=np.int64)
    ib = np.asarray(ib, dtype=np.int64)
    want, blocks, tb = _blocks(block_b, ia.shape[0])
    d, pa, pb, h, per, n = _geometry(pa, pb, layout)
    disp = np.empty(ia.shape[0], dtype=np.float64)
    _get("pairs")(ia, ib, want, blocks, tb, d, *pa, *pb, h, per, n, disp)
    return (tb if want else None), disp


def _trim(buf, n):
    # a slice pins the whole buffer: copy when that would waste more than half of it
    return buf[:n] if 2 * n >= buf.shape[0] else buf[:n].copy()
