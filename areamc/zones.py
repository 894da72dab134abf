"""Service zones from facility points: geodesic circles on the WGS84 ellipsoid.

A point with a reach ``r`` becomes the polygon whose vertices lie at geodesic
distance ``r`` from it in equally spaced azimuths (``pyproj.Geod.fwd``, Karney
2013).  The polygon is built in longitude/latitude before projection, so the
reach is a true distance on the ellipsoid, not a distance in some plane.
Circles across the antimeridian or round a pole are built too, in the
canonical lon/lat form of :mod:`areamc.globe`.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import replace

import numpy as np
import shapely

from . import globe
from .errors import AreamcWarning, LayerError, OptionError
from .load import Layer, read_layer
from .geodesy import WGS84
from .project import LONLAT, transform_geometries, transform_geometry, transformer
from .units import distance_factor

__all__ = ["geodesic_circle", "zones_from_points", "read_zones", "DEFAULT_VERTICES", "MAX_CIRCLE_VERTICES"]

#: Most vertices per circle unless raised on purpose: 10^7 vertices took minutes and gigabytes.
MAX_CIRCLE_VERTICES = 100_000
#: Vertices per circle.  An inscribed n-gon misses a fraction of about
#: (2π/n)²/6 of the circle's area: 1.0e-4 at 256 vertices.
DEFAULT_VERTICES = 256


def geodesic_circle(
    lon: float, lat: float, radius_m: float, vertices: int = DEFAULT_VERTICES, *, geod=WGS84
) -> shapely.Polygon:
    """Polygon (lon/lat degrees) approximating the geodesic circle of `radius_m` metres around a point.

    `geod` is the ellipsoid (default WGS84); a sphere can be given as
    ``pyproj.Geod(a=R, b=R)``.  Vertices lie at exactly `radius_m` from the centre.

    A circle across the antimeridian comes back with unwrapped longitudes (beyond
    ±180, contiguous); one round a pole is cut at ±180 and closed over the pole
    (:mod:`areamc.globe`), with the two cut points placed on the circle's
    geodesic edges, so its geodesic area is still that of the n-gon of geodesics.

    Raises
    ------
    OptionError
        When the circle would be larger than a hemisphere (radius of a quarter
        meridian or more), whose inside a ring cannot tell from its outside.
    """
    if radius_m >= math.pi / 2 * geod.b:
        raise OptionError(
            f"{{param}}: a circle of {radius_m:g} m around ({lon:g}, {lat:g}) is larger than a hemisphere "
            f"(radius at least {math.pi / 2 * geod.b:,.0f} m); not supported", param="radius_m"
        )
    azimuths = np.linspace(0.0, 360.0, vertices, endpoint=False)
    lons, lats, _ = geod.fwd(np.full(vertices, lon), np.full(vertices, lat), azimuths, np.full(vertices, radius_m))
    # Geod.fwd walks clockwise (azimuth from north); reverse for a counter-clockwise exterior.
    ring = np.column_stack([np.asarray(lons)[::-1], np.asarray(lats)[::-1]])
    if globe.ring_winding(ring[:, 0], ring[:, 1]):
        ring = _with_seam_points(ring, geod)
    return globe.normalize(shapely.Polygon(ring), where=f"circle of {radius_m:g} m around ({lon:g}, {lat:g})")


def _with_seam_points(ring: np.ndarray, geod) -> np.ndarray:
    """Insert, in each edge of a lon/lat ring that crosses the antimeridian, the point of its geodesic on ±180."""
    out = []
    for p, q in zip(ring, np.roll(ring, -1, axis=0)):
        out.append(p)
        if abs(q[0] - p[0]) > 180 and abs(p[0]) < 180 and abs(q[0]) < 180:
            out.append(_seam_point(geod, p, q))
    return np.array(out)


def _seam_point(geod, p, q) -> tuple[float, float]:
    """Where the geodesic from p to q (lon/lat degrees, across the antimeridian) meets ±180: bisection on distance."""
    azimuth, _, distance = geod.inv(p[0], p[1], q[0], q[1])
    seam = math.copysign(180.0, p[0])
    lo, hi = 0.0, distance
    for _ in range(60):
        mid = (lo + hi) / 2
        x, _, _ = geod.fwd(p[0], p[1], azimuth, mid)
        if abs((x - p[0] + 180.0) % 360.0 - 180.0) < abs(seam - p[0]):
            lo = mid
        else:
            hi = mid
    _, y, _ = geod.fwd(p[0], p[1], azimuth, (lo + hi) / 2)
    return seam, float(y)


def zones_from_points(
    layer: Layer,
    *,
    radius_m: float | None = None,
    radius_field: str | None = None,
    vertices: int = DEFAULT_VERTICES,
    vertex_cap: int = MAX_CIRCLE_VERTICES,
    radius_unit: str = "m",
) -> Layer:
    """Turn a point layer into a polygon layer of geodesic circles, in WGS84 lon/lat.

    Parameters
    ----------
    layer : Layer
        Points in any CRS.
    radius_m : float, optional
        One reach for every point, metres.
    radius_field : str, optional
        Attribute holding each point's reach (positive, not missing), in `radius_unit`.
    vertices : int
        Vertices per circle, at least 8 and at most `vertex_cap`.
    vertex_cap : int
        Most vertices per circle accepted (:data:`MAX_CIRCLE_VERTICES`); raise it knowingly.
    radius_unit : {"m", "km", "mi"}
        Unit of the values in `radius_field` (default metres; :data:`~areamc.units.DISTANCE_UNITS`).

    Returns
    -------
    Layer
        Polygons (a MultiPoint feature gives the union of its circles) in EPSG:4326.
    """
    if (radius_m is None) == (radius_field is None):
        raise OptionError(
            f"{layer.source}: holds points; give {{radius_m}} or {{radius_field}} (one of them)", params=("radius_m", "radius_field")
        )
    if vertices < 8:
        raise OptionError(f"{{param}}: at least 8, got {vertices}", param="vertices")
    if vertices > vertex_cap:
        raise OptionError(
            f"{{vertices}}: {vertices:,} vertices per circle is over the cap of {vertex_cap:,} (the circle's "
            f"area is already within {(2 * math.pi / vertex_cap) ** 2 / 6:.0e} of the true circle's there); "
            "raise {vertex_cap} if you mean it", params=("vertices", "vertex_cap"))
    if radius_field is not None and layer.properties and radius_field not in layer.properties[0]:
        fields = ", ".join(layer.properties[0]) or "(none)"
        raise LayerError(f"{layer.source}: {{param}} {radius_field!r} is not a field; fields: {fields}", param="radius_field")
    per_unit = distance_factor(radius_unit, param="radius_unit")
    to_lonlat = transformer(layer.crs, LONLAT)
    circles = []
    for fid, geom, props in zip(layer.ids, layer.geometries, layer.properties):
        radius = radius_m if radius_field is None else (
            _radius(props.get(radius_field), layer, fid, radius_field, radius_unit) * per_unit)
        _check_hemisphere(radius, layer, fid, radius_field)
        pts = shapely.get_coordinates(transform_geometry(geom, to_lonlat, f"{layer.path}: feature {fid}"))
        parts = [geodesic_circle(lon, lat, radius, vertices) for lon, lat in pts]
        circles.append(parts[0] if len(parts) == 1 else globe.union(parts))
    return Layer(
        path=layer.path,
        layer=layer.layer,
        crs=LONLAT,
        ids=layer.ids,
        geometries=np.array(circles, dtype=object),
        properties=layer.properties,
        kind="polygon",
        geometry_types=layer.geometry_types,
        empty=layer.empty,
        skipped=layer.skipped,
        reach_circles=len(circles),
    )


_UNIT_WORDS = {"m": "metres", "km": "kilometres", "mi": "miles"}


def _check_hemisphere(radius: float, layer: Layer, fid: str, field: str | None) -> None:
    """Refuse a reach of a quarter meridian or more (metres on WGS84), naming the option or the feature."""
    limit = math.pi / 2 * WGS84.b
    if radius < limit:
        return
    if field is None:
        raise OptionError(f"{{param}}: a reach of {radius:g} m makes circles larger than a hemisphere "
                          f"(at most {limit:,.0f} m is supported)", param="radius_m")
    raise LayerError(f"{layer.source}: feature {fid} has radius {radius:g} m in {{param}} {field!r}, larger than "
                     f"a hemisphere's (at most {limit:,.0f} m is supported)", param="radius_field")


def _radius(value, layer: Layer, fid: str, field: str, unit: str = "m") -> float:
    try:
        radius = float(value)
    except (TypeError, ValueError):
        radius = math.nan
    if value is None or not math.isfinite(radius) or radius <= 0:
        raise LayerError(
            f"{layer.source}: feature {fid} has radius {value!r} in {{param}} {field!r}; "
            f"radii must be positive numbers (of {_UNIT_WORDS.get(unit, unit)})", param="radius_field"
        )
    return radius


def read_zones(
    path,
    *,
    layer: str | None = None,
    id_field: str | None = None,
    input_crs: str | None = None,
    radius_m: float | None = None,
    radius_field: str | None = None,
    vertices: int = DEFAULT_VERTICES,
    vertex_cap: int = MAX_CIRCLE_VERTICES,
    encoding: str | None = None,
    allow_duplicate_ids: bool = False,
    radius_unit: str = "m",
    open_options=None,
) -> Layer:
    """Read a zone layer: polygons as they are, points as geodesic circles.

    `path` is anything :func:`~areamc.load.read_layer` reads: a file or URL, a GeoParquet
    file, or a GeoDataFrame (whose columns, a reach field among them, are kept).

    Points need `radius_m` (metres, for all) or `radius_field` (per feature, in
    `radius_unit`: m, km or mi, default metres); on a polygon layer a radius is ignored with a warning.  A layer
    that mixes points and polygons is classified feature by feature: its
    points become circles and its polygons stay as they are, in one layer in
    the file's CRS (the circles, built in lon/lat, are moved into it vertex by
    vertex), with a warning that counts both.  `encoding`, `allow_duplicate_ids` and
    `open_options` are passed to :func:`~areamc.load.read_layer`.
    """
    zones = read_layer(path, layer=layer, id_field=id_field, input_crs=input_crs, kind="any",
                       encoding=encoding, allow_duplicate_ids=allow_duplicate_ids, open_options=open_options)
    if zones.kind == "point":
        circles = zones_from_points(zones, radius_m=radius_m, radius_field=radius_field, vertices=vertices,
                                    vertex_cap=vertex_cap, radius_unit=radius_unit)
        return replace(circles, indices=zones.indices)
    if zones.kind == "polygon":
        if radius_m is not None or radius_field is not None:
            warnings.warn(AreamcWarning(f"{zones.source}: holds polygons; {{radius_m}}/{{radius_field}} ignored",
                                        params=("radius_m", "radius_field")), stacklevel=2)
        return zones
    where = [n for n, g in enumerate(zones.geometries) if g.geom_type in ("Point", "MultiPoint")]
    points = replace(zones, ids=tuple(zones.ids[n] for n in where), geometries=zones.geometries[where],
                     properties=tuple(zones.properties[n] for n in where),
                     indices=tuple(zones.indices[n] for n in where), kind="point")
    circles = zones_from_points(points, radius_m=radius_m, radius_field=radius_field, vertices=vertices,
                                vertex_cap=vertex_cap, radius_unit=radius_unit)
    same = zones.crs.equals(LONLAT, ignore_axis_order=True)
    to_layer = None if same else transformer(LONLAT, zones.crs)
    geometries = zones.geometries.copy()
    geometries[where] = circles.geometries if same else transform_geometries(
        circles.geometries, to_layer, lambda k: f"{zones.path}: feature {zones.ids[where[k]]}")
    warnings.warn(AreamcWarning(
        f"{zones.source}: mixed layer: {len(where)} point feature(s) become geodesic circles and "
        f"{len(zones) - len(where)} polygon feature(s) are used as they are"), stacklevel=2)
    return replace(zones, geometries=geometries, kind="polygon", reach_circles=len(where))
