"""Particle shapes and deposition."""

import numpy as np
import pytest

from swarmaudit.core.layout import regular_layout
from swarmaudit.diagnostics.deposit import deposit, shape_weights


def _hockney_eastwood(x, order):
    """Outside source: assignment functions W(x) of Hockney & Eastwood, Computer Simulation Using
    Particles (from memory), x = distance from a cell centre in cells."""
    x = np.abs(x)
    if order == "ngp":
        return np.where(x < 0.5, 1.0, 0.0)
    if order == "cic":
        return np.where(x < 1.0, 1.0 - x, 0.0)
    return np.where(x <= 0.5, 0.75 - x * x, np.where(x < 1.5, 0.5 * (1.5 - x) ** 2, 0.0))


@pytest.mark.parametrize("order", ["ngp", "cic", "tsc"])
def test_shape_weights_match_the_book_and_sum_to_one(order):
    frac = np.linspace(0.0, 1.0, 41, endpoint=False)[1:]   # away from the NGP tie at ½
    shift, w = shape_weights(frac, order)
    np.testing.assert_allclose(w.sum(axis=1), 1.0, atol=1e-15)
    for k in range(w.shape[1]):
        centre = shift + k + 0.5                  # centre of the k-th stencil cell, relative to the own cell
        np.testing.assert_allclose(w[:, k], _hockney_eastwood(frac - centre, order), atol=1e-15)
    # cells the stencil leaves out get no weight from the book either
    for c in (-2, 2):
        outside = _hockney_eastwood(frac - (c + 0.5), order)
        inside_stencil = (c >= shift) & (c < shift + w.shape[1])
        assert np.all(outside[~inside_stencil] == 0)


def test_ngp_deposit_equals_histogramdd():
    rng = np.random.default_rng(0)
    lay = regular_layout([0, 2, -1, 1, 0, 1], [8, 6, 5], [1, 1, 1])
    pts = rng.random((4000, 3)) * [2, 2, 1] + [0, -1, 0]
    w = rng.random(4000)
    got = deposit(pts, w, lay, order="ngp")
    # outside source: numpy.histogramdd on the level-0 cell edges
    edges = [np.linspace(lay.domain_lower[a], lay.domain_upper[a], lay.cells[a] + 1) for a in range(3)]
    ref, _ = np.histogramdd(pts, bins=edges, weights=w)
    np.testing.assert_allclose(got, ref, rtol=1e-12)


@pytest.mark.parametrize("order", ["cic", "tsc"])
@pytest.mark.parametrize("periodic", [(), ("x", "y")])
def test_totals_are_conserved(order, periodic):
    rng = np.random.default_rng(1)
    lay = regular_layout([0, 1, 0, 1], [16, 12], [1, 1], periodic=periodic)
    pts = rng.uniform(-0.1, 1.1, (3000, 2))      # some outside: wrapped or clamped
    w = rng.random(3000)
    grid = deposit(pts, w, lay, order=order)
    assert grid.shape == (16, 12)
    assert grid.sum() == pytest.approx(w.sum(), rel=1e-12)


def test_periodic_wrap_and_clamp_and_drop():
    lay = regular_layout([0, 1], [4], [1], periodic=("x",))
    # a particle at the centre of cell 0 under TSC: 3/4 in cell 0, 1/8 in cells 1 and (wrapped) 3
    g = deposit([np.array([0.125])], 1.0, lay, order="tsc")
    np.testing.assert_allclose(g, [0.75, 0.125, 0.0, 0.125])
    wall = regular_layout([0, 1], [4], [1])
    g = deposit([np.array([0.125])], 1.0, wall, order="tsc")
    np.testing.assert_allclose(g, [0.875, 0.125, 0.0, 0.0])           # clamped into the edge cell
    g = deposit([np.array([0.125])], 1.0, wall, order="tsc", outside="drop")
    np.testing.assert_allclose(g, [0.75, 0.125, 0.0, 0.0])


def test_cic_by_hand_and_nan_positions_skipped():
    lay = regular_layout([0, 4, 0, 4], [4, 4], [1, 1])
    x = np.array([1.75, np.nan])
    y = np.array([2.5, 1.0])
    g = deposit([x, y], np.array([2.0, 5.0]), lay, order="cic")
    # by hand: x = 1.75 is ¾ of the way from centre 1.5 towards centre 2.5 -> 0.75/0.25 split;
    # y = 2.5 sits on the centre of cell 2
    expect = np.zeros((4, 4))
    expect[1, 2], expect[2, 2] = 2 * 0.75, 2 * 0.25
    np.testing.assert_allclose(g, expect)
