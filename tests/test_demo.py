"""The demo scenario: deterministic, and its events are where DESIGN.md puts them.

The references are the scenario as DESIGN.md states it ("The demo scenario") and
independent estimators from numpy/scipy/scikit-image (FFT, curve_fit, image
moments, ODE integration), not the generator's own formulas.
"""

from __future__ import annotations

import hashlib
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image
from scipy import integrate, ndimage, optimize
from scipy.constants import physical_constants
from skimage import measure

from diagnostics import demo
from diagnostics.cli import main
from diagnostics.errors import InputError

REPO = Path(__file__).resolve().parent.parent
SAMPLES = REPO / "sample_data"
DATE = "2026-11-30"


def _t(hhmm: str) -> pd.Timestamp:
    return pd.Timestamp(f"{DATE}T{hhmm}", tz="UTC")


def _digest(root: Path) -> dict[str, str]:
    return {
        str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(root.rglob("*"))
        if p.is_file()
    }


def _bpm_table(manifest: demo.DemoManifest) -> pd.DataFrame:
    # read with pandas/pyarrow directly: the test checks the raw files, not our readers
    return pd.concat([pd.read_parquet(f) for f in manifest.bpm_files], ignore_index=True)


def _wide(df: pd.DataFrame, column: str) -> pd.DataFrame:
    return df.pivot(index="timestamp", columns="bpm", values=column)


def _header(path: Path) -> dict[str, str]:
    out = {}
    for line in path.read_text().splitlines():
        if not line.startswith("#"):
            break
        key, _, value = line[1:].partition(":")
        out[key.strip()] = value.strip()
    return out


# --------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def step_window(tmp_path_factory):
    """BPM and slow data 10:32-10:52, around the 10:42 corrector step."""
    return demo.generate_raw(
        tmp_path_factory.mktemp("step"), start="10:32", hours=20 / 60, sources=("bpm", "slow")
    )


@pytest.fixture(scope="module")
def loss_window(tmp_path_factory):
    """BPM data 11:15-11:40, around the 11:20-11:35 transmission loss."""
    return demo.generate_raw(
        tmp_path_factory.mktemp("loss"), start="11:15", hours=25 / 60, sources=("bpm",)
    )


@pytest.fixture(scope="module")
def shift_1Hz(tmp_path_factory):
    """The whole shift at a 1 Hz BPM rate (BPMs and slow channels only)."""
    return demo.generate_raw(
        tmp_path_factory.mktemp("shift"), bpm_rate_Hz=1.0, sources=("bpm", "slow")
    )


@pytest.fixture(scope="module")
def truth():
    return demo.truth(DATE)


# --------------------------------------------------------------------------- determinism


def test_same_seed_gives_the_same_bytes_and_another_seed_does_not(tmp_path):
    """Every raw file is byte-identical for the same seed; noise changes with the seed."""
    kwargs = dict(start="08:14", hours=0.1, frame_shape=(120, 160))
    a = demo.generate_raw(tmp_path / "a", **kwargs)
    b = demo.generate_raw(tmp_path / "b", **kwargs)
    c = demo.generate_raw(tmp_path / "c", seed=demo.DEFAULT_SEED + 1, **kwargs)
    da, db, dc = _digest(a.root), _digest(b.root), _digest(c.root)
    assert da == db
    assert len(da) > 60  # BPM, slow, wire, frames and the Q-05 scan folder are all there
    assert set(da) == set(dc)
    changed = {k for k in da if da[k] != dc[k]}
    # every data file changes with the seed; sidecars and scan.json (metadata only) do not
    assert changed == {k for k in da if not k.endswith(".json")} | {"truth.json"}
    ta, tc = json.loads(a.truth_file.read_text()), json.loads(c.truth_file.read_text())
    assert ta["generated"].pop("seed") != tc["generated"].pop("seed")
    assert ta == tc  # the scenario (machine, events, true values) does not follow the seed


def test_reading_counts_follow_rate_and_window(tmp_path):
    """24 BPMs x 10 Hz x window length readings, one Parquet file per started hour."""
    m = demo.generate_raw(tmp_path, start="09:58", hours=0.05, sources=("bpm",))
    assert m.n_bpm_readings == 24 * 10 * 180
    assert [f.name for f in m.bpm_files] == [
        "bpm_2026-11-30T09.parquet",
        "bpm_2026-11-30T10.parquet",
    ]
    df = _bpm_table(m)
    assert len(df) == m.n_bpm_readings
    assert list(df.columns) == ["timestamp", "bpm", "x_mm", "y_mm", "sum"]
    assert str(df["timestamp"].dtype) == "datetime64[ns, UTC]"
    assert df["timestamp"].min() == _t("09:58") and df["timestamp"].max() == _t("10:00:59.9")
    assert sorted(df["bpm"].unique()) == list(demo.BPMS)


def test_bad_arguments_raise_one_line_input_errors(tmp_path):
    with pytest.raises(InputError, match="expected any of bpm"):
        demo.generate_raw(tmp_path, sources=("bpm", "tea"))
    with pytest.raises(InputError, match="inside the shift"):
        demo.generate_raw(tmp_path, start="15:00", hours=1)
    with pytest.raises(InputError, match="positive"):
        demo.generate_raw(tmp_path, bpm_rate_Hz=0)


# --------------------------------------------------------------------------- the events in the raw data


def test_corrector_step_is_35um_at_bpm09_onward_at_1042_and_absent_upstream(step_window, truth):
    """DESIGN.md: a 35 um step at BPM-09 onward at 10:42 after a corrector change.

    Means over 5 minutes either side: the noise (<= 5 um per reading, 3000
    readings) gives a 0.1 um standard error and the thermal drift moves < 0.1 um
    in that time, so 0.5 um is a 5-sigma bound.
    """
    x = _wide(_bpm_table(step_window), "x_mm") * 1e-3
    t = _t("10:42")
    before = x[(x.index >= t - pd.Timedelta("5min")) & (x.index < t)].mean()
    after = x[(x.index >= t) & (x.index < t + pd.Timedelta("5min"))].mean()
    step = after - before
    assert step["BPM-09"] == pytest.approx(35e-6, abs=0.5e-6)
    upstream = [f"BPM-{i:02d}" for i in range(1, 9)]
    assert np.abs(step[upstream]).max() < 0.5e-6
    downstream = [f"BPM-{i:02d}" for i in range(9, 25)]
    expected = np.array([truth["bpm"][b]["step_x_m"] for b in downstream])
    np.testing.assert_allclose(step[downstream].to_numpy(), expected, atol=0.5e-6)
    # a betatron-like pattern: it oscillates (changes sign) along the line and stays <= ~35 um
    assert (np.sign(expected) < 0).any() and (np.sign(expected) > 0).any()
    assert np.abs(expected).max() < 36e-6
    # the vertical plane does not step
    y = _wide(_bpm_table(step_window), "y_mm") * 1e-3
    dy = y[y.index >= t].mean() - y[y.index < t].mean()
    assert np.abs(dy).max() < 0.5e-6


def test_step_is_between_two_readings_at_1042_exactly(step_window):
    """The first reading at or after 10:42:00.0 carries the step, the one before does not."""
    x = _wide(_bpm_table(step_window), "x_mm")["BPM-09"] * 1e-3
    t = _t("10:42")
    ref_before = x[(x.index < t) & (x.index >= t - pd.Timedelta("1min"))].mean()
    first_after = x[x.index >= t].iloc[:10].mean()
    last_before = x[x.index < t].iloc[-10:].mean()
    # 10 readings: standard error <= 1.6 um, the step is 35 um
    assert first_after - ref_before == pytest.approx(35e-6, abs=6e-6)
    assert abs(last_before - ref_before) < 6e-6


def test_corrector_current_steps_at_1042(step_window):
    slow = pd.read_csv(step_window.slow_files[0])
    hc = slow[slow["channel"] == "HC-08"]
    assert set(hc["unit"]) == {"A"}
    ts = pd.to_datetime(hc["timestamp"], utc=True)
    before = hc["value"][ts < _t("10:42")]
    after = hc["value"][ts >= _t("10:42")]
    assert before.mean() == pytest.approx(0.850, abs=1e-3)
    assert after.mean() == pytest.approx(0.900, abs=1e-3)


def test_vibration_line_at_1p8Hz_on_bpm05_and_bpm06_by_fft():
    """DESIGN.md: a 1.8 Hz vibration line on two BPMs.

    numpy FFT of 10 minutes of 10 Hz readings (1.8 Hz falls exactly on a bin, so
    the single-sided amplitude 2|X_k|/N is exact for a tone); white noise of
    <= 5 um adds about 5 um * sqrt(pi/N) ~ 0.1 um per bin.
    """
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        m = demo.generate_raw(tmp, start="07:00", hours=10 / 60, sources=("bpm",))
        x = _wide(_bpm_table(m), "x_mm") * 1e-3
    n = len(x)
    freq = np.fft.rfftfreq(n, d=0.1)
    assert n == 6000
    amplitudes = {}
    for bpm in ("BPM-04", "BPM-05", "BPM-06", "BPM-07"):
        series = x[bpm].to_numpy()
        series = series - np.polyval(np.polyfit(np.arange(n), series, 1), np.arange(n))
        spectrum = 2.0 * np.abs(np.fft.rfft(series)) / n
        band = freq > 0.5
        amplitudes[bpm] = (
            freq[band][np.argmax(spectrum[band])],
            spectrum[np.isclose(freq, 1.8)][0],
        )
    assert amplitudes["BPM-05"][0] == pytest.approx(1.8)
    assert amplitudes["BPM-06"][0] == pytest.approx(1.8)
    assert amplitudes["BPM-05"][1] == pytest.approx(3.0e-6, abs=0.4e-6)
    assert amplitudes["BPM-06"][1] == pytest.approx(4.0e-6, abs=0.4e-6)
    assert amplitudes["BPM-04"][1] < 0.4e-6
    assert amplitudes["BPM-07"][1] < 0.4e-6


def test_transmission_drops_2_percent_on_bpm16_onward_from_1120_to_1135(loss_window):
    """DESIGN.md: a 2 % transmission drop between BPM-15 and BPM-16 from 11:20 to 11:35.

    The charge jitter is common to all BPMs, so sum ratios to BPM-15 cancel it;
    per-BPM sum noise is 0.2 % per reading.
    """
    s = _wide(_bpm_table(loss_window), "sum")
    ratio = s.div(s["BPM-15"], axis=0)
    inside = (ratio.index >= _t("11:20")) & (ratio.index < _t("11:35"))
    change = ratio[inside].mean() / ratio[~inside].mean() - 1.0
    for i in range(16, 25):
        assert change[f"BPM-{i:02d}"] == pytest.approx(-0.02, abs=5e-4)
    for i in range(1, 15):
        assert abs(change[f"BPM-{i:02d}"]) < 5e-4
    # the edges: one second of readings either side of 11:20:00 and 11:35:00 (BPM-20)
    r = ratio["BPM-20"] / ratio["BPM-20"][~inside].mean()
    for edge, sign in ((_t("11:20"), -1), (_t("11:35"), 1)):
        jump = (
            r[(r.index >= edge) & (r.index < edge + pd.Timedelta("1s"))].mean()
            - r[(r.index < edge) & (r.index >= edge - pd.Timedelta("1s"))].mean()
        )
        assert jump == pytest.approx(sign * 0.02, abs=0.004)


def test_bpm_noise_is_2_to_4_um_per_reading(step_window):
    """Differences of consecutive readings remove the slow drift: std(diff)/sqrt(2) is the noise."""
    df = _bpm_table(step_window)
    x = _wide(df, "x_mm") * 1e-3
    x = x[x.index < _t("10:41")]  # before the step
    noise = x.diff().std() / math.sqrt(2)
    quiet = noise.drop(["BPM-05", "BPM-06"])  # the vibration adds to these two
    assert quiet.min() > 1.8e-6 and quiet.max() < 4.2e-6


def test_temperature_swing_is_0p4_degC_peaking_at_1000(shift_1Hz):
    """DESIGN.md: a 0.4 degC tunnel temperature swing; sensors read every 10 s."""
    slow = pd.read_csv(shift_1Hz.slow_files[0])
    slow["timestamp"] = pd.to_datetime(slow["timestamp"], utc=True)
    assert set(slow["channel"]) == {"T-01", "T-02", "T-03", "T-04", "HC-08"}
    for sensor in ("T-01", "T-02", "T-03", "T-04"):
        temps = slow[slow["channel"] == sensor].set_index("timestamp")["value"]
        assert len(temps) == 8 * 360
        assert temps.index.to_series().diff().dropna().eq(pd.Timedelta("10s")).all()
        smooth = temps.rolling(31, center=True).mean()
        assert smooth.max() - smooth.min() == pytest.approx(0.4, abs=0.01)
        peak = smooth.idxmax()
        assert _t("09:55") <= peak <= _t("10:20")  # 10:00 plus the sensor's delay (<= 12 min)


def test_orbit_drift_follows_temperature_with_a_lag(shift_1Hz, truth):
    """The drift of BPM-17 (largest coefficient) regressed on T-03 at lags 0-60 min.

    Following Sec. 5.6 of METHODS.md (regress x(t) on T(t - tau) and scan tau for
    maximum |r|); the corrector step is removed with its known size first.
    """
    df = _bpm_table(shift_1Hz)
    x = df[df["bpm"] == "BPM-17"].set_index("timestamp")["x_mm"] * 1e-3
    x = x - np.where(x.index >= _t("10:42"), truth["bpm"]["BPM-17"]["step_x_m"], 0.0)
    slow = pd.read_csv(shift_1Hz.slow_files[0])
    slow["timestamp"] = pd.to_datetime(slow["timestamp"], utc=True)
    temp = slow[slow["channel"] == truth["bpm"]["BPM-17"]["sensor"]].set_index("timestamp")["value"]
    xm, tm = x.resample("1min").mean().to_numpy(), temp.resample("1min").mean().to_numpy()
    fits = []
    for lag in range(61):
        a, b = xm[lag:], tm[: len(tm) - lag]
        fits.append((abs(np.corrcoef(a, b)[0, 1]), lag, np.polyfit(b, a, 1)[0]))
    r, lag, slope = max(fits)
    assert r > 0.95
    assert lag == pytest.approx(truth["temperature"]["bpm_lag_s"] / 60, abs=3)
    assert slope == pytest.approx(28e-6, rel=0.05)


def test_shift_has_6p9_million_readings_at_10Hz_in_the_formula():
    """24 BPMs x 10 Hz x 8 h = 6 912 000 readings (the full run is the slow test)."""
    assert len(demo.BPMS) * demo.BPM_RATE_HZ * demo.SHIFT_HOURS * 3600 == 6_912_000


# --------------------------------------------------------------------------- wire scans


def test_wire_scans_every_30_minutes_on_both_scanners(tmp_path, truth):
    """DESIGN.md: wire scans every 30 minutes (both scanners, x and y)."""
    m = demo.generate_raw(tmp_path, sources=("wire",))
    assert len(m.wire_files) == 16 * 2 * 2
    times: dict[tuple[str, str], list[pd.Timestamp]] = {}
    for path in m.wire_files:
        head = _header(path)
        assert head["position_unit"] == "mm"
        times.setdefault((head["device"], head["plane"]), []).append(
            pd.Timestamp(head["timestamp"])
        )
    assert set(times) == {("WS-01", "x"), ("WS-01", "y"), ("WS-02", "x"), ("WS-02", "y")}
    for stamps in times.values():
        gaps = np.diff(sorted(stamps))
        assert len(stamps) == 16 and all(g == pd.Timedelta("30min") for g in gaps)
    assert min(times[("WS-01", "x")]) == _t("06:00")


def test_wire_profile_width_matches_truth_by_scipy_curve_fit(tmp_path, truth):
    """A Gaussian-on-line fit (scipy.optimize.curve_fit) gives the true size at WS-01.

    Measured size = beam size (+) wire resolution; 151 points at S/N ~ 200 give
    a fit error well under 1 %, so 2 % is a safe bound (common practice).
    """
    m = demo.generate_raw(tmp_path, start="06:00", hours=0.05, sources=("wire",))
    for path in m.wire_files:
        head = _header(path)
        data = pd.read_csv(path, comment="#")
        pos = data["position"].to_numpy() * 1e-3

        def model(p, a, c, s, b0, b1):
            return b0 + b1 * p + a * np.exp(-0.5 * ((p - c) / s) ** 2)

        p0 = [data["signal"].max(), pos[np.argmax(data["signal"])], 2e-4, 10.0, 0.0]
        popt, _ = optimize.curve_fit(model, pos, data["signal"].to_numpy(), p0=p0)
        wire = truth["wire_scanners"][head["device"]]
        expected = math.hypot(wire[f"beam_sigma_{head['plane']}_m"], wire["resolution_m"])
        assert abs(popt[2]) == pytest.approx(expected, rel=0.02)


# --------------------------------------------------------------------------- screens


@pytest.fixture(scope="module")
def frames(tmp_path_factory):
    return demo.generate_raw(
        tmp_path_factory.mktemp("frames"), start="06:00", hours=0.1, sources=("screens",)
    )


def test_a_frame_every_minute_rotating_over_the_screens(frames):
    """DESIGN.md: a screen image every minute; 12-bit frames in 16-bit PNGs with sidecars."""
    assert len(frames.frame_files) == 6
    stamps, devices = [], []
    for png in frames.frame_files:
        meta = json.loads(png.with_suffix(".json").read_text())
        stamps.append(pd.Timestamp(meta["timestamp"]))
        devices.append(meta["device"])
        assert meta["bit_depth"] == 12
        assert (png.parent / meta["dark"]).is_file()
        with Image.open(png) as im:
            assert im.mode == "I;16" and im.size == (640, 480)
            assert np.asarray(im).max() <= 4095
    assert all(g == pd.Timedelta("1min") for g in np.diff(stamps))
    assert devices == ["SCR-01", "SCR-02", "SCR-03"] * 2


def test_spot_moments_match_truth_by_scikit_image(frames, truth):
    """Dark-subtracted, median-filtered SCR-01 frame: skimage central moments give sigma and tilt.

    Measured size = beam size (+) screen resolution.  A 3x3 median filter removes
    hot pixels and hits (it widens a 20-px Gaussian by < 0.1 %); pixels below 5x
    the read noise are cut, which trims the tails by ~1 % of sigma, hence the 3 %
    bound (common practice for cut moments).
    """
    png = frames.frame_files[0]
    meta = json.loads(png.with_suffix(".json").read_text())
    img = np.asarray(Image.open(png)).astype(float)
    dark = np.asarray(Image.open(png.parent / meta["dark"])).astype(float)
    clean = ndimage.median_filter(img - dark, size=3)
    clean[clean < 10.0] = 0.0
    mu = measure.moments_central(clean, order=2)
    px = meta["pixel_size_m"][0]
    sxx, syy, sxy = mu[0, 2] / mu[0, 0], mu[2, 0] / mu[0, 0], mu[1, 1] / mu[0, 0]  # mu[row, col]
    screen = truth["screens"]["SCR-01"]
    res = screen["resolution_m"]
    assert math.sqrt(sxx) * px == pytest.approx(math.hypot(screen["beam_sigma_x_m"], res), rel=0.03)
    assert math.sqrt(syy) * px == pytest.approx(math.hypot(screen["beam_sigma_y_m"], res), rel=0.03)
    tilt = 0.5 * math.atan2(2 * sxy, sxx - syy)
    assert tilt > 0.2  # tilted from +x toward +y, as the correlation says
    assert screen["tilt_rad"] == pytest.approx(
        0.5 * math.atan2(2 * 0.35 * 420e-6 * 260e-6, 420e-6**2 - 260e-6**2)
    )


# --------------------------------------------------------------------------- quad scans


@pytest.fixture(scope="module")
def scans(tmp_path_factory):
    return demo.generate_raw(
        tmp_path_factory.mktemp("scans"), sources=("scans",), frame_shape=(480, 640)
    )


def test_two_scan_folders_at_0815_and_1230_with_the_named_magnets(scans):
    """DESIGN.md: 08:15 on Q-05 with WS-02, 12:30 on Q-07 with SCR-02."""
    specs = {p.name: json.loads((p / "scan.json").read_text()) for p in scans.scan_folders}
    assert len(specs) == 2
    by_quad = {s["quadrupole"]["name"]: s for s in specs.values()}
    q5, q7 = by_quad["Q-05"], by_quad["Q-07"]
    assert q5["timestamp"] == "2026-11-30T08:15:00Z" and q5["monitor"]["name"] == "WS-02"
    assert q7["timestamp"] == "2026-11-30T12:30:00Z" and q7["monitor"]["name"] == "SCR-02"
    for spec, folder in ((q5, scans.scan_folders[0]), (q7, scans.scan_folders[1])):
        assert spec["particle"] == "electron" and spec["kinetic_energy_MeV"] == 150.0
        assert spec["expected_steps"] == len(spec["steps"])
        settings = sorted({s["k1_per_m2"] for s in spec["steps"]})
        assert 11 <= len(settings) <= 15
        assert 2 <= len(spec["steps"]) // len(settings) <= 3
        for step in spec["steps"]:
            for key in ("x", "y", "image"):
                if key in step:
                    assert (folder / step[key]).is_file()
        text = (folder / "scan.json").read_text()
        assert "truth" not in text and "emittance" not in text  # the answer is not in the input
    assert "drift_m" in q5["transport"] and "matrix_x" in q7["transport"]


def test_scans_cross_the_waist_in_both_planes(truth):
    """The true size at the monitor has its minimum inside the k1 range, in x and in y."""
    for record in truth["scans"].values():
        for plane in ("x", "y"):
            sizes = np.array(record[f"beam_sigma_{plane}_m"])
            i = int(np.argmin(sizes))
            assert 0 < i < len(sizes) - 1, (record["name"], plane)


def _integrated_quad(k1: float, length: float) -> np.ndarray:
    """Transfer matrix of x'' = -k1 x over ``length``, by scipy solve_ivp (columns = unit starts)."""
    cols = []
    for x0 in ((1.0, 0.0), (0.0, 1.0)):
        sol = integrate.solve_ivp(
            lambda _s, u: [u[1], -k1 * u[0]], (0.0, length), x0, rtol=1e-11, atol=1e-13
        )
        cols.append(sol.y[:, -1])
    return np.array(cols).T


def test_thick_quad_matrix_matches_integrated_hill_equation():
    """quad_matrix against scipy solve_ivp of x'' = -k x over the magnet (k of both signs)."""
    for k in (-3.0, -0.5, 0.0, 1.2, 4.8):
        np.testing.assert_allclose(demo.quad_matrix(k, 0.2), _integrated_quad(k, 0.2), atol=1e-9)


def test_true_sizes_give_back_the_true_emittance_by_linear_least_squares(scans, truth):
    """Beam-matrix method (Minty & Zimmermann 2003): sigma^2 = R11^2 S11 + 2 R11 R12 S12 + R12^2 S22.

    The matrices are built from scan.json alone (drift or the given matrices and an
    ODE-integrated quadrupole), so this checks that the files and truth.json agree.
    """
    for folder in scans.scan_folders:
        spec = json.loads((folder / "scan.json").read_text())
        rec = truth["scans"][folder.name]
        length = spec["quadrupole"]["length_m"]
        for plane, sign in (("x", 1.0), ("y", -1.0)):
            if "drift_m" in spec["transport"]:
                t = np.array([[1.0, spec["transport"]["drift_m"]], [0.0, 1.0]])
            else:
                t = np.array(spec["transport"][f"matrix_{plane}"])
            rows = []
            for k in rec["k1_per_m2"]:
                r = t @ _integrated_quad(sign * k, length)
                rows.append([r[0, 0] ** 2, 2 * r[0, 0] * r[0, 1], r[0, 1] ** 2])
            s11, s12, s22 = np.linalg.lstsq(
                np.array(rows), np.array(rec[f"beam_sigma_{plane}_m"]) ** 2, rcond=None
            )[0]
            eps = math.sqrt(s11 * s22 - s12**2)
            true = rec["planes"][plane]
            assert eps == pytest.approx(true["emittance_m_rad"], rel=1e-6)
            assert s11 / eps == pytest.approx(true["beta_m"], rel=1e-6)
            assert -s12 / eps == pytest.approx(true["alpha"], rel=1e-5, abs=1e-6)


def test_beta_gamma_of_150MeV_electrons_from_codata():
    """p c = sqrt(T^2 + 2 T m c^2) (any relativity text); m_e c^2 from CODATA via scipy."""
    mc2 = physical_constants["electron mass energy equivalent in MeV"][0]
    assert demo.beta_gamma(150.0) == pytest.approx(
        math.sqrt(150.0**2 + 2 * 150.0 * mc2) / mc2, rel=1e-12
    )
    truth = demo.truth(DATE)
    for plane, norm in (("x", 1.2e-6), ("y", 0.9e-6)):
        for rec in truth["scans"].values():
            assert rec["planes"][plane]["norm_emittance_m_rad"] == norm
            assert rec["planes"][plane]["emittance_m_rad"] * demo.beta_gamma() == pytest.approx(
                norm
            )


def test_scan_profiles_follow_the_true_sizes(scans, truth):
    """scipy curve_fit widths of the Q-05 scan profiles vs the true size (+) resolution.

    Each shot has 1.5 % size jitter on top of the fit error (< 1 %), so 6 % is a
    > 3-sigma bound; the mean ratio over 26 shots must be 1 within 1 %.
    """
    folder = next(p for p in scans.scan_folders if "Q-05" in p.name)
    spec = json.loads((folder / "scan.json").read_text())
    rec = truth["scans"][folder.name]
    ratios = []
    for i, step in enumerate(spec["steps"]):
        data = pd.read_csv(folder / step["x"], comment="#")
        pos = data["position"].to_numpy() * 1e-3
        expected = math.hypot(rec["beam_sigma_x_m"][i], rec["resolution_m"])

        def model(p, a, c, s, b0, b1):
            return b0 + b1 * p + a * np.exp(-0.5 * ((p - c) / s) ** 2)

        p0 = [data["signal"].max(), pos[np.argmax(data["signal"])], expected, 10.0, 0.0]
        popt, _ = optimize.curve_fit(model, pos, data["signal"].to_numpy(), p0=p0)
        ratios.append(abs(popt[2]) / expected)
    assert np.all(np.abs(np.array(ratios) - 1) < 0.06)
    assert np.mean(ratios) == pytest.approx(1.0, abs=0.01)


# --------------------------------------------------------------------------- samples and CLI


def test_committed_samples_are_what_write_samples_writes(tmp_path):
    """sample_data/ can be regenerated byte for byte, and stays under 5 MB."""
    demo.write_samples(tmp_path)
    fresh, committed = _digest(tmp_path), _digest(SAMPLES)
    assert fresh == committed
    total = sum(p.stat().st_size for p in SAMPLES.rglob("*") if p.is_file())
    assert total < 5 * 2**20
    bpm_csv = next(SAMPLES.glob("bpm/*.csv"))
    assert bpm_csv.stat().st_size < 400 * 2**10


def test_cli_writes_samples_and_refuses_a_non_empty_store(tmp_path, capsys):
    assert main(["demo", "--samples", str(tmp_path / "s")]) == 0
    assert (tmp_path / "s" / "README.md").is_file()
    (tmp_path / "busy").mkdir()
    (tmp_path / "busy" / "notes.txt").write_text("mine")
    assert main(["demo", "--store", str(tmp_path / "busy")]) == 2
    assert "not empty" in capsys.readouterr().err
    assert main(["demo", "--store", str(tmp_path / "busy"), "--force"]) == 2
    assert "not a beamdiag store" in capsys.readouterr().err
    assert (tmp_path / "busy" / "notes.txt").is_file()


# --------------------------------------------------------------------------- the full shift


@pytest.mark.slow
def test_full_shift_generation_counts(tmp_path):
    """The whole 8-hour shift: 6 912 000 BPM readings, 64 profiles, 477 frames, 2 scans."""
    m = demo.generate_raw(tmp_path)
    assert m.n_bpm_readings == 6_912_000
    assert len(m.bpm_files) == 8
    assert len(m.wire_files) == 64
    # one frame a minute (480), except SCR-02's three slots while it records the 12:30 scan
    assert len(m.frame_files) == 477
    assert len(m.dark_files) == 3
    assert len(m.scan_folders) == 2
    record = json.loads(m.truth_file.read_text())
    assert record["generated"]["n_bpm_readings"] == 6_912_000
    total = sum(p.stat().st_size for p in tmp_path.rglob("*") if p.is_file())
    assert total < 400 * 2**20


@pytest.mark.slow
def test_demo_command_builds_an_analysed_store_that_recovers_the_truth(tmp_path, capsys):
    """End to end: `beamdiag demo` for 08:10-08:31 (the Q-05 scan and a wire scan).

    The stored scan result is compared with truth.json: 26 shots with 1.5 %
    size jitter give about 1 % statistical error on the emittance (measured over
    seeds 1-6: mean offset < 0.3 %, spread 0.7-0.9 %), so 5 % is a safe bound.
    """
    store_mod = pytest.importorskip("diagnostics.store")
    pytest.importorskip("diagnostics.pipeline")
    root = tmp_path / "store"
    assert main(["demo", "--store", str(root), "--start", "08:10", "--hours", "0.35"]) == 0
    printed = capsys.readouterr().out
    assert "elapsed" in printed and "quarantined 0" in printed
    truth = json.loads((root / "raw" / "truth.json").read_text())
    store = store_mod.Store(root, create=False, read_only=True)
    assert set(store.list_scans()["name"]) == {"Q-05 scan at WS-02"}
    scans = store.read_results("scans")
    (row,) = scans.to_dict("records")
    true = truth["scans"]["2026-11-30T0815_Q-05_WS-02"]["planes"]
    for plane in ("x", "y"):
        assert row[f"{plane}_norm_emittance_m_rad"] == pytest.approx(
            true[plane]["norm_emittance_m_rad"], rel=0.05
        )
        assert row[f"{plane}_beta_m"] == pytest.approx(true[plane]["beta_m"], rel=0.1)
    profiles = store.read_results("profiles")
    routine = profiles[profiles["scan"].isna() & (profiles["device"] == "WS-02")]
    assert len(routine) == 0  # WS-02 scans at hh:02/hh:32: 08:32 is outside the window
    ws1 = profiles[(profiles["device"] == "WS-01") & (profiles["plane"] == "x")]
    expected = math.hypot(truth["wire_scanners"]["WS-01"]["beam_sigma_x_m"], 1e-5)
    assert ws1["sigma_m"].iloc[0] == pytest.approx(expected, rel=0.02)
    # a second run refuses to overwrite, --force replaces the store
    assert main(["demo", "--store", str(root), "--start", "08:10", "--hours", "0.1"]) == 2
    assert (
        main(["demo", "--store", str(root), "--start", "10:40", "--hours", "0.05", "--force"]) == 0
    )
    assert (
        not list((root / "raw" / "scans").glob("*")) if (root / "raw" / "scans").exists() else True
    )


def test_committed_samples_are_valid_inputs_for_the_readers():
    """Every sample input is recognised and read by diagnostics.readers; the rest are docs."""
    readers = pytest.importorskip("diagnostics.readers")
    kinds = {}
    for path in readers.iter_inputs([SAMPLES]):  # dark frames and docs are not inputs
        kind, _data = readers.read_any(path)  # raises InputError if the file is not valid
        kinds[str(path.relative_to(SAMPLES))] = kind
    assert sorted(kinds.values()) == ["bpm", "frames", "profiles", "scans", "slow"]
