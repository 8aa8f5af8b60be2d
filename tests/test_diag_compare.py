"""Two runs against each other: KS, Wasserstein, census chi-square, particle differences.

Outside references: scipy.stats.ks_2samp, scipy.stats.wasserstein_distance,
scipy.stats.chi2_contingency, the large-sample critical values of the
two-sample Kolmogorov–Smirnov test, hand-worked weighted cases and a
brute-force minimum image.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from swarmaudit.core.layout import regular_layout
from swarmaudit.diagnostics import _kernels
from swarmaudit.diagnostics.compare import (PairStats, census_chi2, compare_particles,
                                            adjust_pvalues, distribution_distance, effective_size,
                                            ks_pvalue,
                                            pair_stats)
from swarmaudit.diagnostics.migration import DuplicateKeyError

from _need import need_that


# Kolmogorov–Smirnov -------------------------------------------------------------------
@pytest.mark.parametrize("seed,na,nb,shift", [(0, 300, 450, 0.0), (1, 2000, 1500, 0.1),
                                              (2, 50, 80, 0.5), (3, 20000, 30000, 0.02)])
def test_ks_matches_scipy_unweighted(seed, na, nb, shift):
    rng = np.random.default_rng(seed)
    a = rng.normal(0, 1, na)
    b = rng.normal(shift, 1, nb)
    got = distribution_distance(a, b)
    ref = stats.ks_2samp(a, b, method="asymp")
    assert got.ks_statistic == pytest.approx(ref.statistic, abs=1e-12)
    assert got.ks_pvalue == pytest.approx(ref.pvalue, rel=1e-9, abs=1e-300)


def test_ks_with_ties_matches_scipy():
    # integer data: many ties, where only the last partial sum of a run of equal values counts
    rng = np.random.default_rng(4)
    a = rng.integers(0, 12, 700).astype(float)
    b = rng.integers(1, 13, 500).astype(float)
    got = distribution_distance(a, b)
    ref = stats.ks_2samp(a, b, method="asymp")
    assert got.ks_statistic == pytest.approx(ref.statistic, abs=1e-12)
    assert got.ks_pvalue == pytest.approx(ref.pvalue, rel=1e-9)


@pytest.mark.parametrize("alpha,c", [(0.10, 1.224), (0.05, 1.358), (0.01, 1.628)])
def test_ks_pvalue_at_published_critical_values(alpha, c):
    # Large-sample critical values of the two-sample KS test, D_alpha = c(alpha) sqrt((n+m)/(n m)),
    # c = 1.22, 1.36, 1.63 at alpha = 0.10, 0.05, 0.01 (Smirnov 1948, as tabulated in Massey 1951,
    # J. Amer. Statist. Assoc. 46, 68-78; from memory)
    n, m = 4000, 6000
    d = c * math.sqrt((n + m) / (n * m))
    assert ks_pvalue(d, n, m) == pytest.approx(alpha, rel=0.03)


def test_weighted_ks_hand_worked():
    # F_ref jumps 1/4, 1/4, 1/2 at 1, 2, 3; F_cand 1/4, 3/4 at 2, 4.
    # F_ref - F_cand: 1/4 on [1,2), 1/4 on [2,3), 3/4 on [3,4), 0 from 4: D = 3/4, W1 = 5/4
    got = distribution_distance([1, 2, 3], [2, 4], [1, 1, 2], [1, 3])
    assert got.ks_statistic == pytest.approx(0.75)
    assert got.wasserstein == pytest.approx(1.25)
    # Kish: (1+1+2)^2 / (1+1+4) and (1+3)^2 / (1+9)
    assert got.ref_effective == pytest.approx(16 / 6)
    assert got.cand_effective == pytest.approx(1.6)
    assert got.ref_mean == pytest.approx(9 / 4)
    assert got.cand_mean == pytest.approx(14 / 4)


def test_integer_weights_equal_repeated_values():
    # a weight of k counts like k copies of the value (for the statistic)
    rng = np.random.default_rng(5)
    a, b = rng.normal(size=200), rng.normal(0.2, 1.1, 300)
    wa, wb = rng.integers(1, 4, a.size), rng.integers(1, 4, b.size)
    got = distribution_distance(a, b, wa, wb)
    ref = stats.ks_2samp(np.repeat(a, wa), np.repeat(b, wb))
    assert got.ks_statistic == pytest.approx(ref.statistic, abs=1e-12)
    assert got.wasserstein == pytest.approx(stats.wasserstein_distance(np.repeat(a, wa), np.repeat(b, wb)))


def test_effective_size():
    assert effective_size(None, 17) == 17
    assert effective_size(np.full(10, 3.0)) == pytest.approx(10)
    assert effective_size([1.0, 0.0, 0.0]) == pytest.approx(1)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_wasserstein_matches_scipy(seed):
    rng = np.random.default_rng(seed)
    a, b = rng.gamma(2.0, 1.0, 1000), rng.normal(2, 1.5, 1500)
    wa, wb = rng.random(a.size), rng.random(b.size) * 3
    got = distribution_distance(a, b, wa, wb)
    assert got.wasserstein == pytest.approx(stats.wasserstein_distance(a, b, wa, wb), rel=1e-9)
    got = distribution_distance(a.astype(np.float32), b)
    assert got.wasserstein == pytest.approx(
        stats.wasserstein_distance(a.astype(np.float32).astype(float), b), rel=1e-6)


def test_identical_samples_and_nonfinite():
    a = np.array([0.5, 1.0, np.nan, 2.0, np.inf])
    got = distribution_distance(a, a[::-1])
    assert got.ks_statistic == 0 and got.wasserstein == 0 and got.ks_pvalue == 1.0
    assert got.nonfinite == 4 and got.ref_count == 3
    empty = distribution_distance([], [1.0])
    assert math.isnan(empty.ks_statistic) and math.isnan(empty.ks_pvalue)


# census chi-square ---------------------------------------------------------------------
def test_census_chi2_matches_chi2_contingency():
    rng = np.random.default_rng(6)
    r = rng.poisson(200, 30)
    c = rng.poisson(220, 30)
    r[[3, 7]] = 0
    c[7] = 0          # a block empty in both runs carries no information
    chi2, dof, p = census_chi2(r, c)
    keep = (r + c) > 0
    ref = stats.chi2_contingency(np.stack([r[keep], c[keep]]), correction=False)
    assert chi2 == pytest.approx(ref.statistic, rel=1e-12)
    assert dof == ref.dof == 28
    assert p == pytest.approx(ref.pvalue, rel=1e-9)


def test_census_chi2_equal_counts_and_degenerate():
    assert census_chi2([5, 6, 7], [5, 6, 7])[::2] == (0.0, 1.0)
    assert math.isnan(census_chi2([5, 0], [3, 0])[0])
    with pytest.raises(ValueError):
        census_chi2([1, 2], [1, 2, 3])


# particle by particle ------------------------------------------------------------------
def _brute_cells(xa, xb, h, length, periodic):
    d = np.abs(xb - xa)
    if periodic:
        # every image of b within one box length: the nearest one is the minimum image
        d = np.min(np.abs(np.stack([xb - xa + k * length for k in (-1, 0, 1)])), axis=0)
    return d / h


@pytest.mark.parametrize("n", [5000, 300_000])
def test_particle_differences_against_brute_force(n):
    rng = np.random.default_rng(7)
    lay = regular_layout([0, 2.0, 0, 1.0], [40, 10], [4, 2], periodic=("x",))
    x, y = rng.random(n) * 2.0, rng.random(n)
    ux, uy = rng.normal(0, 1, n), rng.normal(0, 2, n)
    ids = np.arange(n) + 100
    order = rng.permutation(n)                 # the candidate stores its particles in another order
    xb = (x + rng.normal(0, 0.03, n)) % 2.0    # some cross the periodic x edge
    yb = np.clip(y + rng.normal(0, 0.01, n), 0, 0.999)
    uxb, uyb = ux + rng.normal(0, 1e-3, n), uy.copy()
    got = compare_particles(ids, ids[order], [x, y], [xb[order], yb[order]], [ux, uy],
                            [uxb[order], uyb[order]], lay)
    dx = _brute_cells(x, xb, 0.05, 2.0, True)
    dy = _brute_cells(y, yb, 0.1, 1.0, False)
    cheb = np.maximum(dx, dy)
    assert got.pairs == n and got.same_particles and got.matched_fraction == 1
    assert got.position_max == pytest.approx(cheb.max(), rel=1e-12)
    assert got.position_rms == pytest.approx(math.sqrt(np.mean(cheb ** 2)), rel=1e-9)
    du = np.hypot(uxb - ux, uyb - uy)
    scale = math.sqrt(np.mean(ux ** 2 + uy ** 2))
    assert got.momentum_max_relative == pytest.approx(du.max() / scale, rel=1e-9)
    assert got.momentum_rms_relative == pytest.approx(math.sqrt(np.mean(du ** 2)) / scale, rel=1e-9)
    worst = np.argsort(-cheb, kind="stable")[:10]
    assert list(got.worst_key) == list(ids[worst])
    assert not got.identical


def test_identical_particles_in_another_order_and_one_changed():
    rng = np.random.default_rng(8)
    n = 1000
    lay = regular_layout([0, 1, 0, 1], [8, 8], [2, 2], periodic=("x", "y"))
    x, y, u = rng.random(n).astype(np.float32), rng.random(n).astype(np.float32), rng.normal(size=n)
    w = np.full(n, 2.5)
    o = rng.permutation(n)
    same = compare_particles(np.arange(n), o, [x, y], [x[o], y[o]], [u], [u[o]], lay, [w], [w[o]])
    assert same.identical and same.position_max == 0 and same.momentum_max_relative == 0
    w2 = w[o].copy()
    w2[5] = 2.0
    assert not compare_particles(np.arange(n), o, [x, y], [x[o], y[o]], [u], [u[o]], lay, [w], [w2]).identical
    xb = x[o].copy()
    xb[17] += np.float32(0.25)                  # two cells
    moved = compare_particles(np.arange(n), o, [x, y], [xb, y[o]], [u], [u[o]], lay)
    assert not moved.identical
    assert moved.worst_key[0] == o[17]
    assert moved.position_max == pytest.approx(2.0, rel=1e-6)


def test_unmatched_and_duplicates():
    lay = regular_layout([0, 1], [10], [1])
    a = compare_particles(np.array([1, 2, 3, 4]), np.array([3, 4, 5]), [np.zeros(4)], [np.zeros(3)],
                          [], [], lay)
    assert (a.pairs, a.only_ref, a.only_cand) == (2, 2, 1)
    assert a.matched_fraction == pytest.approx(2 / 5)
    assert not a.identical
    assert math.isnan(a.momentum_max_relative)
    with pytest.raises(DuplicateKeyError):
        compare_particles(np.array([1, 1]), np.array([1, 2]), [np.zeros(2)], [np.zeros(2)], [], [], lay)


def test_composite_keys_label_worst():
    lay = regular_layout([0, 1], [10], [1])
    ka = (np.array([0, 1, 0]), np.array([7, 7, 8]))
    kb = (np.array([0, 0, 1]), np.array([8, 7, 7]))
    got = compare_particles(ka, kb, [np.array([0.1, 0.2, 0.3])], [np.array([0.35, 0.1, 0.2])], [], [], lay,
                            worst=1)
    assert got.pairs == 3 and list(got.worst_key) == ["0:8"]
    assert got.position_max == pytest.approx(0.5)


def test_merge_of_pieces_equals_whole():
    rng = np.random.default_rng(9)
    n = 4000
    lay = regular_layout([0, 1, 0, 1], [16, 16], [2, 2], periodic=("y",))
    ids = rng.permutation(n)
    pa = [rng.random(n), rng.random(n)]
    pb = [(p + rng.normal(0, 0.02, n)) % 1.0 for p in pa]
    ua, ub = [rng.normal(size=n)], [rng.normal(size=n)]
    whole = pair_stats(ids, pa, pb, ua, ub, lay)
    cut = 1234
    parts = [pair_stats(ids[s], [p[s] for p in pa], [p[s] for p in pb], [u[s] for u in ua],
                        [u[s] for u in ub], lay) for s in (slice(0, cut), slice(cut, n))]
    merged = parts[0].merge(parts[1])
    assert merged.pairs == whole.pairs
    assert merged.position_max == whole.position_max
    assert merged.position_rms == pytest.approx(whole.position_rms, rel=1e-12)
    assert merged.momentum_max_relative == pytest.approx(whole.momentum_max_relative, rel=1e-12)
    assert list(merged.worst_key) == list(whole.worst_key)
    assert PairStats().merge(whole).pairs == n


def test_momentum_kernel_equals_numpy_path():
    need_that(_kernels.available, "numba is not installed: no compiled momentum kernel")
    rng = np.random.default_rng(10)
    n = _kernels.MIN_SIZE + 10
    ia, ib = rng.permutation(n), rng.permutation(n)
    ua = [rng.normal(size=n).astype(np.float32) for _ in range(3)]
    ub = [rng.normal(size=n) for _ in range(3)]
    du, uref = _kernels.momentum_pairs(ia, ib, ua, ub)
    want_du = sum((b[ib] - a[ia].astype(float)) ** 2 for a, b in zip(ua, ub))
    want_ref = sum(a[ia].astype(float) ** 2 for a in ua)
    np.testing.assert_allclose(du, want_du, rtol=1e-12)
    np.testing.assert_allclose(uref, want_ref, rtol=1e-12)


def _fields(s: PairStats):
    return (s.pairs, s.only_ref, s.only_cand, s.position_max, s.position_nonfinite, s.momentum_max,
            s.momentum_nonfinite, s.identical, list(s.worst_key), list(s.worst_position),
            list(s.worst_momentum))


@pytest.mark.parametrize("case", ["3d-float32", "nonfinite", "momenta-only", "positions-only", "identical"])
def test_one_pass_match_equals_separate_measures(case, monkeypatch):
    # the compiled match-and-measure pass against match_keys plus the separate per-pair measures
    # (forced by raising the size threshold): the same pairs and values, sums within rounding
    need_that(_kernels.available, "numba is not installed: no compiled comparison kernel")
    rng = np.random.default_rng(11)
    n = _kernels.MIN_SIZE + 5000
    d = 3 if case == "3d-float32" else 2
    lay = regular_layout([0, 1] * d, [16] * d, [2] * d, periodic=("x",))
    dt = np.float32 if case == "3d-float32" else np.float64
    pos = [rng.random(n).astype(dt) for _ in range(d)]
    mom = [rng.normal(size=n).astype(dt) for _ in range(d)]
    ids = rng.permutation(2 * n)[:n]                      # dense enough for the id-indexed match
    if case == "identical":
        keep, cand_ids = np.arange(n), ids
    else:
        keep = np.flatnonzero(rng.random(n) > 0.01)       # 1 % only in the reference
        cand_ids = np.concatenate([ids[keep], 2 * n + np.arange(300)])   # 300 only in the candidate
    order = rng.permutation(cand_ids.size)
    extra = rng.random(cand_ids.size - keep.size)

    def cand(a, jitter):
        b = np.concatenate([a[keep] + (jitter * rng.normal(size=keep.size)).astype(a.dtype),
                            extra.astype(a.dtype)])
        return b[order]

    pb = [cand(p, 0 if case == "identical" else 1e-3) for p in pos]
    ub = [cand(u, 0 if case == "identical" else 1e-4) for u in mom]
    if case == "nonfinite":
        pos[0][:50] = np.nan
        ub[1][7] = np.inf
    pa_, pb_ = ([], []) if case == "momenta-only" else (pos, pb)
    ua_, ub_ = ([], []) if case == "positions-only" else (mom, ub)
    args = (ids, cand_ids[order], pa_, pb_, ua_, ub_, lay)
    fused = compare_particles(*args)
    monkeypatch.setattr(_kernels, "MIN_SIZE", 10 ** 12)
    separate = compare_particles(*args)
    np.testing.assert_equal(_fields(fused), _fields(separate))      # NaN equals NaN here
    for f in ("position_sumsq", "momentum_sumsq", "momentum_ref_sumsq"):
        assert getattr(fused, f) == pytest.approx(getattr(separate, f), rel=1e-12)
    assert fused.identical == (case == "identical")


@pytest.mark.parametrize("side", ["first", "second"])
def test_one_pass_match_names_repeated_ids(side):
    need_that(_kernels.available, "numba is not installed: no compiled comparison kernel")
    n = _kernels.MIN_SIZE + 10
    lay = regular_layout([0, 1], [10], [1])
    ka, kb = np.arange(n), np.arange(n)
    (ka if side == "first" else kb)[5] = 6
    with pytest.raises(DuplicateKeyError) as err:
        compare_particles(ka, kb, [np.zeros(n)], [np.zeros(n)], [], [], lay)
    assert err.value.side == side and err.value.count == 1


# many tests at once ------------------------------------------------------------------------
def test_holm_worked_example():
    # Holm (1979), step-down, worked by hand (from memory of the method): sorted p 0.005, 0.01,
    # 0.03, 0.04 times m - i + 1 = 4, 3, 2, 1 -> 0.02, 0.03, 0.06, 0.04 -> monotone 0.06 for the last
    got = adjust_pvalues([0.01, 0.04, 0.03, 0.005], "holm")
    np.testing.assert_allclose(got, [0.03, 0.06, 0.06, 0.02])
    np.testing.assert_array_equal(adjust_pvalues([0.2, np.nan, 0.9], "holm")[1:2], [np.nan])
    assert adjust_pvalues([0.2, np.nan, 0.9], "holm")[2] == 0.9      # m = 2 finite p-values
    np.testing.assert_array_equal(adjust_pvalues([0.5, 0.7], "none"), [0.5, 0.7])


@pytest.mark.parametrize("seed", range(5))
def test_holm_rejects_what_the_step_down_rule_rejects(seed):
    # the definition: reject the k smallest p-values for the largest k with
    # p(j) <= alpha / (m - j + 1) for every j <= k
    rng = np.random.default_rng(seed)
    p = np.concatenate([rng.random(40), rng.random(10) * 1e-3])
    adj = adjust_pvalues(p, "holm")
    order = np.argsort(p)
    m = p.size
    for alpha in (0.001, 0.01, 0.05, 0.2):
        ok = p[order] <= alpha / (m - np.arange(m))
        k = m if ok.all() else int(np.argmin(ok))
        rejected = np.zeros(m, bool)
        rejected[order[:k]] = True
        np.testing.assert_array_equal(adj <= alpha, rejected)


@pytest.mark.parametrize("seed", range(5))
def test_benjamini_hochberg_rejects_what_the_step_up_rule_rejects(seed):
    # Benjamini & Hochberg (1995): reject the k smallest for the largest k with p(k) <= k alpha / m
    rng = np.random.default_rng(seed)
    p = np.concatenate([rng.random(40), rng.random(10) * 1e-2])
    adj = adjust_pvalues(p, "bh")
    order = np.argsort(p)
    m = p.size
    for alpha in (0.01, 0.05, 0.2):
        below = np.flatnonzero(p[order] <= alpha * np.arange(1, m + 1) / m)
        k = int(below.max()) + 1 if below.size else 0
        rejected = np.zeros(m, bool)
        rejected[order[:k]] = True
        np.testing.assert_array_equal(adj <= alpha, rejected)


def test_distribution_accumulator_in_pieces_matches_scipy():
    # pieces in any order, merged, give what the whole arrays give, and that is scipy's KS and
    # Wasserstein (unweighted) and the hand-made weighted form's values (weighted)
    from swarmaudit.diagnostics.accumulate import Piece, fold, merge_all
    from swarmaudit.diagnostics.compare import DistributionComparison
    rng = np.random.default_rng(12)
    a = {"vx": rng.normal(0, 1, 3000), "x": rng.random(3000), "w": rng.uniform(1, 2, 3000)}
    b = {"u": rng.normal(0.1, 1, 2500), "xx": rng.random(2500), "w": rng.uniform(1, 2, 2500)}
    for weights in ((None, None), ("w", "w")):
        acc = DistributionComparison([("vx", "u"), ("x", "xx")], weights)

        def pieces(arrays, k, cut):
            n = len(next(iter(arrays.values())))
            edges = list(range(0, n, cut)) + [n]
            return [Piece({c: v[lo:hi] for c, v in arrays.items()}, lo, hi, frame=k)
                    for lo, hi in zip(edges[:-1], edges[1:])]

        states = [fold(acc, [p]) for p in pieces(a, 0, 700) + pieces(b, 1, 400)][::-1]
        got = acc.finish(merge_all(acc, states))
        wa, wb = (a["w"], b["w"]) if weights[0] else (None, None)
        want = [distribution_distance(a["vx"], b["u"], wa, wb), distribution_distance(a["x"], b["xx"], wa, wb)]
        assert [(g.ks_statistic, g.ks_pvalue, g.wasserstein) for g in got] == \
            [(w.ks_statistic, w.ks_pvalue, w.wasserstein) for w in want]
        if weights[0] is None:
            ks = stats.ks_2samp(a["vx"], b["u"], method="asymp")
            assert got[0].ks_statistic == pytest.approx(ks.statistic)
            assert got[0].wasserstein == pytest.approx(stats.wasserstein_distance(a["vx"], b["u"]))
        else:
            assert got[0].wasserstein == pytest.approx(
                stats.wasserstein_distance(a["vx"], b["u"], a["w"], b["w"]))
