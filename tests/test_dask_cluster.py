"""Every command against a real dask.distributed cluster: a scheduler and worker processes started
as a user starts them (``python -m distributed.cli.dask_scheduler`` / ``dask_worker``), on
loopback, one thread per worker; the commands run as a user runs them
(``python -m swarmaudit ... --scheduler tcp://127.0.0.1:PORT``).

Each table a command writes or prints is compared with the same command run in memory (no
scheduler): counts bit for bit, float totals to the rounding of compensated sums (rtol 1e-12:
a worker reads its files itself, so it may take the numpy path where this process reads
straight from a held file). The workers' own task counts show that they did the work.
An unreachable or malformed scheduler address is one error line and exit code 2.
"""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import pytest

from _rank_runs import write_moving_run

import swarmaudit

WORKERS = 2
#: the folder that holds the swarmaudit under test: workers and commands import this one
PACKAGE_PARENT = os.path.dirname(os.path.dirname(os.path.abspath(swarmaudit.__file__)))


def _env() -> dict:
    """This environment with the package under test first on the path, and no result cache (a
    cached reduction would never reach the cluster)."""
    path = os.pathsep.join(p for p in (PACKAGE_PARENT, os.environ.get("PYTHONPATH")) if p)
    return dict(os.environ, PYTHONPATH=path, SWARMAUDIT_CACHE="off")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _stop(procs) -> None:
    for p in procs:
        if p.poll() is None:
            p.terminate()
    for p in procs:
        try:
            p.wait(timeout=10)
        except subprocess.TimeoutExpired:
            p.kill()
            p.wait(timeout=10)


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    """(address, client) of a scheduler with WORKERS single-threaded worker processes."""
    from distributed import Client
    logs = tmp_path_factory.mktemp("cluster")
    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    # no HTTP port off loopback; a scheduler left behind by a killed test run ends when idle,
    # its workers when it is gone
    quiet = ["--no-dashboard", "--dashboard-address", "127.0.0.1:0"]
    commands = [["distributed.cli.dask_scheduler", "--host", "127.0.0.1", "--port", str(port),
                 "--idle-timeout", "300s", *quiet]]
    commands += [["distributed.cli.dask_worker", address, "--nthreads", "1", "--no-nanny",
                  "--host", "127.0.0.1", "--local-directory", str(logs / f"worker{k}"),
                  "--death-timeout", "60s", *quiet] for k in range(WORKERS)]
    procs, client = [], None
    try:
        for k, cmd in enumerate(commands):
            with open(logs / f"{k}.log", "w") as log:
                procs.append(subprocess.Popen([sys.executable, "-m", *cmd], stdout=log,
                                              stderr=subprocess.STDOUT, env=_env()))
        deadline = time.monotonic() + 60
        while client is None:
            try:
                client = Client(address, timeout="2s", set_as_default=False)
            except OSError:
                if time.monotonic() > deadline or procs[0].poll() is not None:
                    raise AssertionError("the scheduler did not start:\n"
                                         + (logs / "0.log").read_text()) from None
        client.wait_for_workers(WORKERS, timeout=60)
        yield address, client
    finally:
        if client is not None:
            client.close()
        # workers before the scheduler: a worker told to stop once the scheduler is gone waits
        # for it to answer (30 s)
        _stop(procs[1:])
        _stop(procs[:1])


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Two runs of the same particles from different seeds (compare pairs them by id and step)."""
    top = tmp_path_factory.mktemp("cluster_runs")
    write_moving_run(top / "run")
    write_moving_run(top / "other", seed=8)
    return str(top / "run"), str(top / "other")


@pytest.fixture(scope="module")
def run(runs):
    return runs[0]


def in_memory_and_on_the_cluster(address, args, cluster_args=None, timeout=180):
    """(in memory, on the cluster): the command run both ways at once, each ``(exit code,
    stdout, stderr)``; ``cluster_args`` replace ``args`` on the cluster's side when given."""
    runs = [args, [*(cluster_args or args), "--scheduler", address]]
    procs = [subprocess.Popen([sys.executable, "-m", "swarmaudit", *a], stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True, env=_env()) for a in runs]
    try:
        outs = [p.communicate(timeout=timeout) for p in procs]
    finally:
        _stop(procs)
    return [(p.returncode, out, err) for p, (out, err) in zip(procs, outs)]


def _executed(client) -> int:
    """Tasks the workers have run so far."""
    return sum(client.run(lambda dask_worker: dask_worker.state.executed_count).values())


def _prefixes(client) -> set:
    return set(client.run_on_scheduler(lambda dask_scheduler: list(dask_scheduler.task_prefixes)))


def assert_same_table(got: pd.DataFrame, ref: pd.DataFrame, name: str) -> None:
    assert list(got.columns) == list(ref.columns), name
    assert len(got) == len(ref) > 0, name
    for col in ref.columns:
        g, r = got[col], ref[col]
        if r.dtype.kind == "f" or g.dtype.kind == "f":
            np.testing.assert_allclose(g.to_numpy(dtype=float), r.to_numpy(dtype=float), rtol=1e-12,
                                       atol=0, equal_nan=True, err_msg=f"{name}.{col}")
        else:
            pd.testing.assert_series_equal(g, r, check_exact=True, obj=f"{name}.{col}")


def test_inspect_check_and_export_on_the_cluster_equal_the_in_memory_run(cluster, run, tmp_path):
    address, client = cluster

    for args in (["inspect", run], ["inspect", run, "--json"]):
        ref, got = in_memory_and_on_the_cluster(address, args)
        assert ref[0] == got[0] == 0, got[2]
        assert got[1:] == ref[1:]                    # stdout and stderr
    assert json.loads(got[1])["snapshots"]
    assert "scan_paths" in _prefixes(client)         # the files' metadata was read on the workers

    # check: the run loses and gains particles, so counts leave a tight band (exit 1)
    before = _executed(client)
    for rtol, code, verdict in (("1e-3", 1, "FAIL: count"), ("0.5", 0, "ok: ")):
        ref, got = in_memory_and_on_the_cluster(address, ["check", run, "--rtol", rtol])
        assert ref[0] == got[0] == code, got[2]
        assert got[1] == ref[1] and got[1].startswith(verdict)
    assert _executed(client) > before, "check did not run on the workers"
    assert "run_task" in _prefixes(client)

    before = _executed(client)
    out = {name: tmp_path / name for name in ("memory", "cluster")}
    args = ["export", run, "--quiet", "--rtol", "1e-3", "--snapshots", "0", "--width", "240",
            "--height", "200", "--dpi", "40", "--out"]
    ref, got = in_memory_and_on_the_cluster(address, args + [str(out["memory"])],
                                            args + [str(out["cluster"])])
    assert ref[0] == got[0] == 1, got[2]      # the gate: counts leave ±0.1 %
    assert "Traceback" not in got[2]
    assert _executed(client) > before, "export did not run on the workers"
    tables = sorted(p.name for p in out["memory"].glob("*.csv"))
    assert tables == sorted(p.name for p in out["cluster"].glob("*.csv"))
    assert {"census.csv", "migration.csv", "migration_summary.csv", "drift.csv"} <= set(tables)
    for name in tables:
        assert_same_table(pd.read_csv(out["cluster"] / name), pd.read_csv(out["memory"] / name), name)
    figures = sorted(p.name for p in (out["memory"] / "figures").iterdir())
    assert figures and figures == sorted(p.name for p in (out["cluster"] / "figures").iterdir())


def test_compare_on_the_cluster_equals_the_in_memory_comparison(cluster, runs):
    address, client = cluster
    before = _executed(client)
    ref, got = in_memory_and_on_the_cluster(address, ["compare", *runs, "--mode", "both",
                                                      "--rtol", "0.05"])
    assert ref[0] == got[0] == 1, got[2]              # the runs differ: the gate says so
    assert got[1] == ref[1] and "matched fraction" in got[1]
    assert _executed(client) > before, "compare did not run on the workers"


def test_a_dashboard_page_on_the_cluster_shows_the_in_memory_tables(cluster, run):
    # the page's state and panels built in this process, as a served session builds them, on a
    # context with the scheduler, against the same page of a server without it
    from dash_fixtures import server_of

    from swarmaudit.app.dashboard import Dashboard
    from swarmaudit.app.options import context_from_options
    from swarmaudit.app.panels import SidePanels, run_drift, snapshot_migration
    from swarmaudit.app.state import ViewState
    from swarmaudit.engine import dask_backend as dk
    address, client = cluster
    pages = {}
    try:
        for name, kw in (("memory", {}), ("cluster", {"scheduler": address})):
            ctx = context_from_options(None, run=run, no_cache=True, **kw)
            server = server_of(("run", ctx))
            state = ViewState(server.runs)
            state.param.update(snapshot=1, species="all")
            dash = Dashboard(state, server)
            before = _executed(client)
            image = dash.render_view("space", x_range=(0.0, 2.0), y_range=(0.0, 1.0), snapshot=1)
            drawn_on_workers = _executed(client) > before
            blocks, ranks, imbalance = SidePanels(state, server).census(1)
            moves, summary, disp, steps = snapshot_migration(ctx, 0, 1, "all")
            pages[name] = {"image": np.nan_to_num(image.get(0).dimension_values(2, flat=False)),
                           "blocks": blocks, "ranks": ranks, "moves": moves, "summary": summary,
                           "drift": run_drift(ctx), "disp": disp, "steps": steps,
                           "imbalance": imbalance, "on_workers": drawn_on_workers}
    finally:
        dk.configure("auto")      # the drawing engine is process-wide: leave it as found
        dk.close_engine(dk.client_for(address=address))
    got, ref = pages["cluster"], pages["memory"]
    assert got["on_workers"] and not ref["on_workers"]
    np.testing.assert_array_equal(got["image"], ref["image"])
    assert got["image"].sum() > 0
    for key in ("blocks", "ranks", "moves", "summary", "drift"):
        assert_same_table(got[key].reset_index(drop=True), ref[key].reset_index(drop=True), key)
    np.testing.assert_allclose(np.sort(got["disp"]), np.sort(ref["disp"]), rtol=1e-12)
    assert got["steps"] == ref["steps"] == 4
    assert got["imbalance"] == pytest.approx(ref["imbalance"], rel=1e-12)


def _all_at_once(commands: list) -> list:
    """``(exit code, stdout, stderr)`` of each swarmaudit command, all started at once."""
    procs = [subprocess.Popen([sys.executable, "-m", "swarmaudit", *c], stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True, env=_env()) for c in commands]
    try:
        outs = [p.communicate(timeout=180) for p in procs]
    finally:
        _stop(procs)
    return [(p.returncode, out, err) for p, (out, err) in zip(procs, outs)]


@pytest.mark.parametrize("address", ["closed", "tcp://127.0.0.1:notaport"])
def test_a_scheduler_that_cannot_be_reached_is_one_line_and_exit_2(address, run, tmp_path):
    # how long a closed port is tried is the connect timeout (tests/test_dask_backend.py)
    if address == "closed":
        address = f"tcp://127.0.0.1:{_free_port()}"     # nothing listens there
    commands = {"inspect": ["inspect", run], "check": ["check", run, "--rtol", "0.1"],
                "export": ["export", run, "--out", str(tmp_path / "out")],
                "serve": ["serve", run, "--port", "0", "--no-browser"],
                "compare": ["compare", run, run]}
    done = _all_at_once([[*args, "--scheduler", address] for args in commands.values()])
    for cmd, (code, out, err) in zip(commands, done):
        lines = err.strip().splitlines()
        assert code == 2, (cmd, err)
        assert len(lines) == 1 and lines[0].startswith("swarmaudit: error: --scheduler"), (cmd, err)
        assert address in lines[0] and "Traceback" not in err, (cmd, err)
        assert out == "", (cmd, out)
    assert not (tmp_path / "out").exists()
