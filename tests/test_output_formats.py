"""Every output format read back by an independent reader: fiona (GDAL), json, csv, sqlite3, hashlib.

Each file areamc writes must say what it holds: its units, the input attributes it carries, field
types fixed by the field definitions (never by the values a run happens to give), and the run's
metadata (seed as a string, versions, SHA-256 of each input, start and end times).  The facts
the checks rest on, with their sources:

* RFC 7946 (Butler et al. 2016), the GeoJSON format: §4, coordinates are longitude, latitude on
  WGS84 and a ``crs`` member is not part of the format; §3.1.6, exterior rings counterclockwise,
  holes clockwise; §6.1, members not defined by the RFC ("foreign members") are allowed.
* OGC GeoPackage Encoding Standard 1.3 (OGC 12-128r18): ``gpkg_contents.description``;
  ``gpkg_geometry_columns.geometry_type_name`` (§1.1.4, e.g. ``MULTIPOLYGON``); the metadata
  tables ``gpkg_metadata`` and ``gpkg_metadata_reference`` (Annex F.8, the Metadata extension)
  [memory for section numbers].  GDAL stores layer metadata items there as its XML
  ``<GDALMultiDomainMetadata><Metadata><MDI key="...">`` document (GDAL GPKG driver
  documentation) [memory].
* W3C, "Metadata Vocabulary for Tabular Data" (Recommendation, 17 December 2015): ``@context``
  ``http://www.w3.org/ns/csvw``, ``url``, ``tableSchema.columns`` with ``name``, ``datatype``
  (``string``, ``integer``, ``double``, ``boolean`` with format ``True|False``), ``notes``; and
  "Model for Tabular Data and Metadata on the Web" §5.2: a processor looks for
  ``{+url}-metadata.json`` beside the CSV file [memory].
* ESRI Shapefile Technical Description (ESRI 1998): attributes in a dBase file, whose field names
  hold at most 10 characters (common practice; dBase III header layout) [memory].
* SHA-256 (FIPS 180-4), computed here with Python's hashlib; ISO 8601 times parsed with
  :meth:`datetime.datetime.fromisoformat`.
* A 128-bit seed exceeds the 53-bit significand of an IEEE 754 double, which JSON readers such
  as jq and JavaScript use for every number (IEEE 754-2008; RFC 8259 §6 warns of it), so a seed
  must travel as a string to be replayed.

All inputs are written by the tests in tmp_path: three parcels in UTM zone 32N (EPSG:32632), one
with a hole and one a MultiPolygon, with attributes ``id`` (clashing with the result field ``id``),
``name`` and ``code``; and two zones.
"""

from __future__ import annotations

import csv
import errno
import hashlib
import io
import json
import os
import sqlite3
import xml.etree.ElementTree as ET
from datetime import datetime, timezone

import fiona
import pyproj
import pytest
import shapely
from fiona.crs import CRS
from shapely.geometry import MultiPolygon, Polygon, box, mapping

import areamc.output
from conftest import assert_refused, run_cli, run_json

UTM = "EPSG:32632"
E0, N0 = 600_000.0, 5_230_000.0  # near 10.3 E, 47.2 N
PARCELS = [
    box(E0, N0, E0 + 3000, N0 + 2000),
    Polygon([(E0 + 4000, N0), (E0 + 8000, N0), (E0 + 8000, N0 + 4000), (E0 + 4000, N0 + 4000)],
            holes=[[(E0 + 5000, N0 + 1000), (E0 + 6000, N0 + 1000), (E0 + 6000, N0 + 2000), (E0 + 5000, N0 + 2000)]]),
    MultiPolygon([box(E0, N0 + 5000, E0 + 1500, N0 + 6000), box(E0 + 2000, N0 + 5000, E0 + 3500, N0 + 7000)]),
]
ATTRS = [{"id": "P-1", "name": "Äußere Wiese", "code": 11}, {"id": "P-2", "name": "Hof", "code": 12},
         {"id": "P-3", "name": "Wald", "code": 13}]
ZONES = [box(E0 + 1000, N0 - 500, E0 + 5000, N0 + 3000), box(E0 + 3000, N0 + 1000, E0 + 9000, N0 + 6500)]
FAST = ["-n", "2000", "--seed", "11", "--workers", "1", "-q"]
FEATURE_EXTENSIONS = [".gpkg", ".geojson", ".shp", ".fgb"]


def _write(path, geoms, attrs, schema, driver="GPKG", layer=None):
    kind = "MultiPolygon" if driver == "GPKG" else "Polygon"
    with fiona.open(path, "w", driver=driver, crs=CRS.from_user_input(UTM), layer=layer,
                    schema={"geometry": kind if driver == "GPKG" else "Unknown", "properties": schema}) as dst:
        for geom, props in zip(geoms, attrs):
            if driver == "GPKG" and geom.geom_type == "Polygon":
                geom = MultiPolygon([geom])
            dst.write({"geometry": mapping(geom), "properties": props})


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    folder = tmp_path_factory.mktemp("formats")
    inputs = folder / "in"
    inputs.mkdir()
    _write(inputs / "parcels.gpkg", PARCELS, ATTRS, {"id": "str:8", "name": "str:40", "code": "int"}, layer="parcels")
    _write(inputs / "parcels.shp", PARCELS, ATTRS, {"id": "str:8", "name": "str:40", "code": "int"},
           driver="ESRI Shapefile")
    _write(inputs / "zones.gpkg", ZONES, [{"zone": "Z1"}, {"zone": "Z2"}], {"zone": "str:4"}, layer="zones")
    return inputs


def sha256(path) -> str:
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


def area_argv(data, out, *more):
    return ["area", str(data / "parcels.gpkg"), "--id-field", "id", "--units", "ha", *FAST, "-o", str(out), *more]


@pytest.fixture(scope="module")
def reference(data):
    """The JSON document of the same area run: the values every other format must hold."""
    import contextlib

    from areamc.cli import main

    out = io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(io.StringIO()):
        assert main(["area", str(data / "parcels.gpkg"), "--id-field", "id", "--units", "ha", *FAST,
                     "--format", "json"]) == 0
    return json.loads(out.getvalue())


@pytest.fixture(scope="module")
def written(data, tmp_path_factory):
    """One area run per feature format, each into its own folder: {ext: path}."""
    import contextlib

    from areamc.cli import main

    paths = {}
    for ext in FEATURE_EXTENSIONS + [".csv", ".json"]:
        folder = tmp_path_factory.mktemp("out" + ext.strip("."))
        path = folder / f"areas{ext}"
        with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
            assert main(area_argv(data, path)) == 0
        paths[ext] = path
    return paths


def read_features(path):
    with fiona.open(str(path)) as src:
        return dict(src.schema), src.crs, [(dict(f.properties), shapely.geometry.shape(f.geometry)) for f in src]


def file_metadata(path) -> dict:
    """The run's metadata document of a feature file, read without areamc: the gpkg_metadata item
    (sqlite3 and an XML parser), the GeoJSON foreign member (json), or the sidecar (json)."""
    ext = os.path.splitext(str(path))[1]
    if ext == ".gpkg":
        with sqlite3.connect(path) as con:
            rows = con.execute("SELECT m.metadata FROM gpkg_metadata m JOIN gpkg_metadata_reference r "
                               "ON r.md_file_id = m.id WHERE r.table_name = 'areas'").fetchall()
        items = {}
        for (xml,) in rows:
            for item in ET.fromstring(xml).iter("MDI"):
                items[item.get("key")] = item.text
        return json.loads(items["areamc_metadata"])
    if ext == ".geojson":
        return json.loads(open(path, encoding="utf-8").read())["areamc_metadata"]
    return json.loads(open(str(path) + "-metadata.json", encoding="utf-8").read())


# --- features: every format ------------------------------------------------------------------------


@pytest.mark.parametrize("ext", FEATURE_EXTENSIONS)
def test_features__input_attributes_then_results__values_of_the_json_run(written, reference, ext):
    schema, _, features = read_features(written[ext])
    meta = file_metadata(written[ext])
    names = {f["field"]: f["name"] for f in meta["fields"] if f["from"] == "results"}
    inputs = {f["field"]: f["name"] for f in meta["fields"] if f["from"] == "input"}
    # the input attributes come first, under their own names; "id" clashes with the result field id
    assert [f["from"] for f in meta["fields"]][:3] == ["input"] * 3
    assert inputs == {"id": "input_id", "name": "name", "code": "code"}
    assert list(schema["properties"])[:3] == ["input_id", "name", "code"]
    assert len(features) == len(reference["results"]) == 3
    rel = 1e-9 if ext == ".shp" else 1e-12  # a .dbf holds numbers as text of 24 characters, 15 decimals
    for (props, _), attrs, row in zip(features, ATTRS, reference["results"]):
        assert (props["input_id"], props["name"], props["code"]) == (attrs["id"], attrs["name"], attrs["code"])
        assert props[names["id"]] == row["id"] == attrs["id"]
        for field in ("estimate", "std_error", "ci_low", "ci_high", "exact_planar", "geodesic", "z"):
            assert props[names[field]] == pytest.approx(row[field], rel=rel), field
        assert props[names["points"]] == row["points"] and props[names["feature_index"]] == row["feature_index"]
        assert bool(props[names["flagged"]]) is row["flagged"]


@pytest.mark.parametrize("ext", FEATURE_EXTENSIONS)
def test_features__types_from_the_field_definitions(written, ext):
    schema, _, _ = read_features(written[ext])
    meta = file_metadata(written[ext])
    types = {f["field"]: schema["properties"][f["name"]].split(":")[0] for f in meta["fields"]}
    assert types["estimate"] == types["z"] == types["exact_planar"] == "float"
    assert types["points"].startswith("int") and types["feature_index"].startswith("int")
    assert types["id"] == types["stop_reason"] == "str"
    # booleans: a boolean field, but a Shapefile's .dbf stores 0/1 integers
    assert types["flagged"] == ("int" if ext == ".shp" else "bool")
    assert {f["field"]: f["type"] for f in meta["fields"]}["flagged"] == "bool"


@pytest.mark.parametrize("ext", FEATURE_EXTENSIONS)
def test_features__geometry_type_multipolygon_and_crs(written, data, ext):
    schema, crs, features = read_features(written[ext])
    declared = {".gpkg": "MultiPolygon", ".fgb": "MultiPolygon", ".shp": "Polygon", ".geojson": None}[ext]
    if declared:  # a Shapefile's polygon type holds one or many parts; GeoJSON declares no layer type
        assert schema["geometry"] == declared
    target = pyproj.CRS.from_user_input(crs.to_wkt())
    if ext == ".geojson":
        assert target.equals(pyproj.CRS.from_epsg(4326), ignore_axis_order=True)
        return
    assert target.equals(pyproj.CRS.from_user_input(UTM))
    for (_, geom), source in zip(features, PARCELS):
        assert shapely.equals_exact(shapely.normalize(geom), shapely.normalize(
            source if source.geom_type == "MultiPolygon" or ext == ".shp" else MultiPolygon([source])), tolerance=1e-6)


def test_geojson__rfc7946_lonlat_no_crs_member_ccw_rings(written):
    doc = json.loads(open(written[".geojson"], encoding="utf-8").read())
    assert "crs" not in doc  # RFC 7946 §4
    to_lonlat = pyproj.Transformer.from_crs(UTM, "EPSG:4326", always_xy=True)
    for feature, source in zip(doc["features"], PARCELS):
        geom = shapely.geometry.shape(feature["geometry"])
        expected = shapely.transform(source, to_lonlat.transform, interleaved=False)  # pyproj, independently
        # GDAL writes RFC 7946 coordinates with 7 decimals (1e-7 degree, about 1 cm) [memory]
        assert shapely.equals_exact(shapely.normalize(MultiPolygon(shapely.get_parts(geom))),
                                    shapely.normalize(MultiPolygon(shapely.get_parts(expected))), tolerance=1.5e-7)
        for polygon in shapely.get_parts(geom):  # RFC 7946 §3.1.6: exterior counterclockwise, holes clockwise
            assert polygon.exterior.is_ccw
            assert all(not ring.is_ccw for ring in polygon.interiors)
        for x, y in shapely.get_coordinates(geom):
            assert 9 < x < 12 and 46 < y < 48  # longitude first, degrees


def test_geojson__metadata_as_foreign_member_and_description(written):
    doc = json.loads(open(written[".geojson"], encoding="utf-8").read())
    assert doc["type"] == "FeatureCollection"
    meta = doc["areamc_metadata"]  # a foreign member, RFC 7946 §6.1
    assert meta["seed"] == "11" and meta["units"] == "ha" and meta["job"] == "area"
    assert "areas in ha: estimate" in doc["description"]


def test_gpkg__sqlite_tables_say_type_units_and_metadata(written, data):
    path = written[".gpkg"]
    with sqlite3.connect(path) as con:
        (kind,) = con.execute("SELECT geometry_type_name FROM gpkg_geometry_columns WHERE table_name='areas'").fetchone()
        (description,) = con.execute("SELECT description FROM gpkg_contents WHERE table_name='areas'").fetchone()
        declared = {row[1]: row[2] for row in con.execute("PRAGMA table_info(areas)")}
    assert kind == "MULTIPOLYGON"
    assert description.startswith("areamc area results; areas in ha: estimate, std_error, ci_low, ci_high")
    # SQLite's declared column types (GeoPackage §1.1.1.1.3 data types): text, real, integer, boolean
    assert declared["stop_reason"] == declared["id"] == "TEXT"
    assert declared["z"] == declared["estimate"] == "REAL"
    assert declared["points"] == "INTEGER" and declared["flagged"] == "BOOLEAN"
    meta = file_metadata(path)
    units = {f["field"]: f["unit"] for f in meta["fields"]}
    assert units["estimate"] == units["exact_planar"] == "ha"
    assert units["z"] == "standard errors" and units["points"] == "count" and units["id"] is None


@pytest.mark.parametrize("ext", FEATURE_EXTENSIONS + [".csv", ".json"])
def test_every_file__run_metadata_versions_hashes_times_seed(written, data, ext):
    if ext == ".json":
        meta = json.loads(written[ext].read_text())
    elif ext == ".csv":
        meta = json.loads(open(str(written[ext]) + "-metadata.json").read())["notes"][0]
    else:
        meta = file_metadata(written[ext])
    assert meta["tool"] == "areamc" and meta["seed"] == "11" and isinstance(meta["seed"], str)
    assert {"areamc", "python", "numpy", "scipy", "shapely", "geos", "pyproj", "proj", "fiona", "gdal"} <= set(
        meta["versions"])
    assert meta["versions"]["gdal"] == fiona.__gdal_version__ and meta["versions"]["proj"] == pyproj.proj_version_str
    (entry,) = meta["input"]["files"]
    assert entry["path"] == str(data / "parcels.gpkg") and entry["sha256"] == sha256(data / "parcels.gpkg")
    started, finished = (datetime.fromisoformat(meta[k].replace("Z", "+00:00")) for k in ("started", "finished"))
    assert started.tzinfo == timezone.utc and started <= finished
    assert abs((datetime.now(timezone.utc) - finished).total_seconds()) < 600
    assert meta["units"] == "ha"


def test_shapefile__names_cut_to_10_bytes_mapped_back_in_the_sidecar(written):
    path = written[".shp"]
    folder = path.parent
    assert sorted(os.listdir(folder)) == ["areas.cpg", "areas.dbf", "areas.prj", "areas.shp",
                                          "areas.shp-metadata.json", "areas.shx"]
    assert (folder / "areas.cpg").read_text().strip().upper().replace("-", "") == "UTF8"
    meta = file_metadata(path)
    names = [f["name"] for f in meta["fields"]]
    assert all(len(n.encode("utf-8")) <= 10 for n in names)
    assert len({n.lower() for n in names}) == len(names)  # unique without case (dBase names are)
    mapping_ = {f["field"]: f["name"] for f in meta["fields"] if f["from"] == "results"}
    assert mapping_["exact_planar"] == "exact_plan" and mapping_["estimate"] == "estimate"
    with fiona.open(str(path)) as src:
        assert list(src.schema["properties"]) == names
    assert meta["url"] == "areas.shp"


def test_flatgeobuf__rows_in_order_with_description(written, reference):
    with fiona.open(str(written[".fgb"])) as src:
        tags = src.tags()
        order = [f.properties["feature_index"] for f in src]
    assert order == [r["feature_index"] for r in reference["results"]]  # no spatial index: rows keep their order
    assert "areas in ha" in tags["DESCRIPTION"] and "areas.fgb-metadata.json" in tags["DESCRIPTION"]


# --- CSV and its CSVW sidecar -------------------------------------------------------------------------


def test_csv__plain_columns_and_a_csvw_sidecar_with_types_and_units(written, reference):
    path = written[".csv"]
    rows = list(csv.DictReader(io.StringIO(path.read_text())))
    assert list(rows[0]) == list(reference["results"][0])  # column names are the vocabulary's field names
    sidecar = json.loads(open(str(path) + "-metadata.json").read())
    assert sidecar["@context"] == "http://www.w3.org/ns/csvw" and sidecar["url"] == "areas.csv"
    columns = {c["name"]: c for c in sidecar["tableSchema"]["columns"]}
    assert list(columns) == list(rows[0])
    assert columns["estimate"]["datatype"] == "double" and columns["estimate"]["schema:unitText"] == "ha"
    assert columns["points"]["datatype"] == "integer" and columns["points"]["schema:unitText"] == "count"
    assert columns["id"]["datatype"] == "string" and "schema:unitText" not in columns["id"]
    assert columns["flagged"]["datatype"] == {"base": "boolean", "format": "True|False"}
    # every cell parses by its declared datatype
    parse = {"double": float, "integer": int, "string": str}
    for row in rows:
        for name, text in row.items():
            kind = columns[name]["datatype"]
            if isinstance(kind, dict):
                assert text in kind["format"].split("|")
            elif text != "":
                parse[kind](text)
    for row, ref in zip(rows, reference["results"]):
        assert float(row["estimate"]) == ref["estimate"]  # full precision (repr round trip)


def test_trace__csv_with_its_own_sidecar(data, tmp_path, capsys):
    trace, out = tmp_path / "t.csv", tmp_path / "r.json"
    rc, _, err = run_cli(capsys, [*area_argv(data, out), "--trace", str(trace), "--trace-every", "500"])
    assert rc == 0, err
    sidecar = json.loads(open(str(trace) + "-metadata.json").read())
    header = next(csv.reader(io.StringIO(trace.read_text())))
    columns = {c["name"]: c for c in sidecar["tableSchema"]["columns"]}
    assert list(columns) == header and columns["estimate"]["schema:unitText"] == "ha"
    assert columns["hits"]["datatype"] == "integer"
    assert sorted(os.listdir(tmp_path)) == ["r.json", "t.csv", "t.csv-metadata.json"]


# --- types do not depend on the options -----------------------------------------------------------------


@pytest.mark.parametrize("extra", [[], ["--claim", "0.3"], ["--no-exact"]], ids=["plain", "claim", "no-exact"])
def test_coverage_gpkg__column_types_whatever_the_options(data, tmp_path, capsys, extra):
    out = tmp_path / "cov.gpkg"
    rc, _, err = run_cli(capsys, ["coverage", str(data / "parcels.gpkg"), str(data / "zones.gpkg"),
                                  "--regions-id-field", "id", *FAST, "-o", str(out), *extra])
    assert rc == 0, err
    with sqlite3.connect(out) as con:
        declared = {row[1]: row[2] for row in con.execute("PRAGMA table_info(coverage)")}
        (kind,) = con.execute("SELECT geometry_type_name FROM gpkg_geometry_columns").fetchone()
    # verdict is text and claim, z, exact_share real numbers, with or without --claim and --no-exact
    assert declared["verdict"] == "TEXT" and declared["claim"] == "REAL"
    assert declared["z"] == declared["exact_share"] == declared["share"] == "REAL"
    assert declared["region_points"] == declared["k"] == "INTEGER"
    assert declared["input_id"] == "TEXT(8)" and declared["code"] == "INTEGER"  # as the input declares them
    assert kind == "MULTIPOLYGON"


def test_overlap_gpkg__each_zone_s_attributes_and_multipolygon_intersections(data, tmp_path, capsys):
    out = tmp_path / "pairs.gpkg"
    rc, _, err = run_cli(capsys, ["overlap", str(data / "zones.gpkg"), "--zones-id-field", "zone", *FAST,
                                  "-o", str(out)])
    assert rc == 0, err
    _, _, features = read_features(out)
    (props, geom), = features
    assert (props["zone_a"], props["zone_b"]) == ("Z1", "Z2") == (props["id_a"], props["id_b"])
    assert geom.geom_type == "MultiPolygon"
    expected = shapely.intersection(*ZONES)  # shapely, in the layer's CRS (the plane differs by < 1e-6)
    assert geom.area == pytest.approx(expected.area, rel=1e-6)


# --- SHA-256 of a Shapefile's parts ------------------------------------------------------------------------


def test_shapefile_input__every_part_hashed(data, capsys):
    doc = run_json(capsys, ["area", str(data / "parcels.shp"), *FAST])
    files = {os.path.basename(f["path"]): f["sha256"] for f in doc["input"]["files"]}
    parts = sorted(n for n in os.listdir(data) if n.startswith("parcels.") and not n.endswith(".gpkg"))
    assert sorted(files) == parts and {".shp", ".shx", ".dbf", ".prj"} <= {os.path.splitext(n)[1] for n in parts}
    for name, digest in files.items():
        assert digest == sha256(data / name)


# --- seed: a string that replays the run ------------------------------------------------------------------


def test_seed__fresh_seed_written_as_a_string_replays_bit_for_bit(data, capsys):
    argv = ["area", str(data / "parcels.gpkg"), "-n", "3000", "--workers", "1", "-q"]
    fresh = run_json(capsys, argv)
    seed = fresh["seed"]
    assert isinstance(seed, str) and seed.isdigit() and int(seed) < 2 ** 128  # numpy SeedSequence: 128-bit entropy
    if int(seed) > 2 ** 53:  # what a reader holding numbers as doubles would make of it (IEEE 754)
        assert int(float(seed)) != int(seed)
    replay = run_json(capsys, [*argv, "--seed", seed])
    assert replay["seed"] == seed
    assert replay["results"] == fresh["results"]  # every field, bit for bit


# --- text outputs and refusals ---------------------------------------------------------------------------


@pytest.mark.parametrize("name", ["out.txt", "out"])
def test_text__txt_or_no_extension_gets_the_table(data, tmp_path, capsys, name):
    out = tmp_path / name
    rc, stdout, err = run_cli(capsys, area_argv(data, out))
    assert rc == 0 and stdout == "", err
    assert out.read_text().startswith("areamc area: ") and os.listdir(tmp_path) == [name]


def _refused_cases():
    d = "{d}"
    cases = [
        ("parquet", area_argv_t(d, f"{d}/out.parquet"), r"--output .*out\.parquet: areamc does not write \.parquet "
                                                        r"files; give \.csv, \.json, \.txt .* or \.gpkg, \.geojson, "
                                                        r"\.shp or \.fgb for features"),
        ("kml", area_argv_t(d, f"{d}/out.kml"), r"does not write \.kml files"),
        ("gml", area_argv_t(d, f"{d}/out.gml"), r"does not write \.gml files"),
        ("mapinfo tab", area_argv_t(d, f"{d}/out.tab"), r"does not write \.tab files"),
        ("xlsx", area_argv_t(d, f"{d}/out.xlsx"), r"does not write \.xlsx files"),
        ("format contradicts csv", area_argv_t(d, f"{d}/out.csv", "--format", "json"),
         r"--format json: --output .*out\.csv ends in \.csv"),
        ("format with features", area_argv_t(d, f"{d}/out.gpkg", "--format", "csv"),
         r"--format csv: --output .*out\.gpkg writes features"),
        ("inspect features", ["inspect", f"{d}/parcels.gpkg", "-o", f"{d}/out.shp"],
         r"--output .*out\.shp: this command writes no features"),
        ("inspect parquet", ["inspect", f"{d}/parcels.gpkg", "-o", f"{d}/out.parquet"],
         r"does not write \.parquet files; give \.csv, \.json, \.txt or no extension for the results as text$"),
        ("trace not csv", [*area_argv_t(d, f"{d}/out.json"), "--trace", f"{d}/t.txt"], r"--trace .*t\.txt: the trace is CSV"),
        ("csv sidecar is a folder", area_argv_t(d, f"{d}/busy.csv"), r"--output .*busy\.csv-metadata\.json: is a folder"),
        ("shapefile part read-only", area_argv_t(d, f"{d}/locked.shp"), r"--output .*locked\.dbf: the file is read-only"),
        ("trace sidecar is the output", [*area_argv_t(d, f"{d}/t.csv-metadata.json"), "--trace", f"{d}/t.csv"],
         r"--trace .*t\.csv: writes .*t\.csv-metadata\.json, which --output .* also writes"),
        ("sidecar over an input", ["coverage", f"{d}/parcels.gpkg", f"{d}/zones.gpkg.csv-metadata.json", *FAST,
                                   "-o", f"{d}/zones.gpkg.csv"],
         r"--output .*zones\.gpkg\.csv-metadata\.json: would overwrite the input"),
    ]
    return cases


def area_argv_t(d, out, *more):
    return ["area", f"{d}/parcels.gpkg", *FAST, "-o", out, *more]


REFUSED = _refused_cases()


@pytest.mark.parametrize("case, argv, match", REFUSED, ids=[c[0] for c in REFUSED])
def test_output__refused_before_any_work(data, tmp_path, capsys, monkeypatch, case, argv, match):
    import shutil

    import areamc.cli.area
    import areamc.cli.inspect

    for name in ("parcels.gpkg", "zones.gpkg"):
        shutil.copyfile(data / name, tmp_path / name)
    (tmp_path / "busy.csv-metadata.json").mkdir()
    (tmp_path / "locked.dbf").write_text("x")
    os.chmod(tmp_path / "locked.dbf", 0o444)
    shutil.copyfile(data / "zones.gpkg", tmp_path / "zones.gpkg.csv-metadata.json")  # an input named like a sidecar

    def started(*args, **kwargs):
        raise AssertionError("work started before the output paths were checked")

    monkeypatch.setattr(areamc.cli.area, "read_layer", started)
    monkeypatch.setattr(areamc.cli.inspect, "read_layer", started)
    try:
        assert_refused(capsys, [a.replace("{d}", str(tmp_path)) for a in argv], match, tmp_path)
    finally:
        os.chmod(tmp_path / "locked.dbf", 0o644)


# --- writing: sidecars land with their file, stale Shapefile parts go ---------------------------------------


def test_csv_sidecar__full_disk__one_line_naming_output_no_file_left(data, tmp_path, capsys, monkeypatch):
    real_open = open
    calls = []

    class Full:
        def __init__(self, handle):
            self.handle = handle

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            self.handle.close()

        def write(self, text):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    def fake_open(*args, **kwargs):
        calls.append(args[0])
        handle = real_open(*args, **kwargs)
        return Full(handle) if len(calls) == 2 else handle  # 1: the CSV, 2: its sidecar

    monkeypatch.setattr(areamc.output, "open", fake_open, raising=False)
    import shutil

    shutil.copyfile(data / "parcels.gpkg", tmp_path / "parcels.gpkg")
    assert_refused(capsys, area_argv_t(str(tmp_path), str(tmp_path / "out.csv")),
                   r"--output .*out\.csv: cannot write: No space left on device \(its metadata file "
                   r"out\.csv-metadata\.json\)", tmp_path)


def test_shapefile__replaces_an_older_one_and_its_stale_index(data, tmp_path, capsys):
    out = tmp_path / "areas.shp"
    (tmp_path / "areas.qix").write_bytes(b"stale spatial index of an older areas.shp")
    (tmp_path / "areas.dbf").write_bytes(b"older attributes")
    rc, _, err = run_cli(capsys, area_argv(data, out))
    assert rc == 0, err
    assert sorted(os.listdir(tmp_path)) == ["areas.cpg", "areas.dbf", "areas.prj", "areas.shp",
                                            "areas.shp-metadata.json", "areas.shx"]
    with fiona.open(str(out)) as src:
        assert len(src) == 3


def test_overlap_of_reach_circles__point_attributes_typed_by_their_values(tmp_path, capsys):
    # zones built from facility points keep the points' attributes; the layer built in memory has no
    # declared schema, so they are typed by their values (text, real), and the caution opens the description
    points = tmp_path / "sites.gpkg"
    schema = {"geometry": "Point", "properties": {"site": "str", "reach": "float"}}
    with fiona.open(points, "w", driver="GPKG", schema=schema, crs="EPSG:4326", layer="sites") as dst:
        for site, lon in (("north", 10.30), ("south", 10.33)):
            dst.write({"geometry": mapping(shapely.Point(lon, 47.2)), "properties": {"site": site, "reach": 2000.0}})
    out = tmp_path / "pairs.gpkg"
    rc, _, err = run_cli(capsys, ["overlap", str(points), "--zones-id-field", "site", "--radius-field", "reach",
                                  "--circle-vertices", "64", *FAST, "-o", str(out)])
    assert rc == 0, err
    with sqlite3.connect(out) as con:
        declared = {row[1]: row[2] for row in con.execute("PRAGMA table_info(overlaps)")}
        (description,) = con.execute("SELECT description FROM gpkg_contents").fetchone()
        (props,) = [dict(zip([d[0] for d in con.execute("SELECT * FROM overlaps").description], row))
                    for row in con.execute("SELECT * FROM overlaps")]
    assert declared["site_a"] == declared["site_b"] == "TEXT" and declared["reach_a"] == "REAL"
    assert (props["site_a"], props["site_b"], props["reach_b"]) == ("north", "south", 2000.0)
    assert description.startswith("caution: reach circles are straight-line")
    assert "areas in km2: estimate" in description


def test_types__every_field_of_every_table_has_a_declared_type():
    # no field of a report's rows is left to be typed by the values a run gives
    from areamc.frames import TABLES
    from areamc.output import record_types

    for report, tables in TABLES.items():
        for which, table in tables.items():
            types = record_types(table.record, *(part for _, part in table.nested))
            assert set(table.fields) <= set(types), (report.__name__, which, set(table.fields) - set(types))
            assert set(types.values()) <= {"str", "int", "float", "bool"}
