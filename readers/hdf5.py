"""HDF5 snapshots (h5py, read-only; every column read opens, reads one dataset or field, closes).

A plain 1-D dataset stored contiguously (the usual layout h5py writes) is read
straight from the file at its offset, without HDF5 (:class:`_Extent`): such
reads let other threads run, so a reduction reads and reduces pieces on
several cores. A caller reducing several columns of one file can hold it open
for the while (``column.hold()``, a context manager): the reads inside share
one read-only handle (a descriptor for direct reads), closed when the last
holder leaves.

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

import copy
import math
import os
import threading
from contextlib import contextmanager
from dataclasses import dataclass

import numpy as np

from ..core.errors import InputError, SwarmAuditError
from ..core.frame import Snapshot
from ..core.column import Column, native_dtype, read_fully
from ..core.roles import _VECTOR_STEMS
from ._columns import (MAX_COMPONENTS, Table, check_fits_memory, component_names, flatten_fields,
                       make_snapshot, native, reject_non_numeric, scalar_value, short_species_names,
                       species_constants, split_scalars, take_field)

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
    import h5py
    try:
        if not h5py.h5a.get_num_attrs(obj.id):
            return None
    except H5_ERRORS:
        return None
    # a failed attribute lookup costs HDF5 an error stack: ask whether the name exists first
    for key in ("units", "unit"):
        try:
            there = h5py.h5a.exists(obj.id, key.encode())
        except H5_ERRORS:
            return None
        if there:
            v = _attr(obj, key)
            return v if isinstance(v, str) else None
    return None


class _Node:
    """A dataset or group met by the scan: its low-level id and path, without h5py's object.

    h5py's ``Dataset``/``Group`` objects cost more to make than most of what the
    scan asks of them; the few uses that need one (a value read, an attribute of
    an unusual type, the ``blocks`` group) make it on demand (:meth:`hl`).
    """

    __slots__ = ("id", "name", "is_dataset", "_shape", "_hl")

    def __init__(self, oid, name: str, is_dataset: bool):
        self.id, self.name, self.is_dataset = oid, name, is_dataset
        self._shape = self._hl = None

    @property
    def shape(self):
        if self._shape is None and self.is_dataset:
            self._shape = self.id.shape
        return self._shape

    @property
    def dtype(self):
        return self.id.dtype

    def hl(self):
        import h5py
        if self._hl is None:
            self._hl = h5py.Dataset(self.id, readonly=True) if self.is_dataset else h5py.Group(self.id)
        return self._hl

    @property
    def attrs(self):
        return self.hl().attrs

    def __getitem__(self, key):
        return self.hl()[key]


class _Scan:
    """One walk over an open file, collecting tables (nothing but metadata is read)."""

    def __init__(self, path: str, layout: bool = True):
        self.path = path
        self.want_layout = layout     # False: a stored ``blocks`` group is left unread
        self.tables: dict[str, Table] = {}
        self.warnings: list[str] = []
        self.layout = None
        self._seen: dict = {}     # group name -> members (each group is listed once)
        self.stat = None          # the file's os.stat, taken with the first dataset's extent

    # datasets -> columns ---------------------------------------------------
    def _check_stored(self, ds, dsname: str, dtype, shape, tid):
        """A dataset must hold the bytes its shape claims (else truncated, sparse or forged).

        Returns where a plain contiguous 1-D dataset's values lie (:class:`_Extent`), or None.
        """
        import h5py
        try:
            dcpl = ds.id.get_create_plist()
            layout = dcpl.get_layout()
            if layout == h5py.h5d.VIRTUAL or dcpl.get_external_count() > 0:
                return None
            need = math.prod(shape) * tid.get_size()
            stored = ds.id.get_storage_size()
            filtered = dcpl.get_nfilters() > 0
        except H5_ERRORS as exc:
            raise InputError(self.path, f"dataset '{dsname}' cannot be inspected ({exc})") from None
        # deflate cannot shrink data more than ~1000x; far beyond that, chunks were never written
        if need and (stored == 0 or (not filtered and stored < need) or need > MAX_RATIO * stored):
            raise InputError(self.path, f"dataset '{dsname}' declares {shape[0]} rows "
                             f"({need} bytes) but the file stores {stored} bytes of it",
                             "the file is truncated or was not completely written")
        if filtered or len(shape) != 1 or layout != h5py.h5d.CONTIGUOUS:
            return None
        if self.stat is None:
            try:
                self.stat = os.stat(self.path)
            except OSError:
                return None
        return _Extent.of(ds, self.path, dcpl=dcpl, stored=stored, stat=self.stat, tid=tid,
                          dtype=dtype, name=dsname, checked=True, length=shape[0])

    def add_dataset(self, table: Table, ds, name: str, unit: str | None) -> None:
        dsname = ds.name
        where = f"dataset '{dsname}'"
        shape = ds.shape
        if shape is None or len(shape) == 0:
            return
        try:
            tid = ds.id.get_type()     # the stored type, once: its numpy dtype and its size
            dtype = _dtype_of(tid)
        except H5_ERRORS:
            reject_non_numeric(self.path, name, np.dtype("V1"), where + " (a type numpy has no match for)",
                               self.warnings)
            return
        unit = _units(ds) or unit
        if dtype.names is not None:
            if len(shape) != 1:
                self.warnings.append(f"{where} is a table of shape {shape}, not one row per particle; left out")
                return
            self._check_stored(ds, dsname, dtype, shape, tid)
            for col, fpath, comp, fdt in flatten_fields(dtype):
                if comp == "skip":
                    self.warnings.append(f"field '{col}' of {where} has shape {fdt.shape}; left out")
                    continue
                label = col if col not in table.loaders else f"{name}/{col}"
                if reject_non_numeric(self.path, label, fdt, f"field '{col}' of {where}", self.warnings):
                    table.add(label, shape[0], (dsname, None, (fpath, comp), fdt, None, shape[0]),
                              dsname, unit)
            return
        if len(shape) > 2 or (len(shape) == 2 and not 1 <= shape[1] <= MAX_COMPONENTS):
            self.warnings.append(f"{where} has shape {shape}, not (N,) or (N, d); left out")
            return
        names = [name] if len(shape) == 1 else component_names(name, shape[1])
        if not reject_non_numeric(self.path, names[0], dtype, where, self.warnings):
            return
        extent = self._check_stored(ds, dsname, dtype, shape, tid)
        for k, col in enumerate(names):
            table.add(col, shape[0], (dsname, None if len(shape) == 1 else k, None, dtype, extent,
                                      shape[0]), dsname, unit)

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
            names = list(group.id)     # the member names, as HDF5 stores them (bytes)
        except H5_ERRORS as exc:
            raise InputError(self.path, f"group '{group.name}' cannot be listed ({exc})") from None
        base = group.name.rstrip("/")
        for n in names:
            text = _text(n)
            try:
                # the object itself, as group[n] would give it, without h5py's high-level lookup
                oid = h5py.h5o.open(group.id, n)
            except H5_ERRORS as exc:
                self.warnings.append(f"'{base}/{text}' cannot be opened ({exc}); left out")
                continue
            if isinstance(oid, (h5py.h5d.DatasetID, h5py.h5g.GroupID)):   # not a named type
                out.append((text, _Node(oid, f"{base}/{text}", isinstance(oid, h5py.h5d.DatasetID))))
        return out

    def _leading(self, group) -> set:
        """Leading lengths of a leaf group's datasets, or None when it has sub-groups."""
        sizes = set()
        for _, obj in self._members(group):
            if not obj.is_dataset:
                return None
            shape = obj.shape
            if shape:
                sizes.add(shape[0])
        return sizes

    def walk(self, group, depth: int = 0) -> None:
        if depth > MAX_DEPTH:
            self.warnings.append(f"group '{group.name}' is nested too deep; left out")
            return
        members = self._members(group)
        is_root = group.name == "/"
        label = group.name.strip("/") or "particles"
        table = Table(group.name)
        scalars = []
        for n, obj in members:
            if obj.is_dataset:
                shape = obj.shape
                if shape is not None and len(shape) == 0:
                    scalars.append((n, obj))
                else:
                    self.add_dataset(table, obj, n, None)
        rows = set(table.lengths.values())
        for n, obj in members:
            if obj.is_dataset:
                continue
            if n == "blocks":
                if self.layout is None and self.want_layout:
                    from .layout_files import layout_from_h5group
                    self.layout = layout_from_h5group(obj.hl(), self.path)
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
            for k, v in _attr_items(group):
                if isinstance(v, (int, float)):
                    table.attrs[k] = float(v)
            for n, ds in scalars:
                v = _read_scalar(ds)
                if isinstance(v, (int, float)):
                    table.attrs[n] = float(v)
        if label in self.tables:
            label = os.path.splitext(os.path.basename(self.path))[0]
        self.tables[label] = table


def _attr_items(obj) -> list[tuple[str, object]]:
    """``(name, value)`` of every attribute of ``obj``; numbers read by HDF5's own conversion.

    A one-value integer or float attribute is converted by HDF5 to int64,
    uint64 or float64 as it is read (cheaper than h5py's general path); any
    other attribute goes through h5py as in :func:`_attr`.
    """
    import h5py
    h5a, h5t = h5py.h5a, h5py.h5t
    out = []
    try:
        count = h5a.get_num_attrs(obj.id)
    except H5_ERRORS:
        return out
    for i in range(count):
        try:
            a = h5a.open(obj.id, index=i)
            name = _text(a.name)
            t = a.get_type()
            cls = t.get_class()
            # one value: it takes the bytes of one (a scalar or a one-element array)
            if cls in (h5t.FLOAT, h5t.INTEGER) and a.get_storage_size() == t.get_size():
                if cls == h5t.FLOAT:
                    v, mtype = np.empty((), np.float64), h5t.NATIVE_DOUBLE
                elif t.get_sign() == h5t.SGN_NONE:
                    v, mtype = np.empty((), np.uint64), h5t.NATIVE_UINT64
                else:
                    v, mtype = np.empty((), np.int64), h5t.NATIVE_INT64
                a.read(v, mtype=mtype)
                out.append((name, scalar_value(v)))
            else:
                out.append((name, _attr(obj, name)))
        except H5_ERRORS:
            continue
    return out


def _attr(obj, key):
    """One attribute through h5py (any type); numbers in bulk go through :func:`_attr_items`."""
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


_fds: dict = {}                 # path -> [descriptor, holders, stamp]: direct reads while held
_fds_lock = threading.Lock()


@contextmanager
def _hold_fd(path: str):
    """Keep one read-only descriptor of ``path`` for direct reads, shared by every thread.

    Positioned reads (``os.pread``) do not move a file offset, so threads reducing
    pieces of one frame read through it at once; closed when the last holder leaves.
    Where positioned reads are missing, or the file cannot be opened, reads open
    the file themselves as without a hold.
    """
    with _fds_lock:
        entry = _fds.get(path)
        if entry is None and hasattr(os, "preadv"):
            try:
                fd = os.open(path, os.O_RDONLY | getattr(os, "O_CLOEXEC", 0))
            except OSError:
                fd = None
            if fd is not None:
                try:
                    entry = _fds[path] = [fd, 0, _stamp(os.fstat(fd))]
                except OSError:
                    os.close(fd)
        if entry is not None:
            entry[1] += 1
    try:
        yield
    finally:
        if entry is not None:
            with _fds_lock:
                entry[1] -= 1
                if entry[1] == 0:
                    del _fds[path]
                    os.close(entry[0])


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


class _Extent:
    """Where a contiguous, unfiltered dataset's values lie in its file, to read them directly.

    HDF5 stores such a dataset as one run of bytes at a fixed offset. Reading
    that run with a plain file read skips HDF5's per-read set-up and lets other
    threads run meanwhile (a reduction computes on one piece while the next is
    read). Taken from the file's own metadata when the file is scanned (or on the
    first read), and trusted only while the file is unchanged (same inode, size
    and mtime); anything else -
    chunked, compressed, compact, virtual or external storage, a type HDF5
    would convert, a changed file - reads through h5py.
    """

    __slots__ = ("name", "offset", "length", "dtype", "stamp")

    def __init__(self, name: str, offset: int, length: int, dtype, stamp):
        self.name, self.offset, self.length, self.dtype, self.stamp = name, offset, length, dtype, stamp

    @staticmethod
    def of(ds, path: str, dcpl=None, stored=None, stat=None, tid=None, dtype=None, name=None,
           checked=False, length=None):
        """The extent of dataset ``ds`` of file ``path``, or None when it cannot be read directly.

        ``dcpl``, ``stored``, ``stat``, ``tid``, ``dtype`` and ``name`` (its creation
        properties, stored bytes, the file's ``os.stat``, the stored type, its numpy
        type and path) are looked up unless the caller has them; ``checked``: the
        caller found it 1-D, contiguous, unfiltered, neither virtual nor external.
        """
        import h5py
        try:
            if not checked and (len(ds.shape) != 1 or ds.is_virtual or ds.external):
                return None
            dt = ds.dtype if dtype is None else dtype
            if dt.kind not in "fiu" or dt.names is not None or dt.subdtype is not None:
                return None
            if not checked:
                dcpl = ds.id.get_create_plist()
                if dcpl.get_layout() != h5py.h5d.CONTIGUOUS or dcpl.get_nfilters():
                    return None
            if not (tid or ds.id.get_type()) == _h5_type(dt):   # bit-for-bit the numpy type
                return None
            length = int(ds.shape[0] if length is None else length)
            nbytes = length * dt.itemsize
            offset = ds.id.get_offset()
            stored = ds.id.get_storage_size() if stored is None else stored
            if offset is None or offset < 0 or stored < nbytes:
                return None       # not allocated (HDF5 gives an undefined address then)
            st = stat or os.stat(path)
        except (*H5_ERRORS, OverflowError):
            return None
        if offset + nbytes > st.st_size:
            return None
        return _Extent(name or _text(ds.name), int(offset), length, dt, _stamp(st))

    def read(self, path: str, start: int, count: int, out=None):
        """``count`` values from row ``start`` (into ``out`` when given, of the file's dtype).

        None when the file changed since the extent was taken.
        """
        out = np.empty(count, dtype=self.dtype) if out is None else out
        view = memoryview(out).cast("B")
        where = self.offset + start * self.dtype.itemsize
        held = _fds.get(path)
        if held is not None and held[2] == self.stamp:   # the descriptor a hold keeps open
            got = 0
            while got < len(view):
                k = os.preadv(held[0], [view[got:]], where + got)
                if not k:
                    return None        # shorter than when the extent was taken: a changed file
                got += k
            return out
        with open(path, "rb", buffering=0) as fh:
            if _stamp(os.fstat(fh.fileno())) != self.stamp:
                return None
            fh.seek(where)
            if read_fully(fh, view) < len(view):
                return None            # shorter than when the extent was taken: a changed file
        return out


_h5_types: dict = {}
#: stored types met lately, as (HDF5 type, numpy dtype), newest first: comparing a dataset's type
#: with these costs a fraction of converting it again, and a run's files share a few types
_recent_types: list = []
_RECENT_TYPES = 6


def _dtype_of(tid):
    """The numpy dtype of the HDF5 type ``tid`` (plain numeric types looked up among recent ones)."""
    for known, dt in _recent_types:
        if tid == known:
            return dt
    dt = tid.dtype
    if dt.kind in "biuf" and dt.names is None and dt.subdtype is None:
        _recent_types.insert(0, (_h5_type(dt), dt))
        del _recent_types[_RECENT_TYPES:]
    return dt


def _h5_type(dt):
    """HDF5's type for a plain numpy dtype (made once per dtype)."""
    t = _h5_types.get(dt.str)
    if t is None:
        import h5py
        t = _h5_types[dt.str] = h5py.h5t.py_create(dt)
    return t


def _stamp(st) -> tuple:
    return (st.st_ino, st.st_dev, st.st_size, st.st_mtime_ns)


_NO_EXTENT = object()


def _loader(path: str, dsname: str, comp: int | None = None, field=None, dtype=None, extent=None,
            length: int | None = None) -> Column:
    """Read one column: the whole 1-D dataset, one column slice, or one compound field
    (:class:`_DatasetColumn`)."""
    return _DatasetColumn(path, dsname, comp, field, dtype, extent, length)


class _DatasetColumn(Column):
    """One column of an HDF5 dataset: the whole 1-D dataset, one column slice, or one compound field.

    It can also read rows ``[start, stop)`` alone (a hyperslab), for
    partitioned engines that split one big file into row ranges and for
    reductions that stream a column in pieces. A plain 1-D dataset stored
    contiguously is read straight from the file (:class:`_Extent`; the scan
    gives it as ``extent``, else it is looked up on the first read). A class
    rather than closures: a run of many files makes one per column of every file.
    """

    __slots__ = ("path", "dsname", "comp", "field", "ext")

    def __init__(self, path, dsname, comp, field, dtype, extent, length):
        self.path, self.dsname, self.comp, self.field = path, dsname, comp, field
        self.ext = extent if comp is None and field is None else _NO_EXTENT
        self._read = self._rows = self._rows_into = self._hold = self._direct = self._extent = None
        self.dtype = None if dtype is None else native_dtype(dtype)
        self.length = None if length is None else int(length)

    def read(self) -> np.ndarray:
        return self._load()

    def __call__(self) -> np.ndarray:
        return self._load()

    @property
    def can_read_rows(self) -> bool:
        return True

    def rows(self, start: int, stop: int) -> np.ndarray:
        return self._load((start, stop))

    def rows_into(self, start: int, stop: int, out: np.ndarray) -> np.ndarray:
        return self._load((start, stop), out)

    def hold(self):
        return _hold_fd(self.path) if self.direct() else _hold(self.path)

    def direct(self) -> bool:
        """True while reads go straight to the file: they need no shared handle and let other threads run."""
        return isinstance(self.ext, _Extent)

    def file_extent(self):
        """``(descriptor, offset of row 0, dtype)`` while a hold keeps this unchanged file open."""
        ext = self.ext
        if not isinstance(ext, _Extent) or not ext.dtype.isnative:
            return None
        held = _fds.get(self.path)
        if held is None or held[2] != ext.stamp:
            return None
        return held[0], ext.offset, ext.dtype

    def _load(self, rows=None, into=None) -> np.ndarray:
        path, dsname, comp, field = self.path, self.dsname, self.comp, self.field
        try:
            ext = self.ext
            if ext is None:     # first read: look the storage up (metadata only)
                with _dataset(path, dsname) as ds:
                    ext = self.ext = _Extent.of(ds, path) or _NO_EXTENT
            if ext is not _NO_EXTENT:
                start, stop, _ = (slice(None) if rows is None else slice(*rows)).indices(ext.length)
                count = max(0, stop - start)
                _check_memory(path, f"dataset '{dsname}'", count * ext.dtype.itemsize)
                fits = into is not None and into.dtype == ext.dtype and into.shape == (count,)
                arr = ext.read(path, start, count, into if fits else None)
                if arr is not None:
                    if into is not None:        # the caller's buffer, to be filled again later
                        if not fits:
                            into[...] = arr
                        return into
                    arr = native(arr)
                    arr.flags.writeable = False
                    return arr
                self.ext = None    # the file changed: h5py reads it, and the storage is looked up again
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
        if into is not None:
            into[...] = arr
            return into
        arr = native(np.ascontiguousarray(arr))
        arr.flags.writeable = False     # like the other readers' columns: the frame's cache is shared
        return arr


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
        return self.from_scan(self.scan(path), columns)

    def scan(self, path, layout: bool = True) -> "FileScan":
        """What :meth:`open` learns from the file's metadata, as plain data (it pickles, so
        another process can scan); :meth:`from_scan` makes the Snapshot of it. ``layout=False``
        leaves a stored ``blocks`` group unread (a per-rank part whose first part gives the layout)."""
        import h5py
        path = os.fspath(path)
        try:
            fid = h5py.h5f.open(os.fsencode(path), h5py.h5f.ACC_RDONLY, _fapl())
        except H5_ERRORS as exc:
            raise InputError(path, _problem(exc)) from None
        scan = root = obj = None
        try:
            try:
                scan = _Scan(path, layout)
                root = _Node(h5py.h5o.open(fid, b"/"), "/", False)
                items = _attr_items(root)
                for n, obj in scan._members(root):
                    if obj.is_dataset and obj.shape is not None and len(obj.shape) == 0:
                        items.append((n, _read_scalar(obj)))
                step, time, meta, time_unit = split_scalars(items, path)
                scan.walk(root)
                for t in scan.tables.values():
                    if t.where == "/":
                        # a single-species file may keep its species attributes at the root
                        t.attrs.update(species_constants(meta))
            finally:
                # the scan's objects go first, then the file (opened without h5py's File, so
                # without its sweep over every object still open in it: the scan holds the only ones)
                if scan is not None:
                    scan._seen.clear()
                obj = root = None
                try:
                    fid.close()
                except H5_ERRORS:
                    pass
        except SwarmAuditError:
            raise
        except MemoryError:
            raise InputError(path, "its metadata does not fit in memory (the file may be damaged)") from None
        except H5_ERRORS as exc:
            raise InputError(path, _problem(exc)) from None
        return FileScan(path, short_species_names(scan.tables), step, time, meta, time_unit,
                        scan.layout, scan.warnings)

    def from_scan(self, scan: "FileScan", columns=None) -> Snapshot:
        """The Snapshot of a :meth:`scan`: a Column per dataset column (nothing is read)."""
        tables = {}
        for label, t in scan.tables.items():
            built = copy.copy(t)
            built.loaders = {name: _loader(scan.path, *spec) for name, spec in t.loaders.items()}
            tables[label] = built
        layout = scan.layout
        if layout is not None:   # one object per distinct layout, also when scanned in another process
            from .layout_files import checked_layout
            layout = checked_layout(layout)
        return make_snapshot(scan.path, tables, columns=columns, step=scan.step, time=scan.time,
                             meta=scan.meta, layout=layout, warnings=scan.warnings,
                             time_unit=scan.time_unit)


@dataclass
class FileScan:
    """One HDF5 file's metadata: its tables (each column as the arguments of :func:`_loader`),
    scalars, stored layout and warnings. Plain data, so it can come back from another process."""

    path: str
    tables: dict
    step: int | None
    time: float | None
    meta: dict
    time_unit: str
    layout: object
    warnings: list


_fapl_made = None


def _fapl():
    """File access properties as h5py's ``File`` sets them by default (made once)."""
    global _fapl_made
    if _fapl_made is None:
        import h5py
        plist = h5py.h5p.create(h5py.h5p.FILE_ACCESS)
        plist.set_libver_bounds(h5py.h5f.LIBVER_EARLIEST, h5py.h5f.LIBVER_LATEST)
        plist.set_alignment(1, 1)
        _fapl_made = plist
    return _fapl_made
