"""Block layouts stored in files: a CSV sidecar or the ``blocks`` group of an HDF5 file.

CSV: one row per block, ``block,level,rank,x_lo,x_hi,y_lo,y_hi[,z_lo,z_hi]``;
``# domain = lo,hi,lo,hi``, ``# cells = nx,ny`` and ``# periodic = x,y``
comment lines may carry what the rows cannot (else the domain is the
blocks' bounding box and level-0 cells are inferred from the finest
level-0 block edges).

HDF5: datasets ``lower``/``upper`` ``(n, d)``, ``level``/``rank`` ``(n,)``;
attributes ``domain_lower``, ``domain_upper``, ``cells``, ``periodic``.
"""

from __future__ import annotations

import copy
import hashlib
import os
import threading

import numpy as np

from ..core.errors import InputError, SwarmAuditError
from ..core.layout import BlockLayout
from ..core.roles import AXES


def _infer_cells(lower, upper, level, dlo, dhi, ratio=2):
    """Level-0 cells per axis: the domain over the smallest level-0 block edge gap."""
    d = lower.shape[1]
    cells = []
    for a in range(d):
        sel = level == level.min()
        e = np.unique(np.concatenate([lower[sel, a], upper[sel, a]]))
        gaps = np.diff(e)
        gaps = gaps[gaps > 0]
        cells.append(int(round((dhi[a] - dlo[a]) / gaps.min())) if gaps.size else 1)
    return np.array(cells, dtype=np.int64)


def _parse_periodic(text) -> tuple[str, ...]:
    if text is None:
        return ()
    if isinstance(text, bytes):
        text = text.decode()
    if isinstance(text, str):
        items = [t.strip().lower() for t in text.replace(";", ",").split(",") if t.strip()]
    else:
        items = [t.decode() if isinstance(t, bytes) else str(t) for t in np.ravel(text)]
    return tuple(items)


def read_layout_csv(path: str) -> BlockLayout:
    import pandas as pd
    comments: dict[str, str] = {}
    try:
        with open(path, "r", encoding="utf-8") as fh:
            for line in fh:
                if line.startswith("#") and "=" in line:
                    k, v = line[1:].split("=", 1)
                    comments[k.strip().lower()] = v.strip()
        df = pd.read_csv(path, comment="#")
    except FileNotFoundError:
        raise InputError(path, "the layout file does not exist") from None
    except (OSError, UnicodeDecodeError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise InputError(path, f"cannot read the layout CSV: {exc}") from None
    df.columns = [str(c).strip().lower() for c in df.columns]
    d = sum(1 for a in AXES if f"{a}_lo" in df.columns and f"{a}_hi" in df.columns)
    need = ["block", "level", "rank"] + [f"{a}_{s}" for a in AXES[:d] for s in ("lo", "hi")]
    missing = [c for c in need if c not in df.columns]
    if d == 0 or missing:
        raise InputError(path, "a layout CSV needs the columns block,level,rank,x_lo,x_hi,y_lo,y_hi"
                         + (f"; missing {', '.join(missing)}" if missing else ""))
    try:
        lower = df[[f"{a}_lo" for a in AXES[:d]]].to_numpy(np.float64)
        upper = df[[f"{a}_hi" for a in AXES[:d]]].to_numpy(np.float64)
        level = df["level"].to_numpy(np.int64)
        rank = df["rank"].to_numpy(np.int64)
        block = df["block"].to_numpy(np.int64)
    except (ValueError, TypeError) as exc:
        raise InputError(path, f"the layout CSV has a value that is not a number: {exc}") from None
    if not (np.all(np.isfinite(lower)) and np.all(np.isfinite(upper))):
        raise InputError(path, "the layout CSV has a bound that is not a finite number")
    if "domain" in comments:
        dom = np.array([float(v) for v in comments["domain"].split(",")])
        if dom.size != 2 * d:
            raise InputError(path, f"'# domain =' needs {2 * d} numbers")
        dlo, dhi = dom[0::2], dom[1::2]
    else:
        dlo, dhi = lower.min(axis=0), upper.max(axis=0)
    if "cells" in comments:
        cells = np.array([int(v) for v in comments["cells"].split(",")])
    else:
        cells = _infer_cells(lower, upper, level, dlo, dhi)
    periodic = _parse_periodic(comments.get("periodic"))
    return _build(path, lower, upper, level, rank, dlo, dhi, cells, periodic, block)


def _build(path, lower, upper, level, rank, dlo, dhi, cells, periodic, block=None,
           check=True) -> BlockLayout:
    d = lower.shape[1]
    per = tuple(a in periodic for a in AXES[:d])
    try:
        lay = BlockLayout(lower, upper, level, rank, dlo, dhi, cells, per, block_id=block, source=path)
        if check:
            lay.validate()
    except SwarmAuditError as exc:
        raise InputError(path, str(exc)) from None
    except ValueError as exc:
        raise InputError(path, f"the layout's arrays do not fit together: {exc}") from None
    return lay


#: what h5py and the HDF5 library raise on a damaged or unusual ``blocks`` group
_H5_ERRORS = (OSError, KeyError, ValueError, TypeError, RuntimeError, IndexError, AttributeError)

#: layouts already built and checked, by their stored content (every per-rank file of a run
#: usually stores the same one): the checks and lookup grids are made once per distinct layout
_SEEN_MAX = 64
_seen: dict = {}
_seen_lock = threading.Lock()


def _h5_read(gid, name: str, dtype, kind: str):
    """Dataset or attribute ``name`` of the object ``gid`` (low-level id) read whole and converted by
    HDF5 to ``dtype``, or None when there is none. h5py's high-level objects cost several times
    more per call, and a run reads one ``blocks`` group per file."""
    import h5py
    key = name.encode()
    if kind == "dataset":
        if not gid.links.exists(key):
            return None
        obj = h5py.h5d.open(gid, key)
    else:
        if not h5py.h5a.exists(gid, key):
            return None
        obj = h5py.h5a.open(gid, key)
    out = np.empty(obj.shape, dtype)
    mtype = h5py.h5t.py_create(out.dtype)
    if kind == "dataset":
        obj.read(h5py.h5s.ALL, h5py.h5s.ALL, out, mtype=mtype)
    else:
        obj.read(out, mtype=mtype)
    return out


def layout_from_h5group(group, path: str) -> BlockLayout:
    """A layout from an open h5py group named ``blocks``."""
    gid = group.id
    try:
        lower = _h5_read(gid, "lower", np.float64, "dataset")
        upper = _h5_read(gid, "upper", np.float64, "dataset")
        if lower is None or upper is None:
            raise KeyError(f"no dataset '{'lower' if lower is None else 'upper'}'")
        n = lower.shape[0] if lower.ndim else 0
        level = _h5_read(gid, "level", np.int64, "dataset")
        rank = _h5_read(gid, "rank", np.int64, "dataset")
        level = np.zeros(n, np.int64) if level is None else level
        rank = np.zeros(n, np.int64) if rank is None else rank
        block = _h5_read(gid, "id", np.int64, "dataset")
    except KeyError as exc:
        raise InputError(path, f"the 'blocks' group lacks a dataset: {exc}") from None
    except _H5_ERRORS as exc:
        raise InputError(path, f"the 'blocks' group cannot be read: {exc}") from None
    if lower.ndim != 2 or upper.shape != lower.shape or level.shape != (n,) or rank.shape != (n,):
        raise InputError(path, "the 'blocks' group needs lower/upper of shape (n, d) and level/rank of shape (n,)")
    try:
        dlo = _h5_read(gid, "domain_lower", np.float64, "attribute")
        dhi = _h5_read(gid, "domain_upper", np.float64, "attribute")
        cells = _h5_read(gid, "cells", np.int64, "attribute")
        periodic = _parse_periodic(group.attrs["periodic"]) if "periodic" in group.attrs else ()
    except _H5_ERRORS as exc:
        raise InputError(path, f"the attributes of the 'blocks' group cannot be read: {exc}") from None
    dlo = lower.min(axis=0) if dlo is None else dlo
    dhi = upper.max(axis=0) if dhi is None else dhi
    cells = _infer_cells(lower, upper, level, dlo, dhi) if cells is None else cells
    return checked_layout(_build(path, lower, upper, level, rank, dlo, dhi, cells, periodic, block,
                                 check=False))


def checked_layout(lay: BlockLayout) -> BlockLayout:
    """``lay`` validated, or a copy of the same layout met before (its checks and lookup grids
    shared), with ``lay``'s source. Every per-rank file of a run usually stores one layout, and a
    layout scanned in another process arrives without its lookup grids: each distinct layout is
    checked, and its grids built, once."""
    key = _content_key(lay)
    with _seen_lock:
        known = _seen.get(key)
    if known is None:
        try:
            lay.validate()
        except SwarmAuditError as exc:
            raise InputError(lay.source, str(exc)) from None
        except ValueError as exc:
            raise InputError(lay.source, f"the layout's arrays do not fit together: {exc}") from None
        known = copy.copy(lay)
        for name in _ARRAYS:
            getattr(known, name).flags.writeable = False   # shared from now on: never written
        with _seen_lock:
            if len(_seen) >= _SEEN_MAX:
                _seen.pop(next(iter(_seen)))
            known = _seen.setdefault(key, known)
    out = copy.copy(known)
    out.source = lay.source
    return out


_ARRAYS = ("lower", "upper", "level", "rank", "block_id", "domain_lower", "domain_upper", "cells")


def _content_key(lay: BlockLayout) -> bytes:
    """What a layout is, as one digest: its arrays (dtype, shape and bytes) and settings."""
    h = hashlib.sha256()
    for name in _ARRAYS:
        a = getattr(lay, name)
        h.update(f"{name}{a.dtype.str}{a.shape}".encode())
        h.update(np.ascontiguousarray(a).tobytes())
    h.update(repr((lay.periodic, lay.ratio, lay.regular)).encode())
    return h.digest()


def read_layout(path: str) -> BlockLayout:
    """A layout from ``--layout FILE``: a CSV sidecar or an HDF5 file with a ``blocks`` group."""
    if not os.path.exists(path):
        raise InputError(path, "the layout file does not exist")
    low = path.lower()
    if low.endswith(".csv") or low.endswith(".txt"):
        return read_layout_csv(path)
    import h5py
    try:
        with h5py.File(path, "r") as fh:
            if "blocks" not in fh:
                raise InputError(path, "has no 'blocks' group to read a layout from")
            return layout_from_h5group(fh["blocks"], path)
    except OSError as exc:
        raise InputError(path, f"is neither a layout CSV nor a readable HDF5 file ({exc})") from None
