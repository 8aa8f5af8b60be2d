"""HDF5 snapshots (h5py, read-only; every column read opens, reads one dataset or field, closes).

A caller reducing several columns of one file can hold it open for the while
(``loader.hold()``, a context manager): the reads inside share one read-only
handle, closed when the last holder leaves.

How a file becomes columns:

* a group with datasets of one leading length is a particle table (a species named after the
  group; a table at the root is ``particles``); ``blocks`` is the layout, never a species;
* 1-D datasets are columns; ``(N, d)`` datasets give ``name/x``, ``name/y``[, ``name/z``];
  component groups (``position/x``) give ``position/x``; compound datasets give one column per
  field (sub-array fields split like ``(N, d)``);
* root attributes ``step``, ``time`` and other numeric scalars (and 0-d root datasets) are
  per-snapshot scalars; numeric scalar attributes of a species group (``mass``, ``charge``) are
  species attributes; a dataset's ``units`` attribute is the unit of its columns.
"""

from __future__ import annotations

import os
import threading
from contextlib import contextmanager

import numpy as np

from ..core.errors import InputError, SwarmAuditError
from ..core.frame import Snapshot
from ..core.partitions import sliceable
from ..core.roles import _VECTOR_STEMS
from ._columns import (MAX_COMPONENTS, Table, check_fits_memory, component_names, flatten_fields,
                       make_snapshot, native, reject_non_numeric, scalar_value, split_scalars, take_field)

SIGNATURE = b"\x89HDF\r\n\x1a\n"
#: names of groups whose members are the components of one vector (``position/x``)
VECTOR_GROUPS = {k for k in _VECTOR_STEMS if k}
#: compressed size over stored size beyond which a dataset is taken to be mostly unwritten
MAX_RATIO = 10_000
#: nesting deeper than this is not a particle file (and hard-link cycles must end)
MAX_DEPTH = 8
# what h5py and the HDF5 library raise on damaged or unusual files
H5_ERRORS = (OSError, KeyError, ValueError, TypeError, RuntimeError, IndexError, AttributeError)


def _problem(exc: BaseException) -> str:
    text = str(exc).strip() or type(exc).__name__
    low = text.lower()
    if "truncated" in low or "eof" in low:
        return "is truncated (the file ends before its own index says it should)"
    if "lock" in low:
        return "is locked by another program (the simulation may still be writing it)"
    if "signature" in low or "not an hdf5" in low or "file format" in low:
        return "is not an HDF5 file"
    return f"cannot be read as HDF5 ({text})"


def _text(name) -> str:
    """h5py gives names that are not UTF-8 as bytes; columns and messages need text."""
    return name.decode("utf-8", "replace") if isinstance(name, bytes) else name


def _units(obj) -> str | None:
    # a failed attribute lookup costs HDF5 an error stack: look at the names first
    for key in _attr_names(obj):
        if key in ("units", "unit"):
            v = _attr(obj, key)
            return v if isinstance(v, str) else None
    return None


class _Scan:
    """One walk over an open file, collecting tables (nothing but metadata is read)."""

    def __init__(self, path: str):
        self.path = path
        self.tables: dict[str, Table] = {}
        self.warnings: list[str] = []
        self.layout = None
        self._seen: dict = {}     # group name -> members (each group is listed once)

    # datasets -> columns ---------------------------------------------------
    def _check_stored(self, ds) -> None:
        """A dataset must hold the bytes its shape claims (else truncated, sparse or forged)."""
        try:
            if ds.is_virtual or ds.external:
                return
            n = int(np.prod(ds.shape, dtype=np.float64))
            need = n * ds.id.get_type().get_size()
            stored = ds.id.get_storage_size()
            filtered = ds.id.get_create_plist().get_nfilters() > 0
        except H5_ERRORS as exc:
            raise InputError(self.path, f"dataset '{_text(ds.name)}' cannot be inspected ({exc})") from None
        # deflate cannot shrink data more than ~1000x; far beyond that, chunks were never written
        if need and (stored == 0 or (not filtered and stored < need) or need > MAX_RATIO * stored):
            raise InputError(self.path, f"dataset '{_text(ds.name)}' declares {ds.shape[0]} rows "
                             f"({need} bytes) but the file stores {stored} bytes of it",
                             "the file is truncated or was not completely written")

    def add_dataset(self, table: Table, ds, name: str, unit: str | None) -> None:
        where = f"dataset '{_text(ds.name)}'"
        shape = ds.shape
        if shape is None or len(shape) == 0:
            return
        try:
            dtype = ds.dtype
        except H5_ERRORS:
            reject_non_numeric(self.path, name, np.dtype("V1"), where + " (a type numpy has no match for)",
                               self.warnings)
            return
        unit = _units(ds) or unit
        if dtype.names is not None:
            if len(shape) != 1:
                self.warnings.append(f"{where} is a table of shape {shape}, not one row per particle; left out")
                return
            self._check_stored(ds)
            for col, fpath, comp, fdt in flatten_fields(dtype):
                if comp == "skip":
                    self.warnings.append(f"field '{col}' of {where} has shape {fdt.shape}; left out")
                    continue
                label = col if col not in table.loaders else f"{name}/{col}"
                if reject_non_numeric(self.path, label, fdt, f"field '{col}' of {where}", self.warnings):
                    table.add(label, shape[0], _loader(self.path, ds.name, field=(fpath, comp), dtype=fdt),
                              _text(ds.name), unit)
            return
        if len(shape) > 2 or (len(shape) == 2 and not 1 <= shape[1] <= MAX_COMPONENTS):
            self.warnings.append(f"{where} has shape {shape}, not (N,) or (N, d); left out")
            return
        names = [name] if len(shape) == 1 else component_names(name, shape[1])
        if not reject_non_numeric(self.path, names[0], dtype, where, self.warnings):
            return
        self._check_stored(ds)
        for k, col in enumerate(names):
            table.add(col, shape[0], _loader(self.path, ds.name, comp=None if len(shape) == 1 else k,
                                                  dtype=dtype),
                      _text(ds.name), unit)

    # groups -> tables ---------------------------------------------------------
    def _members(self, group):
        key = group.name
        if key not in self._seen:
            self._seen[key] = self._list(group)
        return self._seen[key]

    def _list(self, group):
        import h5py
        out = []
        try:
            names = list(group.keys())
        except H5_ERRORS as exc:
            raise InputError(self.path, f"group '{_text(group.name)}' cannot be listed ({exc})") from None
        for n in names:
            try:
                obj = group[n]
            except H5_ERRORS as exc:
                self.warnings.append(f"'{_text(group.name).rstrip('/')}/{_text(n)}' cannot be opened "
                                     f"({exc}); left out")
                continue
            if isinstance(obj, (h5py.Dataset, h5py.Group)):
                out.append((_text(n), obj))
        return out

    def _leading(self, group) -> set:
        """Leading lengths of a leaf group's datasets, or None when it has sub-groups."""
        import h5py
        sizes = set()
        for _, obj in self._members(group):
            if not isinstance(obj, h5py.Dataset):
                return None
            if obj.shape:
                sizes.add(obj.shape[0])
        return sizes

    def walk(self, group, depth: int = 0) -> None:
        import h5py
        if depth > MAX_DEPTH:
            self.warnings.append(f"group '{_text(group.name)}' is nested too deep; left out")
            return
        members = self._members(group)
        is_root = group.name == "/"
        label = _text(group.name).strip("/") or "particles"
        table = Table(_text(group.name))
        scalars = []
        for n, obj in members:
            if isinstance(obj, h5py.Dataset):
                if obj.shape is not None and len(obj.shape) == 0:
                    scalars.append((n, obj))
                else:
                    self.add_dataset(table, obj, n, None)
        rows = set(table.lengths.values())
        for n, obj in members:
            if not isinstance(obj, h5py.Group):
                continue
            if n == "blocks":
                if self.layout is None:
                    from .layout_files import layout_from_h5group
                    self.layout = layout_from_h5group(obj, self.path)
                continue
            sizes = self._leading(obj)
            component = sizes is not None and bool(sizes) and (
                (rows and sizes == rows) or n.lower() in VECTOR_GROUPS)
            if component:
                unit = _units(obj)
                for m, ds in self._members(obj):
                    self.add_dataset(table, ds, f"{n}/{m}", unit)
            else:
                self.walk(obj, depth + 1)
        if not table.loaders:
            return
        if not is_root:
            for k in _attr_names(group):
                v = _attr(group, k)
                if isinstance(v, (int, float)):
                    table.attrs[_text(k)] = float(v)
            for n, ds in scalars:
                v = _read_scalar(ds)
                if isinstance(v, (int, float)):
                    table.attrs[n] = float(v)
        if label in self.tables:
            label = os.path.splitext(os.path.basename(self.path))[0]
        self.tables[label] = table


def _attr_names(obj) -> list[str]:
    try:
        return list(obj.attrs.keys())
    except H5_ERRORS:
        return []


def _attr(obj, key):
    try:
        return scalar_value(obj.attrs[key])
    except H5_ERRORS:
        return None


def _read_scalar(ds):
    try:
        if ds.dtype.kind not in "biufSU":
            return None
        return scalar_value(ds[()])
    except H5_ERRORS:
        return None


_held = threading.local()


def _held_files() -> dict:
    files = getattr(_held, "files", None)
    if files is None:
        files = _held.files = {}
    return files


@contextmanager
def _hold(path: str):
    """Keep ``path`` open read-only in this thread until the outermost holder leaves."""
    import h5py
    files = _held_files()
    entry = files.get(path)
    if entry is None:
        try:
            fh = h5py.File(path, "r")
        except H5_ERRORS as exc:
            raise InputError(path, _problem(exc)) from None
        entry = files[path] = [fh, 0, {}]
    entry[1] += 1
    try:
        yield
    finally:
        entry[1] -= 1
        if entry[1] == 0:
            del files[path]
            entry[0].close()


@contextmanager
def _dataset(path: str, dsname: str):
    """The dataset, from the file held open (looked up once per hold) or opened for this read."""
    held = _held_files().get(path)
    if held is not None:
        ds = held[2].get(dsname)
        if ds is None:
            ds = held[2][dsname] = held[0][dsname]
        yield ds
        return
    import h5py
    with h5py.File(path, "r") as fh:
        yield fh[dsname]


#: reads smaller than this skip the free-memory check (it costs more than such a read)
CHECK_MEMORY_FROM = 16 * 2**20


def _check_memory(path, what, nbytes):
    if nbytes >= CHECK_MEMORY_FROM:
        check_fits_memory(path, what, nbytes)


def _loader(path: str, dsname: str, comp: int | None = None, field=None, dtype=None):
    """Read one column: the whole 1-D dataset, one column slice, or one compound field.

    The loader can also read rows ``[start, stop)`` alone (a hyperslab), for
    partitioned engines that split one big file into row ranges.
    """
    def load(rows=None) -> np.ndarray:
        try:
            with _dataset(path, dsname) as ds:
                sl = slice(None) if rows is None else slice(*rows)
                n = len(range(*sl.indices(int(ds.shape[0]))))
                if field is not None:
                    fpath, fcomp = field
                    sub = ds.dtype
                    for name in fpath:
                        sub = sub.fields[name][0]
                    _check_memory(path, f"dataset '{dsname}'", n * sub.itemsize)
                    # h5py converts only the named field: the other fields never reach memory
                    got = ds[fpath[0]] if rows is None else ds[fpath[0], sl]
                    arr = take_field(got, fpath[1:], fcomp)
                else:
                    _check_memory(path, f"dataset '{dsname}'", n * ds.dtype.itemsize)
                    if rows is None:
                        arr = ds[()] if comp is None else ds[:, comp]
                    else:
                        arr = ds[sl] if comp is None else ds[sl, comp]
        except SwarmAuditError:
            raise
        except MemoryError:
            raise InputError(path, f"dataset '{dsname}' does not fit in memory") from None
        except H5_ERRORS as exc:
            raise InputError(path, f"dataset '{dsname}' cannot be read ({exc})",
                             "the file may be damaged or still being written") from None
        arr = native(np.ascontiguousarray(arr))
        arr.flags.writeable = False     # like the other readers' columns: the frame's cache is shared
        return arr
    hint = None if dtype is None else np.dtype(dtype).newbyteorder("=")
    out = sliceable(lambda: load(), lambda start, stop: load((start, stop)), hint)
    out.hold = lambda: _hold(path)
    return out


def _has_signature(path: str) -> bool:
    """HDF5 signature at byte 0 or after a user block (512, 1024, 2048... bytes)."""
    try:
        size = os.path.getsize(path)
        with open(path, "rb") as fh:
            offset = 0
            while offset + 8 <= size:
                fh.seek(offset)
                if fh.read(8) == SIGNATURE:
                    return True
                offset = 512 if offset == 0 else offset * 2
    except OSError:
        return False
    return False


class HDF5Reader:
    name = "hdf5"
    suffixes = (".h5", ".hdf5", ".hdf", ".he5")

    def can_open(self, path) -> bool:
        return _has_signature(os.fspath(path))

    def open(self, path, columns=None) -> Snapshot:
        import h5py
        path = os.fspath(path)
        try:
            fh = h5py.File(path, "r")
        except H5_ERRORS as exc:
            raise InputError(path, _problem(exc)) from None
        try:
            with fh:
                scan = _Scan(path)
                items = [(_text(k), _attr(fh, k)) for k in _attr_names(fh)]
                for n, obj in scan._members(fh):
                    if isinstance(obj, h5py.Dataset) and obj.shape is not None and len(obj.shape) == 0:
                        items.append((n, _read_scalar(obj)))
                step, time, meta, time_unit = split_scalars(items, path)
                scan.walk(fh)
                for t in scan.tables.values():
                    if t.where == "/":
                        # a single-species file may keep its species attributes at the root
                        t.attrs.update({k: meta[k] for k in ("mass", "charge") if k in meta})
        except SwarmAuditError:
            raise
        except MemoryError:
            raise InputError(path, "its metadata does not fit in memory (the file may be damaged)") from None
        except H5_ERRORS as exc:
            raise InputError(path, _problem(exc)) from None
        return make_snapshot(path, scan.tables, columns=columns, step=step, time=time, meta=meta,
                             layout=scan.layout, warnings=scan.warnings, time_unit=time_unit)
