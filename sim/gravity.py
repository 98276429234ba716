"""WGS 84 normal gravity: what an accelerometer at rest on a bench reads.

Somigliana's closed form gives normal gravity on the ellipsoid at a geodetic latitude;
the free-air correction (a Taylor series in height) carries it up to a height above the
ellipsoid. Both, and every constant below, are those of NIMA TR8350.2, *Department of
Defense World Geodetic System 1984*, 3rd edition, chapters 3 and 4.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

#: Semi-major axis a, m (TR8350.2 table 3.1, defining).
SEMI_MAJOR_AXIS = 6378137.0
#: Flattening f (TR8350.2 table 3.1, defining).
FLATTENING = 1.0 / 298.257223563
#: Earth's angular velocity omega, rad/s (TR8350.2 table 3.1, defining).
EARTH_RATE = 7292115.0e-11
#: Semi-minor axis b, m (TR8350.2 table 3.3, derived).
SEMI_MINOR_AXIS = 6356752.3142
#: First eccentricity squared e^2 (TR8350.2 table 3.3).
ECCENTRICITY_SQUARED = 6.69437999014e-3
#: Normal gravity at the equator gamma_e, m/s^2 (TR8350.2 table 3.4).
GAMMA_EQUATOR = 9.7803253359
#: Normal gravity at the poles gamma_p, m/s^2 (TR8350.2 table 3.4).
GAMMA_POLE = 9.8321849378
#: Normal gravity formula constant k = b gamma_p / (a gamma_e) - 1 (TR8350.2 table 3.4).
SOMIGLIANA_K = 0.00193185265241
#: m = omega^2 a^2 b / GM (TR8350.2 table 3.3).
GEODETIC_M = 0.00344978650684


def normal_gravity(latitude_deg: float | np.ndarray, height_m: float | np.ndarray = 0.0) -> float | np.ndarray:
    """Magnitude of WGS 84 normal gravity, m/s^2.

    Somigliana's closed form on the ellipsoid (TR8350.2 eq. 4-1):
    ``gamma = gamma_e (1 + k sin^2 phi) / sqrt(1 - e^2 sin^2 phi)``; then the free-air
    correction to height ``h`` (TR8350.2 eq. 4-3):
    ``gamma_h = gamma [1 - 2/a (1 + f + m - 2 f sin^2 phi) h + 3 h^2 / a^2]``.

    Parameters
    ----------
    latitude_deg : float or ndarray
        Geodetic latitude in degrees, -90 to 90.
    height_m : float or ndarray
        Height above the ellipsoid in metres. The series holds near the Earth's surface
        (TR8350.2 states it for heights of a few tens of kilometres).

    Returns
    -------
    float or ndarray
        Normal gravity in m/s^2, directed along the ellipsoid's inward normal; an
        accelerometer at rest reads it as a specific force pointing up.
    """
    if isinstance(latitude_deg, (int, float)) and isinstance(height_m, (int, float)):
        # Scalars (the flight scenario calls this at every integration step): plain math.
        if abs(latitude_deg) > 90.0:
            raise ValueError(f"latitude must be -90 to 90 degrees, not {latitude_deg!r}")
        return _gamma(math.sin(math.radians(latitude_deg)) ** 2, float(height_m), math.sqrt)
    lat = np.asarray(latitude_deg, dtype=float)
    if np.any(np.abs(lat) > 90.0):
        raise ValueError(f"latitude must be -90 to 90 degrees, not {latitude_deg!r}")
    out = _gamma(np.sin(np.radians(lat)) ** 2, np.asarray(height_m, dtype=float), np.sqrt)
    return float(out) if np.ndim(out) == 0 else out


def _gamma(s2: Any, h: Any, sqrt: Any) -> Any:
    """Somigliana (eq. 4-1) then the free-air series (eq. 4-3), for ``sin^2(latitude)`` and height."""
    gamma = GAMMA_EQUATOR * (1.0 + SOMIGLIANA_K * s2) / sqrt(1.0 - ECCENTRICITY_SQUARED * s2)
    a, f = SEMI_MAJOR_AXIS, FLATTENING
    return gamma * (1.0 - 2.0 / a * (1.0 + f + GEODETIC_M - 2.0 * f * s2) * h + 3.0 * h * h / (a * a))


def earth_rate_components(latitude_deg: float) -> tuple[float, float]:
    """Earth's rotation seen on a bench: (north, up) components in rad/s."""
    lat = math.radians(latitude_deg)
    return EARTH_RATE * math.cos(lat), EARTH_RATE * math.sin(lat)


__all__ = ["EARTH_RATE", "GAMMA_EQUATOR", "GAMMA_POLE", "earth_rate_components", "normal_gravity"]
