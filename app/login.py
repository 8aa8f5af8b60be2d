"""The ``--share`` sign-in: one shared password, throttled per client, cookies kept from scripts.

- A client address gets ``FREE_TRIES`` wrong passwords; after that each further wrong one
  locks it out for twice as long as the last (1 s, 2 s, 4 s ... up to ``MAX_WAIT``). An attempt
  while locked out is answered at once with 429 and its password is not even compared, so
  neither a patient nor a parallel guesser gets more tries, and no request ever waits on the
  event loop (other clients are served meanwhile).
- The password is compared in constant time (``hmac.compare_digest``).
- The cookies the sign-in sets are ``HttpOnly`` and ``SameSite=Strict``; the server leaves every
  cookie (and the ``Cookie`` header) out of the session token it writes into the page, so no
  script on the page can read them.
- Requests naming a host that is not one of this server's own names get a plain 421.
"""

from __future__ import annotations

import hmac
import math
import threading
import time
from collections import OrderedDict

#: wrong passwords a client may send before it has to wait
FREE_TRIES = 3
#: the first wait after them (seconds); each further failure doubles it
FIRST_WAIT = 1.0
#: the longest wait
MAX_WAIT = 300.0
#: a client quiet this long starts afresh
FORGET_SECONDS = 3600.0
#: clients remembered at most (the oldest is forgotten first)
MAX_CLIENTS = 10_000

#: the name every colleague signs in under (one shared password, no accounts)
USER = "colleague"
#: cookie options of everything the sign-in sets
COOKIE_FLAGS = {"httponly": True, "samesite": "Strict"}
#: what the server keeps out of the session token it writes into each page
TOKEN_EXCLUDES = {"include_cookies": [], "exclude_headers": ["Cookie", "Authorization"]}


class Throttle:
    """Failed sign-ins per client: how long each must wait before its next try."""

    def __init__(self, free: int = FREE_TRIES, first: float = FIRST_WAIT, cap: float = MAX_WAIT,
                 forget: float = FORGET_SECONDS, clients: int = MAX_CLIENTS, clock=time.monotonic):
        self.free, self.first, self.cap, self.forget, self.clients = free, first, cap, forget, clients
        self.clock = clock
        self._seen: OrderedDict[str, tuple[int, float, float]] = OrderedDict()  # failures, until, last
        self._lock = threading.Lock()

    def wait(self, client: str) -> float:
        """Seconds ``client`` must still wait before a try is looked at (0: it may try now)."""
        now = self.clock()
        with self._lock:
            got = self._seen.get(client)
            if got is None:
                return 0.0
            failures, until, last = got
            if now - last > self.forget:
                del self._seen[client]
                return 0.0
            return max(until - now, 0.0)

    def failed(self, client: str) -> float:
        """Count a wrong password; the wait it earns (0 while the free tries last)."""
        now = self.clock()
        with self._lock:
            failures, _, last = self._seen.pop(client, (0, 0.0, now))
            if now - last > self.forget:
                failures = 0
            failures += 1
            over = failures - self.free
            wait = 0.0 if over <= 0 else min(self.first * 2.0 ** (over - 1), self.cap)
            self._seen[client] = (failures, now + wait, now)
            while len(self._seen) > self.clients:
                self._seen.popitem(last=False)
            return wait

    def succeeded(self, client: str) -> None:
        with self._lock:
            self._seen.pop(client, None)


def same_password(given: str, password: str) -> bool:
    """Constant-time comparison (no early exit a timing could reveal)."""
    return hmac.compare_digest(given.encode("utf-8", "surrogatepass"),
                               password.encode("utf-8", "surrogatepass"))


def auth_provider(password: str, template: str | None, throttle: Throttle | None = None):
    """A panel auth provider serving our sign-in page with the protections above."""
    from panel.auth import BasicAuthProvider, BasicLoginHandler, _validate_next_url
    from panel.io.state import state
    throttle = throttle or Throttle()

    class SignIn(BasicLoginHandler):
        def _page(self, message: str):
            self.write(self._login_template.render(login_endpoint=self._login_endpoint,
                                                   errormessage=message, PANEL_CDN=""))

        def get(self):
            next_url = _validate_next_url(self.get_argument("next", state.base_url))
            if next_url:
                self.set_cookie("next_url", next_url, path="/", **COOKIE_FLAGS)
            self._page(self.get_argument("error", ""))

        def post(self):
            client = self.request.remote_ip or "?"
            wait = throttle.wait(client)
            if wait > 0:
                seconds = max(int(math.ceil(wait)), 1)
                self.set_status(429)
                self.set_header("Retry-After", str(seconds))
                self._page(f"Too many wrong passwords from your address: try again in {seconds} s.")
                return
            if same_password(self.get_argument("password", ""), password):
                throttle.succeeded(client)
                self.set_current_user(USER)
                self.redirect(_validate_next_url(self.get_cookie("next_url", state.base_url)) or "/")
                return
            throttle.failed(client)
            from tornado.escape import url_escape
            self.redirect(f"{self.request.path}?error=" + url_escape("Wrong password."))

        def set_current_user(self, user):
            from panel.config import config
            self.set_secure_cookie("user", user, expires_days=config.oauth_expiry,
                                   path=config.cookie_path, **COOKIE_FLAGS)

    class Provider(BasicAuthProvider):
        @property
        def login_handler(self):
            SignIn._login_endpoint = self._login_endpoint
            SignIn._login_template = self._login_template
            return SignIn

    return Provider(login_template=template)


def refuse_foreign_hosts(tornado_app, names) -> None:
    """Answer 421 to any request whose Host is not one of ``names`` (DNS rebinding, stray proxies)."""
    from tornado.routing import Matcher, Rule
    from tornado.web import RequestHandler
    allowed = {n.lower() for n in names}

    class Foreign(Matcher):
        def match(self, request):
            return None if request.host_name in allowed else {}

    class Refuse(RequestHandler):
        def prepare(self):
            self.set_status(421)
            self.set_header("Content-Type", "text/plain; charset=utf-8")
            self.finish("This server does not answer to that host name.\n")

    tornado_app.default_router.rules.insert(0, Rule(Foreign(), Refuse))
