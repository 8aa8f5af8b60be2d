"""What the readers share: column naming, dtype checks, size guards, building the Snapshot."""

from __future__ import annotations

import numpy as np

from ..core.column import native  # noqa: F401  (the readers' one byte-order rule)
from ..core.errors import InputError
from ..core.frame import Frame, Snapshot
from ..core.roles import AXES, SPECIES_CONSTANTS, RoleMap

#: an ``(N, d)`` array or sub-array field wider than this is not a vector of particle components
MAX_COMPONENTS = 16

#: ``(N, d)`` and ``(3,)``-field vectors become ``name/x``... (roles know ``position/x``)
def component_names(base: str, d: int) -> list[str]:
    if d <= len(AXES):
        return [f"{base}/{a}" for a in AXES[:d]]
    return [f"{base}/{i}" for i in range(d)]


def species_constants(scalars) -> dict[str, float]:
    """The species constants (:data:`core.roles.SPECIES_CONSTANTS`) among a file's root scalars
    (a mapping or ``(name, value)`` pairs): what a file of one species keeps for that species."""
    items = scalars.items() if hasattr(scalars, "items") else scalars
    out = {}
    for k, v in items:
        if str(k).strip().lower() in SPECIES_CONSTANTS and not isinstance(v, (bool, np.bool_)):
            try:
                if np.ndim(v) == 0:
                    out[str(k).strip().lower()] = float(v)
            except (TypeError, ValueError):
                continue
    return out


def is_numeric(dtype) -> bool:
    """Integers, floats and booleans: what a particle column may hold."""
    return np.dtype(dtype).kind in "biuf"


def has_role(name: str) -> bool:
    """Whether a column name would be taken as a position, momentum, id, weight... column."""
    return bool(RoleMap().resolve([name]))


def flatten_fields(dtype, prefix=()):
    """Columns of a structured dtype: ``(column, field path, component or None, dtype)``.

    Nested structs give ``outer/inner``; 1-D sub-array fields are split like
    ``(N, d)`` arrays; anything else is returned with component ``"skip"``.
    """
    out = []
    for fname in dtype.names:
        sub = dtype.fields[fname][0]
        path = prefix + (fname,)
        col = "/".join(path)
        if sub.names is not None:
            out.extend(flatten_fields(sub, path))
        elif sub.subdtype is not None:
            base, shape = sub.subdtype
            if len(shape) == 1 and 1 <= shape[0] <= MAX_COMPONENTS and base.names is None:
                for k, name in enumerate(component_names(col, shape[0])):
                    out.append((name, path, k, base))
            else:
                out.append((col, path, "skip", sub))
        else:
            out.append((col, path, None, sub))
    return out


def take_field(arr: np.ndarray, path, component):
    """One column out of a structured array (a view where numpy allows one)."""
    for name in path:
        arr = arr[name]
    return arr if component is None else arr[:, component]


def check_fits_memory(path, what: str, nbytes: int) -> None:
    """Refuse to allocate more than the machine has free (a corrupt header must not take it down)."""
    import psutil
    free = psutil.virtual_memory().available
    if nbytes > free:
        raise InputError(path, f"{what} would need {nbytes / 2**30:.1f} GiB to read, more than the "
                         f"{free / 2**30:.1f} GiB of free memory",
                         "read fewer columns (--species, or a smaller run), or use a bigger machine")


def reject_non_numeric(path, column: str, dtype, what: str, warnings: list[str]) -> bool:
    """True when a column can be kept; a non-numeric column that looks like a role is an error."""
    if is_numeric(dtype):
        return True
    kind = {"U": "text", "S": "text", "O": "Python objects", "V": "raw bytes", "c": "complex numbers",
            "M": "dates", "m": "time spans"}.get(np.dtype(dtype).kind, f"values of type {dtype}")
    if has_role(column):
        raise InputError(path, f"{what} holds {kind}, not numbers",
                         "write it as an integer or floating-point column")
    warnings.append(f"{what} holds {kind}, not numbers; it is left out")
    return False


class Table:
    """One species as it is being discovered: length, loaders, units, attributes."""

    def __init__(self, where: str):
        self.where = where            # for messages: dataset group, key prefix...
        self.loaders: dict = {}
        self.units: dict[str, str] = {}
        self.attrs: dict[str, float] = {}
        self.lengths: dict[str, int] = {}   # source (dataset/key) -> rows
        self.long_name: str | None = None   # the species' full name when it is shown shorter

    def add(self, name: str, length: int, loader, source: str, unit: str | None = None) -> None:
        self.loaders[name] = loader
        self.lengths[source] = int(length)
        if unit:
            self.units[name] = unit

    def length(self, path) -> int:
        sizes = set(self.lengths.values())
        if len(sizes) > 1:
            shown = ", ".join(f"{k} ({v})" for k, v in list(self.lengths.items())[:6])
            raise InputError(path, f"the columns of '{self.where}' have different lengths: {shown}",
                             "a particle table needs one value per particle in every column")
        return sizes.pop() if sizes else 0


def make_snapshot(path, tables: dict[str, Table], *, columns=None, step=None, time=None,
                  meta=None, layout=None, warnings=None, time_unit: str = "") -> Snapshot:
    """Frames from discovered tables; ``columns`` keeps only those names."""
    warnings = list(warnings or [])
    tables = {k: t for k, t in tables.items() if t.loaders}
    if not tables:
        raise InputError(path, "holds no particle table (no columns of equal length were found)",
                         "see 'swarmaudit inspect --help' for the layouts swarmaudit reads")
    if columns is not None:
        wanted = list(dict.fromkeys(columns))
        known = {c for t in tables.values() for c in t.loaders}
        missing = [c for c in wanted if c not in known]
        if missing:
            raise InputError(path, f"has no column {', '.join(repr(m) for m in missing)}",
                             "columns are: " + ", ".join(sorted(known)))
    species = {}
    for name, t in tables.items():
        n = t.length(path)
        loaders = t.loaders if columns is None else {c: t.loaders[c] for c in wanted if c in t.loaders}
        species[name] = Frame(name, n, loaders, units=t.units, attrs=t.attrs, source=str(path),
                              long_name=t.long_name)
        if n == 0:
            warnings.append(f"species '{name}' has no particles in this snapshot")
    return Snapshot(str(path), species, step=step, time=time, meta=dict(meta or {}), layout=layout,
                    warnings=warnings, parts=[str(path)], time_unit=time_unit)


def short_species_names(tables: dict[str, Table]) -> dict[str, Table]:
    """Species named by group paths that all sit in one container (``particles/grain``,
    ``particles/gas``) are shown by their own names (``grain``, ``gas``); the full
    path is kept as the table's ``long_name`` (``--species`` takes either)."""
    paths = {name: name.split("/") for name in tables}
    if not paths or any(len(p) < 2 for p in paths.values()):
        return tables
    common = 0
    parts = list(paths.values())
    while all(len(p) > common + 1 and p[common] == parts[0][common] for p in parts):
        common += 1
    if not common:
        return tables
    short = {name: "/".join(p[common:]) for name, p in paths.items()}
    if len(set(short.values())) < len(short):
        return tables
    out = {}
    for name, t in tables.items():
        t.long_name = name
        out[short[name]] = t
    return out


def scalar_value(value):
    """A plain int/float/str from an attribute or 0-d array, or None when it is not a scalar."""
    if isinstance(value, bytes):
        try:
            return value.decode("utf-8")
        except UnicodeDecodeError:
            return None
    if isinstance(value, str):
        return value
    try:
        arr = np.asarray(value)
    except Exception:   # odd attribute types (references, opaque): not a scalar we use
        return None
    if arr.size != 1:
        return None
    arr = arr.reshape(())
    if arr.dtype.kind in "iub":
        return int(arr)
    if arr.dtype.kind == "f":
        return float(arr)
    if arr.dtype.kind in "SU":
        return scalar_value(arr.item())
    return None


def split_scalars(items, path) -> tuple[int | None, float | None, dict, str]:
    """(step, time, meta, time_unit) from per-snapshot ``name -> value`` pairs.

    The time is ``time``, else ``t``; the step is ``step``. Other numbers go to ``meta``.
    """
    step = time = t_short = None
    meta: dict[str, float] = {}
    time_unit = ""
    for key, raw in items:
        v = scalar_value(raw)
        if v is None:
            continue
        k = str(key).strip()
        low = k.lower()
        if low == "step" and isinstance(v, (int, float)) and not isinstance(v, bool):
            if isinstance(v, float) and not (np.isfinite(v) and v == int(v)):
                raise InputError(path, f"the step '{raw}' is not a whole number")
            step = int(v)
        elif low == "time" and isinstance(v, (int, float)) and not isinstance(v, bool):
            time = float(v)
        elif k == "t" and isinstance(v, (int, float)) and not isinstance(v, bool):
            t_short = float(v)
        elif low in ("time_unit", "time_units") and isinstance(v, str):
            time_unit = v
        elif isinstance(v, (int, float)):
            meta[k] = float(v)
    if time is None:
        time = t_short          # ``t`` is the time when no ``time`` is stored
    elif t_short is not None:
        meta["t"] = t_short     # kept for inspect; never a total (core.frame.is_clock_scalar)
    return step, time, meta, time_unit
