"""Every command leaves its input files as they were: same sha256, size and mtime, no new file
beside them; on success, on bad options, on a broken file in the run, and when interrupted.

Each command gets its own copy of the inputs (copied with their mtimes), so a change names
the command that made it, and the slow ones (export, serve) run side by side. The files stay
writable on purpose: a write would succeed and show in the hashes.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import signal
import subprocess
import sys
import time
import urllib.request

import h5py
import numpy as np
import pytest

SPECIES = {"electrons": -1.0, "ions": 1.0}


def write_rank_run(folder, steps=(0, 10, 20), ranks=2, n=1500, seed=4):
    """Per-rank HDF5: one sub-folder per step, one file per rank, a ``blocks`` group in each."""
    rng = np.random.default_rng(seed)
    lower = np.array([[0.0, 0.0], [1.0, 0.0]])
    upper = np.array([[1.0, 1.0], [2.0, 1.0]])
    for k, step in enumerate(steps):
        d = os.path.join(folder, f"step_{step:04d}")
        os.makedirs(d)
        for r in range(ranks):
            with h5py.File(os.path.join(d, f"rank_{r:03d}.h5"), "w") as f:
                f.attrs["step"] = step
                f.attrs["time"] = 0.5 * k
                for name, q in SPECIES.items():
                    g = f.create_group(name)
                    g.attrs["mass"] = 1.0
                    g.attrs["charge"] = q
                    g.create_dataset("position", data=np.column_stack(
                        [rng.uniform(r, r + 1, n), rng.uniform(0, 1, n)]))
                    g.create_dataset("velocity", data=rng.normal(0, 1, (n, 2)))
                    g.create_dataset("id", data=np.arange(n, dtype=np.int64) + r * n)
                    g.create_dataset("weight", data=np.full(n, 2.0))
                b = f.create_group("blocks")
                b.create_dataset("lower", data=lower)
                b.create_dataset("upper", data=upper)
                b.create_dataset("level", data=np.zeros(2, dtype=np.int64))
                b.create_dataset("rank", data=np.arange(2, dtype=np.int64))
                b.attrs["domain_lower"] = [0.0, 0.0]
                b.attrs["domain_upper"] = [2.0, 1.0]
                b.attrs["cells"] = [16, 8]
                b.attrs["periodic"] = "x"


def write_csv_run(folder, steps=(0, 5, 10), n=800, seed=5):
    """CSV snapshots with their own column names (a roles file says what they are) and a layout.csv."""
    rng = np.random.default_rng(seed)
    os.makedirs(folder)
    for step in steps:
        lines = [f"# step = {step}", f"# time = {step * 1e-3}", "px0,px1,u0,u1,pid,w"]
        for i in range(n):
            lines.append(f"{rng.uniform(0, 2):.9g},{rng.uniform(0, 1):.9g},{rng.normal():.9g},"
                         f"{rng.normal():.9g},{i},1.5")
        with open(os.path.join(folder, f"duct_{step:04d}.csv"), "w") as fh:
            fh.write("\n".join(lines) + "\n")
    with open(os.path.join(folder, "layout.csv"), "w") as fh:
        fh.write("block,level,rank,x_lo,x_hi,y_lo,y_hi\n0,0,0,0,1,0,1\n1,0,1,1,2,0,1\n")


MAP = '[roles]\nx = "px0"\ny = "px1"\nvx = "u0"\nvy = "u1"\nid = "pid"\nweight = "w"\n'


@pytest.fixture(scope="module")
def master(tmp_path_factory):
    base = tmp_path_factory.mktemp("inputs")
    write_rank_run(str(base / "ranks"))
    write_csv_run(str(base / "duct"))
    (base / "roles_map.toml").write_text(MAP)
    # everything written well in the past: nothing here looks like a run still being written
    past = time.time() - 3600
    for root, _, files in os.walk(base):
        for f in files:
            os.utime(os.path.join(root, f), (past, past))
    return base


@pytest.fixture
def inputs(master, tmp_path):
    """A fresh copy of the inputs per call (mtimes kept) plus a cache folder outside them."""
    count = iter(range(1000))

    def copy():
        dest = tmp_path / f"in{next(count)}"
        shutil.copytree(master, dest, copy_function=shutil.copy2)
        return dest
    return copy


def fingerprint(root) -> dict:
    """relative path -> (sha256, size, mtime_ns) of every file under ``root``."""
    out = {}
    for folder, _, files in os.walk(root):
        for f in files:
            p = os.path.join(folder, f)
            st = os.stat(p)
            with open(p, "rb") as fh:
                digest = hashlib.sha256(fh.read()).hexdigest()
            out[os.path.relpath(p, root)] = (digest, st.st_size, st.st_mtime_ns)
    return out


def env(tmp_path):
    return dict(os.environ, PYTHONUNBUFFERED="1", SWARMAUDIT_CACHE=str(tmp_path / "cache"),
                MPLBACKEND="Agg")


def start(args, tmp_path, **kw):
    return subprocess.Popen([sys.executable, "-m", "swarmaudit", *map(str, args)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=env(tmp_path), **kw)


def finish(proc, timeout=240):
    out, err = proc.communicate(timeout=timeout)
    return proc.returncode, out, err


def assert_untouched(before: dict, root, *, new_files_allowed=False, what=""):
    after = fingerprint(root)
    changed = [p for p in before if after.get(p) != before[p]]
    assert not changed, f"{what}: input files changed: {changed}"
    if not new_files_allowed:
        added = sorted(set(after) - set(before))
        assert not added, f"{what}: files appeared among the inputs: {added}"


def _free_port():
    import socket
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_every_command_leaves_its_inputs_alone(inputs, tmp_path):
    ranks_cmds = {
        "inspect": ["inspect", "{run}"],
        "inspect --json": ["inspect", "{run}", "--json"],
        "check": ["check", "{run}", "--rtol", "1e-3"],
        "export": ["export", "{run}", "--out", "{out}", "--snapshots", "0,-1", "--quiet"],
    }
    csv_cmds = {
        "csv inspect": ["inspect", "{run}", "--roles", "{map}"],
        "csv check": ["check", "{run}", "--roles", "{map}", "--rtol", "1e-6"],
        # the run folder itself as --out: refused (its tables would be read as snapshots)
        "csv export into the run folder": ["export", "{run}", "--map", "{map}", "--out", "{run}",
                                           "--snapshots", "0", "--quiet"],
        "export into a per-rank run's folder": ["export", "{ranks}", "--out", "{ranks}", "--quiet"],
    }
    jobs = []
    for table, sub in ((ranks_cmds, "ranks"), (csv_cmds, "duct")):
        for what, args in table.items():
            root = inputs()
            before = fingerprint(root)
            fill = {"run": root / sub, "map": root / "roles_map.toml", "out": tmp_path / f"out{len(jobs)}",
                    "ranks": root / "ranks"}
            jobs.append((what, root, before, start([a.format(**fill) for a in args], tmp_path)))

    # serve: started, its page fetched once (a session builds every view), stopped with Ctrl-C
    root = inputs()
    before = fingerprint(root)
    port = _free_port()
    server = start(["serve", root / "ranks", "--port", port, "--no-browser"], tmp_path)
    deadline = time.time() + 120
    page = None
    while time.time() < deadline and page is None:
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{port}/", timeout=60) as r:
                page = r.read().decode("utf-8", "replace")
        except OSError:
            if server.poll() is not None:
                break
            time.sleep(0.5)
    assert page is not None and "swarmaudit" in page, "the server did not answer"
    server.send_signal(signal.SIGINT)
    code, out, err = finish(server, timeout=60)
    assert code == 130 and "Traceback" not in err, err
    assert_untouched(before, root, what="serve")

    for what, root, before, proc in jobs:
        code, out, err = finish(proc)
        assert "Traceback" not in err, f"{what}: {err}"
        if "folder" in what:
            assert code == 2 and "is a folder of the run itself" in err, f"{what}: {err}"
        else:
            # check exits 1 when a total drifts (random data: it may); 2 would be an input error
            assert code in ((0, 1) if "check" in what else (0,)), f"{what}: exit {code}: {err}"
        assert_untouched(before, root, what=what)


def test_errors_leave_inputs_alone(inputs, tmp_path):
    cases = {
        "check without --rtol": (["check", "{run}"], "--rtol"),
        "export of a snapshot that is not there": (
            ["export", "{run}", "--out", "{out}", "--snapshots", "7"], "snapshot"),
        "half a domain": (["inspect", "{run}", "--domain", "0,2,0,1"], "--cells"),
        "password without share": (["serve", "{run}", "--password", "abcdefgh12", "--no-browser"],
                                   "--share"),
        "a roles file that is not there": (["inspect", "{run}", "--roles", "{root}/nope.toml"], "nope.toml"),
        "a periodic axis that does not exist": (["check", "{run}", "--periodic", "w", "--rtol", "1"],
                                                "--periodic"),
        "layout and domain at once": (["inspect", "{run}", "--layout", "{run}/../duct/layout.csv",
                                       "--domain", "0,1,0,1", "--cells", "4,4"], "--layout"),
    }
    # a broken file in the run, written long ago (so not "still being written"): an error
    broken = inputs()
    part = broken / "ranks" / "step_0010" / "rank_001.h5"
    data = part.read_bytes()
    st = os.stat(part)
    part.write_bytes(data[: len(data) // 2])
    os.utime(part, ns=(st.st_atime_ns, st.st_mtime_ns))
    broken_before = fingerprint(broken)
    broken_jobs = [(what, start([a.format(run=broken / "ranks", out=tmp_path / f"bo{k}") for a in args],
                                tmp_path))
                   for k, (what, args) in enumerate({"inspect": ["inspect", "{run}"],
                                                    "check": ["check", "{run}", "--rtol", "1"],
                                                    "export": ["export", "{run}", "--out", "{out}"]
                                                    }.items())]
    jobs = []
    for k, (what, (args, word)) in enumerate(cases.items()):
        root = inputs()
        before = fingerprint(root)
        fill = {"run": root / "ranks", "out": tmp_path / f"eo{k}", "root": root}
        jobs.append((what, word, root, before, start([a.format(**fill) for a in args], tmp_path)))
    for what, word, root, before, proc in jobs:
        code, out, err = finish(proc)
        assert code == 2, f"{what}: exit {code}: {err}"
        assert word in err and "Traceback" not in err, f"{what}: {err}"
        assert_untouched(before, root, what=what)
    for what, proc in broken_jobs:
        code, out, err = finish(proc)
        assert code == 2 and "rank_001.h5" in err and "Traceback" not in err, f"broken {what}: {err}"
    assert_untouched(broken_before, broken, what="broken file")


def _staged(out, pattern):
    """What an export has written so far: into its hidden staging folder until it is done."""
    return list(out.glob(".export-*/" + pattern))


#: moments of an export to press Ctrl-C at: (name, has it come?) from the output folder
INTERRUPT_MOMENTS = {
    # tables being reduced on the thread pools, no figure yet
    "early": lambda out: bool(_staged(out, "figures")) and not _staged(out, "figures/*.png"),
    # the density views being drawn
    "mid": lambda out: bool(_staged(out, "figures/*.png")),
    # past the drift figure: the last figures before the report
    "late": lambda out: bool(_staged(out, "figures/drift.png")),
}


def test_interrupted_export_stops_at_once_and_leaves_inputs_alone(inputs, tmp_path):
    # Ctrl-C at several moments of one export each (run side by side): exit 130 every time, one
    # line and no traceback, nothing more written, the inputs as they were
    jobs = {}
    for moment in INTERRUPT_MOMENTS:
        root = inputs()
        out = tmp_path / f"out_{moment}"
        jobs[moment] = dict(root=root, out=out, before=fingerprint(root), sent=False,
                            proc=start(["export", root / "ranks", "--out", out, "--snapshots", "all"],
                                       tmp_path))
    deadline = time.time() + 400
    while time.time() < deadline and not all(j["sent"] for j in jobs.values()):
        for moment, j in jobs.items():
            if j["sent"]:
                continue
            assert j["proc"].poll() is None, f"{moment}: the export ended before it could be interrupted"
            if INTERRUPT_MOMENTS[moment](j["out"]):
                j["proc"].send_signal(signal.SIGINT)
                j["sent"] = True
        time.sleep(0.02)
    assert all(j["sent"] for j in jobs.values()), "a moment to interrupt at never came"
    for moment, j in jobs.items():
        code, _, err = finish(j["proc"], timeout=60)
        assert code == 130, f"{moment}: exit {code}: {err}"
        assert "Traceback" not in err and "Exception ignored" not in err, f"{moment}: {err}"
        assert err.strip().splitlines()[-1] == "swarmaudit: interrupted", f"{moment}: {err}"
        # it did stop midway, and left nothing half-written (the folder it made is gone too)
        assert not j["out"].exists(), (moment, sorted(map(str, j["out"].rglob("*"))))
        assert_untouched(j["before"], j["root"], what=f"export interrupted {moment}")


def test_export_refuses_to_write_over_an_input(inputs, tmp_path):
    # a CSV snapshot that happens to carry the name of one of the export's tables
    root = inputs()
    run = root / "duct"
    os.rename(run / "duct_0010.csv", run / "census.csv")
    before = fingerprint(root)
    proc = start(["export", run, "--map", root / "roles_map.toml", "--out", run, "--quiet"], tmp_path)
    code, _, err = finish(proc)
    assert code == 2 and "census.csv" in err and "never overwrites an input" in err, err
    assert_untouched(before, root, what="export over an input")
