"""``swarmaudit export`` where the user waits, against a bare pipeline writing the same outputs.

    python bench/bench_export.py [--repeat R] [--big-n N] [--dir DIR] [--skip-big]

Both sides run as a fresh process each time (what a user or a batch job
waits for: start-up, imports and first compiles included), in turn, so a
change in machine load hits both alike; the reduction cache is off
(``SWARMAUDIT_CACHE=off``), numba's on-disk cache is warm (one untimed run
first: a cold compile happens once per machine, not once per command).

* the small run: the demo's two_stream with 5 snapshots of 5,000 particles
  (``swarmaudit demo --particles 5000 --snapshots 5``): 17 figures, 4 tables
  and report.html. Target: at most 3 s wall on 2 cores;
* one snapshot of 10 M particles in one HDF5 file of 8 columns
  (``bench_io.write_wide``): 5 figures, the tables, the report. Target: at
  most 3 times the bare pipeline.

The bare pipeline (``--bare RUN OUT``, this file) is what a hand-written
script producing the same outputs does: h5py reads every column of every
file, numpy sums the totals and counts particles per block and per rank,
matches ids between snapshots for the migration, deposits the weight by
cloud-in-cell by hand (four or eight ``numpy.bincount`` corners), datashader
aggregates the views and shades them, Pillow writes a PNG per figure of ours,
pandas writes the tables, and the PNGs go inline into one HTML page.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
from _rows import in_turn, machine_facts, row  # noqa: E402

SMALL_SECONDS = 3.0
BIG_RATIO = "<= 3"


# the bare pipeline ----------------------------------------------------------------------------------
def _snapshots(run: str) -> list[list[str]]:
    """The HDF5 files of each snapshot: a file, a folder of files, or a folder of per-rank folders."""
    if os.path.isfile(run):
        return [[run]]
    entries = sorted(os.path.join(run, e) for e in os.listdir(run))
    folders = [e for e in entries if os.path.isdir(e)]
    if folders:
        return [sorted(os.path.join(f, g) for g in os.listdir(f) if g.endswith(".h5")) for f in folders]
    return [[e] for e in entries if e.endswith(".h5")]


def _read(paths):
    """{species: {column: array}} of every 1-D dataset, per-rank files joined; the blocks group."""
    import h5py
    import numpy as np
    parts, blocks = {}, None
    for p in paths:
        with h5py.File(p, "r") as fh:
            if "blocks" in fh and blocks is None:
                g = fh["blocks"]
                blocks = {k: g[k][()] for k in ("lower", "upper", "level", "rank")}
                blocks.update({k: g.attrs[k] for k in ("domain_lower", "domain_upper", "cells")})
            for sp, g in fh.items():
                if sp == "blocks" or not isinstance(g, h5py.Group):
                    continue
                cols = parts.setdefault(sp, {"mass": g.attrs.get("mass", 1.0),
                                             "charge_attr": g.attrs.get("charge", None), "cols": {}})

                def visit(name, obj, cols=cols):
                    if isinstance(obj, h5py.Dataset) and obj.ndim == 1:
                        cols["cols"].setdefault(name.replace("position/", "").replace("velocity/", "v"),
                                                []).append(obj[()])
                g.visititems(visit)
    out = {sp: {"mass": d["mass"], "charge_attr": d["charge_attr"],
                "cols": {c: np.concatenate(v) for c, v in d["cols"].items()}} for sp, d in parts.items()}
    return out, blocks


def _blocks_of(pos, blocks, lo, hi):
    """Block of each particle: the finest block holding it, -1 outside; one block without a layout."""
    import numpy as np
    n = len(pos[0])
    if blocks is None:
        inside = np.ones(n, dtype=bool)
        for a, c in enumerate(pos):
            inside &= (c >= lo[a]) & (c <= hi[a])
        return np.where(inside, 0, -1), np.zeros(1, dtype=np.int64)
    best = np.full(n, -1)
    level = np.full(n, -1)
    for b in np.argsort(blocks["level"], kind="stable"):
        m = np.ones(n, dtype=bool)
        for a, c in enumerate(pos):
            m &= (c >= blocks["lower"][b, a]) & (c < blocks["upper"][b, a])
        m &= blocks["level"][b] >= level
        best[m], level[m] = b, blocks["level"][b]
    return best, blocks["rank"]


def _cic(pos, w, lo, hi, cells):
    """Cloud-in-cell deposit of ``w`` by hand: each particle over the 2**d nearest cell centres."""
    import itertools

    import numpy as np
    d = len(pos)
    idx, frac = [], []
    for a in range(d):
        s = (pos[a] - lo[a]) / ((hi[a] - lo[a]) / cells[a]) - 0.5
        i0 = np.floor(s)
        frac.append(s - i0)
        idx.append(i0.astype(np.int64))
    grid = np.zeros(int(np.prod(cells)))
    for corner in itertools.product((0, 1), repeat=d):
        flat = np.zeros(len(w), dtype=np.int64)
        wt = w.copy()
        for a, c in enumerate(corner):
            flat = flat * cells[a] + np.clip(idx[a] + c, 0, cells[a] - 1)
            wt *= frac[a] if c else 1.0 - frac[a]
        grid += np.bincount(flat, weights=wt, minlength=grid.size)
    return grid.reshape(cells)


def bare_export(run: str, out: str, width: int = 702, height: int = 560) -> None:
    import base64

    import datashader as ds
    import datashader.transfer_functions as tf
    import numpy as np
    import pandas as pd
    from PIL import Image

    os.makedirs(os.path.join(out, "figures"), exist_ok=True)
    pngs = []

    def png(name, image):
        path = os.path.join(out, "figures", f"{name}.png")
        image.save(path)
        pngs.append(path)

    def grid_png(name, values):
        v = np.nan_to_num(np.asarray(values, dtype=float))
        v = (255 * (v - v.min()) / (np.ptp(v) or 1)).astype(np.uint8)
        png(name, Image.fromarray(v).resize((width, height), Image.NEAREST))

    snaps = _snapshots(run)
    census, drift, migration, summary = [], [], [], []
    previous, deposits, moved = {}, {}, []
    chosen = sorted({0, len(snaps) - 1})
    for i, paths in enumerate(snaps):
        species, blocks = _read(paths)
        for sp, d in species.items():
            c = d["cols"]
            pos = [c[k] for k in ("x", "y", "z") if k in c]
            lo = [float(p.min()) for p in pos] if blocks is None else None
            hi = [float(p.max()) for p in pos] if blocks is None else None
            block, ranks = _blocks_of(pos, blocks, lo, hi)
            w = c.get("weight", np.ones(len(pos[0])))
            counts = np.bincount(block + 1, minlength=len(ranks) + 1)
            census.append(pd.DataFrame({"snapshot": i, "species": sp, "block": np.arange(-1, len(ranks)),
                                        "count": counts,
                                        "weight": np.bincount(block + 1, weights=w, minlength=len(ranks) + 1)}))
            q = c["charge"] if "charge" in c else d["charge_attr"] or 0.0
            vel = [c[k] for k in ("vx", "vy", "vz") if k in c]
            totals = {"count": len(w), "weight": w.sum(), "charge": np.sum(w * q)}
            for k, v in zip("xyz", vel):
                totals[f"momentum_{k}"] = d["mass"] * np.sum(w * v)
            totals["kinetic_energy"] = 0.5 * d["mass"] * np.sum(w * sum(v * v for v in vel))
            drift += [{"snapshot": i, "species": sp, "quantity": k, "value": float(v)} for k, v in totals.items()]
            if "id" in c and sp in previous:
                ids0, b0, p0 = previous[sp]
                _, a, b = np.intersect1d(ids0, c["id"], return_indices=True)
                moves = pd.DataFrame({"from_block": b0[a], "to_block": block[b]}).value_counts()
                migration.append(moves.rename("count").reset_index().assign(from_snapshot=i - 1,
                                                                          to_snapshot=i, species=sp))
                disp = np.sqrt(sum((p0[k][a] - pos[k][b]) ** 2 for k in range(len(pos))))
                summary.append({"from_snapshot": i - 1, "to_snapshot": i, "species": sp,
                                "matched": len(a), "migrated": int(np.sum(b0[a] != block[b])),
                                "max_displacement": float(disp.max(initial=0))})
                if i == len(snaps) - 1:
                    moved.append((b0[a], block[b], disp))
            if "id" in c:
                previous[sp] = (c["id"], block, pos)
            if i in chosen:
                frame = pd.DataFrame({"x": pos[0], "y": pos[1], "vx": vel[0]}, copy=False)
                for view, ycol in (("space", "y"), ("phase", "vx")):
                    cv = ds.Canvas(plot_width=width, plot_height=height)
                    png(f"{view}_{i:04d}_{sp}", tf.shade(cv.points(frame, "x", ycol, agg=ds.count()),
                                                         how="eq_hist").to_pil())
                if blocks is None:       # one block of 64 cells a side around the particles
                    box, cells = (lo, hi), [64] * len(pos)
                else:
                    box, cells = (blocks["domain_lower"], blocks["domain_upper"]), list(blocks["cells"])
                dep = _cic(pos, w, *box, cells)
                deposits[i] = deposits.get(i, 0) + dep.sum(axis=tuple(range(2, dep.ndim)))
        if moved and i == len(snaps) - 1:        # every species together, as the export draws them
            f, t, disp = (np.concatenate(v) for v in zip(*moved))
            grid_png("transfer", pd.crosstab(f, t).to_numpy())
            grid_png("displacement", np.histogram(disp, 60)[0][None, :])
        if i in chosen:
            grid_png(f"deposit_{i:04d}", deposits[i].T)
            grid_png(f"census_map_{i:04d}", census[-1]["count"].to_numpy()[None, :])
            grid_png(f"rank_load_{i:04d}", census[-1]["count"].to_numpy()[None, :])
    if len(snaps) > 1:
        grid_png("drift", pd.DataFrame(drift).pivot_table(index="quantity", columns="snapshot",
                                                          values="value").to_numpy())
    pd.concat(census).to_csv(os.path.join(out, "census.csv"), index=False)
    pd.DataFrame(drift).to_csv(os.path.join(out, "drift.csv"), index=False)
    (pd.concat(migration) if migration else pd.DataFrame()).to_csv(os.path.join(out, "migration.csv"),
                                                                    index=False)
    pd.DataFrame(summary).to_csv(os.path.join(out, "migration_summary.csv"), index=False)
    with open(os.path.join(out, "report.html"), "w") as fh:
        fh.write("<html><body>")
        for p in pngs:
            with open(p, "rb") as img:
                fh.write(f"<img src='data:image/png;base64,{base64.b64encode(img.read()).decode()}'>")
        fh.write("</body></html>")


# the measurement ------------------------------------------------------------------------------------
def _env():
    return dict(os.environ, SWARMAUDIT_CACHE="off")


def _command(args, out):
    def go():
        shutil.rmtree(out, ignore_errors=True)
        subprocess.run(args + [out], check=True, env=_env(), stdout=subprocess.DEVNULL)
    return go


def make_small(folder: str) -> str:
    folder = os.path.join(folder, "small")
    run = os.path.join(folder, "two_stream")
    if not os.path.isdir(run):
        subprocess.run([sys.executable, "-m", "swarmaudit", "demo", "--out", folder, "--particles",
                        "5000", "--snapshots", "5", "--no-serve"], check=True, env=_env(),
                       stdout=subprocess.DEVNULL)
    return run


def make_big(folder: str, n: int) -> str:
    import bench_io
    folder = os.path.join(folder, "big")
    os.makedirs(folder, exist_ok=True)
    path = os.path.join(folder, f"wide_{n}.h5")
    if not os.path.exists(path):
        bench_io.write_wide(path, n)
    return path


def run(folder: str | None = None, repeat: int = 3, big_n: int = 10_000_000, big: bool = True):
    """Rows: the small run's export against its 3 s budget and the bare pipeline; the 10 M one."""
    own = folder is None
    folder = folder or tempfile.mkdtemp(prefix="swarmaudit-bench-export-")
    rows = []
    try:
        ours = [sys.executable, "-m", "swarmaudit", "export"]
        bare = [sys.executable, os.path.abspath(__file__), "--bare"]
        small = make_small(folder)
        out = os.path.join(folder, "out")
        t_ours, t_bare = in_turn(_command(ours + [small, "--quiet", "--out"], out),
                                 _command(bare + [small], out), repeat)
        r = row("export, 5 snapshots x 5,000 particles: 17 figures, 4 tables, report (fresh process)",
                t_ours, "bare pipeline, same outputs (fresh process)", t_bare,
                f"<= {SMALL_SECONDS:g} s wall")
        r["met"] = t_ours <= SMALL_SECONDS
        rows.append(r)
        if big:
            path = make_big(folder, big_n)
            t_ours, t_bare = in_turn(_command(ours + [path, "--quiet", "--out"], out),
                                     _command(bare + [path], out), repeat)
            rows.append(row(f"export, one snapshot of {big_n:,} particles, 8 columns (fresh process)",
                            t_ours, "bare pipeline, same outputs (fresh process)", t_bare, BIG_RATIO))
    finally:
        if own:
            shutil.rmtree(folder, ignore_errors=True)
    return rows


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--bare", nargs=2, metavar=("RUN", "OUT"), help=argparse.SUPPRESS)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--big-n", type=int, default=10_000_000)
    ap.add_argument("--dir", default=None, help="where the runs are written (default: a temporary folder)")
    ap.add_argument("--skip-big", action="store_true")
    a = ap.parse_args(argv)
    if a.bare:
        bare_export(*a.bare)
        return 0
    rows = run(a.dir, a.repeat, a.big_n, not a.skip_big)
    facts = machine_facts()
    print(f"{facts['cpu']}, {facts['cores']} cores, load average {facts['load_average']}")
    for r in rows:
        met = {True: "met", False: "MISSED", None: ""}[r["met"]]
        print(f"{r['measurement']:<86} {r['seconds']:7.2f} s  {r['baseline']:<44} "
              f"{r['baseline_seconds']:7.2f} s  ratio {r['ratio']:.2f}  {r['target']} {met}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
