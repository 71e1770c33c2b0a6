"""Particle species and relativistic kinematics.

Masses come from CODATA through :data:`scipy.constants.physical_constants`
(scipy >= 1.15 ships CODATA 2022: Tiesinga, Mohr, Newell & Taylor, *The 2022
CODATA Recommended Values of the Fundamental Physical Constants*, NIST 2024).

Relations used (e.g. Wiedemann, *Particle Accelerator Physics*, Springer 4th ed.
2015, ch. 1)::

    gamma = 1 + T / (m c^2)          beta = sqrt(1 - 1/gamma^2)
    pc = sqrt(T^2 + 2 T m c^2)       beta*gamma = pc / (m c^2)
    B*rho [T m] = p / (Q e) = (1e9 / c) * p[GeV/c] / Q

Sign convention for the rigidity
--------------------------------
:attr:`Kinematics.brho_T_m` is the *magnitude* ``|p / (Q e)|``, so that
``k1 = G / B*rho`` is positive for a gradient that focuses *this* beam in x.
Scan files state gradients in that beam-relative sense.  Where the sign of the
charge matters (the physical bending or focusing direction of a field given as
``dBy/dx`` for a particle moving along +s), use
:attr:`Kinematics.brho_signed_T_m`, which carries the sign of the charge: a
positive ``dBy/dx`` focuses a positive particle in x and defocuses an electron.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from scipy.constants import c, physical_constants

from diagnostics.errors import InputError
from diagnostics.measurements import ParticleSpec

#: Electron rest energy, MeV (CODATA via scipy.constants).
ELECTRON_MASS_MEV = physical_constants["electron mass energy equivalent in MeV"][0]
#: Proton rest energy, MeV (CODATA via scipy.constants).
PROTON_MASS_MEV = physical_constants["proton mass energy equivalent in MeV"][0]
#: Atomic mass constant u c^2, MeV (CODATA via scipy.constants).
ATOMIC_MASS_UNIT_MEV = physical_constants["atomic mass constant energy equivalent in MeV"][0]
#: Rigidity per unit momentum: B*rho [T m] = BRHO_PER_GEV * p[GeV/c] / Q (= 1e9 / c, exact).
BRHO_PER_GEV = 1e9 / c
#: Rigidity per MeV/c of momentum and unit charge, T m.
BRHO_PER_MEV = 1e6 / c

#: Particle names accepted as strings; an ion needs a :class:`ParticleSpec`.
PARTICLES = ("electron", "positron", "proton", "ion")

_FIXED = {
    "electron": (ELECTRON_MASS_MEV, -1),
    "positron": (ELECTRON_MASS_MEV, +1),
    "proton": (PROTON_MASS_MEV, +1),
}


@dataclass(frozen=True)
class Kinematics:
    """Kinematic quantities of one particle at one energy.

    Attributes
    ----------
    gamma : float
        Lorentz factor, dimensionless.
    beta : float
        Speed over c, dimensionless.
    beta_gamma : float
        ``beta * gamma`` = ``pc / (m c^2)``: the factor between normalised and
        geometric emittance.
    momentum_MeV : float
        Momentum times c, MeV.
    brho_T_m : float
        Magnetic rigidity ``|p / (Q e)|``, T m (magnitude; see the module docstring).
    kinetic_energy_MeV : float
        Kinetic energy of the particle, MeV.
    mass_MeV : float
        Rest energy, MeV.
    charge : int
        Charge state in units of e, signed (-1 for an electron).
    """

    gamma: float
    beta: float
    beta_gamma: float
    momentum_MeV: float
    brho_T_m: float
    kinetic_energy_MeV: float
    mass_MeV: float
    charge: int

    @property
    def brho_signed_T_m(self) -> float:
        """Rigidity ``p / (Q e)`` with the sign of the charge, T m."""
        return math.copysign(self.brho_T_m, self.charge)


def rest_mass(particle: ParticleSpec | str) -> tuple[float, int]:
    """Rest energy (MeV) and signed charge state of ``particle``.

    Parameters
    ----------
    particle : ParticleSpec or str
        ``"electron"``, ``"positron"``, ``"proton"``, or an ion given as a
        :class:`~diagnostics.measurements.ParticleSpec` with ``charge`` and either
        ``mass_MeV`` (rest energy of the ion) or ``mass_u`` (relative atomic mass
        A_r of the neutral atom, from which ``m = A_r u - Q m_e``; the electron
        binding energy, below 1e-5 relative, is neglected).

    Returns
    -------
    mass_MeV, charge : float, int

    Examples
    --------
    >>> round(rest_mass(ParticleSpec("ion", mass_u=12.0, charge=6))[0], 5)
    11174.86325
    """
    if isinstance(particle, str):
        particle = ParticleSpec(particle.strip().lower())
    name = (particle.name or "").strip().lower()
    if name in _FIXED:
        mass, charge = _FIXED[name]
        if particle.charge is not None and int(particle.charge) != charge:
            raise InputError(f"particle: charge {particle.charge} given for a {name} (expected {charge})")
        return mass, charge
    if name != "ion" and particle.mass_MeV is None and particle.mass_u is None:
        raise InputError(f"particle: unknown name {particle.name!r} (expected one of {', '.join(PARTICLES)})")
    if particle.charge is None or int(particle.charge) == 0:
        raise InputError("particle: an ion needs a non-zero 'charge' (charge state in units of e)")
    charge = int(particle.charge)
    if particle.mass_MeV is not None:
        mass = float(particle.mass_MeV)
    elif particle.mass_u is not None:
        # ion mass from the neutral atom: m = A_r u - Q m_e (METHODS 1.6, AME convention)
        mass = float(particle.mass_u) * ATOMIC_MASS_UNIT_MEV - charge * ELECTRON_MASS_MEV
    else:
        raise InputError("particle: an ion needs 'mass_MeV' (rest energy) or 'mass_u' (atomic mass)")
    if not math.isfinite(mass) or mass <= 0:
        raise InputError(f"particle: rest mass must be a positive number of MeV, got {mass!r}")
    return mass, charge


def kinematics(kinetic_energy_MeV: float, particle: ParticleSpec | str) -> Kinematics:
    """Relativistic kinematics of ``particle`` at total kinetic energy ``kinetic_energy_MeV``.

    Parameters
    ----------
    kinetic_energy_MeV : float
        Kinetic energy of one particle (total, not per nucleon), MeV; > 0.
    particle : ParticleSpec or str
        See :func:`rest_mass`.

    Returns
    -------
    Kinematics

    Examples
    --------
    >>> k = kinematics(100.0, "electron")
    >>> round(k.gamma, 6), round(k.brho_T_m, 6)
    (196.695118, 0.335264)
    """
    t = float(kinetic_energy_MeV)
    if not math.isfinite(t) or t <= 0:
        raise InputError(f"kinetic_energy_MeV: expected a positive number, got {kinetic_energy_MeV!r}")
    mass, charge = rest_mass(particle)
    gamma = 1.0 + t / mass
    # pc = sqrt(T^2 + 2 T mc^2) avoids the cancellation in sqrt(E^2 - m^2) at low T
    pc = math.sqrt(t * t + 2.0 * t * mass)
    beta_gamma = pc / mass
    beta = beta_gamma / gamma
    brho = BRHO_PER_MEV * pc / abs(charge)
    return Kinematics(
        gamma=gamma,
        beta=beta,
        beta_gamma=beta_gamma,
        momentum_MeV=pc,
        brho_T_m=brho,
        kinetic_energy_MeV=t,
        mass_MeV=mass,
        charge=charge,
    )


def beta_gamma_err(kin: Kinematics, kinetic_energy_err_MeV: float) -> float:
    """Uncertainty of ``beta*gamma`` from a kinetic-energy uncertainty (linear propagation).

    ``d(beta gamma)/dT = gamma / (pc) = 1 / (beta m c^2)``.
    """
    return abs(float(kinetic_energy_err_MeV)) / (kin.beta * kin.mass_MeV)


def k1_from_gradient(gradient_T_per_m, brho_T_m):
    """Quadrupole strength ``k1 = G / B*rho`` (m^-2) from a gradient (T/m) and rigidity (T m).

    Works element-wise on arrays.  Pass :attr:`Kinematics.brho_T_m` for gradients
    stated relative to the beam (the scan-file convention) or
    :attr:`Kinematics.brho_signed_T_m` for physical ``dBy/dx`` values.

    Examples
    --------
    >>> round(k1_from_gradient(10.0, kinematics(100.0, "electron").brho_T_m), 6)
    29.827216
    """
    return gradient_T_per_m / brho_T_m


def larmor_k(field_T, brho_T_m):
    """Solenoid Larmor wavenumber ``K = B0 / (2 B*rho)`` (1/m), element-wise."""
    return field_T / (2.0 * brho_T_m)
