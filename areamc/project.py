"""Choose and verify an equal-area plane, densify edges and reproject.

Every transformer areamc uses is built here (:func:`transformer`), with
``always_xy=True`` so that geographic coordinates are always (longitude,
latitude) in degrees, and every projected coordinate is checked to be finite.

The plane is judged equal-area by measurement, not by name: small
latitude-longitude cells spread over the data's extent are projected and their
planar areas compared with the closed-form area of the same cells on the WGS84
ellipsoid (Snyder 1987, eq. 3-12 with the authalic ``q`` function); pyproj's
areal scale factors are read alongside.  See docs/methods.md.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
import pyproj
import shapely

from .errors import AreamcWarning, CRSError, NotEqualAreaError
from .geodesy import WGS84, quadrangle_area
from .load import Layer, parse_crs

__all__ = [
    "LONLAT",
    "EqualAreaPlane",
    "ProjectedLayer",
    "transformer",
    "transform_geometry",
    "densify",
    "lonlat_bounds",
    "choose_plane",
    "measure_area_distortion",
    "resolve_plane",
    "project_layer",
    "project_layers",
    "DEFAULT_DENSIFY_M",
    "MAX_AREA_DISTORTION",
]

#: Geographic WGS84 with (longitude, latitude) axis order in degrees.
LONLAT = pyproj.CRS.from_epsg(4326)

#: Default densification step, in metres along an edge (about 0.009 degrees on a
#: geographic layer).  At this step planar and geodesic areas of county-sized
#: polygons agree to better than 1e-8 relative (docs/methods.md).
DEFAULT_DENSIFY_M = 1000.0
#: Largest relative area error tolerated of an "equal-area" plane over the data.
#: True equal-area projections measure below 1e-9; UTM (scale 0.9996) near 8e-4.
MAX_AREA_DISTORTION = 1e-6
#: Angular radius (degrees) up to which a Lambert azimuthal plane is chosen.
_LAEA_MAX_RADIUS_DEG = 60.0
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
            "chosen_from_extent": self.chosen,
            "measured_area_distortion": self.distortion,
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
        for geodesic areas.
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

    def apply(coords: np.ndarray) -> np.ndarray:
        x, y = trans.transform(coords[:, 0], coords[:, 1])
        out = np.column_stack([np.asarray(x, float), np.asarray(y, float)])
        if not np.isfinite(out).all():
            raise CRSError(f"{label}: coordinates cannot be projected to {trans.target_crs.name}")
        return out

    return shapely.transform(geom, apply)


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
    return shapely.segmentize(geoms, _step_in_crs_units(crs, step_m))


def lonlat_bounds(geoms_lonlat: np.ndarray) -> tuple[float, float, float, float]:
    """Return (west, south, east, north) in degrees of geometries given in lon/lat."""
    west, south, east, north = shapely.total_bounds(geoms_lonlat)
    return float(west), float(south), float(east), float(north)


def choose_plane(bounds: tuple[float, float, float, float]) -> pyproj.CRS:
    """Pick an equal-area plane for data within `bounds` (west, south, east, north; degrees).

    A Lambert azimuthal equal-area projection on the WGS84 ellipsoid centred on
    the extent (Snyder 1987, ch. 24) when every corner lies within 60 degrees of
    arc of the centre; otherwise the global Lambert cylindrical equal-area
    EPSG:6933 (standard parallels 30 degrees).
    """
    west, south, east, north = bounds
    lon0 = round((west + east) / 2, 4)
    lat0 = round((south + north) / 2, 4)
    corners_lon = [west, east, west, east, lon0, lon0]
    corners_lat = [south, south, north, north, south, north]
    _, _, dist = WGS84.inv([lon0] * 6, [lat0] * 6, corners_lon, corners_lat)
    radius_deg = max(dist) / _METRES_PER_DEGREE
    if radius_deg <= _LAEA_MAX_RADIUS_DEG and east - west <= 180:
        return pyproj.CRS.from_proj4(
            f"+proj=laea +lat_0={lat0:g} +lon_0={lon0:g} +x_0=0 +y_0=0 "
            "+datum=WGS84 +units=m +no_defs +type=crs"
        )
    return pyproj.CRS.from_user_input(_GLOBAL_PLANE)


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
    # Cell centres are kept a cell inside the extent (and off the poles), so no
    # test cell straddles the antimeridian seam of a world-wide plane.
    west, east = _inset(west, east, cell)
    south, north = _inset(max(south, -89.0), min(north, 89.0), cell)
    lons = np.linspace(west, east, grid) if east > west else np.array([west])
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
        The data's extent in WGS84 degrees.
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
    lonlat = [_transform_all(d, transformer(layer.crs, LONLAT), layer) for d, layer in zip(dense, layers)]
    for ll, layer in zip(lonlat, layers):
        _warn_wide(ll, layer)
    if plane is None:
        plane = resolve_plane(lonlat_bounds(np.concatenate(lonlat)), crs)
    out = []
    for d, ll, layer in zip(dense, lonlat, layers):
        planar = _transform_all(d, transformer(layer.crs, plane.crs), layer)
        out.append(ProjectedLayer(layer.ids, planar, ll, plane, densify_m, layer))
    return out


def _warn_wide(lonlat: np.ndarray, layer: Layer) -> None:
    """Warn about features spanning more than 180° of longitude: likely antimeridian crossings."""
    bounds = shapely.bounds(lonlat)
    wide = np.flatnonzero(bounds[:, 2] - bounds[:, 0] > 180)
    if wide.size:
        names = ", ".join(layer.ids[i] for i in wide[:5])
        warnings.warn(
            f"{layer.source}: {wide.size} feature(s) span more than 180 degrees of longitude ({names}); "
            "edges crossing the antimeridian are read the long way round, which areamc does not support",
            AreamcWarning,
            stacklevel=3,
        )


def _transform_all(geoms: np.ndarray, trans: pyproj.Transformer, layer: Layer) -> np.ndarray:
    out = np.empty(len(geoms), dtype=object)
    for i, geom in enumerate(geoms):
        out[i] = transform_geometry(geom, trans, f"{layer.path}: feature {layer.ids[i]}")
    return out
