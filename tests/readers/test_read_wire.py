"""Wire-scanner profile reader: CSV and Parquet, SI conversion and every refusal."""

from __future__ import annotations

import csv
import math
from datetime import UTC, datetime

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from diagnostics.errors import InputError
from diagnostics.readers import wire
from diagnostics.readers.wire import read_profile

HEAD = "# plane: x\n# timestamp: 2026-11-30T08:15:00Z\n"


def _reference_columns(path, skip):
    """The file's numbers parsed by the standard library's csv module (independent parser)."""
    with open(path, newline="") as fh:
        rows = list(csv.reader(fh))[skip:]
    header, body = rows[0], rows[1:]
    return {name: [float(r[i]) for r in body] for i, name in enumerate(header)}


def test_profile_x_matches_stdlib_csv_parse_in_si(good):
    """Positions in mm become metres (x 1e-3, exact IEEE product), as the stdlib csv parse gives."""
    path = good / "profile_x.csv"
    ref = _reference_columns(path, skip=5)
    profile = read_profile(path)
    np.testing.assert_array_equal(profile.position_m, np.array(ref["position"]) * 1e-3)
    np.testing.assert_array_equal(profile.signal, np.array(ref["signal"]))
    assert profile.position_m.dtype == np.float64 and profile.signal.dtype == np.float64
    assert profile.device == "WS-02" and profile.plane == "x" and profile.wire_angle_rad == 0.0
    # 08:15 at +01:00 is 07:15 UTC (ISO 8601 offset arithmetic, exact)
    assert profile.timestamp == pd.Timestamp("2026-11-30T07:15:00Z")
    assert str(profile.timestamp.tz) == "UTC"
    assert profile.metadata == {"operator_note": "after Q-05 trim"}
    assert profile.source == str(path)


def test_tilted_wire_in_um_descending_is_reversed_and_named_from_stem(good):
    """A u-plane scan in µm recorded downwards: reversed to increase, 45 deg -> pi/4 rad."""
    path = good / "WS-01_u.csv"
    ref = _reference_columns(path, skip=4)
    profile = read_profile(path)
    np.testing.assert_array_equal(profile.position_m, (np.array(ref["position"]) * 1e-6)[::-1])
    np.testing.assert_array_equal(profile.signal, np.array(ref["signal"])[::-1])
    assert np.all(np.diff(profile.position_m) > 0)
    assert profile.plane == "u"
    assert profile.wire_angle_rad == pytest.approx(math.pi / 4, rel=1e-15)
    assert profile.device == "WS-01"  # stem up to the first underscore
    # epoch seconds, checked against the standard library's conversion
    assert profile.timestamp == pd.Timestamp(datetime.fromtimestamp(1764490500, tz=UTC))


@pytest.mark.parametrize(
    ("unit", "factor"), [("m", 1.0), ("mm", 1e-3), ("um", 1e-6), ("µm", 1e-6), ("μm", 1e-6)]
)
def test_position_units_scale_to_metres(write, unit, factor):
    """SI prefixes (BIPM SI brochure): milli = 1e-3, micro = 1e-6."""
    path = write("p.csv", f"{HEAD}# position_unit: {unit}\nposition,signal\n1,0\n2,1\n4,0\n")
    np.testing.assert_array_equal(read_profile(path).position_m, np.array([1.0, 2.0, 4.0]) * factor)


def test_default_unit_is_mm_and_y_plane_angle_is_pi_over_2(write):
    path = write("WS-09.csv", "# plane: Y\n# timestamp: 2026-11-30T08:15:00-05:00\nposition,signal\n1,0\n2,1\n")
    profile = read_profile(path)
    np.testing.assert_array_equal(profile.position_m, [1e-3, 2e-3])
    assert profile.plane == "y" and profile.wire_angle_rad == math.pi / 2
    assert profile.device == "WS-09"
    assert profile.timestamp == pd.Timestamp("2026-11-30T13:15:00Z")


def test_crlf_bom_blanks_and_spaces_are_tolerated(write):
    text = "\ufeff# plane: x\r\n# timestamp: 2026-11-30T08:15:00Z\r\n\r\nposition , signal\r\n 1.0 , 2\r\n2.0,3\r\n"
    profile = read_profile(write("p.csv", text))
    np.testing.assert_array_equal(profile.position_m, [1e-3, 2e-3])
    np.testing.assert_array_equal(profile.signal, [2.0, 3.0])


def test_parquet_profile_with_key_value_metadata(tmp_path, good):
    """The same profile as Parquet (key-value metadata) reads back identical to the CSV."""
    csv_profile = read_profile(good / "profile_x.csv")
    table = pa.table({"position": csv_profile.position_m * 1e3, "signal": csv_profile.signal})
    table = table.replace_schema_metadata({"device": "WS-02", "plane": "x", "timestamp": "2026-11-30T07:15:00Z",
                                           "position_unit": "mm", "operator_note": "after Q-05 trim"})
    path = tmp_path / "p.parquet"
    pq.write_table(table, path)
    profile = read_profile(path)
    np.testing.assert_allclose(profile.position_m, csv_profile.position_m, rtol=1e-15)
    np.testing.assert_array_equal(profile.signal, csv_profile.signal)
    assert (profile.device, profile.plane, profile.timestamp) == (csv_profile.device, "x", csv_profile.timestamp)
    assert profile.metadata == {"operator_note": "after Q-05 trim"}


def test_parquet_profile_with_constant_columns(tmp_path):
    df = pd.DataFrame({"position": [0.001, 0.002, 0.003], "signal": [0.0, 1.0, 0.0], "device": "WS-01",
                       "plane": "y", "timestamp": pd.Timestamp("2026-11-30T08:15:00", tz="Europe/Paris")})
    path = tmp_path / "p.parquet"
    df.to_parquet(path)
    profile = read_profile(path)
    assert (profile.device, profile.plane) == ("WS-01", "y")
    assert profile.timestamp == pd.Timestamp("2026-11-30T07:15:00Z")
    np.testing.assert_array_equal(profile.position_m, [1e-6, 2e-6, 3e-6])


def test_parquet_profile_with_two_planes_is_refused(tmp_path):
    df = pd.DataFrame({"position": [1.0, 2.0], "signal": [0.0, 1.0], "plane": ["x", "y"],
                       "timestamp": "2026-11-30T08:15:00Z"})
    path = tmp_path / "p.parquet"
    df.to_parquet(path)
    with pytest.raises(InputError, match=r"column 'plane' must hold one value"):
        read_profile(path)


@pytest.mark.parametrize(
    ("name", "pattern"),
    [
        ("profile_empty.csv", r"profile_empty\.csv: empty file \(expected a wire-scanner profile"),
        ("profile_truncated.csv", r"profile_truncated\.csv: line 6: expected 2 fields, found 1"),
        ("profile_missing_column.csv", r"missing column 'signal' \(did you mean 'singal'\?\)"),
        ("profile_text.csv", r"line 5: column 'signal' has 'high' \(expected a number\)"),
        ("profile_nan.csv", r"line 5: column 'signal' has nan \(expected a finite number\)"),
        ("profile_nonmonotonic.csv", r"line 6: position turns back \(expected strictly monotonic"),
        ("profile_duplicate.csv", r"line 6: position repeats the previous row"),
        ("profile_unit.csv", r"header 'position_unit': unknown unit 'inch' \(expected m, mm or um\)"),
        ("profile_nozone.csv", r"header 'timestamp': '2026-11-30T08:15:00' has no time zone"),
    ],
)
def test_broken_profile_files_name_file_line_and_expectation(broken, name, pattern):
    with pytest.raises(InputError, match=pattern) as info:
        read_profile(broken / name)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith(str(broken / name))


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        ("# plan: x\n# timestamp: 2026-11-30T08:15:00Z\nposition,signal\n1,2\n",
         r"header 'plan' is not a known key \(did you mean 'plane'\?\)"),
        ("# timestamp: 2026-11-30T08:15:00Z\n# positon_unit: um\nposition,signal\n1,2\n",
         r"header 'positon_unit' is not a known key \(did you mean 'position_unit'\?\)"),
        ("# plane: z\n# timestamp: 2026-11-30T08:15:00Z\nposition,signal\n1,2\n", r"'z' is not one of x, y, u"),
        ("# plane: u\n# timestamp: 2026-11-30T08:15:00Z\nposition,signal\n1,2\n",
         r"'wire_angle_deg' missing \(required for plane u"),
        ("# plane: x\n# wire_angle_deg: 30\n# timestamp: 2026-11-30T08:15:00Z\nposition,signal\n1,2\n",
         r"30 contradicts plane x"),
        ("# plane: u\n# wire_angle_deg: steep\n# timestamp: 2026-11-30T08:15:00Z\nposition,signal\n1,2\n",
         r"'steep' is not a number"),
        ("# plane: x\n# timestamp: yesterday\nposition,signal\n1,2\n", r"'yesterday' is not an ISO 8601 time"),
        ("# plane: x\n# timestamp: 20261130T081500Z\nposition,signal\n1,2\n",
         r"'20261130T081500Z' is not an ISO 8601 time"),  # the compact form, refused as in tables
        ("# plane: x\n# plane: y\n# timestamp: 2026-11-30T08:15:00Z\nposition,signal\n1,2\n",
         r"line 2: header key 'plane' given twice"),
        (HEAD + "position,signal\n", r"no data rows"),
        (HEAD + "position,signal\n1,2\n2,\n", r"line 5: column 'signal' is empty"),
        (HEAD + "position,signal\n1,2\n2,inf\n", r"line 5: column 'signal' has inf"),
        (HEAD + "position,position\n1,2\n", r"line 3: column 'position' appears twice"),
        (HEAD + "position,signal\n1,2\n\n\n3,4,5\n", r"line 7: expected 2 fields, found 3"),
    ],
)
def test_header_and_body_mistakes_are_one_line_input_errors(write, text, pattern):
    path = write("p.csv", text)
    with pytest.raises(InputError, match=pattern) as info:
        read_profile(path)
    assert "\n" not in str(info.value)


def test_unknown_suffix_and_missing_file(write, tmp_path):
    with pytest.raises(InputError, match=r"unknown file type '\.dat'"):
        read_profile(write("p.dat", HEAD + "position,signal\n1,2\n"))
    with pytest.raises(InputError, match="file not found"):
        read_profile(tmp_path / "nope.csv")
    with pytest.raises(InputError, match="not a regular file"):
        read_profile(tmp_path)


def test_not_utf8_is_refused(write):
    with pytest.raises(InputError, match=r"line 1: not UTF-8 text"):
        read_profile(write("p.csv", b"# plane: \xff\xfe\n"))


def test_single_point_profile_is_returned_for_analysis_to_flag(write):
    profile = read_profile(write("p.csv", HEAD + "position,signal\n1,2\n"))
    assert profile.position_m.shape == (1,)


def test_device_from_name_rule():
    from pathlib import Path

    assert wire.device_from_name(Path("WS-02_0815.csv")) == "WS-02"
    assert wire.device_from_name(Path("WS-02.csv")) == "WS-02"
    assert wire.device_from_name(Path("_x.csv")) == "_x"
