"""The image accumulator against datashader on the whole frame and numpy.histogram2d; column ranges.

Two outside references: ``datashader.Canvas.points`` on the whole frame (the
numbers the views were always drawn with: the same bytes, dims and
coordinates), and numpy.histogram2d / scipy's binned_statistic_2d on the same
edges (ranges whose pixel sizes are powers of two, so the two binning
formulas round alike and every edge point has one right bin).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.stats import binned_statistic_2d

from _need import need, need_that

from swarmaudit.core.frame import Frame, concat_frames
from swarmaudit.diagnostics import image
from swarmaudit.diagnostics.accumulate import Piece, fold, merge_all
from swarmaudit.diagnostics.image import ColumnRanges, Image
from swarmaudit.engine import pieces
from swarmaudit.engine.reduce import reduce

XR, YR, W, H = (-2.0, 6.0), (-2.0, 2.0), 32, 16        # pixels of 1/4 by 1/4


def _points(n=40_000, seed=0, dtype=np.float32):
    rng = np.random.default_rng(seed)
    x = rng.normal(2.0, 2.5, n).astype(dtype)            # some off the canvas on both sides
    y = rng.normal(0.0, 1.2, n).astype(dtype)
    w = rng.uniform(0.5, 2.0, n)
    v = rng.normal(0.0, 1.0, n).astype(dtype)
    # on the edges: the top edge of each axis (the last pixel), the bottom edge, inner edges
    x[:50], y[:50] = XR[1], rng.uniform(*YR, 50)
    x[50:100], y[50:100] = rng.uniform(*XR, 50), YR[1]
    x[100:110], y[100:110] = XR[1], YR[1]
    x[110:120], y[110:120] = XR[0], YR[0]
    x[120:160] = np.arange(40) * 0.25 + XR[0]             # exactly on inner column edges
    # not finite: a coordinate NaN or infinite, a value NaN
    x[200:210] = np.nan
    y[210:215] = np.inf
    x[215:218] = -np.inf
    w[300:320] = np.nan
    v[320:330] = np.nan
    return {"x": x, "y": y, "w": w, "v": v}


def _datashader(cols, reduction, value=None, *, x_range=XR, y_range=YR, width=W, height=H):
    ds = need("datashader")
    df = pd.DataFrame(cols, copy=False)
    agg = {"count": ds.count(), "sum": ds.sum(value or "w"), "mean": ds.mean(value or "w")}[reduction]
    cv = ds.Canvas(plot_width=width, plot_height=height, x_range=x_range, y_range=y_range)
    return cv.points(df, "x", "y", agg=agg)


def _image(cols, reduction, value=None, cuts=(), *, x_range=XR, y_range=YR, width=W, height=H, **kw):
    """The accumulator folded over the rows cut at ``cuts`` into one state, finished."""
    acc = Image("x", "y", width=width, height=height, x_range=x_range, y_range=y_range,
                reduction=reduction, value=value, **kw)
    n = len(cols["x"])
    edges = [0, *cuts, n]
    ps = [Piece({c: a[lo:hi] for c, a in cols.items()}, lo) for lo, hi in zip(edges[:-1], edges[1:])]
    return acc.finish(fold(acc, ps))


@pytest.fixture(params=["compiled", "numpy", "no numba"])
def path(request, monkeypatch):
    """The compiled loop for every piece; or the numpy passes, with the loop (compiled, or plain
    Python without numba) only where they defer."""
    if request.param == "compiled":
        need_that(image.available, "numba is not installed")
        monkeypatch.setattr(image, "MIN_VALUES", 0)
    else:
        monkeypatch.setattr(image, "MIN_VALUES", 10**12)
        monkeypatch.setattr(image, "_loops", {})          # nothing compiled yet: numpy takes it
        if request.param == "no numba":
            monkeypatch.setattr(image, "available", False)
    return request.param


def _same_array(got, ref):
    """The same DataArray bit for bit: dtype, bytes (NaN and -0.0 included), dims, coordinates."""
    assert got.dtype == ref.dtype and got.dims == ref.dims and got.shape == ref.shape
    assert np.asarray(got.values).tobytes() == np.asarray(ref.values).tobytes()
    for d in ref.dims:
        assert np.asarray(got.coords[d].values).tobytes() == np.asarray(ref.coords[d].values).tobytes()


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("reduction", ["count", "sum", "mean"])
def test_equals_datashader_on_the_whole_frame_bit_for_bit(reduction, dtype, path):
    cols = _points(dtype=dtype)
    value = None if reduction == "count" else ("w" if reduction == "sum" else "v")
    ref = _datashader(cols, reduction, value)
    # one piece, and several pieces folded into one state: the same numbers in the same order
    for cuts in ((), (1, 7000, 7001, 25_000)):
        got = _image(cols, reduction, value, cuts)
        _same_array(got, ref)
    # a canvas whose pixel sizes are not powers of two rounds through x * s + t as datashader does;
    # points at and next to each of its pixel edges (in the column's own dtype) find out whether
    # the bounds and the scaling are applied in float64, as datashader's loop applies them
    odd = dict(x_range=(-1.3, 4.7), y_range=(-0.9, 1.1), width=97, height=61)
    near = _near_edges(cols, odd)
    ref = _datashader(near, reduction, value, **odd)
    _same_array(_image(near, reduction, value, (12_345,), **odd), ref)


def _near_edges(cols, canvas):
    """``cols`` with, appended, points at and one step either side of every pixel edge of ``canvas``."""
    dt = cols["x"].dtype

    def around(lo, hi, n):
        e = lo + (hi - lo) * np.arange(n + 1) / n
        e = np.asarray(e, dtype=dt)
        return np.concatenate([e, np.nextafter(e, dt.type(-np.inf)), np.nextafter(e, dt.type(np.inf))])

    ex = around(*canvas["x_range"], canvas["width"])
    ey = around(*canvas["y_range"], canvas["height"])
    gx, gy = np.meshgrid(ex, np.resize(ey, ex.size)[:50])
    m = gx.size
    rng = np.random.default_rng(9)
    extra = {"x": gx.ravel(), "y": gy.ravel(), "w": rng.uniform(0.5, 2.0, m),
             "v": rng.normal(0.0, 1.0, m).astype(cols["v"].dtype)}
    return {c: np.concatenate([cols[c], extra[c].astype(cols[c].dtype)]) for c in cols}


@pytest.mark.parametrize("reduction", ["count", "sum", "mean"])
def test_columns_known_finite_give_the_same_image(reduction, path):
    # finite=True (the caller's ColumnRanges found no NaN or infinity) skips the count, nothing else
    cols = _points()
    ok = np.isfinite(cols["x"]) & np.isfinite(cols["y"])
    cols = {c: a[ok] for c, a in cols.items()}
    value = None if reduction == "count" else ("w" if reduction == "sum" else "v")
    got = _image(cols, reduction, value, (5000,), finite=True)
    _same_array(got, _datashader(cols, reduction, value))
    assert got.attrs == _image(cols, reduction, value, (5000,)).attrs
    assert got.attrs["nonfinite"] == 0 and got.attrs["particles"] == int(ok.sum())


def test_count_equals_numpy_histogram2d_with_the_edge_rules(path):
    cols = _points()
    got = _image(cols, "count")
    x, y = cols["x"].astype(np.float64), cols["y"].astype(np.float64)
    ok = np.isfinite(x) & np.isfinite(y)
    # outside reference: numpy.histogram2d on the same closed range (the top edge in the last bin)
    ref, xe, ye = np.histogram2d(x[ok], y[ok], bins=[W, H], range=[XR, YR])
    np.testing.assert_array_equal(got.values, ref.T)
    np.testing.assert_array_equal(got.coords["x"].values, 0.5 * (xe[:-1] + xe[1:]))
    np.testing.assert_array_equal(got.coords["y"].values, 0.5 * (ye[:-1] + ye[1:]))
    assert got.values[:, -1].sum() >= 60 and got.values[-1, :].sum() >= 60     # the edge points
    assert got.attrs["nonfinite"] == 18 == int((~ok).sum())
    assert got.attrs["particles"] == int(ok.sum())


def test_sum_and_mean_equal_histogram2d_and_binned_statistic(path):
    cols = _points(dtype=np.float64)
    x, y, w, v = cols["x"], cols["y"], cols["w"], cols["v"]
    ok = np.isfinite(x) & np.isfinite(y)
    okw, okv = ok & ~np.isnan(w), ok & ~np.isnan(v)
    got = _image(cols, "sum", "w", (9000,))
    ref, _, _ = np.histogram2d(x[okw], y[okw], bins=[W, H], range=[XR, YR], weights=w[okw])
    hit, _, _ = np.histogram2d(x[okw], y[okw], bins=[W, H], range=[XR, YR])
    # an empty pixel of a sum is NaN (no value), not 0
    assert np.array_equal(np.isnan(got.values), hit.T == 0)
    np.testing.assert_allclose(np.nan_to_num(got.values), ref.T, rtol=1e-12)
    got = _image(cols, "mean", "v", (9000,))
    ref = binned_statistic_2d(x[okv], y[okv], v[okv], "mean", bins=[W, H], range=[XR, YR]).statistic.T
    assert np.array_equal(np.isnan(got.values), np.isnan(ref))
    np.testing.assert_allclose(got.values[~np.isnan(ref)], ref[~np.isnan(ref)], rtol=1e-12)


def test_infinite_values_in_a_sum_restart_as_datashader_does(path):
    # +inf then -inf make a pixel's running sum NaN, and datashader's sum restarts from the next
    # value; the numpy passes leave such a piece to the loop (compiled, or plain Python)
    x = np.full(6, 0.1)
    y = np.full(6, 0.1)
    w = np.array([1.0, np.inf, -np.inf, 2.0, 3.0, np.nan])
    cols = {"x": x, "y": y, "w": w}
    ref = _datashader(cols, "sum", "w", x_range=(0, 1), y_range=(0, 1), width=2, height=2)
    got = _image(cols, "sum", "w", x_range=(0, 1), y_range=(0, 1), width=2, height=2)
    _same_array(got, ref)
    assert got.values[0, 0] == 5.0


def test_cuts_merge_to_the_one_state_answer(path):
    cols = _points(dtype=np.float64)
    acc = Image("x", "y", width=W, height=H, x_range=XR, y_range=YR, reduction="sum", value="w")
    cuts = [0, 5000, 5001, 17_000, 33_333, len(cols["x"])]
    states = [fold(acc, [Piece({c: a[lo:hi] for c, a in cols.items()}, lo)])
              for lo, hi in zip(cuts[:-1], cuts[1:])]
    merged = acc.finish(merge_all(acc, states))
    whole = _image(cols, "sum", "w")
    assert np.array_equal(np.isnan(merged.values), np.isnan(whole.values))
    np.testing.assert_allclose(merged.values, whole.values, rtol=1e-12)
    counts = Image("x", "y", width=W, height=H, x_range=XR, y_range=YR)
    states = [fold(counts, [Piece({c: a[lo:hi] for c, a in cols.items()}, lo)])
              for lo, hi in zip(cuts[:-1], cuts[1:])]
    got = counts.finish(merge_all(counts, states))
    np.testing.assert_array_equal(got.values, _image(cols, "count").values)   # counts: exactly
    assert got.attrs == _image(cols, "count").attrs


def test_slab_and_mask_keep_their_rows(path):
    cols = _points(dtype=np.float64)
    rng = np.random.default_rng(5)
    s = rng.uniform(0, 1, len(cols["x"]))
    s[:30] = np.nan
    mask = rng.random(len(s)) < 0.6
    cols["s"] = s
    got = _image(cols, "count", None, (4000, 20_000), slab=("s", 0.25, 0.5), mask=mask)
    keep = mask & (s >= 0.25) & (s < 0.5)
    x, y = cols["x"][keep], cols["y"][keep]
    ok = np.isfinite(x) & np.isfinite(y)
    ref, _, _ = np.histogram2d(x[ok], y[ok], bins=[W, H], range=[XR, YR])
    np.testing.assert_array_equal(got.values, ref.T)
    assert got.attrs["nonfinite"] == int((~ok).sum())
    assert got.attrs["particles"] == int(ok.sum())


@pytest.mark.parametrize("where", ["serial", "threads", "dask"])
def test_every_engine_gives_the_same_image(where, monkeypatch):
    # per-rank parts cut into small pieces, folded a few pieces to a state: the cut is the
    # engine's, so every engine merges the same states in the same order
    monkeypatch.setattr(pieces, "PIECE_ROWS", 1000)
    monkeypatch.setattr(Image, "task_pieces", 3)
    cols = _points(dtype=np.float64)
    cuts = [0, 9000, 9000, 26_500, len(cols["x"])]
    parts = [Frame("e", hi - lo, {c: (lambda a=a[lo:hi]: a) for c, a in cols.items()})
             for lo, hi in zip(cuts[:-1], cuts[1:])]
    frame = concat_frames(parts, species="e")
    for reduction, value in (("count", None), ("sum", "w"), ("mean", "v")):
        acc = Image("x", "y", width=W, height=H, x_range=XR, y_range=YR, reduction=reduction,
                    value=value)
        got = reduce(acc, frame, where=where)
        ref = reduce(acc, frame, where="serial")
        _same_array(got, ref)
        whole = _image(cols, reduction, value)
        if reduction == "count":
            _same_array(got, whole)
        else:
            np.testing.assert_allclose(got.values, whole.values, rtol=1e-12)


def test_column_ranges_are_the_finite_min_and_max():
    cols = _points(dtype=np.float64)
    acc = ColumnRanges(["x", "y", "w"])
    n = len(cols["x"])
    cuts = [0, 100, 30_000, n]
    got = acc.finish(merge_all(acc, [fold(acc, [Piece({c: cols[c][lo:hi] for c in acc.columns}, lo)])
                                     for lo, hi in zip(cuts[:-1], cuts[1:])]))
    for c in acc.columns:
        a = cols[c]
        fin = a[np.isfinite(a)]
        # outside reference: numpy min and max over the finite values, the rest counted
        assert got[c] == (fin.min(), fin.max(), a.size - fin.size)
    empty = ColumnRanges(["x"])
    assert empty.finish(fold(empty, [Piece({"x": np.full(4, np.nan)})])) == {"x": (None, None, 4)}
    assert empty.finish(empty.start()) == {"x": (None, None, 0)}


def test_bad_canvases_are_refused():
    for kw in (dict(width=0), dict(x_range=(1.0, 1.0)), dict(y_range=(0.0, np.inf)),
               dict(reduction="median"), dict(reduction="sum")):
        args = dict(width=W, height=H, x_range=XR, y_range=YR) | kw
        with pytest.raises(ValueError):
            Image("x", "y", **args)
    acc = Image("x", "y", width=W, height=H, x_range=XR, y_range=YR)
    with pytest.raises(TypeError, match="not numeric"):
        fold(acc, [Piece({"x": np.array(["a"]), "y": np.zeros(1)})])
