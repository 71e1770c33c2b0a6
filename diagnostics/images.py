"""Screen (camera) images: background, hot pixels, ROI, moments, tilt, 2D fit.

Coordinates follow :mod:`diagnostics`: x runs along columns, y along rows, the
origin is the centre of pixel (0, 0), so pixel ``(row i, column j)`` sits at
``x = j * pixel_size_x``, ``y = i * pixel_size_y``.  The tilt is the angle from
+x toward +y of the major axis, ``0.5 atan2(2 sigma_xy, sigma_x^2 - sigma_y^2)``,
computed in metres (so it is the physical tilt when pixels are not square).

Pipeline of :func:`analyze_image` (METHODS.md section 4)
--------------------------------------------------------
1. **Coarse spot search** on a block-averaged copy (blocks of ``b x b`` pixels
   with ``b = ceil(max(rows, cols) / 480)``): the dark frame is subtracted, the
   copy smoothed with a Gaussian (``scipy.ndimage.gaussian_filter``, 1 block),
   thresholded at the border median plus the larger of ``ROI_NOISE_K`` (5) noise
   rms and ``ROI_PEAK_FRACTION`` (20 %) of the peak, and the connected component
   (``scipy.ndimage.label``) holding the most intensity is the spot.
2. **Fine stage on a crop** around it only (the full frame is never filtered):
   dark subtraction in float32, kept signed; hot-pixel removal, a pixel being
   replaced by its 3x3 median (``scipy.ndimage.median_filter``) where
   ``|I - median| > hot_pixel_k * noise`` (noise = 1.4826 MAD of the background,
   i.e. the MAD scaled to a standard deviation); the residual pedestal is the
   median of the crop outside the window and is subtracted **without clipping**.
3. **Iterated window**: moments are taken in the rectangle
   ``centroid +- window_n_sigma * sigma`` (per axis) and the window is moved
   until it stops changing.  For an upright Gaussian the rectangle is separable,
   so each axis has the 1D bias of :func:`diagnostics.profiles.iterated_window_rms_factor`
   (0.99946 at the default n = 4); ``window_correction=True`` divides it out
   (and scales sigma_xy by the product, keeping the correlation).
4. **Sheppard's correction** (W. F. Sheppard, Proc. London Math. Soc. 29, 353
   (1898)): a camera integrates over each pixel, which adds ``pitch^2 / 12`` to a
   variance; it is subtracted unless ``sheppard=False``.
5. **Checks**: ``saturated`` (any pixel in the window at ``2**bit_depth - 1``; with
   ``bit_depth=None``, at least ``SATURATION_FLAT_PIXELS`` (5) pixels sharing the
   window's maximum raw value while it stands ``SATURATION_MIN_SNR`` (10) noise
   rms above the background: a flat top); ``clipped`` (more than
   ``CLIP_INTENSITY_FRACTION`` (1 %) of the window's intensity in the outer
   ``CLIP_BAND_PX`` (2) pixels of the image or ROI, or the centroid within
   ``CLIP_EDGE_N_SIGMA`` (3) sigma of its edge); ``low_signal`` (peak over noise
   below ``snr_min``).

Uncertainties of the moments assume background-limited noise (the background
rms per pixel, uncorrelated); with a bright spot, shot noise makes them lower
bounds.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from diagnostics.errors import InputError
from diagnostics.profiles import (
    ProfileResult,
    analyze_profile,
    iterated_window_rms_factor,
    least_squares_fit,
)
from diagnostics.results import merge_flags

#: Ways :func:`analyze_image` can fill the headline centroid and sizes:
#: iterated-window moments, Gaussian fits to the two projections (sigma_xy still
#: from moments), or the rotated 2D Gaussian fit.
IMAGE_METHODS = ("moments", "projections", "gauss2d")

#: Longest side of the block-averaged copy used for the spot search, pixels.
COARSE_MAX_SIDE = 480
#: Spot threshold: at least this many noise rms above the background ...
ROI_NOISE_K = 5.0
#: ... and at least this fraction of the smoothed peak above the background.
ROI_PEAK_FRACTION = 0.2
#: rms/sigma of a round 2D Gaussian inside a threshold at 20 % of its peak
#: (METHODS.md 4.4), used to widen the coarse size estimate.
ROI_THRESHOLD_RMS_FACTOR = 0.773072132399
#: Default hot-pixel threshold in noise rms.
HOT_PIXEL_K = 8.0
#: Flat-top rule for saturation when the bit depth is unknown.
SATURATION_FLAT_PIXELS = 5
SATURATION_MIN_SNR = 10.0
#: Clipping rules.
CLIP_BAND_PX = 2
CLIP_INTENSITY_FRACTION = 0.01
CLIP_EDGE_N_SIGMA = 3.0
#: Default signal-to-noise threshold (peak over background noise rms).
DEFAULT_SNR_MIN = 5.0
#: Longest side of the (block-averaged) ROI given to the 2D fit, pixels.
FIT_2D_MAX_SIDE = 64


@dataclass(frozen=True)
class Gaussian2DResult:
    """A rotated 2D Gaussian fitted to a spot (metres; image coordinates).

    ``I = amplitude exp(-0.5 (r - r0)^T S^-1 (r - r0)) + background`` with
    ``S = [[sigma_x^2, sigma_xy], [sigma_xy, sigma_y^2]]`` parametrised by its
    Cholesky factor, so S stays positive definite (METHODS.md 4.3).

    ``downsample`` is the block size the fit ran on; the box it integrates over
    is removed with Sheppard's correction.
    """

    amplitude: float
    centroid_x_m: float
    centroid_y_m: float
    sigma_x_m: float
    sigma_y_m: float
    sigma_xy_m2: float
    tilt_rad: float
    centroid_x_err_m: float
    centroid_y_err_m: float
    sigma_x_err_m: float
    sigma_y_err_m: float
    sigma_xy_err_m2: float
    background: float
    chi2_red: float
    downsample: int
    flags: tuple[str, ...] = ()
    message: str = ""


@dataclass(frozen=True)
class ImageResult:
    """Analysis of one screen image (metres; see the module docstring).

    Attributes
    ----------
    centroid_x_m, centroid_y_m, centroid_x_err_m, centroid_y_err_m : float
    sigma_x_m, sigma_y_m, sigma_x_err_m, sigma_y_err_m : float
        rms sizes (per ``method``) and standard errors.
    sigma_xy_m2 : float
        <(x - x0)(y - y0)>, m^2.
    tilt_rad : float
        Major-axis angle from +x toward +y.
    roi : (int, int, int, int)
        Final window ``(x_min, y_min, x_max, y_max)``, pixels, half-open.
    intensity_sum : float
        Background-subtracted sum inside the window (input units).
    peak : float
        Highest background-subtracted pixel in the window after hot-pixel removal.
    n_saturated : int
        Pixels in the window counted as saturated.
    snr : float
        ``peak`` over the background noise rms.
    projection_x, projection_y : ProfileResult or None
        Profile analysis of the window's projections (``projections=True``), as
        fitted: their sizes still include the pixel pitch^2 / 12 (``method="projections"``
        removes it from the headline sizes).
    gauss2d : Gaussian2DResult or None
        The rotated 2D fit (``fit_2d=True`` or ``method="gauss2d"``).
    flags, message
    method : str
    window_n_sigma : float
    background : float
        Pedestal subtracted after the dark frame, per pixel.
    noise : float
        Background noise rms per pixel.
    n_hot_pixels : int
        Pixels replaced by their 3x3 median.
    """

    centroid_x_m: float
    centroid_y_m: float
    centroid_x_err_m: float
    centroid_y_err_m: float
    sigma_x_m: float
    sigma_y_m: float
    sigma_x_err_m: float
    sigma_y_err_m: float
    sigma_xy_m2: float
    tilt_rad: float
    roi: tuple[int, int, int, int]
    intensity_sum: float
    peak: float
    n_saturated: int
    snr: float
    projection_x: ProfileResult | None
    projection_y: ProfileResult | None
    gauss2d: Gaussian2DResult | None
    flags: tuple[str, ...] = ()
    message: str = ""
    method: str = "moments"
    window_n_sigma: float = 4.0
    background: float = math.nan
    noise: float = math.nan
    n_hot_pixels: int = 0

    @property
    def correlation(self) -> float:
        """sigma_xy / (sigma_x sigma_y)."""
        return self.sigma_xy_m2 / (self.sigma_x_m * self.sigma_y_m)


# ---------------------------------------------------------------------------
# Small pure helpers
# ---------------------------------------------------------------------------


def tilt_angle(sxx: float, syy: float, sxy: float) -> float:
    """Major-axis angle from +x toward +y, ``0.5 atan2(2 sxy, sxx - syy)`` (METHODS.md 4.2)."""
    return 0.5 * math.atan2(2.0 * sxy, sxx - syy)


def principal_variances(sxx: float, syy: float, sxy: float) -> tuple[float, float]:
    """Variances along the major and minor axes (METHODS.md 4.2)."""
    mean = 0.5 * (sxx + syy)
    root = math.hypot(0.5 * (sxx - syy), sxy)
    return mean + root, mean - root


def image_moments(image, *, x0: float = 0.0, y0: float = 0.0) -> tuple[float, float, float, float, float, float]:
    """Intensity-weighted moments of an image in pixel units.

    Parameters
    ----------
    image : array_like, shape (rows, cols)
        Background-subtracted intensities (negative values count as they are).
    x0, y0 : float
        Coordinates of pixel (0, 0) (for a crop of a larger image).

    Returns
    -------
    total, x_mean, y_mean, sxx, syy, sxy : float
        Sum and first and central second moments (pixels, pixels^2); x along
        columns, y along rows.
    """
    a = np.asarray(image, dtype=np.float64)
    px, py = a.sum(axis=0), a.sum(axis=1)
    total = float(px.sum())
    xs = np.arange(a.shape[1], dtype=np.float64)
    ys = np.arange(a.shape[0], dtype=np.float64)
    xm = float(px @ xs) / total
    ym = float(py @ ys) / total
    dx, dy = xs - xm, ys - ym
    sxx = float(px @ (dx * dx)) / total
    syy = float(py @ (dy * dy)) / total
    sxy = float(dy @ (a @ dx)) / total
    return total, xm + x0, ym + y0, sxx, syy, sxy


def _pixel_size(pixel_size_m) -> tuple[float, float]:
    arr = np.asarray(pixel_size_m, dtype=float).ravel()
    if arr.size == 1:
        arr = np.repeat(arr, 2)
    if arr.size != 2 or not np.all(np.isfinite(arr)) or np.any(arr <= 0):
        raise InputError(f"pixel_size_m: expected one positive number or an (x, y) pair, got {pixel_size_m!r}")
    return float(arr[0]), float(arr[1])


def _block_mean(a: np.ndarray, b: int) -> np.ndarray:
    """Mean over ``b x b`` blocks (the image is cut to a multiple of b), float32.

    Built from ``b`` strided row slices and then ``b`` strided column slices, so
    every addition runs over contiguous memory.
    """
    if b == 1:
        return a.astype(np.float32)
    r, c = (a.shape[0] // b) * b, (a.shape[1] // b) * b
    rows = a[0:r:b, :c].astype(np.float32)
    for i in range(1, b):
        rows += a[i:r:b, :c]
    out = rows[:, 0::b].copy()
    for j in range(1, b):
        out += rows[:, j::b]
    out *= np.float32(1.0 / (b * b))
    return out


#: Background statistics use at most this many pixels (an evenly strided subsample).
ROBUST_MAX_SAMPLES = 20000


def _robust_noise(values: np.ndarray) -> tuple[float, float]:
    """(median, 1.4826 * MAD) of a sample: the background level and its noise rms."""
    v = np.asarray(values).ravel()
    if v.size > ROBUST_MAX_SAMPLES:
        v = v[:: v.size // ROBUST_MAX_SAMPLES]
    v = v.astype(np.float64)
    med = float(np.median(v))
    return med, float(1.4826 * np.median(np.abs(v - med)))


def _border(a: np.ndarray, width: int) -> np.ndarray:
    w = max(1, min(width, a.shape[0] // 4, a.shape[1] // 4))
    return np.concatenate([a[:w].ravel(), a[-w:].ravel(), a[w:-w, :w].ravel(), a[w:-w, -w:].ravel()])


def median3x3_at(image: np.ndarray, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """3x3 median of ``image`` at the given pixels, edges repeated ("nearest").

    Equals ``scipy.ndimage.median_filter(image, size=3, mode="nearest")[rows, cols]``
    at a cost proportional to the number of pixels asked for.
    """
    r = np.clip(rows[:, None] + np.array([-1, -1, -1, 0, 0, 0, 1, 1, 1]), 0, image.shape[0] - 1)
    c = np.clip(cols[:, None] + np.array([-1, 0, 1, -1, 0, 1, -1, 0, 1]), 0, image.shape[1] - 1)
    return np.partition(image[r, c], 4, axis=1)[:, 4]


def remove_hot_pixels(image: np.ndarray, *, k: float, noise: float) -> tuple[np.ndarray, int]:
    """Replace isolated spikes by their 3x3 median (METHODS.md 4.1, step 2).

    A pixel is replaced where ``|I - median3x3(I)| > k * noise`` (edges repeated).
    Because a 3x3 median lies between the neighbourhood's minimum and maximum,
    only pixels with ``I - min > T`` or ``max - I > T`` can qualify; the median is
    then evaluated at those candidates only (:func:`median3x3_at`), or with
    ``scipy.ndimage.median_filter`` over their bounding box when they are dense.

    Returns
    -------
    cleaned : ndarray (a new array), n_replaced : int
    """
    out = np.array(image, copy=True)
    if not (noise > 0 and math.isfinite(noise)) or image.size < 9:
        return out, 0
    thr = np.float32(k * noise)
    lo = ndimage.minimum_filter(image, size=3, mode="nearest")
    hi = ndimage.maximum_filter(image, size=3, mode="nearest")
    cand = ((image - lo) > thr) | ((hi - image) > thr)
    rows, cols = np.nonzero(cand)
    if rows.size == 0:
        return out, 0
    r0, r1 = max(rows.min() - 1, 0), min(rows.max() + 2, image.shape[0])
    c0, c1 = max(cols.min() - 1, 0), min(cols.max() + 2, image.shape[1])
    if rows.size > 0.3 * (r1 - r0) * (c1 - c0):
        # candidates sit at least one pixel inside the box unless the box edge is the
        # image edge, so the box's "nearest" padding gives the same medians
        med = ndimage.median_filter(image[r0:r1, c0:c1], size=3, mode="nearest")[rows - r0, cols - c0]
    else:
        med = median3x3_at(image, rows, cols)
    hot = np.abs(image[rows, cols] - med) > thr
    out[rows[hot], cols[hot]] = med[hot]
    return out, int(hot.sum())


# ---------------------------------------------------------------------------
# The 2D Gaussian fit
# ---------------------------------------------------------------------------


def _g2d_model(xy, p):
    x, y = xy
    a, x0, y0, l11, l21, l22, bg = p
    dx, dy = x - x0, y - y0
    # S = L L^T, L = [[l11, 0], [l21, l22]]; r^T S^-1 r = |L^-1 r|^2
    u = dx / l11
    v = (dy - l21 * u) / l22
    return a * np.exp(-0.5 * (u * u + v * v)) + bg


def _g2d_jac(xy, p):
    x, y = xy
    a, x0, y0, l11, l21, l22, bg = p
    dx, dy = x - x0, y - y0
    u = dx / l11
    v = (dy - l21 * u) / l22
    e = np.exp(-0.5 * (u * u + v * v))
    ae = a * e
    # derivatives of q = u^2 + v^2 through u and v; dI/dp = -0.5 ae dq/dp
    du = {"x0": -1.0 / l11, "l11": -u / l11}
    dv_du = -l21 / l22
    jx0 = -ae * (u * du["x0"] + v * dv_du * du["x0"])
    jy0 = -ae * (v * (-1.0 / l22))
    jl11 = -ae * (u * du["l11"] + v * dv_du * du["l11"])
    jl21 = -ae * (v * (-u / l22))
    jl22 = -ae * (v * (-v / l22))
    return np.stack([e, jx0, jy0, jl11, jl21, jl22, np.ones_like(e)], axis=-1)


def fit_gaussian_2d(
    image,
    *,
    pixel_size_m=1.0,
    origin_px: tuple[float, float] = (0.0, 0.0),
    max_side: int = FIT_2D_MAX_SIDE,
    sheppard: bool = True,
    p0: Sequence[float] | None = None,
) -> Gaussian2DResult:
    """Fit a rotated 2D Gaussian plus constant to a background-subtracted spot.

    Parameters
    ----------
    image : array_like, shape (rows, cols)
        The spot (a crop is fine); x along columns, y along rows.
    pixel_size_m : float or (float, float)
        Pixel pitch ``(x, y)``, metres.
    origin_px : (float, float)
        ``(x, y)`` pixel coordinates of ``image[0, 0]`` in the full frame.
    max_side : int
        The image is block-averaged so that its longer side is at most this
        (the fit then runs on at most ``max_side^2`` points).
    sheppard : bool
        The input pixels integrate the intensity (a camera); the block box
        (``b`` pixels) is then removed with Sheppard's ``(b pitch)^2 / 12``.
        With ``False`` (point samples) ``(b^2 - 1) pitch^2 / 12`` is removed.
    p0 : sequence, optional
        Start ``(amplitude, x0_px, y0_px, sxx_px2, syy_px2, sxy_px2, background)``
        in the input's pixel units; default from moments.

    Returns
    -------
    Gaussian2DResult
        Flagged ``fit_failed`` with a reason when the fit does not converge or
        the answer is unphysical.
    """
    px_m, py_m = _pixel_size(pixel_size_m)
    a = np.asarray(image, dtype=np.float64)
    if a.ndim != 2 or min(a.shape) < 3:
        raise InputError(f"image: expected a 2D array of at least 3x3 pixels, got shape {a.shape}")
    b = max(1, math.ceil(max(a.shape) / max_side))
    red = _block_mean(a, b).astype(np.float64) if b > 1 else a
    rows, cols = red.shape
    # block centres in input pixels: column j of the reduced image sits at b j + (b-1)/2
    xs = b * np.arange(cols) + 0.5 * (b - 1)
    ys = b * np.arange(rows) + 0.5 * (b - 1)
    gx, gy = np.meshgrid(xs, ys)
    xy = np.stack((gx.ravel(), gy.ravel()))
    z = red.ravel()
    nan = math.nan

    def failed(reason: str) -> Gaussian2DResult:
        return Gaussian2DResult(nan, nan, nan, nan, nan, nan, nan, nan, nan, nan, nan, nan, nan, nan, b, ("fit_failed",), f"2D fit failed: {reason}")

    if p0 is None:
        tot, xm, ym, sxx, syy, sxy = image_moments(np.clip(a, 0, None))
        if not (tot > 0 and sxx > 0 and syy > 0):
            return failed("no positive signal to start from")
        amp0, bg0 = float(a.max()), 0.0
    else:
        amp0, xm, ym, sxx, syy, sxy, bg0 = (float(v) for v in p0)
    det = sxx * syy - sxy * sxy
    if not det > 0:
        sxy = 0.0
    l11 = math.sqrt(sxx)
    l21 = sxy / l11
    l22 = math.sqrt(max(syy - l21 * l21, 1e-6 * syy))
    # a spot that needs more than ~200 iterations is not a Gaussian worth the wait
    fit = least_squares_fit(_g2d_model, _g2d_jac, xy, z, [amp0, xm, ym, l11, l21, l22, bg0], max_nfev=1600)
    if not fit.success:
        return failed(fit.message)
    amp, x0, y0, l11, l21, l22, bg = fit.params
    if not amp > 0:
        return failed(f"fitted amplitude {amp:.3g} is not positive")
    if not (0 <= x0 <= a.shape[1] - 1 and 0 <= y0 <= a.shape[0] - 1):
        return failed("fitted centre lies outside the image")
    cov = fit.covariance
    if not np.all(np.isfinite(cov)):
        return failed("parameter covariance is singular")
    # S from the Cholesky factor, and its Jacobian for the errors
    sxx, sxy, syy = l11 * l11, l11 * l21, l21 * l21 + l22 * l22
    jac_s = np.array([[2 * l11, 0, 0], [l21, l11, 0], [0, 2 * l21, 2 * l22]])
    cs = jac_s @ cov[3:6, 3:6] @ jac_s.T
    box = b * b / 12.0 if sheppard else (b * b - 1) / 12.0
    sxx_c, syy_c = sxx - box, syy - box
    if not (sxx_c > 0 and syy_c > 0 and sxx_c * syy_c > sxy * sxy):
        return failed("spot narrower than the fit's block size")
    sx, sy = math.sqrt(sxx_c), math.sqrt(syy_c)
    sx_m, sy_m, sxy_m2 = sx * px_m, sy * py_m, sxy * px_m * py_m
    err = np.sqrt(np.abs(np.diag(cov)))
    return Gaussian2DResult(
        amplitude=float(amp),
        centroid_x_m=(x0 + origin_px[0]) * px_m,
        centroid_y_m=(y0 + origin_px[1]) * py_m,
        sigma_x_m=sx_m,
        sigma_y_m=sy_m,
        sigma_xy_m2=sxy_m2,
        tilt_rad=tilt_angle(sx_m**2, sy_m**2, sxy_m2),
        centroid_x_err_m=float(err[1]) * px_m,
        centroid_y_err_m=float(err[2]) * py_m,
        sigma_x_err_m=math.sqrt(abs(cs[0, 0])) / (2 * sx) * px_m,
        sigma_y_err_m=math.sqrt(abs(cs[2, 2])) / (2 * sy) * py_m,
        sigma_xy_err_m2=math.sqrt(abs(cs[1, 1])) * px_m * py_m,
        background=float(bg),
        chi2_red=float(fit.chi2_red),
        downsample=b,
    )


# ---------------------------------------------------------------------------
# The pipeline
# ---------------------------------------------------------------------------


def _check_roi(roi, shape) -> tuple[int, int, int, int]:
    try:
        x0, y0, x1, y1 = (int(v) for v in roi)
    except (TypeError, ValueError):
        raise InputError(f"roi: expected (x_min, y_min, x_max, y_max) integers, got {roi!r}") from None
    if not (0 <= x0 < x1 <= shape[1] and 0 <= y0 < y1 <= shape[0]):
        raise InputError(f"roi: {roi!r} does not lie inside the {shape[1]}x{shape[0]} image (expected 0 <= x_min < x_max <= cols, same for y)")
    if x1 - x0 < 8 or y1 - y0 < 8:
        raise InputError(f"roi: {roi!r} is smaller than 8x8 pixels")
    return x0, y0, x1, y1


def _nan_result(roi, flags, message, method, n, background=math.nan, noise=math.nan, snr=math.nan) -> ImageResult:
    nan = math.nan
    return ImageResult(
        nan, nan, nan, nan, nan, nan, nan, nan, nan, nan, roi, nan, nan, 0, snr, None, None, None,
        merge_flags(flags), message, method, n, background, noise, 0,
    )


def analyze_image(
    pixels,
    *,
    pixel_size_m,
    dark=None,
    bit_depth: int | None = None,
    roi: tuple[int, int, int, int] | None = None,
    window_n_sigma: float = 4.0,
    method: str = "moments",
    fit_2d: bool = False,
    projections: bool = True,
    hot_pixel_k: float = HOT_PIXEL_K,
    snr_min: float = DEFAULT_SNR_MIN,
    sheppard: bool = True,
    window_correction: bool = False,
) -> ImageResult:
    """Find the beam spot on a screen image and measure it.

    Parameters
    ----------
    pixels : array_like, shape (rows, cols)
        Raw image (any integer or float dtype).
    pixel_size_m : float or (float, float)
        Pixel pitch, metres (one number for square pixels, else ``(x, y)``).
    dark : array_like, shape (rows, cols), optional
        Dark frame at the same settings; without one the background is the
        median around the spot.
    bit_depth : int, optional
        Sensor bit depth for the saturation test (see the module docstring).
    roi : (x_min, y_min, x_max, y_max), optional
        Search only inside this half-open pixel rectangle; its border then
        counts as the edge for ``clipped``.
    window_n_sigma : float
        Half-width of the iterated moment window, in sigma (> sqrt(3)).
    method : {"moments", "projections", "gauss2d"}
        Where the headline centroid and sizes come from (see :data:`IMAGE_METHODS`).
    fit_2d : bool
        Also fit a rotated 2D Gaussian (implied by ``method="gauss2d"``).
    projections : bool
        Analyse the window's x and y projections with
        :func:`diagnostics.profiles.analyze_profile` (implied by ``method="projections"``).
    hot_pixel_k : float
        Hot-pixel threshold in background noise rms.
    snr_min : float
        Below this peak signal-to-noise ratio the result is flagged ``low_signal``.
    sheppard : bool
        Subtract ``pitch^2 / 12`` from the variances (pixel-integrating camera).
    window_correction : bool
        Divide the window's bias out of the moment sizes.

    Returns
    -------
    ImageResult

    Examples
    --------
    >>> yy, xx = np.mgrid[0:120, 0:160]
    >>> img = 1000 * np.exp(-0.5 * (((xx - 80) / 6) ** 2 + ((yy - 60) / 4) ** 2)) + 50
    >>> r = analyze_image(img, pixel_size_m=1e-5, sheppard=False, projections=False)
    >>> round(r.centroid_x_m * 1e6, 3), round(r.sigma_x_m * 1e6, 1), r.flags
    (800.0, 60.0, ())
    """
    if method not in IMAGE_METHODS:
        raise InputError(f"method: expected one of {IMAGE_METHODS}, got {method!r}")
    if not window_n_sigma > math.sqrt(3.0):
        raise InputError(f"window_n_sigma: expected a number above sqrt(3) = 1.732, got {window_n_sigma!r}")
    px_m, py_m = _pixel_size(pixel_size_m)
    raw_all = np.asarray(pixels)
    if raw_all.ndim != 2 or min(raw_all.shape) < 8:
        raise InputError(f"pixels: expected a 2D image of at least 8x8 pixels, got shape {raw_all.shape}")
    if not (np.issubdtype(raw_all.dtype, np.integer) or np.issubdtype(raw_all.dtype, np.floating)):
        raise InputError(f"pixels: expected integer or float values, got dtype {raw_all.dtype}")
    if np.issubdtype(raw_all.dtype, np.floating) and not np.isfinite(raw_all).all():
        raise InputError(f"pixels: expected finite values, found {np.count_nonzero(~np.isfinite(raw_all))} NaN or inf")
    dark_all = None
    if dark is not None:
        dark_all = np.asarray(dark)
        if dark_all.shape != raw_all.shape:
            raise InputError(f"dark: expected the image's shape {raw_all.shape}, got {dark_all.shape}")
        if np.issubdtype(dark_all.dtype, np.floating) and not np.isfinite(dark_all).all():
            raise InputError(f"dark: expected finite values, found {np.count_nonzero(~np.isfinite(dark_all))} NaN or inf")
    if bit_depth is not None and not (isinstance(bit_depth, (int, np.integer)) and 1 <= bit_depth <= 32):
        raise InputError(f"bit_depth: expected an integer from 1 to 32, got {bit_depth!r}")
    n = float(window_n_sigma)
    fit_2d = fit_2d or method == "gauss2d"
    projections = projections or method == "projections"

    rx0, ry0, rx1, ry1 = _check_roi(roi, raw_all.shape) if roi is not None else (0, 0, raw_all.shape[1], raw_all.shape[0])
    raw = raw_all[ry0:ry1, rx0:rx1]
    drk = None if dark_all is None else dark_all[ry0:ry1, rx0:rx1]
    H, W = raw.shape
    region = (rx0, ry0, rx1, ry1)

    # ---- 1. coarse spot search on a block-averaged copy
    b = max(1, math.ceil(max(H, W) / COARSE_MAX_SIDE))
    red = _block_mean(raw, b)
    if drk is not None:
        red -= _block_mean(drk, b)
    sm = ndimage.gaussian_filter(red, 1.0, mode="nearest")
    bw = max(2, min(sm.shape) // 20)
    bg_s, noise_s = _robust_noise(_border(sm, bw))
    bg_r, noise_r = _robust_noise(_border(red, bw))  # unsmoothed: per-pixel noise is b * noise_r
    peak_s = float(sm.max())
    if not noise_s > 0:
        noise_s = max(1e-12, 1e-6 * abs(peak_s))
    if peak_s - bg_s < ROI_NOISE_K * noise_s:
        return _nan_result(region, ("low_signal",), f"no spot found: smoothed peak is {(peak_s - bg_s) / noise_s:.2g} noise rms above background (needs {ROI_NOISE_K:g})", method, n, bg_r, noise_r * b, (peak_s - bg_s) / noise_s)
    thr = bg_s + max(ROI_NOISE_K * noise_s, ROI_PEAK_FRACTION * (peak_s - bg_s))
    labels, n_lab = ndimage.label(sm > thr)
    sums = np.bincount(labels.ravel(), weights=(sm - bg_s).ravel(), minlength=n_lab + 1)[1:]
    spot = labels == (int(np.argmax(sums)) + 1)
    ii, jj = np.nonzero(spot)
    wts = (sm[ii, jj] - bg_s).astype(np.float64)
    tot = wts.sum()
    cx = (jj @ wts) / tot
    cy = (ii @ wts) / tot
    sx = math.sqrt(max((((jj - cx) ** 2) @ wts) / tot, 1.0 / 12))
    sy = math.sqrt(max((((ii - cy) ** 2) @ wts) / tot, 1.0 / 12))
    # back to full-resolution pixels of the region; widen for the threshold bias and the smoothing
    cx, cy = b * cx + 0.5 * (b - 1), b * cy + 0.5 * (b - 1)
    sx = b * math.sqrt(max(sx**2 / ROI_THRESHOLD_RMS_FACTOR**2 - 1.0, 0.25))
    sy = b * math.sqrt(max(sy**2 / ROI_THRESHOLD_RMS_FACTOR**2 - 1.0, 0.25))
    sx, sy = max(sx, 1.0), max(sy, 1.0)

    # ---- 2./3. fine stage: crop, clean, iterate the window
    def window_of(cx, cy, sx, sy):
        # pixels whose centres satisfy |x - cx| <= n sx and |y - cy| <= n sy (half-open bounds)
        return (
            max(0, math.ceil(cx - n * sx)), max(0, math.ceil(cy - n * sy)),
            min(W, math.floor(cx + n * sx) + 1), min(H, math.floor(cy + n * sy) + 1),
        )

    crop = None
    clean = None
    sub = None
    n_hot = 0
    win = window_of(cx, cy, sx, sy)
    bgv, noise = bg_r, noise_r * b
    img = None
    converged = False
    for it in range(30):
        if clean is None or not (win[0] >= clean[0] and win[1] >= clean[1] and win[2] <= clean[2] and win[3] <= clean[3]):
            # crop with a margin of a quarter window (at least 6 px) for the pedestal;
            # hot pixels are removed in the window plus 10 % (at least 3 px) only
            wx, wy = win[2] - win[0], win[3] - win[1]
            mx, my = max(6, wx // 4), max(6, wy // 4)
            crop = (max(0, win[0] - mx), max(0, win[1] - my), min(W, win[2] + mx), min(H, win[3] + my))
            gx, gy = max(3, wx // 10), max(3, wy // 10)
            clean = (max(crop[0], win[0] - gx), max(crop[1], win[1] - gy), min(crop[2], win[2] + gx), min(crop[3], win[3] + gy))
            sub = raw[crop[1]:crop[3], crop[0]:crop[2]].astype(np.float32)
            if drk is not None:
                sub -= drk[crop[1]:crop[3], crop[0]:crop[2]]
            # background: the crop outside the current window (annulus), else the coarse border
            ann = np.ones(sub.shape, dtype=bool)
            ann[win[1] - crop[1]:win[3] - crop[1], win[0] - crop[0]:win[2] - crop[0]] = False
            if np.count_nonzero(ann) >= 50:
                bgv, noise = _robust_noise(sub[ann])
            if not noise > 0:
                noise = noise_r * b
            cl = (slice(clean[1] - crop[1], clean[3] - crop[1]), slice(clean[0] - crop[0], clean[2] - crop[0]))
            sub[cl], n_hot = remove_hot_pixels(sub[cl], k=hot_pixel_k, noise=noise)
            img = sub - np.float32(bgv)
        assert img is not None and crop is not None  # set on the first pass (clean starts as None)
        w_img = img[win[1] - crop[1]:win[3] - crop[1], win[0] - crop[0]:win[2] - crop[0]]
        tot, mx_, my_, sxx, syy, sxy = image_moments(w_img, x0=win[0], y0=win[1])
        if not tot > 0:
            return _nan_result(_abs_roi(win, region), ("fit_failed",), "no positive intensity inside the moment window", method, n, bgv, noise)
        if not (sxx > 0 and syy > 0):
            return _nan_result(_abs_roi(win, region), ("fit_failed",), "the spot has no width in x or y (a single pixel or line)", method, n, bgv, noise)
        new = window_of(mx_, my_, math.sqrt(sxx), math.sqrt(syy))
        if new == win:
            converged = True
            break
        if it == 29 or new[2] - new[0] < 3 or new[3] - new[1] < 3:
            break  # keep the last window whose moments were computed
        win = new
    flags: list[str] = []
    notes: list[str] = []
    if not converged:
        notes.append("moment window did not settle in 30 iterations")

    # ---- moments, Sheppard, errors
    x_idx = np.arange(win[0], win[2], dtype=np.float64)
    y_idx = np.arange(win[1], win[3], dtype=np.float64)
    nx, ny = x_idx.size, y_idx.size
    if sheppard:
        sxx, syy = sxx - 1.0 / 12.0, syy - 1.0 / 12.0
    if not (sxx > 0 and syy > 0):
        return _nan_result(_abs_roi(win, region), ("fit_failed",), "spot narrower than a pixel", method, n, bgv, noise)
    corr = 1.0
    if window_correction:
        corr = iterated_window_rms_factor(n)
    sx_px, sy_px = math.sqrt(sxx) / corr, math.sqrt(syy) / corr
    sxy_px = sxy / corr**2
    dx2 = (x_idx - mx_) ** 2
    dy2 = (y_idx - my_) ** 2
    # background-limited errors: each pixel carries noise^2 (module docstring)
    cx_err = noise * math.sqrt(ny * dx2.sum()) / tot
    cy_err = noise * math.sqrt(nx * dy2.sum()) / tot
    sx_err = noise * math.sqrt(ny * ((dx2 - sxx) ** 2).sum()) / tot / (2 * math.sqrt(sxx))
    sy_err = noise * math.sqrt(nx * ((dy2 - syy) ** 2).sum()) / tot / (2 * math.sqrt(syy))

    # ---- checks
    peak = float(w_img.max())
    snr = peak / noise if noise > 0 else math.inf
    if snr < snr_min:
        flags.append("low_signal")
        notes.append(f"peak signal-to-noise {snr:.3g} below {snr_min:g}")
    raw_w = raw[win[1]:win[3], win[0]:win[2]]
    if bit_depth is not None:
        n_sat = int(np.count_nonzero(raw_w >= (2 ** int(bit_depth) - 1)))
        if n_sat:
            flags.append("saturated")
            notes.append(f"{n_sat} pixels at the {bit_depth}-bit maximum {2 ** int(bit_depth) - 1}")
    else:
        top = raw_w.max()
        n_top = int(np.count_nonzero(raw_w == top))
        level = float(top) - (float(drk[win[1]:win[3], win[0]:win[2]].mean()) if drk is not None else 0.0) - bgv
        n_sat = 0
        if n_top >= SATURATION_FLAT_PIXELS and level > SATURATION_MIN_SNR * noise:
            n_sat = n_top
            flags.append("saturated")
            notes.append(f"flat top: {n_top} pixels share the maximum value {top}")
    # clipping against the region (image or ROI) border
    band = CLIP_BAND_PX
    assert img is not None and crop is not None  # the window loop ran at least once
    inner = img[max(win[1], band) - crop[1]:min(win[3], H - band) - crop[1], max(win[0], band) - crop[0]:min(win[2], W - band) - crop[0]]
    band_frac = (tot - float(inner.sum(dtype=np.float64))) / tot
    room = min(mx_ / sx_px, (W - 1 - mx_) / sx_px, my_ / sy_px, (H - 1 - my_) / sy_px)
    if band_frac > CLIP_INTENSITY_FRACTION or room < CLIP_EDGE_N_SIGMA:
        flags.append("clipped")
        edge = "ROI" if roi is not None else "image"
        notes.append(f"spot reaches the {edge} edge ({100 * band_frac:.2g} % of the intensity in the outer {band} px, centre {room:.2g} sigma from it)")

    # ---- physical units (absolute frame coordinates)
    ox, oy = rx0, ry0
    cx_m, cy_m = (mx_ + ox) * px_m, (my_ + oy) * py_m
    sx_m, sy_m, sxy_m2 = sx_px * px_m, sy_px * py_m, sxy_px * px_m * py_m
    res_sx_err, res_sy_err = sx_err / corr * px_m, sy_err / corr * py_m
    res_cx_err, res_cy_err = cx_err * px_m, cy_err * py_m

    proj_x = proj_y = None
    if projections and nx >= 8 and ny >= 8:
        pxs = w_img.sum(axis=0, dtype=np.float64)
        pys = w_img.sum(axis=1, dtype=np.float64)
        proj_x = analyze_profile((x_idx + ox) * px_m, pxs, baseline="constant", window_n_sigma=n)
        proj_y = analyze_profile((y_idx + oy) * py_m, pys, baseline="constant", window_n_sigma=n)
    g2 = None
    if fit_2d:
        g2 = fit_gaussian_2d(w_img, pixel_size_m=(px_m, py_m), origin_px=(win[0] + ox, win[1] + oy), sheppard=sheppard)
    if method == "projections":
        if proj_x is None or proj_y is None or "fit_failed" in proj_x.flags + proj_y.flags:
            flags.append("fit_failed")
            notes.append("projection fit failed; sizes from moments")
        else:
            rho = sxy_m2 / (sx_m * sy_m)
            cx_m, cy_m, res_cx_err, res_cy_err = proj_x.centroid_m, proj_y.centroid_m, proj_x.centroid_err_m, proj_y.centroid_err_m
            sx_m, sy_m, res_sx_err, res_sy_err = proj_x.sigma_m, proj_y.sigma_m, proj_x.sigma_err_m, proj_y.sigma_err_m
            if sheppard:  # a projection sums pixels: each bin still integrates one pitch
                sx_m = math.sqrt(max(sx_m**2 - px_m**2 / 12, 0.0))
                sy_m = math.sqrt(max(sy_m**2 - py_m**2 / 12, 0.0))
            sxy_m2 = rho * sx_m * sy_m
    elif method == "gauss2d":
        if g2 is None or g2.flags:
            flags.append("fit_failed")
            notes.append(f"{g2.message if g2 else '2D fit missing'}; sizes from moments")
        else:
            cx_m, cy_m, res_cx_err, res_cy_err = g2.centroid_x_m, g2.centroid_y_m, g2.centroid_x_err_m, g2.centroid_y_err_m
            sx_m, sy_m, res_sx_err, res_sy_err = g2.sigma_x_m, g2.sigma_y_m, g2.sigma_x_err_m, g2.sigma_y_err_m
            sxy_m2 = g2.sigma_xy_m2

    return ImageResult(
        centroid_x_m=float(cx_m),
        centroid_y_m=float(cy_m),
        centroid_x_err_m=float(res_cx_err),
        centroid_y_err_m=float(res_cy_err),
        sigma_x_m=float(sx_m),
        sigma_y_m=float(sy_m),
        sigma_x_err_m=float(res_sx_err),
        sigma_y_err_m=float(res_sy_err),
        sigma_xy_m2=float(sxy_m2),
        tilt_rad=tilt_angle(sx_m**2, sy_m**2, sxy_m2),
        roi=_abs_roi(win, region),
        intensity_sum=float(tot),
        peak=peak,
        n_saturated=int(n_sat),
        snr=float(snr),
        projection_x=proj_x,
        projection_y=proj_y,
        gauss2d=g2,
        flags=merge_flags(flags),
        message="; ".join(notes),
        method=method,
        window_n_sigma=n,
        background=float(bgv),
        noise=float(noise),
        n_hot_pixels=int(n_hot),
    )


def _abs_roi(win, region) -> tuple[int, int, int, int]:
    """A window in region coordinates as frame coordinates."""
    return (int(win[0] + region[0]), int(win[1] + region[1]), int(win[2] + region[0]), int(win[3] + region[1]))


def ellipse_points(result, n_sigma: float = 1.0, n: int = 100) -> tuple[np.ndarray, np.ndarray]:
    """Points on the ``n_sigma`` ellipse of a spot, for plotting over the image.

    Parameters
    ----------
    result : ImageResult or Gaussian2DResult
    n_sigma : float
        Ellipse scale; ``(r - r0)^T S^-1 (r - r0) = n_sigma^2``.
    n : int
        Number of points (the first and last coincide, closing the curve).

    Returns
    -------
    x_m, y_m : ndarray, shape (n,)
        NaN when the beam matrix is not positive definite.
    """
    s = np.array([[result.sigma_x_m**2, result.sigma_xy_m2], [result.sigma_xy_m2, result.sigma_y_m**2]], dtype=float)
    t = np.linspace(0.0, 2.0 * math.pi, int(n))
    if not (np.all(np.isfinite(s)) and s[0, 0] > 0 and np.linalg.det(s) > 0):
        return np.full(t.shape, np.nan), np.full(t.shape, np.nan)
    lo = np.linalg.cholesky(s)
    pts = n_sigma * (lo @ np.vstack([np.cos(t), np.sin(t)]))
    return result.centroid_x_m + pts[0], result.centroid_y_m + pts[1]


__all__ = [
    "IMAGE_METHODS",
    "Gaussian2DResult",
    "ImageResult",
    "analyze_image",
    "ellipse_points",
    "fit_gaussian_2d",
    "image_moments",
    "principal_variances",
    "remove_hot_pixels",
    "tilt_angle",
]
