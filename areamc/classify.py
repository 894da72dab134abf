"""Point classification against polygons in the equal-area plane.

Vectorised over coordinate arrays with shapely's ``contains_xy`` on prepared
geometries; no Point objects and no per-point Python loop.  Boundary rule: a
point exactly on an edge counts as outside (``contains``); for continuous
samplers that event has probability zero.
"""

from __future__ import annotations

import numpy as np
import shapely

from .cells import INSIDE, OUTSIDE, CellClassifier, Strata, build_grid, crossed_cells, inner_runs
from .samplers import Box

__all__ = ["inside", "GridIndex", "RegionClassifier", "region_classifier"]


#: Points a grid is sized for when the caller cannot say (a precision target).
GUESS_POINTS = 1_000_000


def inside(geom, box: Box | None = None, points: int | None = None) -> CellClassifier:
    """Return ``f(x, y) -> bool array`` testing points (plane metres) against `geom`.

    The answers are ``shapely.contains_xy(geom, x, y)``, point for point,
    from a :class:`~areamc.cells.CellClassifier` over `box` (default: the
    bounds of `geom`) sized for about `points` points (default
    :data:`GUESS_POINTS`).
    """
    return CellClassifier(geom, box, points or GUESS_POINTS)


class GridIndex:
    """Count, for each point, how many polygons (zones, blocks) contain it, testing only those that can reach it.

    A grid is laid over the sampling box and each zone is sorted, once,
    into the cells its edges cross (tested with ``contains_xy`` there) and
    the cells it wholly contains (counted without a test); zones that miss a
    cell are never looked at.  The cells an edge crosses come from cutting
    every edge into pieces no longer than a cell (:func:`~areamc.cells.crossed_cells`);
    between two crossed cells of a zone in one row, the run of cells lies
    wholly inside or outside it, decided by one test at its first cell's
    centre (:func:`~areamc.cells.inner_runs`).  No geometry is made per cell.

    Parameters
    ----------
    zones : array of shapely geometries
        Polygons (zones, or density blocks) in the equal-area plane (metres).
    box : Box
        The box points will be drawn from (plane metres).
    cells : int, optional
        Grid cells per side; by default sized from the zones' edges and
        `points` (see :func:`_grid_size`).
    points : int, optional
        About how many points will be counted (default
        :data:`GUESS_POINTS`): the grid has at most that many cells.

    Notes
    -----
    Boundary rule: as :func:`inside`, a point on a zone's edge is outside it.
    Points off the grid (outside `box`, on its far edges, or not finite) are
    answered exactly by an ``STRtree`` query, more slowly.
    """

    def __init__(self, zones, box, cells: int | None = None, points: int | None = None) -> None:
        zones = np.asarray(zones, dtype=object)
        self.box = box
        self.n_zones = len(zones)
        g = cells or _grid_size(zones, box, points or GUESS_POINTS)
        self.cells = g
        self._dx = (box.xmax - box.xmin) / g
        self._dy = (box.ymax - box.ymin) / g
        shapely.prepare(zones)
        self._zones = zones
        width = g + 2  # one border cell all round: bordered id (iy + 1) * width + ix + 1
        n_ids = width * width
        if len(zones):
            owner, cell = crossed_cells(zones, box, g, g)
            run_zone, run_row, first, last = inner_runs(*_with_sentinels(zones, box, g, owner, cell))
            full = shapely.contains_xy(zones[run_zone], box.xmin + (first + 0.5) * self._dx,
                                       box.ymin + (run_row + 0.5) * self._dy)
            run_zone, run_row, first, last = run_zone[full], run_row[full], first[full], last[full]
            iy, ix = np.divmod(cell, g)
            partial_id = (iy + 1) * width + ix + 1
        else:
            owner = partial_id = run_zone = run_row = first = last = np.zeros(0, dtype=np.int64)
        # base counts: +1 over each full run, by a running sum along each row
        start = (run_row + 1) * width + first + 1
        stop = (run_row + 1) * width + last + 2
        diff = np.bincount(start, minlength=n_ids + 1) - np.bincount(stop, minlength=n_ids + 1)
        self._base = np.cumsum(diff.reshape(-1)[:n_ids].reshape(width, width), axis=1).ravel().astype(np.int64)
        self._runs = (run_zone, start, stop)
        self._full: tuple[np.ndarray, np.ndarray] | None = None
        self._partial_zone, self._indptr = _csr(partial_id, owner, n_ids)
        border = np.ones((width, width), dtype=bool)
        border[1:-1, 1:-1] = False
        self._base_border = border.ravel()
        self._tree: shapely.STRtree | None = None
        self.max_count = int((self._base + np.diff(self._indptr)).max()) if g else 0

    @property
    def _full_lists(self) -> tuple[np.ndarray, np.ndarray]:
        """Zones wholly containing each cell, as (zone ids by cell, row pointer); built on first use."""
        if self._full is None:
            zone, start, stop = self._runs
            length = stop - start
            ids = np.repeat(start, length) + (np.arange(int(length.sum())) - np.repeat(np.cumsum(length) - length, length))
            self._full = _csr(ids, np.repeat(zone, length), len(self._base))
        return self._full

    def _cell(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Bordered cell id of each point; points off the grid (or not finite) land on the border, which holds no zone."""
        g = self.cells
        fx = np.subtract(x, self.box.xmin - self._dx)
        fx /= self._dx
        fy = np.subtract(y, self.box.ymin - self._dy)
        fy /= self._dy
        with np.errstate(invalid="ignore"):
            ix = fx.astype(np.int64)
            iy = fy.astype(np.int64)
        np.clip(ix, 0, g + 1, out=ix)
        np.clip(iy, 0, g + 1, out=iy)
        iy *= g + 2
        iy += ix
        return iy

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
        stray, _ = self._stray_hits(x, y, cell)
        if stray.size:
            count += np.bincount(stray, minlength=len(x))
        return count

    def _stray_hits(self, x: np.ndarray, y: np.ndarray, cell: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(point, zone) hits of points off the grid (on the box's far edges, outside it, not finite), by STRtree."""
        stray = np.flatnonzero(self._base_border[cell])
        if not stray.size or not self.n_zones:
            empty = np.zeros(0, dtype=np.int64)
            return empty, empty
        if self._tree is None:
            self._tree = shapely.STRtree(self._zones)
        # "within": the point is in the zone's interior, the same rule as contains_xy
        point, zone = self._tree.query(shapely.points(x[stray], y[stray]), predicate="within")
        return stray[point], zone

    def pairs(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Every (point index, zone index) with the zone containing the point; points in plane metres."""
        x = np.asarray(x, float)
        y = np.asarray(y, float)
        cell = self._cell(x, y)
        full_zone_ids, full_ptr = self._full_lists
        full_point, full_zone = _expand(cell, full_ptr, full_zone_ids)
        point, zone = self._partial_hits(x, y, cell)
        stray_point, stray_zone = self._stray_hits(x, y, cell)
        return np.concatenate([full_point, point, stray_point]), np.concatenate([full_zone, zone, stray_zone])


def _with_sentinels(zones: np.ndarray, box, g: int, owner: np.ndarray, cell: np.ndarray):
    """Crossed cells as sorted ``(zone, row, column)``, plus columns -1 and g in every row of zones reaching past the box.

    A zone that reaches beyond the box may hold cells between the box's
    edge and its first crossed cell in a row (or a whole row, when it holds
    the whole box); the sentinels bound those runs so that they are tested
    like any other.
    """
    row, col = np.divmod(cell, g)
    bounds = shapely.bounds(zones)
    past = np.flatnonzero((bounds[:, 0] <= box.xmin) | (bounds[:, 2] >= box.xmax)
                          | (bounds[:, 1] <= box.ymin) | (bounds[:, 3] >= box.ymax))
    if past.size:
        dy = (box.ymax - box.ymin) / g
        lo = np.clip(np.floor((bounds[past, 1] - box.ymin) / dy), 0, g - 1).astype(np.int64)
        hi = np.clip(np.floor((bounds[past, 3] - box.ymin) / dy), 0, g - 1).astype(np.int64)
        rows = hi - lo + 1
        zone = np.repeat(past, rows)
        srow = np.repeat(lo, rows) + (np.arange(int(rows.sum())) - np.repeat(np.cumsum(rows) - rows, rows))
        owner = np.concatenate([owner, zone, zone])
        row = np.concatenate([row, srow, srow])
        col = np.concatenate([col, np.full(zone.size, -1), np.full(zone.size, g)])
        order = np.lexsort((col, row, owner))
        owner, row, col = owner[order], row[order], col[order]
    return owner, row, col


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
_CROSSINGS_PER_CELL = 0.25
#: Most cells per side (a 2048 x 2048 grid: 4 Mi cells).
_MAX_CELLS = 2048


def _grid_size(zones: np.ndarray, box, points: int = GUESS_POINTS) -> int:
    """Cells per side so that zone boundaries cross about 0.25 cells' worth each, and no more cells than points.

    A boundary of length P crosses about 1.3 P / s cells of side s (common
    practice for grid indexes), so the crossings per cell are
    1.3 ΣP s / (W H); solve for s, then hold the cells to at most `points`
    (building costs about as much per cell as counting a point) and to
    4..2048 per side.
    """
    width, height = box.xmax - box.xmin, box.ymax - box.ymin
    perimeter = float(np.sum(shapely.length(zones))) if len(zones) else 0.0
    if perimeter <= 0:
        return 4
    side = _CROSSINGS_PER_CELL * width * height / (1.3 * perimeter)
    g = np.ceil(max(width, height) / side)
    return int(np.clip(min(g, np.sqrt(max(points, 16))), 4, _MAX_CELLS))


class RegionClassifier:
    """``f(x, y)`` giving bools ``(n, 1 + len(ks))``: in `region`, and in it covered by ≥ k of `zones`.

    Points in plane metres.  "In `region`" is answered by :func:`inside`
    (sized for about `points` points); multiplicity is counted only for
    points inside the region, by a :class:`GridIndex` over `zones` laid on
    the region's bounding box.  :meth:`strata` gives a stratified sampler
    the cells whose answers are not known exactly.
    """

    def __init__(self, region, zones, ks, points: int | None = None) -> None:
        self.ks = np.asarray(ks)
        self.region = region
        self.box = Box.of(region.bounds)
        self.index = GridIndex(zones, self.box, points=points)
        self._in_region = inside(region, self.box, points)

    def __call__(self, x, y):
        within = self._in_region(x, y)
        counts = np.zeros(len(x), dtype=np.int64)
        counts[within] = self.index.counts(x[within], y[within])
        return np.column_stack([within, counts[:, None] >= self.ks[None, :]])

    def strata(self) -> Strata:
        """Cells to sample, on the zone index's grid: those the region's edge crosses, and those in the
        region that a zone's edge crosses.  Every other cell is known exactly: outside the region it
        adds nothing; inside, its count of covering zones is the same all over it (m² per column)."""
        g = self.index.cells
        region = build_grid(self.region, self.box, g, g).cells
        width = g + 2
        base = self.index._base.reshape(width, width)[1:-1, 1:-1]
        partial = np.diff(self.index._indptr).reshape(width, width)[1:-1, 1:-1]
        exact = (region == OUTSIDE) | ((region == INSIDE) & (partial == 0))
        area = (self.box.xmax - self.box.xmin) * (self.box.ymax - self.box.ymin) / (g * g)
        whole = exact & (region == INSIDE)
        known = [np.count_nonzero(whole) * area]
        known += [np.count_nonzero(whole & (base >= k)) * area for k in self.ks]
        return Strata(self.box, g, g, np.flatnonzero(~exact.ravel()), np.array(known, dtype=float))


def region_classifier(region, zones, ks, points: int | None = None) -> RegionClassifier:
    """The classifier of coverage jobs: a :class:`RegionClassifier` (kept as a function for callers)."""
    return RegionClassifier(region, zones, ks, points)
