"""Property-based fuzzing of every reader with broken input (hypothesis).

The only allowed outcomes: a Snapshot whose columns can all be read (or raise InputError when
read), or an InputError on open; the message names the file. Never another exception, no hang
(hypothesis deadline plus an alarm), no memory blow-up (peak RSS checked at the end).
"""

from __future__ import annotations

import collections
import io
import itertools
import os
import resource
import signal
import tempfile
import warnings
import zipfile
from datetime import timedelta

import h5py
import numpy as np
import numpy.lib.format as npformat
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from _readers_samples import WRITERS, particles
from swarmaudit.core.errors import InputError
from swarmaudit.core.frame import Snapshot
from swarmaudit.readers import registry
from swarmaudit.readers.checks import frame_health
from swarmaudit.readers.csv_files import CSVReader
from swarmaudit.readers.hdf5 import HDF5Reader
from swarmaudit.readers.numpy_files import NumpyReader

READERS = {".h5": HDF5Reader(), ".npy": NumpyReader(), ".npz": NumpyReader(), ".csv": CSVReader()}
TRIED = collections.Counter()           # inputs tried, per test
OUTCOMES = collections.Counter()
RUNS = set()
TMP = tempfile.TemporaryDirectory(prefix="swarmaudit-fuzz-")
_names = itertools.count()
_RSS_START = [None]   # the process's peak memory when this module's first test starts


@pytest.fixture(autouse=True, scope="module")
def _peak_before_fuzzing():
    # taken here, not at import: the tests of other modules run between collection and this one,
    # and their peak must not count as growth while fuzzing
    _RSS_START[0] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    yield



#: SWARMAUDIT_FUZZ_SCALE=10 for a longer campaign than the default few thousand inputs
SCALE = float(os.environ.get("SWARMAUDIT_FUZZ_SCALE", "1"))


def fuzz(examples: int):
    return settings(max_examples=max(1, int(examples * SCALE)), deadline=timedelta(seconds=5), database=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


def _alarm(signum, frame):
    raise TimeoutError("a reader took more than 20 s on one fuzz input")


def _file(data: bytes, suffix: str) -> str:
    path = os.path.join(TMP.name, f"in{next(_names)}{suffix}")
    with open(path, "wb") as fh:
        fh.write(data)
    return path


def exercise(path: str, test: str, reader=None) -> str:
    """Open ``path`` and read every column; return the outcome, failing on anything not allowed."""
    TRIED[test] += 1
    old = signal.signal(signal.SIGALRM, _alarm)
    signal.alarm(20)
    try:
        outcome = _exercise(path, reader)
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, old)
        os.remove(path)
    OUTCOMES[outcome] += 1
    return outcome


def _exercise(path, reader):
    if reader is not None:
        assert isinstance(reader.can_open(path), bool)
    try:
        snap = reader.open(path) if reader is not None else registry.open_snapshot(path)
    except InputError as exc:
        assert path in str(exc), str(exc)
        return "error on open"
    assert isinstance(snap, Snapshot)
    outcome = "read"
    for frame in snap.species.values():
        assert frame.length >= 0
        for col in frame.columns:
            try:
                arr = frame[col]
            except InputError as exc:
                assert path in str(exc), str(exc)
                outcome = "error on read"
                continue
            assert arr.ndim == 1 and arr.shape[0] == frame.length and arr.dtype.kind in "biuf"
        try:
            frame_health(frame, snap.layout)
        except InputError as exc:
            assert path in str(exc)
    return outcome


# 1. random bytes, with or without a format's magic in front ---------------------------------

MAGICS = [b"", b"\x89HDF\r\n\x1a\n", b"\x93NUMPY\x01\x00", b"\x93NUMPY\x03\x00", b"PK\x03\x04",
          b"PK\x05\x06", b"\x80\x04\x95", b"x,y\n", b"# step = 1\nx,y\n1,2\n"]


@fuzz(500)
@given(magic=st.sampled_from(MAGICS), body=st.binary(max_size=3000),
       suffix=st.sampled_from(sorted(READERS) + [".dat"]))
def test_random_bytes(magic, body, suffix):
    RUNS.add("random_bytes")
    path = _file(magic + body, suffix)
    exercise(path, "random_bytes", READERS.get(suffix))
    path = _file(magic + body, suffix)
    exercise(path, "random_bytes")      # through the registry: content decides the reader


# 2. valid files cut short or with bytes overwritten -------------------------------------------

def _valid_files() -> dict[str, bytes]:
    out = {}
    p = particles(12, seed=1)
    with tempfile.TemporaryDirectory() as d:
        for name, (write, suffix) in WRITERS.items():
            path = os.path.join(d, name + suffix)
            write(path, p)
            with open(path, "rb") as fh:
                out[name] = fh.read()
    return out


VALID = _valid_files()


@fuzz(600)
@given(layout=st.sampled_from(sorted(VALID)), cut=st.floats(0, 1), data=st.data())
def test_truncated_and_overwritten(layout, cut, data):
    RUNS.add("truncated")
    raw = VALID[layout]
    suffix = WRITERS[layout][1]
    reader = READERS[suffix]
    if data.draw(st.booleans(), label="truncate"):
        body = raw[: int(cut * len(raw))]
    else:
        at = int(cut * (len(raw) - 1))
        junk = data.draw(st.binary(min_size=1, max_size=16), label="junk")
        body = raw[:at] + junk + raw[at + len(junk):]
    exercise(_file(body, suffix), "truncated", reader)


# 3. generated HDF5 files: wrong dtypes, mismatched lengths, huge shapes, empty groups --------

NAMES = st.sampled_from(["x", "y", "z", "id", "w", "position", "velocity", "blocks", "beam", "q",
                         "label", "0", "time", "step"])
FLOATS = st.floats(allow_nan=True, allow_infinity=True, width=64)


@st.composite
def h5_dataset(draw):
    kind = draw(st.sampled_from(["f8", "i4", "u1", "bool", "f2", ">f8", "S4", "vlen", "compound",
                                 "huge", "empty", "scalar"]))
    n = draw(st.integers(0, 6))
    shape = draw(st.sampled_from([(n,), (n, draw(st.integers(0, 4))), (n, 2, 2), ()]))
    return kind, shape, draw(FLOATS)


@st.composite
def h5_tree(draw, depth=0):
    tree = {}
    for _ in range(draw(st.integers(0, 4))):
        name = draw(NAMES)
        if depth < 2 and draw(st.booleans()):
            tree[name] = draw(h5_tree(depth=depth + 1))
        else:
            tree[name] = draw(h5_dataset())
    return tree


def _write_tree(group, tree):
    for name, node in tree.items():
        if name in group:
            continue
        if isinstance(node, dict):
            _write_tree(group.create_group(name), node)
            continue
        kind, shape, value = node
        if kind == "huge":
            group.create_dataset(name, shape=(10**12,), dtype="f8", chunks=(64,),
                                 compression="gzip" if value != value else None)
        elif kind == "empty":
            group.create_dataset(name, data=h5py.Empty("f8"))
        elif kind == "scalar":
            group[name] = value
        elif kind == "vlen":
            group.create_dataset(name, shape=shape, dtype=h5py.string_dtype())
        elif kind == "compound":
            dt = np.dtype([("x", "f8"), ("v", "f4", (3,)), ("s", "S2")])
            group.create_dataset(name, shape=shape, dtype=dt)
        else:
            with np.errstate(all="ignore"):
                arr = np.full(shape, value).astype(kind if kind != "S4" else "f8")
            group[name] = arr.astype("S4") if kind == "S4" else arr


# HDF5 strings hold no NUL, and a file's text is UTF-8: no lone surrogates (h5py cannot write them)
TEXT = st.text(st.characters(exclude_characters="\x00", exclude_categories=("Cs",)), max_size=4)


@fuzz(400)
@given(tree=h5_tree(), step=st.one_of(st.integers(-5, 10**6), FLOATS, TEXT),
       units=st.one_of(st.none(), TEXT, st.binary(max_size=4).filter(lambda b: b"\x00" not in b)))
def test_generated_hdf5(tree, step, units):
    RUNS.add("hdf5")
    path = _file(b"", ".h5")
    with h5py.File(path, "w") as f:
        f.attrs["step"] = step
        _write_tree(f, tree)
        for ds in list(f.values())[:1]:
            if units is not None:
                ds.attrs["units"] = units
    exercise(path, "hdf5", READERS[".h5"])


# 4. generated .npy: structured and plain arrays, forged headers -------------------------------

FIELD_TYPES = st.sampled_from(["<f8", ">f8", "<i4", "u1", "?", "S3", "<U2", "<f4", "<c8"])


@st.composite
def npy_bytes(draw):
    n = draw(st.integers(0, 8))
    if draw(st.booleans()):
        names = draw(st.lists(NAMES, min_size=1, max_size=4, unique=True))
        fields = []
        for nm in names:
            t = draw(FIELD_TYPES)
            fields.append((nm, t, (draw(st.integers(1, 5)),)) if draw(st.booleans()) else (nm, t))
        dt = np.dtype(fields)
    else:
        dt = np.dtype(draw(FIELD_TYPES))
    shape = draw(st.sampled_from([(n,), (n, 2), ()]))
    if draw(st.booleans()):      # a real file
        buf = io.BytesIO()
        np.save(buf, np.zeros(shape, dt), allow_pickle=False)
        return buf.getvalue()
    # a forged header: any shape (up to 10**12 rows), object dtype, followed by some bytes
    descr = draw(st.sampled_from([npformat.dtype_to_descr(dt), "|O", [("x", "|O")], "<f8"]))
    rows = draw(st.sampled_from([0, 1, 7, 10**6, 10**12]))
    buf = io.BytesIO()
    npformat.write_array_header_1_0(buf, {"descr": descr, "fortran_order": False, "shape": (rows,)})
    return buf.getvalue() + draw(st.binary(max_size=200))


@fuzz(400)
@given(data=npy_bytes())
def test_generated_npy(data):
    RUNS.add("npy")
    exercise(_file(data, ".npy"), "npy", READERS[".npy"])


# 5. generated .npz: columns of mismatched lengths, 0-d scalars, strings, object members --------

@st.composite
def npz_bytes(draw):
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=draw(st.sampled_from([zipfile.ZIP_STORED,
                                                                     zipfile.ZIP_DEFLATED]))) as zf:
        for _ in range(draw(st.integers(0, 5))):
            key = draw(st.sampled_from(["x", "y", "id", "step", "time", "beam/x", "beam/y", "beam/mass",
                                        "position", "a/b/c", "/", "x/"]))
            kind = draw(st.sampled_from(["col", "scalar", "matrix", "text", "object", "junk", "struct"]))
            n = draw(st.integers(0, 6))
            member = io.BytesIO()
            if kind == "object":
                npformat.write_array_header_1_0(member, {"descr": "|O", "fortran_order": False,
                                                         "shape": (n,)})
                member.write(b"\x80\x04N.")
            elif kind == "junk":
                member.write(draw(st.binary(max_size=64)))
            else:
                arr = {"col": lambda: np.full(n, draw(FLOATS)),
                       "scalar": lambda: np.array(draw(st.one_of(FLOATS, st.integers(-9, 9)))),
                       "matrix": lambda: np.zeros((n, draw(st.integers(0, 20)))),
                       "text": lambda: np.array(["a"] * n),
                       "struct": lambda: np.zeros(n, [("x", "f8"), ("p", "f4", (2,))])}[kind]()
                np.save(member, arr, allow_pickle=False)
            with warnings.catch_warnings():       # a repeated member name is a fine broken input
                warnings.simplefilter("ignore", UserWarning)
                zf.writestr(key + ".npy", member.getvalue())
    return buf.getvalue()


@fuzz(400)
@given(data=npz_bytes())
def test_generated_npz(data):
    RUNS.add("npz")
    exercise(_file(data, ".npz"), "npz", READERS[".npz"])


# 6. generated CSV: ragged rows, bad UTF-8, text in numbers, comments, blank lines -------------

TOKENS = st.one_of(FLOATS.map(repr), st.integers(-10**20, 10**20).map(str),
                   st.sampled_from(["", "nan", "inf", "-inf", "abc", "1e400", "0x1f", '"3"', "# c",
                                    " 5 ", "true"]),
                   st.text(max_size=4))


@st.composite
def csv_bytes(draw):
    ncol = draw(st.integers(1, 4))
    header = draw(st.lists(st.sampled_from(["x", "y", "vx", "id", "w", "", "x y", "1"]),
                           min_size=ncol, max_size=ncol))
    lines = [f"# {k} = {v}".encode("utf-8", "replace") for k, v in draw(st.lists(
        st.tuples(st.sampled_from(["step", "time", "field_energy", "junk"]), TOKENS), max_size=3))]
    lines.append(",".join(header).encode())
    for _ in range(draw(st.integers(0, 12))):
        width = ncol if draw(st.integers(0, 9)) else draw(st.integers(0, ncol + 2))
        row = ",".join(draw(TOKENS).replace(",", ";") for _ in range(width)).encode("utf-8", "replace")
        if not draw(st.integers(0, 15)):
            row += draw(st.sampled_from([b"\xff", b"\xc3", b"\xe2\x82", b"\x00"]))
        lines.append(row)
        if not draw(st.integers(0, 10)):
            lines.append(draw(st.sampled_from([b"", b"# mid", b"   "])))
    end = draw(st.sampled_from([b"\n", b"\r\n"]))
    return end.join(lines) + (end if draw(st.booleans()) else b"")


@fuzz(600)
@given(data=csv_bytes())
def test_generated_csv(data):
    RUNS.add("csv")
    exercise(_file(data, ".csv"), "csv", READERS[".csv"])


# counts -----------------------------------------------------------------------------------------

ALL = {"random_bytes", "truncated", "hdf5", "npy", "npz", "csv"}


def test_zz_inputs_tried_and_memory():
    if RUNS != ALL:
        pytest.skip("only part of the fuzz module ran")
    total = sum(TRIED.values())
    print(f"\nfuzz inputs tried: {total} {dict(TRIED)}; outcomes {dict(OUTCOMES)}")
    assert total >= 3000 * min(SCALE, 1.0), TRIED
    assert OUTCOMES["read"] > 100 and OUTCOMES["error on open"] > 100     # both paths exercised
    grown_mb = (resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - _RSS_START[0]) / 1024
    assert grown_mb < 1024, f"peak memory grew by {grown_mb:.0f} MB while fuzzing"
