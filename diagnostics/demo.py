"""The invented demo scenario: one shift on the "Kestrel Bay test linac".

Kestrel Bay is a made-up 150 MeV electron injector line used to show and test
beamdiag end to end.  It has 24 BPMs (``BPM-01`` ... ``BPM-24``), two wire
scanners (``WS-01``, ``WS-02``), three screens (``SCR-01`` ... ``SCR-03``),
quadrupoles ``Q-01`` ... ``Q-12``, one horizontal corrector ``HC-08`` and four
tunnel air temperature sensors (``T-01`` ... ``T-04``).  The shift runs
06:00-14:00 UTC on 2026-11-30 and contains these events (all numbers invented
but physically plausible):

* the tunnel air warms by 0.4 degC and cools again (a raised-cosine swing that
  peaks at 10:00); every BPM follows its nearest sensor with a fixed
  micrometre-per-degree coefficient and a 25-minute thermal lag;
* at 10:42:00 the corrector ``HC-08`` steps from 0.850 A to 0.900 A, which kicks
  the beam: BPM-09 onward show a betatron-like step pattern of amplitude 35 um
  (BPM-09 itself moves by 35 um), upstream BPMs see nothing;
* a 1.8 Hz vibration line of a few micrometres on ``BPM-05`` and ``BPM-06``;
* from 11:20 to 11:35 a 2 % transmission loss between BPM-15 and BPM-16: the sum
  signals of BPM-16 ... BPM-24 drop by 2 %;
* BPM noise of 2-4 um rms per reading, 10 Hz readings;
* wire scans (x and y) on both scanners every 30 minutes;
* one screen image per minute, rotating over the three screens (12-bit camera
  in a 16-bit PNG, a dark frame per screen, a tilted Gaussian spot on SCR-01 and
  SCR-03, Poisson noise, a few hot pixels and radiation hits);
* two quadrupole scans: 08:15 on ``Q-05`` measured with ``WS-02`` (profiles per
  step) and 12:30 on ``Q-07`` measured with ``SCR-02`` (an image per step), with
  true normalised emittances of 1.2 mm mrad (x) and 0.9 mm mrad (y).

The machine itself (BPM offsets, coefficients, noise levels, optics) is fixed;
the ``seed`` only changes the random noise, so the story is the same for every
seed and the output is byte-for-byte the same for the same seed.  The true
values the analysis should recover are written to ``truth.json`` next to the
raw inputs, never into the input files themselves.

Raw-input layout written by :func:`generate_raw`::

    OUT/bpm/bpm_2026-11-30T06.parquet ...   one Parquet file per hour (long form)
    OUT/slow/slow_2026-11-30.csv            temperatures and corrector current, every 10 s
    OUT/wire/WS-01_x_20261130T060000Z.csv   one wire profile per file
    OUT/screens/SCR-01_20261130T060000Z.png (+ .json sidecar); dark frames in OUT/screens/darks/
    OUT/scans/<name>/scan.json              the two quad-scan folders
    OUT/truth.json                          the true scenario parameters

Conventions are those of :mod:`diagnostics` (SI inside, UTC, ``k1 > 0``
focuses in x).  The files themselves use the input formats of the README
(positions in mm in CSV and BPM files, as operators' tools write them).
"""

from __future__ import annotations

import functools
import json
import math
import shutil
import time
from collections.abc import Callable, Collection, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
from PIL import Image
from scipy.constants import physical_constants

from diagnostics.errors import InputError

DEFAULT_SEED = 20261130
DEFAULT_DATE = "2026-11-30"

#: Shift start (UTC, on the demo date) and length.
SHIFT_START = "06:00"
SHIFT_HOURS = 8.0

#: What :func:`generate_raw` can produce; ``sources=`` picks a subset.
SOURCES = ("bpm", "slow", "wire", "screens", "scans")

BPMS = tuple(f"BPM-{i:02d}" for i in range(1, 25))
WIRE_SCANNERS = ("WS-01", "WS-02")
SCREENS = ("SCR-01", "SCR-02", "SCR-03")
QUADRUPOLES = tuple(f"Q-{i:02d}" for i in range(1, 13))
TEMPERATURE_SENSORS = ("T-01", "T-02", "T-03", "T-04")
CORRECTOR = "HC-08"

KINETIC_ENERGY_MEV = 150.0
#: True normalised rms emittances of the beam, m rad (1.2 and 0.9 mm mrad).
NORM_EMITTANCE_M_RAD = {"x": 1.2e-6, "y": 0.9e-6}

#: Fixed seed of the machine layout (offsets, coefficients, noise levels):
#: the machine does not change with the noise seed.
_LAYOUT_SEED = 7_2026

BPM_RATE_HZ = 10.0

#: Tunnel air temperature: baseline per sensor (degC), the swing's peak-to-peak
#: size, and each sensor's delay along the tunnel (air flows downstream).
TEMPERATURE: dict[str, Any] = {
    "baseline_degC": {"T-01": 22.10, "T-02": 22.35, "T-03": 21.90, "T-04": 22.55},
    "swing_degC": 0.4,
    "peak_time": "10:00",
    "sensor_delay_s": {"T-01": 0.0, "T-02": 240.0, "T-03": 480.0, "T-04": 720.0},
    "noise_degC": 0.003,
}
#: The BPM supports follow the air with this lag (pure delay), seconds.
THERMAL_LAG_S = 1500.0
#: A loose support: this BPM's horizontal coefficient is much larger than the rest.
WORST_THERMAL_BPM = "BPM-17"
WORST_THERMAL_COEFF_M_PER_K = 28e-6

STEP: dict[str, Any] = {
    "time": "10:42:00",
    "first_bpm": "BPM-09",
    "plane": "x",
    "amplitude_m": 35e-6,
    "corrector_current_A": (0.850, 0.900),
}
VIBRATION: dict[str, Any] = {
    "frequency_Hz": 1.8,
    "amplitude_x_m": {"BPM-05": 3.0e-6, "BPM-06": 4.0e-6},
    "amplitude_y_m": {"BPM-05": 1.0e-6, "BPM-06": 1.2e-6},
    "phase_rad": {"BPM-05": 0.0, "BPM-06": 0.4},
}
TRANSMISSION_DROP: dict[str, Any] = {
    "start": "11:20:00",
    "end": "11:35:00",
    "fraction": 0.02,
    "first_bpm": "BPM-16",
}
#: Shot-to-shot bunch-charge jitter (common to all BPMs) and per-BPM sum noise.
CHARGE_JITTER = 0.005
SUM_NOISE = 0.002
SUM_COUNTS = 1.0e4

#: Wire scanners: design beta at the wire (m), wire resolution (rms, m), scan
#: times (minutes after each full and half hour).
WIRE: dict[str, dict[str, Any]] = {
    "WS-01": {"beta_x_m": 11.0, "beta_y_m": 7.0, "offset_m": (0.12e-3, -0.05e-3), "minute": 0},
    "WS-02": {"offset_m": (-0.08e-3, 0.10e-3), "minute": 2},
}
WIRE_RESOLUTION_M = 1.0e-5
WIRE_POINTS = 151
WIRE_PERIOD_S = 1800.0

#: Screens: pixel pitch (m), spot size (rms, m) and x-y correlation; SCR-02's
#: size comes from the Q-07 optics at its nominal setting.
SCREEN: dict[str, dict[str, Any]] = {
    "SCR-01": {"pixel_size_m": 2.0e-5, "sigma_m": (420e-6, 260e-6), "rho": 0.35},
    "SCR-02": {"pixel_size_m": 1.5e-5, "rho": 0.0},
    "SCR-03": {"pixel_size_m": 2.5e-5, "sigma_m": (310e-6, 380e-6), "rho": -0.25},
}
SCREEN_RESOLUTION_M = 2.5e-5
FRAME_SHAPE = (480, 640)
FRAME_BIT_DEPTH = 12
FRAME_PERIOD_S = 60.0
#: Camera dark level and noise (counts), peak spot height (counts, the camera
#: gain keeps it well below the 4095 full scale), hot pixels and hits per frame.
DARK_LEVEL = 100.0
DARK_PATTERN_RMS = 2.0
READ_NOISE = 1.5
SPOT_PEAK = 1800.0
HOT_PIXELS = 3
HITS_PER_FRAME = 4

#: The two quadrupole scans.  Twiss parameters are the true ones at the
#: quadrupole entrance (the reconstruction point); ``design`` is what the
#: optics model expects there (the beam is mismatched a little on purpose).
SCANS: dict[str, dict[str, Any]] = {
    "Q-05": {
        "name": "Q-05 scan at WS-02",
        "folder": "2026-11-30T0815_Q-05_WS-02",
        "time": "08:15:00",
        "monitor": "WS-02",
        "length_m": 0.2,
        "nominal_k1_per_m2": 1.2,
        "transport": {"drift_m": 4.0},
        "true": {"x": {"beta_m": 9.0, "alpha": -1.1}, "y": {"beta_m": 6.5, "alpha": 0.9}},
        "design": {"x": {"beta_m": 8.0, "alpha": -1.0}, "y": {"beta_m": 7.0, "alpha": 0.8}},
        "k1_per_m2": tuple(np.round(np.linspace(-2.4, 4.8, 13), 4)),
        "shots": 2,
        "shot_interval_s": 20.0,
        "resolution_m": WIRE_RESOLUTION_M,
    },
    "Q-07": {
        "name": "Q-07 scan at SCR-02",
        "folder": "2026-11-30T1230_Q-07_SCR-02",
        "time": "12:30:00",
        "monitor": "SCR-02",
        "length_m": 0.2,
        "nominal_k1_per_m2": 0.5,
        # drift 1.5 m, the fixed quadrupole Q-08 (k1 = -1.5 /m^2, 0.2 m), drift 2.5 m
        "transport": {"elements": (("drift", 1.5), ("quad", -1.5, 0.2), ("drift", 2.5))},
        "true": {"x": {"beta_m": 12.0, "alpha": 1.4}, "y": {"beta_m": 7.0, "alpha": -0.6}},
        "design": {"x": {"beta_m": 11.0, "alpha": 1.2}, "y": {"beta_m": 7.5, "alpha": -0.5}},
        "k1_per_m2": tuple(np.round(np.linspace(-3.0, 4.0, 11), 4)),
        "shots": 3,
        "shot_interval_s": 15.0,
        "resolution_m": SCREEN_RESOLUTION_M,
    },
}
SCANS_ORDER = tuple(SCANS)

#: Nominal strengths of the line's quadrupoles, k1 in 1/m^2 (alternating
#: focusing); Q-05 and Q-07 are the scanned magnets at their nominal settings
#: and Q-08 is the fixed quadrupole inside the Q-07 scan's transport.
QUADRUPOLE_K1_PER_M2 = {
    "Q-01": 2.1, "Q-02": -1.9, "Q-03": 2.0, "Q-04": -1.8,
    "Q-05": SCANS["Q-05"]["nominal_k1_per_m2"], "Q-06": -1.6,
    "Q-07": SCANS["Q-07"]["nominal_k1_per_m2"], "Q-08": -1.5,
    "Q-09": 1.9, "Q-10": -1.7, "Q-11": 1.8, "Q-12": -1.8,
}  # fmt: skip
QUADRUPOLE_LENGTH_M = 0.2

#: Shot-to-shot jitter of the beam size during a scan (relative, rms).
SCAN_SIZE_JITTER = 0.015

#: Wire-profile signal model: baseline, slope per mm, peak height, noise (a.u.).
WIRE_SIGNAL = {"baseline": 15.0, "slope_per_mm": 0.5, "peak": 800.0, "noise": 4.0, "jitter": 0.01}


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class DemoManifest:
    """What :func:`generate_raw` wrote.

    Attributes
    ----------
    root : Path
        The output folder.
    bpm_files, slow_files, wire_files, frame_files, dark_files : tuple of Path
        Raw input files by source (``frame_files`` are the PNG images; each has a
        ``.json`` sidecar of the same stem).
    scan_folders : tuple of Path
        The quad-scan folders (each with ``scan.json``).
    truth_file : Path
        ``truth.json``: the true parameters of the scenario.
    n_bpm_readings : int
        BPM readings written (one reading = one BPM at one time).
    seed : int
        Noise seed used.
    start, end : pandas.Timestamp
        The generated time window (UTC, end exclusive).
    """

    root: Path
    bpm_files: tuple[Path, ...]
    slow_files: tuple[Path, ...]
    wire_files: tuple[Path, ...]
    frame_files: tuple[Path, ...]
    dark_files: tuple[Path, ...]
    scan_folders: tuple[Path, ...]
    truth_file: Path
    n_bpm_readings: int
    seed: int
    start: pd.Timestamp
    end: pd.Timestamp

    @property
    def inputs(self) -> list[Path]:
        """Everything an ingest should take, in time-independent source order.

        Dark frames are not listed: they are read through the sidecars that name them.
        """
        return [
            *self.bpm_files,
            *self.slow_files,
            *self.wire_files,
            *self.frame_files,
            *self.scan_folders,
        ]


@dataclass(frozen=True)
class DemoSummary:
    """What :func:`build_demo_store` did.

    Attributes
    ----------
    store_root, raw_dir : Path
    manifest : DemoManifest
    ingest : object
        The store's ``IngestSummary``.
    analysis : object or None
        What ``diagnostics.pipeline.analyze_store`` returned, or ``None`` when the
        pipeline is not available (``message`` says so).
    timings_s : mapping
        Seconds spent in ``generate``, ``ingest``, ``analyse`` and ``total``.
    message : str
    """

    store_root: Path
    raw_dir: Path
    manifest: DemoManifest
    ingest: Any
    analysis: Any
    timings_s: Mapping[str, float] = field(default_factory=dict)
    message: str = ""


# --------------------------------------------------------------------------- kinematics and optics


def beta_gamma(kinetic_energy_MeV: float = KINETIC_ENERGY_MEV) -> float:
    """Relativistic beta*gamma of an electron of the given kinetic energy.

    ``gamma = 1 + T/(m c^2)``, ``beta*gamma = sqrt(gamma^2 - 1)``, with the electron
    rest energy from CODATA via :mod:`scipy.constants`.
    """
    rest_MeV = physical_constants["electron mass energy equivalent in MeV"][0]
    gamma = 1.0 + kinetic_energy_MeV / rest_MeV
    return math.sqrt(gamma * gamma - 1.0)


def geometric_emittance_m_rad(plane: str) -> float:
    """True geometric rms emittance of the demo beam in ``plane`` (m rad)."""
    return NORM_EMITTANCE_M_RAD[plane] / beta_gamma()


def drift_matrix(length_m: float) -> np.ndarray:
    """2x2 transfer matrix of a field-free drift."""
    return np.array([[1.0, length_m], [0.0, 1.0]])


def quad_matrix(k1_per_m2: float, length_m: float) -> np.ndarray:
    """2x2 hard-edge thick-quadrupole matrix for one plane (k > 0 focuses).

    Wiedemann, *Particle Accelerator Physics* (Springer), the thick-lens
    quadrupole matrices; ``k = 0`` is a drift.
    """
    if abs(k1_per_m2) * length_m**2 < 1e-12:
        return drift_matrix(length_m)
    root = math.sqrt(abs(k1_per_m2))
    phi = root * length_m
    if k1_per_m2 > 0:
        c, s = math.cos(phi), math.sin(phi)
        return np.array([[c, s / root], [-root * s, c]])
    c, s = math.cosh(phi), math.sinh(phi)
    return np.array([[c, s / root], [root * s, c]])


def transport_matrices(transport: Mapping[str, Any]) -> dict[str, np.ndarray]:
    """Per-plane matrices of a scan's fixed transport (quad exit to monitor)."""
    if "drift_m" in transport:
        m = drift_matrix(float(transport["drift_m"]))
        return {"x": m, "y": m.copy()}
    out = {}
    for plane, sign in (("x", 1.0), ("y", -1.0)):
        m = np.eye(2)
        for element in transport["elements"]:
            if element[0] == "drift":
                m = drift_matrix(element[1]) @ m
            else:  # ("quad", k1, length): the y plane sees -k1
                m = quad_matrix(sign * element[1], element[2]) @ m
        out[plane] = m
    return out


def beam_matrix(emittance_m_rad: float, beta_m: float, alpha: float) -> np.ndarray:
    """Sigma matrix ``eps * [[beta, -alpha], [-alpha, gamma]]`` of one plane."""
    gamma = (1.0 + alpha * alpha) / beta_m
    return emittance_m_rad * np.array([[beta_m, -alpha], [-alpha, gamma]])


def scan_sizes_m(scan: str, k1_per_m2: Sequence[float] | np.ndarray, plane: str) -> np.ndarray:
    """True rms beam size at the monitor of ``scan`` (no resolution), shape ``(n,)``.

    ``sigma^2 = (R Sigma0 R^T)_11`` with ``R = T Q(k)``, ``Q`` the thick quadrupole
    (``k`` in x, ``-k`` in y) and ``T`` the fixed transport.
    """
    spec = SCANS[scan]
    twiss = spec["true"][plane]
    sigma0 = beam_matrix(geometric_emittance_m_rad(plane), twiss["beta_m"], twiss["alpha"])
    t = transport_matrices(spec["transport"])[plane]
    sign = 1.0 if plane == "x" else -1.0
    out = []
    for k in np.atleast_1d(np.asarray(k1_per_m2, dtype=float)):
        r = t @ quad_matrix(sign * k, spec["length_m"])
        out.append(math.sqrt((r @ sigma0 @ r.T)[0, 0]))
    return np.array(out)


def measured_size_m(beam_sigma_m: np.ndarray | float, resolution_m: float) -> np.ndarray:
    """Size a monitor sees: the beam size and the resolution added in quadrature."""
    return np.sqrt(np.asarray(beam_sigma_m) ** 2 + resolution_m**2)


# --------------------------------------------------------------------------- the machine layout


@functools.cache
def machine_layout() -> dict[str, np.ndarray]:
    """Fixed per-BPM parameters of the demo machine (independent of the noise seed).

    Returns arrays of shape ``(24,)``: ``beta_x_m``, ``beta_y_m`` (alternating as in
    a FODO line), betatron phases ``mu_x_rad``, ``mu_y_rad``, the reference orbit
    ``offset_x_m``/``offset_y_m``, thermal coefficients ``thermal_x_m_per_K`` and
    ``thermal_y_m_per_K``, the temperature sensor index ``sensor``, noise levels
    ``noise_x_m``/``noise_y_m``, sum gains ``sum_gain`` and the corrector-step
    pattern ``step_x_m``.
    """
    rng = np.random.default_rng(_LAYOUT_SEED)
    n = len(BPMS)
    i = np.arange(n)
    # FODO-like: beta alternates between about 12 m and 5 m, ~29 deg per BPM
    beta_x = 8.5 + 3.5 * np.cos(np.pi * i)
    beta_y = 8.5 - 3.5 * np.cos(np.pi * i)
    mu_x = 0.50 * i
    mu_y = 0.47 * i
    thermal_x = rng.uniform(3e-6, 12e-6, n) * rng.choice([-1.0, 1.0], n)
    thermal_x[BPMS.index(WORST_THERMAL_BPM)] = WORST_THERMAL_COEFF_M_PER_K
    thermal_y = rng.uniform(1e-6, 5e-6, n) * rng.choice([-1.0, 1.0], n)
    layout = {
        "beta_x_m": beta_x,
        "beta_y_m": beta_y,
        "mu_x_rad": mu_x,
        "mu_y_rad": mu_y,
        "offset_x_m": np.round(rng.normal(0.0, 150e-6, n), 7),
        "offset_y_m": np.round(rng.normal(0.0, 100e-6, n), 7),
        "thermal_x_m_per_K": thermal_x,
        "thermal_y_m_per_K": thermal_y,
        "sensor": np.minimum(i // 6, len(TEMPERATURE_SENSORS) - 1),
        # 2-4 um rms per reading: inside the usual 5 um jitter tolerance
        "noise_x_m": rng.uniform(2e-6, 4e-6, n),
        "noise_y_m": rng.uniform(2e-6, 4e-6, n),
        "sum_gain": rng.uniform(0.92, 1.08, n),
    }
    # Corrector kick: dx_i = theta sqrt(beta_c beta_i) sin(mu_i - mu_c) downstream of
    # the corrector (Wiedemann, Particle Accelerator Physics, orbit response to a
    # single kick in a transfer line); theta is set so that BPM-09 moves by 35 um.
    first = BPMS.index(STEP["first_bpm"])
    beta_c, mu_c = 10.0, mu_x[first] - 1.45
    shape = np.sqrt(beta_c * beta_x) * np.sin(mu_x - mu_c)
    theta = STEP["amplitude_m"] / shape[first]
    step = np.where(i >= first, theta * shape, 0.0)
    layout["step_x_m"] = step
    layout["kick_rad"] = np.array(theta)
    return layout


# --------------------------------------------------------------------------- time helpers


def _ts(date: str, hhmmss: str) -> pd.Timestamp:
    return pd.Timestamp(f"{date}T{hhmmss}", tz="UTC")


def _iso(ts: pd.Timestamp) -> str:
    """ISO 8601 UTC with a ``Z`` and no sub-second part when there is none."""
    ts = pd.Timestamp(ts).tz_convert("UTC")
    text = ts.strftime("%Y-%m-%dT%H:%M:%S")
    if ts.microsecond:
        text += f".{ts.microsecond // 1000:03d}"
    return text + "Z"


def _compact(ts: pd.Timestamp) -> str:
    return ts.strftime("%Y%m%dT%H%M%SZ")


def temperature_swing_degC(seconds_since_start: np.ndarray | float) -> np.ndarray:
    """The smooth part of the tunnel air temperature change, degC.

    A raised cosine of peak-to-peak ``TEMPERATURE["swing_degC"]`` that is zero at
    the shift start, peaks at ``TEMPERATURE["peak_time"]`` and is back to zero
    at the shift end.
    """
    period_s = SHIFT_HOURS * 3600.0
    half = TEMPERATURE["swing_degC"] / 2.0
    return half * (1.0 - np.cos(2.0 * np.pi * np.asarray(seconds_since_start) / period_s))


# --------------------------------------------------------------------------- pure models


def bpm_model(seconds_since_start: np.ndarray, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """BPM readings of all 24 BPMs at the given times (one reading per time and BPM).

    Parameters
    ----------
    seconds_since_start : ndarray, shape (n_t,)
        Time of each pulse, seconds since 06:00 UTC.
    rng : numpy.random.Generator
        Noise source.

    Returns
    -------
    dict
        ``x_m``, ``y_m``, ``sum`` of shape ``(n_t, 24)``.
    """
    lay = machine_layout()
    t = np.asarray(seconds_since_start, dtype=float)[:, None]
    n_t, n = t.shape[0], len(BPMS)
    delays = np.array([TEMPERATURE["sensor_delay_s"][s] for s in TEMPERATURE_SENSORS])
    # each BPM follows its sensor's air temperature THERMAL_LAG_S later
    d_temp = temperature_swing_degC(t - delays[lay["sensor"]][None, :] - THERMAL_LAG_S)
    step_s = _seconds(STEP["time"])
    x = (
        lay["offset_x_m"]
        + lay["thermal_x_m_per_K"] * d_temp
        + np.where(t >= step_s, lay["step_x_m"], 0.0)
        + rng.normal(0.0, 1.0, (n_t, n)) * lay["noise_x_m"]
    )
    y = (
        lay["offset_y_m"]
        + lay["thermal_y_m_per_K"] * d_temp
        + rng.normal(0.0, 1.0, (n_t, n)) * lay["noise_y_m"]
    )
    omega = 2.0 * np.pi * VIBRATION["frequency_Hz"]
    for name, amp in VIBRATION["amplitude_x_m"].items():
        j = BPMS.index(name)
        phase = VIBRATION["phase_rad"][name]
        wave = np.sin(omega * t[:, 0] + phase)
        x[:, j] += amp * wave
        y[:, j] += VIBRATION["amplitude_y_m"][name] * wave
    charge = 1.0 + CHARGE_JITTER * rng.normal(0.0, 1.0, (n_t, 1))
    transmission = np.ones((n_t, n))
    lost = (t[:, 0] >= _seconds(TRANSMISSION_DROP["start"])) & (
        t[:, 0] < _seconds(TRANSMISSION_DROP["end"])
    )
    transmission[np.ix_(lost, np.arange(BPMS.index(TRANSMISSION_DROP["first_bpm"]), n))] -= (
        TRANSMISSION_DROP["fraction"]
    )
    total = SUM_COUNTS * lay["sum_gain"] * charge * transmission
    total = total * (1.0 + SUM_NOISE * rng.normal(0.0, 1.0, (n_t, n)))
    return {"x_m": x, "y_m": y, "sum": total}


def temperatures_degC(seconds_since_start: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Readings of T-01 ... T-04, shape ``(n_t, 4)``, degC."""
    t = np.asarray(seconds_since_start, dtype=float)[:, None]
    base = np.array([TEMPERATURE["baseline_degC"][s] for s in TEMPERATURE_SENSORS])
    delays = np.array([TEMPERATURE["sensor_delay_s"][s] for s in TEMPERATURE_SENSORS])
    noise = TEMPERATURE["noise_degC"] * rng.normal(0.0, 1.0, (t.shape[0], base.size))
    return base + temperature_swing_degC(t - delays) + noise


def corrector_current_A(seconds_since_start: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Readback of the HC-08 current (A): a step at 10:42 plus 0.2 mA noise."""
    t = np.asarray(seconds_since_start, dtype=float)
    before, after = STEP["corrector_current_A"]
    return np.where(t >= _seconds(STEP["time"]), after, before) + 2e-4 * rng.normal(0, 1, t.size)


def wire_signal(
    position_m: np.ndarray, centroid_m: float, sigma_m: float, rng: np.random.Generator
) -> np.ndarray:
    """One wire-scanner profile: Gaussian on a sloped baseline with noise.

    Each point is a different bunch, so the peak height jitters with the charge.
    """
    p = WIRE_SIGNAL
    gauss = np.exp(-0.5 * ((position_m - centroid_m) / sigma_m) ** 2)
    peak = p["peak"] * (1.0 + p["jitter"] * rng.normal(0.0, 1.0, position_m.size))
    baseline = p["baseline"] + p["slope_per_mm"] * position_m * 1e3
    return baseline + peak * gauss + p["noise"] * rng.normal(0.0, 1.0, position_m.size)


def spot_counts(
    shape: tuple[int, int],
    centre_px: tuple[float, float],
    sigma_px: tuple[float, float],
    rho: float,
    peak: float,
    *,
    n_sigma: float = 8.0,
) -> np.ndarray:
    """Expected counts of a rotated Gaussian spot, shape ``(rows, cols)``.

    ``centre_px`` and ``sigma_px`` are ``(x, y)`` in pixels (x along columns) and
    ``rho`` the x-y correlation coefficient, so ``sigma_xy = rho sigma_x sigma_y``
    and the tilt is ``0.5 atan2(2 sigma_xy, sigma_xx - sigma_yy)``.  Outside
    ``n_sigma`` projected sigmas the counts are exactly zero (at 8 sigma a peak
    of 1800 counts has fallen to 2e-11 counts).
    """
    rows, cols = shape
    sx, sy = sigma_px
    out = np.zeros(shape)
    c0, c1 = (
        max(0, math.floor(centre_px[0] - n_sigma * sx)),
        min(cols, math.ceil(centre_px[0] + n_sigma * sx) + 1),
    )
    r0, r1 = (
        max(0, math.floor(centre_px[1] - n_sigma * sy)),
        min(rows, math.ceil(centre_px[1] + n_sigma * sy) + 1),
    )
    if c1 <= c0 or r1 <= r0:
        return out
    dx = (np.arange(c0, c1, dtype=float)[None, :] - centre_px[0]) / sx
    dy = (np.arange(r0, r1, dtype=float)[:, None] - centre_px[1]) / sy
    # quadratic form of the inverse covariance of a correlated bivariate normal
    q = (dx**2 - 2.0 * rho * dx * dy + dy**2) / (1.0 - rho * rho)
    out[r0:r1, c0:c1] = peak * np.exp(-0.5 * q)
    return out


def tilt_rad(sigma_x_m: float, sigma_y_m: float, rho: float) -> float:
    """Tilt of the spot's major axis from +x toward +y (the convention of :mod:`diagnostics`)."""
    sxy = rho * sigma_x_m * sigma_y_m
    return 0.5 * math.atan2(2.0 * sxy, sigma_x_m**2 - sigma_y_m**2)


@dataclass(frozen=True)
class _Camera:
    """Fixed properties of one screen's camera (dark pattern, hot pixels)."""

    dark_pattern: np.ndarray  # float, (rows, cols): per-pixel offset in counts
    hot_index: np.ndarray  # flat indices of hot pixels
    hot_counts: np.ndarray


@functools.cache
def _camera(screen: str, shape: tuple[int, int]) -> _Camera:
    rng = np.random.default_rng([_LAYOUT_SEED, SCREENS.index(screen)])
    pattern = DARK_LEVEL + DARK_PATTERN_RMS * rng.normal(0.0, 1.0, shape)
    hot = rng.choice(shape[0] * shape[1], HOT_PIXELS, replace=False)
    return _Camera(pattern, hot, rng.uniform(1500.0, 2500.0, HOT_PIXELS))


def camera_image(
    expected: np.ndarray, screen: str, rng: np.random.Generator, *, hits: int = HITS_PER_FRAME
) -> np.ndarray:
    """A 12-bit camera image (uint16) of the expected spot counts.

    Poisson photon noise on the spot, the camera's fixed dark pattern, Gaussian
    read noise, its hot pixels, and ``hits`` single-pixel radiation hits; clipped
    to the 12-bit range.
    """
    cam = _camera(screen, expected.shape)
    img = cam.dark_pattern + READ_NOISE * rng.standard_normal(expected.shape, dtype=np.float32)
    # photon noise only where the spot has light (the bounding box of non-zero counts)
    rows = np.flatnonzero(expected.any(axis=1))
    cols = np.flatnonzero(expected.any(axis=0))
    if rows.size:
        box = np.s_[rows[0] : rows[-1] + 1, cols[0] : cols[-1] + 1]
        img[box] += rng.poisson(expected[box])
    flat = img.reshape(-1)
    flat[cam.hot_index] += cam.hot_counts
    flat[rng.choice(flat.size, hits, replace=False)] += rng.uniform(800.0, 2500.0, hits)
    return np.clip(np.rint(img), 0, 2**FRAME_BIT_DEPTH - 1).astype(np.uint16)


def dark_image(screen: str, shape: tuple[int, int], rng: np.random.Generator) -> np.ndarray:
    """A dark frame (average of 16 exposures without beam), uint16."""
    cam = _camera(screen, shape)
    img = cam.dark_pattern + READ_NOISE / 4.0 * rng.normal(0.0, 1.0, shape)
    return np.clip(np.rint(img), 0, 2**FRAME_BIT_DEPTH - 1).astype(np.uint16)


# --------------------------------------------------------------------------- sizes at monitors


def wire_sizes_m(device: str) -> tuple[float, float]:
    """True beam sizes (x, y) at a wire scanner during routine scans (no resolution)."""
    spec = WIRE[device]
    if device == "WS-02":  # downstream of Q-05 at its nominal setting
        k = SCANS["Q-05"]["nominal_k1_per_m2"]
        return (float(scan_sizes_m("Q-05", [k], "x")[0]), float(scan_sizes_m("Q-05", [k], "y")[0]))
    return (
        math.sqrt(geometric_emittance_m_rad("x") * spec["beta_x_m"]),
        math.sqrt(geometric_emittance_m_rad("y") * spec["beta_y_m"]),
    )


def screen_spot_m(screen: str) -> tuple[float, float, float]:
    """True spot ``(sigma_x_m, sigma_y_m, rho)`` on a screen in routine frames."""
    spec = SCREEN[screen]
    if screen == "SCR-02":  # downstream of Q-07 at its nominal setting
        k = SCANS["Q-07"]["nominal_k1_per_m2"]
        sx = float(scan_sizes_m("Q-07", [k], "x")[0])
        sy = float(scan_sizes_m("Q-07", [k], "y")[0])
        return sx, sy, spec["rho"]
    return spec["sigma_m"][0], spec["sigma_m"][1], spec["rho"]


# --------------------------------------------------------------------------- writers


def _seconds(hhmmss: str) -> float:
    """Seconds from the shift start (06:00) to ``hhmmss`` on the same day."""
    parts = [float(p) for p in hhmmss.split(":")]
    while len(parts) < 3:
        parts.append(0.0)
    start = [float(p) for p in SHIFT_START.split(":")]
    return (parts[0] - start[0]) * 3600.0 + (parts[1] - start[1]) * 60.0 + parts[2]


def _rng(seed: int, stream: int, index: int) -> np.random.Generator:
    """Independent noise stream per output file, so files do not depend on each other."""
    return np.random.default_rng([seed, stream, index])


def _write_bpm(
    out: Path, date: str, t0: pd.Timestamp, t1: pd.Timestamp, rate_Hz: float, seed: int
) -> tuple[list[Path], int]:
    shift0 = _ts(date, SHIFT_START)
    period_ns = round(1e9 / rate_Hz)
    out.mkdir(parents=True, exist_ok=True)
    files, total = [], 0
    hour = t0.floor("h")
    names = np.array(BPMS, dtype=object)
    while hour < t1:
        lo, hi = max(hour, t0), min(hour + pd.Timedelta(hours=1), t1)
        first = math.ceil((lo - shift0).value / period_ns)
        last = math.ceil((hi - shift0).value / period_ns)
        if last > first:
            k = np.arange(first, last, dtype=np.int64)
            t_ns = shift0.value + k * period_ns
            model = bpm_model((t_ns - shift0.value) / 1e9, _rng(seed, 1, int(hour.value // 10**9)))
            n = len(BPMS)
            table = pa.table(
                {
                    "timestamp": pa.array(np.repeat(t_ns, n), type=pa.timestamp("ns", tz="UTC")),
                    "bpm": pa.array(np.tile(names, k.size), type=pa.string()),
                    "x_mm": np.round(model["x_m"].reshape(-1) * 1e3, 4),
                    "y_mm": np.round(model["y_m"].reshape(-1) * 1e3, 4),
                    "sum": np.round(model["sum"].reshape(-1), 1),
                }
            )
            path = out / f"bpm_{hour.strftime('%Y-%m-%dT%H')}.parquet"
            pq.write_table(table, path, compression="zstd")
            files.append(path)
            total += table.num_rows
        hour += pd.Timedelta(hours=1)
    return files, total


def _write_slow(
    out: Path, date: str, t0: pd.Timestamp, t1: pd.Timestamp, seed: int, *, stem: str | None = None
) -> list[Path]:
    shift0 = _ts(date, SHIFT_START)
    first = math.ceil((t0 - shift0).total_seconds() / 10.0)
    last = math.ceil((t1 - shift0).total_seconds() / 10.0)
    if last <= first:
        return []
    sec = np.arange(first, last) * 10.0
    rng = _rng(seed, 2, first)
    temps = np.round(temperatures_degC(sec, rng), 3)
    current = np.round(corrector_current_A(sec, rng), 4)
    stamps = [_iso(shift0 + pd.Timedelta(seconds=float(s))) for s in sec]
    lines = ["timestamp,channel,value,unit"]
    for i, stamp in enumerate(stamps):
        for j, sensor in enumerate(TEMPERATURE_SENSORS):
            lines.append(f"{stamp},{sensor},{temps[i, j]:.3f},degC")
        lines.append(f"{stamp},{CORRECTOR},{current[i]:.4f},A")
    out.mkdir(parents=True, exist_ok=True)
    path = out / f"{stem or 'slow_' + date}.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return [path]


def _profile_csv(
    device: str,
    plane: str,
    when: pd.Timestamp,
    position_m: np.ndarray,
    signal: np.ndarray,
    extra: Mapping[str, str] | None = None,
) -> str:
    lines = [
        f"# device: {device}",
        f"# plane: {plane}",
        f"# timestamp: {_iso(when)}",
        "# position_unit: mm",
    ]
    lines += [f"# {k}: {v}" for k, v in (extra or {}).items()]
    lines.append("position,signal")
    lines += [f"{p * 1e3:.4f},{s:.2f}" for p, s in zip(position_m, signal, strict=True)]
    return "\n".join(lines) + "\n"


def _wire_centroid_m(device: str, plane: str, seconds: float) -> float:
    """Beam position at a wire: a fixed offset plus a small thermal drift (10 um/K)."""
    offset = WIRE[device]["offset_m"][0 if plane == "x" else 1]
    return offset + 10e-6 * float(temperature_swing_degC(seconds - THERMAL_LAG_S))


def _write_wire(out: Path, date: str, t0: pd.Timestamp, t1: pd.Timestamp, seed: int) -> list[Path]:
    shift0 = _ts(date, SHIFT_START)
    files = []
    n_slots = int(SHIFT_HOURS * 3600 / WIRE_PERIOD_S)
    for slot in range(n_slots):
        for device in WIRE_SCANNERS:
            when = shift0 + pd.Timedelta(
                seconds=slot * WIRE_PERIOD_S + 60.0 * WIRE[device]["minute"]
            )
            if not (t0 <= when < t1):
                continue
            sizes = wire_sizes_m(device)
            for p, plane in enumerate(("x", "y")):
                sigma = float(measured_size_m(sizes[p], WIRE_RESOLUTION_M))
                seconds = (when - shift0).total_seconds()
                centre = _wire_centroid_m(device, plane, seconds)
                half = max(1.5e-3, 7.0 * sigma)
                pos = np.round(np.linspace(-half, half, WIRE_POINTS), 7)
                rng = _rng(seed, 3, slot * 10 + WIRE_SCANNERS.index(device) * 2 + p)
                sig = wire_signal(pos, centre, sigma, rng)
                path = out / f"{device}_{plane}_{_compact(when)}.csv"
                out.mkdir(parents=True, exist_ok=True)
                path.write_text(_profile_csv(device, plane, when, pos, sig), encoding="utf-8")
                files.append(path)
    return files


def _save_png(path: Path, pixels: np.ndarray) -> None:
    # 16-bit grayscale PNG (Pillow mode "I;16"); zlib level 1: 15 ms a frame against
    # 21 ms at level 3 and 72 ms at the default 6, for files only 7 % larger
    Image.fromarray(pixels).save(path, format="PNG", compress_level=1)


def _sidecar(device: str, when: pd.Timestamp, pixel_size_m: float, dark: str) -> str:
    meta = {
        "device": device,
        "timestamp": _iso(when),
        "pixel_size_m": [pixel_size_m, pixel_size_m],
        "dark": dark,
        "bit_depth": FRAME_BIT_DEPTH,
    }
    return json.dumps(meta, indent=1) + "\n"


def _frame_pixels(
    screen: str,
    sigma_m: tuple[float, float],
    rho: float,
    centre_m: tuple[float, float],
    shape: tuple[int, int],
    rng: np.random.Generator,
) -> np.ndarray:
    px = SCREEN[screen]["pixel_size_m"]
    centre_px = ((shape[1] - 1) / 2.0 + centre_m[0] / px, (shape[0] - 1) / 2.0 + centre_m[1] / px)
    expected = spot_counts(shape, centre_px, (sigma_m[0] / px, sigma_m[1] / px), rho, SPOT_PEAK)
    return camera_image(expected, screen, rng)


def _write_darks(
    out: Path, shape: tuple[int, int], seed: int, screens: Sequence[str] = SCREENS
) -> dict[str, Path]:
    out.mkdir(parents=True, exist_ok=True)
    darks = {}
    for s in screens:
        path = out / f"{s}_dark.png"
        _save_png(path, dark_image(s, shape, _rng(seed, 4, SCREENS.index(s))))
        darks[s] = path
    return darks


def _scan_window(scan: str, date: str) -> tuple[pd.Timestamp, pd.Timestamp]:
    spec = SCANS[scan]
    start = _ts(date, spec["time"])
    n = len(spec["k1_per_m2"]) * spec["shots"]
    return start, start + pd.Timedelta(seconds=n * spec["shot_interval_s"])


def _write_frames(
    out: Path, date: str, t0: pd.Timestamp, t1: pd.Timestamp, seed: int, shape: tuple[int, int]
) -> tuple[list[Path], list[Path]]:
    shift0 = _ts(date, SHIFT_START)
    busy = {SCANS[s]["monitor"]: _scan_window(s, date) for s in SCANS}
    darks = _write_darks(out / "darks", shape, seed)
    files = []
    for minute in range(int(SHIFT_HOURS * 3600 / FRAME_PERIOD_S)):
        when = shift0 + pd.Timedelta(seconds=minute * FRAME_PERIOD_S)
        screen = SCREENS[minute % len(SCREENS)]
        if not (t0 <= when < t1):
            continue
        if screen in busy and busy[screen][0] <= when < busy[screen][1]:
            continue  # the camera is taking the quad scan
        sx, sy, rho = screen_spot_m(screen)
        sigma = (
            float(measured_size_m(sx, SCREEN_RESOLUTION_M)),
            float(measured_size_m(sy, SCREEN_RESOLUTION_M)),
        )
        seconds = (when - shift0).total_seconds()
        drift = 10e-6 * float(temperature_swing_degC(seconds - THERMAL_LAG_S))
        pixels = _frame_pixels(
            screen, sigma, rho, (drift, 0.5 * drift), shape, _rng(seed, 5, minute)
        )
        stem = f"{screen}_{_compact(when)}"
        _save_png(out / f"{stem}.png", pixels)
        (out / f"{stem}.json").write_text(
            _sidecar(screen, when, SCREEN[screen]["pixel_size_m"], f"darks/{screen}_dark.png"),
            encoding="utf-8",
        )
        files.append(out / f"{stem}.png")
    return files, list(darks.values())


def scan_steps(scan: str) -> list[tuple[int, float, int]]:
    """``(step index, k1_per_m2, shot)`` of every entry of a demo scan, in order."""
    spec = SCANS[scan]
    out: list[tuple[int, float, int]] = []
    for k in spec["k1_per_m2"]:
        for shot in range(spec["shots"]):
            out.append((len(out), float(k), shot))
    return out


def _scan_json(scan: str, date: str, steps: list[dict[str, Any]]) -> dict[str, Any]:
    spec = SCANS[scan]
    if "drift_m" in spec["transport"]:
        transport: dict[str, Any] = {"drift_m": spec["transport"]["drift_m"]}
    else:
        mats = transport_matrices(spec["transport"])
        transport = {f"matrix_{p}": np.round(mats[p], 12).tolist() for p in ("x", "y")}
    return {
        "name": spec["name"],
        "timestamp": _iso(_ts(date, spec["time"])),
        "particle": "electron",
        "kinetic_energy_MeV": KINETIC_ENERGY_MEV,
        "quadrupole": {"name": scan, "length_m": spec["length_m"]},
        "transport": transport,
        "monitor": {"name": spec["monitor"], "resolution_m": spec["resolution_m"]},
        "design": spec["design"],
        "expected_steps": len(steps),
        "steps": steps,
    }


def _write_scan(root: Path, scan: str, date: str, seed: int, shape: tuple[int, int]) -> Path:
    """Write one quad-scan folder: scan.json plus a measurement per step and shot."""
    spec = SCANS[scan]
    folder = root / spec["folder"]
    folder.mkdir(parents=True, exist_ok=True)
    start = _ts(date, spec["time"])
    entries = scan_steps(scan)
    ks = np.array([k for _, k, _ in entries])
    rng_jit = _rng(seed, 6, SCANS_ORDER.index(scan))
    jitter = 1.0 + SCAN_SIZE_JITTER * rng_jit.normal(0.0, 1.0, (len(entries), 2))
    true_x, true_y = scan_sizes_m(scan, ks, "x"), scan_sizes_m(scan, ks, "y")
    meas_x = measured_size_m(true_x * jitter[:, 0], spec["resolution_m"])
    meas_y = measured_size_m(true_y * jitter[:, 1], spec["resolution_m"])
    steps: list[dict[str, Any]] = []
    monitor = spec["monitor"]
    if monitor in SCREENS:
        _write_darks(folder, shape, seed, [monitor])
    for (i, k, _shot), sx, sy in zip(entries, meas_x, meas_y, strict=True):
        when = start + pd.Timedelta(seconds=i * spec["shot_interval_s"])
        rng = _rng(seed, 7 + SCANS_ORDER.index(scan), i)
        if monitor in WIRE_SCANNERS:
            step: dict[str, Any] = {"k1_per_m2": k}
            for plane, sigma in (("x", sx), ("y", sy)):
                centre = WIRE[monitor]["offset_m"][0 if plane == "x" else 1]
                half = 6.0 * sigma
                pos = np.round(np.linspace(centre - half, centre + half, 121), 7)
                name = f"step{i:02d}_{plane}.csv"
                text = _profile_csv(monitor, plane, when, pos, wire_signal(pos, centre, sigma, rng))
                (folder / name).write_text(text, encoding="utf-8")
                step[plane] = name
        else:
            pixels = _frame_pixels(
                monitor, (float(sx), float(sy)), SCREEN[monitor]["rho"], (0.0, 0.0), shape, rng
            )
            name = f"step{i:02d}"
            _save_png(folder / f"{name}.png", pixels)
            (folder / f"{name}.json").write_text(
                _sidecar(monitor, when, SCREEN[monitor]["pixel_size_m"], f"{monitor}_dark.png"),
                encoding="utf-8",
            )
            step = {"k1_per_m2": k, "image": f"{name}.png"}
        steps.append(step)
    (folder / "scan.json").write_text(
        json.dumps(_scan_json(scan, date, steps), indent=1) + "\n", encoding="utf-8"
    )
    return folder


def truth(date: str = DEFAULT_DATE) -> dict[str, Any]:
    """The true parameters of the scenario as a JSON-safe dict (what ``truth.json`` holds)."""
    lay = machine_layout()
    bg = beta_gamma()
    scans = {}
    for scan, spec in SCANS.items():
        planes = {}
        for plane in ("x", "y"):
            eps = geometric_emittance_m_rad(plane)
            tw = spec["true"][plane]
            planes[plane] = {
                "norm_emittance_m_rad": NORM_EMITTANCE_M_RAD[plane],
                "emittance_m_rad": eps,
                "beta_m": tw["beta_m"],
                "alpha": tw["alpha"],
                "gamma_per_m": (1 + tw["alpha"] ** 2) / tw["beta_m"],
                "design_beta_m": spec["design"][plane]["beta_m"],
                "design_alpha": spec["design"][plane]["alpha"],
            }
        entries = scan_steps(scan)
        ks = [k for _, k, _ in entries]
        scans[spec["folder"]] = {
            "name": spec["name"],
            "quadrupole": scan,
            "monitor": spec["monitor"],
            "timestamp": _iso(_ts(date, spec["time"])),
            "reconstruction_point": f"entrance of {scan}",
            "planes": planes,
            "k1_per_m2": ks,
            "beam_sigma_x_m": scan_sizes_m(scan, ks, "x").tolist(),
            "beam_sigma_y_m": scan_sizes_m(scan, ks, "y").tolist(),
            "resolution_m": spec["resolution_m"],
            "size_jitter": SCAN_SIZE_JITTER,
        }
    step_at = _iso(_ts(date, STEP["time"]))
    screens = {}
    for s in SCREENS:
        sx, sy, rho = screen_spot_m(s)
        screens[s] = {
            "beam_sigma_x_m": sx,
            "beam_sigma_y_m": sy,
            "rho": rho,
            "tilt_rad": tilt_rad(sx, sy, rho),
            "resolution_m": SCREEN_RESOLUTION_M,
            "pixel_size_m": SCREEN[s]["pixel_size_m"],
        }
    return {
        "scenario": "Kestrel Bay test linac (invented demo)",
        "date": date,
        "shift": {"start": _iso(_ts(date, SHIFT_START)), "hours": SHIFT_HOURS},
        "particle": "electron",
        "kinetic_energy_MeV": KINETIC_ENERGY_MEV,
        "beta_gamma": bg,
        "quadrupoles": {
            q: {"k1_per_m2": QUADRUPOLE_K1_PER_M2[q], "length_m": QUADRUPOLE_LENGTH_M}
            for q in QUADRUPOLES
        },
        "bpm_rate_Hz": BPM_RATE_HZ,
        "temperature": {
            "sensors": list(TEMPERATURE_SENSORS),
            "baseline_degC": TEMPERATURE["baseline_degC"],
            "swing_degC": TEMPERATURE["swing_degC"],
            "peak": _iso(_ts(date, TEMPERATURE["peak_time"])),
            "sensor_delay_s": TEMPERATURE["sensor_delay_s"],
            "bpm_lag_s": THERMAL_LAG_S,
        },
        "bpm": {
            name: {
                "offset_x_m": float(lay["offset_x_m"][j]),
                "offset_y_m": float(lay["offset_y_m"][j]),
                "thermal_x_m_per_K": float(lay["thermal_x_m_per_K"][j]),
                "thermal_y_m_per_K": float(lay["thermal_y_m_per_K"][j]),
                "sensor": TEMPERATURE_SENSORS[int(lay["sensor"][j])],
                "noise_x_m": float(lay["noise_x_m"][j]),
                "noise_y_m": float(lay["noise_y_m"][j]),
                "step_x_m": float(lay["step_x_m"][j]),
            }
            for j, name in enumerate(BPMS)
        },
        "worst_thermal_bpm": WORST_THERMAL_BPM,
        "events": {
            "orbit_step": {
                "time": step_at,
                "corrector": CORRECTOR,
                "corrector_current_A": list(STEP["corrector_current_A"]),
                "kick_rad": float(lay["kick_rad"]),
                "plane": STEP["plane"],
                "bpms": list(BPMS[BPMS.index(STEP["first_bpm"]) :]),
                "size_at_first_bpm_m": STEP["amplitude_m"],
            },
            "vibration": {
                "frequency_Hz": VIBRATION["frequency_Hz"],
                "amplitude_x_m": VIBRATION["amplitude_x_m"],
                "amplitude_y_m": VIBRATION["amplitude_y_m"],
            },
            "transmission_drop": {
                "start": _iso(_ts(date, TRANSMISSION_DROP["start"])),
                "end": _iso(_ts(date, TRANSMISSION_DROP["end"])),
                "fraction": TRANSMISSION_DROP["fraction"],
                "between": ["BPM-15", "BPM-16"],
                "bpms": list(BPMS[BPMS.index(TRANSMISSION_DROP["first_bpm"]) :]),
            },
        },
        "wire_scanners": {
            d: {
                "beam_sigma_x_m": wire_sizes_m(d)[0],
                "beam_sigma_y_m": wire_sizes_m(d)[1],
                "resolution_m": WIRE_RESOLUTION_M,
                "period_s": WIRE_PERIOD_S,
            }
            for d in WIRE_SCANNERS
        },
        "screens": screens,
        "frame_period_s": FRAME_PERIOD_S,
        "scans": scans,
    }


# --------------------------------------------------------------------------- public API


def _window(date: str, start: str | None, hours: float | None) -> tuple[pd.Timestamp, pd.Timestamp]:
    shift0 = _ts(date, SHIFT_START)
    shift1 = shift0 + pd.Timedelta(hours=SHIFT_HOURS)
    t0 = _ts(date, start) if start else shift0
    t1 = t0 + pd.Timedelta(hours=SHIFT_HOURS if hours is None else hours)
    t0, t1 = max(t0, shift0), min(t1, shift1)
    if t1 <= t0:
        raise InputError(
            f"demo window {start!r} + {hours} h: expected a window inside the shift {SHIFT_START} + {SHIFT_HOURS:g} h"
        )
    return t0, t1


def generate_raw(
    out_dir: str | Path,
    *,
    seed: int = DEFAULT_SEED,
    date: str = DEFAULT_DATE,
    start: str | None = None,
    hours: float | None = None,
    bpm_rate_Hz: float = BPM_RATE_HZ,
    frame_shape: tuple[int, int] = FRAME_SHAPE,
    sources: Collection[str] = SOURCES,
) -> DemoManifest:
    """Write the raw input files of the demo shift into ``out_dir``.

    Parameters
    ----------
    out_dir : path
        Output folder (created).  Existing files of the same names are replaced.
    seed : int
        Noise seed; the same seed gives the same bytes.
    date : str
        Shift date, ``YYYY-MM-DD``.
    start, hours : str and float, optional
        Generate only the part of the shift from ``start`` (``"HH:MM"``, UTC) for
        ``hours`` (default: the whole 06:00-14:00 shift).  A scan folder is
        written when its start time lies in the window.
    bpm_rate_Hz : float
        BPM reading rate (10 Hz in the scenario).
    frame_shape : (rows, cols)
        Camera frame size.
    sources : collection of str
        Which of :data:`SOURCES` to write.

    Returns
    -------
    DemoManifest

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     m = generate_raw(tmp, start="10:40", hours=0.05, sources=("bpm",))
    ...     m.n_bpm_readings
    43200
    """
    unknown = sorted(set(sources) - set(SOURCES))
    if unknown:
        raise InputError(f"demo sources {unknown}: expected any of {', '.join(SOURCES)}")
    if not bpm_rate_Hz > 0:
        raise InputError(f"demo bpm_rate_Hz {bpm_rate_Hz!r}: expected a positive rate")
    try:
        pd.Timestamp(date)
    except ValueError as exc:
        raise InputError(f"demo date {date!r}: expected YYYY-MM-DD") from exc
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    t0, t1 = _window(date, start, hours)
    shape = (int(frame_shape[0]), int(frame_shape[1]))
    bpm_files: list[Path] = []
    n_bpm = 0
    if "bpm" in sources:
        bpm_files, n_bpm = _write_bpm(out / "bpm", date, t0, t1, bpm_rate_Hz, seed)
    slow_files = _write_slow(out / "slow", date, t0, t1, seed) if "slow" in sources else []
    wire_files = _write_wire(out / "wire", date, t0, t1, seed) if "wire" in sources else []
    frame_files: list[Path] = []
    dark_files: list[Path] = []
    if "screens" in sources:
        frame_files, dark_files = _write_frames(out / "screens", date, t0, t1, seed, shape)
    scan_folders = []
    if "scans" in sources:
        for scan in SCANS:
            if t0 <= _ts(date, SCANS[scan]["time"]) < t1:
                scan_folders.append(_write_scan(out / "scans", scan, date, seed, shape))
    record = truth(date)
    record["generated"] = {
        "seed": seed,
        "start": _iso(t0),
        "end": _iso(t1),
        "bpm_rate_Hz": bpm_rate_Hz,
        "frame_shape": list(shape),
        "sources": [s for s in SOURCES if s in sources],
        "n_bpm_readings": n_bpm,
        "n_frames": len(frame_files),
        "n_wire_profiles": len(wire_files),
        "scans": [p.name for p in scan_folders],
    }
    truth_file = out / "truth.json"
    truth_file.write_text(json.dumps(record, indent=1, sort_keys=True) + "\n", encoding="utf-8")
    return DemoManifest(
        root=out,
        bpm_files=tuple(bpm_files),
        slow_files=tuple(slow_files),
        wire_files=tuple(wire_files),
        frame_files=tuple(frame_files),
        dark_files=tuple(dark_files),
        scan_folders=tuple(scan_folders),
        truth_file=truth_file,
        n_bpm_readings=n_bpm,
        seed=seed,
        start=t0,
        end=t1,
    )


def default_raw_dir(store_dir: str | Path) -> Path:
    """Where :func:`build_demo_store` keeps the raw inputs: ``STORE/raw``."""
    return Path(store_dir) / "raw"


def build_demo_store(
    store_dir: str | Path,
    *,
    raw_dir: str | Path | None = None,
    seed: int = DEFAULT_SEED,
    date: str = DEFAULT_DATE,
    start: str | None = None,
    hours: float | None = None,
    analyse: bool = True,
    progress: Callable[[str], None] | None = None,
) -> DemoSummary:
    """Generate the demo shift, ingest it into a store and analyse it.

    The raw files stay in ``raw_dir`` (default ``STORE/raw``) so an operator can
    look at them or ingest them again by hand (``beamdiag ingest STORE/raw/...``).

    Parameters
    ----------
    store_dir : path
        The store folder (created if missing).
    raw_dir : path, optional
        Where the raw inputs go (default :func:`default_raw_dir`).
    seed, date, start, hours
        As for :func:`generate_raw`.
    analyse : bool
        Run ``diagnostics.pipeline.analyze_store`` after the ingest (when the
        pipeline exists).
    progress : callable, optional
        Called with one line of text per phase.

    Returns
    -------
    DemoSummary
    """
    from diagnostics.store import Store  # imported here: the store is optional for generate_raw

    say = progress or (lambda _line: None)
    raw = Path(raw_dir) if raw_dir is not None else default_raw_dir(store_dir)
    clock = time.perf_counter()
    say(f"generating the demo shift into {raw} ...")
    manifest = generate_raw(raw, seed=seed, date=date, start=start, hours=hours)
    t_gen = time.perf_counter() - clock
    say(
        f"  {manifest.n_bpm_readings:,} BPM readings, {len(manifest.wire_files)} wire profiles, "
        f"{len(manifest.frame_files)} frames, {len(manifest.scan_folders)} scans ({t_gen:.1f} s)"
    )
    store = Store(store_dir)
    say(f"ingesting into {store.root} ...")
    ingest = store.ingest_many(manifest.inputs, progress=False)
    t_ing = time.perf_counter() - clock - t_gen
    say(
        f"  stored {len(ingest.stored)}, duplicates {len(ingest.duplicates)}, "
        f"quarantined {len(ingest.quarantined)} ({t_ing:.1f} s)"
    )
    analysis, message = None, ""
    if analyse:
        try:
            from diagnostics.pipeline import analyze_store
        except ImportError:
            message = "analysis skipped: diagnostics.pipeline is not available"
            say(message)
        else:
            say("analysing ...")
            analysis = analyze_store(store)
    t_ana = time.perf_counter() - clock - t_gen - t_ing
    total = time.perf_counter() - clock
    if analysis is not None:
        say(f"  analysis done ({t_ana:.1f} s)")
    return DemoSummary(
        store_root=Path(store.root),
        raw_dir=raw,
        manifest=manifest,
        ingest=ingest,
        analysis=analysis,
        timings_s={"generate": t_gen, "ingest": t_ing, "analyse": t_ana, "total": total},
        message=message,
    )


# --------------------------------------------------------------------------- committed samples

SAMPLES_README = """\
# sample_data: small demo inputs

Invented measurements from the demo scenario (the "Kestrel Bay test linac", a
150 MeV electron injector line; see `diagnostics/demo.py`).  They are written by
`diagnostics.demo.write_samples` (or `beamdiag demo --samples sample_data`), so
they can be regenerated byte for byte.  None of it comes from a real machine.

| file | what it is |
|---|---|
| `wire/WS-01_x_20261130T080000Z.csv` | one horizontal wire-scanner profile of WS-01 at 08:00 UTC; `# key: value` header (device, plane, timestamp, position_unit = mm), then `position,signal` |
| `bpm/bpm_20261130T1040Z_1Hz.csv` | 24 BPMs, 10:40-10:44 UTC, one reading per second (the scenario itself runs at 10 Hz; the 1.8 Hz vibration line on BPM-05/06 aliases to 0.2 Hz at this rate); long form `timestamp,bpm,x_mm,y_mm,sum`; the 35 um corrector step at BPM-09 onward happens at 10:42:00 |
| `slow/slow_20261130T1030Z.csv` | slow channels 10:30-10:50 UTC every 10 s: tunnel air temperatures T-01...T-04 (degC) and the HC-08 corrector current (A), which steps at 10:42:00; long form `timestamp,channel,value,unit` |
| `screens/SCR-01_20261130T060000Z.png` + `.json` | one 12-bit camera frame (480 x 640, 16-bit PNG) of screen SCR-01 with its JSON sidecar (device, timestamp, pixel_size_m, dark, bit_depth): a tilted Gaussian spot with Poisson noise, hot pixels and radiation hits |
| `screens/darks/SCR-01_dark.png` | the dark frame that the sidecar names |
| `scans/2026-11-30T0815_Q-05_WS-02/` | a complete quadrupole scan: `scan.json` (electron, 150 MeV, Q-05 0.2 m, 4.0 m drift to WS-02, 13 settings x 2 shots) and one x and one y profile CSV per shot |
| `truth.json` | the true values behind these files (emittances, Twiss parameters, event times and sizes); it is not an input format |
"""


def write_samples(
    out_dir: str | Path, *, seed: int = DEFAULT_SEED, date: str = DEFAULT_DATE
) -> list[Path]:
    """Write the small committed demo inputs of ``sample_data/`` into ``out_dir``.

    Returns the files written (the scan folder counts as its files).
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    files: list[Path] = []
    shift0 = _ts(date, SHIFT_START)
    # one wire profile: WS-01 x at 08:00
    t0 = _ts(date, "08:00")
    wire = [
        p
        for p in _write_wire(out / "wire", date, t0, t0 + pd.Timedelta(seconds=1), seed)
        if "_x_" in p.name
    ]
    for p in (out / "wire").glob("*_y_*.csv"):
        p.unlink()
    files += wire
    # BPM CSV at 1 Hz around the corrector step
    lo, hi = _ts(date, "10:40"), _ts(date, "10:44")
    sec = np.arange((lo - shift0).total_seconds(), (hi - shift0).total_seconds(), 1.0)
    model = bpm_model(sec, _rng(seed, 11, 0))
    lines = ["timestamp,bpm,x_mm,y_mm,sum"]
    for i, s in enumerate(sec):
        stamp = _iso(shift0 + pd.Timedelta(seconds=float(s)))
        for j, name in enumerate(BPMS):
            lines.append(
                f"{stamp},{name},{model['x_m'][i, j] * 1e3:.4f},{model['y_m'][i, j] * 1e3:.4f},{model['sum'][i, j]:.1f}"
            )
    bpm_path = out / "bpm" / "bpm_20261130T1040Z_1Hz.csv"
    bpm_path.parent.mkdir(parents=True, exist_ok=True)
    bpm_path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    files.append(bpm_path)
    # slow channels 10:30-10:50
    files += _write_slow(
        out / "slow", date, _ts(date, "10:30"), _ts(date, "10:50"), seed, stem="slow_20261130T1030Z"
    )
    # one SCR-01 frame at 06:00 with its dark
    frames, darks = _write_frames(
        out / "screens", date, shift0, shift0 + pd.Timedelta(seconds=1), seed, FRAME_SHAPE
    )
    for extra in darks:
        if not extra.name.startswith("SCR-01"):
            extra.unlink()
    files += (
        frames
        + [f.with_suffix(".json") for f in frames]
        + [d for d in darks if d.name.startswith("SCR-01")]
    )
    # the Q-05 wire scan
    folder = out / "scans" / SCANS["Q-05"]["folder"]
    if folder.exists():
        shutil.rmtree(folder)
    folder = _write_scan(out / "scans", "Q-05", date, seed, FRAME_SHAPE)
    files += sorted(folder.iterdir())
    record = truth(date)
    record["samples"] = {"seed": seed}
    record.pop("bpm")  # the per-BPM machine table is long; the full demo's truth.json has it
    (out / "truth.json").write_text(
        json.dumps(record, indent=1, sort_keys=True) + "\n", encoding="utf-8"
    )
    (out / "README.md").write_text(SAMPLES_README, encoding="utf-8")
    files += [out / "truth.json", out / "README.md"]
    return files


__all__ = [
    "BPMS",
    "DEFAULT_DATE",
    "DEFAULT_SEED",
    "DemoManifest",
    "DemoSummary",
    "SCANS",
    "SCREENS",
    "SOURCES",
    "WIRE_SCANNERS",
    "beta_gamma",
    "build_demo_store",
    "default_raw_dir",
    "generate_raw",
    "machine_layout",
    "scan_sizes_m",
    "truth",
    "write_samples",
]
