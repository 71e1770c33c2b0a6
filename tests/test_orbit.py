"""Tests of diagnostics.orbit against references outside the code under test.

References used: exact analytic cases (synthetic signals whose drift rate, step
time and size, jitter and line frequency are known by construction), numpy.fft
and scipy.signal.welch (spectra), numpy.linalg.svd (modes), the
Marchenko-Pastur law (Marchenko & Pastur, Math. USSR Sb. 1, 457 (1967)) and
the alias check values of METHODS.md section 6.5, scipy.stats.linregress and
theilslopes, and pandas pivot_table / resample for the reshaping.  Tolerances
marked "brief" are the recovery tolerances the design asks for; others are
explained where they stand.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import signal, stats

from diagnostics import orbit
from diagnostics.errors import InputError
from diagnostics.results import FLAGS

START = pd.Timestamp("2026-11-30T06:00:00Z")
UM = 1e-6


def _times(n: int, rate_Hz: float, *, jitter_s: float = 0.0, rng=None) -> pd.DatetimeIndex:
    t_s = np.arange(n) / rate_Hz
    if jitter_s:
        t_s = t_s + rng.uniform(-jitter_s, jitter_s, n)
    return START + pd.to_timedelta(np.round(t_s * 1e9).astype(np.int64), unit="ns")


def _table(times: pd.DatetimeIndex, x: np.ndarray, y: np.ndarray, total: np.ndarray | None = None) -> pd.DataFrame:
    """Long BPM table from wide (n_t, n_bpm) arrays."""
    n_t, n_b = x.shape
    names = np.array([f"BPM-{i:02d}" for i in range(1, n_b + 1)])
    return pd.DataFrame(
        {
            "timestamp": np.repeat(times, n_b),
            "bpm": np.tile(names, n_t),
            "x_m": x.ravel(),
            "y_m": y.ravel(),
            "sum": (np.ones_like(x) if total is None else total).ravel(),
        }
    )


# ---------------------------------------------------------------------------
# reshaping
# ---------------------------------------------------------------------------


def test_orbit_matrix_matches_pandas_pivot_table_on_shuffled_rows_with_gaps():
    """Reference: pandas.DataFrame.pivot_table on the same (shuffled, incomplete) table."""
    rng = np.random.default_rng(3)
    times = _times(200, 10.0)
    x = rng.normal(0, 1e-4, (200, 12))
    df = _table(times, x, 2 * x)
    df = df.drop(index=rng.choice(len(df), 150, replace=False)).sample(frac=1.0, random_state=1)
    m = orbit.orbit_matrix(df)
    expected = df.pivot_table(index="timestamp", columns="bpm", values="x_m", aggfunc="first")
    expected = expected[list(m.bpms)]
    np.testing.assert_array_equal(m.times_ns, expected.index.as_unit("ns").asi8)
    np.testing.assert_array_equal(m.x_m, expected.to_numpy())
    assert m.bpms == tuple(f"BPM-{i:02d}" for i in range(1, 13))


def test_natural_order_puts_bpm_2_before_bpm_10():
    assert orbit.natural_order(["B-10", "B-2", "B-1"]) == ("B-1", "B-2", "B-10")


def test_bucket_means_match_pandas_resample():
    """Reference: pandas resample('1min').mean() with NaN holes."""
    rng = np.random.default_rng(4)
    times = _times(3000, 10.0)
    v = rng.normal(size=(3000, 2))
    v[100:130, 0] = np.nan
    starts, means, _ = orbit.bucket_means(times.as_unit("ns").asi8, v, 60.0)
    expected = pd.DataFrame(v, index=times).resample("1min").mean()
    np.testing.assert_allclose(means, expected.to_numpy(), rtol=1e-12)
    np.testing.assert_array_equal(starts, expected.index.as_unit("ns").asi8)


def test_sampling_rate_is_estimated_from_jittered_timestamps():
    """Exact case: 12.5 Hz pulses with +-1 ms timestamp noise."""
    rng = np.random.default_rng(5)
    times = _times(5000, 12.5, jitter_s=1e-3, rng=rng)
    assert orbit.sampling_rate_Hz(times.as_unit("ns").asi8) == pytest.approx(12.5, rel=1e-3)


# ---------------------------------------------------------------------------
# spectra and aliasing
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("line_Hz", "rate_Hz", "alias_Hz"),
    [(50, 10, 0), (50, 12, 2), (50, 12.5, 0), (50, 100, 50), (50, 30, 10), (60, 100, 40), (60, 120, 60), (60, 10, 0)],
)
def test_alias_frequency_matches_methods_check_values(line_Hz, rate_Hz, alias_Hz):
    """METHODS.md section 6.5 alias table: a line at f appears at |f - n f_s| folded into [0, f_s/2]."""
    assert orbit.alias_frequency(line_Hz, rate_Hz) == pytest.approx(alias_Hz, abs=1e-9)


def test_two_tone_amplitudes_match_numpy_fft_exactly():
    """METHODS.md 6.5: 10 at 50 Hz + 3 at 150 Hz, f_s = 1 kHz, N = 10 000.

    Reference: the single-sided amplitude 2|X_k|/N of numpy.fft.rfft, exact on-bin.
    With 1000-sample segments both tones sit on bins, so the Hann amplitude reads
    the same values to rounding.
    """
    fs, n = 1000.0, 10_000
    t = np.arange(n) / fs
    x = 10 * np.sin(2 * np.pi * 50 * t) + 3 * np.sin(2 * np.pi * 150 * t)
    fft_amp = 2 * np.abs(np.fft.rfft(x)) / n
    f_fft = np.fft.rfftfreq(n, 1 / fs)
    assert fft_amp[np.argmin(abs(f_fft - 50))] == pytest.approx(10, rel=1e-12)
    assert fft_amp[np.argmin(abs(f_fft - 150))] == pytest.approx(3, rel=1e-12)
    spec = orbit.spectrum(x, fs, nperseg=1000, n_lines=2)
    lines = spec.lines[0]
    assert [round(line.frequency_Hz, 9) for line in lines] == [50.0, 150.0]
    assert lines[0].amplitude_m == pytest.approx(10, rel=1e-9)
    assert lines[1].amplitude_m == pytest.approx(3, rel=1e-9)
    assert spec.nyquist_Hz == 500.0 and spec.resolution_Hz == 1.0


def test_psd_matches_scipy_welch_density():
    """Reference: scipy.signal.welch(scaling='density', Hann) on the same record."""
    rng = np.random.default_rng(6)
    x = rng.normal(size=8192) + np.sin(np.arange(8192) * 0.3)
    spec = orbit.spectrum(x, 10.0, nperseg=512)
    f, psd = signal.welch(x, fs=10.0, window="hann", nperseg=512, noverlap=256, detrend=False)
    # the record mean is removed once before Welch; with mean ~0 only the lowest bins differ
    np.testing.assert_allclose(spec.frequency_Hz, f)
    np.testing.assert_allclose(spec.psd_m2_per_Hz[3:], psd[3:], rtol=1e-6)


def test_off_bin_tone_amplitude_and_frequency_within_resolution():
    """Exact case: a 1.8 Hz tone of 8 um at 10 Hz falls between bins (1024 samples).

    The band-power amplitude has no scalloping loss: within 1 % (Hann sidelobe
    leakage outside +-2 bins is below 0.1 %; 1 % is common practice).
    """
    fs = 10.0
    t = np.arange(40_000) / fs
    x = 8 * UM * np.sin(2 * np.pi * 1.8 * t + 0.3)
    spec = orbit.spectrum(x, fs, nperseg=1024)
    line = spec.lines[0][0]
    assert abs(line.frequency_Hz - 1.8) <= spec.resolution_Hz
    assert line.amplitude_m == pytest.approx(8 * UM, rel=0.01)


def test_mains_line_sampled_at_12_Hz_appears_at_2_Hz_and_is_flagged_aliased():
    """METHODS.md 5.4: 50 Hz ripple sampled at 12 Hz shows at 2 Hz."""
    rng = np.random.default_rng(7)
    n = 12 * 600
    times = _times(n, 12.0, jitter_s=2e-4, rng=rng)
    t_s = (times - START).total_seconds().to_numpy()
    x = rng.normal(0, 1 * UM, (n, 2))
    x[:, 0] += 6 * UM * np.sin(2 * np.pi * 50.0 * t_s)
    report = orbit.analyze_orbit(_table(times, x, x.copy()))
    s = report.summary("BPM-01", "x")
    assert abs(s.peak_frequency_Hz - 2.0) <= 2 * 12.0 / 1024
    assert s.lines[0].alias_of_Hz == 50.0
    assert "aliased" in s.flags
    assert report.sampling_Hz == pytest.approx(12.0, rel=1e-3)
    assert report.nyquist_Hz == pytest.approx(6.0, rel=1e-3)
    assert "aliased" in report.flags
    assert (50.0, pytest.approx(2.0, abs=1e-3)) in report.known_line_aliases


# ---------------------------------------------------------------------------
# steps
# ---------------------------------------------------------------------------


def _noise_and_drift(rng, n, rate_Hz, *, jitter_m, rate_m_per_h, wander_m=0.0):
    t_s = np.arange(n) / rate_Hz
    x = rng.normal(0, jitter_m, n) + rate_m_per_h * t_s / 3600
    # slow, curved wander (temperature-like): one half period over the record
    x += wander_m * np.sin(np.pi * t_s / t_s[-1])
    return t_s, x


@pytest.mark.parametrize("seed", [11, 12, 13])
def test_steps_recovered_to_the_minute_and_20_percent(seed):
    """Exact case: steps of +35 um and -8 um at known times on 5 um jitter and 6 um/h drift.

    Brief tolerances: time to the minute, size within 20 %.
    """
    rng = np.random.default_rng(seed)
    n = 2 * 3600 * 10
    t_s, x = _noise_and_drift(rng, n, 10.0, jitter_m=5 * UM, rate_m_per_h=6 * UM, wander_m=3 * UM)
    truth = [(1800.0 + 3.3, 35 * UM), (4711.7, -8 * UM)]
    for at, size in truth:
        x[t_s >= at] += size
    times = _times(n, 10.0)
    steps = orbit.detect_steps(times, x)
    assert len(steps) == 2
    for step, (at, size) in zip(steps, truth, strict=True):
        assert abs((step.time - START).total_seconds() - at) < 60
        assert step.size_m == pytest.approx(size, rel=0.2)
        assert step.size_err_m > 0
        # the size error is honest: the true size lies within 5 sigma
        assert abs(step.size_m - size) < 5 * step.size_err_m


def test_no_false_steps_on_noise_plus_drift_over_50_seeds():
    """Pure white noise plus linear drift and slow curved wander, 50 seeds: zero steps.

    At the default false-alarm probability 1e-3 per channel (Bonferroni bound),
    the expected count over 50 channels is at most 0.05; measured 0 of 50.
    """
    false = 0
    for seed in range(50):
        rng = np.random.default_rng(1000 + seed)
        n = 2 * 3600 * 10
        _, x = _noise_and_drift(rng, n, 10.0, jitter_m=5 * UM, rate_m_per_h=10 * UM, wander_m=8 * UM)
        false += len(orbit.detect_steps(_times(n, 10.0), x))
    assert false == 0


def test_step_threshold_is_the_bonferroni_normal_quantile():
    """Reference: scipy.stats.norm; h = Phi^-1(1 - alpha / (2 n))."""
    assert orbit.step_threshold(1000, 1e-3) == pytest.approx(stats.norm.isf(5e-7))
    assert orbit.step_threshold(1, 0.05) == pytest.approx(1.959964, rel=1e-6)


# ---------------------------------------------------------------------------
# drift rate, jitter
# ---------------------------------------------------------------------------


def test_theil_sen_rate_is_exact_on_a_line_and_matches_scipy():
    """Analytic case: an exact line has Theil-Sen slope equal to its slope; scipy as reference."""
    t_h = np.linspace(0, 8, 480)
    rate, err = orbit.drift_rate(t_h, 1e-4 + 3.7 * UM * t_h)
    assert rate == pytest.approx(3.7 * UM, rel=1e-12)
    rng = np.random.default_rng(8)
    v = 2 * UM * t_h + rng.normal(0, 1 * UM, t_h.size)
    rate, err = orbit.drift_rate(t_h, v)
    assert rate == pytest.approx(stats.theilslopes(v, t_h).slope, rel=1e-12)
    assert 0 < err < 0.1 * UM


@pytest.mark.parametrize("seed", [21, 22])
def test_drift_rate_recovered_within_20_percent_with_a_step_in_the_window(seed):
    """Exact case: 8 um/h drift, 20 um step mid-window, 4 um jitter; brief tolerance 20 %."""
    rng = np.random.default_rng(seed)
    n = 3 * 3600 * 10
    t_s = np.arange(n) / 10.0
    x = rng.normal(0, 4 * UM, (n, 2)) + 8 * UM * t_s[:, None] / 3600
    x[t_s >= 5000, 0] += 20 * UM
    report = orbit.analyze_orbit(_table(_times(n, 10.0), x, 0.5 * x))
    for bpm in ("BPM-01", "BPM-02"):
        s = report.summary(bpm, "x")
        assert s.drift_rate_m_per_h == pytest.approx(8 * UM, rel=0.2)
        assert s.drift_rate_err_m_per_h > 0
    assert len(report.summary("BPM-01", "x").steps) == 1
    assert report.summary("BPM-02", "x").steps == ()


@pytest.mark.parametrize("method", orbit.JITTER_METHODS)
def test_white_jitter_recovered_within_15_percent_despite_drift(method):
    """Exact case: white jitter sigma = 5 um on a 20 um/h drift; brief tolerance 15 %."""
    rng = np.random.default_rng(9)
    n = 36_000
    t_s = np.arange(n) / 10.0
    x = rng.normal(0, 5 * UM, (n, 3)) + 20 * UM * t_s[:, None] / 3600
    rms, err = orbit.jitter_rms(x, method=method)
    np.testing.assert_allclose(rms, 5 * UM, rtol=0.15)
    # statistical error sigma / sqrt(2(N-1)) (METHODS.md 5.2)
    np.testing.assert_allclose(err, 5 * UM / np.sqrt(2 * (n - 1)), rtol=0.05)


def test_moving_average_jitter_bias_correction_is_exact_for_white_noise():
    """Analytic: E[(x - boxcar mean of k)^2] = sigma^2 (1 - 1/k); corrected, the mean over
    10 seeds x 36 000 samples is within 1 % of sigma (statistical spread ~0.1 %)."""
    rng = np.random.default_rng(10)
    x = rng.normal(0, 1.0, (36_000, 10))
    rms, _ = orbit.jitter_rms(x, window=5)
    assert float(np.mean(rms)) == pytest.approx(1.0, rel=0.01)


def test_jitter_of_a_vibration_line_is_its_rms():
    """Analytic: a sine of amplitude A has rms A / sqrt(2); 1.8 Hz at 10 Hz passes the
    moving-average high-pass to within 4 % (documented response)."""
    t_s = np.arange(36_000) / 10.0
    x = 8 * UM * np.sin(2 * np.pi * 1.8 * t_s)
    rms, _ = orbit.jitter_rms(x)
    assert rms == pytest.approx(8 * UM / math.sqrt(2), rel=0.04)


# ---------------------------------------------------------------------------
# modes
# ---------------------------------------------------------------------------


def test_principal_modes_match_numpy_svd_on_a_low_rank_matrix():
    """Reference: numpy.linalg.svd of (B - mean) / sqrt(P) for a rank-2 matrix plus small noise."""
    rng = np.random.default_rng(12)
    p, m = 3000, 16
    phase = np.linspace(0, 3 * np.pi, m)
    spatial = np.vstack([np.sin(phase), np.cos(phase)])
    temporal = rng.normal(size=(p, 2)) * [20 * UM, 8 * UM]
    b = temporal @ spatial + rng.normal(0, 0.5 * UM, (p, m)) + 1e-3
    modes = orbit.principal_modes(b, plane="x")
    ref = (b - b.mean(axis=0)) / math.sqrt(p)
    _, s_ref, vt_ref = np.linalg.svd(ref, full_matrices=False)
    np.testing.assert_allclose(modes.singular_values_m, s_ref, rtol=1e-8)
    for k in range(3):
        assert abs(modes.spatial_modes[k] @ vt_ref[k]) == pytest.approx(1.0, abs=1e-8)
    assert modes.explained_fraction.sum() == pytest.approx(1.0)
    assert modes.n_above_noise == 2
    assert modes.noise_floor_m == pytest.approx(0.5 * UM, rel=0.05)


def test_white_noise_singular_values_fill_the_marchenko_pastur_band():
    """METHODS.md 6.5: P = 2000, M = 100, sigma = 2 -> [2(1 - sqrt .05), 2(1 + sqrt .05)]
    = [1.5528, 2.4472]; a few % at the edges allowed for finite size (Tracy-Widom)."""
    rng = np.random.default_rng(13)
    modes = orbit.principal_modes(rng.normal(0, 2.0, (2000, 100)))
    s = modes.singular_values_m
    assert s.min() > 1.5528 * 0.97 and s.max() < 2.4472 * 1.03
    assert modes.noise_floor_m == pytest.approx(2.0, rel=0.02)
    assert modes.noise_band_m == pytest.approx((2 * (1 - math.sqrt(0.05)), 2 * (1 + math.sqrt(0.05))), rel=0.02)


def test_marchenko_pastur_median_matches_random_matrices():
    """Reference: median eigenvalue of numpy Wishart matrices X^T X / P, X ~ N(0, 1), q = 0.1."""
    rng = np.random.default_rng(14)
    p, m = 2000, 200
    x = rng.normal(size=(p, m))
    eig = np.linalg.eigvalsh(x.T @ x / p)
    assert orbit.marchenko_pastur_median(m / p) == pytest.approx(np.median(eig), rel=0.01)


# ---------------------------------------------------------------------------
# slow channels
# ---------------------------------------------------------------------------


def test_temperature_driven_drift_slope_and_lag_recovered():
    """Exact case: x = b T(t - 10 min) + noise, b = 25 um/degC, 0.4 degC swing over 8 h.

    Brief tolerance 20 % on the slope; reference slope from scipy.stats.linregress
    on the same aligned, detrended series; lag to one 1-min bucket.
    """
    rng = np.random.default_rng(15)
    n_min = 8 * 60
    t_min = np.arange(n_min)
    temp = 22.0 + 0.2 * np.sin(2 * np.pi * t_min / 480 - np.pi / 2) + 0.05 * np.sin(2 * np.pi * t_min / 97)
    lagged = np.r_[np.full(10, temp[0]), temp[:-10]]
    drift = 25 * UM * (lagged - temp[0]) + rng.normal(0, 0.3 * UM, n_min)
    results = orbit.correlate_slow(drift[:, None], temp, bucket_s=60.0, max_lag_s=1800)
    slope, err, r, lag_s, n = results[0]
    assert slope == pytest.approx(25 * UM, rel=0.2)
    assert lag_s == pytest.approx(600.0, abs=60.0)
    assert r > 0.9
    a = drift[10:] - np.polyval(np.polyfit(t_min[10:], drift[10:], 1), t_min[10:])
    b = temp[:-10] - np.polyval(np.polyfit(t_min[:-10], temp[:-10], 1), t_min[:-10])
    ref = stats.linregress(b, a)
    # Frisch-Waugh-Lovell: the partial slope equals the slope of the detrended series
    assert slope == pytest.approx(ref.slope, rel=1e-9)
    assert 0 < err < 0.05 * slope


def test_analyze_orbit_correlates_with_a_slow_channel():
    rng = np.random.default_rng(16)
    n = 4 * 3600 * 2  # 4 h at 2 Hz
    times = _times(n, 2.0)
    t_s = np.arange(n) / 2.0
    temp = 22 + 0.2 * np.sin(2 * np.pi * t_s / (4 * 3600))
    x = rng.normal(0, 2 * UM, (n, 2))
    x[:, 0] += 30 * UM * (temp - 22)
    slow = pd.DataFrame({"timestamp": times[::120], "channel": "T-01", "value": temp[::120], "unit": "degC"})
    report = orbit.analyze_orbit(_table(times, x, x.copy()), slow_df=slow)
    corr = next(c for c in report.correlations if c.bpm == "BPM-01" and c.plane == "x")
    assert corr.channel == "T-01" and corr.unit == "degC"
    assert corr.slope_m_per_unit == pytest.approx(30 * UM, rel=0.2)
    assert abs(corr.lag_s) <= 120
    other = next(c for c in report.correlations if c.bpm == "BPM-02" and c.plane == "x")
    assert abs(other.slope_m_per_unit) < 3 * UM


# ---------------------------------------------------------------------------
# transmission and limits
# ---------------------------------------------------------------------------


def test_transmission_drop_of_known_size_and_duration_recovered():
    """Exact case: 2 % loss between BPM-03 and BPM-04 from 40:00 to 55:00; a 20 s dip
    of 5 % elsewhere is shorter than the 1 min minimum and not reported."""
    rng = np.random.default_rng(17)
    n = 90 * 60 * 10
    times = _times(n, 10.0)
    t_s = np.arange(n) / 10.0
    total = 1.0 + 0.003 * rng.standard_normal((n, 5))
    total[(t_s >= 2400) & (t_s < 3300), 3:] *= 0.98
    total[(t_s >= 4000) & (t_s < 4020), 2:] *= 0.95
    x = rng.normal(0, 1 * UM, (n, 5))
    report = orbit.analyze_orbit(_table(times, x, x.copy(), total))
    assert len(report.loss_events) == 1
    event = report.loss_events[0]
    assert (event.upstream, event.downstream) == ("BPM-03", "BPM-04")
    assert abs((event.start - START).total_seconds() - 2400) <= 10
    assert abs((event.end - START).total_seconds() - 3300) <= 10
    assert event.duration_s == pytest.approx(900, abs=20)
    assert event.size == pytest.approx(0.02, rel=0.05)
    pair = next(p for p in report.transmission if p.upstream == "BPM-03")
    assert pair.min_ratio == pytest.approx(0.98, abs=0.003)


def test_limit_violations_list_the_interval_after_a_step():
    """A 15 um step at 30:00 exceeds the 10 um drift limit from that minute to the end."""
    rng = np.random.default_rng(18)
    n = 60 * 60 * 10
    t_s = np.arange(n) / 10.0
    x = rng.normal(0, 1 * UM, (n, 3))
    x[t_s >= 1800, 1] += 15 * UM
    x[:, 2] += rng.normal(0, 6 * UM, n)  # jitter above the 5 um limit
    report = orbit.analyze_orbit(_table(_times(n, 10.0), x, x.copy()))
    drift = [v for v in report.violations if v.quantity == "drift"]
    assert [(v.bpm, v.plane) for v in drift] == [("BPM-02", "x"), ("BPM-02", "y")]
    assert drift[0].start == START + pd.Timedelta("30min")
    assert drift[0].end == START + pd.Timedelta("60min")
    assert drift[0].limit_m == orbit.DEFAULT_DRIFT_LIMIT_M
    jitter = [v for v in report.violations if v.quantity == "jitter"]
    assert {(v.bpm, v.plane) for v in jitter} == {("BPM-03", "x"), ("BPM-03", "y")}
    assert report.out_of_limit_bpms == ("BPM-02", "BPM-03")
    assert "out_of_limit" in report.summary("BPM-02", "x").flags
    assert report.summary("BPM-01", "x").out_of_limit is False


# ---------------------------------------------------------------------------
# the whole report
# ---------------------------------------------------------------------------


def test_analyze_orbit_report_fields_and_json_record():
    rng = np.random.default_rng(19)
    n = 30 * 60 * 10
    x = rng.normal(0, 1 * UM, (n, 4)) + 1e-4
    report = orbit.analyze_orbit(_table(_times(n, 10.0), x, -x))
    assert report.n_pulses == n and report.n_readings == 4 * n
    assert report.bpms == ("BPM-01", "BPM-02", "BPM-03", "BPM-04")
    assert len(report.summaries) == 8
    s = report.summary("BPM-01", "x")
    assert s.reference_m == pytest.approx(1e-4, abs=1 * UM)
    assert abs(s.drift_m) < 1 * UM
    assert report.reference.end - report.reference.start == pd.Timedelta("10min")
    for item in report.summaries:
        assert set(item.flags) <= set(FLAGS)
    assert set(report.flags) <= set(FLAGS)
    rec = orbit.orbit_record(report)
    assert set(rec["bpms"]["BPM-01"]) == {"x", "y"}
    assert rec["start"].endswith("Z")
    assert rec["sampling_Hz"] == pytest.approx(10.0)
    assert report.trends is not None and report.trends.drift_x_m.shape == (30, 4)


def test_saved_reference_orbit_is_used():
    rng = np.random.default_rng(20)
    n = 20 * 60 * 10
    x = rng.normal(0, 1 * UM, (n, 2))
    ref = orbit.ReferenceOrbit(("BPM-02", "BPM-01"), np.array([-5 * UM, 5 * UM]), np.zeros(2))
    report = orbit.analyze_orbit(_table(_times(n, 10.0), x, x.copy()), reference=ref)
    assert report.summary("BPM-01", "x").drift_m == pytest.approx(-5 * UM, abs=1 * UM)
    assert report.summary("BPM-02", "x").drift_m == pytest.approx(5 * UM, abs=1 * UM)


def test_drift_matrix_for_plots():
    n = 10 * 60 * 10
    t_s = np.arange(n) / 10.0
    x = np.tile((6 * UM * t_s / 600)[:, None], (1, 3))
    times, bpms, dx, dy = orbit.drift_matrix(_table(_times(n, 10.0), x, x.copy()), "1min", reference_minutes=1)
    assert len(times) == 10 and bpms == ("BPM-01", "BPM-02", "BPM-03")
    # exact: bucket k mean of a ramp minus the first-minute mean is 0.6 um * k
    np.testing.assert_allclose(dx[:, 0], 0.6 * UM * np.arange(10), atol=1e-12)


def test_bad_inputs_raise_one_line_input_errors():
    with pytest.raises(InputError, match="missing column 'x_m'"):
        orbit.orbit_matrix(pd.DataFrame({"timestamp": [START], "bpm": ["B"], "y_m": [0.0]}))
    df = _table(_times(100, 10.0), np.zeros((100, 2)), np.zeros((100, 2)))
    with pytest.raises(InputError, match="moving_average, first_difference"):
        orbit.analyze_orbit(df, jitter_method="median")
    with pytest.raises(InputError, match="no readings in the selected time range"):
        orbit.orbit_matrix(df, start="2027-01-01")


@pytest.mark.parametrize("nperseg", [256, 257])
def test_welch_power_matches_scipy_welch_spectrum_scaling(nperseg):
    """Reference: scipy.signal.welch(window='hann', detrend=False, scaling='spectrum'), even and odd segments."""
    rng = np.random.default_rng(30)
    x = rng.normal(size=(5000, 3))
    f_ref, p_ref = signal.welch(x, fs=7.0, window="hann", nperseg=nperseg, noverlap=nperseg // 2,
                                detrend=False, scaling="spectrum", axis=0)
    f, p = orbit._welch_power(x, 7.0, nperseg)
    np.testing.assert_allclose(f, f_ref)
    np.testing.assert_allclose(p, p_ref, rtol=1e-10)


def test_steps_of_several_bpms_at_one_time_form_one_event():
    """A common 20 um step on BPM-02..04 at 30:00 and a lone 15 um step on BPM-01 at 45:00."""
    rng = np.random.default_rng(31)
    n = 60 * 60 * 10
    t_s = np.arange(n) / 10.0
    x = rng.normal(0, 1 * UM, (n, 4))
    x[t_s >= 1800, 1:] += 20 * UM
    x[t_s >= 2700, 0] += 15 * UM
    report = orbit.analyze_orbit(_table(_times(n, 10.0), x, rng.normal(0, 1 * UM, (n, 4))))
    first, second = report.step_events
    assert first.bpms == ("BPM-02", "BPM-03", "BPM-04")
    assert abs((first.time - START).total_seconds() - 1800) < 1
    assert "3 BPMs" in first.message
    assert second.bpms == ("BPM-01",) and "single BPM" in second.message
    assert [m[2] for m in first.members] == pytest.approx([20 * UM] * 3, rel=0.05)


def test_three_bpm_resolution_matches_methods_check_value():
    """METHODS.md 6.5: 5 um noise per BPM, equal drift spacing: rms(x2 - (x1+x3)/2)/sqrt(1.5) = 5 um
    within statistics (2e5 samples: relative spread 1/sqrt(2N) = 0.16 %, 1 % allowed)."""
    rng = np.random.default_rng(1)
    n = 200_000
    x0, slope = rng.normal(0, 1e-3, n), rng.normal(0, 1e-4, n)  # beam position and angle per pulse
    positions = [x0 + slope * z + rng.normal(0, 5 * UM, n) for z in (0.0, 2.0, 4.0)]
    sigma, err = orbit.three_bpm_resolution(*positions)
    assert sigma == pytest.approx(5 * UM, rel=0.01)
    assert err == pytest.approx(sigma / math.sqrt(2 * (n - 1)))


# ---------------------------------------------------------------------------
# the demo scenario (diagnostics.demo: the true values are known by construction)
# ---------------------------------------------------------------------------


def _demo_tables(start_s: float, hours: float, rate_Hz: float, seed: int = 2):
    from diagnostics import demo

    rng = np.random.default_rng(seed)
    t = start_s + np.arange(int(hours * 3600 * rate_Hz)) / rate_Hz
    model = demo.bpm_model(t, rng)
    times = START + pd.to_timedelta(np.round(t * 1e9).astype(np.int64), unit="ns")
    n = len(demo.BPMS)
    bpm = pd.DataFrame(
        {
            "timestamp": np.repeat(times, n),
            "bpm": np.tile(np.array(demo.BPMS), t.size),
            "x_m": model["x_m"].ravel(),
            "y_m": model["y_m"].ravel(),
            "sum": model["sum"].ravel(),
        }
    )
    ts = np.arange(start_s, start_s + hours * 3600, 10.0)
    temps = demo.temperatures_degC(ts, rng)
    slow_times = START + pd.to_timedelta(ts, unit="s")
    slow = pd.concat(
        [
            pd.DataFrame(
                {
                    "timestamp": np.repeat(slow_times, 4),
                    "channel": np.tile(list(demo.TEMPERATURE_SENSORS), ts.size),
                    "value": temps.ravel(),
                    "unit": "degC",
                }
            ),
            pd.DataFrame(
                {"timestamp": slow_times, "channel": demo.CORRECTOR, "value": demo.corrector_current_A(ts, rng), "unit": "A"}
            ),
        ],
        ignore_index=True,
    )
    return demo, bpm, slow


def test_demo_events_recovered_between_10_25_and_11_45():
    """Demo scenario, 10:25-11:45 at 10 Hz: the 35 um corrector step at 10:42:00 on BPM-09
    onward (x only) with the HC-08 corrector change that caused it, the 1.8 Hz line of 3 and
    4 um on BPM-05/06, and the 2 % loss between BPM-15 and BPM-16 from 11:20 to 11:35;
    nothing else."""
    demo, bpm, slow = _demo_tables(4 * 3600 + 25 * 60, 80 / 60, 10.0)
    report = orbit.analyze_orbit(bpm, slow_df=slow)
    (event,) = report.step_events
    assert abs((event.time - pd.Timestamp("2026-11-30T10:42:00Z")).total_seconds()) <= 1.0
    assert event.bpms == demo.BPMS[8:]
    assert {plane for _, plane, _ in event.members} == {"x"}
    # the corrector current stepped at the same time (0.850 -> 0.900 A); temperatures did not
    before, after = demo.STEP["corrector_current_A"]
    assert [name for name, _, _ in event.slow_changes] == [demo.CORRECTOR]
    assert event.slow_changes[0][1] == pytest.approx(after - before, rel=0.05)
    assert event.slow_changes[0][2] == "A"
    assert report.summary("BPM-09", "x").steps[0].size_m == pytest.approx(35e-6, rel=0.2)
    for name, amp in demo.VIBRATION["amplitude_x_m"].items():
        s = report.summary(name, "x")
        assert abs(s.peak_frequency_Hz - 1.8) <= 10.0 / 1024
        assert s.peak_amplitude_m == pytest.approx(amp, rel=0.05)
    (loss,) = report.loss_events
    assert (loss.upstream, loss.downstream) == ("BPM-15", "BPM-16")
    assert loss.start == pd.Timestamp("2026-11-30T11:20:00Z")
    assert loss.end == pd.Timestamp("2026-11-30T11:35:00Z")
    assert loss.size == pytest.approx(0.02, rel=0.05)


def test_demo_thermal_drift_follows_its_sensor_with_the_25_minute_lag():
    """Demo scenario, whole shift at 1 Hz: BPM-17 x follows T-03 at 28 um/K, 25 min later
    (THERMAL_LAG_S); slope within 20 % (brief), lag within 2 min.  At 1 Hz the 1.8 Hz
    line aliases to |1.8 - 2 * 1| = 0.2 Hz, where it is found."""
    demo, bpm, slow = _demo_tables(0.0, 8.0, 1.0)
    report = orbit.analyze_orbit(bpm, slow_df=slow)
    corr = next(c for c in report.correlations if (c.bpm, c.plane, c.channel) == ("BPM-17", "x", "T-03"))
    assert corr.slope_m_per_unit == pytest.approx(demo.WORST_THERMAL_COEFF_M_PER_K, rel=0.2)
    assert corr.lag_s == pytest.approx(demo.THERMAL_LAG_S, abs=120)
    assert corr.pearson_r > 0.9
    s = report.summary("BPM-06", "x")
    assert abs(s.peak_frequency_Hz - orbit.alias_frequency(1.8, 1.0)) <= 1.0 / 256


def test_orbit_matrix_of_a_complete_sorted_table_equals_its_reshape_and_leaves_it_alone():
    """Analytic: a complete table sorted by time then BPM is the wide array row by row;
    masking low-sum readings never writes into the caller's table."""
    rng = np.random.default_rng(32)
    x = rng.normal(size=(50, 4))
    total = np.ones((50, 4))
    total[10, 2] = 0.01
    df = _table(_times(50, 10.0), x, x.copy(), total)
    before = df["x_m"].to_numpy().copy()
    m = orbit.orbit_matrix(df, min_sum_fraction=0.2)
    assert m.n_masked == 1 and np.isnan(m.x_m[10, 2])
    np.testing.assert_array_equal(np.delete(m.x_m.ravel(), 10 * 4 + 2), np.delete(x.ravel(), 10 * 4 + 2))
    np.testing.assert_array_equal(df["x_m"].to_numpy(), before)


def test_step_across_a_beam_off_gap_is_placed_at_the_first_pulse_after_it():
    """Exact case: beam off from 30:00 to 40:00 and the orbit 25 um higher afterwards."""
    rng = np.random.default_rng(33)
    n = 80 * 60 * 10
    t_s = np.arange(n) / 10.0
    keep = (t_s < 1800) | (t_s >= 2400)
    x = rng.normal(0, 2 * UM, n) + np.where(t_s >= 2400, 25 * UM, 0.0)
    (step,) = orbit.detect_steps(_times(n, 10.0)[keep], x[keep])
    assert step.time == START + pd.Timedelta("40min")
    assert step.size_m == pytest.approx(25 * UM, rel=0.2)


def test_beam_current_channel_is_a_station_upstream_of_the_first_bpm():
    """Exact case: the current monitor reads steady while every BPM sum drops 3 % for 10 min
    (loss before BPM-01); the slow channel's own unit does not matter (normalised)."""
    rng = np.random.default_rng(34)
    n = 60 * 60 * 10
    times = _times(n, 10.0)
    t_s = np.arange(n) / 10.0
    total = 1.0 + 0.002 * rng.standard_normal((n, 3))
    total[(t_s >= 1800) & (t_s < 2400)] *= 0.97
    x = rng.normal(0, 1 * UM, (n, 3))
    ts = np.arange(0, 3600, 5.0)
    slow = pd.DataFrame({"timestamp": START + pd.to_timedelta(ts, unit="s"), "channel": "I-GUN",
                         "value": 2.5e-3 * (1 + 0.001 * rng.standard_normal(ts.size)), "unit": "A"})
    report = orbit.analyze_orbit(_table(times, x, x.copy(), total), slow_df=slow, current_channels=["I-GUN"])
    (event,) = report.loss_events
    assert (event.upstream, event.downstream) == ("I-GUN", "BPM-01")
    assert abs((event.start - START).total_seconds() - 1800) <= 10
    assert event.size == pytest.approx(0.03, rel=0.05)
    with pytest.raises(InputError, match="no channel 'I-XX'"):
        orbit.analyze_orbit(_table(times, x, x.copy(), total), slow_df=slow, current_channels=["I-XX"])


def test_report_is_invariant_to_an_offset_and_scales_with_the_positions():
    """Invariances: adding a constant orbit changes only mean and reference; doubling the
    positions doubles every length (drift, rate, jitter, step size, line amplitude)."""
    rng = np.random.default_rng(35)
    n = 40 * 60 * 10
    t_s = np.arange(n) / 10.0
    x = rng.normal(0, 2 * UM, (n, 3)) + 5 * UM * t_s[:, None] / 3600
    x[t_s >= 1500, 1] += 12 * UM
    x[:, 2] += 3 * UM * np.sin(2 * np.pi * 1.3 * t_s)
    times = _times(n, 10.0)
    base = orbit.analyze_orbit(_table(times, x, x.copy()))
    shifted = orbit.analyze_orbit(_table(times, x + 3e-4, x.copy()))
    doubled = orbit.analyze_orbit(_table(times, 2 * x, x.copy()))
    for a, b, c in zip(base.summaries[:3], shifted.summaries[:3], doubled.summaries[:3], strict=True):
        assert b.mean_m == pytest.approx(a.mean_m + 3e-4, rel=1e-9)
        for name in ("drift_m", "drift_rate_m_per_h", "jitter_rms_m", "peak_amplitude_m"):
            va, vb, vc = getattr(a, name), getattr(b, name), getattr(c, name)
            if math.isfinite(va):
                assert vb == pytest.approx(va, rel=1e-6, abs=1e-12)
                assert vc == pytest.approx(2 * va, rel=1e-6)
        assert [s.time for s in a.steps] == [s.time for s in b.steps] == [s.time for s in c.steps]
        assert [2 * s.size_m for s in a.steps] == pytest.approx([s.size_m for s in c.steps], rel=1e-6)


@pytest.mark.parametrize("method", orbit.JITTER_METHODS)
def test_missing_readings_and_a_dead_bpm_do_not_break_the_report(method):
    """1 % of readings missing at random, one BPM without y readings, beam off for 5 min:
    the report is complete, the dead plane is flagged, numbers stay finite elsewhere."""
    rng = np.random.default_rng(36)
    n = 40 * 60 * 10
    t_s = np.arange(n) / 10.0
    x = rng.normal(0, 2 * UM, (n, 4))
    y = rng.normal(0, 2 * UM, (n, 4))
    y[:, 3] = np.nan
    df = _table(_times(n, 10.0), x, y)
    df = df[~((np.repeat(t_s, 4) >= 1200) & (np.repeat(t_s, 4) < 1500))]
    df = df.drop(index=rng.choice(df.index.to_numpy(), len(df) // 100, replace=False))
    report = orbit.analyze_orbit(df, jitter_method=method)
    dead = report.summary("BPM-04", "y")
    assert "too_few_points" in dead.flags and math.isnan(dead.jitter_rms_m)
    for s in report.summaries:
        if (s.bpm, s.plane) != ("BPM-04", "y"):
            assert s.jitter_rms_m == pytest.approx(2 * UM, rel=0.15)
            assert s.steps == ()
    assert report.modes[1].bpms == ("BPM-01", "BPM-02", "BPM-03")


def test_allan_deviation_of_white_noise_and_of_a_linear_drift():
    """METHODS.md 6.5 (Allan, Proc. IEEE 54, 221 (1966)): unit white noise -> 1/sqrt(n)
    (within the statistical spread, 5 % at the largest block used here); a drift of D per
    sample -> D n / sqrt(2), exact."""
    rng = np.random.default_rng(37)
    sizes, dev = orbit.allan_deviation(rng.normal(size=400_000), [1, 4, 16, 64])
    np.testing.assert_allclose(dev, 1 / np.sqrt(sizes), rtol=0.05)
    sizes, dev = orbit.allan_deviation(0.3 * np.arange(10_000.0), [1, 10, 100])
    np.testing.assert_allclose(dev, 0.3 * sizes / np.sqrt(2), rtol=1e-12)
