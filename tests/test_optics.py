"""Transfer matrices and Twiss algebra against textbook closed forms and numerical integration.

Closed forms: H. Wiedemann, *Particle Accelerator Physics*, Springer, 4th ed. 2015
(drift, quadrupole and solenoid matrices; Twiss parameters).  Independent
reference: the linear equations of motion integrated with
``scipy.integrate.solve_ivp`` (rtol 1e-12), whose columns are the matrix columns.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from diagnostics import optics

J2 = np.array([[0.0, 1.0], [-1.0, 0.0]])
J4 = np.block([[J2, np.zeros((2, 2))], [np.zeros((2, 2)), J2]])
SIGMA0 = np.array([[1e-5, 1e-6], [1e-6, 2e-7]])  # METHODS 6.4: eps = 1e-6, beta = 10, alpha = -1

# solve_ivp with rtol 1e-12 reproduces exact solutions to ~1e-11 relative here (common practice margin)
ODE_TOL = 1e-9


def _integrate_quad(k: float, length: float) -> np.ndarray:
    """Matrix of x'' + k x = 0 over ``length``, column j = solution from unit vector j."""
    cols = []
    for start in np.eye(2):
        sol = solve_ivp(lambda s, u: [u[1], -k * u[0]], (0.0, length), start, rtol=1e-12, atol=1e-14)
        cols.append(sol.y[:, -1])
    return np.array(cols).T


def _integrate_solenoid(k: float, length: float) -> np.ndarray:
    """Hard-edge solenoid from the Larmor equations of motion.

    Body (Lorentz force of B_z on a particle of rigidity B rho): x'' = 2K y',
    y'' = -2K x' with K = B0 / (2 B rho).  The radial fringe field
    B_r = -(r/2) dB_z/ds gives thin kicks x' += K y, y' -= K x at the entrance and
    the opposite at the exit (Wiedemann 2015, solenoid fringe fields).
    """
    cols = []
    for start in np.eye(4):
        u = start.copy()
        u[1] += k * u[2]
        u[3] -= k * u[0]
        sol = solve_ivp(
            lambda s, v: [v[1], 2 * k * v[3], v[3], -2 * k * v[1]], (0.0, length), u, rtol=1e-12, atol=1e-14
        ).y[:, -1]
        sol[1] -= k * sol[2]
        sol[3] += k * sol[0]
        cols.append(sol)
    return np.array(cols).T


def test_drift_closed_form():
    """Drift [[1, L], [0, 1]] (Wiedemann 2015)."""
    np.testing.assert_array_equal(optics.drift(2.5), [[1.0, 2.5], [0.0, 1.0]])


@pytest.mark.parametrize("k", [6.0, 0.3, -0.3, -6.0])
def test_thick_quad_matches_wiedemann_closed_form(k):
    """Focusing [[cos, sin/sqrt K], [-sqrt K sin, cos]] and defocusing (cosh, sinh) forms, Wiedemann 2015."""
    length = 0.25
    r = math.sqrt(abs(k))
    phi = r * length
    if k > 0:
        expected = [[math.cos(phi), math.sin(phi) / r], [-r * math.sin(phi), math.cos(phi)]]
    else:
        expected = [[math.cosh(phi), math.sinh(phi) / r], [r * math.sinh(phi), math.cosh(phi)]]
    np.testing.assert_allclose(optics.quad_thick(k, length), expected, rtol=1e-14, atol=1e-15)


@pytest.mark.parametrize("k", [12.0, 2.0, 1e-7, 0.0, -1e-7, -2.0, -12.0])
def test_thick_quad_matches_numerical_integration(k):
    """x'' + k x = 0 integrated with solve_ivp gives the same matrix (series branch included)."""
    np.testing.assert_allclose(optics.quad_thick(k, 0.3), _integrate_quad(k, 0.3), rtol=ODE_TOL, atol=ODE_TOL)


def test_thick_quad_series_matches_closed_form_at_its_limit():
    """Just inside |K| L^2 = SERIES_LIMIT the series equals the closed form to 1e-14 (truncation ~1e-19)."""
    length = 0.2
    for sign in (1.0, -1.0):
        k = sign * optics.SERIES_LIMIT / length**2 * (1 - 1e-6)
        r = math.sqrt(abs(k))
        phi = r * length
        if k > 0:
            expected = [[math.cos(phi), math.sin(phi) / r], [-r * math.sin(phi), math.cos(phi)]]
        else:
            expected = [[math.cosh(phi), math.sinh(phi) / r], [r * math.sinh(phi), math.cosh(phi)]]
        np.testing.assert_allclose(optics.quad_thick(k, length), expected, rtol=1e-14)


def test_quad_matches_methods_case_2_table():
    """METHODS 6.4 case 2: L = 0.2 m quad then 3 m drift; R11, R12 rows printed to 15 digits."""
    table = np.array(
        [
            [-4.0, 3.545586326655348, 3.448593278416772],
            [-2.0, 2.256331500834865, 3.323479490057049],
            [0.0, 1.000000000000000, 3.200000000000000],
            [2.0, -0.223797921660064, 3.078141849416677],
            [4.0, -1.415449059849018, 2.957892153162981],
            [6.0, -2.575337276490184, 2.839238099453212],
            [8.0, -3.703843515982202, 2.722166949534796],
            [10.0, -4.801345821383896, 2.606666037364192],
        ]
    )
    r = optics.compose(optics.quad_thick(table[:, 0], 0.2), optics.drift(3.0))
    np.testing.assert_allclose(r[:, 0, 0], table[:, 1], rtol=1e-13, atol=1e-14)
    np.testing.assert_allclose(r[:, 0, 1], table[:, 2], rtol=1e-13)


def test_every_2x2_matrix_has_unit_determinant():
    """Liouville: linear transport without acceleration conserves phase-space area, det R = 1."""
    k = np.linspace(-30, 30, 61)
    mats = [
        optics.quad_thick(k, 0.3),
        optics.quad_thin(k * 0.3),
        optics.quad_thin_centred(k, 0.3),
        optics.solenoid_focusing(k, 0.3),
        optics.compose(optics.quad_thick(k, 0.3), optics.drift(4.0), optics.quad_thick(-k, 0.1)),
    ]
    for m in mats:
        np.testing.assert_allclose(np.linalg.det(m), 1.0, rtol=0, atol=1e-12)


@pytest.mark.parametrize("k", [2.731715111835, 0.5, 1e-9, -3.0])
def test_solenoid_matches_larmor_equations_integrated(k):
    """The 4x4 hard-edge solenoid equals solve_ivp of the coupled Larmor equations with fringe kicks."""
    np.testing.assert_allclose(optics.solenoid(k, 0.2), _integrate_solenoid(k, 0.2), rtol=ODE_TOL, atol=ODE_TOL)


def test_solenoid_written_out_form_and_factorisation():
    """M_sol of METHODS 2.2 (Wiedemann's form) element by element; M = Rot(KL) F = F Rot(KL)."""
    k, length = 4.1, 0.2
    c, s = math.cos(k * length), math.sin(k * length)
    expected = np.array(
        [
            [c * c, s * c / k, s * c, s * s / k],
            [-k * s * c, c * c, -k * s * s, s * c],
            [-s * c, -s * s / k, c * c, s * c / k],
            [k * s * s, -s * c, -k * s * c, c * c],
        ]
    )
    m = optics.solenoid(k, length)
    np.testing.assert_allclose(m, expected, rtol=1e-14, atol=1e-15)
    f = optics.block_diag(optics.solenoid_focusing(k, length), optics.solenoid_focusing(k, length))
    np.testing.assert_allclose(f @ optics.rotation(k * length), m, atol=1e-15)


def test_solenoid_is_symplectic():
    """M^T J M = J for the 4x4 solenoid (symplectic map, Wiedemann 2015)."""
    for k in (-5.0, 0.0, 0.3, 2.7, 9.0):
        m = optics.solenoid(k, 0.35)
        np.testing.assert_allclose(m.T @ J4 @ m, J4, atol=1e-14)


def test_solenoid_case_6_round_beam_4x4_propagation():
    """METHODS 6.4 case 6: diag(S0, S0) through solenoid (K = 2.7317 1/m) + 1.5 m drift -> sx^2 = 1.2925703555e-05."""
    k = 2.731715111835
    d4 = optics.block_diag(optics.drift(1.5), optics.drift(1.5))
    m = d4 @ optics.solenoid(k, 0.2)
    s4 = optics.transport_sigma(optics.block_diag(SIGMA0, SIGMA0), m)
    assert s4[0, 0] == pytest.approx(1.292570355528e-05, rel=1e-11)
    assert s4[2, 2] == pytest.approx(1.292570355528e-05, rel=1e-11)
    r2 = optics.compose(optics.solenoid_focusing(k, 0.2), optics.drift(1.5))
    assert r2[0, 0] == pytest.approx(-1.274529486375, rel=1e-11)
    assert r2[0, 1] == pytest.approx(1.471843162631, rel=1e-11)
    # thin-lens 1/f = K^2 L overestimates the exact K sin(KL) (METHODS 6.4 case 6)
    assert k * k * 0.2 == pytest.approx(1.49245, abs=5e-6)
    assert -optics.solenoid_focusing(k, 0.2)[1, 0] == pytest.approx(1.41931, abs=5e-6)


def test_thin_lens_limit_of_thick_quad():
    """With q = k L fixed, the thick quadrupole tends to the thin lens as L -> 0.

    Expanding the closed form: thick - thin = O(L); thick - D(L/2) Q D(L/2) has its
    largest term q^2 L / 6 in R21 (Taylor series of cos and sin, exact to O(L^2)).
    """
    q = 1.5  # 1/m
    errs = []
    for length in (0.1, 0.01, 0.001):
        thick = optics.quad_thick(q / length, length)
        errs.append(np.abs(thick - optics.quad_thin(q)).max())
        centred = np.abs(thick - optics.quad_thin_centred(q / length, length)).max()
        assert centred == pytest.approx(q * q * length / 6, rel=0.05)
    assert errs[0] > errs[1] > errs[2]
    assert errs[2] < 2e-3


def test_compose_is_in_beam_order():
    """compose(A, B) = B @ A: a drift then a lens differs from a lens then a drift."""
    a, b = optics.drift(2.0), optics.quad_thin(0.5)
    np.testing.assert_array_equal(optics.compose(a, b), b @ a)
    np.testing.assert_array_equal(optics.compose(a, b, a), a @ b @ a)


def test_particle_cloud_reproduces_sigma_transport():
    """1e5 particles drawn from S0 and pushed through R give rms moments = R S0 R^T within sampling error.

    Standard error of a sample variance is sqrt(2/N) relative (0.45 % for N = 1e5);
    the tolerance is 5 standard errors (common practice).
    """
    rng = np.random.default_rng(20261202)
    n = 100_000
    cloud = rng.multivariate_normal([0.0, 0.0], SIGMA0, size=n)
    r = optics.compose(optics.quad_thick(3.0, 0.2), optics.drift(2.0), optics.quad_thick(-5.0, 0.2), optics.drift(1.0))
    out = cloud @ r.T
    measured = np.cov(out.T)
    expected = optics.transport_sigma(SIGMA0, r)
    scale = np.sqrt(np.outer(np.diag(expected), np.diag(expected)))
    assert np.all(np.abs(measured - expected) / scale < 5 * math.sqrt(2 / n))


def test_particle_cloud_through_solenoid_4x4():
    """A round 4D cloud through the solenoid: sample covariance = M S M^T within 5 standard errors."""
    rng = np.random.default_rng(7)
    n = 100_000
    s4 = optics.block_diag(SIGMA0, SIGMA0)
    cloud = rng.multivariate_normal(np.zeros(4), s4, size=n)
    m = optics.solenoid(3.3, 0.2)
    measured = np.cov((cloud @ m.T).T)
    expected = optics.transport_sigma(s4, m)
    scale = np.sqrt(np.outer(np.diag(expected), np.diag(expected)))
    assert np.all(np.abs(measured - expected) / scale < 5 * math.sqrt(2 / n))


def test_twiss_sigma_round_trip_and_case_values():
    """S0 = eps [[beta, -alpha], [-alpha, gamma]] with eps = 1e-6, beta = 10, alpha = -1 (METHODS 6.4)."""
    s = optics.sigma_from_twiss(1e-6, 10.0, -1.0)
    np.testing.assert_allclose(s, SIGMA0, rtol=1e-15)
    tw = optics.twiss_from_sigma(SIGMA0)
    assert tw.emittance_m_rad == pytest.approx(1e-6, rel=1e-14)
    assert tw.beta_m == pytest.approx(10.0, rel=1e-14)
    assert tw.alpha == pytest.approx(-1.0, rel=1e-14)
    assert tw.gamma_per_m == pytest.approx(0.2, rel=1e-14)
    assert tw.beta_m * tw.gamma_per_m - tw.alpha**2 == pytest.approx(1.0, rel=1e-14)


@pytest.mark.parametrize("bad", [[[1.0, 2.0], [2.0, 1.0]], [[-1.0, 0.0], [0.0, 1.0]], [[1.0, 1.0], [1.0, 1.0]]])
def test_twiss_from_sigma_rejects_non_positive_definite(bad):
    with pytest.raises(ValueError, match="not positive definite"):
        optics.twiss_from_sigma(bad)


def test_twiss_transport_conserves_emittance():
    """det(R S R^T) = det S for det R = 1: emittance is invariant under linear transport."""
    r = optics.compose(optics.quad_thick(-7.0, 0.3), optics.drift(5.0))
    tw = optics.twiss_from_sigma(optics.transport_sigma(SIGMA0, r))
    assert tw.emittance_m_rad == pytest.approx(1e-6, rel=1e-12)


def test_bmag_methods_case_7():
    """METHODS 6.4 case 7 (Sands, SLAC-AP-85, 1991): identical -> 1; beta = 2 beta0 -> 1.25; (12, -0.5) vs (10, -1)."""
    assert optics.bmag(10.0, -1.0, 10.0, -1.0) == pytest.approx(1.0, rel=1e-15)
    assert optics.bmag(20.0, 0.0, 10.0, 0.0) == pytest.approx(1.25, rel=1e-15)
    assert optics.mismatch_factor(1.25) == pytest.approx(math.sqrt(2) - 1, rel=1e-15)
    assert optics.bmag(12.0, -0.5, 10.0, -1.0) == pytest.approx(1.2208333333, rel=1e-10)
    assert optics.mismatch_factor(1.0) == 0.0


def test_bmag_gradient_matches_finite_differences():
    h = 1e-6
    g = optics.bmag_gradient(12.0, -0.5, 10.0, -1.0)
    fd_b = (optics.bmag(12.0 + h, -0.5, 10.0, -1.0) - optics.bmag(12.0 - h, -0.5, 10.0, -1.0)) / (2 * h)
    fd_a = (optics.bmag(12.0, -0.5 + h, 10.0, -1.0) - optics.bmag(12.0, -0.5 - h, 10.0, -1.0)) / (2 * h)
    assert g == pytest.approx((fd_b, fd_a), rel=1e-7)


def test_ellipse_points_lie_on_the_ellipse_and_enclose_pi_eps():
    """gamma x^2 + 2 alpha x x' + beta x'^2 = eps on every point; shoelace area -> pi eps."""
    eps, beta, alpha = 2e-6, 7.0, 1.3
    gamma = (1 + alpha**2) / beta
    x, xp = optics.ellipse_points(eps, beta, alpha, n_points=20001)
    np.testing.assert_allclose(gamma * x**2 + 2 * alpha * x * xp + beta * xp**2, eps, rtol=1e-12)
    area = 0.5 * abs(np.dot(x[:-1], xp[1:]) - np.dot(xp[:-1], x[1:]))
    assert area == pytest.approx(math.pi * eps, rel=1e-6)


def test_general_rejects_bad_shapes():
    with pytest.raises(ValueError):
        optics.general([[1.0, 2.0, 3.0]])
    with pytest.raises(ValueError):
        optics.general([[1.0, np.nan], [0.0, 1.0]])
