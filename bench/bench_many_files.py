"""Runs of many small per-rank files: inspect and check against a plain h5py loop over the files.

    python bench/bench_many_files.py [--snapshots S] [--files K] [--per-file N] [--repeat R]
                                     [--dir DIR] [--before PATH]

The run is what production codes write: one HDF5 file per rank per snapshot
(``bench/make_big_run.py``: ``step_NNNNNN/rank_NNN.h5``, a ``blocks`` group in
every file), by default 200 snapshots of 16 files of 1,000 particles. Measured
in turn, each as its own process (what a user waits for, start-up included):

* the baseline: a sequential h5py loop that opens every file and reads the
  three columns the totals need (``weight``, ``velocity/x``, ``velocity/y``);
* ``swarmaudit inspect RUN --health none`` (opens every snapshot: the
  metadata of every file);
* ``swarmaudit check RUN --no-cache`` (the totals of every snapshot, and the
  clean-read check of its position and id columns);

and the processor seconds each took (with its worker processes): what a busy
machine charges, where the wall-clock ratios depend on free cores.

Then, in this process, the scan of every file's metadata (what opening a run
costs) on one thread against the piece pool's threads and against forked
worker processes (``engine.scan``): it shows why the scans go to processes.

``--before PATH`` also times the two commands with another copy of the
package (a folder holding ``swarmaudit/``, put first on ``PYTHONPATH``), in
the same turns: the same commands before a change. The run is written under
``--dir`` (default: a temporary folder) and removed afterwards unless ``--dir``
is given.
"""

from __future__ import annotations

import argparse
import glob
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
from _rows import format_table, in_turn, row  # noqa: E402

LOOP = """
import glob, sys, h5py
for f in sorted(glob.glob(sys.argv[1] + "/*/*.h5")):
    with h5py.File(f, "r") as fh:
        g = fh["electrons"]
        w, vx, vy = g["weight"][()], g["velocity/x"][()], g["velocity/y"][()]
"""


def make_run(folder: str, snapshots: int, files: int, per_file: int) -> None:
    import make_big_run
    make_big_run.write_run(folder, per_file * files, files, snapshots)


def _command(args, pythonpath=None):
    env = dict(os.environ)
    env["SWARMAUDIT_CACHE"] = "off"
    if pythonpath is not None:
        env["PYTHONPATH"] = os.pathsep.join([pythonpath] + [p for p in [env.get("PYTHONPATH")] if p])

    def go():
        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        res = subprocess.run([sys.executable, *args], env=env, stdout=subprocess.DEVNULL,
                             stderr=subprocess.PIPE, text=True)
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
        if res.returncode not in (0, 1):     # check exits 1 when a total leaves the band
            raise RuntimeError(f"{' '.join(args)}: exit {res.returncode}: {res.stderr[-500:]}")
        # processor seconds of the command and every process it waited for (its scan workers)
        go.cpu.append((after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime))
    go.cpu = []
    return go


def _scan_rows(folder: str, repeat: int) -> list[dict]:
    from swarmaudit.engine.pieces import piece_pool, piece_workers
    from swarmaudit.engine.scan import process_map
    from swarmaudit.readers.discover import scan_paths
    items = [sorted(glob.glob(os.path.join(d, "*.h5"))) for d in sorted(glob.glob(folder + "/*"))]
    nfiles = sum(len(i) for i in items)
    k = piece_workers()

    def one():
        for paths in items:
            scan_paths(paths)

    def procs():
        list(process_map(scan_paths, items, k))

    def threads():
        list(piece_pool().map(scan_paths, items))

    # processes first: forked before this process has started the pool's threads
    t_proc, t_one = in_turn(procs, one, repeat)
    t_thr, t_one2 = in_turn(threads, one, repeat)
    return [row(f"scan the metadata of {nfiles:,} files on {k} worker processes", t_proc,
                "one process", t_one),
            row(f"scan the metadata of {nfiles:,} files on {k} threads (h5py's lock)", t_thr,
                "one thread", t_one2)]


def run(snapshots: int = 200, files: int = 16, per_file: int = 1000, repeat: int = 3,
        folder: str | None = None, before: str | None = None) -> list[dict]:
    own = folder is None
    folder = folder or tempfile.mkdtemp(prefix="swarmaudit-many-")
    try:
        if not glob.glob(os.path.join(folder, "*", "*.h5")):
            make_run(folder, snapshots, files, per_file)
        nfiles = len(glob.glob(os.path.join(folder, "*", "*.h5")))
        what = f"{nfiles // files} snapshots x {files} files of {per_file:,}"
        loop = _command(["-c", LOOP, folder])
        inspect = _command(["-m", "swarmaudit", "inspect", folder, "--health", "none"])
        check = _command(["-m", "swarmaudit", "check", folder, "--no-cache", "--rtol", "0.5"])
        rows = []
        t_i, t_loop = in_turn(inspect, loop, repeat)
        rows.append(row(f"inspect --health none, {what}", t_i, "sequential h5py loop, 3 columns",
                        t_loop, "<= 0.5"))
        t_c, t_loop2 = in_turn(check, loop, repeat)
        rows.append(row(f"check --no-cache, {what}", t_c, "sequential h5py loop, 3 columns",
                        t_loop2, "<= 0.5"))
        cpu = {k: statistics.median(f.cpu[1:] or f.cpu) for k, f in
               (("inspect", inspect), ("check", check), ("loop", loop))}   # the warm-up left out
        rows.append(row("  inspect, processor seconds (all its processes)", cpu["inspect"],
                        "the loop's", cpu["loop"]))
        rows.append(row("  check, processor seconds (all its processes)", cpu["check"],
                        "the loop's", cpu["loop"]))
        if before:
            b_inspect = _command(["-m", "swarmaudit", "inspect", folder, "--health", "none"], before)
            b_check = _command(["-m", "swarmaudit", "check", folder, "--no-cache", "--rtol", "0.5"],
                               before)
            t_bi, t_i2 = in_turn(b_inspect, inspect, repeat)
            t_bc, t_c2 = in_turn(b_check, check, repeat)
            rows.append(row("  inspect, this code", t_i2, "the code before", t_bi))
            rows.append(row("  check, this code", t_c2, "the code before", t_bc))
        rows += _scan_rows(folder, repeat)
        return rows
    finally:
        if own:
            shutil.rmtree(folder, ignore_errors=True)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--snapshots", type=int, default=200)
    ap.add_argument("--files", type=int, default=16, help="per-rank files per snapshot")
    ap.add_argument("--per-file", type=int, default=1000, help="particles per file")
    ap.add_argument("--repeat", type=int, default=3, help="turns of each pair (median)")
    ap.add_argument("--dir", help="where the run is (written there when empty, and kept)")
    ap.add_argument("--before", metavar="PATH",
                    help="a folder holding another swarmaudit package, timed in the same turns")
    args = ap.parse_args(argv)
    t = time.perf_counter()
    load = os.getloadavg()
    rows = run(args.snapshots, args.files, args.per_file, args.repeat, args.dir, args.before)
    print("\n".join(format_table(rows)))
    print(f"\nload average at the start {load[0]:.1f} {load[1]:.1f} {load[2]:.1f}, at the end "
          + " ".join(f"{v:.1f}" for v in os.getloadavg()) + f"; {time.perf_counter() - t:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
