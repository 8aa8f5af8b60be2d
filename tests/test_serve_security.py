"""The server shows only what it was started with, on loopback unless shared, behind a password when shared.

Each test starts ``swarmaudit serve`` in a subprocess on a free loopback port
and talks to it over HTTP and websockets like a browser (or an intruder) would.
"""

import json
import os
import re
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.parse
import urllib.request
from http.cookiejar import CookieJar

import numpy as np
import psutil
import pytest

SECRET = 31337.25          # a value only the file outside the run folder holds


def _write_npz(path, step, n=400, value=None, seed=0):
    rng = np.random.default_rng(seed + step)
    x = rng.uniform(0, 1, n) if value is None else np.full(n, value)
    np.savez(path, x=x, y=rng.uniform(0, 1, n), vx=rng.normal(0, 1, n), vy=rng.normal(0, 1, n),
             id=np.arange(n, dtype=np.int64), weight=np.ones(n), step=np.array(step),
             time=np.array(0.1 * step))


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory):
    base = tmp_path_factory.mktemp("served")
    run = base / "tiny_run"
    run.mkdir()
    for k in range(3):
        _write_npz(run / f"snap_{k:04d}.npz", 10 * k)
    outside = base / "elsewhere"
    outside.mkdir()
    _write_npz(outside / "snap_0099.npz", 990, value=SECRET)
    os.symlink(outside / "snap_0099.npz", run / "snap_0099.npz")
    return run


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Server:
    def __init__(self, run, *extra):
        self.port = _free_port()
        runs = [str(r) for r in run] if isinstance(run, (list, tuple)) else [str(run)]
        cmd = [sys.executable, "-m", "swarmaudit", "serve", *runs, "--domain", "0,1,0,1",
               "--cells", "8,8", "--blocks", "2,2", "--port", str(self.port), "--no-browser", *extra]
        env = dict(os.environ, PYTHONUNBUFFERED="1")
        self.proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                                     env=env)
        self.lines = []
        deadline = time.time() + 90
        while time.time() < deadline:
            line = self.proc.stdout.readline()
            if not line:
                if self.proc.poll() is not None:
                    raise AssertionError("server exited:\n" + "".join(self.lines))
                continue
            self.lines.append(line)
            if "press Ctrl-C" in line:
                break
        else:
            raise AssertionError("server did not start:\n" + "".join(self.lines))
        self.url = f"http://127.0.0.1:{self.port}/"

    @property
    def output(self):
        return "".join(self.lines)

    def stop(self):
        self.proc.terminate()
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()


@pytest.fixture
def served(run_folder):
    servers = []

    def start(*extra):
        s = Server(run_folder, *extra)
        servers.append(s)
        return s
    yield start
    for s in servers:
        s.stop()


@pytest.fixture(scope="module")
def plain(run_folder):
    """One default server shared by the tests that do not change its options."""
    s = Server(run_folder)
    yield s
    s.stop()


class NoRedirect(urllib.request.HTTPRedirectHandler):
    def redirect_request(self, *args, **kwargs):
        return None


def _get(url, opener=None):
    opener = opener or urllib.request.build_opener(NoRedirect)
    try:
        with opener.open(url, timeout=30) as r:
            return r.status, r.headers, r.read().decode("utf-8", "replace")
    except urllib.error.HTTPError as e:
        return e.code, e.headers, e.read().decode("utf-8", "replace")


def _listening_addresses(pid):
    addrs = set()
    for c in psutil.Process(pid).net_connections(kind="tcp"):
        if c.status == psutil.CONN_LISTEN:
            addrs.add(c.laddr.ip)
    return addrs


def _session_state(url, arguments=None):
    """Open a session like a browser does and read back the view state it built."""
    import holoviews.plotting.bokeh  # noqa: F401  (the page's model types must be known here)
    import panel.models  # noqa: F401
    import panel.models.tabulator  # noqa: F401
    from bokeh.client import pull_session
    with pull_session(url=url, arguments=arguments or {}) as session:
        texts = []
        for model in session.document.models:
            for prop in ("value", "text", "options", "labels"):
                v = getattr(model, prop, None) if prop in model.properties() else None
                if v is not None:
                    texts.append(json.dumps(v, default=str) if not isinstance(v, str) else v)
        return "\n".join(texts)


def test_default_binds_loopback_only(plain):
    s = plain
    assert _listening_addresses(s.proc.pid) <= {"127.0.0.1"}, "must listen on loopback only"
    status, _, body = _get(s.url)
    assert status == 200 and "swarmaudit" in body
    assert "password" not in s.output.lower()


def test_symlink_out_of_run_folder_is_left_out(plain):
    s = plain
    assert "snap_0099.npz: left out, it points outside the run folder" in s.output
    state = _session_state(s.url, {"snap": "3"})
    # three snapshots served: the slider ends at 2 and nothing of the outside file shows
    assert str(SECRET) not in state and "31337" not in state
    assert "elsewhere" not in state


@pytest.mark.parametrize("value", ["../../etc/passwd", "/etc/passwd", "tiny_run/../../x", "%2e%2e/secret"])
def test_run_parameter_cannot_name_a_path(plain, value):
    s = plain
    state = _session_state(s.url, {"run": value, "sx": "/etc/passwd", "hcol": "../x"})
    assert "root:" not in state
    assert "run=tiny_run" in state          # the link text: the view fell back to the served run
    assert "etc/passwd" not in state.replace(urllib.parse.quote(value, safe=""), "")


def test_foreign_websocket_origin_is_refused(plain):
    from tornado import httpclient, ioloop, websocket
    s = plain

    async def connect(origin):
        req = httpclient.HTTPRequest(f"ws://127.0.0.1:{s.port}/ws", headers={"Origin": origin})
        try:
            conn = await websocket.websocket_connect(req)
        except httpclient.HTTPClientError as exc:
            return exc.code
        conn.close()
        return 101

    loop = ioloop.IOLoop.current()
    assert loop.run_sync(lambda: connect("http://evil.example:80")) == 403
    # the page's own origin gets past the origin check (it then fails only for lack of a token)
    assert loop.run_sync(lambda: connect(f"http://127.0.0.1:{s.port}")) != 403


def test_share_demands_the_password(served):
    s = served("--share", "--password", "correct-horse-42")
    assert "0.0.0.0" in _listening_addresses(s.proc.pid)
    status, headers, _ = _get(s.url)
    assert status in (401, 403) or (status in (301, 302) and "login" in headers.get("Location", ""))
    jar = CookieJar()
    opener = urllib.request.build_opener(urllib.request.HTTPCookieProcessor(jar), NoRedirect)
    login = s.url + "login"
    _get(login, opener)
    for password, ok in (("wrong-password", False), ("correct-horse-42", True)):
        data = urllib.parse.urlencode({"username": "colleague", "password": password}).encode()
        try:
            r = opener.open(urllib.request.Request(login, data=data), timeout=30)
            code, loc = r.status, r.headers.get("Location", "")
        except urllib.error.HTTPError as e:
            code, loc = e.code, e.headers.get("Location", "")
        assert code in (302, 303)
        assert ("error" in loc) != ok
    status, _, body = _get(s.url, opener)
    assert status == 200 and "swarmaudit" in body


def test_share_without_password_prints_a_generated_one(served):
    s = served("--share")
    m = re.search(r"password: (\S+)", s.output)
    assert m and len(m.group(1)) >= 12


def test_password_without_share_is_an_option_error(run_folder):
    r = subprocess.run([sys.executable, "-m", "swarmaudit", "serve", str(run_folder), "--password",
                        "abcdefgh12", "--no-browser"], capture_output=True, text=True, timeout=120)
    assert r.returncode == 2 and "--password only makes sense with --share" in r.stderr


# sign-in protections of --share -----------------------------------------------------------------
PASSWORD = "correct-horse-42"


@pytest.fixture(scope="module")
def shared(run_folder):
    s = Server(run_folder, "--share", "--password", PASSWORD)
    yield s
    s.stop()


def _post_login(s, password, opener=None):
    opener = opener or urllib.request.build_opener(NoRedirect)
    data = urllib.parse.urlencode({"username": "colleague", "password": password}).encode()
    try:
        r = opener.open(urllib.request.Request(s.url + "login", data=data), timeout=30)
        return r.status, r.headers
    except urllib.error.HTTPError as e:
        return e.code, e.headers


def test_throttle_waits_double_after_the_free_tries():
    from swarmaudit.app.login import Throttle
    now = [0.0]
    t = Throttle(free=3, first=1.0, cap=8.0, forget=100.0, clock=lambda: now[0])
    waits = [t.failed("a") for _ in range(8)]
    assert waits == [0, 0, 0, 1, 2, 4, 8, 8]          # exponential, capped
    assert t.wait("a") == 8 and t.wait("b") == 0        # per client
    now[0] = 5.0
    assert t.wait("a") == 3.0
    t.succeeded("a")
    assert t.wait("a") == 0
    t.failed("c")
    now[0] = 500.0                                      # quiet long enough: forgotten
    assert [t.failed("c") for _ in range(3)] == [0, 0, 0]


def test_password_is_compared_in_constant_time(monkeypatch):
    import hmac

    from swarmaudit.app import login
    calls = []
    real = hmac.compare_digest
    monkeypatch.setattr(login.hmac, "compare_digest", lambda a, b: calls.append(1) or real(a, b))
    assert login.same_password(PASSWORD, PASSWORD) and not login.same_password("x" * 16, PASSWORD)
    assert len(calls) == 2


def test_wrong_passwords_are_throttled_without_stalling_the_server(shared):
    s = shared
    # the probe: about 170 tries a second were answered; now a burst gets the free tries and the
    # first doubled one looked at, and the rest refused at once without comparing the password
    answered, refused, retry = 0, 0, None
    t0 = time.time()
    for k in range(30):
        code, headers = _post_login(s, f"guess-{k:04d}")
        if code == 429:
            refused += 1
            retry = int(headers["Retry-After"])
        else:
            assert code in (302, 303) and "error" in headers.get("Location", "")
            answered += 1
    took = time.time() - t0
    assert answered <= 4 + int(took), (answered, took)   # 3 free + one per second of waiting at most
    assert refused >= 30 - answered and retry >= 1
    # even the right password is not looked at while locked out
    code, _ = _post_login(s, PASSWORD)
    assert code == 429
    # meanwhile the server answers everybody else at once (nothing sleeps on its event loop)
    t1 = time.time()
    status, _, body = _get(s.url + "login")
    assert status == 200 and "password" in body and time.time() - t1 < 5
    # after the wait the right password gets in
    deadline = time.time() + 400
    while time.time() < deadline:
        code, headers = _post_login(s, PASSWORD)
        if code != 429:
            break
        time.sleep(int(headers["Retry-After"]))
    assert code in (302, 303) and "error" not in headers.get("Location", "")


def test_cookies_are_strict_http_only_and_kept_out_of_the_page(shared):
    s = shared
    jar = CookieJar()
    opener = urllib.request.build_opener(urllib.request.HTTPCookieProcessor(jar), NoRedirect)
    status, headers, _ = _get(s.url + "login?next=/", opener)
    set_cookies = headers.get_all("Set-Cookie") or []
    code, headers = _post_login(s, PASSWORD, opener)
    assert code in (302, 303), "signed in (the throttle test ends with a success)"
    set_cookies += headers.get_all("Set-Cookie") or []
    names = {c.split("=", 1)[0] for c in set_cookies}
    assert {"user", "next_url"} <= names
    for c in set_cookies:
        flags = [f.strip().lower() for f in c.split(";")[1:]]
        assert "httponly" in flags and "samesite=strict" in flags, c
    user = next(c.value for c in jar if c.name == "user")
    status, _, page = _get(s.url, opener)
    assert status == 200 and "swarmaudit" in page
    # the session token written into the page carries no cookie and no Cookie header
    from bokeh.util.token import get_token_payload
    token = re.search(r'"token":\s*"([^"]+)"', page).group(1)
    payload = get_token_payload(token)
    assert payload.get("cookies") == {}
    assert "Cookie" not in payload.get("headers", {})
    assert user not in page and user not in json.dumps(payload)


@pytest.mark.parametrize("host", ["evil.example", "127.0.0.1.evil.example"])
def test_foreign_host_header_is_refused(shared, plain, host):
    for s in (shared, plain):
        req = urllib.request.Request(s.url + "login", headers={"Host": f"{host}:{s.port}"})
        status, _, body = _get(req)
        assert status == 421 and "host name" in body
    # the server's own names still work
    assert _get(plain.url)[0] == 200
    assert _get(f"http://localhost:{plain.port}/")[0] == 200
