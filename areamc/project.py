"""Choose and verify an equal-area plane, densify edges and reproject.

Every transformer areamc uses is built here (:func:`transformer`), with
``always_xy=True`` so that geographic coordinates are always (longitude,
latitude) in degrees, and every projected coordinate is checked to be finite.

The plane is judged equal-area by measurement, not by name: small
latitude-longitude cells spread over the data's extent are projected and their
planar areas compared with the closed-form area of the same cells on the WGS84
ellipsoid (Snyder 1987, eq. 3-12 with the authalic ``q`` function); pyproj's
areal scale factors are read alongside.  See docs/methods.md.

Lon/lat data across the antimeridian or round a pole arrive in the canonical
form of :mod:`areamc.globe`; here their extent is taken the short way round
(:func:`lonlat_bounds`), the plane is chosen for it (oblique or polar LAEA), and
their planar copies are fitted to the plane's seam, if it has one.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pyproj
import shapely

from . import globe
from .errors import CRSError, NotEqualAreaError
from .geodesy import WGS84, quadrangle_area
from .load import Layer, parse_crs

__all__ = [
    "LONLAT",
    "EqualAreaPlane",
    "ProjectedLayer",
    "transformer",
    "transform_geometry",
    "transform_geometries",
    "densify",
    "lonlat_bounds",
    "choose_plane",
    "measure_area_distortion",
    "resolve_plane",
    "project_layer",
    "project_layers",
    "DEFAULT_DENSIFY_M",
    "MAX_AREA_DISTORTION",
    "MAX_DENSIFIED_VERTICES",
]

#: Geographic WGS84 with (longitude, latitude) axis order in degrees.
LONLAT = pyproj.CRS.from_epsg(4326)

#: Default densification step, in metres along an edge (about 0.009 degrees on a
#: geographic layer).  At this step planar and geodesic areas of county-sized
#: polygons agree to better than 1e-8 relative (docs/methods.md).
DEFAULT_DENSIFY_M = 1000.0
#: Most vertices densification may create over a layer (memory about 100 bytes a vertex).
MAX_DENSIFIED_VERTICES = 20_000_000
#: Coordinates sent to PROJ in one call when a layer is transformed (:func:`transform_geometries`):
#: larger layers go in runs of whole features of about this many (some 16 bytes a coordinate
#: several times over while a call runs).
_BATCH_COORDS = 1_000_000
#: Largest relative area error tolerated of an "equal-area" plane over the data.
#: True equal-area projections measure below 1e-9; UTM (scale 0.9996) near 8e-4.
MAX_AREA_DISTORTION = 1e-6
#: Angular radius (degrees) up to which a Lambert azimuthal plane is chosen.
_LAEA_MAX_RADIUS_DEG = 60.0
#: Data reaching a pole get a polar LAEA if they stay within this many degrees of it (its hemisphere).
_POLAR_MAX_RADIUS_DEG = 90.0
#: Latitude (degrees) the distortion cells stay within.  Closer to a pole, PROJ's numerical
#: areal scale loses digits (polar LAEA reads 1 − 3.3e-9 at 89.89°) and a cell's closed-form
#: area too (q(φ2) − q(φ1) cancels); data reaching the pole are measured up to 89°.
_CELL_MAX_LAT = 89.0
_METRES_PER_DEGREE = 111_320.0
_GLOBAL_PLANE = "EPSG:6933"


@dataclass(frozen=True)
class EqualAreaPlane:
    """The plane areas are computed in.

    Attributes
    ----------
    crs : pyproj.CRS
        A projected CRS whose unit is the metre and that preserves area.
    label : str
        Short name for output: an EPSG code or a PROJ string.
    chosen : bool
        True when areamc chose the plane from the data's extent.
    distortion : float
        Largest measured relative area error over the data's extent.
    """

    crs: pyproj.CRS
    label: str
    chosen: bool
    distortion: float

    def to_dict(self) -> dict:
        return {
            "crs": self.label,
            "name": self.crs.name,
            "chosen_from_data": self.chosen,
            "area_distortion": self.distortion,
            "wkt": self.crs.to_wkt(),
        }


@dataclass(frozen=True)
class ProjectedLayer:
    """A layer densified and reprojected.

    Attributes
    ----------
    ids : tuple of str
    planar : numpy.ndarray of shapely geometries
        Densified geometries in the equal-area plane (metres).
    lonlat : numpy.ndarray of shapely geometries
        The same densified geometries in WGS84 longitude/latitude (degrees),
        for geodesic areas, in the canonical form of :mod:`areamc.globe`
        (unwrapped across the antimeridian, closed over a pole).
    plane : EqualAreaPlane
    densify_m : float
        Densification step used, metres along an edge in the source CRS.
    source : Layer
    """

    ids: tuple[str, ...]
    planar: np.ndarray
    lonlat: np.ndarray
    plane: EqualAreaPlane
    densify_m: float
    source: Layer

    def __len__(self) -> int:
        return len(self.ids)


def transformer(src: pyproj.CRS, dst: pyproj.CRS) -> pyproj.Transformer:
    """Build the one kind of transformer areamc uses: ``always_xy``, (lon, lat) in degrees."""
    return pyproj.Transformer.from_crs(src, dst, always_xy=True)


def transform_geometry(geom, trans: pyproj.Transformer, label: str = "geometry"):
    """Transform a shapely geometry; raise :class:`CRSError` on non-finite output.

    Coordinates go in the transformer's source CRS and come out in its target
    CRS; PROJ returns ``inf`` for points it cannot project, which is refused
    here instead of propagating into areas.
    """
    out, bad = _transform_batch(geom, trans)
    if bad >= 0:
        raise CRSError(_unprojectable(label, trans))
    return out


def transform_geometries(geoms, trans: pyproj.Transformer, label=None) -> np.ndarray:
    """Transform an array of shapely geometries in one PROJ call; raise :class:`CRSError` on non-finite output.

    Coordinates go in the transformer's source CRS and come out in its target
    CRS, exactly as :func:`transform_geometry` gives them one geometry at a time:
    ``shapely.transform`` hands every coordinate of the array, geometry after
    geometry, to one ``trans.transform`` call, so PROJ sees the same points in
    the same order.

    Parameters
    ----------
    geoms : array-like of shapely geometries
    trans : pyproj.Transformer
        From :func:`transformer` (``always_xy``: lon/lat in degrees, planes in their units).
    label : callable, optional
        ``label(i) -> str`` names geometry `i` in the message (a file and its feature);
        default ``"geometry {i}"``.

    Raises
    ------
    CRSError
        Naming the first geometry with a coordinate PROJ cannot project (``inf``).
    """
    geoms = np.asarray(geoms, dtype=object)
    out, bad = _transform_batch(geoms, trans)
    if bad >= 0:
        raise CRSError(_unprojectable(label(bad) if label else f"geometry {bad}", trans))
    return out


def _transform_batch(geoms, trans: pyproj.Transformer):
    """Transform a geometry or an array of them: (result, position of the first non-finite one or -1).

    An array goes to PROJ in one call, or for a layer of more than :data:`_BATCH_COORDS`
    coordinates in consecutive runs of whole features of about that many (bounding the
    memory a call takes); either way PROJ sees the same points in the same order.
    """
    if not isinstance(geoms, np.ndarray) or geoms.ndim != 1:
        return _transform_call(geoms, trans)
    ends = np.cumsum(shapely.get_num_coordinates(geoms))
    if not len(ends) or ends[-1] <= _BATCH_COORDS:
        return _transform_call(geoms, trans, ends)
    marks = np.searchsorted(ends, np.arange(_BATCH_COORDS, ends[-1], _BATCH_COORDS), side="right")
    bounds = np.unique(np.concatenate([[0], marks, [len(geoms)]]))
    out = np.empty(len(geoms), dtype=object)
    for lo, hi in zip(bounds[:-1], bounds[1:]):
        out[lo:hi], bad = _transform_call(geoms[lo:hi], trans)
        if bad >= 0:
            return out, int(lo + bad)
    return out, -1


def _transform_call(geoms, trans: pyproj.Transformer, ends=None):
    """One ``shapely.transform`` and one PROJ call: (result, position of the first non-finite geometry or -1)."""
    if isinstance(geoms, np.ndarray) and not geoms.size:
        return np.empty(geoms.shape, dtype=object), -1
    first = []

    def apply(coords: np.ndarray) -> np.ndarray:
        x, y = trans.transform(coords[:, 0], coords[:, 1])
        out = np.column_stack([np.asarray(x, float), np.asarray(y, float)])
        finite = np.isfinite(out).all(axis=1)
        if not finite.all():
            first.append(int(np.argmin(finite)))
        return out

    out = shapely.transform(geoms, apply)
    if not first:
        return out, -1
    # coordinates arrive geometry after geometry: the geometry holding coordinate k is the
    # first whose running count of coordinates exceeds k
    if ends is None:
        ends = np.cumsum(np.atleast_1d(shapely.get_num_coordinates(geoms)))
    return out, int(np.searchsorted(ends, first[0], side="right"))


def _unprojectable(label: str, trans: pyproj.Transformer) -> str:
    return f"{label}: coordinates cannot be projected to {trans.target_crs.name}"


def _step_in_crs_units(crs: pyproj.CRS, step_m: float) -> float:
    if crs.is_geographic:
        return step_m / _METRES_PER_DEGREE
    factor = crs.axis_info[0].unit_conversion_factor if crs.axis_info else 1.0
    return step_m / (factor or 1.0)


def densify(geoms: np.ndarray, crs: pyproj.CRS, step_m: float = DEFAULT_DENSIFY_M) -> np.ndarray:
    """Insert vertices so no edge is longer than `step_m` metres, in the layer's own CRS.

    On a geographic CRS the step becomes ``step_m / 111 320`` degrees: about
    `step_m` metres along a meridian (a degree of latitude is 110.6 to 111.7
    km), less along parallels away from the equator.  Edges keep the straight path they have in
    the source coordinates, so reprojection bends them as the source intends.
    """
    if not step_m > 0:
        raise CRSError(f"{{param}}: step must be positive, got {step_m}", param="densify_m")
    step = _step_in_crs_units(crs, step_m)
    vertices = float(np.sum(shapely.length(geoms))) / step + float(np.sum(shapely.get_num_coordinates(geoms)))
    if vertices > MAX_DENSIFIED_VERTICES:
        raise CRSError(
            f"{{param}}: a step of {step_m:g} m would give about {vertices:,.0f} vertices; at most "
            f"{MAX_DENSIFIED_VERTICES:,} are made (use a coarser step)", param="densify_m")
    return shapely.segmentize(geoms, step)


def lonlat_bounds(geoms_lonlat: np.ndarray) -> tuple[float, float, float, float]:
    """Return (west, south, east, north) in degrees of geometries given in lon/lat.

    The longitudes span the shortest way round the globe that holds every
    geometry (:func:`areamc.globe.lonlat_extent`): west in [-180, 180), east
    beyond 180 when the data cross the antimeridian (e.g. 177 to 182 for Fiji).
    """
    return globe.lonlat_extent(geoms_lonlat)


def choose_plane(bounds: tuple[float, float, float, float]) -> pyproj.CRS:
    """Pick an equal-area plane for data within `bounds` (west, south, east, north; degrees).

    East may exceed 180 (an extent across the antimeridian, :func:`lonlat_bounds`).
    In order:

    * data reaching one pole and staying in its hemisphere, or spanning more than
      180 degrees of longitude within 60 degrees of arc of a pole: the polar aspect
      of the Lambert azimuthal equal-area projection (lat_0 = ±90) on WGS84
      (Snyder 1987, ch. 24), where a ring round the pole is an ordinary ring;
    * every corner within 60 degrees of arc of the extent's centre and at most 180
      degrees of longitude: LAEA centred on the extent (oblique, and across the
      antimeridian when the extent is);
    * otherwise the Lambert cylindrical equal-area projection with standard
      parallels ±30: EPSG:6933 when the extent lies within ±180 degrees, else the
      same projection centred on the extent's middle meridian (so its seam falls
      outside the data).
    """
    west, south, east, north = bounds
    span = east - west
    lon0 = _wrap_lon(round((west + east) / 2, 4)) if span < 360 else 0.0
    lat0 = round((south + north) / 2, 4)
    pole = _polar_side(south, north, span)
    if pole:
        return _laea(pole, lon0 if span <= 180 else 0.0)
    corners_lon = [west, east, west, east, lon0, lon0]
    corners_lat = [south, south, north, north, south, north]
    _, _, dist = WGS84.inv([lon0] * 6, [lat0] * 6, corners_lon, corners_lat)
    radius_deg = max(dist) / _METRES_PER_DEGREE
    if radius_deg <= _LAEA_MAX_RADIUS_DEG and span <= 180:
        return _laea(lat0, lon0)
    if west >= -180 and east <= 180:
        return pyproj.CRS.from_user_input(_GLOBAL_PLANE)
    return pyproj.CRS.from_proj4(
        f"+proj=cea +lat_ts=30 +lon_0={lon0:g} +x_0=0 +y_0=0 +datum=WGS84 +units=m +no_defs +type=crs"
    )


def _laea(lat0: float, lon0: float) -> pyproj.CRS:
    return pyproj.CRS.from_proj4(
        f"+proj=laea +lat_0={lat0:g} +lon_0={lon0:g} +x_0=0 +y_0=0 +datum=WGS84 +units=m +no_defs +type=crs"
    )


def _wrap_lon(lon: float) -> float:
    """Longitude in degrees brought into [-180, 180)."""
    return (lon + 180.0) % 360.0 - 180.0


def _polar_side(south: float, north: float, span: float) -> float:
    """90 or -90 when data between `south` and `north` (degrees) call for a polar plane, else 0."""
    north_pole, south_pole = north >= 90.0, south <= -90.0
    if north_pole != south_pole:
        far = 90.0 - south if north_pole else north + 90.0
        return (90.0 if north_pole else -90.0) if far <= _POLAR_MAX_RADIUS_DEG else 0.0
    if not north_pole and span > 180:
        if south >= 90.0 - _LAEA_MAX_RADIUS_DEG:
            return 90.0
        if north <= _LAEA_MAX_RADIUS_DEG - 90.0:
            return -90.0
    return 0.0


def measure_area_distortion(
    crs: pyproj.CRS, bounds: tuple[float, float, float, float], *, grid: int = 5, cell: float = 0.01
) -> tuple[float, float, float]:
    """Measure how far a CRS is from equal-area over an extent.

    Small cells (`cell` degrees square, edges densified along meridians and
    parallels) centred on a `grid` x `grid` lattice over `bounds` are projected;
    their planar areas are compared with :func:`quadrangle_area`.  pyproj's
    areal scale factor at the same points is read too, and the larger
    deviation wins (the factor alone can read 1 for projections PROJ computes
    on a sphere, so the empirical check is what catches those).

    Returns
    -------
    (distortion, lon, lat) : the largest relative area error and where it occurred.
    """
    if not crs.is_projected:
        return math.inf, (bounds[0] + bounds[2]) / 2, (bounds[1] + bounds[3]) / 2
    west, south, east, north = bounds
    # Cell centres are kept a cell inside the extent and off the poles (within
    # ±89 degrees), and moved off the antimeridian, so no test cell straddles
    # the seam of a world-wide plane, even for an extent across it (east > 180).
    west, east = _inset(west, east, cell)
    south, north = _inset(max(south, -_CELL_MAX_LAT), min(north, _CELL_MAX_LAT), cell)
    lons = np.linspace(west, east, grid) if east > west else np.array([west])
    lons = _off_antimeridian(lons, cell, west, east)
    lats = np.linspace(south, north, grid) if north > south else np.array([south])
    lon_c, lat_c = (a.ravel() for a in np.meshgrid(lons, lats))
    trans = transformer(LONLAT, crs)
    half = cell / 2
    ring_t = np.linspace(0.0, 1.0, 9)[:-1]
    worst, where = 0.0, (float(lon_c[0]), float(lat_c[0]))
    for lon, lat in zip(lon_c, lat_c):
        x0, x1, y0, y1 = lon - half, lon + half, lat - half, lat + half
        ring_lon = np.concatenate([x0 + (x1 - x0) * ring_t, np.full(8, x1), x1 - (x1 - x0) * ring_t, np.full(8, x0)])
        ring_lat = np.concatenate([np.full(8, y0), y0 + (y1 - y0) * ring_t, np.full(8, y1), y1 - (y1 - y0) * ring_t])
        px, py = trans.transform(ring_lon, ring_lat)
        if not (np.isfinite(px).all() and np.isfinite(py).all()):
            return math.inf, float(lon), float(lat)
        planar = shapely.area(shapely.Polygon(np.column_stack([px, py])))
        exact = float(quadrangle_area(x0, y0, x1, y1))
        err = abs(planar / exact - 1)
        if err > worst:
            worst, where = err, (float(lon), float(lat))
    try:
        factors = pyproj.Proj(crs).get_factors(lon_c, lat_c, errcheck=False)
        scale = np.asarray(factors.areal_scale, float)
        finite = np.isfinite(scale)
        if not finite.all():
            return math.inf, float(lon_c[~finite][0]), float(lat_c[~finite][0])
        idx = int(np.argmax(np.abs(scale - 1)))
        if abs(scale[idx] - 1) > worst:
            worst, where = float(abs(scale[idx] - 1)), (float(lon_c[idx]), float(lat_c[idx]))
    except (pyproj.exceptions.ProjError, pyproj.exceptions.CRSError, RuntimeError, ValueError):
        pass  # some CRSs have no factors; the empirical check stands alone
    return worst, where[0], where[1]


def _off_antimeridian(lons: np.ndarray, cell: float, west: float, east: float) -> np.ndarray:
    """Move cell centres (degrees) lying within a cell of ±180 (or 180 + 360k) a cell off it, westward if still in [west, east]."""
    seam = 180.0 + 360.0 * np.round((lons - 180.0) / 360.0)
    near = np.abs(lons - seam) < cell
    away = np.where(seam - cell >= west, seam - cell, seam + cell)
    return np.where(near, away, lons)


def _inset(low: float, high: float, margin: float) -> tuple[float, float]:
    if high - low > 2 * margin:
        return low + margin, high - margin
    mid = (low + high) / 2
    return mid, mid


def resolve_plane(
    bounds: tuple[float, float, float, float], crs: str | pyproj.CRS | None = None
) -> EqualAreaPlane:
    """Return the plane to use: the requested one if it is equal-area, else a chosen one.

    Parameters
    ----------
    bounds : (west, south, east, north)
        The data's extent in WGS84 degrees (east beyond 180 for an extent across
        the antimeridian, as :func:`lonlat_bounds` gives it).
    crs : str or pyproj.CRS, optional
        EPSG code, PROJ string or WKT given by the user.

    Raises
    ------
    NotEqualAreaError
        When the requested CRS is geographic, not in metres, or its measured
        area distortion over `bounds` exceeds :data:`MAX_AREA_DISTORTION`.
    """
    if crs is None:
        chosen = choose_plane(bounds)
        distortion, _, _ = measure_area_distortion(chosen, bounds)
        return EqualAreaPlane(chosen, _label(chosen), True, distortion)
    crs = crs if isinstance(crs, pyproj.CRS) else parse_crs(str(crs), "crs")
    name = _label(crs)
    if crs.is_geographic:
        raise NotEqualAreaError(
            f"{{param}} {name}: a geographic CRS (degrees) is not a plane; name an equal-area "
            "projected CRS such as EPSG:6933, or name none to have one chosen from the data", param="crs"
        )
    unit = crs.axis_info[0].unit_name if crs.axis_info else "metre"
    if unit not in ("metre", "meter"):
        raise NotEqualAreaError(f"{{param}} {name}: its unit is {unit!r}; areamc needs a plane in metres", param="crs")
    distortion, lon, lat = measure_area_distortion(crs, bounds)
    if not distortion <= MAX_AREA_DISTORTION:
        off = "cannot project the data" if math.isinf(distortion) else f"areas off by up to {distortion:.2g} relative"
        raise NotEqualAreaError(
            f"{{param}} {name}: not equal-area over the data's extent ({off}, near "
            f"{lon:.3f}, {lat:.3f}); name an equal-area CRS such as EPSG:6933, or name none to have one chosen "
            "from the data", param="crs"
        )
    return EqualAreaPlane(crs, name, False, distortion)


def _label(crs: pyproj.CRS) -> str:
    code = crs.to_epsg()
    if code is not None:
        return f"EPSG:{code}"
    text = crs.srs if crs.srs.lstrip().startswith("+") else crs.to_string()
    return text.replace(" +type=crs", "").replace(" +no_defs", "")


def project_layer(
    layer: Layer,
    *,
    crs: str | pyproj.CRS | None = None,
    densify_m: float = DEFAULT_DENSIFY_M,
    plane: EqualAreaPlane | None = None,
) -> ProjectedLayer:
    """Densify a layer's edges in its own CRS and reproject it to an equal-area plane.

    Parameters
    ----------
    layer : Layer
        Geometries in the layer's CRS.
    crs : str or pyproj.CRS, optional
        Requested equal-area plane; default chosen from the data's extent.
    densify_m : float
        Longest edge, metres, before reprojection (:func:`densify`).
    plane : EqualAreaPlane, optional
        An already resolved plane (to put several layers on one plane).

    Returns
    -------
    ProjectedLayer
        Planar geometries in metres, and lon/lat copies for geodesic areas.
    """
    return project_layers([layer], crs=crs, densify_m=densify_m, plane=plane)[0]


def project_layers(
    layers: list[Layer],
    *,
    crs: str | pyproj.CRS | None = None,
    densify_m: float = DEFAULT_DENSIFY_M,
    plane: EqualAreaPlane | None = None,
) -> list[ProjectedLayer]:
    """Put several layers, each in its own CRS, on one equal-area plane.

    The plane is resolved over the union of the layers' extents (see
    :func:`project_layer` for the parameters), so regions and zones given in
    different CRSs are compared in the same metres.
    """
    dense = [densify(layer.geometries, layer.crs, densify_m) for layer in layers]
    lonlat = [_to_lonlat(d, layer) for d, layer in zip(dense, layers)]
    if plane is None:
        plane = resolve_plane(lonlat_bounds(np.concatenate(lonlat)), crs)
    out = []
    for d, ll, layer in zip(dense, lonlat, layers):
        planar = _to_plane(d, ll, layer, plane.crs, densify_m)
        out.append(ProjectedLayer(layer.ids, planar, ll, plane, densify_m, layer))
    return out


def _to_lonlat(dense: np.ndarray, layer: Layer) -> np.ndarray:
    """Densified geometries in WGS84 lon/lat, in the canonical form of :mod:`areamc.globe`.

    A layer in a projected CRS round a pole or across the antimeridian comes back
    from PROJ with longitudes wrapped into ±180; :func:`areamc.globe.normalize`
    unwraps them (and leaves other geometries as they are).
    """
    out = _transform_all(dense, transformer(layer.crs, LONLAT), layer)
    return globe.normalize_many(out, LONLAT, lambda i: _feature(layer, i))


def _to_plane(dense: np.ndarray, lonlat: np.ndarray, layer: Layer, crs: pyproj.CRS, step_m: float) -> np.ndarray:
    """Planar copies (metres) of a layer's densified geometries, fitted to the plane's seam.

    Most geometries are transformed from the layer's own CRS.  Those across the
    antimeridian or round a pole or the globe (``lonlat`` beyond ±180, touching
    both ±180 or a pole) need care.  In a plane torn along the antimeridian (a
    world cylinder) they are cut at ±180 (:func:`areamc.globe.cut_at_antimeridian`),
    the new edges along ±180 densified every `step_m` metres (meridians curve in
    pseudo-cylindrical planes), and projected from lon/lat; in a plane without a
    seam (LAEA) the slits their lon/lat outline leaves are closed
    (:func:`areamc.globe.close_seams`).
    """
    to_plane = transformer(layer.crs, crs)
    outline = globe.outlined(lonlat)
    care = outline | globe.beyond_antimeridian(lonlat)
    if not care.any():
        return _transform_all(dense, to_plane, layer)
    from_lonlat = transformer(LONLAT, crs)
    _, south, _, north = shapely.total_bounds(lonlat[care])
    torn = globe.tears_at_antimeridian(from_lonlat.transform, float(south), float(north))
    cut = care if torn else np.zeros(len(dense), dtype=bool)
    # two batches, one per transformer, each in feature order; the first feature at fault is named
    out = np.empty(len(dense), dtype=object)
    out[~cut], bad_kept = _transform_batch(dense[~cut], to_plane)
    pieces = np.array([densify(globe.cut_at_antimeridian(g), LONLAT, step_m) for g in lonlat[cut]], dtype=object)
    out[cut], bad_cut = _transform_batch(pieces, from_lonlat)
    bad = [int(np.flatnonzero(~cut)[bad_kept])] if bad_kept >= 0 else []
    bad += [int(np.flatnonzero(cut)[bad_cut])] if bad_cut >= 0 else []
    if bad:
        raise CRSError(_unprojectable(_feature(layer, min(bad)), to_plane))
    seams = outline & ~cut
    if seams.any():
        out[seams] = globe.close_seams(out[seams])
    return out


def _transform_all(geoms: np.ndarray, trans: pyproj.Transformer, layer: Layer) -> np.ndarray:
    """A layer's geometries transformed in one call (:func:`transform_geometries`), features named in messages."""
    return transform_geometries(geoms, trans, lambda i: _feature(layer, i))


def _feature(layer: Layer, i: int) -> str:
    return f"{layer.path}: feature {layer.ids[i]}"
