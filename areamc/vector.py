"""Write result rows as features (GeoPackage, GeoJSON, Shapefile or FlatGeobuf) with fiona, atomically.

The geometries are given in the CRS they should be written in (the input
layer's CRS); rows become attributes, with areas converted to the output unit
by :func:`areamc.output.convert_rows` before they arrive here.  Each feature
carries its input feature's attributes first (:class:`Attributes`), then the
row's fields, typed by their definitions (:func:`areamc.output.record_types`);
polygons are written as MultiPolygons, the layer's declared type.  Every file
describes itself: units and the run's metadata (``areamc_metadata``) go into the
GeoPackage's metadata tables, the GeoJSON file's foreign members, or a
``NAME.EXT-metadata.json`` sidecar beside a Shapefile or FlatGeobuf file.  A
GeoJSON file follows RFC 7946: longitude/latitude on WGS84, no ``crs`` member.
"""

from __future__ import annotations

import json
import os
from contextlib import nullcontext
from dataclasses import dataclass
from typing import Mapping, Sequence

import fiona
import pyproj
import shapely
try:  # GDAL's errors as fiona raises them; not exported elsewhere, so guard against a fiona that moves it
    from fiona._err import CPLE_BaseError
except ImportError:  # pragma: no cover - an older or newer fiona
    from fiona.errors import FionaError as CPLE_BaseError
from fiona.crs import CRS as FionaCRS
from fiona.errors import DataIOError, DriverError

from .errors import OptionError
from .output import (
    SHAPEFILE_STALE,
    SHAPEFILE_WRITTEN,
    OutputBatch,
    cannot_write,
    json_safe,
    metadata_path,
    value_type,
    write_json,
)

__all__ = ["VECTOR_DRIVERS", "METADATA_KEY", "Attributes", "vector_driver", "shapefile_names", "write_features"]

VECTOR_DRIVERS = {".gpkg": "GPKG", ".geojson": "GeoJSON", ".shp": "ESRI Shapefile", ".fgb": "FlatGeobuf"}
#: The name of the run's metadata in a feature file: a GeoPackage metadata item (gpkg_metadata), a
#: member of the GeoJSON FeatureCollection (a foreign member, RFC 7946 §6.1).
METADATA_KEY = "areamc_metadata"
#: Longest field name a Shapefile's .dbf holds, in bytes (dBase III header: 11 bytes, NUL-terminated;
#: ESRI 1998, Shapefile Technical Description, p. 25, points to the dBase format) [memory].
SHAPEFILE_NAME_BYTES = 10
#: Names an input attribute may not keep: the result fields' and those GDAL gives the feature id
#: and geometry columns (a GeoPackage's ``fid`` and ``geom``), compared without case.
RESERVED_NAMES = ("fid", "geom", "geometry")
#: Prefix of an input attribute whose name clashes with a result field or a reserved name.
INPUT_PREFIX = "input_"
#: Where each format keeps the run's metadata, as the layer description says.
_WHERE = {"GPKG": f"the gpkg_metadata item {METADATA_KEY}", "GeoJSON": f"the member {METADATA_KEY}",
          "ESRI Shapefile": "the file {name}", "FlatGeobuf": "the file {name}"}
#: Input attribute types each driver takes as declared (fiona's names); others are written as text.
_INPUT_TYPES = {"str", "int", "int32", "int64", "float", "date", "datetime", "time", "bool"}
_SHAPEFILE_TYPES = {"str", "int", "int32", "int64", "float", "date"}


@dataclass(frozen=True)
class Attributes:
    """An input layer whose attributes the features carry.

    Attributes
    ----------
    layer : areamc.load.Layer
        The input as read: its ``properties`` (one dict per kept feature), ``indices`` (each kept
        feature's position in the layer) and ``fields`` (the declared schema; a layer built in
        memory has none, and its attributes are typed by their values).
    index_field : str
        The row field holding the input feature's position (``feature_index``; ``feature_index_a``,
        ``feature_index_b`` for overlap pairs).
    suffix : str
        Added to every attribute name (``"_a"``, ``"_b"`` for overlap pairs).
    """

    layer: object
    index_field: str = "feature_index"
    suffix: str = ""


def vector_driver(path: str | None) -> str | None:
    """The fiona driver for an output path's extension, or None for a text output."""
    if not path:
        return None
    return VECTOR_DRIVERS.get(os.path.splitext(path)[1].lower())


def shapefile_names(names: Sequence[str], limit: int = SHAPEFILE_NAME_BYTES) -> dict[str, str]:
    """Each of `names` as a Shapefile field name of at most `limit` bytes (UTF-8), unique without case.

    A name that fits is kept; a longer one is cut to `limit` bytes; a cut name already taken (by an
    earlier name, in the order given) is cut shorter and numbered ``_1``, ``_2``, ... in turn.  The
    mapping depends only on the names and their order.

    >>> shapefile_names(["estimate", "exact_planar", "population_total", "population_share"])
    {'estimate': 'estimate', 'exact_planar': 'exact_plan', 'population_total': 'population', 'population_share': 'populati_1'}
    """
    out: dict[str, str] = {}
    taken: set[str] = set()
    for name in names:
        short, n = _cut(name, limit), 0
        while short.lower() in taken:
            n += 1
            suffix = f"_{n}"
            short = _cut(name, limit - len(suffix)) + suffix
        taken.add(short.lower())
        out[name] = short
    return out


def _cut(name: str, limit: int) -> str:
    """`name` cut to at most `limit` bytes of UTF-8, on a character boundary."""
    while len(name.encode("utf-8")) > limit:
        name = name[:-1]
    return name


def _multipolygon(geom):
    """A polygon as a MultiPolygon, the layer's declared type: a Polygon becomes a one-part
    MultiPolygon, a GeometryCollection (an intersection that also touches along a line) keeps
    its polygonal parts; other geometries are returned as they are."""
    if geom is None:
        return None
    kind = geom.geom_type
    if kind == "MultiPolygon":
        return geom
    if kind == "Polygon":
        return shapely.MultiPolygon([geom])
    if kind == "GeometryCollection":
        polygons = []
        for part in shapely.get_parts(geom):
            if part.geom_type == "Polygon":
                polygons.append(part)
            elif part.geom_type == "MultiPolygon":
                polygons.extend(shapely.get_parts(part))
        return shapely.MultiPolygon(polygons)
    return geom


def _base(declared: str) -> str:
    """fiona's type name without its width: ``"str:40"`` -> ``"str"``."""
    return declared.split(":", 1)[0].strip().lower()


def _input_fields(spec: Attributes) -> list[tuple[str, str]]:
    """The input's attribute fields as (name, fiona type): as declared, else typed by their values."""
    declared = list(getattr(spec.layer, "fields", ()) or ())
    if declared:
        return [(str(name), str(kind)) for name, kind in declared]
    names: dict[str, None] = {}
    for props in spec.layer.properties:
        names.update(dict.fromkeys(props))
    return [(name, value_type(p.get(name) for p in spec.layer.properties)) for name in names]


def _schema_type(kind: str, driver: str) -> str:
    """The fiona type to declare for a field of type `kind` (ours or an input's) in `driver`'s file."""
    base = _base(kind)
    if base == "bool" and driver == "ESRI Shapefile":
        return "int"
    allowed = _SHAPEFILE_TYPES if driver == "ESRI Shapefile" else _INPUT_TYPES
    if base not in allowed:
        return "str:254" if driver == "ESRI Shapefile" else "str"
    if base == "str":
        if driver == "ESRI Shapefile":  # a .dbf text field holds at most 254 characters; fiona's default is 80
            width = kind.split(":", 1)[1] if ":" in kind else ""
            return f"str:{min(int(width), 254)}" if width.isdigit() else "str:254"
        return kind
    if base in ("int32", "int64"):
        return base
    return base if base != "int" or ":" not in kind else "int"


def _coerce(value, kind: str):
    """`value` as a field of fiona type `kind` holds it (numbers of numpy types become Python's)."""
    if value is None:
        return None
    base = _base(kind)
    if base == "str":
        return value if isinstance(value, str) else str(value)
    if base in ("int", "int32", "int64", "bool"):
        if isinstance(value, bool) or type(value).__name__ == "bool_":
            return int(bool(value)) if base != "bool" else bool(value)
        try:
            whole = int(value)
        except (TypeError, ValueError, OverflowError):
            return value
        return whole if whole == value else value
    if base == "float":
        try:
            return float(value)
        except (TypeError, ValueError):
            return value
    return value


def _description(caveat: str | None, units_of: Mapping[str, str | None], units: str | None, job: str | None,
                 where: str) -> str:
    """The layer description: the caution (when there is one), what the layer holds, the area unit
    and the fields in it, and where the full metadata is."""
    parts = [caveat] if caveat else []
    what = f"areamc {job} results" if job else "areamc results"
    if units:
        areas = [name for name, unit in units_of.items() if unit == units]
        dense = [name for name, unit in units_of.items() if unit == f"count per {units}"]
        if areas:
            what += f"; areas in {units}: {', '.join(areas)}"
        if dense:
            what += f"; densities in count per {units}: {', '.join(dense)}"
    parts.append(f"{what}; every field's unit and the run's metadata (seed, versions, inputs' SHA-256): {where}.")
    return " ".join(parts)


def write_features(path: str, geometries, rows: list[dict], crs: pyproj.CRS, layer: str, *,
                   batch: OutputBatch | None = None, description: str | None = None) -> None:
    """Write `rows` as attributes of `geometries` (shapely, in `crs`) to a GeoPackage or GeoJSON file.

    `description` (a caution, for example) becomes the layer's description: the GeoPackage's
    ``gpkg_contents.description`` and the GeoJSON file's ``description`` member (GDAL's
    DESCRIPTION layer creation option).

    The file is written under a temporary name beside `path` and renamed into
    place (when `batch` commits, if given), so a failure leaves no partial
    file and no SQLite journal.  A failure while writing (a full disk: GDAL
    reports "database or disk is full" for a GeoPackage) raises an OSError
    naming `path`.
    """
    driver = vector_driver(path)
    if driver is None:
        raise OptionError(f"{{param}} {path}: not a GeoPackage (.gpkg) or GeoJSON (.geojson) path", param="output")
    fields = list(rows[0]) if rows else []
    types = {f: _field_type([r.get(f) for r in rows]) for f in fields}
    schema = {"geometry": "Unknown", "properties": {f: types[f] for f in fields}}
    suffix = os.path.splitext(path)[1]
    with nullcontext(batch) if batch is not None else OutputBatch() as files:
        with files.staging(path, suffix, create=False) as tmp:
            try:
                options = {"DESCRIPTION": description} if description else {}
                with fiona.open(tmp, "w", driver=driver, schema=schema, crs=FionaCRS.from_wkt(crs.to_wkt()),
                                layer=layer, **options) as dst:
                    for geom, row in zip(geometries, rows):
                        props = {f: _value(v, types[f]) for f, v in row.items()}
                        dst.write({"geometry": shapely.geometry.mapping(geom), "properties": props})
            except (CPLE_BaseError, DriverError, DataIOError) as err:
                raise cannot_write(err, path) from err
            except RuntimeError as err:  # fiona's "GDAL Error: Cannot write feature" (a full disk, for GeoJSON)
                if not str(err).startswith("GDAL Error"):
                    raise
                raise cannot_write(err, path) from err
