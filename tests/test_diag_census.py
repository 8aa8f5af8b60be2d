"""Census and block assignment against numpy.histogramdd / numpy statistics."""

import numpy as np
import pandas as pd
import pytest

from _need import need_that

from swarmaudit.core import _fastassign
from swarmaudit.core.layout import BlockLayout, assign_blocks, regular_layout
from swarmaudit.diagnostics.census import block_census, imbalance, level_census, rank_census


def _edges(layout):
    return [np.linspace(layout.domain_lower[a], layout.domain_upper[a], layout.regular[a] + 1)
            for a in range(layout.ndim)]


@pytest.mark.parametrize("dims", [(3,), (4, 5), (2, 3, 4)])
def test_block_census_matches_histogramdd(dims):
    rng = np.random.default_rng(1)
    d = len(dims)
    dom = np.ravel([[-1.0, 2.0]] * d)
    lay = regular_layout(dom, [b * 2 for b in dims], dims, ranks=3)
    pts = rng.uniform(-1.0, 2.0, size=(5000, d))
    w = rng.random(5000)
    bc = block_census(assign_blocks(pts, lay), lay, w)
    # outside source: numpy.histogramdd on the same block edges; its cells are indexed [ix, iy, iz]
    # and the census numbers blocks x fastest, hence the Fortran-order ravel
    h, _ = np.histogramdd(pts, bins=_edges(lay))
    hw, _ = np.histogramdd(pts, bins=_edges(lay), weights=w)
    assert bc["count"].tolist() == h.ravel(order="F").astype(int).tolist()
    np.testing.assert_allclose(bc["weight"], hw.ravel(order="F"), rtol=1e-12)
    assert list(bc.columns) == ["block", "level", "rank", "count", "weight"]
    assert (bc["rank"].to_numpy() == lay.rank).all()


def test_empty_blocks_listed_and_outside_row():
    lay = regular_layout([0, 1, 0, 1], [4, 4], [2, 2])
    pts = np.array([[0.1, 0.1], [0.2, 0.3], [1.5, 0.5], [np.nan, 0.2]])
    bc = block_census(assign_blocks(pts, lay), lay)
    assert bc["block"].tolist() == [0, 1, 2, 3, -1]
    assert bc["count"].tolist() == [2, 0, 0, 0, 2]
    assert bc.iloc[-1][["level", "rank"]].tolist() == [-1, -1]
    # no -1 row when every particle is in a block
    assert -1 not in block_census(assign_blocks(pts[:2], lay), lay)["block"].tolist()


def test_rank_census_prefers_the_rank_column():
    lay = regular_layout([0, 1], [4], [4], ranks=2)   # blocks 0,1 -> rank 0; 2,3 -> rank 1
    x = np.array([0.1, 0.3, 0.6, 0.9, 0.95, 7.0])
    b = assign_blocks([x], lay)
    by_owner = rank_census(b, lay)
    assert by_owner["rank"].tolist() == [0, 1, -1]
    assert by_owner["count"].tolist() == [2, 3, 1]
    assert by_owner["blocks"].tolist() == [2, 2, 0]
    # a code whose particles still sit on the old rank: count where they really live
    prank = np.array([0, 0, 0, 0, 3, 1])
    live = rank_census(b, lay, particle_rank=prank)
    # outside source: pandas value_counts of the rank column
    expect = pd.Series(prank).value_counts().sort_index()
    got = live.set_index("rank")["count"]
    assert got[got > 0].to_dict() == expect.to_dict()
    assert live["rank"].tolist() == [0, 1, 2, 3]       # rank 2 owns nothing and holds nothing: still listed


def test_level_census_counts_each_level():
    lay = BlockLayout([[0, 0], [0.5, 0], [0, 0.5], [0.5, 0.5], [0.25, 0.25]],
                      [[0.5, 0.5], [1, 0.5], [0.5, 1], [1, 1], [0.5, 0.5]],
                      [0, 0, 0, 0, 1], [0, 0, 1, 1, 2], [0, 0], [1, 1], [8, 8], ())
    pts = np.array([[0.3, 0.3], [0.4, 0.45], [0.1, 0.1], [0.9, 0.9], [3, 3]])
    lc = level_census(assign_blocks(pts, lay), lay)
    assert lc["level"].tolist() == [0, 1, -1]
    assert lc["count"].tolist() == [2, 2, 1]
    assert lc["blocks"].tolist() == [4, 1, 0]


def test_imbalance_against_numpy_statistics():
    loads = np.array([3.0, 1.0, 4.0, 1.0, 5.0])
    st = imbalance(loads)
    # outside source: numpy mean / population std
    assert st["max_over_mean"] == pytest.approx(5.0 / loads.mean())
    assert st["cv"] == pytest.approx(np.std(loads) / np.mean(loads))
    assert (st["max"], st["min"], st["n"]) == (5.0, 1.0, 5)
    assert np.isnan(imbalance([0, 0])["max_over_mean"])
    assert imbalance([])["n"] == 0


def _random_points(n, rng, d=2):
    pts = [rng.uniform(-0.2, 1.2, n) for _ in range(d)]
    pts[0][::97] = np.nan
    pts[-1] = pts[-1].astype(np.float32)
    return pts


@pytest.mark.parametrize("d", [1, 2, 3])
def test_compiled_assignment_identical_to_numpy(monkeypatch, d):
    need_that(_fastassign.available, "numba not installed")
    rng = np.random.default_rng(7)
    pts = _random_points(_fastassign.MIN_PARTICLES + 1000, rng, d)
    # exact block edges and the domain's upper bound are the interesting values
    pts[0][:5] = [0.0, 0.25, 0.5, 1.0, np.nextafter(1.0, 0)]
    lay = regular_layout(np.ravel([[0, 1]] * d), [8] * d, [4] * d)
    fast = assign_blocks(pts, lay)
    monkeypatch.setattr(_fastassign, "available", False)
    slow = assign_blocks(pts, lay)
    np.testing.assert_array_equal(fast, slow)
    assert fast.dtype == np.int64


def test_compiled_assignment_identical_on_refined_layout(monkeypatch):
    need_that(_fastassign.available, "numba not installed")
    lay = BlockLayout([[0, 0], [0.5, 0], [0, 0.5], [0.5, 0.5], [0.25, 0.25], [0.5, 0.5]],
                      [[0.5, 0.5], [1, 0.5], [0.5, 1], [1, 1], [0.5, 0.5], [0.625, 0.75]],
                      [0, 0, 0, 0, 1, 2], [0, 0, 1, 1, 2, 3], [0, 0], [1, 1], [8, 8], (),
                      block_id=[10, 11, 12, 13, 20, 30])
    rng = np.random.default_rng(3)
    pts = _random_points(_fastassign.MIN_PARTICLES + 10, rng)
    fast = assign_blocks(pts, lay)
    monkeypatch.setattr(_fastassign, "available", False)
    slow = assign_blocks(pts, lay)
    np.testing.assert_array_equal(fast, slow)
    assert set(np.unique(fast)) == {-1, 10, 11, 12, 13, 20, 30}
