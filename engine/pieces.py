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
import os
import threading
import uuid
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Callable, Mapping

import numpy as np

from ..core.column import Column
from ..core.frame import Frame, Loader

#: rows of one piece: the one piece size of every engine. Small enough that a piece's columns
#: stay in a core's cache through a compiled pass and that several pieces are in flight per core,
#: large enough that per-piece overhead vanishes. Tasks are runs of pieces (engine.reduce).
PIECE_ROWS = 1 << 18

#: assumed width of a column whose dtype is not known before it is read
DEFAULT_ITEMSIZE = 8


def cached_column(frame: Frame, name: str):
    """The column when the frame holds it in memory already (read nothing), else None."""
    return getattr(frame, "_cache", {}).get(name)


def column_dtype(frame: Frame, name: str):
    """The dtype of a column without reading it, when the reader said (or it is in memory)."""
    cached = cached_column(frame, name)
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
    """Rows ``[start, stop)`` of part ``part``; ``offset`` is where they start in the whole frame.

    ``views`` holds the piece's rows of columns the frame already had in
    memory (slices, no copy); other columns are read through ``loaders``.
    """

    index: int
    start: int
    stop: int
    offset: int
    part_length: int
    loaders: Mapping[str, Loader] = field(repr=False)
    constants: Mapping[str, tuple] = field(default_factory=dict, repr=False)
    part: int = 0
    rank: int | None = None
    views: Mapping[str, np.ndarray] = field(default_factory=dict, repr=False)   # rows held in memory
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


def read_column(piece: Piece, name: str, reuse: bool = False) -> np.ndarray:
    """One column of one piece (only its rows, when the reader can).

    ``reuse``: the rows may land in this thread's buffer for the column, which
    the next piece read on the thread overwrites (for a reduction that keeps nothing).
    """
    if name in piece.views:
        return piece.views[name]
    if name in piece.constants:
        value, dtype = piece.constants[name]
        return np.full(piece.length, value, dtype=dtype)
    load = piece.loaders[name]
    if reuse and load.dtype is not None and load.can_read_rows:
        arr = load.rows_into(piece.start, piece.stop, thread_buffer(name, load.dtype, piece.length))
    elif piece.whole:
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


def frame_pieces(frame: Frame, columns=None, rows: int | None = None) -> list[Piece]:
    """Pieces covering every row of ``frame`` in order, ``PIECE_ROWS`` rows each at most.

    ``columns`` (default: all) are the columns the pieces will be asked for:
    a part is cut only when each of them can be had for a row range (held in
    memory, or a loader that reads row ranges); otherwise the part is one
    piece. Every piece can still read every column of the frame. ``rows``
    defaults to ``PIECE_ROWS`` (read at call time, so tests can make it small).
    """
    rows_per = int(rows or PIECE_ROWS)
    columns = [c for c in dict.fromkeys(frame.columns if columns is None else columns) if c in frame]
    joined = {c: cached_column(frame, c) for c in columns}
    pieces: list[Piece] = []
    offset = 0
    for part_no, (part, rank) in enumerate(parts_of(frame)):
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
        held = {}
        for c in columns:
            arr = joined[c]
            if arr is not None:
                held[c] = arr[offset:offset + n]
            elif part is not frame and cached_column(part, c) is not None:
                held[c] = cached_column(part, c)
        splittable = all(c in held or c in constants or loaders[c].can_read_rows for c in columns)
        count = max(1, math.ceil(n / rows_per)) if splittable else 1
        bounds = [0] + [min(n, k * rows_per) for k in range(1, count)] + [n] if count > 1 else [0, n]
        for a, b in zip(bounds[:-1], bounds[1:]):
            views = {c: v[a:b] for c, v in held.items()}
            pieces.append(Piece(len(pieces), int(a), int(b), offset + int(a), n, loaders, constants,
                                part_no, rank, views))
        offset += n
    return pieces


def read_in_pieces(frame: Frame, columns) -> bool:
    """Whether reducing ``columns`` of ``frame`` keeps no full column of it in memory: each is
    held in memory already or reads row ranges alone, or the frame is one piece long anyway."""
    if len(frame) <= PIECE_ROWS:
        return True
    for part, _ in parts_of(frame):
        for c in columns:
            if cached_column(frame, c) is not None or c not in part:
                continue
            if cached_column(part, c) is None and not part.loader(c).can_read_rows:
                return False
    return True


_buffers = threading.local()


def thread_buffer(name: str, dtype, n: int) -> np.ndarray:
    """This thread's buffer of ``n`` values for a column, reused from piece to piece.

    Streaming a run then allocates, and faults in, its buffers once.
    """
    held = getattr(_buffers, "arrays", None)
    if held is None:
        held = _buffers.arrays = {}
    key = (name, np.dtype(dtype).str)
    buf = held.get(key)
    if buf is None or buf.shape[0] < n:
        buf = held[key] = np.empty(max(n, PIECE_ROWS), dtype=dtype)
    return buf[:n]


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


# the one piece pool --------------------------------------------------------------------
_pool_lock = threading.Lock()
_pools: dict = {}


def piece_workers() -> int:
    """Threads of the piece pool: one per core, up to four."""
    try:
        return max(1, min(4, len(os.sched_getaffinity(0))))
    except (AttributeError, OSError):
        return max(1, min(4, os.cpu_count() or 1))


def piece_pool() -> ThreadPoolExecutor:
    """The threads that run tasks in this process (compiled passes release the GIL)."""
    with _pool_lock:
        pid = os.getpid()
        pool = _pools.get(pid)
        if pool is None:           # a forked worker does not inherit its parent's threads
            pool = _pools[pid] = ThreadPoolExecutor(piece_workers(), thread_name_prefix="swarmaudit-piece")
        return pool
