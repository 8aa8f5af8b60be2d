"""Row pieces of a frame: what a partitioned engine reads and reduces one at a time.

A snapshot split over per-rank files is already in parts (``frame.parts``,
set by :func:`core.frame.concat_frames`); each part becomes one piece or,
when it is large and its readers can read a row range, several. A snapshot
in one huge file becomes row-range pieces the same way. Reading a piece reads
only its rows of only the columns asked for.

A column that reads a row range alone (``Column.can_read_rows``: an HDF5
hyperslab or direct read, records of a ``.npy``) can be split; one that
cannot is read whole, so such a part is never split (splitting would read
the whole column once per piece).
"""

from __future__ import annotations

import math
import uuid
from dataclasses import dataclass, field
from typing import Callable, Mapping

import numpy as np

from ..core.column import Column
from ..core.frame import Frame, Loader

#: aim for pieces of about this many bytes of the columns read (big enough that per-piece
#: overhead vanishes, small enough that a few pieces in flight per core stay in memory)
TARGET_PIECE_BYTES = 128 * 2**20

#: assumed width of a column whose dtype is not known before it is read
DEFAULT_ITEMSIZE = 8


def column_dtype(frame: Frame, name: str):
    """The dtype of a column without reading it, when the reader said (or it is in memory)."""
    cached = getattr(frame, "_cache", {}).get(name)
    if cached is not None:
        return cached.dtype
    try:
        load = frame.loader(name)
    except KeyError:
        return None
    if load.dtype is not None:
        return load.dtype
    parts = getattr(frame, "parts", None)
    if parts and all(name in p for p in parts):
        dts = [column_dtype(p, name) for p in parts]
        if all(d is not None for d in dts):
            return np.result_type(*dts)
    return None


def column_bytes(frame: Frame, columns) -> int:
    """Bytes the named columns take in memory (8 per value where the dtype is not known yet)."""
    total = 0
    for c in dict.fromkeys(columns):
        dt = column_dtype(frame, c)
        total += frame.length * (dt.itemsize if dt is not None else DEFAULT_ITEMSIZE)
    return total


def parts_of(frame: Frame) -> list[tuple[Frame, int | None]]:
    """(part frame, rank) of each per-rank part, or ``[(frame, None)]`` for a one-file frame."""
    parts = getattr(frame, "parts", None)
    if not parts:
        return [(frame, None)]
    ranks = getattr(frame, "part_ranks", None)
    if ranks is None:
        ranks = [None] * len(parts)
    return list(zip(parts, ranks))


@dataclass(frozen=True)
class Piece:
    """Rows ``[start, stop)`` of one part; ``offset`` is where they start in the whole frame."""

    index: int
    start: int
    stop: int
    offset: int
    part_length: int
    loaders: Mapping[str, Loader] = field(repr=False)
    constants: Mapping[str, tuple] = field(default_factory=dict, repr=False)
    token: str = field(default_factory=lambda: uuid.uuid4().hex, repr=False, compare=False)

    def __dask_tokenize__(self):
        # without this dask hashes the loaders by pickling them: slow, and all that is
        # needed is that two pieces of one graph never share a name
        return self.token

    @property
    def length(self) -> int:
        return self.stop - self.start

    @property
    def whole(self) -> bool:
        return self.start == 0 and self.stop == self.part_length


def read_column(piece: Piece, name: str) -> np.ndarray:
    """One column of one piece (only its rows, when the reader can)."""
    if name in piece.constants:
        value, dtype = piece.constants[name]
        return np.full(piece.length, value, dtype=dtype)
    load = piece.loaders[name]
    if piece.whole:
        arr = np.asarray(load())
    else:
        # a column that cannot read rows alone is not split on purpose: only a hand-made piece
        # reads (all of) it here
        arr = np.asarray(load.rows(piece.start, piece.stop))
    if arr.shape != (piece.length,):
        from ..core.errors import InputError
        raise InputError(None, f"column '{name}' gave {arr.shape[0] if arr.ndim else 0} rows for a "
                         f"piece of {piece.length}")
    return arr


def frame_pieces(frame: Frame, columns=None, target_bytes: int | None = None) -> list[Piece]:
    """Pieces covering every row of ``frame`` in order.

    ``columns`` (default: all) only sizes the pieces; every piece can still
    read every column of the frame. ``target_bytes`` defaults to
    ``TARGET_PIECE_BYTES`` (read at call time, so it can be tuned).
    """
    target_bytes = int(target_bytes or TARGET_PIECE_BYTES)
    columns = list(frame.columns if columns is None else columns)
    row_bytes = max(1, sum((column_dtype(frame, c) or np.dtype(np.float64)).itemsize
                           for c in dict.fromkeys(columns) if c in frame))
    pieces: list[Piece] = []
    offset = 0
    for part, rank in parts_of(frame):
        loaders = {}
        constants = {}
        for c in frame.columns:
            if c in part:
                loaders[c] = part.loader(c)
            elif c == "rank" and rank is not None:
                constants[c] = (int(rank), np.int32)   # as concat_frames fills it
            else:   # a column only the joined frame has: read it whole and slice
                loaders[c] = _slice_of_joined(frame, c, offset, part.length)
        n = part.length
        splittable = all(loaders[c].can_read_rows for c in columns if c in loaders)
        count = 1
        if splittable and n * row_bytes > target_bytes:
            count = math.ceil(n * row_bytes / target_bytes)
        bounds = np.linspace(0, n, count + 1).astype(np.int64)
        for a, b in zip(bounds[:-1], bounds[1:]):
            if b <= a and n > 0:
                continue
            pieces.append(Piece(len(pieces), int(a), int(b), offset + int(a), n, loaders, constants))
        offset += n
    return pieces


def _slice_of_joined(frame: Frame, name: str, offset: int, n: int) -> Loader:
    def load():
        return frame[name][offset:offset + n]
    return Column(load, rows=lambda a, b: frame[name][offset + a:offset + b], length=n)


def piece_frame(piece: Piece, template: Frame) -> Frame:
    """One piece as an in-memory Frame with the template's columns, roles, units and attributes.

    Any per-particle function of a frame runs on it unchanged; it reads the
    piece's rows of a column only when asked.
    """
    loaders = {c: (lambda c=c: read_column(piece, c)) for c in template.columns}
    return Frame(template.species, piece.length, loaders, units=template.units,
                 attrs=template.attrs, source=template.source, role_map=template.role_map)


def _not_read():   # a template's columns are reached through a piece, never directly
    raise RuntimeError("a frame template holds no data")


def frame_template(frame: Frame) -> Frame:
    """The frame's columns, roles, units and attributes without its data or cache.

    What a per-piece task needs to rebuild the frame's view of a piece; small
    to send to another process.
    """
    return Frame(frame.species, frame.length, {c: _not_read for c in frame.columns},
                 units=frame.units, attrs=frame.attrs, source=frame.source,
                 role_map=frame.role_map, cache=False)
