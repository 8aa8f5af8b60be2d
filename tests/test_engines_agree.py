"""Every engine gives the same tables: serial, the thread pool and dask, through audit.tables.

The run (tests/_rank_runs.py) is per-rank HDF5 files over several snapshots with a refined,
non-regular layout, a periodic x axis, float32 and float64 columns, particles lost and
created, uneven step gaps. Pieces are made small so every frame is cut into many.

How the engines must agree (engine/reduce.py): the cut into pieces and tasks depends on the
frames only and task states merge in row order, so engines on the same cut give the same
tables bit for bit; a different cut (the default piece size) changes float totals only by
the rounding of compensated sums (rtol 1e-12) and never a count.

The over-one-cell rule (common practice: an explicit pusher moves no particle more than one
cell per step, the Courant-type limit) is checked against a brute-force count from the stored
positions: numpy.intersect1d matching by id, and on the periodic axis the minimum image as the
smallest of the three images |d - L|, |d|, |d + L|. A particle moved exactly ``steps`` cells
over ``steps`` steps is not over; one moved a hair more is.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from _rank_runs import CELLS, DOMAIN, STEPS, refined_layout, split_frame, write_moving_run

from swarmaudit.audit import tables as audit
from swarmaudit.core.context import AuditContext
from swarmaudit.core.layout import regular_layout
from swarmaudit.engine import pieces, reduce as reduce_mod
from swarmaudit.readers.discover import open_run

ENGINES = ("serial", "threads", "dask")


@pytest.fixture(scope="module")
def moving_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("moving") / "run"
    written, marked, layout = write_moving_run(folder)
    return str(folder), written, marked, layout


def _context(folder, engine: str, monkeypatch) -> AuditContext:
    if engine == "serial":   # the thread pool's path with one worker is this thread, piece by piece
        monkeypatch.setattr(reduce_mod, "piece_workers", lambda: 1)
    else:
        monkeypatch.setattr(reduce_mod, "piece_workers", pieces.piece_workers)
    return AuditContext(open_run(folder), engine="dask" if engine == "dask" else "memory",
                        use_cache=False)


def _tables(ctx) -> dict:
    mig, summ = audit.migration_tables(ctx)
    out = {"census": audit.census_table(ctx), "migration": mig, "migration_summary": summ,
           "traffic": audit.traffic_table(ctx), "drift": audit.drift_table(ctx),
           "imbalance": audit.imbalance_table(ctx)}
    for i in range(len(ctx.run)):
        out[f"rank_{i}"] = audit.rank_table(ctx, i)
    return out


def _all_tables(folder, engine, monkeypatch, piece_rows):
    monkeypatch.setattr(pieces, "PIECE_ROWS", piece_rows)
    ctx = _context(folder, engine, monkeypatch)
    got = _tables(ctx)
    return got, ctx


def _assert_same(got: dict, ref: dict, exact: bool):
    assert got.keys() == ref.keys()
    for name in ref:
        g, r = got[name], ref[name]
        assert len(r) > 0, name                   # a table that can differ
        assert list(g.columns) == list(r.columns), name
        for col in r.columns:
            if r[col].dtype.kind == "f" and not exact:
                np.testing.assert_allclose(g[col].to_numpy(), r[col].to_numpy(), rtol=1e-12,
                                           atol=0, equal_nan=True, err_msg=f"{name}.{col}")
            else:   # counts, ids, names, and every column when the cut is the same: bit for bit
                pd.testing.assert_series_equal(g[col], r[col], check_exact=True, obj=f"{name}.{col}")


@pytest.fixture(autouse=True)
def no_disk_cache(monkeypatch):
    monkeypatch.setenv("SWARMAUDIT_CACHE", "off")


def test_every_engine_gives_the_same_tables(moving_run, monkeypatch):
    folder = moving_run[0]
    runs = {}
    for engine in ENGINES:
        runs[engine], ctx = _all_tables(folder, engine, monkeypatch, piece_rows=97)
        # many pieces per frame, and several tasks per per-rank part
        frame = ctx.run[1].species["electrons"]
        cut = reduce_mod.tasks_of([frame], [("x", "y")])
        assert len(pieces.frame_pieces(frame, ["x", "y"])) >= 30 and len(cut) > 3
    for engine in ENGINES[1:]:
        _assert_same(runs[engine], runs["serial"], exact=True)
    # the default cut (one piece per part here): counts equal, float totals to rounding
    whole, _ = _all_tables(folder, "threads", monkeypatch, piece_rows=pieces.PIECE_ROWS)
    _assert_same(whole, runs["serial"], exact=False)
    # the run has what the tables must get right
    summ = runs["serial"]["migration_summary"]
    assert (summ["created"] > 0).all() and (summ["lost"] > 0).all()
    census = runs["serial"]["census"]
    assert set(census["level"]) == {-1, 0, 1} and set(census["rank"]) == {-1, 0, 1, 2}


def test_reduce_many_on_every_engine_is_bit_for_bit(moving_run, monkeypatch):
    # the runner itself, without the tables: census, totals and migration jobs reduced together
    from swarmaudit.diagnostics.census import Census
    from swarmaudit.diagnostics.drift import Totals
    from swarmaudit.diagnostics.migration import Migration
    folder, _, _, layout = moving_run
    monkeypatch.setattr(pieces, "PIECE_ROWS", 61)
    run = open_run(folder)
    results = {}
    for where in reduce_mod.PLACES:
        fa, fb = run[0].species["ions"], run[1].species["ions"]
        jobs = [(Census.of_frame(fa, layout), fa), (Totals.of_frame(fb), fb),
                (Migration.of_frames(fa, fb, layout, steps=STEPS[1] - STEPS[0]), [fa, fb])]
        results[where] = reduce_mod.reduce_many(jobs, where=where)
    ref = results["serial"]
    for where in reduce_mod.PLACES[1:]:
        census, (totals, bad), mig = results[where]
        for key in ("block", "rank", "level"):
            pd.testing.assert_frame_equal(census[key], ref[0][key], check_exact=True)
        assert totals == ref[1][0] and bad == ref[1][1]        # floats compared with ==
        assert mig.summary() == ref[2].summary()
        pd.testing.assert_frame_equal(mig.transfer, ref[2].transfer)
        pd.testing.assert_frame_equal(mig.traffic, ref[2].traffic)


def _min_image_cells(a, b, axis: int, periodic: bool) -> np.ndarray:
    lo, hi = DOMAIN[2 * axis], DOMAIN[2 * axis + 1]
    h = (hi - lo) / CELLS[axis]
    d = b.astype(np.float64) - a.astype(np.float64)
    if periodic:   # brute force over the neighbouring images, not the rounding formula
        length = hi - lo
        d = np.min(np.abs(np.stack([d - length, d, d + length])), axis=0)
    return np.abs(d) / h


def _brute_force(written, a: int, b: int, species: str, periodic=(True, False)):
    """(matched, over one cell per step, exactly at the limit, max displacement) by numpy."""
    sa, sb = written[a][species], written[b][species]
    _, ia, ib = np.intersect1d(sa["id"], sb["id"], assume_unique=True, return_indices=True)
    disp = np.max([_min_image_cells(sa[c][ia], sb[c][ib], k, periodic[k])
                   for k, c in enumerate(("x", "y"))], axis=0)
    steps = STEPS[b] - STEPS[a]
    return (len(ia), int(np.count_nonzero(disp > steps)), int(np.count_nonzero(disp == steps)),
            float(disp.max()), sa["id"][ia], disp)


@pytest.mark.parametrize("engine", ENGINES)
def test_over_one_cell_against_brute_force(moving_run, engine, monkeypatch):
    folder, written, marked, _ = moving_run
    monkeypatch.setattr(pieces, "PIECE_ROWS", 97)
    summ = audit.migration_tables(_context(folder, engine, monkeypatch))[1].set_index(
        ["from_snapshot", "species"])
    for a in range(len(STEPS) - 1):
        total = 0
        for species in ("electrons", "ions"):
            matched, over, at_limit, widest, ids, disp = _brute_force(written, a, a + 1, species)
            row = summ.loc[(a, species)]
            assert row["matched"] == matched
            assert row["over_one_cell"] == over
            assert row["max_displacement_cells"] == pytest.approx(widest, rel=1e-12)
            # the marked particles: exactly `steps` cells is on the limit, not over it; a hair
            # more is over (so the brute force above really meets the boundary case)
            steps = STEPS[a + 1] - STEPS[a]
            by_id = dict(zip(ids.tolist(), disp.tolist()))
            assert [by_id[i] for i in marked[species].exact] == [steps] * len(marked[species].exact)
            assert all(steps < by_id[i] < steps + 1e-3 for i in marked[species].hair)
            assert at_limit >= len(marked[species].exact)
            total += over
        assert summ.loc[(a, "all"), "over_one_cell"] == total


def test_periodic_axis_uses_the_minimum_image(moving_run, monkeypatch):
    # the same run read with no periodic axis: the marked particle that crosses the x edge now
    # moves most of the box; the brute force without images agrees with the tables again
    folder, written, marked, stored = moving_run
    monkeypatch.setattr(pieces, "PIECE_ROWS", 97)
    flat = regular_layout(DOMAIN, CELLS, (4, 2), ranks=3)
    ctx = AuditContext(open_run(folder), fixed_layout=flat, engine="dask", use_cache=False)
    summ = audit.migration_tables(ctx)[1].set_index(["from_snapshot", "species"])
    for a in range(len(STEPS) - 1):
        for species in ("electrons", "ions"):
            periodic = _brute_force(written, a, a + 1, species)
            open_box = _brute_force(written, a, a + 1, species, periodic=(False, False))
            row = summ.loc[(a, species)]
            assert row["over_one_cell"] == open_box[1]
            assert row["max_displacement_cells"] == pytest.approx(open_box[3], rel=1e-12)
            assert open_box[1] > periodic[1]     # wrapping moves count as long ones without images
    assert stored.periodic == (True, False) and flat.periodic == (False, False)


@pytest.mark.parametrize("where", reduce_mod.PLACES)
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_one_unit_in_the_last_place_past_the_limit_is_over(where, dtype, monkeypatch):
    # the rule at the resolution of the stored numbers: displaced exactly `steps` cells is not
    # over one cell per step; displaced by the least step more that the numbers can hold is
    from swarmaudit.diagnostics.migration import Migration
    from swarmaudit.engine.reduce import reduce
    monkeypatch.setattr(pieces, "PIECE_ROWS", 3)
    layout = refined_layout()
    h = (DOMAIN[1] - DOMAIN[0]) / CELLS[0]
    steps = 5
    xa = np.array([0.25, 0.5, 1.75, 1.0, 0.25, 0.5, 1.75, 1.0], dtype=dtype)
    move = np.array([1, -1, 1, 0, 1, -1, 1, 0]) * steps * h
    xb = np.mod(xa.astype(np.float64) + move, 2.0).astype(dtype)
    ya = np.array([0.5, 0.5, 0.5, 0.125, 0.5, 0.5, 0.5, 0.125], dtype=dtype)
    yb = ya + np.array([0, 0, 0, 1, 0, 0, 0, 1]) * steps * h
    yb = yb.astype(dtype)
    # the last four a hair further in the direction of their move: one unit in the last place
    # of the box's largest coordinate, the least step every position in the box resolves
    hair = np.spacing(dtype(DOMAIN[1]))
    xb[4:7] += np.array([1, -1, 1], dtype=dtype) * hair
    yb[7] += hair
    assert (xb[4:7] != xb[:3]).all() and yb[7] != yb[3] and xb.dtype == yb.dtype == dtype
    cols_a = {"x": xa, "y": ya, "id": np.arange(8)}
    cols_b = {"x": xb, "y": yb, "id": np.arange(8)}
    fa, fb = split_frame(cols_a, [3, 5]), split_frame(cols_b, [2])
    res = reduce(Migration.of_frames(fa, fb, layout, steps=steps), [fa, fb], where=where)
    brute = np.max([_min_image_cells(xa, xb, 0, True), _min_image_cells(ya, yb, 1, False)], axis=0)
    np.testing.assert_array_equal(brute[:4], steps)             # exactly on the limit
    assert (brute[4:] > steps).all()
    assert res.matched == 8 and res.over_one_cell == 4 == int(np.count_nonzero(brute > steps))
