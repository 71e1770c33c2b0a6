"""Tests of ingest: mixed batches, quarantine, idempotence, the CLI, and a crash mid-batch.

References: the input files themselves read with pandas (``pandas.read_csv``),
the bytes of the originals (SHA-256 via :mod:`hashlib`), numpy's image arrays as
written, and a plain DuckDB glob over the store's Parquet files.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image

from diagnostics.cli import main
from diagnostics.store import Store, collect_inputs

REPO = Path(__file__).resolve().parent.parent
T0 = pd.Timestamp("2026-11-30T06:00:00Z")


# ------------------------------------------------------------------ input builders
def write_bpm_csv(path: Path, n_times=50, start=T0, seed=0, bpms=("BPM-01", "BPM-02")):
    rng = np.random.default_rng(seed)
    times = pd.date_range(start, periods=n_times, freq="100ms")
    df = pd.DataFrame({
        "timestamp": np.repeat(times, len(bpms)).strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
        "bpm": np.tile(np.array(bpms), n_times),
        "x_mm": np.round(rng.normal(0, 0.1, n_times * len(bpms)), 6),
        "y_mm": np.round(rng.normal(0, 0.2, n_times * len(bpms)), 6),
        "sum": np.round(rng.uniform(0.9, 1.1, n_times * len(bpms)), 6),
    })
    path.parent.mkdir(parents=True, exist_ok=True)
    df.to_csv(path, index=False)
    return df


def write_profile_csv(path: Path, device="WS-01", plane="x", t="2026-11-30T08:00:00Z"):
    pos = np.linspace(-1.5, 1.5, 31)
    sig = np.round(100 * np.exp(-pos**2 / (2 * 0.3**2)) + 2.0, 4)
    path.parent.mkdir(parents=True, exist_ok=True)
    lines = [f"# device: {device}", f"# plane: {plane}", f"# timestamp: {t}",
             "# position_unit: mm", "position,signal"]
    lines += [f"{p:.4f},{s}" for p, s in zip(pos, sig, strict=True)]
    path.write_text("\n".join(lines) + "\n")
    return pos * 1e-3, sig


def write_png16(path: Path, pixels: np.ndarray, *, sidecar: dict | None):
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(pixels.astype(np.uint16)).save(path)
    if sidecar is not None:
        path.with_suffix(".json").write_text(json.dumps(sidecar))


def write_slow_csv(path: Path, n=30):
    times = pd.date_range(T0, periods=n, freq="10s").strftime("%Y-%m-%dT%H:%M:%SZ")
    df = pd.DataFrame({"timestamp": times, "channel": "T-01",
                       "value": np.round(np.linspace(21.0, 21.4, n), 4), "unit": "degC"})
    df.to_csv(path, index=False)
    return df


def write_scan(folder: Path, n_steps=3, name="Q-05 test scan"):
    folder.mkdir(parents=True, exist_ok=True)
    steps = []
    for i in range(n_steps):
        write_profile_csv(folder / f"step{i:02d}_x.csv", "WS-02", "x",
                          f"2026-11-30T08:{15 + i:02d}:00Z")
        write_profile_csv(folder / f"step{i:02d}_y.csv", "WS-02", "y",
                          f"2026-11-30T08:{15 + i:02d}:30Z")
        steps.append({"k1_per_m2": -2.0 + i, "x": f"step{i:02d}_x.csv", "y": f"step{i:02d}_y.csv"})
    steps.append({"k1_per_m2": 1.5, "sigma_x_m": 1.2e-4, "sigma_y_m": 2.0e-4})
    doc = {"name": name, "timestamp": "2026-11-30T08:15:00Z", "particle": "electron",
           "kinetic_energy_MeV": 150.0, "quadrupole": {"name": "Q-05", "length_m": 0.2},
           "transport": {"drift_m": 4.0}, "monitor": {"name": "WS-02", "resolution_m": 1.5e-5},
           "steps": steps}
    (folder / "scan.json").write_text(json.dumps(doc, indent=1))
    return doc


def sidecar(device="SCR-01", t="2026-11-30T06:01:00Z", **extra):
    return {"device": device, "timestamp": t, "pixel_size_m": [2e-5, 2.1e-5], **extra}


@pytest.fixture
def batch(tmp_path):
    """A folder of good and bad inputs; returns (folder, expectations)."""
    d = tmp_path / "inbox"
    rng = np.random.default_rng(11)
    bpm1 = write_bpm_csv(d / "bpm" / "run1.csv", 60, seed=1)
    bpm2 = write_bpm_csv(d / "bpm" / "run2.csv", 40, start=T0 + pd.Timedelta("1h"), seed=2)
    slow = write_slow_csv(d / "slow.csv")
    pos, sig = write_profile_csv(d / "wire" / "WS-01_x.csv")
    img = rng.integers(0, 4096, (24, 32)).astype(np.uint16)
    dark = rng.integers(0, 40, (24, 32)).astype(np.uint16)
    write_png16(d / "screens" / "SCR-01_0601.png", img,
                sidecar=sidecar(dark="darks/dark01.png", bit_depth=12))
    write_png16(d / "screens" / "darks" / "dark01.png", dark, sidecar=None)
    npy = rng.random((8, 9), dtype=np.float32)
    np.save(d / "screens" / "SCR-02_0602.npy", npy)
    (d / "screens" / "SCR-02_0602.json").write_text(json.dumps(sidecar("SCR-02")))
    write_scan(d / "scans" / "q05")
    (d / "README.md").write_text("notes of the shift, not a measurement\n")
    bad = {
        "empty.csv": b"",
        "text_in_number.csv": b"timestamp,bpm,x_mm,y_mm\n2026-11-30T06:00:00Z,BPM-01,abc,0.1\n",
        "fake.png": b"this is not a png at all\n",
    }
    for name, data in bad.items():
        (d / "bad" / name).parent.mkdir(parents=True, exist_ok=True)
        (d / "bad" / name).write_bytes(data)
    (d / "bad" / "fake.json").write_text(json.dumps(sidecar()))
    write_png16(d / "bad" / "no_sidecar.png", img, sidecar=None)
    write_scan(d / "bad" / "broken_scan")
    doc = json.loads((d / "bad" / "broken_scan" / "scan.json").read_text())
    doc["quadrupole"]["length_m"] = -0.2
    (d / "bad" / "broken_scan" / "scan.json").write_text(json.dumps(doc))
    expect = {"bpm": pd.concat([bpm1, bpm2]), "slow": slow, "profile": (pos, sig), "png": img,
              "dark": dark, "npy": npy,
              "bad": ["empty.csv", "text_in_number.csv", "fake.png", "no_sidecar.png",
                      "broken_scan"]}
    return d, expect


def snapshot(root: Path) -> dict[str, tuple[int, int]]:
    """Every file under the store except the SQLite journal files: size and mtime."""
    return {str(p.relative_to(root)): (p.stat().st_size, p.stat().st_mtime_ns)
            for p in sorted(root.rglob("*")) if p.is_file() and "catalog.sqlite" not in p.name}


def originals(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


# ------------------------------------------------------------------ the mixed batch
def test_mixed_batch_stores_good_once_and_quarantines_bad(batch, tmp_path):
    folder, expect = batch
    before = originals(folder)
    store = Store(tmp_path / "store")
    summary = store.ingest_many([folder], progress=False)

    assert sorted(Path(o.path).name for o in summary.quarantined) == sorted(expect["bad"])
    assert {Path(o.path).name: o.kind for o in summary.stored} == {
        "run1.csv": "bpm", "run2.csv": "bpm", "slow.csv": "slow", "WS-01_x.csv": "profiles",
        "SCR-01_0601.png": "frames", "SCR-02_0602.npy": "frames", "q05": "scans"}
    assert summary.duplicates == []
    assert all(o.message.count("\n") == 0 and o.message for o in summary.quarantined)

    # every good reading exactly once, with its values (mm -> m)
    bpm = store.read_bpm()
    ref = expect["bpm"]
    assert len(bpm) == len(ref) == 200
    assert not bpm.duplicated(["timestamp", "bpm"]).any()
    ref_sorted = ref.assign(timestamp=pd.to_datetime(ref.timestamp, utc=True)).sort_values(
        ["timestamp", "bpm"], kind="stable")
    np.testing.assert_allclose(bpm["x_m"], ref_sorted["x_mm"] * 1e-3, rtol=1e-15)
    np.testing.assert_allclose(bpm["sum"], ref_sorted["sum"], rtol=0)
    slow = store.read_slow()
    np.testing.assert_array_equal(slow["value"], expect["slow"]["value"])
    (prof,) = store.read_profiles(devices="WS-01")
    np.testing.assert_allclose(prof.position_m, expect["profile"][0], rtol=1e-15, atol=1e-18)
    np.testing.assert_array_equal(prof.signal, expect["profile"][1])
    frames = {f.device: f for f in store.read_frames()}
    np.testing.assert_array_equal(frames["SCR-01"].pixels, expect["png"])
    np.testing.assert_array_equal(frames["SCR-01"].dark, expect["dark"])
    assert frames["SCR-01"].bit_depth == 12
    assert frames["SCR-02"].pixels.tobytes() == expect["npy"].tobytes()
    scans = store.list_scans()
    assert list(scans["name"]) == ["Q-05 test scan"] and scans["n_steps"][0] == 4
    spec = store.load_scan("Q-05 test scan")
    assert spec.steps[3].sigma_x_m == 1.2e-4 and spec.steps[0].profile_x.device == "WS-02"
    assert len(store.profile_index()) == 1 + 6

    # every bad file copied to quarantine with its reason; originals untouched
    q = store.quarantine_list()
    assert sorted(Path(s).name for s in q["source"]) == sorted(expect["bad"])
    for row in q.itertuples():
        copy = store.root / row.quarantine_path
        assert copy.exists()
        info = json.loads(copy.with_name(copy.name + ".error.json").read_text())
        assert info["reason"] == row.reason and info["sha256"] == row.sha256
        assert {"time", "reader_version", "source", "size"} <= set(info)
        if copy.is_file():  # the copy has the original's bytes
            assert hashlib.sha256(copy.read_bytes()).hexdigest() == info["files"][0]["sha256"]
    assert originals(folder) == before

    # a second ingest of the same batch changes nothing
    files_before, rows_before = snapshot(store.root), store.ingest_log().shape
    again = store.ingest_many([folder], progress=False)
    assert len(again.stored) == 0 and len(again.duplicates) == 7
    assert len(again.quarantined) == 5
    assert all("quarantined before" in o.message for o in again.quarantined)
    assert snapshot(store.root) == files_before
    assert store.ingest_log().shape == rows_before
    assert len(store.read_bpm()) == 200


def test_sidecars_and_darks_are_not_inputs(batch):
    folder, _ = batch
    names = {p.name for p in collect_inputs([folder])}
    assert "SCR-01_0601.json" not in names and "dark01.png" not in names
    assert "README.md" not in names and "step00_x.csv" not in names
    assert {"q05", "broken_scan", "SCR-01_0601.png", "fake.png"} <= names


def test_same_bytes_under_another_name_are_a_duplicate(tmp_path):
    src = tmp_path / "a.csv"
    write_bpm_csv(src)
    copy = tmp_path / "copy_of_a.csv"
    copy.write_bytes(src.read_bytes())
    store = Store(tmp_path / "store")
    first, second = store.ingest(src), store.ingest(copy)
    assert (first.status, second.status) == ("stored", "duplicate")
    assert second.outputs == first.outputs and second.sha256 == first.sha256
    assert "already stored from" in second.message


def test_identical_pixels_with_other_sidecars_are_two_frames(tmp_path):
    """An image input is its pixels AND its sidecar: two blank frames taken at
    different times are two readings, not a duplicate."""
    blank = np.zeros((4, 4), np.uint16)
    write_png16(tmp_path / "a.png", blank, sidecar=sidecar(t="2026-11-30T06:01:00Z"))
    write_png16(tmp_path / "b.png", blank, sidecar=sidecar(t="2026-11-30T06:02:00Z"))
    store = Store(tmp_path / "store")
    assert [o.status for o in store.ingest_many([tmp_path / "a.png", tmp_path / "b.png"]).outcomes
            ] == ["stored", "stored"]
    assert list(store.frame_index()["timestamp"].dt.minute) == [1, 2]
    (tmp_path / "a.json").write_text(json.dumps(sidecar(t="2026-11-30T06:03:00Z")))
    assert store.ingest(tmp_path / "a.png").status == "stored"  # corrected sidecar: new input
    assert store.ingest(tmp_path / "b.png").status == "duplicate"


def test_dark_frame_outside_the_sidecar_folder_is_never_opened(tmp_path, monkeypatch):
    """A sidecar naming ``../../etc/passwd`` as its dark frame is quarantined, and the
    store does not even open that file to hash it (the reader's containment rule)."""
    import diagnostics._storeio as storeio
    import diagnostics.store as store_module

    inbox = tmp_path / "inbox"
    inbox.mkdir()
    write_png16(inbox / "a.png", np.zeros((4, 4), np.uint16),
                sidecar={**sidecar(t="2026-11-30T06:01:00Z"), "dark": "../../etc/passwd"})
    hashed: list[str] = []
    real = storeio.file_sha256

    def spy(path, *args, **kwargs):
        hashed.append(str(path))
        return real(path, *args, **kwargs)

    monkeypatch.setattr(store_module, "file_sha256", spy)
    outcome = Store(tmp_path / "store").ingest(inbox / "a.png")
    assert outcome.status == "quarantined"
    assert "leaves the folder" in outcome.message
    assert not any("passwd" in p for p in hashed)


@pytest.mark.parametrize("kind", ["png8", "png16", "npy_big_endian_u2", "npy_f4", "tiff16"])
def test_images_read_back_bit_identical_after_ingest(tmp_path, kind):
    """Through reader and store: the pixels read back equal the array that was written
    (numpy .npy, Pillow PNG and tifffile TIFF as the writers of the inputs)."""
    rng = np.random.default_rng(4)
    if kind == "png8":
        pixels = rng.integers(0, 256, (10, 12)).astype(np.uint8)
        Image.fromarray(pixels).save(tmp_path / "img.png")
        name = "img.png"
    elif kind == "png16":
        pixels = rng.integers(0, 65536, (10, 12)).astype(np.uint16)
        Image.fromarray(pixels).save(tmp_path / "img.png")
        name = "img.png"
    elif kind == "tiff16":
        import tifffile

        pixels = rng.integers(0, 65536, (10, 12)).astype(">u2")
        tifffile.imwrite(tmp_path / "img.tif", pixels)
        name = "img.tif"
    else:
        dtype = ">u2" if kind == "npy_big_endian_u2" else "<f4"
        pixels = (rng.random((10, 12)) * 4000).astype(dtype)
        np.save(tmp_path / "img.npy", pixels)
        name = "img.npy"
    (tmp_path / "img.json").write_text(json.dumps(sidecar()))
    store = Store(tmp_path / "store")
    assert store.ingest(tmp_path / name).status == "stored"
    (back,) = store.read_frames()
    assert back.pixels.dtype == pixels.dtype.newbyteorder("=")
    np.testing.assert_array_equal(back.pixels, pixels)
    assert back.pixels.astype(pixels.dtype).tobytes() == pixels.tobytes()


def test_a_failing_store_disk_stops_ingest_instead_of_quarantining(tmp_path, monkeypatch, capsys):
    import errno

    import diagnostics._storeio as storeio
    import diagnostics.store as store_mod

    write_bpm_csv(tmp_path / "in" / "a.csv")

    def full(*args, **kwargs):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(store_mod, "atomic_write_table", full)
    assert storeio.atomic_write_table is not full
    store = Store(tmp_path / "store")
    with pytest.raises(OSError, match="No space left"):
        store.ingest(tmp_path / "in" / "a.csv")
    assert store.quarantine_list().empty and store.ingest_log().empty
    assert main(["ingest", str(tmp_path / "in"), "--store", str(tmp_path / "store")]) == 2
    err = capsys.readouterr().err
    assert "cannot write to the store" in err and "Traceback" not in err


def test_missing_path_is_reported_not_raised(tmp_path):
    store = Store(tmp_path / "store")
    out = store.ingest(tmp_path / "nope.csv")
    assert out.status == "quarantined" and "cannot read" in out.message


def test_grown_scan_folder_is_a_new_version_of_the_same_scan(tmp_path):
    store = Store(tmp_path / "store")
    write_scan(tmp_path / "q", n_steps=2)
    assert store.ingest(tmp_path / "q").status == "stored"
    write_scan(tmp_path / "q", n_steps=4)
    assert store.ingest(tmp_path / "q").status == "stored"
    scans = store.list_scans()
    assert len(scans) == 1 and scans["n_steps"][0] == 5
    assert len(store.profile_index(scan=scans["scan_id"][0])) == 8


# ------------------------------------------------------------------ the command line
def test_cli_ingest_summary_and_exit_status(batch, tmp_path, capsys):
    folder, _ = batch
    rc = main(["ingest", str(folder), "--store", str(tmp_path / "s")])
    out = capsys.readouterr().out
    assert rc == 1
    assert "stored 7 (" in out and "skipped as duplicate 0" in out and "quarantined 5" in out
    assert "fake.png" in out and "Traceback" not in out
    rc = main(["ingest", str(folder / "bpm"), "--store", str(tmp_path / "s"), "--json"])
    captured = capsys.readouterr()
    lines = [json.loads(line) for line in captured.out.splitlines()]
    assert rc == 0 and [r["status"] for r in lines] == ["duplicate", "duplicate"]
    assert {r["file"] for r in lines} == {str(folder / "bpm" / "run1.csv"),
                                         str(folder / "bpm" / "run2.csv")}
    assert "duplicate 2" in captured.err
    rc = main(["ingest", str(folder / "bad" / "fake.png"), "--store", str(tmp_path / "s"),
               "--json"])
    (rec,) = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert rc == 1 and rec["status"] == "quarantined" and "fake.png" in rec["error"]


def test_cli_compact(tmp_path, capsys):
    for i in range(3):
        write_bpm_csv(tmp_path / "in" / f"f{i}.csv", 20, start=T0 + pd.Timedelta(minutes=i),
                      seed=i)
    assert main(["ingest", str(tmp_path / "in"), "--store", str(tmp_path / "s")]) == 0
    capsys.readouterr()
    assert main(["compact", "--store", str(tmp_path / "s")]) == 0
    out = capsys.readouterr().out
    assert "bpm 2026-11-30: 3 files -> 1 (120 rows)" in out
    assert len(Store(tmp_path / "s").read_bpm()) == 120
    assert main(["compact", "--store", str(tmp_path / "missing")]) == 2  # no traceback
    assert "no beamdiag store" in capsys.readouterr().err


# ------------------------------------------------------------------ crash mid-batch
@pytest.mark.slow
def test_sigkill_mid_batch_then_rerun_completes_without_duplicates(tmp_path):
    """A real ``python -m diagnostics ingest`` killed with SIGKILL after its first
    outputs appear; a rerun completes the store, every reading exactly once."""
    inbox = tmp_path / "inbox"
    n_files, n_times = 160, 30
    bpms = tuple(f"BPM-{i:02d}" for i in range(1, 25))
    for i in range(n_files):
        write_bpm_csv(inbox / f"bpm_{i:03d}.csv", n_times, seed=i, bpms=bpms,
                      start=T0 + pd.Timedelta(seconds=3 * i))
    expected_rows = n_files * n_times * len(bpms)
    store_dir = tmp_path / "store"
    cmd = [sys.executable, "-m", "diagnostics", "ingest", str(inbox), "--store", str(store_dir)]
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    proc = subprocess.Popen(cmd, cwd=REPO, env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 60
    try:
        while time.monotonic() < deadline:
            if proc.poll() is not None:
                break
            if len(list((store_dir / "bpm").glob("*/*.parquet"))) >= 3:
                break
            time.sleep(0.01)
        still_running = proc.poll() is None
        proc.send_signal(signal.SIGKILL)
    finally:
        proc.wait(timeout=30)
    assert still_running, "the batch finished before it could be killed; make it larger"
    partial = Store(store_dir)
    done = len(partial.ingest_log())
    assert 0 < done < n_files
    assert len(partial.read_bpm()) < expected_rows

    rerun = subprocess.run(cmd, cwd=REPO, env=env, capture_output=True, text=True, timeout=300)
    assert rerun.returncode == 0, rerun.stderr
    store = Store(store_dir)
    bpm = store.read_bpm()
    assert len(bpm) == expected_rows
    assert not bpm.duplicated(["timestamp", "bpm"]).any()
    assert len(store.ingest_log()) == n_files
    # no half-written files: every *.parquet opens; temporaries never end in .parquet
    parquet = list(store_dir.rglob("*.parquet"))
    for p in parquet:
        pq.read_metadata(p)
    assert all(not p.name.endswith(".parquet") for p in store_dir.rglob("*")
               if p.is_file() and ".tmp" in p.name)
    con = duckdb.connect()
    glob = str(store_dir / "bpm" / "**" / "*.parquet")
    assert con.execute("SELECT count(*) FROM read_parquet(?)", [glob]).fetchall() == [
        (expected_rows,)]
    assert con.execute("SELECT count(*) FROM (SELECT DISTINCT timestamp, bpm FROM "
                       "read_parquet(?))", [glob]).fetchall() == [(expected_rows,)]
    everything = str(store_dir / "**" / "*.parquet")  # every file of the store opens
    assert con.execute("SELECT count(*) > 0 FROM read_parquet(?, union_by_name = true)",
                       [everything]).fetchall() == [(True,)]
    import pyarrow.dataset as ds

    assert ds.dataset(store_dir / "bpm", partitioning="hive").count_rows() == expected_rows


# ------------------------------------------------------------------ whatever comes in
@pytest.fixture(scope="module")
def fuzz_store(tmp_path_factory):
    return Store(tmp_path_factory.mktemp("fuzz") / "store"), tmp_path_factory.mktemp("fuzz_in")


@settings(max_examples=40, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.binary(max_size=400), suffix=st.sampled_from([".csv", ".png", ".npy", ".parquet",
                                                             ".tif", ".txt"]),
       header=st.sampled_from([b"", b"timestamp,bpm,x_mm,y_mm\n", b"# plane: x\n",
                               b"\x89PNG\r\n\x1a\n", b"\x93NUMPY", b"PAR1"]))
def test_ingest_stores_or_quarantines_whatever_bytes_come_in(fuzz_store, data, suffix, header):
    """Property: ingest never raises for bad input; a file is stored, a duplicate, or
    quarantined with a one-line reason and a copy."""
    store, folder = fuzz_store
    name = hashlib.sha256(header + data + suffix.encode()).hexdigest()[:12] + suffix
    path = folder / name
    path.write_bytes(header + data)
    if suffix in (".png", ".npy", ".tif"):
        path.with_suffix(".json").write_text(json.dumps(sidecar()))
    out = store.ingest(path)
    assert out.status in ("stored", "duplicate", "quarantined")
    if out.status == "quarantined":
        assert out.message and "\n" not in out.message
        q = store.quarantine_list()
        (copy,) = q.loc[q.sha256 == out.sha256, "quarantine_path"]
        assert (store.root / copy).exists()
