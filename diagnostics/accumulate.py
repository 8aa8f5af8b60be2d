"""The accumulator protocol: how every reduction of the audit is defined, once.

A reduction (a census, the conserved totals, a migration summary, an image,
a deposit) is an *accumulator*: an object that says which columns it reads
and how to fold rows into a small state::

    state = acc.start()                 # the state of no rows
    state = acc.add(state, piece)       # fold in one piece (may update state in place)
    state = acc.merge(a, b)             # join the states of two row ranges, a before b
    table = acc.finish(state)           # the result: a table, a grid, a summary

A *piece* (:class:`Piece`) is the column arrays of one row range of one
frame, plus where those rows sit: which input frame (``frame``: 0, or 0/1
for a reduction over two snapshots), the per-rank part they come from and
its rank, and their row offset in the whole frame. ``acc.columns`` names
the columns one frame contributes (``acc.frame_columns`` one tuple per
input frame for a reduction over several frames); a piece offers exactly
those.

The accumulator is the only definition of its number. Whoever runs it (the
engine, :mod:`swarmaudit.engine.reduce`: in memory, on the thread pool, or
on dask) only cuts frames into pieces and decides where ``add`` runs;
``merge`` joins the partial states in row order, so every engine gives the
same table. Functions in this package that take whole arrays (such as
``census.block_census``) run their accumulator on one piece made of those
arrays (:func:`one_piece`).

Rules an accumulator keeps:

* An accumulator that sets ``reads_once = True`` keeps no reference to a
  piece's arrays after ``add`` returns, and the engine may then hand it rows
  in reused buffers; any other accumulator gets arrays it may keep.
* ``merge(a, b)`` treats ``a`` as the earlier rows. Integer counts must not
  depend on how rows were cut; float sums are compensated where it matters
  (see ``drift.Totals``) so that a different cut changes them only by rounding.
* An accumulator whose state is large (an image, a mesh) sets ``task_pieces``:
  the engine folds up to that many consecutive pieces into one state before
  merging (the default, ``engine.reduce.PIECES_PER_TASK``, suits small
  states). Starting and merging a state of a million pixels costs about as
  much as binning a million rows.
* An accumulator and its state are plain data (numpy arrays, numbers,
  dicts): they travel to dask workers by pickling.
"""

from __future__ import annotations

from typing import Callable, Iterable, Mapping

import numpy as np


class Piece:
    """Rows ``[start, stop)`` of input frame ``frame``: the arrays of the columns an accumulator reads.

    ``piece[name]`` is a 1-D array of the piece's rows (read on first use).
    ``part`` is the per-rank part the rows come from (0 for a one-file
    snapshot) and ``rank`` that part's rank, or None when unknown.
    ``constant(name)`` is the one value every row of the piece has in a
    column, when the engine knows it without reading (the rank of a per-rank
    file), else None. ``source(name)`` says where a column's rows lie in an open file
    (``(descriptor, byte offset of row 0, dtype)``) when the reader knows
    it, for a compiled reduction that reads them itself; else None.
    """

    __slots__ = ("frame", "index", "start", "stop", "part", "rank", "_read", "_source", "_got",
                 "_constants")

    def __init__(self, read: Callable[[str], np.ndarray] | Mapping[str, np.ndarray], start: int = 0,
                 stop: int | None = None, *, frame: int = 0, index: int = 0, part: int = 0,
                 rank: int | None = None, source: Callable[[str], tuple | None] | None = None,
                 constants: Mapping[str, object] | None = None):
        if isinstance(read, Mapping):
            arrays = dict(read)
            read = arrays.__getitem__
            if stop is None:
                stop = start + (len(next(iter(arrays.values()))) if arrays else 0)
        self._read = read
        self.start = int(start)
        self.stop = int(start if stop is None else stop)
        self.frame = int(frame)
        self.index = int(index)
        self.part = int(part)
        self.rank = None if rank is None else int(rank)
        self._source = source
        self._got: dict = {}
        self._constants = dict(constants or {})

    def __len__(self) -> int:
        return self.stop - self.start

    @property
    def length(self) -> int:
        return self.stop - self.start

    def __getitem__(self, name: str) -> np.ndarray:
        got = self._got.get(name)
        if got is None:
            got = self._got[name] = np.asarray(self._read(name))
            if got.shape != (self.length,):
                raise ValueError(f"column '{name}' gave {got.shape[0] if got.ndim else 0} rows for a "
                                 f"piece of {self.length}")
        return got

    def constant(self, name: str):
        return self._constants.get(name)

    def source(self, name: str):
        return None if self._source is None else self._source(name)

    def __repr__(self) -> str:
        return (f"Piece(frame={self.frame}, rows={self.start}..{self.stop}, part={self.part}, "
                f"rank={self.rank})")


class Accumulator:
    """Base of the accumulators: one input frame, the columns in ``columns``.

    Subclasses set ``columns`` (a tuple of column names) and define
    ``start``, ``add``, ``merge`` and ``finish``; one over several frames sets
    ``frame_columns`` instead (one tuple per frame, in input order).
    """

    columns: tuple = ()
    #: True when ``add`` keeps none of a piece's arrays: the engine may then hand it rows in
    #: reused buffers
    reads_once: bool = False
    #: pieces folded into one state before states are merged (None: the engine's default)
    task_pieces: int | None = None

    @property
    def frame_columns(self) -> tuple[tuple[str, ...], ...]:
        return (tuple(self.columns),)

    def start(self):
        raise NotImplementedError

    def add(self, state, piece: Piece):
        raise NotImplementedError

    def merge(self, a, b):
        raise NotImplementedError

    def finish(self, state):
        return state


class KeepRows(Accumulator):
    """Base of a reduction that needs every row of its frames together (a match by id, a sort).

    The state keeps each piece's arrays of ``frame_columns`` with its row offset, so the
    engine never hands it a reused buffer (``reads_once`` is False); :meth:`joined` gives
    one frame's columns in row order, whatever the pieces were, for ``finish``.
    """

    reads_once = False

    def start(self):
        return {k: [] for k in range(len(self.frame_columns))}

    def add(self, state, piece: Piece):
        cols = self.frame_columns[piece.frame]
        state[piece.frame].append((piece.start, {c: piece[c] for c in cols}))
        return state

    def merge(self, a, b):
        return {k: a[k] + b[k] for k in a}

    def joined(self, state, k: int) -> dict[str, np.ndarray]:
        """Frame ``k``'s columns, every row, in row order."""
        chunks = sorted(state[k], key=lambda t: t[0])
        cols = self.frame_columns[k]
        if len(chunks) == 1:
            return chunks[0][1]
        if not chunks:
            return {c: np.zeros(0) for c in cols}
        return {c: np.concatenate([ch[c] for _, ch in chunks]) for c in cols}

    @staticmethod
    def key_of(cols: dict, names) -> np.ndarray | tuple:
        """A particle key as the matchers take it from joined columns: the one key column, or a
        tuple of them for a composite key."""
        return cols[names[0]] if len(names) == 1 else tuple(cols[n] for n in names)


def fold(acc: Accumulator, pieces: Iterable[Piece]):
    """The state of ``pieces`` (consecutive rows, in order) folded from ``acc.start()``."""
    state = acc.start()
    for piece in pieces:
        state = acc.add(state, piece)
    return state


def merge_all(acc: Accumulator, states):
    """Partial states joined left to right (row order), or ``acc.start()`` for none."""
    out = None
    for s in states:
        out = s if out is None else acc.merge(out, s)
    return acc.start() if out is None else out


def one_piece(acc: Accumulator, *frames: Mapping[str, np.ndarray]):
    """``acc`` run on whole arrays: each input frame as one piece (``{column: array}``)."""
    states = []
    for k, arrays in enumerate(frames):
        states.append(fold(acc, [Piece(arrays, frame=k)]))
    return acc.finish(merge_all(acc, states))
