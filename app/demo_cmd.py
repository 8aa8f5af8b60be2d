"""``swarmaudit demo``: write the demo runs, say where, and serve them."""

from __future__ import annotations

from ..demo_data.generate import DESCRIPTIONS, write_demo_runs


def demo_command(args) -> int:
    """Write the runs, list them, serve them unless ``--no-serve``."""
    paths = write_demo_runs(args.out, particles=getattr(args, "particles", None),
                            snapshots=getattr(args, "snapshots", None),
                            force=bool(getattr(args, "force", False)))
    print("demo runs:")
    for name, path in paths.items():
        print(f"  {path}  ({DESCRIPTIONS[name]})")
    if getattr(args, "no_serve", False):
        return 0
    from .serve import serve_runs
    return serve_runs(list(paths.values()), args)
