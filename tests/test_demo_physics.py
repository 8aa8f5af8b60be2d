"""Physics of the demo runs, checked against textbook results.

Sources (all from memory): the cold two-stream dispersion relation as in
Birdsall & Langdon, *Plasma Physics via Computer Simulation*, ch. 5;
momentum conservation of an equal deposit/interpolation weighting with an
antisymmetric field solve, Hockney & Eastwood, *Computer Simulation Using
Particles* (common practice); the Plummer model's half-mass radius
a/√(2^(2/3) − 1) (Plummer 1911; Binney & Tremaine, *Galactic Dynamics*);
the flux-weighted drifting Maxwellian and the wall collision rate n⟨|v|⟩/4
per unit area of kinetic theory (e.g. Reif, *Fundamentals of Statistical
and Thermal Physics*, ch. 7); the elastic two-body collision formulas of
introductory mechanics.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import constants, integrate
from scipy.interpolate import RegularGridInterpolator

from swarmaudit.demo_data import duct, grains, inlet, nbody, pic2d
from swarmaudit.demo_data.generate import fit_growth_rate


# --- cold two-stream theory --------------------------------------------------

def two_stream_growth_from_quartic(k_v0: float, omega_b: float) -> float:
    """Largest imaginary root of (ω−kv)²(ω+kv)² − ω_b²[(ω+kv)² + (ω−kv)²] = 0.

    That quartic is 1 = ω_b²/(ω−kv0)² + ω_b²/(ω+kv0)² with the denominators
    cleared (two symmetric cold beams, Birdsall & Langdon ch. 5, from memory).
    """
    minus = np.array([1.0, -k_v0])          # ω − kv0
    plus = np.array([1.0, k_v0])            # ω + kv0
    lhs = np.polymul(np.polymul(minus, minus), np.polymul(plus, plus))
    rhs = omega_b ** 2 * np.polyadd(np.polymul(plus, plus), np.polymul(minus, minus))
    roots = np.roots(np.polysub(lhs, rhs))
    return float(np.max(roots.imag))


def test_quartic_and_closed_form_agree():
    # the closed form in pic2d and the numerical roots are two independent routes
    for kv in (0.2, 0.5, math.sqrt(3 / 8), 0.9, 0.99):
        assert pic2d.cold_two_stream_growth_rate(kv, math.sqrt(0.5)) == pytest.approx(
            two_stream_growth_from_quartic(kv, math.sqrt(0.5)), rel=1e-9)
    # fastest growth of the symmetric cold beams: γ = ω_b/2 at kv0 = (√3/2) ω_b
    assert two_stream_growth_from_quartic(math.sqrt(3 / 8), math.sqrt(0.5)) == pytest.approx(
        math.sqrt(0.5) / 2, rel=1e-9)
    # stable beyond kv0 = √2 ω_b = ω_p
    assert two_stream_growth_from_quartic(1.05, math.sqrt(0.5)) < 1e-6


@pytest.mark.parametrize("k_v0", [math.sqrt(3 / 8), 0.9])
def test_field_energy_grows_at_twice_the_cold_two_stream_rate(k_v0):
    # reduced run: 8192 particles on 32 × 4 cells; the box holds one seeded
    # unstable mode (its second harmonic is stable for kv0 > 1/2)
    setup = pic2d.TwoStreamSetup(particles=8192, nx=32, ny=4, steps=350, k_v0=k_v0)
    history = pic2d.run_two_stream(setup)
    measured, window = fit_growth_rate(history["time"], history["field_energy"])
    theory = 2.0 * two_stream_growth_from_quartic(k_v0, setup.omega_b)
    assert window[1] - window[0] > 5.0, window           # a real stretch of exponential growth
    # tolerance 10 %: the two seeded modes differ by 32 %, so a wrong dispersion fails
    assert measured == pytest.approx(theory, rel=0.10), (measured, theory, window)
    # and it saturates: the field takes a sizeable share of the beam energy
    assert history["field_energy"].max() > 1e4 * history["field_energy"][0]


def test_full_demo_run_drifts_stay_small():
    # the 250 k demo setup on fewer particles: momentum to rounding (the
    # pairing below), total energy to a fraction of a per cent through
    # saturation (explicit leapfrog with ω_p Δt = 0.1, common practice)
    setup = pic2d.TwoStreamSetup(particles=16384, steps=300)
    h = pic2d.run_two_stream(setup, every_step=True)
    px = h["momentum_x"]
    assert np.max(np.abs(px - px[0])) / abs(px[0]) < 1e-12
    assert np.max(np.abs(h["momentum_y"])) < 1e-12 * abs(px[0])
    total = h["kinetic_energy"] + h["field_energy"]
    assert np.max(np.abs(total - total[0])) / total[0] < 1e-2


# --- the pieces of the PIC cycle ---------------------------------------------

def _random_particles(rng, grid, n):
    # clumped, so that the deposit is far from uniform
    x = np.mod(rng.normal(0.3 * grid.lx, 0.1 * grid.lx, n), grid.lx)
    y = np.mod(rng.normal(0.6 * grid.ly, 0.2 * grid.ly, n), grid.ly)
    return x, y


def test_cic_deposit_conserves_charge_exactly():
    rng = np.random.default_rng(1)
    grid = pic2d.Grid(24, 10, 3.7, 1.9)
    x, y = _random_particles(rng, grid, 50_000)
    q = rng.normal(0.0, 1.0, x.size)
    rho = pic2d.deposit(x, y, q, grid, chunk=4096)
    assert rho.shape == (10, 24)
    assert rho.sum() * grid.cell_area == pytest.approx(q.sum(), rel=1e-12, abs=1e-10)
    # a particle on a node gives it all its charge; one at a cell centre a quarter to each corner
    one = pic2d.deposit(np.array([2 * grid.dx]), np.array([3 * grid.dy]), 1.0, grid) * grid.cell_area
    assert one[3, 2] == pytest.approx(1.0) and one.sum() == pytest.approx(1.0)
    mid = pic2d.deposit(np.array([2.5 * grid.dx]), np.array([9.5 * grid.dy]), 1.0, grid) * grid.cell_area
    assert mid[[9, 9, 0, 0], [2, 3, 2, 3]] == pytest.approx([0.25] * 4)   # wraps in y


def test_cic_gather_is_bilinear_interpolation_and_the_deposits_adjoint():
    rng = np.random.default_rng(2)
    grid = pic2d.Grid(16, 12, 2.0, 1.5)
    fx = rng.normal(size=(grid.ny, grid.nx))
    fy = rng.normal(size=(grid.ny, grid.nx))
    x, y = _random_particles(rng, grid, 5000)
    gx, gy = pic2d.gather(fx, fy, x, y, grid, chunk=777)
    # scipy's linear interpolation on the periodically extended node grid
    nodes_x = np.arange(grid.nx + 1) * grid.dx
    nodes_y = np.arange(grid.ny + 1) * grid.dy
    ext = np.pad(fx, ((0, 1), (0, 1)), mode="wrap")
    ref = RegularGridInterpolator((nodes_y, nodes_x), ext, method="linear")(np.column_stack([y, x]))
    np.testing.assert_allclose(gx, ref, rtol=1e-12, atol=1e-12)
    # Σ_nodes ρ F ΔA = Σ_particles q F(x_p): the same weights both ways (no self-force)
    q = rng.uniform(0.5, 1.5, x.size)
    rho = pic2d.deposit(x, y, q, grid)
    assert np.sum(rho * fy) * grid.cell_area == pytest.approx(np.sum(q * gy), rel=1e-12)


@pytest.mark.parametrize("mode", [(1, 0), (0, 2), (3, -1), (5, 4)])
def test_fft_poisson_solves_a_single_mode_exactly(mode):
    grid = pic2d.Grid(32, 16, 6.0, 2.5)
    kx = 2 * np.pi * mode[0] / grid.lx
    ky = 2 * np.pi * mode[1] / grid.ly
    xx, yy = np.meshgrid(np.arange(grid.nx) * grid.dx, np.arange(grid.ny) * grid.dy)
    phase = kx * xx + ky * yy
    rho = 0.7 + np.cos(phase)                  # the constant is the neutralising background's job
    phi, ex, ey = pic2d.solve_poisson(rho, grid)
    k2 = kx * kx + ky * ky
    # ∇²φ = −ρ: φ = cos/k², E = −∇φ = k sin/k²
    np.testing.assert_allclose(phi, np.cos(phase) / k2, atol=1e-12)
    np.testing.assert_allclose(ex, kx * np.sin(phase) / k2, atol=1e-12)
    np.testing.assert_allclose(ey, ky * np.sin(phase) / k2, atol=1e-12)


def test_self_forces_cancel_so_total_momentum_is_kept():
    # Hockney & Eastwood (from memory): equal deposit and interpolation
    # weights plus an antisymmetric field operator give no net self-force
    rng = np.random.default_rng(3)
    grid = pic2d.Grid(32, 16, 4.0, 2.0)
    x, y = _random_particles(rng, grid, 20_000)
    q = -rng.uniform(0.5, 1.5, x.size)
    _, ex, ey = pic2d.solve_poisson(pic2d.deposit(x, y, q, grid), grid)
    fx, fy = pic2d.gather(ex, ey, x, y, grid)
    scale = np.sum(np.abs(q * fx)) + np.sum(np.abs(q * fy))
    assert abs(np.sum(q * fx)) < 1e-12 * scale
    assert abs(np.sum(q * fy)) < 1e-12 * scale
    # with a nearest-grid-point gather instead (unequal weights) it would not vanish
    ix = np.floor(x / grid.dx + 0.5).astype(int) % grid.nx
    iy = np.floor(y / grid.dy + 0.5).astype(int) % grid.ny
    assert abs(np.sum(q * ex[iy, ix])) > 1e-6 * scale


def test_quiet_start_is_uniform_and_carries_the_seed():
    setup = pic2d.TwoStreamSetup(particles=20000, nx=32, ny=8, amplitude=1e-2)
    x, y, vx, vy = pic2d.load_beams(setup)
    rho = pic2d.deposit(x, y, -setup.weight, setup.grid)
    line = rho.mean(axis=0)
    k = 2 * np.pi / setup.lx
    xs = np.arange(setup.nx) * setup.grid.dx
    # density −(1 + δ cos kx) to first order in δ (CIC smooths by ~(k dx)²/12)
    np.testing.assert_allclose(line, -(1 + 1e-2 * np.cos(k * xs)), atol=5e-4)
    assert set(np.round(vx, 12)) == {setup.drift + 1.0, setup.drift - 1.0}
    assert np.all(vy == 0) and np.all((x >= 0) & (x < setup.lx)) and np.all((y >= 0) & (y < setup.ly))


# --- the small runs --------------------------------------------------------------

def test_inlet_turned_back_share_matches_the_flux_distribution():
    # an ion turns back when ½ m v_x² < q ΔV; v_x of the ions crossing the
    # inlet is flux weighted: f(v) ∝ v exp(−(v−u)²/2v_t²), v > 0 (kinetic theory)
    setup = inlet.InletSetup(per_step=150.0, snapshots=31)
    marks = []
    inlet.run_inlet(setup, lambda step, t, parts, tally: marks.append(
        {k: dict(v) for k, v in tally.items()}))
    vt = setup.thermal_speed
    pdf = lambda v: v * np.exp(-0.5 * ((v - setup.drift) / vt) ** 2)   # noqa: E731
    norm = integrate.quad(pdf, 0, setup.drift + 12 * vt)[0]
    for name, z in inlet.SPECIES:
        v_cut = math.sqrt(2 * z * constants.e * setup.hill_volts / inlet.ARGON_MASS)
        expected = integrate.quad(pdf, 0, v_cut)[0] / norm
        a, b = marks[0][name], marks[-1][name]
        back = b["returned"] - a["returned"]
        share = back / (back + b["absorbed"] - a["absorbed"])
        assert share == pytest.approx(expected, rel=0.06), (name, share, expected)


def test_duct_loses_molecules_at_the_kinetic_theory_rate():
    setup = duct.DuctSetup(molecules=20000, snapshots=16)
    out = duct.run_duct(setup)
    duration = setup.dt * setup.every * (setup.snapshots - 1)
    # molecules reach a wall at n⟨|v_y|⟩/2 per unit wall length (2-D kinetic theory)
    expected = 1 - math.exp(-setup.loss_rate * duration)
    assert out["lost"] / setup.molecules == pytest.approx(expected, rel=0.15)
    assert out["lost"] + out["left"] == setup.molecules
    # ⟨|v_y|⟩ of a Maxwellian, checked by quadrature rather than taken on trust
    vt = setup.thermal_speed
    mean_abs = 2 * integrate.quad(lambda v: v * np.exp(-v * v / (2 * vt * vt)), 0, 12 * vt)[0] / (
        math.sqrt(2 * math.pi) * vt)
    assert mean_abs == pytest.approx(math.sqrt(2 / math.pi) * vt, rel=1e-9)


def test_plummer_sampler_half_mass_radius_and_virial_ratio():
    rng = np.random.default_rng(5)
    a = 3 * math.pi / 16
    pos, vel = nbody.plummer_sphere(40000, a, rng)
    r = np.sqrt(np.sum(pos ** 2, axis=1))
    # mass fraction inside r is r³/(r² + a²)^(3/2): half of it inside a/√(2^(2/3) − 1),
    # measured on the 99 % the sampler keeps
    r_half_kept = a / math.sqrt((0.99 * 0.5) ** (-2 / 3) - 1)
    assert np.median(r) == pytest.approx(r_half_kept, rel=0.02)
    # mean v² = |W|/M for a virialised cluster with W = −3π/32 G M²/a (Plummer)
    assert np.mean(np.sum(vel ** 2, axis=1)) == pytest.approx(3 * math.pi / 32 / a, rel=0.05)


def test_nbody_forces_cancel_and_energy_is_kept():
    rng = np.random.default_rng(6)
    pos, vel = nbody.plummer_sphere(300, 3 * math.pi / 16, rng)
    acc, pot = nbody.accelerations(pos, 1 / 300, 0.05)
    assert np.abs(acc.sum(axis=0)).max() < 1e-12 * np.abs(acc).sum()
    # softened potential energy by a plain double loop over pairs (reference)
    d = pos[:, None, :] - pos[None, :, :]
    inv = 1 / np.sqrt(np.sum(d * d, axis=2) + 0.05 ** 2)
    np.fill_diagonal(inv, 0)
    assert pot == pytest.approx(-0.5 * inv.sum() / 300 ** 2, rel=1e-12)


def test_elastic_collisions_follow_the_two_body_formulas():
    # 1-D head-on: v1' = ((m1−m2)v1 + 2 m2 v2)/(m1+m2), v2' = ((m2−m1)v2 + 2 m1 v1)/(m1+m2)
    pos = np.array([[0.050, 0.05], [0.0512, 0.05]])
    vel = np.array([[0.3, 0.0], [-0.1, 0.0]])
    radius = np.array([0.6e-3, 0.7e-3])
    mass = np.array([2.0, 3.0])
    assert grains.collide(pos, vel, radius, mass, 0.1) == 1
    m1, m2, v1, v2 = 2.0, 3.0, 0.3, -0.1
    np.testing.assert_allclose(vel[:, 0], [((m1 - m2) * v1 + 2 * m2 * v2) / (m1 + m2),
                                           ((m2 - m1) * v2 + 2 * m1 * v1) / (m1 + m2)], rtol=1e-12)
    # across the periodic edge, and separating pairs are left alone
    pos = np.array([[0.0995, 0.02], [0.0003, 0.02]])
    vel = np.array([[0.2, 0.0], [0.0, 0.0]])
    assert grains.collide(pos, vel, radius, np.array([1.0, 1.0]), 0.1) == 1
    np.testing.assert_allclose(vel, [[0.0, 0.0], [0.2, 0.0]], atol=1e-15)
    assert grains.collide(pos, vel, radius, np.array([1.0, 1.0]), 0.1) == 0


def test_grain_run_keeps_momentum_and_energy(tmp_path):
    setup = grains.GrainSetup(grains=900, snapshots=6)
    grains.write_small_npy(str(tmp_path), progress=None, setup=setup)
    first = np.load(tmp_path / "grains_0000.npy", allow_pickle=False)
    last = np.load(tmp_path / f"grains_{setup.every * (setup.snapshots - 1):04d}.npy", allow_pickle=False)

    def totals(r):
        return (np.sum(r["mass"] * r["vx"]), np.sum(r["mass"] * r["vy"]),
                np.sum(0.5 * r["mass"] * (r["vx"] ** 2 + r["vy"] ** 2)))
    assert totals(last) == pytest.approx(totals(first), rel=1e-12)
    assert not np.array_equal(first["vx"], last["vx"])        # they did collide
