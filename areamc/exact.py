"""Exact reference areas, kept apart from the estimators they check.

* Planar: shapely's area of the geometry in the equal-area plane (m²).
* Geodesic: the area on the WGS84 ellipsoid of the densified geometry in
  longitude/latitude, from ``pyproj.Geod`` (Karney 2013, "Algorithms for
  geodesics", J. Geodesy 87:43-55), each short edge taken as a geodesic.
* Intersections, unions and the multiplicity arrangement of zones (m²).
* Density totals: areal weighting of blocks (Goodchild & Lam 1980) and
  cell fractions of rasters: :func:`cell_fractions`, in time and memory
  that grow with the outline's length rather than the raster's cells, and
  :func:`cell_total`, the reference with one polygon per cell.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Callable

import numpy as np
import shapely
from shapely.geometry.polygon import orient

from .cells import crossed_cells, edge_pieces, inner_runs
from .geodesy import WGS84, quadrangle_area
from .samplers import Box

__all__ = [
    "planar_area",
    "geodesic_area",
    "intersection_areas",
    "covered_area",
    "multiplicity_areas",
    "at_least",
    "block_total",
    "cell_total",
    "CellFractions",
    "cell_fractions",
    "FRACTION_TILE_CELLS",
]

#: Area of the WGS84 ellipsoid, m² (Snyder 1987, eq. 3-12 over the whole globe).
_ELLIPSOID_AREA = float(quadrangle_area(-180.0, -90.0, 180.0, 90.0))
#: A ring's Geod area of the wrong sign beyond this (m², one millionth of the ellipsoid)
#: means it was reduced, not that the ring is degenerate.
_REDUCED_SIGN = 1e-6 * _ELLIPSOID_AREA


def planar_area(geoms) -> np.ndarray:
    """Exact area, m², of geometries given in an equal-area plane (metres)."""
    return np.asarray(shapely.area(geoms), dtype=float)


def geodesic_area(geom_lonlat) -> float:
    """Area, m², on the WGS84 ellipsoid of a polygon given in lon/lat degrees.

    Rings are oriented first (exterior counter-clockwise, holes clockwise), since
    ``Geod.polygon_area_perimeter`` is signed and the rings' areas are added.
    Polygons across the antimeridian (longitudes beyond ±180) and round a pole
    (closed along the ±180 meridians and the pole, :mod:`areamc.globe`) are
    measured as they are: Geod follows each short edge as a geodesic.  Geod
    (GeographicLib's polygon area) reports a ring's signed area reduced to within
    half the ellipsoid's area; a ring holding more than half of it (a band round
    the globe, say) is put back by adding the ellipsoid's whole area.
    """
    parts = shapely.get_parts(geom_lonlat)
    total = 0.0
    for part in parts:
        if part.geom_type != "Polygon" or part.is_empty:
            continue
        part = orient(part, sign=1.0)
        total += _ring_area(part.exterior, 1.0)
        total += sum(_ring_area(ring, -1.0) for ring in part.interiors)
    return abs(float(total))


def _ring_area(ring, sign: float) -> float:
    """Signed WGS84 area, m², of one ring oriented `sign` (+1 counter-clockwise), unreduced."""
    xy = shapely.get_coordinates(ring)
    area, _ = WGS84.polygon_area_perimeter(xy[:, 0], xy[:, 1])
    if sign * area < -_REDUCED_SIGN:
        area += sign * _ELLIPSOID_AREA
    return float(area)


def intersection_areas(a, b) -> np.ndarray:
    """Exact planar areas, m², of the pairwise intersections ``a[i] ∩ b[i]`` (plane metres)."""
    return np.asarray(shapely.area(shapely.intersection(a, b)), dtype=float)


def covered_area(region, zones) -> float:
    """Exact planar area, m², of ``region ∩ union(zones)`` (plane metres)."""
    if len(zones) == 0:
        return 0.0
    return float(shapely.area(shapely.intersection(region, shapely.union_all(zones))))


def multiplicity_areas(zones, *, clip=None, deadline: float | None = None) -> dict[int, float] | None:
    """Exact planar area, m², covered by exactly k of `zones`, for every k ≥ 1.

    The zones' boundaries (and the clip's) are noded and polygonized into the
    faces of their planar arrangement; each face lies in a fixed set of
    zones, found by testing one interior point per face.  Returns None when
    `deadline` (a ``time.monotonic()`` value) passes between steps: a GEOS
    call in progress is not interrupted, so the budget is honoured to within
    one step.
    """
    zones = np.asarray(zones, dtype=object)
    if len(zones) == 0:
        return {}
    lines = list(shapely.boundary(zones))
    if clip is not None:
        lines.append(shapely.boundary(clip))
    noded = shapely.union_all(lines)
    if deadline is not None and time.monotonic() > deadline:
        return None
    faces = np.asarray(shapely.get_parts(shapely.polygonize(shapely.get_parts(noded))), dtype=object)
    if deadline is not None and time.monotonic() > deadline:
        return None
    if len(faces) == 0:
        return {}
    probe = shapely.point_on_surface(faces)
    if clip is not None:
        keep = shapely.within(probe, clip)
        faces, probe = faces[keep], probe[keep]
    tree = shapely.STRtree(zones)
    face_idx, _ = tree.query(probe, predicate="within")
    counts = np.bincount(face_idx, minlength=len(faces))
    areas = shapely.area(faces)
    out: dict[int, float] = {}
    for k in np.unique(counts):
        if k > 0:
            out[int(k)] = float(areas[counts == k].sum())
    return out


def at_least(exactly: dict[int, float], k: int) -> float:
    """Area covered by at least `k` zones from exactly-k areas."""
    return float(sum(a for j, a in exactly.items() if j >= k))


def block_total(blocks, rates, geom) -> float:
    """Exact integral over `geom` of a density uniform on each block: Σ rate_i |block_i ∩ geom|.

    Blocks and `geom` in plane metres, `rates` in counts per m² (count over
    block area): areal weighting (Goodchild & Lam 1980, Geo-Processing
    1:297-312).  Blocks that miss `geom` add nothing.
    """
    blocks = np.asarray(blocks, dtype=object)
    if blocks.size == 0:
        return 0.0
    inter = shapely.area(shapely.intersection(blocks, geom))
    return float(np.sum(np.asarray(rates, float) * inter))


def cell_total(cells, counts, geom) -> float:
    """Exact total of raster counts over `geom`: Σ count x |cell ∩ geom| / |cell| (cells and `geom` in plane metres).

    Only cells with a positive count that meet `geom` are intersected.  One
    polygon per cell: the reference :func:`cell_fractions` is checked
    against, for small grids (its time and memory grow with the cells).
    """
    cells = np.asarray(cells, dtype=object)
    counts = np.asarray(counts, float)
    keep = counts > 0
    cells, counts = cells[keep], counts[keep]
    hit = shapely.intersects(geom, cells)
    cells, counts = cells[hit], counts[hit]
    if not len(cells):
        return 0.0
    share = shapely.area(shapely.intersection(cells, geom)) / shapely.area(cells)
    return float(np.sum(counts * share))


# -- cell fractions of a grid, in time that grows with the outline ------------------------------------------------

#: Cells per tile: crossing cells are clipped, and runs of inside cells summed, this many at a time (and
#: this many ring vertices at once, :data:`_CLIP_BATCH`), so the work arrays stay within about 15 MB
#: whatever the grid's size (13 MiB peak under tracemalloc in benchmarks/raster_exact.py).
FRACTION_TILE_CELLS = 1 << 16
#: Crossing cells are clipped with the piece of the polygon in their tile of this many cells a side.
_CLIP_SIDE = 32
#: Largest bend (grid cells) allowed in the image of an outline piece before the outline is cut finer.
_PIECE_BEND = 0.02
#: Slack (grid cells) always added round the outline, far above the rounding of the transforms.
_PAD_FLOOR = 1e-6
#: Times the outline may be cut finer (each time by 2 to 4) before the grid is taken as too bent to map.
_CUTS = 4
#: Beyond this bend of the cells' own edges (grid cells) the grid is too distorted for the slack
#: estimate; the reference way (every cell of the window clipped, tile by tile) is taken instead.
_CELL_BEND_MAX = 0.1

GridMap = Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]]


@dataclass(frozen=True)
class CellFractions:
    """The share of every cell of a ``(rows, cols)`` grid inside a polygon: runs of whole cells and clipped cells.

    Cell ``(r, c)`` is the quadrilateral of its 4 corners on the plane
    (:func:`cell_fractions`).  Cells not listed lie wholly outside.

    Attributes
    ----------
    shape : (int, int)
        Rows and columns of the grid.
    run_row, run_first, run_last : numpy.ndarray
        Runs of cells wholly inside, row by row: row, first and last column
        (inclusive), sorted by row, then column.
    cells : numpy.ndarray
        Flat indices ``r * cols + c`` of the cells the outline crosses that
        share area with the polygon.
    shares : numpy.ndarray
        ``|cell ∩ polygon| / |cell|`` of each of `cells` (dimensionless, in (0, 1]).
    """

    shape: tuple[int, int]
    run_row: np.ndarray
    run_first: np.ndarray
    run_last: np.ndarray
    cells: np.ndarray
    shares: np.ndarray

    @property
    def whole_cells(self) -> int:
        """Number of cells wholly inside."""
        return int(np.sum(self.run_last - self.run_first + 1))

    def total(self, *factors: np.ndarray) -> float:
        """Σ over the cells of the product of `factors` (each a ``(rows, cols)`` array) x the cell's share.

        With the counts per cell as the one factor this is the exact total
        of the counts over the polygon.  Runs are summed a tile of rows at a
        time (cumulative sums of :data:`FRACTION_TILE_CELLS` cells at most).
        """
        rows, cols = self.shape
        out = 0.0
        if len(self.cells):
            value = np.ones(len(self.cells))
            for f in factors:
                value *= np.asarray(f, dtype=float).reshape(rows, cols).ravel()[self.cells]
            out += float(np.sum(value * self.shares))
        if not len(self.run_row):
            return out
        step = max(1, FRACTION_TILE_CELLS // max(cols, 1))
        bounds = np.searchsorted(self.run_row, np.arange(0, rows + step, step))
        for t, top in enumerate(range(0, rows, step)):
            i0, i1 = bounds[t], bounds[t + 1]
            if i0 == i1:
                continue
            block = np.ones((min(step, rows - top), cols))
            for f in factors:
                block *= np.asarray(f, dtype=float).reshape(rows, cols)[top:top + step]
            running = np.cumsum(block, axis=1)
            r = self.run_row[i0:i1] - top
            first, last = self.run_first[i0:i1], self.run_last[i0:i1]
            out += float(np.sum(running[r, last] - running[r, first] + block[r, first]))
        return out


def _none_inside(shape) -> CellFractions:
    empty = np.zeros(0, dtype=np.int64)
    return CellFractions(tuple(shape), empty, empty, empty, empty, np.zeros(0))


def _polygonal(geom):
    """The polygons of `geom` as one geometry (lines and points of a collection dropped), or None when there are none."""
    parts = shapely.get_parts(geom)
    parts = parts[np.isin(shapely.get_type_id(parts), (3, 6))] if len(parts) else parts
    parts = parts[~shapely.is_empty(parts)] if len(parts) else parts
    if not len(parts):
        return None
    out = parts[0] if len(parts) == 1 else shapely.multipolygons(shapely.get_parts(parts))
    shapely.prepare(out)
    return out


def _near_grid(geom, to_plane: GridMap, rows: int, cols: int):
    """`geom` cut to a box round the grid's cells (plane metres), prepared; None when nothing is left.

    The box is that of the projected corners along the grid's border, widened
    by a hundredth of its size: every cell's outline lies inside it (the
    corners inside the border map inside its image), so no share changes,
    and the parts of `geom` far beyond the grid are neither mapped nor cut.
    """
    side = np.concatenate([np.arange(cols + 1), np.full(rows + 1, cols), np.arange(cols + 1), np.zeros(rows + 1)])
    down = np.concatenate([np.zeros(cols + 1), np.arange(rows + 1), np.full(cols + 1, rows), np.arange(rows + 1)])
    x, y = to_plane(side.astype(float), down.astype(float))
    x, y = np.asarray(x, float), np.asarray(y, float)
    if not (np.isfinite(x).all() and np.isfinite(y).all()):
        return geom
    gx0, gy0, gx1, gy1 = shapely.bounds(geom)
    wide = 0.01 * max(x.max() - x.min(), y.max() - y.min())
    x0, y0, x1, y1 = x.min() - wide, y.min() - wide, x.max() + wide, y.max() + wide
    if gx0 >= x0 and gy0 >= y0 and gx1 <= x1 and gy1 <= y1:
        return geom  # wholly within the box already
    return _polygonal(shapely.intersection(geom, shapely.box(x0, y0, x1, y1)))


def _quads(to_plane: GridMap, r: np.ndarray, c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Plane corners ``(x, y)``, shape (n, 4) each, of cells (r, c): (c, r), (c + 1, r), (c + 1, r + 1), (c, r + 1)."""
    cu = np.stack([c, c + 1, c + 1, c], axis=1).astype(float)
    cv = np.stack([r, r, r + 1, r + 1], axis=1).astype(float)
    x, y = to_plane(cu.ravel(), cv.ravel())
    return np.asarray(x, float).reshape(-1, 4), np.asarray(y, float).reshape(-1, 4)


def _cell_bend(to_plane: GridMap, to_grid: GridMap, r: np.ndarray, c: np.ndarray) -> float:
    """How far (grid cells) the cells' 4-corner outlines stray from the grid's own cells, at cells (r, c).

    Each side of a cell's quadrilateral is the straight chord between two
    projected corners; the grid point of its midpoint is compared with the
    midpoint of the grid side.  For a smooth map the stray is largest there
    (second order in the cell's size).
    """
    x, y = _quads(to_plane, r, c)
    mu, mv = to_grid(((x + np.roll(x, -1, axis=1)) / 2).ravel(), ((y + np.roll(y, -1, axis=1)) / 2).ravel())
    cu = np.stack([c + 0.5, c + 1.0, c + 0.5, c + 0.0], axis=1).astype(float).ravel()
    cv = np.stack([r + 0.0, r + 0.5, r + 1.0, r + 0.5], axis=1).astype(float).ravel()
    return float(np.max(np.hypot(np.asarray(mu) - cu, np.asarray(mv) - cv), initial=0.0))


def _grid_outline(geom, to_plane: GridMap, to_grid: GridMap, rows: int, cols: int):
    """The outline of `geom` in grid coordinates, cut fine enough to be nearly straight there, and its slack.

    Returns ``(outline, pad)`` (pad in grid cells), or None when the map is
    not finite on the outline or the grid is too distorted for the slack
    estimate (:data:`_CELL_BEND_MAX`).
    """
    def grid_xy(xy):
        u, v = to_grid(xy[:, 0], xy[:, 1])
        return np.column_stack([np.asarray(u, float), np.asarray(v, float)])

    vertices = shapely.get_coordinates(geom)
    if not np.isfinite(grid_xy(vertices)).all():
        return None
    # pieces about as long as a cell side near the outline (plane metres)
    start = np.floor(grid_xy(vertices))
    r = np.clip(start[:, 1], 0, rows - 1).astype(np.int64)
    c = np.clip(start[:, 0], 0, cols - 1).astype(np.int64)
    key = np.unique(r * cols + c)
    x, y = _quads(to_plane, key // cols, key % cols)
    sides = np.hypot(x - np.roll(x, -1, axis=1), y - np.roll(y, -1, axis=1))
    step = float(np.min(sides[sides > 0], initial=math.inf))
    if not math.isfinite(step):
        return None
    last = math.inf
    for _ in range(_CUTS):
        cut = shapely.segmentize(geom, step)
        outline = shapely.transform(cut, grid_xy)
        px0, py0, px1, py1, _ = edge_pieces([cut], math.inf)
        gx0, gy0, gx1, gy1, _ = edge_pieces([outline], math.inf)
        mu, mv = to_grid((px0 + px1) / 2, (py0 + py1) / 2)
        bend = np.hypot(np.asarray(mu) - (gx0 + gx1) / 2, np.asarray(mv) - (gy0 + gy1) / 2)
        if not np.isfinite(bend).all() or not np.isfinite(shapely.get_coordinates(outline)).all():
            return None
        piece_bend = float(np.max(bend, initial=0.0))
        if piece_bend <= _PIECE_BEND:
            break
        if piece_bend > last / 2:
            return None  # halving the pieces did not quarter the bend: the map jumps along the outline
        last = piece_bend
        step /= min(4.0, 2 * math.sqrt(piece_bend / _PIECE_BEND))
    else:
        return None
    at = np.floor(shapely.get_coordinates(outline))
    key = np.unique(np.clip(at[:, 1], 0, rows - 1).astype(np.int64) * cols
                    + np.clip(at[:, 0], 0, cols - 1).astype(np.int64))
    cell_bend = _cell_bend(to_plane, to_grid, key // cols, key % cols)
    if not math.isfinite(cell_bend) or cell_bend > _CELL_BEND_MAX:
        return None
    return outline, 2 * (piece_bend + cell_bend) + _PAD_FLOOR


def _clip_shares(geom, to_plane: GridMap, cells: np.ndarray, cols: int) -> np.ndarray:
    """``|cell ∩ geom| / |cell|`` of each of `cells` (flat indices), each clipped with the part of `geom` near it.

    The cells are grouped in tiles of :data:`_CLIP_SIDE` cells a side, and
    `geom` is cut to each tile's box once (GEOS).  Each convex cell then
    clips the rings of its tile's piece by its 4 sides (:func:`_clip_rings`);
    a cell whose outline is not convex is intersected by GEOS instead.
    """
    r, c = np.divmod(cells, cols)
    x, y = _quads(to_plane, r, c)
    # local coordinates about each cell's first corner keep the products small
    ox, oy = x[:, :1].copy(), y[:, :1].copy()
    lx, ly = x - ox, y - oy
    area2 = np.sum(lx * np.roll(ly, -1, axis=1) - np.roll(lx, -1, axis=1) * ly, axis=1)
    flip = area2 < 0  # make every outline counter-clockwise
    lx[flip], ly[flip] = lx[flip, ::-1], ly[flip, ::-1]
    ex, ey = np.roll(lx, -1, axis=1) - lx, np.roll(ly, -1, axis=1) - ly
    turn = ex * np.roll(ey, -1, axis=1) - ey * np.roll(ex, -1, axis=1)
    convex = (turn > 0).all(axis=1) & np.isfinite(turn).all(axis=1)
    tiles_across = (cols + _CLIP_SIDE - 1) // _CLIP_SIDE
    tiles, tile_of = np.unique((r // _CLIP_SIDE) * tiles_across + c // _CLIP_SIDE, return_inverse=True)
    lo_x = np.full(len(tiles), np.inf)
    lo_y = np.full(len(tiles), np.inf)
    hi_x = np.full(len(tiles), -np.inf)
    hi_y = np.full(len(tiles), -np.inf)
    np.minimum.at(lo_x, tile_of, x.min(axis=1))
    np.minimum.at(lo_y, tile_of, y.min(axis=1))
    np.maximum.at(hi_x, tile_of, x.max(axis=1))
    np.maximum.at(hi_y, tile_of, y.max(axis=1))
    # every cell of a tile lies in the tile's box, so clipping with the piece of geom in that box changes nothing
    pieces = shapely.intersection(geom, shapely.box(lo_x, lo_y, hi_x, hi_y))
    inside = np.zeros(len(cells))
    if convex.any():
        inside[convex] = _clip_rings(pieces, tile_of[convex], lx[convex], ly[convex], ox[convex, 0], oy[convex, 0])
    if not convex.all():
        quads = shapely.polygons(np.stack([x[~convex], y[~convex]], axis=-1))
        inside[~convex] = shapely.area(shapely.intersection(quads, pieces[tile_of[~convex]]))
    area = np.abs(area2) / 2
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(area > 0, np.clip(inside / area, 0.0, 1.0), 0.0)


#: Ring vertices, summed over the cells of a batch, clipped at once by :func:`_clip_rings` (about 150 bytes
#: of work arrays each).
_CLIP_BATCH = FRACTION_TILE_CELLS


def _clip_rings(pieces, tile_of, qx, qy, ox, oy) -> np.ndarray:
    """Area (m²) of each convex cell ∩ the piece of its tile: the piece's rings clipped by the cell's 4 sides.

    `qx`, `qy` (n, 4): the cells' corners counter-clockwise, relative to
    ``(ox, oy)``.  Each ring of the piece (exterior counter-clockwise, holes
    clockwise) is clipped by the half-planes left of the cell's sides in
    turn (Sutherland & Hodgman 1974, CACM 17:32-42).  A ring that is not
    convex may come out with edges doubled back along a side, but its
    signed area is the area of the ring's inside within the cell, so the
    rings' signed areas add up to ``|cell ∩ piece|``.  All rings of all
    cells are clipped together, as flat arrays.
    """
    polys, poly_tile = shapely.get_parts(shapely.orient_polygons(pieces), return_index=True)
    keep = shapely.get_type_id(polys) == 3
    polys, poly_tile = polys[keep], poly_tile[keep]
    rings, ring_poly = shapely.get_rings(polys, return_index=True)
    coords, vertex_ring = shapely.get_coordinates(rings, return_index=True)
    count = np.bincount(vertex_ring, minlength=len(rings)) - 1  # the closing vertex dropped
    first = np.concatenate([[0], np.cumsum(count + 1)[:-1]]).astype(np.int64)
    ring_tile = poly_tile[ring_poly]
    order = np.argsort(ring_tile, kind="stable")
    ring_lo = np.searchsorted(ring_tile[order], np.arange(len(pieces)), side="left")
    ring_hi = np.searchsorted(ring_tile[order], np.arange(len(pieces)), side="right")
    per_cell = np.array([count[order[ring_lo[t]:ring_hi[t]]].sum() for t in range(len(pieces))])[tile_of]
    out = np.zeros(len(tile_of))
    start = 0
    while start < len(tile_of):  # batches of cells holding about _CLIP_BATCH ring vertices
        stop = start + max(1, int(np.searchsorted(np.cumsum(per_cell[start:]), _CLIP_BATCH)))
        cells = np.arange(start, min(stop, len(tile_of)))
        nring = ring_hi[tile_of[cells]] - ring_lo[tile_of[cells]]
        inst_cell = np.repeat(cells, nring)
        inst_ring = order[np.repeat(ring_lo[tile_of[cells]], nring) + _within(nring)]
        nvert = count[inst_ring]
        inst = np.repeat(np.arange(len(inst_ring)), nvert)
        vertex = np.repeat(first[inst_ring], nvert) + _within(nvert)
        px = coords[vertex, 0] - ox[inst_cell[inst]]
        py = coords[vertex, 1] - oy[inst_cell[inst]]
        for k in range(4):
            ax, ay = qx[inst_cell[inst], k], qy[inst_cell[inst], k]
            bx, by = qx[inst_cell[inst], (k + 1) % 4], qy[inst_cell[inst], (k + 1) % 4]
            px, py, inst = _clip_half_plane(px, py, inst, ax, ay, bx - ax, by - ay)
        nxt = _next_in_ring(inst)
        twice = np.bincount(inst, weights=px * py[nxt] - px[nxt] * py, minlength=len(inst_ring))
        out[start:start + len(cells)] += np.bincount(inst_cell - start, weights=twice / 2, minlength=len(cells))
        start = start + len(cells)
    return out


def _within(n: np.ndarray) -> np.ndarray:
    """0, 1, ..., n_i - 1 for each i, concatenated."""
    n = np.asarray(n, dtype=np.int64)
    return np.arange(int(n.sum()), dtype=np.int64) - np.repeat(np.cumsum(n) - n, n)


def _next_in_ring(inst: np.ndarray) -> np.ndarray:
    """Index of the next vertex of the same ring (the first after the last); `inst` sorted, one value per ring."""
    if not len(inst):
        return np.zeros(0, dtype=np.int64)
    head = np.concatenate([[True], inst[1:] != inst[:-1]])
    last = np.concatenate([inst[1:] != inst[:-1], [True]])
    starts = np.flatnonzero(head)
    idx = np.arange(len(inst), dtype=np.int64)
    return np.where(last, starts[np.cumsum(head) - 1], idx + 1)


def _clip_half_plane(px, py, inst, ax, ay, ex, ey):
    """Clip rings (flat vertex arrays, ring id `inst`) to the left of the line through (ax, ay) along (ex, ey).

    One Sutherland-Hodgman step, each vertex with its own line: a vertex is
    kept when it lies on or left of its line (``cross(e, p - a) >= 0``), and
    an edge that crosses the line adds the crossing.
    """
    if not len(inst):
        return px, py, inst
    nxt = _next_in_ring(inst)
    d = ex * (py - ay) - ey * (px - ax)
    keep = d >= 0
    cross = keep != keep[nxt]
    emit = cross.astype(np.int64) + keep[nxt]
    at = np.cumsum(emit) - emit
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(cross, d / (d - d[nxt]), 0.0)
    total = int(emit.sum())
    qx, qy = np.empty(total), np.empty(total)
    w = np.flatnonzero(cross)
    qx[at[w]] = px[w] + t[w] * (px[nxt[w]] - px[w])
    qy[at[w]] = py[w] + t[w] * (py[nxt[w]] - py[w])
    v = np.flatnonzero(keep[nxt])
    qx[at[v] + cross[v]] = px[nxt[v]]
    qy[at[v] + cross[v]] = py[nxt[v]]
    return qx, qy, np.repeat(inst, emit)


def _past(deadline: float | None) -> bool:
    return deadline is not None and time.monotonic() > deadline


def cell_fractions(geom, shape: tuple[int, int], to_plane: GridMap, to_grid: GridMap, *,
                   deadline: float | None = None) -> CellFractions | None:
    """The exact share of each cell of a grid inside `geom`, in time and memory set by the outline, not the cells.

    Parameters
    ----------
    geom : shapely geometry
        A polygon or multipolygon in plane metres (the lines and points of a
        collection are dropped).
    shape : (int, int)
        Rows and columns of the grid.
    to_plane : callable
        ``to_plane(col, row)``: plane metres ``(x, y)`` of grid points, in
        fractional columns and rows (corner ``(c, r)`` of cell ``(r, c)``
        is the grid point ``(c, r)``; for a raster, its affine transform
        then the transformer to the plane).
    to_grid : callable
        ``to_grid(x, y)``: the inverse, plane metres to ``(col, row)``.
    deadline : float, optional
        A ``time.monotonic()`` value: return None once it passes, checked
        between steps and tiles (a step in progress is not interrupted).

    Returns
    -------
    CellFractions, or None when `deadline` passed.

    Notes
    -----
    Cell ``(r, c)`` is the quadrilateral of its 4 projected corners on the
    plane, as in :func:`cell_total`, which gives the same shares with one
    polygon per cell.  Here:

    1. the outline (holes included) is cut into pieces about a cell long
       on the plane, shorter where their images on the grid bend, and
       mapped to the grid (:func:`to_grid`);
    2. the cells those images pass within a slack of are *crossing*
       (:func:`~areamc.cells.crossed_cells`).  The slack is twice the
       largest bend measured at the pieces' midpoints plus twice the largest
       stray of a cell's straight sides from the grid's own cell sides,
       measured at the cells the outline passes through (both second order
       in the cell's size: about 2e-5 cells for 100 m cells, exactly 0 for a
       grid in the plane's own CRS), plus 1e-6 cells;
    3. every other cell lies wholly inside or wholly outside.  In each row,
       the cells between two crossing cells form a run no edge reaches
       (:func:`~areamc.cells.inner_runs`), decided by one
       ``shapely.contains_xy`` of its first cell's centre (the mean of the
       4 corners);
    4. only the crossing cells are clipped, :data:`FRACTION_TILE_CELLS` at
       a time: `geom` is cut to the box of each tile of 32 x 32 cells (GEOS),
       and each cell clips its tile's piece by its own 4 sides
       (Sutherland & Hodgman 1974, vectorised over all the cells).

    When the map is not finite on the outline, or the cells stray more
    than 0.1 cell from the grid (a coarse grid far from its CRS's centre),
    every cell of the grid is clipped instead, a tile at a time: the same
    shares, in time that grows with the cells.
    """
    rows, cols = (int(v) for v in shape)
    geom = _polygonal(geom) if rows > 0 and cols > 0 else None
    if geom is not None:
        geom = _near_grid(geom, to_plane, rows, cols)
    if geom is None:
        return _none_inside((rows, cols))
    outline = _grid_outline(geom, to_plane, to_grid, rows, cols)
    if outline is None:
        return _every_cell(geom, (rows, cols), to_plane, deadline)
    outline, pad = outline
    _, crossed = crossed_cells([outline], Box(0.0, 0.0, float(cols), float(rows)), cols, rows, pad=pad)
    if _past(deadline):
        return None
    # runs of the other cells, row by row (with the grid's edges as sentinels), each decided by one centre
    r, c = np.divmod(crossed, cols)
    every = np.arange(rows, dtype=np.int64)
    row = np.concatenate([r, every, every])
    col = np.concatenate([c, np.full(rows, -1, dtype=np.int64), np.full(rows, cols, dtype=np.int64)])
    order = np.lexsort((col, row))
    _, run_row, first, last = inner_runs(np.zeros(len(row), dtype=np.int64), row[order], col[order])
    x, y = _quads(to_plane, run_row, first)
    inside = shapely.contains_xy(geom, x.mean(axis=1), y.mean(axis=1))
    if _past(deadline):
        return None
    shares = np.empty(len(crossed))
    for start in range(0, len(crossed), FRACTION_TILE_CELLS):
        part = crossed[start:start + FRACTION_TILE_CELLS]
        shares[start:start + len(part)] = _clip_shares(geom, to_plane, part, cols)
        if _past(deadline):
            return None
    keep = shares > 0
    return CellFractions((rows, cols), run_row[inside], first[inside], last[inside], crossed[keep], shares[keep])


def _every_cell(geom, shape, to_plane: GridMap, deadline: float | None) -> CellFractions | None:
    """:func:`cell_fractions` the reference way: every cell clipped, :data:`FRACTION_TILE_CELLS` at a time."""
    rows, cols = shape
    cells, shares = [], []
    for start in range(0, rows * cols, FRACTION_TILE_CELLS):
        part = np.arange(start, min(start + FRACTION_TILE_CELLS, rows * cols), dtype=np.int64)
        r, c = np.divmod(part, cols)
        x, y = _quads(to_plane, r, c)
        quads = shapely.polygons(np.stack([x, y], axis=-1))
        near = shapely.intersects(geom, quads) & np.isfinite(x).all(axis=1) & np.isfinite(y).all(axis=1)
        if near.any():
            share = _clip_shares(geom, to_plane, part[near], cols)
            cells.append(part[near][share > 0])
            shares.append(share[share > 0])
        if _past(deadline):
            return None
    empty = np.zeros(0, dtype=np.int64)
    return CellFractions(shape, empty, empty, empty,
                         np.concatenate(cells) if cells else empty, np.concatenate(shares) if shares else np.zeros(0))
