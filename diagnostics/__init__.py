"""beamdiag: control-room beam diagnostics analysis.

The library turns wire-scanner profiles, screen images and BPM readings into
beam sizes, emittance and Twiss parameters, and orbit drift summaries, each with
its uncertainty and quality flags.

Conventions (stated once, used everywhere)
------------------------------------------
* SI units inside: metres, radians, seconds, tesla.  Energies in MeV, named so.
  Every name that carries a unit says it (``sigma_m``, ``k1_per_m2``).
* Time is timezone-aware UTC (``datetime64[ns, UTC]``).
* ``k1 > 0`` focuses in x and defocuses in y (``k_y = -k1``).
* Image coordinates: x along columns, y along rows, origin at pixel (0, 0);
  tilt is the angle from +x toward +y of the major axis,
  ``0.5 * atan2(2 * sigma_xy, sigma_xx - sigma_yy)``.

beamdiag is an analysis aid.  It is not a machine-protection, personnel-safety,
radiation-safety or clinical dose system; local procedures, radiation-safety
rules and licensed practice always take precedence.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("beamdiag")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+local"

SAFETY_NOTE = (
    "beamdiag is an analysis aid, not a machine-protection, personnel-safety, "
    "radiation-safety or clinical dose system. Local procedures, radiation-safety "
    "rules and licensed practice always take precedence."
)

__all__ = ["SAFETY_NOTE", "__version__"]
