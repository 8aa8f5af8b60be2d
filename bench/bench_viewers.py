"""Many viewers at once: 8 browser sessions on one 10 M-particle run share one copy of its columns.

Writes a run of two snapshots (float32 positions and velocities, int64 ids, a ``blocks``
group) with h5py into a temporary folder, starts ``swarmaudit serve`` on loopback in a
subprocess and drives headless Chromium (one browser, one context per session). A first
session opens alone and stays open; then the 8 sessions open at once. Each session waits
for a non-blank spatial image, zooms it (mouse wheel), steps to the next snapshot and waits
for that image too. The server's resident memory is sampled throughout and set against the
bytes of the columns the pages show (x, y, vx of both snapshots): the first session pays
for the data (plus the imports and compiled code of a first page); with one shared copy each
further session adds only its page's own models, far below the column bytes a copy per
viewer would add. Console errors and failed requests of every page are collected; each
phase fails past ``--timeout`` seconds.

    python bench/bench_viewers.py [--particles 10000000] [--sessions 8] [--timeout 300] [--keep]

Exit code 0 when every session drew both images without an error, 1 otherwise.
"""

from __future__ import annotations

import argparse
import asyncio
import io
import os
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time

import numpy as np

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]
#: the columns the default page draws: space x-y, phase x-vx
VIEWED = ("x", "y", "vx")
#: seconds between looks at a page (each look walks its DOM: eight pages polled fast cost CPU)
POLL = 0.5


def write_run(folder: str, n: int, snapshots: int = 2, seed: int = 0) -> dict:
    """Snapshots of ``n`` particles in a 4 x 2 block box; returns the bytes of each dataset."""
    import h5py
    os.makedirs(folder, exist_ok=True)
    rng = np.random.default_rng(seed)
    L = (4.0, 2.0)
    lower = np.array([[i * 1.0, j * 1.0] for j in range(2) for i in range(4)])
    sizes = {}
    x = rng.uniform(0, L[0], n).astype(np.float32)
    y = rng.uniform(0, L[1], n).astype(np.float32)
    vx = rng.normal(0, 1, n).astype(np.float32)
    vy = rng.normal(0, 1, n).astype(np.float32)
    for k in range(snapshots):
        with h5py.File(os.path.join(folder, f"step_{10 * k:06d}.h5"), "w") as f:
            f.attrs["step"] = 10 * k
            f.attrs["time"] = 0.1 * k
            xs = np.mod(x + np.float32(0.1 * k) * vx, np.float32(L[0]))
            for name, arr in (("x", xs), ("y", y), ("vx", vx), ("vy", vy),
                              ("id", np.arange(n, dtype=np.int64))):
                f.create_dataset(name, data=arr)
                sizes[name] = arr.nbytes
            b = f.create_group("blocks")
            b.create_dataset("lower", data=lower)
            b.create_dataset("upper", data=lower + 1.0)
            b.create_dataset("level", data=np.zeros(8, dtype=np.int64))
            b.create_dataset("rank", data=np.arange(8, dtype=np.int64) // 2)
            b.attrs["domain_lower"] = [0.0, 0.0]
            b.attrs["domain_upper"] = list(L)
            b.attrs["cells"] = [64, 32]
            b.attrs["periodic"] = "x"
    return sizes


class RssSampler(threading.Thread):
    """Peak resident memory of a process (and its children), sampled every ``period`` s."""

    def __init__(self, pid: int, period: float = 0.05):
        super().__init__(daemon=True)
        import psutil
        self.proc = psutil.Process(pid)
        self.period = period
        self.peak = 0
        self.last = 0
        self._halt = threading.Event()

    def rss(self) -> int:
        import psutil
        try:
            total = self.proc.memory_info().rss
            for c in self.proc.children(recursive=True):
                try:
                    total += c.memory_info().rss
                except psutil.Error:
                    pass
            return total
        except psutil.Error:
            return 0

    def run(self):
        while not self._halt.is_set():
            self.last = self.rss()
            self.peak = max(self.peak, self.last)
            time.sleep(self.period)

    def stop(self):
        self._halt.set()
        self.join(timeout=5)


# one browser, many sessions ------------------------------------------------------------------
_TEXT_JS = """() => { let t = ''; function walk(n) { if (!n) return;
    if (n.nodeType === 3) t += n.textContent; if (n.shadowRoot) walk(n.shadowRoot);
    for (const c of n.childNodes || []) walk(c); } walk(document.body); return t; }"""


async def _drawn(page, deadline: float, must: str = "") -> str:
    """Until both particle views report their binning (and ``must`` is on the page)."""
    while time.monotonic() < deadline:
        text = await page.evaluate(_TEXT_JS)
        if text.count("particles binned") >= 2 and must in text:
            return text
        await asyncio.sleep(POLL)
    raise TimeoutError(f"the views did not draw{' ' + must if must else ''}")


async def _nonblank(page, deadline: float) -> tuple[float, int]:
    """(std-dev, distinct colours) of the spatial view's canvas once it is not blank."""
    from PIL import Image
    std, colours = 0.0, 0
    while time.monotonic() < deadline:
        shot = await page.locator("canvas").first.screenshot()
        img = np.asarray(Image.open(io.BytesIO(shot)).convert("RGB"), dtype=np.float64)
        std, colours = float(img.std()), len(np.unique(img.reshape(-1, 3), axis=0))
        if std > 5 and colours > 20:
            return std, colours
        await asyncio.sleep(POLL)
    raise TimeoutError(f"the spatial view stayed blank (std {std:.1f}, {colours} colours)")


async def _until_url(page, needle: str, deadline: float) -> str:
    while time.monotonic() < deadline:
        href = await page.evaluate("window.location.href")
        if needle in href:
            return href
        await asyncio.sleep(POLL)
    raise TimeoutError(f"the link never showed {needle}")


async def _session(browser, url: str, k: int, deadline: float, start: float,
                   keep: list | None = None, viewport=(1500, 1150)) -> dict:
    """One viewer: open, first image, zoom, next snapshot. ``keep``: leave the page open in it."""
    out = {"session": k, "errors": [], "failed_requests": [], "first_image": None, "zoomed": False,
           "stepped": False}
    context = await browser.new_context(viewport={"width": viewport[0], "height": viewport[1]})
    page = await context.new_page()
    page.on("console", lambda m: out["errors"].append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: out["errors"].append(str(e)))
    page.on("requestfailed", lambda r: out["failed_requests"].append(f"{r.url} ({r.failure})"))
    try:
        await page.goto(url, timeout=max(1.0, deadline - time.monotonic()) * 1000)
        await _drawn(page, deadline)
        await _nonblank(page, deadline)
        out["first_image"] = time.monotonic() - start
        # zoom the spatial view with the wheel (its active tool): the server re-bins the new range
        box = await page.locator("canvas").first.bounding_box()
        await page.mouse.move(box["x"] + box["width"] / 2, box["y"] + box["height"] / 2)
        await page.mouse.wheel(0, -600)
        await _until_url(page, "sxr=", deadline)
        out["zoomed"] = True
        await page.locator("button.next").first.click()
        await _until_url(page, "snap=1", deadline)
        await _drawn(page, deadline, "#1")
        await _nonblank(page, deadline)
        out["stepped"] = True
    except Exception as exc:      # a timeout or a page failure is a result, not a crash
        out["errors"].append(f"{type(exc).__name__}: {exc}")
    finally:
        if keep is None:
            await context.close()
        else:
            keep.append(context)
    return out


async def _drive(url: str, sessions: int, timeout: float, viewport=(1500, 1150)) -> list[dict]:
    from playwright.async_api import async_playwright
    async with async_playwright() as p:
        browser = await p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        try:
            start = time.monotonic()
            deadline = start + timeout
            return list(await asyncio.gather(*(_session(browser, url, k, deadline, start,
                                                        viewport=viewport)
                                               for k in range(sessions))))
        finally:
            await browser.close()


def drive_sessions(url: str, sessions: int = 8, timeout: float = 300.0,
                   viewport=(1500, 1150)) -> list[dict]:
    """Open ``sessions`` pages at once; per session: errors, seconds to first image, zoom, step."""
    return asyncio.run(_drive(url, sessions, timeout, viewport))


async def _drive_measured(url: str, sessions: int, timeout: float, sampler: "RssSampler") -> dict:
    """One page first (and kept open), then ``sessions`` more at once; resident memory after each."""
    from playwright.async_api import async_playwright
    out = {"rss_before": sampler.rss()}
    async with async_playwright() as p:
        browser = await p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        kept: list = []
        try:
            start = time.monotonic()
            out["first"] = await _session(browser, url, -1, start + timeout, start, keep=kept)
            await asyncio.sleep(2.0)
            out["rss_one"] = sampler.rss()
            start = time.monotonic()
            out["results"] = list(await asyncio.gather(*(
                _session(browser, url, k, start + timeout, start, keep=kept) for k in range(sessions))))
            out["wall"] = time.monotonic() - start
            await asyncio.sleep(2.0)
            out["rss_all"] = sampler.rss()
        finally:
            for c in kept:
                await c.close()
            await browser.close()
    return out


def _busy_seconds() -> float:
    """CPU seconds the whole machine spent busy so far (all processes, all cores)."""
    import psutil
    t = psutil.cpu_times()
    return t.user + t.system + getattr(t, "nice", 0.0)


# the server ----------------------------------------------------------------------------------
def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_server(run: str, timeout: float = 120.0):
    port = _free_port()
    proc = subprocess.Popen([sys.executable, "-m", "swarmaudit", "serve", run, "--port", str(port),
                             "--no-browser"], stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                            text=True, env=dict(os.environ, PYTHONUNBUFFERED="1"))
    lines = []
    deadline = time.time() + timeout
    while time.time() < deadline:
        line = proc.stdout.readline()
        if not line and proc.poll() is not None:
            break
        lines.append(line)
        if "press Ctrl-C" in line:
            # keep draining the output so the server never blocks on a full pipe
            threading.Thread(target=lambda: lines.extend(proc.stdout), daemon=True).start()
            return proc, f"http://127.0.0.1:{port}/", lines
    proc.kill()
    raise RuntimeError("server did not start:\n" + "".join(lines))


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--particles", type=int, default=10_000_000)
    p.add_argument("--sessions", type=int, default=8)
    p.add_argument("--timeout", type=float, default=300.0, help="seconds for all sessions")
    p.add_argument("--keep", action="store_true", help="keep the written run")
    a = p.parse_args(argv)

    folder = tempfile.mkdtemp(prefix="swarmaudit-viewers-")
    try:
        t = time.perf_counter()
        sizes = write_run(os.path.join(folder, "big"), a.particles)
        print(f"wrote 2 snapshots of {a.particles:,} particles in {time.perf_counter() - t:.1f} s")
        proc, url, lines = start_server(os.path.join(folder, "big"))
        sampler = RssSampler(proc.pid)
        time.sleep(1.0)
        sampler.start()
        import psutil
        server_cpu0 = sum(psutil.Process(proc.pid).cpu_times()[:2])
        busy0 = _busy_seconds()
        try:
            got = asyncio.run(_drive_measured(url, a.sessions, a.timeout, sampler))
            server_cpu = sum(psutil.Process(proc.pid).cpu_times()[:2]) - server_cpu0
            busy = _busy_seconds() - busy0
        finally:
            sampler.stop()
            proc.send_signal(signal.SIGINT)
            try:
                proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                proc.kill()
        server_out = "".join(lines)
        if os.environ.get("SWARMAUDIT_BENCH_LOG"):
            with open(os.environ["SWARMAUDIT_BENCH_LOG"], "w") as fh:
                fh.write(server_out)
        results = [got["first"]] + got["results"]
        columns = 2 * sum(sizes[c] for c in VIEWED)     # both snapshots are viewed
        ok = [r for r in got["results"] if r["stepped"] and not r["errors"]]
        firsts = [r["first_image"] for r in got["results"] if r["first_image"] is not None]
        mb = 1 << 20
        base, one, every = got["rss_before"], got["rss_one"], got["rss_all"]
        per_session = (every - one) / a.sessions
        print()
        print("| measurement | value |")
        print("|---|---|")
        print(f"| sessions opened at once (after a first one), all drew + zoomed + stepped "
              f"without an error | {len(ok)} of {a.sessions} |")
        print(f"| first session alone: first image | {got['first']['first_image'] or float('nan'):.1f} s |")
        print(f"| {a.sessions} at once: time to first image, min / median / max | "
              + (f"{min(firsts):.1f} / {statistics.median(firsts):.1f} / {max(firsts):.1f} s |"
                 if firsts else "none |"))
        print(f"| {a.sessions} at once: all done (wall) | {got['wall']:.1f} s |")
        print(f"| CPU seconds: server / everything else (the browser) on {os.cpu_count()} cores | "
              f"{server_cpu:.1f} / {max(busy - server_cpu, 0):.1f} |")
        print(f"| columns viewed (x, y, vx of 2 snapshots) | {columns / mb:,.0f} MB |")
        print(f"| server RSS: before / 1 session / {a.sessions + 1} sessions / peak | "
              f"{base / mb:,.0f} / {one / mb:,.0f} / {every / mb:,.0f} / {sampler.peak / mb:,.0f} MB |")
        print(f"| RSS growth with 1 session / columns viewed (data + imports + compiled code) | "
              f"{(one - base) / columns:.2f} |")
        print(f"| RSS added per further session / columns viewed (a copy each would be >= 1) | "
              f"{per_session / columns:.3f} ({per_session / mb:,.0f} MB) |")
        print(f"| RSS peak growth / columns viewed | {(sampler.peak - base) / columns:.2f} |")
        bad = [(r["session"], r["errors"][:3], r["failed_requests"][:3]) for r in results if r["errors"]]
        if bad:
            print("\nerrors:", bad)
        if "Traceback" in server_out or "ERROR" in server_out:
            print("\nserver output:\n" + server_out[-3000:])
            return 1
        first_ok = got["first"]["stepped"] and not got["first"]["errors"]
        return 0 if len(ok) == a.sessions and first_ok else 1
    finally:
        if not a.keep:
            shutil.rmtree(folder, ignore_errors=True)
        else:
            print(f"run kept in {folder}")


if __name__ == "__main__":
    sys.exit(main())
