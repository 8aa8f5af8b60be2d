"""The figure builders of the screen: both backends render them, and what they draw equals an
outside count.

Reference values come from numpy (histogram, bincount) and pandas.crosstab; the builders only
get plain tables. The export's matplotlib drawing of the same records is checked in
tests/test_mpl_figures.py.
"""

import matplotlib

matplotlib.use("Agg")

import holoviews as hv  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import pytest  # noqa: E402

from swarmaudit.app import figures as F  # noqa: E402
from swarmaudit.core.layout import BlockLayout, regular_layout  # noqa: E402


def _layout():
    return regular_layout([0, 2, 0, 1], [16, 8], [4, 2], ranks=3)


def _refined():
    lo = np.array([[0, 0], [0.5, 0], [0, 0.5], [0.5, 0.5], [0.5, 0.5], [0.75, 0.5]])
    up = lo + np.array([[0.5, 0.5]] * 4 + [[0.25, 0.25]] * 2)
    return BlockLayout(lo, up, [0, 0, 0, 0, 1, 1], [0, 0, 1, 1, 1, 1], [0, 0], [1, 1], [16, 16],
                       (True, True))


def _census(layout, rng, species=("a", "b")):
    rows = []
    for sp in species:
        counts = rng.integers(0, 500, layout.nblocks)
        rows.append(pd.DataFrame({"snapshot": 0, "step": 0, "time": 0.0, "species": sp,
                                  "block": layout.block_id, "level": layout.level,
                                  "rank": layout.rank, "count": counts, "weight": 2.0 * counts}))
    return pd.concat(rows, ignore_index=True)


def _both(obj):
    """Render with bokeh and matplotlib; return (bokeh model, matplotlib figure)."""
    model = hv.render(obj, backend="bokeh")
    fig = hv.render(obj, backend="matplotlib")
    return model, fig


def _mpl_texts(fig):
    out = []
    for ax in fig.axes:
        out += [ax.get_title(), ax.get_xlabel(), ax.get_ylabel()]
    if getattr(fig, "_suptitle", None) is not None:
        out.append(fig._suptitle.get_text())
    return out


def _bokeh_title(model):
    t = getattr(model, "title", None)
    return getattr(t, "text", "") if t is not None else ""


def _elements(obj, kind):
    return [el for el in obj.traverse(lambda x: x, [kind])]


def test_census_map_colours_each_block_by_its_summed_count():
    rng = np.random.default_rng(0)
    lay = _layout()
    df = _census(lay, rng)
    obj = F.census_map(df, lay, "census here")
    rect = _elements(obj, hv.Rectangles)[0]
    drawn = dict(zip(rect.dimension_values("block").astype(int), rect.dimension_values("count")))
    # outside reference: numpy bincount of the per-species rows
    ref = np.bincount(df["block"], weights=df["count"], minlength=lay.nblocks)
    assert {b: drawn[b] for b in range(lay.nblocks)} == {b: ref[b] for b in range(lay.nblocks)}
    model, fig = _both(obj)
    assert "census here" in _bokeh_title(model)
    assert any("census here" in t for t in _mpl_texts(fig))
    assert len(fig.axes) == 2                   # the map and its colour bar


def test_census_map_draws_refined_blocks_after_coarse_ones():
    lay = _refined()
    df = pd.DataFrame({"species": "all", "block": lay.block_id, "count": [10, 20, 30, 40, 50, 60]})
    obj = F.census_map(df, lay, "refined")
    rect = _elements(obj, hv.Rectangles)[0]
    levels = rect.dimension_values("level")
    assert list(levels) == sorted(levels)       # level 1 painted last, on top
    assert len(_elements(obj, hv.Rectangles)) == 2   # plus the outline of the refined blocks
    _both(obj)


def test_census_map_notes_particles_outside_every_block():
    lay = _layout()
    df = pd.DataFrame({"species": "all", "block": list(lay.block_id) + [-1],
                       "count": [1] * lay.nblocks + [7]})
    obj = F.census_map(df, lay, "t")
    _, fig = _both(obj)
    assert any("7 outside every block" in t for t in _mpl_texts(fig))


def test_rank_bars_show_loads_mean_and_max_over_mean():
    loads = np.array([400.0, 100.0, 250.0])
    df = pd.DataFrame({"species": "all", "rank": [0, 1, 2], "count": loads})
    obj = F.rank_bars(df, None, "ranks")
    hist = _elements(obj, hv.Histogram)[0]
    np.testing.assert_array_equal(hist.dimension_values(1), loads)
    line = _elements(obj, hv.HLine)[0]
    assert line.data == pytest.approx(loads.mean())
    model, fig = _both(obj)
    # max/mean from numpy, printed to three decimals
    want = f"max/mean = {loads.max() / loads.mean():.3f}"
    assert want in _bokeh_title(model)
    assert any(want in t for t in _mpl_texts(fig))


def test_rank_bars_take_the_imbalance_record_of_the_census():
    df = pd.DataFrame({"species": "all", "rank": [0, 1], "count": [3.0, 1.0]})
    obj = F.rank_bars(df, {"max_over_mean": 1.5, "cv": 0.5}, "r")
    _, fig = _both(obj)
    assert any("max/mean = 1.500" in t for t in _mpl_texts(fig))


def test_transfer_heatmap_equals_crosstab_of_the_moves():
    rng = np.random.default_rng(2)
    f = rng.integers(0, 6, 400)
    t = rng.integers(0, 6, 400)
    moves = pd.DataFrame({"from_block": f, "to_block": t}).value_counts().rename("count").reset_index()
    obj = F.transfer_heatmap(moves.assign(species="all"), "moves")
    img = _elements(obj, hv.Image)[0]
    ref = pd.crosstab(pd.Series(f, name="from"), pd.Series(t, name="to")).to_numpy().astype(float)
    np.fill_diagonal(ref, 0.0)                 # staying particles are left out
    for i in range(6):
        for j in range(6):
            got = img[i, j]                     # holoviews samples at (from, to)
            assert (np.isnan(got) and ref[i, j] == 0) or got == ref[i, j]
    model, fig = _both(obj)
    assert len(fig.axes) == 2
    assert f"{int(ref.sum())} migrated" in _bokeh_title(model)


def test_transfer_heatmap_with_sparse_block_ids_falls_back_to_categories():
    moves = pd.DataFrame({"from_block": [3, 17, 40], "to_block": [17, 40, 3], "count": [5, 6, 7]})
    obj = F.transfer_heatmap(moves, "sparse")
    assert _elements(obj, hv.HeatMap)
    _both(obj)


def test_displacement_histogram_counts_and_the_one_cell_per_step_line():
    rng = np.random.default_rng(3)
    d = np.abs(rng.normal(0, 2.0, 5000))
    obj = F.displacement_histogram(d, 3, "disp", bins=40)
    hist = _elements(obj, hv.Histogram)[0]
    edges = hist.interface.coords(hist, hist.kdims[0], edges=True)
    ref, _ = np.histogram(d, bins=edges)
    got = np.nan_to_num(hist.dimension_values(1))
    np.testing.assert_array_equal(got, ref)
    assert _elements(obj, hv.VLine)[0].data == 3.0
    _, fig = _both(obj)
    beyond = int(np.count_nonzero(d > 3.0))
    assert any(f"{beyond} of 5000 over one cell per step" in t for t in _mpl_texts(fig))


def _drift_table():
    # a worked table: charge of species 'a' leaves a 1e-3 band at snapshot 3 (1.0 -> 1.002)
    rows = []
    values = {"count": [100, 100, 100, 100, 100], "charge": [1.0, 1.0002, 1.0005, 1.002, 1.003]}
    for q, vals in values.items():
        for sp in ("a", "all"):
            ref = vals[0]
            for i, v in enumerate(vals):
                rows.append({"snapshot": i, "step": 10 * i, "time": 0.5 * i, "species": sp,
                             "quantity": q, "value": v, "reference": ref,
                             "relative_drift": (v - ref) / abs(ref)})
    return pd.DataFrame(rows)


def test_drift_curves_mark_the_first_snapshot_outside_the_band():
    df = _drift_table()
    exits = F.first_exits(df, 1e-3)
    assert sorted(zip(exits["species"], exits["quantity"], exits["snapshot"])) == \
        [("a", "charge", 3), ("all", "charge", 3)]
    obj = F.drift_curves(df, 1e-3, "drift")
    assert isinstance(obj, hv.Layout) and len(obj) == 2        # one panel per quantity
    marks = _elements(obj, hv.Scatter)
    assert len(marks) == 1 and list(marks[0].dimension_values(0)) == [1.5, 1.5]   # time of snapshot 3
    spans = _elements(obj, hv.HSpan)
    assert spans and all((s.y1, s.y2) == (-1e-3, 1e-3) for s in spans)
    _, fig = _both(obj)
    assert any("2 totals left the band" in t for t in _mpl_texts(fig))


def test_drift_curves_judge_with_the_scale_column_when_there_is_one():
    # net charge zero at the first snapshot: relative drift is NaN, the scale Σ|wq| judges
    df = pd.DataFrame({"snapshot": [0, 1, 2], "step": [0, 1, 2], "time": [0.0, 1.0, 2.0],
                       "species": "all", "quantity": "charge", "value": [0.0, 0.5, 3.0],
                       "reference": 0.0, "relative_drift": np.nan, "scale": 100.0, "nonfinite": 0})
    exits = F.first_exits(df, 0.01)
    assert list(exits["snapshot"]) == [2]          # 3/100 > 0.01, 0.5/100 is not
    np.testing.assert_allclose(F.judged_drift(df), [0.0, 0.005, 0.03])
    _both(F.drift_curves(df, 0.01, "zero reference"))


def test_drift_curves_without_a_band():
    obj = F.drift_curves(_drift_table(), None, "no band")
    assert not _elements(obj, hv.HSpan)
    _both(obj)


def test_deposit_map_puts_cell_ix_iy_where_it_belongs():
    lay = _layout()                                  # 16 x 8 cells over [0, 2) x [0, 1)
    grid = np.zeros((16, 8))
    grid[3, 6] = 5.0                                 # [ix, iy], as numpy.histogramdd orders it
    obj = F.deposit_map(grid, lay, "deposit")
    img = _elements(obj, hv.Image)[0]
    h = lay.cell_size
    assert img[(3 + 0.5) * h[0], (6 + 0.5) * h[1]] == 5.0
    assert img[(6 + 0.5) * h[0], (3 + 0.5) * h[1]] == 0.0
    _, fig = _both(obj)
    assert len(fig.axes) == 2


def test_histogram_1d_equals_numpy_weighted_histogram():
    rng = np.random.default_rng(4)
    v = rng.normal(size=3000)
    w = rng.uniform(0.5, 2, 3000)
    v[:5] = np.nan
    obj = F.histogram_1d(v, w, 30, "h", "vx [m/s]")
    ok = np.isfinite(v)
    ref, _ = np.histogram(v[ok], bins=30, range=(v[ok].min(), v[ok].max()), weights=w[ok])
    np.testing.assert_allclose(obj.dimension_values(1), ref)
    _, fig = _both(obj)
    assert "vx [m/s]" in _mpl_texts(fig)
