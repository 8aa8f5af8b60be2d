"""The shared aggregation path against numpy's own binning (numpy.histogram2d / binned_statistic_2d)."""

import numpy as np
import pytest
from scipy.stats import binned_statistic_2d

from swarmaudit.app import render
from swarmaudit.core.errors import OptionError
from swarmaudit.core.frame import Frame
from swarmaudit.core.layout import regular_layout


def make_frame(n=20000, seed=1, dtype=np.float32, nan=0):
    rng = np.random.default_rng(seed)
    cols = {
        "x": rng.normal(1.0, 1.2, n).astype(dtype),
        "y": rng.uniform(-2.0, 6.0, n).astype(dtype),
        "z": rng.uniform(0.0, 1.0, n).astype(dtype),
        "vx": rng.normal(0.0, 0.3, n).astype(dtype),
        "weight": rng.uniform(0.5, 2.0, n),
    }
    if nan:
        cols["x"][:nan] = np.nan
        cols["y"][n - nan // 2:] = np.inf
    return Frame("e", n, {k: (lambda v=v: v) for k, v in cols.items()},
                 units={"x": "m", "y": "m", "vx": "m/s"}), cols


# Ranges whose pixel sizes are powers of two make datashader's x*s+t and
# numpy's (x-lo)*n/(hi-lo) round identically, so bins agree exactly.
XR, YR, W, H = (-2.0, 6.0), (-2.0, 6.0), 64, 32


def test_count_equals_numpy_histogram2d():
    f, c = make_frame()
    agg = render.aggregate_points(f, "x", "y", width=W, height=H, x_range=XR, y_range=YR)
    ref, _, _ = np.histogram2d(c["x"], c["y"], bins=[W, H], range=[XR, YR])
    assert agg.shape == (H, W)
    np.testing.assert_array_equal(render.histogram_counts(agg), ref.T)
    assert agg.attrs["nonfinite"] == 0


def test_sum_of_weight_equals_weighted_histogram2d():
    f, c = make_frame()
    agg = render.aggregate_points(f, "x", "y", width=W, height=H, x_range=XR, y_range=YR,
                                  reduction="sum", value="weight")
    ref, _, _ = np.histogram2d(c["x"], c["y"], bins=[W, H], range=[XR, YR], weights=c["weight"])
    np.testing.assert_allclose(render.histogram_counts(agg), ref.T, rtol=1e-12, atol=1e-12)


def test_mean_equals_scipy_binned_statistic():
    f, c = make_frame()
    agg = render.aggregate_points(f, "x", "y", width=W, height=H, x_range=XR, y_range=YR,
                                  reduction="mean", value="vx")
    # binned_statistic_2d puts values on the top edge in the last bin, like histogram2d
    ref = binned_statistic_2d(c["x"], c["y"], c["vx"].astype(np.float64), "mean",
                              bins=[W, H], range=[XR, YR]).statistic.T
    got = np.asarray(agg.values, dtype=np.float64)
    assert np.array_equal(np.isnan(got), np.isnan(ref))
    np.testing.assert_allclose(got[~np.isnan(got)], ref[~np.isnan(ref)], rtol=1e-5, atol=1e-6)


def test_nonfinite_dropped_and_counted():
    f, c = make_frame(nan=10)
    agg = render.aggregate_points(f, "x", "y", width=W, height=H, x_range=XR, y_range=YR)
    ok = np.isfinite(c["x"]) & np.isfinite(c["y"])
    ref, _, _ = np.histogram2d(c["x"][ok], c["y"][ok], bins=[W, H], range=[XR, YR])
    np.testing.assert_array_equal(render.histogram_counts(agg), ref.T)
    assert agg.attrs["nonfinite"] == int((~ok).sum()) == 15


def test_slab_keeps_half_open_interval():
    f, c = make_frame()
    agg = render.aggregate_points(f, "x", "y", width=W, height=H, x_range=XR, y_range=YR,
                                  slab=("z", 0.25, 0.5))
    keep = (c["z"] >= 0.25) & (c["z"] < 0.5)
    ref, _, _ = np.histogram2d(c["x"][keep], c["y"][keep], bins=[W, H], range=[XR, YR])
    np.testing.assert_array_equal(render.histogram_counts(agg), ref.T)


def test_selection_mask_counts():
    f, c = make_frame(nan=4)
    mask = (c["vx"] > 0.1)
    agg = render.aggregate_points(f, "x", "vx", width=W, height=H, x_range=XR, y_range=(-2, 2),
                                  mask=mask)
    ok = mask & np.isfinite(c["x"])
    ref, _, _ = np.histogram2d(c["x"][ok], c["vx"][ok], bins=[W, H], range=[XR, (-2, 2)])
    np.testing.assert_array_equal(render.histogram_counts(agg), ref.T)
    assert agg.attrs["nonfinite"] == int((mask & ~np.isfinite(c["x"])).sum())
    with pytest.raises(OptionError):
        render.aggregate_points(f, "x", "y", mask=mask[:-1])


def test_default_range_is_data_range_and_covers_every_point():
    f, c = make_frame(nan=6)
    lo, hi = render.data_range(f, "x")
    fin = c["x"][np.isfinite(c["x"])]
    assert (lo, hi) == (float(fin.min()), float(fin.max()))
    agg = render.aggregate_points(f, "x", "vx", width=33, height=17)
    ok = np.isfinite(c["x"])
    assert render.histogram_counts(agg).sum() == ok.sum()


def test_float32_columns_not_copied():
    f, c = make_frame()
    assert f["x"].dtype == np.float32
    render.aggregate_points(f, "x", "y", width=8, height=8)
    assert f["x"] is c["x"]


def test_bad_options():
    f, _ = make_frame(n=10)
    with pytest.raises(OptionError):
        render.aggregate_points(f, "x", "y", reduction="median", value="vx")
    with pytest.raises(OptionError):
        render.aggregate_points(f, "x", "y", reduction="sum")
    with pytest.raises(OptionError):
        render.density_image(render.aggregate_points(f, "x", "y"), cmap="viridis", scaling="cube")


def test_single_value_column_still_bins():
    n = 50
    f = Frame("e", n, {"x": lambda: np.full(n, 3.0), "y": lambda: np.linspace(0, 1, n)})
    agg = render.aggregate_points(f, "x", "y", width=5, height=5)
    assert render.histogram_counts(agg).sum() == n


def test_density_image_labels_and_backends():
    import holoviews as hv
    f, _ = make_frame()
    agg = render.aggregate_points(f, "x", "vx", width=40, height=30)
    img = render.density_image(agg, cmap="viridis", title="phase", scaling="log")
    assert img.kdims[0].label == "x [m]" and img.kdims[1].label == "vx [m/s]"
    assert hv.renderer("bokeh").get_plot(img).state is not None
    fig = hv.renderer("matplotlib").get_plot(img)
    assert fig is not None
    # empty pixels are transparent (NaN), not the lowest colour
    data = img.dimension_values(2, flat=False)
    assert np.isnan(data).sum() == (render.histogram_counts(agg) == 0).sum()


def test_block_overlay_one_rectangle_per_block():
    import holoviews as hv
    lay = regular_layout([0, 4, 0, 2], [8, 4], [4, 2], ranks=2)
    ov = render.block_overlay(lay)
    assert isinstance(ov, hv.Rectangles) and len(ov) == 8
    tinted = render.block_overlay(lay, counts=np.arange(8) * 10, labels=True)
    rects, labels = tinted.get(0), tinted.get(1)
    assert sorted(rects.dimension_values("count")) == list(np.arange(8) * 10.0)
    assert "7: 70" in list(labels.dimension_values("text"))
    hv.renderer("bokeh").get_plot(ov * tinted)


def test_block_overlay_3d_slab():
    lay = regular_layout([0, 1, 0, 1, 0, 1], [4, 4, 4], [2, 2, 2])
    rect, rows = render.block_rectangles(lay, (0, 1), slab=(2, 0.0, 0.4))
    assert len(rows) == 4 and np.all(lay.upper[rows, 2] <= 0.5)
