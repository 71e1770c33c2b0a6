"""Slow-channel reader: contract, ordering and unit rules, refusals (pandas as reference)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from diagnostics.errors import InputError
from diagnostics.measurements import SLOW_COLUMNS
from diagnostics.readers.slow import read_slow

HEADER = "timestamp,channel,value,unit\n"


def test_small_file_matches_pandas_reference(good):
    path = good / "slow_small.csv"
    ref = pd.read_csv(path)
    df = read_slow(path)
    assert list(df.columns) == list(SLOW_COLUMNS)
    assert str(df["timestamp"].dtype) == "datetime64[ns, UTC]"
    expected_times = pd.to_datetime(ref["timestamp"], format="ISO8601", utc=True).astype("datetime64[ns, UTC]")
    pd.testing.assert_series_equal(df["timestamp"], expected_times, check_names=False)
    assert df["channel"].tolist() == ref["channel"].tolist()
    np.testing.assert_array_equal(df["value"].to_numpy(), ref["value"].to_numpy())
    assert df["unit"].tolist() == ["degC", "A", "degC", "A"]


def test_extra_columns_kept_and_empty_unit_allowed(write):
    df = read_slow(write("s.csv", "timestamp,channel,value,unit,quality\n"
                                  "2026-11-30T06:00:00Z,GUN:status,1,,good\n"
                                  "2026-11-30T06:00:00Z,T-02,21.5,degC,bad\n"))
    assert df["unit"].tolist() == ["", "degC"]
    assert df["quality"].tolist() == ["good", "bad"]


def test_unsorted_channels_are_sorted_by_time(write):
    df = read_slow(write("s.csv", HEADER + "2026-11-30T06:01:00Z,T-01,1,K\n2026-11-30T06:02:00Z,T-01,2,K\n"
                                           "2026-11-30T06:00:00Z,T-02,3,K\n"))
    assert df["channel"].tolist() == ["T-02", "T-01", "T-01"]
    assert df["timestamp"].is_monotonic_increasing


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        ("", r"empty file"),
        ("timestamp,channel,value\n", r"missing column 'unit'"),
        ("timestamp,chanel,value,unit\n", r"missing column 'channel' \(did you mean 'chanel'\?\)"),
        (HEADER + "2026-11-30T06:00:00Z,T-01,warm,degC\n", r"line 2: column 'value' has 'warm'"),
        (HEADER + "2026-11-30T06:00:00Z,T-01,nan,degC\n", r"line 2: column 'value' has nan"),
        (HEADER + "2026-11-30T06:00:00Z,T-01,1,degC\n2026-11-30T06:00:00Z,T-01,2,degC\n",
         r"line 3: channel 'T-01' repeats the time of line 2"),
        (HEADER + "2026-11-30T06:00:01Z,T-01,1,degC\n2026-11-30T06:00:00Z,T-01,2,degC\n",
         r"line 3: channel 'T-01' time goes backwards"),
        (HEADER + "2026-11-30T06:00:00Z,T-01,1,degC\n2026-11-30T06:00:01Z,T-01,2,K\n",
         r"line 3: channel 'T-01' has unit 'K' but 'degC' in line 2"),
        (HEADER + "2026-11-30T06:00:00Z,,1,degC\n", r"line 2: column 'channel' is empty"),
        (HEADER + "2026-11-30T06:00:00Z,T-01,1\n", r"line 2: expected 4 fields, found 3"),
    ],
)
def test_slow_mistakes(write, text, pattern):
    with pytest.raises(InputError, match=pattern) as info:
        read_slow(write("s.csv", text))
    assert "\n" not in str(info.value)


def test_broken_slow_file_without_zone(broken):
    with pytest.raises(InputError, match=r"slow_nozone\.csv: line 3: column 'timestamp' time '2026-11-30 06:01:00' "
                                         r"has no time zone"):
        read_slow(broken / "slow_nozone.csv")


def test_parquet_slow(tmp_path, good):
    ref = read_slow(good / "slow_small.csv")
    ref.to_parquet(tmp_path / "s.parquet")
    pd.testing.assert_frame_equal(read_slow(tmp_path / "s.parquet"), ref)


def test_units_and_channels_are_trimmed(write):
    df = read_slow(write("s.csv", HEADER + "2026-11-30T06:00:00Z,T-01 ,1,degC \n2026-11-30T06:01:00Z,T-01,2,degC\n"))
    assert df["channel"].tolist() == ["T-01", "T-01"] and df["unit"].tolist() == ["degC", "degC"]


def test_semicolon_separated_file_gets_a_hint(write):
    with pytest.raises(InputError, match=r"missing column 'timestamp' \(fields must be separated by commas\)"):
        read_slow(write("s.csv", "timestamp;channel;value;unit\n2026-11-30T06:00:00Z;T-01;1;K\n"))
