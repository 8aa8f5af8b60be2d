"""Reading the metadata of a run's files on every core.

Opening a snapshot reads its files' metadata (``readers.discover.scan_paths``):
for HDF5, a few dozen calls into the library per file. h5py holds one lock
around every call into HDF5, so threads take turns there: two threads scan a
run of many small files no faster than one (``bench/bench_many_files.py``
measures it). Processes each have their own library, so the scans of a run
of many files are spread over

* the workers of a ``dask.distributed`` scheduler when ``--scheduler`` names
  one (they must see the same files at the same paths), else
* a few worker processes forked from this one, one per free core of the piece
  pool (``engine.pieces.piece_workers``, less the cores other processes are
  running on at that moment), for a run of at least ``MIN_FILES`` files and
  only while this process runs no other thread (a fork copies no thread, and a
  lock another thread held would stay held in the copy);

else the files are scanned in this process, as before. What travels is plain
data: a snapshot's file paths out, the readers' scans back; the snapshots
are made in this process (``readers.discover.open_ref``).
"""

from __future__ import annotations

import multiprocessing
import signal
import threading

from ..core import interrupt
from .pieces import piece_workers

#: files in a run from which forking worker processes pays (a fork and its start-up take a few
#: milliseconds; a file's metadata about half of one)
MIN_FILES = 64


def scan_map_for(scheduler: str | None = None, engine: str = "auto"):
    """The ``scan_map`` for :func:`readers.discover.open_run`: ``scan_map(fn, items)`` yields
    ``fn(item)`` of every item in order, computed on the ``scheduler``'s workers (unless the
    engine is ``memory``: everything in this process) or on worker processes (see the module's
    words)."""
    if scheduler and engine != "memory":
        return lambda fn, items: _on_cluster(scheduler, fn, items)
    return _on_processes


def _on_cluster(scheduler: str, fn, items):
    from .dask_backend import client_for, scheduler_address
    items = list(items)
    client = client_for(address=scheduler_address(scheduler)).client
    futures = client.map(fn, items, pure=False)
    try:
        for fut in futures:
            interrupt.check()
            yield fut.result()
            fut.release()
    finally:
        client.cancel(futures)


def forkable() -> bool:
    """Whether worker processes may be forked from this one now (fork exists, no other thread)."""
    return ("fork" in multiprocessing.get_all_start_methods()
            and threading.active_count() == 1 and piece_workers() > 1)


def free_cores() -> int:
    """Cores no other process is running on at this moment: the cores of the piece pool less the
    runnable processes besides this one (Linux's ``procs_running``; GNU make's ``--load-average``
    reads the same signal, averaged). Where it cannot be read: every core of the pool."""
    cores = piece_workers()
    try:
        with open("/proc/stat") as fh:
            for line in fh:
                if line.startswith("procs_running"):
                    return max(0, min(cores, cores - (int(line.split()[1]) - 1)))
    except (OSError, ValueError, IndexError):
        pass
    return cores


def _on_processes(fn, items):
    items = list(items)
    files = sum(len(paths) for paths in items)
    # workers only on free cores: on a busy machine they only take turns with the others
    # (measured: two workers with one core free scan slower than this process alone)
    workers = free_cores() if files >= MIN_FILES and forkable() else 0
    if workers < 2:
        for it in items:
            interrupt.check()
            yield fn(it)
        return
    yield from process_map(fn, items, workers)


def process_map(fn, items, workers: int):
    """``fn(item)`` of each item on ``workers`` forked processes, yielded in order as they come."""
    from concurrent.futures import ProcessPoolExecutor
    ctx = multiprocessing.get_context("fork")
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_worker_start)
    try:
        # a few items per task: fewer round trips, and the first results still come early
        chunk = max(1, min(8, len(items) // (8 * workers)))
        for got in pool.map(fn, items, chunksize=chunk):
            interrupt.check()
            yield got
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _worker_start():
    # Ctrl-C is the parent's to handle: it stops the pool; a worker only finishes its task
    signal.signal(signal.SIGINT, signal.SIG_IGN)
