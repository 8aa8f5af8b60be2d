"""Conserved totals of a snapshot and their drift against the first snapshot.

Totals are weighted: a macro-particle of weight w stands for w physical
particles, so charge is Σ w q, momentum Σ w m v (relativistic Σ w γ m v; from γv
columns Σ w m u, from momenta Σ w p) and
kinetic energy Σ w ½ m v² (relativistic Σ w (γ−1) m c²). Non-finite particle
values are left out of a total and counted, never propagated silently.
"""

from __future__ import annotations

import math
import threading

import numpy as np
import pandas as pd

from . import _kernels
from .accumulate import Accumulator, Piece, fold

#: quantities of one species of one snapshot, in table order
PARTICLE_QUANTITIES = ("count", "weight", "charge", "momentum_x", "momentum_y", "momentum_z",
                       "kinetic_energy")
#: helper totals used as scales, not reported as drift rows
SCALE_QUANTITIES = ("abs_momentum", "abs_charge")
MOMENTUM_QUANTITIES = ("momentum_x", "momentum_y", "momentum_z")

DRIFT_COLUMNS = ["snapshot", "step", "time", "species", "quantity", "value", "reference",
                 "relative_drift"]


def _speed_of_light(c):
    if c is None:
        from scipy.constants import c as c_si
        return float(c_si)
    c = float(c)
    if not (c > 0 and math.isfinite(c)):
        raise ValueError("the speed of light must be a positive number")
    return c


def finite_sum(values) -> tuple[float, int]:
    """Σ of the finite entries and how many entries were not finite."""
    v = np.asarray(values, dtype=np.float64)
    if v.ndim == 0:
        return (float(v), 0) if np.isfinite(v) else (0.0, 1)
    ok = np.isfinite(v)
    bad = int(v.size - np.count_nonzero(ok))
    if bad:
        return float(np.sum(v, where=ok)), bad
    return float(v.sum()), 0


def _squared_norm(components) -> np.ndarray:
    s = None
    for comp in components:
        c = np.asarray(comp, dtype=np.float64)
        s = c * c if s is None else s + c * c
    return s


def lorentz_factor_of_velocity(components, c=None) -> np.ndarray:
    """γ = 1/sqrt(1 − v²/c²) of velocity components, formed as sqrt(1 + u²/c²) with
    u² = v²/(1 − v²/c²) (the compiled totals form it the same way); v >= c gives NaN or inf."""
    cc = _speed_of_light(c)
    q2 = _squared_norm(components)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.sqrt(1.0 + (q2 / (1.0 - q2 / (cc * cc))) / (cc * cc))


def kinetic_energy_terms(mass, weight, components, kind: str = "v", relativistic: bool = False,
                         c=None) -> np.ndarray:
    """Per-particle w × kinetic energy (see :func:`kinetic_energy`)."""
    if kind not in ("v", "u", "p"):
        raise ValueError(f"kind must be 'v', 'u' or 'p', not {kind!r}")
    m = np.asarray(mass, dtype=np.float64)
    w = np.asarray(1.0 if weight is None else weight, dtype=np.float64)
    q2 = _squared_norm(components)   # v², u² or p²
    if q2 is None:
        return np.zeros(0)
    with np.errstate(divide="ignore", invalid="ignore"):
        if not relativistic:
            if kind == "p":
                e = 0.5 * q2 / m           # p²/2m
            else:
                e = 0.5 * m * q2           # ½ m v² (u taken as v)
        else:
            cc = _speed_of_light(c)
            if kind == "v":
                # u² = γ² v²; v >= c gives NaN/inf, reported as non-finite
                u2 = q2 / (1.0 - q2 / (cc * cc))
            elif kind == "u":
                u2 = q2
            else:
                u2 = q2 / (m * m)
            gamma = np.sqrt(1.0 + u2 / (cc * cc))
            # (γ-1) m c² = m u² / (γ+1): no cancellation for small u
            e = m * u2 / (gamma + 1.0)
            if kind == "p":
                # p²/(m(γ+1)) for massive particles; a massless one carries E = |p| c
                e = np.where(m == 0, np.sqrt(q2) * cc, q2 / (m * (gamma + 1.0)))
    return w * e


def kinetic_energy(mass, weight, components, kind: str = "v", relativistic: bool = False, c=None,
                   return_nonfinite: bool = False):
    """Σ w × kinetic energy of the particles.

    ``components`` are the 1-3 arrays of velocity (``kind='v'``), momentum per
    unit mass u = γv (``'u'``) or momentum (``'p'``). Non-relativistic:
    Σ w ½ m v² (u is taken as v; p gives p²/2m). Relativistic:
    Σ w (γ−1) m c² with γ = sqrt(1 + u²/c²), evaluated as m u²/(γ+1) so that
    small u loses no digits; ``c`` defaults to ``scipy.constants.c``. Non-
    finite terms are left out (their number is returned too with
    ``return_nonfinite``).
    """
    total, bad = finite_sum(kinetic_energy_terms(mass, weight, components, kind, relativistic, c))
    return (total, bad) if return_nonfinite else total


class Totals(Accumulator):
    """The conserved totals of one frame: the one definition of every drift number.

    State: running compensated sums (:class:`_kernels.TotalSums`) of the
    :data:`_kernels.TOTAL_SLOTS` (weight, charge, Σ|w q|, momentum x/y/z,
    Σ|momentum|, kinetic energy), their non-finite counts and the rows seen.
    ``add`` reduces a piece by one compiled pass (``_kernels.snapshot_sums``;
    straight from the file when every column's rows lie in a held file,
    ``_kernels.file_piece_sums``) or, for a small frame or without numba,
    by numpy; the piece's sums join the state by Neumaier-compensated
    addition, so cutting a frame differently changes a total only by rounding.
    ``finish`` gives ``(values, nonfinite)`` dicts; quantities that cannot be
    formed (no charge, no mass, no momentum column) are absent.

    ``weight``, ``charge`` and ``mass`` are each ``(column name, None)`` or
    ``(None, one value)`` (charge ``(None, None)``: none; mass ``(None, None)``:
    none); ``axes`` the ``(axis, column)`` pairs of momentum-like columns of
    ``kind`` ``'v'``, ``'u'`` or ``'p'``.
    """

    reads_once = True

    def __init__(self, weight, charge, mass, kind, axes, relativistic: bool = False, c=None,
                 compiled: bool | None = None):
        self.sources = {"weight": weight, "charge": charge, "mass": mass}
        self.kind = kind
        self.has_q = charge != (None, None)
        self.has_m = mass != (None, None)
        self.axes = list(axes) if kind and (kind == "p" or self.has_m) else []
        self.relativistic = bool(relativistic)
        self.c = c
        self.cc = _speed_of_light(c) if self.relativistic and self.has_m and self.axes else 1.0
        names = [nm for nm, _ in self.sources.values()] + [nm for _, nm in self.axes]
        self.columns = tuple(nm for nm in dict.fromkeys(names) if nm is not None)
        self.compiled = _kernels.available if compiled is None else bool(compiled and _kernels.available)

    @classmethod
    def of_frame(cls, frame, relativistic: bool = False, c=None, compiled: bool | None = None):
        """The totals of ``frame``: weight, charge and mass from columns, else species attributes;
        compiled for large frames (``_kernels.TOTALS_MIN_SIZE`` rows), numpy for small ones."""
        kind = frame.momentum_kind()
        axes = [(axis, frame.column_for(r)) for axis, r in zip("xyz", frame.momentum_roles())
                if frame.column_for(r) is not None]
        if compiled is None:
            compiled = len(frame) >= _kernels.TOTALS_MIN_SIZE
        return cls(_source(frame, "weight", 1.0), _source(frame, "charge", None),
                   _source(frame, "mass", None), kind, axes, relativistic, c, compiled)

    def start(self):
        return _kernels.TotalSums()

    def add(self, state, piece):
        n = len(piece)
        state.rows += n
        if self.compiled and self._add_from_files(state, piece):
            return state
        got = {r: (piece[nm] if nm is not None else v) for r, (nm, v) in self.sources.items()}
        comps = [piece[nm] for _, nm in self.axes]
        if self.compiled:
            _kernels.snapshot_sums(n, got["weight"], got["charge"], got["mass"], comps, self.kind or "v",
                                   self.relativistic, self.cc, want_ke=self.has_m, into=state)
        else:
            state.add(self._numpy_sums(n, got["weight"], got["charge"], got["mass"], comps))
        return state

    def _add_from_files(self, state, piece) -> bool:
        """The piece read and reduced by one compiled call, when its rows lie in held files."""
        if not (_kernels.can_read_files and self.columns):
            return False
        raw = {nm: piece.source(nm) for nm in self.columns}
        if any(r is None for r in raw.values()):
            return False
        comps = [raw[nm] for _, nm in self.axes]
        if len({np.dtype(dt) for _, _, dt in comps}) > 1:
            return False
        src = {r: (raw[nm] if nm is not None else v) for r, (nm, v) in self.sources.items()}
        src["components"] = comps
        got = _kernels.file_piece_sums([(0, len(piece))], src, self.kind or "v", self.relativistic,
                                       self.cc, self.has_m, _file_buffer, into=state)
        # None: a file gave fewer bytes than its metadata said; the usual reads say why
        return got is not None

    def _numpy_sums(self, n, w, q, m, comps) -> "_kernels.TotalSums":
        """A piece's sums with one numpy reduction per total (pairwise sums of the same terms)."""
        out = _kernels.TotalSums()
        slot = {name: k for k, name in enumerate(_kernels.TOTAL_SLOTS)}

        def put(name, arr):
            v, b = finite_sum(arr)
            out.acc[slot[name]] = v
            out.bad[slot[name]] = b

        w_arr = np.asarray(w, dtype=np.float64)
        put("weight", w_arr if w_arr.ndim else np.full(n, float(w_arr)))
        if self.has_q:
            wq = w_arr * np.asarray(q, dtype=np.float64)
            if wq.ndim == 0:
                wq = np.full(n, float(wq))
            put("charge", wq)
            put("abs_charge", np.abs(wq))
        if self.axes:
            comps = [np.asarray(x, dtype=np.float64) for x in comps]
            factor = w_arr if self.kind == "p" else w_arr * np.asarray(m, dtype=np.float64)
            if self.relativistic and self.kind == "v":
                factor = factor * lorentz_factor_of_velocity(comps, self.c)
            mag2 = None
            for k, comp in enumerate(comps):
                p = factor * comp
                if p.ndim == 0:
                    p = np.full(n, float(p))
                put(f"momentum_{k}", p)
                mag2 = p * p if mag2 is None else mag2 + p * p
            put("abs_momentum", np.sqrt(mag2))
            if self.has_m:
                terms = kinetic_energy_terms(m, w_arr, comps, self.kind, self.relativistic, self.c)
                if terms.ndim == 0:
                    terms = np.full(n, float(terms))
                put("kinetic_energy", terms)
        return out

    def merge(self, a, b):
        a.rows += b.rows
        return a.add(b)

    def finish(self, state) -> tuple[dict, dict]:
        total, nbad = state.result()
        slot = {name: k for k, name in enumerate(_kernels.TOTAL_SLOTS)}
        values: dict[str, float] = {"count": float(state.rows)}
        bad: dict[str, int] = {"count": 0}

        def put(name, k):
            values[name] = float(total[k])
            bad[name] = int(nbad[k])

        put("weight", slot["weight"])
        if self.has_q:
            put("charge", slot["charge"])
            put("abs_charge", slot["abs_charge"])
        for k, (axis, _) in enumerate(self.axes):
            put(f"momentum_{axis}", slot[f"momentum_{k}"])
        if self.axes:
            put("abs_momentum", slot["abs_momentum"])
            if self.has_m:
                put("kinetic_energy", slot["kinetic_energy"])
        return values, bad


def _source(frame, role: str, default):
    """(column name, None) when a column plays ``role``, else (None, attribute or default); reads nothing."""
    name = frame.column_for(role)
    if name is not None:
        return name, None
    if role in frame.attrs and frame.attrs[role] is not None:
        return None, float(frame.attrs[role])
    return None, default


def _whole(acc: Totals, frame):
    return acc.finish(fold(acc, [Piece({nm: frame[nm] for nm in acc.columns}, 0, len(frame))]))


def snapshot_totals(frame, relativistic: bool = False, c=None, with_nonfinite: bool = False):
    """Totals of one frame as one piece: count, weight, charge, momentum_x/y/z, kinetic_energy, scales.

    :class:`Totals` over the whole columns (an engine runs the same
    accumulator piece by piece: ``engine.reduce``). ``abs_momentum`` is
    Σ |w m v| (the momentum scale) and ``abs_charge`` Σ |w q| (the charge
    scale when the net charge is zero). With ``with_nonfinite`` returns
    ``(values, nonfinite)`` dicts.
    """
    values, bad = _whole(Totals.of_frame(frame, relativistic, c), frame)
    return (values, bad) if with_nonfinite else values


def fused_totals(frame, relativistic: bool = False, c=None) -> tuple[dict, dict]:
    """``(values, nonfinite)`` of :func:`snapshot_totals` by the compiled pass, whatever the size."""
    return _whole(Totals.of_frame(frame, relativistic, c, compiled=True), frame)


def numpy_totals(frame, relativistic: bool = False, c=None) -> tuple[dict, dict]:
    """``(values, nonfinite)`` of :func:`snapshot_totals`, one numpy reduction per total."""
    return _whole(Totals.of_frame(frame, relativistic, c, compiled=False), frame)


#: rows the compiled reader takes from each file at a time: a few such buffers stay in a core's
#: cache between the read and the sums
FILE_ROWS = 1 << 14

_file_buffers = threading.local()


def _file_buffer(key: str, dtype) -> np.ndarray:
    """This thread's read buffer of the compiled file reader for a column, reused from call to call."""
    held = getattr(_file_buffers, "arrays", None)
    if held is None:
        held = _file_buffers.arrays = {}
    k = (key, np.dtype(dtype).str)
    buf = held.get(k)
    if buf is None or buf.shape[0] != FILE_ROWS:
        buf = held[k] = np.empty(FILE_ROWS, dtype=dtype)
    return buf


def _scale_for(quantity: str, ref_row: dict, run_max: float) -> tuple[float, str | None]:
    """The scale a change is judged against, and why, when it is not |reference|."""
    ref = ref_row.get("value", np.nan)
    if quantity in MOMENTUM_QUANTITIES:
        s = ref_row.get("abs_momentum", np.nan)
        if s and np.isfinite(s) and s > 0:
            return float(s), None
        return run_max, ("no momentum at the first snapshot: no relative drift; a change is "
                         "judged against the largest momentum total of the run")
    if ref and np.isfinite(ref) and ref != 0:
        return abs(float(ref)), None
    if quantity == "charge":
        s = ref_row.get("abs_charge", np.nan)
        if s and np.isfinite(s) and s > 0:
            return float(s), ("net charge is zero at the first snapshot: no relative drift; a "
                              "change is judged against Σ|w q|")
    return run_max, ("zero at the first snapshot: no relative drift; a change is judged against "
                     "its largest value in the run")


def drift_table(rows) -> pd.DataFrame:
    """Drift of each (species, quantity) against its first snapshot.

    ``rows`` are dicts with ``snapshot, step, time, species, quantity, value``
    and optionally ``nonfinite`` and the scale totals ``abs_momentum`` /
    ``abs_charge`` of the same species and snapshot. ``relative_drift`` is
    (value − reference)/|reference|, for momentum components divided by the
    reference Σ|momentum| instead; a zero reference gives NaN and a note.
    Extra columns: ``nonfinite`` (values left out), ``scale`` (what
    :func:`first_violation` judges the change against) and ``note``.
    """
    rows = list(rows)
    extra = ["nonfinite", "scale", "reference_snapshot", "note"]
    if not rows:
        return pd.DataFrame(columns=DRIFT_COLUMNS + extra)
    # plain lists and arrays: a few hundred rows in many small groups, where pandas would dominate
    snaps = np.array([r["snapshot"] for r in rows])
    if snaps.size > 1 and np.any(np.diff(snaps) < 0):
        # keep the callers' row order within a snapshot (species, then quantities as given)
        order = np.argsort(snaps, kind="stable")
        rows = [rows[i] for i in order]
        snaps = snaps[order]
    n = len(rows)
    nan = np.nan
    all_vals = np.array([r["value"] for r in rows], dtype=np.float64)
    abs_m = np.array([r.get("abs_momentum", nan) for r in rows], dtype=np.float64)
    abs_q = np.array([r.get("abs_charge", nan) for r in rows], dtype=np.float64)
    nonfinite = np.array([r.get("nonfinite", 0) or 0 for r in rows], dtype=np.int64)
    species_col = [r["species"] for r in rows]
    quantity_col = [r["quantity"] for r in rows]
    ref = np.full(n, np.nan)
    rel = np.full(n, np.nan)
    scale = np.full(n, np.nan)
    ref_snap = np.zeros(n, dtype=np.int64)
    note = [""] * n
    groups: dict = {}
    for i, key in enumerate(zip(species_col, quantity_col)):
        groups.setdefault(key, []).append(i)
    for (species, quantity), members in groups.items():
        idx = np.asarray(members)
        i0 = members[0]
        first = {"value": all_vals[i0], "abs_momentum": abs_m[i0], "abs_charge": abs_q[i0],
                 "snapshot": snaps[i0]}
        r = float(first["value"])
        vals = all_vals[idx]
        finite = np.isfinite(vals)
        run_max = float(np.max(np.abs(vals[finite]))) if finite.any() else np.nan
        sc, why = _scale_for(quantity, first, run_max)
        denom = first.get("abs_momentum", np.nan) if quantity in MOMENTUM_QUANTITIES else abs(r)
        if not (denom and np.isfinite(denom) and denom > 0):
            denom = np.nan
            why = why or "zero at the first snapshot: no relative drift"
        with np.errstate(invalid="ignore", divide="ignore"):
            rel[idx] = (vals - r) / denom
        ref[idx] = r
        scale[idx] = sc if (sc and np.isfinite(sc) and sc > 0) else np.nan
        ref_snap[idx] = int(first["snapshot"])
        if why:
            text = f"{quantity} of species {species}: {why}"
            for i in members:
                note[i] = text
    return pd.DataFrame({
        "snapshot": snaps, "step": [r["step"] for r in rows], "time": [r["time"] for r in rows],
        "species": species_col, "quantity": quantity_col, "value": all_vals, "reference": ref,
        "relative_drift": rel, "nonfinite": nonfinite, "scale": scale, "reference_snapshot": ref_snap,
        "note": note})


def violations(drift_df: pd.DataFrame, rtol: float) -> pd.Series:
    """True where a row leaves the band: |value − reference| > rtol × scale, or non-finite."""
    if not (rtol > 0):
        raise ValueError("rtol must be positive")
    change = (drift_df["value"] - drift_df["reference"]).abs().to_numpy(dtype=np.float64)
    scale = drift_df["scale"].to_numpy(dtype=np.float64)
    with np.errstate(invalid="ignore"):
        out = change > rtol * scale
        # a zero scale means the quantity was zero all run long: any change is a change
        out |= (~np.isfinite(scale)) & (change > 0)
    bad = ~np.isfinite(drift_df["value"].to_numpy(dtype=np.float64))
    if "nonfinite" in drift_df:
        bad |= drift_df["nonfinite"].to_numpy() > 0
    return pd.Series(out | bad, index=drift_df.index)


def first_violation(drift_df: pd.DataFrame, rtol: float):
    """The earliest row (lowest snapshot, then table order) outside the band, or None."""
    if drift_df.empty:
        return None
    mask = violations(drift_df, rtol)
    if not mask.any():
        return None
    hit = drift_df[mask].sort_values("snapshot", kind="stable")
    return hit.iloc[0]
