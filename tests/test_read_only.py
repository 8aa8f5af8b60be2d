"""Readers never write: every input file hashes the same (sha256) and keeps its mtime after being
opened and having every column read, on success and on error; every open asks for reading only.

Files are chmod 0o444 first. (As root that alone would not stop a write, hence the recorded
open modes and the hashes.)
"""

from __future__ import annotations

import builtins
import hashlib
import io
import os
import pickle
import zipfile

import h5py
import numpy as np
import numpy.lib.format as npformat
import pytest

from _readers_samples import WRITERS, particles
from swarmaudit.core.errors import InputError
from swarmaudit.readers import registry
from swarmaudit.readers.checks import frame_health
from swarmaudit.readers.discover import open_run


def _bad_files(d):
    p = particles(20, seed=2)
    out = []
    write, _ = WRITERS["h5_nested"]
    write(d / "cut.h5", p)
    raw = (d / "cut.h5").read_bytes()
    (d / "cut.h5").write_bytes(raw[: len(raw) // 3])
    out.append(d / "cut.h5")
    with h5py.File(d / "huge.h5", "w") as f:
        f.create_dataset("beam/x", shape=(10**12,), dtype="f8", chunks=(256,))
    out.append(d / "huge.h5")
    (d / "pickle.npy").write_bytes(pickle.dumps([1.0, 2.0]))
    out.append(d / "pickle.npy")
    buf = io.BytesIO()
    npformat.write_array_header_1_0(buf, {"descr": "|O", "fortran_order": False, "shape": (1,)})
    with zipfile.ZipFile(d / "object.npz", "w") as zf:
        zf.writestr("x.npy", buf.getvalue() + b"\x80\x04N.")
    out.append(d / "object.npz")
    (d / "ragged.csv").write_bytes(b"x,y\n1,2\n3\n")
    out.append(d / "ragged.csv")
    (d / "utf8.csv").write_bytes(b"x,y\n1,2\n3,\xff\n")
    out.append(d / "utf8.csv")
    (d / "empty.csv").write_bytes(b"")
    out.append(d / "empty.csv")
    return out


def _fingerprint(path):
    st = os.stat(path)
    return hashlib.sha256(path.read_bytes()).hexdigest(), st.st_size, st.st_mtime_ns


@pytest.fixture
def modes(monkeypatch):
    """Every file open (builtins.open, h5py.File, pyarrow.memory_map) with its mode."""
    import pyarrow
    seen = []
    real_open = builtins.open
    real_h5 = h5py.File.__init__
    real_map = pyarrow.memory_map

    def spy_map(path, mode="r"):
        seen.append((str(path), "arrow:" + mode))
        return real_map(path, mode)

    def spy_open(file, mode="r", *a, **kw):
        seen.append((str(file), mode))
        return real_open(file, mode, *a, **kw)

    def spy_h5(self, name, mode="r", *a, **kw):
        seen.append((str(name), "h5:" + mode))
        return real_h5(self, name, mode, *a, **kw)
    monkeypatch.setattr(builtins, "open", spy_open)
    monkeypatch.setattr(h5py.File, "__init__", spy_h5)
    monkeypatch.setattr(pyarrow, "memory_map", spy_map)
    return seen


def _read_everything(path):
    try:
        snap = registry.open_snapshot(str(path))
    except InputError as exc:
        assert str(path) in str(exc)
        return "error"
    for frame in snap.species.values():
        for col in frame.columns:
            try:
                frame[col]
            except InputError:
                pass
        try:
            frame_health(frame, snap.layout)
        except InputError:
            pass
    return "read"


def test_no_reader_writes_any_input(tmp_path, modes):
    p = particles(30, seed=9)
    good = []
    for name, (write, suffix) in WRITERS.items():
        path = tmp_path / f"{name}{suffix}"
        write(path, p)
        good.append(path)
    files = good + _bad_files(tmp_path)
    for f in files:
        os.chmod(f, 0o444)
    before = {f: _fingerprint(f) for f in files}
    modes.clear()
    outcomes = {f.name: _read_everything(f) for f in files}
    assert all(outcomes[f.name] == "read" for f in good)
    assert {f.name for f in files if outcomes[f.name] == "error"} >= {"cut.h5", "huge.h5", "pickle.npy",
                                                                   "object.npz", "empty.csv"}
    # every open that touched an input was for reading
    touched = [(f, m) for f, m in modes if any(f == str(x) for x in files)]
    assert touched, "the spy saw no opens"
    assert all(m in ("rb", "r", "h5:r", "arrow:r") for _, m in touched), touched
    assert {m for _, m in touched} >= {"rb", "h5:r", "arrow:r"}
    after = {f: _fingerprint(f) for f in files}
    assert after == before


def test_run_discovery_writes_nothing(tmp_path):
    for k in range(3):
        np.savez(tmp_path / f"s_{k}.npz", x=np.arange(4.0) + k, step=np.array(k))
    files = sorted(tmp_path.iterdir())
    for f in files:
        os.chmod(f, 0o444)
    os.chmod(tmp_path, 0o555)
    try:
        before = {f: _fingerprint(f) for f in files}
        run = open_run(str(tmp_path))
        for snap in run:
            snap.species["particles"]["x"]
        assert {f: _fingerprint(f) for f in files} == before
        assert sorted(tmp_path.iterdir()) == files      # no side files (locks, caches) appeared
    finally:
        os.chmod(tmp_path, 0o755)
