"""Transverse emittance and Twiss parameters from beam sizes measured through known optics.

One core, :func:`fit_sigma_matrix`, solves the beam-matrix measurement equation
(Minty & Zimmermann, *Measuring and Controlling Charged Particle Beams*,
Springer 2003; METHODS 1.3)::

    sigma_i^2 - sigma_res^2 = R11^2 S11 + 2 R11 R12 S12 + R12^2 S22

for ``s = (S11, S12, S22)`` at a reference point by weighted linear least
squares over any set of 2x2 transfer matrices ``R_i`` (reference point -> monitor)
and measured rms sizes.  Three front-ends build the matrices:

* :func:`analyze_quad_scan`: ``R = transport . Q(k1, L)``, thick-lens by default,
  reference point the **quadrupole entrance**; the thin-lens model
  ``D(L/2) Q_thin(k1 L) D(L/2)`` (the parabola method, METHODS 1.2) is reported
  alongside as a cross-check.  The y plane uses ``-k1``.
* :func:`analyze_solenoid_scan`: round beam, ``R = transport . F2(K)`` with
  ``K = B0 / (2 B rho)``, reference point the **solenoid entrance** (METHODS 2.2).
* :func:`analyze_multi_monitor`: fixed matrices per monitor, reference point
  given by the caller (default ``"reference point"``).

:func:`analyze_scan` runs the right front-end on a
:class:`~diagnostics.measurements.ScanSpec`, turning profiles and images into
sizes first.  Optics sign conventions are those of :mod:`diagnostics.optics`.

Quality flags set here (meanings in :data:`diagnostics.results.FLAGS`):
``too_few_points`` (< 3 distinct settings), ``unphysical`` (S11 <= 0, S22 <= 0 or
det S <= 0, or a constrained fit on the det = 0 boundary), ``poor_fit``
(chi-square outside the central :data:`POOR_FIT_CONFIDENCE` interval of the
chi-square distribution with N - 3 degrees of freedom, or of the F distribution
F(N - 3, m) when the weights come from a spread pooled over m degrees of
freedom; only with absolute weights), ``ill_conditioned`` (cond of the column-normalised weighted design
matrix above :data:`ILL_CONDITIONED`), ``waist_not_crossed``,
``resolution_limited``, and the step flags (``clipped``, ``saturated``, ...)
of the profiles or images used.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import optimize, stats

from diagnostics import optics, particles
from diagnostics.errors import InputError
from diagnostics.measurements import DesignTwiss, ScanSpec
from diagnostics.particles import Kinematics, beta_gamma_err, k1_from_gradient, larmor_k
from diagnostics.results import FLAGS, merge_flags

#: Transfer-matrix models of a scanned magnet: thick hard-edge lens, or thin lens at its centre.
EMITTANCE_METHODS = ("thick", "thin")
#: Which size a profile or image analysis provides: the fitted Gaussian sigma or the rms.
SIZE_SOURCES = ("fit", "rms")
#: What to do with a given energy spread: estimate the chromatic bias, or fit the chromatic model.
CHROMATIC_MODES = ("estimate", "correct")
#: Reference point of each scan kind.
REFERENCE_POINTS = {
    "quadrupole": "quadrupole entrance",
    "solenoid": "solenoid entrance",
    "multi_monitor": "reference point",
}
#: Central probability of the chi-square interval outside which a fit is flagged ``poor_fit``.
POOR_FIT_CONFIDENCE = 0.999
#: cond() of the column-normalised weighted design matrix above which the fit is ``ill_conditioned``
#: (relative data errors are amplified up to this factor; common practice).
ILL_CONDITIONED = 1e4
#: A setting is ``resolution_limited`` when sigma_meas^2 - sigma_res^2 < (RESOLUTION_FACTOR sigma_res)^2
#: (METHODS 1.4: the subtraction dominates below about twice the resolution).
RESOLUTION_FACTOR = 2.0
#: A constrained (Cholesky) fit with det S / (S11 S22) below this sits on the det = 0 boundary.
BOUNDARY_DET_RATIO = 1e-6
#: A setting with at least this many shots is weighted by its own spread; settings with fewer
#: use the spread pooled (in relative terms) over all repeated settings.
OWN_SPREAD_MIN_SHOTS = 5
#: Gauss-Hermite nodes used to average the transfer matrices over the momentum spread.
N_CHROMATIC_NODES = 9
#: Grid points on which the fitted sigma^2 curve is searched for its minimum.
N_WAIST_GRID = 801


@dataclass(frozen=True)
class BootstrapSummary:
    """Case-resampling bootstrap of the scan settings (Efron & Tibshirani 1993).

    Each sample redraws the N settings with replacement and re-solves the linear
    least squares; samples with fewer than 3 distinct settings or an unphysical
    beam matrix are rejected.  Percentiles are over accepted samples.
    """

    n_samples: int
    n_rejected: int
    fraction_rejected: float
    emittance_median_m_rad: float | None
    emittance_p16_m_rad: float | None
    emittance_p84_m_rad: float | None
    beta_median_m: float | None
    beta_p16_m: float | None
    beta_p84_m: float | None
    alpha_median: float | None
    alpha_p16: float | None
    alpha_p84: float | None


@dataclass(frozen=True)
class ThinLensCheck:
    """Thin-lens (parabola-method) result at the same reference point, as a cross-check.

    ``emittance_ratio`` is thin / thick emittance (``None`` if either is missing).
    """

    emittance_m_rad: float | None
    beta_m: float | None
    alpha: float | None
    emittance_ratio: float | None
    flags: tuple[str, ...] = ()


@dataclass(frozen=True)
class PlaneResult:
    """Emittance and Twiss parameters of one plane at the reference point.

    Attributes
    ----------
    plane : str
        ``"x"`` or ``"y"``.
    emittance_m_rad, emittance_err_m_rad : float or None
        rms geometric emittance and its 1-sigma uncertainty (linear propagation), m rad.
    norm_emittance_m_rad, norm_emittance_err_m_rad : float or None
        ``beta gamma * emittance`` and its uncertainty (includes the energy error), m rad.
    beta_m, beta_err_m : float or None
        Beta function, m.
    alpha, alpha_err : float or None
        Alpha (> 0 converging).
    gamma_per_m : float or None
        Twiss gamma, 1/m.
    sigma11_m2, sigma12_m, sigma22 : float or None
        Fitted beam matrix: <x^2> (m^2), <x x'> (m rad), <x'^2> (rad^2).
    cov : tuple of tuple or None
        3x3 covariance of ``(sigma11, sigma12, sigma22)``.
    bmag, bmag_err : float or None
        Mismatch parameter against the design Twiss, and its uncertainty.
    mismatch_factor : float or None
        Amplitude mismatch factor ``sqrt(B + sqrt(B^2 - 1)) - 1``.
    chi2_red : float or None
        chi^2 / (N - 3) with absolute weights (``None`` with relative weights or N = 3).
    dof : int
        N - 3 (N distinct settings).
    cond : float or None
        Condition number of the column-normalised weighted design matrix.
    n_points, n_settings : int
        Shots used and distinct settings.
    weights : str
        ``"absolute"`` (measured errors or shot spread) or ``"relative"`` (equal
        relative size errors assumed; covariance scaled by chi^2 / (N - 3)).
    chromatic_bias : float or None
        Relative emittance change due to the given energy spread (see ``message``).
    thin_lens : ThinLensCheck or None
    bootstrap : BootstrapSummary or None
    reference_point : str
    design_beta_m, design_alpha : float or None
        The design Twiss used for ``bmag``.
    flags : tuple of str
    message : str
    """

    plane: str
    emittance_m_rad: float | None = None
    emittance_err_m_rad: float | None = None
    norm_emittance_m_rad: float | None = None
    norm_emittance_err_m_rad: float | None = None
    beta_m: float | None = None
    beta_err_m: float | None = None
    alpha: float | None = None
    alpha_err: float | None = None
    gamma_per_m: float | None = None
    sigma11_m2: float | None = None
    sigma12_m: float | None = None
    sigma22: float | None = None
    cov: tuple[tuple[float, ...], ...] | None = None
    bmag: float | None = None
    bmag_err: float | None = None
    mismatch_factor: float | None = None
    chi2_red: float | None = None
    dof: int = 0
    cond: float | None = None
    n_points: int = 0
    n_settings: int = 0
    weights: str = "relative"
    chromatic_bias: float | None = None
    thin_lens: ThinLensCheck | None = None
    bootstrap: BootstrapSummary | None = None
    reference_point: str = "reference point"
    design_beta_m: float | None = None
    design_alpha: float | None = None
    flags: tuple[str, ...] = ()
    message: str = ""

    @property
    def ok(self) -> bool:
        """True when an emittance was obtained."""
        return self.emittance_m_rad is not None

    def sigma_matrix(self) -> np.ndarray | None:
        """The fitted 2x2 beam matrix, or ``None`` when there is no fit."""
        if self.sigma11_m2 is None:
            return None
        return np.array([[self.sigma11_m2, self.sigma12_m], [self.sigma12_m, self.sigma22]], dtype=float)

    def cov_matrix(self) -> np.ndarray | None:
        """The 3x3 covariance of ``(sigma11, sigma12, sigma22)`` as an array, or ``None``."""
        return None if self.cov is None else np.array(self.cov, dtype=float)


@dataclass(frozen=True)
class StepSize:
    """Beam sizes of one scan step as used in the fit.

    ``setting`` is the scanned value named by ``setting_name`` (``k1_per_m2``,
    ``field_T``) or the monitor name (``monitor``).  ``used_x``/``used_y`` say
    whether the plane's size entered the fit.
    """

    index: int
    setting_name: str
    setting: float | str
    sigma_x_m: float | None
    sigma_x_err_m: float | None
    sigma_y_m: float | None
    sigma_y_err_m: float | None
    used_x: bool = True
    used_y: bool = True
    flags: tuple[str, ...] = ()
    message: str = ""


@dataclass(frozen=True, eq=False)
class EmittanceResult:
    """Emittance measurement in both planes.

    ``kind`` is ``"quadrupole"``, ``"solenoid"`` or ``"multi_monitor"``; ``options``
    holds the analysis options (method, resolution, bootstrap size, ...).
    """

    name: str
    kind: str
    timestamp: Any
    x: PlaneResult
    y: PlaneResult
    kinematics: Kinematics | None
    steps: tuple[StepSize, ...] = ()
    flags: tuple[str, ...] = ()
    message: str = ""
    options: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True, eq=False)
class ScanOptics:
    """The optics of a scan: builds the transfer matrices for any setting.

    Attributes
    ----------
    kind : {"quadrupole", "solenoid", "multi_monitor"}
    method : {"thick", "thin"}
    length_m : float
        Magnet length (quadrupole, solenoid).
    transport_x, transport_y : ndarray (2, 2)
        Magnet exit -> monitor.
    brho_T_m : float
        Rigidity, to turn a solenoid field into ``K`` (solenoid scans).
    monitor_x, monitor_y : ndarray (n_monitors, 2, 2)
        Reference point -> monitor ``i`` (multi-monitor); the setting is the
        monitor's position in these stacks.
    """

    kind: str
    method: str = "thick"
    length_m: float = 0.0
    transport_x: np.ndarray | None = None
    transport_y: np.ndarray | None = None
    brho_T_m: float = 1.0
    monitor_x: np.ndarray | None = None
    monitor_y: np.ndarray | None = None

    @property
    def setting_name(self) -> str:
        return {"quadrupole": "k1_per_m2", "solenoid": "field_T"}.get(self.kind, "monitor")

    def matrices(self, plane: str, settings, delta: float = 0.0, *, method: str | None = None) -> np.ndarray:
        """Transfer matrices ``(n, 2, 2)`` reference point -> monitor for ``settings``.

        ``delta`` is a relative momentum offset: magnet strengths scale as
        ``(1 - delta)`` (linear chromaticity, METHODS 1.4); the fixed transport
        is taken as achromatic.
        """
        method = method or self.method
        s = np.atleast_1d(np.asarray(settings, dtype=float))
        transport = self.transport_x if plane == "x" else self.transport_y
        if self.kind == "quadrupole":
            k = s * (1.0 - delta) * (1.0 if plane == "x" else -1.0)
            lens = optics.quad_thick(k, self.length_m) if method == "thick" else optics.quad_thin_centred(k, self.length_m)
            return optics.compose(lens, transport)
        if self.kind == "solenoid":
            k = larmor_k(s, self.brho_T_m) * (1.0 - delta)
            return optics.compose(optics.solenoid_focusing(k, self.length_m), transport)
        stack = self.monitor_x if plane == "x" else self.monitor_y
        return np.asarray(stack, dtype=float)[s.astype(int)]


# ----------------------------------------------------------------------------------------------
# Pure pieces of the core


def design_rows(matrices) -> np.ndarray:
    """Rows ``(R11^2, 2 R11 R12, R12^2)`` of the measurement equation, shape ``(n, 3)``."""
    m = np.asarray(matrices, dtype=float)
    r11, r12 = m[..., 0, 0], m[..., 0, 1]
    return np.stack([r11 * r11, 2.0 * r11 * r12, r12 * r12], axis=-1)


def twiss_jacobian(s11: float, s12: float, s22: float) -> np.ndarray:
    """Jacobian ``d(eps, beta, alpha) / d(S11, S12, S22)`` (METHODS 1.4, derived analytically)."""
    eps = math.sqrt(s11 * s22 - s12 * s12)
    e3 = eps**3
    return np.array(
        [
            [s22 / (2 * eps), -s12 / eps, s11 / (2 * eps)],
            [1 / eps - s11 * s22 / (2 * e3), s11 * s12 / e3, -(s11 * s11) / (2 * e3)],
            [s12 * s22 / (2 * e3), -1 / eps - s12 * s12 / e3, s11 * s12 / (2 * e3)],
        ]
    )


def chromatic_rows(rows_at: Callable[[float], np.ndarray], energy_spread: float) -> np.ndarray:
    """Design rows averaged over a Gaussian momentum spread of rms ``energy_spread``.

    ``rows_at(delta)`` returns the rows at relative momentum offset ``delta``; the
    average uses probabilists' Gauss-Hermite quadrature with
    :data:`N_CHROMATIC_NODES` nodes (exact for rows polynomial in delta up to
    degree 17, e.g. the thin-lens model of METHODS 1.4).
    """
    nodes, weights = np.polynomial.hermite_e.hermegauss(N_CHROMATIC_NODES)
    weights = weights / weights.sum()
    return sum(w * rows_at(float(energy_spread) * x) for x, w in zip(nodes, weights, strict=True))


def thin_lens_parabola(k1_per_m2, sigma_m, *, length_m: float, drift_m: float, sigma_err_m=None) -> optics.Twiss:
    """Thin-lens parabola method: fit ``sigma^2(q) = a q^2 + b q + c`` and invert (METHODS 1.2).

    The quadrupole (integrated strength ``q = k1 L``) is a thin lens followed by a
    drift ``drift_m`` from its centre to the monitor; the result is at the lens::

        S11 = a / d^2,  S12 = -(b + 2 a / d) / (2 d^2),  S22 = (c - S11 - 2 d S12) / d^2

    Parameters
    ----------
    k1_per_m2, sigma_m : ndarray, shape (n,)
        Strengths and measured rms sizes (m), n >= 3.
    length_m, drift_m : float
    sigma_err_m : ndarray, optional
        Size errors; weights ``1 / (2 sigma dsigma)^2`` on sigma^2.

    Returns
    -------
    optics.Twiss
        Raises ``ValueError`` (from :func:`optics.twiss_from_sigma`) if unphysical.
    """
    q = np.asarray(k1_per_m2, dtype=float) * float(length_m)
    y = np.square(np.asarray(sigma_m, dtype=float))
    w = None
    if sigma_err_m is not None:
        # numpy.polyfit weights multiply the residuals: 1 / std(sigma^2)
        w = 1.0 / (2.0 * np.asarray(sigma_m, dtype=float) * np.asarray(sigma_err_m, dtype=float))
    a, b, c = np.polyfit(q, y, 2, w=w)
    d = float(drift_m)
    s11 = a / d**2
    s12 = -(b + 2.0 * a / d) / (2.0 * d**2)
    s22 = (c - s11 - 2.0 * d * s12) / d**2
    return optics.twiss_from_sigma([[s11, s12], [s12, s22]])


@dataclass
class _Prepared:
    """Per-setting data of one plane, ready for the solve."""

    rows: np.ndarray  # (N, 3)
    y: np.ndarray  # (N,) sigma^2 - sigma_res^2
    var: np.ndarray  # (N,) variance of y (ones when relative)
    absolute: bool
    settings: np.ndarray | None  # (N,)
    resolution: np.ndarray  # (N,)
    first: np.ndarray  # (N,) index of the first shot of each setting
    n_points: int
    spread_dof: float = math.inf  # dof of a pooled spread estimate behind the weights


def _group_points(matrices, sigma, sigma_err, resolution, resolution_err, groups, settings) -> _Prepared:
    n = sigma.shape[0]
    if groups is None:
        key = settings if settings is not None else matrices.reshape(n, -1)
        _, first, inverse = np.unique(np.asarray(key).reshape(n, -1), axis=0, return_index=True, return_inverse=True)
    else:
        _, first, inverse = np.unique(np.asarray(groups), return_index=True, return_inverse=True)
    inverse = np.asarray(inverse).reshape(-1)
    order = np.argsort(first)  # keep the settings in measurement order
    first = first[order]
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    inverse = rank[inverse]
    n_set = first.size
    sq = sigma * sigma
    counts = np.bincount(inverse, minlength=n_set).astype(float)
    mean_sq = np.bincount(inverse, weights=sq, minlength=n_set) / counts
    # shot-to-shot variance of sigma^2 (ddof = 1) where a setting has >= 2 shots
    dev2 = (sq - mean_sq[inverse]) ** 2
    shot_var = np.where(counts >= 2, np.bincount(inverse, weights=dev2, minlength=n_set) / np.maximum(counts - 1, 1), np.nan)
    emp = np.where(counts >= OWN_SPREAD_MIN_SHOTS, shot_var / counts, np.nan)
    # settings with fewer shots share the pooled relative spread of all repeated settings: a
    # variance from 2-4 shots is too noisy to weight a point by itself
    repeated = counts >= 2
    pool_dof = float(np.sum(counts[repeated] - 1))
    spread_dof = math.inf
    if pool_dof >= 2:
        pooled_rel = float(np.sum((counts[repeated] - 1) * shot_var[repeated] / mean_sq[repeated] ** 2) / pool_dof)
        few = counts < OWN_SPREAD_MIN_SHOTS
        emp[few] = pooled_rel * mean_sq[few] ** 2 / counts[few]
        if np.any(few) and sigma_err is None:
            spread_dof = pool_dof
    if sigma_err is not None:
        prop = np.bincount(inverse, weights=(2.0 * sigma * sigma_err) ** 2, minlength=n_set) / counts**2
    else:
        prop = np.full(n_set, np.nan)
    var = np.fmax(emp, prop)  # fmax ignores NaN; keeps the larger of spread and stated error
    res = resolution[first]
    res_err = resolution_err[first]
    absolute = bool(np.all(np.isfinite(var) & (var > 0)))
    if absolute:
        var = var + (2.0 * res * res_err) ** 2
    else:
        # relative weights: equal relative errors on sigma, Var(sigma^2) proportional to sigma^4
        var = np.maximum(mean_sq, np.finfo(float).tiny) ** 2
        var = var / var.mean()
    rows = np.stack([design_rows(matrices[inverse == g]).mean(axis=0) for g in range(n_set)])
    return _Prepared(
        rows=rows,
        y=mean_sq - res * res,
        var=var,
        absolute=absolute,
        settings=None if settings is None else settings[first],
        resolution=res,
        first=first,
        n_points=n,
        spread_dof=spread_dof,
    )


def _solve(rows: np.ndarray, y: np.ndarray, var: np.ndarray):
    """Weighted LSQ with column normalisation; returns s, cov (unscaled), chi2, cond, scaled system."""
    sw = 1.0 / np.sqrt(var)
    aw = rows * sw[:, None]
    yw = y * sw
    norms = np.linalg.norm(aw, axis=0)
    norms = np.where(norms > 0, norms, 1.0)
    an = aw / norms
    u, sv, vt = np.linalg.svd(an, full_matrices=False)
    cond = float(sv[0] / sv[-1]) if sv[-1] > 0 else math.inf
    if not math.isfinite(cond) or cond > 1e15:
        return None, None, None, cond, (an, yw, norms)
    sn = vt.T @ ((u.T @ yw) / sv)
    s = sn / norms
    cov = (vt.T / sv**2) @ vt / np.outer(norms, norms)
    chi2 = float(np.sum((yw - an @ sn) ** 2))
    return s, cov, chi2, cond, (an, yw, norms)


def _constrained(rows, y, var, start):
    """Cholesky-parametrised fit S = L L^T, L = [[l1, 0], [l2, l3]], l1, l3 >= 0 (METHODS 1.4)."""
    sw = 1.0 / np.sqrt(var)
    s11 = max(start[0], 1e-12 * max(abs(start[0]), abs(start[2]), 1e-30))
    s22 = max(start[2], 1e-12 * max(abs(start[0]), abs(start[2]), 1e-30))
    l1 = math.sqrt(s11)
    l2 = float(np.clip(start[1] / l1, -0.999 * math.sqrt(s22), 0.999 * math.sqrt(s22)))
    l3 = math.sqrt(max(s22 - l2 * l2, 1e-6 * s22))
    scale = np.array([l1, math.sqrt(s22), math.sqrt(s22)])

    def model(p):
        a, b, c = p * scale
        return np.array([a * a, a * b, b * b + c * c])

    def resid(p):
        return (rows @ model(p) - y) * sw

    fit = optimize.least_squares(
        resid,
        np.array([1.0, l2 / scale[1], l3 / scale[2]]),
        bounds=([0.0, -np.inf, 0.0], [np.inf, np.inf, np.inf]),
        method="trf",
        xtol=1e-14,
        ftol=1e-14,
        gtol=1e-14,
    )
    return model(fit.x), bool(fit.success)


def _twiss_of(s: np.ndarray):
    """(eps, beta, alpha, gamma) or None when S is not positive definite."""
    s11, s12, s22 = (float(v) for v in s)
    det = s11 * s22 - s12 * s12
    if not (s11 > 0 and s22 > 0 and det > 0):
        return None
    eps = math.sqrt(det)
    return eps, s11 / eps, -s12 / eps, s22 / eps


def _bootstrap(an, yw, norms, n_samples: int, seed) -> BootstrapSummary:
    """Vectorised case-resampling bootstrap: one stacked (B, 3, 3) solve."""
    rng = np.random.default_rng(seed)
    n = an.shape[0]
    b = int(n_samples)
    idx = rng.integers(0, n, size=(b, n))
    counts = np.bincount((idx + n * np.arange(b)[:, None]).ravel(), minlength=b * n).reshape(b, n).astype(float)
    normal = np.einsum("bn,ni,nj->bij", counts, an, an)
    rhs = np.einsum("bn,ni,n->bi", counts, an, yw)
    distinct = (counts > 0).sum(axis=1) >= 3
    # a resample with < 3 distinct settings is singular; give it a harmless matrix and reject it
    normal[~distinct] = np.eye(3)
    s = np.linalg.solve(normal, rhs[..., None])[..., 0] / norms
    s11, s12, s22 = s[:, 0], s[:, 1], s[:, 2]
    det = s11 * s22 - s12 * s12
    good = distinct & (s11 > 0) & (s22 > 0) & (det > 0)
    n_bad = int(b - good.sum())
    if not good.any():
        return BootstrapSummary(b, n_bad, n_bad / b, *([None] * 9))
    eps = np.sqrt(det[good])
    beta = s11[good] / eps
    alpha = -s12[good] / eps
    pct = [np.percentile(v, [50.0, 16.0, 84.0]) for v in (eps, beta, alpha)]
    return BootstrapSummary(b, n_bad, n_bad / b, *(float(v) for p in pct for v in p))


def _plain_result(plane: str, reference_point: str, flags, message: str, **values) -> PlaneResult:
    return PlaneResult(plane=plane, reference_point=reference_point, flags=merge_flags(flags), message=message, **values)


def _waist_check(settings: np.ndarray, optics_model, plane: str, s: np.ndarray) -> str | None:
    """Reason the scan misses the waist, or ``None``: the minimum of the fitted sigma^2 curve
    over the scanned range lies at its edge, or fewer than 2 settings lie on one side of it."""
    lo, hi = float(settings.min()), float(settings.max())
    if not hi > lo:
        return "all settings equal"
    grid = np.linspace(lo, hi, N_WAIST_GRID)
    curve = design_rows(optics_model(plane, grid)) @ s
    i = int(np.argmin(curve))
    if i == 0 or i == grid.size - 1:
        return f"the fitted size is smallest at the scan edge ({grid[i]:.4g})"
    below = int(np.sum(settings < grid[i]))
    above = int(np.sum(settings > grid[i]))
    if below < 2 or above < 2:
        return f"only {min(below, above)} setting(s) on one side of the minimum at {grid[i]:.4g}"
    return None


# ----------------------------------------------------------------------------------------------
# The core


def fit_sigma_matrix(
    matrices,
    sigma_m,
    sigma_err_m=None,
    *,
    resolution_m=0.0,
    resolution_err_m=0.0,
    groups=None,
    bootstrap: int = 0,
    seed=None,
    constrained: bool = False,
    kinematics: Kinematics | None = None,
    kinetic_energy_err_MeV: float = 0.0,
    design: DesignTwiss | None = None,
    energy_spread: float | None = None,
    chromatic: str = "estimate",
    settings=None,
    optics_model: Callable[..., np.ndarray] | None = None,
    point_flags: Sequence[Sequence[str]] | None = None,
    plane: str = "x",
    reference_point: str = "reference point",
) -> PlaneResult:
    """Beam matrix at the reference point from sizes measured through known optics.

    Weighted linear least squares for ``s = (S11, S12, S22)`` (METHODS 1.3), with
    the monitor resolution subtracted in quadrature, shots of one setting averaged
    in sigma^2, covariance, condition number and linear propagation to
    (emittance, beta, alpha) with the analytic Jacobian (METHODS 1.4).

    Parameters
    ----------
    matrices : ndarray, shape (n, 2, 2)
        Transfer matrix reference point -> monitor for each shot.
    sigma_m : ndarray, shape (n,)
        Measured rms sizes, m.  Non-finite entries are skipped.
    sigma_err_m : ndarray, shape (n,), optional
        1-sigma size errors, m; ``Var(sigma^2) = (2 sigma dsigma)^2``.  Without them
        (and without repeated shots) weights are relative: equal relative size
        errors, covariance scaled by chi^2 / (N - 3).
    resolution_m, resolution_err_m : float or ndarray (n,)
        Monitor resolution (Gaussian point-spread rms) and its uncertainty, m.
    groups : ndarray (n,), optional
        Setting label of each shot; default: equal ``settings`` (or equal matrices).
        Shots of one setting are averaged in sigma^2 and their spread gives
        Var(sigma^2): a setting's own spread when it has at least
        :data:`OWN_SPREAD_MIN_SHOTS` shots, otherwise the relative spread pooled
        over all repeated settings (which then also weights single shots).  The
        larger of spread and stated errors is used.
    bootstrap : int
        Number of case-resampling bootstrap samples (0: none).
    seed : int or numpy Generator, optional
    constrained : bool
        If the linear solution is not positive definite, refit with
        ``S = L L^T`` (``scipy.optimize.least_squares``) and report that matrix.
        The objective is convex in ``S`` and the positive semi-definite matrices
        form a convex set, so such a refit normally ends on the ``det S = 0``
        boundary; it is then still flagged ``unphysical`` (no emittance), and the
        constrained matrix shows the nearest physical beam.
    kinematics : Kinematics, optional
        For the normalised emittance; ``kinetic_energy_err_MeV`` adds the
        ``beta gamma`` uncertainty.
    design : DesignTwiss, optional
        Design Twiss at the reference point, for ``bmag``.
    energy_spread : float, optional
        rms relative momentum spread sigma_delta.  Needs ``settings`` and
        ``optics_model``.  ``chromatic="estimate"`` reports the relative emittance
        bias a linear fit suffers from it; ``"correct"`` fits the
        momentum-averaged model instead and reports the bias it removed.
    settings : ndarray (n,), optional
        Scanned value of each shot (k1, field); enables the waist check.
    optics_model : callable, optional
        ``optics_model(plane, settings, delta=0.0) -> (m, 2, 2)`` (e.g.
        :meth:`ScanOptics.matrices`).
    point_flags : sequence of tuple of str, optional
        Flags of the profile/image behind each shot; merged into the result.
    plane, reference_point : str

    Returns
    -------
    PlaneResult

    Examples
    --------
    Screens 0, 1, 2 and 3 m behind the reference point (METHODS 6.4 case 3):

    >>> r = fit_sigma_matrix(optics.drift(np.array([0.0, 1.0, 2.0, 3.0])),
    ...                      np.sqrt([1.0e-5, 1.22e-5, 1.48e-5, 1.78e-5]))
    >>> round(r.emittance_m_rad * 1e6, 9), round(r.beta_m, 9), round(r.alpha, 9)
    (1.0, 10.0, -1.0)
    """
    if chromatic not in CHROMATIC_MODES:
        raise ValueError(f"chromatic must be one of {CHROMATIC_MODES}, got {chromatic!r}")
    mats = np.asarray(matrices, dtype=float)
    sig = np.asarray(sigma_m, dtype=float).reshape(-1)
    n_all = sig.size
    if mats.shape != (n_all, 2, 2):
        raise ValueError(f"matrices must have shape ({n_all}, 2, 2), got {mats.shape}")
    err = None if sigma_err_m is None else np.broadcast_to(np.asarray(sigma_err_m, dtype=float), (n_all,))
    res = np.broadcast_to(np.asarray(resolution_m, dtype=float), (n_all,))
    res_err = np.broadcast_to(np.asarray(resolution_err_m, dtype=float), (n_all,))
    sets = None if settings is None else np.broadcast_to(np.asarray(settings, dtype=float), (n_all,))
    grp = None if groups is None else np.asarray(groups).reshape(-1)
    notes: list[str] = []
    flags: list[str] = []
    if point_flags is not None:
        step_flags = [f for fl in point_flags for f in fl if f in FLAGS]
        flagged = [i for i, fl in enumerate(point_flags) if any(f in FLAGS for f in fl)]
        if step_flags:
            flags.extend(step_flags)
            notes.append(f"step flags ({', '.join(merge_flags(step_flags))}) at shots {flagged}")
    keep = np.isfinite(sig) & (sig > 0) & np.all(np.isfinite(mats), axis=(1, 2))
    if err is not None:
        bad_err = ~(np.isfinite(err) & (err >= 0))
        if np.any(bad_err & keep):
            err = np.where(bad_err, np.nan, err)
    if not np.all(keep):
        notes.append(f"{int((~keep).sum())} shot(s) without a usable size skipped")
    mats, sig, res, res_err = mats[keep], sig[keep], res[keep], res_err[keep]
    if err is not None:
        err = err[keep]
        if not np.all(np.isfinite(err)):
            err = None
            notes.append("some size errors missing: relative weights used")
    if sets is not None:
        sets = sets[keep]
    if grp is not None:
        grp = grp[keep]
    base: dict[str, Any] = {"n_points": int(sig.size)}
    design_vals = {}
    if design is not None:
        design_vals = {"design_beta_m": float(design.beta_m), "design_alpha": float(design.alpha)}
    if sig.size == 0:
        return _plain_result(plane, reference_point, [*flags, "too_few_points"], "; ".join([*notes, "no usable sizes"]), **base, **design_vals)

    prep = _group_points(mats, sig, err, res, res_err, grp, sets)
    n_set = prep.rows.shape[0]
    base["n_settings"] = n_set
    base["weights"] = "absolute" if prep.absolute else "relative"
    if np.any(prep.resolution > 0):
        limited = prep.y < (RESOLUTION_FACTOR * prep.resolution) ** 2
        if np.any(limited):
            flags.append("resolution_limited")
            notes.append(f"{int(limited.sum())} setting(s) with beam size below {RESOLUTION_FACTOR:g}x the resolution")
    if n_set < 3:
        flags.append("too_few_points")
        notes.append(f"{n_set} distinct setting(s); at least 3 are needed")
        return _plain_result(plane, reference_point, flags, "; ".join(notes), **base, **design_vals)

    rows = prep.rows
    chrom_rows = None
    if energy_spread:
        if optics_model is None or prep.settings is None:
            notes.append("energy spread given but the optics have no chromatic model: not included")
        else:
            chrom_rows = chromatic_rows(lambda d: design_rows(optics_model(plane, prep.settings, d)), energy_spread)
            if chromatic == "correct":
                rows = chrom_rows

    s, cov, chi2, cond, scaled = _solve(rows, prep.y, prep.var)
    if s is None:
        flags.extend(["ill_conditioned", "fit_failed"])
        notes.append("the settings do not determine the beam matrix (singular system)")
        return _plain_result(plane, reference_point, flags, "; ".join(notes), cond=cond, **base, **design_vals)
    dof = n_set - 3
    base.update(dof=dof, cond=cond)
    if cond > ILL_CONDITIONED:
        flags.append("ill_conditioned")
        notes.append(f"cond = {cond:.3g} (> {ILL_CONDITIONED:g}): the scan barely constrains the beam matrix")
    chi2_red = None
    if dof > 0:
        if prep.absolute:
            chi2_red = chi2 / dof
            tails = [(1 - POOR_FIT_CONFIDENCE) / 2, (1 + POOR_FIT_CONFIDENCE) / 2]
            if math.isfinite(prep.spread_dof):
                # weights from a pooled spread estimate: chi2_red follows F(dof, spread_dof)
                lo, hi = stats.f.ppf(tails, dof, prep.spread_dof) * dof
            else:
                lo, hi = stats.chi2.ppf(tails, dof)
            if chi2 < lo or chi2 > hi:
                flags.append("poor_fit")
                notes.append(f"reduced chi-square {chi2_red:.3g} outside the {POOR_FIT_CONFIDENCE:.1%} interval for {dof} dof")
        else:
            cov = cov * (chi2 / dof)
    elif not prep.absolute:
        cov = None
        notes.append("exact solve with relative weights: no uncertainty estimate")

    constrained_note = None
    on_boundary = False
    tw = _twiss_of(s)
    if tw is None and constrained:
        s_c, success = _constrained(rows, prep.y, prep.var, s)
        det_ratio = (s_c[0] * s_c[2] - s_c[1] ** 2) / (s_c[0] * s_c[2]) if s_c[0] > 0 and s_c[2] > 0 else 0.0
        if success:
            s = s_c
            chi2_c = float(np.sum((rows @ s - prep.y) ** 2 / prep.var))
            if chi2_red is not None:
                chi2_red = chi2_c / dof
            if det_ratio > BOUNDARY_DET_RATIO:
                tw = _twiss_of(s)
                constrained_note = "linear solution not positive definite; Cholesky-constrained fit used"
            else:
                on_boundary = True
                notes.append("linear solution not positive definite and the Cholesky-constrained fit sits on the det = 0 boundary (emittance consistent with zero)")
        else:
            notes.append("the Cholesky-constrained fit did not converge")

    if optics_model is not None and prep.settings is not None:
        reason = _waist_check(prep.settings, optics_model, plane, s)
        if reason:
            flags.append("waist_not_crossed")
            notes.append(f"waist not crossed: {reason}")

    values: dict[str, Any] = dict(
        sigma11_m2=float(s[0]),
        sigma12_m=float(s[1]),
        sigma22=float(s[2]),
        cov=None if cov is None else tuple(tuple(float(v) for v in r) for r in cov),
        chi2_red=chi2_red,
        **base,
        **design_vals,
    )
    if constrained_note:
        notes.append(constrained_note)
    if tw is None:
        flags.append("unphysical")
        det = s[0] * s[2] - s[1] ** 2
        if not on_boundary:
            notes.append(f"fitted beam matrix not positive definite (S11={s[0]:.3g} m^2, S22={s[2]:.3g}, det={det:.3g}): no emittance")
        if bootstrap:
            values["bootstrap"] = _bootstrap(scaled[0], scaled[1], scaled[2], bootstrap, seed)
        return _plain_result(plane, reference_point, flags, "; ".join(notes), **values)

    eps, beta, alpha, gamma = tw
    values.update(emittance_m_rad=eps, beta_m=beta, alpha=alpha, gamma_per_m=gamma)
    cov_eba = None
    if cov is not None:
        jac = twiss_jacobian(*s)
        cov_eba = jac @ cov @ jac.T
        e_err, b_err, a_err = (float(math.sqrt(max(v, 0.0))) for v in np.diag(cov_eba))
        values.update(emittance_err_m_rad=e_err, beta_err_m=b_err, alpha_err=a_err)
    if kinematics is not None:
        bg = kinematics.beta_gamma
        values["norm_emittance_m_rad"] = bg * eps
        if cov_eba is not None:
            rel_bg = beta_gamma_err(kinematics, kinetic_energy_err_MeV) / bg
            values["norm_emittance_err_m_rad"] = bg * eps * math.hypot(values["emittance_err_m_rad"] / eps, rel_bg)
    if design is not None:
        b0, a0 = float(design.beta_m), float(design.alpha)
        bm = float(optics.bmag(beta, alpha, b0, a0))
        values["bmag"] = bm
        values["mismatch_factor"] = float(optics.mismatch_factor(bm))
        if cov_eba is not None:
            grad = np.array(optics.bmag_gradient(beta, alpha, b0, a0))
            values["bmag_err"] = float(math.sqrt(max(grad @ cov_eba[1:, 1:] @ grad, 0.0)))
    if chrom_rows is not None:
        if chromatic == "correct":
            s_naive, *_ = _solve(prep.rows, prep.y, prep.var)
            tw_naive = None if s_naive is None else _twiss_of(s_naive)
            if tw_naive is not None:
                values["chromatic_bias"] = tw_naive[0] / eps - 1.0
                notes.append(f"energy spread {energy_spread:.3g}: chromatic model fitted; a linear fit would be {values['chromatic_bias']:+.2%} off")
        else:
            # data as the fitted beam would give them with the spread, refitted with the linear model
            s_biased, *_ = _solve(prep.rows, chrom_rows @ s, prep.var)
            tw_b = None if s_biased is None else _twiss_of(s_biased)
            if tw_b is not None:
                values["chromatic_bias"] = tw_b[0] / eps - 1.0
                notes.append(f"energy spread {energy_spread:.3g}: estimated chromatic bias of the emittance {values['chromatic_bias']:+.2%}")
    if bootstrap:
        values["bootstrap"] = _bootstrap(scaled[0], scaled[1], scaled[2], bootstrap, seed)
    return _plain_result(plane, reference_point, flags, "; ".join(notes), **values)


# ----------------------------------------------------------------------------------------------
# Front-ends


def _check_method(method: str) -> None:
    if method not in EMITTANCE_METHODS:
        raise InputError(f"method: expected one of {', '.join(EMITTANCE_METHODS)}, got {method!r}")


def _as_array(values, n: int | None = None, name: str = "values") -> np.ndarray:
    if values is None:
        return np.full(n or 0, np.nan)
    arr = np.array([np.nan if v is None else v for v in np.atleast_1d(np.asarray(values, dtype=object))], dtype=float)
    if n is not None and arr.size != n:
        raise ValueError(f"{name} has {arr.size} entries, expected {n}")
    return arr


def _combine(
    name: str,
    kind: str,
    timestamp: Any,
    x: PlaneResult,
    y: PlaneResult,
    kin: Kinematics | None,
    steps: tuple[StepSize, ...],
    options: Mapping[str, Any],
    extra_flags: Sequence[str] = (),
    extra_notes: Sequence[str] = (),
) -> EmittanceResult:
    notes = list(extra_notes)
    notes += [f"{p.plane}: {p.message}" for p in (x, y) if p.message]
    return EmittanceResult(
        name=name,
        kind=kind,
        timestamp=timestamp,
        x=x,
        y=y,
        kinematics=kin,
        steps=steps,
        flags=merge_flags(extra_flags, x.flags, y.flags),
        message="; ".join(notes),
        options=dict(options),
    )


def _plane_flags(step_flags, n: int):
    if step_flags is None:
        return None
    if len(step_flags) != n:
        raise ValueError(f"step flags have {len(step_flags)} entries, expected {n}")
    return [tuple(f) for f in step_flags]


def _scan_front_end(
    scan: ScanOptics,
    settings,
    sigma_x_m,
    sigma_y_m,
    *,
    sigma_x_err_m,
    sigma_y_err_m,
    kin: Kinematics | None,
    resolution_m,
    resolution_err_m,
    design,
    energy_spread,
    chromatic,
    bootstrap,
    seed,
    constrained,
    kinetic_energy_err_MeV,
    step_flags_x,
    step_flags_y,
    step_labels,
    name,
    timestamp,
    options,
    thin_check: bool,
    extra_flags=(),
    extra_notes=(),
) -> EmittanceResult:
    settings = np.asarray(settings, dtype=float).reshape(-1)
    n = settings.size
    sx, sy = _as_array(sigma_x_m, n, "sigma_x_m"), _as_array(sigma_y_m, n, "sigma_y_m")
    ex = None if sigma_x_err_m is None else _as_array(sigma_x_err_m, n, "sigma_x_err_m")
    ey = None if sigma_y_err_m is None else _as_array(sigma_y_err_m, n, "sigma_y_err_m")
    design = design or {}
    ref = REFERENCE_POINTS.get(scan.kind, "reference point")
    # one generator for both planes: reproducible, and x and y draw different resamples
    rng = np.random.default_rng(seed) if bootstrap else None
    planes = {}
    for plane, sig, err, pflags in (
        ("x", sx, ex, _plane_flags(step_flags_x, n)),
        ("y", sy, ey, _plane_flags(step_flags_y, n)),
    ):
        res_plane = resolution_m[plane] if isinstance(resolution_m, Mapping) else resolution_m
        is_multi = scan.kind == "multi_monitor"
        result = fit_sigma_matrix(
            scan.matrices(plane, settings),
            sig,
            err,
            resolution_m=res_plane,
            resolution_err_m=resolution_err_m,
            bootstrap=bootstrap,
            seed=rng,
            constrained=constrained,
            kinematics=kin,
            kinetic_energy_err_MeV=kinetic_energy_err_MeV,
            design=design.get(plane),
            energy_spread=None if is_multi else energy_spread,
            chromatic=chromatic,
            # shots at one monitor are one setting: group by monitor name (or by matrix)
            groups=(None if step_labels is None else [str(v) for v in step_labels]) if is_multi else None,
            settings=None if is_multi else settings,
            optics_model=None if is_multi else scan.matrices,
            point_flags=pflags,
            plane=plane,
            reference_point=ref,
        )
        if is_multi and energy_spread:
            result = dataclasses.replace(
                result, message="; ".join(filter(None, [result.message, "energy spread not modelled for fixed optics"]))
            )
        if thin_check and scan.kind == "quadrupole":
            other = "thin" if scan.method == "thick" else None
            if other:
                thin = fit_sigma_matrix(
                    scan.matrices(plane, settings, method="thin"),
                    sig,
                    err,
                    resolution_m=res_plane,
                    resolution_err_m=resolution_err_m,
                    settings=settings,
                    plane=plane,
                    reference_point=ref,
                )
                ratio = None
                if thin.emittance_m_rad is not None and result.emittance_m_rad is not None:
                    ratio = thin.emittance_m_rad / result.emittance_m_rad
                result = dataclasses.replace(
                    result,
                    thin_lens=ThinLensCheck(thin.emittance_m_rad, thin.beta_m, thin.alpha, ratio, thin.flags),
                )
        planes[plane] = result
    steps = []
    labels = step_labels if step_labels is not None else settings.tolist()
    for i in range(n):
        fl = merge_flags(
            () if step_flags_x is None else step_flags_x[i],
            () if step_flags_y is None else step_flags_y[i],
        )
        steps.append(
            StepSize(
                index=i,
                setting_name=scan.setting_name,
                setting=labels[i],
                sigma_x_m=None if not np.isfinite(sx[i]) else float(sx[i]),
                sigma_x_err_m=None if ex is None or not np.isfinite(ex[i]) else float(ex[i]),
                sigma_y_m=None if not np.isfinite(sy[i]) else float(sy[i]),
                sigma_y_err_m=None if ey is None or not np.isfinite(ey[i]) else float(ey[i]),
                used_x=bool(np.isfinite(sx[i]) and sx[i] > 0),
                used_y=bool(np.isfinite(sy[i]) and sy[i] > 0),
                flags=fl,
            )
        )
    opts = {
        "method": scan.method,
        "bootstrap": int(bootstrap),
        "seed": seed if isinstance(seed, (int, type(None))) else "generator",
        "constrained": bool(constrained),
        "energy_spread": energy_spread,
        "chromatic": chromatic,
        "kinetic_energy_err_MeV": kinetic_energy_err_MeV,
        "resolution_m": dict(resolution_m) if isinstance(resolution_m, Mapping) else np.asarray(resolution_m).tolist(),
    }
    opts.update(options or {})
    return _combine(name, scan.kind, timestamp, planes["x"], planes["y"], kin, tuple(steps), opts, extra_flags, extra_notes)


_COMMON_DOC = """
    sigma_x_err_m, sigma_y_err_m : ndarray (n,), optional
        1-sigma size errors, m.
    kinematics : Kinematics
        Beam kinematics (normalised emittance; solenoid K).
    resolution_m : float, ndarray (n,) or mapping plane -> value
        Monitor resolution subtracted in quadrature, m.
    design : mapping plane -> DesignTwiss, optional
        Design Twiss at the reference point (``bmag``).
    energy_spread, chromatic, bootstrap, seed, constrained, kinetic_energy_err_MeV
        See :func:`fit_sigma_matrix`.
    step_flags_x, step_flags_y : sequence of tuple of str, optional
        Flags of the profile/image behind each step.
    name, timestamp, options
        Copied into the result (``options`` merged into the analysis options).

    Returns
    -------
    EmittanceResult
"""


def analyze_quad_scan(
    k1_per_m2,
    sigma_x_m,
    sigma_y_m,
    *,
    length_m: float,
    transport_x,
    transport_y,
    kinematics: Kinematics | None,
    sigma_x_err_m=None,
    sigma_y_err_m=None,
    method: str = "thick",
    resolution_m=0.0,
    resolution_err_m=0.0,
    design: Mapping[str, DesignTwiss] | None = None,
    energy_spread: float | None = None,
    chromatic: str = "estimate",
    bootstrap: int = 0,
    seed=None,
    constrained: bool = False,
    kinetic_energy_err_MeV: float = 0.0,
    step_flags_x=None,
    step_flags_y=None,
    name: str = "",
    timestamp: Any = None,
    options: Mapping[str, Any] | None = None,
) -> EmittanceResult:
    """Quadrupole-scan emittance in x and y at the quadrupole entrance.

    ``R = transport . Q(k, L)`` with the thick hard-edge quadrupole
    (``method="thick"``) or the centred thin lens (``"thin"``); ``k = k1`` in x
    and ``-k1`` in y.  With the thick method the thin-lens result is attached as
    ``thin_lens`` to each plane.

    Parameters
    ----------
    k1_per_m2 : ndarray, shape (n,)
        Quadrupole strength of each shot (> 0 focuses x), m^-2; repeated values
        are shots of one setting.
    sigma_x_m, sigma_y_m : ndarray, shape (n,)
        Measured rms sizes at the monitor, m (NaN where a plane is missing).
    length_m : float
        Effective quadrupole length, m.
    transport_x, transport_y : array_like (2, 2)
        Quadrupole exit -> monitor.
    """
    _check_method(method)
    scan = ScanOptics(
        "quadrupole",
        method=method,
        length_m=float(length_m),
        transport_x=optics.general(transport_x),
        transport_y=optics.general(transport_y),
    )
    return _scan_front_end(
        scan, k1_per_m2, sigma_x_m, sigma_y_m,
        sigma_x_err_m=sigma_x_err_m, sigma_y_err_m=sigma_y_err_m, kin=kinematics,
        resolution_m=resolution_m, resolution_err_m=resolution_err_m, design=design,
        energy_spread=energy_spread, chromatic=chromatic, bootstrap=bootstrap, seed=seed,
        constrained=constrained, kinetic_energy_err_MeV=kinetic_energy_err_MeV,
        step_flags_x=step_flags_x, step_flags_y=step_flags_y, step_labels=None,
        name=name, timestamp=timestamp, options=options, thin_check=True,
    )  # fmt: skip


analyze_quad_scan.__doc__ = (analyze_quad_scan.__doc__ or "") + _COMMON_DOC


def analyze_solenoid_scan(
    field_T,
    sigma_x_m,
    sigma_y_m,
    *,
    length_m: float,
    transport_x,
    transport_y,
    kinematics: Kinematics,
    sigma_x_err_m=None,
    sigma_y_err_m=None,
    resolution_m=0.0,
    resolution_err_m=0.0,
    design: Mapping[str, DesignTwiss] | None = None,
    energy_spread: float | None = None,
    chromatic: str = "estimate",
    bootstrap: int = 0,
    seed=None,
    constrained: bool = False,
    kinetic_energy_err_MeV: float = 0.0,
    step_flags_x=None,
    step_flags_y=None,
    name: str = "",
    timestamp: Any = None,
    options: Mapping[str, Any] | None = None,
) -> EmittanceResult:
    """Solenoid-scan emittance of a round beam, at the solenoid entrance (METHODS 2.2).

    A rotation leaves the projected second moments of a round, uncoupled beam
    unchanged, so each plane uses ``R = transport . F2(K)`` with
    ``K = B0 / (2 B rho)``.

    Parameters
    ----------
    field_T : ndarray, shape (n,)
        Peak (hard-edge) solenoid field of each shot, T.
    sigma_x_m, sigma_y_m : ndarray, shape (n,)
        Measured rms sizes, m.
    length_m : float
        Effective solenoid length, m.
    transport_x, transport_y : array_like (2, 2)
        Solenoid exit -> monitor.
    """
    scan = ScanOptics(
        "solenoid",
        length_m=float(length_m),
        transport_x=optics.general(transport_x),
        transport_y=optics.general(transport_y),
        brho_T_m=float(kinematics.brho_T_m),
    )
    return _scan_front_end(
        scan, field_T, sigma_x_m, sigma_y_m,
        sigma_x_err_m=sigma_x_err_m, sigma_y_err_m=sigma_y_err_m, kin=kinematics,
        resolution_m=resolution_m, resolution_err_m=resolution_err_m, design=design,
        energy_spread=energy_spread, chromatic=chromatic, bootstrap=bootstrap, seed=seed,
        constrained=constrained, kinetic_energy_err_MeV=kinetic_energy_err_MeV,
        step_flags_x=step_flags_x, step_flags_y=step_flags_y, step_labels=None,
        name=name, timestamp=timestamp, options=options, thin_check=False,
    )  # fmt: skip


analyze_solenoid_scan.__doc__ = (analyze_solenoid_scan.__doc__ or "") + _COMMON_DOC


def analyze_multi_monitor(
    matrices_x,
    matrices_y,
    sigma_x_m,
    sigma_y_m,
    *,
    kinematics: Kinematics | None,
    monitor_names: Sequence[str] | None = None,
    sigma_x_err_m=None,
    sigma_y_err_m=None,
    resolution_m=0.0,
    resolution_err_m=0.0,
    design: Mapping[str, DesignTwiss] | None = None,
    bootstrap: int = 0,
    seed=None,
    constrained: bool = False,
    kinetic_energy_err_MeV: float = 0.0,
    step_flags_x=None,
    step_flags_y=None,
    reference_point: str = "reference point",
    name: str = "",
    timestamp: Any = None,
    options: Mapping[str, Any] | None = None,
) -> EmittanceResult:
    """Emittance from several monitors at fixed optics (METHODS 2.1).

    Parameters
    ----------
    matrices_x, matrices_y : ndarray, shape (n, 2, 2)
        Reference point -> monitor of each measurement (one row per shot; shots at
        the same monitor share a matrix).
    sigma_x_m, sigma_y_m : ndarray, shape (n,)
        Measured rms sizes, m.
    monitor_names : sequence of str, optional
        Monitor of each shot, for the step list.
    resolution_m : float or ndarray (n,)
        Resolution of each shot's monitor, m.
    reference_point : str
        Where the matrices start (e.g. ``"WS-01"``).
    """
    mx = np.asarray(matrices_x, dtype=float)
    my = np.asarray(matrices_y, dtype=float)
    n = mx.shape[0]
    if mx.shape != (n, 2, 2) or my.shape != (n, 2, 2):
        raise ValueError(f"matrices_x and matrices_y must both have shape (n, 2, 2), got {mx.shape} and {my.shape}")
    scan = ScanOptics("multi_monitor", monitor_x=mx, monitor_y=my)
    if monitor_names is not None:
        labels = [str(v) for v in monitor_names]
    else:  # shots with the same matrices in both planes are taken to be at the same monitor
        _, inverse = np.unique(np.concatenate([mx.reshape(n, 4), my.reshape(n, 4)], axis=1), axis=0, return_inverse=True)
        labels = [f"monitor {int(j)}" for j in np.asarray(inverse).reshape(-1)]
    result = _scan_front_end(
        scan, np.arange(n, dtype=float), sigma_x_m, sigma_y_m,
        sigma_x_err_m=sigma_x_err_m, sigma_y_err_m=sigma_y_err_m, kin=kinematics,
        resolution_m=resolution_m, resolution_err_m=resolution_err_m, design=design,
        energy_spread=None, chromatic="estimate", bootstrap=bootstrap, seed=seed,
        constrained=constrained, kinetic_energy_err_MeV=kinetic_energy_err_MeV,
        step_flags_x=step_flags_x, step_flags_y=step_flags_y, step_labels=labels,
        name=name, timestamp=timestamp, options=options, thin_check=False,
    )  # fmt: skip
    if reference_point != REFERENCE_POINTS["multi_monitor"]:
        result = dataclasses.replace(
            result,
            x=dataclasses.replace(result.x, reference_point=reference_point),
            y=dataclasses.replace(result.y, reference_point=reference_point),
        )
    return result


analyze_multi_monitor.__doc__ = (analyze_multi_monitor.__doc__ or "") + _COMMON_DOC


# ----------------------------------------------------------------------------------------------
# Scans as loaded from a folder


def scan_optics(spec: ScanSpec, *, method: str = "thick", kin: Kinematics | None = None) -> ScanOptics:
    """The :class:`ScanOptics` of a loaded scan (matrices for any setting).

    For a multi-monitor measurement the setting of step ``i`` is ``i`` and the
    stacks hold each step's monitor matrices.
    """
    _check_method(method)
    where = spec.folder or spec.name or "scan"
    if spec.kind == "multi_monitor":
        by_name = {m.name: m for m in spec.monitors}
        mx, my = [], []
        for step in spec.steps:
            mon = by_name.get(step.monitor or "")
            if mon is None:
                raise InputError(f"{where}: step {step.index}: 'monitor' {step.monitor!r} is not in 'monitors'")
            if mon.matrix_x is None or mon.matrix_y is None:
                raise InputError(f"{where}: monitor {mon.name!r}: 'matrix_x' and 'matrix_y' are required")
            mx.append(optics.general(mon.matrix_x))
            my.append(optics.general(mon.matrix_y))
        shape = (0, 2, 2)
        return ScanOptics(
            "multi_monitor",
            method=method,
            monitor_x=np.array(mx).reshape(-1, 2, 2) if mx else np.zeros(shape),
            monitor_y=np.array(my).reshape(-1, 2, 2) if my else np.zeros(shape),
        )
    if spec.magnet is None:
        raise InputError(f"{where}: scan.json: a '{spec.kind}' block with 'length_m' is required")
    if spec.transport_x is None or spec.transport_y is None:
        raise InputError(f"{where}: scan.json: 'transport' (drift_m or matrix_x/matrix_y) is required")
    kin = kin or particles.kinematics(spec.kinetic_energy_MeV, spec.particle)
    return ScanOptics(
        spec.kind,
        method=method,
        length_m=float(spec.magnet.length_m),
        transport_x=optics.general(spec.transport_x),
        transport_y=optics.general(spec.transport_y),
        brho_T_m=float(kin.brho_T_m),
    )


def _profile_size(profile, *, profile_model: str, size_source: str):
    """(sigma_m, sigma_err_m, flags, note) of one wire profile via diagnostics.profiles."""
    # imported here: the profile module is only needed for steps with raw profiles
    from diagnostics import profiles

    res = profiles.analyze_profile(profile.position_m, profile.signal, model=profile_model)
    return _pick_size(res, "", size_source)


def _pick_size(res, suffix: str, size_source: str):
    """Pick the fitted sigma or the rms (and their errors) from a profile/image result."""
    flags = tuple(f for f in getattr(res, "flags", ()) if f in FLAGS)
    if size_source == "rms" and hasattr(res, f"rms{suffix}_m"):
        value = getattr(res, f"rms{suffix}_m", None)
        err = getattr(res, f"rms{suffix}_err_m", None)
    else:  # image sizes are rms moments already
        value = getattr(res, f"sigma{suffix}_m", None)
        err = getattr(res, f"sigma{suffix}_err_m", None)
    usable = value is not None and math.isfinite(value) and value > 0 and "fit_failed" not in flags
    note = "" if usable else (getattr(res, "message", "") or "no usable size")
    if not usable:
        value, err = None, None
    return value, err, flags, note


def _step_sizes(step, *, profile_model: str, size_source: str):
    """Sizes of one step: ((sx, ex, fx), (sy, ey, fy), note)."""
    notes = []
    out = {}
    if step.frame is not None:
        from diagnostics import images

        fr = step.frame
        res = images.analyze_image(fr.pixels, pixel_size_m=fr.pixel_size_m, dark=fr.dark, bit_depth=fr.bit_depth, roi=fr.roi)
        for plane in ("x", "y"):
            out[plane] = _pick_size(res, f"_{plane}", size_source)
    for plane in ("x", "y"):
        prof = getattr(step, f"profile_{plane}")
        given = getattr(step, f"sigma_{plane}_m")
        if given is not None:
            out[plane] = (float(given), getattr(step, f"sigma_{plane}_err_m"), (), "")
        elif prof is not None:
            out[plane] = _profile_size(prof, profile_model=profile_model, size_source=size_source)
        out.setdefault(plane, (None, None, (), "no size for this plane"))
        if out[plane][3]:
            notes.append(f"{plane}: {out[plane][3]}")
    return out["x"], out["y"], "; ".join(notes)


def analyze_scan(
    spec: ScanSpec,
    *,
    method: str = "thick",
    bootstrap: int = 0,
    resolution_m: float | None = None,
    profile_model: str = "gaussian",
    size_source: str = "fit",
    seed=None,
    constrained: bool = False,
    energy_spread: float | None = None,
    chromatic: str = "estimate",
    kinetic_energy_err_MeV: float = 0.0,
) -> EmittanceResult:
    """Emittance of a loaded quad scan, solenoid scan or multi-monitor measurement.

    Each step's sizes come from the sizes given in the scan file, from its wire
    profiles (:func:`diagnostics.profiles.analyze_profile`) or from its image
    (:func:`diagnostics.images.analyze_image`); ``gradient_T_per_m`` steps become
    ``k1 = G / B rho`` with the scan's particle and energy (B rho as a magnitude,
    see :mod:`diagnostics.particles`).

    Parameters
    ----------
    spec : ScanSpec
    method : {"thick", "thin"}
    bootstrap : int
        Bootstrap samples per plane.
    resolution_m : float, optional
        Overrides the monitor resolution(s) of the scan file, m.
    profile_model : str
        Passed to the profile analysis as ``model``.
    size_source : {"fit", "rms"}
        Use the fitted Gaussian sigma or the rms of each profile/image.
    seed, constrained, energy_spread, chromatic, kinetic_energy_err_MeV
        See :func:`fit_sigma_matrix`; ``energy_spread`` defaults to the scan file's.

    Returns
    -------
    EmittanceResult
    """
    _check_method(method)
    if size_source not in SIZE_SOURCES:
        raise InputError(f"size_source: expected one of {', '.join(SIZE_SOURCES)}, got {size_source!r}")
    where = spec.folder or spec.name or "scan"
    kin = particles.kinematics(spec.kinetic_energy_MeV, spec.particle)
    scan = scan_optics(spec, method=method, kin=kin)
    settings: list[float] = []
    labels: list[Any] = []
    for step in spec.steps:
        if spec.kind == "quadrupole":
            if step.k1_per_m2 is not None:
                settings.append(float(step.k1_per_m2))
            elif step.gradient_T_per_m is not None:
                settings.append(float(k1_from_gradient(float(step.gradient_T_per_m), kin.brho_T_m)))
            else:
                raise InputError(f"{where}: step {step.index}: 'k1_per_m2' or 'gradient_T_per_m' is required")
            labels.append(settings[-1])
        elif spec.kind == "solenoid":
            if step.field_T is None:
                raise InputError(f"{where}: step {step.index}: 'field_T' is required for a solenoid scan")
            settings.append(float(step.field_T))
            labels.append(settings[-1])
        else:
            settings.append(float(len(settings)))
            labels.append(step.monitor)
    sx, ex, fx, sy, ey, fy, step_notes = [], [], [], [], [], [], []
    for step in spec.steps:
        (a, b, c, _), (d, e, f, _), note = _step_sizes(step, profile_model=profile_model, size_source=size_source)
        sx.append(a)
        ex.append(b)
        fx.append(c)
        sy.append(d)
        ey.append(e)
        fy.append(f)
        step_notes.append(note)
    by_name = {m.name: m for m in spec.monitors}
    if resolution_m is not None:
        res: Any = float(resolution_m)
    elif spec.kind == "multi_monitor":
        res = np.array([by_name[str(s.monitor)].resolution_m for s in spec.steps], dtype=float)
    else:
        res = float(spec.monitors[0].resolution_m) if spec.monitors else 0.0
    extra_flags = [] if spec.complete else ["provisional"]
    extra_notes = [] if spec.complete else [f"scan incomplete ({len(spec.steps)} of {spec.expected_steps} steps)"]
    skipped = [f"step {s.index}: {n}" for s, n in zip(spec.steps, step_notes, strict=True) if n]
    if skipped:
        extra_notes.append("; ".join(skipped))
    options = {
        "profile_model": profile_model,
        "size_source": size_source,
        "monitor": spec.monitors[0].name if len(spec.monitors) == 1 else [m.name for m in spec.monitors],
        "magnet": None if spec.magnet is None else spec.magnet.name,
        "kinetic_energy_MeV": spec.kinetic_energy_MeV,
    }
    energy_spread = spec.energy_spread if energy_spread is None else energy_spread

    def errs(values):
        return None if all(v is None for v in values) else values

    common = dict(
        sigma_x_err_m=errs(ex),
        sigma_y_err_m=errs(ey),
        kin=kin,
        resolution_m=res,
        resolution_err_m=0.0,
        design=dict(spec.design),
        energy_spread=energy_spread,
        chromatic=chromatic,
        bootstrap=bootstrap,
        seed=seed,
        constrained=constrained,
        kinetic_energy_err_MeV=kinetic_energy_err_MeV,
        step_flags_x=fx,
        step_flags_y=fy,
        step_labels=labels,
        name=spec.name,
        timestamp=spec.timestamp,
        options=options,
        thin_check=spec.kind == "quadrupole",
        extra_flags=extra_flags,
        extra_notes=extra_notes,
    )
    result = _scan_front_end(scan, np.array(settings), sx, sy, **common)
    steps = tuple(
        dataclasses.replace(st, message=note) for st, note in zip(result.steps, step_notes, strict=True)
    )
    return dataclasses.replace(result, steps=steps)


# ----------------------------------------------------------------------------------------------
# Propagation and plotting


@dataclass(frozen=True)
class MonitorBeam:
    """The fitted beam of one plane carried to the monitor for one setting.

    ``sigma_m``/``sigma_err_m`` is the predicted rms size there (without the
    monitor resolution); Twiss values are ``None`` when the fit is unphysical.
    """

    plane: str
    setting: float
    sigma_m: float | None
    sigma_err_m: float | None
    sigma11_m2: float
    sigma12_m: float
    sigma22: float
    emittance_m_rad: float | None
    beta_m: float | None
    beta_err_m: float | None
    alpha: float | None
    alpha_err: float | None


def _sigma_transform(r: np.ndarray) -> np.ndarray:
    """3x3 linear map of (S11, S12, S22) under S -> R S R^T."""
    r11, r12, r21, r22 = r[0, 0], r[0, 1], r[1, 0], r[1, 1]
    return np.array(
        [
            [r11 * r11, 2 * r11 * r12, r12 * r12],
            [r11 * r21, r11 * r22 + r12 * r21, r12 * r22],
            [r21 * r21, 2 * r21 * r22, r22 * r22],
        ]
    )


def propagate_plane(plane: PlaneResult, matrix, *, setting: float = math.nan) -> MonitorBeam | None:
    """Carry a plane's fitted beam matrix (and covariance) through ``matrix``: ``S1 = R S R^T``."""
    if plane.sigma11_m2 is None:
        return None
    t = _sigma_transform(optics.general(matrix))
    s = t @ np.array([plane.sigma11_m2, plane.sigma12_m, plane.sigma22])
    cov = plane.cov_matrix()
    cov1 = None if cov is None else t @ cov @ t.T
    size = math.sqrt(s[0]) if s[0] > 0 else None
    size_err = None if (cov1 is None or size is None) else math.sqrt(max(cov1[0, 0], 0.0)) / (2 * size)
    tw = _twiss_of(s) if plane.ok else None
    b_err = a_err = None
    if tw is not None and cov1 is not None:
        jac = twiss_jacobian(*s)
        c3 = jac @ cov1 @ jac.T
        b_err, a_err = math.sqrt(max(c3[1, 1], 0.0)), math.sqrt(max(c3[2, 2], 0.0))
    return MonitorBeam(
        plane=plane.plane,
        setting=float(setting),
        sigma_m=size,
        sigma_err_m=size_err,
        sigma11_m2=float(s[0]),
        sigma12_m=float(s[1]),
        sigma22=float(s[2]),
        emittance_m_rad=None if tw is None else tw[0],
        beta_m=None if tw is None else tw[1],
        beta_err_m=b_err,
        alpha=None if tw is None else tw[2],
        alpha_err=a_err,
    )


def _optics_for(result: EmittanceResult, spec_or_inputs) -> ScanOptics:
    method = str(result.options.get("method", "thick"))
    if isinstance(spec_or_inputs, ScanOptics):
        return spec_or_inputs
    if isinstance(spec_or_inputs, ScanSpec):
        return scan_optics(spec_or_inputs, method=method, kin=result.kinematics)
    raise TypeError("spec_or_inputs must be a ScanSpec or a ScanOptics")


def propagate_to_monitor(result: EmittanceResult, spec_or_inputs, *, setting: float) -> dict[str, MonitorBeam | None]:
    """Beam matrix and Twiss of both planes at the monitor for one scan ``setting``.

    ``setting`` is k1 (m^-2), the solenoid field (T), or the step index of a
    multi-monitor measurement.
    """
    scan = _optics_for(result, spec_or_inputs)
    out = {}
    for name in ("x", "y"):
        plane = getattr(result, name)
        r = scan.matrices(name, [setting])[0]
        out[name] = propagate_plane(plane, r, setting=setting)
    return out


def _resolution_per_step(result: EmittanceResult, plane: str, n: int) -> np.ndarray:
    res = result.options.get("resolution_m", 0.0)
    if isinstance(res, Mapping):
        res = res.get(plane, 0.0)
    arr = np.asarray(res, dtype=float).reshape(-1)
    return np.broadcast_to(arr if arr.size in (1, n) else arr[:1], (n,)).astype(float)


def scan_plot_data(result: EmittanceResult, spec_or_inputs, *, n_grid: int = 200, n_ellipse: int = 181) -> dict:
    """Plot-ready data of a scan result (plain lists, SI units).

    Returns
    -------
    dict
        ``{"kind", "setting_name", "planes": {"x": {...}, "y": {...}}}`` where each
        plane holds ``setting`` / ``sigma2_m2`` / ``sigma2_err_m2`` / ``used`` per
        step (measured, resolution included), ``grid`` with ``fit_sigma2_m2`` and
        ``band_lo_m2``/``band_hi_m2`` (fitted curve with resolution added back,
        +-1 standard deviation from the covariance), and ``ellipse`` with
        ``measured`` and ``design`` point lists ``{"x_m", "xp_rad"}`` (the design
        ellipse drawn with the measured emittance; ``None`` when missing).
    """
    scan = _optics_for(result, spec_or_inputs)
    n = len(result.steps)
    settings = np.array([float(i) if scan.kind == "multi_monitor" else float(st.setting) for i, st in enumerate(result.steps)])
    if scan.kind == "multi_monitor" or n == 0:
        grid = settings.copy()
    else:
        lo, hi = float(settings.min()), float(settings.max())
        pad = 0.05 * (hi - lo)
        grid = np.linspace(lo - pad, hi + pad, int(n_grid))
    planes = {}
    for name in ("x", "y"):
        plane: PlaneResult = getattr(result, name)
        sig = np.array([np.nan if getattr(st, f"sigma_{name}_m") is None else getattr(st, f"sigma_{name}_m") for st in result.steps], dtype=float)
        err = np.array([np.nan if getattr(st, f"sigma_{name}_err_m") is None else getattr(st, f"sigma_{name}_err_m") for st in result.steps], dtype=float)
        used = [bool(getattr(st, f"used_{name}")) for st in result.steps]
        res = _resolution_per_step(result, name, n)
        entry: dict[str, Any] = {
            "setting": settings.tolist(),
            "sigma2_m2": (sig**2).tolist(),
            "sigma2_err_m2": (2 * sig * err).tolist(),
            "used": used,
            "grid": grid.tolist(),
            "fit_sigma2_m2": None,
            "band_lo_m2": None,
            "band_hi_m2": None,
            "ellipse": {"measured": None, "design": None},
        }
        s = plane.sigma_matrix()
        if s is not None and grid.size:
            rows = design_rows(scan.matrices(name, grid))
            vec = np.array([s[0, 0], s[0, 1], s[1, 1]])
            grid_res = res if scan.kind == "multi_monitor" else np.full(grid.size, res[0] if res.size else 0.0)
            fit = rows @ vec + grid_res**2
            entry["fit_sigma2_m2"] = fit.tolist()
            cov = plane.cov_matrix()
            if cov is not None:
                band = np.sqrt(np.maximum(np.einsum("ni,ij,nj->n", rows, cov, rows), 0.0))
                entry["band_lo_m2"] = (fit - band).tolist()
                entry["band_hi_m2"] = (fit + band).tolist()
        eps, beta, alpha = plane.emittance_m_rad, plane.beta_m, plane.alpha
        if eps is not None and beta is not None and alpha is not None:
            x, xp = optics.ellipse_points(eps, beta, alpha, n_points=n_ellipse)
            entry["ellipse"]["measured"] = {"x_m": x.tolist(), "xp_rad": xp.tolist()}
            if plane.design_beta_m is not None and plane.design_alpha is not None:
                x, xp = optics.ellipse_points(eps, plane.design_beta_m, plane.design_alpha, n_points=n_ellipse)
                entry["ellipse"]["design"] = {"x_m": x.tolist(), "xp_rad": xp.tolist()}
        planes[name] = entry
    return {"kind": result.kind, "setting_name": scan.setting_name, "reference_point": result.x.reference_point, "planes": planes}
