"""Regenerate the small scan folders used by tests/test_cli_emittance.py.

Run from the repository root: ``.venv/bin/python tests/data/scans/make_scans.py``.
Beam of METHODS 6.4 (eps = 1e-6 m rad, beta = 10 m, alpha = -1) in both planes,
invented "Kestrel Bay test linac" names.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from diagnostics import emittance as em
from diagnostics import optics
from diagnostics.particles import k1_from_gradient, kinematics

HERE = Path(__file__).resolve().parent
S0 = np.array([1e-5, 1e-6, 2e-7])


def sizes(mats):
    return np.sqrt(em.design_rows(mats) @ S0)


def write(folder: str, doc: dict, files: dict[str, str] | None = None) -> None:
    path = HERE / folder
    path.mkdir(exist_ok=True)
    (path / "scan.json").write_text(json.dumps(doc, indent=1) + "\n")
    for name, text in (files or {}).items():
        (path / name).write_text(text)


def quad_doc(name, steps, **extra):
    doc = {
        "name": name,
        "timestamp": "2026-11-30T08:15:00Z",
        "particle": "electron",
        "kinetic_energy_MeV": 150.0,
        "quadrupole": {"name": "Q-05", "length_m": 0.2},
        "transport": {"drift_m": 3.0},
        "monitor": {"name": "WS-02", "resolution_m": 0.0},
        "design": {"x": {"beta_m": 10.0, "alpha": -1.0}, "y": {"beta_m": 10.0, "alpha": -1.0}},
        "steps": steps,
    }
    doc.update(extra)
    return doc


def main() -> None:
    k = np.array([-6.0, -4.0, -2.0, 0.0, 2.0, 4.0, 6.0, 8.0, 10.0])
    mx = optics.compose(optics.quad_thick(k, 0.2), optics.drift(3.0))
    my = optics.compose(optics.quad_thick(-k, 0.2), optics.drift(3.0))
    rng = np.random.default_rng(1)
    # 2 % rms size noise, stated as the size error
    sx = sizes(mx) * (1 + 0.02 * rng.standard_normal(k.size))
    sy = sizes(my) * (1 + 0.02 * rng.standard_normal(k.size))
    brho = kinematics(150.0, "electron").brho_T_m
    steps = []
    for i, (kk, a, b) in enumerate(zip(k, sx, sy, strict=True)):
        step = {"sigma_x_m": float(a), "sigma_y_m": float(b), "sigma_x_err_m": float(0.02 * a), "sigma_y_err_m": float(0.02 * b)}
        if i == 4:
            step["gradient_T_per_m"] = float(kk * brho)
        else:
            step["k1_per_m2"] = float(kk)
        steps.append(step)
    assert abs(k1_from_gradient(steps[4]["gradient_T_per_m"], brho) - 2.0) < 1e-12
    write("q05_sizes", quad_doc("Q-05 scan 08:15", steps))

    # sizes no beam can give: sigma^2 = 4e-5 q^2 - 4.8e-5 q + 1.4e-5 behind a thin lens and 2 m
    q = np.array([-0.4, 0.0, 0.3, 0.9, 1.2, 1.6])
    s = np.sqrt(4e-5 * q**2 - 4.8e-5 * q + 1.4e-5)
    mats = optics.compose(optics.quad_thin(q), optics.drift(2.0))
    monitors = [
        {"name": f"SCR-{i + 1:02d}", "resolution_m": 0.0, "matrix_x": m.tolist(), "matrix_y": m.tolist()}
        for i, m in enumerate(mats)
    ]
    doc = {
        "name": "three-screen set 11:00",
        "timestamp": "2026-11-30T11:00:00Z",
        "particle": "electron",
        "kinetic_energy_MeV": 150.0,
        "monitors": monitors,
        "steps": [{"monitor": m["name"], "sigma_x_m": float(v), "sigma_y_m": float(v)} for m, v in zip(monitors, s, strict=True)],
    }
    write("unphysical_set", doc)

    # waist outside the scanned range in x (k = 4..10)
    kk = k[5:]
    write(
        "q07_no_waist",
        quad_doc(
            "Q-07 scan 12:30",
            [{"k1_per_m2": float(a), "sigma_x_m": float(b), "sigma_y_m": float(c)} for a, b, c in zip(kk, sizes(mx)[5:], sizes(my)[5:], strict=True)],
        ),
    )

    # a broken manifest: no kinetic energy
    broken = quad_doc("broken", [{"k1_per_m2": 1.0, "sigma_x_m": 1e-4, "sigma_y_m": 1e-4}])
    del broken["kinetic_energy_MeV"]
    write("broken", broken)


if __name__ == "__main__":
    main()
