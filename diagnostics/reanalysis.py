"""Archive reanalysis on Dask: ``beamdiag reanalyze``.

Reanalysis runs the same analysis code as the live pipeline
(:mod:`diagnostics.pipeline`) over a selected part of the archive, with other
options if wanted, and writes the rows as a NEW result-set version; earlier
versions stay in the store and remain selectable with
``Store.read_results(kind, version=...)``.

The work is split by stored file: each task gets the store root, the ids of the
raw rows of one stored Parquet file and the options, reads its own data, and
returns records.  Tasks therefore move only names over the network, and a
serial run calls exactly the same task function on exactly the same partitions
in the same order, so a serial run and a cluster run give identical records.

By default a :class:`distributed.LocalCluster` with ``n_workers`` single-threaded
worker processes runs the tasks (processes, because the fits are partly pure
Python and the GIL would serialise threads); ``scheduler="tcp://host:8786"``
uses an existing cluster instead.  The beamdiag package must be installed, at
the same version, on every worker.
"""

from __future__ import annotations

import json
import sys
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from diagnostics import pipeline
from diagnostics.errors import InputError

#: Result kinds reanalysis can redo.
REANALYSIS_KINDS = ("profiles", "frames", "scans")

#: Largest number of raw rows in one task (a stored file with more is split): profiles
#: are small (a few kB each), frames are not (a 1920x1200 16-bit frame is 4.6 MB).
MAX_TASK_ROWS = {"profiles": 2000, "frames": 32, "scans": 1}

#: Records written per ``write_results`` call (bounds memory on long archives).
WRITE_CHUNK_ROWS = 50_000


@dataclass(frozen=True)
class Partition:
    """One task's share of the work: raw ids held by (part of) one stored file.

    ``start_ns``/``end_ns`` bound the rows' timestamps (``end`` exclusive), so the
    task reads only the stored files that overlap them.
    """

    kind: str
    file: str
    ids: tuple[str, ...]
    start_ns: int | None = None
    end_ns: int | None = None


@dataclass(frozen=True)
class ReanalysisSummary:
    """What a reanalysis did.

    Attributes
    ----------
    kind : str
    version : str
        The new result-set version id.
    options : mapping
    n_tasks, n_records, n_flagged, n_failed : int
    paths : tuple of str
        Result files written.
    elapsed_s : float
        Wall time of the analysis and writing, seconds.
    scheduler : str
        ``serial``, ``local:<n>`` or the scheduler address.
    """

    kind: str
    version: str
    options: Mapping[str, Any]
    n_tasks: int
    n_records: int
    n_flagged: int
    n_failed: int
    paths: tuple[str, ...]
    elapsed_s: float
    scheduler: str

    @property
    def rate_per_s(self) -> float:
        """Records per second of wall time."""
        return self.n_records / self.elapsed_s if self.elapsed_s > 0 else float("nan")


def _chunks(ids: Sequence[str], size: int) -> list[tuple[str, ...]]:
    return [tuple(ids[i:i + size]) for i in range(0, len(ids), size)]


def _file_rows(path: Path) -> pa.Table:
    """``id`` and ``timestamp`` of the rows of one stored file (a column read, no arrays)."""
    return pq.read_table(path, columns=["id", "timestamp"])


def plan(store: Any, kind: str, *, start: Any = None, end: Any = None,
         max_task_rows: int | None = None) -> list[Partition]:
    """The tasks of a reanalysis: raw ids grouped by the stored file holding them.

    Profiles and frames are grouped by their live Parquet file
    (``Store.live_files``): a file with more than ``max_task_rows`` rows is cut
    into pieces of that size, and small files (one image per file before
    compaction) are packed whole, in time order, into tasks of up to
    ``max_task_rows``.  Only ids the store's index lists for the window are kept
    (so superseded scan versions and rows outside the window drop out).  Each scan
    is one task.  The order is deterministic (files by first time, rows by time
    and id).  ``Partition.file`` names the first file of a task.
    """
    if kind not in REANALYSIS_KINDS:
        raise InputError(f"reanalyze: --kind must be one of {', '.join(REANALYSIS_KINDS)}, got {kind!r}")
    if kind == "scans":
        scans = pipeline._scan_table(store, start, end)
        if len(scans) == 0:
            return []
        col = pipeline._scan_id_column(scans)
        return [Partition("scans", str(s), (str(s),)) for s in sorted(scans[col].astype(str))]
    index = store.profile_index(start=start, end=end) if kind == "profiles" else store.frame_index(start=start, end=end)
    if len(index) == 0:
        return []
    wanted = set(index["id"].astype(str))
    max_task_rows = max_task_rows or MAX_TASK_ROWS[kind]
    files = []
    for path in store.live_files(kind):
        table = _file_rows(path)
        ids = table.column("id").to_pylist()
        times = table.column("timestamp").cast(pa.int64()).to_pylist()
        rows = sorted((t, str(i)) for i, t in zip(ids, times, strict=True) if str(i) in wanted)
        if rows:
            files.append((rows[0][0], str(Path(path).relative_to(store.root)), rows))
    files.sort()  # in time order, so files packed together span a short window
    parts: list[Partition] = []
    pack: list[tuple[int, str]] = []
    pack_file = ""

    def close_pack() -> None:
        if pack:
            parts.append(Partition(kind, pack_file, tuple(i for _t, i in pack), min(t for t, _ in pack),
                                   max(t for t, _ in pack) + 1))

    for _t0, rel, rows in files:
        if len(rows) > max_task_rows:
            # a big file is split into pieces on its own
            close_pack()
            pack, pack_file = [], ""
            for k in range(0, len(rows), max_task_rows):
                chunk = rows[k:k + max_task_rows]
                parts.append(Partition(kind, rel, tuple(i for _t, i in chunk), chunk[0][0], chunk[-1][0] + 1))
            continue
        if len(pack) + len(rows) > max_task_rows:
            close_pack()
            pack, pack_file = [], ""
        # small files (e.g. one image each, before compaction) share a task, whole
        pack_file = pack_file or rel
        pack.extend(rows)
    close_pack()
    return parts


def run_partition(store_root: str, kind: str, ids: Sequence[str], options_json: str,
                  start_ns: int | None = None, end_ns: int | None = None) -> list[dict[str, Any]]:
    """One reanalysis task: read the raw rows ``ids`` from the store and analyse them.

    Runs on a Dask worker (or in-process for a serial run): it opens the store
    read-only itself, so only names and numbers travel to it.
    """
    import json

    from threadpoolctl import threadpool_limits

    from diagnostics.store import Store

    options = pipeline.AnalysisOptions.from_mapping(json.loads(options_json))
    store = Store(store_root, create=False, read_only=True)
    start = None if start_ns is None else pd.Timestamp(start_ns, unit="ns", tz="UTC")
    end = None if end_ns is None else pd.Timestamp(end_ns, unit="ns", tz="UTC")
    # One BLAS thread, in this process and on every worker: a multi-threaded BLAS
    # sums in another order, and the iterative fits then stop a few 1e-10 apart
    # (measured: every row of a 20,000-profile run differed), so serial and cluster
    # runs are identical only with the same thread count.  Dask's nanny sets
    # OMP_NUM_THREADS=1 for its workers too; the serial run needs it here.
    with threadpool_limits(limits=1, user_api="blas"):
        if kind == "scans":
            return [pipeline.analyze_scan_spec(scan_id, store.load_scan(scan_id), options) for scan_id in ids]
        if kind == "profiles":
            items = pipeline.profile_items(store, ids=ids, start=start, end=end)
            return pipeline.analyze_profile_items(items, options)
        items = pipeline.frame_items(store, ids=ids, start=start, end=end)
        return pipeline.analyze_frame_items(items, options)


def run_partition_json(store_root: str, kind: str, ids: Sequence[str], options_json: str,
                       start_ns: int | None = None, end_ns: int | None = None) -> str:
    """:func:`run_partition` with its rows as one JSON text, as tasks return them.

    A list of 2,000 dicts crosses Dask's wire element by element, which cost about
    0.1 s per task here (measured: 1.0 s against 0.46 s as JSON text for 10 tasks of
    2,000 rows).  The rows are JSON-safe already (:func:`diagnostics.results.to_record`),
    and serial runs go through the same text, so both give the same Python values.
    """
    return json.dumps(run_partition(store_root, kind, ids, options_json, start_ns, end_ns),
                      separators=(",", ":"))


class _Progress:
    """A one-line stderr counter (redrawn in place on a terminal, a final line always)."""

    def __init__(self, total: int, label: str, stream: Any = None, enabled: bool | None = None) -> None:
        self.total = total
        self.label = label
        self.stream = stream or sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.enabled = self.tty if enabled is None else enabled
        self.done = 0
        self.t0 = time.perf_counter()
        self._last = 0.0

    def step(self, n: int = 1) -> None:
        self.done += n
        now = time.perf_counter()
        if self.enabled and (now - self._last > 0.2 or self.done == self.total):
            self._last = now
            end = "\r" if self.tty else "\n"
            self.stream.write(f"{self.label}: {self.done}/{self.total} tasks{end}")
            self.stream.flush()

    def close(self, records: int) -> None:
        elapsed = time.perf_counter() - self.t0
        if self.enabled and self.tty:
            self.stream.write("\n")
        self.stream.write(f"{self.label}: {self.done}/{self.total} tasks, {records} records in {elapsed:.1f} s\n")
        self.stream.flush()


def _code_version() -> str:
    import diagnostics

    return diagnostics.__version__


def _check_worker_versions(client: Any) -> None:
    """Refuse a cluster whose workers run another beamdiag version (their rows would differ)."""
    import diagnostics

    versions = client.run(_code_version)
    if not versions:
        raise InputError(f"reanalyze: --scheduler {client.scheduler.address}: the cluster has no workers")
    wrong = {w: v for w, v in versions.items() if v != diagnostics.__version__}
    if wrong:
        worker, version = next(iter(wrong.items()))
        raise InputError(f"reanalyze: worker {worker} runs beamdiag {version}, this is {diagnostics.__version__} "
                         "(install the same version on every worker)")


def _start_client(scheduler: str | None, workers: int) -> tuple[Any, Any, str]:
    from distributed import Client, LocalCluster

    if scheduler:
        client = Client(scheduler)
        try:
            _check_worker_versions(client)
        except BaseException:
            client.close()
            raise
        return client, None, scheduler
    cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None)
    return Client(cluster), cluster, f"local:{workers}"


def reanalyze(store: Any, *, kind: str, start: Any = None, end: Any = None,
              options: pipeline.AnalysisOptions | Mapping | None = None, scheduler: str | None = None,
              workers: int = 2, serial: bool = False, version: str | None = None,
              progress: bool | None = None, write: bool = True,
              max_task_rows: int | None = None,
              client: Any = None) -> tuple[ReanalysisSummary, list[dict[str, Any]]]:
    """Reanalyse part of the archive and write the rows as a new result-set version.

    Parameters
    ----------
    store : diagnostics.store.Store
    kind : {"profiles", "frames", "scans"}
    start, end : optional
        Window of the raw data (naive means UTC).
    options : AnalysisOptions or mapping, optional
    scheduler : str, optional
        Address of an existing Dask scheduler (``tcp://host:8786``).
    client : distributed.Client, optional
        An already connected client (a notebook's, say): used as it is, checked for
        worker versions once, and left open.
    workers : int
        Worker processes of the local cluster when no scheduler is given.
    serial : bool
        Run the tasks one after the other in this process (no Dask).
    version : str, optional
        Version id of the new result set (default :func:`pipeline.new_version`).
    progress : bool, optional
        Show the stderr counter (default: when stderr is a terminal; the final
        summary line is printed whenever progress is not False).
    write : bool
        Write the rows to the store.

    Returns
    -------
    summary : ReanalysisSummary
    records : list of dict
        The rows, in task order (the order of :func:`plan`).
    """
    options = pipeline.AnalysisOptions.from_mapping(options)
    if not serial and scheduler is None and (not isinstance(workers, int) or workers < 1):
        raise InputError(f"reanalyze: --workers must be a whole number >= 1, got {workers!r}")
    version = version or pipeline.new_version(options)
    parts = plan(store, kind, start=start, end=end, max_task_rows=max_task_rows)
    root = str(Path(store.root))
    options_json = options.to_json()
    bar = _Progress(len(parts), f"reanalyze {kind}", enabled=progress) if progress is not False else None
    t0 = time.perf_counter()
    results: list[list[dict[str, Any]] | None] = [None] * len(parts)
    paths: list[str] = []
    pending_write: list[dict[str, Any]] = []
    next_to_write = 0

    def flush(final: bool = False) -> None:
        # write finished tasks in task order, in chunks, so a long run streams to disk
        nonlocal next_to_write, pending_write
        while next_to_write < len(results) and (done := results[next_to_write]) is not None:
            pending_write.extend(done)
            next_to_write += 1
        if write and pending_write and (final or len(pending_write) >= WRITE_CHUNK_ROWS):
            path = store.write_results(kind, pending_write, options=options.to_dict(), version=version)
            if path is not None:
                paths.append(str(path))
            pending_write = []

    if serial:
        label = "serial"
        for i, part in enumerate(parts):
            results[i] = json.loads(run_partition_json(root, kind, part.ids, options_json,
                                                       part.start_ns, part.end_ns))
            if bar:
                bar.step()
            flush()
    elif parts:
        from distributed import as_completed

        own_client = client is None
        if own_client:
            client, cluster, label = _start_client(scheduler, workers)
        else:
            _check_worker_versions(client)
            cluster, label = None, str(client.scheduler.address)
        try:
            futures = [client.submit(run_partition_json, root, kind, part.ids, options_json,
                                     part.start_ns, part.end_ns, pure=False) for part in parts]
            position = {f.key: i for i, f in enumerate(futures)}
            for future in as_completed(futures):
                results[position[future.key]] = json.loads(future.result())
                future.release()
                if bar:
                    bar.step()
                flush()
        finally:
            if own_client:
                client.close()
            if cluster is not None:
                cluster.close()
    else:
        label = "serial" if serial or scheduler is None else scheduler
    flush(final=True)
    records = [r for chunk in results if chunk for r in chunk]
    elapsed = time.perf_counter() - t0
    if bar:
        bar.close(len(records))
    summary = ReanalysisSummary(
        kind=kind, version=version, options=options.to_dict(), n_tasks=len(parts), n_records=len(records),
        n_flagged=sum(1 for r in records if r.get("flags")),
        n_failed=sum(1 for r in records if "fit_failed" in (r.get("flags") or ())),
        paths=tuple(paths), elapsed_s=elapsed, scheduler=label,
    )
    return summary, records


def records_frame(records: Sequence[Mapping[str, Any]], key: str) -> pd.DataFrame:
    """Records as a DataFrame sorted by their key column (for comparing two runs)."""
    frame = pd.DataFrame(list(records))
    return frame.sort_values(key).reset_index(drop=True) if len(frame) else frame


__all__ = [
    "MAX_TASK_ROWS",
    "REANALYSIS_KINDS",
    "Partition",
    "ReanalysisSummary",
    "plan",
    "reanalyze",
    "records_frame",
    "run_partition",
]
