"""``swarmaudit inspect``: what is in a run, told plainly (or as JSON)."""

from __future__ import annotations

import json
import math

from ..core.context import AuditContext
from ..core.errors import SwarmAuditError


#: particles (summed over the run) up to which inspect checks every snapshot's health
HEALTH_BUDGET = 50_000_000

#: the counts of readers.checks.frame_health that mean something is off, and how to say them
HEALTH_COUNTS = {
    "nonfinite_positions": "particles with a NaN or infinite position",
    "nonfinite_momenta": "particles with a NaN or infinite velocity/momentum",
    "outside_domain": "particles outside the domain",
    "duplicate_keys": "particles whose id repeats another's",
}


def describe_snapshots(ctx: AuditContext) -> list[dict]:
    """Position, label, files, step, time, particles per species, scalars and warnings of each snapshot."""
    run = ctx.run
    names = ctx.species_names()
    snaps = []
    for i, ref in enumerate(run.refs):
        s = run[i]
        snaps.append({
            "snapshot": i,
            "label": ref.label,
            "files": len(ref.paths),
            "step": s.step,
            "time": s.time,
            "count": {k: f.length for k, f in s.species.items() if k in names},
            "meta": {k: v for k, v in s.meta.items()},
            "warnings": list(s.warnings),
        })
    return snaps


def describe(ctx: AuditContext, health_snapshots=None) -> dict:
    """Everything ``inspect`` prints, as plain data."""
    run = ctx.run
    names = ctx.species_names()
    snaps = describe_snapshots(ctx)
    first = run[0]
    species = []
    for name in names:
        frame = next((s.species[name] for s in run if name in s.species), None)
        if frame is None:
            continue
        roles = frame.roles
        by_col = {c: r for r, c in roles.items()}
        guessed = frame.guessed_roles
        species.append({
            "species": name,
            "name_in_file": frame.long_name or name,
            "attrs": {k: _plain(v) for k, v in frame.attrs.items()},
            "columns": [{"name": c, "role": by_col.get(c, ""), "unit": frame.unit(c),
                         "guessed": by_col.get(c) in guessed} for c in frame.columns],
            "key": list(frame.key_columns() or []),
            "momentum": {"v": "velocity", "u": "momentum per unit mass (γv)", "p": "momentum"}.get(
                frame.momentum_kind() or "", "none"),
            "ndim": frame.ndim,
        })
        said = [f"{c['role']}={c['name']}" for c in species[-1]["columns"] if c["guessed"]]
        if said:
            ctx.notes.append(f"species {name}: roles guessed from column names ({', '.join(said)}); "
                             "if one is wrong, say which column it is with --role ROLE=NAME or a "
                             "roles file (--roles FILE.toml)")
    layout = ctx.layout(0)
    health = []
    which = health_snapshots
    if which is None:
        # the health counts read positions and ids; past a budget only the ends are read
        total = sum(sum(f.length for f in s.species.values()) for s in run)
        which = list(range(len(run))) if total <= HEALTH_BUDGET else sorted({0, len(run) - 1})
        if len(which) < len(run):
            ctx.notes.append(f"data health checked on the first and last snapshot only "
                             f"({total:,} particles in the run; use --health all to check every one)")
    from ..readers.checks import frame_health
    for i in which:
        s = run[i]
        lay = ctx.layout(i)
        for name in names:
            if name not in s.species:
                continue
            try:
                h = frame_health(s.species[name], lay)
            except SwarmAuditError as exc:
                h = {"error": str(exc)}
            health.append({"snapshot": i, "species": name, **{k: _plain(v) for k, v in h.items()}})
    missing = [n for n in names if any(n not in s.species for s in run)]
    return {
        "run": run.source,
        "snapshots": snaps,
        "species": species,
        "species_missing_somewhere": missing,
        "layout": layout.summary(),
        "health": health,
        "notes": list(ctx.notes),
        "first_file": first.path,
    }


def _plain(v):
    if hasattr(v, "item"):
        try:
            v = v.item()
        except (ValueError, AttributeError):
            v = v.tolist()
    if isinstance(v, float) and not math.isfinite(v):
        return str(v)
    if isinstance(v, bytes):
        return v.decode(errors="replace")
    return v


def _fmt(v) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v)


def run_inspect(ctx: AuditContext, as_json: bool = False, health: str = "auto") -> int:
    which = None
    if health == "all":
        which = list(range(len(ctx.run)))
    elif health == "none":
        which = []
    info = describe(ctx, which)
    if as_json:
        print(json.dumps(info, indent=2, default=_plain))
        return 0
    snaps = info["snapshots"]
    total = [sum(s["count"].values()) for s in snaps]
    print(f"run        {info['run']}")
    print(f"snapshots  {len(snaps)}   particles {min(total):,} .. {max(total):,} per snapshot")
    lay = info["layout"]
    per = ",".join(lay["periodic"]) or "none"
    dom = " x ".join(f"[{lo:g}, {hi:g})" for lo, hi in zip(lay["domain_lower"], lay["domain_upper"]))
    print(f"layout     {lay['ndim']}-D {dom}, cells {'x'.join(map(str, lay['cells']))}, "
          f"{lay['blocks']} blocks on levels {','.join(map(str, lay['levels']))}, {lay['ranks']} ranks, "
          f"periodic {per}  (from {lay['source']})")
    print()
    print("species")
    for sp in info["species"]:
        attrs = ", ".join(f"{k}={_fmt(v)}" for k, v in sp["attrs"].items())
        in_file = f"'{sp['name_in_file']}' in the file, " if sp["name_in_file"] != sp["species"] else ""
        print(f"  {sp['species']}  ({in_file}{sp['ndim']}-D, momentum as {sp['momentum']}"
              f"{', key ' + '+'.join(sp['key']) if sp['key'] else ', no particle key'}"
              f"{', ' + attrs if attrs else ''})")
        width = max(len(c["name"]) for c in sp["columns"]) if sp["columns"] else 4
        for c in sp["columns"]:
            role = c["role"] or "-"
            unit = f"[{c['unit']}]" if c["unit"] else ""
            guess = "  (guessed from the name)" if c["guessed"] else ""
            print(f"    {c['name']:<{width}}  {role:<7} {unit}{guess}".rstrip())

    print()
    names = [sp["species"] for sp in info["species"]]
    meta_keys = sorted({k for s in snaps for k in s["meta"]})
    head = ["#", "snapshot", "step", "time"] + names + meta_keys
    rows = [[str(s["snapshot"]), s["label"] + (f" ({s['files']} files)" if s["files"] > 1 else ""),
             _fmt(s["step"]), _fmt(s["time"])] + [f"{s['count'].get(n, 0):,}" for n in names]
            + [_fmt(s["meta"].get(k)) for k in meta_keys] for s in snaps]
    widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(head)]
    print("  ".join(h.ljust(w) for h, w in zip(head, widths)))
    for r in rows:
        print("  ".join(v.ljust(w) for v, w in zip(r, widths)))
    problems = []
    for h in info["health"]:
        if h.get("error"):
            problems.append(f"snapshot {h['snapshot']} {h['species']}: {h['error']}")
        for k in HEALTH_COUNTS:
            v = h.get(k)
            if v:
                problems.append(f"snapshot {h['snapshot']} {h['species']}: {v:,} {HEALTH_COUNTS[k]}")
    for s in snaps:
        for w in s["warnings"]:
            problems.append(f"snapshot {s['snapshot']}: {w}")
    if info["species_missing_somewhere"]:
        problems.append("species not in every snapshot: " + ", ".join(info["species_missing_somewhere"]))
    notes = info["notes"]
    if problems or notes:
        print()
    for p in problems:
        print(f"warning: {p}")
    for n in notes:
        print(f"note: {n}")
    return 0
