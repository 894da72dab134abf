"""Read vector layers with fiona into plain shapely geometries.

This is the first step of every command: it validates the file, the layer and
the id field, reads the CRS, repairs invalid polygons and sets empty ones
aside, and returns a frozen :class:`Layer`.  Geometries stay in the layer's
own CRS; projection is :mod:`areamc.project`'s job.
"""

from __future__ import annotations

import os
import warnings
from collections import Counter
from dataclasses import dataclass, field

import fiona
import fiona.errors
import numpy as np
import pyproj
import shapely
from shapely.geometry import shape

from .errors import AreamcWarning, CRSError, LayerError

__all__ = ["Layer", "read_layer", "list_layers", "parse_crs", "layer_from_geometries"]

_POLYGONAL = {"Polygon", "MultiPolygon"}
_PUNCTUAL = {"Point", "MultiPoint"}


@dataclass(frozen=True)
class Layer:
    """Features of one vector layer, in the layer's own CRS.

    Attributes
    ----------
    path, layer : str
        File and layer name the features came from.
    crs : pyproj.CRS
        CRS of the coordinates in `geometries` (from the file, or the ``input_crs`` given).
    ids : tuple of str
        One label per kept feature (the ``id_field`` value, else the feature id).
    geometries : numpy.ndarray of shapely geometries
        Polygons/MultiPolygons (or Points for point layers), 2-D, valid, non-empty.
    properties : tuple of dict
        The attribute values of each kept feature.
    kind : {"polygon", "point"}
        What the layer holds.
    geometry_types : dict
        Count of each geometry type as read, before repair, over all features.
    repaired : tuple of str
        Ids of invalid polygons that were repaired with ``shapely.make_valid``.
    empty : tuple of str
        Ids of features with an empty or missing geometry; they are not in `ids`.
    skipped : tuple of str
        Ids of features whose geometry type does not fit the layer's kind.
    """

    path: str
    layer: str
    crs: pyproj.CRS
    ids: tuple[str, ...]
    geometries: np.ndarray
    properties: tuple[dict, ...]
    kind: str
    geometry_types: dict = field(default_factory=dict)
    repaired: tuple[str, ...] = ()
    empty: tuple[str, ...] = ()
    skipped: tuple[str, ...] = ()

    def __len__(self) -> int:
        return len(self.ids)

    @property
    def source(self) -> str:
        """``path`` or ``path:layer`` for messages."""
        return f"{self.path} (layer {self.layer})"


def parse_crs(text: str, param: str = "crs") -> pyproj.CRS:
    """Parse an EPSG code (``"EPSG:6933"`` or ``"6933"``), PROJ string or WKT into a CRS.

    Errors name `param`, the parameter the text came from.
    """
    try:
        value = text.strip()
        if value.isdigit():
            value = f"EPSG:{value}"
        return pyproj.CRS.from_user_input(value)
    except (pyproj.exceptions.CRSError, ValueError, TypeError) as err:
        raise CRSError(f"{{param}}: unknown CRS {text!r}", param=param) from err


def list_layers(path: str) -> list[str]:
    """Return the layer names of a vector file, or raise :class:`LayerError`."""
    _check_exists(path)
    try:
        return list(fiona.listlayers(path))
    except (fiona.errors.FionaError, OSError, ValueError) as err:
        raise LayerError(f"{path}: not a readable vector file ({_short(err)})") from err


def read_layer(
    path: str | os.PathLike,
    *,
    layer: str | None = None,
    id_field: str | None = None,
    input_crs: str | pyproj.CRS | None = None,
    kind: str = "polygon",
) -> Layer:
    """Read a polygon (or point) layer.

    Parameters
    ----------
    path : str or path-like
        Any vector file fiona opens (Shapefile, GeoPackage, GeoJSON, ...).
    layer : str, optional
        Layer name, for files with several layers; default the first layer.
    id_field : str, optional
        Attribute used to label features; default the feature id.
    input_crs : str or pyproj.CRS, optional
        CRS to assume when the file declares none (and to override it if it does).
    kind : {"polygon", "point"}
        What the caller needs.  ``"any"`` accepts either, deciding from the
        first non-empty geometry.

    Returns
    -------
    Layer
        Geometries in the layer's CRS (units of that CRS: degrees for
        geographic CRSs, usually metres for projected ones).

    Raises
    ------
    LayerError
        Missing or unreadable file, unknown layer or id field, no usable features.
    CRSError
        No CRS in the file and none given, or an unknown ``input_crs``.
    """
    path = os.fspath(path)
    names = list_layers(path)
    if layer is None:
        if not names:
            raise LayerError(f"{path}: holds no vector layers")
        layer = names[0]
    elif layer not in names:
        raise LayerError(f"{path}: no layer named {layer!r}; layers: {', '.join(names)}")
    try:
        with fiona.open(path, layer=layer) as src:
            crs = _layer_crs(src, path, input_crs)
            fields = list(src.schema.get("properties", {}))
            if id_field is not None and id_field not in fields:
                raise LayerError(
                    f"{path}: {{param}} {id_field!r} is not a field of layer {layer!r}; "
                    f"fields: {', '.join(fields) or '(none)'}", param="id_field"
                )
            records = [(feat.id, feat.geometry, dict(feat.properties)) for feat in src]
    except (fiona.errors.FionaError, OSError, ValueError) as err:
        raise LayerError(f"{path}: cannot read layer {layer!r} ({_short(err)})") from err
    return _build_layer(path, layer, crs, records, id_field, kind)


def _build_layer(path, layer, crs, records, id_field, kind) -> Layer:
    types: Counter = Counter()
    ids, geoms, props = [], [], []
    repaired, empty, skipped = [], [], []
    for fid, geometry, properties in records:
        label = _label(fid, properties, id_field, path)
        geom = shape(geometry) if geometry is not None else None
        if geom is None or geom.is_empty:
            types["(empty)"] += 1
            empty.append(label)
            continue
        types[geom.geom_type] += 1
        if kind == "any":
            kind = "point" if geom.geom_type in _PUNCTUAL else "polygon"
        wanted = _POLYGONAL if kind == "polygon" else _PUNCTUAL
        if geom.geom_type not in wanted:
            skipped.append(label)
            continue
        geom = shapely.force_2d(geom)
        if kind == "polygon" and not geom.is_valid:
            geom = _repair(geom)
            repaired.append(label)
            if geom.is_empty:
                empty.append(label)
                continue
        ids.append(label)
        geoms.append(geom)
        props.append(properties)
    source = f"{path} (layer {layer})"
    if not ids:
        what = "polygons" if kind in ("polygon", "any") else "points"
        raise LayerError(f"{source}: no {what} to work with ({_describe(types)})")
    if repaired:
        warnings.warn(
            f"{source}: repaired {len(repaired)} invalid polygon(s) with make_valid: "
            + _some(repaired),
            AreamcWarning,
            stacklevel=3,
        )
    if empty:
        warnings.warn(
            f"{source}: skipped {len(empty)} empty geometr{'y' if len(empty) == 1 else 'ies'}: "
            + _some(empty),
            AreamcWarning,
            stacklevel=3,
        )
    if skipped:
        warnings.warn(
            f"{source}: skipped {len(skipped)} feature(s) that are not {kind}s: " + _some(skipped),
            AreamcWarning,
            stacklevel=3,
        )
    return Layer(
        path=path,
        layer=layer,
        crs=crs,
        ids=tuple(ids),
        geometries=np.array(geoms, dtype=object),
        properties=tuple(props),
        kind=kind,
        geometry_types=dict(types),
        repaired=tuple(repaired),
        empty=tuple(empty),
        skipped=tuple(skipped),
    )


def _repair(geom):
    """Make a polygon valid and keep only its polygonal part."""
    fixed = shapely.make_valid(geom)
    if fixed.geom_type in _POLYGONAL:
        return fixed
    parts = [g for g in shapely.get_parts(fixed) if g.geom_type in _POLYGONAL]
    polys = [p for g in parts for p in shapely.get_parts(g)]
    if not polys:
        return shapely.Polygon()
    return shapely.MultiPolygon(polys) if len(polys) > 1 else polys[0]


def _label(fid, properties, id_field, path) -> str:
    if id_field is None:
        return str(fid)
    value = properties.get(id_field)
    if value is None:
        raise LayerError(f"{path}: feature {fid} has no value in {{param}} {id_field!r}", param="id_field")
    return str(value)


def _layer_crs(src, path, input_crs) -> pyproj.CRS:
    declared = None
    if src.crs:
        wkt = src.crs.to_wkt()
        if wkt:
            declared = pyproj.CRS.from_wkt(wkt)
    if input_crs is not None:
        given = input_crs if isinstance(input_crs, pyproj.CRS) else parse_crs(input_crs, "input_crs")
        if declared is not None and not declared.equals(given, ignore_axis_order=True):
            warnings.warn(
                AreamcWarning(f"{path}: {{param}} {given.name!r} overrides the file's CRS {declared.name!r}",
                              param="input_crs"),
                stacklevel=4,
            )
        return given
    if declared is None:
        raise CRSError(f"{path}: the file declares no CRS; state it with {{param}} (e.g. EPSG:4326)", param="input_crs")
    return declared


def _check_exists(path: str) -> None:
    if not os.path.exists(path):
        raise LayerError(f"{path}: no such file")
    if os.path.isdir(path) and not any(
        name.endswith((".shp", ".gdb")) for name in os.listdir(path)
    ):
        raise LayerError(f"{path}: is a folder, not a vector file")


def _describe(types: Counter) -> str:
    if not types:
        return "the layer is empty"
    return "found " + ", ".join(f"{n} {t}" for t, n in sorted(types.items()))


def _some(labels: list[str], most: int = 5) -> str:
    shown = ", ".join(labels[:most])
    return shown + (f" and {len(labels) - most} more" if len(labels) > most else "")


def _short(err: Exception) -> str:
    return " ".join(str(err).split())[:200] or type(err).__name__


def layer_from_geometries(
    geometries,
    crs: str | pyproj.CRS,
    *,
    ids=None,
    name: str = "geometries",
    kind: str = "polygon",
) -> Layer:
    """Build a :class:`Layer` from shapely geometries already in memory.

    Geometries are given in `crs` (EPSG code, PROJ string, WKT or CRS); they
    get the same repair and empty-geometry handling as a file would.
    """
    geoms = list(geometries)
    if ids is None:
        ids = [str(i) for i in range(len(geoms))]
    ids = [str(i) for i in ids]
    if len(ids) != len(geoms):
        raise LayerError(f"{name}: {len(ids)} ids for {len(geoms)} geometries")
    crs = crs if isinstance(crs, pyproj.CRS) else parse_crs(str(crs), "crs")
    records = [
        (i, None if g is None else shapely.geometry.mapping(g), {}) for i, g in zip(ids, geoms)
    ]
    return _build_layer(name, "memory", crs, records, None, kind)
