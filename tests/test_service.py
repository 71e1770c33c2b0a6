"""Tests of the inbox service (diagnostics.service, ``beamdiag watch``).

Two layers:

* unit tests of the readiness rules, claiming, recovery and heartbeat against a
  small in-memory stand-in for the store that follows the Store contract
  (``ingest(path) -> IngestOutcome``), so they are fast and exact;
* end-to-end tests that run the real service as a subprocess
  (``python -m diagnostics watch``) over the real store, under load, with
  SIGKILL faults and with bad inputs (marked ``slow``).
"""

from __future__ import annotations

import hashlib
import json
import os
import threading
import time
from pathlib import Path
from types import SimpleNamespace

import pytest

from diagnostics import service
from diagnostics.service import WatchConfig, WatchService, is_ignored, read_heartbeat


class FakeStore:
    """Follows the Store ingest contract: sha256 dedup, quarantine of bad content."""

    def __init__(self, root: Path) -> None:
        self.root = root
        root.mkdir(parents=True, exist_ok=True)
        self.seen: dict[str, str] = {}
        self.ingested: list[tuple[str, bytes]] = []
        self.results: list[tuple[str, list]] = []
        self.compacted = 0

    def ingest(self, path):
        path = Path(path)
        if path.is_dir():
            data = b"".join(p.read_bytes() for p in sorted(path.rglob("*")) if p.is_file())
        else:
            data = path.read_bytes()
        sha = hashlib.sha256(data).hexdigest()
        if data.startswith(b"BAD") or data == b"":
            return SimpleNamespace(path=str(path), kind=None, status="quarantined", sha256=sha, rows=0,
                                   message="bad content", outputs=())
        if sha in self.seen:
            return SimpleNamespace(path=str(path), kind="bpm", status="duplicate", sha256=sha, rows=0,
                                   message="", outputs=())
        self.seen[sha] = str(path)
        self.ingested.append((path.name, data))
        return SimpleNamespace(path=str(path), kind="bpm", status="stored", sha256=sha, rows=1,
                               message="", outputs=())

    def write_results(self, kind, records, *, options=None, version=None):
        self.results.append((kind, list(records)))
        return self.root / "results.parquet"

    def time_range(self, kind):
        return None

    def compact(self, **_kw):
        self.compacted += 1


def _service(tmp_path: Path, **cfg) -> tuple[WatchService, FakeStore, Path]:
    inbox = tmp_path / "inbox"
    store = FakeStore(tmp_path / "store")
    defaults = dict(interval_s=0.05, stable_seconds=0.3, sidecar_wait_s=0.6, orbit_every_s=0, compact_every_s=0)
    defaults.update(cfg)
    svc = WatchService(inbox, store, WatchConfig(**defaults), log=open(os.devnull, "w"))  # noqa: SIM115
    return svc, store, inbox


def _put_renamed(folder: Path, name: str, data: bytes) -> Path:
    """Write the way producers should: NAME.part, then rename into place."""
    folder.mkdir(parents=True, exist_ok=True)
    part = folder / f"{name}.part"
    part.write_bytes(data)
    # a rename one file-system clock tick after the last write leaves ctime > mtime;
    # kernels with coarse (multigrain) timestamps need the pause to tell them apart
    time.sleep(0.01)
    os.rename(part, folder / name)
    return folder / name


def _wait_ctime_tick() -> None:
    time.sleep(0.002)


def test_ignored_names_follow_the_producer_convention():
    """Names in the middle of being written are never inputs (.x, ~x, x.part, x.tmp)."""
    assert is_ignored(".hidden.csv") and is_ignored("~lock.csv")
    assert is_ignored("bpm.csv.part") and is_ignored("bpm.csv.tmp")
    assert not is_ignored("bpm.csv") and not is_ignored("step01.png")


def test_renamed_file_is_taken_in_the_first_cycle_and_moved_to_done(tmp_path):
    svc, store, inbox = _service(tmp_path, stable_seconds=60)
    _put_renamed(inbox, "a.csv", b"timestamp,bpm\n")
    svc.cycle()
    assert [n for n, _ in store.ingested] == ["a.csv"]
    assert (inbox / "done" / "a.csv").read_bytes() == b"timestamp,bpm\n"
    assert not (inbox / "a.csv").exists()
    assert list((inbox / ".work").iterdir()) == []


def test_rename_without_a_clock_tick_is_caught_by_events(tmp_path):
    """A write-and-rename within one timestamp tick looks like a plain write to a scan;
    the watchdog ``moved`` event (``--events``) marks it ready at once."""
    pytest.importorskip("watchdog")
    svc, store, inbox = _service(tmp_path, stable_seconds=60, events=True)
    svc._start_events()
    try:
        time.sleep(0.2)
        (inbox / "quick.csv.part").write_bytes(b"q")
        os.rename(inbox / "quick.csv.part", inbox / "quick.csv")
        deadline = time.monotonic() + 5
        while not svc._renamed and time.monotonic() < deadline:
            time.sleep(0.01)
        svc.cycle()
    finally:
        svc._observer.stop()
        svc._observer.join(5)
    assert [n for n, _ in store.ingested] == ["quick.csv"]


def test_part_files_are_left_alone(tmp_path):
    svc, store, inbox = _service(tmp_path, stable_seconds=0)
    (inbox / "b.csv.part").write_bytes(b"half")
    svc.cycle()
    time.sleep(0.05)
    svc.cycle()
    assert store.ingested == []
    assert (inbox / "b.csv.part").exists()


def test_directly_written_file_waits_until_stable(tmp_path):
    """Without a rename, (size, mtime_ns) must stay unchanged for stable_seconds."""
    svc, store, inbox = _service(tmp_path, stable_seconds=0.3)
    (inbox / "c.csv").write_bytes(b"x,y\n1,2\n")
    svc.cycle()
    assert store.ingested == []
    time.sleep(0.35)
    svc.cycle()
    assert [n for n, _ in store.ingested] == ["c.csv"]


def test_growing_file_is_not_taken_half_written(tmp_path):
    """A file appended to (no .part, no rename) is taken only after the writer stopped."""
    svc, store, inbox = _service(tmp_path, stable_seconds=0.3)
    path = inbox / "grow.csv"
    chunks = [b"timestamp,bpm,x_mm,y_mm\n"] + [f"row{i}\n".encode() for i in range(8)]
    with open(path, "wb") as fh:
        for chunk in chunks:
            fh.write(chunk)
            fh.flush()
            svc.cycle()
            time.sleep(0.1)
    assert store.ingested == []
    time.sleep(0.35)
    svc.cycle()
    assert store.ingested == [("grow.csv", b"".join(chunks))]


def test_image_waits_for_its_sidecar_and_moves_with_it(tmp_path):
    svc, store, inbox = _service(tmp_path, stable_seconds=60, sidecar_wait_s=60)
    _put_renamed(inbox, "f1.png", b"\x89PNG fake")
    svc.cycle()
    assert store.ingested == []  # no sidecar yet
    _put_renamed(inbox, "f1.json", b'{"device": "SCR-01"}')
    svc.cycle()
    assert [n for n, _ in store.ingested] == ["f1.png"]
    assert (inbox / "done" / "f1.png").exists() and (inbox / "done" / "f1.json").exists()


def test_image_without_sidecar_is_handed_over_after_the_wait(tmp_path):
    svc, store, inbox = _service(tmp_path, stable_seconds=0, sidecar_wait_s=0.3)
    _put_renamed(inbox, "lonely.png", b"BAD no sidecar")
    svc.cycle()
    assert (inbox / "lonely.png").exists()
    time.sleep(0.35)
    svc.cycle()
    assert (inbox / "quarantined" / "lonely.png").exists()
    assert svc.stats.quarantined == 1


def test_dark_frame_named_by_a_sidecar_is_copied_not_moved(tmp_path):
    svc, store, inbox = _service(tmp_path, stable_seconds=60, sidecar_wait_s=0.2)
    _put_renamed(inbox / "darks", "dark1.png", b"\x89PNG dark")
    _put_renamed(inbox, "f2.png", b"\x89PNG f2")
    _put_renamed(inbox, "f2.json", json.dumps({"dark": "darks/dark1.png"}).encode())
    _put_renamed(inbox / "cam", "dk.png", b"\x89PNG dark2")
    _put_renamed(inbox / "cam", "f3.png", b"\x89PNG f3")
    _put_renamed(inbox / "cam", "f3.json", json.dumps({"dark": "dk.png"}).encode())
    seen_darks = []
    real_ingest = store.ingest

    def spy(path):
        path = Path(path)
        dark = json.loads(path.with_suffix(".json").read_text())["dark"]
        seen_darks.append((path.parent / dark).read_bytes())
        return real_ingest(path)

    store.ingest = spy
    svc.cycle()
    time.sleep(0.25)
    svc.cycle()
    assert sorted(n for n, _ in store.ingested) == ["f2.png", "f3.png"]
    assert sorted(seen_darks) == [b"\x89PNG dark", b"\x89PNG dark2"]
    # darks stay where they are, for the next frames that need them
    assert (inbox / "darks" / "dark1.png").exists() and (inbox / "cam" / "dk.png").exists()
    assert not (inbox / "quarantined").exists() or not any((inbox / "quarantined").rglob("*.png"))


def test_bad_input_goes_to_quarantined_folder_and_service_goes_on(tmp_path):
    svc, store, inbox = _service(tmp_path, stable_seconds=60)
    _put_renamed(inbox, "bad.csv", b"BAD")
    _put_renamed(inbox, "good.csv", b"fine")
    svc.cycle()
    assert (inbox / "quarantined" / "bad.csv").exists()
    assert (inbox / "done" / "good.csv").exists()
    assert svc.stats.quarantined == 1 and svc.stats.stored == 1


def test_delete_option_removes_stored_inputs_but_keeps_quarantined(tmp_path):
    svc, store, inbox = _service(tmp_path, stable_seconds=60, delete=True)
    _put_renamed(inbox, "good.csv", b"fine")
    _put_renamed(inbox, "bad.csv", b"BAD")
    svc.cycle()
    assert not (inbox / "done" / "good.csv").exists() and not (inbox / "good.csv").exists()
    assert (inbox / "quarantined" / "bad.csv").exists()


def test_same_name_twice_keeps_both_inputs_in_done(tmp_path):
    svc, store, inbox = _service(tmp_path, stable_seconds=60)
    _put_renamed(inbox, "latest.csv", b"one")
    svc.cycle()
    _wait_ctime_tick()
    _put_renamed(inbox, "latest.csv", b"two")
    svc.cycle()
    assert (inbox / "done" / "latest.csv").read_bytes() == b"one"
    assert (inbox / "done" / "latest.csv.1").read_bytes() == b"two"


def test_files_in_subfolders_are_inputs_too(tmp_path):
    """Several producers may each write into their own subfolder of one inbox."""
    svc, store, inbox = _service(tmp_path, stable_seconds=60)
    _put_renamed(inbox / "producer-a", "x.csv", b"a")
    _put_renamed(inbox / "producer-b", "x.csv", b"b")
    svc.cycle()
    assert sorted(d for _, d in store.ingested) == [b"a", b"b"]
    assert (inbox / "done" / "producer-a" / "x.csv").read_bytes() == b"a"
    assert (inbox / "done" / "producer-b" / "x.csv").read_bytes() == b"b"


def test_restart_finishes_inputs_left_in_work_exactly_once(tmp_path):
    """A claim interrupted by a crash (one of two members moved) is completed on restart."""
    svc, store, inbox = _service(tmp_path, stable_seconds=60)
    _put_renamed(inbox, "f9.png", b"\x89PNG f9")
    _put_renamed(inbox, "f9.json", b"{}")
    _put_renamed(inbox, "k.csv", b"k")
    ready, _filling, _oldest = svc.discover()
    frame = next(u for u in ready if u.rel == "f9.png")
    # simulate a crash in the middle of the claim: manifest written, image moved, sidecar not
    work = inbox / ".work" / "0-crashed"
    work.mkdir(parents=True)
    service.write_json_atomic(work / service.UNIT_MANIFEST, {"kind": "frame", "rel": frame.rel,
                                                            "members": list(frame.members), "darks": []})
    os.rename(inbox / "f9.png", work / "f9.png")
    # and a claim that got as far as the manifest only
    (inbox / ".work" / "1-empty").mkdir()
    # and a unit fully claimed and ingested before the crash
    work2 = inbox / ".work" / "2-ingested"
    work2.mkdir()
    service.write_json_atomic(work2 / service.UNIT_MANIFEST, {"kind": "file", "rel": "k.csv",
                                                             "members": ["k.csv"], "darks": []})
    os.rename(inbox / "k.csv", work2 / "k.csv")
    store.ingest(work2 / "k.csv")
    n_before = len(store.ingested)

    svc2, _, _ = _service(tmp_path, stable_seconds=60)
    svc2.store = store
    assert svc2.recover() == 2
    assert len(store.ingested) == n_before + 1  # k.csv was a duplicate: not stored twice
    assert (inbox / "done" / "f9.png").exists() and (inbox / "done" / "f9.json").exists()
    assert (inbox / "done" / "k.csv").exists()
    assert list((inbox / ".work").iterdir()) == []


def test_restart_only_moves_out_a_unit_that_was_already_finished(tmp_path):
    """Killed while moving a stored unit to done/: the restart moves the rest, ingests nothing."""
    svc, store, inbox = _service(tmp_path, stable_seconds=60)
    work = inbox / ".work" / "5-half.stored"
    work.mkdir(parents=True)
    service.write_json_atomic(work / service.UNIT_MANIFEST, {"kind": "frame", "rel": "g.png",
                                                            "members": ["g.png", "g.json"], "darks": []})
    (inbox / "done").mkdir(exist_ok=True)
    (inbox / "done" / "g.png").write_bytes(b"moved before the kill")
    (work / "g.json").write_bytes(b"{}")
    svc.recover()
    assert store.ingested == []
    assert (inbox / "done" / "g.json").exists() and (inbox / "done" / "g.png").exists()
    assert list((inbox / ".work").iterdir()) == []


def test_heartbeat_is_written_every_cycle_and_read_back(tmp_path):
    svc, store, inbox = _service(tmp_path, stable_seconds=60)
    assert read_heartbeat(store.root) is None
    _put_renamed(inbox, "a.csv", b"a")
    svc.cycle()
    beat = read_heartbeat(store.root)
    assert beat["files_processed"] == 1 and beat["stored"] == 1 and beat["pid"] == os.getpid()
    assert beat["inbox"] == str(inbox.resolve()) and beat["state"] == "running"
    assert beat["lag_s"] == 0.0 and 0 <= beat["age_s"] < 60
    # the dashboard may pass the Store itself
    assert read_heartbeat(SimpleNamespace(root=store.root))["cycles"] == 1
    # a damaged heartbeat reads as none rather than raising
    service.heartbeat_path(store.root).write_text("{half")
    assert read_heartbeat(store.root) is None


def test_lag_counts_inputs_still_waiting(tmp_path):
    """lag = now - mtime of the oldest input still in the inbox; 0 when nothing waits."""
    svc, store, inbox = _service(tmp_path, stable_seconds=60)
    (inbox / "slow.csv").write_bytes(b"written directly, not yet stable")
    time.sleep(0.3)
    svc.cycle()
    beat = read_heartbeat(store.root)
    assert beat["pending"] == 1
    assert 0.3 <= beat["lag_s"] < 5
    os.rename(inbox / "slow.csv", inbox / "slow2.csv")  # a rename makes it ready
    svc.cycle()
    beat = read_heartbeat(store.root)
    assert beat["pending"] == 0 and beat["lag_s"] == 0.0


def test_stop_finishes_cleanly(tmp_path):
    svc, store, inbox = _service(tmp_path, stable_seconds=60, interval_s=0.05)
    _put_renamed(inbox, "a.csv", b"a")
    rc = []
    thread = threading.Thread(target=lambda: rc.append(svc.run()))
    thread.start()
    deadline = time.monotonic() + 10
    while not (inbox / "done" / "a.csv").exists() and time.monotonic() < deadline:
        time.sleep(0.02)
    svc.stop()
    thread.join(10)
    assert rc == [0]
    assert read_heartbeat(store.root)["state"] == "stopped"


def test_config_rejects_nonsense():
    from diagnostics.errors import InputError

    with pytest.raises(InputError, match="interval"):
        WatchConfig(interval_s=0)
    with pytest.raises(InputError, match="orbit"):
        WatchConfig(orbit_interval="soon")


# ============================================================================ end to end
# The real service in a subprocess over the real store.

import signal  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

REPO = Path(__file__).resolve().parents[1]

BPMS = tuple(f"BPM-{i:02d}" for i in range(1, 25))
T_START = pd.Timestamp("2026-11-30T09:00:00Z")


def bpm_csv(i: int, rng: np.random.Generator) -> bytes:
    """One BPM file: the 24 BPMs of the Kestrel Bay line at one time (i-th tenth of a second)."""
    t = (T_START + pd.Timedelta(100 * i, "ms")).strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z"
    x = rng.normal(0.0, 0.05, len(BPMS))
    y = rng.normal(0.0, 0.05, len(BPMS))
    lines = ["timestamp,bpm,x_mm,y_mm,sum"]
    lines += [f"{t},{b},{xv:.5f},{yv:.5f},{1.0 + 0.001 * k:.4f}" for k, (b, xv, yv) in enumerate(zip(BPMS, x, y, strict=True))]
    return ("\n".join(lines) + "\n").encode()


def frame_files(i: int, rng: np.random.Generator, size: int = 64) -> tuple[bytes, bytes, np.ndarray]:
    """A small 16-bit screen image (Gaussian spot, Poisson noise) and its sidecar."""
    from io import BytesIO

    from PIL import Image

    yy, xx = np.mgrid[0:size, 0:size]
    cx, cy = size / 2 + rng.normal(0, 1), size / 2 + rng.normal(0, 1)
    spot = 2000.0 * np.exp(-0.5 * (((xx - cx) / 5.0) ** 2 + ((yy - cy) / 4.0) ** 2))
    pixels = rng.poisson(100.0 + spot).astype(np.uint16)
    buf = BytesIO()
    Image.fromarray(pixels).save(buf, format="PNG")
    t = (T_START + pd.Timedelta(100 * i + 50, "ms")).isoformat().replace("+00:00", "Z")
    sidecar = json.dumps({"device": "SCR-01", "timestamp": t, "pixel_size_m": [2.0e-5, 2.0e-5], "bit_depth": 12})
    return buf.getvalue(), sidecar.encode(), pixels


class Producer:
    """Writes BPM files and screen frames into an inbox at fixed rates, as producers should
    (NAME.part, then rename), from a thread; remembers everything it wrote."""

    def __init__(self, inbox: Path, *, seconds: float, rate_hz: float = 10.0, seed: int = 1) -> None:
        self.inbox = inbox
        self.n = int(round(seconds * rate_hz))
        self.period = 1.0 / rate_hz
        rng = np.random.default_rng(seed)
        self.bpm = [bpm_csv(i, rng) for i in range(self.n)]
        self.frames = [frame_files(i, rng) for i in range(self.n)]
        self.written = 0
        self.late_s = 0.0
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.extra: list[tuple[float, callable]] = []

    def _put(self, name: str, data: bytes) -> None:
        part = self.inbox / f"{name}.part"
        part.write_bytes(data)
        os.rename(part, self.inbox / name)

    def _run(self) -> None:
        t0 = time.monotonic()
        for i in range(self.n):
            due = t0 + i * self.period
            delay = due - time.monotonic()
            if delay > 0:
                time.sleep(delay)
            else:
                self.late_s = max(self.late_s, -delay)
            self._put(f"bpm_{i:05d}.csv", self.bpm[i])
            png, sidecar, _ = self.frames[i]
            self._put(f"scr_{i:05d}.json", sidecar)
            self._put(f"scr_{i:05d}.png", png)
            self.written = i + 1
            while self.extra and self.extra[0][0] <= time.monotonic() - t0:
                self.extra.pop(0)[1]()

    def start(self) -> Producer:
        self.thread.start()
        return self

    def join(self) -> None:
        self.thread.join()


def start_watch(inbox: Path, store: Path, *extra: str) -> subprocess.Popen:
    cmd = [sys.executable, "-m", "diagnostics", "watch", str(inbox), "--store", str(store), *extra]
    log = open(store.parent / "watch.log", "a")  # noqa: SIM115
    return subprocess.Popen(cmd, cwd=REPO, stdout=log, stderr=subprocess.STDOUT)


def wait_for(predicate, timeout: float, step: float = 0.2) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(step)
    return predicate()


def inbox_empty(inbox: Path) -> bool:
    names = [p for p in inbox.iterdir() if p.name not in (".work", "done", "quarantined")]
    return not names and not any((inbox / ".work").iterdir())


def check_store_equals_input(store_dir: Path, producer: Producer) -> dict:
    """Every reading stored exactly once: counts, values and pixel checksums."""
    from diagnostics.readers.bpm import read_bpm
    from diagnostics.store import Store

    store = Store(store_dir)
    tmp = store_dir.parent / "expected"
    tmp.mkdir(exist_ok=True)
    expected = []
    for i, data in enumerate(producer.bpm):
        path = tmp / f"bpm_{i:05d}.csv"
        path.write_bytes(data)
        expected.append(read_bpm(path))
    expected = pd.concat(expected).sort_values(["timestamp", "bpm"]).reset_index(drop=True)
    got = store.read_bpm()
    assert len(got) == len(expected) == 24 * producer.n
    pd.testing.assert_frame_equal(got[["timestamp", "bpm", "x_m", "y_m", "sum"]].reset_index(drop=True),
                                  expected[["timestamp", "bpm", "x_m", "y_m", "sum"]], check_dtype=False)
    index = store.frame_index()
    assert len(index) == producer.n and index["id"].is_unique
    want = sorted(hashlib.sha256(px.tobytes()).hexdigest() for _, _, px in producer.frames)
    have = sorted(hashlib.sha256(np.ascontiguousarray(f.pixels).tobytes()).hexdigest()
                  for f in store.read_frames())
    assert have == want
    results = store.read_results("frames", version="all")
    assert len(results) == producer.n, "one image result per frame, no more, no fewer"
    assert results["frame_id"].is_unique
    assert set(results["frame_id"]) == set(index["id"])
    return {"bpm_rows": len(got), "frames": len(index), "results": len(results)}


def _heartbeat_lag(store_dir: Path) -> float | None:
    beat = read_heartbeat(store_dir)
    return None if beat is None else beat["lag_s"]


@pytest.mark.slow
def test_load_with_three_sigkills_stores_every_reading_exactly_once(tmp_path):
    """(a)+(b): 10 BPM files/s and 10 frames/s for 60 s, written .part-then-rename.

    First 30 s fault-free: the service must keep up (heartbeat lag under 5 s at the
    end of it).  Then SIGKILL at three seeded random moments, restarting each time.
    At the end the store equals the input: BPM rows (values), frames (pixel
    checksums) and one image result per frame.
    """
    inbox, store_dir = tmp_path / "inbox", tmp_path / "store"
    inbox.mkdir()
    producer = Producer(inbox, seconds=60.0, seed=11)
    proc = start_watch(inbox, store_dir, "--events", "--interval", "2", "--stable-seconds", "4")
    assert wait_for(lambda: read_heartbeat(store_dir) is not None, 60), "service did not start"
    t0 = time.monotonic()
    producer.start()
    lags = []
    rng = np.random.default_rng(20261130)
    kill_at = sorted(rng.uniform(33.0, 57.0, 3))
    kills = 0
    while producer.thread.is_alive():
        elapsed = time.monotonic() - t0
        if elapsed < 30.0:
            lag = _heartbeat_lag(store_dir)
            if lag is not None and elapsed > 5.0:
                lags.append((elapsed, lag))
        elif kills < len(kill_at) and elapsed >= kill_at[kills]:
            proc.send_signal(signal.SIGKILL)
            proc.wait(30)
            kills += 1
            proc = start_watch(inbox, store_dir, "--events", "--interval", "2", "--stable-seconds", "4")
        time.sleep(0.25)
    producer.join()
    t_end = time.monotonic()
    drained = wait_for(lambda: inbox_empty(inbox), 90)
    drain_s = time.monotonic() - t_end
    proc.send_signal(signal.SIGTERM)
    rc = proc.wait(60)
    log = (tmp_path / "watch.log").read_text()
    assert drained, f"inbox not drained; log tail: {log[-2000:]}"
    assert rc == 0, log[-2000:]
    assert kills == 3
    late = [lag for t, lag in lags if t >= 25.0]
    assert late and max(late) < 5.0, f"service fell behind: lags {lags}"
    counts = check_store_equals_input(store_dir, producer)
    assert counts["bpm_rows"] == 24 * 600
    beat = read_heartbeat(store_dir)
    print(f"\nload: {2 * producer.n / 60.0:.1f} inputs/s for 60 s; lag (5-30 s) max "
          f"{max(lag for _, lag in lags):.2f} s, at 25-30 s max {max(late):.2f} s; drain after the end "
          f"{drain_s:.1f} s; restarts survived {kills}; producer max lateness {producer.late_s:.2f} s; "
          f"last heartbeat {beat['files_processed']} inputs in its run")


def _bad_inputs(inbox: Path) -> dict[str, bytes]:
    png, sidecar, _ = frame_files(0, np.random.default_rng(3))
    bad = {
        "empty.csv": b"",
        "text_in_number.csv": b"timestamp,bpm,x_mm,y_mm\n2026-11-30T09:00:00Z,BPM-01,abc,0.1\n",
        "not_a_png.png": b"this is text, not an image",
        "not_a_png.json": sidecar,
        "no_sidecar.png": png,
    }
    for name, data in bad.items():
        _put_renamed(inbox, name, data)
    return bad


@pytest.mark.slow
def test_bad_inputs_are_quarantined_and_the_service_goes_on(tmp_path):
    """(c): empty CSV, text in a numeric column, a non-PNG .png, an image without sidecar."""
    inbox, store_dir = tmp_path / "inbox", tmp_path / "store"
    inbox.mkdir()
    proc = start_watch(inbox, store_dir, "--interval", "0.5", "--stable-seconds", "1", "--sidecar-wait", "2")
    try:
        assert wait_for(lambda: read_heartbeat(store_dir) is not None, 60)
        _bad_inputs(inbox)
        rng = np.random.default_rng(5)
        _put_renamed(inbox, "good.csv", bpm_csv(0, rng))
        # the image without a sidecar waits --sidecar-wait (2 s) before it is judged
        assert wait_for(lambda: inbox_empty(inbox), 60), sorted(p.name for p in inbox.iterdir())
        _put_renamed(inbox, "good2.csv", bpm_csv(1, rng))  # still alive and working
        assert wait_for(lambda: (inbox / "done" / "good2.csv").exists(), 30)
    finally:
        proc.send_signal(signal.SIGTERM)
        rc = proc.wait(60)
    assert rc == 0
    quarantined = sorted(p.name for p in (inbox / "quarantined").iterdir())
    assert quarantined == sorted(["empty.csv", "text_in_number.csv", "not_a_png.png", "not_a_png.json",
                                  "no_sidecar.png"])
    from diagnostics.store import Store

    store = Store(store_dir)
    reasons = store.quarantine_list()
    assert len(reasons) == 4 and all(reasons["reason"].str.len() > 0)
    assert len(store.read_bpm()) == 48
    beat = read_heartbeat(store_dir)
    assert beat["quarantined"] == 4 and beat["state"] == "stopped"


@pytest.mark.slow
def test_slowly_growing_file_is_not_ingested_half_written(tmp_path):
    """(d): a BPM file appended to over several seconds (no .part) is stored whole."""
    inbox, store_dir = tmp_path / "inbox", tmp_path / "store"
    inbox.mkdir()
    proc = start_watch(inbox, store_dir, "--interval", "0.5", "--stable-seconds", "2")
    try:
        assert wait_for(lambda: read_heartbeat(store_dir) is not None, 60)
        rng = np.random.default_rng(8)
        blocks = [bpm_csv(i, rng).split(b"\n", 1)[1] for i in range(6)]
        path = inbox / "growing.csv"
        with open(path, "wb") as fh:
            fh.write(b"timestamp,bpm,x_mm,y_mm,sum\n")
            for block in blocks:
                fh.write(block)
                fh.flush()
                time.sleep(0.9)  # under --stable-seconds: the writer is still busy
        assert wait_for(lambda: (inbox / "done" / "growing.csv").exists(), 30)
    finally:
        proc.send_signal(signal.SIGTERM)
        rc = proc.wait(60)
    assert rc == 0
    from diagnostics.store import Store

    store = Store(store_dir)
    assert len(store.read_bpm()) == 24 * 6
    assert len(store.quarantine_list()) == 0


def _scan_manifest(n_steps: int, expected: int) -> dict:
    """scan.json of a quad scan whose sizes follow from a known beam (see test_pipeline)."""
    from test_pipeline import synthetic_scan

    spec, _ = synthetic_scan(n_steps=expected)
    steps = [{"k1_per_m2": s.k1_per_m2, "sigma_x_m": s.sigma_x_m, "sigma_y_m": s.sigma_y_m,
              "sigma_x_err_m": s.sigma_x_err_m, "sigma_y_err_m": s.sigma_y_err_m} for s in spec.steps[:n_steps]]
    return {"name": "qs-live", "timestamp": "2026-11-30T08:15:00Z", "particle": "electron",
            "kinetic_energy_MeV": 150.0, "quadrupole": {"name": "Q-05", "length_m": 0.2},
            "transport": {"drift_m": 4.0}, "monitor": {"name": "WS-02", "resolution_m": 0.0},
            "expected_steps": expected, "steps": steps}


def test_filling_scan_gets_provisional_fits_then_the_final_one(tmp_path):
    """A scan folder still being recorded: a provisional row after each new step (from 3
    steps on), the folder left in place; when complete, stored and fitted for good."""
    from test_pipeline import synthetic_scan

    from diagnostics.store import Store

    inbox, store = tmp_path / "inbox", Store(tmp_path / "store")
    svc = WatchService(inbox, store, WatchConfig(interval_s=0.05, stable_seconds=60, orbit_every_s=0,
                                                 compact_every_s=0), log=open(os.devnull, "w"))  # noqa: SIM115
    folder = inbox / "qs-live"
    for n in (2, 3, 4, 5):
        _put_renamed(folder, "scan.json", json.dumps(_scan_manifest(n, 6)).encode())
        svc.cycle()
        assert folder.exists(), "a filling scan stays in the inbox"
    rows = store.read_results("scans")
    assert list(rows["n_steps"]) == [3, 4, 5]
    assert rows["provisional"].all() and all("provisional" in json.loads(f) if isinstance(f, str) else "provisional" in f
                                             for f in rows["flags"])
    _put_renamed(folder, "scan.json", json.dumps(_scan_manifest(6, 6)).encode())
    svc.cycle()
    assert not folder.exists() and (inbox / "done" / "qs-live" / "scan.json").exists()
    rows = store.read_results("scans")
    assert list(rows["provisional"]) == [True, True, True, False]
    assert rows["scan_id"].nunique() == 1 == rows["scan_key"].nunique()
    assert rows["scan_id"].iloc[0] == store.list_scans()["scan_id"].iloc[0]
    latest = rows.sort_values("created").iloc[-1]
    _, eps = synthetic_scan(n_steps=6)
    assert latest["n_steps"] == 6 and latest["x_emittance_m_rad"] == pytest.approx(eps["x"], rel=1e-6)


def _bpm_block(start: pd.Timestamp, seconds: float, rng: np.random.Generator, rate_hz: float = 10.0) -> bytes:
    lines = ["timestamp,bpm,x_mm,y_mm,sum"]
    for k in range(int(seconds * rate_hz)):
        t = (start + pd.Timedelta(int(k * 1000 / rate_hz), "ms")).strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z"
        lines += [f"{t},{b},{rng.normal(0, 0.005):.5f},{rng.normal(0, 0.005):.5f},1.0" for b in BPMS[:4]]
    return ("\n".join(lines) + "\n").encode()


def test_orbit_summary_and_compaction_run_in_the_background(tmp_path):
    from diagnostics.store import Store

    inbox, store = tmp_path / "inbox", Store(tmp_path / "store")
    svc = WatchService(inbox, store, WatchConfig(interval_s=0.05, stable_seconds=60, orbit_every_s=0.01,
                                                 orbit_interval="5min", compact_every_s=0.01),
                       log=open(os.devnull, "w"))  # noqa: SIM115
    rng = np.random.default_rng(2)
    for k in range(3):
        _put_renamed(inbox, f"orbit_{k}.csv", _bpm_block(T_START + pd.Timedelta(60 * k, "s"), 60, rng))
    time.sleep(0.02)
    svc.cycle()  # ingest, then start the orbit summary in the background
    assert len(store.live_files("bpm")) == 3
    assert wait_for(lambda: svc._job.done(), 60)
    orbit = store.read_results("orbit")
    assert sorted(set(orbit["bpm"])) == list(BPMS[:4]) and set(orbit["plane"]) == {"x", "y"}
    assert set(orbit["interval_start"]) == {"2026-11-30T09:00:00Z"} and len(orbit) == 8
    time.sleep(0.02)
    svc.cycle()  # now the compaction is due
    assert wait_for(lambda: svc._job.done(), 60)
    assert svc.stats.compactions == 1 and svc.stats.errors == 0, svc.stats.last_error
    assert len(store.live_files("bpm")) == 1
    assert len(store.read_bpm()) == 3 * 600 * 4


def test_an_input_whose_analysis_fails_is_finished_without_stopping_the_batch(tmp_path, monkeypatch):
    from diagnostics import pipeline
    from diagnostics.store import Store

    inbox, store = tmp_path / "inbox", Store(tmp_path / "store")
    svc = WatchService(inbox, store, WatchConfig(interval_s=0.05, stable_seconds=60, orbit_every_s=0,
                                                 compact_every_s=0), log=open(os.devnull, "w"))  # noqa: SIM115
    rng = np.random.default_rng(4)
    for i in range(3):
        png, sidecar, _ = frame_files(i, rng)
        _put_renamed(inbox, f"s{i}.json", sidecar)
        _put_renamed(inbox, f"s{i}.png", png)
    real = pipeline.analyze_frame_items

    def broken(items, options=None):
        if any(frame.timestamp == pd.Timestamp(json.loads(frame_files(1, np.random.default_rng(4))[1])["timestamp"])
               for _id, frame, _x in items):
            raise ValueError("simulated analysis bug")
        return real(items, options)

    monkeypatch.setattr(pipeline, "analyze_frame_items", broken)
    svc.cycle()
    assert sorted(p.name for p in (inbox / "done").iterdir()) == ["s0.json", "s0.png", "s1.json", "s1.png",
                                                                  "s2.json", "s2.png"]
    assert len(store.frame_index()) == 3
    assert len(store.read_results("frames")) == 2
    assert svc.stats.errors == 1 and "simulated analysis bug" in svc.stats.last_error


def test_cli_once_handles_what_is_ready_and_exits(tmp_path, capsys):
    """``beamdiag watch INBOX --store DIR --once`` (in process; signal handlers restored)."""
    from diagnostics.cli import main
    from diagnostics.store import Store

    inbox = tmp_path / "inbox"
    before = signal.getsignal(signal.SIGINT)
    _put_renamed(inbox, "once.csv", bpm_csv(0, np.random.default_rng(0)))
    rc = main(["watch", str(inbox), "--store", str(tmp_path / "store"), "--once", "--orbit-every", "0",
               "--compact-every", "0"])
    assert rc == 0
    assert (inbox / "done" / "once.csv").exists()
    assert len(Store(tmp_path / "store").read_bpm()) == 24
    assert signal.getsignal(signal.SIGINT) is before
    assert "stopped: 1 input(s) processed, 1 stored" in capsys.readouterr().err


def test_cli_rejects_a_bad_option_with_one_line(tmp_path, capsys):
    from diagnostics.cli import main

    rc = main(["watch", str(tmp_path / "in"), "--store", str(tmp_path / "s"), "--orbit-interval", "soon", "--once"])
    assert rc == 2
    err = capsys.readouterr().err.strip()
    assert "--orbit-interval" in err and len(err.splitlines()) == 1


def test_a_second_service_on_the_same_store_is_refused(tmp_path):
    from diagnostics.errors import StoreError

    svc, store, inbox = _service(tmp_path)
    held = svc._lock()
    try:
        other, _, _ = _service(tmp_path)
        other.store = store
        with pytest.raises(StoreError, match=f"another beamdiag watch is running on this store \\(pid {os.getpid()}\\)"):
            other.run(once=True)
    finally:
        held.close()
    assert svc.run(once=True) == 0  # free again once the first one is gone


def test_complete_scan_folder_is_stored_with_its_steps_analysed(tmp_path):
    """The committed sample quad scan (wire profiles per step): one scan row, one row per
    step profile, the folder moved to done/ whole."""
    import shutil

    from diagnostics.store import Store

    src = REPO / "sample_data" / "scans"
    folder = next(p for p in src.iterdir() if (p / "scan.json").exists())
    inbox, store = tmp_path / "inbox", Store(tmp_path / "store")
    shutil.copytree(folder, inbox / folder.name)
    svc = WatchService(inbox, store, WatchConfig(interval_s=0.05, stable_seconds=0, orbit_every_s=0,
                                                 compact_every_s=0), log=open(os.devnull, "w"))  # noqa: SIM115
    svc.cycle()
    assert (inbox / "done" / folder.name / "scan.json").exists() and not (inbox / folder.name).exists()
    scans = store.read_results("scans")
    assert len(scans) == 1 and not scans["provisional"].iloc[0]
    n_profiles = len(store.profile_index(scan=scans["scan_id"].iloc[0]))
    assert n_profiles > 0 and len(store.read_results("profiles")) == n_profiles
