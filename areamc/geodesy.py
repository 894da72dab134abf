"""Ellipsoid helpers: the WGS84 geodesic, the authalic q function and its inverse, quadrangle areas.

Latitudes and longitudes are in degrees unless a name says radians; areas in
square metres on the ellipsoid.  Formulas from Snyder (1987), *Map
Projections: A Working Manual*, USGS Professional Paper 1395.
"""

from __future__ import annotations

import math

import numpy as np
import pyproj

__all__ = [
    "WGS84",
    "WGS84_A",
    "WGS84_RF",
    "AUTHALIC_RADIUS_M",
    "eccentricity",
    "authalic_q",
    "latitude_from_q",
    "quadrangle_area",
]

#: WGS84 semi-major axis (m) and inverse flattening (NIMA TR8350.2, Table 3.1).
WGS84_A = 6378137.0
WGS84_RF = 298.257223563
#: The WGS84 ellipsoid, for geodesic distances, circles and areas (Karney 2013).
WGS84 = pyproj.Geod(ellps="WGS84")
#: Radius (m) of the sphere with the WGS84 ellipsoid's area, R_q = a sqrt(q_p / 2) (Snyder 1987, eq. 3-13).
AUTHALIC_RADIUS_M = 6_371_007.180_918


def eccentricity(rf: float) -> float:
    """First eccentricity of an ellipsoid with inverse flattening `rf` (0 for a sphere, ``rf = inf``)."""
    if not math.isfinite(rf):
        return 0.0
    f = 1.0 / rf
    return math.sqrt(f * (2.0 - f))


def authalic_q(phi: np.ndarray, e: float) -> np.ndarray:
    """Snyder (1987) eq. 3-12, q(φ) for latitude φ in radians and eccentricity e > 0.

    ``q = (1 − e²)[sin φ / (1 − e² sin² φ) + atanh(e sin φ) / e]``; the
    logarithm of eq. 3-12 is written as ``atanh`` to keep digits.
    """
    s = np.sin(phi)
    return (1 - e * e) * (s / (1 - (e * s) ** 2) + np.arctanh(e * s) / e)


def latitude_from_q(q: np.ndarray, e: float) -> np.ndarray:
    """Invert :func:`authalic_q`: latitude in radians for a given q (Snyder 1987, eq. 3-16, iterated).

    Eight Newton steps from the spherical start ``asin(q / 2)`` converge to
    machine precision for the Earth's eccentricity.
    """
    e2 = e * e
    phi = np.arcsin(np.clip(q / 2, -1, 1))
    for _ in range(8):
        s = np.sin(phi)
        c = np.maximum(np.cos(phi), 1e-15)
        phi = phi + (1 - e2 * s * s) ** 2 / (2 * c) * (q / (1 - e2) - s / (1 - e2 * s * s) - np.arctanh(e * s) / e)
    return phi


def quadrangle_area(lon1, lat1, lon2, lat2, *, a: float = WGS84_A, rf: float = WGS84_RF):
    """Area in m² of the cell between two meridians and two parallels on an ellipsoid.

    ``A = (a²/2) Δλ (q(φ2) − q(φ1))`` (Snyder 1987, eq. 3-12 for ``q``);
    defaults are WGS84.  Degrees in, square metres out; vectorised.  On a
    sphere (``rf = inf``) ``q = 2 sin φ``.
    """
    e = eccentricity(rf)
    dlam = np.radians(np.asarray(lon2, float) - np.asarray(lon1, float))
    phi1, phi2 = np.radians(np.asarray(lat1, float)), np.radians(np.asarray(lat2, float))
    if e == 0.0:
        dq = 2 * (np.sin(phi2) - np.sin(phi1))
    else:
        dq = authalic_q(phi2, e) - authalic_q(phi1, e)
    return np.abs(a * a / 2 * dlam * dq)
