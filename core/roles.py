"""Column roles: which column of a frame holds positions, momenta, ids, weights...

A role is found from common names; a user overrides it with a roles file, TOML
(``[roles] x = "pos0"``, ``id = ["id", "cpu"]``, given with ``--roles``) or ``--role ROLE=NAME``.
Columns keep their own names; roles only point at them.
"""

from __future__ import annotations

import functools
import re
from dataclasses import dataclass, field

from .errors import InputError, OptionError

AXES = ("x", "y", "z")

#: every role, in display order
ROLES = (
    "x", "y", "z",
    "vx", "vy", "vz",
    "ux", "uy", "uz",
    "px", "py", "pz",
    "id", "weight", "mass", "charge", "radius", "rank", "block",
)

POSITION_ROLES = ("x", "y", "z")

#: scalars that are a species' constants, not per-particle columns nor drift rows (a file of one
#: species may keep them at its root)
SPECIES_CONSTANTS = ("mass", "charge")
VELOCITY_ROLES = ("vx", "vy", "vz")
PROPER_VELOCITY_ROLES = ("ux", "uy", "uz")
MOMENTUM_ROLES = ("px", "py", "pz")

# Stems of vector quantities; a column "<stem><sep><axis>" or "<stem>/<axis>"
# or "<axis><stem>" names that component.
_VECTOR_STEMS = {
    "": ("x", "y", "z"),
    "pos": ("x", "y", "z"), "position": ("x", "y", "z"), "positions": ("x", "y", "z"),
    "r": ("x", "y", "z"), "coord": ("x", "y", "z"), "coords": ("x", "y", "z"),
    "coordinates": ("x", "y", "z"), "loc": ("x", "y", "z"),
    "v": ("vx", "vy", "vz"), "vel": ("vx", "vy", "vz"), "velocity": ("vx", "vy", "vz"),
    "velocities": ("vx", "vy", "vz"),
    "u": ("ux", "uy", "uz"), "gammav": ("ux", "uy", "uz"), "gamma_v": ("ux", "uy", "uz"),
    "proper_velocity": ("ux", "uy", "uz"), "momentum_per_mass": ("ux", "uy", "uz"),
    "p": ("px", "py", "pz"), "mom": ("px", "py", "pz"), "momentum": ("px", "py", "pz"),
}

_SCALAR_NAMES = {
    "id": ("id", "ids", "pid", "particle_id", "particle_ids", "particleid", "tag", "global_id", "gid"),
    "weight": ("w", "weight", "weights", "wt", "macro_weight", "statistical_weight"),
    "mass": ("m", "mass", "masses"),
    "charge": ("q", "charge", "charges"),
    "radius": ("radius", "radii", "rad"),
    "rank": ("rank", "cpu", "proc", "mpi_rank", "owner", "owner_rank", "processor"),
    "block": ("block", "block_id", "blockid", "patch", "patch_id", "box", "box_id", "grid"),
}


# Names some codes give their vectors that say less surely what they are (``xyz``, ``vxvyvz``):
# only the components of one vector count, numbered or lettered from the first axis (an (N, 3)
# array ``xyz`` read as ``xyz/x``, ``xyz/y``, ``xyz/z``, or CSV columns ``xyz:0``, ``xyz:1``...),
# only when no common name plays a role of the same kind, and inspect shows them as guesses.
_GUESSED_VECTOR_STEMS = {
    "xyz": POSITION_ROLES, "xy": POSITION_ROLES, "x": POSITION_ROLES, "point": POSITION_ROLES,
    "points": POSITION_ROLES, "location": POSITION_ROLES, "locations": POSITION_ROLES,
    "vxvyvz": VELOCITY_ROLES, "vxvy": VELOCITY_ROLES, "vxyz": VELOCITY_ROLES, "vxy": VELOCITY_ROLES,
    "vels": VELOCITY_ROLES,
}
_GUESSED_SCALAR_NAMES = {
    "id": ("hash", "hashes", "uid", "particle_hash"),
}
# how a component is written after the stem: "/x" "/0" "_0" "[0]" ":0" ".0"
_COMPONENT = re.compile(r"^(?P<stem>.+?)(?:/(?P<axis>[xyz])|(?:/|_|\[|:|\.)(?P<index>\d)\]?)$")
#: roles of one kind: a guess never mixes with a common name or a user's word of the same kind
_KINDS = (POSITION_ROLES, VELOCITY_ROLES + PROPER_VELOCITY_ROLES + MOMENTUM_ROLES)


def _kind(role: str) -> tuple[str, ...]:
    return next((k for k in _KINDS if role in k), (role,))


@functools.lru_cache(maxsize=1024)
def _guessed_roles(columns: tuple[str, ...]) -> dict[str, str]:
    """role -> column from the less sure names (see ``_GUESSED_VECTOR_STEMS``)."""
    found: dict[str, str] = {}
    vectors: dict[tuple, dict[int, str]] = {}
    for name in columns:
        n = _normalise(name)
        for role, names in _GUESSED_SCALAR_NAMES.items():
            if n in names and role not in found:
                found[role] = name
        m = _COMPONENT.match(n)
        if m and m["stem"] in _GUESSED_VECTOR_STEMS:
            form = "axis" if m["axis"] else n[len(m["stem"])]
            axis = AXES.index(m["axis"]) if m["axis"] else int(m["index"])
            vectors.setdefault((m["stem"], form), {}).setdefault(axis, name)
    for (stem, _), comps in vectors.items():
        # clearly a vector: two or three components, from the first axis on
        if not (2 <= len(comps) <= 3 and sorted(comps) == list(range(len(comps)))):
            continue
        roles = _GUESSED_VECTOR_STEMS[stem]
        if any(r in found for r in _kind(roles[0])):
            continue
        for axis, name in comps.items():
            found[roles[axis]] = name
    return found


def _normalise(name: str) -> str:
    return name.strip().lower().replace("-", "_").replace(" ", "_")


@functools.lru_cache(maxsize=4096)
def _guess(name: str) -> str | None:
    """The role a column name suggests, or None (a pure function of the name: remembered)."""
    n = _normalise(name)
    for role, names in _SCALAR_NAMES.items():
        if n in names:
            return role
    for i, axis in enumerate(AXES):
        for stem, roles in _VECTOR_STEMS.items():
            if not stem:
                if n == axis:
                    return roles[i]
                continue
            if n in (f"{stem}/{axis}", f"{stem}_{axis}", f"{stem}{axis}", f"{stem}.{axis}",
                     f"{stem}/{i}", f"{stem}_{i}", f"{stem}[{i}]", f"{axis}{stem}"):
                # bare "x_v" style and "vx" style both land here
                return roles[i]
    return None


@dataclass
class RoleMap:
    """User overrides of column roles, plus the particle key."""

    overrides: dict[str, str] = field(default_factory=dict)
    key: tuple[str, ...] | None = None

    def __post_init__(self):
        for role in self.overrides:
            if role not in ROLES:
                raise OptionError(
                    f"unknown role '{role}' in the roles; roles are: {', '.join(ROLES)}")

    @classmethod
    def from_options(cls, assignments=(), map_file=None, key=None) -> "RoleMap":
        overrides: dict[str, str] = {}
        file_key = None
        if map_file:
            overrides, file_key = _read_map_file(map_file)
        for text in assignments or ():
            if "=" not in text:
                raise OptionError(f"--role takes ROLE=NAME, got '{text}'")
            role, name = (s.strip() for s in text.split("=", 1))
            if not role or not name:
                raise OptionError(f"--role takes ROLE=NAME, got '{text}'")
            if role == "id" and "," in name:
                file_key = tuple(s.strip() for s in name.split(",") if s.strip())
                continue
            overrides[role] = name
        if key:
            file_key = tuple(s.strip() for s in key.split(",") if s.strip()) if isinstance(key, str) else tuple(key)
        return cls(overrides, file_key)

    def resolve(self, columns) -> dict[str, str]:
        """Map role -> column name for the given column names."""
        return self.resolve_detailed(columns)[0]

    def resolve_detailed(self, columns) -> tuple[dict[str, str], set[str]]:
        """(role -> column name, the roles taken from a less sure name: guesses to show as such)."""
        columns = list(columns)
        found: dict[str, str] = {}
        for name in columns:
            role = _guess(name)
            if role and role not in found:
                found[role] = name
        guessed = set()
        sure = set(found) | {r for role in self.overrides for r in _kind(role)}
        for role, name in _guessed_roles(tuple(columns)).items():
            # a guess fills a kind of role (positions, velocities...) nothing surer fills
            if not any(r in sure for r in _kind(role)):
                found.setdefault(role, name)
                guessed.add(role)
        # a user's word beats a guess; a column taken by an override loses its guessed role
        for role, name in self.overrides.items():
            if name in columns:
                for other, col in list(found.items()):
                    if col == name and other != role:
                        del found[other]
                        guessed.discard(other)
                found[role] = name
                guessed.discard(role)
        return found, guessed

    def key_columns(self, columns, roles: dict[str, str]) -> tuple[str, ...] | None:
        """Columns that together identify a particle across snapshots, or None."""
        if self.key:
            return tuple(c for c in self.key if c in columns) if all(c in columns for c in self.key) else None
        if "id" in roles:
            return (roles["id"],)
        return None


def missing_roles_help(kind: str, columns, taken=()) -> tuple[str, str]:
    """(problem, hint) for a frame with no column recognised as a ``kind`` ("position" or
    "velocity"): the columns found and the exact ``--role`` options and roles-file lines to write.

    The suggestion is the first unassigned vector (``name/x``, ``name_0``...), else the first
    unassigned columns; the user checks and edits it, so it only needs to show the shape.
    """
    roles = POSITION_ROLES if kind == "position" else VELOCITY_ROLES
    columns = list(columns)
    free = [c for c in columns if c not in set(taken)]
    vectors: dict[str, dict[int, str]] = {}
    for name in free:
        m = _COMPONENT.match(_normalise(name))
        if m:
            axis = AXES.index(m["axis"]) if m["axis"] else int(m["index"])
            vectors.setdefault(m["stem"], {}).setdefault(axis, name)
    vector = next((v for v in vectors.values()
                   if 2 <= len(v) <= 3 and sorted(v) == list(range(len(v)))), None)
    if vector:
        pick = [vector[a] for a in sorted(vector)]
    else:
        pick = free[:3] or ["NAME"]
    pairs = list(zip(roles, pick))
    shown = ", ".join(columns) if len(columns) <= 24 else ", ".join(columns[:24]) + ", ..."
    problem = (f"no column was recognised as a particle {kind} "
               f"(the columns are: {shown or 'none'})")
    hint = ("give " + " ".join(f"--role {r}={c}" for r, c in pairs) + " if those are the "
            + {"position": "positions"}.get(kind, "velocities")
            + ", or write the lines [roles], " + ", ".join(f'{r} = "{c}"' for r, c in pairs)
            + " in a roles file given with --roles FILE.toml")
    return problem, hint


def _read_map_file(path):
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise InputError(path, "the roles file does not exist") from None
    except (OSError, tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputError(path, f"cannot read the roles file as TOML: {exc}") from None
    table = data.get("roles", data)
    overrides: dict[str, str] = {}
    key = None
    for role, name in table.items():
        if role == "key" or (role == "id" and isinstance(name, list)):
            names = name if isinstance(name, list) else [name]
            if not all(isinstance(n, str) for n in names):
                raise InputError(path, f"'{role}' must name columns as strings")
            if len(names) == 1:
                overrides["id"] = names[0]
            key = tuple(names)
            continue
        if not isinstance(name, str):
            raise InputError(path, f"role '{role}' must be a column name in quotes")
        if role not in ROLES:
            raise InputError(path, f"unknown role '{role}'; roles are: {', '.join(ROLES)}")
        overrides[role] = name
    return overrides, key


_INT = re.compile(r"(\d+)")


def last_integer(text: str) -> int | None:
    """The last run of digits in a name (snapshot order fallback)."""
    m = _INT.findall(text)
    return int(m[-1]) if m else None
