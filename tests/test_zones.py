"""Tests of ``areamc.zones``: geodesic circles and zones made from points with a reach.

Expected values come from outside areamc:

* distances and azimuths from ``pyproj.Geod(ellps="WGS84").inv`` and polygon areas from
  ``Geod.polygon_area_perimeter`` (Karney 2013, "Algorithms for geodesics", J. Geodesy
  87:43-55), with a Geod built here, not areamc's;
* on a sphere, ``pyproj.Geod(a=R, b=R)``: the spherical cap 2πR²(1 − cos(r/R)) (standard
  spherical geometry, common practice) and the exact area of the inscribed spherical n-gon
  from the spherical excess (standard spherical trigonometry [memory]);
* on WGS84: the same cap with R the Gaussian radius of curvature sqrt(M N) at the centre's
  latitude, where
  M = a(1 − e²)/(1 − e² sin²φ)^(3/2) and N = a/sqrt(1 − e² sin²φ) (Snyder 1987, USGS
  Professional Paper 1395, eqs. 4-18 and 4-20 [memory for the equation numbers]);
* the inscribed-polygon deficit: a regular n-gon inscribed in a circle misses a
  fraction sin(x)/x ≈ 1 − x²/6 of its area, x = 2π/n (common practice);
* WGS84 a = 6 378 137 m, 1/f = 298.257 223 563 (NIMA TR8350.2, Table 3.1).
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from pathlib import Path

import fiona
import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import MultiPoint, Point, shape

from areamc.errors import AreamcWarning, LayerError, OptionError
from areamc.exact import geodesic_area
from areamc.load import layer_from_geometries, read_layer
from areamc.zones import DEFAULT_VERTICES, geodesic_circle, read_zones, zones_from_points

SAMPLE = Path(__file__).resolve().parents[1] / "sample_data"
GPKG = SAMPLE / "vale_county.gpkg"

#: WGS84 (NIMA TR8350.2), built here on purpose, independent of areamc.project.WGS84.
GEOD = pyproj.Geod(ellps="WGS84")
A_WGS84 = 6_378_137.0
F_WGS84 = 1 / 298.257223563
E2_WGS84 = F_WGS84 * (2 - F_WGS84)


def ring(poly: shapely.Polygon) -> tuple[np.ndarray, np.ndarray]:
    """Exterior vertices (lon, lat) of `poly` without the closing repeat."""
    xy = np.asarray(poly.exterior.coords)[:-1]
    return xy[:, 0], xy[:, 1]


def distances_from(lon: float, lat: float, lons: np.ndarray, lats: np.ndarray) -> np.ndarray:
    """Geodesic distances (m) from (lon, lat) to each vertex (pyproj.Geod.inv, Karney 2013)."""
    n = len(lons)
    _, _, dist = GEOD.inv(np.full(n, lon), np.full(n, lat), lons, lats)
    return np.asarray(dist)


def gaussian_radius(lat_deg: float) -> float:
    """sqrt(M N) on WGS84 (Snyder 1987 eqs. 4-18, 4-20 [memory]): the radius of the sphere
    with the ellipsoid's Gaussian curvature at this latitude."""
    s2 = math.sin(math.radians(lat_deg)) ** 2
    m = A_WGS84 * (1 - E2_WGS84) / (1 - E2_WGS84 * s2) ** 1.5
    n = A_WGS84 / math.sqrt(1 - E2_WGS84 * s2)
    return math.sqrt(m * n)


# --- geodesic_circle -------------------------------------------------------------------------


@pytest.mark.parametrize("lat", [0.0, 45.0, 70.0])
@pytest.mark.parametrize("radius_m", [500.0, 10_000.0, 300_000.0])
@pytest.mark.parametrize("vertices", [8, 64, DEFAULT_VERTICES])
def test_geodesic_circle__every_vertex_at_the_radius(lat, radius_m, vertices):
    poly = geodesic_circle(10.0, lat, radius_m, vertices)
    lons, lats = ring(poly)
    assert len(lons) == vertices
    # Geod.inv (Karney 2013) is accurate to ~15 nm; 1e-6 m is far above that and far below any
    # error a wrong construction (a planar or spherical offset) would make.
    assert np.max(np.abs(distances_from(10.0, lat, lons, lats) - radius_m)) < 1e-6


@pytest.mark.parametrize("lat", [0.0, 45.0, -60.0])
def test_geodesic_circle__azimuths_equally_spaced(lat):
    vertices = 64
    poly = geodesic_circle(10.0, lat, 25_000.0, vertices)
    lons, lats = ring(poly)
    az, _, _ = GEOD.inv(np.full(vertices, 10.0), np.full(vertices, lat), lons, lats)
    steps = np.diff(np.unwrap(np.radians(az)))
    # Reversed to counter-clockwise, so azimuths fall by 360/n degrees from one vertex to the next.
    np.testing.assert_allclose(np.abs(steps), 2 * math.pi / vertices, atol=1e-9)
    assert np.all(np.sign(steps) == np.sign(steps[0]))


@pytest.mark.parametrize("lat", [0.0, 45.0, 70.0])
def test_geodesic_circle__valid_counter_clockwise_and_holds_its_centre(lat):
    poly = geodesic_circle(10.0, lat, 20_000.0)
    assert poly.is_valid
    assert poly.exterior.is_ccw  # shapely convention for a positive-area exterior
    assert poly.contains(Point(10.0, lat))
    area, _ = GEOD.polygon_area_perimeter(*ring(poly))
    assert area > 0  # Geod areas are signed, counter-clockwise positive (pyproj docs)


@pytest.mark.parametrize("lat", [0.0, 45.0, 70.0])
@pytest.mark.parametrize("radius_m", [10_000.0, 100_000.0, 500_000.0])
@pytest.mark.parametrize("vertices", [64, DEFAULT_VERTICES])
def test_geodesic_circle__area_against_spherical_cap_and_polygon_deficit(lat, radius_m, vertices):
    """The polygon's WGS84 area (pyproj.Geod) equals the cap area on the sphere of the same
    Gaussian curvature (cap 2πR²(1 − cos(r/R)), standard spherical geometry, common practice),
    less the inscribed-polygon deficit (2π/n)²/6 (common practice).

    Both approximations are good to well under 1% of the deficit here: the polygon's own
    higher-order term is x²/20 of it (x = 2π/n), the curvature terms at 500 km are about
    (r/R)² ≈ 6e-3 of it (measured 0.5% at 500 km, 0.02% at 100 km).
    """
    poly = geodesic_circle(10.0, lat, radius_m, vertices)
    area, _ = GEOD.polygon_area_perimeter(*ring(poly))
    r_gauss = gaussian_radius(lat)
    cap = 2 * math.pi * r_gauss**2 * (1 - math.cos(radius_m / r_gauss))
    deficit = 1 - area / cap
    expected = (2 * math.pi / vertices) ** 2 / 6
    assert deficit == pytest.approx(expected, rel=0.01)


def test_geodesic_circle__deficit_falls_as_one_over_n_squared():
    """Quadrupling the vertices divides the missed area by 16 (common practice: x²/6, x = 2π/n)."""
    r_gauss = gaussian_radius(45.0)
    cap = 2 * math.pi * r_gauss**2 * (1 - math.cos(30_000.0 / r_gauss))
    deficits = []
    for n in (32, 128):
        area, _ = GEOD.polygon_area_perimeter(*ring(geodesic_circle(10.0, 45.0, 30_000.0, n)))
        deficits.append(1 - area / cap)
    assert deficits[0] / deficits[1] == pytest.approx(16.0, rel=0.01)


#: A sphere of the WGS84 authalic radius R_q = 6 371 007.180 918 m (NIMA TR8350.2 (2000), Table
#: 3.1 [memory for the table number]; also √(A/4π) with A from Snyder 1987 eq. 3-12).
R_SPHERE = 6_371_007.180918
SPHERE = pyproj.Geod(a=R_SPHERE, b=R_SPHERE)


def spherical_ngon_area(radius_m: float, vertices: int, r: float = R_SPHERE) -> float:
    """Exact area of the regular geodesic n-gon inscribed in a spherical circle of radius `radius_m`.

    n triangles centre-vertex-vertex, each with two sides ρ = radius/R and included angle
    θ = 2π/n; a triangle's spherical excess E from two sides and their included angle is
    tan(E/2) = tan(a/2) tan(b/2) sin C / (1 + tan(a/2) tan(b/2) cos C) (standard spherical
    trigonometry [memory]); the area is n E R².
    """
    t = math.tan(radius_m / r / 2) ** 2
    theta = 2 * math.pi / vertices
    return vertices * r * r * 2 * math.atan(t * math.sin(theta) / (1 + t * math.cos(theta)))


@pytest.mark.parametrize("lat", [0.0, 45.0, 70.0])
@pytest.mark.parametrize("radius_m", [1_000.0, 100_000.0, 1_000_000.0])
@pytest.mark.parametrize("vertices", [8, 64, DEFAULT_VERTICES])
def test_geodesic_circle__on_a_sphere_is_the_exact_spherical_ngon(lat, radius_m, vertices):
    """On pyproj.Geod(a=R, b=R): vertices at distance r, area = the inscribed spherical n-gon."""
    poly = geodesic_circle(10.0, lat, radius_m, vertices, geod=SPHERE)
    lons, lats = ring(poly)
    _, _, dist = SPHERE.inv(np.full(vertices, 10.0), np.full(vertices, lat), lons, lats)
    assert np.max(np.abs(np.asarray(dist) - radius_m)) < 1e-6
    area, _ = SPHERE.polygon_area_perimeter(lons, lats)
    # Karney's areas are good to ~0.1 m² absolute; the 1 km circle (3e6 m²) sets the tolerance
    assert area == pytest.approx(spherical_ngon_area(radius_m, vertices), rel=1e-10)


@pytest.mark.parametrize("lat", [0.0, 45.0, 70.0])
@pytest.mark.parametrize("radius_m", [10_000.0, 100_000.0])
@pytest.mark.parametrize("vertices", [64, DEFAULT_VERTICES])
def test_geodesic_circle__on_a_sphere_against_the_cap(lat, radius_m, vertices):
    """Cap area 2πR²(1 − cos(r/R)) (standard spherical geometry, common practice) less the
    deficit (2π/n)²/6 (common practice),
    to 1% of the deficit (higher-order terms: x²/20 with x = 2π/n, and (r/R)²)."""
    poly = geodesic_circle(10.0, lat, radius_m, vertices, geod=SPHERE)
    area, _ = SPHERE.polygon_area_perimeter(*ring(poly))
    cap = 2 * math.pi * R_SPHERE**2 * (1 - math.cos(radius_m / R_SPHERE))
    assert 1 - area / cap == pytest.approx((2 * math.pi / vertices) ** 2 / 6, rel=0.01)


def test_geodesic_circle__the_ellipsoid_matters():
    """Guard: the WGS84 and spherical circles differ, so the `geod` argument is really used."""
    a = geodesic_circle(10.0, 45.0, 100_000.0, 64)
    b = geodesic_circle(10.0, 45.0, 100_000.0, 64, geod=SPHERE)
    assert np.max(np.abs(np.asarray(a.exterior.coords) - np.asarray(b.exterior.coords))) > 1e-4  # degrees


@pytest.mark.parametrize(
    "lon, lat, radius_m",
    [
        (179.95, 0.0, 20_000.0),  # crosses the antimeridian
        (-179.95, 30.0, 20_000.0),
        (0.0, 89.9, 20_000.0),  # encloses the north pole
        (0.0, -89.95, 10_000.0),  # and the south pole
    ],
)
def test_geodesic_circle__antimeridian_and_poles_built(lon, lat, radius_m):
    # Once refused, now built (tests/test_globe.py checks them in depth): a valid lon/lat polygon whose
    # geodesic area is that of the n-gon of geodesics through the vertices pyproj.Geod.fwd gives,
    # measured here with Geod.polygon_area_perimeter (Karney 2013), rel 1e-9.
    poly = geodesic_circle(lon, lat, radius_m)
    assert poly.is_valid
    n = DEFAULT_VERTICES
    lons, lats, _ = GEOD.fwd(np.full(n, lon), np.full(n, lat), np.linspace(0, 360, n, endpoint=False), np.full(n, radius_m))
    expected = abs(GEOD.polygon_area_perimeter(lons, lats)[0])
    assert geodesic_area(poly) == pytest.approx(expected, rel=1e-9)


def test_geodesic_circle__larger_than_a_hemisphere__refused():
    # A ring cannot tell such a circle's inside from its outside (the smaller side is taken).
    with pytest.raises(OptionError, match="larger than a hemisphere"):
        geodesic_circle(0.0, 0.0, 10_000_000.0)


# --- zones_from_points -------------------------------------------------------------------------


def point_layer(points, crs="EPSG:4326", ids=None, properties=None):
    layer = layer_from_geometries(points, crs, ids=ids, kind="point")
    if properties is not None:
        layer = dataclasses.replace(layer, properties=tuple(properties))
    return layer


def test_zones_from_points__one_radius_for_all():
    pts = [Point(10.0, 45.0), Point(10.3, 45.2), Point(-3.0, 52.0)]
    zones = zones_from_points(point_layer(pts, ids=["a", "b", "c"]), radius_m=7_500.0, vertices=64)
    assert zones.kind == "polygon"
    assert zones.crs.to_epsg() == 4326
    assert zones.ids == ("a", "b", "c")
    for p, zone in zip(pts, zones.geometries):
        lons, lats = ring(zone)
        assert len(lons) == 64
        assert np.max(np.abs(distances_from(p.x, p.y, lons, lats) - 7_500.0)) < 1e-6


def test_zones_from_points__radius_field_per_feature():
    pts = [Point(10.0, 45.0), Point(10.3, 45.2)]
    props = [{"reach": 3_000.0}, {"reach": "12000"}]  # a numeric string is a number of metres
    zones = zones_from_points(point_layer(pts, properties=props), radius_field="reach")
    for p, zone, radius in zip(pts, zones.geometries, (3_000.0, 12_000.0)):
        assert np.max(np.abs(distances_from(p.x, p.y, *ring(zone)) - radius)) < 1e-6


def test_zones_from_points__projected_points_become_circles_around_their_lonlat():
    """Points in UTM 32N (EPSG:32632) metres: the circle is centred where pyproj puts the point."""
    utm = [Point(600_000.0, 5_230_000.0), Point(640_000.0, 5_250_000.0)]
    zones = zones_from_points(point_layer(utm, crs="EPSG:32632"), radius_m=5_000.0)
    to_lonlat = pyproj.Transformer.from_crs("EPSG:32632", "EPSG:4326", always_xy=True)
    for p, zone in zip(utm, zones.geometries):
        lon, lat = to_lonlat.transform(p.x, p.y)
        assert np.max(np.abs(distances_from(lon, lat, *ring(zone)) - 5_000.0)) < 1e-6


def test_zones_from_points__multipoint_is_the_union_of_its_circles():
    mp = MultiPoint([(10.0, 45.0), (10.1, 45.0), (10.5, 45.3)])  # first two circles overlap
    zones = zones_from_points(point_layer([mp]), radius_m=5_000.0, vertices=128)
    # The union built here from circles constructed with pyproj.Geod.fwd, independently.
    parts = []
    az = np.linspace(0.0, 360.0, 128, endpoint=False)
    for lon, lat in [(p.x, p.y) for p in mp.geoms]:
        lons, lats, _ = GEOD.fwd(np.full(128, lon), np.full(128, lat), az, np.full(128, 5_000.0))
        parts.append(shapely.Polygon(np.column_stack([lons, lats])))
    expected = shapely.union_all(parts)
    got = zones.geometries[0]
    assert got.geom_type == "MultiPolygon" and len(got.geoms) == 2
    # lon/lat areas are only a proxy here; equality of the two sets is what is checked
    assert shapely.area(shapely.symmetric_difference(got, expected)) < 1e-12 * expected.area + 1e-15


def test_zones_from_points__needs_exactly_one_radius():
    layer = point_layer([Point(10.0, 45.0)], properties=[{"reach": 1000.0}])
    # library messages name the Python parameters, not the command-line flags
    with pytest.raises(OptionError, match="holds points; give radius_m or radius_field") as info:
        zones_from_points(layer)
    assert info.value.params == ("radius_m", "radius_field") and "--radius" not in str(info.value)
    with pytest.raises(OptionError, match="one of them"):
        zones_from_points(layer, radius_m=1000.0, radius_field="reach")


def test_zones_from_points__too_few_vertices():
    with pytest.raises(OptionError, match=r"^vertices: at least 8") as info:
        zones_from_points(point_layer([Point(10.0, 45.0)]), radius_m=1000.0, vertices=7)
    assert info.value.param == "vertices"


def test_zones_from_points__unknown_radius_field_names_the_fields():
    layer = point_layer([Point(10.0, 45.0)], properties=[{"reach_m": 1000.0, "name": "x"}])
    with pytest.raises(LayerError, match=r"radius_field 'reach' is not a field.*reach_m, name") as info:
        zones_from_points(layer, radius_field="reach")
    assert info.value.param == "radius_field"


@pytest.mark.parametrize("bad", [None, -5.0, 0.0, "abc", float("nan"), float("inf")])
def test_zones_from_points__bad_radius_values_refused(bad):
    layer = point_layer(
        [Point(10.0, 45.0), Point(10.1, 45.1)], ids=["ok", "bad"], properties=[{"reach": 1000.0}, {"reach": bad}]
    )
    with pytest.raises(LayerError, match="feature bad"):
        zones_from_points(layer, radius_field="reach")


# --- read_zones ----------------------------------------------------------------------------------


def test_read_zones__clinics_become_circles_of_their_reach():
    zones = read_zones(str(GPKG), layer="clinics", id_field="clinic_id", radius_field="reach_m")
    with fiona.open(GPKG, layer="clinics") as src:
        clinics = {f.properties["clinic_id"]: (shape(f.geometry), f.properties["reach_m"]) for f in src}
    assert set(zones.ids) == set(clinics)
    for fid, zone in zip(zones.ids, zones.geometries):
        centre, reach = clinics[fid]
        assert np.max(np.abs(distances_from(centre.x, centre.y, *ring(zone)) - reach)) < 1e-6


def test_read_zones__polygon_layer_ignores_a_radius_with_a_warning():
    plain = read_layer(str(GPKG), layer="service_zones", id_field="zone_id")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        zones = read_zones(str(GPKG), layer="service_zones", id_field="zone_id", radius_m=5_000.0)
    assert any(issubclass(w.category, AreamcWarning) and "ignored" in str(w.message) for w in caught)
    assert zones.ids == plain.ids
    assert all(a.equals_exact(b, 0.0) for a, b in zip(zones.geometries, plain.geometries))


def test_read_zones__point_layer_without_radius_refused():
    with pytest.raises(OptionError, match="give radius_m or radius_field") as info:
        read_zones(str(GPKG), layer="clinics")
    assert "--radius" not in str(info.value)
