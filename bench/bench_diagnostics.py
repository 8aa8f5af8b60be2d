"""Speed of the diagnostics, measured side by side with plain numpy / pandas in one run.

    python bench/bench_diagnostics.py [--n N] [--repeat R]

Each timing is the median of R runs after one warm-up run (which also
compiles the optional numba kernels). Ratios below 1 mean faster than the
baseline.
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np
import pandas as pd

from swarmaudit.core import _fastassign
from swarmaudit.core.layout import assign_blocks, regular_layout
from swarmaudit.diagnostics import _kernels
from swarmaudit.diagnostics.census import block_census
from swarmaudit.diagnostics.deposit import deposit
from swarmaudit.diagnostics.migration import match_keys, migrate


def timed(fn, repeat: int) -> float:
    fn()   # warm-up: compile, first touch of memory
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def run(n: int = 10_000_000, repeat: int = 3) -> list[dict]:
    """Every measurement as a row: measurement, seconds, baseline, baseline_seconds, ratio, target."""
    r = repeat
    rng = np.random.default_rng(0)

    layout = regular_layout([0, 1, 0, 1], [512, 512], [64, 64], periodic=("x", "y"), ranks=64)
    x, y = rng.random(n), rng.random(n)
    # the second snapshot: 1 % lost, 0.5 % created, small moves, stored in another order
    ids_a = rng.permutation(n).astype(np.int64)
    keep = rng.random(n) > 0.01
    born = np.arange(n, n + n // 200, dtype=np.int64)
    order = rng.permutation(int(keep.sum()) + born.size)
    ids_b = np.concatenate([ids_a[keep], born])[order]
    xb = np.concatenate([(x[keep] + rng.normal(0, 1e-3, int(keep.sum()))) % 1.0, rng.random(born.size)])[order]
    yb = np.concatenate([y[keep], rng.random(born.size)])[order]
    blk_a = assign_blocks([x, y], layout)
    blk_b = assign_blocks([xb, yb], layout)

    rows = []

    def row(what, seconds, base_name, base_seconds, target):
        rows.append((what, seconds, base_name, base_seconds, seconds / base_seconds, target))

    t_pass = timed(lambda: (x.sum(), y.sum()), r)
    t_census = timed(lambda: block_census(assign_blocks([x, y], layout), layout), r)
    row(f"census {n:,} into {layout.nblocks} blocks", t_census, "one numpy pass (x.sum, y.sum)", t_pass,
        "<= 10")
    t_assign = timed(lambda: assign_blocks([x, y], layout), r)
    row("  of which assign_blocks", t_assign, "one numpy pass", t_pass, "")
    if _fastassign.available:
        _fastassign.available = False
        t_np = timed(lambda: assign_blocks([x, y], layout), max(1, r - 1))
        _fastassign.available = True
        row("  assign_blocks, numpy path", t_np, "one numpy pass", t_pass, "")

    t_sort = timed(lambda: np.argsort(ids_a), r)
    t_merge = timed(lambda: pd.merge(pd.DataFrame({"id": ids_a, "ia": np.arange(n)}),
                                     pd.DataFrame({"id": ids_b, "ib": np.arange(ids_b.size)}), on="id"),
                    max(1, r - 1))
    t_match = timed(lambda: match_keys(ids_a, ids_b), r)
    row(f"match_keys {n:,} ids", t_match, "numpy.argsort(ids)", t_sort, "<= 1")
    row(f"match_keys {n:,} ids", t_match, "pandas.merge on id", t_merge, "<= 0.33")
    if _kernels.available:
        _kernels.available = False
        t_match_np = timed(lambda: match_keys(ids_a, ids_b), r)
        _kernels.available = True
        row("  match_keys, numpy path", t_match_np, "numpy.argsort(ids)", t_sort, "")
    t_migrate = timed(lambda: migrate(ids_a, ids_b, blk_a, blk_b, [x, y], [xb, yb], layout, steps=10), r)
    row("migrate (match + moves + displacement)", t_migrate, "numpy.argsort(ids)", t_sort, "")
    row("migrate (match + moves + displacement)", t_migrate, "pandas.merge on id", t_merge, "")

    t_hist = timed(lambda: np.histogram2d(x, y, bins=512, range=[[0, 1], [0, 1]]), max(1, r - 1))
    t_cic = timed(lambda: deposit([x, y], 1.0, layout, order="cic"), r)
    t_ngp = timed(lambda: deposit([x, y], 1.0, layout, order="ngp"), r)
    row("deposit CIC 512x512", t_cic, "numpy.histogram2d 512x512", t_hist, "")
    row("deposit NGP 512x512", t_ngp, "numpy.histogram2d 512x512", t_hist, "")

    keys = ("measurement", "seconds", "baseline", "baseline_seconds", "ratio", "target")
    return [dict(zip(keys, row)) for row in rows]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=10_000_000, help="particles (default 10 M)")
    ap.add_argument("--repeat", type=int, default=3, help="timed runs per measurement (default 3)")
    args = ap.parse_args(argv)
    rows = [tuple(d.values()) for d in run(args.n, args.repeat)]
    print(f"particles {args.n:,}, median of {args.repeat} runs after a warm-up; numba kernels: "
          f"{'on' if _fastassign.available else 'off'}")
    w = max(len(a) for a, *_ in rows)
    wb = max(len(c) for _, _, c, *_ in rows)
    print(f"{'measurement':<{w}}  {'seconds':>8}  {'baseline':<{wb}}  {'seconds':>8}  {'ratio':>6}  target")
    for what, s, base, bs, ratio, target in rows:
        print(f"{what:<{w}}  {s:8.3f}  {base:<{wb}}  {bs:8.3f}  {ratio:6.2f}  {target}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
