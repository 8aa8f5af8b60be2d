"""Speed of the particle-by-particle run comparison, side by side with migration on the same pair.

    python bench/bench_compare.py [--n N] [--repeat R]

Both are an id match of two snapshots of N particles: ``migrate`` matches an
earlier and a later snapshot of one run, the comparison matches a reference
and a candidate snapshot. The pair here is what a rank-count or a sorting
change gives: the same particles stored in another order, positions and
momenta changed by a last-bit rounding on a few of them, 0.1 % of the
particles only in one run. Both go through the one runner
(``engine.reduce.reduce``) from frames, so each side reads its columns and
joins its pieces the same way; they run alternately, R times each after one
warm-up run (which also compiles the numba kernels), and the table shows
medians and their ratio.
"""

from __future__ import annotations

import argparse
import os
import sys

import numpy as np

from swarmaudit.core import column
from swarmaudit.core.frame import Frame
from swarmaudit.core.layout import regular_layout
from swarmaudit.diagnostics.compare import ParticleComparison
from swarmaudit.diagnostics.migration import Migration
from swarmaudit.engine.reduce import reduce

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _rows import format_table, in_turn, machine_facts, row  # noqa: E402


def _frame(arrays: dict) -> Frame:
    n = len(next(iter(arrays.values())))
    cols = {c: column.Column(lambda a=a: a, rows=lambda s, e, a=a: a[s:e], dtype=a.dtype, length=len(a))
            for c, a in arrays.items()}
    return Frame("electrons", n, cols)


def pair(n: int, seed: int = 0):
    """A reference snapshot and a candidate: reordered, a few last-bit changes, 0.1 % unpaired."""
    rng = np.random.default_rng(seed)
    ref = {"x": rng.random(n), "y": rng.random(n), "ux": rng.normal(0, 1, n), "uy": rng.normal(0, 1, n),
           "weight": np.full(n, 2.0), "id": rng.permutation(n).astype(np.int64)}
    keep = rng.random(n) > 0.001
    order = rng.permutation(int(keep.sum()))
    cand = {c: a[keep][order].copy() for c, a in ref.items()}
    touched = rng.random(order.size) < 0.01
    for c in ("x", "ux"):
        cand[c][touched] = np.nextafter(cand[c][touched], np.inf)
    return ref, cand


def run(n: int = 10_000_000, repeat: int = 3) -> list[dict]:
    layout = regular_layout([0, 1, 0, 1], [512, 512], [64, 64], periodic=("x", "y"), ranks=64)
    ref, cand = pair(n)
    fa, fb = _frame(ref), _frame(cand)
    positions = (("x", "y"), ("x", "y"))
    momenta = (("ux", "uy"), ("ux", "uy"))

    def comparison():
        acc = ParticleComparison(layout, (("id",), ("id",)), positions, momenta, (("weight",), ("weight",)))
        return reduce(acc, [fa, fb], where="serial")

    def migration():
        return reduce(Migration.of_frames(fa, fb, layout), [fa, fb], where="serial")

    got = comparison()
    assert got.pairs == len(fb) and got.only_ref == n - len(fb) and not got.identical
    t, base = in_turn(comparison, migration, repeat)
    return [row(f"compare particles {n:,} against {len(fb):,} (id match, positions, momenta)", t,
                "migrate on the same pair", base, "<= 1.5")]


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--n", type=int, default=10_000_000)
    p.add_argument("--repeat", type=int, default=3)
    a = p.parse_args(argv)
    facts = machine_facts()
    print(", ".join(f"{k}: {v}" for k, v in facts.items()))
    print("\n".join(format_table(run(a.n, a.repeat))))
    return 0


if __name__ == "__main__":
    sys.exit(main())
