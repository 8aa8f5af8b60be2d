"""``swarmaudit export``: PNGs, the contract tables and report.html, checked against outside counts.

Outside references: numpy.histogram2d (views, census), pandas.crosstab
(migration), plain numpy sums (drift), Pillow (PNG size), base64/HTML parsing
from the standard library, and headless Chromium for the page.
"""

import base64
import io
import os
import re
import subprocess
import sys
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

from _need import need
from PIL import Image

from _export_samples import LAYOUT_ARGS, snapshot_columns, write_npz_run
from swarmaudit.app import render
from swarmaudit.app.cli import build_parser, main
from swarmaudit.app.export import ExportOptions, export_run, select_snapshots
from swarmaudit.app.options import context_from_options
from swarmaudit.core.errors import OptionError

W, H, DPI = 480, 360, 80
SIZE_ARGS = ["--width", str(W), "--height", str(H), "--dpi", str(DPI)]
N = 1500
STEPS, DT = 10, 0.01

CENSUS = ["snapshot", "step", "time", "species", "block", "level", "rank", "count", "weight"]
MIGRATION = ["from_snapshot", "to_snapshot", "species", "from_block", "to_block", "count"]
SUMMARY = ["from_snapshot", "to_snapshot", "species", "matched", "migrated", "created", "lost",
           "max_displacement_cells", "over_one_cell"]
DRIFT = ["snapshot", "step", "time", "species", "quantity", "value", "reference", "relative_drift"]


def _args(run, out, *extra):
    return build_parser().parse_args(["export", str(run), "--out", str(out), *LAYOUT_ARGS,
                                      *SIZE_ARGS, "--quiet", *extra])


@pytest.fixture(scope="module")
def exported(tmp_path_factory):
    base = tmp_path_factory.mktemp("export")
    run, state = write_npz_run(str(base / "run"), n=N, snapshots=3, steps_between=STEPS, dt=DT)
    out = base / "out"
    args = _args(run, out, "--rtol", "1e-9")
    ctx = context_from_options(args)
    res = export_run(ctx, ExportOptions.from_args(args), args, keep_aggregates=True)
    return {"run": run, "out": str(out), "state": state, "res": res, "ctx": ctx}


# snapshots ---------------------------------------------------------------------------------------
def test_snapshot_selection():
    assert select_snapshots("first,last", 10) == [0, 9]
    assert select_snapshots("all", 3) == [0, 1, 2]
    assert select_snapshots("0,5,-1", 10) == [0, 5, 9]
    assert select_snapshots("first,last", 1) == [0]
    with pytest.raises(OptionError):
        select_snapshots("12", 10)
    with pytest.raises(OptionError):
        select_snapshots("middle", 10)


# PNGs ------------------------------------------------------------------------------------------
def test_every_figure_is_a_png_of_the_asked_size_and_not_blank(exported):
    res = exported["res"]
    kinds = {f.kind for f in res.figures}
    assert kinds == {"space", "phase", "census_map", "rank_load", "transfer", "displacement",
                     "drift", "deposit"}
    # 2 snapshots x 2 species x 2 views, 2 census maps, 2 rank charts, 1 pair x 2, drift, 2 deposits
    assert len(res.figures) == 8 + 2 + 2 + 2 + 1 + 2
    for f in res.figures:
        with Image.open(f.path) as im:
            assert im.size == (W, H), f.path
            px = np.asarray(im.convert("L"), dtype=float)
        assert px.std() > 5, f"{f.path} looks blank"


def test_space_view_is_the_shared_aggregate_and_numpy_histogram2d(exported):
    res, ctx = exported["res"], exported["ctx"]
    views = [f for f in res.figures if f.kind == "space"]
    assert views
    for rec in views:
        frame = ctx.run[rec.snapshot].species[rec.species]
        v = rec.view
        again = render.aggregate_points(frame, v["xcol"], v["ycol"], width=v["width"],
                                        height=v["height"], x_range=v["x_range"], y_range=v["y_range"])
        np.testing.assert_array_equal(rec.aggregate.values, again.values)
        # outside reference; the 64-bin grid over [0, 1) has power-of-two bin widths, so
        # datashader's and numpy's bin arithmetic round the same way
        ref, _, _ = np.histogram2d(frame["x"], frame["y"], bins=[v["width"], v["height"]],
                                   range=[v["x_range"], v["y_range"]])
        np.testing.assert_array_equal(render.histogram_counts(rec.aggregate), ref.T)
        # and the image drawn is that aggregate, rows from the lowest y up (empty bins blank)
        np.testing.assert_array_equal(np.nan_to_num(rec.drawn), ref.T)
        assert np.isnan(rec.drawn[ref.T == 0]).all()
        assert rec.aggregate.values.sum() == N


# tables --------------------------------------------------------------------------------------
def _blocks(x, y):
    # the sample layout: 4 x 2 blocks over the unit square, x fastest
    return (np.floor(x * 4).astype(int) + 4 * np.floor(y * 2).astype(int))


def test_tables_have_exactly_the_contract_columns(exported):
    out = exported["out"]
    for name, cols in (("census.csv", CENSUS), ("migration.csv", MIGRATION),
                       ("migration_summary.csv", SUMMARY), ("drift.csv", DRIFT)):
        df = pd.read_csv(os.path.join(out, name))
        assert list(df.columns) == cols, name
        assert len(df), name


def test_census_table_equals_histogram2d_per_block(exported):
    df = pd.read_csv(os.path.join(exported["out"], "census.csv"))
    cols = snapshot_columns(exported["state"], 1 * STEPS * DT)["ions"]
    ref, _, _ = np.histogram2d(cols["x"], cols["y"], bins=[4, 2], range=[[0, 1], [0, 1]])
    got = df[(df["snapshot"] == 1) & (df["species"] == "ions")].sort_values("block")
    np.testing.assert_array_equal(got["count"].to_numpy(), ref.T.ravel())
    np.testing.assert_allclose(got["weight"].to_numpy(), 2.0 * ref.T.ravel())
    both = df[(df["snapshot"] == 1) & (df["species"] == "all")]["count"].sum()
    assert both == 2 * N


def test_migration_tables_equal_crosstab_of_block_moves(exported):
    out, state = exported["out"], exported["state"]
    mig = pd.read_csv(os.path.join(out, "migration.csv"))
    summ = pd.read_csv(os.path.join(out, "migration_summary.csv"))
    a = snapshot_columns(state, 0.0)["electrons"]
    b = snapshot_columns(state, STEPS * DT)["electrons"]
    fa, fb = _blocks(a["x"], a["y"]), _blocks(b["x"], b["y"])
    ref = pd.crosstab(fa, fb).stack()
    ref = ref[ref > 0]
    got = mig[(mig["from_snapshot"] == 0) & (mig["species"] == "electrons")]
    got = got.set_index(["from_block", "to_block"])["count"].sort_index()
    assert dict(got) == {k: int(v) for k, v in ref.items()}
    row = summ[(summ["from_snapshot"] == 0) & (summ["species"] == "electrons")].iloc[0]
    assert row["matched"] == N and row["created"] == 0 and row["lost"] == 0
    assert row["migrated"] == int(np.count_nonzero(fa != fb))
    # Chebyshev displacement in cells with the minimum image on the periodic unit square
    d = [(b[k] - a[k]) * 32 for k in ("x", "y")]
    d = [np.abs(v - 32 * np.round(v / 32)) for v in d]
    assert row["max_displacement_cells"] == pytest.approx(np.maximum(*d).max(), rel=1e-9)


def test_drift_table_holds_numpy_totals(exported):
    df = pd.read_csv(os.path.join(exported["out"], "drift.csv"))
    st = exported["state"]["ions"]
    mx = df[(df["quantity"] == "momentum_x") & (df["species"] == "ions")]
    # Σ w m vx: the streaming run conserves it exactly
    np.testing.assert_allclose(mx["value"], np.sum(st["w"] * st["mass"] * st["vx"]), rtol=1e-12)
    cnt = df[(df["quantity"] == "count") & (df["species"] == "all")]
    assert (cnt["value"] == 2 * N).all() and (cnt["relative_drift"] == 0).all()


# report.html ---------------------------------------------------------------------------------
class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.attrs = []
        self.imgs = []
        self.tags = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for k, v in attrs:
            self.attrs.append((tag, k, v or ""))
        if tag == "img":
            self.imgs.append(dict(attrs))


def test_report_is_self_contained_and_embeds_every_figure(exported):
    res = exported["res"]
    text = open(res.report, encoding="utf-8").read()
    p = _Tags()
    p.feed(text)
    for tag, k, v in p.attrs:
        if k in ("src", "href", "action", "data"):
            assert not re.match(r"\s*(https?:)?//", v), (tag, k, v[:80])
    assert "http://" not in text and "https://" not in text
    assert "script" not in p.tags and "link" not in p.tags and "iframe" not in p.tags
    assert len(p.imgs) == len(res.figures)
    for img in p.imgs:
        src = img["src"]
        assert src.startswith("data:image/png;base64,")
        png = base64.b64decode(src.split(",", 1)[1])
        assert Image.open(io.BytesIO(png)).size == (W, H)
    # the summary, the verdict, the tables and the caution are there
    assert "Check passed" in text
    for name in ("census.csv", "migration.csv", "migration_summary.csv", "drift.csv"):
        assert name in text
    assert "not a certification" in text


def test_report_shows_every_figure_in_headless_chromium(exported):
    sync_playwright = need("playwright.sync_api").sync_playwright
    from test_browser_e2e import _browser_or_fail   # fails under CI when Chromium cannot start
    requests = []
    with sync_playwright() as pw:
        browser = _browser_or_fail(pw)
        try:
            page = browser.new_page()
            page.on("request", lambda r: requests.append(r.url))
            page.goto("file://" + os.path.abspath(exported["res"].report))
            page.wait_for_load_state("load")
            widths = page.evaluate("Array.from(document.images).map(i => i.complete ? i.naturalWidth : 0)")
        finally:
            browser.close()
    assert len(widths) == len(exported["res"].figures)
    assert all(w > 0 for w in widths), widths
    # nothing left the file: only the page itself and its inline data
    assert all(u.startswith(("file://", "data:")) for u in requests), requests


# the command line ------------------------------------------------------------------------------
def test_gate_fails_names_the_total_and_still_writes_everything(tmp_path, capsys):
    run, _ = write_npz_run(str(tmp_path / "run"), n=600, snapshots=3, charge_jump=0.01)
    out = tmp_path / "out"
    rc = main(["export", run, "--out", str(out), *LAYOUT_ARGS, *SIZE_ARGS, "--quiet",
               "--snapshots", "last", "--species", "ions", "--rtol", "1e-3"])
    text = capsys.readouterr().out
    assert rc == 1
    assert "FAIL: charge" in text and "snapshot 2" in text
    for name in ("census.csv", "migration.csv", "migration_summary.csv", "drift.csv", "report.html"):
        assert (out / name).is_file()
    assert "Check failed" in (out / "report.html").read_text(encoding="utf-8")
    assert len(list((out / "figures").glob("*.png"))) == 8


@pytest.mark.parametrize("extra, word", [
    (["--snapshots", "7"], "--snapshots"),
    (["--range", "x=1,0"], "--range"),
    (["--cmap", "no_such_colours"], "--cmap"),
    (["--space", "x,nosuch"], "nosuch"),
    (["--width", "5"], "--width"),
])
def test_bad_options_exit_2_with_one_line(tmp_path, capsys, extra, word):
    run, _ = write_npz_run(str(tmp_path / "run"), n=50, snapshots=2)
    rc = main(["export", run, "--out", str(tmp_path / "out"), *LAYOUT_ARGS, "--quiet", *extra])
    err = capsys.readouterr().err
    assert rc == 2
    assert word in err and "Traceback" not in err and len(err.strip().splitlines()) == 1


def test_never_overwrites_an_input_file(tmp_path, capsys):
    run, _ = write_npz_run(str(tmp_path / "run"), n=50, snapshots=2)
    out = tmp_path / "out"
    out.mkdir()
    layout = out / "census.csv"     # a layout file named like an output of the export
    layout.write_text("block,level,rank,x_lo,x_hi,y_lo,y_hi\n0,0,0,0,1,0,1\n")
    before = layout.read_bytes()
    rc = main(["export", run, "--out", str(out), "--layout", str(layout), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2 and "input" in err
    assert layout.read_bytes() == before
    assert not (out / "report.html").exists()


def test_export_runs_with_no_display(tmp_path):
    run, _ = write_npz_run(str(tmp_path / "run"), n=300, snapshots=2)
    env = {k: v for k, v in os.environ.items() if k not in ("DISPLAY", "WAYLAND_DISPLAY", "MPLBACKEND")}
    out = tmp_path / "out"
    proc = subprocess.run([sys.executable, "-m", "swarmaudit", "export", run, "--out", str(out),
                           *LAYOUT_ARGS, *SIZE_ARGS, "--snapshots", "last", "--species", "ions"],
                          env=env, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert "wrote 8 figures, 4 tables" in proc.stdout
    assert proc.stderr == ""                 # stderr is no TTY here: no progress bar
    pngs = list((out / "figures").glob("*.png"))
    assert len(pngs) == 8
    with Image.open(pngs[0]) as im:
        assert im.size == (W, H)
