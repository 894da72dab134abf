"""A cell grid over a polygon's box: each cell known to be inside, outside, or crossed by an edge.

Every cell of an ``nx x ny`` grid over a sampling box (plane metres) is
classified exactly:

* *crossing* when an edge of the polygon (holes included) passes within a
  small margin of the cell; found without one geometry per cell, by cutting
  every edge into pieces shorter than half a cell and marking the cells the
  pieces' boxes touch (a conservative supercover: a cell may be marked
  crossing that an edge only nearly touches, never the reverse);
* *inside* or *outside* otherwise.  Within a row, the cells between two
  crossing cells form a run that no edge reaches, so one ``contains_xy``
  test at the centre of the run's first cell answers the whole run.

A point is then answered by one table lookup, except in crossing cells (and
outside the box), where ``shapely.contains_xy`` decides it: the answers are
the same, point for point, as ``contains_xy`` on the whole polygon.  The
margin absorbs the rounding of a point's cell index, so a point on the line
between two cells is answered right whichever cell it is binned to.

The grid is sized from the number of points it will answer
(:func:`grid_cells`): building costs about as much per cell as answering a
point, so the cells are kept to a fraction of the points.

The same grid gives a stratified sampler its strata
(:mod:`areamc.strata`): inside cells are exact area, only crossing cells
need points.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import shapely

from .samplers import Box

__all__ = ["OUTSIDE", "INSIDE", "CROSSING", "CellGrid", "Strata", "grid_cells", "build_grid", "CellClassifier",
           "edge_pieces", "crossed_cells", "inner_runs"]

OUTSIDE = np.int8(0)
INSIDE = np.int8(1)
CROSSING = np.int8(2)

#: Most cells in a grid: a 1 MiB table.  Larger grids ran no faster per point (they leave the cache) and
#: would make memory grow with the points asked for; this keeps a run's peak memory flat (benchmarks/memory_points.py).
MAX_CELLS = 1 << 20
#: Cells per block of rows when filling runs, to bound the work arrays.
ROW_BLOCK_CELLS = 1 << 16
#: Cells per point answered: a grid never costs more than a fraction of the sampling it serves.
CELLS_PER_POINT = 0.25
#: Fewest cells per side.
MIN_SIDE = 4


class _Cells:
    """The geometry of an ``nx x ny`` grid over a box (plane metres), shared by :class:`CellGrid` and :class:`Strata`."""

    box: Box
    nx: int
    ny: int

    @property
    def dx(self) -> float:
        """Cell width, metres."""
        return (self.box.xmax - self.box.xmin) / self.nx

    @property
    def dy(self) -> float:
        """Cell height, metres."""
        return (self.box.ymax - self.box.ymin) / self.ny

    @property
    def cell_area(self) -> float:
        """Area of one cell, m²."""
        return self.dx * self.dy

    def cell_corners(self, cells: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Lower-left corners ``(x, y)`` of cells given by row-major index ``iy * nx + ix``, plane metres."""
        iy, ix = np.divmod(np.asarray(cells, dtype=np.int64), self.nx)
        return self.box.xmin + ix * self.dx, self.box.ymin + iy * self.dy


@dataclass(frozen=True)
class CellGrid(_Cells):
    """The classified cells of a box (plane metres).

    Attributes
    ----------
    box : Box
    nx, ny : int
        Cells per row and per column; cell ``(ix, iy)`` spans
        ``[xmin + ix dx, xmin + (ix + 1) dx] x [ymin + iy dy, ...]``.
    state : numpy.ndarray
        int8, shape ``((ny + 2) * (nx + 2),)``: the cells row-major with a
        border of one cell all round, so cell ``(ix, iy)`` is entry
        ``(iy + 1) * (nx + 2) + ix + 1``.  Each is :data:`OUTSIDE`,
        :data:`INSIDE` or :data:`CROSSING`; the border is :data:`CROSSING`
        and stands for every point outside the box (or not finite), which is
        then tested exactly.
    """

    box: Box
    nx: int
    ny: int
    state: np.ndarray

    @property
    def cells(self) -> np.ndarray:
        """The states as an ``(ny, nx)`` array (a view; border removed)."""
        return self.state.reshape(self.ny + 2, self.nx + 2)[1:-1, 1:-1]

    @property
    def inside_area(self) -> float:
        """Area of the cells wholly inside the polygon, m²: an exact lower bound of its area."""
        return float(np.count_nonzero(self.cells == INSIDE)) * self.cell_area

    @property
    def crossing_cells(self) -> np.ndarray:
        """Row-major indices ``iy * nx + ix`` of the crossing cells (int64, ascending)."""
        return np.flatnonzero(self.cells == CROSSING)

    def strata(self) -> Strata:
        """The crossing cells to sample; the inside cells' area is known exactly."""
        return Strata(self.box, self.nx, self.ny, self.crossing_cells, np.array([self.inside_area]))

    def lookup(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Entry of :attr:`state` for each point (plane metres); points off the grid get a border entry.

        ``(x - (xmin - dx)) / dx`` truncated is the column plus one, so a
        point left of the box lands in column 0 of the border; clipping puts
        every other stray point (and NaN) on the border too.
        """
        b = self.box
        fx = np.subtract(x, b.xmin - self.dx)
        fx *= self.nx / (b.xmax - b.xmin)
        fy = np.subtract(y, b.ymin - self.dy)
        fy *= self.ny / (b.ymax - b.ymin)
        with np.errstate(invalid="ignore"):  # NaN and inf cast to garbage, then clipped onto the border
            ix = fx.astype(np.int64)
            iy = fy.astype(np.int64)
        np.clip(ix, 0, self.nx + 1, out=ix)
        np.clip(iy, 0, self.ny + 1, out=iy)
        iy *= self.nx + 2
        iy += ix
        return iy


@dataclass(frozen=True)
class Strata(_Cells):
    """Where a stratified sampler must put points, and what the other cells contribute exactly.

    Attributes
    ----------
    box : Box
        The grid's box (plane metres); cells as in :class:`CellGrid`.
    nx, ny : int
    cells : numpy.ndarray
        Row-major indices ``iy * nx + ix`` of the cells to sample (ascending).
    known : numpy.ndarray
        Per column of the classifier's answer, the exact area (m²) that all
        the other cells contribute.
    """

    box: Box
    nx: int
    ny: int
    cells: np.ndarray
    known: np.ndarray


def grid_cells(points: int, box: Box) -> tuple[int, int]:
    """Cells per row and column for a grid answering about `points` points in `box`.

    About ``CELLS_PER_POINT x points`` cells (at least ``MIN_SIDE`` per
    side, at most :data:`MAX_CELLS`), as near square as the box allows.
    """
    cells = float(np.clip(CELLS_PER_POINT * max(int(points), 1), MIN_SIDE * MIN_SIDE, MAX_CELLS))
    width, height = box.xmax - box.xmin, box.ymax - box.ymin
    side = math.sqrt(width * height / cells)
    nx = int(np.clip(round(width / side), MIN_SIDE, MAX_CELLS // MIN_SIDE))
    ny = int(np.clip(round(height / side), MIN_SIDE, MAX_CELLS // MIN_SIDE))
    while nx * ny > MAX_CELLS:
        nx, ny = max(MIN_SIDE, nx // 2), max(MIN_SIDE, ny // 2)
    return nx, ny


def _margin(box: Box, dx: float, dy: float) -> float:
    """Slack (metres) around a cell: far above the rounding of a point's cell index, far below a cell."""
    scale = max(abs(box.xmin), abs(box.xmax), abs(box.ymin), abs(box.ymax), dx, dy)
    return max(1e-7 * min(dx, dy), 1024 * float(np.spacing(scale)))


def edge_pieces(geoms, step: float) -> tuple[np.ndarray, ...]:
    """Every edge of `geoms` (exteriors and holes) cut into pieces no longer than `step` metres.

    Returns ``(x0, y0, x1, y1, owner)``: the pieces' end points and the
    index in `geoms` of the geometry each belongs to.
    """
    parts, part_owner = shapely.get_parts(np.asarray(geoms, dtype=object), return_index=True)
    rings, ring_part = shapely.get_rings(parts, return_index=True)
    coords, ring_of = shapely.get_coordinates(rings, return_index=True)
    same = ring_of[1:] == ring_of[:-1]
    owner = part_owner[ring_part[ring_of[:-1][same]]]
    x0, y0 = coords[:-1, 0][same], coords[:-1, 1][same]
    x1, y1 = coords[1:, 0][same], coords[1:, 1][same]
    parts_per = np.maximum(np.ceil(np.hypot(x1 - x0, y1 - y0) / step), 1).astype(np.int64)
    if not len(parts_per) or parts_per.max() == 1:  # every edge already short enough
        return x0, y0, x1, y1, owner
    seg = np.repeat(np.arange(len(parts_per)), parts_per)
    k = np.arange(len(seg)) - np.repeat(np.cumsum(parts_per) - parts_per, parts_per)
    t0 = k / parts_per[seg]
    t1 = (k + 1) / parts_per[seg]
    ax, ay, bx, by = x0[seg], y0[seg], x1[seg], y1[seg]
    return ax + (bx - ax) * t0, ay + (by - ay) * t0, ax + (bx - ax) * t1, ay + (by - ay) * t1, owner[seg]


def crossed_cells(geoms, box: Box, nx: int, ny: int, pad: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Every (geometry, cell) with an edge of the geometry within a small margin of the cell (conservative).

    Cells are row-major ``iy * nx + ix`` over `box`; a geometry reaching
    beyond the box is marked only in the cells it crosses inside it.
    `pad` (units of `box`, default 0) widens the margin, for edges known
    only to within that distance.  Returns ``(owner, cell)`` sorted by
    owner, then cell, without repeats.
    """
    dx, dy = (box.xmax - box.xmin) / nx, (box.ymax - box.ymin) / ny
    pad = 2 * _margin(box, dx, dy) + pad
    px0, py0, px1, py1, owner = edge_pieces(geoms, min(dx, dy))
    lo_x = np.floor((np.minimum(px0, px1) - pad - box.xmin) / dx).astype(np.int64)
    hi_x = np.floor((np.maximum(px0, px1) + pad - box.xmin) / dx).astype(np.int64)
    lo_y = np.floor((np.minimum(py0, py1) - pad - box.ymin) / dy).astype(np.int64)
    hi_y = np.floor((np.maximum(py0, py1) + pad - box.ymin) / dy).astype(np.int64)
    span = int(max((hi_x - lo_x).max(initial=0), (hi_y - lo_y).max(initial=0)))
    cells = nx * ny
    keys = []
    for ox in range(span + 1):
        for oy in range(span + 1):
            cx, cy = lo_x + ox, lo_y + oy
            keep = (cx <= hi_x) & (cy <= hi_y) & (cx >= 0) & (cx < nx) & (cy >= 0) & (cy < ny)
            key = owner[keep] * cells + cy[keep] * nx + cx[keep]
            # pieces come in ring order, so neighbours often share a cell: drop those repeats before sorting
            keys.append(key[np.concatenate([[True], key[1:] != key[:-1]])] if key.size else key)
    key = np.sort(np.concatenate(keys)) if keys else np.zeros(0, dtype=np.int64)
    key = key[np.concatenate([[True], key[1:] != key[:-1]])] if key.size else key
    return key // cells, key % cells


def inner_runs(owner: np.ndarray, row: np.ndarray, col: np.ndarray) -> tuple[np.ndarray, ...]:
    """Runs of cells between two crossed cells of the same geometry in the same row.

    ``(owner, row, col)`` list crossed cells sorted by owner, row, column
    (a caller may add sentinel columns -1 and ``nx`` for geometries that
    reach beyond the box).  No edge of the geometry reaches a run's cells, so
    each run lies wholly inside or wholly outside it.  Returns ``(owner,
    row, first, last)``, columns inclusive.
    """
    gap = (owner[1:] == owner[:-1]) & (row[1:] == row[:-1]) & (col[1:] - col[:-1] > 1)
    i = np.flatnonzero(gap)
    return owner[i], row[i], col[i] + 1, col[i + 1] - 1


def _fill_runs(state: np.ndarray, geom, box: Box, nx: int, ny: int, dx: float, dy: float) -> None:
    """Give every run of non-crossing cells in a row the state of its first cell's centre.

    Rows are done in blocks of about :data:`ROW_BLOCK_CELLS` cells, so the
    work arrays stay small whatever the grid's size.
    """
    grid = state.reshape(ny + 2, nx + 2)[1:-1, 1:-1]
    rows = max(1, ROW_BLOCK_CELLS // nx)
    for top in range(0, ny, rows):
        block = grid[top : top + rows]
        free = block != CROSSING
        start = free.copy()
        start[:, 1:] &= ~free[:, :-1]
        first = np.flatnonzero(start.ravel())
        if not first.size:
            continue
        iy, ix = np.divmod(first, nx)
        inside = shapely.contains_xy(geom, box.xmin + (ix + 0.5) * dx, box.ymin + (top + iy + 0.5) * dy)
        run = np.cumsum(start.ravel(), dtype=np.int32) - 1
        values = np.where(inside, INSIDE, OUTSIDE).astype(np.int8)
        filled = block.copy()
        filled.ravel()[free.ravel()] = values[run[free.ravel()]]
        block[...] = filled


def build_grid(geom, box: Box, nx: int, ny: int) -> CellGrid:
    """Classify the cells of an ``nx x ny`` grid over `box` against `geom` (a polygon in plane metres).

    `geom` should be prepared (``shapely.prepare``) for speed; the result
    does not depend on it.
    """
    dx, dy = (box.xmax - box.xmin) / nx, (box.ymax - box.ymin) / ny
    state = np.full((ny + 2) * (nx + 2), CROSSING, dtype=np.int8)
    state.reshape(ny + 2, nx + 2)[1:-1, 1:-1] = OUTSIDE
    if not shapely.is_empty(geom):
        _, crossed = crossed_cells([geom], box, nx, ny)
        iy, ix = np.divmod(crossed, nx)
        state.reshape(ny + 2, nx + 2)[iy + 1, ix + 1] = CROSSING
        _fill_runs(state, geom, box, nx, ny, dx, dy)
    return CellGrid(box, nx, ny, state)


class CellClassifier:
    """``f(x, y) -> bool array``: is each point (plane metres) inside `geom`, answered from a :class:`CellGrid`.

    Point for point the same answers as ``shapely.contains_xy(geom, x, y)``
    (a point on an edge is outside), at the cost of a table lookup for
    points in cells no edge reaches.

    Parameters
    ----------
    geom : shapely Polygon or MultiPolygon
        In the equal-area plane (metres).
    box : Box, optional
        Where points will fall (default: the bounds of `geom`); points
        outside it are still answered right, by ``contains_xy``.
    points : int
        About how many points will be asked (sizes the grid; see :func:`grid_cells`).
    """

    def __init__(self, geom, box: Box | None = None, points: int = 100_000) -> None:
        shapely.prepare(geom)
        self.geom = geom
        box = box or Box.of(geom.bounds)
        if not box.area > 0:
            self.grid = None
            return
        self.grid = build_grid(geom, box, *grid_cells(points, box))

    def strata(self) -> Strata | None:
        """The strata of a stratified sampler (:mod:`areamc.strata`): the grid's crossing cells."""
        return None if self.grid is None else self.grid.strata()

    def __call__(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        if self.grid is None:
            return shapely.contains_xy(self.geom, x, y)
        state = self.grid.state[self.grid.lookup(x, y)]
        out = state == INSIDE
        test = np.flatnonzero(state == CROSSING)
        if test.size:
            out[test] = shapely.contains_xy(self.geom, x[test], y[test])
        return out
