"""``swarmaudit demo``: write the demo runs (and serve them).

Runs written under OUT:

* ``two_stream/`` — 2-D electrostatic PIC, two counter-streaming cold
  electron beams (:mod:`.two_stream`): per-rank HDF5 files per snapshot,
  4 × 4 + 2 refined blocks on 4 ranks, rebalanced once half-way;
* ``inlet_wall/`` — argon ions entering a channel and climbing a potential
  hill: created at the inlet, lost at the wall or back through the inlet
  (:mod:`.inlet`): HDF5, ``(N, 2)`` datasets and a compound species;
* ``small_npz/`` — a drifting 3-D Plummer star cluster (:mod:`.nbody`);
* ``small_csv/`` — nitrogen in a duct leaking through a pump port, with a
  ``layout.csv`` sidecar (:mod:`.duct`): the run a conservation gate fails;
* ``small_npy/`` — elastic grains in a periodic box (:mod:`.grains`);
* ``two_stream_ranks/`` — the two-stream run again on 6 ranks and 8 × 4
  blocks with its particles held sorted by cell: the same particles, equal
  to the main run up to rounding (sums in another order), at 10 of its steps;
* ``two_stream_dt/`` — the two-stream run again with a time step of 0.125
  instead of 0.1 to the same end time: statistically close, not equal, at
  10 of the main run's times.

A manifest ``swarmaudit-demo.json`` records the parameters; runs already
there with the same parameters are not written again unless forced.
"""

from __future__ import annotations

import json
import os
import shutil
import time

import numpy as np

from ..core.errors import OptionError
from .pic2d import TwoStreamSetup

MANIFEST = "swarmaudit-demo.json"
#: bump when the runs change, so old demo folders are written afresh
GENERATOR_VERSION = 2
DEFAULT_PARTICLES = 250_000
DEFAULT_SNAPSHOTS = 40
RUNS = ("two_stream", "inlet_wall", "small_npz", "small_csv", "small_npy", "two_stream_ranks",
        "two_stream_dt")
#: snapshots of the variants of the main run (pairs for ``swarmaudit compare``)
VARIANT_SNAPSHOTS = 10
#: the time step of the changed-step variant
VARIANT_DT = 0.125
#: the rank-count variant: the same physics on another decomposition, particles held sorted by cell
RANKS_VARIANT = {"ranks": 6, "blocks": (8, 4), "sort_by_cell": True}
_MAIN_DT = TwoStreamSetup.dt
DESCRIPTIONS = {
    "two_stream": "2-D electrostatic PIC, two-stream instability; per-rank HDF5, 4 ranks, refined blocks, one rebalance",
    "inlet_wall": "Ar+ / Ar2+ ions injected at an inlet, absorbed at a wall or turned back by a potential hill; HDF5",
    "small_npz": "drifting 3-D Plummer star cluster, direct-sum N-body; .npz",
    "small_csv": "nitrogen in a duct leaking through a pump port (fails a tight check); CSV + layout.csv",
    "small_npy": "elastic glass grains in a periodic box; structured .npy",
    "two_stream_ranks": (f"two_stream on {RANKS_VARIANT['ranks']} ranks, "
                         f"{RANKS_VARIANT['blocks'][0]}x{RANKS_VARIANT['blocks'][1]} blocks, particles "
                         "sorted by cell: equal up to rounding"),
    "two_stream_dt": (f"two_stream with time step {VARIANT_DT:g} instead of {_MAIN_DT:g}: statistically "
                      "close, not equal"),
}


def variant_steps(main_steps, dt_main: float, dt_variant: float, count: int = VARIANT_SNAPSHOTS):
    """Steps of a variant at up to ``count`` of the main run's snapshot times, spread evenly.

    Only times that both time steps reach exactly (on a whole step of each) are taken.
    """
    main_steps = np.asarray(main_steps, dtype=np.int64)
    ratio = dt_main / dt_variant
    k = main_steps * ratio
    hit = np.abs(k - np.round(k)) < 1e-9
    usable = np.round(k[hit]).astype(np.int64)
    if usable.size <= count:
        return usable
    pick = np.unique(np.round(np.linspace(0, usable.size - 1, count)).astype(np.int64))
    return usable[pick]


def _read_manifest(out: str):
    try:
        with open(os.path.join(out, MANIFEST), encoding="utf-8") as fh:
            data = json.load(fh)
        return data if isinstance(data, dict) else None
    except (OSError, ValueError):
        return None


def _check_counts(particles, snapshots) -> tuple[int, int]:
    particles = DEFAULT_PARTICLES if particles is None else particles
    snapshots = DEFAULT_SNAPSHOTS if snapshots is None else snapshots
    if isinstance(particles, bool) or int(particles) != particles or particles < 2:
        raise OptionError(f"--particles takes a whole number of at least 2, got {particles}")
    if isinstance(snapshots, bool) or int(snapshots) != snapshots or snapshots < 1:
        raise OptionError(f"--snapshots takes a whole number of at least 1, got {snapshots}")
    return int(particles), int(snapshots)


def fit_growth_rate(time, energy, low: float = 1e-4, high: float = 3e-2):
    """Exponential growth rate of ``energy`` over its linear phase, and the window used.

    Saturation is the first time the energy reaches half its largest value;
    the fit (least squares of log energy against time) takes the samples
    before it whose energy lies between ``low`` and ``high`` times the
    energy at saturation.
    """
    time = np.asarray(time, dtype=np.float64)
    energy = np.asarray(energy, dtype=np.float64)
    sat = int(np.argmax(energy >= 0.5 * np.nanmax(energy)))
    ref = energy[sat]
    sel = np.zeros(energy.shape, dtype=bool)
    sel[:sat] = (energy[:sat] >= low * ref) & (energy[:sat] <= high * ref)
    # only the last unbroken stretch: the first steps can dip and rise again
    idx = np.flatnonzero(sel)
    if idx.size < 3:
        return float("nan"), (float("nan"), float("nan"))
    breaks = np.flatnonzero(np.diff(idx) > 1)
    idx = idx[breaks[-1] + 1:] if breaks.size else idx
    slope = np.polyfit(time[idx], np.log(energy[idx]), 1)[0]
    return float(slope), (float(time[idx[0]]), float(time[idx[-1]]))


def _relative(series) -> float:
    s = np.asarray(series, dtype=np.float64)
    s = s[np.isfinite(s)]
    return float(np.max(np.abs(s - s[0])) / abs(s[0])) if s.size and s[0] != 0 else float("nan")


def _two_stream_facts(summary: dict) -> dict:
    h = summary.pop("history")
    rate, window = fit_growth_rate(h["time"], h["field_energy"])
    total = h["kinetic_energy"] + h["field_energy"]
    return {**summary,
            "measured_energy_growth_rate": rate,
            "theory_energy_growth_rate": 2.0 * summary["theory_growth_rate"],
            "fit_window": list(window),
            "momentum_x_drift": _relative(h["momentum_x"]),
            "total_energy_drift": _relative(total),
            "peak_field_energy": float(np.max(h["field_energy"]))}


def _disk_bytes(path: str) -> int:
    total = 0
    for root, _, files in os.walk(path):
        for f in files:
            try:
                total += os.path.getsize(os.path.join(root, f))
            except OSError:
                pass
    return total


def write_demo_runs(out, particles=None, snapshots=None, force: bool = False, progress=print) -> dict[str, str]:
    """Write the demo runs under ``out``; return ``{run name: folder}``.

    ``particles`` and ``snapshots`` size the main (two-stream) run; the
    small runs have fixed sizes. Runs already written with the same
    parameters are kept unless ``force``.
    """
    from .duct import write_small_csv
    from .grains import write_small_npy
    from .inlet import write_inlet_wall
    from .nbody import write_small_npz
    from .two_stream import write_two_stream

    out = os.path.abspath(os.fspath(out))
    particles, snapshots = _check_counts(particles, snapshots)
    progress = progress or (lambda msg: None)
    if os.path.exists(out) and not os.path.isdir(out):
        raise OptionError(f"{out}: --out names a file, not a folder")
    params = {"version": GENERATOR_VERSION, "particles": particles, "snapshots": snapshots}
    paths = {name: os.path.join(out, name) for name in RUNS}
    old = _read_manifest(out)
    if (not force and old is not None and old.get("parameters") == params
            and all(os.path.isdir(p) and os.listdir(p) for p in paths.values())):
        progress(f"demo runs already in {out} (same parameters; --force writes them again)")
        return paths
    if old is None and not force:
        taken = [p for p in paths.values() if os.path.exists(p) and os.listdir(p)]
        if taken:
            raise OptionError(f"{taken[0]} already exists and was not written by the demo; "
                              "pick another --out or add --force to replace it")
    os.makedirs(out, exist_ok=True)
    try:
        os.remove(os.path.join(out, MANIFEST))     # a half-written set must not look complete
    except FileNotFoundError:
        pass
    started = time.perf_counter()
    from .two_stream import snapshot_steps
    main_setup = TwoStreamSetup(particles=particles)
    main = snapshot_steps(main_setup.steps, snapshots)
    writers = {
        "two_stream": lambda d: write_two_stream(d, particles, snapshots, progress),
        "inlet_wall": lambda d: write_inlet_wall(d, progress),
        "small_npz": lambda d: write_small_npz(d, progress),
        "small_csv": lambda d: write_small_csv(d, progress),
        "small_npy": lambda d: write_small_npy(d, progress),
        "two_stream_ranks": lambda d: write_two_stream(
            d, particles, snapshots, progress, **RANKS_VARIANT,
            at_steps=variant_steps(main, 1.0, 1.0), label="two_stream_ranks"),
        "two_stream_dt": lambda d: write_two_stream(
            d, particles, snapshots, progress, dt=VARIANT_DT,
            steps=round(main_setup.steps * main_setup.dt / VARIANT_DT), at_steps=variant_steps(main, main_setup.dt, VARIANT_DT), label="two_stream_dt"),
    }
    facts: dict = {}
    seconds: dict = {}
    for name in RUNS:
        final = paths[name]
        partial = os.path.join(out, f".{name}.partial")
        shutil.rmtree(partial, ignore_errors=True)
        os.makedirs(partial)
        progress(f"writing {name}: {DESCRIPTIONS[name]}")
        t0 = time.perf_counter()
        summary = writers[name](partial)
        seconds[name] = round(time.perf_counter() - t0, 2)
        facts[name] = _two_stream_facts(summary) if name.startswith("two_stream") else summary
        shutil.rmtree(final, ignore_errors=True)
        os.replace(partial, final)
    elapsed = time.perf_counter() - started
    manifest = {
        "written_by": "swarmaudit demo",
        "parameters": params,
        "runs": {name: name for name in RUNS},
        "seconds": {"total": round(elapsed, 2), **seconds},
        "bytes": {name: _disk_bytes(paths[name]) for name in RUNS},
        "facts": _jsonable(facts),
    }
    with open(os.path.join(out, MANIFEST), "w", encoding="utf-8") as fh:
        json.dump(manifest, fh, indent=1)
    size = sum(manifest["bytes"].values())
    progress(f"wrote {len(RUNS)} demo runs in {elapsed:.1f} s ({size / 1e6:.0f} MB) under {out}")
    return paths


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [_jsonable(v) for v in obj.tolist()]
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, float) and not np.isfinite(obj):
        return None
    return obj

