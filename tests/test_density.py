"""Tests of ``areamc.density``: block, raster and expression density sources.

Expected values come from outside areamc:

* areal weighting (Goodchild & Lam 1980, Geo-Processing 1:297-312; REFERENCES §7):
  V_t = Σ_s V_s |A_s ∩ A_t| / |A_s|, computed here with shapely 2 (GEOS) on the planar
  geometries, and a small worked example in exact fractions (constructed here);
* areas of latitude-longitude cells from the closed form A = (a²/2) Δλ (q(φ2) − q(φ1))
  (Snyder 1987, *Map Projections: A Working Manual*, USGS Professional Paper 1395, eq. 3-12),
  with the reference values of REFERENCES §2, and a q function written out in this file;
* WGS84 a = 6 378 137 m, 1/f = 298.257 223 563 (NIMA TR8350.2; memory for the table number);
* sampling frequencies against binomial bands and a chi-square test (scipy.stats), fixed seeds.

Scenes are built in a Lambert azimuthal equal-area plane (LAEA, Snyder 1987 ch. 24);
``project_layers(..., crs=PLANE, densify_m=1e9)`` keeps planar geometries as given.
"""

from __future__ import annotations

import math
from fractions import Fraction

import fiona
import numpy as np
import pyproj
import pytest
import rasterio
import rasterio.transform
import shapely
from scipy import stats
from shapely.geometry import Polygon, box, mapping

from areamc.density import BlockDensity, ExpressionDensity, RasterDensity, block_counts
from areamc.errors import InputError, LayerError, OptionError
from areamc.load import AreamcWarning, layer_from_geometries, read_layer
from areamc.project import project_layers

PLANE = "+proj=laea +lat_0=47 +lon_0=10 +datum=WGS84 +units=m +no_defs"
A_WGS84 = 6378137.0  # NIMA TR8350.2
F_WGS84 = 1 / 298.257223563
E_WGS84 = math.sqrt(F_WGS84 * (2 - F_WGS84))
KM = 1000.0


def q_authalic(lat_deg: float) -> float:
    """Snyder 1987, eq. 3-12, with the log term written as −atanh(e sinφ)/e (REFERENCES §1)."""
    s = math.sin(math.radians(lat_deg))
    e = E_WGS84
    return (1 - e * e) * (s / (1 - e * e * s * s) + math.atanh(e * s) / e)


def quad_area(lon1, lat1, lon2, lat2) -> float:
    """(a²/2) Δλ (q(φ2) − q(φ1)), m² (REFERENCES §2)."""
    return abs(A_WGS84**2 / 2 * math.radians(lon2 - lon1) * (q_authalic(lat2) - q_authalic(lat1)))


def on_plane(*groups, crs=PLANE, densify_m=1e9):
    """Project groups of shapely geometries (given in `crs`) onto the plane `crs` together."""
    layers = [layer_from_geometries(list(g), crs) for g in groups]
    return project_layers(layers, crs=crs, densify_m=densify_m)


def plane_of(crs_text: str, lonlat_geoms):
    """Project lon/lat geometries onto the LAEA plane `crs_text` (1 km densify)."""
    (layer,) = project_layers([layer_from_geometries(list(lonlat_geoms), "EPSG:4326")], crs=crs_text, densify_m=1000.0)
    return layer


def write_raster(path, data, *, west, north, dx, dy=None, crs="EPSG:4326", nodata=None, dtype="float64"):
    """A one-band GeoTIFF with north-up cells of dx by dy (CRS units)."""
    data = np.asarray(data, dtype=dtype)
    transform = rasterio.transform.from_origin(west, north, dx, dy if dy is not None else dx)
    profile = dict(driver="GTiff", height=data.shape[0], width=data.shape[1], count=1, dtype=dtype,
                   transform=transform)
    if crs is not None:
        profile["crs"] = crs
    if nodata is not None:
        profile["nodata"] = nodata
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data, 1)
    return str(path)


def write_blocks(path, geoms, props, schema_props, crs=PLANE):
    schema = {"geometry": "Polygon", "properties": schema_props}
    with fiona.open(path, "w", driver="GPKG", schema=schema, crs_wkt=pyproj.CRS(crs).to_wkt(), layer="blocks") as dst:
        for g, p in zip(geoms, props):
            dst.write({"geometry": mapping(g), "properties": p})
    return str(path)


def overlay_total(blocks, counts, region) -> float:
    """Areal weighting with shapely over every block (Goodchild & Lam 1980)."""
    inter = shapely.area(shapely.intersection(blocks, region))
    return float(np.sum(np.asarray(counts) * inter / shapely.area(blocks)))


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
    # shapely reproduces the hand computation (REFERENCES §7) ...
    assert overlay_total(blocks.planar, WORKED_COUNTS, region) == pytest.approx(float(WORKED_TOTAL), rel=1e-12)
    # ... and so does the source's exact total
    assert source.exact_total(region) == pytest.approx(float(WORKED_TOTAL), rel=1e-12)
    # a region holding every block gets every person: 8 + 3 + 6
    assert source.exact_total(box(-KM, -KM, 7 * KM, 6 * KM)) == pytest.approx(17.0, rel=1e-12)
    # the part of R inside C only: 3/2 (hand computation above)
    assert source.exact_total(shapely.intersection(region, WORKED_BLOCKS[2])) == pytest.approx(1.5, rel=1e-12)


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
    proposal = source.proposal(everything)
    assert proposal.total == pytest.approx(17.0)
    n = 200_000
    px, py = proposal.draw(np.random.default_rng(11).random((n, 4)))
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
        assert source.exact_total(region) == pytest.approx(ref, rel=1e-12, abs=1e-9), name
    assert source.exact_total(regions["touching"]) == 0.0
    assert source.exact_total(regions["outside"]) == 0.0
    # the whole grid: the sum of the counts
    assert source.exact_total(box(-1, -1, N_SIDE * CELL + 1, N_SIDE * CELL + 1)) == pytest.approx(counts.sum(), rel=1e-12)


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


def test_block__proposal_leaves_out_empty_and_far_blocks(grid):
    regions, blocks, counts = grid
    source = BlockDensity(blocks, counts)
    # no block shares area with these regions: an empty proposal (total 0, nothing to draw)
    for name in ("outside", "touching"):
        empty_proposal = source.proposal(regions[name])
        assert empty_proposal.total == 0.0 and empty_proposal.draw is None
    region = regions["multi"]
    proposal = source.proposal(region)
    # total = counts of the blocks sharing area with the region (shapely, interiors meet)
    meets = shapely.intersects(blocks.planar, region) & ~shapely.touches(blocks.planar, region)
    assert proposal.total == pytest.approx(counts[meets].sum(), rel=1e-12)
    # empty blocks (the first five) never receive a point
    px, py = proposal.draw(np.random.default_rng(5).random((20_000, 4)))
    empty = shapely.union_all(blocks.planar[:5])
    assert not shapely.contains_xy(empty, px, py).any()


def test_block__all_zero_counts_give_no_proposal(grid):
    regions, blocks, counts = grid
    source = BlockDensity(blocks, np.zeros_like(counts))
    proposal = source.proposal(regions["wobbly"])
    assert proposal.total == 0.0 and proposal.draw is None  # density 0 here, known without sampling
    assert source.exact_total(regions["wobbly"]) == 0.0


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

#: REFERENCES §2 [computed, 40 digits]: (lon1, lat1, lon2, lat2) -> m²
QUADRANGLES = [
    ((0.0, 0.0, 1.0, 1.0), 12_308_463_893.975352),
    ((0.0, 45.0, 1.0, 46.0), 8_686_494_956.670401),
    ((0.0, 80.0, 1.0, 81.0), 2_058_274_854.323786),
    ((10.0, 40.0, 20.0, 50.0), 875_097_690_661.69982),
    ((0.0, 0.0, 10.0, 10.0), 1_224_832_293_977.7725),
    ((170.0, -60.0, 180.0, -50.0), 711_460_782_666.68829),
]


def test_q_function_here_reproduces_references():
    # the test's own closed form against REFERENCES §2 (so the ratios below rest on it)
    for (lon1, lat1, lon2, lat2), ref in QUADRANGLES:
        assert quad_area(lon1, lat1, lon2, lat2) == pytest.approx(ref, rel=1e-12)


def _cell_raster(tmp_path, bounds, values="count", value=1.0):
    """A 3-row, 2-column geographic grid whose middle-right cell is `bounds`; a plane centred on it."""
    lon1, lat1, lon2, lat2 = bounds
    d = lon2 - lon1
    path = write_raster(tmp_path / "cells.tif", np.full((3, 2), value), west=lon1 - d, north=lat2 + d, dx=d)
    lon_c, lat_c = (lon1 + lon2) / 2, (lat1 + lat2) / 2
    crs = f"+proj=laea +lat_0={lat_c} +lon_0={lon_c} +datum=WGS84 +units=m +no_defs"
    small = plane_of(crs, [box(lon_c - d / 20, lat_c - d / 20, lon_c + d / 20, lat_c + d / 20)])
    return RasterDensity(path, small.plane, values=values), small.planar[0]


@pytest.mark.parametrize("bounds, area", QUADRANGLES)
def test_raster__geographic_cell_area_is_the_quadrangle(tmp_path, bounds, area):
    # a count of 1 per cell means a density of 1 / (cell area) inside the cell (REFERENCES §2)
    source, region = _cell_raster(tmp_path, bounds)
    source.prepare(region)
    got = source.density(np.array([0.0, 100.0]), np.array([0.0, -100.0]))  # the cell centre is the plane origin
    np.testing.assert_allclose(1.0 / got, area, rtol=1e-11)


@pytest.mark.parametrize("values, factor", [("per-m2", 1.0), ("per-ha", 1e-4), ("per-km2", 1e-6)])
def test_raster__density_units_do_not_depend_on_cell_area(tmp_path, values, factor):
    # a value per unit area is already a density: 1 ha = 1e4 m², 1 km² = 1e6 m² (SI)
    source, region = _cell_raster(tmp_path, (0.0, 45.0, 1.0, 46.0), values=values, value=250.0)
    source.prepare(region)
    np.testing.assert_allclose(source.density(np.array([0.0]), np.array([0.0])), 250.0 * factor, rtol=1e-12)


def test_raster__constant_density_in_the_plane(tmp_path):
    # a raster in the equal-area plane itself: 100 m cells, 0.004 per m²; the total over a region is
    # 0.004 x its shapely area (cells are exact squares of the plane; constructed here)
    path = write_raster(tmp_path / "flat.tif", np.full((60, 80), 0.004), west=-4000, north=3000, dx=100, crs=PLANE)
    t = np.linspace(0, 2 * np.pi, 300, endpoint=False)
    region = Polygon(np.column_stack([200 + 1800 * np.cos(t), -300 + 1200 * np.sin(t) * (1 + 0.2 * np.cos(2 * t))]))
    (pregion,) = on_plane([region])
    source = RasterDensity(path, pregion.plane, values="per-m2")
    source.prepare(pregion.planar[0])
    assert source.exact_total(pregion.planar[0]) == pytest.approx(0.004 * region.area, rel=1e-9)
    rng = np.random.default_rng(1)
    x, y = rng.uniform(-1600, 2000, 3000), rng.uniform(-1260, 660, 3000)  # the region's bounds
    keep = shapely.contains_xy(region, x, y)
    assert keep.sum() > 1000
    np.testing.assert_allclose(source.density(x[keep], y[keep]), 0.004, rtol=1e-12)
    # far outside the raster window: 0
    assert source.density(np.array([50_000.0]), np.array([0.0]))[0] == 0.0


def _count_grid(tmp_path, nodata=None, holes=()):
    """A 0.01° count grid, 20 rows x 30 columns, NW corner 10.20 E 47.35 N (invented, fixed seed)."""
    rng = np.random.default_rng(99)
    data = rng.uniform(0, 50, (20, 30)).round(1)
    for r, c, v in holes:
        data[r, c] = v
    path = write_raster(tmp_path / "grid.tif", data, west=10.20, north=47.35, dx=0.01, nodata=nodata)
    return path, data


def test_raster__region_holding_the_grid_gets_the_sum_of_cells(tmp_path):
    path, data = _count_grid(tmp_path)
    (big,) = project_layers([layer_from_geometries([box(10.1, 47.1, 10.6, 47.45)], "EPSG:4326")],
                            crs=PLANE, densify_m=500.0)
    source = RasterDensity(path, big.plane)
    source.prepare(big.planar[0])
    assert source.exact_total(big.planar[0]) == pytest.approx(data.sum(), rel=1e-9)
    assert source.proposal(big.planar[0]).total == pytest.approx(data.sum(), rel=1e-12)


def test_raster__nodata_and_nan_cells_are_empty_and_counted_once(tmp_path):
    holes = [(3, 4, -1.0), (3, 5, -1.0), (10, 20, -1.0), (15, 2, np.nan)]
    path, data = _count_grid(tmp_path, nodata=-1.0, holes=holes)
    valid = np.where(np.isnan(data) | (data == -1.0), 0.0, data)
    (big,) = project_layers([layer_from_geometries([box(10.1, 47.1, 10.6, 47.45), box(10.15, 47.1, 10.6, 47.4)],
                                                   "EPSG:4326")], crs=PLANE, densify_m=500.0)
    source = RasterDensity(path, big.plane)
    for region in big.planar:  # two windows over the same cells
        source.prepare(region)
        assert source.exact_total(region) == pytest.approx(valid.sum(), rel=1e-9)
    # the nodata cell (row 3, column 4) has density 0: its centre 10.245 E, 47.315 N
    x, y = pyproj.Transformer.from_crs("EPSG:4326", PLANE, always_xy=True).transform(10.245, 47.315)
    assert source.density(np.array([x]), np.array([y]))[0] == 0.0
    assert source.nodata_cells == 4
    with pytest.warns(AreamcWarning, match=r"4 nodata cell"):
        source.finish()


def test_raster__reads_only_the_window_over_the_region(tmp_path, monkeypatch):
    # 600 x 600 cells of 100 m; a 1 km square region covers 10 x 10 of them
    path = write_raster(tmp_path / "big.tif", np.full((600, 600), 2.0), west=-30_000, north=30_000, dx=100,
                        crs=PLANE, dtype="float32")
    (region,) = on_plane([box(5_050, -12_000, 6_050, -11_000)])
    source = RasterDensity(path, region.plane, values="count")
    windows = []
    original = source._ds.read

    def recording_read(*args, **kwargs):
        windows.append(kwargs.get("window"))
        return original(*args, **kwargs)

    monkeypatch.setattr(source._ds, "read", recording_read)
    source.prepare(region.planar[0])
    assert len(windows) == 1 and windows[0] is not None
    win = windows[0]
    assert win.width <= 13 and win.height <= 13  # 10 cells + at most 1.5 margin each side
    # the window still covers the region: columns 350..360, rows 410..420 (constructed here)
    assert win.col_off <= 350 and win.col_off + win.width >= 360
    assert win.row_off <= 410 and win.row_off + win.height >= 420
    assert source._window[1].shape == (win.height, win.width)
    # 2 per 100 m cell = 2e-4 per m², over 1 km²: 200
    assert source.exact_total(region.planar[0]) == pytest.approx(200.0, rel=1e-9)


def test_raster__geographic_importance_draws_uniform_in_area(tmp_path):
    # one 10° cell, 40..50 N, 10..20 E; points must be uniform in area, so the share north of
    # 45 N is the quadrangle-area ratio (Snyder 1987 eq. 3-12), not 1/2
    path = write_raster(tmp_path / "ten.tif", np.full((1, 1), 1000.0), west=10.0, north=50.0, dx=10.0)
    crs = "+proj=laea +lat_0=45 +lon_0=15 +datum=WGS84 +units=m +no_defs"
    region = plane_of(crs, [box(10.0, 40.0, 20.0, 50.0)])
    source = RasterDensity(path, region.plane)
    source.prepare(region.planar[0])
    proposal = source.proposal(region.planar[0])
    assert proposal.total == pytest.approx(1000.0)
    n = 200_000
    px, py = proposal.draw(np.random.default_rng(2024).random((n, 4)))
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


def test_raster__non_equal_area_projected_raster_has_no_proposal(tmp_path):
    # Web Mercator (EPSG:3857) distorts areas by sec²φ (REFERENCES §3): cells are not equal in
    # area, so no importance sampler; an equal-area raster (EPSG:3035, ETRS89-LAEA) gets one
    x, y = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:3857", always_xy=True).transform(10.0, 47.0)
    merc = write_raster(tmp_path / "merc.tif", np.ones((20, 20)), west=x - 1000, north=y + 1000, dx=100, crs="EPSG:3857")
    e, n = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:3035", always_xy=True).transform(10.0, 47.0)
    laea = write_raster(tmp_path / "laea.tif", np.ones((20, 20)), west=e - 1000, north=n + 1000, dx=100, crs="EPSG:3035")
    (region,) = on_plane([box(-400, -400, 400, 400)])
    for path, has in ((merc, False), (laea, True)):
        source = RasterDensity(path, region.plane)
        source.prepare(region.planar[0])
        assert (source.proposal(region.planar[0]) is not None) is has, path


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
    with pytest.raises(OptionError, match="--band"):
        RasterDensity(good, plane, band=2)
    with pytest.raises(OptionError, match="--raster-values"):
        RasterDensity(good, plane, values="per-acre")


def test_raster__negative_value_stops_at_prepare(tmp_path):
    path, _ = _count_grid(tmp_path, holes=[(7, 8, -2.5)])
    (big,) = project_layers([layer_from_geometries([box(10.1, 47.1, 10.6, 47.45)], "EPSG:4326")], crs=PLANE)
    source = RasterDensity(path, big.plane)
    with pytest.raises(InputError, match=r"negative value -2\.5 at row 7, column 8"):
        source.prepare(big.planar[0])


def test_raster__no_overlap(tmp_path):
    path, _ = _count_grid(tmp_path)
    (far,) = on_plane([box(300_000, 300_000, 310_000, 310_000)])
    source = RasterDensity(path, far.plane)
    assert not source.overlaps(far.planar[0])
    source.prepare(far.planar[0])
    assert source.exact_total(far.planar[0]) == 0.0
    proposal = source.proposal(far.planar[0])
    assert proposal.total == 0.0 and proposal.draw is None
    assert source.density(np.array([305_000.0]), np.array([305_000.0]))[0] == 0.0


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
