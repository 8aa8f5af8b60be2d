"""Two runs against each other: particle by particle, as distributions, block by block.

Pure numerics on arrays; the run-level tables and the gate are in
:mod:`audit.compare`.

* Particle by particle: particles are matched by id with
  :func:`diagnostics.migration.match_keys` (the matcher migration uses), and
  each matched pair gives a position difference in level-0 cells (Chebyshev
  norm, minimum image on periodic axes: :func:`migration.matched_displacement`)
  and a momentum difference ``|Δu|`` (Euclidean over the velocity, γv or
  momentum components). :class:`PairStats` is the mergeable summary of a set of
  pairs, so pieces of a snapshot can be summarised apart and joined.
* As distributions: the weighted two-sample Kolmogorov–Smirnov statistic, its
  asymptotic p-value with Kish's effective sample sizes, and the first
  Wasserstein distance, all from one sort of the two samples together.
* Block by block: a chi-square test of homogeneity of the two runs' particle
  counts over the blocks of one layout.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..core.layout import BlockLayout
from . import _kernels
from .accumulate import KeepRows
from .migration import DuplicateKeyError, key_plan, match_keys, matched_displacement

#: particles named as differing most, per species and snapshot
WORST = 10


# distributions --------------------------------------------------------------------------
def effective_size(weights, n: int | None = None) -> float:
    """Kish's effective sample size ``(Σw)² / Σw²`` (``n`` itself without weights)."""
    if weights is None or np.ndim(weights) == 0:
        return float(n if n is not None else 0)
    w = np.asarray(weights, dtype=np.float64)
    s2 = float(np.dot(w, w))
    return float(w.sum()) ** 2 / s2 if s2 > 0 else 0.0


def ks_pvalue(statistic: float, n_ref: float, n_cand: float) -> float:
    """Two-sided p-value of a two-sample KS statistic for samples of (effective) sizes n_ref, n_cand.

    Smirnov's large-sample form as scipy.stats.ks_2samp computes it with
    ``method="asymp"``: the one-sample Kolmogorov distribution at the
    harmonic size ``n_ref n_cand / (n_ref + n_cand)``, rounded.
    """
    from scipy.stats import kstwo
    if not (n_ref > 0 and n_cand > 0) or not np.isfinite(statistic):
        return float("nan")
    en = max(1.0, round(n_ref * n_cand / (n_ref + n_cand)))
    return float(np.clip(kstwo.sf(statistic, en), 0.0, 1.0))


@dataclass
class DistributionDistance:
    """How far apart two samples of one column are."""

    ks_statistic: float        # sup |F_ref - F_cand| of the weighted empirical CDFs
    ks_pvalue: float
    wasserstein: float         # ∫ |F_ref - F_cand| dx, in the column's units
    ref_count: int             # finite values used
    cand_count: int
    ref_effective: float       # Kish effective sizes the p-value uses
    cand_effective: float
    ref_mean: float
    cand_mean: float
    nonfinite: int = 0         # values left out on either side


def _finite(values, weights):
    v = np.asarray(values)
    if v.dtype.kind != "f":
        v = v.astype(np.float64)
    w = None if weights is None or np.ndim(weights) == 0 else np.asarray(weights, dtype=np.float64)
    ok = np.isfinite(v)
    if w is not None:
        ok &= np.isfinite(w) & (w >= 0)
    if ok.all():
        return v, w, 0
    return v[ok], (w[ok] if w is not None else None), int(ok.size - np.count_nonzero(ok))


def distribution_distance(ref, cand, ref_weights=None, cand_weights=None) -> DistributionDistance:
    """Weighted two-sample KS statistic, its p-value and the first Wasserstein distance.

    ``*_weights`` are per-value weights (None or a scalar: equal weights). Both
    empirical CDFs are step functions that jump by ``w_i / Σw`` at each value;
    non-finite values (and negative or non-finite weights) are left out.
    """
    a, wa, bad_a = _finite(ref, ref_weights)
    b, wb, bad_b = _finite(cand, cand_weights)
    na, nb = a.size, b.size
    neff_a, neff_b = effective_size(wa, na), effective_size(wb, nb)
    sa = float(wa.sum()) if wa is not None else float(na)
    sb = float(wb.sum()) if wb is not None else float(nb)
    mean_a = float(np.dot(a, wa) / sa if wa is not None else a.mean()) if na and sa > 0 else math.nan
    mean_b = float(np.dot(b, wb) / sb if wb is not None else b.mean()) if nb and sb > 0 else math.nan
    if not (na and nb and sa > 0 and sb > 0):
        return DistributionDistance(math.nan, math.nan, math.nan, na, nb, neff_a, neff_b, mean_a, mean_b,
                                    bad_a + bad_b)
    dt = np.result_type(a.dtype, b.dtype, np.float32)
    values = np.concatenate([a.astype(dt, copy=False), b.astype(dt, copy=False)])
    order = np.argsort(values, kind="stable")
    values = values[order]
    # each value moves F_ref - F_cand by its own share: up for the reference, down for the candidate
    step = np.empty(na + nb)
    step[:na] = (wa / sa) if wa is not None else 1.0 / na
    step[na:] = -(wb / sb) if wb is not None else -1.0 / nb
    diff = np.cumsum(step[order])
    # the CDFs are right-continuous: between tied values only the last partial sum is a CDF value
    last = np.empty(values.size, dtype=bool)
    np.not_equal(values[1:], values[:-1], out=last[:-1])
    last[-1] = True
    d = float(np.max(np.abs(diff[last])))
    d = min(d, 1.0)
    widths = np.diff(values.astype(np.float64))
    w1 = float(np.dot(np.abs(diff[:-1]), widths))
    return DistributionDistance(d, ks_pvalue(d, neff_a, neff_b), w1, na, nb, neff_a, neff_b,
                                mean_a, mean_b, bad_a + bad_b)


# census --------------------------------------------------------------------------------
def census_chi2(ref_counts, cand_counts) -> tuple[float, int, float]:
    """(chi-square, degrees of freedom, p-value) of two runs' counts over the same blocks.

    A test of homogeneity of the 2 × B table (both rows are samples; neither
    is an expectation): the expected count of block b in a run is the run's
    total times block b's share of both runs together. Blocks empty in both
    runs carry no information and are left out; with fewer than two blocks
    left the test is undefined (NaN).
    """
    r = np.asarray(ref_counts, dtype=np.float64)
    c = np.asarray(cand_counts, dtype=np.float64)
    if r.shape != c.shape:
        raise ValueError("both runs' counts must cover the same blocks")
    keep = (r + c) > 0
    r, c = r[keep], c[keep]
    nr, nc = r.sum(), c.sum()
    if r.size < 2 or nr <= 0 or nc <= 0:
        return math.nan, 0, math.nan
    col = r + c
    total = nr + nc
    er, ec = col * (nr / total), col * (nc / total)
    chi2 = float(np.sum((r - er) ** 2 / er) + np.sum((c - ec) ** 2 / ec))
    dof = int(r.size - 1)
    from scipy.stats import chi2 as _chi2
    return chi2, dof, float(_chi2.sf(chi2, dof))


# many tests at once ------------------------------------------------------------------------
#: corrections for testing many columns, species and snapshots at once
CORRECTIONS = ("holm", "bh", "none")


def adjust_pvalues(pvalues, method: str = "holm") -> np.ndarray:
    """P-values adjusted for testing them all at once (NaN stays NaN and does not count).

    ``holm``: Holm's step-down correction, which holds the chance of any false failure
    at the level (Holm 1979): sorted ascending, ``p(i) * (m - i + 1)``, made monotone
    and capped at 1. ``bh``: Benjamini–Hochberg's false discovery rate
    (``scipy.stats.false_discovery_control``). ``none``: as given.
    """
    p = np.asarray(pvalues, dtype=np.float64)
    if method not in CORRECTIONS:
        raise ValueError(f"correction is one of {', '.join(CORRECTIONS)}, got '{method}'")
    out = p.copy()
    fin = np.isfinite(p)
    m = int(np.count_nonzero(fin))
    if method == "none" or m == 0:
        return out
    q = p[fin]
    if method == "bh":
        from scipy.stats import false_discovery_control
        out[fin] = false_discovery_control(q, method="bh")
        return out
    order = np.argsort(q, kind="stable")
    scaled = np.minimum(1.0, q[order] * (m - np.arange(m)))
    adj = np.empty(m)
    adj[order] = np.maximum.accumulate(scaled)
    out[fin] = adj
    return out


# particle by particle ---------------------------------------------------------------------
@dataclass
class PairStats:
    """Summary of matched particle pairs; :meth:`merge` joins the summaries of two sets of pairs."""

    pairs: int = 0
    only_ref: int = 0
    only_cand: int = 0
    position_max: float = math.nan      # level-0 cells; NaN when no finite difference
    position_sumsq: float = 0.0
    position_nonfinite: int = 0
    momentum_max: float = math.nan      # |Δu| in the run's momentum units
    momentum_sumsq: float = 0.0
    momentum_ref_sumsq: float = 0.0     # Σ|u_ref|², the scale of the relative difference
    momentum_nonfinite: int = 0
    identical: bool = True              # every compared value of every pair equal
    worst_key: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=object))
    worst_position: np.ndarray = field(default_factory=lambda: np.zeros(0))
    worst_momentum: np.ndarray = field(default_factory=lambda: np.zeros(0))
    worst: int = WORST

    def merge(self, other: "PairStats") -> "PairStats":
        keys = np.concatenate([self.worst_key, other.worst_key])
        pos = np.concatenate([self.worst_position, other.worst_position])
        mom = np.concatenate([self.worst_momentum, other.worst_momentum])
        top = _top(pos, mom, self.worst)
        return PairStats(self.pairs + other.pairs, self.only_ref + other.only_ref,
                         self.only_cand + other.only_cand,
                         _nanmax(self.position_max, other.position_max),
                         self.position_sumsq + other.position_sumsq,
                         self.position_nonfinite + other.position_nonfinite,
                         _nanmax(self.momentum_max, other.momentum_max),
                         self.momentum_sumsq + other.momentum_sumsq,
                         self.momentum_ref_sumsq + other.momentum_ref_sumsq,
                         self.momentum_nonfinite + other.momentum_nonfinite,
                         self.identical and other.identical,
                         keys[top], pos[top], mom[top], self.worst)

    # what the tables show
    @property
    def matched_fraction(self) -> float:
        union = self.pairs + self.only_ref + self.only_cand
        return self.pairs / union if union else math.nan

    @property
    def position_rms(self) -> float:
        n = self.pairs - self.position_nonfinite
        return math.sqrt(self.position_sumsq / n) if n > 0 else math.nan

    @property
    def momentum_scale(self) -> float:
        """RMS |u| of the matched reference particles."""
        n = self.pairs - self.momentum_nonfinite
        return math.sqrt(self.momentum_ref_sumsq / n) if n > 0 else math.nan

    def _relative(self, value: float) -> float:
        s = self.momentum_scale
        if not np.isfinite(value):
            return math.nan
        if s > 0:
            return value / s
        return 0.0 if value == 0 else math.inf

    @property
    def momentum_max_relative(self) -> float:
        return self._relative(self.momentum_max)

    @property
    def momentum_rms_relative(self) -> float:
        n = self.pairs - self.momentum_nonfinite
        return self._relative(math.sqrt(self.momentum_sumsq / n)) if n > 0 else math.nan

    @property
    def same_particles(self) -> bool:
        return self.only_ref == 0 and self.only_cand == 0

    def worst_relative_momentum(self) -> np.ndarray:
        s = self.momentum_scale
        return self.worst_momentum / s if s > 0 else self.worst_momentum * math.nan


def _nanmax(a: float, b: float) -> float:
    if not np.isfinite(a):
        return b
    if not np.isfinite(b):
        return a
    return max(a, b)


def _top(position: np.ndarray, momentum: np.ndarray, k: int) -> np.ndarray:
    """Rows of the k largest position differences (ties: larger momentum difference), largest first.

    NaN ranks last.
    """
    n = position.shape[0]
    if n == 0 or k <= 0:
        return np.zeros(0, dtype=np.int64)
    p = np.where(np.isfinite(position), position, -np.inf)
    if n > 4 * k:
        cut = np.argpartition(-p, k - 1)[:k]
        # rows tied with the k-th value may lie outside the cut: keep all ties for the sort
        kth = p[cut].min()
        cand = np.flatnonzero(p >= kth) if np.count_nonzero(p >= kth) <= 64 * k else cut
    else:
        cand = np.arange(n)
    m = np.where(np.isfinite(momentum[cand]), momentum[cand], -np.inf)
    order = np.lexsort((-m, -p[cand]))
    return cand[order[:k]]


def pair_stats(keys, pos_ref, pos_cand, mom_ref, mom_cand, layout: BlockLayout | None,
               extra_ref=(), extra_cand=(), worst: int = WORST) -> PairStats:
    """:class:`PairStats` of pairs given row by row (row k of each array is one particle).

    ``keys`` labels the pairs (the id, or a tuple of key columns); positions
    and momenta are sequences of component arrays (either may be empty);
    ``extra_*`` further columns that count for "identical" (e.g. weight).
    """
    n = _length(keys)
    ia = np.arange(n, dtype=np.int64)
    return _pair_stats(keys, ia, ia, pos_ref, pos_cand, mom_ref, mom_cand, layout, extra_ref,
                       extra_cand, worst, gathered=True)


def _length(keys) -> int:
    if isinstance(keys, (tuple, list)):
        return int(np.asarray(keys[0]).shape[0])
    return int(np.asarray(keys).shape[0])


def _key_labels(keys, rows) -> np.ndarray:
    """Printable keys of the given rows: the id, or 'a:b' for a composite key."""
    if isinstance(keys, (tuple, list)):
        parts = [np.asarray(k)[rows] for k in keys]
        return np.array([":".join(str(_plain(v)) for v in t) for t in zip(*parts)], dtype=object)
    return np.array([_plain(v) for v in np.asarray(keys)[rows]], dtype=object)


def _plain(v):
    v = v.item() if hasattr(v, "item") else v
    if isinstance(v, float) and v.is_integer():
        return int(v)
    return v


def _pair_stats(keys_cand, ia, ib, pos_ref, pos_cand, mom_ref, mom_cand, layout, extra_ref, extra_cand,
                worst, gathered=False, measured=None) -> PairStats:
    # ``measured``: what kernels.dense_pairs measured already (per pair and summed); ``ia``
    # may then be None (only the extra columns would need it, and there are none)
    m = int(ib.shape[0])
    pos_ref, pos_cand = [np.asarray(p) for p in pos_ref], [np.asarray(p) for p in pos_cand]
    mom_ref, mom_cand = [np.asarray(p) for p in mom_ref], [np.asarray(p) for p in mom_cand]
    out = PairStats(pairs=m, worst=worst)
    if m == 0:
        return out
    if _positions_fit(pos_ref, pos_cand, layout):
        if measured is not None:
            disp = measured["disp"]
            out.position_nonfinite, pmax, psum = measured["position"]
        else:
            disp = matched_displacement(pos_ref, pos_cand, ia, ib, layout)
            fin = np.isfinite(disp)
            out.position_nonfinite = int(m - np.count_nonzero(fin))
            pmax = float(np.max(disp, where=fin, initial=0.0))
            psum = float(np.sum(np.square(disp, where=fin, out=np.zeros(m))))
        if out.position_nonfinite < m:
            out.position_max, out.position_sumsq = pmax, psum
    else:
        disp = np.full(m, np.nan)
        out.position_nonfinite = m
    if _momenta_fit(mom_ref, mom_cand):
        if measured is not None:
            du = measured["du"]
            out.momentum_nonfinite, umax, usum, rsum = measured["momentum"]
        else:
            du, uref = _momentum_terms(ia, ib, mom_ref, mom_cand, gathered)
            fin = np.isfinite(du) & np.isfinite(uref)
            out.momentum_nonfinite = int(m - np.count_nonzero(fin))
            umax = float(np.sqrt(np.max(du, where=fin, initial=0.0)))
            usum, rsum = float(np.sum(du, where=fin)), float(np.sum(uref, where=fin))
            du = np.sqrt(du, out=du)
        if out.momentum_nonfinite < m:
            out.momentum_max, out.momentum_sumsq, out.momentum_ref_sumsq = umax, usum, rsum
    else:
        du = np.full(m, np.nan)
        out.momentum_nonfinite = m
    # values equal when their difference is exactly zero; the extra columns only need a look
    # when everything else already agrees
    identical = (out.position_nonfinite == 0 and out.position_max == 0 and out.momentum_nonfinite == 0
                 and out.momentum_max == 0) if (pos_ref or mom_ref) else True
    for a, b in zip([np.asarray(e) for e in extra_ref], [np.asarray(e) for e in extra_cand]):
        if not identical:
            break
        if np.ndim(a) == 0 or np.ndim(b) == 0:
            identical = bool(np.all(a == b))
        else:
            identical = bool(np.array_equal(a if gathered else a[ia], b if gathered else b[ib],
                                            equal_nan=a.dtype.kind == "f" and b.dtype.kind == "f"))
    out.identical = identical
    top = _top(disp, du, worst)
    # a pair that does not differ at all is not worth naming
    top = top[~((disp[top] == 0) & (du[top] == 0))]
    out.worst_key = _key_labels(keys_cand, ib[top])
    out.worst_position = disp[top]
    out.worst_momentum = du[top]
    return out


def _positions_fit(pos_ref, pos_cand, layout) -> bool:
    return bool(pos_ref) and layout is not None and len(pos_ref) == len(pos_cand) == layout.ndim


def _momenta_fit(mom_ref, mom_cand) -> bool:
    return bool(mom_ref) and len(mom_ref) == len(mom_cand)


def _momentum_terms(ia, ib, mom_ref, mom_cand, gathered):
    """Per pair |Δu|² and |u_ref|²."""
    if (not gathered and _kernels.available and ia.shape[0] >= _kernels.MIN_SIZE
            and len(mom_ref) <= 3):
        return _kernels.momentum_pairs(ia, ib, mom_ref, mom_cand)
    du = np.zeros(ia.shape[0])
    uref = np.zeros(ia.shape[0])
    for a, b in zip(mom_ref, mom_cand):
        ua = (a if gathered else a[ia]).astype(np.float64)
        ub = (b if gathered else b[ib]).astype(np.float64)
        uref += ua * ua
        ub -= ua
        du += ub * ub
    return du, uref


def compare_particles(keys_ref, keys_cand, pos_ref, pos_cand, mom_ref, mom_cand,
                      layout: BlockLayout | None, extra_ref=(), extra_cand=(),
                      worst: int = WORST) -> PairStats:
    """Match two snapshots of one species by key and summarise how the matched particles differ.

    Keys as :func:`migration.match_keys` takes them (one array, or a tuple for
    a composite key); raises its ``DuplicateKeyError`` when a key repeats.
    Positions are compared in level-0 cells of ``layout`` (minimum image on
    its periodic axes); momenta by ``|u_cand - u_ref|``.
    """
    got = _dense_pairs(keys_ref, keys_cand, pos_ref, pos_cand, mom_ref, mom_cand, layout)
    if isinstance(got, dict):
        ib, only_ref, only_cand = got["ib"], got["lost"], got["created"]
        # the reference's matched rows: all of them in order, or (some lost) not needed, as
        # the runs then differ whatever the extra columns say
        ia = np.arange(ib.shape[0]) if only_ref == 0 else None
        if ia is None:
            extra_ref, extra_cand = (), ()
    else:
        m = got if got is not None else match_keys(keys_ref, keys_cand)
        ia, ib, only_ref, only_cand = m.ia, m.ib, m.lost.size, m.created.size
        got = None
    out = _pair_stats(keys_cand, ia, ib, pos_ref, pos_cand, mom_ref, mom_cand, layout,
                      extra_ref, extra_cand, worst, measured=got)
    out.only_ref = int(only_ref)
    out.only_cand = int(only_cand)
    if out.only_ref or out.only_cand:
        out.identical = False
    return out


def _dense_pairs(keys_ref, keys_cand, pos_ref, pos_cand, mom_ref, mom_cand, layout):
    """What :func:`_kernels.dense_pairs` measures in its one compiled match-and-measure pass; where
    it does not apply, the match made by sorting (keys not dense) or None (small inputs, no
    numba, more than 3 axes, nothing to measure).

    The same pairs and per-pair values as :func:`match_keys` with the separate measures, bit for
    bit, and the same sums within rounding (compensated there, pairwise here); it only reads
    each candidate particle's record once instead of gathering every column.
    """
    n = max(_length(keys_ref), _length(keys_cand))
    pos_ok, mom_ok = _positions_fit(pos_ref, pos_cand, layout), _momenta_fit(mom_ref, mom_cand)
    if (not _kernels.available or n < _kernels.MIN_SIZE or (pos_ok and len(pos_ref) > 3)
            or (mom_ok and len(mom_ref) > 3) or not (pos_ok or mom_ok)):
        return None
    plan = key_plan(keys_ref, keys_cand)
    if plan[0] != "dense":
        return plan[1]          # the match, made by sorting: measured the separate way
    pa = [np.asarray(p) for p in pos_ref] if pos_ok else None
    pb = [np.asarray(p) for p in pos_cand] if pos_ok else None
    got = _kernels.dense_pairs(plan[1], plan[2], plan[3], pa, pb, layout if pos_ok else None,
                               [np.asarray(u) for u in mom_ref] if mom_ok else [],
                               [np.asarray(u) for u in mom_cand] if mom_ok else [])
    if isinstance(got, tuple):
        raise DuplicateKeyError(got[2], got[1])
    return got


# the accumulator -------------------------------------------------------------------------------
class ParticleComparison(KeepRows):
    """:func:`compare_particles` of two frames (0: the reference, 1: the candidate), fed in pieces.

    ``keys``, ``positions``, ``momenta`` and ``extras`` are column names,
    one tuple per frame (the two runs may name a role differently). Matching
    needs every key of both frames together, so the state keeps the rows it
    is given (:class:`KeepRows`) and ``finish`` matches them in one call of the
    matcher migration uses.
    """

    def __init__(self, layout: BlockLayout | None, keys, positions, momenta, extras=((), ()),
                 worst: int = WORST):
        self.layout = layout
        self.keys = tuple(tuple(k) for k in keys)
        self.positions = tuple(tuple(p) for p in positions)
        self.momenta = tuple(tuple(m) for m in momenta)
        self.extras = tuple(tuple(e) for e in extras)
        self.worst = int(worst)
        if len(self.keys[0]) != len(self.keys[1]) or not self.keys[0]:
            raise ValueError("both frames need the same number of key columns")

    @property
    def frame_columns(self):
        return tuple(tuple(dict.fromkeys(self.keys[k] + self.positions[k] + self.momenta[k] + self.extras[k]))
                     for k in (0, 1))

    def finish(self, state) -> PairStats:
        a, b = self.joined(state, 0), self.joined(state, 1)

        return compare_particles(self.key_of(a, self.keys[0]), self.key_of(b, self.keys[1]),
                                 [a[c] for c in self.positions[0]],
                                 [b[c] for c in self.positions[1]], [a[c] for c in self.momenta[0]],
                                 [b[c] for c in self.momenta[1]], self.layout,
                                 [a[c] for c in self.extras[0]], [b[c] for c in self.extras[1]], self.worst)


class DistributionComparison(KeepRows):
    """:func:`distribution_distance` of column pairs of two frames (0: reference, 1: candidate).

    ``columns`` is a sequence of ``(reference column, candidate column)``; ``weights`` the
    weight column of each frame, or None where every particle weighs the same. A sort needs
    every value together, so the rows are kept (:class:`KeepRows`) and ``finish`` gives one
    :class:`DistributionDistance` per pair, in order.
    """

    def __init__(self, columns, weights=(None, None)):
        self.columns = tuple((str(a), str(b)) for a, b in columns)
        self.weights = tuple(weights)

    @property
    def frame_columns(self):
        return tuple(tuple(dict.fromkeys([c[k] for c in self.columns]
                                         + ([self.weights[k]] if self.weights[k] else [])))
                     for k in (0, 1))

    def finish(self, state) -> list[DistributionDistance]:
        a, b = self.joined(state, 0), self.joined(state, 1)
        wa = a[self.weights[0]] if self.weights[0] else None
        wb = b[self.weights[1]] if self.weights[1] else None
        return [distribution_distance(a[x], b[y], wa, wb) for x, y in self.columns]
