"""The column contract between readers and everything above them.

A reader hands each column over as a :class:`Column`: it reads the whole
column, and may say its dtype and length without reading, read a row range
alone (into a caller's buffer too), keep its file open while a reduction
streams it, and, for a plain run of bytes in a file, say where those bytes
are so a compiled loop can read them itself. Everything above the readers
asks a column these questions through this one class; a plain zero-argument
callable given as a column is wrapped (:func:`as_column`), so a reader that
only knows how to read the whole column keeps working.
"""

from __future__ import annotations

from contextlib import nullcontext
from typing import Callable, ContextManager

import numpy as np

from .errors import InputError


def native_dtype(dtype) -> np.dtype:
    """``dtype`` in native byte order: what a column's arrays are once read (numba kernels and
    bincount want it), whatever order the file stores."""
    dtype = np.dtype(dtype)
    return dtype if dtype.isnative else dtype.newbyteorder("=")


def native(arr: np.ndarray) -> np.ndarray:
    """The array in native byte order (a copy only when it is not)."""
    return arr if arr.dtype.isnative else arr.astype(native_dtype(arr.dtype))


class Column:
    """One column of one species, read lazily.

    ``read()`` (or calling the column) reads it all. ``rows(start, stop)``
    reads rows ``[start, stop)``: alone when the reader gave ``rows``
    (``can_read_rows``), else by reading all and slicing (an engine does not
    split such a column). ``rows_into(start, stop, out)`` fills ``out`` (a
    native-order array of ``dtype`` and of the rows' length) and returns it,
    so a reduction streaming a column reuses one buffer. ``dtype`` and
    ``length`` are what the reader knows before reading (None when it does
    not); ``dtype`` is in native byte order, as the arrays read are. ``hold()`` is a context manager that keeps the column's file open
    while a reduction reads several pieces or columns of it (a no-op by
    default). ``direct()`` is True while reads go straight to the file
    without a shared library handle (they let other threads run);
    ``file_extent()`` gives ``(descriptor, byte offset of row 0, dtype)`` while
    a hold keeps such an unchanged file open, for compiled file reads, else None.
    """

    __slots__ = ("_read", "_rows", "_rows_into", "dtype", "length", "_hold", "_direct", "_extent")

    def __init__(self, read: Callable[[], np.ndarray], *, dtype=None, length: int | None = None,
                 rows: Callable[[int, int], np.ndarray] | None = None,
                 rows_into: Callable[[int, int, np.ndarray], np.ndarray] | None = None,
                 hold: Callable[[], ContextManager] | None = None,
                 direct: Callable[[], bool] | None = None,
                 file_extent: Callable[[], tuple | None] | None = None):
        self._read = read
        self._rows = rows
        self._rows_into = rows_into
        self.dtype = None if dtype is None else native_dtype(dtype)
        self.length = None if length is None else int(length)
        self._hold = hold
        self._direct = direct
        self._extent = file_extent

    def read(self) -> np.ndarray:
        return self._read()

    def __call__(self) -> np.ndarray:
        return self._read()

    @property
    def can_read_rows(self) -> bool:
        """Whether a row range is read alone (not by reading the whole column)."""
        return self._rows is not None

    def rows(self, start: int, stop: int) -> np.ndarray:
        if self._rows is not None:
            return self._rows(start, stop)
        return np.array(np.asarray(self._read())[start:stop])

    def rows_into(self, start: int, stop: int, out: np.ndarray) -> np.ndarray:
        if self._rows_into is not None:
            return self._rows_into(start, stop, out)
        out[...] = self.rows(start, stop)
        return out

    def hold(self) -> ContextManager:
        return self._hold() if self._hold is not None else nullcontext()

    def direct(self) -> bool:
        return bool(self._direct()) if self._direct is not None else False

    def file_extent(self):
        return self._extent() if self._extent is not None else None

    def __repr__(self) -> str:
        return f"Column(dtype={self.dtype}, length={self.length}, rows={self.can_read_rows})"


def as_column(column) -> Column:
    """``column`` as a :class:`Column`: itself, or a zero-argument callable wrapped (whole reads only)."""
    if isinstance(column, Column):
        return column
    if not callable(column):
        raise TypeError(f"a column must be a Column or a zero-argument callable, not {type(column).__name__}")
    return Column(column)


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
    out = np.empty(n, dtype=native_dtype(field_dtype))
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
