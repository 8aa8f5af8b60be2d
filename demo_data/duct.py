"""Small demo run that leaks: nitrogen in a duct with a pump port, as CSV.

Free-molecular nitrogen at 300 K drifts along a 2-D duct, periodic in x.
Molecules bounce specularly off the duct walls except where the bottom
wall has a pump port, which absorbs every molecule that reaches it. Nothing
else happens to them, so the run loses a few per cent of its molecules
(and of their mass and energy) over its length: a real non-conservation
that ``check --rtol 0.01`` must catch. Kinetic theory gives the loss rate:
a wall is hit at ⟨|v_y|⟩/2 per unit length per molecule per duct height,
with ⟨|v_y|⟩ = √(2kT/πm).

One CSV per snapshot (``duct_NNNN.csv``, the step) with ``# step``,
``# time`` and ``# time_unit`` comment lines, plus ``layout.csv``
(two levels: a finer block over the port).
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np
from scipy import constants

from .blocks import demo_layout, write_layout_csv

NITROGEN_MASS = 28.0134 * constants.atomic_mass


@dataclass(frozen=True)
class DuctSetup:
    molecules: int = 4000
    length: float = 0.20            # m, periodic
    height: float = 0.05            # m
    port: tuple = (0.09, 0.11)      # m, absorbing stretch of the bottom wall
    temperature: float = 300.0      # K
    drift: float = 150.0            # m/s along x
    weight: float = 2.5e11          # molecules per macro-particle
    dt: float = 2e-6                # s
    every: int = 5
    snapshots: int = 16
    seed: int = 11

    @property
    def thermal_speed(self) -> float:
        return float(np.sqrt(constants.k * self.temperature / NITROGEN_MASS))

    @property
    def loss_rate(self) -> float:
        """Kinetic-theory loss per molecule and second (uniform gas, port fraction of one wall)."""
        mean_abs_vy = np.sqrt(2.0 / np.pi) * self.thermal_speed
        return float((self.port[1] - self.port[0]) / self.length * mean_abs_vy / (2.0 * self.height))


def duct_layout(setup: DuctSetup):
    cells = (40, 10)
    return demo_layout((0.0, setup.length, 0.0, setup.height), cells, (4, 2),
                       rank_of_block=lambda ix, iy: ix // 2,
                       refined=[((0.08, 0.0), (0.12, 0.01))], refined_ranks=(1,), periodic=("x",))


def run_duct(setup: DuctSetup, on_snapshot=None) -> dict:
    """Free flight with specular walls and an absorbing port; ``on_snapshot(step, time, state)``."""
    rng = np.random.default_rng(setup.seed)
    n = setup.molecules
    x = rng.uniform(0.0, setup.length, n)
    y = rng.uniform(0.0, setup.height, n)
    vx = rng.normal(setup.drift, setup.thermal_speed, n)
    vy = rng.normal(0.0, setup.thermal_speed, n)
    ids = np.arange(n, dtype=np.int64)
    lost = 0
    dt, h = setup.dt, setup.height
    last = setup.every * (setup.snapshots - 1)
    for step in range(last + 1):
        if step % setup.every == 0 and on_snapshot:
            on_snapshot(step, step * dt, (x, y, vx, vy, ids))
        if step == last:
            break
        yn = y + vy * dt
        # where a molecule going down meets y = 0 (a step is far shorter than the duct is high)
        below = yn < 0.0
        t_hit = np.where(below, y / np.where(below, -vy, 1.0), 0.0)
        x_hit = np.mod(x + vx * t_hit, setup.length)
        absorbed = below & (x_hit >= setup.port[0]) & (x_hit < setup.port[1])
        above = yn >= h
        yn = np.where(below, -yn, np.where(above, 2.0 * h - yn, yn))
        vy = np.where(below | above, -vy, vy)
        x = np.mod(x + vx * dt, setup.length)
        x[x >= setup.length] = 0.0
        keep = ~absorbed
        lost += int(absorbed.sum())
        x, y, vx, vy, ids = x[keep], yn[keep], vx[keep], vy[keep], ids[keep]
    return {"lost": lost, "left": int(ids.size)}


def write_small_csv(folder: str, progress=print, setup: DuctSetup | None = None) -> dict:
    """Run the duct and write its CSV snapshots and ``layout.csv`` into ``folder``."""
    import pandas as pd
    setup = setup or DuctSetup()
    os.makedirs(folder, exist_ok=True)
    write_layout_csv(os.path.join(folder, "layout.csv"), duct_layout(setup))
    counts = []

    def on_snapshot(step, time, state):
        x, y, vx, vy, ids = state
        table = pd.DataFrame({"x": x, "y": y, "vx": vx, "vy": vy, "id": ids,
                              "weight": np.full(ids.size, setup.weight),
                              "mass": np.full(ids.size, NITROGEN_MASS)})
        path = os.path.join(folder, f"duct_{step:04d}.csv")
        with open(path, "w", encoding="utf-8", newline="") as fh:
            fh.write(f"# step = {step}\n# time = {time:.9g}\n# time_unit = s\n")
            table.to_csv(fh, index=False, float_format="%.10g")
        counts.append(int(ids.size))

    out = run_duct(setup, on_snapshot)
    if progress:
        progress(f"  small_csv: {setup.snapshots} snapshots, {out['lost']} of {setup.molecules} "
                 "molecules lost through the pump port")
    duration = setup.dt * setup.every * (setup.snapshots - 1)
    return {"snapshots": setup.snapshots, "counts": counts, "lost": out["lost"],
            "expected_lost_fraction": 1.0 - float(np.exp(-setup.loss_rate * duration))}
