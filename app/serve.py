"""``swarmaudit serve`` / ``swarmaudit demo``: the dashboard behind a local (or shared) server.

Safety model: the server shows only the runs it was started with. A page
picks a run by *name* from that list; no URL value or widget can name a
file, nothing is unpickled or evaluated. By default it listens on
127.0.0.1 only; ``--share`` listens on every interface, behind a password
(printed at start when not given), with websocket connections accepted only
from this host's own names and addresses.
"""

from __future__ import annotations

import logging
import os
import secrets
import socket
import sys
from urllib.parse import urlencode

from ..core import interrupt
from ..core.context import AuditContext
from ..core.errors import OptionError
from ..core.run import Run
from . import login
from .confine import outside_note
from .state import SCAN_SECONDS, URL_KEYS, ServerState, link_query
from .view_policy import run_name

log = logging.getLogger("swarmaudit.serve")

#: how long a page's session waits for its browser to connect. Bokeh's 15 s is short when many
#: pages load at once on a busy machine: a session dropped before its browser connects is made
#: again on connect without the server's own style sheet addresses, and the page then asks a
#: public CDN for them (missing styles on a machine without internet)
UNUSED_SESSION_MS = 120_000
#: how often each page looks for a rescan (the folders are listed at most every SCAN_SECONDS)
FOLLOW_SECONDS = SCAN_SECONDS

_ASSETS = os.path.join(os.path.dirname(__file__), "assets")


def confine(ctx: AuditContext, roots: list[str]) -> list[str]:
    """Leave out snapshots whose files resolve outside the run folders given.

    A symlink inside a run folder that points elsewhere would otherwise let
    the server read (and draw) a file its user never named. Returns notes.
    (A live run's rescans apply the same rule to snapshots that appear later.)
    """
    run = ctx.run
    keep, notes = [], []
    for i, ref in enumerate(run.refs):
        note = outside_note(ref, roots)
        if note is None:
            keep.append(i)
        else:
            notes.append(note)
    if len(keep) == len(run.refs):
        return []
    if not keep:
        raise OptionError("every snapshot of the run points outside its folder; nothing to serve")
    new = Run([run.refs[i] for i in keep], run.opener, run.role_map, run.source,
              list(run.skipped) + notes, spec=run.spec, follow=run.follow, sidecar=run.sidecar)
    for j, i in enumerate(keep):
        if i in run._open:
            new._open[j] = run._open[i]
    ctx.run = new
    ctx.notes.extend(notes)
    return notes


def _free_port(address: str) -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((address, 0))
        return s.getsockname()[1]


def host_names() -> list[str]:
    """Names and addresses this host answers to (what a colleague's browser may call it)."""
    names = {"localhost", "127.0.0.1"}
    try:
        names.add(socket.gethostname())
        names.add(socket.getfqdn())
    except OSError:
        pass
    try:
        import psutil
        for addrs in psutil.net_if_addrs().values():
            for a in addrs:
                if a.family == socket.AF_INET:
                    names.add(a.address)
    except Exception:   # psutil missing or no permission: the names above still work
        pass
    try:
        for info in socket.getaddrinfo(socket.gethostname(), None, socket.AF_INET):
            names.add(info[4][0])
    except OSError:
        pass
    return sorted(n for n in names if n)


def _session_page(server: ServerState):
    """The panel app of one browser session; never a traceback on the page."""
    try:
        return _build_session_page(server)
    except Exception as exc:     # the page says it failed; the server log gets one line
        log.error("page could not be built: %s: %s", type(exc).__name__, exc)
        import panel as pn
        return pn.pane.Alert("This page could not be built; the server's log says why. "
                             "Open the address without its query to get the default view.",
                             alert_type="danger")


def _take_query() -> dict[str, str]:
    """The query of this session's request, taken off the request before anything parses it.

    Panel's location object converts every digit string of the address into
    an int, and an int of more than 4,300 digits is an error that would fail
    the page with HTTP 500. So the query is read here as strings (over-long
    values capped, refused later with a note) and the request keeps only its
    path; the page writes its own, validated query into the address.
    """
    import panel as pn
    doc = pn.state.curdoc
    ctx = getattr(doc, "session_context", None) if doc is not None else None
    request = getattr(getattr(ctx, "request", None), "_request", None)
    uri = getattr(request, "uri", None)
    if not isinstance(uri, str):
        loc = pn.state.location
        return link_query(loc.search if loc is not None else "")
    path, _, search = uri.partition("?")
    try:
        request.uri = path
    except AttributeError:           # a request that cannot be changed: nothing parsed it yet
        pass
    return link_query(search)


def _build_session_page(server: ServerState):
    import panel as pn

    from .dashboard import build_page
    # the table widget's script must be on the page from the start: a table that arrives later
    # (a side panel's result filled in after the page opened) could not be drawn otherwise
    pn.extension("tabulator")
    query = _take_query()
    loc = pn.state.location
    base = ""
    if loc is not None:
        port = f":{loc.port}" if loc.port else ""
        base = f"{loc.protocol}//{loc.hostname}{port}{loc.pathname}"
    dash, page = build_page(server, query, base)
    # a run still being written: new snapshots join every open page (the scan itself is shared)
    pn.state.add_periodic_callback(dash.follow_run, period=int(1000 * FOLLOW_SECONDS))
    if loc is not None:
        # the state is read from the address once (validated, key by key, above) and then
        # written to it: the address never sets the state again, so a value the state refused
        # cannot come back through the browser's report of its own address
        state = dash.state

        def write_url(*_):
            search = "?" + urlencode(state.query())
            if loc.search != search:
                loc.search = search
        state.param.watch(write_url, list(URL_KEYS))
        write_url()
        # the browser reports its own address once it connects; write ours after that
        pn.state.onload(write_url)
    return page


def _login_template() -> str | None:
    path = os.path.join(_ASSETS, "login.html")
    return path if os.path.isfile(path) else None


def serve_runs(paths_or_contexts, args, *, ready=None, roots=None,
               shared: ServerState | None = None) -> int:
    """Serve several runs (contexts, (name, context) pairs, or run folders) until interrupted.

    ``args`` carries ``port``, ``share``, ``password``, ``no_browser``.
    ``roots``: the folders the given contexts' snapshots must stay inside (run folders
    are their own root).
    ``ready(url)`` is called once the server listens (tests, the demo).
    ``shared``: the state its sessions share (made here when not given; a test passes its own
    to look into it).
    """
    import panel as pn

    from ..core.roles import RoleMap
    shared = shared if shared is not None else ServerState()
    runs = shared.runs
    for item in paths_or_contexts:
        if isinstance(item, AuditContext):
            shared.add(run_name(item), item, roots=roots)
        elif isinstance(item, tuple):      # (name, context) or (name, context, its roots)
            shared.add(item[0], item[1], roots=item[2] if len(item) > 2 else roots)
        else:
            from ..readers.discover import open_run
            ctx = AuditContext(open_run(os.fspath(item), RoleMap()))
            confine(ctx, [os.fspath(item)])
            shared.add(run_name(ctx), ctx, roots=[os.fspath(item)])
    if not len(runs):
        raise OptionError("nothing to serve")

    share = bool(getattr(args, "share", False))
    password = getattr(args, "password", None)
    if password is not None and not share:
        raise OptionError("--password only makes sense with --share")
    if share:
        if password is None:
            password = secrets.token_urlsafe(12)
            generated = True
        else:
            generated = False
            if len(password) < 8:
                raise OptionError("--password needs at least 8 characters")
    address = "0.0.0.0" if share else "127.0.0.1"
    port = int(getattr(args, "port", 5006) or 0)
    if port < 0 or port > 65535:
        raise OptionError("--port takes 0..65535")
    if port == 0:
        port = _free_port(address)
    hosts = host_names() if share else ["127.0.0.1", "localhost"]
    origins = [f"{h}:{port}" for h in hosts]

    kwargs = dict(port=port, address=address, websocket_origin=origins, show=False, start=False,
                  title="swarmaudit", verbose=False, cookie_secret=secrets.token_urlsafe(32),
                  unused_session_lifetime_milliseconds=UNUSED_SESSION_MS, **login.TOKEN_EXCLUDES)
    if share:
        kwargs.update(auth_provider=login.auth_provider(password, _login_template()))
    # the served runs are fixed here, once per server: every session shares them
    app = {"/": lambda: _session_page(shared)}
    try:
        httpd = pn.serve(app, **kwargs)
    except OSError as exc:
        raise OptionError(f"cannot listen on {address}:{port} ({exc.strerror or exc}); "
                          f"try another --port") from None
    login.refuse_foreign_hosts(httpd._tornado, hosts)
    local = f"http://127.0.0.1:{port}/"
    print(f"swarmaudit: serving {', '.join(runs.names)} at {local}", flush=True)
    if share:
        lan = [h for h in hosts if h not in ("127.0.0.1", "localhost")]
        for h in lan[:4]:
            print(f"swarmaudit: on the network: http://{h}:{port}/", flush=True)
        if generated:
            print(f"swarmaudit: password: {password}", flush=True)
        else:
            print("swarmaudit: password: the one given with --password", flush=True)
    for ctx_name in runs.names:
        for note in runs[ctx_name].ctx.notes:
            print(f"swarmaudit: {ctx_name}: {note}", file=sys.stderr, flush=True)
    quiet_closed_pages()
    print("swarmaudit: press Ctrl-C to stop", flush=True)
    # the server library puts its own SIGINT handler in ours' place: Ctrl-C stops the loop and
    # marks the interrupt, so the command ends like every other one (exit 130)
    loop = httpd.io_loop
    interrupt.stop_with(lambda: loop.asyncio_loop.call_soon_threadsafe(loop.stop))
    httpd.start()
    if ready is not None:
        httpd.io_loop.add_callback(ready, local)
    if not getattr(args, "no_browser", False):
        httpd.io_loop.add_callback(lambda: _open_browser(local + ("login" if share else "")))
    try:
        httpd.io_loop.start()
    except KeyboardInterrupt:
        pass
    finally:
        try:
            httpd.stop()
        except Exception:
            pass
    return 0


def _open_browser(url: str) -> None:
    import webbrowser
    try:
        webbrowser.open(url)
    except Exception:   # no browser on this machine: the printed address is enough
        pass


#: where the server library and the event loop report a write to a page that has gone
CLOSED_PAGE_LOGGERS = ("asyncio", "tornado.application", "tornado.general", "tornado.websocket",
                       "bokeh.server.views.ws", "bokeh.server.protocol_handler", "bokeh.server.session",
                       "bokeh.server.tornado", "panel.io.document", "panel")


def _about_a_closed_page(record: logging.LogRecord) -> bool:
    from tornado.iostream import StreamClosedError
    from tornado.websocket import WebSocketClosedError
    exc = record.exc_info[1] if record.exc_info else None
    while exc is not None:
        if isinstance(exc, (WebSocketClosedError, StreamClosedError)):
            return True
        exc = exc.__cause__ or exc.__context__
    text = record.getMessage()
    return any(w in text for w in ("WebSocketClosedError", "StreamClosedError",
                                   "connection was closed", "Stream is closed"))


class _ClosedPageFilter(logging.Filter):
    """A page closed while the server was still sending to it is normal: no traceback, no line."""

    def filter(self, record: logging.LogRecord) -> bool:
        return not _about_a_closed_page(record)


_CLOSED_PAGE_FILTER = _ClosedPageFilter()


def quiet_closed_pages() -> None:
    """Keep the serving terminal free of the tracebacks a closed browser tab leaves behind.

    Closing a tab mid-update makes the pending writes to its websocket fail; the
    libraries log each one (the event loop with a traceback of WebSocketClosedError).
    The filter sits on those loggers and on the root handlers (records that only
    propagate there); every other record passes.
    """
    for name in CLOSED_PAGE_LOGGERS:
        logger = logging.getLogger(name)
        if _CLOSED_PAGE_FILTER not in logger.filters:
            logger.addFilter(_CLOSED_PAGE_FILTER)
    for handler in logging.getLogger().handlers:
        if _CLOSED_PAGE_FILTER not in handler.filters:
            handler.addFilter(_CLOSED_PAGE_FILTER)


def run_serve(contexts, args) -> int:
    """``swarmaudit serve RUN [RUN...]``: one run, or a run per folder named."""
    if isinstance(contexts, AuditContext):
        contexts = [contexts]
    items = []
    for ctx in contexts:
        spec = ctx.run.spec
        named = [spec] if isinstance(spec, (str, os.PathLike)) else list(spec or ())
        roots = [os.fspath(r) for r in named if os.path.isdir(r)]
        confine(ctx, roots)
        # snapshots appearing later (a live run) are confined the same way
        items.append((run_name(ctx), ctx, roots))
    return serve_runs(items, args)
