"""Conserved totals of a snapshot and their drift against the first snapshot.

Totals are weighted: a macro-particle of weight w stands for w physical
particles, so charge is Σ w q, momentum Σ w m v (relativistic Σ w γ m v; from γv
columns Σ w m u, from momenta Σ w p) and
kinetic energy Σ w ½ m v² (relativistic Σ w (γ−1) m c²). Non-finite particle
values are left out of a total and counted, never propagated silently.
"""

from __future__ import annotations

import math
import os
import threading
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pandas as pd

from ..core import interrupt
from ..core.errors import InputError
from . import _kernels

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


def _frame_mass(frame):
    return frame.per_particle("mass", None)


def _totals_inputs(frame):
    """What the totals read: weight, charge, mass, momentum kind, (axis, column name) pairs."""
    w = frame.per_particle("weight", 1.0)
    q = frame.per_particle("charge", None)
    kind = frame.momentum_kind()
    m = _frame_mass(frame)
    axes = []
    if kind and (kind == "p" or m is not None):
        roles = {"v": ("vx", "vy", "vz"), "u": ("ux", "uy", "uz"), "p": ("px", "py", "pz")}[kind]
        axes = [(axis, frame.column_for(r)) for axis, r in zip("xyz", roles)
                if frame.column_for(r) is not None]
    return w, q, m, kind, axes


def snapshot_totals(frame, relativistic: bool = False, c=None, with_nonfinite: bool = False):
    """Totals of one frame: count, weight, charge, momentum_x/y/z, kinetic_energy, scales.

    Quantities that cannot be formed (no charge, no mass, no momentum column)
    are absent. ``abs_momentum`` is Σ |w m v| (the momentum scale) and
    ``abs_charge`` Σ |w q| (the charge scale when the net charge is zero).
    With ``with_nonfinite`` returns ``(values, nonfinite)`` dicts.

    Large frames are reduced by one compiled pass (:func:`fused_totals`);
    small ones, or without numba, by numpy (:func:`numpy_totals`). The two
    agree to rounding: both sum float64 terms formed the same way.
    """
    n = len(frame)
    if _kernels.available and n >= _kernels.TOTALS_MIN_SIZE:
        values, bad = fused_totals(frame, relativistic, c)
    else:
        values, bad = numpy_totals(frame, relativistic, c)
    return (values, bad) if with_nonfinite else values


def snapshot_totals_many(frames, relativistic: bool = False, c=None) -> list[tuple[dict, dict]]:
    """``snapshot_totals(frame, ..., with_nonfinite=True)`` of each frame; the large ones together
    (:func:`fused_totals_many`), so that their reading and reducing overlap."""
    out: list = [None] * len(frames)
    big = [i for i, f in enumerate(frames) if _kernels.available and len(f) >= _kernels.TOTALS_MIN_SIZE]
    for i, got in zip(big, fused_totals_many([frames[i] for i in big], relativistic, c)):
        out[i] = got
    for i, f in enumerate(frames):
        if out[i] is None:
            out[i] = numpy_totals(f, relativistic, c)
    return out


def _source(frame, role: str, default):
    """(column name, None) when a column plays ``role``, else (None, attribute or default); reads nothing."""
    name = frame.column_for(role)
    if name is not None:
        return name, None
    if role in frame.attrs and frame.attrs[role] is not None:
        return None, float(frame.attrs[role])
    return None, default


def fused_totals(frame, relativistic: bool = False, c=None) -> tuple[dict, dict]:
    """``(values, nonfinite)`` of :func:`snapshot_totals` in one compiled pass over the columns."""
    return fused_totals_many([frame], relativistic, c)[0]


def fused_totals_many(frames, relativistic: bool = False, c=None) -> list[tuple[dict, dict]]:
    """:func:`fused_totals` of several frames, their pieces sharing the threads.

    The pieces of every frame go to the threads as one queue, so reading and
    reducing one frame's last pieces overlaps the next frame's first ones (no
    wait between frames). Each frame's piece sums join in row order whoever
    computed them: the same totals, bit for bit, as one frame at a time, with
    one thread or several.
    """
    plans = [_TotalsPlan(f, relativistic, c) for f in frames]
    parts: list[list] = [[None] * len(p.bounds) for p in plans]
    queued = []
    for i, p in enumerate(plans):
        if not p.parallel:      # a loader may look its storage up on its first read
            parts[i][0] = p.pieces([0])[0]
        queued += [(i, k) for k in range(len(p.bounds)) if parts[i][k] is None]
    pooled = [(i, k) for i, k in queued if plans[i].parallel]
    serial = [(i, k) for i, k in queued if not plans[i].parallel]
    workers = _piece_workers()
    if len(pooled) > 1 and workers > 1:
        # a few tasks per thread, each a run of one frame's pieces (one compiled call reads them)
        size = max(1, len(pooled) // (TASKS_PER_WORKER * workers))
        tasks, run = [], []
        for ik in pooled:
            if run and (ik[0] != run[0][0] or len(run) == size):
                tasks.append(run)
                run = []
            run.append(ik)
        tasks.append(run)
        done = _piece_pool().map(lambda t: _checked_pieces(plans[t[0][0]], [k for _, k in t]), tasks)
        for task, got in zip(tasks, done):
            for (i, k), sums in zip(task, got):
                parts[i][k] = sums
    else:
        serial = pooled + serial
    for i, k in serial:
        parts[i][k] = _checked_pieces(plans[i], [k])[0]
    return [p.finish(got) for p, got in zip(plans, parts)]


def _checked_pieces(plan, ks):
    interrupt.check()       # Ctrl-C: the pool drains in one task's time
    return plan.pieces(ks)


#: tasks per thread when several frames' pieces are shared out: enough to even out the load
TASKS_PER_WORKER = 4


def totals_read_in_pieces(frame) -> bool:
    """Whether the totals of ``frame`` keep no full column in memory: its columns are streamed in
    pieces, are in memory already, or are short (a pass may then reduce several frames at once)."""
    plan = _TotalsPlan(frame, False, None)
    if plan.read.streamed or len(frame) <= CHUNK_ROWS:
        return True
    cache = getattr(frame, "_cache", {})
    return all(nm in cache for nm in plan.names)


class _TotalsPlan:
    """What the compiled totals of one frame read, in which pieces, and how they are put together."""

    def __init__(self, frame, relativistic: bool, c):
        self.frame = frame
        self.relativistic = relativistic
        self.sources = {"weight": _source(frame, "weight", 1.0), "charge": _source(frame, "charge", None),
                        "mass": _source(frame, "mass", None)}
        kind = self.kind = frame.momentum_kind()
        self.has_q = self.sources["charge"] != (None, None)
        self.has_m = self.sources["mass"] != (None, None)
        axes = []
        if kind and (kind == "p" or self.has_m):
            roles = {"v": ("vx", "vy", "vz"), "u": ("ux", "uy", "uz"), "p": ("px", "py", "pz")}[kind]
            axes = [(axis, frame.column_for(r)) for axis, r in zip("xyz", roles)
                    if frame.column_for(r) is not None]
        self.axes = axes
        self.cc = _speed_of_light(c) if relativistic and self.has_m and axes else 1.0
        names = [nm for nm, _ in self.sources.values()] + [nm for _, nm in axes]
        self.names = [nm for nm in dict.fromkeys(names) if nm is not None]
        self.bounds, self.read, parallel = _row_pieces(frame, self.names)
        self._parallel = parallel
        self._files = None        # checked at the first piece (a hold may start after planning)

    def _file_sources(self):
        """What the compiled reader needs, when every column comes straight from a held file."""
        if self._files is None:
            self._files = False
            if _kernels.can_read_files and self.read.streamed:
                raw = {nm: self.frame.loader(nm).file_extent() for nm in self.names}
                if all(r is not None for r in raw.values()):
                    comps = [raw[nm] for _, nm in self.axes]
                    if len({np.dtype(dt) for _, _, dt in comps}) <= 1:
                        src = {r: (raw[nm] if nm is not None else v) for r, (nm, v) in self.sources.items()}
                        src["components"] = comps
                        self._files = src
        return self._files

    @property
    def parallel(self) -> bool:
        return len(self.bounds) > 1 and bool(self._parallel)

    def pieces(self, ks) -> list:
        """The sums of pieces ``ks`` (one compiled call when the columns come from held files)."""
        files = self._file_sources()
        if files:
            got = _kernels.file_piece_sums([self.bounds[k] for k in ks], files, self.kind or "v",
                                           self.relativistic, self.cc, self.has_m,
                                           lambda key, dt: _buffer("file " + key, dt, FILE_ROWS, FILE_ROWS))
            if got is not None:
                return got
            # a file gave fewer bytes than its metadata said: the usual reads say why
        return [self.piece(k) for k in ks]

    def piece(self, k: int):
        start, stop = self.bounds[k]
        cols = self.read(start, stop)
        got = {r: (cols[nm] if nm is not None else v) for r, (nm, v) in self.sources.items()}
        return _kernels.snapshot_sums(stop - start, got["weight"], got["charge"], got["mass"],
                                      [cols[nm] for _, nm in self.axes], self.kind or "v",
                                      self.relativistic, self.cc, want_ke=self.has_m)

    def finish(self, parts) -> tuple[dict, dict]:
        sums = parts[0]
        for part in parts[1:]:
            sums.add(part)
        if self.read.streamed:
            self.frame.reads += len(self.names)
        total, nbad = sums.result()
        slot = {name: k for k, name in enumerate(_kernels.TOTAL_SLOTS)}
        values: dict[str, float] = {"count": float(len(self.frame))}
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


#: rows reduced at a time (see :func:`_row_pieces`): the pieces stay in cache for the
#: compiled pass, and pieces can be reduced on several cores at once
CHUNK_ROWS = 1 << 18

_pool_lock = threading.Lock()
_pools: dict = {}


def _piece_workers() -> int:
    try:
        return max(1, min(4, len(os.sched_getaffinity(0))))
    except (AttributeError, OSError):
        return max(1, min(4, os.cpu_count() or 1))


def _piece_pool() -> ThreadPoolExecutor:
    """Threads that reduce the pieces of one frame (the compiled pass releases the GIL)."""
    with _pool_lock:
        pid = os.getpid()
        pool = _pools.get(pid)
        if pool is None:           # a forked worker does not inherit its parent's threads
            pool = _pools[pid] = ThreadPoolExecutor(_piece_workers(), thread_name_prefix="swarmaudit-sum")
        return pool


_buffers = threading.local()


def _buffer(name: str, dtype, n: int, least: int | None = None) -> np.ndarray:
    """This thread's piece buffer for a column: reused from piece to piece (a reduction keeps
    no piece), so streaming a run allocates, and faults in, its buffers once."""
    held = getattr(_buffers, "arrays", None)
    if held is None:
        held = _buffers.arrays = {}
    key = (name, np.dtype(dtype).str)
    buf = held.get(key)
    if buf is None or buf.shape[0] < n:
        buf = held[key] = np.empty(max(n, CHUNK_ROWS if least is None else least), dtype=dtype)
    return buf[:n]


#: rows the compiled reader takes from each file at a time: a few such buffers stay in a core's
#: cache between the read and the sums
FILE_ROWS = 1 << 14


def _row_pieces(frame, names):
    """``(bounds, read, parallel)``: row ranges of the frame, ``read(start, stop) -> {name: rows}``.

    * the columns all in memory: slices of them, reduced in parallel;
    * none in memory and every loader reads row ranges: the pieces are read
      from the files (``read.streamed``), so no full-length column is allocated
      (or kept) for a total; in parallel when every loader reads straight from
      its file (``Column.direct()``: no shared handle, other threads run meanwhile);
    * otherwise, or for a small frame: the whole columns, one piece.
    """
    n = len(frame)
    cache = getattr(frame, "_cache", {})
    whole = [(0, n)]

    def columns(start, stop):
        return {nm: frame[nm] for nm in names}
    columns.streamed = False
    if n <= CHUNK_ROWS or not names:
        return whole, columns, False
    bounds = [(start, min(start + CHUNK_ROWS, n)) for start in range(0, n, CHUNK_ROWS)]
    if all(nm in cache for nm in names):
        def sliced(start, stop):
            return {nm: cache[nm][start:stop] for nm in names}
        sliced.streamed = False
        return bounds, sliced, True
    if any(nm in cache for nm in names):
        return whole, columns, False
    loaders = {nm: frame.loader(nm) for nm in names}
    if not all(ld.can_read_rows for ld in loaders.values()):
        return whole, columns, False

    def streamed(start, stop):
        cols = {}
        for nm, ld in loaders.items():
            if ld.dtype is not None:
                arr = ld.rows_into(start, stop, _buffer(nm, ld.dtype, stop - start))
            else:
                arr = np.asarray(ld.rows(start, stop))
            if arr.shape != (stop - start,):
                raise InputError(frame.source, f"column '{nm}' of species '{frame.species}' "
                                 f"gave {arr.shape[0] if arr.ndim else 0} rows for the range "
                                 f"{start}..{stop}")
            cols[nm] = arr
        return cols
    streamed.streamed = True

    class _Direct:
        # asked after the first piece: a loader may only know then whether it reads directly
        def __bool__(self):
            return all(ld.direct() for ld in loaders.values())
    return bounds, streamed, _Direct()


def numpy_totals(frame, relativistic: bool = False, c=None) -> tuple[dict, dict]:
    """``(values, nonfinite)`` of :func:`snapshot_totals`, one numpy reduction per total."""
    values: dict[str, float] = {}
    bad: dict[str, int] = {}

    def put(name, arr_or_value):
        v, b = finite_sum(arr_or_value)
        values[name] = v
        bad[name] = b

    n = len(frame)
    values["count"] = float(n)
    bad["count"] = 0
    w, q, m, kind, axes = _totals_inputs(frame)
    w_arr = np.asarray(w, dtype=np.float64)
    put("weight", w_arr if w_arr.ndim else np.full(n, float(w_arr)) if n else np.zeros(0))
    if q is not None:
        wq = w_arr * np.asarray(q, dtype=np.float64)
        if wq.ndim == 0:
            wq = np.full(n, float(wq))
        put("charge", wq)
        put("abs_charge", np.abs(wq))
    if axes:
        comps = [np.asarray(frame[nm], dtype=np.float64) for _, nm in axes]
        factor = w_arr if kind == "p" else w_arr * np.asarray(m, dtype=np.float64)
        if relativistic and kind == "v":
            factor = factor * lorentz_factor_of_velocity(comps, c)
        mag2 = None
        for (axis, _), comp in zip(axes, comps):
            p = factor * comp
            if p.ndim == 0:
                p = np.full(n, float(p))
            put(f"momentum_{axis}", p)
            mag2 = p * p if mag2 is None else mag2 + p * p
        put("abs_momentum", np.sqrt(mag2))
        if m is not None:
            terms = kinetic_energy_terms(m, w_arr, comps, kind, relativistic, c)
            if terms.ndim == 0:
                terms = np.full(n, float(terms))
            put("kinetic_energy", terms)
    return values, bad


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
