"""An --out inside a run folder is refused, and a folder of swarmaudit's own tables is never a snapshot.

Outside reference: the run's snapshots as written here (their count and steps), and sha256 digests
for the unchanged run folder.
"""

import json
import os
import shutil

import pytest

from _audit_runs import drifting_plasma, folder_state, write_npz_run
from swarmaudit.app.cli import main

SMALL = ["--width", "240", "--height", "200", "--dpi", "40", "--quiet"]
LAYOUT = ["--domain", "0,1,0,1", "--cells", "8,8", "--blocks", "2,2"]


@pytest.fixture(autouse=True)
def private_cache(tmp_path, monkeypatch):
    monkeypatch.setenv("SWARMAUDIT_CACHE", str(tmp_path / "cache"))


@pytest.mark.parametrize("where", ["audit", os.path.join("deeper", "audit")])
def test_out_inside_the_run_folder_is_refused(tmp_path, capsys, where):
    run = write_npz_run(tmp_path / "run", drifting_plasma(n=60, snapshots=3, loss_at=None))
    before = folder_state(run)
    code = main(["export", run, "--out", os.path.join(run, where), *LAYOUT, *SMALL])
    err = capsys.readouterr().err
    assert code == 2
    assert "is inside the run folder" in err and "Traceback" not in err
    assert folder_state(run) == before, "nothing written into the run folder"


def test_out_inside_the_folder_of_named_files_is_refused(tmp_path, capsys):
    run = write_npz_run(tmp_path / "run", drifting_plasma(n=60, snapshots=2, loss_at=None))
    files = sorted(os.path.join(run, f) for f in os.listdir(run))
    assert main(["export", *files, "--out", os.path.join(run, "audit"), *LAYOUT, *SMALL]) == 2
    assert "is inside the run folder" in capsys.readouterr().err


def test_a_folder_of_our_tables_is_not_a_snapshot(tmp_path, capsys):
    # the probe: an export ended up inside the run folder (an older version accepted it)
    run = write_npz_run(tmp_path / "run", drifting_plasma(n=60, snapshots=3, loss_at=None))
    out = tmp_path / "out"
    assert main(["export", run, "--out", str(out), *LAYOUT, *SMALL]) == 0
    shutil.copytree(out, os.path.join(run, "audit"))
    capsys.readouterr()
    assert main(["inspect", run, "--json", *LAYOUT]) == 0
    info = json.loads(capsys.readouterr().out)
    assert [s["label"] for s in info["snapshots"]] == ["snap_0000.npz", "snap_0001.npz", "snap_0002.npz"]
    assert [s["step"] for s in info["snapshots"]] == [0, 10, 20]
    assert any("audit: left out, it holds swarmaudit's own tables" in n for n in info["notes"])
    # check judges against the real first snapshot: the run conserves everything
    assert main(["check", run, "--rtol", "1e-9", *LAYOUT]) == 0
    assert "over 3 snapshot(s)" in capsys.readouterr().out


def test_a_folder_of_our_comparison_tables_is_not_a_snapshot(tmp_path, capsys):
    run = write_npz_run(tmp_path / "run", drifting_plasma(n=60, snapshots=3, loss_at=None))
    other = write_npz_run(tmp_path / "other", drifting_plasma(n=60, snapshots=3, loss_at=None))
    out = tmp_path / "cmp"
    assert main(["compare", run, other, "--out", str(out), *LAYOUT, *SMALL]) == 0
    shutil.copytree(out, os.path.join(run, "cmp"), ignore=shutil.ignore_patterns("figures"))
    capsys.readouterr()
    assert main(["inspect", run, "--json", *LAYOUT]) == 0
    info = json.loads(capsys.readouterr().out)
    assert [s["label"] for s in info["snapshots"]] == ["snap_0000.npz", "snap_0001.npz", "snap_0002.npz"]
    assert any("cmp: left out, it holds swarmaudit's own tables" in n for n in info["notes"])
