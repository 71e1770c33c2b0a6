"""``beamdiag orbit``: JSON lines, the readable table, store input and exit status.

Checked against inputs built here with known content (a 20 um step at a known
minute) and against the committed demo sample (35 um corrector step at BPM-09
at 10:42:00, sample_data/README.md).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from diagnostics.cli import main

REPO = Path(__file__).resolve().parent.parent
SAMPLE_BPM = REPO / "sample_data" / "bpm" / "bpm_20261130T1040Z_1Hz.csv"
START = pd.Timestamp("2026-11-30T06:00:00Z")


def _readings(minutes: int = 30, rate_Hz: float = 2.0, n_bpms: int = 3, seed: int = 1) -> pd.DataFrame:
    """BPM table in SI with a +20 um x step on BPM-02 at minute 15."""
    rng = np.random.default_rng(seed)
    n = int(minutes * 60 * rate_Hz)
    t_s = np.arange(n) / rate_Hz
    x = rng.normal(0, 1e-6, (n, n_bpms)) + 1e-4
    y = rng.normal(0, 1e-6, (n, n_bpms))
    x[t_s >= 900, 1] += 20e-6
    times = START + pd.to_timedelta(t_s, unit="s")
    names = [f"BPM-{i:02d}" for i in range(1, n_bpms + 1)]
    return pd.DataFrame(
        {
            "timestamp": np.repeat(times, n_bpms),
            "bpm": np.tile(names, n),
            "x_m": x.ravel(),
            "y_m": y.ravel(),
            "sum": 1.0 + 0.001 * rng.standard_normal(n * n_bpms),
        }
    )


def _write_csv(df: pd.DataFrame, path: Path) -> Path:
    out = pd.DataFrame(
        {
            "timestamp": df["timestamp"].dt.strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
            "bpm": df["bpm"],
            "x_mm": df["x_m"] * 1e3,
            "y_mm": df["y_m"] * 1e3,
            "sum": df["sum"],
        }
    )
    out.to_csv(path, index=False, float_format="%.9g")
    return path


def _json_lines(capsys) -> list[dict]:
    return [json.loads(line) for line in capsys.readouterr().out.splitlines() if line.strip()]


def test_json_has_the_contract_keys_and_finds_the_step(tmp_path, capsys):
    path = _write_csv(_readings(), tmp_path / "bpm.csv")
    assert main(["orbit", str(path), "--json"]) == 0
    (rec,) = _json_lines(capsys)
    assert rec["file"] == str(path) and rec["error"] is None
    for key in ("start", "end", "sampling_Hz", "nyquist_Hz", "bpms", "modes", "correlations",
                "transmission", "loss_events", "limits", "violations", "flags"):
        assert key in rec
    assert rec["sampling_Hz"] == pytest.approx(2.0)
    assert rec["nyquist_Hz"] == pytest.approx(1.0)
    assert rec["start"] == "2026-11-30T06:00:00Z"
    x = rec["bpms"]["BPM-02"]["x"]
    for key in ("mean_m", "drift_m", "drift_rate_m_per_h", "jitter_rms_m", "steps", "peak_frequency_Hz", "flags"):
        assert key in x
    (step,) = x["steps"]
    assert step["time"].endswith("Z")
    assert abs((pd.Timestamp(step["time"]) - (START + pd.Timedelta("15min"))).total_seconds()) < 60
    assert step["size_m"] == pytest.approx(20e-6, rel=0.2)
    assert "out_of_limit" in x["flags"]
    assert rec["limits"]["drift_limit_m"] == pytest.approx(10e-6)
    assert rec["bpms"]["BPM-01"]["x"]["steps"] == []


def test_limits_from_the_command_line(tmp_path, capsys):
    path = _write_csv(_readings(), tmp_path / "bpm.csv")
    assert main(["orbit", str(path), "--json", "--drift-limit-um", "50", "--jitter-limit-um", "20"]) == 0
    (rec,) = _json_lines(capsys)
    assert rec["limits"] == {"drift_limit_m": pytest.approx(50e-6), "jitter_limit_m": pytest.approx(20e-6)}
    assert rec["violations"] == []


def test_one_json_object_per_file_and_exit_1_when_one_fails(tmp_path, capsys):
    good = _write_csv(_readings(), tmp_path / "good.csv")
    bad = tmp_path / "bad.csv"
    bad.write_text("timestamp,bpm,x_mm,y_mm\n2026-11-30T06:00:00Z,BPM-01,abc,0.1\n")
    assert main(["orbit", str(bad), str(good), "--json"]) == 1
    first, second = _json_lines(capsys)
    assert first["file"] == str(bad) and first["error"] and "bad.csv" in first["error"]
    assert second["file"] == str(good) and second["error"] is None


def test_readable_table_in_micrometres(tmp_path, capsys):
    path = _write_csv(_readings(), tmp_path / "bpm.csv")
    assert main(["orbit", str(path)]) == 0
    out = capsys.readouterr().out
    assert "drift um" in out and "jitter um" in out
    assert "step BPM-02 x at 2026-11-30T06:1" in out
    assert "BPM-03" in out


def test_store_input_with_time_window(tmp_path, capsys):
    from diagnostics.store import Store

    store_dir = tmp_path / "store"
    store = Store(store_dir)
    store.write_bpm(_readings(minutes=40), sha256="a" * 64, source="test")
    args = ["orbit", "--store", str(store_dir), "--start", "2026-11-30T06:05:00Z", "--end", "2026-11-30T06:35:00Z", "--json"]
    assert main(args) == 0
    (rec,) = _json_lines(capsys)
    assert rec["file"] == str(store_dir) and rec["error"] is None
    assert rec["start"] == "2026-11-30T06:05:00Z"
    assert pd.Timestamp(rec["end"]) < pd.Timestamp("2026-11-30T06:35:00Z")
    assert len(rec["bpms"]["BPM-02"]["x"]["steps"]) == 1


def test_empty_store_window_fails_with_exit_1(tmp_path, capsys):
    from diagnostics.store import Store

    store_dir = tmp_path / "store"
    Store(store_dir).write_bpm(_readings(minutes=5), sha256="b" * 64, source="test")
    assert main(["orbit", "--store", str(store_dir), "--start", "2027-01-01", "--json"]) == 1
    (rec,) = _json_lines(capsys)
    assert rec["error"] and "no BPM readings" in rec["error"]


def test_files_and_store_together_is_a_usage_error(tmp_path, capsys):
    path = _write_csv(_readings(minutes=5), tmp_path / "bpm.csv")
    assert main(["orbit", str(path), "--store", str(tmp_path)]) == 2
    assert "exactly one" in capsys.readouterr().err


@pytest.mark.skipif(not SAMPLE_BPM.exists(), reason="demo sample not present")
def test_demo_sample_corrector_step_at_10_42(capsys):
    """Demo scenario (sample_data/README.md): BPM-09 moves by 35 um at 10:42:00 UTC; size within 20 %."""
    assert main(["orbit", str(SAMPLE_BPM), "--json"]) == 0
    (rec,) = _json_lines(capsys)
    steps = rec["bpms"]["BPM-09"]["x"]["steps"]
    assert len(steps) == 1
    assert abs((pd.Timestamp(steps[0]["time"]) - pd.Timestamp("2026-11-30T10:42:00Z")).total_seconds()) < 60
    assert steps[0]["size_m"] == pytest.approx(35e-6, rel=0.2)
    assert rec["bpms"]["BPM-01"]["x"]["steps"] == []
    assert rec["sampling_Hz"] == pytest.approx(1.0)
