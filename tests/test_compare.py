"""``swarmaudit compare``: pairing, the compare_* tables, the gate, the command.

Outside references: numpy.histogramdd (counts of the candidate in the
reference's blocks), scipy.stats.ks_2samp (the distribution rows), plain
arithmetic on the totals, and the demo's own two-stream generator run small
in tmp_path for the end-to-end gate.
"""

from __future__ import annotations

import os
import shutil

import h5py
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from swarmaudit.app.cli import main
from swarmaudit.audit import compare as C
from swarmaudit.core.errors import OptionError
from swarmaudit.core.layout import regular_layout

from _audit_runs import context


def _snaps(n=500, steps=(0, 10, 20), seed=0, shift=0.0, perm=False, drop=0, species=("e", "i"),
           dt=1.0, noise=0.0):
    rng = np.random.default_rng(seed)
    x0, y0 = rng.random(n), rng.random(n)
    vx, vy = rng.normal(0, 0.01, n), rng.normal(0, 0.01, n)
    noise_rng = np.random.default_rng(99)
    out = []
    for s in steps:
        sp = {}
        for k, name in enumerate(species):
            x = (x0 + vx * s + shift + 0.1 * k) % 1.0
            y = (y0 + vy * s) % 1.0
            if noise:
                x = (x + noise_rng.normal(0, noise, n)) % 1.0
            cols = {"x": x, "y": y, "vx": vx.copy(), "vy": vy.copy(), "id": np.arange(n), "w": np.full(n, 2.0)}
            if perm:
                o = np.random.default_rng(s + k).permutation(n)
                cols = {c: v[o] for c, v in cols.items()}
            if drop:
                cols = {c: v[drop:] for c, v in cols.items()}
            sp[name] = (cols, {"mass": 1.0, "charge": -1.0})
        out.append({"step": s, "time": s * dt, "species": sp})
    return out


LAY = regular_layout([0, 1, 0, 1], [16, 16], [4, 4], periodic=("x", "y"))


def test_identical_runs_in_another_order_are_identical():
    ref = context(_snaps(), LAY)
    cand = context(_snaps(perm=True), regular_layout([0, 1, 0, 1], [16, 16], [2, 8], periodic=("x", "y")))
    comp = C.compare_runs(ref, cand)
    p = comp.particles
    assert len(p) == 6 and p["identical"].all() and (p["matched_fraction"] == 1).all()
    assert (p["worst_ids"] == "").all() and comp.worst.empty
    assert comp.distributions.empty               # auto: ids match, no distribution rows
    # totals summed in another order agree to rounding only: a zero tolerance on them fails
    assert not C.gate(comp, rtol=0).ok
    res = C.gate(comp, position_cells=0, ks_p=0.05, rtol=1e-12)
    assert res.ok and "identical" in res.lines[0]
    # the candidate's own layout differs, but both are counted in the reference's blocks
    c = comp.census
    assert (c["ref_count"] == c["cand_count"]).all() and (c["chi2"] == 0).all()
    assert set(c["block"]) == set(range(16))


def test_census_counts_candidate_in_reference_blocks():
    ref = context(_snaps(), LAY)
    cand_snaps = _snaps(shift=0.03)
    cand = context(cand_snaps, regular_layout([0, 1, 0, 1], [16, 16], [1, 1]))
    comp = C.compare_runs(ref, cand)
    c = comp.census
    g = c[(c["ref_snapshot"] == 2) & (c["species"] == "e")].sort_values("block")
    cols, _ = cand_snaps[2]["species"]["e"]
    h, _ = np.histogramdd(np.stack([cols["y"], cols["x"]], axis=1), bins=[4, 4], range=[[0, 1], [0, 1]])
    np.testing.assert_array_equal(g["cand_count"].to_numpy(), h.reshape(-1).astype(int))
    chi = stats.chi2_contingency(np.stack([g["ref_count"], g["cand_count"]]), correction=False)
    assert g["chi2"].iloc[0] == pytest.approx(chi.statistic)


def test_perturbed_species_fails_naming_snapshot_species_and_measure():
    ref = context(_snaps(), LAY)
    snaps = _snaps()
    cols = snaps[1]["species"]["i"][0]
    cols["x"] = (cols["x"] + 0.2) % 1.0           # 3.2 cells
    comp = C.compare_runs(ref, context(snaps, LAY))
    res = C.gate(comp, position_cells=0.5)
    assert not res.ok
    f = res.failures[0]
    assert (f["ref_snapshot"], f["species"], f["measure"]) == (1, "i", "position")
    assert "snapshot 1 (step 10), species i" in res.lines[0] and "3.2 level-0 cells" in res.lines[0]
    row = comp.particles[(comp.particles["ref_snapshot"] == 1) & (comp.particles["species"] == "i")].iloc[0]
    # 0.2 of a unit box is 3.2 cells of 1/16; the minimum image never exceeds half the box
    assert row["max_position_cells"] == pytest.approx(3.2)
    assert C.gate(comp, position_cells=5).ok


def test_lost_particles_momentum_and_totals():
    ref = context(_snaps(), LAY)
    snaps = _snaps(drop=5)
    snaps[2]["species"]["e"][0]["vx"] = snaps[2]["species"]["e"][0]["vx"] * 1.01
    comp = C.compare_runs(ref, context(snaps, LAY))
    p = comp.particles
    assert (p["only_ref"] == 5).all() and (p["only_cand"] == 0).all()
    assert p["matched_fraction"].iloc[0] == pytest.approx(495 / 500)
    res = C.gate(comp, position_cells=1)
    assert res.failures[0]["measure"] == "unmatched"
    t = comp.totals
    cnt = t[(t["species"] == "e") & (t["quantity"] == "count") & (t["ref_snapshot"] == 0)].iloc[0]
    assert (cnt["ref_value"], cnt["cand_value"]) == (500, 495)
    assert cnt["relative_difference"] == pytest.approx(-5 / 500)
    res = C.gate(comp, rtol=1e-3)
    assert not res.ok and res.failures[0]["measure"] == "total:count"
    e2 = p[(p["ref_snapshot"] == 2) & (p["species"] == "e")].iloc[0]
    # vx grew by 1 %: |Δu| = 0.01 |vx|, relative to the RMS |u| of the matched reference particles
    vx = _snaps()[2]["species"]["e"][0]["vx"][5:]
    vy = _snaps()[2]["species"]["e"][0]["vy"][5:]
    assert e2["max_relative_momentum"] == pytest.approx(0.01 * np.abs(vx).max() / np.sqrt(np.mean(vx**2 + vy**2)))


def test_missing_species_is_a_finding():
    ref = context(_snaps(), LAY)
    cand = context(_snaps(species=("e",)), LAY)
    comp = C.compare_runs(ref, cand)
    res = C.gate(comp)
    assert not res.ok and res.failures[0]["measure"] == "species" and res.failures[0]["species"] == "i"
    assert "in the reference only" in res.lines[0]


def test_distributions_when_ids_differ_match_scipy():
    ref = context(_snaps(), LAY)
    snaps = _snaps(seed=1)                         # other particles, same ids: ask for distributions
    comp = C.compare_runs(ref, context(snaps, LAY), mode="distributions")
    d = comp.distributions
    assert set(d["column"]) == {"x", "y", "vx", "vy"} and comp.particles.empty
    r = d[(d["ref_snapshot"] == 1) & (d["species"] == "e") & (d["column"] == "vx")].iloc[0]
    a = _snaps()[1]["species"]["e"][0]["vx"]
    b = snaps[1]["species"]["e"][0]["vx"]
    ks = stats.ks_2samp(a, b, method="asymp")
    assert r["ks_statistic"] == pytest.approx(ks.statistic) and r["ks_pvalue"] == pytest.approx(ks.pvalue)
    assert r["wasserstein"] == pytest.approx(stats.wasserstein_distance(a, b))
    hot = _snaps()
    for snap in hot:
        snap["species"]["e"][0]["vx"] = snap["species"]["e"][0]["vx"] * 2.0
    res = C.gate(C.compare_runs(ref, context(hot, LAY), mode="distributions"), ks_p=0.01)
    assert not res.ok and res.failures[0]["measure"] == "ks:vx" and res.failures[0]["species"] == "e"
    assert C.gate(comp, ks_p=1e-6).ok


def test_pairing_by_time_with_tolerance():
    ref = context(_snaps(steps=(0, 10, 20, 30)), LAY)
    cand = context(_snaps(steps=(0, 8, 16, 24), dt=1.25), LAY)     # times 0, 10, 20, 30
    pr = C.pair_snapshots(ref, cand, "step")
    assert pr.pairs == [(0, 0)] and pr.only_ref == [1, 2, 3]
    pr = C.pair_snapshots(ref, cand, "time")
    assert pr.pairs == [(0, 0), (1, 1), (2, 2), (3, 3)] and not pr.only_ref
    off = context(_snaps(steps=(0, 10, 20), dt=1.001), LAY)
    assert C.pair_snapshots(ref, off, "time").pairs == [(0, 0)]
    assert C.pair_snapshots(ref, off, "time", time_tol=0.05).pairs == [(0, 0), (1, 1), (2, 2)]
    with pytest.raises(OptionError):
        C.pair_snapshots(ref, off, "time", time_tol=-1)
    with pytest.raises(OptionError):
        C.gate(C.compare_runs(ref, ref), ks_p=2)


def test_one_pair_alone_gives_that_pairs_rows_of_the_whole_comparison():
    ref = context(_snaps(steps=(0, 10, 20, 30)), LAY)
    cand = context(_snaps(steps=(10, 20, 30), shift=0.01, seed=0), LAY)
    whole = C.compare_runs(ref, cand, mode="both")
    one = C.compare_runs(ref, cand, mode="both", only=[(2, 1)])
    assert one.pairing.pairs == [(2, 1)]
    for name, table in one.tables().items():
        rows = whole.tables()[name]
        rows = rows[(rows["ref_snapshot"] == 2) & (rows["cand_snapshot"] == 1)].reset_index(drop=True)
        assert len(rows), name
        pd.testing.assert_frame_equal(table.reset_index(drop=True), rows, check_dtype=False)
    with pytest.raises(OptionError, match="not paired by step"):
        C.compare_runs(ref, cand, only=[(1, 2)])


# the command on the demo's own two-stream generator, small -------------------------------------
def _two_stream(folder, **kw):
    from swarmaudit.demo_data.two_stream import write_two_stream
    return write_two_stream(str(folder), 4000, 5, progress=None, steps=120, **kw)


@pytest.fixture(scope="module")
def two_stream_runs(tmp_path_factory):
    root = tmp_path_factory.mktemp("compare")
    _two_stream(root / "ref")
    _two_stream(root / "ranks", ranks=6, blocks=(8, 4), sort_by_cell=True, at_steps=[0, 60, 120])
    _two_stream(root / "dt", dt=0.125, at_steps=[0, 48, 96])       # the same times, another step
    return root


def _run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_gate_passes_on_rank_count_variant(two_stream_runs, capsys, tmp_path):
    r = two_stream_runs
    code, out, err = _run(capsys, "compare", str(r / "ref"), str(r / "ranks"), "--position-cells", "1e-3",
                          "--ks-p", "0.01", "--rtol", "1e-5", "--out", str(tmp_path / "out"))
    assert code == 0, out + err
    assert "paired 3 snapshot(s) by step" in out and "ok: 3 paired snapshot(s) agree" in out
    for name in C.TABLE_NAMES + ("report.html",):
        assert os.path.isfile(tmp_path / "out" / name)
    p = pd.read_csv(tmp_path / "out" / "compare_particles.csv")
    assert list(p.columns) == C.PARTICLE_COLUMNS
    assert (p["matched_fraction"] == 1).all() and (p["max_position_cells"] < 1e-3).all()
    assert p["identical"].iloc[:2].all()           # step 0 of both beams is written from the same load
    html = (tmp_path / "out" / "report.html").read_text()
    assert "Particle by particle" in html and "Totals side by side" in html


def test_gate_fails_on_perturbed_species(two_stream_runs, capsys, tmp_path):
    r = two_stream_runs
    bad = tmp_path / "bad"
    shutil.copytree(r / "ranks", bad)
    f = sorted((bad / "step_000060").glob("rank_*.h5"))[2]
    with h5py.File(f, "r+") as fh:
        ds = fh["beam_left/velocity/x"]
        ds[...] = ds[...] * np.float32(1.05)
    code, out, err = _run(capsys, "compare", str(r / "ref"), str(bad), "--position-cells", "1e-3",
                          "--rtol", "1e-3")
    assert code == 1, out + err
    fail = [line for line in out.splitlines() if line.startswith("FAIL")][0]
    assert "step 60" in fail and "species beam_left" in fail and "[measure: momentum]" in fail


def test_changed_time_step_pairs_by_time(two_stream_runs, capsys):
    r = two_stream_runs
    code, out, _ = _run(capsys, "compare", str(r / "ref"), str(r / "dt"), "--pair", "time", "--mode", "both",
                        "--position-cells", "1e-3")
    assert "paired 3 snapshot(s) by time" in out
    assert code == 1 and "[measure: position]" in out      # trajectories differ after a while


def test_bad_input_exits_2(two_stream_runs, capsys, tmp_path):
    r = two_stream_runs
    code, _, err = _run(capsys, "compare", str(r / "ref"))
    assert code == 2 and "two runs" in err
    code, _, err = _run(capsys, "compare", str(r / "ref"), str(r / "ranks"), "--ks-p", "3")
    assert code == 2 and "--ks-p" in err
    code, _, err = _run(capsys, "compare", str(r / "ref"), str(tmp_path / "none"))
    assert code == 2 and "Traceback" not in err
    code, _, err = _run(capsys, "compare", str(r / "ref"), str(r / "dt"), "--pair", "step",
                        "--position-cells", "1")
    assert code in (0, 1)                            # step 0 pairs; the rest are listed unpaired


def test_ks_gate_corrects_for_many_tests():
    # two independent draws of the same distributions: 3 snapshots x 2 species x 4 columns = 24
    # KS tests plus 6 census tests, all of true null hypotheses. Uncorrected at p = 0.5 about half
    # of them fail; after Holm's or Benjamini-Hochberg's correction none may (common practice:
    # correct a family of tests before gating on any of them)
    ref = context(_snaps(seed=3), LAY)
    comp = C.compare_runs(ref, context(_snaps(seed=4), LAY), mode="distributions")
    raw = C.gate(comp, ks_p=0.5, correction="none")
    assert not raw.ok and len(raw.failures) >= 5
    holm = C.gate(comp, ks_p=0.5)
    assert holm.ok and "holm correction" in holm.lines[-1]
    assert C.gate(comp, ks_p=0.5, correction="bh").ok
    # a real difference still fails after the correction, and the message names both p-values
    hot = _snaps(seed=4)
    for snap in hot:
        snap["species"]["e"][0]["vx"] = snap["species"]["e"][0]["vx"] * 2.0
    res = C.gate(C.compare_runs(ref, context(hot, LAY), mode="distributions"), ks_p=0.01)
    assert not res.ok and res.failures[0]["measure"] == "ks:vx"
    assert "after Holm's correction over" in res.failures[0]["text"]
    with pytest.raises(OptionError):
        C.gate(comp, ks_p=0.5, correction="sidak")
