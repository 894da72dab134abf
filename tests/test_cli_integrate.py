"""Command-line tests of ``areamc integrate REGIONS --density SOURCE``.

Expected numbers come from outside areamc:

* block totals by areal weighting (Goodchild & Lam 1980, Geo-Processing 1:297-312;
  [memory]), Σ count |block ∩ region| / |block|, with shapely 2 (GEOS) on the files' own
  geometries read here with fiona, densified with ``shapely.segmentize`` at the tool's default
  1 km step (1000/111 320 degrees on lon/lat layers, common practice) and projected with
  pyproj onto the plane the tool reports in its JSON metadata; on the sample data every block
  lies in one district, so a district's total is also the sum of its blocks' attribute;
* raster totals from the cells read here with rasterio: sums of valid cells, and cell
  fractions with each cell densified along its parallels and meridians and projected here;
* calculus closed forms for expressions (∫∫ (x² + 3y) over a rectangle).

Estimates are held to their intervals at confidence 0.999 and to 4 standard errors (common
practice).  The sample data (sample_data/) is invented; its numbers are recomputed here.
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
from shapely.geometry import Polygon, box, mapping, shape

from conftest import overlay_total, run_cli, run_json, to_plane, write_raster

ROOT = Path(__file__).resolve().parents[1]
GPKG = ROOT / "sample_data" / "vale_county.gpkg"
TIF = ROOT / "sample_data" / "vale_population.tif"
PLANE = "+proj=laea +lat_0=47 +lon_0=10 +datum=WGS84 +units=m +no_defs"
DISTRICTS = ["integrate", str(GPKG), "--regions-layer", "districts", "--regions-id-field", "district_id"]
BLOCKS = ["--density", str(GPKG), "--density-layer", "blocks", "--count-field", "population"]
REQUIRED = ("id", "estimate", "std_error", "ci_low", "ci_high", "mean_density", "exact", "z")
CONF = "0.999"


# --- helpers -----------------------------------------------------------------------------------


def read(path, layer=None, id_field=None):
    """(ids, shapely geometries, properties, CRS) of a layer, read with fiona."""
    with fiona.open(path, layer=layer) as src:
        feats = list(src)
        crs = pyproj.CRS.from_user_input(src.crs.to_wkt())
    ids = [str(f.properties[id_field]) if id_field else str(f.id) for f in feats]
    return ids, [shape(f.geometry) for f in feats], [dict(f.properties) for f in feats], crs


def raster_cells(path, doc, pieces=8):
    """(counts with nodata as 0, cell polygons densified along their edges and projected to the plane)."""
    with rasterio.open(path) as src:
        data = src.read(1, masked=True).astype(float)
        t, rows, cols = src.transform, src.height, src.width
        crs = pyproj.CRS.from_wkt(src.crs.to_wkt())
    counts = np.ma.filled(data, 0.0).ravel()
    plane = pyproj.CRS.from_wkt(doc["plane"]["wkt"])
    trans = pyproj.Transformer.from_crs(crs, plane, always_xy=True)
    s = np.arange(pieces) / pieces
    r, c = (a.ravel() for a in np.meshgrid(np.arange(rows), np.arange(cols), indexing="ij"))
    # ring per cell in (col, row) units: bottom, right, top, left edges, `pieces` points each
    ring_c = np.concatenate([s, np.ones(pieces), 1 - s, np.zeros(pieces)])
    ring_r = np.concatenate([np.ones(pieces), 1 - s, np.zeros(pieces), s])
    cc = c[:, None] + ring_c[None, :]
    rr = r[:, None] + ring_r[None, :]
    x = t.c + t.a * cc + t.b * rr
    y = t.f + t.d * cc + t.e * rr
    px, py = trans.transform(x.ravel(), y.ravel())
    ring = np.stack([np.asarray(px).reshape(x.shape), np.asarray(py).reshape(x.shape)], axis=-1)
    return counts, shapely.polygons(ring)


def raster_total(counts, cells, region) -> float:
    keep = counts > 0
    share = shapely.area(shapely.intersection(cells[keep], region)) / shapely.area(cells[keep])
    return float(np.sum(counts[keep] * share))


def write_layer(path, geoms, crs, props=None, schema_props=None, layer="regions"):
    schema = {"geometry": "Polygon", "properties": schema_props or {"name": "str"}}
    props = props or [{"name": f"r{i}"} for i in range(len(geoms))]
    with fiona.open(path, "w", driver="GPKG", schema=schema, crs_wkt=pyproj.CRS(crs).to_wkt(), layer=layer) as dst:
        for g, p in zip(geoms, props):
            dst.write({"geometry": mapping(g), "properties": p})
    return str(path)


def check_rows(rows, refs, rel_exact):
    assert {r["id"] for r in rows} == set(refs)
    for r in rows:
        assert set(REQUIRED) <= set(r), r
        ref = refs[r["id"]]
        assert r["exact"] == pytest.approx(ref, rel=rel_exact), r
        assert r["ci_low"] - 1e-9 * ref <= ref <= r["ci_high"] + 1e-9 * ref, (r, ref)
        assert abs(r["estimate"] - ref) <= 4 * r["std_error"] + rel_exact * ref, (r, ref)
        assert r["z"] is not None and abs(r["z"]) <= 4 and not r["flagged"]
        if r["method"] == "uniform":
            # a mean estimate: z is the deviation from the exact total in standard errors (common practice)
            assert r["z"] == pytest.approx((r["estimate"] - r["exact"]) / r["std_error"], rel=1e-9)
        elif abs(r["estimate"] - r["exact"]) > 1e-9 * ref:
            # importance rows: a binomial mid-p score (Lancaster 1961), signed like the deviation
            # (rows whose blocks were all counted whole agree with the overlay to rounding: z = 0)
            assert np.sign(r["z"]) == np.sign(r["estimate"] - r["exact"])


def sample_block_sums():
    """Population per district from the blocks' attributes (each block lies in one district)."""
    _, _, props, _ = read(GPKG, "blocks")
    sums = defaultdict(float)
    for p in props:
        sums[p["district_id"]] += p["population"]
    return dict(sums)


# --- blocks ------------------------------------------------------------------------------------


# Each sample block lies inside one district, so by default every block is counted whole (no point
# is needed: "stratified-importance" with 0 points); with --no-importance the blocks are sampled.
@pytest.mark.parametrize("extra, method", [([], "stratified-importance"), (["--no-importance"], "uniform")])
def test_blocks__sample_districts_total_their_blocks(capsys, extra, method):
    doc = run_json(capsys, [*DISTRICTS, *BLOCKS, *extra, "-n", "40000", "--seed", "5", "--confidence", CONF])
    refs = sample_block_sums()
    assert sum(refs.values()) > 100_000  # the sample holds about 150,000 people (sample_data/README.md)
    check_rows(doc["results"], refs, rel_exact=1e-6)
    assert {r["method"] for r in doc["results"]} == {method}
    if method == "stratified-importance":  # every block counted whole: the exact total, no spread
        assert all(r["points"] == 0 and r["std_error"] == 0 for r in doc["results"])
    assert doc["density"]["kind"] == "blocks" and doc["density"]["count_field"] == "population"
    assert doc["seed"] == "5" and doc["confidence"] == 0.999


def test_blocks__region_file_cutting_blocks_and_units(capsys, tmp_path):
    # two invented regions in lon/lat: a 64-gon around Vossimble and a box over two districts
    t = np.linspace(0, 2 * np.pi, 64, endpoint=False)
    ring = Polygon(np.column_stack([10.62 + 0.07 * np.cos(t), 47.26 + 0.045 * np.sin(t)]))
    regions = [ring, box(10.35, 47.15, 10.55, 47.3)]
    path = write_layer(tmp_path / "regions.gpkg", regions, "EPSG:4326")
    doc = run_json(capsys, ["integrate", path, *BLOCKS, "-n", "60000", "--seed", "8", "--confidence", CONF,
                               "--units", "km2"])
    _, bgeoms, bprops, bcrs = read(GPKG, "blocks")
    blocks = to_plane(bgeoms, bcrs, doc)
    counts = [p["population"] for p in bprops]
    planar = to_plane(regions, pyproj.CRS("EPSG:4326"), doc)
    ids = [r["id"] for r in doc["results"]]  # feature ids, in file order
    refs = {rid: overlay_total(blocks, counts, g) for rid, g in zip(ids, planar)}
    check_rows(doc["results"], refs, rel_exact=1e-9)
    for r, g in zip(doc["results"], planar):
        # --units km2: region_area in km², mean_density per km² (1 km² = 1e6 m²)
        assert r["region_area"] == pytest.approx(g.area / 1e6, rel=1e-9)
        assert r["mean_density"] == pytest.approx(r["estimate"] / r["region_area"], rel=1e-9)
        # blocks wholly inside a region are counted whole, the rest drawn by their counts
        assert r["method"] == "stratified-importance" and 0 < r["estimate"] and r["points"] == 60_000


def test_blocks__end_to_end_subprocess(tmp_path):
    script = shutil.which("areamc", path=os.path.dirname(sys.executable)) or shutil.which("areamc")
    assert script, "the areamc entry point is installed in the venv"
    out = tmp_path / "totals.json"
    proc = subprocess.run([script, *DISTRICTS, *BLOCKS, "-n", "20000",
                           "--seed", "1", "-o", str(out), "-q"], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    doc = json.loads(out.read_text())
    refs = sample_block_sums()
    check_rows(doc["results"], refs, rel_exact=1e-6)


@pytest.mark.parametrize("extra, method", [([], "stratified-importance"), (["--no-importance"], "uniform")])
def test_blocks__relative_tolerance_two_stages(capsys, extra, method):
    # --tolerance 2%: a pilot to within 2x the target, then a fresh final batch sized from it; the
    # final half-width is near 2% of the total, random, and may exceed it by a few percent
    doc = run_json(capsys, [*DISTRICTS, *BLOCKS, *extra, "--tolerance", "2%", "--seed", "9", "--confidence", CONF])
    assert doc["stop"]["tolerance_relative"] == pytest.approx(0.02) and doc["stop"]["two_stage"] is True
    check_rows(doc["results"], sample_block_sums(), rel_exact=1e-6)
    for r in doc["results"]:
        assert r["method"] == method
        if method == "stratified-importance":  # each sample block lies in one district: all counted whole
            assert r["stop_reason"] == "none" and r["points"] == r["pilot_points"] == 0
            continue
        assert r["stop_reason"] == "target" and r["pilot_points"] > 0
        assert (r["ci_high"] - r["ci_low"]) / 2 <= 1.3 * 0.02 * r["estimate"]


def test_blocks__table_footer_says_no_row_is_flagged(capsys):
    doc = run_json(capsys, [*DISTRICTS, *BLOCKS, "-n", "20000", "--seed", "5", "--confidence", CONF])
    check_rows(doc["results"], sample_block_sums(), rel_exact=1e-6)  # none flagged
    rc, out, err = run_cli(capsys, [*DISTRICTS, *BLOCKS, "-n", "20000", "--seed", "5", "--confidence", CONF, "-q"])
    assert rc == 0, err
    assert out.rstrip().endswith("no row flagged: every estimate within 4 standard errors of the exact total")


# --- rasters -----------------------------------------------------------------------------------


def test_raster__region_holding_the_sample_grid(capsys, tmp_path):
    path = write_layer(tmp_path / "all.gpkg", [box(10.0, 46.9, 11.2, 47.6)], "EPSG:4326")
    with rasterio.open(TIF) as src:
        data = src.read(1, masked=True)
        ref = float(data.astype(float).sum())
        n_nodata = int(data.mask.sum())
    assert n_nodata == 10  # sample_data/README.md
    rc, out, err = run_cli(capsys, ["integrate", path, "--density", str(TIF), "-n", "20000", "--seed", "2",
                                    "--format", "json", "--units", "m2", "-q"])
    assert rc == 0, err
    row = json.loads(out)["results"][0]
    assert row["method"] == "importance"
    assert row["estimate"] == pytest.approx(ref, rel=1e-9)  # every draw lands in the region
    assert row["exact"] == pytest.approx(ref, rel=1e-9)
    assert "10 nodata cell(s)" in err and err.startswith(("areamc: warning:", "areamc: note:"))
    doc = run_json(capsys, ["integrate", path, "--density", str(TIF), "-n", "200000", "--seed", "2",
                               "--no-importance", "--confidence", CONF])
    check_rows(doc["results"], {doc["results"][0]["id"]: ref}, rel_exact=1e-9)
    assert doc["results"][0]["method"] == "uniform"


def test_raster__sample_districts_by_cell_fractions(capsys):
    doc = run_json(capsys, [*DISTRICTS, "--density", str(TIF), "-n", "60000", "--seed", "3",
                               "--confidence", CONF])
    dids, dgeoms, _, dcrs = read(GPKG, "districts", "district_id")
    counts, cells = raster_cells(TIF, doc)
    refs = {rid: raster_total(counts, cells, g) for rid, g in zip(dids, to_plane(dgeoms, dcrs, doc))}
    # the tool outlines cells by their 4 corners; densified outlines differ by about 1e-6
    check_rows(doc["results"], refs, rel_exact=1e-4)
    assert doc["density"]["kind"] == "raster" and doc["density"]["raster_values"] == "count"


def test_raster__constant_density_per_km2(capsys, tmp_path):
    tif = write_raster(tmp_path / "flat.tif", np.full((50, 80), 120.0), west=10.2, north=47.5, dx=0.01,
                       dtype="float32")
    t = np.linspace(0, 2 * np.pi, 90, endpoint=False)
    region = Polygon(np.column_stack([10.6 + 0.2 * np.cos(t), 47.25 + 0.1 * np.sin(t) * (1 + 0.3 * np.cos(t))]))
    path = write_layer(tmp_path / "r.gpkg", [region], "EPSG:4326")
    doc = run_json(capsys, ["integrate", path, "--density", tif, "--raster-values", "per-km2", "-n", "100000",
                               "--seed", "4", "--confidence", CONF])
    planar = to_plane([region], pyproj.CRS("EPSG:4326"), doc)[0]
    row = doc["results"][0]
    check_rows([row], {row["id"]: 120e-6 * planar.area}, rel_exact=1e-5)  # 120 per km² x area (SI)
    assert doc["density"]["raster_values"] == "per-km2"


# --- expressions -------------------------------------------------------------------------------


def test_expression__polynomial_over_a_rectangle_in_the_plane(capsys, tmp_path):
    x0, x1, y0, y1 = 1000.0, 3000.0, 2000.0, 5000.0
    path = write_layer(tmp_path / "rect.gpkg", [box(x0, y0, x1, y1)], PLANE)
    doc = run_json(capsys, ["integrate", path, "--density", "(x**2 + 3*y) * 1e-12", "--plane-crs", PLANE,
                               "-n", "200000", "--seed", "6", "--confidence", CONF])
    # ∫∫ (x² + 3y) dx dy = (x1³ − x0³)(y1 − y0)/3 + 3(y1² − y0²)(x1 − x0)/2 (calculus), x 1e-12
    exact = ((x1**3 - x0**3) * (y1 - y0) / 3 + 3 * (y1**2 - y0**2) * (x1 - x0) / 2) * 1e-12
    row = doc["results"][0]
    assert set(REQUIRED) <= set(row)
    assert row["exact"] is None and row["z"] is None and row["method"] == "grid-importance"  # a pilot grid
    assert row["ci_low"] <= exact <= row["ci_high"]
    assert abs(row["estimate"] - exact) <= 4 * row["std_error"]
    assert row["std_error"] < 0.01 * exact
    assert doc["density"]["kind"] == "expression"


# --- bad input ---------------------------------------------------------------------------------


def _blocks_file(tmp_path, schema, values):
    field = list(schema)[0]
    geoms = [box(10.3, 47.1, 10.6, 47.3), box(10.6, 47.1, 10.9, 47.3)]
    return write_layer(tmp_path / "blocks.gpkg", geoms, "EPSG:4326", [{field: v} for v in values], schema, "blocks")


def _not_a_raster(tmp_path):
    p = tmp_path / "notes.tif"
    p.write_text("just text\n")
    return str(p)


BAD = {
    "count field missing": (lambda tp: ["--density", _blocks_file(tp, {"pop": "int"}, [1, 2]), "--count-field", "population"],
                            "is not a field"),
    "count non-numeric": (lambda tp: ["--density", _blocks_file(tp, {"population": "str"}, ["3", "lots"]), "--count-field", "population"],
                          "'lots'"),
    "count negative": (lambda tp: ["--density", _blocks_file(tp, {"population": "int"}, [3, -4]), "--count-field", "population"],
                       "-4"),
    "no count field option": (lambda tp: ["--density", _blocks_file(tp, {"population": "int"}, [3, 4])],
                              "--count-field"),
    "raster unreadable": (lambda tp: ["--density", _not_a_raster(tp)], "not a readable raster"),
    "raster without CRS": (lambda tp: ["--density", write_raster(tp / "bare.tif", np.ones((5, 5)), west=10.3, north=47.3,
                                                                 dx=0.01, crs=None, dtype="float32")], "no CRS"),
    "raster elsewhere": (lambda tp: ["--density", write_raster(tp / "far.tif", np.ones((5, 5)), west=-60, north=-10,
                                                               dx=0.01, dtype="float32")], "does not overlap"),
    "raster missing": (lambda tp: ["--density", str(tp / "missing.tif")], "no such file"),
    "syntax error": (lambda tp: ["--density", "x +* 2"], "syntax error"),
    "unknown name": (lambda tp: ["--density", "population * 2"], "'population'"),
    "attribute access": (lambda tp: ["--density", "x.real"], "attribute access"),
    "import": (lambda tp: ["--density", "__import__('os')"], "__import__"),
    "negative density": (lambda tp: ["--density", "(lon - 10.6) * 1e-9"], "non-negative and finite"),
    "nan density": (lambda tp: ["--density", "log(lon - 10.6)"], "gives nan"),
    "infinite density": (lambda tp: ["--density", "1/0"], "gives inf"),
}


@pytest.mark.parametrize("case", list(BAD))
def test_bad_input__one_line_exit_2(capsys, tmp_path, case):
    make, expected = BAD[case]
    # the districts straddle 10.6 E, so lon - 10.6 < 0 over their west half (lon, lat: no warning about
    # x, y on a plane chosen from the data, so the error is the only line)
    rc, out, err = run_cli(capsys, [*DISTRICTS, *make(tmp_path), "-n", "5000", "--seed", "1"])
    assert rc == 2, (case, err)
    assert out == ""
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("areamc: error:"), err
    assert "Traceback" not in err
    assert expected in lines[0], (case, lines[0])


def test_blocks_without_crs__density_input_crs_reads_them__else_refused_naming_it(capsys, tmp_path):
    """Blocks in a Shapefile whose .prj is gone: refused naming --density-input-crs; with it, the one
    block wholly inside the region gives the exact total its count (areal weighting, Goodchild & Lam
    1980: a block inside counts whole)."""
    import fiona
    from shapely.geometry import box, mapping

    from conftest import assert_refused

    region = tmp_path / "region.gpkg"
    with fiona.open(region, "w", driver="GPKG", crs="EPSG:4326",
                    schema={"geometry": "Polygon", "properties": {"rid": "str"}}) as dst:
        dst.write({"geometry": mapping(box(10.0, 47.0, 10.2, 47.2)), "properties": {"rid": "r"}})
    blocks = tmp_path / "blocks.shp"
    with fiona.open(blocks, "w", driver="ESRI Shapefile", crs="EPSG:4326",
                    schema={"geometry": "Polygon", "properties": {"pop": "int"}}) as dst:
        dst.write({"geometry": mapping(box(10.05, 47.05, 10.1, 47.1)), "properties": {"pop": 500}})
    (tmp_path / "blocks.prj").unlink()
    argv = ["integrate", str(region), "--density", str(blocks), "--count-field", "pop", "-n", "2000", "--seed", "3"]
    assert_refused(capsys, argv, r"--density-input-crs", tmp_path)
    doc = run_json(capsys, [*argv, "--density-input-crs", "EPSG:4326"])
    assert doc["results"][0]["exact"] == pytest.approx(500.0, rel=1e-9)
