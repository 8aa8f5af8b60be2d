"""Small runs for the diagnostics and audit tests: in memory, or as .npz files in a tmp folder."""

from __future__ import annotations

import os

import numpy as np

from swarmaudit.core.context import AuditContext
from swarmaudit.core.frame import Frame, Snapshot
from swarmaudit.core.run import Run, SnapshotRef


def frame(species, columns: dict, attrs=None) -> Frame:
    n = len(next(iter(columns.values())))
    return Frame(species, n, {k: (lambda v=v: np.asarray(v)) for k, v in columns.items()},
                 attrs=attrs or {}, source=f"<memory {species}>")


def memory_run(snapshots: list[dict]) -> Run:
    """``snapshots``: dicts with ``species`` (name -> (columns, attrs)), ``step``, ``time``, ``meta``."""
    refs = [SnapshotRef(f"snap_{i:03d}", [f"/nonexistent/snap_{i:03d}"]) for i in range(len(snapshots))]
    built = {}

    def opener(ref, role_map):
        i = refs.index(ref)
        if i not in built:
            spec = snapshots[i]
            species = {name: frame(name, cols, attrs).with_role_map(role_map)
                       for name, (cols, attrs) in spec["species"].items()}
            built[i] = Snapshot(ref.paths[0], species, spec.get("step"), spec.get("time"),
                                dict(spec.get("meta", {})), spec.get("layout"))
        return built[i]

    return Run(refs, opener, source="<memory run>")


def context(snapshots, layout=None, **kw) -> AuditContext:
    return AuditContext(memory_run(snapshots), fixed_layout=layout, **kw)


def drifting_plasma(n=400, snapshots=6, loss_at=3, loss=0.01, seed=0):
    """Electrons and ions drifting in a periodic unit box; at ``loss_at`` the electrons
    lose a fraction ``loss`` of their charge (their count stays)."""
    rng = np.random.default_rng(seed)
    x, y = rng.random(n), rng.random(n)
    vx, vy = rng.normal(0, 0.02, n), rng.normal(0, 0.02, n)
    xi, yi = rng.random(n), rng.random(n)
    out = []
    for k in range(snapshots):
        q = np.full(n, -1.0)
        if loss_at is not None and k >= loss_at:
            q[: int(round(loss * n))] = 0.0
        out.append({
            "step": 10 * k, "time": 0.5 * k, "meta": {"field_energy": 0.25},
            "species": {
                "electrons": ({"x": (x + vx * k) % 1.0, "y": (y + vy * k) % 1.0, "vx": vx, "vy": vy,
                               "id": np.arange(n), "charge": q}, {"mass": 1.0}),
                "ions": ({"x": xi, "y": yi, "vx": np.zeros(n), "vy": np.zeros(n),
                          "id": np.arange(n)}, {"mass": 1836.0, "charge": 1.0}),
            },
        })
    return out


def write_npz_run(folder, snapshots) -> str:
    """One .npz per snapshot: ``species/column`` arrays, 0-d species attributes and scalars."""
    os.makedirs(folder, exist_ok=True)
    for i, spec in enumerate(snapshots):
        arrays = {}
        for name, (cols, attrs) in spec["species"].items():
            for k, v in cols.items():
                arrays[f"{name}/{k}"] = np.asarray(v)
            for k, v in attrs.items():
                arrays[f"{name}/{k}"] = np.array(v)
        if spec.get("step") is not None:
            arrays["step"] = np.array(spec["step"])
        if spec.get("time") is not None:
            arrays["time"] = np.array(spec["time"])
        for k, v in spec.get("meta", {}).items():
            arrays[k] = np.array(v)
        np.savez(os.path.join(folder, f"snap_{i:04d}.npz"), **arrays)
    return os.fspath(folder)


def folder_state(folder) -> dict:
    """relative path -> sha256 of every file under ``folder``, and ``"dir"`` for every sub-folder:
    equal before and after when nothing was written, changed or left behind."""
    import hashlib
    out = {}
    for root, dirs, files in os.walk(folder):
        for f in files:
            p = os.path.join(root, f)
            with open(p, "rb") as fh:
                out[os.path.relpath(p, folder)] = hashlib.sha256(fh.read()).hexdigest()
        out.update({os.path.relpath(os.path.join(root, d), folder): "dir" for d in dirs})
    return out
