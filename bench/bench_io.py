"""Reading speed: first frame of a fresh run, and drift over a run, against raw h5py reads.

    python bench/bench_io.py [--n N] [--snapshots S] [--drift-n M] [--repeat R] [--dir DIR]

* cold open + first frame: ``open_run`` of a run never opened in this
  process, then the x-y density image (800 x 600) of its first snapshot,
  against h5py opening the file, reading the two datasets and datashader
  binning them over their finite range: what a hand-written script does;
* drift over a run: the drift table of ``S`` snapshots (a fresh context, no
  persistent cache), against h5py reading the columns the totals need from
  every file, run in turn with it (at least ``DRIFT_TURNS`` turns each); the same with the numpy totals (numba
  off); and the same drift table again on a new context, served by the
  persistent cache (what opening the run and its metadata costs).

The data (one 8-column float64 file, and a run) is written under ``--dir``
(default: a temporary folder in /tmp) and removed afterwards. Both sides read
warm files (the page cache holds them after writing): the ratios compare
work done by the code, not the disk.
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile

import h5py
import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _rows import in_turn, row, timed  # noqa: E402

COLUMNS = ("x", "y", "z", "vx", "vy", "vz", "weight", "charge")
#: turns of the drift measurement (ours and the baseline in turn) at the least
DRIFT_TURNS = 11


def write_wide(path: str, n: int, seed: int = 0) -> None:
    rng = np.random.default_rng(seed)
    with h5py.File(path, "w") as fh:
        fh.attrs["step"] = 0
        fh.attrs["time"] = 0.0
        g = fh.create_group("electrons")
        g.attrs["mass"] = 1.0
        for c in COLUMNS:
            g[c] = rng.random(n)


def write_run(folder: str, snapshots: int, n: int, seed: int = 1) -> list[str]:
    os.makedirs(folder, exist_ok=True)
    rng = np.random.default_rng(seed)
    x, y = rng.random(n), rng.random(n)
    vx, vy = rng.normal(0, 0.1, n), rng.normal(0, 0.1, n)
    paths = []
    for s in range(snapshots):
        p = os.path.join(folder, f"snap_{s:04d}.h5")
        with h5py.File(p, "w") as fh:
            fh.attrs["step"] = s
            fh.attrs["time"] = 0.1 * s
            fh.attrs["field_energy"] = 1.0
            g = fh.create_group("electrons")
            g.attrs["mass"] = 1.0
            g.attrs["charge"] = -1.0
            g["x"], g["y"] = (x + 0.01 * s * vx) % 1.0, (y + 0.01 * s * vy) % 1.0
            g["vx"], g["vy"] = vx, vy
            g["weight"] = np.full(n, 1.5)
            g["id"] = np.arange(n, dtype=np.int64)
        paths.append(p)
    return paths


def first_frame_rows(path: str, repeat: int) -> list[dict]:
    import datashader as ds
    import pandas as pd

    from swarmaudit.app.render import aggregate_points
    from swarmaudit.readers.discover import open_run

    def ours():
        run = open_run(path)
        frame = run[0].frame("electrons")
        return aggregate_points(frame, "x", "y", width=800, height=600)

    def baseline():
        with h5py.File(path, "r") as fh:
            x, y = fh["electrons/x"][()], fh["electrons/y"][()]
        xr = (float(np.nanmin(x)), float(np.nanmax(x)))
        yr = (float(np.nanmin(y)), float(np.nanmax(y)))
        cv = ds.Canvas(plot_width=800, plot_height=600, x_range=xr, y_range=yr)
        return cv.points(pd.DataFrame({"x": x, "y": y}, copy=False), "x", "y", agg=ds.count())

    a, b = ours(), baseline()       # same picture, and both compiled before timing
    assert np.array_equal(np.nan_to_num(a.values), np.nan_to_num(b.values))
    t_ours = timed(ours, repeat, warm=False)
    t_base = timed(baseline, repeat, warm=False)
    n = len(open_run(path)[0].frame("electrons"))
    return [row(f"cold open + first frame, {n:,} particles (8 columns, one HDF5 file)", t_ours,
                "h5py read x, y + datashader", t_base, "<= 1.3")]


def drift_rows(folder: str, paths: list[str], repeat: int) -> list[dict]:
    from swarmaudit.audit import tables as audit
    from swarmaudit.core.context import AuditContext
    from swarmaudit.readers.discover import open_run

    def ours(use_cache=False):
        ctx = AuditContext(open_run(folder), use_cache=use_cache)
        return audit.drift_table(ctx)

    def baseline():
        # what the totals need: weights, velocities (mass and charge are attributes)
        out = 0.0
        for p in paths:
            with h5py.File(p, "r") as fh:
                g = fh["electrons"]
                for c in ("weight", "vx", "vy"):
                    out += g[c][()][0]
        return out

    ours()
    baseline()
    # each side takes a few hundredths of a second: more turns than --repeat, so that one
    # disturbed turn does not decide the median
    turns = max(repeat, DRIFT_TURNS)
    t_ours, t_base = in_turn(ours, baseline, turns, warm=False)
    from swarmaudit.diagnostics import _kernels
    numpy_rows = []
    if _kernels.available:
        _kernels.available = False           # the same table from one numpy pass per total
        try:
            t_numpy, t_base2 = in_turn(ours, baseline, repeat, warm=False)  # the slow path: --repeat turns
        finally:
            _kernels.available = True
        numpy_rows = [row("  drift, numpy totals", t_numpy, f"h5py reads of weight, vx, vy ({len(paths)} files)",
                          t_base2, "")]
    cache_dir = tempfile.mkdtemp(prefix="swarmaudit-bench-cache-")
    old = os.environ.get("SWARMAUDIT_CACHE")
    os.environ["SWARMAUDIT_CACHE"] = cache_dir
    try:
        ours(use_cache=True)                             # fills the cache
        t_cached = timed(lambda: ours(use_cache=True), turns, warm=False)
    finally:
        if old is None:
            os.environ.pop("SWARMAUDIT_CACHE", None)
        else:
            os.environ["SWARMAUDIT_CACHE"] = old
        shutil.rmtree(cache_dir, ignore_errors=True)
    n = len(paths)
    return [row(f"drift over a run of {n} snapshots", t_ours, f"h5py reads of weight, vx, vy ({n} files)",
                t_base, "<= 1.5")] + numpy_rows + [
            row("drift over the same run, reopened (reduction cache)", t_cached,
                f"h5py reads of weight, vx, vy ({n} files)", t_base, "",
                note="open and metadata only")]


def run(n: int = 10_000_000, snapshots: int = 20, drift_n: int = 1_000_000, repeat: int = 3,
        folder: str | None = None) -> list[dict]:
    own = folder is None
    folder = folder or tempfile.mkdtemp(prefix="swarmaudit-bench-io-")
    try:
        wide = os.path.join(folder, "wide", "snap_0000.h5")
        os.makedirs(os.path.dirname(wide), exist_ok=True)
        write_wide(wide, n)
        rows = first_frame_rows(wide, repeat)
        os.remove(wide)
        run_dir = os.path.join(folder, "run")
        paths = write_run(run_dir, snapshots, drift_n)
        rows += drift_rows(run_dir, paths, repeat)
        return rows
    finally:
        if own:
            shutil.rmtree(folder, ignore_errors=True)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=10_000_000, help="particles of the first-frame file")
    ap.add_argument("--snapshots", type=int, default=20, help="snapshots of the drift run")
    ap.add_argument("--drift-n", type=int, default=1_000_000, help="particles per drift snapshot")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--dir", help="where to write the data (default: a temporary folder)")
    args = ap.parse_args(argv)
    from _rows import format_table
    rows = run(args.n, args.snapshots, args.drift_n, args.repeat, args.dir)
    print("\n".join(format_table(rows)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
