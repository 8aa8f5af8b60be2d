"""A movie of the 40-snapshot demo run against drawing the same figures as PNGs alone.

Both sides bin every snapshot with the same ranges and grid and draw it with
the export's figure code; the movie lays the figure out once, swaps each
frame's image in and encodes MP4 (imageio-ffmpeg), the baseline builds a
figure per snapshot and saves a PNG (what ``export --snapshots all`` does
per view). Timed in turn, so a change in machine load hits both sides. The
target is a movie of the demo run in under 20 s on 2 cores.

    python bench/bench_movie.py [--run swarmaudit-demo/two_stream] [--view phase] [--repeat 1]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _rows import in_turn, machine_facts, row  # noqa: E402


def run(run_path: str, view: str = "phase", repeat: int = 1, fmt: str = "mp4"):
    from swarmaudit.app.export import ExportOptions
    from swarmaudit.app.movie import MovieFrames, write_movie
    from swarmaudit.app.options import context_from_options
    from swarmaudit.app.png import write_png

    ctx = context_from_options(None, run=run_path, no_cache=True)
    n = len(ctx.run)
    out = tempfile.mkdtemp(prefix="swarmaudit-bench-movie-")
    opts = ExportOptions(out=out, quiet=True)
    plan = MovieFrames(ctx, view, list(range(n)), opts)
    plan.aggregate()        # the baseline is handed the aggregates the movie works out itself

    def movie():
        write_movie(ctx, os.path.join(out, f"{view}.{fmt}"), view=view, opts=opts)

    def pngs():
        for k in range(len(plan.frames)):
            write_png(plan.still(k), os.path.join(out, f"{view}_{k:04d}.png"))

    def frames_swapped():
        for _ in plan.pixels():
            pass

    def frames_built():
        for k in range(len(plan.frames)):
            plan.still(k)

    rows = []
    t_movie, t_png = in_turn(movie, pngs, repeat)
    rows.append(row(f"movie of {n} snapshots ({view}, {fmt}, {opts.width}x{opts.height})", t_movie,
                    f"the same {n} figures as PNGs", t_png, "<= 1"))
    t_swap, t_built = in_turn(frames_swapped, frames_built, repeat, warm=False)
    rows.append(row(f"  {n} frames drawn into one laid-out figure", t_swap,
                    f"{n} figures built afresh", t_built, ""))
    return rows, t_movie


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--run", default="swarmaudit-demo/two_stream",
                    help="the run (default: the demo's two_stream; written first if missing)")
    ap.add_argument("--view", choices=("space", "phase"), default="phase")
    ap.add_argument("--format", choices=("mp4", "gif", "webp"), default="mp4")
    ap.add_argument("--repeat", type=int, default=1)
    a = ap.parse_args(argv)
    if not os.path.isdir(a.run):
        from swarmaudit.demo_data.generate import write_demo_runs
        write_demo_runs(os.path.dirname(a.run.rstrip("/")) or ".")
    rows, t_movie = run(a.run, a.view, a.repeat, a.format)
    facts = machine_facts()
    print(f"{facts['cpu']}, {facts['cores']} cores, load average {facts['load_average']}")
    for r in rows:
        print(f"{r['measurement']:<58} {r['seconds']:8.2f} s   {r['baseline']:<34} "
              f"{r['baseline_seconds']:8.2f} s   ratio {r['ratio']:.2f}  {r['target']}")
    print(f"movie of the run: {t_movie:.1f} s (target: under 20 s on 2 cores)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
