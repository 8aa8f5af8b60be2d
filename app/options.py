"""The options every command shares (run, layout, columns) and turning them into a context."""

from __future__ import annotations

import argparse
import os
import sys

from ..core.context import AuditContext
from ..core.errors import OptionError
from ..core.layout import regular_layout
from ..core.roles import AXES, RoleMap
from ..core.run import parse_step_rule


def _numbers(value, kind, what: str):
    """Comma-separated numbers (``"0,1,0,1"``, as typed) or a sequence of numbers (from Python)."""
    text = value if isinstance(value, str) else ",".join(str(v) for v in _sequence(value, what))
    try:
        vals = [kind(v) for v in text.replace(" ", "").split(",") if v != ""]
    except ValueError:
        raise OptionError(f"{what} takes comma-separated numbers, got '{text}'") from None
    if not vals:
        raise OptionError(f"{what} takes comma-separated numbers, got '{text}'")
    return vals


def _sequence(value, what: str) -> list:
    if isinstance(value, (str, bytes)) or not hasattr(value, "__iter__"):
        raise OptionError(f"{what} takes comma-separated values or a list, got '{value}'")
    return list(value)


def _names(value, what: str) -> list[str]:
    """Comma-separated names (``"x,y"``) or a sequence of names; empty entries dropped."""
    if value is None:
        return []
    items = value.split(",") if isinstance(value, str) else [str(v) for v in _sequence(value, what)]
    return [v.strip() for v in items if v.strip()]


def add_run_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("run", nargs="+", metavar="RUN",
                   help="a folder of snapshots, a glob, or snapshot files (a sub-folder of per-rank "
                        "files is one snapshot); serve takes several run folders")
    p.add_argument("--steps-per-snapshot", metavar="K|index|names",
                   help="when the files store no step: K steps between snapshots, 'index' to count "
                        "snapshots, or 'names' (the default) for the integer in each file name")
    g = p.add_argument_group("layout")
    g.add_argument("--domain", metavar="XLO,XHI,YLO,YHI[,ZLO,ZHI]", help="physical bounds of the domain")
    g.add_argument("--cells", metavar="NX,NY[,NZ]", help="level-0 cells per axis")
    g.add_argument("--blocks", metavar="BX,BY[,BZ]", help="blocks per axis of a regular decomposition")
    g.add_argument("--ranks", type=int, default=1, metavar="N",
                   help="ranks the regular blocks are dealt to, in block order (default 1)")
    g.add_argument("--layout", metavar="FILE", help="blocks from a CSV or from the 'blocks' group of an HDF5 file")
    g.add_argument("--periodic", metavar="AXES", default="", help="periodic axes, e.g. x,y")
    c = p.add_argument_group("columns")
    c.add_argument("--roles", "--map", dest="roles_file", metavar="FILE.toml",
                   help="a roles file: which column plays which role, in TOML ([roles] x = \"pos0\"); "
                        "--map is its old name, still accepted in this release")
    c.add_argument("--role", action="append", default=[], metavar="ROLE=NAME",
                   help="say which column plays a role, e.g. --role weight=macro_w (repeatable)")
    c.add_argument("--id", metavar="COLS", help="columns that together identify a particle, e.g. id,cpu")
    c.add_argument("--species", metavar="NAMES", help="only these species (comma-separated)")
    e = p.add_argument_group("engine")
    e.add_argument("--engine", choices=("auto", "memory", "dask"), default="auto",
                   help="memory: numpy in this process; dask: partitioned frames (auto picks by size)")
    e.add_argument("--scheduler", metavar="ADDRESS", help="a running dask.distributed scheduler to use")
    e.add_argument("--no-cache", action="store_true",
                   help="compute every total and census afresh (default: reuse those kept in "
                        "$SWARMAUDIT_CACHE or ~/.cache/swarmaudit for unchanged files)")


def layout_from_options(args):
    periodic = tuple(a.lower() for a in _names(args.periodic, "--periodic"))
    bad = [a for a in periodic if a not in AXES]
    if bad:
        raise OptionError(f"--periodic takes axis names x, y, z; got '{', '.join(bad)}'")
    if args.layout:
        if args.domain or args.blocks:
            raise OptionError("give either --layout or --domain/--blocks, not both")
        from ..readers.layout_files import read_layout
        lay = read_layout(args.layout)
        if periodic:
            lay.periodic = tuple(a in periodic for a in lay.axes)
        return lay
    if args.domain:
        dom = _numbers(args.domain, float, "--domain")
        d = len(dom) // 2
        blocks = _numbers(args.blocks, int, "--blocks") if args.blocks else [1] * d
        cells = _numbers(args.cells, int, "--cells") if args.cells else None
        if cells is None:
            raise OptionError("--domain needs --cells too (level-0 cells per axis)")
        lay = regular_layout(dom, cells, blocks, periodic, ranks=args.ranks)
        lay.validate()
        return lay
    if args.cells or args.blocks:
        raise OptionError("--cells and --blocks need --domain as well")
    return None


#: every option a run is opened with: its argparse name and default. The command line and
#: ``swarmaudit.open_run(path, **options)`` both reach :func:`context_from_options` with these.
RUN_OPTIONS = {
    "domain": None, "cells": None, "blocks": None, "ranks": 1, "layout": None, "periodic": "",
    "roles_file": None, "role": (), "id": None, "species": None,
    "engine": "auto", "scheduler": None, "no_cache": False, "relativistic": False, "c": None,
    "steps_per_snapshot": None,
}


def _option_values(args, keywords: dict):
    """One namespace of run options from an argparse namespace and/or keywords.

    Keywords use the option names without dashes (``domain=``, ``no_cache=``);
    values may be the text typed on the command line or Python values
    (sequences for lists, a dict for ``roles``). An unknown keyword is an
    OptionError naming the options there are.
    """
    from types import SimpleNamespace
    values = dict(RUN_OPTIONS)
    if args is not None:
        given = vars(args)
        values.update({k: given[k] for k in RUN_OPTIONS if k in given})
        values["run"] = given.get("run")
    keywords = dict(keywords)
    # roles=FILE.toml is --roles FILE.toml (map= its old name, as --map); roles={ROLE: NAME}
    # says in Python what the file's [roles] table says, as --role ROLE=NAME does
    roles = keywords.pop("roles", None)
    if "map" in keywords:
        keywords.setdefault("roles_file", keywords.pop("map"))
    if isinstance(roles, (str, os.PathLike)):
        keywords.setdefault("roles_file", os.fspath(roles))
        roles = None
    unknown = [k for k in keywords if k not in RUN_OPTIONS and k != "run"]
    if unknown:
        raise OptionError(f"no run option called {', '.join(repr(k) for k in unknown)}; "
                          f"options are: roles, {', '.join(k for k in RUN_OPTIONS)}")
    values.update(keywords)
    run = values.get("run")
    if run is None or (not isinstance(run, (str, bytes)) and not hasattr(run, "__iter__")
                       and not hasattr(run, "__fspath__")):
        raise OptionError("a run is a folder, a glob or a list of snapshot files; none was given")
    if isinstance(run, (str, bytes)) or hasattr(run, "__fspath__"):
        run = [run]
    values["run"] = [os.fspath(r) for r in run]
    if not values["run"]:
        raise OptionError("a run is a folder, a glob or a list of snapshot files; none was given")
    ranks = values["ranks"]
    if isinstance(ranks, bool) or not isinstance(ranks, (int, str)) or not str(ranks).strip().isdigit() \
            or int(ranks) < 1:
        raise OptionError(f"--ranks takes a whole number of at least 1, got '{ranks}'")
    values["ranks"] = int(ranks)
    c = values["c"]
    if c is not None:
        try:
            c = float(c)
        except (TypeError, ValueError):
            c = float("nan")
        if not (0 < c < float("inf")):
            raise OptionError(f"--c takes a positive number, got '{values['c']}'")
        values["c"] = c
    values["steps_per_snapshot"] = parse_step_rule(values["steps_per_snapshot"])
    if values["engine"] not in ("auto", "memory", "dask"):
        raise OptionError(f"--engine takes one of auto, memory, dask, got '{values['engine']}'")
    # --role ROLE=NAME (repeatable), roles={ROLE: NAME} and roles=["ROLE=NAME"] say the same
    role = [values["role"]] if isinstance(values["role"], str) else list(values["role"] or ())
    if isinstance(roles, dict):
        role += [f"{r}={n if isinstance(n, str) else ','.join(map(str, n))}" for r, n in roles.items()]
    elif roles is not None:
        role += list(roles)
    values["role"] = role
    if values["id"] is not None and not isinstance(values["id"], str):
        values["id"] = ",".join(_names(values["id"], "--id"))
    if values["species"] is not None:
        values["species"] = ",".join(_names(values["species"], "--species")) or None
    return SimpleNamespace(**values)


def context_from_options(args=None, follow: bool = True, on_open=None, **keywords) -> AuditContext:
    """The AuditContext of a command's run options: the one place options become a context.

    ``args`` is an argparse namespace (the CLI); ``keywords`` are the same
    options by name (``swarmaudit.open_run``). Bad values raise the
    OptionError/InputError the command line prints. ``on_open(k, total, ref, snapshot)``
    hears of each snapshot as the run is opened (``readers.discover.open_run``).
    """
    from ..engine.scan import scan_map_for
    from ..readers.discover import open_run, split_runs
    opts = _option_values(args, keywords)
    runs = split_runs(opts.run)
    if len(runs) > 1:
        raise OptionError(f"{', '.join(runs)} are {len(runs)} run folders, and this command "
                          "takes one run (swarmaudit serve shows several)")
    role_map = RoleMap.from_options(opts.role, opts.roles_file, opts.id)
    fixed = layout_from_options(opts)
    run = open_run(runs[0], role_map, follow=follow, scan_map=scan_map_for(opts.scheduler, opts.engine),
                   on_open=on_open)
    species = [s.strip() for s in opts.species.split(",")] if opts.species else None
    ctx = AuditContext(run, fixed, species=species, engine=opts.engine, scheduler=opts.scheduler,
                       relativistic=bool(opts.relativistic), c=opts.c,
                       use_cache=not opts.no_cache, steps_per_snapshot=opts.steps_per_snapshot)
    ctx.notes.extend(run.skipped)
    check_role_columns(role_map, run)
    # images follow the same engine as the tables; the drawing engine starts at the defaults, so
    # a command that keeps them need not import it (it brings pandas and dask: a third of a second)
    drawing = sys.modules.get(__name__.rsplit(".", 2)[0] + ".engine.dask_backend")
    if drawing is not None or ctx.engine != "auto" or ctx.scheduler:
        from ..engine.dask_backend import configure, connect_scheduler
        connect_scheduler(ctx)                 # an unreachable --scheduler stops here, with one line
        configure(ctx.engine, ctx.scheduler)
    return ctx


def contexts_from_options(args, follow: bool = True) -> list[AuditContext]:
    """A context per run named: each folder given is a run of its own, files or a glob one run."""
    from ..readers.discover import split_runs
    return [context_from_options(args, follow, run=spec) for spec in split_runs(args.run)]


def check_role_columns(role_map: RoleMap, run) -> None:
    """A role or key the user named must point at a column some species of the run has."""
    first = run[0]
    columns = {c for f in first.species.values() for c in f.columns}
    named = [(f"--role {r}={c}", c) for r, c in role_map.overrides.items()]
    named += [(f"--id {','.join(role_map.key)}", c) for c in (role_map.key or ())]
    for what, col in named:
        if col not in columns:
            raise OptionError(f"{what}: no species of {first.path} has a column '{col}'; "
                              f"columns are: {', '.join(sorted(columns))}")
