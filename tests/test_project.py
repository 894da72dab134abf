"""Tests of areamc.project: equal-area planes, densification and reprojection.

References:
* Karney (2013), "Algorithms for geodesics", J. Geodesy 87:43-55, through pyproj.Geod.
* Snyder (1987), Map Projections: A Working Manual, USGS Prof. Paper 1395, eq. 3-12 (the
  authalic q function) and Appendix A (worked LAEA example).
* NIMA TR8350.2 (WGS84 defining constants, Table 3.1 [memory for the table number]).
* IOGP Guidance Note 7-2 (worked ETRS89-LAEA example).
"""

from __future__ import annotations

import math

import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import Point, Polygon, box

from areamc.errors import CRSError, NotEqualAreaError
from areamc.exact import geodesic_area, planar_area
from areamc.geodesy import WGS84, quadrangle_area
from areamc.project import (
    LONLAT,
    EqualAreaPlane,
    choose_plane,
    densify,
    measure_area_distortion,
    resolve_plane,
    transform_geometries,
    transform_geometry,
    transformer,
)

from conftest import (
    CONCAVE,
    COUNTRY,
    EQUATOR_BOX,
    HIGH_LATITUDE_BOX,
    HOLED,
    MID_LATITUDE_BOX,
    MULTI,
    TEN_DEGREE_BOX,
    assert_refused,
    lonlat_box,
)

EUROPE = (-10.0, 35.0, 30.0, 70.0)

# Quadrangle areas on WGS84, A = (a²/2) Δλ (q(φ2) − q(φ1)), computed from Snyder 1987 eq. 3-12 to
# 40 digits (pyproj.Geod, Karney 2013, J. Geodesy 87:43-55, agrees on densified boxes).
QUADRANGLES = [
    ((0.0, 0.0, 1.0, 1.0), 12_308_463_893.975352),
    ((0.0, 45.0, 1.0, 46.0), 8_686_494_956.670401),
    ((0.0, 80.0, 1.0, 81.0), 2_058_274_854.323786),
    ((10.0, 40.0, 20.0, 50.0), 875_097_690_661.69982),
    ((0.0, 0.0, 10.0, 10.0), 1_224_832_293_977.7725),
    ((170.0, -60.0, 180.0, -50.0), 711_460_782_666.68829),
]
QUADRANGLE_IDS = ["0N_0E_1deg", "45N_0E_1deg", "80N_0E_1deg", "40N_10E_10deg", "0N_0E_10deg", "60S_170E_10deg"]
#: Cap north of 80N: (a²/2)·2π·(q(90) − q(80)), computed from Snyder 1987 eq. 3-12 to 40 digits.
NORTH_OF_80_CAP = 3_908_572_761_836.572
#: Total area of the WGS84 ellipsoid, 2πa²·q(90), computed from Snyder 1987 eq. 3-12 to 40 digits
#: (pyproj.Geod, Karney 2013, agrees), with a and f of NIMA TR8350.2 (2000), Table 3.1 [memory
#: for the table number].
WGS84_TOTAL_AREA = 510_065_621_724_088.5


def rel(a, b):
    return abs(a / b - 1)


# --------------------------------------------------------------------------------------------
# WGS84 constants and the closed-form quadrangle
# --------------------------------------------------------------------------------------------


def test_wgs84__defining_constants():
    # NIMA TR8350.2, Table 3.1: a = 6 378 137 m, 1/f = 298.257 223 563.
    assert WGS84.a == 6_378_137.0
    assert 1 / WGS84.f == pytest.approx(298.257223563, rel=1e-13)


def test_quadrangle_area__whole_ellipsoid__total_area_and_authalic_radius():
    total = float(quadrangle_area(-180, -90, 180, 90))
    # Total area 510 065 621 724 088.5 m² (Snyder 1987 eq. 3-12, computed), rel 1e-12.
    assert total == pytest.approx(WGS84_TOTAL_AREA, rel=1e-12)
    # Authalic radius R_q with 4 pi R_q² = total area: 6 371 007.1809 m (NIMA TR8350.2),
    # half a unit of the last printed digit.
    assert math.sqrt(total / (4 * math.pi)) == pytest.approx(6_371_007.1809, abs=5e-5)


@pytest.mark.parametrize("bounds, expected", QUADRANGLES, ids=QUADRANGLE_IDS)
def test_quadrangle_area__closed_form_table(bounds, expected):
    # The closed-form table above (Snyder 1987 eq. 3-12), rel 1e-12.
    assert float(quadrangle_area(*bounds)) == pytest.approx(expected, rel=1e-12)


def test_quadrangle_area__cap_and_vectorised():
    assert float(quadrangle_area(-180, 80, 180, 90)) == pytest.approx(NORTH_OF_80_CAP, rel=1e-12)
    bounds = np.array([b for b, _ in QUADRANGLES])
    got = quadrangle_area(bounds[:, 0], bounds[:, 1], bounds[:, 2], bounds[:, 3])
    np.testing.assert_allclose(got, [v for _, v in QUADRANGLES], rtol=1e-12)
    # Order of the corners does not change the (unsigned) area.
    assert float(quadrangle_area(1, 1, 0, 0)) == pytest.approx(QUADRANGLES[0][1], rel=1e-12)


def test_quadrangle_area__whole_globe_matches_geodesic_library(geod):
    # pyproj.Geod (Karney 2013) carries the ellipsoid's total area itself: the area of the
    # "polygon" of a full parallel at the equator, counter-clockwise, is half the ellipsoid.
    lons = np.linspace(-180, 180, 5)[:-1]
    half, _ = geod.polygon_area_perimeter(lons, np.zeros_like(lons))
    assert 2 * abs(half) == pytest.approx(float(quadrangle_area(-180, -90, 180, 90)), rel=1e-12)


# --------------------------------------------------------------------------------------------
# Planar areas in the chosen plane against geodesic and closed-form areas
# --------------------------------------------------------------------------------------------

CASES = {
    "equator": lonlat_box(EQUATOR_BOX),
    "mid_latitude": lonlat_box(MID_LATITUDE_BOX),
    "high_latitude": lonlat_box(HIGH_LATITUDE_BOX),
    "ten_degree": lonlat_box(TEN_DEGREE_BOX),
    "country": COUNTRY,
}


@pytest.mark.parametrize("name", list(CASES))
def test_planar_area__chosen_plane__matches_geodesic(name, project, reference_geodesic_area):
    # Reference: pyproj.Geod (Karney 2013) on the polygon cut into 1000 pieces per edge, by the
    # test's own densification; rel 1e-6.
    geom = CASES[name]
    projected = project([geom])
    assert projected.plane.chosen
    assert projected.plane.distortion < 1e-6
    expected = reference_geodesic_area(geom, 1000)
    assert rel(float(planar_area(projected.planar)[0]), expected) < 1e-6
    assert rel(geodesic_area(projected.lonlat[0]), expected) < 1e-6


@pytest.mark.parametrize("bounds, expected", QUADRANGLES, ids=QUADRANGLE_IDS)
def test_planar_and_geodesic_area__four_corner_box__closed_form(bounds, expected, project):
    # The box is given by its 4 corners only; parallels are not geodesics, so this passes only
    # because the tool densifies (parallels are not geodesics, common practice; against the
    # closed form of Snyder 1987 eq. 3-12 a 10 degree box must reach rel 1e-6).
    projected = project([lonlat_box(bounds)])
    assert rel(float(planar_area(projected.planar)[0]), expected) < 1e-6
    assert rel(geodesic_area(projected.lonlat[0]), expected) < 1e-6


def test_geodesic_area__ten_degree_box__undensified_corners_are_off(geod):
    # The check above has power: pyproj.Geod on the 4 corners of the 10 degree box is off by
    # about 1.25e-3 from the closed form (computed with pyproj.Geod.polygon_area_perimeter
    # against Snyder 1987 eq. 3-12; parallels are not geodesics, common practice), far beyond 1e-6.
    w, s, e, n = TEN_DEGREE_BOX
    area, _ = geod.polygon_area_perimeter([w, e, e, w], [s, s, n, n])
    assert rel(abs(area), QUADRANGLES[3][1]) > 1e-4


@pytest.mark.parametrize("crs", [None, "EPSG:6933", "EPSG:8857"])
def test_planar_area__geodesic_edge_polygon(crs, project, geod):
    # Polygon with geodesic edges (0,0), (20,5), (12,25), (-3,15); Geod area
    # 4 237 542 455 855.994 m², computed with pyproj.Geod.polygon_area_perimeter on the 4
    # vertices (Karney 2013). Each edge is cut into 1000 geodesic pieces
    # with Geod.npts before it reaches the tool; LAEA, EPSG:6933 and EPSG:8857 agree to ~1e-7.
    expected = 4_237_542_455_855.994
    corners = [(0, 0), (20, 5), (12, 25), (-3, 15)]
    ring = []
    for (x1, y1), (x2, y2) in zip(corners, corners[1:] + corners[:1]):
        ring.append((x1, y1))
        ring.extend(geod.npts(x1, y1, x2, y2, 999))
    poly = Polygon(ring)
    assert abs(geod.geometry_area_perimeter(poly)[0]) == pytest.approx(expected, rel=1e-12)
    projected = project([poly], crs=crs)
    assert projected.plane.chosen is (crs is None)
    if crs is not None:
        assert projected.plane.label == crs
    assert rel(float(planar_area(projected.planar)[0]), expected) < 1e-7
    assert rel(geodesic_area(projected.lonlat[0]), expected) < 1e-7


# --------------------------------------------------------------------------------------------
# Which planes are accepted
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("crs", ["EPSG:3857", "EPSG:32632", "EPSG:4326"])
def test_resolve_plane__not_equal_area__refused(crs):
    with pytest.raises(NotEqualAreaError) as info:
        resolve_plane((5.0, 45.0, 12.0, 50.0), crs)
    assert crs in str(info.value) and "--" not in str(info.value)  # names the CRS, never a flag


@pytest.mark.parametrize("crs", ["EPSG:3857", "EPSG:32632", "EPSG:4326"])
def test_project_layer__not_equal_area__refused(crs, project):
    with pytest.raises(NotEqualAreaError) as info:
        project([lonlat_box(MID_LATITUDE_BOX)], crs=crs)
    # the library names the keyword the caller passed (project_layer's crs), never a command-line flag
    assert info.value.param == "crs"
    assert str(info.value).startswith(f"crs {crs}: ")
    assert "--" not in str(info.value)


@pytest.mark.parametrize("crs", ["EPSG:6933", "EPSG:3035"])
def test_resolve_plane__equal_area__accepted_over_europe(crs):
    plane = resolve_plane(EUROPE, crs)
    assert plane.label == crs and not plane.chosen
    assert plane.distortion < 1e-6


@pytest.mark.parametrize("crs", ["EPSG:6933", "EPSG:3035"])
def test_planar_area__requested_plane__country(crs, project, reference_geodesic_area):
    # pyproj.Geod reference, rel 1e-6; EPSG:3035 has northing-first axes, so this also checks that
    # planar coordinates come out (easting, northing).
    projected = project([COUNTRY], crs=crs)
    assert rel(float(planar_area(projected.planar)[0]), reference_geodesic_area(COUNTRY, 1000)) < 1e-6
    minx, miny, maxx, maxy = projected.planar[0].bounds
    assert (maxx - minx) > (maxy - miny)  # the shape is wider east-west than north-south


def test_measure_area_distortion__mercator_and_utm_scale():
    # EPSG:3857 areal scale sec²φ = 4.000 at 60 degrees (distortion 3) (Snyder 1987, ch. 7
    # Mercator [memory]); UTM zone edge (3 degrees from the central meridian) at the equator:
    # areal scale 1.001963 (computed with pyproj.Proj.get_factors at 12E 0N, EPSG:32632).
    merc, _, _ = measure_area_distortion(pyproj.CRS.from_epsg(3857), (0.0, 60.0, 0.0, 60.0))
    assert merc == pytest.approx(3.0, rel=1e-6)
    utm, _, _ = measure_area_distortion(pyproj.CRS.from_epsg(32632), (12.0, 0.0, 12.0, 0.0))
    assert utm == pytest.approx(0.001963, abs=5e-7)
    geographic, _, _ = measure_area_distortion(LONLAT, EUROPE)
    assert geographic == math.inf


def test_choose_plane__global_extent__cylindrical():
    assert choose_plane((-180.0, -80.0, 180.0, 80.0)).to_epsg() == 6933
    assert choose_plane((0.0, 0.0, 170.0, 10.0)).to_epsg() == 6933  # more than 60 degrees of arc


def test_choose_plane__regional_extent__laea_on_wgs84():
    crs = choose_plane(EUROPE)
    params = dict(item.split("=", 1) if "=" in item else (item, None) for item in crs.srs.replace("+", "").split())
    assert params["proj"] == "laea"
    assert float(params["lon_0"]) == 10.0 and float(params["lat_0"]) == 52.5
    # NIMA TR8350.2: a = 6 378 137 m, 1/f = 298.257 223 563.
    assert crs.ellipsoid.semi_major_metre == 6_378_137.0
    assert crs.ellipsoid.inverse_flattening == pytest.approx(298.257223563, rel=1e-12)


# --------------------------------------------------------------------------------------------
# Handbook worked examples, through the planes areamc builds
# --------------------------------------------------------------------------------------------


def test_choose_plane__laea__etrs89_worked_example():
    # IOGP Guidance Note 7-2, ETRS89-LAEA (EPSG:3035: lat_0 52N, lon_0 10E, FE 4 321 000 m,
    # FN 3 210 000 m): 50N 5E -> E = 3 962 799.45, N = 2 999 718.85 (half a unit of the last digit).
    # An extent centred on 52N 10E makes areamc build the same LAEA without false origin, on WGS84
    # instead of GRS80 (the two differ in b by 0.1 mm, far below the tolerance).
    plane = choose_plane((0.0, 42.0, 20.0, 62.0))
    x, y = transformer(LONLAT, plane).transform(5.0, 50.0)
    assert x + 4_321_000.0 == pytest.approx(3_962_799.45, abs=0.005)
    assert y + 3_210_000.0 == pytest.approx(2_999_718.85, abs=0.005)
    # The same point through EPSG:3035 itself, whose axes are northing first: areamc's transformer
    # must still return (easting, northing).
    out = transform_geometry(Point(5.0, 50.0), transformer(LONLAT, pyproj.CRS.from_epsg(3035)))
    assert out.x == pytest.approx(3_962_799.45, abs=0.005)
    assert out.y == pytest.approx(2_999_718.85, abs=0.005)


def test_choose_plane__laea__snyder_clarke_1866_worked_example():
    # Snyder (1987), Appendix A [published; memory, confirmed against pyproj]: LAEA on Clarke 1866,
    # phi1 = 40N, lambda0 = 100W; 30N 110W -> x = -965 932.11 m, y = -1 056 814.93 m.
    # An extent centred on 40N 100W makes areamc build its LAEA there; only the ellipsoid of that
    # very CRS definition is swapped for Clarke 1866 to match the handbook.
    plane = choose_plane((-110.0, 30.0, -90.0, 50.0))
    assert "+datum=WGS84" in plane.srs
    clarke = pyproj.CRS.from_proj4(plane.srs.replace("+datum=WGS84", "+ellps=clrk66"))
    assert clarke.ellipsoid.semi_major_metre == 6_378_206.4
    source = pyproj.CRS.from_proj4("+proj=longlat +ellps=clrk66 +no_defs +type=crs")
    x, y = transformer(source, clarke).transform(-110.0, 30.0)
    assert x == pytest.approx(-965_932.11, abs=0.005)
    assert y == pytest.approx(-1_056_814.93, abs=0.005)


# --------------------------------------------------------------------------------------------
# A layer in a projected, non-equal-area CRS (UTM zone 32N)
# --------------------------------------------------------------------------------------------


def test_project_layer__utm_layer__areal_scale(project, geod):
    # 10 km square on the zone's central meridian (9E, easting 500 000 m) near 47.9N.
    half = 5_000.0
    square = box(500_000 - half, 5_300_000 - half, 500_000 + half, 5_300_000 + half)
    projected = project([square], layer_crs="EPSG:32632")
    assert projected.plane.chosen and projected.plane.distortion < 1e-6
    planar = float(planar_area(projected.planar)[0])
    # Reference: pyproj.Geod on the square densified here every 100 m in UTM and transformed with
    # pyproj directly; rel 1e-6.
    dense = shapely.segmentize(square, 100.0)
    to_lonlat = pyproj.Transformer.from_crs("EPSG:32632", "EPSG:4326", always_xy=True)
    lon, lat = to_lonlat.transform(*np.asarray(dense.exterior.coords).T)
    expected = abs(geod.polygon_area_perimeter(lon, lat)[0])
    assert rel(planar, expected) < 1e-6
    assert rel(geodesic_area(projected.lonlat[0]), expected) < 1e-6
    # UTM areas are scaled by the areal scale factor (k0² = 0.9996² = 0.99920016 on the central
    # meridian); pyproj's get_factors, averaged over the square (midpoints of a 20 x 20 grid),
    # predicts the ratio. The scale grows as x² away from the meridian, so the mean differs from
    # the value at the centre by about 2e-7 here; the check at 1e-8 sees that difference.
    xs = 500_000 - half + (np.arange(20) + 0.5) * (2 * half / 20)
    gx, gy = np.meshgrid(xs, xs - 500_000 + 5_300_000)
    glon, glat = to_lonlat.transform(gx.ravel(), gy.ravel())
    scale = np.asarray(pyproj.Proj("EPSG:32632").get_factors(glon, glat).areal_scale).mean()
    ratio = square.area / planar
    assert ratio == pytest.approx(0.9992, abs=1e-5)
    assert ratio == pytest.approx(scale, rel=1e-8)


# --------------------------------------------------------------------------------------------
# Guards
# --------------------------------------------------------------------------------------------


def test_transform_geometry__non_finite__refused():
    # The antipode of a Lambert azimuthal plane's centre has no image (PROJ returns inf).
    plane = choose_plane((-1.0, -1.0, 1.0, 1.0))
    with pytest.raises(CRSError):
        transform_geometry(Point(180.0, 0.0), transformer(LONLAT, plane))


@pytest.mark.parametrize("step", [0.0, -1.0, float("nan")])
def test_densify__bad_step(step):
    with pytest.raises(CRSError) as info:
        densify(np.array([lonlat_box(EQUATOR_BOX)]), LONLAT, step)
    assert info.value.param == "densify_m"
    assert str(info.value).startswith("densify_m: step must be positive")


def test_project_layer__bad_densify_names_the_parameter(project):
    with pytest.raises(CRSError, match=r"^densify_m: step must be positive"):
        project([lonlat_box(EQUATOR_BOX)], densify_m=0.0)


def test_densify__geographic_step(project):
    # 1000 m becomes 1000 / 111 320 degrees (the length of a degree of the equator, common
    # practice), so no edge of the lon/lat copy is longer than that.
    projected = project([lonlat_box(MID_LATITUDE_BOX)], densify_m=1000.0)
    xy = np.asarray(projected.lonlat[0].exterior.coords)
    steps = np.hypot(*np.diff(xy, axis=0).T)
    assert steps.max() <= 1000.0 / 111_320.0 + 1e-12
    assert len(xy) > 4 * 100


# --------------------------------------------------------------------------------------------
# Extents that reach the antimeridian
# --------------------------------------------------------------------------------------------

# Regression: test cells used to be centred on the extent's edges, so a cell on longitude
# +/-180 straddled the seam of a world-wide plane and EPSG:6933 read a 3.6e4 area error.


def test_planar_area__cap_north_of_80__closed_form(project):
    # The cap north of 80N is 3 908 572 761 836.572 m² (computed from Snyder 1987 eq. 3-12). It
    # reaches the pole, so the tool picks the polar LAEA (lat_0 = 90 on WGS84, which is EPSG:6931);
    # there the 80N parallel becomes n = 360 / 0.009 = 40 000 chords of the 1 km densification,
    # which miss (2π/n)²/6 = 4.1e-9 of the disc (inscribed-polygon deficit, common practice): rel 1e-8.
    # (tests/test_globe.py checks caps, circles and the antimeridian in depth.)
    projected = project([box(-180.0, 80.0, 180.0, 90.0)])
    assert projected.plane.label == "EPSG:6931"
    assert rel(float(planar_area(projected.planar)[0]), NORTH_OF_80_CAP) < 1e-8
    assert rel(geodesic_area(projected.lonlat[0]), NORTH_OF_80_CAP) < 1e-6


@pytest.mark.parametrize("crs", ["EPSG:6933", "EPSG:8857"])
@pytest.mark.parametrize("bounds", [(-180.0, -80.0, 180.0, 80.0), (170.0, -60.0, 180.0, -50.0)], ids=["global", "east_180"])
def test_resolve_plane__global_plane__extent_touching_antimeridian(bounds, crs):
    # EPSG:6933 and EPSG:8857 are equal-area everywhere (pyproj get_factors |s - 1| <= 5e-10,
    # checked just below), so neither may be refused over any extent.
    scale = pyproj.Proj(crs).get_factors(np.array([-179.99, 179.99]), np.array([bounds[1], bounds[3]])).areal_scale
    assert np.all(np.abs(np.asarray(scale) - 1) <= 5e-10)
    plane = resolve_plane(bounds, crs)
    assert plane.distortion < 1e-6


def test_project_layer__global_extent__distortion_recorded(project):
    projected = project([box(-180.0, -60.0, 180.0, 60.0)])  # a band round the globe, edges on the seam
    assert projected.plane.label == "EPSG:6933"
    assert projected.plane.distortion < 1e-6


# --------------------------------------------------------------------------------------------
# A whole layer in one transform call: the same coordinates as feature by feature
# --------------------------------------------------------------------------------------------

# The reference below is built with pyproj and shapely alone: each feature densified with
# shapely.segmentize (the step in the layer's own units: 1000 m, or 1000 / 111 320 degrees on a
# lon/lat layer, docs/methods.md) and sent through its own call of a fresh
# pyproj.Transformer.from_crs(..., always_xy=True).  The tool's single call must give the same
# doubles, bit for bit (tolerance 0).


def _stars(rng, n, x0, y0, spread, radius, vertices=9):
    """`n` star-shaped polygons round (x0, y0) in the layer's units; every third has a hole, every fifth a twin."""
    t = np.linspace(0.0, 2 * np.pi, vertices, endpoint=False)
    out = []
    for k in range(n):
        cx, cy = x0 + rng.uniform(-spread, spread), y0 + rng.uniform(-spread, spread)
        r = radius * rng.uniform(0.3, 1.0) * (1 + 0.3 * rng.uniform(-1, 1, vertices))
        shell = np.column_stack([cx + r * np.cos(t), cy + r * np.sin(t)])
        hole = [np.column_stack([cx + 0.1 * radius * np.cos(-t), cy + 0.1 * radius * np.sin(-t)])] if k % 3 == 0 else []
        poly = Polygon(shell, hole)
        if k % 5 == 0:
            poly = shapely.MultiPolygon([poly, shapely.affinity.translate(poly, 3 * radius, 0)])
        out.append(poly)
    return out


def _per_feature(geoms, src, dst, step):
    trans = pyproj.Transformer.from_crs(src, dst, always_xy=True)

    def one(geom):
        return shapely.transform(shapely.segmentize(geom, step), lambda xy: np.column_stack(trans.transform(xy[:, 0], xy[:, 1])))

    return [one(g) for g in geoms]


def _assert_bit_identical(got, expected):
    assert len(got) == len(expected)
    assert all(shapely.equals_exact(np.asarray(got, dtype=object), np.asarray(expected, dtype=object), tolerance=0))
    assert np.array_equal(shapely.get_coordinates(got), shapely.get_coordinates(expected))


@pytest.mark.parametrize(
    "layer_crs, centre, spread, radius, step",
    [
        ("EPSG:32632", (500_000.0, 5_300_000.0), 40_000.0, 3_000.0, 1000.0),
        ("EPSG:4326", (10.6, 47.25), 0.4, 0.03, 1000.0 / 111_320.0),
    ],
    ids=["utm32n", "lonlat"],
)
def test_project_layer__whole_layer_in_one_call__identical_to_per_feature_pyproj(project, layer_crs, centre, spread, radius, step):
    rng = np.random.default_rng(7)
    projected = project(_stars(rng, 60, *centre, spread, radius), layer_crs=layer_crs)
    source = projected.source.geometries
    # the features reach 1 km edges and beyond, so densification did add vertices
    assert shapely.get_num_coordinates(projected.planar).sum() > 1.5 * shapely.get_num_coordinates(source).sum()
    _assert_bit_identical(projected.planar, _per_feature(source, layer_crs, projected.plane.crs, step))
    _assert_bit_identical(projected.lonlat, _per_feature(source, layer_crs, "EPSG:4326", step))


@pytest.mark.parametrize(
    "far, crs, plane_label",
    [
        (box(170.0, -20.0, 190.0, -15.0), "EPSG:6933", "EPSG:6933"),  # across the antimeridian: cut in a torn plane
        (box(-180.0, 80.0, 180.0, 90.0), None, "EPSG:6931"),  # round the pole: slits closed on the polar LAEA
    ],
    ids=["cylinder_cut", "polar_laea"],
)
def test_project_layer__globe_care_among_plain_features__plain_ones_identical(project, far, crs, plane_label):
    # The features needing care take their own path (tests/test_globe.py checks their areas); the
    # plain ones round them still come out bit for bit as feature-by-feature pyproj gives them.
    rng = np.random.default_rng(11)
    lat = -40.0 if crs else 70.0
    plain = _stars(rng, 12, 20.0, lat, 2.0, 0.2)
    geoms = plain[:5] + [far] + plain[5:]
    projected = project(geoms, crs=crs)
    assert projected.plane.label == plane_label
    keep = [i for i in range(len(geoms)) if i != 5]
    expected = _per_feature(projected.source.geometries[keep], "EPSG:4326", projected.plane.crs, 1000.0 / 111_320.0)
    _assert_bit_identical(projected.planar[keep], expected)
    assert projected.planar[5].is_valid and projected.planar[5].area > 0


def test_transform_geometries__mixed_types__identical_to_one_by_one():
    # Points, lines, holed polygons, multipolygons and an empty polygon in one array: one call
    # gives what pyproj gives each of them alone (and what transform_geometry gives).
    geoms = [Point(10.0, 47.0), shapely.LineString([(10.0, 47.0), (10.5, 47.2), (11.0, 47.1)]), HOLED, MULTI,
             Polygon(), CONCAVE]
    plane = pyproj.CRS.from_epsg(3035)
    trans = transformer(LONLAT, plane)
    got = transform_geometries(geoms, trans)
    _assert_bit_identical(got, _per_feature(geoms, "EPSG:4326", plane, 1e9))  # a step of 1e9 adds no vertex
    _assert_bit_identical(got, [transform_geometry(g, trans) for g in geoms])
    assert transform_geometries([], trans).shape == (0,)


# --------------------------------------------------------------------------------------------
# Non-finite output names the feature at fault
# --------------------------------------------------------------------------------------------

#: LAEA centred on (0, 0) on WGS84.  Its centre's antipode (180, 0) has no image: Snyder (1987),
#: ch. 24, shows the opposite point as the circle bounding the map [memory for the wording]; PROJ
#: returns inf there (checked with pyproj in each test).  Conversely plane points beyond that circle
#: (radius about 2 x 6 371 km, twice the authalic radius, common practice) have no lon/lat.
LAEA_0_0 = "+proj=laea +lat_0=0 +lon_0=0 +x_0=0 +y_0=0 +datum=WGS84 +units=m +no_defs +type=crs"


def _antipode_triangle():
    """A triangle whose first vertex is the antipode: its first coordinate is the one at fault."""
    return Polygon([(180.0, 0.0), (179.0, -1.0), (179.0, 1.0)])


@pytest.mark.parametrize("bad", [[0], [2], [4], [2, 4]], ids=["first", "third", "last", "third_and_fifth"])
def test_project_layer__non_finite__names_the_first_feature_at_fault(project, bad):
    plane_crs = pyproj.CRS.from_proj4(LAEA_0_0)
    x, y = pyproj.Transformer.from_crs("EPSG:4326", plane_crs, always_xy=True).transform(180.0, 0.0)
    assert not (math.isfinite(x) and math.isfinite(y))  # the premise, from pyproj itself
    ids = ["a", "b", "c", "d", "e"]
    geoms = [_antipode_triangle() if i in bad else box(10.0 * i, 0.0, 10.0 * i + 1.0, 1.0) for i in range(5)]
    plane = EqualAreaPlane(plane_crs, "laea", False, 0.0)  # given, so no extent check comes first
    with pytest.raises(CRSError, match=rf"^geometries: feature {ids[bad[0]]}: coordinates cannot be projected"):
        project(geoms, ids=ids, plane=plane)
    good = [g for i, g in enumerate(geoms) if i not in bad]  # without them the layer goes through
    assert len(project(good, plane=plane).planar) == 5 - len(bad)


def test_transform_geometries__non_finite__position_counts_empty_geometries():
    # Coordinates are matched to their geometry by running counts; empty geometries count none.
    trans = transformer(LONLAT, pyproj.CRS.from_proj4(LAEA_0_0))
    geoms = [Point(1.0, 1.0), Polygon(), box(2.0, 2.0, 3.0, 3.0), Polygon(), Point(180.0, 0.0), Point(4.0, 4.0)]
    with pytest.raises(CRSError, match=r"^item 4: coordinates cannot be projected"):
        transform_geometries(geoms, trans, lambda i: f"item {i}")
    with pytest.raises(CRSError, match=r"^geometry 4: "):
        transform_geometries(geoms, trans)


@pytest.mark.parametrize("bad", [["c"], ["c", "e"]], ids=["third", "third_and_fifth"])
def test_cli_area__layer_point_without_lonlat__refused_naming_the_feature(capsys, tmp_path, bad):
    # A layer in the LAEA above with a square beyond its bounding circle: PROJ's inverse gives inf
    # (checked with pyproj), so the layer cannot reach lon/lat and the run is refused naming it.
    import fiona
    from shapely.geometry import mapping

    far = 13_000_000.0
    lon, lat = pyproj.Transformer.from_crs(LAEA_0_0, "EPSG:4326", always_xy=True).transform(far, 500.0)
    assert not (math.isfinite(lon) and math.isfinite(lat))
    path = tmp_path / "laea.gpkg"
    schema = {"geometry": "Polygon", "properties": {"name": "str"}}
    with fiona.open(path, "w", driver="GPKG", schema=schema, crs_wkt=pyproj.CRS(LAEA_0_0).to_wkt()) as dst:
        for i, name in enumerate("abcde"):
            x = far if name in bad else 5_000.0 * i
            dst.write({"geometry": mapping(box(x, 0.0, x + 1000.0, 1000.0)), "properties": {"name": name}})
    assert_refused(capsys, ["area", path, "--id-field", "name", "-n", "1000"],
                   r"laea\.gpkg: feature c: coordinates cannot be projected", tmp_path)


@pytest.mark.parametrize("batch", [1, 50, 400])
def test_transform_geometries__large_layer_in_runs__identical_and_names_the_feature(monkeypatch, batch):
    # A layer of more coordinates than one call takes goes in runs of whole features; with the run
    # shrunk to `batch` coordinates, the result is still bit for bit the feature-by-feature pyproj
    # one, and the feature at fault is still the one named.
    from areamc import project as project_module

    monkeypatch.setattr(project_module, "_BATCH_COORDS", batch)
    rng = np.random.default_rng(3)
    geoms = [shapely.segmentize(g, 0.05) for g in _stars(rng, 30, 10.6, 47.25, 0.4, 0.03)]
    plane = pyproj.CRS.from_epsg(3035)
    got = transform_geometries(geoms, transformer(LONLAT, plane))
    _assert_bit_identical(got, _per_feature(geoms, "EPSG:4326", plane, 1e9))  # a step of 1e9 adds no vertex
    geoms[17] = shapely.Point(180.0, 0.0)
    geoms[23] = shapely.Point(180.0, 0.0)
    with pytest.raises(CRSError, match=r"^geometry 17: "):
        transform_geometries(geoms, transformer(LONLAT, pyproj.CRS.from_proj4(LAEA_0_0)))
