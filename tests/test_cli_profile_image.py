"""``beamdiag profile`` and ``beamdiag image``: called through diagnostics.cli.main.

The profile file tests/data/profiles/WS-02_x_gauss.csv is a noise-free Gaussian
(sigma 0.25 mm, centre 0.1 mm) written with 10 significant digits, so the fit must
return those values exactly (analytic truth, rtol 1e-6); the image is a
noise-free analytic spot written to .npy with its sidecar.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from diagnostics.cli import main

DATA = Path(__file__).resolve().parent / "data" / "profiles"
GOOD = DATA / "WS-02_x_gauss.csv"
BROKEN = DATA / "WS-02_y_broken.csv"


def json_lines(out: str) -> list[dict]:
    return [json.loads(line) for line in out.splitlines() if line.strip()]


def test_profile_json_has_the_contract_keys_and_exact_values(capsys):
    assert main(["profile", "--json", str(GOOD)]) == 0
    (rec,) = json_lines(capsys.readouterr().out)
    for key in ("file", "device", "plane", "timestamp", "centroid_m", "sigma_m", "sigma_err_m", "rms_m", "fwhm_m", "flags", "error"):
        assert key in rec
    assert rec["error"] is None and rec["flags"] == []
    assert rec["device"] == "WS-02" and rec["plane"] == "x"
    assert rec["timestamp"] == "2026-11-30T08:15:00Z"
    assert rec["sigma_m"] == pytest.approx(2.5e-4, rel=1e-6)
    assert rec["centroid_m"] == pytest.approx(1e-4, rel=1e-6)
    assert rec["fwhm_m"] == pytest.approx(2.3548200450309493 * 2.5e-4, rel=1e-6)


def test_profile_bad_input_is_reported_and_the_others_still_run(capsys):
    assert main(["profile", "--json", str(BROKEN), str(GOOD)]) == 1
    bad, good = json_lines(capsys.readouterr().out)
    assert bad["file"] == str(BROKEN) and "WS-02_y_broken.csv" in bad["error"] and "signal" in bad["error"]
    assert "\n" not in bad["error"]
    assert good["error"] is None and good["sigma_m"] == pytest.approx(2.5e-4, rel=1e-6)


def test_profile_table_is_aligned_and_in_micrometres(capsys):
    assert main(["profile", str(DATA)]) == 1  # the folder holds the broken file too
    captured = capsys.readouterr()
    lines = captured.out.splitlines()
    assert lines[0].split()[:3] == ["file", "device", "plane"]
    row = lines[1]
    assert "WS-02_x_gauss.csv" in row and "250.0 um" in row and "100.0 um" in row
    assert lines[0].index("plane") == row.index("x  ")
    assert "WS-02_y_broken.csv" in captured.err


def test_profile_model_and_baseline_options(capsys):
    assert main(["profile", "--json", "--model", "super_gaussian", "--baseline", "constant", str(GOOD)]) == 0
    (rec,) = json_lines(capsys.readouterr().out)
    assert rec["model"] == "super_gaussian"
    assert rec["order"] == pytest.approx(2.0, rel=1e-5)  # a Gaussian is the p = 2 super-Gaussian
    assert rec["sigma_m"] == pytest.approx(2.5e-4, rel=1e-5)


def write_frame(folder: Path, name: str, *, with_sidecar: bool = True, dark: bool = True) -> Path:
    yy, xx = np.mgrid[0:120, 0:160].astype(float)
    sx, sy, rho = 9.0, 6.0, 0.4
    s = np.array([[sx * sx, rho * sx * sy], [rho * sx * sy, sy * sy]])
    si = np.linalg.inv(s)
    dx, dy = xx - 82.0, yy - 57.0
    img = 1500 * np.exp(-0.5 * (si[0, 0] * dx * dx + 2 * si[0, 1] * dx * dy + si[1, 1] * dy * dy)) + 100.0
    path = folder / f"{name}.npy"
    np.save(path, img)
    meta = {"device": "SCR-02", "timestamp": "2026-11-30T12:30:00Z", "pixel_size_m": [1.5e-5, 1.5e-5]}
    if dark:
        np.save(folder / "dark.npy", np.full(img.shape, 100.0))
        meta["dark"] = "dark.npy"
    if with_sidecar:
        (folder / f"{name}.json").write_text(json.dumps(meta))
    return path


def test_image_json_has_the_contract_keys_and_analytic_values(tmp_path, capsys):
    path = write_frame(tmp_path, "SCR-02_1230")
    assert main(["image", "--json", "--fit-2d", str(path)]) == 0
    (rec,) = json_lines(capsys.readouterr().out)
    for key in ("file", "device", "timestamp", "centroid_x_m", "centroid_y_m", "sigma_x_m", "sigma_y_m", "sigma_xy_m2", "tilt_rad", "flags", "error"):
        assert key in rec
    assert rec["error"] is None and rec["flags"] == []
    assert rec["device"] == "SCR-02"
    assert rec["centroid_x_m"] == pytest.approx(82.0 * 1.5e-5, rel=1e-4)
    # point samples with the default pixel-integration (Sheppard) correction and +-4 sigma window:
    # sigma^2 - 1/12 px^2, times the window factor 0.99946
    assert rec["sigma_x_m"] == pytest.approx(math.sqrt(81 - 1 / 12) * 0.99946 * 1.5e-5, rel=1e-3)
    assert rec["gauss2d"]["sigma_x_m"] == pytest.approx(math.sqrt(81 - 1 / 12) * 1.5e-5, rel=1e-3)
    assert rec["sigma_xy_m2"] / (rec["sigma_x_m"] * rec["sigma_y_m"]) == pytest.approx(0.4, abs=0.01)


def test_image_folder_skips_dark_frames_and_reports_missing_sidecar(tmp_path, capsys):
    write_frame(tmp_path, "SCR-02_a")
    lonely = write_frame(tmp_path, "SCR-02_b", with_sidecar=False, dark=False)
    assert main(["image", "--json", str(tmp_path)]) == 1
    recs = json_lines(capsys.readouterr().out)
    files = [Path(r["file"]).name for r in recs]
    assert "dark.npy" not in files
    bad = [r for r in recs if r["file"] == str(lonely)]
    assert bad and "sidecar" in bad[0]["error"]
    good = [r for r in recs if r["error"] is None]
    assert len(good) == 1 and good[0]["sigma_x_m"] > 0


def test_image_table_shows_mm_and_micrometres(tmp_path, capsys):
    path = write_frame(tmp_path, "SCR-02_1230")
    assert main(["image", str(path)]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0].split()[:4] == ["file", "device", "x", "y"]
    assert "1.230 mm" in out[1] and " um" in out[1] and "ok" in out[1]
