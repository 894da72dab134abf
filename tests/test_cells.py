"""Tests of ``areamc.cells``: the cell-classified point-in-polygon test against shapely.

The reference is ``shapely.contains_xy`` on the whole polygon (shapely 2 / GEOS): the
cell classifier must give the same answer for every point, including points exactly on
edges and vertices (outside, by the ``contains`` rule), on the lines between cells, in
holes, beside slivers, outside the box and NaN.  Polygons and points are random test
inputs in plane metres (property-based with hypothesis), not reference data.
"""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from shapely.geometry import MultiPolygon, Point, Polygon, box

from areamc.cells import CROSSING, INSIDE, OUTSIDE, CellClassifier, build_grid, grid_cells
from areamc.samplers import Box

#: A UTM-like offset, so rounding happens at realistic magnitudes (metres).
X0, Y0 = 500_000.0, 5_000_000.0


def star(seed: int, vertices: int = 400, holes: bool = True):
    """A wiggly star polygon around (X0, Y0), with a hole, of about 10 km radius."""
    rng = np.random.default_rng(seed)
    t = np.sort(rng.uniform(0, 2 * np.pi, vertices))
    r = 10_000 * (1 + 0.3 * rng.uniform(-1, 1, vertices))
    poly = Polygon(np.column_stack([X0 + r * np.cos(t), Y0 + r * np.sin(t)])).buffer(0)
    if holes:
        poly = poly.difference(Point(X0 + 500, Y0 - 300).buffer(1_500, quad_segs=4))
    return poly


def adversarial_points(geom, grid, rng) -> tuple[np.ndarray, np.ndarray]:
    """Vertices, edge midpoints and points a hair off them, cell-grid lines and corners, strays and NaN."""
    coords = shapely.get_coordinates(shapely.boundary(geom))
    mids = (coords[1:] + coords[:-1]) / 2
    hair = np.spacing(np.abs(coords).max()) * np.array([[1, 0], [-1, 0], [0, 1], [0, -1], [3, -2]])
    near = (coords[:, None, :] + hair[None, :, :]).reshape(-1, 2)
    b = grid.box
    gx = b.xmin + np.arange(grid.nx + 1) * grid.dx
    gy = b.ymin + np.arange(grid.ny + 1) * grid.dy
    lines_x = np.column_stack([rng.choice(gx, 2000), rng.uniform(b.ymin, b.ymax, 2000)])
    lines_y = np.column_stack([rng.uniform(b.xmin, b.xmax, 2000), rng.choice(gy, 2000)])
    corners = np.column_stack([rng.choice(gx, 2000), rng.choice(gy, 2000)])
    strays = np.column_stack([rng.uniform(b.xmin - 5e3, b.xmax + 5e3, 2000), rng.uniform(b.ymin - 5e3, b.ymax + 5e3, 2000)])
    odd = np.array([[np.nan, Y0], [X0, np.nan], [np.inf, Y0], [b.xmax, b.ymax], [b.xmin, b.ymin]])
    pts = np.vstack([coords, mids, near, lines_x, lines_y, corners, strays, odd])
    return pts[:, 0], pts[:, 1]


def assert_same(geom, classifier, x, y) -> None:
    want = shapely.contains_xy(geom, x, y)
    got = classifier(x, y)
    bad = np.flatnonzero(got != want)
    assert not bad.size, f"{bad.size} points differ, first at {x[bad[0]]!r}, {y[bad[0]]!r}"


@pytest.mark.parametrize("points", [1_000, 100_000, 4_000_000])
def test_star_with_hole_matches_contains_xy(points):
    geom = star(1)
    rng = np.random.default_rng(2)
    c = CellClassifier(geom, points=points)
    b = c.grid.box
    x = rng.uniform(b.xmin, b.xmax, 200_000)
    y = rng.uniform(b.ymin, b.ymax, 200_000)
    assert_same(geom, c, x, y)
    assert_same(geom, c, *adversarial_points(geom, c.grid, rng))


def test_cells_are_classified_exactly():
    """Every inside cell lies in the polygon's interior, every outside cell misses it (closed cell boxes)."""
    geom = star(3)
    b = Box.of(geom.bounds)
    grid = build_grid(geom, b, 64, 48)
    cells = grid.cells.ravel()
    x0, y0 = grid.cell_corners(np.arange(cells.size))
    boxes = shapely.box(x0, y0, x0 + grid.dx, y0 + grid.dy)
    assert shapely.contains_properly(geom, boxes[cells == INSIDE]).all()
    assert not shapely.intersects(geom, boxes[cells == OUTSIDE]).any()
    # the supercover is conservative but not wasteful: every cell an edge truly crosses is marked
    truly = shapely.intersects(shapely.boundary(geom), boxes)
    assert (cells[truly] == CROSSING).all()
    assert np.count_nonzero(cells == CROSSING) <= 3 * np.count_nonzero(truly)
    # inside cells bound the area from below, inside + crossing from above (shapely.area)
    assert grid.inside_area <= geom.area <= grid.inside_area + np.count_nonzero(cells == CROSSING) * grid.cell_area


def test_polygon_along_cell_lines():
    """Edges lying exactly on grid lines: points on them are outside (contains rule), neighbours decide right."""
    b = Box(X0, Y0, X0 + 1_000.0, Y0 + 1_000.0)
    grid_nx, grid_ny = 10, 10
    geom = box(X0 + 200.0, Y0 + 300.0, X0 + 700.0, Y0 + 800.0)  # edges on the 100 m grid lines
    c = CellClassifier(geom, b, points=int(grid_nx * grid_ny / 0.25))
    assert (c.grid.nx, c.grid.ny) == (grid_nx, grid_ny)
    rng = np.random.default_rng(4)
    xs = X0 + np.arange(0, 1_001, 50.0)
    gx, gy = np.meshgrid(xs, Y0 + np.arange(0, 1_001, 50.0))
    assert_same(geom, c, gx.ravel(), gy.ravel())
    assert_same(geom, c, *adversarial_points(geom, c.grid, rng))


def test_multipolygon_slivers_and_touching_parts():
    """A sliver thinner than a cell, parts touching at a vertex, a part inside another's hole."""
    sliver = Polygon([(X0, Y0), (X0 + 5_000, Y0 + 0.01), (X0 + 5_000, Y0 + 0.02)])
    a = box(X0 + 1_000, Y0 + 1_000, X0 + 2_000, Y0 + 2_000)
    touching = box(X0 + 2_000, Y0 + 2_000, X0 + 3_000, Y0 + 3_000)
    ring = box(X0 + 3_500, Y0, X0 + 5_000, Y0 + 1_500).difference(box(X0 + 3_900, Y0 + 400, X0 + 4_600, Y0 + 1_100))
    island = box(X0 + 4_000, Y0 + 500, X0 + 4_500, Y0 + 1_000)
    geom = MultiPolygon([sliver, a, touching, *ring.geoms] if hasattr(ring, "geoms") else [sliver, a, touching, ring, island])
    rng = np.random.default_rng(5)
    for points in (100, 10_000, 1_000_000):
        c = CellClassifier(geom, points=points)
        b = c.grid.box
        assert_same(geom, c, rng.uniform(b.xmin, b.xmax, 50_000), rng.uniform(b.ymin, b.ymax, 50_000))
        assert_same(geom, c, *adversarial_points(geom, c.grid, rng))


def test_grid_size_follows_points_and_caps():
    b = Box(0.0, 0.0, 4_000.0, 1_000.0)
    nx, ny = grid_cells(400_000, b)
    assert nx * ny == pytest.approx(100_000, rel=0.05) and nx == pytest.approx(4 * ny, rel=0.05)
    assert grid_cells(1, b) == (8, 4) or min(grid_cells(1, b)) >= 4
    nx, ny = grid_cells(10**12, b)
    assert nx * ny <= 1 << 20


def test_empty_and_degenerate():
    empty = Polygon()
    c = CellClassifier(empty, Box(0.0, 0.0, 1.0, 1.0), points=1_000)
    assert not c(np.array([0.5]), np.array([0.5])).any()


@st.composite
def polygons(draw):
    """Random simple-ish polygons (made valid), some with holes, at a UTM-like offset."""
    n = draw(st.integers(3, 40))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    scale = draw(st.sampled_from([1.0, 100.0, 10_000.0]))
    pts = rng.uniform(-scale, scale, (n, 2)) + [X0, Y0]
    geom = shapely.make_valid(Polygon(pts))
    geom = shapely.union_all([g for g in shapely.get_parts(geom) if g.geom_type == "Polygon"]) if not geom.is_empty else geom
    if draw(st.booleans()) and not geom.is_empty:
        hole = Point(X0, Y0).buffer(scale * draw(st.floats(0.05, 0.5)), quad_segs=3)
        geom = geom.difference(hole)
    return geom, seed


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(polygons(), st.sampled_from([50, 5_000, 500_000]))
def test_property_matches_contains_xy(case, points):
    geom, seed = case
    if geom.is_empty or geom.area == 0:
        return
    rng = np.random.default_rng(seed)
    c = CellClassifier(geom, points=points)
    b = c.grid.box if c.grid is not None else Box.of(geom.bounds)
    x = rng.uniform(b.xmin, b.xmax, 5_000)
    y = rng.uniform(b.ymin, b.ymax, 5_000)
    assert_same(geom, c, x, y)
    if c.grid is not None:
        assert_same(geom, c, *adversarial_points(geom, c.grid, rng))


@st.composite
def zone_sets(draw):
    """A few random polygons (made valid) around a box, some reaching past it or holding it whole."""
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    zones = []
    for _ in range(draw(st.integers(1, 12))):
        centre = rng.uniform(-1.5, 1.5, 2) * 1_000 + [X0, Y0]
        pts = centre + rng.uniform(-1, 1, (rng.integers(3, 20), 2)) * rng.choice([50.0, 500.0, 3_000.0])
        geom = shapely.make_valid(Polygon(pts))
        polys = [g for g in shapely.get_parts(geom) if g.geom_type == "Polygon" and g.area > 0]
        if polys:
            zones.append(shapely.union_all(polys))
    if draw(st.booleans()):
        zones.append(box(X0 - 5_000, Y0 - 5_000, X0 + 5_000, Y0 + 5_000))  # holds the whole box
    return zones, seed


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(zone_sets(), st.sampled_from([None, 1, 3, 64]))
def test_property_grid_index_counts_match_brute_force(case, cells):
    """GridIndex counts (areamc.classify) equal one contains_xy per zone, summed; inside, on and past the box."""
    from areamc.classify import GridIndex

    zones, seed = case
    if not zones:
        return
    rng = np.random.default_rng(seed)
    b = Box(X0 - 1_000, Y0 - 1_000, X0 + 1_000, Y0 + 1_000)
    index = GridIndex(zones, b, cells=cells)
    x = rng.uniform(b.xmin - 300, b.xmax + 300, 4_000)
    y = rng.uniform(b.ymin - 300, b.ymax + 300, 4_000)
    verts = shapely.get_coordinates(shapely.boundary(np.asarray(zones, dtype=object)))
    x, y = np.concatenate([x, verts[:, 0]]), np.concatenate([y, verts[:, 1]])
    want = np.sum([shapely.contains_xy(z, x, y) for z in zones], axis=0)
    np.testing.assert_array_equal(index.counts(x, y), want)
