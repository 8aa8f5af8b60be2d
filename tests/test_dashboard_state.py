"""ViewState, shared links and the dashboard's views, built without a server.

Counts shown on screen are checked against numpy.histogram2d of the same
particles on the same edges; selection counts and weights against numpy masks.
"""

import time

import numpy as np
import pytest
from dash_fixtures import memory_context, server_of, two_beam_snapshot

from swarmaudit.app import render, view_policy
from swarmaudit.app.dashboard import Dashboard, build_page
from swarmaudit.app.state import URL_KEYS, ViewState


@pytest.fixture
def server():
    return server_of(("beams", memory_context(nsnap=4, n=3000, nan_at=2, bad_at=3)),
                     ("single", memory_context(nsnap=1, n=500, name="single")))


@pytest.fixture
def runs(server):
    return server.runs


def test_defaults_follow_roles(runs):
    s = ViewState(runs)
    assert s.run == "beams" and s.species == "all"
    assert (s.space_x, s.space_y) == ("x", "y")
    assert (s.phase_x, s.phase_y) == ("x", "vx")      # x against its own velocity component
    assert s.param.snapshot.bounds == (0, 3)
    assert set(s.param.species.objects) == {"beam_right", "beam_left", "all"}


def test_link_round_trip_reopens_the_same_view(runs):
    a = ViewState(runs)
    a.param.update(snapshot=2, species="beam_left", space_x="vx", space_y="y", phase_y="vy",
                   color_by="mean", color_column="vy", scaling="log", cmap="kbc", blocks="tinted",
                   side="drift", rtol=2.5e-4, hist_column="weight")
    a.param.update(space_xr=(0.25, 0.75), space_yr=(-1.0, 1.5),
                   select_view="space", select_box=(0.1, 0.2, 0.6, 1.0))
    q = a.query()
    assert set(q) <= set(URL_KEYS.values())
    b = ViewState(runs)
    assert b.apply_query(q) == []
    for p in URL_KEYS:
        assert getattr(b, p) == getattr(a, p), p


@pytest.mark.parametrize("key,value", [
    ("run", "../../etc/passwd"), ("run", "/etc/passwd"), ("sp", "nobody"), ("sx", "/etc/passwd"),
    ("snap", 99), ("snap", 1.5), ("snap", "1; rm -rf /"), ("cmap", "__import__('os')"),
    ("sxr", [1, float("nan")]), ("sxr", [2, 1]), ("sxr", "[0, 1e999]"), ("rtol", -1),
    ("sel", [0, 1]), ("blocks", "all"),
])
def test_bad_query_values_are_refused_one_by_one(runs, key, value):
    s = ViewState(runs)
    before = {p: getattr(s, p) for p in URL_KEYS}
    refused = s.apply_query({key: value, "snap": 1} if key != "snap" else {key: value, "sp": "beam_left"})
    assert key in refused
    assert s.snapshot == (1 if key != "snap" else before["snapshot"])
    changed = {p for p in URL_KEYS if getattr(s, p) != before[p]}
    assert {URL_KEYS[p] for p in changed} <= {"snap", "sp"}


def test_selectors_refuse_values_set_directly(runs):
    s = ViewState(runs)
    with pytest.raises(ValueError):
        s.run = "../../etc/passwd"
    with pytest.raises(ValueError):
        s.space_x = "not_a_column"


def test_axis_change_clears_zoom_and_that_views_selection(runs):
    s = ViewState(runs)
    s.param.update(space_xr=(0, 1), space_yr=(0, 1), select_view="space", select_box=(0, 0, 1, 1))
    s.space_x = "vx"
    assert s.space_xr is None and s.select_box is None


def _image_counts(overlay):
    img = overlay.get(0)
    return np.nan_to_num(img.dimension_values(2, flat=False))


def test_space_view_equals_histogram2d(runs, server):
    s = ViewState(runs)
    s.species = "beam_right"
    dash = Dashboard(s, server)
    frame = s.frame()
    xr, yr = (0.0, 4.0), (0.0, 2.0)
    out = dash.render_view("space", x_range=xr, y_range=yr, snapshot=0)
    nx, ny = dash.shown["space"][0].grid
    # the policy keeps square bins: 128 x 64 here, so dyadic bin sizes (1/32) make both sides
    # round the same way at bin edges
    assert (nx, ny) == (128, 64)
    ref, _, _ = np.histogram2d(frame["x"], frame["y"], bins=[nx, ny], range=[xr, yr])
    got = _image_counts(out)
    np.testing.assert_array_equal(got, ref.T)
    assert s.space_xr == xr and s.space_yr == yr     # the zoom is part of the state (and link)


def test_weight_colouring_sums_weights(runs, server):
    s = ViewState(runs)
    s.param.update(species="beam_left", color_by="weight")
    dash = Dashboard(s, server)
    f = s.frame()
    out = dash.render_view("phase", x_range=(0.0, 4.0), y_range=(-2.0, 2.0), snapshot=0)
    nx, ny = dash.shown["phase"][0].grid
    ref, _, _ = np.histogram2d(f["x"], f["vx"], bins=[nx, ny], range=[(0.0, 4.0), (-2.0, 2.0)],
                               weights=f["weight"])
    np.testing.assert_allclose(_image_counts(out), ref.T)


def test_linked_selection_counts_and_weight(runs, server):
    s = ViewState(runs)
    s.species = "beam_right"
    dash = Dashboard(s, server)
    f = s.frame()
    box = (0.5, 0.25, 2.0, 1.5)
    s.param.update(select_view="space", select_box=box)
    inside = (f["x"] >= 0.5) & (f["x"] <= 2.0) & (f["y"] >= 0.25) & (f["y"] <= 1.5)
    n, w = render.selection_summary(f, render.box_mask(f, "x", "y", box))
    assert n == int(inside.sum()) and w == pytest.approx(float(f["weight"][inside].sum()))
    assert f"**{n:,}**" in dash.selection_info.object
    # the phase view draws the selected particles as a second layer: its pixels are exactly
    # those where a selected particle falls
    xr, yr = (0.0, 4.0), (-2.0, 2.0)
    out = dash.render_view("phase", x_range=xr, y_range=yr, snapshot=0, select_box=box,
                           select_view="space")
    layer = out.get(1).dimension_values(2, flat=False)
    nx, ny = dash.shown["phase"][0].grid
    ref, _, _ = np.histogram2d(f["x"][inside], f["vx"][inside], bins=[nx, ny], range=[xr, yr])
    np.testing.assert_array_equal(layer > 0, ref.T > 0)


def test_nan_positions_are_reported(runs, server):
    s = ViewState(runs)
    s.param.update(species="beam_right", snapshot=2)
    dash = Dashboard(s, server)
    dash.render_view("space", snapshot=2)
    assert "7 with NaN/inf coordinates left out" in dash._status["space"].object


def test_unreadable_snapshot_shows_a_message_and_the_rest_works(runs, server):
    s = ViewState(runs)
    dash = Dashboard(s, server)
    s.snapshot = 3
    assert dash.problem.visible and "truncated" in dash.problem.object
    out = dash.render_view("space", snapshot=3)          # no exception: a message element
    assert "truncated" in dash._status["space"].object
    assert out is not None
    s.snapshot = 1
    assert not dash.problem.visible
    dash.render_view("space", snapshot=1)
    assert "particles binned" in dash._status["space"].object


def test_one_snapshot_run_hides_migration_and_drift(server):
    dash, _ = build_page(server, {"run": "single"})
    assert dash.state.run == "single"
    moves = dash.side.moves_panel()
    totals = dash.side.totals_panel()
    assert "one snapshot" in moves.object and "one snapshot" in totals.object


def test_slab_of_a_3d_run(runs):
    from swarmaudit.core.context import AuditContext
    from swarmaudit.core.frame import Frame, Snapshot
    from swarmaudit.core.layout import regular_layout
    from swarmaudit.core.run import Run, SnapshotRef
    rng = np.random.default_rng(5)
    cols = {a: rng.uniform(0, 1, 5000) for a in ("x", "y", "z")}
    snap = Snapshot("/mem/cube.npz", {"p": Frame("p", 5000, {k: (lambda v=v: v) for k, v in cols.items()})})
    ref = SnapshotRef("cube.npz", ["/mem/cube.npz"])
    ctx = AuditContext(Run([ref], lambda r, m: snap), regular_layout([0, 1] * 3, [4] * 3, [2] * 3))
    cube = server_of(("cube", ctx))
    s = ViewState(cube.runs)
    assert s.slab_axis == "z"
    s.slab_range = (0.25, 0.5)
    dash = Dashboard(s, cube)
    xr, yr = (0.0, 0.5), (0.0, 0.5)
    out = dash.render_view("space", x_range=xr, y_range=yr, snapshot=0, slab_range=s.slab_range)
    nx, ny = dash.shown["space"][0].grid
    assert (nx, ny) == (64, 64)       # square bins of 1/128: dyadic edges
    keep = (cols["z"] >= 0.25) & (cols["z"] < 0.5)
    ref2, _, _ = np.histogram2d(cols["x"][keep], cols["y"][keep], bins=[nx, ny], range=[xr, yr])
    np.testing.assert_array_equal(_image_counts(out), ref2.T)


def test_sessions_share_one_copy_and_one_result(runs, server):
    a, b = ViewState(runs), ViewState(runs)
    assert a.frame() is b.frame()
    assert a.frame()["x"] is b.frame()["x"]
    da, db = Dashboard(a, server), Dashboard(b, server)
    a.snapshot = b.snapshot = 1
    da.side.moves_panel()
    db.side.moves_panel()
    key = ("moves", ("beams",), 0, 1, "all")
    results = server.results
    deadline = time.time() + 30
    while results.get(key) is None and time.time() < deadline:
        time.sleep(0.05)
    moves, summary, disp, steps = results.get(key)
    assert len(results._futures) == 1        # the second session asked for the same future
    # every particle keeps its id between the two snapshots of the fixture
    assert int(summary["matched"].iloc[0]) == 6000 and steps == 10
    assert disp.size == 6000


def test_snapshot_label_names_step_and_time(runs):
    served = runs["beams"]
    assert served.describe(2) == "#2 · step 20 · t = 0.2"
    # the same words title the views on the screen and in the export
    s = ViewState(runs)
    assert served.describe(2) in view_policy.particle_view(s, "space", snapshot=2).title
    assert "unreadable" in served.describe(3) or "step 30" in served.describe(3)


def test_fixture_beams_move_with_their_velocity():
    # guard on the fixture itself: beam_right drifts +x between snapshots
    a, b = two_beam_snapshot(0), two_beam_snapshot(1)
    assert a.frame("beam_right").length == b.frame("beam_right").length


def test_two_servers_in_one_process_share_nothing():
    # two servers may both call their run "beams": each page's census is its own run's
    small = server_of(("beams", memory_context(nsnap=2, n=300)))
    large = server_of(("beams", memory_context(nsnap=2, n=900)))
    counts = []
    for server in (small, large):
        dash = Dashboard(ViewState(server.runs), server)
        blocks, _, _ = dash.side.census(0)
        counts.append(int(blocks["count"].sum()))
    # two species per snapshot in the fixture: 2 n particles (numpy-free count of the fixture)
    assert counts == [600, 1800]
    assert small.results is not large.results and small.runs is not large.runs
