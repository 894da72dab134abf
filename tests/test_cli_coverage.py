"""Command-line tests of ``areamc coverage``: options, claims, outputs, bad input, end to end.

Expected numbers come from outside areamc:

* exact shares from shapely 2 (GEOS) on the file's own geometries, read here with fiona,
  densified with ``shapely.segmentize`` at the tool's default 1 km step (1000/111 320 degrees
  on lon/lat layers, common practice; 1000 m on the UTM layer) and projected with pyproj onto
  the plane the tool reports in its JSON metadata; the set covered by at least k zones is the
  union of all k-fold intersections (common practice);
* geodesic circles for the clinics from ``pyproj.Geod(ellps="WGS84").fwd`` (Karney 2013,
  J. Geodesy 87:43-55), built here;
* claim verdicts are judged against those exact shares;
* the deviation ``z`` from the two-sided mid-p binomial tail (Lancaster 1961, JASA 56:223-234) of
  the covered count over the in-region points, with ``scipy.stats.binom``.

Estimates are held to their intervals at confidence 0.999 and to 4 standard errors (common
practice).  The sample data (sample_data/) is invented; its numbers are recomputed from the
files, never hard-coded.
"""

from __future__ import annotations

import contextlib
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
from shapely.geometry import Point, mapping, shape
from shapely.geometry.polygon import orient

from areamc.cli import main

from conftest import run_cli, run_json, to_plane, mid_p_z

ROOT = Path(__file__).resolve().parents[1]
GPKG = ROOT / "sample_data" / "vale_county.gpkg"
UTM = ROOT / "sample_data" / "vale_reserves_utm32n.gpkg"
GEOD = pyproj.Geod(ellps="WGS84")  # WGS84 (NIMA TR8350.2), built here on purpose
#: Districts over service zones, both from the sample GeoPackage.
BASE = ["coverage", str(GPKG), str(GPKG), "--regions-layer", "districts", "--regions-id-field", "district_id",
        "--zones-layer", "service_zones", "--zones-id-field", "zone_id"]
CLINICS = ["coverage", str(GPKG), str(GPKG), "--regions-layer", "districts", "--regions-id-field", "district_id",
           "--zones-layer", "clinics", "--zones-id-field", "clinic_id"]
#: Python parameter names of the library that must not reach a command-line user (flags are shown instead).
PARAMETER_NAMES = r"(?<![-\w])(id_field|radius_m|radius_field|vertices|input_crs)\b"
REQUIRED = ("id", "k", "share", "std_error", "ci_low", "ci_high", "exact_share")

_script = shutil.which("areamc", path=os.path.dirname(sys.executable)) or shutil.which("areamc")


# --- helpers -----------------------------------------------------------------------------------


def read(path, layer=None, id_field=None):
    """(ids, shapely geometries, CRS) of a layer, read with fiona."""
    with fiona.open(path, layer=layer) as src:
        feats = list(src)
        crs = pyproj.CRS.from_user_input(src.crs.to_wkt())
    ids = [str(f.properties[id_field]) if id_field else str(f.id) for f in feats]
    return ids, [shape(f.geometry) for f in feats], crs


def at_least_share(region, zones, k: int) -> float:
    near = [z for z in zones if shapely.intersects(z, region)]
    parts = [shapely.intersection_all(list(c)) for c in itertools.combinations(near, k)]
    if not parts:
        return 0.0
    return shapely.intersection(region, shapely.union_all(parts)).area / region.area


def exact_shares(doc, zones_path, zones_layer, zones_id, ks=(1,), zones=None):
    """{(region id, k): share} by shapely, regions = the sample districts."""
    did, dgeoms, dcrs = read(GPKG, "districts", "district_id")
    regions = dict(zip(did, to_plane(dgeoms, dcrs, doc)))
    if zones is None:
        _, zgeoms, zcrs = read(zones_path, zones_layer, zones_id)
        zones = to_plane(zgeoms, zcrs, doc)
    return {(rid, k): at_least_share(region, zones, k) for rid, region in regions.items() for k in ks}


def check_rows(rows, exact):
    assert {(r["id"], r["k"]) for r in rows} == set(exact)
    for r in rows:
        assert set(REQUIRED) <= set(r)
        ref = exact[(r["id"], r["k"])]
        assert r["exact_share"] == pytest.approx(ref, rel=1e-6, abs=1e-12), r
        assert r["ci_low"] <= ref <= r["ci_high"], r
        assert abs(r["share"] - ref) <= 4 * r["std_error"] + 1e-12, r
        # z: mid-p binomial score of the covered points among the in-region points (Lancaster 1961)
        assert r["z"] == pytest.approx(mid_p_z(r["hits"], r["region_points"], r["exact_share"]), rel=1e-9, abs=1e-12)
        assert not r["flagged"]


def clinic_circles(n=256):
    """The clinics' reach as geodesic circles (Geod.fwd, Karney 2013), built here."""
    with fiona.open(GPKG, layer="clinics") as src:
        clinics = [(shape(f.geometry), f.properties["reach_m"]) for f in src]
    az = np.linspace(0.0, 360.0, n, endpoint=False)
    out = []
    for p, reach in clinics:
        lons, lats, _ = GEOD.fwd(np.full(n, p.x), np.full(n, p.y), az, np.full(n, reach))
        out.append(orient(shapely.Polygon(np.column_stack([lons, lats])), 1.0))
    return out


@pytest.fixture(scope="module")
def two_k_doc():
    """--at-least 1 --at-least 2, in-process (module scope, so stdout is redirected by hand)."""
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        rc = main([*BASE, "--at-least", "1", "--at-least", "2", "-n", "40000", "--seed", "2",
                   "--confidence", "0.999", "--format", "json", "--units", "m2", "-q"])
    assert rc == 0
    return json.loads(buf.getvalue())


# --- shares ------------------------------------------------------------------------------------


def test_coverage__shares_at_least_one_and_two_against_shapely(two_k_doc):
    exact = exact_shares(two_k_doc, GPKG, "service_zones", "zone_id", ks=(1, 2))
    assert sum(v > 0 for (_, k), v in exact.items() if k == 2) >= 4  # zones overlap inside districts
    check_rows(two_k_doc["results"], exact)
    assert two_k_doc["k"] == [1, 2]
    for r in two_k_doc["results"]:  # no claim asked: no claim, no verdict
        assert r["claim"] is None and r["verdict"] is None
    assert two_k_doc["claim"] is None


def test_coverage__clinics_with_radius_field(capsys):
    doc = run_json(capsys, [*CLINICS, "--radius-field", "reach_m", "-n", "40000", "--seed", "3",
                            "--confidence", "0.999", "--at-least", "1", "--at-least", "2"])
    zones = to_plane(clinic_circles(), pyproj.CRS.from_epsg(4326), doc)
    exact = exact_shares(doc, None, None, None, ks=(1, 2), zones=zones)
    check_rows(doc["results"], exact)


def test_coverage__zones_in_another_crs_are_reprojected(capsys):
    """Reserves in UTM 32N metres (EPSG:32632) as zones over lon/lat districts."""
    doc = run_json(capsys, ["coverage", str(GPKG), str(UTM), "--regions-layer", "districts", "--regions-id-field", "district_id",
                            "--zones-id-field", "reserve_id", "-n", "40000", "--seed", "4", "--confidence", "0.999"])
    assert [i["crs"] for i in doc["inputs"]] == ["EPSG:4326", "EPSG:32632"]
    exact = exact_shares(doc, UTM, None, "reserve_id")
    assert sum(v > 0.01 for v in exact.values()) >= 4
    check_rows(doc["results"], exact)


# --- claims ------------------------------------------------------------------------------------


@pytest.mark.parametrize("claim", [0.3, 0.5])
def test_coverage__claim_rows_and_verdicts(capsys, claim):
    doc = run_json(capsys, [*BASE, "--claim", str(claim), "-n", "40000", "--seed", "5"])
    exact = exact_shares(doc, GPKG, "service_zones", "zone_id")
    assert doc["claim"] == claim and "Howard" in doc["claim_method"]
    for r in doc["results"]:
        assert r["claim"] == claim and r["verdict"] in ("meets", "falls-short", "undecided")
        # the verdict agrees with the row's own confidence sequence ...
        if r["verdict"] == "meets":
            assert r["ci_low"] >= claim - 1e-9
        elif r["verdict"] == "falls-short":
            assert r["ci_high"] <= claim + 1e-9
        else:
            assert r["ci_low"] - 1e-9 <= claim <= r["ci_high"] + 1e-9
        # ... and with shapely's exact share, decided wherever that is clearly away from the claim
        truth = exact[(r["id"], 1)]
        if truth >= claim + 0.05:
            assert r["verdict"] == "meets", (r, truth)
        elif truth <= claim - 0.05:
            assert r["verdict"] == "falls-short", (r, truth)
        assert r["ci_low"] <= truth <= r["ci_high"]


def test_coverage__fail_on_shortfall_exit_status(capsys, two_k_doc):
    exact = exact_shares(two_k_doc, GPKG, "service_zones", "zone_id")
    low, high = min(exact.values()), max(exact.values())
    assert 0.1 < low < high < 0.9  # guard on the claims below
    # every district is covered well above half its lowest share: nothing falls short -> 0
    rc, out, err = run_cli(capsys, [*BASE, "--claim", f"{low / 2:.4f}", "--fail-on-shortfall", "-n", "20000",
                                    "--seed", "6", "-q"])
    assert rc == 0, err
    assert "0 fall short" in out
    # a claim above every district's share: all fall short -> 1
    rc, out, err = run_cli(capsys, [*BASE, "--claim", f"{min(1.0, high + 0.05):.4f}", "--fail-on-shortfall", "-n",
                                    "20000", "--seed", "6", "-q"])
    assert rc == 1
    assert f"{len(exact)} fall short" in out
    # without --fail-on-shortfall the same shortfall exits 0
    rc, _, _ = run_cli(capsys, [*BASE, "--claim", f"{min(1.0, high + 0.05):.4f}", "-n", "20000", "--seed", "6", "-q"])
    assert rc == 0


# --- outputs -------------------------------------------------------------------------------------


@pytest.mark.parametrize("ext", ["gpkg", "geojson"])
def test_coverage__vector_output_holds_regions_with_results(capsys, tmp_path, two_k_doc, ext):
    out = tmp_path / f"coverage.{ext}"
    rc, stdout, err = run_cli(capsys, [*BASE, "--at-least", "1", "--at-least", "2", "-n", "40000", "--seed", "2",
                                       "--confidence", "0.999", "-q", "--units", "m2", "--output", str(out)])
    assert rc == 0, err
    assert stdout == ""
    did, dgeoms, _ = read(GPKG, "districts", "district_id")
    district = dict(zip(did, dgeoms))
    expected = {(r["id"], r["k"]): r for r in two_k_doc["results"]}
    with fiona.open(out) as src:
        assert pyproj.CRS.from_user_input(src.crs.to_wkt()).to_epsg() == 4326  # the input CRS
        feats = list(src)
    assert len(feats) == len(expected)
    for f in feats:
        key = (f.properties["id"], f.properties["k"])
        row = expected[key]
        for field in ("share", "std_error", "ci_low", "ci_high", "exact_share", "region_points"):
            assert f.properties[field] == pytest.approx(row[field], rel=1e-9), field
        # the region's own geometry, unchanged (GeoJSON keeps 7 decimals: 1 cm), as a MultiPolygon, the
        # layer's declared type (GDAL's RFC 7946 writer gives a one-part one as a Polygon)
        got, want = (shapely.MultiPolygon(shapely.get_parts(g)) for g in (shape(f.geometry), district[key[0]]))
        assert shapely.equals_exact(shapely.normalize(got), shapely.normalize(want), tolerance=1e-7)


def test_coverage__table_footer_says_no_row_is_flagged(capsys, two_k_doc):
    # the same run as the JSON fixture, whose rows are all within 4 standard errors (checked above)
    assert not any(r["flagged"] for r in two_k_doc["results"])
    rc, out, err = run_cli(capsys, [*BASE, "--at-least", "1", "--at-least", "2", "-n", "40000", "--seed", "2",
                                    "--confidence", "0.999", "-q"])
    assert rc == 0, err
    heading = next(line for line in out.splitlines() if line.startswith("id "))
    assert heading.split()[:3] == ["id", "k", "share"]
    assert out.rstrip().endswith("no row flagged: every estimate within 4 standard errors of the exact share")


def test_coverage__output_json_file_equals_stdout(capsys, tmp_path, two_k_doc):
    out = tmp_path / "coverage.json"
    rc, stdout, _ = run_cli(capsys, [*BASE, "--at-least", "1", "--at-least", "2", "-n", "40000", "--seed", "2",
                                     "--confidence", "0.999", "-q", "--units", "m2", "--output", str(out)])
    assert rc == 0 and stdout == ""
    assert json.loads(out.read_text())["results"] == two_k_doc["results"]


# --- bad input -----------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def bad_points(tmp_path_factory):
    folder = tmp_path_factory.mktemp("points")
    out = {}
    for name, values in {"missing": (4000.0, None), "negative": (4000.0, -100.0)}.items():
        path = folder / f"{name}.gpkg"
        schema = {"geometry": "Point", "properties": {"site": "str", "reach": "float"}}
        with fiona.open(path, "w", driver="GPKG", schema=schema, crs="EPSG:4326") as dst:
            for site, (lon, lat), reach in zip("ab", ((10.5, 47.2), (10.7, 47.3)), values):
                dst.write({"geometry": mapping(Point(lon, lat)), "properties": {"site": site, "reach": reach}})
        out[name] = str(path)
    return out


@pytest.mark.parametrize(
    "extra, needle",
    [
        pytest.param(["--claim", "0"], "--claim", id="claim-0"),
        pytest.param(["--claim", "1.5"], "--claim", id="claim-1.5"),
        pytest.param(["--claim", "-0.2"], "--claim", id="claim-negative"),
        pytest.param(["--claim", "most"], "--claim", id="claim-text"),
        pytest.param(["--at-least", "0"], "--at-least", id="k-0"),
        pytest.param(["--at-least", "-1"], "--at-least", id="k-negative"),
        pytest.param(["--at-least", "1.5"], "--at-least", id="k-fraction"),
        pytest.param(["--fail-on-shortfall"], "--claim", id="shortfall-without-claim"),
        pytest.param(["--tolerance", "2"], "must be below 1", id="share-tolerance-above-1"),
        pytest.param(["--tolerance", "0"], "must be positive", id="share-tolerance-0"),
        pytest.param(["--tolerance", "150%"], "below 100%", id="share-tolerance-150%"),
        pytest.param(["--tolerance", "abc"], "--tolerance", id="share-tolerance-text"),
        pytest.param(["--tolerance", "0.01", "--points", "1000"], "exclude each other", id="points-and-tolerance"),
    ],
)
def test_coverage__bad_options_one_line_exit_2(capsys, extra, needle):
    points = [] if "--tolerance" in extra else ["-n", "100"]  # --points and --tolerance exclude each other
    rc, out, err = run_cli(capsys, [*BASE, *points, *extra])
    assert rc == 2
    assert out == ""
    assert err.count("\n") == 1 and err.startswith("areamc") and "Traceback" not in err
    assert needle in err


@pytest.mark.parametrize(
    "extra, needle",
    [
        pytest.param([], "give --radius or --radius-field", id="points-without-radius"),
        pytest.param(["--radius", "5km", "--circle-vertices", "3"], "--circle-vertices: at least 8",
                     id="circle-vertices-3"),
        pytest.param(["--radius", "0km"], "--radius", id="radius-0km"),
        pytest.param(["--radius=-5km"], "--radius", id="radius=-5km"),
        pytest.param(["--radius", "-5km"], "--radius", id="radius -5km"),
        pytest.param(["--radius", "abc"], "--radius", id="radius-abc"),
        pytest.param(["--radius-field", "reach"], "reach_m", id="unknown-radius-field"),
        pytest.param(["--radius-field", "reach"], "--radius-field 'reach' is not a field", id="radius-field-named"),
    ],
)
def test_coverage__bad_zone_points_one_line_exit_2(capsys, extra, needle):
    rc, out, err = run_cli(capsys, [*CLINICS, "-n", "100", *extra])
    assert rc == 2 and out == ""
    assert err.count("\n") == 1 and "Traceback" not in err
    assert needle in err
    assert not re.search(PARAMETER_NAMES, err), err


@pytest.mark.parametrize(
    "argv, needle",
    [
        pytest.param(["coverage", str(GPKG), str(GPKG), "--regions-layer", "districts", "--zones-layer", "service_zones",
                      "--zones-id-field", "nope"], "--zones-id-field 'nope' is not a field", id="zones-id-field"),
        pytest.param(["coverage", str(GPKG), str(GPKG), "--regions-layer", "districts", "--regions-id-field", "nope",
                      "--zones-layer", "service_zones"], "--regions-id-field 'nope' is not a field", id="regions-id-field"),
        pytest.param(["coverage", str(GPKG), str(GPKG), "--regions-layer", "districts", "--zones-layer", "service_zones",
                      "--plane-crs", "EPSG:3857"], "--plane-crs EPSG:3857: not equal-area", id="crs-not-equal-area"),
    ],
)
def test_coverage__library_errors_name_the_flags(capsys, argv, needle):
    # the zones' id field is the library's id_field too, fed by --zones-id-field: the message must
    # name the flag the user typed, not the parameter or the regions' flag
    rc, out, err = run_cli(capsys, [*argv, "-n", "100"])
    assert rc == 2 and out == ""
    assert err.count("\n") == 1 and err.startswith("areamc: error: ")
    assert needle in err
    assert not re.search(PARAMETER_NAMES, err), err
    if "zones-id-field" in needle:
        assert " --regions-id-field" not in err


@pytest.mark.parametrize("case", ["missing", "negative"])
def test_coverage__bad_radius_values_in_a_field(capsys, bad_points, case):
    rc, out, err = run_cli(capsys, ["coverage", str(GPKG), bad_points[case], "--regions-layer", "districts",
                                    "--zones-id-field", "site", "--radius-field", "reach", "-n", "100"])
    assert rc == 2 and out == ""
    assert err.count("\n") == 1 and "Traceback" not in err
    assert "feature b" in err and "reach" in err


def test_coverage__zones_without_crs_name_the_zones_flag(capsys, tmp_path):
    path = tmp_path / "nocrs.shp"
    schema = {"geometry": "Polygon", "properties": {"n": "str"}}
    with fiona.open(path, "w", driver="ESRI Shapefile", schema=schema) as dst:
        dst.write({"geometry": mapping(shapely.box(10.4, 47.1, 10.6, 47.3)), "properties": {"n": "a"}})  # no .prj
    cases = (([], "state it with --zones-input-crs"), (["--zones-input-crs", "bogus"], "--zones-input-crs"))
    for extra, needle in cases:
        rc, out, err = run_cli(capsys, ["coverage", str(GPKG), str(path), "--regions-layer", "districts", "-n", "100", *extra])
        assert rc == 2 and out == "" and err.count("\n") == 1
        assert needle in err and " --regions-input-crs" not in err, err
        assert not re.search(PARAMETER_NAMES, err), err


# --- end to end ----------------------------------------------------------------------------------


@pytest.mark.skipif(_script is None, reason="areamc script not installed")
def test_coverage__installed_script_fail_on_shortfall(tmp_path):
    """The installed script: clinics' reach over the districts, a claim of 0.99 no district meets."""
    proc = subprocess.run([_script, *CLINICS, "--radius-field", "reach_m", "--claim", "0.99", "--fail-on-shortfall",
                           "-n", "20000", "--seed", "7", "-q", "--format", "json", "--units", "m2"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 1, proc.stderr
    doc = json.loads(proc.stdout)
    zones = to_plane(clinic_circles(), pyproj.CRS.from_epsg(4326), doc)
    exact = exact_shares(doc, None, None, None, zones=zones)
    assert max(exact.values()) < 0.9  # no district is nearly covered by clinics
    assert all(r["verdict"] == "falls-short" for r in doc["results"])
