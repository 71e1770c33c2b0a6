"""Orbit analysis from beam-position-monitor (BPM) readings.

The routines take the BPM table of :mod:`diagnostics.measurements` (long form:
``timestamp, bpm, x_m, y_m, sum``), pivot it once into a wide
``(n_pulses, n_bpms)`` array per plane (:func:`orbit_matrix`) and work on plain
numpy arrays from there.  Nothing here opens a file.

What is computed, per BPM and plane
-----------------------------------
reference orbit
    The mean position over a reference window, by default the first
    ``reference_minutes`` (10 min) of the data (the first third of a record
    shorter than twice that); or a given window; or a saved :class:`ReferenceOrbit`.
drift
    ``x(t) - x_ref`` on time buckets (default 1 min): the drift at the end of the
    window (last bucket), the largest ``|drift|`` and a decimated series for plots.
steps
    Change points found on short bucket means (default 10 s) by a two-sided
    local-linear comparison (a windowed form of the two-sample test behind CUSUM;
    Page, Biometrika 41, 100 (1954)), with the threshold set from a stated
    false-alarm probability (see :func:`detect_steps`).
drift rate
    Theil-Sen slope (Sen, JASA 63, 1379 (1968); ``scipy.stats.theilslopes``) of
    the bucket means after the detected steps are subtracted, with its 1-sigma
    uncertainty widened for autocorrelated residuals.
jitter
    The rms of shot-to-shot motion with slow drift removed (see :func:`jitter_rms`).
spectrum
    Welch amplitude spectrum with a Hann window (Welch, IEEE Trans. Audio
    Electroacoust. 15, 70 (1967)), its strongest lines, the Nyquist frequency and
    where known lines (mains and harmonics) alias to (:func:`alias_frequency`).

Across BPMs: principal modes by SVD with a Marchenko-Pastur noise floor
(:func:`principal_modes`), correlation of drift with slow channels
(:func:`correlate_slow`), transmission between consecutive stations from the
``sum`` signals with loss events (:func:`transmission`), steps grouped into
events with the slow channels that stepped with them (:func:`group_steps`,
:func:`slow_steps_at`), and tolerance checks (defaults of 10 um drift and 5 um
jitter: common practice, our defaults; set them per machine and plane).
:func:`analyze_orbit` runs it all and returns an :class:`OrbitReport`; a shift
of 24 BPMs at 10 Hz (6.9 M readings) takes a few seconds on two cores
(``bench/bench_orbit.py``).  Also here: :func:`allan_deviation` and
:func:`three_bpm_resolution`.

Conventions
-----------
SI units and UTC as in :mod:`diagnostics`.  Positive slow-channel lag means the
orbit follows the channel (the channel leads).  BPMs are ordered along the line
by natural sort of their names (``BPM-2`` before ``BPM-10``) unless
``bpm_order`` is given.  Readings of one pulse share one timestamp; readings at
different timestamps are different pulses.
"""

from __future__ import annotations

import contextlib
import dataclasses
import math
import re
import warnings
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import integrate, signal, stats

from diagnostics.errors import InputError
from diagnostics.measurements import BPM_COLUMNS, SLOW_COLUMNS
from diagnostics.results import merge_flags

#: Planes analysed.
ORBIT_PLANES = ("x", "y")
#: Ways of removing slow drift before taking the jitter rms (see :func:`jitter_rms`).
JITTER_METHODS = ("moving_average", "first_difference")
#: Detrending applied before correlating drift with slow channels.
DETREND_METHODS = ("linear", "difference", "none")
#: Known spectral lines checked for aliasing, Hz: 50 and 60 Hz mains and their
#: second and third harmonics.
KNOWN_LINES_HZ = (50.0, 100.0, 150.0, 60.0, 120.0, 180.0)
#: Default drift limit, m.  Common practice: 10 um is our default; METHODS.md
#: section 5.7 gives design rules as fractions of the beam size (5 % APS design,
#: 10 % as a fault limit), so set it per machine and plane.
DEFAULT_DRIFT_LIMIT_M = 10e-6
#: Default jitter (rms) limit, m.  Common practice, our default; set per machine.
DEFAULT_JITTER_LIMIT_M = 5e-6
#: Default reference window: the first 10 minutes of the data.
DEFAULT_REFERENCE_MINUTES = 10.0
#: Default false-alarm probability of the step detector per BPM and plane over
#: the whole analysed window.
DEFAULT_STEP_FALSE_ALARM = 1e-3
#: Equivalent noise bandwidth of the Hann window, in bins: N sum(w^2) / (sum w)^2.
HANN_ENBW_BINS = 1.5
#: Gaussian scale factor of the median absolute deviation.
MAD_TO_SIGMA = 1.482602218505602

_NS_PER_S = 1_000_000_000


# ---------------------------------------------------------------------------
# result types
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Step:
    """A sudden change of position.

    Attributes
    ----------
    time : pandas.Timestamp
        When the step happened (UTC), resolved to one pulse.
    size_m : float
        Position after minus position before, m.
    size_err_m : float
        1-sigma uncertainty of ``size_m``, m.
    significance : float
        ``|size| / noise`` of the detection statistic (dimensionless).
    """

    time: pd.Timestamp
    size_m: float
    size_err_m: float
    significance: float = math.nan


@dataclass(frozen=True)
class StepEvent:
    """Steps of several BPM planes at the same time (within one step bucket).

    ``time`` is the median member's; ``members`` are ``(bpm, plane, size_m)``
    in line order; ``slow_changes`` are ``(channel, change, unit)`` of slow
    channels (magnet currents, ...) that stepped at the same time (see
    :func:`slow_steps_at`), which may explain the step.  ``message`` reads the pattern as METHODS.md section 5.3 does:
    a step shared by many BPMs points to a kick or a magnet change, a step on a
    single BPM to its electronics or mechanics.
    """

    time: pd.Timestamp
    members: tuple[tuple[str, str, float], ...]
    message: str = ""
    slow_changes: tuple[tuple[str, float, str], ...] = ()

    @property
    def bpms(self) -> tuple[str, ...]:
        return tuple(dict.fromkeys(bpm for bpm, _, _ in self.members))


@dataclass(frozen=True)
class SpectralLine:
    """One line of an amplitude spectrum.

    ``frequency_Hz`` is where it appears (inside ``[0, nyquist_Hz]``),
    ``amplitude_m`` its single-sided amplitude (a sine ``A sin(2 pi f t)`` has
    amplitude ``A``), and ``alias_of_Hz`` the known line (e.g. 50 Hz mains) whose
    alias falls on it, or ``None``.
    """

    frequency_Hz: float
    amplitude_m: float
    alias_of_Hz: float | None = None


@dataclass(frozen=True, eq=False)
class Spectrum:
    """Welch amplitude spectrum of one or more channels.

    Attributes
    ----------
    frequency_Hz : ndarray, shape (n_freq,)
    amplitude_m : ndarray, shape (n_freq,) or (n_freq, n_channels)
        ``sqrt(2 * power)`` per bin (Hann window, ``scaling='spectrum'``): a tone
        exactly on a bin reads its amplitude.
    psd_m2_per_Hz : ndarray, same shape as ``amplitude_m``
        One-sided power spectral density.
    sampling_Hz, nyquist_Hz, resolution_Hz : float
    lines : tuple of tuple of SpectralLine
        Strongest lines per channel, strongest first.
    aliases : tuple of (float, float)
        ``(known_line_Hz, alias_Hz)`` for each known line above Nyquist.
    n_segments : int
        Number of Welch segments averaged.
    """

    frequency_Hz: np.ndarray
    amplitude_m: np.ndarray
    psd_m2_per_Hz: np.ndarray
    sampling_Hz: float
    nyquist_Hz: float
    resolution_Hz: float
    lines: tuple[tuple[SpectralLine, ...], ...]
    aliases: tuple[tuple[float, float], ...]
    n_segments: int


@dataclass(frozen=True, eq=False)
class OrbitModes:
    """Principal modes of a BPM matrix (METHODS.md section 5.5).

    Attributes
    ----------
    plane : str
    bpms : tuple of str
    singular_values_m : ndarray, shape (n_modes,)
        Of the mean-subtracted matrix divided by ``sqrt(P)``: each is the rms
        motion carried by its mode, m.
    explained_fraction : ndarray, shape (n_modes,)
        ``s_k^2 / sum(s^2)``: the fraction of the motion (variance) of each mode.
    spatial_modes : ndarray, shape (n_modes, n_bpms)
        Unit vectors: how much each BPM takes part in each mode.
    mode_bpms : tuple of tuple of str
        For each mode, the BPMs that move together in it (weight ``v_i^2`` at
        least half the largest), largest first.
    noise_floor_m : float
        Noise level sigma estimated from the median singular value and the
        Marchenko-Pastur law; an estimate of the BPM resolution.
    noise_band_m : tuple of float
        ``sigma * |1 -+ sqrt(M/P)|``: where pure white noise would put the
        singular values (Marchenko & Pastur, Math. USSR Sb. 1, 457 (1967)).
    n_above_noise : int
        Number of singular values above the band.
    n_pulses : int
    flags : tuple of str
    message : str
    """

    plane: str
    bpms: tuple[str, ...]
    singular_values_m: np.ndarray
    explained_fraction: np.ndarray
    spatial_modes: np.ndarray
    mode_bpms: tuple[tuple[str, ...], ...]
    noise_floor_m: float
    noise_band_m: tuple[float, float]
    n_above_noise: int
    n_pulses: int
    flags: tuple[str, ...] = ()
    message: str = ""


@dataclass(frozen=True)
class SlowCorrelation:
    """Correlation of one BPM plane's drift with one slow channel.

    ``slope_m_per_unit`` (m per channel unit, e.g. m per degC) and its 1-sigma
    ``slope_err_m_per_unit``; ``pearson_r`` at the best lag ``lag_s`` (positive:
    the orbit follows the channel); ``n_points`` buckets used; ``detrend`` as
    in :data:`DETREND_METHODS`.
    """

    bpm: str
    plane: str
    channel: str
    unit: str
    slope_m_per_unit: float
    slope_err_m_per_unit: float
    pearson_r: float
    lag_s: float
    n_points: int
    detrend: str
    flags: tuple[str, ...] = ()
    message: str = ""


@dataclass(frozen=True)
class TransmissionPair:
    """Relative transmission from ``upstream`` to ``downstream`` station.

    Ratios of downstream to upstream ``sum``, normalised to the reference window
    (1.0 = as in the reference): mean, minimum (of bucket means) and at the end.
    """

    upstream: str
    downstream: str
    mean_ratio: float
    min_ratio: float
    final_ratio: float


@dataclass(frozen=True)
class LossEvent:
    """A drop of relative transmission beyond the threshold for long enough.

    ``size`` is the mean fractional loss (0.02 = 2 %) during the event, with its
    1-sigma ``size_err``.
    """

    upstream: str
    downstream: str
    start: pd.Timestamp
    end: pd.Timestamp
    duration_s: float
    size: float
    size_err: float


@dataclass(frozen=True)
class LimitViolation:
    """An interval during which a BPM plane exceeded a limit.

    ``quantity`` is ``"drift"`` (bucket-mean ``|drift|``) or ``"jitter"``
    (bucket rms); ``worst_m`` the largest value in the interval.
    """

    bpm: str
    plane: str
    quantity: str
    start: pd.Timestamp
    end: pd.Timestamp
    worst_m: float
    limit_m: float


@dataclass(frozen=True)
class OrbitLimits:
    """The tolerances applied (m); defaults are common practice, see the module constants."""

    drift_limit_m: float = DEFAULT_DRIFT_LIMIT_M
    jitter_limit_m: float = DEFAULT_JITTER_LIMIT_M


@dataclass(frozen=True, eq=False)
class ReferenceOrbit:
    """A reference ("golden") orbit: mean position per BPM, m.

    ``sum`` (optional) is the mean sum signal per BPM, used to normalise the
    transmission; ``start``/``end`` the window it was taken from, if any.
    """

    bpms: tuple[str, ...]
    x_m: np.ndarray
    y_m: np.ndarray
    sum: np.ndarray | None = None
    start: pd.Timestamp | None = None
    end: pd.Timestamp | None = None

    def plane(self, plane: str) -> np.ndarray:
        return self.x_m if plane == "x" else self.y_m


@dataclass(frozen=True)
class BpmPlaneSummary:
    """Everything about one BPM in one plane.

    Attributes
    ----------
    bpm, plane : str
    mean_m : float
        Mean position over the window, m.
    reference_m : float
        Reference position, m.
    drift_m : float
        Drift at the end of the window (last bucket mean minus reference), m.
    max_abs_drift_m : float
        Largest ``|bucket mean - reference|``, m.
    drift_rate_m_per_h, drift_rate_err_m_per_h : float
        Theil-Sen slope after removing steps, and its 1-sigma uncertainty.
    jitter_rms_m, jitter_rms_err_m : float
        Shot-to-shot rms with slow drift removed, and its 1-sigma uncertainty.
    steps : tuple of Step
    peak_frequency_Hz, peak_amplitude_m : float
        The strongest spectral line (NaN when none stands out).
    lines : tuple of SpectralLine
    out_of_limit : bool
    flags : tuple of str
    message : str
    """

    bpm: str
    plane: str
    mean_m: float
    reference_m: float
    drift_m: float
    max_abs_drift_m: float
    drift_rate_m_per_h: float
    drift_rate_err_m_per_h: float
    jitter_rms_m: float
    jitter_rms_err_m: float
    steps: tuple[Step, ...]
    peak_frequency_Hz: float
    peak_amplitude_m: float
    lines: tuple[SpectralLine, ...] = ()
    out_of_limit: bool = False
    flags: tuple[str, ...] = ()
    message: str = ""


@dataclass(frozen=True, eq=False)
class OrbitTrends:
    """Decimated series for plots, on the report's time buckets.

    ``times`` are bucket starts (UTC); arrays are ``(n_buckets, n_bpms)``, m;
    ``transmission`` is ``(n_buckets, n_bpms - 1)`` (normalised ratios).
    """

    times: pd.DatetimeIndex
    bpms: tuple[str, ...]
    drift_x_m: np.ndarray
    drift_y_m: np.ndarray
    jitter_x_m: np.ndarray
    jitter_y_m: np.ndarray
    transmission: np.ndarray


@dataclass(frozen=True, eq=False)
class OrbitReport:
    """The result of :func:`analyze_orbit`.

    Attributes
    ----------
    start, end : pandas.Timestamp
        First and last reading analysed (UTC).
    n_pulses, n_readings : int
    bpms : tuple of str
        In line order.
    sampling_Hz, nyquist_Hz : float
        Pulse rate estimated from the timestamps, and half of it.
    reference : ReferenceOrbit
    summaries : tuple of BpmPlaneSummary
        One per BPM and plane, in line order, x before y.
    modes : tuple of OrbitModes
        One per plane, of the shot-to-shot motion.
    correlations : tuple of SlowCorrelation
    transmission : tuple of TransmissionPair
    loss_events : tuple of LossEvent
    limits : OrbitLimits
    violations : tuple of LimitViolation
    known_line_aliases : tuple of (float, float)
        ``(line_Hz, alias_Hz)`` of known lines above Nyquist.
    trends : OrbitTrends or None
    step_events : tuple of StepEvent
        Steps grouped by time across BPMs and planes.
    options : mapping
        The analysis options used.
    flags : tuple of str
    message : str
    """

    start: pd.Timestamp
    end: pd.Timestamp
    n_pulses: int
    n_readings: int
    bpms: tuple[str, ...]
    sampling_Hz: float
    nyquist_Hz: float
    reference: ReferenceOrbit
    summaries: tuple[BpmPlaneSummary, ...]
    modes: tuple[OrbitModes, ...]
    correlations: tuple[SlowCorrelation, ...]
    transmission: tuple[TransmissionPair, ...]
    loss_events: tuple[LossEvent, ...]
    limits: OrbitLimits
    violations: tuple[LimitViolation, ...]
    known_line_aliases: tuple[tuple[float, float], ...]
    trends: OrbitTrends | None = None
    step_events: tuple[StepEvent, ...] = ()
    options: Mapping[str, object] = field(default_factory=dict)
    flags: tuple[str, ...] = ()
    message: str = ""

    def summary(self, bpm: str, plane: str) -> BpmPlaneSummary:
        """The summary of ``bpm`` in ``plane``."""
        for item in self.summaries:
            if item.bpm == bpm and item.plane == plane:
                return item
        raise KeyError(f"no summary for {bpm} {plane}")

    @property
    def out_of_limit_bpms(self) -> tuple[str, ...]:
        """BPMs with any plane out of limit, in line order."""
        bad = {s.bpm for s in self.summaries if s.out_of_limit}
        return tuple(b for b in self.bpms if b in bad)

    @property
    def steps(self) -> tuple[tuple[str, str, Step], ...]:
        """All steps as ``(bpm, plane, step)``, by time."""
        items = [(s.bpm, s.plane, st) for s in self.summaries for st in s.steps]
        return tuple(sorted(items, key=lambda item: item[2].time))


# ---------------------------------------------------------------------------
# the wide matrix
# ---------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class OrbitMatrix:
    """BPM readings pivoted to one row per pulse and one column per BPM.

    Attributes
    ----------
    times_ns : ndarray of int64, shape (n_pulses,)
        Pulse times, ns since the Unix epoch (UTC), increasing.
    bpms : tuple of str
        Column names in line order.
    x_m, y_m, sum : ndarray, shape (n_pulses, n_bpms)
        NaN where a BPM gave no (valid) reading for a pulse.
    n_readings : int
        Rows of the input table used.
    n_masked : int
        Readings set to NaN because the sum signal was too low.
    """

    times_ns: np.ndarray
    bpms: tuple[str, ...]
    x_m: np.ndarray
    y_m: np.ndarray
    sum: np.ndarray
    n_readings: int = 0
    n_masked: int = 0

    @property
    def times(self) -> pd.DatetimeIndex:
        return pd.DatetimeIndex(pd.to_datetime(self.times_ns, unit="ns", utc=True))

    @property
    def t_s(self) -> np.ndarray:
        """Seconds since the first pulse."""
        return (self.times_ns - self.times_ns[0]) / _NS_PER_S

    def plane(self, plane: str) -> np.ndarray:
        return self.x_m if plane == "x" else self.y_m


def natural_order(names: Sequence[str]) -> tuple[str, ...]:
    """Sort names with embedded numbers numerically (``BPM-2`` before ``BPM-10``).

    Examples
    --------
    >>> natural_order(["BPM-10", "BPM-2", "BPM-1"])
    ('BPM-1', 'BPM-2', 'BPM-10')
    """

    def key(name: str) -> list[object]:
        return [int(part) if part.isdigit() else part for part in re.split(r"(\d+)", name)]

    return tuple(sorted(names, key=key))


def _timestamps_ns(column: pd.Series, what: str) -> np.ndarray:
    """Timestamps as int64 ns UTC; naive values are taken as UTC."""
    if not isinstance(column.dtype, pd.DatetimeTZDtype) and not pd.api.types.is_datetime64_dtype(
        column.dtype
    ):
        try:
            column = pd.to_datetime(column, utc=True, format="ISO8601")
        except (ValueError, TypeError) as exc:
            raise InputError(f"{what}: column 'timestamp' is not a time (expected ISO 8601 UTC)") from exc
    if isinstance(column.dtype, pd.DatetimeTZDtype):
        column = column.dt.tz_convert("UTC")
    if column.isna().any():
        raise InputError(f"{what}: column 'timestamp' has missing values (expected a time on every row)")
    return np.asarray(column.dt.as_unit("ns").array.asi8, dtype=np.int64)


def _as_ns(value: object) -> int | None:
    if value is None:
        return None
    stamp = pd.Timestamp(value)
    stamp = stamp.tz_localize("UTC") if stamp.tzinfo is None else stamp.tz_convert("UTC")
    return int(stamp.as_unit("ns").value)


def _seconds(value: object, name: str) -> float:
    """A duration given as seconds or as a pandas offset string ('1min', '10s')."""
    if isinstance(value, (int, float, np.integer, np.floating)):
        seconds = float(value)
    else:
        try:
            seconds = pd.Timedelta(value).total_seconds()
        except (ValueError, TypeError) as exc:
            raise InputError(f"option {name}: {value!r} is not a duration (expected seconds or e.g. '1min')") from exc
    if not math.isfinite(seconds) or seconds <= 0:
        raise InputError(f"option {name}: {value!r} (expected a positive duration)")
    return seconds


def _check_columns(df: pd.DataFrame, columns: Sequence[str], what: str) -> None:
    if not isinstance(df, pd.DataFrame):
        raise InputError(f"{what}: expected a pandas DataFrame, got {type(df).__name__}")
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise InputError(f"{what}: missing column {missing[0]!r} (expected columns {', '.join(columns)})")


def orbit_matrix(
    bpm_df: pd.DataFrame,
    *,
    bpm_order: Sequence[str] | None = None,
    start: object = None,
    end: object = None,
    min_sum_fraction: float | None = None,
) -> OrbitMatrix:
    """Pivot the long BPM table into ``(n_pulses, n_bpms)`` arrays per plane.

    One pass: pulse codes from the (sorted) timestamps, BPM codes from
    ``pandas.factorize`` (or the categorical codes), then a numpy scatter.

    Parameters
    ----------
    bpm_df : pandas.DataFrame
        BPM table contract (``timestamp, bpm, x_m, y_m``, optional ``sum``).
    bpm_order : sequence of str, optional
        Line order of the BPMs; default natural sort of the names.  BPMs not in
        the table are dropped; BPMs of the table not listed go last.
    start, end : time-like, optional
        Keep readings with ``start <= t <= end``.
    min_sum_fraction : float, optional
        Set positions to NaN where ``sum`` is finite and below this fraction of
        that BPM's median sum (beam off or too weak to trust the position).

    Returns
    -------
    OrbitMatrix
    """
    _check_columns(bpm_df, BPM_COLUMNS[:4], "bpm table")
    t_ns = _timestamps_ns(bpm_df["timestamp"], "bpm table")
    keep = np.ones(t_ns.size, dtype=bool)
    lo, hi = _as_ns(start), _as_ns(end)
    if lo is not None:
        keep &= t_ns >= lo
    if hi is not None:
        keep &= t_ns <= hi
    selected = bool(keep.all())
    if not selected:
        t_ns = t_ns[keep]
    if t_ns.size == 0:
        raise InputError("bpm table: no readings in the selected time range (expected at least one)")

    def column(name: str) -> np.ndarray:
        values = np.asarray(bpm_df[name].to_numpy(dtype=np.float64, na_value=np.nan))
        return values if selected else values[keep]

    x, y = column("x_m"), column("y_m")
    total = column("sum") if "sum" in bpm_df.columns else np.full(t_ns.size, np.nan)

    bpm_column = bpm_df["bpm"]
    if isinstance(bpm_column.dtype, pd.CategoricalDtype):
        codes = np.asarray(bpm_column.cat.codes.to_numpy(), dtype=np.int64)
        names = [str(c) for c in bpm_column.cat.categories]
    else:
        codes, uniques = pd.factorize(bpm_column, use_na_sentinel=True)
        names = [str(u) for u in uniques]
    if not selected:
        codes = codes[keep]
    if (codes < 0).any():
        raise InputError("bpm table: column 'bpm' has missing names (expected a BPM name on every row)")
    present = np.bincount(codes, minlength=len(names)) > 0
    names_present = [n for n, p in zip(names, present, strict=True) if p]
    if bpm_order is None:
        order = list(natural_order(names_present))
    else:
        listed = [str(b) for b in bpm_order if str(b) in set(names_present)]
        order = listed + [n for n in natural_order(names_present) if n not in set(listed)]
    column_of = {name: i for i, name in enumerate(order)}
    remap = np.array([column_of.get(n, -1) for n in names], dtype=np.int64)
    bpm_codes = remap[codes]

    # pulse codes: the store hands readings sorted by time, so a run-length code
    # suffices; otherwise sort the unique times.
    time_sorted = t_ns.size > 1 and bool(np.all(t_ns[1:] >= t_ns[:-1]))
    if time_sorted:
        new = np.empty(t_ns.size, dtype=bool)
        new[0] = True
        np.not_equal(t_ns[1:], t_ns[:-1], out=new[1:])
        pulse_codes = np.cumsum(new) - 1
        times = t_ns[new]
    else:
        times, pulse_codes = np.unique(t_ns, return_inverse=True)
    shape = (times.size, len(order))
    # a complete table sorted by time and line order is already the wide array:
    # every block of n_bpms rows is one pulse with the BPMs in line order
    in_place = False
    if time_sorted and bpm_codes.size == shape[0] * shape[1]:
        # pulse codes are non-decreasing here, so first and last of each block pin the rest
        rows = np.arange(shape[0])
        in_place = (
            bool(np.array_equal(pulse_codes[:: shape[1]], rows))
            and bool(np.array_equal(pulse_codes[shape[1] - 1 :: shape[1]], rows))
            and bool(np.all(bpm_codes.reshape(shape) == np.arange(shape[1])))
        )
    flat = None if in_place else pulse_codes * shape[1] + bpm_codes
    wide = []
    for values in (x, y, total):
        if flat is None:
            wide.append(values.reshape(shape))
        else:
            out = np.full(shape, np.nan)
            out.ravel()[flat] = values
            wide.append(out)
    wx, wy, ws = wide
    n_masked = 0
    if min_sum_fraction is not None and np.isfinite(ws).any():
        with np.errstate(invalid="ignore"), _quiet_nanmean():
            # a threshold needs no exact median: at most ~10 000 evenly spread pulses
            median = np.nanmedian(ws[:: max(1, shape[0] // 10_000)], axis=0)
            low = np.isfinite(ws) & (ws < min_sum_fraction * median)
        n_masked = int(low.sum())
        if n_masked:
            wx, wy = wx.copy(), wy.copy()  # never write into the caller's table
            wx[low] = np.nan
            wy[low] = np.nan
    return OrbitMatrix(times, tuple(order), wx, wy, ws, n_readings=int(t_ns.size), n_masked=n_masked)


def sampling_rate_Hz(times_ns: np.ndarray) -> float:
    """Pulse rate from the (sorted, unique) pulse times, Hz.

    The median spacing finds the gaps (spacings over 1.5 times it); the rate is
    then the number of intervals over the time they span, summed over the
    gap-free runs, which averages out timestamp noise far better than the
    median alone.
    """
    times_ns = np.asarray(times_ns)
    if times_ns.size < 2:
        return math.nan
    spacing = np.diff(times_ns)
    spacing = spacing[spacing > 0]
    if spacing.size == 0:
        return math.nan
    median = float(np.median(spacing))
    regular = spacing[spacing <= 1.5 * median]
    return float(_NS_PER_S * regular.size / regular.sum())


# ---------------------------------------------------------------------------
# buckets and the reference orbit
# ---------------------------------------------------------------------------


def bucket_means(
    times_ns: np.ndarray, values: np.ndarray, bucket_s: float, *, origin_ns: int | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Means of ``values`` over fixed time buckets (NaN-aware, empty buckets NaN).

    Parameters
    ----------
    times_ns : ndarray of int64, shape (n,)
        Sorted times, ns.
    values : ndarray, shape (n,) or (n, k)
    bucket_s : float
        Bucket length, s.
    origin_ns : int, optional
        Start of the first bucket; default the first time floored to the bucket.

    Returns
    -------
    starts_ns : ndarray of int64, shape (n_buckets,)
    means : ndarray, shape (n_buckets,) or (n_buckets, k)
    counts : ndarray, same shape as ``means``
    """
    bucket_ns = int(round(bucket_s * _NS_PER_S))
    if origin_ns is None:
        origin_ns = int(times_ns[0] // bucket_ns * bucket_ns)
    index = (times_ns - origin_ns) // bucket_ns
    n_buckets = int(index[-1]) + 1
    values = np.asarray(values, dtype=np.float64)
    # times are sorted, so each bucket is one contiguous run: reduceat over run starts
    run_starts = np.flatnonzero(np.r_[True, index[1:] != index[:-1]])
    if _all_finite(values):
        sums = np.add.reduceat(values, run_starts, axis=0)
        lengths = np.diff(np.r_[run_starts, index.size]).astype(np.float64)
        counts_run = np.broadcast_to(lengths.reshape((-1,) + (1,) * (values.ndim - 1)), sums.shape)
    else:
        finite = np.isfinite(values)
        sums = np.add.reduceat(np.where(finite, values, 0.0), run_starts, axis=0)
        counts_run = np.add.reduceat(finite.astype(np.float64), run_starts, axis=0)
    shape = (n_buckets,) + values.shape[1:]
    means = np.full(shape, np.nan)
    counts = np.zeros(shape)
    where = index[run_starts]
    with np.errstate(invalid="ignore", divide="ignore"):
        means[where] = np.where(counts_run > 0, sums / counts_run, np.nan)
    counts[where] = counts_run
    starts = origin_ns + np.arange(n_buckets, dtype=np.int64) * bucket_ns
    return starts, means, counts


def reference_orbit(
    matrix: OrbitMatrix,
    *,
    start: object = None,
    end: object = None,
    minutes: float = DEFAULT_REFERENCE_MINUTES,
) -> ReferenceOrbit:
    """Mean orbit over a window: ``[start, end]``, or the first ``minutes`` of the data.

    When only ``start`` is given the window is ``minutes`` long from it.
    """
    lo = _as_ns(start)
    hi = _as_ns(end)
    if lo is None:
        lo = int(matrix.times_ns[0])
    if hi is None:
        hi = lo + int(minutes * 60 * _NS_PER_S)
    mask = (matrix.times_ns >= lo) & (matrix.times_ns < hi)
    if not mask.any():
        raise InputError(
            f"reference window {pd.Timestamp(lo, tz='UTC')} .. {pd.Timestamp(hi, tz='UTC')}: "
            "no readings (expected a window inside the data)"
        )
    with np.errstate(invalid="ignore"), _quiet_nanmean():
        x = np.nanmean(matrix.x_m[mask], axis=0)
        y = np.nanmean(matrix.y_m[mask], axis=0)
        total = np.nanmean(matrix.sum[mask], axis=0)
    return ReferenceOrbit(
        matrix.bpms, x, y, total, pd.Timestamp(lo, tz="UTC"), pd.Timestamp(hi, tz="UTC")
    )


@contextlib.contextmanager
def _quiet_nanmean() -> Iterator[None]:
    """Silence numpy's 'Mean of empty slice' for all-NaN columns (they stay NaN)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        yield


def _align_reference(reference: ReferenceOrbit, bpms: Sequence[str]) -> ReferenceOrbit:
    """The reference re-ordered to ``bpms`` (NaN for BPMs it lacks)."""
    if tuple(reference.bpms) == tuple(bpms):
        return reference
    where = {b: i for i, b in enumerate(reference.bpms)}

    def pick(values: np.ndarray | None) -> np.ndarray | None:
        if values is None:
            return None
        values = np.asarray(values, dtype=np.float64)
        return np.array([values[where[b]] if b in where else np.nan for b in bpms])

    x, y = pick(reference.x_m), pick(reference.y_m)
    assert x is not None and y is not None
    return ReferenceOrbit(tuple(bpms), x, y, pick(reference.sum), reference.start, reference.end)


def drift_matrix(
    bpm_df: pd.DataFrame,
    bucket: object = "1min",
    *,
    reference: ReferenceOrbit | None = None,
    reference_minutes: float = DEFAULT_REFERENCE_MINUTES,
    bpm_order: Sequence[str] | None = None,
) -> tuple[pd.DatetimeIndex, tuple[str, ...], np.ndarray, np.ndarray]:
    """Drift from the reference orbit on time buckets, for plots.

    Returns
    -------
    times : pandas.DatetimeIndex
        Bucket starts (UTC), shape (n_t,).
    bpms : tuple of str
    drift_x, drift_y : ndarray, shape (n_t, n_bpm)
        Bucket mean minus reference, m (NaN for empty buckets).
    """
    matrix = orbit_matrix(bpm_df, bpm_order=bpm_order)
    ref = reference_orbit(matrix, minutes=reference_minutes) if reference is None else _align_reference(
        reference, matrix.bpms
    )
    bucket_s = _seconds(bucket, "bucket")
    starts, mx, _ = bucket_means(matrix.times_ns, matrix.x_m, bucket_s)
    _, my, _ = bucket_means(matrix.times_ns, matrix.y_m, bucket_s)
    times = pd.DatetimeIndex(pd.to_datetime(starts, unit="ns", utc=True))
    return times, matrix.bpms, mx - ref.x_m, my - ref.y_m


# ---------------------------------------------------------------------------
# steps
# ---------------------------------------------------------------------------


def robust_sigma(values: np.ndarray) -> float:
    """Gaussian-equivalent standard deviation from the median absolute deviation."""
    values = np.asarray(values, dtype=np.float64)
    values = values[np.isfinite(values)]
    if values.size == 0:
        return math.nan
    return float(MAD_TO_SIGMA * np.median(np.abs(values - np.median(values))))


def step_threshold(n_tests: int, false_alarm: float) -> float:
    """Detection threshold in units of sigma for ``n_tests`` two-sided tests.

    Bonferroni: ``P(any |z| > h) <= n_tests * 2 * (1 - Phi(h)) = false_alarm``.
    The windowed statistics overlap, so the real false-alarm rate is lower.

    Examples
    --------
    >>> round(step_threshold(2880, 1e-3), 1)  # 8 h of 10 s buckets
    5.1
    """
    n_tests = max(int(n_tests), 1)
    return float(stats.norm.isf(false_alarm / (2.0 * n_tests)))


def _window_step_statistic(
    t: np.ndarray, m: np.ndarray, w: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Step estimate at every bucket boundary from ``w`` buckets on each side.

    Model on each side of boundary ``k``: a common slope and two intercepts
    (analysis of covariance), so a linear drift does not read as a step.  The
    step is the difference of the two lines at the boundary.  Vectorised with
    cumulative sums; columns are independent channels.

    Returns ``delta`` (step estimates), ``se_unit`` (their standard error per
    unit bucket noise) and ``ok`` (enough points on both sides), all shaped
    ``(n_buckets + 1, k)``, boundary ``k`` sitting before bucket ``k``.
    """
    n = m.shape[0]
    finite = np.isfinite(m)
    tt = np.broadcast_to(t[:, None], m.shape)
    f = finite.astype(np.float64)
    mm = np.where(finite, m, 0.0)
    tf = np.where(finite, tt, 0.0)

    def csum(a: np.ndarray) -> np.ndarray:
        out = np.zeros((n + 1,) + a.shape[1:])
        np.cumsum(a, axis=0, out=out[1:])
        return out

    c_n, c_t, c_m = csum(f), csum(tf), csum(mm)
    c_tt, c_tm = csum(tf * tf), csum(tf * mm)
    k = np.arange(n + 1)
    lo = np.clip(k - w, 0, n)
    hi = np.clip(k + w, 0, n)

    def side(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, ...]:
        return tuple(c[b] - c[a] for c in (c_n, c_t, c_m, c_tt, c_tm))

    nl, tl, ml, ttl, tml = side(lo, k)
    nr, tr, mr, ttr, tmr = side(k, hi)
    minimum = max(3, w // 2)
    ok = (nl >= minimum) & (nr >= minimum)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_tl, mean_tr = tl / nl, tr / nr
        mean_ml, mean_mr = ml / nl, mr / nr
        sxx = (ttl - tl * mean_tl) + (ttr - tr * mean_tr)
        sxy = (tml - tl * mean_ml) + (tmr - tr * mean_mr)
        slope = sxy / sxx
        gap = mean_tr - mean_tl
        delta = (mean_mr - mean_ml) - slope * gap
        se_unit = np.sqrt(1.0 / nl + 1.0 / nr + gap * gap / sxx)
    ok &= np.isfinite(delta) & np.isfinite(se_unit) & (sxx > 0)
    delta = np.where(ok, delta, 0.0)
    se_unit = np.where(ok, se_unit, np.inf)
    return delta, se_unit, ok


def _refine_step_time(values: np.ndarray) -> int:
    """Index of the first sample after the split that best separates two means.

    Maximises ``sqrt(n1 n2 / n) |mean2 - mean1|`` (the two-sample statistic).
    """
    finite = np.isfinite(values)
    v = values[finite]
    idx = np.flatnonzero(finite)
    if v.size < 4:
        return int(idx[v.size // 2]) if v.size else 0
    c = np.cumsum(v)
    n = v.size
    k = np.arange(1, n)
    m1 = c[:-1] / k
    m2 = (c[-1] - c[:-1]) / (n - k)
    score = np.sqrt(k * (n - k) / n) * np.abs(m2 - m1)
    return int(idx[int(np.argmax(score)) + 1])


def _step_size(
    centres: np.ndarray, m: np.ndarray, j: int, tau: float, w: int, sigma: float, *, keep_bucket: bool = False
) -> tuple[float, float]:
    """Step size at time ``tau`` inside bucket ``j`` by least squares on bucket means.

    Buckets ``[j-w, j)`` and ``(j, j+w]``, model: intercept each side plus a
    common slope; the mixed bucket ``j`` is left out (kept on the right side with
    ``keep_bucket``, when the step is at its start).
    """
    n = m.size
    left = np.arange(max(j - w, 0), j)
    first = j if keep_bucket else j + 1
    right = np.arange(first, min(first + w, n))
    rows = np.r_[left, right]
    side = np.r_[np.zeros(left.size), np.ones(right.size)]
    good = np.isfinite(m[rows])
    rows, side = rows[good], side[good]
    if (side == 0).sum() < 2 or (side == 1).sum() < 2:
        return math.nan, math.nan
    design = np.column_stack([1.0 - side, side, centres[rows] - tau])
    coef, *_ = np.linalg.lstsq(design, m[rows], rcond=None)
    contrast = np.array([-1.0, 1.0, 0.0])
    cov_unit = np.linalg.pinv(design.T @ design)
    return float(coef[1] - coef[0]), float(sigma * math.sqrt(contrast @ cov_unit @ contrast))


def _detect_steps_columns(
    times_ns: np.ndarray,
    values: np.ndarray,
    *,
    bucket_s: float,
    window_s: float,
    false_alarm: float,
    min_step_m: float = 0.0,
) -> list[list[tuple[int, float, float, float]]]:
    """Steps per column: lists of ``(time_ns, size, size_err, significance)``."""
    starts, means, _ = bucket_means(times_ns, values, bucket_s)
    if means.ndim == 1:
        means = means[:, None]
        values = values[:, None]
    bucket_ns = int(round(bucket_s * _NS_PER_S))
    # work on the buckets that hold data: a gap (beam off) does not empty the
    # windows either side of it, and the fit uses the true bucket times
    kept = np.flatnonzero(np.isfinite(means).any(axis=1))
    means = means[kept]
    centres = (starts[kept] - starts[0]) / _NS_PER_S + 0.5 * bucket_s
    n_buckets, n_cols = means.shape
    # half-window in buckets; a short record gets a shorter window (a quarter of it)
    w = max(min(int(round(window_s / bucket_s)), n_buckets // 4), 3)
    found: list[list[tuple[int, float, float, float]]] = [[] for _ in range(n_cols)]
    if n_buckets < 2 * max(3, w // 2) + 1:
        return found
    delta, se_unit, ok = _window_step_statistic(centres, means, w)
    for col in range(n_cols):
        m = means[:, col]
        # noise of a bucket mean from first differences (a step is one outlier)
        sigma_white = robust_sigma(np.diff(m[np.isfinite(m)])) / math.sqrt(2.0)
        valid = ok[:, col]
        if not valid.any() or not math.isfinite(sigma_white):
            continue
        d = delta[:, col]
        # guard against correlated (non-white) wander: never trust a noise level
        # below the robust spread of the statistic itself
        sigma_stat = robust_sigma(d[valid])
        noise = np.maximum(sigma_white * se_unit[:, col], sigma_stat)
        if not np.isfinite(noise[valid]).any() or np.nanmax(noise[valid]) <= 0:
            continue
        with np.errstate(invalid="ignore", divide="ignore"):
            z = np.where(valid & (noise > 0), np.abs(d) / noise, 0.0)
        h = step_threshold(int(valid.sum()), false_alarm)
        while True:
            k = int(np.argmax(z))
            if z[k] <= h:
                break
            significance = float(z[k])
            z[max(k - w, 0) : k + w + 1] = 0.0
            if abs(d[k]) < min_step_m or k == 0 or k >= n_buckets:
                continue
            # refine to one pulse within the two buckets around the boundary
            before_ns, after_ns = starts[kept[k - 1]], starts[kept[k]]
            if after_ns - before_ns == bucket_ns:
                a, b = np.searchsorted(times_ns, [before_ns, after_ns + bucket_ns])
                i = a + _refine_step_time(values[a:b, col])
            else:
                # a gap in the data between the two buckets: the step shows at
                # the first pulse after the gap
                i = int(np.searchsorted(times_ns, after_ns))
            i = min(i, times_ns.size - 1)
            t_step = int(times_ns[i])
            j = int(np.searchsorted(starts[kept], t_step, side="right")) - 1
            tau = (t_step - starts[0]) / _NS_PER_S
            if after_ns - before_ns == bucket_ns:
                size, err = _step_size(centres, m, j, tau, w, sigma_white)
            else:
                # the step sits at the start of bucket j: nothing mixed to leave out
                size, err = _step_size(centres, m, j, tau, w, sigma_white, keep_bucket=True)
            if not math.isfinite(size):
                size, err = float(d[k]), float(noise[k])
            found[col].append((t_step, size, err, significance))
        found[col].sort()
    return found


def detect_steps(
    times: object,
    values: np.ndarray,
    *,
    bucket: object = "10s",
    window: object = "5min",
    false_alarm: float = DEFAULT_STEP_FALSE_ALARM,
    min_step_m: float = 0.0,
) -> tuple[Step, ...]:
    """Find sudden changes of position in one BPM channel.

    The readings are averaged in buckets (default 10 s).  At every bucket
    boundary, ``window`` of buckets on each side are fitted with a common slope
    and separate intercepts; the step estimate is the jump between the two lines
    at the boundary, so slow (locally linear) drift does not read as a step.  The
    estimate is divided by its noise: the larger of the white-noise standard
    error (bucket noise from the MAD of first differences) and the robust spread
    of the estimate over all boundaries.  A step is reported where this exceeds
    ``h = Phi^-1(1 - alpha / (2 n))`` for ``n`` tested boundaries and false-alarm
    probability ``alpha`` (Bonferroni), strongest first, each masking
    ``window`` around itself (a record shorter than four windows uses a quarter
    of its length as the window).  The time is refined to the pulse that best splits
    the two buckets around the boundary; the size is refitted without the mixed
    bucket.  This is a windowed two-sample (likelihood-ratio) form of the
    change-point test of Page, "Continuous inspection schemes", Biometrika 41,
    100 (1954).

    Measured on 2 h of 10 Hz readings with 5 um white jitter, 10 um/h drift and
    an 8 um curved wander (200 seeds): a false step in 0 series at the default
    ``false_alarm = 1e-3``, in 5.5 % at 0.1 and 19.5 % at 0.5 (the bound is
    conservative); a 2 um step was found in 40 of 40 series, 1.5 um in 32 of
    40, with a size scatter of 0.2 um.

    Parameters
    ----------
    times : array-like of datetime or int64 ns, shape (n,)
        Sorted pulse times.
    values : ndarray, shape (n,)
        Positions, m (NaN allowed).
    bucket, window : duration
        Bucket length and half-window (seconds or e.g. ``"10s"``, ``"5min"``).
    false_alarm : float
        Probability of one or more false steps over the whole series from white
        noise plus linear drift (upper bound).
    min_step_m : float
        Ignore steps smaller than this, m.

    Returns
    -------
    tuple of Step
    """
    times_ns = _times_to_ns(times)
    found = _detect_steps_columns(
        times_ns,
        np.asarray(values, dtype=np.float64),
        bucket_s=_seconds(bucket, "bucket"),
        window_s=_seconds(window, "window"),
        false_alarm=false_alarm,
        min_step_m=min_step_m,
    )[0]
    return tuple(Step(pd.Timestamp(t, tz="UTC"), s, e, z) for t, s, e, z in found)


def _times_to_ns(times: object) -> np.ndarray:
    """Times (int64 ns, datetime-like array, Index or Series) as int64 ns UTC."""
    if isinstance(times, pd.Series):
        times = pd.DatetimeIndex(times) if not pd.api.types.is_integer_dtype(times.dtype) else times.to_numpy()
    if isinstance(times, pd.DatetimeIndex):
        index = times.tz_localize("UTC") if times.tz is None else times.tz_convert("UTC")
        return np.asarray(index.as_unit("ns").asi8, dtype=np.int64)
    arr = np.asarray(times)
    if arr.dtype.kind in "iu":
        return arr.astype(np.int64)
    index = pd.DatetimeIndex(pd.to_datetime(pd.Index(times), utc=True))
    return np.asarray(index.as_unit("ns").asi8, dtype=np.int64)


# ---------------------------------------------------------------------------
# drift rate
# ---------------------------------------------------------------------------


def _lag1_autocorrelation(residuals: np.ndarray) -> float:
    r = residuals[np.isfinite(residuals)]
    if r.size < 3:
        return 0.0
    r = r - r.mean()
    denom = float(r @ r)
    if denom <= 0:
        return 0.0
    return float((r[1:] @ r[:-1]) / denom)


def drift_rate(t_h: np.ndarray, values: np.ndarray, *, max_points: int = 720) -> tuple[float, float]:
    """Robust drift rate and its 1-sigma uncertainty, per hour.

    Theil-Sen slope (Sen, "Estimates of the regression coefficient based on
    Kendall's tau", JASA 63, 1379 (1968); ``scipy.stats.theilslopes``) of
    ``values`` against ``t_h``.  The uncertainty is half the 68.27 % confidence
    interval, multiplied by ``sqrt((1 + rho1) / (1 - rho1))`` for lag-1
    autocorrelation ``rho1 > 0`` of the residuals (effective sample size of an
    AR(1) series, METHODS.md section 5.2).  Series longer than ``max_points`` are
    averaged in consecutive blocks first (Theil-Sen is O(n^2)).

    Parameters
    ----------
    t_h : ndarray, shape (n,)
        Times, hours.
    values : ndarray, shape (n,)
        Positions (NaN allowed), m.

    Returns
    -------
    rate_m_per_h, rate_err_m_per_h : float
    """
    good = np.isfinite(values) & np.isfinite(t_h)
    t, v = np.asarray(t_h, dtype=np.float64)[good], np.asarray(values, dtype=np.float64)[good]
    if v.size < 3 or np.ptp(t) <= 0:
        return math.nan, math.nan
    if v.size > max_points:
        block = int(math.ceil(v.size / max_points))
        cut = v.size // block * block
        t = t[:cut].reshape(-1, block).mean(axis=1)
        v = v[:cut].reshape(-1, block).mean(axis=1)
    fit = stats.theilslopes(v, t, alpha=0.6827)
    err = 0.5 * (fit.high_slope - fit.low_slope)
    rho = _lag1_autocorrelation(v - (fit.intercept + fit.slope * t))
    rho = min(max(rho, 0.0), 0.99)
    return float(fit.slope), float(err * math.sqrt((1 + rho) / (1 - rho)))


# ---------------------------------------------------------------------------
# jitter
# ---------------------------------------------------------------------------


def _jitter_residuals(
    values: np.ndarray, *, method: str, window: int, times_ns: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Shot-to-shot residuals and the factor that makes ``factor * r**2`` unbiased.

    ``moving_average``: ``r = x - mean of the centred window of k samples``
    (including x itself); for white noise ``E[r^2] = sigma^2 (1 - 1/k)``, so the
    factor is ``k / (k - 1)``.  ``first_difference``: ``r = (x[i+1] - x[i]) /
    sqrt(2)`` (pairs across a time gap dropped), factor 1.
    """
    values = np.asarray(values, dtype=np.float64)
    if values.ndim == 1:
        values = values[:, None]
    n = values.shape[0]
    if method == "first_difference":
        r = np.full_like(values, np.nan)
        r[1:] = np.diff(values, axis=0) / math.sqrt(2.0)
        if times_ns is not None and n > 2:
            dt = np.diff(times_ns)
            gap = dt > 1.5 * np.median(dt)
            r[1:][gap] = np.nan
        return r, np.ones_like(values)
    all_finite = _all_finite(values)
    finite = True if all_finite else np.isfinite(values)
    with _quiet_nanmean():
        centre = values.mean(axis=0) if all_finite else np.nanmean(values, axis=0)
    centre = np.where(np.isfinite(centre), centre, 0.0)
    # subtract the column mean first so the running sums stay small
    filled = values - centre if all_finite else np.where(finite, values - centre, 0.0)
    local_sum = _moving_sum(filled, window)
    if all_finite:
        idx = np.arange(n)
        half = window // 2
        count = (np.minimum(idx + half + 1, n) - np.maximum(idx - half, 0)).astype(np.float64)
        count = count.reshape((n,) + (1,) * (values.ndim - 1))
    else:
        count = _moving_sum(np.asarray(finite, dtype=np.float64), window)
    with np.errstate(invalid="ignore", divide="ignore"):
        local_sum /= count  # in place: each pass over a shift's array costs ~0.1 s
        filled -= local_sum
        del local_sum
        r = filled if all_finite else np.where(finite, filled, np.nan)
        factor = np.where(count > 1, count / (count - 1), np.nan)
    return r, factor


def _moving_sum(values: np.ndarray, window: int) -> np.ndarray:
    """Sum over a centred window of ``window`` (odd) rows, truncated at the ends."""
    n = values.shape[0]
    half = window // 2
    c = np.zeros((n + 1,) + values.shape[1:])
    np.cumsum(values, axis=0, out=c[1:])
    out = np.empty_like(values, dtype=np.float64)
    if n >= window:
        # interior rows by contiguous slices (no gather): c[i + half + 1] - c[i - half]
        np.subtract(c[window:], c[: n + 1 - window], out=out[half : n - half])
        head = np.arange(half)
        out[:half] = c[head + half + 1] - c[0]
        tail = np.arange(n - half, n)
        out[n - half :] = c[n] - c[tail - half]
    else:
        idx = np.arange(n)
        out[:] = c[np.minimum(idx + half + 1, n)] - c[np.maximum(idx - half, 0)]
    return out


def jitter_rms(
    values: np.ndarray,
    *,
    method: str = "moving_average",
    window: int = 51,
    times: object = None,
) -> tuple[np.ndarray | float, np.ndarray | float]:
    """RMS of shot-to-shot motion with slow drift removed, and its uncertainty.

    Methods (:data:`JITTER_METHODS`):

    ``moving_average`` (default)
        Residual against a centred moving average of ``window`` pulses, with the
        white-noise bias ``(1 - 1/k)`` of the variance corrected.  Motion slower
        than about ``f_s / window`` (5 s at 10 Hz for the default) counts as
        drift and is removed; faster motion, vibration lines included, is kept
        (a line at ``f`` is passed with weight ``1 - H(f)``, ``H`` the
        boxcar's response, within 4 % above ``2 f_s / window``).  A step adds
        about ``S^2 window / 6`` to the summed squares: negligible over a shift.
    ``first_difference``
        ``rms(x[i+1] - x[i]) / sqrt(2)``: unbiased for white noise, but a
        component at frequency ``f`` is weighted by ``2 sin^2(pi f / f_s)``, so
        slow correlated motion is underestimated and motion near Nyquist
        overestimated (up to x sqrt(2)).

    The uncertainty is ``sigma / sqrt(2 (N - 1))`` for ``N`` residuals
    (METHODS.md section 5.2), which holds for white jitter.

    Parameters
    ----------
    values : ndarray, shape (n,) or (n, k)
        Positions at successive pulses, m.
    method : str
    window : int
        Moving-average length, pulses (odd; made odd if even).
    times : array-like, optional
        Pulse times, used by ``first_difference`` to drop pairs across gaps.

    Returns
    -------
    rms, rms_err : float or ndarray of shape (k,)
    """
    if method not in JITTER_METHODS:
        raise InputError(f"option jitter_method: {method!r} (expected one of {', '.join(JITTER_METHODS)})")
    window = int(window) | 1
    if window < 3:
        raise InputError(f"option jitter_window: {window} (expected at least 3 pulses)")
    arr = np.asarray(values, dtype=np.float64)
    times_ns = None if times is None else _times_to_ns(times)
    r, factor = _jitter_residuals(arr, method=method, window=window, times_ns=times_ns)
    rms, err = _rms_from_residuals(r, factor)
    if arr.ndim == 1:
        return float(rms[0]), float(err[0])
    return rms, err


def _all_finite(values: np.ndarray) -> bool:
    """True when no element is NaN or inf (one reduction; an overflowing sum says False)."""
    with np.errstate(over="ignore", invalid="ignore"):
        return bool(np.isfinite(np.sum(values)))


def allan_deviation(values: np.ndarray, block_sizes: Sequence[int] | np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Allan deviation of a series over blocks of ``n`` consecutive pulses.

    ``sigma_A(n) = sqrt(mean((m[k+1] - m[k])^2) / 2)`` with ``m`` the means of
    non-overlapping blocks of ``n`` samples (Allan, "Statistics of atomic
    frequency standards", Proc. IEEE 54, 221 (1966)).  White noise of rms
    ``sigma`` gives ``sigma / sqrt(n)``; a linear drift of ``D`` per sample gives
    ``D n / sqrt(2)`` (METHODS.md sections 5.2 and 6.5), so the minimum tells
    how long to average before drift wins.  NaN samples are dropped first.

    Parameters
    ----------
    values : ndarray, shape (n_samples,)
    block_sizes : sequence of int, optional
        Default: powers of two up to a third of the series.

    Returns
    -------
    block_sizes, deviation : ndarray
    """
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    if block_sizes is None:
        block_sizes = 2 ** np.arange(0, max(int(math.log2(max(v.size // 3, 1))) + 1, 1))
    sizes = np.asarray(block_sizes, dtype=np.int64)
    out = np.full(sizes.size, np.nan)
    for i, n in enumerate(sizes):
        k = v.size // n
        if n < 1 or k < 2:
            continue
        means = v[: k * n].reshape(k, n).mean(axis=1)
        out[i] = math.sqrt(0.5 * float(np.mean(np.diff(means) ** 2)))
    return sizes, out


def _rms_from_residuals(r: np.ndarray, factor: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    sq = r * r * factor
    good = np.isfinite(sq)
    n = good.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        rms = np.sqrt(np.where(good, sq, 0.0).sum(axis=0) / n)
        err = rms / np.sqrt(2.0 * (n - 1))
    rms = np.where(n >= 2, rms, np.nan)
    err = np.where(n >= 2, err, np.nan)
    return rms, err


# ---------------------------------------------------------------------------
# spectra
# ---------------------------------------------------------------------------


def alias_frequency(frequency_Hz: float | np.ndarray, sampling_Hz: float) -> float | np.ndarray:
    """Where a line at ``frequency_Hz`` appears when sampled at ``sampling_Hz``.

    A line at ``f`` appears at ``|f - n f_s|`` folded into ``[0, f_s / 2]``
    (METHODS.md section 5.4): 50 Hz sampled at 12 Hz appears at 2 Hz, at 10 Hz at
    0 Hz (a static offset).

    Examples
    --------
    >>> alias_frequency(50.0, 12.0)
    2.0
    >>> alias_frequency(60.0, 100.0)
    40.0
    """
    f = np.abs(np.asarray(frequency_Hz, dtype=np.float64))
    r = np.mod(f, sampling_Hz)
    folded = np.minimum(r, sampling_Hz - r)
    # exact multiples land on 0 even when mod rounds to just below f_s
    folded = np.where(np.isclose(folded, 0.0, atol=1e-9 * sampling_Hz), 0.0, folded)
    return float(folded) if np.ndim(folded) == 0 else folded


def known_line_aliases(
    sampling_Hz: float, known_lines_Hz: Sequence[float] = KNOWN_LINES_HZ
) -> tuple[tuple[float, float], ...]:
    """``(line_Hz, alias_Hz)`` for each known line above Nyquist (it folds into the band)."""
    if not math.isfinite(sampling_Hz) or sampling_Hz <= 0:
        return ()
    nyquist = sampling_Hz / 2.0
    return tuple(
        (float(f), float(alias_frequency(f, sampling_Hz))) for f in known_lines_Hz if f > nyquist
    )


def _contiguous_runs(times_ns: np.ndarray, sampling_Hz: float) -> list[tuple[int, int]]:
    """``[start, stop)`` index runs without a gap longer than 1.5 pulse periods."""
    if times_ns.size < 2:
        return [(0, times_ns.size)]
    period_ns = _NS_PER_S / sampling_Hz
    breaks = np.flatnonzero(np.diff(times_ns) > 1.5 * period_ns) + 1
    edges = np.r_[0, breaks, times_ns.size]
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:], strict=True)]


def _fill_nan_columns(values: np.ndarray) -> np.ndarray:
    """Linear interpolation over NaN in each column (all-NaN columns become 0)."""
    if np.isfinite(values).all():
        return values
    out = values.copy()
    idx = np.arange(values.shape[0])
    for col in range(values.shape[1]):
        good = np.isfinite(values[:, col])
        if not good.any():
            out[:, col] = 0.0
        elif not good.all():
            out[:, col] = np.interp(idx, idx[good], values[good, col])
    return out


def spectrum(
    values: np.ndarray,
    sampling_Hz: float,
    *,
    times: object = None,
    nperseg: int | None = None,
    n_lines: int = 3,
    line_snr: float = 10.0,
    known_lines_Hz: Sequence[float] = KNOWN_LINES_HZ,
) -> Spectrum:
    """Welch amplitude spectrum (Hann window) and its strongest lines.

    ``scipy.signal.welch`` with a Hann window, 50 % overlap and
    ``scaling='spectrum'``, so that an on-bin tone of amplitude ``A`` gives
    ``A^2 / 2`` in its bin.  The record's mean is removed once, not per segment
    (per-segment detrending costs several times the FFTs): the Hann window keeps
    the leakage of slow drift in the lowest bins, which the line search skips.  A line's
    amplitude is taken from the power summed over its bin +-2 divided by the
    Hann equivalent noise bandwidth (1.5 bins), after removing the median
    background, which makes it independent of where the tone falls between bins
    (no scalloping loss); its frequency is the power-weighted centre of the same
    bins.  Lines are local maxima more than ``line_snr`` times the median power,
    above two bins from DC.  With ``times``, gaps longer than 1.5 pulse periods
    split the record into runs, each analysed separately and averaged by number
    of segments.

    Parameters
    ----------
    values : ndarray, shape (n,) or (n, k)
        Positions at successive pulses, m.
    sampling_Hz : float
        Pulse rate, Hz.
    times : array-like, optional
        Pulse times (for gap detection).
    nperseg : int, optional
        Segment length; default the largest power of two up to 1024 that gives
        at least 8 segments (at least 16 samples).
    n_lines : int
        Lines kept per channel.
    line_snr : float
        Power ratio to the median background a peak must exceed.
    known_lines_Hz : sequence of float
        Lines checked for aliasing (mains and harmonics by default).

    Returns
    -------
    Spectrum

    References
    ----------
    Welch, "The use of fast Fourier transform for the estimation of power
    spectra", IEEE Trans. Audio Electroacoust. 15, 70 (1967).
    """
    arr = np.asarray(values, dtype=np.float64)
    one = arr.ndim == 1
    if one:
        arr = arr[:, None]
    runs = [(0, arr.shape[0])]
    if times is not None:
        runs = _contiguous_runs(_times_to_ns(times), sampling_Hz)
    longest = max(b - a for a, b in runs)
    if nperseg is None:
        nperseg = 1 << max(4, min(10, int(math.floor(math.log2(max(longest / 4.5, 16))))))
    nperseg = int(min(nperseg, longest))
    step = nperseg - nperseg // 2
    total = None
    n_segments = 0
    freq = None
    for a, b in runs:
        length = b - a
        if length < nperseg:
            continue
        segs = 1 + (length - nperseg) // step
        chunk = _fill_nan_columns(arr[a:b])
        with _quiet_nanmean():
            offset = np.nanmean(chunk, axis=0)
        chunk = chunk - np.where(np.isfinite(offset), offset, 0.0)
        freq, power = _welch_power(chunk, sampling_Hz, nperseg)
        total = power * segs if total is None else total + power * segs
        n_segments += segs
    if total is None or freq is None:
        raise InputError(f"spectrum: too few samples ({longest}) for a spectrum (expected at least 16)")
    power = total / n_segments
    resolution = sampling_Hz / nperseg
    psd = power / (resolution * HANN_ENBW_BINS)
    amplitude = np.sqrt(2.0 * power)
    aliases = known_line_aliases(sampling_Hz, known_lines_Hz)
    lines = tuple(
        _find_lines(freq, power[:, col], resolution, n_lines, line_snr, aliases)
        for col in range(power.shape[1])
    )
    if one:
        amplitude, psd = amplitude[:, 0], psd[:, 0]
    return Spectrum(
        freq, amplitude, psd, float(sampling_Hz), float(sampling_Hz / 2), float(resolution), lines, aliases, n_segments
    )


def _welch_power(values: np.ndarray, sampling_Hz: float, nperseg: int) -> tuple[np.ndarray, np.ndarray]:
    """Welch power spectrum of each column, as ``scipy.signal.welch`` computes it.

    Same result as ``welch(values, fs, window="hann", nperseg=nperseg,
    noverlap=nperseg // 2, detrend=False, scaling="spectrum", axis=0)`` (the
    tests check it), computed over batches of segments of a strided view: on a
    shift of 48 channels this takes a quarter of the time and a tenth of the
    memory of the general routine, which copies and transposes the whole record.
    """
    from scipy import fft

    n, k = values.shape
    step = nperseg - nperseg // 2
    n_seg = 1 + (n - nperseg) // step
    window = signal.get_window("hann", nperseg)
    # segments along a new last axis: (n_starts, k, nperseg), a view
    view = np.lib.stride_tricks.sliding_window_view(values, nperseg, axis=0)[::step][:n_seg]
    acc = np.zeros((nperseg // 2 + 1, k))
    batch = max(1, 2_000_000 // (k * nperseg))
    for i in range(0, n_seg, batch):
        spec = fft.rfft(view[i : i + batch] * window, axis=-1)
        acc += (spec.real**2 + spec.imag**2).sum(axis=0).T
    power = acc / (n_seg * window.sum() ** 2)
    # one-sided: double every bin but DC (and Nyquist for even nperseg)
    power[1 : None if nperseg % 2 else -1] *= 2.0
    freq = np.fft.rfftfreq(nperseg, 1.0 / sampling_Hz)
    return freq, power


def _find_lines(
    freq: np.ndarray,
    power: np.ndarray,
    resolution: float,
    n_lines: int,
    line_snr: float,
    aliases: Sequence[tuple[float, float]],
) -> tuple[SpectralLine, ...]:
    background = float(np.median(power))
    peaks, _ = signal.find_peaks(power, distance=3)
    peaks = peaks[(peaks >= 2) & (power[peaks] > line_snr * background)]
    peaks = peaks[np.argsort(power[peaks])[::-1]][:n_lines]
    lines = []
    for p in peaks:
        lo, hi = max(p - 2, 0), min(p + 3, power.size)
        band = power[lo:hi]
        line_power = max(float(band.sum()) - background * band.size, 0.0)
        amp = math.sqrt(2.0 * line_power / HANN_ENBW_BINS)
        f0 = float((freq[lo:hi] * band).sum() / band.sum())
        alias_of = next((line for line, at in aliases if abs(at - f0) <= 2 * resolution), None)
        lines.append(SpectralLine(f0, amp, alias_of))
    return tuple(lines)


# ---------------------------------------------------------------------------
# principal modes (SVD)
# ---------------------------------------------------------------------------


def marchenko_pastur_median(ratio: float) -> float:
    """Median of the Marchenko-Pastur law with ratio ``q = M / P <= 1`` (unit variance).

    Density ``sqrt((l+ - l)(l - l-)) / (2 pi q l)`` on ``l+- = (1 +- sqrt q)^2``
    (Marchenko & Pastur, Math. USSR Sb. 1, 457 (1967)); the median is found by
    integrating it (``scipy.integrate.quad``) and root finding.
    """
    q = float(ratio)
    if q <= 0:
        return 1.0
    if q > 1:
        q = 1.0 / q
    lo, hi = (1 - math.sqrt(q)) ** 2, (1 + math.sqrt(q)) ** 2

    def density(lam: float) -> float:
        return math.sqrt(max((hi - lam) * (lam - lo), 0.0)) / (2 * math.pi * q * lam)

    def cdf(x: float) -> float:
        return integrate.quad(density, lo, x, limit=200)[0]

    from scipy.optimize import brentq

    return float(brentq(lambda x: cdf(x) - 0.5, lo, hi, xtol=1e-12))


def principal_modes(
    matrix: np.ndarray,
    *,
    bpms: Sequence[str] | None = None,
    plane: str = "",
    n_modes: int | None = None,
) -> OrbitModes:
    """Principal modes of a pulses x BPMs matrix (model-independent analysis).

    Each BPM's mean is subtracted and the matrix divided by ``sqrt(P)``, so
    ``B^T B`` is the covariance matrix; ``B = U S V^T`` (METHODS.md section 5.5;
    Irwin et al., "Model-independent beam dynamics analysis", PRL 82, 1684
    (1999)).  Computed from the eigen-decomposition of the ``M x M`` covariance
    (``numpy.linalg.eigh``), which equals the SVD and is cheaper for P >> M.
    Pulses with any NaN are dropped.  The noise floor sigma is estimated from
    the median squared singular value divided by the Marchenko-Pastur median;
    white noise alone would fill ``sigma |1 -+ sqrt(M/P)|``.  With few BPMs and
    many pulses that band is narrow, so BPMs with unequal noise show up as
    modes above it, each localised on one BPM.

    Parameters
    ----------
    matrix : ndarray, shape (P, M)
    bpms : sequence of str, optional
    plane : str
    n_modes : int, optional
        Modes kept (default all, ``min(P, M)``).

    Returns
    -------
    OrbitModes
    """
    arr = np.asarray(matrix, dtype=np.float64)
    names = tuple(bpms) if bpms is not None else tuple(str(i) for i in range(arr.shape[1]))
    # keep BPMs with data, then pulses complete over those BPMs
    if not _all_finite(arr):
        has_data = np.isfinite(arr).sum(axis=0) > 1
        arr, names = arr[:, has_data], tuple(n for n, k in zip(names, has_data, strict=True) if k)
    if not _all_finite(arr):
        arr = arr[np.isfinite(arr).all(axis=1)]
    p, m = arr.shape if arr.ndim == 2 else (0, 0)
    if p < 3 or m < 2:
        return OrbitModes(
            plane, names, np.array([]), np.array([]), np.zeros((0, m)), (), math.nan, (math.nan, math.nan), 0, p,
            ("too_few_points",), f"{p} complete pulses over {m} BPMs (expected at least 3 over 2)",
        )
    # einsum rather than X.T @ X: multithreaded BLAS on a tall matrix stalls badly
    # on a busy machine, the plain loop does not (measured: 0.1 s vs up to 3 s)
    mu = arr.mean(axis=0)
    spread = np.abs(arr[: min(p, 1000)] - mu).max(axis=0)
    if bool(np.all(np.abs(mu) < spread)):
        # offsets below the spread: E[X X^T] - mu mu^T loses only a few eps, no copy needed
        cov = np.einsum("ij,ik->jk", arr, arr) / p - np.outer(mu, mu)
    else:
        b = arr - mu
        cov = np.einsum("ij,ik->jk", b, b) / p
    eigval, eigvec = np.linalg.eigh(0.5 * (cov + cov.T))
    order = np.argsort(eigval)[::-1]
    eigval, eigvec = np.clip(eigval[order], 0.0, None), eigvec[:, order]
    k = min(p, m) if n_modes is None else min(int(n_modes), p, m)
    s_all = np.sqrt(eigval[: min(p, m)])
    total = float((s_all**2).sum())
    q = m / p
    mp_median = marchenko_pastur_median(q) * max(1.0, q)
    sigma = math.sqrt(float(np.median(s_all**2)) / mp_median) if total > 0 else 0.0
    band = (sigma * abs(1 - math.sqrt(q)), sigma * (1 + math.sqrt(q)))
    s = s_all[:k]
    vectors = eigvec[:, :k].T
    # sign convention: the largest component of each mode is positive
    signs = np.sign(vectors[np.arange(k), np.argmax(np.abs(vectors), axis=1)])
    vectors = vectors * np.where(signs == 0, 1.0, signs)[:, None]
    groups = []
    for vec in vectors:
        weight = vec**2
        chosen = np.flatnonzero(weight >= 0.5 * weight.max())
        chosen = chosen[np.argsort(weight[chosen])[::-1]]
        groups.append(tuple(names[i] for i in chosen))
    explained = s**2 / total if total > 0 else np.zeros_like(s)
    n_above = int((s_all > band[1] * 1.0001).sum())
    return OrbitModes(
        plane, names, s, explained, vectors, tuple(groups), float(sigma), band, n_above, p
    )


# ---------------------------------------------------------------------------
# correlation with slow channels
# ---------------------------------------------------------------------------


def _shift(series: np.ndarray, lag: int) -> np.ndarray:
    """``out[i] = series[i - lag]`` along axis 0 (NaN where undefined)."""
    out = np.full_like(series, np.nan)
    if lag == 0:
        return series.copy()
    if lag > 0:
        out[lag:] = series[:-lag]
    else:
        out[:lag] = series[-lag:]
    return out


def _lagged_moments(
    x: np.ndarray, c: np.ndarray, t: np.ndarray, *, trend: bool
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Centred sums ``(n, Cxx, Ccc, Cxc)`` per column over pairs where both are finite.

    With ``trend``, the sums are partial on a straight line in ``t``
    (``C_ab.t = C_ab - C_at C_bt / C_tt``): the correlation of what is left of
    ``x`` and ``c`` after each has its own least-squares line over the same
    pairs removed.
    """
    good = np.isfinite(x) & np.isfinite(c)[:, None]
    g = good.astype(np.float64)
    n = g.sum(axis=0)
    xx = np.where(good, x, 0.0)
    cc = np.where(good, c[:, None], 0.0)
    tt = g * t[:, None]
    with np.errstate(invalid="ignore", divide="ignore"):
        mx, mc, mt = xx.sum(0) / n, cc.sum(0) / n, tt.sum(0) / n
        dx = np.where(good, xx - mx, 0.0)
        dc = np.where(good, cc - mc, 0.0)
        dt = np.where(good, tt - mt, 0.0)
        cxx, ccc, cxc = (dx * dx).sum(0), (dc * dc).sum(0), (dx * dc).sum(0)
        if trend:
            ctt = (dt * dt).sum(0)
            cxt, cct = (dx * dt).sum(0), (dc * dt).sum(0)
            cxx = cxx - cxt * cxt / ctt
            ccc = ccc - cct * cct / ctt
            cxc = cxc - cxt * cct / ctt
    return n, cxx, ccc, cxc


def correlate_slow(
    drift: np.ndarray,
    channel: np.ndarray,
    *,
    bucket_s: float,
    max_lag_s: float = 1800.0,
    detrend: str = "linear",
) -> list[tuple[float, float, float, float, int]]:
    """Slope, error, Pearson r and best lag of drift against one slow channel.

    Both series are on the same time buckets (length ``bucket_s``).  For every
    lag ``tau`` in ``[-max_lag_s, max_lag_s]`` (steps of one bucket) the pairs
    ``x(t), T(t - tau)`` are formed and, with ``detrend="linear"``, each member
    of the pairs has its own straight line in ``t`` removed over those same
    pairs (partial correlation on a linear trend); ``"difference"`` correlates
    first differences; ``"none"`` the series as they are.  Detrending avoids the
    spurious correlation of two trending series (Granger & Newbold, J.
    Econometrics 2, 111 (1974)).  The lag with the largest ``|r|`` is kept and
    ``x = a (+ c t) + b T(t - tau)`` fitted by least squares; the standard error
    of ``b`` is widened by ``sqrt((1 + rho1) / (1 - rho1))`` for lag-1
    autocorrelation of the residuals (METHODS.md sections 5.2 and 5.6).

    Parameters
    ----------
    drift : ndarray, shape (n_buckets, k)
        Drift of ``k`` BPM planes, m.
    channel : ndarray, shape (n_buckets,)
        The slow channel on the same buckets (its own unit).
    bucket_s, max_lag_s : float
    detrend : str
        One of :data:`DETREND_METHODS`.

    Returns
    -------
    list of ``(slope_m_per_unit, slope_err_m_per_unit, pearson_r, lag_s, n_points)``, one per column.
    """
    if detrend not in DETREND_METHODS:
        raise InputError(f"option detrend: {detrend!r} (expected one of {', '.join(DETREND_METHODS)})")
    x = np.asarray(drift, dtype=np.float64)
    c = np.asarray(channel, dtype=np.float64)
    if detrend == "difference":
        x = np.vstack([np.full((1, x.shape[1]), np.nan), np.diff(x, axis=0)])
        c = np.r_[np.nan, np.diff(c)]
    trend = detrend == "linear"
    t = np.arange(x.shape[0], dtype=np.float64)
    max_lag = int(max_lag_s // bucket_s)
    minimum = 5 + int(trend)
    best_r = np.full(x.shape[1], np.nan)
    best_lag = np.zeros(x.shape[1], dtype=int)
    for lag in range(-max_lag, max_lag + 1):
        n, cxx, ccc, cxc = _lagged_moments(x, _shift(c, lag), t, trend=trend)
        with np.errstate(invalid="ignore", divide="ignore"):
            r = cxc / np.sqrt(cxx * ccc)
        better = np.isfinite(r) & (n >= minimum) & (np.abs(r) > np.where(np.isfinite(best_r), np.abs(best_r), -1.0))
        best_r = np.where(better, r, best_r)
        best_lag = np.where(better, lag, best_lag)
    out = []
    for col in range(x.shape[1]):
        cs = _shift(c, int(best_lag[col]))
        good = np.isfinite(x[:, col]) & np.isfinite(cs)
        n_pairs = int(good.sum())
        if n_pairs < minimum or not np.isfinite(best_r[col]):
            out.append((math.nan, math.nan, math.nan, math.nan, n_pairs))
            continue
        columns = [np.ones(n_pairs), cs[good]] + ([t[good] - t[good].mean()] if trend else [])
        design = np.column_stack(columns)
        coef, *_ = np.linalg.lstsq(design, x[good, col], rcond=None)
        resid = x[good, col] - design @ coef
        dof = n_pairs - design.shape[1]
        cov = np.linalg.pinv(design.T @ design) * float(resid @ resid) / dof
        rho = min(max(_lag1_autocorrelation(resid), 0.0), 0.99)
        err = math.sqrt(cov[1, 1]) * math.sqrt((1 + rho) / (1 - rho))
        out.append((float(coef[1]), err, float(best_r[col]), float(best_lag[col] * bucket_s), n_pairs))
    return out


def slow_on_buckets(
    slow_df: pd.DataFrame, starts_ns: np.ndarray, bucket_s: float
) -> dict[str, tuple[str, np.ndarray]]:
    """Each slow channel resampled onto the buckets: ``{channel: (unit, values)}``.

    Bucket means where the channel has samples; empty buckets inside the
    channel's time span are filled by linear interpolation between bucket
    means; outside its span they stay NaN.
    """
    _check_columns(slow_df, SLOW_COLUMNS[:3], "slow table")
    if slow_df.empty:
        return {}
    t_ns = _timestamps_ns(slow_df["timestamp"], "slow table")
    values = slow_df["value"].to_numpy(dtype=np.float64, na_value=np.nan)
    channels = slow_df["channel"].astype(str).to_numpy()
    units = slow_df["unit"].astype(str).to_numpy() if "unit" in slow_df.columns else np.full(t_ns.size, "")
    bucket_ns = int(round(bucket_s * _NS_PER_S))
    n_buckets = starts_ns.size
    out: dict[str, tuple[str, np.ndarray]] = {}
    for name in natural_order(list(pd.unique(channels))):
        sel = channels == name
        tc, vc = t_ns[sel], values[sel]
        order = np.argsort(tc, kind="stable")
        tc, vc = tc[order], vc[order]
        idx = (tc - starts_ns[0]) // bucket_ns
        inside = (idx >= 0) & (idx < n_buckets) & np.isfinite(vc)
        sums = np.bincount(idx[inside], weights=vc[inside], minlength=n_buckets)
        counts = np.bincount(idx[inside], minlength=n_buckets)
        with np.errstate(invalid="ignore", divide="ignore"):
            series = np.where(counts > 0, sums / counts, np.nan)
        good = np.isfinite(series)
        if good.sum() >= 2:
            pos = np.arange(n_buckets)
            first, last = np.flatnonzero(good)[[0, -1]]
            span = (pos >= first) & (pos <= last)
            series[span] = np.interp(pos[span], pos[good], series[good])
        out[name] = (str(units[sel][0]), series)
    return out


# ---------------------------------------------------------------------------
# transmission
# ---------------------------------------------------------------------------


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """``[start, stop)`` of runs of True."""
    if not mask.any():
        return []
    padded = np.r_[False, mask, False]
    change = np.flatnonzero(padded[1:] != padded[:-1])
    return [(int(a), int(b)) for a, b in zip(change[::2], change[1::2], strict=True)]


def bucket_grid(times_ns: np.ndarray, bucket_s: float) -> np.ndarray:
    """Bucket starts (int64 ns) that :func:`bucket_means` uses for these sorted times."""
    bucket_ns = int(round(bucket_s * _NS_PER_S))
    origin = int(times_ns[0] // bucket_ns * bucket_ns)
    n = int((times_ns[-1] - origin) // bucket_ns) + 1
    return origin + np.arange(n, dtype=np.int64) * bucket_ns


def transmission(
    matrix: OrbitMatrix,
    *,
    reference_sum: np.ndarray | None = None,
    reference_mask: np.ndarray | None = None,
    bucket_s: float = 10.0,
    loss_threshold: float = 0.01,
    min_duration_s: float = 60.0,
    currents: Mapping[str, np.ndarray] | None = None,
) -> tuple[tuple[TransmissionPair, ...], tuple[LossEvent, ...], np.ndarray, np.ndarray]:
    """Relative transmission between consecutive stations and loss events.

    For each pair of consecutive BPMs (line order) the ratio of bucket-mean sum
    signals ``S_down / S_up`` is divided by the same ratio in the reference
    (``reference_sum``, or the pulses in ``reference_mask``), so 1.0 means "as
    in the reference".  Beam-current channels (``currents``: name -> values on
    the buckets of :func:`bucket_grid`) act as stations upstream of the first
    BPM: ``S_first / I``.  A loss event is a run of buckets with ratio below
    ``1 - loss_threshold`` lasting at least ``min_duration_s``; its size is the
    mean fractional drop with the standard error of the bucket values.

    Returns
    -------
    pairs : tuple of TransmissionPair
    events : tuple of LossEvent
    starts_ns : ndarray, shape (n_buckets,)
    ratios : ndarray, shape (n_buckets, n_bpms - 1)
        Normalised ratios of the BPM pairs.
    """
    starts, means, _ = bucket_means(matrix.times_ns, matrix.sum, bucket_s)
    if reference_mask is None:
        reference_mask = np.ones(matrix.times_ns.size, dtype=bool)
    if reference_sum is None:
        with _quiet_nanmean():
            reference_sum = np.nanmean(matrix.sum[reference_mask], axis=0)
    reference_sum = np.asarray(reference_sum, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        raw = means[:, 1:] / means[:, :-1]
        ref_ratio = reference_sum[1:] / reference_sum[:-1]
        ratios = raw / ref_ratio
    ratios = np.where(np.isfinite(ratios), ratios, np.nan)
    bucket_ns = int(round(bucket_s * _NS_PER_S))
    min_buckets = max(int(math.ceil(min_duration_s / bucket_s - 1e-9)), 1)
    pairs: list[TransmissionPair] = []
    events: list[LossEvent] = []

    def add(up: str, down: str, col: np.ndarray) -> None:
        if not np.isfinite(col).any():
            return
        last = col[np.isfinite(col)][-1]
        pairs.append(TransmissionPair(up, down, float(np.nanmean(col)), float(np.nanmin(col)), float(last)))
        with np.errstate(invalid="ignore"):
            low = col < 1.0 - loss_threshold
        for a, b in _runs(low):
            if b - a < min_buckets:
                continue
            drop = 1.0 - col[a:b]
            err = float(np.std(drop, ddof=1) / math.sqrt(b - a)) if b - a > 1 else math.nan
            events.append(
                LossEvent(
                    up,
                    down,
                    pd.Timestamp(int(starts[a]), tz="UTC"),
                    pd.Timestamp(int(starts[b - 1] + bucket_ns), tz="UTC"),
                    float((b - a) * bucket_s),
                    float(drop.mean()),
                    err,
                )
            )

    if matrix.bpms and currents:
        ref_times = matrix.times_ns[reference_mask]
        in_ref = (starts >= ref_times.min()) & (starts <= ref_times.max()) if ref_times.size else starts >= 0
        for name, current in currents.items():
            current = np.asarray(current, dtype=np.float64)
            with np.errstate(invalid="ignore", divide="ignore"), _quiet_nanmean():
                ratio = means[:, 0] / current
                ratio = ratio / np.nanmean(ratio[in_ref])
            add(str(name), matrix.bpms[0], np.where(np.isfinite(ratio), ratio, np.nan))
    for i in range(ratios.shape[1]):
        add(matrix.bpms[i], matrix.bpms[i + 1], ratios[:, i])
    events.sort(key=lambda e: e.start)
    return tuple(pairs), tuple(events), starts, ratios


# ---------------------------------------------------------------------------
# limits
# ---------------------------------------------------------------------------


def group_steps(
    steps: Sequence[tuple[str, str, Step]], *, tolerance_s: float = 10.0, bpms: Sequence[str] = ()
) -> tuple[StepEvent, ...]:
    """Group ``(bpm, plane, step)`` whose times lie within ``tolerance_s`` of the previous one."""
    order = {b: i for i, b in enumerate(bpms)}
    items = sorted(steps, key=lambda item: item[2].time)
    groups: list[list[tuple[str, str, Step]]] = []
    for item in items:
        if groups and (item[2].time - groups[-1][-1][2].time).total_seconds() <= tolerance_s:
            groups[-1].append(item)
        else:
            groups.append([item])
    events = []
    for group in groups:
        members = sorted(
            ((b, p, st.size_m) for b, p, st in group), key=lambda m: (order.get(m[0], len(order)), m[0], m[1])
        )
        n_bpms = len({b for b, _, _ in members})
        if n_bpms == 1:
            note = f"single BPM ({members[0][0]}): electronics or a mechanical change?"
        else:
            note = f"{n_bpms} BPMs together from {members[0][0]}: a kick or a magnet change?"
        # the median member's time: one weak member refined a few pulses off does not move it
        times = sorted(st.time for _, _, st in group)
        events.append(StepEvent(times[(len(times) - 1) // 2], tuple(members), note))
    return tuple(events)


def slow_steps_at(
    slow_df: pd.DataFrame, time: pd.Timestamp, *, window_s: float = 120.0, threshold: float = 6.0
) -> tuple[tuple[str, float, str], ...]:
    """Slow channels that changed suddenly at ``time``: ``(channel, change, unit)``.

    For each channel, the mean of the readings in ``window_s`` after ``time``
    minus the mean of those before, against its standard error from the
    channel's reading noise (MAD of first differences over ten windows either
    side, divided by sqrt 2).  Channels beyond ``threshold`` standard errors are
    listed, largest first.  Slow drifts (temperatures) move far less than that
    in two minutes.
    """
    if slow_df is None or slow_df.empty:
        return ()
    t0 = _as_ns(time)
    assert t0 is not None
    t_ns = _timestamps_ns(slow_df["timestamp"], "slow table")
    near = np.abs(t_ns - t0) <= 10 * window_s * _NS_PER_S
    if not near.any():
        return ()
    sub = slow_df[near]
    t_sub = t_ns[near]
    out = []
    for name, idx in sub.groupby(sub["channel"].astype(str), sort=True).indices.items():
        tc = t_sub[idx]
        order = np.argsort(tc, kind="stable")
        tc = tc[order]
        vc = sub["value"].to_numpy(dtype=np.float64, na_value=np.nan)[idx][order]
        before = vc[(tc >= t0 - window_s * _NS_PER_S) & (tc < t0)]
        after = vc[(tc >= t0) & (tc <= t0 + window_s * _NS_PER_S)]
        before, after = before[np.isfinite(before)], after[np.isfinite(after)]
        if before.size < 2 or after.size < 2:
            continue
        noise = robust_sigma(np.diff(vc[np.isfinite(vc)])) / math.sqrt(2.0)
        change = float(after.mean() - before.mean())
        se = noise * math.sqrt(1.0 / before.size + 1.0 / after.size)
        # a quantised channel can have zero noise: then any change counts
        if change != 0.0 and (se == 0.0 or abs(change) > threshold * se):
            unit = str(sub["unit"].iloc[idx[0]]) if "unit" in sub.columns else ""
            out.append((str(name), change, unit, abs(change) / se if se > 0 else math.inf))
    out.sort(key=lambda item: -item[3])
    return tuple((name, change, unit) for name, change, unit, _ in out)


def three_bpm_resolution(upstream: np.ndarray, middle: np.ndarray, downstream: np.ndarray) -> tuple[float, float]:
    """Resolution of the middle BPM of three equally spaced in a field-free drift.

    ``sigma = rms(x2 - (x1 + x3) / 2) / sqrt(1.5)``, which assumes the three BPMs
    have the same resolution (METHODS.md section 5.5; the beam moves on a straight
    line between them).  Returns ``(sigma_m, sigma_err_m)``, the error being
    ``sigma / sqrt(2 (N - 1))``.
    """
    r = np.asarray(middle, dtype=np.float64) - 0.5 * (
        np.asarray(upstream, dtype=np.float64) + np.asarray(downstream, dtype=np.float64)
    )
    r = r[np.isfinite(r)]
    if r.size < 3:
        return math.nan, math.nan
    sigma = float(np.std(r, ddof=1) / math.sqrt(1.5))
    return sigma, sigma / math.sqrt(2.0 * (r.size - 1))


def limit_intervals(
    starts_ns: np.ndarray, values: np.ndarray, limit: float, bucket_s: float
) -> list[tuple[pd.Timestamp, pd.Timestamp, float]]:
    """Intervals of consecutive buckets where ``|values| > limit``: ``(start, end, worst)``."""
    bucket_ns = int(round(bucket_s * _NS_PER_S))
    with np.errstate(invalid="ignore"):
        over = np.abs(values) > limit
    out = []
    for a, b in _runs(over):
        out.append(
            (
                pd.Timestamp(int(starts_ns[a]), tz="UTC"),
                pd.Timestamp(int(starts_ns[b - 1] + bucket_ns), tz="UTC"),
                float(np.nanmax(np.abs(values[a:b]))),
            )
        )
    return out


# ---------------------------------------------------------------------------
# everything
# ---------------------------------------------------------------------------


def analyze_orbit(
    bpm_df: pd.DataFrame,
    *,
    slow_df: pd.DataFrame | None = None,
    reference: ReferenceOrbit | tuple[object, object] | None = None,
    reference_minutes: float = DEFAULT_REFERENCE_MINUTES,
    start: object = None,
    end: object = None,
    bpm_order: Sequence[str] | None = None,
    bucket: object = "1min",
    step_bucket: object = "10s",
    step_window: object = "5min",
    step_false_alarm: float = DEFAULT_STEP_FALSE_ALARM,
    min_step_m: float = 0.0,
    jitter_method: str = "moving_average",
    jitter_window: int = 51,
    drift_limit_m: float = DEFAULT_DRIFT_LIMIT_M,
    jitter_limit_m: float = DEFAULT_JITTER_LIMIT_M,
    known_lines_Hz: Sequence[float] = KNOWN_LINES_HZ,
    n_lines: int = 3,
    line_snr: float = 10.0,
    max_lag: object = "30min",
    detrend: str = "linear",
    loss_threshold: float = 0.01,
    min_loss_duration: object = "1min",
    min_sum_fraction: float | None = 0.2,
    current_channels: Sequence[str] = (),
    keep_trends: bool = True,
) -> OrbitReport:
    """Analyse one stretch of BPM readings (see the module docstring).

    Parameters
    ----------
    bpm_df : pandas.DataFrame
        BPM table contract.
    slow_df : pandas.DataFrame, optional
        Slow-channel table (``timestamp, channel, value, unit``); every channel
        is correlated with every BPM plane's drift.
    reference : ReferenceOrbit or (start, end), optional
        Saved reference orbit, or a time window; default the first
        ``reference_minutes`` of the data; a record shorter than twice that
        uses its first third.
    reference_minutes : float
        Length of the default reference window, minutes.
    start, end : time-like, optional
        Analyse readings in ``[start, end]`` only.
    bpm_order : sequence of str, optional
        Line order (default natural sort of the names).
    bucket : duration
        Bucket for drift, drift rate, limits, correlations and trends (1 min).
    step_bucket, step_window : duration
        Bucket and half-window of the step detector and of transmission (10 s, 5 min).
    step_false_alarm : float
        False-alarm probability of the step detector per BPM plane (1e-3).
    min_step_m : float
        Smallest step reported, m.
    jitter_method : str
        One of :data:`JITTER_METHODS`.
    jitter_window : int
        Moving-average length, pulses.
    drift_limit_m, jitter_limit_m : float
        Tolerances (defaults 10 um and 5 um: common practice, our defaults).
    known_lines_Hz : sequence of float
        Lines checked for aliasing.
    n_lines, line_snr : int, float
        Spectral lines kept per channel, and their power threshold over background.
    max_lag : duration
        Lag range scanned for slow-channel correlation (+-30 min).
    detrend : str
        One of :data:`DETREND_METHODS`.
    loss_threshold : float
        Fractional transmission drop that counts as a loss (0.01 = 1 %).
    min_loss_duration : duration
        Shortest loss event (1 min).
    min_sum_fraction : float or None
        Positions with a sum below this fraction of the BPM's median are ignored.
    current_channels : sequence of str
        Slow channels that measure the beam current upstream of the first BPM;
        each adds a transmission pair ``channel -> first BPM``.
    keep_trends : bool
        Attach the decimated series (:class:`OrbitTrends`).

    Returns
    -------
    OrbitReport
    """
    if jitter_method not in JITTER_METHODS:
        raise InputError(f"option jitter_method: {jitter_method!r} (expected one of {', '.join(JITTER_METHODS)})")
    if detrend not in DETREND_METHODS:
        raise InputError(f"option detrend: {detrend!r} (expected one of {', '.join(DETREND_METHODS)})")
    for name, value in (("drift_limit_m", drift_limit_m), ("jitter_limit_m", jitter_limit_m)):
        if not (math.isfinite(value) and value > 0):
            raise InputError(f"option {name}: {value!r} (expected a positive length in metres)")
    if not 0 < loss_threshold < 1:
        raise InputError(f"option loss_threshold: {loss_threshold!r} (expected a fraction between 0 and 1)")
    bucket_s = _seconds(bucket, "bucket")
    step_bucket_s = _seconds(step_bucket, "step_bucket")
    step_window_s = _seconds(step_window, "step_window")
    max_lag_s = _seconds(max_lag, "max_lag")
    min_loss_s = _seconds(min_loss_duration, "min_loss_duration")

    matrix = orbit_matrix(
        bpm_df, bpm_order=bpm_order, start=start, end=end, min_sum_fraction=min_sum_fraction
    )
    times_ns = matrix.times_ns
    n_t, n_b = matrix.x_m.shape
    fs = sampling_rate_Hz(times_ns)
    nyquist = fs / 2 if math.isfinite(fs) else math.nan
    report_flags: list[str] = []
    notes: list[str] = []
    if matrix.n_masked:
        notes.append(f"{matrix.n_masked} readings ignored: sum below {min_sum_fraction:g} of the BPM's median")

    # reference orbit
    if isinstance(reference, ReferenceOrbit):
        ref = _align_reference(reference, matrix.bpms)
        ref_mask = (times_ns - times_ns[0]) < reference_minutes * 60 * _NS_PER_S
    elif isinstance(reference, tuple) and len(reference) == 2:
        ref = reference_orbit(matrix, start=reference[0], end=reference[1])
        ref_mask = (times_ns >= _as_ns(ref.start)) & (times_ns < _as_ns(ref.end))
    elif reference is None:
        # the first reference_minutes; a record shorter than twice that uses its first third
        span_min = (times_ns[-1] - times_ns[0]) / _NS_PER_S / 60.0
        ref_minutes = span_min / 3.0 if 0 < span_min < 2 * reference_minutes else reference_minutes
        ref = reference_orbit(matrix, minutes=max(ref_minutes, 1e-9))
        ref_mask = (times_ns >= _as_ns(ref.start)) & (times_ns < _as_ns(ref.end))
    else:
        raise InputError(
            f"option reference: {type(reference).__name__} (expected a ReferenceOrbit or a (start, end) pair)"
        )

    # stacked channels: columns are (x of every BPM, then y of every BPM)
    positions = np.concatenate([matrix.x_m, matrix.y_m], axis=1)
    ref_positions = np.concatenate([ref.x_m, ref.y_m])
    labels = [(b, p) for p in ORBIT_PLANES for b in matrix.bpms]

    starts, means, _ = bucket_means(times_ns, positions, bucket_s)
    drift_series = means - ref_positions
    t_h = ((starts - starts[0]) / _NS_PER_S + 0.5 * bucket_s) / 3600.0

    found = _detect_steps_columns(
        times_ns,
        positions,
        bucket_s=step_bucket_s,
        window_s=step_window_s,
        false_alarm=step_false_alarm,
        min_step_m=min_step_m,
    )

    if _all_finite(positions):
        mean_all = positions.mean(axis=0)
    else:
        with _quiet_nanmean():
            mean_all = np.nanmean(positions, axis=0)
    # take the detected steps out before the shot-to-shot analysis, so they do not
    # leak into jitter, spectra and modes
    for col, steps_col in enumerate(found):
        for t_step, size, _, _ in steps_col:
            if math.isfinite(size):
                positions[np.searchsorted(times_ns, t_step) :, col] -= size

    window = int(jitter_window) | 1
    residuals, factor = _jitter_residuals(positions, method=jitter_method, window=window, times_ns=times_ns)
    # squared residuals once: per-bucket rms for the trends and limits, and the
    # whole-window rms from the bucket sums
    sq = residuals * residuals
    sq *= factor
    _, jitter_sq_b, counts_b = bucket_means(times_ns, sq, bucket_s)
    del sq
    jitter_series = np.sqrt(jitter_sq_b)
    n_sq = counts_b.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        jitter = np.sqrt(np.nansum(jitter_sq_b * counts_b, axis=0) / n_sq)
        jitter_err = jitter / np.sqrt(2.0 * (n_sq - 1))
    jitter = np.where(n_sq >= 2, jitter, np.nan)
    jitter_err = np.where(n_sq >= 2, jitter_err, np.nan)

    spec = None
    if n_t >= 16 and math.isfinite(fs):
        spec = spectrum(
            positions, fs, times=times_ns, n_lines=n_lines, line_snr=line_snr, known_lines_Hz=known_lines_Hz
        )
    aliases = known_line_aliases(fs, known_lines_Hz)
    if aliases:
        report_flags.append("aliased")
        where = ", ".join(f"{f:g} Hz -> {a:g} Hz" for f, a in aliases)
        notes.append(f"known lines above Nyquist ({nyquist:g} Hz) fold into the band: {where}")

    violations: list[LimitViolation] = []
    summaries: list[BpmPlaneSummary] = []
    corrected = drift_series.copy()
    for col, (bpm, plane) in enumerate(labels):
        flags: list[str] = []
        msgs: list[str] = []
        column = positions[:, col]
        n_valid = int(np.isfinite(column).sum())
        steps = tuple(Step(pd.Timestamp(t, tz="UTC"), s, e, z) for t, s, e, z in found[col])
        # remove the steps before fitting the drift rate; drop the buckets that contain one
        series = corrected[:, col]
        for t_step, size, _, _ in found[col]:
            if not math.isfinite(size):
                continue
            j = int((t_step - starts[0]) // int(round(bucket_s * _NS_PER_S)))
            series[j + 1 :] -= size
            series[j] = np.nan
        rate, rate_err = drift_rate(t_h, series)
        d = drift_series[:, col]
        finite = np.isfinite(d)
        drift_end = float(d[finite][-1]) if finite.any() else math.nan
        max_drift = float(np.nanmax(np.abs(d))) if finite.any() else math.nan
        lines = spec.lines[col] if spec is not None else ()
        peak_f = lines[0].frequency_Hz if lines else math.nan
        peak_a = lines[0].amplitude_m if lines else math.nan
        if lines and lines[0].alias_of_Hz is not None:
            flags.append("aliased")
            msgs.append(f"strongest line at {peak_f:.3g} Hz may be the {lines[0].alias_of_Hz:g} Hz line aliased")
        if n_valid < 3:
            flags.append("too_few_points")
            msgs.append(f"{n_valid} valid readings")
        elif float(np.nanmax(column) - np.nanmin(column)) == 0.0:
            flags.append("stuck")
            msgs.append("reading does not change")
        if not math.isfinite(ref_positions[col]):
            msgs.append("no reference reading")
        if steps:
            msgs.append(f"{len(steps)} step(s)")
        over = False
        for quantity, values, limit in (
            ("drift", d, drift_limit_m),
            ("jitter", jitter_series[:, col], jitter_limit_m),
        ):
            for a, b, worst in limit_intervals(starts, values, limit, bucket_s):
                violations.append(LimitViolation(bpm, plane, quantity, a, b, worst, limit))
                over = True
        if math.isfinite(jitter[col]) and jitter[col] > jitter_limit_m:
            over = True
        if over:
            flags.append("out_of_limit")
        summaries.append(
            BpmPlaneSummary(
                bpm=bpm,
                plane=plane,
                mean_m=float(mean_all[col]),
                reference_m=float(ref_positions[col]),
                drift_m=drift_end,
                max_abs_drift_m=max_drift,
                drift_rate_m_per_h=rate,
                drift_rate_err_m_per_h=rate_err,
                jitter_rms_m=float(jitter[col]),
                jitter_rms_err_m=float(jitter_err[col]),
                steps=steps,
                peak_frequency_Hz=float(peak_f),
                peak_amplitude_m=float(peak_a),
                lines=lines,
                out_of_limit=over,
                flags=tuple(flags),
                message="; ".join(msgs),
            )
        )
    violations.sort(key=lambda v: (v.start, v.bpm, v.plane))
    if violations:
        report_flags.append("out_of_limit")

    modes = tuple(
        principal_modes(residuals[:, k * n_b : (k + 1) * n_b], bpms=matrix.bpms, plane=plane)
        for k, plane in enumerate(ORBIT_PLANES)
    )

    correlations: list[SlowCorrelation] = []
    if slow_df is not None and not slow_df.empty:
        for channel, (unit, values) in slow_on_buckets(slow_df, starts, bucket_s).items():
            if np.isfinite(values).sum() < 5:
                continue
            flags_c: tuple[str, ...] = ()
            if float(np.nanmax(values) - np.nanmin(values)) == 0.0:
                flags_c = ("stuck",)
            results = correlate_slow(corrected, values, bucket_s=bucket_s, max_lag_s=max_lag_s, detrend=detrend)
            for (bpm, plane), (slope, err, r, lag, n) in zip(labels, results, strict=True):
                correlations.append(
                    SlowCorrelation(bpm, plane, channel, unit, slope, err, r, lag, n, detrend, flags_c,
                                    "channel does not change" if flags_c else "")
                )

    currents = None
    if current_channels:
        if slow_df is None or slow_df.empty:
            raise InputError("option current_channels: no slow table given (expected slow_df with those channels)")
        chosen = slow_df[slow_df["channel"].astype(str).isin([str(c) for c in current_channels])]
        on_grid = slow_on_buckets(chosen, bucket_grid(times_ns, step_bucket_s), step_bucket_s)
        missing = [str(c) for c in current_channels if str(c) not in on_grid]
        if missing:
            raise InputError(f"slow table: no channel {missing[0]!r} (expected the beam-current channels named)")
        currents = {name: values for name, (_, values) in on_grid.items()}
    pairs, events, t_starts, ratios = transmission(
        matrix,
        reference_sum=ref.sum if ref.sum is not None and np.isfinite(ref.sum).any() else None,
        reference_mask=ref_mask,
        bucket_s=step_bucket_s,
        loss_threshold=loss_threshold,
        min_duration_s=min_loss_s,
        currents=currents,
    )
    if not pairs:
        notes.append("no transmission: sum signals missing")

    duration_s = (times_ns[-1] - times_ns[0]) / _NS_PER_S
    ref_lo, ref_hi = _as_ns(ref.start), _as_ns(ref.end)
    ref_span_s = (ref_hi - ref_lo) / _NS_PER_S if ref_lo is not None and ref_hi is not None else math.nan
    if ref_span_s < reference_minutes * 60 * (1 - 1e-9):
        notes.append(f"reference window shortened to {ref_span_s / 60:.3g} min (record of {duration_s / 60:.3g} min)")

    step_events = group_steps(
        [(sm.bpm, sm.plane, st) for sm in summaries for st in sm.steps], tolerance_s=step_bucket_s, bpms=matrix.bpms
    )
    if slow_df is not None and not slow_df.empty and step_events:
        step_events = tuple(
            dataclasses.replace(event, slow_changes=slow_steps_at(slow_df, event.time)) for event in step_events
        )

    trends = None
    if keep_trends:
        if t_starts.size and ratios.shape[1]:
            # transmission onto the report buckets (mean of the short buckets)
            idx = (t_starts - starts[0]) // int(round(bucket_s * _NS_PER_S))
            idx = np.clip(idx, 0, starts.size - 1)
            good = np.isfinite(ratios)
            sums = np.zeros((starts.size, ratios.shape[1]))
            counts = np.zeros_like(sums)
            np.add.at(sums, idx, np.where(good, ratios, 0.0))
            np.add.at(counts, idx, good)
            with np.errstate(invalid="ignore", divide="ignore"):
                trans_b = np.where(counts > 0, sums / counts, np.nan)
        else:
            trans_b = np.zeros((starts.size, 0))
        trends = OrbitTrends(
            pd.DatetimeIndex(pd.to_datetime(starts, unit="ns", utc=True)),
            matrix.bpms,
            drift_series[:, :n_b],
            drift_series[:, n_b:],
            jitter_series[:, :n_b],
            jitter_series[:, n_b:],
            trans_b,
        )

    options = {
        "reference_minutes": reference_minutes,
        "bucket_s": bucket_s,
        "step_bucket_s": step_bucket_s,
        "step_window_s": step_window_s,
        "step_false_alarm": step_false_alarm,
        "min_step_m": min_step_m,
        "jitter_method": jitter_method,
        "jitter_window": window,
        "drift_limit_m": drift_limit_m,
        "jitter_limit_m": jitter_limit_m,
        "known_lines_Hz": list(known_lines_Hz),
        "max_lag_s": max_lag_s,
        "detrend": detrend,
        "loss_threshold": loss_threshold,
        "min_loss_duration_s": min_loss_s,
        "min_sum_fraction": min_sum_fraction,
        "current_channels": [str(c) for c in current_channels],
    }
    return OrbitReport(
        start=pd.Timestamp(int(times_ns[0]), tz="UTC"),
        end=pd.Timestamp(int(times_ns[-1]), tz="UTC"),
        n_pulses=n_t,
        n_readings=matrix.n_readings,
        bpms=matrix.bpms,
        sampling_Hz=fs,
        nyquist_Hz=nyquist,
        reference=ref,
        summaries=tuple(summaries),
        modes=modes,
        correlations=tuple(correlations),
        transmission=pairs,
        loss_events=events,
        limits=OrbitLimits(drift_limit_m, jitter_limit_m),
        violations=tuple(violations),
        known_line_aliases=aliases,
        trends=trends,
        step_events=step_events,
        options=options,
        flags=merge_flags(report_flags),
        message="; ".join(notes),
    )


def bpm_spectrum(
    bpm_df: pd.DataFrame, bpm: str, plane: str = "x", **options: object
) -> Spectrum:
    """Spectrum of one BPM plane straight from the BPM table (for the dashboard).

    ``options`` go to :func:`spectrum`; the sampling rate comes from the timestamps.
    """
    if plane not in ORBIT_PLANES:
        raise InputError(f"plane {plane!r} (expected one of {', '.join(ORBIT_PLANES)})")
    sub = bpm_df[bpm_df["bpm"] == bpm]
    if sub.empty:
        raise InputError(f"bpm table: no readings of {bpm!r} (expected a BPM name in column 'bpm')")
    matrix = orbit_matrix(sub)
    fs = sampling_rate_Hz(matrix.times_ns)
    return spectrum(matrix.plane(plane)[:, 0], fs, times=matrix.times_ns, **options)  # type: ignore[arg-type]


__all__ = [
    "DEFAULT_DRIFT_LIMIT_M",
    "DEFAULT_JITTER_LIMIT_M",
    "DETREND_METHODS",
    "JITTER_METHODS",
    "KNOWN_LINES_HZ",
    "BpmPlaneSummary",
    "LimitViolation",
    "LossEvent",
    "OrbitMatrix",
    "OrbitModes",
    "OrbitReport",
    "OrbitTrends",
    "ReferenceOrbit",
    "SlowCorrelation",
    "SpectralLine",
    "Spectrum",
    "Step",
    "StepEvent",
    "TransmissionPair",
    "alias_frequency",
    "allan_deviation",
    "analyze_orbit",
    "bpm_spectrum",
    "bucket_grid",
    "bucket_means",
    "correlate_slow",
    "detect_steps",
    "drift_matrix",
    "drift_rate",
    "group_steps",
    "jitter_rms",
    "known_line_aliases",
    "marchenko_pastur_median",
    "natural_order",
    "orbit_matrix",
    "orbit_record",
    "principal_modes",
    "reference_orbit",
    "sampling_rate_Hz",
    "slow_on_buckets",
    "slow_steps_at",
    "spectrum",
    "three_bpm_resolution",
    "transmission",
]


def orbit_record(report: OrbitReport, *, n_mode_vectors: int = 3) -> dict[str, object]:
    """The report as one JSON-safe mapping (what ``beamdiag orbit --json`` prints).

    Keys: ``start``, ``end``, ``sampling_Hz``, ``nyquist_Hz``, ``n_pulses``,
    ``n_readings``, ``reference`` (window), ``bpms`` (name -> {"x": {...},
    "y": {...}}), ``steps`` (all, by time), ``modes``, ``correlations``,
    ``transmission``, ``loss_events``, ``limits``, ``violations``,
    ``out_of_limit_bpms``, ``known_line_aliases``, ``options``, ``flags``,
    ``message``.  The trends (arrays for plots) are left out.
    """
    from diagnostics.results import jsonable

    bpms: dict[str, dict[str, object]] = {name: {} for name in report.bpms}
    for item in report.summaries:
        record = jsonable(item)
        record.pop("bpm")
        record.pop("plane")
        bpms[item.bpm][item.plane] = record
    modes = []
    for mode in report.modes:
        modes.append(
            {
                "plane": mode.plane,
                "singular_values_m": jsonable(mode.singular_values_m),
                "explained_fraction": jsonable(mode.explained_fraction),
                "mode_bpms": jsonable(mode.mode_bpms),
                "spatial_modes": jsonable(mode.spatial_modes[:n_mode_vectors]),
                "noise_floor_m": jsonable(mode.noise_floor_m),
                "noise_band_m": jsonable(mode.noise_band_m),
                "n_above_noise": mode.n_above_noise,
                "n_pulses": mode.n_pulses,
                "flags": list(mode.flags),
                "message": mode.message,
            }
        )
    return {
        "start": jsonable(report.start),
        "end": jsonable(report.end),
        "sampling_Hz": jsonable(report.sampling_Hz),
        "nyquist_Hz": jsonable(report.nyquist_Hz),
        "n_pulses": report.n_pulses,
        "n_readings": report.n_readings,
        "reference": {"start": jsonable(report.reference.start), "end": jsonable(report.reference.end)},
        "bpms": bpms,
        "steps": [{"bpm": b, "plane": p, **jsonable(s)} for b, p, s in report.steps],
        "step_events": [
            {
                "time": jsonable(e.time),
                "bpms": list(e.bpms),
                "members": jsonable(e.members),
                "slow_changes": jsonable(e.slow_changes),
                "message": e.message,
            }
            for e in report.step_events
        ],
        "modes": modes,
        "correlations": jsonable(report.correlations),
        "transmission": jsonable(report.transmission),
        "loss_events": jsonable(report.loss_events),
        "limits": jsonable(report.limits),
        "violations": jsonable(report.violations),
        "out_of_limit_bpms": list(report.out_of_limit_bpms),
        "known_line_aliases": jsonable(report.known_line_aliases),
        "options": jsonable(report.options),
        "flags": list(report.flags),
        "message": report.message,
    }
