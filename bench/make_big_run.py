"""Write a large per-rank HDF5 run for the scale benchmarks (100 M particles over 16 files).

    python bench/make_big_run.py [OUT] [--particles N] [--files K] [--snapshots S]

Each snapshot is a folder ``step_NNNNNN/`` of ``rank_NNN.h5`` files in the
demo's shape: root attributes ``step``/``time``, a species group
``electrons`` (``mass``, ``charge``) with ``position/x``, ``position/y``,
``velocity/x``, ``velocity/y``, ``weight`` (float64) and ``id`` (int64): six
8-byte columns, 48 bytes a particle, about 4.8 GB per 100 M. The layout is
8 × 8 blocks over the unit square, four to a rank, in a ``blocks`` group of
every file. A rank's particles lie in its own blocks, denser towards the
centre so the census is not flat. Everything is drawn a column at a time
(vectorised, a few hundred MB in memory), never a particle at a time.

OUT defaults to ``/tmp/swarmaudit-big``; writing inside the repository is
refused, and so is a run that would not leave 2 GB free on its disk.
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import time

import h5py
import numpy as np

BLOCKS = (8, 8)
COLUMNS = ("position/x", "position/y", "velocity/x", "velocity/y", "weight", "id")
BYTES_PER_PARTICLE = 8 * len(COLUMNS)
DEFAULT_OUT = "/tmp/swarmaudit-big"
REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def layout_arrays(files: int):
    """Lower/upper corners, level and owner rank of the 8 × 8 blocks (x fastest)."""
    bx, by = BLOCKS
    nb = bx * by
    if nb % files and files % nb:
        raise SystemExit(f"--files must divide {nb} blocks evenly (or be a multiple of it)")
    ix, iy = np.meshgrid(np.arange(bx), np.arange(by), indexing="xy")
    ix, iy = ix.ravel(), iy.ravel()
    lower = np.stack([ix / bx, iy / by], axis=1)
    upper = np.stack([(ix + 1) / bx, (iy + 1) / by], axis=1)
    rank = (np.arange(nb) * files) // nb
    return lower, upper, np.zeros(nb, np.int64), rank.astype(np.int64)


def _write_blocks(fh, lower, upper, level, rank):
    g = fh.create_group("blocks")
    g["lower"], g["upper"], g["level"], g["rank"] = lower, upper, level, rank
    g.attrs["domain_lower"] = np.zeros(2)
    g.attrs["domain_upper"] = np.ones(2)
    g.attrs["cells"] = np.array([16 * BLOCKS[0], 16 * BLOCKS[1]], np.int64)
    g.attrs["periodic"] = "x,y"


def _rank_particles(rng, n, lower, upper, first_id, drift):
    """n particles inside the given blocks: block by a centre-weighted choice, uniform inside it."""
    centre = 0.5 * (lower + upper)
    bump = np.exp(-np.sum((centre - 0.5) ** 2, axis=1) / 0.08)
    p = (0.3 + bump) / np.sum(0.3 + bump)
    which = rng.choice(len(lower), size=n, p=p)
    cols = {}
    for a, name in enumerate(("position/x", "position/y")):
        u = rng.random(n)
        u *= (upper[which, a] - lower[which, a])
        u += lower[which, a]
        cols[name] = u
    del which
    cols["velocity/x"] = rng.normal(drift, 0.05, n)
    cols["velocity/y"] = rng.normal(0.0, 0.05, n)
    cols["weight"] = rng.uniform(0.5, 1.5, n)
    cols["id"] = np.arange(first_id, first_id + n, dtype=np.int64)
    return cols


def write_run(out: str, particles: int, files: int, snapshots: int, seed: int = 7) -> list[str]:
    lower, upper, level, rank = layout_arrays(files)
    counts = np.full(files, particles // files, dtype=np.int64)
    counts[: particles % files] += 1
    firsts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    folders = []
    for s in range(snapshots):
        step = 100 * s
        folder = os.path.join(out, f"step_{step:06d}")
        os.makedirs(folder, exist_ok=True)
        for r in range(files):
            rng = np.random.default_rng([seed, s, r])
            mine = rank == r
            cols = _rank_particles(rng, int(counts[r]), lower[mine], upper[mine], int(firsts[r]),
                                   drift=0.01 * s)
            path = os.path.join(folder, f"rank_{r:03d}.h5")
            tmp = path + ".part"
            with h5py.File(tmp, "w") as fh:
                fh.attrs["step"] = np.int64(step)
                fh.attrs["time"] = float(0.5 * s)
                g = fh.create_group("electrons")
                g.attrs["mass"] = 1.0
                g.attrs["charge"] = -1.0
                for name in COLUMNS:
                    g.create_dataset(name, data=cols.pop(name))   # contiguous: fastest to read back
                _write_blocks(fh, lower, upper, level, rank)
            os.replace(tmp, path)   # a reader never sees a half-written rank file
        folders.append(folder)
    return folders


def check_target(out: str, particles: int, snapshots: int) -> None:
    real = os.path.realpath(out)
    if real == REPO or real.startswith(REPO + os.sep):
        raise SystemExit(f"refusing to write benchmark data inside the repository ({out}); "
                         "give a folder elsewhere, e.g. /tmp/swarmaudit-big")
    need = particles * BYTES_PER_PARTICLE * snapshots
    probe = real
    while not os.path.exists(probe):
        probe = os.path.dirname(probe)
    free = shutil.disk_usage(probe).free
    if need + 2 * 2**30 > free:
        raise SystemExit(f"{out}: the run needs {need / 2**30:.1f} GiB and the disk has "
                         f"{free / 2**30:.1f} GiB free (2 GiB must stay free)")


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("out", nargs="?", default=DEFAULT_OUT, help=f"folder to write (default {DEFAULT_OUT})")
    p.add_argument("--particles", type=int, default=100_000_000, help="particles per snapshot")
    p.add_argument("--files", type=int, default=16, help="per-rank files per snapshot (default 16)")
    p.add_argument("--snapshots", type=int, default=1, help="snapshots (default 1)")
    args = p.parse_args(argv)
    if args.particles < args.files or args.files < 1 or args.snapshots < 1:
        raise SystemExit("need at least one particle per file, one file and one snapshot")
    check_target(args.out, args.particles, args.snapshots)
    t = time.perf_counter()
    folders = write_run(args.out, args.particles, args.files, args.snapshots)
    size = sum(os.path.getsize(os.path.join(f, x)) for f in folders for x in os.listdir(f))
    print(f"wrote {args.snapshots} snapshot(s) of {args.particles:,} particles over {args.files} files "
          f"to {args.out} ({size / 2**30:.2f} GiB) in {time.perf_counter() - t:.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
