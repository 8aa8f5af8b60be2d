"""What every command works on: a run, its layout(s) and the user's choices."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .errors import InputError
from .layout import BlockLayout, bounding_layout, nonfinite_rows
from .roles import missing_roles_help
from .run import Run, parse_step_rule


@dataclass
class AuditContext:
    """A run plus how to find the block layout of each snapshot.

    Layout precedence: the command line (``--domain/--cells/--blocks`` or
    ``--layout``), else the snapshot's own ``blocks`` group, else a
    ``layout.csv``/``blocks.csv`` beside the snapshots, else one block around
    the first snapshot's particles with a finite position (with a note).
    """

    run: Run
    fixed_layout: BlockLayout | None = None
    species: list[str] | None = None        # None: every species
    engine: str = "auto"                    # auto | memory | dask
    scheduler: str | None = None
    use_cache: bool = True                  # False (--no-cache): no persistent reduction cache
    relativistic: bool = False
    c: float | None = None                  # speed of light in the run's units (None: SI)
    steps_per_snapshot: int | str | None = None   # --steps-per-snapshot: K, "index" or "names"
    notes: list[str] = field(default_factory=list)
    #: the context's one cache of per-snapshot reductions (``audit.cache.SnapshotCache``, made by
    #: the audit layer on first use; memory backed by the disk cache, one rule for staleness)
    reductions: object | None = field(default=None, repr=False, compare=False)
    _sidecar: BlockLayout | None | bool = field(default=False, repr=False)
    _fallback: BlockLayout | None = field(default=None, repr=False)

    def __post_init__(self):
        rule = parse_step_rule(self.steps_per_snapshot)
        if rule is not None and getattr(self.run, "steps_stored", True):
            self.notes.append(f"--steps-per-snapshot {rule} is not used: every snapshot stores its step")
        elif rule is not None:
            self.run.take_steps(rule)
        note = self.run.steps_note() if hasattr(self.run, "steps_note") else None
        if note:
            self.notes.append(note)

    def species_names(self) -> list[str]:
        names = self.run.species_names()
        if self.species:
            wanted = [s.strip("/") for s in self.species]
            if any(s not in names for s in wanted):
                # a species may be named by its full group path in the file (particles/grain)
                full = {f.long_name: k for snap in self.run for k, f in snap.species.items()
                        if getattr(f, "long_name", None)}
                wanted = [full.get(s, s) for s in wanted]
            missing = [s for s in wanted if s not in names]
            if missing:
                raise InputError(self.run.source, f"no species {', '.join(missing)} in this run",
                                 f"species are: {', '.join(names)}")
            return [s for s in names if s in wanted]
        return names

    def _find_sidecar(self):
        if self._sidecar is False:
            # the reader layer finds a layout file beside the snapshots; the model only asks
            finder = getattr(self.run, "sidecar", None)
            self._sidecar = finder() if finder is not None else None
        return self._sidecar

    def layout(self, i: int) -> BlockLayout:
        """The block layout in force at snapshot ``i``."""
        if self.fixed_layout is not None:
            return self.fixed_layout
        snap = self.run[i]
        if snap.layout is not None:
            return snap.layout
        side = self._find_sidecar()
        if side is not None:
            return side
        if self._fallback is None:
            first = self.run[0]
            frames = [f for f in first.species.values() if f.ndim > 0 and f.length > 0]
            if not frames:
                unplaced = [f for f in first.species.values() if f.length > 0]
                if unplaced:        # particles, but no column was taken for a position
                    f = unplaced[0]
                    raise InputError(first.path, *missing_roles_help("position", f.columns, f.roles.values()))
                raise InputError(first.path, "has no particles with positions to place a layout around",
                                 "give --domain, --cells and --blocks")
            d = frames[0].ndim
            cols = [np.concatenate([f.positions()[a] for f in frames if f.ndim == d]) for a in range(d)]
            bad = int(np.count_nonzero(nonfinite_rows(cols)))
            if bad == len(cols[0]):
                raise InputError(first.path, "has no particle with a finite position to place a "
                                 "layout around", "give --domain, --cells and --blocks")
            self._fallback = bounding_layout(cols)
            self.notes.append("no block layout given or stored: using one block around the first "
                              "snapshot's particles (give --domain/--cells/--blocks or --layout)")
            if bad:
                self.notes.append(f"{bad:,} particle(s) of the first snapshot with a NaN or infinite "
                                  "position are left out of that block (they are counted in block -1)")
        return self._fallback
