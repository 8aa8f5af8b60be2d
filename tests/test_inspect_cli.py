"""`swarmaudit inspect` end to end through the CLI entry, on small runs written here with numpy."""

import json

import numpy as np
import pytest

from swarmaudit.app.cli import main


def _write_run(folder, n=5000, snapshots=3, seed=0):
    rng = np.random.default_rng(seed)
    x, y = rng.random(n), rng.random(n)
    ids = rng.permutation(n)
    for s in range(snapshots):
        np.savez(folder / f"dump_{s * 7:04d}.npz", x=x, y=y, vx=rng.normal(size=n), vy=rng.normal(size=n),
                 id=ids, w=np.full(n, 2.0), step=np.array(s * 7), time=np.array(s * 0.5))
        x = (x + 0.01) % 1.0
    return x, y


def test_inspect_json_counts_and_roles(tmp_path, capsys):
    _write_run(tmp_path)
    rc = main(["inspect", str(tmp_path), "--json", "--domain", "0,1,0,1", "--cells", "16,16",
               "--blocks", "2,2"])
    assert rc == 0
    info = json.loads(capsys.readouterr().out)
    assert [s["step"] for s in info["snapshots"]] == [0, 7, 14]
    assert [s["count"]["particles"] for s in info["snapshots"]] == [5000] * 3
    roles = {c["name"]: c["role"] for c in info["species"][0]["columns"]}
    assert roles == {"x": "x", "y": "y", "vx": "vx", "vy": "vy", "id": "id", "w": "weight"}
    assert info["layout"]["blocks"] == 4 and info["layout"]["cells"] == [16, 16]


def test_inspect_health_counts_match_numpy(tmp_path, capsys):
    _write_run(tmp_path)
    path = tmp_path / "dump_0007.npz"
    d = dict(np.load(path))
    d["x"][:5] = np.nan
    d["y"][10:13] = 3.0          # outside [0, 1)
    d["id"][20:24] = d["id"][0]  # four repeats of one id
    np.savez(path, **d)
    rc = main(["inspect", str(tmp_path), "--json", "--domain", "0,1,0,1", "--cells", "8,8"])
    assert rc == 0
    health = {h["snapshot"]: h for h in json.loads(capsys.readouterr().out)["health"]}
    # reference counts straight from numpy on the arrays written
    assert health[1]["nonfinite_positions"] == int(np.count_nonzero(~np.isfinite(d["x"])))
    assert health[1]["outside_domain"] == int(np.count_nonzero(d["y"] >= 1.0))
    assert health[1]["duplicate_keys"] == len(d["id"]) - len(np.unique(d["id"]))
    assert health[0]["nonfinite_positions"] == 0


def test_inspect_text_mentions_problems(tmp_path, capsys):
    _write_run(tmp_path, snapshots=2)
    d = dict(np.load(tmp_path / "dump_0000.npz"))
    d["x"][:3] = np.inf
    np.savez(tmp_path / "dump_0000.npz", **d)
    assert main(["inspect", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "3 particles with a NaN or infinite position" in out
    assert "one block around" in out   # no layout given: the fallback is said


@pytest.mark.parametrize("args, needle", [
    (["inspect", "/nonexistent/run"], "no such file"),
    (["inspect", "{tmp}", "--domain", "0,1,0"], "--domain"),
    (["inspect", "{tmp}", "--domain", "0,1,0,1", "--cells", "10,10", "--blocks", "3,3"], "multiple"),
    (["inspect", "{tmp}", "--periodic", "q"], "--periodic"),
    (["inspect", "{tmp}", "--role", "bogus=x"], "unknown role"),
    (["inspect", "{tmp}", "--role", "weight=nope"], "no species"),
    (["inspect", "{tmp}", "--id", "id,cpu"], "'cpu'"),
])
def test_inspect_bad_options_exit_2(tmp_path, capsys, args, needle):
    _write_run(tmp_path, snapshots=1)
    args = [a.replace("{tmp}", str(tmp_path)) for a in args]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert needle in err and "Traceback" not in err


def test_a_run_where_nothing_opens_says_what_is_wrong(tmp_path, capsys):
    # freshly written, so it could be "still being written" — but when no snapshot opens at all,
    # the real problem of the file is what the user needs to read
    np.savez(tmp_path / "a_0001.npz", x=np.zeros(3), y=np.zeros(4))
    assert main(["inspect", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "a_0001.npz" in err and "length" in err and "Traceback" not in err
