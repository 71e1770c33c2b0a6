"""Helpers shared by the readers: file checks, times, CSV and Parquet tables, paths.

Every problem is raised as :class:`~diagnostics.errors.InputError` with one line
that starts with the file's name and names the line (CSV), row (Parquet) or field
(JSON) and what was expected.  Library exceptions (pyarrow, json, ...) are caught
here, at the edge, and turned into that error.

Rows of CSV files are named by their physical line number (1-based, as an editor
shows it); rows of Parquet files by their 1-based row number.
"""

from __future__ import annotations

import csv
import difflib
import json
import math
import re
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pcsv
import pyarrow.parquet as pq

from diagnostics.errors import InputError, located

#: Suffixes read as CSV text and as Parquet.
CSV_SUFFIXES = (".csv", ".txt")
PARQUET_SUFFIXES = (".parquet", ".pq")

#: Arrow type of every parsed time: nanoseconds, UTC.
TIME_TYPE = pa.timestamp("ns", tz="UTC")

#: Bytes per block of the multi-threaded CSV reader (each block is parsed on its own).
BLOCK_SIZE = 8 << 20

#: Column kinds a table spec may ask for.
COLUMN_KINDS = ("time", "float", "text", "name")

#: Exceptions that pyarrow, json and the OS raise for bad files; caught at the edge.
LIBRARY_ERRORS = (pa.ArrowException, OSError, ValueError, TypeError, IndexError)
_EPOCH_RE = re.compile(r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$")
#: pandas' nanosecond timestamps cover 1677-09-21 .. 2262-04-11.
_EPOCH_LIMIT_S = 9.2e9


# --------------------------------------------------------------------------- files


def require_file(path: str | Path, expected: str) -> Path:
    """Return ``path`` as a Path after checking that it is a non-empty regular file.

    ``expected`` says in a few words what the file should hold; it ends the
    message of an empty file.
    """
    p = Path(path)
    if not p.exists():
        raise located(p, "file not found")
    if not p.is_file():
        raise located(p, "not a regular file")
    if p.stat().st_size == 0:
        raise located(p, f"empty file (expected {expected})")
    return p


def file_format(path: Path, what: str) -> str:
    """``"csv"`` or ``"parquet"`` from the suffix; any other suffix is an error."""
    suffix = path.suffix.lower()
    if suffix in CSV_SUFFIXES:
        return "csv"
    if suffix in PARQUET_SUFFIXES:
        return "parquet"
    raise located(path, f"unknown file type {suffix or '(none)'!r} for {what} (expected .csv or .parquet)")


def did_you_mean(name: str, candidates: Iterable[str]) -> str:
    """``" (did you mean 'x')"`` for the closest candidate (difflib), or ``""``."""
    match = difflib.get_close_matches(name, [str(c) for c in candidates], n=1, cutoff=0.6)
    return f" (did you mean {match[0]!r}?)" if match else ""


def missing_column(path: Path, name: str, present: Sequence[str], where: str = "") -> InputError:
    """The error for a missing column, suggesting the closest present name."""
    found = ", ".join(repr(c) for c in present) or "none"
    hint = did_you_mean(name, present)
    if not hint and len(present) == 1 and any(sep in present[0] for sep in ";\t|"):
        hint = " (fields must be separated by commas)"
    return located(path, f"{where}missing column {name!r}{hint}; columns found: {found}")


def read_json_object(path: Path, what: str) -> dict[str, Any]:
    """Parse a JSON file that must hold one object; NaN/Infinity are refused."""
    p = require_file(path, f"a JSON object for {what}")
    try:
        text = p.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as exc:
        raise located(p, f"not UTF-8 text at byte {exc.start} (expected JSON)") from None
    except OSError as exc:
        raise located(p, f"cannot read file: {exc.strerror or exc}") from None

    def no_constant(name: str) -> float:
        raise ValueError(f"{name} is not valid JSON (write a number or null)")

    try:
        value = json.loads(text, parse_constant=no_constant)
    except json.JSONDecodeError as exc:
        raise located(p, f"invalid JSON at line {exc.lineno} column {exc.colno}: {exc.msg}") from None
    except (ValueError, RecursionError) as exc:
        raise located(p, f"invalid JSON: {exc}") from None
    if not isinstance(value, dict):
        raise located(p, f"expected a JSON object {{...}} for {what}, found {type(value).__name__}")
    return value


def inside(folder: Path, relative: object, path: Path, field: str) -> Path:
    """Resolve ``relative`` below ``folder``; refuse absolute paths and escapes.

    Symbolic links are resolved first, so a link that points outside ``folder``
    is refused too.  ``path`` and ``field`` name the file and field for errors.
    """
    if not isinstance(relative, str) or not relative.strip():
        raise located(path, f"field {field!r}: expected a file name relative to the folder, found {relative!r}")
    if "\x00" in relative:
        raise located(path, f"field {field!r}: file name contains a NUL byte")
    candidate = Path(relative)
    if candidate.is_absolute() or relative.startswith(("/", "\\")) or re.match(r"^[A-Za-z]:", relative):
        raise located(path, f"field {field!r}: {relative!r} is an absolute path (expected a path relative to the folder)")
    base = folder.resolve()
    try:
        target = (base / candidate).resolve()
    except (OSError, RuntimeError) as exc:
        raise located(path, f"field {field!r}: cannot resolve {relative!r}: {exc}") from None
    if not target.is_relative_to(base):
        raise located(path, f"field {field!r}: {relative!r} leaves the folder {str(folder)!r}")
    return target


# --------------------------------------------------------------------------- times


def parse_time(value: object, path: Path, field: str) -> pd.Timestamp:
    """One time from a header or JSON field: ISO 8601 with a zone, or epoch seconds.

    Returns a timezone-aware UTC :class:`pandas.Timestamp`.  A time without a
    zone is refused: it is ambiguous in a control room that spans time zones and
    daylight saving.  Text is parsed by pyarrow's ISO 8601 parser, the one table
    columns use: the extended form, ``T`` or a space, offsets ``Z``, ``+05``,
    ``+0530`` or ``+05:30``.
    """
    if isinstance(value, bool) or value is None:
        raise located(path, f"{field}: expected an ISO 8601 time with zone or epoch seconds, found {value!r}")
    if isinstance(value, str):
        text = value.strip()
        if _EPOCH_RE.match(text):
            return _epoch_seconds(float(text), path, field)
        # the same parser as for table columns, so every format takes the same spellings
        try:
            ns = pc.cast(pa.array([text]), TIME_TYPE).cast(pa.int64())[0].as_py()
        except LIBRARY_ERRORS:
            try:
                pc.cast(pa.array([text]), pa.timestamp("ns"))
            except LIBRARY_ERRORS:
                raise located(path, f"{field}: {value!r} is not an ISO 8601 time "
                                    "(e.g. 2026-11-30T10:00:00Z)") from None
            raise located(path, f"{field}: {value!r} has no time zone (add Z or an offset such as +01:00)") from None
        return pd.Timestamp(ns, unit="ns", tz="UTC")
    if isinstance(value, (int, float, np.integer, np.floating)):
        return _epoch_seconds(float(value), path, field)
    raise located(path, f"{field}: expected an ISO 8601 time with zone or epoch seconds, found {value!r}")


def _epoch_seconds(seconds: float, path: Path, field: str) -> pd.Timestamp:
    if not math.isfinite(seconds) or abs(seconds) > _EPOCH_LIMIT_S:
        raise located(path, f"{field}: epoch seconds {seconds!r} out of range (1677..2262)")
    whole = math.floor(seconds)
    return pd.Timestamp(whole * 1_000_000_000 + round((seconds - whole) * 1e9), unit="ns", tz="UTC")


# --------------------------------------------------------------------------- numbers


def finite_number(value: object, path: Path, field: str, *, minimum: float | None = None,
                  strict: bool = True) -> float:
    """A finite JSON/header number, optionally ``> minimum`` (``>=`` if not ``strict``)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise located(path, f"{field}: expected a number, found {value!r}")
    number = float(value)
    if not math.isfinite(number):
        raise located(path, f"{field}: expected a finite number, found {value!r}")
    if minimum is not None:
        if strict and not number > minimum:
            raise located(path, f"{field}: expected a number > {minimum:g}, found {value!r}")
        if not strict and not number >= minimum:
            raise located(path, f"{field}: expected a number >= {minimum:g}, found {value!r}")
    return number


def integer(value: object, path: Path, field: str, *, minimum: int | None = None,
            maximum: int | None = None) -> int:
    """A JSON integer (``3``, not ``3.0`` or ``true``) within optional bounds."""
    if isinstance(value, bool) or not isinstance(value, int):
        raise located(path, f"{field}: expected an integer, found {value!r}")
    if minimum is not None and value < minimum or maximum is not None and value > maximum:
        lo = "" if minimum is None else f">= {minimum}"
        hi = "" if maximum is None else f"<= {maximum}"
        raise located(path, f"{field}: expected an integer {' and '.join(b for b in (lo, hi) if b)}, found {value}")
    return value


# --------------------------------------------------------------------------- tables


RowName = Callable[[int], str]


@dataclass(frozen=True)
class CsvHead:
    """The top of a CSV file: leading ``#`` lines, the column-name row, one data row."""

    comments: tuple[tuple[int, str], ...]  # (line number, text after '#')
    header_line: int  # 1-based line of the column names
    header_offset: int  # byte offset of that line
    names: tuple[str, ...]
    first_row: tuple[str, ...] | None  # first data row, split, or None


def peek_csv(path: Path, what: str, *, max_lines: int = 10_000, max_line_bytes: int = 1 << 20) -> CsvHead:
    """Read the leading ``#`` lines, the column names and the first data row."""
    comments: list[tuple[int, str]] = []
    header: tuple[str, ...] | None = None
    header_line = header_offset = 0
    first: tuple[str, ...] | None = None
    try:
        with path.open("rb") as fh:
            offset = 0
            for lineno in range(1, max_lines + 1):
                raw = fh.readline(max_line_bytes)
                if not raw:
                    break
                start, offset = offset, offset + len(raw)
                if lineno == 1 and raw.startswith(b"\xef\xbb\xbf"):
                    raw = raw[3:]
                try:
                    text = raw.decode("utf-8").rstrip("\r\n")
                except UnicodeDecodeError as exc:
                    raise located(path, f"line {lineno}: not UTF-8 text at byte {exc.start} (expected {what})") from None
                if header is None:
                    if not text.strip():
                        continue
                    if text.lstrip().startswith("#"):
                        comments.append((lineno, text.lstrip()[1:]))
                        continue
                    header = tuple(_split(text, path, lineno))
                    # the column-name row is skipped by the CSV reader (names are given),
                    # so a byte-order mark on it does no harm
                    header_line, header_offset = lineno, start
                    continue
                if text.strip():
                    first = tuple(_split(text, path, lineno))
                    break
    except OSError as exc:
        raise located(path, f"cannot read file: {exc.strerror or exc}") from None
    if header is None:
        raise located(path, f"no column-name row (expected {what})")
    names = tuple(n.strip() for n in header)
    for i, name in enumerate(names):
        if not name:
            raise located(path, f"line {header_line}: column {i + 1} has no name")
        if name in names[:i]:
            raise located(path, f"line {header_line}: column {name!r} appears twice")
    return CsvHead(tuple(comments), header_line, header_offset, names, first)


def _split(text: str, path: Path, lineno: int) -> list[str]:
    try:
        return next(csv.reader([text]))
    except (csv.Error, StopIteration) as exc:
        raise located(path, f"line {lineno}: cannot split into fields: {exc}") from None


def line_of_row(path: Path, head: CsvHead, row: int) -> int:
    """Physical line of data row ``row`` (0-based); empty lines are skipped as pyarrow does."""
    seen = -1
    try:
        with path.open("rb") as fh:
            fh.seek(head.header_offset)
            fh.readline()
            for lineno, raw in enumerate(fh, start=head.header_line + 1):
                if raw.rstrip(b"\r\n"):
                    seen += 1
                    if seen == row:
                        return lineno
    except OSError as exc:
        raise located(path, f"cannot read file: {exc.strerror or exc}") from None
    return head.header_line + 1 + row


def _arrow_type(kind: str, epoch: bool) -> pa.DataType:
    if kind == "time":
        return pa.float64() if epoch else TIME_TYPE
    if kind == "float":
        return pa.float64()
    if kind == "text":
        return pa.string()
    if kind == "name":  # text with few distinct values (BPM or channel names)
        return pa.dictionary(pa.int32(), pa.string())
    raise ValueError(f"unknown column kind {kind!r}; expected one of {COLUMN_KINDS}")


def _looks_epoch(value: str | None) -> bool:
    return value is not None and bool(_EPOCH_RE.match(value.strip()))


def read_csv_table(path: Path, head: CsvHead, kinds: Mapping[str, str], *,
                   only: bool = False) -> tuple[pa.Table, RowName]:
    """Read a CSV body into Arrow with the given column kinds, fast, or fail precisely.

    ``kinds`` maps column name -> ``"time"``, ``"float"`` or ``"text"``; any other
    column keeps the type pyarrow infers (text if inference fails).  ``time``
    columns hold ISO 8601 times with a zone, or epoch seconds (decided from the
    first data row); they come back as ``timestamp[ns, UTC]``.  An empty field is
    null in ``time``/``float`` columns and the empty string in ``text`` columns.

    The fast path is one multi-threaded :func:`pyarrow.csv.read_csv` with explicit
    column types.  When it fails, the file is read again as text and each typed
    column is searched (by bisection) for the first value that does not convert,
    so the message can name the line and the value.  With ``only``, columns not
    in ``kinds`` are dropped.
    """
    first = dict(zip(head.names, head.first_row or (), strict=False))
    epoch = {name: _looks_epoch(first.get(name)) for name, kind in kinds.items() if kind == "time"}
    types = {name: _arrow_type(kind, epoch.get(name, False)) for name, kind in kinds.items()}
    read = pcsv.ReadOptions(column_names=list(head.names), skip_rows=1, block_size=BLOCK_SIZE)
    convert = pcsv.ConvertOptions(column_types=types, null_values=[""], strings_can_be_null=False,
                                  quoted_strings_can_be_null=False,
                                  include_columns=list(kinds) if only else [])

    def row_name(i: int) -> str:
        return f"line {line_of_row(path, head, i)}"

    try:
        table = _read_csv(path, head, read, convert)
    except LIBRARY_ERRORS:
        table = _diagnose_csv(path, head, kinds, types, row_name)
        if only:
            table = table.select(list(kinds))
    return _epoch_to_time(table, epoch, path, row_name), row_name


def _read_csv(path: Path, head: CsvHead, read: pcsv.ReadOptions, convert: pcsv.ConvertOptions,
              parse: pcsv.ParseOptions | None = None) -> pa.Table:
    with pa.OSFile(str(path)) as fh:
        fh.seek(head.header_offset)
        return pcsv.read_csv(fh, read_options=read, convert_options=convert, parse_options=parse)


def _diagnose_csv(path: Path, head: CsvHead, kinds: Mapping[str, str], types: Mapping[str, pa.DataType],
                  row_name: RowName) -> pa.Table:
    """Slow path: read all as text, name the first bad line, or return the table."""
    _check_utf8(path, head)
    bad_rows: list[Any] = []

    def on_invalid(row: Any) -> str:
        bad_rows.append(row)
        return "error"

    read = pcsv.ReadOptions(column_names=list(head.names), skip_rows=1, use_threads=False, block_size=BLOCK_SIZE)
    parse = pcsv.ParseOptions(invalid_row_handler=on_invalid)
    convert = pcsv.ConvertOptions(column_types=dict.fromkeys(head.names, pa.string()),
                                  strings_can_be_null=False, quoted_strings_can_be_null=False)
    try:
        text = _read_csv(path, head, read, convert, parse)
    except LIBRARY_ERRORS as exc:
        if bad_rows:
            row = bad_rows[0]
            # pyarrow counts rows from the column-name row (1) and skips empty lines.
            line = line_of_row(path, head, row.number - 2) if row.number and row.number > 1 else "?"
            raise located(path, f"line {line}: expected {row.expected_columns} fields, found "
                                f"{row.actual_columns} (truncated or malformed row)") from None
        raise located(path, f"cannot parse CSV: {one_line(exc)}") from None
    columns = {}
    for name in head.names:
        column = text.column(name)
        if name in types:
            columns[name] = cast_text(column, types[name], path, name, row_name)
        else:
            columns[name] = _infer(column)
    return pa.table(columns)


def _check_utf8(path: Path, head: CsvHead, chunk: int = 16 << 20) -> None:
    """Refuse bytes that are not UTF-8, naming the line (decoded in bounded chunks)."""
    import codecs

    decoder = codecs.getincrementaldecoder("utf-8")()
    line = head.header_line
    try:
        fh = path.open("rb")
    except OSError as exc:
        raise located(path, f"cannot read file: {exc.strerror or exc}") from None
    with fh:
        fh.seek(head.header_offset)
        while True:
            block = fh.read(chunk)
            try:
                decoder.decode(block, final=not block)
            except UnicodeDecodeError as exc:
                line += block.count(b"\n", 0, max(exc.start, 0))
                raise located(path, f"line {line}: not UTF-8 text (expected a CSV table)") from None
            if not block:
                return
            line += block.count(b"\n")


def _infer(column: pa.ChunkedArray) -> pa.Array:
    """An extra column: number if every value is one, otherwise text."""
    values = column.combine_chunks()
    for ty in (pa.int64(), pa.float64()):
        try:
            return pc.cast(pc.utf8_trim_whitespace(values), ty)
        except LIBRARY_ERRORS:
            continue
    return values


def cast_text(column: pa.ChunkedArray | pa.Array, ty: pa.DataType, path: Path, name: str,
              row_name: RowName) -> pa.Array:
    """Cast a text column to ``ty``; on failure name the first bad row and value."""
    values = column.combine_chunks() if isinstance(column, pa.ChunkedArray) else column
    if pa.types.is_string(ty):
        return values
    if pa.types.is_dictionary(ty):
        return pc.dictionary_encode(values)
    # pyarrow's CSV reader trims blanks around numbers; its cast kernel does not.
    # Empty fields become nulls, as on the fast path (callers refuse them where needed).
    trimmed = pc.utf8_trim_whitespace(values)
    trimmed = pc.if_else(pc.equal(trimmed, ""), pa.scalar(None, pa.string()), trimmed)
    try:
        return pc.cast(trimmed, ty)
    except LIBRARY_ERRORS:
        pass
    i = first_failing(trimmed, ty)
    raw = values[i].as_py()
    if ty == TIME_TYPE:
        try:
            pc.cast(trimmed.slice(i, 1), pa.timestamp("ns"))
        except LIBRARY_ERRORS:
            pass
        else:
            raise located(path, f"{row_name(i)}: column {name!r} time {raw!r} has no time zone "
                                "(add Z or an offset such as +01:00)")
    raise located(path, f"{row_name(i)}: column {name!r} has {raw!r} (expected {_expected(ty)})")


def _expected(ty: pa.DataType) -> str:
    if ty == TIME_TYPE:
        return "an ISO 8601 time with zone, e.g. 2026-11-30T10:00:00Z"
    return "a number"


def first_failing(values: pa.Array, ty: pa.DataType) -> int:
    """Index of the first value of ``values`` that does not cast to ``ty`` (bisection).

    Costs about two full casts; the caller knows that some value fails.
    """
    lo, hi = 0, len(values)
    # invariant: values[:lo] all cast; values[lo:hi] holds a failing value
    while hi - lo > 1:
        mid = (lo + hi) // 2
        try:
            pc.cast(values.slice(lo, mid - lo), ty)
        except LIBRARY_ERRORS:
            hi = mid
        else:
            lo = mid
    return lo


def _epoch_to_time(table: pa.Table, epoch: Mapping[str, bool], path: Path, row_name: RowName) -> pa.Table:
    for name, is_epoch in epoch.items():
        if not is_epoch:
            continue
        column = table.column(name)
        numbers = column.combine_chunks() if column.num_chunks != 1 else column.chunk(0)
        table = table.set_column(table.schema.get_field_index(name), name,
                                 _time_from_numbers(numbers, path, name, row_name))
    return table


def epoch_to_ns(seconds: np.ndarray, path: Path, name: str, row_name: RowName) -> np.ndarray:
    """Epoch seconds (float) -> int64 nanoseconds; NaN, inf and out-of-range are errors.

    Float64 seconds near 2026 resolve about 0.2 microseconds; that is the
    precision of an epoch column.
    """
    bad = ~(np.abs(seconds) <= _EPOCH_LIMIT_S)  # also catches NaN
    if bad.any():
        i = int(np.argmax(bad))
        raise located(path, f"{row_name(i)}: column {name!r} has {float(seconds[i])!r} "
                            "(expected epoch seconds between 1677 and 2262, or an ISO 8601 time)")
    # whole seconds and the fraction separately: both exact in float64, so the
    # nanoseconds are those of the float's exact value (no 256 ns product rounding)
    whole = np.floor(seconds)
    return whole.astype(np.int64) * 1_000_000_000 + np.round((seconds - whole) * 1e9).astype(np.int64)


def parquet_names(path: Path) -> tuple[str, ...]:
    """Column names of a Parquet file, from its footer."""
    try:
        return tuple(pq.read_schema(path).names)
    except LIBRARY_ERRORS as exc:
        raise located(path, f"cannot read Parquet: {one_line(exc)}") from None


def read_parquet_table(path: Path, kinds: Mapping[str, str]) -> tuple[pa.Table, RowName]:
    """Read a Parquet file and bring the named columns to the kinds' Arrow types.

    ``time`` columns may be zoned timestamps (converted to UTC), ISO 8601 text, or
    numbers (epoch seconds); timestamps without a zone are refused.  Columns not
    in ``kinds`` are kept as stored.
    """

    def row_name(i: int) -> str:
        return f"row {i + 1}"

    try:
        table = pq.read_table(path)
    except LIBRARY_ERRORS as exc:
        raise located(path, f"cannot read Parquet: {one_line(exc)}") from None
    columns = {}
    for name in table.column_names:
        column = table.column(name)
        columns[name] = (convert_column(column, kinds[name], path, name, row_name)
                         if name in kinds else column.combine_chunks())
    return pa.table(columns, metadata=table.schema.metadata), row_name


def convert_column(column: pa.ChunkedArray, kind: str, path: Path, name: str, row_name: RowName) -> pa.Array:
    """Bring a stored Arrow column to the type of ``kind`` (see :func:`read_parquet_table`)."""
    values = column.combine_chunks()
    ty = values.type
    if pa.types.is_dictionary(ty):
        values = values.dictionary_decode()
        ty = values.type
    if pa.types.is_large_string(ty) or pa.types.is_string_view(ty):
        values = pc.cast(values, pa.string())
        ty = values.type
    if kind in ("text", "name"):
        if not pa.types.is_string(ty):
            raise located(path, f"column {name!r} has type {ty} (expected text)")
        return values
    if pa.types.is_string(ty):
        values = pc.if_else(pc.equal(pc.utf8_trim_whitespace(values), ""), pa.scalar(None, pa.string()), values)
        if kind == "time" and len(values) and values.null_count < len(values):
            sample = pc.drop_null(values)[0].as_py()
            if _looks_epoch(sample):
                numbers = cast_text(values, pa.float64(), path, name, row_name)
                return _time_from_numbers(numbers, path, name, row_name)
        return cast_text(values, _arrow_type(kind, False), path, name, row_name)
    if kind == "float":
        if not (pa.types.is_integer(ty) or pa.types.is_floating(ty)):
            raise located(path, f"column {name!r} has type {ty} (expected numbers)")
        return pc.cast(values, pa.float64())
    # kind == "time"
    if pa.types.is_timestamp(ty):
        if ty.tz is None:
            raise located(path, f"column {name!r} holds times without a time zone (expected UTC or an offset)")
        try:
            return pc.cast(values, TIME_TYPE)
        except LIBRARY_ERRORS as exc:
            raise located(path, f"column {name!r}: {one_line(exc)}") from None
    if pa.types.is_integer(ty) or pa.types.is_floating(ty):
        return _time_from_numbers(values, path, name, row_name)
    raise located(path, f"column {name!r} has type {ty} (expected times)")


def _time_from_numbers(values: pa.Array, path: Path, name: str, row_name: RowName) -> pa.Array:
    seconds = pc.cast(values, pa.float64()).to_numpy(zero_copy_only=False)
    nulls = np.asarray(values.is_null())
    ns = epoch_to_ns(np.where(nulls, 0.0, seconds), path, name, row_name)
    return pa.array(ns, TIME_TYPE, mask=nulls if nulls.any() else None)


def contiguous(column: pa.ChunkedArray | pa.Array) -> pa.Array:
    """One Arrow array from a chunked column (no copy when it has one chunk)."""
    if isinstance(column, pa.Array):
        return column
    return column.chunk(0) if column.num_chunks == 1 else column.combine_chunks()


def column_numpy(column: pa.ChunkedArray | pa.Array) -> np.ndarray:
    """A float or time column as one read-only numpy array (times as int64 ns).

    Chunks are combined by Arrow's memory pool, which reuses its pages; for a
    column without nulls the numpy array is a zero-copy view of that buffer.
    Nulls become NaN (floats).
    """
    column = contiguous(column)
    if pa.types.is_timestamp(column.type):
        column = column.cast(pa.int64())
    return column.to_numpy(zero_copy_only=False)


def first_null(table: pa.Table, name: str) -> int | None:
    """Index of the first null in a column, or ``None``."""
    column = table.column(name)
    if column.null_count == 0:
        return None
    return int(np.argmax(np.asarray(column.is_null())))


def check_no_nulls(table: pa.Table, names: Iterable[str], path: Path, row_name: RowName) -> None:
    """Refuse empty fields in the named columns."""
    for name in names:
        i = first_null(table, name)
        if i is not None:
            raise located(path, f"{row_name(i)}: column {name!r} is empty (expected a value)")


def check_finite(values: pa.ChunkedArray | pa.Array, path: Path, name: str, row_name: RowName, *,
                 allow_nan: bool = False) -> None:
    """Refuse NaN (unless ``allow_nan``) and +-inf, naming the first bad row.

    Checked chunk by chunk in Arrow; only a failing column is turned into numpy.
    """
    good = pc.invert(pc.is_inf(values)) if allow_nan else pc.is_finite(values)
    if pc.all(good).as_py() is not False:
        return
    values = column_numpy(values)
    bad = np.isinf(values) if allow_nan else ~np.isfinite(values)
    if bad.any():
        i = int(np.argmax(bad))
        raise located(path, f"{row_name(i)}: column {name!r} has {float(values[i])!r} (expected a finite number)")


def check_series_order(times_ns: np.ndarray, codes: np.ndarray, n_codes: int, path: Path,
                       row_name: RowName, names: Sequence[str], what: str) -> bool:
    """Check that every series' times strictly increase in file order.

    ``codes`` number the series (BPM or channel, ``0 <= code < n_codes``) and
    ``names`` give their names.  A repeated ``(time, name)`` pair or a time that
    goes backwards within one series is an error naming the row.  Returns whether
    the whole file is in time order (so no sort is needed).

    The common case (rows in time order, series in a fixed order within each time)
    is checked in O(n) with no sort: the key ``rank(time) * n_codes + code`` then
    strictly increases.  Otherwise the rows are grouped by series with a stable
    radix-sortable argsort and checked within each series.
    """
    n = len(times_ns)
    if n < 2:
        return True
    # one int64 work buffer, reused in place: fresh pages are slow to fault in
    work = np.subtract(times_ns[1:], times_ns[:-1])
    if (work >= 0).all():
        np.cumsum(work != 0, out=work)  # rank of each row's time, minus row 0's
        work *= n_codes
        work += codes[1:]
        # rank * n_codes + code must strictly increase, row 0 (rank 0) included
        if codes[0] < work[0] and (work[1:] > work[:-1]).all():
            return True
        in_order = True
    else:
        in_order = False
    del work
    small = codes.astype(np.uint16) if n_codes <= np.iinfo(np.uint16).max else codes
    order = np.argsort(small, kind="stable")
    same = codes[order[1:]] == codes[order[:-1]]
    d = np.diff(times_ns[order])
    bad = same & (d <= 0)
    if bad.any():
        k = int(np.argmax(bad))
        i, prev = int(order[k + 1]), int(order[k])
        label = names[int(codes[i])]
        if d[k] == 0:
            raise located(path, f"{row_name(i)}: {what} {label!r} repeats the time of {row_name(prev)} "
                                "(expected one reading per time)")
        raise located(path, f"{row_name(i)}: {what} {label!r} time goes backwards from {row_name(prev)} "
                            "(expected times in increasing order)")
    return in_order


def text_codes(table: pa.Table, name: str) -> tuple[np.ndarray, list[str], pa.ChunkedArray]:
    """Integer codes, the distinct values and the column as text, blanks trimmed.

    Works on the dictionary (a few distinct names), not on every row: names are
    trimmed of surrounding blanks there, and names that become equal share a
    code.  Nulls get code 0 (callers refuse them first).
    """
    column = table.column(name)
    if not pa.types.is_dictionary(column.type):
        column = pc.dictionary_encode(column)
        if isinstance(column, pa.Array):
            column = pa.chunked_array([column])
    column = pa.table({name: column}).unify_dictionaries().column(name)
    if column.num_chunks == 0 or len(column) == 0:
        return np.empty(0, np.int32), [], pa.chunked_array([pa.array([], pa.string())])
    dictionary = pc.utf8_trim_whitespace(column.chunks[0].dictionary).to_pylist()
    indices = pa.chunked_array([c.indices for c in column.chunks], pa.int32())
    if indices.null_count:
        indices = pc.fill_null(indices, 0)
    names, inverse = np.unique(np.array(dictionary, dtype=object), return_inverse=True)
    codes = inverse.astype(np.int32)[column_numpy(indices)]
    names_list = [str(n) for n in names]
    text = pa.DictionaryArray.from_arrays(pa.array(codes), pa.array(names_list, pa.string())).cast(pa.string())
    return codes, names_list, pa.chunked_array([text])


def to_frame(columns: Mapping[str, pa.Array | pa.ChunkedArray]) -> pd.DataFrame:
    """An Arrow column mapping as a pandas DataFrame (UTC times, ``str`` text)."""
    table = pa.table(dict(columns))
    return table.to_pandas(split_blocks=True, self_destruct=True)


def one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text[:300] or type(exc).__name__
