"""The reduction cache: hits on reopen, recomputes on change, never torn, never pickled."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
import time

import h5py
import numpy as np
import pandas as pd
import pytest

from swarmaudit.audit import cache as cache_mod
from swarmaudit.audit.cache import ReductionCache, cache_for, cached_reduction, layout_fingerprint
from swarmaudit.core.context import AuditContext
from swarmaudit.core.layout import regular_layout


@pytest.fixture
def cache_dir(tmp_path, monkeypatch):
    d = tmp_path / "cache"
    monkeypatch.setenv("SWARMAUDIT_CACHE", str(d))
    return d


def _write_run(folder, snapshots=3, n=2000):
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(1)
    for s in range(snapshots):
        with h5py.File(folder / f"snap_{s:04d}.h5", "w") as fh:
            fh.attrs["step"] = 10 * s
            fh.attrs["time"] = 0.1 * s
            g = fh.create_group("electrons")
            g.attrs["mass"] = 1.0
            g.attrs["charge"] = -1.0
            for c in ("x", "y", "vx", "vy"):
                g[c] = rng.uniform(0, 1, n)
            g["weight"] = np.full(n, 2.0)
            g["id"] = np.arange(n, dtype=np.int64)
    return folder


def _totals_of_run(folder, use_cache=True):
    """Totals of every snapshot through the cache; returns (values, column reads)."""
    from swarmaudit.diagnostics.drift import snapshot_totals
    from swarmaudit.readers.discover import open_run
    run = open_run(str(folder))
    ctx = AuditContext(run)
    ctx.use_cache = use_cache
    out, reads = [], 0
    for i in range(len(run)):
        frame = run[i].frame("electrons")
        out.append(cached_reduction(ctx, i, "totals", {"species": "electrons"},
                                    lambda: snapshot_totals(frame)))
        reads += frame.reads
    return out, reads


def test_second_open_reads_no_column_and_a_touched_file_is_recomputed(tmp_path, cache_dir):
    folder = _write_run(tmp_path / "run")
    first, reads = _totals_of_run(folder)
    assert reads > 0
    cache = cache_for()
    hits0, misses0 = cache.hits, cache.misses
    again, reads = _totals_of_run(folder)
    assert reads == 0 and again == first
    assert cache.hits - hits0 == 3 and cache.misses == misses0
    # rewrite one snapshot's values; its mtime and size change, so it is read again
    path = folder / "snap_0001.h5"
    with h5py.File(path, "a") as fh:
        fh["electrons/weight"][...] = 3.0
    st = os.stat(path)
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))
    third, reads = _totals_of_run(folder)
    assert reads > 0 and cache.misses - misses0 == 1
    assert third[0] == first[0] and third[2] == first[2]
    assert third[1]["weight"] == pytest.approx(3.0 * 2000)     # 2000 particles of weight 3


def test_no_cache_computes_every_time(tmp_path, cache_dir):
    folder = _write_run(tmp_path / "run", snapshots=1)
    _totals_of_run(folder, use_cache=False)
    _, reads = _totals_of_run(folder, use_cache=False)
    assert reads > 0 and not cache_dir.exists()


def test_switched_off_by_environment(monkeypatch):
    monkeypatch.setenv("SWARMAUDIT_CACHE", "off")
    assert cache_mod.default_root() is None
    assert not cache_for().enabled
    calls = []
    assert ReductionCache().get_or_compute([("f", 1, 1)], "x", {}, lambda: calls.append(1) or 5) == 5


def test_default_location_is_outside_the_data(monkeypatch, tmp_path):
    monkeypatch.delenv("SWARMAUDIT_CACHE", raising=False)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    assert cache_mod.default_root() == tmp_path / "xdg" / "swarmaudit"
    monkeypatch.delenv("XDG_CACHE_HOME")
    assert cache_mod.default_root() == cache_mod.Path(os.path.expanduser("~")) / ".cache" / "swarmaudit"


def test_snapshots_without_files_are_never_cached(tmp_path):
    # an in-memory run's refs name no file (size -1): two such runs must not share entries
    c = ReductionCache(tmp_path)
    sig = [("/nonexistent/snap_000", -1, -1)]
    assert c.get_or_compute(sig, "t", {}, lambda: 1) == 1
    assert c.get_or_compute(sig, "t", {}, lambda: 2) == 2
    assert c.writes == 0


def test_key_covers_options_layout_and_code(tmp_path, monkeypatch):
    c = ReductionCache(tmp_path)
    sig = [("/data/a.h5", 10, 20)]
    a = regular_layout([0, 1, 0, 1], [8, 8], [2, 2])
    b = regular_layout([0, 1, 0, 1], [8, 8], [4, 2])
    calls = []

    def compute():
        calls.append(1)
        return {"n": len(calls)}
    c.get_or_compute(sig, "census", {"layout": a}, compute)
    c.get_or_compute(sig, "census", {"layout": regular_layout([0, 1, 0, 1], [8, 8], [2, 2])}, compute)
    assert len(calls) == 1                                   # an equal layout hits
    c.get_or_compute(sig, "census", {"layout": b}, compute)
    c.get_or_compute(sig, "census", {"layout": a, "relativistic": True}, compute)
    c.get_or_compute([("/data/a.h5", 10, 21)], "census", {"layout": a}, compute)
    assert len(calls) == 4
    assert layout_fingerprint(a) != layout_fingerprint(b)
    monkeypatch.setattr(cache_mod, "code_fingerprint", lambda: "other-code")
    c.get_or_compute(sig, "census", {"layout": a}, compute)
    assert len(calls) == 5


def test_values_round_trip(tmp_path):
    from swarmaudit.diagnostics.migration import MigrationResult
    c = ReductionCache(tmp_path)
    table = pd.DataFrame({"species": ["beam", "ions"], "count": np.array([3, 4], np.int64),
                          "weight": [0.5, np.nan], "ok": [True, False]})
    mig = MigrationResult(5, 1, 2, 0, 0.25, 0, 1, pd.DataFrame({"from_block": [0], "to_block": [1],
                                                               "count": [1]}),
                          pd.DataFrame({"rank": [0], "send": [1], "receive": [0]}), notes=["n"])
    value = {"table": table, "totals": ({"count": 3.0, "energy": float("nan")}, {"count": 0}),
             "ranges": np.array([[0.0, 1.0]], np.float32), "series": pd.Series([1.5], index=["x"]),
             "migration": mig}
    m = c.key_material([("f", 1, 1)], "mixed")
    assert c.store(m, value)
    got = c.load(m)
    pd.testing.assert_frame_equal(got["table"], table)
    assert got["totals"][1] == {"count": 0} and np.isnan(got["totals"][0]["energy"])
    assert got["ranges"].dtype == np.float32
    pd.testing.assert_series_equal(got["series"], value["series"])
    pd.testing.assert_frame_equal(got["migration"].transfer, mig.transfer)
    assert got["migration"].summary() == mig.summary()


def test_objects_are_refused_not_pickled(tmp_path):
    c = ReductionCache(tmp_path)
    m = c.key_material([("f", 1, 1)], "objects")
    assert not c.store(m, {"a": np.array([object(), 1], dtype=object)})
    assert not c.store(m, {"a": {1, 2}})
    assert c.load(m) is cache_mod._MISS


def test_damaged_entry_is_a_miss(tmp_path):
    c = ReductionCache(tmp_path)
    m = c.key_material([("f", 1, 1)], "x")
    c.store(m, {"v": 1})
    c.path_for(m).write_bytes(b"not a zip file at all")
    assert c.load(m) is cache_mod._MISS
    assert c.get_or_compute([("f", 1, 1)], "x", {}, lambda: {"v": 2}) == {"v": 2}
    assert c.load(m) == {"v": 2}


def test_two_processes_writing_the_same_entry_never_tear_it(tmp_path):
    # two writers race on one key while this process reads: every read is whole
    root = tmp_path / "c"
    script = textwrap.dedent(f"""
        import numpy as np
        from swarmaudit.audit.cache import ReductionCache
        c = ReductionCache({str(root)!r})
        m = c.key_material([("f", 1, 1)], "race")
        for i in range(40):
            assert c.store(m, {{"a": np.full(50_000, float(i)), "i": i}})
    """)
    procs = [subprocess.Popen([sys.executable, "-c", script]) for _ in range(2)]
    c = ReductionCache(root)
    m = c.key_material([("f", 1, 1)], "race")
    seen = 0
    while any(p.poll() is None for p in procs):
        got = c.load(m)
        if got is not cache_mod._MISS:
            assert np.all(got["a"] == got["i"])
            seen += 1
        time.sleep(0.002)   # leave the two cores to the writers
    assert all(p.wait() == 0 for p in procs)
    assert c.errors == []
    got = c.load(m)
    assert got["i"] == 39 and np.all(got["a"] == 39)
    assert not [p for p in root.rglob(".tmp-*")]          # no temporary file left behind


# one cache per context, one staleness rule ----------------------------------------------
def _numpy_totals(folder):
    """Σ w, Σ w q, Σ w m vx per snapshot, straight from the files with h5py and numpy."""
    out = []
    for p in sorted(folder.glob("snap_*.h5")):
        with h5py.File(p, "r") as fh:
            g = fh["electrons"]
            w = g["weight"][()]
            out.append((float(np.sum(w)), float(np.sum(w * g.attrs["charge"])),
                        float(np.sum(w * g.attrs["mass"] * g["vx"][()]))))
    return out


def _drift_and_census(folder, use_cache=True):
    from swarmaudit.audit import tables
    from swarmaudit.readers.discover import open_run
    ctx = AuditContext(open_run(str(folder)), use_cache=use_cache,
                       fixed_layout=regular_layout([0, 1, 0, 1], [8, 8], [4, 4]))
    return tables.drift_table(ctx), tables.census_table(ctx), ctx


def test_cached_tables_are_what_a_fresh_computation_and_numpy_give(tmp_path, cache_dir):
    folder = _write_run(tmp_path / "run")
    fresh_drift, fresh_census, _ = _drift_and_census(folder, use_cache=False)
    assert not cache_dir.exists()
    _drift_and_census(folder)                                   # fills the disk cache
    hits = cache_for().hits
    drift, census, ctx = _drift_and_census(folder)              # a new context: served from disk
    assert cache_for().hits - hits == 2 * 3                     # totals and census of 3 snapshots
    pd.testing.assert_frame_equal(drift, fresh_drift)
    pd.testing.assert_frame_equal(census, fresh_census)
    # the numbers themselves, against numpy over the raw columns
    e = drift[drift["species"] == "electrons"].set_index(["snapshot", "quantity"])["value"]
    for i, (w, q, px) in enumerate(_numpy_totals(folder)):
        assert e[(i, "weight")] == pytest.approx(w, rel=1e-12)
        assert e[(i, "charge")] == pytest.approx(q, rel=1e-12)
        assert e[(i, "momentum_x")] == pytest.approx(px, rel=1e-12)
    # the census against numpy.histogramdd of the positions on the 4 x 4 blocks
    with h5py.File(folder / "snap_0002.h5", "r") as fh:
        want, _ = np.histogramdd(np.c_[fh["electrons/x"][()], fh["electrons/y"][()]],
                                    bins=[4, 4], range=[[0, 1], [0, 1]])
    got = census[(census["snapshot"] == 2) & (census["species"] == "electrons")]
    got = got[got["block"] >= 0].sort_values("block")["count"].to_numpy()
    np.testing.assert_array_equal(got, want.T.ravel())          # block ids: x fastest


def test_the_context_owns_one_cache_and_a_touched_file_goes_stale_in_memory_too(tmp_path, cache_dir):
    from swarmaudit.audit import tables
    from swarmaudit.audit.cache import context_cache
    from swarmaudit.readers.discover import open_run
    folder = _write_run(tmp_path / "run", snapshots=2)
    ctx = AuditContext(open_run(str(folder)))
    assert ctx.reductions is None
    first = tables._reduce(ctx, 1, "totals")
    cache = context_cache(ctx)
    assert ctx.reductions is cache and context_cache(ctx) is cache
    assert tables._reduce(ctx, 1, "totals") is first            # memory: the same object
    path = folder / "snap_0001.h5"
    with h5py.File(path, "a") as fh:
        fh["electrons/weight"][...] = 5.0
    st = os.stat(path)
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))
    ctx.run.forget(1)
    again = tables._reduce(ctx, 1, "totals")
    assert again["electrons"][0]["weight"] == pytest.approx(5.0 * 2000)
    assert len(cache._memory) == 1                              # the newer version replaced the older


# damaged entries --------------------------------------------------------------------------
def _truncate(p):
    p.write_bytes(p.read_bytes()[: p.stat().st_size // 2])


def _zero_length(p):
    p.write_bytes(b"")


def _flip_bytes(p):
    # uncompressed zip members carry a CRC-32: bytes flipped inside one fail its check
    data = bytearray(p.read_bytes())
    for k in range(len(data) // 3, len(data) // 3 + 8):
        data[k] ^= 0xFF
    p.write_bytes(bytes(data))


def _bad_json(p):
    np.savez(p, __manifest__=np.frombuffer(b'{"key": [1, 2', dtype=np.uint8))


@pytest.mark.parametrize("damage", [_truncate, _zero_length, _flip_bytes, _bad_json],
                         ids=["truncated", "zero-length", "bad-crc", "bad-json"])
def test_a_damaged_entry_is_removed_and_computed_again(tmp_path, cache_dir, capsys, damage):
    from swarmaudit.app.cli import main
    folder = _write_run(tmp_path / "run")
    assert main(["check", str(folder), "--rtol", "1e-9", "--quantities", "weight,charge"]) == 0
    first = capsys.readouterr()
    entries = sorted(cache_dir.rglob("*.npz"))
    assert entries
    for p in entries:
        damage(p)
    assert main(["check", str(folder), "--rtol", "1e-9", "--quantities", "weight,charge"]) == 0
    second = capsys.readouterr()
    assert second.out == first.out
    notes = [ln for ln in second.err.splitlines() if "damaged entry of the reduction cache" in ln]
    assert len(notes) == 1, second.err
    # every entry was written again and reads back whole: the next run says nothing more
    c = ReductionCache(cache_dir)
    damaged = c.damaged
    assert main(["check", str(folder), "--rtol", "1e-9", "--quantities", "weight,charge"]) == 0
    third = capsys.readouterr()
    assert third.out == first.out and "damaged" not in third.err
    assert c.damaged == damaged
    for p in cache_dir.rglob("*.npz"):
        with np.load(p, allow_pickle=False) as z:
            assert "__manifest__" in z.files


def test_damage_of_every_kind_is_a_miss_never_an_exception(tmp_path):
    c = ReductionCache(tmp_path)
    m = c.key_material([("f", 1, 1)], "x")
    for damage in (_truncate, _zero_length, _flip_bytes, _bad_json):
        assert c.store(m, {"v": np.arange(1000.0)})
        damage(c.path_for(m))
        seen = []
        assert c.load(m, seen.append) is cache_mod._MISS
        assert seen == [c.path_for(m)] and not c.path_for(m).exists()
    assert c.damaged == 4


def test_two_commands_filling_the_same_entries_at_once_both_succeed(tmp_path):
    # two real processes compute the same snapshots into one fresh cache folder at the same time
    folder = _write_run(tmp_path / "run", snapshots=4, n=20_000)
    env = dict(os.environ, SWARMAUDIT_CACHE=str(tmp_path / "shared"))
    cmd = [sys.executable, "-m", "swarmaudit", "check", str(folder), "--rtol", "1e-9",
           "--quantities", "weight,charge"]
    procs = [subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for _ in range(2)]
    outs = [p.communicate(timeout=300) for p in procs]
    assert [p.returncode for p in procs] == [0, 0], outs
    assert outs[0][0] == outs[1][0]
    assert not any("damaged" in err for _, err in outs)
    assert not list((tmp_path / "shared").rglob(".tmp-*"))
    again = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=300)
    assert again.returncode == 0 and again.stdout == outs[0][0] and "damaged" not in again.stderr
