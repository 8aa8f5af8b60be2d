"""Memory locality of the particle order: do neighbours in memory sit in neighbouring cells?

Deposition and field gathering touch the cells around each particle; when
consecutive particles sit in the same or an adjacent cell those cells stay
in cache. The score is the fraction of consecutive particle pairs in the
same or a face-neighbouring level-0 cell.
"""

from __future__ import annotations

import numpy as np

from ..core.layout import BlockLayout, cell_index


def _unflatten(flat: np.ndarray, shape) -> list[np.ndarray]:
    out = []
    rest = flat
    for n in shape:   # x fastest
        out.append(rest % n)
        rest = rest // n
    return out


def _per_axis(cell_ids, shape):
    """Per-axis cell indices, or None for flat numbers without a grid shape."""
    if isinstance(cell_ids, (tuple, list)):
        return [np.asarray(c, dtype=np.int64) for c in cell_ids]
    a = np.asarray(cell_ids)
    if a.ndim == 2:
        return [a[:, i].astype(np.int64) for i in range(a.shape[1])]
    if shape is None:
        return None
    return _unflatten(a.astype(np.int64), [int(s) for s in shape])


def locality_score(cell_ids, shape=None) -> float:
    """Fraction of consecutive particles in the same or a face-neighbouring cell.

    ``cell_ids`` are per-axis integer cell indices (a tuple of arrays or an
    ``(N, d)`` array), or flat cell numbers (x fastest) with ``shape`` the
    cells per axis; flat numbers without ``shape`` can only tell "same cell".
    NaN for fewer than two particles.
    """
    axes = _per_axis(cell_ids, shape)
    if axes is None:
        flat = np.asarray(cell_ids)
        n = flat.shape[0]
        return float(np.count_nonzero(flat[1:] == flat[:-1]) / (n - 1)) if n >= 2 else float("nan")
    n = axes[0].shape[0]
    if n < 2:
        return float("nan")
    manhattan = np.zeros(n - 1, dtype=np.int64)
    for c in axes:
        manhattan += np.abs(np.diff(c))
    return float(np.count_nonzero(manhattan <= 1) / (n - 1))


def _sorted_score(flat: np.ndarray, shape) -> float:
    """The score after a stable sort by flat cell number, without sorting."""
    n = flat.shape[0]
    if n < 2:
        return float("nan")
    counts = np.bincount(flat, minlength=int(np.prod(shape)))
    occupied = np.flatnonzero(counts)
    same = int(n - occupied.size)             # pairs inside one cell
    axes = _unflatten(occupied, shape)
    manhattan = np.zeros(max(occupied.size - 1, 0), dtype=np.int64)
    for c in axes:
        manhattan += np.abs(np.diff(c))
    return float((same + np.count_nonzero(manhattan <= 1)) / (n - 1))


def locality_report(positions, layout: BlockLayout) -> dict:
    """Score of the stored order, the score after sorting by cell, and a hint in plain words."""
    flat = cell_index(positions, layout, clip=True)
    shape = [int(c) for c in layout.cells]
    score = locality_score(flat, shape)
    best = _sorted_score(flat, shape)
    if not np.isfinite(score):
        hint = "fewer than two particles: nothing to say about their order"
    elif best - score > 0.2 and score < 0.5:
        hint = (f"only {score:.0%} of neighbours in memory sit in the same or an adjacent cell; "
                f"sorting the particles by cell now and then would raise that to {best:.0%} "
                "and make deposition and field gathering more cache friendly")
    elif best - score > 0.1:
        hint = (f"{score:.0%} of neighbours in memory share or touch a cell; sorting by cell "
                f"would give {best:.0%}, a moderate gain")
    else:
        hint = (f"the particle order already follows the cells ({score:.0%} of neighbours in "
                "memory share or touch a cell); sorting would not help much")
    return {"score": score, "sorted_score": best, "hint": hint}
