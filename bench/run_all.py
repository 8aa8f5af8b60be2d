"""Every benchmark in one command, one table of ratios measured side by side, written to RESULTS.md.

    python bench/run_all.py [--n N] [--scale-particles N] [--repeat R] [--skip-scale] [--skip-many]
                            [--many-snapshots S] [--quick]
                            [--out bench/RESULTS.md]

Gathers the rows of

* ``bench_render.py`` (when it is there; else the render rows below): the
  x-y image against datashader alone and against ``numpy.histogram2d``;
* ``bench_diagnostics.py``: census against one numpy pass, matching against
  ``numpy.argsort`` and ``pandas.merge``;
* ``bench_compare.py``: particle-by-particle comparison of two runs against
  ``migrate`` on the same pair (both an id match);
* ``bench_io.py``: cold open + first frame against h5py + datashader, drift
  over a run against raw h5py reads (and reopened through the cache);
* ``bench_export.py``: ``export`` of the small demo run (3 s budget) and of one
  10 M-particle snapshot, each a fresh process, against a bare pipeline writing
  the same outputs;
* ``bench_many_files.py``: inspect and check of 200 snapshots of 16 per-rank
  files against a sequential h5py loop, and the scan of their metadata on
  threads and on worker processes;
* ``bench_scale.py``: 100 M particles over 16 files through dask against ten
  times 10 M in memory, and the peak resident memory of each;

and writes them with the machine's facts. A target that is missed says
**no** in the table; nothing is left out. ``--quick`` shrinks every size
(a smoke run, not a result).
"""

from __future__ import annotations

import argparse
import datetime
import importlib
import os
import sys
import time
import traceback

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
from _rows import format_table, machine_facts, meets, row, timed  # noqa: E402


def render_rows(n: int, repeat: int) -> list[dict]:
    """The image of n particles: our aggregation against datashader alone and numpy.histogram2d."""
    import datashader as ds
    import numpy as np
    import pandas as pd

    from swarmaudit.app.render import aggregate_points
    from swarmaudit.core.frame import Frame

    rng = np.random.default_rng(0)
    x, y = rng.normal(0.5, 0.15, n), rng.random(n)

    def ours():
        # a fresh frame each time: its ranges and non-finite scan are part of the first frame
        frame = Frame("p", n, {"x": lambda: x, "y": lambda: y})
        return aggregate_points(frame, "x", "y", width=800, height=600)

    def datashader_alone():
        return ds.Canvas(plot_width=800, plot_height=600).points(pd.DataFrame({"x": x, "y": y}, copy=False),
                                                                 "x", "y", agg=ds.count())

    def histogram2d():
        return np.histogram2d(y, x, bins=(600, 800))

    t_ours = timed(ours, repeat)
    t_ds = timed(datashader_alone, repeat)
    t_h = timed(histogram2d, max(1, repeat - 1))
    return [row(f"render x-y image 800x600, {n:,} particles", t_ours, "datashader alone", t_ds, "<= 1.5"),
            row(f"render x-y image 800x600, {n:,} particles", t_ours, "numpy.histogram2d", t_h,
                ">= 20x faster")]


def _module(name):
    path = os.path.join(HERE, f"{name}.py")
    if not os.path.exists(path):
        return None
    return importlib.import_module(name)


def _with_met(rows):
    for r in rows:
        r.setdefault("met", meets(r["ratio"], r.get("target", "")))
        r.setdefault("note", "")
    return rows


def gather(args) -> tuple[list[tuple[str, list[dict]]], list[str], list[str]]:
    sections, memory, problems = [], [], []

    def section(title, fn):
        t = time.perf_counter()
        print(f"... {title}", file=sys.stderr, flush=True)
        try:
            rows = _with_met(fn())
        except Exception as exc:   # one failing benchmark must not hide the others
            problems.append(f"{title}: {type(exc).__name__}: {exc}")
            traceback.print_exc()
            return
        sections.append((title, rows))
        print(f"    {title}: {time.perf_counter() - t:.0f} s", file=sys.stderr, flush=True)

    br = _module("bench_render")
    if br is not None and hasattr(br, "run"):
        section("render (bench_render.py)", lambda: br.run(args.n))
    else:
        section("render", lambda: render_rows(args.n, args.repeat))
    bd = _module("bench_diagnostics")
    if bd is not None and hasattr(bd, "run"):
        section("diagnostics (bench_diagnostics.py)", lambda: bd.run(args.n, args.repeat))
    import bench_compare
    section("run comparison (bench_compare.py)", lambda: bench_compare.run(args.n, args.repeat))
    import bench_io
    section("reading (bench_io.py)",
            lambda: bench_io.run(args.n, args.snapshots, args.drift_n, args.repeat))
    import bench_export
    section("export (bench_export.py)",
            lambda: bench_export.run(repeat=args.repeat, big_n=args.n))
    if not args.skip_many:
        import bench_many_files
        section("many files (bench_many_files.py)",
                lambda: bench_many_files.run(args.many_snapshots, args.files, repeat=args.repeat))
    if not args.skip_scale:
        import bench_scale
        holder = {}

        def scale():
            rows, raw = bench_scale.run(args.scale_particles, args.files, args.scale_dir, args.local)
            holder["raw"] = raw
            return rows
        section("scale (bench_scale.py)", scale)
        if "raw" in holder:
            memory = bench_scale.memory_lines(holder["raw"])
    return sections, memory, problems


def write_results(path, args, facts, sections, memory, problems, seconds) -> str:
    lines = ["# Benchmark results", "",
             f"Measured {datetime.date.today().isoformat()} with `python bench/run_all.py "
             f"{' '.join(sys.argv[1:])}` in {seconds / 60:.1f} min. Every ratio is ours over its "
             "baseline, both measured in this one run (below 1: faster than the baseline); "
             "seconds are medians after a warm-up.", "",
             "## Machine", "",
             f"- CPU: {facts['cpu']}, {facts['cores']} cores; RAM {facts['ram_gib']} GiB",
             f"- Python {facts['python']}, numpy {facts['numpy']}, pandas {facts['pandas']}, "
             f"datashader {facts['datashader']}, dask {facts['dask']}",
             f"- load average when the run started: {facts['load_average']} (other work on the "
             "machine inflates both sides of a ratio, not always equally)", ""]
    for title, rows in sections:
        lines += [f"## {title}", ""] + format_table(rows) + [""]
    if memory:
        lines += ["## Peak memory (bench_scale.py)", "",
                  "Resident memory of the measuring process and every worker it started, sampled "
                  "every 20 ms, beside the bytes of the columns the image and census read.", ""]
        lines += memory + [""]
    missed = [f"- {r['measurement']} against {r['baseline']}: ratio {r['ratio']:.2f}, target "
              f"{r['target']}" for _, rows in sections for r in rows if r.get("met") is False]
    lines += ["## Targets missed", ""] + (missed or ["- none"]) + [""]
    if problems:
        lines += ["## Benchmarks that failed to run", ""] + [f"- {p}" for p in problems] + [""]
    text = "\n".join(lines)
    with open(path, "w") as fh:
        fh.write(text)
    return text


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=10_000_000, help="particles of the in-memory benchmarks")
    ap.add_argument("--repeat", type=int, default=3, help="timed runs per measurement (median)")
    ap.add_argument("--snapshots", type=int, default=20, help="snapshots of the drift run")
    ap.add_argument("--drift-n", type=int, default=1_000_000, help="particles per drift snapshot")
    ap.add_argument("--scale-particles", type=int, default=100_000_000, help="particles of the dask run")
    ap.add_argument("--files", type=int, default=16, help="per-rank files of the scale runs")
    ap.add_argument("--scale-dir", default="/tmp/swarmaudit-big", help="where the scale runs are written")
    ap.add_argument("--local", choices=("threads", "processes", "both"), default="both")
    ap.add_argument("--skip-scale", action="store_true", help="leave out the 100 M run")
    ap.add_argument("--many-snapshots", type=int, default=200,
                    help="snapshots of the many-files run (each --files files of 1,000 particles)")
    ap.add_argument("--skip-many", action="store_true", help="leave out the many-files run")
    ap.add_argument("--quick", action="store_true", help="small sizes: a smoke run, not a result")
    ap.add_argument("--out", default=os.path.join(HERE, "RESULTS.md"))
    args = ap.parse_args(argv)
    if args.quick:
        args.n, args.repeat, args.snapshots, args.drift_n = 500_000, 1, 4, 100_000
        args.scale_particles = 2_000_000
        args.many_snapshots = 10
    os.environ.setdefault("SWARMAUDIT_CACHE", "off")   # measure computing, not the cache
    facts = machine_facts()
    t = time.perf_counter()
    sections, memory, problems = gather(args)
    text = write_results(args.out, args, facts, sections, memory, problems, time.perf_counter() - t)
    print(text)
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main())
