"""Tests of ``areamc.globe`` and its hooks: polygons across the antimeridian and round the poles.

Expected values come from outside areamc:

* the closed-form area of a latitude-longitude quadrangle on the ellipsoid,
  A = (a²/2) Δλ (q(φ2) − q(φ1)),
  q(φ) = (1 − e²) [sin φ / (1 − e² sin² φ) − (1/2e) ln((1 − e sin φ)/(1 + e sin φ))]
  (Snyder 1987, *Map Projections: A Working Manual*, USGS Prof. Paper 1395, eq. 3-12),
  written out below in Snyder's logarithmic form (areamc uses atanh), with WGS84
  a = 6 378 137 m and 1/f = 298.257 223 563 (NIMA TR8350.2);
* polygon areas from ``pyproj.Geod`` (Karney 2013, "Algorithms for geodesics",
  J. Geodesy 87:43-55), built here, on rings this file densifies with numpy;
* on a sphere (``pyproj.Geod(a=R, b=R)``, R the WGS84 authalic radius 6 371 007.1809 m):
  the spherical cap 2πR²(1 − cos(r/R)) (standard spherical geometry, common practice) and
  the inscribed-polygon deficit (2π/n)²/6 (common practice);
* RFC 7946 §3.1.9: a geometry crossing the antimeridian is cut into parts touching
  180 and -180.

Every polygon here is invented.  Statistical checks use fixed seeds and the binomial
standard error at the exact fill, B·sqrt(p(1 − p)/n) with p = exact / B (common practice),
which stays meaningful when every point hits (a cell that fills its box).
"""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pyproj
import pytest
import shapely
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from shapely.geometry import MultiPoint, MultiPolygon, Point, Polygon, box
from shapely.geometry.polygon import orient

from areamc import globe
from areamc.area import estimate_areas
from areamc.exact import geodesic_area, planar_area
from areamc.load import layer_from_geometries
from areamc.project import choose_plane, lonlat_bounds, project_layer, resolve_plane
from areamc.stopping import StopRule
from areamc.zones import DEFAULT_VERTICES, geodesic_circle, zones_from_points

from conftest import assert_refused, run_json

# --- WGS84 (NIMA TR8350.2) and the closed form of Snyder 1987 eq. 3-12, written out here --------
A_WGS84 = 6_378_137.0
F_WGS84 = 1 / 298.257223563
E_WGS84 = math.sqrt(F_WGS84 * (2 - F_WGS84))
GEOD = pyproj.Geod(a=A_WGS84, f=F_WGS84)
#: WGS84 authalic radius R_q (NIMA TR8350.2 [memory for the table]; √(A/4π) with A from eq. 3-12).
R_SPHERE = 6_371_007.1809
SPHERE = pyproj.Geod(a=R_SPHERE, b=R_SPHERE)


def q_snyder(lat_deg: float) -> float:
    """Snyder (1987) eq. 3-12 in its logarithmic form."""
    e = E_WGS84
    s = math.sin(math.radians(lat_deg))
    return (1 - e * e) * (s / (1 - e * e * s * s) - math.log((1 - e * s) / (1 + e * s)) / (2 * e))


def quadrangle(dlon_deg: float, lat1: float, lat2: float) -> float:
    """(a²/2) Δλ (q(φ2) − q(φ1)), m², for a cell `dlon_deg` wide between two parallels."""
    return A_WGS84**2 / 2 * math.radians(dlon_deg) * (q_snyder(lat2) - q_snyder(lat1))


#: The 0.2 x 0.1 degree cell across the antimeridian, 179.9E to 179.9W, 0 to 0.1N:
#: 246 181 319.9474 m² = 246.18 km² (computed from Snyder 1987 eq. 3-12).
CELL_AREA = 246_181_319.9474
#: The cap north of 80N, π a² (q_p − q(80°)): 3 908 572 761 836.572 m² (computed from Snyder 1987
#: eq. 3-12); the cap south of 80S has the same area.
CAP_80 = 3_908_572_761_836.572
#: Total area of the ellipsoid, 2π a² q_p (Snyder 1987 eq. 3-12).
ELLIPSOID = 2 * math.pi * A_WGS84**2 * q_snyder(90.0)

CELL_CCW = Polygon([(179.9, 0.0), (-179.9, 0.0), (-179.9, 0.1), (179.9, 0.1)])
CELL_CW = CELL_CCW.reverse()
#: RFC 7946 §3.1.9 writes the cell as two parts, touching 180 and -180.
CELL_RFC = MultiPolygon([box(179.9, 0.0, 180.0, 0.1), box(-180.0, 0.0, -179.9, 0.1)])
CELLS = {"counter_clockwise": CELL_CCW, "clockwise": CELL_CW, "rfc7946_split": CELL_RFC}


def rel(a: float, b: float) -> float:
    return abs(a / b - 1)


def se_at(exact: float, box_area: float, points: int) -> float:
    """Binomial standard error of a hit-or-miss estimate at the exact fill (common practice)."""
    p = min(exact / box_area, 1.0)
    return box_area * math.sqrt(p * (1 - p) / points)


def project(geoms, crs_in="EPSG:4326", **kwargs):
    return project_layer(layer_from_geometries(list(geoms), crs_in), **kwargs)


def ring_area(lon, lat, step=0.004) -> float:
    """Geod area (Karney 2013) of the ring through (lon, lat), degrees, given with its closing vertex
    (x0 + 360 for a ring round a pole), each edge cut here into straight lon/lat pieces of at most
    `step` degrees (numpy); signed, counter-clockwise positive."""
    lon, lat = np.asarray(lon, float), np.asarray(lat, float)
    xs, ys = [], []
    for x0, y0, x1, y1 in zip(lon[:-1], lat[:-1], lon[1:], lat[1:]):
        pieces = max(1, math.ceil(max(abs(x1 - x0), abs(y1 - y0)) / step))
        t = np.arange(pieces) / pieces
        xs.append(x0 + (x1 - x0) * t)
        ys.append(y0 + (y1 - y0) * t)
    area, _ = GEOD.polygon_area_perimeter(np.concatenate(xs), np.concatenate(ys))
    return float(area)


def proj_params(crs: pyproj.CRS) -> dict:
    """The parameters of a plane areamc built from a PROJ string, as numbers where they are numbers."""
    params = {}
    for item in crs.srs.replace("+", "").split():
        key, _, value = item.partition("=")
        try:
            params[key] = float(value)
        except ValueError:
            params[key] = value
    return params


def laea_params(crs: pyproj.CRS) -> dict:
    params = proj_params(crs)
    assert params["proj"] == "laea", params
    return params


def test_closed_forms__computed_here():
    # The constants above, recomputed from the formula written out in this file (rel 1e-12).
    assert quadrangle(0.2, 0.0, 0.1) == pytest.approx(CELL_AREA, rel=1e-12)
    assert quadrangle(360.0, 80.0, 90.0) == pytest.approx(CAP_80, rel=1e-12)
    assert math.pi * A_WGS84**2 * (q_snyder(90.0) - q_snyder(80.0)) == pytest.approx(CAP_80, rel=1e-12)
    # pyproj.Geod (Karney 2013) agrees with the closed form on a cell it measures away from the seam.
    assert abs(ring_area([10.0, 10.2, 10.2, 10.0, 10.0], [0.0, 0.0, 0.1, 0.1, 0.0], 0.001)) == pytest.approx(CELL_AREA, rel=1e-8)


# --------------------------------------------------------------------------------------------
# The cell across the antimeridian
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("name", list(CELLS))
def test_antimeridian_cell__library__closed_form(name):
    projected = project([CELLS[name]])
    # the true, contiguous extent (179.9 to 180.1), and a LAEA plane centred on it at the antimeridian
    west, south, east, north = lonlat_bounds(projected.lonlat)
    assert (west, south, east, north) == pytest.approx((179.9, 0.0, 180.1, 0.1), abs=1e-9)
    params = laea_params(projected.plane.crs)
    assert abs(params["lon_0"]) == 180 and params["lat_0"] == pytest.approx(0.05)
    assert projected.plane.distortion < 1e-8
    # geodesic (Geod on the 1 km densified cell) and exact planar areas against the closed form, rel 1e-8
    assert rel(geodesic_area(projected.lonlat[0]), CELL_AREA) < 1e-8
    assert rel(float(planar_area(projected.planar)[0]), CELL_AREA) < 1e-8
    # the estimate, within 4 standard errors; its box is the cell's own (the long way round it was
    # 4.4e11 m², 1800 times the cell)
    row = estimate_areas(projected, seed=2026).rows[0]
    assert row.box_area < 1.001 * CELL_AREA
    assert abs(row.estimate - CELL_AREA) <= 4 * se_at(CELL_AREA, row.box_area, row.points)
    assert not row.flagged


def feature_collection(geoms: dict) -> dict:
    features = [{"type": "Feature", "properties": {"name": name}, "geometry": shapely.geometry.mapping(geom)}
                for name, geom in geoms.items()]
    return {"type": "FeatureCollection", "features": features}


def test_antimeridian_cell__cli__no_flagged_row(tmp_path, capsys):
    path = tmp_path / "cells.geojson"
    path.write_text(json.dumps(feature_collection(CELLS)))
    doc = run_json(capsys, ["area", str(path), "--id-field", "name", "--seed", "2026"])  # exit 0
    rows = {row["id"]: row for row in doc["results"]}
    assert set(rows) == set(CELLS)
    for row in rows.values():
        assert not row["flagged"]
        assert rel(row["geodesic"], CELL_AREA) < 1e-8
        assert rel(row["exact_planar"], CELL_AREA) < 1e-8
        assert abs(row["estimate"] - CELL_AREA) <= 4 * se_at(CELL_AREA, row["box_area"], row["points"])


@pytest.mark.parametrize("plane", ["EPSG:6933", "EPSG:8857"])
def test_antimeridian_cell__named_world_plane(plane):
    # A world cylinder (EPSG:6933) or Equal Earth (EPSG:8857) tears along the antimeridian: the cell is
    # cut there (RFC 7946 §3.1.9) before projection, its cut edges densified (the meridians of Equal
    # Earth curve), and the distortion cells are moved off the seam, so the plane is accepted.
    projected = project([CELL_CCW], crs=plane)
    assert projected.plane.label == plane and projected.plane.distortion < 1e-8
    assert projected.planar[0].geom_type == "MultiPolygon"
    assert rel(float(planar_area(projected.planar)[0]), CELL_AREA) < 1e-8


# --------------------------------------------------------------------------------------------
# Caps round a pole
# --------------------------------------------------------------------------------------------

RING_80N = Polygon([(0.0, 80.0), (90.0, 80.0), (180.0, 80.0), (-90.0, 80.0)])
CAPS = {
    "north_box_to_the_pole": (box(-180.0, 80.0, 180.0, 90.0), 90),
    "north_ring_eastward": (RING_80N, 90),
    "north_ring_westward": (RING_80N.reverse(), 90),
    "north_ring_closed_on_the_seam": (Polygon([(-180.0, 80.0), (-90.0, 80.0), (0.0, 80.0), (90.0, 80.0), (180.0, 80.0)]), 90),
    "south_box_to_the_pole": (box(-180.0, -90.0, 180.0, -80.0), -90),
    "south_ring": (Polygon([(0.0, -80.0), (-90.0, -80.0), (180.0, -80.0), (90.0, -80.0)]), -90),
}


@pytest.mark.parametrize("name", list(CAPS))
def test_polar_cap__geodesic_planar_and_estimate(name):
    geom, pole = CAPS[name]
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no repair, no warning: the ring is not "fixed" into something else
        layer = layer_from_geometries([geom], "EPSG:4326")
    assert layer.repaired == () and layer.geometries[0].is_valid
    projected = project_layer(layer)
    params = laea_params(projected.plane.crs)  # the polar aspect of LAEA
    assert params["lat_0"] == pole and projected.plane.distortion < 1e-8
    # The 1 km densification leaves n = 360 / 0.009 = 40 000 chords along the parallel, which miss
    # (2π/n)²/6 = 4.1e-9 of the cap (inscribed-polygon deficit, common practice): rel 1e-8.
    assert rel(geodesic_area(projected.lonlat[0]), CAP_80) < 1e-8
    assert rel(float(planar_area(projected.planar)[0]), CAP_80) < 1e-8
    assert projected.planar[0].is_valid and len(projected.planar[0].interiors) == 0
    row = estimate_areas(projected, seed=2026).rows[0]
    assert abs(row.estimate - CAP_80) <= 4 * se_at(CAP_80, row.box_area, row.points)
    assert not row.flagged


@pytest.mark.parametrize("lat", [80.0, -80.0])
def test_polar_cap__against_geod_on_a_finely_densified_ring(lat):
    # pyproj.Geod (Karney 2013) on the parallel cut here into 36 000 pieces (a ring round the pole, which
    # Geod measures as it is): the chords miss (2π/36000)²/6 = 5e-9 of the cap, so the closed form
    # agrees to 1e-8, and so does areamc's geodesic area of the same cap.
    lons = np.linspace(-180.0, 180.0, 36_001)[:-1]
    reference = abs(GEOD.polygon_area_perimeter(lons, np.full_like(lons, lat))[0])
    assert rel(reference, CAP_80) < 1e-8
    cap = box(-180.0, 80.0, 180.0, 90.0) if lat > 0 else box(-180.0, -90.0, 180.0, -80.0)
    assert rel(geodesic_area(project([cap]).lonlat[0]), reference) < 1e-8


def test_polar_cap__named_polar_plane():
    # EPSG:3571 (WGS 84 / North Pole LAEA Bering Sea, lon_0 = 180): the cap is an ordinary disc there.
    projected = project([RING_80N], crs="EPSG:3571")
    assert projected.plane.label == "EPSG:3571"
    assert rel(float(planar_area(projected.planar)[0]), CAP_80) < 1e-8


@pytest.mark.parametrize("plane", ["EPSG:6933", "EPSG:8857"])
def test_polar_cap__named_world_plane(plane):
    # In a world plane the cap stays the lon/lat box to the pole it is written as (cut at ±180, closed
    # along the pole line); EPSG:6933 is cylindrical, EPSG:8857 (Equal Earth) has curved meridians.
    projected = project([RING_80N], crs=plane)
    assert rel(float(planar_area(projected.planar)[0]), CAP_80) < 1e-8


def test_band_round_the_globe__more_than_half_the_ellipsoid():
    # 60S to 60N holds 86.5% of the ellipsoid: Geod reports its ring reduced by the ellipsoid's area, and
    # areamc puts it back. Closed form (Snyder 1987 eq. 3-12), rel 1e-8; the plane stays EPSG:6933.
    expected = quadrangle(360.0, -60.0, 60.0)
    assert expected > ELLIPSOID / 2
    projected = project([box(-180.0, -60.0, 180.0, 60.0)])
    assert projected.plane.label == "EPSG:6933"
    assert rel(geodesic_area(projected.lonlat[0]), expected) < 1e-8
    assert rel(float(planar_area(projected.planar)[0]), expected) < 1e-8


def test_annulus_round_the_south_pole__polar_plane_with_a_hole():
    # A band 70S to 60S written as a lon/lat box: in the polar LAEA its two ±180 edges fold onto one line
    # and are closed, leaving an annulus (one hole). Closed form (Snyder 1987 eq. 3-12), rel 1e-8.
    expected = quadrangle(360.0, -70.0, -60.0)
    projected = project([box(-180.0, -70.0, 180.0, -60.0)])
    assert laea_params(projected.plane.crs)["lat_0"] == -90
    planar = projected.planar[0]
    assert planar.is_valid and planar.geom_type == "Polygon" and len(planar.interiors) == 1
    assert rel(float(planar.area), expected) < 1e-8
    assert rel(geodesic_area(projected.lonlat[0]), expected) < 1e-8


def test_projected_layer_round_the_south_pole():
    # A disc of 1000 km round the origin of EPSG:3031 (Antarctic polar stereographic). Reference:
    # densified every 1 km in EPSG:3031 with shapely, moved to lon/lat with pyproj, and measured by
    # pyproj.Geod as the ring round the pole it is (Karney 2013), rel 1e-9; the planar area rel 1e-7.
    disc = Point(0.0, 0.0).buffer(1_000_000.0, 64)
    to_lonlat = pyproj.Transformer.from_crs("EPSG:3031", "EPSG:4326", always_xy=True)
    lon, lat = to_lonlat.transform(*np.asarray(shapely.segmentize(disc, 1000.0).exterior.coords).T)
    reference = abs(GEOD.polygon_area_perimeter(lon, lat)[0])
    projected = project([disc], crs_in="EPSG:3031")
    assert laea_params(projected.plane.crs)["lat_0"] == -90
    assert rel(geodesic_area(projected.lonlat[0]), reference) < 1e-9
    assert rel(float(planar_area(projected.planar)[0]), reference) < 1e-7


# --------------------------------------------------------------------------------------------
# Island groups across the antimeridian
# --------------------------------------------------------------------------------------------


def wrap(lon):
    return (np.asarray(lon, float) + 180.0) % 360.0 - 180.0


def blob(lon_c, lat_c, rx, ry, n=9, phase=0.0):
    """An invented island: a wobbly ellipse (degrees), longitudes unwrapped, closing vertex included."""
    t = 2 * math.pi * np.arange(n + 1) / n + phase
    r = 1 + 0.25 * np.sin(3 * t + phase)
    return np.column_stack([lon_c + rx * r * np.cos(t), lat_c + ry * r * np.sin(t)])


#: Fiji-like: islands at 177E to 178W (unwrapped 177 to 182), one across the antimeridian.
FIJI = [blob(177.9, -17.8, 0.5, 0.4), blob(179.2, -16.6, 0.5, 0.25, phase=0.7), blob(180.05, -16.8, 0.2, 0.3, 11),
        blob(181.2, -17.4, 0.15, 0.12, phase=1.1), blob(181.6, -18.9, 0.3, 0.2, phase=2.0)]
#: Aleutian-like: a chain of long thin islands along an arc from 172E to 165W, one across 180.
ALEUTIANS = [blob(172.5 + 2.8 * k, 52.6 + 0.9 * math.sin(k / 2.5), 0.9, 0.18, 10, 0.3 * k) for k in range(9)]


def multipolygon_lonlat(parts, split_at_180: bool):
    """The parts wrapped into ±180; a part across 180 either kept whole (with its jump) or split at
    ±180 into two parts, as RFC 7946 §3.1.9 asks (with shapely, in this test)."""
    polys = []
    for xy in parts:
        if split_at_180 and xy[:, 0].min() < 180 < xy[:, 0].max():
            whole = Polygon(xy)
            east = shapely.intersection(whole, box(0, -90, 180, 90))
            west = shapely.affinity.translate(shapely.intersection(whole, box(180, -90, 360, 90)), -360.0)
            polys.extend([east, west])
        else:
            polys.append(Polygon(np.column_stack([wrap(xy[:, 0]), xy[:, 1]])))
    return MultiPolygon(polys)


@pytest.mark.parametrize("split_at_180", [False, True], ids=["whole", "rfc7946_split"])
@pytest.mark.parametrize("group", ["fiji", "aleutians"])
def test_island_group__geodesic_area_is_the_sum_of_its_islands(group, split_at_180):
    parts = FIJI if group == "fiji" else ALEUTIANS
    geom = multipolygon_lonlat(parts, split_at_180)
    # As given (edges geodesics between the vertices): areamc's geodesic area of the glued geometry is
    # the sum of pyproj.Geod's areas (Karney 2013) of the parts, measured here as the test wrote them.
    given = sum(abs(GEOD.geometry_area_perimeter(orient(p, 1.0))[0]) for p in geom.geoms)
    layer = layer_from_geometries([geom], "EPSG:4326")
    assert layer.repaired == ()
    assert rel(geodesic_area(layer.geometries[0]), given) < 1e-10
    # Densified (edges straight in lon/lat): against each island's unwrapped ring cut here into
    # 0.004 degree pieces; the 1 km (0.009 degree) steps of the tool leave about 2e-8.
    reference = sum(abs(ring_area(xy[:, 0], xy[:, 1])) for xy in parts)
    projected = project_layer(layer)
    west, _, east, _ = lonlat_bounds(projected.lonlat)
    assert west < 180 < east and east - west < (6 if group == "fiji" else 26)  # one short span across 180
    assert abs(laea_params(projected.plane.crs)["lon_0"]) > 170  # a LAEA centred near the antimeridian
    assert rel(geodesic_area(projected.lonlat[0]), reference) < 5e-8
    assert rel(float(planar_area(projected.planar)[0]), reference) < 5e-8
    row = estimate_areas(projected, seed=2026).rows[0]
    assert abs(row.estimate - row.exact_planar) <= 4 * se_at(row.exact_planar, row.box_area, row.points)
    assert not row.flagged


# --------------------------------------------------------------------------------------------
# Geodesic circles across the antimeridian and round a pole
# --------------------------------------------------------------------------------------------

CIRCLES = [
    (179.95, 0.0, 20_000.0),  # across the antimeridian
    (-179.9, 35.0, 150_000.0),
    (0.0, 89.5, 100_000.0),  # round the north pole (55.6 km from the centre)
    (120.0, -89.0, 250_000.0),  # round the south pole
    (0.0, 90.0, 200_000.0),  # centred on the pole
]
CIRCLE_IDS = ["across_180_small", "across_180_35N", "north_pole", "south_pole", "on_the_pole"]


@pytest.mark.parametrize("vertices", [64, DEFAULT_VERTICES])
@pytest.mark.parametrize("lon, lat, radius_m", CIRCLES, ids=CIRCLE_IDS)
def test_geodesic_circle__sphere__cap_less_the_polygon_deficit(lon, lat, radius_m, vertices):
    # On pyproj.Geod(a=R, b=R): the circle's area (Geod on the polygon areamc built) is the cap
    # 2πR²(1 − cos(r/R)) less (2π/n)²/6 of it, to 1% of that deficit (higher-order terms x²/20 and
    # (r/R)² ≤ 1.5e-3; common practice). A ring read the long way round, or round the wrong pole,
    # would be off by far more.
    poly = geodesic_circle(lon, lat, radius_m, vertices, geod=SPHERE)
    assert poly.is_valid
    area = abs(SPHERE.geometry_area_perimeter(orient(poly, 1.0))[0])
    cap = 2 * math.pi * R_SPHERE**2 * (1 - math.cos(radius_m / R_SPHERE))
    assert 1 - area / cap == pytest.approx((2 * math.pi / vertices) ** 2 / 6, rel=0.01)


@pytest.mark.parametrize("lon, lat, radius_m", CIRCLES, ids=CIRCLE_IDS)
def test_geodesic_circle__wgs84__against_geod_and_through_the_plane(lon, lat, radius_m):
    # exact.geodesic_area of the circle equals pyproj.Geod's area of the n-gon through the vertices
    # Geod.fwd gives, computed here (Karney 2013), rel 1e-9; then the circle goes through the plane.
    n = DEFAULT_VERTICES
    lons, lats, _ = GEOD.fwd(np.full(n, lon), np.full(n, lat), np.linspace(0, 360, n, endpoint=False),
                             np.full(n, radius_m))
    expected = abs(GEOD.polygon_area_perimeter(lons, lats)[0])
    poly = geodesic_circle(lon, lat, radius_m)
    assert rel(geodesic_area(poly), expected) < 1e-9
    projected = project([poly])
    assert projected.plane.distortion < 1e-8
    planar = float(planar_area(projected.planar)[0])
    assert rel(planar, geodesic_area(projected.lonlat[0])) < 1e-7
    row = estimate_areas(projected, seed=2026).rows[0]
    assert abs(row.estimate - planar) <= 4 * se_at(planar, row.box_area, row.points)


def test_zones_from_points__circles_overlapping_across_the_antimeridian_are_merged():
    # Two 30 km circles 0.02 degrees apart, one each side of 180: their union, not their sum.
    # Reference: the same Geod.fwd vertices, unwrapped here, projected with pyproj to a LAEA at
    # (180, 10) on WGS84 (equal-area, Snyder 1987 ch. 24) and united with shapely; rel 1e-6.
    layer = layer_from_geometries([MultiPoint([(179.99, 10.0), (-179.99, 10.0)])], "EPSG:4326", kind="point")
    union = zones_from_points(layer, radius_m=30_000.0).geometries[0]
    laea = pyproj.Transformer.from_crs("EPSG:4326", "+proj=laea +lat_0=10 +lon_0=180 +datum=WGS84", always_xy=True)
    discs = []
    for lon in (179.99, -179.99):
        n = DEFAULT_VERTICES
        lons, lats, _ = GEOD.fwd(np.full(n, lon), np.full(n, 10.0), np.linspace(0, 360, n, endpoint=False),
                                 np.full(n, 30_000.0))
        discs.append(Polygon(np.column_stack(laea.transform(np.unwrap(lons, period=360), lats))))
    expected = shapely.union_all(discs).area
    assert expected < 1.1 * discs[0].area  # they overlap almost wholly
    assert rel(geodesic_area(union), expected) < 1e-6


# --------------------------------------------------------------------------------------------
# Random simple polygons anywhere, through the plane (hypothesis)
# --------------------------------------------------------------------------------------------


@st.composite
def star_polygons(draw):
    """A star-shaped lon/lat polygon (unwrapped vertices), small or large, anywhere, often across 180."""
    n = draw(st.integers(5, 10))
    lon_c = 180.0 + draw(st.floats(-2.0, 2.0)) if draw(st.booleans()) else draw(st.floats(-180.0, 180.0))
    rx = draw(st.floats(0.02, 0.5)) if draw(st.booleans()) else draw(st.floats(2.0, 25.0))
    ry = min(rx * draw(st.floats(0.3, 1.0)), 8.0)
    lat_c = draw(st.floats(-88.0 + ry, 88.0 - ry))
    radii = np.array(draw(st.lists(st.floats(0.45, 1.0), min_size=n, max_size=n)))
    jitter = np.array(draw(st.lists(st.floats(-0.3, 0.3), min_size=n, max_size=n)))
    t = 2 * math.pi * (np.arange(n) + jitter) / n
    xy = np.column_stack([lon_c + rx * radii * np.cos(t), lat_c + ry * radii * np.sin(t)])
    xy = np.vstack([xy, xy[:1]])  # closed
    return xy[::-1] if draw(st.booleans()) else xy


@st.composite
def polar_rings(draw):
    """A ring winding once round a pole (unwrapped longitudes rising by 360), either way round."""
    n = draw(st.integers(6, 14))
    sign = 1.0 if draw(st.booleans()) else -1.0
    base = draw(st.floats(50.0, 87.0))
    amplitude = draw(st.floats(0.0, min(4.0, 89.0 - base)))
    start = draw(st.floats(-180.0, 180.0))
    jitter = np.array(draw(st.lists(st.floats(-0.35, 0.35), min_size=n, max_size=n)))
    wobble = np.array(draw(st.lists(st.floats(-1.0, 1.0), min_size=n, max_size=n)))
    xy = np.column_stack([start + 360.0 * (np.arange(n) + jitter) / n, sign * (base + amplitude * wobble)])
    xy = np.vstack([xy, xy[:1] + [360.0, 0.0]])  # closed once round: back at the start, 360 degrees on
    return xy[::-1] if draw(st.booleans()) else xy


@settings(max_examples=16, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
@given(xy=st.one_of(star_polygons(), polar_rings()))
def test_fuzz__random_simple_polygons_anywhere(xy):
    # Reference: pyproj.Geod (Karney 2013) on the unwrapped ring, densified here; a ring round a pole
    # encloses the smaller cap (all caps here are under a fifth of the ellipsoid). Chords of a
    # densification miss a share of the area that falls as step² and grows as the polygon shrinks
    # (docs/methods.md §6: about 1e-6 for a 40 km² polygon at 77N at the default 1 km), so both steps
    # scale with the polygon's size (degrees of arc, roughly): 1/2000 of it for the reference (at most
    # 0.004 degrees), 1/50 for the tool (at most 1 km).
    size = max(np.ptp(xy[:, 1]), np.ptp(xy[:, 0]) * math.cos(math.radians(abs(xy[:, 1]).mean())))
    reference = abs(ring_area(xy[:, 0], xy[:, 1], step=min(0.004, size / 2000)))
    geom = Polygon(np.column_stack([wrap(xy[:-1, 0]), xy[:-1, 1]]))  # as a file would hold it: within ±180
    projected = project([geom], densify_m=min(1000.0, size * 111_000.0 / 50))
    planar = float(planar_area(projected.planar)[0])
    assert rel(planar, reference) < 1e-6
    row = estimate_areas(projected, stop=StopRule(points=20_000), seed=7).rows[0]
    assert abs(row.estimate - planar) <= 4.5 * se_at(planar, row.box_area, row.points)


# --------------------------------------------------------------------------------------------
# The rules, the canonical form and the planes
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "lon, lat, turns",
    [
        ([10, 11, 11, 10], [0, 0, 1, 1], 0),  # ordinary
        ([179.9, -179.9, -179.9, 179.9], [0, 0, 0.1, 0.1], 0),  # across 180 the short way
        ([0, 90, 180, -90], [80] * 4, 1),  # round the north pole, eastward
        ([0, -90, 180, 90], [80] * 4, -1),  # westward
        ([-180, -90, 0, 90, 180], [80] * 5, 1),  # closed on the seam: -180 and 180 are one point
        ([180, 180, -180, -180], [80, 90, 90, 80], 0),  # a box to the pole: its path over the pole is written out
        ([-180, 180, 180, -180], [-60, -60, 60, 60], 0),  # a band round the globe: two full parallels
        ([0, 120, 240, 0, 120, 240], [80] * 6, 2),  # twice round
    ],
)
def test_ring_winding__short_way_rule(lon, lat, turns):
    assert globe.ring_winding(lon, lat) == turns


def test_normalize__canonical_form():
    # away from the seam and the poles: the very same object
    square = box(10.0, 40.0, 11.0, 41.0)
    assert globe.normalize(square) is square
    # across 180: contiguous, west bound in [-180, 180), east beyond 180
    assert globe.normalize(CELL_CW).bounds == pytest.approx((179.9, 0.0, 180.1, 0.1))
    # 0..360 data come back within [-180, 180)
    assert globe.normalize(box(200.0, 10.0, 210.0, 20.0)).bounds == pytest.approx((-160.0, 10.0, -150.0, 20.0))
    # an RFC 7946 split is glued back into one polygon
    glued = globe.normalize(CELL_RFC)
    assert glued.geom_type == "Polygon" and glued.is_valid and glued.bounds == pytest.approx((179.9, 0.0, 180.1, 0.1))
    # a ring round the pole: cut at ±180 and closed over the pole, a valid lon/lat polygon
    cap = globe.normalize(RING_80N)
    assert cap.is_valid and cap.bounds == pytest.approx((-180.0, 80.0, 180.0, 90.0))
    assert cap.equals(box(-180.0, 80.0, 180.0, 90.0))


def test_normalize__hole_across_the_seam_in_a_cap():
    # A cap north of 80N with a hole (a lake) across 180: the hole is cut out on both sides of the seam.
    # Closed form (Snyder 1987 eq. 3-12): cap less the 2 x 1 degree cell of the hole; rel 1e-8.
    lake = [(179.0, 84.0), (181.0, 84.0), (181.0, 85.0), (179.0, 85.0)]
    geom = Polygon([(0.0, 80.0), (90.0, 80.0), (180.0, 80.0), (-90.0, 80.0)], holes=[[(x if x <= 180 else x - 360, y) for x, y in lake]])
    projected = project([geom])
    expected = CAP_80 - quadrangle(2.0, 84.0, 85.0)
    assert rel(geodesic_area(projected.lonlat[0]), expected) < 1e-8
    assert rel(float(planar_area(projected.planar)[0]), expected) < 1e-8


@pytest.mark.parametrize(
    "bounds, proj, lat_0, lon_0",
    [
        ((177.0, -19.0, 182.0, -16.0), "laea", -17.5, 179.5),  # Fiji-like, across 180
        ((178.0, 10.0, 185.0, 12.0), "laea", 11.0, -178.5),  # centre beyond 180, given in ±180
        ((-180.0, 80.0, 180.0, 90.0), "laea", 90.0, 0.0),  # reaches the north pole
        ((-180.0, -90.0, 180.0, -60.0), "laea", -90.0, 0.0),  # reaches the south pole
        ((-180.0, 60.0, 180.0, 85.0), "laea", 90.0, 0.0),  # round the globe at high latitude
        ((120.0, -30.0, 290.0, 30.0), "cea", None, -155.0),  # wide, across 180: a cylinder centred on it
    ],
)
def test_choose_plane__antimeridian_and_polar_extents(bounds, proj, lat_0, lon_0):
    params = proj_params(choose_plane(bounds))
    assert params["proj"] == proj
    assert params["lon_0"] == pytest.approx(lon_0)
    if lat_0 is not None:
        assert params["lat_0"] == pytest.approx(lat_0)
    # each plane chosen is measured equal-area over its extent (Snyder 1987 eq. 3-12 cells)
    assert resolve_plane(bounds).distortion < 1e-8


def test_choose_plane__extent_within_180_keeps_the_world_plane():
    assert choose_plane((-180.0, -60.0, 180.0, 60.0)).to_epsg() == 6933


@pytest.mark.parametrize("plane", ["EPSG:6933", "EPSG:8857"])
def test_resolve_plane__world_plane_over_a_tiny_extent_on_the_seam(plane):
    # An extent narrower than two distortion cells, straddling 180: the cell is moved off the seam.
    assert resolve_plane((179.999, 0.0, 180.001, 0.001), plane).distortion < 1e-9


def write_geojson(path, geoms: dict):
    path.write_text(json.dumps(feature_collection(geoms)))
    return path


TWICE = [(float(x), 80.0) for x in wrap(np.linspace(0.0, 720.0, 17)[:-1])]
CROSSING = [(0.0, 80.0), (100.0, 84.0), (100.0, 80.0), (0.0, 84.0), (180.0, 82.0), (-90.0, 82.0)]


@pytest.mark.parametrize(
    "case, argv, match",
    [
        ("twice_round_the_pole", ["area", "{twice}"], r"twice\.geojson \(layer twice\): feature 0: a ring winds 2 times round a pole"),
        ("hole_round_the_pole", ["area", "{hole}"], r"hole\.geojson \(layer hole\): feature 0: a hole goes round a pole but the outer ring does not"),
        ("ring_round_the_pole_crossing_itself", ["area", "{crossing}"], r"crossing\.geojson \(layer crossing\): feature 0: its ring round the north pole crosses itself"),
        ("circle_larger_than_a_hemisphere", ["overlap", "{points}", "--radius", "10000km"], r"--radius: a reach of 1e\+07 m makes circles larger than a hemisphere"),
    ],
)
def test_cli__refused(case, argv, match, tmp_path, capsys):
    files = {
        "twice": write_geojson(tmp_path / "twice.geojson", {"0": Polygon(TWICE)}),
        "hole": write_geojson(tmp_path / "hole.geojson", {"0": Polygon(box(0, 0, 10, 10).exterior.coords, holes=[RING_80N.exterior.coords])}),
        "crossing": write_geojson(tmp_path / "crossing.geojson", {"0": Polygon(CROSSING)}),
        "points": write_geojson(tmp_path / "points.geojson", {"a": Point(10.0, 0.0)}),
    }
    # the files hold features named "0" etc.; ids are the feature ids, so the message says "feature 0"
    assert_refused(capsys, [a.format(**files) for a in argv], match, tmp_path)


def test_random_polygons_anywhere__wilson_intervals_cover_at_the_nominal_rate():
    """Over 150 random star-shaped polygons placed anywhere (a third across the antimeridian, a sixth
    round a pole), areamc's 95% Wilson intervals (Wilson 1927) must contain the exact planar area at
    the nominal rate: fail if fewer than binom.ppf(1e-3, 150, 0.95) cover (a binomial band, common
    practice; Wilson's exact coverage can dip slightly below nominal, Newcombe 1998)."""
    from scipy import stats

    rng = np.random.default_rng(20261202)
    geoms = []
    for k in range(150):
        kind = k % 6
        if kind == 5:  # round a pole, either way round and at either pole
            n = 10
            sign = 1.0 if rng.random() < 0.5 else -1.0
            lon = rng.uniform(-180, 180) + 360.0 * (np.arange(n) + rng.uniform(-0.3, 0.3, n)) / n
            lat = sign * (rng.uniform(60, 85) + rng.uniform(-2, 2, n))
            xy = np.column_stack([wrap(lon), lat])
        else:
            n = int(rng.integers(5, 11))
            lon_c = 180.0 + rng.uniform(-1, 1) if kind < 2 else rng.uniform(-180, 180)
            r = rng.uniform(0.05, 3.0)
            lat_c = rng.uniform(-80, 80)
            t = 2 * math.pi * (np.arange(n) + rng.uniform(-0.3, 0.3, n)) / n
            radii = rng.uniform(0.45, 1.0, n)
            xy = np.column_stack([wrap(lon_c + r * radii * np.cos(t)), lat_c + 0.7 * r * radii * np.sin(t)])
        geoms.append(Polygon(xy))
    covered = 0
    for k, geom in enumerate(geoms):
        projected = project([geom])
        row = estimate_areas(projected, stop=StopRule(points=4_000), seed=k).rows[0]
        covered += row.ci_low <= float(planar_area(projected.planar)[0]) <= row.ci_high
    assert covered >= stats.binom.ppf(1e-3, len(geoms), 0.95), covered
