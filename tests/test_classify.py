"""Tests of ``areamc.classify``: point-in-polygon tests, the grid index GridIndex and region_classifier.

The reference is a brute-force count: for every zone, ``shapely.contains_xy`` on every point
(shapely 2 / GEOS), summed.  The index must return exactly that count for every point, whatever
the grid size (forced down to one cell and up past the default cap), for zones with holes,
multipolygons, nested and identical zones, and zones larger than the sampling box.  Geometries
are in plane metres, as GridIndex expects; the shapes are random test inputs, not reference data.
"""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from shapely.geometry import MultiPolygon, Point, Polygon, box

from areamc.classify import GridIndex, _grid_size, inside, region_classifier
from areamc.samplers import Box

#: Sampling box, plane metres (about 40 km x 30 km).
BOX = Box(500_000.0, 4_980_000.0, 540_000.0, 5_010_000.0)


def brute_counts(zones, x, y) -> np.ndarray:
    """Zones containing each point: one shapely.contains_xy call per zone, summed."""
    return np.sum([shapely.contains_xy(z, x, y) for z in zones], axis=0).astype(np.int64)


def random_zones(seed: int, n: int = 40) -> list:
    """Disks, holed disks, holed boxes, multipolygons, rotated boxes, some reaching past BOX."""
    rng = np.random.default_rng(seed)
    w, h = BOX.xmax - BOX.xmin, BOX.ymax - BOX.ymin
    zones = []
    for i in range(n):
        cx = BOX.xmin + rng.uniform(-0.1, 1.1) * w
        cy = BOX.ymin + rng.uniform(-0.1, 1.1) * h
        r = rng.uniform(0.02, 0.35) * w
        kind = i % 5
        if kind == 0:
            zones.append(Point(cx, cy).buffer(r, quad_segs=16))
        elif kind == 1:  # ring: disk with a hole
            zones.append(Point(cx, cy).buffer(r, quad_segs=16).difference(Point(cx, cy).buffer(0.5 * r, quad_segs=16)))
        elif kind == 2:  # box with two holes
            outer = box(cx - r, cy - 0.7 * r, cx + r, cy + 0.7 * r)
            holes = [box(cx - 0.8 * r, cy - 0.4 * r, cx - 0.1 * r, cy + 0.4 * r),
                     Point(cx + 0.5 * r, cy).buffer(0.25 * r, quad_segs=8)]
            zones.append(outer.difference(shapely.union_all(holes)))
        elif kind == 3:  # multipolygon of three separate parts, one with a hole
            a = box(cx - r, cy - r, cx - 0.5 * r, cy - 0.5 * r)
            b = Point(cx + 0.6 * r, cy + 0.6 * r).buffer(0.3 * r, quad_segs=8)
            c = box(cx - r, cy + 0.2 * r, cx - 0.2 * r, cy + r).difference(box(cx - 0.8 * r, cy + 0.4 * r, cx - 0.4 * r, cy + 0.8 * r))
            zones.append(MultiPolygon([a, b, c]))
        else:  # concave, rotated
            t = rng.uniform(0, np.pi)
            pts = np.array([(-1, -1), (1, -1), (0.1, 0), (1, 1), (-1, 1)]) * r
            rot = np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])
            zones.append(Polygon(pts @ rot.T + [cx, cy]))
    # one zone bigger than the whole box, one nested, and an identical pair
    zones.append(box(BOX.xmin - 1000, BOX.ymin - 1000, BOX.xmax + 1000, BOX.ymax + 1000))
    zones.append(Point(BOX.xmin + 0.5 * w, BOX.ymin + 0.5 * h).buffer(0.05 * w))
    zones.append(Point(BOX.xmin + 0.5 * w, BOX.ymin + 0.5 * h).buffer(0.05 * w))
    assert all(z.is_valid and not z.is_empty for z in zones)
    return zones


def random_points(seed: int, n: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = BOX.xmin + rng.random(n) * (BOX.xmax - BOX.xmin)
    y = BOX.ymin + rng.random(n) * (BOX.ymax - BOX.ymin)
    return x, y


@pytest.fixture(scope="module")
def zones():
    return random_zones(20260101)


@pytest.mark.parametrize("cells", [1, 2, 7, None, 300], ids=["1", "2", "7", "default", "300"])
def test_grid_index__counts_equal_brute_force(zones, cells):
    x, y = random_points(11, 60_000)
    index = GridIndex(zones, BOX, cells=cells)
    expected = brute_counts(zones, x, y)
    assert expected.max() >= 4  # the arrangement really has deep overlaps
    assert (expected == 1).sum() > 0  # ... and the bigger-than-the-box zone is counted
    got = index.counts(x, y)
    assert got.dtype == np.int64 and got.shape == x.shape
    np.testing.assert_array_equal(got, expected)
    assert index.max_count >= expected.max()


@pytest.mark.parametrize("cells", [1, 5, None])
def test_grid_index__points_on_cell_lines_and_box_edges(zones, cells):
    """Points exactly on grid lines and on the box's edges (incl. xmax, ymax) land in a cell."""
    index = GridIndex(zones, BOX, cells=cells)
    g = index.cells
    lines_x = BOX.xmin + (BOX.xmax - BOX.xmin) * np.arange(g + 1) / g
    lines_y = BOX.ymin + (BOX.ymax - BOX.ymin) * np.arange(g + 1) / g
    rng = np.random.default_rng(5)
    along = BOX.ymin + rng.random(200) * (BOX.ymax - BOX.ymin)
    x = np.concatenate([np.repeat(lines_x, 200), BOX.xmin + rng.random(len(lines_y) * 200) * (BOX.xmax - BOX.xmin)])
    y = np.concatenate([np.tile(along, len(lines_x)), np.repeat(lines_y, 200)])
    np.testing.assert_array_equal(index.counts(x, y), brute_counts(zones, x, y))


def test_grid_index__other_random_arrangements():
    for seed in (1, 2, 3):
        zones = random_zones(seed, n=25)
        x, y = random_points(100 + seed, 20_000)
        np.testing.assert_array_equal(GridIndex(zones, BOX).counts(x, y), brute_counts(zones, x, y))


def test_grid_index__points_outside_the_box_are_answered_exactly(zones):
    """Points past the box's edges (where zones reach) are counted like any other, by an STRtree query."""
    rng = np.random.default_rng(9)
    w, h = BOX.xmax - BOX.xmin, BOX.ymax - BOX.ymin
    x = BOX.xmin + rng.uniform(-0.3, 1.3, 20_000) * w
    y = BOX.ymin + rng.uniform(-0.3, 1.3, 20_000) * h
    index = GridIndex(zones, BOX)
    np.testing.assert_array_equal(index.counts(x, y), brute_counts(zones, x, y))
    point, zone = index.pairs(x, y)
    assert np.bincount(point, minlength=len(x)).tolist() == brute_counts(zones, x, y).tolist()
    assert shapely.contains_xy(np.asarray(zones, dtype=object)[zone], x[point], y[point]).all()


def test_grid_index__no_zones_counts_zero():
    x, y = random_points(3, 1000)
    index = GridIndex([], BOX)
    np.testing.assert_array_equal(index.counts(x, y), np.zeros(1000, dtype=np.int64))


def test_grid_index__empty_point_arrays():
    index = GridIndex(random_zones(4, n=10), BOX)
    assert index.counts(np.zeros(0), np.zeros(0)).shape == (0,)


def test_grid_size__within_its_documented_range(zones):
    g = _grid_size(np.asarray(zones, dtype=object), BOX)
    assert 4 <= g <= 2048
    # never more cells than the points it will count
    assert _grid_size(np.asarray(zones, dtype=object), BOX, points=400) ** 2 <= 400
    # finer grids for more boundary: 100 disks (940 km of edge) need more cells than one box
    # (170 km of edge)
    many = [Point(BOX.xmin + 400 * i, BOX.ymin + 15_000).buffer(1500) for i in range(100)]
    assert _grid_size(np.asarray(many, dtype=object), BOX) > _grid_size(np.asarray(zones[-3:-2], dtype=object), BOX)


def test_inside__agrees_with_shapely_contains_on_point_objects(zones):
    """inside() uses contains_xy; the reference is shapely.contains on Point objects."""
    x, y = random_points(8, 3000)
    pts = shapely.points(x, y)
    for zone in zones[:10]:
        test = inside(zone)
        np.testing.assert_array_equal(test(x, y), shapely.contains(zone, pts))


@pytest.mark.parametrize("n_points", [30, 500, 50_000])
def test_grid_index__few_and_many_points_per_zone(zones, n_points):
    """Few candidate points per zone (one vectorised call) and many (zone-by-zone calls) agree
    with the brute-force count."""
    x, y = random_points(21 + n_points, n_points)
    np.testing.assert_array_equal(GridIndex(zones, BOX, cells=3).counts(x, y), brute_counts(zones, x, y))


@pytest.mark.parametrize("cells", [1, None])
def test_grid_index__pairs_are_every_containing_zone(zones, cells):
    """pairs(x, y): every (point, zone) with the zone containing the point, none else."""
    x, y = random_points(31, 5_000)
    point, zone = GridIndex(zones, BOX, cells=cells).pairs(x, y)
    got = set(zip(point.tolist(), zone.tolist()))
    assert len(got) == len(point)  # no pair twice
    expected = {(int(p), z) for z, geom in enumerate(zones) for p in np.flatnonzero(shapely.contains_xy(geom, x, y))}
    assert got == expected


def test_region_classifier__in_region_and_covered_at_least_k(zones):
    """Column 0: inside the region (shapely.contains_xy); column j: inside it and in at least ks[j-1]
    zones (the brute-force count), for points in the region's box and beyond it."""
    region = Point(BOX.xmin + 20_000, BOX.ymin + 15_000).buffer(12_000).difference(
        box(BOX.xmin + 17_000, BOX.ymin + 12_000, BOX.xmin + 23_000, BOX.ymin + 18_000))
    ks = (1, 2, 4)
    classify = region_classifier(region, zones, ks)
    x, y = random_points(41, 40_000)
    got = classify(x, y)
    assert got.shape == (len(x), 1 + len(ks)) and got.dtype == bool
    within = shapely.contains_xy(region, x, y)
    counts = brute_counts(zones, x, y)
    np.testing.assert_array_equal(got[:, 0], within)
    for j, k in enumerate(ks, start=1):
        np.testing.assert_array_equal(got[:, j], within & (counts >= k))
    assert got[:, 3].any() and (got[:, 1] & ~got[:, 3]).any()  # guard: the k columns differ
