"""The options every command shares (run, layout, columns) and turning them into a context."""

from __future__ import annotations

import argparse

from ..core.context import AuditContext
from ..core.errors import OptionError
from ..core.layout import regular_layout
from ..core.roles import AXES, RoleMap


def _numbers(text: str, kind, what: str):
    try:
        vals = [kind(v) for v in text.replace(" ", "").split(",") if v != ""]
    except ValueError:
        raise OptionError(f"{what} takes comma-separated numbers, got '{text}'") from None
    if not vals:
        raise OptionError(f"{what} takes comma-separated numbers, got '{text}'")
    return vals


def add_run_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("run", nargs="+", metavar="RUN",
                   help="a folder of snapshots, a glob, or snapshot files (a sub-folder of per-rank files is one snapshot)")
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
    periodic = tuple(a.strip().lower() for a in (args.periodic or "").split(",") if a.strip())
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


def context_from_options(args, follow: bool = True) -> AuditContext:
    from ..readers.discover import open_run
    role_map = RoleMap.from_options(args.role, args.roles_file, args.id)
    fixed = layout_from_options(args)
    run = open_run(args.run, role_map, follow=follow)
    species = [s.strip() for s in args.species.split(",")] if getattr(args, "species", None) else None
    ctx = AuditContext(run, fixed, species=species, engine=args.engine, scheduler=args.scheduler,
                       relativistic=getattr(args, "relativistic", False), c=getattr(args, "c", None),
                       use_cache=not getattr(args, "no_cache", False))
    ctx.notes.extend(run.skipped)
    check_role_columns(role_map, run)
    from ..engine.dask_backend import configure
    configure(ctx.engine, ctx.scheduler)   # images follow the same engine as the tables
    return ctx


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
