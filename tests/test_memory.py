"""Lean memory: drawing x against y reads those two columns once and copies nothing big.

The snapshots have eight columns; the view needs two. A fresh interpreter
(the suite's own allocations must not count) opens each one and draws it;
its peak resident memory above the level just before the draw
(``VmHWM`` after resetting it through ``/proc/self/clear_refs``, Linux) and
the peak of numpy's traced allocations must stay within about twice the
two columns. That bound is common practice for an out-of-core viewer: the
columns themselves, plus one column's worth of temporaries.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap

import h5py
import numpy as np
import pytest

from _need import need_that

N = 2_000_000
COLUMNS = ("x", "y", "z", "vx", "vy", "vz", "weight", "charge")

need_that(os.path.exists("/proc/self/clear_refs"), "needs Linux /proc to reset the peak-memory mark",
          module_level=True)


@pytest.fixture(scope="module")
def snapshots(tmp_path_factory):
    root = tmp_path_factory.mktemp("lean")
    rng = np.random.default_rng(2)
    x, y = rng.random(N), rng.random(N)
    # only x and y are drawn; the other six are there to be left unread
    data = {c: (x if c == "x" else y if c == "y" else np.full(N, float(k))) for k, c in enumerate(COLUMNS)}
    (root / "h5").mkdir()
    with h5py.File(root / "h5" / "snap_0001.h5", "w") as fh:
        g = fh.create_group("electrons")
        for c in COLUMNS:
            g[c] = data[c]
    (root / "h5_f32").mkdir()
    with h5py.File(root / "h5_f32" / "snap_0001.h5", "w") as fh:
        g = fh.create_group("electrons")
        for c in COLUMNS:
            g[c] = data[c].astype(np.float32)
    ranks = root / "ranks" / "step_000001"
    ranks.mkdir(parents=True)
    for r, rows in enumerate(np.array_split(np.arange(N), 4)):
        with h5py.File(ranks / f"rank_{r:03d}.h5", "w") as fh:
            fh.attrs["step"] = 1
            g = fh.create_group("electrons")
            for c in COLUMNS:
                g[c] = data[c][rows]
    (root / "npy").mkdir()
    rec = np.empty(N, dtype=[(c, "<f8") for c in COLUMNS])
    for c in COLUMNS:
        rec[c] = data[c]
    np.save(root / "npy" / "snap_0001.npy", rec)
    return root


PROBE = textwrap.dedent("""
    import gc, json, sys, tracemalloc
    import numpy as np
    from swarmaudit.app.render import aggregate_points
    from swarmaudit.core.frame import Frame
    from swarmaudit.readers.discover import open_run

    def status(key):
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith(key):
                    return int(line.split()[1]) * 1024

    # compile the binning loop first (float64 and float32 columns, a piece long enough to take
    # it): its one-off memory is not the view's
    from swarmaudit.diagnostics.image import MIN_VALUES
    for dt in (np.float64, np.float32):
        warm = {"x": np.random.rand(MIN_VALUES).astype(dt), "y": np.random.rand(MIN_VALUES).astype(dt)}
        aggregate_points(Frame("w", MIN_VALUES, {k: (lambda v=v: v) for k, v in warm.items()}), "x", "y")
    out = {}
    tracemalloc.start()
    for name in sys.argv[1:]:
        run = open_run(name)
        frame = next(iter(run[0].species.values()))
        gc.collect()
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        base = status("VmRSS")
        tracemalloc.reset_peak()
        before = tracemalloc.get_traced_memory()[0]
        agg = aggregate_points(frame, "x", "y", width=800, height=600)
        traced = tracemalloc.get_traced_memory()[1] - before
        out[name] = {"rss": status("VmHWM") - base, "traced": traced, "reads": frame.reads,
                     "cols": frame["x"].nbytes + frame["y"].nbytes, "dtype": str(frame["x"].dtype),
                     "particles": int(agg.values.sum())}
        del frame, run, agg
    print(json.dumps(out))
""")


@pytest.fixture(scope="module")
def measured(snapshots):
    names = [str(snapshots / k) for k in ("h5", "h5_f32", "ranks", "npy")]
    env = dict(os.environ)
    env.setdefault("SWARMAUDIT_CACHE", "off")
    res = subprocess.run([sys.executable, "-c", PROBE, *names], capture_output=True, text=True,
                         timeout=300, env=env)
    assert res.returncode == 0, res.stderr[-2000:]
    got = json.loads(res.stdout.strip().splitlines()[-1])
    return {os.path.basename(k): v for k, v in got.items()}


@pytest.mark.parametrize("kind", ["h5", "h5_f32", "ranks", "npy"])
def test_view_reads_two_columns_within_twice_their_size(kind, measured):
    m = measured[kind]
    assert m["reads"] == 2                     # x and y, nothing else of the eight
    assert m["particles"] == N
    slack = 8 * 2**20                          # allocator and interpreter noise
    assert m["rss"] <= 2 * m["cols"] + slack, m
    assert m["traced"] <= 2 * m["cols"] + slack, m


def test_float32_stays_float32(measured):
    assert measured["h5_f32"]["dtype"] == "float32"
    assert measured["h5_f32"]["cols"] == N * 4 * 2
