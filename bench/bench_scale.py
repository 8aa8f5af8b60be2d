"""Scale: 100 M particles over 16 files through dask, against 10 M in memory.

    python bench/bench_scale.py [--dir DIR] [--particles N] [--files K] [--local threads|processes|both]
                                [--keep]

Writes (with ``make_big_run.py``) a run of N particles and one of N/10, both
over K per-rank HDF5 files, under DIR (default ``/tmp/swarmaudit-big``),
reads every file once so both sides start from the page cache, then times
in fresh processes:

* the 10 M run in memory (``--engine memory``): open, the x-y density image
  of the first snapshot (800 x 600), the census table;
* the same on the 100 M run through dask (``--engine dask``), with the local
  threaded scheduler and/or a LocalCluster of one process per core.

Reported: the scaling ratio ``t(100 M, dask) / (10 x t(10 M, memory))``
(target <= 1.5), the same steps on 10 M through dask (the engine's own
overhead), and the peak resident memory of each process and its workers
beside the size of the columns it read. The data is deleted afterwards
unless ``--keep``.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _rows import PeakRSS, row  # noqa: E402

HERE = os.path.dirname(os.path.abspath(__file__))
GiB = 2**30


def _steps(path: str, engine: str):
    from swarmaudit.app import render
    from swarmaudit.audit import tables as audit
    from swarmaudit.core.context import AuditContext
    from swarmaudit.readers.discover import open_run
    t0 = time.perf_counter()
    ctx = AuditContext(open_run(path), engine=engine, use_cache=False)
    frame = ctx.run[0].frame("electrons")
    t1 = time.perf_counter()
    agg = render.aggregate_points(frame, "position/x", "position/y", width=800, height=600)
    t2 = time.perf_counter()
    census = audit.census_table(ctx)
    t3 = time.perf_counter()
    return frame, agg, census, (t0, t1, t2, t3)


def worker(path: str, engine: str, warm: str, repeat: int = 3) -> dict:
    """Open, first frame, census, ``repeat`` times in this (fresh) process: the medians."""
    import statistics

    import numpy as np

    from swarmaudit.engine import dask_backend
    dask_backend.configure(engine)
    t = time.perf_counter()
    if engine == "dask":
        dask_backend.drawing_engine()   # a local cluster starts here: its start-up, reported apart
    startup = time.perf_counter() - t
    # the same steps on a tiny run of the same shape first: kernels compile, workers start and
    # import, in this process and in any worker process; one-off costs, not the data's
    _steps(warm, engine)
    times = []
    with PeakRSS() as mem:
        for _ in range(repeat):   # a new Run each time: nothing read is kept between repeats
            frame, agg, census, (t0, t1, t2, t3) = _steps(path, engine)
            times.append((t1 - t0, t2 - t1, t3 - t2, t3 - t0))
            n, drawn = len(frame), int(np.nansum(agg.values))
            del frame, agg
    med = [statistics.median(t[k] for t in times) for k in range(4)]
    counted = int(census.loc[census["species"] == "electrons", "count"].sum())
    return {"engine": engine, "kind": dask_backend.local_kind() if engine == "dask" else "memory",
            "particles": n, "drawn": drawn, "counted": counted, "open": med[0], "render": med[1],
            "census": med[2], "total": med[3], "peak_rss": mem.peak, "columns_read": n * 8 * 3,
            "startup": startup}


def measure(path: str, engine: str, warm: str, local: str = "threads") -> dict:
    env = dict(os.environ, SWARMAUDIT_DASK_LOCAL=local, SWARMAUDIT_CACHE="off")
    res = subprocess.run([sys.executable, os.path.abspath(__file__), "--worker", engine, path, warm],
                         capture_output=True, text=True, env=env, timeout=3600)
    if res.returncode:
        raise RuntimeError(f"measuring {engine} on {path} failed:\n{res.stderr[-3000:]}")
    out = json.loads(res.stdout.strip().splitlines()[-1])
    if not (out["drawn"] == out["counted"] == out["particles"]):
        raise RuntimeError(f"{engine} on {path}: drew {out['drawn']}, counted {out['counted']} "
                           f"of {out['particles']} particles")
    return out


def ensure_run(folder: str, particles: int, files: int) -> None:
    import make_big_run
    marker = os.path.join(folder, f".complete-{particles}-{files}")
    if os.path.exists(marker):
        return
    shutil.rmtree(folder, ignore_errors=True)
    make_big_run.check_target(folder, particles, 1)
    make_big_run.write_run(folder, particles, files, 1)
    open(marker, "w").close()


def warm_page_cache(folder: str) -> None:
    for root, _, names in os.walk(folder):
        for n in names:
            with open(os.path.join(root, n), "rb") as fh:
                while fh.read(64 * 2**20):
                    pass


def run(particles: int = 100_000_000, files: int = 16, folder: str = "/tmp/swarmaudit-big",
        local: str = "threads", keep: bool = False) -> tuple[list[dict], list[dict]]:
    """(table rows, raw measurements)."""
    big, small = os.path.join(folder, "big"), os.path.join(folder, "small")
    tiny = os.path.join(folder, "tiny")
    try:
        ensure_run(tiny, 210_000 * files, files)   # pieces big enough to take the compiled paths
        ensure_run(small, particles // 10, files)
        ensure_run(big, particles, files)
        warm_page_cache(small)
        mem10 = measure(small, "memory", tiny)
        kinds = ["threads", "processes"] if local == "both" else [local]
        raw = [mem10]
        rows = []
        for kind in kinds:
            dask10 = measure(small, "dask", tiny, kind)
            warm_page_cache(big)
            dask100 = measure(big, "dask", tiny, kind)
            raw += [dask10, dask100]
            n, n10 = dask100["particles"], mem10["particles"]
            rows.append(row(f"{n / 1e6:.0f} M over {files} files, dask ({kind}): open + image + census",
                            dask100["total"], f"10 x ({n10 / 1e6:.0f} M in memory)", 10 * mem10["total"],
                            "<= 1.5"))
            rows.append(row(f"  of which the image ({kind})", dask100["render"],
                            "10 x in-memory image", 10 * mem10["render"], ""))
            rows.append(row(f"  of which the census ({kind})", dask100["census"],
                            "10 x in-memory census", 10 * mem10["census"], ""))
            rows.append(row(f"{n10 / 1e6:.0f} M through dask ({kind}): engine overhead", dask10["total"],
                            f"{n10 / 1e6:.0f} M in memory", mem10["total"], "",
                            note=f"engine start-up {dask10['startup']:.1f} s, not counted"))
        return rows, raw
    finally:
        if not keep:
            shutil.rmtree(folder, ignore_errors=True)


def memory_lines(raw: list[dict]) -> list[str]:
    out = ["| run | engine | particles | columns read (GiB) | peak RSS, all processes (GiB) |",
           "|---|---|---:|---:|---:|"]
    for m in raw:
        out.append(f"| {m['particles'] / 1e6:.0f} M | {m['kind']} | {m['particles']:,} | "
                   f"{m['columns_read'] / GiB:.2f} | {m['peak_rss'] / GiB:.2f} |")
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--worker", nargs=3, metavar=("ENGINE", "PATH", "WARM"), help=argparse.SUPPRESS)
    ap.add_argument("--dir", default="/tmp/swarmaudit-big", help="where the runs are written")
    ap.add_argument("--particles", type=int, default=100_000_000)
    ap.add_argument("--files", type=int, default=16)
    ap.add_argument("--local", choices=("threads", "processes", "both"), default="both",
                    help="local dask scheduler(s) to measure (default both)")
    ap.add_argument("--keep", action="store_true", help="keep the data for another run")
    args = ap.parse_args(argv)
    if args.worker:
        print(json.dumps(worker(args.worker[1], args.worker[0], args.worker[2])))
        return 0
    from _rows import format_table
    rows, raw = run(args.particles, args.files, args.dir, args.local, args.keep)
    print("\n".join(format_table(rows)))
    print()
    print("\n".join(memory_lines(raw)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
