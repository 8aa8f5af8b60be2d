"""The demo generator writes every run in the agreed file shapes.

The shapes are those of the agreed demo format (HDF5 per rank with component
groups and a ``blocks`` group, HDF5 with ``(N, 2)`` datasets and a compound
species, NPZ, CSV with comment lines plus ``layout.csv``, structured
``.npy``); each is checked with h5py / numpy / pandas directly, then through
the project's own run discovery.
"""

from __future__ import annotations

import glob
import json
import os
import types

import h5py
import numpy as np
import pandas as pd
import pytest

from swarmaudit.core.errors import OptionError
from swarmaudit.demo_data import generate

PARTICLES = 2000
SNAPSHOTS = 5


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    lines = []
    paths = generate.write_demo_runs(out, particles=PARTICLES, snapshots=SNAPSHOTS, progress=lines.append)
    return out, paths, lines


def _blocks(fh):
    g = fh["blocks"]
    return {k: g[k][()] for k in ("lower", "upper", "level", "rank")}, dict(g.attrs)


def _owner(x, y, blocks):
    """Block row of each point: the highest level block holding it (brute force over blocks)."""
    inside = ((x[:, None] >= blocks["lower"][None, :, 0]) & (x[:, None] < blocks["upper"][None, :, 0])
              & (y[:, None] >= blocks["lower"][None, :, 1]) & (y[:, None] < blocks["upper"][None, :, 1]))
    score = np.where(inside, blocks["level"][None, :] + 1, 0)
    assert np.all(score.max(axis=1) > 0), "a particle lies in no block"
    return np.argmax(score, axis=1)


def test_writes_every_run_and_a_manifest(demo):
    out, paths, lines = demo
    assert set(paths) == {"two_stream", "inlet_wall", "small_npz", "small_csv", "small_npy",
                          "two_stream_ranks", "two_stream_dt"}
    assert all(os.path.isdir(p) and os.path.dirname(p) == str(out) for p in paths.values())
    manifest = json.loads((out / generate.MANIFEST).read_text())
    assert manifest["parameters"] == {"version": generate.GENERATOR_VERSION,
                                      "particles": PARTICLES, "snapshots": SNAPSHOTS}
    assert not glob.glob(str(out / ".*.partial"))
    assert any("wrote 7 demo runs" in s for s in lines)


def test_two_stream_per_rank_hdf5(demo):
    _, paths, _ = demo
    snaps = sorted(glob.glob(os.path.join(paths["two_stream"], "step_*")))
    assert len(snaps) == SNAPSHOTS
    first_ids = None
    rank_tables = []
    for snap in snaps:
        files = sorted(glob.glob(os.path.join(snap, "rank_*.h5")))
        assert [os.path.basename(f) for f in files] == [f"rank_{r:03d}.h5" for r in range(4)]
        ids, layouts, steps = [], [], set()
        for r, f in enumerate(files):
            with h5py.File(f, "r") as fh:
                steps.add((int(fh.attrs["step"]), float(fh.attrs["time"])))
                assert np.isfinite(fh.attrs["field_energy"]) and fh.attrs["field_energy"] > 0
                blocks, attrs = _blocks(fh)
                layouts.append(blocks)
                assert blocks["lower"].shape == blocks["upper"].shape == (18, 2)
                assert sorted(set(blocks["level"].tolist())) == [0, 1]
                assert attrs["periodic"] == "x,y" and list(attrs["cells"]) == [64, 32]
                for name in ("beam_right", "beam_left"):
                    g = fh[name]
                    assert g.attrs["mass"] == 1.0 and g.attrs["charge"] == -1.0
                    x, y = g["position/x"][()], g["position/y"][()]
                    assert g["velocity/x"].shape == g["velocity/y"].shape == x.shape
                    assert g["id"].dtype == np.int64 and g["weight"].dtype == np.float64
                    assert g["position/x"].attrs["units"] and g["velocity/x"].attrs["units"]
                    # every particle sits in a block its file's rank owns
                    owner = _owner(x.astype(np.float64), y.astype(np.float64), blocks)
                    assert np.all(blocks["rank"][owner] == r)
                    if snap == snaps[0]:
                        # cold beams at ±v0 on top of the 0.2 v0 drift, before anything happened
                        v = 1.2 if name == "beam_right" else -0.8
                        np.testing.assert_allclose(g["velocity/x"][()], v, rtol=1e-6)
                    ids.append(g["id"][()])
        assert len(steps) == 1
        assert all(np.array_equal(layouts[0]["rank"], b["rank"]) for b in layouts)
        rank_tables.append(layouts[0]["rank"])
        ids = np.sort(np.concatenate(ids))
        np.testing.assert_array_equal(ids, np.arange(PARTICLES))       # globally unique, none lost
        first_ids = ids if first_ids is None else first_ids
    # the load rebalance hands blocks to other ranks once, half-way
    changes = sum(not np.array_equal(a, b) for a, b in zip(rank_tables, rank_tables[1:]))
    assert changes == 1


def test_inlet_wall_hdf5_with_compound_species(demo):
    _, paths, _ = demo
    files = sorted(glob.glob(os.path.join(paths["inlet_wall"], "inlet_*.h5")))
    assert len(files) == 30
    previous = None
    for f in files:
        with h5py.File(f, "r") as fh:
            assert int(fh.attrs["step"]) == int(os.path.basename(f)[6:10])
            plus = fh["ar_plus"]
            n = plus["id"].shape[0]
            assert plus["position"].shape == plus["velocity"].shape == (n, 2)
            rec = fh["ar_2plus/particles"]
            assert rec.dtype.names == ("position", "velocity", "id", "weight")
            assert rec.dtype["position"].shape == (2,)
            assert fh["ar_2plus"].attrs["charge"] == pytest.approx(2 * fh["ar_plus"].attrs["charge"])
            blocks, attrs = _blocks(fh)
            assert sorted(set(blocks["level"].tolist())) == [0, 1] and attrs["periodic"] == "y"
            pos = plus["position"][()]
            assert np.all((pos[:, 0] >= 0) & (pos[:, 0] < 0.1))
            ids = np.concatenate([plus["id"][()], rec["id"]])
            assert np.unique(ids).size == ids.size
            if previous is not None:
                assert np.setdiff1d(ids, previous).size > 0      # created
                assert np.setdiff1d(previous, ids).size > 0      # lost
            previous = ids


def test_small_npz_csv_npy(demo):
    _, paths, _ = demo
    npz = sorted(glob.glob(os.path.join(paths["small_npz"], "*.npz")))
    assert len(npz) == 20
    with np.load(npz[1], allow_pickle=False) as z:
        assert z["step"].shape == z["time"].shape == z["field_energy"].shape == ()
        assert z["stars/mass"].shape == ()
        assert all(z[f"stars/{c}"].shape == (512,) for c in ("x", "y", "z", "vx", "vy", "vz", "id"))
        assert z["field_energy"] < 0                     # bound cluster

    csvs = sorted(glob.glob(os.path.join(paths["small_csv"], "duct_*.csv")))
    assert len(csvs) == 16
    with open(csvs[2], encoding="utf-8") as fh:
        head = [next(fh) for _ in range(4)]
    assert head[0].startswith("# step = ") and head[1].startswith("# time = ")
    assert head[3].strip() == "x,y,vx,vy,id,weight,mass"
    counts = [len(pd.read_csv(f, comment="#")) for f in csvs]
    assert counts[0] == 4000 and counts[-1] < counts[0]         # the leak
    layout = pd.read_csv(os.path.join(paths["small_csv"], "layout.csv"), comment="#")
    assert list(layout.columns) == ["block", "level", "rank", "x_lo", "x_hi", "y_lo", "y_hi"]
    assert sorted(layout["level"].unique().tolist()) == [0, 1]
    comments = [ln for ln in open(os.path.join(paths["small_csv"], "layout.csv"), encoding="utf-8")
                if ln.startswith("#")]
    assert [c.split("=")[0].strip() for c in comments] == ["# domain", "# cells", "# periodic"]

    npys = sorted(glob.glob(os.path.join(paths["small_npy"], "grains_*.npy")))
    assert len(npys) == 21
    rec = np.load(npys[0], allow_pickle=False)
    assert rec.dtype.names == ("x", "y", "vx", "vy", "radius", "mass", "id") and rec.ndim == 1


def test_runs_open_through_discovery(demo):
    from swarmaudit.readers.discover import open_run
    _, paths, _ = demo
    expect = {"two_stream": (SNAPSHOTS, {"beam_right", "beam_left"}),
              "inlet_wall": (30, {"ar_plus", "ar_2plus"}),
              "small_npz": (20, {"stars"}),
              "small_csv": (16, {"particles"}),
              "small_npy": (21, {"particles"})}
    for name, (count, species) in expect.items():
        run = open_run(paths[name])
        assert len(run) == count, name
        snap = run[len(run) - 1]
        assert set(snap.species) == species, name
        frame = next(iter(snap.species.values()))
        assert frame.momentum_kind() == "v" and frame.ndim == (3 if name == "small_npz" else 2)
    ts = open_run(paths["two_stream"])
    assert [ts[i].step for i in range(len(ts))] == sorted(ts[i].step for i in range(len(ts)))
    assert sum(len(f) for f in ts[0].species.values()) == PARTICLES
    assert ts[0].layout is not None and sorted(ts[0].layout.levels.tolist()) == [0, 1]


def test_variants_of_the_main_run(demo):
    from swarmaudit.readers.discover import open_run
    _, paths, _ = demo
    main, ranks, dt = (open_run(paths[k]) for k in ("two_stream", "two_stream_ranks", "two_stream_dt"))
    main_times = {round(main[i].time, 9) for i in range(len(main))}
    # the rank variant: 6 files a snapshot, 8 x 4 + 2 blocks, the same particles at the main run's steps
    assert {ranks[i].step for i in range(len(ranks))} <= {main[i].step for i in range(len(main))}
    assert len(ranks.refs[0].paths) == 6 and ranks[0].layout.nblocks == 34
    for sp in ("beam_right", "beam_left"):
        a, b = main[0].species[sp], ranks[0].species[sp]
        oa, ob = np.argsort(a["id"]), np.argsort(b["id"])
        np.testing.assert_array_equal(a["id"][oa], b["id"][ob])
        np.testing.assert_array_equal(a["position/x"][oa], b["position/x"][ob])
    # the changed-step variant: other steps, at times the main run also has
    assert {round(dt[i].time, 9) for i in range(len(dt))} <= main_times
    assert dt[len(dt) - 1].step == 384 and len(dt) >= 2


def test_second_call_with_the_same_parameters_keeps_the_runs(demo):
    out, paths, _ = demo
    probe = sorted(glob.glob(os.path.join(paths["small_npy"], "*.npy")))[0]
    before = os.stat(probe).st_mtime_ns
    said = []
    again = generate.write_demo_runs(out, particles=PARTICLES, snapshots=SNAPSHOTS, progress=said.append)
    assert again == paths and os.stat(probe).st_mtime_ns == before
    assert "already" in said[0]


def test_refuses_foreign_folders_and_bad_sizes(tmp_path):
    (tmp_path / "two_stream").mkdir()
    (tmp_path / "two_stream" / "mine.txt").write_text("not a demo file")
    with pytest.raises(OptionError, match="not written by the demo"):
        generate.write_demo_runs(tmp_path, particles=100, snapshots=2, progress=None)
    assert (tmp_path / "two_stream" / "mine.txt").exists()
    with pytest.raises(OptionError, match="--particles"):
        generate.write_demo_runs(tmp_path / "x", particles=1, progress=None)
    with pytest.raises(OptionError, match="--snapshots"):
        generate.write_demo_runs(tmp_path / "x", snapshots=0, progress=None)
    (tmp_path / "afile").write_text("")
    with pytest.raises(OptionError, match="file"):
        generate.write_demo_runs(tmp_path / "afile", progress=None)


def test_demo_command_without_serving(demo, capsys):
    from swarmaudit.app.demo_cmd import demo_command
    out, paths, _ = demo
    args = types.SimpleNamespace(out=str(out), particles=PARTICLES, snapshots=SNAPSHOTS, no_serve=True,
                                 force=False, port=0, share=False, password=None, no_browser=True)
    assert demo_command(args) == 0
    printed = capsys.readouterr().out
    assert all(p in printed for p in paths.values())


def test_check_gate_passes_the_pic_run_and_fails_the_leaking_duct(demo, capsys):
    from swarmaudit.app.cli import main
    _, paths, _ = demo
    assert main(["check", paths["two_stream"], "--rtol", "1e-3"]) == 0
    assert main(["check", paths["small_csv"], "--rtol", "0.01", "--quantities", "count"]) == 1
    capsys.readouterr()
