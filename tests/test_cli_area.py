"""Command-line tests of ``areamc area``: bad input, options, formats and end-to-end runs.

Every expected number here comes from outside areamc:

* geodesic areas from ``pyproj.Geod(ellps="WGS84").geometry_area_perimeter``
  (Karney 2013, "Algorithms for geodesics", J. Geodesy 87:43-55) applied to
  the file's own geometry, read with fiona and densified in this file;
* planar areas from shapely, after reprojecting with pyproj into the plane the
  tool reports;
* interval bounds from the Wilson (1927) score formula (Wilson 1927, JASA
  22:209-212; Newcombe 1998, Statistics in Medicine 17:857-872, method 3)
  with the normal quantile from Python's ``statistics.NormalDist``;
* the deviation ``z`` from the two-sided mid-p binomial tail (Lancaster 1961,
  JASA 56:223-234) with ``scipy.stats.binom``;
* unit factors from NIST Handbook 44, Appendix C.

The sample data (sample_data/) is invented; its numbers are never hard-coded
here, they are recomputed from the files.

Bad-input cases run in-process through ``areamc.cli.main(argv)`` (fast, with
conftest's ``run_cli``/``run_json``); a handful of subprocess runs check the
installed ``areamc`` script and ``python -m areamc`` end to end.
"""

from __future__ import annotations

import csv
import hashlib
import importlib.metadata
import io
import json
import math
import os
import re
import shutil
import subprocess
import sys
import warnings
from pathlib import Path
from statistics import NormalDist

import fiona
import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import LineString, Polygon, box, mapping, shape

import areamc
from areamc.cli import main
from areamc.errors import InputError

from conftest import run_cli, run_json, mid_p_z

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_data"
GPKG = SAMPLE / "vale_county.gpkg"
SHP = SAMPLE / "vale_districts.shp"
GEOJSON = SAMPLE / "vale_districts.geojson"
UTM = SAMPLE / "vale_reserves_utm32n.gpkg"

#: Every sample polygon file, with the layer to read (None: the only layer).
POLYGON_FILES = [
    pytest.param(GPKG, "districts", id="gpkg-districts"),
    pytest.param(SHP, None, id="shp"),
    pytest.param(GEOJSON, None, id="geojson"),
    pytest.param(UTM, None, id="utm32n-gpkg"),
]

#: WGS84 ellipsoid, a = 6 378 137 m, 1/f = 298.257 223 563 (NIMA TR8350.2), built here on purpose.
GEOD = pyproj.Geod(ellps="WGS84")
#: Metres in one degree used to turn a step in metres into degrees (common practice: 111 320 m
#: is one degree of arc on the equator, so the step in degrees is at most the step in metres).
METRES_PER_DEGREE = 111_320.0

#: Square metres per unit, NIST Handbook 44, Appendix C (international foot = 0.3048 m):
#: 1 acre = 4 046.856 422 4 m², 1 mi² = 2 589 988.110 336 m²; ha and km² by SI definition.
UNIT_M2 = {"m2": 1.0, "ha": 1.0e4, "km2": 1.0e6, "acre": 4046.8564224, "mi2": 2589988.110336}

#: Fields every JSON/CSV result row must have (from the specification).
REQUIRED_FIELDS = ("id", "estimate", "std_error", "ci_low", "ci_high", "points", "hits", "exact_planar", "geodesic", "z")
AREA_FIELDS = ("estimate", "std_error", "ci_low", "ci_high", "exact_planar", "geodesic")

_script = shutil.which("areamc", path=os.path.dirname(sys.executable)) or shutil.which("areamc")
AREAMC = [_script] if _script else [sys.executable, "-c", "import sys; from areamc.cli import main; sys.exit(main())"]


# --------------------------------------------------------------------------- helpers


def run_script(*args, module: bool = False, cwd=None) -> subprocess.CompletedProcess:
    """Run the installed ``areamc`` script (or ``python -m areamc``) in a subprocess."""
    cmd = [sys.executable, "-m", "areamc"] if module else list(AREAMC)
    return subprocess.run([*cmd, *map(str, args)], capture_output=True, text=True, timeout=120, cwd=cwd)


def reproject(geom, trans: pyproj.Transformer):
    """Apply a pyproj transformer to every coordinate of a shapely geometry."""
    return shapely.transform(geom, lambda xy: np.column_stack(trans.transform(xy[:, 0], xy[:, 1])))


def to_lonlat(geom, crs: pyproj.CRS):
    if crs.is_geographic:
        return geom
    return reproject(geom, pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True))


def reference_features(path, layer=None, step_m: float = 1000.0):
    """Read a polygon layer with fiona and densify it as the specification says.

    Returns (crs, {feature id: (densified geometry in the file's CRS, same in lon/lat)}).
    A geographic layer is densified in lon/lat with shapely.segmentize at
    ``step_m / 111 320`` degrees; a projected one at ``step_m`` of its own metres.
    """
    with fiona.open(path, layer=layer) as src:
        crs = pyproj.CRS.from_wkt(src.crs_wkt)
        feats = [(str(f.id), shape(f.geometry)) for f in src]
    step = step_m / METRES_PER_DEGREE if crs.is_geographic else step_m
    out = {}
    for fid, geom in feats:
        dense = shapely.segmentize(geom, step)
        out[fid] = (dense, to_lonlat(dense, crs))
    return crs, out


def geod_area(geom_lonlat) -> float:
    """WGS84 area of a lon/lat (Multi)Polygon: |shell| minus |holes|, each ring by
    pyproj.Geod.geometry_area_perimeter (Karney 2013); ring orientation does not matter."""
    total = 0.0
    for poly in shapely.get_parts(geom_lonlat):
        shell = abs(GEOD.geometry_area_perimeter(Polygon(poly.exterior))[0])
        holes = sum(abs(GEOD.geometry_area_perimeter(Polygon(ring))[0]) for ring in poly.interiors)
        total += shell - holes
    return total


def planar_area_in(geom, src_crs: pyproj.CRS, plane_wkt: str) -> float:
    """shapely area of `geom` (in `src_crs`) reprojected with pyproj to the plane given as WKT."""
    trans = pyproj.Transformer.from_crs(src_crs, pyproj.CRS.from_wkt(plane_wkt), always_xy=True)
    return float(shapely.area(reproject(geom, trans)))


def wilson(hits: int, n: int, confidence: float) -> tuple[float, float]:
    """Wilson (1927) score interval for a proportion, written out from the published formula
    (Newcombe 1998, method 3): [p + z²/2n ± z sqrt(p(1-p)/n + z²/4n²)] / (1 + z²/n)."""
    z = NormalDist().inv_cdf(0.5 + confidence / 2)
    p = hits / n
    centre = p + z * z / (2 * n)
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return (centre - half) / (1 + z * z / n), (centre + half) / (1 + z * z / n)


def rel(a: float, b: float) -> float:
    return abs(a - b) / abs(b)


def fingerprint(folder: Path) -> dict:
    """{file name: (sha256, mtime_ns, size)} of every file in a folder."""
    return {
        p.name: (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns, p.stat().st_size)
        for p in sorted(folder.iterdir())
        if p.is_file()
    }


def assert_one_line_error(status, out, err, *needles):
    """Bad input: exit status 2, nothing on stdout, one ``areamc: error:`` line, no traceback."""
    assert status == 2, (status, err)
    assert out == ""
    assert "Traceback" not in err
    lines = [line for line in err.strip().splitlines() if not line.startswith(("areamc: warning:", "areamc: note:"))]
    assert len(lines) == 1, err  # warnings (a notice naming the layer used, ...) may come first
    assert lines[0].startswith("areamc: error:"), lines[0]
    for needle in needles:
        assert str(needle) in lines[0], (needle, lines[0])
    # the library names its Python parameters; the command line shows the flags instead
    assert not re.search(r"(?<![-\w])(id_field|densify_m|input_crs|trace_every|time_s|seed:)", lines[0]), lines[0]


# --------------------------------------------------------------------------- files made in tmp


def _write_shapefile_without_prj(folder: Path) -> Path:
    path = folder / "nocrs.shp"
    schema = {"geometry": "Polygon", "properties": {"name": "str"}}
    with fiona.open(path, "w", driver="ESRI Shapefile", schema=schema) as dst:  # crs not given: no .prj
        dst.write({"geometry": mapping(box(10.2, 47.1, 10.3, 47.2)), "properties": {"name": "a"}})
        dst.write({"geometry": mapping(Polygon([(10.4, 47.1), (10.5, 47.1), (10.45, 47.2)])), "properties": {"name": "b"}})
    assert not path.with_suffix(".prj").exists()
    return path


@pytest.fixture(scope="module")
def bad_files(tmp_path_factory) -> dict:
    """Inputs that areamc must refuse, plus a private copy of the sample GeoPackage."""
    folder = tmp_path_factory.mktemp("bad_inputs")
    fake = folder / "fake.gpkg"
    fake.write_text("this is a text file, not a GeoPackage\n")
    words = folder / "words.csv"
    words.write_text("alpha,beta,gamma\ndelta,epsilon,zeta\neta,theta,iota\n")
    lines = folder / "lines.geojson"
    with fiona.open(lines, "w", driver="GeoJSON", crs="EPSG:4326",
                    schema={"geometry": "LineString", "properties": {"name": "str"}}) as dst:
        dst.write({"geometry": mapping(LineString([(10.2, 47.1), (10.4, 47.3)])), "properties": {"name": "l1"}})
        dst.write({"geometry": mapping(LineString([(10.5, 47.1), (10.6, 47.2)])), "properties": {"name": "l2"}})
    nocrs = _write_shapefile_without_prj(folder)
    gpkg = folder / "county_copy.gpkg"
    shutil.copyfile(GPKG, gpkg)
    return {"folder": folder, "fake": fake, "words": words, "lines": lines, "nocrs": nocrs, "gpkg": gpkg,
            "missing": folder / "missing.gpkg"}


# (case id, argv after "area" with {placeholders}, strings the one error line must contain)
BAD_AREA_CASES = [
    ("missing-file", ["{missing}"], ["{missing}"]),
    ("text-renamed-gpkg", ["{fake}"], ["{fake}"]),
    ("csv-of-words", ["{words}"], ["{words}"]),
    ("csv-of-words-with-crs", ["{words}", "--input-crs", "EPSG:4326"], ["{words}"]),
    ("unknown-layer", ["{gpkg}", "--layer", "no_such_layer"], ["{gpkg}", "no_such_layer"]),
    ("point-layer", ["{gpkg}", "--layer", "clinics"], ["{gpkg}", "clinics"]),
    ("linestring-geojson", ["{lines}"], ["{lines}"]),
    ("no-crs-shapefile", ["{nocrs}"], ["{nocrs}", "--input-crs"]),
    ("unknown-id-field", ["{gpkg}", "--id-field", "no_such_field"], ["{gpkg}", "--id-field 'no_such_field'"]),
    ("crs-web-mercator", ["{gpkg}", "--plane-crs", "EPSG:3857"], ["--plane-crs EPSG:3857: not equal-area"]),
    ("crs-utm", ["{gpkg}", "--plane-crs", "EPSG:32632"], ["--plane-crs", "EPSG:32632"]),
    ("crs-geographic", ["{gpkg}", "--plane-crs", "EPSG:4326"], ["--plane-crs", "EPSG:4326"]),
    ("crs-unknown-code", ["{gpkg}", "--plane-crs", "EPSG:999999"], ["--plane-crs", "EPSG:999999"]),
    ("crs-unknown-text", ["{gpkg}", "--plane-crs", "not a crs"], ["--plane-crs", "not a crs"]),
    ("input-crs-unknown", ["{nocrs}", "--input-crs", "bogus"], ["--input-crs", "bogus"]),
    ("points-zero", ["{gpkg}", "--points", "0"], ["--points"]),
    ("points-negative", ["{gpkg}", "--points", "-5"], ["--points"]),
    ("points-text", ["{gpkg}", "--points", "abc"], ["--points"]),
    ("points-fraction", ["{gpkg}", "-n", "1.5"], ["--points"]),
    ("points-nan", ["{gpkg}", "-n", "nan"], ["--points"]),
    ("tolerance-zero", ["{gpkg}", "--tolerance", "0"], ["--tolerance"]),
    ("tolerance-negative", ["{gpkg}", "--tolerance", "-1"], ["--tolerance"]),
    ("tolerance-text", ["{gpkg}", "--tolerance", "abc"], ["--tolerance"]),
    ("tolerance-zero-percent", ["{gpkg}", "--tolerance", "0%"], ["--tolerance"]),
    ("tolerance-negative-percent", ["{gpkg}", "--tolerance=-2%"], ["--tolerance"]),
    ("tolerance-100-percent", ["{gpkg}", "--tolerance", "100%"], ["--tolerance"]),
    ("tolerance-nan", ["{gpkg}", "--tolerance", "nan"], ["--tolerance"]),
    ("tolerance-inf", ["{gpkg}", "--tolerance", "inf"], ["--tolerance"]),
    ("confidence-0", ["{gpkg}", "--confidence", "0"], ["--confidence"]),
    ("confidence-1", ["{gpkg}", "--confidence", "1"], ["--confidence"]),
    ("confidence-1.5", ["{gpkg}", "--confidence", "1.5"], ["--confidence"]),
    ("confidence-negative", ["{gpkg}", "--confidence", "-0.1"], ["--confidence"]),
    ("confidence-text", ["{gpkg}", "--confidence", "abc"], ["--confidence"]),
    ("points-and-tolerance", ["{gpkg}", "--points", "1000", "--tolerance", "1%"], ["--points", "--tolerance"]),
    ("max-points-zero", ["{gpkg}", "--tolerance", "1%", "--max-points", "0"], ["--max-points"]),
    ("seed-negative", ["{gpkg}", "--seed", "-1"], ["--seed"]),
    ("chunk-zero", ["{gpkg}", "--chunk", "0"], ["--chunk"]),
    ("trace-every-zero", ["{gpkg}", "--trace-every", "0"], ["--trace-every"]),
    ("densify-zero", ["{gpkg}", "--densify", "0"], ["--densify"]),
    ("unknown-units", ["{gpkg}", "--units", "furlong2"], ["--units"]),
    ("unknown-format", ["{gpkg}", "--format", "xml"], ["--format"]),
]


@pytest.mark.parametrize("argv, needles", [pytest.param(a, n, id=i) for i, a, n in BAD_AREA_CASES])
def test_bad_input_is_one_line_exit_2_and_leaves_no_output(bad_files, tmp_path, capsys, argv, needles):
    fill = {k: str(v) for k, v in bad_files.items()}
    argv = [a.format(**fill) for a in argv]
    needles = [n.format(**fill) for n in needles]
    before = fingerprint(bad_files["folder"])
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    status, out, err = run_cli(capsys, map(str, ["area", *argv, "--output", out_dir / "result.json",
                                                 "--trace", out_dir / "trace.csv", "--seed", "1"]))
    assert_one_line_error(status, out, err, *needles)
    assert list(out_dir.iterdir()) == []  # no result, no trace, no temporary file
    assert fingerprint(bad_files["folder"]) == before  # inputs untouched: bytes, mtime, no new files


def test_output_in_missing_folder_is_refused(bad_files, tmp_path, capsys):
    target = tmp_path / "no_such_folder" / "result.json"
    status, out, err = run_cli(capsys, map(str, ["area", bad_files["gpkg"], "-n", "1000", "--output", target]))
    assert_one_line_error(status, out, err, "--output")
    assert not target.parent.exists()


def test_output_over_the_input_is_refused(tmp_path, capsys):
    copy = tmp_path / "copy.gpkg"
    shutil.copyfile(GPKG, copy)
    before = fingerprint(tmp_path)
    status, out, err = run_cli(capsys, map(str, ["area", copy, "-n", "1000", "--output", copy, "--format", "json", "--units", "m2"]))
    assert_one_line_error(status, out, err, "--output")
    assert fingerprint(tmp_path) == before


def test_verbose_shows_the_error_itself(bad_files, capsys):
    # --verbose is for debugging: the InputError propagates (a traceback in a real run).
    with warnings.catch_warnings(), pytest.raises(InputError):
        main(["area", str(bad_files["missing"]), "--verbose"])


def test_shapefile_without_prj_works_with_input_crs(tmp_path, capsys):
    path = _write_shapefile_without_prj(tmp_path)
    doc = run_json(capsys, map(str, ["area", path, "--input-crs", "EPSG:4326", "-n", "20000", "--seed", "4"]))
    assert doc["input"]["crs"] == "EPSG:4326"
    with fiona.open(path) as src:  # the geometry itself, read independently
        expected = {str(f.id): geod_area(shapely.segmentize(shape(f.geometry), 1000 / METRES_PER_DEGREE)) for f in src}
    got = {row["id"]: row["geodesic"] for row in doc["results"]}
    assert got.keys() == expected.keys()
    for fid, area in expected.items():
        assert rel(got[fid], area) < 1e-9  # pyproj.Geod (Karney 2013)


# --------------------------------------------------------------------------- invalid and empty geometries


def test_bow_tie_is_repaired_and_empty_geometries_are_skipped(tmp_path, capsys):
    bow = Polygon([(10.30, 47.10), (10.36, 47.16), (10.36, 47.10), (10.30, 47.16), (10.30, 47.10)])
    square = box(10.40, 47.10, 10.46, 47.15)
    assert not bow.is_valid  # a self-intersecting ring (shapely/GEOS validity)
    path = tmp_path / "messy.geojson"
    with fiona.open(path, "w", driver="GeoJSON", crs="EPSG:4326",
                    schema={"geometry": "Polygon", "properties": {"name": "str"}}) as dst:
        dst.write({"geometry": mapping(square), "properties": {"name": "square"}})
        dst.write({"geometry": mapping(bow), "properties": {"name": "bowtie"}})
        dst.write({"geometry": None, "properties": {"name": "nothing"}})
        dst.write({"geometry": {"type": "Polygon", "coordinates": []}, "properties": {"name": "hollow"}})
    status, out, err = run_cli(capsys, map(str, ["area", path, "--id-field", "name", "-n", "40000", "--seed", "12",
                                                 "--confidence", "0.999", "--format", "json", "--units", "m2"]))
    assert status == 0, err
    rows = {row["id"]: row for row in json.loads(out)["results"]}
    assert list(rows) == ["square", "bowtie"]  # the two empty features are skipped
    warning_lines = err.strip().splitlines()
    assert all(line.startswith(("areamc: warning:", "areamc: note:")) for line in warning_lines), err
    repaired = [line for line in warning_lines if "make_valid" in line]
    assert len(repaired) == 1 and "1 invalid" in repaired[0] and "bowtie" in repaired[0]
    skipped = [line for line in warning_lines if "empty" in line]
    assert len(skipped) == 1 and "2 empty" in skipped[0]
    assert "nothing" in skipped[0] and "hollow" in skipped[0]
    # The repaired geometry is shapely.make_valid's (GEOS): two triangles; its area by pyproj.Geod.
    fixed = shapely.make_valid(bow)
    assert fixed.geom_type == "MultiPolygon" and len(fixed.geoms) == 2
    expected = geod_area(shapely.segmentize(fixed, 1000 / METRES_PER_DEGREE))
    assert rel(rows["bowtie"]["geodesic"], expected) < 1e-9
    assert rel(rows["bowtie"]["exact_planar"], expected) < 1e-6
    assert rows["bowtie"]["ci_low"] <= rows["bowtie"]["exact_planar"] <= rows["bowtie"]["ci_high"]


# --------------------------------------------------------------------------- end to end on the sample data


def check_rows_against_file(doc, path, layer, points):
    """The checks every end-to-end JSON document must pass, against the file read independently."""
    crs, ref = reference_features(path, layer)
    rows = doc["results"]
    assert [row["id"] for row in rows] == list(ref)  # one row per feature, in file order
    plane_wkt = doc["plane"]["wkt"]
    confidence = doc["confidence"]
    for row in rows:
        assert set(REQUIRED_FIELDS) <= set(row)
        dense, lonlat = ref[row["id"]]
        assert row["points"] == points
        assert 0 < row["hits"] < points
        # 99.9% intervals: the 29 sample rows then miss the exact area all together with probability
        # about 1 - 0.999**29 ~ 3% (at 95% it would be ~77%), so the check holds for an honest
        # estimator without picking a lucky seed.
        assert row["ci_low"] <= row["exact_planar"] <= row["ci_high"], row
        # Hit-or-miss estimate B h / n and its binomial standard error B sqrt(p(1-p)/n): common practice.
        p = row["hits"] / row["points"]
        assert rel(row["estimate"], row["box_area"] * p) < 1e-12
        assert rel(row["std_error"], row["box_area"] * math.sqrt(p * (1 - p) / row["points"])) < 1e-12
        # Wilson score interval (Wilson 1927; Newcombe 1998, method 3).
        low, high = wilson(row["hits"], row["points"], confidence)
        assert rel(row["ci_low"], row["box_area"] * low) < 1e-9
        assert rel(row["ci_high"], row["box_area"] * high) < 1e-9
        # z: mid-p binomial score of the hits at p0 = exact planar area / box (Lancaster 1961)
        z = mid_p_z(row["hits"], row["points"], row["exact_planar"] / row["box_area"])
        assert row["z"] == pytest.approx(z, rel=1e-9, abs=1e-12)
        assert not row["flagged"]
        # Geodesic area: pyproj.Geod on the file's own geometry, densified here (Karney 2013).
        assert rel(row["geodesic"], geod_area(lonlat)) < 1e-9
        # Planar area: shapely in the plane the tool reports, reprojected here with pyproj.
        assert rel(row["exact_planar"], planar_area_in(dense, crs, plane_wkt)) < 1e-9
        # An equal-area plane and the ellipsoid agree once edges are short.
        assert rel(row["exact_planar"], row["geodesic"]) < 1e-6


@pytest.mark.parametrize("path, layer", POLYGON_FILES)
def test_end_to_end_json_on_sample_files(path, layer):
    args = ["area", path, *(["--layer", layer] if layer else []), "--format", "json", "--units", "m2",
            "--seed", "20240601", "--confidence", "0.999", "--points", "100000"]
    proc = run_script(*args)
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""  # valid sample data: no warnings, no progress bar off a terminal
    doc = json.loads(proc.stdout)
    assert doc["tool"] == "areamc"
    assert doc["version"] == areamc.__version__ == importlib.metadata.version("areamc")
    assert doc["command"] == " ".join(["areamc", *map(str, args)])
    assert doc["confidence"] == 0.999
    assert doc["seed"] == "20240601"  # a string: JSON readers that hold numbers as doubles keep it exactly
    assert doc["units"] == "m2"
    plane = pyproj.CRS.from_wkt(doc["plane"]["wkt"])
    assert plane.is_projected
    assert pyproj.CRS.from_user_input(doc["plane"]["crs"]).equals(plane)
    check_rows_against_file(doc, path, layer, 100000)


def test_python_dash_m_matches_in_process_run(capsys):
    args = ["area", UTM, "--format", "csv", "--units", "m2", "--seed", "2", "-n", "5000"]
    proc = run_script(*args, module=True)
    assert proc.returncode == 0, proc.stderr
    status, out, err = run_cli(capsys, map(str, args))
    assert status == 0, err
    assert proc.stdout == out
    rows = list(csv.DictReader(io.StringIO(proc.stdout)))
    with fiona.open(UTM) as src:
        assert [r["id"] for r in rows] == [str(f.id) for f in src]


def test_version_flag():
    proc = run_script("--version")
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == f"areamc {importlib.metadata.version('areamc')}"


def test_output_and_trace_files_end_to_end(tmp_path):
    out, trace = tmp_path / "result.json", tmp_path / "trace.csv"
    proc = run_script("area", GPKG, "--layer", "districts", "-n", "50000", "--seed", "3", "--quiet",
                   "--trace", trace, "--trace-every", "5000", "--output", out)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout == ""  # results went to the file
    doc = json.loads(out.read_text())  # format inferred from the .json extension
    final = {row["id"]: row for row in doc["results"]}
    with fiona.open(GPKG, layer="districts") as src:
        assert list(final) == [str(f.id) for f in src]
    rows = list(csv.DictReader(io.StringIO(trace.read_text())))
    assert list(rows[0]) == ["id", "feature_index", "points", "hits", "estimate", "std_error", "ci_low", "ci_high"]
    for fid, row in final.items():
        mine = [r for r in rows if r["id"] == fid]
        assert [int(r["points"]) for r in mine] == list(range(5000, 50001, 5000))
        hits = [int(r["hits"]) for r in mine]
        assert hits == sorted(hits)  # running counts never go down
        for r in mine:
            est = float(r["estimate"])
            assert float(r["ci_low"]) <= est <= float(r["ci_high"])
            assert rel(est, row["box_area"] * int(r["hits"]) / int(r["points"])) < 1e-12
        assert int(mine[-1]["hits"]) == row["hits"]
        assert float(mine[-1]["estimate"]) == row["estimate"]
        assert float(mine[-1]["ci_low"]) == row["ci_low"] and float(mine[-1]["ci_high"]) == row["ci_high"]
    # no temporary files; the trace has its CSVW metadata sidecar (docs/output.md, CSV)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["result.json", "trace.csv", "trace.csv-metadata.json"]


@pytest.mark.parametrize("stop", [["-n", "50000"], ["--tolerance", "2%", "--chunk", "4096"]], ids=["points", "tolerance"])
def test_trace_ends_on_the_final_estimate_when_k_does_not_divide(tmp_path, capsys, stop):
    # K = 7000 divides neither 50 000 nor a multiple of the 4096-point chunk below 28 672: the trace
    # still has a row every K points and must end with one more row holding the final state.
    trace = tmp_path / "trace.csv"
    doc = run_json(capsys, map(str, ["area", UTM, *stop, "--seed", "3", "--trace", trace, "--trace-every", "7000"]))
    rows = list(csv.DictReader(io.StringIO(trace.read_text())))
    for final in doc["results"]:
        mine = [r for r in rows if r["id"] == final["id"]]
        points = [int(r["points"]) for r in mine]
        assert points[:-1] == list(range(7000, final["points"], 7000))
        assert points[-1] == final["points"]
        assert int(mine[-1]["hits"]) == final["hits"]
        assert float(mine[-1]["estimate"]) == final["estimate"]


def test_all_files_untouched_by_a_successful_run(tmp_path, capsys):
    data = tmp_path / "data"
    data.mkdir()
    for src in SAMPLE.iterdir():
        if src.suffix in (".gpkg", ".shp", ".shx", ".dbf", ".prj", ".cpg", ".geojson"):
            shutil.copy2(src, data / src.name)
    before = fingerprint(data)
    for name, layer in [("vale_county.gpkg", "districts"), ("vale_districts.shp", None),
                        ("vale_districts.geojson", None), ("vale_reserves_utm32n.gpkg", None)]:
        status, _, err = run_cli(capsys, map(str, ["area", data / name, *(["--layer", layer] if layer else []),
                                                   "-n", "2000", "--seed", "1", "--output", tmp_path / "r.csv",
                                                   "--trace", tmp_path / "t.csv"]))
        assert status == 0, err
    assert fingerprint(data) == before


# --------------------------------------------------------------------------- formats, units, options (in-process)


def test_csv_has_the_json_columns_and_values(capsys):
    args = ["area", GPKG, "--layer", "districts", "-n", "20000", "--seed", "8"]
    doc = run_json(capsys, map(str, args))
    status, out, err = run_cli(capsys, map(str, [*args, "--format", "csv", "--units", "m2"]))
    assert status == 0, err
    reader = csv.DictReader(io.StringIO(out))
    rows = list(reader)
    assert reader.fieldnames == list(doc["results"][0])
    assert set(REQUIRED_FIELDS) <= set(reader.fieldnames)
    assert len(rows) == len(doc["results"])
    for got, want in zip(rows, doc["results"]):
        for key, value in want.items():
            if isinstance(value, bool):
                assert got[key] == str(value)
            elif isinstance(value, (int, float)):
                assert float(got[key]) == value, key
            else:
                assert got[key] == ("" if value is None else str(value))


def test_output_csv_extension_infers_csv(tmp_path, capsys):
    target = tmp_path / "areas.csv"
    status, out, err = run_cli(capsys, map(str, ["area", UTM, "-n", "3000", "--seed", "1", "--output", target]))
    assert status == 0, err
    assert out == ""
    rows = list(csv.DictReader(io.StringIO(target.read_text())))
    with fiona.open(UTM) as src:
        assert [r["id"] for r in rows] == [str(f.id) for f in src]
    assert set(REQUIRED_FIELDS) <= set(rows[0])


def test_table_is_the_default_format(capsys):
    doc = run_json(capsys, map(str, ["area", UTM, "-n", "3000", "--seed", "1"]))
    assert not any(row["flagged"] for row in doc["results"])
    status, out, err = run_cli(capsys, map(str, ["area", UTM, "-n", "3000", "--seed", "1"]))
    assert status == 0, err
    # the footer sentence shared by every command, here for planar areas
    assert out.rstrip().endswith("no row flagged: every estimate within 4 standard errors of the exact planar area")
    assert out.startswith(f"areamc area: {UTM}")
    heading = next(line for line in out.splitlines() if line.startswith("id "))
    for column in ("estimate", "ci_low", "ci_high", "exact_planar", "geodesic"):
        assert column in heading
    with fiona.open(UTM) as src:
        ids = [str(f.id) for f in src]
    first_cells = [line.split()[0] for line in out.splitlines() if line.split()]
    assert all(fid in first_cells for fid in ids)


@pytest.mark.parametrize("unit", ["ha", "km2", "acre", "mi2"])
def test_units_convert_every_area_column(capsys, unit):
    args = ["area", GPKG, "--layer", "districts", "-n", "20000", "--seed", "21"]
    base = run_json(capsys, map(str, [*args, "--units", "m2"]))
    other = run_json(capsys, map(str, [*args, "--units", unit]))
    assert other["units"] == unit
    for a, b in zip(base["results"], other["results"]):
        for key in AREA_FIELDS + ("box_area",):
            # NIST Handbook 44, Appendix C (see UNIT_M2); equal up to float rounding.
            assert b[key] == pytest.approx(a[key] / UNIT_M2[unit], rel=1e-12), key
        for key in ("id", "points", "hits", "z", "flagged"):
            assert b[key] == a[key], key


def test_same_seed_same_results_whatever_the_chunk(capsys):
    args = ["area", UTM, "-n", "30000", "--seed", "9"]
    results = [run_json(capsys, map(str, [*args, "--chunk", str(c)]))["results"] for c in (1000, 4097, 65536)]
    assert results[0] == results[1] == results[2]


def test_seed_is_recorded_and_replays(capsys):
    args = ["area", UTM, "-n", "5000"]
    fresh = run_json(capsys, map(str, args))
    replay = run_json(capsys, map(str, [*args, "--seed", str(fresh["seed"])]))
    assert replay["results"] == fresh["results"]
    other = run_json(capsys, map(str, [*args, "--seed", str(int(fresh["seed"]) + 1)]))
    assert [r["hits"] for r in other["results"]] != [r["hits"] for r in fresh["results"]]


def test_time_limit_stops_each_estimate_and_is_recorded(capsys):
    # 10 ms per estimate cannot draw 100 million points (minutes of work): every row stops on time,
    # at a chunk end, and its estimate is still an honest one (4 standard errors, common practice)
    doc = run_json(capsys, map(str, ["area", UTM, "-n", "100000000", "--chunk", "4096", "--time-limit", "0.01",
                                     "--seed", "2", "--sampler", "uniform"]))
    assert doc["stop"]["time_s"] == 0.01 and doc["sampler"] == "uniform"
    for row in doc["results"]:
        assert row["stop_reason"] == "time"
        assert 0 < row["points"] < 100_000_000 and row["points"] % 4096 == 0
        assert abs(row["estimate"] - row["exact_planar"]) <= 4 * row["std_error"]


def test_no_exact_skips_the_checks_but_not_the_estimates(capsys):
    args = ["area", UTM, "-n", "5000", "--seed", "5"]
    full = run_json(capsys, map(str, args))
    bare = run_json(capsys, map(str, [*args, "--no-exact"]))
    for a, b in zip(full["results"], bare["results"]):
        assert b["exact_planar"] is None and b["geodesic"] is None and b["z"] is None
        for key in ("id", "estimate", "std_error", "ci_low", "ci_high", "points", "hits"):
            assert b[key] == a[key]


def test_id_field_labels_rows(capsys):
    doc = run_json(capsys, map(str, ["area", GPKG, "--layer", "districts", "--id-field", "district_id", "-n", "2000",
                                     "--seed", "1"]))
    with fiona.open(GPKG, layer="districts") as src:
        assert [r["id"] for r in doc["results"]] == [f.properties["district_id"] for f in src]


def test_requested_equal_area_crs_is_used(capsys):
    doc = run_json(capsys, map(str, ["area", GEOJSON, "--plane-crs", "EPSG:6933", "-n", "5000", "--seed", "6"]))
    assert doc["plane"]["crs"] == "EPSG:6933"
    assert doc["plane"]["chosen_from_data"] is False
    crs, ref = reference_features(GEOJSON)
    for row in doc["results"]:
        dense, lonlat = ref[row["id"]]
        # shapely area in EPSG:6933 (Lambert cylindrical equal-area, EPSG registry) via pyproj.
        assert rel(row["exact_planar"], planar_area_in(dense, crs, pyproj.CRS("EPSG:6933").to_wkt())) < 1e-9
        assert rel(row["exact_planar"], geod_area(lonlat)) < 1e-6


def test_densify_step_is_used_for_the_geodesic_area(capsys):
    doc = run_json(capsys, map(str, ["area", SHP, "--densify", "500", "-n", "2000", "--seed", "1"]))
    assert doc["densify_m"] == 500
    _, ref = reference_features(SHP, step_m=500.0)
    for row in doc["results"]:
        assert rel(row["geodesic"], geod_area(ref[row["id"]][1])) < 1e-9  # pyproj.Geod, Karney 2013


def _wilson_half_width(hits: int, n: int, box_area: float, confidence: float) -> float:
    low, high = wilson(hits, n, confidence)
    return box_area * (high - low) / 2


def test_relative_tolerance_runs_a_pilot_then_a_final_batch(capsys):
    """--tolerance runs in two stages (Stein 1945, Ann. Math. Statist. 16:243-258, for the idea): a
    pilot to the first chunk whose Wilson half-width is within 2x the target, then a fresh batch
    of max(1000, ceil(pilot x (pilot half-width / target)²)) points (half-widths fall as 1/sqrt(n),
    common practice) from the stream after the pilot.  The pilot is replayed here with --points."""
    chunk = 2048
    args = ["area", UTM, "--chunk", chunk, "--seed", 13]
    doc = run_json(capsys, map(str, [*args, "--tolerance", "2%"]))
    assert doc["stop"]["tolerance_relative"] == pytest.approx(0.02)
    assert doc["stop"]["two_stage"] is True
    confidence = doc["confidence"]
    fixed = {}  # fixed-count replays of the same seed: the first N points of every feature's stream

    def replay(n):
        if n not in fixed:
            fixed[n] = {r["id"]: r for r in run_json(capsys, map(str, [*args, "-n", n]))["results"]}
        return fixed[n]

    for row in doc["results"]:
        assert row["stop_reason"] == "target"
        pilot_n = row["pilot_points"]
        assert pilot_n > 0 and pilot_n % chunk == 0  # the pilot stops at chunk ends
        # the final half-width is near the target: random, it may exceed it by a few percent
        assert (row["ci_high"] - row["ci_low"]) / 2 <= 1.3 * 0.02 * row["estimate"]
        pilot = replay(pilot_n)[row["id"]]
        pilot_hw = _wilson_half_width(pilot["hits"], pilot_n, row["box_area"], confidence)
        assert pilot_hw <= 2 * 0.02 * pilot["estimate"]
        if pilot_n > chunk:  # one chunk earlier the pilot had not met twice the target
            before = replay(pilot_n - chunk)[row["id"]]
            assert _wilson_half_width(before["hits"], pilot_n - chunk, row["box_area"], confidence) > \
                2 * 0.02 * before["estimate"]
        need = math.ceil(pilot_n * (pilot_hw / (0.02 * pilot["estimate"])) ** 2)
        assert abs(row["points"] - max(need, 1000)) <= 1
        # the final batch follows the pilot in the stream: their hits add up to a fixed run of both
        assert replay(pilot_n + row["points"])[row["id"]]["hits"] == pilot["hits"] + row["hits"]


def test_absolute_tolerance_is_in_the_output_units(capsys):
    doc = run_json(capsys, map(str, ["area", UTM, "--tolerance", "0.3", "--units", "km2", "--chunk", "4096",
                                     "--seed", "14"]))
    # the stop rule is recorded in m² of the plane: 0.3 km² = 300 000 m² (SI)
    assert doc["stop"]["tolerance_absolute"] == pytest.approx(0.3e6)
    assert doc["stop"]["tolerance_relative"] is None
    for row in doc["results"]:
        # km², like every area in this output; the two-stage half-width may exceed it by a few percent
        assert (row["ci_high"] - row["ci_low"]) / 2 <= 1.3 * 0.3
        assert row["stop_reason"] == "target" and row["pilot_points"] % 4096 == 0


def test_max_points_caps_an_unreachable_tolerance(capsys):
    # the pilot may use half the cap, the final batch what is left: 4096 + 4096 of 8192
    doc = run_json(capsys, map(str, ["area", UTM, "--tolerance", "0.001%", "--max-points", "8192", "--chunk", "4096",
                                     "--seed", "15"]))
    for row in doc["results"]:
        assert row["pilot_points"] == 4096 and row["points"] == 4096
        assert row["pilot_points"] + row["points"] == 8192
        assert row["stop_reason"] == "budget"
        assert (row["ci_high"] - row["ci_low"]) / 2 > 0.00001 * row["estimate"]
