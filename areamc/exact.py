"""Exact reference areas, kept apart from the estimators they check.

* Planar: shapely's area of the geometry in the equal-area plane (m²).
* Geodesic: the area on the WGS84 ellipsoid of the densified geometry in
  longitude/latitude, from ``pyproj.Geod`` (Karney 2013, "Algorithms for
  geodesics", J. Geodesy 87:43-55), each short edge taken as a geodesic.
"""

from __future__ import annotations

import math

import numpy as np
import shapely
from shapely.geometry.polygon import orient

from .project import WGS84

__all__ = ["planar_area", "geodesic_area", "deviation", "FLAG_Z"]

#: Rows whose estimate deviates from the exact planar area by more than this
#: many standard errors are flagged.
FLAG_Z = 4.0


def planar_area(geoms) -> np.ndarray:
    """Exact area, m², of geometries given in an equal-area plane (metres)."""
    return np.asarray(shapely.area(geoms), dtype=float)


def geodesic_area(geom_lonlat) -> float:
    """Area, m², on the WGS84 ellipsoid of a polygon given in lon/lat degrees.

    Rings are oriented first (exterior counter-clockwise, holes clockwise), since
    ``Geod.geometry_area_perimeter`` is signed and adds the rings' areas.
    """
    parts = shapely.get_parts(geom_lonlat)
    total = 0.0
    for part in parts:
        if part.geom_type != "Polygon" or part.is_empty:
            continue
        area, _ = WGS84.geometry_area_perimeter(orient(part, sign=1.0))
        total += area
    return abs(float(total))


def deviation(estimate: float, exact: float, stderr: float) -> float:
    """Estimate minus exact value, in standard errors.

    When the standard error is zero (no hits, or all hits) the deviation is 0
    if the two agree to 1e-9 relative, and infinite otherwise.
    """
    diff = estimate - exact
    if stderr > 0:
        return diff / stderr
    if abs(diff) <= 1e-9 * max(abs(exact), abs(estimate), 1.0):
        return 0.0
    return math.copysign(math.inf, diff)
