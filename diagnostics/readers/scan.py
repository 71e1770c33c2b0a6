"""Quad scans, solenoid scans and multi-monitor measurements: a folder with ``scan.json``.

Format
------
::

    q05_scan/
      scan.json
      step00_x.csv  step00_y.csv  step01.png  step01.json  ...
      complete                       (optional empty marker: the scan is finished)

``scan.json`` of a quadrupole scan::

    {"name": "Q-05 scan 08:15", "timestamp": "2026-11-30T08:15:00Z",
     "particle": "electron", "kinetic_energy_MeV": 150.0, "energy_spread": 1e-3,
     "quadrupole": {"name": "Q-05", "length_m": 0.2},
     "transport": {"drift_m": 4.0},
     "monitor": {"name": "WS-02", "resolution_m": 1.5e-5},
     "design": {"x": {"beta_m": 10.0, "alpha": -1.2}, "y": {"beta_m": 8.0, "alpha": 0.9}},
     "expected_steps": 3,
     "steps": [{"k1_per_m2": -2.0, "x": "step00_x.csv", "y": "step00_y.csv"},
               {"gradient_T_per_m": 1.3, "image": "step01.png"},
               {"k1_per_m2": 0.5, "sigma_x_m": 1.2e-4, "sigma_y_m": 2.0e-4,
                "sigma_x_err_m": 3e-6}]}

Fields
    ``name`` (text), ``timestamp`` (ISO 8601 with zone, or epoch seconds),
    ``particle`` (``"electron"``, ``"positron"``, ``"proton"``, or an ion
    ``{"mass_MeV": m, "charge": q}`` / ``{"mass_u": m, "charge": q}``),
    ``kinetic_energy_MeV`` (> 0), optional ``energy_spread`` (>= 0), optional
    ``comment``.
The scanned magnet
    ``quadrupole`` or ``solenoid``: ``{"name", "length_m" > 0}``; steps give
    ``k1_per_m2`` or ``gradient_T_per_m`` (quadrupole) or ``field_T``
    (solenoid), exactly one each.  Neither magnet: a multi-monitor measurement
    with ``monitors: [{"name", "resolution_m", "matrix_x", "matrix_y"}, ...]``
    and steps that name their ``monitor``.
``transport`` (quadrupole/solenoid scans)
    ``{"drift_m": d}`` (d >= 0; the matrix ``[[1, d], [0, 1]]`` in both planes)
    or ``{"matrix_x": [[..], [..]], "matrix_y": [[..], [..]]}``: any finite 2x2
    matrices (their determinant is not forced to 1, since acceleration between
    magnet and monitor damps it).
``monitor``
    ``{"name", "resolution_m" >= 0 (default 0)}``.
``design`` (optional)
    Per plane ``{"beta_m" > 0, "alpha"}``.
``expected_steps`` (optional)
    How many steps the scan will have (integer >= 1).
Each step
    One strength (see above), and one size source: per-plane profile files
    ``x``/``y`` (one or both), one ``image`` (with its sidecar), or measured sizes
    ``sigma_x_m``/``sigma_y_m`` (> 0) with optional ``sigma_x_err_m``/
    ``sigma_y_err_m`` (>= 0).  Settings may repeat (several shots).  An optional
    ``comment`` is allowed.

File names are relative to the folder and may not leave it: absolute paths,
``..`` escapes and symbolic links pointing outside are refused.  Unknown keys are
refused (with the closest valid key), so a typo never goes unnoticed.

A scan is ``complete`` when a file named ``complete`` exists in the folder, or
it has at least ``expected_steps`` steps, or when neither is given.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from diagnostics.errors import located
from diagnostics.measurements import (
    DesignTwiss,
    Magnet,
    Monitor,
    ParticleSpec,
    Profile,
    ScanSpec,
    ScanStep,
)
from diagnostics.readers import _util
from diagnostics.readers.screen import read_frame
from diagnostics.readers.wire import read_profile_with_origin

#: Name of the manifest inside a scan folder, and of the "finished" marker file.
MANIFEST = "scan.json"
COMPLETE_MARKER = "complete"

#: Particles known by name (ions are given by mass and charge).
PARTICLES = ("electron", "positron", "proton")

#: Kinds of scan and the strength field(s) their steps use.
STRENGTHS: Mapping[str, tuple[str, ...]] = {
    "quadrupole": ("k1_per_m2", "gradient_T_per_m"),
    "solenoid": ("field_T",),
    "multi_monitor": ("monitor",),
}

_TOP_KEYS = ("name", "timestamp", "particle", "kinetic_energy_MeV", "energy_spread", "quadrupole",
             "solenoid", "transport", "monitor", "monitors", "design", "expected_steps", "steps", "comment")
_SIZE_KEYS = ("sigma_x_m", "sigma_y_m", "sigma_x_err_m", "sigma_y_err_m")
_STEP_KEYS = ("k1_per_m2", "gradient_T_per_m", "field_T", "monitor", "x", "y", "image", *_SIZE_KEYS, "comment")


def read_scan(folder: str | Path) -> ScanSpec:
    """Read a scan folder (or its ``scan.json``) and load every step's data.

    Parameters
    ----------
    folder : str or Path
        The scan folder, in the format of the module docstring.

    Returns
    -------
    ScanSpec
        With each step's profiles (``profile_x``/``profile_y``), frame or sizes
        loaded and converted to SI.

    Raises
    ------
    diagnostics.errors.InputError
        One line naming ``scan.json`` (or a step's file), the field, and what
        was expected.
    """
    base = Path(folder)
    if base.name == MANIFEST and base.is_file():
        base = base.parent
    if not base.is_dir():
        raise located(base, "not a folder (expected a scan folder holding scan.json)")
    manifest = base / MANIFEST
    if not manifest.is_file():
        raise located(base, f"no {MANIFEST} in the folder (expected a scan folder)")
    doc = _util.read_json_object(manifest, "a scan description")
    ctx = _Context(base, manifest)
    ctx.known(doc, _TOP_KEYS, "")

    name = doc.get("name")
    if not isinstance(name, str) or not name.strip():
        raise ctx.error("name", "expected the scan's name as text" if "name" in doc else "missing (expected text)")
    timestamp = _util.parse_time(ctx.require(doc, "timestamp"), manifest, "field 'timestamp'")
    ctx = dataclasses.replace(ctx, timestamp=timestamp)
    particle = _particle(ctx, ctx.require(doc, "particle"))
    energy = _util.finite_number(ctx.require(doc, "kinetic_energy_MeV"), manifest,
                                 "field 'kinetic_energy_MeV'", minimum=0.0)
    spread = doc.get("energy_spread")
    if spread is not None:
        spread = _util.finite_number(spread, manifest, "field 'energy_spread'", minimum=0.0, strict=False)

    kind, magnet = _magnet(ctx, doc)
    if kind == "multi_monitor":
        if "transport" in doc:
            raise ctx.error("transport", "only quadrupole and solenoid scans have a transport "
                                         "(a multi-monitor measurement gives matrix_x/matrix_y per monitor)")
        if "monitor" in doc:
            raise ctx.error("monitor", "a multi-monitor measurement lists 'monitors' (or add a quadrupole/solenoid)")
        monitors = _monitors(ctx, ctx.require(doc, "monitors"))
        transport_x = transport_y = None
    else:
        if "monitors" in doc:
            raise ctx.error("monitors", f"a {kind} scan has one 'monitor' (or drop the {kind} for a multi-monitor measurement)")
        transport_x, transport_y = _transport(ctx, ctx.require(doc, "transport"))
        monitors = (_monitor(ctx, ctx.require(doc, "monitor"), "monitor", with_matrices=False),)
    design = _design(ctx, doc.get("design"))

    expected = doc.get("expected_steps")
    if expected is not None:
        expected = _util.integer(expected, manifest, "field 'expected_steps'", minimum=1)
    marker = (base / COMPLETE_MARKER).exists()
    raw_steps = ctx.require(doc, "steps")
    if not isinstance(raw_steps, list):
        raise ctx.error("steps", f"expected a list of steps, found {type(raw_steps).__name__}")
    complete = marker or expected is None or len(raw_steps) >= expected
    if not raw_steps and complete:
        raise ctx.error("steps", "is empty (expected at least one step, or expected_steps for a scan in progress)")
    steps = tuple(_step(ctx, kind, monitors, i, raw) for i, raw in enumerate(raw_steps))

    return ScanSpec(kind=kind, name=name.strip(), timestamp=timestamp, particle=particle,  # type: ignore[arg-type]
                    kinetic_energy_MeV=energy, magnet=magnet, transport_x=transport_x,
                    transport_y=transport_y, monitors=monitors, steps=steps, design=design,
                    energy_spread=spread, expected_steps=expected, complete=complete, folder=str(base))


@dataclasses.dataclass(frozen=True)
class _Context:
    """Where we are: the folder and its manifest, for paths and messages."""

    folder: Path
    manifest: Path
    timestamp: Any = None  # the scan's time: profiles without their own take it

    def error(self, field: str, message: str):
        return located(self.manifest, f"field {field!r}: {message}")

    def require(self, mapping: Mapping[str, Any], key: str, prefix: str = "") -> Any:
        if key not in mapping or mapping[key] is None:
            raise located(self.manifest, f"field {prefix + key!r} missing{_util.did_you_mean(key, mapping)}")
        return mapping[key]

    def known(self, mapping: Mapping[str, Any], keys: tuple[str, ...], prefix: str) -> None:
        for key in mapping:
            if key not in keys:
                raise located(self.manifest, f"unknown field {prefix + str(key)!r}{_util.did_you_mean(str(key), keys)}"
                                             f" (expected some of {', '.join(keys)})")

    def obj(self, value: Any, field: str) -> Mapping[str, Any]:
        if not isinstance(value, dict):
            raise self.error(field, f"expected an object {{...}}, found {value!r}")
        return value


def _particle(ctx: _Context, value: Any) -> ParticleSpec:
    if isinstance(value, str):
        name = value.strip().lower()
        if name not in PARTICLES:
            raise ctx.error("particle", f"unknown particle {value!r}{_util.did_you_mean(name, PARTICLES)} "
                                        f"(expected one of {', '.join(PARTICLES)}, or {{\"mass_MeV\": ..., \"charge\": ...}})")
        return ParticleSpec(name=name)
    spec = ctx.obj(value, "particle")
    ctx.known(spec, ("mass_MeV", "mass_u", "charge"), "particle.")
    if ("mass_MeV" in spec) == ("mass_u" in spec):
        raise ctx.error("particle", "an ion needs exactly one of mass_MeV or mass_u, with charge")
    key = "mass_MeV" if "mass_MeV" in spec else "mass_u"
    mass = _util.finite_number(spec[key], ctx.manifest, f"field 'particle.{key}'", minimum=0.0)
    charge = _util.integer(ctx.require(spec, "charge", "particle."), ctx.manifest, "field 'particle.charge'")
    if charge == 0:
        raise ctx.error("particle.charge", "expected a non-zero charge state (units of e)")
    return ParticleSpec(name="ion", charge=charge, **{key: mass})


def _magnet(ctx: _Context, doc: Mapping[str, Any]) -> tuple[str, Magnet | None]:
    present = [k for k in ("quadrupole", "solenoid") if k in doc]
    if len(present) > 1:
        raise located(ctx.manifest, "fields 'quadrupole' and 'solenoid' both given (expected one scanned magnet)")
    if not present:
        return "multi_monitor", None
    kind = present[0]
    spec = ctx.obj(doc[kind], kind)
    ctx.known(spec, ("name", "length_m"), f"{kind}.")
    name = ctx.require(spec, "name", f"{kind}.")
    if not isinstance(name, str) or not name.strip():
        raise ctx.error(f"{kind}.name", f"expected the magnet's name as text, found {name!r}")
    length = _util.finite_number(ctx.require(spec, "length_m", f"{kind}."), ctx.manifest,
                                 f"field '{kind}.length_m'", minimum=0.0)
    return kind, Magnet(kind=kind, name=name.strip(), length_m=length)  # type: ignore[arg-type]


def _matrix(ctx: _Context, value: Any, field: str) -> np.ndarray:
    ok = (isinstance(value, list) and len(value) == 2
          and all(isinstance(row, list) and len(row) == 2 for row in value))
    if not ok:
        raise ctx.error(field, f"expected a 2x2 matrix [[m11, m12], [m21, m22]], found {value!r}")
    return np.array([[_util.finite_number(v, ctx.manifest, f"field '{field}[{i}][{j}]'")
                      for j, v in enumerate(row)] for i, row in enumerate(value)], dtype=np.float64)


def _transport(ctx: _Context, value: Any) -> tuple[np.ndarray, np.ndarray]:
    spec = ctx.obj(value, "transport")
    ctx.known(spec, ("drift_m", "matrix_x", "matrix_y"), "transport.")
    if "drift_m" in spec:
        if "matrix_x" in spec or "matrix_y" in spec:
            raise ctx.error("transport", "give either drift_m or matrix_x and matrix_y, not both")
        d = _util.finite_number(spec["drift_m"], ctx.manifest, "field 'transport.drift_m'", minimum=0.0, strict=False)
        drift = np.array([[1.0, d], [0.0, 1.0]])  # field-free drift of length d
        return drift, drift.copy()
    if "matrix_x" not in spec or "matrix_y" not in spec:
        raise ctx.error("transport", "expected drift_m, or both matrix_x and matrix_y")
    return _matrix(ctx, spec["matrix_x"], "transport.matrix_x"), _matrix(ctx, spec["matrix_y"], "transport.matrix_y")


def _monitor(ctx: _Context, value: Any, field: str, *, with_matrices: bool) -> Monitor:
    spec = ctx.obj(value, field)
    keys = ("name", "resolution_m", "matrix_x", "matrix_y") if with_matrices else ("name", "resolution_m")
    ctx.known(spec, keys, f"{field}.")
    name = ctx.require(spec, "name", f"{field}.")
    if not isinstance(name, str) or not name.strip():
        raise ctx.error(f"{field}.name", f"expected the monitor's name as text, found {name!r}")
    resolution = _util.finite_number(spec.get("resolution_m", 0.0), ctx.manifest, f"field '{field}.resolution_m'",
                                     minimum=0.0, strict=False)
    if not with_matrices:
        return Monitor(name=name.strip(), resolution_m=resolution)
    mx = _matrix(ctx, ctx.require(spec, "matrix_x", f"{field}."), f"{field}.matrix_x")
    my = _matrix(ctx, ctx.require(spec, "matrix_y", f"{field}."), f"{field}.matrix_y")
    return Monitor(name=name.strip(), resolution_m=resolution, matrix_x=mx, matrix_y=my)


def _monitors(ctx: _Context, value: Any) -> tuple[Monitor, ...]:
    if not isinstance(value, list) or not value:
        raise ctx.error("monitors", f"expected a non-empty list of monitors, found {value!r}")
    monitors = tuple(_monitor(ctx, m, f"monitors[{i}]", with_matrices=True) for i, m in enumerate(value))
    names = [m.name for m in monitors]
    for i, n in enumerate(names):
        if n in names[:i]:
            raise ctx.error(f"monitors[{i}].name", f"monitor {n!r} listed twice")
    return monitors


def _design(ctx: _Context, value: Any) -> dict[str, DesignTwiss]:
    if value is None:
        return {}
    spec = ctx.obj(value, "design")
    ctx.known(spec, ("x", "y"), "design.")
    design = {}
    for plane, twiss in spec.items():
        t = ctx.obj(twiss, f"design.{plane}")
        ctx.known(t, ("beta_m", "alpha"), f"design.{plane}.")
        beta = _util.finite_number(ctx.require(t, "beta_m", f"design.{plane}."), ctx.manifest,
                                   f"field 'design.{plane}.beta_m'", minimum=0.0)
        alpha = _util.finite_number(ctx.require(t, "alpha", f"design.{plane}."), ctx.manifest,
                                    f"field 'design.{plane}.alpha'")
        design[plane] = DesignTwiss(beta_m=beta, alpha=alpha)
    return design


def _step(ctx: _Context, kind: str, monitors: tuple[Monitor, ...], index: int, value: Any) -> ScanStep:
    where = f"steps[{index}]"
    spec = ctx.obj(value, where)
    ctx.known(spec, _STEP_KEYS, f"{where}.")
    allowed = STRENGTHS[kind]
    given = [k for k in ("k1_per_m2", "gradient_T_per_m", "field_T", "monitor") if k in spec]
    wrong = [k for k in given if k not in allowed]
    if wrong:
        raise ctx.error(f"{where}.{wrong[0]}", f"not a setting of a {kind.replace('_', '-')} scan "
                                               f"(expected {' or '.join(allowed)})")
    if len(given) != 1:
        found = f"found {' and '.join(given)}" if given else "found none"
        raise ctx.error(where, f"expected exactly one of {', '.join(allowed)} ({found})")
    strength = given[0]
    values: dict[str, Any] = {}
    monitor = monitors[0]
    if strength == "monitor":
        names = [m.name for m in monitors]
        if spec["monitor"] not in names:
            raise ctx.error(f"{where}.monitor", f"unknown monitor {spec['monitor']!r}"
                                                f"{_util.did_you_mean(str(spec['monitor']), names)} (expected one of {', '.join(names)})")
        monitor = monitors[names.index(spec["monitor"])]
        values["monitor"] = monitor.name
    else:
        values[strength] = _util.finite_number(spec[strength], ctx.manifest, f"field '{where}.{strength}'")

    sources = [s for s, keys in (("profiles", ("x", "y")), ("image", ("image",)), ("sizes", _SIZE_KEYS))
               if any(k in spec for k in keys)]
    if len(sources) != 1:
        found = f"found {' and '.join(sources)}" if sources else "found none"
        raise ctx.error(where, f"expected one size source: x/y profile files, an image, or sigma_x_m/sigma_y_m ({found})")
    if sources[0] == "profiles":
        for plane in ("x", "y"):
            if plane in spec:
                values[f"profile_{plane}"] = _profile(ctx, spec[plane], f"{where}.{plane}", plane, monitor.name)
    elif sources[0] == "image":
        image = _util.inside(ctx.folder, spec["image"], ctx.manifest, f"{where}.image")
        if not image.is_file():
            raise ctx.error(f"{where}.image", f"image {spec['image']!r} not found in the scan folder")
        values["frame"] = read_frame(image)
    else:
        if "sigma_x_m" not in spec and "sigma_y_m" not in spec:
            raise ctx.error(where, "sizes need sigma_x_m and/or sigma_y_m")
        for plane in ("x", "y"):
            if f"sigma_{plane}_err_m" in spec and f"sigma_{plane}_m" not in spec:
                raise ctx.error(f"{where}.sigma_{plane}_err_m", f"given without sigma_{plane}_m")
            if f"sigma_{plane}_m" in spec:
                values[f"sigma_{plane}_m"] = _util.finite_number(
                    spec[f"sigma_{plane}_m"], ctx.manifest, f"field '{where}.sigma_{plane}_m'", minimum=0.0)
            if f"sigma_{plane}_err_m" in spec:
                values[f"sigma_{plane}_err_m"] = _util.finite_number(
                    spec[f"sigma_{plane}_err_m"], ctx.manifest, f"field '{where}.sigma_{plane}_err_m'",
                    minimum=0.0, strict=False)
    return ScanStep(index=index, **values)


def _profile(ctx: _Context, value: Any, field: str, plane: str, monitor: str) -> Profile:
    path = _util.inside(ctx.folder, value, ctx.manifest, field)
    if not path.is_file():
        raise ctx.error(field, f"profile {value!r} not found in the scan folder")
    profile, device_given = read_profile_with_origin(path, plane=plane, timestamp=ctx.timestamp)
    if profile.plane != plane:
        raise ctx.error(field, f"{value!r} measures plane {profile.plane} (expected plane {plane})")
    if not device_given:
        profile = dataclasses.replace(profile, device=monitor)
    return profile


def is_scan_folder(path: str | Path) -> bool:
    """Whether ``path`` is a folder holding a ``scan.json``."""
    p = Path(path)
    return p.is_dir() and (p / MANIFEST).is_file()


__all__ = ["COMPLETE_MARKER", "MANIFEST", "PARTICLES", "STRENGTHS", "is_scan_folder", "read_scan"]
