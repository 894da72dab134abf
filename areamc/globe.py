"""The globe has no edge: lon/lat polygons across the antimeridian and round the poles, made plane-ready.

Longitude/latitude coordinates (degrees) have a seam at ±180° and a line at each
pole that are not edges of anything on the Earth.  A polygon near either is
written in ways a flat lon/lat plane misreads: a ring edge from 179.9° to
-179.9° would run the long way round, and a ring round a pole encloses nothing
in lon/lat.  This module rewrites such polygons into one canonical lon/lat form
that is a valid shapely polygon with the true extent, and fixes their planar
copies for the equal-area plane.  See docs/methods.md §6a.

How a ring is read (lon/lat degrees, edges straight in lon/lat):

* **The short way.**  An edge whose longitude changes by more than 180° crosses
  the antimeridian the short way: its change is taken as Δλ − 360·round(Δλ/360).
  A polygon truly wider than 180° of longitude therefore needs vertices no more
  than 180° apart along each edge (densify it or split it), or a projected CRS.
* **Two exceptions.**  An edge between two vertices at the same pole (latitude
  ±90) runs along the pole and keeps its longitudes as given.  An edge along a
  parallel whose longitude changes by exactly 360° (from -180 to 180, say) is
  the full parallel in a ring that also runs along a pole or has another such
  edge (a box to the pole, a band round the globe); in any other ring it is the
  zero-length step between two copies of the same point (a ring closed on the
  antimeridian).
* **Round a pole.**  After unwrapping, a ring's longitude changes by 0 (an
  ordinary ring) or by ±360° (it winds once round a pole and encloses it).  Such
  a ring bounds two caps; it is taken to enclose the pole on the side of smaller
  area (ring orientation is not trusted).  To mean the larger side, write the
  path over the pole out, as a box to the pole does.  Rings winding more than
  once are refused.

The canonical form (what :func:`normalize` returns):

* a geometry narrower than 360° of longitude is contiguous: rings unwrapped, the
  parts of a multipolygon shifted by multiples of 360° to the shortest span that
  holds them all (an RFC 7946 §3.1.9 split is glued back), the west bound in
  [-180, 180); the east bound may exceed 180;
* a geometry round a pole or round the globe lies within [-180, 180]: cut at the
  antimeridian, a ring round a pole closed along the ±180° meridians and the
  pole, as RFC 7946 §3.1.9 writes it.

Both forms are valid lon/lat polygons that ``pyproj.Geod`` (Karney 2013) measures
correctly once densified.  In an azimuthal plane (no seam) the cut and the pole
line of the second form are zero-width slits, closed by :func:`close_seams`; in
a plane with a seam at ±180° (a world cylinder) the first form is cut with
:func:`cut_at_antimeridian`.
"""

from __future__ import annotations

import math

from typing import Callable

import numpy as np
import shapely
from shapely.geometry import MultiPolygon, Polygon

from .errors import LayerError
from .geodesy import WGS84_RF, authalic_q, eccentricity

__all__ = [
    "normalize",
    "ring_winding",
    "union",
    "cut_at_antimeridian",
    "lonlat_extent",
    "beyond_antimeridian",
    "outlined",
    "tears_at_antimeridian",
    "close_seams",
    "SEAM_GRID_M",
]

#: Grid (plane metres) on which :func:`close_seams` snaps a planar polygon so the two
#: sides of a seam, projected from -180 and 180, coincide and cancel.
SEAM_GRID_M = 1e-6
#: Two points 2e-7 degrees apart across the antimeridian further apart than this in a
#: plane (metres) mean the plane tears there.
_TEAR_M = 1_000.0
_E = eccentricity(WGS84_RF)
_WORLD = shapely.box(-180.0, -90.0, 180.0, 90.0)
_SPAN_EPS = 1e-9


# --------------------------------------------------------------------------------------------
# One ring
# --------------------------------------------------------------------------------------------


class _Ring:
    """A closed ring unwrapped by the short-way rule: `lon` (degrees, unwrapped), `lat`, `winding`."""

    __slots__ = ("lon", "lat", "winding")

    def __init__(self, coords) -> None:
        xy = np.asarray(coords, dtype=float)[:, :2]
        if len(xy) and not np.array_equal(xy[0], xy[-1]):
            xy = np.vstack([xy, xy[:1]])
        lon, lat = xy[:, 0], xy[:, 1]
        self.lon, self.winding = _unwrap(lon, lat)
        self.lat = lat

    @property
    def west(self) -> float:
        return float(self.lon.min())

    @property
    def east(self) -> float:
        return float(self.lon.max())

    def xy(self, shift: float = 0.0) -> np.ndarray:
        return np.column_stack([self.lon + shift, self.lat])


def _unwrap(lon: np.ndarray, lat: np.ndarray) -> tuple[np.ndarray, int]:
    """Unwrapped longitudes of a closed ring and its winding number (turns round a pole)."""
    if len(lon) < 2:
        return lon.copy(), 0
    step = np.diff(lon)
    at_pole = np.abs(lat) >= 90.0
    along_pole = at_pole[:-1] & at_pole[1:]
    full = (np.abs(step) == 360.0) & (lat[:-1] == lat[1:]) & ~along_pole
    full_parallels = full.any() and (along_pole.any() or full.sum() >= 2)
    turns = np.round(step / 360.0)  # ±180 exactly rounds to 0: kept as given
    turns[along_pole] = 0.0
    if full_parallels:
        turns[full] = 0.0
    shift = np.concatenate([[0.0], -360.0 * np.cumsum(turns)])
    unwrapped = lon + shift  # lon + 360·(whole number): exact in floating point
    winding = int(round((unwrapped[-1] - unwrapped[0]) / 360.0))
    return unwrapped, winding


def ring_winding(lon, lat) -> int:
    """Turns a closed lon/lat ring (degrees) makes round a pole under the short-way rule: 0, ±1, ...

    The ring may be given with or without its closing vertex.
    """
    return _Ring(np.column_stack([np.asarray(lon, float), np.asarray(lat, float)])).winding


def _encloses_north(ring: _Ring) -> bool:
    """The smaller-area side of a ring winding round a pole: True for the north pole.

    Along an eastward ring the area north of it is (a²/2)∫(q_p − q(φ)) dλ and the area
    south (a²/2)∫(q_p + q(φ)) dλ (Snyder 1987, eq. 3-12 for q); the north cap is the
    smaller when the mean of q over longitude is positive.
    """
    q = authalic_q(np.radians(ring.lat), _E)
    integral = float(np.sum(np.diff(ring.lon) * (q[:-1] + q[1:]) / 2)) * ring.winding
    return integral >= 0.0


def _round_pole(ring: _Ring, north: bool, where: str) -> Polygon:
    """The lon/lat polygon between a ring winding round a pole and that pole, over three periods.

    The ring is walked eastward from a start in [-180, 180), repeated at -360, 0 and
    +360 degrees, and closed along meridians to the pole; intersected with [-180, 180]
    it is the canonical form.
    """
    lon, lat = ring.lon, ring.lat
    if ring.winding < 0:
        lon, lat = lon[::-1], lat[::-1]
    lon = lon - 360.0 * math.floor((lon[0] + 180.0) / 360.0)
    x, y = lon[:-1], lat[:-1]
    curve_x = np.concatenate([x - 360.0, x, x + 360.0, [x[0] + 720.0]])
    curve_y = np.concatenate([y, y, y, [y[0]]])
    pole = 90.0 if north else -90.0
    ring_x = np.concatenate([curve_x, [curve_x[-1], curve_x[0]]])
    ring_y = np.concatenate([curve_y, [pole, pole]])
    poly = Polygon(np.column_stack([ring_x, ring_y]))
    if not poly.is_valid:
        raise LayerError(f"{where}: its ring round the {'north' if north else 'south'} pole crosses itself")
    return poly


# --------------------------------------------------------------------------------------------
# One polygon
# --------------------------------------------------------------------------------------------


def _spans(west: float, east: float) -> bool:
    return east - west >= 360.0 - _SPAN_EPS


def _polygon(poly: Polygon, where: str):
    """The canonical form of one lon/lat polygon (a Polygon, or a MultiPolygon after a cut)."""
    rings = [_Ring(poly.exterior.coords), *(_Ring(r.coords) for r in poly.interiors)]
    for ring in rings:
        if abs(ring.winding) > 1:
            raise LayerError(f"{where}: a ring winds {abs(ring.winding)} times round a pole; "
                             "areamc reads a ring as going round a pole at most once")
    shell, holes = rings[0], rings[1:]
    if shell.winding == 0:
        if any(h.winding for h in holes):
            raise LayerError(f"{where}: a hole goes round a pole but the outer ring does not")
        return _ordinary(shell, holes)
    north = _encloses_north(shell)
    region = _round_pole(shell, north, where)
    cutters = []
    for hole in holes:
        if hole.winding:
            cutters.append(_round_pole(hole, north, where))
        else:
            start = -360.0 * math.floor((hole.west + 180.0) / 360.0)
            cutters.extend(Polygon(hole.xy(start + k * 360.0)) for k in (-1, 0, 1))
    if cutters:
        region = shapely.difference(region, shapely.union_all(cutters))
    out = _polygonal(shapely.intersection(region, _WORLD))
    if out.is_empty:
        raise LayerError(f"{where}: its holes cover all it holds round the pole")
    return out


def _ordinary(shell: _Ring, holes: list[_Ring]):
    """An ordinary shell (winding 0): holes moved next to it, then placed canonically."""
    middle = (shell.west + shell.east) / 2
    hole_xy = [h.xy(360.0 * round((middle - (h.west + h.east) / 2) / 360.0)) for h in holes]
    poly = Polygon(shell.xy(), hole_xy)
    if _spans(shell.west, shell.east):
        outline = Polygon(shell.xy())
        if holes and not poly.is_valid and outline.is_valid:
            # holes across the ends of an outline round the globe: cut out every copy
            copies = [_shift(Polygon(xy), k * 360.0) for xy in hole_xy for k in (-1, 0, 1)]
            poly = _polygonal(shapely.difference(outline, shapely.union_all(copies)))
        return poly if shell.west >= -180.0 and shell.east <= 180.0 else cut_at_antimeridian(poly)
    return _shift(poly, -360.0 * math.floor((shell.west + 180.0) / 360.0))


def _shift(geom, dx: float):
    if dx == 0.0:
        return geom
    return shapely.transform(geom, lambda xy: xy + np.array([dx, 0.0]))


def _polygonal(geom):
    """The polygonal part of an overlay result, as a Polygon or MultiPolygon."""
    if geom.geom_type in ("Polygon", "MultiPolygon"):
        return geom
    polys = [p for p in shapely.get_parts(geom) if p.geom_type == "Polygon" and not p.is_empty]
    polys += [q for p in shapely.get_parts(geom) if p.geom_type == "MultiPolygon" for q in p.geoms]
    if not polys:
        return Polygon()
    return polys[0] if len(polys) == 1 else MultiPolygon(polys)


# --------------------------------------------------------------------------------------------
# Whole geometries
# --------------------------------------------------------------------------------------------


def _plain(geom) -> bool:
    """True when no coordinate is beyond ±180, none at a pole and no step jumps over 180 degrees."""
    xy = shapely.get_coordinates(geom)
    if not len(xy):
        return True
    lon, lat = xy[:, 0], xy[:, 1]
    return bool(
        lon.min() >= -180.0 and lon.max() <= 180.0 and np.abs(lat).max() < 90.0
        and (len(lon) < 2 or np.abs(np.diff(lon)).max() <= 180.0)
    )


def normalize_many(geoms: np.ndarray, crs=None, where: Callable[[int], str] = lambda i: f"geometry {i}") -> np.ndarray:
    """:func:`normalize` over an array of geometries, testing them all at once.

    The test :func:`normalize` starts with (no longitude beyond ±180, no
    latitude at ±90, no step of more than 180° between consecutive
    coordinates of a geometry) runs over the whole array in one pass; only
    the geometries that fail it are rewritten, one by one, with
    ``where(i)`` naming geometry ``i`` in messages.  Returns a new array.
    """
    geoms = np.asarray(geoms, dtype=object)
    if not len(geoms) or not _is_degrees(crs):
        return geoms
    xy, owner = shapely.get_coordinates(geoms, return_index=True)
    out = geoms.copy()
    if not len(xy):
        return out
    lon, lat = xy[:, 0], xy[:, 1]
    bad = (lon < -180.0) | (lon > 180.0) | (np.abs(lat) >= 90.0)
    bad[1:] |= (np.abs(np.diff(lon)) > 180.0) & (owner[1:] == owner[:-1])
    for i in np.unique(owner[bad]):
        out[i] = normalize(geoms[i], crs, where(int(i)))
    return out


def _is_degrees(crs) -> bool:
    if crs is None:
        return True
    if not crs.is_geographic:
        return False
    unit = crs.axis_info[0].unit_name if crs.axis_info else "degree"
    return unit.startswith("degree")


def normalize(geom, crs=None, where: str = "geometry"):
    """Rewrite a lon/lat polygon or multipolygon into its canonical, plane-ready form.

    Parameters
    ----------
    geom : shapely geometry
        In `crs`, a geographic CRS with (longitude, latitude) in degrees.  Points,
        lines and polygons of other CRSs come back unchanged.
    crs : pyproj.CRS, optional
        The CRS of `geom`; None means lon/lat degrees.
    where : str
        The file and feature, for messages.

    Returns
    -------
    The same area on the Earth, as a lon/lat Polygon or MultiPolygon: contiguous
    with unwrapped longitudes when narrower than 360°, cut at ±180° and closed over
    the pole when round a pole (module docstring).  A geometry already in that form,
    and any geometry away from the antimeridian and the poles, is returned as it is.

    Raises
    ------
    LayerError
        A ring winding round a pole more than once, or crossing itself while it
        goes round a pole; a hole round a pole in an ordinary outer ring; holes
        that leave nothing of a polygon round a pole.
    """
    if geom is None or geom.is_empty or geom.geom_type not in ("Polygon", "MultiPolygon") or not _is_degrees(crs):
        return geom
    if _plain(geom):
        return geom
    parts = [_polygon(p, where) for p in shapely.get_parts(geom)]
    if geom.geom_type == "Polygon" and len(parts) == 1:
        return parts[0]
    return _assemble(parts, glue=geom.is_valid)


def _flat(geoms) -> list[Polygon]:
    return [p for g in geoms for p in shapely.get_parts(g) if p.geom_type == "Polygon" and not p.is_empty]


def _assemble(parts, glue: bool):
    """Put canonical parts together: contiguous, or all within [-180, 180] if one goes round the globe.

    With `glue`, parts that now touch along an edge (an RFC 7946 split put back) are
    merged, so the result stays a valid geometry.
    """
    polys = _flat(parts)
    if not polys:
        return Polygon()
    bounds = shapely.bounds(np.array(polys, dtype=object))
    if any(_spans(w, e) for w, e in bounds[:, [0, 2]]):
        polys = _flat([cut_at_antimeridian(p) for p in polys])
    else:
        start, _ = _covering_arc(bounds[:, 0], bounds[:, 2])
        polys = [_shift(p, 360.0 * math.ceil((start - w - _SPAN_EPS) / 360.0)) for p, w in zip(polys, bounds[:, 0])]
    out = polys[0] if len(polys) == 1 else MultiPolygon(polys)
    if glue and len(polys) > 1 and not out.is_valid:
        merged = _polygonal(shapely.union_all(polys))
        if merged.is_valid:
            out = merged
    return out


def union(parts):
    """Union of lon/lat polygons in canonical form (degrees), across the antimeridian too.

    Parts are first brought side by side (or all within [-180, 180] if one goes
    round the globe), so overlaps across the seam are merged, not counted twice.
    """
    polys = _flat(parts)
    if not polys:
        return Polygon()
    placed = _assemble(polys, glue=False)
    return _polygonal(shapely.union_all(shapely.get_parts(placed)))


def cut_at_antimeridian(geom):
    """Cut a lon/lat geometry (degrees) into pieces within [-180, 180], as RFC 7946 §3.1.9 asks.

    Each piece beyond ±180 is shifted by whole turns of 360 degrees; pieces that meet
    are merged.  Use it for a plane whose seam is the antimeridian.
    """
    west, _, east, _ = shapely.bounds(geom)
    if west >= -180.0 and east <= 180.0:
        return geom
    first = math.floor((west + 180.0) / 360.0)
    last = math.floor((east + 180.0) / 360.0)
    pieces = []
    for k in range(first, last + 1):
        piece = shapely.intersection(_shift(geom, -360.0 * k), _WORLD)
        if not piece.is_empty:
            pieces.append(piece)
    return _polygonal(shapely.union_all(pieces))


# --------------------------------------------------------------------------------------------
# Extents and planes
# --------------------------------------------------------------------------------------------


def _covering_arc(wests, easts) -> tuple[float, float]:
    """Shortest longitude span (start, end in degrees, end − start <= 360) holding every interval."""
    wests, easts = np.asarray(wests, float), np.asarray(easts, float)
    if not len(wests) or (easts - wests >= 360.0 - _SPAN_EPS).any():
        return -180.0, 180.0
    turns = np.floor((wests + 180.0) / 360.0) * 360.0  # 0 for intervals already starting in [-180, 180)
    order = np.argsort(wests - turns, kind="stable")
    starts, ends = (wests - turns)[order], (easts - turns)[order]
    # sweep the sorted intervals; the arc starts after the widest gap (the wrap-round gap included)
    best_gap, best_start = -1.0, float(starts[0])
    reach = ends[0]
    for start, end in zip(starts[1:], ends[1:]):
        if start > reach and start - reach > best_gap:
            best_gap, best_start = start - reach, float(start)
        reach = max(reach, end)
    wrap = starts[0] + 360.0 - reach
    if max(wrap, best_gap) <= 0:
        return -180.0, 180.0
    if wrap >= best_gap:
        return float(starts[0]), float(reach)
    return best_start, float(best_start + 360.0 - best_gap)


def lonlat_extent(geoms) -> tuple[float, float, float, float]:
    """(west, south, east, north) in degrees of lon/lat geometries, the shortest span round the globe.

    The west bound lies in [-180, 180); the east bound may exceed 180 when the
    geometries cross the antimeridian.  Geometries round the globe give -180 and 180.
    """
    geoms = np.asarray(geoms, dtype=object)
    bounds = shapely.bounds(geoms)
    bounds = bounds[~np.isnan(bounds).any(axis=1)]
    if not len(bounds):
        return math.nan, math.nan, math.nan, math.nan
    west, east = _covering_arc(bounds[:, 0], bounds[:, 2])
    return west, float(bounds[:, 1].min()), east, float(bounds[:, 3].max())


def beyond_antimeridian(geoms) -> np.ndarray:
    """Boolean mask: lon/lat geometries (degrees) with a longitude beyond ±180 (unwrapped)."""
    bounds = shapely.bounds(np.asarray(geoms, dtype=object))
    return (bounds[:, 0] < -180.0) | (bounds[:, 2] > 180.0)


def outlined(geoms) -> np.ndarray:
    """Boolean mask: lon/lat geometries (degrees) with edges that vanish on the globe.

    Those reaching a pole, or touching both -180 and 180: their edges along the pole
    and along the ±180° meridians are artefacts of lon/lat, which a plane without a
    seam folds into zero-width slits (:func:`close_seams`).
    """
    bounds = shapely.bounds(np.asarray(geoms, dtype=object))
    return ((bounds[:, 0] <= -180.0) & (bounds[:, 2] >= 180.0)) | (bounds[:, 1] <= -90.0) | (bounds[:, 3] >= 90.0)


def tears_at_antimeridian(forward, south: float, north: float) -> bool:
    """Whether a plane tears along the antimeridian between two latitudes (degrees).

    `forward(lon, lat) -> (x, y)` projects lon/lat arrays to the plane (metres).
    Points 1e-7 degrees either side of ±180 are projected at five latitudes; a tear
    shows as images more than 1 km apart (or not finite).  World cylinders such as
    EPSG:6933 tear; azimuthal planes do not.
    """
    lats = np.linspace(max(south, -89.9), min(north, 89.9), 5)
    x1, y1 = (np.asarray(v, float) for v in forward(np.full(5, 180.0 - 1e-7), lats))
    x2, y2 = (np.asarray(v, float) for v in forward(np.full(5, -180.0 + 1e-7), lats))
    gap = np.hypot(x1 - x2, y1 - y2)
    return bool(not np.isfinite(gap).all() or gap.max() > _TEAR_M)


def close_seams(planar):
    """Close the zero-width slits a lon/lat outline leaves in a plane without a seam (metres).

    The ±180° meridians of a polygon round a pole or round the globe project onto one
    line, and its edge along the pole onto one point.  Snapping to a grid of
    :data:`SEAM_GRID_M` metres makes the two sides coincide, and GEOS then drops them:
    the result is an ordinary valid polygon (a disc, an annulus) of the same area.
    """
    return shapely.set_precision(shapely.remove_repeated_points(planar, SEAM_GRID_M), SEAM_GRID_M)
