"""A run the simulation is still writing: unfinished snapshots are left out with a note and
picked up once complete, by ``inspect`` and by the dashboard (rescan of the shared registry).

Snapshots are written one by one into tmp_path. "Unfinished" takes the forms a reader meets
on a cluster file system: an HDF5 file cut short (a copy in progress) or still held open by
its writer (HDF5 file lock), a CSV whose last line is cut, a per-rank folder with fewer
files than the others.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time

import h5py
import numpy as np
import pytest

from _need import need

from swarmaudit.app.cli import main
from swarmaudit.core.context import AuditContext
from swarmaudit.core.errors import InputError
from swarmaudit.readers.csv_files import CSVReader
from swarmaudit.readers.discover import FRESH_SECONDS, open_run, rescan_run

N = 500


def particles(step, n=N, seed=0):
    rng = np.random.default_rng(seed + step)
    return {"x": rng.uniform(0, 1, n), "y": rng.uniform(0, 1, n), "vx": rng.normal(0, 1, n),
            "vy": rng.normal(0, 1, n), "id": np.arange(n, dtype=np.int64)}


def h5_bytes(step, n=N, tmp=None) -> bytes:
    path = os.path.join(tmp, f".scratch_{step}.h5")
    with h5py.File(path, "w") as f:
        f.attrs["step"] = step
        f.attrs["time"] = 0.1 * step
        for k, v in particles(step, n).items():
            f.create_dataset(k, data=v)
    with open(path, "rb") as fh:
        data = fh.read()
    os.remove(path)
    return data


def write_h5(folder, step, n=N):
    data = h5_bytes(step, n, str(folder))
    path = folder / f"step_{step:04d}.h5"
    path.write_bytes(data)
    return path


def csv_text(step, n=N) -> str:
    p = particles(step, n)
    lines = [f"# step = {step}", "x,y,vx,vy,id"]
    lines += [f"{x:.9g},{y:.9g},{vx:.9g},{vy:.9g},{i}" for x, y, vx, vy, i in
              zip(p["x"], p["y"], p["vx"], p["vy"], p["id"])]
    return "\n".join(lines) + "\n"


def age(path, seconds):
    """Pretend a file was last written ``seconds`` ago."""
    t = time.time() - seconds
    os.utime(path, (t, t))


def inspect(capsys, run, *extra):
    code = main(["inspect", str(run), "--health", "none", *extra])
    out = capsys.readouterr()
    return code, out.out, out.err


def table_rows(out: str) -> list[str]:
    """The snapshot labels of the inspect table."""
    rows, on = [], False
    for line in out.splitlines():
        if line.startswith("#  snapshot"):
            on = True
            continue
        if on:
            if not line.strip():
                break
            rows.append(line.split()[1])
    return rows


# inspect ------------------------------------------------------------------------------------

def test_inspect_skips_a_half_written_hdf5_then_picks_it_up(tmp_path, capsys):
    run = tmp_path / "run"
    run.mkdir()
    write_h5(run, 0)
    write_h5(run, 10)
    whole = h5_bytes(20, tmp=str(run))
    (run / "step_0020.h5").write_bytes(whole[: len(whole) // 2])     # a copy half done

    code, out, _ = inspect(capsys, run)
    assert code == 0
    assert table_rows(out) == ["step_0000.h5", "step_0010.h5"]
    assert "note: step_0020.h5: skipped for now, it looks like it is still being written" in out

    (run / "step_0020.h5").write_bytes(whole)                         # the copy finishes
    code, out, _ = inspect(capsys, run)
    assert code == 0 and table_rows(out) == ["step_0000.h5", "step_0010.h5", "step_0020.h5"]
    assert "skipped" not in out


def test_inspect_skips_an_hdf5_its_writer_still_holds_open(tmp_path):
    run = tmp_path / "run"
    run.mkdir()
    write_h5(run, 0)
    write_h5(run, 10)
    # the simulation's own writer: the file is open for writing (HDF5 locks it) in this process
    f = h5py.File(run / "step_0020.h5", "w")
    try:
        f.attrs["step"] = 20
        f.create_dataset("x", data=particles(20)["x"])
        f.flush()
        r = subprocess.run([sys.executable, "-m", "swarmaudit", "inspect", str(run), "--json"],
                           capture_output=True, text=True, timeout=120)
    finally:
        f.close()
    assert r.returncode == 0, r.stderr
    import json
    info = json.loads(r.stdout)
    assert [s["label"] for s in info["snapshots"]] == ["step_0000.h5", "step_0010.h5"]
    assert any(n.startswith("step_0020.h5: skipped for now") for n in info["notes"]), info["notes"]


def test_csv_with_a_cut_last_line_is_refused_clearly(tmp_path):
    text = csv_text(5)
    cut = text[: len(text) // 2]
    assert not cut.endswith("\n")
    path = tmp_path / "duct_0005.csv"
    path.write_text(cut)
    with pytest.raises(InputError) as err:
        CSVReader().open(path)
    # line number of the cut line as Python's own line splitting counts it
    line = len(cut.splitlines())
    fields = cut.splitlines()[-1].count(",") + 1
    assert str(path) in str(err.value)
    assert f"ends in the middle of line {line}: it has {fields} of the header's 5 fields" in str(err.value)
    # a value cut inside the last field still parses as a number: refused as well
    last_full = text.rstrip("\n").rsplit("\n", 1)[0] + "\n" + text.rstrip("\n").rsplit("\n", 1)[1][:-1]
    path.write_text(last_full)
    with pytest.raises(InputError, match="no newline at its end"):
        CSVReader().open(path)
    path.write_text(text)
    assert CSVReader().open(path).species["particles"].length == N


def test_inspect_skips_a_half_written_csv_then_picks_it_up(tmp_path, capsys):
    run = tmp_path / "csvrun"
    run.mkdir()
    for step in (0, 5):
        (run / f"duct_{step:04d}.csv").write_text(csv_text(step))
    text = csv_text(10)
    (run / "duct_0010.csv").write_text(text[: 2 * len(text) // 3])

    code, out, _ = inspect(capsys, run)
    assert code == 0 and table_rows(out) == ["duct_0000.csv", "duct_0005.csv"]
    assert "note: duct_0010.csv: skipped for now" in out and "ends in the middle of line" in out

    (run / "duct_0010.csv").write_text(text)
    code, out, _ = inspect(capsys, run)
    assert code == 0 and table_rows(out)[-1] == "duct_0010.csv" and "skipped" not in out


def test_an_old_cut_csv_is_an_error_not_a_skip(tmp_path, capsys):
    # written long ago and still cut: nobody is writing it any more, so say what is wrong
    run = tmp_path / "csvrun"
    run.mkdir()
    (run / "duct_0000.csv").write_text(csv_text(0))
    text = csv_text(5)
    (run / "duct_0005.csv").write_text(text[:-7])
    age(run / "duct_0005.csv", FRESH_SECONDS + 60)
    code, _, err = inspect(capsys, run)
    assert code == 2
    assert "duct_0005.csv: ends in the middle of line" in err and "Traceback" not in err


def test_a_per_rank_folder_with_fewer_files_waits_for_the_rest(tmp_path, capsys):
    run = tmp_path / "ranks"
    run.mkdir()
    for step in (0, 10, 20):
        d = run / f"step_{step:04d}"
        d.mkdir()
        for r in range(4 if step < 20 else 2):
            with h5py.File(d / f"rank_{r:03d}.h5", "w") as f:
                f.attrs["step"] = step
                for k, v in particles(step + r, 100).items():
                    f.create_dataset(k, data=v)
    code, out, _ = inspect(capsys, run)
    assert code == 0 and table_rows(out) == ["step_0000", "step_0010"]
    assert "step_0020: skipped for now" in out and "has 2 of the 4 per-rank files" in out

    for r in (2, 3):
        with h5py.File(run / "step_0020" / f"rank_{r:03d}.h5", "w") as f:
            f.attrs["step"] = 20
            for k, v in particles(20 + r, 100).items():
                f.create_dataset(k, data=v)
    code, out, _ = inspect(capsys, run)
    assert code == 0 and table_rows(out) == ["step_0000", "step_0010", "step_0020"]
    assert "step_0020 (4 files)" in out


# the dashboard's shared registry ----------------------------------------------------------

@pytest.fixture
def live(tmp_path):
    from swarmaudit.app.state import ServerState, ViewState
    run = tmp_path / "live"
    run.mkdir()
    write_h5(run, 0)
    write_h5(run, 10)
    ctx = AuditContext(open_run(str(run)))
    server = ServerState()
    served = server.add("live", ctx, roots=[str(run)])
    return run, server, served, ViewState


def test_rescan_extends_the_served_run_in_place(live, tmp_path):
    run, server, served, ViewState = live
    runs = server.runs
    a, b = ViewState(runs), ViewState(runs)
    b.snapshot = 1
    x0 = a.frame()["x"]
    reads0 = a.frame().reads
    frame0 = a.frame()
    assert a.param.snapshot.bounds == (0, 1)

    # nothing new: no change, nothing re-opened
    assert not served.refresh(min_interval=0)
    assert served.version == 0

    write_h5(run, 20)
    assert runs.refresh(min_interval=0) == ["live"]
    assert len(served) == 3 and served.version == 1
    for s in (a, b):
        assert s.follow()
        assert s.param.snapshot.bounds == (0, 2)
    assert (a.snapshot, b.snapshot) == (0, 1)
    # the unchanged snapshot was neither re-opened nor re-read
    assert a.frame() is frame0 and a.frame()["x"] is x0 and a.frame().reads == reads0

    # a half-written snapshot stays out with a note, and is not retried while unchanged
    whole = h5_bytes(30, tmp=str(run))
    (run / "step_0030.h5").write_bytes(whole[: len(whole) // 3])
    assert served.refresh(min_interval=0)              # only the note is new
    assert len(served) == 3 and any(p.startswith("step_0030.h5: skipped for now") for p in served.pending)
    import swarmaudit.readers.discover as discover
    tried = []
    real = discover.open_ref
    discover.open_ref = lambda ref, rm=None, columns=None: tried.append(ref.label) or real(ref, rm, columns)
    try:
        assert not served.refresh(min_interval=0)
    finally:
        discover.open_ref = real
    assert tried == [], "an unchanged unfinished file was opened again"
    (run / "step_0030.h5").write_bytes(whole)
    assert served.refresh(min_interval=0) and len(served) == 4 and not served.pending
    a.follow()
    assert a.param.snapshot.bounds == (0, 3)
    assert served.snapshot(3).step == 30


def test_rewritten_snapshot_is_reopened_and_its_viewers_redraw(live):
    run, server, served, ViewState = live
    runs = server.runs
    a, b = ViewState(runs), ViewState(runs)
    b.snapshot = 1
    old = b.frame()
    assert old.length == N
    rev_a, rev_b = a.data_revision, b.data_revision
    write_h5(run, 10, n=2 * N)                    # the code rewrote step 10 (a restart)
    st = os.stat(run / "step_0010.h5")
    os.utime(run / "step_0010.h5", ns=(st.st_atime_ns, st.st_mtime_ns + 5_000_000_000))
    assert served.refresh(min_interval=0)
    a.follow(), b.follow()
    assert b.frame() is not old and b.frame().length == 2 * N
    assert b.data_revision == rev_b + 1          # the viewer of step 10 redraws
    assert a.data_revision == rev_a              # the viewer of step 0 does not


def test_a_snapshot_sorted_in_before_keeps_each_view_on_its_snapshot(live):
    run, server, served, ViewState = live
    runs = server.runs
    s = ViewState(runs)
    s.snapshot = 1                                # step 10
    write_h5(run, 5)                              # a late arrival between 0 and 10
    assert served.refresh(min_interval=0)
    s.follow()
    assert [served.snapshot(i).step for i in range(len(served))] == [0, 5, 10]
    assert s.snapshot == 2 and served.snapshot(s.snapshot).step == 10


def test_a_symlink_added_later_is_still_confined(live, tmp_path):
    run, _, served, _ = live
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    write_h5(outside, 99)
    os.symlink(outside / "step_0099.h5", run / "step_0099.h5")
    served.refresh(min_interval=0)
    assert [os.path.basename(r.paths[0]) for r in served.run.refs] == ["step_0000.h5", "step_0010.h5"]
    assert any("step_0099.h5: left out, it points outside the run folder" in p for p in served.pending)


def test_rescans_are_shared_and_rate_limited(live):
    run, _, served, _ = live
    served.refresh(min_interval=0)
    scans = served.scans
    write_h5(run, 20)
    for _ in range(8):                            # eight sessions asking at once
        served.refresh(min_interval=60)
    assert served.scans == scans and len(served) == 2
    assert served.refresh(min_interval=0) and len(served) == 3


def test_the_page_timer_grows_the_player(live):
    import panel as pn
    from swarmaudit.app.dashboard import build_page
    run, server, served, _ = live
    dash, page = build_page(server)
    player = page.select(pn.widgets.Player)[0]
    assert player.end == 1
    write_h5(run, 20)
    served._last_scan = 0.0                        # as if the scan interval had passed
    dash.follow_run()
    assert player.end == 2 and not player.disabled
    assert dash.live_note.object == ""
    whole = h5_bytes(30, tmp=str(run))
    (run / "step_0030.h5").write_bytes(whole[:100])
    served._last_scan = 0.0
    dash.follow_run()
    assert player.end == 2 and "step_0030.h5" in dash.live_note.object


def test_rescan_of_a_run_without_folders_does_nothing():
    from swarmaudit.core.run import Run
    run = Run([], lambda ref, rm: None)
    assert not rescan_run(run).any


# in a real browser ----------------------------------------------------------------------------

def test_the_slider_grows_in_chromium(tmp_path):
    sync_api = need("playwright.sync_api")
    from test_browser_e2e import _browser_or_fail, new_page, start_server, wait_drawn
    run = tmp_path / "live"
    run.mkdir()
    write_h5(run, 0, n=5000)
    write_h5(run, 10, n=5000)
    proc, url = start_server(["serve", str(run), "--domain", "0,1,0,1", "--cells", "8,8"])
    errors = []
    try:
        with sync_api.sync_playwright() as p:
            browser = _browser_or_fail(p)
            try:
                page = new_page(browser, errors, 1500, 1100)
                page.goto(url)
                assert "of 2" in wait_drawn(page)
                write_h5(run, 20, n=5000)
                deadline = time.time() + 30
                text = ""
                while time.time() < deadline and "of 3" not in text:
                    time.sleep(0.5)
                    text = wait_drawn(page)
                assert "of 3" in text, "the new snapshot did not reach the page"
                page.locator("button.last").first.click()
                deadline = time.time() + 30
                while time.time() < deadline and "snap=2" not in page.evaluate("window.location.href"):
                    time.sleep(0.25)
                assert "snap=2" in page.evaluate("window.location.href")
                assert "step 20" in wait_drawn(page)
            finally:
                browser.close()
    finally:
        proc.terminate()
        proc.wait(timeout=10)
    assert not errors, errors
