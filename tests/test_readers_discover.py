"""Runs from folders and globs: order by step, else by the last integer in the name; per-rank parts."""

from __future__ import annotations

import os

import numpy as np
import pytest

from _readers_samples import particles, write_csv, write_h5_nested, write_npy
from swarmaudit.core.errors import InputError
from swarmaudit.readers.discover import find_snapshots, open_run


def test_order_by_step_attribute_beats_names(tmp_path):
    # names say 1, 2, 3; the step attributes say the reverse: steps win
    for name, step in (("a_1.h5", 30), ("a_2.h5", 20), ("a_3.h5", 10)):
        write_h5_nested(tmp_path / name, particles(5), step=step)
    run = open_run(str(tmp_path))
    assert [s.step for s in run] == [10, 20, 30]
    assert run.labels == ["a_3.h5", "a_2.h5", "a_1.h5"]


def test_order_by_last_integer_in_name(tmp_path):
    for k in (10, 2, 1):     # lexical order would put 10 before 2
        write_npy(tmp_path / f"run7_snap{k}.npy", particles(4, seed=k))
    run = open_run(str(tmp_path))
    assert run.labels == ["run7_snap1.npy", "run7_snap2.npy", "run7_snap10.npy"]
    np.testing.assert_array_equal(run[2].species["particles"]["x"], particles(4, seed=10)["x"])


def test_glob_and_csv_steps(tmp_path):
    for k, step in ((0, 5), (1, 15), (2, 10)):
        write_csv(tmp_path / f"out_{k}.csv", particles(3), step=step, time=step * 0.1)
    (tmp_path / "layout.csv").write_text("block,level,rank,x_lo,x_hi,y_lo,y_hi\n0,0,0,0,1,0,1\n")
    run = open_run(str(tmp_path / "out_*.csv"))
    assert [s.step for s in run] == [5, 10, 15]
    refs, _ = find_snapshots(str(tmp_path))
    assert "layout.csv" not in [r.label for r in refs]       # a sidecar, not a snapshot


def test_per_rank_folder_is_one_snapshot_with_rank_filled(tmp_path):
    parts = [particles(n, seed=r) for r, n in enumerate((4, 0, 6))]
    for step in (100, 200):
        d = tmp_path / f"step_{step:06d}"
        d.mkdir()
        for r, p in enumerate(parts):
            write_h5_nested(d / f"rank_{r:03d}.h5", p, step=step, time=step * 1e-3)
    run = open_run(str(tmp_path))
    assert len(run) == 2 and [s.step for s in run] == [100, 200]
    snap = run[0]
    frame = snap.species["beam"]
    assert frame.length == 10
    np.testing.assert_array_equal(frame.role("rank"), np.repeat([0, 1, 2], [4, 0, 6]))
    np.testing.assert_array_equal(frame.role("x"), np.concatenate([p["x"] for p in parts]))
    assert any("no particles" in w for w in snap.warnings)    # rank 1 was empty


def test_per_rank_files_side_by_side(tmp_path):
    for step in (10, 20):
        for r in (0, 1):
            write_csv(tmp_path / f"snap_{step}_rank{r}.csv", particles(3, seed=r), step=step)
    run = open_run(str(tmp_path))
    assert [len(ref.paths) for ref in run.refs] == [2, 2]
    assert [s.step for s in run] == [10, 20]
    np.testing.assert_array_equal(run[1].species["particles"].role("rank"), [0, 0, 0, 1, 1, 1])


def test_rank_column_in_the_files_is_kept(tmp_path):
    d = tmp_path / "step_1"
    d.mkdir()
    for r in (0, 1):
        np.savez(d / f"part_{r}.npz", x=np.zeros(2), cpu=np.full(2, 7 + r))
    frame = open_run(str(tmp_path))[0].species["particles"]
    assert frame.column_for("rank") == "cpu"
    np.testing.assert_array_equal(frame.role("rank"), [7, 7, 8, 8])


def test_ranks_that_disagree_on_step(tmp_path):
    d = tmp_path / "step_1"
    d.mkdir()
    write_h5_nested(d / "rank_0.h5", particles(2), step=1)
    write_h5_nested(d / "rank_1.h5", particles(2), step=2)
    with pytest.raises(InputError, match="different steps"):
        open_run(str(tmp_path), follow=False)


def test_a_broken_fresh_file_is_skipped_an_old_one_fails(tmp_path):
    write_npy(tmp_path / "s_1.npy", particles(3))
    bad = tmp_path / "s_2.npy"
    bad.write_bytes(b"\x93NUMPY\x01\x00")          # a header still being written
    run = open_run(str(tmp_path))
    assert run.labels == ["s_1.npy"] and "s_2.npy" in run.skipped[0]
    old = 1_000_000_000
    os.utime(bad, (old, old))
    with pytest.raises(InputError) as info:
        open_run(str(tmp_path))
    assert str(bad) in str(info.value)
