"""Compiled loops for the few diagnostics that numpy cannot do in one pass.

Optional: numba comes with datashader; when it is missing, or an input is
small, callers use their numpy path (same answers; tests compare both).
Kernels compile on first use and numba caches them on disk.
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


def _dense_match(ka, kb, span, pos_b, ia, ib, lost, created):
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


def _displacement(pa, pb, ia, ib, h, periodic, ncell, out):
    # Chebyshev displacement in cells of matched particles, gathered straight from both snapshots
    d = len(pa)
    for k in range(ia.shape[0]):
        i = ia[k]
        j = ib[k]
        m = 0.0
        for a in range(d):
            t = (np.float64(pb[a][j]) - np.float64(pa[a][i])) / h[a]
            if periodic[a]:
                t -= ncell[a] * np.rint(t / ncell[a])
            t = abs(t)
            if t > m or t != t:   # NaN wins, as in the numpy path
                m = t
            if m != m:
                break
        out[k] = m


def _get(name):
    with _lock:
        if name not in _compiled:
            import numba
            _compiled[name] = numba.njit(cache=True, nogil=True)(globals()["_" + name])
    return _compiled[name]


def dense_match(ka: np.ndarray, kb: np.ndarray, span: int):
    """(ia, ib, lost, created) for keys in ``[0, span)``, or ("dup", side, count)."""
    na, nb = ka.shape[0], kb.shape[0]
    idx_t = np.int32 if max(na, nb) < 2 ** 31 - 1 else np.int64
    pos_b = np.full(span, -1, dtype=idx_t)
    ia = np.empty(min(na, nb), dtype=np.int64)
    ib = np.empty(min(na, nb), dtype=np.int64)
    lost = np.empty(na, dtype=np.int64)
    created = np.empty(nb, dtype=np.int64)
    status, m, nl, nc = _get("dense_match")(ka, kb, span, pos_b, ia, ib, lost, created)
    if status < 0:
        return ("dup", "second", -status)
    if status == 0:
        return ("dup", "first", m)
    return _trim(ia, m), _trim(ib, m), _trim(lost, nl), _trim(created, nc)


def _trim(buf, n):
    # a slice pins the whole buffer: copy when that would waste more than half of it
    return buf[:n] if 2 * n >= buf.shape[0] else buf[:n].copy()


def displacement(pa, pb, ia, ib, h, periodic, ncell) -> np.ndarray:
    """Displacement in cells of matched particles (see migration.displacement_cells)."""
    dt = np.result_type(*[p.dtype for p in pa], *[p.dtype for p in pb])
    pa = tuple(np.ascontiguousarray(p, dtype=dt) for p in pa)
    pb = tuple(np.ascontiguousarray(p, dtype=dt) for p in pb)
    out = np.empty(ia.shape[0], dtype=np.float64)
    _get("displacement")(pa, pb, np.asarray(ia, dtype=np.int64), np.asarray(ib, dtype=np.int64),
                         np.asarray(h, dtype=np.float64), np.asarray(periodic, dtype=np.bool_),
                         np.asarray(ncell, dtype=np.float64), out)
    return out
