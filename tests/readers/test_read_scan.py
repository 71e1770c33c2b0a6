"""Scan-folder reader: quad, solenoid and multi-monitor manifests, completeness, refusals."""

from __future__ import annotations

import json
import shutil

import numpy as np
import pandas as pd
import pytest

from diagnostics.errors import InputError
from diagnostics.measurements import DesignTwiss, Magnet, ParticleSpec
from diagnostics.readers.scan import read_scan


def test_quad_scan_sample_loads_every_step(scans):
    spec = read_scan(scans / "quad_q05")
    assert spec.kind == "quadrupole" and spec.name == "Q-05 scan 08:15"
    assert spec.timestamp == pd.Timestamp("2026-11-30T08:15:00Z")
    assert spec.particle == ParticleSpec(name="electron")
    assert spec.kinetic_energy_MeV == 150.0 and spec.energy_spread == 1e-3
    assert spec.magnet == Magnet(kind="quadrupole", name="Q-05", length_m=0.2)
    # a field-free drift of length d has the matrix [[1, d], [0, 1]] in both planes
    # (Wiedemann, Particle Accelerator Physics, Springer: the drift-space transformation)
    np.testing.assert_array_equal(spec.transport_x, [[1.0, 4.0], [0.0, 1.0]])
    np.testing.assert_array_equal(spec.transport_y, [[1.0, 4.0], [0.0, 1.0]])
    assert [m.name for m in spec.monitors] == ["WS-02"] and spec.monitors[0].resolution_m == 1.5e-5
    assert spec.design == {"x": DesignTwiss(10.0, -1.2), "y": DesignTwiss(8.0, 0.9)}
    assert spec.expected_steps == 5 and spec.complete
    steps = spec.steps
    assert [s.index for s in steps] == [0, 1, 2, 3, 4]
    assert steps[0].k1_per_m2 == -2.0 and steps[2].gradient_T_per_m == 1.3 and steps[2].k1_per_m2 is None
    p = steps[0].profile_x
    assert p is not None and p.plane == "x" and p.device == "WS-02"  # no device header: the monitor's name
    assert steps[0].profile_y.plane == "y" and steps[0].frame is None
    np.testing.assert_allclose(p.position_m[[0, -1]], [-2e-3, 2e-3], rtol=0, atol=0)
    frame = steps[2].frame
    assert frame is not None and frame.device == "WS-02-screen" and frame.dark is not None
    assert (steps[3].sigma_x_m, steps[3].sigma_y_m, steps[3].sigma_x_err_m, steps[3].sigma_y_err_m) == (
        1.2e-4, 2.0e-4, 3e-6, 4e-6)
    assert steps[4].sigma_x_err_m is None and steps[4].k1_per_m2 == steps[3].k1_per_m2  # repeated setting
    assert spec.folder == str(scans / "quad_q05")


def test_scan_json_path_is_accepted_as_the_folder(scans):
    assert read_scan(scans / "quad_q05" / "scan.json").name == "Q-05 scan 08:15"


def test_solenoid_scan_with_matrices_and_ion(scans):
    spec = read_scan(scans / "solenoid_s01")
    assert spec.kind == "solenoid" and spec.magnet == Magnet("solenoid", "S-01", 0.15)
    assert spec.particle == ParticleSpec(name="ion", mass_MeV=3727.379, charge=2)
    assert [s.field_T for s in spec.steps] == [0.10, 0.15, 0.20]
    np.testing.assert_array_equal(spec.transport_x, [[1.0, 1.5], [0.0, 1.0]])
    assert spec.monitors[0].resolution_m == 0.0 and spec.complete and spec.expected_steps is None
    assert spec.timestamp == pd.Timestamp("2026-11-30T08:00:00Z")


def test_multi_monitor_measurement(scans):
    spec = read_scan(scans / "multi_ws")
    assert spec.kind == "multi_monitor" and spec.magnet is None and spec.transport_x is None
    assert spec.particle == ParticleSpec(name="ion", mass_u=12.0, charge=6)
    assert [m.name for m in spec.monitors] == ["SCR-01", "SCR-02", "SCR-03"]
    np.testing.assert_array_equal(spec.monitors[2].matrix_x, [[0.5, 5.0], [-0.1, 1.0]])
    assert [s.monitor for s in spec.steps] == ["SCR-01", "SCR-02", "SCR-03"]


def _edit(folder, change):
    doc = json.loads((folder / "scan.json").read_text())
    change(doc)
    (folder / "scan.json").write_text(json.dumps(doc))
    return folder


@pytest.fixture
def folder(tmp_path, scans):
    target = tmp_path / "quad"
    shutil.copytree(scans / "quad_q05", target)
    return target


def test_completeness_rules(folder):
    (folder / "complete").unlink()
    assert read_scan(folder).complete  # 5 steps, 5 expected
    _edit(folder, lambda d: d.update(expected_steps=8))
    assert not read_scan(folder).complete
    (folder / "complete").touch()
    assert read_scan(folder).complete  # the marker wins
    (folder / "complete").unlink()
    _edit(folder, lambda d: d.pop("expected_steps"))
    assert read_scan(folder).complete  # neither given: taken as it is
    _edit(folder, lambda d: d.update(expected_steps=4, steps=[]))
    spec = read_scan(folder)
    assert spec.steps == () and not spec.complete  # a scan just started


def _drop(key):
    return lambda d: d.pop(key)


def _step(i, **fields):
    def change(d):
        d["steps"][i] = fields
    return change


@pytest.mark.parametrize(
    ("change", "pattern"),
    [
        (_drop("name"), r"scan\.json: field 'name': missing"),
        (_drop("particle"), r"field 'particle' missing"),
        (_drop("kinetic_energy_MeV"), r"field 'kinetic_energy_MeV' missing"),
        (_drop("timestamp"), r"field 'timestamp' missing"),
        (_drop("transport"), r"field 'transport' missing"),
        (_drop("monitor"), r"field 'monitor' missing"),
        (_drop("steps"), r"field 'steps' missing"),
        (lambda d: d.update(timestamp="2026-11-30T08:15"), r"'2026-11-30T08:15' has no time zone"),
        (lambda d: d.update(kinetic_energy_MeV=-5), r"field 'kinetic_energy_MeV': expected a number > 0"),
        (lambda d: d.update(kinetic_energy_MeV="150"), r"field 'kinetic_energy_MeV': expected a number"),
        (lambda d: d.update(energy_spread=-0.1), r"field 'energy_spread': expected a number >= 0"),
        (lambda d: d["quadrupole"].update(length_m=-0.2), r"field 'quadrupole\.length_m': expected a number > 0"),
        (lambda d: d["quadrupole"].update(length_m=0), r"field 'quadrupole\.length_m': expected a number > 0"),
        (lambda d: d.update(transport={"drift_m": -1.0}), r"field 'transport\.drift_m': expected a number >= 0"),
        (lambda d: d.update(transport={"matrix_x": [[1, 2, 3], [0, 1, 0]], "matrix_y": [[1, 0], [0, 1]]}),
         r"field 'transport\.matrix_x': expected a 2x2 matrix"),
        (lambda d: d.update(transport={"matrix_x": [[1, 0], [0, 1]]}), r"expected drift_m, or both matrix_x"),
        (lambda d: d.update(transport={"drift_m": 1, "matrix_x": [[1, 0], [0, 1]]}), r"either drift_m or matrix"),
        (lambda d: d["monitor"].update(resolution_m=-1e-6), r"field 'monitor\.resolution_m': expected a number >= 0"),
        (lambda d: d.update(particle="muon"), r"unknown particle 'muon' \(expected one of electron, positron, proton"),
        (lambda d: d.update(particle="electorn"), r"unknown particle 'electorn' \(did you mean 'electron'\?\)"),
        (lambda d: d.update(particle={"mass_MeV": 931.5}), r"field 'particle\.charge' missing"),
        (lambda d: d.update(particle={"mass_MeV": 931.5, "mass_u": 1.0, "charge": 1}), r"exactly one of mass_MeV"),
        (lambda d: d.update(particle={"mass_u": 12.0, "charge": 0}), r"non-zero charge"),
        (lambda d: d.update(particle={"mass_u": 12.0, "charge": 2.5}), r"'particle\.charge': expected an integer"),
        (lambda d: d.update(solenoid={"name": "S", "length_m": 0.1}), r"'quadrupole' and 'solenoid' both given"),
        (lambda d: d.update(expected_step=5), r"unknown field 'expected_step' \(did you mean 'expected_steps'\?\)"),
        (lambda d: d.update(expected_steps=0), r"field 'expected_steps': expected an integer >= 1"),
        (lambda d: d.update(design={"x": {"beta_m": -1.0, "alpha": 0}}), r"'design\.x\.beta_m': expected a number > 0"),
        (lambda d: d.update(design={"z": {"beta_m": 1.0, "alpha": 0}}), r"unknown field 'design\.z'"),
        (lambda d: d.update(steps=[]), r"field 'steps': is empty"),
        (lambda d: d.update(steps={"k1_per_m2": 1}), r"field 'steps': expected a list"),
        (_step(1, k1_per_m2=1.0, gradient_T_per_m=2.0, sigma_x_m=1e-4),
         r"field 'steps\[1\]': expected exactly one of k1_per_m2, gradient_T_per_m \(found k1_per_m2 and "
         r"gradient_T_per_m\)"),
        (_step(1, sigma_x_m=1e-4), r"'steps\[1\]': expected exactly one of .* \(found none\)"),
        (_step(1, field_T=0.1, sigma_x_m=1e-4), r"'steps\[1\]\.field_T': not a setting of a quadrupole scan"),
        (_step(1, k1_per_m2=1.0), r"'steps\[1\]': expected one size source.*\(found none\)"),
        (_step(1, k1_per_m2=1.0, x="step00_x.csv", sigma_y_m=1e-4), r"\(found profiles and sizes\)"),
        (_step(1, k1_per_m2=1.0, sigma_x_m=0.0), r"'steps\[1\]\.sigma_x_m': expected a number > 0"),
        (_step(1, k1_per_m2=1.0, sigma_x_err_m=1e-6), r"sizes need sigma_x_m"),
        (_step(1, k1_per_m2=1.0, sigma_x_m=1e-4, sigma_y_err_m=1e-6), r"sigma_y_err_m': given without sigma_y_m"),
        (_step(1, k1_per_m2="strong", sigma_x_m=1e-4), r"'steps\[1\]\.k1_per_m2': expected a number"),
        (_step(1, k1_per_m2=1.0, sigma_x=1e-4), r"unknown field 'steps\[1\]\.sigma_x' \(did you mean 'sigma_x_m'"),
        (_step(1, k1_per_m2=1.0, x="step00_y.csv"), r"'step00_y\.csv' measures plane y \(expected plane x\)"),
        (_step(1, k1_per_m2=1.0, x="../../etc/passwd"), r"'steps\[1\]\.x': '\.\./\.\./etc/passwd' leaves the folder"),
        (_step(1, k1_per_m2=1.0, x="/etc/passwd"), r"'steps\[1\]\.x': '/etc/passwd' is an absolute path"),
        (_step(1, k1_per_m2=1.0, image="../quad/../../x.png"), r"leaves the folder"),
        (_step(1, k1_per_m2=1.0, x="nothere.csv"), r"profile 'nothere\.csv' not found in the scan folder"),
        (_step(1, k1_per_m2=1.0, image="nothere.png"), r"image 'nothere\.png' not found"),
        (_step(1, k1_per_m2=1.0, x=3), r"expected a file name relative to the folder, found 3"),
    ],
)
def test_scan_mistakes(folder, change, pattern):
    _edit(folder, change)
    with pytest.raises(InputError, match=pattern) as info:
        read_scan(folder)
    message = str(info.value)
    assert "\n" not in message and message.startswith(str(folder / "scan.json"))


def test_symlink_leaving_the_folder_is_refused(folder, tmp_path):
    outside = tmp_path / "outside.csv"
    shutil.copy(folder / "step00_x.csv", outside)
    (folder / "sneaky.csv").symlink_to(outside)
    _edit(folder, _step(1, k1_per_m2=1.0, x="sneaky.csv"))
    with pytest.raises(InputError, match=r"'sneaky\.csv' leaves the folder"):
        read_scan(folder)


def test_broken_step_file_names_that_file(folder):
    (folder / "step01_x.csv").write_text("# plane: x\n# timestamp: 2026-11-30T08:15:00Z\nposition,signal\n1,a\n")
    with pytest.raises(InputError, match=r"step01_x\.csv: line 4: column 'signal' has 'a'"):
        read_scan(folder)


def test_multi_monitor_mistakes(tmp_path, scans):
    folder = tmp_path / "multi"
    shutil.copytree(scans / "multi_ws", folder)
    _edit(folder, _step(0, monitor="SCR-09", sigma_x_m=1e-4))
    with pytest.raises(InputError, match=r"unknown monitor 'SCR-09' .*\(expected one of SCR-01, SCR-02, SCR-03\)"):
        read_scan(folder)
    _edit(folder, lambda d: d["monitors"].append(d["monitors"][0]))
    with pytest.raises(InputError, match=r"monitor 'SCR-01' listed twice"):
        read_scan(folder)
    _edit(folder, lambda d: d.update(transport={"drift_m": 1.0}))
    with pytest.raises(InputError, match=r"only quadrupole and solenoid scans have a transport"):
        read_scan(folder)
    _edit(folder, lambda d: (d.pop("transport"), d["monitors"][0].pop("matrix_y")))
    with pytest.raises(InputError, match=r"field 'monitors\[0\]\.matrix_y' missing"):
        read_scan(folder)


def test_not_a_scan_folder(tmp_path):
    with pytest.raises(InputError, match=r"no scan\.json in the folder"):
        read_scan(tmp_path)
    with pytest.raises(InputError, match=r"not a folder"):
        read_scan(tmp_path / "nope")
    (tmp_path / "scan.json").write_text("{not json")
    with pytest.raises(InputError, match=r"scan\.json: invalid JSON at line 1 column 2"):
        read_scan(tmp_path)
    (tmp_path / "scan.json").write_text("")
    with pytest.raises(InputError, match=r"scan\.json: empty file"):
        read_scan(tmp_path)
