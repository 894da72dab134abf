"""Inputs that must not pass for something else: damaged files, repeated ids, mixed layers,
malformed geometries, wrong text encodings, several layers, and ``--`` on the command line.

Every refusal is checked with conftest.assert_refused: one ``areamc: error:`` line naming the file
and the feature (or the duplicated values), exit status 2, nothing on stdout, no traceback, and the
inputs (written by each test in its tmp_path) unchanged.  Expected areas come from pyproj.Geod
(Karney 2013) and shapely, computed here independently of areamc; file layouts come from the
ESRI Shapefile Technical Description (ESRI 1998) and the SQLite file format (sqlite.org,
"Database File Format", sections 1.3 and 1.6).
"""

from __future__ import annotations

import json
import math
import re
import sqlite3
import struct

import fiona
import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import Point, box, mapping, shape

from conftest import assert_refused, run_cli, run_json, to_plane
from areamc.errors import LayerError
from areamc.load import read_layer
from areamc.zones import read_zones

CRS84 = "EPSG:4326"
GEOD = pyproj.Geod(ellps="WGS84")
POLYGONS = {"A": box(10.00, 47.00, 10.10, 47.08), "B": box(10.20, 47.00, 10.32, 47.10),
            "C": box(10.40, 47.02, 10.46, 47.10), "D": box(10.50, 47.00, 10.60, 47.05)}
FAST = ["-n", "2000", "--seed", "5", "-q"]
LOCAL_CS = ('LOCAL_CS["Site grid",LOCAL_DATUM["Site datum",32767],UNIT["metre",1],'
            'AXIS["Easting",EAST],AXIS["Northing",NORTH]]')


def write(path, features, *, driver=None, crs=CRS84, geometry="Polygon", encoding=None, layer=None):
    """Write (name, shapely geometry or None) pairs with fiona; return the path as a string."""
    driver = driver or {".shp": "ESRI Shapefile", ".gpkg": "GPKG", ".geojson": "GeoJSON"}[path.suffix]
    schema = {"geometry": geometry, "properties": {"name": "str"}}
    extra = {"encoding": encoding} if encoding else {}
    with fiona.open(path, "w", driver=driver, crs=crs, schema=schema, layer=layer, **extra) as dst:
        for name, geom in features:
            dst.write({"geometry": None if geom is None else mapping(geom), "properties": {"name": name}})
    return str(path)


def geojson_text(path, coordinates: str) -> str:
    """A one-feature GeoJSON polygon file whose ring is written as raw text (NaN, 1e300, ...)."""
    path.write_text('{"type": "FeatureCollection", "features": [{"type": "Feature", "properties": '
                    '{"name": "bad"}, "geometry": {"type": "Polygon", "coordinates": [[' + coordinates + ']]}}]}')
    return str(path)


def geod_area(geom) -> float:
    """|area| of a lon/lat polygon on WGS84, edges densified to 0.001 degrees (pyproj.Geod, Karney 2013)."""
    return abs(GEOD.geometry_area_perimeter(shapely.segmentize(geom, 0.001))[0])


# ------------------------------------------------------------------------------------------ the files


def cut_in_half(path) -> None:
    path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])


def truncated_shapefile(folder) -> str:
    """Four boxes with dense edges; the .shp is then cut to half its bytes (the .shx still indexes 4)."""
    path = write(folder / "cut.shp", [(k, shapely.segmentize(g, 0.001)) for k, g in POLYGONS.items()])
    cut_in_half(folder / "cut.shp")
    return path


def truncated_dbf(folder) -> str:
    """A sound .shp and .shx whose .dbf lost its second half (attributes of the later features)."""
    path = write(folder / "nodbf.shp", list(POLYGONS.items()))
    cut_in_half(folder / "nodbf.dbf")
    return path


def damaged_geopackage(folder) -> str:
    """200 features; the type byte of the last leaf page of the feature table is zeroed.

    The table's root is an interior b-tree page (type 5) whose header holds the right-most child
    page number at bytes 8-11; a page type 0 is no b-tree page, so SQLite reports the database
    as malformed when a scan reaches it (SQLite file format, sections 1.6 and 1.3).
    """
    path = folder / "damaged.gpkg"
    feats = [(f"F{i}", shapely.segmentize(box(10 + 0.01 * i, 47.0, 10.005 + 0.01 * i, 47.05), 0.0005))
             for i in range(200)]
    write(path, feats, layer="zones")
    con = sqlite3.connect(path)
    root = con.execute("SELECT rootpage FROM sqlite_master WHERE name = 'zones'").fetchone()[0]
    con.close()
    data = bytearray(path.read_bytes())
    page_size = struct.unpack(">H", data[16:18])[0]

    def start(n):
        return (n - 1) * page_size + (100 if n == 1 else 0)

    assert data[start(root)] == 5  # an interior table page: the layer spans several pages
    right = struct.unpack(">I", data[start(root) + 8:start(root) + 12])[0]
    data[start(right)] = 0
    path.write_bytes(bytes(data))
    return str(path)


def truncated_geopackage(folder) -> str:
    path = folder / "short.gpkg"
    write(path, list(POLYGONS.items()))
    cut_in_half(path)
    return str(path)


def local_cs_shapefile(folder) -> str:
    path = write(folder / "site.shp", [("S1", box(1000.0, 2000.0, 1500.0, 2600.0))], crs="EPSG:32632")
    (folder / "site.prj").write_text(LOCAL_CS)
    return path


def latin1_shapefile(folder, name="names.shp") -> str:
    """Attributes written in ISO-8859-1, then a .cpg that claims UTF-8 (a common mislabel)."""
    feats = [("Zürich", POLYGONS["A"]), ("Genève", POLYGONS["B"]), ("Basel", POLYGONS["C"])]
    path = write(folder / name, feats, encoding="ISO-8859-1")
    (folder / name).with_suffix(".cpg").write_text("UTF-8")
    assert "Zürich".encode("latin-1") in (folder / name).with_suffix(".dbf").read_bytes()
    return path


@pytest.fixture()
def files(tmp_path):
    """Every input the refusal table uses, written into tmp_path."""
    f = tmp_path
    out = {
        "regions": write(f / "regions.gpkg", [("R1", box(9.95, 46.95, 10.65, 47.15))]),
        "zones": write(f / "zones.gpkg", [("Z1", box(10.05, 47.0, 10.25, 47.1))]),
        "dup": write(f / "dup.gpkg", [("A", POLYGONS["A"]), ("A", POLYGONS["B"]), ("C", POLYGONS["C"])]),
        "many": write(f / "many.gpkg", [(n, g) for n in "PQRST" for g in (POLYGONS["A"], POLYGONS["B"])]),
        "cut": truncated_shapefile(f),
        "nodbf": truncated_dbf(f),
        "damaged": damaged_geopackage(f),
        "short": truncated_geopackage(f),
        "site": local_cs_shapefile(f),
        "names": latin1_shapefile(f),
        "huge": geojson_text(f / "huge.geojson", "[10, 47], [1e300, 47], [10.1, 47.1], [10, 47]"),
        "nan": geojson_text(f / "nan.geojson", "[10, 47], [NaN, 47], [10.1, 47.1], [10, 47]"),
        "inf": geojson_text(f / "inf.geojson", "[10, 47], [10.1, Infinity], [10.1, 47.1], [10, 47]"),
        "ring2": geojson_text(f / "ring2.geojson", "[10, 47], [10.1, 47.1]"),
        "ring2closed": geojson_text(f / "ring2closed.geojson", "[10, 47], [10.1, 47.1], [10, 47]"),
        "utm": write(f / "utm.gpkg", [("U1", box(600_000, 5_200_000, 1e12, 5_210_000))], crs="EPSG:32632"),
        "mixed": write(f / "mixed.gpkg", [("P", Point(10.5, 47.2)), ("A", POLYGONS["A"])], geometry="Unknown"),
    }
    return f, out


R = "areamc: error: "
REFUSED = [
    # (case, argv with {name} for a file of the fixture, message pattern with {name} for that file's name)
    ("shapefile cut to half its bytes", ["area", "{cut}"],
     r"{cut}: truncated or damaged: its \.shx indexes 4 features, but feature 1 \(bytes"),
    ("dbf cut to half its bytes", ["area", "{nodbf}"],
     r"{nodbf}: truncated or damaged file: GDAL failed after feature 0: .*DBF"),
    ("damaged GeoPackage page", ["area", "{damaged}"],
     r"{damaged}: truncated or damaged file: SQLite reports database disk image is malformed"),
    ("GeoPackage cut to half its bytes", ["area", "{short}"],
     r"{short}: truncated or damaged file: SQLite reports database disk image is malformed"),
    ("LOCAL_CS .prj", ["area", "{site}"],
     r"{site}: the file's CRS 'Site grid' is an engineering \(local\) CRS.*--input-crs"),
    ("LOCAL_CS given as --input-crs", ["area", "{regions}", "--input-crs", LOCAL_CS],
     r"--input-crs 'Site grid' is an engineering \(local\) CRS"),
    ("coordinate 1e300", ["area", "{huge}"], r"{huge} \(layer huge\): feature 0: coordinate \(1e\+300, 47\) lies outside"),
    ("coordinate NaN", ["area", "{nan}"], r"{nan} \(layer nan\): feature 0: coordinate \(nan, 47\) is not a finite"),
    ("coordinate infinity", ["area", "{inf}"], r"{inf} \(layer inf\): feature 0: coordinate \(10\.1, inf\) is not a finite"),
    ("projected coordinate 1e12 m", ["area", "{utm}", "--id-field", "name"],
     r"{utm} \(layer utm\): feature U1: coordinate \(1e\+12, .*100,000 km from the origin"),
    ("ring of 2 points", ["area", "{ring2}"], r"{ring2} \(layer ring2\): feature 0: a polygon ring of 2 distinct point"),
    ("closed ring of 2 points", ["area", "{ring2closed}"],
     r"{ring2closed} \(layer ring2closed\): feature 0: a polygon ring of 2 distinct point"),
    ("latin-1 dbf, .cpg says UTF-8", ["area", "{names}", "--id-field", "name"],
     r"{names}: feature 0: attribute text cannot be decoded .*\.cpg.*--input-encoding, for example latin-1"),
    ("latin-1 zones, .cpg says UTF-8", ["coverage", "{regions}", "{names}", "--zones-id-field", "name"],
     r"{names}: feature 0: attribute text cannot be decoded .*--zones-input-encoding"),
    ("unknown encoding name", ["area", "{names}", "--input-encoding", "klingon"],
     r"--input-encoding: unknown text encoding 'klingon'"),
    ("duplicate ids: area", ["area", "{dup}", "--id-field", "name"],
     r"{dup} \(layer dup\): --id-field 'name' has duplicate values: 'A' \(2 features\); .*--allow-duplicate-ids"),
    ("duplicate ids: overlap ZONES", ["overlap", "{dup}", "--zones-id-field", "name"],
     r"{dup} \(layer dup\): --zones-id-field 'name' has duplicate values: 'A' \(2 features\)"),
    ("duplicate ids: overlap OTHER", ["overlap", "{zones}", "{dup}", "--other-id-field", "name"],
     r"{dup} \(layer dup\): --other-id-field 'name' has duplicate values: 'A' \(2 features\)"),
    ("duplicate ids: coverage regions", ["coverage", "{dup}", "{zones}", "--regions-id-field", "name"],
     r"{dup} \(layer dup\): --regions-id-field 'name' has duplicate values: 'A' \(2 features\)"),
    ("duplicate ids: coverage zones", ["coverage", "{regions}", "{dup}", "--zones-id-field", "name"],
     r"{dup} \(layer dup\): --zones-id-field 'name' has duplicate values: 'A' \(2 features\)"),
    ("duplicate ids: integrate", ["integrate", "{dup}", "--regions-id-field", "name", "--density", "1e-4"],
     r"{dup} \(layer dup\): --regions-id-field 'name' has duplicate values: 'A' \(2 features\)"),
    ("five duplicated values: three named", ["area", "{many}", "--id-field", "name"],
     r"'P' \(2 features\), 'Q' \(2 features\), 'R' \(2 features\) and 2 more;"),
    ("mixed zones without a radius", ["overlap", "{mixed}"], r"{mixed} \(layer mixed\): holds points; give --radius"),
    ("an option after --", ["area", "--", "{regions}", "--seed", "1"], r"unrecognized arguments: --seed 1"),
]


@pytest.mark.parametrize("case, argv, match", REFUSED, ids=[c[0] for c in REFUSED])
def test_bad_input__refused_in_one_line_naming_file_and_feature(capsys, files, case, argv, match):
    folder, paths = files
    names = {k: re.escape(v) for k, v in paths.items()}
    argv = [a.format(**paths) for a in argv]
    options = ["-q"] if argv[0] == "inspect" else FAST
    line = assert_refused(capsys, [argv[0], *options, *argv[1:]], match.format(**names), folder)
    assert line.startswith(R)


# ------------------------------------------------------------------------------ damaged is not empty


def test_damaged_geopackage__gdal_alone_reads_it_short(tmp_path):
    """Why the SQLite check runs first: GDAL reads the damaged table part way, then logs an error."""
    path = damaged_geopackage(tmp_path)
    with fiona.open(path) as src:
        declared, read = len(src), sum(1 for _ in src)
    assert declared == 200 and read < 200


def test_truncated_shapefile__library_refuses_where_gdal_reads_no_geometry(tmp_path):
    path = truncated_shapefile(tmp_path)
    with fiona.open(path) as src:  # what GDAL makes of it: features 1..3 without geometry, as if empty
        assert [f.geometry is None for f in src] == [False, True, True, True]
    with pytest.raises(LayerError, match="feature 1"):
        read_layer(path)


def test_null_shapes__stay_empty_features_with_a_warning(capsys, tmp_path):
    """A feature written with no geometry (shape type 0, ESRI 1998 p. 5) is empty, not damage."""
    path = write(tmp_path / "holes.shp", [("A", POLYGONS["A"]), ("gap", None), ("B", POLYGONS["B"])])
    rc, out, err = run_cli(capsys, ["area", path, "--id-field", "name", *FAST, "--format", "json", "--units", "m2"])
    assert rc == 0, err
    assert [r["id"] for r in json.loads(out)["results"]] == ["A", "B"]
    assert "skipped 1 empty geometry: gap" in err


# ------------------------------------------------------------------------------ duplicate ids allowed


@pytest.fixture()
def twins(tmp_path):
    """Two different polygons that share the id "A", a third one, and a zone over parts of them."""
    dup = write(tmp_path / "dup.gpkg", [("A", POLYGONS["A"]), ("A", POLYGONS["B"]), ("C", POLYGONS["C"])])
    zones = write(tmp_path / "zones.gpkg", [("Z1", box(10.05, 47.0, 10.25, 47.1))])
    return tmp_path, dup, zones, [POLYGONS["A"], POLYGONS["B"], POLYGONS["C"]]


def test_allow_duplicate_ids__area_rows_and_trace_follow_each_feature(capsys, twins):
    folder, dup, _, polygons = twins
    trace = folder / "trace.csv"
    doc = run_json(capsys, ["area", dup, "--id-field", "name", "--allow-duplicate-ids", "-n", "4000", "--seed", "2",
                            "--trace", str(trace), "--trace-every", "1000"])
    rows = doc["results"]
    assert [(r["id"], r["feature_index"]) for r in rows] == [("A", 0), ("A", 1), ("C", 2)]
    for row, poly in zip(rows, polygons):
        # each row's exact areas are its own polygon's: pyproj.Geod (Karney 2013), independently densified
        assert row["geodesic"] == pytest.approx(geod_area(poly), rel=1e-6)
    assert rows[0]["geodesic"] != pytest.approx(rows[1]["geodesic"], rel=0.01)  # the twins differ
    lines = trace.read_text().splitlines()
    assert lines[0].split(",")[:2] == ["id", "feature_index"]
    last = {}
    for line in lines[1:]:
        fid, index, points, hits = line.split(",")[:4]
        last[int(index)] = (fid, int(points), int(hits))
    assert last == {r["feature_index"]: (r["id"], r["points"], r["hits"]) for r in rows}


def test_allow_duplicate_ids__coverage_features_keep_their_own_geometry(capsys, twins):
    folder, dup, zones, polygons = twins
    out = folder / "cov.geojson"
    rc, _, err = run_cli(capsys, ["coverage", dup, zones, "--regions-id-field", "name", "--allow-duplicate-ids",
                                  *FAST, "-o", str(out)])
    assert rc == 0, err
    assert "'A' (2 features); kept (--allow-duplicate-ids)" in err
    with fiona.open(out) as src:
        feats = list(src)
    assert [(f.properties["id"], f.properties["feature_index"]) for f in feats] == [("A", 0), ("A", 1), ("C", 2)]
    for feat, poly in zip(feats, polygons):
        assert shape(feat.geometry).equals_exact(poly, tolerance=1e-12)  # its own input polygon (shapely)


def test_allow_duplicate_ids__overlap_pairs_carry_both_indices(capsys, twins):
    folder, dup, zones, polygons = twins
    doc = run_json(capsys, ["overlap", dup, zones, "--zones-id-field", "name", "--allow-duplicate-ids", *FAST])
    rows = doc["results"]
    assert [(r["id_a"], r["feature_index_a"], r["feature_index_b"]) for r in rows] == [("A", 0, 0), ("A", 1, 0)]
    zone = box(10.05, 47.0, 10.25, 47.1)
    plane = to_plane([*polygons[:2], zone], pyproj.CRS(CRS84), doc)
    for row, poly in zip(rows, plane[:2]):
        # shapely's intersection area on the plane the run reports, rebuilt here with pyproj
        assert row["exact_planar"] == pytest.approx(shapely.area(shapely.intersection(poly, plane[2])), rel=1e-6)


def test_allow_duplicate_ids__integrate_and_table_show_the_index(capsys, twins):
    folder, dup, _, polygons = twins
    doc = run_json(capsys, ["integrate", dup, "--regions-id-field", "name", "--allow-duplicate-ids", "--density", "1e-4",
                            *FAST])
    assert [(r["id"], r["feature_index"]) for r in doc["results"]] == [("A", 0), ("A", 1), ("C", 2)]
    for row, poly in zip(doc["results"], polygons):
        assert row["region_area"] == pytest.approx(geod_area(poly), rel=1e-6)  # pyproj.Geod
    rc, out, err = run_cli(capsys, ["area", dup, "--id-field", "name", "--allow-duplicate-ids", *FAST])
    assert rc == 0, err
    lines = out.splitlines()
    heading = lines[next(n for n, line in enumerate(lines) if line and set(line) <= {"-", " "}) - 1].split()
    assert heading[:3] == ["id", "feature_index", "estimate"]


def test_duplicate_ids__library_names_parameters_not_flags(tmp_path):
    path = write(tmp_path / "dup.gpkg", [("A", POLYGONS["A"]), ("A", POLYGONS["B"])])
    with pytest.raises(LayerError, match=r"id_field 'name' has duplicate values: 'A' \(2 features\).*allow_duplicate_ids"):
        read_layer(path, id_field="name")
    with pytest.warns(UserWarning, match="kept"):
        layer = read_layer(path, id_field="name", allow_duplicate_ids=True)
    assert layer.ids == ("A", "A") and layer.indices == (0, 1)


# ---------------------------------------------------------------------------- mixed points and polygons


def test_mixed_zone_layer__points_become_circles_polygons_stay(tmp_path):
    """Point first, polygons after: each feature keeps its own type."""
    path = write(tmp_path / "mixed.gpkg", [("P", Point(10.5, 47.2)), ("A", POLYGONS["A"]), ("B", POLYGONS["B"])],
                 geometry="Unknown")
    with pytest.warns(UserWarning, match=r"1 point feature\(s\) become geodesic circles and 2 polygon feature"):
        zones = read_zones(path, id_field="name", radius_m=5000.0, vertices=256)
    assert zones.kind == "polygon" and zones.ids == ("P", "A", "B") and zones.indices == (0, 1, 2)
    circle, a, b = zones.geometries
    ring = np.asarray(circle.exterior.coords)[:-1]
    _, _, dist = GEOD.inv(np.full(len(ring), 10.5), np.full(len(ring), 47.2), ring[:, 0], ring[:, 1])
    assert np.allclose(dist, 5000.0, atol=1e-6)  # every vertex 5 km away on WGS84 (pyproj.Geod.inv)
    # a regular 256-gon inscribed in a circle of radius r has area (n/2) r² sin(2π/n) (common practice);
    # on the ellipsoid it differs by about r²/R² (4e-7 here)
    ngon = 256 / 2 * 5000.0**2 * math.sin(2 * math.pi / 256)
    assert abs(GEOD.geometry_area_perimeter(circle)[0]) == pytest.approx(ngon, rel=2e-6)
    assert a.equals_exact(POLYGONS["A"], 0) and b.equals_exact(POLYGONS["B"], 0)
    assert a.area == pytest.approx(POLYGONS["A"].area, rel=1e-15)  # shapely, unchanged polygon


def test_mixed_zone_layer__projected_layer_keeps_its_crs(tmp_path):
    """In UTM 32N the circles are moved into the layer's CRS; their vertices stay 5 km from the centre."""
    to_utm = pyproj.Transformer.from_crs(CRS84, "EPSG:32632", always_xy=True)
    centre = to_utm.transform(10.5, 47.2)
    square = box(600_000, 5_200_000, 610_000, 5_210_000)
    path = write(tmp_path / "mixed_utm.gpkg", [("P", Point(*centre)), ("S", square)], crs="EPSG:32632",
                 geometry="Unknown")
    with pytest.warns(UserWarning, match="mixed layer"):
        zones = read_zones(path, id_field="name", radius_m=5000.0)
    assert zones.crs.to_epsg() == 32632
    ring = np.asarray(zones.geometries[0].exterior.coords)
    lon, lat = pyproj.Transformer.from_crs("EPSG:32632", CRS84, always_xy=True).transform(ring[:, 0], ring[:, 1])
    _, _, dist = GEOD.inv(np.full(len(ring), 10.5), np.full(len(ring), 47.2), lon, lat)
    assert np.allclose(dist, 5000.0, atol=1e-5)
    assert zones.geometries[1].equals_exact(square, 0)


def test_mixed_zone_layer__overlap_of_circle_and_polygon(capsys, tmp_path):
    """overlap --radius on a point-first layer: the circle and the polygons are all zones."""
    a = box(10.45, 47.15, 10.55, 47.25)
    path = write(tmp_path / "mixed.gpkg", [("P", Point(10.5, 47.2)), ("A", a), ("B", POLYGONS["B"])],
                 geometry="Unknown")
    doc = run_json(capsys, ["overlap", path, "--radius", "5km", "--zones-id-field", "name", "--no-profile", *FAST])
    assert [(r["id_a"], r["id_b"]) for r in doc["results"]] == [("P", "A")]
    az = np.linspace(0.0, 360.0, 256, endpoint=False)
    lons, lats, _ = GEOD.fwd(np.full(256, 10.5), np.full(256, 47.2), az, np.full(256, 5000.0))
    circle = shapely.Polygon(np.column_stack([lons, lats]))  # built here with pyproj.Geod.fwd (Karney 2013)
    c_plane, a_plane = to_plane([circle, a], pyproj.CRS(CRS84), doc)
    exact = shapely.area(shapely.intersection(c_plane, a_plane))  # shapely on the run's plane
    assert doc["results"][0]["exact_planar"] == pytest.approx(exact, rel=1e-6)


def test_mixed_layer__polygon_job_skips_points_with_a_count(capsys, tmp_path):
    path = write(tmp_path / "mixed.gpkg", [("P", Point(10.5, 47.2)), ("A", POLYGONS["A"]), ("B", POLYGONS["B"])],
                 geometry="Unknown")
    rc, out, err = run_cli(capsys, ["area", path, "--id-field", "name", *FAST, "--format", "json", "--units", "m2"])
    assert rc == 0, err
    assert "skipped 1 feature(s) that are not polygons (1 Point): P" in err
    rows = json.loads(out)["results"]
    assert [(r["id"], r["feature_index"]) for r in rows] == [("A", 1), ("B", 2)]


# ------------------------------------------------------------------------------------ text encoding


def test_input_encoding__reads_latin1_ids(capsys, tmp_path):
    path = latin1_shapefile(tmp_path)
    doc = run_json(capsys, ["area", path, "--id-field", "name", "--input-encoding", "latin-1", *FAST])
    assert [r["id"] for r in doc["results"]] == ["Zürich", "Genève", "Basel"]
    assert read_layer(path, id_field="name", encoding="latin-1").ids == ("Zürich", "Genève", "Basel")


# ------------------------------------------------------------------------------------ several layers


def test_several_layers__notice_names_the_layer_used_and_the_others(capsys, tmp_path):
    path = tmp_path / "two.gpkg"
    write(path, [("F1", POLYGONS["A"])], layer="first")
    write(path, [("S1", POLYGONS["B"]), ("S2", POLYGONS["C"])], layer="second")
    quiet = [a for a in FAST if a != "-q"]
    rc, out, err = run_cli(capsys, ["area", str(path), "--id-field", "name", *quiet, "--format", "json", "--units", "m2"])
    assert rc == 0, err
    notice = [line for line in err.splitlines() if "layers" in line]
    assert len(notice) == 1 and notice[0].startswith("areamc: note:")
    assert "holds 2 layers; using the first, 'first' (the others: 'second'); choose one with --layer" in notice[0]
    assert [r["id"] for r in json.loads(out)["results"]] == ["F1"]
    rc, out, err = run_cli(capsys, ["area", str(path), "--layer", "second", "--id-field", "name", *FAST])
    assert rc == 0 and err == "", err
    rc, out, err = run_cli(capsys, ["area", str(path), "--id-field", "name", *FAST])  # --quiet silences the note
    assert rc == 0 and err == "", err


# ------------------------------------------------------------------------------------ "--" ends options


@pytest.mark.parametrize("argv", [
    ["area", "--", "-n.gpkg"],
    ["inspect", "--", "-n.gpkg"],
    ["overlap", "regions.gpkg", "--", "-n.gpkg"],
    ["coverage", "regions.gpkg", "--", "-n.gpkg"],
    ["integrate", "--density", "1e-4", "--", "-n.gpkg"],
], ids=["area", "inspect", "overlap", "coverage", "integrate"])
def test_double_dash__ends_options_in_every_command(capsys, tmp_path, monkeypatch, argv):
    monkeypatch.chdir(tmp_path)
    write(tmp_path / "-n.gpkg", [("Z1", box(10.05, 47.0, 10.25, 47.1))], layer="zones")
    write(tmp_path / "regions.gpkg", [("R1", box(10.0, 46.95, 10.3, 47.15))])
    sampling = [] if argv[0] == "inspect" else ["-n", "500", "--seed", "1"]
    rc, out, err = run_cli(capsys, [argv[0], *sampling, "-q", "--format", "json", "--units", "m2", *argv[1:]])
    assert rc == 0, err
    doc = json.loads(out)
    inputs = doc.get("inputs") or [doc.get("input") or doc["results"][0]]
    assert "-n.gpkg" in [i["path"] for i in inputs]
    # without "--" the same name is read as the option -n (--points)
    assert_refused(capsys, ["area", "-n.gpkg"], r"--points/-n: expected a positive whole number", tmp_path)
