"""Tests of the Parquet store: writers, reads, schemas, scans, results, DuckDB, compaction.

The data are built here from the dataclasses of :mod:`diagnostics.measurements`;
the references are exact (a value written must come back bit for bit), numpy's
own ``.npy`` format (``numpy.save``/``numpy.load``), pyarrow's Parquet reader
and DuckDB reading the files directly.
"""

from __future__ import annotations

import threading

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from diagnostics.errors import InputError, StoreError
from diagnostics.measurements import (
    BPM_COLUMNS,
    DesignTwiss,
    Frame,
    Magnet,
    Monitor,
    ParticleSpec,
    Profile,
    ScanSpec,
    ScanStep,
)
from diagnostics.store import SCHEMA_VERSION, Store, scan_id_of

T0 = pd.Timestamp("2026-11-30T06:00:00Z")


def bpm_frame(n_times=500, bpms=("BPM-01", "BPM-02", "BPM-03"), start=T0, step="100ms", seed=1):
    rng = np.random.default_rng(seed)
    times = pd.date_range(start, periods=n_times, freq=step)
    df = pd.DataFrame({
        "timestamp": np.repeat(times, len(bpms)),
        "bpm": np.tile(np.array(bpms), n_times),
        "x_m": rng.normal(0, 1e-4, n_times * len(bpms)),
        "y_m": rng.normal(0, 2e-4, n_times * len(bpms)),
        "sum": rng.uniform(0.9, 1.1, n_times * len(bpms)),
    })
    return df


def profile(device="WS-01", plane="x", t=T0, n=41, seed=0):
    rng = np.random.default_rng(seed)
    pos = np.linspace(-2e-3, 2e-3, n)
    return Profile(device, plane, 0.0 if plane == "x" else np.pi / 2, t, pos,
                   np.exp(-pos**2 / 2 / 3e-4**2) + rng.normal(0, 1e-3, n), "wire.csv",
                   {"operator_note": "ok"})


def frame(pixels, *, dark=None, t=T0, device="SCR-01"):
    return Frame(device, t, pixels, (1.5e-5, 1.6e-5), 12 if pixels.dtype.kind == "u" else None,
                 dark, (1, 2, pixels.shape[1] - 1, pixels.shape[0] - 1), "screen.png",
                 {"exposure_s": 0.001})


@pytest.fixture
def store(tmp_path):
    return Store(tmp_path / "store")


# ------------------------------------------------------------------ BPM / slow
def test_bpm_round_trip_is_exact(store):
    df = bpm_frame()
    df.loc[5, "sum"] = np.nan
    store.write_bpm(df, sha256="a" * 64, source="run1.csv")
    back = store.read_bpm()
    assert list(back.columns) == list(BPM_COLUMNS)
    assert str(back["timestamp"].dtype) == "datetime64[ns, UTC]"
    expected = df.sort_values(["timestamp", "bpm"], kind="stable").reset_index(drop=True)
    pd.testing.assert_frame_equal(back, expected, check_dtype=False, check_exact=True)
    assert np.isnan(back.loc[(back.timestamp == df.timestamp[5]) & (back.bpm == df.bpm[5]),
                             "sum"]).all()


def test_bpm_accepts_arrow_table_and_keeps_extra_columns(store):
    df = bpm_frame(50)
    df["charge_C"] = np.arange(len(df)) * 1e-12
    df["status"] = "ok"
    store.write_bpm(pa.Table.from_pandas(df, preserve_index=False), sha256="b" * 64, source="x")
    back = store.read_bpm()
    assert back["charge_C"].sum() == pytest.approx(df["charge_C"].sum(), rel=1e-15)
    assert set(back["status"]) == {"ok"}
    assert list(store.read_bpm(columns=["x_m"]).columns) == ["timestamp", "bpm", "x_m"]


def test_same_sha_twice_writes_once(store):
    df = bpm_frame()
    first = store.write_bpm(df, sha256="c" * 64, source="a.csv")
    stamp = [p.stat().st_mtime_ns for p in first]
    second = store.write_bpm(df, sha256="c" * 64, source="a.csv")
    assert first == second
    assert [p.stat().st_mtime_ns for p in second] == stamp
    assert len(store.read_bpm()) == len(df)


def test_file_names_units_and_schema_version(store):
    paths = store.write_bpm(bpm_frame(), sha256="0123456789abcdef" + "0" * 48, source="a.csv")
    assert [p.name for p in paths] == ["part-0123456789abcdef-0.parquet"]
    assert paths[0].parent.name == "date=2026-11-30"
    schema = pq.read_schema(paths[0])
    assert schema.metadata[b"schema_version"] == SCHEMA_VERSION.encode()
    assert schema.field("x_m").metadata == {b"unit": b"m"}
    assert schema.field("y_m").metadata == {b"unit": b"m"}
    leftovers = [p for p in store.root.rglob("*") if p.is_file() and ".tmp" in p.name]
    assert leftovers == []


def test_readings_across_midnight_go_to_two_date_partitions(store):
    df = bpm_frame(200, start=pd.Timestamp("2026-11-30T23:59:50Z"))
    paths = store.write_bpm(df, sha256="d" * 64, source="night.csv")
    assert [p.parent.name for p in paths] == ["date=2026-11-30", "date=2026-12-01"]
    assert sum(pq.read_metadata(p).num_rows for p in paths) == len(df)
    day2 = store.read_bpm(start="2026-12-01", end="2026-12-02")
    assert len(day2) == (df.timestamp >= pd.Timestamp("2026-12-01T00:00Z")).sum()


def test_window_is_half_open_and_naive_times_are_utc(store):
    df = bpm_frame(100, step="1s")
    store.write_bpm(df, sha256="e" * 64, source="a.csv")
    start, end = "2026-11-30 06:00:10", pd.Timestamp("2026-11-30T07:00:20+01:00")  # 06:00:20 UTC
    got = store.read_bpm(start=start, end=end, bpms=["BPM-02"])
    mask = (df.timestamp >= pd.Timestamp(start, tz="UTC")) & (df.timestamp < end) & (
        df.bpm == "BPM-02")
    assert len(got) == mask.sum() == 10
    assert got.timestamp.min() == pd.Timestamp("2026-11-30T06:00:10Z")
    with pytest.raises(InputError, match="before start"):
        store.read_bpm(start=end, end=start)
    with pytest.raises(InputError, match="not a time"):
        store.read_bpm(start="yesterday-ish")


def test_schema_evolution_reads_union_of_columns(store):
    store.write_bpm(bpm_frame(10), sha256="1" * 64, source="old.csv")
    newer = bpm_frame(10, start=T0 + pd.Timedelta("1h"))
    newer["charge_C"] = 1e-12
    store.write_bpm(newer, sha256="2" * 64, source="new.csv")
    back = store.read_bpm()
    assert back["charge_C"].isna().sum() == 30
    assert (back.loc[back.timestamp >= T0 + pd.Timedelta("1h"), "charge_C"] == 1e-12).all()
    con = store.duckdb()
    assert con.execute("SELECT count(charge_C), count(*) FROM bpm").fetchall() == [(30, 60)]


def test_writer_refuses_naive_timestamps(store):
    df = bpm_frame(5)
    df["timestamp"] = df["timestamp"].dt.tz_localize(None)
    with pytest.raises(InputError, match="time zone"):
        store.write_bpm(df, sha256="f" * 64, source="a.csv")


def test_slow_round_trip(store):
    times = pd.date_range(T0, periods=30, freq="10s")
    df = pd.DataFrame({"timestamp": np.repeat(times, 2), "channel": ["T-01", "HC-08"] * 30,
                       "value": np.arange(60, dtype=float) * 0.01, "unit": ["degC", "A"] * 30})
    store.write_slow(df, sha256="9" * 64, source="slow.csv")
    back = store.read_slow(channels="HC-08")
    assert len(back) == 30 and set(back.unit) == {"A"}
    np.testing.assert_array_equal(back.value, df.value[df.channel == "HC-08"])


# ------------------------------------------------------------------ profiles
def test_profiles_round_trip_exactly(store):
    profs = [profile(seed=i, t=T0 + pd.Timedelta(minutes=30 * i), plane="xy"[i % 2])
             for i in range(4)]
    store.write_profiles(profs, sha256="a1" * 32, source="wire.csv")
    back = store.read_profiles()
    assert len(back) == 4
    for a, b in zip(profs, back, strict=True):
        np.testing.assert_array_equal(a.position_m, b.position_m)
        np.testing.assert_array_equal(a.signal, b.signal)
        assert (a.device, a.plane, a.wire_angle_rad, a.timestamp) == (
            b.device, b.plane, b.wire_angle_rad, b.timestamp)
        assert b.metadata == {"operator_note": "ok"}
    index = store.profile_index(devices="WS-01")
    assert list(index["id"]) == [f"{'a1' * 8}-{i}" for i in range(4)]
    assert "position_m" not in index.columns
    assert store.read_profile(index["id"][2]).timestamp == profs[2].timestamp
    with pytest.raises(InputError, match="no profile"):
        store.read_profile("nope")


def test_profile_lists_are_arrow_lists_with_units(store):
    (path,) = store.write_profiles([profile()], sha256="a2" * 32, source="wire.csv")
    schema = pq.read_schema(path)
    assert schema.field("position_m").type == pa.list_(pa.float64())
    assert schema.field("position_m").metadata == {b"unit": b"m"}


# ------------------------------------------------------------------ frames
@pytest.mark.parametrize("dtype", ["u1", "<u2", ">u2", "<f4", ">f4", "<i4"])
def test_frames_are_bit_identical(store, dtype):
    rng = np.random.default_rng(3)
    pixels = rng.integers(0, 250 if dtype == "u1" else 4095, (37, 53)).astype(dtype)
    if dtype.endswith("f4"):
        pixels = (pixels + rng.random((37, 53))).astype(dtype)
    dark = rng.integers(0, 30, (37, 53)).astype(dtype)
    store.write_frames([frame(pixels, dark=dark)], sha256="b1" * 32, source="screen.png")
    (back,) = store.read_frames()
    assert back.pixels.dtype == pixels.dtype.newbyteorder("=")
    assert back.pixels.dtype.isnative
    np.testing.assert_array_equal(back.pixels, pixels)
    assert back.pixels.astype(pixels.dtype).tobytes() == pixels.tobytes()
    np.testing.assert_array_equal(back.dark, dark)
    assert back.pixel_size_m == (1.5e-5, 1.6e-5)
    assert back.roi == (1, 2, 52, 36)
    assert back.metadata == {"exposure_s": 0.001}


def test_frame_from_npy_file_is_bit_identical(store, tmp_path):
    """Reference: numpy's own .npy format (numpy.save / numpy.load) of float32 pixels."""
    pixels = np.random.default_rng(5).random((16, 24), dtype=np.float32)
    np.save(tmp_path / "img.npy", pixels)
    loaded = np.load(tmp_path / "img.npy", allow_pickle=False)
    store.write_frames([frame(loaded)], sha256="b2" * 32, source="img.npy")
    (back,) = store.read_frames()
    assert back.pixels.dtype == np.float32
    assert back.pixels.tobytes() == np.load(tmp_path / "img.npy").tobytes()


def test_frame_index_and_limit_and_lookup(store):
    frames = [frame(np.full((4, 5), i, np.uint16), t=T0 + pd.Timedelta(minutes=i),
                    device=f"SCR-0{1 + i % 3}") for i in range(6)]
    store.write_frames(frames, sha256="b3" * 32, source="many")
    index = store.frame_index()
    assert len(index) == 6 and "pixels" not in index.columns
    assert list(index[["rows", "cols"]].iloc[0]) == [4, 5]
    first_two = store.read_frames(limit=2)
    assert [int(f.pixels[0, 0]) for f in first_two] == [0, 1]
    assert [int(f.pixels[0, 0]) for f in store.read_frames(devices="SCR-02")] == [1, 4]
    assert int(store.read_frame(index["id"][5]).pixels[0, 0]) == 5
    with pytest.raises(InputError, match="expected \\(rows, cols\\)"):
        store.write_frames([frame(np.zeros((2, 2, 3), np.uint8))], sha256="b4" * 32, source="rgb")


# ------------------------------------------------------------------ scans
def make_scan(n_steps=3, *, name="Q-05 scan", with_frames=True, complete=True):
    steps = []
    for i in range(n_steps):
        steps.append(ScanStep(
            index=i, k1_per_m2=-2.0 + i,
            profile_x=profile("WS-02", "x", T0 + pd.Timedelta(minutes=i), seed=i),
            profile_y=profile("WS-02", "y", T0 + pd.Timedelta(minutes=i), seed=10 + i),
            frame=frame(np.full((6, 8), i, np.uint16), t=T0 + pd.Timedelta(minutes=i))
            if with_frames else None))
    steps.append(ScanStep(index=n_steps, k1_per_m2=1.5, sigma_x_m=1.2e-4, sigma_y_m=2.0e-4,
                          sigma_x_err_m=3e-6))
    return ScanSpec(
        kind="quadrupole", name=name, timestamp=T0, particle=ParticleSpec("electron"),
        kinetic_energy_MeV=150.0, magnet=Magnet("quadrupole", "Q-05", 0.2),
        transport_x=np.array([[1.0, 4.0], [0.0, 1.0]]), transport_y=np.array([[1.0, 4.0],
                                                                             [0.0, 1.0]]),
        monitors=(Monitor("WS-02", 1.5e-5),), steps=tuple(steps),
        design={"x": DesignTwiss(10.0, -1.2), "y": DesignTwiss(8.0, 0.7)},
        expected_steps=None, complete=complete, folder="")


def assert_same_scan(a: ScanSpec, b: ScanSpec):
    assert (a.kind, a.name, a.timestamp, a.particle, a.kinetic_energy_MeV, a.magnet) == (
        b.kind, b.name, b.timestamp, b.particle, b.kinetic_energy_MeV, b.magnet)
    np.testing.assert_array_equal(a.transport_x, b.transport_x)
    assert a.design == b.design
    assert [m.name for m in a.monitors] == [m.name for m in b.monitors]
    assert len(a.steps) == len(b.steps)
    for s, t in zip(a.steps, b.steps, strict=True):
        assert (s.index, s.k1_per_m2, s.sigma_x_m, s.sigma_y_m, s.sigma_x_err_m) == (
            t.index, t.k1_per_m2, t.sigma_x_m, t.sigma_y_m, t.sigma_x_err_m)
        for p, q in ((s.profile_x, t.profile_x), (s.profile_y, t.profile_y)):
            assert (p is None) == (q is None)
            if p is not None:
                np.testing.assert_array_equal(p.signal, q.signal)
        assert (s.frame is None) == (t.frame is None)
        if s.frame is not None:
            np.testing.assert_array_equal(s.frame.pixels, t.frame.pixels)


def test_scan_round_trip(store):
    spec = make_scan()
    store.write_scan(spec, sha256="c1" * 32, source="scans/q05")
    scans = store.list_scans()
    assert len(scans) == 1
    row = scans.iloc[0]
    assert (row["scan_id"], row["name"], row["magnet"], row["monitor"], row["n_steps"]) == (
        scan_id_of(spec), "Q-05 scan", "Q-05", "WS-02", 4)
    assert_same_scan(spec, store.load_scan(row["scan_id"]))
    assert_same_scan(spec, store.load_scan("Q-05 scan"))
    index = store.profile_index(scan=row["scan_id"])
    assert list(index["step"]) == [0, 0, 1, 1, 2, 2]
    with pytest.raises(InputError, match="no scan"):
        store.load_scan("Q-99 scan")


def test_grown_scan_replaces_its_earlier_version(store):
    store.write_scan(make_scan(2, complete=False), sha256="d1" * 32, source="scans/q05")
    store.write_scan(make_scan(4), sha256="d2" * 32, source="scans/q05")
    scans = store.list_scans()
    assert len(scans) == 1 and scans["n_steps"][0] == 5 and bool(scans["complete"][0])
    sid = scans["scan_id"][0]
    assert len(store.read_profiles(scan=sid)) == 8
    assert len(store.frame_index(scan=sid)) == 4
    assert len(store.load_scan(sid).steps) == 5
    con = store.duckdb()
    assert con.execute("SELECT count(*) FROM profiles").fetchall() == [(8,)]
    assert con.execute("SELECT count(*) FROM scans").fetchall() == [(1,)]
    store.compact()  # superseded rows are dropped when merging
    assert len(store.read_profiles(scan=sid)) == 8
    assert sum(pq.read_metadata(p).num_rows for p in store.live_files("profiles")) == 8


# ------------------------------------------------------------------ results
def test_results_versions_and_options(store):
    recs = [{"timestamp": "2026-11-30T06:00:00Z", "profile_id": "p1", "sigma_m": 1.0e-4,
             "flags": ["clipped"], "fit": {"chi2": 1.1}},
            {"timestamp": "2026-11-30T06:30:00Z", "profile_id": "p2", "sigma_m": None,
             "flags": [], "fit": None}]
    path = store.write_results("profiles", recs, options={"model": "gaussian"})
    again = store.write_results("profiles", recs, options={"model": "gaussian"})
    assert path == again and path.parent.name == "date=2026-11-30"
    store.write_results("profiles", recs[:1], options={"model": "rms"}, version="v-rms")
    versions = store.result_versions("profiles")
    assert list(versions["version"])[-1] == "v-rms" and list(versions["rows"]) == [2, 1]
    latest = store.read_results("profiles")
    assert list(latest["profile_id"]) == ["p1"] and set(latest["result_version"]) == {"v-rms"}
    first = store.read_results("profiles", version=versions["version"][0])
    assert list(first["profile_id"]) == ["p1", "p2"]
    assert first["options"][0] == '{"model":"gaussian"}'
    assert first["flags"][0] == '["clipped"]' and np.isnan(first["sigma_m"][1])
    assert len(store.read_results("profiles", version="all")) == 3
    assert len(store.read_results("profiles", version="all", start="2026-11-30T06:10Z")) == 1
    with pytest.raises(InputError, match="no profiles results of version"):
        store.read_results("profiles", version="v-none")
    with pytest.raises(InputError, match="not a result kind"):
        store.write_results("../etc", recs)
    assert store.read_results("orbit").empty
    # after compaction merged the result files, the same records again add nothing
    store.write_results("profiles", recs[1:], options={"model": "gaussian"})
    store.compact(kinds="results/profiles")
    assert len(store.read_results("profiles", version="all")) == 4
    store.write_results("profiles", recs, options={"model": "gaussian"})
    store.write_results("profiles", recs[1:], options={"model": "gaussian"})
    assert len(store.read_results("profiles", version="all")) == 4
    assert list(store.result_versions("profiles")["rows"]) == [3, 1]


# ------------------------------------------------------------------ DuckDB sandbox
def test_duckdb_connection_is_sandboxed(store, tmp_path):
    store.write_bpm(bpm_frame(10), sha256="e1" * 32, source="a.csv")
    outside = tmp_path / "outside.csv"
    outside.write_text("a\n1\n")
    con = store.duckdb()
    assert con.execute("SELECT count(*) FROM bpm").fetchall() == [(30,)]
    with pytest.raises(duckdb.Error):
        con.execute("SELECT * FROM read_csv(?)", [str(outside)]).fetchall()
    with pytest.raises(duckdb.Error):
        con.execute(f"COPY (SELECT 1) TO '{tmp_path / 'x.csv'}'")
    with pytest.raises(duckdb.Error):
        con.execute("SET enable_external_access = true")
    assert not (tmp_path / "x.csv").exists()
    assert con.execute("SELECT current_setting('threads')").fetchall() == [(2,)]
    # parameters are bound, so a hostile name is just a name
    assert con.execute("SELECT count(*) FROM bpm WHERE bpm = ?",
                       ["BPM-01'; DROP VIEW bpm; --"]).fetchall() == [(0,)]


def test_empty_store_views_are_typed(store):
    con = store.duckdb()
    assert con.execute("SELECT count(*) FROM frames").fetchall() == [(0,)]
    cols = dict(con.execute("DESCRIBE bpm").fetchall() and
                [(r[0], r[1]) for r in con.execute("DESCRIBE bpm").fetchall()])
    assert cols["x_m"] == "DOUBLE" and cols["timestamp"].startswith("TIMESTAMP")
    assert store.time_range("bpm") is None
    assert store.last_seen() == {k: None for k in ("profiles", "frames", "bpm", "slow", "scans")}
    assert list(store.quarantine_list().columns)[:4] == ["source", "kind", "sha256", "reason"]


# ------------------------------------------------------------------ store opening
def test_read_only_and_missing_store(tmp_path):
    with pytest.raises(StoreError, match="no beamdiag store"):
        Store(tmp_path / "none", create=False)
    Store(tmp_path / "s").write_bpm(bpm_frame(5), sha256="f1" * 32, source="a")
    ro = Store(tmp_path / "s", read_only=True)
    assert len(ro.read_bpm()) == 15
    with pytest.raises(StoreError, match="read-only"):
        ro.write_bpm(bpm_frame(5), sha256="f2" * 32, source="a")


# ------------------------------------------------------------------ compaction
def test_compaction_keeps_every_row_once(store):
    expected = []
    for i in range(12):
        df = bpm_frame(40, start=T0 + pd.Timedelta(minutes=i), seed=i)
        store.write_bpm(df, sha256=f"{i:064x}", source=f"f{i}.csv")
        expected.append(df)
    expected = pd.concat(expected).sort_values(["timestamp", "bpm"]).reset_index(drop=True)
    before = store.read_bpm()
    summary = store.compact()
    merged = {p.kind: (p.inputs, p.rows) for p in summary.partitions}
    assert merged["bpm"] == (12, 1440) and merged["rollup/bpm"][0] == 12
    files = list((store.root / "bpm").rglob("*.parquet"))
    assert len(files) == 1 and store.live_files("bpm") == files
    after = store.read_bpm()
    pd.testing.assert_frame_equal(before, after)
    pd.testing.assert_frame_equal(after, expected, check_dtype=False)
    # re-ingesting an input already merged is still a no-op
    store.write_bpm(bpm_frame(40, seed=0), sha256=f"{0:064x}", source="f0.csv")
    assert len(store.read_bpm()) == 1440
    assert store.compact().partitions == ()


def test_reader_during_compaction_sees_exact_counts(store):
    n_files, rows_each = 20, 30
    for i in range(n_files):
        store.write_bpm(bpm_frame(10, start=T0 + pd.Timedelta(seconds=i), step="100ms", seed=i),
                        sha256=f"{i:064x}", source=f"f{i}.csv")
    counts, errors, stop = [], [], threading.Event()

    def reader():
        while not stop.is_set():
            try:
                counts.append(len(store.read_bpm()))
                counts.append(int(store.trend("bpm", "x_m", bucket="1h")["x_m_count"].sum()))
            except Exception as exc:  # noqa: BLE001 - recorded and asserted below
                errors.append(exc)

    thread = threading.Thread(target=reader)
    thread.start()
    try:
        for _ in range(2):
            store.compact()
            for i in range(n_files, n_files + 5):  # more small files, then compact again
                store.write_bpm(bpm_frame(10, start=T0 + pd.Timedelta(seconds=i), seed=i),
                                sha256=f"{i:064x}", source=f"f{i}.csv")
            n_files += 5
    finally:
        stop.set()
        thread.join()
    assert errors == []
    assert len(counts) > 0
    # every observation is a whole number of input files, between the first 20 and all
    # of them (inputs and merged file counted together would be at least twice 20 files),
    # and never goes down (a file missed during the switch would show as a drop)
    assert all(c % rows_each == 0 and 20 * rows_each <= c <= n_files * rows_each
               for c in counts), sorted(set(counts))
    assert counts == sorted(counts)
    assert len(store.read_bpm()) == rows_each * n_files


def test_crash_between_parquet_and_catalog_is_repaired_by_a_rerun(store, monkeypatch):
    """Write order Parquet -> catalog: a crash in between leaves a whole but unregistered
    file that readers ignore; the rerun writes the same name (same bytes) and registers it."""
    df = bpm_frame(20)

    def crash(*args, **kwargs):
        raise KeyboardInterrupt("simulated crash before the catalog commit")

    with monkeypatch.context() as m:
        m.setattr(type(store._catalog), "register_files", crash)
        with pytest.raises(KeyboardInterrupt):
            store.write_bpm(df, sha256="ee" * 32, source="a.csv")
    (orphan,) = (store.root / "bpm").rglob("*.parquet")
    orphan_bytes = orphan.read_bytes()
    assert store.read_bpm().empty  # not live
    (again,) = store.write_bpm(df, sha256="ee" * 32, source="a.csv")
    assert again == orphan and again.read_bytes() == orphan_bytes
    assert len(store.read_bpm()) == 60
    assert list((store.root / "bpm").rglob("*.parquet")) == [again]


def test_two_compactions_at_once_leave_one_copy_of_each_row(store):
    for i in range(8):
        store.write_bpm(bpm_frame(20, start=T0 + pd.Timedelta(minutes=i), seed=i),
                        sha256=f"{i:02x}" * 32, source=f"f{i}.csv")
    results, errors = [], []

    def run():
        try:
            results.append(store.compact())
        except Exception as exc:  # noqa: BLE001 - asserted below
            errors.append(exc)

    threads = [threading.Thread(target=run) for _ in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    assert sorted(len(r.partitions) for r in results) == [0, 2]  # the second found nothing to do
    assert len(store.read_bpm()) == 8 * 60
    assert len(list((store.root / "bpm").rglob("*.parquet"))) == 1


def test_read_bpm_is_sorted_whatever_the_write_order(store):
    late = bpm_frame(30, start=T0 + pd.Timedelta("1h"), bpms=("BPM-09", "BPM-02"), seed=1)
    early = bpm_frame(30, start=T0, bpms=("BPM-09", "BPM-02"), seed=2)
    store.write_bpm(late, sha256="0" * 63 + "1", source="late.csv")
    store.write_bpm(early, sha256="f" * 63 + "1", source="early.csv")
    got = store.read_bpm()
    expected = pd.concat([early, late]).sort_values(["timestamp", "bpm"]).reset_index(drop=True)
    pd.testing.assert_frame_equal(got, expected, check_dtype=False)
    assert got["bpm"].iloc[:2].tolist() == ["BPM-02", "BPM-09"]


def test_rollup_views_and_progress_line(store, capsys, tmp_path):
    store.write_bpm(bpm_frame(200), sha256="ab" * 32, source="a.csv")
    con = store.duckdb()
    assert con.execute("SELECT sum(x_m__n) FROM rollup_bpm").fetchall() == [(600,)]
    assert con.execute("SELECT count(*) FROM rollup_slow").fetchall() == [(0,)]
    (tmp_path / "notes.csv").write_text("nothing useful\n")
    summary = store.ingest_many([tmp_path / "notes.csv"], progress=True)
    err = capsys.readouterr().err
    assert err.startswith("\ringest 1/1: ") and err.endswith("\n")
    assert summary.line() == "stored 0 (0 rows), duplicate 0, quarantined 1"
    (tmp_path / "a_file").write_text("")
    with pytest.raises(StoreError, match="cannot create the store"):
        Store(tmp_path / "a_file" / "store")
