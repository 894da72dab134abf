"""Tests of ``areamc.density``: block, raster and expression density sources.

Expected values come from outside areamc:

* areal weighting (Goodchild & Lam 1980, Geo-Processing 1:297-312 [memory]):
  V_t = Σ_s V_s |A_s ∩ A_t| / |A_s|, computed here with shapely 2 (GEOS) on the planar
  geometries, and a small worked example in exact fractions (constructed here);
* areas of latitude-longitude cells from the closed form A = (a²/2) Δλ (q(φ2) − q(φ1))
  (Snyder 1987, *Map Projections: A Working Manual*, USGS Professional Paper 1395, eq. 3-12),
  with reference values computed from that closed form to 40 digits (pyproj.Geod, Karney 2013,
  J. Geodesy 87:43-55, agrees), and a q function written out in this file;
* WGS84 a = 6 378 137 m, 1/f = 298.257 223 563 (NIMA TR8350.2; memory for the table number);
* raster cell fractions Σ count |cell ∩ R| / |cell| computed here by brute force: cell corners
  from the raster's affine transform (rasterio), projected with pyproj, intersected with shapely;
* hand-built rectangles and triangles in exact fractions for ``areamc.exact.block_total`` and
  ``cell_total`` (constructed here);
* sampling frequencies against binomial bands and a chi-square test (scipy.stats), fixed seeds.

A source is stateless: ``source.for_region(region)`` gives a frozen view answering for that region
only, so views of several regions may be used in any order.

Scenes are built in a Lambert azimuthal equal-area plane (LAEA, Snyder 1987 ch. 24);
``project_layers(..., crs=PLANE, densify_m=1e9)`` keeps planar geometries as given.
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from fractions import Fraction

import fiona
import numpy as np
import pyproj
import pytest
import rasterio
import shapely
from scipy import stats
from shapely.geometry import Polygon, box, mapping

from conftest import overlay_total, write_raster

from areamc.density import (
    GRID_DEFENSIVE,
    BlockDensity,
    ExpressionDensity,
    RasterDensity,
    block_counts,
    grid_proposal,
    grid_side,
    build_density,
    guess_density_kind,
    read_density,
    warn_nodata,
)
from areamc.errors import AreamcWarning, InputError, LayerError, OptionError
from areamc.exact import block_total, cell_total
from areamc.load import layer_from_geometries, read_layer
from areamc.project import project_layers

PLANE = "+proj=laea +lat_0=47 +lon_0=10 +datum=WGS84 +units=m +no_defs"
A_WGS84 = 6378137.0  # NIMA TR8350.2
F_WGS84 = 1 / 298.257223563
E_WGS84 = math.sqrt(F_WGS84 * (2 - F_WGS84))
KM = 1000.0


def q_authalic(lat_deg: float) -> float:
    """Snyder 1987, eq. 3-12, with the log term written as −atanh(e sinφ)/e; WGS84 a and f from NIMA
    TR8350.2 (2000), Table 3.1 [memory for the table number]."""
    s = math.sin(math.radians(lat_deg))
    e = E_WGS84
    return (1 - e * e) * (s / (1 - e * e * s * s) + math.atanh(e * s) / e)


def quad_area(lon1, lat1, lon2, lat2) -> float:
    """(a²/2) Δλ (q(φ2) − q(φ1)), m² (closed form, Snyder 1987 eq. 3-12)."""
    return abs(A_WGS84**2 / 2 * math.radians(lon2 - lon1) * (q_authalic(lat2) - q_authalic(lat1)))


def on_plane(*groups, crs=PLANE, densify_m=1e9):
    """Project groups of shapely geometries (given in `crs`) onto the plane `crs` together."""
    layers = [layer_from_geometries(list(g), crs) for g in groups]
    return project_layers(layers, crs=crs, densify_m=densify_m)


def plane_of(crs_text: str, lonlat_geoms):
    """Project lon/lat geometries onto the LAEA plane `crs_text` (1 km densify)."""
    (layer,) = project_layers([layer_from_geometries(list(lonlat_geoms), "EPSG:4326")], crs=crs_text, densify_m=1000.0)
    return layer


def write_blocks(path, geoms, props, schema_props, crs=PLANE):
    schema = {"geometry": "Polygon", "properties": schema_props}
    with fiona.open(path, "w", driver="GPKG", schema=schema, crs_wkt=pyproj.CRS(crs).to_wkt(), layer="blocks") as dst:
        for g, p in zip(geoms, props):
            dst.write({"geometry": mapping(g), "properties": p})
    return str(path)


# --- the worked example (constructed here), coordinates in km of the plane ---------------------
#: A = [0,4]x[0,2] with 8 people (density 1 per km²), B = [4,6]x[0,3] with 3 (1/2 per km²),
#: C = triangle (0,2) (4,2) (0,5), area 6, with 6 (1 per km²).
WORKED_BLOCKS = [box(0, 0, 4 * KM, 2 * KM), box(4 * KM, 0, 6 * KM, 3 * KM),
                 Polygon([(0, 2 * KM), (4 * KM, 2 * KM), (0, 5 * KM)])]
WORKED_COUNTS = [8.0, 3.0, 6.0]
#: R = [2,5]x[1,4]:  R∩A = [2,4]x[1,2], area 2 -> 8·2/8 = 2;  R∩B = [4,5]x[1,3], area 2 -> 3·2/6 = 1;
#: R∩C = {2 ≤ x ≤ 4, 2 ≤ y ≤ 5 − 3x/4} (the hypotenuse stays below y = 4 there), area
#: ∫_2^4 (3 − 3x/4) dx = 6 − 9/2 = 3/2 -> 6·(3/2)/6 = 3/2.  Total 2 + 1 + 3/2 = 9/2.
WORKED_REGION = box(2 * KM, 1 * KM, 5 * KM, 4 * KM)
WORKED_TOTAL = Fraction(9, 2)


@pytest.fixture(scope="module")
def worked():
    region, blocks = on_plane([WORKED_REGION], WORKED_BLOCKS)
    return region.planar[0], BlockDensity(blocks, WORKED_COUNTS), blocks


def test_block__worked_example_in_fractions(worked):
    region, source, blocks = worked
    # shapely reproduces the hand computation (areal weighting, Goodchild & Lam 1980) ...
    assert overlay_total(blocks.planar, WORKED_COUNTS, region) == pytest.approx(float(WORKED_TOTAL), rel=1e-12)
    # ... and so does the view's exact total
    view = source.for_region(region)
    assert view.exact_total() == pytest.approx(float(WORKED_TOTAL), rel=1e-12)
    # a region holding every block gets every person: 8 + 3 + 6
    assert source.for_region(box(-KM, -KM, 7 * KM, 6 * KM)).exact_total() == pytest.approx(17.0, rel=1e-12)
    # the part of R inside C only: 3/2 (hand computation above), as a region or as a clip of R
    part = shapely.intersection(region, WORKED_BLOCKS[2])
    assert source.for_region(part).exact_total() == pytest.approx(1.5, rel=1e-12)
    assert view.exact_total(WORKED_BLOCKS[2]) == pytest.approx(1.5, rel=1e-12)


def test_block__density_is_count_over_block_area(worked):
    _, source, _ = worked
    x = np.array([1 * KM, 5 * KM, 0.5 * KM, 3.9 * KM, 5 * KM])
    y = np.array([1 * KM, 2.5 * KM, 4 * KM, 4 * KM, 4 * KM])
    # A: 8 / 8 km², B: 3 / 6 km², C: 6 / 6 km², above C's hypotenuse: 0, above B: 0 (constructed here)
    expected = np.array([1.0, 0.5, 1.0, 0.0, 0.0]) / KM**2
    np.testing.assert_allclose(source.density(x, y), expected, rtol=1e-12, atol=0)


def test_block__density_outside_the_blocks_bounding_box_is_zero(worked):
    _, source, _ = worked
    # (6.5 km, 1 km) lies east of B, (2 km, -1 km) south of A: no block holds them (constructed here);
    # outside the blocks' bounding box, so the block index must not clamp them into an edge cell
    got = source.density(np.array([6.5 * KM, 2 * KM]), np.array([1 * KM, -1 * KM]))
    np.testing.assert_array_equal(got, [0.0, 0.0])


def test_block__proposal_draws_blocks_by_count_and_points_uniformly(worked):
    _, source, _ = worked
    everything = box(-KM, -KM, 7 * KM, 6 * KM)
    proposal = source.for_region(everything).proposal()
    assert proposal.total == pytest.approx(17.0)
    assert proposal.dims == 3 and proposal.area == proposal.total
    n = 200_000
    px, py = proposal.map(np.random.default_rng(11).random((n, proposal.dims)))
    in_a = shapely.contains_xy(WORKED_BLOCKS[0], px, py)
    in_b = shapely.contains_xy(WORKED_BLOCKS[1], px, py)
    in_c = shapely.contains_xy(WORKED_BLOCKS[2], px, py)
    assert np.all(in_a | in_b | in_c | shapely.intersects_xy(shapely.union_all(WORKED_BLOCKS).boundary, px, py))
    # block frequencies 8/17, 3/17, 6/17 within 4 binomial standard errors (common practice)
    for hits, p in ((in_a, 8 / 17), (in_b, 3 / 17), (in_c, 6 / 17)):
        assert abs(hits.mean() - p) <= 4 * math.sqrt(p * (1 - p) / n)
    # uniform inside the triangle C: the part below y = 3.5 km holds 3/4 of its area (the part
    # above is a similar triangle of half the height, area 1/4; constructed here)
    below = (py[in_c] < 3.5 * KM).mean()
    m = int(in_c.sum())
    assert abs(below - 0.75) <= 4 * math.sqrt(0.75 * 0.25 / m)
    # uniform inside the rectangle A: left half holds 1/2
    left = (px[in_a] < 2 * KM).mean()
    assert abs(left - 0.5) <= 4 * math.sqrt(0.25 / int(in_a.sum()))


# --- a grid of census-style blocks -------------------------------------------------------------

CELL = 500.0
N_SIDE = 24


@pytest.fixture(scope="module")
def grid():
    """24 x 24 blocks of 500 m with Poisson counts around a town (invented, fixed seed)."""
    rng = np.random.default_rng(20240612)
    ix, iy = (a.ravel() for a in np.meshgrid(np.arange(N_SIDE), np.arange(N_SIDE)))
    cells = shapely.box(ix * CELL, iy * CELL, (ix + 1) * CELL, (iy + 1) * CELL)
    centre = shapely.get_coordinates(shapely.centroid(cells))
    counts = rng.poisson(2000 * np.exp(-np.sum((centre - [4000, 7000]) ** 2, 1) / (2 * 2000**2)) + 20).astype(float)
    counts[:5] = 0.0  # some empty blocks
    t = np.linspace(0, 2 * np.pi, 400, endpoint=False)
    r = 4500 * (1 + 0.2 * np.sin(3 * t))
    regions = {
        "wobbly": Polygon(np.column_stack([6000 + r * np.cos(t), 6000 + r * np.sin(t)])),
        "holed": box(1234, 2345, 9876, 8765).difference(Polygon([(3000, 4000), (7000, 4500), (5000, 7500)])),
        "multi": shapely.MultiPolygon([box(100, 100, 1700, 900), box(10_300, 10_100, 11_900, 11_700)]),
        "touching": box(N_SIDE * CELL, 0, N_SIDE * CELL + 1000, 5000),  # shares an edge only
        "outside": box(20_000, 20_000, 21_000, 21_000),
    }
    pregions, pblocks = on_plane(list(regions.values()), cells)
    return dict(zip(regions, pregions.planar)), pblocks, counts


def test_block__exact_total_is_areal_weighting(grid):
    regions, blocks, counts = grid
    source = BlockDensity(blocks, counts)
    for name, region in regions.items():
        ref = overlay_total(blocks.planar, counts, region)
        assert source.for_region(region).exact_total() == pytest.approx(ref, rel=1e-12, abs=1e-9), name
    assert source.for_region(regions["touching"]).exact_total() == 0.0
    assert source.for_region(regions["outside"]).exact_total() == 0.0
    # the whole grid: the sum of the counts
    whole = box(-1, -1, N_SIDE * CELL + 1, N_SIDE * CELL + 1)
    assert source.for_region(whole).exact_total() == pytest.approx(counts.sum(), rel=1e-12)


def test_block__density_at_random_points(grid):
    _, blocks, counts = grid
    source = BlockDensity(blocks, counts)
    rng = np.random.default_rng(3)
    x = rng.uniform(0, N_SIDE * CELL, 5000)
    y = rng.uniform(0, N_SIDE * CELL, 5000)
    # block index from the grid arithmetic (constructed here): row-major over (iy, ix)
    ix, iy = np.floor(x / CELL).astype(int), np.floor(y / CELL).astype(int)
    expected = counts[iy * N_SIDE + ix] / CELL**2
    np.testing.assert_allclose(source.density(x, y), expected, rtol=1e-12, atol=0)
    # a view answers the same densities (blocks do not depend on the region)
    view = source.for_region(box(0, 0, N_SIDE * CELL, N_SIDE * CELL))
    np.testing.assert_allclose(view.density(x, y), expected, rtol=1e-12, atol=0)


def test_block__proposal_leaves_out_empty_and_far_blocks(grid):
    regions, blocks, counts = grid
    source = BlockDensity(blocks, counts)
    # no block shares area with these regions: an empty proposal (total 0, nothing to draw)
    for name in ("outside", "touching"):
        empty_proposal = source.for_region(regions[name]).proposal()
        assert empty_proposal.total == 0.0 and empty_proposal.draw is None
    region = regions["multi"]
    proposal = source.for_region(region).proposal()
    # total = counts of the blocks sharing area with the region (shapely, interiors meet)
    meets = shapely.intersects(blocks.planar, region) & ~shapely.touches(blocks.planar, region)
    assert proposal.total == pytest.approx(counts[meets].sum(), rel=1e-12)
    # empty blocks (the first five) never receive a point
    px, py = proposal.map(np.random.default_rng(5).random((20_000, 3)))
    empty = shapely.union_all(blocks.planar[:5])
    assert not shapely.contains_xy(empty, px, py).any()


def test_block__all_zero_counts_give_no_proposal(grid):
    regions, blocks, counts = grid
    source = BlockDensity(blocks, np.zeros_like(counts))
    view = source.for_region(regions["wobbly"])
    proposal = view.proposal()
    assert proposal.total == 0.0 and proposal.draw is None  # density 0 here, known without sampling
    assert view.exact_total() == 0.0


@pytest.mark.parametrize(
    "schema, values, message",
    [
        ({"pop": "int"}, [5, 6], "is not a field"),  # missing field
        ({"population": "str"}, ["12", "many"], "'many'"),  # non-numeric
        ({"population": "int"}, [4, -3], "-3"),  # negative
        ({"population": "float"}, [4.0, None], "None"),  # null
        ({"population": "str"}, ["4", "nan"], "'nan'"),  # not a number (GeoPackage stores a float NaN as NULL)
    ],
)
def test_block_counts__refuses_bad_counts(tmp_path, schema, values, message):
    field = list(schema)[0]
    path = write_blocks(tmp_path / "b.gpkg", [box(0, 0, 1, 1), box(1, 0, 2, 1)],
                        [{field: v} for v in values], schema)
    layer = read_layer(path)
    with pytest.raises(LayerError, match="population") as info:
        block_counts(layer, "population")
    assert message in str(info.value)


def test_block_counts__reads_numbers_and_numeric_text(tmp_path):
    path = write_blocks(tmp_path / "b.gpkg", [box(0, 0, 1, 1), box(1, 0, 2, 1), box(2, 0, 3, 1)],
                        [{"population": v} for v in ("12", "0", "3.5")], {"population": "str"})
    np.testing.assert_array_equal(block_counts(read_layer(path), "population"), [12.0, 0.0, 3.5])


# --- rasters -----------------------------------------------------------------------------------

#: WGS84 quadrangle areas, computed from Snyder 1987 eq. 3-12, A = (a²/2) Δλ (q(φ2) − q(φ1)),
#: to 40 digits (pyproj.Geod, Karney 2013, agrees): (lon1, lat1, lon2, lat2) -> m²
QUADRANGLES = [
    ((0.0, 0.0, 1.0, 1.0), 12_308_463_893.975352),
    ((0.0, 45.0, 1.0, 46.0), 8_686_494_956.670401),
    ((0.0, 80.0, 1.0, 81.0), 2_058_274_854.323786),
    ((10.0, 40.0, 20.0, 50.0), 875_097_690_661.69982),
    ((0.0, 0.0, 10.0, 10.0), 1_224_832_293_977.7725),
    ((170.0, -60.0, 180.0, -50.0), 711_460_782_666.68829),
]


def test_q_function_here_reproduces_references():
    # the test's own closed form (floats) against the 40-digit values of Snyder 1987 eq. 3-12
    # above (so the ratios below rest on it)
    for (lon1, lat1, lon2, lat2), ref in QUADRANGLES:
        assert quad_area(lon1, lat1, lon2, lat2) == pytest.approx(ref, rel=1e-12)


def _cell_raster(tmp_path, bounds, value=1.0):
    """A 3-row, 2-column geographic grid whose middle-right cell is `bounds`; a plane centred on it.

    Returns the raster's path, the small region's projected layer (its plane) and the region."""
    lon1, lat1, lon2, lat2 = bounds
    d = lon2 - lon1
    path = write_raster(tmp_path / "cells.tif", np.full((3, 2), value), west=lon1 - d, north=lat2 + d, dx=d)
    lon_c, lat_c = (lon1 + lon2) / 2, (lat1 + lat2) / 2
    crs = f"+proj=laea +lat_0={lat_c} +lon_0={lon_c} +datum=WGS84 +units=m +no_defs"
    small = plane_of(crs, [box(lon_c - d / 20, lat_c - d / 20, lon_c + d / 20, lat_c + d / 20)])
    return path, small.plane, small.planar[0]


@pytest.mark.parametrize("bounds, area", QUADRANGLES)
def test_raster__geographic_cell_area_is_the_quadrangle(tmp_path, bounds, area):
    # a count of 1 per cell means a density of 1 / (cell area) inside the cell (cell area from
    # Snyder 1987 eq. 3-12)
    path, plane, region = _cell_raster(tmp_path, bounds)
    with RasterDensity(path, plane) as source:
        view = source.for_region(region)
        got = view.density(np.array([0.0, 100.0]), np.array([0.0, -100.0]))  # the cell centre is the plane origin
    np.testing.assert_allclose(1.0 / got, area, rtol=1e-11)


@pytest.mark.parametrize("values, factor", [("per-m2", 1.0), ("per-ha", 1e-4), ("per-km2", 1e-6)])
def test_raster__density_units_do_not_depend_on_cell_area(tmp_path, values, factor):
    # a value per unit area is already a density: 1 ha = 1e4 m², 1 km² = 1e6 m² (SI)
    path, plane, region = _cell_raster(tmp_path, (0.0, 45.0, 1.0, 46.0), value=250.0)
    with RasterDensity(path, plane, values=values) as source:
        got = source.for_region(region).density(np.array([0.0]), np.array([0.0]))
    np.testing.assert_allclose(got, 250.0 * factor, rtol=1e-12)


def test_raster__constant_density_in_the_plane(tmp_path):
    # a raster in the equal-area plane itself: 100 m cells, 0.004 per m²; the total over a region is
    # 0.004 x its shapely area (cells are exact squares of the plane; constructed here)
    path = write_raster(tmp_path / "flat.tif", np.full((60, 80), 0.004), west=-4000, north=3000, dx=100, crs=PLANE)
    t = np.linspace(0, 2 * np.pi, 300, endpoint=False)
    region = Polygon(np.column_stack([200 + 1800 * np.cos(t), -300 + 1200 * np.sin(t) * (1 + 0.2 * np.cos(2 * t))]))
    (pregion,) = on_plane([region])
    with RasterDensity(path, pregion.plane, values="per-m2") as source:
        view = source.for_region(pregion.planar[0])
    assert view.exact_total() == pytest.approx(0.004 * region.area, rel=1e-9)
    rng = np.random.default_rng(1)
    x, y = rng.uniform(-1600, 2000, 3000), rng.uniform(-1260, 660, 3000)  # the region's bounds
    keep = shapely.contains_xy(region, x, y)
    assert keep.sum() > 1000
    np.testing.assert_allclose(view.density(x[keep], y[keep]), 0.004, rtol=1e-12)
    # far outside the raster window: 0
    assert view.density(np.array([50_000.0]), np.array([0.0]))[0] == 0.0


GRID_WEST, GRID_NORTH, GRID_D = 10.20, 47.35, 0.01


def _count_grid(tmp_path, nodata=None, holes=()):
    """A 0.01° count grid, 20 rows x 30 columns, NW corner 10.20 E 47.35 N (invented, fixed seed)."""
    rng = np.random.default_rng(99)
    data = rng.uniform(0, 50, (20, 30)).round(1)
    for r, c, v in holes:
        data[r, c] = v
    path = write_raster(tmp_path / "grid.tif", data, west=GRID_WEST, north=GRID_NORTH, dx=GRID_D, nodata=nodata)
    return path, data


def test_raster__region_holding_the_grid_gets_the_sum_of_cells(tmp_path):
    path, data = _count_grid(tmp_path)
    (big,) = project_layers([layer_from_geometries([box(10.1, 47.1, 10.6, 47.45)], "EPSG:4326")],
                            crs=PLANE, densify_m=500.0)
    with RasterDensity(path, big.plane) as source:
        view = source.for_region(big.planar[0])
    assert view.exact_total() == pytest.approx(data.sum(), rel=1e-9)
    assert view.proposal().total == pytest.approx(data.sum(), rel=1e-12)


def test_raster__nodata_and_nan_cells_are_empty_and_counted_once(tmp_path):
    holes = [(3, 4, -1.0), (3, 5, -1.0), (10, 20, -1.0), (15, 2, np.nan)]
    path, data = _count_grid(tmp_path, nodata=-1.0, holes=holes)
    valid = np.where(np.isnan(data) | (data == -1.0), 0.0, data)
    (big,) = project_layers([layer_from_geometries([box(10.1, 47.1, 10.6, 47.45), box(10.15, 47.1, 10.6, 47.4)],
                                                   "EPSG:4326")], crs=PLANE, densify_m=500.0)
    with RasterDensity(path, big.plane) as source:
        views = [source.for_region(region) for region in big.planar]  # two windows over the same cells
        for view in views:
            assert view.exact_total() == pytest.approx(valid.sum(), rel=1e-9)
            assert len(view.nodata_cells) == 4  # each window meets all four
        # the nodata cell (row 3, column 4) has density 0: its centre 10.245 E, 47.315 N
        x, y = pyproj.Transformer.from_crs("EPSG:4326", PLANE, always_xy=True).transform(10.245, 47.315)
        assert views[0].density(np.array([x]), np.array([y]))[0] == 0.0
        # one warning for the distinct cells of both windows: 4, not 8
        with pytest.warns(AreamcWarning, match=r"4 nodata cell") as record:
            assert warn_nodata(source, views) == 4
        assert len(record) == 1
        # no nodata met: no warning
        (clean,) = project_layers([layer_from_geometries([box(10.30, 47.30, 10.33, 47.33)], "EPSG:4326")],
                                  crs=PLANE, densify_m=500.0)
        clean_view = source.for_region(clean.planar[0])
        with warnings.catch_warnings():
            warnings.simplefilter("error", AreamcWarning)
            assert warn_nodata(source, [clean_view]) == 0


def test_raster__reads_only_the_window_over_the_region(tmp_path, monkeypatch):
    # 600 x 600 cells of 100 m; a 1 km square region covers 10 x 10 of them
    path = write_raster(tmp_path / "big.tif", np.full((600, 600), 2.0), west=-30_000, north=30_000, dx=100,
                        crs=PLANE, dtype="float32")
    (region,) = on_plane([box(5_050, -12_000, 6_050, -11_000)])
    with RasterDensity(path, region.plane, values="count") as source:
        windows = []
        original = source._ds.read

        def recording_read(*args, **kwargs):
            windows.append(kwargs.get("window"))
            return original(*args, **kwargs)

        monkeypatch.setattr(source._ds, "read", recording_read)
        view = source.for_region(region.planar[0])
    assert len(windows) == 1 and windows[0] is not None
    win = windows[0]
    assert win.width <= 13 and win.height <= 13  # 10 cells + at most 1.5 margin each side
    # the window still covers the region: columns 350..360, rows 410..420 (constructed here)
    assert win.col_off <= 350 and win.col_off + win.width >= 360
    assert win.row_off <= 410 and win.row_off + win.height >= 420
    assert view.counts.shape == (win.height, win.width)
    # 2 per 100 m cell = 2e-4 per m², over 1 km²: 200
    assert view.exact_total() == pytest.approx(200.0, rel=1e-9)


def test_raster__geographic_importance_draws_uniform_in_area(tmp_path):
    # one 10° cell, 40..50 N, 10..20 E; points must be uniform in area, so the share north of
    # 45 N is the quadrangle-area ratio (Snyder 1987 eq. 3-12), not 1/2
    path = write_raster(tmp_path / "ten.tif", np.full((1, 1), 1000.0), west=10.0, north=50.0, dx=10.0)
    crs = "+proj=laea +lat_0=45 +lon_0=15 +datum=WGS84 +units=m +no_defs"
    region = plane_of(crs, [box(10.0, 40.0, 20.0, 50.0)])
    with RasterDensity(path, region.plane) as source:
        proposal = source.for_region(region.planar[0]).proposal()
    assert proposal.total == pytest.approx(1000.0)
    n = 200_000
    px, py = proposal.map(np.random.default_rng(2024).random((n, 3)))
    lon, lat = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True).transform(px, py)
    lon, lat = np.asarray(lon), np.asarray(lat)
    assert lon.min() >= 10.0 - 1e-9 and lon.max() <= 20.0 + 1e-9
    assert lat.min() >= 40.0 - 1e-9 and lat.max() <= 50.0 + 1e-9
    p_north = quad_area(10, 45, 20, 50) / quad_area(10, 40, 20, 50)
    assert abs(p_north - 0.5) > 0.02  # the check can tell area from latitude
    assert abs((lat > 45).mean() - p_north) <= 4 * math.sqrt(p_north * (1 - p_north) / n)
    # finer: 1° latitude bands x 1° longitude bands, chi-square against quadrangle shares
    band = np.array([quad_area(10, 40 + k, 11, 41 + k) for k in range(10)])
    expected = np.outer(band / band.sum(), np.full(10, 0.1)) * n
    counts, _, _ = np.histogram2d(lat, lon, bins=[np.arange(40, 51), np.arange(10, 21)])
    chi2 = float(((counts - expected) ** 2 / expected).sum())
    assert chi2 < stats.chi2.ppf(1 - 1e-4, df=99)


def _raster_around(tmp_path, crs, name, lon=10.0, lat=47.0, half=1000.0, cell=100.0, value=1.0):
    """A 20 x 20 raster of `cell` units in `crs`, centred on (lon, lat), with every cell holding `value`."""
    x, y = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True).transform(lon, lat)
    n = int(2 * half / cell)
    return write_raster(tmp_path / name, np.full((n, n), value), west=x - half, north=y + half, dx=cell, crs=crs)


#: Two small regions of the LAEA plane (centred on 10 E 47 N) inside every raster of _raster_around.
SMALL_A = box(-400, -400, 0, 0)
SMALL_B = box(100, 50, 450, 400)


@pytest.mark.parametrize("crs", ["EPSG:3857", "EPSG:32632"])
def test_raster__non_equal_area_projected_raster_has_no_proposal_for_any_region(tmp_path, crs):
    # Web Mercator (EPSG:3857) distorts areas by sec²φ (Snyder 1987, ch. 7 Mercator [memory]) and
    # UTM (EPSG:32632) by k² with k = 0.9996 on the central meridian (Snyder 1987, ch. 8 [memory]):
    # cells are not equal in area, so no importance sampler, whichever region asks first
    path = _raster_around(tmp_path, crs, "proj.tif")
    (layer,) = on_plane([SMALL_A, SMALL_B])
    a, b = layer.planar
    with RasterDensity(path, layer.plane) as source:
        va, vb = source.for_region(a), source.for_region(b)
        assert [vb.proposal(), va.proposal(), vb.proposal()] == [None, None, None]
        # the exact totals are still there: the cells' counts, by cell fractions
        assert va.exact_total() > 0 and vb.exact_total() > 0


@pytest.mark.parametrize("crs", ["EPSG:6933", "EPSG:3035"])
def test_raster__equal_area_projected_raster_gives_proposals_per_region(tmp_path, crs):
    # EPSG:6933 (cylindrical equal-area on WGS84, Snyder 1987 ch. 10 [memory]) and EPSG:3035
    # (ETRS89-LAEA, Snyder 1987 ch. 24) preserve areas: each cell is drawn by its count and a point
    # uniform in it, so P(point in region) x proposal total is the region's total (binomial band)
    path = _raster_around(tmp_path, crs, "ea.tif")
    (layer,) = on_plane([SMALL_A, SMALL_B])
    a, b = layer.planar
    with RasterDensity(path, layer.plane) as source:
        va, vb = source.for_region(a), source.for_region(b)
        proposals = {"b": vb.proposal(), "a": va.proposal()}
        assert all(p is not None and p.total > 0 for p in proposals.values())
        n = 100_000
        for name, view, region in (("a", va, a), ("b", vb, b)):
            proposal = proposals[name]
            ref = brute_cell_total(path, region, PLANE)
            px, py = proposal.map(np.random.default_rng(41).random((n, 3)))
            p = ref / proposal.total
            assert 0.2 < p < 0.95, name  # guard on the test design: the window is larger than the region
            hit = shapely.contains_xy(region, px, py).mean()
            assert abs(hit - p) <= 4 * math.sqrt(p * (1 - p) / n), name
            assert view.exact_total() == pytest.approx(ref, rel=1e-9), name


def test_raster__bad_files_and_options(tmp_path):
    (region,) = on_plane([box(0, 0, 100, 100)])
    plane = region.plane
    text = tmp_path / "notes.tif"
    text.write_text("this is not a raster\n")
    with pytest.raises(LayerError, match="not a readable raster"):
        RasterDensity(str(text), plane)
    with pytest.raises(LayerError, match="no such file"):
        RasterDensity(str(tmp_path / "missing.tif"), plane)
    bare = write_raster(tmp_path / "bare.tif", np.ones((4, 4)), west=0, north=4, dx=1, crs=None)
    with pytest.raises(LayerError, match="no CRS"):
        RasterDensity(bare, plane)
    good = write_raster(tmp_path / "good.tif", np.ones((4, 4)), west=10, north=47.1, dx=0.01)
    # library messages name the Python parameter (api: errors take param=)
    with pytest.raises(OptionError, match=r"^band: ") as info:
        RasterDensity(good, plane, band=2)
    assert info.value.param == "band"
    with pytest.raises(OptionError, match=r"^values: ") as info:
        RasterDensity(good, plane, values="per-acre")
    assert info.value.param == "values"


def test_raster__negative_value_stops_when_the_view_is_built(tmp_path):
    path, _ = _count_grid(tmp_path, holes=[(7, 8, -2.5)])
    (big,) = project_layers([layer_from_geometries([box(10.1, 47.1, 10.6, 47.45)], "EPSG:4326")], crs=PLANE)
    with RasterDensity(path, big.plane) as source:
        with pytest.raises(InputError, match=r"negative value -2\.5 at row 7, column 8"):
            source.for_region(big.planar[0])


def test_raster__no_overlap(tmp_path):
    path, _ = _count_grid(tmp_path)
    (far,) = on_plane([box(300_000, 300_000, 310_000, 310_000)])
    with RasterDensity(path, far.plane) as source:
        assert not source.overlaps(far.planar[0])
        view = source.for_region(far.planar[0])
    assert view.exact_total() == 0.0
    proposal = view.proposal()
    assert proposal.total == 0.0 and proposal.draw is None
    assert view.density(np.array([305_000.0]), np.array([305_000.0]))[0] == 0.0


def test_raster__region_just_beyond_the_edge_does_not_overlap(tmp_path):
    # the count grid spans 10.20..10.50 E (30 cells of 0.01°, constructed here); the region starts half a
    # cell east of its edge, so neither it nor its bounding box meets the raster
    path, _ = _count_grid(tmp_path)
    (near,) = project_layers([layer_from_geometries([box(10.505, 47.2, 10.555, 47.3)], "EPSG:4326")],
                             crs=PLANE, densify_m=200.0)
    with RasterDensity(path, near.plane) as source:
        assert source.for_region(near.planar[0]).exact_total() == 0.0  # the cells really miss it
        assert not source.overlaps(near.planar[0])
    with pytest.raises(LayerError, match="does not overlap"):
        build_density(read_density(path), near.plane, regions=near).close()


def test_raster__the_file_is_closed_after_with_and_close(tmp_path):
    path, _ = _count_grid(tmp_path)
    (region,) = on_plane([box(0, 0, 100, 100)])
    with RasterDensity(path, region.plane) as src:
        assert not src._ds.closed
    assert src._ds.closed
    other = RasterDensity(path, region.plane)
    other.close()
    assert other._ds.closed


# --- views of several regions: no shared state ---------------------------------------------------


def brute_cell_total(path, region, plane_crs) -> float:
    """Σ count |cell ∩ region| / |cell| over every cell of the raster at `path` (cell fractions).

    Built here independently of areamc: cell corners from the raster's affine transform (rasterio),
    projected to the plane with pyproj, each cell the quadrilateral of its 4 corners; intersections
    by shapely.  Nodata and NaN cells count 0."""
    with rasterio.open(path) as ds:
        data = ds.read(1, masked=True).astype(float).filled(0.0)
        transform, crs = ds.transform, ds.crs.to_wkt()
    data = np.where(np.isnan(data), 0.0, data)
    rows, cols = data.shape
    trans = pyproj.Transformer.from_crs(crs, plane_crs, always_xy=True)
    cells = []
    for r in range(rows):
        for c in range(cols):
            corners = [transform @ (c, r), transform @ (c + 1, r), transform @ (c + 1, r + 1), transform @ (c, r + 1)]
            px, py = trans.transform([p[0] for p in corners], [p[1] for p in corners])
            cells.append(Polygon(zip(px, py)))
    cells = np.array(cells, dtype=object)
    share = shapely.area(shapely.intersection(cells, region)) / shapely.area(cells)
    return float(np.sum(data.ravel() * share))


def _two_grid_regions():
    """Region a (a wobbly disk in the west of the count grid) and b (a box in the east), projected together."""
    t = np.linspace(0, 2 * np.pi, 200, endpoint=False)
    a = Polygon(np.column_stack([10.30 + 0.06 * np.cos(t) * (1 + 0.15 * np.sin(3 * t)), 47.25 + 0.04 * np.sin(t)]))
    b = box(10.405, 47.175, 10.485, 47.305)
    (layer,) = project_layers([layer_from_geometries([a, b], "EPSG:4326")], crs=PLANE, densify_m=200.0)
    return layer


def test_raster_views__interleaved_calls_answer_for_their_own_region(tmp_path):
    path, data = _count_grid(tmp_path)
    layer = _two_grid_regions()
    a, b = layer.planar
    ref = {"a": brute_cell_total(path, a, PLANE), "b": brute_cell_total(path, b, PLANE)}
    assert abs(ref["a"] - ref["b"]) > 0.1 * max(ref.values())  # guard: the regions' totals differ
    with RasterDensity(path, layer.plane) as src:
        assert not hasattr(src, "prepare") and not hasattr(src, "finish")
        va = src.for_region(a)
        vb = src.for_region(b)
        # exact totals, in the order that used to go stale: b, a, b
        got = [("b", vb.exact_total()), ("a", va.exact_total()), ("b", vb.exact_total())]
        for name, total in got:
            assert total == pytest.approx(ref[name], rel=1e-9), name
        # densities at points inside each region: count / closed-form cell area (Snyder 1987 eq. 3-12),
        # cell found here from the lon/lat of the point
        to_ll = pyproj.Transformer.from_crs(PLANE, "EPSG:4326", always_xy=True)
        rng = np.random.default_rng(77)

        def expected_density(region):
            xmin, ymin, xmax, ymax = region.bounds
            x, y = rng.uniform(xmin, xmax, 4000), rng.uniform(ymin, ymax, 4000)
            keep = shapely.contains_xy(region, x, y)
            x, y = x[keep], y[keep]
            lon, lat = (np.asarray(v) for v in to_ll.transform(x, y))
            col = np.floor((lon - GRID_WEST) / GRID_D).astype(int)
            row = np.floor((GRID_NORTH - lat) / GRID_D).astype(int)
            west, north = GRID_WEST + col * GRID_D, GRID_NORTH - row * GRID_D
            area = np.array([quad_area(w, n - GRID_D, w + GRID_D, n) for w, n in zip(west, north)])
            return x, y, data[row, col] / area

        pts = {"a": expected_density(a), "b": expected_density(b)}
        views = {"a": va, "b": vb}
        for name in ("b", "a", "b"):
            x, y, want = pts[name]
            np.testing.assert_allclose(views[name].density(x, y), want, rtol=1e-9, err_msg=name)
        # proposals, b, a, b: each draws over its own region's cells (P(in region) x total = its total)
        proposals = [("b", vb.proposal()), ("a", va.proposal()), ("b", vb.proposal())]
    assert proposals[0][1].total == proposals[2][1].total
    assert proposals[0][1].total != proposals[1][1].total
    regions = {"a": a, "b": b}
    n = 100_000
    for k, (name, proposal) in enumerate(proposals):
        px, py = proposal.map(np.random.default_rng(300 + k).random((n, 3)))
        p = ref[name] / proposal.total
        assert 0.2 < p < 1.0, name  # guard on the test design
        hit = shapely.contains_xy(regions[name], px, py).mean()
        assert abs(hit - p) <= 4 * math.sqrt(p * (1 - p) / n), (name, hit, p)


def test_block_views__interleaved_calls_answer_for_their_own_region(grid):
    regions, blocks, counts = grid
    src = BlockDensity(blocks, counts)
    assert not hasattr(src, "prepare") and not hasattr(src, "finish")
    a, b = regions["wobbly"], regions["multi"]
    ref = {"a": overlay_total(blocks.planar, counts, a), "b": overlay_total(blocks.planar, counts, b)}
    assert abs(ref["a"] - ref["b"]) > 0.1 * max(ref.values())  # guard: the regions' totals differ
    va = src.for_region(a)
    vb = src.for_region(b)
    for name, total in [("b", vb.exact_total()), ("a", va.exact_total()), ("b", vb.exact_total())]:
        assert total == pytest.approx(ref[name], rel=1e-12), name
    # a clip is applied to the view's own region: a ∩ b's bounding box
    clip = box(*b.bounds)
    assert va.exact_total(clip) == pytest.approx(overlay_total(blocks.planar, counts, shapely.intersection(a, clip)),
                                                 rel=1e-12, abs=1e-9)
    # proposal totals: counts of the blocks sharing area with each region (shapely)
    meets = {name: shapely.intersects(blocks.planar, g) & ~shapely.touches(blocks.planar, g)
             for name, g in (("a", a), ("b", b))}
    views = {"a": va, "b": vb}
    for name in ("b", "a", "b"):
        assert views[name].proposal().total == pytest.approx(counts[meets[name]].sum(), rel=1e-12), name
    # draws of b's proposal stay in b's blocks even after a's proposal was built
    px, py = vb.proposal().map(np.random.default_rng(8).random((5000, 3)))
    assert shapely.contains_xy(shapely.union_all(blocks.planar[meets["b"]]).buffer(1e-6), px, py).all()


def test_views_are_immutable(tmp_path, grid):
    regions, blocks, counts = grid
    path, _ = _count_grid(tmp_path)
    layer = _two_grid_regions()
    expression = ExpressionDensity("1e-6", layer.plane)
    with RasterDensity(path, layer.plane) as raster:
        views = [raster.for_region(layer.planar[0]), BlockDensity(blocks, counts).for_region(regions["wobbly"]),
                 expression.for_region(layer.planar[0])]
    for view in views:
        assert dataclasses.is_dataclass(view)
        with pytest.raises(dataclasses.FrozenInstanceError):
            view.region = layer.planar[1]
        with pytest.raises(dataclasses.FrozenInstanceError):
            view.nodata_cells = np.arange(3)
    # an expression view has no exact total and no sampler
    assert views[2].exact_total() is None and views[2].proposal() is None


# --- areamc.exact: areal weighting and cell fractions, by hand ------------------------------------


def test_exact_block_total__hand_example_in_fractions():
    # areal weighting (Goodchild & Lam 1980 [memory]): Σ rate_i |b_i ∩ g|, rates = count / area.
    # The worked example above in km: rates 8/8, 3/6, 6/6; over R = [2,5]x[1,4] the total is 9/2
    blocks = [box(0, 0, 4, 2), box(4, 0, 6, 3), Polygon([(0, 2), (4, 2), (0, 5)])]
    rates = [Fraction(8, 8), Fraction(3, 6), Fraction(6, 6)]
    assert block_total(blocks, [float(r) for r in rates], box(2, 1, 5, 4)) == pytest.approx(float(WORKED_TOTAL),
                                                                                             rel=1e-12)
    # g = the triangle x + y ≤ 4 (hand): A ∩ g = ∫_0^4 min(2, 4 − x) dx = 4 + 2 = 6 -> 6;
    # B ∩ g: x ≥ 4 only at the point (4, 0) -> 0; C ∩ g: C lies in y ≥ 2, x ≤ 4(5 − y)/3, and g asks
    # x ≤ 4 − y: the part of C under y = 4 − x is the triangle (0,2) (2,2) (0,4), area 2 -> 2.  Total 8.
    tri = Polygon([(0, 0), (4, 0), (0, 4)])
    want = rates[0] * 6 + rates[1] * 0 + rates[2] * 2
    assert want == 8
    assert block_total(blocks, [float(r) for r in rates], tri) == pytest.approx(float(want), rel=1e-12)
    # blocks that miss the geometry add nothing; no blocks, nothing
    assert block_total(blocks, [1.0, 1.0, 1.0], box(10, 10, 11, 11)) == 0.0
    assert block_total([], [], box(0, 0, 1, 1)) == 0.0


def test_exact_cell_total__hand_example_in_fractions():
    # cell fractions: Σ count |cell ∩ g| / |cell|.  Cells (hand-built): unit squares
    # [0,1]x[0,1] (4), [1,2]x[0,1] (2), [0,1]x[1,2] (6), [1,2]x[1,2] (0), [2,3]x[0,1] (5),
    # and a 2 x 2 cell [3,5]x[0,2] (10)
    cells = [box(0, 0, 1, 1), box(1, 0, 2, 1), box(0, 1, 1, 2), box(1, 1, 2, 2), box(2, 0, 3, 1), box(3, 0, 5, 2)]
    counts = [4.0, 2.0, 6.0, 0.0, 5.0, 10.0]
    # g = triangle (0,0) (2,0) (0,2), x + y ≤ 2: the first square lies inside (1); [1,2]x[0,1] holds
    # ∫_1^2 (2 − x) dx = 1/2; [0,1]x[1,2] 1/2 by symmetry; [1,2]x[1,2] and [2,3]x[0,1] meet it in a
    # point only.  4·1 + 2·1/2 + 6·1/2 = 8
    tri = Polygon([(0, 0), (2, 0), (0, 2)])
    want = Fraction(4) * 1 + Fraction(2) * Fraction(1, 2) + Fraction(6) * Fraction(1, 2)
    assert want == 8
    assert cell_total(cells, counts, tri) == pytest.approx(float(want), rel=1e-12)
    # g = [0.5,4]x[0,1]: 4·1/2 + 2·1 + 5·1 + 10·(1/4) ([3,4]x[0,1] is a quarter of the 2 x 2 cell);
    # [0,1]x[1,2] only touches g along y = 1.  Total 23/2
    want = Fraction(4, 2) + 2 + 5 + Fraction(10, 4)
    assert want == Fraction(23, 2)
    assert cell_total(cells, counts, box(0.5, 0, 4, 1)) == pytest.approx(float(want), rel=1e-12)
    # no cell meets g
    assert cell_total(cells, counts, box(10, 10, 11, 11)) == 0.0


# --- naming a density source: read_density, guess_density_kind, build_density ----------------------


def test_guess_density_kind(tmp_path):
    tif = write_raster(tmp_path / "pop.TIF", np.ones((2, 2)), west=10, north=47, dx=0.01)
    blocks = write_blocks(tmp_path / "blocks.gpkg", [box(0, 0, 1, 1)], [{"population": 1}], {"population": "int"})
    other = tmp_path / "blocks.json"  # an existing file without a raster extension is read as blocks
    other.write_text("{}")
    assert guess_density_kind(tif) == "raster"  # raster extension, any case
    assert guess_density_kind(blocks) == "blocks"
    assert guess_density_kind(str(other)) == "blocks"
    assert guess_density_kind("1e-4 * exp(-x / 1000)") == "expression"
    assert guess_density_kind("250e-6") == "expression"
    for missing in ("missing.tif", "missing.gpkg", "missing.shp"):
        with pytest.raises(LayerError, match="no such file"):
            guess_density_kind(str(tmp_path / missing))
    with pytest.raises(LayerError, match="no such file"):
        read_density(str(tmp_path / "missing.tif"))


def test_read_density__errors_name_their_parameter(tmp_path):
    blocks = write_blocks(tmp_path / "blocks.gpkg", [box(0, 0, 1, 1)], [{"population": 1}], {"population": "int"})
    with pytest.raises(OptionError) as info:
        read_density(blocks)  # guessed as blocks, with no count field
    assert info.value.param == "count_field" and "count_field" in str(info.value)
    with pytest.raises(OptionError) as info:
        read_density("1e-6", kind="census")
    assert info.value.param == "density_kind" and "census" in str(info.value)
    with pytest.raises(OptionError) as info:
        read_density("1e-6", values="per-acre")
    assert info.value.param == "values"
    with pytest.raises(LayerError, match="is not a field") as info:
        read_density(blocks, count_field="persons")
    assert info.value.param == "count_field"


def test_read_and_build_density__each_kind(tmp_path):
    # blocks: the worked example, read from a GeoPackage; the built source reproduces 9/2 (hand, above)
    path = write_blocks(tmp_path / "blocks.gpkg", WORKED_BLOCKS, [{"population": c} for c in WORKED_COUNTS],
                        {"population": "float"})
    spec = read_density(path, count_field="population")
    assert spec.kind == "blocks" and spec.count_field == "population"
    np.testing.assert_array_equal(spec.counts, WORKED_COUNTS)
    region, pblocks = project_layers([layer_from_geometries([WORKED_REGION], PLANE), spec.blocks], crs=PLANE,
                                     densify_m=1e9)
    source = build_density(spec, region.plane, blocks=pblocks)
    assert isinstance(source, BlockDensity)
    assert source.for_region(region.planar[0]).exact_total() == pytest.approx(float(WORKED_TOTAL), rel=1e-12)
    with pytest.raises(ValueError):
        build_density(spec, region.plane)  # the projected blocks are needed
    # expression: the density is the formula's value (arithmetic)
    spec = read_density("2e-6 + 1e-9 * x")
    assert spec.kind == "expression"
    expr = build_density(spec, region.plane)
    assert isinstance(expr, ExpressionDensity)
    np.testing.assert_allclose(expr.density(np.array([1000.0, 3000.0]), np.array([0.0, 0.0])),
                               [2e-6 + 1e-6, 2e-6 + 3e-6], rtol=1e-12)
    # raster: built on the plane; refused when it covers none of the regions
    tif, data = _count_grid(tmp_path)
    spec = read_density(tif, values="count")
    assert (spec.kind, spec.values, spec.band) == ("raster", "count", 1)
    (inside,) = project_layers([layer_from_geometries([box(10.1, 47.1, 10.6, 47.45)], "EPSG:4326")],
                               crs=PLANE, densify_m=500.0)
    with build_density(spec, inside.plane, regions=inside) as raster:
        assert isinstance(raster, RasterDensity)
        assert raster.for_region(inside.planar[0]).exact_total() == pytest.approx(data.sum(), rel=1e-9)
    (far,) = on_plane([box(300_000, 300_000, 310_000, 310_000)])
    with pytest.raises(LayerError, match="does not overlap"):
        build_density(spec, far.plane, regions=far)


# --- expressions -------------------------------------------------------------------------------


def test_expression__density_in_plane_and_lonlat_coordinates():
    (region,) = on_plane([box(-5000, -5000, 5000, 5000)])
    rng = np.random.default_rng(8)
    x, y = rng.uniform(-5000, 5000, 500), rng.uniform(-5000, 5000, 500)
    planar = ExpressionDensity("(x**2 + 3*y + 1e8) * 1e-12", region.plane)
    np.testing.assert_allclose(planar.density(x, y), (x**2 + 3 * y + 1e8) * 1e-12, rtol=1e-14)
    # lon/lat in degrees, from pyproj's inverse of the plane (independent transformer)
    lon, lat = pyproj.Transformer.from_crs(PLANE, "EPSG:4326", always_xy=True).transform(x, y)
    geo = ExpressionDensity("1e-6 * lat + 1e-8 * lon", region.plane)
    np.testing.assert_allclose(geo.density(x, y), 1e-6 * np.asarray(lat) + 1e-8 * np.asarray(lon), rtol=1e-12)


@pytest.mark.parametrize(
    "text, shown",
    [("x", "-"), ("log(x)", "nan"), ("sqrt(x)", "nan"), ("exp(x)", "inf"), ("1e-6 * (y - 10)", "-")],
)
def test_expression__negative_or_non_finite_density_stops(text, shown):
    (region,) = on_plane([box(-5000, -5000, 5000, 5000)])
    source = ExpressionDensity(text, region.plane)
    x = np.array([100.0, -2000.0, 3000.0])
    y = np.array([5.0, 1.0, 2.0])
    with pytest.raises(InputError, match="non-negative and finite") as info:
        source.density(x, y)
    message = str(info.value)
    assert repr(text) in message and f"gives {shown}" in message


@pytest.mark.parametrize("text", ["1/0 + x", "5 % 0 + x", "10**400 + x", "(-8)**0.5 + x"])
def test_expression__constant_arithmetic_errors_are_non_finite_densities(text):
    # IEEE 754 as numpy applies it: inf or nan, then refused as a density
    (region,) = on_plane([box(-5000, -5000, 5000, 5000)])
    source = ExpressionDensity(text, region.plane)
    with pytest.raises(InputError, match="non-negative and finite"):
        source.density(np.array([100.0]), np.array([5.0]))


# --- the pilot grid (densities without units) ------------------------------------------------------


@pytest.mark.parametrize("points, side", [(2, 64), (2_000, 64), (100_000, 64), (400_000, 128),
                                          (1_000_000, 256), (10**8, 256)])
def test_grid_side__rule(points, side):
    # the documented rule (docs/methods.md §16a): √n / 4 rounded to a power of two, within 64..256
    assert grid_side(points) == side


def test_grid_proposal__constant_density_draws_uniformly_with_equal_scores():
    # a constant density over a rectangle: every probe equal, so q̃ = (1 − α) c + α c = c; scores d / q̃ = 1
    # and the total T̂ = c |B| (calculus: the integral of a constant); points uniform in the box (binomial band)
    (region,) = on_plane([box(0, 0, 6000, 4000)])
    view = ExpressionDensity("2.5e-4", region.plane).for_region(region.planar[0])
    proposal = grid_proposal(view, 10_000)
    xmin, ymin, xmax, ymax = region.planar[0].bounds
    assert proposal.total == pytest.approx(2.5e-4 * (xmax - xmin) * (ymax - ymin), rel=1e-12)
    u = np.random.default_rng(4).random((20_000, 3))
    x, y = proposal.draw(u)
    assert (x >= xmin).all() and (x < xmax).all() and (y >= ymin).all() and (y < ymax).all()
    np.testing.assert_allclose(proposal.weight(x, y), 1.0, rtol=1e-12)
    west = int(np.sum(x < (xmin + xmax) / 2))
    low, high = stats.binom.ppf([0.0005, 0.9995], 20_000, 0.5)
    assert low <= west <= high


def test_grid_proposal__cells_away_from_the_region_keep_only_the_defensive_share():
    # an L-shaped region holding 7/16 of its box: cells far from it get α ḡ alone, so far more than 7/16 of
    # the points land in the region (a one-sided binomial test at 1e-6 against 7/16; scipy.stats)
    geom = Polygon([(0, 0), (6000, 0), (6000, 1500), (1500, 1500), (1500, 6000), (0, 6000)])
    (region,) = on_plane([geom])
    view = ExpressionDensity("2.5e-4", region.plane).for_region(region.planar[0])
    proposal = grid_proposal(view, 10_000)
    xmin, ymin, xmax, ymax = region.planar[0].bounds
    inside = float(shapely.area(region.planar[0])) / ((xmax - xmin) * (ymax - ymin))
    x, y = proposal.draw(np.random.default_rng(9).random((20_000, 3)))
    hits = int(np.sum(shapely.contains_xy(region.planar[0], x, y)))
    assert hits > stats.binom.ppf(1 - 1e-6, 20_000, inside), (hits / 20_000, inside)


def test_grid_proposal__pilot_blind_to_the_density_samples_the_box_uniformly():
    # a density zero at every probe (a 10 m disk between probes): the pilot is flat, q̃ = 1 per m², T̂ = |B|,
    # and a point's score is its density: plain uniform sampling of the box (Proposal docstring)
    (region,) = on_plane([box(0, 0, 64_000, 64_000)])  # cells of 1000 m, probes at 250, 500, 750 m
    view = ExpressionDensity("where(hypot(x - 100, y - 100) < 10, 1.0, 0.0)", region.plane).for_region(region.planar[0])
    proposal = grid_proposal(view, 2_000)
    assert proposal.total == pytest.approx(64_000.0**2, rel=1e-12)
    u = np.random.default_rng(5).random((5_000, 3))
    x, y = proposal.draw(u)
    np.testing.assert_array_equal(proposal.weight(x, y), view.density(x, y))
    # uniform in the box: the west half holds half the points (binomial, 99.9% band)
    west = int(np.sum(x < 32_000))
    low, high = stats.binom.ppf([0.0005, 0.9995], 5_000, 0.5)
    assert low <= west <= high


def test_grid_proposal__defensive_mixture_bounds_every_score():
    # Hesterberg (1995, Technometrics 37:185-194): with q̃ ≥ α ḡ everywhere, T̂ d / q̃ ≤ |B| d / α,
    # i.e. no point weighs more than 1/α times its uniform-sampling score, even where the pilot is poor
    (region,) = on_plane([box(0, 0, 40_000, 40_000)])
    text = "1e-3 * exp(-((x - 20013)**2 + (y - 7011)**2) / (2 * 40.0**2)) + 1e-6"  # narrower than a cell
    view = ExpressionDensity(text, region.plane).for_region(region.planar[0])
    proposal = grid_proposal(view, 2_000)
    u = np.random.default_rng(6).random((200_000, 3))
    x, y = proposal.draw(u)
    scores = proposal.total * proposal.weight(x, y)
    bound = 40_000.0**2 * view.density(x, y) / GRID_DEFENSIVE
    assert (scores <= bound * (1 + 1e-12)).all()


def test_grid_proposal__is_deterministic_and_checks_its_share():
    (region,) = on_plane([box(0, 0, 5_000, 3_000)])
    view = ExpressionDensity("1e-4 * (1 + sin(x / 700.0) ** 2)", region.plane).for_region(region.planar[0])
    u = np.random.default_rng(7).random((1_000, 3))
    a, b = grid_proposal(view, 50_000), grid_proposal(view, 50_000)
    np.testing.assert_array_equal(a.draw(u), b.draw(u))
    assert a.total == b.total
    for bad in (0.0, -0.1, 1.5):
        with pytest.raises(OptionError, match="defensive"):
            grid_proposal(view, 1_000, defensive=bad)
