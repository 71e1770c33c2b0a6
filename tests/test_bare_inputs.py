"""Inputs with none of the optional header lines still go through every command.

DESIGN.md makes the ``# key: value`` lines of a profile optional, so a plain
``position,signal`` table is a profile, inside a scan folder or on its own.
The scan case is checked end to end against an exact analytic beam: a known
sigma matrix pushed through thick-quadrupole and drift matrices (Wiedemann,
*Particle Accelerator Physics*, 4th ed. 2015, the beam-matrix transport
Sigma1 = R Sigma0 R^T), sampled as Gaussian profiles.
"""

from __future__ import annotations

import json
import os

import numpy as np
import pandas as pd
import pytest

from diagnostics import optics
from diagnostics.cli import main
from diagnostics.errors import InputError
from diagnostics.readers.wire import read_profile

EPS_M_RAD = {"x": 4.0e-9, "y": 3.0e-9}
TWISS = {"x": (9.0, -1.1), "y": (6.5, 0.9)}  # beta_m, alpha at the quadrupole entrance
QUAD_LENGTH_M, DRIFT_M = 0.2, 4.0


def _bare_profile(path, sigma_m, centre_m=0.0):
    x_mm = np.linspace(-6 * 0.9e-3, 6 * 0.9e-3, 301) * 1e3
    signal = 0.02 + np.exp(-0.5 * ((x_mm * 1e-3 - centre_m) / sigma_m) ** 2)
    pd.DataFrame({"position": x_mm, "signal": signal}).to_csv(path, index=False)


def test_bare_profile_reads_with_documented_defaults(tmp_path):
    path = tmp_path / "WS-01_y_0800.csv"
    _bare_profile(path, 2e-4)
    os.utime(path, ns=(1_764_489_600_000_000_000,) * 2)  # 2025-11-30T08:00:00Z
    profile = read_profile(path)
    assert profile.plane == "y" and profile.metadata["plane_source"] == "file name"
    assert profile.timestamp == pd.Timestamp("2025-11-30T08:00:00Z")
    assert profile.metadata["timestamp_source"] == "file modification time"
    assert profile.device == "WS-01"
    # with no plane anywhere, x is assumed and said so
    other = tmp_path / "scan.csv"
    _bare_profile(other, 2e-4)
    assert read_profile(other).metadata["plane_source"].startswith("assumed")


def test_misspelt_header_key_is_still_refused(tmp_path):
    path = tmp_path / "p.csv"
    path.write_text("# plan: x\nposition,signal\n1,2\n2,3\n")
    with pytest.raises(InputError, match=r"'plan' is not a known key \(did you mean 'plane'\?\)"):
        read_profile(path)


def test_bare_profile_json_contract(tmp_path, capsys):
    path = tmp_path / "p.csv"
    _bare_profile(path, 3e-4, centre_m=1e-4)
    assert main(["profile", "--json", str(path)]) == 0
    record = json.loads(capsys.readouterr().out)
    assert record["error"] is None
    assert record["sigma_m"] == pytest.approx(3e-4, rel=1e-3)
    assert record["centroid_m"] == pytest.approx(1e-4, abs=1e-6)


def test_scan_of_bare_profiles_recovers_the_known_emittance(tmp_path, capsys):
    """A quad-scan folder whose profiles carry no header lines at all: the step's
    plane key and the scan's time stand in, and the fit returns the emittance of
    the analytic beam within 3 %."""
    folder = tmp_path / "scan"
    folder.mkdir()
    k1 = np.linspace(-3.0, 5.0, 11)
    steps = []
    for i, k in enumerate(k1):
        step = {"k1_per_m2": float(k)}
        for plane, sign in (("x", 1.0), ("y", -1.0)):
            beta, alpha = TWISS[plane]
            sigma0 = EPS_M_RAD[plane] * np.array([[beta, -alpha], [-alpha, (1 + alpha**2) / beta]])
            r = optics.compose(optics.quad_thick(sign * k, QUAD_LENGTH_M), optics.drift(DRIFT_M))
            r = np.asarray(r).reshape(2, 2)
            sigma_m = float(np.sqrt((r @ sigma0 @ r.T)[0, 0]))
            name = f"s{i:02d}{plane}.csv"
            _bare_profile(folder / name, sigma_m)
            step[plane] = name
        steps.append(step)
    (folder / "scan.json").write_text(json.dumps({
        "name": "bare", "timestamp": "2026-11-30T09:00:00Z", "particle": "electron",
        "kinetic_energy_MeV": 150.0, "quadrupole": {"name": "Q-05", "length_m": QUAD_LENGTH_M},
        "transport": {"drift_m": DRIFT_M}, "monitor": {"name": "WS-02", "resolution_m": 0.0},
        "steps": steps,
    }))
    assert main(["emittance", "--json", str(folder)]) == 0
    record = json.loads(capsys.readouterr().out)
    assert record["error"] is None
    for plane in ("x", "y"):
        assert record[plane]["emittance_m_rad"] == pytest.approx(EPS_M_RAD[plane], rel=0.03)
        assert record[plane]["beta_m"] == pytest.approx(TWISS[plane][0], rel=0.03)
