"""Comparing two served runs in the dashboard: the reference in the link, the difference view, the
Compare tab.

Outside references: numpy.histogram2d of both runs' particles on the view's edges (the difference
image), and the ``compare_*.csv`` files ``swarmaudit compare --out`` writes for the same two runs
(the Compare tab's tables).
"""

from __future__ import annotations

import time
from urllib.parse import urlencode

import numpy as np
import pandas as pd
import pytest
from dash_fixtures import link_figures_of, memory_context, server_of

from swarmaudit.app import view_policy as policy
from swarmaudit.app.dashboard import Dashboard, build_page
from swarmaudit.app.state import URL_KEYS, ViewState, link_query
from swarmaudit.audit.compare import pair_snapshots


@pytest.fixture
def server():
    # the reference has one snapshot more at the start: candidate snapshot j pairs with
    # reference snapshot j + 1 by step; other particles (seed), so the difference is not zero
    return server_of(("ref", memory_context(nsnap=4, n=3000, name="ref", seed=0)),
                     ("cand", memory_context(nsnap=3, n=3000, name="cand", seed=50, first=1)),
                     ("third", memory_context(nsnap=2, n=500, name="third", seed=7)))


def test_the_comparison_state_round_trips_through_the_link(server):
    a = ViewState(server.runs, run="cand")
    a.param.update(reference="ref", pair_by="time", show="difference", snapshot=2, side="compare",
                   species="beam_left")
    search = urlencode(a.query())
    b = ViewState(server.runs)
    assert b.apply_query(link_query("?" + search)) == []
    assert b.link_notes == []
    for p in URL_KEYS:
        assert getattr(b, p) == getattr(a, p), p
    assert (b.run, b.reference, b.pair_by, b.show) == ("cand", "ref", "time", "difference")


@pytest.mark.parametrize("key,value", [
    ("ref", "cand"),                 # the run in view is not its own reference
    ("ref", "nobody"), ("ref", "../../etc/passwd"), ("ref", "/runs/ref"),
    ("show", "both"), ("show", ""), ("pair", "id"), ("pair", "0"),
])
def test_bad_comparison_values_are_dropped_with_the_note(server, key, value):
    dash, _ = build_page(server, link_query(urlencode({"run": "cand", key: value, "snap": 1})))
    s = dash.state
    assert s.snapshot == 1                                # the rest of the link is kept
    default = {"ref": "", "show": "candidate", "pair": "step"}[key]
    inverse = {v: k for k, v in URL_KEYS.items()}
    assert getattr(s, inverse[key]) == default
    assert any(f"The link's '{key}' value was left out" in n for n in s.link_notes), s.link_notes
    assert dash.link_note.visible
    assert all(value not in n for n in s.link_notes if value)       # never echoed back


def test_the_reference_menu_offers_the_other_runs_only(server):
    s = ViewState(server.runs, run="cand")
    assert s.param.reference.objects == ["", "ref", "third"]
    s.reference = "ref"
    s.run = "ref"                      # the reference became the run in view: no reference
    assert s.reference == "" and s.param.reference.objects == ["", "cand", "third"]


def _hist(frame, xcol, ycol, view, weights=None):
    nx, ny = view.grid
    h, _, _ = np.histogram2d(frame[xcol], frame[ycol], bins=[nx, ny],
                             range=[view.x_range, view.y_range], weights=weights)
    return h.T


def _image(overlay):
    return overlay.get(0)


@pytest.mark.parametrize("which,xr,yr,color_by", [
    ("space", (0.0, 4.0), (0.0, 2.0), "count"),
    ("phase", (0.0, 4.0), (-2.0, 2.0), "weight"),
])
def test_the_difference_is_candidate_minus_reference_on_one_grid(server, which, xr, yr, color_by):
    s = ViewState(server.runs, run="cand")
    s.param.update(reference="ref", show="difference", snapshot=1, species="beam_right",
                   color_by=color_by)
    dash = Dashboard(s, server)
    out = dash.render_view(which, x_range=xr, y_range=yr, snapshot=1)
    view, agg = dash.shown[which]
    assert (view.x_range, view.y_range) == (xr, yr)
    # the pair is the one swarmaudit compare makes: by step, candidate 1 (step 20) with reference 2
    pairs = dict((j, i) for i, j in pair_snapshots(server.runs["ref"].ctx, server.runs["cand"].ctx).pairs)
    assert pairs[1] == 2 == dash.side.reference_snapshot(1)
    cand = server.runs["cand"].ctx.run[1].species["beam_right"]
    ref = server.runs["ref"].ctx.run[2].species["beam_right"]
    xcol, ycol = view.xcol, view.ycol
    w = (lambda f: f["weight"]) if color_by == "weight" else (lambda f: None)
    expected = _hist(cand, xcol, ycol, view, w(cand)) - _hist(ref, xcol, ycol, view, w(ref))
    img = _image(out)
    got = np.nan_to_num(img.dimension_values(2, flat=False))
    assert np.abs(expected).max() > 0                   # the two runs do differ here
    np.testing.assert_allclose(got, expected, atol=1e-9)
    # a pixel empty in both runs is left transparent, never drawn as a zero difference
    both_empty = (_hist(cand, xcol, ycol, view) == 0) & (_hist(ref, xcol, ycol, view) == 0)
    assert np.isnan(img.dimension_values(2, flat=False)[both_empty]).all()
    # a diverging map centred on zero, symmetric limits that hold the largest difference
    opts = img.opts.get("plot", backend="bokeh").kwargs
    m = float(np.abs(expected).max())
    assert opts["clim"] == pytest.approx((-m, m))
    assert img.opts.get("style", backend="bokeh").kwargs["cmap"] == policy.DIFFERENCE_CMAP
    assert opts["cnorm"] == "linear"
    assert "candidate − reference" in dash._status[which].object


def test_reference_and_candidate_share_the_canvas(server):
    s = ViewState(server.runs, run="cand")
    s.param.update(reference="ref", snapshot=0, species="beam_left")
    dash = Dashboard(s, server)
    grids = {}
    for show in ("candidate", "reference"):
        s.show = show
        out = dash.render_view("phase", snapshot=0)
        view, agg = dash.shown["phase"]
        grids[show] = (view.x_range, view.y_range, view.grid)
        f = (server.runs["cand"].ctx.run[0] if show == "candidate" else server.runs["ref"].ctx.run[1])
        np.testing.assert_array_equal(np.nan_to_num(_image(out).dimension_values(2, flat=False)),
                                      _hist(f.species["beam_left"], view.xcol, view.ycol, view))
    assert grids["candidate"] == grids["reference"]
    assert "ref #1" in dash._status["phase"].object


@pytest.mark.parametrize("show", ["difference", "reference"])
def test_a_comparing_link_exports_the_screens_picture(server, show, tmp_path):
    from swarmaudit.app.export import ExportOptions, export_run
    from swarmaudit.app.mpl_figures import FigureSize, draw_job
    from swarmaudit.app import figure_data as D
    link = ("http://127.0.0.1:5006/?" + urlencode({"run": "cand", "ref": "ref", "show": show,
                                                    "snap": 1, "sp": "beam_right"}))
    dash, _ = build_page(server, link_query(link.split("?", 1)[1]))
    assert dash.state.link_notes == []
    for which in ("space", "phase"):
        dash.render_view(which)
    cand, ref = server.runs["cand"].ctx, server.runs["ref"].ctx
    res = export_run(cand, ExportOptions(out=str(tmp_path / "out"), snapshots="1", view=link,
                                         quiet=True), keep_aggregates=True, reference=ref)
    linked = link_figures_of(dash, res)
    for rec in linked.values():
        assert rec.view["cmap"] == (policy.DIFFERENCE_CMAP if show == "difference" else policy.DEFAULT_CMAP)
    # the outside reference: numpy.histogram2d of the paired snapshots (candidate 1, reference 2)
    view, agg = dash.shown["space"]
    c = cand.run[1].species["beam_right"]
    r = ref.run[2].species["beam_right"]
    expected = _hist(r, view.xcol, view.ycol, view)
    if show == "difference":
        expected = _hist(c, view.xcol, view.ycol, view) - expected
    np.testing.assert_allclose(np.nan_to_num(np.asarray(linked["space"].aggregate.values)), expected)
    if show == "difference":     # drawn centred on zero: a zero difference is the map's middle
        data, extent = D.density_data(view, agg)
        assert np.isfinite(data).any() and (data[np.isfinite(data)] == 0).any()
        path = str(tmp_path / "d.png")
        laid_out = {}
        draw_job(("density", (view, data, extent), path), FigureSize(400, 300, 100), laid_out)
        fig = next(iter(laid_out.values()))
        assert fig.im.norm.vmin == -fig.im.norm.vmax == -float(np.nanmax(np.abs(data)))


def test_a_comparing_link_without_the_reference_says_what_it_drew(server, tmp_path):
    from swarmaudit.app.export import ExportOptions, export_run
    link = "?" + urlencode({"run": "cand", "ref": "ref", "show": "difference", "snap": 1})
    res = export_run(server.runs["cand"].ctx, ExportOptions(out=str(tmp_path / "o"), snapshots="1",
                                                            view=link, quiet=True))
    assert any("give --reference RUN" in n and "'ref'" in n for n in res.notes), res.notes
    assert any(r.path.endswith("link_space.png") for r in res.figures)


def test_the_notebook_view_takes_a_reference_run(server):
    from swarmaudit.app.api import AuditedRun
    cand = AuditedRun(server.runs["cand"].ctx)
    ref = AuditedRun(server.runs["ref"].ctx)
    col = cand.view("space", reference=ref, show="difference", snapshot=1, species="beam_right")
    dash = cand._last_dashboard
    assert (dash.state.reference, dash.state.show) == (ref.name, "difference")
    dash.render_view("space")
    view, agg = dash.shown["space"]
    c = server.runs["cand"].ctx.run[1].species["beam_right"]
    r = server.runs["ref"].ctx.run[2].species["beam_right"]
    np.testing.assert_allclose(np.nan_to_num(np.asarray(agg.values)),
                               _hist(c, view.xcol, view.ycol, view) - _hist(r, view.xcol, view.ycol, view))
    assert col is not None


def test_a_snapshot_without_a_partner_says_so(server):
    s = ViewState(server.runs, run="ref")
    s.param.update(reference="cand", show="difference", snapshot=0)   # step 0: not in cand
    dash = Dashboard(s, server)
    dash.render_view("space", snapshot=0)
    assert "no partner" in dash._status["space"].object
    assert "no partner" in dash.side.compare_panel().object
    s.show = "candidate"
    dash.render_view("space", snapshot=0)
    assert "particles binned" in dash._status["space"].object


def _wait_for_tables(dash, timeout=60):
    deadline = time.time() + timeout
    while not dash.side.compare_shown and time.time() < deadline:
        time.sleep(0.1)
        dash.side.compare_panel()        # no event loop here: look again, as the page's timer would
    assert dash.side.compare_shown, "the comparison did not finish"
    return dash.side.compare_shown


def _write_run(folder, seed, renumber=0.0):
    """The browser tests' two-beam run; ``renumber``: that share of beam_left gets new ids (so that
    ``compare`` also compares that species as distributions)."""
    import glob

    import h5py
    from test_browser_e2e import write_run
    write_run(str(folder), snapshots=3, n=3000, seed=seed)
    for path in glob.glob(str(folder / "*.h5")) if renumber else []:
        with h5py.File(path, "r+") as f:
            ids = f["beam_left/id"][...]
            ids[: int(renumber * ids.size)] += 10**6
            f["beam_left/id"][...] = ids
    return str(folder)


@pytest.mark.parametrize("species", ["beam_left", "all"])
def test_the_compare_tab_shows_the_clis_tables_for_the_pair(tmp_path, species):
    from swarmaudit.app.cli import build_parser, main
    from swarmaudit.app.options import contexts_from_options
    from swarmaudit.app.view_policy import run_name
    ref, cand = _write_run(tmp_path / "ref", 3), _write_run(tmp_path / "cand", 4, renumber=0.6)
    assert main(["compare", ref, cand, "--out", str(tmp_path / "cmp"), "--quiet"]) in (0, 1)
    ctxs = contexts_from_options(build_parser().parse_args(["serve", ref, cand]))
    server = server_of(*((run_name(c), c) for c in ctxs))
    dash, _ = build_page(server, {"run": "cand", "ref": "ref", "snap": "2", "sp": species,
                                  "tab": "compare"})
    shown = _wait_for_tables(dash)
    assert set(shown) == set(policy.COMPARE_TABLE_TITLES)
    for name, got in shown.items():
        cli = pd.read_csv(tmp_path / "cmp" / name, keep_default_na=False)
        want = cli[(cli["ref_snapshot"] == 2) & (cli["cand_snapshot"] == 2)]
        if species != "all":
            want = want[want["species"].astype(str) == species]
        assert len(want), name          # every table has rows for this pair and species
        back = pd.read_csv(pd.io.common.StringIO(got.to_csv(index=False)), keep_default_na=False)
        pd.testing.assert_frame_equal(back.reset_index(drop=True), want.reset_index(drop=True),
                                      check_dtype=False)
    # the page holds each table as a widget: the worst particles' ids among them
    import panel as pn
    widgets = dash.side._compare.select(pn.widgets.Tabulator)
    worst = shown["compare_worst.csv"]
    assert any("id" in w.value and w.value["id"].tolist() == worst["id"].tolist() for w in widgets)
