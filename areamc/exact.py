"""Exact reference areas, kept apart from the estimators they check.

* Planar: shapely's area of the geometry in the equal-area plane (m²).
* Geodesic: the area on the WGS84 ellipsoid of the densified geometry in
  longitude/latitude, from ``pyproj.Geod`` (Karney 2013, "Algorithms for
  geodesics", J. Geodesy 87:43-55), each short edge taken as a geodesic.
* Intersections, unions and the multiplicity arrangement of zones (m²).
* Density totals: areal weighting of blocks (Goodchild & Lam 1980) and
  cell fractions of rasters.
"""

from __future__ import annotations

import time

import numpy as np
import shapely
from shapely.geometry.polygon import orient

from .geodesy import WGS84, quadrangle_area

__all__ = [
    "planar_area",
    "geodesic_area",
    "intersection_areas",
    "covered_area",
    "multiplicity_areas",
    "at_least",
    "block_total",
    "cell_total",
]

#: Area of the WGS84 ellipsoid, m² (Snyder 1987, eq. 3-12 over the whole globe).
_ELLIPSOID_AREA = float(quadrangle_area(-180.0, -90.0, 180.0, 90.0))
#: A ring's Geod area of the wrong sign beyond this (m², one millionth of the ellipsoid)
#: means it was reduced, not that the ring is degenerate.
_REDUCED_SIGN = 1e-6 * _ELLIPSOID_AREA


def planar_area(geoms) -> np.ndarray:
    """Exact area, m², of geometries given in an equal-area plane (metres)."""
    return np.asarray(shapely.area(geoms), dtype=float)


def geodesic_area(geom_lonlat) -> float:
    """Area, m², on the WGS84 ellipsoid of a polygon given in lon/lat degrees.

    Rings are oriented first (exterior counter-clockwise, holes clockwise), since
    ``Geod.polygon_area_perimeter`` is signed and the rings' areas are added.
    Polygons across the antimeridian (longitudes beyond ±180) and round a pole
    (closed along the ±180 meridians and the pole, :mod:`areamc.globe`) are
    measured as they are: Geod follows each short edge as a geodesic.  Geod
    (GeographicLib's polygon area) reports a ring's signed area reduced to within
    half the ellipsoid's area; a ring holding more than half of it (a band round
    the globe, say) is put back by adding the ellipsoid's whole area.
    """
    parts = shapely.get_parts(geom_lonlat)
    total = 0.0
    for part in parts:
        if part.geom_type != "Polygon" or part.is_empty:
            continue
        part = orient(part, sign=1.0)
        total += _ring_area(part.exterior, 1.0)
        total += sum(_ring_area(ring, -1.0) for ring in part.interiors)
    return abs(float(total))


def _ring_area(ring, sign: float) -> float:
    """Signed WGS84 area, m², of one ring oriented `sign` (+1 counter-clockwise), unreduced."""
    xy = shapely.get_coordinates(ring)
    area, _ = WGS84.polygon_area_perimeter(xy[:, 0], xy[:, 1])
    if sign * area < -_REDUCED_SIGN:
        area += sign * _ELLIPSOID_AREA
    return float(area)


def intersection_areas(a, b) -> np.ndarray:
    """Exact planar areas, m², of the pairwise intersections ``a[i] ∩ b[i]`` (plane metres)."""
    return np.asarray(shapely.area(shapely.intersection(a, b)), dtype=float)


def covered_area(region, zones) -> float:
    """Exact planar area, m², of ``region ∩ union(zones)`` (plane metres)."""
    if len(zones) == 0:
        return 0.0
    return float(shapely.area(shapely.intersection(region, shapely.union_all(zones))))


def multiplicity_areas(zones, *, clip=None, deadline: float | None = None) -> dict[int, float] | None:
    """Exact planar area, m², covered by exactly k of `zones`, for every k ≥ 1.

    The zones' boundaries (and the clip's) are noded and polygonized into the
    faces of their planar arrangement; each face lies in a fixed set of
    zones, found by testing one interior point per face.  Returns None when
    `deadline` (a ``time.monotonic()`` value) passes between steps: a GEOS
    call in progress is not interrupted, so the budget is honoured to within
    one step.
    """
    zones = np.asarray(zones, dtype=object)
    if len(zones) == 0:
        return {}
    lines = list(shapely.boundary(zones))
    if clip is not None:
        lines.append(shapely.boundary(clip))
    noded = shapely.union_all(lines)
    if deadline is not None and time.monotonic() > deadline:
        return None
    faces = np.asarray(shapely.get_parts(shapely.polygonize(shapely.get_parts(noded))), dtype=object)
    if deadline is not None and time.monotonic() > deadline:
        return None
    if len(faces) == 0:
        return {}
    probe = shapely.point_on_surface(faces)
    if clip is not None:
        keep = shapely.within(probe, clip)
        faces, probe = faces[keep], probe[keep]
    tree = shapely.STRtree(zones)
    face_idx, _ = tree.query(probe, predicate="within")
    counts = np.bincount(face_idx, minlength=len(faces))
    areas = shapely.area(faces)
    out: dict[int, float] = {}
    for k in np.unique(counts):
        if k > 0:
            out[int(k)] = float(areas[counts == k].sum())
    return out


def at_least(exactly: dict[int, float], k: int) -> float:
    """Area covered by at least `k` zones from exactly-k areas."""
    return float(sum(a for j, a in exactly.items() if j >= k))


def block_total(blocks, rates, geom) -> float:
    """Exact integral over `geom` of a density uniform on each block: Σ rate_i |block_i ∩ geom|.

    Blocks and `geom` in plane metres, `rates` in counts per m² (count over
    block area): areal weighting (Goodchild & Lam 1980, Geo-Processing
    1:297-312).  Blocks that miss `geom` add nothing.
    """
    blocks = np.asarray(blocks, dtype=object)
    if blocks.size == 0:
        return 0.0
    inter = shapely.area(shapely.intersection(blocks, geom))
    return float(np.sum(np.asarray(rates, float) * inter))


def cell_total(cells, counts, geom) -> float:
    """Exact total of raster counts over `geom`: Σ count x |cell ∩ geom| / |cell| (cells and `geom` in plane metres).

    Only cells with a positive count that meet `geom` are intersected.
    """
    cells = np.asarray(cells, dtype=object)
    counts = np.asarray(counts, float)
    keep = counts > 0
    cells, counts = cells[keep], counts[keep]
    hit = shapely.intersects(geom, cells)
    cells, counts = cells[hit], counts[hit]
    if not len(cells):
        return 0.0
    share = shapely.area(shapely.intersection(cells, geom)) / shapely.area(cells)
    return float(np.sum(counts * share))
