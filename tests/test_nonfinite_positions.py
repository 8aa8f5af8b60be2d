"""NaN or infinite positions with no layout given: left out of the automatic layout, counted in
block -1 with a note, in every command; an export that fails leaves no half-written output.

Outside references: numpy.isfinite / numpy.min over the finite values (the box and the counts
the census must give), sha256 digests (an older export left untouched).
"""

import json
import os

import numpy as np
import pandas as pd
import pytest

from _audit_runs import folder_state
from swarmaudit.app.cli import build_parser, main
from swarmaudit.app.export import ExportOptions, export_run
from swarmaudit.app.options import context_from_options
from swarmaudit.audit.tables import census_table
from swarmaudit.core.layout import bounding_layout

N = 300
SMALL = ["--width", "240", "--height", "200", "--dpi", "40", "--quiet"]


@pytest.fixture(autouse=True)
def private_cache(tmp_path, monkeypatch):
    monkeypatch.setenv("SWARMAUDIT_CACHE", str(tmp_path / "cache"))


def _positions(seed=1):
    rng = np.random.default_rng(seed)
    x, y = rng.uniform(2.0, 5.0, N), rng.uniform(-1.0, 1.0, N)
    x[:3] = np.nan
    y[3] = np.inf
    x[4] = -np.inf
    y[7] = np.nan
    return x, y


def _write_run(folder, snapshots=3):
    os.makedirs(folder)
    x, y = _positions()
    rng = np.random.default_rng(5)
    for k in range(snapshots):
        # the finite particles stay where they are: every particle in no block is a non-finite one
        np.savez(os.path.join(folder, f"snap_{k:03d}.npz"), x=x, y=y, vx=rng.normal(size=N),
                 vy=rng.normal(size=N), id=np.arange(N), weight=np.full(N, 2.0),
                 step=np.array(10 * k), time=np.array(0.1 * k))
    return folder


def _bad_count():
    x, y = _positions()
    return int(np.count_nonzero(~(np.isfinite(x) & np.isfinite(y))))


def test_bounding_layout_leaves_nonfinite_out():
    x, y = _positions()
    lay = bounding_layout([x, y])
    ok = np.isfinite(x) & np.isfinite(y)
    assert np.all(np.isfinite(lay.domain_lower)) and np.all(np.isfinite(lay.domain_upper))
    assert lay.domain_lower.tolist() == [np.min(x[ok]), np.min(y[ok])]
    assert np.all(lay.domain_upper > [np.max(x[ok]), np.max(y[ok])])


def test_export_with_nonfinite_positions_and_no_layout(tmp_path, capsys):
    run = _write_run(str(tmp_path / "run"))
    out = tmp_path / "out"
    assert main(["export", run, "--out", str(out), *SMALL]) == 0, capsys.readouterr().err
    census = pd.read_csv(out / "census.csv")
    bad = _bad_count()
    for k in range(3):
        part = census[(census["snapshot"] == k) & (census["species"] == "all")]
        assert part.loc[part["block"] == -1, "count"].tolist() == [bad]
        assert part.loc[part["block"] >= 0, "count"].sum() == N - bad
    report = (out / "report.html").read_text()
    assert f"{bad} particle(s) of the first snapshot with a NaN or infinite position" in report
    assert "with a NaN or infinite position are counted in block -1" in report
    assert not [p for p in os.listdir(out) if p.startswith(".")], "no staging folder left"


def test_inspect_and_census_say_the_same(tmp_path, capsys):
    run = _write_run(str(tmp_path / "run"))
    assert main(["inspect", run, "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    x, y = _positions()
    ok = np.isfinite(x) & np.isfinite(y)
    assert info["layout"]["domain_lower"] == [np.min(x[ok]), np.min(y[ok])]
    assert all(np.isfinite(info["layout"]["domain_upper"]))
    assert any("NaN or infinite position are left out" in n for n in info["notes"])
    # the census the dashboard draws comes from the same table
    ctx = context_from_options(build_parser().parse_args(["serve", run]))
    census = census_table(ctx, [1])
    assert census.loc[(census["block"] == -1) & (census["species"] == "all"), "count"].tolist() == \
        [_bad_count()]
    assert any("snapshot 1 (snap_001.npz)" in n and "counted in block -1" in n for n in ctx.notes)


def test_check_passes_with_nonfinite_positions(tmp_path, capsys):
    run = _write_run(str(tmp_path / "run"))
    assert main(["check", run, "--rtol", "1e-9"]) == 0
    assert capsys.readouterr().out.startswith("ok: ")


def test_no_finite_position_at_all_is_bad_input(tmp_path, capsys):
    folder = tmp_path / "run"
    folder.mkdir()
    for k in range(2):
        np.savez(folder / f"s{k}.npz", x=np.full(5, np.nan), y=np.full(5, np.inf), step=np.array(k))
    assert main(["inspect", str(folder)]) == 2
    err = capsys.readouterr().err
    assert "no particle with a finite position" in err and "--domain" in err
    assert "Traceback" not in err


@pytest.mark.parametrize("existing", [False, True])
def test_failed_export_leaves_no_half_written_output(tmp_path, monkeypatch, existing):
    from swarmaudit.app import figure_data
    run = _write_run(str(tmp_path / "run"))
    out = tmp_path / "out"
    args = build_parser().parse_args(["export", run, "--out", str(out), "--domain", "2,5,-1,1",
                                      "--cells", "8,8", "--blocks", "2,2", *SMALL])
    if existing:      # an earlier complete export stays as it was
        export_run(context_from_options(args), ExportOptions.from_args(args), args)
        before = folder_state(out)
        assert "census.csv" in before

    def broken(*a, **k):
        raise RuntimeError("the deposit figure failed")
    # the deposit map is drawn after every table and most figures are written
    monkeypatch.setattr(figure_data, "deposit_map", broken)
    with pytest.raises(RuntimeError):
        export_run(context_from_options(args), ExportOptions.from_args(args), args)
    if existing:
        assert folder_state(out) == before
        assert not [p for p in os.listdir(out) if p.startswith(".")]
    else:
        assert not out.exists()
    # through the command line: exit 3 for the internal error, and still nothing half-written
    assert main(["export", run, "--out", str(out), "--domain", "2,5,-1,1", "--cells", "8,8",
                 "--blocks", "2,2", *SMALL]) == 3
    assert (folder_state(out) == before) if existing else not out.exists()
