"""Tests of ``areamc.describe.describe_layer``: what a layer holds and the plane it would use.

Every expected value is computed in this file, outside areamc:

* quadrangle areas on WGS84 from the closed form A = (a²/2) Δλ (q(φ2) − q(φ1)) with the
  authalic function q(φ) = (1 − e²) [sin φ / (1 − e² sin² φ) − 1/(2e) ln((1 − e sin φ)/(1 + e sin φ))]
  (Snyder 1987, *Map Projections: A Working Manual*, USGS Prof. Paper 1395, eq. 3-12), with a and f
  of WGS84 (NIMA TR8350.2, Table 3.1 [memory for the table number]);
* geodesic areas from ``pyproj.Geod(ellps="WGS84")`` (Karney 2013, J. Geodesy 87:43-55) on the
  geometries densified here with shapely;
* planar areas from shapely after reprojecting here with pyproj into the plane the description names;
* areal scale factors from ``pyproj.Proj.get_factors``.
"""

from __future__ import annotations

import dataclasses
import inspect
import math
import warnings
from collections import Counter

import fiona

import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import Point, Polygon, box, mapping, shape

from areamc.describe import describe_fields, describe_layer
from areamc.errors import AreamcWarning, LayerError, NotEqualAreaError
from areamc.load import layer_from_geometries, read_layer

from conftest import MID_LATITUDE_BOX, STEP_DEG, TEN_DEGREE_BOX

#: WGS84 defining constants (NIMA TR8350.2): a = 6 378 137 m, 1/f = 298.257 223 563.
A = 6_378_137.0
F = 1 / 298.257223563
E2 = F * (2 - F)
E = math.sqrt(E2)
GEOD = pyproj.Geod(ellps="WGS84")


def authalic_q(lat_deg: float) -> float:
    """Snyder (1987) eq. 3-12, written out here."""
    s = math.sin(math.radians(lat_deg))
    return (1 - E2) * (s / (1 - E2 * s * s) - 1 / (2 * E) * math.log((1 - E * s) / (1 + E * s)))


def quadrangle(west, south, east, north) -> float:
    """Area (m²) of a lon/lat box on WGS84: (a²/2) Δλ (q(φ2) − q(φ1)), Snyder 1987 eq. 3-12."""
    return A * A / 2 * math.radians(east - west) * (authalic_q(north) - authalic_q(south))


def geod_area(geom_lonlat) -> float:
    """WGS84 area of a lon/lat (Multi)Polygon: |shell| minus |holes|, each ring by pyproj.Geod."""
    total = 0.0
    for poly in shapely.get_parts(geom_lonlat):
        total += abs(GEOD.geometry_area_perimeter(Polygon(poly.exterior))[0])
        total -= sum(abs(GEOD.geometry_area_perimeter(Polygon(r))[0]) for r in poly.interiors)
    return total


def reproject(geom, src, dst):
    trans = pyproj.Transformer.from_crs(src, dst, always_xy=True)
    return shapely.transform(geom, lambda xy: np.column_stack(trans.transform(xy[:, 0], xy[:, 1])))


def rel(a, b):
    return abs(a / b - 1)


def laea_centre(label: str) -> tuple[float, float]:
    """(lon_0, lat_0) of a PROJ string such as "+proj=laea +lat_0=47 +lon_0=10 ..."."""
    params = dict(item.lstrip("+").split("=", 1) for item in label.split() if "=" in item)
    assert params["proj"] == "laea", label
    return float(params["lon_0"]), float(params["lat_0"])


# --- polygons --------------------------------------------------------------------------------------


def test_quadrangle_reference__matches_geod_on_a_densified_box():
    # sanity of the closed form written here: pyproj.Geod on the 1-degree box cut into 1000 pieces
    # per edge (parallels are not geodesics, common practice) agrees to 1e-7
    w, s, e, n = MID_LATITUDE_BOX
    dense = shapely.segmentize(box(w, s, e, n), 0.001)
    assert rel(geod_area(dense), quadrangle(w, s, e, n)) < 1e-7


def test_describe_layer__polygon_totals_against_closed_form_geod_and_shapely():
    boxes = [box(*TEN_DEGREE_BOX), box(*MID_LATITUDE_BOX)]
    layer = layer_from_geometries(boxes, "EPSG:4326", ids=["ten", "one"])
    info = describe_layer(layer)
    assert info.kind == "polygons" and info.features == 2
    assert info.geometry_types == {"Polygon": 2}
    assert info.crs == "EPSG:4326" and info.invalid == 0 and info.empty == 0
    assert info.extent == pytest.approx((0.0, 40.0, 20.0, 50.0), abs=1e-9)
    assert info.extent_lonlat == pytest.approx((0.0, 40.0, 20.0, 50.0), abs=1e-6)
    assert 0 <= info.plane.distortion < 1e-6
    closed_form = quadrangle(*TEN_DEGREE_BOX) + quadrangle(*MID_LATITUDE_BOX)
    # Geodesic total: pyproj.Geod on the boxes densified here at the default 1 km step (Karney 2013)
    dense = [shapely.segmentize(b, STEP_DEG) for b in boxes]
    assert rel(info.geodesic_total, sum(geod_area(g) for g in dense)) < 1e-9
    # Planar total: shapely in the plane the description names, reprojected here with pyproj
    plane = pyproj.CRS.from_user_input(info.plane.label)
    assert plane.is_projected
    planar = sum(reproject(g, "EPSG:4326", plane).area for g in dense)
    assert rel(info.exact_planar_total, planar) < 1e-9
    # both against the closed-form quadrangles (Snyder 1987 eq. 3-12); a 10-degree box densified at
    # 1 km reaches 1e-6 (the same bound test_project uses)
    assert rel(info.geodesic_total, closed_form) < 1e-6
    assert rel(info.exact_planar_total, closed_form) < 1e-6
    # the plane chosen for a regional extent is a Lambert azimuthal equal-area centred on it
    assert laea_centre(info.plane.label) == pytest.approx((10.0, 45.0), abs=1e-4)
    out = info.to_dict()
    assert out["extent"] == list(info.extent) and out["layers"] == list(info.layers)
    # the plane is written as the object every command writes (EqualAreaPlane.to_dict), nothing at top level
    assert out["plane"] == info.plane.to_dict()
    assert set(out["plane"]) == {"crs", "name", "chosen_from_data", "area_distortion", "wkt"}
    assert pyproj.CRS.from_wkt(out["plane"]["wkt"]).equals(pyproj.CRS.from_user_input(info.plane.label))
    assert not {"equal_area_crs", "area_distortion", "measured_area_distortion"} & set(out)


def test_describe_layer__requested_cylindrical_plane_gives_the_closed_form():
    # In EPSG:6933 (cylindrical equal-area; parallels and meridians are straight lines, common
    # practice) a lon/lat box is a rectangle of exactly the quadrangle area.
    layer = layer_from_geometries([box(*TEN_DEGREE_BOX)], "EPSG:4326")
    info = describe_layer(layer, crs="EPSG:6933")
    assert info.plane.label == "EPSG:6933" and not info.plane.chosen
    assert rel(info.exact_planar_total, quadrangle(*TEN_DEGREE_BOX)) < 1e-9
    assert rel(info.geodesic_total, quadrangle(*TEN_DEGREE_BOX)) < 1e-6


def test_describe_layer__densify_step_is_used():
    # With a step longer than any edge the box keeps its 4 corners; pyproj.Geod on those is off the
    # closed form by about 1.25e-3 (computed with pyproj.Geod.polygon_area_perimeter), far beyond 1e-6.
    layer = layer_from_geometries([box(*TEN_DEGREE_BOX)], "EPSG:4326")
    coarse = describe_layer(layer, densify_m=1e8)
    w, s, e, n = TEN_DEGREE_BOX
    corners, _ = GEOD.polygon_area_perimeter([w, e, e, w], [s, s, n, n])
    assert rel(coarse.geodesic_total, abs(corners)) < 1e-9
    assert rel(coarse.geodesic_total, quadrangle(*TEN_DEGREE_BOX)) > 1e-4
    fine = describe_layer(layer, densify_m=1000.0)
    assert rel(fine.geodesic_total, quadrangle(*TEN_DEGREE_BOX)) < 1e-6


def test_describe_layer__utm_layer_extent_and_totals():
    # a 10 km square in UTM zone 32N (EPSG:32632) near 47.9N
    square = box(495_000.0, 5_295_000.0, 505_000.0, 5_305_000.0)
    layer = layer_from_geometries([square], "EPSG:32632")
    info = describe_layer(layer)
    assert info.crs == "EPSG:32632"
    assert info.extent == pytest.approx(square.bounds, abs=1e-6)  # in the layer's own metres
    dense = shapely.segmentize(square, 1000.0)  # the default step, in the layer's metres
    lonlat = reproject(dense, "EPSG:32632", "EPSG:4326")
    assert info.extent_lonlat == pytest.approx(shapely.total_bounds(lonlat), abs=2e-6)  # rounded to 6 decimals
    assert rel(info.geodesic_total, geod_area(lonlat)) < 1e-9  # pyproj.Geod, Karney 2013
    plane = pyproj.CRS.from_user_input(info.plane.label)
    assert rel(info.exact_planar_total, reproject(dense, "EPSG:32632", plane).area) < 1e-9
    assert rel(info.exact_planar_total, info.geodesic_total) < 1e-6


def test_describe_layer__counts_repaired_and_empty_geometries():
    bow = Polygon([(10.30, 47.10), (10.36, 47.16), (10.36, 47.10), (10.30, 47.16), (10.30, 47.10)])
    square = box(10.40, 47.10, 10.46, 47.15)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the repair and the skip are announced; counted below
        layer = layer_from_geometries([square, bow, None], "EPSG:4326", ids=["square", "bowtie", "nothing"])
    info = describe_layer(layer)
    assert info.features == 3 and info.invalid == 1 and info.empty == 1
    # the repaired bow-tie is shapely.make_valid's (GEOS) pair of triangles; areas by pyproj.Geod
    expected = geod_area(shapely.segmentize(square, STEP_DEG)) + geod_area(shapely.segmentize(shapely.make_valid(bow),
                                                                                              STEP_DEG))
    assert rel(info.geodesic_total, expected) < 1e-9


# --- points ----------------------------------------------------------------------------------------


POINTS = [Point(10.0, 47.0), Point(11.0, 47.5), Point(10.5, 46.8)]


def test_describe_layer__points_have_no_totals_and_a_plane_from_their_extent():
    layer = layer_from_geometries(POINTS, "EPSG:4326", kind="point")
    info = describe_layer(layer)
    assert info.kind == "points" and info.features == 3 and info.geometry_types == {"Point": 3}
    assert info.exact_planar_total is None and info.geodesic_total is None
    west, south, east, north = shapely.total_bounds(POINTS)
    assert info.extent_lonlat == pytest.approx((west, south, east, north), abs=1e-9)
    # the plane is centred on the points' extent ...
    assert laea_centre(info.plane.label) == pytest.approx(((west + east) / 2, (south + north) / 2), abs=1e-4)
    # ... and equal-area there: pyproj's areal scale factor is 1 at every point
    scale = pyproj.Proj(pyproj.CRS.from_user_input(info.plane.label)).get_factors(
        [p.x for p in POINTS], [p.y for p in POINTS]).areal_scale
    assert np.all(np.abs(np.asarray(scale) - 1) < 1e-9)
    assert 0 <= info.plane.distortion < 1e-6
    # a polygon layer with the same lon/lat extent gets the same plane
    same = describe_layer(layer_from_geometries([box(west, south, east, north)], "EPSG:4326"))
    assert same.plane.label == info.plane.label


def test_describe_layer__utm_points_extent_in_lonlat():
    utm = [Point(500_000.0, 5_300_000.0), Point(520_000.0, 5_310_000.0)]
    info = describe_layer(layer_from_geometries(utm, "EPSG:32632", kind="point"))
    assert info.extent == pytest.approx((500_000.0, 5_300_000.0, 520_000.0, 5_310_000.0), abs=1e-6)
    lonlat = [reproject(p, "EPSG:32632", "EPSG:4326") for p in utm]
    assert info.extent_lonlat == pytest.approx(shapely.total_bounds(lonlat), abs=1e-6)
    assert info.exact_planar_total is None and info.geodesic_total is None


# --- a requested plane that is not equal-area ----------------------------------------------------------


@pytest.mark.parametrize("kind", ["polygon", "point"])
@pytest.mark.parametrize("crs", ["EPSG:3857", "EPSG:4326"])
def test_describe_layer__requested_non_equal_area_plane_is_refused(kind, crs):
    # Web Mercator scales areas by sec²φ (about 2.2 near 47N; Snyder 1987, ch. 7 [memory]); a
    # geographic CRS is not a plane at all.
    geoms = POINTS if kind == "point" else [box(10.0, 46.8, 11.0, 47.5)]
    layer = layer_from_geometries(geoms, "EPSG:4326", kind=kind)
    with pytest.raises(NotEqualAreaError) as info:
        describe_layer(layer, crs=crs)
    err = info.value
    # the message names the keyword the caller passed (describe_layer's own parameter), and no flag
    assert err.param in inspect.signature(describe_layer).parameters, err.param
    assert err.param == "crs"
    assert str(err).startswith(f"crs {crs}: ")
    assert "--" not in str(err)


# --- attribute fields and extent of files written here, read back independently with fiona ---------------

#: Rows of the typed test layers: a unique text code, a text group with 8 values repeated (so the
#: warning names 5 and counts the rest), an integer with repeats and one null, a float, a date.
N_ROWS = 18


def typed_rows() -> list[dict]:
    return [{"code": f"c{i:02d}", "grp": f"g{i % 8}" if i < 16 else f"solo{i}", "n": None if i == 5 else (i % 4) * 10,
             "x": i * 0.25, "day": f"2024-03-{i + 1:02d}"} for i in range(N_ROWS)]


def lonlat_cell(i: int):
    return box(10.0 + 0.05 * (i % 4), 47.0 + 0.04 * (i // 4), 10.04 + 0.05 * (i % 4), 47.03 + 0.04 * (i // 4))


def utm_cell(i: int):
    return box(600_000.0 + 1_250.5 * (i % 4), 5_200_000.0 + 999.75 * (i // 4),
               601_000.0 + 1_250.5 * (i % 4), 5_200_800.0 + 999.75 * (i // 4))


#: (case id, file name, driver, CRS, declared schema, geometry of row i)
FILE_CASES = [
    ("gpkg-lonlat-polygons", "typed.gpkg", "GPKG", "EPSG:4326",
     {"code": "str:8", "grp": "str", "n": "int", "x": "float", "day": "date"}, lonlat_cell),
    ("shp-utm-polygons", "typed.shp", "ESRI Shapefile", "EPSG:32632",
     {"code": "str:8", "grp": "str:10", "n": "int:6", "x": "float:12.4", "day": "date"}, utm_cell),
    ("geojson-points", "typed.geojson", "GeoJSON", "EPSG:4326",
     {"code": "str", "grp": "str", "n": "int", "x": "float", "day": "date"}, lambda i: lonlat_cell(i).centroid),
]


@pytest.fixture(scope="module")
def typed_files(tmp_path_factory) -> dict:
    folder = tmp_path_factory.mktemp("typed")
    out = {}
    for case, name, driver, crs, props, geometry in FILE_CASES:
        path = folder / name
        kind = geometry(0).geom_type
        with fiona.open(path, "w", driver=driver, crs=crs, schema={"geometry": kind, "properties": props}) as dst:
            for i, row in enumerate(typed_rows()):
                dst.write({"geometry": mapping(geometry(i)), "properties": row})
        out[case] = str(path)
    return out


def fiona_reference(path: str) -> dict:
    """What the file holds, read here with fiona alone: each field's declared type (fiona's schema,
    width dropped), distinct non-missing values, nulls, and whether it labels every feature; and
    the extent, shapely.total_bounds of the features' geometries."""
    with fiona.open(path) as src:
        schema = dict(src.schema["properties"])
        feats = list(src)
    fields = []
    for name, declared in schema.items():
        values = [f.properties[name] for f in feats]
        present = [v for v in values if v is not None]
        fields.append({"name": name, "type": declared.split(":")[0], "distinct": len(set(present)),
                       "missing": len(values) - len(present),
                       "unique": len(present) == len(values) and len(set(present)) == len(values)})
    return {"schema": schema, "fields": fields, "features": len(feats),
            "extent": tuple(shapely.total_bounds([shape(f.geometry) for f in feats])),
            "grp": [f.properties["grp"] for f in feats]}


@pytest.mark.parametrize("case", [c[0] for c in FILE_CASES])
def test_describe_layer__fields_match_fionas_schema_and_values(typed_files, case):
    path = typed_files[case]
    ref = fiona_reference(path)
    layer = read_layer(path, kind="any")
    assert layer.fields == tuple(ref["schema"].items())  # the schema as fiona declares it, in file order
    info = describe_layer(layer)
    assert [f.to_dict() for f in info.fields] == ref["fields"]
    assert info.kept == info.features == ref["features"] == N_ROWS
    # the written rows, as a second reference: code is unique, grp and n repeat, n has one null
    by_name = {f.name: f for f in info.fields}
    assert by_name["code"].unique and not by_name["grp"].unique and not by_name["n"].unique
    assert by_name["n"].missing == 1 and by_name["code"].missing == 0
    assert by_name["grp"].distinct == 8 + (N_ROWS - 16)
    assert info.to_dict()["fields"] == ref["fields"]


@pytest.mark.parametrize("case", [c[0] for c in FILE_CASES])
def test_describe_layer__extent_is_shapelys_total_bounds_unrounded(typed_files, case):
    path = typed_files[case]
    ref = fiona_reference(path)
    info = describe_layer(read_layer(path, kind="any"))
    assert info.extent == pytest.approx(ref["extent"], rel=0, abs=1e-9)  # shapely.total_bounds, full floats
    crs = pyproj.CRS.from_user_input(info.crs)
    assert info.crs_unit == crs.axis_info[0].unit_name  # pyproj's own unit of the first axis
    assert info.crs_unit == ("metre" if "utm" in case else "degree")


def test_describe_fields__layer_without_schema__lists_property_names_without_type():
    layer = layer_from_geometries([box(*MID_LATITUDE_BOX), box(*TEN_DEGREE_BOX)], "EPSG:4326")
    assert layer.fields == () and describe_layer(layer).fields == ()  # layer_from_geometries carries no attributes
    with_props = dataclasses.replace(layer, properties=({"zone": "a", "n": 1}, {"zone": "a", "n": None}))
    got = {f.name: (f.type, f.distinct, f.missing, f.unique) for f in describe_fields(with_props)}
    assert got == {"zone": (None, 1, 0, False), "n": (None, 1, 1, False)}


def test_read_layer__describing_keeps_duplicate_ids_with_the_one_warning(typed_files):
    path = typed_files["gpkg-lonlat-polygons"]
    grp = fiona_reference(path)["grp"]
    counts = Counter(grp)
    repeated = [v for v in counts if counts[v] > 1]  # in order of first appearance
    assert len(repeated) == 8
    with pytest.raises(LayerError, match=r"id_field 'grp' has duplicate values"):
        read_layer(path, id_field="grp")  # the other jobs still refuse by default
    with pytest.warns(AreamcWarning) as caught:
        layer = read_layer(path, id_field="grp", describing=True)
    assert layer.ids == tuple(grp)
    (warning,) = [w.message for w in caught if "duplicate" in str(w.message)]
    text = str(warning)
    named = ", ".join(f"{v!r} ({counts[v]} features)" for v in repeated[:5])
    assert f"id_field 'grp' has duplicate values: {named} and 3 more; " in text
    assert f"{len(repeated)} values repeat, so results could not be joined back by 'grp'" in text
    assert "allow_duplicate_ids" in text and "--" not in text  # the library names parameters, not flags
    with pytest.warns(AreamcWarning) as kept:
        read_layer(path, id_field="grp", allow_duplicate_ids=True)
    (same,) = [str(w.message) for w in kept if "duplicate" in str(w.message)]
    assert same.startswith(text.split(f"; {len(repeated)} values")[0] + "; kept (allow_duplicate_ids): ")
    assert f"{len(repeated)} values repeat, so results could not be joined back by 'grp'" in same
