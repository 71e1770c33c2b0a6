"""Kinematics against CODATA (via scipy.constants) and the check values of METHODS 6.2.

The check values were computed with CODATA 2022 as shipped in scipy >= 1.15
(Tiesinga, Mohr, Newell & Taylor, NIST 2024); they are printed to 10-13
significant digits, hence rtol 1e-9.
"""

from __future__ import annotations

import math

import pytest
from scipy import constants

from diagnostics.errors import InputError
from diagnostics.measurements import ParticleSpec
from diagnostics.particles import (
    BRHO_PER_GEV,
    Kinematics,
    beta_gamma_err,
    k1_from_gradient,
    kinematics,
    larmor_k,
    rest_mass,
)

RTOL = 1e-9  # printed precision of the METHODS 6.2 check values


def test_masses_are_codata_values_from_scipy_constants():
    """CODATA rest energies: electron, proton, and u c^2, read independently from scipy.constants."""
    me = constants.physical_constants["electron mass energy equivalent in MeV"][0]
    mp = constants.physical_constants["proton mass energy equivalent in MeV"][0]
    assert rest_mass("electron") == (me, -1)
    assert rest_mass("positron") == (me, 1)
    assert rest_mass("proton") == (mp, 1)
    # the same masses from kg and c^2 / e (CODATA relations), to their stated relative uncertainty
    me_from_kg = constants.m_e * constants.c**2 / constants.e / 1e6
    assert me == pytest.approx(me_from_kg, rel=1e-9)


def test_rigidity_constant_is_1e9_over_c():
    """B rho [T m] = 3.3356409519815 p[GeV/c] / Q, from c = 299792458 m/s exactly."""
    assert pytest.approx(3.3356409519815204, rel=1e-15) == BRHO_PER_GEV
    assert BRHO_PER_GEV == 1e9 / constants.c


@pytest.mark.parametrize(
    ("particle", "t_mev", "expected"),
    [
        (
            "electron",
            100.0,
            dict(gamma=196.695118091672, beta=0.999987076336, beta_gamma=196.692576070112, momentum_MeV=100.509699980, brho_T_m=0.335264271),
        ),
        ("electron", 5.0, dict(gamma=10.784755904584, beta_gamma=10.738294088050, brho_T_m=0.018303519)),
        (
            "proton",
            1000.0,
            dict(gamma=2.065788923347, beta=0.875025646506, beta_gamma=1.807618288197, momentum_MeV=1696.037788158, brho_T_m=5.657373102),
        ),
        ("proton", 200.0, dict(gamma=1.213157784669, beta=0.566160411723, brho_T_m=2.149635782)),
        (
            ParticleSpec("ion", mass_u=12.0, charge=6),
            4800.0,
            dict(gamma=1.429535457590, beta=0.714605244241, beta_gamma=1.021553534822, brho_T_m=6.346457775),
        ),
    ],
)
def test_kinematics_match_methods_check_values(particle, t_mev, expected):
    """METHODS 6.2 check values [C], CODATA 2022 via scipy.

    B rho is printed with 9 decimals there, so it is compared to half a unit of the
    last printed digit (abs 5e-10 T m); the rest to rtol 1e-9.
    """
    k = kinematics(t_mev, particle)
    for name, value in expected.items():
        if name == "brho_T_m":
            assert getattr(k, name) == pytest.approx(value, abs=5.01e-10), name
        else:
            assert getattr(k, name) == pytest.approx(value, rel=RTOL), name


def test_carbon_ion_mass_is_12u_minus_6_electrons():
    """12C6+: m = 12 u - 6 m_e = 11174.86325 MeV (METHODS 6.2; atomic mass of 12C is 12 u by definition)."""
    mass, charge = rest_mass(ParticleSpec("ion", mass_u=12.0, charge=6))
    u = constants.physical_constants["atomic mass constant energy equivalent in MeV"][0]
    me = constants.physical_constants["electron mass energy equivalent in MeV"][0]
    assert mass == pytest.approx(12 * u - 6 * me, rel=1e-15)
    assert mass == pytest.approx(11174.86325, abs=5e-6)
    assert charge == 6


def test_rigidity_from_momentum_formula_and_charge_state():
    """B rho = 3.3356 p[GeV/c] / Q for an ion given by rest mass and charge; signed version carries the charge sign."""
    spec = ParticleSpec("ion", mass_MeV=11174.86325, charge=6)
    k = kinematics(4800.0, spec)
    assert k.brho_T_m == pytest.approx(3.3356409519815 * k.momentum_MeV / 1000.0 / 6, rel=1e-12)
    assert kinematics(100.0, "electron").brho_signed_T_m < 0
    assert kinematics(100.0, "positron").brho_signed_T_m > 0


def test_relativistic_identities_hold():
    """gamma^2 (1 - beta^2) = 1 and (pc)^2 = E^2 - (mc^2)^2 (special relativity, exact)."""
    for t in (0.01, 5.0, 150.0, 1e5):
        k = kinematics(t, "proton")
        assert k.gamma**2 * (1 - k.beta**2) == pytest.approx(1.0, rel=1e-12)
        e = t + k.mass_MeV
        assert k.momentum_MeV**2 == pytest.approx((e - k.mass_MeV) * (e + k.mass_MeV), rel=1e-12)
        assert k.beta_gamma == pytest.approx(k.beta * k.gamma, rel=1e-14)


def test_k1_from_gradient_check_value():
    """k for G = 10 T/m at 100 MeV electrons: 29.827216 m^-2 (METHODS 6.2)."""
    brho = kinematics(100.0, "electron").brho_T_m
    assert k1_from_gradient(10.0, brho) == pytest.approx(29.827216, abs=5e-7)


def test_larmor_k_check_value():
    """K = B0 / (2 B rho): 0.10 T at 5 MeV electrons gives 2.731715111835 1/m (METHODS 6.4 case 6)."""
    brho = kinematics(5.0, "electron").brho_T_m
    assert brho == pytest.approx(0.018303519200587, rel=1e-11)
    assert larmor_k(0.10, brho) == pytest.approx(2.731715111835, rel=1e-11)


def test_beta_gamma_error_matches_finite_difference():
    """d(beta gamma)/dT = 1/(beta m c^2): compare with a central difference of kinematics()."""
    k = kinematics(150.0, "electron")
    h = 1e-3
    fd = (kinematics(150.0 + h, "electron").beta_gamma - kinematics(150.0 - h, "electron").beta_gamma) / (2 * h)
    assert beta_gamma_err(k, 1.0) == pytest.approx(fd, rel=1e-8)


@pytest.mark.parametrize(
    ("particle", "energy"),
    [
        ("muon", 10.0),
        (ParticleSpec("ion", mass_u=12.0), 10.0),
        (ParticleSpec("ion", charge=6), 10.0),
        ("electron", -1.0),
        ("electron", math.nan),
        (ParticleSpec("electron", charge=1), 10.0),
    ],
)
def test_bad_particles_raise_one_line_input_errors(particle, energy):
    with pytest.raises(InputError) as info:
        kinematics(energy, particle)
    assert "\n" not in str(info.value)


def test_kinematics_is_frozen():
    k = kinematics(10.0, "electron")
    assert isinstance(k, Kinematics)
    with pytest.raises(AttributeError):
        k.gamma = 2.0  # type: ignore[misc]
