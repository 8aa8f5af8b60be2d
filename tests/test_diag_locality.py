"""Locality score of the particle order."""

import numpy as np
import pytest

from swarmaudit.core.layout import cell_index, regular_layout
from swarmaudit.diagnostics.locality import locality_report, locality_score


def test_score_by_hand():
    # by hand: pairs (0,0)-(0,0) same, (0,0)-(1,0) face, (1,0)-(2,1) diagonal-ish, (2,1)-(2,2) face
    ix = np.array([0, 0, 1, 2, 2])
    iy = np.array([0, 0, 0, 1, 2])
    assert locality_score((ix, iy)) == pytest.approx(3 / 4)
    flat = ix + 3 * iy
    assert locality_score(flat, shape=(3, 3)) == pytest.approx(3 / 4)
    assert np.isnan(locality_score(np.array([1])))


def test_sorted_score_equals_the_score_after_an_actual_sort():
    rng = np.random.default_rng(0)
    lay = regular_layout([0, 1, 0, 1], [32, 32], [1, 1])
    pts = [rng.random(20000), rng.random(20000)]
    rep = locality_report(pts, lay)
    flat = cell_index(pts, lay)
    # outside check: numpy's stable argsort by cell, then the score of that order
    after = locality_score(flat[np.argsort(flat, kind="stable")], shape=(32, 32))
    assert rep["sorted_score"] == pytest.approx(after)
    assert rep["score"] < 0.1 < rep["sorted_score"]
    assert "sorting" in rep["hint"]


def test_already_sorted_order_says_so():
    lay = regular_layout([0, 1], [100], [1])
    x = np.sort(np.random.default_rng(1).random(5000))
    rep = locality_report([x], lay)
    assert rep["score"] == pytest.approx(1.0)
    assert "already" in rep["hint"]


def test_flat_numbers_without_shape_only_count_same_cells():
    # by hand: 5,5 same; 5,6 differ (could be neighbours, cannot tell without the shape); 6,6 same
    assert locality_score(np.array([5, 5, 6, 6])) == pytest.approx(2 / 3)
