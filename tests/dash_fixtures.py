"""Small in-memory runs for the dashboard tests (no reader involved)."""

from __future__ import annotations

import numpy as np

from swarmaudit.app.state import ServerState
from swarmaudit.core.context import AuditContext
from swarmaudit.core.errors import InputError
from swarmaudit.core.frame import Frame, Snapshot
from swarmaudit.core.layout import regular_layout
from swarmaudit.core.run import Run, SnapshotRef


def two_beam_snapshot(i, n=4000, seed=0, nan=0, bad=False):
    """Two counter-streaming beams in a periodic 2-D box, shifted a little per snapshot."""
    rng = np.random.default_rng(seed + i)
    species = {}
    for name, v0 in (("beam_right", 1.0), ("beam_left", -1.0)):
        x = (rng.uniform(0, 4.0, n) + 0.05 * i * v0) % 4.0
        y = rng.uniform(0, 2.0, n)
        cols = {
            "x": x.astype(np.float32), "y": y.astype(np.float32),
            "vx": (v0 + 0.1 * rng.standard_normal(n)).astype(np.float32),
            "vy": (0.1 * rng.standard_normal(n)).astype(np.float32),
            "id": np.arange(n, dtype=np.int64) + (0 if v0 > 0 else n),
            "weight": np.full(n, 0.5),
        }
        if nan:
            cols["x"][:nan] = np.nan
        if bad:
            def broken():
                raise InputError(f"/runs/mem/step_{i:04d}.h5", "dataset 'x' is truncated")
            loaders = {k: (lambda v=v: v) for k, v in cols.items()}
            loaders["x"] = broken
        else:
            loaders = {k: (lambda v=v: v) for k, v in cols.items()}
        species[name] = Frame(name, n, loaders, units={"x": "m", "y": "m", "vx": "m/s", "vy": "m/s"},
                              attrs={"mass": 1.0, "charge": -1.0 if v0 > 0 else 1.0},
                              source=f"/runs/mem/step_{i:04d}.h5")
    return Snapshot(f"/runs/mem/step_{i:04d}.h5", species, step=10 * i, time=0.1 * i)


def memory_context(nsnap=3, n=4000, nan_at=None, bad_at=None, name="mem", seed=0, first=0):
    """A run of ``nsnap`` snapshots, the first at step ``10 * first``; ``seed`` draws other particles."""
    snaps = [two_beam_snapshot(first + i, n=n, seed=seed, nan=(7 if i == nan_at else 0), bad=(i == bad_at))
             for i in range(nsnap)]
    refs = [SnapshotRef(f"step_{first + i:04d}.h5", [f"/runs/{name}/step_{first + i:04d}.h5"])
            for i in range(nsnap)]
    run = Run(refs, lambda ref, rm: snaps[refs.index(ref)], source=f"/runs/{name}")
    layout = regular_layout([0, 4, 0, 2], [16, 8], [4, 2], periodic=("x", "y"), ranks=2)
    return AuditContext(run, layout)


def server_of(*named):
    """A server's shared state serving ``(name, context)`` pairs, in order (what ``serve`` makes)."""
    server = ServerState()
    for name, ctx in named:
        server.add(name, ctx)
    return server


def link_figures_of(dash, res) -> dict:
    """The two figures ``export --view LINK`` wrote (by view), checked against the dashboard
    ``dash`` showing the same link: the same aggregate array, ranges, title and colour map."""
    linked = {r.kind: r for r in res.figures if r.path.endswith(("link_space.png", "link_phase.png"))}
    assert set(linked) == {"space", "phase"}
    for which, rec in linked.items():
        view, agg = dash.shown[which]
        np.testing.assert_array_equal(np.asarray(rec.aggregate.values), np.asarray(agg.values))
        assert (rec.view["x_range"], rec.view["y_range"]) == (view.x_range, view.y_range)
        assert rec.title == view.title
        assert rec.view["cmap"] == view.cmap
    return linked
