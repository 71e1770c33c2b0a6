"""The examples in docs/formats.md (or the README, once merged there) read as the text says."""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
from PIL import Image

from diagnostics.readers import read_bpm, read_frame, read_profile, read_scan, read_slow

REPO = Path(__file__).resolve().parents[2]
DOC = REPO / "docs" / "formats.md" if (REPO / "docs" / "formats.md").exists() else REPO / "README.md"


def _blocks() -> list[str]:
    return re.findall(r"```[a-z]*\n(.*?)```", DOC.read_text(encoding="utf-8"), flags=re.S)


def _block(marker: str) -> str:
    found = [b for b in _blocks() if marker in b]
    assert len(found) == 1, f"expected one example containing {marker!r} in {DOC.name}"
    return found[0]


class TestDocumentedExamples:
    def test_profile(self, tmp_path):
        path = tmp_path / "profile.csv"
        path.write_text(_block("# device: WS-02"))
        profile = read_profile(path)
        np.testing.assert_array_equal(profile.position_m, [-3e-3, -2.5e-3, -2e-3])
        assert profile.metadata == {"operator_note": "after Q-05 trim"}

    def test_bpm(self, tmp_path):
        path = tmp_path / "bpm.csv"
        path.write_text(_block("timestamp,bpm,"))
        df = read_bpm(path)
        assert df["bpm"].tolist() == ["BPM-01", "BPM-02", "BPM-01"]
        assert df["x_m"].iloc[0] == 0.0123 * 1e-3

    def test_slow(self, tmp_path):
        path = tmp_path / "slow.csv"
        path.write_text(_block("timestamp,channel,"))
        assert read_slow(path)["unit"].tolist() == ["degC", "A", "degC"]

    def test_sidecar(self, tmp_path):
        meta = json.loads(_block('"pixel_size_m": [2.5e-5'))
        pixels = np.full((24, 32), 100, np.uint16)
        Image.fromarray(pixels).save(tmp_path / "SCR-02_101500.png")
        Image.fromarray(np.zeros_like(pixels)).save(tmp_path / meta["dark"])
        (tmp_path / "SCR-02_101500.json").write_text(json.dumps(meta))
        frame = read_frame(tmp_path / "SCR-02_101500.png")
        assert frame.roi == tuple(meta["roi"]) and frame.bit_depth == 12 and frame.dark is not None

    def test_scan(self, tmp_path, scans):
        folder = tmp_path / "q05_scan"
        shutil.copytree(scans / "quad_q05", folder)
        (folder / "scan.json").write_text(_block('"steps": ['))
        spec = read_scan(folder)
        assert len(spec.steps) == 4 and spec.complete and spec.timestamp == pd.Timestamp("2026-11-30T08:15:00Z")
        assert spec.steps[1].frame is not None and spec.steps[0].profile_y is not None
