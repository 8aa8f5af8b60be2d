"""``swarmaudit check``: the CI gate on conserved totals."""

from __future__ import annotations

import sys

from ..audit.tables import check, validate_snapshots
from ..core.errors import InputError, OptionError
from ..core.roles import missing_roles_help

#: totals formed from velocities (or momenta)
VELOCITY_TOTALS = ("momentum_x", "momentum_y", "momentum_z", "kinetic_energy", "total_energy")


def _quantities(text):
    if not text:
        return None
    names = [q.strip() for q in str(text).split(",") if q.strip()]
    if not names:
        raise OptionError(f"--quantities takes comma-separated names, got '{text}'")
    return names


def run_check(ctx, args, out=None, err=None) -> int:
    """Exit 0 when every checked total stays within ``--rtol`` of the first snapshot, 1 when not.

    Bad input raises InputError/OptionError (the CLI turns that into exit 2).
    """
    out = out or sys.stdout
    err = err or sys.stderr
    quantities = _quantities(getattr(args, "quantities", None))
    _say_missing_velocities(ctx, quantities)
    validate_snapshots(ctx, allow_empty=bool(getattr(args, "allow_empty", False)))
    result = check(ctx, args.rtol, quantities)
    for line in result.lines:
        print(line, file=out)
    for note in ctx.notes:
        print(f"note: {note}", file=err)
    return 0 if result.ok else 1


def _say_missing_velocities(ctx, quantities) -> None:
    """No species has a velocity or momentum column: an error when a total needing one was asked
    for, else a note, both naming the columns found and the options that would say which they are."""
    first = ctx.run[0]
    frames = [first.species[n] for n in ctx.species_names() if n in first.species]
    frames = [f for f in frames if f.length > 0]
    if not frames or any(f.momentum_kind() for f in frames):
        return
    f = frames[0]
    problem, hint = missing_roles_help("velocity", f.columns, f.roles.values())
    asked = [q for q in quantities or () if q in VELOCITY_TOTALS]
    if asked:
        raise InputError(first.path, f"--quantities {','.join(asked)} needs particle velocities, but {problem}",
                         hint)
    ctx.notes.append(f"momentum and energy are not checked: {problem}; {hint}")
