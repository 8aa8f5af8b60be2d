"""The column contract between readers and everything above them.

A reader hands each column over as a loader: a zero-argument callable that
reads the whole column. A loader may also read a row range alone
(:func:`sliceable`), which is what lets an engine stream a column in pieces.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from .errors import InputError
from .frame import Loader


def sliceable(load: Loader, rows: Callable[[int, int], np.ndarray], dtype=None,
              rows_into: Callable[[int, int, np.ndarray], np.ndarray] | None = None) -> Loader:
    """Mark ``load`` as able to read rows ``[start, stop)`` alone (and, optionally, its dtype).

    ``rows_into(start, stop, out)``, when given, reads the rows into ``out`` (a
    native-order array of ``dtype`` and of their length) and returns it: a
    reduction streaming a column reuses one buffer instead of allocating (and
    faulting in) fresh memory for every piece.
    """
    load.rows = rows
    if dtype is not None:
        load.dtype = np.dtype(dtype)
    if rows_into is not None:
        load.rows_into = rows_into
    return load


def read_fully(fh, view: memoryview) -> int:
    """Fill ``view`` from the unbuffered file ``fh`` at its position; the bytes read (fewer at its end).

    Short reads happen on pipes and network file systems: read until full or end of file.
    """
    got = 0
    total = len(view)
    while got < total:
        k = fh.readinto(view[got:])
        if not k:
            break
        got += k
    return got


def row_reader(load: Loader):
    """The loader's row-range read, or None when it can only read the whole column."""
    return getattr(load, "rows", None)


#: bytes of records read at a time by :func:`read_record_field`
RECORD_CHUNK_BYTES = 4 * 2**20


def read_record_field(path, offset: int, dtype, take, start: int, stop: int) -> np.ndarray:
    """Rows ``[start, stop)`` of one field of a file of fixed-size records, as a compact array.

    ``take(records)`` picks the field out of a structured array. The file is
    read through a small buffer with plain reads, not a memory map: pulling
    one field out of interleaved records touches every page, and a map would
    keep all of them (every other field too) in the process's resident memory.
    """
    dtype = np.dtype(dtype)
    rec = dtype.itemsize
    n = max(0, int(stop) - int(start))
    field_dtype = take(np.empty(0, dtype)).dtype
    out = np.empty(n, dtype=field_dtype.newbyteorder("=") if not field_dtype.isnative else field_dtype)
    if n == 0:
        return out
    chunk = max(1, RECORD_CHUNK_BYTES // max(rec, 1))
    buf = np.empty(min(chunk, n), dtype=dtype)
    raw = buf.view(np.uint8)
    with open(path, "rb", buffering=0) as fh:
        fh.seek(int(offset) + int(start) * rec)
        for a in range(0, n, chunk):
            m = min(chunk, n - a)
            got = read_fully(fh, memoryview(raw[: m * rec]))
            if got < m * rec:
                raise InputError(path, f"ends after {start + a + got // rec} of {stop} records",
                                 "the file is truncated or still being written")
            out[a:a + m] = take(buf[:m])
    return out
