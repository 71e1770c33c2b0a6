"""The data model of raw measurements, shared by readers, the store and analysis.

Readers build these from files, the store writes and reads them back, and the
analysis front-ends (:mod:`diagnostics.emittance`, ...) take them as plain
arrays and numbers.  Everything is in SI units and UTC (see :mod:`diagnostics`).

Table contracts (pandas DataFrames, long form)
-----------------------------------------------
BPM readings
    ``timestamp`` (datetime64[ns, UTC]), ``bpm`` (str), ``x_m``, ``y_m`` (float64),
    ``sum`` (float64, NaN where the source gave none); any extra input column is kept.
Slow channels
    ``timestamp`` (datetime64[ns, UTC]), ``channel`` (str), ``value`` (float64),
    ``unit`` (str, as given: ``degC``, ``A``, ...).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import pandas as pd

BPM_COLUMNS = ("timestamp", "bpm", "x_m", "y_m", "sum")
SLOW_COLUMNS = ("timestamp", "channel", "value", "unit")

Plane = Literal["x", "y", "u"]
PLANES = ("x", "y", "u")


@dataclass(frozen=True, eq=False)
class Profile:
    """One wire-scanner profile.

    Attributes
    ----------
    device : str
        Scanner name, e.g. ``"WS-02"``.
    plane : {"x", "y", "u"}
        Measured plane; ``u`` is a tilted wire whose normal is at ``wire_angle_rad``
        from +x toward +y.
    wire_angle_rad : float
        Angle of the wire normal from +x: 0 for ``x``, pi/2 for ``y``.
    timestamp : pandas.Timestamp
        Time of the scan, timezone-aware UTC.
    position_m : ndarray, shape (n_points,)
        Wire position along the wire normal, strictly increasing, metres.
    signal : ndarray, shape (n_points,)
        Detector signal (arbitrary units, float64).
    source : str
        Where the profile came from (file path as given, or ``store``).
    metadata : mapping
        Any other ``# key: value`` header lines, verbatim.
    """

    device: str
    plane: Plane
    wire_angle_rad: float
    timestamp: pd.Timestamp
    position_m: np.ndarray
    signal: np.ndarray
    source: str = ""
    metadata: Mapping[str, str] = field(default_factory=dict)


@dataclass(frozen=True, eq=False)
class Frame:
    """One screen (camera) image.

    Attributes
    ----------
    device : str
        Screen name, e.g. ``"SCR-02"``.
    timestamp : pandas.Timestamp
        Acquisition time, UTC.
    pixels : ndarray, shape (rows, cols)
        Raw pixel values in their stored dtype (uint8, uint16 or float); x runs
        along columns, y along rows.
    pixel_size_m : tuple of float
        ``(x, y)`` pixel pitch on the screen, metres per pixel.
    bit_depth : int or None
        Sensor bit depth (e.g. 12 for a 12-bit sensor in a 16-bit container);
        ``None`` when unknown.
    dark : ndarray or None, shape (rows, cols)
        Dark (background) frame taken at the same settings, or ``None``.
    roi : tuple of int or None
        ``(x_min, y_min, x_max, y_max)`` in pixels, half-open, or ``None``.
    source : str
        File path as given, or ``store``.
    metadata : mapping
        Other sidecar fields, verbatim.
    """

    device: str
    timestamp: pd.Timestamp
    pixels: np.ndarray
    pixel_size_m: tuple[float, float]
    bit_depth: int | None = None
    dark: np.ndarray | None = None
    roi: tuple[int, int, int, int] | None = None
    source: str = ""
    metadata: Mapping[str, object] = field(default_factory=dict)


@dataclass(frozen=True)
class ParticleSpec:
    """The beam's particle as a scan file gives it.

    ``name`` is ``"electron"``, ``"positron"``, ``"proton"`` or ``"ion"``; for an ion,
    ``mass_MeV`` (rest energy) or ``mass_u`` is given with ``charge`` (charge state,
    in units of e, signed).  :mod:`diagnostics.particles` turns it into kinematics.
    """

    name: str
    mass_MeV: float | None = None
    mass_u: float | None = None
    charge: int | None = None


@dataclass(frozen=True)
class Magnet:
    """The scanned magnet: ``kind`` is ``"quadrupole"`` or ``"solenoid"``."""

    kind: Literal["quadrupole", "solenoid"]
    name: str
    length_m: float


@dataclass(frozen=True, eq=False)
class Monitor:
    """A profile monitor (wire scanner or screen).

    ``matrix_x``/``matrix_y`` (2x2) are the fixed optics from the reference point to
    this monitor; for a quad or solenoid scan they are the transport from the magnet
    exit and may be ``None`` on the monitor (the scan's ``transport`` gives them).
    """

    name: str
    resolution_m: float = 0.0
    matrix_x: np.ndarray | None = None
    matrix_y: np.ndarray | None = None


@dataclass(frozen=True)
class DesignTwiss:
    """Design Twiss parameters of one plane at the reconstruction point."""

    beta_m: float
    alpha: float


@dataclass(frozen=True, eq=False)
class ScanStep:
    """One setting of a scan (one of several shots when settings repeat).

    Exactly one strength is set for quad and solenoid scans (``k1_per_m2``,
    ``gradient_T_per_m`` or ``field_T``); a multi-monitor step names ``monitor``.
    The size comes from per-plane ``profile_x``/``profile_y``, from one ``frame``,
    or from sizes already measured (``sigma_x_m``/``sigma_y_m``, with optional
    ``sigma_x_err_m``/``sigma_y_err_m``).
    """

    index: int
    k1_per_m2: float | None = None
    gradient_T_per_m: float | None = None
    field_T: float | None = None
    monitor: str | None = None
    profile_x: Profile | None = None
    profile_y: Profile | None = None
    frame: Frame | None = None
    sigma_x_m: float | None = None
    sigma_y_m: float | None = None
    sigma_x_err_m: float | None = None
    sigma_y_err_m: float | None = None


@dataclass(frozen=True, eq=False)
class ScanSpec:
    """A quad scan, solenoid scan or multi-monitor measurement, fully loaded.

    Attributes
    ----------
    kind : {"quadrupole", "solenoid", "multi_monitor"}
    name, timestamp : str, pandas.Timestamp (UTC)
    particle : ParticleSpec
    kinetic_energy_MeV : float
        Total kinetic energy of one particle, MeV.
    energy_spread : float or None
        Relative rms momentum spread, if the file gives it (``energy_spread``).
    magnet : Magnet or None
        The scanned magnet (``None`` for multi-monitor measurements).
    transport_x, transport_y : ndarray (2, 2) or None
        Fixed optics from the magnet exit to the monitor (quad/solenoid scans).
    monitors : tuple of Monitor
        One monitor for quad/solenoid scans; several for multi-monitor.
    design : mapping plane -> DesignTwiss
        Optional design optics at the reconstruction point.
    steps : tuple of ScanStep
    expected_steps : int or None
        How many steps the scan will have (``expected_steps`` in scan.json).
    complete : bool
        True when a ``complete`` marker file exists or ``expected_steps`` are present
        (or when neither is given: a folder is then taken as it is).
    folder : str
        The scan folder as given.
    """

    kind: Literal["quadrupole", "solenoid", "multi_monitor"]
    name: str
    timestamp: pd.Timestamp
    particle: ParticleSpec
    kinetic_energy_MeV: float
    magnet: Magnet | None
    transport_x: np.ndarray | None
    transport_y: np.ndarray | None
    monitors: tuple[Monitor, ...]
    steps: tuple[ScanStep, ...]
    design: Mapping[str, DesignTwiss] = field(default_factory=dict)
    energy_spread: float | None = None
    expected_steps: int | None = None
    complete: bool = True
    folder: str = ""
