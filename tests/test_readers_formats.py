"""Every layout of the same particles reads back into the same frame.

Reference: the numpy arrays the files were written from (with h5py, numpy and pandas directly).
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from _readers_samples import ROLES, WRITERS, particles, write_csv, write_npz
from swarmaudit.core.roles import RoleMap
from swarmaudit.readers import registry
from swarmaudit.readers.csv_files import CSVReader
from swarmaudit.readers.hdf5 import HDF5Reader
from swarmaudit.readers.numpy_files import NumpyReader


@pytest.fixture(scope="module")
def ref():
    return particles(64, seed=3)


@pytest.mark.parametrize("layout", sorted(WRITERS))
def test_same_particles_in_every_layout(tmp_path, ref, layout):
    write, suffix = WRITERS[layout]
    path = tmp_path / f"snap{suffix}"
    write(path, ref)
    snap = registry.open_snapshot(str(path))
    assert len(snap.species) == 1
    frame = next(iter(snap.species.values()))
    assert frame.length == 64
    assert set(frame.roles) == set(ROLES)          # roles resolve the same in every layout
    assert frame.momentum_kind() == "v"
    for role in ROLES:
        got = frame.role(role)
        np.testing.assert_array_equal(got, ref[role], err_msg=f"{layout}: {role}")
        assert got.dtype == ref[role].dtype, (layout, role, got.dtype)
    assert frame.key_columns() == (frame.column_for("id"),)


def test_reader_found_by_content_without_suffix(tmp_path, ref):
    for layout, (write, suffix) in WRITERS.items():
        path = tmp_path / f"{layout}{suffix}"
        write(path, ref)
        bare = tmp_path / f"{layout}.dat"
        bare.write_bytes(path.read_bytes())
        kind = {".h5": HDF5Reader, ".npy": NumpyReader, ".npz": NumpyReader, ".csv": CSVReader}[suffix]
        assert isinstance(registry.reader_for(str(bare)), kind), layout


def test_hdf5_metadata(tmp_path, ref):
    path = tmp_path / "meta.h5"
    with h5py.File(path, "w") as f:
        f.attrs["step"] = np.int64(120)
        f.attrs["time"] = 0.75
        f.attrs["field_energy"] = 2.5
        f.attrs["time_unit"] = "ns"
        f.attrs["label"] = "not a number"
        f["total_charge"] = -3.0                       # a 0-d root dataset
        for name, q in (("beam_right", -1.0), ("beam_left", -1.0)):
            g = f.create_group(name)
            g.attrs["mass"] = 9.1e-31
            g.attrs["charge"] = q
            g["position/x"] = ref["x"]
            g["position/y"] = ref["y"]
            g["position/x"].attrs["units"] = "m"
            g["id"] = ref["id"]
            g["id"].attrs["units"] = b"1"
    snap = HDF5Reader().open(str(path))
    assert (snap.step, snap.time, snap.time_unit) == (120, 0.75, "ns")
    assert snap.meta == {"field_energy": 2.5, "total_charge": -3.0}
    assert sorted(snap.species) == ["beam_left", "beam_right"]
    f = snap.species["beam_right"]
    assert f.attrs == {"mass": 9.1e-31, "charge": -1.0}
    assert f.units == {"position/x": "m", "id": "1"}
    assert f.per_particle("charge") == -1.0


def test_hdf5_blocks_group_is_the_layout(tmp_path, ref):
    path = tmp_path / "blocks.h5"
    with h5py.File(path, "w") as f:
        g = f.create_group("beam")
        g["position"] = np.stack([ref["x"], ref["y"]], axis=1)
        b = f.create_group("blocks")
        b["lower"] = np.array([[-1.0, -1.0], [0.0, -1.0]])
        b["upper"] = np.array([[0.0, 1.0], [1.0, 1.0]])
        b["level"] = np.zeros(2, np.int64)
        b["rank"] = np.array([0, 1])
        b.attrs["domain_lower"] = [-1.0, -1.0]
        b.attrs["domain_upper"] = [1.0, 1.0]
        b.attrs["cells"] = [8, 8]
        b.attrs["periodic"] = "x"
    snap = HDF5Reader().open(str(path))
    assert list(snap.species) == ["beam"]              # never a species
    assert snap.layout.nblocks == 2 and snap.layout.periodic == (True, False)
    assert snap.species["beam"].columns == ["position/x", "position/y"]


def test_hdf5_root_table_and_nested_compound(tmp_path, ref):
    path = tmp_path / "root.h5"
    dt = np.dtype([("pos", [("x", "<f8"), ("y", "<f8")]), ("q", ">f4")])   # nested, big-endian field
    rec = np.zeros(64, dt)
    rec["pos"]["x"] = ref["x"]
    rec["pos"]["y"] = ref["y"]
    rec["q"] = 2.0
    with h5py.File(path, "w") as f:
        f["table"] = rec
        f.attrs["mass"] = 4.0
    snap = HDF5Reader().open(str(path))
    frame = snap.species["particles"]
    assert frame.columns == ["pos/x", "pos/y", "q"]
    np.testing.assert_array_equal(frame.role("y"), ref["y"])
    q = frame.role("charge")
    assert q.dtype.isnative and np.all(q == 2.0)
    assert frame.attrs["mass"] == 4.0


def test_hdf5_auto_discovery_of_an_unknown_layout(tmp_path, ref):
    path = tmp_path / "deep.h5"
    with h5py.File(path, "w") as f:
        f.create_group("empty")
        g = f.create_group("output/step_7/electrons")
        g["coords"] = np.stack([ref["x"], ref["y"], ref["z"]], axis=1)
        g["momentum/x"] = ref["vx"]
        g["w"] = ref["weight"]
        f["output/step_7/ions/x"] = ref["x"][:10]
        f["fields/E"] = np.zeros((8, 8, 8))                 # a mesh field, not particles
    snap = HDF5Reader().open(str(path))
    # both species sit in one container group: they are shown by their own names
    assert sorted(snap.species) == ["electrons", "ions"]
    assert snap.species["ions"].long_name == "output/step_7/ions"
    e = snap.species["electrons"]
    assert e.roles["x"] == "coords/x" and e.roles["px"] == "momentum/x" and e.roles["weight"] == "w"
    assert snap.species["ions"].length == 10
    assert any("fields/E" in w for w in snap.warnings)


def test_empty_species_is_a_warning(tmp_path):
    path = tmp_path / "empty.h5"
    with h5py.File(path, "w") as f:
        f["lost/x"] = np.zeros(0)
        f["kept/x"] = np.zeros(3)
    snap = HDF5Reader().open(str(path))
    assert snap.species["lost"].length == 0
    assert len(snap.species["lost"]["x"]) == 0
    assert any("'lost' has no particles" in w for w in snap.warnings)


def test_npz_species_prefix_and_scalars(tmp_path, ref):
    path = tmp_path / "s.npz"
    np.savez(path, **{"beam_a/x": ref["x"], "beam_a/y": ref["y"], "beam_a/mass": np.array(2.0),
                      "beam_b/position": np.stack([ref["x"][:5], ref["y"][:5]], axis=1),
                      "position/x": ref["x"][:7], "step": np.array(40), "time": np.array(1.5),
                      "field_energy": np.array(0.25)})
    snap = NumpyReader().open(str(path))
    assert (snap.step, snap.time, snap.meta) == (40, 1.5, {"field_energy": 0.25})
    assert sorted(snap.species) == ["beam_a", "beam_b", "particles"]
    assert snap.species["beam_a"].attrs == {"mass": 2.0}
    assert snap.species["beam_b"].columns == ["position/x", "position/y"]
    np.testing.assert_array_equal(snap.species["beam_b"].role("y"), ref["y"][:5])
    assert snap.species["particles"].length == 7


@pytest.mark.parametrize("keys,want", [
    # a species named like a vector stem keeps its positions (p/x is species p's x, not momentum)
    ({"p/x": 9, "p/y": 9, "p/vx": 9, "e/x": 4, "e/y": 4}, {"p": ["x", "y", "vx"], "e": ["x", "y"]}),
    ({"p/x": 9, "p/y": 9, "e/x": 4, "e/y": 4}, {"p": ["x", "y"], "e": ["x", "y"]}),
    # beside plain positions, p/x and p/y are the momentum of the unnamed species
    ({"x": 6, "y": 6, "p/x": 6, "p/y": 6}, {"particles": ["x", "y", "p/x", "p/y"]}),
    ({"position/x": 5, "position/y": 5, "e/x": 3, "e/vx": 3},
     {"particles": ["position/x", "position/y"], "e": ["x", "vx"]}),
])
def test_npz_prefix_is_a_species_or_a_vector(tmp_path, keys, want):
    path = tmp_path / "s.npz"
    np.savez(path, **{k: np.arange(n, dtype=float) for k, n in keys.items()}, step=np.array(3))
    snap = NumpyReader().open(str(path))
    assert {s: f.columns for s, f in snap.species.items()} == want
    if "p" in want:
        assert snap.species["p"].position_names == ["x", "y"] and snap.species["p"].length == 9


def test_csv_comment_scalars_blank_lines_and_crlf(tmp_path, ref):
    path = tmp_path / "s.csv"
    lines = ["# written by a test", "# step = 12", "# time = 0.5", "# field_energy = 1e-3",
             "# time_unit = s", "", "x;y;id"]
    lines += [f"{float(ref['x'][i])!r};{float(ref['y'][i])!r};{int(ref['id'][i])}" for i in range(64)]
    lines.insert(20, "# a comment between rows")
    lines.insert(30, "")
    path.write_bytes(("\r\n".join(lines) + "\r\n").encode())
    snap = CSVReader().open(str(path))
    assert (snap.step, snap.time, snap.time_unit, snap.meta) == (12, 0.5, "s", {"field_energy": 1e-3})
    f = snap.species["particles"]
    assert f.length == 64
    np.testing.assert_array_equal(f["x"], ref["x"])
    np.testing.assert_array_equal(f["id"], ref["id"])


def test_csv_and_npz_scalars_match_hdf5(tmp_path, ref):
    a, b = tmp_path / "a.npz", tmp_path / "b.csv"
    write_npz(a, ref, step=np.array(9), time=np.array(0.125))
    write_csv(b, ref, step=9, time=0.125)
    for p in (a, b):
        s = registry.open_snapshot(str(p))
        assert (s.step, s.time) == (9, 0.125), p


@pytest.mark.parametrize("layout", sorted(WRITERS))
def test_columns_argument_exposes_only_those(tmp_path, ref, layout):
    write, suffix = WRITERS[layout]
    path = tmp_path / f"c{suffix}"
    write(path, ref)
    full = next(iter(registry.open_snapshot(str(path)).species.values()))
    want = [full.column_for("x"), full.column_for("vy")]
    frame = next(iter(registry.open_snapshot(str(path), columns=want).species.values()))
    assert frame.columns == want
    np.testing.assert_array_equal(frame[want[1]], ref["vy"])


def test_user_role_map_applies_to_every_reader(tmp_path, ref):
    path = tmp_path / "m.npz"
    np.savez(path, a=ref["x"], b=ref["y"])
    snap = registry.open_snapshot(str(path)).with_role_map(RoleMap({"x": "a", "y": "b"}))
    np.testing.assert_array_equal(snap.species["particles"].positions()[1], ref["y"])


def test_h5_dataset_with_shape_n_1_and_wide_vectors(tmp_path, ref):
    path = tmp_path / "w.h5"
    with h5py.File(path, "w") as f:
        f["g/position"] = ref["x"][:, None]
        f["g/attribs"] = np.arange(64 * 5.0).reshape(64, 5)
    frame = HDF5Reader().open(str(path)).species["g"]
    assert sorted(frame.columns) == ["attribs/0", "attribs/1", "attribs/2", "attribs/3", "attribs/4", "position/x"]
    np.testing.assert_array_equal(frame["attribs/3"], np.arange(64 * 5.0).reshape(64, 5)[:, 3])
    assert frame.ndim == 1


class _PairsReader:
    """A third-party reader as a lab would write one: 'x y' number pairs, one particle a line.

    Its columns are :class:`Column` objects that read a row range alone (the README's example).
    """

    name = "pairs"
    suffixes = (".pairs",)

    def can_open(self, path):
        with open(path, "rb") as fh:
            return fh.read(6) == b"PAIRS\n"

    def open(self, path, columns=None):
        from swarmaudit.core.column import Column
        from swarmaudit.core.frame import Frame, Snapshot
        with open(path) as fh:
            n = sum(1 for _ in fh) - 1

        def column(k):
            def rows(start, stop):
                if stop <= start:
                    return np.empty(0)
                return np.loadtxt(path, skiprows=1 + start, max_rows=stop - start, usecols=k, ndmin=1)
            return Column(lambda: rows(0, n), rows=rows, dtype=np.float64, length=n)
        loaders = {"x": column(0), "y": column(1)}
        if columns is not None:
            loaders = {c: loaders[c] for c in columns}
        return Snapshot(str(path), {"particles": Frame("particles", n, loaders, source=str(path))})


class _PlainPairsReader(_PairsReader):
    """The same format through plain zero-argument callables (the older contract, still taken)."""

    def open(self, path, columns=None):
        from swarmaudit.core.frame import Frame, Snapshot
        with open(path) as fh:
            n = sum(1 for _ in fh) - 1

        def column(k):
            return lambda: np.loadtxt(path, skiprows=1, usecols=k, ndmin=1)
        loaders = {"x": column(0), "y": column(1)}
        if columns is not None:
            loaders = {c: loaders[c] for c in columns}
        return Snapshot(str(path), {"particles": Frame("particles", n, loaders, source=str(path))})


@pytest.mark.parametrize("reader", [_PairsReader, _PlainPairsReader])
def test_third_party_reader_plugin(tmp_path, monkeypatch, reader):
    from swarmaudit.readers.discover import open_run
    monkeypatch.setattr(registry, "_READERS", list(registry.readers()))
    registry.register(reader())
    for k in (2, 1):
        (tmp_path / f"p_{k}.pairs").write_text(f"PAIRS\n{k} 0.5\n{k + 1} 1.5\n")
    run = open_run(str(tmp_path))
    assert run.labels == ["p_1.pairs", "p_2.pairs"]
    np.testing.assert_array_equal(run[1].species["particles"].role("x"), [2.0, 3.0])


def test_plugin_columns_stream_in_pieces_like_numpy_reads_them(tmp_path):
    # a reader's Column with a row read is split into pieces by the engine; the pieces joined
    # are numpy.loadtxt's reading of the whole file; a plain callable is wrapped and never split
    from swarmaudit.engine.pieces import frame_pieces, read_column
    rng = np.random.default_rng(5)
    xy = rng.normal(size=(1000, 2))
    path = tmp_path / "p.pairs"
    with open(path, "w") as fh:
        fh.write("PAIRS\n")
        np.savetxt(fh, xy, fmt="%.17g")
    want = np.loadtxt(path, skiprows=1)
    frame = _PairsReader().open(str(path)).species["particles"]
    col = frame.loader("x")
    assert col.can_read_rows and col.dtype == np.float64 and col.length == 1000
    pieces = frame_pieces(frame, ["x", "y"], rows=100)
    assert len(pieces) > 5
    for name, k in (("x", 0), ("y", 1)):
        got = np.concatenate([read_column(p, name) for p in pieces])
        np.testing.assert_array_equal(got, want[:, k])
    buf = np.empty(7)
    assert col.rows_into(10, 17, buf) is buf
    np.testing.assert_array_equal(buf, want[10:17, 0])

    plain = _PlainPairsReader().open(str(path)).species["particles"]
    wrapped = plain.loader("x")
    assert not wrapped.can_read_rows and wrapped.dtype is None and not wrapped.direct()
    assert wrapped.file_extent() is None
    with wrapped.hold():       # holding a column that has no file handle to keep is a no-op
        np.testing.assert_array_equal(wrapped.rows(3, 9), want[3:9, 0])
    assert len(frame_pieces(plain, ["x", "y"], rows=100)) == 1
    np.testing.assert_array_equal(plain["y"], want[:, 1])


def test_a_column_must_be_a_column_or_a_callable():
    from swarmaudit.core.frame import Frame
    with pytest.raises(TypeError, match="zero-argument callable"):
        Frame("p", 3, {"x": np.arange(3.0)})
