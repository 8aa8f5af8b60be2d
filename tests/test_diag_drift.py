"""Kinetic energy, snapshot totals and the drift table."""

import numpy as np
import pytest
import scipy.constants as sc

from swarmaudit.diagnostics.drift import (drift_table, first_violation, kinetic_energy,
                                          snapshot_totals)

from _audit_runs import frame


def test_gamma_two_gives_the_rest_energy_of_an_electron():
    # outside source: scipy.constants (CODATA): γ = 2 means kinetic energy = rest energy,
    # 0.51099895 MeV for an electron
    rest_mev = sc.physical_constants["electron mass energy equivalent in MeV"][0]
    u = np.sqrt(3.0) * sc.c                      # γ = sqrt(1 + u²/c²) = 2
    e = kinetic_energy(sc.m_e, 1.0, [np.array([u])], kind="u", relativistic=True)
    assert e / (sc.e * 1e6) == pytest.approx(rest_mev, rel=1e-9)
    assert rest_mev == pytest.approx(0.51099895, abs=1e-8)
    # the same particle given as momentum p = γ m v = m u, and as velocity v = u/γ
    p = kinetic_energy(sc.m_e, 1.0, [np.array([sc.m_e * u])], kind="p", relativistic=True)
    v = kinetic_energy(sc.m_e, 1.0, [np.array([u / 2.0])], kind="v", relativistic=True)
    assert p == pytest.approx(e, rel=1e-12) and v == pytest.approx(e, rel=1e-12)


def test_non_relativistic_limit():
    # outside source: ½ m v² (textbook); (γ-1)mc² = ½mv²(1 + ¾β² + ...) so at β = 1e-4 the two
    # differ by 7.5e-9, inside 1e-8 only when the small-u form avoids cancellation
    v = 1e-4 * sc.c
    rel = kinetic_energy(sc.m_e, 1.0, [np.array([v])], kind="v", relativistic=True)
    assert rel / (0.5 * sc.m_e * v * v) == pytest.approx(1.0, abs=1e-8)
    tiny = kinetic_energy(1.0, 1.0, [np.array([1e-9])], kind="u", relativistic=True, c=1.0)
    assert tiny == pytest.approx(0.5e-18, rel=1e-12)


def test_weights_and_components():
    w = np.array([2.0, 3.0])
    vx, vy, vz = np.array([1.0, 0.0]), np.array([0.0, 2.0]), np.array([2.0, 0.0])
    e = kinetic_energy(4.0, w, [vx, vy, vz])
    # by hand: 2·½·4·(1+4) + 3·½·4·4 = 20 + 24
    assert e == pytest.approx(44.0)
    assert kinetic_energy(4.0, w, [4.0 * vx, 4.0 * vy, 4.0 * vz], kind="p") == pytest.approx(44.0)


def test_nonfinite_terms_are_counted_not_propagated():
    v = np.array([1.0, np.nan, 2.0, np.inf])
    total, bad = kinetic_energy(2.0, 1.0, [v], return_nonfinite=True)
    assert total == pytest.approx(1.0 + 4.0) and bad == 2
    # faster than light from velocities: reported as non-finite
    _, bad = kinetic_energy(1.0, 1.0, [np.array([2.0])], kind="v", relativistic=True, c=1.0,
                            return_nonfinite=True)
    assert bad == 1


def test_snapshot_totals_of_a_frame():
    f = frame("e", {"x": np.zeros(3), "vx": np.array([1.0, -1.0, 2.0]), "vy": np.array([0.0, 1.0, 0.0]),
                    "w": np.array([1.0, 2.0, 1.0]), "q": np.array([-1.0, -1.0, 1.0])}, {"mass": 2.0})
    t, bad = snapshot_totals(f, with_nonfinite=True)
    assert t["count"] == 3 and t["weight"] == 4
    assert t["charge"] == pytest.approx(-1 - 2 + 1) and t["abs_charge"] == pytest.approx(4)
    assert t["momentum_x"] == pytest.approx(2 * (1 - 2 + 2))
    assert t["momentum_y"] == pytest.approx(2 * 2)
    assert "momentum_z" not in t
    assert t["abs_momentum"] == pytest.approx(2 * (1 + 2 * np.sqrt(2) + 2))
    assert t["kinetic_energy"] == pytest.approx(0.5 * 2 * (1 + 2 * 2 + 4))
    assert set(bad.values()) == {0}
    nomass = snapshot_totals(frame("g", {"x": np.zeros(2), "vx": np.ones(2)}))
    assert "kinetic_energy" not in nomass and "momentum_x" not in nomass and "charge" not in nomass


def _rows(values, quantity="charge", species="e", **extra):
    return [{"snapshot": i, "step": 10 * i, "time": float(i), "species": species, "quantity": quantity,
             "value": v, **extra} for i, v in enumerate(values)]


def test_drift_table_contract():
    df = drift_table(_rows([100.0, 100.0, 99.0]) + _rows([0.0, 0.1, -0.1], "momentum_x", abs_momentum=10.0))
    assert list(df.columns[:8]) == ["snapshot", "step", "time", "species", "quantity", "value",
                                    "reference", "relative_drift"]
    ch = df[df["quantity"] == "charge"]
    np.testing.assert_allclose(ch["relative_drift"], [0.0, 0.0, -0.01])
    mx = df[df["quantity"] == "momentum_x"]
    # momentum is measured against the reference Σ|momentum|, not the (zero) net momentum
    np.testing.assert_allclose(mx["relative_drift"], [0.0, 0.01, -0.01])
    hit = first_violation(df, 0.005)
    assert (hit["quantity"], hit["snapshot"]) == ("momentum_x", 1)
    assert first_violation(df, 0.02) is None


def test_zero_reference_gives_nan_and_a_note_not_inf():
    df = drift_table(_rows([0.0, 0.0, 1e-3], abs_charge=2.0))
    assert df["relative_drift"].isna().all()
    assert "Σ|w q|" in df["note"].iloc[0]
    assert np.isfinite(df["scale"]).all() and (df["scale"] == 2.0).all()
    # judged against Σ|w q| = 2: 1e-3 is 0.05 % of it
    assert first_violation(df, 1e-4)["snapshot"] == 2
    assert first_violation(df, 1e-3) is None
    other = drift_table(_rows([0.0, 0.0, 0.5], "kinetic_energy"))
    assert other["relative_drift"].isna().all() and other["note"].iloc[0]


def test_nonfinite_rows_leave_the_band():
    df = drift_table(_rows([1.0, 1.0, 1.0]) + [{"snapshot": 3, "step": 30, "time": 3.0, "species": "e",
                                                "quantity": "charge", "value": 1.0, "nonfinite": 2}])
    assert first_violation(df, 0.5)["snapshot"] == 3
    assert df["nonfinite"].tolist() == [0, 0, 0, 2]
