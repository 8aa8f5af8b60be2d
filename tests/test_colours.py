"""Colour maps by name and the colour scales, against holoviews (what the screen colours with)
and against histogram equalisation worked by hand.

Outside references: holoviews' ``process_cmap`` (palettes) and ``EqHistNormalize`` (the
equalisation the screen and earlier exports used), the empirical CDF from numpy (histogram
equalisation maps a value to the share of values at or below it: Gonzalez & Woods, *Digital
Image Processing*, from memory), and datashader's rule for few discrete levels worked by hand.
"""

import subprocess
import sys

import numpy as np
import pytest

from _need import need
from swarmaudit.app import colours as C
from swarmaudit.app.view_policy import CMAPS, DEFAULT_CMAP

NAMES = list(CMAPS) + ["RdBu_r", "Oranges", "turbo", "Viridis", "fire_r", "cet_fire", "tab10",
                       "glasbey", "bgy", "gist_earth"]


def _rgb(palette):
    return np.array([[int(c[k:k + 2], 16) for k in (1, 3, 5)] for c in palette])


@pytest.mark.parametrize("name", NAMES)
def test_palette_is_the_one_holoviews_draws_with(name):
    util = need("holoviews.plotting.util")
    np.testing.assert_array_equal(_rgb(C.palette(name)), _rgb(util.process_cmap(name)))
    assert len(C.palette(name, 16)) == 16


def test_unknown_names_are_refused_in_one_sentence():
    for name in ("no_such_colours", "", None, "Category10x"):
        problem = C.cmap_problem(name)
        assert problem and problem.startswith("no colour map named")
        with pytest.raises(ValueError):
            C.palette(name if isinstance(name, str) else "")
    assert all(C.cmap_problem(n) is None for n in CMAPS)
    assert DEFAULT_CMAP in CMAPS


def test_colour_map_leaves_empty_bins_transparent():
    cmap = C.colour_map("viridis")
    assert cmap.N == 256
    assert cmap(np.nan)[3] == 0.0
    np.testing.assert_allclose(cmap(0.0)[:3], _rgb(C.palette("viridis")[:1])[0] / 255)


def test_names_are_checked_without_the_plotting_stack():
    code = ("import sys; from swarmaudit.app import colours as C; "
            "assert C.cmap_problem('viridis') is None and C.cmap_problem('fire') is None; "
            "print(sorted(m for m in ('holoviews', 'bokeh', 'panel', 'datashader') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def _datasets():
    rng = np.random.default_rng(7)
    return {"poisson counts": rng.poisson(3, 20000).astype(float),
            "lognormal": rng.lognormal(0, 2, 20000),
            "two levels": np.array([1.0] * 30 + [2.0] * 5),
            "many integers": rng.integers(1, 400, 5000).astype(float),
            "negative means": rng.normal(-2, 3, 4000)}


@pytest.mark.parametrize("name", list(_datasets()))
def test_eq_hist_binning_is_holoviews_binning(name):
    util = need("holoviews.plotting.mpl.util")
    data = _datasets()[name]
    lo, hi = float(data.min()), float(data.max())
    hi = hi if hi > lo else lo + 1.0
    ref = util.EqHistNormalize(vmin=lo, vmax=hi).binning(data, 256)
    np.testing.assert_array_equal(C.eq_hist_edges(data, lo, hi), ref)


def test_eq_hist_of_continuous_values_is_their_cdf():
    data = np.random.default_rng(3).lognormal(0, 1.5, 100000)
    norm = C.eq_hist_norm(data, float(data.min()), float(data.max()))
    probe = np.quantile(data, np.linspace(0.02, 0.98, 25))
    ecdf = np.searchsorted(np.sort(data), probe, side="right") / data.size
    # 256 colour steps and 65,536 value bins: within a step and a bit
    assert np.max(np.abs(np.asarray(norm(probe)) - ecdf)) < 0.01


def test_eq_hist_leaves_the_low_end_unused_for_few_levels():
    # counts 1, 2, 3 particles (datashader's rescale_discrete_levels, worked by hand): with L = 3
    # levels the cdf's span is stretched by 1.5 - 0.5 (L - 2) / 98 below zero, so the lowest level
    # sits at (multiple - 1) / multiple of the scale
    data = np.array([1.0] * 50 + [2.0] * 30 + [3.0] * 20)
    norm = C.eq_hist_norm(data, 1.0, 3.0)
    multiple = 1.5 - 0.5 * (3 - 2) / 98
    assert norm.lowest == pytest.approx((multiple - 1) / multiple, abs=1 / 256)
    assert float(norm(3.0)) == 1.0
    assert 0 < norm.lowest < float(norm(2.0)) < 1.0
    # one level (holoviews' binning is NaN there): the value sits where the lowest of L = 1
    # levels would, and the scale rises evenly to vmax
    one = C.eq_hist_norm(np.ones(12), 1.0, 2.0)
    m1 = 1.5 + 0.5 / 98
    assert one.lowest == pytest.approx((m1 - 1) / m1)
    assert float(one(1.5)) == pytest.approx(one.lowest + 0.5 * (1 - one.lowest))
    assert np.all(np.isfinite(one.edges)) and np.all(np.diff(one.edges) > 0)
    # many levels: the scale starts at the bottom
    many = np.arange(1.0, 300.0)
    assert C.eq_hist_norm(many, 1.0, 299.0).lowest == pytest.approx(0.0, abs=1e-9)


def test_eq_hist_norm_is_fixed_masks_nan_and_inverts():
    data = np.random.default_rng(5).poisson(4, 3000).astype(float) + 1
    norm = C.eq_hist_norm(data, float(data.min()), float(data.max()))
    before = np.asarray(norm(np.array([2.0, 5.0])))
    norm(np.array([1.0, 1.0, 1.0]))              # handing it another array changes nothing
    np.testing.assert_array_equal(np.asarray(norm(np.array([2.0, 5.0]))), before)
    out = norm(np.ma.masked_invalid(np.array([np.nan, 3.0])))
    assert out.mask.tolist() == [True, False]
    assert np.isscalar(norm(3.0))
    assert norm.inverse(norm(7.0)) == pytest.approx(7.0, abs=0.5)


def test_scale_norm_ends_over_every_array():
    a = np.array([[np.nan, 2.0], [5.0, np.nan]])
    b = np.array([[9.0, np.nan], [1.0, np.nan]])
    for scaling in ("linear", "log", "eq_hist"):
        norm, ends = C.scale_norm([a, b], scaling)
        assert ends == (1.0, 9.0) and (norm.vmin, norm.vmax) == (1.0, 9.0)
        assert float(norm(9.0)) == pytest.approx(1.0)
    assert C.scale_norm([np.full((2, 2), np.nan)], "log")[1] == (0.0, 1.0)
    assert C.scale_norm([np.full(3, 4.0)], "linear")[1] == (4.0, 5.0)


def test_shown_values_blank_what_has_no_colour():
    v = np.array([0.0, -1.0, 2.0])
    np.testing.assert_array_equal(np.isnan(C.shown_values(v, "count", "linear")), [True, True, False])
    np.testing.assert_array_equal(np.isnan(C.shown_values(v, "mean", "log")), [True, True, False])
    np.testing.assert_array_equal(C.shown_values(v, "mean", "eq_hist"), v)
