"""Per-snapshot reductions (totals, census, migration) of a context, in memory and on disk.

Reopening a run of a hundred snapshots should not read a hundred snapshots
again. Every per-snapshot reduction goes through one :class:`SnapshotCache`
per :class:`~swarmaudit.core.context.AuditContext` (:func:`context_cache`):
in memory for the life of the context, backed by the on-disk
:class:`ReductionCache`. Both judge an entry by one rule, :func:`entry_key`:
an entry is current while

* the snapshot's files have the same path, size and modification time
  (``mtime_ns``) as when it was computed (:meth:`core.run.SnapshotRef.signature`),
  so a rewritten file is recomputed;
* it was computed for the same thing with the same options (layout
  fingerprint, species, roles, relativistic, ...);
* by the same code: the cache format and a fingerprint of the sources that
  compute (core, readers, diagnostics, engine, audit), so a changed formula
  never serves old values.

An entry that cannot be read back (cut short, empty, bad checksum, a manifest
that is not JSON) is removed and computed again, with one note.

Where: ``$SWARMAUDIT_CACHE`` if set (``off`` disables it), else
``$XDG_CACHE_HOME/swarmaudit`` or ``~/.cache/swarmaudit``: never beside the
data, which may be read-only or shared. Each entry is one ``.npz`` file
(arrays plus a JSON manifest; loaded with ``allow_pickle=False``), written to
a temporary file and moved into place with ``os.replace``, so two processes
filling the cache at once never leave a torn entry (both succeed; the later
rename wins).
"""

from __future__ import annotations

import dataclasses
import hashlib
import importlib
import io
import json
import os
import tempfile
import threading
from pathlib import Path

import numpy as np
import pandas as pd

FORMAT = 1
ENV = "SWARMAUDIT_CACHE"
_OFF = {"off", "0", "no", "none", "false", "disabled"}

#: packages whose source decides what a cached value is (a change there invalidates it)
_CODE_DIRS = ("core", "readers", "diagnostics", "engine", "audit")


def default_root() -> Path | None:
    """The cache folder, or None when the cache is switched off."""
    env = os.environ.get(ENV)
    if env is not None and env.strip():
        if env.strip().lower() in _OFF:
            return None
        return Path(env).expanduser()
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "swarmaudit"


_code_fp: str | None = None


def code_fingerprint() -> str:
    """A hash of the package sources that produce cached values."""
    global _code_fp
    if _code_fp is None:
        top = Path(__file__).resolve().parent.parent
        h = hashlib.sha256()
        for d in _CODE_DIRS:
            for p in sorted((top / d).glob("*.py")):
                h.update(p.name.encode())
                h.update(p.read_bytes())
        _code_fp = h.hexdigest()[:16]
    return _code_fp


def layout_fingerprint(layout) -> str | None:
    """A hash of everything about a block layout that changes a census (None: no layout)."""
    if layout is None:
        return None
    h = hashlib.sha256()
    for name in ("lower", "upper", "level", "rank", "block_id", "domain_lower", "domain_upper", "cells"):
        a = np.ascontiguousarray(getattr(layout, name))
        h.update(name.encode())
        h.update(str(a.dtype).encode() + str(a.shape).encode())
        h.update(a.tobytes())
    h.update(repr((tuple(layout.periodic), getattr(layout, "ratio", 2),
                   getattr(layout, "regular", None))).encode())
    return h.hexdigest()[:24]


def _plain(value):
    """Options as canonical JSON material (layouts and arrays by fingerprint)."""
    if value is None or isinstance(value, (bool, int, str)):
        return value
    if isinstance(value, float):
        return repr(value)   # NaN and inf too, and no float formatting drift
    if isinstance(value, np.generic):
        return _plain(value.item())
    if isinstance(value, np.ndarray):
        return {"array": hashlib.sha256(np.ascontiguousarray(value).tobytes()).hexdigest()[:24],
                "dtype": str(value.dtype), "shape": list(value.shape)}
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in sorted(value.items(), key=lambda kv: str(kv[0]))}
    if isinstance(value, (list, tuple, set, frozenset)):
        items = sorted(value, key=repr) if isinstance(value, (set, frozenset)) else value
        return [_plain(v) for v in items]
    if hasattr(value, "block_id") and hasattr(value, "lower"):
        return {"layout": layout_fingerprint(value)}
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    raise TypeError(f"cannot use a {type(value).__name__} in a cache key")


def entry_key(signature, what: str, params=None) -> dict:
    """What an entry is stored under, and so when it is stale: the one rule of both caches.

    ``signature`` is ``(path, size, mtime_ns)`` of each file of the snapshot;
    ``params`` the options the value depends on. The cache format and the code
    fingerprint are added here.
    """
    return {"format": FORMAT, "code": code_fingerprint(), "what": str(what),
            "files": [[str(p), int(size), int(t)] for p, size, t in signature],
            "params": _plain(params or {})}


def entry_digest(material: dict) -> str:
    text = json.dumps(material, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()


def has_files(signature) -> bool:
    """Whether a snapshot has files to key a stored entry on (not in memory only, not gone)."""
    return bool(signature) and all(size >= 0 for _, size, _ in signature)


# values <-> (manifest, arrays) -------------------------------------------------------
class _Encoder:
    def __init__(self):
        self.arrays: dict[str, np.ndarray] = {}

    def array(self, a) -> dict:
        a = np.asarray(a)
        if a.dtype.kind not in "biufcUSMm":   # never objects: loading them needs pickle
            raise TypeError(f"arrays of {a.dtype} are not cached")
        name = f"a{len(self.arrays)}"
        self.arrays[name] = a
        return {"t": "a", "k": name}

    def column(self, s: pd.Series) -> dict:
        dt = s.dtype
        if isinstance(dt, pd.CategoricalDtype):
            raise TypeError("categorical columns are not cached")
        if isinstance(dt, np.dtype) and dt.kind in "biufcmM":
            return self.array(s.to_numpy())
        if pd.api.types.is_string_dtype(dt) and not s.isna().any():
            return {"t": "str", "k": self.array(s.to_numpy(dtype=str))["k"]}
        raise TypeError(f"columns of {dt} are not cached")

    def value(self, v):
        if v is None or isinstance(v, (bool, int, str)):
            return {"t": "s", "v": v}
        if isinstance(v, float):
            return {"t": "s", "v": v}
        if isinstance(v, np.generic):
            return {"t": "n", "dtype": str(v.dtype), "k": self.array(np.asarray(v))["k"]}
        if isinstance(v, np.ndarray):
            return self.array(v)
        if isinstance(v, pd.DataFrame):
            index = None
            if not (isinstance(v.index, pd.RangeIndex) and v.index.start == 0 and v.index.step == 1):
                index = self.column(v.index.to_series())
            if not all(isinstance(c, str) for c in v.columns):
                raise TypeError("only tables with text column names are cached")
            return {"t": "f", "cols": [[c, self.column(v[c])] for c in v.columns], "index": index}
        if isinstance(v, pd.Series):
            return {"t": "S", "name": v.name if isinstance(v.name, (str, int)) else None,
                    "values": self.column(v), "index": self.column(v.index.to_series())}
        if isinstance(v, dict):
            if not all(isinstance(k, str) for k in v):
                raise TypeError("only dicts with text keys are cached")
            return {"t": "d", "items": [[k, self.value(x)] for k, x in v.items()]}
        if isinstance(v, (list, tuple)):
            return {"t": "l" if isinstance(v, list) else "u", "items": [self.value(x) for x in v]}
        if dataclasses.is_dataclass(v) and type(v).__module__.startswith(_package() + "."):
            return {"t": "dc", "cls": f"{type(v).__module__}:{type(v).__qualname__}",
                    "fields": [[f.name, self.value(getattr(v, f.name))] for f in dataclasses.fields(v)]}
        raise TypeError(f"a {type(v).__name__} is not cached")


def _package() -> str:
    return __name__.split(".")[0]


def _decode(m, arrays):
    t = m["t"]
    if t == "s":
        return m["v"]
    if t == "n":
        return arrays[m["k"]].astype(m["dtype"])[()]
    if t == "a":
        return arrays[m["k"]]
    if t == "str":
        return pd.array(arrays[m["k"]].astype(object), dtype="str")
    if t == "f":
        df = pd.DataFrame({name: _decode(cm, arrays) for name, cm in m["cols"]}, copy=False)
        if m.get("index") is not None:
            df.index = pd.Index(_decode(m["index"], arrays))
        return df
    if t == "S":
        return pd.Series(_decode(m["values"], arrays), index=pd.Index(_decode(m["index"], arrays)),
                         name=m["name"])
    if t == "d":
        return {k: _decode(x, arrays) for k, x in m["items"]}
    if t == "l":
        return [_decode(x, arrays) for x in m["items"]]
    if t == "u":
        return tuple(_decode(x, arrays) for x in m["items"])
    if t == "dc":
        mod, qual = m["cls"].split(":")
        if not mod.startswith(_package() + "."):
            raise ValueError("a cached object names a class outside the package")
        cls = importlib.import_module(mod)
        for part in qual.split("."):
            cls = getattr(cls, part)
        return cls(**{k: _decode(x, arrays) for k, x in m["fields"]})
    raise ValueError(f"unknown cache entry type {t!r}")


# the cache -----------------------------------------------------------------------------
class ReductionCache:
    """Reductions by (snapshot files, what, options); ``hits``/``misses``/``writes`` count use."""

    def __init__(self, root: str | os.PathLike | None = "default"):
        self.root = default_root() if root == "default" else (Path(root) if root else None)
        self.hits = 0
        self.misses = 0
        self.writes = 0
        self.damaged = 0
        self.errors: list[str] = []
        self._lock = threading.Lock()

    @property
    def enabled(self) -> bool:
        return self.root is not None

    def key_material(self, signature, what: str, params=None) -> dict:
        return entry_key(signature, what, params)

    def path_for(self, material: dict) -> Path:
        digest = entry_digest(material)
        return self.root / f"v{FORMAT}" / digest[:2] / f"{digest}.npz"

    def load(self, material: dict, on_damage=None):
        """The stored value, or a miss marker.

        An entry that cannot be read back is removed (so the value is computed
        and stored again) and counted in ``damaged``; ``on_damage(path)`` is
        then called. Any failure counts: a file cut short or empty, a bad zip
        checksum, a manifest that is not JSON or names an unknown type.
        """
        if not self.enabled:
            return _MISS
        path = self.path_for(material)
        try:
            with np.load(path, allow_pickle=False) as z:
                manifest = json.loads(bytes(z["__manifest__"]).decode())
                if not isinstance(manifest, dict) or "value" not in manifest:
                    raise ValueError("the manifest holds no value")
                if manifest.get("key") != json.loads(json.dumps(material, sort_keys=True)):
                    return _MISS   # a hash collision or a stale format: not ours
                arrays = {k: z[k] for k in z.files if k != "__manifest__"}
            return _decode(manifest["value"], arrays)
        except FileNotFoundError:
            return _MISS
        except Exception as exc:   # noqa: BLE001 - whatever a damaged file makes numpy, zipfile or json raise
            self._damaged(path, exc)
            if on_damage is not None:
                on_damage(path)
            return _MISS

    def _damaged(self, path: Path, exc: BaseException) -> None:
        with self._lock:
            self.damaged += 1
            self.errors.append(f"{path}: {type(exc).__name__}: {exc}")
        try:
            path.unlink()
        except OSError:   # gone already (another process removed or replaced it) or read-only
            pass

    def store(self, material: dict, value) -> bool:
        """Write one entry atomically; False when the value cannot be cached or written."""
        if not self.enabled:
            return False
        enc = _Encoder()
        try:
            manifest = {"key": material, "value": enc.value(value)}
        except TypeError as exc:
            self.errors.append(f"not cached: {exc}")
            return False
        path = self.path_for(material)
        blob = np.frombuffer(json.dumps(manifest, sort_keys=True).encode(), dtype=np.uint8)
        tmp = None
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            buf = io.BytesIO()
            np.savez(buf, __manifest__=blob, **enc.arrays)
            fd, tmp = tempfile.mkstemp(prefix=".tmp-", suffix=".npz", dir=path.parent)
            with os.fdopen(fd, "wb") as fh:
                fh.write(buf.getbuffer())
            os.replace(tmp, path)   # atomic: readers see the old entry or the new one
            tmp = None
        except OSError as exc:
            self.errors.append(f"{path}: {exc}")
            return False
        finally:
            if tmp is not None:
                try:
                    os.unlink(tmp)
                except OSError:
                    pass
        with self._lock:
            self.writes += 1
        return True

    def get_or_compute(self, signature, what: str, params, compute, on_damage=None, *, material=None):
        """The cached value for (files, what, params), else ``compute()`` stored for next time.

        ``material``: the entry's key when the caller has made it already (:func:`entry_key`).
        """
        if not self.enabled or not has_files(signature):
            return compute()   # no file behind it (in memory, or gone): nothing to key on
        if material is None:
            material = self.key_material(signature, what, params)
        got = self.load(material, on_damage)
        if got is not _MISS:
            with self._lock:
                self.hits += 1
            return got
        with self._lock:
            self.misses += 1
        value = compute()
        self.store(material, value)
        return value

    def clear(self) -> int:
        """Delete every entry of this cache format; returns how many."""
        if not self.enabled:
            return 0
        n = 0
        for p in (self.root / f"v{FORMAT}").glob("*/*.npz"):
            try:
                p.unlink()
                n += 1
            except OSError:
                pass
        return n


class _Miss:
    def __repr__(self):
        return "<cache miss>"


_MISS = _Miss()

_shared: dict[str, ReductionCache] = {}


def cache_for(ctx=None) -> ReductionCache:
    """The cache a context uses: switched off by ``ctx.use_cache = False`` (``--no-cache``)."""
    if ctx is not None and getattr(ctx, "use_cache", True) is False:
        return ReductionCache(None)
    root = default_root()
    key = str(root)
    if key not in _shared:
        _shared[key] = ReductionCache(root)
    return _shared[key]


def context_params(ctx) -> dict:
    """What every reduction of a context depends on besides its files: species, roles, physics."""
    rm = getattr(ctx.run, "role_map", None)
    return {"species": list(ctx.species_names()),
            "roles": None if rm is None else {"overrides": dict(rm.overrides),
                                             "key": list(rm.key) if rm.key else None},
            "relativistic": bool(getattr(ctx, "relativistic", False)), "c": getattr(ctx, "c", None)}


class SnapshotCache:
    """The per-snapshot reductions of one context: in memory, backed by the disk cache.

    ``get(i, what, params, compute)`` gives the value for snapshot ``i``: from
    memory when its :func:`entry_key` is the one stored there, else from disk,
    else ``compute()`` (stored in both). The key is made of the snapshot's file
    signature, ``what``, ``params`` plus the context's own options
    (:func:`context_params`) and the code, so memory and disk go stale at the
    same moment. Notes the computation added to ``ctx.notes`` are stored with
    the value on disk and given back on a hit, so a cached run says what a
    fresh one says. Memory holds one version per snapshot file and question:
    a newer version replaces an older one.
    """

    def __init__(self, ctx):
        self._ctx = ctx
        self._memory: dict[tuple, tuple[str, object]] = {}   # (files, what, params) -> (digest, value)
        self._lock = threading.Lock()

    def _key(self, i: int, what: str, params):
        ctx = self._ctx
        ref = ctx.run.refs[i]
        signature = ref.signature()
        material = entry_key(signature, what, {**context_params(ctx), **dict(params or {})})
        slot = (tuple(str(p) for p, _, _ in signature), str(what),
                json.dumps(material["params"], sort_keys=True))
        return signature, material, slot, entry_digest(material)

    def get(self, i: int, what: str, params, compute, *, persist: bool = True):
        """The value of ``what`` for snapshot ``i``; ``persist=False`` keeps it in memory only."""
        signature, material, slot, digest = self._key(i, what, params)
        with self._lock:
            held = self._memory.get(slot)
        if held is not None and held[0] == digest:
            return held[1]
        disk = cache_for(self._ctx)
        notes = self._ctx.notes
        damaged = []
        if persist:
            before = len(notes)

            def fresh():   # the value with the notes its computation added, stored together
                return {"value": compute(), "notes": [str(n) for n in notes[before:]]}

            got = disk.get_or_compute(signature, what, None, fresh, damaged.append, material=material)
            for n in got["notes"]:   # a hit says what the computation said
                if n not in notes:
                    notes.append(n)
            value = got["value"]
        else:
            value = compute()
        if damaged:
            note = (f"a damaged entry of the reduction cache ({disk.root}) was removed and "
                    "computed again")
            if note not in notes:
                notes.append(note)
        with self._lock:
            self._memory[slot] = (digest, value)
        return value

    def put(self, i: int, what: str, params, value) -> None:
        """Keep a value computed together with another snapshot's (no notes of its own)."""
        signature, material, slot, digest = self._key(i, what, params)
        with self._lock:
            self._memory[slot] = (digest, value)
        disk = cache_for(self._ctx)
        if disk.enabled and has_files(signature):
            disk.store(material, {"value": value, "notes": []})

    def has(self, i: int, what: str, params) -> bool:
        """Whether the value is current in memory or stored on disk (nothing is computed)."""
        signature, material, slot, digest = self._key(i, what, params)
        with self._lock:
            held = self._memory.get(slot)
        if held is not None and held[0] == digest:
            return True
        disk = cache_for(self._ctx)
        return disk.enabled and has_files(signature) and disk.path_for(material).is_file()

    def clear(self) -> None:
        with self._lock:
            self._memory.clear()


def context_cache(ctx) -> SnapshotCache:
    """The context's one reduction cache (made on first use)."""
    cache = ctx.reductions
    if cache is None:
        cache = ctx.reductions = SnapshotCache(ctx)
    return cache


def cached_reduction(ctx, i: int, what: str, params, compute, *, persist: bool = True):
    """``compute()`` for snapshot ``i`` of ``ctx.run``, through the context's cache
    (:meth:`SnapshotCache.get`)."""
    return context_cache(ctx).get(i, what, params, compute, persist=persist)
