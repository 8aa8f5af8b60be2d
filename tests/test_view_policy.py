"""One view policy for the screen and the export; edited link values are refused, never crash.

The picture a dashboard link shows and the picture ``export --view LINK``
writes are compared array for array, and both against numpy.histogram2d of
the same particles on the same edges (the outside reference).
"""

import numpy as np
import pytest
from dash_fixtures import link_figures_of, memory_context, server_of

from swarmaudit.app import view_policy as policy
from swarmaudit.app.dashboard import build_page
from swarmaudit.app.export import ExportOptions, export_run
from swarmaudit.app.state import ViewState, link_query


@pytest.fixture
def ctx():
    return memory_context(nsnap=3, n=3000)


@pytest.fixture
def server(ctx):
    return server_of((policy.run_name(ctx), ctx))     # the name serve gives the run


@pytest.fixture
def runs(server):
    return server.runs


LINK = ("http://127.0.0.1:5006/?snap=1&sp=beam_left&sx=x&sy=y&px=x&py=vx"
        "&sxr=%5B0.5%2C+3.5%5D&syr=%5B0.25%2C+1.75%5D&scale=log&color=weight&tab=drift")


def test_a_link_exported_headlessly_is_the_screens_picture(ctx, server, tmp_path):
    dash, _ = build_page(server, link_query(LINK.split("?", 1)[1]))
    assert dash.state.link_notes == []
    for which in ("space", "phase"):
        dash.render_view(which)
    res = export_run(ctx, ExportOptions(out=str(tmp_path / "out"), snapshots="1", view=LINK,
                                        quiet=True), keep_aggregates=True)
    linked = link_figures_of(dash, res)
    for which in ("space", "phase"):
        view, agg = dash.shown[which]
        rec = linked[which]
        assert rec.view["cmap"] == view.cmap == policy.DEFAULT_CMAP
        assert rec.view["scaling"] == view.scaling == "log"
        assert rec.view["reduction"] == view.reduction == "sum"
    assert dash.shown["space"][0].x_range == (0.5, 3.5)     # the link's zoom, on both
    # and the picture is the weighted histogram of those particles (numpy as the reference)
    view, agg = dash.shown["space"]
    f = ctx.run[1].species["beam_left"]
    ref, _, _ = np.histogram2d(f["x"], f["y"], bins=list(view.grid),
                               range=[view.x_range, view.y_range], weights=f["weight"])
    np.testing.assert_allclose(np.nan_to_num(np.asarray(agg.values)), ref.T)


def test_export_views_are_the_policys_view_of_the_same_state(ctx, runs, tmp_path):
    res = export_run(ctx, ExportOptions(out=str(tmp_path / "out"), snapshots="first", quiet=True),
                     keep_aggregates=True)
    rec = next(r for r in res.figures if r.kind == "space" and r.species == "beam_right")
    s = ViewState(runs, snapshot=0, species="beam_right")
    frames = [ctx.run[0].species[sp] for sp in ("beam_right", "beam_left")]
    view = policy.particle_view(s, "space", frames=frames, box=policy.figure_box(900, 700))
    assert rec.title == view.title and rec.view["cmap"] == s.cmap == policy.DEFAULT_CMAP
    assert (rec.view["width"], rec.view["height"]) == view.grid
    np.testing.assert_array_equal(rec.aggregate.values, view.aggregate(frames[0]).values)
    # a position view opens on the layout's domain, on the screen as in the export
    assert view.x_range == (0.0, 4.0) and view.y_range == (0.0, 2.0)


def test_one_default_colour_map_and_scale_everywhere(runs):
    from swarmaudit.app.cli import build_parser
    args = build_parser().parse_args(["export", "run", "--out", "o"])
    assert args.cmap == ExportOptions(out="o").cmap == ViewState(runs).cmap == policy.DEFAULT_CMAP
    assert args.scale == ExportOptions(out="o").scale == ViewState(runs).scaling


def test_grid_is_one_bin_per_pixel_with_many_particles_and_coarser_with_few():
    # common practice: a density image wants several particles per bin, else it is speckle
    assert policy.grid_size((560, 440), 10_000_000, (0, 1), (0, 1), equal=False) == (560, 440)
    w, h = policy.grid_size((560, 440), 50_000, (0, 1), (0, 1), equal=False)
    assert 50_000 / (w * h) == pytest.approx(policy.PER_BIN, rel=0.05)
    assert min(policy.grid_size((560, 440), 10, (0, 1), (0, 1), equal=False)) == policy.MIN_BINS
    # two position axes keep square bins
    w, h = policy.grid_size((560, 440), 10_000_000, (0, 8), (0, 4), equal=True)
    assert (w, h) == (560, 280)


# ---------------------------------------------------------------------------------------------
# edited link values (found by a probe on loopback): refused with a note, the view keeps its default

PROBES = [
    ("sxr", "[1,1]", "upper end above"),
    ("sxr", "[-1e308,1e308]", "too wide"),
    ("sxr", "[NaN,Infinity]", "finite"),
    ("pxr", "[NaN,1]", "finite"),
    ("pyr", "[-1e308,1e308]", "too wide"),
    ("syr", "[1e6,1000001]", "far away from the data"),
    ("sxr", "[0.5,0.5000000000001]", "narrower than the data"),
    ("slabr", "[3,-3]", "upper end above"),
    ("sel", "[0,NaN,1,1]", "finite"),
    ("snap", "9" * 4400, "longer than"),
    ("sxr", "[" + "1" * 4400 + ",2]", "longer than"),
]


@pytest.mark.parametrize("key,value,why", PROBES)
def test_an_edited_link_value_is_dropped_with_a_note_and_the_views_draw(server, key, value, why):
    dash, _ = build_page(server, link_query(f"snap=1&{key}={value}"))
    s = dash.state
    assert s.space_xr is None and s.space_yr is None and s.phase_xr is None and s.phase_yr is None
    assert s.select_box is None and s.slab_range is None
    assert any(f"'{key}'" in n and why in n for n in s.link_notes), s.link_notes
    assert all(value[:12] not in n for n in s.link_notes)          # never echoed back
    assert dash.link_note.visible and why in dash.link_note.object
    for which in ("space", "phase"):
        dash.render_view(which)
        assert "particles binned" in dash._status[which].object
    opening = dash.shown["space"][0].opening
    assert dash.shown["space"][0].x_range == opening[0]
    assert key not in s.query() or key == "snap"          # the page's own link leaves it out


def test_a_range_set_directly_is_checked_by_the_parameter(runs):
    s = ViewState(runs)
    for bad in [(1.0, 1.0), (2.0, 1.0), (float("nan"), 1.0), (-1e308, 1e308), (0.0, float("inf"))]:
        with pytest.raises(ValueError):
            s.space_xr = bad
    s.space_xr = (0.5, 1.5)
    assert s.space_xr == (0.5, 1.5)


def test_a_zoom_too_far_from_the_data_draws_the_opening_range(server):
    dash, _ = build_page(server, {})
    dash.render_view("space", x_range=(-1e12, 1e12), y_range=(0.0, 1.0))
    view, _ = dash.shown["space"]
    assert view.x_range == view.opening[0] and view.notes
    assert dash.state.space_xr is None                     # not stored in the link either


def test_old_tab_names_in_links_still_open_their_panel(server):
    assert build_page(server, {"tab": "moves"})[0].state.side == "migration"
    assert build_page(server, {"tab": "totals"})[0].state.side == "drift"


def test_names_are_one_per_thing():
    # tabs are named as the tables and report sections they show
    assert policy.PANELS["migration"] == "Migration" and policy.PANELS["drift"] == "Drift"
    from swarmaudit.app.export import TABLE_NAMES
    assert {"migration.csv", "drift.csv"} <= set(TABLE_NAMES)
    # every column of the migration summary has its label, the label follows the column's name
    from swarmaudit.app.export import _empty_migration
    cols = [c for c in _empty_migration()[1].columns if c not in ("from_snapshot", "to_snapshot", "species")]
    assert set(cols) == set(policy.SUMMARY_LABELS)
    assert policy.SUMMARY_LABELS["migrated"] == "migrated"
    assert "per step" in policy.SUMMARY_LABELS["over_one_cell"]


def test_the_comparison_speaks_the_compare_commands_words():
    # the run in view is the candidate, the chosen run the reference, as in `swarmaudit compare`;
    # each compare_*.csv table has its heading on the Compare tab, each pairing rule its button
    from swarmaudit.app.state import SHOWS
    from swarmaudit.audit.compare import PAIR_BY, TABLE_NAMES
    assert set(policy.COMPARE_TABLE_TITLES) == set(TABLE_NAMES)
    assert set(policy.PAIR_LABELS) == set(PAIR_BY)
    assert SHOWS == ("candidate", "reference", "difference") == tuple(policy.SHOW_LABELS)
    assert policy.PANELS["compare"] == "Compare"
    assert policy.DIFFERENCE_MEANS == "candidate − reference"
    from swarmaudit.app import compare_figures
    assert compare_figures.DIFFERENCE_CMAP == policy.DIFFERENCE_CMAP       # one map, screen and files
