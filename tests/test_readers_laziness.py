"""Asking for x and y of an 8-column file reads neither of the other six.

Proven per format by watching the library calls that touch data: h5py dataset reads and direct
reads of contiguous HDF5 datasets, the zip members opened, the memory map behind .npy columns, the columns pyarrow is told to convert.
"""

from __future__ import annotations

import zipfile

import h5py
import numpy as np
import pytest

from _readers_samples import (particles, write_csv, write_h5_compound, write_h5_nd, write_h5_soa,
                              write_npy, write_npz)
from swarmaudit.readers import csv_files, hdf5
from swarmaudit.readers.csv_files import CSVReader
from swarmaudit.readers.hdf5 import HDF5Reader
from swarmaudit.readers.numpy_files import NumpyReader

REF = particles(50, seed=5)


@pytest.fixture
def h5_reads(monkeypatch):
    seen = []
    original = h5py.Dataset.__getitem__

    def spy(self, args, new_dtype=None):
        if new_dtype is None:      # h5py calls itself again with the field's dtype: one read
            seen.append((self.name, args))
        else:
            seen[-1] = seen[-1] + (new_dtype,)
        return original(self, args, new_dtype)
    monkeypatch.setattr(h5py.Dataset, "__getitem__", spy)
    direct = hdf5._Extent.read

    def spy_direct(self, path, start, count, out=None):  # a contiguous dataset read from the file
        seen.append((self.name, (start, count)))
        return direct(self, path, start, count, out)
    monkeypatch.setattr(hdf5._Extent, "read", spy_direct)
    return seen


def test_hdf5_soa_reads_only_the_asked_datasets(tmp_path, h5_reads):
    path = tmp_path / "soa.h5"
    write_h5_soa(path, REF, group="beam", step=3)
    frame = HDF5Reader().open(str(path)).species["beam"]
    assert h5_reads == []                             # opening reads metadata only
    np.testing.assert_array_equal(frame.role("x"), REF["x"])
    np.testing.assert_array_equal(frame.role("y"), REF["y"])
    frame.role("x")                                   # cached: no second read
    assert [name for name, _ in h5_reads] == ["/beam/x", "/beam/y"]
    assert frame.reads == 2


def test_hdf5_nd_reads_one_column_slice(tmp_path, h5_reads):
    path = tmp_path / "nd.h5"
    write_h5_nd(path, REF)
    frame = HDF5Reader().open(str(path)).species["beam"]
    np.testing.assert_array_equal(frame.role("y"), REF["y"])
    assert len(h5_reads) == 1
    name, args = h5_reads[0]
    assert name == "/beam/position" and args[1] == 1        # the (:, 1) hyperslab, not the array


def test_hdf5_compound_reads_one_field(tmp_path, h5_reads):
    path = tmp_path / "c.h5"
    write_h5_compound(path, REF)
    frame = HDF5Reader().open(str(path)).species["beam"]
    np.testing.assert_array_equal(frame.role("x"), REF["x"])
    np.testing.assert_array_equal(frame.role("weight"), REF["weight"])
    # the memory type of each read holds one field: HDF5 converts nothing else into memory
    assert [(n, a, dt.names) for n, a, dt in h5_reads] == [
        ("/beam/particles", "position", ("position",)), ("/beam/particles", "weight", ("weight",))]


def test_hdf5_loader_keeps_no_file_open(tmp_path):
    path = tmp_path / "soa.h5"
    write_h5_soa(path, REF)
    frame = HDF5Reader().open(str(path)).species["particles"]
    frame.role("x")
    with h5py.File(path, "a") as f:          # would fail ("already open") if a handle were left
        f.attrs["touched"] = 1


def _memmap_under(arr) -> bool:
    while arr is not None:
        if isinstance(arr, np.memmap):
            return True
        arr = arr.base if isinstance(arr, np.ndarray) else None
    return False


def test_npy_columns_are_compact_reads_of_one_field(tmp_path):
    # a view of a memory map would keep every page of the interleaved records resident;
    # a field is read through a small buffer into its own compact array instead
    path = tmp_path / "s.npy"
    write_npy(path, REF)
    frame = NumpyReader().open(str(path)).species["particles"]
    x, y = frame.role("x"), frame.role("y")
    np.testing.assert_array_equal(x, REF["x"])
    np.testing.assert_array_equal(y, REF["y"])
    for col in (x, y):
        assert not _memmap_under(col) and col.flags.c_contiguous and col.strides == (8,)
    assert frame.reads == 2
    rows = frame.loader(frame.column_for("x")).rows   # a row range alone, for partitioned reads
    np.testing.assert_array_equal(rows(3, 7), REF["x"][3:7])


def test_npz_opens_only_the_asked_members(tmp_path, monkeypatch):
    path = tmp_path / "s.npz"
    write_npz(path, REF, step=np.array(4))
    reader = NumpyReader()
    opened = []
    original = zipfile.ZipFile.open

    def spy(self, name, *a, **kw):
        opened.append(getattr(name, "filename", name))
        return original(self, name, *a, **kw)
    monkeypatch.setattr(zipfile.ZipFile, "open", spy)
    frame = reader.open(str(path)).species["particles"]
    at_open = len(opened)
    opened.clear()
    frame.role("x"), frame.role("y")
    assert opened == ["x.npy", "y.npy"]
    assert at_open == 9 + 1      # each member's header once (+ the 0-d step value); no data


def test_csv_parses_only_the_asked_columns(tmp_path, monkeypatch):
    path = tmp_path / "s.csv"
    write_csv(path, REF)
    asked = []
    original = csv_files.read_table

    def spy(lay, include, *a, **kw):
        asked.append(list(include))
        return original(lay, include, *a, **kw)
    monkeypatch.setattr(csv_files, "read_table", spy)
    frame = CSVReader().open(str(path)).species["particles"]
    assert asked == []
    np.testing.assert_array_equal(frame.role("x"), REF["x"])
    np.testing.assert_array_equal(frame.role("y"), REF["y"])
    assert asked == [["x"], ["y"]]
