"""Density sources: values per m² at points of the equal-area plane.

Three kinds share one interface (:class:`DensitySource`):

* :class:`BlockDensity`: a polygon layer with a count per block (census-style),
  spread uniformly over each block: density = count / block area (areal
  weighting, Goodchild & Lam 1980, Geo-Processing 1:297-312).
* :class:`RasterDensity`: a GeoTIFF of counts per cell or of density per unit
  area, in any CRS; counts become densities with each cell's true area (the
  closed-form ellipsoidal quadrangle for geographic grids, Snyder 1987).  Read
  window by window, never whole.
* :class:`ExpressionDensity`: a safe arithmetic expression in ``x``, ``y``
  (plane metres) or ``lon``, ``lat`` (degrees); see :mod:`areamc.expression`.

Where a source allows it, :meth:`DensitySource.proposal` returns an importance
sampler that draws points with probability proportional to the density (a
block or cell by its count, then a uniform point inside it), and
:meth:`DensitySource.exact_total` gives the exact total over a polygon.
"""

from __future__ import annotations

import math
import os
import warnings
from dataclasses import dataclass
from typing import Callable

import numpy as np
import pyproj
import shapely

from .classify import ZoneIndex
from .errors import InputError, LayerError, OptionError
from .expression import Expression, parse_expression
from .load import AreamcWarning, Layer
from .project import (
    LONLAT,
    EqualAreaPlane,
    ProjectedLayer,
    authalic_q,
    measure_area_distortion,
    quadrangle_area,
    transformer,
)
from .sampling import Box

__all__ = [
    "DensitySource",
    "Proposal",
    "BlockDensity",
    "RasterDensity",
    "ExpressionDensity",
    "block_counts",
    "RASTER_VALUES",
]

#: What raster values mean: counts per cell, or a density per m², ha or km².
RASTER_VALUES = {"count": None, "per-m2": 1.0, "per-ha": 1.0e4, "per-km2": 1.0e6}


@dataclass(frozen=True)
class Proposal:
    """An importance sampler over the units (blocks, cells) that meet one region.

    Attributes
    ----------
    total : float
        Sum of the counts of those units (persons): the integral of the
        density over their union.  0 when no unit near the region has a
        positive count (then `draw` is None and the density there is 0).
    draw : callable
        ``draw(u)`` maps an ``(n, 4)`` array of uniforms in [0, 1) to points
        ``(x, y)`` in plane metres, distributed with density ``d(x) / total``.
    """

    total: float
    draw: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]] | None


class DensitySource:
    """Interface of density sources (values per m² in the equal-area plane)."""

    label = "density"

    def prepare(self, region) -> None:
        """Get ready to answer for points in and near `region` (plane metres)."""

    def density(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Density (count per m²) at plane points; non-negative and finite."""
        raise NotImplementedError

    def exact_total(self, region) -> float | None:
        """Exact integral of the density over `region` (plane metres), or None."""
        return None

    def proposal(self, region) -> Proposal | None:
        """An importance sampler for `region`, or None when the source cannot offer one there."""
        return None

    def finish(self) -> None:
        """Report what was skipped (for instance nodata cells)."""


def block_counts(layer: Layer, field: str) -> np.ndarray:
    """Read the count of every block from `field`; refuse missing, non-numeric or negative values."""
    if layer.properties and field not in layer.properties[0]:
        fields = ", ".join(layer.properties[0]) or "(none)"
        raise LayerError(f"{layer.source}: --count-field {field!r} is not a field; fields: {fields}")
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


def _triangles(geom) -> np.ndarray:
    """Triangles of a polygon's constrained Delaunay triangulation, shape (t, 3, 2)."""
    out = []
    for part in shapely.get_parts(geom):
        for tri in shapely.get_parts(shapely.constrained_delaunay_triangles(part)):
            out.append(np.asarray(tri.exterior.coords)[:3])
    return np.array(out, dtype=float).reshape(-1, 3, 2)


def _in_triangles(tris: np.ndarray, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Uniform points in triangles ``tris`` (n, 3, 2) from uniforms ``u`` (n, 2), by reflection."""
    r1, r2 = u[:, 0].copy(), u[:, 1].copy()
    flip = r1 + r2 > 1
    r1[flip], r2[flip] = 1 - r1[flip], 1 - r2[flip]
    a, b, c = tris[:, 0], tris[:, 1], tris[:, 2]
    p = a + r1[:, None] * (b - a) + r2[:, None] * (c - a)
    return p[:, 0], p[:, 1]


class BlockDensity(DensitySource):
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
        self._index = ZoneIndex(blocks.planar, Box.of(shapely.total_bounds(blocks.planar)))
        self._tri: dict[int, np.ndarray] = {}

    def density(self, x, y):
        point, block = self._index.pairs(x, y)
        return np.bincount(point, weights=self.rates[block], minlength=len(x))

    def _near(self, region) -> np.ndarray:
        """Blocks sharing area with `region` (neighbours that only touch it are left out)."""
        near = np.sort(self._tree.query(region, predicate="intersects"))
        return near[~shapely.touches(self.blocks.planar[near], region)]

    def exact_total(self, region) -> float:
        """Σ count_i |block_i ∩ region| / |block_i| (Goodchild & Lam 1980)."""
        near = self._near(region)
        if near.size == 0:
            return 0.0
        inter = shapely.area(shapely.intersection(self.blocks.planar[near], region))
        return float(np.sum(self.rates[near] * inter))

    def proposal(self, region) -> Proposal | None:
        near = [i for i in self._near(region) if self.counts[i] > 0]
        if not near:
            return Proposal(0.0, None)
        tris, weights = [], []
        for i in near:
            t = self._tri.get(i)
            if t is None:
                t = self._tri[i] = _triangles(self.blocks.planar[i])
            tris.append(t)
            weights.append(self.rates[i] * _tri_area(t))
        tri = np.concatenate(tris)
        cdf = np.cumsum(np.concatenate(weights))
        total = float(sum(self.counts[i] for i in near))

        def draw(u: np.ndarray):
            pick = np.minimum(np.searchsorted(cdf, u[:, 0] * cdf[-1], side="right"), len(cdf) - 1)
            return _in_triangles(tri[pick], u[:, 1:3])

        return Proposal(total, draw)


def _tri_area(t: np.ndarray) -> np.ndarray:
    a, b, c = t[:, 0], t[:, 1], t[:, 2]
    return 0.5 * np.abs((b[:, 0] - a[:, 0]) * (c[:, 1] - a[:, 1]) - (c[:, 0] - a[:, 0]) * (b[:, 1] - a[:, 1]))


def _phi_from_q(q: np.ndarray, e: float) -> np.ndarray:
    """Invert the authalic q function (Snyder 1987, eq. 3-16, iterated to convergence)."""
    e2 = e * e
    phi = np.arcsin(np.clip(q / 2, -1, 1))
    for _ in range(8):
        s = np.sin(phi)
        c = np.maximum(np.cos(phi), 1e-15)
        phi = phi + (1 - e2 * s * s) ** 2 / (2 * c) * (
            q / (1 - e2) - s / (1 - e2 * s * s) - np.arctanh(e * s) / e
        )
    return phi


def _apply(transform, u, v) -> tuple[np.ndarray, np.ndarray]:
    """Apply an affine transform to coordinate arrays (column/row to x/y, or back)."""
    u = np.asarray(u, float)
    v = np.asarray(v, float)
    return transform.a * u + transform.b * v + transform.c, transform.d * u + transform.e * v + transform.f


class RasterDensity(DensitySource):
    """A GeoTIFF of counts per cell or density per unit area, read window by window.

    Parameters
    ----------
    path : str
        Raster file (GeoTIFF or any single-band raster rasterio opens).
    plane : EqualAreaPlane
        The plane points are given in.
    values : {"count", "per-m2", "per-ha", "per-km2"}
        What a cell value means.
    band : int
        Band to read (1-based).

    Notes
    -----
    Nodata cells are treated as empty (density 0) and counted in a warning.
    Importance sampling draws a cell by its count and a point uniform in area
    inside it: for geographic rasters uniform in longitude and in the authalic
    q (Snyder 1987), for equal-area projected rasters uniform in the cell; for
    other CRSs :meth:`proposal` returns None and plain sampling is used.
    """

    label = "raster"

    def __init__(self, path: str, plane: EqualAreaPlane, *, values: str = "count", band: int = 1) -> None:
        import rasterio
        import rasterio.errors

        if values not in RASTER_VALUES:
            raise OptionError(f"--raster-values: unknown {values!r}; choose one of {', '.join(RASTER_VALUES)}")
        if not os.path.exists(path):
            raise LayerError(f"{path}: no such file")
        try:
            self._ds = rasterio.open(path)
        except (rasterio.errors.RasterioError, OSError) as err:
            raise LayerError(f"{path}: not a readable raster ({' '.join(str(err).split())[:160]})") from err
        if self._ds.crs is None:
            raise LayerError(f"{path}: the raster declares no CRS")
        if not 1 <= band <= self._ds.count:
            raise OptionError(f"--band: {path} has {self._ds.count} band(s), not {band}")
        self.path = path
        self.band = band
        self.values = values
        self.plane = plane
        self.crs = pyproj.CRS.from_wkt(self._ds.crs.to_wkt())
        self._to_raster = transformer(plane.crs, self.crs)
        self._to_plane = transformer(self.crs, plane.crs)
        self._geographic = self.crs.is_geographic
        ell = self.crs.ellipsoid
        self._a = ell.semi_major_metre
        self._rf = ell.inverse_flattening or math.inf
        self._e = math.sqrt((2 - 1 / self._rf) / self._rf) if math.isfinite(self._rf) else 0.0
        self._equal_area: bool | None = None
        self._nodata: list[np.ndarray] = []
        self._window = None
        self._cells = None

    # -- windows ------------------------------------------------------------
    def _window_for(self, region):
        from rasterio.windows import Window, from_bounds

        xmin, ymin, xmax, ymax = region.bounds
        bx = self._to_raster.transform_bounds(xmin, ymin, xmax, ymax, densify_pts=21)
        win = from_bounds(*bx, transform=self._ds.transform)
        col0 = max(int(math.floor(win.col_off)) - 1, 0)
        row0 = max(int(math.floor(win.row_off)) - 1, 0)
        col1 = min(int(math.ceil(win.col_off + win.width)) + 1, self._ds.width)
        row1 = min(int(math.ceil(win.row_off + win.height)) + 1, self._ds.height)
        if col1 <= col0 or row1 <= row0:
            return None
        return Window(col0, row0, col1 - col0, row1 - row0)

    def overlaps(self, region) -> bool:
        """True when the raster covers part of `region`'s bounding box."""
        return self._window_for(region) is not None

    def prepare(self, region) -> None:
        win = self._window_for(region)
        self._window = None
        self._cells = None  # cell outlines in the plane for this window, built on first need
        if win is None:
            return
        data = self._ds.read(self.band, window=win, masked=True).astype(float)
        mask = np.ma.getmaskarray(data)
        raw = np.ma.filled(data, 0.0)
        if np.isnan(raw).any():
            mask = mask | np.isnan(raw)
            raw = np.where(np.isnan(raw), 0.0, raw)
        if mask.any():
            r, c = np.nonzero(mask)
            self._nodata.append((r + int(win.row_off)) * self._ds.width + (c + int(win.col_off)))
        if (raw < 0).any():
            r, c = np.argwhere(raw < 0)[0]
            raise InputError(
                f"{self.path}: negative value {raw[r, c]:g} at row {win.row_off + r}, column {win.col_off + c}; "
                "densities and counts must be non-negative"
            )
        transform = self._ds.window_transform(win)
        rows, cols = raw.shape
        cell_area = self._cell_areas(transform, rows, cols)
        if self.values == "count":
            counts = raw
        else:
            counts = raw / RASTER_VALUES[self.values] * cell_area
        with np.errstate(divide="ignore", invalid="ignore"):
            rates = np.where(cell_area > 0, counts / cell_area, 0.0)
        self._window = (transform, counts, rates, cell_area)

    def _corners(self, transform, rows, cols):
        cc, rr = np.meshgrid(np.arange(cols + 1), np.arange(rows + 1))
        xs, ys = _apply(transform, cc.ravel(), rr.ravel())
        return np.asarray(xs).reshape(rows + 1, cols + 1), np.asarray(ys).reshape(rows + 1, cols + 1)

    def _cell_polygons(self, transform, rows, cols) -> np.ndarray:
        """Cell outlines in the plane (4 corners each), shape (rows * cols,)."""
        xs, ys = self._corners(transform, rows, cols)
        px, py = self._to_plane.transform(xs.ravel(), ys.ravel())
        px = np.asarray(px).reshape(rows + 1, cols + 1)
        py = np.asarray(py).reshape(rows + 1, cols + 1)
        ring = np.stack(
            [
                np.stack([px[:-1, :-1], py[:-1, :-1]], -1),
                np.stack([px[:-1, 1:], py[:-1, 1:]], -1),
                np.stack([px[1:, 1:], py[1:, 1:]], -1),
                np.stack([px[1:, :-1], py[1:, :-1]], -1),
            ],
            axis=2,
        ).reshape(rows * cols, 4, 2)
        return shapely.polygons(ring)

    def _cell_areas(self, transform, rows, cols) -> np.ndarray:
        """True area (m²) of each cell: closed form on the ellipsoid, or planar in the equal-area plane."""
        if self._geographic:
            xs, ys = self._corners(transform, rows, cols)
            area = quadrangle_area(xs[:-1, :-1], ys[:-1, :-1], xs[1:, 1:], ys[1:, 1:], a=self._a, rf=self._rf)
            return np.asarray(area, float)
        self._cells = self._cell_polygons(transform, rows, cols)
        return shapely.area(self._cells).reshape(rows, cols)

    # -- queries ------------------------------------------------------------
    def density(self, x, y):
        out = np.zeros(len(x))
        if self._window is None:
            return out
        transform, _, rates, _ = self._window
        rx, ry = self._to_raster.transform(x, y)
        col, row = _apply(~transform, np.asarray(rx), np.asarray(ry))
        col = np.floor(col).astype(np.int64)
        row = np.floor(row).astype(np.int64)
        ok = (row >= 0) & (row < rates.shape[0]) & (col >= 0) & (col < rates.shape[1])
        out[ok] = rates[row[ok], col[ok]]
        return out

    def exact_total(self, region) -> float:
        """Σ cell count x share of the cell inside `region` (cells outlined by their 4 corners in the plane)."""
        if self._window is None:
            return 0.0
        transform, counts, _, _ = self._window
        if self._cells is None:
            self._cells = self._cell_polygons(transform, *counts.shape)
        cells = self._cells
        flat = counts.ravel()
        keep = flat > 0
        cells, flat = cells[keep], flat[keep]
        hit = shapely.intersects(region, cells)
        cells, flat = cells[hit], flat[hit]
        if not len(cells):
            return 0.0
        share = shapely.area(shapely.intersection(cells, region)) / shapely.area(cells)
        return float(np.sum(flat * share))

    def _importance_ok(self, region) -> bool:
        if self._geographic:
            return True
        if self._equal_area is None:
            to_ll = transformer(self.plane.crs, LONLAT)
            xmin, ymin, xmax, ymax = region.bounds
            bounds = to_ll.transform_bounds(xmin, ymin, xmax, ymax, densify_pts=21)
            self._equal_area = measure_area_distortion(self.crs, bounds)[0] <= 1e-6
        return self._equal_area

    def proposal(self, region) -> Proposal | None:
        if self._window is None:
            return Proposal(0.0, None)
        if not self._importance_ok(region):
            return None
        transform, counts, _, _ = self._window
        flat = counts.ravel()
        cells = np.nonzero(flat > 0)[0]
        if not len(cells):
            return Proposal(0.0, None)
        cdf = np.cumsum(flat[cells])
        cols = counts.shape[1]
        e = self._e

        def draw(u: np.ndarray):
            pick = cells[np.minimum(np.searchsorted(cdf, u[:, 0] * cdf[-1], side="right"), len(cells) - 1)]
            row, col = pick // cols, pick % cols
            x0, y0 = _apply(transform, col, row)
            x1, y1 = _apply(transform, col + 1, row + 1)
            gx = np.asarray(x0) + u[:, 1] * (np.asarray(x1) - np.asarray(x0))
            if self._geographic and e > 0:
                q0, q1 = authalic_q(np.radians(y0), e), authalic_q(np.radians(y1), e)
                gy = np.degrees(_phi_from_q(q0 + u[:, 2] * (q1 - q0), e))
            elif self._geographic:
                s0, s1 = np.sin(np.radians(y0)), np.sin(np.radians(y1))
                gy = np.degrees(np.arcsin(s0 + u[:, 2] * (s1 - s0)))
            else:
                gy = np.asarray(y0) + u[:, 2] * (np.asarray(y1) - np.asarray(y0))
            px, py = self._to_plane.transform(gx, gy)
            return np.asarray(px), np.asarray(py)

        return Proposal(float(cdf[-1]), draw)

    @property
    def nodata_cells(self) -> int:
        """Distinct nodata cells met in the windows read so far."""
        return int(np.unique(np.concatenate(self._nodata)).size) if self._nodata else 0

    def finish(self) -> None:
        if self.nodata_cells:
            warnings.warn(
                f"{self.path}: {self.nodata_cells} nodata cell(s) over the regions were treated as empty",
                AreamcWarning,
                stacklevel=2,
            )


class ExpressionDensity(DensitySource):
    """A density given by an expression in ``x``, ``y`` (plane metres) or ``lon``, ``lat`` (degrees).

    Values are per m².  Negative or non-finite values at a sampled point stop
    the run with an :class:`~areamc.errors.InputError`.
    """

    label = "expression"

    def __init__(self, text: str | Expression, plane: EqualAreaPlane) -> None:
        self.expression = text if isinstance(text, Expression) else parse_expression(text)
        self.plane = plane
        self._to_lonlat = transformer(plane.crs, LONLAT) if self.expression.uses_lonlat else None

    def density(self, x, y):
        env = {"x": np.asarray(x, float), "y": np.asarray(y, float)}
        if self._to_lonlat is not None:
            lon, lat = self._to_lonlat.transform(x, y)
            env["lon"], env["lat"] = np.asarray(lon), np.asarray(lat)
        value = self.expression.evaluate(**env)
        bad = ~np.isfinite(value) | (value < 0)
        if bad.any():
            i = int(np.argmax(bad))
            raise InputError(
                f"--density: expression {self.expression.text!r} gives {value[i]:g} at plane point "
                f"({x[i]:.1f}, {y[i]:.1f}); a density must be non-negative and finite"
            )
        return value
