"""Describe a layer: what it holds, its CRS and extent, and the plane areamc would compute in.

This is the job behind ``areamc inspect``: geometry counts and types as read,
repairs and skipped features, the extent in the layer's CRS and in
longitude/latitude (degrees), the equal-area plane with its measured
distortion, and, for polygons, the exact planar (m² of that plane) and
geodesic (m² on WGS84) totals.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import pyproj
import shapely

from .exact import geodesic_area, planar_area
from .load import Layer, list_layers
from .project import DEFAULT_DENSIFY_M, LONLAT, lonlat_bounds, project_layer, resolve_plane, transform_geometries, transformer

__all__ = ["LayerDescription", "describe_layer"]


@dataclass(frozen=True)
class LayerDescription:
    """What a layer holds and the plane it would use.

    Attributes
    ----------
    path, layer : str
    layers : tuple of str
        Every layer of the file (one element for an in-memory layer).
    kind : str
        "polygons", "points" or "mixed".
    features : int
        Features read, kept or not.
    geometry_types : dict
        Count per geometry type as read.
    crs, crs_name : str
        The layer's CRS as an authority string and its name.
    extent : tuple of float
        (xmin, ymin, xmax, ymax) in the layer's CRS.
    extent_lonlat : tuple of float
        (west, south, east, north) in degrees.
    invalid, empty : int
        Repaired and skipped geometries.
    equal_area_crs : str
        Label of the plane (EPSG code or PROJ string).
    area_distortion : float
        Largest measured relative area error of the plane over the extent.
    exact_planar_total, geodesic_total : float or None
        Total areas, m² (polygons only).
    """

    path: str
    layers: tuple[str, ...]
    layer: str
    kind: str
    features: int
    geometry_types: dict
    crs: str
    crs_name: str
    extent: tuple[float, ...]
    extent_lonlat: tuple[float, ...]
    invalid: int
    empty: int
    equal_area_crs: str
    area_distortion: float
    exact_planar_total: float | None
    geodesic_total: float | None

    def to_dict(self) -> dict:
        out = asdict(self)
        for key in ("layers", "extent", "extent_lonlat"):
            out[key] = list(out[key])
        return out


def describe_layer(layer: Layer, *, crs: str | pyproj.CRS | None = None,
                   densify_m: float = DEFAULT_DENSIFY_M) -> LayerDescription:
    """Describe `layer` (polygons or points, in its own CRS) and the equal-area plane it would use.

    Parameters
    ----------
    layer : Layer
    crs : str or pyproj.CRS, optional
        A requested plane, checked as the jobs check it (parameter ``crs``).
    densify_m : float
        Longest edge, metres, before reprojection.
    """
    try:
        layers = tuple(list_layers(layer.path))
    except Exception:  # an in-memory layer has no file to list
        layers = (layer.layer,)
    if layer.kind == "polygon":
        projected = project_layer(layer, crs=crs, densify_m=densify_m)
        plane = projected.plane
        extent_lonlat = tuple(round(v, 6) for v in lonlat_bounds(projected.lonlat))
        planar_total = float(planar_area(projected.planar).sum())
        geodesic_total = float(sum(geodesic_area(g) for g in projected.lonlat))
    else:
        to_lonlat = transformer(layer.crs, LONLAT)
        lonlat = transform_geometries(layer.geometries, to_lonlat, lambda i: f"{layer.path}: feature {layer.ids[i]}")
        extent_lonlat = tuple(round(float(v), 6) for v in shapely.total_bounds(lonlat))
        plane = resolve_plane(extent_lonlat, crs)
        planar_total = geodesic_total = None
    return LayerDescription(
        path=layer.path,
        layers=layers,
        layer=layer.layer,
        kind={"polygon": "polygons", "point": "points"}.get(layer.kind, layer.kind),
        features=len(layer) + len(layer.empty) + len(layer.skipped),
        geometry_types=dict(layer.geometry_types),
        crs=layer.crs.to_string(),
        crs_name=layer.crs.name,
        extent=tuple(round(float(v), 6) for v in shapely.total_bounds(list(layer.geometries))),
        extent_lonlat=extent_lonlat,
        invalid=len(layer.repaired),
        empty=len(layer.empty),
        equal_area_crs=plane.label,
        area_distortion=plane.distortion,
        exact_planar_total=planar_total,
        geodesic_total=geodesic_total,
    )
