"""One-dimensional beam profiles: wire scans and image projections.

A profile is a signal sampled at positions along one transverse axis.  This
module fits it with a Gaussian (or a core-plus-halo or super-Gaussian shape) on a
constant or linear baseline, measures a model-free rms inside an iterated noise
window, and flags what makes the numbers doubtful.  Everything is in metres; the
signal is in arbitrary units.  Conventions are those of :mod:`diagnostics`.

Models (M. G. Minty & F. Zimmermann, *Measuring and Controlling Charged Particle
Beams*, Springer 2003, ch. 3; formulas restated in METHODS.md section 3.1)
-------------------------------------------------------------------------------
``gaussian``
    ``A exp(-(x - mu)^2 / (2 sigma^2)) + b(x)``
``halo``
    Two Gaussians with a common centre, ``A1 exp(-(x-mu)^2/2s1^2) + A2 exp(-(x-mu)^2/2s2^2) + b(x)``,
    ``s1 < s2``; ``sigma_m`` is the model's rms,
    ``sqrt((A1 s1^3 + A2 s2^3) / (A1 s1 + A2 s2))``, and the halo fraction is the
    halo's share of the area, ``A2 s2 / (A1 s1 + A2 s2)``.
``super_gaussian``
    ``A exp(-0.5 |(x - mu)/w|^p) + b(x)``; ``sigma_m`` is its rms,
    ``w 2^(1/p) sqrt(Gamma(3/p) / Gamma(1/p))``.

The baseline ``b(x)`` is ``c0`` (``baseline="constant"``) or ``c0 + c1 (x - x_ref)``
(``"linear"``).  Results report it as its value at the centroid
(``baseline``) and its slope (``baseline_slope_per_m``).

The rms and its noise cut
-------------------------
``rms_m`` is model-free: the fitted baseline is subtracted (no clipping of
negative values), then the centroid and rms are computed from the points with
``|x - mu| <= n * rms`` and the window is iterated until the set of points stops
changing (``n = window_n_sigma``, default 4).  Points are weighted by their local
spacing, so uneven scans give the integral moments.  For a pure Gaussian a
window at ``+-n sigma_true`` gives ``rms / sigma = window_rms_factor(n)``
(METHODS.md section 3.2: 0.879626 at n = 2, 0.986578 at 3, 0.999465 at 4); because
the iterated window is measured in units of the rms itself, its fixed point is
the slightly smaller :func:`iterated_window_rms_factor` (0.999460 at n = 4,
0.725741 at n = 2).  ``rms_m`` is *not* corrected; divide by that factor when a
Gaussian core may be assumed.

Quality flags (names from :data:`diagnostics.results.FLAGS`)
-----------------------------------------------------------
``clipped``
    the centre lies within ``CLIP_EDGE_N_SIGMA`` (2) sigma of a scan end, or the
    fitted peak still stands above ``EDGE_EXCESS_FRACTION`` (5 %) of its
    amplitude at the outermost point of a side (the baseline is not reached).
``low_signal``
    ``snr = amplitude / noise`` below ``snr_min`` (default ``DEFAULT_SNR_MIN`` = 5),
    the noise being the rms residual of the Gaussian fit.
``fit_failed``
    the optimiser did not converge or gave an unphysical answer (sigma <= 0,
    centre outside the scan, sigma wider than the scan, amplitude <= 0); fitted
    values are then NaN, the rms and its centroid are still given.
``non_gaussian``
    the Gaussian-fit sigma and the rms (divided by its window factor) differ by
    more than ``NON_GAUSSIAN_THRESHOLD`` (10 %) and by more than three combined
    standard errors.
``too_few_points``
    fewer points than the model needs (parameters + 2).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize, special

from diagnostics.errors import InputError
from diagnostics.results import merge_flags

#: FWHM of a Gaussian per unit sigma, 2 sqrt(2 ln 2).
FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))

#: Profile models :func:`analyze_profile` offers.
PROFILE_MODELS = ("gaussian", "halo", "super_gaussian")

#: Baseline models.
BASELINES = ("constant", "linear")

#: Default signal-to-noise threshold below which a profile is flagged ``low_signal``.
DEFAULT_SNR_MIN = 5.0

#: A centre closer than this many sigma to a scan end is flagged ``clipped``.
CLIP_EDGE_N_SIGMA = 2.0

#: The peak (above baseline) at a scan end, as a fraction of the amplitude, above
#: which the baseline counts as not reached (a Gaussian reaches 5 % at 2.448 sigma).
EDGE_EXCESS_FRACTION = 0.05

#: Relative disagreement between Gaussian sigma and window-corrected rms above
#: which a profile is flagged ``non_gaussian`` (it must also exceed 3 standard errors).
NON_GAUSSIAN_THRESHOLD = 0.10

#: Fraction of the points at each end used for the starting baseline (METHODS.md 3.1: 10-20 %).
EDGE_FRACTION = 0.15


# ---------------------------------------------------------------------------
# Exact factors (METHODS.md sections 3.1-3.3)
# ---------------------------------------------------------------------------


def window_rms_factor(n_sigma: float) -> float:
    """rms / sigma of a Gaussian truncated at ``+-n_sigma`` true sigma.

    ``sqrt(1 - 2 n phi(n) / (2 Phi(n) - 1))``, the variance of a truncated normal
    distribution (N. L. Johnson, S. Kotz & N. Balakrishnan, *Continuous Univariate
    Distributions*, vol. 1, 2nd ed., Wiley 1994, eq. 13.134 with symmetric limits).

    Examples
    --------
    >>> round(window_rms_factor(3.0), 9)
    0.986578393
    """
    n = float(n_sigma)
    if n <= 0:
        raise InputError(f"window_n_sigma: expected a positive number, got {n_sigma!r}")
    # phi(n) = exp(-n^2/2)/sqrt(2 pi);  2 Phi(n) - 1 = erf(n / sqrt 2)
    pdf = math.exp(-0.5 * n * n) / math.sqrt(2.0 * math.pi)
    return math.sqrt(1.0 - 2.0 * n * pdf / math.erf(n / math.sqrt(2.0)))


@functools.lru_cache(maxsize=64)
def iterated_window_rms_factor(n_sigma: float) -> float:
    """rms / sigma that the iterated ``+-n * rms`` window converges to for a Gaussian.

    The iterated window is measured in units of its own result, so the fixed point
    ``r`` solves ``r = window_rms_factor(n r)``.

    Examples
    --------
    >>> round(iterated_window_rms_factor(4.0), 6)
    0.99946
    """
    n = float(n_sigma)
    if n <= math.sqrt(3.0):
        # below sqrt(3) the window shrinks without end (a flat top has rms = w/sqrt(3))
        raise InputError(f"window_n_sigma: expected a number above sqrt(3) = 1.732, got {n_sigma!r}")
    return optimize.brentq(lambda r: window_rms_factor(n * r) - r, 1e-6, 1.0, xtol=1e-15)


def threshold_equivalent_n_sigma(fraction: float) -> float:
    """Half-width in sigma of the region above ``fraction`` of a Gaussian's peak, sqrt(-2 ln f)."""
    return math.sqrt(-2.0 * math.log(fraction))


def super_gaussian_rms_factor(order: float) -> float:
    """rms / w of ``exp(-0.5 |x/w|^p)``: ``2^(1/p) sqrt(Gamma(3/p) / Gamma(1/p))``."""
    p = float(order)
    return 2.0 ** (1.0 / p) * math.sqrt(special.gamma(3.0 / p) / special.gamma(1.0 / p))


def halo_rms(a1: float, s1: float, a2: float, s2: float) -> tuple[float, float]:
    """(rms, halo fraction) of two Gaussians with a common centre (METHODS.md 3.1)."""
    w1, w2 = a1 * s1, a2 * s2  # areas up to the common factor sqrt(2 pi)
    return math.sqrt((w1 * s1**2 + w2 * s2**2) / (w1 + w2)), w2 / (w1 + w2)


def sigma_u_from_xy(sigma_x_m: float, sigma_y_m: float, sigma_xy_m2: float, wire_angle_rad: float) -> float:
    """rms size seen by a wire whose normal is at ``wire_angle_rad`` from +x toward +y.

    ``sigma_u^2 = sigma_x^2 cos^2 t + 2 sigma_xy sin t cos t + sigma_y^2 sin^2 t``
    (projection of the beam matrix; METHODS.md 3.3).
    """
    c, s = math.cos(wire_angle_rad), math.sin(wire_angle_rad)
    return math.sqrt(sigma_x_m**2 * c * c + 2.0 * sigma_xy_m2 * s * c + sigma_y_m**2 * s * s)


@dataclass(frozen=True)
class CouplingResult:
    """x-y correlation of the beam from x, y and tilted (u) wire sizes.

    Attributes
    ----------
    sigma_xy_m2, sigma_xy_err_m2 : float
        Second moment <xy> and its standard error, m^2.
    correlation : float
        ``sigma_xy / (sigma_x sigma_y)``, must lie in [-1, 1].
    tilt_rad : float
        Major-axis angle, ``0.5 atan2(2 sigma_xy, sigma_x^2 - sigma_y^2)``.
    flags, message
        ``unphysical`` when ``|correlation| >= 1`` (sizes inconsistent).
    """

    sigma_xy_m2: float
    sigma_xy_err_m2: float
    correlation: float
    tilt_rad: float
    flags: tuple[str, ...] = ()
    message: str = ""


def sigma_xy_from_u(
    sigma_x_m: float,
    sigma_y_m: float,
    sigma_u_m: float,
    wire_angle_rad: float,
    *,
    errors: tuple[float, float, float] | None = None,
) -> CouplingResult:
    """Beam x-y moment from sizes measured by x, y and u wires.

    ``sigma_xy = (sigma_u^2 - sigma_x^2 cos^2 t - sigma_y^2 sin^2 t) / sin 2t``
    (METHODS.md 3.3; the x/y/u arrangement is that of I. Agapov, G. A. Blair &
    M. Woodley, Phys. Rev. ST Accel. Beams 10, 112801 (2007)).

    Parameters
    ----------
    sigma_x_m, sigma_y_m, sigma_u_m : float
        rms sizes from the x, y and u wires, metres.
    wire_angle_rad : float
        Angle of the u wire's normal from +x toward +y.
    errors : (float, float, float), optional
        Independent standard errors of ``sigma_x_m``, ``sigma_y_m``, ``sigma_u_m``;
        propagated linearly.  Without it the error is 0.

    Returns
    -------
    CouplingResult

    Examples
    --------
    >>> r = sigma_xy_from_u(100.0, 50.0, 93.5414346693, math.radians(45.0))
    >>> round(r.sigma_xy_m2, 4), round(r.correlation, 6)
    (2500.0, 0.5)
    """
    s2t = math.sin(2.0 * wire_angle_rad)
    if abs(s2t) < 1e-6:
        raise InputError(
            f"wire_angle_rad: {wire_angle_rad!r} gives no x-y information (expected an angle away from 0 and 90 degrees)"
        )
    c2, s2 = math.cos(wire_angle_rad) ** 2, math.sin(wire_angle_rad) ** 2
    sxy = (sigma_u_m**2 - sigma_x_m**2 * c2 - sigma_y_m**2 * s2) / s2t
    err = 0.0
    if errors is not None:
        ex, ey, eu = (float(e) for e in errors)
        # partial derivatives of sxy with respect to sigma_x, sigma_y, sigma_u
        err = math.hypot(2 * sigma_x_m * c2 * ex, 2 * sigma_y_m * s2 * ey, 2 * sigma_u_m * eu) / abs(s2t)
    rho = sxy / (sigma_x_m * sigma_y_m) if sigma_x_m > 0 and sigma_y_m > 0 else math.nan
    tilt = 0.5 * math.atan2(2.0 * sxy, sigma_x_m**2 - sigma_y_m**2)
    flags: tuple[str, ...] = ()
    message = ""
    if not (abs(rho) < 1.0):
        flags = ("unphysical",)
        message = f"the three sizes imply a correlation of {rho:.3g}, outside (-1, 1)"
    return CouplingResult(sxy, err, rho, tilt, flags, message)


# ---------------------------------------------------------------------------
# Least-squares core
# ---------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class LeastSquaresFit:
    """Outcome of :func:`least_squares_fit`.

    ``covariance`` is ``(J^T W J)^-1``, multiplied by ``chi2_red`` when the weights
    are relative; ``std_err`` its square-rooted diagonal.
    """

    params: np.ndarray
    covariance: np.ndarray
    std_err: np.ndarray
    chi2: float
    dof: int
    chi2_red: float
    success: bool
    message: str
    nfev: int


def covariance_from_jacobian(jac: np.ndarray) -> np.ndarray:
    """``(J^T J)^-1`` from the weighted Jacobian by SVD; inf where it is singular."""
    _, s, vt = np.linalg.svd(jac, full_matrices=False)
    tol = np.finfo(float).eps * max(jac.shape) * (s[0] if s.size else 0.0)
    if s.size == 0 or np.any(s <= tol):
        return np.full((jac.shape[1], jac.shape[1]), np.inf)
    return (vt.T / s**2) @ vt


def least_squares_fit(
    model: Callable[[np.ndarray, np.ndarray], np.ndarray],
    jacobian: Callable[[np.ndarray, np.ndarray], np.ndarray] | None,
    x: np.ndarray,
    y: np.ndarray,
    p0: Sequence[float],
    *,
    weights: np.ndarray | None = None,
    absolute_weights: bool = False,
    bounds: tuple[Sequence[float], Sequence[float]] | None = None,
) -> LeastSquaresFit:
    """Weighted nonlinear least squares, the core every profile fit uses.

    Minimises ``sum w (model(x, p) - y)^2`` with MINPACK's Levenberg-Marquardt
    (:func:`scipy.optimize.least_squares`, ``method="lm"``; J. J. More, "The
    Levenberg-Marquardt algorithm: implementation and theory", Lecture Notes in
    Mathematics 630, 1978), or the trust-region reflective method when ``bounds``
    are given.

    Parameters
    ----------
    model : callable ``model(x, p) -> y``
    jacobian : callable ``jacobian(x, p) -> (n_points, n_params)`` or None
        Analytic Jacobian; ``None`` uses three-point finite differences.
    x, y : ndarray, shape (n_points,)
    p0 : sequence of float
        Starting values.
    weights : ndarray, optional
        ``1 / variance`` per point (absolute) or proportional to it (relative).
    absolute_weights : bool
        If False (default), the covariance is scaled by the reduced chi-square.
    bounds : (lower, upper), optional

    Returns
    -------
    LeastSquaresFit
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    p0 = np.asarray(p0, dtype=float)
    sw = np.ones_like(y) if weights is None else np.sqrt(np.asarray(weights, dtype=float))

    def fun(p):
        return sw * (model(x, p) - y)

    if jacobian is None:
        jac = "3-point"
    else:

        def jac(p):
            return sw[:, None] * jacobian(x, p)

    n, k = y.size, p0.size
    dof = n - k
    try:
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            if bounds is None:
                sol = optimize.least_squares(fun, p0, jac=jac, method="lm", xtol=1e-15, ftol=1e-15, gtol=1e-15, max_nfev=2000 * (k + 1))
            else:
                sol = optimize.least_squares(fun, p0, jac=jac, method="trf", bounds=bounds, x_scale="jac", xtol=1e-14, ftol=1e-14, gtol=1e-14, max_nfev=500 * (k + 1))
    except (ValueError, np.linalg.LinAlgError) as exc:
        nan = np.full(k, np.nan)
        return LeastSquaresFit(nan, np.full((k, k), np.nan), nan, math.nan, dof, math.nan, False, f"optimiser error: {exc}", 0)
    chi2 = float(np.sum(sol.fun**2))
    chi2_red = chi2 / dof if dof > 0 else math.nan
    cov = covariance_from_jacobian(sol.jac)
    if not absolute_weights:
        with np.errstate(invalid="ignore"):  # inf * 0 for a singular, perfect fit
            cov = cov * chi2_red
    ok = bool(sol.success) and bool(np.all(np.isfinite(sol.x))) and sol.status > 0
    return LeastSquaresFit(
        sol.x, cov, np.sqrt(np.diag(cov)), chi2, dof, chi2_red, ok, str(sol.message), int(sol.nfev)
    )


def levenberg_marquardt_batch(
    residual_and_jacobian: Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]],
    p0: np.ndarray,
    *,
    max_iter: int = 200,
    xtol: float = 1e-12,
    ftol: float = 1e-15,
    initial_damping: float = 1.0,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Levenberg-Marquardt over many independent problems at once, in numpy.

    Every problem keeps its own damping ``lambda`` (Marquardt's scaling by
    ``diag(J^T J)``; D. W. Marquardt, J. SIAM 11, 431 (1963)); the normal
    equations of all still-active problems are solved together with a stacked
    :func:`numpy.linalg.solve`, and a problem leaves the active set once its step
    or its cost reduction falls below the tolerance.

    Parameters
    ----------
    residual_and_jacobian : callable ``f(params, rows) -> (r, J)``
        For the problems ``rows`` (int index array) and their ``params``
        (``(len(rows), k)``), the weighted residuals ``(len(rows), m)`` and
        Jacobian ``(len(rows), m, k)``.
    p0 : ndarray, shape (n_problems, k)
    max_iter : int
    xtol, ftol : float
        Relative step and relative cost-reduction tolerances.
    initial_damping : float
        Starting ``lambda``.  The cautious default 1 (a step about half the
        Gauss-Newton one) keeps far starts from sliding into a flat region, as
        NIST's Eckerle4 start 1 otherwise does; with good start values 1e-2
        saves an iteration or two.

    Returns
    -------
    params : ndarray (n_problems, k)
    converged : ndarray of bool (n_problems,)
    cost : ndarray (n_problems,), the final sum of squared residuals.
    """
    p = np.array(p0, dtype=float, copy=True)
    n, k = p.shape
    rows = np.arange(n)
    r, jac = residual_and_jacobian(p, rows)
    cost = np.einsum("ij,ij->i", r, r)
    lam = np.full(n, float(initial_damping))
    converged = np.zeros(n, dtype=bool)
    active = np.isfinite(cost)
    eye = np.eye(k)
    for _ in range(max_iter):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        ja, ra = jac[idx], r[idx]
        jtj = np.matmul(ja.transpose(0, 2, 1), ja)
        g = np.matmul(ja.transpose(0, 2, 1), ra[:, :, None])[:, :, 0]
        diag = np.maximum(np.diagonal(jtj, axis1=1, axis2=2), 1e-300)
        a = jtj + lam[idx, None, None] * diag[:, :, None] * eye
        try:
            step = -np.linalg.solve(a, g[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError:
            step = np.stack([-np.linalg.lstsq(ai, gi, rcond=None)[0] for ai, gi in zip(a, g, strict=True)])
        p_new = p[idx] + step
        with np.errstate(over="ignore", invalid="ignore"):
            r_new, j_new = residual_and_jacobian(p_new, idx)
            cost_new = np.einsum("ij,ij->i", r_new, r_new)
        better = np.isfinite(cost_new) & (cost_new <= cost[idx])
        small_step = np.all(np.abs(step) <= xtol * (np.abs(p[idx]) + xtol), axis=1)
        small_gain = (cost[idx] - cost_new) <= ftol * cost[idx]
        acc = idx[better]
        p[acc], r[acc], jac[acc] = p_new[better], r_new[better], j_new[better]
        done = better & (small_step | small_gain)
        # a rejected step that is already negligibly small also ends the search
        done |= ~better & small_step
        cost[acc] = cost_new[better]
        lam[acc] = np.maximum(lam[acc] / 10.0, 1e-15)
        rej = idx[~better]
        lam[rej] *= 10.0
        stuck = rej[lam[rej] > 1e16]
        converged[idx[done]] = True
        active[idx[done]] = False
        active[stuck] = False
        converged[stuck] = True  # no further descent possible: a (local) minimum
    return p, converged, cost


# ---------------------------------------------------------------------------
# Gaussian + baseline
# ---------------------------------------------------------------------------


def _check_baseline(baseline: str) -> int:
    if baseline not in BASELINES:
        raise InputError(f"baseline: expected one of {BASELINES}, got {baseline!r}")
    return 2 if baseline == "linear" else 1


def _gauss_model(n_base: int):
    """Model and Jacobian in scaled coordinates: params (A, mu, s, b0[, b1])."""

    def model(t, p):
        z = (t - p[1]) / p[2]
        f = p[0] * np.exp(-0.5 * z * z) + p[3]
        return f + p[4] * t if n_base == 2 else f

    def jacobian(t, p):
        z = (t - p[1]) / p[2]
        g = np.exp(-0.5 * z * z)
        cols = [g, p[0] * g * z / p[2], p[0] * g * z * z / p[2], np.ones_like(t)]
        if n_base == 2:
            cols.append(t)
        return np.stack(cols, axis=-1)

    return model, jacobian


@dataclass(frozen=True, eq=False)
class GaussianFit:
    """A Gaussian-plus-baseline fit in physical units.

    ``params`` are ``(amplitude, centroid_m, sigma_m, c0, c1_per_m)`` (``c1`` only
    for a linear baseline) with the baseline ``c0 + c1 (x - x_ref_m)``;
    ``covariance`` is theirs.  ``success`` is False with a ``message`` when the
    optimiser failed or the answer is unphysical.
    """

    amplitude: float
    amplitude_err: float
    centroid_m: float
    centroid_err_m: float
    sigma_m: float
    sigma_err_m: float
    baseline_c0: float
    baseline_slope_per_m: float
    x_ref_m: float
    params: np.ndarray
    covariance: np.ndarray
    param_names: tuple[str, ...]
    chi2: float
    dof: int
    chi2_red: float
    residual_rms: float
    success: bool
    message: str = ""

    def baseline_at(self, position_m):
        """Baseline value at ``position_m``."""
        return self.baseline_c0 + self.baseline_slope_per_m * (np.asarray(position_m) - self.x_ref_m)


def _as_profile(position_m, signal) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(position_m, dtype=float).ravel()
    y = np.asarray(signal, dtype=float).ravel()
    if x.size != y.size:
        raise InputError(f"position_m and signal differ in length ({x.size} vs {y.size})")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise InputError("position_m/signal: expected finite numbers, found NaN or inf")
    if x.size < 3:
        raise InputError(f"position_m/signal: expected at least 3 points, got {x.size}")
    if np.any(np.diff(x) <= 0):
        order = np.argsort(x, kind="stable")
        x, y = x[order], y[order]
        if np.any(np.diff(x) == 0):
            raise InputError("position_m: expected distinct positions, found repeated values")
    return x, y


def _scales(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Centre, half-range of x and signal scale per row (rows = profiles)."""
    x_ref = 0.5 * (x[..., 0] + x[..., -1])
    h = 0.5 * (x[..., -1] - x[..., 0])
    s = np.ptp(y, axis=-1)
    s = np.where(s > 0, s, 1.0)
    return x_ref, h, s


def _spacing(x: np.ndarray) -> np.ndarray:
    """Local point spacing (trapezoid weights) along the last axis."""
    return np.gradient(x, axis=-1)


def start_values(t: np.ndarray, y: np.ndarray, *, baseline: str = "linear") -> np.ndarray:
    """Model-free starting values for (A, mu, sigma, b0[, b1]), row by row.

    Baseline: median of the outer ``EDGE_FRACTION`` of the points on each side
    (the slope joins the two for a linear baseline).  Amplitude: maximum above
    it.  Centre: centroid of the points above half maximum; sigma: the width of
    that region over ``FWHM_PER_SIGMA`` (METHODS.md 3.1).

    Parameters
    ----------
    t, y : ndarray, shape (n_profiles, n_points) or (n_points,)
    """
    n_base = _check_baseline(baseline)
    t2, y2 = np.atleast_2d(t), np.atleast_2d(y)
    t2 = np.broadcast_to(t2, y2.shape)
    m = y2.shape[1]
    ne = max(2, int(round(EDGE_FRACTION * m)))
    yl, yr = np.median(y2[:, :ne], axis=1), np.median(y2[:, -ne:], axis=1)
    tl, tr = t2[:, :ne].mean(axis=1), t2[:, -ne:].mean(axis=1)
    if n_base == 2:
        b1 = (yr - yl) / (tr - tl)
        b0 = yl - b1 * tl
    else:
        b1 = np.zeros(len(y2))
        b0 = 0.5 * (yl + yr)
    yb = y2 - (b0[:, None] + b1[:, None] * t2)
    amp = yb.max(axis=1)
    above = yb > 0.5 * amp[:, None]
    wy = np.where(above, yb, 0.0)
    mu = (wy * t2).sum(axis=1) / np.maximum(wy.sum(axis=1), 1e-300)
    width = np.where(above, _spacing(t2), 0.0).sum(axis=1)
    sig = np.maximum(width / FWHM_PER_SIGMA, 0.5 * np.abs(np.diff(t2, axis=1)).min(axis=1))
    cols = [amp, mu, sig, b0] + ([b1] if n_base == 2 else [])
    p = np.stack(cols, axis=1)
    return p[0] if np.ndim(y) == 1 else p


def _physical_gaussian(x, y, x_ref, h, s, p_int, cov_int, n_base, chi2, dof, chi2_red, ok, message):
    """Map a scaled-coordinate Gaussian solution back to metres and signal units."""
    t_scale = np.array([s, h, h, s] + ([s / h] if n_base == 2 else []))
    params = p_int * t_scale
    params[1] += x_ref
    params[2] = abs(params[2])
    cov = cov_int * np.outer(t_scale, t_scale)
    err = np.sqrt(np.abs(np.diag(cov)))
    names = ("amplitude", "centroid_m", "sigma_m", "c0") + (("c1_per_m",) if n_base == 2 else ())
    slope = params[4] if n_base == 2 else 0.0
    resid_rms = math.sqrt(chi2 * s * s / dof) if dof > 0 and math.isfinite(chi2) else math.nan
    amp, mu, sig = params[0], params[1], params[2]
    reason = message
    if ok:
        span = x[-1] - x[0]
        if not np.all(np.isfinite(params)):
            ok, reason = False, "non-finite parameters"
        elif amp <= 0:
            ok, reason = False, f"fitted amplitude {amp:.3g} is not positive"
        elif not (x[0] <= mu <= x[-1]):
            ok, reason = False, f"fitted centre {mu:.4g} m lies outside the scan [{x[0]:.4g}, {x[-1]:.4g}] m"
        elif sig > span:
            ok, reason = False, f"fitted sigma {sig:.3g} m is wider than the scan ({span:.3g} m)"
        elif sig < 0.1 * np.min(np.diff(x)):
            ok, reason = False, f"fitted sigma {sig:.3g} m is far below the point spacing"
        elif not np.all(np.isfinite(err)):
            ok, reason = False, "parameter covariance is singular"
    return GaussianFit(
        amplitude=float(amp),
        amplitude_err=float(err[0]),
        centroid_m=float(mu),
        centroid_err_m=float(err[1]),
        sigma_m=float(sig),
        sigma_err_m=float(err[2]),
        baseline_c0=float(params[3]),
        baseline_slope_per_m=float(slope),
        x_ref_m=float(x_ref),
        params=params,
        covariance=cov,
        param_names=names,
        chi2=float(chi2 * s * s),
        dof=int(dof),
        chi2_red=float(chi2_red * s * s) if math.isfinite(chi2_red) else math.nan,
        residual_rms=resid_rms,
        success=bool(ok),
        message="" if ok else reason,
    )


def fit_gaussian(
    position_m,
    signal,
    *,
    baseline: str = "linear",
    weights=None,
    p0: Sequence[float] | None = None,
    absolute_weights: bool = False,
) -> GaussianFit:
    """Fit a Gaussian on a constant or linear baseline to one profile.

    Parameters
    ----------
    position_m : array_like, shape (n_points,)
        Positions, metres (sorted if needed).
    signal : array_like, shape (n_points,)
    baseline : {"constant", "linear"}
    weights : array_like, optional
        ``1 / variance`` per point, or relative weights (see ``absolute_weights``).
    p0 : sequence, optional
        Starting ``(amplitude, centroid_m, sigma_m, c0[, c1_per_m])`` with the
        baseline measured from the scan centre; default :func:`start_values`.
    absolute_weights : bool
        True when ``weights`` are true inverse variances; otherwise the
        covariance is scaled by the reduced chi-square.

    Returns
    -------
    GaussianFit
        The fitted parameters in metres, their covariance, chi-square and a
        ``success`` flag with the reason when it failed.

    Examples
    --------
    >>> x = np.linspace(-1e-3, 1e-3, 201)
    >>> fit = fit_gaussian(x, 5 * np.exp(-0.5 * (x / 2e-4) ** 2) + 1.0)
    >>> round(fit.sigma_m * 1e6, 6), fit.success
    (200.0, True)
    """
    n_base = _check_baseline(baseline)
    x, y = _as_profile(position_m, signal)
    k = 3 + n_base
    if x.size < k + 2:
        nan = np.full(k, np.nan)
        return _physical_gaussian(x, y, 0.0, 1.0, 1.0, nan, np.full((k, k), np.nan), n_base, math.nan, x.size - k, math.nan, False, f"{x.size} points, the model needs at least {k + 2}")
    x_ref, h, s = _scales(x, y)
    t = (x - x_ref) / h
    if p0 is None:
        p_start = start_values(t, y / s, baseline=baseline)
    else:
        q = np.asarray(p0, dtype=float)
        if q.size != k:
            raise InputError(f"p0: expected {k} starting values, got {q.size}")
        p_start = np.array([q[0] / s, (q[1] - x_ref) / h, q[2] / h, q[3] / s] + ([q[4] * h / s] if n_base == 2 else []))
    w = None
    if weights is not None:
        w = np.asarray(weights, dtype=float).ravel()
        if w.size != x.size or np.any(~np.isfinite(w)) or np.any(w < 0):
            raise InputError("weights: expected one finite non-negative weight per point")
    model, jac = _gauss_model(n_base)
    # the data are scaled by s, so absolute weights become w * s^2
    fit = least_squares_fit(model, jac, t, y / s, p_start, weights=None if w is None else w * s * s, absolute_weights=absolute_weights)
    return _physical_gaussian(x, y, x_ref, h, s, fit.params, fit.covariance, n_base, fit.chi2, fit.dof, fit.chi2_red, fit.success, fit.message)


# ---------------------------------------------------------------------------
# Model-free rms with the iterated window
# ---------------------------------------------------------------------------


def window_moments(
    position_m: np.ndarray,
    signal: np.ndarray,
    *,
    n_sigma: float = 4.0,
    centroid0_m=None,
    sigma0_m=None,
    max_iter: int = 100,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Centroid and rms inside an iterated ``centroid +- n_sigma * rms`` window.

    The signal must already be baseline-subtracted (negative values are kept).
    Each point carries its local spacing as a weight.  Works row by row on
    ``(n_profiles, n_points)`` arrays.

    Parameters
    ----------
    position_m, signal : ndarray, shape (n_points,) or (n_profiles, n_points)
    n_sigma : float
        Window half-width in units of the current rms.
    centroid0_m, sigma0_m : array_like, optional
        Starting centre and width; default the whole-range moments.
    max_iter : int

    Returns
    -------
    centroid_m, rms_m, rms_err_unit, n_used : ndarray, shape (n_profiles,)
        ``rms_err_unit`` is the rms standard error per unit point noise
        (multiply by the noise rms of one point); NaN where no positive signal is
        inside the window.
    """
    y = np.atleast_2d(np.asarray(signal, dtype=float))
    x = np.broadcast_to(np.atleast_2d(np.asarray(position_m, dtype=float)), y.shape)
    w = _spacing(x)
    if centroid0_m is None or sigma0_m is None:
        wy = w * y
        tot = wy.sum(1)
        mu = (wy * x).sum(1) / tot
        sig = np.sqrt(np.abs((wy * (x - mu[:, None]) ** 2).sum(1) / tot))
    else:
        mu = np.broadcast_to(np.asarray(centroid0_m, dtype=float), (len(y),)).copy()
        sig = np.broadcast_to(np.asarray(sigma0_m, dtype=float), (len(y),)).copy()
    mask = np.zeros(y.shape, dtype=bool)
    todo = np.isfinite(mu) & np.isfinite(sig) & (sig > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        for _ in range(max_iter):
            if not todo.any():
                break
            idx = np.flatnonzero(todo)
            new = np.abs(x[idx] - mu[idx, None]) <= n_sigma * sig[idx, None]
            same = np.all(new == mask[idx], axis=1)
            mask[idx] = new
            wy = np.where(new, w[idx] * y[idx], 0.0)
            tot = wy.sum(1)
            m = (wy * x[idx]).sum(1) / tot
            var = (wy * (x[idx] - m[:, None]) ** 2).sum(1) / tot
            good = (tot > 0) & (var > 0)
            mu[idx] = np.where(good, m, np.nan)
            sig[idx] = np.where(good, np.sqrt(np.where(good, var, 1.0)), np.nan)
            todo[idx] = good & ~same
        wm = np.where(mask, w, 0.0)
        tot = (wm * y).sum(1)
        d2 = (x - mu[:, None]) ** 2
        # d(rms^2)/dy_i = w_i (d_i^2 - rms^2) / tot; rms_err = |grad| / (2 rms) per unit noise
        grad = wm * (d2 - sig[:, None] ** 2) / tot[:, None]
        err_unit = np.sqrt((grad**2).sum(1)) / (2.0 * sig)
    return mu, sig, err_unit, mask.sum(1)


def _fwhm_from_data(x: np.ndarray, yb: np.ndarray) -> float:
    """FWHM by linear interpolation of the outermost half-maximum crossings."""
    i = int(np.argmax(yb))
    half = 0.5 * yb[i]
    if not half > 0:
        return math.nan
    left = np.flatnonzero(yb[:i] < half)
    right = np.flatnonzero(yb[i:] < half)
    if left.size == 0 or right.size == 0:
        return math.nan
    a = left[-1]
    b = i + right[0]
    xl = x[a] + (half - yb[a]) * (x[a + 1] - x[a]) / (yb[a + 1] - yb[a])
    xr = x[b - 1] + (half - yb[b - 1]) * (x[b] - x[b - 1]) / (yb[b] - yb[b - 1])
    return float(xr - xl)


# ---------------------------------------------------------------------------
# The result and its assembly
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class ProfileResult:
    """Analysis of one profile (all lengths in metres, signal in input units).

    Attributes
    ----------
    centroid_m, centroid_err_m : float
        Fitted centre and its standard error.
    sigma_m, sigma_err_m : float
        Fitted rms size of the model (the Gaussian sigma for ``gaussian``).
    rms_m, rms_err_m : float
        Model-free rms inside the iterated window (see module docstring) and its
        standard error from the point noise.
    rms_centroid_m : float
        Centroid of that window.
    fwhm_m : float
        FWHM of the fitted model (of the data when the fit failed).
    amplitude, amplitude_err : float
        Peak height above the baseline.
    baseline, baseline_slope_per_m : float
        Baseline at the centroid and its slope (0 for a constant baseline).
    chi2_red : float
        Reduced chi-square (with unit weights, the residual variance).
    snr : float
        Amplitude over the rms residual of the Gaussian fit.
    n_points : int
    model : str
        One of :data:`PROFILE_MODELS`.
    flags, message
        Quality flags and what they mean for this profile.
    window_n_sigma : float
        The rms window half-width used, in units of the rms.
    core_sigma_m, halo_sigma_m, halo_fraction, halo_fraction_err : float
        ``halo`` model only (NaN otherwise).
    order, order_err, width_m : float
        ``super_gaussian`` model only: the exponent p and the width w.
    gaussian_sigma_m : float
        Sigma of the Gaussian fit, whatever the model (used for ``non_gaussian``).
    """

    centroid_m: float
    centroid_err_m: float
    sigma_m: float
    sigma_err_m: float
    rms_m: float
    rms_err_m: float
    rms_centroid_m: float
    fwhm_m: float
    amplitude: float
    amplitude_err: float
    baseline: float
    baseline_slope_per_m: float
    chi2_red: float
    snr: float
    n_points: int
    model: str
    flags: tuple[str, ...] = ()
    message: str = ""
    window_n_sigma: float = 4.0
    core_sigma_m: float = math.nan
    halo_sigma_m: float = math.nan
    halo_fraction: float = math.nan
    halo_fraction_err: float = math.nan
    order: float = math.nan
    order_err: float = math.nan
    width_m: float = math.nan
    gaussian_sigma_m: float = math.nan

    @property
    def ok(self) -> bool:
        """True when no flag is set."""
        return not self.flags


@dataclass
class _Shape:
    """Fitted model values in physical units (internal)."""

    centroid: float = math.nan
    centroid_err: float = math.nan
    sigma: float = math.nan
    sigma_err: float = math.nan
    amplitude: float = math.nan
    amplitude_err: float = math.nan
    c0: float = math.nan
    slope: float = 0.0
    x_ref: float = 0.0
    chi2_red: float = math.nan
    fwhm: float = math.nan
    ok: bool = False
    message: str = ""
    extras: dict = field(default_factory=dict)

    def excess(self, x: np.ndarray, model: str) -> np.ndarray:
        """Model minus baseline at ``x``."""
        e = self.extras
        z = x - self.centroid
        if model == "halo":
            return e["a1"] * np.exp(-0.5 * (z / e["s1"]) ** 2) + e["a2"] * np.exp(-0.5 * (z / e["s2"]) ** 2)
        if model == "super_gaussian":
            return self.amplitude * np.exp(-0.5 * np.abs(z / e["w"]) ** e["p"])
        return self.amplitude * np.exp(-0.5 * (z / self.sigma) ** 2)


def _shape_from_gaussian(fit: GaussianFit) -> _Shape:
    return _Shape(
        fit.centroid_m, fit.centroid_err_m, fit.sigma_m, fit.sigma_err_m, fit.amplitude, fit.amplitude_err,
        fit.baseline_c0, fit.baseline_slope_per_m, fit.x_ref_m, fit.chi2_red,
        FWHM_PER_SIGMA * fit.sigma_m, fit.success, fit.message,
    )


def _assemble(
    x: np.ndarray,
    y: np.ndarray,
    gauss: GaussianFit,
    shape: _Shape,
    model: str,
    baseline: str,
    window_n_sigma: float,
    snr_min: float,
    win: tuple[float, float, float, int] | None = None,
) -> ProfileResult:
    """Combine the fits, the rms window and the quality checks into a result."""
    flags: list[str] = []
    notes: list[str] = []
    n = x.size
    n_base = 2 if baseline == "linear" else 1
    if not gauss.success and "needs at least" in gauss.message:
        flags.append("too_few_points")
    # baseline for the rms: the fitted one, else the model-free edge estimate
    if shape.ok:
        base = shape.c0 + shape.slope * (x - shape.x_ref)
    else:
        x_ref, h, s = _scales(x, y)
        if n >= 4:
            p = start_values((x - x_ref) / h, y, baseline=baseline)
            base = p[3] + (p[4] * (x - x_ref) / h if n_base == 2 else 0.0)
        else:
            base = np.full(n, float(np.min(y)))
    yb = y - base
    if win is None:
        if n >= 3:
            x_ref, h, s = _scales(x, y)
            p = start_values((x - x_ref) / h, yb, baseline="constant") if n >= 4 else None
            if p is not None:
                c0, s0 = x_ref + h * p[1], h * p[2]
            else:
                c0 = s0 = None
            mu_w, rms_w, err_unit, _ = window_moments(x, yb, n_sigma=window_n_sigma, centroid0_m=c0, sigma0_m=s0)
            win = (float(mu_w[0]), float(rms_w[0]), float(err_unit[0]), 0)
        else:
            win = (math.nan, math.nan, math.nan, 0)
    rms_centroid, rms, err_unit = win[0], win[1], win[2]
    # noise per point: rms residual of the Gaussian fit, else the scatter of the edges
    if gauss.success:
        noise = gauss.residual_rms
    else:
        ne = max(2, int(round(EDGE_FRACTION * n)))
        edges = np.concatenate([yb[:ne], yb[-ne:]])
        noise = float(1.4826 * np.median(np.abs(edges - np.median(edges)))) if n >= 4 else math.nan
    rms_err = err_unit * noise
    amp_for_snr = gauss.amplitude if gauss.success else float(np.max(yb)) if n else math.nan
    snr = amp_for_snr / noise if noise > 0 else (math.inf if amp_for_snr > 0 else math.nan)

    if not shape.ok:
        flags.append("fit_failed")
        notes.append(f"fit failed: {shape.message}")
    if math.isfinite(snr) and snr < snr_min:
        flags.append("low_signal")
        notes.append(f"signal-to-noise {snr:.3g} below {snr_min:g}")
    if not math.isfinite(rms):
        notes.append("no positive signal inside the rms window")
    # clipping: centre near an end, or the peak not back to baseline at an end
    if shape.ok:
        c, sg = shape.centroid, shape.sigma
    else:
        c, sg = rms_centroid, rms
    if math.isfinite(c) and math.isfinite(sg):
        room = min(c - x[0], x[-1] - c)
        why = ""
        if room < CLIP_EDGE_N_SIGMA * sg:
            why = f"centre {room / sg:.2g} sigma from the scan end"
        elif shape.ok:
            ex = shape.excess(np.array([x[0], x[-1]]), model)
            if np.max(ex) > EDGE_EXCESS_FRACTION * shape.amplitude:
                side = "low" if ex[0] >= ex[1] else "high"
                why = f"baseline not reached on the {side}-position side"
        if why:
            flags.append("clipped")
            notes.append(f"clipped: {why}")
    # non-Gaussian: Gaussian sigma against the window-corrected rms
    if gauss.success and math.isfinite(rms) and window_n_sigma > math.sqrt(3.0):
        rms_c = rms / iterated_window_rms_factor(window_n_sigma)
        diff = abs(gauss.sigma_m - rms_c)
        comb = math.hypot(gauss.sigma_err_m, rms_err if math.isfinite(rms_err) else 0.0)
        if diff > NON_GAUSSIAN_THRESHOLD * gauss.sigma_m and diff > 3.0 * comb:
            flags.append("non_gaussian")
            notes.append(f"non-Gaussian: Gaussian sigma {gauss.sigma_m:.4g} m vs rms {rms_c:.4g} m")

    ok = shape.ok
    nan = math.nan
    fwhm = shape.fwhm if ok else _fwhm_from_data(x, yb)
    base_c = shape.c0 + shape.slope * (shape.centroid - shape.x_ref) if ok else nan
    e = shape.extras if ok else {}
    return ProfileResult(
        centroid_m=shape.centroid if ok else nan,
        centroid_err_m=shape.centroid_err if ok else nan,
        sigma_m=shape.sigma if ok else nan,
        sigma_err_m=shape.sigma_err if ok else nan,
        rms_m=rms,
        rms_err_m=rms_err,
        rms_centroid_m=rms_centroid,
        fwhm_m=fwhm,
        amplitude=shape.amplitude if ok else nan,
        amplitude_err=shape.amplitude_err if ok else nan,
        baseline=base_c,
        baseline_slope_per_m=shape.slope if ok else nan,
        chi2_red=shape.chi2_red if ok else nan,
        snr=float(snr),
        n_points=int(n),
        model=model,
        flags=merge_flags(flags),
        message="; ".join(notes),
        window_n_sigma=float(window_n_sigma),
        core_sigma_m=e.get("s1", nan),
        halo_sigma_m=e.get("s2", nan),
        halo_fraction=e.get("halo_fraction", nan),
        halo_fraction_err=e.get("halo_fraction_err", nan),
        order=e.get("p", nan),
        order_err=e.get("p_err", nan),
        width_m=e.get("w", nan),
        gaussian_sigma_m=gauss.sigma_m if gauss.success else nan,
    )


def _propagate(fn: Callable[[np.ndarray], float], p: np.ndarray, cov: np.ndarray) -> float:
    """Standard error of ``fn(p)`` by linear propagation with a central-difference gradient."""
    grad = np.empty(p.size)
    for i in range(p.size):
        d = 1e-6 * max(abs(p[i]), 1e-12)
        hi, lo = p.copy(), p.copy()
        hi[i] += d
        lo[i] -= d
        grad[i] = (fn(hi) - fn(lo)) / (2 * d)
    return float(math.sqrt(max(grad @ cov @ grad, 0.0)))


def _fit_shape(x: np.ndarray, y: np.ndarray, gauss: GaussianFit, model: str, baseline: str, weights) -> _Shape:
    """Fit the halo or super-Gaussian model, starting from the Gaussian fit."""
    n_base = 2 if baseline == "linear" else 1
    x_ref, h, s = _scales(x, y)
    t, yn = (x - x_ref) / h, y / s
    g_amp, g_mu, g_sig = gauss.amplitude / s, (gauss.centroid_m - x_ref) / h, gauss.sigma_m / h
    b0 = gauss.baseline_at(x_ref) / s
    b1 = gauss.baseline_slope_per_m * h / s
    base_p = [b0] + ([b1] if n_base == 2 else [])
    base_lo = [-np.inf] * n_base
    base_hi = [np.inf] * n_base
    span = t[-1] - t[0]
    dt = float(np.min(np.diff(t)))

    def base(t_, p):
        return p[0] + (p[1] * t_ if n_base == 2 else 0.0)

    if model == "halo":
        if x.size < 5 + n_base + 2:
            return _Shape(message=f"{x.size} points, the halo model needs at least {7 + n_base}")

        def fmodel(t_, p):
            z = t_ - p[1]
            return p[0] * np.exp(-0.5 * (z / p[2]) ** 2) + p[3] * np.exp(-0.5 * (z / p[4]) ** 2) + base(t_, p[5:])

        p0 = [0.8 * g_amp, g_mu, 0.8 * g_sig, 0.2 * g_amp, 2.5 * g_sig] + base_p
        lo = [0.0, t[0], 0.1 * dt, 0.0, 0.1 * dt] + base_lo
        hi = [np.inf, t[-1], 2 * span, np.inf, 4 * span] + base_hi
    else:
        if x.size < 4 + n_base + 2:
            return _Shape(message=f"{x.size} points, the super-Gaussian model needs at least {6 + n_base}")

        def fmodel(t_, p):
            return p[0] * np.exp(-0.5 * np.abs((t_ - p[1]) / p[2]) ** p[3]) + base(t_, p[4:])

        p0 = [g_amp, g_mu, g_sig, 2.0] + base_p
        lo = [0.0, t[0], 0.1 * dt, 0.5] + base_lo
        hi = [np.inf, t[-1], 2 * span, 50.0] + base_hi
    p0 = np.clip(p0, np.nextafter(lo, 1), np.nextafter(hi, -1))
    w = None if weights is None else np.asarray(weights, dtype=float) * s * s
    fit = least_squares_fit(fmodel, None, t, yn, p0, weights=w, bounds=(lo, hi))
    p, cov = fit.params, fit.covariance
    sh = _Shape(x_ref=x_ref, chi2_red=fit.chi2_red * s * s, ok=fit.success, message=fit.message)
    if not fit.success:
        return sh
    if not np.all(np.isfinite(fit.std_err)):
        sh.ok, sh.message = False, "parameter covariance is singular"
        return sh
    sh.centroid, sh.centroid_err = x_ref + h * p[1], h * fit.std_err[1]
    k0 = 5 if model == "halo" else 4
    sh.c0 = s * p[k0]
    sh.slope = s * p[k0 + 1] / h if n_base == 2 else 0.0
    if model == "halo":
        if p[2] > p[4]:  # keep the narrower Gaussian as the core
            order = [3, 1, 4, 0, 2] + list(range(5, p.size))
            p, cov = p[order], cov[np.ix_(order, order)]

        def rms_fn(q):
            return halo_rms(q[0], q[2], q[3], q[4])[0]

        def frac_fn(q):
            return halo_rms(q[0], q[2], q[3], q[4])[1]

        rms_t, frac = halo_rms(p[0], p[2], p[3], p[4])
        sh.sigma, sh.sigma_err = h * rms_t, h * _propagate(rms_fn, p, cov)
        sh.amplitude = s * (p[0] + p[3])
        sh.amplitude_err = s * math.sqrt(max(cov[0, 0] + cov[3, 3] + 2 * cov[0, 3], 0.0))
        a1, s1, a2, s2 = s * p[0], h * p[2], s * p[3], h * p[4]
        sh.extras = {"a1": a1, "s1": s1, "a2": a2, "s2": s2, "halo_fraction": frac, "halo_fraction_err": _propagate(frac_fn, p, cov)}
        # FWHM of the two-Gaussian sum: solve model(mu + r) = half peak
        peak = a1 + a2
        r_hi = 10.0 * s2
        sh.fwhm = 2.0 * optimize.brentq(lambda r: a1 * math.exp(-0.5 * (r / s1) ** 2) + a2 * math.exp(-0.5 * (r / s2) ** 2) - 0.5 * peak, 0.0, r_hi)
    else:

        def rms_fn(q):
            return q[2] * super_gaussian_rms_factor(q[3])

        sh.sigma, sh.sigma_err = h * rms_fn(p), h * _propagate(rms_fn, p, cov)
        sh.amplitude, sh.amplitude_err = s * p[0], s * fit.std_err[0]
        sh.extras = {"w": h * p[2], "p": p[3], "p_err": fit.std_err[3]}
        # exp(-0.5 r^p) = 1/2  at  r = (2 ln 2)^(1/p)
        sh.fwhm = 2.0 * h * p[2] * (2.0 * math.log(2.0)) ** (1.0 / p[3])
    return sh


def analyze_profile(
    position_m,
    signal,
    *,
    model: str = "gaussian",
    baseline: str = "linear",
    window_n_sigma: float = 4.0,
    snr_min: float = DEFAULT_SNR_MIN,
    weights=None,
) -> ProfileResult:
    """Fit, measure and quality-check one profile.

    Parameters
    ----------
    position_m : array_like, shape (n_points,)
        Positions along the measured axis, metres.
    signal : array_like, shape (n_points,)
        Detector signal (any unit, baseline included).
    model : {"gaussian", "halo", "super_gaussian"}
        Shape fitted for ``sigma_m`` (see the module docstring).  A Gaussian fit is
        always made as well, for the starting values and ``non_gaussian``.
    baseline : {"constant", "linear"}
    window_n_sigma : float
        Half-width of the iterated rms window in units of the rms (> sqrt(3)).
    snr_min : float
        Below this signal-to-noise ratio the result is flagged ``low_signal``.
    weights : array_like, optional
        Relative weights per point (the covariance is scaled by chi2_red).

    Returns
    -------
    ProfileResult

    Examples
    --------
    >>> x = np.linspace(-2e-3, 2e-3, 161)
    >>> r = analyze_profile(x, 100 * np.exp(-0.5 * ((x - 1e-4) / 3e-4) ** 2) + 2.0)
    >>> round(r.sigma_m * 1e6, 3), round(r.centroid_m * 1e6, 3), r.flags
    (300.0, 100.0, ())
    """
    if model not in PROFILE_MODELS:
        raise InputError(f"model: expected one of {PROFILE_MODELS}, got {model!r}")
    _check_baseline(baseline)
    if not window_n_sigma > math.sqrt(3.0):
        raise InputError(f"window_n_sigma: expected a number above sqrt(3) = 1.732, got {window_n_sigma!r}")
    x, y = _as_profile(position_m, signal)
    gauss = fit_gaussian(x, y, baseline=baseline, weights=weights)
    if model == "gaussian":
        shape = _shape_from_gaussian(gauss)
    elif gauss.success:
        shape = _fit_shape(x, y, gauss, model, baseline, weights)
    else:
        shape = _Shape(message=f"no Gaussian start for the {model} fit ({gauss.message})")
    return _assemble(x, y, gauss, shape, model, baseline, window_n_sigma, snr_min)


def fit_profiles_batch(
    position_m,
    signals,
    *,
    baseline: str = "linear",
    window_n_sigma: float = 4.0,
    snr_min: float = DEFAULT_SNR_MIN,
) -> list[ProfileResult]:
    """Analyse many profiles with one vectorised Levenberg-Marquardt run.

    Gives the same Gaussian optimum as :func:`analyze_profile` with
    ``model="gaussian"`` (same scaled problem, same start values, same cost), so
    results agree to the fit tolerance (sigma to better than 1e-6 relative).

    Parameters
    ----------
    position_m : array_like, shape (n_points,) or (n_profiles, n_points)
        Shared or per-profile positions, increasing, metres.
    signals : array_like, shape (n_profiles, n_points)
    baseline, window_n_sigma, snr_min
        As for :func:`analyze_profile`.

    Returns
    -------
    list of ProfileResult
    """
    n_base = _check_baseline(baseline)
    if not window_n_sigma > math.sqrt(3.0):
        raise InputError(f"window_n_sigma: expected a number above sqrt(3) = 1.732, got {window_n_sigma!r}")
    y = np.atleast_2d(np.asarray(signals, dtype=float))
    if y.ndim != 2:
        raise InputError(f"signals: expected shape (n_profiles, n_points), got {y.shape}")
    x = np.asarray(position_m, dtype=float)
    if x.ndim == 1:
        x = np.broadcast_to(x, y.shape)
    if x.shape != y.shape:
        raise InputError(f"position_m: expected shape ({y.shape[1]},) or {y.shape}, got {x.shape}")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise InputError("position_m/signals: expected finite numbers, found NaN or inf")
    if np.any(np.diff(x, axis=1) <= 0):
        raise InputError("position_m: expected strictly increasing positions in every row")
    n, m = y.shape
    k = 3 + n_base
    if n == 0:
        return []
    if m < k + 2:
        return [analyze_profile(x[i], y[i], baseline=baseline, window_n_sigma=window_n_sigma, snr_min=snr_min) for i in range(n)]
    x_ref, h, s = _scales(x, y)
    t = (x - x_ref[:, None]) / h[:, None]
    yn = y / s[:, None]
    p0 = start_values(t, yn, baseline=baseline)

    def resjac(p, rows):
        tt, yy = t[rows], yn[rows]
        z = (tt - p[:, 1:2]) / p[:, 2:3]
        g = np.exp(-0.5 * z * z)
        ag = p[:, 0:1] * g
        f = ag + p[:, 3:4]
        jac = np.empty(tt.shape + (k,))
        jac[..., 0] = g
        jac[..., 1] = ag * z / p[:, 2:3]
        jac[..., 2] = jac[..., 1] * z
        jac[..., 3] = 1.0
        if n_base == 2:
            f = f + p[:, 4:5] * tt
            jac[..., 4] = tt
        return f - yy, jac

    p, conv, cost = levenberg_marquardt_batch(resjac, p0)
    r, jac = resjac(p, np.arange(n))
    jtj = np.matmul(jac.transpose(0, 2, 1), jac)
    dof = m - k
    chi2_red = cost / dof
    with np.errstate(invalid="ignore", over="ignore"):
        try:
            cov_all = np.linalg.inv(jtj) * chi2_red[:, None, None]
        except np.linalg.LinAlgError:  # one singular problem spoils the stacked inverse
            cov_all = np.stack([covariance_from_jacobian(j) * c for j, c in zip(jac, chi2_red, strict=True)])

    # model-free rms on the fitted baseline (edge estimate where the fit failed)
    base = p[:, 3:4] + (p[:, 4:5] * t if n_base == 2 else 0.0)
    p_edge = start_values(t, yn, baseline=baseline)
    base_edge = p_edge[:, 3:4] + (p_edge[:, 4:5] * t if n_base == 2 else 0.0)
    fit_ok = conv & np.all(np.isfinite(p), axis=1)
    yb = np.where(fit_ok[:, None], yn - base, yn - base_edge)
    pw = start_values(t, yb, baseline="constant")
    mu_w, rms_w, err_w, _ = window_moments(t, yb, n_sigma=window_n_sigma, centroid0_m=pw[:, 1], sigma0_m=pw[:, 2])

    out = []
    for i in range(n):
        xi, yi = x[i], y[i]
        gauss = _physical_gaussian(
            xi, yi, x_ref[i], h[i], s[i], p[i], cov_all[i], n_base, cost[i], dof, chi2_red[i],
            bool(fit_ok[i]), "" if fit_ok[i] else "did not converge",
        )
        if not gauss.success:
            # the shared fallback path (edge baseline) is the single fitter's
            out.append(_assemble(xi, yi, gauss, _shape_from_gaussian(gauss), "gaussian", baseline, window_n_sigma, snr_min))
            continue
        # window moments were computed in scaled units: convert to metres
        # (the error per unit noise also rescales with the signal scale s)
        win = (x_ref[i] + h[i] * mu_w[i], h[i] * rms_w[i], h[i] * err_w[i] / s[i], 0)
        out.append(_assemble(xi, yi, gauss, _shape_from_gaussian(gauss), "gaussian", baseline, window_n_sigma, snr_min, win=win))
    return out


def model_curve(result: ProfileResult, position_m) -> np.ndarray:
    """The fitted model of ``result`` evaluated at ``position_m`` (for plotting).

    Returns NaN everywhere when the fit failed.
    """
    x = np.asarray(position_m, dtype=float)
    if "fit_failed" in result.flags or not math.isfinite(result.sigma_m):
        return np.full(x.shape, np.nan)
    z = x - result.centroid_m
    base = result.baseline + result.baseline_slope_per_m * z
    if result.model == "halo":
        s1, s2, f = result.core_sigma_m, result.halo_sigma_m, result.halo_fraction
        ratio = f * s1 / ((1.0 - f) * s2) if f < 1 else math.inf  # A2 / A1
        a1 = result.amplitude / (1.0 + ratio)
        a2 = result.amplitude - a1
        return a1 * np.exp(-0.5 * (z / s1) ** 2) + a2 * np.exp(-0.5 * (z / s2) ** 2) + base
    if result.model == "super_gaussian":
        return result.amplitude * np.exp(-0.5 * np.abs(z / result.width_m) ** result.order) + base
    return result.amplitude * np.exp(-0.5 * (z / result.sigma_m) ** 2) + base
