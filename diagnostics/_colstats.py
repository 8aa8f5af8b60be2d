"""Finite range and non-finite count of a column in one pass.

Drawing a column needs its finite (min, max) and how many of its values are
NaN or infinite. numpy needs four passes and a full-size boolean temporary
for that (``isfinite``, ``all``, ``min``, ``max``); at ten million particles
that costs more than the aggregation itself. Here a column with only finite
values costs numpy's two vectorised passes (min and max say so); one with
NaN or inf goes through a compiled loop that reads it once. numba is
optional: without it, or for small columns, numpy gives the same numbers.
"""

from __future__ import annotations

import importlib.util
import math

import numpy as np

#: below this many values numpy is fast enough and no compile is paid
MIN_VALUES = 200_000

available = importlib.util.find_spec("numba") is not None
_kernel = None


def _stats_loop(a):
    lo = math.inf
    hi = -math.inf
    bad = 0
    for k in range(a.shape[0]):
        v = a[k]
        if math.isfinite(v):
            lo = min(lo, v)
            hi = max(hi, v)
        else:
            bad += 1
    return lo, hi, bad


def _compiled():
    global _kernel
    if _kernel is None:
        import numba
        _kernel = numba.njit(cache=True, nogil=True)(_stats_loop)
    return _kernel


def finite_stats(arr: np.ndarray) -> tuple[float | None, float | None, int]:
    """(finite min, finite max, count of NaN/inf); min and max are None when nothing is finite."""
    a = np.asarray(arr)
    if a.size == 0:
        return None, None, 0
    if a.dtype.kind not in "f":
        return float(a.min()), float(a.max()), 0
    # the common case first: numpy's vectorised min/max propagate NaN and keep inf, so two
    # finite answers mean every value is finite (two fast passes, no temporary)
    lo, hi = a.min(), a.max()
    if math.isfinite(lo) and math.isfinite(hi):
        return float(lo), float(hi), 0
    if available and a.ndim == 1 and a.size >= MIN_VALUES:
        lo, hi, bad = _compiled()(a)
        if bad == a.size:
            return None, None, int(bad)
        return float(lo), float(hi), int(bad)
    fin = np.isfinite(a)
    if fin.all():
        return float(a.min()), float(a.max()), 0
    good = a[fin]
    if good.size == 0:
        return None, None, int(a.size)
    return float(good.min()), float(good.max()), int(a.size - good.size)
