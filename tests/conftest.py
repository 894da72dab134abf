"""Shared geometries and fixtures for areamc's tests.

The shapes below are test inputs, not reference data: every expected value in
the tests comes from an outside source (a published formula or worked
example, pyproj.Geod, shapely or scipy), named beside the check.  All shapes
are in WGS84 longitude/latitude degrees.
"""

from __future__ import annotations

import numpy as np
import pyproj
import pytest
from shapely.geometry import MultiPolygon, Polygon, box
from shapely.geometry.polygon import orient

from areamc.load import layer_from_geometries
from areamc.project import project_layer

# --- boxes (west, south, east, north), the cells of REFERENCES.md §2 -------------------------
EQUATOR_BOX = (0.0, 0.0, 1.0, 1.0)
MID_LATITUDE_BOX = (0.0, 45.0, 1.0, 46.0)
HIGH_LATITUDE_BOX = (0.0, 80.0, 1.0, 81.0)
TEN_DEGREE_BOX = (10.0, 40.0, 20.0, 50.0)

# --- polygons with edges that are straight lines in lon/lat ---------------------------------
#: A notched quadrilateral about 60 km across (concave vertex at 10.4E 47.25N).
CONCAVE = Polygon([(10.0, 47.0), (10.8, 47.0), (10.4, 47.25), (10.8, 47.5), (10.0, 47.5)])
#: A box with two holes; the holes are given counter-clockwise, like the shell, on purpose
#: (geodesic areas are signed, so the tool must orient rings itself).
HOLED = Polygon(
    [(11.0, 47.0), (11.6, 47.0), (11.6, 47.4), (11.0, 47.4)],
    holes=[
        [(11.1, 47.1), (11.3, 47.1), (11.3, 47.3), (11.1, 47.3)],
        [(11.4, 47.1), (11.5, 47.1), (11.45, 47.3)],
    ],
)
#: Three separate parts: a box, a triangle and a concave "L".
MULTI = MultiPolygon(
    [
        box(12.0, 47.0, 12.3, 47.2),
        Polygon([(12.5, 47.0), (12.9, 47.0), (12.7, 47.35)]),
        Polygon([(12.0, 47.4), (12.6, 47.4), (12.6, 47.5), (12.1, 47.5), (12.1, 47.7), (12.0, 47.7)]),
    ]
)
#: A concave polygon about 13 x 8.5 degrees (the size of a large European country).
COUNTRY = Polygon(
    [(-5.0, 43.0), (3.0, 42.5), (8.0, 44.0), (7.0, 49.0), (2.0, 51.0), (-4.0, 48.5), (-1.0, 46.0)]
)


def lonlat_box(bounds) -> Polygon:
    """A lon/lat box given by its 4 corners only (the tool must densify it)."""
    return box(*bounds)


@pytest.fixture(scope="session")
def geod() -> pyproj.Geod:
    """pyproj.Geod on WGS84 (Karney 2013), built here, independently of areamc.project.WGS84."""
    return pyproj.Geod(ellps="WGS84")


@pytest.fixture(scope="session")
def reference_geodesic_area(geod):
    """Return ``f(polygon, pieces)``: the WGS84 area of a lon/lat polygon whose edges are straight
    in lon/lat, each edge cut into `pieces` by linear interpolation, by pyproj.Geod (Karney 2013).

    This densifies on its own (numpy), not through areamc, so it can check the tool's densify step.
    """

    def ring_area(coords, pieces):
        xy = np.asarray(coords)[:, :2]
        t = np.arange(pieces) / pieces
        parts = [a + (b - a) * t[:, None] for a, b in zip(xy[:-1], xy[1:])]
        ring = np.vstack(parts)
        area, _ = geod.polygon_area_perimeter(ring[:, 0], ring[:, 1])
        return area

    def area(geom, pieces: int = 1000) -> float:
        polys = list(geom.geoms) if hasattr(geom, "geoms") else [geom]
        total = 0.0
        for poly in polys:
            poly = orient(poly, sign=1.0)  # Geod areas are signed: shell CCW, holes CW
            total += ring_area(poly.exterior.coords, pieces)
            total += sum(ring_area(r.coords, pieces) for r in poly.interiors)
        return abs(total)

    return area


@pytest.fixture(scope="session")
def project():
    """Return ``f(geoms, layer_crs="EPSG:4326", ids=None, **project_layer kwargs)`` -> ProjectedLayer.

    `layer_crs` is the CRS the geometries are given in; ``crs=`` (passed on to
    ``project_layer``) requests an equal-area plane.
    """

    def build(geoms, layer_crs="EPSG:4326", ids=None, **kwargs):
        layer = layer_from_geometries(list(geoms), layer_crs, ids=ids)
        return project_layer(layer, **kwargs)

    return build


@pytest.fixture(scope="session")
def small_features(project):
    """CONCAVE, HOLED and MULTI projected together onto the chosen plane."""
    return project([CONCAVE, HOLED, MULTI], ids=["concave", "holed", "multi"])
