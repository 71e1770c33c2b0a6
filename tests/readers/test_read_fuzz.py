"""Property tests: whatever comes in, a reader returns valid data or raises InputError.

No pandas, pyarrow, Pillow, tifffile or json exception may leak out of a reader.
Inputs are random bytes, random mutations of the valid samples, and random
tables and JSON built from the formats' own vocabulary (to reach deep checks).
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from diagnostics.errors import InputError
from diagnostics.measurements import Frame, Profile, ScanSpec
from diagnostics.readers import detect_kind, read_any
from diagnostics.readers.bpm import read_bpm
from diagnostics.readers.scan import read_scan
from diagnostics.readers.screen import read_frame
from diagnostics.readers.slow import read_slow
from diagnostics.readers.wire import read_profile

GOOD = Path(__file__).resolve().parent.parent / "data" / "readers" / "good"
#: Examples per property; raise it for a deeper search (``BEAMDIAG_FUZZ_EXAMPLES=5000``).
EXAMPLES = int(os.environ.get("BEAMDIAG_FUZZ_EXAMPLES", "120"))
SETTINGS = settings(max_examples=EXAMPLES, deadline=None, suppress_health_check=[HealthCheck.too_slow])
SIDECAR = {"device": "SCR-01", "timestamp": "2026-11-30T10:00:00Z", "pixel_size_m": 2e-5}


@pytest.fixture(scope="module")
def work(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("fuzz")


def _check_profile(p: Profile) -> None:
    assert p.position_m.ndim == 1 and p.position_m.size == p.signal.size >= 1
    assert np.all(np.isfinite(p.position_m)) and np.all(np.isfinite(p.signal))
    assert np.all(np.diff(p.position_m) > 0)
    assert p.plane in ("x", "y", "u") and math.isfinite(p.wire_angle_rad)
    assert str(p.timestamp.tz) == "UTC"


def _check_table(df: pd.DataFrame, name_column: str, values: tuple[str, ...]) -> None:
    assert str(df["timestamp"].dtype) == "datetime64[ns, UTC]"
    assert pd.api.types.is_string_dtype(df[name_column])
    for column in values:
        assert df[column].dtype == np.float64 and np.isfinite(df[column].to_numpy()).all()
    assert df["timestamp"].is_monotonic_increasing
    assert not df.duplicated(["timestamp", name_column]).any()


def _check_frame(f: Frame) -> None:
    assert f.pixels.ndim == 2 and f.pixels.size > 0 and f.pixels.dtype.isnative
    assert all(s > 0 and math.isfinite(s) for s in f.pixel_size_m)


def _outcome(reader, path, check):
    """Run ``reader(path)``: valid data passes ``check``; the only allowed failure is InputError."""
    try:
        data = reader(path)
    except InputError as exc:
        message = str(exc)
        assert message.startswith(str(path)) or message.startswith(str(path.parent)), message
        assert "\n" not in message
        return None
    check(data)
    return data


@SETTINGS
@given(content=st.binary(max_size=400))
def test_random_bytes_as_csv(work, content):
    path = work / "random.csv"
    path.write_bytes(content)
    _outcome(read_profile, path, _check_profile)
    _outcome(read_bpm, path, lambda df: _check_table(df, "bpm", ("x_m", "y_m")))
    _outcome(read_slow, path, lambda df: _check_table(df, "channel", ("value",)))
    assert detect_kind(path) in (None, "profiles", "bpm", "slow")


_CELLS = st.sampled_from(["1", "-2.5", "0", "1e-3", "nan", "inf", "", " ", "abc", "\"q\"", "2026-11-30T06:00:00Z",
                          "2026-11-30T06:00:01+01:00", "2026-11-30T06:00:00", "1764482400", "BPM-01", "T-01",
                          "x", "u", "degC", "1,2", "\"a,b\""])
_NAMES = st.sampled_from(["timestamp", "bpm", "x_mm", "y_mm", "x_m", "y_um", "sum", "channel", "value", "unit",
                          "position", "signal", "extra", "Position", ""])
_HEADER_LINES = st.lists(st.sampled_from([
    "# plane: x", "# plane: u", "# plane: q", "# wire_angle_deg: 30", "# wire_angle_deg: nan",
    "# timestamp: 2026-11-30T08:15:00Z", "# timestamp: 1764490500", "# timestamp: 2026-11-30",
    "# position_unit: um", "# position_unit: km", "# device: WS-02", "# note", "#", "# : x"]), max_size=6)


@st.composite
def tables(draw):
    names = draw(st.lists(_NAMES, min_size=1, max_size=6))
    rows = draw(st.lists(st.lists(_CELLS, min_size=0, max_size=len(names) + 1), max_size=12))
    head = draw(_HEADER_LINES)
    lines = [*head, ",".join(names), *(",".join(r) for r in rows)]
    return "\n".join(lines) + draw(st.sampled_from(["", "\n", "\n\n"]))


@SETTINGS
@given(text=tables())
def test_random_tables_from_the_vocabulary(work, text):
    path = work / "table.csv"
    path.write_text(text, encoding="utf-8")
    _outcome(read_profile, path, _check_profile)
    _outcome(read_bpm, path, lambda df: _check_table(df, "bpm", ("x_m", "y_m")))
    _outcome(read_slow, path, lambda df: _check_table(df, "channel", ("value",)))


def _mutate(data: bytes, edits) -> bytes:
    buf = bytearray(data)
    for kind, where, byte in edits:
        if not buf:
            break
        i = where % len(buf)
        if kind == 0:
            buf[i] = byte
        elif kind == 1:
            del buf[i:]
        elif kind == 2:
            buf.insert(i, byte)
        else:
            del buf[i]
    return bytes(buf)


_EDITS = st.lists(st.tuples(st.integers(0, 3), st.integers(0, 1 << 30), st.integers(0, 255)), min_size=1, max_size=4)


@SETTINGS
@given(edits=_EDITS, name=st.sampled_from(["profile_x.csv", "WS-01_u.csv", "bpm_small.csv", "slow_small.csv"]))
def test_mutated_sample_tables(work, edits, name):
    path = work / name
    path.write_bytes(_mutate((GOOD / name).read_bytes(), edits))
    reader, check = {
        "profile_x.csv": (read_profile, _check_profile),
        "WS-01_u.csv": (read_profile, _check_profile),
        "bpm_small.csv": (read_bpm, lambda df: _check_table(df, "bpm", ("x_m", "y_m"))),
        "slow_small.csv": (read_slow, lambda df: _check_table(df, "channel", ("value",))),
    }[name]
    _outcome(reader, path, check)


@SETTINGS
@given(edits=_EDITS, name=st.sampled_from(["SCR-02_101500.png", "SCR-03_bigendian.tif", "SCR-03_float.npy",
                                           "SCR-01_8bit.png"]))
def test_mutated_sample_images(work, edits, name):
    path = work / name
    path.write_bytes(_mutate((GOOD / name).read_bytes(), edits))
    path.with_suffix(".json").write_text(json.dumps(SIDECAR))
    _outcome(read_frame, path, _check_frame)


@SETTINGS
@given(content=st.binary(max_size=300), suffix=st.sampled_from([".png", ".tif", ".npy"]),
       magic=st.sampled_from([b"", b"\x89PNG\r\n\x1a\n", b"II*\x00", b"MM\x00*", b"\x93NUMPY\x01\x00"]))
def test_random_bytes_as_image(work, content, suffix, magic):
    path = work / f"random{suffix}"
    path.write_bytes(magic + content)
    path.with_suffix(".json").write_text(json.dumps(SIDECAR))
    _outcome(read_frame, path, _check_frame)
    _outcome(lambda p: read_any(p)[1], path, _check_frame)


_JSON = st.recursive(
    st.none() | st.booleans() | st.integers(-3, 10) | st.floats(allow_nan=False, width=32)
    | st.sampled_from(["", "x", "dark.png", "../x", "/etc/passwd", "2026-11-30T10:00:00Z", "electron", "step00_x.csv"]),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.sampled_from(
        ["name", "timestamp", "pixel_size_m", "bit_depth", "roi", "dark", "device", "drift_m", "length_m",
         "beta_m", "alpha", "k1_per_m2", "x", "image", "sigma_x_m", "mass_u", "charge", "resolution_m"]),
        inner, max_size=5),
    max_leaves=12,
)


@SETTINGS
@given(meta=st.dictionaries(st.sampled_from(["device", "timestamp", "pixel_size_m", "bit_depth", "roi", "dark",
                                             "note"]), _JSON, max_size=6))
def test_random_sidecars(work, meta):
    path = work / "side.png"
    if not path.exists():
        path.write_bytes((GOOD / "SCR-02_101500.png").read_bytes())
        (work / "dark.png").write_bytes((GOOD / "dark_SCR-02.png").read_bytes())
    path.with_suffix(".json").write_text(json.dumps(meta))
    _outcome(read_frame, path, _check_frame)


@SETTINGS
@given(content=st.binary(max_size=200))
def test_random_bytes_as_sidecar(work, content):
    path = work / "sideb.png"
    if not path.exists():
        path.write_bytes((GOOD / "SCR-01_8bit.png").read_bytes())
    path.with_suffix(".json").write_bytes(content)
    _outcome(read_frame, path, _check_frame)


_SCAN_BASE = {"name": "s", "timestamp": "2026-11-30T08:15:00Z", "particle": "electron", "kinetic_energy_MeV": 150.0,
              "quadrupole": {"name": "Q", "length_m": 0.2}, "transport": {"drift_m": 4.0},
              "monitor": {"name": "WS", "resolution_m": 0.0},
              "steps": [{"k1_per_m2": 1.0, "sigma_x_m": 1e-4}]}


@SETTINGS
@given(changes=st.dictionaries(st.sampled_from([*_SCAN_BASE, "solenoid", "monitors", "design", "expected_steps",
                                                "energy_spread"]), _JSON, max_size=4),
       drop=st.sets(st.sampled_from(list(_SCAN_BASE)), max_size=2))
def test_random_scan_manifests(work, changes, drop):
    folder = work / "scan"
    folder.mkdir(exist_ok=True)
    if not (folder / "step00_x.csv").exists():
        (folder / "step00_x.csv").write_bytes((GOOD / "profile_x.csv").read_bytes())
    doc = {k: v for k, v in _SCAN_BASE.items() if k not in drop}
    doc.update(changes)
    (folder / "scan.json").write_text(json.dumps(doc))

    def check(spec: ScanSpec) -> None:
        assert spec.kinetic_energy_MeV > 0 and spec.kind in ("quadrupole", "solenoid", "multi_monitor")
        assert all(m.resolution_m >= 0 for m in spec.monitors)

    _outcome(read_scan, folder, check)


@SETTINGS
@given(content=st.binary(max_size=300))
def test_random_bytes_as_scan_manifest(work, content):
    folder = work / "scanb"
    folder.mkdir(exist_ok=True)
    (folder / "scan.json").write_bytes(content)
    _outcome(read_scan, folder, lambda spec: None)
    assert detect_kind(folder) == "scans"


@SETTINGS
@given(content=st.binary(max_size=300))
def test_random_bytes_as_parquet(work, content):
    path = work / "random.parquet"
    path.write_bytes(b"PAR1" + content + b"PAR1")
    _outcome(read_bpm, path, lambda df: _check_table(df, "bpm", ("x_m", "y_m")))
    _outcome(read_profile, path, _check_profile)
    assert detect_kind(path) in (None, "profiles", "bpm", "slow")
