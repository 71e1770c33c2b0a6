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
``|x - mu| <= n * rms`` and the window is iterated, starting from the fitted
centre and sigma, until the set of points stops changing or repeats an earlier
set (at most 20 steps; ``n = window_n_sigma``, default 4).  Points are weighted by their local
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

Fitting
-------
Every fit runs with positions mapped to [-1, 1] from model-free start values
(:func:`start_values`).  Single profiles (signal divided by its range) use
MINPACK's Levenberg-Marquardt with an analytic Jacobian
(:func:`least_squares_fit`).  Many Gaussian profiles at once
(:func:`fit_gaussians_batch`, :func:`fit_profiles_batch`) use variable
projection in numpy: amplitude and baseline in closed form, a damped
Gauss-Newton iteration over centre and width only, every profile's sums
computed together (Golub & Pereyra 1973; Kaufman 1975; see
:class:`_VarProGaussian`).  It reaches the single fitter's optimum (sigma to
~1e-8, sigma_err to ~1e-7 relative in the benchmark).
:func:`levenberg_marquardt_batch` is the general vectorised LM for other
models.  Parameter covariances are ``(J^T W J)^-1``, scaled by the reduced
chi-square unless the weights are absolute.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, cast

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
    p0: Sequence[float] | np.ndarray,
    *,
    weights: np.ndarray | None = None,
    absolute_weights: bool = False,
    bounds: tuple[Sequence[float], Sequence[float]] | None = None,
    max_nfev: int | None = None,
) -> LeastSquaresFit:
    """Weighted nonlinear least squares, the core every profile fit uses.

    Minimises ``sum w (model(x, p) - y)^2`` with MINPACK's Levenberg-Marquardt
    (:func:`scipy.optimize.least_squares`, ``method="lm"``; J. J. More, "The
    Levenberg-Marquardt algorithm: implementation and theory", Lect. Notes in
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
    max_nfev : int, optional
        Evaluation budget (default 2000 (k + 1) for LM, 500 (k + 1) with bounds).

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

    jac: str | Callable[[np.ndarray], np.ndarray]
    if jacobian is None:
        jac = "3-point"
    else:

        def jac_weighted(p):
            return sw[:, None] * jacobian(x, p)

        jac = jac_weighted

    n, k = y.size, p0.size
    dof = n - k
    try:
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            if bounds is None:
                sol = optimize.least_squares(fun, p0, jac=jac, method="lm", xtol=1e-15, ftol=1e-15, gtol=1e-15, max_nfev=max_nfev or 2000 * (k + 1))
            else:
                sol = optimize.least_squares(fun, p0, jac=jac, method="trf", bounds=bounds, x_scale="jac", xtol=1e-14, ftol=1e-14, gtol=1e-14, max_nfev=max_nfev or 500 * (k + 1))
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


@dataclass(frozen=True, eq=False)
class BatchLMResult:
    """Outcome of :func:`levenberg_marquardt_batch`.

    ``params`` (n, k); ``converged`` (n,) bool; ``cost`` (n,) sum of squared
    residuals at the last evaluated point; ``jtj`` (n, k, k) the Gauss-Newton
    matrix there (its inverse times ``cost / dof`` is the covariance);
    ``n_evaluations`` how many times the residual function was called.
    """

    params: np.ndarray
    converged: np.ndarray
    cost: np.ndarray
    jtj: np.ndarray
    n_evaluations: int


def levenberg_marquardt_batch(
    normal_equations: Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray, np.ndarray]],
    p0: np.ndarray,
    *,
    max_iter: int = 200,
    xtol: float = 1e-12,
    ftol: float = 1e-12,
    initial_damping: float = 1.0,
) -> BatchLMResult:
    """Levenberg-Marquardt over many independent problems at once, in numpy.

    Every problem keeps its own damping ``lambda`` (Marquardt's scaling by
    ``diag(J^T J)``; D. W. Marquardt, J. SIAM 11, 431 (1963)); the damped normal
    equations of all still-active problems are solved together with a stacked
    :func:`numpy.linalg.solve`, and a problem leaves the active set once its
    Newton decrement or its step falls below the tolerance.  Only the normal
    equations are kept between iterations, never the Jacobians.

    Parameters
    ----------
    normal_equations : callable ``f(params, rows) -> (cost, JtJ, Jtr)``
        For the problems ``rows`` (int index array) at ``params``
        (``(len(rows), k)``): the sum of squared (weighted) residuals
        ``(len(rows),)``, ``J^T J`` ``(len(rows), k, k)`` and ``J^T r``
        ``(len(rows), k)``.  :func:`normal_equations_from_jacobian` builds them
        from residuals and a Jacobian.
    p0 : ndarray, shape (n_problems, k)
    max_iter : int
    xtol : float
        A problem stops when its step is below ``xtol`` relative to the parameters.
    ftol : float
        A problem stops when its Newton decrement ``g^T (J^T J)^-1 g`` (the cost an
        undamped Gauss-Newton step could still remove) is below ``ftol * cost``;
        that last step is then taken without evaluating it, which leaves an error
        of second order in it (the parameters then sit within about
        ``sqrt(ftol * dof)`` standard errors of the optimum before it).
    initial_damping : float
        Starting ``lambda``.  The cautious default 1 (a step about half the
        Gauss-Newton one) keeps far starts from sliding into a flat region, as
        NIST's Eckerle4 start 1 otherwise does; with good start values 1e-4
        saves an iteration or two.

    Returns
    -------
    BatchLMResult
    """
    p = np.array(p0, dtype=float, copy=True)
    n, k = p.shape
    with np.errstate(over="ignore", invalid="ignore"):
        cost, jtj_all, g_all = normal_equations(p, np.arange(n))
    cost = np.array(cost, dtype=float, copy=True)
    lam = np.full(n, float(initial_damping))
    converged = np.zeros(n, dtype=bool)
    n_eval = 1
    active = np.isfinite(cost) & np.all(np.isfinite(jtj_all), axis=(1, 2))
    eye = np.eye(k)
    for _ in range(max_iter):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        jtj, g = (jtj_all, g_all) if idx.size == n else (jtj_all[idx], g_all[idx])
        # one stacked solve: the undamped (Gauss-Newton) step and the damped one
        diag = np.maximum(np.diagonal(jtj, axis1=1, axis2=2), 1e-300)
        a = jtj + lam[idx, None, None] * diag[:, :, None] * eye
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            try:
                both = np.linalg.solve(np.concatenate([jtj, a]), np.concatenate([g, g])[:, :, None])[:, :, 0]
            except np.linalg.LinAlgError:
                both = np.concatenate([
                    np.stack([np.linalg.lstsq(ai, gi, rcond=None)[0] for ai, gi in zip(jtj, g, strict=True)]),
                    np.stack([np.linalg.lstsq(ai, gi, rcond=None)[0] for ai, gi in zip(a, g, strict=True)]),
                ])
            d_gn, step = both[: idx.size], -both[idx.size :]
            # Newton decrement g^T (J^T J)^-1 g: the most an undamped step could still
            # gain; below ftol * cost the problem is solved and needs no evaluation
            dec = np.einsum("ij,ij->i", g, d_gn)
        solved = np.isfinite(dec) & (dec <= ftol * cost[idx])
        if solved.any():
            # take the final undamped step without evaluating it (its gain is below
            # ftol * cost; the remaining error is second order in it)
            rows_s = idx[solved]
            p[rows_s] -= d_gn[solved]
            converged[rows_s] = True
            active[rows_s] = False
        keep = ~solved
        if not keep.any():
            break
        if not keep.all():
            idx, step = idx[keep], step[keep]
        p_new = p[idx] + step
        with np.errstate(over="ignore", invalid="ignore"):
            cost_new, jtj_new, g_new = normal_equations(p_new, idx)
        n_eval += 1
        better = np.isfinite(cost_new) & (cost_new <= cost[idx]) & np.all(np.isfinite(jtj_new), axis=(1, 2))
        small_step = np.all(np.abs(step) <= xtol * (np.abs(p[idx]) + xtol), axis=1)
        acc = idx[better]
        if acc.size == n:
            p, cost, jtj_all, g_all = p_new, np.array(cost_new, dtype=float), jtj_new, g_new
        else:
            p[acc], cost[acc], jtj_all[acc], g_all[acc] = p_new[better], cost_new[better], jtj_new[better], g_new[better]
        lam[acc] = np.maximum(lam[acc] / 10.0, 1e-15)
        rej = idx[~better]
        lam[rej] *= 10.0
        # an accepted or rejected step that is already negligibly small ends the search
        stuck = rej[lam[rej] > 1e16]
        converged[idx[small_step]] = True
        active[idx[small_step]] = False
        active[stuck] = False
        converged[stuck] = True  # no further descent possible: a (local) minimum
    return BatchLMResult(p, converged, cost, jtj_all, n_eval)


def normal_equations_from_jacobian(residual: np.ndarray, jacobian_t: np.ndarray):
    """``(cost, J^T J, J^T r)`` from residuals ``(n, m)`` and a transposed Jacobian ``(n, k, m)``."""
    return (
        np.einsum("ij,ij->i", residual, residual),
        np.matmul(jacobian_t, jacobian_t.transpose(0, 2, 1)),
        np.matmul(jacobian_t, residual[:, :, None])[:, :, 0],
    )



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


def _physical_rows(x, x_ref, h, s, p_int, cov_int, chi2, resid_rms, dof, ok, message, n_base, dmin=None):
    """Map scaled-coordinate Gaussian solutions back to metres and signal units, row by row.

    Also applies the physical checks that turn a converged fit into a failed one.
    Arrays have a leading profile axis; ``x`` is ``(n, m)``; ``chi2`` is the
    weighted chi-square in signal units and ``resid_rms`` the unweighted rms residual.  Returns a dict of
    arrays (``amplitude``, ``centroid``, ``sigma``, their errors, ``c0``, ``slope``,
    ``residual_rms``, ``ok``), ``params``/``cov`` and the list of failure reasons.
    ``dmin``, the smallest point spacing per row, is computed from ``x`` unless given.
    """
    n = len(p_int)
    cols = [s, h, h, s] + ([s / h] if n_base == 2 else [])
    scale = np.stack(cols, axis=1)
    params = p_int * scale
    params[:, 1] += x_ref
    params[:, 2] = np.abs(params[:, 2])
    with np.errstate(invalid="ignore", over="ignore"):
        cov = cov_int * scale[:, :, None] * scale[:, None, :]
        err = np.sqrt(np.abs(np.diagonal(cov, axis1=1, axis2=2)))
    amp, mu, sig = params[:, 0], params[:, 1], params[:, 2]
    lo, hi = x[:, 0], x[:, -1]
    span = hi - lo
    if dmin is None:
        dmin = np.min(np.diff(x, axis=1), axis=1)
    reasons = list(message)
    ok = np.array(ok, dtype=bool, copy=True)
    with np.errstate(invalid="ignore"):
        tests = [
            (~np.all(np.isfinite(params), axis=1), lambda i: "non-finite parameters"),
            (amp <= 0, lambda i: f"fitted amplitude {amp[i]:.3g} is not positive"),
            (~((lo <= mu) & (mu <= hi)), lambda i: f"fitted centre {mu[i]:.4g} m lies outside the scan [{lo[i]:.4g}, {hi[i]:.4g}] m"),
            (sig > span, lambda i: f"fitted sigma {sig[i]:.3g} m is wider than the scan ({span[i]:.3g} m)"),
            (sig < 0.1 * dmin, lambda i: f"fitted sigma {sig[i]:.3g} m is far below the point spacing"),
            (~np.all(np.isfinite(err), axis=1), lambda i: "parameter covariance is singular"),
        ]
    for bad, why in tests:
        for i in np.flatnonzero(ok & bad):
            reasons[i] = why(i)
            ok[i] = False
    out = {
        "amplitude": amp, "amplitude_err": err[:, 0], "centroid": mu, "centroid_err": err[:, 1],
        "sigma": sig, "sigma_err": err[:, 2], "c0": params[:, 3],
        "slope": params[:, 4] if n_base == 2 else np.zeros(n), "x_ref": np.asarray(x_ref, dtype=float),
        "residual_rms": np.asarray(resid_rms, dtype=float), "chi2": np.asarray(chi2, dtype=float),
        "chi2_red": np.asarray(chi2, dtype=float) / dof if dof > 0 else np.full(n, np.nan), "ok": ok,
    }
    return out, params, cov, ["" if o else r for o, r in zip(ok, reasons, strict=True)]


def _physical_gaussian(x, x_ref, h, s, p_int, cov_int, n_base, chi2, resid_rms, dof, ok, message):
    """One profile's scaled solution as a :class:`GaussianFit` (see :func:`_physical_rows`)."""
    rows, params, cov, reasons = _physical_rows(
        x[None, :], np.atleast_1d(x_ref), np.atleast_1d(h), np.atleast_1d(s), p_int[None, :], cov_int[None],
        np.atleast_1d(chi2), np.atleast_1d(resid_rms), dof, [bool(ok)], [message], n_base,
    )
    names = ("amplitude", "centroid_m", "sigma_m", "c0") + (("c1_per_m",) if n_base == 2 else ())
    return GaussianFit(
        amplitude=float(rows["amplitude"][0]),
        amplitude_err=float(rows["amplitude_err"][0]),
        centroid_m=float(rows["centroid"][0]),
        centroid_err_m=float(rows["centroid_err"][0]),
        sigma_m=float(rows["sigma"][0]),
        sigma_err_m=float(rows["sigma_err"][0]),
        baseline_c0=float(rows["c0"][0]),
        baseline_slope_per_m=float(rows["slope"][0]),
        x_ref_m=float(x_ref),
        params=params[0],
        covariance=cov[0],
        param_names=names,
        chi2=float(rows["chi2"][0]),
        dof=int(dof),
        chi2_red=float(rows["chi2_red"][0]),
        residual_rms=float(rows["residual_rms"][0]),
        success=bool(rows["ok"][0]),
        message=reasons[0],
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
        return _physical_gaussian(x, 0.0, 1.0, 1.0, nan, np.full((k, k), np.nan), n_base, math.nan, math.nan, x.size - k, False, f"{x.size} points, the model needs at least {k + 2}")
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
    # weighted chi-square in signal units; the unweighted residual rms measures the noise
    chi2 = fit.chi2 * (s * s if w is None else 1.0)
    with np.errstate(invalid="ignore", over="ignore"):
        resid = s * (model(t, fit.params) - y / s)
        resid_rms = math.sqrt(float(resid @ resid) / fit.dof) if fit.dof > 0 and np.all(np.isfinite(resid)) else math.nan
    return _physical_gaussian(x, x_ref, h, s, fit.params, fit.covariance, n_base, chi2, resid_rms, fit.dof, fit.success, fit.message)


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
    max_iter: int = 20,
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
        At low SNR the noise in the tails can keep a window wandering by a few
        points; the iteration stops when the window repeats any earlier one, or
        after ``max_iter`` steps (the rms then moves by less than its error).

    Returns
    -------
    centroid_m, rms_m, rms_err_unit, n_used : ndarray, shape (n_profiles,)
        ``rms_err_unit`` is the rms standard error per unit point noise
        (multiply by the noise rms of one point); NaN where no positive signal is
        inside the window.
    """
    y = np.atleast_2d(np.asarray(signal, dtype=float))
    x = np.broadcast_to(np.atleast_2d(np.asarray(position_m, dtype=float)), y.shape)
    # one row of positions shared by all profiles (a broadcast view)
    shared = len(y) > 1 and x.strides[0] == 0
    # spacing and centred positions of a shared row are computed once (same values per row)
    w = _spacing(x[:1] if shared else x)
    if centroid0_m is None or sigma0_m is None:
        wy = w * y
        tot = wy.sum(1)
        mu = (wy * x).sum(1) / tot
        sig = np.sqrt(np.abs((wy * (x - mu[:, None]) ** 2).sum(1) / tot))
    else:
        mu = np.broadcast_to(np.asarray(centroid0_m, dtype=float), (len(y),)).copy()
        sig = np.broadcast_to(np.asarray(sigma0_m, dtype=float), (len(y),)).copy()
    # The window |x - mu| <= n sig is an index range [lo, hi) of the sorted
    # positions, so each iteration needs only two counts and prefix sums.
    xr = 0.5 * (x[:, :1] + x[:, -1:])
    xc = (x[:1] - xr[:1]) if shared else (x - xr)  # centred, to keep the prefix-sum variance free of cancellation
    wy = w * y
    # prefix sums of w y, w y x, w y x^2 with a leading zero: cum[:, i, j] = sum over points < j
    cum = np.zeros((3, len(y), y.shape[1] + 1))
    np.cumsum(wy, axis=1, out=cum[0, :, 1:])
    wyx = wy * xc
    np.cumsum(wyx, axis=1, out=cum[1, :, 1:])
    np.cumsum(wyx * xc, axis=1, out=cum[2, :, 1:])
    ar = np.arange(len(y))
    mu = mu - xr[:, 0]
    ok = np.isfinite(mu) & np.isfinite(sig) & (sig > 0)
    lo = np.zeros(len(y), dtype=np.int64)
    hi = np.zeros(len(y), dtype=np.int64)
    hist_lo: list[np.ndarray] = []
    hist_hi: list[np.ndarray] = []
    todo = ok.copy()
    with np.errstate(invalid="ignore", divide="ignore"):
        for _ in range(max_iter):
            if not todo.any():
                break
            half = n_sigma * sig
            if shared:
                # counts of sorted positions below the bounds: binary searches, same integers
                new_lo = np.where(todo, np.searchsorted(xc[0], mu - half, side="left"), lo)
                new_hi = np.where(todo, np.searchsorted(xc[0], mu + half, side="right"), hi)
            else:
                new_lo = np.where(todo, np.count_nonzero(xc < (mu - half)[:, None], axis=1), lo)
                new_hi = np.where(todo, np.count_nonzero(xc <= (mu + half)[:, None], axis=1), hi)
            same = (new_lo == lo) & (new_hi == hi)
            # a window returning to any earlier range is cycling: it has settled as
            # far as it will (take the latest)
            cycle = np.zeros(len(y), dtype=bool)
            for hl, hh in zip(hist_lo, hist_hi, strict=True):
                cycle |= (new_lo == hl) & (new_hi == hh)
            hist_lo.append(lo)
            hist_hi.append(hi)
            lo, hi = new_lo, new_hi
            s0, s1, s2 = cum[:, ar, hi] - cum[:, ar, lo]
            m = s1 / s0
            var = s2 / s0 - m * m
            good = (s0 > 0) & (var > 0)
            upd = todo & ~same
            mu = np.where(upd, np.where(good, m, np.nan), mu)
            sig = np.where(upd, np.where(good, np.sqrt(np.where(good, var, 1.0)), np.nan), sig)
            ok &= ~(upd & ~good)
            todo = todo & good & ~same & ~cycle
        # final moments computed directly on the settled window
        idx = np.arange(y.shape[1])
        mask = ok[:, None] & (idx >= lo[:, None]) & (idx < hi[:, None])
        wm = np.where(mask, w, 0.0)
        wmy = wm * y
        tot = wmy.sum(1)
        mu = (wmy * xc).sum(1) / tot
        d2 = (xc - mu[:, None]) ** 2
        var = (wmy * d2).sum(1) / tot
        good = ok & (tot > 0) & (var > 0)
        sig = np.where(good, np.sqrt(np.where(good, var, 1.0)), np.nan)
        mu = np.where(good, mu + xr[:, 0], np.nan)
        # d(rms^2)/dy_i = w_i (d_i^2 - rms^2) / tot; rms_err = |grad| / (2 rms) per unit noise.
        # The 1/tot factor comes last: squared first it overflows for a tiny signal (|y| ~ 1e-280).
        norm = np.sqrt(((wm * (d2 - sig[:, None] ** 2)) ** 2).sum(1))
        err_unit = np.where(good, norm / (2.0 * sig) / np.where(good, tot, 1.0), np.nan)
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
    """Fitted model values in physical units for one profile (internal)."""

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


_SHAPE_KEYS = ("centroid", "centroid_err", "sigma", "sigma_err", "amplitude", "amplitude_err", "c0", "slope", "x_ref", "chi2_red")


def _gauss_shape_rows(g: dict, x: np.ndarray, reasons: list[str]) -> dict:
    """The Gaussian fit rows in the form :func:`_assemble_rows` takes as the model."""
    sh = {k: g[k] for k in _SHAPE_KEYS}
    sh["ok"] = g["ok"]
    sh["message"] = reasons
    sh["fwhm"] = FWHM_PER_SIGMA * g["sigma"]
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        ends = x[:, [0, -1]]
        sh["excess"] = g["amplitude"][:, None] * np.exp(-0.5 * ((ends - g["centroid"][:, None]) / g["sigma"][:, None]) ** 2)
    sh["extras"] = [{}] * len(x)
    return sh


def _shape_rows(shape: _Shape, x: np.ndarray, model: str) -> dict:
    """One non-Gaussian shape fit as rows for :func:`_assemble_rows`."""
    sh: dict[str, Any] = {k: np.array([getattr(shape, k)], dtype=float) for k in _SHAPE_KEYS}
    sh["ok"] = np.array([shape.ok])
    sh["message"] = [shape.message]
    sh["fwhm"] = np.array([shape.fwhm])
    sh["excess"] = shape.excess(np.array([x[0], x[-1]]), model)[None, :] if shape.ok else np.full((1, 2), np.nan)
    sh["extras"] = [shape.extras if shape.ok else {}]
    return sh


def _assemble_rows(
    x: np.ndarray,
    y: np.ndarray,
    g: dict,
    sh: dict,
    model: str,
    baseline: str,
    window_n_sigma: float,
    snr_min: float,
    too_few: np.ndarray,
) -> list[ProfileResult]:
    """Combine fits, the rms window and the quality checks into results, row by row.

    ``x``, ``y`` are ``(n, m)``; ``g`` holds the Gaussian-fit rows (for the noise,
    the SNR and ``non_gaussian``), ``sh`` the rows of the model reported.
    """
    n, m = y.shape
    n_base = 2 if baseline == "linear" else 1
    nan = math.nan
    ok = np.asarray(sh["ok"], dtype=bool)
    x_ref, h, _ = _scales(x, y)
    t = (x - x_ref[:, None]) / h[:, None]
    # baseline for the rms: the fitted one, else the model-free edge estimate
    with np.errstate(invalid="ignore"):
        yb = y - (sh["c0"][:, None] + sh["slope"][:, None] * (x - sh["x_ref"][:, None]))
    mu0 = np.array(sh["centroid"], dtype=float, copy=True)
    s0 = np.array(sh["sigma"], dtype=float, copy=True)
    bad = np.flatnonzero(~ok)
    if bad.size:
        p_edge = start_values(t[bad], y[bad], baseline=baseline)
        yb[bad] = y[bad] - (p_edge[:, 3:4] + (p_edge[:, 4:5] * t[bad] if n_base == 2 else 0.0))
        # window start for those: the half-maximum estimate (a converged fit starts from itself;
        # the window's fixed point, not its start, defines the rms)
        pw = start_values(t[bad], yb[bad], baseline="constant")
        mu0[bad] = x_ref[bad] + h[bad] * pw[:, 1]
        s0[bad] = h[bad] * pw[:, 2]
    mu_w, rms_w, err_unit, _ = window_moments(x, yb, n_sigma=window_n_sigma, centroid0_m=mu0, sigma0_m=s0)
    # noise per point: rms residual of the Gaussian fit, else the scatter of the edges
    g_ok = np.asarray(g["ok"], dtype=bool)
    noise = np.array(g["residual_rms"], dtype=float, copy=True)
    amp_snr = np.array(g["amplitude"], dtype=float, copy=True)
    gbad = np.flatnonzero(~g_ok)
    if gbad.size:
        ne = max(2, int(round(EDGE_FRACTION * m)))
        edges = np.concatenate([yb[gbad, :ne], yb[gbad, -ne:]], axis=1)
        noise[gbad] = 1.4826 * np.median(np.abs(edges - np.median(edges, axis=1, keepdims=True)), axis=1)
        amp_snr[gbad] = yb[gbad].max(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        rms_err = err_unit * noise
        snr = np.where(noise > 0, amp_snr / noise, np.where(amp_snr > 0, np.inf, nan))
        low = snr < snr_min
        # clipping: centre near an end, or the peak not back to baseline at an end
        c = np.where(ok, sh["centroid"], mu_w)
        sg = np.where(ok, sh["sigma"], rms_w)
        room = np.minimum(c - x[:, 0], x[:, -1] - c)
        near_end = np.isfinite(room) & np.isfinite(sg) & (room < CLIP_EDGE_N_SIGMA * sg)
        ex = sh["excess"]
        no_base = ok & ~near_end & (np.max(ex, axis=1) > EDGE_EXCESS_FRACTION * sh["amplitude"])
        # non-Gaussian: Gaussian sigma against the window-corrected rms
        rms_c = rms_w / iterated_window_rms_factor(window_n_sigma)
        diff = np.abs(g["sigma"] - rms_c)
        comb = np.hypot(g["sigma_err"], np.where(np.isfinite(rms_err), rms_err, 0.0))
        non_g = g_ok & np.isfinite(rms_w) & (diff > NON_GAUSSIAN_THRESHOLD * g["sigma"]) & (diff > 3.0 * comb)
    base_c = sh["c0"] + sh["slope"] * (sh["centroid"] - sh["x_ref"])

    cols = {
        "centroid_m": sh["centroid"], "centroid_err_m": sh["centroid_err"], "sigma_m": sh["sigma"], "sigma_err_m": sh["sigma_err"],
        "rms_m": rms_w, "rms_err_m": rms_err, "rms_centroid_m": mu_w, "fwhm_m": sh["fwhm"],
        "amplitude": sh["amplitude"], "amplitude_err": sh["amplitude_err"], "baseline": base_c, "baseline_slope_per_m": sh["slope"],
        "chi2_red": sh["chi2_red"], "snr": snr,
    }
    names = list(cols)
    fitted = [names.index(k) for k in ("centroid_m", "centroid_err_m", "sigma_m", "sigma_err_m", "fwhm_m", "amplitude",
                                       "amplitude_err", "baseline", "baseline_slope_per_m", "chi2_red")]
    i_fwhm = names.index("fwhm_m")
    rows_vals = list(zip(*(np.asarray(v, dtype=float).tolist() for v in cols.values()), strict=True))
    g_sigma = np.where(g_ok, g["sigma"], nan).tolist()
    flag_any = (too_few | ~ok | low | near_end | no_base | non_g | ~np.isfinite(rms_w)).tolist()
    extra_keys = ("s1", "s2", "halo_fraction", "halo_fraction_err", "p", "p_err", "w")
    no_extras = (nan,) * len(extra_keys)
    wn = float(window_n_sigma)
    out = []
    for i in range(n):
        vals: tuple[float, ...] | list[float] = rows_vals[i]
        flags: tuple[str, ...] = ()
        message = ""
        extras = sh["extras"][i]
        ext = tuple(float(extras.get(k, nan)) for k in extra_keys) if extras else no_extras
        if flag_any[i]:
            fl: list[str] = []
            notes: list[str] = []
            if too_few[i]:
                fl.append("too_few_points")
            if not ok[i]:
                fl.append("fit_failed")
                notes.append(f"fit failed: {sh['message'][i]}")
                vals = list(vals)
                for j in fitted:
                    vals[j] = nan
                vals[i_fwhm] = _fwhm_from_data(x[i], yb[i])
            if low[i]:
                fl.append("low_signal")
                notes.append(f"signal-to-noise {snr[i]:.3g} below {snr_min:g}")
            if not math.isfinite(rms_w[i]):
                notes.append("no positive signal inside the rms window")
            if near_end[i]:
                fl.append("clipped")
                notes.append(f"clipped: centre {room[i] / sg[i]:.2g} sigma from the scan end")
            elif no_base[i]:
                side = "low" if ex[i, 0] >= ex[i, 1] else "high"
                fl.append("clipped")
                notes.append(f"clipped: baseline not reached on the {side}-position side")
            if non_g[i]:
                fl.append("non_gaussian")
                notes.append(f"non-Gaussian: Gaussian sigma {g['sigma'][i]:.4g} m vs rms {rms_c[i]:.4g} m")
            flags = merge_flags(fl)
            message = "; ".join(notes)
        # positional, in the field order of ProfileResult (one starred tuple: mypy
        # cannot match fixed arguments that follow a starred one of unknown length)
        args = (*vals, m, model, flags, message, wn, *ext, g_sigma[i])
        out.append(ProfileResult(*args))
    return out


def _gauss_rows(fit: GaussianFit) -> dict:
    """A single :class:`GaussianFit` as one-row arrays."""
    return {
        "amplitude": np.array([fit.amplitude]), "amplitude_err": np.array([fit.amplitude_err]),
        "centroid": np.array([fit.centroid_m]), "centroid_err": np.array([fit.centroid_err_m]),
        "sigma": np.array([fit.sigma_m]), "sigma_err": np.array([fit.sigma_err_m]),
        "c0": np.array([fit.baseline_c0]), "slope": np.array([fit.baseline_slope_per_m]),
        "x_ref": np.array([fit.x_ref_m]), "residual_rms": np.array([fit.residual_rms]),
        "chi2": np.array([fit.chi2]), "chi2_red": np.array([fit.chi2_red]), "ok": np.array([fit.success]),
    }


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
    # one profile (1-D x, y): the per-row scales are scalars
    x_ref, h, s = cast(tuple[float, float, float], _scales(x, y))
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

        p0: list[float] | np.ndarray = [0.8 * g_amp, g_mu, 0.8 * g_sig, 0.2 * g_amp, 2.5 * g_sig] + base_p
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
    g = _gauss_rows(gauss)
    x2, y2 = x[None, :], y[None, :]
    if model == "gaussian":
        sh = _gauss_shape_rows(g, x2, [gauss.message])
    elif gauss.success:
        sh = _shape_rows(_fit_shape(x, y, gauss, model, baseline, weights), x, model)
    else:
        sh = _shape_rows(_Shape(message=f"no Gaussian start for the {model} fit ({gauss.message})"), x, model)
    too_few = np.array([not gauss.success and "needs at least" in gauss.message])
    return _assemble_rows(x2, y2, g, sh, model, baseline, window_n_sigma, snr_min, too_few)[0]


@dataclass(frozen=True, eq=False)
class BatchGaussianFit:
    """Gaussian-plus-baseline fits of many profiles (arrays over profiles).

    ``params`` is ``(n, k)`` with columns ``(amplitude, centroid_m, sigma_m, c0,
    c1_per_m)`` (``c1`` only for a linear baseline, the baseline being
    ``c0 + c1 (x - x_ref_m)``), ``covariance`` ``(n, k, k)`` (scaled by the
    reduced chi-square), ``success`` False with ``message`` where a fit failed.
    """

    params: np.ndarray
    covariance: np.ndarray
    x_ref_m: np.ndarray
    chi2_red: np.ndarray
    residual_rms: np.ndarray
    success: np.ndarray
    message: tuple[str, ...]
    rows: dict = field(repr=False, default_factory=dict)

    @property
    def sigma_m(self) -> np.ndarray:
        return self.params[:, 2]

    @property
    def sigma_err_m(self) -> np.ndarray:
        return np.sqrt(np.abs(self.covariance[:, 2, 2]))


def _check_batch(position_m, signals) -> tuple[np.ndarray, np.ndarray]:
    y = np.atleast_2d(np.asarray(signals, dtype=float))
    if y.ndim != 2:
        raise InputError(f"signals: expected shape (n_profiles, n_points), got {y.shape}")
    x = np.asarray(position_m, dtype=float)
    x_rows = x  # one row to check when the positions are shared
    if x.ndim == 1:
        x = np.broadcast_to(x, y.shape)
    if x.shape != y.shape:
        raise InputError(f"position_m: expected shape ({y.shape[1]},) or {y.shape}, got {x.shape}")
    # a NaN or inf anywhere makes the sum non-finite; a finite sum proves all finite
    # (only an overflowing sum of finite values needs the element-wise check)
    with np.errstate(over="ignore", invalid="ignore"):
        sums = [np.sum(x_rows), np.sum(y)]
    if not all(np.isfinite(v) or np.all(np.isfinite(a)) for v, a in zip(sums, (x_rows, y), strict=True)):
        raise InputError("position_m/signals: expected finite numbers, found NaN or inf")
    if y.shape[1] < 3:
        raise InputError(f"signals: expected at least 3 points per profile, got {y.shape[1]}")
    if np.any(np.diff(x_rows, axis=-1) <= 0):
        raise InputError("position_m: expected strictly increasing positions in every row")
    return x, y


def fit_gaussians_batch(position_m, signals, *, baseline: str = "linear") -> BatchGaussianFit:
    """Fit a Gaussian plus baseline to many profiles at once by variable projection.

    Positions are mapped to [-1, 1] as in :func:`fit_gaussian`; amplitude and
    baseline are solved in closed form for each trial centre and width, which
    alone are iterated (damped Gauss-Newton, each profile with its own damping,
    see :class:`_VarProGaussian`), from the half-maximum start of
    :meth:`_VarProGaussian.start`.  A profile stops when its step falls below
    ``BATCH_XTOL`` (1e-7) of its width; the covariance is ``(J^T J)^-1`` of the
    full five-parameter problem at the last evaluated point times the reduced
    chi-square, as in :func:`fit_gaussian`.  Each optimum is the single
    fitter's: sigma to ~1e-8 and sigma_err to ~1e-7 relative (benchmark and
    tests).  Shared positions (``position_m`` of shape ``(n_points,)``) are
    fastest: every sum is then a BLAS matrix-vector product.

    Parameters
    ----------
    position_m : array_like, shape (n_points,) or (n_profiles, n_points)
    signals : array_like, shape (n_profiles, n_points)
    baseline : {"constant", "linear"}

    Returns
    -------
    BatchGaussianFit
    """
    n_base = _check_baseline(baseline)
    x, y = _check_batch(position_m, signals)
    return _fit_gaussians_rows(x, y, n_base, np.ndim(position_m) == 1)


#: Profiles per chunk when :func:`fit_profiles_batch` assembles its results.
BATCH_CHUNK = 256

#: Largest ``|mu - c| / s`` in a block of shared-position profiles (``c`` the block's
#: median centre) for which the batch fitter takes its moments from powers of the
#: positions (precision loss about ``(25 + 3)^4 eps ~ 1e-10``); beyond, point by point.
_POLY_MAX_OFFSET = 25.0

#: The twelve raw moments of :meth:`_VarProGaussian._sums_poly`: (array, power of t),
#: array 0 = g, 1 = g^2, 2 = g yt.
_POLY_MOMENTS = [(0, j) for j in range(4)] + [(1, j) for j in range(5)] + [(2, j) for j in range(3)]
_POLY_J = np.array([j for _, j in _POLY_MOMENTS])


def _poly_terms():
    """Index tables turning t-moments into z-moments by the binomial theorem."""
    src, powd, coef, dst = [], [], [], []
    for col, (w, k) in enumerate(_POLY_MOMENTS):
        first = col - k  # column of this array's zeroth moment
        for j in range(k + 1):
            src.append(first + j)
            powd.append(k - j)
            coef.append(math.comb(k, j))
            dst.append(col)
        del w
    total = np.zeros((len(_POLY_MOMENTS), len(src)))
    total[dst, np.arange(len(src))] = 1.0
    return np.array(src), np.array(powd), np.array(coef, dtype=float), total


_POLY_TERM_SRC, _POLY_TERM_POW, _POLY_TERM_COEF, _POLY_TERM_SUM = _poly_terms()

#: Profiles per block of the batch fitter's point-by-point work: small enough
#: that its arrays (block x points) stay in the CPU cache.
BATCH_BLOCK = 256

#: The batch Gauss-Newton iteration of a profile stops when its step in centre
#: and width is below this fraction of the width; the step is then applied
#: without a further evaluation (its error is second order, ~1e-14) and the
#: covariance is the one at the last evaluated point, first order in the step.
BATCH_XTOL = 1e-7


def _rowdot(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise dot products of ``(n, m)`` arrays; ``b`` may be one shared row ``(1, m)``."""
    if b.shape[0] == 1 and a.shape[0] != 1:
        return a @ b[0]
    return np.einsum("ij,ij->i", a, b)


#: Columns of the per-profile row sums kept by the batch fitter at its current point:
#: ``mu, s``; ``sum g z^k`` (k = 0..2); ``sum g z^k t`` (k = 0..2); ``sum g^2 z^k`` (k = 0..4);
#: ``sum g z^k yt`` (k = 0..2), with ``g = exp(-z^2/2)``, ``z = (t - mu)/s``.
_SUMS = ("mu", "s", "s0", "s1", "s2", "u0", "u1", "u2", "q0", "q1", "q2", "q3", "q4", "y0", "y1", "y2")


class _VarProGaussian:
    """Gaussian-plus-baseline least squares of many profiles by variable projection.

    For a given centre and width the amplitude and baseline enter linearly, so
    they are solved in closed form and only ``(mu, s)`` is iterated (G. H. Golub
    & V. Pereyra, "The differentiation of pseudo-inverses and nonlinear least
    squares problems whose variables separate", SIAM J. Numer. Anal. 10, 413
    (1973)).  The step is L. Kaufman's ("A variable projection method for solving
    separable nonlinear least squares problems", BIT 15, 49 (1975)): at the
    linear optimum it equals the ``(mu, s)`` part of a full Gauss-Newton step of
    the five-parameter problem, i.e. the 2x2 Schur complement of its ``J^T J``.

    The data are replaced once by their residual ``yt`` from a straight-line (or
    constant) fit, orthogonal to the baseline columns.  Every inner product then
    needs only row sums of ``g, g z, g z^2`` against ``1, t, g, g z, g z^2, yt``
    (:data:`_SUMS`): one exponential, and for shared positions the map to ``z``
    and the sums against ``1`` and ``t`` done by BLAS.  Writing ``P_ij`` for the inner
    products of ``phi = (g, g z, g z^2)`` with the baseline projected out,
    ``A = sum(g yt) / P_00``, ``cost = |yt|^2 - A sum(g yt)`` and the step solves
    ``a^2 (P_ab - P_a0 P_0b / P_00) d_b = -a (A P_a0 - sum(phi_a yt))``,
    ``a = A / s``, ``a, b`` in ``{1, 2}``.
    """

    def __init__(self, t: np.ndarray, y: np.ndarray, n_base: int):
        self.t, self.n_base, self.k = t, n_base, 3 + n_base
        n, m = y.shape
        self.m = m
        self.shared = t.shape[0] == 1
        self.block = max(1, min(BATCH_BLOCK, n))
        # work buffers of one block: three point-by-point arrays and z
        self._buf = np.empty(3 * self.block * m)
        self._zbuf = np.empty(self.block * m)
        if self.shared:
            # rows [1, t] for the BLAS maps and sums
            self.basis = np.stack([np.ones(m), t[0]])
        st, stt = t.sum(1), _rowdot(t, t)
        self.st, self.stt = st, stt
        det = m * stt - st * st
        if n_base == 2:
            # inverse of the baseline block [[m, st], [st, stt]]
            self.i00, self.i01, self.i11 = stt / det, -st / det, m / det
        # yt: the data minus their least-squares line (or mean), block by block
        self.y = y
        self.yt = np.empty_like(y)
        beta0, beta1, syy = np.empty(n), np.zeros(n), np.empty(n)
        for i in range(0, n, self.block):
            sl = slice(i, min(i + self.block, n))
            yb, out = y[sl], self.yt[sl]
            tb = t if self.shared else t[sl]
            sy, sty = _rowdot(yb, np.ones((1, m))), _rowdot(yb, tb)
            if n_base == 2:
                d_ = det if self.shared else det[sl]
                beta1[sl] = (m * sty - st * sy if self.shared else m * sty - st[sl] * sy) / d_
                beta0[sl] = (sy - beta1[sl] * (st if self.shared else st[sl])) / m
                if self.shared:
                    np.matmul(np.stack([beta0[sl], beta1[sl]], axis=1), self.basis, out=out)
                else:
                    np.multiply(beta1[sl, None], tb, out=out)
                    out += beta0[sl, None]
                np.subtract(yb, out, out=out)
            else:
                beta0[sl] = sy / m
                np.subtract(yb, beta0[sl, None], out=out)
            syy[sl] = _rowdot(out, out)
        self.beta: tuple[np.ndarray, ...] = (beta0, beta1) if n_base == 2 else (beta0,)
        self.syy = syy

    def start(self) -> tuple[np.ndarray, np.ndarray]:
        """Model-free start ``(mu, s)``: half-maximum centroid and width above an edge baseline.

        As :func:`start_values`, but the edge baseline joins the *means* of the
        outer ``EDGE_FRACTION`` of the points on each side (not their medians: the
        fit needs only the centre and width, and the mean costs a fraction), and
        it is taken from the detrended ``yt`` (the same line up to rounding).
        """
        n, m = self.yt.shape
        ne = max(2, int(round(EDGE_FRACTION * m)))
        t = self.t
        spacing = _spacing(t)
        uniform = self.shared and bool(np.allclose(spacing, spacing[0, 0], rtol=1e-9, atol=0.0))
        dmin = np.diff(t, axis=1).min(axis=1)
        mu0, s0 = np.empty(n), np.empty(n)
        for i in range(0, n, self.block):
            sl = slice(i, min(i + self.block, n))
            yt = self.yt[sl]
            nb = len(yt)
            tb = t if self.shared else t[sl]
            yl, yr = yt[:, :ne].mean(1), yt[:, -ne:].mean(1)
            yb = self._zbuf[: nb * m].reshape(nb, m)
            if self.n_base == 2:
                tl, tr = tb[:, :ne].mean(1), tb[:, -ne:].mean(1)
                b1 = (yr - yl) / (tr - tl)
                b0 = yl - b1 * tl
                if self.shared:
                    np.matmul(np.stack([b0, b1], axis=1), self.basis, out=yb)
                else:
                    np.multiply(b1[:, None], tb, out=yb)
                    yb += b0[:, None]
                np.subtract(yt, yb, out=yb)
            else:
                np.subtract(yt, (0.5 * (yl + yr))[:, None], out=yb)
            half = 0.5 * yb.max(axis=1)
            above = yb > half[:, None]
            yb *= above
            tot, mom = _rowdot(yb, np.ones((1, m))), _rowdot(yb, tb)
            if uniform:
                width = np.count_nonzero(above, axis=1) * spacing[0, 0]
            else:
                width = _rowdot(above.astype(float), spacing if self.shared else spacing[sl])
            mu0[sl] = mom / np.maximum(tot, 1e-300)
            s0[sl] = np.maximum(width / FWHM_PER_SIGMA, 0.5 * (dmin if self.shared else dmin[sl]))
        return mu0, s0

    def _rows(self, a: np.ndarray, rows: np.ndarray | None):
        if rows is None or a.shape[0] == 1:
            return a
        return a[rows]

    def sums(self, mu: np.ndarray, s: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
        """The row sums :data:`_SUMS` at ``(mu, s)`` of ``rows`` (None: all), shape ``(n, 16)``.

        Works through blocks of :data:`BATCH_BLOCK` profiles so that the
        point-by-point arrays stay in the CPU cache.
        """
        n = len(mu)
        out = np.empty((n, len(_SUMS)))
        out[:, 0], out[:, 1] = mu, s
        for i in range(0, n, self.block):
            j = min(i + self.block, n)
            sel = slice(i, j) if rows is None else rows[i:j]
            t = None if self.shared else self.t[sel]
            self._sums_block(mu[i:j], s[i:j], self.yt[sel], t, out[i:j])
        return out

    def _sums_block(self, mu, s, yt, t, out) -> None:
        inv_s = 1.0 / s
        if t is None:
            c = float(np.median(mu))
            with np.errstate(invalid="ignore"):
                spread = np.max(np.abs(mu - c) * inv_s) if len(mu) else 0.0
            if spread <= _POLY_MAX_OFFSET:
                self._sums_poly(mu, s, inv_s, c, yt, out)
                return
        self._sums_direct(mu, inv_s, yt, self.t if t is None else t, out)

    def _sums_poly(self, mu, s, inv_s, c, yt, out) -> None:
        """Shared positions: the z-moments from t-moments, every row sum a BLAS gemv.

        With ``tc = t - c`` and ``z = tc/s - d``, ``d = (mu - c)/s``, each ``sum w z^k``
        is the binomial sum of ``d^(k-j) sum w (tc/s)^j``; the moments of ``g``,
        ``g^2`` and ``g yt`` against the shared powers of ``tc`` are matrix-vector
        products.  The expansion loses about ``(|d| + 3)^4`` in relative precision,
        hence the block's median centre and the :data:`_POLY_MAX_OFFSET` bound.
        """
        n, m = len(mu), self.m
        buf = self._buf[: 3 * n * m].reshape(3, n, m)
        g, g2, gy = buf
        tc = self.basis[1] - c
        d = (mu - c) * inv_s
        # -z^2/2 = -(tc^2/s^2 - 2 d tc/s + d^2)/2, an (n, 3) map of [1, tc, tc^2]
        coef = np.stack([-0.5 * d * d, d * inv_s, -0.5 * inv_s * inv_s], axis=1)
        np.matmul(coef, np.stack([self.basis[0], tc, tc * tc]), out=g)
        np.exp(g, out=g)
        np.multiply(g, g, out=g2)
        np.multiply(g, yt, out=gy)
        pw = [self.basis[0], tc]
        for _ in range(3):
            pw.append(pw[-1] * tc)
        # raw t-moments: g tc^0..3, g^2 tc^0..4, g yt tc^0..2 (twelve gemv)
        raw = np.empty((12, n))
        for col, (w, j) in enumerate(_POLY_MOMENTS):
            np.matmul((g, g2, gy)[w], pw[j], out=raw[col])
        # in units of s, then sum w z^k = sum_j binom(k, j) (-d)^(k-j) M_j, all twelve at once
        ps, pd = np.empty((5, n)), np.empty((5, n))
        ps[0], pd[0] = 1.0, 1.0
        for j in range(1, 5):
            np.multiply(ps[j - 1], inv_s, out=ps[j])
            np.multiply(pd[j - 1], -d, out=pd[j])
        mo = raw * ps[_POLY_J]
        zm = _POLY_TERM_SUM @ (mo[_POLY_TERM_SRC] * pd[_POLY_TERM_POW] * _POLY_TERM_COEF[:, None])
        zm = zm.T
        gz3 = zm[:, 3]
        out[:, 2:5] = zm[:, 0:3]
        # sum g z^k t = mu sum g z^k + s sum g z^(k+1)
        out[:, 5] = mu * zm[:, 0] + s * zm[:, 1]
        out[:, 6] = mu * zm[:, 1] + s * zm[:, 2]
        out[:, 7] = mu * zm[:, 2] + s * gz3
        out[:, 8:16] = zm[:, 4:12]

    def _sums_direct(self, mu, inv_s, yt, t, out) -> None:
        """Point by point: z, g, g z, g z^2 and their products (any positions)."""
        n, m = len(mu), self.m
        buf = self._buf[: 3 * n * m].reshape(3, n, m)
        z = self._zbuf[: n * m].reshape(n, m)
        g, gz, gz2 = buf
        np.subtract(t, mu[:, None], out=z)
        z *= inv_s[:, None]
        np.multiply(z, -0.5, out=g)
        g *= z
        np.exp(g, out=g)
        np.multiply(g, z, out=gz)
        np.multiply(gz, z, out=gz2)
        out[:, 2:5] = buf.sum(axis=2).T
        out[:, 5:8] = np.einsum("kij,ij->ki", buf, np.broadcast_to(t, z.shape)).T
        out[:, 8:11] = np.einsum("kij,ij->ki", buf, g).T
        out[:, 11:13] = np.einsum("kij,ij->ki", buf[1:], gz2).T
        out[:, 13:16] = np.einsum("kij,ij->ki", buf, yt).T

    def derived(self, sm: np.ndarray, rows: np.ndarray | None = None) -> dict:
        """Linear parameters, cost, reduced Gauss-Newton matrix and gradient from row sums."""
        mu, s, s0, s1, s2, u0, u1, u2, q0, q1, q2, q3, q4, y0, y1, y2 = sm.T
        if self.n_base == 2:
            i00, i01, i11 = (self._rows(v, rows) for v in (self.i00, self.i01, self.i11))
            # c_j = M_b^-1 (sum phi_j, sum phi_j t): baseline part of phi_j
            c = [(i00 * a + i01 * b, i01 * a + i11 * b) for a, b in ((s0, u0), (s1, u1), (s2, u2))]
            sig = [(s0, u0), (s1, u1), (s2, u2)]

            def proj(qij, i, j):
                return qij - (sig[i][0] * c[j][0] + sig[i][1] * c[j][1])
        else:
            c = [(s0 / self.m, None), (s1 / self.m, None), (s2 / self.m, None)]
            sig = [(s0, None), (s1, None), (s2, None)]

            def proj(qij, i, j):
                return qij - sig[i][0] * c[j][0]

        p00, p01, p02 = proj(q0, 0, 0), proj(q1, 0, 1), proj(q2, 0, 2)
        p11, p12, p22 = proj(q2, 1, 1), proj(q3, 1, 2), proj(q4, 2, 2)
        amp = y0 / p00
        a = amp / s
        h11 = a * a * (p11 - p01 * p01 / p00)
        h12 = a * a * (p12 - p01 * p02 / p00)
        h22 = a * a * (p22 - p02 * p02 / p00)
        return {
            "amp": amp, "a": a, "cost": self._rows(self.syy, rows) - amp * y0, "c": c, "p00": p00, "p01": p01, "p02": p02,
            "h11": h11, "h12": h12, "h22": h22, "g1": a * (amp * p01 - y1), "g2": a * (amp * p02 - y2),
        }

    def cost(self, sm: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
        """Only the cost ``|yt|^2 - A sum(g yt)`` of :meth:`derived` (for trial points)."""
        s0, u0, q0, y0 = sm[:, 2], sm[:, 5], sm[:, 8], sm[:, 13]
        if self.n_base == 2:
            i00, i01, i11 = (self._rows(v, rows) for v in (self.i00, self.i01, self.i11))
            p00 = q0 - (s0 * (i00 * s0 + i01 * u0) + u0 * (i01 * s0 + i11 * u0))
        else:
            p00 = q0 - s0 * s0 / self.m
        return self._rows(self.syy, rows) - y0 * y0 / p00

    def params(self, sm: np.ndarray, dv: dict, step: np.ndarray | None = None) -> np.ndarray:
        """Scaled parameters ``(A, mu, s, b0[, b1])`` at the sums' point, plus a ``(mu, s)`` step.

        The linear parameters follow the step to first order (their Gauss-Newton
        part, the least-squares fit of ``-J_(mu,s) step`` by ``g`` and the baseline).
        """
        amp, c = dv["amp"], dv["c"]
        b0 = self.beta[0] - amp * c[0][0]
        cols = [amp, sm[:, 0], sm[:, 1], b0]
        if self.n_base == 2:
            cols.append(self.beta[1] - amp * c[0][1])
        p = np.stack(cols, axis=1)
        if step is not None:
            a, dm, ds = dv["a"], step[:, 0], step[:, 1]
            da = -a * (dm * dv["p01"] + ds * dv["p02"]) / dv["p00"]
            p[:, 0] += da
            p[:, 1] += dm
            p[:, 2] += ds
            p[:, 3] -= a * (dm * c[1][0] + ds * c[2][0]) + da * c[0][0]
            if self.n_base == 2:
                p[:, 4] -= a * (dm * c[1][1] + ds * c[2][1]) + da * c[0][1]
        return p

    def jtj(self, sm: np.ndarray, amp: np.ndarray) -> np.ndarray:
        """Full ``J^T J`` of ``(A, mu, s, b0[, b1])`` at the sums' point (J columns g, a g z, a g z^2, 1[, t])."""
        n = len(sm)
        _, s, s0, s1, s2, u0, u1, u2, q0, q1, q2, q3, q4, _, _, _ = sm.T
        a = amp / s
        aq1, aq2, as1, as2 = a * q1, a * q2, a * s1, a * s2
        aaq2, aaq3, aaq4 = a * a * q2, a * a * q3, a * a * q4
        mm = np.full(n, float(self.m))
        if self.n_base == 1:
            ent = [q0, aq1, aq2, s0, aq1, aaq2, aaq3, as1, aq2, aaq3, aaq4, as2, s0, as1, as2, mm]
            return np.stack(ent, axis=1).reshape(n, 4, 4)
        st, stt = np.broadcast_to(self.st, (n,)), np.broadcast_to(self.stt, (n,))
        au1, au2 = a * u1, a * u2
        ent = [
            q0, aq1, aq2, s0, u0,
            aq1, aaq2, aaq3, as1, au1,
            aq2, aaq3, aaq4, as2, au2,
            s0, as1, as2, mm, st,
            u0, au1, au2, st, stt,
        ]
        return np.stack(ent, axis=1).reshape(n, 5, 5)

    def explicit_cost(self, params: np.ndarray, rows: np.ndarray) -> np.ndarray:
        """Sum of squared residuals computed point by point (for nearly exact fits)."""
        t, y = self._rows(self.t, rows), self.y[rows]
        p = params
        z = (t - p[:, 1:2]) / p[:, 2:3]
        r = p[:, 0:1] * np.exp(-0.5 * z * z) + p[:, 3:4] - y
        if self.n_base == 2:
            r += p[:, 4:5] * t
        return _rowdot(r, r)


def _gauss_varpro_batch(t: np.ndarray, y: np.ndarray, n_base: int, *, xtol: float = BATCH_XTOL, max_iter: int = 100):
    """Solve the Gaussian-plus-baseline fits of all rows by variable projection.

    A damped Gauss-Newton (Levenberg-Marquardt, damping ``lambda diag(H)``)
    iteration over ``(mu, s)``, each profile with its own damping, on the reduced
    matrix of :class:`_VarProGaussian`.  A profile stops when its step is below
    ``xtol`` times its width; that step is applied without a further evaluation.

    Returns
    -------
    params : ndarray, shape (n, k)
        Scaled ``(A, mu, s, b0[, b1])``.
    cost : ndarray, shape (n,)
        Sum of squared scaled residuals at the last evaluated point.
    jtj : ndarray, shape (n, k, k)
        Full ``J^T J`` there.
    converged : ndarray of bool, shape (n,)
    n_row_evaluations : int
        Profiles times evaluations, summed.
    """
    vp = _VarProGaussian(t, y, n_base)
    n = len(y)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        mu0, s0 = vp.start()
        sm = vp.sums(mu0, s0)
        cost = vp.cost(sm)
    n_eval = n
    # rounding bound of cost = |yt|^2 - A sum(g yt): a rise below it is not a rise
    tol = 64.0 * np.finfo(float).eps * vp.syy
    lam = np.full(n, 1e-3)
    converged = np.zeros(n, dtype=bool)
    last_step = np.zeros((n, 2))
    active = np.isfinite(cost)
    for _ in range(max_iter):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        full = idx.size == n
        sa = sm if full else sm[idx]
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            dv = vp.derived(sa, None if full else idx)
            # damped 2x2 solve, closed form
            la = 1.0 + lam[idx]
            h11, h22, h12 = dv["h11"] * la, dv["h22"] * la, dv["h12"]
            det = h11 * h22 - h12 * h12
            dm = -(h22 * dv["g1"] - h12 * dv["g2"]) / det
            ds = -(h11 * dv["g2"] - h12 * dv["g1"]) / det
            finite = np.isfinite(dm) & np.isfinite(ds) & (det > 0)
            small = finite & (lam[idx] < 1.0) & (np.abs(dm) <= xtol * np.abs(sa[:, 1])) & (np.abs(ds) <= xtol * np.abs(sa[:, 1]))
        active[idx[~finite]] = False  # singular normal equations: left as not converged
        if small.any():
            rows = idx[small]
            last_step[rows, 0], last_step[rows, 1] = dm[small], ds[small]
            converged[rows] = True
            active[rows] = False
        go = finite & ~small
        if not go.any():
            break
        idx = idx[go]
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            every = None if idx.size == n else idx  # all rows: no gathers
            sm_new = vp.sums(sa[go, 0] + dm[go], sa[go, 1] + ds[go], every)
            cost_new = vp.cost(sm_new, every)
        n_eval += idx.size
        better = np.isfinite(cost_new) & (cost_new <= cost[idx] + tol[idx])
        acc = idx[better]
        sm[acc], cost[acc] = sm_new[better], cost_new[better]
        lam[acc] = np.maximum(lam[acc] * 0.1, 1e-12)
        rej = idx[~better]
        lam[rej] *= 10.0
        stuck = rej[lam[rej] > 1e16]
        active[stuck] = False
        converged[stuck] = True  # no further descent possible: a (local) minimum
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        dv = vp.derived(sm)
        p = vp.params(sm, dv, last_step)
        jtj = vp.jtj(sm, dv["amp"])
        # the cost formula cancels for nearly exact fits: recompute those point by point
        exact = np.flatnonzero(np.isfinite(cost) & (cost < 1e-6 * vp.syy))
        if exact.size:
            cost[exact] = vp.explicit_cost(p[exact], exact)
    return p, cost, jtj, converged, n_eval


def _fit_gaussians_rows(x: np.ndarray, y: np.ndarray, n_base: int, shared: bool = False) -> BatchGaussianFit:
    """:func:`fit_gaussians_batch` on validated rows (``shared``: all rows have the same positions)."""
    n, m = y.shape
    k = 3 + n_base
    dof = m - k
    if dof < 2:
        nan = np.full((n, k), np.nan)
        msg = f"{m} points, the model needs at least {k + 2}"
        rows, params, cov, reasons = _physical_rows(x, x[:, 0], np.ones(n), np.ones(n), nan, np.full((n, k, k), np.nan), np.full(n, np.nan), np.full(n, np.nan), dof, np.zeros(n, bool), [msg] * n, n_base)
        return BatchGaussianFit(params, cov, rows["x_ref"], rows["chi2_red"], rows["residual_rms"], rows["ok"], tuple(reasons), rows)
    # positions scaled to [-1, 1] as in fit_gaussian (one shared row when all profiles
    # share them); the signal is not scaled: the fit is linear in it and every
    # tolerance of the iteration is relative
    x_ref = 0.5 * (x[:, 0] + x[:, -1])
    h = 0.5 * (x[:, -1] - x[:, 0])
    s = np.ones(n)
    # rows of extreme magnitude (whose squares would overflow or underflow) are
    # divided by a power of two, exactly, taken from a strided sample
    with np.errstate(divide="ignore"):
        e = np.floor(np.log2(np.max(np.abs(y[:, :: max(1, m // 32)]), axis=1)))
    extreme = np.isfinite(e) & (np.abs(e) > 200)
    if extreme.any():
        s[extreme] = np.exp2(e[extreme])
        y = y.copy()
        y[extreme] /= s[extreme, None]
    t = (x[:1] - x_ref[:1, None]) / h[:1, None] if shared else (x - x_ref[:, None]) / h[:, None]
    p, cost, jtj, conv, _ = _gauss_varpro_batch(t, y, n_base)
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        try:
            cov_int = np.linalg.inv(jtj) * (cost / dof)[:, None, None]
        except np.linalg.LinAlgError:  # one singular problem spoils the stacked inverse
            cov_int = np.full_like(jtj, np.inf)
            for i in range(n):
                try:
                    cov_int[i] = np.linalg.inv(jtj[i]) * (cost[i] / dof)
                except np.linalg.LinAlgError:
                    pass
        chi2 = cost * s * s
        resid_rms = np.sqrt(chi2 / dof)
    fit_ok = conv & np.all(np.isfinite(p), axis=1)
    msgs = ["" if o else "did not converge" for o in fit_ok]
    dmin = np.broadcast_to(np.diff(x[:1] if shared else x, axis=1).min(axis=1), (n,))
    rows, params, cov, reasons = _physical_rows(x, x_ref, h, s, p, cov_int, chi2, resid_rms, dof, fit_ok, msgs, n_base, dmin=dmin)
    return BatchGaussianFit(params, cov, rows["x_ref"], rows["chi2_red"], rows["residual_rms"], rows["ok"], tuple(reasons), rows)


def fit_profiles_batch(
    position_m,
    signals,
    *,
    baseline: str = "linear",
    window_n_sigma: float = 4.0,
    snr_min: float = DEFAULT_SNR_MIN,
) -> list[ProfileResult]:
    """Analyse many profiles at once (Gaussian model), vectorised end to end.

    The fits come from :func:`fit_gaussians_batch`; the rms windows, noise,
    SNR and flags are computed for all profiles together by the same code
    :func:`analyze_profile` uses, so each result equals the single analysis to
    the fit tolerance (sigma to better than 1e-6 relative).

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
    if not window_n_sigma > math.sqrt(3.0):
        raise InputError(f"window_n_sigma: expected a number above sqrt(3) = 1.732, got {window_n_sigma!r}")
    n_base = _check_baseline(baseline)
    x, y = _check_batch(position_m, signals)
    if len(y) == 0:
        return []
    fit = _fit_gaussians_rows(x, y, n_base, np.ndim(position_m) == 1)
    too_few = y.shape[1] < 3 + n_base + 2
    out: list[ProfileResult] = []
    for i in range(0, len(y), BATCH_CHUNK):
        sl = slice(i, i + BATCH_CHUNK)
        xc, yc = x[sl], y[sl]  # a broadcast view when the positions are shared
        g = {key: v[sl] for key, v in fit.rows.items()}
        shape = _gauss_shape_rows(g, xc, list(fit.message[sl]))
        out.extend(_assemble_rows(xc, yc, g, shape, "gaussian", baseline, window_n_sigma, snr_min, np.full(len(yc), too_few)))
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
