"""Eight browser sessions at once on one served run: all draw, zoom and step without an error,
and every column they show was read from the file once, for all of them.

The server runs in this process (a thread with its own event loop, through the same
``serve_runs`` the command uses) so the test can count, per column, the reads that reached
the file. The sessions are driven by ``bench/bench_viewers.py`` (one headless Chromium,
one context per session); the 10 M-particle measurement is that script's job.
"""

from __future__ import annotations

import asyncio
import os
import sys
import threading
import time
from collections import Counter
from types import SimpleNamespace

import pytest

from _need import need

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "bench"))

SESSIONS = 8
N = 200_000


@pytest.fixture
def server(tmp_path):
    from bench_viewers import write_run

    from swarmaudit.app import serve
    from swarmaudit.app.state import ServerState
    from swarmaudit.core.column import Column
    from swarmaudit.core.context import AuditContext
    from swarmaudit.readers.discover import open_run

    write_run(str(tmp_path / "many"), N)
    ctx = AuditContext(open_run(str(tmp_path / "many")))
    reads = Counter()
    # count the reads that reach the file, per snapshot and column
    for i, snap in ctx.run._open.items():
        for frame in snap.species.values():
            for col, load in list(frame._loaders.items()):
                def counted(load=load, key=(i, col)):
                    reads[key] += 1
                    return load()
                frame._loaders[col] = Column(counted)
    box = {}
    shared = ServerState()

    def ready(url):
        from tornado.ioloop import IOLoop
        box["loop"], box["url"] = IOLoop.current(), url

    def target():
        asyncio.set_event_loop(asyncio.new_event_loop())
        args = SimpleNamespace(port=0, share=False, password=None, no_browser=True)
        try:
            serve.serve_runs([("many", ctx)], args, ready=ready, shared=shared)
        except Exception as exc:         # shown by the test instead of a silent thread
            box["error"] = exc

    thread = threading.Thread(target=target, daemon=True)
    thread.start()
    deadline = time.time() + 60
    while "url" not in box and "error" not in box and time.time() < deadline:
        time.sleep(0.05)
    assert "url" in box, box.get("error", "the server did not start")
    try:
        yield box["url"], reads, shared
    finally:
        box["loop"].add_callback(box["loop"].stop)
        thread.join(timeout=20)


def _background_work_done(shared, timeout=60):
    """Wait for the shared run-wide work (drift, migration) the pages started."""
    deadline = time.time() + timeout
    while time.time() < deadline:
        if not shared.results.pending():
            return
        time.sleep(0.1)
    raise AssertionError("the shared background work did not finish")


def test_eight_sessions_share_one_copy(server):
    need("playwright.async_api")
    import psutil
    from bench_viewers import drive_sessions
    url, reads, shared = server
    served = shared.runs["many"]

    # one viewer first: it reads what the page shows (and the run-wide totals read theirs)
    first = drive_sessions(url, 1, timeout=60, viewport=(1000, 800))
    assert not first[0]["errors"] and first[0]["stepped"], first
    _background_work_done(shared)
    after_one = dict(reads)
    rss0 = psutil.Process().memory_info().rss
    for i in (0, 1):
        for col in ("x", "y", "vx"):
            assert reads[(i, col)] >= 1, (i, col, after_one)
    # a column may reach the file twice at most: once for the views, once more when the
    # run-wide totals (a background thread) read it before the views and let it go
    assert max(after_one.values()) <= 2, after_one

    t = time.perf_counter()
    # a smaller window than a desk's: the browser paints less, the server's work is the same
    results = drive_sessions(url, SESSIONS, timeout=150, viewport=(1000, 800))
    seconds = time.perf_counter() - t
    _background_work_done(shared)
    rss1 = psutil.Process().memory_info().rss

    errors = {r["session"]: r["errors"] for r in results if r["errors"]}
    assert not errors, errors
    assert all(r["first_image"] is not None and r["zoomed"] and r["stepped"] for r in results)
    # eight more viewers of the same views: not one more read reached the file
    assert dict(reads) == after_one, {k: (after_one.get(k), v) for k, v in reads.items()}
    assert served.snapshot(0).species["particles"]["x"].size == N
    # bounded: a leak guard, not a measurement (bench_viewers.py measures at 10 M); a
    # page's server-side models take some tens of MB, so eight stay well under 1 GB
    assert rss1 - rss0 < (1 << 30), f"RSS grew {(rss1 - rss0) / 2**20:.0f} MB"
    print(f"{SESSIONS} sessions in {seconds:.1f} s; RSS +{(rss1 - rss0) / 2**20:.0f} MB")
