"""Which area: areamc's true (ellipsoidal) areas against a national grid's planar areas.

``areamc inspect`` on a layer in a projected CRS in metres or feet shows, beside the exact planar
and geodesic totals (true areas on WGS84), ``planar_total_in_layer_crs``: shapely's area in the
layer's own CRS, the grid area (docs/methods.md §5, "Which area").  The layer is a 10 x 10 km
square drawn in the British National Grid (EPSG:27700), written here.  Its grid area is 100 km²
by construction; its true area comes from pyproj.Geod (Karney 2013, "Algorithms for geodesics",
J. Geodesy 87:43-55); the point scale factor k of the grid's Transverse Mercator from pyproj's
``Proj.get_factors`` and from the leading term of the usual series,
k ≈ F₀ (1 + E′²/(2ρνF₀²)) (cf. Snyder 1987, USGS Prof. Paper 1395, §8; from memory), with
F₀ = 0.9996012717 on the central meridian 2° W (Ordnance Survey, "A guide to coordinate systems
in Great Britain"; from memory).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import fiona
import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import box, mapping

from areamc.describe import describe_layer, grid_unit_m
from areamc.load import layer_from_geometries
from conftest import run_cli

#: The square: eastings 530-540 km, northings 180-190 km of EPSG:27700 (central London, E′ = 135 km).
SQUARE = box(530_000, 180_000, 540_000, 190_000)
SIDE_M = 10_000.0
CENTRE = (535_000.0, 185_000.0)
#: False easting of the grid's true origin (EPSG:27700's x_0; OS guide, from memory).
E0 = 400_000.0
#: Scale factor on the central meridian (OS guide, from memory); the true origin is 49° N, 2° W.
F0 = 0.9996012717
#: Airy 1830 ellipsoid of OSGB36: a = 6 377 563.396 m, b = 6 356 256.909 m (OS guide, from memory).
AIRY_A, AIRY_B = 6_377_563.396, 6_356_256.909
#: The scale of the OSGB36 to WGS84 Helmert transformation, -20.4894 ppm (OS guide, from memory).
HELMERT_SCALE = -20.4894e-6
#: areamc's default --densify, 1 km (docs/methods.md §6), in the grid's metres.
DENSIFY_M = 1000.0
WGS84 = pyproj.Geod(ellps="WGS84")
AIRY = pyproj.Geod(ellps="airy")


def reproject(geom, src, dst):
    trans = pyproj.Transformer.from_crs(src, dst, always_xy=True)
    return shapely.transform(geom, lambda xy: np.column_stack(trans.transform(xy[:, 0], xy[:, 1])))


def geod_area(geod, geom) -> float:
    return abs(geod.geometry_area_perimeter(geom)[0])


def radii(lat_deg: float, a: float, b: float) -> tuple[float, float]:
    """Radii of curvature in the meridian (ρ) and the prime vertical (ν) at a latitude (common practice)."""
    e2 = 1 - (b / a) ** 2
    s2 = math.sin(math.radians(lat_deg)) ** 2
    return a * (1 - e2) / (1 - e2 * s2) ** 1.5, a / math.sqrt(1 - e2 * s2)


def write(path, geom, crs) -> str:
    with fiona.open(path, "w", driver="GPKG", crs=crs, schema={"geometry": "Polygon", "properties": {"name": "str"}}) \
            as dst:
        dst.write({"geometry": mapping(geom), "properties": {"name": "square"}})
    return str(path)


@pytest.fixture(scope="module")
def square(tmp_path_factory) -> str:
    return write(tmp_path_factory.mktemp("grid") / "square_27700.gpkg", SQUARE, "EPSG:27700")


def inspect_record(capsys, path, units="m2") -> dict:
    rc, out, err = run_cli(capsys, ["inspect", str(path), "--format", "json", "--units", units])
    assert rc == 0, err
    return json.loads(out)["results"][0]


def test_inspect__grid_square__grid_area_is_100_km2_and_true_area_is_geod(capsys, square):
    info = inspect_record(capsys, square, "km2")
    assert info["crs"] == "EPSG:27700" and info["crs_unit"] == "metre"
    assert info["planar_total_in_layer_crs"] == pytest.approx(100.0, rel=1e-12)  # shapely: 10 km x 10 km
    # The true area: pyproj.Geod on WGS84 of the square densified as areamc densifies it (1 km, in the
    # grid), taken to lon/lat by pyproj's default transformation, the one areamc's transformers use too.
    lonlat = reproject(shapely.segmentize(SQUARE, DENSIFY_M), "EPSG:27700", "EPSG:4326")
    true_km2 = geod_area(WGS84, lonlat) / 1e6
    assert info["geodesic_total"] == pytest.approx(true_km2, rel=1e-9)
    assert info["exact_planar_total"] == pytest.approx(true_km2, rel=1e-8)  # the plane's distortion is < 1e-9
    assert abs(info["geodesic_total"] / info["planar_total_in_layer_crs"] - 1) > 2e-4  # they do differ here


def test_grid_area__is_the_true_area_on_the_grid_ellipsoid_times_the_mean_of_k_squared(capsys, square):
    """Grid area = ∫ k² dA over the true area, so grid / true (Airy 1830) = the mean of k².

    The mean is a midpoint sum over 100 x 100 cells of 100 m: k² changes by 1e-6 across the square,
    so the sum's error is far below 1e-10; the Airy area is of the square densified at 100 m, whose
    chords are within 1e-10 of the grid's straight edges (the 1 km step leaves 2e-9).  Tolerance 1e-9.
    """
    info = inspect_record(capsys, square)
    grid = info["planar_total_in_layer_crs"]
    airy_area = geod_area(AIRY, reproject(shapely.segmentize(SQUARE, 100.0), "EPSG:27700", "EPSG:4277"))
    to_osgb = pyproj.Transformer.from_crs("EPSG:27700", "EPSG:4277", always_xy=True)
    offsets = (np.arange(100) + 0.5) * 100.0  # cell centres, metres from the square's west and south edges
    east, north = np.meshgrid(530_000 + offsets, 180_000 + offsets)
    lon, lat = to_osgb.transform(east.ravel(), north.ravel())
    k2 = pyproj.Proj("EPSG:27700").get_factors(lon, lat).areal_scale  # conformal: areal scale = k²
    assert grid / airy_area == pytest.approx(float(np.mean(k2)), rel=1e-9)

    # k at the centre alone is off by the spread of E'^2 across the square: the mean of E'^2 exceeds
    # its centre value by side²/12, so mean k² / k(centre)² - 1 = side² / (12 ρ ν F0²) to first order.
    centre = pyproj.Proj("EPSG:27700").get_factors(*to_osgb.transform(*CENTRE))
    rho, nu = radii(to_osgb.transform(*CENTRE)[1], AIRY_A, AIRY_B)
    spread = SIDE_M ** 2 / (12 * rho * nu * F0 ** 2)
    assert float(np.mean(k2)) / centre.areal_scale - 1 == pytest.approx(spread, rel=0.02)  # 2.0e-7
    assert abs(grid / airy_area - centre.areal_scale) < 1.5 * spread * centre.areal_scale


def test_scale_factor__pyproj_against_the_series_and_the_central_meridian():
    """k ≈ F0 (1 + E'²/(2ρνF0²)): the next term, E'^4/(24 ρ²ν² F0^4), is 7.6e-9 at E' = 135 km, so the
    leading term agrees with pyproj to 1e-8; on the central meridian k = F0 (OS guide)."""
    to_osgb = pyproj.Transformer.from_crs("EPSG:27700", "EPSG:4277", always_xy=True)
    lon, lat = to_osgb.transform(*CENTRE)
    rho, nu = radii(lat, AIRY_A, AIRY_B)
    east = CENTRE[0] - E0
    series = F0 * (1 + east ** 2 / (2 * rho * nu * F0 ** 2))
    factors = pyproj.Proj("EPSG:27700").get_factors(lon, lat)
    assert factors.meridional_scale == pytest.approx(series, rel=1e-8)
    assert factors.parallel_scale == pytest.approx(factors.meridional_scale, rel=1e-9)  # conformal
    assert pyproj.Proj("EPSG:27700").get_factors(-2.0, 49.0).meridional_scale == pytest.approx(F0, rel=1e-10)


def test_true_area__wgs84_against_airy__the_helmert_scale_and_the_surface_height(capsys, square):
    """The 55 ppm between the Airy and the WGS84 areas is the datum change: the Helmert transformation
    scales lengths by (1 + s), and a point on the Airy surface lies h above WGS84's, so its footprint
    on WGS84 is smaller by (1 - h/ρ)(1 - h/ν) (common practice).  h comes from pyproj's 3-D transformation."""
    wgs = pyproj.Transformer.from_crs("EPSG:27700", "EPSG:4326", always_xy=True)
    wgs.transform(*CENTRE)
    if "OSGB36 to WGS 84 (6)" not in wgs.get_last_used_operation().description:
        pytest.skip("PROJ uses another OSGB36 to WGS84 transformation here (the OSTN15 grid is installed)")
    info = inspect_record(capsys, square)
    airy_area = geod_area(AIRY, reproject(shapely.segmentize(SQUARE, DENSIFY_M), "EPSG:27700", "EPSG:4277"))
    lon, lat = pyproj.Transformer.from_crs("EPSG:27700", "EPSG:4277", always_xy=True).transform(*CENTRE)
    to_3d = pyproj.Transformer.from_crs(pyproj.CRS("EPSG:4277").to_3d(), "EPSG:4979", always_xy=True)
    _, lat_wgs, height = to_3d.transform(lon, lat, 0.0)
    rho, nu = radii(lat_wgs, 6_378_137.0, 6_378_137.0 * (1 - 1 / 298.257223563))  # WGS84 (NIMA TR8350.2)
    expected = (1 + HELMERT_SCALE) ** 2 * (1 - height / rho) * (1 - height / nu)
    assert 40 < height < 50  # about 46 m here
    assert info["geodesic_total"] / airy_area == pytest.approx(expected, rel=1e-8)


def test_inspect_table__grid_square__shows_the_grid_area_and_which_is_which(capsys, square):
    rc, out, err = run_cli(capsys, ["inspect", square, "--units", "km2"])
    assert rc == 0, err
    lines = out.splitlines()
    totals = {line.split(":", 1)[0]: line.split(":", 1)[1].strip() for line in lines if line.startswith("total ")}
    assert totals["total grid area (layer CRS)"] == "100.0000 km2"
    assert float(totals["total geodesic area"].split()[0]) == pytest.approx(100.0294, abs=5e-5)  # the figure above
    note = [line for line in lines if line.startswith("grid area:")]
    assert len(note) == 1 and "layer's CRS" in note[0] and "true WGS84 areas" in note[0]
    assert max(len(line) for line in lines) <= 100


@pytest.mark.parametrize("layer", ["districts", "clinics"])
def test_inspect__geographic_polygons_and_points__no_grid_area(capsys, layer):
    gpkg = Path(__file__).resolve().parents[1] / "sample_data" / "vale_county.gpkg"  # EPSG:4326, degrees
    rc, out, err = run_cli(capsys, ["inspect", str(gpkg), "--layer", layer, "--format", "json"])
    assert rc == 0, err
    info = json.loads(out)["results"][0]
    assert info["crs"] == "EPSG:4326" and info["planar_total_in_layer_crs"] is None
    rc, out, err = run_cli(capsys, ["inspect", str(gpkg), "--layer", layer])
    assert rc == 0, err
    assert "total geodesic area" in out and "grid area" not in out  # neither the line nor the note


def test_inspect__us_survey_feet__grid_area_converted_with_the_crs_factor(capsys, tmp_path):
    """A 10,000 ft square in NAD83 / New York Long Island (ftUS), EPSG:2263.  The US survey foot is
    1200/3937 m (NIST Handbook 44, Appendix C; from memory).  A State Plane zone keeps its scale error
    within 1 part in 10,000 (common practice), so the grid and true areas agree to 2e-4."""
    path = write(tmp_path / "ny.gpkg", box(980_000, 195_000, 990_000, 205_000), "EPSG:2263")
    info = inspect_record(capsys, path)
    assert info["crs_unit"] == "US survey foot"
    assert info["planar_total_in_layer_crs"] == pytest.approx(1e8 * (1200 / 3937) ** 2, rel=1e-12)
    assert info["planar_total_in_layer_crs"] == pytest.approx(info["geodesic_total"], rel=2e-4)


@pytest.mark.parametrize("crs, metres", [
    ("EPSG:27700", 1.0),                     # metre
    ("EPSG:2263", 1200 / 3937),              # US survey foot (NIST Handbook 44; from memory)
    ("EPSG:2229", 1200 / 3937),              # California zone 5, US survey foot
    ("+proj=tmerc +lon_0=-2 +lat_0=49 +k=0.9996012717 +x_0=400000 +y_0=-100000 +ellps=airy +units=ft", 0.3048),
    ("+proj=tmerc +lon_0=-2 +lat_0=49 +k=0.9996012717 +x_0=400000 +y_0=-100000 +ellps=airy +units=ch", None),
    ("EPSG:4326", None),                     # geographic: degrees
    ("EPSG:4978", None),                     # geocentric
])
def test_grid_unit__metres_and_feet_only(crs, metres):
    got = grid_unit_m(pyproj.CRS.from_user_input(crs))
    assert got == (None if metres is None else pytest.approx(metres, rel=1e-12))


def test_describe_layer__library__grid_area_in_m2():
    described = describe_layer(layer_from_geometries([SQUARE], "EPSG:27700"))
    assert described.planar_total_in_layer_crs == pytest.approx(SIDE_M ** 2, rel=1e-12)
    assert described.to_dict()["planar_total_in_layer_crs"] == described.planar_total_in_layer_crs
    lonlat = layer_from_geometries([reproject(SQUARE, "EPSG:27700", "EPSG:4326")], "EPSG:4326")
    assert describe_layer(lonlat).planar_total_in_layer_crs is None
