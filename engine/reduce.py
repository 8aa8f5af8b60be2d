"""The one runner of accumulators: in memory, on the thread pool, or on dask.

:func:`reduce` runs an accumulator (:mod:`swarmaudit.diagnostics.accumulate`)
over one frame, or over several for a reduction of several snapshots::

    table = reduce(Census.of_frame(frame, layout), frame, ctx)

Every engine does the same three things and nothing else:

1. cut each frame into pieces (:func:`engine.pieces.frame_pieces`, at most
   ``PIECE_ROWS`` rows, never across per-rank parts) and group consecutive
   pieces of one part into *tasks* of at most ``PIECES_PER_TASK`` pieces
   (``acc.task_pieces`` for an accumulator whose state is large);
2. run each task where the engine runs things: ``state = acc.start()``, then
   ``acc.add(state, piece)`` for its pieces in row order;
3. merge the task states with ``acc.merge`` in row order (frame by frame)
   and ``acc.finish`` the result.

The cut into pieces and tasks depends only on the frames and the
accumulator, never on the engine or the number of workers, so the serial, threaded and dask runs of
one accumulator on the same frames give the same result, bit for bit.

Where (``where=``, else from the context): ``"serial"`` (this thread),
``"threads"`` (the one piece pool of this process, :func:`engine.pieces.piece_pool`), or
``"dask"``: dask's own threaded scheduler, or a ``dask.distributed``
scheduler when the context names one (``--scheduler``; its workers must see
the same files at the same paths). The context's ``engine`` chooses as
:func:`engine.dask_backend.use_dask` does: ``memory`` runs here on the
threads, ``dask`` on dask, ``auto`` on dask only when the columns would not
fit in memory or a scheduler is given.
"""

from __future__ import annotations

from dataclasses import dataclass

from ..core import interrupt
from ..core.frame import Frame
from ..diagnostics import accumulate
from .pieces import PIECE_ROWS, Piece, frame_pieces, piece_pool, piece_workers, read_column

#: pieces of one part run as one task at most: a task's state is folded piece by piece, so a few
#: tasks per frame keep every worker busy without a state per piece to send back
PIECES_PER_TASK = 4

PLACES = ("serial", "threads", "dask")

#: rows of all the tasks together below which ``threads`` runs them in this thread: such pieces
#: (the small per-rank files of a run of many) are too small for their numpy or compiled passes
#: to let other threads run, so the pool only adds its hand-overs (measured: bench_many_files.py)
THREADS_FROM_ROWS = PIECE_ROWS


@dataclass
class Task:
    """Consecutive pieces of one part of input frame ``frame`` of job ``job``."""

    job: int
    frame: int
    pieces: list


def tasks_of(frames, columns, job: int = 0, per_task: int | None = None) -> list[Task]:
    """The tasks covering every row of ``frames`` (input order), ``columns[k]`` read of frame k.

    ``per_task``: pieces of one task at most (default ``PIECES_PER_TASK``).
    """
    per_task = max(1, int(per_task or PIECES_PER_TASK))
    out = []
    for k, frame in enumerate(frames):
        run: list[Piece] = []
        for p in frame_pieces(frame, columns[k] if k < len(columns) else None):
            if run and (run[-1].part != p.part or len(run) == per_task):
                out.append(Task(job, k, run))
                run = []
            run.append(p)
        if run:
            out.append(Task(job, k, run))
    return out


def as_piece(p: Piece, frame: int, reuse: bool = False) -> accumulate.Piece:
    """An engine piece as an accumulator sees it: its column arrays and where its rows sit."""
    def read(name):
        return read_column(p, name, reuse)

    def source(name):
        # where the piece's rows of a column lie in an open file, for a compiled reader
        if name in p.views or name in p.constants:
            return None
        column = p.loaders.get(name)
        got = column.file_extent() if column is not None else None
        if got is None:
            return None
        fd, offset, dtype = got
        import numpy as np
        return fd, int(offset) + p.start * np.dtype(dtype).itemsize, dtype
    constants = {name: value for name, (value, _) in p.constants.items()}
    return accumulate.Piece(read, p.offset, p.offset + p.length, frame=frame, index=p.index,
                            part=p.part, rank=p.rank, source=source, constants=constants)


def run_task(acc, task: Task):
    """A task's state: its pieces folded in row order (runs wherever the engine puts it)."""
    state = acc.start()
    reuse = bool(getattr(acc, "reads_once", False))
    for p in task.pieces:
        interrupt.check()       # Ctrl-C: a pool drains in one piece's time
        state = acc.add(state, as_piece(p, task.frame, reuse))
    return state


def _as_frames(frames) -> list[Frame]:
    if isinstance(frames, Frame):
        return [frames]
    return list(frames)


def reduce(acc, frames, ctx=None, *, where: str | None = None):
    """``acc`` over ``frames`` (one Frame, or one per input of ``acc.frame_columns``), finished."""
    return reduce_many([(acc, frames)], ctx, where=where)[0]


def reduce_many(jobs, ctx=None, *, where: str | None = None) -> list:
    """Several ``(accumulator, frames)`` at once: their tasks share the workers; results in order.

    A pass over a run reduces the next snapshots together this way, so one
    frame's last pieces overlap the next frame's first ones.
    """
    jobs = [(acc, _as_frames(frames)) for acc, frames in jobs]
    tasks: list[Task] = []
    for j, (acc, frames) in enumerate(jobs):
        tasks += tasks_of(frames, acc.frame_columns, j, getattr(acc, "task_pieces", None))
    place = where or choose(ctx, jobs)
    if place not in PLACES:
        raise ValueError(f"where takes one of {', '.join(PLACES)}, got '{place}'")
    states, here = _run(place, [(jobs[t.job][0], t) for t in tasks], ctx)
    if here:
        _count_reads(jobs, tasks)
    per_job: list[list] = [[] for _ in jobs]
    for t, s in zip(tasks, states):
        per_job[t.job].append(s)
    return [acc.finish(accumulate.merge_all(acc, got)) for (acc, _), got in zip(jobs, per_job)]


def _count_reads(jobs, tasks) -> None:
    # ``frame.reads`` counts the columns that reached a file (what the laziness tests look at)
    read: dict = {}
    for t in tasks:
        acc, frames = jobs[t.job]
        cols = acc.frame_columns[t.frame] if t.frame < len(acc.frame_columns) else ()
        for p in t.pieces:
            read.setdefault((t.job, t.frame), set()).update(
                c for c in cols if c not in p.views and c not in p.constants)
    for (j, k), cols in read.items():
        jobs[j][1][k].reads += len(cols)


def choose(ctx, jobs) -> str:
    """Where the context's engine choice runs these jobs."""
    from .dask_backend import use_dask
    for acc, frames in jobs:
        for k, f in enumerate(frames):
            cols = acc.frame_columns[k] if k < len(acc.frame_columns) else f.columns
            if use_dask(ctx, f, cols):
                return "dask"
    return "threads"


def _rows(work) -> int:
    return sum(p.length for _, t in work for p in t.pieces)


def _run(place: str, work, ctx) -> tuple[list, bool]:
    """The task states, and whether they were computed in this process."""
    if not work:
        return [], True
    if place == "serial" or (place == "threads" and (len(work) == 1 or piece_workers() == 1
                                                    or _rows(work) < THREADS_FROM_ROWS)):
        return [run_task(acc, t) for acc, t in work], True
    if place == "threads":
        return list(piece_pool().map(lambda w: run_task(*w), work)), True
    from .dask_backend import client_for
    eng = client_for(ctx)
    if eng.client is None:
        import dask
        delayed = [dask.delayed(run_task, pure=False)(acc, t) for acc, t in work]
        return list(dask.compute(*delayed, scheduler="threads", num_workers=eng.workers)), True
    return _on_cluster(eng, work), False


def _on_cluster(eng, work) -> list:
    """Tasks on a dask.distributed cluster, a bounded number in flight, results in task order."""
    client = eng.client
    window = max(2, 2 * eng.workers)
    out = []
    pending = []
    it = iter(work)
    for acc, t in it:
        pending.append(client.submit(run_task, acc, t, pure=False))
        if len(pending) >= window:
            break
    while pending:
        interrupt.check()
        fut = pending.pop(0)
        out.append(fut.result())
        fut.release()
        nxt = next(it, None)
        if nxt is not None:
            pending.append(client.submit(run_task, *nxt, pure=False))
    return out
