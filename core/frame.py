"""The common in-memory model: a lazily read columnar Frame per species, a Snapshot.

A reader builds a :class:`Frame` from one :class:`~.column.Column` per column
(or a zero-argument callable, wrapped into one) that reads that column and
nothing else from the file. Nothing is read until a column is asked for, so
a view of ``x`` against ``ux`` never touches the other columns.
"""

from __future__ import annotations

from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from .column import Column, as_column
from .errors import InputError
from .roles import (MOMENTUM_ROLES, POSITION_ROLES, PROPER_VELOCITY_ROLES,
                    VELOCITY_ROLES, RoleMap)

#: what a frame holds per column (readers may hand over plain callables; the frame wraps them)
Loader = Column


class Frame:
    """One species of one snapshot, as named columns of equal length.

    ``frame[name]`` reads (once) and returns a 1-D array. ``frame.reads``
    counts the reads that reached a file, which tests use to prove laziness.
    """

    def __init__(self, species: str, length: int, loaders: Mapping[str, Column], *,
                 units: Mapping[str, str] | None = None,
                 attrs: Mapping[str, object] | None = None,
                 source: str | None = None,
                 role_map: RoleMap | None = None,
                 cache: bool = True,
                 long_name: str | None = None):
        self.species = species
        # the species' full name in its file (``particles/grain`` for species ``grain``), if longer
        self.long_name = long_name
        self.length = int(length)
        self._loaders = {k: as_column(v) for k, v in loaders.items()}
        self.units = dict(units or {})
        self.attrs = dict(attrs or {})
        self.source = source
        self.role_map = role_map or RoleMap()
        self._cache_enabled = cache
        self._cache: dict[str, np.ndarray] = {}
        self.reads = 0
        self._roles: dict[str, str] | None = None
        # per-rank parts this frame joins (set by concat_frames): partitioned engines read them
        self.parts: list[Frame] | None = None
        self.part_ranks: list[int] | None = None

    # columns -----------------------------------------------------------
    @property
    def columns(self) -> list[str]:
        return list(self._loaders)

    def __len__(self) -> int:
        return self.length

    def __contains__(self, name) -> bool:
        return name in self._loaders

    def __getitem__(self, name: str) -> np.ndarray:
        if name in self._cache:
            return self._cache[name]
        arr = self.read_uncached(name)
        if self._cache_enabled:
            self._cache[name] = arr
        return arr

    def peek(self, name: str) -> np.ndarray:
        """The column from memory when the frame holds it, else read without keeping it (a pass
        that looks at each column once then holds one column at a time, not all it has read)."""
        got = self._cache.get(name)
        return got if got is not None else self.read_uncached(name)

    def read_uncached(self, name: str) -> np.ndarray:
        """Read a column from its file, checked, without keeping it (counts in ``reads``)."""
        try:
            loader = self._loaders[name]
        except KeyError:
            raise InputError(self.source, f"species '{self.species}' has no column '{name}'",
                             f"columns are: {', '.join(self.columns)}") from None
        arr = loader()
        self.reads += 1
        arr = np.asarray(arr) if not isinstance(arr, np.ndarray) else arr
        if arr.ndim != 1 or arr.shape[0] != self.length:
            raise InputError(self.source, f"column '{name}' of species '{self.species}' has "
                             f"shape {arr.shape}, expected ({self.length},)")
        return arr

    def loader(self, name: str) -> Column:
        """The column ``name`` as its reader gave it (nothing read)."""
        return self._loaders[name]

    def drop_cache(self) -> None:
        self._cache.clear()

    def with_role_map(self, role_map: RoleMap) -> "Frame":
        """The same columns seen through another role map (shares loaders, not cache)."""
        f = Frame(self.species, self.length, self._loaders, units=self.units, attrs=self.attrs,
                  source=self.source, role_map=role_map, cache=self._cache_enabled,
                  long_name=self.long_name)
        f.parts, f.part_ranks = self.parts, self.part_ranks
        return f

    def select(self, columns) -> "Frame":
        """Only the named columns (others are not even reachable)."""
        missing = [c for c in columns if c not in self._loaders]
        if missing:
            raise InputError(self.source, f"species '{self.species}' has no column "
                             f"{', '.join(repr(m) for m in missing)}")
        f = Frame(self.species, self.length, {c: self._loaders[c] for c in columns},
                  units=self.units, attrs=self.attrs, source=self.source,
                  role_map=self.role_map, cache=self._cache_enabled, long_name=self.long_name)
        f.parts, f.part_ranks = self.parts, self.part_ranks
        return f

    # roles ---------------------------------------------------------------
    @property
    def roles(self) -> dict[str, str]:
        if self._roles is None:
            self._roles = self.role_map.resolve(self.columns)
        return self._roles

    @property
    def guessed_roles(self) -> set[str]:
        """Roles taken from a less sure column name (``xyz/x``, ``hash``): shown as guesses."""
        return self.role_map.resolve_detailed(self.columns)[1]

    def column_for(self, role: str) -> str | None:
        return self.roles.get(role)

    def role(self, role: str) -> np.ndarray | None:
        """The column playing ``role``, or None when the frame has none."""
        name = self.roles.get(role)
        return None if name is None else self[name]

    @property
    def position_names(self) -> list[str]:
        return [self.roles[r] for r in POSITION_ROLES if r in self.roles]

    @property
    def ndim(self) -> int:
        return len(self.position_names)

    def positions(self) -> list[np.ndarray]:
        return [self[n] for n in self.position_names]

    def momentum_kind(self) -> str | None:
        """'v' (velocity), 'u' (γv, momentum per unit mass) or 'p' (momentum), whichever exists."""
        for kind, roles in (("u", PROPER_VELOCITY_ROLES), ("p", MOMENTUM_ROLES), ("v", VELOCITY_ROLES)):
            if any(r in self.roles for r in roles):
                return kind
        return None

    def momentum_roles(self) -> tuple[str, ...]:
        """The roles of :meth:`momentum_kind` (``vx vy vz``, ``ux uy uz`` or ``px py pz``), or ()."""
        return {"u": PROPER_VELOCITY_ROLES, "p": MOMENTUM_ROLES,
                "v": VELOCITY_ROLES}.get(self.momentum_kind(), ())

    def momentum_names(self) -> list[str]:
        return [self.roles[r] for r in self.momentum_roles() if r in self.roles]

    def key_columns(self) -> tuple[str, ...] | None:
        return self.role_map.key_columns(self.columns, self.roles)

    def key(self):
        """The particle key as the matching functions take it: one array, or a tuple of arrays
        for a key made of several columns; None when the frame has no key."""
        cols = self.key_columns()
        if not cols:
            return None
        return self[cols[0]] if len(cols) == 1 else tuple(self[c] for c in cols)

    def per_particle(self, role: str, default: float | None = None):
        """A column for ``role`` if there is one, else the species attribute, else ``default``.

        Used for weight (default 1), mass and charge (column, else species attribute).
        """
        arr = self.role(role)
        if arr is not None:
            return arr
        if role in self.attrs and self.attrs[role] is not None:
            return float(self.attrs[role])
        return default

    def unit(self, name: str) -> str:
        return self.units.get(name, "")

    def __repr__(self) -> str:
        return f"Frame({self.species!r}, n={self.length}, columns={self.columns})"


def concat_frames(parts: list[Frame], *, species: str, rank_values=None, source=None) -> Frame:
    """Join per-rank parts of one species into one frame.

    Columns present in every part are kept. When no part has a rank column,
    ``rank`` is filled with ``rank_values[i]`` for part ``i``.
    """
    if len(parts) == 1 and rank_values is None:
        return parts[0]
    common = [c for c in parts[0].columns if all(c in p for p in parts[1:])]
    lengths = [p.length for p in parts]
    total = sum(lengths)
    loaders: dict[str, Column] = {}
    for c in common:
        dts = [p.loader(c).dtype for p in parts]
        loaders[c] = Column(lambda c=c: _join_column(parts, c), length=total,
                            dtype=np.result_type(*dts) if all(d is not None for d in dts) else None,
                            hold=lambda c=c: _hold_parts(parts, c))
    rank_named = any("rank" in p.roles for p in parts)
    if not rank_named and rank_values is not None and "rank" not in loaders:
        rv = np.asarray(rank_values, dtype=np.int32)
        loaders["rank"] = Column(lambda: np.repeat(rv, lengths), dtype=np.int32, length=total)
    units = {}
    attrs = {}
    for p in parts:
        units.update(p.units)
        for k, v in p.attrs.items():
            attrs.setdefault(k, v)
    joined = Frame(species, total, loaders, units=units, attrs=attrs,
                   source=source or (parts[0].source if parts else None),
                   role_map=parts[0].role_map if parts else None,
                   long_name=parts[0].long_name if parts else None)
    joined.parts = list(parts)
    joined.part_ranks = None if rank_values is None else [int(r) for r in rank_values]
    return joined


def _hold_parts(parts: list[Frame], name: str) -> ExitStack:
    """Every part's file of column ``name`` held open (``Column.hold``), until the stack closes."""
    stack = ExitStack()
    try:
        for p in parts:
            stack.enter_context(p.loader(name).hold())
    except BaseException:
        stack.close()
        raise
    return stack


def _join_column(parts: list[Frame], name: str) -> np.ndarray:
    """One column of every part in one array, filled part by part.

    Each part is read with ``read_uncached`` (not ``part[name]``) so the parts do
    not keep their pieces cached beside the joined column, and at most one
    part is in memory next to the result: peak is the result plus one part,
    not twice the result as with ``np.concatenate`` of all parts.
    """
    if not parts:
        return np.empty(0)
    out = None
    at = 0
    total = sum(p.length for p in parts)
    for p in parts:
        arr = p.read_uncached(name)
        if out is None:
            out = np.empty(total, dtype=arr.dtype)
        elif np.result_type(out.dtype, arr.dtype) != out.dtype:   # parts disagree: widen once
            out = out.astype(np.result_type(out.dtype, arr.dtype))
        out[at:at + p.length] = arr
        at += p.length
        del arr
    return out


#: stored scalars that say when a snapshot was written rather than what it holds
_CLOCK_NAMES = frozenset({"time", "step", "dt", "timestep", "time_step", "istep", "nstep",
                          "iteration", "cycle"})
_CLOCK_SUFFIXES = ("_time", "_step", "_iteration", "_cycle")


def is_clock_scalar(name: str) -> bool:
    """Whether a stored scalar is the snapshot's time, time step or step (``t``, ``time``,
    ``sim_time``, ``dt``, ``step``, ``iteration``...): metadata of the snapshot, never a total
    that should be conserved. ``t`` counts in lower case only (``T`` is often a temperature)."""
    name = str(name).strip()
    low = name.lower()
    return name == "t" or low in _CLOCK_NAMES or low.endswith(_CLOCK_SUFFIXES)


@dataclass
class Snapshot:
    """All particles at one step: a frame per species plus per-snapshot scalars.

    ``meta`` holds the other scalars the code wrote beside the particles (a field
    energy, a clock value other than ``step`` and ``time``, see :func:`is_clock_scalar`);
    ``layout`` is the block layout stored in the file, if any.
    """

    path: str
    species: dict[str, Frame]
    step: int | None = None
    time: float | None = None
    meta: dict[str, float] = field(default_factory=dict)
    layout: object | None = None
    warnings: list[str] = field(default_factory=list)
    parts: list[str] = field(default_factory=list)
    time_unit: str = ""
    step_taken: bool = False     # the step was not stored: the run took it (``Run.step_rule``)

    @property
    def count(self) -> int:
        return sum(f.length for f in self.species.values())

    def frame(self, species: str) -> Frame:
        try:
            return self.species[species]
        except KeyError:
            raise InputError(self.path, f"no species '{species}'",
                             f"species are: {', '.join(self.species)}") from None

    def with_role_map(self, role_map: RoleMap) -> "Snapshot":
        return Snapshot(self.path, {k: f.with_role_map(role_map) for k, f in self.species.items()},
                        self.step, self.time, dict(self.meta), self.layout, list(self.warnings),
                        list(self.parts), self.time_unit, self.step_taken)


@contextmanager
def transient_columns(frames):
    """Forget afterwards the columns read inside the block (keep what was cached before).

    A pass over every snapshot of a run then holds one snapshot's columns at a time.
    """
    before = [(f, set(getattr(f, "_cache", {}))) for f in frames]
    try:
        yield
    finally:
        for f, had in before:
            cache = getattr(f, "_cache", None)
            if cache is None:
                continue
            for k in [k for k in cache if k not in had]:
                del cache[k]
