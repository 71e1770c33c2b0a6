"""Trend queries (:meth:`Store.trend`) against an independent pandas reference.

The reference groups the same readings with ``pandas.Grouper(freq=..., origin="epoch")``
and computes mean, min, max, rms = sqrt(mean(v**2)) and count with pandas' own
reductions; DuckDB's sums and ours agree to floating-point rounding (relative
1e-12, common practice for reductions in a different order).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from diagnostics.errors import InputError
from diagnostics.store import Store

T0 = pd.Timestamp("2026-11-30T23:40:00Z")
BPMS = ("BPM-01", "BPM-02", "BPM-03", "BPM-04")


def readings(n_times=3000, seed=7, start=T0):
    rng = np.random.default_rng(seed)
    times = start + pd.to_timedelta(np.sort(rng.uniform(0, 3600, n_times)), unit="s")
    n = n_times * len(BPMS)
    df = pd.DataFrame({
        "timestamp": np.repeat(times, len(BPMS)).as_unit("ns"),
        "bpm": np.tile(np.array(BPMS), n_times),
        "x_m": rng.normal(1e-5, 1e-4, n),
        "y_m": rng.normal(-2e-5, 2e-4, n),
        "sum": rng.uniform(0.9, 1.1, n),
    })
    df.loc[rng.choice(n, 300, replace=False), "sum"] = np.nan  # "not given"
    return df


def reference(df, columns, bucket):
    g = df.groupby(["bpm", pd.Grouper(key="timestamp", freq=bucket, origin="epoch")])
    out = {}
    for c in columns:
        out[f"{c}_mean"] = g[c].mean()
        out[f"{c}_min"] = g[c].min()
        out[f"{c}_max"] = g[c].max()
        out[f"{c}_rms"] = np.sqrt(g[c].apply(lambda v: np.nanmean(v.to_numpy() ** 2)
                                             if v.notna().any() else np.nan))
        out[f"{c}_count"] = g[c].count()
    ref = pd.DataFrame(out).reset_index().rename(columns={"bpm": "device"})
    ref = ref[ref[[f"{c}_count" for c in columns]].sum(axis=1) > 0]  # pandas keeps empty bins
    # pandas keeps empty bins only when the whole group is empty; DuckDB never has them
    return ref.sort_values(["device", "timestamp"]).reset_index(drop=True)


@pytest.fixture(scope="module")
def filled(tmp_path_factory):
    store = Store(tmp_path_factory.mktemp("trend") / "store")
    df = readings()
    # several input files, crossing midnight (two date partitions)
    bounds = np.linspace(0, len(df), 6).astype(int)
    for i, (a, b) in enumerate(zip(bounds[:-1], bounds[1:], strict=True)):
        store.write_bpm(df.iloc[a:b], sha256=f"{i:02d}" * 32, source=f"part{i}.csv")
    return store, df


@pytest.mark.parametrize("method", ["raw", "rollup"])
@pytest.mark.parametrize("bucket", ["10s", "1min", "5min", "7min", "1h"])
def test_trend_equals_pandas_grouper_reference(filled, bucket, method):
    store, df = filled
    got = store.trend("bpm", ["x_m", "sum"], bucket=bucket, method=method)
    ref = reference(df, ["x_m", "sum"], bucket)
    assert list(got.columns) == list(ref.columns)
    pd.testing.assert_frame_equal(got, ref, check_dtype=False, rtol=1e-12, atol=0)
    assert got["x_m_count"].sum() == len(df)
    assert got["sum_count"].sum() == df["sum"].notna().sum()


@pytest.mark.parametrize("method", ["raw", "rollup"])
def test_trend_window_and_device_selection(filled, method):
    store, df = filled
    start, end = "2026-11-30T23:55:00Z", pd.Timestamp("2026-12-01T00:20:00Z")
    got = store.trend("bpm", "y_m", bucket="5min", start=start, end=end,
                      devices=["BPM-02", "BPM-04"], method=method)
    sel = df[(df.timestamp >= pd.Timestamp(start)) & (df.timestamp < end)
             & df.bpm.isin(["BPM-02", "BPM-04"])]
    ref = reference(sel, ["y_m"], "5min")
    pd.testing.assert_frame_equal(got, ref, check_dtype=False, rtol=1e-12, atol=0)
    assert set(got.device) == {"BPM-02", "BPM-04"}


def test_empty_window_gives_empty_well_typed_frame(filled, tmp_path):
    store, _ = filled
    got = store.trend("bpm", ["x_m", "y_m"], start="2030-01-01", end="2030-01-02")
    assert got.empty
    assert list(got.columns) == ["device", "timestamp"] + [
        f"{c}_{s}" for c in ("x_m", "y_m") for s in ("mean", "min", "max", "rms", "count")]
    assert str(got["timestamp"].dtype) == "datetime64[ns, UTC]"
    assert str(got["device"].dtype) == "str"
    assert got["x_m_mean"].dtype == np.float64 and got["x_m_count"].dtype == np.int64
    empty_store = Store(tmp_path / "empty")
    pd.testing.assert_frame_equal(empty_store.trend("bpm", ["x_m", "y_m"]), got)
    none = store.trend("bpm", "x_m", devices=["BPM-99"])
    assert none.empty and list(none.columns)[:2] == ["device", "timestamp"]


@pytest.mark.parametrize("method", ["raw", "rollup"])
def test_date_partitions_outside_the_window_are_not_read(tmp_path, method):
    """Partition pruning: a window on one day never opens the other day's files,
    shown by damaging those files (readings and rollups) after they were registered."""
    store = Store(tmp_path / "store")
    df = readings(600, start=pd.Timestamp("2026-11-30T23:30:00Z"))
    store.write_bpm(df, sha256="ab" * 32, source="night.csv")
    day1 = [p for p in store.live_files() if "date=2026-11-30" in str(p)]
    assert len(day1) == 2  # readings and their rollup
    for p in day1:
        p.write_bytes(b"not parquet any more")
    got = store.trend("bpm", "x_m", bucket="1min", start="2026-12-01", end="2026-12-02",
                      method=method)
    ref = reference(df[df.timestamp >= pd.Timestamp("2026-12-01T00:00Z")], ["x_m"], "1min")
    pd.testing.assert_frame_equal(got, ref, check_dtype=False, rtol=1e-12, atol=0)
    with pytest.raises(Exception, match="(?i)parquet|magic"):
        store.trend("bpm", "x_m", start="2026-11-30", end="2026-12-01", method=method)


def test_trend_of_slow_channels_and_results(tmp_path):
    store = Store(tmp_path / "store")
    times = pd.date_range("2026-11-30T06:00Z", periods=360, freq="10s")
    slow = pd.DataFrame({"timestamp": times, "channel": "T-01", "value": np.linspace(21, 21.4, 360),
                         "unit": "degC"})
    store.write_slow(slow, sha256="cd" * 32, source="slow.csv")
    got = store.trend("slow", "value", bucket="30min")
    assert list(got["value_count"]) == [180, 180]
    assert got["value_mean"][0] == pytest.approx(slow.value[:180].mean(), rel=1e-12)
    recs = [{"timestamp": t.isoformat(), "device": "WS-01", "sigma_m": 1e-4 * (1 + i / 10)}
            for i, t in enumerate(times[:6])]
    store.write_results("profiles", recs)
    res = store.trend("results/profiles", "sigma_m", bucket="1h")
    assert res["sigma_m_count"].tolist() == [6]
    assert res["sigma_m_max"][0] == pytest.approx(1.5e-4, rel=1e-15)


def test_trend_rejects_bad_arguments(filled):
    store, _ = filled
    with pytest.raises(InputError, match="not a time span"):
        store.trend("bpm", "x_m", bucket="fortnightly")
    with pytest.raises(InputError, match="positive"):
        store.trend("bpm", "x_m", bucket="0s")
    with pytest.raises(InputError, match="no column 'z_m'"):
        store.trend("bpm", "z_m")
    with pytest.raises(InputError, match="not numeric"):
        store.trend("bpm", "bpm")
    with pytest.raises(InputError, match="kind 'orbits'"):
        store.trend("orbits", "x_m")


def test_trend_reads_what_duckdb_reads_from_the_files(filled):
    """Cross-check with a plain DuckDB aggregate over the same files (time_bucket)."""
    import duckdb

    store, df = filled
    files = [str(p) for p in store.live_files("bpm")]
    assert sum(pq.read_metadata(f).num_rows for f in files) == len(df)
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    ref = con.execute(
        "SELECT bpm, time_bucket(INTERVAL '5 minutes', timestamp::TIMESTAMP) AS b, avg(x_m),"
        " count(*) FROM read_parquet(?) GROUP BY ALL ORDER BY bpm, b", [files]).fetchall()
    got = store.trend("bpm", "x_m", bucket="5min")
    assert len(ref) == len(got)
    np.testing.assert_allclose(got["x_m_mean"], [r[2] for r in ref], rtol=1e-12)
    assert got["x_m_count"].tolist() == [r[3] for r in ref]


def test_buckets_floor_before_the_epoch(tmp_path):
    """Readings before 1970 fall in the bucket that starts at or before them (floor),
    as pandas' Grouper with origin='epoch' puts them."""
    store = Store(tmp_path / "store")
    df = readings(200, start=pd.Timestamp("1969-12-31T23:58:00Z"))
    store.write_bpm(df, sha256="ef" * 32, source="old.csv")
    got = store.trend("bpm", "x_m", bucket="1min")
    ref = reference(df, ["x_m"], "1min")
    pd.testing.assert_frame_equal(got, ref, check_dtype=False, rtol=1e-12, atol=0)
    assert got["timestamp"].min() == pd.Timestamp("1969-12-31T23:58:00Z")


def test_rollup_is_refused_where_it_does_not_apply_and_auto_falls_back(filled):
    store, df = filled
    with pytest.raises(InputError, match="not a multiple of 10 s"):
        store.trend("bpm", "x_m", bucket="15s", method="rollup")
    with pytest.raises(InputError, match="not on a 10-s boundary"):
        store.trend("bpm", "x_m", start="2026-11-30T23:50:05Z", method="rollup")
    with pytest.raises(InputError, match="method 'fast'"):
        store.trend("bpm", "x_m", method="fast")
    start = pd.Timestamp("2026-11-30T23:50:05Z")  # unaligned: auto reads the readings
    got = store.trend("bpm", "x_m", bucket="15s", start=start)
    pd.testing.assert_frame_equal(got, reference(df[df.timestamp >= start], ["x_m"], "15s"),
                                  check_dtype=False, rtol=1e-12, atol=0)


def test_rollup_table_matches_numpy_per_bucket():
    """The 10-s partial aggregates of one file, against numpy over each bucket's values."""
    import pyarrow as pa

    from diagnostics.store import rollup_table

    df = readings(400)
    df.loc[::7, "sum"] = np.nan
    table = pa.Table.from_pandas(df, preserve_index=False)
    table = table.set_column(4, "sum", pa.array(df["sum"], from_pandas=True))
    r = rollup_table(table, "bpm").to_pandas()
    key = (df.timestamp.astype("int64") // 10**10) * 10**10
    for (dev, b), g in df.groupby([df.bpm, key]):
        row = r[(r.bpm == dev) & (r.timestamp.astype("int64") == b)]
        assert len(row) == 1
        v = g["sum"].dropna().to_numpy()
        assert row["sum__n"].item() == v.size
        if v.size:
            assert row["sum__sum"].item() == pytest.approx(v.sum(), rel=1e-14)
            assert row["sum__sumsq"].item() == pytest.approx((v * v).sum(), rel=1e-14)
            assert (row["sum__min"].item(), row["sum__max"].item()) == (v.min(), v.max())
    assert r["x_m__n"].sum() == len(df)
