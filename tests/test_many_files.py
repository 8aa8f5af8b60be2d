"""Runs of many per-rank files: each file's metadata read once, scans spread over worker
processes giving what one process gives, inspect reading no particle column it does not need,
and the table of snapshots shown before the last snapshot is opened.

References: the files as written here with h5py (counts, steps, the stored layout), the
command's own output from the one-process path (for the worker-process path), and pandas for
the totals of the check.
"""

from __future__ import annotations

import io
import json
import os
import time
import tracemalloc

import h5py
import numpy as np
import pandas as pd
import pytest

from swarmaudit.app.cli import build_parser, main
from swarmaudit.app.inspect_cmd import inspect_command
from swarmaudit.audit.tables import census_table, drift_table
from swarmaudit.core.layout import BlockLayout
from swarmaudit.engine import scan as engine_scan
from swarmaudit.readers import hdf5, registry
from swarmaudit.readers.discover import open_run

BLOCKS = 4          # 4 x 4 blocks over the unit square, four to a rank


def _layout_arrays(ranks):
    ix, iy = np.meshgrid(np.arange(BLOCKS), np.arange(BLOCKS), indexing="xy")
    ix, iy = ix.ravel(), iy.ravel()
    lower = np.stack([ix / BLOCKS, iy / BLOCKS], axis=1)
    upper = np.stack([(ix + 1) / BLOCKS, (iy + 1) / BLOCKS], axis=1)
    rank = (np.arange(BLOCKS * BLOCKS) * ranks) // (BLOCKS * BLOCKS)
    return lower, upper, rank


def write_ranks(root, snapshots=5, ranks=4, n=200, steps=None, old=True):
    """``step_NNNN/rank_RRR.h5`` files, a ``blocks`` group in each; returns the columns written."""
    lower, upper, owner = _layout_arrays(ranks)
    written = {}
    for s in range(snapshots):
        step = (steps or [10 * k for k in range(snapshots)])[s]
        folder = root / f"step_{10 * s:04d}"
        folder.mkdir(parents=True)
        for r in range(ranks):
            rng = np.random.default_rng([s, r])
            mine = np.flatnonzero(owner == r)
            b = rng.choice(mine, n)
            cols = {"x": lower[b, 0] + rng.random(n) / BLOCKS, "y": lower[b, 1] + rng.random(n) / BLOCKS,
                    "vx": rng.normal(0.1 * s, 1.0, n), "vy": rng.normal(0, 1.0, n),
                    "weight": rng.uniform(0.5, 1.5, n), "id": np.arange(r * n, (r + 1) * n, dtype=np.int64)}
            path = folder / f"rank_{r:03d}.h5"
            with h5py.File(path, "w") as fh:
                fh.attrs["step"] = np.int64(step)
                fh.attrs["time"] = 0.25 * step
                g = fh.create_group("electrons")
                g.attrs["mass"] = 1.0
                g.attrs["charge"] = -1.0
                for k, v in cols.items():
                    g[k] = v
                bl = fh.create_group("blocks")
                bl["lower"], bl["upper"] = lower, upper
                bl["level"], bl["rank"] = np.zeros(len(lower), np.int64), owner
                bl.attrs["domain_lower"], bl.attrs["domain_upper"] = np.zeros(2), np.ones(2)
                bl.attrs["cells"] = np.array([8 * BLOCKS, 8 * BLOCKS])
            if old:     # not "still being written": a damaged file is an error, not skipped
                os.utime(path, (time.time() - 3600, time.time() - 3600))
            written[str(path)] = cols
    return written


@pytest.fixture
def h5_opens(monkeypatch, tmp_path):
    """Every HDF5 file open (h5py's File and the low-level open both go through h5f.open),
    recorded in a file so that forked worker processes add theirs: ``[(pid, path), ...]``."""
    log = tmp_path / "opens.log"
    original = h5py.h5f.open

    def spy(name, *args, **kwargs):
        with open(log, "a") as fh:
            fh.write(f"{os.getpid()}\t{os.fsdecode(name)}\n")
        return original(name, *args, **kwargs)
    monkeypatch.setattr(h5py.h5f, "open", spy)

    def read():
        if not log.exists():
            return []
        return [tuple(line.split("\t")) for line in log.read_text().splitlines()]
    return read


@pytest.fixture
def column_reads(monkeypatch):
    """Every read of an HDF5 column (whole, rows, into a buffer; direct or through h5py)."""
    seen = []
    original = hdf5._DatasetColumn._load

    def spy(self, rows=None, into=None):
        seen.append((self.path, self.dsname))
        return original(self, rows, into)
    monkeypatch.setattr(hdf5._DatasetColumn, "_load", spy)
    return seen


def _serial(monkeypatch):
    monkeypatch.setattr(engine_scan, "MIN_FILES", 10**9)


def _processes(monkeypatch):
    # the suite's own pool threads are idle here: forking is safe although other threads exist
    monkeypatch.setattr(engine_scan, "MIN_FILES", 1)
    monkeypatch.setattr(engine_scan, "forkable", lambda: True)
    monkeypatch.setattr(engine_scan, "piece_workers", lambda: 2)
    monkeypatch.setattr(engine_scan, "free_cores", lambda: 2)


@pytest.mark.parametrize("where", ["this process", "worker processes"])
@pytest.mark.parametrize("health", ["none", "all"])
def test_inspect_reads_each_files_metadata_once(tmp_path, monkeypatch, capsys, h5_opens, where, health):
    written = write_ranks(tmp_path / "run")
    (_serial if where == "this process" else _processes)(monkeypatch)
    assert main(["inspect", str(tmp_path / "run"), "--health", health]) == 0
    opens = h5_opens()
    assert sorted(p for _, p in opens) == sorted(written)        # every file, each once
    if where == "worker processes":
        assert all(int(pid) != os.getpid() for pid, _ in opens)  # the metadata was read there
    out = capsys.readouterr().out
    assert "16 blocks" in out and "step_0040 (4 files)" in out


def test_worker_processes_give_the_tables_of_one_process(tmp_path, monkeypatch):
    write_ranks(tmp_path / "run", snapshots=6)
    got = {}
    for where, setup in (("serial", _serial), ("processes", _processes)):
        setup(monkeypatch)
        from swarmaudit.core.context import AuditContext
        ctx = AuditContext(open_run(str(tmp_path / "run"), scan_map=engine_scan.scan_map_for(None)),
                           use_cache=False)
        got[where] = (census_table(ctx), drift_table(ctx), ctx.layout(3).summary())
    pd.testing.assert_frame_equal(got["serial"][0], got["processes"][0])
    pd.testing.assert_frame_equal(got["serial"][1], got["processes"][1])
    assert got["serial"][2] == got["processes"][2]


def test_check_on_worker_processes_matches_pandas_totals(tmp_path, monkeypatch, capsys):
    written = write_ranks(tmp_path / "run", snapshots=4)
    _processes(monkeypatch)
    assert main(["check", str(tmp_path / "run"), "--no-cache", "--rtol", "10", "--quantities",
                 "weight", "--species", "electrons"]) == 0
    from swarmaudit.core.context import AuditContext
    ctx = AuditContext(open_run(str(tmp_path / "run"), scan_map=engine_scan.scan_map_for(None)),
                       use_cache=False)
    df = drift_table(ctx)
    got = df[(df["quantity"] == "weight") & (df["species"] == "electrons")]["value"].to_numpy()
    frame = pd.DataFrame([{"snap": os.path.basename(os.path.dirname(p)), "w": c["weight"].sum()}
                          for p, c in written.items()])
    want = frame.groupby("snap", sort=True)["w"].sum().to_numpy()
    np.testing.assert_allclose(got, want, rtol=1e-12)
    assert "ok:" in capsys.readouterr().out


def test_a_damaged_file_says_the_same_from_a_worker_process(tmp_path, monkeypatch, capsys):
    write_ranks(tmp_path / "run", snapshots=3)
    bad = tmp_path / "run" / "step_0010" / "rank_002.h5"
    bad.write_bytes(bad.read_bytes()[:3000])
    os.utime(bad, (time.time() - 3600, time.time() - 3600))
    said = {}
    for where, setup in (("serial", _serial), ("processes", _processes)):
        setup(monkeypatch)
        assert main(["inspect", str(tmp_path / "run"), "--health", "none"]) == 2
        said[where] = capsys.readouterr().err
    assert said["serial"] == said["processes"]
    assert "rank_002.h5" in said["serial"] and "Traceback" not in said["serial"]


@pytest.mark.parametrize("layout", ["stored", "--layout FILE"])
def test_inspect_with_a_layout_reads_no_column_without_health(tmp_path, monkeypatch, column_reads,
                                                             layout):
    written = write_ranks(tmp_path / "run", snapshots=3)
    _serial(monkeypatch)
    args = ["inspect", str(tmp_path / "run")]
    if layout == "--layout FILE":
        lower, upper, owner = _layout_arrays(4)
        pd.DataFrame({"block": range(len(lower)), "level": 0, "rank": owner, "x_lo": lower[:, 0],
                      "x_hi": upper[:, 0], "y_lo": lower[:, 1], "y_hi": upper[:, 1]}).to_csv(
            tmp_path / "blocks_of_run.csv", index=False)
        args += ["--layout", str(tmp_path / "blocks_of_run.csv")]
    assert main(args + ["--health", "none"]) == 0
    assert column_reads == []
    assert main(args + ["--health", "all"]) == 0
    # the health counts read positions, velocities and ids: each once per file, nothing else
    want = sorted((p, f"/electrons/{c}") for p in written for c in ("x", "y", "vx", "vy", "id"))
    assert sorted(column_reads) == want


def test_inspect_health_peak_memory_within_one_and_a_half_columns_read(tmp_path, monkeypatch,
                                                                      column_reads, capsys):
    # one snapshot in four per-rank files of 250,000 particles; the layout is stored
    n = 250_000
    lower, upper, owner = _layout_arrays(4)
    folder = tmp_path / "run" / "step_0000"
    folder.mkdir(parents=True)
    for r in range(4):
        rng = np.random.default_rng(r)
        with h5py.File(folder / f"rank_{r:03d}.h5", "w") as fh:
            fh.attrs["step"] = 0
            g = fh.create_group("electrons")
            for c in ("x", "y", "vx", "vy", "weight", "charge", "extra"):
                g[c] = rng.random(n)
            g["id"] = rng.permutation(4 * n)[:n].astype(np.int64)
            bl = fh.create_group("blocks")
            bl["lower"], bl["upper"], bl["rank"] = lower, upper, owner
    _serial(monkeypatch)
    args = build_parser().parse_args(["inspect", str(tmp_path / "run"), "--health", "all"])
    read_bytes = 5 * 8 * 4 * n          # x, y, vx, vy, id of every part
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        before = tracemalloc.get_traced_memory()[0]
        assert inspect_command(args, out=io.StringIO(), err=io.StringIO()) == 0
        peak = tracemalloc.get_traced_memory()[1] - before
    finally:
        tracemalloc.stop()
    assert len(column_reads) == 5 * 4
    # the target: the columns read, plus half of that for the counts' temporaries
    assert peak <= 1.5 * read_bytes, (peak, read_bytes)


class _Terminal(io.StringIO):
    def __init__(self, events=None):
        super().__init__()
        self.events = events

    def isatty(self):
        return True

    def write(self, text):
        if self.events is not None:
            self.events.append(("out", text))
        return super().write(text)


def _cells(text: str, first: str) -> list[list[str]]:
    """The rows of the table of snapshots in inspect's text, as lists of cells."""
    lines = text.splitlines()
    start = next(k for k, line in enumerate(lines) if line.split()[:2] == ["#", "snapshot"])
    rows = []
    for line in lines[start + 1:]:
        if not line.strip() or not line.split()[0].isdigit():
            break
        rows.append(line.split())
    assert rows and rows[0][1] == first
    return rows


def test_inspect_on_a_terminal_shows_the_first_rows_before_the_last_snapshot_opens(tmp_path,
                                                                                    monkeypatch):
    write_ranks(tmp_path / "run", snapshots=6)
    _serial(monkeypatch)
    events = []
    original = registry.scan_file

    def spy(path, layout=True):
        events.append(("scan", path))
        return original(path, layout)
    monkeypatch.setattr(registry, "scan_file", spy)
    args = build_parser().parse_args(["inspect", str(tmp_path / "run"), "--health", "none"])
    out, err = _Terminal(events), _Terminal()
    assert inspect_command(args, out=out, err=err) == 0
    last_scan = max(k for k, (what, p) in enumerate(events) if what == "scan" and "step_0050" in p)
    first_row = next(k for k, (what, text) in enumerate(events)
                     if what == "out" and text.startswith("0 ") and "step_0000" in text)
    assert first_row < last_scan
    assert "opening [" in err.getvalue()        # the progress line, on the terminal's stderr
    # the same table as written to a file (the cells; a terminal's widths may differ)
    plain = io.StringIO()
    assert inspect_command(args, out=plain, err=io.StringIO()) == 0
    assert _cells(out.getvalue(), "step_0000") == _cells(plain.getvalue(), "step_0000")
    assert "the run in its own order" not in out.getvalue()


def test_a_terminal_gets_the_run_order_again_when_steps_disagree_with_names(tmp_path, monkeypatch):
    # names order 0, 10, 20, 30; the stored steps put the last first
    write_ranks(tmp_path / "run", snapshots=4, steps=[10, 20, 30, 5])
    _serial(monkeypatch)
    args = build_parser().parse_args(["inspect", str(tmp_path / "run"), "--health", "none"])
    out = _Terminal()
    assert inspect_command(args, out=out, err=_Terminal()) == 0
    plain = io.StringIO()
    assert inspect_command(args, out=plain, err=io.StringIO()) == 0
    text = out.getvalue()
    assert "the run in its own order" in text
    again = text[text.index("the run in its own order"):]
    assert _cells(again, "step_0030") == _cells(plain.getvalue(), "step_0030")
    assert [r[4] for r in _cells(again, "step_0030")] == ["5", "10", "20", "30"]   # "(4 files)" splits in two


def test_one_stored_layout_is_checked_once_for_a_run(tmp_path, monkeypatch):
    write_ranks(tmp_path / "run", snapshots=5)
    from swarmaudit.readers import layout_files
    monkeypatch.setattr(layout_files, "_seen", {})
    calls = []
    original = BlockLayout.validate

    def spy(self):
        calls.append(self.source)
        return original(self)
    monkeypatch.setattr(BlockLayout, "validate", spy)
    run = open_run(str(tmp_path / "run"))
    assert len(calls) == 1
    lays = [run[i].layout for i in range(len(run))]
    # each snapshot's layout is its first file's, with that file named as its source
    assert [lay.source for lay in lays] == [r.paths[0] for r in run.refs]
    with h5py.File(run.refs[2].paths[0], "r") as fh:
        np.testing.assert_array_equal(lays[2].lower, fh["blocks/lower"][()])
        np.testing.assert_array_equal(lays[2].rank, fh["blocks/rank"][()])


def test_inspect_json_is_the_same_on_worker_processes(tmp_path, monkeypatch, capsys):
    write_ranks(tmp_path / "run", snapshots=4)
    got = {}
    for where, setup in (("serial", _serial), ("processes", _processes)):
        setup(monkeypatch)
        assert main(["inspect", str(tmp_path / "run"), "--json", "--health", "all"]) == 0
        got[where] = json.loads(capsys.readouterr().out)
    assert got["serial"] == got["processes"]
    assert [s["step"] for s in got["serial"]["snapshots"]] == [0, 10, 20, 30]
    assert [s["count"]["electrons"] for s in got["serial"]["snapshots"]] == [800] * 4


SLOW_INSPECT = """
import os, sys, time
from swarmaudit.app import cli
from swarmaudit.engine import scan
from swarmaudit.readers import discover

marks = sys.argv[2]
plain = discover.scan_paths

def slow(paths):     # a slow disk: each snapshot's scan takes a while
    with open(marks, "a") as fh:
        fh.write(f"{os.getpid()}\\n")
    time.sleep(0.2)
    return plain(paths)

slow.__module__, slow.__qualname__ = "__main__", "slow"
discover.scan_paths = slow
scan.MIN_FILES = 1
scan.free_cores = lambda: 2      # however busy the machine running the tests is
sys.exit(cli.main(["inspect", sys.argv[1], "--health", "none"]))
"""


def test_ctrl_c_while_worker_processes_scan_stops_them_all(tmp_path):
    import signal
    import subprocess
    import sys

    import psutil
    write_ranks(tmp_path / "run", snapshots=40, ranks=2, n=10)
    marks = tmp_path / "marks"
    env = dict(os.environ, SWARMAUDIT_CACHE="off")
    proc = subprocess.Popen([sys.executable, "-c", SLOW_INSPECT, str(tmp_path / "run"), str(marks)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, env=env,
                            start_new_session=True)
    deadline = time.time() + 60
    while not (marks.exists() and len(set(marks.read_text().split())) >= 2) and time.time() < deadline:
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGINT)          # what a terminal's Ctrl-C does: the whole group
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert "interrupted" in err and "Traceback" not in err
    workers = {int(p) for p in marks.read_text().split()}
    assert proc.pid not in workers              # the scans ran in worker processes
    time.sleep(0.2)
    alive = [p for p in workers if psutil.pid_exists(p) and psutil.Process(p).status() != psutil.STATUS_ZOMBIE]
    assert alive == []
