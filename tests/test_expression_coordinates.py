"""Density expressions in coordinates that do not move with the computation plane.

``lon``, ``lat`` (WGS84 degrees) and ``east``, ``north`` (metres east and north of a named
``origin``, on the Lambert azimuthal equal-area plane centred there) must give the same
density at the same place whatever plane the areas are computed in; ``x``, ``y`` are metres
of the plane itself, and a plane chosen from the data moves with the data (a warning says so).

References, all outside areamc:

* pyproj.Transformer to ``+proj=laea`` centred on the origin (Snyder 1987, *Map Projections:
  A Working Manual*, USGS PP 1395, §24) for east, north; pyproj.Geod (Karney 2013) for the
  distance and azimuth from the origin, which an azimuthal projection keeps near its centre
  (Snyder 1987, p. 182: directions from the centre are true on the sphere; from memory);
* Green's theorem for the totals of the reserves scene: ∬_R f dA = ∮_∂R P dn with
  ∂P/∂e = f, P(e, n) = A e^{-n²/2s} √(π s / 2) erf(e / √(2 s)) for f = A e^{-(e² + n²)/2s}
  (calculus closed form), integrated by Gauss-Legendre along each edge (numpy.polynomial),
  in an equal-area plane, so the plane integral is the integral over the ellipsoid's area.
"""

from __future__ import annotations

import json
import math
import warnings
from pathlib import Path

import fiona
import numpy as np
import pyproj
import pytest
import shapely
from scipy.special import erf
from shapely.geometry import box, shape

from areamc.density import ExpressionDensity, build_density, parse_origin, read_density
from areamc.errors import AreamcWarning, OptionError
from areamc.project import resolve_plane
from conftest import assert_refused, run_cli

ROOT = Path(__file__).resolve().parents[1]
RESERVES = ROOT / "sample_data" / "vale_reserves_utm32n.gpkg"
COUNTY = (10.40, 47.05, 10.80, 47.45)  # the sample county's lon/lat box (degrees)
ORIGIN = (10.6, 47.25)


def laea(lon: float, lat: float) -> str:
    return f"+proj=laea +lat_0={lat} +lon_0={lon} +datum=WGS84 +units=m"


# three planes: one chosen from the data, a LAEA centred elsewhere, and EPSG:6933 (cylindrical)
PLANES = {
    "chosen": None,
    "laea elsewhere": laea(10.2, 47.6),
    "EPSG:6933": "EPSG:6933",
}


@pytest.fixture(scope="module")
def lonlat_points():
    """Fixed places over the county (degrees), from a seeded generator."""
    rng = np.random.default_rng(20261203)
    return rng.uniform(COUNTY[0], COUNTY[2], 200), rng.uniform(COUNTY[1], COUNTY[3], 200)


def on_plane(name: str):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AreamcWarning)
        return resolve_plane(COUNTY, PLANES[name])


def values_at(text: str, plane, lon, lat, origin=None):
    """The expression's coordinates and density at lon/lat places, reached through `plane`."""
    x, y = pyproj.Transformer.from_crs("EPSG:4326", plane.crs, always_xy=True).transform(lon, lat)
    source = ExpressionDensity(text, plane, origin=origin)
    return source.coordinates(np.asarray(x), np.asarray(y)), source.density(np.asarray(x), np.asarray(y))


# --- the coordinates themselves ------------------------------------------------------------------


@pytest.mark.parametrize("name", list(PLANES))
def test_coordinates__east_north__pyproj_laea_of_the_origin_whatever_the_plane(name, lonlat_points):
    lon, lat = lonlat_points
    env, value = values_at("1e-4 * exp(-(east**2 + north**2) / 2e9)", on_plane(name), lon, lat, ORIGIN)
    # lon, lat: the plane's inverse gives back the places to 1e-8 degrees (about a millimetre; PROJ's
    # ellipsoidal LAEA inverse goes through a series for the authalic latitude, ~4e-9 degrees measured here)
    np.testing.assert_allclose(env["lon"], lon, rtol=0, atol=1e-8)
    np.testing.assert_allclose(env["lat"], lat, rtol=0, atol=1e-8)
    # east, north: pyproj's own LAEA centred on the origin, built here independently (1 mm)
    east, north = pyproj.Transformer.from_crs("EPSG:4326", laea(*ORIGIN), always_xy=True).transform(lon, lat)
    np.testing.assert_allclose(env["east"], east, rtol=0, atol=1e-3)
    np.testing.assert_allclose(env["north"], north, rtol=0, atol=1e-3)
    np.testing.assert_allclose(value, 1e-4 * np.exp(-(np.square(east) + np.square(north)) / 2e9), rtol=1e-7)


@pytest.mark.parametrize("text, origin", [
    ("1e-6 * (1 + cos(radians(lat)) * (lon - 10) ** 2)", None),
    ("2e-4 * exp(-(east**2 + north**2) / 2e9)", ORIGIN),
    ("1e-6 * where(east > 0, 2, 1) * (1 + abs(north) / 1e4)", (10.55, 47.3)),
])
def test_density__same_at_the_same_places_on_every_plane(text, origin, lonlat_points):
    # the brief's criterion: equal to ~1e-6 relative on two LAEA centres and EPSG:6933
    lon, lat = lonlat_points
    values = [values_at(text, on_plane(name), lon, lat, origin)[1] for name in PLANES]
    for other in values[1:]:
        np.testing.assert_allclose(other, values[0], rtol=1e-6, atol=0)


def test_density__x_y_differ_between_planes(lonlat_points):
    # the trap, at fixed places: the same x, y expression gives other densities on another plane
    lon, lat = lonlat_points
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AreamcWarning)
        a = values_at("2e-4 * exp(-(x**2 + y**2) / 2e9)", on_plane("chosen"), lon, lat)[1]
        b = values_at("2e-4 * exp(-(x**2 + y**2) / 2e9)", on_plane("laea elsewhere"), lon, lat)[1]
    assert np.max(np.abs(a / b - 1)) > 0.1


def test_east_north__are_distance_and_azimuth_from_the_origin(lonlat_points):
    # pyproj.Geod (Karney 2013): within 20 km of the centre LAEA keeps distance to ~1e-5 relative
    # (radial scale cos(c/2), Snyder 1987 eq. 24-...; from memory) and the azimuth to a few 1e-3 degrees
    lon, lat = lonlat_points
    near = np.hypot((lon - ORIGIN[0]) * math.cos(math.radians(ORIGIN[1])), lat - ORIGIN[1]) < 0.18
    lon, lat = lon[near], lat[near]
    assert len(lon) >= 20
    env, _ = values_at("east + north + 1e9", on_plane("EPSG:6933"), lon, lat, ORIGIN)
    azimuth, _, distance = pyproj.Geod(ellps="WGS84").inv(np.full(len(lon), ORIGIN[0]),
                                                          np.full(len(lon), ORIGIN[1]), lon, lat)
    np.testing.assert_allclose(np.hypot(env["east"], env["north"]), distance, rtol=1e-5)
    bearing = np.degrees(np.arctan2(env["east"], env["north"]))
    np.testing.assert_allclose((bearing - azimuth + 180) % 360 - 180, 0, atol=5e-3)


# --- the origin: read strictly, needed by east/north, warned about when unused -------------------


@pytest.mark.parametrize("value, expected", [
    ("10.6,47.25", (10.6, 47.25)),
    (" 10.6 , 47.25 ", (10.6, 47.25)),
    ((10.6, 47.25), (10.6, 47.25)),
    ("-180,-90", (-180.0, -90.0)),
    ("180,90", (180.0, 90.0)),
    ("1e1,4.725e1", (10.0, 47.25)),
])
def test_parse_origin__accepted(value, expected):
    assert parse_origin(value) == expected


@pytest.mark.parametrize("value, match", [
    ("10.6", "expected LON,LAT"),
    ("10.6,47.25,3", "expected LON,LAT"),
    ("ten,47", "expected LON,LAT"),
    ("", "expected LON,LAT"),
    ((10.6,), "expected LON,LAT"),
    (10.6, "expected LON,LAT"),
    ("nan,47", "finite"),
    ("10,inf", "finite"),
    ("190,47", "longitude 190 lies outside"),
    ("47.25,100", "latitude 100 lies outside"),
])
def test_parse_origin__refused_naming_the_parameter(value, match):
    with pytest.raises(OptionError, match=match) as info:
        parse_origin(value)
    assert info.value.param == "origin" and str(info.value).startswith("origin: ")


def test_east_north_without_origin__refused_naming_origin_and_density():
    plane = on_plane("EPSG:6933")
    for attempt in (lambda: ExpressionDensity("1e-6 * (east > 0)", plane),
                    lambda: read_density("1e-6 * (north > 0)", kind="expression")):
        with pytest.raises(OptionError, match=r"^origin: the density expression .* uses east, north") as info:
            attempt()
        assert info.value.params == ("origin", "density")


def test_warnings__x_y_on_a_chosen_plane_only_and_unused_origin():
    def caught(make) -> list[str]:
        with warnings.catch_warnings(record=True) as record:
            warnings.simplefilter("always")
            make()
        return [str(w.message) for w in record if issubclass(w.category, AreamcWarning)]

    chosen, named = on_plane("chosen"), on_plane("EPSG:6933")
    assert chosen.chosen and not named.chosen
    (message,) = caught(lambda: ExpressionDensity("1e-6 * (1 + x / 1e6)", chosen))
    assert "uses x, y" in message and "moves with the data" in message and "--" not in message
    for plane, text, origin in ((named, "1e-6 * (1 + x / 1e6)", None), (chosen, "1e-6 * (1 + lat)", None),
                                (chosen, "1e-6 * (1 + east / 1e6)", ORIGIN)):
        assert caught(lambda t=text, p=plane, o=origin: ExpressionDensity(t, p, origin=o)) == []
    (message,) = caught(lambda: ExpressionDensity("1e-6 * (1 + lat)", named, origin=ORIGIN))
    assert message.startswith("origin is not used")
    # through read_density and build_density: one warning, and the spec keeps no unused origin
    spec_warnings = caught(lambda: read_density("1e-6", kind="expression", origin="10.6,47.25"))
    assert len(spec_warnings) == 1 and spec_warnings[0].startswith("origin is not used")
    spec = read_density("1e-6 * (1 + north / 1e6)", kind="expression", origin="10.6,47.25")
    assert spec.origin == ORIGIN and spec.to_dict()["origin"] == [10.6, 47.25]
    assert caught(lambda: build_density(spec, chosen)) == []


# --- the reserves scene from the issue, on the command line -------------------------------------

GAUSS_E = "2e-4*exp(-(east**2+north**2)/2e9)"
GAUSS_X = "2e-4*exp(-(x**2+y**2)/2e9)"
DISTRICTS_PLANE = laea(10.6084, 47.2517)  # centred on the districts, not on the reserves
SCENE = ["integrate", str(RESERVES), "--regions-id-field", "reserve_id", "-n", "40000", "--seed", "7"]


def _gauss_total(rings, a: float = 2e-4, two_s: float = 2e9) -> float:
    """∬ a·exp(-(e² + n²)/two_s) over polygons given by rings in an equal-area plane centred on the
    Gaussian: Green's theorem ∮ P dn, P = a·exp(-n²/two_s)·√(π·two_s)/2·erf(e/√two_s), by 8-point
    Gauss-Legendre on each edge (exterior counter-clockwise, holes clockwise, by shapely.orient)."""
    nodes, weights = np.polynomial.legendre.leggauss(8)
    t = (nodes + 1) / 2
    total = 0.0
    for coords in rings:
        xy = np.asarray(coords)
        e0, n0, de, dn = xy[:-1, 0:1], xy[:-1, 1:2], np.diff(xy[:, 0])[:, None], np.diff(xy[:, 1])[:, None]
        e, n = e0 + t * de, n0 + t * dn
        p = a * np.exp(-n ** 2 / two_s) * math.sqrt(math.pi * two_s) / 2 * erf(e / math.sqrt(two_s))
        total += float(np.sum(p @ (weights / 2) * dn[:, 0]))
    return total


def reference_totals(plane_crs: str) -> dict[str, float]:
    """Each reserve's total of the Gaussian centred on `plane_crs`'s origin, read with fiona and projected
    with pyproj (edges densified to 100 m in UTM first), integrated by Green's theorem."""
    out = {}
    trans = pyproj.Transformer.from_crs("EPSG:32632", plane_crs, always_xy=True)
    with fiona.open(RESERVES) as layer:
        for feature in layer:
            geom = shapely.segmentize(shape(feature.geometry), 100.0)
            geom = shapely.transform(geom, lambda c: np.column_stack(trans.transform(c[:, 0], c[:, 1])))
            polys = list(getattr(geom, "geoms", [geom]))
            rings = []
            for poly in polys:
                poly = shapely.geometry.polygon.orient(poly, 1.0)
                rings += [poly.exterior.coords, *[r.coords for r in poly.interiors]]
            out[feature.properties["reserve_id"]] = _gauss_total(rings)
    return out


def scene_run(capsys, density: str, *extra: str):
    rc, out, err = run_cli(capsys, [*SCENE, "--density", density, *extra, "--format", "json"])
    assert rc == 0, err
    doc = json.loads(out)
    return {r["id"]: (r["estimate"], r["std_error"]) for r in doc["results"]}, doc, err


def test_green_reference__matches_a_fine_midpoint_grid():
    # the reference itself, against brute force on one reserve: a 25 m midpoint grid (shapely.contains_xy)
    trans = pyproj.Transformer.from_crs("EPSG:32632", laea(*ORIGIN), always_xy=True)
    with fiona.open(RESERVES) as layer:
        feature = next(iter(layer))
    geom = shapely.transform(shapely.segmentize(shape(feature.geometry), 100.0),
                             lambda c: np.column_stack(trans.transform(c[:, 0], c[:, 1])))
    xmin, ymin, xmax, ymax = geom.bounds
    h = 25.0
    gx, gy = np.meshgrid(np.arange(xmin + h / 2, xmax, h), np.arange(ymin + h / 2, ymax, h))
    inside = shapely.contains_xy(geom, gx.ravel(), gy.ravel())
    grid = float(np.sum(2e-4 * np.exp(-(gx.ravel()[inside] ** 2 + gy.ravel()[inside] ** 2) / 2e9)) * h * h)
    green = reference_totals(laea(*ORIGIN))[feature.properties["reserve_id"]]
    assert green == pytest.approx(grid, rel=2e-3)  # the grid's boundary cells are its error, about h·perimeter


def test_reserves__east_north__same_totals_on_two_planes_and_the_reference(capsys):
    origin = ",".join(map(str, ORIGIN))
    default, doc_a, err_a = scene_run(capsys, GAUSS_E, "--origin", origin)
    districts, doc_b, err_b = scene_run(capsys, GAUSS_E, "--origin", origin, "--plane-crs", DISTRICTS_PLANE)
    assert doc_a["plane"]["chosen_from_data"] and not doc_b["plane"]["chosen_from_data"]
    assert doc_a["density"]["origin"] == list(ORIGIN)
    assert "warning" not in err_a + err_b
    reference = reference_totals(laea(*ORIGIN))
    assert set(default) == set(reference) == {"R01", "R02", "R03", "R04", "R05"}
    for rid, (est, se) in default.items():
        other, other_se = districts[rid]
        assert abs(est - other) <= 4 * math.hypot(se, other_se), rid  # 4 combined standard errors
        for e, s in ((est, se), (other, other_se)):
            assert abs(e - reference[rid]) <= 4 * s, (rid, e, s, reference[rid])


def test_reserves__x_y__the_trap_and_its_warning(capsys):
    default, doc_a, err_a = scene_run(capsys, GAUSS_X)
    districts, doc_b, err_b = scene_run(capsys, GAUSS_X, "--plane-crs", DISTRICTS_PLANE)
    warning = [line for line in err_a.splitlines() if line.startswith(("areamc: warning:", "areamc: note:"))]
    assert len(warning) == 1 and "--density" in warning[0] and "uses x, y" in warning[0]
    assert "--plane-crs" in warning[0] and "--origin" in warning[0] and "lon, lat" in warning[0]
    assert "warning" not in err_b  # a named plane: x, y are fixed, no warning
    # each run matches the Gaussian centred on its own plane's origin (x, y are that plane's metres)
    for totals, doc in ((default, doc_a), (districts, doc_b)):
        reference = reference_totals(doc["plane"]["wkt"])
        for rid, (est, se) in totals.items():
            assert abs(est - reference[rid]) <= 4 * se, (rid, est, se, reference[rid])
    # and the two planes' totals differ by far more than their errors (about 20 combined standard errors
    # for the largest gap here): the trap the warning is for
    gaps = [abs(default[r][0] - districts[r][0]) / math.hypot(default[r][1], districts[r][1]) for r in default]
    assert max(gaps) > 10, gaps


def test_reserves__lon_lat__no_warning(capsys):
    totals, _, err = scene_run(capsys, "1e-4*(1 + cos(radians(lat)))")
    assert "warning" not in err and len(totals) == 5


@pytest.mark.parametrize("extra, match", [
    ([], r"^areamc: error: --origin: the --density expression '.*' uses east, north .* LON,LAT"),
    (["--origin", "10.6"], r"--origin: expected LON,LAT in degrees"),
    (["--origin", "10.6,47.25,1"], r"--origin: expected LON,LAT in degrees"),
    (["--origin", "east,north"], r"--origin: expected LON,LAT in degrees"),
    (["--origin", "nan,47.25"], r"--origin: .*finite"),
    (["--origin", "200,47.25"], r"--origin: longitude 200 lies outside \[-180, 180\]"),
    (["--origin", "10.6,-91"], r"--origin: latitude -91 lies outside \[-90, 90\]"),
])
def test_cli__origin_refusals(capsys, tmp_path, extra, match):
    path = tmp_path / "square.geojson"
    path.write_text(json.dumps({"type": "FeatureCollection", "features": [{
        "type": "Feature", "properties": {"id": "a"},
        "geometry": shapely.geometry.mapping(box(10.55, 47.2, 10.65, 47.3))}]}))
    assert_refused(capsys, ["integrate", path, "--density", "1e-6*(1 + abs(east)/1e4)", "-n", "2000", *extra,
                            "--output", tmp_path / "out.csv"], match, tmp_path)


def test_cli__origin_without_an_expression_warns_unused(capsys, tmp_path):
    path = tmp_path / "square.geojson"
    path.write_text(json.dumps({"type": "FeatureCollection", "features": [{
        "type": "Feature", "properties": {"id": "a"},
        "geometry": shapely.geometry.mapping(box(10.55, 47.2, 10.65, 47.3))}]}))
    rc, out, err = run_cli(capsys, ["integrate", str(path), "--density", "1e-6", "--origin", "10.6,47.25",
                                    "-n", "2000", "--plane-crs", "EPSG:6933"])
    assert rc == 0 and "areamc: warning: --origin is not used" in err
