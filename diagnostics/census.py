"""Census: particles and weight per block, per rank and per refinement level.

Block ids come from :func:`core.layout.assign_blocks` (``-1`` for a particle in
no block). :class:`Census` is the one definition: an accumulator (see
:mod:`.accumulate`) counting particles and summing weight per layout row and
per rank column value; the block, rank and level tables are all made from
those sums. ``block_census``, ``rank_census`` and ``level_census`` run it on
whole arrays.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..core.layout import BlockLayout, assign_blocks, nonfinite_rows
from ._bincount import counts_and_sums
from .accumulate import Accumulator, one_piece


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


def _grown(a: np.ndarray, n: int) -> np.ndarray:
    if a.shape[0] >= n:
        return a
    out = np.zeros(n, dtype=a.dtype)
    out[:a.shape[0]] = a
    return out


class Census(Accumulator):
    """Particles and weight per block (layout row) and, with a rank column, per rank.

    Where a particle is: ``positions`` (column names, assigned to blocks with
    ``layout``; the highest level wins, ``-1`` outside) or ``block`` (a column
    of block ids). ``weight`` is a column name, one number for every particle,
    or None (weight 1). ``rank`` names a rank column written by the code:
    particles are then counted per rank where they really live (a per-rank
    file's rank comes with its pieces); without one, a rank's particles are
    those of the blocks it owns.

    The state holds ``counts``/``wsum`` per slot (slot 0: in no block, slot
    r+1: layout row r) and, with ``rank``, ``rank_counts``/``rank_wsum``
    (slot 0: no rank, slot r+1: rank r). ``finish`` gives
    ``{"block", "rank", "level"}`` tables and ``nonfinite``: how many of the particles in no
    block are there for a NaN or infinite coordinate.
    """

    def __init__(self, layout: BlockLayout, positions=(), *, block: str | None = None,
                 weight=None, rank: str | None = None):
        self.layout = layout
        self.positions = tuple(positions)
        self.block = block
        self.weight = weight
        self.rank = rank
        if not self.positions and block is None:
            raise ValueError("a census needs positions or a block column")
        cols = list(self.positions) if self.positions else [block]
        for c in (weight if isinstance(weight, str) else None, rank):
            if c is not None:
                cols.append(c)
        self.columns = tuple(dict.fromkeys(cols))

    @classmethod
    def of_frame(cls, frame, layout: BlockLayout, weight_default=1.0, particle_rank: bool = True):
        """The census of a frame as the audit takes it: its weight role (else the species
        attribute, else ``weight_default``) and its rank column where it has one."""
        weight = frame.column_for("weight")
        if weight is None:
            weight = frame.per_particle("weight", weight_default)
        rank = frame.column_for("rank") if particle_rank else None
        if frame.ndim == layout.ndim > 0:
            return cls(layout, frame.position_names, weight=weight, rank=rank)
        if frame.ndim == 0 and frame.column_for("block") is not None:
            return cls(layout, block=frame.column_for("block"), weight=weight, rank=rank)
        return None

    def start(self):
        n = self.layout.nblocks + 1
        state = {"counts": np.zeros(n, np.int64), "wsum": np.zeros(n), "nonfinite": 0}
        if self.rank is not None:
            state["rank_counts"] = np.zeros(1, np.int64)
            state["rank_wsum"] = np.zeros(1)
        return state

    def add(self, state, piece):
        if self.positions:
            ids = assign_blocks([piece[c] for c in self.positions], self.layout)
        else:
            ids = piece[self.block]
        slots = _rows(ids, self.layout) + 1       # slot 0: in no block
        n = slots.shape[0]
        w = piece[self.weight] if isinstance(self.weight, str) else self.weight
        w = _weights(w, n)
        counts, wsum = counts_and_sums(slots, w, self.layout.nblocks + 1)
        state["counts"] += counts
        state["wsum"] += wsum
        if self.positions and counts[0]:
            # of the particles in no block, those there for a NaN or infinite coordinate (looked
            # for only when some particle is in no block, so a full census costs nothing more)
            out = np.flatnonzero(slots == 0)
            state["nonfinite"] += int(np.count_nonzero(
                nonfinite_rows([np.asarray(piece[c])[out] for c in self.positions])))
        if self.rank is not None:
            value = piece.constant(self.rank)
            if value is not None:     # a per-rank file: every particle has its file's rank
                k = max(int(value), -1) + 1
                rc, rw = np.zeros(k + 1, np.int64), np.zeros(k + 1)
                rc[k] = n
                rw[k] = float(wsum.sum())
            else:
                r = np.asarray(piece[self.rank]).astype(np.int64, copy=False)
                r = np.where(r < 0, 0, r + 1)
                rc, rw = counts_and_sums(r, w, int(r.max(initial=0)) + 1)
            m = max(rc.shape[0], state["rank_counts"].shape[0])
            state["rank_counts"] = _grown(state["rank_counts"], m)
            state["rank_wsum"] = _grown(state["rank_wsum"], m)
            state["rank_counts"][:rc.shape[0]] += rc
            state["rank_wsum"][:rw.shape[0]] += rw
        return state

    def merge(self, a, b):
        out = {"counts": a["counts"] + b["counts"], "wsum": a["wsum"] + b["wsum"],
               "nonfinite": a.get("nonfinite", 0) + b.get("nonfinite", 0)}
        if "rank_counts" in a:
            m = max(a["rank_counts"].shape[0], b["rank_counts"].shape[0])
            out["rank_counts"] = _grown(a["rank_counts"], m) + _grown(b["rank_counts"], m)
            out["rank_wsum"] = _grown(a["rank_wsum"], m) + _grown(b["rank_wsum"], m)
        return out

    def finish(self, state) -> dict[str, pd.DataFrame]:
        block = _block_table(state["counts"], state["wsum"], self.layout)
        if "rank_counts" in state:
            rank = _rank_table(state["rank_counts"], state["rank_wsum"], self.layout)
        else:
            rank = _rank_table(*_owner_sums(state["counts"], state["wsum"], self.layout), self.layout)
        return {"block": block, "rank": rank, "level": _level_table(block),
                "nonfinite": int(state.get("nonfinite", 0))}


def _block_table(counts, wsum, layout: BlockLayout) -> pd.DataFrame:
    df = pd.DataFrame({
        "block": layout.block_id.astype(np.int64),
        "level": layout.level.astype(np.int64),
        "rank": layout.rank.astype(np.int64),
        "count": counts[1:].astype(np.int64),
        "weight": wsum[1:].astype(np.float64),
    })
    if counts[0]:
        df = pd.concat([df, pd.DataFrame({"block": [-1], "level": [-1], "rank": [-1],
                                          "count": [int(counts[0])], "weight": [float(wsum[0])]})],
                       ignore_index=True)
    return df


def _owner_sums(counts, wsum, layout: BlockLayout):
    """Counts and weight per rank slot (0: none, r+1: rank r) from those per block slot."""
    owner = np.concatenate([[-1], layout.rank.astype(np.int64)])
    owner = np.where(owner < 0, 0, owner + 1)
    size = int(owner.max(initial=0)) + 1
    rc = np.zeros(size, np.int64)
    np.add.at(rc, owner, counts)
    rw = np.bincount(owner, weights=wsum, minlength=size)
    return rc, rw


def _rank_table(rank_counts, rank_wsum, layout: BlockLayout) -> pd.DataFrame:
    rank_counts = np.asarray(rank_counts, dtype=np.int64)
    top = int(max(layout.rank.max(initial=-1), rank_counts.shape[0] - 2))
    rc = _grown(rank_counts, top + 2)
    rw = _grown(np.asarray(rank_wsum, dtype=np.float64), top + 2)
    blocks = np.bincount(layout.rank[layout.rank >= 0], minlength=top + 1)[: top + 1]
    df = pd.DataFrame({"rank": np.arange(top + 1, dtype=np.int64), "count": rc[1:top + 2],
                       "weight": rw[1:top + 2], "blocks": blocks.astype(np.int64)})
    if rc[0]:
        df = pd.concat([df, pd.DataFrame({"rank": [-1], "count": [int(rc[0])], "weight": [float(rw[0])],
                                          "blocks": [0]})], ignore_index=True)
    return df


def _level_table(block: pd.DataFrame) -> pd.DataFrame:
    bc = block.assign(blocks=(block["block"] >= 0).astype(np.int64))
    out = (bc.groupby("level", sort=True)[["count", "weight", "blocks"]].sum()
           .reset_index()[["level", "count", "weight", "blocks"]])
    # levels in order, "in no block" last as in the other census tables
    return pd.concat([out[out["level"] >= 0], out[out["level"] < 0]], ignore_index=True)


def census_of_arrays(block_ids, layout: BlockLayout, weights=None, particle_rank=None) -> dict:
    """The :class:`Census` tables of whole arrays of block ids (and weights, rank column)."""
    ids = np.asarray(block_ids)
    if ids.dtype.kind not in "iu":
        raise TypeError("block ids must be integers")
    cols = {"block": ids}
    w = _weights(weights, ids.shape[0])
    if isinstance(w, np.ndarray):
        cols["weight"] = w
        w = "weight"
    rank = None
    if particle_rank is not None:
        r = np.asarray(particle_rank)
        if r.shape != ids.shape:
            raise ValueError(f"particle ranks have shape {r.shape}, expected ({ids.shape[0]},)")
        cols["rank"] = r
        rank = "rank"
    return one_piece(Census(layout, block="block", weight=w, rank=rank), cols)


def block_census(block_ids, layout: BlockLayout, weights=None) -> pd.DataFrame:
    """Particles and weight in every block of ``layout`` (empty ones too).

    A ``-1`` row (level and rank ``-1``) is added when some particles lie in
    no block. ``weights`` is a per-particle array, a scalar, or None (weight 1).
    """
    return census_of_arrays(block_ids, layout, weights)["block"]


def rank_census(block_ids, layout: BlockLayout, weights=None, particle_rank=None) -> pd.DataFrame:
    """Particles, weight and owned blocks per rank.

    With ``particle_rank`` (a rank column written by the code) particles are
    counted where they really live; otherwise by the owner of their block.
    Every rank that owns a block or holds a particle gets a row; particles
    with no rank (no block, or a negative rank column) go to rank ``-1``.
    """
    return census_of_arrays(block_ids, layout, weights, particle_rank)["rank"]


def level_census(block_ids, layout: BlockLayout, weights=None) -> pd.DataFrame:
    """Particles, weight and blocks per refinement level (``-1``: in no block)."""
    return census_of_arrays(block_ids, layout, weights)["level"]


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
