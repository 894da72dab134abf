"""Command-line tests of ``areamc coverage REGIONS ZONES --density SOURCE``: covered population.

Expected numbers come from outside areamc:

* the covered population share by areal weighting (Goodchild & Lam 1980, Geo-Processing
  1:297-312 [memory]) with shapely 2 (GEOS), U the union of the zones:
  share = Σ c_i |b_i ∩ R ∩ U| / |b_i|  /  Σ c_i |b_i ∩ R| / |b_i|;
  geometries are read here with fiona, densified with ``shapely.segmentize`` at the tool's
  default 1 km step (1000/111 320 degrees on lon/lat layers, common practice) and projected
  with pyproj onto the plane the tool reports in its JSON metadata;
* for a raster density the same formula over its cells, read here with rasterio and outlined
  with densified edges;
* a small scene whose shares are worked out by hand (constructed here).

Intervals are held to the exact values at confidence 0.999 (common practice).  Claim verdicts
use the beta-binomial confidence sequence (Howard, Ramdas, McAuliffe & Sekhon 2021,
Ann. Statist. 49:1055-1080) and are judged against the exact shares.  The sample data
(sample_data/) is invented; its numbers are recomputed here.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from collections import defaultdict
from pathlib import Path

import fiona
import numpy as np
import pyproj
import pytest
import rasterio
import shapely
from shapely.geometry import box, mapping, shape

from areamc.cli import main

from conftest import overlay_total, run_cli, run_json, to_plane

ROOT = Path(__file__).resolve().parents[1]
GPKG = ROOT / "sample_data" / "vale_county.gpkg"
TIF = ROOT / "sample_data" / "vale_population.tif"
PLANE = "+proj=laea +lat_0=47 +lon_0=10 +datum=WGS84 +units=m +no_defs"
BASE = ["coverage", str(GPKG), str(GPKG), "--regions-layer", "districts", "--regions-id-field", "district_id",
        "--zones-layer", "service_zones", "--zones-id-field", "zone_id"]
BLOCKS = ["--density", str(GPKG), "--density-layer", "blocks", "--count-field", "population"]
POPULATION_FIELDS = ("population_total", "population_covered", "population_share", "population_share_ci_low",
                     "population_share_ci_high")
CONF = "0.999"


# --- helpers -----------------------------------------------------------------------------------


def read(path, layer=None, id_field=None):
    with fiona.open(path, layer=layer) as src:
        feats = list(src)
        crs = pyproj.CRS.from_user_input(src.crs.to_wkt())
    ids = [str(f.properties[id_field]) if id_field else str(f.id) for f in feats]
    return ids, [shape(f.geometry) for f in feats], [dict(f.properties) for f in feats], crs


def sample_truth(doc, units, counts):
    """{district: (population, covered population share)} over the sample districts and zones."""
    dids, dgeoms, _, dcrs = read(GPKG, "districts", "district_id")
    _, zgeoms, _, zcrs = read(GPKG, "service_zones", "zone_id")
    union = shapely.union_all(to_plane(zgeoms, zcrs, doc))
    out = {}
    for rid, region in zip(dids, to_plane(dgeoms, dcrs, doc)):
        total = overlay_total(units, counts, region)
        out[rid] = (total, overlay_total(units, counts, shapely.intersection(region, union)) / total)
    return out


def sample_blocks(doc):
    _, bgeoms, bprops, bcrs = read(GPKG, "blocks")
    return np.array(to_plane(bgeoms, bcrs, doc), dtype=object), [p["population"] for p in bprops]


def raster_cells(doc, pieces=8):
    """(counts with nodata as 0, cell outlines densified along their edges, projected to the plane)."""
    with rasterio.open(TIF) as src:
        data = src.read(1, masked=True).astype(float)
        t, rows, cols = src.transform, src.height, src.width
        crs = pyproj.CRS.from_wkt(src.crs.to_wkt())
    trans = pyproj.Transformer.from_crs(crs, pyproj.CRS.from_wkt(doc["plane"]["wkt"]), always_xy=True)
    s = np.arange(pieces) / pieces
    r, c = (a.ravel() for a in np.meshgrid(np.arange(rows), np.arange(cols), indexing="ij"))
    ring_c = np.concatenate([s, np.ones(pieces), 1 - s, np.zeros(pieces)])
    ring_r = np.concatenate([np.ones(pieces), 1 - s, np.zeros(pieces), s])
    cc, rr = c[:, None] + ring_c, r[:, None] + ring_r
    px, py = trans.transform((t.c + t.a * cc + t.b * rr).ravel(), (t.f + t.d * cc + t.e * rr).ravel())
    ring = np.stack([np.asarray(px).reshape(cc.shape), np.asarray(py).reshape(cc.shape)], axis=-1)
    return np.ma.filled(data, 0.0).ravel(), shapely.polygons(ring)


def write_layer(path, geoms, props, schema_props, layer, crs=PLANE):
    schema = {"geometry": "Polygon", "properties": schema_props}
    with fiona.open(path, "w", driver="GPKG", schema=schema, crs_wkt=pyproj.CRS(crs).to_wkt(), layer=layer) as dst:
        for g, p in zip(geoms, props):
            dst.write({"geometry": mapping(g), "properties": p})
    return str(path)


# --- sample data -------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def blocks_doc():
    """Districts by service zones, population from the blocks (in-process, stdout captured by hand)."""
    import contextlib
    import io

    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        rc = main([*BASE, *BLOCKS, "-n", "40000", "--seed", "21", "--confidence", CONF, "--format", "json", "--units", "m2", "-q"])
    assert rc == 0
    doc = json.loads(buf.getvalue())
    units, counts = sample_blocks(doc)
    return doc, sample_truth(doc, units, counts)


def test_blocks__population_rows_hold_the_areal_weighting_shares(blocks_doc):
    doc, truth = blocks_doc
    rows = doc["results"]
    assert {r["id"] for r in rows} == set(truth)
    # every block lies in one district: the population is also the sum of the attribute
    _, _, bprops, _ = read(GPKG, "blocks")
    sums = defaultdict(float)
    for p in bprops:
        sums[p["district_id"]] += p["population"]
    for r in rows:
        assert set(POPULATION_FIELDS) <= set(r), r
        population, share = truth[r["id"]]
        assert population == pytest.approx(sums[r["id"]], rel=1e-6)
        assert r["population_total"] == pytest.approx(population, rel=1e-6)
        assert r["population_exact_share"] == pytest.approx(share, rel=1e-6)
        assert r["population_share_ci_low"] <= share <= r["population_share_ci_high"], (r, share)
        assert abs(r["population_share"] - share) <= 4 * r["population_share_std_error"]
        assert r["population_covered"] == pytest.approx(r["population_share"] * r["population_total"], rel=1e-12)
        assert r["population_method"] == "stratified-importance"  # blocks inside a district and its zones counted whole
        assert r["population_verdict"] is None  # no claim
    assert doc["density"]["kind"] == "blocks"
    # population shares are not area shares on this data (the towns are where the zones are)
    assert max(abs(truth[r["id"]][1] - r["exact_share"]) for r in rows) > 0.1


def test_blocks__plain_sampling_also_holds_the_exact_share(capsys, blocks_doc):
    _, truth = blocks_doc
    doc = run_json(capsys, [*BASE, *BLOCKS, "--no-importance", "-n", "40000", "--seed", "22", "--confidence", CONF])
    for r in doc["results"]:
        share = truth[r["id"]][1]
        assert r["population_method"] == "uniform"
        assert r["population_share_ci_low"] <= share <= r["population_share_ci_high"], (r, share)
    assert doc["density"]["importance"] is False


def test_raster__population_share_by_cell_fractions(capsys):
    rc, out, err = run_cli(capsys, [*BASE, "--density", str(TIF), "-n", "40000", "--seed", "23", "--confidence",
                                    CONF, "--format", "json", "--units", "m2", "-q"])
    assert rc == 0, err
    assert "10 nodata cell(s)" in err
    doc = json.loads(out)
    counts, cells = raster_cells(doc)
    truth = sample_truth(doc, cells, counts)
    for r in doc["results"]:
        population, share = truth[r["id"]]
        assert set(POPULATION_FIELDS) <= set(r), r
        assert r["population_total"] == pytest.approx(population, rel=1e-4)  # 4-corner vs densified cells
        assert r["population_share_ci_low"] <= share <= r["population_share_ci_high"], (r, share)
        assert r["population_method"] == "importance"


@pytest.mark.parametrize("claim", [0.5, 0.3])
def test_blocks__population_claim_verdicts_follow_the_exact_shares(capsys, blocks_doc, claim):
    _, truth = blocks_doc
    rc, out, err = run_cli(capsys, [*BASE, *BLOCKS, "--claim", str(claim), "--fail-on-shortfall", "-n", "40000",
                                    "--seed", "24", "--format", "json", "--units", "m2", "-q"])
    rows = json.loads(out)["results"]
    verdicts = {}
    for r in rows:
        share = truth[r["id"]][1]
        v = r["population_verdict"]
        assert v in ("meets", "falls-short", "undecided")
        if share >= claim:
            assert v != "falls-short", (r["id"], share)
        else:
            assert v != "meets", (r["id"], share)
        verdicts[r["id"]] = v
    assert "meets" in verdicts.values() and "falls-short" in verdicts.values()
    # some region falls short (here by area and population): exit status 1
    assert rc == 1, err


def test_blocks__clinic_reach_as_zones(capsys):
    # zones from points: geodesic circles of each clinic's reach_m, built here with
    # pyproj.Geod.fwd (Karney 2013, J. Geodesy 87:43-55) as 256-gons
    argv = ["coverage", str(GPKG), str(GPKG), "--regions-layer", "districts", "--regions-id-field", "district_id",
            "--zones-layer", "clinics", "--zones-id-field", "clinic_id", "--radius-field", "reach_m",
            "--circle-vertices", "256", *BLOCKS, "-n", "40000", "--seed", "26", "--confidence", CONF]
    doc = run_json(capsys, argv)
    geod = pyproj.Geod(ellps="WGS84")
    az = np.linspace(0.0, 360.0, 256, endpoint=False)
    circles = []
    with fiona.open(GPKG, layer="clinics") as src:
        for f in src:
            p = shape(f.geometry)
            lons, lats, _ = geod.fwd(np.full(256, p.x), np.full(256, p.y), az, np.full(256, f.properties["reach_m"]))
            circles.append(shapely.Polygon(np.column_stack([lons, lats])))
    union = shapely.union_all(to_plane(circles, pyproj.CRS("EPSG:4326"), doc))
    units, counts = sample_blocks(doc)
    dids, dgeoms, _, dcrs = read(GPKG, "districts", "district_id")
    for rid, region in zip(dids, to_plane(dgeoms, dcrs, doc)):
        share = overlay_total(units, counts, shapely.intersection(region, union)) / overlay_total(units, counts, region)
        (row,) = [r for r in doc["results"] if r["id"] == rid]
        assert row["population_exact_share"] == pytest.approx(share, rel=1e-9)
        assert row["population_share_ci_low"] <= share <= row["population_share_ci_high"]


# --- a scene worked out by hand ----------------------------------------------------------------
# Plane km: region R = [0,10]x[0,10]; one zone Z = [0,6]x[0,10], so the covered area share is 0.6.
# Blocks: W = [0,6]x[0,10] with 100 people and E = [6,10]x[0,10] with 900: the covered population
# share is 100 / 1000 = 0.1 (constructed here).  A claim of 0.5 is met by area, missed by population.


@pytest.fixture(scope="module")
def scene(tmp_path_factory):
    tp = tmp_path_factory.mktemp("scene")
    km = 1000.0
    regions = write_layer(tp / "regions.gpkg", [box(0, 0, 10 * km, 10 * km)], [{"rid": "R"}], {"rid": "str"}, "regions")
    zones = write_layer(tp / "zones.gpkg", [box(0, 0, 6 * km, 10 * km)], [{"zid": "Z"}], {"zid": "str"}, "zones")
    blocks = write_layer(tp / "blocks.gpkg", [box(0, 0, 6 * km, 10 * km), box(6 * km, 0, 10 * km, 10 * km)],
                         [{"pop": 100}, {"pop": 900}], {"pop": "int"}, "blocks")
    return ["coverage", regions, zones, "--regions-id-field", "rid", "--zones-id-field", "zid", "--plane-crs", PLANE,
            "--density", blocks, "--count-field", "pop", "-n", "20000", "--seed", "25"]


def test_scene__population_shortfall_alone_fails_the_run(capsys, scene):
    doc = run_json(capsys, [*scene, "--claim", "0.5", "--fail-on-shortfall"], expect=1)
    (row,) = doc["results"]
    assert row["exact_share"] == pytest.approx(0.6, rel=1e-9)
    assert row["verdict"] == "meets"
    assert row["population_total"] == pytest.approx(1000.0, rel=1e-9)
    assert row["population_exact_share"] == pytest.approx(0.1, rel=1e-9)
    assert row["population_share_ci_low"] <= 0.1 <= row["population_share_ci_high"]
    assert row["population_verdict"] == "falls-short"
    # without --fail-on-shortfall the same verdicts exit 0
    doc = run_json(capsys, [*scene, "--claim", "0.5"], expect=0)
    assert doc["results"][0]["population_verdict"] == "falls-short"


def test_scene__both_shares_meet_a_low_claim(capsys, scene):
    doc = run_json(capsys, [*scene, "--claim", "0.05", "--fail-on-shortfall"], expect=0)
    (row,) = doc["results"]
    assert (row["verdict"], row["population_verdict"]) == ("meets", "meets")


def test_scene__end_to_end_subprocess_exit_status(scene):
    script = shutil.which("areamc", path=os.path.dirname(sys.executable)) or shutil.which("areamc")
    assert script, "the areamc entry point is installed in the venv"
    proc = subprocess.run([script, *scene, "--claim", "0.5", "--fail-on-shortfall"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 1, proc.stderr
    assert "Traceback" not in proc.stderr
    # the table reports both verdicts and the population tally
    assert "falls-short" in proc.stdout and "meets" in proc.stdout
    assert "claim population share >= 0.5 at k = 1: 0 meet, 1 fall short" in proc.stdout


def test_scene__bad_count_field_exits_2(capsys, scene):
    argv = [a if a != "pop" else "people" for a in scene]
    rc, out, err = run_cli(capsys, argv)
    assert rc == 2 and out == ""
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("areamc: error:") and "people" in lines[0]
