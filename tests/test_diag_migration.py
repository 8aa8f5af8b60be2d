"""Matching, transfer matrix and displacement against pandas.merge / pandas.crosstab."""

import numpy as np
import pandas as pd
import pytest

from _need import need_that
from hypothesis import given, settings
from hypothesis import strategies as st

from swarmaudit.core.errors import SwarmAuditError
from swarmaudit.core.layout import regular_layout
from swarmaudit.diagnostics import _kernels
from swarmaudit.diagnostics.migration import (DuplicateKeyError, displacement_cells, match_keys,
                                              migrate, transfer_matrix)


def _merge_reference(ka, kb):
    """Outside source: pandas.merge on the key column(s)."""
    cols = [f"k{i}" for i in range(len(ka))]
    a = pd.DataFrame({**{c: v for c, v in zip(cols, ka)}, "ia": np.arange(len(ka[0]))})
    b = pd.DataFrame({**{c: v for c, v in zip(cols, kb)}, "ib": np.arange(len(kb[0]))})
    m = a.merge(b, on=cols, how="outer", indicator=True)
    both = m[m["_merge"] == "both"].sort_values("ia")
    lost = np.sort(m.loc[m["_merge"] == "left_only", "ia"].to_numpy().astype(int))
    created = np.sort(m.loc[m["_merge"] == "right_only", "ib"].to_numpy().astype(int))
    return both["ia"].to_numpy().astype(int), both["ib"].to_numpy().astype(int), lost, created


def _check(got, ref):
    ia, ib, lost, created = ref
    order = np.argsort(got.ia)
    np.testing.assert_array_equal(got.ia[order], ia)
    np.testing.assert_array_equal(got.ib[order], ib)
    np.testing.assert_array_equal(np.sort(got.lost), lost)
    np.testing.assert_array_equal(np.sort(got.created), created)


def _runs(rng, n, id_max=None, offset=0):
    ids = (rng.choice(id_max, size=n, replace=False) if id_max else rng.permutation(n)) + offset
    keep = rng.random(n) > 0.1
    born = (np.arange(50) + (id_max or n) + offset + 7)
    b = np.concatenate([ids[keep], born])
    rng.shuffle(b)
    return ids, b


@pytest.mark.parametrize("kind", ["dense", "offset", "sparse", "float", "uint"])
def test_match_keys_against_merge(kind):
    rng = np.random.default_rng(5)
    if kind == "dense":
        a, b = _runs(rng, 3000)
    elif kind == "offset":
        a, b = _runs(rng, 3000, offset=-10_000)
    elif kind == "sparse":
        a, b = _runs(rng, 3000, id_max=10 ** 15)
    elif kind == "float":
        a, b = _runs(rng, 3000)
        a, b = a.astype(float), b.astype(float)
    else:
        a, b = _runs(rng, 3000)
        a, b = a.astype(np.uint32), b.astype(np.uint32)
    _check(match_keys(a, b), _merge_reference([a], [b]))


def test_composite_keys_against_merge():
    rng = np.random.default_rng(6)
    n = 2000
    local = rng.integers(0, 500, n)
    creator = rng.integers(0, 8, n)
    pairs = np.unique(np.stack([local, creator], 1), axis=0)
    rng.shuffle(pairs)
    a = pairs[:-40]
    b = np.concatenate([pairs[40:], [[10_000, 3], [10_001, 3]]])
    b = b[rng.permutation(len(b))]
    got = match_keys((a[:, 0], a[:, 1]), (b[:, 0], b[:, 1]))
    _check(got, _merge_reference([a[:, 0], a[:, 1]], [b[:, 0], b[:, 1]]))
    # a composite key too wide to pack into one integer goes through sorting
    wide_a = (a[:, 0] * 10 ** 12, a[:, 1] * 10 ** 12)
    wide_b = (b[:, 0] * 10 ** 12, b[:, 1] * 10 ** 12)
    _check(match_keys(wide_a, wide_b), _merge_reference(list(wide_a), list(wide_b)))


def test_float_ids_with_nan_never_match():
    a = np.array([1.0, 2.0, np.nan, 4.5])
    b = np.array([4.5, np.nan, 1.0])
    got = match_keys(a, b)
    assert sorted(zip(got.ia.tolist(), got.ib.tolist())) == [(0, 2), (3, 0)]
    assert sorted(got.lost.tolist()) == [1, 2]
    assert got.created.tolist() == [1]


@pytest.mark.parametrize("side", ["first", "second"])
def test_duplicate_ids_raise_with_count(side):
    dup = np.array([1, 2, 2, 3, 3, 3])
    clean = np.array([1, 2, 3])
    with pytest.raises(DuplicateKeyError) as err:
        match_keys(dup, clean) if side == "first" else match_keys(clean, dup)
    assert err.value.count == 3 and err.value.side == side
    assert isinstance(err.value, SwarmAuditError)
    with pytest.raises(DuplicateKeyError):   # the sorting path too
        match_keys(dup * 10 ** 14, clean * 10 ** 14) if side == "first" else match_keys(clean * 10 ** 14, dup * 10 ** 14)


def test_compiled_matching_identical(monkeypatch):
    need_that(_kernels.available, "numba not installed")
    rng = np.random.default_rng(9)
    a, b = _runs(rng, _kernels.MIN_SIZE + 500)
    fast = match_keys(a, b)
    monkeypatch.setattr(_kernels, "available", False)
    slow = match_keys(a, b)
    for f in ("ia", "ib", "lost", "created"):
        np.testing.assert_array_equal(getattr(fast, f), getattr(slow, f))
    monkeypatch.setattr(_kernels, "available", True)
    with pytest.raises(DuplicateKeyError) as err:
        match_keys(np.concatenate([a, a[:3]]), b)
    assert err.value.count == 3


@settings(max_examples=40, deadline=None)
@given(st.lists(st.integers(0, 60), unique=True, max_size=40),
       st.lists(st.integers(0, 60), unique=True, max_size=40))
def test_match_keys_property(a, b):
    a = np.array(a, dtype=np.int64)
    b = np.array(b, dtype=np.int64)
    got = match_keys(a, b)
    np.testing.assert_array_equal(a[got.ia], b[got.ib])
    assert set(a[got.lost].tolist()) == set(a.tolist()) - set(b.tolist())
    assert set(b[got.created].tolist()) == set(b.tolist()) - set(a.tolist())


def test_transfer_matrix_equals_crosstab_after_merge():
    rng = np.random.default_rng(11)
    n = 5000
    ids_a = rng.permutation(n)
    blk_a = rng.integers(-1, 12, n)
    ids_b = rng.permutation(n)[: n - 100]
    blk_b = rng.integers(-1, 12, ids_b.size)
    # most particles stay in their block, some move
    pos = {int(i): int(k) for i, k in zip(ids_a, blk_a)}
    stay = rng.random(ids_b.size) < 0.7
    blk_b = np.where(stay, [pos[int(i)] for i in ids_b], blk_b)
    m = match_keys(ids_a, ids_b)
    got = transfer_matrix(blk_a[m.ia], blk_b[m.ib])
    # outside source: pandas.merge on id, then pandas.crosstab of the two block columns
    joined = pd.DataFrame({"id": ids_a, "from_block": blk_a}).merge(
        pd.DataFrame({"id": ids_b, "to_block": blk_b}), on="id")
    ct = pd.crosstab(joined["from_block"], joined["to_block"]).stack()
    ct = ct[ct > 0].rename("count").reset_index()
    ct = ct.sort_values(["from_block", "to_block"]).reset_index(drop=True)
    pd.testing.assert_frame_equal(got, ct, check_dtype=False, check_names=False)
    assert list(got.columns) == ["from_block", "to_block", "count"]
    mat, labels = transfer_matrix(blk_a[m.ia], blk_b[m.ib], sparse=True)
    dense = mat.toarray()
    assert dense.sum() == len(joined)
    i, j = np.searchsorted(labels, 3), np.searchsorted(labels, 5)
    assert dense[i, j] == ((joined["from_block"] == 3) & (joined["to_block"] == 5)).sum()


def test_displacement_minimum_image_and_chebyshev():
    lay = regular_layout([0, 1, 0, 2], [10, 10], [2, 2], periodic=("x",))   # cells 0.1 x 0.2
    a = [np.array([0.05, 0.5, 0.5]), np.array([1.0, 1.0, 1.0])]
    b = [np.array([0.95, 0.5, 0.8]), np.array([1.0, 1.9, 1.3])]
    d = displacement_cells(a, b, lay)
    # by hand: 0.05 -> 0.95 across the periodic x boundary is one cell, not nine;
    # y is not periodic: 0.9 / 0.2 = 4.5 cells; Chebyshev takes the larger axis (3 vs 1.5)
    np.testing.assert_allclose(d, [1.0, 4.5, 3.0])
    assert np.isnan(displacement_cells([np.array([np.nan]), np.array([0.0])],
                                       [np.array([0.1]), np.array([0.0])], lay))[0]


def test_migrate_flags_particles_faster_than_one_cell_per_step():
    # common practice: the Courant-type limit of explicit pushers — no particle should cross
    # more than one cell per step
    lay = regular_layout([0, 1], [10], [2], periodic=("x",), ranks=2)
    ids = np.arange(4)
    xa = np.array([0.05, 0.30, 0.62, 0.90])
    xb = np.array([0.10, 0.55, 0.99, 0.15])      # moves of 0.5, 2.5, 3.7 and (periodic) 2.5 cells
    ba, bb = np.array([0, 0, 1, 1]), np.array([0, 1, 1, 0])
    perm = np.array([2, 0, 3, 1])                # the second dump stores the particles shuffled
    res = migrate(ids, ids[perm], ba, bb[perm], [xa], [xb[perm]], lay, steps=3)
    assert res.matched == 4 and res.migrated == 2
    assert res.max_displacement_cells == pytest.approx(3.7)
    assert res.over_one_cell == 1                       # only 3.7 cells in 3 steps
    one = migrate(ids, ids, ba, bb, [xa], [xb], lay, steps=None)   # no steps known: per snapshot
    assert one.over_one_cell == 3
    traffic = res.traffic.set_index("rank")
    assert traffic.loc[0, "send"] == 1 and traffic.loc[1, "receive"] == 1
    assert traffic.loc[1, "send"] == 1 and traffic.loc[0, "receive"] == 1


def test_migrate_counts_created_and_lost_and_uses_rank_columns():
    lay = regular_layout([0, 1], [4], [2], ranks=2)
    ida = np.array([10, 11, 12, 13])
    idb = np.array([13, 12, 14])
    xa = np.array([0.1, 0.2, 0.6, 0.7])
    xb = np.array([0.2, 0.6, 0.9])
    res = migrate(ida, idb, np.array([0, 0, 1, 1]), np.array([0, 1, 1]), [xa], [xb], lay,
                  rank_a=np.array([0, 0, 1, 1]), rank_b=np.array([1, 1, 1]))
    assert (res.matched, res.migrated, res.created, res.lost) == (2, 1, 1, 2)
    assert res.transfer.values.tolist() == [[1, 0, 1], [1, 1, 1]]
    t = res.traffic.set_index("rank")
    assert t.loc[1, "receive"] == 0 and t.loc[0, "send"] == 0   # rank column says 13 went 1 -> 1


def test_compiled_displacement_identical(monkeypatch):
    need_that(_kernels.available, "numba not installed")
    from swarmaudit.diagnostics.migration import matched_displacement
    rng = np.random.default_rng(2)
    n = _kernels.MIN_SIZE + 100
    lay = regular_layout([0, 1, 0, 2, 0, 1], [10, 20, 5], [1, 1, 1], periodic=("x", "z"))
    pa = [rng.random(n), rng.random(n) * 2, rng.random(n)]
    pb = [rng.random(n).astype(np.float32), rng.random(n) * 2, rng.random(n)]
    pa[0][5] = np.nan
    pb[1][7] = np.nan
    ia, ib = np.arange(n), rng.permutation(n)
    fast = matched_displacement(pa, pb, ia, ib, lay)
    monkeypatch.setattr(_kernels, "available", False)
    slow = matched_displacement(pa, pb, ia, ib, lay)
    np.testing.assert_array_equal(fast, slow)
    assert np.isnan(fast).sum() == 2


def test_compiled_migrate_identical(monkeypatch):
    need_that(_kernels.available, "numba not installed")
    rng = np.random.default_rng(12)
    lay = regular_layout([0, 1, 0, 1], [32, 32], [4, 4], periodic=("y",), ranks=3)
    a, b = _runs(rng, _kernels.MIN_SIZE + 300)
    pa = [rng.random(a.size), rng.random(a.size)]
    pb = [rng.random(b.size).astype(np.float32), rng.random(b.size)]
    from swarmaudit.core.layout import assign_blocks
    ba, bb = assign_blocks(pa, lay), assign_blocks(pb, lay)
    fast = migrate(a, b, ba, bb, pa, pb, lay, steps=2)
    monkeypatch.setattr(_kernels, "available", False)
    slow = migrate(a, b, ba, bb, pa, pb, lay, steps=2)
    assert fast.summary() == slow.summary()
    pd.testing.assert_frame_equal(fast.transfer, slow.transfer)
    pd.testing.assert_frame_equal(fast.traffic, slow.traffic)


def test_traffic_from_the_transfer_table_equals_per_particle_counting():
    rng = np.random.default_rng(13)
    lay = regular_layout([0, 1, 0, 1], [16, 16], [4, 4], ranks=5)
    a, b = _runs(rng, 3000)
    ba = rng.integers(-1, 16, a.size)
    bb = rng.integers(-1, 16, b.size)
    owner = np.append(lay.rank, -1)
    by_blocks = migrate(a, b, ba, bb, layout=lay)
    # the same ranks given per particle take the per-particle path
    per_particle = migrate(a, b, ba, bb, layout=lay, rank_a=owner[ba], rank_b=owner[bb])
    pd.testing.assert_frame_equal(by_blocks.traffic, per_particle.traffic)
    assert by_blocks.traffic["send"].sum() == by_blocks.traffic["receive"].sum() > 0


@pytest.mark.parametrize("where", ["serial", "threads", "dask"])
def test_displacements_accumulator_matches_brute_force_minimum_image(where, monkeypatch):
    # the displacement histogram's values: matched by id across pieces on every engine, each the
    # largest per-axis distance in level-0 cells with the minimum image on the periodic x axis
    from swarmaudit.core.frame import Frame
    from swarmaudit.diagnostics.migration import Displacements
    from swarmaudit.engine import pieces
    from swarmaudit.engine.reduce import reduce
    monkeypatch.setattr(pieces, "PIECE_ROWS", 128)
    lay = regular_layout([0, 2, 0, 1], [20, 10], [2, 2], periodic=("x",))
    rng = np.random.default_rng(5)
    n = 2000
    xa, ya = rng.random(n) * 2, rng.random(n)
    xb, yb = (xa + rng.normal(0, 0.2, n)) % 2, np.clip(ya + rng.normal(0, 0.05, n), 0, 0.999)
    order = rng.permutation(n)[: n - 50]                    # 50 lost, the rest in another order
    fa = Frame("e", n, {"x": lambda: xa, "y": lambda: ya, "id": lambda: np.arange(n)})
    fb = Frame("e", order.size, {"x": lambda: xb[order], "y": lambda: yb[order], "id": lambda: order.copy()})
    got = reduce(Displacements((("id",), ("id",)), (("x", "y"), ("x", "y")), lay), [fa, fb], where=where)
    keep = np.sort(order)
    dx = np.abs(xb[keep] - xa[keep]) / 0.1
    dx = np.minimum(dx, 20 - dx)
    want = np.maximum(dx, np.abs(yb[keep] - ya[keep]) / 0.1)
    np.testing.assert_allclose(got, want, rtol=1e-12)
