"""Linear beam optics: transfer matrices, sigma-matrix transport and Twiss algebra.

Conventions (stated once for the whole package)
-----------------------------------------------
* Coordinates are ``(x, x')`` per plane (2x2 matrices) or ``(x, x', y, y')``
  (4x4 matrices); lengths in m, angles in rad.
* A quadrupole strength ``k1_per_m2 > 0`` focuses in the plane being computed.
  In beamdiag ``k1 > 0`` focuses x and defocuses y, so the y plane of a
  quadrupole uses ``-k1``.
* Matrices act on column vectors: ``x1 = R @ x0``.  :func:`compose` takes the
  elements **in beam order** (first element met by the beam first) and returns
  ``R_n @ ... @ R_2 @ R_1``.
* Every function accepts a scalar strength and returns one matrix, or an array of
  strengths of shape ``(n,)`` and returns a stack of shape ``(n, 2, 2)``.
* Beam (sigma) matrix ``Sigma = [[<x^2>, <x x'>], [<x x'>, <x'^2>]]``
  ``= eps [[beta, -alpha], [-alpha, gamma]]`` with ``beta gamma - alpha^2 = 1``;
  ``alpha > 0`` means a converging beam.  Transport: ``Sigma1 = R Sigma0 R^T``.
* Solenoid: Larmor wavenumber ``K = B0 / (2 B rho)`` (see
  :func:`diagnostics.particles.larmor_k`); the rotation angle ``K L`` is taken
  positive for positive ``K``, i.e. the matrix rotates ``(x, y)`` by ``+KL``
  (from +x toward +y); the sign of a real rotation depends on field direction and
  charge, and does not change projected sizes of a round beam.

References
----------
H. Wiedemann, *Particle Accelerator Physics*, Springer, 4th ed. 2015 (transfer
matrices of drifts, quadrupoles and solenoids; Twiss parameters).
M. Sands, "A beta mismatch parameter", SLAC-AP-85 (1991) (B_mag).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Below this |K| L^2 the quadrupole matrix uses its power series (no 0/0, error < 1e-19).
SERIES_LIMIT = 1e-6


@dataclass(frozen=True)
class Twiss:
    """Twiss parameters of one plane.

    Attributes
    ----------
    emittance_m_rad : float
        rms geometric emittance ``sqrt(det Sigma)``, m rad.
    beta_m : float
        Beta function, m.
    alpha : float
        Alpha (dimensionless; > 0 converging).
    gamma_per_m : float
        ``(1 + alpha^2) / beta``, 1/m.
    """

    emittance_m_rad: float
    beta_m: float
    alpha: float
    gamma_per_m: float


def _stack(a11, a12, a21, a22) -> np.ndarray:
    """Build ``(..., 2, 2)`` from four broadcastable arrays; scalars give ``(2, 2)``."""
    return np.stack([np.stack([a11, a12], axis=-1), np.stack([a21, a22], axis=-1)], axis=-2)


def drift(length_m) -> np.ndarray:
    """Drift ``[[1, L], [0, 1]]`` of length ``length_m`` (m)."""
    length = np.asarray(length_m, dtype=float)
    one = np.ones_like(length)
    return _stack(one, length, np.zeros_like(length), one)


def quad_thick(k1_per_m2, length_m) -> np.ndarray:
    """Hard-edge thick quadrupole, focusing for ``k1 > 0`` and defocusing for ``k1 < 0``.

    Unified form ``[[C, S], [-K S, C]]`` with ``C = cos(sqrt(K) L)`` and
    ``S = sin(sqrt(K) L) / sqrt(K)`` continued analytically to ``K < 0`` (cosh,
    sinh), Wiedemann (2015) ch. 7.  Near ``K = 0`` (``|K| L^2 < SERIES_LIMIT``) the
    power series ``C = 1 - KL^2/2 + K^2L^4/24``, ``S = L (1 - KL^2/6 + K^2L^4/120)``
    is used.

    Parameters
    ----------
    k1_per_m2 : float or ndarray, shape (n,)
        Strength in the plane computed, m^-2.
    length_m : float
        Effective (magnetic) length, m.

    Returns
    -------
    ndarray, shape (2, 2) or (n, 2, 2)

    Examples
    --------
    >>> np.round(quad_thick(-4.0, 0.2), 6).tolist()
    [[1.081072, 0.205376], [0.821505, 1.081072]]
    """
    k = np.asarray(k1_per_m2, dtype=float)
    length = float(length_m)
    x = k * length**2  # phi^2 with its sign
    root = np.sqrt(np.abs(k))
    phi = root * length
    small = np.abs(x) < SERIES_LIMIT
    safe_root = np.where(small, 1.0, root)
    cos_branch = np.where(k > 0, np.cos(phi), np.cosh(phi))
    sin_branch = np.where(k > 0, np.sin(phi), np.sinh(phi)) / safe_root
    c_series = 1.0 - x / 2.0 + x * x / 24.0
    s_series = length * (1.0 - x / 6.0 + x * x / 120.0)
    cc = np.where(small, c_series, cos_branch)
    ss = np.where(small, s_series, sin_branch)
    return _stack(cc, ss, -k * ss, cc)


def quad_thin(integrated_strength_per_m) -> np.ndarray:
    """Thin quadrupole ``[[1, 0], [-q, 1]]`` with ``q = k1 L = 1/f`` (1/m; > 0 focuses)."""
    q = np.asarray(integrated_strength_per_m, dtype=float)
    one = np.ones_like(q)
    return _stack(one, np.zeros_like(q), -q, one)


def quad_thin_centred(k1_per_m2, length_m) -> np.ndarray:
    """Thin-lens model of a quadrupole of length L: ``D(L/2) Q_thin(k1 L) D(L/2)``.

    Same entrance and exit planes as :func:`quad_thick`, so the two can be swapped
    in a transport line; equal to it to first order in ``k1 L^2``.
    """
    half = drift(float(length_m) / 2.0)
    return compose(half, quad_thin(np.asarray(k1_per_m2, dtype=float) * float(length_m)), half)


def solenoid_focusing(k_per_m, length_m) -> np.ndarray:
    """2x2 focusing part ``F2 = [[C, S/K], [-K S, C]]`` of a hard-edge solenoid.

    ``C = cos(KL)``, ``S = sin(KL)`` with the Larmor wavenumber ``K`` (1/m); the
    full solenoid is ``Rot(KL) . diag(F2, F2)`` (METHODS 2.2; Wiedemann 2015).
    ``S/K`` is computed as ``L sinc(KL/pi)``, exact at ``K = 0``.
    """
    k = np.asarray(k_per_m, dtype=float)
    length = float(length_m)
    theta = k * length
    cc = np.cos(theta)
    s_over_k = length * np.sinc(theta / np.pi)
    return _stack(cc, s_over_k, -k * np.sin(theta), cc)


def rotation(angle_rad) -> np.ndarray:
    """4x4 rotation of ``(x, x', y, y')`` by ``angle_rad`` from +x toward +y."""
    a = np.asarray(angle_rad, dtype=float)
    cc, ss = np.cos(a), np.sin(a)
    zero = np.zeros_like(a)
    rows = [
        [cc, zero, ss, zero],
        [zero, cc, zero, ss],
        [-ss, zero, cc, zero],
        [zero, -ss, zero, cc],
    ]
    return np.stack([np.stack(r, axis=-1) for r in rows], axis=-2)


def solenoid(k_per_m, length_m) -> np.ndarray:
    """4x4 hard-edge solenoid in ``(x, x', y, y')``: ``Rot(KL) . diag(F2, F2)``.

    Written out (C = cos KL, S = sin KL; Wiedemann 2015, METHODS 2.2)::

        [[ C^2,   SC/K,  SC,    S^2/K],
         [-KSC,   C^2,  -KS^2,  SC   ],
         [-SC,  -S^2/K,  C^2,   SC/K ],
         [ KS^2, -SC,   -KSC,   C^2  ]]
    """
    f2 = solenoid_focusing(k_per_m, length_m)
    f4 = block_diag(f2, f2)
    return rotation(np.asarray(k_per_m, dtype=float) * float(length_m)) @ f4


def block_diag(mx: np.ndarray, my: np.ndarray) -> np.ndarray:
    """4x4 (or stacked) uncoupled matrix ``diag(mx, my)`` from two 2x2 blocks."""
    mx = np.asarray(mx, dtype=float)
    my = np.asarray(my, dtype=float)
    shape = np.broadcast_shapes(mx.shape[:-2], my.shape[:-2])
    out = np.zeros((*shape, 4, 4))
    out[..., :2, :2] = mx
    out[..., 2:, 2:] = my
    return out


def general(matrix, *, size: int = 2) -> np.ndarray:
    """A user-given transfer matrix as a float array of shape ``(size, size)``.

    Raises
    ------
    ValueError
        If the shape is wrong or an entry is not finite.
    """
    m = np.asarray(matrix, dtype=float)
    if m.shape != (size, size):
        raise ValueError(f"expected a {size}x{size} matrix, got shape {m.shape}")
    if not np.all(np.isfinite(m)):
        raise ValueError("matrix entries must be finite numbers")
    return m


def compose(*matrices) -> np.ndarray:
    """Product of transfer matrices given **in beam order**: ``compose(A, B) = B @ A``.

    Stacks broadcast, so ``compose(quad_thick(k_array, L), drift(3.0))`` gives
    ``(n, 2, 2)``.
    """
    if not matrices:
        raise ValueError("compose needs at least one matrix")
    out = np.asarray(matrices[0], dtype=float)
    for m in matrices[1:]:
        out = np.asarray(m, dtype=float) @ out
    return out


def transport_sigma(sigma, matrix) -> np.ndarray:
    """Transport a beam matrix: ``Sigma1 = R Sigma0 R^T`` (stacks broadcast)."""
    r = np.asarray(matrix, dtype=float)
    return r @ np.asarray(sigma, dtype=float) @ np.swapaxes(r, -1, -2)


def sigma_from_twiss(emittance_m_rad: float, beta_m: float, alpha: float) -> np.ndarray:
    """Beam matrix ``eps [[beta, -alpha], [-alpha, gamma]]`` from Twiss parameters."""
    gamma = (1.0 + alpha * alpha) / beta_m
    return emittance_m_rad * np.array([[beta_m, -alpha], [-alpha, gamma]], dtype=float)


def twiss_from_sigma(sigma) -> Twiss:
    """Twiss parameters of a positive-definite 2x2 beam matrix.

    Raises
    ------
    ValueError
        If ``Sigma11 <= 0``, ``Sigma22 <= 0`` or ``det Sigma <= 0`` (no beam has such
        a matrix; never take ``sqrt(|det|)``).
    """
    s = np.asarray(sigma, dtype=float)
    s11, s12, s22 = float(s[0, 0]), float(0.5 * (s[0, 1] + s[1, 0])), float(s[1, 1])
    det = s11 * s22 - s12 * s12
    if not (s11 > 0 and s22 > 0 and det > 0):
        raise ValueError(f"beam matrix is not positive definite (S11={s11:.3g}, S22={s22:.3g}, det={det:.3g})")
    eps = float(np.sqrt(det))
    return Twiss(emittance_m_rad=eps, beta_m=s11 / eps, alpha=-s12 / eps, gamma_per_m=s22 / eps)


def bmag(beta_m, alpha, beta0_m, alpha0):
    """Mismatch parameter ``B_mag = (beta gamma0 - 2 alpha alpha0 + gamma beta0) / 2``.

    ``(beta, alpha)`` measured, ``(beta0, alpha0)`` design at the same point;
    ``B_mag >= 1`` with equality for a perfect match (Sands, SLAC-AP-85, 1991).
    """
    gamma = (1.0 + np.square(alpha)) / beta_m
    gamma0 = (1.0 + np.square(alpha0)) / beta0_m
    return 0.5 * (beta_m * gamma0 - 2.0 * alpha * alpha0 + gamma * beta0_m)


def bmag_gradient(beta_m: float, alpha: float, beta0_m: float, alpha0: float) -> tuple[float, float]:
    """Partial derivatives ``(dB/dbeta, dB/dalpha)`` of :func:`bmag` at fixed design."""
    gamma0 = (1.0 + alpha0 * alpha0) / beta0_m
    d_beta = 0.5 * (gamma0 - (1.0 + alpha * alpha) * beta0_m / beta_m**2)
    d_alpha = -alpha0 + alpha * beta0_m / beta_m
    return d_beta, d_alpha


def mismatch_factor(bmag_value):
    """Amplitude mismatch factor ``M = sqrt(B + sqrt(B^2 - 1)) - 1``.

    The fractional amplitude increase of the matched ellipse needed to contain the
    mismatched one (e.g. Wangler, *RF Linear Accelerators*, Wiley 2008).
    """
    b = np.asarray(bmag_value, dtype=float)
    return np.sqrt(b + np.sqrt(np.maximum(b * b - 1.0, 0.0))) - 1.0


def ellipse_points(emittance_m_rad: float, beta_m: float, alpha: float, *, n_points: int = 181):
    """Points ``(x_m, xp_rad)`` on the phase-space ellipse ``gamma x^2 + 2 alpha x x' + beta x'^2 = eps``.

    Parametric form ``x = sqrt(eps beta) cos t``, ``x' = -sqrt(eps / beta) (alpha cos t + sin t)``,
    ``t`` in ``[0, 2 pi]`` (closed curve: first point repeated at the end).
    """
    t = np.linspace(0.0, 2.0 * np.pi, int(n_points))
    x = np.sqrt(emittance_m_rad * beta_m) * np.cos(t)
    xp = -np.sqrt(emittance_m_rad / beta_m) * (alpha * np.cos(t) + np.sin(t))
    return x, xp
