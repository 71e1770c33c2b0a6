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
