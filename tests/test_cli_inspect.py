"""Command-line tests of ``areamc inspect``: what it reports about each sample file, and bad input.

Expected values come from outside areamc: the layer's contents are read here
with fiona, geodesic totals come from ``pyproj.Geod(ellps="WGS84")``
(Karney 2013, "Algorithms for geodesics", J. Geodesy 87:43-55) on the file's
own geometry densified here with shapely, and planar totals from shapely in
the plane the tool names, reprojected here with pyproj.  The sample data is
invented and none of its numbers are hard-coded.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import os
import shutil
import subprocess
import sys
from collections import Counter
from pathlib import Path

import fiona
import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import LineString, Polygon, box, mapping, shape

from conftest import run_cli, run_json

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_data"
GPKG = SAMPLE / "vale_county.gpkg"
SHP = SAMPLE / "vale_districts.shp"
GEOJSON = SAMPLE / "vale_districts.geojson"
UTM = SAMPLE / "vale_reserves_utm32n.gpkg"

#: Every sample vector file and layer, polygons and points.
SAMPLE_LAYERS = [
    pytest.param(GPKG, "districts", id="gpkg-districts"),
    pytest.param(GPKG, "service_zones", id="gpkg-service_zones"),
    pytest.param(GPKG, "clinics", id="gpkg-clinics-points"),
    pytest.param(GPKG, "blocks", id="gpkg-blocks"),
    pytest.param(SHP, None, id="shp"),
    pytest.param(GEOJSON, None, id="geojson"),
    pytest.param(UTM, None, id="utm32n-gpkg"),
]

#: WGS84 ellipsoid, a = 6 378 137 m, 1/f = 298.257 223 563 (NIMA TR8350.2), built here on purpose.
GEOD = pyproj.Geod(ellps="WGS84")
#: Metres per degree to turn the 1000 m densify step into degrees (common practice: one degree
#: of arc on the equator is about 111 320 m).
METRES_PER_DEGREE = 111_320.0
#: Square metres per hectare and per km² (SI); per acre, NIST Handbook 44, Appendix C.
UNIT_M2 = {"ha": 1.0e4, "km2": 1.0e6, "acre": 4046.8564224}

_script = shutil.which("areamc", path=os.path.dirname(sys.executable)) or shutil.which("areamc")
AREAMC = [_script] if _script else [sys.executable, "-c", "import sys; from areamc.cli import main; sys.exit(main())"]


# --------------------------------------------------------------------------- helpers


def inspect_json(argv, capsys) -> dict:
    """The one record of ``areamc inspect ARGV --format json`` (in-process, conftest's run_json), areas in m²
    unless ARGV gives ``--units``."""
    argv = [str(a) for a in argv]
    units = [] if "--units" in argv else ["--units", "m2"]
    doc = run_json(capsys, ["inspect", *argv, *units])
    assert len(doc["results"]) == 1
    return doc["results"][0]


def run_script(*args, module: bool = False) -> subprocess.CompletedProcess:
    cmd = [sys.executable, "-m", "areamc"] if module else list(AREAMC)
    return subprocess.run([*cmd, *map(str, args)], capture_output=True, text=True, timeout=120)


def reproject(geom, trans: pyproj.Transformer):
    """Apply a pyproj transformer to every coordinate of a shapely geometry."""
    return shapely.transform(geom, lambda xy: np.column_stack(trans.transform(xy[:, 0], xy[:, 1])))


def read_reference(path, layer=None, step_m: float = 1000.0) -> dict:
    """Read a layer with fiona and derive, independently of areamc, what inspect should say."""
    with fiona.open(path, layer=layer) as src:
        crs = pyproj.CRS.from_wkt(src.crs_wkt)
        geoms = [shape(f.geometry) for f in src]
        name = src.name
    ref = {
        "layer": name,
        "crs": crs,
        "features": len(geoms),
        "types": dict(Counter(g.geom_type for g in geoms)),
        "extent": tuple(shapely.total_bounds(geoms)),
        "polygonal": all(g.geom_type in ("Polygon", "MultiPolygon") for g in geoms),
        "fields": fiona_fields(path, layer),
    }
    step = step_m / METRES_PER_DEGREE if crs.is_geographic else step_m
    dense = [shapely.segmentize(g, step) for g in geoms] if ref["polygonal"] else geoms
    to_lonlat = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    lonlat = dense if crs.is_geographic else [reproject(g, to_lonlat) for g in dense]
    ref["dense"], ref["lonlat"] = dense, lonlat
    ref["extent_lonlat"] = tuple(shapely.total_bounds(lonlat))
    if ref["polygonal"]:
        ref["geodesic_total"] = sum(geod_area(g) for g in lonlat)
    return ref


def fiona_fields(path, layer=None) -> list[dict]:
    """Each attribute field as fiona reads it: the schema's type without its width, distinct non-null
    values, nulls, and whether every feature has its own value."""
    with fiona.open(path, layer=layer) as src:
        schema = dict(src.schema["properties"])
        rows = [dict(f.properties) for f in src]
    out = []
    for name, declared in schema.items():
        values = [row[name] for row in rows]
        present = [v for v in values if v is not None]
        out.append({"name": name, "type": declared.split(":")[0], "distinct": len(set(present)),
                    "missing": len(values) - len(present),
                    "unique": len(present) == len(values) == len(set(present))})
    return out


def geod_area(geom_lonlat) -> float:
    """WGS84 area of a lon/lat (Multi)Polygon: |shell| minus |holes|, each ring by
    pyproj.Geod.geometry_area_perimeter (Karney 2013)."""
    total = 0.0
    for poly in shapely.get_parts(geom_lonlat):
        shell = abs(GEOD.geometry_area_perimeter(Polygon(poly.exterior))[0])
        holes = sum(abs(GEOD.geometry_area_perimeter(Polygon(ring))[0]) for ring in poly.interiors)
        total += shell - holes
    return total


def rel(a: float, b: float) -> float:
    return abs(a - b) / abs(b)


def fingerprint(folder: Path) -> dict:
    return {
        p.name: (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns)
        for p in sorted(folder.iterdir())
        if p.is_file()
    }


def assert_one_line_error(status, out, err, *needles):
    assert status == 2, (status, err)
    assert out == ""
    assert "Traceback" not in err
    lines = [line for line in err.strip().splitlines() if not line.startswith(("areamc: warning:", "areamc: note:"))]
    assert len(lines) == 1, err  # warnings (a notice naming the layer used, ...) may come first
    assert lines[0].startswith("areamc: error:"), lines[0]
    for needle in needles:
        assert str(needle) in lines[0], (needle, lines[0])


def check_info(info: dict, path, layer) -> None:
    """What every inspect record must say, against the file read independently."""
    ref = read_reference(path, layer)
    assert info["path"] == str(path)
    assert info["layers"] == fiona.listlayers(path)
    assert info["layer"] == ref["layer"]
    assert info["features"] == ref["features"]
    assert info["geometry_types"] == ref["types"]
    assert pyproj.CRS.from_user_input(info["crs"]).equals(ref["crs"])
    assert info["extent"] == pytest.approx(ref["extent"], abs=1e-9)  # shapely.total_bounds, full floats
    assert info["extent_lonlat"] == pytest.approx(ref["extent_lonlat"], abs=1e-9)
    assert info["invalid"] == 0 and info["empty"] == 0  # the sample data is clean
    assert info["kept"] == ref["features"]
    # the plane is the object every command writes (EqualAreaPlane.to_dict), its distortion inside it
    assert set(info["plane"]) == {"crs", "name", "chosen_from_data", "area_distortion", "wkt"}
    assert not {"equal_area_crs", "area_distortion", "measured_area_distortion"} & set(info)
    plane = pyproj.CRS.from_wkt(info["plane"]["wkt"])
    assert plane.is_projected and plane.equals(pyproj.CRS.from_user_input(info["plane"]["crs"]))
    assert info["plane"]["chosen_from_data"] is True
    assert 0 <= info["plane"]["area_distortion"] < 1e-6
    assert info["fields"] == ref["fields"]  # fiona's schema types and the values counted here
    if ref["polygonal"]:
        assert info["kind"] == "polygons"
        # Total geodesic area: pyproj.Geod (Karney 2013) summed over the file's features.
        assert rel(info["geodesic_total"], ref["geodesic_total"]) < 1e-9
        # Total planar area: shapely in the named plane, reprojected here with pyproj.
        to_plane = pyproj.Transformer.from_crs(ref["crs"], plane, always_xy=True)
        planar = sum(float(shapely.area(reproject(g, to_plane))) for g in ref["dense"])
        assert rel(info["exact_planar_total"], planar) < 1e-9
        assert rel(info["exact_planar_total"], info["geodesic_total"]) < 1e-6
    else:
        assert info["kind"] == "points"
        assert info["exact_planar_total"] is None and info["geodesic_total"] is None


# --------------------------------------------------------------------------- every sample file


@pytest.mark.parametrize("path, layer", SAMPLE_LAYERS)
def test_inspect_every_sample_layer(capsys, path, layer):
    info = inspect_json([path, *(["--layer", layer] if layer else [])], capsys)
    check_info(info, path, layer)


def test_inspect_default_layer_is_the_first(capsys):
    info = inspect_json([GPKG], capsys)
    assert info["layer"] == fiona.listlayers(GPKG)[0]


def test_inspect_utm_file_end_to_end():
    proc = run_script("inspect", UTM, "--format", "json", "--units", "m2")
    assert proc.returncode == 0, proc.stderr
    doc = json.loads(proc.stdout)
    assert doc["tool"] == "areamc" and doc["units"] == "m2"
    check_info(doc["results"][0], UTM, None)


def test_inspect_point_layer_with_python_dash_m():
    proc = run_script("inspect", GPKG, "--layer", "clinics", "--format", "json", "--units", "m2", module=True)
    assert proc.returncode == 0, proc.stderr
    check_info(json.loads(proc.stdout)["results"][0], GPKG, "clinics")


def test_inspect_table_names_the_totals(capsys):
    status, out, err = run_cli(capsys, map(str, ["inspect", GPKG, "--layer", "districts", "--units", "km2"]))
    assert status == 0, err
    lines = dict(line.split(":", 1) for line in out.splitlines() if ":" in line)
    assert lines["layer"].strip() == "districts"
    assert lines["features"].strip() == str(read_reference(GPKG, "districts")["features"])
    total = lines["total geodesic area"].strip()
    assert total.endswith(" km2")
    expected_km2 = read_reference(GPKG, "districts")["geodesic_total"] / 1e6
    assert float(total.split()[0].replace(",", "")) == pytest.approx(expected_km2, rel=1e-5)  # 6 figures shown


@pytest.mark.parametrize("unit", sorted(UNIT_M2))
def test_inspect_units(capsys, unit):
    base = inspect_json([UTM], capsys)
    other = inspect_json([UTM, "--units", unit], capsys)
    for key in ("exact_planar_total", "geodesic_total"):
        assert other[key] == pytest.approx(base[key] / UNIT_M2[unit], rel=1e-12)  # SI / NIST HB44 App. C


def test_inspect_csv_has_the_json_fields(capsys):
    info = inspect_json([SHP], capsys)
    status, out, err = run_cli(capsys, map(str, ["inspect", SHP, "--format", "csv", "--units", "m2"]))
    assert status == 0, err
    rows = list(csv.DictReader(io.StringIO(out)))
    assert len(rows) == 1
    assert list(rows[0]) == list(info)
    assert float(rows[0]["geodesic_total"]) == info["geodesic_total"]
    assert int(rows[0]["features"]) == info["features"]
    # list fields are one flattened text cell: the fields as key=value;... joined by " | ", the plane as key=value;...
    cells = [dict(item.split("=", 1) for item in field.split(";")) for field in rows[0]["fields"].split(" | ")]
    assert cells == [{k: str(v) for k, v in f.items()} for f in fiona_fields(SHP)]
    plane = dict(item.split("=", 1) for item in rows[0]["plane"].split(";"))
    assert plane["crs"] == info["plane"]["crs"] and plane["wkt"] == info["plane"]["wkt"]
    assert [float(v) for v in rows[0]["extent"].split()] == info["extent"]  # full floats, space separated


def test_inspect_output_file_format_from_extension(tmp_path, capsys):
    target = tmp_path / "info.json"
    status, out, err = run_cli(capsys, map(str, ["inspect", GEOJSON, "--units", "m2", "--output", target]))
    assert status == 0, err
    assert out == ""
    info = json.loads(target.read_text())["results"][0]
    assert rel(info["geodesic_total"], read_reference(GEOJSON)["geodesic_total"]) < 1e-9
    assert [p.name for p in tmp_path.iterdir()] == ["info.json"]


def test_inspect_counts_repaired_and_empty_geometries(tmp_path, capsys):
    path = tmp_path / "messy.geojson"
    bow = Polygon([(10.30, 47.10), (10.36, 47.16), (10.36, 47.10), (10.30, 47.16), (10.30, 47.10)])
    with fiona.open(path, "w", driver="GeoJSON", crs="EPSG:4326",
                    schema={"geometry": "Polygon", "properties": {"name": "str"}}) as dst:
        dst.write({"geometry": mapping(box(10.40, 47.10, 10.46, 47.15)), "properties": {"name": "square"}})
        dst.write({"geometry": mapping(bow), "properties": {"name": "bowtie"}})
        dst.write({"geometry": None, "properties": {"name": "nothing"}})
    status, out, err = run_cli(capsys, map(str, ["inspect", path, "--format", "json", "--units", "m2"]))
    assert status == 0, err
    info = json.loads(out)["results"][0]
    assert info["features"] == 3 and info["invalid"] == 1 and info["empty"] == 1 and info["kept"] == 2
    assert "make_valid" in err and "empty" in err
    # Geodesic total of the square and the make_valid (GEOS) repair of the bow-tie, by pyproj.Geod.
    step = 1000 / METRES_PER_DEGREE
    expected = geod_area(shapely.segmentize(box(10.40, 47.10, 10.46, 47.15), step)) + geod_area(
        shapely.segmentize(shapely.make_valid(bow), step)
    )
    assert rel(info["geodesic_total"], expected) < 1e-9


# --------------------------------------------------------------------------- bad input


@pytest.fixture(scope="module")
def bad_files(tmp_path_factory) -> dict:
    folder = tmp_path_factory.mktemp("inspect_bad")
    fake = folder / "fake.gpkg"
    fake.write_text("plain text, not a GeoPackage\n")
    lines = folder / "lines.geojson"
    with fiona.open(lines, "w", driver="GeoJSON", crs="EPSG:4326",
                    schema={"geometry": "LineString", "properties": {"name": "str"}}) as dst:
        dst.write({"geometry": mapping(LineString([(10.2, 47.1), (10.4, 47.3)])), "properties": {"name": "l1"}})
    nocrs = folder / "nocrs.shp"
    with fiona.open(nocrs, "w", driver="ESRI Shapefile",
                    schema={"geometry": "Polygon", "properties": {"name": "str"}}) as dst:  # no crs: no .prj
        dst.write({"geometry": mapping(box(10.2, 47.1, 10.3, 47.2)), "properties": {"name": "a"}})
    gpkg = folder / "county_copy.gpkg"
    shutil.copyfile(GPKG, gpkg)
    return {"folder": folder, "fake": fake, "lines": lines, "nocrs": nocrs, "gpkg": gpkg,
            "missing": folder / "missing.gpkg"}


BAD_INSPECT_CASES = [
    ("missing-file", ["{missing}"], ["{missing}"]),
    ("text-renamed-gpkg", ["{fake}"], ["{fake}"]),
    ("unknown-layer", ["{gpkg}", "--layer", "no_such_layer"], ["{gpkg}", "no_such_layer"]),
    ("linestrings", ["{lines}"], ["{lines}"]),
    ("no-crs", ["{nocrs}"], ["{nocrs}", "--input-crs"]),
    ("unknown-id-field", ["{gpkg}", "--id-field", "no_such_field"], ["{gpkg}", "no_such_field"]),
    ("crs-not-equal-area", ["{gpkg}", "--plane-crs", "EPSG:3857"], ["--plane-crs EPSG:3857: not equal-area"]),
    ("points-crs-not-equal-area", ["{gpkg}", "--layer", "clinics", "--plane-crs", "EPSG:3857"],
     ["--plane-crs EPSG:3857: not equal-area"]),
    ("unknown-id-field-named", ["{gpkg}", "--id-field", "no_such_field"], ["--id-field 'no_such_field'"]),
    ("crs-geographic-points", ["{gpkg}", "--layer", "clinics", "--plane-crs", "EPSG:4326"], ["--plane-crs"]),
    ("crs-unknown", ["{gpkg}", "--plane-crs", "not a crs"], ["--plane-crs"]),
    ("unknown-units", ["{gpkg}", "--units", "furlong2"], ["--units"]),
]


@pytest.mark.parametrize("argv, needles", [pytest.param(a, n, id=i) for i, a, n in BAD_INSPECT_CASES])
def test_inspect_bad_input(bad_files, tmp_path, capsys, argv, needles):
    fill = {k: str(v) for k, v in bad_files.items()}
    argv = [a.format(**fill) for a in argv]
    before = fingerprint(bad_files["folder"])
    status, out, err = run_cli(capsys, map(str, ["inspect", *argv, "--output", tmp_path / "info.json"]))
    assert_one_line_error(status, out, err, *[n.format(**fill) for n in needles])
    assert list(tmp_path.iterdir()) == []
    assert fingerprint(bad_files["folder"]) == before


def test_inspect_no_crs_file_with_input_crs(bad_files, capsys):
    info = inspect_json([bad_files["nocrs"], "--input-crs", "EPSG:4326"], capsys)
    assert info["crs"] == "EPSG:4326"
    expected = geod_area(shapely.segmentize(box(10.2, 47.1, 10.3, 47.2), 1000 / METRES_PER_DEGREE))
    assert rel(info["geodesic_total"], expected) < 1e-9  # pyproj.Geod, Karney 2013


# --------------------------------------------------------------------------- table, fields, duplicate ids

#: Width every table line keeps to (a terminal of 100 columns; areamc.output.WIDTH, common practice).
WIDTH = 100
#: A field name longer than the table has room for: cut with an ellipsis in the table only.
LONG_NAME = "planning_reference_of_the_regional_authority_as_recorded_in_the_cadastre_of_1987_revision_b"


def wide_rows(n: int = 18) -> list[dict]:
    """Rows with a unique code, a group of 8 values each repeated and 2 single ones, an integer
    with one null, a float and a long-named text field."""
    return [{"code": f"c{i:02d}", "grp": f"g{i % 8}" if i < 16 else f"solo{i}", "n": None if i == 5 else i % 4,
             "x": i * 0.5, LONG_NAME: f"ref-{i % 3}"} for i in range(n)]


@pytest.fixture(scope="module")
def wide(tmp_path_factory) -> dict:
    """A GeoPackage of 18 lon/lat cells with typed fields, in a folder with a long name, and the same
    cells in UTM zone 32N as a Shapefile (field names of at most 10 characters)."""
    folder = tmp_path_factory.mktemp("inspect_wide") / ("a_folder_name_long_enough_to_need_wrapping_" * 2)
    folder.mkdir()
    gpkg = folder / "typed_cells.gpkg"
    props = {"code": "str:8", "grp": "str", "n": "int", "x": "float", LONG_NAME: "str"}
    to_utm = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:32632", always_xy=True)
    cells = [box(10.0 + 0.05 * (i % 4), 47.0 + 0.04 * (i // 4), 10.04 + 0.05 * (i % 4), 47.03 + 0.04 * (i // 4))
             for i in range(18)]
    with fiona.open(gpkg, "w", driver="GPKG", crs="EPSG:4326", schema={"geometry": "Polygon", "properties": props}) as dst:
        for cell, row in zip(cells, wide_rows()):
            dst.write({"geometry": mapping(cell), "properties": row})
    shp = folder / "typed_utm.shp"
    short = {"code": "str:8", "grp": "str:10", "n": "int:6", "x": "float:12.4"}
    with fiona.open(shp, "w", driver="ESRI Shapefile", crs="EPSG:32632",
                    schema={"geometry": "Polygon", "properties": short}) as dst:
        for cell, row in zip(cells, wide_rows()):
            dst.write({"geometry": mapping(reproject(cell, to_utm)), "properties": {k: row[k] for k in short}})
    return {"gpkg": gpkg, "shp": shp, "folder": folder}


def table_lines(capsys, argv) -> list[str]:
    status, out, err = run_cli(capsys, ["inspect", *map(str, argv)])
    assert status == 0, err
    return out.splitlines()


def labelled(lines: list[str]) -> dict:
    """The ``label: value`` lines before the field table, a wrapped value's continuation lines joined back."""
    out: dict[str, str] = {}
    label = None
    for line in lines[:lines.index("")]:
        if line.startswith(" ") and label is not None:
            out[label] += " " + line.strip()
        else:
            label, value = line.split(":", 1)
            out[label] = value.strip()
    return out


def field_rows(lines: list[str]) -> list[list[str]]:
    """The rows of the field sub-table (after its heading and dashes), split on runs of 2+ spaces."""
    import re

    dashes = next(n for n, line in enumerate(lines) if line.startswith("----"))
    return [re.split(r"\s{2,}", line.strip()) for line in lines[dashes + 1:]]


TABLE_CASES = [pytest.param(path, layer, id=f"sample-{i}") for i, (path, layer) in
               enumerate([(p.values[0], p.values[1]) for p in SAMPLE_LAYERS])]


@pytest.mark.parametrize("which", ["gpkg", "shp"])
def test_inspect_table__every_line_fits_100_columns__wide_files(capsys, wide, which):
    lines = table_lines(capsys, [wide[which]])
    assert max(len(line) for line in lines) <= WIDTH, [line for line in lines if len(line) > WIDTH]
    assert len(str(wide[which])) > WIDTH  # the file line had to be wrapped


@pytest.mark.parametrize("path, layer", TABLE_CASES)
def test_inspect_table__every_line_fits_100_columns__samples(capsys, path, layer):
    lines = table_lines(capsys, [path, *(["--layer", layer] if layer else [])])
    assert max(len(line) for line in lines) <= WIDTH, [line for line in lines if len(line) > WIDTH]
    # the field sub-table lists every field fiona declares, with its counts
    ref = fiona_fields(path, layer)
    assert field_rows(lines) == [[f["name"], f["type"], f"{f['distinct']:,}", f"{f['missing']:,}",
                                  "yes" if f["unique"] else "no"] for f in ref]


#: (file, decimals of the extent in the table): degrees get 6, metres 1 (the brief's rounding).
EXTENT_CASES = [pytest.param(GPKG, 6, id="degrees"), pytest.param(UTM, 1, id="metres-sample"),
                pytest.param("shp", 1, id="metres-shapefile")]


@pytest.mark.parametrize("path, decimals", EXTENT_CASES)
def test_inspect_table__extent_without_thousands_separators(capsys, wide, path, decimals):
    import re

    path = wide[path] if path == "shp" else path
    lines = table_lines(capsys, [path])
    with fiona.open(path) as src:  # the extent read here: shapely.total_bounds of fiona's features
        bounds = shapely.total_bounds([shape(f.geometry) for f in src])
    x0, y0, x1, y1 = (f"{v:.{decimals}f}" for v in bounds)
    shown = labelled(lines)
    assert shown["extent (layer CRS)"] == f"{x0}, {y0} .. {x1}, {y1}"  # min x, min y .. max x, max y
    lonlat = shown["extent (lon/lat)"]
    number = r"-?\d+\.\d{6}"
    assert re.fullmatch(rf"{number}, {number} \.\. {number}, {number}", lonlat), lonlat
    values = [float(v) for v in re.findall(number, lonlat)]
    assert values == pytest.approx(read_reference(path)["extent_lonlat"], abs=5e-7 + 1e-9)  # rounded to 6


def test_inspect_table__long_field_name_cut_only_in_the_table(capsys, wide):
    lines = table_lines(capsys, [wide["gpkg"]])
    rows = field_rows(lines)
    ref = fiona_fields(wide["gpkg"])
    names = [r[0] for r in rows]
    assert names[:-1] == [f["name"] for f in ref[:-1]]
    assert names[-1].endswith("…") and LONG_NAME.startswith(names[-1][:-1]) and len(names[-1]) < len(LONG_NAME)
    assert [r[1:] for r in rows] == [[f["type"], f"{f['distinct']:,}", f"{f['missing']:,}",
                                      "yes" if f["unique"] else "no"] for f in ref]
    info = inspect_json([wide["gpkg"]], capsys)
    assert [f["name"] for f in info["fields"]] == [f["name"] for f in ref]  # JSON keeps the whole name
    assert info["fields"] == ref
    shown = labelled(lines)
    assert shown["plane"] == f"{info['plane']['crs']} (chosen from the data)"
    assert shown["file"].replace(" ", "") == str(wide["gpkg"])  # cut to the width, whole once joined back
    assert float(shown["area distortion"]) == pytest.approx(info["plane"]["area_distortion"], rel=0.05)


def repeated_groups(path) -> tuple[list[str], Counter]:
    """The repeated values of field grp, in order of first appearance, read here with fiona."""
    with fiona.open(path) as src:
        counts = Counter(str(f.properties["grp"]) for f in src)
    return [v for v in counts if counts[v] > 1], counts


def duplicate_warning(err: str) -> str:
    lines = [line for line in err.splitlines() if "has duplicate values" in line]
    assert len(lines) == 1, err
    assert lines[0].startswith("areamc: warning: ")
    return lines[0]


def test_inspect_duplicate_id_field__warned_never_refused(capsys, wide):
    path = wide["gpkg"]
    repeated, counts = repeated_groups(path)
    status, out, err = run_cli(capsys, ["inspect", str(path), "--id-field", "grp", "--format", "json"])
    assert status == 0, err
    info = json.loads(out)["results"][0]
    assert info["kept"] == sum(counts.values())
    assert next(f for f in info["fields"] if f["name"] == "grp")["unique"] is False
    line = duplicate_warning(err)
    named = ", ".join(f"{v!r} ({counts[v]} features)" for v in repeated[:5])
    assert f"--id-field 'grp' has duplicate values: {named} and {len(repeated) - 5} more; " in line
    assert f"{len(repeated)} values repeat, so results could not be joined back by 'grp'" in line
    assert "--allow-duplicate-ids" in line
    # a unique field draws no warning
    status, _, err = run_cli(capsys, ["inspect", str(path), "--id-field", "code"])
    assert status == 0 and "duplicate" not in err


#: Every other command, run with --allow-duplicate-ids on the layer whose grp field repeats.
OTHER_COMMANDS = [
    pytest.param(["area", "{gpkg}", "--id-field", "grp"], "--id-field", id="area"),
    pytest.param(["overlap", "{gpkg}", "--zones-id-field", "grp"], "--zones-id-field", id="overlap"),
    pytest.param(["coverage", "{gpkg}", "{gpkg}", "--regions-id-field", "grp"], "--regions-id-field", id="coverage"),
    pytest.param(["integrate", "{gpkg}", "--density", "1e-4", "--regions-id-field", "grp"], "--regions-id-field",
                 id="integrate"),
]


@pytest.mark.parametrize("argv, flag", OTHER_COMMANDS)
def test_allow_duplicate_ids__every_command_warns_in_inspects_words(capsys, wide, argv, flag):
    path = str(wide["gpkg"])
    repeated, counts = repeated_groups(path)
    _, _, err = run_cli(capsys, ["inspect", path, "--id-field", "grp"])
    seen = duplicate_warning(err)
    argv = [a.format(gpkg=path) for a in argv]
    status, _, err = run_cli(capsys, [*argv, "--allow-duplicate-ids", "-n", "500", "--seed", "1", "--format", "json",
                                      "-q"])
    assert status == 0, err
    line = duplicate_warning(err)
    named = ", ".join(f"{v!r} ({counts[v]} features)" for v in repeated[:5])
    same = f"{named} and {len(repeated) - 5} more; "
    # the same words as inspect's warning: the field (by the command's own flag), the values named, how many
    # repeat, why it matters
    assert line.split(same)[0] == seen.split(same)[0].replace("--id-field", flag)
    assert f"{same}kept (--allow-duplicate-ids): {len(repeated)} values repeat, so results could not be joined " \
           "back by 'grp'; rows tell them apart by feature_index" in line
    assert f"{len(repeated)} values repeat, so results could not be joined back by 'grp'" in seen
