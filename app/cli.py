"""The ``swarmaudit`` command: inspect, export, check, serve, demo."""

from __future__ import annotations

import argparse
import os
import re
import sys

from ..core import interrupt
from ..core.errors import SwarmAuditError
from .view_policy import DEFAULT_CMAP, DEFAULT_SCALING   # plain constants, no numpy

# .options and everything below it (numpy, pandas...) are imported inside main, after the
# SIGINT handler is in place: a Ctrl-C while they load is then an interrupt, not a traceback


class _Parser(argparse.ArgumentParser):
    """argparse, taking ``-15,15,-15,15`` and ``-1e-3`` as values, not as options.

    argparse treats a word starting with '-' as an option unless it is a plain
    negative number (``-15``), so ``--domain -15,15,-15,15`` (a domain centred on
    zero, the common case) failed with "expected one argument". No option of
    ours starts with '-' and a digit, so a word that does is always a value.
    The pattern is argparse's own (undocumented) attribute; sub-commands are
    built from this class too.
    """

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._negative_number_matcher = re.compile(r"^-\.?\d")


def _positive_float(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"takes a positive number, got '{text}'") from None
    if not (v > 0) or v == float("inf"):
        raise argparse.ArgumentTypeError(f"takes a positive number, got '{text}'")
    return v


def _physics_options(p):
    g = p.add_argument_group("physics")
    g.add_argument("--relativistic", action="store_true",
                   help="relativistic totals: momentum Σ w γ m v from velocities, kinetic energy "
                        "Σ w (γ-1) m c² from velocity, γv or momentum columns")
    g.add_argument("--c", type=_positive_float, metavar="C",
                   help="speed of light in the run's units (default: SI, 299792458 m/s)")


def build_parser() -> argparse.ArgumentParser:
    from .options import add_run_options
    p = _Parser(prog="swarmaudit",
                description="Audit the particle dumps of a block-structured particle run.")
    p.add_argument("--debug", action="store_true", help="show tracebacks of internal errors")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    q = sub.add_parser("inspect", help="what is in a run: snapshots, species, columns and roles, layout")
    add_run_options(q)
    q.add_argument("--json", action="store_true", help="machine-readable output")
    q.add_argument("--health", choices=("auto", "all", "none"), default="auto",
                   help="which snapshots to read for NaN/outside/duplicate-id counts "
                        "(auto: all unless the run is very large)")

    e = sub.add_parser("export", help="figures (PNG), tables (CSV) and report.html, headless")
    add_run_options(e)
    _physics_options(e)
    e.add_argument("--out", required=True, metavar="DIR", help="folder to write into (created)")
    e.add_argument("--snapshots", default="first,last", metavar="WHICH",
                   help="snapshots to draw: first,last (default), all, or positions like 0,5,-1")
    e.add_argument("--rtol", type=_positive_float, metavar="X",
                   help="also gate like 'check': exit 1 when a total leaves this band")
    e.add_argument("--width", type=int, default=900, help="figure width in pixels (default 900)")
    e.add_argument("--height", type=int, default=700, help="figure height in pixels (default 700)")
    e.add_argument("--dpi", type=int, default=100, help="dots per inch of the PNGs (default 100)")
    e.add_argument("--cmap", default=DEFAULT_CMAP, help=f"colour map name (default {DEFAULT_CMAP})")
    e.add_argument("--scale", choices=("linear", "log", "eq_hist"), default=DEFAULT_SCALING,
                   help=f"colour scaling of density images (default {DEFAULT_SCALING})")
    e.add_argument("--view", metavar="LINK",
                   help="a dashboard link (or its query): also draw the two views of that state, "
                        "as the screen shows them")
    e.add_argument("--reference", metavar="RUN",
                   help="the run a --view link compares with (its reference): the link's views then "
                        "show the reference or the difference as the screen does; the run options "
                        "apply to it too")
    e.add_argument("--space", metavar="A,B", help="columns of the spatial view (default: first two position axes)")
    e.add_argument("--phase", metavar="A,B", help="columns of the phase-space view (default: x against its momentum)")
    e.add_argument("--range", action="append", default=[], metavar="COL=LO,HI",
                   help="axis range of a column in the views (repeatable)")
    e.add_argument("--quiet", action="store_true", help="no progress bar")
    e.add_argument("--movie", nargs="?", const="mp4", choices=("mp4", "gif", "webp"), metavar="FORMAT",
                   help="also a movie of each view over every snapshot (mp4 unless gif or webp is "
                        "named), embedded in report.html")

    c = sub.add_parser("check", help="gate: exit 1 when a conserved total drifts past --rtol")
    add_run_options(c)
    _physics_options(c)
    c.add_argument("--rtol", type=_positive_float, required=True, metavar="X",
                   help="largest relative drift allowed against the first snapshot")
    c.add_argument("--quantities", metavar="NAMES",
                   help="only these totals (e.g. count,charge,total_energy); default every one")
    c.add_argument("--allow-empty", action="store_true",
                   help="a snapshot with no particles is not bad input (default: exit 2 on one)")

    s = sub.add_parser("serve", help="the dashboard in a browser")
    add_run_options(s)
    _physics_options(s)
    _serve_options(s)

    m = sub.add_parser("movie", help="a movie of the space or phase-space view over the run, "
                                     "one colour scale for every frame (.mp4, .gif, .webp)")
    add_run_options(m)
    from .movie import add_movie_options
    add_movie_options(m)

    from .compare_cmd import add_compare_parser
    add_compare_parser(sub, _physics_options, _positive_float)

    d = sub.add_parser("demo", help="write the demo runs and serve them")
    d.add_argument("--out", default="swarmaudit-demo", metavar="DIR", help="where to write (default ./swarmaudit-demo)")
    d.add_argument("--particles", type=int, default=None, metavar="N",
                   help="particles of the main run (default 250000; millions for scale tests)")
    d.add_argument("--snapshots", type=int, default=None, metavar="K", help="snapshots of the main run (default 40)")
    d.add_argument("--no-serve", action="store_true", help="only write the runs")
    d.add_argument("--force", action="store_true", help="write again even if the runs are there")
    _serve_options(d)
    return p


def _serve_options(p):
    p.add_argument("--port", type=int, default=5006, help="port (default 5006; 0 picks a free one)")
    p.add_argument("--share", action="store_true",
                   help="listen on the network too, behind a password printed at start")
    p.add_argument("--password", help="password for --share (default: a generated one)")
    p.add_argument("--no-browser", action="store_true", help="do not open a browser")


def main(argv=None) -> int:
    restore = interrupt.install()
    try:
        return _main(argv)
    except KeyboardInterrupt:       # while the parser or its imports were being built
        return _interrupted()
    finally:
        restore()


def _main(argv) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        code = _dispatch(args)
        interrupt.check()     # an interrupt Python dropped on the way still ends the command as one
        return code
    except SwarmAuditError as exc:
        if interrupt.requested():
            return _interrupted()
        print(f"swarmaudit: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return _interrupted()
    except BrokenPipeError:
        return 0
    except Exception as exc:  # a bug, not the user's fault: one line unless asked
        if interrupt.requested():     # a piece cut short by the interrupt, not a bug
            return _interrupted()
        if args.debug or os.environ.get("SWARMAUDIT_DEBUG"):
            raise
        print(f"swarmaudit: internal error: {type(exc).__name__}: {exc} "
              "(run again with --debug for details)", file=sys.stderr)
        return 3


def _interrupted() -> int:
    print("swarmaudit: interrupted", file=sys.stderr)
    return 130


def _dispatch(args) -> int:
    if args.command == "demo":
        from .demo_cmd import demo_command
        return demo_command(args)
    if args.command == "compare":
        from .compare_cmd import run_compare
        return run_compare(args)
    if args.command == "export":
        # the process that draws the figures starts now: its start-up overlaps opening the run
        from .figure_writer import prestart
        prestart()
    from .options import context_from_options
    if args.command == "serve":
        from .options import contexts_from_options
        from .serve import run_serve
        return run_serve(contexts_from_options(args), args)
    if args.command == "inspect":
        from .inspect_cmd import inspect_command
        return inspect_command(args)
    ctx = context_from_options(args)
    if args.command == "export":
        from .export import run_export
        from .movie import write_movie
        return run_export(ctx, args, movie_writer=write_movie)
    if args.command == "check":
        from .check import run_check
        return run_check(ctx, args)
    if args.command == "movie":
        from .movie import run_movie
        return run_movie(ctx, args)
    raise AssertionError(args.command)


if __name__ == "__main__":
    sys.exit(main())
