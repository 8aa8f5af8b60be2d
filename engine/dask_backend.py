"""The partitioned engine: which engine, the scheduler it runs on, and dask frames.

A frame is read piece by piece (:mod:`engine.pieces`): one piece per
per-rank file, and row ranges of a huge file. Every reduction, images
included, is an accumulator that :func:`engine.reduce.reduce` runs on these
pieces; this module decides whether a frame goes that way (:func:`use_dask`,
:func:`partitioned` for the drawing code) and on what (:func:`client_for`).

Which engine: ``--engine memory`` or ``dask``, or ``auto`` (default), which
goes partitioned when a scheduler address is given or when the columns a
command needs, times the working-set factor of the in-memory path, would not
fit in half of the memory available now (psutil).

Where: ``--scheduler ADDRESS`` connects to a running dask.distributed
scheduler (the workers must see the same files at the same paths). Without
one a local pool runs in this process: threads by default, since the
compiled kernels (binning, block assignment, the totals) release the GIL and
threads need no copies between processes; ``SWARMAUDIT_DASK_LOCAL=processes``
starts a LocalCluster of one single-threaded worker process per core.
:func:`frame_to_dask` gives a frame as a dask DataFrame (the notebook API).
"""

from __future__ import annotations

import atexit
import os
import threading
import time
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..core.errors import OptionError
from ..core.frame import Frame
from .pieces import Piece, column_bytes, column_dtype, frame_pieces, read_column

ENGINES = ("auto", "memory", "dask")

#: the in-memory path holds the columns plus temporaries (block ids, masks) of about this size
WORKING_SET_FACTOR = 3.0
#: share of the available memory the in-memory path may plan to use
MEMORY_SHARE = 0.5


# which engine ------------------------------------------------------------------------
def memory_needed(frame: Frame, columns) -> int:
    """Bytes the in-memory path would hold to work on ``columns`` of ``frame``."""
    return int(column_bytes(frame, [c for c in columns if c in frame]) * WORKING_SET_FACTOR)


def use_dask(ctx, frame: Frame, columns) -> bool:
    """Whether ``frame`` should go through the partitioned engine for these columns."""
    engine = getattr(ctx, "engine", "auto") or "auto"
    if engine not in ENGINES:
        raise OptionError(f"--engine takes one of {', '.join(ENGINES)}, got '{engine}'")
    if engine == "memory":
        return False
    if engine == "dask" or getattr(ctx, "scheduler", None):
        return True
    return memory_needed(frame, columns) > MEMORY_SHARE * available_memory()


_available = [0.0, 0]   # when last read (monotonic seconds), bytes


def available_memory(max_age: float = 0.5) -> int:
    """Memory available now (psutil), read again when the last reading is older than ``max_age`` s.

    Asked once per snapshot of a pass over a run: a fresh reading each time costs
    more than a small snapshot's totals.
    """
    now = time.monotonic()
    if now - _available[0] > max_age:
        import psutil
        _available[1] = int(psutil.virtual_memory().available)
        _available[0] = now
    return _available[1]


# where it runs -------------------------------------------------------------------------
@dataclass
class DaskEngine:
    """A place to run pieces: local threads, a local process cluster, or a remote scheduler."""

    kind: str                     # "threads", "processes" or "distributed"
    workers: int
    client: object | None = None
    address: str | None = None

    def close(self) -> None:
        """Nothing of its own to let go: the piece pool is shared by every engine of the process."""


_engines: dict[str, DaskEngine] = {}
_engines_lock = threading.Lock()


def local_kind() -> str:
    kind = os.environ.get("SWARMAUDIT_DASK_LOCAL", "threads").strip().lower() or "threads"
    if kind not in ("threads", "processes"):
        raise OptionError(f"SWARMAUDIT_DASK_LOCAL takes 'threads' or 'processes', got '{kind}'")
    return kind


def client_for(ctx=None, address: str | None = None) -> DaskEngine:
    """The engine for a context: its ``--scheduler``, else one local engine per process."""
    address = address or (getattr(ctx, "scheduler", None) if ctx is not None else None)
    key = address or f"local:{local_kind()}"
    with _engines_lock:
        eng = _engines.get(key)
        if eng is not None:
            return eng
        eng = _connect(address) if address else _local(local_kind())
        _engines[key] = eng
        return eng


def _cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:   # not Linux
        return max(1, os.cpu_count() or 1)


def _local(kind: str) -> DaskEngine:
    n = _cores()
    if kind == "threads":
        return DaskEngine("threads", n)
    from distributed import Client, LocalCluster
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                           dashboard_address=None, silence_logs=40)
    client = Client(cluster, set_as_default=False)
    return DaskEngine("processes", n, client, cluster.scheduler_address)


#: how long a ``--scheduler`` has to answer before the command gives up (a scheduler that is up
#: answers a connection in milliseconds; ``SWARMAUDIT_DASK_TIMEOUT`` sets another, e.g. "20s")
CONNECT_TIMEOUT = "3s"


def scheduler_address(address) -> str:
    """``address`` when it is one dask.distributed can connect to (a known scheme; for tcp and
    tls a host and a port); else an OptionError saying what is wrong. Nothing is contacted."""
    from distributed.comm.addressing import parse_address, parse_host_port
    from distributed.comm.registry import get_backend
    text = str(address).strip()
    hint = "give it as tcp://HOST:PORT, the address the scheduler prints when it starts"
    try:
        scheme, location = parse_address(text, strict=False)
        get_backend(scheme)
        if scheme in ("tcp", "tls"):
            port = location.rpartition(":")[2]
            if location.count(":") and not port.isdigit() and "]" not in port:
                raise ValueError(f"the port '{port}' is not a number")
            host, port = parse_host_port(location)
            if not host or not 0 < int(port) < 65536:
                raise ValueError("a host and a port from 1 to 65535 are needed")
    except (ValueError, TypeError) as exc:
        raise OptionError(f"--scheduler '{text}' is not a scheduler address ({exc}); {hint}") from None
    return text


def _connect(address: str) -> DaskEngine:
    from distributed import Client
    address = scheduler_address(address)
    timeout = os.environ.get("SWARMAUDIT_DASK_TIMEOUT", "").strip() or CONNECT_TIMEOUT
    try:
        client = Client(address, timeout=timeout, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise OptionError(f"--scheduler {address}: no dask scheduler answers there ({exc}); start "
                          "one (dask scheduler) or check the address") from None
    try:
        # without a worker every task would wait for ever: give one the same time to join
        client.wait_for_workers(1, timeout=timeout)
    except (OSError, TimeoutError) as exc:
        client.close()
        raise OptionError(f"--scheduler {address}: the scheduler has no workers ({exc}); start one "
                          f"(dask worker {address}) with access to the run's files") from None
    workers = max(1, sum(w.get("nthreads", 1)
                         for w in client.scheduler_info().get("workers", {}).values()))
    return DaskEngine("distributed", workers, client, address)


def connect_scheduler(ctx) -> None:
    """Connect to the context's ``--scheduler`` now, when the context will use it: a command
    with an unreachable or malformed address stops at once with one OptionError, not at its
    first reduction (or never, when everything it needs is cached)."""
    address = getattr(ctx, "scheduler", None)
    if address is None or (getattr(ctx, "engine", "auto") or "auto") == "memory":
        return
    client_for(address=scheduler_address(address))


def close_engine(eng: DaskEngine) -> None:
    """Let an engine go: its thread pool, its connection, and a local cluster it started."""
    with _engines_lock:
        for k in [k for k, v in _engines.items() if v is eng]:
            del _engines[k]
    eng.close()
    if eng.client is not None:
        cluster = getattr(eng.client, "cluster", None) if eng.kind == "processes" else None
        eng.client.close()
        if cluster is not None:
            cluster.close()


@atexit.register
def _close_engines():
    for eng in list(_engines.values()):
        try:
            close_engine(eng)
        except Exception:   # shutting down: nothing useful to report
            pass


# dask frames ---------------------------------------------------------------------------
def _read_partition(piece: Piece, names: dict, columns=None) -> pd.DataFrame:
    wanted = list(names) if columns is None else [n for n in names if n in columns]
    cols = {n: read_column(piece, names[n]) for n in wanted}
    index = pd.RangeIndex(piece.offset, piece.offset + piece.length)
    # copy=False: each array becomes its own block, no consolidation copy
    return pd.DataFrame(cols, index=index, copy=False)


def _meta(frame: Frame, pieces: list[Piece], names: dict) -> pd.DataFrame:
    dtypes = {}
    for out, col in names.items():
        dt = column_dtype(frame, col)
        if dt is None and pieces:
            p = pieces[0]
            if col in p.constants:
                dt = np.dtype(p.constants[col][1])
            else:
                load = p.loaders[col]
                # a zero-row read says the dtype for free; else read the first piece once
                dt = (np.asarray(load.rows(0, 0)) if load.can_read_rows else read_column(p, col)).dtype
        dtypes[out] = np.empty(0, dtype=dt if dt is not None else np.float64)
    return pd.DataFrame(dtypes, index=pd.RangeIndex(0, 0))


def frame_to_dask(frame: Frame, columns, *, names=None, target_bytes: int | None = None):
    """A dask DataFrame of ``columns`` of ``frame``: one partition per piece, no data read yet.

    ``names`` renames the columns (``{"_x": "position/x"}`` order kept); the
    index is the global row number, so divisions are known.
    """
    import dask.dataframe as dd
    columns = list(columns)
    if names is None:
        names = {c: c for c in dict.fromkeys(columns)}
    missing = [c for c in names.values() if c not in frame]
    if missing:
        frame[missing[0]]   # raises the frame's own InputError naming the columns it has
    pieces = frame_pieces(frame, list(names.values()), target_bytes)
    meta = _meta(frame, pieces, names)
    divisions = [p.offset for p in pieces] + [pieces[-1].offset + pieces[-1].length - 1]
    if len(frame) == 0 or any(p.length == 0 for p in pieces):
        divisions = None   # empty parts repeat an offset; dask wants divisions increasing
    return dd.from_map(_read_partition, pieces, args=(names,), meta=meta,
                       divisions=tuple(divisions) if divisions else None,
                       label="swarmaudit-read", enforce_metadata=False)


# the process-wide choice the drawing code follows --------------------------------------------
@dataclass
class _Policy:
    engine: str = "auto"
    scheduler: str | None = None


_policy = _Policy()


def configure(engine: str = "auto", scheduler: str | None = None) -> None:
    """Set the engine the drawing code uses for frames it is handed (the CLI sets it once).

    The tables of :mod:`core.audit` follow their context; images are drawn
    from bare frames, so they follow this process-wide choice instead.
    """
    if engine not in ENGINES:
        raise OptionError(f"--engine takes one of {', '.join(ENGINES)}, got '{engine}'")
    _policy.engine, _policy.scheduler = engine, scheduler


def partitioned(frame: Frame, columns) -> bool:
    """Whether drawing ``columns`` of ``frame`` goes through the partitioned engine."""
    if not isinstance(frame, Frame):
        return False
    return use_dask(_policy, frame, [c for c in columns if c])


def drawing_context() -> _Policy:
    """The process-wide choice as a context :func:`engine.reduce.reduce` takes (``engine``, ``scheduler``)."""
    return _policy


def drawing_engine() -> DaskEngine:
    return client_for(address=_policy.scheduler)
