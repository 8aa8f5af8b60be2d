"""Migration between two snapshots: match particles by id, then count who moved where.

Matching is the expensive part. Simulation ids are usually a permutation of
a dense range (``0..N-1`` plus a few created), so the usual path scatters the
second snapshot's row numbers into an array indexed by id (O(N), no sort);
sparse or huge ids and composite keys that do not pack into one integer fall
back to sorting.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..core.errors import SwarmAuditError
from ..core.layout import BlockLayout, assign_blocks
from . import _kernels
from .accumulate import Accumulator, KeepRows


class DuplicateKeyError(SwarmAuditError):
    """Particle ids repeat within one snapshot, so particles cannot be matched."""

    def __init__(self, count: int, side: str):
        self.count = int(count)
        self.side = side
        super().__init__(f"{self.count} particle(s) of the {side} snapshot repeat an id already "
                         "used by another particle, so particles cannot be matched "
                         "(give --id with the columns that together identify a particle)")


@dataclass
class KeyMatch:
    """Rows of matched particles in each snapshot, and the unmatched ones."""

    ia: np.ndarray        # row in snapshot a of each matched particle
    ib: np.ndarray        # row in snapshot b of the same particle
    lost: np.ndarray      # rows of a whose key is not in b
    created: np.ndarray   # rows of b whose key is not in a


# keys --------------------------------------------------------------------------
def _as_int(arr: np.ndarray):
    """The key as int64 when that is exact, else None."""
    a = np.asarray(arr)
    if a.dtype.kind == "i":
        return a.astype(np.int64, copy=False)
    if a.dtype.kind == "u":
        if a.size and int(a.max()) > np.iinfo(np.int64).max:
            return None
        return a.astype(np.int64, copy=False)
    if a.dtype.kind == "b":
        return a.astype(np.int64)
    if a.dtype.kind == "f":
        with np.errstate(invalid="ignore"):
            ok = a.size == 0 or (np.all(np.isfinite(a)) and np.all(np.abs(a) < 2.0 ** 53)
                                 and np.all(a == np.floor(a)))
        return a.astype(np.int64) if ok else None
    return None


def _components(keys):
    if isinstance(keys, (tuple, list)):
        comps = [np.asarray(k) for k in keys]
    else:
        comps = [np.asarray(keys)]
    if not comps:
        raise ValueError("a key needs at least one column")
    n = comps[0].shape[0]
    for c in comps:
        if c.ndim != 1 or c.shape[0] != n:
            raise ValueError("key columns must be 1-D and of equal length")
    return comps


def _pack(comps_a, comps_b):
    """One int64 key per particle for both snapshots, or None when that is impossible."""
    ints_a = [_as_int(c) for c in comps_a]
    ints_b = [_as_int(c) for c in comps_b]
    if any(x is None for x in ints_a + ints_b):
        return None
    if len(ints_a) == 1:
        return ints_a[0], ints_b[0]
    # mixed radix over the joint range of each column
    ka = np.zeros(ints_a[0].shape[0], dtype=np.int64)
    kb = np.zeros(ints_b[0].shape[0], dtype=np.int64)
    stride = 1
    for xa, xb in zip(ints_a, ints_b):
        lo = min(int(xa.min(initial=2 ** 62)), int(xb.min(initial=2 ** 62)))
        hi = max(int(xa.max(initial=-2 ** 62)), int(xb.max(initial=-2 ** 62)))
        if hi < lo:   # both empty
            lo = hi = 0
        span = hi - lo + 1
        if stride * span >= 2 ** 62:
            return None
        ka += (xa - lo) * stride
        kb += (xb - lo) * stride
        stride *= span
    return ka, kb


def _codes_by_sorting(comps_a, comps_b):
    """Dense codes for arbitrary (composite, float, huge) keys; NaN keys get -1 (never match)."""
    na = comps_a[0].shape[0]
    joint = []
    bad = np.zeros(na + comps_b[0].shape[0], dtype=bool)
    for ca, cb in zip(comps_a, comps_b):
        c = np.concatenate([ca, cb])
        if c.dtype.kind == "f":
            bad |= ~np.isfinite(c)
        joint.append(c)
    if len(joint) == 1:
        _, inv = np.unique(joint[0], return_inverse=True)
    else:
        rec = np.rec.fromarrays(joint)
        _, inv = np.unique(rec, return_inverse=True)
    inv = inv.astype(np.int64).reshape(-1)
    inv[bad] = -1
    return inv[:na], inv[na:]


def _dense_match(ka, kb, span):
    """Matching by scatter into an id-indexed array (keys already in [0, span), -1 = unmatched)."""
    na, nb = ka.shape[0], kb.shape[0]
    idx_t = np.int32 if max(na, nb) < 2 ** 31 - 1 else np.int64
    valid_a = ka >= 0
    valid_b = kb >= 0
    all_a, all_b = bool(valid_a.all()), bool(valid_b.all())
    if all_a and all_b and _kernels.available and max(na, nb) >= _kernels.MIN_SIZE:
        got = _kernels.dense_match(ka, kb, span)
        if isinstance(got[0], str):
            raise DuplicateKeyError(got[2], got[1])
        return KeyMatch(*got)
    pos_b = np.full(span, -1, dtype=idx_t)
    rows_b = np.arange(nb, dtype=idx_t)
    if all_b:
        pos_b[kb] = rows_b
    else:
        pos_b[kb[valid_b]] = rows_b[valid_b]
    nvalid_b = nb if all_b else int(valid_b.sum())
    dup_b = nvalid_b - int(np.count_nonzero(pos_b >= 0))
    if dup_b:
        raise DuplicateKeyError(dup_b, "second")
    seen_a = np.zeros(span, dtype=bool)
    seen_a[ka if all_a else ka[valid_a]] = True
    nvalid_a = na if all_a else int(valid_a.sum())
    dup_a = nvalid_a - int(np.count_nonzero(seen_a))
    if dup_a:
        raise DuplicateKeyError(dup_a, "first")
    look = pos_b[np.where(valid_a, ka, 0)] if not all_a else pos_b[ka]
    if not all_a:
        look = np.where(valid_a, look, -1)
    hit = look >= 0
    ia = np.flatnonzero(hit)
    ib = look[ia].astype(np.int64)
    lost = np.flatnonzero(~hit)
    in_a = seen_a[np.where(valid_b, kb, 0)] if not all_b else seen_a[kb]
    if not all_b:
        in_a &= valid_b
    created = np.flatnonzero(~in_a)
    return KeyMatch(ia, ib, lost, created)


def _sorted_match(ka, kb):
    """Matching by sorting, for sparse or huge integer keys."""
    ob = np.argsort(kb, kind="stable")
    sb = kb[ob]
    dup_b = int(np.count_nonzero(sb[1:] == sb[:-1]))
    if dup_b:
        raise DuplicateKeyError(dup_b, "second")
    oa = np.argsort(ka, kind="stable")
    sa = ka[oa]
    dup_a = int(np.count_nonzero(sa[1:] == sa[:-1]))
    if dup_a:
        raise DuplicateKeyError(dup_a, "first")
    if sb.size:
        pos = np.minimum(np.searchsorted(sb, ka), sb.size - 1)
        hit = sb[pos] == ka
    else:
        pos = np.zeros(ka.shape[0], dtype=np.int64)
        hit = np.zeros(ka.shape[0], dtype=bool)
    ia = np.flatnonzero(hit)
    ib = ob[pos[ia]]
    lost = np.flatnonzero(~hit)
    if sa.size:
        posb = np.minimum(np.searchsorted(sa, kb), sa.size - 1)
        in_a = sa[posb] == kb
    else:
        in_a = np.zeros(kb.shape[0], dtype=bool)
    created = np.flatnonzero(~in_a)
    return KeyMatch(ia, ib.astype(np.int64), lost, created)


def key_plan(keys_a, keys_b):
    """("dense", ka, kb, span) when the keys pack into a dense range, else ("done", KeyMatch)."""
    comps_a, comps_b = _components(keys_a), _components(keys_b)
    if len(comps_a) != len(comps_b):
        raise ValueError("both snapshots need the same number of key columns")
    packed = _pack(comps_a, comps_b)
    if packed is None:
        ca, cb = _codes_by_sorting(comps_a, comps_b)
        span = int(max(ca.max(initial=-1), cb.max(initial=-1))) + 1
        return ("done", _dense_match(ca, cb, max(span, 1)))
    ka, kb = packed
    if ka.size == 0 and kb.size == 0:
        e = np.zeros(0, dtype=np.int64)
        return ("done", KeyMatch(e, e, e, e))
    lo = min(int(ka.min(initial=2 ** 62)), int(kb.min(initial=2 ** 62)))
    hi = max(int(ka.max(initial=-2 ** 62)), int(kb.max(initial=-2 ** 62)))
    span = hi - lo + 1
    if span <= 2 * (ka.size + kb.size) + 4096:
        if lo != 0:
            ka, kb = ka - lo, kb - lo
        return ("dense", ka, kb, span)
    return ("done", _sorted_match(ka, kb))


def match_keys(keys_a, keys_b) -> KeyMatch:
    """Match particles of two snapshots by key (any order on either side).

    A key is one array or a tuple of arrays (a composite key such as
    ``(id, creator_rank)``). Keys that are NaN never match. Raises
    :class:`DuplicateKeyError` when a key repeats within a snapshot.
    """
    plan = key_plan(keys_a, keys_b)
    if plan[0] == "done":
        return plan[1]
    return _dense_match(*plan[1:])


# block-to-block moves ----------------------------------------------------------------
def transfer_matrix(from_block, to_block, sparse: bool = False):
    """Particles moving from each block to each block (only non-zero pairs).

    Returns a DataFrame ``from_block, to_block, count`` sorted by both; with
    ``sparse=True`` a ``(scipy.sparse.coo_array, labels)`` pair where entry
    ``(i, j)`` counts moves from block ``labels[i]`` to block ``labels[j]``.
    """
    f = np.asarray(from_block).astype(np.int64, copy=False)
    t = np.asarray(to_block).astype(np.int64, copy=False)
    if f.shape != t.shape:
        raise ValueError("from_block and to_block must have the same length")
    if f.size == 0:
        pairs = np.zeros((0, 2), dtype=np.int64)
        counts = np.zeros(0, dtype=np.int64)
    else:
        lo = int(min(f.min(), t.min()))
        hi = int(max(f.max(), t.max()))
        span = hi - lo + 1
        # most particles stay: count those with one bincount, sort only the movers
        stay = f == t
        fs = f[stay]
        if lo:
            fs -= lo
        diag = np.bincount(fs, minlength=span) if fs.size else np.zeros(span, np.int64)
        dblk = np.flatnonzero(diag) + lo
        pairs, counts = _moves_table(dblk, diag[dblk - lo], f[~stay], t[~stay])
    if sparse:
        from scipy import sparse as sp
        labels = np.unique(pairs.reshape(-1)) if pairs.size else np.zeros(0, dtype=np.int64)
        i = np.searchsorted(labels, pairs[:, 0])
        j = np.searchsorted(labels, pairs[:, 1])
        m = sp.coo_array((counts, (i, j)), shape=(labels.size, labels.size))
        return m, labels
    return _transfer_frame(pairs, counts)


def _moves_table(dblk, dcnt, fm, tm):
    """(pairs, counts) sorted by from, to: stayers ``dcnt`` per block ``dblk``, then each mover."""
    fm = np.asarray(fm, dtype=np.int64)
    tm = np.asarray(tm, dtype=np.int64)
    if fm.size:
        lo = int(min(fm.min(), tm.min()))
        span = int(max(fm.max(), tm.max())) - lo + 1
    else:
        lo, span = 0, 1
    if span < 2 ** 31:
        code = (fm - lo) * span + (tm - lo)
        u, c = np.unique(code, return_counts=True)
        mf, mt = u // span + lo, u % span + lo
    else:
        uu, c = np.unique(np.stack([fm, tm], axis=1), axis=0, return_counts=True)
        mf, mt = uu[:, 0], uu[:, 1]
    dblk = np.asarray(dblk, dtype=np.int64)
    pairs = np.concatenate([np.stack([dblk, dblk], axis=1), np.stack([mf, mt], axis=1)])
    counts = np.concatenate([dcnt, c]).astype(np.int64)
    order = np.lexsort((pairs[:, 1], pairs[:, 0]))
    return pairs[order], counts[order]


def _transfer_frame(pairs, counts) -> pd.DataFrame:
    return pd.DataFrame({"from_block": pairs[:, 0], "to_block": pairs[:, 1], "count": counts})


def displacement_cells(pos_a, pos_b, layout: BlockLayout) -> np.ndarray:
    """Chebyshev (max-axis) displacement in level-0 cells; minimum image on periodic axes.

    ``pos_a`` and ``pos_b`` are sequences of coordinate arrays of matched
    particles (same order). NaN in a coordinate gives NaN.
    """
    if len(pos_a) != layout.ndim or len(pos_b) != layout.ndim:
        raise ValueError(f"positions need {layout.ndim} axes for this layout")
    h = layout.cell_size
    out = None
    for a in range(layout.ndim):
        with np.errstate(invalid="ignore"):   # inf - inf is NaN, as documented above
            d = np.subtract(pos_b[a], pos_a[a], dtype=np.float64)
        d /= h[a]
        if layout.periodic[a]:
            n = float(layout.cells[a])
            image = d / n
            np.rint(image, out=image)
            image *= n
            d -= image
        np.abs(d, out=d)
        # np.maximum (not fmax) so that NaN on any axis stays visible
        out = d if out is None else np.maximum(out, d, out=out)
    return out if out is not None else np.zeros(0)


def matched_displacement(pos_a, pos_b, ia, ib, layout: BlockLayout) -> np.ndarray:
    """:func:`displacement_cells` of particles ``ia`` of a against ``ib`` of b, without gathering copies."""
    if len(pos_a) != layout.ndim or len(pos_b) != layout.ndim:
        raise ValueError(f"positions need {layout.ndim} axes for this layout")
    if _kernels.available and ia.shape[0] >= _kernels.MIN_SIZE and layout.ndim <= 3:
        return _kernels.matched_pairs(ia, ib, None, [np.asarray(p) for p in pos_a],
                                      [np.asarray(p) for p in pos_b], layout)[1]
    return displacement_cells([np.asarray(p)[ia] for p in pos_a], [np.asarray(p)[ib] for p in pos_b], layout)


class Displacements(KeepRows):
    """The displacement in level-0 cells of every particle matched between two frames
    (0: the earlier snapshot, 1: the later), by :func:`match_keys` and
    :func:`matched_displacement`: what the displacement histogram shows. ``keys`` and
    ``positions`` are column names, one tuple per frame; a repeated key raises
    :class:`DuplicateKeyError` from ``finish``."""

    def __init__(self, keys, positions, layout: BlockLayout):
        self.keys = tuple(tuple(k) for k in keys)
        self.positions = tuple(tuple(p) for p in positions)
        self.layout = layout
        if len(self.keys[0]) != len(self.keys[1]) or not self.keys[0]:
            raise ValueError("both snapshots need the same number of key columns")

    @property
    def frame_columns(self):
        return tuple(tuple(dict.fromkeys(self.keys[k] + self.positions[k])) for k in (0, 1))

    def finish(self, state) -> np.ndarray:
        a, b = self.joined(state, 0), self.joined(state, 1)

        m = match_keys(self.key_of(a, self.keys[0]), self.key_of(b, self.keys[1]))
        return matched_displacement([a[c] for c in self.positions[0]], [b[c] for c in self.positions[1]],
                                    m.ia, m.ib, self.layout)


def _owner(layout: BlockLayout, blocks: np.ndarray) -> np.ndarray:
    rows = layout.block_index(blocks)
    owner = np.append(layout.rank.astype(np.int64), -1)
    return owner[rows]


@dataclass
class MigrationResult:
    """Everything about one pair of snapshots of one species."""

    matched: int
    migrated: int
    created: int
    lost: int
    max_displacement_cells: float
    over_one_cell: int
    steps: int
    transfer: pd.DataFrame                          # from_block, to_block, count
    traffic: pd.DataFrame                           # rank, send, receive
    nonfinite_displacement: int = 0
    notes: list[str] = field(default_factory=list)

    def summary(self) -> dict:
        return {"matched": self.matched, "migrated": self.migrated, "created": self.created,
                "lost": self.lost, "max_displacement_cells": self.max_displacement_cells,
                "over_one_cell": self.over_one_cell}


def rank_traffic(rank_from, rank_to, counts=None) -> pd.DataFrame:
    """Per rank: matched particles that left it (``send``) and arrived at it (``receive``).

    One entry per particle, or per group of ``counts`` particles making the same move.
    """
    ra = np.asarray(rank_from).astype(np.int64, copy=False)
    rb = np.asarray(rank_to).astype(np.int64, copy=False)
    moved = ra != rb
    sa, sb = ra[moved], rb[moved]
    w = None if counts is None else np.asarray(counts, dtype=np.float64)[moved]
    top = int(max(ra.max(initial=-1), rb.max(initial=-1)))
    send = np.bincount(sa + 1, weights=w, minlength=top + 2).astype(np.int64)
    recv = np.bincount(sb + 1, weights=w, minlength=top + 2).astype(np.int64)
    ranks = np.arange(-1, top + 1, dtype=np.int64)
    keep = (ranks >= 0) | (send > 0) | (recv > 0)
    return pd.DataFrame({"rank": ranks[keep], "send": send[keep], "receive": recv[keep]})


def migrate(keys_a, keys_b, block_a, block_b, pos_a=None, pos_b=None, layout: BlockLayout | None = None,
            steps=None, rank_a=None, rank_b=None, layout_b: BlockLayout | None = None) -> MigrationResult:
    """Match two snapshots of one species and summarise the moves.

    ``block_a``/``block_b`` are block ids per particle; ``pos_a``/``pos_b``
    coordinate arrays for the displacement (in level-0 cells of ``layout``);
    ``steps`` the simulation steps between the snapshots (None or < 1: 1);
    ``rank_a``/``rank_b`` rank columns, else ranks are the blocks' owners.
    ``over_one_cell`` counts matched particles whose displacement per step
    exceeds one cell: an explicit pusher should keep them below.
    """
    block_a = np.asarray(block_a)
    block_b = np.asarray(block_b)
    with_pos = pos_a is not None and pos_b is not None and layout is not None
    pa = [np.asarray(p) for p in pos_a] if with_pos else None
    pb = [np.asarray(p) for p in pos_b] if with_pos else None
    fast = (_kernels.available and max(block_a.shape[0], block_b.shape[0]) >= _kernels.MIN_SIZE
            and (not with_pos or (layout.ndim <= 3 and len(pa) == len(pb) == layout.ndim)))
    nsteps = int(steps) if steps is not None and np.isfinite(steps) and steps >= 1 else 1
    plan = key_plan(keys_a, keys_b) if fast else None
    notes = []
    max_disp, over, nonfinite = np.nan, 0, 0
    got = None
    if plan is not None and plan[0] == "dense" and rank_a is None and rank_b is None:
        # match, both sides' blocks, displacement and the moves in one compiled pass
        got = _kernels.dense_summary(plan[1], plan[2], plan[3], block_a, block_b, pa, pb, layout,
                                     nsteps)
    if got is not None:
        if isinstance(got[0], str):
            raise DuplicateKeyError(got[2], got[1])
        diag, (matched, nlost, ncreated, migrated, nonfinite, over, widest), mf, mt, blo = got
        if with_pos and matched - nonfinite:
            max_disp = widest
        dblk = np.flatnonzero(diag)
        transfer = _transfer_frame(*_moves_table(dblk + blo, diag[dblk], mf, mt))
    else:
        if plan is None:
            m = match_keys(keys_a, keys_b)
        else:
            m = plan[1] if plan[0] == "done" else _dense_match(*plan[1:])
        matched, nlost, ncreated = int(m.ia.size), int(m.lost.size), int(m.created.size)
        disp = None
        if fast and with_pos:
            # the b side's block and displacement gathered in one pass over the pairs
            tb, disp = _kernels.matched_pairs(m.ia, m.ib, block_b, pa, pb, layout)
        else:
            tb = block_b[m.ib]
        fb = block_a[m.ia]
        migrated = int(np.count_nonzero(fb != tb))
        if with_pos:
            if disp is None:
                disp = matched_displacement(pa, pb, m.ia, m.ib, layout)
            finite = np.isfinite(disp)
            nonfinite = int(disp.size - np.count_nonzero(finite))
            if disp.size - nonfinite:
                max_disp = float(np.max(disp, where=finite, initial=0.0))
            over = int(np.count_nonzero(disp > nsteps))   # more than one cell per step; NaN never counts
        transfer = transfer_matrix(fb, tb)
    if nonfinite:
        notes.append(f"{nonfinite} matched particle(s) have a non-finite position; "
                     "their displacement is left out")
    lb = layout_b if layout_b is not None else layout
    if rank_a is None and rank_b is None:
        # ranks follow the blocks: the transfer table already holds every move, per block pair
        counts = transfer["count"].to_numpy()
        ra = _owner(layout, transfer["from_block"].to_numpy()) if layout is not None else None
        rb = _owner(lb, transfer["to_block"].to_numpy()) if lb is not None else None
        ra = ra if ra is not None else np.full(counts.shape, -1, dtype=np.int64)
        rb = rb if rb is not None else np.full(counts.shape, -1, dtype=np.int64)
        traffic = rank_traffic(ra, rb, counts)
    else:
        if rank_a is not None:
            ra = np.asarray(rank_a)[m.ia]
        else:
            ra = _owner(layout, fb) if layout is not None else np.full(fb.shape, -1, dtype=np.int64)
        if rank_b is not None:
            rb = np.asarray(rank_b)[m.ib]
        else:
            rb = _owner(lb, tb) if lb is not None else np.full(tb.shape, -1, dtype=np.int64)
        traffic = rank_traffic(ra, rb)
    return MigrationResult(matched=matched, migrated=migrated, created=ncreated,
                           lost=nlost, max_displacement_cells=max_disp, over_one_cell=over,
                           steps=nsteps, transfer=transfer, traffic=traffic,
                           nonfinite_displacement=nonfinite, notes=notes)


# the accumulator ----------------------------------------------------------------------
class Migration(Accumulator):
    """Migration between two frames (input 0: the earlier snapshot, input 1: the later one).

    Each piece contributes its particles' keys, blocks (assigned with the
    side's layout from its ``positions``, or read from a ``block`` column, or
    ``-1`` with neither), positions and rank column; ``finish`` joins each
    side in row order and runs :func:`migrate` once (the one matcher: dense
    ids by an id-indexed array, others by sorting; compiled for large inputs).
    So a migration is the same whether its frames came whole or in pieces.

    ``side_a``/``side_b`` are dicts with ``key`` (column names), ``positions``
    (column names, or empty), ``block`` (a block-id column or None), ``rank``
    (a rank column or None) and ``layout``. Displacements are measured when
    both sides have positions, in level-0 cells of the first side's layout.
    """

    def __init__(self, side_a: dict, side_b: dict, steps=None):
        self.sides = (dict(side_a), dict(side_b))
        if len(self.sides[0]["key"]) != len(self.sides[1]["key"]):
            raise ValueError("both snapshots need the same number of key columns")
        self.with_pos = all(bool(s["positions"]) for s in self.sides)
        self.steps = steps

    @staticmethod
    def side_of(frame, layout: BlockLayout) -> dict:
        """What a frame contributes: its key, positions (when they fit the layout), block and rank columns."""
        fits = frame.ndim == layout.ndim > 0
        return {"key": tuple(frame.key_columns() or ()),
                "positions": tuple(frame.position_names) if fits else (),
                "block": frame.column_for("block") if not fits and frame.ndim == 0 else None,
                "rank": frame.column_for("rank"), "layout": layout}

    @classmethod
    def of_frames(cls, frame_a, frame_b, layout_a: BlockLayout, layout_b: BlockLayout | None = None,
                  steps=None):
        return cls(cls.side_of(frame_a, layout_a), cls.side_of(frame_b, layout_b or layout_a), steps)

    @property
    def frame_columns(self):
        out = []
        for s in self.sides:
            cols = list(s["key"]) + list(s["positions"]) + [c for c in (s["block"], s["rank"]) if c]
            out.append(tuple(dict.fromkeys(cols)))
        return tuple(out)

    def start(self):
        return ([], [])

    def add(self, state, piece):
        side = self.sides[piece.frame]
        n = len(piece)
        if side["positions"]:
            pos = [piece[c] for c in side["positions"]]
            block = assign_blocks(pos, side["layout"])
        elif side["block"] is not None:
            pos = None
            block = np.asarray(piece[side["block"]]).astype(np.int64)
        else:
            pos = None
            block = np.full(n, -1, dtype=np.int64)
        rank = None
        if side["rank"] is not None:
            value = piece.constant(side["rank"])
            rank = (np.full(n, value, dtype=np.int64) if value is not None
                    else np.asarray(piece[side["rank"]]))
        # the arrays are kept as they are: not reads_once, so no piece comes in a reused buffer
        record = {"key": [piece[c] for c in side["key"]], "block": block,
                  "pos": pos if (pos is not None and self.with_pos) else None, "rank": rank}
        state[piece.frame].append(record)
        return state

    def merge(self, a, b):
        return (a[0] + b[0], a[1] + b[1])

    def finish(self, state) -> "MigrationResult":
        joined = [_join_records(records, side) for records, side in zip(state, self.sides)]
        (ka, ba, pa, ra), (kb, bb, pb, rb) = joined
        la, lb = self.sides[0]["layout"], self.sides[1]["layout"]
        return migrate(ka, kb, ba, bb, pa if self.with_pos else None, pb if self.with_pos else None,
                       la, self.steps, ra, rb, layout_b=lb)


def _cat(arrays, dtype=None):
    if len(arrays) == 1:
        return arrays[0] if dtype is None else arrays[0].astype(dtype, copy=False)
    if not arrays:
        return np.zeros(0, dtype=dtype or np.float64)
    return np.concatenate(arrays) if dtype is None else np.concatenate(arrays).astype(dtype, copy=False)


def _join_records(records, side):
    """(key, block ids, positions, ranks) of one side from its pieces' records, in row order."""
    nkey = len(side["key"])
    keys = [_cat([r["key"][k] for r in records]) for k in range(nkey)]
    key = keys[0] if nkey == 1 else tuple(keys)
    block = _cat([r["block"] for r in records], np.int64)
    pos = None
    if records and records[0]["pos"] is not None:
        pos = [_cat([r["pos"][a] for r in records]) for a in range(len(side["positions"]))]
    elif not records and side["positions"]:
        pos = [np.zeros(0) for _ in side["positions"]]
    rank = _cat([r["rank"] for r in records]) if records and records[0]["rank"] is not None else None
    return key, block, pos, rank
