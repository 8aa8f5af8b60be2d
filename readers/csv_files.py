"""CSV snapshots: a header row, one particle per line; only the asked-for column is parsed.

``# key = value`` lines before the header are per-snapshot scalars (``step``, ``time``, other
numbers to ``meta``); other ``#`` lines and blank lines are skipped. Opening reads the header
and counts data lines (a vectorised newline count); a column read parses the file with
pyarrow's multi-threaded CSV reader restricted to that one column (``include_columns``).
Errors name the file, the column and the line.
"""

from __future__ import annotations

import contextlib
import csv
import os
import sys

import numpy as np

from ..core.column import Column
from ..core.errors import InputError
from ..core.frame import Snapshot
from ._columns import Table, make_snapshot, species_constants, split_scalars

DEFAULT_SPECIES = "particles"
#: a header line longer than this is not a header (a binary file, most likely)
MAX_HEADER_BYTES = 1 << 20
CHUNK = 1 << 24
NL, CR, HASH = 10, 13, 35


class _Layout:
    """Where the data of one CSV file starts and what its columns are called."""

    def __init__(self, path, names, delimiter, offset, header_line, length, comments):
        self.path, self.names, self.delimiter = path, names, delimiter
        self.offset, self.header_line, self.length = offset, header_line, length
        self.comments = comments      # '#' lines among the data lines


def _number(text: str):
    for kind in (int, float):
        try:
            return kind(text)
        except ValueError:
            pass
    return text


def _sniff(path: str):
    """(names, delimiter, byte offset of the first data line, header line number, scalars)."""
    scalars = []
    lineno = 0
    with open(path, "rb") as fh:
        while True:
            raw = fh.readline(MAX_HEADER_BYTES)
            if not raw:
                raise InputError(path, "is an empty file" if lineno == 0 else
                                 "has no header row (only comments or blank lines)",
                                 "the first line that is not a # comment must name the columns")
            lineno += 1
            if len(raw) == MAX_HEADER_BYTES and not raw.endswith(b"\n"):
                raise InputError(path, f"line {lineno} is over {MAX_HEADER_BYTES} bytes long: not a CSV header")
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise InputError(path, f"line {lineno} is not UTF-8 text (byte {exc.start + 1} of the line)",
                                 "save the file as UTF-8") from None
            if lineno == 1:
                text = text.lstrip("\ufeff")
            stripped = text.strip()
            if not stripped:
                continue
            if stripped.startswith("#"):
                key, sep, value = stripped[1:].partition("=")
                if sep and key.strip():
                    scalars.append((key.strip(), _number(value.strip())))
                continue
            header = text.rstrip("\r\n")
            offset = fh.tell()
            break
    if "\x00" in header:
        raise InputError(path, f"line {lineno} holds NUL bytes: not a text file")
    delimiter = next((d for d in (",", "\t", ";") if d in header), ",")
    try:
        names = [n.strip() for n in next(csv.reader([header], delimiter=delimiter))]
    except csv.Error:    # a carriage return inside the line, an unclosed quote...
        raise InputError(path, f"the header (line {lineno}) cannot be split into column names: it holds "
                         "a stray carriage return or an unclosed quote",
                         "the first line that is not a comment must name the columns, e.g. x,y,vx,id") from None
    names = [n or f"unnamed_{i}" for i, n in enumerate(names)]
    seen = set()
    for n in names:
        if n in seen:
            raise InputError(path, f"the header (line {lineno}) names column '{n}' twice")
        seen.add(n)
    if all(isinstance(_number(n), (int, float)) for n in names):
        raise InputError(path, f"line {lineno} holds numbers, not column names",
                         "add a header row naming the columns, e.g. x,y,vx,vy,id")
    return names, delimiter, offset, lineno, scalars


def _line_starts(path: str, offset: int):
    """Per chunk: (first byte of each line starting in it, its offset in the chunk, newline offsets).

    Vectorised: a line starts at ``offset`` or after a newline.
    """
    at_start = True
    for a in _chunks(path, offset):
        nl = np.flatnonzero(a == NL)
        starts = nl + 1
        if at_start:
            starts = np.concatenate(([0], starts))
        at_start = a[-1] == NL
        starts = starts[starts < a.size]
        yield a[starts], starts, nl


def _count_lines(path: str, offset: int) -> tuple[int, int]:
    """(data lines, comment lines) after ``offset``; blank lines are neither."""
    data = comments = 0
    for first, _, _ in _line_starts(path, offset):
        hashes = np.count_nonzero(first == HASH)
        comments += hashes
        data += np.count_nonzero((first != NL) & (first != CR)) - hashes
    return int(data), int(comments)


def _lines_before(path: str, offset: int, row: int, comments_are_rows: bool = False) -> int:
    """How many lines after ``offset`` precede data row ``row`` (``#`` lines count as rows if asked)."""
    count = newlines = 0
    for first, starts, nl in _line_starts(path, offset):
        keep = (first != NL) & (first != CR)
        if not comments_are_rows:
            keep &= first != HASH
        rows = starts[keep]
        if count + rows.size > row:
            return newlines + int(np.searchsorted(nl, rows[row - count]))
        count += rows.size
        newlines += nl.size
    raise IndexError(row)


def _cut_last_line(path: str, offset: int, names: list[str], delimiter: str,
                   header_line: int) -> str | None:
    """Why the file looks cut off in its last line, or None.

    A complete CSV ends with a newline; a file still being written (or copied)
    usually stops inside a line, and a value cut short there would still parse
    as a number ("0.12" of "0.1234"): so a last line without its newline is refused.
    """
    size = os.path.getsize(path)
    with open(path, "rb") as fh:
        fh.seek(max(size - 1, 0))
        if fh.read(1) in (b"\n", b""):
            return None
        if offset >= size:
            return "ends in the middle of its header line (there is no newline at its end)"
        start = max(offset, size - MAX_HEADER_BYTES)
        fh.seek(start)
        tail = fh.read()
    last = tail[tail.rfind(b"\n") + 1:].decode("utf-8", "replace")
    if not last.strip() or last.lstrip().startswith("#"):
        return None          # trailing blanks or a comment: no value is lost
    try:
        fields = len(next(csv.reader([last], delimiter=delimiter)))
    except csv.Error:      # a stray carriage return or NUL: count the delimiters instead
        fields = last.count(delimiter) + 1
    lineno = header_line + 1 + sum(int(np.count_nonzero(a == NL)) for a in _chunks(path, offset))
    return (f"ends in the middle of line {lineno}: it has {fields} of the header's {len(names)} "
            f"fields and no newline at its end")


def _chunks(path: str, offset: int):
    with open(path, "rb") as fh:
        fh.seek(offset)
        while True:
            buf = fh.read(CHUNK)
            if not buf:
                return
            yield np.frombuffer(buf, np.uint8)


def _skip_comments(row):
    return "skip" if row.text.startswith("#") else "error"


@contextlib.contextmanager
def _quiet_handler():
    """pyarrow decodes a bad row as UTF-8 before calling the handler; on bad bytes it treats the
    row as an error (right) but prints the decode failure (noise): hide exactly that print."""
    previous = sys.unraisablehook

    def hook(info):
        if not (info.object is _skip_comments and isinstance(info.exc_value, UnicodeDecodeError)):
            previous(info)
    sys.unraisablehook = hook
    try:
        yield
    finally:
        sys.unraisablehook = previous


def read_table(lay: _Layout, include: list[str], column_types=None, use_threads: bool = True):
    """The one place a CSV is parsed: only ``include`` columns are converted."""
    import pyarrow as pa
    import pyarrow.csv as pacsv

    # pyarrow cannot skip comment lines by itself; the handler (a Python call per bad row)
    # is installed only when the file has comment lines among its rows
    handler = _skip_comments if lay.comments else None
    with pa.memory_map(lay.path, "r") as mm, (_quiet_handler() if handler else contextlib.nullcontext()):
        mm.seek(lay.offset)
        return pacsv.read_csv(
            mm,
            read_options=pacsv.ReadOptions(column_names=lay.names, use_threads=use_threads),
            parse_options=pacsv.ParseOptions(delimiter=lay.delimiter, invalid_row_handler=handler),
            convert_options=pacsv.ConvertOptions(include_columns=include, column_types=column_types,
                                                 strings_can_be_null=True))


def _first_failure(arr, convert) -> int:
    """Index of the first value ``convert`` rejects, by bisection on prefixes (each try vectorised)."""
    import pyarrow as pa
    lo, hi = 0, len(arr)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        try:
            convert(arr.slice(0, mid))
            lo = mid
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            hi = mid
    return lo


def _line(lay: _Layout, row: int, comments_are_rows: bool = False) -> str:
    try:
        return f"line {lay.header_line + 1 + _lines_before(lay.path, lay.offset, row, comments_are_rows)}"
    except IndexError:
        return f"data row {row + 1}"


def _ragged(lay: _Layout, name: str, exc) -> InputError:
    """The error for a row with the wrong number of fields (found again, single-threaded, for its line)."""
    import re

    import pyarrow as pa
    try:
        read_table(lay, [name], use_threads=False)
    except pa.ArrowInvalid as again:
        exc = again
    # "Row #N: Expected A columns, got B": pyarrow numbers the non-blank lines after the header from 1
    m = re.search(r"Row #(\d+): Expected (\d+) columns, got (\d+)", str(exc))
    if m:
        row, want, got = (int(g) for g in m.groups())
        return InputError(lay.path, f"{_line(lay, row - 1, True)} has {got} fields, the header has {want}",
                          "every row needs one value per column")
    return InputError(lay.path, f"cannot be parsed as CSV ({exc})")


def _as_numbers(lay: _Layout, name: str, col) -> np.ndarray:
    """A numeric column, or an InputError naming the line of the first value that is not a number."""
    import pyarrow as pa
    import pyarrow.compute as pc
    t = col.type
    if pa.types.is_null(t):
        return np.full(len(col), np.nan)
    if pa.types.is_floating(t) or ((pa.types.is_integer(t) or pa.types.is_boolean(t)) and col.null_count == 0):
        return col.to_numpy()
    if pa.types.is_integer(t) or pa.types.is_boolean(t):
        try:
            return pc.cast(col, pa.float64()).to_numpy()   # an empty value: NaN, as in a float column
        except pa.ArrowInvalid:   # an integer float64 cannot hold exactly: say so, round nothing
            raise InputError(lay.path, f"column '{name}' has empty values and integers beyond 2**53, "
                             "which a floating-point column (where an empty value is NaN) cannot hold "
                             "exactly", "fill the empty values, or write the column as floating point") from None
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        text = col.combine_chunks()
    else:   # raw bytes (bad UTF-8) or a type like dates: check UTF-8, then numbers, in bulk
        raw = col if pa.types.is_binary(t) else \
            read_table(lay, [name], column_types={name: pa.binary()}).column(0)
        raw = raw.combine_chunks()
        try:
            text = pc.cast(raw, pa.string())
        except pa.ArrowInvalid:
            row = _first_failure(raw, lambda a: pc.cast(a, pa.string()))
            raise InputError(lay.path, f"column '{name}', {_line(lay, row)}: not UTF-8 text",
                             "save the file as UTF-8") from None
    try:
        return pc.cast(text, pa.float64()).to_numpy(zero_copy_only=False)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        row = _first_failure(text, lambda a: pc.cast(a, pa.float64()))
        value = text[row].as_py()
        shown = value if len(value) <= 40 else value[:37] + "..."
        raise InputError(lay.path, f"column '{name}', {_line(lay, row)}: '{shown}' is not a number",
                         "swarmaudit reads numeric columns only") from None


def _loader(lay: _Layout, name: str) -> Column:
    """One column, parsed whole (rows of a text file cannot be found without reading it);
    its dtype is known only once parsed."""
    def load() -> np.ndarray:
        import pyarrow as pa
        if lay.length == 0:
            return np.empty(0)
        try:
            table = read_table(lay, [name])
        except pa.ArrowInvalid as exc:
            if "parse error" in str(exc).lower():
                raise _ragged(lay, name, exc) from None
            # the type guessed from the first block does not fit a later value: find it
            table = read_table(lay, [name], column_types={name: pa.binary()})
        except OSError as exc:
            raise InputError(lay.path, f"cannot be read ({exc})") from None
        if table.num_rows != lay.length:
            raise InputError(lay.path, f"column '{name}' has {table.num_rows} values but the file has "
                             f"{lay.length} data lines",
                             "a quoted value may span lines, or a comment line was read as data")
        return _as_numbers(lay, name, table.column(0))
    return Column(load, length=lay.length)


def _looks_like_csv(text: str) -> bool:
    """A header of plain names, then (if the sample reaches it) a row of as many numbers."""
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.startswith("#")]
    if not lines:
        return False
    delimiter = next((d for d in (",", "\t", ";") if d in lines[0]), None)
    if delimiter is None:
        return False
    names = [n.strip() for n in lines[0].split(delimiter)]
    if any(" " in n for n in names):
        return False
    if len(lines) < 3:          # the second line may be cut off by the sample: judge the header only
        return True
    values = [v.strip() for v in lines[1].split(delimiter)]
    return len(values) == len(names) and all(isinstance(_number(v), (int, float)) or v.lower() in
                                             ("", "nan", "inf", "-inf") for v in values)


class CSVReader:
    name = "csv"
    suffixes = (".csv", ".tsv")

    def can_open(self, path) -> bool:
        path = os.fspath(path)
        if path.lower().endswith(self.suffixes):
            return True   # open() says what is wrong with a bad one
        try:
            with open(path, "rb") as fh:
                head = fh.read(4096)
        except OSError:
            return False
        if not head or b"\x00" in head:
            return False
        return _looks_like_csv(head.decode("utf-8", errors="ignore"))

    def open(self, path, columns=None) -> Snapshot:
        path = os.fspath(path)
        try:
            names, delimiter, offset, header_line, scalars = _sniff(path)
            cut = _cut_last_line(path, offset, names, delimiter, header_line)
            if cut is not None:
                raise InputError(path, cut, "a complete CSV ends with a newline: if the run is still "
                                 "writing this file, it is read once complete; if the file is "
                                 "finished, add a newline at its end")
            length, comments = _count_lines(path, offset)
        except OSError as exc:
            raise InputError(path, f"cannot be read ({exc.strerror or exc})") from None
        lay = _Layout(path, names, delimiter, offset, header_line, length, comments)
        step, time, meta, time_unit = split_scalars(scalars, path)
        table = Table(path)
        # the file holds one species: its ``# mass = …`` and ``# charge = …`` are that species'
        table.attrs.update(species_constants(meta))
        for n in names:
            table.add(n, length, _loader(lay, n), n)
        return make_snapshot(path, {DEFAULT_SPECIES: table}, columns=columns, step=step, time=time,
                             meta=meta, time_unit=time_unit)
