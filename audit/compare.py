"""Two runs against each other: the ``compare_*`` tables and the compare gate.

A reference run and a candidate run are paired snapshot by snapshot (by
step, or by time within a tolerance), species by name. For each pair:

* particle by particle, where both carry the same ids
  (:func:`diagnostics.compare.compare_particles`): matched fraction,
  particles in one run only, position differences in level-0 cells of the
  reference's layout, momentum differences, the particles that differ most;
* as distributions (:func:`diagnostics.compare.distribution_distance`):
  weighted KS statistic and p-value and the first Wasserstein distance per
  position and momentum column;
* block by block: both runs counted in the *reference's* blocks (so a
  different decomposition of the candidate does not count as a difference),
  with a chi-square test of homogeneity over the blocks;
* totals: every conserved total of both runs (:func:`audit.tables.drift_details`)
  side by side.

:func:`gate` turns the tables into a verdict.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from ..core.context import AuditContext
from ..core.errors import OptionError
from ..core.frame import transient_columns
from ..core.outputs import COMPARE_TABLE_NAMES
from ..core.roles import POSITION_ROLES
from ..diagnostics import compare as _cmp
from ..diagnostics.migration import DuplicateKeyError
from ..engine.reduce import reduce
from . import tables as _tables

ALL = _tables.ALL
MODES = ("auto", "particles", "distributions", "both")
PAIR_BY = ("step", "time")

PAIR_COLUMNS = ["ref_snapshot", "cand_snapshot", "ref_step", "cand_step", "ref_time", "cand_time"]
PARTICLE_COLUMNS = PAIR_COLUMNS + ["species", "ref_count", "cand_count", "matched", "only_ref",
                                   "only_cand", "matched_fraction", "max_position_cells",
                                   "rms_position_cells", "max_relative_momentum",
                                   "rms_relative_momentum", "identical", "worst_ids"]
DISTRIBUTION_COLUMNS = PAIR_COLUMNS + ["species", "column", "ref_count", "cand_count", "ks_statistic",
                                       "ks_pvalue", "wasserstein", "ref_mean", "cand_mean"]
CENSUS_COLUMNS = PAIR_COLUMNS + ["species", "block", "level", "rank", "ref_count", "cand_count",
                                 "ref_weight", "cand_weight", "chi2", "chi2_dof", "chi2_pvalue"]
TOTALS_COLUMNS = PAIR_COLUMNS + ["species", "quantity", "ref_value", "cand_value", "difference",
                                 "relative_difference", "ref_drift", "cand_drift"]
WORST_COLUMNS = PAIR_COLUMNS + ["species", "order", "id", "position_cells", "relative_momentum"]

TABLE_NAMES = COMPARE_TABLE_NAMES

#: in ``auto`` mode, below this matched share of the union of both runs' particles the ids are
#: taken to differ, and the species is compared as distributions as well
AUTO_MATCHED_SHARE = 0.5


# pairing ---------------------------------------------------------------------------------
@dataclass
class Pairing:
    """Which snapshot of the candidate goes with which of the reference."""

    pairs: list[tuple[int, int]]
    only_ref: list[int]
    only_cand: list[int]
    by: str
    time_tol: float | None = None


def _steps(ctx: AuditContext) -> list:
    return [ctx.run[i].step for i in range(len(ctx.run))]


def _times(ctx: AuditContext) -> np.ndarray:
    return np.array([np.nan if ctx.run[i].time is None else float(ctx.run[i].time)
                     for i in range(len(ctx.run))])


def pair_snapshots(ref: AuditContext, cand: AuditContext, by: str = "step",
                   time_tol: float | None = None) -> Pairing:
    """Pair snapshots by equal ``step``, or by ``time`` within ``time_tol`` (nearest first).

    The default time tolerance is a millionth of the reference's largest
    |time| (or 1e-12 when every time is zero).
    """
    if by not in PAIR_BY:
        raise OptionError(f"--pair takes one of {', '.join(PAIR_BY)}, got '{by}'")
    nr, nc = len(ref.run), len(cand.run)
    if by == "step":
        sr, sc = _steps(ref), _steps(cand)
        for ctx, steps in ((ref, sr), (cand, sc)):
            missing = [i for i, s in enumerate(steps) if s is None]
            if missing:
                raise OptionError(f"snapshot {missing[0]} ({ctx.run.refs[missing[0]].label}) of "
                                  f"{ctx.run.source} stores no step: pair by time with --pair time")
        where = {}
        for j, s in enumerate(sc):
            where.setdefault(int(s), j)
        pairs = [(i, where[int(s)]) for i, s in enumerate(sr) if int(s) in where]
        tol = None
    else:
        tr, tc = _times(ref), _times(cand)
        for ctx, t in ((ref, tr), (cand, tc)):
            bad = np.flatnonzero(~np.isfinite(t))
            if bad.size:
                i = int(bad[0])
                raise OptionError(f"snapshot {i} ({ctx.run.refs[i].label}) of {ctx.run.source} stores "
                                  "no time: pair by step with --pair step")
        if time_tol is None:
            big = float(np.max(np.abs(tr))) if tr.size else 0.0
            tol = 1e-6 * big if big > 0 else 1e-12
        else:
            tol = _check_tolerance(time_tol, "--time-tol", low_ok=True)
        # all candidate pairs within the tolerance, closest first, each snapshot used once
        near = [(abs(tr[i] - tc[j]), i, j) for i in range(nr) for j in
                np.flatnonzero(np.abs(tc - tr[i]) <= tol).tolist()]
        used_r, used_c, pairs = set(), set(), []
        for _, i, j in sorted(near):
            if i not in used_r and j not in used_c:
                used_r.add(i)
                used_c.add(j)
                pairs.append((i, j))
        pairs.sort()
    got_r = {i for i, _ in pairs}
    got_c = {j for _, j in pairs}
    return Pairing(pairs, [i for i in range(nr) if i not in got_r], [j for j in range(nc) if j not in got_c],
                   by, tol)


# the candidate counted in the reference's blocks -------------------------------------------
class _OnReferenceLayout(AuditContext):
    """The candidate run, with the layout of the paired reference snapshot at each snapshot."""

    def layout(self, i: int):
        lay = self.__dict__.get("_paired_layouts", {}).get(i)
        return lay if lay is not None else super().layout(i)


def _on_reference_layout(ref: AuditContext, cand: AuditContext, pairing: Pairing) -> AuditContext:
    ctx = _OnReferenceLayout(cand.run, cand.fixed_layout, species=cand.species, engine=cand.engine,
                             scheduler=cand.scheduler, use_cache=cand.use_cache,
                             relativistic=cand.relativistic, c=cand.c)
    ctx.__dict__["_paired_layouts"] = {j: ref.layout(i) for i, j in pairing.pairs}
    return ctx


# the comparison ------------------------------------------------------------------------------
@dataclass
class Comparison:
    """Every table of a comparison, plus what could not be compared and why."""

    pairing: Pairing
    mode: str
    particles: pd.DataFrame
    distributions: pd.DataFrame
    census: pd.DataFrame
    totals: pd.DataFrame
    worst: pd.DataFrame
    missing: list[dict] = field(default_factory=list)     # species in one run only, per pair
    notes: list[str] = field(default_factory=list)
    species: list[str] = field(default_factory=list)
    ref_drift: pd.DataFrame | None = None       # each run's whole drift table (every snapshot)
    cand_drift: pd.DataFrame | None = None

    def tables(self) -> dict[str, pd.DataFrame]:
        return dict(zip(TABLE_NAMES, (self.particles, self.distributions, self.census, self.totals,
                                      self.worst)))


def _stamp(ref: AuditContext, cand: AuditContext, i: int, j: int) -> dict:
    return {**_tables.row_stamp(ref, i, "ref_"), **_tables.row_stamp(cand, j, "cand_")}


_finish = _tables.finish_table


def _shared_roles(fa, fb, roles) -> list[tuple[str, str]]:
    """(reference column, candidate column) of each role both frames have."""
    out = []
    for r in roles:
        a, b = fa.column_for(r), fb.column_for(r)
        if a is not None and b is not None:
            out.append((a, b))
    return out


def _particle_row(ctx, note, fa, fb, layout, where: str):
    """PairStats of one species, or None with a note when ids cannot pair the particles."""
    ka, kb = fa.key_columns(), fb.key_columns()
    if not ka or not kb:
        note(f"{where}: species '{fa.species}' has no id column in "
                 f"{'the reference' if not ka else 'the candidate'}; compared as distributions "
                 "(name one with --role id=NAME or --id COLS)")
        return None
    if len(ka) != len(kb):
        note(f"{where}: species '{fa.species}' is keyed by {len(ka)} column(s) in the reference and "
                 f"{len(kb)} in the candidate; compared as distributions")
        return None
    pos = _shared_roles(fa, fb, POSITION_ROLES)
    if fa.momentum_kind() != fb.momentum_kind():
        note(f"{where}: species '{fa.species}' stores {fa.momentum_kind() or 'no'} momentum columns in "
                 f"the reference and {fb.momentum_kind() or 'none'} in the candidate; momenta not compared")
        mom = []
    else:
        mom = _shared_roles(fa, fb, fa.momentum_roles())
    wa, wb = fa.column_for("weight"), fb.column_for("weight")
    use_pos = len(pos) == layout.ndim
    acc = _cmp.ParticleComparison(layout if use_pos else None, (ka, kb),
                                  ([a for a, _ in pos], [b for _, b in pos]) if use_pos else ((), ()),
                                  ([a for a, _ in mom], [b for _, b in mom]),
                                  ((wa,), (wb,)) if wa and wb else ((), ()))
    with transient_columns([fa, fb]):
        try:
            stats = reduce(acc, [fa, fb], ctx)
        except DuplicateKeyError as exc:
            note(f"{where}: species '{fa.species}': {exc}; compared as distributions")
            return None
    if not (wa and wb):
        # a weight that is a species constant (or missing) on a side: equal only when both are
        sa, sb = fa.per_particle("weight", 1.0), fb.per_particle("weight", 1.0)
        if not (np.ndim(sa) == 0 and np.ndim(sb) == 0 and float(sa) == float(sb)):
            stats.identical = False
    return stats


def _distribution_rows(ctx, fa, fb, stamp, species):
    rows = []
    cols = _shared_roles(fa, fb, POSITION_ROLES)
    if fa.momentum_kind() == fb.momentum_kind():
        cols += _shared_roles(fa, fb, fa.momentum_roles())
    if not cols:
        return rows
    acc = _cmp.DistributionComparison(cols, (fa.column_for("weight"), fb.column_for("weight")))
    with transient_columns([fa, fb]):
        found = reduce(acc, [fa, fb], ctx)
    for (a, _), d in zip(cols, found):
        rows.append({**stamp, "species": species, "column": a, "ref_count": d.ref_count,
                     "cand_count": d.cand_count, "ks_statistic": d.ks_statistic,
                     "ks_pvalue": d.ks_pvalue, "wasserstein": d.wasserstein,
                     "ref_mean": d.ref_mean, "cand_mean": d.cand_mean})
    return rows


def compare_runs(ref: AuditContext, cand: AuditContext, *, pair: str = "step", time_tol=None,
                 mode: str = "auto", worst: int = _cmp.WORST, only=None) -> Comparison:
    """Compare the candidate run with the reference run: every ``compare_*`` table.

    ``only``: the (reference, candidate) snapshot pairs to compare, each one the pairing
    makes (the dashboard's Compare tab asks for the pair in view); None: every pair.
    """
    if mode not in MODES:
        raise OptionError(f"--mode takes one of {', '.join(MODES)}, got '{mode}'")
    pairing = pair_snapshots(ref, cand, pair, time_tol)
    if only is not None:
        wanted = [(int(i), int(j)) for i, j in only]
        stray = [p for p in wanted if p not in pairing.pairs]
        if stray:
            i, j = stray[0]
            raise OptionError(f"reference snapshot {i} and candidate snapshot {j} are not paired by "
                              f"{pairing.by}")
        pairing = replace(pairing, pairs=[p for p in pairing.pairs if p in wanted])
    notes: list[str] = []

    def note(text):
        if text not in notes:
            notes.append(text)

    if not pairing.pairs:
        raise OptionError(f"no snapshot of {cand.run.source} pairs with one of {ref.run.source} by "
                          f"{pairing.by}" + (" (try --pair time)" if pairing.by == "step" else
                                             f" within {pairing.time_tol:g} (see --time-tol)"))
    species_ref, species_cand = ref.species_names(), cand.species_names()
    species = species_ref + [s for s in species_cand if s not in species_ref]
    part_rows, dist_rows, worst_rows, missing = [], [], [], []
    for i, j in pairing.pairs:
        sr, sc = ref.run[i], cand.run[j]
        stamp = _stamp(ref, cand, i, j)
        layout = ref.layout(i)
        where = f"reference snapshot {i} / candidate snapshot {j}"
        for s in species:
            fa = sr.species.get(s) if s in species_ref else None
            fb = sc.species.get(s) if s in species_cand else None
            if fa is None or fb is None:
                if fa is not None or fb is not None:
                    missing.append({**stamp, "species": s,
                                    "in": "reference" if fa is not None else "candidate"})
                continue
            stats = None
            if mode in ("auto", "particles", "both"):
                stats = _particle_row(ref, note, fa, fb, layout, where)
            if stats is not None:
                part_rows.append({**stamp, "species": s, "ref_count": len(fa), "cand_count": len(fb),
                                  "matched": stats.pairs, "only_ref": stats.only_ref,
                                  "only_cand": stats.only_cand, "matched_fraction": stats.matched_fraction,
                                  "max_position_cells": stats.position_max,
                                  "rms_position_cells": stats.position_rms,
                                  "max_relative_momentum": stats.momentum_max_relative,
                                  "rms_relative_momentum": stats.momentum_rms_relative,
                                  "identical": bool(stats.identical),
                                  "worst_ids": " ".join(str(k) for k in stats.worst_key)})
                rel = stats.worst_relative_momentum()
                for k, (key, p, m) in enumerate(zip(stats.worst_key, stats.worst_position, rel)):
                    worst_rows.append({**stamp, "species": s, "order": k + 1, "id": str(key),
                                       "position_cells": float(p), "relative_momentum": float(m)})
            want_dist = (mode in ("distributions", "both")
                         or (mode == "auto" and (stats is None
                                                 or stats.matched_fraction < AUTO_MATCHED_SHARE)))
            if want_dist:
                dist_rows.extend(_distribution_rows(ref, fa, fb, stamp, s))
    for m in missing:
        note(f"reference snapshot {m['ref_snapshot']} / candidate snapshot {m['cand_snapshot']}: species "
             f"'{m['species']}' is only in the {m['in']}")
    census = census_comparison(ref, cand, pairing)
    ref_drift, cand_drift = _tables.drift_details(ref), _tables.drift_details(cand)
    totals = totals_comparison(ref, cand, pairing, ref_drift, cand_drift)
    for ctx in (ref, cand):
        for n in ctx.notes:
            note(n)
    return Comparison(pairing, mode, _finish(part_rows, PARTICLE_COLUMNS),
                      _finish(dist_rows, DISTRIBUTION_COLUMNS), census, totals,
                      _finish(worst_rows, WORST_COLUMNS), missing, notes, species, ref_drift, cand_drift)


def census_comparison(ref: AuditContext, cand: AuditContext, pairing: Pairing) -> pd.DataFrame:
    """Both runs' census in the reference's blocks, per pair and species (and ``all``)."""
    on_ref = _on_reference_layout(ref, cand, pairing)
    frames = []
    for i, j in pairing.pairs:
        a = _tables.census_table(ref, [i])
        b = _tables.census_table(on_ref, [j])
        stamp = _stamp(ref, cand, i, j)
        for s in dict.fromkeys(list(a["species"].astype(str)) + list(b["species"].astype(str))):
            ta = a[a["species"].astype(str) == s][["block", "level", "rank", "count", "weight"]]
            tb = b[b["species"].astype(str) == s][["block", "count", "weight"]]
            if ta.empty or tb.empty:
                continue   # a species in one run only: a finding of its own
            m = ta.merge(tb, on="block", how="outer", suffixes=("_ref", "_cand"), sort=False)
            m = m.fillna({"count_ref": 0, "count_cand": 0, "weight_ref": 0.0, "weight_cand": 0.0,
                          "level": -1, "rank": -1})
            chi2, dof, p = _cmp.census_chi2(m["count_ref"].to_numpy(), m["count_cand"].to_numpy())
            frames.append(pd.DataFrame({
                **{k: [v] * len(m) for k, v in stamp.items()}, "species": s,
                "block": m["block"].astype(np.int64), "level": m["level"].astype(np.int64),
                "rank": m["rank"].astype(np.int64), "ref_count": m["count_ref"].astype(np.int64),
                "cand_count": m["count_cand"].astype(np.int64),
                "ref_weight": m["weight_ref"].astype(np.float64),
                "cand_weight": m["weight_cand"].astype(np.float64),
                "chi2": chi2, "chi2_dof": dof, "chi2_pvalue": p}))
    for n in on_ref.notes:
        if n not in cand.notes:
            cand.notes.append(n)
    if not frames:
        return _finish([], CENSUS_COLUMNS)
    df = pd.concat(frames, ignore_index=True)[CENSUS_COLUMNS]
    for c in ("ref_step", "cand_step"):
        df[c] = pd.array(df[c], dtype="Int64")
    return df


def totals_comparison(ref: AuditContext, cand: AuditContext, pairing: Pairing,
                      da: pd.DataFrame, db: pd.DataFrame) -> pd.DataFrame:
    """Every total of both runs at each pair, their difference relative to the reference's scale.

    ``da``, ``db``: the runs' :func:`audit.tables.drift_details` tables (made once by the caller,
    which shows them too).
    """
    key = ["species", "quantity"]
    rows = []
    ga = {k: g for k, g in da.groupby("snapshot")}
    gb = {k: g for k, g in db.groupby("snapshot")}
    for i, j in pairing.pairs:
        a, b = ga.get(i), gb.get(j)
        if a is None or b is None:
            continue
        m = a[key + ["value", "relative_drift", "scale"]].merge(
            b[key + ["value", "relative_drift"]], on=key, suffixes=("_ref", "_cand"))
        stamp = _stamp(ref, cand, i, j)
        diff = m["value_cand"].to_numpy() - m["value_ref"].to_numpy()
        # the band check judges drift in: |value| of the reference (or the scale it uses for a zero or
        # a momentum component)
        scale = m["scale"].to_numpy(dtype=np.float64)
        own = np.abs(m["value_ref"].to_numpy(dtype=np.float64))
        scale = np.where(np.isfinite(scale) & (scale > 0), scale, own)
        with np.errstate(invalid="ignore", divide="ignore"):
            rel = np.where(diff == 0, 0.0, diff / np.where(scale > 0, scale, np.nan))
        for k in range(len(m)):
            rows.append({**stamp, "species": m["species"].iloc[k], "quantity": m["quantity"].iloc[k],
                         "ref_value": float(m["value_ref"].iloc[k]),
                         "cand_value": float(m["value_cand"].iloc[k]),
                         "difference": float(diff[k]), "relative_difference": float(rel[k]),
                         "ref_drift": float(m["relative_drift_ref"].iloc[k]),
                         "cand_drift": float(m["relative_drift_cand"].iloc[k])})
    return _finish(rows, TOTALS_COLUMNS)


# the gate -------------------------------------------------------------------------------------
@dataclass
class GateResult:
    ok: bool
    failures: list[dict] = field(default_factory=list)
    lines: list[str] = field(default_factory=list)
    tolerances: dict = field(default_factory=dict)


def _check_tolerance(value, option: str, low_ok: bool = False, upper=None):
    if value is None:
        return None
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise OptionError(f"{option} takes a number, got '{value}'") from None
    if not math.isfinite(v) or v < 0 or (v == 0 and not low_ok) or (upper is not None and v > upper):
        kind = "number in [0, 1]" if upper else "number of at least 0" if low_ok else "positive number"
        raise OptionError(f"{option} takes a {kind}, got '{value}'")
    return v


def _plain_step(v):
    return None if v is None or pd.isna(v) else int(v)


def _when(row) -> str:
    i, j = int(row["ref_snapshot"]), int(row["cand_snapshot"])
    sr, sc = _plain_step(row.get("ref_step")), _plain_step(row.get("cand_step"))
    at = f" (step {sr})" if sr is not None else ""
    if i == j and sr == sc:
        return f"snapshot {i}{at}"
    return f"reference snapshot {i}{at} / candidate snapshot {j}" + (f" (step {sc})" if sc is not None else "")


def gate(comp: Comparison, position_cells=None, ks_p=None, rtol=None, correction: str = "holm") -> GateResult:
    """Does every paired snapshot agree within the tolerances given?

    * a species in one run only always fails (measure ``species``);
    * ``position_cells``: particles in one run only (``unmatched``) and a largest
      position difference above it (``position``) fail;
    * ``rtol``: a largest relative momentum difference above it (``momentum``), and a
      total (those ``check`` judges) whose relative difference exceeds it (``total``);
    * ``ks_p``: a KS p-value below it (``ks``) and a census chi-square p-value below it
      (``census``), the p-values of all these tests adjusted together by ``correction``
      (:data:`diagnostics.compare.CORRECTIONS`; Holm's by default): at ``--ks-p 0.01`` a
      thousand tests of runs that agree fail by chance once in a hundred comparisons,
      not about ten times in each.
    """
    position_cells = _check_tolerance(position_cells, "--position-cells", low_ok=True)
    rtol = _check_tolerance(rtol, "--rtol", low_ok=True)
    ks_p = _check_tolerance(ks_p, "--ks-p", low_ok=True, upper=1.0)
    found: list[dict] = []

    def fail(row, species, measure, text):
        found.append({"ref_snapshot": int(row["ref_snapshot"]), "cand_snapshot": int(row["cand_snapshot"]),
                      "species": species, "measure": measure, "text": f"{_when(row)}, species {species}: {text}"})

    for m in comp.missing:
        fail(m, m["species"], "species", f"in the {m['in']} only")
    p = comp.particles
    for _, r in p.iterrows():
        s = r["species"]
        if position_cells is not None:
            if r["only_ref"] or r["only_cand"]:
                fail(r, s, "unmatched", f"{int(r['only_ref'])} particle(s) in the reference only and "
                                        f"{int(r['only_cand'])} in the candidate only")
            v = r["max_position_cells"]
            if not (v <= position_cells) and not (pd.isna(v) and r["matched"] == 0):
                fail(r, s, "position", f"largest position difference {v:.4g} level-0 cells "
                                       f"> {position_cells:g} (--position-cells; particle {r['worst_ids'].split(' ')[0] if r['worst_ids'] else '?'})")
        if rtol is not None:
            v = r["max_relative_momentum"]
            if np.isfinite(v) and v > rtol:
                fail(r, s, "momentum", f"largest relative momentum difference {v:.4g} > {rtol:g} (--rtol)")
    if correction not in _cmp.CORRECTIONS:
        raise OptionError(f"--ks-correction takes one of {', '.join(_cmp.CORRECTIONS)}, got '{correction}'")
    if ks_p is not None:
        d = comp.distributions
        c = comp.census.drop_duplicates(["ref_snapshot", "cand_snapshot", "species"])
        c = c[c["species"] != ALL]
        raw = np.concatenate([d["ks_pvalue"].to_numpy(float), c["chi2_pvalue"].to_numpy(float)])
        adj = _cmp.adjust_pvalues(raw, correction)
        tests = int(np.count_nonzero(np.isfinite(raw)))
        how = {"holm": "Holm", "bh": "Benjamini-Hochberg"}.get(correction)

        def p_text(k):
            if how is None:
                return f"p = {raw[k]:.3g}"
            return f"p = {raw[k]:.3g}, {adj[k]:.3g} after {how}'s correction over {tests} tests"

        for k, (_, r) in enumerate(d.iterrows()):
            if np.isfinite(adj[k]) and adj[k] < ks_p:
                fail(r, r["species"], f"ks:{r['column']}",
                     f"KS test of {r['column']}: {p_text(k)} < {ks_p:g} (--ks-p; "
                     f"statistic {r['ks_statistic']:.4g})")
        for k, (_, r) in enumerate(c.iterrows(), start=len(d)):
            if np.isfinite(adj[k]) and adj[k] < ks_p:
                fail(r, r["species"], "census",
                     f"block census differs: chi-square {r['chi2']:.4g} on {int(r['chi2_dof'])} degrees of "
                     f"freedom, {p_text(k)} < {ks_p:g} (--ks-p)")
    if rtol is not None and len(comp.totals):
        t = comp.totals
        judged = set(_tables.checked_pairs(t.rename(columns={"ref_value": "value"})))
        for _, r in t.iterrows():
            if (r["species"], r["quantity"]) not in judged:
                continue
            v = r["relative_difference"]
            if not (abs(v) <= rtol):
                fail(r, r["species"], f"total:{r['quantity']}",
                     f"{r['quantity']} differs by {v:+.3g} (relative) > {rtol:g} (--rtol): "
                     f"{r['cand_value']:.9g} against {r['ref_value']:.9g}")
    order = {"species": 0, "unmatched": 1, "position": 2, "momentum": 3, "census": 5}
    species_order = {s: k for k, s in enumerate(comp.species + [ALL])}
    found.sort(key=lambda f: (f["ref_snapshot"], species_order.get(f["species"], 99),
                              order.get(f["measure"], 4 if f["measure"].startswith("ks:") else 6)))
    tol = {"position_cells": position_cells, "ks_p": ks_p, "rtol": rtol}
    lines = []
    pr = comp.pairing
    if found:
        f = found[0]
        lines.append(f"FAIL: {f['text']} [measure: {f['measure']}]")
        if len(found) > 1:
            lines.append(f"{len(found) - 1} more finding(s); see the compare_*.csv tables")
    else:
        given = [f"{k.replace('_', '-')} {v:g}" + (f" ({correction} correction)" if k == "ks_p" else "")
                 for k, v in tol.items() if v is not None]
        what = ", ".join(given) if given else "no tolerance given: only species are gated"
        ident = bool(len(p)) and bool(p["identical"].all()) and not comp.missing
        lines.append(f"ok: {len(pr.pairs)} paired snapshot(s) agree ({what})"
                     + ("; the paired snapshots are identical particle for particle" if ident else ""))
    return GateResult(not found, found, lines, tol)


def summary_lines(comp: Comparison) -> list[str]:
    """What a person reads first: pairing, particle and distribution headlines."""
    pr = comp.pairing
    out = [f"paired {len(pr.pairs)} snapshot(s) by {pr.by}"
           + (f" (within {pr.time_tol:g})" if pr.by == "time" else "")]
    if pr.only_ref:
        out.append(f"reference snapshots without a partner: {_list(pr.only_ref)}")
    if pr.only_cand:
        out.append(f"candidate snapshots without a partner: {_list(pr.only_cand)}")
    return out + finding_lines(comp)


def finding_lines(comp: Comparison) -> list[str]:
    """The particle and distribution headlines, one line per species and kind."""
    out = []
    p = comp.particles
    if len(p):
        for s, g in p.groupby("species", sort=False):
            if g["identical"].all():
                out.append(f"{s}: identical in all {len(g)} paired snapshot(s) "
                           f"({int(g['matched'].iloc[0]):,} particles)")
                continue
            k = int(np.nanargmax(g["max_position_cells"].fillna(-1).to_numpy()))
            w = g.iloc[k]
            frac = g["matched_fraction"].min()
            matched = "every particle matched" if frac == 1 else f"matched fraction {frac:.4g} at worst"
            out.append(f"{s}: {matched}; largest "
                       f"position difference {w['max_position_cells']:.3g} cells at reference snapshot "
                       f"{int(w['ref_snapshot'])} (particle {w['worst_ids'].split(' ')[0] if w['worst_ids'] else '?'}), "
                       f"largest relative momentum difference {g['max_relative_momentum'].max():.3g}")
    d = comp.distributions
    if len(d):
        for s, g in d.groupby("species", sort=False):
            k = int(np.nanargmin(g["ks_pvalue"].fillna(2).to_numpy()))
            w = g.iloc[k]
            out.append(f"{s}: smallest KS p-value {w['ks_pvalue']:.3g} ({w['column']}, reference snapshot "
                       f"{int(w['ref_snapshot'])}, statistic {w['ks_statistic']:.3g}); largest Wasserstein "
                       f"distance {g['wasserstein'].max():.3g}")
    return out


def _list(items, limit: int = 12) -> str:
    shown = ", ".join(str(i) for i in items[:limit])
    return shown + (f" … ({len(items)} in all)" if len(items) > limit else "")
