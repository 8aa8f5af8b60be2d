"""Speed of the diagnostics, measured side by side with plain numpy / pandas in one run.

    python bench/bench_diagnostics.py [--n N] [--repeat R]

Each measurement and its baseline run alternately, R times each after one
warm-up run (which also compiles the optional numba kernels), so a change in
machine load hits both alike; the table shows medians and their ratio
(below 1: faster than the baseline).
"""

from __future__ import annotations

import argparse
import os
import sys

import numpy as np
import pandas as pd

from swarmaudit.core import _fastassign
from swarmaudit.core.layout import assign_blocks, regular_layout
from swarmaudit.diagnostics import _kernels
from swarmaudit.diagnostics.census import block_census
from swarmaudit.diagnostics.deposit import deposit
from swarmaudit.diagnostics.migration import match_keys, migrate

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _rows import in_turn  # noqa: E402


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

    def one_pass():
        return x.sum(), y.sum()

    def census():
        return block_census(assign_blocks([x, y], layout), layout)

    t, base = in_turn(census, one_pass, r)
    row(f"census {n:,} into {layout.nblocks} blocks", t, "one numpy pass (x.sum, y.sum)", base, "<= 10")
    t, base = in_turn(lambda: assign_blocks([x, y], layout), one_pass, r)
    row("  of which assign_blocks", t, "one numpy pass", base, "")
    if _fastassign.available:
        _fastassign.available = False
        t, base = in_turn(lambda: assign_blocks([x, y], layout), one_pass, r)
        _fastassign.available = True
        row("  assign_blocks, numpy path", t, "one numpy pass", base, "")

    def argsort():
        return np.argsort(ids_a)

    def merge():
        return pd.merge(pd.DataFrame({"id": ids_a, "ia": np.arange(n)}),
                        pd.DataFrame({"id": ids_b, "ib": np.arange(ids_b.size)}), on="id")

    def match():
        return match_keys(ids_a, ids_b)

    def migration():
        return migrate(ids_a, ids_b, blk_a, blk_b, [x, y], [xb, yb], layout, steps=10)

    t, base = in_turn(match, argsort, r)
    row(f"match_keys {n:,} ids", t, "numpy.argsort(ids)", base, "<= 1")
    t, base = in_turn(match, merge, max(1, r - 1))
    row(f"match_keys {n:,} ids", t, "pandas.merge on id", base, "<= 0.33")
    if _kernels.available:
        _kernels.available = False
        t, base = in_turn(match, argsort, r)
        _kernels.available = True
        row("  match_keys, numpy path", t, "numpy.argsort(ids)", base, "")
    t, base = in_turn(migration, argsort, r)
    row("migrate (match + moves + displacement)", t, "numpy.argsort(ids)", base, "<= 1")
    t, base = in_turn(migration, merge, max(1, r - 1))
    row("migrate (match + moves + displacement)", t, "pandas.merge on id", base, "")
    if _kernels.available:
        _kernels.available = False
        t, base = in_turn(migration, argsort, r)
        _kernels.available = True
        row("  migrate, numpy path", t, "numpy.argsort(ids)", base, "")

    def hist2d():
        return np.histogram2d(x, y, bins=512, range=[[0, 1], [0, 1]])

    t, base = in_turn(lambda: deposit([x, y], 1.0, layout, order="cic"), hist2d, r)
    row("deposit CIC 512x512", t, "numpy.histogram2d 512x512", base, "")
    t, base = in_turn(lambda: deposit([x, y], 1.0, layout, order="ngp"), hist2d, r)
    row("deposit NGP 512x512", t, "numpy.histogram2d 512x512", base, "")

    keys = ("measurement", "seconds", "baseline", "baseline_seconds", "ratio", "target")
    return [dict(zip(keys, row)) for row in rows]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=10_000_000, help="particles (default 10 M)")
    ap.add_argument("--repeat", type=int, default=3, help="timed runs per measurement (default 3)")
    args = ap.parse_args(argv)
    rows = [tuple(d.values()) for d in run(args.n, args.repeat)]
    print(f"particles {args.n:,}, medians of {args.repeat} alternating runs after a warm-up; numba kernels: "
          f"{'on' if _fastassign.available else 'off'}")
    w = max(len(a) for a, *_ in rows)
    wb = max(len(c) for _, _, c, *_ in rows)
    print(f"{'measurement':<{w}}  {'seconds':>8}  {'baseline':<{wb}}  {'seconds':>8}  {'ratio':>6}  target")
    for what, s, base, bs, ratio, target in rows:
        print(f"{what:<{w}}  {s:8.3f}  {base:<{wb}}  {bs:8.3f}  {ratio:6.2f}  {target}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
