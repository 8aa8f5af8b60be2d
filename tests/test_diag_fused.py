"""The one-pass compiled totals equal the numpy totals (one numpy reduction per quantity).

Reference: numpy's own sums (pairwise summation) over the same per-particle terms. Both paths
form each term with the same float64 operations, so they differ only in summation order; the
tolerance is 1e-12 of the quantity's absolute scale (Σ|term|): numpy's pairwise sum is
accurate to about log2(n)·eps of that scale, the compiled pass (plain sums over 256 rows,
compensated sums of the blocks) to about 256·eps ≈ 6e-14 (Higham, "Accuracy and Stability
of Numerical Algorithms", ch. 4, from memory). Non-finite counts must match exactly.
"""

from __future__ import annotations

import os

import h5py
import numpy as np
import pytest

from _need import need_that

from _audit_runs import frame
from swarmaudit.diagnostics import _kernels, drift
from swarmaudit.engine import pieces as engine_pieces
from swarmaudit.engine.reduce import reduce
from swarmaudit.readers.hdf5 import HDF5Reader

need_that(_kernels.available, "numba is not installed", module_level=True)

RTOL = 1e-12


def _by_engine(frame, relativistic=False, c=None, where="serial"):
    """The compiled totals of ``frame`` run by the engine piece by piece."""
    return reduce(drift.Totals.of_frame(frame, relativistic, c, compiled=True), frame, where=where)


def _scale(values, quantity):
    if quantity.startswith("momentum_"):
        return values["abs_momentum"]
    if quantity == "charge":
        return values["abs_charge"]
    return abs(values[quantity])


def _assert_same(a, b):
    (va, ba), (vb, bb) = a, b
    assert ba == bb
    assert va.keys() == vb.keys()
    for q in va:
        assert abs(va[q] - vb[q]) <= RTOL * max(_scale(va, q), 1e-300), (q, va[q], vb[q])


def _columns(rng, n, kind, dtype, array_weight, array_mass, nan):
    cols = {"x": rng.random(n)}
    for axis in "xyz":
        cols[f"{kind}{axis}"] = rng.normal(0.0, 0.3, n).astype(dtype)
    attrs = {}
    if array_weight:
        cols["w"] = (rng.random(n) + 0.5).astype(dtype)
        cols["q"] = rng.normal(0.0, 1.0, n).astype(dtype)
    else:
        attrs["charge"] = -1.0
    if array_mass:
        cols["mass"] = (rng.random(n) + 0.5).astype(dtype)
        if kind == "p":
            cols["mass"][:3] = 0.0          # massless particles carry E = |p| c
    else:
        attrs["mass"] = 2.0
    if nan:
        cols[f"{kind}y"][5] = np.nan
        cols[f"{kind}x"][7] = np.inf
        if array_weight:
            cols["w"][11] = np.nan
            cols["q"][13] = -np.inf
    return cols, attrs


@pytest.mark.parametrize("kind", ["v", "u", "p"])
@pytest.mark.parametrize("relativistic", [False, True])
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("array_weight,array_mass", [(True, True), (False, False), (True, False)])
def test_fused_equals_numpy(kind, relativistic, dtype, array_weight, array_mass):
    rng = np.random.default_rng([ord(kind), relativistic, array_weight, array_mass])
    cols, attrs = _columns(rng, 5000, kind, dtype, array_weight, array_mass, nan=True)
    f = frame("e", cols, attrs)
    c = 1.0 if relativistic else None      # c = 1: speeds of 0.3 c make γ matter
    want = drift.numpy_totals(f, relativistic, c)
    got = drift.fused_totals(f, relativistic, c)
    _assert_same(got, want)
    assert got[1]["kinetic_energy"] > 0      # the NaN/inf rows were counted, not summed


def test_faster_than_light_and_missing_columns():
    n = 1000
    vx = np.linspace(-2.0, 2.0, n)           # |v| >= c = 1 for half of them: non-finite energy
    f = frame("e", {"x": np.zeros(n), "vx": vx, "vz": vx[::-1].copy()}, {"mass": 1.0})
    _assert_same(drift.fused_totals(f, True, 1.0), drift.numpy_totals(f, True, 1.0))
    no_mass = frame("e", {"x": np.zeros(n), "px": vx}, {})        # momentum, no mass: no energy
    got = drift.fused_totals(no_mass)
    _assert_same(got, drift.numpy_totals(no_mass))
    assert "kinetic_energy" not in got[0] and "charge" not in got[0]
    bare = frame("e", {"x": np.zeros(n)}, {})
    _assert_same(drift.fused_totals(bare), drift.numpy_totals(bare))


def test_snapshot_totals_takes_the_compiled_path_for_large_frames(monkeypatch):
    rng = np.random.default_rng(7)
    cols, attrs = _columns(rng, 3000, "u", np.float64, True, True, nan=True)
    f = frame("e", cols, attrs)
    calls = []
    real = _kernels.snapshot_sums
    monkeypatch.setattr(_kernels, "snapshot_sums", lambda *a, **k: calls.append(1) or real(*a, **k))
    monkeypatch.setattr(_kernels, "TOTALS_MIN_SIZE", 1000)
    fast = drift.snapshot_totals(f, True, 1.0, with_nonfinite=True)
    assert calls
    monkeypatch.setattr(_kernels, "available", False)
    _assert_same(fast, drift.snapshot_totals(f, True, 1.0, with_nonfinite=True))


def test_streamed_rows_from_hdf5_equal_whole_columns(tmp_path, monkeypatch):
    rng = np.random.default_rng(11)
    n = 10_007                                          # not a multiple of the piece size
    path = tmp_path / "s.h5"
    with h5py.File(path, "w") as fh:
        g = fh.create_group("e")
        g.attrs["mass"] = 3.0
        g["x"] = rng.random(n)
        g["vx"] = rng.normal(size=n).astype(np.float32)
        g["vy"] = rng.normal(size=n)
        g["weight"] = rng.random(n)
        g["charge"] = rng.normal(size=n)
        g["vy"][17] = np.nan
    monkeypatch.setattr(engine_pieces, "PIECE_ROWS", 1000)
    f = HDF5Reader().open(str(path)).species["e"]
    streamed = _by_engine(f)
    assert f._cache == {}                               # pieces only: no column kept
    whole = HDF5Reader().open(str(path)).species["e"]
    for name in whole.columns:
        whole[name]                                     # in memory: read whole, not streamed
    _assert_same(streamed, drift.fused_totals(whole))
    _assert_same(streamed, drift.numpy_totals(whole))
    assert streamed[1]["momentum_y"] == 1


# migration: the one-pass summary of dense ids against match_keys + gathers (numpy path) ---------
import pandas as pd  # noqa: E402

from swarmaudit.core.layout import assign_blocks, regular_layout  # noqa: E402
from swarmaudit.diagnostics.migration import DuplicateKeyError, migrate  # noqa: E402


def _pair(rng, n, d, lay, dtype=np.float64):
    """Two snapshots: 2 % lost, 1 % created, shuffled, small moves (some across blocks)."""
    ids_a = rng.permutation(n).astype(np.int64) + 5           # dense, not starting at 0
    pa = [rng.random(n) * (lay.domain_upper[k] - lay.domain_lower[k]) + lay.domain_lower[k]
          for k in range(d)]
    keep = rng.random(n) > 0.02
    born = np.arange(n + 5, n + 5 + n // 100, dtype=np.int64)
    order = rng.permutation(int(keep.sum()) + born.size)
    ids_b = np.concatenate([ids_a[keep], born])[order]
    pb = []
    for k in range(d):
        lo, hi = lay.domain_lower[k], lay.domain_upper[k]
        moved = pa[k][keep] + rng.normal(0, 0.05 * (hi - lo), int(keep.sum()))
        moved = lo + np.mod(moved - lo, hi - lo)
        pb.append(np.concatenate([moved, lo + rng.random(born.size) * (hi - lo)])[order].astype(dtype))
    return ids_a, ids_b, pa, pb


def _both_paths(monkeypatch, *args, **kw):
    calls = []
    real = _kernels.dense_summary
    monkeypatch.setattr(_kernels, "dense_summary", lambda *a, **k: calls.append(1) or real(*a, **k))
    fast = migrate(*args, **kw)
    assert calls, "the one-pass summary was not used"
    monkeypatch.setattr(_kernels, "available", False)
    slow = migrate(*args, **kw)
    monkeypatch.setattr(_kernels, "available", True)
    s_fast, s_slow = fast.summary(), slow.summary()
    assert np.isnan(s_fast.pop("max_displacement_cells")) == np.isnan(s_slow["max_displacement_cells"])
    if not np.isnan(s_slow["max_displacement_cells"]):
        assert fast.max_displacement_cells == s_slow["max_displacement_cells"]
    s_slow.pop("max_displacement_cells")
    assert s_fast == s_slow
    assert fast.nonfinite_displacement == slow.nonfinite_displacement and fast.notes == slow.notes
    pd.testing.assert_frame_equal(fast.transfer, slow.transfer)
    pd.testing.assert_frame_equal(fast.traffic, slow.traffic)
    return fast


@pytest.mark.parametrize("d", [1, 2, 3])
def test_migration_summary_equals_numpy_path(monkeypatch, d):
    rng = np.random.default_rng(40 + d)
    bounds = [0, 1, -1, 1, 0, 2][:2 * d]
    lay = regular_layout(bounds, [16, 8, 4][:d], [4, 2, 2][:d], periodic=("x", "z")[: max(1, d - 1)],
                         ranks=3)
    ids_a, ids_b, pa, pb = _pair(rng, _kernels.MIN_SIZE + 700, d, lay,
                                 dtype=np.float32 if d == 2 else np.float64)
    pa[0][3] = np.nan                                          # non-finite: counted, left out
    ba, bb = assign_blocks(pa, lay), assign_blocks(pb, lay)    # NaN position: block -1
    res = _both_paths(monkeypatch, ids_a, ids_b, ba, bb, pa, pb, lay, steps=3)
    assert res.migrated > 0 and res.created > 0 and res.lost > 0 and res.nonfinite_displacement >= 1


def test_migration_summary_without_positions_and_with_float_ids(monkeypatch):
    rng = np.random.default_rng(50)
    lay = regular_layout([0, 1, 0, 1], [8, 8], [2, 2], ranks=2)
    ids_a, ids_b, pa, pb = _pair(rng, _kernels.MIN_SIZE + 100, 2, lay)
    ba, bb = assign_blocks(pa, lay), assign_blocks(pb, lay)
    res = _both_paths(monkeypatch, ids_a.astype(np.float64), ids_b.astype(np.float64), ba, bb,
                      layout=lay)
    assert np.isnan(res.max_displacement_cells)


@pytest.mark.parametrize("side", ["first", "second"])
def test_migration_summary_reports_repeated_ids_like_the_numpy_path(monkeypatch, side):
    rng = np.random.default_rng(60)
    lay = regular_layout([0, 1, 0, 1], [8, 8], [2, 2])
    ids_a, ids_b, pa, pb = _pair(rng, _kernels.MIN_SIZE + 100, 2, lay)
    if side == "first":
        ids_a[10:13] = ids_a[0]
    else:
        ids_b[10:12] = ids_b[0]
    ba, bb = assign_blocks(pa, lay), assign_blocks(pb, lay)
    errors = []
    for available in (True, False):
        monkeypatch.setattr(_kernels, "available", available)
        with pytest.raises(DuplicateKeyError) as exc:
            migrate(ids_a, ids_b, ba, bb, pa, pb, lay)
        errors.append((exc.value.side, exc.value.count))
    assert errors[0] == errors[1] == (side, 3 if side == "first" else 2)


# pieces on several threads, several frames at once ---------------------------------------------
def _h5_run(tmp_path, snapshots=4, n=9_001):
    rng = np.random.default_rng(21)
    paths = []
    for s in range(snapshots):
        p = tmp_path / f"snap_{s:02d}.h5"
        with h5py.File(p, "w") as fh:
            fh.attrs["step"] = s
            g = fh.create_group("e")
            g.attrs["mass"] = 2.0
            g.attrs["charge"] = -1.0
            g["x"] = rng.random(n)
            g["vx"] = rng.normal(size=n)
            g["vy"] = rng.normal(size=n).astype(np.float32)
            g["weight"] = rng.random(n) + 0.5
            if s == 2:
                g["vx"][5] = np.inf
        paths.append(str(p))
    return paths


def _frames(paths):
    return [HDF5Reader().open(p).species["e"] for p in paths]


def test_pieces_on_threads_give_the_same_bits(tmp_path, monkeypatch):
    from swarmaudit.engine.reduce import reduce_many
    paths = _h5_run(tmp_path)
    monkeypatch.setattr(engine_pieces, "PIECE_ROWS", 1000)    # 10 pieces per frame
    monkeypatch.setattr(_kernels, "TOTALS_MIN_SIZE", 1000)
    assert all(f.loader("vx").direct() for f in _frames(paths))
    one = [_by_engine(f) for f in _frames(paths)]
    two = [_by_engine(f, where="threads") for f in _frames(paths)]
    on_dask = [_by_engine(f, where="dask") for f in _frames(paths)]
    together = reduce_many([(drift.Totals.of_frame(f), f) for f in _frames(paths)], where="threads")
    assert one == two == on_dask == together                 # bit for bit, counts included
    whole = _frames(paths)
    for f in whole:
        for name in f.columns:
            f[name]                                          # in memory: sliced pieces
    assert [_by_engine(f, where="threads") for f in whole] == one
    for got, f in zip(one, _frames(paths)):
        _assert_same(got, drift.numpy_totals(f))
    assert one[2][1]["momentum_x"] == 1 and one[2][1]["kinetic_energy"] == 1


def test_run_totals_computed_ahead_equal_one_at_a_time(tmp_path, monkeypatch):
    from swarmaudit.audit import tables as audit
    from swarmaudit.core.context import AuditContext
    from swarmaudit.readers.discover import open_run
    _h5_run(tmp_path, snapshots=5)
    monkeypatch.setattr(engine_pieces, "PIECE_ROWS", 1000)
    monkeypatch.setattr(_kernels, "TOTALS_MIN_SIZE", 1000)
    ahead = audit.drift_table(AuditContext(open_run(str(tmp_path)), use_cache=False))
    monkeypatch.setattr(audit, "TOTALS_AHEAD", 1)
    alone = audit.drift_table(AuditContext(open_run(str(tmp_path)), use_cache=False))
    pd.testing.assert_frame_equal(ahead, alone, check_exact=True)


def test_a_damaged_later_snapshot_does_not_fail_an_earlier_one(tmp_path, monkeypatch):
    from swarmaudit.audit import tables as audit
    from swarmaudit.core.context import AuditContext
    from swarmaudit.core.errors import InputError
    from swarmaudit.readers.discover import open_run
    paths = _h5_run(tmp_path, snapshots=3)
    monkeypatch.setattr(_kernels, "TOTALS_MIN_SIZE", 1000)
    ctx = AuditContext(open_run(str(tmp_path)), use_cache=False)
    with open(paths[2], "r+b") as fh:                        # damaged after the run was opened
        fh.truncate(os.path.getsize(paths[2]) // 2)
    first = audit._reduce(ctx, 0, "totals")                  # computes 1 and 2 ahead: 2 fails
    assert first["e"][0]["count"] == 9_001
    assert audit._reduce(ctx, 1, "totals")["e"][0]["count"] == 9_001
    with pytest.raises(InputError, match="snap_02"):
        audit._reduce(ctx, 2, "totals")


def test_compiled_file_reads_equal_the_piece_path(tmp_path, monkeypatch):
    from swarmaudit.audit.tables import _held_open
    need_that(_kernels.can_read_files, "no positioned reads on this platform")
    rng = np.random.default_rng(5)
    n = 20_011
    path = tmp_path / "s.h5"
    with h5py.File(path, "w") as fh:
        g = fh.create_group("e")
        g.attrs["charge"] = -1.0
        for name in ("x", "ux", "uy", "uz"):
            g[name] = rng.normal(size=n).astype(np.float32)
        g["weight"] = rng.random(n) + 0.5
        g["mass"] = rng.random(n) + 1.0
        g["ux"][9] = np.nan
    monkeypatch.setattr(engine_pieces, "PIECE_ROWS", 4096)
    monkeypatch.setattr(drift, "FILE_ROWS", 1000)         # not a divisor of the piece: partial reads
    calls = []
    real = _kernels.file_piece_sums
    monkeypatch.setattr(_kernels, "file_piece_sums", lambda *a, **k: calls.append(1) or real(*a, **k))
    frame = HDF5Reader().open(str(path)).species["e"]
    with _held_open(frame):
        from_files = _by_engine(frame, True, 1.0)
    assert calls
    calls.clear()
    frame = HDF5Reader().open(str(path)).species["e"]
    pieces = _by_engine(frame, True, 1.0)                  # no hold: Python reads, same pieces
    assert not calls and from_files == pieces
    _assert_same(from_files, drift.numpy_totals(frame, True, 1.0))
    assert from_files[1]["momentum_x"] == 1


def test_a_file_cut_short_under_the_compiled_reader_is_a_clear_error(tmp_path):
    from swarmaudit.audit.tables import _held_open
    from swarmaudit.core.errors import InputError
    need_that(_kernels.can_read_files, "no positioned reads on this platform")
    path = tmp_path / "s.h5"
    with h5py.File(path, "w") as fh:
        g = fh.create_group("e")
        g.attrs["mass"] = 1.0
        for name in ("x", "vx", "vy", "weight"):
            g[name] = np.ones(300_000)
    frame = HDF5Reader().open(str(path)).species["e"]
    with _held_open(frame):
        with open(path, "r+b") as fh:                        # the writer truncates it meanwhile
            fh.truncate(os.path.getsize(path) // 2)
        with pytest.raises(InputError) as err:
            _by_engine(frame)
    assert "s.h5" in str(err.value)


def test_only_streamed_snapshots_are_reduced_together(tmp_path, monkeypatch):
    from swarmaudit.audit import tables as audit
    from swarmaudit.core.context import AuditContext
    from swarmaudit.readers.discover import open_run
    rng = np.random.default_rng(2)
    h5_dir, npz_dir = tmp_path / "h5", tmp_path / "npz"
    npz_dir.mkdir()
    h5_dir.mkdir()
    _h5_run(h5_dir, snapshots=3, n=600)
    for s in range(3):                                   # whole columns: read in one go
        np.savez(npz_dir / f"snap_{s}.npz", x=rng.random(600), vx=rng.normal(size=600),
                 weight=np.ones(600), mass=np.ones(600))
    monkeypatch.setattr(engine_pieces, "PIECE_ROWS", 256)
    sizes = []
    real = audit.reduce_many
    monkeypatch.setattr(audit, "reduce_many", lambda jobs, *a, **k: sizes.append(len(jobs)) or real(jobs, *a, **k))
    audit.drift_table(AuditContext(open_run(str(npz_dir)), use_cache=False))
    assert sizes == [1, 1, 1]                          # one snapshot's columns in memory at a time
    sizes.clear()
    audit.drift_table(AuditContext(open_run(str(h5_dir)), use_cache=False))
    assert sizes[0] == 3                               # read in pieces: together
