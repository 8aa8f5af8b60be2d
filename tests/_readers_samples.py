"""Reference particles and the same particles written in every layout the readers accept.

The writers use h5py, numpy and pandas directly (not swarmaudit), so a reader is checked against
what those libraries wrote; the reference is the numpy arrays themselves.
"""

from __future__ import annotations

import numpy as np

AXES = ("x", "y", "z")


def particles(n: int = 64, seed: int = 0) -> dict[str, np.ndarray]:
    """8 columns by role: x y z vx vy vz id weight; with a NaN, infinities and a > 2**53 id."""
    rng = np.random.default_rng(seed)
    p = {a: rng.uniform(-1.0, 1.0, n) for a in AXES}
    p.update({f"v{a}": rng.normal(0.0, 1e-3, n) for a in AXES})
    p["id"] = np.arange(n, dtype=np.int64) + 2**53 + 1    # not exact as a float64
    p["weight"] = rng.uniform(0.5, 2.0, n) * 1e10
    if n >= 3:
        p["vx"][0] = np.nan
        p["vy"][1] = np.inf
        p["vz"][2] = -np.inf
    return p


ROLES = ("x", "y", "z", "vx", "vy", "vz", "id", "weight")


def write_h5_soa(path, p, group=None, **attrs):
    import h5py
    with h5py.File(path, "w") as f:
        g = f if group is None else f.create_group(group)
        for k in ROLES:
            g[k] = p[k]
        for k, v in attrs.items():
            f.attrs[k] = v


def write_h5_nested(path, p, group="beam", **attrs):
    import h5py
    with h5py.File(path, "w") as f:
        g = f.create_group(group)
        for a in AXES:
            g[f"position/{a}"] = p[a]
            g[f"velocity/{a}"] = p[f"v{a}"]
        g["id"] = p["id"]
        g["weight"] = p["weight"]
        for k, v in attrs.items():
            f.attrs[k] = v


def write_h5_nd(path, p, group="beam"):
    import h5py
    with h5py.File(path, "w") as f:
        g = f.create_group(group)
        g["position"] = np.stack([p[a] for a in AXES], axis=1)
        g["velocity"] = np.stack([p[f"v{a}"] for a in AXES], axis=1)
        g["id"] = p["id"]
        g["weight"] = p["weight"]


COMPOUND = np.dtype([("position", "<f8", (3,)), ("velocity", "<f8", (3,)), ("id", "<i8"), ("weight", "<f8")])


def compound_records(p):
    rec = np.zeros(len(p["x"]), COMPOUND)
    rec["position"] = np.stack([p[a] for a in AXES], axis=1)
    rec["velocity"] = np.stack([p[f"v{a}"] for a in AXES], axis=1)
    rec["id"] = p["id"]
    rec["weight"] = p["weight"]
    return rec


def write_h5_compound(path, p, group="beam"):
    import h5py
    with h5py.File(path, "w") as f:
        f.create_group(group)["particles"] = compound_records(p)


def write_npy(path, p):
    dt = np.dtype([(k, p[k].dtype) for k in ROLES])
    rec = np.zeros(len(p["x"]), dt)
    for k in ROLES:
        rec[k] = p[k]
    np.save(path, rec, allow_pickle=False)


def write_npz(path, p, **scalars):
    arrays = {k: p[k] for k in ROLES}
    arrays.update({k: np.asarray(v) for k, v in scalars.items()})
    np.savez(path, **arrays)


def write_csv(path, p, **scalars):
    import pandas as pd
    with open(path, "w", newline="") as fh:
        for k, v in scalars.items():
            fh.write(f"# {k} = {v!r}\n")
        # %.17g round-trips every float64 exactly (IEEE 754: 17 significant digits suffice)
        pd.DataFrame({k: p[k] for k in ROLES}).to_csv(fh, index=False, float_format="%.17g",
                                                      na_rep="nan")


WRITERS = {
    "h5_soa": (write_h5_soa, ".h5"),
    "h5_nested": (write_h5_nested, ".h5"),
    "h5_nd": (write_h5_nd, ".h5"),
    "h5_compound": (write_h5_compound, ".h5"),
    "npy": (write_npy, ".npy"),
    "npz": (write_npz, ".npz"),
    "csv": (write_csv, ".csv"),
}
