"""The Parquet store: atomic writes, content-hash dedup, quarantine, catalog, queries.

Layout (one folder, ``STORE``)::

    STORE/profiles/date=YYYY-MM-DD/part-<sha16>-<n>.parquet   one row per profile
    STORE/frames/date=YYYY-MM-DD/part-<sha16>-<n>.parquet     one row per image
    STORE/bpm/date=YYYY-MM-DD/part-<sha16>-<n>.parquet        one row per BPM reading
    STORE/slow/date=YYYY-MM-DD/part-<sha16>-<n>.parquet       one row per slow reading
    STORE/scans/date=YYYY-MM-DD/part-<sha16>-<n>.parquet      one row per scan (its manifest)
    STORE/rollup/{bpm,slow}/date=YYYY-MM-DD/part-<sha16>-<n>.parquet
                                                              10-s partial aggregates
    STORE/results/<kind>/date=YYYY-MM-DD/part-*.parquet       analysis results
    STORE/quarantine/YYYY-MM-DD/<name> + <name>.error.json    copies of rejected inputs
    STORE/catalog.sqlite                                      ledger and manifest

``<sha16>`` is the start of the SHA-256 of the input (its bytes; for an image,
its bytes with its sidecar's and dark frame's; for a scan folder, all its
files), ``<n>`` numbers the date partitions one input spans.  A repeated write
of the same input therefore lands on the same names with the same bytes: ingest
is idempotent, and after a crash a rerun completes the store without duplicates.

How the store stays consistent
------------------------------
* **Atomic files.**  Every Parquet file is written under a temporary name that
  does not end in ``.parquet`` (``.<stem>.<uuid>.parquet.tmp``), flushed with
  ``fsync`` and renamed into place with :func:`os.replace`.
* **Order.**  Parquet first, then one catalog transaction that makes the files
  live, then the ledger row of the input.  A crash before the transaction
  leaves unregistered files that readers ignore and a rerun overwrites.
* **The catalog is the manifest of live files.**  Readers never list folders:
  they take the live files of a kind from ``catalog.sqlite`` (one SQLite read,
  so one consistent snapshot) and read exactly those.
* **Compaction** (:meth:`Store.compact`) writes the merged file, then in ONE
  transaction marks it live and its inputs retired, then unlinks the inputs.  A
  reader sees either the inputs or the merged file, never both.  If it took its
  snapshot just before the switch and a file vanishes under it, it takes a new
  snapshot and reads again (:meth:`Store._read_table`), so counts stay exact.
* **Scans** have a stable id (from name and timestamp).  Re-ingesting a grown
  scan folder writes a new version; the catalog records the current one and
  readers drop rows of superseded versions.

* **Rollups.**  With every BPM or slow file the store writes its 10-s
  partial aggregates (:func:`rollup_table`) and makes both live in the same
  transaction; trends over a shift read those (about 1/100 of the rows).

Tools that glob the folders themselves (DuckDB ``read_parquet('STORE/bpm/**/*.parquet')``,
Dask) read whole files only, but may for a moment count compacted rows twice
and, after a crash, see files a rerun has not registered yet; the read
functions and :meth:`Store.duckdb` views are exact.

Units are in the Arrow field metadata (``{"unit": "m"}``) and the schema
metadata carries ``schema_version``.  Reads unify the schemas of all files
(columns added later read as null), and DuckDB reads with ``union_by_name``.
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import os
import re
import shutil
import sqlite3
import sys
import time
import traceback
import uuid
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds
import pyarrow.parquet as pq

import diagnostics
from diagnostics._storeio import (
    TEMP_SUFFIX,
    Catalog,
    atomic_file,
    atomic_write_bytes,
    atomic_write_table,
    file_sha256,
    folder_sha256,
    json_text,
    schema_blob,
    schema_from_blob,
    text_sha256,
    utc_now_iso,
)
from diagnostics.errors import InputError, StoreError
from diagnostics.measurements import (
    DesignTwiss,
    Frame,
    Magnet,
    Monitor,
    ParticleSpec,
    Profile,
    ScanSpec,
    ScanStep,
)
from diagnostics.results import jsonable

#: Kinds of raw data the store holds, each a top-level folder.
STORE_KINDS = ("profiles", "frames", "bpm", "slow", "scans")

#: Version of the table layouts below; written into every file's schema metadata.
SCHEMA_VERSION = "1"

#: Column that names the device in each kind (what :meth:`Store.trend` groups by).
DEVICE_COLUMNS = {"bpm": "bpm", "slow": "channel", "profiles": "device", "frames": "device",
                  "scans": "name"}

#: Width of the rollup buckets: every BPM or slow file gets a companion file of
#: per-device, per-10-s partial aggregates (count, sum, sum of squares, min, max of
#: each numeric column), written and made live with it.  A trend whose bucket is
#: a multiple of 10 s over a window aligned to 10 s reads these instead of the
#: readings (100 readings of one BPM at 10 Hz become one row).
ROLLUP_NS = 10 * 10**9

#: The rollup kind of each readings kind (folder ``STORE/rollup/<kind>/date=.../``).
ROLLUP_KINDS = {"bpm": "rollup/bpm", "slow": "rollup/slow"}

#: How :meth:`Store.trend` may compute: from the rollups when it can (``auto``),
#: always from the rollups (``rollup``; refused when not aligned) or from the readings.
TREND_METHODS = ("auto", "rollup", "raw")

#: Statuses of an ingested input.
INGEST_STATUSES = ("stored", "duplicate", "quarantined")

#: Result kinds are folder names: lower-case letters, digits and underscores.
RESULT_KIND_PATTERN = re.compile(r"^[a-z][a-z0-9_]{0,63}$")

#: Files of a partition smaller than this are merged by :meth:`Store.compact`.
COMPACT_TARGET_BYTES = 256 * 1024 * 1024

#: Temporary files and unregistered part files older than this are removed by compaction.
STALE_AGE_S = 3600.0

#: Images per Parquet row group (a 1920x1200 16-bit frame is 4.6 MB; ECOSYSTEM.md section 2).
FRAMES_PER_ROW_GROUP = 16

#: BPM / slow readings per row group (about 18 min of 24 BPMs at 10 Hz): fine enough
#: for row-group pruning on time, coarse enough to keep the footer small.
READINGS_PER_ROW_GROUP = 262_144

_NS_PER_DAY = 86_400 * 10**9
_TS = pa.timestamp("ns", tz="UTC")

# unit of a column from the suffix of its name (SI names carry their unit)
_UNIT_SUFFIXES = (
    ("_m_rad", "m rad"), ("_per_m2", "1/m^2"), ("_T_per_m", "T/m"), ("_m_per_h", "m/h"),
    ("_rad", "rad"), ("_MeV", "MeV"), ("_Hz", "Hz"), ("_m", "m"), ("_s", "s"), ("_T", "T"),
    ("_A", "A"),
)


def _unit_of(name: str) -> str | None:
    for suffix, unit in _UNIT_SUFFIXES:
        if name.endswith(suffix):
            return unit
    return None


def _field(name: str, type_: pa.DataType, unit: str | None = None) -> pa.Field:
    unit = unit if unit is not None else _unit_of(name)
    return pa.field(name, type_, metadata={"unit": unit} if unit else None)


def _schema(fields: Sequence[pa.Field], kind: str) -> pa.Schema:
    return pa.schema(fields, metadata={"schema_version": SCHEMA_VERSION, "kind": kind})


#: Base schemas: what every file of a kind has (later versions may add nullable columns).
BPM_SCHEMA = _schema([
    _field("timestamp", _TS, "UTC"), _field("bpm", pa.string()), _field("x_m", pa.float64()),
    _field("y_m", pa.float64()), _field("sum", pa.float64(), "arb"),
], "bpm")
SLOW_SCHEMA = _schema([
    _field("timestamp", _TS, "UTC"), _field("channel", pa.string()),
    _field("value", pa.float64(), "see column 'unit'"), _field("unit", pa.string()),
], "slow")
PROFILES_SCHEMA = _schema([
    _field("id", pa.string()), _field("device", pa.string()), _field("plane", pa.string()),
    _field("wire_angle_rad", pa.float64()), _field("timestamp", _TS, "UTC"),
    _field("n_points", pa.int32()), _field("position_m", pa.list_(pa.float64()), "m"),
    _field("signal", pa.list_(pa.float64()), "arb"), _field("source", pa.string()),
    _field("sha256", pa.string()), _field("scan", pa.string()),
    _field("scan_version", pa.string()), _field("step", pa.int32()),
    _field("metadata", pa.string(), "JSON"),
], "profiles")
FRAMES_SCHEMA = _schema([
    _field("id", pa.string()), _field("device", pa.string()), _field("timestamp", _TS, "UTC"),
    _field("rows", pa.int32(), "pixel"), _field("cols", pa.int32(), "pixel"),
    _field("dtype", pa.string(), "numpy dtype, little-endian"), _field("bit_depth", pa.int16()),
    _field("pixel_size_x_m", pa.float64()), _field("pixel_size_y_m", pa.float64()),
    _field("roi", pa.list_(pa.int32()), "pixel (x_min, y_min, x_max, y_max), half-open"),
    _field("pixels", pa.large_binary(), "raw little-endian pixel bytes, row-major"),
    _field("dark", pa.large_binary(), "raw little-endian pixel bytes, row-major"),
    _field("dark_dtype", pa.string(), "numpy dtype, little-endian"),
    _field("source", pa.string()), _field("sha256", pa.string()), _field("scan", pa.string()),
    _field("scan_version", pa.string()), _field("step", pa.int32()),
    _field("metadata", pa.string(), "JSON"),
], "frames")
SCANS_SCHEMA = _schema([
    _field("scan_id", pa.string()), _field("scan_version", pa.string()),
    _field("name", pa.string()), _field("kind", pa.string()), _field("timestamp", _TS, "UTC"),
    _field("particle", pa.string(), "JSON"), _field("kinetic_energy_MeV", pa.float64()),
    _field("magnet", pa.string()), _field("magnet_length_m", pa.float64()),
    _field("monitor", pa.string()), _field("n_steps", pa.int32()),
    _field("expected_steps", pa.int32()), _field("complete", pa.bool_()),
    _field("manifest", pa.string(), "scan.json text"),
    _field("spec", pa.string(), "JSON, SI units"), _field("source", pa.string()),
    _field("sha256", pa.string()),
], "scans")
BASE_SCHEMAS = {"bpm": BPM_SCHEMA, "slow": SLOW_SCHEMA, "profiles": PROFILES_SCHEMA,
                "frames": FRAMES_SCHEMA, "scans": SCANS_SCHEMA}

# frame and profile columns that carry the arrays (left out of the indexes)
_FRAME_ARRAYS = ("pixels", "dark")
_PROFILE_ARRAYS = ("position_m", "signal")
_INTERNAL_COLUMNS = ("scan_version",)


# --------------------------------------------------------------------------- results
@dataclasses.dataclass(frozen=True)
class IngestOutcome:
    """What happened to one input of :meth:`Store.ingest`.

    Attributes
    ----------
    path : str
        The input as given (a file, or a scan folder).
    kind : str or None
        One of :data:`STORE_KINDS`, ``None`` when it could not be told.
    status : {"stored", "duplicate", "quarantined"}
        ``duplicate``: the same bytes were stored before, nothing was written.
    sha256 : str
        SHA-256 of the file (of the folder content for a scan); ``""`` if unreadable.
    rows : int
        Readings, profiles, frames or scan steps stored (0 unless stored).
    message : str
        The reason for a quarantine (one line), empty otherwise.
    outputs : tuple of str
        Parquet files written, relative to the store root.
    """

    path: str
    kind: str | None
    status: Literal["stored", "duplicate", "quarantined"]
    sha256: str
    rows: int = 0
    message: str = ""
    outputs: tuple[str, ...] = ()


@dataclasses.dataclass(frozen=True)
class IngestSummary:
    """Outcomes of :meth:`Store.ingest_many`, in input order."""

    outcomes: tuple[IngestOutcome, ...]

    @property
    def stored(self) -> list[IngestOutcome]:
        return [o for o in self.outcomes if o.status == "stored"]

    @property
    def duplicates(self) -> list[IngestOutcome]:
        return [o for o in self.outcomes if o.status == "duplicate"]

    @property
    def quarantined(self) -> list[IngestOutcome]:
        return [o for o in self.outcomes if o.status == "quarantined"]

    @property
    def rows(self) -> int:
        """Rows stored by this batch."""
        return sum(o.rows for o in self.stored)

    def line(self) -> str:
        """The one-line summary ``stored N (R rows), duplicate N, quarantined N``."""
        return (f"stored {len(self.stored)} ({self.rows} rows), duplicate {len(self.duplicates)},"
                f" quarantined {len(self.quarantined)}")


@dataclasses.dataclass(frozen=True)
class CompactedPartition:
    """One merge of :meth:`Store.compact`: ``inputs`` files into ``output``."""

    kind: str
    date: str
    inputs: int
    rows: int
    output: str


@dataclasses.dataclass(frozen=True)
class CompactSummary:
    """What :meth:`Store.compact` did.

    ``removed_files`` counts retired inputs deleted (including those a crashed
    earlier compaction left), ``removed_temp`` stale temporary or unregistered files.
    """

    partitions: tuple[CompactedPartition, ...]
    removed_files: int = 0
    removed_temp: int = 0

    @property
    def files_merged(self) -> int:
        return sum(p.inputs for p in self.partitions)

    def line(self) -> str:
        return (f"compacted {len(self.partitions)} partitions: {self.files_merged} files into"
                f" {len(self.partitions)}, removed {self.removed_files} retired and"
                f" {self.removed_temp} stale files")


# --------------------------------------------------------------------------- helpers
def _utc_required(value: Any, what: str) -> pd.Timestamp:
    """Like :func:`_utc` for a time that must be given."""
    ts = _utc(value, what)
    if ts is None:
        raise InputError(f"{what}: a time is required (expected ISO 8601)")
    return ts


def _utc(value: Any, what: str) -> pd.Timestamp | None:
    """``value`` as a UTC :class:`pandas.Timestamp` (naive = UTC); ``None`` stays ``None``."""
    if value is None:
        return None
    try:
        ts = pd.Timestamp(value)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{what}: {value!r} is not a time (expected ISO 8601, e.g. "
                         "'2026-11-30T06:00:00Z')") from exc
    if ts is pd.NaT:
        raise InputError(f"{what}: {value!r} is not a time (expected ISO 8601)")
    return ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")


def _ns(ts: pd.Timestamp) -> int:
    return int(ts.as_unit("ns").value)


def _date_of_ns(ns: int) -> str:
    return str(np.datetime64(ns // _NS_PER_DAY, "D"))


def _window(start: Any, end: Any) -> tuple[pd.Timestamp | None, pd.Timestamp | None]:
    t0, t1 = _utc(start, "start"), _utc(end, "end")
    if t0 is not None and t1 is not None and t1 < t0:
        raise InputError(f"end {t1.isoformat()} is before start {t0.isoformat()}")
    return t0, t1


def _as_list(value: str | Iterable[str] | None, what: str) -> list[str] | None:
    if value is None:
        return None
    if isinstance(value, str):
        return [value]
    out = [str(v) for v in value]
    if not out:
        raise InputError(f"{what}: empty selection (give names or None for all)")
    return out


def _quote_ident(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _sql_list(paths: Iterable[str]) -> str:
    return "[" + ", ".join("'" + p.replace("'", "''") + "'" for p in paths) + "]"


def _arrow_from_frame(df: pd.DataFrame | pa.Table, what: str) -> pa.Table:
    if isinstance(df, pa.Table):
        return df
    if not isinstance(df, pd.DataFrame):
        raise InputError(f"{what}: expected a pandas DataFrame or pyarrow Table, got "
                         f"{type(df).__name__}")
    try:
        return pa.Table.from_pandas(df, preserve_index=False)
    except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
        raise InputError(f"{what}: cannot convert the table: {exc}") from exc


def _timestamp_column(table: pa.Table, what: str) -> pa.ChunkedArray:
    if "timestamp" not in table.column_names:
        raise InputError(f"{what}: column 'timestamp' is missing (expected UTC times)")
    col = table.column("timestamp")
    if not pa.types.is_timestamp(col.type):
        raise InputError(f"{what}: column 'timestamp' has type {col.type} (expected UTC timestamps)")
    if col.type.tz is None:
        raise InputError(f"{what}: column 'timestamp' has no time zone (expected UTC)")
    if col.null_count:
        raise InputError(f"{what}: column 'timestamp' has missing values")
    return col.cast(_TS)


def _float_column(col: pa.ChunkedArray, name: str, what: str) -> pa.ChunkedArray:
    """A numeric column as float64 with NaN stored as null (so SQL aggregates skip it)."""
    try:
        col = col.cast(pa.float64())
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as exc:
        raise InputError(f"{what}: column {name!r} is not numeric ({col.type})") from exc
    nan = pc.is_nan(col)
    if pc.any(nan).as_py():
        col = pc.if_else(nan, pa.scalar(None, pa.float64()), col)
    return col


def _normalise_readings(table: pa.Table, schema: pa.Schema, what: str) -> pa.Table:
    """Cast a long-form readings table (BPM or slow) to the store's types."""
    missing = [f.name for f in schema if f.name not in table.column_names
               and f.name not in ("sum",)]
    if missing:
        raise InputError(f"{what}: column {missing[0]!r} is missing (expected "
                         f"{', '.join(f.name for f in schema)})")
    fields, arrays = [], []
    for f in schema:
        if f.name == "timestamp":
            col = _timestamp_column(table, what)
        elif f.name in table.column_names:
            col = table.column(f.name)
            if pa.types.is_floating(f.type):
                col = _float_column(col, f.name, what)
            else:
                if pa.types.is_dictionary(col.type):
                    col = col.cast(col.type.value_type)
                col = col.cast(f.type)
                if col.null_count:
                    raise InputError(f"{what}: column {f.name!r} has missing values")
        else:  # optional column absent: all null
            col = pa.chunked_array([pa.nulls(table.num_rows, f.type)])
        fields.append(f)
        arrays.append(col)
    for name in table.column_names:  # extra input columns are kept
        if schema.get_field_index(name) >= 0:
            continue
        col = table.column(name)
        if pa.types.is_dictionary(col.type):
            col = col.cast(col.type.value_type)
        if pa.types.is_large_string(col.type):
            col = col.cast(pa.string())
        if pa.types.is_floating(col.type):
            col = _float_column(col, name, what)
        if pa.types.is_timestamp(col.type) and col.type.tz is not None:
            col = col.cast(_TS)
        fields.append(_field(name, col.type))
        arrays.append(col)
    return pa.Table.from_arrays(arrays, schema=pa.schema(fields, metadata=schema.metadata))


def _sorted_by_time(table: pa.Table) -> pa.Table:
    """Sort by timestamp unless it already is (checked without copying)."""
    ts = table.column("timestamp").cast(pa.int64())
    if table.num_rows < 2:
        return table
    values = ts.to_numpy()
    if np.all(values[1:] >= values[:-1]):
        return table
    return table.sort_by([("timestamp", "ascending")])


def _is_sorted(table: pa.Table, time_key: str, name_key: str) -> bool:
    """Whether rows are sorted by (time, name), checked on neighbours without sorting."""
    ts = table.column(time_key).cast(pa.int64()).to_numpy()
    step = np.diff(ts)
    if (step < 0).any():
        return False
    tie = step == 0
    if not tie.any():
        return True
    names = table.column(name_key)
    if pa.types.is_dictionary(names.type) and names.num_chunks:
        # compare ranks in the (unified) dictionary instead of the strings
        values = names.chunk(0).dictionary.to_numpy(zero_copy_only=False)
        rank = np.empty(len(values), np.int32)
        rank[np.argsort(values, kind="stable")] = np.arange(len(values), dtype=np.int32)
        r = rank[np.concatenate([c.indices.to_numpy(zero_copy_only=False)
                                 for c in names.chunks])]
        return not bool((tie & (r[1:] < r[:-1])).any())
    ties = np.flatnonzero(tie)
    before, after = names.take(pa.array(ties)), names.take(pa.array(ties + 1))
    return bool(pc.all(pc.less_equal(before, after)).as_py())


def _split_by_date(table: pa.Table) -> list[tuple[str, pa.Table]]:
    """(date, rows) pairs of a table sorted by time, split at UTC midnights."""
    if table.num_rows == 0:
        return []
    ns = table.column("timestamp").cast(pa.int64()).to_numpy()
    days = ns // _NS_PER_DAY
    if days[0] == days[-1] and (len(days) < 3 or np.all(days == days[0])):
        return [(_date_of_ns(int(ns[0])), table)]
    if np.all(days[1:] >= days[:-1]):  # sorted: contiguous slices
        cuts = np.flatnonzero(np.diff(days)) + 1
        bounds = [0, *cuts.tolist(), len(days)]
        return [(_date_of_ns(int(ns[a])), table.slice(a, b - a))
                for a, b in zip(bounds[:-1], bounds[1:], strict=True)]
    out = []
    for day in np.unique(days):
        mask = pa.array(days == day)
        out.append((_date_of_ns(int(day) * _NS_PER_DAY), table.filter(mask)))
    return out


def rollup_table(table: pa.Table, device_column: str) -> pa.Table:
    """Per device and :data:`ROLLUP_NS` bucket: count, sum, sum of squares, min, max.

    For each numeric column ``c`` (nulls and NaN skipped) the result has ``c__n``
    (int64), ``c__sum``, ``c__sumsq``, ``c__min``, ``c__max`` (float64, null when the
    bucket has no value); ``timestamp`` is the bucket start.  Combining rows of
    several files is exact up to rounding: sums add, minima take the minimum.
    """
    ts = table.column("timestamp").cast(pa.int64()).to_numpy()
    enc = pc.dictionary_encode(table.column(device_column).combine_chunks())
    codes = enc.indices.to_numpy(zero_copy_only=False).astype(np.int64)
    n_dev = max(len(enc.dictionary), 1)
    buckets = ts // ROLLUP_NS  # floor, also before 1970
    b0 = int(buckets.min()) if len(buckets) else 0
    key = (buckets - b0) * n_dev + codes
    n_keys = int(key.max()) + 1 if len(key) else 0
    uniq = None
    if n_keys > 4 * len(key) + 1024:  # sparse in time: compact the keys first
        uniq, key = np.unique(key, return_inverse=True)
        n_keys = len(uniq)
    occupied = np.flatnonzero(np.bincount(key, minlength=n_keys))
    raw_key = occupied if uniq is None else uniq[occupied]
    fields = [_field("timestamp", _TS, "UTC (bucket start)"), _field(device_column, pa.string())]
    arrays = [pa.array((raw_key // n_dev + b0) * ROLLUP_NS, pa.int64()).cast(_TS),
              enc.dictionary.cast(pa.string()).take(pa.array(raw_key % n_dev))]
    for f in table.schema:
        if f.name == "timestamp" or not (pa.types.is_floating(f.type) or pa.types.is_integer(f.type)):
            continue
        v = table.column(f.name).to_numpy().astype(np.float64, copy=False)
        ok = ~np.isnan(v)
        count = np.bincount(key, weights=ok, minlength=n_keys)[occupied].astype(np.int64)
        v0 = np.where(ok, v, 0.0)
        total = np.bincount(key, weights=v0, minlength=n_keys)[occupied]
        squares = np.bincount(key, weights=v0 * v0, minlength=n_keys)[occupied]
        lo = np.full(n_keys, np.nan)
        hi = np.full(n_keys, np.nan)
        np.fmin.at(lo, key, v)  # fmin/fmax skip NaN
        np.fmax.at(hi, key, v)
        empty = count == 0
        unit = _unit_of(f.name)
        for suffix, values, u in (("__sum", total, unit), ("__sumsq", squares,
                                  None if unit is None else f"({unit})^2"),
                                  ("__min", lo[occupied], unit), ("__max", hi[occupied], unit)):
            fields.append(_field(f.name + suffix, pa.float64(), u or "arb"))
            arrays.append(pa.array(values, pa.float64(), mask=empty))
        fields.append(_field(f.name + "__n", pa.int64(), "count"))
        arrays.append(pa.array(count, pa.int64()))
    return pa.Table.from_arrays(arrays, schema=pa.schema(
        fields, metadata={"schema_version": SCHEMA_VERSION, "kind": "rollup",
                          "rollup_ns": str(ROLLUP_NS)}))


def _json_or_none(value: Any) -> str | None:
    return None if value is None else json_text(jsonable(value))


def _matrix_list(m: np.ndarray | None) -> list[list[float]] | None:
    return None if m is None else np.asarray(m, dtype=float).tolist()


def _matrix_array(m: Any) -> np.ndarray | None:
    return None if m is None else np.asarray(m, dtype=float)


def _reader_version() -> str:
    try:
        from diagnostics import readers
    except ImportError:
        return diagnostics.__version__
    return str(getattr(readers, "READER_VERSION", getattr(readers, "__version__",
                                                          diagnostics.__version__)))


def _input_identity(path: Path, readers: Any) -> tuple[str, int, int, list[dict[str, Any]]]:
    """``(sha256, size, mtime_ns, parts)`` identifying one input by its content.

    A file is its bytes.  A scan folder is :func:`folder_sha256` of its files.  An
    image is its bytes together with its sidecar's and the dark frame's (so two
    identical frames with different sidecars, e.g. times, are two inputs).
    """
    if path.is_dir():
        stats = [p.stat() for p in path.rglob("*") if p.is_file()]
        size = sum(s.st_size for s in stats)
        mtime = max((s.st_mtime_ns for s in stats), default=path.stat().st_mtime_ns)
        return folder_sha256(path), size, mtime, [
            {"path": path, "role": "scan folder", "sha256": None}]
    st = path.stat()
    own = file_sha256(path)
    parts = [{"path": path, "role": "input", "sha256": own}]
    if path.suffix.lower() in readers.screen.IMAGE_SUFFIXES:
        side = readers.screen.sidecar_path(path)
        with contextlib.suppress(OSError, ValueError, RecursionError):
            parts.append({"path": side, "role": "sidecar", "sha256": file_sha256(side)})
            doc = json.loads(side.read_text(encoding="utf-8-sig"))
            if isinstance(doc, dict) and isinstance(doc.get("dark"), str):
                # the reader's own containment rule: a dark frame outside the sidecar's
                # folder is never opened, not even to hash it (the reader refuses it)
                dark = readers._util.inside(side.parent, doc["dark"], side, "dark")
                parts.append({"path": dark, "role": "dark", "sha256": file_sha256(dark)})
    if len(parts) == 1:
        return own, st.st_size, st.st_mtime_ns, parts
    sha = text_sha256("image", *(f"{p['role']}:{p['sha256']}" for p in parts))
    size = sum(int(Path(str(p["path"])).stat().st_size) for p in parts)
    mtime = max(int(Path(str(p["path"])).stat().st_mtime_ns) for p in parts)
    return sha, size, mtime, parts


def _readers() -> Any:
    """The reader modules (imported on first use: the store works without them)."""
    import importlib

    try:
        package = importlib.import_module("diagnostics.readers")
    except ImportError as exc:  # the readers are part of the package
        raise StoreError(f"the readers cannot be imported: {exc}") from exc
    return package


def _pixel_bytes(array: np.ndarray, what: str) -> tuple[bytes, str]:
    """Pixels as little-endian row-major bytes plus the dtype string that reads them back."""
    arr = np.asarray(array)
    if arr.ndim != 2:
        raise InputError(f"{what}: pixels have shape {arr.shape} (expected (rows, cols))")
    if arr.dtype.kind not in "uif" or arr.dtype.itemsize > 8:
        raise InputError(f"{what}: pixels have dtype {arr.dtype} (expected unsigned, signed "
                         "integer or float)")
    little = arr.dtype.newbyteorder("<")
    arr = np.ascontiguousarray(arr, dtype=little)
    return arr.tobytes(), little.str


def _pixels_from(buf: bytes | memoryview, dtype: str, rows: int, cols: int) -> np.ndarray:
    arr = np.frombuffer(buf, dtype=np.dtype(dtype)).reshape(rows, cols)
    return arr.astype(np.dtype(dtype).newbyteorder("="), copy=True)


# --------------------------------------------------------------------------- domain <-> Arrow
def _profiles_table(
    profiles: Sequence[Profile], *, sha256: str, source: str, scan: str | None,
    scan_version: str | None, steps: Sequence[int | None], ids: Sequence[str],
) -> pa.Table:
    cols: dict[str, list[Any]] = {f.name: [] for f in PROFILES_SCHEMA}
    for i, p in enumerate(profiles):
        what = f"{source}: profile {i}"
        if not isinstance(p, Profile):
            raise InputError(f"{what}: expected a Profile, got {type(p).__name__}")
        pos = np.asarray(p.position_m, dtype=np.float64)
        sig = np.asarray(p.signal, dtype=np.float64)
        if pos.ndim != 1 or pos.shape != sig.shape:
            raise InputError(f"{what}: position_m {pos.shape} and signal {sig.shape} must be "
                             "1-D and of equal length")
        ts = _utc_required(p.timestamp, f"{what}: timestamp")
        cols["id"].append(ids[i])
        cols["device"].append(str(p.device))
        cols["plane"].append(str(p.plane))
        cols["wire_angle_rad"].append(float(p.wire_angle_rad))
        cols["timestamp"].append(ts)
        cols["n_points"].append(int(pos.size))
        cols["position_m"].append(pos)
        cols["signal"].append(sig)
        cols["source"].append(p.source or source)
        cols["sha256"].append(sha256)
        cols["scan"].append(scan)
        cols["scan_version"].append(scan_version)
        cols["step"].append(steps[i])
        cols["metadata"].append(json_text(jsonable(dict(p.metadata))))
    arrays = []
    for f in PROFILES_SCHEMA:
        if f.name in _PROFILE_ARRAYS:
            values = cols[f.name]
            offsets = np.zeros(len(values) + 1, dtype=np.int32)
            np.cumsum([v.size for v in values], out=offsets[1:])
            flat = np.concatenate(values) if values else np.zeros(0)
            arrays.append(pa.ListArray.from_arrays(pa.array(offsets), pa.array(flat)))
        elif f.name == "timestamp":
            arrays.append(pa.array([t.as_unit("ns").value for t in cols[f.name]],
                                   pa.int64()).cast(_TS))
        else:
            arrays.append(pa.array(cols[f.name], f.type))
    return pa.Table.from_arrays(arrays, schema=PROFILES_SCHEMA)


def _frames_table(
    frames: Sequence[Frame], *, sha256: str, source: str, scan: str | None,
    scan_version: str | None, steps: Sequence[int | None], ids: Sequence[str],
) -> pa.Table:
    cols: dict[str, list[Any]] = {f.name: [] for f in FRAMES_SCHEMA}
    for i, fr in enumerate(frames):
        what = f"{source}: frame {i}"
        if not isinstance(fr, Frame):
            raise InputError(f"{what}: expected a Frame, got {type(fr).__name__}")
        data, dtype = _pixel_bytes(fr.pixels, what)
        rows, cols_ = np.shape(fr.pixels)
        if fr.dark is not None:
            if np.shape(fr.dark) != (rows, cols_):
                raise InputError(f"{what}: dark frame has shape {np.shape(fr.dark)} (expected "
                                 f"{(rows, cols_)})")
            dark, dark_dtype = _pixel_bytes(fr.dark, f"{what} dark")
        else:
            dark, dark_dtype = None, None
        px = tuple(float(v) for v in np.broadcast_to(np.asarray(fr.pixel_size_m, float), (2,)))
        cols["id"].append(ids[i])
        cols["device"].append(str(fr.device))
        cols["timestamp"].append(_ns(_utc_required(fr.timestamp, f"{what}: timestamp")))
        cols["rows"].append(rows)
        cols["cols"].append(cols_)
        cols["dtype"].append(dtype)
        cols["bit_depth"].append(None if fr.bit_depth is None else int(fr.bit_depth))
        cols["pixel_size_x_m"].append(px[0])
        cols["pixel_size_y_m"].append(px[1])
        cols["roi"].append(None if fr.roi is None else [int(v) for v in fr.roi])
        cols["pixels"].append(data)
        cols["dark"].append(dark)
        cols["dark_dtype"].append(dark_dtype)
        cols["source"].append(fr.source or source)
        cols["sha256"].append(sha256)
        cols["scan"].append(scan)
        cols["scan_version"].append(scan_version)
        cols["step"].append(steps[i])
        cols["metadata"].append(json_text(jsonable(dict(fr.metadata))))
    arrays = []
    for f in FRAMES_SCHEMA:
        if f.name == "timestamp":
            arrays.append(pa.array(cols[f.name], pa.int64()).cast(_TS))
        else:
            arrays.append(pa.array(cols[f.name], f.type))
    return pa.Table.from_arrays(arrays, schema=FRAMES_SCHEMA)


def _profile_from_row(row: Mapping[str, Any], position: np.ndarray, signal: np.ndarray) -> Profile:
    return Profile(
        device=row["device"], plane=row["plane"], wire_angle_rad=float(row["wire_angle_rad"]),
        timestamp=pd.Timestamp(row["timestamp"]).tz_convert("UTC"),
        position_m=position, signal=signal, source=row["source"] or "",
        metadata=json.loads(row["metadata"]) if row["metadata"] else {},
    )


def _frame_from_row(row: Mapping[str, Any]) -> Frame:
    rows, cols = int(row["rows"]), int(row["cols"])
    dark = None
    if row["dark"] is not None:
        dark = _pixels_from(row["dark"], row["dark_dtype"], rows, cols)
    roi = row["roi"]
    return Frame(
        device=row["device"], timestamp=pd.Timestamp(row["timestamp"]).tz_convert("UTC"),
        pixels=_pixels_from(row["pixels"], row["dtype"], rows, cols),
        pixel_size_m=(float(row["pixel_size_x_m"]), float(row["pixel_size_y_m"])),
        bit_depth=None if row["bit_depth"] is None else int(row["bit_depth"]),
        dark=dark, roi=None if roi is None else (int(roi[0]), int(roi[1]), int(roi[2]),
                                                   int(roi[3])),
        source=row["source"] or "",
        metadata=json.loads(row["metadata"]) if row["metadata"] else {},
    )


def scan_id_of(spec: ScanSpec) -> str:
    """The stable id of a scan: 16 hex digits from its name and timestamp.

    A scan folder that grows (steps added while it is measured) keeps its id;
    each ingest of it is a new *version* (its content hash).
    """
    ts = _utc_required(spec.timestamp, f"scan {spec.name!r}: timestamp")
    return text_sha256("scan", str(spec.name), ts.isoformat())[:16]


def _spec_json(spec: ScanSpec, step_refs: Sequence[Mapping[str, str | None]]) -> dict[str, Any]:
    """A ScanSpec as JSON-ready data, profiles and frames replaced by their store ids."""
    def opt(v: Any) -> float | None:
        return None if v is None else float(v)

    steps = []
    for step, refs in zip(spec.steps, step_refs, strict=True):
        steps.append({
            "index": int(step.index), "k1_per_m2": opt(step.k1_per_m2),
            "gradient_T_per_m": opt(step.gradient_T_per_m), "field_T": opt(step.field_T),
            "monitor": step.monitor, "sigma_x_m": opt(step.sigma_x_m),
            "sigma_y_m": opt(step.sigma_y_m), "sigma_x_err_m": opt(step.sigma_x_err_m),
            "sigma_y_err_m": opt(step.sigma_y_err_m), **refs,
        })
    return {
        "kind": spec.kind, "name": spec.name,
        "timestamp": _utc_required(spec.timestamp, "scan timestamp").isoformat(),
        "particle": dataclasses.asdict(spec.particle),
        "kinetic_energy_MeV": float(spec.kinetic_energy_MeV),
        "energy_spread": opt(spec.energy_spread),
        "magnet": None if spec.magnet is None else dataclasses.asdict(spec.magnet),
        "transport_x": _matrix_list(spec.transport_x), "transport_y": _matrix_list(spec.transport_y),
        "monitors": [{"name": m.name, "resolution_m": float(m.resolution_m),
                      "matrix_x": _matrix_list(m.matrix_x), "matrix_y": _matrix_list(m.matrix_y)}
                     for m in spec.monitors],
        "design": {plane: {"beta_m": float(d.beta_m), "alpha": float(d.alpha)}
                   for plane, d in spec.design.items()},
        "expected_steps": spec.expected_steps, "complete": bool(spec.complete),
        "folder": spec.folder, "steps": steps,
    }


def _spec_from_json(data: Mapping[str, Any], profiles: Mapping[str, Profile],
                    frames: Mapping[str, Frame]) -> ScanSpec:
    steps = []
    for s in data["steps"]:
        refs = {k: s.get(k) for k in ("profile_x", "profile_y", "frame")}
        steps.append(ScanStep(
            index=s["index"], k1_per_m2=s["k1_per_m2"], gradient_T_per_m=s["gradient_T_per_m"],
            field_T=s["field_T"], monitor=s["monitor"],
            profile_x=profiles.get(refs["profile_x"]) if refs["profile_x"] else None,
            profile_y=profiles.get(refs["profile_y"]) if refs["profile_y"] else None,
            frame=frames.get(refs["frame"]) if refs["frame"] else None,
            sigma_x_m=s["sigma_x_m"], sigma_y_m=s["sigma_y_m"],
            sigma_x_err_m=s["sigma_x_err_m"], sigma_y_err_m=s["sigma_y_err_m"],
        ))
    magnet = data["magnet"]
    return ScanSpec(
        kind=data["kind"], name=data["name"], timestamp=pd.Timestamp(data["timestamp"]),
        particle=ParticleSpec(**data["particle"]),
        kinetic_energy_MeV=data["kinetic_energy_MeV"],
        magnet=None if magnet is None else Magnet(**magnet),
        transport_x=_matrix_array(data["transport_x"]),
        transport_y=_matrix_array(data["transport_y"]),
        monitors=tuple(Monitor(name=m["name"], resolution_m=m["resolution_m"],
                               matrix_x=_matrix_array(m["matrix_x"]),
                               matrix_y=_matrix_array(m["matrix_y"])) for m in data["monitors"]),
        steps=tuple(steps),
        design={p: DesignTwiss(**d) for p, d in data["design"].items()},
        energy_spread=data["energy_spread"], expected_steps=data["expected_steps"],
        complete=data["complete"], folder=data["folder"],
    )


def _records_table(records: Sequence[Mapping[str, Any]] | pd.DataFrame, what: str) -> pa.Table:
    """Flat result records as an Arrow table; nested values become JSON text."""
    if isinstance(records, pd.DataFrame):
        records = records.to_dict("records")
    keys: dict[str, None] = {}
    for r in records:
        if not isinstance(r, Mapping):
            raise InputError(f"{what}: records must be dicts (got {type(r).__name__})")
        for k in r:
            keys.setdefault(str(k), None)
    arrays, fields = [], []
    for key in keys:
        values = [jsonable(r.get(key)) for r in records]
        if any(isinstance(v, (dict, list)) for v in values):
            values = [None if v is None else json_text(v) for v in values]
            arr = pa.array(values, pa.string())
            unit = "JSON"
        elif key == "timestamp" or key.endswith("_time"):
            try:
                stamps = pd.to_datetime(pd.Series(values, dtype=object), utc=True,
                                        format="ISO8601")
            except (TypeError, ValueError) as exc:
                raise InputError(f"{what}: field {key!r} holds a value that is not an ISO 8601 "
                                 f"time: {exc}") from exc
            arr = pa.array(stamps.dt.as_unit("ns"), _TS)
            unit = "UTC"
        else:
            try:
                arr = pa.array(values)
            except (pa.ArrowInvalid, pa.ArrowTypeError):
                arr = pa.array([None if v is None else json_text(v) for v in values], pa.string())
            # an all-null column stays of type null: it unifies with any later type
            if pa.types.is_large_string(arr.type):
                arr = arr.cast(pa.string())
            unit = None
        arrays.append(arr)
        fields.append(_field(key, arr.type, unit))
    return pa.Table.from_arrays(arrays, schema=pa.schema(fields))


# --------------------------------------------------------------------------- input discovery
def _input_suffixes(readers: Any) -> set[str]:
    util = readers._util
    return {*util.CSV_SUFFIXES, *util.PARQUET_SUFFIXES, *readers.screen.IMAGE_SUFFIXES}


def _referenced_darks(files: Sequence[Path], readers: Any) -> set[Path]:
    """Dark frames named by any image sidecar among ``files`` (in any folder)."""
    darks: set[Path] = set()
    images = {(f.parent, f.stem) for f in files
              if f.suffix.lower() in readers.screen.IMAGE_SUFFIXES}
    for folder in {f.parent for f in files}:
        with contextlib.suppress(OSError):
            for side in folder.glob("*.json"):
                if (folder, side.stem) not in images:
                    continue
                with contextlib.suppress(OSError, ValueError, UnicodeDecodeError,
                                         RecursionError):
                    doc = json.loads(side.read_text(encoding="utf-8-sig"))
                    if isinstance(doc, dict) and isinstance(doc.get("dark"), str):
                        darks.add((folder / doc["dark"]).resolve())
    return darks


def collect_inputs(paths: Iterable[str | Path]) -> list[Path]:
    """The inputs under ``paths``, each once, in order.

    Folders are walked with :func:`diagnostics.readers.iter_inputs`: recursively
    in sorted order, a scan folder (with ``scan.json``) as one input, image
    sidecars, the dark frames they name and hidden or partial files skipped.
    Below a folder, this also skips dark frames that a sidecar in another
    folder names (``"dark": "darks/SCR-01_dark.png"``) and files whose suffix no
    reader takes (``README.md``, notes): they are no measurement.  Files named
    explicitly are kept unless they are a sidecar, a dark frame named by a
    sidecar among them, or inside a scan folder; a missing one is kept too
    (ingest reports it).  The sidecars of a folder are read once, however many
    of its files are named, so a list of thousands of images stays fast.
    """
    readers = _readers()
    suffixes = _input_suffixes(readers)
    inputs = [Path(p) for p in paths]
    files = [p for p in inputs if not p.is_dir()]
    darks = _referenced_darks([f for f in files if f.is_file()], readers)
    images = {(f.parent, f.stem.lower()) for f in files
              if f.suffix.lower() in readers.screen.IMAGE_SUFFIXES}
    scan_folder: dict[Path, bool] = {}

    def in_scan_folder(p: Path) -> bool:
        for parent in p.absolute().parents:
            if parent not in scan_folder:
                scan_folder[parent] = readers.scan.is_scan_folder(parent)
            if scan_folder[parent]:
                return True
        return False

    def sidecar(p: Path) -> bool:
        return p.suffix.lower() == ".json" and (
            (p.parent, p.stem.lower()) in images
            or any(p.with_suffix(x).is_file() for x in readers.screen.IMAGE_SUFFIXES))

    out: list[Path] = []
    seen: set[Path] = set()
    for raw in inputs:
        if raw.is_dir():
            found = list(readers.iter_inputs([raw]))
            if not readers.scan.is_scan_folder(raw):
                walked_darks = _referenced_darks([f for f in found if f.is_file()], readers)
                found = [f for f in found if f.is_dir() or (
                    f.suffix.lower() in suffixes and f.resolve() not in walked_darks)]
        elif raw.exists() and (sidecar(raw) or raw.resolve() in darks or in_scan_folder(raw)):
            found = []
        else:
            found = [raw]
        for p in found:
            key = p.resolve() if p.exists() else p
            if key not in seen:
                seen.add(key)
                out.append(p)
    return out


class _Progress:
    """A one-line progress counter on stderr, updated in place (only on a TTY)."""

    def __init__(self, total: int, enabled: bool):
        self.total, self.enabled = total, enabled
        self.last = 0.0

    def update(self, done: int, summary: IngestSummary) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if done < self.total and now - self.last < 0.2:
            return
        self.last = now
        sys.stderr.write(f"\ringest {done}/{self.total}: {summary.line()}\x1b[K")
        sys.stderr.flush()

    def close(self) -> None:
        if self.enabled:
            sys.stderr.write("\n")
            sys.stderr.flush()


# --------------------------------------------------------------------------- the store
class Store:
    """A beamdiag Parquet store in one folder.

    Parameters
    ----------
    root : str or Path
        The store folder.
    create : bool
        Create the folder and catalog when missing (default).  With ``False`` a
        missing store raises :class:`~diagnostics.errors.StoreError`.
    read_only : bool
        Open for reading only (the dashboard): writers raise ``StoreError`` and the
        catalog is opened read-only.

    Examples
    --------
    >>> import tempfile
    >>> store = Store(tempfile.mkdtemp())
    >>> store.read_bpm().columns.tolist()
    ['timestamp', 'bpm', 'x_m', 'y_m', 'sum']
    """

    def __init__(self, root: str | Path, *, create: bool = True, read_only: bool = False):
        self.root = Path(root).expanduser().resolve()
        self.read_only = read_only
        catalog = self.root / "catalog.sqlite"
        if not catalog.exists() and (read_only or not create):
            raise StoreError(f"{self.root}: no beamdiag store here (catalog.sqlite is missing)")
        if not read_only:
            try:
                self.root.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise StoreError(f"{self.root}: cannot create the store: {exc}") from exc
        self._catalog = Catalog(catalog, read_only=read_only)

    def __repr__(self) -> str:
        return f"Store({str(self.root)!r}{', read_only=True' if self.read_only else ''})"

    # ------------------------------------------------------------------ writing core
    def _check_writable(self) -> None:
        if self.read_only:
            raise StoreError(f"{self.root}: store opened read-only")

    def _write_files(self, kind: str, parts: Sequence[tuple[str, pa.Table]], prefix: str,
                     **write_options: Any) -> list[dict[str, Any]]:
        """Write (date, table) parts atomically; return catalog entries (not yet live).

        ``prefix`` is the input's SHA-256: files are ``part-<sha[:16]>-<n>.parquet``,
        or ``part-<sha>-<n>.parquet`` if another input already owns the short name.
        """
        entries = []
        for n, (date, table) in enumerate(parts):
            rel = f"{kind}/date={date}/part-{prefix[:16]}-{n}.parquet"
            owners = {r["sha256"] for r in self._catalog.query(
                "SELECT sha256 FROM file_sources WHERE path = ?", (rel,))}
            if owners - {prefix}:  # 64-bit prefix clash with another input: use the full hash
                rel = f"{kind}/date={date}/part-{prefix}-{n}.parquet"
            path = atomic_write_table(table, self.root / rel, **write_options)
            ts = table.column("timestamp").cast(pa.int64())
            bounds = pc.min_max(ts)
            entries.append({
                "path": rel, "kind": kind, "date": date, "rows": table.num_rows,
                "tmin_ns": bounds["min"].as_py(), "tmax_ns": bounds["max"].as_py(),
                "bytes": path.stat().st_size, "schema": schema_blob(table.schema),
            })
        return entries

    def _existing(self, sha256: str, kind: str) -> list[Path] | None:
        paths = self._catalog.live_files_of_source(sha256, kind)
        return [self.root / p for p in paths] if paths else None

    def _write_readings(self, kind: str, df: pd.DataFrame | pa.Table, schema: pa.Schema, *,
                        sha256: str, source: str) -> list[Path]:
        self._check_writable()
        if existing := self._existing(sha256, kind):
            return existing
        what = f"{source or kind}"
        table = _normalise_readings(_arrow_from_frame(df, what), schema, what)
        table = table.replace_schema_metadata({**schema.metadata, b"source": source.encode()})
        parts = _split_by_date(_sorted_by_time(table))
        entries = self._write_files(kind, parts, sha256, **_readings_write(table.schema))
        rollups = [(date, rollup_table(part, DEVICE_COLUMNS[kind])) for date, part in parts]
        rollup_entries = self._write_files(ROLLUP_KINDS[kind], rollups, sha256,
                                           **_readings_write(rollups[0][1].schema)
                                           ) if rollups else []
        with self._catalog.connect() as con:  # raw files and their rollups go live together
            self._catalog.register_files(con, entries + rollup_entries, [sha256])
        return [self.root / e["path"] for e in entries]

    # ------------------------------------------------------------------ writers
    def write_bpm(self, df: pd.DataFrame | pa.Table, *, sha256: str, source: str) -> list[Path]:
        """Store BPM readings (the BPM table contract of :mod:`diagnostics.measurements`).

        Parameters
        ----------
        df : pandas.DataFrame or pyarrow.Table
            ``timestamp`` (UTC), ``bpm``, ``x_m``, ``y_m`` and optional ``sum``;
            extra columns are kept.
        sha256 : str
            Hash of the input the readings came from: names the files and makes
            the write idempotent (a second call with the same hash writes nothing).
        source : str
            The input's path, kept in the file metadata.

        Returns
        -------
        list of Path
            The Parquet files holding these readings (one per UTC date).
        """
        return self._write_readings("bpm", df, BPM_SCHEMA, sha256=sha256, source=source)

    def write_slow(self, df: pd.DataFrame | pa.Table, *, sha256: str, source: str) -> list[Path]:
        """Store slow-channel readings (``timestamp, channel, value, unit``); see :meth:`write_bpm`."""
        return self._write_readings("slow", df, SLOW_SCHEMA, sha256=sha256, source=source)

    def _profile_parts(self, profiles, *, sha256, source, scan, scan_version, steps, ids):
        table = _profiles_table(profiles, sha256=sha256, source=source, scan=scan,
                                scan_version=scan_version, steps=steps, ids=ids)
        return _split_by_date(_sorted_by_time(table))

    def _frame_parts(self, frames, *, sha256, source, scan, scan_version, steps, ids):
        table = _frames_table(frames, sha256=sha256, source=source, scan=scan,
                              scan_version=scan_version, steps=steps, ids=ids)
        return _split_by_date(_sorted_by_time(table))

    def write_profiles(self, profiles: Sequence[Profile], *, sha256: str, source: str,
                       scan: str | None = None, step: int | None = None) -> list[Path]:
        """Store wire-scanner profiles, one row each (positions and signal as lists).

        Ids are ``<sha16>-<i>`` (``<scan>-s<step>-<i>`` when tagged with a scan).
        Idempotent per ``sha256``, like :meth:`write_bpm`.
        """
        self._check_writable()
        if existing := self._existing(sha256, "profiles"):
            return existing
        prefix = sha256[:16] if scan is None else f"{scan}-s{step}"
        ids = [f"{prefix}-{i}" for i in range(len(profiles))]
        parts = self._profile_parts(profiles, sha256=sha256, source=source, scan=scan,
                                    scan_version=None, steps=[step] * len(profiles), ids=ids)
        entries = self._write_files("profiles", parts, sha256)
        with self._catalog.connect() as con:
            self._catalog.register_files(con, entries, [sha256])
        return [self.root / e["path"] for e in entries]

    def write_frames(self, frames: Sequence[Frame], *, sha256: str, source: str,
                     scan: str | None = None, step: int | None = None) -> list[Path]:
        """Store screen images losslessly: raw pixel bytes with dtype and shape.

        Pixels go in little-endian byte order with their dtype (``<u2``, ``|u1``,
        ``<f4``, ...) so a frame read back is bit-identical to the input values.
        Idempotent per ``sha256``, like :meth:`write_bpm`.
        """
        self._check_writable()
        if existing := self._existing(sha256, "frames"):
            return existing
        prefix = sha256[:16] if scan is None else f"{scan}-s{step}"
        ids = [f"{prefix}-{i}" for i in range(len(frames))]
        parts = self._frame_parts(frames, sha256=sha256, source=source, scan=scan,
                                  scan_version=None, steps=[step] * len(frames), ids=ids)
        entries = self._write_files("frames", parts, sha256, **_FRAME_WRITE)
        with self._catalog.connect() as con:
            self._catalog.register_files(con, entries, [sha256])
        return [self.root / e["path"] for e in entries]

    def write_scan(self, spec: ScanSpec, *, sha256: str, source: str) -> list[Path]:
        """Store a scan: its manifest row in ``scans/`` and its steps' profiles and frames.

        The manifest keeps the ``scan.json`` text (when the folder is readable),
        parsed fields (name, kind, magnet, monitor, steps, completeness) and the
        full specification as JSON (optics, strengths, measured sizes, and the ids
        of the stored profiles and frames).  Profiles and frames are tagged with
        the scan id (:func:`scan_id_of`) and step index.  The new version becomes
        the scan's current one in the same catalog transaction that makes its
        files live.
        """
        self._check_writable()
        if existing := self._existing(sha256, "scans"):
            return existing + (self._existing(sha256, "profiles") or []) + (
                self._existing(sha256, "frames") or [])
        scan_id = scan_id_of(spec)
        profiles, p_ids, p_steps, frames, f_ids, f_steps, refs = [], [], [], [], [], [], []
        for step in spec.steps:
            ref: dict[str, str | None] = {"profile_x": None, "profile_y": None, "frame": None}
            for key, prof in (("profile_x", step.profile_x), ("profile_y", step.profile_y)):
                if prof is not None:
                    ref[key] = f"{scan_id}-s{step.index}-{key[-1]}"
                    profiles.append(prof)
                    p_ids.append(ref[key])
                    p_steps.append(step.index)
            if step.frame is not None:
                ref["frame"] = f"{scan_id}-s{step.index}-f"
                frames.append(step.frame)
                f_ids.append(ref["frame"])
                f_steps.append(step.index)
            refs.append(ref)
        manifest = None
        for folder in (source, spec.folder):
            with contextlib.suppress(OSError, UnicodeDecodeError):
                if folder:
                    manifest = (Path(folder) / "scan.json").read_text(encoding="utf-8")
                    break
        ts = _utc_required(spec.timestamp, f"{source}: scan timestamp")
        row = {
            "scan_id": scan_id, "scan_version": sha256, "name": spec.name, "kind": spec.kind,
            "timestamp": _ns(ts), "particle": json_text(dataclasses.asdict(spec.particle)),
            "kinetic_energy_MeV": float(spec.kinetic_energy_MeV),
            "magnet": None if spec.magnet is None else spec.magnet.name,
            "magnet_length_m": None if spec.magnet is None else float(spec.magnet.length_m),
            "monitor": ",".join(m.name for m in spec.monitors), "n_steps": len(spec.steps),
            "expected_steps": spec.expected_steps, "complete": bool(spec.complete),
            "manifest": manifest, "spec": json_text(_spec_json(spec, refs)),
            "source": source, "sha256": sha256,
        }
        scan_table = pa.Table.from_arrays(
            [pa.array([row[f.name]], pa.int64()).cast(_TS) if f.name == "timestamp"
             else pa.array([row[f.name]], f.type) for f in SCANS_SCHEMA], schema=SCANS_SCHEMA)
        entries = self._write_files("scans", _split_by_date(scan_table), sha256)
        if profiles:
            parts = self._profile_parts(profiles, sha256=sha256, source=source, scan=scan_id,
                                        scan_version=sha256, steps=p_steps, ids=p_ids)
            entries += self._write_files("profiles", parts, sha256)
        if frames:
            parts = self._frame_parts(frames, sha256=sha256, source=source, scan=scan_id,
                                      scan_version=sha256, steps=f_steps, ids=f_ids)
            entries += self._write_files("frames", parts, sha256, **_FRAME_WRITE)
        with self._catalog.connect() as con:
            self._catalog.register_files(con, entries, [sha256])
            con.execute("INSERT OR REPLACE INTO scans (scan_id, sha256, name, time) VALUES"
                        " (?, ?, ?, ?)", (scan_id, sha256, spec.name, utc_now_iso()))
        return [self.root / e["path"] for e in entries]

    def write_results(self, kind: str, records: Sequence[Mapping[str, Any]] | pd.DataFrame, *,
                      options: Mapping[str, Any] | None = None,
                      version: str | None = None) -> Path:
        """Store analysis results of one kind as one Parquet file.

        Parameters
        ----------
        kind : str
            Result kind (``profiles``, ``frames``, ``scans``, ``orbit``, ...): a
            folder name of lower-case letters, digits and ``_``.
        records : sequence of dict or DataFrame
            Flat records (:func:`diagnostics.results.to_record`); nested values are
            stored as JSON text, a ``timestamp`` (ISO 8601 text or datetime) as UTC.
        options : mapping, optional
            The analysis options, stored as JSON text on every row.
        version : str, optional
            Result-set version id.  Default: 16 hex digits from the options and the
            code version, so a rerun with the same options adds to the same set.

        Returns
        -------
        Path
            ``results/<kind>/date=YYYY-MM-DD/part-<version>-<content16>.parquet``;
            the date is that of the earliest ``timestamp`` (today without one).
            The same records under the same version give the same file name, so a
            repeated call replaces rather than duplicates.
        """
        self._check_writable()
        if not isinstance(kind, str) or not RESULT_KIND_PATTERN.match(kind):
            raise InputError(f"write_results: kind {kind!r} is not a result kind (expected "
                             "lower-case letters, digits and '_', e.g. 'profiles')")
        options_text = json_text(jsonable(dict(options or {})))
        code_version = diagnostics.__version__
        if version is None:
            version = text_sha256("results", kind, options_text, code_version)[:16]
        version = str(version)
        if not re.match(r"^[A-Za-z0-9_.:-]{1,64}$", version):
            raise InputError(f"write_results: version {version!r} must be 1-64 letters, digits "
                             "or '_.:-'")
        table = _records_table(records, f"write_results({kind!r})")
        n = table.num_rows
        sink = pa.BufferOutputStream()
        with pa.ipc.new_stream(sink, table.schema) as w:
            w.write_table(table)
        digest = hashlib.sha256(memoryview(sink.getvalue()))
        digest.update(options_text.encode())
        content = digest.hexdigest()[:16]
        now = pd.Timestamp.now(tz="UTC")
        extra = {
            "result_version": pa.array([version] * n, pa.string()),
            "options": pa.array([options_text] * n, pa.string()),
            "code_version": pa.array([code_version] * n, pa.string()),
            "created": pa.array([_ns(now)] * n, pa.int64()).cast(_TS),
        }
        for name, arr in extra.items():
            if name in table.column_names:
                table = table.drop_columns([name])
            table = table.append_column(_field(name, arr.type, "UTC" if name == "created" else
                                               ("JSON" if name == "options" else None)), arr)
        if "timestamp" not in table.column_names:
            table = table.append_column(_field("timestamp", _TS, "UTC"),
                                        pa.array([_ns(now)] * n, pa.int64()).cast(_TS))
        table = table.replace_schema_metadata({"schema_version": SCHEMA_VERSION,
                                               "kind": f"results/{kind}"})
        ts = table.column("timestamp").cast(pa.int64())
        first = pc.min(ts).as_py()
        date = _date_of_ns(first if first is not None else _ns(now))
        rel = f"results/{kind}/date={date}/part-{version}-{content}.parquet"
        content_key = f"result-content:{version}:{content}"
        if existing := self._existing(content_key, f"results/{kind}"):
            return existing[0]  # the same records are stored (maybe merged by compaction)
        path = atomic_write_table(table, self.root / rel)
        bounds = pc.min_max(ts)
        entry = {"path": rel, "kind": f"results/{kind}", "date": date, "rows": n,
                 "tmin_ns": bounds["min"].as_py(), "tmax_ns": bounds["max"].as_py(),
                 "bytes": path.stat().st_size, "schema": schema_blob(table.schema)}
        stamp = utc_now_iso()
        with self._catalog.connect() as con:
            self._catalog.register_files(con, [entry], [f"result:{version}", content_key])
            con.execute(
                "INSERT INTO result_sets (kind, version, created, updated, options, code_version,"
                " rows) VALUES (?, ?, ?, ?, ?, ?, 0) ON CONFLICT (kind, version) DO UPDATE SET"
                " updated = excluded.updated",
                (kind, version, stamp, stamp, options_text, code_version))
        return path

    # ------------------------------------------------------------------ ingest
    def ingest(self, path: str | Path) -> IngestOutcome:
        """Ingest one input file or scan folder; never raises for bad input.

        The input's SHA-256 is looked up in the ledger first: the same bytes
        stored before give ``duplicate`` (nothing written); bytes quarantined
        before by the same reader version give ``quarantined`` again without a
        new copy.  Otherwise the matching reader of :mod:`diagnostics.readers`
        reads it; good data is written (Parquet, then catalog), bad data is
        copied to ``quarantine/`` with ``<name>.error.json``.  The original is
        never moved or changed.
        """
        self._check_writable()
        path = Path(path)
        shown = str(path)
        readers = _readers()
        try:
            sha, size, mtime_ns, parts = _input_identity(path, readers)
        except OSError as exc:
            reason = f"{shown}: cannot read: {exc.strerror or exc}"
            return IngestOutcome(shown, None, "quarantined", "", 0, reason, ())
        kind = "scans" if path.is_dir() else None
        reader_version = _reader_version()
        record = self._catalog.ingest_record(sha)
        if record is not None:
            if record["status"] == "stored":
                return IngestOutcome(shown, record["kind"], "duplicate", sha, 0,
                                     f"already stored from {record['source']}",
                                     tuple(json.loads(record["outputs"] or "[]")))
            if record["reader_version"] == reader_version:
                return IngestOutcome(shown, record["kind"], "quarantined", sha, 0,
                                     f"{record['message']} (quarantined before)", ())
        mtime = pd.Timestamp(mtime_ns, unit="ns", tz="UTC").isoformat()
        meta = {"sha256": sha, "source": shown, "size": size, "mtime": mtime,
                "reader_version": reader_version, "code_version": diagnostics.__version__}
        files = {"parts": parts}
        tb = None
        kind = readers.detect_kind(path) or kind
        outputs: list[Path] | None = None
        try:
            kind, data = readers.read_any(path)
        except InputError as exc:
            reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        except Exception as exc:  # a reader bug must not stop a batch; keep its traceback
            reason = f"{shown}: unexpected {type(exc).__name__}: {exc}".splitlines()[0]
            tb = traceback.format_exc()
        else:
            try:  # data the store refuses is bad input too; a failing disk is not
                outputs, rows = self._write_data(kind, data, sha, shown)
            except InputError as exc:
                reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        if outputs is not None:
            rel = tuple(str(p.relative_to(self.root)) for p in outputs)
            with self._catalog.connect() as con:
                self._catalog.record_ingest(con, kind=kind, status="stored", rows=rows,
                                            outputs=json.dumps(rel), message="",
                                            quarantine_path=None, time=utc_now_iso(), **meta)
            return IngestOutcome(shown, kind, "stored", sha, rows, "", rel)
        qpath = self._quarantine(path, sha, kind, reason, tb, meta, files)
        with self._catalog.connect() as con:
            self._catalog.record_ingest(con, kind=kind, status="quarantined", rows=0,
                                        outputs="[]", message=reason,
                                        quarantine_path=str(qpath.relative_to(self.root)),
                                        time=utc_now_iso(), **meta)
        return IngestOutcome(shown, kind, "quarantined", sha, 0, reason, ())

    def _write_data(self, kind: str, data: Any, sha: str, source: str) -> tuple[list[Path], int]:
        """Write what a reader returned; ``(files, rows)``."""
        if kind == "bpm":
            return self.write_bpm(data, sha256=sha, source=source), len(data)
        if kind == "slow":
            return self.write_slow(data, sha256=sha, source=source), len(data)
        if kind == "profiles":
            return self.write_profiles([data], sha256=sha, source=source), 1
        if kind == "frames":
            return self.write_frames([data], sha256=sha, source=source), 1
        if kind == "scans":
            return self.write_scan(data, sha256=sha, source=source), len(data.steps)
        raise InputError(f"{source}: unknown kind {kind!r} (expected one of {', '.join(STORE_KINDS)})")

    def _quarantine(self, path: Path, sha: str, kind: str | None, reason: str,
                    tb: str | None, meta: Mapping[str, Any], files: Mapping[str, Any]) -> Path:
        """Copy a rejected input to ``quarantine/<date>/`` with ``<name>.error.json``.

        An image is copied with its sidecar (``<name>.json`` next to the copy) when
        it has one, so the pair can be retried from the quarantine.
        """
        folder = self.root / "quarantine" / pd.Timestamp.now(tz="UTC").strftime("%Y-%m-%d")
        folder.mkdir(parents=True, exist_ok=True)
        name = path.name or "input"
        target = folder / name
        if target.exists() or (folder / f"{name}.error.json").exists():
            target = folder / f"{sha[:12]}-{name}"
        tmp = folder / f".{target.name}.{uuid.uuid4().hex[:12]}.tmp"
        if path.is_dir():
            shutil.copytree(path, tmp, symlinks=True)
            if target.exists():
                shutil.rmtree(target)
        else:
            shutil.copy2(path, tmp)
        os.replace(tmp, target)
        parts = files["parts"]
        for extra in parts[1:]:  # the image's sidecar
            if extra["role"] == "sidecar":
                side_tmp = folder / f".{target.stem}.json.{uuid.uuid4().hex[:12]}.tmp"
                shutil.copy2(extra["path"], side_tmp)
                os.replace(side_tmp, target.with_suffix(".json"))
        info = {"reason": reason, "kind": kind, "time": utc_now_iso(), **meta,
                "files": [{"path": str(x["path"]), "role": x["role"], "sha256": x["sha256"]}
                          for x in parts]}
        if tb:
            info["traceback"] = tb
        atomic_write_bytes((json.dumps(info, indent=2) + "\n").encode(),
                           folder / f"{target.name}.error.json")
        return target

    def ingest_many(self, paths: str | Path | Iterable[str | Path], *,
                    progress: bool | None = None) -> IngestSummary:
        """Ingest files and folders (recursively; see :func:`collect_inputs`).

        Every input is tried, whatever happened to the others.  ``progress``
        shows a counter on stderr, updated in place; by default only when stderr
        is a terminal.
        """
        if isinstance(paths, (str, Path)):
            paths = [paths]
        inputs = collect_inputs(paths)
        if progress is None:
            progress = sys.stderr.isatty()
        bar = _Progress(len(inputs), progress)
        outcomes: list[IngestOutcome] = []
        try:
            for i, p in enumerate(inputs, 1):
                outcomes.append(self.ingest(p))
                bar.update(i, IngestSummary(tuple(outcomes)))
        finally:
            bar.close()
        return IngestSummary(tuple(outcomes))

    # ------------------------------------------------------------------ reading core
    def _snapshot(self, kind: str, t0: pd.Timestamp | None, t1: pd.Timestamp | None):
        return self._catalog.live_files(
            kind,
            date_min=None if t0 is None else t0.strftime("%Y-%m-%d"),
            date_max=None if t1 is None else (t1 - pd.Timedelta(1, "ns")).strftime("%Y-%m-%d"),
            t_min_ns=None if t0 is None else _ns(t0),
            t_max_ns=None if t1 is None else _ns(t1),
        )

    def _base_schema(self, kind: str) -> pa.Schema:
        if kind in BASE_SCHEMAS:
            return BASE_SCHEMAS[kind]
        return pa.schema([_field("timestamp", _TS, "UTC")])

    @staticmethod
    def _unified(rows: Sequence[sqlite3.Row], base: pa.Schema) -> pa.Schema:
        blobs = list(dict.fromkeys(r["schema"] for r in rows))
        schemas = [schema_from_blob(b) for b in blobs]
        try:
            return pa.unify_schemas(schemas, promote_options="permissive")
        except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
            raise StoreError(f"stored files disagree on a column type: {exc}") from exc

    def _read_table(self, kind: str, *, start: Any = None, end: Any = None,
                    filter: ds.Expression | None = None,
                    columns: Sequence[str] | None = None,
                    dictionary: Sequence[str] = ()) -> pa.Table:
        """Read the live files of ``kind`` in ``[start, end)``, retrying if compaction
        removed a file between the snapshot and the read.  Text columns named in
        ``dictionary`` are read dictionary-encoded (as Parquet stores them)."""
        t0, t1 = _window(start, end)
        for _attempt in range(8):
            rows = self._snapshot(kind, t0, t1)
            schema = self._unified(rows, self._base_schema(kind)) if rows else self._base_schema(kind)
            if columns is not None:
                unknown = [c for c in columns if schema.get_field_index(c) < 0]
                if unknown:
                    raise InputError(f"{kind}: no column {unknown[0]!r} (stored columns: "
                                     f"{', '.join(schema.names)})")
            expr = filter
            if t0 is not None:
                e = ds.field("timestamp") >= pa.scalar(_ns(t0), pa.int64()).cast(_TS)
                expr = e if expr is None else expr & e
            if t1 is not None:
                e = ds.field("timestamp") < pa.scalar(_ns(t1), pa.int64()).cast(_TS)
                expr = e if expr is None else expr & e
            if not rows:
                empty = schema.empty_table()
                return empty if columns is None else empty.select(list(columns))
            paths = [str(self.root / r["path"]) for r in rows]
            fmt: Any = "parquet"
            dictionary = [c for c in dictionary if schema.get_field_index(c) >= 0
                          and pa.types.is_string(schema.field(c).type)]
            if dictionary:
                for c in dictionary:
                    i = schema.get_field_index(c)
                    schema = schema.set(i, schema.field(i).with_type(
                        pa.dictionary(pa.int32(), pa.string())))
                fmt = ds.ParquetFileFormat(
                    read_options=ds.ParquetReadOptions(dictionary_columns=dictionary))
            try:
                dataset = ds.dataset(paths, schema=schema, format=fmt)
                return dataset.to_table(columns=list(columns) if columns is not None else None,
                                        filter=expr)
            except OSError:
                if all(os.path.exists(p) for p in paths):
                    raise
                continue  # a file was compacted away under us: take a new snapshot
        raise StoreError(f"{self.root}: files of {kind!r} kept changing while reading")

    def _current_scan_versions(self) -> dict[str, str]:
        return {r["scan_id"]: r["sha256"] for r in
                self._catalog.query("SELECT scan_id, sha256 FROM scans")}

    def _drop_superseded(self, table: pa.Table) -> pa.Table:
        """Drop rows of scan versions that a newer ingest of the same scan replaced."""
        if "scan" not in table.column_names or table.num_rows == 0:
            return table
        current = self._current_scan_versions()
        if not current or pc.all(pc.is_null(table.column("scan"))).as_py():
            return table
        scans = table.column("scan").to_pylist()
        versions = table.column("scan_version").to_pylist()
        keep = [s is None or s not in current or v is None or current[s] == v
                for s, v in zip(scans, versions, strict=True)]
        return table.filter(pa.array(keep))

    @staticmethod
    def _device_filter(column: str, devices: list[str] | None) -> ds.Expression | None:
        return None if devices is None else ds.field(column).isin(devices)

    # ------------------------------------------------------------------ reads
    def read_bpm(self, *, start: Any = None, end: Any = None,
                 bpms: str | Iterable[str] | None = None,
                 columns: Sequence[str] | None = None) -> pd.DataFrame:
        """BPM readings in ``[start, end)`` (naive times are UTC), sorted by timestamp, bpm.

        ``bpms`` selects BPMs by name; ``columns`` selects value columns
        (``timestamp`` and ``bpm`` always come first).  Missing ``sum`` is NaN.
        """
        bpms = _as_list(bpms, "bpms")
        cols = None if columns is None else ["timestamp", "bpm"] + [
            c for c in columns if c not in ("timestamp", "bpm")]
        table = self._read_table("bpm", start=start, end=end, columns=cols,
                                 filter=self._device_filter("bpm", bpms), dictionary=["bpm"])
        return self._readings_frame(table, ["timestamp", "bpm"])

    def read_slow(self, *, start: Any = None, end: Any = None,
                  channels: str | Iterable[str] | None = None) -> pd.DataFrame:
        """Slow-channel readings in ``[start, end)``, sorted by timestamp, channel."""
        channels = _as_list(channels, "channels")
        table = self._read_table("slow", start=start, end=end,
                                 filter=self._device_filter("channel", channels),
                                 dictionary=["channel", "unit"])
        return self._readings_frame(table, ["timestamp", "channel"])

    @staticmethod
    def _readings_frame(table: pa.Table, keys: list[str]) -> pd.DataFrame:
        table = table.unify_dictionaries()
        sorted_ = table.num_rows < 2 or _is_sorted(table, keys[0], keys[1])
        for i, f in enumerate(table.schema):  # text as text, not categories
            if pa.types.is_dictionary(f.type):
                table = table.set_column(i, f.with_type(pa.string()),
                                         table.column(i).cast(pa.string()))
        if not sorted_:
            table = table.sort_by([(k, "ascending") for k in keys])
        df = table.to_pandas()
        for name in df.columns:
            if pa.types.is_timestamp(table.schema.field(name).type) and df[name].dt.unit != "ns":
                df[name] = df[name].dt.as_unit("ns")
        return df

    def profile_index(self, *, start: Any = None, end: Any = None,
                      devices: str | Iterable[str] | None = None,
                      scan: str | None = None) -> pd.DataFrame:
        """Stored profiles without their arrays: id, device, plane, timestamp,
        wire_angle_rad, n_points, source, sha256, scan, step; sorted by timestamp."""
        table = self._profiles_arrow(start, end, devices, scan, with_arrays=False)
        return self._index_frame(table)

    def _profiles_arrow(self, start, end, devices, scan, *, with_arrays: bool,
                        ids: Sequence[str] | None = None) -> pa.Table:
        return self._items_arrow("profiles", PROFILES_SCHEMA, _PROFILE_ARRAYS, start, end, devices,
                                 scan, with_arrays=with_arrays, ids=ids)

    def _items_arrow(self, kind: str, schema: pa.Schema, arrays: Iterable[str], start, end, devices,
                     scan, *, with_arrays: bool, ids: Sequence[str] | None) -> pa.Table:
        """Live rows of ``kind`` (profiles or frames) for a window, devices, scan or ids,
        superseded scan versions dropped, sorted by time; ``arrays`` columns only on request."""
        devices = _as_list(devices, "devices")
        expr = self._device_filter("device", devices)
        if scan is not None:
            e = ds.field("scan") == str(scan)
            expr = e if expr is None else expr & e
        if ids is not None:
            e = ds.field("id").isin(list(ids))
            expr = e if expr is None else expr & e
        cols = None if with_arrays else [f.name for f in schema if f.name not in arrays]
        table = self._drop_superseded(self._read_table(kind, start=start, end=end,
                                                       filter=expr, columns=cols))
        return table.sort_by([("timestamp", "ascending"), ("id", "ascending")])

    @staticmethod
    def _index_frame(table: pa.Table) -> pd.DataFrame:
        table = table.drop_columns([c for c in _INTERNAL_COLUMNS if c in table.column_names])
        df = table.to_pandas()
        if "timestamp" in df and df["timestamp"].dt.unit != "ns":
            df["timestamp"] = df["timestamp"].dt.as_unit("ns")
        if "step" in df:
            df["step"] = df["step"].astype("Int64")
        return df

    def read_profiles(self, *, start: Any = None, end: Any = None,
                      devices: str | Iterable[str] | None = None,
                      scan: str | None = None) -> list[Profile]:
        """Stored profiles as :class:`~diagnostics.measurements.Profile`, sorted by time."""
        return self._profiles_of(self._profiles_arrow(start, end, devices, scan, with_arrays=True))

    @staticmethod
    def _profiles_of(table: pa.Table) -> list[Profile]:
        out = []
        pos_col, sig_col = table.column("position_m"), table.column("signal")
        meta = table.drop_columns(list(_PROFILE_ARRAYS)).to_pylist()
        for i, row in enumerate(meta):
            pos = np.asarray(pos_col[i].values.to_numpy(zero_copy_only=False), dtype=np.float64)
            sig = np.asarray(sig_col[i].values.to_numpy(zero_copy_only=False), dtype=np.float64)
            out.append(_profile_from_row(row, pos.copy(), sig.copy()))
        return out

    def read_profile(self, profile_id: str) -> Profile:
        """One stored profile by its id (see :meth:`profile_index`)."""
        found = self._profiles_of(self._profiles_arrow(None, None, None, None, with_arrays=True,
                                                       ids=[str(profile_id)]))
        if not found:
            raise InputError(f"{self.root}: no profile with id {profile_id!r}")
        return found[0]

    def _frames_arrow(self, start, end, devices, scan, *, with_pixels: bool,
                      ids: Sequence[str] | None = None) -> pa.Table:
        return self._items_arrow("frames", FRAMES_SCHEMA, _FRAME_ARRAYS, start, end, devices, scan,
                                 with_arrays=with_pixels, ids=ids)

    def frame_index(self, *, start: Any = None, end: Any = None,
                    devices: str | Iterable[str] | None = None,
                    scan: str | None = None) -> pd.DataFrame:
        """Stored frames without pixels: id, device, timestamp, rows, cols, dtype,
        bit_depth, pixel sizes, roi, source, sha256, scan, step; sorted by timestamp."""
        return self._index_frame(self._frames_arrow(start, end, devices, scan, with_pixels=False))

    def read_frames(self, *, start: Any = None, end: Any = None,
                    devices: str | Iterable[str] | None = None, scan: str | None = None,
                    limit: int | None = None) -> list[Frame]:
        """Stored frames (bit-identical pixels, native byte order), sorted by time.

        With ``limit``, the first ``limit`` frames of the window; only their pixels
        are read.
        """
        if limit is not None:
            index = self._frames_arrow(start, end, devices, scan, with_pixels=False)
            ids = index.column("id").to_pylist()[: max(int(limit), 0)]
            if not ids:
                return []
            table = self._frames_arrow(start, end, None, None, with_pixels=True, ids=ids)
        else:
            table = self._frames_arrow(start, end, devices, scan, with_pixels=True)
        return [_frame_from_row(r) for r in table.to_pylist()]

    def read_frame(self, frame_id: str) -> Frame:
        """One stored frame by its id (see :meth:`frame_index`)."""
        table = self._frames_arrow(None, None, None, None, with_pixels=True, ids=[str(frame_id)])
        if table.num_rows == 0:
            raise InputError(f"{self.root}: no frame with id {frame_id!r}")
        return _frame_from_row(table.slice(0, 1).to_pylist()[0])

    def list_scans(self) -> pd.DataFrame:
        """Stored scans (current versions): scan_id, name, kind, timestamp, magnet,
        monitor, n_steps, expected_steps, complete, kinetic_energy_MeV, source, sha256."""
        cols = ["scan_id", "name", "kind", "timestamp", "magnet", "monitor", "n_steps",
                "expected_steps", "complete", "kinetic_energy_MeV", "source", "sha256",
                "scan_version"]
        table = self._read_table("scans", columns=cols)
        current = self._current_scan_versions()
        keep = [current.get(s, v) == v for s, v in zip(table.column("scan_id").to_pylist(),
                                                        table.column("scan_version").to_pylist(),
                                                        strict=True)]
        table = table.filter(pa.array(keep, pa.bool_())).sort_by([("timestamp", "ascending")])
        df = self._index_frame(table)
        for c in ("n_steps", "expected_steps"):
            df[c] = df[c].astype("Int64")
        return df.reset_index(drop=True)

    def load_scan(self, scan_id_or_name: str) -> ScanSpec:
        """Rebuild a stored scan's :class:`~diagnostics.measurements.ScanSpec`.

        ``scan_id_or_name`` is a scan id (:meth:`list_scans`) or a scan name; when
        several scans share a name the latest (by timestamp) is taken.
        """
        key = str(scan_id_or_name)
        scans = self.list_scans()
        match = scans[scans["scan_id"] == key]
        if match.empty:
            match = scans[scans["name"] == key]
        if match.empty:
            known = ", ".join(scans["name"].astype(str).tolist()[:10]) or "none stored"
            raise InputError(f"{self.root}: no scan {key!r} (scans: {known})")
        row = match.iloc[-1]
        table = self._read_table("scans", filter=(ds.field("scan_id") == row["scan_id"]) &
                                 (ds.field("scan_version") == row["sha256"]),
                                 columns=["spec"])
        data = json.loads(table.column("spec")[0].as_py())
        profiles = {p_id: p for p_id, p in zip(
            self.profile_index(scan=row["scan_id"])["id"],
            self.read_profiles(scan=row["scan_id"]), strict=True)}
        frames_index = self.frame_index(scan=row["scan_id"])
        frames = dict(zip(frames_index["id"], self.read_frames(scan=row["scan_id"]), strict=True))
        return _spec_from_json(data, profiles, frames)

    # ------------------------------------------------------------------ results
    def _result_kind(self, kind: str) -> str:
        if not isinstance(kind, str) or not RESULT_KIND_PATTERN.match(kind):
            raise InputError(f"results: kind {kind!r} is not a result kind (expected e.g. "
                             "'profiles', 'frames', 'scans', 'orbit')")
        return kind

    def result_versions(self, kind: str) -> pd.DataFrame:
        """Result-set versions of ``kind``: version, created, updated, options (JSON text),
        code_version, rows, latest (the one ``read_results`` returns by default)."""
        kind = self._result_kind(kind)
        rows = self._catalog.query(
            "SELECT r.version, r.created, r.updated, r.options, r.code_version,"
            " COALESCE((SELECT SUM(f.rows) FROM file_sources s JOIN files f ON f.path = s.path"
            "  WHERE s.sha256 = 'result:' || r.version AND f.kind = ? AND f.live = 1), 0) AS rows"
            " FROM result_sets r WHERE r.kind = ? ORDER BY r.created, r.version",
            (f"results/{kind}", kind))
        df = pd.DataFrame([dict(r) for r in rows],
                          columns=["version", "created", "updated", "options", "code_version",
                                   "rows"])
        for c in ("created", "updated"):
            df[c] = pd.to_datetime(df[c], utc=True, format="ISO8601").dt.as_unit("ns")
        df["rows"] = df["rows"].astype("int64")
        df["latest"] = False
        if len(df):
            df.loc[df.index[-1], "latest"] = True
        return df

    def read_results(self, kind: str, *, start: Any = None, end: Any = None,
                     version: str | None = "latest") -> pd.DataFrame:
        """Stored results of ``kind`` in ``[start, end)`` (on their ``timestamp``).

        ``version``: ``"latest"`` (the most recently created result set), a version
        id from :meth:`result_versions`, or ``"all"`` / ``None`` for every version.
        Each row carries ``result_version``, ``options`` (JSON), ``code_version``
        and ``created``.  Sorted by timestamp, then creation.
        """
        kind = self._result_kind(kind)
        versions = self.result_versions(kind)
        expr = None
        if version not in (None, "all"):
            if version == "latest":
                if versions.empty:
                    return self._read_results_table(kind, start, end, None).to_pandas()
                version = versions["version"].iloc[-1]
            elif version not in set(versions["version"]):
                known = ", ".join(versions["version"]) or "none"
                raise InputError(f"{self.root}: no {kind} results of version {version!r} "
                                 f"(versions: {known})")
            expr = ds.field("result_version") == version
        table = self._read_results_table(kind, start, end, expr)
        keys = [("timestamp", "ascending")] + ([("created", "ascending")]
                                               if "created" in table.column_names else [])
        return self._index_frame(table.sort_by(keys)).reset_index(drop=True)

    def _read_results_table(self, kind, start, end, expr) -> pa.Table:
        try:
            return self._read_table(f"results/{kind}", start=start, end=end, filter=expr)
        except StoreError:  # incompatible types across versions: read file by file
            rows = self._snapshot(f"results/{kind}", *_window(start, end))
            table = _concat_lenient([pq.read_table(self.root / r["path"]) for r in rows])
            t0, t1 = _window(start, end)
            for bound, op in ((t0, pc.greater_equal), (t1, pc.less)):
                if bound is not None:
                    table = table.filter(op(table.column("timestamp"),
                                            pa.scalar(_ns(bound), pa.int64()).cast(_TS)))
            return table if expr is None else table.filter(expr)

    # ------------------------------------------------------------------ catalog views
    def time_range(self, kind: str) -> tuple[pd.Timestamp, pd.Timestamp] | None:
        """First and last timestamp stored for ``kind`` (a raw kind or ``results/<kind>``)."""
        row = self._catalog.query("SELECT MIN(tmin_ns) AS a, MAX(tmax_ns) AS b FROM files"
                                  " WHERE kind = ? AND live = 1", (kind,))[0]
        if row["a"] is None:
            return None
        return (pd.Timestamp(row["a"], unit="ns", tz="UTC"),
                pd.Timestamp(row["b"], unit="ns", tz="UTC"))

    def last_seen(self) -> dict[str, pd.Timestamp | None]:
        """The latest stored timestamp of each kind of :data:`STORE_KINDS` (``None`` if empty)."""
        out: dict[str, pd.Timestamp | None] = {}
        for kind in STORE_KINDS:
            rng = self.time_range(kind)
            out[kind] = None if rng is None else rng[1]
        return out

    def quarantine_list(self) -> pd.DataFrame:
        """Quarantined inputs: source, kind, sha256, reason, quarantine_path (relative to
        the store), time, reader_version; newest last."""
        rows = self._catalog.query(
            "SELECT source, kind, sha256, message AS reason, quarantine_path, time, reader_version"
            " FROM ingests WHERE status = 'quarantined' ORDER BY time, source")
        df = pd.DataFrame([dict(r) for r in rows],
                          columns=["source", "kind", "sha256", "reason", "quarantine_path", "time",
                                   "reader_version"])
        df["time"] = pd.to_datetime(df["time"], utc=True, format="ISO8601").dt.as_unit("ns")
        return df

    def ingest_log(self) -> pd.DataFrame:
        """The whole ingest ledger (one row per distinct input content)."""
        rows = self._catalog.query("SELECT * FROM ingests ORDER BY time, source")
        return pd.DataFrame([dict(r) for r in rows])

    def live_files(self, kind: str | None = None) -> list[Path]:
        """The live Parquet files (all kinds, or one), absolute paths."""
        if kind is None:
            rows = self._catalog.query("SELECT path FROM files WHERE live = 1 ORDER BY path")
        else:
            rows = self._catalog.live_files(kind)
        return [self.root / r["path"] for r in rows]

    def result_kinds(self) -> list[str]:
        """Result kinds with stored results."""
        rows = self._catalog.query("SELECT DISTINCT kind FROM result_sets ORDER BY kind")
        return [r["kind"] for r in rows]

    # ------------------------------------------------------------------ DuckDB
    def duckdb(self, *, threads: int = 2, memory_limit: str = "2GB") -> Any:
        """An in-memory DuckDB connection restricted to the store folder.

        The sandbox follows ECOSYSTEM.md section 3, in this order:
        ``allowed_directories = [store]``, ``enable_external_access = false``,
        ``lock_configuration = true``.  Views ``bpm``, ``slow``, ``profiles``,
        ``frames``, ``scans``, ``rollup_bpm``, ``rollup_slow`` (10-s partial
        aggregates, see :func:`rollup_table`) and ``results_<kind>`` read the files that are live
        *now* (a snapshot of the catalog, read with ``union_by_name``; superseded
        scan versions are left out).  Call :meth:`duckdb` again for newer data:
        it is cheap.  Bind values as parameters: ``con.execute(sql, [value])``.
        """
        import duckdb

        con = duckdb.connect(":memory:", config={"threads": int(threads),
                                                  "memory_limit": str(memory_limit)})
        con.execute("SET allowed_directories = " + _sql_list([str(self.root) + os.sep]))
        con.execute("SET enable_external_access = false")
        con.execute("SET lock_configuration = true")
        current = self._current_scan_versions()
        for kind in STORE_KINDS:
            self._create_view(con, kind, kind, current)
        for kind, rollup in ROLLUP_KINDS.items():
            self._create_view(con, f"rollup_{kind}", rollup, {})
        for kind in self.result_kinds():
            self._create_view(con, f"results_{kind}", f"results/{kind}", {})
        return con

    def _create_view(self, con: Any, view: str, kind: str, current: Mapping[str, str]) -> None:
        rows = self._catalog.live_files(kind)
        if not rows:
            con.register(f"_empty_{view}", self._base_schema(kind).empty_table())
            con.execute(f"CREATE OR REPLACE VIEW {_quote_ident(view)} AS SELECT * FROM "
                        f"{_quote_ident('_empty_' + view)}")
            return
        source = (f"read_parquet({_sql_list(str(self.root / r['path']) for r in rows)},"
                  " union_by_name = true)")
        where = ""
        if current and kind in ("profiles", "frames", "scans"):
            id_col = "scan_id" if kind == "scans" else "scan"
            pairs = _sql_list(f"{k}:{v}" for k, v in current.items())
            known = _sql_list(current)
            where = (f" WHERE {id_col} IS NULL OR NOT list_contains({known}, {id_col})"
                     f" OR list_contains({pairs}, {id_col} || ':' || scan_version)")
        con.execute(f"CREATE OR REPLACE VIEW {_quote_ident(view)} AS SELECT * FROM {source}{where}")

    def trend(self, kind: str, value_columns: str | Sequence[str], *, bucket: Any = "1min",
              start: Any = None, end: Any = None, devices: str | Iterable[str] | None = None,
              device_column: str | None = None, method: str = "auto") -> pd.DataFrame:
        """Per device and time bucket: mean, min, max, rms and count of each value column.

        Runs in an in-memory DuckDB over the live Parquet files of the window
        (files pruned by date partition and time span from the catalog, rows by
        the Parquet statistics); the data never passes through pandas.

        Parameters
        ----------
        kind : str
            ``bpm``, ``slow``, ``profiles``, ``frames``, ``scans`` or
            ``results/<kind>``.
        value_columns : str or sequence of str
            Numeric columns, e.g. ``["x_m", "y_m"]``.
        bucket : str or Timedelta
            Bucket width (``"10s"``, ``"1min"``, ``"5min"``, ``"1h"``).  Buckets
            are aligned to the Unix epoch in UTC (so to UTC midnight for widths
            that divide a day), like :func:`pandas.Grouper` with ``origin="epoch"``.
        start, end : time, optional
            Window ``[start, end)``; naive times are UTC.
        devices : str or sequence of str, optional
            Device names to keep.
        device_column : str, optional
            Column to group by; default :data:`DEVICE_COLUMNS` of the kind.
        method : {"auto", "rollup", "raw"}
            ``raw`` aggregates the readings.  ``rollup`` combines the 10-s partial
            aggregates stored with BPM and slow readings (:func:`rollup_table`):
            for buckets that are multiples of 10 s over windows on 10-s boundaries
            it gives the same numbers (to rounding) from about 1/100 of the rows.
            ``auto`` (default) takes the rollups whenever they apply.

        Returns
        -------
        DataFrame
            ``device`` (str), ``timestamp`` (bucket start, datetime64[ns, UTC]) and per
            column ``<c>_mean``, ``<c>_min``, ``<c>_max``, ``<c>_rms`` (float64, rms is
            ``sqrt(mean(v**2))``) and ``<c>_count`` (int64, values present; NaN and
            missing values are not counted), sorted by device and time.  Empty but
            with these columns and dtypes when nothing matches.
        """
        value_columns = [value_columns] if isinstance(value_columns, str) else list(value_columns)
        if not value_columns:
            raise InputError("trend: give at least one value column")
        if method not in TREND_METHODS:
            raise InputError(f"trend: method {method!r} is not one of {TREND_METHODS}")
        if kind.startswith("results/"):
            self._result_kind(kind.split("/", 1)[1])
        elif kind not in STORE_KINDS:
            raise InputError(f"trend: kind {kind!r} is not one of {', '.join(STORE_KINDS)} or "
                             "'results/<kind>'")
        dev_col = device_column or DEVICE_COLUMNS.get(kind, "device")
        width_ns = _bucket_ns(bucket)
        t0, t1 = _window(start, end)
        devices = _as_list(devices, "devices")
        out_cols = ["device", "timestamp"] + [f"{c}_{s}" for c in value_columns
                                              for s in ("mean", "min", "max", "rms", "count")]
        import duckdb

        for _attempt in range(8):
            rows = self._snapshot(kind, t0, t1)
            schema = self._unified(rows, self._base_schema(kind)) if rows else self._base_schema(kind)
            for c in [dev_col, *value_columns]:
                if schema.get_field_index(c) < 0:
                    raise InputError(f"trend: {kind} has no column {c!r} (columns: "
                                     f"{', '.join(schema.names)})")
            for c in value_columns:
                t = schema.field(c).type
                if not (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_null(t)):
                    raise InputError(f"trend: column {c!r} of {kind} is {t}, not numeric")
            if not rows:
                if method == "rollup":
                    raise InputError(f"trend: no {kind} readings in the window to roll up")
                return _empty_trend(out_cols, value_columns)
            use_rollup = False
            why: str | None = f"kind {kind!r} has no rollups"
            if kind in ROLLUP_KINDS and method != "raw":
                rollup_rows = self._snapshot(ROLLUP_KINDS[kind], t0, t1)
                why = self._rollup_unusable(rows, rollup_rows, dev_col, value_columns, width_ns,
                                            t0, t1, kind)
                if why is None:
                    rows, use_rollup = rollup_rows, True
            if method == "rollup" and not use_rollup:
                raise InputError(f"trend: cannot use the rollups: {why}")
            paths = [str(self.root / r["path"]) for r in rows]
            # the time filter is only needed where a file reaches outside the window
            lo = None if t0 is None or all(r["tmin_ns"] >= _ns(t0) for r in rows) else t0
            hi = None if t1 is None or all(r["tmax_ns"] < _ns(t1) for r in rows) else t1
            signed = any(r["tmin_ns"] < 0 for r in rows)  # readings before 1970
            sql, params = _trend_sql(paths, dev_col, value_columns, width_ns, lo, hi, devices,
                                     signed=signed, rollup=use_rollup)
            con = duckdb.connect(":memory:", config={"threads": 2, "memory_limit": "2GB"})
            try:
                con.execute("SET allowed_directories = " + _sql_list([str(self.root) + os.sep]))
                con.execute("SET enable_external_access = false")
                con.execute("SET lock_configuration = true")
                df = con.execute(sql, params).df()
            except duckdb.IOException:
                if all(os.path.exists(p) for p in paths):
                    raise
                continue  # compacted away under us: new snapshot
            finally:
                con.close()
            if df.empty:
                return _empty_trend(out_cols, value_columns)
            df["timestamp"] = pd.to_datetime(df.pop("bucket_ns").to_numpy(dtype="int64"),
                                             utc=True).as_unit("ns")
            df["device"] = df["device"].astype("str")
            for c in out_cols[2:]:
                df[c] = df[c].astype("int64" if c.endswith("_count") else "float64")
            return df[out_cols].reset_index(drop=True)
        raise StoreError(f"{self.root}: files of {kind!r} kept changing while querying")

    def _rollup_unusable(self, rows, rollup_rows, dev_col, value_columns, width_ns, t0, t1,
                         kind) -> str | None:
        """Why the rollups cannot answer this trend (``None`` when they can)."""
        if dev_col != DEVICE_COLUMNS[kind]:
            return f"they are grouped by {DEVICE_COLUMNS[kind]!r}, not {dev_col!r}"
        if width_ns % ROLLUP_NS:
            return f"the bucket is not a multiple of {ROLLUP_NS // 10**9} s"
        for name, t in (("start", t0), ("end", t1)):
            if t is not None and _ns(t) % ROLLUP_NS:
                return f"{name} {t.isoformat()} is not on a {ROLLUP_NS // 10**9}-s boundary"
        if not rollup_rows or self._sources_of(rows) != self._sources_of(rollup_rows):
            return "some files in the window have no rollup (written by an older version)"
        schema = self._unified(rollup_rows, self._base_schema(ROLLUP_KINDS[kind]))
        missing = [c for c in value_columns if schema.get_field_index(c + "__n") < 0]
        if missing:
            return f"no rollup of column {missing[0]!r}"
        return None

    def _sources_of(self, rows: Sequence[sqlite3.Row]) -> set[str]:
        paths = [r["path"] for r in rows]
        out: set[str] = set()
        for i in range(0, len(paths), 500):
            chunk = paths[i:i + 500]
            out.update(r["sha256"] for r in self._catalog.query(
                "SELECT DISTINCT sha256 FROM file_sources WHERE path IN (" +
                ",".join("?" for _ in chunk) + ")", chunk))
        return out

    # ------------------------------------------------------------------ compaction
    def compact(self, *, kinds: str | Iterable[str] | None = None,
                dates: str | Iterable[str] | None = None,
                target_bytes: int = COMPACT_TARGET_BYTES) -> CompactSummary:
        """Merge the small part files of each partition into one file.

        For each (kind, date) partition with two or more live files smaller than
        ``target_bytes``: the files are read in time order and streamed into one
        new file (temporary name, ``fsync``, :func:`os.replace`); then ONE catalog
        transaction makes it live and retires its inputs; then the inputs are
        unlinked.  Readers go through the catalog (see the module docstring), so
        they see the inputs or the merged file, never both and never half a file.
        Rows of superseded scan versions are dropped on the way.  Stale temporary
        files and unregistered part files (from a crash before a catalog commit)
        older than an hour are removed too.

        Parameters
        ----------
        kinds : str or sequence, optional
            Kinds to compact (raw kinds or ``results/<kind>``); default all.
        dates : str or sequence, optional
            Partition dates ``YYYY-MM-DD``; default all.
        """
        self._check_writable()
        kind_list = _as_list(kinds, "kinds")
        if kind_list is None:
            kind_list = [r["kind"] for r in self._catalog.query(
                "SELECT DISTINCT kind FROM files WHERE live = 1 ORDER BY kind")]
        date_list = _as_list(dates, "dates")
        done: list[CompactedPartition] = []
        with _exclusive(self.root / ".compact.lock"):  # one compaction at a time
            for kind in kind_list:
                done += self._compact_kind(kind, date_list, target_bytes)
            removed = self._remove_retired()
            stale = self._remove_stale()
        return CompactSummary(tuple(done), removed, stale)

    def _compact_kind(self, kind: str, date_list: list[str] | None,
                      target_bytes: int) -> list[CompactedPartition]:
        done: list[CompactedPartition] = []
        sql = ("SELECT path, date, rows, bytes, tmin_ns, schema FROM files WHERE kind = ?"
               " AND live = 1 AND bytes < ?")
        params: list[Any] = [kind, int(target_bytes)]
        if date_list is not None:
            sql += " AND date IN (" + ",".join("?" for _ in date_list) + ")"
            params += date_list
        versions: dict[str, str] = {}
        if kind.startswith("results/"):  # merge a result set only with itself
            versions = {r["path"]: r["sha256"] for r in self._catalog.query(
                "SELECT s.path, s.sha256 FROM file_sources s JOIN files f ON f.path = s.path"
                " WHERE f.kind = ? AND f.live = 1 AND s.sha256 LIKE 'result:%'", (kind,))}
        by_date: dict[tuple[str, str], list[sqlite3.Row]] = {}
        for r in self._catalog.query(sql + " ORDER BY date, tmin_ns, path", params):
            by_date.setdefault((r["date"], versions.get(r["path"], "")), []).append(r)
        for (date, _version), rows in by_date.items():
            for batch in _batches(rows, target_bytes):
                if len(batch) < 2:
                    continue
                try:
                    done.append(self._merge(kind, date, batch))
                except StoreError:  # column types that do not unify: leave the files be
                    continue
        return done

    def _merge(self, kind: str, date: str, rows: Sequence[sqlite3.Row]) -> CompactedPartition:
        inputs = [r["path"] for r in rows]
        schema = self._unified(rows, self._base_schema(kind))
        digest = text_sha256("compact", *sorted(inputs))[:16]
        folder = Path(inputs[0]).parent.as_posix()
        rel = f"{folder}/part-{digest}-0.parquet"
        final = self.root / rel
        sources = [r["sha256"] for r in self._catalog.query(
            "SELECT DISTINCT sha256 FROM file_sources WHERE path IN (" +
            ",".join("?" for _ in inputs) + ")", inputs)]
        current = self._current_scan_versions() if kind in ("profiles", "frames", "scans") else {}
        options = _FRAME_WRITE if kind == "frames" else (
            _readings_write(schema) if kind in ("bpm", "slow") else {})
        n_rows, tmin, tmax = 0, None, None
        with atomic_file(final) as fh:
            writer = pq.ParquetWriter(
                fh, schema, compression=options.get("compression", "zstd"),
                compression_level=options.get("compression_level", 1),
                use_dictionary=options.get("use_dictionary", True))
            for path in inputs:
                table = pq.read_table(self.root / path)
                if current:
                    table = self._drop_superseded_with(table, current, kind)
                table = _sorted_by_time(_conform(table, schema))
                if table.num_rows:
                    ts = pc.min_max(table.column("timestamp").cast(pa.int64()))
                    tmin = ts["min"].as_py() if tmin is None else min(tmin, ts["min"].as_py())
                    tmax = ts["max"].as_py() if tmax is None else max(tmax, ts["max"].as_py())
                writer.write_table(table, row_group_size=options.get("row_group_size"))
                n_rows += table.num_rows
            writer.close()
        entry = {"path": rel, "kind": kind, "date": date, "rows": n_rows, "tmin_ns": tmin,
                 "tmax_ns": tmax, "bytes": final.stat().st_size, "schema": schema_blob(schema)}
        with self._catalog.connect() as con:
            self._catalog.register_files(con, [entry], sources)
            con.executemany("UPDATE files SET live = 0, retired = ? WHERE path = ?",
                            [(utc_now_iso(), p) for p in inputs])
        for p in inputs:
            with contextlib.suppress(FileNotFoundError):
                (self.root / p).unlink()
        return CompactedPartition(kind, date, len(inputs), n_rows, rel)

    @staticmethod
    def _drop_superseded_with(table: pa.Table, current: Mapping[str, str], kind: str) -> pa.Table:
        id_col = "scan_id" if kind == "scans" else "scan"
        if id_col not in table.column_names or "scan_version" not in table.column_names:
            return table
        keep = [s is None or s not in current or v is None or current[s] == v for s, v in
                zip(table.column(id_col).to_pylist(), table.column("scan_version").to_pylist(),
                    strict=True)]
        return table.filter(pa.array(keep, pa.bool_()))

    def _remove_retired(self) -> int:
        n = 0
        for r in self._catalog.query("SELECT path FROM files WHERE live = 0"):
            with contextlib.suppress(FileNotFoundError):
                (self.root / r["path"]).unlink()
                n += 1
        return n

    def _remove_stale(self) -> int:
        """Remove temporary files and unregistered part files older than STALE_AGE_S."""
        known = {r["path"] for r in self._catalog.query("SELECT path FROM files")}
        now = time.time()
        n = 0
        for top in [*STORE_KINDS, "rollup", "results"]:
            base = self.root / top
            if not base.is_dir():
                continue
            for path in base.rglob("*"):
                if not path.is_file():
                    continue
                rel = path.relative_to(self.root).as_posix()
                stale_temp = path.name.endswith(TEMP_SUFFIX) or (
                    path.name.startswith(".") and path.name.endswith(".tmp"))
                orphan = path.suffix == ".parquet" and rel not in known
                if (stale_temp or orphan) and now - path.stat().st_mtime > STALE_AGE_S:
                    with contextlib.suppress(FileNotFoundError):
                        path.unlink()
                        n += 1
        return n


def _readings_write(schema: pa.Schema) -> dict[str, Any]:
    """Write options of readings: Snappy (fastest to write and to scan; zstd-1 took
    2.3x longer to write for 30 % smaller files) and dictionaries for text only."""
    return {"row_group_size": READINGS_PER_ROW_GROUP, "compression": "snappy",
            "compression_level": None,
            "use_dictionary": [f.name for f in schema if pa.types.is_string(f.type)]}


# pixel bytes compress well with zstd (12-bit data in 16-bit words); no dictionaries
# for the binary columns
_FRAME_WRITE: dict[str, Any] = {
    "row_group_size": FRAMES_PER_ROW_GROUP,
    "use_dictionary": ["device", "dtype", "source", "sha256", "scan", "scan_version"],
}


@contextlib.contextmanager
def _exclusive(lock_path: Path):
    """An exclusive advisory lock on ``lock_path`` (``fcntl.flock``; waits for it)."""
    import fcntl

    with open(lock_path, "a+b") as fh:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(fh.fileno(), fcntl.LOCK_UN)


def _concat_lenient(tables: Sequence[pa.Table]) -> pa.Table:
    """Concatenate tables whose column types may disagree (results of different code
    versions): types are promoted where Arrow can; columns that still disagree
    become text."""
    try:
        return pa.concat_tables(tables, promote_options="permissive")
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        pass
    types: dict[str, set[pa.DataType]] = {}
    for t in tables:
        for f in t.schema:
            if not pa.types.is_null(f.type):
                types.setdefault(f.name, set()).add(f.type)
    clash = {name for name, seen in types.items() if len(seen) > 1}
    fixed = []
    for t in tables:
        for name in clash & set(t.column_names):
            i = t.schema.get_field_index(name)
            t = t.set_column(i, t.schema.field(i).with_type(pa.string()),
                             t.column(i).cast(pa.string()))
        fixed.append(t)
    return pa.concat_tables(fixed, promote_options="permissive")


def _conform(table: pa.Table, schema: pa.Schema) -> pa.Table:
    """``table`` with exactly the columns of ``schema`` (missing ones null), cast."""
    arrays = []
    for f in schema:
        if f.name in table.column_names:
            arrays.append(table.column(f.name).cast(f.type))
        else:
            arrays.append(pa.nulls(table.num_rows, f.type))
    return pa.Table.from_arrays(arrays, schema=schema)


def _batches(rows: Sequence[sqlite3.Row], target_bytes: int) -> list[list[sqlite3.Row]]:
    out: list[list[sqlite3.Row]] = [[]]
    size = 0
    for r in rows:
        if out[-1] and size + (r["bytes"] or 0) > target_bytes:
            out.append([])
            size = 0
        out[-1].append(r)
        size += r["bytes"] or 0
    return out


def _bucket_ns(bucket: Any) -> int:
    try:
        width = pd.Timedelta(bucket)
    except (TypeError, ValueError) as exc:
        raise InputError(f"trend: bucket {bucket!r} is not a time span (expected e.g. '10s', "
                         "'1min', '5min', '1h')") from exc
    ns = int(width.as_unit("ns").value) if width is not pd.NaT else 0
    if ns <= 0:
        raise InputError(f"trend: bucket {bucket!r} must be a positive time span")
    return ns


def _trend_sql(paths, dev_col, value_columns, width_ns, t0, t1, devices, *, signed=True,
               rollup=False):
    dev = _quote_ident(dev_col)
    aggs = []
    for c in value_columns:
        q = _quote_ident(c)
        names = {s: _quote_ident(f"{c}_{s}") for s in ("mean", "min", "max", "rms", "count")}
        if rollup:  # combine the partial aggregates of the 10-s buckets
            n, sm, sq = (_quote_ident(c + x) for x in ("__n", "__sum", "__sumsq"))
            aggs += [f"sum({sm}) / nullif(sum({n}), 0) AS {names['mean']}",
                     f"min({_quote_ident(c + '__min')}) AS {names['min']}",
                     f"max({_quote_ident(c + '__max')}) AS {names['max']}",
                     f"sqrt(sum({sq}) / nullif(sum({n}), 0)) AS {names['rms']}",
                     f"CAST(sum({n}) AS BIGINT) AS {names['count']}"]
            continue
        v = f"CAST({q} AS DOUBLE)"
        aggs += [f"avg({v}) AS {names['mean']}", f"min({v}) AS {names['min']}",
                 f"max({v}) AS {names['max']}", f"sqrt(avg({v} * {v})) AS {names['rms']}",
                 f"count({q}) AS {names['count']}"]
    # bucket start in ns since the epoch, floored (integer arithmetic: exact, and
    # much cheaper than time_bucket on TIMESTAMPTZ, which needs ICU time zones)
    e = "epoch_ns(timestamp)"
    bucket = f"({e} // $w) * $w"  # integer division truncates: floor for times after 1970
    if signed:
        bucket = f"(({e} // $w) - CASE WHEN {e} % $w < 0 THEN 1 ELSE 0 END) * $w"
    where, params = [], {"w": width_ns}
    if t0 is not None:
        where.append("timestamp >= $t0")
        params["t0"] = t0.to_pydatetime()
    if t1 is not None:
        where.append("timestamp < $t1")
        params["t1"] = t1.to_pydatetime()
    if devices is not None:
        where.append(f"{dev} IN (SELECT unnest($devices))")
        params["devices"] = devices
    sql = (f"SELECT CAST({dev} AS VARCHAR) AS device, {bucket} AS bucket_ns, {', '.join(aggs)}"
           f" FROM read_parquet({_sql_list(paths)}, union_by_name = true)"
           + (" WHERE " + " AND ".join(where) if where else "")
           + " GROUP BY ALL ORDER BY device, bucket_ns")
    return sql, params


def _empty_trend(out_cols: Sequence[str], value_columns: Sequence[str]) -> pd.DataFrame:
    data: dict[str, Any] = {"device": pd.Series([], dtype="str"),
                            "timestamp": pd.Series([], dtype="datetime64[ns, UTC]")}
    for c in out_cols[2:]:
        data[c] = pd.Series([], dtype="int64" if c.endswith("_count") else "float64")
    return pd.DataFrame(data)


__all__ = [
    "BASE_SCHEMAS", "DEVICE_COLUMNS", "ROLLUP_KINDS", "ROLLUP_NS", "SCHEMA_VERSION",
    "STORE_KINDS", "TREND_METHODS", "CompactSummary", "rollup_table",
    "CompactedPartition", "IngestOutcome", "IngestSummary", "Store", "collect_inputs",
    "scan_id_of",
]
