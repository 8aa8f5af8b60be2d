"""The export's matplotlib figures: exact pixel sizes, the pictures' own pixels against the
numbers drawn, colour-bar labels against the colours they name, swapped images against
figures built afresh.

Outside references: Pillow (the PNG's size and pixels, read back from the file), numpy
(histogram2d, bincount), pandas.crosstab, and the colour map's palette as holoviews resolves it
(tests/test_colours.py); the figure records come from ``app.figure_data``, which the screen's
holoviews figures are built from (tests/test_figures.py).
"""

import gc
import os
import re
import subprocess
import sys
import weakref

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from swarmaudit.app import colours
from swarmaudit.app import figure_data as D
from swarmaudit.app import mpl_figures as M
from swarmaudit.app.png import figure_pixels, save_png
from swarmaudit.core.layout import regular_layout

SIZES = [(640, 480, 80, 1.0), (900, 700, 100, 1.15), (333, 251, 120, 1.0)]


def _layout():
    return regular_layout([0, 2, 0, 1], [16, 8], [4, 2], ranks=3)


def _census(rng, layout):
    return pd.DataFrame({"species": "all", "block": layout.block_id,
                         "count": rng.integers(0, 500, layout.nblocks)})


def _drift():
    rows = []
    for q, vals in {"count": [100, 100, 100, 100], "charge": [1.0, 1.0002, 1.002, 1.003]}.items():
        for sp in ("a", "all"):
            for i, v in enumerate(vals):
                rows.append({"snapshot": i, "step": i, "time": 0.5 * i, "species": sp, "quantity": q,
                             "value": v, "reference": vals[0], "relative_drift": v / vals[0] - 1})
    return pd.DataFrame(rows)


def _counts(rng, shape=(40, 80), lam=3.0):
    """A count image with empty bins blank, as a density view shows it."""
    return colours.shown_values(rng.poisson(lam, shape).astype(float), "count", "eq_hist")


def _figures(size):
    rng = np.random.default_rng(1)
    lay = _layout()
    moves = pd.DataFrame({"from_block": rng.integers(0, 6, 300), "to_block": rng.integers(0, 6, 300)})
    moves = moves.value_counts().rename("count").reset_index()
    data = _counts(rng)
    img = M.ImageFigure(size, extent=(0, 2, 0, 1), xlabel="x [m]", ylabel="y [m]", clabel="particles",
                        cmap="viridis", equal=True)
    img.show(data, colours.scale_norm([data], "eq_hist")[0], "a density view")
    return {
        "census": M.census_map(D.census_map(_census(rng, lay), lay, "census", xlabel="x", ylabel="y"), size),
        "ranks": M.rank_bars(D.rank_bars(pd.DataFrame({"rank": range(4), "count": [5, 6, 7, 8]}),
                                         None, "ranks"), size),
        "transfer": M.transfer_matrix(D.transfer_matrix(moves, "moves"), size),
        "displacement": M.displacement_histogram(D.displacement_histogram(
            np.abs(rng.normal(0, 2, 800)), 3, "displacement"), size),
        "drift": M.drift_curves(D.drift_curves(_drift(), 1e-3, "drift"), size),
        "deposit": M.show_deposit(M.deposit_figure(D.deposit_map(rng.random((16, 8)), lay, "deposit"), size),
                                  D.deposit_map(rng.random((16, 8)), lay, "deposit")).fig,
        "density": img.fig,
    }


@pytest.mark.parametrize("w, h, dpi, fs", SIZES)
def test_every_kind_is_a_png_of_the_asked_size_with_everything_inside(tmp_path, w, h, dpi, fs):
    size = M.FigureSize(w, h, dpi, fs)
    for name, fig in _figures(size).items():
        path = save_png(fig, str(tmp_path / f"{name}.png"))
        with Image.open(path) as im:
            assert im.size == (w, h), name
            px = np.asarray(im.convert("L"), dtype=float)
        assert px.std() > 10, f"{name} looks blank"
        r = fig.canvas.get_renderer()
        for ax in fig.axes:
            bb = ax.get_tightbbox(r)
            assert bb.x0 >= -1 and bb.y0 >= -1 and bb.x1 <= w + 1 and bb.y1 <= h + 1, name
        if fig.texts or fig.axes[0].get_title():
            titles = [t.get_window_extent(r) for a in fig.axes for t in (a.title,) if t.get_text()]
            assert all(t.x0 >= 0 and t.x1 <= w for t in titles), name


def test_a_long_title_wraps_inside_the_picture():
    size = M.FigureSize(500, 400, 100)
    long = "a rather long title that must not be clipped at either edge of a small picture"
    fig = M.rank_bars(D.rank_bars(pd.DataFrame({"rank": range(4), "count": [5, 6, 7, 8]}), None, long),
                      size)
    title = fig.axes[0].title
    assert "\n" in title.get_text()
    bb = title.get_window_extent(fig.canvas.get_renderer())
    assert bb.x0 >= 0 and bb.x1 <= 500


def test_a_drawn_figure_is_freed():
    # no pyplot and no registry of the plotting library: a figure goes when its last reference does
    fig = _figures(M.FigureSize(300, 240, 100))["deposit"]
    figure_pixels(fig)
    ref = weakref.ref(fig)
    del fig
    gc.collect()
    assert ref() is None


def _bar_colours(fig, cax, img_ax=None):
    """(tick values named on the bar, RGB of the bar beside each), read from the drawn pixels."""
    px = figure_pixels(fig)
    h = px.shape[0]
    bar = cax.get_window_extent()
    x = int(round(0.5 * (bar.x0 + bar.x1)))
    out = []
    axis = cax.yaxis
    lo, hi = sorted(axis.get_view_interval())
    for loc, label in zip(axis.get_majorticklocs(), axis.get_majorticklabels()):
        if not label.get_text() or not lo - 1e-9 <= loc <= hi + 1e-9:
            continue
        y = cax.transData.transform((0.5, loc))[1]
        # a tick at an end of the bar is read just inside its outline
        yy = min(max(int(round(h - y)), int(h - bar.y1) + 3), int(h - bar.y0) - 4)
        out.append((label.get_text(), px[yy, x].astype(int)))
    return out


def _pixel_of(fig, ax, data, value):
    """RGB of an image pixel holding ``value`` (the middle of its bin), from the drawn pixels."""
    px = figure_pixels(fig)
    h = px.shape[0]
    rows, cols = np.nonzero(data == value)
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    ny, nx = data.shape
    for r, c in zip(rows, cols):
        xd = x0 + (c + 0.5) * (x1 - x0) / nx
        yd = y0 + (r + 0.5) * (y1 - y0) / ny
        X, Y = ax.transData.transform((xd, yd))
        return px[int(round(h - Y)), int(round(X))].astype(int)
    raise AssertionError(f"no bin holds {value}")


def _label_value(text: str) -> float | None:
    text = text.replace(",", "").replace("−", "-")
    power = re.fullmatch(r"\$\\mathdefault\{10\^\{(-?\d+)\}\}\$", text)
    if power:
        return 10.0 ** int(power.group(1))
    try:
        return float(text)
    except ValueError:
        return None


@pytest.mark.parametrize("scaling, levels", [("eq_hist", "few"), ("eq_hist", "many"),
                                             ("linear", "few"), ("linear", "many"), ("log", "many")])
def test_colour_bar_labels_name_the_colours_of_the_image(scaling, levels):
    # the image's own pixels are the reference: the bar beside the label "v" has the colour an
    # image bin holding v is drawn with (within one step of the 256-colour palette)
    rng = np.random.default_rng(4)
    if levels == "few":
        data = _counts(rng, (30, 60), lam=1.2)        # 1, 2, 3 ... particles a bin
    else:
        data = colours.shown_values(np.round(rng.lognormal(1.5, 1.1, (30, 60))), "count", scaling)
    size = M.FigureSize(900, 700, 100, 1.15)
    norm, _ = colours.scale_norm([data], scaling)
    fig = M.ImageFigure(size, extent=(0, 2, 0, 1), xlabel="x", ylabel="y", clabel="particles",
                        cmap="viridis", equal=True).show(data, norm, "colours")
    named = _bar_colours(fig.fig, fig.cax)
    checked = 0
    for text, bar_rgb in named:
        v = _label_value(text)
        if v is None or not (data == v).any():
            continue
        img_rgb = _pixel_of(fig.fig, fig.ax, data, v)
        assert np.abs(bar_rgb - img_rgb).max() <= 8, (scaling, text, bar_rgb, img_rgb)
        checked += 1
    assert checked >= 2, named
    # the bar starts at the smallest value: its lowest label is the smallest count drawn
    if scaling == "eq_hist":
        assert named[0][0] == f"{int(np.nanmin(data))}"


def test_eq_hist_ticks_run_from_the_smallest_value_at_the_bottom_to_the_largest_at_the_top():
    data = np.array([1.0] * 500 + [2.0] * 200 + [3.0] * 50 + [8.0] * 5)
    norm = colours.eq_hist_norm(data, 1.0, 8.0)
    values, where, labels = M.eq_hist_ticks(norm)
    assert values[0] == 1.0 and where[0] == 0.0 and values[-1] == 8.0 and where[-1] == 1.0
    assert np.all(np.diff(where) > 0) and np.all(np.diff(values) > 0)
    assert labels[0] == "1" and labels[-1] == "8"
    # each sits where its colour is: norm(v) rescaled into the used part of the palette
    np.testing.assert_allclose(where, (np.asarray(norm(values)) - norm.lowest) / (1 - norm.lowest))


def test_an_image_swapped_into_a_laid_out_figure_is_the_figure_built_afresh():
    rng = np.random.default_rng(6)
    size = M.FigureSize(480, 360, 80, 1.15)

    def fresh(data, title):
        f = M.ImageFigure(size, extent=(0, 2, 0, 1), xlabel="x", ylabel="y", clabel="particles",
                          cmap="magma", equal=True)
        return f.show(data, colours.scale_norm([data], "eq_hist")[0], title).pixels()

    reused = M.ImageFigure(size, extent=(0, 2, 0, 1), xlabel="x", ylabel="y", clabel="particles",
                           cmap="magma", equal=True)
    for k, lam in enumerate((2.0, 2.5, 30.0, 2.0)):
        data = _counts(rng, lam=lam)
        got = reused.show(data, colours.scale_norm([data], "eq_hist")[0], f"snapshot #{k}").pixels()
        np.testing.assert_array_equal(got, fresh(data, f"snapshot #{k}"))
        np.testing.assert_array_equal(reused.drawn(), data)


def test_census_blocks_are_coloured_by_their_count():
    rng = np.random.default_rng(2)
    lay = _layout()
    df = pd.concat([_census(rng, lay).assign(species=s) for s in ("a", "b")])
    rec = D.census_map(df, lay, "census")
    fig = M.census_map(rec, M.FigureSize(640, 480, 80))
    faces = fig.axes[0].collections[0].get_facecolors()
    # outside reference: numpy bincount of the per-species rows, through the palette
    ref = np.bincount(df["block"], weights=df["count"], minlength=lay.nblocks)
    want = colours.colour_map("viridis")(ref[rec.table["block"].to_numpy()] / rec.clim[1])
    np.testing.assert_allclose(faces, want)
    assert len(fig.axes[0].texts) == lay.nblocks        # every count written


def test_transfer_matrix_puts_from_on_x_and_to_on_y():
    rng = np.random.default_rng(3)
    f, t = rng.integers(0, 5, 400), rng.integers(0, 5, 400)
    moves = pd.DataFrame({"from_block": f, "to_block": t}).value_counts().rename("count").reset_index()
    fig = M.transfer_matrix(D.transfer_matrix(moves, "moves"), M.FigureSize(640, 480, 80))
    img = fig.axes[0].get_images()[0]
    drawn = np.ma.filled(img.get_array().astype(float), np.nan)     # rows: to block, from the bottom
    ref = pd.crosstab(pd.Series(f, name="from"), pd.Series(t, name="to")).to_numpy().astype(float)
    np.fill_diagonal(ref, np.nan)                                   # those that stayed: left out
    np.testing.assert_array_equal(drawn, ref.T)
    assert img.origin == "lower" and img.get_extent() == [-0.5, 4.5, -0.5, 4.5]


def test_deposit_cell_ix_iy_is_drawn_where_it_belongs():
    lay = _layout()                            # 16 x 8 cells over [0, 2) x [0, 1)
    grid = np.zeros((16, 8))
    grid[3, 6] = 5.0                           # [ix, iy], as numpy.histogramdd orders it
    rec = D.deposit_map(grid, lay, "deposit")
    fig = M.show_deposit(M.deposit_figure(rec, M.FigureSize(640, 480, 80)), rec)
    ax = fig.ax
    px = fig.pixels()
    h = px.shape[0]
    hot = np.asarray(colours.colour_map("viridis")(1.0)[:3]) * 255
    for (cx, cy), is_hot in (((3.5 * 0.125, 6.5 * 0.125), True), ((6.5 * 0.125, 3.5 * 0.125), False)):
        X, Y = ax.transData.transform((cx, cy))
        rgb = px[int(round(h - Y)), int(round(X))]
        assert (np.abs(rgb - hot).max() <= 2) == is_hot


def test_drift_has_a_panel_per_total_and_the_verdict_above():
    fig = M.drift_curves(D.drift_curves(_drift(), 1e-3, "drift"), M.FigureSize(900, 700, 100, 1.15))
    assert [a.get_title() for a in fig.axes] == ["count", "charge (out at 2)"]
    assert "left the band ±0.001" in fig._suptitle.get_text()
    assert fig.axes[0].get_legend() is not None
    assert len(fig.axes[1].collections) == 1            # the exit crosses


def test_export_never_imports_the_screens_plotting_stack(tmp_path):
    from _export_samples import LAYOUT_ARGS, write_npz_run
    run, _ = write_npz_run(str(tmp_path / "run"), n=300, snapshots=2)
    code = ("import sys; from swarmaudit.app.cli import main; "
            f"rc = main(['export', {run!r}, '--out', {str(tmp_path / 'out')!r}, '--quiet', "
            f"*{LAYOUT_ARGS!r}, '--cmap', 'fire']); "
            "print(rc, sorted(m for m in ('holoviews', 'bokeh', 'panel', 'matplotlib.pyplot') "
            "if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip().splitlines()[-1] == "0 []"


# the second process that draws -----------------------------------------------------------------------
def _export(run, out, process):
    import dataclasses

    from _export_samples import LAYOUT_ARGS
    from swarmaudit.app.cli import build_parser
    from swarmaudit.app.export import ExportOptions, export_run
    from swarmaudit.app.options import context_from_options
    args = build_parser().parse_args(["export", run, "--out", str(out), *LAYOUT_ARGS, "--quiet",
                                      "--width", "480", "--height", "360", "--dpi", "80"])
    opts = dataclasses.replace(ExportOptions.from_args(args), figure_process=process)
    return export_run(context_from_options(args), opts, args)


def test_figures_drawn_by_the_second_process_are_the_ones_drawn_here(tmp_path):
    from _export_samples import write_npz_run
    run, _ = write_npz_run(str(tmp_path / "run"), n=800, snapshots=3)
    there = _export(run, tmp_path / "there", True)
    here = _export(run, tmp_path / "here", False)
    names = sorted(os.path.basename(f.path) for f in here.figures)
    assert names == sorted(os.path.basename(f.path) for f in there.figures) and len(names) == 17
    for a, b in zip(sorted(f.path for f in here.figures), sorted(f.path for f in there.figures)):
        assert open(a, "rb").read() == open(b, "rb").read(), os.path.basename(a)


def _jobs(tmp_path, n=6):
    rng = np.random.default_rng(8)
    rec = D.rank_bars(pd.DataFrame({"rank": range(3), "count": [4, 5, 6]}), None, "ranks")
    dep = D.deposit_map(rng.random((16, 8)), _layout(), "deposit")
    jobs = [("rank_bars", rec, str(tmp_path / f"r{k}.png")) for k in range(n)]
    return jobs + [("deposit", dep, str(tmp_path / "d.png"))]


def test_a_drawing_error_in_the_second_process_is_raised_by_the_export(tmp_path):
    from swarmaudit.app.figure_writer import FigureWriter
    size = M.FigureSize(300, 240, 100)
    for process in (True, False):
        writer = FigureWriter(size, 10, process)
        assert writer.in_process == process
        with pytest.raises(AttributeError):
            with writer:
                writer.submit("rank_bars", None, str(tmp_path / "broken.png"))   # no record
                writer.finish()
        assert not writer.in_process


def test_jobs_of_a_second_process_that_died_are_drawn_here(tmp_path):
    from swarmaudit.app.figure_writer import FigureWriter
    writer = FigureWriter(M.FigureSize(300, 240, 100), 10, True)
    assert writer.in_process
    writer._child.kill()
    for job in _jobs(tmp_path):
        writer.submit(*job)
    writer.finish()
    for _, _, path in _jobs(tmp_path):
        with Image.open(path) as im:
            assert im.size == (300, 240)


def test_a_drawing_process_started_early_is_taken_by_the_writer_or_ended(tmp_path):
    from _need import need_that
    from swarmaudit.app import figure_writer as W
    need_that(W.spare_core(), "a second core for the drawing process")
    size = M.FigureSize(300, 240, 100)
    W.prestart()
    early = W._EARLY[0]
    writer = W.FigureWriter(size, 10)
    assert not W._EARLY and writer._child is early
    for job in _jobs(tmp_path):
        writer.submit(*job)
    writer.finish()
    assert early.poll() == 0                      # ended when the export was done with it
    for _, _, path in _jobs(tmp_path):
        assert Image.open(path).size == (300, 240)
    W.prestart()
    early = W._EARLY[0]
    few = W.FigureWriter(size, 1)                 # too few figures: drawn here, the process ended
    assert not few.in_process and not W._EARLY and early.poll() is not None
