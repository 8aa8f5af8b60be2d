"""Census: particles and weight per block, per rank and per refinement level.

Block ids come from :func:`core.layout.assign_blocks` (``-1`` for a particle in
no block). Everything here is one or two ``np.bincount`` passes over them.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..core.layout import BlockLayout


def _rows(block_ids, layout: BlockLayout) -> np.ndarray:
    """Layout row of each particle's block, ``-1`` for none (and for unknown ids)."""
    ids = np.asarray(block_ids)
    if ids.dtype.kind not in "iu":
        raise TypeError("block ids must be integers")
    return layout.block_index(ids)


def _weights(weights, n):
    if weights is None:
        return None
    w = np.asarray(weights, dtype=np.float64)
    if w.ndim == 0:
        return float(w)
    if w.shape != (n,):
        raise ValueError(f"weights have shape {w.shape}, expected ({n},)")
    return w


def _count_rows(rows: np.ndarray, nrows: int, weights):
    """Counts and weights per row 0..nrows-1, plus the same for row -1 (returned last)."""
    outside = rows < 0
    n_out = int(np.count_nonzero(outside))
    # bincount takes no negatives: shift by one (slot 0 = "in no block") only when there are any,
    # since the shifted copy costs as much as the count itself
    idx, first = (rows + 1, 1) if n_out else (rows, 0)
    counts = np.bincount(idx, minlength=nrows + first).astype(np.int64)
    if weights is None:
        wsum = counts.astype(np.float64)
    elif isinstance(weights, float):
        wsum = counts * weights
    else:
        wsum = np.bincount(idx, weights=weights, minlength=nrows + first)
    if n_out:
        return counts[1:], wsum[1:], n_out, float(wsum[0])
    return counts, wsum, 0, 0.0


def block_census(block_ids, layout: BlockLayout, weights=None) -> pd.DataFrame:
    """Particles and weight in every block of ``layout`` (empty ones too).

    A ``-1`` row (level and rank ``-1``) is added when some particles lie in
    no block. ``weights`` is a per-particle array, a scalar, or None (weight 1).
    """
    rows = _rows(block_ids, layout)
    w = _weights(weights, rows.shape[0])
    counts, wsum, out_n, out_w = _count_rows(rows, layout.nblocks, w)
    df = pd.DataFrame({
        "block": layout.block_id.astype(np.int64),
        "level": layout.level.astype(np.int64),
        "rank": layout.rank.astype(np.int64),
        "count": counts,
        "weight": wsum,
    })
    if out_n:
        df = pd.concat([df, pd.DataFrame({"block": [-1], "level": [-1], "rank": [-1],
                                          "count": [out_n], "weight": [out_w]})],
                       ignore_index=True)
    return df


def rank_census(block_ids, layout: BlockLayout, weights=None, particle_rank=None) -> pd.DataFrame:
    """Particles, weight and owned blocks per rank.

    With ``particle_rank`` (a rank column written by the code) particles are
    counted where they really live; otherwise by the owner of their block.
    Every rank that owns a block or holds a particle gets a row; particles
    with no rank (no block, or a negative rank column) go to rank ``-1``.
    """
    rows = _rows(block_ids, layout)
    n = rows.shape[0]
    w = _weights(weights, n)
    if particle_rank is not None:
        r = np.asarray(particle_rank)
        if r.shape != (n,):
            raise ValueError(f"particle ranks have shape {r.shape}, expected ({n},)")
        r = r.astype(np.int64, copy=False)
        r = np.where(r < 0, -1, r)
    else:
        owner = np.append(layout.rank.astype(np.int64), -1)   # row -1 -> last entry -> -1
        r = owner[rows]
    top = int(max(layout.rank.max(initial=-1), r.max(initial=-1)))
    counts, wsum, out_n, out_w = _count_rows(r, top + 1, w)
    blocks = np.bincount(layout.rank[layout.rank >= 0], minlength=top + 1)[: top + 1]
    df = pd.DataFrame({"rank": np.arange(top + 1, dtype=np.int64), "count": counts,
                       "weight": wsum, "blocks": blocks.astype(np.int64)})
    if out_n:
        df = pd.concat([df, pd.DataFrame({"rank": [-1], "count": [out_n], "weight": [out_w],
                                          "blocks": [0]})], ignore_index=True)
    return df


def level_census(block_ids, layout: BlockLayout, weights=None) -> pd.DataFrame:
    """Particles, weight and blocks per refinement level (``-1``: in no block)."""
    bc = block_census(block_ids, layout, weights)
    bc = bc.assign(blocks=(bc["block"] >= 0).astype(np.int64))
    out = (bc.groupby("level", sort=True)[["count", "weight", "blocks"]].sum()
           .reset_index()[["level", "count", "weight", "blocks"]])
    # levels in order, "in no block" last as in the other census tables
    return pd.concat([out[out["level"] >= 0], out[out["level"] < 0]], ignore_index=True)


def imbalance(loads) -> dict:
    """Load-imbalance figures of a set of loads (per rank or per block).

    ``max_over_mean`` is 1 for a perfect balance; ``cv`` is the population
    standard deviation over the mean. Both are NaN when the mean load is zero.
    """
    a = np.asarray(loads, dtype=np.float64).ravel()
    n = int(a.size)
    if n == 0:
        return dict(max_over_mean=np.nan, cv=np.nan, max=np.nan, mean=np.nan, min=np.nan, n=0)
    mean = float(a.mean())
    mx, mn = float(a.max()), float(a.min())
    if mean > 0:
        mom, cv = mx / mean, float(a.std()) / mean
    else:
        mom = cv = np.nan
    return dict(max_over_mean=mom, cv=cv, max=mx, mean=mean, min=mn, n=n)
