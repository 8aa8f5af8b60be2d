"""Small runs written to tmp_path for the export tests (NumPy .npz, one file per snapshot)."""

from __future__ import annotations

import os

import numpy as np

#: layout options of the sample run: a periodic unit square, 4 x 2 blocks on 2 ranks
LAYOUT_ARGS = ["--domain", "0,1,0,1", "--cells", "32,32", "--blocks", "4,2", "--ranks", "2",
               "--periodic", "x,y"]


def sample_state(n=3000, species=("ions", "electrons"), seed=3):
    rng = np.random.default_rng(seed)
    state = {}
    for k, sp in enumerate(species):
        state[sp] = dict(
            x=rng.random(n),
            y=(0.5 + 0.12 * rng.standard_normal(n)) % 1.0,
            vx=rng.normal(0.6 if k % 2 == 0 else -0.6, 0.15, n),
            vy=rng.normal(0.0, 0.1, n),
            id=np.arange(n, dtype=np.int64),
            w=np.full(n, 2.0),
            mass=1.0 + 9.0 * (k % 2 == 0),
            charge=1.0 if k % 2 == 0 else -1.0,
        )
    return state


def snapshot_columns(state, t):
    """Every species at time ``t``: straight streaming, wrapped into the periodic unit square."""
    out = {}
    for sp, st in state.items():
        out[sp] = {"x": (st["x"] + st["vx"] * t) % 1.0, "y": (st["y"] + st["vy"] * t) % 1.0,
                   "vx": st["vx"], "vy": st["vy"], "id": st["id"], "w": st["w"]}
    return out


def write_npz_run(folder, *, n=3000, snapshots=4, species=("ions", "electrons"), seed=3,
                  charge_jump=0.0, with_ids=True, steps_between=10, dt=0.01):
    """A streaming periodic run of ``species``; returns (folder, state).

    Counts, weight, charge and momentum are conserved exactly; ``charge_jump``
    scales the first species' charge in the last snapshot to break that.
    """
    os.makedirs(folder, exist_ok=True)
    state = sample_state(n, species, seed)
    for s in range(snapshots):
        step = s * steps_between
        t = step * dt
        arrays = {"step": np.array(step), "time": np.array(t)}
        for k, (sp, cols) in enumerate(snapshot_columns(state, t).items()):
            for c, v in cols.items():
                if c == "id" and not with_ids:
                    continue
                arrays[f"{sp}/{c}"] = v
            q = state[sp]["charge"]
            if k == 0 and s == snapshots - 1:
                q = q * (1.0 + charge_jump)
            arrays[f"{sp}/mass"] = np.array(state[sp]["mass"])
            arrays[f"{sp}/charge"] = np.array(q)
        np.savez(os.path.join(folder, f"snap_{step:05d}.npz"), **arrays)
    return folder, state
