"""Re-render of a 10 M-particle view: our aggregate_points vs datashader's Canvas.points vs numpy.

Targets: ours within 1.5x of datashader on the same arrays (the frame
wrapping, column pick and NaN bookkeeping must stay cheap), and at least 20x
faster than numpy.histogram2d. All three run here, side by side, on the same
float32 arrays and the same pixel grid; each figure is the best of several
repeats (ours and datashader's timed in turn) after one warm-up (numba compiles on first use).

    python bench/bench_render.py [--n 10000000] [--width 800] [--height 600]
"""

from __future__ import annotations

import argparse
import os
import sys

import numpy as np
import pandas as pd

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _rows import in_turn, timed  # noqa: E402


def main(argv=None) -> int:
    import datashader as ds

    from swarmaudit.app.render import aggregate_points
    from swarmaudit.core.frame import Frame

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--n", type=int, default=10_000_000)
    p.add_argument("--width", type=int, default=800)
    p.add_argument("--height", type=int, default=600)
    p.add_argument("--repeat", type=int, default=5)
    a = p.parse_args(argv)

    rng = np.random.default_rng(0)
    x = rng.normal(0.0, 1.0, a.n).astype(np.float32)
    y = (0.3 * x + rng.normal(0.0, 0.5, a.n)).astype(np.float32)
    w = rng.uniform(0.5, 1.5, a.n).astype(np.float32)
    frame = Frame("bench", a.n, {"x": lambda: x, "y": lambda: y, "weight": lambda: w})
    # a zoomed view, as after a pan: part of the particles fall outside
    xr, yr = (-2.0, 2.5), (-1.5, 1.8)

    df = pd.DataFrame({"x": x, "y": y, "weight": w}, copy=False)
    cv = ds.Canvas(plot_width=a.width, plot_height=a.height, x_range=xr, y_range=yr)

    rows = []
    for label, red, kw, dsagg in (("count", "count", {}, ds.count()),
                                  ("sum of weight", "sum", {"value": "weight"}, ds.sum("weight"))):
        ours, theirs = in_turn(
            lambda: aggregate_points(frame, "x", "y", width=a.width, height=a.height,
                                     x_range=xr, y_range=yr, reduction=red, **kw),
            lambda: cv.points(df, "x", "y", agg=dsagg), a.repeat, pick=min)
        weights = w if red == "sum" else None
        numpy_t = timed(lambda: np.histogram2d(x, y, bins=[a.width, a.height], range=[xr, yr],
                                               weights=weights), max(1, a.repeat // 3), pick=min)
        rows.append((label, ours, theirs, numpy_t))
        # same numbers, or the timing means nothing
        got = aggregate_points(frame, "x", "y", width=a.width, height=a.height, x_range=xr,
                               y_range=yr, reduction=red, **kw).values
        ref = cv.points(df, "x", "y", agg=dsagg).values
        assert np.allclose(np.nan_to_num(got), np.nan_to_num(ref)), label

    print(f"{a.n:,} particles, {a.width}x{a.height} pixels, best of {a.repeat}")
    print(f"{'reduction':<15}{'ours ms':>10}{'datashader ms':>15}{'numpy ms':>11}"
          f"{'ours/datashader':>17}{'numpy/ours':>12}")
    for label, ours, theirs, numpy_t in rows:
        print(f"{label:<15}{ours * 1e3:>10.1f}{theirs * 1e3:>15.1f}{numpy_t * 1e3:>11.0f}"
              f"{ours / theirs:>16.2f}x{numpy_t / ours:>11.1f}x")
    worst_ds = max(o / t for _, o, t, _ in rows)
    worst_np = min(n / o for _, o, _, n in rows)
    print(f"target ours/datashader <= 1.5x: {'met' if worst_ds <= 1.5 else 'MISSED'} ({worst_ds:.2f}x); "
          f"target numpy/ours >= 20x: {'met' if worst_np >= 20 else 'MISSED'} ({worst_np:.1f}x)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
