"""Bad input: one InputError naming the file and the problem, raised on open or on the column read."""

from __future__ import annotations

import pickle
import time

import h5py
import numpy as np
import numpy.lib.format as npformat
import pytest

from _readers_samples import particles, write_csv, write_h5_nested, write_npy, write_npz
from swarmaudit.core.errors import InputError
from swarmaudit.readers import registry
from swarmaudit.readers.csv_files import CSVReader

REF = particles(40, seed=7)


def _fails(path, *words, column=None):
    """The InputError of opening ``path`` (or of reading ``column``), checked to name the file."""
    with pytest.raises(InputError) as info:
        snap = registry.open_snapshot(str(path))
        frame = next(iter(snap.species.values()))
        frame[column or frame.columns[0]]
    text = str(info.value)
    assert str(path) in text
    for w in words:
        assert w.lower() in text.lower(), text
    return text


@pytest.mark.parametrize("suffix", [".h5", ".npy", ".npz", ".csv"])
def test_empty_file(tmp_path, suffix):
    p = tmp_path / f"empty{suffix}"
    p.write_bytes(b"")
    _fails(p, "empty")


def test_truncated_hdf5(tmp_path):
    p = tmp_path / "t.h5"
    write_h5_nested(p, REF)
    data = p.read_bytes()
    p.write_bytes(data[: len(data) // 2])
    _fails(p)


def test_not_hdf5(tmp_path):
    p = tmp_path / "n.h5"
    p.write_bytes(b"this is a text file, not a snapshot\n" * 4)
    _fails(p, "not a valid hdf5")


def test_hdf5_without_particle_table(tmp_path):
    p = tmp_path / "none.h5"
    with h5py.File(p, "w") as f:
        f.attrs["step"] = 3
        f.create_group("empty")
        f["scalar"] = 1.0
    _fails(p, "no particle table")


def test_hdf5_unequal_lengths(tmp_path):
    p = tmp_path / "u.h5"
    with h5py.File(p, "w") as f:
        f["beam/x"] = np.zeros(10)
        f["beam/y"] = np.zeros(9)
    _fails(p, "different lengths", "/beam")


def test_hdf5_component_group_of_other_length(tmp_path):
    p = tmp_path / "u2.h5"
    with h5py.File(p, "w") as f:
        f["beam/id"] = np.arange(10)
        f["beam/position/x"] = np.zeros(9)
    _fails(p, "different lengths")


def test_hdf5_strings_as_positions(tmp_path):
    p = tmp_path / "s.h5"
    with h5py.File(p, "w") as f:
        f["beam/x"] = np.array([b"a", b"b"])
        f["beam/y"] = np.zeros(2)
    _fails(p, "/beam/x", "text, not numbers")


def test_hdf5_string_label_column_is_left_out(tmp_path):
    p = tmp_path / "label.h5"
    with h5py.File(p, "w") as f:
        f["beam/x"] = np.zeros(2)
        f["beam/label"] = np.array([b"a", b"b"])
    snap = registry.open_snapshot(str(p))
    assert snap.species["beam"].columns == ["x"]
    assert any("label" in w for w in snap.warnings)


def test_hdf5_huge_declared_shape_is_refused_fast(tmp_path):
    p = tmp_path / "huge.h5"
    with h5py.File(p, "w") as f:
        f.create_dataset("beam/x", shape=(10**12,), dtype="f8", chunks=(1024,))
    t0 = time.perf_counter()
    _fails(p, "declares", "stores 0 bytes")
    assert time.perf_counter() - t0 < 5


def test_npy_pickle(tmp_path):
    p = tmp_path / "p.npy"
    p.write_bytes(pickle.dumps({"x": [1.0, 2.0]}))
    _fails(p, "pickled", "never loads pickles")


def test_npy_object_array(tmp_path):
    # an object-array header followed by a pickle, written by hand (no pickling API is used)
    p = tmp_path / "o.npy"
    with open(p, "wb") as fh:
        npformat.write_array_header_1_0(fh, {"descr": "|O", "fortran_order": False, "shape": (2,)})
        fh.write(pickle.dumps([1, "a"]))
    _fails(p, "python objects")


def test_npz_object_member(tmp_path):
    import io
    import zipfile
    p = tmp_path / "o.npz"
    buf = io.BytesIO()
    npformat.write_array_header_1_0(buf, {"descr": "|O", "fortran_order": False, "shape": (2,)})
    buf.write(pickle.dumps([1, "a"]))
    with zipfile.ZipFile(p, "w") as zf:
        zf.writestr("x.npy", buf.getvalue())
    _fails(p, "array 'x'", "python objects")


def test_plain_2d_npy_is_not_guessed(tmp_path):
    p = tmp_path / "plain.npy"
    np.save(p, np.zeros((10, 4)))
    _fails(p, "without column names", "structured array", "npz")


def test_truncated_npy(tmp_path):
    p = tmp_path / "t.npy"
    write_npy(p, REF)
    data = p.read_bytes()
    p.write_bytes(data[:-100])
    _fails(p, "truncated")


def test_npy_header_claiming_10_to_12_rows(tmp_path):
    p = tmp_path / "h.npy"
    with open(p, "wb") as fh:
        npformat.write_array_header_1_0(fh, {"descr": [("x", "<f8")], "fortran_order": False,
                                             "shape": (10**12,)})
        fh.write(b"\0" * 64)
    _fails(p, "declares 1000000000000 records")


def test_npz_header_claiming_10_to_12_rows(tmp_path):
    import io
    import zipfile
    p = tmp_path / "h.npz"
    buf = io.BytesIO()
    npformat.write_array_header_1_0(buf, {"descr": "<f8", "fortran_order": False, "shape": (10**12,)})
    buf.write(b"\0" * 64)
    with zipfile.ZipFile(p, "w") as zf:
        zf.writestr("x.npy", buf.getvalue())
    _fails(p, "array 'x' declares")


def test_npz_unequal_lengths(tmp_path):
    p = tmp_path / "u.npz"
    np.savez(p, x=np.zeros(5), y=np.zeros(4))
    _fails(p, "different lengths")


def test_npz_strings_as_positions(tmp_path):
    p = tmp_path / "s.npz"
    np.savez(p, x=np.array(["1.0", "2.0"]), y=np.zeros(2))
    _fails(p, "array 'x'", "text")


def test_truncated_npz(tmp_path):
    p = tmp_path / "t.npz"
    write_npz(p, REF)
    data = p.read_bytes()
    p.write_bytes(data[: len(data) // 2])
    _fails(p)


def test_csv_bad_utf8_in_a_value(tmp_path):
    p = tmp_path / "b.csv"
    p.write_bytes(b"# step = 1\nx,y\n1,2\n3,\xff\xfe\n5,6\n")
    _fails(p, "column 'y'", "line 4", "utf-8", column="y")


def test_csv_bad_utf8_in_the_header(tmp_path):
    p = tmp_path / "h.csv"
    p.write_bytes(b"x,\xe9\n1,2\n")
    _fails(p, "line 1", "utf-8")


def test_csv_ragged_row(tmp_path):
    p = tmp_path / "r.csv"
    p.write_bytes(b"x,y,z\n1,2,3\n4,5\n6,7,8\n")
    _fails(p, "line 3", "2 fields", "header has 3")


def test_csv_row_with_too_many_fields(tmp_path):
    p = tmp_path / "r2.csv"
    p.write_bytes(b"x,y\n" + b"1,2\n" * 5000 + b"1,2,3\n")
    _fails(p, "line 5002", "3 fields")


def test_csv_text_in_a_numeric_column_late_in_the_file(tmp_path):
    # the first block makes pyarrow guess int64; the bad value comes much later
    p = tmp_path / "t.csv"
    rows = [f"{i},{i}" for i in range(200_000)]
    rows[150_000] = "150000,oops"
    p.write_text("# time = 2\nid,x\n" + "\n".join(rows) + "\n")
    _fails(p, "column 'x'", f"line {150_000 + 3}", "'oops' is not a number", column="x")


def test_csv_numbers_without_header(tmp_path):
    p = tmp_path / "n.csv"
    p.write_text("1,2,3\n4,5,6\n")
    _fails(p, "numbers, not column names")


def test_csv_duplicate_header(tmp_path):
    p = tmp_path / "d.csv"
    p.write_text("x,y,x\n1,2,3\n")
    _fails(p, "'x' twice")


def test_csv_comments_only(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text("# step = 1\n\n# nothing else\n")
    _fails(p, "no header row")


def test_unknown_column_asked_for(tmp_path):
    p = tmp_path / "ok.csv"
    write_csv(p, REF)
    with pytest.raises(InputError, match="no column 'nope'") as info:
        registry.open_snapshot(str(p), columns=["x", "nope"])
    assert str(p) in str(info.value)


def test_step_that_is_not_whole(tmp_path):
    p = tmp_path / "s.h5"
    with h5py.File(p, "w") as f:
        f.attrs["step"] = 1.5
        f["x"] = np.zeros(3)
    _fails(p, "not a whole number")


def test_hdf5_compressed_dataset_mostly_unwritten(tmp_path):
    p = tmp_path / "sparse.h5"
    with h5py.File(p, "w") as f:
        ds = f.create_dataset("beam/x", shape=(10**9,), dtype="f8", chunks=(1000,), compression="gzip")
        ds[:1000] = 1.0                     # one chunk of a million
    _fails(p, "declares 1000000000 rows")


def test_hdf5_compressed_dataset_reads(tmp_path):
    # the ratio guard must not refuse honest compression (deflate tops out near 1000x)
    p = tmp_path / "zeros.h5"
    with h5py.File(p, "w") as f:
        f.create_dataset("beam/x", data=np.zeros(10**6), chunks=(10**5,), compression="gzip",
                         compression_opts=9, shuffle=True)
    frame = registry.open_snapshot(str(p)).species["beam"]
    assert not frame["x"].any()


def test_csv_integers_beyond_float_precision_with_blanks_are_a_clear_error(tmp_path):
    # an empty value makes the column floating point (NaN); 2**53 + 1 has no float64 of its own
    # (IEEE 754 double: 53-bit significand), so rounding it would be silent corruption
    path = tmp_path / "big.csv"
    path.write_text("x,y,vx\n\n0.0,,0.0\n0.0,9007199254740993,0.0\n")
    frame = next(iter(CSVReader().open(str(path)).species.values()))
    with pytest.raises(InputError, match=r"big\.csv: column 'y' has empty values and integers beyond"):
        frame["y"]
    np.testing.assert_array_equal(frame["x"], [0.0, 0.0])


def test_csv_header_that_cannot_be_split_is_a_clear_error(tmp_path):
    path = tmp_path / "cr.csv"
    path.write_bytes(b"\r\x01")              # a carriage return, then a control byte: no header
    with pytest.raises(InputError, match=r"cr\.csv: the header \(line 1\) cannot be split"):
        CSVReader().open(str(path))
