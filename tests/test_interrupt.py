"""Ctrl-C is a flag every layer checks, so an interrupt Python drops on the way still stops the work.

The command-level checks (every moment of an export, serve) are in test_read_only_cli.py.
"""

from __future__ import annotations

import gc
import os
import signal
import sys
import threading
import time
import weakref

import numpy as np
import pytest

from _need import need_that

from swarmaudit.core import interrupt

need_that(threading.current_thread() is threading.main_thread(),
          "signal handlers can only be installed from the main thread", module_level=True)


@pytest.fixture
def handler():
    restore = interrupt.install()
    yield
    restore()
    interrupt.clear()


class _Obj:
    pass


def test_an_interrupt_dropped_in_a_weakref_callback_still_stops(handler, capsys):
    # Python cannot raise out of a weakref callback: the KeyboardInterrupt raised there is printed
    # ("Exception ignored in ...") and dropped. That is how an export once ran on and exited 0.
    hits = []

    def callback(_ref):
        hits.append(1)
        os.kill(os.getpid(), signal.SIGINT)
        time.sleep(0.05)        # the handler runs here, inside the callback

    obj = _Obj()
    ref = weakref.ref(obj, callback)
    del obj
    gc.collect()
    assert hits == [1] and ref() is None
    assert interrupt.requested()
    with pytest.raises(interrupt.Interrupted):
        interrupt.check()
    # and the dropped exception is not printed as a traceback
    assert "Traceback" not in capsys.readouterr().err


def test_the_handler_raises_at_once_where_it_can(handler):
    with pytest.raises(KeyboardInterrupt):
        os.kill(os.getpid(), signal.SIGINT)
        time.sleep(5)
    assert interrupt.requested()


@pytest.mark.parametrize("where", ["threads", "dask"])
def test_a_thread_pool_drains_in_one_piece_once_the_flag_is_set(handler, monkeypatch, where):
    from swarmaudit.core.frame import Frame
    from swarmaudit.diagnostics.accumulate import Accumulator
    from swarmaudit.engine import pieces
    from swarmaudit.engine.reduce import reduce
    monkeypatch.setattr(pieces, "PIECE_ROWS", 1)      # 200 pieces of one row
    started = []

    class Slow(Accumulator):
        columns = ("x",)

        def start(self):
            return 0

        def add(self, state, piece):
            started.append(piece.start)
            if len(started) == 4:                 # the fourth piece to start, wherever it is
                interrupt.request()
            time.sleep(0.01)
            return state + 1

        def merge(self, a, b):
            return a + b

    x = np.arange(200.0)
    frame = Frame("p", 200, {"x": lambda: x})
    frame["x"]                                  # held in memory: cut into pieces of one row
    with pytest.raises(interrupt.Interrupted):
        reduce(Slow(), frame, where=where)
    # the pieces queued after the interrupt never ran (two threads: a few were already running)
    assert len(started) < 20, started


def test_install_restores_the_previous_handler():
    before = signal.getsignal(signal.SIGINT)
    hook = sys.unraisablehook
    restore = interrupt.install()
    assert signal.getsignal(signal.SIGINT) is not before
    restore()
    assert signal.getsignal(signal.SIGINT) is before and sys.unraisablehook is hook
