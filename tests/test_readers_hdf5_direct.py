"""Contiguous HDF5 datasets read straight from the file give what h5py gives.

Reference: h5py reading the same dataset (the HDF5 library's own read path). The direct path
is taken only for plain 1-D contiguous, unfiltered datasets of a type numpy maps bit for bit;
everything else must still read through h5py, and a file changed after it was opened must never
be read at its old offsets.
"""

from __future__ import annotations

import os

import h5py
import numpy as np
import pytest

from _need import need_that

from swarmaudit.audit.tables import _held_open
from swarmaudit.core.errors import InputError
from swarmaudit.readers import hdf5
from swarmaudit.readers.hdf5 import HDF5Reader

N = 5003


def _write(path, userblock=0):
    rng = np.random.default_rng(3)
    cols = {"x": rng.random(N), "vx": rng.normal(size=N).astype(np.float32),
            "id": np.arange(N, dtype=">i4"), "tag": rng.integers(0, 60000, N).astype(np.uint16)}
    kw = {"userblock_size": userblock} if userblock else {}
    with h5py.File(path, "w", **kw) as fh:
        g = fh.create_group("beam")
        for k, v in cols.items():
            g[k] = v
        g.create_dataset("y", data=rng.random(N), chunks=(1000,))
        g.create_dataset("z", data=rng.random(N), compression="gzip")
        g["v3"] = rng.random((N, 3))
    return path


def _h5(path, name):
    with h5py.File(path, "r") as fh:
        return fh[f"beam/{name}"][()]


@pytest.mark.parametrize("userblock", [0, 1024])
def test_direct_reads_equal_h5py(tmp_path, userblock):
    path = _write(tmp_path / "s.h5", userblock)
    frame = HDF5Reader().open(str(path)).species["beam"]
    for name in ("x", "vx", "id", "tag"):
        load = frame.loader(name)
        assert load.direct(), name
        want = _h5(path, name)
        got = frame[name]
        assert got.dtype == want.dtype.newbyteorder("=") and got.dtype.isnative
        np.testing.assert_array_equal(got, want)
        np.testing.assert_array_equal(load.rows(17, 4000), want[17:4000])
        buf = np.empty(100, dtype=load.dtype)
        assert load.rows_into(4903, 5003, buf) is buf
        np.testing.assert_array_equal(buf, want[4903:])


def test_other_storage_reads_through_h5py(tmp_path):
    path = _write(tmp_path / "s.h5")
    frame = HDF5Reader().open(str(path)).species["beam"]
    for name, want in (("y", _h5(path, "y")), ("z", _h5(path, "z")),
                       ("v3/y", _h5(path, "v3")[:, 1])):
        load = frame.loader(name)
        assert not load.direct(), name
        np.testing.assert_array_equal(frame[name], want)
        np.testing.assert_array_equal(load.rows(10, 20), want[10:20])


def test_a_file_rewritten_after_opening_is_read_anew(tmp_path):
    path = _write(tmp_path / "s.h5")
    frame = HDF5Reader().open(str(path)).species["beam"]
    with h5py.File(path, "w") as fh:          # the writer replaces the file: other layout, values
        g = fh.create_group("beam")
        g["pad"] = np.zeros(999)
        g["x"] = np.arange(N, dtype=np.float64)
    np.testing.assert_array_equal(frame.loader("x")(), np.arange(N, dtype=np.float64))


def test_a_file_truncated_after_opening_is_a_clear_error(tmp_path):
    path = _write(tmp_path / "s.h5")
    frame = HDF5Reader().open(str(path)).species["beam"]
    size = os.path.getsize(path)
    with open(path, "r+b") as fh:
        fh.truncate(size // 3)
    for hold in (False, True):
        with pytest.raises(InputError) as err:
            if hold:
                with _held_open(frame):
                    frame.loader("tag").rows(0, N)
            else:
                frame.loader("tag")()
        assert str(path) in str(err.value)


def test_a_hold_shares_one_descriptor_and_closes_it(tmp_path):
    path = str(_write(tmp_path / "s.h5"))
    frame = HDF5Reader().open(path).species["beam"]
    with _held_open(frame):
        assert hdf5._fds[path][1] >= 1
        np.testing.assert_array_equal(frame.loader("x").rows(0, 10), _h5(path, "x")[:10])
    assert path not in hdf5._fds


def test_opening_and_reading_leave_no_file_open(tmp_path):
    need_that(os.path.isdir("/proc/self/fd"), "needs /proc to count open files")
    paths = [str(_write(tmp_path / f"s{i}.h5")) for i in range(5)]
    before = len(os.listdir("/proc/self/fd"))
    frames = [HDF5Reader().open(p).species["beam"] for p in paths]
    for f in frames:
        f["x"], f["y"], f.loader("tag").rows(0, 10)
        with _held_open(f):
            f.loader("vx").rows(0, 10)
    assert len(os.listdir("/proc/self/fd")) == before
    assert hdf5._fds == {}
