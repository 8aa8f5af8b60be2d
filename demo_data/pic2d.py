"""A small 2-D electrostatic particle-in-cell code for the demo's two-stream run.

Normalised units: the electron plasma frequency of the whole electron
population is ω_p = 1, lengths are in v0/ω_p (v0 the beam speed in the
beams' mean frame), velocities in v0, ε0 = 1, electron charge -1 and mass 1,
mean electron density 1 per unit area. Ions are an immobile uniform
background, so they only cancel the k = 0 mode of the charge density.

The grid is node-centred and periodic on both axes. Charge is deposited
with cloud-in-cell weights; the field is found spectrally (FFT) and read
back at the particles with the same weights. With an antisymmetric field
operator that pairing is free of self-force, so total momentum is kept to
rounding; total energy is kept only approximately (leapfrog, finite grid).
Every step walks over the particles in slices of ``chunk`` so that
temporaries stay bounded for multi-million particle runs.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

#: particles handled per slice: bounds the temporaries and keeps a slice's
#: working set in cache (a whole-array sweep is memory-bound)
CHUNK = 1 << 16


@dataclass(frozen=True)
class Grid:
    """A periodic node-centred grid ``nx`` × ``ny`` over ``[0, lx) × [0, ly)``."""

    nx: int
    ny: int
    lx: float
    ly: float

    @property
    def dx(self) -> float:
        return self.lx / self.nx

    @property
    def dy(self) -> float:
        return self.ly / self.ny

    @property
    def cell_area(self) -> float:
        return self.dx * self.dy


class Workspace:
    """Reusable per-slice buffers.

    Fresh multi-megabyte temporaries every step make the allocator hand pages
    back to the system and fault them in again, which costs more than the
    arithmetic; so each step's work goes through these few buffers.
    """

    def __init__(self, size: int):
        self.size = int(max(1, size))
        self.f = [np.empty(self.size) for _ in range(8)]
        self.i = [np.empty(self.size, dtype=np.int64) for _ in range(5)]
        self.mask = np.empty(self.size, dtype=bool)

    @classmethod
    def for_particles(cls, n: int, chunk: int = CHUNK) -> "Workspace":
        return cls(min(int(n), int(chunk)))


def cic_weights(x, y, grid: Grid, ws: Workspace | None = None):
    """Flat node numbers of the four corners and the upper 1-D weights.

    Returns ``(n00, n10, n01, n11, wx1, wy1)``: node ``ix + nx*iy`` of the
    lower-left, lower-right, upper-left and upper-right corner (wrapped on
    the periodic box) and the weights of the upper neighbours along x and y;
    the lower ones are ``1 - wx1`` and ``1 - wy1``. The arrays are views of
    the workspace, valid until its next use.
    """
    m = x.shape[0]
    ws = ws if ws is not None and ws.size >= m else Workspace(m)
    wx1, wy1, fl = ws.f[0][:m], ws.f[1][:m], ws.f[2][:m]
    n00, n10, n01, n11, tmp = (a[:m] for a in ws.i)
    mask = ws.mask[:m]
    for pos, h, cells, w, corner in ((x, grid.dx, grid.nx, wx1, n00), (y, grid.dy, grid.ny, wy1, tmp)):
        np.multiply(pos, 1.0 / h, out=w)
        np.floor(w, out=fl)
        np.subtract(w, fl, out=w)
        np.copyto(corner, fl, casting="unsafe")
        # x just below the box edge can round up to the last node + 1: wrap it
        np.greater_equal(corner, cells, out=mask)
        np.subtract(corner, cells, out=corner, where=mask)
    # tmp holds the lower row: rows become flat offsets
    np.add(n00, 1, out=n10)
    np.equal(n10, grid.nx, out=mask)
    np.copyto(n10, 0, where=mask)
    np.multiply(tmp, grid.nx, out=tmp)
    np.add(tmp, grid.nx, out=n01)
    np.equal(n01, grid.nx * grid.ny, out=mask)
    np.copyto(n01, 0, where=mask)
    # n01 and n11 share the upper row; n00 and n10 the lower one
    np.add(n10, n01, out=n11)
    np.add(n01, n00, out=n01)
    np.add(n00, tmp, out=n00)
    np.add(n10, tmp, out=n10)
    return n00, n10, n01, n11, wx1, wy1


def _corner_weights(wx1, wy1, ws: Workspace, m: int):
    """The four CIC corner weights (views of the workspace)."""
    wx0, w00, w10, w01, w11 = (a[:m] for a in ws.f[3:8])
    np.subtract(1.0, wx1, out=wx0)
    np.subtract(1.0, wy1, out=w11)          # w11 holds wy0 for a moment
    np.multiply(wx0, w11, out=w00)
    np.multiply(wx1, w11, out=w10)
    np.multiply(wx0, wy1, out=w01)
    np.multiply(wx1, wy1, out=w11)
    return w00, w10, w01, w11


def deposit(x, y, charge_per_particle, grid: Grid, chunk: int = CHUNK,
            ws: Workspace | None = None, before=None) -> np.ndarray:
    """Charge density on the nodes, shape ``(ny, nx)``, by cloud-in-cell.

    ``charge_per_particle`` is a scalar or an array (weight times charge).
    ``before(slice)`` is called on each slice first (the run uses it to move
    the particles in the same sweep).
    """
    n = x.shape[0]
    size = grid.nx * grid.ny
    acc = np.zeros(size, dtype=np.float64)
    scalar = np.ndim(charge_per_particle) == 0
    ws = ws or Workspace.for_particles(n, chunk)
    for s in range(0, n, ws.size):
        sl = slice(s, min(n, s + ws.size))
        if before is not None:
            before(sl)
        m = sl.stop - sl.start
        corners = cic_weights(x[sl], y[sl], grid, ws)
        weights = _corner_weights(corners[4], corners[5], ws, m)
        for node, w in zip(corners[:4], weights):
            if not scalar:
                np.multiply(w, charge_per_particle[sl], out=w)
            acc += np.bincount(node, weights=w, minlength=size)
    if scalar:
        acc *= charge_per_particle
    return acc.reshape(grid.ny, grid.nx) / grid.cell_area


def gather(field_x: np.ndarray, field_y: np.ndarray, x, y, grid: Grid, chunk: int = CHUNK,
           ws: Workspace | None = None, out=None, after=None):
    """The node fields read back at the particles with the deposit's CIC weights.

    ``after(slice, ex_slice, ey_slice)`` is called on each slice once its
    fields are known (the run pushes velocities there); then ``out`` may be
    ``False`` to keep no full-length copy.
    """
    n = x.shape[0]
    ws = ws or Workspace.for_particles(n, chunk)
    keep = out is not False
    if keep:
        out_x, out_y = out if out is not None else (np.empty(n), np.empty(n))
    fx = field_x.reshape(-1)
    fy = field_y.reshape(-1)
    bx = np.empty(ws.size)
    by = np.empty(ws.size)
    tmp = np.empty(ws.size)
    for s in range(0, n, ws.size):
        sl = slice(s, min(n, s + ws.size))
        m = sl.stop - sl.start
        corners = cic_weights(x[sl], y[sl], grid, ws)
        weights = _corner_weights(corners[4], corners[5], ws, m)
        ex, ey, t = bx[:m], by[:m], tmp[:m]
        ex[...] = 0.0
        ey[...] = 0.0
        for node, w in zip(corners[:4], weights):
            np.take(fx, node, out=t)
            t *= w
            ex += t
            np.take(fy, node, out=t)
            t *= w
            ey += t
        if after is not None:
            after(sl, ex, ey)
        if keep:
            out_x[sl] = ex
            out_y[sl] = ey
    return (out_x, out_y) if keep else None


def _wavenumbers(grid: Grid):
    kx = 2.0 * np.pi * np.fft.fftfreq(grid.nx, d=grid.dx)
    ky = 2.0 * np.pi * np.fft.fftfreq(grid.ny, d=grid.dy)
    return kx, ky


def solve_poisson(rho: np.ndarray, grid: Grid):
    """φ, E_x, E_y on the nodes from ∇²φ = -ρ (ε0 = 1), spectrally.

    The k = 0 mode is dropped (the neutralising background). The Nyquist
    modes get no gradient: their ``ik`` is not real-valued on a grid, and
    keeping them would break the antisymmetry that conserves momentum.
    """
    kx, ky = _wavenumbers(grid)
    kxx, kyy = np.meshgrid(kx, ky)            # shape (ny, nx)
    k2 = kxx ** 2 + kyy ** 2
    rho_k = np.fft.fft2(rho)
    inv_k2 = np.zeros_like(k2)
    np.divide(1.0, k2, out=inv_k2, where=k2 > 0)
    phi_k = rho_k * inv_k2
    gx = 1j * kxx
    gy = 1j * kyy
    if grid.nx % 2 == 0:
        gx[:, grid.nx // 2] = 0.0
    if grid.ny % 2 == 0:
        gy[grid.ny // 2, :] = 0.0
    phi = np.fft.ifft2(phi_k).real
    ex = np.fft.ifft2(-gx * phi_k).real
    ey = np.fft.ifft2(-gy * phi_k).real
    return phi, ex, ey


def field_energy(ex: np.ndarray, ey: np.ndarray, grid: Grid) -> float:
    """½ ∫ |E|² dA over the box (ε0 = 1)."""
    return 0.5 * float(np.sum(ex * ex) + np.sum(ey * ey)) * grid.cell_area


def cold_two_stream_growth_rate(k_v0: float, omega_b: float) -> float:
    """Growth rate of two symmetric cold beams (±v0, plasma frequency ω_b each).

    The dispersion relation 1 = ω_b²/(ω-kv0)² + ω_b²/(ω+kv0)² has the roots
    ω² = k²v0² + ω_b² ± ω_b √(4k²v0² + ω_b²); the minus branch goes
    negative (a growing mode) for kv0 < √2 ω_b.
    """
    a2 = k_v0 ** 2
    w2 = a2 + omega_b ** 2 - omega_b * math.sqrt(4.0 * a2 + omega_b ** 2)
    return math.sqrt(-w2) if w2 < 0 else 0.0


@dataclass(frozen=True)
class TwoStreamSetup:
    """Two counter-streaming cold electron beams along x with one seeded mode.

    ``k_v0`` is k·v0/ω_p of the seeded mode (the box length follows from it);
    the default √(3/8) is the fastest-growing one. ``drift`` moves both beams
    (a Galilean boost: same growth, a nonzero total momentum to audit).
    ``amplitude`` is the seeded relative density perturbation δn/n.
    """

    particles: int = 250_000
    nx: int = 64
    ny: int = 32
    k_v0: float = math.sqrt(3.0 / 8.0)
    mode: int = 1
    drift: float = 0.2
    amplitude: float = 1e-3
    dt: float = 0.1
    steps: int = 480

    @property
    def lx(self) -> float:
        return 2.0 * np.pi * self.mode / self.k_v0     # v0 = 1

    @property
    def ly(self) -> float:
        return self.lx * self.ny / self.nx             # square cells

    @property
    def grid(self) -> Grid:
        return Grid(self.nx, self.ny, self.lx, self.ly)

    @property
    def per_beam(self) -> int:
        return self.particles // 2

    @property
    def weight(self) -> float:
        """Physical electrons per macro-particle (mean density 1)."""
        return self.lx * self.ly / (2 * self.per_beam)

    @property
    def omega_b(self) -> float:
        return math.sqrt(0.5)                          # each beam holds half the electrons

    @property
    def growth_rate(self) -> float:
        return cold_two_stream_growth_rate(self.k_v0, self.omega_b)


CHARGE = -1.0
MASS = 1.0


def load_beams(setup: TwoStreamSetup):
    """Quiet start: ``(x, y, vx, vy)`` of both beams, right-moving beam first.

    x is evenly spaced and y follows a golden-ratio sequence, so the density
    is uniform far below random noise at long wavelengths; then both beams
    are displaced by ξ = (δn/n)/k · sin(kx), which seeds cos-like density
    bunching δn/n · cos(kx) in the chosen mode.
    """
    n = setup.per_beam
    lx, ly = setup.lx, setup.ly
    i = np.arange(n, dtype=np.float64)
    xs, ys = [], []
    for offset, ratio, phase in ((0.25, (math.sqrt(5.0) - 1.0) / 2.0, 0.5),
                                 (0.75, math.sqrt(2.0) - 1.0, 0.3)):
        x = (i + offset) * (lx / n)
        y = np.mod(i * ratio + phase, 1.0) * ly
        xs.append(x)
        ys.append(y)
    x = np.concatenate(xs)
    y = np.concatenate(ys)
    k = 2.0 * np.pi * setup.mode / lx
    x -= (setup.amplitude / k) * np.sin(k * x)
    np.mod(x, lx, out=x)
    vx = np.concatenate([np.full(n, setup.drift + 1.0), np.full(n, setup.drift - 1.0)])
    vy = np.zeros(2 * n)
    return x, y, vx, vy


@dataclass
class StepRecord:
    """Per-step totals (the field energy history the growth-rate fit uses)."""

    time: list = field(default_factory=list)
    field_energy: list = field(default_factory=list)
    kinetic_energy: list = field(default_factory=list)
    momentum_x: list = field(default_factory=list)
    momentum_y: list = field(default_factory=list)

    def as_arrays(self) -> dict[str, np.ndarray]:
        return {k: np.asarray(v) for k, v in self.__dict__.items()}


SnapshotCallback = Callable[[int, float, np.ndarray, np.ndarray, np.ndarray, np.ndarray, float], None]


def run_two_stream(setup: TwoStreamSetup, snapshot_steps=(), on_snapshot: SnapshotCallback | None = None,
                   chunk: int = CHUNK, every_step: bool = False, order=None) -> dict[str, np.ndarray]:
    """Advance the two beams ``setup.steps`` steps by leapfrog.

    At each step in ``snapshot_steps`` calls ``on_snapshot(step, time, x, y,
    vx, vy, field_energy)`` with positions at that time and velocities
    centred on it (the mean of the half-step velocities either side), so
    that kinetic and field energy belong to the same instant. Returns the
    per-step history: time and field_energy at every step, kinetic_energy
    and momentum_x/y at snapshot steps (NaN between them unless
    ``every_step``, which costs two more sweeps over the particles a step).
    ``order`` (a permutation) holds the loaded particles in that order: row r
    is particle ``order[r]``, as another decomposition over ranks would hold
    them; the charge then sums in another order, so results differ by rounding.
    """
    grid = setup.grid
    x, y, vx, vy = load_beams(setup)
    if order is not None:
        x, y, vx, vy = (a[order] for a in (x, y, vx, vy))
    n = x.shape[0]
    qw = CHARGE * setup.weight
    qm = CHARGE / MASS
    dt = setup.dt
    wanted = set(int(s) for s in snapshot_steps)
    rec = StepRecord()
    ws = Workspace.for_particles(n, chunk)
    tmp = np.empty(ws.size)
    sq = np.empty(ws.size)
    mask = np.empty(ws.size, dtype=bool)

    def move(sl):
        # x(n+1) = x(n) + dt v(n+1/2), wrapped onto the periodic box
        m = sl.stop - sl.start
        for pos, vel, length in ((x, vx, grid.lx), (y, vy, grid.ly)):
            p = pos[sl]
            np.multiply(vel[sl], dt, out=tmp[:m])
            p += tmp[:m]
            # a particle moves far less than a box length per step, so one
            # shift wraps it (cheaper than a float modulo); the second test
            # also catches -tiny + length rounding to length itself
            np.less(p, 0.0, out=mask[:m])
            np.add(p, length, out=p, where=mask[:m])
            np.greater_equal(p, length, out=mask[:m])
            np.subtract(p, length, out=p, where=mask[:m])

    for step in range(setup.steps + 1):
        rho = deposit(x, y, qw, grid, ws=ws, before=move if step else None)
        _, ex, ey = solve_poisson(rho, grid)
        we = field_energy(ex, ey, grid)
        snap = step in wanted and on_snapshot is not None
        totals = snap or every_step
        vxc = np.empty(n) if snap else None
        vyc = np.empty(n) if snap else None
        sums = np.zeros(3)

        def kick(sl, fex, fey, first=(step == 0), snap=snap, totals=totals, vxc=vxc, vyc=vyc, sums=sums):
            m = sl.stop - sl.start
            t = tmp[:m]
            for vel, fe, centred, k in ((vx, fex, vxc, 0), (vy, fey, vyc, 1)):
                v = vel[sl]
                if not (totals or first):
                    np.multiply(fe, dt * qm, out=t)
                    v += t
                    continue
                np.multiply(fe, 0.5 * dt * qm, out=t)      # half a kick
                if first:
                    v -= t                                 # velocities live on half steps
                v += t                                     # now v(n), centred on this step
                if totals:
                    sums[k] += v.sum()
                    # not np.dot: a threaded BLAS call on a busy machine costs more than the sweep
                    np.multiply(v, v, out=sq[:m])
                    sums[2] += sq[:m].sum()
                if snap:
                    centred[sl] = v
                v += t                                     # v(n+1/2)

        gather(ex, ey, x, y, grid, ws=ws, out=False, after=kick)
        rec.time.append(step * dt)
        rec.field_energy.append(we)
        nan = float("nan")
        rec.kinetic_energy.append(0.5 * MASS * setup.weight * float(sums[2]) if totals else nan)
        rec.momentum_x.append(MASS * setup.weight * float(sums[0]) if totals else nan)
        rec.momentum_y.append(MASS * setup.weight * float(sums[1]) if totals else nan)
        if snap:
            on_snapshot(step, step * dt, x, y, vxc, vyc, we)
    return rec.as_arrays()
