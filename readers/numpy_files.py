"""NumPy snapshots: ``.npy`` structured arrays and ``.npz`` archives. Never unpickles.

* ``.npy``: a 1-D structured array, one record per particle; one column per field (sub-array
  fields split into ``name/x``...). A column read pulls one field out of the records through a
  small buffer (any row range alone), so the other fields never stay in memory.
* ``.npz``: one array per column. 1-D arrays are columns, ``(N, d)`` arrays give ``name/x``...,
  0-d arrays are per-snapshot scalars (``step``, ``time``, others to ``meta``). A key prefix
  ``beam_a/x`` puts the column in species ``beam_a`` (a 0-d ``beam_a/mass`` is its attribute);
  keys without one (or named like a column, ``position/x``) belong to ``particles``; see
  :func:`species_prefixes` for a prefix that could be either (``p/x``).
"""

from __future__ import annotations

import os
import struct
import tokenize
import zipfile
import zlib

import numpy as np
import numpy.lib.format as npformat

from ..core.errors import InputError, SwarmAuditError
from ..core.frame import Snapshot
from ..core.roles import POSITION_ROLES, RoleMap
from ..core.column import Column, read_record_field
from ._columns import (MAX_COMPONENTS, Table, check_fits_memory, component_names, flatten_fields,
                       has_role, make_snapshot, native, reject_non_numeric, scalar_value,
                       species_constants, split_scalars, take_field)

NPY_MAGIC = b"\x93NUMPY"
ZIP_MAGICS = (b"PK\x03\x04", b"PK\x05\x06")
PICKLE_HINT = ("swarmaudit never loads pickles (loading one can run any code); save numbers with "
               "np.save(..., allow_pickle=False) as a structured array, or np.savez one array per column")
ZIP_ERRORS = (zipfile.BadZipFile, zlib.error, EOFError, OSError, NotImplementedError, ValueError,
              KeyError, RuntimeError, IndexError, struct.error)   # zipfile on a damaged directory
DEFAULT_SPECIES = "particles"
# what numpy's header parser raises on a damaged header (it tokenizes a Python literal)
HEADER_ERRORS = (ValueError, SyntaxError, TypeError, OSError, EOFError, KeyError, OverflowError,
                 MemoryError, RecursionError, tokenize.TokenError)


def _read_header(fp, path, what: str):
    """(shape, fortran_order, dtype) of an .npy stream, refusing object arrays before any data."""
    head = fp.read(len(NPY_MAGIC))
    if head[:1] == b"\x80":
        raise InputError(path, f"{what} holds pickled Python objects", PICKLE_HINT)
    if head != NPY_MAGIC:
        raise InputError(path, f"{what} is not in NumPy's .npy format (wrong signature)")
    try:
        fp.seek(0)
        version = npformat.read_magic(fp)
        if version == (1, 0):
            header = npformat.read_array_header_1_0(fp)
        elif version == (2, 0):
            header = npformat.read_array_header_2_0(fp)
        else:   # 3.0 is 2.0 with UTF-8 field names; numpy keeps its reader private
            from numpy.lib import _format_impl
            header = _format_impl._read_array_header(fp, version)
    except HEADER_ERRORS as exc:
        raise InputError(path, f"{what} has a damaged .npy header ({exc})") from None
    shape, fortran, dtype = header
    if dtype.hasobject:
        raise InputError(path, f"{what} holds Python objects (an object array)", PICKLE_HINT)
    return shape, fortran, dtype


def _nbytes(shape, dtype) -> int:
    return int(np.prod(shape, dtype=np.float64)) * dtype.itemsize


# .npy ---------------------------------------------------------------------------

def _open_npy(path: str, columns) -> Snapshot:
    size = os.path.getsize(path)
    with open(path, "rb") as fh:
        shape, _, dtype = _read_header(fh, path, "the file")
        offset = fh.tell()
    if dtype.names is None:
        raise InputError(path, f"holds a plain {len(shape)}-D array of {dtype} without column names, "
                         "so its columns cannot be told apart",
                         "save a structured array (a dtype with named fields such as x, y, vx) or an "
                         ".npz with one array per column")
    if len(shape) != 1:
        raise InputError(path, f"holds a structured array of shape {shape}; one record per particle "
                         "(a 1-D array) is needed")
    if offset + _nbytes(shape, dtype) > size:
        raise InputError(path, f"declares {shape[0]} records ({_nbytes(shape, dtype)} bytes) but only "
                         f"{size - offset} bytes follow the header",
                         "the file is truncated or was not completely written")
    n = shape[0]
    table = Table(path)
    warnings: list[str] = []
    for col, fpath, comp, fdt in flatten_fields(dtype):
        if comp == "skip":
            warnings.append(f"field '{col}' has shape {fdt.shape}; left out")
            continue
        if reject_non_numeric(path, col, fdt, f"field '{col}'", warnings):
            table.add(col, n, _field_loader(path, offset, dtype, n, col, fpath, comp), col)
    return make_snapshot(path, {DEFAULT_SPECIES: table}, columns=columns, warnings=warnings)


def _field_loader(path: str, offset: int, dtype, n: int, col: str, fpath, comp):
    """One field of the records, read through a small buffer into a compact array.

    Not a view of a memory map: the fields are interleaved, so a map would
    keep every page of the file (all the other fields) resident. Row ranges
    can be read alone, for partitioned engines.
    """
    def take(records):
        return take_field(records, fpath, comp)

    def rows(start, stop):
        try:
            return read_record_field(path, offset, dtype, take, start, stop)
        except OSError as exc:
            raise InputError(path, f"field '{col}' cannot be read ({exc.strerror or exc})") from None

    def load():
        check_fits_memory(path, f"field '{col}'", n * take(np.empty(0, dtype)).dtype.itemsize)
        return rows(0, n)
    return Column(load, rows=rows, dtype=native(take(np.empty(0, dtype))).dtype, length=n)


# .npz ---------------------------------------------------------------------------

def species_prefixes(keys) -> set[str]:
    """The key prefixes of an archive that name species (``beam_a/x``: species ``beam_a``).

    A prefix whose keys all read as components of one vector column (``position/x``,
    ``p/x``) is that column of the unnamed species, unless another prefix names a
    species and the unnamed species would then hold no position: a prefix is a
    species when one of its keys is not a component (``p/vx``), and all prefixes
    are species when the keys without one give no position (``e/x`` beside
    ``p/x``).
    """
    by_prefix: dict[str, list[str]] = {}
    plain = []
    for k in keys:
        head, sep, rest = k.partition("/")
        if sep and head and rest:
            by_prefix.setdefault(head, []).append(k)
        else:
            plain.append(k)
    species = {h for h, ks in by_prefix.items() if not all(has_role(k) for k in ks)}
    if species:
        unnamed = plain + [k for h, ks in by_prefix.items() if h not in species for k in ks]
        if not set(RoleMap().resolve(unnamed)) & set(POSITION_ROLES):
            species = set(by_prefix)
    return species


def _split_key(key: str, species: set[str]) -> tuple[str, str]:
    """(species, column) of an npz key, given the archive's :func:`species_prefixes`."""
    head, sep, rest = key.partition("/")
    if sep and head in species:
        return head, rest
    return DEFAULT_SPECIES, key


def _member_loader(path: str, member: str, shape, fortran, dtype, comp=None, field=None) -> Column:
    """One array of the archive (or one component or field of it), read whole (a member may be
    compressed, so a row range cannot be read alone)."""
    def load() -> np.ndarray:
        check_fits_memory(path, f"array '{member[:-4]}'", _nbytes(shape, dtype))
        try:
            with zipfile.ZipFile(path) as zf, zf.open(member) as fp:
                _read_header(fp, path, f"array '{member[:-4]}'")
                need = _nbytes(shape, dtype)
                data = fp.read(need)
        except SwarmAuditError:
            raise
        except MemoryError:
            raise InputError(path, f"array '{member[:-4]}' does not fit in memory") from None
        except ZIP_ERRORS as exc:
            raise InputError(path, f"array '{member[:-4]}' cannot be read ({exc})",
                             "the archive may be damaged or still being written") from None
        if len(data) < need:
            raise InputError(path, f"array '{member[:-4]}' is truncated ({len(data)} of {need} bytes)")
        count = need // dtype.itemsize if dtype.itemsize else 0
        arr = np.frombuffer(data, dtype=dtype, count=count)
        arr = arr.reshape(shape[::-1]).T if fortran else arr.reshape(shape)
        if field is not None:
            arr = take_field(arr, *field)
        elif comp is not None:
            arr = arr[:, comp]
        return native(np.ascontiguousarray(arr))
    if field is not None:
        out = take_field(np.empty(0, dtype), *field).dtype
    else:
        out = dtype.subdtype[0] if dtype.subdtype is not None else dtype
    return Column(load, dtype=out,
                  length=shape[0] if shape else 1)


def _open_npz(path: str, columns) -> Snapshot:
    tables: dict[str, Table] = {}
    warnings: list[str] = []
    scalars: list = []
    try:
        with zipfile.ZipFile(path) as zf:
            infos = zf.infolist()
            named = species_prefixes([i.filename[:-4] for i in infos
                                      if not i.is_dir() and i.filename.endswith(".npy")])
            for info in infos:
                if info.is_dir():
                    continue
                if not info.filename.endswith(".npy"):
                    warnings.append(f"'{info.filename}' in the archive is not a NumPy array; left out")
                    continue
                key = info.filename[:-4]
                with zf.open(info) as fp:
                    shape, fortran, dtype = _read_header(fp, path, f"array '{key}'")
                    header_len = fp.tell()
                if header_len + _nbytes(shape, dtype) > info.file_size:
                    raise InputError(path, f"array '{key}' declares shape {shape} ({_nbytes(shape, dtype)} "
                                     f"bytes) but the archive holds {info.file_size - header_len} bytes of it",
                                     "the archive is damaged or was not completely written")
                species, col = _split_key(key, named)
                if len(shape) == 0:
                    if dtype.kind in "biufSU":
                        value = scalar_value(_member_loader(path, info.filename, (1,), False, dtype)()[0])
                        scalars.append((species, col, value))
                    continue
                table = tables.setdefault(species, Table(species if species != DEFAULT_SPECIES else path))
                load = lambda comp=None, field=None: _member_loader(path, info.filename, shape, fortran,
                                                                    dtype, comp, field)
                if dtype.names is not None:
                    if len(shape) != 1:
                        warnings.append(f"array '{key}' is a table of shape {shape}; left out")
                        continue
                    for fcol, fpath, comp, fdt in flatten_fields(dtype):
                        name = f"{col}/{fcol}"
                        if comp != "skip" and reject_non_numeric(path, name, fdt, f"field '{fcol}' of '{key}'",
                                                                 warnings):
                            table.add(name, shape[0], load(field=(fpath, comp)), key)
                    continue
                if len(shape) > 2 or (len(shape) == 2 and not 1 <= shape[1] <= MAX_COMPONENTS):
                    warnings.append(f"array '{key}' has shape {shape}, not (N,) or (N, d); left out")
                    continue
                names = [col] if len(shape) == 1 else component_names(col, shape[1])
                if reject_non_numeric(path, key, dtype, f"array '{key}'", warnings):
                    for k, name in enumerate(names):
                        table.add(name, shape[0], load(comp=None if len(shape) == 1 else k), key)
    except SwarmAuditError:
        raise
    except ZIP_ERRORS as exc:
        raise InputError(path, f"is not a readable .npz archive ({exc})",
                         "the file may be truncated or still being written") from None
    root = [(c, v) for s, c, v in scalars if s == DEFAULT_SPECIES]
    step, time, meta, time_unit = split_scalars(root, path)
    for s, c, v in scalars:
        if s in tables and s != DEFAULT_SPECIES and isinstance(v, (int, float)):
            tables[s].attrs[c] = float(v)
    if species_constants(root):
        tables.setdefault(DEFAULT_SPECIES, Table(path)).attrs.update(species_constants(root))
    return make_snapshot(path, tables, columns=columns, step=step, time=time, meta=meta,
                         warnings=warnings, time_unit=time_unit)


class NumpyReader:
    name = "numpy"
    suffixes = (".npy", ".npz")

    def can_open(self, path) -> bool:
        path = os.fspath(path)
        try:
            with open(path, "rb") as fh:
                head = fh.read(6)
        except OSError:
            return False
        if head == NPY_MAGIC or head[:4] in ZIP_MAGICS:
            return True
        # claim our own suffixes anyway, so open() can say what is wrong (a pickle, say)
        return path.lower().endswith(self.suffixes) and not head.startswith(b"\x89HDF")

    def open(self, path, columns=None) -> Snapshot:
        path = os.fspath(path)
        try:
            with open(path, "rb") as fh:
                head = fh.read(6)
        except OSError as exc:
            raise InputError(path, f"cannot be read ({exc.strerror or exc})") from None
        if not head:
            raise InputError(path, "is an empty file")
        try:
            if head[:4] in ZIP_MAGICS:
                return _open_npz(path, columns)
            return _open_npy(path, columns)
        except MemoryError:
            raise InputError(path, "its header asks for more memory than there is (the file may be damaged)") \
                from None
        except OSError as exc:
            raise InputError(path, f"cannot be read ({exc.strerror or exc})") from None
