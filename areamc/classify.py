"""Point classification against polygons in the equal-area plane.

Vectorised over coordinate arrays with shapely's ``contains_xy`` on prepared
geometries; no Point objects and no per-point Python loop.  Boundary rule: a
point exactly on an edge counts as outside (``contains``); for continuous
samplers that event has probability zero.
"""

from __future__ import annotations

import numpy as np
import shapely

from .samplers import Box

__all__ = ["inside", "GridIndex", "region_classifier"]


def inside(geom) -> "callable":
    """Return ``f(x, y) -> bool array`` testing points (plane metres) against `geom`.

    `geom` is prepared once here, so repeated calls are fast.
    """
    shapely.prepare(geom)

    def test(x: np.ndarray, y: np.ndarray) -> np.ndarray:
        return shapely.contains_xy(geom, x, y)

    return test


class GridIndex:
    """Count, for each point, how many polygons (zones, blocks) contain it, testing only those that can reach it.

    A ``g x g`` grid is laid over the sampling box.  For each cell the zones
    are sorted, once, into those that contain the whole cell (counted without
    a test) and those that only cross it (tested with ``contains_xy``); zones
    that miss the cell are never looked at.  The candidate pairs come from a
    shapely ``STRtree`` query of the cell boxes.  Per point the cost is then
    about the number of zone edges in its cell, near constant as zones grow.

    Parameters
    ----------
    zones : array of shapely geometries
        Polygons (zones, or density blocks) in the equal-area plane (metres).
    box : Box
        The box points will be drawn from (plane metres).
    cells : int, optional
        Grid cells per side; by default sized so that a cell is crossed by
        about half a zone edge on average (see :func:`_grid_size`).

    Notes
    -----
    Boundary rule: as :func:`inside`, a point on a zone's edge is outside it.
    Points outside `box` are counted in no zone; zones reaching beyond the box
    are answered only for the part inside it.
    """

    def __init__(self, zones, box, cells: int | None = None) -> None:
        zones = np.asarray(zones, dtype=object)
        self.box = box
        self.n_zones = len(zones)
        g = cells or _grid_size(zones, box)
        self.cells = g
        self._dx = (box.xmax - box.xmin) / g
        self._dy = (box.ymax - box.ymin) / g
        xs = box.xmin + self._dx * np.arange(g + 1)
        ys = box.ymin + self._dy * np.arange(g + 1)
        ix, iy = np.meshgrid(np.arange(g), np.arange(g))
        ix, iy = ix.ravel(), iy.ravel()
        cell_boxes = shapely.box(xs[ix], ys[iy], xs[ix + 1], ys[iy + 1])
        shapely.prepare(zones)
        self._zones = zones
        if len(zones):
            tree = shapely.STRtree(zones)
            cell_idx, zone_idx = tree.query(cell_boxes, predicate="intersects")
        else:
            cell_idx = zone_idx = np.zeros(0, dtype=np.intp)
        # cell id = iy * g + ix, matching how points are binned below
        cell_id = iy[cell_idx] * g + ix[cell_idx]
        full = shapely.contains(zones[zone_idx], cell_boxes[cell_idx]) if len(cell_idx) else np.zeros(0, bool)
        # one extra, empty cell (id g * g) stands for every point outside the box
        self._base = np.bincount(cell_id[full], minlength=g * g + 1).astype(np.int64)
        self._full_zone, self._full_ptr = _csr(cell_id[full], zone_idx[full], g * g + 1)
        self._partial_zone, self._indptr = _csr(cell_id[~full], zone_idx[~full], g * g + 1)
        self.max_count = int((self._base + np.diff(self._indptr)).max()) if g else 0

    def _cell(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        g = self.cells
        fx = (x - self.box.xmin) / self._dx
        fy = (y - self.box.ymin) / self._dy
        ix = np.clip(fx.astype(np.int64), 0, g - 1)
        iy = np.clip(fy.astype(np.int64), 0, g - 1)
        outside = (fx < 0) | (fx > g) | (fy < 0) | (fy > g) | ~np.isfinite(fx) | ~np.isfinite(fy)
        return np.where(outside, g * g, iy * g + ix)

    def _partial_hits(self, x: np.ndarray, y: np.ndarray, cell: np.ndarray):
        point, zone = _expand(cell, self._indptr, self._partial_zone)
        if not point.size:
            return point, zone
        order = np.argsort(zone, kind="stable")
        point, zone = point[order], zone[order]
        cut = np.flatnonzero(np.diff(zone)) + 1
        if point.size < _GROUPED_MIN_TESTS * (cut.size + 1):
            # few tests per zone: one vectorised call over an array of geometries
            hit = shapely.contains_xy(self._zones[zone], x[point], y[point])
        else:
            # many tests per zone: one call per zone is cheaper per test
            hit = np.empty(point.size, dtype=bool)
            for lo, hi in zip(np.concatenate([[0], cut]), np.concatenate([cut, [point.size]])):
                pts = point[lo:hi]
                hit[lo:hi] = shapely.contains_xy(self._zones[zone[lo]], x[pts], y[pts])
        return point[hit], zone[hit]

    def counts(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Number of zones containing each point (int64 array, shape of `x`); points in plane metres."""
        x = np.asarray(x, float)
        y = np.asarray(y, float)
        cell = self._cell(x, y)
        count = self._base[cell].copy()
        point, _ = self._partial_hits(x, y, cell)
        if point.size:
            count += np.bincount(point, minlength=len(x))
        return count

    def pairs(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Every (point index, zone index) with the zone containing the point; points in plane metres."""
        x = np.asarray(x, float)
        y = np.asarray(y, float)
        cell = self._cell(x, y)
        full_point, full_zone = _expand(cell, self._full_ptr, self._full_zone)
        point, zone = self._partial_hits(x, y, cell)
        return np.concatenate([full_point, point]), np.concatenate([full_zone, zone])


def _csr(cells: np.ndarray, zones: np.ndarray, n_cells: int) -> tuple[np.ndarray, np.ndarray]:
    """Zones grouped by cell: (zone ids sorted by cell, row pointer of length n_cells + 1)."""
    order = np.argsort(cells, kind="stable")
    indptr = np.concatenate([[0], np.cumsum(np.bincount(cells, minlength=n_cells))])
    return zones[order], indptr


def _expand(cell: np.ndarray, indptr: np.ndarray, members: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """All (point, member) pairs for the members listed under each point's cell."""
    start = indptr[cell]
    k = indptr[cell + 1] - start
    total = int(k.sum())
    if not total:
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty
    point = np.repeat(np.arange(len(cell)), k)
    offset = np.arange(total) - np.repeat(np.cumsum(k) - k, k) + np.repeat(start, k)
    return point, members[offset]


#: Tests per zone above which testing zone by zone beats one call over a geometry array.
_GROUPED_MIN_TESTS = 48
#: Average number of zone boundaries crossing a cell that the default grid aims for.
_CROSSINGS_PER_CELL = 0.5
_MAX_CELLS = 256


def _grid_size(zones: np.ndarray, box) -> int:
    """Cells per side so that zone boundaries cross about 0.5 cells' worth each.

    A boundary of length P crosses about 1.3 P / s cells of side s (common
    practice for grid indexes), so the crossings per cell are
    1.3 ΣP s / (W H); solve for s and clip to 4..256 cells per side.
    """
    width, height = box.xmax - box.xmin, box.ymax - box.ymin
    perimeter = float(np.sum(shapely.length(zones))) if len(zones) else 0.0
    if perimeter <= 0:
        return 4
    side = _CROSSINGS_PER_CELL * width * height / (1.3 * perimeter)
    return int(np.clip(np.ceil(max(width, height) / side), 4, _MAX_CELLS))


def region_classifier(region, zones, ks):
    """``f(x, y)`` giving bools ``(n, 1 + len(ks))``: in `region`, and in it covered by ≥ k of `zones`.

    Points in plane metres.  Multiplicity is counted only for points inside
    the region, by a :class:`GridIndex` over `zones` laid on the region's
    bounding box.
    """
    karr = np.asarray(ks)
    index = GridIndex(zones, Box.of(region.bounds))
    shapely.prepare(region)

    def classify(x, y):
        within = shapely.contains_xy(region, x, y)
        counts = np.zeros(len(x), dtype=np.int64)
        counts[within] = index.counts(x[within], y[within])
        return np.column_stack([within, counts[:, None] >= karr[None, :]])

    return classify
