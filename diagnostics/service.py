"""The inbox service behind ``beamdiag watch``.

Producers drop measurement files and quad-scan folders into an inbox folder; the
service notices them, stores them with :meth:`diagnostics.store.Store.ingest`,
runs the matching analysis (:mod:`diagnostics.pipeline`), writes the results and
only then moves each input out of the inbox.

Inbox layout
------------
``INBOX/``
    where producers put files (any depth) and scan folders (a folder holding
    ``scan.json``).  Names starting with ``.`` or ``~`` and names ending in
    ``.part`` or ``.tmp`` are ignored: producers write ``name.part`` and rename it
    into place when it is whole.
``INBOX/.work/<unit>/``
    claimed inputs being processed (the claim is an ``os.rename``, atomic on one
    filesystem); a restart retries what it finds here before anything else.
``INBOX/done/``
    inputs that are safely stored (unless ``--delete``).
``INBOX/quarantined/``
    inputs the store rejected (the store keeps a copy and the reason as well).
``INBOX/darks/``
    dark frames that sidecars refer to; never claimed, never moved.

When is a file ready?
---------------------
A periodic scan of the inbox is the source of truth (it works on network
filesystems, where change notifications from other hosts never arrive and it
survives restarts).  A file is ready when

* it was renamed into place: the watchdog ``moved`` event says so (``--events``),
  or its inode change time is later than its modification time -- a rename
  updates ``st_ctime`` but not ``st_mtime`` (POSIX ``rename``; Linux local
  filesystems keep nanosecond times), while a writer appending to the file moves
  both together; or
* its ``(size, mtime_ns)`` has not changed for ``stable_seconds`` of our clock.

An image is ready with its JSON sidecar (same stem); an image still without a
sidecar after ``sidecar_wait_s`` is handed to the store, which quarantines it.
A scan folder is ready when all its files are ready and the scan is complete
(``complete`` marker or ``expected_steps`` reached); while it is still filling,
each new step gets a provisional fit (result kind ``scans`` with
``provisional=True``) and the folder stays where it is.

Exactly once
------------
Order per input: claim (rename into ``.work``) -> ``Store.ingest`` (the store's
sha256 catalog makes a repeated ingest a no-op, and its content-hash file names
make a repeated write idempotent) -> analysis -> results written -> input moved
to ``done``.  After a crash at any point the restart finds the input in
``.work``, ingests it again (a duplicate, so nothing new is stored), drops
result rows that are already in the store for its raw ids, and finishes it.

Heartbeat
---------
``STORE/service/heartbeat.json`` is replaced atomically every cycle; see
:func:`read_heartbeat`.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import signal
import sqlite3
import sys
import threading
import time
import uuid
from collections.abc import Mapping, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from diagnostics import __version__, pipeline
from diagnostics.errors import InputError, StoreError

#: Folders of the inbox the service owns; they are never scanned for inputs.
WORK_DIR = ".work"
DONE_DIR = "done"
QUARANTINE_DIR = "quarantined"
DARKS_DIR = "darks"
RESERVED_DIRS = (WORK_DIR, DONE_DIR, QUARANTINE_DIR, DARKS_DIR)

#: Suffixes of images that come with a JSON sidecar of the same stem.
IMAGE_SUFFIXES = (".png", ".tif", ".tiff", ".npy")

#: Name of the file in a scan folder that says "this scan is complete".
COMPLETE_MARKER = "complete"

#: Subfolder of the store for the service's own files.
SERVICE_DIR = "service"
HEARTBEAT_NAME = "heartbeat.json"
STATE_NAME = "state.json"

#: Manifest of a claimed unit inside ``.work/<unit>/``.
UNIT_MANIFEST = ".unit.json"

#: Suffixes of ``.work/<unit>.<status>`` folders: stored and analysed, only to be moved out.
FINISHED = ("stored", "duplicate", "quarantined")


def is_ignored(name: str) -> bool:
    """True for names producers use while writing (``.x``, ``~x``, ``x.part``, ``x.tmp``)."""
    return name.startswith((".", "~")) or name.endswith((".part", ".tmp"))


def _now_utc() -> pd.Timestamp:
    return pd.Timestamp.now(tz="UTC")


def _iso(t: pd.Timestamp | None) -> str | None:
    return None if t is None else t.isoformat().replace("+00:00", "Z")


def write_json_atomic(path: Path, data: Mapping[str, Any], *, durable: bool = True) -> None:
    """Write JSON to ``path`` through a temporary file and ``os.replace`` (never half a file).

    ``durable`` also flushes it to disk (``fsync``) before the rename, so it survives
    a power cut as well as a crash of the process.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex}.tmp")
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(data, fh, indent=1, sort_keys=True)
        if durable:
            fh.flush()
            os.fsync(fh.fileno())
    os.replace(tmp, path)


def _remove_tree(folder: Path) -> None:
    """Remove a unit folder: a manifest, copies of dark frames and empty folders."""
    with contextlib.suppress(FileNotFoundError):
        (folder / UNIT_MANIFEST).unlink()
    try:
        folder.rmdir()
    except OSError:
        shutil.rmtree(folder, ignore_errors=True)


def heartbeat_path(store_root: str | os.PathLike) -> Path:
    """Where ``beamdiag watch`` writes its heartbeat for the store at ``store_root``."""
    return Path(store_root) / SERVICE_DIR / HEARTBEAT_NAME


def read_heartbeat(store_root: Any) -> dict[str, Any] | None:
    """The watch service's last heartbeat for a store, or None when there is none.

    Parameters
    ----------
    store_root : path or diagnostics.store.Store
        The store (its ``root``) the service writes into.

    Returns
    -------
    dict or None
        Keys: ``time`` (ISO 8601 UTC of the last cycle), ``started``, ``pid``,
        ``inbox``, ``store``, ``state`` (``running`` or ``stopped``), ``cycles``,
        ``files_processed``, ``stored``, ``duplicates``, ``quarantined``, ``errors``,
        ``pending``, ``lag_s`` (now minus the oldest pending input's mtime, at the
        last cycle), ``last_cycle_s``, ``interval_s``, ``version``, ``last_error``,
        plus ``age_s``: seconds since ``time``, computed when read.
    """
    root = store_root if isinstance(store_root, (str, os.PathLike)) else store_root.root
    path = heartbeat_path(root)
    try:
        with open(path, encoding="utf-8") as fh:
            data = json.load(fh)
    except (FileNotFoundError, NotADirectoryError, json.JSONDecodeError, UnicodeDecodeError, PermissionError):
        return None
    if not isinstance(data, dict):
        return None
    try:
        data["age_s"] = (_now_utc() - pd.Timestamp(data["time"])).total_seconds()
    except (KeyError, TypeError, ValueError):
        data["age_s"] = None
    return data


# --------------------------------------------------------------------------------------
# Finding inputs
# --------------------------------------------------------------------------------------


@dataclass
class _Seen:
    """What the scanner remembers of one file between scans."""

    size: int
    mtime_ns: int
    since: float  # monotonic time when this (size, mtime_ns) was first seen


@dataclass(frozen=True)
class Unit:
    """One input as the service handles it: a file, an image with its sidecar, or a scan folder.

    ``rel`` is the main path relative to the inbox (the image, the file, the
    folder); ``members`` every inbox-relative path that moves with it.
    """

    kind: str  # "file" | "frame" | "scan"
    rel: str
    members: tuple[str, ...]
    oldest_mtime_ns: int


@dataclass
class ServiceStats:
    """Counters reported in the heartbeat."""

    cycles: int = 0
    files_processed: int = 0
    stored: int = 0
    duplicates: int = 0
    quarantined: int = 0
    errors: int = 0
    results_written: int = 0
    provisional_fits: int = 0
    orbit_summaries: int = 0
    compactions: int = 0
    recovered: int = 0
    last_error: str = ""


@dataclass
class _ScanWatch:
    """A scan folder still filling: its last signature and the step count last fitted."""

    signature: tuple = ()
    fitted_steps: int = -1


@dataclass
class WatchConfig:
    """Settings of :class:`WatchService` (the ``beamdiag watch`` options).

    Attributes
    ----------
    interval_s : float
        Seconds between inbox scans.
    stable_seconds : float
        A file not renamed into place is ready when unchanged this long.
    delete : bool
        Delete inputs once stored instead of moving them to ``done/``.
    events : bool
        Use watchdog change notifications as a wake-up (if watchdog is installed).
    sidecar_wait_s : float
        How long an image may wait for its sidecar (and a sidecar for its image)
        before it is handed to the store alone (which quarantines it).
    orbit_every_s : float
        Seconds between orbit summaries (0 disables them).
    orbit_interval : str
        Interval of each orbit summary (pandas offset text).
    compact_every_s : float
        Seconds between store compactions (0 disables them); the first runs one
        period after start, and a compaction also runs when the UTC day changes.
    max_batch : int
        Most inputs handled in one cycle (keeps the heartbeat fresh).
    ingest_threads : int
        Inputs ingested at the same time (their waits on disk and catalog overlap).
    options : AnalysisOptions
    """

    interval_s: float = 2.0
    stable_seconds: float = 4.0
    delete: bool = False
    events: bool = False
    sidecar_wait_s: float = 10.0
    orbit_every_s: float = 600.0
    orbit_interval: str = "10min"
    compact_every_s: float = 3600.0
    max_batch: int = 200
    ingest_threads: int = 3
    options: pipeline.AnalysisOptions = field(default_factory=pipeline.AnalysisOptions)

    def __post_init__(self) -> None:
        options = {"interval_s": "--interval", "stable_seconds": "--stable-seconds",
                   "sidecar_wait_s": "--sidecar-wait", "orbit_every_s": "--orbit-every",
                   "compact_every_s": "--compact-every"}
        for name, option in options.items():
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and value >= 0):
                raise InputError(f"watch: {option} must be a number of seconds >= 0, got {value!r}")
        if self.interval_s <= 0:
            raise InputError(f"watch: --interval must be > 0 seconds, got {self.interval_s!r}")
        if not isinstance(self.ingest_threads, int) or self.ingest_threads < 1:
            raise InputError(f"watch: ingest_threads must be >= 1, got {self.ingest_threads!r}")
        if self.max_batch < 1:
            raise InputError(f"watch: max_batch must be >= 1, got {self.max_batch!r}")
        try:
            span = pd.Timedelta(self.orbit_interval)
        except ValueError:
            span = None
        if span is None or span <= pd.Timedelta(0):
            raise InputError(f"watch: --orbit-interval must be a positive span such as 10min or 1h, got {self.orbit_interval!r}")


class WatchService:
    """Takes inputs from an inbox into a store and analyses them; see the module docstring.

    Parameters
    ----------
    inbox : path
        The inbox folder (created if missing).
    store : diagnostics.store.Store
    config : WatchConfig, optional
    log : file-like, optional
        Where one-line log messages go (default stderr).
    """

    def __init__(self, inbox: str | os.PathLike, store: Any, config: WatchConfig | None = None, *,
                 log: Any = None) -> None:
        self.inbox = Path(inbox).resolve()
        self.store = store
        self.config = config or WatchConfig()
        self.log_stream = log if log is not None else sys.stderr
        self.stats = ServiceStats()
        self.version = pipeline.default_version(self.config.options)
        self._stop = threading.Event()
        self._wake = threading.Event()
        self._seen: dict[str, _Seen] = {}
        self._renamed: set[str] = set()
        self._renamed_lock = threading.Lock()
        self._scans: dict[str, _ScanWatch] = {}
        self._darks: set[str] = set()
        self._sidecar_cache: dict[str, tuple[int, int, str | None]] = {}
        self._started = _now_utc()
        self._last_lag_s = 0.0
        self._pending = 0
        self._last_cycle_s = 0.0
        self._backlog = False
        self._observer: Any = None
        state = self._load_state()
        self._last_orbit_wall = state.get("last_orbit")
        self._last_compact_wall = state.get("last_compact")
        self._darks.update(state.get("darks", []))
        self._t_orbit = time.monotonic()
        self._t_compact = time.monotonic()
        self._day = _now_utc().date()
        for sub in (WORK_DIR, DONE_DIR, QUARANTINE_DIR):
            (self.inbox / sub).mkdir(parents=True, exist_ok=True)
        self._catalog_hold = self._hold_catalog()
        self._pool = ThreadPoolExecutor(max_workers=self.config.ingest_threads, thread_name_prefix="ingest")
        self._housekeeping = ThreadPoolExecutor(max_workers=1, thread_name_prefix="housekeeping")
        self._job: Future | None = None
        self._stats_lock = threading.Lock()
        self._old_handlers: dict[int, Any] = {}

    def _hold_catalog(self) -> sqlite3.Connection | None:
        """Keep one idle connection to the store's catalog open while the service runs.

        SQLite checkpoints and removes the write-ahead log whenever the last
        connection to a WAL database closes.  When the store opened a connection
        per operation this halved the ingest time of a small file (measured here);
        with the store's per-thread connections it is a cheap safeguard.
        """
        path = Path(self.store.root) / "catalog.sqlite"
        if not path.exists():
            return None
        try:
            con = sqlite3.connect(path, timeout=60, check_same_thread=False)
            con.execute("SELECT 1").fetchall()
            return con
        except sqlite3.Error:
            return None

    # ---------------------------------------------------------------- logging / state
    def log(self, message: str) -> None:
        stamp = _iso(_now_utc().floor("ms"))
        print(f"{stamp} beamdiag watch: {message}", file=self.log_stream, flush=True)

    @property
    def _service_dir(self) -> Path:
        return Path(self.store.root) / SERVICE_DIR

    def _load_state(self) -> dict[str, Any]:
        try:
            with open(Path(self.store.root) / SERVICE_DIR / STATE_NAME, encoding="utf-8") as fh:
                data = json.load(fh)
            return data if isinstance(data, dict) else {}
        except (FileNotFoundError, json.JSONDecodeError, UnicodeDecodeError):
            return {}

    def _save_state(self) -> None:
        write_json_atomic(self._service_dir / STATE_NAME, {
            "darks": sorted(self._darks),
            "last_orbit": self._last_orbit_wall,
            "last_compact": self._last_compact_wall,
        })

    def heartbeat(self, state: str = "running") -> dict[str, Any]:
        """Write the heartbeat file now; return what was written."""
        data = {
            "time": _iso(_now_utc()),
            "started": _iso(self._started),
            "pid": os.getpid(),
            "inbox": str(self.inbox),
            "store": str(self.store.root),
            "state": state,
            "interval_s": self.config.interval_s,
            "pending": self._pending,
            "lag_s": round(self._last_lag_s, 3),
            "last_cycle_s": round(self._last_cycle_s, 3),
            "version": self.version,
            "code_version": __version__,
            **{k: v for k, v in vars(self.stats).items()},
        }
        write_json_atomic(heartbeat_path(self.store.root), data)
        return data

    # ---------------------------------------------------------------- control
    def stop(self, *_args: Any) -> None:
        """Ask the service to stop after the input it is handling (signal handler)."""
        self._stop.set()
        self._wake.set()

    @property
    def stopping(self) -> bool:
        return self._stop.is_set()

    def install_signal_handlers(self) -> None:
        """SIGTERM and SIGINT finish the current input, then stop cleanly.

        The previous handlers come back when :meth:`run` returns.
        """
        for sig in (signal.SIGTERM, signal.SIGINT):
            self._old_handlers[sig] = signal.signal(sig, self.stop)

    def _start_events(self) -> None:
        try:
            from watchdog.events import FileSystemEventHandler
            from watchdog.observers import Observer
        except ImportError:
            self.log("--events: watchdog is not installed; using periodic scans only")
            return
        service = self

        class _Handler(FileSystemEventHandler):
            def on_moved(self, event):  # a rename into place: ready now
                dest = Path(os.fsdecode(event.dest_path))
                with contextlib.suppress(ValueError):
                    rel = dest.relative_to(service.inbox).as_posix()
                    with service._renamed_lock:
                        service._renamed.add(rel)
                service._wake.set()

            def on_closed(self, event):
                service._wake.set()

        observer = Observer()
        observer.schedule(_Handler(), str(self.inbox), recursive=True)
        observer.daemon = True
        observer.start()
        self._observer = observer

    # ---------------------------------------------------------------- scanning
    def _walk(self) -> tuple[list[str], list[str]]:
        """Inbox-relative paths of candidate files and of scan folders (sorted)."""
        files: list[str] = []
        scans: list[str] = []
        stack = [(self.inbox, "")]
        while stack:
            folder, prefix = stack.pop()
            try:
                entries = list(os.scandir(folder))
            except FileNotFoundError:
                continue
            for entry in entries:
                name = entry.name
                if is_ignored(name):
                    continue
                rel = f"{prefix}{name}"
                if entry.is_dir(follow_symlinks=False):
                    if not prefix and name in RESERVED_DIRS:
                        continue
                    if os.path.exists(os.path.join(entry.path, "scan.json")):
                        scans.append(rel)
                    else:
                        stack.append((Path(entry.path), f"{rel}/"))
                elif entry.is_file(follow_symlinks=False):
                    files.append(rel)
        return sorted(files), sorted(scans)

    def _file_ready(self, rel: str, now: float) -> tuple[bool, int] | None:
        """(ready, mtime_ns) of one inbox file, or None when it vanished."""
        try:
            st = os.stat(self.inbox / rel)
        except FileNotFoundError:
            self._seen.pop(rel, None)
            return None
        seen = self._seen.get(rel)
        if seen is None or seen.size != st.st_size or seen.mtime_ns != st.st_mtime_ns:
            seen = _Seen(st.st_size, st.st_mtime_ns, now)
            self._seen[rel] = seen
        with self._renamed_lock:
            renamed = rel in self._renamed
        # rename() changes the inode's ctime, not its mtime; a writer moves both together
        renamed = renamed or st.st_ctime_ns > st.st_mtime_ns
        stable = (now - seen.since) >= self.config.stable_seconds
        return (renamed or stable), st.st_mtime_ns

    def _sidecar_dark(self, rel: str) -> str | None:
        """Inbox-relative path of the dark frame a sidecar names (cached by size/mtime)."""
        path = self.inbox / rel
        try:
            st = os.stat(path)
        except FileNotFoundError:
            return None
        cached = self._sidecar_cache.get(rel)
        if cached and cached[:2] == (st.st_size, st.st_mtime_ns):
            return cached[2]
        dark_rel = None
        try:
            with open(path, encoding="utf-8") as fh:
                data = json.load(fh)
            dark = data.get("dark") if isinstance(data, dict) else None
            if isinstance(dark, str) and dark:
                target = (path.parent / dark).resolve()
                with contextlib.suppress(ValueError):
                    dark_rel = target.relative_to(self.inbox).as_posix()
        except (OSError, json.JSONDecodeError, UnicodeDecodeError):
            dark_rel = None
        self._sidecar_cache[rel] = (st.st_size, st.st_mtime_ns, dark_rel)
        return dark_rel

    def _scan_folder_state(self, rel: str, now: float) -> tuple[bool, bool, tuple, int]:
        """(all files ready, complete, signature, oldest mtime_ns) of a scan folder."""
        folder = self.inbox / rel
        ready = True
        signature = []
        oldest = None
        for path in sorted(p for p in folder.rglob("*") if p.is_file()):
            sub = path.relative_to(self.inbox).as_posix()
            if is_ignored(path.name):
                ready = False  # a step file still being written
                continue
            state = self._file_ready(sub, now)
            if state is None:
                ready = False
                continue
            ok, mtime_ns = state
            ready &= ok
            oldest = mtime_ns if oldest is None else min(oldest, mtime_ns)
            signature.append((sub, self._seen[sub].size, mtime_ns))
        complete = (folder / COMPLETE_MARKER).exists()
        if not complete:
            try:
                with open(folder / "scan.json", encoding="utf-8") as fh:
                    manifest = json.load(fh)
                expected = manifest.get("expected_steps") if isinstance(manifest, dict) else None
                steps = manifest.get("steps") if isinstance(manifest, dict) else None
                if expected is None or (isinstance(steps, list) and isinstance(expected, int)
                                        and len(steps) >= expected):
                    complete = True
            except (OSError, json.JSONDecodeError, UnicodeDecodeError):
                complete = True  # unreadable manifest: let the store quarantine it
        return ready, complete, tuple(signature), (oldest or time.time_ns())

    def discover(self) -> tuple[list[Unit], list[str], int | None]:
        """Scan the inbox once.

        Returns
        -------
        ready : list of Unit
            Inputs ready to be claimed, oldest first.
        filling : list of str
            Scan folders whose files are ready but whose scan is not complete.
        oldest_pending_mtime_ns : int or None
            mtime of the oldest input still waiting (for the lag), scans still
            filling excluded.
        """
        now = time.monotonic()
        files, scans = self._walk()
        ready: list[Unit] = []
        filling: list[str] = []
        oldest: int | None = None

        def note(mtime_ns: int) -> None:
            nonlocal oldest
            oldest = mtime_ns if oldest is None else min(oldest, mtime_ns)

        for rel in scans:
            ok, complete, signature, oldest_ns = self._scan_folder_state(rel, now)
            if complete:
                self._scans.pop(rel, None)
                note(oldest_ns)
                if ok:
                    ready.append(Unit("scan", rel, (rel,), oldest_ns))
            else:
                # still being recorded: waits for its producer (not counted in the lag)
                watch = self._scans.setdefault(rel, _ScanWatch())
                if ok and watch.signature != signature:
                    watch.signature = signature
                    filling.append(rel)

        present = set(files)
        # sidecars name dark frames: those are auxiliary, never inputs of their own
        for rel in files:
            if rel.endswith(".json"):
                stem = rel[: -len(".json")]
                dark = self._sidecar_dark(rel)
                if dark is not None:
                    self._darks.add(dark)
        used: set[str] = set()
        for rel in files:
            if rel in used or rel in self._darks:
                continue
            suffix = os.path.splitext(rel)[1].lower()
            state = self._file_ready(rel, now)
            if state is None:
                continue
            ok, mtime_ns = state
            if suffix in IMAGE_SUFFIXES or suffix == ".json":
                stem = rel[: -len(suffix)]
                if suffix == ".json":
                    images = [f"{stem}{s}" for s in IMAGE_SUFFIXES if f"{stem}{s}" in present]
                    if images:
                        continue  # handled with its image
                    partner = None
                else:
                    partner = f"{stem}.json" if f"{stem}.json" in present else None
                note(mtime_ns)
                members = [rel]
                if partner is not None:
                    pstate = self._file_ready(partner, now)
                    if pstate is None:
                        continue
                    ok = ok and pstate[0]
                    members.append(partner)
                    used.add(partner)
                    mtime_ns = min(mtime_ns, pstate[1])
                elif ok:
                    # alone: wait for the partner a while, then let the store judge it
                    ok = (now - self._seen[rel].since) >= self.config.sidecar_wait_s
                if ok:
                    ready.append(Unit("frame" if suffix != ".json" else "file", rel, tuple(members), mtime_ns))
            else:
                note(mtime_ns)
                if ok:
                    ready.append(Unit("file", rel, (rel,), mtime_ns))
        ready.sort(key=lambda u: (u.oldest_mtime_ns, u.rel))
        # forget files that are gone
        alive = present | {s for s in self._seen if any(s.startswith(f"{d}/") for d in scans)}
        for rel in list(self._seen):
            if rel not in alive:
                self._seen.pop(rel, None)
        for rel in list(self._scans):
            if rel not in scans:
                self._scans.pop(rel, None)
        return ready, filling, oldest

    # ---------------------------------------------------------------- claiming
    def _unique(self, target: Path) -> Path:
        if not target.exists():
            return target
        for n in range(1, 100000):
            candidate = target.with_name(f"{target.name}.{n}")
            if not candidate.exists():
                return candidate
        raise RuntimeError(f"no free name for {target}")

    def claim(self, unit: Unit) -> Path | None:
        """Move a unit's files into ``.work/<id>/`` (atomic renames); its folder, or None if gone."""
        uid = f"{time.time_ns():x}-{uuid.uuid4().hex[:8]}"
        work = self.inbox / WORK_DIR / uid
        work.mkdir(parents=True)
        darks = []
        if unit.kind == "frame":
            for member in unit.members:
                if member.endswith(".json"):
                    dark = self._sidecar_dark(member)
                    if dark is not None and dark not in unit.members:
                        darks.append(dark)
        # not fsync'ed: after a power cut a unit folder without its manifest is handed
        # back to the inbox whole (see _work_units), so nothing depends on it being on disk
        write_json_atomic(work / UNIT_MANIFEST, {
            "kind": unit.kind, "rel": unit.rel, "members": list(unit.members), "darks": darks,
            "claimed": _iso(_now_utc()),
        }, durable=False)
        moved = self._move_members(work, unit.members, darks)
        if not moved:
            shutil.rmtree(work, ignore_errors=True)
            return None
        return work

    def _move_members(self, work: Path, members: Sequence[str], darks: Sequence[str]) -> int:
        moved = 0
        for dark in darks:  # dark frames are shared: copy, never move
            src, dst = self.inbox / dark, work / dark
            if src.exists() and not dst.exists():
                dst.parent.mkdir(parents=True, exist_ok=True)
                tmp = dst.with_name(f".{dst.name}.tmp")
                shutil.copy2(src, tmp)
                os.replace(tmp, dst)
        for member in members:
            src, dst = self.inbox / member, work / member
            if dst.exists():
                moved += 1
                continue
            dst.parent.mkdir(parents=True, exist_ok=True)
            try:
                os.rename(src, dst)
            except FileNotFoundError:
                continue
            moved += 1
            self._seen.pop(member, None)
        return moved

    def _work_units(self) -> list[tuple[Path, dict[str, Any]]]:
        """Units left in ``.work`` (by an earlier run that stopped or crashed), oldest first."""
        out = []
        base = self.inbox / WORK_DIR
        for work in sorted(p for p in base.iterdir() if p.is_dir()):
            try:
                with open(work / UNIT_MANIFEST, encoding="utf-8") as fh:
                    manifest = json.load(fh)
            except (FileNotFoundError, json.JSONDecodeError, UnicodeDecodeError):
                # no manifest (crash right after mkdir, or a power cut lost it): give
                # whatever is inside back to the inbox, where it will be found again
                self._unclaim(work)
                continue
            status = work.suffix.lstrip(".")
            if status in FINISHED:
                # stored and analysed before the stop: only the moving out was left
                self._finish(work, manifest, status)
                self.stats.files_processed += 1
                continue
            # finish a claim interrupted between two renames
            self._move_members(work, manifest.get("members", []), manifest.get("darks", []))
            if not any((work / m).exists() for m in manifest.get("members", [])):
                shutil.rmtree(work, ignore_errors=True)
                continue
            out.append((work, manifest))
        return out

    def _unclaim(self, work: Path) -> None:
        for path in sorted(p for p in work.rglob("*") if p.is_file()):
            rel = path.relative_to(work)
            if rel.name.startswith("."):
                continue
            target = self.inbox / rel
            if not target.exists():
                target.parent.mkdir(parents=True, exist_ok=True)
                os.rename(path, target)
        shutil.rmtree(work, ignore_errors=True)

    # ---------------------------------------------------------------- finishing
    def _finish(self, work: Path, manifest: Mapping[str, Any], status: str) -> None:
        """Move a processed unit out of ``.work``: to ``done/``, ``quarantined/`` or deleted."""
        members = manifest.get("members", [])
        for member in members:
            src = work / member
            if not src.exists():
                continue
            if status == "quarantined":
                dst = self._unique(self.inbox / QUARANTINE_DIR / member)
            elif self.config.delete:
                if src.is_dir():
                    shutil.rmtree(src)
                else:
                    src.unlink()
                continue
            else:
                dst = self._unique(self.inbox / DONE_DIR / member)
            dst.parent.mkdir(parents=True, exist_ok=True)
            os.rename(src, dst)
        _remove_tree(work)

    # ---------------------------------------------------------------- processing
    def _ingest(self, work: Path, manifest: Mapping[str, Any]) -> Any:
        target = work / manifest["rel"]
        return self.store.ingest(target)

    def process(self, units: Sequence[tuple[Path, Mapping[str, Any]]], *, recovering: bool = False) -> int:
        """Ingest, analyse and finish claimed units; return how many were handled."""
        handled: list[tuple[Path, Mapping[str, Any], Any]] = []
        # ingests overlap their file-system and catalog waits in a few threads; the
        # store opens one catalog connection per operation, and SQLite serialises writers
        futures = [(work, manifest, self._pool.submit(self._ingest, work, manifest)) for work, manifest in units]
        for work, manifest, future in futures:
            if self.stopping and not recovering and future.cancel():
                continue  # not started: stays in .work and is taken first at the next start
            try:
                outcome = future.result()
            except Exception as exc:  # the store promises not to raise for bad input; keep going
                self._error(f"{manifest.get('rel')}: {type(exc).__name__}: {exc}")
                continue
            handled.append((work, manifest, outcome))
            status = getattr(outcome, "status", "stored")
            if status == "stored":
                self.stats.stored += 1
            elif status == "duplicate":
                self.stats.duplicates += 1
            elif status == "quarantined":
                self.stats.quarantined += 1
                self.log(f"quarantined {manifest.get('rel')}: {getattr(outcome, 'message', '')}")
        good = [(m, o) for _w, m, o in handled if getattr(o, "status", "") in ("stored", "duplicate")]
        if good:
            self.stats.results_written += self._analyse([o for _m, o in good], good, recovering)
        for work, manifest, outcome in handled:
            status = getattr(outcome, "status", "stored")
            # mark the unit finished with one atomic rename, so a restart that finds it
            # only moves it out (its members may already be half moved)
            finished = work.with_name(f"{work.name}.{status}")
            os.rename(work, finished)
            self._finish(finished, manifest, status)
            self.stats.files_processed += 1
        return len(handled)

    def _analyse(self, outcomes: list[Any], labelled: list[tuple[Mapping[str, Any], Any]],
                 recovering: bool) -> int:
        """Analyse a batch of stored inputs; if the batch fails, each input on its own.

        An input whose analysis fails by itself is logged as an error and finished
        anyway: its data are stored, only its result row is missing (``beamdiag
        reanalyze`` can add it), and the inbox must not jam on it.
        """
        def run(batch: list[Any]) -> int:
            return pipeline.analyze_ingested(self.store, batch, options=self.config.options,
                                             version=self.version, skip_existing=recovering)

        try:
            return run(outcomes)
        except Exception as exc:  # one bad item must not take the batch's results with it
            if len(outcomes) == 1:
                self._error(f"analysis of {labelled[0][0].get('rel')}: {type(exc).__name__}: {exc} "
                            "(stored without a result row)")
                return 0
        written = 0
        for manifest, outcome in labelled:
            try:
                written += run([outcome])
            except Exception as exc:  # noqa: BLE001 - logged, input finished without a result
                self._error(f"analysis of {manifest.get('rel')}: {type(exc).__name__}: {exc} "
                            "(stored without a result row)")
        return written

    def provisional_fit(self, rel: str) -> None:
        """Fit a scan folder that is still filling, if it has a new step; write a provisional row."""
        from diagnostics.readers import scan as scan_reader

        watch = self._scans.setdefault(rel, _ScanWatch())
        try:
            spec = scan_reader.read_scan(self.inbox / rel)
        except InputError:
            return  # a step named in scan.json whose files are not there yet
        if len(spec.steps) <= watch.fitted_steps or len(spec.steps) < 3:
            watch.fitted_steps = max(watch.fitted_steps, len(spec.steps)) if len(spec.steps) >= 3 else -1
            return
        record = pipeline.analyze_scan_spec(None, spec, self.config.options, provisional=True)
        record["scan_id"] = pipeline.provisional_scan_id(spec)
        self.store.write_results("scans", [record], options=self.config.options.to_dict(), version=self.version)
        watch.fitted_steps = len(spec.steps)
        self.stats.provisional_fits += 1
        self.log(f"provisional fit of {rel}: {len(spec.steps)} steps")

    def _error(self, message: str) -> None:
        with self._stats_lock:
            self.stats.errors += 1
            self.stats.last_error = message
        self.log(f"error: {message}")

    def _orbit_job(self) -> None:
        cfg = self.config
        try:
            span = self.store.time_range("bpm")
            if span is None:
                return
            # the last interval of data (data time, not wall time: files may come late)
            end = span[1] + pd.Timedelta(1, "ns")
            start = end - pd.Timedelta(cfg.orbit_interval)
            rows = pipeline.summarize_orbit(self.store, start, end, cfg.orbit_interval,
                                            options=cfg.options, version=self.version)
            with self._stats_lock:
                self.stats.orbit_summaries += 1 if rows else 0
            self._last_orbit_wall = _iso(_now_utc())
        except Exception as exc:  # an orbit summary failing must not stop ingest
            self._error(f"orbit summary: {type(exc).__name__}: {exc}")

    def _compact_job(self, dates: list[str] | None) -> None:
        try:
            self.store.compact(dates=dates)
            with self._stats_lock:
                self.stats.compactions += 1
            self._last_compact_wall = _iso(_now_utc())
        except Exception as exc:  # compaction is housekeeping; log and go on
            self._error(f"compact: {type(exc).__name__}: {exc}")

    def _periodic(self) -> None:
        """Start the orbit summary or a compaction when due, in the background.

        They run one at a time on a thread of their own, so a long compaction of a
        day's partitions does not hold up ingest; a job that is due while the
        previous one still runs waits for the next cycle.
        """
        if self._job is not None and not self._job.done():
            return
        now = time.monotonic()
        cfg = self.config
        today = _now_utc().date()
        if today != self._day:  # the UTC day is over: compact its partitions now
            finished, self._day = self._day, today
            self._t_compact = now
            self._job = self._housekeeping.submit(self._compact_job, [finished.isoformat()])
            return
        due = []  # (since when due, job): the one due longest runs first
        if cfg.orbit_every_s and now - self._t_orbit >= cfg.orbit_every_s:
            due.append((self._t_orbit + cfg.orbit_every_s, "orbit"))
        if cfg.compact_every_s and now - self._t_compact >= cfg.compact_every_s:
            due.append((self._t_compact + cfg.compact_every_s, "compact"))
        if not due:
            return
        job = min(due)[1]
        if job == "orbit":
            self._t_orbit = now
            self._job = self._housekeeping.submit(self._orbit_job)
        else:
            self._t_compact = now
            self._job = self._housekeeping.submit(self._compact_job, None)

    def recover(self) -> int:
        """Finish what an earlier run left in ``.work`` (after a crash or a stop)."""
        units = self._work_units()
        if not units:
            return 0
        self.log(f"recovering {len(units)} input(s) left in {WORK_DIR}/")
        n = self.process(units, recovering=True)
        self.stats.recovered += n
        return n

    def cycle(self) -> int:
        """One scan of the inbox: claim, ingest, analyse and finish what is ready."""
        t0 = time.monotonic()
        ready, filling, _oldest = self.discover()
        batch = ready[: self.config.max_batch]
        claimed = []
        for unit in batch:
            if self.stopping:
                break
            work = self.claim(unit)
            if work is None:
                continue
            with open(work / UNIT_MANIFEST, encoding="utf-8") as fh:
                claimed.append((work, json.load(fh)))
        n = self.process(claimed) if claimed else 0
        if not self.stopping:
            for rel in filling:
                try:
                    self.provisional_fit(rel)
                except Exception as exc:  # a half-recorded scan must not stop the service
                    self._error(f"provisional fit of {rel}: {type(exc).__name__}: {exc}")
            self._periodic()
        self._backlog = len(ready) > len(batch)
        self._pending, oldest = self._pending_inputs()
        self._last_lag_s = max(0.0, (time.time_ns() - oldest) / 1e9) if oldest is not None else 0.0
        self._last_cycle_s = time.monotonic() - t0
        self.stats.cycles += 1
        self._save_state()
        self.heartbeat()
        return n

    def _pending_inputs(self) -> tuple[int, int | None]:
        """(count, oldest mtime_ns) of inputs still in the inbox, filling scans excluded."""
        oldest = None
        waiting = 0
        files, scans = self._walk()
        for rel in files:
            if rel in self._darks:
                continue
            try:
                st = os.stat(self.inbox / rel)
            except FileNotFoundError:
                continue
            waiting += 1
            oldest = st.st_mtime_ns if oldest is None else min(oldest, st.st_mtime_ns)
        for rel in scans:
            if rel in self._scans:  # still filling: waiting on the producer, not on us
                continue
            waiting += 1
            try:
                mtime = os.stat(self.inbox / rel / "scan.json").st_mtime_ns
                oldest = mtime if oldest is None else min(oldest, mtime)
            except FileNotFoundError:
                continue
        return waiting, oldest

    def _lock(self) -> Any:
        """Hold ``STORE/service/watch.lock`` while running: one service per store.

        A second service would take the first one's claimed inputs for leftovers of
        a crash.  The lock is an ``flock``, which the kernel drops when the process
        dies, even by SIGKILL.
        """
        import fcntl

        self._service_dir.mkdir(parents=True, exist_ok=True)
        fh = open(self._service_dir / "watch.lock", "a+")  # noqa: SIM115 - held for the run
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            fh.seek(0)
            holder = fh.read().strip() or "?"
            fh.close()
            raise StoreError(f"{self.store.root}: another beamdiag watch is running on this store "
                             f"(pid {holder}); run one service per store") from None
        fh.seek(0)
        fh.truncate()
        fh.write(str(os.getpid()))
        fh.flush()
        return fh

    def run(self, *, once: bool = False) -> int:
        """Run until stopped (or one cycle with ``once``); return the exit status (0)."""
        lock = self._lock()
        self.log(f"watching {self.inbox} -> store {self.store.root} (every {self.config.interval_s:g} s)")
        if self.config.events:
            self._start_events()
        try:
            self.recover()
            while not self.stopping:
                self._wake.clear()
                self.cycle()
                if once or self.stopping:
                    break
                if self._backlog:
                    continue  # more is ready than one cycle takes: go straight on
                self._wake.wait(self.config.interval_s)
                if self._wake.is_set() and not self.stopping:
                    time.sleep(min(0.2, self.config.interval_s))  # let a burst of events settle
        finally:
            if self._observer is not None:
                self._observer.stop()
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._housekeeping.shutdown(wait=True)  # a compaction in progress finishes
            for sig, handler in self._old_handlers.items():
                signal.signal(sig, handler)
            lock.close()
            if self._catalog_hold is not None:
                self._catalog_hold.close()
            with contextlib.suppress(OSError):
                self._save_state()
                self.heartbeat(state="stopped")
            self.log(
                f"stopped: {self.stats.files_processed} input(s) processed, {self.stats.stored} stored, "
                f"{self.stats.duplicates} duplicate(s), {self.stats.quarantined} quarantined, "
                f"{self.stats.errors} error(s)"
            )
        return 0


def watch(inbox: str | os.PathLike, store: Any, *, interval_s: float = 2.0, stable_seconds: float = 4.0,
          delete: bool = False, events: bool = False, once: bool = False, signals: bool = True,
          **config: Any) -> int:
    """Run the inbox service (``beamdiag watch``); return the exit status.

    Parameters
    ----------
    inbox : path
    store : diagnostics.store.Store or path
    interval_s, stable_seconds, delete, events : see :class:`WatchConfig`
    once : bool
        Run one cycle (after recovery) and return.
    signals : bool
        Install SIGTERM/SIGINT handlers (only possible in the main thread).
    **config
        Further :class:`WatchConfig` fields.
    """
    if not hasattr(store, "ingest"):
        from diagnostics.store import Store

        store = Store(store)
    cfg = WatchConfig(interval_s=interval_s, stable_seconds=stable_seconds, delete=delete, events=events, **config)
    service = WatchService(inbox, store, cfg)
    if signals:
        service.install_signal_handlers()
    return service.run(once=once)


__all__ = [
    "COMPLETE_MARKER",
    "RESERVED_DIRS",
    "ServiceStats",
    "Unit",
    "WatchConfig",
    "WatchService",
    "heartbeat_path",
    "is_ignored",
    "read_heartbeat",
    "watch",
    "write_json_atomic",
]
