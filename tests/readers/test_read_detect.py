"""Telling inputs apart: detect_kind, is_auxiliary, iter_inputs and read_any."""

from __future__ import annotations

import json
import shutil

import numpy as np
import pandas as pd
import pytest

from diagnostics.errors import InputError
from diagnostics.measurements import Frame, Profile, ScanSpec
from diagnostics.readers import KINDS, detect_kind, is_auxiliary, iter_inputs, read_any


@pytest.mark.parametrize(
    ("name", "kind"),
    [
        ("profile_x.csv", "profiles"),
        ("WS-01_u.csv", "profiles"),
        ("bpm_small.csv", "bpm"),
        ("slow_small.csv", "slow"),
        ("SCR-02_101500.png", "frames"),
        ("SCR-03_bigendian.tif", "frames"),
        ("SCR-03_float.npy", "frames"),
        ("SCR-02_101500.json", None),
    ],
)
def test_detect_kind_of_samples(good, name, kind):
    assert detect_kind(good / name) == kind


def test_detect_kind_of_folders_tables_and_junk(scans, tmp_path, write):
    assert detect_kind(scans / "quad_q05") == "scans"
    assert detect_kind(tmp_path) is None
    assert detect_kind(tmp_path / "missing.csv") is None
    assert detect_kind(write("p.csv", "position,signal\n1,2\n")) == "profiles"
    assert detect_kind(write("e.csv", "")) is None
    assert detect_kind(write("x.csv", "a,b\n1,2\n")) is None
    assert detect_kind(write("bin.csv", b"\xff\xfe\x00garbage")) is None
    assert detect_kind(write("notes.txt", "BPM,x\n")) == "bpm"
    assert detect_kind(write("weird.xyz", "position,signal\n")) is None
    pd.DataFrame({"timestamp": [pd.Timestamp("2026-11-30", tz="UTC")], "channel": ["T-01"], "value": [1.0],
                  "unit": ["K"]}).to_parquet(tmp_path / "s.parquet")
    assert detect_kind(tmp_path / "s.parquet") == "slow"
    assert detect_kind(write("bad.parquet", b"not parquet")) is None


def test_is_auxiliary(good, scans, broken):
    assert is_auxiliary(good / "SCR-02_101500.json")  # sidecar of an image
    assert is_auxiliary(good / "dark_SCR-02.png")  # named as dark by that sidecar
    assert not is_auxiliary(good / "SCR-02_101500.png")
    assert not is_auxiliary(good / "bpm_small.csv")
    assert is_auxiliary(scans / "quad_q05" / "step00_x.csv")  # inside a scan folder
    assert is_auxiliary(scans / "quad_q05" / "scan.json")
    assert not is_auxiliary(scans / "quad_q05")
    assert not is_auxiliary(broken / "no_sidecar.png")  # an input, whose reading fails


def test_iter_inputs_yields_real_inputs_only(tmp_path, good, scans):
    inbox = tmp_path / "inbox"
    shutil.copytree(good, inbox)
    shutil.copytree(scans / "quad_q05", inbox / "nested" / "q05")
    (inbox / ".partial.csv").write_text("x")
    (inbox / "upload.csv.part").write_text("x")
    (inbox / "~lock.csv").write_text("x")
    (inbox / "README.md").write_text("notes")
    (inbox / "orphan.json").write_text("{}")
    found = [p.relative_to(inbox).as_posix() for p in iter_inputs([inbox])]
    assert found == [
        "SCR-01_8bit.png",
        "SCR-02_101500.png",
        "SCR-03_bigendian.tif",
        "SCR-03_float.npy",
        "WS-01_u.csv",
        "bpm_small.csv",
        "nested/q05",
        "profile_x.csv",
        "slow_small.csv",
    ]
    # named directly: a scan folder and a file pass, a sidecar does not
    assert list(iter_inputs([scans / "quad_q05", good / "bpm_small.csv", good / "SCR-02_101500.json"])) == [
        scans / "quad_q05", good / "bpm_small.csv"]


def test_read_any_returns_kind_and_data(good, scans):
    kinds = {}
    for path in [*iter_inputs([good]), scans / "solenoid_s01"]:
        kind, data = read_any(path)
        kinds[path.name] = kind
        expected = {"profiles": Profile, "frames": Frame, "scans": ScanSpec, "bpm": pd.DataFrame,
                    "slow": pd.DataFrame}[kind]
        assert isinstance(data, expected)
    assert set(kinds.values()) == set(KINDS)


def test_read_any_refusals(tmp_path, write):
    with pytest.raises(InputError, match=r"cannot tell the kind of table"):
        read_any(write("t.csv", "a,b\n1,2\n"))
    with pytest.raises(InputError, match=r"t2\.csv: empty file"):
        read_any(write("t2.csv", ""))
    with pytest.raises(InputError, match=r"folder without scan\.json"):
        read_any(tmp_path)
    with pytest.raises(InputError, match=r"file not found"):
        read_any(tmp_path / "nothing.csv")
    with pytest.raises(InputError, match=r"unknown kind of file"):
        read_any(write("t.json", json.dumps({"a": 1})))
    with pytest.raises(InputError, match=r"not a PNG file"):
        path = write("fake.png", "hello")
        path.with_suffix(".json").write_text("{}")
        read_any(path)


def test_dark_frame_named_twice_is_skipped_once(tmp_path):
    from PIL import Image

    Image.fromarray(np.zeros((2, 2), np.uint8)).save(tmp_path / "dark.png")
    for name in ("a", "b"):
        Image.fromarray(np.ones((2, 2), np.uint8)).save(tmp_path / f"{name}.png")
        (tmp_path / f"{name}.json").write_text(json.dumps(
            {"device": "S", "timestamp": "2026-11-30T00:00:00Z", "pixel_size_m": 1e-5, "dark": "dark.png"}))
    assert [p.name for p in iter_inputs([tmp_path])] == ["a.png", "b.png"]


def test_dark_frame_in_a_subfolder_is_auxiliary(tmp_path):
    from PIL import Image

    (tmp_path / "darks").mkdir()
    Image.fromarray(np.zeros((2, 2), np.uint8)).save(tmp_path / "darks" / "SCR-01_dark.png")
    Image.fromarray(np.ones((2, 2), np.uint8)).save(tmp_path / "a.png")
    (tmp_path / "a.json").write_text(json.dumps(
        {"device": "S", "timestamp": "2026-11-30T00:00:00Z", "pixel_size_m": 1e-5, "dark": "darks/SCR-01_dark.png"}))
    assert is_auxiliary(tmp_path / "darks" / "SCR-01_dark.png")
    assert [p.name for p in iter_inputs([tmp_path])] == ["a.png"]
    assert read_any(tmp_path / "a.png")[1].dark is not None


def test_parquet_profile_is_detected_by_its_metadata(tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.table({"x": [1.0, 2.0], "y": [0.0, 1.0]}).replace_schema_metadata({"plane": "x"})
    pq.write_table(table, tmp_path / "p.parquet")
    assert detect_kind(tmp_path / "p.parquet") == "profiles"
    with pytest.raises(InputError, match=r"missing column 'position'"):
        read_any(tmp_path / "p.parquet")
