"""Low-level helpers of the Parquet store: atomic files, hashing, the catalog.

Nothing here knows about beam physics.  :mod:`diagnostics.store` builds the
tables and decides what goes where; this module only guarantees that

* a Parquet file appears under its final name whole or not at all
  (:func:`atomic_write_table`: temporary name in the same folder that does not
  end in ``.parquet``, ``fsync``, :func:`os.replace`, ``fsync`` of the folder);
* inputs are identified by the SHA-256 of their bytes (:func:`file_sha256`,
  :func:`folder_sha256`);
* the catalog (``catalog.sqlite``, stdlib :mod:`sqlite3` in WAL mode) records
  every ingested input and every live Parquet file, and changes to it are
  transactions (:class:`Catalog`).
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import sqlite3
import threading
import uuid
from collections.abc import Iterable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from diagnostics.errors import StoreError

#: Suffix of temporary files.  It must not end in ``.parquet``: DuckDB's
#: ``**/*.parquet`` glob also matches dot-files (ECOSYSTEM.md, section 2).
TEMP_SUFFIX = ".parquet.tmp"

#: Schema of the catalog.  ``ingests`` is the ledger of inputs (one row per
#: distinct input content); ``files`` lists every Parquet file the store wrote,
#: with ``live = 1`` for the files readers must read (the manifest);
#: ``file_sources`` maps each file to the input hashes whose rows it holds;
#: ``scans`` gives the current content version of each scan id; ``result_sets``
#: lists the result versions.
CATALOG_SCHEMA = """
CREATE TABLE IF NOT EXISTS ingests (
    sha256 TEXT NOT NULL UNIQUE,
    kind TEXT,
    status TEXT NOT NULL,
    source TEXT NOT NULL,
    size INTEGER,
    mtime TEXT,
    rows INTEGER,
    outputs TEXT,
    message TEXT,
    quarantine_path TEXT,
    time TEXT NOT NULL,
    reader_version TEXT,
    code_version TEXT
);
CREATE TABLE IF NOT EXISTS files (
    path TEXT PRIMARY KEY,
    kind TEXT NOT NULL,
    date TEXT NOT NULL,
    rows INTEGER NOT NULL,
    tmin_ns INTEGER,
    tmax_ns INTEGER,
    live INTEGER NOT NULL,
    created TEXT NOT NULL,
    retired TEXT,
    bytes INTEGER,
    schema BLOB
);
CREATE INDEX IF NOT EXISTS files_by_kind ON files (kind, live, date);
CREATE TABLE IF NOT EXISTS file_sources (
    path TEXT NOT NULL,
    sha256 TEXT NOT NULL,
    PRIMARY KEY (path, sha256)
);
CREATE INDEX IF NOT EXISTS file_sources_by_sha ON file_sources (sha256);
CREATE TABLE IF NOT EXISTS scans (
    scan_id TEXT PRIMARY KEY,
    sha256 TEXT NOT NULL,
    name TEXT,
    time TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS result_sets (
    kind TEXT NOT NULL,
    version TEXT NOT NULL,
    created TEXT NOT NULL,
    updated TEXT NOT NULL,
    options TEXT,
    code_version TEXT,
    rows INTEGER NOT NULL,
    PRIMARY KEY (kind, version)
);
"""

_HASH_CHUNK = 1 << 20


def utc_now_iso() -> str:
    """The current time as ISO 8601 UTC with a ``Z`` (microseconds)."""
    return pd.Timestamp.now(tz="UTC").isoformat().replace("+00:00", "Z")


def file_sha256(path: str | Path) -> str:
    """SHA-256 (hex) of a file's bytes, read in 1 MiB chunks."""
    with open(path, "rb") as fh:
        return hashlib.file_digest(fh, "sha256").hexdigest()


def folder_sha256(folder: str | Path) -> str:
    """SHA-256 of a folder's content: relative names and bytes of every file.

    Files are taken in sorted order of their relative POSIX path; hidden files
    (``.*``) are ignored, so an editor's swap file does not change the hash.
    """
    folder = Path(folder)
    digest = hashlib.sha256()
    for path in sorted(folder.rglob("*")):
        rel = path.relative_to(folder)
        if not path.is_file() or any(part.startswith(".") for part in rel.parts):
            continue
        digest.update(rel.as_posix().encode() + b"\0")
        digest.update(bytes.fromhex(file_sha256(path)))
    return digest.hexdigest()


def text_sha256(*parts: str) -> str:
    """SHA-256 of text parts joined with NUL (for ids derived from names)."""
    return hashlib.sha256("\0".join(parts).encode()).hexdigest()


def fsync_dir(folder: Path) -> None:
    """Flush a folder's entries (a rename is durable only after this)."""
    with contextlib.suppress(OSError):  # not every filesystem allows it
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


@contextlib.contextmanager
def atomic_file(final: Path, *, suffix: str = TEMP_SUFFIX) -> Iterator[Any]:
    """An open binary file that appears at ``final`` whole or not at all.

    Writes go to ``.<stem>.<uuid><suffix>`` in the same folder (a name that no
    ``*.parquet`` glob matches); when the block ends without an exception the file
    is flushed with ``fsync``, renamed over ``final`` with :func:`os.replace`
    (atomic on POSIX file systems) and the folder flushed too.  On an exception
    the temporary file is removed and nothing appears.
    """
    final.parent.mkdir(parents=True, exist_ok=True)
    tmp = final.with_name(f".{final.stem}.{uuid.uuid4().hex[:12]}{suffix}")
    try:
        with open(tmp, "wb") as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, final)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise
    fsync_dir(final.parent)


def atomic_write_table(
    table: pa.Table,
    final: Path,
    *,
    row_group_size: int | None = None,
    compression: str | Mapping[str, str] = "zstd",
    compression_level: int | Mapping[str, int] | None = 1,
    use_dictionary: bool | Sequence[str] = True,
) -> Path:
    """Write ``table`` to ``final`` as Parquet so that it appears whole or not at all
    (see :func:`atomic_file`)."""
    with atomic_file(final) as fh:
        pq.write_table(
            table,
            fh,
            row_group_size=row_group_size,
            compression=compression,
            compression_level=compression_level,
            use_dictionary=use_dictionary,
            write_statistics=True,
        )
    return final


def atomic_write_bytes(data: bytes, final: Path) -> Path:
    """Write ``data`` to ``final`` with the same temp + fsync + rename rule."""
    with atomic_file(final, suffix=f"{final.suffix}.tmp") as fh:
        fh.write(data)
    return final


class Catalog:
    """The store's ledger and file manifest in ``catalog.sqlite``.

    Each thread keeps one :mod:`sqlite3` connection (closing the last connection
    of a WAL database checkpoints it, which costs a sync per operation); a forked
    process opens its own.  WAL mode lets readers go on while a writer commits;
    writers wait up to 60 s for the lock.  Every :meth:`connect` block is one
    transaction.
    """

    def __init__(self, path: Path, *, read_only: bool = False):
        self.path = path
        self.read_only = read_only
        self._local = threading.local()
        if read_only:
            if not path.exists():
                raise StoreError(f"{path}: no catalog (is this a beamdiag store?)")
        else:
            self._connection().executescript(CATALOG_SCHEMA)

    def _connection(self) -> sqlite3.Connection:
        local = self._local
        con = getattr(local, "con", None)
        if con is not None and local.pid == os.getpid():
            return con
        try:
            if self.read_only:
                con = sqlite3.connect(f"file:{self.path}?mode=ro", uri=True, timeout=60,
                                      isolation_level=None, check_same_thread=False)
            else:
                con = sqlite3.connect(self.path, timeout=60, isolation_level=None,
                                      check_same_thread=False)
                con.execute("PRAGMA journal_mode=WAL")
            con.execute("PRAGMA synchronous=NORMAL")
        except sqlite3.Error as exc:
            raise StoreError(f"{self.path}: cannot open the catalog: {exc}") from exc
        con.row_factory = sqlite3.Row
        local.con, local.pid, local.depth = con, os.getpid(), 0
        return con

    @contextlib.contextmanager
    def connect(self) -> Iterator[sqlite3.Connection]:
        """A transaction: commit on success, roll back on error (nested blocks join it)."""
        con = self._connection()
        local = self._local
        if local.depth:
            local.depth += 1
            try:
                yield con
            finally:
                local.depth -= 1
            return
        con.execute("BEGIN IMMEDIATE" if not self.read_only else "BEGIN")
        local.depth = 1
        try:
            yield con
        except BaseException:
            local.depth = 0
            con.execute("ROLLBACK")
            raise
        local.depth = 0
        con.execute("COMMIT")

    def close(self) -> None:
        """Close this thread's connection (others close when their thread ends)."""
        con = getattr(self._local, "con", None)
        if con is not None:
            self._local.con = None
            con.close()

    def query(self, sql: str, params: Sequence[Any] = ()) -> list[sqlite3.Row]:
        """Run one statement (outside a transaction: one consistent snapshot)."""
        return self._connection().execute(sql, params).fetchall()

    # --- ledger -----------------------------------------------------------
    def ingest_record(self, sha256: str) -> sqlite3.Row | None:
        rows = self.query("SELECT * FROM ingests WHERE sha256 = ?", (sha256,))
        return rows[0] if rows else None

    def record_ingest(self, con: sqlite3.Connection, **fields: Any) -> None:
        names = ", ".join(fields)
        marks = ", ".join("?" for _ in fields)
        con.execute(
            f"INSERT OR REPLACE INTO ingests ({names}) VALUES ({marks})", tuple(fields.values())
        )

    # --- manifest ---------------------------------------------------------
    def register_files(
        self, con: sqlite3.Connection, entries: Iterable[Mapping[str, Any]], sources: Iterable[str]
    ) -> None:
        """Make files live (``entries``: path, kind, date, rows, tmin_ns, tmax_ns, bytes, schema)."""
        now = utc_now_iso()
        sources = list(sources)
        for e in entries:
            con.execute(
                "INSERT OR REPLACE INTO files (path, kind, date, rows, tmin_ns, tmax_ns, live,"
                " created, retired, bytes, schema) VALUES (?, ?, ?, ?, ?, ?, 1, ?, NULL, ?, ?)",
                (e["path"], e["kind"], e["date"], e["rows"], e["tmin_ns"], e["tmax_ns"], now,
                 e["bytes"], e["schema"]),
            )
            con.executemany(
                "INSERT OR IGNORE INTO file_sources (path, sha256) VALUES (?, ?)",
                [(e["path"], s) for s in sources],
            )

    def live_files_of_source(self, sha256: str, kind: str) -> list[str]:
        rows = self.query(
            "SELECT f.path FROM file_sources s JOIN files f ON f.path = s.path"
            " WHERE s.sha256 = ? AND f.kind = ? AND f.live = 1 ORDER BY f.path",
            (sha256, kind),
        )
        return [r["path"] for r in rows]

    def live_files(
        self,
        kind: str,
        *,
        date_min: str | None = None,
        date_max: str | None = None,
        t_min_ns: int | None = None,
        t_max_ns: int | None = None,
    ) -> list[sqlite3.Row]:
        """Live files of ``kind`` whose dates and time span overlap the window."""
        sql = "SELECT path, date, rows, tmin_ns, tmax_ns, schema FROM files WHERE kind = ? AND live = 1"
        params: list[Any] = [kind]
        if date_min is not None:
            sql += " AND date >= ?"
            params.append(date_min)
        if date_max is not None:
            sql += " AND date <= ?"
            params.append(date_max)
        if t_min_ns is not None:
            sql += " AND (tmax_ns IS NULL OR tmax_ns >= ?)"
            params.append(t_min_ns)
        if t_max_ns is not None:
            sql += " AND (tmin_ns IS NULL OR tmin_ns < ?)"
            params.append(t_max_ns)
        return self.query(sql + " ORDER BY tmin_ns, path", params)


def schema_blob(schema: pa.Schema) -> bytes:
    """An Arrow schema as bytes (kept in the catalog to unify without footers)."""
    return schema.serialize().to_pybytes()


def schema_from_blob(blob: bytes) -> pa.Schema:
    return pa.ipc.read_schema(pa.py_buffer(blob))


def json_text(value: Any) -> str:
    """Compact, key-sorted JSON text (deterministic, so hashes are stable)."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), allow_nan=False, default=str)
