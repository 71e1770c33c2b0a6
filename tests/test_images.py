"""Tests of diagnostics.images against outside references.

References: scikit-image (``measure.moments_central``) and scipy
(``ndimage.center_of_mass``, ``ndimage.median_filter``, ``special.erf``) as
independent implementations, exact analytic Gaussian spots, and the check values
of METHODS.md section 6.3.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage, special
from skimage import measure

from diagnostics import images as I
from diagnostics.errors import InputError
from diagnostics.profiles import iterated_window_rms_factor
from diagnostics.results import FLAGS, to_record


def gaussian_spot(shape, cx, cy, sx, sy, rho, amp):
    """Point-sampled rotated Gaussian (pixel centres), peak ``amp``."""
    yy, xx = np.mgrid[0 : shape[0], 0 : shape[1]].astype(float)
    dx, dy = xx - cx, yy - cy
    s = np.array([[sx * sx, rho * sx * sy], [rho * sx * sy, sy * sy]])
    si = np.linalg.inv(s)
    return amp * np.exp(-0.5 * (si[0, 0] * dx * dx + 2 * si[0, 1] * dx * dy + si[1, 1] * dy * dy))


def integrated_upright_spot(shape, cx, cy, sx, sy, total):
    """Upright Gaussian integrated over each pixel (erf differences): what a camera records."""
    xe = np.arange(shape[1] + 1) - 0.5
    ye = np.arange(shape[0] + 1) - 0.5
    fx = np.diff(0.5 * special.erf((xe - cx) / (math.sqrt(2) * sx)))
    fy = np.diff(0.5 * special.erf((ye - cy) / (math.sqrt(2) * sy)))
    return total * np.outer(fy, fx)


def camera_frame(rng, shape, cx, cy, sx, sy, rho, amp, *, dark_level=100.0, read_noise=3.0, n_hot=20, bits=16):
    """Poisson spot + dark offset + read noise + hot pixels, as uint16; returns (frame, dark)."""
    signal = gaussian_spot(shape, cx, cy, sx, sy, rho, amp)
    frame = rng.poisson(signal).astype(float) + dark_level + rng.normal(0, read_noise, shape)
    hot_r = rng.integers(0, shape[0], n_hot)
    hot_c = rng.integers(0, shape[1], n_hot)
    frame[hot_r, hot_c] += rng.uniform(2000, 20000, n_hot)
    frame = np.clip(np.round(frame), 0, 2**bits - 1).astype(np.uint16)
    dark = np.round(dark_level + rng.normal(0, read_noise, shape)).astype(np.uint16)
    return frame, dark


# ---------------------------------------------------------------------------
# Moments and formulas
# ---------------------------------------------------------------------------


def test_image_moments_match_skimage_moments_central_and_scipy_center_of_mass():
    """image_moments equals skimage.measure.moments_central / ndimage.center_of_mass on the same arrays."""
    rng = np.random.default_rng(0)
    for shape in [(17, 23), (64, 40)]:
        a = rng.random(shape) + gaussian_spot(shape, shape[1] * 0.4, shape[0] * 0.6, 4, 3, 0.3, 5.0)
        tot, xm, ym, sxx, syy, sxy = I.image_moments(a)
        cy, cx = ndimage.center_of_mass(a)
        assert (xm, ym) == pytest.approx((cx, cy), rel=1e-12)
        mu = measure.moments_central(a, order=2)  # mu[i, j]: i along rows (y), j along columns (x)
        assert tot == pytest.approx(mu[0, 0], rel=1e-12)
        assert syy == pytest.approx(mu[2, 0] / mu[0, 0], rel=1e-10)
        assert sxx == pytest.approx(mu[0, 2] / mu[0, 0], rel=1e-10)
        assert sxy == pytest.approx(mu[1, 1] / mu[0, 0], rel=1e-10)
        # a crop offset moves the centroid only
        t2, x2, y2, *_ = I.image_moments(a, x0=10, y0=-3)
        assert (x2, y2) == pytest.approx((xm + 10, ym - 3), rel=1e-12)


def test_tilt_and_principal_variances_check_values():
    """sigma_x^2 = 4, sigma_y^2 = 1, sigma_xy = 1: theta = 0.294001301774 rad, variances 4.302775637732 / 0.697224362268 (METHODS.md 6.3)."""
    assert I.tilt_angle(4.0, 1.0, 1.0) == pytest.approx(0.294001301774, rel=1e-11)
    a, b = I.principal_variances(4.0, 1.0, 1.0)
    assert a == pytest.approx(4.302775637732, rel=1e-11)
    assert b == pytest.approx(0.697224362268, rel=1e-11)


def test_fine_grid_rotated_gaussian_returns_sigma_matrix_from_moments_and_fit():
    """Noise-free, finely sampled rotated Gaussian (METHODS.md 6.3): S to < 1e-6 relative from moments and the 2D fit.

    Point samples, so no Sheppard correction; a +-8 sigma window makes the window bias < 1e-12.
    """
    sx, sy, rho = 25.0, 15.0, 0.6
    img = gaussian_spot((460, 520), 260.3, 229.6, sx, sy, rho, 1000.0) + 20.0
    p = 2e-6
    r = I.analyze_image(img, pixel_size_m=p, window_n_sigma=8.0, sheppard=False, fit_2d=True, projections=False)
    assert r.flags == (), r.message
    assert r.sigma_x_m == pytest.approx(sx * p, rel=1e-6)
    assert r.sigma_y_m == pytest.approx(sy * p, rel=1e-6)
    assert r.sigma_xy_m2 == pytest.approx(rho * sx * sy * p * p, rel=1e-6)
    assert r.centroid_x_m == pytest.approx(260.3 * p, rel=1e-9)
    # the fit at full resolution (block-averaging would make the spot a box-convolved Gaussian)
    g = I.fit_gaussian_2d(img - 20.0, pixel_size_m=p, max_side=1000, sheppard=False)
    assert g.flags == (), g.message
    assert g.sigma_x_m == pytest.approx(sx * p, rel=1e-6)
    assert g.sigma_y_m == pytest.approx(sy * p, rel=1e-6)
    assert g.sigma_xy_m2 == pytest.approx(rho * sx * sy * p * p, rel=1e-6)
    assert g.centroid_y_m == pytest.approx(229.6 * p, rel=1e-9)
    # the default downsampled fit inside analyze_image: to 1e-4 (box-averaging residual)
    assert r.gauss2d.flags == ()
    assert r.gauss2d.sigma_x_m == pytest.approx(sx * p, rel=1e-4)
    assert r.gauss2d.sigma_xy_m2 == pytest.approx(rho * sx * sy * p * p, rel=1e-4)


def test_sheppard_correction_on_pixel_integrated_spot():
    """Camera-like pixel integration adds pitch^2/12 (Sheppard 1898); the corrected moments return sigma (erf-integrated truth).

    sigma = 2 px: corrected to < 1e-5, uncorrected is sqrt(sigma^2 + 1/12).
    """
    img = integrated_upright_spot((120, 140), 70.2, 55.7, 2.0, 3.0, 1e5)
    kw = dict(pixel_size_m=1.0, window_n_sigma=10.0, projections=False)
    r = I.analyze_image(img, **kw)
    assert r.sigma_x_m == pytest.approx(2.0, rel=1e-5)
    assert r.sigma_y_m == pytest.approx(3.0, rel=1e-5)
    raw = I.analyze_image(img, sheppard=False, **kw)
    assert raw.sigma_x_m == pytest.approx(math.sqrt(4 + 1 / 12), rel=1e-5)


def test_window_correction_divides_out_documented_bias():
    """Default +-4 sigma window: bias = iterated_window_rms_factor(4) (0.99946) per axis; window_correction removes it."""
    img = gaussian_spot((300, 300), 150, 150, 12.0, 9.0, 0.0, 500.0)
    r = I.analyze_image(img, pixel_size_m=1.0, sheppard=False, projections=False)
    f = iterated_window_rms_factor(4.0)
    assert r.sigma_x_m == pytest.approx(12.0 * f, rel=3e-4)
    c = I.analyze_image(img, pixel_size_m=1.0, sheppard=False, projections=False, window_correction=True)
    assert c.sigma_x_m == pytest.approx(12.0, rel=3e-4)
    assert c.sigma_y_m == pytest.approx(9.0, rel=3e-4)


# ---------------------------------------------------------------------------
# Realistic noisy spots
# ---------------------------------------------------------------------------


SPOTS = [
    # shape, cx, cy, sx, sy, rho, amp
    ((240, 320), 160.4, 118.2, 14.0, 9.0, 0.45, 3000.0),
    ((240, 320), 140.0, 130.0, 8.0, 12.0, -0.3, 1500.0),
    ((300, 400), 210.0, 150.0, 20.0, 20.0, 0.0, 800.0),
    ((200, 200), 95.0, 105.0, 6.0, 4.0, 0.7, 4000.0),
]


@pytest.mark.parametrize("seed", [1, 2])
@pytest.mark.parametrize("spot", SPOTS)
def test_noisy_spot_sizes_within_2_percent_and_correlation_within_0p02(spot, seed):
    """Known rotated Gaussian + dark offset + Poisson noise + read noise + hot pixels (analytic truth).

    Required: sigma within 2 %, rho = sigma_xy / (sigma_x sigma_y) within 0.02.
    The window bias is corrected (window_correction=True) so the truth is the Gaussian sigma.
    """
    shape, cx, cy, sx, sy, rho, amp = spot
    rng = np.random.default_rng(seed)
    frame, dark = camera_frame(rng, shape, cx, cy, sx, sy, rho, amp)
    r = I.analyze_image(frame, pixel_size_m=(1e-5, 1.2e-5), dark=dark, bit_depth=16, window_correction=True, sheppard=False)
    assert r.flags == (), r.message
    assert r.sigma_x_m == pytest.approx(sx * 1e-5, rel=0.02)
    assert r.sigma_y_m == pytest.approx(sy * 1.2e-5, rel=0.02)
    assert r.correlation == pytest.approx(rho, abs=0.02)
    assert r.centroid_x_m == pytest.approx(cx * 1e-5, abs=0.05 * sx * 1e-5)
    # without a dark frame, the border/annulus median takes its place
    r2 = I.analyze_image(frame, pixel_size_m=(1e-5, 1.2e-5), bit_depth=16, window_correction=True, sheppard=False)
    assert r2.sigma_x_m == pytest.approx(sx * 1e-5, rel=0.02)
    assert r2.correlation == pytest.approx(rho, abs=0.02)


def test_hot_pixels_do_not_move_the_spot_and_are_counted():
    rng = np.random.default_rng(4)
    frame, dark = camera_frame(rng, (200, 260), 130.0, 100.0, 10.0, 7.0, 0.2, 2000.0, n_hot=0)
    frame[100, 150] = 65000  # inside the window, 2 sigma from the centre
    frame[95, 120] = 60000
    r = I.analyze_image(frame, pixel_size_m=1.0, dark=dark, window_correction=True, sheppard=False)
    assert r.n_hot_pixels >= 2
    assert r.sigma_x_m == pytest.approx(10.0, rel=0.02)
    assert r.centroid_x_m == pytest.approx(130.0, abs=0.3)


def test_remove_hot_pixels_equals_scipy_median_filter_rule():
    """Both code paths (sparse candidates, dense candidates) equal the rule applied with ndimage.median_filter."""
    rng = np.random.default_rng(8)
    for noise_scale, k in [(1.0, 8.0), (20.0, 1.0)]:
        a = rng.normal(0, noise_scale, (40, 50)).astype(np.float32)
        a[0, 0], a[10, 10], a[39, 49], a[20, 0] = 100, -100, 50, 80
        out, n = I.remove_hot_pixels(a, k=k, noise=1.0)
        med = ndimage.median_filter(a, size=3, mode="nearest")
        hot = np.abs(a - med) > k
        np.testing.assert_array_equal(out, np.where(hot, med, a))
        assert n == hot.sum()


def test_saturated_spot_is_flagged_with_and_without_bit_depth():
    """Pixels at 2**12 - 1 flag saturated; with bit_depth unknown the flat top of equal maxima does."""
    rng = np.random.default_rng(6)
    sig = gaussian_spot((160, 200), 100, 80, 8, 6, 0.0, 8000.0)
    frame = np.clip(rng.poisson(sig + 50), 0, 4095).astype(np.uint16)
    r = I.analyze_image(frame, pixel_size_m=1e-5, bit_depth=12)
    assert "saturated" in r.flags and r.n_saturated > 5 and "12-bit" in r.message
    r2 = I.analyze_image(frame, pixel_size_m=1e-5)
    assert "saturated" in r2.flags and "flat top" in r2.message
    ok = np.clip(rng.poisson(0.4 * sig + 50), 0, 4095).astype(np.uint16)
    assert "saturated" not in I.analyze_image(ok, pixel_size_m=1e-5, bit_depth=12).flags
    assert "saturated" not in I.analyze_image(ok, pixel_size_m=1e-5).flags


def test_spot_at_the_edge_is_flagged_clipped():
    """A spot cut by the image edge, or by a given ROI, is flagged clipped."""
    rng = np.random.default_rng(9)
    frame, dark = camera_frame(rng, (200, 240), 236.0, 100.0, 10.0, 8.0, 0.0, 2000.0, n_hot=0)
    r = I.analyze_image(frame, pixel_size_m=1e-5, dark=dark)
    assert "clipped" in r.flags and "image edge" in r.message
    frame2, dark2 = camera_frame(rng, (200, 240), 120.0, 100.0, 10.0, 8.0, 0.0, 2000.0, n_hot=0)
    assert "clipped" not in I.analyze_image(frame2, pixel_size_m=1e-5, dark=dark2).flags
    cut = I.analyze_image(frame2, pixel_size_m=1e-5, dark=dark2, roi=(0, 0, 125, 200))
    assert "clipped" in cut.flags and "ROI edge" in cut.message
    assert cut.roi[2] <= 125


def test_empty_frame_is_low_signal_with_reason():
    rng = np.random.default_rng(10)
    frame = np.round(100 + rng.normal(0, 3, (120, 160))).astype(np.uint16)
    r = I.analyze_image(frame, pixel_size_m=1e-5)
    assert "low_signal" in r.flags and "no spot" in r.message
    assert math.isnan(r.sigma_x_m)
    for f in r.flags:
        assert f in FLAGS
    rec = to_record(r, file="x.png")
    assert rec["sigma_x_m"] is None


def test_shifted_spot_gives_shifted_centroid_and_same_sizes():
    """Invariance: an integer shift of the image shifts the centroid by that many pitches; sizes are unchanged."""
    base = gaussian_spot((200, 260), 100.3, 90.1, 9.0, 6.0, 0.3, 1000.0) + 10
    shifted = gaussian_spot((200, 260), 137.3, 111.1, 9.0, 6.0, 0.3, 1000.0) + 10
    a = I.analyze_image(base, pixel_size_m=(2e-6, 3e-6), projections=False)
    b = I.analyze_image(shifted, pixel_size_m=(2e-6, 3e-6), projections=False)
    assert b.centroid_x_m - a.centroid_x_m == pytest.approx(37 * 2e-6, rel=1e-6)
    assert b.centroid_y_m - a.centroid_y_m == pytest.approx(21 * 3e-6, rel=1e-6)
    assert b.sigma_x_m == pytest.approx(a.sigma_x_m, rel=1e-6)
    assert b.sigma_xy_m2 == pytest.approx(a.sigma_xy_m2, rel=1e-6)


@pytest.mark.parametrize("delta", [0.2, -0.5, 1.0])
def test_rotated_spot_gives_rotated_tilt(delta):
    """Invariance: rotating the beam ellipse by delta rotates the tilt by delta (analytic rotated Gaussian)."""

    def spot_at(theta):
        su, sv = 14.0, 5.0
        c, s = math.cos(theta), math.sin(theta)
        sxx = su**2 * c * c + sv**2 * s * s
        syy = su**2 * s * s + sv**2 * c * c
        sxy = (su**2 - sv**2) * s * c
        sx, sy = math.sqrt(sxx), math.sqrt(syy)
        return gaussian_spot((220, 220), 110, 110, sx, sy, sxy / (sx * sy), 1000.0)

    th0 = 0.3
    a = I.analyze_image(spot_at(th0), pixel_size_m=1.0, projections=False, window_n_sigma=6.0, sheppard=False)
    b = I.analyze_image(spot_at(th0 + delta), pixel_size_m=1.0, projections=False, window_n_sigma=6.0, sheppard=False)
    wrapped = (b.tilt_rad - a.tilt_rad + math.pi / 2) % math.pi - math.pi / 2
    assert wrapped == pytest.approx((delta + math.pi / 2) % math.pi - math.pi / 2, abs=1e-4)
    assert a.tilt_rad == pytest.approx(th0, abs=1e-4)


def test_projections_and_methods_agree_with_moments():
    """The projection Gaussian fits and the 2D fit give the same sizes as the moments on a clean spot (1 %)."""
    rng = np.random.default_rng(12)
    frame, dark = camera_frame(rng, (240, 320), 160.0, 120.0, 12.0, 8.0, 0.4, 3000.0)
    kw = dict(pixel_size_m=1e-5, dark=dark, window_correction=True, sheppard=False)
    m = I.analyze_image(frame, **kw)
    assert m.projection_x is not None and m.projection_x.sigma_m == pytest.approx(12e-5, rel=0.02)
    p = I.analyze_image(frame, method="projections", **kw)
    g = I.analyze_image(frame, method="gauss2d", **kw)
    for r in (p, g):
        assert r.flags == (), r.message
        assert r.sigma_x_m == pytest.approx(m.sigma_x_m, rel=0.01)
        assert r.sigma_y_m == pytest.approx(m.sigma_y_m, rel=0.01)
        assert r.correlation == pytest.approx(m.correlation, abs=0.02)
    assert g.gauss2d is not None and g.gauss2d.sigma_x_err_m > 0


def test_ellipse_points_lie_on_the_n_sigma_ellipse():
    img = gaussian_spot((200, 200), 100, 100, 10.0, 6.0, -0.4, 100.0)
    r = I.analyze_image(img, pixel_size_m=1e-5, projections=False)
    x, y = I.ellipse_points(r, n_sigma=2.0, n=50)
    s = np.array([[r.sigma_x_m**2, r.sigma_xy_m2], [r.sigma_xy_m2, r.sigma_y_m**2]])
    d = np.vstack([x - r.centroid_x_m, y - r.centroid_y_m])
    q = np.einsum("in,ij,jn->n", d, np.linalg.inv(s), d)
    np.testing.assert_allclose(q, 4.0, rtol=1e-10)
    assert (x[0], y[0]) == pytest.approx((x[-1], y[-1]))


def test_input_errors_name_the_field():
    img = np.zeros((50, 50))
    with pytest.raises(InputError, match="pixel_size_m"):
        I.analyze_image(img, pixel_size_m=-1)
    with pytest.raises(InputError, match="dark"):
        I.analyze_image(img, pixel_size_m=1e-5, dark=np.zeros((10, 10)))
    with pytest.raises(InputError, match="roi"):
        I.analyze_image(img, pixel_size_m=1e-5, roi=(10, 10, 80, 20))
    with pytest.raises(InputError, match=r"method: expected one of \('moments', 'projections', 'gauss2d'\)"):
        I.analyze_image(img, pixel_size_m=1e-5, method="fancy")
    with pytest.raises(InputError, match="2D image"):
        I.analyze_image(np.zeros(100), pixel_size_m=1e-5)
    bad = np.zeros((20, 20))
    bad[3, 4] = np.nan
    with pytest.raises(InputError, match="pixels: expected finite values, found 1 NaN"):
        I.analyze_image(bad, pixel_size_m=1e-5)


from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402
from hypothesis.extra.numpy import arrays  # noqa: E402


@settings(max_examples=25, deadline=None)
@given(
    img=arrays(np.uint16, st.tuples(st.integers(8, 40), st.integers(8, 40)), elements=st.integers(0, 65535)),
    bit_depth=st.sampled_from([None, 16]),
)
def test_any_image_gives_a_result_with_known_flags(img, bit_depth):
    """Whatever pixels come in, analyze_image returns a result whose flags are all in FLAGS (no exception, no warning)."""
    r = I.analyze_image(img, pixel_size_m=1e-5, bit_depth=bit_depth, fit_2d=True)
    assert set(r.flags) <= set(FLAGS)
    if math.isfinite(r.sigma_x_m):
        assert r.sigma_x_m > 0 and r.sigma_y_m > 0
        x0, y0, x1, y1 = r.roi
        assert 0 <= x0 < x1 <= img.shape[1] and 0 <= y0 < y1 <= img.shape[0]
