"""The partitioned engine gives the in-memory answers, piece by piece.

Each reducer is checked two ways: against the in-memory diagnostic on the
whole frame (the same answer, row for row), and against an outside reference
(numpy.histogram2d, pandas value_counts / merge / crosstab, numpy sums).
Frames are split over per-rank parts and into row ranges, with a piece size
small enough that every test runs on several partitions.
"""

from __future__ import annotations

import time

import numpy as np
import pandas as pd
import pytest

from _rank_runs import memory_frame as _frame
from _rank_runs import ranks_from_cuts, write_rank_snapshot
from _rank_runs import split_frame as _split

from swarmaudit.engine import dask_backend as dk
from swarmaudit.engine import pieces as partitions
from swarmaudit.core.context import AuditContext
from swarmaudit.core.errors import OptionError
from swarmaudit.core.layout import BlockLayout, assign_blocks, regular_layout


@pytest.fixture(autouse=True)
def small_pieces(monkeypatch):
    # a few kB per piece: every frame below is cut into many partitions
    monkeypatch.setattr(partitions, "PIECE_ROWS", 256)


@pytest.fixture(scope="module")
def engine():
    return dk.client_for()


def _particles(n=5000, seed=3, float32=False):
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, 1, n)
    y = rng.normal(0.5, 0.2, n)      # some fall outside [0, 1): block -1
    if float32:
        x, y = x.astype(np.float32), y.astype(np.float32)
    return {"x": x, "y": y, "vx": rng.normal(0, 1, n), "vy": rng.normal(0, 2, n),
            "weight": rng.uniform(0.5, 2.0, n), "id": rng.permutation(n).astype(np.int64)}


def _refined():
    # two level-0 blocks and one refined block on level 1 inside the first (not a regular grid)
    lower = [[0.0, 0.0], [0.5, 0.0], [0.125, 0.25]]
    upper = [[0.5, 1.0], [1.0, 1.0], [0.375, 0.5]]
    return BlockLayout(lower, upper, [0, 0, 1], [0, 1, 1], [0, 0], [1, 1], [8, 8], (True, False),
                       block_id=[10, 11, 20])


def test_pieces_cover_every_row_in_order():
    data = _particles(1000)
    frame = _split(data, [300, 300, 650], ranks=[4, 5, 6, 7])
    pieces = partitions.frame_pieces(frame, ["x", "y"])
    assert len(pieces) > 4                      # parts were cut into row ranges
    got = np.concatenate([partitions.read_column(p, "x") for p in pieces])
    np.testing.assert_array_equal(got, data["x"])
    ranks = np.concatenate([partitions.read_column(p, "rank") for p in pieces])
    np.testing.assert_array_equal(ranks, np.repeat([4, 5, 6, 7], [300, 0, 350, 350]))
    assert [p.offset for p in pieces] == sorted(p.offset for p in pieces)


def test_whole_read_parts_are_not_cut():
    # a loader that can only read everything would be read once per piece if cut
    frame = _split(_particles(1000), [500], rows=False)
    pieces = partitions.frame_pieces(frame, ["x", "y"])
    assert len(pieces) == 2 and all(p.whole for p in pieces)


def test_frame_to_dask_keeps_rows_and_dtypes():
    data = _particles(2000, float32=True)
    frame = _split(data, [700, 1500])
    ddf = dk.frame_to_dask(frame, ["x", "y", "id"])
    assert ddf.npartitions > 3
    assert ddf.dtypes["x"] == np.float32            # float32 is not widened
    got = ddf.compute(scheduler="sync")
    pd.testing.assert_frame_equal(got, pd.DataFrame({c: data[c] for c in ("x", "y", "id")}))


def _drawn_on_dask(frame, xcol, ycol, scheduler=None, **kw):
    """The image ``--engine dask`` draws: the image accumulator over the frame's pieces, on dask."""
    from swarmaudit.app.render import aggregate_points
    dk.configure("dask", scheduler)
    try:
        return aggregate_points(frame, xcol, ycol, **kw)
    finally:
        dk.configure("auto")


@pytest.mark.parametrize("reduction", ["count", "sum", "mean"])
def test_aggregate_matches_histogram2d_and_in_memory(reduction):
    from swarmaudit.app.render import aggregate_points
    data = _particles(6000)
    data["x"][:7] = np.nan                    # counted as non-finite, not drawn
    frame = _split(data, [2000, 4100])
    kw = dict(width=40, height=30, reduction=reduction, value=None if reduction == "count" else "weight")
    agg = _drawn_on_dask(frame, "x", "y", **kw)
    ref = aggregate_points(_frame(data), "x", "y", **kw)
    np.testing.assert_allclose(np.nan_to_num(agg.values), np.nan_to_num(ref.values), rtol=1e-12)
    assert agg.attrs["nonfinite"] == 7 == ref.attrs["nonfinite"]
    assert agg.attrs["x_range"] == ref.attrs["x_range"]
    if reduction == "count":
        # numpy.histogram2d over the same closed range (top edge in the last bin)
        ok = np.isfinite(data["x"])
        h, _, _ = np.histogram2d(data["y"][ok], data["x"][ok], bins=(30, 40),
                                 range=[agg.attrs["y_range"], agg.attrs["x_range"]])
        np.testing.assert_array_equal(agg.values, h)


def test_aggregate_slab_keeps_only_its_rows():
    data = _particles(3000)
    frame = _split(data, [1000])
    agg = _drawn_on_dask(frame, "x", "y", width=10, height=10, x_range=(0, 1), y_range=(0, 1),
                         slab=("vx", -0.5, 0.5))
    keep = (data["vx"] >= -0.5) & (data["vx"] < 0.5)
    h, _, _ = np.histogram2d(data["y"][keep], data["x"][keep], bins=10, range=[(0, 1), (0, 1)])
    np.testing.assert_array_equal(agg.values, h)


def _census(frame, layout, where):
    from swarmaudit.diagnostics.census import Census
    from swarmaudit.engine.reduce import reduce
    return reduce(Census.of_frame(frame, layout, weight_default=None), frame, where=where)


@pytest.mark.parametrize("where", ["serial", "threads", "dask"])
@pytest.mark.parametrize("layout_kind", ["regular", "refined"])
@pytest.mark.parametrize("weights", ["column", "attribute", "none"])
def test_census_equals_in_memory_census(layout_kind, weights, where):
    from swarmaudit.diagnostics.census import block_census, level_census, rank_census
    data = _particles(5000)
    attrs = {}
    if weights == "attribute":
        attrs["weight"] = 2.5
    if weights != "column":
        data.pop("weight")
    layout = (regular_layout([0, 1, 0, 1], [8, 8], [4, 2], ranks=3) if layout_kind == "regular"
              else _refined())
    frame = _split(data, [1200, 3300], attrs=attrs)
    got = _census(frame, layout, where)
    whole = _frame(data, attrs=attrs)
    ids = assign_blocks(whole.positions(), layout)
    w = whole.per_particle("weight", None)
    for name, ref in (("block", block_census(ids, layout, w)), ("rank", rank_census(ids, layout, w)),
                      ("level", level_census(ids, layout, w))):
        pd.testing.assert_frame_equal(got[name], ref, check_exact=False, rtol=1e-12)
    # outside reference: pandas counting the block ids directly
    vc = pd.Series(ids).value_counts()
    blk = got["block"].set_index("block")["count"]
    assert blk[blk > 0].sort_index().to_dict() == vc.sort_index().to_dict()


@pytest.mark.parametrize("where", ["serial", "threads", "dask"])
def test_census_with_a_rank_column_counts_where_particles_live(where):
    from swarmaudit.diagnostics.census import rank_census
    data = _particles(4000)
    layout = regular_layout([0, 1, 0, 1], [4, 4], [2, 2], ranks=2)
    frame = _split(data, [1000, 2500], ranks=[0, 1, 5])   # rank 5 owns no block
    got = _census(frame, layout, where)["rank"]
    ids = assign_blocks([data["x"], data["y"]], layout)
    prank = np.repeat([0, 1, 5], [1000, 1500, 1500])
    ref = rank_census(ids, layout, data["weight"], particle_rank=prank)
    pd.testing.assert_frame_equal(got, ref, check_exact=False, rtol=1e-12)
    assert got.set_index("rank").loc[5, "count"] == 1500   # by construction of the parts


@pytest.mark.parametrize("where", ["serial", "threads", "dask"])
@pytest.mark.parametrize("compiled", [True, False])
def test_totals_equal_snapshot_totals(where, compiled):
    from swarmaudit.diagnostics.drift import Totals, snapshot_totals
    from swarmaudit.engine.reduce import reduce
    data = _particles(5000)
    data["vx"][[5, 900]] = np.inf
    attrs = {"mass": 2.0, "charge": -1.0}
    frame = _split(data, [1700, 2900], attrs=attrs)
    got_v, got_bad = reduce(Totals.of_frame(frame, compiled=compiled), frame, where=where)
    ref_v, ref_bad = snapshot_totals(_frame(data, attrs=attrs), with_nonfinite=True)
    assert got_bad == ref_bad and got_bad["momentum_x"] == 2
    assert got_v.keys() == ref_v.keys()
    for k in ref_v:
        assert got_v[k] == pytest.approx(ref_v[k], rel=1e-12, abs=1e-12)
    # outside reference: numpy sums of the weighted terms
    ok = np.isfinite(data["vx"])
    assert got_v["momentum_x"] == pytest.approx(np.sum((data["weight"] * 2.0 * data["vx"])[ok]),
                                                rel=1e-12)
    assert got_v["charge"] == pytest.approx(-np.sum(data["weight"]), rel=1e-12)


def _pair(n=4000, seed=5):
    rng = np.random.default_rng(seed)
    a = _particles(n, seed)
    b = {k: v.copy() for k, v in a.items()}
    order = rng.permutation(n)
    b = {k: v[order] for k, v in b.items()}
    b["x"] = (b["x"] + rng.normal(0, 0.05, n)) % 1.0     # periodic in x
    b["y"] = b["y"] + rng.normal(0, 0.02, n)
    keep = rng.random(n) > 0.05                            # some lost ...
    b = {k: v[keep] for k, v in b.items()}
    new = 300                                              # ... some created, past the old ids
    extra = _particles(new, seed + 1)
    extra["id"] = np.arange(n, n + new, dtype=np.int64)
    b = {k: np.concatenate([b[k], extra[k]]) for k in b}
    return a, b


def _migration(fa, fb, layout, where="dask", steps=None):
    from swarmaudit.diagnostics.migration import Migration
    from swarmaudit.engine.reduce import reduce
    return reduce(Migration.of_frames(fa, fb, layout, steps=steps), [fa, fb], where=where)


@pytest.mark.parametrize("where", ["serial", "threads", "dask"])
def test_migration_equals_in_memory_migrate(where):
    from swarmaudit.diagnostics.migration import migrate
    a, b = _pair()
    layout = regular_layout([0, 1, 0, 1], [16, 16], [4, 4], periodic=("x",), ranks=4)
    fa, fb = _split(a, [1000, 3000]), _split(b, [500, 2000, 3500])
    got = _migration(fa, fb, layout, where, steps=2)
    ref = migrate(a["id"], b["id"], assign_blocks([a["x"], a["y"]], layout),
                  assign_blocks([b["x"], b["y"]], layout), [a["x"], a["y"]], [b["x"], b["y"]],
                  layout, steps=2)
    assert got.summary() == pytest.approx(ref.summary())
    pd.testing.assert_frame_equal(got.transfer, ref.transfer)
    pd.testing.assert_frame_equal(got.traffic, ref.traffic)
    # outside reference: pandas.merge on the id, crosstab of block pairs
    ba = pd.DataFrame({"id": a["id"], "fb": assign_blocks([a["x"], a["y"]], layout)})
    bb = pd.DataFrame({"id": b["id"], "tb": assign_blocks([b["x"], b["y"]], layout)})
    m = ba.merge(bb, on="id", how="outer", indicator=True)
    assert got.matched == int((m["_merge"] == "both").sum())
    assert got.lost == int((m["_merge"] == "left_only").sum())
    assert got.created == int((m["_merge"] == "right_only").sum()) == 300
    both = m[m["_merge"] == "both"]
    ct = pd.crosstab(both["fb"], both["tb"]).stack()
    ct = ct[ct > 0]
    assert dict(zip(zip(got.transfer["from_block"], got.transfer["to_block"]), got.transfer["count"])) \
        == {k: int(v) for k, v in ct.items()}


def test_migration_with_rank_columns_and_float32(engine):
    from swarmaudit.diagnostics.migration import migrate
    a, b = _pair(3000, seed=9)
    for d in (a, b):
        d["x"], d["y"] = d["x"].astype(np.float32), d["y"].astype(np.float32)
        d["rank"] = (d["x"] * 3).astype(np.int32)
    layout = _refined()
    got = _migration(_split(a, [1000]), _split(b, [1500]), layout)
    ref = migrate(a["id"], b["id"], assign_blocks([a["x"], a["y"]], layout),
                  assign_blocks([b["x"], b["y"]], layout), [a["x"], a["y"]], [b["x"], b["y"]],
                  layout, rank_a=a["rank"], rank_b=b["rank"])
    assert got.summary() == pytest.approx(ref.summary())
    pd.testing.assert_frame_equal(got.traffic, ref.traffic)


@pytest.mark.parametrize("side", ["first", "second"])
def test_migration_refuses_repeated_ids(side, engine):
    from swarmaudit.diagnostics.migration import DuplicateKeyError
    a, b = _pair(2000)
    d = a if side == "first" else b
    d["id"][1500] = d["id"][10]          # across pieces
    d["id"][11] = d["id"][12]            # within one piece
    with pytest.raises(DuplicateKeyError) as err:
        _migration(_split(a, [1000]), _split(b, [1000]), regular_layout([0, 1, 0, 1], [4, 4], [2, 2]))
    assert err.value.side == side and err.value.count == 2


def test_sparse_ids_fall_back_to_the_in_memory_match(engine):
    from swarmaudit.diagnostics.migration import migrate
    a, b = _pair(1000)
    a["id"] = a["id"] * 10**9
    b["id"] = b["id"] * 10**9
    layout = regular_layout([0, 1, 0, 1], [4, 4], [2, 2])
    got = _migration(_split(a, [400]), _split(b, [400]), layout)
    ref = migrate(a["id"], b["id"], assign_blocks([a["x"], a["y"]], layout),
                  assign_blocks([b["x"], b["y"]], layout), [a["x"], a["y"]], [b["x"], b["y"]], layout)
    assert got.summary() == pytest.approx(ref.summary())


def test_engine_choice(monkeypatch):
    import psutil
    frame = _frame(_particles(1000))
    ctx = AuditContext(run=None, engine="auto")
    assert not dk.use_dask(ctx, frame, ["x", "y"])
    assert dk.use_dask(AuditContext(run=None, engine="dask"), frame, ["x"])
    assert not dk.use_dask(AuditContext(run=None, engine="memory", scheduler="tcp://h:1"), frame, ["x"])
    assert dk.use_dask(AuditContext(run=None, scheduler="tcp://h:1"), frame, ["x"])

    class Small:
        available = 16_000 * 3       # bytes: two float64 columns of 1000 rows fit, times 3 do not
    monkeypatch.setattr(psutil, "virtual_memory", lambda: Small)
    monkeypatch.setattr(dk, "_available", [float("-inf"), 0])    # forget the last reading
    assert dk.use_dask(ctx, frame, ["x", "y"])
    assert not dk.use_dask(ctx, frame, ["x"])


def test_unreachable_scheduler_is_an_option_error(monkeypatch):
    monkeypatch.setenv("SWARMAUDIT_DASK_TIMEOUT", "1s")
    with pytest.raises(OptionError, match="no dask scheduler"):
        dk.client_for(address="tcp://127.0.0.1:9")


def test_a_closed_port_is_given_up_after_the_short_connect_timeout(monkeypatch):
    # a functional limit, not a speed claim: dask's own connect timeout is 30 s, a command
    # with a wrong --scheduler should say so in seconds
    import socket
    from dask.utils import parse_timedelta
    monkeypatch.delenv("SWARMAUDIT_DASK_TIMEOUT", raising=False)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        address = f"tcp://127.0.0.1:{s.getsockname()[1]}"     # closed once the block ends
    t0 = time.monotonic()
    with pytest.raises(OptionError, match="no dask scheduler answers there") as err:
        dk.client_for(address=address)
    waited = time.monotonic() - t0
    assert parse_timedelta(dk.CONNECT_TIMEOUT) <= 5
    assert waited < parse_timedelta(dk.CONNECT_TIMEOUT) + 10, waited
    assert address in str(err.value) and address not in dk._engines


@pytest.mark.parametrize("address,why", [("tcp://127.0.0.1:notaport", "the port 'notaport' is not a number"),
                                         ("udp://127.0.0.1:8786", "unknown address scheme"),
                                         ("tcp://127.0.0.1:0", "port from 1 to 65535"),
                                         ("", "missing port")])
def test_a_malformed_scheduler_address_is_refused_without_connecting(address, why):
    with pytest.raises(OptionError, match="is not a scheduler address") as err:
        dk.client_for(address=address) if address else dk.connect_scheduler(
            AuditContext(run=None, scheduler=address))
    assert why in str(err.value) and repr(address) in str(err.value)


def test_a_scheduler_without_workers_is_an_option_error(monkeypatch):
    # every task would wait for a worker for ever: the command stops with one line instead
    from distributed import LocalCluster
    monkeypatch.setenv("SWARMAUDIT_DASK_TIMEOUT", "0.5s")
    with LocalCluster(n_workers=0, processes=False, dashboard_address=None) as cluster:
        with pytest.raises(OptionError, match="the scheduler has no workers"):
            dk.client_for(address=cluster.scheduler_address)
        assert cluster.scheduler_address not in dk._engines
    # --engine memory never uses a scheduler: it is not contacted
    dk.connect_scheduler(AuditContext(run=None, engine="memory", scheduler="tcp://127.0.0.1:9"))


def test_drawing_follows_the_configured_engine(engine):
    from swarmaudit.app import render
    data = _particles(4000)
    whole = _frame(data)
    ref = render.aggregate_points(whole, "x", "y", width=32, height=24, reduction="sum", value="weight")
    frame = _split(data, [1500, 2500])
    dk.configure("dask")
    try:
        assert dk.partitioned(frame, ["x", "y"])
        agg = render.aggregate_points(frame, "x", "y", width=32, height=24, reduction="sum",
                                      value="weight")
        assert render.data_range(frame, "y") == render.data_range(whole, "y")
    finally:
        dk.configure("auto")
    # drawn from pieces: the joined frame holds no column
    assert all(partitions.cached_column(frame, c) is None for c in frame.columns)
    np.testing.assert_allclose(np.nan_to_num(agg.values), np.nan_to_num(ref.values), rtol=1e-12)
    assert {k: agg.attrs[k] for k in ref.attrs} == ref.attrs
    assert agg.name == ref.name
    assert not dk.partitioned(frame, ["x", "y"])
    with pytest.raises(OptionError):
        dk.configure("fast")


@pytest.mark.parametrize("compiled", [True, False])
def test_finite_stats_agree_with_numpy(compiled, monkeypatch):
    from swarmaudit.diagnostics import _colstats
    monkeypatch.setattr(_colstats, "MIN_VALUES", 0 if compiled else 10**12)
    rng = np.random.default_rng(4)
    a = rng.normal(size=5000)
    a[[3, 70]] = np.nan
    a[[9]] = -np.inf
    for arr in (a, a.astype(np.float32), rng.integers(-5, 9, 100)):
        fin = arr[np.isfinite(arr)] if arr.dtype.kind == "f" else arr
        # outside reference: numpy min/max over the finite values, count of the others
        assert _colstats.finite_stats(arr) == (float(fin.min()), float(fin.max()), arr.size - fin.size)
    assert _colstats.finite_stats(np.full(10, np.nan)) == (None, None, 10)
    assert _colstats.finite_stats(np.zeros(0)) == (None, None, 0)


def _rank_files(folder, data, cuts, step=10):
    """Per-rank HDF5 files of one snapshot of electrons, cut at ``cuts``, as a simulation writes them."""
    write_rank_snapshot(folder, step, {"electrons": (data, {"mass": 1.0, "charge": -1.0},
                                                     ranks_from_cuts(len(data["x"]), cuts))})
    return folder


def test_a_scheduler_in_other_processes_gives_the_same_answers(tmp_path):
    # a real dask.distributed scheduler with a worker process: loaders, pieces and frame
    # templates must travel by pickle, and the worker reads the files itself
    from distributed import LocalCluster

    from swarmaudit.diagnostics.census import block_census
    from swarmaudit.readers.discover import open_run
    data = _particles(6000)
    run = open_run(str(_rank_files(tmp_path, data, [2000, 3500])))
    frame = run[0].frame("electrons")
    layout = regular_layout([0, 1, 0, 1], [8, 8], [4, 4], ranks=3)
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, dashboard_address=None,
                      silence_logs=40) as cluster:
        eng = dk.client_for(address=cluster.scheduler_address)
        try:
            assert eng.kind == "distributed" and eng.workers == 1
            ctx = AuditContext(run=None, scheduler=cluster.scheduler_address)
            from swarmaudit.diagnostics.census import Census
            from swarmaudit.engine.reduce import reduce
            got = reduce(Census.of_frame(frame, layout), frame, ctx)["block"]
            agg = _drawn_on_dask(frame, "x", "y", cluster.scheduler_address, width=20, height=10)
        finally:
            dk.close_engine(eng)
    ids = assign_blocks([data["x"], data["y"]], layout)
    pd.testing.assert_frame_equal(got, block_census(ids, layout, data["weight"]), check_exact=False,
                                  rtol=1e-12)
    h, _, _ = np.histogram2d(data["y"], data["x"], bins=(10, 20),
                             range=[agg.attrs["y_range"], agg.attrs["x_range"]])
    np.testing.assert_array_equal(agg.values, h)
    assert frame.reads == 0          # every column was read in the worker process


@pytest.mark.parametrize("fmt", ["h5", "npy"])
def test_one_big_file_is_read_in_row_ranges(fmt, tmp_path, engine):
    # one file, no per-rank parts: the readers' row reads (HDF5 hyperslabs, record slices)
    # cut it into pieces, and each piece reads only its rows
    import h5py

    from swarmaudit.diagnostics.census import block_census
    from swarmaudit.readers.discover import open_run
    data = _particles(6000)
    if fmt == "h5":
        with h5py.File(tmp_path / "snap_0001.h5", "w") as fh:
            g = fh.create_group("electrons")
            for c, a in data.items():
                g[c] = a
    else:
        rec = np.empty(6000, dtype=[(c, a.dtype) for c, a in data.items()])
        for c, a in data.items():
            rec[c] = a
        np.save(tmp_path / "snap_0001.npy", rec)
    frame = next(iter(open_run(str(tmp_path))[0].species.values()))
    pieces = partitions.frame_pieces(frame, ["x", "y"])
    assert len(pieces) > 5 and not any(p.whole for p in pieces)
    assert partitions.column_dtype(frame, "id") == np.int64      # known before any read
    layout = regular_layout([0, 1, 0, 1], [8, 8], [4, 4])
    got = _census(frame, layout, "dask")["block"]
    ids = assign_blocks([data["x"], data["y"]], layout)
    pd.testing.assert_frame_equal(got, block_census(ids, layout, data["weight"]), check_exact=False,
                                  rtol=1e-12)
    assert frame.reads == 3          # x, y and weight, in pieces; no other column


def test_audit_tables_are_the_same_through_either_engine(tmp_path, monkeypatch):
    # the whole path a command takes: per-rank files, open_run, core.audit tables
    from swarmaudit.audit import tables as audit
    from swarmaudit.readers.discover import open_run
    monkeypatch.setenv("SWARMAUDIT_CACHE", "off")
    a, b = _pair(3000, seed=11)
    for d in (a, b):
        d.pop("vy")
    run_dir = tmp_path / "run"
    _rank_files(run_dir, a, [1000, 2200], step=10)
    _rank_files(run_dir, b, [1500, 2000], step=20)   # as many files as the first: a complete step
    layout = regular_layout([0, 1, 0, 1], [16, 16], [4, 4], periodic=("x",), ranks=3)
    tables = {}
    for engine in ("memory", "dask"):
        ctx = AuditContext(open_run(str(run_dir)), fixed_layout=layout, engine=engine)
        mig, summ = audit.migration_tables(ctx)
        tables[engine] = (audit.census_table(ctx), audit.rank_table(ctx, 1), mig, summ,
                          audit.drift_table(ctx))
    for got, ref in zip(tables["dask"], tables["memory"]):
        pd.testing.assert_frame_equal(got, ref, check_exact=False, rtol=1e-12, atol=1e-12)
    assert tables["dask"][3]["created"].iloc[0] == 300


@pytest.mark.parametrize("compiled", [True, False])
def test_counts_and_sums_equal_numpy_bincount(compiled, monkeypatch):
    from swarmaudit.diagnostics import _bincount
    monkeypatch.setattr(_bincount, "MIN_VALUES", 0 if compiled else 10**12)
    rng = np.random.default_rng(8)
    slots = rng.integers(0, 37, 20_000)
    w = rng.random(20_000)
    c, s = _bincount.counts_and_sums(slots, w, 40)
    # outside reference: numpy.bincount, same order of addition, so equal to the last bit
    np.testing.assert_array_equal(c, np.bincount(slots, minlength=40))
    np.testing.assert_array_equal(s, np.bincount(slots, weights=w, minlength=40))
    c1, s1 = _bincount.counts_and_sums(slots, 2.5, 40)
    np.testing.assert_array_equal(s1, np.bincount(slots, minlength=40) * 2.5)
    with pytest.raises(ValueError):
        _bincount.counts_and_sums(np.array([0, 40]), None, 40)
