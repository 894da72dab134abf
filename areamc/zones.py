"""Service zones from facility points: geodesic circles on the WGS84 ellipsoid.

A point with a reach ``r`` becomes the polygon whose vertices lie at geodesic
distance ``r`` from it in equally spaced azimuths (``pyproj.Geod.fwd``, Karney
2013).  The polygon is built in longitude/latitude before projection, so the
reach is a true distance on the ellipsoid, not a distance in some plane.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import shapely

from .errors import AreamcWarning, LayerError, OptionError
from .load import Layer, read_layer
from .geodesy import AUTHALIC_RADIUS_M, WGS84
from .project import LONLAT, transformer, transform_geometry

__all__ = ["geodesic_circle", "zones_from_points", "read_zones", "DEFAULT_VERTICES"]

#: Vertices per circle.  An inscribed n-gon misses a fraction of about
#: (2π/n)²/6 of the circle's area: 1.0e-4 at 256 vertices.
DEFAULT_VERTICES = 256


def geodesic_circle(
    lon: float, lat: float, radius_m: float, vertices: int = DEFAULT_VERTICES, *, geod=WGS84
) -> shapely.Polygon:
    """Polygon (lon/lat degrees) approximating the geodesic circle of `radius_m` metres around a point.

    `geod` is the ellipsoid (default WGS84); a sphere can be given as
    ``pyproj.Geod(a=R, b=R)``.  Vertices lie at exactly `radius_m` from the centre.

    Raises
    ------
    OptionError
        When the circle would cross the antimeridian or enclose a pole, which
        a longitude/latitude polygon cannot represent.
    """
    azimuths = np.linspace(0.0, 360.0, vertices, endpoint=False)
    lons, lats, _ = geod.fwd(np.full(vertices, lon), np.full(vertices, lat), azimuths, np.full(vertices, radius_m))
    lons = np.asarray(lons)
    if np.ptp(lons) > 180 or abs(lat) + math.degrees(radius_m / AUTHALIC_RADIUS_M) >= 90:
        raise OptionError(
            f"a circle of {radius_m:g} m around ({lon:g}, {lat:g}) crosses the antimeridian or a pole; not supported"
        )
    # Geod.fwd walks clockwise (azimuth from north); reverse for a counter-clockwise exterior.
    return shapely.Polygon(np.column_stack([lons[::-1], np.asarray(lats)[::-1]]))


def zones_from_points(
    layer: Layer,
    *,
    radius_m: float | None = None,
    radius_field: str | None = None,
    vertices: int = DEFAULT_VERTICES,
) -> Layer:
    """Turn a point layer into a polygon layer of geodesic circles, in WGS84 lon/lat.

    Parameters
    ----------
    layer : Layer
        Points in any CRS.
    radius_m : float, optional
        One reach for every point, metres.
    radius_field : str, optional
        Attribute holding each point's reach in metres (positive, not missing).
    vertices : int
        Vertices per circle.

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
    if radius_field is not None and layer.properties and radius_field not in layer.properties[0]:
        fields = ", ".join(layer.properties[0]) or "(none)"
        raise LayerError(f"{layer.source}: {{param}} {radius_field!r} is not a field; fields: {fields}", param="radius_field")
    to_lonlat = transformer(layer.crs, LONLAT)
    circles = []
    for fid, geom, props in zip(layer.ids, layer.geometries, layer.properties):
        radius = radius_m if radius_field is None else _radius(props.get(radius_field), layer, fid, radius_field)
        pts = shapely.get_coordinates(transform_geometry(geom, to_lonlat, f"{layer.path}: feature {fid}"))
        parts = [geodesic_circle(lon, lat, radius, vertices) for lon, lat in pts]
        circles.append(parts[0] if len(parts) == 1 else shapely.union_all(parts))
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
    )


def _radius(value, layer: Layer, fid: str, field: str) -> float:
    try:
        radius = float(value)
    except (TypeError, ValueError):
        radius = math.nan
    if value is None or not math.isfinite(radius) or radius <= 0:
        raise LayerError(
            f"{layer.source}: feature {fid} has radius {value!r} in {{param}} {field!r}; "
            "radii must be positive numbers of metres", param="radius_field"
        )
    return radius


def read_zones(
    path: str,
    *,
    layer: str | None = None,
    id_field: str | None = None,
    input_crs: str | None = None,
    radius_m: float | None = None,
    radius_field: str | None = None,
    vertices: int = DEFAULT_VERTICES,
) -> Layer:
    """Read a zone layer: polygons as they are, points as geodesic circles.

    Points need `radius_m` (metres, for all) or `radius_field` (metres, per
    feature); on a polygon layer a radius is ignored with a warning.
    """
    zones = read_layer(path, layer=layer, id_field=id_field, input_crs=input_crs, kind="any")
    if zones.kind == "point":
        return zones_from_points(zones, radius_m=radius_m, radius_field=radius_field, vertices=vertices)
    if radius_m is not None or radius_field is not None:
        warnings.warn(AreamcWarning(f"{zones.source}: holds polygons; {{radius_m}}/{{radius_field}} ignored",
                                    params=("radius_m", "radius_field")), stacklevel=2)
    return zones
