"""BPM reader: table contract, units, times, ordering rules and every refusal.

The reference for values is pandas' own CSV parser and ``pandas.to_datetime``
(an independent implementation from the pyarrow parser the reader uses).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from diagnostics.errors import InputError
from diagnostics.measurements import BPM_COLUMNS
from diagnostics.readers import _util
from diagnostics.readers.bpm import read_bpm

HEADER = "timestamp,bpm,x_mm,y_mm\n"


def _reference(path) -> pd.DataFrame:
    ref = pd.read_csv(path, dtype={"bpm": str})
    ref["timestamp"] = pd.to_datetime(ref["timestamp"], format="ISO8601", utc=True).astype("datetime64[ns, UTC]")
    return ref


def test_small_file_matches_pandas_reference_and_contract(good):
    path = good / "bpm_small.csv"
    ref = _reference(path)
    df = read_bpm(path)
    assert list(df.columns) == [*BPM_COLUMNS, "status"]
    assert str(df["timestamp"].dtype) == "datetime64[ns, UTC]"
    assert pd.api.types.is_string_dtype(df["bpm"]) and not isinstance(df["bpm"].dtype, pd.CategoricalDtype)
    assert df["x_m"].dtype == np.float64 and df["y_m"].dtype == np.float64 and df["sum"].dtype == np.float64
    pd.testing.assert_series_equal(df["timestamp"], ref["timestamp"], check_names=False)
    assert df["bpm"].tolist() == ref["bpm"].tolist()
    # mm -> m is the exact IEEE product with 1e-3 (SI prefix milli)
    np.testing.assert_array_equal(df["x_m"].to_numpy(), ref["x_mm"].to_numpy() * 1e-3)
    np.testing.assert_array_equal(df["y_m"].to_numpy(), ref["y_mm"].to_numpy() * 1e-3)
    np.testing.assert_array_equal(df["sum"].to_numpy(), ref["sum"].to_numpy())
    assert df["status"].tolist() == ["ok"] * len(df)


@pytest.mark.parametrize(("unit", "factor"), [("m", 1.0), ("mm", 1e-3), ("um", 1e-6)])
def test_position_units(write, unit, factor):
    path = write("b.csv", f"timestamp,bpm,x_{unit},y_mm\n2026-11-30T06:00:00Z,BPM-01,2.5,4\n")
    df = read_bpm(path)
    assert df["x_m"].iloc[0] == 2.5 * factor
    assert df["y_m"].iloc[0] == 4 * 1e-3


def test_offsets_and_fractions_match_pandas_to_datetime(write):
    times = ["2026-11-30T06:00:00.123456789Z", "2026-11-30T11:30:00.5+05:30", "2026-11-30T01:00:01-05:00",
             "2026-11-30T06:00:02+0000"]
    path = write("b.csv", HEADER + "".join(f"{t},BPM-01,1,2\n" for t in times))
    expected = pd.to_datetime(pd.Series(times), format="ISO8601", utc=True).astype("datetime64[ns, UTC]")
    pd.testing.assert_series_equal(read_bpm(path)["timestamp"], expected, check_names=False)


def test_epoch_seconds_column(write):
    path = write("b.csv", HEADER + "1764482400,BPM-01,1,2\n1764482400.25,BPM-01,1,2\n")
    expected = pd.to_datetime(pd.Series([1764482400.0, 1764482400.25]), unit="s", utc=True).astype(
        "datetime64[ns, UTC]")
    pd.testing.assert_series_equal(read_bpm(path)["timestamp"], expected, check_names=False)


def test_missing_or_empty_sum_is_nan(write):
    df = read_bpm(write("a.csv", HEADER + "2026-11-30T06:00:00Z,BPM-01,1,2\n"))
    assert np.isnan(df["sum"].iloc[0])
    df = read_bpm(write("b.csv", "timestamp,bpm,x_mm,y_mm,sum\n2026-11-30T06:00:00Z,BPM-01,1,2,\n"
                                 "2026-11-30T06:00:01Z,BPM-01,1,2,NaN\n"))
    assert df["sum"].isna().all()


def test_file_written_bpm_after_bpm_is_accepted_and_sorted_by_time(write):
    rows = [("BPM-01", 0), ("BPM-01", 1), ("BPM-01", 2), ("BPM-02", 0), ("BPM-02", 1), ("BPM-02", 2)]
    path = write("b.csv", HEADER + "".join(f"2026-11-30T06:00:0{s}Z,{b},{s},0\n" for b, s in rows))
    df = read_bpm(path)
    assert df["timestamp"].is_monotonic_increasing
    assert df["bpm"].tolist() == ["BPM-01", "BPM-02"] * 3  # stable: file order within one time
    np.testing.assert_array_equal(df["x_m"], np.repeat([0.0, 1e-3, 2e-3], 2))


def test_many_blocks_give_the_same_table_as_one(write, monkeypatch):
    """Multi-threaded blocks (own dictionaries, own chunks) must not change the result."""
    names = [f"BPM-{i:02d}" for i in range(1, 8)]
    lines = [f"2026-11-30T06:{k // 60:02d}:{k % 60:02d}Z,{b},{k * 0.001:.3f},{-k * 0.002:.3f}\n"
             for k in range(400) for b in names[k % 3:]]
    path = write("b.csv", HEADER + "".join(lines))
    one = read_bpm(path)
    monkeypatch.setattr(_util, "BLOCK_SIZE", 1024)
    many = read_bpm(path)
    pd.testing.assert_frame_equal(one, many)
    ref = _reference(path)
    np.testing.assert_array_equal(many["x_m"].to_numpy(), ref["x_mm"].to_numpy() * 1e-3)


def test_many_blocks_still_name_the_right_line(write, monkeypatch):
    lines = [f"2026-11-30T06:00:{k:02d}Z,BPM-01,1,2\n" for k in range(50)]
    lines[37] = "2026-11-30T06:00:37Z,BPM-01,oops,2\n"
    monkeypatch.setattr(_util, "BLOCK_SIZE", 256)
    with pytest.raises(InputError, match=r"line 39: column 'x_mm' has 'oops'"):
        read_bpm(write("b.csv", HEADER + "".join(lines)))


@pytest.mark.parametrize(
    ("name", "pattern"),
    [
        ("bpm_nozone.csv", r"line 3: column 'timestamp' time '2026-11-30T06:00:00\.1' has no time zone"),
        ("bpm_backwards.csv", r"line 4: BPM 'BPM-01' time goes backwards from line 2"),
        ("bpm_duplicate.csv", r"line 4: BPM 'BPM-01' repeats the time of line 2"),
        ("bpm_truncated.csv", r"line 3: expected 4 fields, found 3 \(truncated"),
        ("bpm_text.csv", r"line 3: column 'x_mm' has 'n/a' \(expected a number\)"),
        ("bpm_misspelled.csv", r"missing column x_mm \(did you mean 'x_nm'\?\)"),
        ("bpm_inf.csv", r"line 3: column 'y_mm' has -inf \(expected a finite number\)"),
    ],
)
def test_broken_bpm_files(broken, name, pattern):
    with pytest.raises(InputError, match=pattern) as info:
        read_bpm(broken / name)
    assert "\n" not in str(info.value) and str(info.value).startswith(str(broken / name))


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        ("", r"empty file"),
        (HEADER, r"no data rows"),
        ("time,bpm,x_mm,y_mm\n", r"missing column 'timestamp' \(did you mean 'time'\?\)"),
        ("timestamp,x_mm,y_mm\n", r"missing column 'bpm'"),
        ("timestamp,bpm,x_inch,y_mm\n", r"missing column x_mm.*unknown unit in 'x_inch'"),
        ("timestamp,bpm,x_mm,x_m,y_mm\n", r"give the x position twice"),
        ("timestamp,bpm,x_mm,y_mm,y_m\n", r"give the y position twice"),
        (HEADER + "2026-11-30T06:00:00Z,,1,2\n", r"line 2: column 'bpm' is empty"),
        (HEADER + "2026-11-30T06:00:00Z,BPM-01,,2\n", r"line 2: column 'x_mm' is empty"),
        (HEADER + ",BPM-01,1,2\n", r"line 2: column 'timestamp' is empty"),
        (HEADER + "2026-11-30T06:00:00Z,BPM-01,1,2\n\n2026-11-30T06:00:01Z,BPM-01,1,nan\n",
         r"line 4: column 'y_mm' has nan"),
        (HEADER + "2026-11-30T06:00:00Z,BPM-01,1,2\nlast tuesday,BPM-01,1,2\n",
         r"line 3: column 'timestamp' has 'last tuesday' \(expected an ISO 8601 time"),
        (HEADER + "1764482400,BPM-01,1,2\n2026-11-30T06:00:00Z,BPM-01,1,2\n",
         r"line 3: column 'timestamp' has '2026-11-30T06:00:00Z' \(expected a number\)"),
        (HEADER + "1e12,BPM-01,1,2\n", r"line 2: column 'timestamp' has 1000000000000\.0 \(expected epoch seconds"),
        ("timestamp,bpm,x_mm,y_mm,sum\n2026-11-30T06:00:00Z,BPM-01,1,2,inf\n", r"line 2: column 'sum' has inf"),
    ],
)
def test_bpm_mistakes(write, text, pattern):
    with pytest.raises(InputError, match=pattern) as info:
        read_bpm(write("b.csv", text))
    assert "\n" not in str(info.value)


def test_parquet_round_trip_with_zoned_times(tmp_path, good):
    ref = read_bpm(good / "bpm_small.csv")
    src = ref.rename(columns={"x_m": "x_mm", "y_m": "y_mm"}).assign(
        x_mm=ref["x_m"] * 1e3, y_mm=ref["y_m"] * 1e3,
        timestamp=ref["timestamp"].dt.tz_convert("Asia/Tokyo"))
    path = tmp_path / "b.parquet"
    src.to_parquet(path)
    df = read_bpm(path)
    pd.testing.assert_series_equal(df["timestamp"], ref["timestamp"])
    np.testing.assert_allclose(df["x_m"], ref["x_m"], rtol=1e-15, atol=0)
    assert df["bpm"].tolist() == ref["bpm"].tolist()


def test_parquet_with_iso_text_and_epoch_numbers(tmp_path):
    text = pa.table({"timestamp": ["2026-11-30T07:00:00+01:00"], "bpm": ["BPM-01"], "x_m": [1e-4], "y_m": [2e-4]})
    pq.write_table(text, tmp_path / "a.parquet")
    assert read_bpm(tmp_path / "a.parquet")["timestamp"].iloc[0] == pd.Timestamp("2026-11-30T06:00:00Z")
    numbers = pa.table({"timestamp": [1764482400], "bpm": ["BPM-01"], "x_m": [1e-4], "y_m": [2e-4]})
    pq.write_table(numbers, tmp_path / "b.parquet")
    assert read_bpm(tmp_path / "b.parquet")["timestamp"].iloc[0] == pd.Timestamp(1764482400, unit="s", tz="UTC")


def test_parquet_without_zone_or_with_text_positions_is_refused(tmp_path):
    naive = pd.DataFrame({"timestamp": [pd.Timestamp("2026-11-30T06:00:00")], "bpm": ["B"], "x_mm": [1.0],
                          "y_mm": [1.0]})
    naive.to_parquet(tmp_path / "a.parquet")
    with pytest.raises(InputError, match=r"column 'timestamp' holds times without a time zone"):
        read_bpm(tmp_path / "a.parquet")
    text = pa.table({"timestamp": ["2026-11-30T06:00:00Z", "2026-11-30T06:00:01Z"], "bpm": ["B", "B"],
                     "x_mm": ["1.0", "bad"], "y_mm": [1.0, 2.0]})
    pq.write_table(text, tmp_path / "b.parquet")
    with pytest.raises(InputError, match=r"row 2: column 'x_mm' has 'bad'"):
        read_bpm(tmp_path / "b.parquet")


def test_not_parquet_bytes_with_parquet_suffix(write):
    with pytest.raises(InputError, match=r"cannot read Parquet"):
        read_bpm(write("b.parquet", b"PAR1 not really"))


def test_names_are_trimmed_so_padded_duplicates_are_caught(write):
    df = read_bpm(write("a.csv", HEADER + "2026-11-30T06:00:00Z, BPM-01 ,1,2\n2026-11-30T06:00:01Z,BPM-01,1,2\n"))
    assert df["bpm"].tolist() == ["BPM-01", "BPM-01"]
    with pytest.raises(InputError, match=r"line 3: BPM 'BPM-01' repeats the time of line 2"):
        read_bpm(write("b.csv", HEADER + "2026-11-30T06:00:00Z,BPM-01 ,1,2\n2026-11-30T06:00:00Z,BPM-01,1,2\n"))


def test_extra_column_changing_type_between_blocks_is_kept_as_text(write, monkeypatch):
    """Type inference per block fails; the slow path keeps the column as text and empty sums as NaN."""
    lines = [f"2026-11-30T06:00:{k:02d}Z,BPM-01,1,2,,{k}\n" for k in range(40)]
    lines[-1] = "2026-11-30T06:00:39Z,BPM-01,1,2,,late\n"
    monkeypatch.setattr(_util, "BLOCK_SIZE", 256)
    df = read_bpm(write("b.csv", "timestamp,bpm,x_mm,y_mm,sum,tag\n" + "".join(lines)))
    assert df["tag"].tolist()[-2:] == ["38", "late"]
    assert df["sum"].isna().all() and len(df) == 40


@settings(max_examples=80, deadline=None)
@given(rows=st.lists(st.tuples(st.integers(0, 6), st.sampled_from(["BPM-01", "BPM-02", "BPM-03"])),
                     min_size=1, max_size=15))
def test_order_rules_match_a_pandas_groupby_reference(tmp_path_factory, rows):
    """Accepted iff every BPM's times strictly increase in file order (pandas groupby as reference);
    an accepted file comes back as pandas' stable sort by time."""
    path = tmp_path_factory.mktemp("order") / "b.csv"
    path.write_text(HEADER + "".join(f"2026-11-30T06:00:{t:02d}Z,{b},{i},0\n" for i, (t, b) in enumerate(rows)))
    ref = pd.DataFrame(rows, columns=["t", "bpm"])
    valid = bool(ref.groupby("bpm")["t"].apply(lambda s: bool((s.diff().dropna() > 0).all())).all())
    if not valid:
        with pytest.raises(InputError, match=r"(repeats the time of|time goes backwards from) line \d+"):
            read_bpm(path)
        return
    df = read_bpm(path)
    expected = ref.sort_values("t", kind="stable").reset_index(drop=True)
    assert df["bpm"].tolist() == expected["bpm"].tolist()
    file_rows = np.argsort([t for t, _ in rows], kind="stable")  # x_mm holds the file row number
    np.testing.assert_array_equal(df["x_m"].to_numpy(), file_rows * 1e-3)


def test_empty_time_in_an_epoch_column_is_named_empty(write):
    with pytest.raises(InputError, match=r"line 3: column 'timestamp' is empty"):
        read_bpm(write("b.csv", HEADER + "1764482400,BPM-01,1,2\n,BPM-01,1,2\n"))


@pytest.mark.parametrize(
    ("text", "iso"),
    [("2026-11-30 06:00:00Z", "2026-11-30T06:00:00Z"), ("2026-11-30T06:00:00+05", "2026-11-30T01:00:00Z"),
     ("2026-11-30T06:00:00.5-0130", "2026-11-30T07:30:00.5Z")],
)
def test_accepted_time_spellings(write, text, iso):
    """Documented spellings; the expected instants are plain offset arithmetic."""
    df = read_bpm(write("b.csv", HEADER + f"{text},BPM-01,1,2\n"))
    assert df["timestamp"].iloc[0] == pd.Timestamp(iso)


@pytest.mark.parametrize("text", ["20261130T060000Z", "2026-W48-1T06:00:00Z", "2026-11-30T06:00:00,5Z"])
def test_refused_time_spellings(write, text):
    with pytest.raises(InputError, match=r"line 2: column 'timestamp' has .* \(expected an ISO 8601 time with zone"):
        read_bpm(write("b.csv", HEADER + f'"{text}",BPM-01,1,2\n'))  # quoted: one has a comma


def test_file_vanishing_during_the_read_is_an_input_error(write, monkeypatch):
    """A file removed between the fast read and the diagnosis (e.g. by a cleaner) is reported, not leaked."""
    path = write("b.csv", HEADER + "2026-11-30T06:00:00Z,BPM-01,bad,2\n")
    real = _util._diagnose_csv

    def vanish(p, *args):
        p.unlink()
        return real(p, *args)

    monkeypatch.setattr(_util, "_diagnose_csv", vanish)
    with pytest.raises(InputError, match=r"cannot read file"):
        read_bpm(path)
