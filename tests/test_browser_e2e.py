"""The dashboard in a real headless Chromium: it draws, follows the controls, and a copied link reopens it.

Needs python Playwright and Chromium at /usr/bin/chromium. Without them the
test is skipped on a workstation but FAILS under CI (``CI`` set), so a CI
machine that lost its browser cannot pass silently.

Run by hand to refresh the README screenshots from the demo runs:
    python tests/test_browser_e2e.py --screenshot docs/dashboard.png --demo DEMO_OUT
    python tests/test_browser_e2e.py --compare --screenshot docs/dashboard_compare.png --demo DEMO_OUT
"""

from __future__ import annotations

import io
import os
import socket
import subprocess
import sys
import time

import numpy as np
import pytest

from _need import need, need_that

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]


def _browser_or_fail(p):
    try:
        return p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
    except Exception as exc:     # missing binary or launch failure
        need_that(False, f"headless Chromium could not start: {exc}")


def new_page(browser, errors: list, width=1600, height=1250):
    """A page whose console errors and uncaught exceptions are collected in ``errors``."""
    page = browser.new_page(viewport={"width": width, "height": height})
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: errors.append(str(e)))
    return page


def write_run(folder, snapshots=3, n=20000, seed=3):
    """A small two-beam run in the demo's HDF5 shape (groups per species, position/x ..., blocks)."""
    import h5py
    os.makedirs(folder, exist_ok=True)
    rng = np.random.default_rng(seed)
    L = (8.0, 4.0)
    bx, by = 4, 2
    lower = np.array([[i * L[0] / bx, j * L[1] / by] for j in range(by) for i in range(bx)])
    upper = lower + np.array([L[0] / bx, L[1] / by])
    base = {}
    for name, v0 in (("beam_right", 1.0), ("beam_left", -1.0)):
        base[name] = (rng.uniform(0, L[0], n), rng.uniform(0, L[1], n),
                      v0 + 0.05 * rng.standard_normal(n), 0.05 * rng.standard_normal(n))
    for k in range(snapshots):
        with h5py.File(os.path.join(folder, f"step_{k * 10:06d}.h5"), "w") as f:
            f.attrs["step"] = k * 10
            f.attrs["time"] = k * 0.5
            f.attrs["field_energy"] = 1.0 + 0.01 * k
            for name, (x, y, vx, vy) in base.items():
                g = f.create_group(name)
                g.attrs["mass"] = 1.0
                g.attrs["charge"] = -1.0
                # a slow wave in x so snapshots differ
                xs = (x + vx * 0.5 * k + 0.2 * np.sin(2 * np.pi * y / L[1]) * k) % L[0]
                for comp, arr in (("x", xs), ("y", y)):
                    d = g.create_dataset(f"position/{comp}", data=arr.astype(np.float32))
                    d.attrs["units"] = "m"
                for comp, arr in (("x", vx), ("y", vy)):
                    d = g.create_dataset(f"velocity/{comp}", data=arr.astype(np.float32))
                    d.attrs["units"] = "m/s"
                g.create_dataset("id", data=np.arange(n, dtype=np.int64) + (0 if name == "beam_right" else n))
                g.create_dataset("weight", data=np.full(n, 2.0))
            b = f.create_group("blocks")
            b.create_dataset("lower", data=lower)
            b.create_dataset("upper", data=upper)
            b.create_dataset("level", data=np.zeros(len(lower), dtype=np.int64))
            b.create_dataset("rank", data=np.arange(len(lower), dtype=np.int64) // 4)
            b.attrs["domain_lower"] = [0.0, 0.0]
            b.attrs["domain_upper"] = list(L)
            b.attrs["cells"] = [32, 16]
            b.attrs["periodic"] = "x,y"
    return folder


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_server(args):
    port = _free_port()
    cmd = [sys.executable, "-m", "swarmaudit", *args, "--port", str(port), "--no-browser"]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                            env=dict(os.environ, PYTHONUNBUFFERED="1"))
    out = []
    deadline = time.time() + 120
    while time.time() < deadline:
        line = proc.stdout.readline()
        if not line and proc.poll() is not None:
            raise AssertionError("server exited:\n" + "".join(out))
        out.append(line)
        if "press Ctrl-C" in line:
            return proc, f"http://127.0.0.1:{port}/"
    proc.terminate()
    raise AssertionError("server did not start:\n" + "".join(out))


def stop_server(proc):
    proc.terminate()
    try:
        proc.wait(timeout=10)
    except subprocess.TimeoutExpired:
        proc.kill()


def wait_drawn(page, timeout=60):
    """Until both particle views report their binning (the images are on the page)."""
    deadline = time.time() + timeout
    while time.time() < deadline:
        text = page.evaluate("""() => { let t = ''; function walk(n) { if (!n) return;
            if (n.nodeType === 3) t += n.textContent; if (n.shadowRoot) walk(n.shadowRoot);
            for (const c of n.childNodes || []) walk(c); } walk(document.body); return t; }""")
        if text.count("particles binned") >= 2:
            time.sleep(1.0)    # let the canvases paint
            return text
        time.sleep(0.25)
    raise AssertionError("the particle views did not draw")


def page_text(page):
    return wait_drawn(page)


def canvas_variation(page):
    """Std-dev and distinct colours of the first plot canvas (the spatial view)."""
    from PIL import Image
    canvas = page.locator("canvas").first
    img = np.asarray(Image.open(io.BytesIO(canvas.screenshot())).convert("RGB"), dtype=np.float64)
    return float(img.std()), len(np.unique(img.reshape(-1, 3), axis=0))


def select_values(page):
    sel = page.locator("select")
    return [sel.nth(i).evaluate("e => e.value") for i in range(sel.count())]


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    run = write_run(str(tmp_path_factory.mktemp("e2e") / "beams"))
    proc, url = start_server(["serve", run])
    yield url
    stop_server(proc)


def test_dashboard_in_chromium(server):
    sync_api = need("playwright.sync_api")
    errors = []
    with sync_api.sync_playwright() as p:
        browser = _browser_or_fail(p)
        try:
            page = new_page(browser, errors)
            page.goto(server)
            text = page_text(page)
            assert "swarmaudit" in text and "#0" in text
            std, colours = canvas_variation(page)
            assert std > 5 and colours > 20, "the spatial view looks blank"

            # a box drawn in the spatial view selects particles in both views
            page.locator(".bk-tool-icon-box-select").first.click()
            box = page.locator("canvas").first.bounding_box()
            x0, y0 = box["x"] + 120, box["y"] + 100
            page.mouse.move(x0, y0)
            page.mouse.down()
            page.mouse.move(x0 + 150, y0 + 120, steps=8)
            page.mouse.up()
            deadline = time.time() + 30
            while "Selected in space" not in page_text(page) and time.time() < deadline:
                time.sleep(0.25)
            assert "Selected in space" in page_text(page)
            assert "sel=" in page.evaluate("window.location.href")

            # the controls drive the state, and the state the URL
            values = select_values(page)
            space_x = values.index("position/x")
            page.locator("select").nth(space_x).select_option("velocity/x")
            page.locator("button.next").first.click()
            deadline = time.time() + 30
            href = ""
            while time.time() < deadline:
                href = page.evaluate("window.location.href")
                if "snap=1" in href and "sx=velocity%2Fx" in href:
                    break
                time.sleep(0.25)
            assert "snap=1" in href and "sx=velocity%2Fx" in href, href
            wait_drawn(page)

            # the copied link reopens the same view in a fresh page
            other = new_page(browser, errors)
            other.goto(href)
            text2 = page_text(other)
            assert "#1" in text2 and "step 10" in text2
            assert select_values(other)[space_x] == "velocity/x"
            assert other.evaluate("window.location.href") == href or "snap=1" in other.evaluate(
                "window.location.href")
        finally:
            browser.close()
    assert not errors, errors


def test_edited_link_values_never_break_the_page(server):
    """Probes found on loopback: each value is dropped with a note, the page draws its defaults."""
    import urllib.request
    sync_api = need("playwright.sync_api")
    # a value of more than 4,300 digits once met Python's int-parsing limit: HTTP 500
    for q in ("?snap=" + "9" * 5000, "?zz=" + "1" * 5000, "?sxr=%5B" + "1" * 5000 + "%2C2%5D"):
        with urllib.request.urlopen(server + q, timeout=120) as r:
            body = r.read().decode()
            assert r.status == 200 and "Traceback" not in body and "Error" not in body
    errors = []
    with sync_api.sync_playwright() as p:
        browser = _browser_or_fail(p)
        try:
            page = new_page(browser, errors)
            page.goto(server + "?sxr=[1,1]&syr=[NaN,Infinity]&pxr=[NaN,1]&pyr=[-1e308,1e308]"
                      "&snap=" + "9" * 5000)
            text = page_text(page)
            assert text.count("particles binned") >= 2
            assert "Traceback" not in text and "ZeroDivisionError" not in text
            assert "site-packages" not in text and "/tmp/" not in text
            for key in ("sxr", "syr", "pxr", "pyr", "snap"):
                assert f"The link's '{key}'" in text, key
            assert page.get_by_text("was left out").first.is_visible()
            # the page's own link holds the defaults, not the refused values
            deadline = time.time() + 20
            href = page.evaluate("window.location.href")
            while "snap=0" not in href and time.time() < deadline:
                time.sleep(0.25)
                href = page.evaluate("window.location.href")
            assert "snap=0" in href and "NaN" not in href and "1e308" not in href
        finally:
            browser.close()
    assert not errors, errors


def test_background_panels_arrive_in_the_browser(server):
    """The Migration and Drift tabs are filled in when their work is done (after the page
    opened): a link opening either tab shows the result, and so does switching to the other."""
    sync_api = need("playwright.sync_api")

    def wait_for(page, words, seconds=90):
        deadline = time.time() + seconds
        text = page_text(page)
        while time.time() < deadline and not all(w in text for w in words):
            time.sleep(0.5)
            text = page_text(page)
        return text

    moved = ("matched", "over one cell per step")
    drift = ("of the first snapshot",)
    errors = []
    with sync_api.sync_playwright() as p:
        browser = _browser_or_fail(p)
        try:
            page = new_page(browser, errors)
            page.goto(server + "?snap=2&tab=migration")
            text = wait_for(page, moved)
            assert all(w in text for w in moved), text[-1500:]
            page.locator(".bk-tab").filter(has_text="Drift").first.click()
            text = wait_for(page, drift)
            assert all(w in text for w in drift), text[-1500:]
            other = new_page(browser, errors)
            other.goto(server + "?snap=1&tab=drift")
            text = wait_for(other, drift)
            assert all(w in text for w in drift), text[-1500:]
        finally:
            browser.close()
    assert not errors, errors


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory):
    """``serve REF CAND``: the same beams drawn twice from other seeds (ids match, positions differ)."""
    root = tmp_path_factory.mktemp("e2e-compare")
    ref, cand = write_run(str(root / "ref"), seed=3), write_run(str(root / "cand"), seed=5)
    proc, url = start_server(["serve", ref, cand])
    yield url, ref, cand
    stop_server(proc)


def _diverging_pixels(page):
    """(reddish, bluish) pixels of the first plot canvas: a difference is drawn in both."""
    from PIL import Image
    img = np.asarray(Image.open(io.BytesIO(page.locator("canvas").first.screenshot())).convert("RGB"),
                     dtype=np.int64)[40:]          # below the toolbar (its logo is orange)
    r, g, b = img[..., 0], img[..., 1], img[..., 2]
    # the two ends of the difference map; no viridis colour (the density views) is either
    red = (r > 150) & (g < 110) & (b < 110)
    blue = (b > 150) & (r < 110) & (g < 170) & (b > g + 30)
    return int(np.count_nonzero(red)), int(np.count_nonzero(blue))


def test_comparing_two_served_runs_in_chromium(two_runs):
    """A link naming a reference opens the comparison; 'difference' redraws both views on a
    diverging scale; the Compare tab shows the tables ``swarmaudit compare`` makes for the pair."""
    sync_api = need("playwright.sync_api")
    from swarmaudit.app.cli import build_parser
    from swarmaudit.app.options import contexts_from_options
    from swarmaudit.audit.compare import compare_runs
    url, ref, cand = two_runs
    ref_ctx, cand_ctx = contexts_from_options(build_parser().parse_args(["serve", ref, cand]))
    worst = compare_runs(ref_ctx, cand_ctx, only=[(1, 1)]).worst
    worst_id = str(worst[worst["species"] == "beam_right"]["id"].iloc[0])
    errors = []
    with sync_api.sync_playwright() as p:
        browser = _browser_or_fail(p)
        try:
            page = new_page(browser, errors)
            page.goto(url + "?run=cand&ref=ref&snap=1&sp=beam_right&tab=compare")
            text = page_text(page)
            assert "paired with ref #1" in text and "was left out" not in text
            red, blue = _diverging_pixels(page)
            assert red < 20 and blue < 20, ("the candidate's density looks like a difference", red, blue)
            page.get_by_role("button", name="difference").first.click()
            deadline = time.time() + 60
            while time.time() < deadline:
                text = page_text(page)
                if text.count("candidate − reference:") >= 2:
                    break
                time.sleep(0.25)
            assert text.count("candidate − reference:") >= 2, "the views did not switch to the difference"
            assert "show=difference" in page.evaluate("window.location.href")
            time.sleep(1.0)
            red, blue = _diverging_pixels(page)
            assert red > 200 and blue > 200, (red, blue)
            # the Compare tab: the pair's tables, the worst particle's id among them
            deadline = time.time() + 90
            while time.time() < deadline and not ("compare_worst.csv" in text and worst_id in text):
                time.sleep(0.5)
                text = page_text(page)
            assert "Particle by particle" in text and "compare_worst.csv" in text, text[-2000:]
            assert worst_id in text and "max_position_cells" in text
            # the link with the comparison reopens it in a fresh page
            href = page.evaluate("window.location.href")
            other = new_page(browser, errors)
            other.goto(href)
            deadline = time.time() + 60
            text2 = page_text(other)
            while text2.count("candidate − reference:") < 2 and time.time() < deadline:
                time.sleep(0.25)
                text2 = page_text(other)
            assert text2.count("candidate − reference:") >= 2
        finally:
            browser.close()
    assert not errors, errors


def make_screenshot(path, demo_out, compare=False):
    """The README pictures: the two-stream demo mid-run, all species, blocks outlined; with
    ``compare``, the changed-time-step variant against it (difference, Compare tab)."""
    from playwright.sync_api import sync_playwright
    if not os.path.isdir(os.path.join(demo_out, "two_stream_dt")):
        subprocess.run([sys.executable, "-m", "swarmaudit", "demo", "--out", demo_out, "--no-serve"],
                       check=True)
    runs = ["two_stream", "two_stream_dt"] if compare else ["two_stream"]
    query = ("?run=two_stream_dt&ref=two_stream&pair=time&show=difference&snap=5&tab=compare"
             if compare else "?snap=24&sp=all&blocks=outline&tab=migration")
    proc, url = start_server(["serve", *(os.path.join(demo_out, r) for r in runs)])
    try:
        with sync_playwright() as p:
            browser = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
            page = browser.new_page(viewport={"width": 1560, "height": 1180})
            page.goto(url + query)
            wait_drawn(page)
            deadline = time.time() + 300
            while compare and "compare_worst.csv" not in page_text(page) and time.time() < deadline:
                time.sleep(1)
            time.sleep(4)
            os.makedirs(os.path.dirname(os.path.abspath(path)), exist_ok=True)
            if compare:     # the views and the first tables of the Compare tab
                page.screenshot(path=path, clip={"x": 0, "y": 0, "width": 1560, "height": 1180})
            else:
                page.screenshot(path=path, full_page=True)
            browser.close()
    finally:
        proc.terminate()
        proc.wait(timeout=10)


if __name__ == "__main__":
    import argparse
    ap = argparse.ArgumentParser()
    ap.add_argument("--screenshot", default="docs/dashboard.png")
    ap.add_argument("--demo", default="swarmaudit-demo")
    ap.add_argument("--compare", action="store_true",
                    help="the comparison picture (docs/dashboard_compare.png)")
    a = ap.parse_args()
    make_screenshot(a.screenshot, a.demo, compare=a.compare)
