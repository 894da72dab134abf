"""Describe a layer: what it holds, its CRS and extent, its attribute fields, and the plane areamc would compute in.

This is the job behind ``areamc inspect``: geometry counts and types as read,
repairs and skipped features, the extent in the layer's CRS and in
longitude/latitude (degrees), the attribute fields (declared type, distinct and
missing values, whether one could label the features), the equal-area plane
with its measured distortion, and, for polygons, the exact planar (m² of that
plane) and geodesic (m² on WGS84) totals.  For a layer in a projected CRS in metres
or feet (a national grid, UTM), it also gives the total area measured in that CRS's
own plane, the grid area, which differs from the true (ellipsoidal) area by the
square of the CRS's point scale factor (docs/methods.md, "Which area").
"""

from __future__ import annotations

from dataclasses import dataclass

import pyproj
import shapely

from .exact import geodesic_area, planar_area
from .load import Layer, list_layers
from .project import (
    DEFAULT_DENSIFY_M,
    LONLAT,
    EqualAreaPlane,
    lonlat_bounds,
    project_layer,
    resolve_plane,
    transform_geometries,
    transformer,
)

__all__ = ["FieldDescription", "LayerDescription", "describe_fields", "describe_layer", "grid_area", "grid_unit_m",
           "AREA_FIELDS"]

#: The fields of :class:`LayerDescription` holding an area (m²): those an output unit applies to.
AREA_FIELDS = ("exact_planar_total", "geodesic_total", "planar_total_in_layer_crs")


@dataclass(frozen=True)
class FieldDescription:
    """One attribute field of a layer, counted over the layer's kept features.

    Attributes
    ----------
    name : str
    type : str or None
        The type the file's schema declares, without its width (fiona's names: ``str``,
        ``int``, ``float``, ``date``, ``datetime``, ...); None when the layer holds no
        schema (built in memory).
    distinct : int
        Distinct non-missing values, compared as the text that labels a feature
        (``str(value)``), as :func:`~areamc.load.read_layer` compares ids.
    missing : int
        Kept features with no value (null).
    unique : bool
        Every kept feature has its own non-missing value, so the field can serve as the
        ``id_field`` of :func:`~areamc.load.read_layer` (a feature set aside, empty or of
        another geometry type, is not counted, although ``read_layer`` also refuses it
        without a value).
    """

    name: str
    type: str | None
    distinct: int
    missing: int
    unique: bool

    def to_dict(self) -> dict:
        return {"name": self.name, "type": self.type, "distinct": self.distinct, "missing": self.missing,
                "unique": self.unique}


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
    kept : int
        Features kept (the others are empty or of another geometry type): the ones the
        jobs compute with and the field counts are over.
    geometry_types : dict
        Count per geometry type as read.
    crs, crs_name : str
        The layer's CRS as an authority string and its name.
    crs_unit : str
        Unit of the layer CRS's first axis (pyproj's name: ``degree``, ``metre``,
        ``US survey foot``, ...), the unit of `extent`.
    extent : tuple of float
        (xmin, ymin, xmax, ymax) in the layer's CRS, unrounded.
    extent_lonlat : tuple of float
        (west, south, east, north) in degrees, unrounded (for polygons, of the densified
        geometries; east beyond 180 across the antimeridian).
    invalid, empty : int
        Repaired and skipped geometries.
    plane : EqualAreaPlane
        The plane the jobs would compute in, with its measured area distortion over the
        extent (``to_dict()`` gives the object every command writes).
    exact_planar_total, geodesic_total : float or None
        Total areas, m² (polygons only): on the equal-area plane and on the WGS84 ellipsoid,
        both true areas, the ones the jobs report.
    fields : tuple of FieldDescription
        The attribute fields in file order, counted over the kept features.
    planar_total_in_layer_crs : float or None
        For polygons in a projected CRS whose axes are metres or feet (:func:`grid_unit_m`),
        shapely's area of the features in that CRS's own coordinates, converted to m²: the grid
        area, which a conformal CRS (Transverse Mercator) scales by its point scale factor
        squared.  None for a geographic CRS, another unit, or points.
    """

    path: str
    layers: tuple[str, ...]
    layer: str
    kind: str
    features: int
    kept: int
    geometry_types: dict
    crs: str
    crs_name: str
    crs_unit: str
    extent: tuple[float, ...]
    extent_lonlat: tuple[float, ...]
    invalid: int
    empty: int
    plane: EqualAreaPlane
    exact_planar_total: float | None
    geodesic_total: float | None
    fields: tuple[FieldDescription, ...] = ()
    planar_total_in_layer_crs: float | None = None

    def to_dict(self) -> dict:
        """Plain values for JSON: tuples become lists, the plane its ``to_dict()``, each field a dict."""
        return {
            "path": self.path,
            "layers": list(self.layers),
            "layer": self.layer,
            "kind": self.kind,
            "features": self.features,
            "kept": self.kept,
            "geometry_types": dict(self.geometry_types),
            "crs": self.crs,
            "crs_name": self.crs_name,
            "crs_unit": self.crs_unit,
            "extent": list(self.extent),
            "extent_lonlat": list(self.extent_lonlat),
            "invalid": self.invalid,
            "empty": self.empty,
            "plane": self.plane.to_dict(),
            "exact_planar_total": self.exact_planar_total,
            "geodesic_total": self.geodesic_total,
            "planar_total_in_layer_crs": self.planar_total_in_layer_crs,
            "fields": [f.to_dict() for f in self.fields],
        }


def describe_fields(layer: Layer) -> tuple[FieldDescription, ...]:
    """The attribute fields of `layer` with their declared type and value counts over its kept features.

    Fields come from the schema the file declares (:attr:`~areamc.load.Layer.fields`), in
    its order; a layer without one (built in memory) lists the property names its
    features carry, with no type.  No geometry, CRS or unit is involved.
    """
    declared = [(name, kind.split(":", 1)[0]) for name, kind in layer.fields]
    if not declared:
        names = dict.fromkeys(key for props in layer.properties for key in props)
        declared = [(name, None) for name in names]
    out = []
    for name, kind in declared:
        values = [props.get(name) for props in layer.properties]
        present = [str(v) for v in values if v is not None]
        distinct = len(set(present))
        missing = len(values) - len(present)
        unique = bool(values) and missing == 0 and distinct == len(values)
        out.append(FieldDescription(name, kind, distinct, missing, unique))
    return tuple(out)


def _unit(crs: pyproj.CRS) -> str:
    """The unit name of the first axis of `crs` (``degree``, ``metre``, ...), or ``unknown``."""
    return crs.axis_info[0].unit_name if crs.axis_info else "unknown"


def grid_unit_m(crs: pyproj.CRS) -> float | None:
    """Metres in one unit of a projected CRS whose two horizontal axes share a unit of metres or
    feet (``metre``, ``foot``, ``US survey foot``, ...: the CRS's own factor), else None.

    >>> grid_unit_m(pyproj.CRS("EPSG:27700")), grid_unit_m(pyproj.CRS("EPSG:4326"))
    (1.0, None)
    >>> round(grid_unit_m(pyproj.CRS("EPSG:2263")), 12)  # NAD83 / New York Long Island (ftUS), 1200/3937 m
    0.304800609601
    """
    if not crs.is_projected or len(crs.axis_info) < 2:
        return None
    axes = crs.axis_info[:2]
    units = {(axis.unit_name, axis.unit_conversion_factor) for axis in axes}
    if len(units) != 1:
        return None
    (name, factor), = units
    if not (name.endswith("metre") or "foot" in name) or not factor or factor <= 0:
        return None
    return float(factor)


def grid_area(layer: Layer) -> float | None:
    """Total area of a polygon layer in its own projected CRS, m² (:func:`grid_unit_m`), else None.

    Shapely's planar area of the kept (repaired) geometries in the layer's coordinates, times the
    square of metres per CRS unit: no reprojection, so for a conformal grid it is the grid area,
    not the true area.
    """
    factor = grid_unit_m(layer.crs) if layer.kind == "polygon" else None
    if factor is None:
        return None
    return float(shapely.area(layer.geometries).sum()) * factor * factor


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

    Returns
    -------
    LayerDescription
        Extents in the layer's CRS units and in degrees, totals in m² (planar on the plane,
        geodesic on WGS84).
    """
    try:
        layers = tuple(list_layers(layer.path))
    except Exception:  # an in-memory layer has no file to list
        layers = (layer.layer,)
    if layer.kind == "polygon":
        projected = project_layer(layer, crs=crs, densify_m=densify_m)
        plane = projected.plane
        extent_lonlat = tuple(float(v) for v in lonlat_bounds(projected.lonlat))
        planar_total = float(planar_area(projected.planar).sum())
        geodesic_total = float(sum(geodesic_area(g) for g in projected.lonlat))
    else:
        to_lonlat = transformer(layer.crs, LONLAT)
        lonlat = transform_geometries(layer.geometries, to_lonlat, lambda i: f"{layer.path}: feature {layer.ids[i]}")
        extent_lonlat = tuple(float(v) for v in shapely.total_bounds(lonlat))
        plane = resolve_plane(extent_lonlat, crs)
        planar_total = geodesic_total = None
    return LayerDescription(
        path=layer.path,
        layers=layers,
        layer=layer.layer,
        kind={"polygon": "polygons", "point": "points"}.get(layer.kind, layer.kind),
        features=len(layer) + len(layer.empty) + len(layer.skipped),
        kept=len(layer),
        geometry_types=dict(layer.geometry_types),
        crs=layer.crs.to_string(),
        crs_name=layer.crs.name,
        crs_unit=_unit(layer.crs),
        extent=tuple(float(v) for v in shapely.total_bounds(list(layer.geometries))),
        extent_lonlat=extent_lonlat,
        invalid=len(layer.repaired),
        empty=len(layer.empty),
        plane=plane,
        exact_planar_total=planar_total,
        geodesic_total=geodesic_total,
        fields=describe_fields(layer),
        planar_total_in_layer_crs=grid_area(layer),
    )
