"""Density sources and their frozen views of one region: values per m² at points of the equal-area plane.

Three kinds of source:

* :class:`BlockDensity`: a polygon layer with a count per block (census-style),
  spread uniformly over each block: density = count / block area (areal
  weighting, Goodchild & Lam 1980, Geo-Processing 1:297-312).
* :class:`RasterDensity`: a GeoTIFF of counts per cell or of density per unit
  area, in any CRS; counts become densities with each cell's true area (the
  closed-form ellipsoidal quadrangle for geographic grids, Snyder 1987).  Read
  window by window, never whole.  It holds an open file: use it as a
  context manager, or call :meth:`RasterDensity.close`.
* :class:`ExpressionDensity`: a safe arithmetic expression in ``lon``, ``lat``
  (degrees), ``east``, ``north`` (metres from a named origin) or ``x``, ``y``
  (metres of the computation plane); see :mod:`areamc.expression`.

A source answers nothing by itself.  ``source.for_region(region)`` returns
an immutable view built for that region alone (the model is
``scipy.stats.norm(loc, scale)``: fixed at construction, every method
answers for it), with

* ``density(x, y)``: the density at plane points;
* ``exact_total(clip=None, deadline=None)``: the exact integral over the
  region (or over the region's part inside `clip`), from :mod:`areamc.exact`,
  or None (none for this source, or `deadline` passed first);
* ``proposal()``: an importance sampler over the units (blocks, cells) that
  meet the region, or None where the source cannot offer one; then
  :func:`grid_proposal` builds one from a pilot grid of density values
  (expressions, rasters in a CRS that is not equal-area).

Views of different regions can be used in any order; none changes another.
"""

from __future__ import annotations

import math
import os
import warnings
from dataclasses import dataclass, field
from functools import cached_property
from typing import Callable, Protocol

import numpy as np
import pyproj
import shapely

from .classify import GridIndex
from .errors import AreamcWarning, InputError, LayerError, OptionError
from .exact import FRACTION_TILE_CELLS, CellFractions, block_total, cell_fractions
from .expression import Expression, parse_expression
from .geodesy import authalic_q, eccentricity, latitude_from_q, quadrangle_area
from .load import Layer, gdal_path, read_layer
from .project import LONLAT, EqualAreaPlane, ProjectedLayer, measure_area_distortion, transformer
from .samplers import Box

__all__ = [
    "DensitySource",
    "DensityView",
    "Proposal",
    "grid_proposal",
    "grid_side",
    "GRID_DEFENSIVE",
    "BlockDensity",
    "RasterDensity",
    "ExpressionDensity",
    "parse_origin",
    "origin_crs",
    "DensitySpec",
    "block_counts",
    "guess_density_kind",
    "read_density",
    "build_density",
    "warn_nodata",
    "RASTER_VALUES",
    "DENSITY_KINDS",
]

#: What raster values mean: counts per cell, or a density per m², ha or km².
RASTER_VALUES = {"count": None, "per-m2": 1.0, "per-ha": 1.0e4, "per-km2": 1.0e6}
#: Kinds of density source.
DENSITY_KINDS = ("blocks", "raster", "expression")
_RASTER_EXT = (".tif", ".tiff", ".vrt", ".img", ".asc")
_VECTOR_EXT = (".gpkg", ".shp", ".geojson")


@dataclass(frozen=True)
class Proposal:
    """An importance sampler for one region; a sampling domain of 3 uniforms.

    Points are drawn with density ``g(x) / total`` (plane metres), ``g`` a
    density (count per m²) that integrates to `total`, and a point scores
    ``d(x) / g(x)``; then ``total x E[score x 1_A(x)]`` is the integral of the
    density ``d`` over any set ``A`` it covers.

    * **Units** (blocks, cells; `weight` None): ``g = d`` on the units that
      meet the region, so every score is 1 and the integral over ``A`` is
      ``total x P(x in A)``: a hit count.
    * **A pilot grid** (:func:`grid_proposal`; `weight` given): ``g`` is a
      defensive mixture of the density's values on a grid and their mean,
      and ``weight(x, y)`` returns the score ``d / g`` of each point
      (dimensionless).

    Attributes
    ----------
    total : float
        The integral of ``g`` (persons).  For units, the sum of their counts;
        0 when no unit near the region has a positive count (then `draw` is
        None and the density there is 0).  For a pilot grid, the grid's
        rough total, a scale only: the estimate does not depend on it.
    draw : callable
        ``draw(u)`` maps an ``(n, 3)`` array of uniforms in [0, 1) to points
        ``(x, y)`` in plane metres: one uniform picks the unit or cell, two
        place the point uniformly in it.
    weight : callable or None
        ``weight(x, y)``: the score ``d / g`` at drawn points; None for units (every score 1).
    """

    total: float
    draw: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]] | None
    weight: Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None

    #: Uniforms per point: one picks the unit, two place the point in it.
    dims = 3

    @property
    def area(self) -> float:
        """The scale of the scores: the proposal's total count."""
        return self.total

    def map(self, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Map ``(n, 3)`` uniforms to plane points (the :class:`~areamc.samplers.Domain` protocol)."""
        return self.draw(u)


class DensityView(Protocol):
    """A density source's answers for one region (plane metres; densities per m²)."""

    region: object
    nodata_cells: np.ndarray

    def density(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Density (count per m²) at plane points; non-negative and finite."""
        ...

    def exact_total(self, clip=None, *, deadline: float | None = None) -> float | None:
        """Exact integral of the density over the region (∩ `clip`), or None.

        None also when `deadline` (a ``time.monotonic()`` value) passes before it is done.
        """
        ...

    def exact_square_total(self, *, deadline: float | None = None) -> float | None:
        """Exact integral of the squared density over the region (count² per m²), or None."""
        ...

    def proposal(self) -> Proposal | None:
        """An importance sampler for the region, or None when the source cannot offer one there."""
        ...


class DensitySource(Protocol):
    """A density over the equal-area plane that builds a :class:`DensityView` per region."""

    label: str

    def for_region(self, region) -> DensityView:
        """The view of `region` (a shapely polygon in plane metres)."""
        ...


_NO_CELLS = np.zeros(0, dtype=np.int64)


def block_counts(layer: Layer, field: str) -> np.ndarray:
    """Read the count of every block from `field`; refuse missing, non-numeric or negative values.

    Raises
    ------
    LayerError
        Naming the layer and the feature at fault (parameter ``count_field``).
    """
    if layer.properties and field not in layer.properties[0]:
        fields = ", ".join(layer.properties[0]) or "(none)"
        raise LayerError(f"{layer.source}: {{param}} {field!r} is not a field; fields: {fields}", param="count_field")
    counts = np.empty(len(layer))
    for i, (fid, props) in enumerate(zip(layer.ids, layer.properties)):
        value = props.get(field)
        try:
            number = float(value)
        except (TypeError, ValueError):
            number = math.nan
        if isinstance(value, bool) or value is None or not math.isfinite(number) or number < 0:
            raise LayerError(
                f"{layer.source}: feature {fid} has {field} = {value!r}; counts must be non-negative numbers"
            )
        counts[i] = number
    return counts


# -- blocks -------------------------------------------------------------------

def _triangulate(geoms: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Constrained Delaunay triangles of every polygon in `geoms`, in one vectorised call.

    Returns ``(triangles, owner)``: shape ``(t, 3, 2)`` (plane metres) and
    the index in `geoms` of each triangle, in order of the polygons, their
    parts and GEOS's triangles within each part.
    """
    parts, owner = shapely.get_parts(np.asarray(geoms, dtype=object), return_index=True)
    tris, which = shapely.get_parts(shapely.constrained_delaunay_triangles(parts), return_index=True)
    xy = shapely.get_coordinates(shapely.get_exterior_ring(tris)).reshape(-1, 4, 2)[:, :3]
    return xy, owner[which]


def _tri_area(t: np.ndarray) -> np.ndarray:
    a, b, c = t[:, 0], t[:, 1], t[:, 2]
    return 0.5 * np.abs((b[:, 0] - a[:, 0]) * (c[:, 1] - a[:, 1]) - (c[:, 0] - a[:, 0]) * (b[:, 1] - a[:, 1]))


def _in_triangles(tris: np.ndarray, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Uniform points in triangles ``tris`` (n, 3, 2) from uniforms ``u`` (n, 2), by reflection."""
    r1, r2 = u[:, 0].copy(), u[:, 1].copy()
    flip = r1 + r2 > 1
    r1[flip], r2[flip] = 1 - r1[flip], 1 - r2[flip]
    a, b, c = tris[:, 0], tris[:, 1], tris[:, 2]
    p = a + r1[:, None] * (b - a) + r2[:, None] * (c - a)
    return p[:, 0], p[:, 1]


class BlockDensity:
    """Counts on polygon blocks, uniform within each block (areal weighting).

    Parameters
    ----------
    blocks : ProjectedLayer
        Blocks in the equal-area plane (metres).
    counts : array of float
        Count per block (persons); density = count / planar block area (per m²).
    """

    label = "blocks"

    def __init__(self, blocks: ProjectedLayer, counts: np.ndarray) -> None:
        self.blocks = blocks
        self.counts = np.asarray(counts, float)
        self.areas = shapely.area(blocks.planar)
        with np.errstate(divide="ignore", invalid="ignore"):
            self.rates = np.where(self.areas > 0, self.counts / self.areas, 0.0)
        shapely.prepare(blocks.planar)
        self._tree = shapely.STRtree(blocks.planar)

    @cached_property
    def _index(self) -> GridIndex:
        """The grid index of the blocks, for the density at a point; built on first use (importance sampling never asks)."""
        return GridIndex(self.blocks.planar, Box.of(shapely.total_bounds(self.blocks.planar)))

    def near(self, geom) -> np.ndarray:
        """Indices of blocks sharing area with `geom` (plane metres); blocks that only touch it are left out."""
        near = np.sort(self._tree.query(geom, predicate="intersects"))
        return near[~shapely.touches(self.blocks.planar[near], geom)]

    def density(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Density (count per m²) at plane points; the same for every region."""
        point, block = self._index.pairs(x, y)
        return np.bincount(point, weights=self.rates[block], minlength=len(x))

    @cached_property
    def triangulation(self) -> tuple[np.ndarray, np.ndarray]:
        """Every block's triangles (plane metres, shape (t, 3, 2)) and the block of each, in block order; built once."""
        return _triangulate(self.blocks.planar)

    def triangles(self, i: int) -> np.ndarray:
        """Triangulation of block `i` (plane metres), shape (t, 3, 2)."""
        tri, block = self.triangulation
        return tri[block == i]

    def for_region(self, region) -> "BlockView":
        """The view of `region` (plane metres)."""
        return BlockView(self, region)


@dataclass(frozen=True, eq=False)
class _PointwiseView:
    """A view whose density at a point does not depend on the region: the source answers it."""

    source: object
    region: object
    nodata_cells: np.ndarray = field(default_factory=lambda: _NO_CELLS, repr=False)

    def density(self, x, y):
        """Density (count per m²) at plane points."""
        return self.source.density(x, y)


@dataclass(frozen=True, eq=False)
class BlockView(_PointwiseView):
    """:class:`BlockDensity` answering for one region."""

    def exact_total(self, clip=None, *, deadline: float | None = None) -> float:
        """Σ count_i |block_i ∩ R| / |block_i| over the region R (∩ `clip`), Goodchild & Lam (1980).

        One vectorised overlay of the blocks that meet R: `deadline` is not checked.
        """
        geom = self.region if clip is None else shapely.intersection(self.region, clip)
        near = self.source.near(geom)
        return block_total(self.source.blocks.planar[near], self.source.rates[near], geom)

    def exact_square_total(self, *, deadline: float | None = None) -> float:
        """∫_R d² dA = Σ rate_i² |block_i ∩ R| (count² per m²), for the spread of uniform sampling."""
        near = self.source.near(self.region)
        return block_total(self.source.blocks.planar[near], self.source.rates[near] ** 2, self.region)

    def proposal(self) -> Proposal:
        """Draw a block by its count, then a point uniform in it (by its triangles); built once per view."""
        return self._proposal

    @cached_property
    def _proposal(self) -> Proposal:
        src = self.source
        return self._proposal_of(np.array([i for i in src.near(self.region) if src.counts[i] > 0], dtype=np.int64))

    def _proposal_of(self, near: np.ndarray) -> Proposal:
        """Draw one of the blocks `near` (ascending indices) by its count, then a point uniform in it."""
        src = self.source
        if not len(near):
            return Proposal(0.0, None)
        every, block = src.triangulation
        keep = np.isin(block, near)  # near is ascending, so triangles stay in the order of the blocks
        tri = every[keep]
        rates = src.rates[block[keep]]  # each triangle's block rate
        cdf = np.cumsum(rates * _tri_area(tri))
        total = float(sum(src.counts[i] for i in near))

        def draw(u: np.ndarray):
            pick = np.minimum(np.searchsorted(cdf, u[:, 0] * cdf[-1], side="right"), len(cdf) - 1)
            return _in_triangles(tri[pick], u[:, 1:3])

        return Proposal(total, draw)

    def split(self, zones, ks) -> tuple[Proposal, np.ndarray]:
        """Blocks whose answers are known exactly, and an importance sampler over the others.

        A block wholly inside the region whose every meeting zone holds it
        whole (shapely ``within``, ``intersects`` and ``contains``, plane
        metres) adds its whole count to "in the region" and to every k up to
        the number of zones holding it; the other blocks near the region are
        drawn by their counts.  Returns ``(proposal over the other blocks,
        known counts per column: in the region, then each k of `ks`)``.
        """
        src = self.source
        near = np.array([i for i in src.near(self.region) if src.counts[i] > 0], dtype=np.int64)
        blocks = src.blocks.planar[near]
        whole = shapely.within(blocks, self.region) if len(near) else np.zeros(0, dtype=bool)
        meets = holds = np.zeros(len(near), dtype=np.int64)
        zones = np.asarray(zones, dtype=object)
        if len(near) and len(zones):
            b, z = shapely.STRtree(zones).query(blocks, predicate="intersects")
            meets = np.bincount(b, minlength=len(near))
            holds = np.bincount(b[shapely.contains(zones[z], blocks[b])], minlength=len(near))
        known = whole & (meets == holds)
        counts = src.counts[near]
        parts = [float(np.sum(counts[known]))] + [float(np.sum(counts[known & (holds >= k)])) for k in ks]
        return self._proposal_of(near[~known]), np.array(parts)


# -- rasters ------------------------------------------------------------------

def _apply(transform, u, v) -> tuple[np.ndarray, np.ndarray]:
    """Apply an affine transform to coordinate arrays (column/row to x/y, or back)."""
    u = np.asarray(u, float)
    v = np.asarray(v, float)
    return transform.a * u + transform.b * v + transform.c, transform.d * u + transform.e * v + transform.f


class RasterDensity:
    """A GeoTIFF of counts per cell or density per unit area, read window by window.

    Parameters
    ----------
    path : str
        Raster file (GeoTIFF or any single-band raster rasterio opens).
    plane : EqualAreaPlane
        The plane points are given in.
    values : {"count", "per-m2", "per-ha", "per-km2"}
        What a cell value means (parameter ``values``).
    band : int
        Band to read, 1-based (parameter ``band``).

    Notes
    -----
    Nodata cells are treated as empty (density 0); each view lists the ones
    it met, and :func:`warn_nodata` reports them.  Importance sampling draws
    a cell by its count and a point uniform in area inside it: for
    geographic rasters uniform in longitude and in the authalic q (Snyder
    1987), for equal-area projected rasters uniform in the cell; for other
    CRSs the view's :meth:`~RasterView.proposal` returns None and the
    pilot grid of :func:`grid_proposal` is used instead.  The source holds
    the open dataset: use ``with`` or :meth:`close`.
    """

    label = "raster"

    def __init__(self, path: str, plane: EqualAreaPlane, *, values: str = "count", band: int = 1) -> None:
        import rasterio
        import rasterio.errors

        if values not in RASTER_VALUES:
            raise OptionError(f"{{param}}: unknown {values!r}; choose one of {', '.join(RASTER_VALUES)}", param="values")
        if not os.path.exists(path):
            raise LayerError(f"{path}: no such file")
        try:
            self._ds = rasterio.open(path)
        except (rasterio.errors.RasterioError, OSError) as err:
            raise LayerError(f"{path}: not a readable raster ({' '.join(str(err).split())[:160]})") from err
        try:
            if self._ds.crs is None:
                raise LayerError(f"{path}: the raster declares no CRS")
            if not 1 <= band <= self._ds.count:
                raise OptionError(f"{{param}}: {path} has {self._ds.count} band(s), not {band}", param="band")
        except InputError:
            self._ds.close()
            raise
        self.path = path
        self.band = band
        self.values = values
        self.plane = plane
        self.crs = pyproj.CRS.from_wkt(self._ds.crs.to_wkt())
        self._to_raster = transformer(plane.crs, self.crs)
        self._to_plane = transformer(self.crs, plane.crs)
        ell = self.crs.ellipsoid
        self._a = ell.semi_major_metre
        self._rf = ell.inverse_flattening or math.inf

    def __enter__(self) -> "RasterDensity":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        """Close the raster file."""
        self._ds.close()

    @property
    def geographic(self) -> bool:
        return bool(self.crs.is_geographic)

    def _window_for(self, region):
        from rasterio.windows import Window, from_bounds

        xmin, ymin, xmax, ymax = region.bounds
        bx = self._to_raster.transform_bounds(xmin, ymin, xmax, ymax, densify_pts=21)
        if bx[0] > bx[2]:  # the box crosses the antimeridian of a lon/lat raster: take the grid's whole width
            left, _, right, _ = self._ds.bounds
            bx = (min(left, right), bx[1], max(left, right), bx[3])
        win = from_bounds(*bx, transform=self._ds.transform)
        if (win.col_off >= self._ds.width or win.col_off + win.width <= 0
                or win.row_off >= self._ds.height or win.row_off + win.height <= 0):
            return None  # the region's box lies wholly beyond the grid (before the one-cell margin below)
        col0 = max(int(math.floor(win.col_off)) - 1, 0)
        row0 = max(int(math.floor(win.row_off)) - 1, 0)
        col1 = min(int(math.ceil(win.col_off + win.width)) + 1, self._ds.width)
        row1 = min(int(math.ceil(win.row_off + win.height)) + 1, self._ds.height)
        if col1 <= col0 or row1 <= row0:
            return None
        return Window(col0, row0, col1 - col0, row1 - row0)

    def overlaps(self, region) -> bool:
        """True when the raster covers part of `region`'s bounding box (plane metres)."""
        return self._window_for(region) is not None

    def for_region(self, region) -> "RasterView":
        """Read the window of cells around `region` (plane metres) and return its view."""
        win = self._window_for(region)
        if win is None:
            return RasterView(self, region, None, None, None)
        data = self._ds.read(self.band, window=win, masked=True).astype(float)
        mask = np.ma.getmaskarray(data)
        raw = np.ma.filled(data, 0.0)
        if np.isnan(raw).any():
            mask = mask | np.isnan(raw)
            raw = np.where(np.isnan(raw), 0.0, raw)
        nodata = _NO_CELLS
        if mask.any():
            r, c = np.nonzero(mask)
            nodata = (r + int(win.row_off)) * self._ds.width + (c + int(win.col_off))
        if (raw < 0).any():
            r, c = np.argwhere(raw < 0)[0]
            raise InputError(
                f"{self.path}: negative value {raw[r, c]:g} at row {win.row_off + r}, column {win.col_off + c}; "
                "densities and counts must be non-negative"
            )
        transform = self._ds.window_transform(win)
        rows, cols = raw.shape
        if self.geographic:
            xs, ys = _corners(transform, rows, cols)
            cell_area = np.asarray(quadrangle_area(xs[:-1, :-1], ys[:-1, :-1], xs[1:, 1:], ys[1:, 1:],
                                                   a=self._a, rf=self._rf), float)
        else:
            cell_area = _outline_areas(self._to_plane, transform, rows, cols)
        counts = raw if self.values == "count" else raw / RASTER_VALUES[self.values] * cell_area
        with np.errstate(divide="ignore", invalid="ignore"):
            rates = np.where(cell_area > 0, counts / cell_area, 0.0)
        return RasterView(self, region, transform, counts, rates, nodata)


def _corners(transform, rows: int, cols: int):
    """Cell corner coordinates of a window in the raster's CRS, shape (rows + 1, cols + 1) each."""
    cc, rr = np.meshgrid(np.arange(cols + 1), np.arange(rows + 1))
    xs, ys = _apply(transform, cc.ravel(), rr.ravel())
    return np.asarray(xs).reshape(rows + 1, cols + 1), np.asarray(ys).reshape(rows + 1, cols + 1)


def _outline_areas(to_plane, transform, rows: int, cols: int) -> np.ndarray:
    """Plane areas (m²) of the cells' 4-corner outlines, shape (rows, cols), a tile of rows at a time.

    A quadrilateral's area is half the cross product of its diagonals (the
    shoelace formula regrouped), taken from differences of nearby corners,
    so no precision is lost to the coordinates' size.
    """
    out = np.empty((rows, cols))
    step = max(1, FRACTION_TILE_CELLS // max(cols, 1))
    for top in range(0, rows, step):
        n = min(step, rows - top)
        cc, rr = np.meshgrid(np.arange(cols + 1), np.arange(top, top + n + 1))
        px, py = to_plane.transform(*_apply(transform, cc.ravel(), rr.ravel()))
        px = np.asarray(px).reshape(n + 1, cols + 1)
        py = np.asarray(py).reshape(n + 1, cols + 1)
        # diagonals: lower-left corner (c, r) to (c + 1, r + 1), and (c + 1, r) to (c, r + 1)
        d1x, d1y = px[1:, 1:] - px[:-1, :-1], py[1:, 1:] - py[:-1, :-1]
        d2x, d2y = px[1:, :-1] - px[:-1, 1:], py[1:, :-1] - py[:-1, 1:]
        out[top:top + n] = 0.5 * np.abs(d1x * d2y - d1y * d2x)
    return out


@dataclass(frozen=True, eq=False)
class RasterView:
    """:class:`RasterDensity` answering for one region: the cells of its window, in the plane.

    `transform` is None when the raster does not reach the region; then the
    density is 0 there.  `counts` and `rates` are per cell of the window
    (persons, and persons per m²).  A cell's footprint on the plane, for the
    exact totals, is the quadrilateral of its 4 projected corners.
    """

    source: RasterDensity
    region: object
    transform: object | None
    counts: np.ndarray | None
    rates: np.ndarray | None
    nodata_cells: np.ndarray = field(default_factory=lambda: _NO_CELLS, repr=False)
    #: The region's cell fractions, kept once computed (the total and the square total share them).
    _fractions: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    def to_plane(self, col, row) -> tuple[np.ndarray, np.ndarray]:
        """Plane metres of window grid points given in fractional columns and rows (corner (c, r) of cell (r, c))."""
        x, y = self.source._to_plane.transform(*_apply(self.transform, col, row))
        return np.asarray(x, float), np.asarray(y, float)

    def to_grid(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        """Fractional window columns and rows of plane points (metres); the inverse of :meth:`to_plane`."""
        rx, ry = self.source._to_raster.transform(x, y)
        col, row = _apply(~self.transform, np.asarray(rx), np.asarray(ry))
        return np.asarray(col, float), np.asarray(row, float)

    def fractions(self, clip=None, *, deadline: float | None = None) -> CellFractions | None:
        """Each window cell's share inside the region (∩ `clip`), by :func:`~areamc.exact.cell_fractions`.

        None when `deadline` (a ``time.monotonic()`` value) passes first.  The
        region's own fractions (`clip` None) are kept for the view's later calls.
        """
        if self.transform is None:  # the raster does not reach the region: no cells
            none = np.zeros(0, dtype=np.int64)
            return CellFractions((0, 0), none, none, none, none, np.zeros(0))
        if clip is None and "region" in self._fractions:
            return self._fractions["region"]
        geom = self.region if clip is None else shapely.intersection(self.region, clip)
        out = cell_fractions(geom, self.counts.shape, self.to_plane, self.to_grid, deadline=deadline)
        if clip is None and out is not None:
            self._fractions["region"] = out
        return out

    def density(self, x, y):
        """Density (count per m²) at plane points; 0 outside the window."""
        out = np.zeros(len(x))
        if self.transform is None:
            return out
        col, row = self.to_grid(x, y)
        col = np.floor(col).astype(np.int64)
        row = np.floor(row).astype(np.int64)
        ok = (row >= 0) & (row < self.rates.shape[0]) & (col >= 0) & (col < self.rates.shape[1])
        out[ok] = self.rates[row[ok], col[ok]]
        return out

    def exact_total(self, clip=None, *, deadline: float | None = None) -> float | None:
        """Σ cell count x share of the cell inside the region (∩ `clip`); cells outlined by 4 corners in the plane.

        None when `deadline` (a ``time.monotonic()`` value) passes first (:meth:`fractions`).
        """
        if self.transform is None:
            return 0.0
        fractions = self.fractions(clip, deadline=deadline)
        return None if fractions is None else fractions.total(self.counts)

    def exact_square_total(self, *, deadline: float | None = None) -> float | None:
        """∫_R d² dA = Σ count x rate x share of the cell inside R (count² per m²); None past `deadline`."""
        if self.transform is None:
            return 0.0
        fractions = self.fractions(deadline=deadline)
        return None if fractions is None else fractions.total(self.counts, self.rates)

    def _importance_ok(self) -> bool:
        if self.source.geographic:
            return True
        to_ll = transformer(self.source.plane.crs, LONLAT)
        xmin, ymin, xmax, ymax = self.region.bounds
        bounds = to_ll.transform_bounds(xmin, ymin, xmax, ymax, densify_pts=21)
        return measure_area_distortion(self.source.crs, bounds)[0] <= 1e-6

    def proposal(self) -> Proposal | None:
        """Draw a cell by its count, then a point uniform in area inside it; None for a raster CRS that is not equal-area."""
        if self.transform is None:
            return Proposal(0.0, None)
        if not self._importance_ok():
            return None
        flat = self.counts.ravel()
        cells = np.nonzero(flat > 0)[0]
        if not len(cells):
            return Proposal(0.0, None)
        cdf = np.cumsum(flat[cells])
        cols = self.counts.shape[1]
        transform = self.transform
        geographic = self.source.geographic
        e = eccentricity(self.source._rf)
        to_plane = self.source._to_plane

        def draw(u: np.ndarray):
            pick = cells[np.minimum(np.searchsorted(cdf, u[:, 0] * cdf[-1], side="right"), len(cells) - 1)]
            row, col = pick // cols, pick % cols
            x0, y0 = _apply(transform, col, row)
            x1, y1 = _apply(transform, col + 1, row + 1)
            gx = np.asarray(x0) + u[:, 1] * (np.asarray(x1) - np.asarray(x0))
            if geographic and e > 0:
                q0, q1 = authalic_q(np.radians(y0), e), authalic_q(np.radians(y1), e)
                gy = np.degrees(latitude_from_q(q0 + u[:, 2] * (q1 - q0), e))
            elif geographic:
                s0, s1 = np.sin(np.radians(y0)), np.sin(np.radians(y1))
                gy = np.degrees(np.arcsin(s0 + u[:, 2] * (s1 - s0)))
            else:
                gy = np.asarray(y0) + u[:, 2] * (np.asarray(y1) - np.asarray(y0))
            px, py = to_plane.transform(gx, gy)
            return np.asarray(px), np.asarray(py)

        return Proposal(float(cdf[-1]), draw)


def warn_nodata(source, views) -> int:
    """Warn once about the distinct nodata cells the `views` met; returns their number."""
    cells = [v.nodata_cells for v in views if len(v.nodata_cells)]
    count = int(np.unique(np.concatenate(cells)).size) if cells else 0
    if count:
        warnings.warn(
            f"{getattr(source, 'path', source.label)}: {count} nodata cell(s) over the regions were treated as empty",
            AreamcWarning,
            stacklevel=2,
        )
    return count


# -- expressions --------------------------------------------------------------

def parse_origin(origin) -> tuple[float, float]:
    """Read the origin of ``east``, ``north``: ``"LON,LAT"`` text or a ``(lon, lat)`` pair, in WGS84 degrees.

    Returns ``(lon, lat)`` as floats.

    Raises
    ------
    OptionError
        (parameter ``origin``) unless it is exactly two finite numbers, the
        longitude within [-180, 180] and the latitude within [-90, 90].
    """
    shown = origin if isinstance(origin, str) else repr(origin)
    parts = origin.split(",") if isinstance(origin, str) else origin
    try:
        if isinstance(parts, (bytes, dict)) or len(parts) != 2:
            raise ValueError
        lon, lat = (float(p.strip() if isinstance(p, str) else p) for p in parts)
    except (TypeError, ValueError):
        raise OptionError(f"{{param}}: expected LON,LAT in degrees (two numbers, such as 10.6,47.25), got {shown!r}",
                          param="origin") from None
    if not (math.isfinite(lon) and math.isfinite(lat)):
        raise OptionError(f"{{param}}: the longitude and latitude must be finite numbers, got {shown!r}", param="origin")
    if not -180 <= lon <= 180:
        raise OptionError(f"{{param}}: longitude {lon:g} lies outside [-180, 180] degrees (LON,LAT: longitude "
                          f"first), got {shown!r}", param="origin")
    if not -90 <= lat <= 90:
        raise OptionError(f"{{param}}: latitude {lat:g} lies outside [-90, 90] degrees (LON,LAT: longitude first), "
                          f"got {shown!r}", param="origin")
    return lon, lat


def origin_crs(origin: tuple[float, float]) -> pyproj.CRS:
    """The plane of ``east``, ``north``: Lambert azimuthal equal-area on WGS84 centred on `origin` (lon, lat degrees).

    ``+proj=laea +lat_0=LAT +lon_0=LON +datum=WGS84 +units=m`` (Snyder 1987,
    §24): metres east and north of the origin, the same whatever plane the
    areas are computed in.
    """
    lon, lat = parse_origin(origin)
    return pyproj.CRS.from_proj4(f"+proj=laea +lat_0={lat!r} +lon_0={lon!r} +datum=WGS84 +units=m")


def _unused_origin(why: str) -> None:
    warnings.warn(AreamcWarning(f"{{param}} is not used: {why} (it is the point a density expression's east, north "
                                "are measured from)", param="origin"), stacklevel=3)


def expression_origin(expression: Expression, origin) -> tuple[float, float] | None:
    """The origin `expression` needs, read with :func:`parse_origin` (None when it uses no ``east``, ``north``).

    Raises :class:`OptionError` when the expression uses ``east`` or
    ``north`` and `origin` is None; warns (:class:`AreamcWarning`) when an
    origin is given that the expression does not use.
    """
    point = None if origin is None else parse_origin(origin)
    if expression.uses_origin and point is None:
        raise OptionError(
            f"{{origin}}: the {{density}} expression {expression.text!r} uses east, north (metres east and north of "
            "a point you name); name it as LON,LAT in degrees", params=("origin", "density"))
    if point is not None and not expression.uses_origin:
        _unused_origin(f"the expression {expression.text!r} uses no east, north")
        return None
    return point


class ExpressionDensity:
    """A density given by an expression in coordinates of each point (values per m²).

    The coordinates (:data:`areamc.expression.VARIABLES`):

    * ``lon``, ``lat``: WGS84 degrees, the inverse of the computation plane at the point;
    * ``east``, ``north``: metres east and north of `origin` (lon, lat degrees) on the
      Lambert azimuthal equal-area plane centred there (:func:`origin_crs`), computed
      from the point's ``lon``, ``lat``: they do not depend on the computation plane;
    * ``x``, ``y``: metres of the computation plane, from its own origin (the
      ``lat_0``, ``lon_0`` of its PROJ string).  A plane chosen from the data
      (``plane.chosen``) moves with the data, and so do ``x``, ``y``: a warning
      (:class:`~areamc.errors.AreamcWarning`, parameters ``density``, ``crs``,
      ``origin``) says so when the expression uses them.

    Parameters
    ----------
    text : str or Expression
    plane : EqualAreaPlane
        The plane sample points come in (metres).
    origin : (lon, lat) or "LON,LAT", optional
        Degrees; needed when the expression uses ``east`` or ``north`` (an
        :class:`~areamc.errors.OptionError` otherwise), and warned about as
        unused when it does not.

    Negative or non-finite values at a sampled point stop the run with an
    :class:`~areamc.errors.InputError` (parameter ``density``).
    """

    label = "expression"

    def __init__(self, text: str | Expression, plane: EqualAreaPlane, *,
                 origin: tuple[float, float] | str | None = None) -> None:
        self.expression = text if isinstance(text, Expression) else parse_expression(text)
        self.plane = plane
        self.origin = expression_origin(self.expression, origin)
        uses_lonlat = self.expression.uses_lonlat or self.expression.uses_origin
        self._to_lonlat = transformer(plane.crs, LONLAT) if uses_lonlat else None
        self._to_origin = transformer(LONLAT, origin_crs(self.origin)) if self.origin is not None else None
        if plane.chosen and self.expression.uses_plane:
            warnings.warn(AreamcWarning(
                f"{{density}}: the expression {self.expression.text!r} uses x, y: metres on a plane chosen from the "
                "data, whose origin moves with the data (other layers or another extent give other totals); "
                "name the plane with {crs}, or write the expression in east, north (metres from the point "
                "{origin} names, as LON,LAT degrees) or in lon, lat (degrees)",
                params=("density", "crs", "origin")), stacklevel=2)

    def coordinates(self, x, y) -> dict[str, np.ndarray]:
        """The expression's coordinates at plane points `x`, `y` (metres): the one place they are computed.

        Returns a dict with ``x``, ``y`` (plane metres) and, when the expression
        uses them, ``lon``, ``lat`` (degrees) and ``east``, ``north`` (metres
        from the origin, from ``lon``, ``lat``).
        """
        env = {"x": np.asarray(x, float), "y": np.asarray(y, float)}
        if self._to_lonlat is not None:
            lon, lat = self._to_lonlat.transform(env["x"], env["y"])
            env["lon"], env["lat"] = np.asarray(lon, float), np.asarray(lat, float)
        if self._to_origin is not None:
            east, north = self._to_origin.transform(env["lon"], env["lat"])
            env["east"], env["north"] = np.asarray(east, float), np.asarray(north, float)
        return env

    def density(self, x, y):
        """Density (per m²) at plane points."""
        value = self.expression.evaluate(**self.coordinates(x, y))
        bad = ~np.isfinite(value) | (value < 0)
        if bad.any():
            i = int(np.argmax(bad))
            raise InputError(
                f"{{param}}: expression {self.expression.text!r} gives {value[i]:g} at plane point "
                f"({x[i]:.1f}, {y[i]:.1f}); a density must be non-negative and finite", param="density"
            )
        return value

    def for_region(self, region) -> "ExpressionView":
        return ExpressionView(self, region)


@dataclass(frozen=True, eq=False)
class ExpressionView(_PointwiseView):
    """:class:`ExpressionDensity` for one region: no exact total and no units to sample (see :func:`grid_proposal`)."""

    def exact_total(self, clip=None, *, deadline: float | None = None) -> None:
        return None

    def exact_square_total(self, *, deadline: float | None = None) -> None:
        return None

    def proposal(self) -> None:
        return None


# -- a pilot grid, for densities without units ----------------------------------

#: Share α of the defensive uniform part of the pilot-grid proposal (Hesterberg 1995): no point
#: weighs more than 1/α times its uniform-sampling score, and a perfect grid loses at most a factor
#: 1/(1 − α) in variance.
GRID_DEFENSIVE = 0.1
#: Fewest and most cells per side of the pilot grid (see :func:`grid_side`).
GRID_SIDE_MIN, GRID_SIDE_MAX = 64, 256
#: Probes per cell, as fractions of the cell's width and height: its centre and the centres of its quarters.
_PROBES = ((0.5, 0.5), (0.25, 0.25), (0.75, 0.25), (0.25, 0.75), (0.75, 0.75))


def grid_side(points: int) -> int:
    """Cells per side of the pilot grid for a budget of `points` per region.

    ``√points / 4`` rounded to a power of two, within 64..256
    (:data:`GRID_SIDE_MIN`, :data:`GRID_SIDE_MAX`): the pilot's 5 probes per
    cell then cost at most about 0.6 times the budget's density evaluations
    above 2^16 points, and a fixed 20,480 below.
    """
    side = 2 ** round(math.log2(max(math.sqrt(max(points, 1)) / 4, 1.0)))
    return int(min(max(side, GRID_SIDE_MIN), GRID_SIDE_MAX))


def grid_proposal(view: DensityView, points: int, *, defensive: float = GRID_DEFENSIVE) -> Proposal:
    """An importance sampler for a density known only pointwise: a pilot grid of its values over the region's box.

    The region's bounding box ``B`` (plane metres) is cut into ``G x G``
    equal cells, ``G = grid_side(points)``.  The density is probed at 5 fixed
    points of each cell (its centre and the centres of its quarters; never
    on the box's edge) and the cell's pilot value ``g_c`` is the largest of
    them, kept only for cells within one cell of a cell whose centre lies in
    the region (0 elsewhere).  Points are drawn from the defensive mixture
    (Hesterberg 1995, *Technometrics* 37:185-194)

        q̃(x) = (1 − α) g_c(x) + α ḡ,    ḡ = mean of g_c over the G² cells,

    normalised by its total ``T̂ = ḡ |B|``: a cell is picked with probability
    proportional to ``q̃`` (one uniform) and the point placed uniformly in it
    (two uniforms).  A point scores ``d(x) / q̃(x)`` (:attr:`Proposal.weight`),
    so ``T̂ x mean(score x 1_A)`` is unbiased for ``∫_A d`` whatever the
    pilot saw; the uniform part ``α ḡ`` keeps every score at most ``1/α``
    times ``d(x) |B| / T̂``, its uniform-sampling value, where the pilot
    missed mass.  When every probe is 0 the grid is flat (``g_c = 1``): plain
    uniform sampling of the box.  The pilot is deterministic: it draws no
    random numbers.

    Parameters
    ----------
    view : DensityView
        Gives ``density(x, y)`` (per m²) at plane points and the `region`.
    points : int
        The run's point budget, which sizes the grid.
    defensive : float
        α in (0, 1], :data:`GRID_DEFENSIVE` by default.

    Raises
    ------
    InputError
        When the density is negative or not finite at a probe (from ``view.density``).
    """
    if not 0 < defensive <= 1:
        raise OptionError(f"{{param}}: must lie in (0, 1], got {defensive!r}", param="defensive")
    box = Box.of(view.region.bounds)
    side = grid_side(points)
    dx, dy = (box.xmax - box.xmin) / side, (box.ymax - box.ymin) / side
    col, row = np.meshgrid(np.arange(side, dtype=float), np.arange(side, dtype=float))
    px = np.concatenate([box.xmin + (col.ravel() + fx) * dx for fx, _ in _PROBES])
    py = np.concatenate([box.ymin + (row.ravel() + fy) * dy for _, fy in _PROBES])
    probes = np.asarray(view.density(px, py), float).reshape(len(_PROBES), side, side)
    near = np.asarray(shapely.contains_xy(view.region, px[: side * side], py[: side * side])).reshape(side, side)
    if near.any():  # dilate by one cell: cells the region only clips keep their pilot values
        padded = np.pad(near, 1)
        near = np.zeros_like(near)
        for di in range(3):
            for dj in range(3):
                near |= padded[di:di + side, dj:dj + side]
    else:  # a region thinner than a cell: keep the whole box
        near = np.ones_like(near)
    pilot = np.where(near, probes.max(axis=0), 0.0)
    mean = float(pilot.mean())
    if not mean > 0:
        pilot, mean = np.ones_like(pilot), 1.0
    mixture = ((1 - defensive) * pilot + defensive * mean).ravel()
    cdf = np.cumsum(mixture)
    x0, y0 = box.xmin, box.ymin
    density = view.density

    def draw(u: np.ndarray):
        pick = np.minimum(np.searchsorted(cdf, u[:, 0] * cdf[-1], side="right"), side * side - 1)
        r, c = np.divmod(pick, side)
        return x0 + (c + u[:, 1]) * dx, y0 + (r + u[:, 2]) * dy

    def weight(x: np.ndarray, y: np.ndarray) -> np.ndarray:
        c = np.clip(np.floor((np.asarray(x) - x0) / dx), 0, side - 1).astype(np.int64)
        r = np.clip(np.floor((np.asarray(y) - y0) / dy), 0, side - 1).astype(np.int64)
        return density(x, y) / mixture[r * side + c]

    return Proposal(mean * box.area, draw, weight)


# -- naming a source ----------------------------------------------------------

@dataclass(frozen=True)
class DensitySpec:
    """A density source as named by the user, read but not yet on a plane.

    Attributes
    ----------
    kind : {"blocks", "raster", "expression"}
    text : str
        What was named: a path or the expression.
    blocks : Layer or None
        The block layer (in its own CRS), to be projected with the regions.
    counts : numpy.ndarray or None
        The count of each block.
    expression : Expression or None
    values : str
        What raster cells hold (see :data:`RASTER_VALUES`).
    band : int
    count_field : str or None
    origin : (lon, lat) or None
        WGS84 degrees: the point ``east``, ``north`` of an expression are measured from.
    """

    kind: str
    text: str
    blocks: Layer | None = None
    counts: np.ndarray | None = None
    expression: Expression | None = None
    values: str = "count"
    band: int = 1
    count_field: str | None = None
    origin: tuple[float, float] | None = None

    def to_dict(self) -> dict:
        return {"source": self.text, "kind": self.kind, "count_field": self.count_field,
                "raster_values": self.values if self.kind == "raster" else None,
                "origin": None if self.origin is None else list(self.origin)}


def guess_density_kind(text: str) -> str:
    """Guess the kind of a density source: a raster by extension, another existing file as blocks, else an expression.

    Raises
    ------
    LayerError
        For a path with a raster or vector extension that does not exist.
    """
    lower = text.lower()
    if os.path.exists(text) or text.startswith("/vsi") or gdal_path(text) != text:  # a file, archive or URL
        return "raster" if lower.endswith(_RASTER_EXT) else "blocks"
    if lower.endswith(_RASTER_EXT + _VECTOR_EXT):
        raise LayerError(f"{text}: no such file")
    return "expression"


def read_density(
    text: str,
    *,
    kind: str = "auto",
    layer: str | None = None,
    count_field: str | None = None,
    values: str = "count",
    band: int = 1,
    origin: tuple[float, float] | str | None = None,
    open_options=None,
    input_crs: str | None = None,
) -> DensitySpec:
    """Read the density source `text` names, checking it fully before any sampling.

    `open_options` are GDAL open options of a block layer's driver, and `input_crs` the CRS to
    read its coordinates in (:func:`~areamc.load.read_layer`); both refused for another kind of
    source.

    Parameters
    ----------
    text : str
        A block layer path, a raster path, or an expression.
    kind : {"auto", "blocks", "raster", "expression"}
        How to read `text`; "auto" guesses (:func:`guess_density_kind`).
    layer, count_field : str, optional
        Layer of the block file, and the attribute holding each block's count (needed for blocks).
    values, band
        For rasters: what a cell holds, and which band to read.
    origin : (lon, lat) or "LON,LAT", optional
        WGS84 degrees: the point an expression's ``east``, ``north`` (metres)
        are measured from (:class:`ExpressionDensity`).  Needed when the
        expression uses them; a warning says when it is not used.
    """
    if kind == "auto":
        kind = guess_density_kind(text)
    if kind not in DENSITY_KINDS:
        raise OptionError(f"{{param}}: unknown kind {kind!r}; choose one of auto, {', '.join(DENSITY_KINDS)}",
                          param="density_kind")
    if values not in RASTER_VALUES:
        raise OptionError(f"{{param}}: unknown {values!r}; choose one of {', '.join(RASTER_VALUES)}", param="values")
    if origin is not None:
        origin = parse_origin(origin)
        if kind != "expression":
            _unused_origin(f"the density is a {'block layer' if kind == 'blocks' else kind}, not an expression")
            origin = None
    if open_options and kind != "blocks":
        raise OptionError(f"{{param}}: open options serve a block layer, and the density is {kind!r}",
                          param="open_options")
    if input_crs is not None and kind != "blocks":
        raise OptionError(f"{{param}}: an input CRS serves a block layer, and the density is {kind!r}",
                          param="input_crs")
    if kind == "blocks":
        if not count_field:
            raise OptionError(f"{text}: a block layer needs {{param}}", param="count_field")
        blocks = read_layer(text, layer=layer, open_options=open_options, input_crs=input_crs)
        return DensitySpec(kind, text, blocks=blocks, counts=block_counts(blocks, count_field),
                           count_field=count_field)
    if kind == "expression":
        expression = parse_expression(text)
        return DensitySpec(kind, text, expression=expression, origin=expression_origin(expression, origin))
    return DensitySpec(kind, text, values=values, band=band)


def build_density(spec: DensitySpec, plane: EqualAreaPlane, blocks: ProjectedLayer | None = None,
                  regions: ProjectedLayer | None = None):
    """Make the density source of `spec` on `plane` (the blocks already projected onto it).

    With `regions`, a raster that covers none of them is refused.  A raster
    source holds its file open: close it (or use it in ``with``) when done.
    """
    if spec.kind == "blocks":
        if blocks is None:
            raise ValueError("a block density needs its projected block layer")
        return BlockDensity(blocks, spec.counts)
    if spec.kind == "expression":
        return ExpressionDensity(spec.expression, plane, origin=spec.origin)
    raster = RasterDensity(spec.text, plane, values=spec.values, band=spec.band)
    if regions is not None and not any(raster.overlaps(g) for g in regions.planar):
        raster.close()
        raise LayerError(f"{spec.text}: the raster does not overlap the regions")
    return raster
