"""Ctrl-C: one flag that every layer checks between pieces of work.

Python's own SIGINT handling raises KeyboardInterrupt wherever the main
thread happens to be, and where that is a weakref callback or a ``__del__``
the exception is printed and dropped, so the command runs on and exits 0.
The handler installed here also raises (so code that never checks stops at
once), but first sets a flag that outlives a dropped exception: the next
:func:`check` raises again, the worker threads of every pool stop at their
next piece, and the command reports the interrupt however it ends.

Worker threads never see a signal; every pool runs its pieces through
:func:`check`, so once the flag is set the running pieces end at their next
check and the queued ones end the moment they start: the pool drains in one
piece's time, and the threads are free when the interpreter joins them at exit.
"""

from __future__ import annotations

import signal
import sys
import threading

_flag = threading.Event()


class Interrupted(KeyboardInterrupt):
    """The user pressed Ctrl-C (or the process got SIGINT): stop the work."""


def requested() -> bool:
    """Whether an interrupt arrived since :func:`install` (or :func:`clear`)."""
    return _flag.is_set()


def check() -> None:
    """Raise :class:`Interrupted` when an interrupt arrived; call it between pieces of work."""
    if _flag.is_set():
        raise Interrupted()


def request() -> None:
    """Ask every layer to stop (what the SIGINT handler does, without raising)."""
    _flag.set()


def clear() -> None:
    _flag.clear()


def _on_sigint(signum, frame):
    _flag.set()
    raise Interrupted()


_next_hook = sys.unraisablehook


def stop_with(stop) -> None:
    """From now on Ctrl-C sets the flag and calls ``stop()`` instead of raising.

    For an event loop (the server), where an exception raised inside one of its
    callbacks would be caught and logged by the loop, not end it; and for code that
    replaced our handler with its own. ``stop`` runs in the signal handler: it must
    only schedule the stop (``loop.call_soon_threadsafe``). Main thread only.
    """
    def handler(signum, frame):
        _flag.set()
        stop()
    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGINT, handler)


def _quiet_unraisable(unraisable):
    # an interrupt raised inside a callback Python cannot propagate from: the flag carries it
    if isinstance(unraisable.exc_value, KeyboardInterrupt):
        return
    _next_hook(unraisable)


def install():
    """Install the SIGINT handler (main thread only); returns a function that restores the old one."""
    global _next_hook
    _flag.clear()
    if threading.current_thread() is not threading.main_thread():
        return lambda: None
    previous = signal.getsignal(signal.SIGINT)
    previous_hook = sys.unraisablehook
    signal.signal(signal.SIGINT, _on_sigint)
    if previous_hook is not _quiet_unraisable:
        _next_hook = previous_hook
        sys.unraisablehook = _quiet_unraisable

    def restore():
        signal.signal(signal.SIGINT, previous if previous is not None else signal.default_int_handler)
        sys.unraisablehook = previous_hook
    return restore
