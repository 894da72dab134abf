"""Point classification against polygons in the equal-area plane.

Vectorised over coordinate arrays with shapely's ``contains_xy`` on prepared
geometries; no Point objects and no per-point Python loop.  Boundary rule: a
point exactly on an edge counts as outside (``contains``); for continuous
samplers that event has probability zero.
"""

from __future__ import annotations

import numpy as np
import shapely

__all__ = ["inside"]


def inside(geom) -> "callable":
    """Return ``f(x, y) -> bool array`` testing points (plane metres) against `geom`.

    `geom` is prepared once here, so repeated calls are fast.
    """
    shapely.prepare(geom)

    def test(x: np.ndarray, y: np.ndarray) -> np.ndarray:
        return shapely.contains_xy(geom, x, y)

    return test


class ZoneIndex:
    """Count, for each point, how many zones contain it, testing only zones that can reach it.

    A ``g x g`` grid is laid over the sampling box.  For each cell the zones
    are sorted, once, into those that contain the whole cell (counted without
    a test) and those that only cross it (tested with ``contains_xy``); zones
    that miss the cell are never looked at.  The candidate pairs come from a
    shapely ``STRtree`` query of the cell boxes.  Per point the cost is then
    about the number of zone edges in its cell, near constant as zones grow.

    Parameters
    ----------
    zones : array of shapely geometries
        Zones in the equal-area plane (metres).
    box : Box
        The box points will be drawn from (plane metres).
    cells : int, optional
        Grid cells per side; by default sized so that a cell is crossed by
        about half a zone edge on average (see :func:`_grid_size`).

    Notes
    -----
    Boundary rule: as :func:`inside`, a point on a zone's edge is outside it.
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
        self._base = np.bincount(cell_id[full], minlength=g * g).astype(np.int64)
        partial_cell = cell_id[~full]
        order = np.argsort(partial_cell, kind="stable")
        self._partial_zone = zone_idx[~full][order]
        self._indptr = np.concatenate([[0], np.cumsum(np.bincount(partial_cell, minlength=g * g))])
        self.max_count = int((self._base + np.diff(self._indptr)).max()) if g else 0

    def _cell(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        g = self.cells
        ix = np.clip(((x - self.box.xmin) / self._dx).astype(np.int64), 0, g - 1)
        iy = np.clip(((y - self.box.ymin) / self._dy).astype(np.int64), 0, g - 1)
        return iy * g + ix

    def counts(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Number of zones containing each point (int64 array, shape of `x`); points in plane metres."""
        x = np.asarray(x, float)
        y = np.asarray(y, float)
        cell = self._cell(x, y)
        count = self._base[cell].copy()
        start = self._indptr[cell]
        k = self._indptr[cell + 1] - start
        total = int(k.sum())
        if total:
            point = np.repeat(np.arange(len(x)), k)
            offset = np.arange(total) - np.repeat(np.cumsum(k) - k, k) + np.repeat(start, k)
            zone = self._partial_zone[offset]
            hit = shapely.contains_xy(self._zones[zone], x[point], y[point])
            count += np.bincount(point[hit], minlength=len(x))
        return count


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
