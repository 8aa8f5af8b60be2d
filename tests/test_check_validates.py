"""``check`` refuses (exit 2) the damaged or empty dumps the export refuses, instead of passing them.

Outside reference: the files written here (a header with no rows, text in a numeric column the
totals do not read, a row with more fields than the header), read back by Python's csv module.
"""

import csv

import pytest

from swarmaudit.app.cli import main


@pytest.fixture(autouse=True)
def private_cache(tmp_path, monkeypatch):
    monkeypatch.setenv("SWARMAUDIT_CACHE", str(tmp_path / "cache"))


def _run(folder, bodies):
    folder.mkdir()
    for k, rows in enumerate(bodies):
        with open(folder / f"s{k}.csv", "w", newline="") as fh:
            fh.write(f"# step = {k}\n")
            w = csv.writer(fh)
            w.writerow(["x", "y", "vx", "vy", "id"])   # no weight or mass: count is all check needs
            w.writerows(rows)
    return str(folder)


GOOD = [[i / 10, i / 10, 1, 0, i] for i in range(10)]


@pytest.mark.parametrize("damage, says", [
    ("empty", "holds no particles"),
    ("text", "'oops' is not a number"),
    ("ragged", "has 6 fields, the header has 5"),
])
def test_check_refuses_what_export_refuses(tmp_path, capsys, damage, says):
    bad = [list(r) for r in GOOD]
    if damage == "empty":
        bad = []
    elif damage == "text":
        bad[3][0] = "oops"
    else:
        bad[4].append(7)
    run = _run(tmp_path / "run", [bad, bad] if damage == "empty" else [GOOD, bad])
    if damage != "empty":
        with open(tmp_path / "run" / "s1.csv", newline="") as fh:     # the damage is really there
            rows = [r for r in csv.reader(fh) if r and not r[0].startswith("#")]
        assert any(len(r) != 5 or "oops" in r for r in rows)
    assert main(["check", run, "--rtol", "0.1"]) == 2
    err = capsys.readouterr().err
    assert says in err and ("s1.csv" in err or "s0.csv" in err)
    assert "Traceback" not in err
    if damage == "empty":
        return
    assert main(["export", run, "--out", str(tmp_path / "out"), "--domain", "0,1,0,1", "--cells",
                 "4,4", "--quiet", "--width", "200", "--height", "200", "--dpi", "40"]) == 2


def test_allow_empty_lets_an_empty_snapshot_through(tmp_path, capsys):
    run = _run(tmp_path / "run", [GOOD, GOOD, []])
    assert main(["check", run, "--rtol", "0.1"]) == 2
    assert "--allow-empty" in capsys.readouterr().err
    # allowed: then the count gate itself judges the emptied snapshot
    assert main(["check", run, "--rtol", "0.1", "--allow-empty"]) == 1
    assert capsys.readouterr().out.startswith("FAIL: count")


def test_clean_run_still_passes(tmp_path, capsys):
    run = _run(tmp_path / "run", [GOOD, GOOD])
    assert main(["check", run, "--rtol", "0.1"]) == 0
