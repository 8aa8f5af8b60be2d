"""Relativistic momentum and kinetic energy from velocity, γv and momentum columns, on every path.

Outside source: the textbook relations of special relativity, p = γ m v and
E_kin = (γ − 1) m c² with γ = 1/sqrt(1 − v²/c²) (e.g. Jackson, "Classical Electrodynamics",
ch. 11, from memory); c and the electron mass from scipy.constants (CODATA). The worked value:
at v = 0.8 c, γ = 5/3, so p = (4/3) m c and E_kin = (2/3) m c².

Paths: the numpy reduction, the compiled one-pass reduction over columns in memory, the
compiled reduction reading HDF5 columns straight from the file, and the run's drift table.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from _need import need_that
import scipy.constants as sc

from _audit_runs import frame
from swarmaudit.diagnostics import _kernels, drift

M = sc.m_e
C = sc.c


def _beam(n, rng):
    """Speeds up to 0.95 c in random directions, weights around 1, and the 0.8 c particle first."""
    beta = rng.uniform(0.0, 0.95, n)
    beta[0] = 0.8
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1)[:, None]
    d[0] = (0.6, 0.0, 0.8)
    v = beta[:, None] * C * d
    w = rng.uniform(0.5, 1.5, n)
    return v, w


def _columns(kind, v, w):
    gamma = 1.0 / np.sqrt(1.0 - np.sum(v * v, axis=1) / C ** 2)     # textbook γ, its own form
    comp = {"v": v, "u": gamma[:, None] * v, "p": M * gamma[:, None] * v}[kind]
    cols = {"x": np.linspace(0.0, 1.0, len(w)), "w": w}
    for a, axis in enumerate("xyz"):
        cols[f"{kind}{axis}"] = comp[:, a]
    return cols, gamma


def _expected(v, w, gamma):
    p = (w * gamma * M)[:, None] * v
    return {"momentum_x": p[:, 0].sum(), "momentum_y": p[:, 1].sum(), "momentum_z": p[:, 2].sum(),
            "kinetic_energy": np.sum(w * (gamma - 1.0) * M * C ** 2)}


def test_one_electron_at_point_eight_c():
    # the worked value, from each kind of column, numpy and compiled
    v = np.array([[0.48 * C, 0.0, 0.64 * C]])          # |v| = 0.8 c
    for kind in "vup":
        cols, gamma = _columns(kind, v, np.ones(1))
        assert gamma[0] == pytest.approx(5.0 / 3.0, rel=1e-14)
        f = frame("e", cols, {"mass": M})
        paths = [drift.numpy_totals(f, True)[0]]
        if _kernels.available:
            paths.append(drift.fused_totals(f, True)[0])
        for got in paths:
            p = np.hypot(got["momentum_x"], got["momentum_z"])
            assert p / (M * C) == pytest.approx(4.0 / 3.0, rel=1e-12), kind
            assert got["momentum_y"] == 0.0
            assert got["kinetic_energy"] / (M * C ** 2) == pytest.approx(2.0 / 3.0, rel=1e-12), kind


@pytest.mark.parametrize("kind", ["v", "u", "p"])
@pytest.mark.parametrize("compiled", [False, True])
def test_momentum_and_energy_of_a_beam(kind, compiled):
    if compiled:
        need_that(_kernels.available, "numba is not installed")
    rng = np.random.default_rng([ord(kind), 3])
    v, w = _beam(4000, rng)
    cols, gamma = _columns(kind, v, w)
    f = frame("e", cols, {"mass": M})
    got, bad = (drift.fused_totals if compiled else drift.numpy_totals)(f, True)
    assert not any(bad.values())
    want = _expected(v, w, gamma)
    scale = np.sum(w * gamma * M * np.linalg.norm(v, axis=1))
    for q in ("momentum_x", "momentum_y", "momentum_z"):
        assert abs(got[q] - want[q]) <= 1e-12 * scale, q
    assert got["kinetic_energy"] == pytest.approx(want["kinetic_energy"], rel=1e-12)
    assert got["abs_momentum"] == pytest.approx(scale, rel=1e-12)


def test_without_relativistic_velocity_momentum_stays_classical():
    v = np.array([[0.8 * C, 0.0, 0.0]])
    got = drift.numpy_totals(frame("e", {"x": [0.0], "vx": v[:, 0]}, {"mass": M}))[0]
    assert got["momentum_x"] == pytest.approx(0.8 * M * C, rel=1e-14)


@pytest.mark.parametrize("kind", ["v", "u", "p"])
def test_compiled_file_reads_and_the_drift_table(tmp_path, monkeypatch, kind):
    from swarmaudit.audit import tables as audit
    from swarmaudit.audit.tables import _held_open
    from swarmaudit.core.context import AuditContext
    from swarmaudit.readers.discover import open_run
    from swarmaudit.readers.hdf5 import HDF5Reader
    rng = np.random.default_rng([ord(kind), 5])
    n = 12_003
    v, w = _beam(n, rng)
    cols, gamma = _columns(kind, v, w)
    for k in range(2):
        with h5py.File(tmp_path / f"snap_{k}.h5", "w") as fh:
            fh.attrs["step"] = k
            g = fh.create_group("e")
            g.attrs["mass"] = M
            for name, arr in cols.items():
                g[name] = arr
    want = _expected(v, w, gamma)
    tol = 1e-12 * np.sum(w * gamma * M * np.linalg.norm(v, axis=1))     # of Σ|p|
    if _kernels.available and _kernels.can_read_files:
        from swarmaudit.engine import pieces as engine_pieces
        from swarmaudit.engine.reduce import reduce
        monkeypatch.setattr(engine_pieces, "PIECE_ROWS", 4096)
        calls = []
        real = _kernels.file_piece_sums
        monkeypatch.setattr(_kernels, "file_piece_sums", lambda *a, **k: calls.append(1) or real(*a, **k))
        f = HDF5Reader().open(str(tmp_path / "snap_0.h5")).species["e"]
        with _held_open(f):
            got = reduce(drift.Totals.of_frame(f, True, compiled=True), f, where="serial")[0]
        assert calls
        for q, value in want.items():
            assert got[q] == pytest.approx(value, rel=1e-12, abs=tol), q
    table = audit.drift_table(AuditContext(open_run(str(tmp_path)), relativistic=True, use_cache=False))
    row = table[(table["species"] == "e") & (table["snapshot"] == 0)].set_index("quantity")["value"]
    for q, value in want.items():
        assert row[q] == pytest.approx(value, rel=1e-12, abs=tol), q
