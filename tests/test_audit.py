"""Run-level tables and the check gate on small in-memory runs."""

import numpy as np
import pandas as pd
import pytest

from swarmaudit.audit import tables as audit
from swarmaudit.core.errors import OptionError
from swarmaudit.core.layout import regular_layout

from _audit_runs import context, drifting_plasma

LAYOUT = regular_layout([0, 1, 0, 1], [16, 16], [4, 2], periodic=("x", "y"), ranks=3)


def _edges():
    return [np.linspace(0, 1, 5), np.linspace(0, 1, 3)]


def test_census_table_matches_histogramdd_per_species_and_all():
    snaps = drifting_plasma(n=500, snapshots=3)
    ctx = context(snaps, LAYOUT)
    df = audit.census_table(ctx)
    assert list(df.columns) == audit.CENSUS_COLUMNS
    assert sorted(df["species"].unique()) == ["all", "electrons", "ions"]
    for i, spec in enumerate(snaps):
        total = 0
        for s, (cols, _) in spec["species"].items():
            # outside source: numpy.histogramdd on the block edges (blocks numbered x fastest)
            h, _ = np.histogramdd(np.stack([cols["x"], cols["y"]], 1), bins=_edges())
            got = df[(df["snapshot"] == i) & (df["species"] == s)]
            assert got["count"].tolist() == h.ravel(order="F").astype(int).tolist()
            total = total + h.ravel(order="F")
        got = df[(df["snapshot"] == i) & (df["species"] == "all")]
        assert got["count"].tolist() == total.astype(int).tolist()
        assert got["step"].iloc[0] == spec["step"] and got["time"].iloc[0] == spec["time"]
    assert audit.census_table(ctx, snapshots=[-1])["snapshot"].unique().tolist() == [2]
    with pytest.raises(OptionError):
        audit.census_table(ctx, snapshots=[7])


def test_reductions_are_computed_once_and_columns_not_kept():
    ctx = context(drifting_plasma(n=100, snapshots=2), LAYOUT)
    audit.census_table(ctx)
    frame = ctx.run[0].species["electrons"]
    reads = frame.reads
    assert reads > 0
    audit.census_table(ctx)
    audit.imbalance_table(ctx)
    audit.rank_table(ctx, 0)
    assert frame.reads == reads                      # served from the per-snapshot reduction
    assert not frame._cache                          # the columns read were not kept in memory


def test_rank_table_counts_by_rank_column_for_a_species_without_positions():
    ranks = np.array([0, 1, 1, 4, 1])
    snaps = [{"step": 0, "species": {"tracers": ({"id": np.arange(5), "rank": ranks}, {})}}]
    rt = audit.rank_table(context(snaps, LAYOUT), 0)
    got = rt[(rt["species"] == "tracers") & (rt["count"] > 0)].set_index("rank")["count"]
    # outside source: pandas value_counts of the rank column
    assert got.to_dict() == pd.Series(ranks).value_counts().to_dict()


def test_rank_table_counts_by_rank_column_when_present():
    snaps = drifting_plasma(n=300, snapshots=1)
    cols = snaps[0]["species"]["electrons"][0]
    cols["rank"] = np.where(cols["x"] < 0.5, 0, 7)
    ctx = context(snaps, LAYOUT)
    rt = audit.rank_table(ctx, 0)
    assert list(rt.columns) == audit.RANK_COLUMNS
    e = rt[rt["species"] == "electrons"].set_index("rank")["count"]
    # outside source: pandas value_counts of the rank column
    vc = pd.Series(cols["rank"]).value_counts()
    assert e[e > 0].to_dict() == vc.to_dict()
    ions = rt[rt["species"] == "ions"].set_index("rank")
    assert ions["blocks"].to_dict() == {0: 3, 1: 3, 2: 2}   # 8 blocks dealt to 3 ranks
    imb = audit.imbalance_table(ctx)
    assert list(imb.columns) == audit.IMBALANCE_COLUMNS
    assert set(imb["by"]) == {"rank", "block"}


def _crosstab(ids_a, blk_a, ids_b, blk_b):
    joined = pd.DataFrame({"id": ids_a, "f": blk_a}).merge(pd.DataFrame({"id": ids_b, "t": blk_b}), on="id")
    ct = pd.crosstab(joined["f"], joined["t"]).stack()
    return {(int(a), int(b)): int(c) for (a, b), c in ct[ct > 0].items()}


def test_migration_tables_match_crosstab_and_have_design_columns():
    snaps = drifting_plasma(n=400, snapshots=3)
    # the second electron dump is stored shuffled with 20 particles lost and 5 created
    rng = np.random.default_rng(3)
    cols = snaps[1]["species"]["electrons"][0]
    order = rng.permutation(400)[:380]
    new = {k: np.concatenate([v[order], v[:5]]) for k, v in cols.items()}
    new["id"][-5:] = np.arange(1000, 1005)
    snaps[1]["species"]["electrons"] = (new, snaps[1]["species"]["electrons"][1])
    ctx = context(snaps, LAYOUT)
    mig, summ = audit.migration_tables(ctx)
    assert list(mig.columns) == audit.MIGRATION_COLUMNS
    assert list(summ.columns) == audit.SUMMARY_COLUMNS
    from swarmaudit.core.layout import assign_blocks
    a, b = snaps[0]["species"]["electrons"][0], snaps[1]["species"]["electrons"][0]
    ba = assign_blocks([a["x"], a["y"]], LAYOUT)
    bb = assign_blocks([b["x"], b["y"]], LAYOUT)
    part = mig[(mig["from_snapshot"] == 0) & (mig["species"] == "electrons")]
    got = {(int(r.from_block), int(r.to_block)): int(r.count) for r in part.itertuples()}
    assert got == _crosstab(a["id"], ba, b["id"], bb)
    row = summ[(summ["from_snapshot"] == 0) & (summ["species"] == "electrons")].iloc[0]
    assert (row["matched"], row["created"], row["lost"]) == (380, 5, 20)
    all_row = summ[(summ["from_snapshot"] == 0) & (summ["species"] == "all")].iloc[0]
    assert all_row["matched"] == 380 + 400
    assert summ["to_snapshot"].tolist() == [1, 1, 1, 2, 2, 2]
    traffic = audit.traffic_table(ctx)
    assert list(traffic.columns) == audit.TRAFFIC_COLUMNS
    # every particle sent is received somewhere
    g = traffic.groupby(["from_snapshot", "species"])[["send", "receive"]].sum()
    assert (g["send"] == g["receive"]).all()


def test_snapshot_without_ids_is_skipped_with_a_note():
    snaps = drifting_plasma(n=50, snapshots=3)
    del snaps[1]["species"]["ions"][0]["id"]
    ctx = context(snaps, LAYOUT)
    _, summ = audit.migration_tables(ctx)
    ions = summ[summ["species"] == "ions"]
    assert ions[["from_snapshot", "to_snapshot"]].values.tolist() == []  # both pairs touch snapshot 1
    assert len(summ[summ["species"] == "electrons"]) == 2                 # the rest still runs
    assert any("no id column" in n and "ions" in n for n in ctx.notes)


def test_duplicate_ids_give_a_clear_note():
    snaps = drifting_plasma(n=50, snapshots=2)
    snaps[1]["species"]["electrons"][0]["id"][:3] = 0
    ctx = context(snaps, LAYOUT)
    _, summ = audit.migration_tables(ctx)
    assert "electrons" not in summ["species"].tolist()
    # ids 0, 0, 0: two particles repeat the id of the first one
    assert any("2 particle(s) of the second snapshot repeat an id" in n for n in ctx.notes)


def test_species_in_one_snapshot_only():
    snaps = drifting_plasma(n=40, snapshots=3)
    del snaps[0]["species"]["ions"]
    ctx = context(snaps, LAYOUT)
    _, summ = audit.migration_tables(ctx)
    first = summ[(summ["from_snapshot"] == 0) & (summ["species"] == "ions")].iloc[0]
    assert (first["created"], first["matched"]) == (40, 0)
    drift = audit.drift_table(ctx)
    ions = drift[(drift["species"] == "ions") & (drift["quantity"] == "count")]
    assert ions["snapshot"].tolist() == [1, 2] and (ions["reference"] == 40).all()
    assert any("ions" in n and "compared from snapshot 1" in n for n in ctx.notes)


def test_drift_table_quantities_and_total_energy():
    snaps = drifting_plasma(n=200, snapshots=4)
    ctx = context(snaps, LAYOUT)
    df = audit.drift_table(ctx)
    assert list(df.columns) == audit.DRIFT_COLUMNS
    q = set(df.loc[df["species"] == "electrons", "quantity"])
    assert q == {"count", "weight", "charge", "momentum_x", "momentum_y", "kinetic_energy"}
    assert {"field_energy", "total_energy"} <= set(df.loc[df["species"] == "all", "quantity"])
    at0 = df[df["snapshot"] == 0].set_index(["species", "quantity"])["value"]
    e = snaps[0]["species"]["electrons"][0]
    ke_e = 0.5 * 1.0 * np.sum(e["vx"] ** 2 + e["vy"] ** 2)   # ions are at rest
    assert at0[("electrons", "kinetic_energy")] == pytest.approx(ke_e)
    assert at0[("all", "total_energy")] == pytest.approx(ke_e + 0.25)
    ch = df[(df["species"] == "electrons") & (df["quantity"] == "charge")]
    # (value - reference)/|reference|: -396 against -400 is +1 %
    np.testing.assert_allclose(ch["relative_drift"], [0, 0, 0, 0.01])


def test_check_names_charge_and_snapshot_three():
    ctx = context(drifting_plasma(n=400, snapshots=6, loss_at=3), LAYOUT)
    res = audit.check(ctx, 0.005)
    assert not res.ok
    first = res.failures[0]
    assert (first["quantity"], first["species"], first["snapshot"], first["step"]) == ("charge", "electrons", 3, 30)
    assert "charge" in res.lines[0] and "snapshot 3" in res.lines[0] and "step 30" in res.lines[0]
    assert audit.check(ctx, 0.02).ok
    assert audit.check(ctx, 0.005, quantities=["count", "weight"]).ok
    with pytest.raises(OptionError):
        audit.check(ctx, 0.005, quantities=["entropy"])
    with pytest.raises(OptionError):
        audit.check(ctx, -1)


def test_check_judges_zero_net_charge_against_total_abs_charge():
    snaps = drifting_plasma(n=200, snapshots=3, loss_at=None)
    for s in snaps:   # make the ions' charge cancel the electrons' exactly
        s["species"]["ions"][1]["charge"] = 1.0
    snaps[2]["species"]["electrons"][0]["charge"] = snaps[2]["species"]["electrons"][0]["charge"].copy()
    snaps[2]["species"]["electrons"][0]["charge"][:2] = 0.0   # net +2 out of Σ|w q| = 400
    ctx = context(snaps, LAYOUT)
    df = audit.drift_table(ctx, details=True)
    net = df[(df["species"] == "all") & (df["quantity"] == "charge")]
    assert net["reference"].iloc[0] == 0 and net["relative_drift"].isna().all()
    assert (net["scale"] == 400).all()
    assert audit.check(ctx, 0.01, ["charge"]).ok            # 2/400 = 0.5 %
    bad = audit.check(ctx, 0.004, ["charge"])
    assert not bad.ok and bad.failures[0]["snapshot"] == 2


def test_nan_in_a_column_fails_the_check_and_is_noted():
    snaps = drifting_plasma(n=100, snapshots=3, loss_at=None)
    snaps[2]["species"]["electrons"][0]["vx"] = snaps[2]["species"]["electrons"][0]["vx"].copy()
    snaps[2]["species"]["electrons"][0]["vx"][5] = np.nan
    ctx = context(snaps, LAYOUT)
    res = audit.check(ctx, 0.5)
    assert not res.ok
    f = res.failures[0]
    assert f["quantity"] == "momentum_x" and f["snapshot"] == 2 and f["reason"] == "non-finite"
    assert "non-finite" in res.lines[0]
    assert any("non-finite" in n for n in ctx.notes)


def test_halo_and_rebalance_tables():
    ctx = context(drifting_plasma(n=300, snapshots=1), LAYOUT)
    h = audit.halo_table(ctx, 0)
    assert set(h["species"]) == {"electrons", "ions", "all"}
    a = h[h["species"] == "all"].set_index("block")
    parts = h[h["species"] != "all"].groupby("block")[["count", "halo"]].sum()
    assert (a[["count", "halo"]] == parts).all().all()
    r = audit.rebalance_table(ctx, 0)
    assert r["strategy"].tolist() == ["current", "morton", "hilbert", "greedy"]
