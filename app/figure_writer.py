"""Writing the export's figures, on a second core when there is one.

Drawing with matplotlib is most of what an export does once the numbers are
made, and it holds the GIL, so a second *process* draws. It is started when
the export begins (``python -m swarmaudit.app.figure_writer``: a plain child
process, so nothing of the caller's script runs again in it; the command line
starts it before it opens the run, :func:`prestart`), and its start-up
(matplotlib, the figure code, a first small figure to load the fonts) runs
while this process opens the run and reduces the tables. Each figure is a job
(``mpl_figures.draw_job``: a ``figure_data`` record, or a density view's
values), handed over the moment its numbers are known; the drawing process
keeps its laid-out image figures, so the snapshots of a view are swapped into
one figure there as they would be here.

Jobs wait in a queue here and go over one at a time, each when the drawing
process has finished the last, so a job not yet sent can still be drawn here:
once this process has made every number, it takes jobs from the back of the
queue while the other takes them from the front, then waits for the one in
flight and raises the first error of any. A job whose drawing process died
is drawn here.

With one core, few figures, or no way to start the process, every job is
drawn here by the same code. Ctrl-C belongs to the export: the drawing process
runs in a session of its own, ignores it, and is stopped with the export.
"""

from __future__ import annotations

import atexit
import os
import pickle
import struct
import subprocess
import sys
import threading
from collections import deque

from ..core import interrupt

#: fewer figures than this are drawn here: starting a process costs more than they do
LEAST_FIGURES = 4
_HEADER = struct.Struct("<Q")
#: a drawing process started before the export knew its figures (``prestart``), not yet taken
_EARLY: list = []


def spare_core() -> bool:
    """Whether this process may use a second core (its CPU affinity, else the machine's)."""
    try:
        return len(os.sched_getaffinity(0)) >= 2
    except AttributeError:
        return (os.cpu_count() or 1) >= 2


def _spawn():
    """A drawing process (``python -m swarmaudit.app.figure_writer``), or None when none starts."""
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in sys.path if p))
    try:
        return subprocess.Popen([sys.executable, "-m", __name__], stdin=subprocess.PIPE,
                                stdout=subprocess.PIPE, env=env, start_new_session=True)
    except (OSError, ValueError):
        return None


def prestart() -> None:
    """Start the drawing process now, when a core is spare: its start-up then overlaps the
    export's own (opening the run). The next FigureWriter takes it, or closes it."""
    if not _EARLY and spare_core():
        child = _spawn()
        if child is not None:
            _EARLY.append(child)


def _close(child) -> None:
    try:
        child.stdin.close()
    except OSError:
        pass
    try:
        child.wait(timeout=10)
    except subprocess.TimeoutExpired:
        child.kill()
        child.wait()


def _drop(child) -> None:
    """End a drawing process that drew nothing (no need to let it finish starting)."""
    child.kill()
    _close(child)


@atexit.register
def _close_early() -> None:
    while _EARLY:
        _drop(_EARLY.pop())


def _send(stream, obj) -> None:
    data = pickle.dumps(obj, protocol=pickle.HIGHEST_PROTOCOL)
    stream.write(_HEADER.pack(len(data)))
    stream.write(data)
    stream.flush()


def _receive(stream):
    """The next message, or None at the end of the stream."""
    head = stream.read(_HEADER.size)
    if len(head) < _HEADER.size:
        return None
    (size,) = _HEADER.unpack(head)
    data = stream.read(size)
    if len(data) < size:
        return None
    return pickle.loads(data)


class FigureWriter:
    """Draws and writes figure jobs, in a second process where it pays (see the module)."""

    def __init__(self, size, figures: int, process: bool | None = None):
        self.size = size
        self._laid_out: dict = {}
        self._queue: deque = deque()        # jobs not yet sent
        self._lock = threading.Condition()
        self._errors: list = []
        self._busy = False                  # a job is in the drawing process
        self._closed = False
        self._child = None
        self._thread = None
        early = _EARLY.pop() if _EARLY else None
        if process is None:
            process = figures >= LEAST_FIGURES and spare_core()
        if not process:
            if early is not None:
                _drop(early)
            return
        child = early if early is not None and early.poll() is None else _spawn()
        if child is None:
            return
        try:
            _send(child.stdin, self.size)
        except (OSError, ValueError):
            child.kill()
            return
        self._child = child
        self._thread = threading.Thread(target=self._feed, name="figure-writer", daemon=True)
        self._thread.start()

    @property
    def in_process(self) -> bool:
        """Whether a second process draws."""
        return self._child is not None

    def __enter__(self) -> "FigureWriter":
        return self

    def __exit__(self, kind, exc, tb) -> None:
        if kind is not None:
            self.abort()

    # this process's side ---------------------------------------------------------------------------
    def submit(self, kind: str, payload, path: str) -> None:
        """Draw ``payload`` of ``kind`` (``mpl_figures.draw_job``) and write it to ``path``."""
        interrupt.check()       # Ctrl-C between figures: stop before drawing the next
        job = (kind, payload, path)
        with self._lock:
            if self._child is not None:
                self._queue.append(job)
                self._lock.notify_all()
                return
        self._draw_here(job)

    def _draw_here(self, job) -> None:
        from . import mpl_figures
        interrupt.check()
        mpl_figures.draw_job(job, self.size, self._laid_out)

    def _take_last(self):
        with self._lock:
            return self._queue.pop() if self._queue else None

    def finish(self) -> None:
        """Every figure written: queued jobs drawn here from the back (not worth loading the
        drawing code here for a last few), the one in flight waited for, errors raised."""
        try:
            if "matplotlib.figure" in sys.modules or len(self._queue) >= LEAST_FIGURES:
                while (job := self._take_last()) is not None:
                    self._draw_here(job)
            with self._lock:
                self._closed = True
                self._lock.notify_all()
                while self._busy or (self._queue and self._child is not None):
                    self._lock.wait(0.1)
                    interrupt.check()
                left = list(self._queue)
                self._queue.clear()
            for job in left:            # the drawing process died: the rest here
                self._draw_here(job)
            if self._errors:
                raise self._errors[0]
        finally:
            self._stop()

    def abort(self) -> None:
        """Stop drawing: queued jobs are dropped and the drawing process is ended."""
        with self._lock:
            self._queue.clear()
            self._closed = True
            self._lock.notify_all()
        self._stop(kill=True)

    def _stop(self, kill: bool = False) -> None:
        child, self._child = self._child, None
        if child is None:
            return
        if kill:
            child.kill()
        _close(child)
        if self._thread is not None:
            self._thread.join(timeout=10)

    def _feed(self) -> None:
        """The thread that hands jobs over one at a time and collects their results."""
        child = self._child
        while True:
            with self._lock:
                while not self._queue and not self._closed:
                    self._lock.wait()
                if not self._queue:
                    return
                job = self._queue.popleft()
                self._busy = True
            try:
                _send(child.stdin, job)
                answer = _receive(child.stdout)
            except (OSError, ValueError, EOFError, pickle.PickleError):
                answer = None
            with self._lock:
                self._busy = False
                if answer is None:              # gone: this job and the rest are drawn here
                    self._queue.appendleft(job)
                    self._child = None
                    self._lock.notify_all()
                    return
                if answer[0] == "error":
                    self._errors.append(answer[1])
                self._lock.notify_all()


# the drawing process ------------------------------------------------------------------------------------
def _serve() -> None:
    """Read jobs from stdin, draw each, answer on stdout; end at the end of stdin."""
    import signal
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    # the answers get the pipe to themselves: anything else written to stdout goes to stderr
    out = os.fdopen(os.dup(sys.stdout.fileno()), "wb")
    os.dup2(sys.stderr.fileno(), sys.stdout.fileno())
    inp = sys.stdin.buffer
    from . import mpl_figures
    mpl_figures.warm_up()
    size = _receive(inp)
    laid_out: dict = {}
    while (job := _receive(inp)) is not None:
        try:
            mpl_figures.draw_job(job, size, laid_out)
            _send(out, ("ok", None))
        except Exception as exc:        # handed back: the export raises it as its own
            try:
                pickle.dumps(exc)
            except Exception:
                exc = RuntimeError(f"{type(exc).__name__}: {exc}")
            _send(out, ("error", exc))


if __name__ == "__main__":
    _serve()
