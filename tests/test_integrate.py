"""Tests of ``areamc.integrate``: totals of a density over regions, by importance or plain sampling.

Expected values come from outside areamc:

* areal weighting (Goodchild & Lam 1980, Geo-Processing 1:297-312 [memory]),
  Σ count |block ∩ region| / |block|, computed here with shapely 2 (GEOS), and a worked
  example in exact fractions (constructed here, see tests/test_density.py for the derivation);
* raster totals: sums of cells (numpy), and cell fractions from cells densified along their
  parallels and meridians and projected with pyproj here (not the tool's 4-corner outlines);
* calculus closed forms: ∫∫_[x0,x1]x[y0,y1] (x² + 3y) dx dy = (x1³ − x0³)(y1 − y0)/3 +
  3(y1² − y0²)(x1 − x0)/2, and ∫∫_{r ≤ R} exp(−r²/2σ²) dA = 2πσ²(1 − exp(−R²/2σ²)).

Estimates are held to their intervals at confidence 0.999 and to 4 standard errors (common
practice; STYLE.md guideline 14).  Scenes are built in a LAEA plane (Snyder 1987 ch. 24);
``project_layers(..., crs=PLANE, densify_m=1e9)`` keeps planar geometries as given.
"""

from __future__ import annotations

import math

import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import Polygon, box

from conftest import overlay_total, write_raster

from areamc.density import BlockDensity, ExpressionDensity, RasterDensity
from areamc.errors import InputError
from areamc.stopping import StopRule
from areamc.integrate import integrate_density
from areamc.errors import AreamcWarning
from areamc.load import layer_from_geometries
from areamc.project import project_layers

PLANE = "+proj=laea +lat_0=47 +lon_0=10 +datum=WGS84 +units=m +no_defs"
CONF = 0.999
KM = 1000.0
#: A precision target runs in two stages (a pilot, then a fresh final batch sized from the pilot's
#: half-width, after Stein 1945, Ann. Math. Statist. 16:243-258): the final half-width is close to the
#: target, not bounded by it; held to it with this allowance for its own noise (common practice).
TWO_STAGE_SLACK = 1.3


def on_plane(*groups, crs=PLANE, densify_m=1e9, ids=None):
    layers = [layer_from_geometries(list(g), crs, ids=ids if i == 0 else None) for i, g in enumerate(groups)]
    return project_layers(layers, crs=PLANE, densify_m=densify_m)


def check_row(row, ref, *, rel_exact=1e-9):
    """The estimate's interval holds `ref`; within 4 standard errors; exact total agrees."""
    assert row.ci_low <= ref <= row.ci_high, (row, ref)
    assert abs(row.estimate - ref) <= 4 * row.std_error + 1e-12 * abs(ref), (row, ref)
    if row.exact is not None:
        assert row.exact == pytest.approx(ref, rel=rel_exact, abs=1e-9)
        assert row.z is not None and abs(row.z) <= 4
    assert row.mean_density == pytest.approx(row.estimate / row.region_area, rel=1e-12)


# --- blocks ------------------------------------------------------------------------------------

CELL = 500.0
N_SIDE = 24


@pytest.fixture(scope="module")
def grid():
    """24 x 24 blocks of 500 m with Poisson counts around a town (invented, fixed seed); regions inside."""
    rng = np.random.default_rng(20240612)
    ix, iy = (a.ravel() for a in np.meshgrid(np.arange(N_SIDE), np.arange(N_SIDE)))
    cells = shapely.box(ix * CELL, iy * CELL, (ix + 1) * CELL, (iy + 1) * CELL)
    centre = shapely.get_coordinates(shapely.centroid(cells))
    counts = rng.poisson(2000 * np.exp(-np.sum((centre - [4000, 7000]) ** 2, 1) / (2 * 2000**2)) + 20).astype(float)
    t = np.linspace(0, 2 * np.pi, 400, endpoint=False)
    r = 4500 * (1 + 0.2 * np.sin(3 * t))
    regions = {
        "wobbly": Polygon(np.column_stack([6000 + r * np.cos(t), 6000 + r * np.sin(t)])),
        "holed": box(1234, 2345, 9876, 8765).difference(Polygon([(3000, 4000), (7000, 4500), (5000, 7500)])),
        "multi": shapely.MultiPolygon([box(100, 100, 1700, 900), box(10_300, 10_100, 11_900, 11_700)]),
    }
    pregions, pblocks = on_plane(list(regions.values()), cells, ids=list(regions))
    return pregions, pblocks, counts


# every region holds whole blocks, which importance sampling counts whole ("stratified-importance")
@pytest.mark.parametrize("importance, method", [(True, "stratified-importance"), (False, "uniform")])
def test_blocks__estimates_hold_the_areal_weighting_total(grid, importance, method):
    regions, blocks, counts = grid
    report = integrate_density(regions, BlockDensity(blocks, counts), stop=StopRule(points=100_000),
                               confidence=CONF, seed=31, importance=importance)
    assert [r.id for r in report.rows] == ["wobbly", "holed", "multi"]
    for row, region in zip(report.rows, regions.planar):
        assert row.method == method and row.points == 100_000
        assert row.region_area == pytest.approx(region.area, rel=1e-12)
        check_row(row, overlay_total(blocks.planar, counts, region), rel_exact=1e-12)
    assert report.run.seed_entropy == 31 and report.source == "blocks"


def test_blocks__worked_example_in_fractions():
    # R = [2,5]x[1,4] km over A (8 people), B (3), C (6): total 9/2 (constructed here; derivation
    # in tests/test_density.py).  The blocks meeting R hold 17, so P(in R) = 9/34.
    blocks = [box(0, 0, 4 * KM, 2 * KM), box(4 * KM, 0, 6 * KM, 3 * KM), Polygon([(0, 2 * KM), (4 * KM, 2 * KM), (0, 5 * KM)])]
    region, pblocks = on_plane([box(2 * KM, 1 * KM, 5 * KM, 4 * KM)], blocks)
    report = integrate_density(region, BlockDensity(pblocks, [8, 3, 6]), stop=StopRule(points=200_000),
                               confidence=CONF, seed=4)
    row = report.rows[0]
    check_row(row, 4.5, rel_exact=1e-12)
    # importance sampling: the estimate is 17 x (hits / points), a binomial proportion
    assert row.method == "importance"
    assert row.std_error == pytest.approx(17 * math.sqrt((9 / 34) * (25 / 34) / 200_000), rel=0.02)


def test_blocks__uniform_total_over_a_region_larger_than_the_blocks():
    # every block inside the region: the total is 8 + 3 + 6 = 17 (constructed here); plain sampling
    # throws points outside the blocks' bounding box, where the density is 0
    blocks = [box(0, 0, 4 * KM, 2 * KM), box(4 * KM, 0, 6 * KM, 3 * KM), Polygon([(0, 2 * KM), (4 * KM, 2 * KM), (0, 5 * KM)])]
    region, pblocks = on_plane([box(-KM, -KM, 7 * KM, 6 * KM)], blocks)
    report = integrate_density(region, BlockDensity(pblocks, [8, 3, 6]), stop=StopRule(points=100_000),
                               confidence=CONF, seed=1, importance=False)
    check_row(report.rows[0], 17.0, rel_exact=1e-12)


def test_blocks__no_people_near_the_region(grid):
    regions, blocks, counts = grid
    report = integrate_density(regions, BlockDensity(blocks, np.zeros_like(counts)), stop=StopRule(points=1000), seed=1)
    for row in report.rows:
        assert (row.method, row.estimate, row.points, row.exact) == ("none", 0.0, 0, 0.0)


def test_blocks__result_does_not_depend_on_chunk_size(grid):
    # chunks merge sufficient statistics in stream order (STYLE.md guideline 4)
    regions, blocks, counts = grid
    source = BlockDensity(blocks, counts)
    for importance in (True, False):
        a = integrate_density(regions, source, stop=StopRule(points=30_000), seed=9, chunk=30_000, importance=importance)
        b = integrate_density(regions, source, stop=StopRule(points=30_000), seed=9, chunk=4096, importance=importance)
        c = integrate_density(regions, source, stop=StopRule(points=30_000), seed=10, chunk=4096, importance=importance)
        if importance:  # integer hit counts: identical
            assert [r.to_dict() for r in a.rows] == [r.to_dict() for r in b.rows]
        else:  # float sums of scores: equal up to the rounding of a different summation order
            for ra, rb in zip(a.rows, b.rows):
                assert ra.points == rb.points
                for key in ("estimate", "std_error", "ci_low", "ci_high"):
                    assert getattr(ra, key) == pytest.approx(getattr(rb, key), rel=1e-12)
        assert [r.estimate for r in a.rows] != [r.estimate for r in c.rows]


def test_blocks__relative_precision_target(grid):
    regions, blocks, counts = grid
    stop = StopRule(points=None, relative=0.003, max_points=5_000_000)
    report = integrate_density(regions, BlockDensity(blocks, counts), stop=stop, confidence=0.95, seed=2)
    for row, region in zip(report.rows, regions.planar):
        assert row.stop_reason == "target" and row.pilot_points > 0
        assert (row.ci_high - row.ci_low) / 2 <= TWO_STAGE_SLACK * 0.003 * row.estimate
        assert row.points + row.pilot_points < 5_000_000
        assert abs(row.estimate - overlay_total(blocks.planar, counts, region)) <= 4 * row.std_error


# --- rasters -----------------------------------------------------------------------------------


def wobbly(cx, cy, rx, ry, n=360):
    t = np.linspace(0, 2 * np.pi, n, endpoint=False)
    return Polygon(np.column_stack([cx + rx * np.cos(t) * (1 + 0.1 * np.sin(3 * t)), cy + ry * np.sin(t)]))


@pytest.mark.parametrize("importance", [True, False])
def test_raster__constant_density_per_m2_in_the_plane(tmp_path, importance):
    # 0.004 per m² everywhere: the total is 0.004 x the region's shapely area (constructed here)
    path = write_raster(tmp_path / "flat.tif", np.full((60, 80), 0.004), west=-4000, north=3000, dx=100, crs=PLANE)
    regions = on_plane([wobbly(200, -300, 1800, 1200), wobbly(-2000, 1500, 900, 700)])[0]
    with RasterDensity(path, regions.plane, values="per-m2") as source:
        report = integrate_density(regions, source, stop=StopRule(points=100_000), confidence=CONF, seed=3,
                                   importance=importance)
    for row, region in zip(report.rows, regions.planar):
        assert row.method == ("importance" if importance else "uniform")
        check_row(row, 0.004 * region.area)
        assert row.mean_density == pytest.approx(0.004, rel=0.02)


def test_raster__constant_density_per_km2_on_a_geographic_grid(tmp_path):
    # 250 per km² on 0.01° cells (EPSG:4326): the total is 250e-6 x the region's planar area;
    # the tool's exact total uses 4-corner cell outlines, so it agrees to about 1e-6 only
    path = write_raster(tmp_path / "geo.tif", np.full((40, 60), 250.0), west=9.70, north=47.20, dx=0.01)
    regions = project_layers([layer_from_geometries([wobbly(10.0, 47.0, 0.2, 0.12)], "EPSG:4326")],
                             crs=PLANE, densify_m=200.0)[0]
    with RasterDensity(path, regions.plane, values="per-km2") as source:
        report = integrate_density(regions, source, stop=StopRule(points=200_000), confidence=CONF, seed=5)
    row = report.rows[0]
    check_row(row, 250e-6 * regions.planar[0].area, rel_exact=1e-5)


def count_grid(tmp_path, nodata=None, holes=()):
    """A 0.01° count grid, 20 rows x 30 columns, NW corner 10.20 E 47.35 N (invented, fixed seed)."""
    rng = np.random.default_rng(99)
    data = rng.uniform(0, 50, (20, 30)).round(1)
    for r, c, v in holes:
        data[r, c] = v
    return write_raster(tmp_path / "grid.tif", data, west=10.20, north=47.35, dx=0.01, nodata=nodata), data


def dense_cells(west, north, d, rows, cols, pieces=10):
    """Cells of a geographic grid as lon/lat polygons with `pieces` points per edge, projected here."""
    trans = pyproj.Transformer.from_crs("EPSG:4326", PLANE, always_xy=True)
    t = np.arange(pieces) / pieces
    out = []
    for r in range(rows):
        for c in range(cols):
            x0, x1 = west + c * d, west + (c + 1) * d
            y1, y0 = north - r * d, north - (r + 1) * d
            ring = np.concatenate([
                np.column_stack([x0 + (x1 - x0) * t, np.full(pieces, y0)]),
                np.column_stack([np.full(pieces, x1), y0 + (y1 - y0) * t]),
                np.column_stack([x1 - (x1 - x0) * t, np.full(pieces, y1)]),
                np.column_stack([np.full(pieces, x0), y1 - (y1 - y0) * t]),
            ])
            px, py = trans.transform(ring[:, 0], ring[:, 1])
            out.append(Polygon(np.column_stack([px, py])))
    return np.array(out, dtype=object)


def test_raster__region_holding_the_whole_grid_gets_the_sum_of_cells(tmp_path):
    path, data = count_grid(tmp_path)
    regions = project_layers([layer_from_geometries([box(10.1, 47.1, 10.6, 47.45)], "EPSG:4326")],
                             crs=PLANE, densify_m=500.0)[0]
    with RasterDensity(path, regions.plane) as source:
        imp = integrate_density(regions, source, stop=StopRule(points=50_000), confidence=CONF, seed=6).rows[0]
        uni = integrate_density(regions, source, stop=StopRule(points=200_000), confidence=CONF, seed=6,
                                importance=False).rows[0]
    # every draw falls in the region: the estimate is the proposal total, the sum of the cells
    assert imp.method == "importance"
    assert imp.estimate == pytest.approx(data.sum(), rel=1e-12)
    assert imp.exact == pytest.approx(data.sum(), rel=1e-9)
    assert imp.ci_low <= data.sum() <= imp.ci_high + 1e-9
    # plain sampling: density = count / (closed-form cell area), so the mean over the region
    # times its area is again the sum of the cells
    assert uni.method == "uniform"
    check_row(uni, float(data.sum()), rel_exact=1e-9)


@pytest.mark.parametrize("importance", [True, False])
def test_raster__cell_fractions_over_a_region_cutting_cells(tmp_path, importance):
    path, data = count_grid(tmp_path)
    regions = project_layers([layer_from_geometries([wobbly(10.35, 47.25, 0.09, 0.06),
                                                     box(10.123, 47.3, 10.277, 47.371)], "EPSG:4326")],
                             crs=PLANE, densify_m=200.0)[0]
    cells = dense_cells(10.20, 47.35, 0.01, 20, 30)
    with RasterDensity(path, regions.plane) as source:
        report = integrate_density(regions, source, stop=StopRule(points=200_000), confidence=CONF, seed=7,
                                   importance=importance)
    for row, region in zip(report.rows, regions.planar):
        share = shapely.area(shapely.intersection(cells, region)) / shapely.area(cells)
        ref = float(np.sum(data.ravel() * share))
        assert 0 < ref < data.sum()
        check_row(row, ref, rel_exact=1e-5)


def test_raster__nodata_cells_warn_and_count_as_empty(tmp_path):
    path, data = count_grid(tmp_path, nodata=-1.0, holes=[(2, 2, -1.0), (9, 9, -1.0), (19, 29, -1.0)])
    valid = np.where(data == -1.0, 0.0, data)
    regions = project_layers([layer_from_geometries([box(10.1, 47.1, 10.6, 47.45)], "EPSG:4326")],
                             crs=PLANE, densify_m=500.0)[0]
    with RasterDensity(path, regions.plane) as source, pytest.warns(AreamcWarning, match=r"3 nodata cell\(s\)"):
        report = integrate_density(regions, source, stop=StopRule(points=20_000), seed=8)
    assert report.rows[0].estimate == pytest.approx(valid.sum(), rel=1e-12)
    assert report.rows[0].exact == pytest.approx(valid.sum(), rel=1e-9)


def test_raster__region_off_the_grid(tmp_path):
    path, _ = count_grid(tmp_path)
    regions = on_plane([box(300_000, 300_000, 310_000, 310_000)])[0]
    with RasterDensity(path, regions.plane) as source:
        row = integrate_density(regions, source, stop=StopRule(points=1000), seed=1).rows[0]
    assert (row.method, row.estimate, row.exact, row.points) == ("none", 0.0, 0.0, 0)


# --- expressions -------------------------------------------------------------------------------


def test_expression__polynomial_over_a_rectangle():
    x0, x1, y0, y1 = 1000.0, 3000.0, 2000.0, 5000.0
    regions = on_plane([box(x0, y0, x1, y1)])[0]
    # ∫∫ (x² + 3y) dx dy = (x1³ − x0³)(y1 − y0)/3 + 3 (y1² − y0²)(x1 − x0)/2 (calculus), scaled by 1e-12
    exact = ((x1**3 - x0**3) * (y1 - y0) / 3 + 3 * (y1**2 - y0**2) * (x1 - x0) / 2) * 1e-12
    report = integrate_density(regions, ExpressionDensity("(x**2 + 3*y) * 1e-12", regions.plane),
                               stop=StopRule(points=200_000), confidence=CONF, seed=12)
    row = report.rows[0]
    assert row.method == "grid-importance" and row.exact is None and row.z is None  # expressions: a pilot grid
    check_row(row, exact)
    assert row.std_error < 0.01 * exact  # the check has power: a 1% error would be seen


def test_expression__polynomial_to_a_relative_precision():
    x0, x1, y0, y1 = -2500.0, 1500.0, 500.0, 1500.0
    regions = on_plane([box(x0, y0, x1, y1)])[0]
    exact = ((x1**3 - x0**3) * (y1 - y0) / 3 + 3 * (y1**2 - y0**2) * (x1 - x0) / 2) * 1e-12
    stop = StopRule(points=None, relative=0.002, max_points=10_000_000)
    row = integrate_density(regions, ExpressionDensity("(x**2 + 3*y) * 1e-12", regions.plane),
                            stop=stop, confidence=0.95, seed=13).rows[0]
    assert row.stop_reason == "target" and row.pilot_points > 0
    assert (row.ci_high - row.ci_low) / 2 <= TWO_STAGE_SLACK * 0.002 * row.estimate
    assert row.points + row.pilot_points < 10_000_000
    assert abs(row.estimate - exact) <= 4 * row.std_error


def test_expression__gaussian_over_a_disk():
    # ∫∫_{r ≤ R} A exp(−r²/2σ²) dA = A 2πσ² (1 − exp(−R²/2σ²)) (calculus, polar coordinates);
    # the disk is a 4096-gon: its area falls short of πR² by about 4e-7 relative (negligible here)
    cx, cy, sigma, radius, amp = 1500.0, -800.0, 2000.0, 3000.0, 1e-3
    t = np.linspace(0, 2 * np.pi, 4096, endpoint=False)
    disk = Polygon(np.column_stack([cx + radius * np.cos(t), cy + radius * np.sin(t)]))
    regions = on_plane([disk])[0]
    text = f"{amp} * exp(-((x - {cx})**2 + (y - ({cy}))**2) / (2 * {sigma}**2))"
    exact = amp * 2 * math.pi * sigma**2 * (1 - math.exp(-(radius**2) / (2 * sigma**2)))
    row = integrate_density(regions, ExpressionDensity(text, regions.plane), stop=StopRule(points=200_000),
                            confidence=CONF, seed=14).rows[0]
    check_row(row, exact)
    assert row.std_error < 0.01 * exact


@pytest.mark.parametrize("text, shown", [("x * 1e-9", "gives -"), ("log(x)", "gives nan")])
def test_expression__negative_or_nan_density_stops_the_run(text, shown):
    # the region reaches x < 0, where x is negative and log(x) is nan
    regions = on_plane([box(-3000, 0, 3000, 2000)])[0]
    with pytest.raises(InputError, match="non-negative and finite") as info:
        integrate_density(regions, ExpressionDensity(text, regions.plane), stop=StopRule(points=10_000), seed=1)
    assert shown in str(info.value)
