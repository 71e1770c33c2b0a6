"""Cached loaders between the pages and the ``diagnostics`` library.

Every page gets its data here and nowhere else.  The rules:

* The store is opened once per process, read-only (``Store(root,
  read_only=True)``, whose DuckDB connection is sandboxed to the store folder),
  and shared through ``st.cache_resource``.
* Query results are cached with ``st.cache_data`` under small hashable keys: the
  store folder, a *stamp* that changes whenever a file is added to or replaced
  in the store (the modification times of its partition folders), and the time
  window as ISO 8601 text.  No data frame is ever a cache key, nothing is
  persisted to disk, and every cache has a ``ttl`` and ``max_entries``.
* Trends come from ``Store.trend`` (DuckDB time buckets with min/max envelopes)
  at a bucket chosen so that no series sends more than about
  :data:`MAX_POINTS` points to the browser.
* No analysis happens here: loaders call library functions and return what
  they return.
"""

from __future__ import annotations

import gc
import importlib
import json
import os
import sys
import threading
import time
from collections import OrderedDict
from collections.abc import Mapping
from concurrent.futures import CancelledError, Future, ThreadPoolExecutor
from concurrent.futures import TimeoutError as FuturesTimeout
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd
import streamlit as st

#: Environment variable naming the store folder (set by ``beamdiag dashboard``).
STORE_ENV = "BEAMDIAG_STORE"

#: Largest number of time buckets per plotted series.
MAX_POINTS = 1500

#: Candidate trend buckets, shortest first (DuckDB / pandas interval text, seconds).
BUCKETS: tuple[tuple[str, float], ...] = (
    ("1s", 1), ("2s", 2), ("5s", 5), ("10s", 10), ("20s", 20), ("30s", 30),
    ("1min", 60), ("2min", 120), ("5min", 300), ("10min", 600), ("30min", 1800),
    ("1h", 3600), ("6h", 21600), ("1D", 86400),
)

#: How long cached queries live, seconds (new files also change the stamp).
TTL_S = 300
#: A heartbeat older than this is taken as "the watch service is not running".
HEARTBEAT_FRESH_S = 120.0


_FROZEN = threading.Lock()
_frozen_once: list[bool] = []


def freeze_heap_once() -> None:
    """Take the objects alive now out of the cyclic garbage collector's scans, once per process.

    Streamlit runs ``gc.collect(2)`` after every script run (option
    ``runner.postScriptGC``).  With numpy, pandas, scipy, plotly and streamlit
    imported that walks some 150 000 long-lived objects, 0.1-0.2 s on a busy
    core during which the server's own thread waits for the interpreter lock
    and the browser for the end of the run.  ``gc.freeze()`` (Python docs,
    module gc: "move all objects tracked by the garbage collector into a
    permanent generation") leaves later collections only the newer objects.
    Called after the first page run, when the libraries are imported.
    """
    with _FROZEN:
        if _frozen_once:
            return
        _frozen_once.append(True)
    gc.collect()  # what is garbage now is freed, not frozen
    gc.freeze()


class Unavailable(RuntimeError):
    """A library piece the page needs is not installed or the store cannot be opened."""


# --------------------------------------------------------------------------- store location


def store_root(argv: list[str] | None = None) -> Path | None:
    """The store folder: ``--store DIR`` after ``--`` on the command line, else ``$BEAMDIAG_STORE``."""
    args = list(sys.argv[1:] if argv is None else argv)
    for i, arg in enumerate(args):
        if arg == "--store" and i + 1 < len(args):
            return Path(args[i + 1]).expanduser().resolve()
        if arg.startswith("--store="):
            return Path(arg.split("=", 1)[1]).expanduser().resolve()
    env = os.environ.get(STORE_ENV)
    return Path(env).expanduser().resolve() if env else None


def library(name: str):
    """Import ``diagnostics.<name>`` or raise :class:`Unavailable` with a readable reason."""
    try:
        return importlib.import_module(f"diagnostics.{name}")
    except ImportError as exc:
        raise Unavailable(f"diagnostics.{name} is not available in this installation ({exc})") from exc


@st.cache_resource(max_entries=4, show_spinner=False)
def _open_store(root: str):
    store_mod = library("store")
    return store_mod.Store(root, create=False, read_only=True)


def open_store(root: Path | str):
    """The shared read-only :class:`diagnostics.store.Store` on ``root``."""
    if not Path(root).is_dir():
        raise Unavailable(f"{root}: store folder not found")
    try:
        return _open_store(str(root))
    except Unavailable:
        raise
    except Exception as exc:  # the store's own error for a folder it cannot read
        raise Unavailable(f"{root}: cannot open the store ({type(exc).__name__}: {exc})") from exc


def stamp(root: Path | str) -> str:
    """A token that changes whenever files are added to or replaced in the store.

    Every write renames a new Parquet file into a partition folder, which
    changes that folder's modification time, so the newest ``mtime_ns`` over
    the partition folders (a few dozen ``stat`` calls) and the catalog file
    tells a cached answer from a stale one.  The store folder itself and the
    catalog's write-ahead log are left out: readers create and remove the log.
    """
    root = Path(root)
    newest = 0
    count = 0
    candidates = [root / "catalog.sqlite"]
    for sub in ("profiles", "frames", "bpm", "slow", "scans", "results"):
        base = root / sub
        candidates.append(base)
        if base.is_dir():
            for child in base.iterdir():
                candidates.append(child)
                if sub == "results" and child.is_dir():
                    candidates.extend(child.iterdir())
    for path in candidates:
        try:
            st_ = path.stat()
        except OSError:
            continue
        newest = max(newest, st_.st_mtime_ns)
        count += 1
    return f"{newest}-{count}"


# --------------------------------------------------------------------------- time windows


@dataclass(frozen=True)
class Window:
    """A time window [start, end) in UTC, with its ISO 8601 text used as cache key."""

    start: pd.Timestamp
    end: pd.Timestamp

    @property
    def key(self) -> tuple[str, str]:
        return (self.start.isoformat(), self.end.isoformat())

    @property
    def duration_s(self) -> float:
        return (self.end - self.start).total_seconds()


def utc(value: Any) -> pd.Timestamp:
    """``value`` as a tz-aware UTC timestamp (naive values are taken as UTC)."""
    ts = pd.Timestamp(value)
    return ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")


def bucket_for(duration_s: float, *, max_points: int = MAX_POINTS) -> str:
    """The shortest bucket in :data:`BUCKETS` that keeps a series under ``max_points``."""
    for name, seconds in BUCKETS:
        if duration_s / seconds <= max_points:
            return name
    return BUCKETS[-1][0]


@st.cache_data(ttl=TTL_S, max_entries=64, show_spinner=False)
def time_range(root: str, stamp_: str, kind: str) -> tuple[pd.Timestamp, pd.Timestamp] | None:
    """``Store.time_range(kind)``."""
    return open_store(root).time_range(kind)


def data_range(root: str, stamp_: str) -> tuple[pd.Timestamp, pd.Timestamp] | None:
    """First and last timestamp over every measurement kind in the store."""
    spans = []
    for kind in ("bpm", "slow", "profiles", "frames", "scans"):
        try:
            span = time_range(root, stamp_, kind)
        except Exception:  # a kind the store cannot range (e.g. no scans yet)
            span = None
        if span is not None and span[0] is not None and span[1] is not None:
            spans.append((utc(span[0]), utc(span[1])))
    if not spans:
        return None
    return min(s for s, _ in spans), max(e for _, e in spans)


@st.cache_data(ttl=TTL_S, max_entries=16, show_spinner=False)
def last_seen(root: str, stamp_: str) -> dict[str, pd.Timestamp | None]:
    """``Store.last_seen()``: newest timestamp per kind."""
    return dict(open_store(root).last_seen())


# --------------------------------------------------------------------------- trends and tables


@st.cache_data(ttl=TTL_S, max_entries=32, show_spinner=False)
def trend(root: str, stamp_: str, kind: str, value_columns: tuple[str, ...], window: tuple[str, str],
          bucket: str, devices: tuple[str, ...] | None = None) -> pd.DataFrame:
    """``Store.trend``: per device and bucket, mean/min/max/rms/count of each column."""
    start, end = window
    return open_store(root).trend(kind, list(value_columns), bucket=bucket, start=start, end=end,
                                  devices=list(devices) if devices else None)


@st.cache_data(ttl=TTL_S, max_entries=32, show_spinner=False)
def results(root: str, stamp_: str, kind: str, window: tuple[str, str] | None = None) -> pd.DataFrame:
    """``Store.read_results(kind)`` in the window (empty frame when there are none)."""
    start, end = window if window else (None, None)
    return open_store(root).read_results(kind, start=start, end=end)


@st.cache_data(ttl=TTL_S, max_entries=16, show_spinner=False)
def read_slow(root: str, stamp_: str, window: tuple[str, str]) -> pd.DataFrame:
    """``Store.read_slow`` in the window (slow channels are small)."""
    start, end = window
    return open_store(root).read_slow(start=start, end=end)


@st.cache_data(ttl=TTL_S, max_entries=8, show_spinner=False)
def read_bpm(root: str, stamp_: str, window: tuple[str, str], bpms: tuple[str, ...] | None = None) -> pd.DataFrame:
    """``Store.read_bpm`` in the window."""
    start, end = window
    return open_store(root).read_bpm(start=start, end=end, bpms=list(bpms) if bpms else None)


@st.cache_data(ttl=TTL_S, max_entries=16, show_spinner=False)
def quarantine_count(root: str, stamp_: str) -> int:
    """Number of quarantined inputs."""
    return len(open_store(root).quarantine_list())


@st.cache_data(ttl=TTL_S, max_entries=16, show_spinner=False)
def list_scans(root: str, stamp_: str) -> pd.DataFrame:
    """``Store.list_scans()``."""
    return open_store(root).list_scans()


@st.cache_data(ttl=TTL_S, max_entries=16, show_spinner=False)
def profile_index(root: str, stamp_: str, window: tuple[str, str] | None = None) -> pd.DataFrame:
    start, end = window if window else (None, None)
    return open_store(root).profile_index(start=start, end=end)


@st.cache_data(ttl=TTL_S, max_entries=16, show_spinner=False)
def frame_index(root: str, stamp_: str, window: tuple[str, str] | None = None) -> pd.DataFrame:
    start, end = window if window else (None, None)
    return open_store(root).frame_index(start=start, end=end)


@st.cache_data(ttl=TTL_S, max_entries=16, show_spinner=False)
def read_profile(root: str, stamp_: str, profile_id: str):
    return open_store(root).read_profile(profile_id)


@st.cache_data(ttl=TTL_S, max_entries=8, show_spinner=False)
def read_frame(root: str, stamp_: str, frame_id: str):
    return open_store(root).read_frame(frame_id)


def heartbeat(root: str) -> dict | None:
    """The watch service's heartbeat (``service.read_heartbeat``), or ``None``; never cached."""
    try:
        service = library("service")
    except Unavailable:
        return None
    try:
        return service.read_heartbeat(open_store(root))
    except Exception:  # an unreadable heartbeat is no heartbeat
        return None


def heartbeat_time(beat: Mapping[str, Any] | None) -> pd.Timestamp | None:
    """When the heartbeat was written (its ``time`` field), or ``None``."""
    if not beat or not beat.get("time"):
        return None
    try:
        return utc(beat["time"])
    except (TypeError, ValueError):
        return None


def heartbeat_is_fresh(beat: Mapping[str, Any] | None, *, now: pd.Timestamp | None = None) -> bool:
    """True when the watch service says ``running`` and beat recently.

    Recently means within :data:`HEARTBEAT_FRESH_S` or three of its own cycle
    intervals, whichever is longer.
    """
    when = heartbeat_time(beat)
    if when is None or beat.get("state", "running") != "running":
        return False
    now = now or pd.Timestamp.now(tz="UTC")
    try:
        interval = float(beat.get("interval_s") or 0.0)
    except (TypeError, ValueError):
        interval = 0.0
    return (now - when).total_seconds() <= max(HEARTBEAT_FRESH_S, 3.0 * interval)


def options_of(row: Mapping[str, Any]) -> dict:
    """The analysis options stored with a result row (JSON text), as a dict."""
    raw = row.get("options")
    if isinstance(raw, str) and raw:
        try:
            value = json.loads(raw)
        except ValueError:
            return {}
        return value if isinstance(value, dict) else {}
    return dict(raw) if isinstance(raw, Mapping) else {}


# --------------------------------------------------------------------------- analysis calls


def _orbit_job(root: str, start: str, end: str):
    """Read the window's BPM and slow readings and run ``orbit.analyze_orbit`` (worker thread).

    The worker opens its own read-only :class:`Store`: the shared one belongs to
    the script threads.
    """
    orbit = library("orbit")
    store = library("store").Store(root, create=False, read_only=True)
    bpm = store.read_bpm(start=start, end=end)
    if bpm.empty:
        return None
    slow = store.read_slow(start=start, end=end)
    return orbit.analyze_orbit(bpm, slow_df=slow if len(slow) else None)


#: A new orbit analysis waits this long on its worker before it starts, seconds.  The
#: page run that asked for it is then done sending its elements: on 2 cores a worker
#: busy in Python holds the interpreter lock and slows the server's own thread.
START_PAUSE_S = 0.4


def _after_pause(job, *args):
    """``job(*args)`` after :data:`START_PAUSE_S` (runs on the orbit worker)."""
    time.sleep(START_PAUSE_S)
    return job(*args)


@dataclass(frozen=True)
class OrbitAnswer:
    """What :func:`orbit_report` can give now.

    ``ready``: the report of exactly this window and store state is done.
    ``report``: that report, or while it is being computed the newest finished
    report of a window covering most of this one (``updating`` is then True),
    or ``None``.
    """

    ready: bool
    report: Any = None
    updating: bool = False
    window: tuple[str, str] | None = None


def _overlap(a: tuple[str, str], b: tuple[str, str]) -> float:
    """Fraction of window ``a`` that ``b`` covers."""
    a0, a1, b0, b1 = (utc(v) for v in (*a, *b))
    total = (a1 - a0).total_seconds()
    common = (min(a1, b1) - max(a0, b0)).total_seconds()
    return max(0.0, common) / total if total > 0 else 0.0


class OrbitJobs:
    """Orbit analyses running or done, on one worker thread, the newest few kept.

    Analysing a whole shift (millions of readings) takes seconds, longer than a
    page may block, so pages ask for the report, show what is ready and poll
    until the rest arrives.  One worker leaves the other core to the server;
    a new request cancels requests of the same store still waiting in the queue.
    """

    #: A finished report of another window stands in while it covers this much of the new one.
    STAND_IN_OVERLAP = 0.8

    def __init__(self, max_entries: int = 6):
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="beamdiag-orbit")
        self._jobs: OrderedDict[tuple, Future] = OrderedDict()
        self._lock = threading.Lock()
        self._max = max_entries

    def submit(self, root: str, stamp_: str, window: tuple[str, str]) -> Future:
        key = (root, stamp_, window)
        with self._lock:
            job = self._jobs.get(key)
            failed_long_ago = (job is not None and job.done() and not job.cancelled()
                               and job.exception() is not None
                               and time.monotonic() - getattr(job, "started", 0.0) > TTL_S)
            if job is None or job.cancelled() or failed_long_ago:
                for other_key, other in self._jobs.items():
                    if other_key[0] == root and other_key != key:
                        other.cancel()  # only succeeds while it waits in the queue
                job = self._pool.submit(_after_pause, _orbit_job, root, *window)
                job.started = time.monotonic()  # type: ignore[attr-defined]
                self._jobs[key] = job
            self._jobs.move_to_end(key)
            while len(self._jobs) > self._max:
                self._jobs.popitem(last=False)
        return job

    def get(self, root: str, stamp_: str, window: tuple[str, str]) -> Future | None:
        """The job of exactly this request, if there is a live one."""
        with self._lock:
            job = self._jobs.get((root, stamp_, window))
        return None if job is None or job.cancelled() else job

    def stand_in(self, root: str, window: tuple[str, str]) -> tuple[tuple[str, str], Any] | None:
        """The newest finished report of ``root`` whose window covers most of ``window``."""
        with self._lock:
            items = list(self._jobs.items())
        for (r, _stamp, w), job in reversed(items):
            if r != root or not job.done() or job.cancelled() or job.exception() is not None:
                continue
            if job.result() is not None and _overlap(window, w) >= self.STAND_IN_OVERLAP:
                return w, job.result()
        return None


@st.cache_resource(show_spinner=False)
def orbit_jobs() -> OrbitJobs:
    return OrbitJobs()


def orbit_report(root: str, stamp_: str, window: tuple[str, str], *, wait_s: float = 0.0,
                 start: bool = True) -> OrbitAnswer:
    """The window's :class:`~diagnostics.orbit.OrbitReport`, as far as it is ready.

    The analysis runs on a worker thread; this waits at most ``wait_s``.  A
    finished analysis gives ``OrbitAnswer(True, report)`` (``report`` is
    ``None`` when the window holds no BPM readings); an analysis that raised
    re-raises here.  With ``start=False`` an analysis not yet asked for is not
    started (a page does that after its first render, so the two do not compete).
    """
    jobs = orbit_jobs()
    job = jobs.submit(root, stamp_, window) if start else jobs.get(root, stamp_, window)
    if job is None:  # not asked for yet, and told not to start it
        stand_in = jobs.stand_in(root, window)
        return OrbitAnswer(False) if stand_in is None else OrbitAnswer(False, stand_in[1], True, stand_in[0])
    try:
        return OrbitAnswer(True, job.result(timeout=max(wait_s, 0.001)), window=window)
    except (FuturesTimeout, CancelledError):
        stand_in = jobs.stand_in(root, window)
        if stand_in is None:
            return OrbitAnswer(False)
        return OrbitAnswer(False, stand_in[1], updating=True, window=stand_in[0])


# --------------------------------------------------------------------------- warming caches ahead

_WARM_POOL = ThreadPoolExecutor(max_workers=1, thread_name_prefix="beamdiag-warm")
_WARM_LOCK = threading.Lock()
_warmed: OrderedDict[tuple, None] = OrderedDict()


def prewarm(key: tuple, tasks: list[tuple[Any, tuple]]) -> bool:
    """Run ``func(*args)`` for each task on a background thread, once per ``key``.

    Pages hand over the cached loaders of windows the operator is likely to
    pick next (the other presets), so that picking one finds its queries in
    the caches.  The thread carries the calling script's run context, which
    ``st.cache_data`` needs; it waits :data:`START_PAUSE_S` first so the page
    run that asked is done.  A failing task is skipped: the page computes it
    again when it is asked for.  Returns False when ``key`` was warmed already.
    """
    from streamlit.runtime.scriptrunner import add_script_run_ctx, get_script_run_ctx

    with _WARM_LOCK:
        if key in _warmed:
            return False
        _warmed[key] = None
        while len(_warmed) > 16:
            _warmed.popitem(last=False)
    ctx = get_script_run_ctx(suppress_warning=True)

    def run() -> None:
        if ctx is not None:
            add_script_run_ctx(threading.current_thread(), ctx)
        time.sleep(START_PAUSE_S)
        for func, args in tasks:
            try:
                func(*args)
            except Exception:  # noqa: BLE001, S112 - only a head start; the page asks again
                continue

    _WARM_POOL.submit(run)
    return True


@st.cache_data(ttl=TTL_S, max_entries=16, show_spinner="Loading the scan ...")
def load_scan(root: str, stamp_: str, scan_id: str):
    """``Store.load_scan(scan_id)``."""
    return open_store(root).load_scan(scan_id)


@st.cache_data(ttl=TTL_S, max_entries=32, show_spinner="Fitting the scan ...")
def analyze_scan(root: str, stamp_: str, scan_id: str, options: tuple[tuple[str, Any], ...]):
    """``emittance.analyze_scan`` of a stored scan with ``options`` (sorted key/value pairs),
    and its ``scan_plot_data``."""
    emittance = library("emittance")
    spec = load_scan(root, stamp_, scan_id)
    result = emittance.analyze_scan(spec, **dict(options))
    return result, emittance.scan_plot_data(result, spec)


@st.cache_data(ttl=TTL_S, max_entries=32, show_spinner=False)
def drift_trend(root: str, stamp_: str, window: tuple[str, str], bucket: str):
    """Orbit drift per BPM on time buckets, from decimated readings.

    ``Store.trend`` gives per-BPM bucket means (DuckDB, no raw rows in pandas);
    :func:`diagnostics.orbit.drift_matrix` takes those means as readings on the
    same buckets and subtracts its reference orbit (the mean of the first
    minutes).  Returns ``(times, bpms, drift_x_m, drift_y_m, trend_frame)`` or
    ``None`` when the window holds no readings.
    """
    orbit = library("orbit")
    tr = trend(root, stamp_, "bpm", ("x_m", "y_m"), window, bucket)
    if tr.empty:
        return None
    readings = pd.DataFrame({"timestamp": tr["timestamp"], "bpm": tr["device"], "x_m": tr["x_m_mean"],
                             "y_m": tr["y_m_mean"], "sum": float("nan")})
    times, bpms, dx, dy = orbit.drift_matrix(readings, bucket=bucket)
    return times, bpms, dx, dy, tr
