"""Small demo run of grains: elastic glass discs in a periodic box, as structured ``.npy``.

A discrete-element flavoured run: polydisperse glass grains (radius
0.5-0.75 mm) in a periodic 0.1 m square, moving freely between collisions.
Each step finds touching, approaching pairs (a periodic k-d tree) and gives
them the equal and opposite impulse of an elastic collision along the line
of centres, one partner at a time. Total momentum and kinetic energy are
kept to rounding.

One structured ``.npy`` per snapshot (``grains_NNNN.npy``, the step): fields
x, y, vx, vy, radius, mass, id. The format carries no metadata: step and
time come from the file name.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

GLASS_DENSITY = 2500.0      # kg/m³

RECORD = np.dtype([("x", "<f8"), ("y", "<f8"), ("vx", "<f8"), ("vy", "<f8"),
                   ("radius", "<f8"), ("mass", "<f8"), ("id", "<i8")])


@dataclass(frozen=True)
class GrainSetup:
    grains: int = 2000
    box: float = 0.1                 # m, periodic
    radius: tuple = (0.5e-3, 0.75e-3)
    agitation: float = 0.1           # m/s, spread of each velocity component
    drift: tuple = (0.03, -0.01)     # m/s, mean velocity
    dt: float = 1.25e-4              # s: the fastest grain moves a tenth of a radius a step
    every: int = 20
    snapshots: int = 21
    seed: int = 3


def _matching(i: np.ndarray, j: np.ndarray, n: int) -> np.ndarray:
    """Pairs (a boolean mask) no two of which share a grain; never empty for a non-empty list.

    A pair is taken when it is the first pair of both its grains.
    """
    k = np.arange(i.size)
    first = np.full(n, i.size)
    np.minimum.at(first, i, k)
    np.minimum.at(first, j, k)
    return (first[i] == k) & (first[j] == k)


def collide(pos, vel, radius, mass, box: float) -> int:
    """Elastic impulses on touching, approaching pairs (in place); return how many.

    A grain touching several others is resolved one partner at a time
    (rounds of pairs that share no grain), so every impulse is an exact
    two-body elastic collision and kinetic energy is kept to rounding.
    """
    tree = cKDTree(pos, boxsize=box)
    pairs = tree.query_pairs(2.0 * float(radius.max()), output_type="ndarray")
    if pairs.size == 0:
        return 0
    i, j = pairs[:, 0], pairs[:, 1]
    d = pos[j] - pos[i]
    d -= box * np.round(d / box)                       # minimum image
    dist = np.sqrt(np.einsum("ij,ij->i", d, d))
    touching = dist < radius[i] + radius[j]
    i, j = i[touching], j[touching]
    n = d[touching] / dist[touching, None]
    reduced = mass[i] * mass[j] / (mass[i] + mass[j])
    done = 0
    while i.size:
        closing = np.einsum("ij,ij->i", vel[j] - vel[i], n)
        hit = closing < 0.0
        if not hit.any():
            break
        i, j, n, reduced, closing = i[hit], j[hit], n[hit], reduced[hit], closing[hit]
        now = _matching(i, j, len(vel))
        impulse = (2.0 * reduced[now] * closing[now])[:, None] * n[now]   # onto i; closing < 0
        vel[i[now]] += impulse / mass[i[now], None]
        vel[j[now]] -= impulse / mass[j[now], None]
        done += int(now.sum())
        rest = ~now
        i, j, n, reduced = i[rest], j[rest], n[rest], reduced[rest]
    return done


def initial_grains(setup: GrainSetup, rng):
    """Grains on a square lattice wide enough that none touch, random velocities."""
    side = int(np.ceil(np.sqrt(setup.grains)))
    spacing = setup.box / side
    if spacing <= 2.0 * setup.radius[1]:
        raise ValueError("too many grains for the box")
    k = np.arange(setup.grains)
    pos = np.column_stack([(k % side + 0.5) * spacing, (k // side + 0.5) * spacing])
    radius = rng.uniform(*setup.radius, setup.grains)
    mass = GLASS_DENSITY * 4.0 / 3.0 * np.pi * radius ** 3
    vel = rng.normal(0.0, setup.agitation, (setup.grains, 2))
    vel -= (mass[:, None] * vel).sum(axis=0) / mass.sum()
    vel += np.asarray(setup.drift)
    return pos, vel, radius, mass


def write_small_npy(folder: str, progress=print, setup: GrainSetup | None = None) -> dict:
    """Run the grains and write one structured ``.npy`` per snapshot into ``folder``."""
    setup = setup or GrainSetup()
    rng = np.random.default_rng(setup.seed)
    pos, vel, radius, mass = initial_grains(setup, rng)
    os.makedirs(folder, exist_ok=True)
    collisions = 0
    last = setup.every * (setup.snapshots - 1)
    for step in range(last + 1):
        if step % setup.every == 0:
            rec = np.empty(setup.grains, dtype=RECORD)
            rec["x"], rec["y"] = pos[:, 0], pos[:, 1]
            rec["vx"], rec["vy"] = vel[:, 0], vel[:, 1]
            rec["radius"], rec["mass"], rec["id"] = radius, mass, np.arange(setup.grains)
            np.save(os.path.join(folder, f"grains_{step:04d}.npy"), rec, allow_pickle=False)
        if step == last:
            break
        pos += setup.dt * vel
        np.mod(pos, setup.box, out=pos)
        pos[pos >= setup.box] = 0.0
        collisions += collide(pos, vel, radius, mass, setup.box)
    if progress:
        progress(f"  small_npy: {setup.snapshots} snapshots of {setup.grains} grains, {collisions} collisions")
    return {"snapshots": setup.snapshots, "grains": setup.grains, "collisions": collisions}
