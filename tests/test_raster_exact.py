"""Tests of the exact raster totals by cell fractions (``areamc.exact.cell_fractions``, ``RasterView``).

A raster cell's footprint on the plane is the quadrilateral of its 4 corners, projected; its
share inside a region R is |cell ∩ R| / |cell|, and the exact total is Σ count x share (the
cell fractions of areal weighting, Goodchild & Lam 1980, Geo-Processing 1:297-312 [memory]).
Expected values come from outside areamc:

* a brute-force reference built here: one shapely polygon per cell, corners from the raster's
  affine transform (rasterio) projected with pyproj, intersected with the region by shapely
  (GEOS), cell by cell, on small rasters in geographic, UTM and equal-area CRSs;
* hand-worked shares in exact fractions on a grid in the plane's own CRS (constructed here);
* the region's own area from shapely: on square cells Σ share = |R ∩ grid| / cell area.

The time budget (``exact_time_limit_s``, ``--exact-budget``) is checked with a deadline that has
already passed, so no test depends on the machine's speed.
"""

from __future__ import annotations

import math
import time
import tracemalloc
from fractions import Fraction
from pathlib import Path

import numpy as np
import pyproj
import pytest
import rasterio
import shapely
from shapely.geometry import Polygon, box

from conftest import assert_refused, run_cli, run_json, write_raster

import areamc.exact as exact_module
from areamc.density import ExpressionDensity, RasterDensity
from areamc.errors import OptionError
from areamc.exact import cell_fractions
from areamc.integrate import COMPUTED, NOT_COMPUTED, TIMED_OUT, integrate_density
from areamc.load import layer_from_geometries, read_layer
from areamc.project import project_layers
from areamc.stopping import StopRule

ROOT = Path(__file__).resolve().parents[1]
GPKG = ROOT / "sample_data" / "vale_county.gpkg"
TIF = ROOT / "sample_data" / "vale_population.tif"
PLANE = "+proj=laea +lat_0=47 +lon_0=10 +datum=WGS84 +units=m +no_defs"


# --- the brute-force reference, independent of areamc ----------------------------------------------


def brute_shares(path, plane_crs) -> callable:
    """``shares(region)``: (rows, cols) array of |cell ∩ region| / |cell| over the whole raster at `path`.

    One polygon per cell: corners ``transform * (c, r)`` (rasterio's affine), projected to the plane
    with pyproj, intersected with shapely one cell at a time."""
    with rasterio.open(path) as ds:
        transform, crs, rows, cols = ds.transform, ds.crs.to_wkt(), ds.height, ds.width
    trans = pyproj.Transformer.from_crs(crs, plane_crs, always_xy=True)
    cells = []
    for r in range(rows):
        for c in range(cols):
            corners = [transform * (c, r), transform * (c + 1, r), transform * (c + 1, r + 1), transform * (c, r + 1)]
            px, py = trans.transform([p[0] for p in corners], [p[1] for p in corners])
            cells.append(Polygon(zip(px, py)))

    def shares(region) -> np.ndarray:
        out = [cell.intersection(region).area / cell.area for cell in cells]
        return np.array(out).reshape(rows, cols)

    return shares


def dense(fractions) -> np.ndarray:
    """The shares of a ``CellFractions`` as a (rows, cols) array (whole runs 1, listed cells their share)."""
    out = np.zeros(fractions.shape)
    for r, a, b in zip(fractions.run_row, fractions.run_first, fractions.run_last):
        out[r, a:b + 1] = 1.0
    out.ravel()[fractions.cells] = fractions.shares
    return out


def window_of(view, path) -> tuple[slice, slice]:
    """The rows and columns of the whole raster that the view's window covers."""
    with rasterio.open(path) as ds:
        col, row = ~ds.transform * (view.transform.c, view.transform.f)
    r0, c0 = int(round(row)), int(round(col))
    rows, cols = view.counts.shape
    return slice(r0, r0 + rows), slice(c0, c0 + cols)


def lonlat_regions(plane=PLANE, densify_m=200.0):
    """Regions given in lon/lat over 10.2..10.6 E, 47.1..47.4 N, projected to `plane` together.

    disk: a wobbly disk; holed: a box with a square hole; two: a multipolygon of two parts;
    edge: a box reaching past the raster's east and south edges; speck: a triangle inside one 0.01° cell.
    """
    t = np.linspace(0, 2 * np.pi, 150, endpoint=False)
    disk = Polygon(np.column_stack([10.33 + 0.07 * np.cos(t) * (1 + 0.2 * np.sin(3 * t)), 47.26 + 0.05 * np.sin(t)]))
    holed = box(10.41, 47.13, 10.55, 47.24).difference(box(10.45, 47.16, 10.5, 47.2))
    two = shapely.MultiPolygon([box(10.22, 47.31, 10.27, 47.38), Polygon([(10.45, 47.3), (10.58, 47.33),
                                                                           (10.5, 47.39)])])
    edge = box(10.52, 47.05, 10.7, 47.15)
    speck = Polygon([(10.3012, 47.2013), (10.3071, 47.2022), (10.3033, 47.2086)])
    names = ["disk", "holed", "two", "edge", "speck"]
    (layer,) = project_layers([layer_from_geometries([disk, holed, two, edge, speck], "EPSG:4326")], crs=plane,
                              densify_m=densify_m)
    return dict(zip(names, layer.planar)), layer.plane


def count_raster(tmp_path, crs, name="counts.tif"):
    """Counts (invented, seeded Poisson) on a raster over 10.2..10.6 E, 47.1..47.4 N in `crs`.

    EPSG:4326: 40 x 30 cells of 0.01°; a projected CRS: cells of 800 m over the box's extent there."""
    rng = np.random.default_rng(11)
    if crs == "EPSG:4326":
        data = rng.poisson(30.0, size=(30, 40)).astype(float)
        return write_raster(tmp_path / name, data, west=10.2, north=47.4, dx=0.01)
    west, south, east, north = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True).transform_bounds(
        10.2, 47.1, 10.6, 47.4)
    cols, rows = int((east - west) // 800), int((north - south) // 800)
    data = rng.poisson(30.0, size=(rows, cols)).astype(float)
    return write_raster(tmp_path / name, data, west=math.floor(west), north=math.ceil(north), dx=800.0, crs=crs)


# --- cell by cell, against the brute-force reference -----------------------------------------------


@pytest.mark.parametrize("crs", ["EPSG:4326", "EPSG:32632", "EPSG:3035"])
def test_cell_fractions__every_cell_matches_the_brute_force_shares(tmp_path, crs):
    # geographic (cells curved on the plane), UTM zone 32N (conformal, not equal-area) and ETRS89-LAEA
    # (equal-area, another centre): each cell's share agrees with the per-cell shapely reference to 1e-9
    path = count_raster(tmp_path, crs)
    regions, plane = lonlat_regions()
    reference = brute_shares(path, PLANE)
    with RasterDensity(path, plane) as source:
        for name, region in regions.items():
            view = source.for_region(region)
            want = reference(region)
            rows, cols = window_of(view, path)
            got = dense(view.fractions())
            assert want[rows, cols].sum() == pytest.approx(want.sum(), rel=1e-12), name  # guard: the window holds R
            assert np.max(np.abs(got - want[rows, cols])) <= 1e-9, name
            with rasterio.open(path) as ds:
                counts = ds.read(1).astype(float)
            assert view.exact_total() == pytest.approx(float(np.sum(counts * want)), rel=1e-9, abs=1e-9), name
    assert 0 < want.sum() < 1  # the speck lies within one cell or two


def test_exact_total__sample_raster_agrees_with_one_polygon_per_cell():
    # the Vale raster (sample_data, 48 x 90 cells of 0.01° on WGS84) and the 8 districts on the plane the
    # tool chooses from them: every total agrees with the per-cell reference to 1e-9 (nodata counts 0)
    (layer,) = project_layers([read_layer(str(GPKG), layer="districts", id_field="district_id")])
    reference = brute_shares(TIF, layer.plane.crs.to_wkt())
    with rasterio.open(TIF) as ds:
        counts = ds.read(1, masked=True).astype(float).filled(0.0)
    with RasterDensity(str(TIF), layer.plane) as source:
        for rid, region in zip(layer.ids, layer.planar):
            want = float(np.sum(counts * reference(region)))
            assert want > 1000, rid  # guard: every district holds people
            assert source.for_region(region).exact_total() == pytest.approx(want, rel=1e-9), rid


def test_exact_total__clip_and_square_total_against_brute_force(tmp_path):
    # the covered part (region ∩ clip, used by coverage) and ∫ d² = Σ count x rate x share (rate = count
    # over the cell's outline area on the plane, an equal-area projected raster)
    path = count_raster(tmp_path, "EPSG:3035")
    regions, plane = lonlat_regions()
    reference = brute_shares(path, PLANE)
    region = regions["disk"]
    clip = shapely.buffer(shapely.Point(region.centroid.x + 3000, region.centroid.y), 5000)
    with rasterio.open(path) as ds:
        counts = ds.read(1).astype(float)
        area = abs(ds.transform.a * ds.transform.e)  # EPSG:3035 is equal-area: every outline ~ 800 m x 800 m
    with RasterDensity(path, plane) as source:
        view = source.for_region(region)
        clipped = float(np.sum(counts * reference(region.intersection(clip))))
        assert 0 < clipped < 0.8 * view.exact_total()  # guard: the clip takes part of the region
        assert view.exact_total(clip) == pytest.approx(clipped, rel=1e-9)
        square = float(np.sum(counts * counts / area * reference(region)))
        assert view.exact_square_total() == pytest.approx(square, rel=1e-6)  # outline areas within 1e-6 of 800²


def test_cell_fractions__region_in_the_sliver_between_a_cell_side_and_its_parallel(tmp_path):
    # cells of 0.5° at 60-63 N on the plane centred at 47 N: the top side of a cell's outline is the
    # straight chord between two projected corners, while the parallel itself curves away from it by
    # tens of metres.  A 10 m-scale square in that sliver lies in the outline of the cell *above*
    # (the brute force says which), though its lon/lat falls in the cell below: the slack round the
    # outline must still find the right cell.
    counts = np.arange(1, 49, dtype=float).reshape(6, 8)
    path = write_raster(tmp_path / "coarse.tif", counts, west=8.0, north=63.0, dx=0.5)
    to_plane = pyproj.Transformer.from_crs("EPSG:4326", PLANE, always_xy=True)
    ax, ay = to_plane.transform([9.5, 10.0, 9.75], [62.0, 62.0, 62.0])
    chord = np.array([(ax[0] + ax[1]) / 2, (ay[0] + ay[1]) / 2])
    arc = np.array([ax[2], ay[2]])
    gap = float(np.hypot(*(arc - chord)))
    assert gap > 10  # guard: the parallel strays from the chord by more than 10 m
    centre = (chord + arc) / 2
    (layer,) = project_layers([layer_from_geometries([box(*(centre - gap / 5), *(centre + gap / 5))], PLANE)],
                              crs=PLANE, densify_m=1e9)
    region = layer.planar[0]
    shares = brute_shares(path, PLANE)(region)
    lon, lat = pyproj.Transformer.from_crs(PLANE, "EPSG:4326", always_xy=True).transform(*centre)
    home = (int((63.0 - lat) // 0.5), int((lon - 8.0) // 0.5))
    (hit,) = np.argwhere(shares > 0)
    assert tuple(hit) != home  # guard: the square's lon/lat lies in another cell than its outline
    with RasterDensity(path, layer.plane) as source:
        got = source.for_region(region).exact_total()
    assert got == pytest.approx(float(np.sum(counts * shares)), rel=1e-9)
    assert got > 0


def test_cell_fractions__hand_worked_shares_on_a_grid_in_the_plane(tmp_path):
    # a 4 x 4 raster of 100 m cells written in the plane's own CRS, origin (0, 400) of the plane, counts
    # 1..16 row by row from the top.  Cell (row r, col c) spans x in [100c, 100c + 100], y in
    # [300 - 100r, 400 - 100r]; with j = 3 - r its lower-left corner is (100c, 100j).
    counts = np.arange(1, 17, dtype=float).reshape(4, 4)
    path = write_raster(tmp_path / "grid.tif", counts, west=0.0, north=400.0, dx=100.0, crs=PLANE)
    (layer,) = project_layers([layer_from_geometries([Polygon([(0, 0), (400, 0), (0, 400)]),
                                                      box(100, 100, 300, 250)], PLANE)], crs=PLANE, densify_m=1e9)
    tri, rect = layer.planar
    # triangle x + y ≤ 400: cells with c + j ≤ 2 lie inside; c + j = 3 are cut along their
    # anti-diagonal (share 1/2); the others touch it in a corner at most
    want_tri = Fraction(0)
    for r in range(4):
        for c in range(4):
            j = 3 - r
            want_tri += Fraction(int(counts[r, c])) * (1 if c + j <= 2 else Fraction(1, 2) if c + j == 3 else 0)
    # rectangle [100, 300] x [100, 250]: columns 1, 2; row j = 1 whole, row j = 2 half (y from 200 to 250)
    want_rect = sum(Fraction(int(counts[2, c])) for c in (1, 2)) + sum(Fraction(int(counts[1, c]), 2) for c in (1, 2))
    # by hand, count(r, c) = 4r + c + 1: triangle 13 + 14 + 15 + 9 + 10 + 5 = 66 whole and
    # (16 + 11 + 6 + 1) / 2 = 17 halved; rectangle 10 + 11 = 21 whole and (6 + 7) / 2 halved
    assert (want_tri, want_rect) == (Fraction(83), Fraction(55, 2))
    with RasterDensity(path, layer.plane) as source:
        assert source.for_region(tri).exact_total() == pytest.approx(float(want_tri), rel=1e-12)
        assert source.for_region(rect).exact_total() == pytest.approx(float(want_rect), rel=1e-12)
        view = source.for_region(rect)
        got = dense(view.fractions())
    assert np.all((got == 0) | (got == 1) | (np.abs(got - 0.5) < 1e-12))  # edges on grid lines: whole or half


def test_cell_fractions__the_reference_route_for_distorted_grids_gives_the_same_shares(tmp_path, monkeypatch):
    # past the distortion bar every cell is clipped, a tile at a time: forced here, same shares
    path = count_raster(tmp_path, "EPSG:4326")
    regions, plane = lonlat_regions()
    with RasterDensity(path, plane) as source:
        fast = {name: dense(source.for_region(g).fractions()) for name, g in regions.items()}
        monkeypatch.setattr(exact_module, "_CELL_BEND_MAX", -1.0)
        for name, region in regions.items():
            slow = source.for_region(region).fractions()
            assert len(slow.run_row) == 0, name  # guard: the reference route was taken
            assert np.max(np.abs(dense(slow) - fast[name])) <= 1e-12, name


def test_cell_fractions__folded_grid_with_darts_against_brute_force():
    # a made-up 12 x 12 grid of 10 m cells where every corner (c, r) with c, r = 1 mod 3 is pushed
    # 6 m into the cell below and right of it: that cell's outline becomes a dart (not convex) and
    # the map from the plane back to the grid is only roughly known, so the grid is clipped cell by
    # cell.  Shares against one shapely polygon per cell (built here from the same corners).
    def bump(col, row):
        col, row = np.asarray(col, float), np.asarray(row, float)
        whole = (col == np.round(col)) & (row == np.round(row))
        return whole & (np.round(col) % 3 == 1) & (np.round(row) % 3 == 1)

    def to_plane(col, row):
        b = bump(col, row)
        return 10.0 * np.asarray(col, float) + 6.0 * b, -10.0 * np.asarray(row, float) - 6.0 * b

    def to_grid(x, y):
        return np.asarray(x, float) / 10.0, -np.asarray(y, float) / 10.0

    region = shapely.Point(61, -57).buffer(38, quad_segs=16).difference(shapely.box(50, -70, 66, -52))
    want = np.zeros((12, 12))
    darts = 0
    for r in range(12):
        for c in range(12):
            x, y = to_plane(np.array([c, c + 1, c + 1, c]), np.array([r, r, r + 1, r + 1]))
            cell = Polygon(zip(x, y))
            darts += not cell.equals(cell.convex_hull)
            want[r, c] = cell.intersection(region).area / cell.area
    assert darts == 16  # guard: the pushed corners made 16 cells into darts
    got = dense(cell_fractions(region, (12, 12), to_plane, to_grid))
    assert np.max(np.abs(got - want)) <= 1e-12


def test_cell_fractions__a_map_that_jumps_along_the_outline_is_clipped_cell_by_cell():
    # a made-up grid of 10 m cells whose map back from the plane jumps by 400 columns east of x = 65 m
    # (as longitudes do across ±180°): the outline cannot be mapped, so every cell is clipped; shares
    # against one shapely polygon per cell
    def to_plane(col, row):
        return 10.0 * np.asarray(col, float), -10.0 * np.asarray(row, float)

    def to_grid(x, y):
        x = np.asarray(x, float)
        return np.where(x > 65.0, x / 10.0 - 400.0, x / 10.0), -np.asarray(y, float) / 10.0

    region = shapely.Point(63, -58).buffer(31, quad_segs=24)
    want = np.array([[shapely.box(10 * c, -10 * r - 10, 10 * c + 10, -10 * r).intersection(region).area / 100.0
                      for c in range(12)] for r in range(12)])
    got = cell_fractions(region, (12, 12), to_plane, to_grid)
    assert len(got.run_row) == 0  # guard: the cell-by-cell route was taken
    assert np.max(np.abs(dense(got) - want)) <= 1e-12


def test_exact_total__region_holding_the_whole_raster_totals_every_count(tmp_path):
    # a region (lon/lat 5..15 E, 45..50 N) far larger than a UTM raster inside it: every cell lies
    # wholly inside, so the exact total is the sum of the counts (nothing to clip)
    path = count_raster(tmp_path, "EPSG:32632")
    (layer,) = project_layers([layer_from_geometries([box(5, 45, 15, 50)], "EPSG:4326")], crs=PLANE, densify_m=5000.0)
    with rasterio.open(path) as ds:
        counts = ds.read(1).astype(float)
    with RasterDensity(path, layer.plane) as source:
        view = source.for_region(layer.planar[0])
        fractions = view.fractions()
    assert view.counts.size == counts.size and len(fractions.cells) == 0
    assert view.exact_total() == pytest.approx(float(counts.sum()), rel=1e-12)


def test_cell_fractions__large_grid_memory_follows_the_outline_not_the_cells():
    # a 3,000 x 3,000 grid (9 million cells of 10 m) in plane coordinates and a disk of radius 12 km
    # (256 vertices): the shares sum to |disk| / cell area (shapely's area), and the peak memory of the
    # computation stays far below one polygon per cell (9 million shapely polygons need about 1 GB)
    side, cells = 10.0, 3000

    def to_plane(col, row):
        return np.asarray(col, float) * side, 30_000.0 - np.asarray(row, float) * side

    def to_grid(x, y):
        return np.asarray(x, float) / side, (30_000.0 - np.asarray(y, float)) / side

    disk = shapely.Point(15_000, 15_000).buffer(12_000, quad_segs=64)
    tracemalloc.start()
    try:
        fractions = cell_fractions(disk, (cells, cells), to_plane, to_grid)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert fractions.whole_cells + fractions.shares.sum() == pytest.approx(disk.area / side**2, rel=1e-12)
    assert fractions.whole_cells > 0.98 * disk.area / side**2  # most cells counted whole, not clipped
    assert peak < 64 * 2**20, f"{peak / 2**20:.0f} MiB"


# --- the time budget ---------------------------------------------------------------------------


def test_exact_total__a_passed_deadline_gives_none_and_leaves_no_stale_answer(tmp_path):
    path = count_raster(tmp_path, "EPSG:4326")
    regions, plane = lonlat_regions()
    reference = brute_shares(path, PLANE)
    with rasterio.open(path) as ds:
        counts = ds.read(1).astype(float)
    with RasterDensity(path, plane) as source:
        view = source.for_region(regions["disk"])
        assert view.exact_total(deadline=time.monotonic() - 1.0) is None
        assert view.exact_square_total(deadline=time.monotonic() - 1.0) is None
        assert view.exact_total() == pytest.approx(float(np.sum(counts * reference(regions["disk"]))), rel=1e-9)


def test_integrate__exact_status_per_region(tmp_path):
    path = count_raster(tmp_path, "EPSG:4326")
    regions, plane = lonlat_regions()
    (layer,) = project_layers([layer_from_geometries([regions["disk"], regions["two"]], PLANE)], crs=PLANE,
                              densify_m=1e9)
    stop = StopRule(points=2000)
    with RasterDensity(path, layer.plane) as source:
        done = integrate_density(layer, source, stop=stop, seed=1)
        late = integrate_density(layer, source, stop=stop, seed=1, exact_time_limit_s=1e-12)
        skipped = integrate_density(layer, source, stop=stop, seed=1, exact=False)
    assert set(done.exact_status.values()) == {COMPUTED} and all(r.exact is not None for r in done.rows)
    assert set(late.exact_status.values()) == {TIMED_OUT}
    assert all(r.exact is None and r.z is None and not r.flagged for r in late.rows)
    assert [r.estimate for r in late.rows] == [r.estimate for r in done.rows]  # sampling untouched
    assert set(skipped.exact_status.values()) == {NOT_COMPUTED}
    assert late.metadata()["exact_status"] == late.exact_status
    expression = integrate_density(layer, ExpressionDensity("1e-6", layer.plane), stop=stop, seed=1)
    assert set(expression.exact_status.values()) == {NOT_COMPUTED}  # no exact total for expressions


@pytest.mark.parametrize("value", [0, -1.0, math.nan, "5", True, None])
def test_integrate__exact_time_limit_refused(tmp_path, value):
    path = count_raster(tmp_path, "EPSG:4326")
    regions, plane = lonlat_regions()
    (layer,) = project_layers([layer_from_geometries([regions["disk"]], PLANE)], crs=PLANE, densify_m=1e9)
    with RasterDensity(path, layer.plane) as source:
        with pytest.raises(OptionError, match=r"^exact_time_limit_s: ") as info:
            integrate_density(layer, source, stop=StopRule(points=100), exact_time_limit_s=value)
    assert info.value.param == "exact_time_limit_s"


DISTRICTS = ["integrate", str(GPKG), "--regions-layer", "districts", "--regions-id-field", "district_id",
             "--density", str(TIF), "-n", "2000", "--seed", "1"]


def test_cli_integrate__exact_budget_names_the_regions_past_it(capsys):
    code, out, _ = run_cli(capsys, [*DISTRICTS, "--exact-budget", "1e-12"])
    assert code == 0
    assert "exact totals not computed within --exact-budget for: D01, D02, D03, D04, D05, D06, D07, D08" in out
    doc = run_json(capsys, [*DISTRICTS, "--exact-budget", "1e-12"])
    assert set(doc["exact_status"].values()) == {"timed-out"}
    assert all(row["exact"] is None for row in doc["results"])
    doc = run_json(capsys, DISTRICTS)
    assert set(doc["exact_status"].values()) == {"computed"}
    assert all(row["exact"] > 0 for row in doc["results"])


@pytest.mark.parametrize("value", ["0", "-2", "soon", "inf"])
def test_cli_integrate__bad_exact_budget_refused(capsys, tmp_path, value):
    regions = tmp_path / "districts.gpkg"
    regions.write_bytes(GPKG.read_bytes())
    raster = tmp_path / "people.tif"
    raster.write_bytes(TIF.read_bytes())
    assert_refused(capsys, ["integrate", regions, "--regions-layer", "districts", "--density", raster,
                            "--exact-budget", value], r"--exact-budget", tmp_path)


def test_lonlat_raster_across_the_antimeridian__region_across_it__counts_its_cells(tmp_path):
    """A 0.1° lon/lat raster from 175° E to 185° E (past 180°, as GDAL allows) of ones, and a
    region from 178° E to 178° W by 1° S to 1° N: it holds 40 x 20 whole cells, so the exact
    total is 800 (arithmetic on the grid). The region's box on the plane maps to longitudes whose
    minimum exceeds their maximum; that once ended in a traceback."""
    import subprocess
    import sys

    import fiona
    import rasterio
    from rasterio.transform import from_origin
    from shapely.geometry import Polygon, mapping

    with rasterio.open(tmp_path / "r.tif", "w", driver="GTiff", width=100, height=100, count=1, dtype="float32",
                       crs="EPSG:4326", transform=from_origin(175, 5, 0.1, 0.1)) as ds:
        ds.write(np.ones((100, 100), dtype="float32"), 1)
    with fiona.open(tmp_path / "reg.geojson", "w", driver="GeoJSON", crs="EPSG:4326",
                    schema={"geometry": "Polygon", "properties": {"id": "str"}}) as dst:
        dst.write({"geometry": mapping(Polygon([(178, -1), (-178, -1), (-178, 1), (178, 1)])),
                   "properties": {"id": "a"}})
    proc = subprocess.run([sys.executable, "-m", "areamc", "integrate", str(tmp_path / "reg.geojson"), "--density",
                           str(tmp_path / "r.tif"), "--seed", "1", "-n", "20000", "--format", "json"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    import json

    (row,) = json.loads(proc.stdout)["results"]
    # 1e-6: each cell is the straight-sided quadrilateral of its corners on the plane, while the
    # region's edges along the parallels are densified every 1 km, so the two differ by slivers
    assert row["exact"] == pytest.approx(800.0, rel=1e-6)
    assert abs(row["estimate"] - 800.0) <= 4 * row["std_error"]
