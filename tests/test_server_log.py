"""A closed browser tab is normal: the serving terminal shows no traceback and no line for it."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import pytest

from _need import need

CLOSED_WORDS = ("Traceback", "WebSocketClosedError", "StreamClosedError", "connection was closed")

# the libraries' own ways of reporting a write to a socket that has gone
_SCRIPT = r"""
import asyncio, logging
from tornado.iostream import StreamClosedError
from tornado.websocket import WebSocketClosedError
logging.basicConfig()
from swarmaudit.app.serve import quiet_closed_pages
quiet_closed_pages()

async def main():
    loop = asyncio.get_running_loop()
    fut = loop.create_future()
    try:
        raise WebSocketClosedError() from StreamClosedError()
    except WebSocketClosedError as exc:
        fut.set_exception(exc)
    del fut            # never awaited: the loop logs it with its traceback when it is collected
    import gc; gc.collect()
asyncio.run(main())
logging.getLogger("bokeh.server.views.ws").warning("Failed sending message as connection was closed")
try:
    raise WebSocketClosedError()
except WebSocketClosedError:
    logging.getLogger("tornado.application").exception("Exception in callback <function write>")
try:
    raise ValueError("a real failure")
except ValueError:
    logging.getLogger("tornado.application").exception("Exception in callback <function other>")
"""


def test_closed_socket_records_are_dropped_and_others_kept():
    r = subprocess.run([sys.executable, "-c", _SCRIPT], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    for word in ("WebSocketClosedError", "StreamClosedError", "connection was closed", "<function write>"):
        assert word not in r.stderr, r.stderr
    # an unrelated error still shows, with its traceback
    assert "a real failure" in r.stderr and "<function other>" in r.stderr and "Traceback" in r.stderr


def test_closing_pages_leaves_the_server_log_clean(tmp_path):
    sync_api = need("playwright.sync_api")
    from test_browser_e2e import _browser_or_fail, _free_port, write_run
    run = tmp_path / "run"
    write_run(str(run), snapshots=3, n=20000)
    port = _free_port()
    err_path = tmp_path / "stderr.txt"
    with open(err_path, "w") as err:
        proc = subprocess.Popen([sys.executable, "-m", "swarmaudit", "serve", str(run), "--port", str(port),
                                 "--no-browser"], stdout=subprocess.PIPE, stderr=err, text=True,
                                env=dict(os.environ, PYTHONUNBUFFERED="1"))
    try:
        deadline = time.time() + 180
        for line in proc.stdout:
            if "press Ctrl-C" in line or time.time() > deadline:
                break
        url = f"http://127.0.0.1:{port}/"
        with sync_api.sync_playwright() as p:
            browser = _browser_or_fail(p)
            # tabs closed at several moments of their first drawing, then a browser that goes away
            for wait in (0.3, 1.5, 4.0):
                page = browser.new_page()
                page.goto(url, wait_until="commit", timeout=120_000)
                time.sleep(wait)
                page.close()
            pages = [browser.new_page() for _ in range(2)]
            for page in pages:
                page.goto(url, wait_until="commit", timeout=120_000)
            time.sleep(3)
            browser.close()
        time.sleep(8)      # the server finishes the closed pages' work and writes to them
        assert proc.poll() is None, "the server stopped"
    finally:
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(timeout=90)
        except subprocess.TimeoutExpired:
            proc.kill()
    text = err_path.read_text()
    bad = [ln for ln in text.splitlines() if any(w in ln for w in CLOSED_WORDS)]
    assert not bad, text
    assert proc.returncode == 130 and text.strip().splitlines()[-1] == "swarmaudit: interrupted", text


@pytest.mark.parametrize("name", ["asyncio", "bokeh.server.views.ws"])
def test_the_filter_sits_on_the_loggers_that_report_closed_pages(name):
    import logging
    from swarmaudit.app import serve
    serve.quiet_closed_pages()
    try:
        assert serve._CLOSED_PAGE_FILTER in logging.getLogger(name).filters
    finally:
        for n in serve.CLOSED_PAGE_LOGGERS:
            logging.getLogger(n).removeFilter(serve._CLOSED_PAGE_FILTER)
        for h in logging.getLogger().handlers:
            h.removeFilter(serve._CLOSED_PAGE_FILTER)
