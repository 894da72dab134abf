"""Command-line tests of ``areamc overlap``: options, outputs, bad input, end-to-end runs.

Expected numbers come from outside areamc:

* exact overlap areas from shapely 2 (GEOS) on the file's own geometries, read here with fiona,
  densified with ``shapely.segmentize`` at the tool's default 1 km step (1000/111 320 degrees;
  common practice: 111 320 m is a degree of arc on the equator, so the step is at most 1 km)
  and projected with pyproj onto the plane the tool reports in its JSON metadata;
* the area covered by at least k zones as the union of all k-fold intersections (common
  practice), by shapely;
* geodesic circles for facility points from ``pyproj.Geod(ellps="WGS84").fwd`` (Karney 2013,
  J. Geodesy 87:43-55), built here;
* geodesic areas from ``pyproj.Geod.geometry_area_perimeter`` (Karney 2013);
* the deviation ``z`` from the two-sided mid-p binomial tail (Lancaster 1961, JASA 56:223-234),
  with ``scipy.stats.binom``.

Estimates are held to their Wilson intervals (Wilson 1927) at confidence 0.999 and to
4 standard errors (common practice).  The sample data (sample_data/) is invented; its numbers are
recomputed from the files, never hard-coded.
"""

from __future__ import annotations

import csv
import io
import itertools
import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import fiona
import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import Point, box, mapping, shape
from shapely.geometry.polygon import orient

from areamc.cli import main

from conftest import STEP_DEG, assert_refused, run_cli, run_json, to_plane, mid_p_z

ROOT = Path(__file__).resolve().parents[1]
GPKG = ROOT / "sample_data" / "vale_county.gpkg"
ZONES = [str(GPKG), "--zones-layer", "service_zones", "--zones-id-field", "zone_id"]
GEOD = pyproj.Geod(ellps="WGS84")  # WGS84 (NIMA TR8350.2), built here on purpose
REQUIRED = ("id_a", "id_b", "estimate", "std_error", "ci_low", "ci_high", "share_a", "share_b", "exact_planar", "z")

_script = shutil.which("areamc", path=os.path.dirname(sys.executable)) or shutil.which("areamc")


# --- helpers -----------------------------------------------------------------------------------


def read(path, layer=None, id_field=None):
    """(ids, shapely geometries, CRS) of a layer, read with fiona."""
    with fiona.open(path, layer=layer) as src:
        feats = list(src)
        crs = pyproj.CRS.from_user_input(src.crs.to_wkt())
    ids = [str(f.properties[id_field]) if id_field else str(f.id) for f in feats]
    return ids, [shape(f.geometry) for f in feats], crs


def exact_pair_areas(ids_a, geoms_a, ids_b=None, geoms_b=None):
    out = {}
    if ids_b is None:
        for (i, a), (j, b) in itertools.combinations(zip(ids_a, geoms_a), 2):
            area = shapely.intersection(a, b).area
            if area > 0:
                out[(i, j)] = area
    else:
        for i, a in zip(ids_a, geoms_a):
            for j, b in zip(ids_b, geoms_b):
                area = shapely.intersection(a, b).area
                if area > 0:
                    out[(i, j)] = area
    return out


def check_rows(rows, exact, area_a, area_b):
    assert {(r["id_a"], r["id_b"]) for r in rows} == set(exact)
    for r in rows:
        assert set(REQUIRED) <= set(r)
        ref = exact[(r["id_a"], r["id_b"])]
        assert r["exact_planar"] == pytest.approx(ref, rel=1e-7)
        assert r["ci_low"] <= ref <= r["ci_high"], r
        assert abs(r["estimate"] - ref) <= 4 * r["std_error"], r
        assert r["share_a"] == pytest.approx(r["estimate"] / area_a[r["id_a"]], rel=1e-7)
        assert r["share_b"] == pytest.approx(r["estimate"] / area_b[r["id_b"]], rel=1e-7)
        # z: mid-p binomial score of the hits at p0 = shapely's overlap / the pair's box (Lancaster 1961)
        assert r["z"] == pytest.approx(mid_p_z(r["hits"], r["points"], ref / r["box_area"]), rel=1e-6, abs=1e-6)
        assert not r["flagged"]


def geodesic_circle_here(lon, lat, radius_m, n=256):
    """Polygon through n points at geodesic distance radius_m (Geod.fwd, Karney 2013)."""
    az = np.linspace(0.0, 360.0, n, endpoint=False)
    lons, lats, _ = GEOD.fwd(np.full(n, lon), np.full(n, lat), az, np.full(n, radius_m))
    return orient(shapely.Polygon(np.column_stack([lons, lats])), 1.0)


def geodesic_area(geom) -> float:
    return abs(sum(GEOD.geometry_area_perimeter(orient(p, 1.0))[0] for p in shapely.get_parts(geom)))


def write_points(path, records, field_type="float"):
    schema = {"geometry": "Point", "properties": {"site": "str", "reach": field_type}}
    with fiona.open(path, "w", driver="GPKG", schema=schema, crs="EPSG:4326", layer="sites") as dst:
        for site, (lon, lat), reach in records:
            dst.write({"geometry": mapping(Point(lon, lat)), "properties": {"site": site, "reach": reach}})
    return str(path)


# --- one layer, two layers ---------------------------------------------------------------------


@pytest.fixture(scope="module")
def service_zones():
    return read(GPKG, "service_zones", "zone_id")


@pytest.fixture(scope="module")
def one_layer_doc():
    """In-process run (fixture scope: capsys is per test, so redirect by hand)."""
    import contextlib

    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        rc = main(["overlap", *ZONES, "-n", "40000", "--seed", "3", "--confidence", "0.999", "--format", "json", "--units", "m2", "-q"])
    assert rc == 0
    return json.loads(buf.getvalue())


def test_overlap__one_layer_pairs_against_shapely(one_layer_doc, service_zones):
    ids, geoms, crs = service_zones
    planar = to_plane(geoms, crs, one_layer_doc)
    exact = exact_pair_areas(ids, planar)
    assert len(exact) >= 5  # the sample's zones overlap in many places
    area = dict(zip(ids, shapely.area(planar)))
    check_rows(one_layer_doc["results"], exact, area, area)
    assert one_layer_doc["candidate_pairs"] >= len(exact)
    assert one_layer_doc["confidence"] == 0.999 and one_layer_doc["seed"] == "3"


def test_overlap__one_layer_multiplicity_profile(one_layer_doc, service_zones):
    ids, geoms, crs = service_zones
    planar = to_plane(geoms, crs, one_layer_doc)
    profile = {m["k"]: m for m in one_layer_doc["multiplicity"]}
    assert one_layer_doc["exact_multiplicity"] == "computed"
    assert {1, 2, 3} <= set(profile)
    # the profile is sampled in the bounding box of all zones
    x0, y0, x1, y1 = shapely.total_bounds(planar)
    box_area, n = (x1 - x0) * (y1 - y0), 40000
    def at_least(k):  # union of all k-fold intersections (common practice)
        return shapely.union_all([shapely.intersection_all(list(c)) for c in itertools.combinations(planar, k)]).area

    for k in (1, 2, 3):
        least = at_least(k)
        m = profile[k]
        assert m["area_at_least_exact"] == pytest.approx(least, rel=1e-6)
        assert m["area_at_least_ci_low"] <= least <= m["area_at_least_ci_high"], m
        assert abs(m["area_at_least"] - least) <= 4 * m["area_at_least_std_error"]
        # exactly k = at least k minus at least k + 1 (common practice)
        more = at_least(k + 1)
        assert m["area_exactly_exact"] == pytest.approx(least - more, rel=1e-6)
        assert m["area_exactly_ci_low"] <= least - more <= m["area_exactly_ci_high"], m
        # z of the at-least-k area: mid-p binomial score (Lancaster 1961) of the hits in the box
        hits = round(m["area_at_least"] / box_area * n)
        assert m["z"] == pytest.approx(mid_p_z(hits, n, least / box_area), rel=1e-5, abs=1e-5)
        assert not m["flagged"]


def test_overlap__two_layers_cross_pairs(capsys, service_zones):
    doc = run_json(capsys, ["overlap", str(GPKG), str(GPKG), "--zones-layer", "service_zones", "--zones-id-field", "zone_id",
                            "--other-layer", "districts", "--other-id-field", "district_id", "-n", "20000",
                            "--seed", "4", "--confidence", "0.999"])
    zid, zgeoms, crs = service_zones
    did, dgeoms, dcrs = read(GPKG, "districts", "district_id")
    zp, dp = to_plane(zgeoms, crs, doc), to_plane(dgeoms, dcrs, doc)
    exact = exact_pair_areas(zid, zp, did, dp)
    check_rows(doc["results"], exact, dict(zip(zid, shapely.area(zp))), dict(zip(did, shapely.area(dp))))
    assert all(r["id_a"].startswith("Z") and r["id_b"].startswith("D") for r in doc["results"])
    assert doc["multiplicity"] == []  # no profile across two layers


def test_overlap__min_share_keeps_the_large_pairs(capsys, one_layer_doc):
    doc = run_json(capsys, ["overlap", *ZONES, "-n", "40000", "--seed", "3", "--confidence", "0.999",
                            "--min-share", "0.1"])
    expected = [r for r in one_layer_doc["results"] if max(r["share_a"], r["share_b"]) >= 0.1]
    assert 0 < len(expected) < len(one_layer_doc["results"])  # the threshold splits the pairs
    assert doc["results"] == expected


def test_overlap__no_overlapping_pairs_says_so(capsys, tmp_path):
    path = tmp_path / "apart.gpkg"
    schema = {"geometry": "Polygon", "properties": {"name": "str"}}
    with fiona.open(path, "w", driver="GPKG", schema=schema, crs="EPSG:4326") as dst:
        for name, geom in (("a", box(10.0, 45.0, 10.1, 45.1)), ("b", box(10.3, 45.0, 10.4, 45.1))):
            dst.write({"geometry": mapping(geom), "properties": {"name": name}})
    rc, out, err = run_cli(capsys, ["overlap", str(path), "-n", "1000", "--seed", "1", "-q"])
    assert rc == 0 and err == ""
    assert "no overlapping pairs" in out
    doc = run_json(capsys, ["overlap", str(path), "-n", "1000", "--seed", "1"])
    assert doc["results"] == []


def test_overlap__a_partition_has_no_overlapping_pairs(capsys):
    """The sample districts partition the county: shapely finds no overlap of positive area."""
    did, dgeoms, _ = read(GPKG, "districts", "district_id")
    assert exact_pair_areas(did, dgeoms) == {}
    rc, out, _ = run_cli(capsys, ["overlap", str(GPKG), "--zones-layer", "districts", "--zones-id-field", "district_id", "-n",
                                  "2000", "--seed", "1", "-q", "--no-profile"])
    assert rc == 0
    assert "no overlapping pairs" in out


# --- zones from points ---------------------------------------------------------------------------


def test_overlap__clinics_with_radius_field(capsys):
    doc = run_json(capsys, ["overlap", str(GPKG), "--zones-layer", "clinics", "--zones-id-field", "clinic_id",
                            "--radius-field", "reach_m", "-n", "40000", "--seed", "5", "--confidence", "0.999"])
    with fiona.open(GPKG, layer="clinics") as src:
        clinics = [(f.properties["clinic_id"], shape(f.geometry), f.properties["reach_m"]) for f in src]
    ids = [c[0] for c in clinics]
    circles = [geodesic_circle_here(p.x, p.y, r) for _, p, r in clinics]
    planar = to_plane(circles, pyproj.CRS.from_epsg(4326), doc)
    exact = exact_pair_areas(ids, planar)
    assert exact  # some clinics' reaches overlap
    area = dict(zip(ids, shapely.area(planar)))
    check_rows(doc["results"], exact, area, area)


def test_overlap__clinics_with_one_radius(capsys):
    doc = run_json(capsys, ["overlap", str(GPKG), "--zones-layer", "clinics", "--zones-id-field", "clinic_id",
                            "--radius", "9km", "-n", "20000", "--seed", "6", "--confidence", "0.999", "--no-profile"])
    with fiona.open(GPKG, layer="clinics") as src:
        clinics = [(f.properties["clinic_id"], shape(f.geometry)) for f in src]
    ids = [c[0] for c in clinics]
    planar = to_plane([geodesic_circle_here(p.x, p.y, 9_000.0) for _, p in clinics], pyproj.CRS.from_epsg(4326), doc)
    exact = exact_pair_areas(ids, planar)
    area = dict(zip(ids, shapely.area(planar)))
    check_rows(doc["results"], exact, area, area)


# --- outputs -------------------------------------------------------------------------------------


def test_overlap__gpkg_output_holds_intersections_in_the_input_crs(capsys, tmp_path, service_zones, one_layer_doc):
    out = tmp_path / "pairs.gpkg"
    rc, stdout, _ = run_cli(capsys, ["overlap", *ZONES, "-n", "40000", "--seed", "3", "--confidence", "0.999", "-q",
                                     "--units", "m2", "--output", str(out)])
    assert rc == 0
    assert stdout == ""  # results went to the file
    with fiona.open(out) as src:
        assert pyproj.CRS.from_user_input(src.crs.to_wkt()).to_epsg() == 4326
        feats = list(src)
    rows = {(r["id_a"], r["id_b"]): r for r in one_layer_doc["results"]}
    assert {(f.properties["id_a"], f.properties["id_b"]) for f in feats} == set(rows)
    ids, geoms, crs = service_zones
    by_id = dict(zip(ids, geoms))
    for f in feats:
        key = (f.properties["id_a"], f.properties["id_b"])
        for field in ("estimate", "std_error", "ci_low", "ci_high", "exact_planar", "z"):
            assert f.properties[field] == pytest.approx(rows[key][field], rel=1e-12)
        got = shape(f.geometry)
        # back in lon/lat: the geometry is the intersection of the two zones (shapely in lon/lat;
        # the tool cut it in the plane, so edges differ only by densification, well under 1e-4)
        expected = shapely.intersection(by_id[key[0]], by_id[key[1]])
        assert shapely.symmetric_difference(got, expected).area <= 1e-4 * expected.area
        # geodesic areas of both, with edges cut to 1 km so each follows its lon/lat line (Karney 2013);
        # they differ where the cut was made (plane chords vs lon/lat lines: ~1e-5 on a thin sliver)
        assert geodesic_area(got) == pytest.approx(geodesic_area(shapely.segmentize(expected, STEP_DEG)), rel=1e-4)
        # and in the plane its area is shapely's exact overlap
        (planar,) = to_plane([got], crs, one_layer_doc, step=1e9)  # no new vertices: keep its own
        assert planar.area == pytest.approx(rows[key]["exact_planar"], rel=1e-6)


def test_overlap__gpkg_output_holds_the_shares(tmp_path, one_layer_doc):
    out = tmp_path / "pairs.gpkg"
    rc = main(["overlap", *ZONES, "-n", "40000", "--seed", "3", "--confidence", "0.999", "-q", "--output", str(out)])
    assert rc == 0
    rows = {(r["id_a"], r["id_b"]): r for r in one_layer_doc["results"]}
    with fiona.open(out) as src:
        assert src.schema["properties"]["share_a"].startswith("float")
        for f in src:
            row = rows[(f.properties["id_a"], f.properties["id_b"])]
            assert f.properties["share_a"] == pytest.approx(row["share_a"], rel=1e-12)
            assert f.properties["share_b"] == pytest.approx(row["share_b"], rel=1e-12)


def test_overlap__csv_and_units(capsys, one_layer_doc):
    rc, out, _ = run_cli(capsys, ["overlap", *ZONES, "-n", "40000", "--seed", "3", "--confidence", "0.999", "-q",
                                  "--format", "csv", "--units", "km2", "--no-profile"])
    assert rc == 0
    rows = {(r["id_a"], r["id_b"]): r for r in csv.DictReader(io.StringIO(out))}
    assert len(rows) == len(one_layer_doc["results"])
    for r in one_layer_doc["results"]:
        got = rows[(r["id_a"], r["id_b"])]
        assert float(got["estimate"]) == pytest.approx(r["estimate"] / 1e6, rel=1e-9)  # 1 km² = 1e6 m² (SI)
        assert float(got["share_a"]) == pytest.approx(r["share_a"], rel=1e-9)  # shares carry no unit


# --- bad input -----------------------------------------------------------------------------------

CLINICS = [str(GPKG), "--zones-layer", "clinics", "--zones-id-field", "clinic_id"]


@pytest.fixture(scope="module")
def bad_points(tmp_path_factory):
    folder = tmp_path_factory.mktemp("points")
    missing = write_points(folder / "missing.gpkg", [("a", (10.5, 47.2), 3000.0), ("b", (10.6, 47.2), None)])
    negative = write_points(folder / "negative.gpkg", [("a", (10.5, 47.2), 3000.0), ("b", (10.6, 47.2), -50.0)])
    zero = write_points(folder / "zero.gpkg", [("a", (10.5, 47.2), 0.0), ("b", (10.6, 47.2), 2000.0)])
    return {"missing": missing, "negative": negative, "zero": zero}


@pytest.mark.parametrize(
    "argv, needle",
    [
        pytest.param(CLINICS, "give --radius or --radius-field", id="points-without-radius"),
        pytest.param([*CLINICS, "--radius", "5km", "--circle-vertices", "3"], "--circle-vertices: at least 8",
                     id="circle-vertices-3"),
        pytest.param([*ZONES[:3], "--zones-id-field", "nope"], "--zones-id-field 'nope' is not a field", id="unknown-id-field"),
        pytest.param([*ZONES, str(GPKG), "--other-layer", "districts", "--other-id-field", "nope"],
                     "--other-id-field 'nope' is not a field", id="unknown-other-id-field"),
        pytest.param([*ZONES, str(GPKG), "--other-layer", "clinics"], "give --radius or --radius-field",
                     id="other-points-without-radius"),
        pytest.param([*CLINICS, "--radius", "0km"], "--radius", id="radius-0km"),
        pytest.param([*CLINICS, "--radius=-5km"], "--radius", id="radius=-5km"),
        pytest.param([*CLINICS, "--radius", "-5km"], "--radius", id="radius -5km"),
        pytest.param([*CLINICS, "--radius", "abc"], "--radius", id="radius-abc"),
        pytest.param([*CLINICS, "--radius", "5 parsecs"], "--radius", id="radius-unit"),
        pytest.param([*CLINICS, "--radius-field", "reach"], "reach_m", id="unknown-radius-field"),
        pytest.param([*CLINICS, "--radius", "5km", "--radius-field", "reach_m"], "one of them", id="both-radii"),
        pytest.param([*ZONES, "--min-share", "1.5"], "--min-share", id="min-share-1.5"),
        pytest.param([*ZONES, "--min-share", "-0.1"], "--min-share", id="min-share-negative"),
        pytest.param([str(ROOT / "no_such.gpkg")], "no_such.gpkg", id="missing-file"),
    ],
)
def test_overlap__bad_input_one_line_exit_2(capsys, argv, needle):
    rc, out, err = run_cli(capsys, ["overlap", *argv, "-n", "100"])
    assert rc == 2
    assert out == ""
    assert err.count("\n") == 1 and err.startswith("areamc")
    assert "Traceback" not in err
    assert needle in err
    # the library names Python parameters; the command line must show its flags instead
    assert not re.search(r"(?<![-\w])(id_field|radius_m|radius_field|vertices|min_share|input_crs)\b", err), err


def test_overlap__table_footer_says_no_row_is_flagged(capsys, one_layer_doc):
    # the same run as the JSON fixture, whose rows are all within 4 standard errors (checked above)
    assert not any(r["flagged"] for r in one_layer_doc["results"])
    rc, out, err = run_cli(capsys, ["overlap", *ZONES, "-n", "40000", "--seed", "3", "--confidence", "0.999", "-q"])
    assert rc == 0, err
    assert "no row flagged: every estimate within 4 standard errors of the exact intersection area" in out
    assert "multiplicity profile" in out


@pytest.mark.parametrize("case", ["missing", "negative", "zero"])
def test_overlap__bad_radius_values_in_a_field(capsys, bad_points, case):
    rc, out, err = run_cli(capsys, ["overlap", bad_points[case], "--zones-id-field", "site", "--radius-field", "reach",
                                    "-n", "100"])
    assert rc == 2 and out == ""
    assert err.count("\n") == 1 and "Traceback" not in err
    assert "reach" in err and ("feature a" in err or "feature b" in err)


def test_overlap__other_layer_without_crs_names_the_other_flag(capsys, tmp_path):
    path = tmp_path / "nocrs.shp"
    schema = {"geometry": "Polygon", "properties": {"n": "str"}}
    with fiona.open(path, "w", driver="ESRI Shapefile", schema=schema) as dst:
        dst.write({"geometry": mapping(box(10.4, 47.1, 10.6, 47.3)), "properties": {"n": "a"}})  # no .prj
    cases = (([], "state it with --other-input-crs"), (["--other-input-crs", "bogus"], "--other-input-crs"))
    for extra, needle in cases:
        rc, out, err = run_cli(capsys, ["overlap", *ZONES, str(path), "-n", "100", *extra])
        assert rc == 2 and out == "" and err.count("\n") == 1
        assert needle in err and " --zones-input-crs" not in err, err


# --- end to end ----------------------------------------------------------------------------------


@pytest.mark.skipif(_script is None, reason="areamc script not installed")
def test_overlap__installed_script_end_to_end(tmp_path, service_zones):
    out = tmp_path / "pairs.json"
    proc = subprocess.run([_script, "overlap", *ZONES, "-n", "20000", "--seed", "9", "--units", "m2", "--confidence", "0.999",
                           "--output", str(out), "-q"], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    doc = json.loads(out.read_text())
    ids, geoms, crs = service_zones
    planar = to_plane(geoms, crs, doc)
    area = dict(zip(ids, shapely.area(planar)))
    check_rows(doc["results"], exact_pair_areas(ids, planar), area, area)


def test_overlap__second_file_may_follow_options(capsys):
    # the same cross pairs whether OTHER comes before or after the options (same seed, same rows)
    first = run_json(capsys, ["overlap", str(GPKG), str(GPKG), "--zones-layer", "service_zones", "--other-layer",
                              "districts", "-n", "2000", "--seed", "4"])
    later = run_json(capsys, ["overlap", str(GPKG), "--zones-layer", "service_zones", str(GPKG), "--other-layer",
                              "districts", "-n", "2000", "--seed", "4"])
    assert first["results"] and later["results"] == first["results"]


# --- --pair-sampling ------------------------------------------------------------------------------------------


def layer_box_area(planar) -> float:
    """Area (m²) of the bounding box of all zones, by shapely: the shared sample's box."""
    x0, y0, x1, y1 = shapely.total_bounds(planar)
    return (x1 - x0) * (y1 - y0)


def test_overlap__shared_sample_pairs_and_profile_against_shapely(capsys, service_zones):
    n = 200_000
    doc = run_json(capsys, ["overlap", *ZONES, "-n", str(n), "--seed", "3", "--confidence", "0.999",
                            "--pair-sampling", "shared"])
    assert doc["pair_sampling"] == "shared"
    ids, geoms, crs = service_zones
    planar = to_plane(geoms, crs, doc)
    area = dict(zip(ids, shapely.area(planar)))
    check_rows(doc["results"], exact_pair_areas(ids, planar), area, area)
    box_area = layer_box_area(planar)
    for r in doc["results"]:  # one sample of n points in the layer's box for every pair
        assert r["points"] == n and r["box_area"] == pytest.approx(box_area, rel=1e-6)
    profile = {m["k"]: m for m in doc["multiplicity"]}
    for k in (1, 2):  # at least k zones: the union of all k-fold intersections (common practice)
        least = shapely.union_all([shapely.intersection_all(list(c)) for c in itertools.combinations(planar, k)]).area
        assert profile[k]["area_at_least_ci_low"] <= least <= profile[k]["area_at_least_ci_high"]


def test_overlap__shared_sample_is_named_in_the_header(capsys):
    rc, out, err = run_cli(capsys, ["overlap", *ZONES, "-n", "20000", "--seed", "3", "--pair-sampling", "shared",
                                    "-q", "--no-profile"])
    assert rc == 0, err
    assert "every pair counted in one shared sample of 20,000 points over the layer's box" in out
    rc, out, _ = run_cli(capsys, ["overlap", *ZONES, "-n", "2000", "--seed", "3", "-q", "--no-profile"])
    assert rc == 0 and "shared sample" not in out  # per pair by default for a fixed --points


def test_overlap__shared_sample_identical_for_any_workers_and_chunk(capsys):
    argv = ["overlap", *ZONES, "-n", "150000", "--seed", "8", "--pair-sampling", "shared"]
    one = run_json(capsys, [*argv, "--workers", "1"])
    two = run_json(capsys, [*argv, "--workers", "2", "--chunk", "5000"])
    assert one["results"] and two["results"] == one["results"]
    assert two["multiplicity"] == one["multiplicity"]


@pytest.mark.parametrize("extra, expected", [
    (["-n", "2000"], "per-pair"),
    (["--tolerance", "1", "--units", "km2"], "shared"),  # absolute: 1 km²
    (["--tolerance", "5%"], "per-pair"),
    (["--tolerance", "5%", "--pair-sampling", "shared", "--max-points", "300000"], "shared"),
])
def test_overlap__auto_pair_sampling_follows_the_stop_rule(capsys, extra, expected):
    doc = run_json(capsys, ["overlap", *ZONES, "--seed", "2", "--no-profile", "--no-exact", *extra])
    assert doc["pair_sampling"] == expected
    assert doc["results"]


def test_overlap__unknown_pair_sampling_is_refused(capsys, tmp_path):
    zones = shutil.copy(GPKG, tmp_path / "zones.gpkg")
    assert_refused(capsys, ["overlap", zones, "--zones-layer", "service_zones", "--pair-sampling", "each", "-n", "100",
                            "--output", tmp_path / "pairs.json"], r"--pair-sampling", tmp_path)
