"""Several run folders on one command line: ``serve A B`` serves two runs; the one-run commands
refuse them plainly; files or a glob of one run stay one run.

Outside reference: the snapshots written here (their folders, counts and steps).
"""

import glob
import os

import numpy as np
import pytest

from swarmaudit.app.cli import build_parser, main
from swarmaudit.app.options import contexts_from_options
from test_serve_security import Server, _session_state


def _write(folder, steps, n=50, seed=0):
    os.makedirs(folder)
    rng = np.random.default_rng(seed)
    for s in steps:
        np.savez(os.path.join(folder, f"snap_{s:04d}.npz"), x=rng.random(n), y=rng.random(n),
                 vx=np.zeros(n), vy=np.zeros(n), id=np.arange(n), step=np.array(s))
    return folder


@pytest.fixture
def two_runs(tmp_path, monkeypatch):
    monkeypatch.setenv("SWARMAUDIT_CACHE", str(tmp_path / "cache"))
    a = _write(str(tmp_path / "alpha"), [0, 2, 4])
    b = _write(str(tmp_path / "beta"), [1, 3], seed=1)
    return a, b


def test_each_folder_is_a_run_of_its_own(two_runs):
    a, b = two_runs
    ctxs = contexts_from_options(build_parser().parse_args(["serve", a, b]))
    assert [c.run.labels for c in ctxs] == [["snap_0000.npz", "snap_0002.npz", "snap_0004.npz"],
                                            ["snap_0001.npz", "snap_0003.npz"]]
    assert [[s.step for s in c.run] for c in ctxs] == [[0, 2, 4], [1, 3]]


def test_files_or_a_glob_of_one_run_stay_one_run(two_runs):
    a, _ = two_runs
    files = sorted(glob.glob(os.path.join(a, "*.npz")))
    for spec in (files, [os.path.join(a, "snap_*.npz")]):
        ctxs = contexts_from_options(build_parser().parse_args(["serve", *spec]))
        assert len(ctxs) == 1 and len(ctxs[0].run) == 3


def test_one_run_commands_refuse_two_folders(two_runs, capsys):
    a, b = two_runs
    for cmd in (["inspect", a, b], ["check", a, b, "--rtol", "0.1"]):
        assert main(cmd) == 2
        err = capsys.readouterr().err
        assert "are 2 run folders" in err and "Traceback" not in err
    with pytest.raises(Exception) as exc:
        contexts_from_options(build_parser().parse_args(["serve", a, b, os.path.join(b, "snap_0001.npz")]))
    assert "beside several run folders" in str(exc.value)


def test_serve_lists_both_runs(two_runs):
    a, b = two_runs
    s = Server([a, b])
    try:
        assert "serving alpha, beta at" in s.output
        state = _session_state(s.url)
        assert "alpha" in state and "beta" in state          # the run menu's options
        picked = _session_state(s.url, {"run": "beta"})
        assert "run=beta" in picked                           # the link of the chosen run
    finally:
        s.stop()
