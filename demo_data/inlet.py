"""Demo run with creation and loss: argon ions climbing a potential hill.

Singly and doubly charged argon ions enter a 2-D channel through an inlet
at x = 0 with a drifting Maxwellian flux and move in a uniform retarding
field (a potential rise ΔV over the channel). An ion whose kinetic energy
along x is below qΔV turns round and leaves through the inlet; the others
are absorbed by the wall at x = L. The channel is periodic in y. Motion in
a uniform field is integrated exactly, so what changes between snapshots
is only who entered and who left.

SI units. One HDF5 file per snapshot (``inlet_NNNN.h5``, the step): Ar⁺ as
``(N, 2)`` datasets, Ar²⁺ as one compound dataset (array of structs with
2-vector fields), and a two-level ``blocks`` group (finer blocks over the
dense region by the inlet).
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np
from scipy import constants

from .blocks import demo_layout, write_blocks_group

ARGON_MASS = 39.948 * constants.atomic_mass


@dataclass(frozen=True)
class InletSetup:
    length: float = 0.10            # m, inlet to wall
    width: float = 0.05             # m, periodic
    cells: tuple = (32, 16)
    blocks: tuple = (4, 2)
    drift: float = 3000.0           # m/s, inlet drift
    temperature_ev: float = 0.5     # ion temperature at the inlet
    hill_volts: float = 1.5         # potential rise from inlet to wall
    flux: float = 3e18              # Ar+ ions per m² per s through the inlet
    doubly_fraction: float = 0.15   # Ar2+ flux relative to Ar+
    per_step: float = 200.0         # mean Ar+ macro-particles injected per step
    dt: float = 0.5e-6              # s
    spin_up: int = 240              # steps before the first snapshot (fills the channel)
    every: int = 8                  # steps between snapshots
    snapshots: int = 30
    seed: int = 20240611

    @property
    def thermal_speed(self) -> float:
        return float(np.sqrt(self.temperature_ev * constants.e / ARGON_MASS))

    @property
    def weight(self) -> float:
        """Physical ions per macro-particle (the same for both species)."""
        return self.flux * self.width * self.dt / self.per_step

    def acceleration(self, charge_state: int) -> float:
        field = -self.hill_volts / self.length       # E_x, V/m, pointing back at the inlet
        return charge_state * constants.e * field / ARGON_MASS


SPECIES = (("ar_plus", 1), ("ar_2plus", 2))


def flux_speed_sampler(drift: float, vt: float, points: int = 4096):
    """Inverse-CDF sampler of the speeds crossing a plane: f(v) ∝ v exp(-(v-u)²/2vt²), v > 0."""
    v = np.linspace(0.0, drift + 8.0 * vt, points)
    pdf = v * np.exp(-0.5 * ((v - drift) / vt) ** 2)
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (pdf[1:] + pdf[:-1]) * np.diff(v))])
    cdf /= cdf[-1]
    return lambda u: np.interp(u, cdf, v)


def inlet_layout(setup: InletSetup):
    nx, ny = setup.cells
    dx = setup.length / nx
    x1 = 4 * dx                                   # level-1 blocks over the 4 cells by the inlet
    half = setup.width / 2
    refined = [((0.0, 0.0), (x1, half)), ((0.0, half), (x1, setup.width))]
    return demo_layout((0.0, setup.length, 0.0, setup.width), setup.cells, setup.blocks,
                       rank_of_block=lambda ix, iy: ix, refined=refined, refined_ranks=(3, 3),
                       periodic=("y",))


class _Population:
    """One species' particles as growable arrays (no Python loop over particles)."""

    def __init__(self):
        self.x = np.empty((0, 2))
        self.v = np.empty((0, 2))
        self.id = np.empty(0, dtype=np.int64)

    def add(self, x, v, ids):
        self.x = np.concatenate([self.x, x])
        self.v = np.concatenate([self.v, v])
        self.id = np.concatenate([self.id, ids])

    def keep(self, mask):
        self.x, self.v, self.id = self.x[mask], self.v[mask], self.id[mask]


def run_inlet(setup: InletSetup, on_snapshot=None) -> dict:
    """Run the channel; ``on_snapshot(step, time, {species: (x, v, id)}, tallies)`` at each snapshot."""
    rng = np.random.default_rng(setup.seed)
    vt = setup.thermal_speed
    sample_vx = flux_speed_sampler(setup.drift, vt)
    pops = {name: _Population() for name, _ in SPECIES}
    tally = {name: {"injected": 0, "absorbed": 0, "returned": 0} for name, _ in SPECIES}
    next_id = 0
    last = setup.spin_up + setup.every * (setup.snapshots - 1)
    dt = setup.dt
    for step in range(last + 1):
        if step >= setup.spin_up and (step - setup.spin_up) % setup.every == 0 and on_snapshot:
            on_snapshot(step, step * dt, {k: (p.x, p.v, p.id) for k, p in pops.items()}, tally)
        if step == last:
            break
        for name, z in SPECIES:
            p, a = pops[name], setup.acceleration(z)
            # move the ions already inside: exact in a uniform field
            p.x[:, 0] += p.v[:, 0] * dt + 0.5 * a * dt * dt
            p.x[:, 1] += p.v[:, 1] * dt
            p.v[:, 0] += a * dt
            # newcomers cross the inlet at a random moment of this step
            mean = setup.per_step * (1.0 if z == 1 else setup.doubly_fraction)
            n = int(rng.poisson(mean))
            tau = rng.random(n) * dt
            vx = sample_vx(rng.random(n))
            vy = rng.normal(0.0, vt, n)
            xn = np.column_stack([vx * tau + 0.5 * a * tau * tau, rng.random(n) * setup.width + vy * tau])
            vn = np.column_stack([vx + a * tau, vy])
            p.add(xn, vn, np.arange(next_id, next_id + n, dtype=np.int64))
            next_id += n
            tally[name]["injected"] += n
            np.mod(p.x[:, 1], setup.width, out=p.x[:, 1])
            p.x[p.x[:, 1] >= setup.width, 1] = 0.0
            wall = p.x[:, 0] >= setup.length
            back = p.x[:, 0] < 0.0
            tally[name]["absorbed"] += int(wall.sum())
            tally[name]["returned"] += int(back.sum())
            p.keep(~(wall | back))
    return {k: dict(v) for k, v in tally.items()}


def write_inlet_wall(folder: str, progress=print, setup: InletSetup | None = None) -> dict:
    """Run the channel and write its snapshots into ``folder``; return a summary."""
    import h5py
    setup = setup or InletSetup()
    layout = inlet_layout(setup)
    os.makedirs(folder, exist_ok=True)
    counts = []

    def on_snapshot(step, time, parts, tally):
        path = os.path.join(folder, f"inlet_{step:04d}.h5")
        with h5py.File(path, "w") as fh:
            fh.attrs["step"] = np.int64(step)
            fh.attrs["time"] = float(time)
            fh.attrs["time_unit"] = "s"
            for name, z in SPECIES:
                x, v, ids = parts[name]
                g = fh.create_group(name)
                g.attrs["mass"] = ARGON_MASS
                g.attrs["charge"] = z * constants.e
                if z == 1:
                    for key, data, unit in (("position", x, "m"), ("velocity", v, "m/s")):
                        g.create_dataset(key, data=data).attrs["units"] = unit
                    g.create_dataset("id", data=ids)
                    g.create_dataset("weight", data=np.full(ids.size, setup.weight))
                else:
                    rec = np.empty(ids.size, dtype=[("position", "<f8", (2,)), ("velocity", "<f8", (2,)),
                                                   ("id", "<i8"), ("weight", "<f8")])
                    rec["position"], rec["velocity"], rec["id"] = x, v, ids
                    rec["weight"] = setup.weight
                    g.create_dataset("particles", data=rec)
                for key in ("injected", "absorbed", "returned"):
                    fh.attrs[f"{name}_{key}"] = np.int64(tally[name][key])
            write_blocks_group(fh, layout)
        counts.append({k: int(parts[k][2].size) for k in parts})

    tally = run_inlet(setup, on_snapshot)
    if progress:
        progress(f"  inlet_wall: {setup.snapshots} snapshots, "
                 f"{sum(counts[-1].values())} ions in the channel at the end")
    return {"snapshots": setup.snapshots, "tally": tally, "first_counts": counts[0], "last_counts": counts[-1],
            "thermal_speed": setup.thermal_speed, "weight": setup.weight}
