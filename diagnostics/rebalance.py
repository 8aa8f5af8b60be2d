"""What-if load balancing: how even would the loads be under other block-to-rank maps?

Two classic families are compared with the current map: cutting a
space-filling curve (Morton or Hilbert order of the blocks) into contiguous
pieces of equal load, and the greedy largest-first rule (each block, heaviest
first, onto the currently lightest rank).
"""

from __future__ import annotations

import heapq

import numpy as np
import pandas as pd

from ..core.layout import BlockLayout
from .census import imbalance


def _int_coords(coords) -> np.ndarray:
    if isinstance(coords, (list, tuple)):
        c = np.stack([np.asarray(a) for a in coords], axis=1)
    else:
        c = np.asarray(coords)
        if c.ndim == 1:
            c = c[:, None]
    if c.dtype.kind not in "iu":
        raise TypeError("curve keys need integer coordinates")
    if c.size and c.min() < 0:
        raise ValueError("curve keys need non-negative coordinates")
    return c.astype(np.uint64)


def _spread(v: np.ndarray, d: int) -> np.ndarray:
    """Put d-1 zero bits between consecutive bits of v (magic-number bit spreading)."""
    v = v.astype(np.uint64)
    if d == 1:
        return v
    if d == 2:   # 32 bits -> 64
        v &= np.uint64(0x00000000FFFFFFFF)
        v = (v | (v << np.uint64(16))) & np.uint64(0x0000FFFF0000FFFF)
        v = (v | (v << np.uint64(8))) & np.uint64(0x00FF00FF00FF00FF)
        v = (v | (v << np.uint64(4))) & np.uint64(0x0F0F0F0F0F0F0F0F)
        v = (v | (v << np.uint64(2))) & np.uint64(0x3333333333333333)
        v = (v | (v << np.uint64(1))) & np.uint64(0x5555555555555555)
        return v
    if d == 3:   # 21 bits -> 63
        v &= np.uint64(0x1FFFFF)
        v = (v | (v << np.uint64(32))) & np.uint64(0x001F00000000FFFF)
        v = (v | (v << np.uint64(16))) & np.uint64(0x001F0000FF0000FF)
        v = (v | (v << np.uint64(8))) & np.uint64(0x100F00F00F00F00F)
        v = (v | (v << np.uint64(4))) & np.uint64(0x10C30C30C30C30C3)
        v = (v | (v << np.uint64(2))) & np.uint64(0x1249249249249249)
        return v
    raise ValueError("curve keys are defined for 1 to 3 axes")


def morton_key(coords) -> np.ndarray:
    """Morton (Z-order) key: the bits of the integer coordinates interleaved, x lowest.

    ``coords`` is an ``(N, d)`` integer array or a sequence of d integer
    arrays; bit ``b`` of axis ``a`` lands at bit ``b*d + a`` of the key.
    Up to 32 bits per axis in 2-D and 21 in 3-D.
    """
    c = _int_coords(coords)
    d = c.shape[1]
    limit = {1: 64, 2: 32, 3: 21}.get(d)
    if limit is None:
        raise ValueError("curve keys are defined for 1 to 3 axes")
    if c.size and limit < 64 and int(c.max()) >= (1 << limit):
        raise ValueError(f"Morton keys in {d}-D take coordinates below 2**{limit}")
    key = np.zeros(c.shape[0], dtype=np.uint64)
    for a in range(d):
        key |= _spread(c[:, a], d) << np.uint64(a)
    return key


def hilbert_key(coords, bits: int) -> np.ndarray:
    """Hilbert-curve index of integer coordinates in ``[0, 2**bits)`` (2-D and 3-D).

    Skilling's transpose algorithm (J. Skilling, "Programming the Hilbert
    curve", AIP Conf. Proc. 707, 2004), vectorised over points. In 2-D the
    curve starts at (0, 0), first steps along +x and ends at (2**bits-1, 0).
    """
    c = _int_coords(coords)
    d = c.shape[1]
    if d not in (2, 3):
        raise ValueError("Hilbert keys are defined here for 2 or 3 axes")
    bits = int(bits)
    if bits < 1 or bits * d > 64:
        raise ValueError(f"Hilbert keys take 1 to {64 // d} bits per axis in {d}-D")
    if c.size and int(c.max()) >= (1 << bits):
        raise ValueError(f"coordinates must be below 2**{bits} for bits={bits}")
    # x as Skilling's X[0] (the most significant axis of each bit group) gives the
    # classic orientation in 2-D: first step along +x
    X = [c[:, a].copy() for a in range(d)]
    M = np.uint64(1) << np.uint64(bits - 1)
    Q = M
    while Q > 1:
        P = Q - np.uint64(1)
        for i in range(d):
            has = (X[i] & Q) != 0
            # invert low bits of X[0] where bit Q of X[i] is set, else exchange them with X[i]
            t = (X[0] ^ X[i]) & P
            X0_inv = X[0] ^ P
            if i == 0:
                X[0] = np.where(has, X0_inv, X[0])
            else:
                X[0] = np.where(has, X0_inv, X[0] ^ t)
                X[i] = np.where(has, X[i], X[i] ^ t)
        Q >>= np.uint64(1)
    for i in range(1, d):   # Gray encode
        X[i] = X[i] ^ X[i - 1]
    t = np.zeros_like(X[0])
    Q = M
    while Q > 1:
        t = np.where((X[d - 1] & Q) != 0, t ^ (Q - np.uint64(1)), t)
        Q >>= np.uint64(1)
    for i in range(d):
        X[i] = X[i] ^ t
    key = np.zeros(c.shape[0], dtype=np.uint64)
    for b in range(bits - 1, -1, -1):   # interleave: X[0]'s bit first within each group
        for i in range(d):
            key = (key << np.uint64(1)) | ((X[i] >> np.uint64(b)) & np.uint64(1))
    return key


def _cut_curve(loads_in_order: np.ndarray, nranks: int) -> np.ndarray:
    """Ranks for blocks in curve order: contiguous pieces of about equal load."""
    n = loads_in_order.shape[0]
    total = float(loads_in_order.sum())
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    if total <= 0:
        return (np.arange(n) * nranks) // n
    # a block goes to the rank whose share its load midpoint falls in
    mid = np.cumsum(loads_in_order) - 0.5 * loads_in_order
    return np.clip(np.floor(mid / total * nranks).astype(np.int64), 0, nranks - 1)


def sfc_assignment(loads, block_coords, nranks: int, curve: str = "morton", bits: int | None = None) -> np.ndarray:
    """Rank per block from ordering the blocks along a space-filling curve.

    ``block_coords`` are non-negative integer block positions ``(n, d)``;
    the curve order is cut into ``nranks`` contiguous pieces by cumulative load.
    """
    loads = np.asarray(loads, dtype=np.float64).ravel()
    c = _int_coords(block_coords)
    if c.shape[0] != loads.shape[0]:
        raise ValueError("one coordinate row per block is needed")
    if nranks < 1:
        raise ValueError("nranks must be at least 1")
    if curve == "morton":
        key = morton_key(c)
    elif curve == "hilbert":
        if c.shape[1] == 1:
            key = c[:, 0]
        else:
            need = max(1, int(c.max(initial=0)).bit_length())
            key = hilbert_key(c, bits or need)
    else:
        raise ValueError(f"unknown curve '{curve}' (morton or hilbert)")
    order = np.argsort(key, kind="stable")
    ranks = np.empty(loads.shape[0], dtype=np.int64)
    ranks[order] = _cut_curve(loads[order], nranks)
    return ranks


def greedy_assignment(loads, nranks: int) -> np.ndarray:
    """Largest load first onto the least loaded rank (ties: the lowest rank number).

    A loop over blocks, not particles: a few thousand heap operations.
    """
    loads = np.asarray(loads, dtype=np.float64).ravel()
    if nranks < 1:
        raise ValueError("nranks must be at least 1")
    order = np.argsort(-loads, kind="stable")
    heap = [(0.0, r) for r in range(nranks)]
    ranks = np.empty(loads.shape[0], dtype=np.int64)
    for b in order:
        load, r = heapq.heappop(heap)
        ranks[b] = r
        heapq.heappush(heap, (load + float(loads[b]), r))
    return ranks


def rank_loads(loads, ranks, nranks: int) -> np.ndarray:
    return np.bincount(np.asarray(ranks, dtype=np.int64), weights=np.asarray(loads, dtype=np.float64),
                       minlength=nranks)[:nranks]


def block_grid_coords(layout: BlockLayout) -> np.ndarray:
    """Integer position of each block's centre on the finest level's cell grid."""
    finest = int(layout.level.max(initial=0))
    h = layout.cell_size / float(layout.ratio) ** finest
    centre = 0.5 * (layout.lower + layout.upper)
    return np.floor((centre - layout.domain_lower) / h).astype(np.int64).clip(0, None)


def _block_loads(counts, layout: BlockLayout) -> np.ndarray:
    if isinstance(counts, pd.DataFrame):
        per = counts[counts["block"] >= 0].groupby("block")["count"].sum()
        return per.reindex(layout.block_id, fill_value=0).to_numpy(dtype=np.float64)
    a = np.asarray(counts, dtype=np.float64).ravel()
    if a.shape[0] != layout.nblocks:
        raise ValueError(f"{a.shape[0]} loads for {layout.nblocks} blocks")
    return a


def rebalance_whatif(counts, layout: BlockLayout, nranks: int | None = None) -> pd.DataFrame:
    """Imbalance over ranks now and under Morton, Hilbert and greedy block-to-rank maps.

    ``counts`` is the load of each layout block (an array in layout order, or
    a census table with ``block`` and ``count`` columns).
    """
    loads = _block_loads(counts, layout)
    nranks = int(nranks or layout.nranks or 1)
    coords = block_grid_coords(layout)
    maps = {
        "current": layout.rank.astype(np.int64),
        "morton": sfc_assignment(loads, coords, nranks, "morton"),
        "hilbert": sfc_assignment(loads, coords, nranks, "hilbert"),
        "greedy": greedy_assignment(loads, nranks),
    }
    rows = []
    for name, ranks in maps.items():
        n = max(nranks, int(ranks.max(initial=-1)) + 1)
        stats = imbalance(rank_loads(loads, ranks, n))
        rows.append({"strategy": name, "max_over_mean": stats["max_over_mean"], "cv": stats["cv"]})
    return pd.DataFrame(rows, columns=["strategy", "max_over_mean", "cv"])
