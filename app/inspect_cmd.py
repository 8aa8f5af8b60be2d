"""``swarmaudit inspect``: what is in a run, told plainly (or as JSON).

On a terminal the table of snapshots is written row by row while the run is
opened (:class:`LiveTable`, with a progress line on stderr), and the rest
after it; elsewhere (a pipe, a file, ``--json``) everything comes at the end,
in the order of the sections below.
"""

from __future__ import annotations

import json
import math
import sys

from ..core.context import AuditContext
from ..core.errors import SwarmAuditError
from ..core.frame import transient_columns
from .progress import Progress


#: particles (summed over the run) up to which inspect checks every snapshot's health
HEALTH_BUDGET = 50_000_000

#: the counts of readers.checks.frame_health that mean something is off, and how to say them
HEALTH_COUNTS = {
    "nonfinite_positions": "particles with a NaN or infinite position",
    "nonfinite_momenta": "particles with a NaN or infinite velocity/momentum",
    "outside_domain": "particles outside the domain",
    "duplicate_keys": "particles whose id repeats another's",
}


def snapshot_info(i: int, ref, s, names) -> dict:
    """What the table says of one snapshot: position, label, files, step, time, particles per
    species (of ``names``), scalars and warnings."""
    return {
        "snapshot": i,
        "label": ref.label,
        "files": len(ref.paths),
        "step": s.step,
        "time": s.time,
        "count": {k: f.length for k, f in s.species.items() if k in names},
        "meta": {k: v for k, v in s.meta.items()},
        "warnings": list(s.warnings),
    }


def describe_snapshots(ctx: AuditContext) -> list[dict]:
    """:func:`snapshot_info` of each snapshot of the run, in run order."""
    run = ctx.run
    names = ctx.species_names()
    return [snapshot_info(i, ref, run[i], names) for i, ref in enumerate(run.refs)]


def describe(ctx: AuditContext, health_snapshots=None, progress=None) -> dict:
    """Everything ``inspect`` prints, as plain data; ``progress(n)``: a bar for the ``n``
    snapshots whose health is checked (:class:`app.progress.Progress`)."""
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
    bar = progress(len(which)) if progress is not None and which else None
    for i in which:
        s = run[i]
        lay = ctx.layout(i)
        frames = [s.species[name] for name in names if name in s.species]
        # one snapshot's columns in memory at a time
        with transient_columns(frames):
            for frame in frames:
                try:
                    h = frame_health(frame, lay)
                except SwarmAuditError as exc:
                    h = {"error": str(exc)}
                health.append({"snapshot": i, "species": frame.species,
                               **{k: _plain(v) for k, v in h.items()}})
        if bar is not None:
            bar.step(run.refs[i].label)
    if bar is not None:
        bar.close()
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


def _table_head(names, meta_keys) -> list[str]:
    return ["#", "snapshot", "step", "time"] + list(names) + list(meta_keys)


def _table_row(s: dict, names, meta_keys) -> list[str]:
    return ([str(s["snapshot"]), s["label"] + (f" ({s['files']} files)" if s["files"] > 1 else ""),
             _fmt(s["step"]), _fmt(s["time"])] + [f"{s['count'].get(n, 0):,}" for n in names]
            + [_fmt(s["meta"].get(k)) for k in meta_keys])


class LiveTable:
    """The table of snapshots written row by row as the run opens (``on_open`` of ``open_run``).

    Its columns are those of the first snapshot to open, its widths those of the first row
    (numbers with room to grow), and the rows come in the order of the snapshots' names.
    :meth:`agrees` says afterwards whether the run's table is the one written; if not (the
    steps order the snapshots otherwise, or a later snapshot brings a species or scalar the first
    lacks) the whole table is written again. A progress line on stderr says how far it is.
    """

    #: room given to a number column beyond its first value
    ROOM = 3

    def __init__(self, out, err, species=None):
        self.out = out
        self.err = err
        self.species = None if not species else {s.strip().strip("/") for s in species}
        self.bar = None
        self.names = self.meta_keys = self.widths = None
        self.labels: list[str] = []

    def _names(self, snap) -> list[str]:
        if self.species is None:
            return list(snap.species)
        return [k for k, f in snap.species.items()
                if k in self.species or (f.long_name or "") in self.species]

    def opened(self, k: int, total: int, ref, snap) -> None:
        if self.bar is None:
            self.bar = Progress(total, "opening", stream=self.err)
        if snap is not None:
            if self.names is None:
                self.names = self._names(snap)
                self.meta_keys = sorted(snap.meta)
            info = snapshot_info(len(self.labels), ref, snap, self.names)
            row = _table_row(info, self.names, self.meta_keys)
            head = _table_head(self.names, self.meta_keys)
            if self.widths is None:
                self.widths = [max(len(h), len(v)) + (self.ROOM if c > 1 else 0)
                               for c, (h, v) in enumerate(zip(head, row))]
                self.widths[0] = max(len("#"), len(str(total - 1)))
                self._write(head)
            self._write(row)
            self.labels.append(ref.label)
        self.bar.step(ref.label)

    def _write(self, cells) -> None:
        self.bar.close()    # the progress line goes, the row takes its place, the line comes back
        print("  ".join(v.ljust(w) for v, w in zip(cells, self.widths)).rstrip(), file=self.out)
        self.out.flush()

    def done(self) -> None:
        if self.bar is not None:
            self.bar.close()

    def agrees(self, snaps, names, meta_keys) -> bool:
        """Whether the rows written are the run's table (same snapshots, order and columns)."""
        return (self.names == list(names) and self.meta_keys == list(meta_keys)
                and self.labels == [s["label"] for s in snaps])


def live_table(out, err, json_output: bool, species=None) -> LiveTable | None:
    """A :class:`LiveTable` when the table goes to a person at a terminal, else None."""
    isatty = getattr(out, "isatty", None)
    if json_output or not (isatty and isatty()):
        return None
    return LiveTable(out, err, None if not species else str(species).split(","))


def inspect_command(args, out=None, err=None) -> int:
    """``swarmaudit inspect``: open the run (rows shown as they come on a terminal), then tell."""
    from .options import context_from_options
    out = out or sys.stdout
    err = err or sys.stderr
    live = live_table(out, err, args.json, getattr(args, "species", None))
    try:
        ctx = context_from_options(args, on_open=live.opened if live is not None else None)
    finally:
        if live is not None:
            live.done()
    return run_inspect(ctx, as_json=args.json, health=args.health, out=out, err=err, live=live)


def run_inspect(ctx: AuditContext, as_json: bool = False, health: str = "auto", out=None, err=None,
                live: LiveTable | None = None) -> int:
    """Print what :func:`describe` finds; ``live``: the table was written already as the run opened."""
    out = out or sys.stdout
    err = err or sys.stderr
    which = None
    if health == "all":
        which = list(range(len(ctx.run)))
    elif health == "none":
        which = []
    info = describe(ctx, which, progress=lambda n: Progress(n, "checking", stream=err))
    if as_json:
        print(json.dumps(info, indent=2, default=_plain), file=out)
        return 0
    snaps = info["snapshots"]
    names = [sp["species"] for sp in info["species"]]
    meta_keys = sorted({k for s in snaps for k in s["meta"]})
    head = _table_head(names, meta_keys)
    rows = [_table_row(s, names, meta_keys) for s in snaps]
    shown = live is not None and live.labels
    if shown:
        if not live.agrees(snaps, names, meta_keys):
            print("\nthe run in its own order (by step) and with every species and scalar:", file=out)
            shown = False
        print(file=out)
    total = [sum(s["count"].values()) for s in snaps]
    print(f"run        {info['run']}", file=out)
    print(f"snapshots  {len(snaps)}   particles {min(total):,} .. {max(total):,} per snapshot", file=out)
    lay = info["layout"]
    per = ",".join(lay["periodic"]) or "none"
    dom = " x ".join(f"[{lo:g}, {hi:g})" for lo, hi in zip(lay["domain_lower"], lay["domain_upper"]))
    print(f"layout     {lay['ndim']}-D {dom}, cells {'x'.join(map(str, lay['cells']))}, "
          f"{lay['blocks']} blocks on levels {','.join(map(str, lay['levels']))}, {lay['ranks']} ranks, "
          f"periodic {per}  (from {lay['source']})", file=out)
    print(file=out)
    print("species", file=out)
    for sp in info["species"]:
        attrs = ", ".join(f"{k}={_fmt(v)}" for k, v in sp["attrs"].items())
        in_file = f"'{sp['name_in_file']}' in the file, " if sp["name_in_file"] != sp["species"] else ""
        print(f"  {sp['species']}  ({in_file}{sp['ndim']}-D, momentum as {sp['momentum']}"
              f"{', key ' + '+'.join(sp['key']) if sp['key'] else ', no particle key'}"
              f"{', ' + attrs if attrs else ''})", file=out)
        width = max(len(c["name"]) for c in sp["columns"]) if sp["columns"] else 4
        for c in sp["columns"]:
            role = c["role"] or "-"
            unit = f"[{c['unit']}]" if c["unit"] else ""
            guess = "  (guessed from the name)" if c["guessed"] else ""
            print(f"    {c['name']:<{width}}  {role:<7} {unit}{guess}".rstrip(), file=out)

    if not shown:
        print(file=out)
        widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(head)]
        print("  ".join(h.ljust(w) for h, w in zip(head, widths)), file=out)
        for r in rows:
            print("  ".join(v.ljust(w) for v, w in zip(r, widths)), file=out)
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
        print(file=out)
    for p in problems:
        print(f"warning: {p}", file=out)
    for n in notes:
        print(f"note: {n}", file=out)
    return 0
