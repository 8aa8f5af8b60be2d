"""The time and the step a file stores are when the snapshot was written, not conserved totals.

Outside source: common practice of the trade — the simulated time and the step counter grow by
construction from dump to dump, so a conservation check that compared them with the first dump
would fail every run (and a run of t = 0 at the first dump would divide by zero). The check
here: a run whose particles do not change at all, but whose stored clock advances, passes
``check`` at a tolerance of 1e-12, and its drift table has no row for any clock value, while a
stored field energy (a real conserved part) stays a row.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from swarmaudit.audit import tables as audit
from swarmaudit.core.context import AuditContext
from swarmaudit.core.frame import is_clock_scalar
from swarmaudit.readers.discover import open_run

CLOCK = {"t": lambda k: 0.1 * k, "sim_time": lambda k: 0.1 * k, "dt": lambda k: 0.1 / (k + 1),
         "iteration": lambda k: 7 * k, "dump_step": lambda k: k}


def _particles(n=50):
    rng = np.random.default_rng(1)
    return {"x": rng.random(n), "y": rng.random(n), "vx": rng.normal(size=n), "id": np.arange(n)}


def _write(tmp_path, fmt, k, cols, scalars):
    path = tmp_path / f"snap_{k:03d}.{fmt}"
    if fmt == "npz":
        np.savez(path, **cols, **{n: np.array(v) for n, v in scalars.items()})
    elif fmt == "h5":
        with h5py.File(path, "w") as fh:
            for n, v in scalars.items():
                fh.attrs[n] = v
            for n, v in cols.items():       # a table at the root: the root's mass is its mass
                fh[n] = v
    else:
        lines = [f"# {n} = {v!r}" for n, v in scalars.items()]
        lines.append(",".join(cols))
        lines += [",".join(repr(float(cols[c][i])) for c in cols) for i in range(len(cols["x"]))]
        path.write_text("\n".join(lines) + "\n")


@pytest.mark.parametrize("fmt", ["npz", "h5", "csv"])
def test_clock_values_are_not_drift_rows(tmp_path, fmt):
    cols = _particles()
    for k in range(3):
        scalars = {name: f(k) for name, f in CLOCK.items()}
        scalars.update(field_energy=5.0, step=10 * k, mass=2.0)   # the species' mass
        _write(tmp_path, fmt, k, cols, scalars)
    ctx = AuditContext(open_run(str(tmp_path)), use_cache=False)
    table = audit.drift_table(ctx)
    quantities = set(table["quantity"])
    assert not quantities & (set(CLOCK) | {"time", "step", "meta_t", "mass", "meta_charge"})
    assert {"field_energy", "total_energy", "kinetic_energy"} <= quantities
    assert list(table.drop_duplicates("snapshot")["time"]) == pytest.approx([0.0, 0.1, 0.2])  # from t
    assert list(table.drop_duplicates("snapshot")["step"]) == [0, 10, 20]
    assert audit.check(ctx, rtol=1e-12).ok
    # the root's mass is the single species' constant in every format: Σ ½ m v² uses it
    (frame,) = ctx.run[0].species.values()
    assert frame.attrs["mass"] == 2.0
    ke = table[(table["snapshot"] == 0) & (table["quantity"] == "kinetic_energy")]["value"]
    assert float(ke.iloc[0]) == pytest.approx(0.5 * 2.0 * np.sum(cols["vx"] ** 2), rel=1e-12)


def test_time_wins_over_t_and_both_stay_out_of_the_totals(tmp_path):
    cols = _particles()
    for k in range(2):
        _write(tmp_path, "npz", k, cols, {"time": 1.0 + k, "t": 5.0 * k, "step": k})
    ctx = AuditContext(open_run(str(tmp_path)), use_cache=False)
    assert [ctx.run[i].time for i in range(2)] == [1.0, 2.0]
    assert ctx.run[1].meta["t"] == 5.0                       # still shown by inspect
    assert "t" not in set(audit.drift_table(ctx)["quantity"])


def test_clock_names():
    for name in ("t", "time", "Time", "step", "sim_time", "physical_time", "dt", "timestep",
                 "iteration", "cycle", "output_step"):
        assert is_clock_scalar(name), name
    for name in ("T", "field_energy", "temperature", "kinetic_energy", "timer_energy", "total_charge"):
        assert not is_clock_scalar(name), name
