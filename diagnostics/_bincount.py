"""Counts and weight sums per slot in one pass, without holding the GIL.

``np.bincount`` holds the GIL, so census pieces on a thread pool take turns
at it and two cores do the work of one. This loop adds in the same order as
``np.bincount`` (particle order, float64), so its sums are identical; numba
is optional, and numpy is used without it or for small inputs.
"""

from __future__ import annotations

import importlib.util

import numpy as np

#: below this many values numpy is used (no compile, and fast enough)
MIN_VALUES = 200_000

available = importlib.util.find_spec("numba") is not None
_kernels: dict = {}


def _counts(slots, counts):
    for k in range(slots.shape[0]):
        counts[slots[k]] += 1


def _counts_sums(slots, weights, counts, sums):
    for k in range(slots.shape[0]):
        s = slots[k]
        counts[s] += 1
        sums[s] += weights[k]


def _get(name):
    if name not in _kernels:
        import numba
        _kernels[name] = numba.njit(cache=True, nogil=True)(globals()[name])
    return _kernels[name]


def counts_and_sums(slots: np.ndarray, weights, size: int):
    """(counts, sums) per slot ``0..size-1`` of non-negative ``slots``.

    ``weights`` is a per-value array, a number (every value weighs that), or
    None (weight 1): then the sums are the counts as floats, times the number.
    """
    slots = np.asarray(slots)
    per_value = weights is not None and np.ndim(weights) > 0
    if slots.size and (int(slots.min()) < 0 or int(slots.max()) >= size):
        raise ValueError(f"slots must lie in [0, {size})")
    if available and slots.size >= MIN_VALUES and slots.dtype.kind in "iu":
        counts = np.zeros(size, dtype=np.int64)
        if per_value:
            sums = np.zeros(size, dtype=np.float64)
            _get("_counts_sums")(slots, np.asarray(weights, dtype=np.float64), counts, sums)
            return counts, sums
        _get("_counts")(slots, counts)
    else:
        counts = np.bincount(slots, minlength=size).astype(np.int64)
        if per_value:
            return counts, np.bincount(slots, weights=np.asarray(weights, np.float64), minlength=size)
    if weights is None:
        return counts, counts.astype(np.float64)
    return counts, counts * float(weights)
