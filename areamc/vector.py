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
from typing import Mapping, NamedTuple, Sequence

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
    is_boolean,
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


class _Field(NamedTuple):
    """One attribute field of the file: its name there, fiona type, what it holds, and its values by row."""

    name: str
    schema: str
    field: str
    origin: str
    kind: str
    unit: str | None
    values: list


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
    return base  # widths of numbers are GDAL's to choose: "int:10" becomes "int" (64-bit)


def _coerce(value, kind: str):
    """`value` as a field of fiona type `kind` holds it (numbers of numpy types become Python's)."""
    if value is None:
        return None
    base = _base(kind)
    if base == "str":
        return value if isinstance(value, str) else str(value)
    if base in ("int", "int32", "int64", "bool"):
        if is_boolean(value):
            return int(bool(value)) if base != "bool" else bool(value)
        try:
            whole = int(value)
        except (TypeError, ValueError, OverflowError):
            return value
        if whole != value:
            return value
        return bool(whole) if base == "bool" and whole in (0, 1) else whole
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
    detail = " (seed, versions, inputs' SHA-256)" if job else ""
    parts.append(f"{what}; every field's unit and the run's metadata{detail}: {where}.")
    return " ".join(parts)


def write_features(path: str, geometries, rows: list[dict], crs: pyproj.CRS, layer: str, *,
                   batch: OutputBatch | None = None, description: str | None = None,
                   attributes: Sequence[Attributes] = (), types: Mapping[str, str] | None = None,
                   units_of: Mapping[str, str | None] | None = None, metadata: Mapping | None = None,
                   staged: bool = False) -> None:
    """Write `rows` as attributes of `geometries` (shapely, in `crs`) to a GeoPackage (``.gpkg``),
    GeoJSON (``.geojson``), Shapefile (``.shp``) or FlatGeobuf (``.fgb``) file.

    Parameters
    ----------
    path : str
        The output; its extension picks the format (:data:`VECTOR_DRIVERS`).
    geometries : sequence of shapely geometries
        One per row, in `crs` (the input layer's CRS, metres or degrees as it declares).  Polygons
        are written as MultiPolygons, the layer's declared geometry type.
    rows : list of dict
        The result rows, areas already in the output unit.
    crs : pyproj.CRS
        The CRS of `geometries`, written to the file; a GeoJSON file is instead written in
        longitude/latitude on WGS84 (RFC 7946 §4), GDAL transforming the coordinates (PROJ), with
        7 decimals (about 1 cm) and rings cut at the antimeridian (§3.1.9).
    layer : str
        The layer name (a Shapefile's layer is its file name).
    attributes : sequence of :class:`Attributes`
        Input layers whose attributes come first in each feature, under their own names (plus the
        spec's suffix); a name that clashes, without case, with a result field or a reserved name
        (:data:`RESERVED_NAMES`) gets the prefix ``input_``.
    types : mapping, optional
        The type of each result field (``"str"``, ``"int"``, ``"float"``, ``"bool"``; booleans are
        boolean fields, 0/1 integers in a Shapefile); a field not listed is typed by its values
        (:func:`~areamc.output.value_type`).
    units_of : mapping, optional
        The unit of each result field (:func:`~areamc.output.field_units`), written with the field list.
    metadata : mapping, optional
        The run's metadata (the JSON output's keys without ``results``).
    description : str, optional
        A caution: it opens the layer's description (``gpkg_contents.description``, the GeoJSON
        ``description`` member, the FlatGeobuf header's description).

    The run's metadata, with ``fields`` (each field's ``name`` in the file, the ``field`` it holds,
    where it is ``from``, its ``type`` and ``unit``), is written as :data:`METADATA_KEY` into a
    GeoPackage's gpkg_metadata table (GDAL layer metadata) and as a foreign member of a GeoJSON
    FeatureCollection (RFC 7946 §6.1), and as the sidecar ``NAME.EXT-metadata.json`` beside a
    Shapefile or FlatGeobuf file.  A Shapefile's field names are cut to 10 bytes
    (:func:`shapefile_names`); ``fields`` maps them back.  A FlatGeobuf file is written without
    a spatial index, so that its features keep the rows' order.

    With `staged` (GeoPackage only), `path` is a temporary file the caller staged (an
    :class:`~areamc.output.OutputBatch` name) and the layer is written into it directly, beside
    the layers already there: one file of several layers, renamed into place by the caller.

    Every file is written under a temporary name beside `path` and renamed into
    place (when `batch` commits, if given), so a failure leaves no partial
    file and no SQLite journal.  A failure while writing (a full disk: GDAL
    reports "database or disk is full" for a GeoPackage) raises an OSError
    naming `path`.
    """
    driver = vector_driver(path)
    if driver is None:
        raise OptionError(f"{{param}} {path}: not a GeoPackage (.gpkg), GeoJSON (.geojson), Shapefile (.shp) "
                          "or FlatGeobuf (.fgb) path", param="output")
    units_of = dict(units_of or {})
    metadata = dict(metadata or {})
    result_names = list(rows[0]) if rows else []
    declared = dict(types or {})
    columns: list[_Field] = []
    taken = {name.lower() for name in result_names} | set(RESERVED_NAMES)
    for spec in attributes:
        lookup = dict(zip(spec.layer.indices, spec.layer.properties))
        for name, kind in _input_fields(spec):
            written = name + spec.suffix
            while written.lower() in taken:
                written = INPUT_PREFIX + written
            taken.add(written.lower())
            values = [lookup.get(row.get(spec.index_field), {}).get(name) for row in rows]
            columns.append(_Field(written, _schema_type(kind, driver), name, "input" + spec.suffix, _base(kind),
                                  None, values))
    for name in result_names:
        values = [row.get(name) for row in rows]
        kind = declared.get(name) or value_type(values)
        columns.append(_Field(name, _schema_type(kind, driver), name, "results", kind, units_of.get(name), values))
    if driver == "ESRI Shapefile":
        short = shapefile_names([c.name for c in columns])
        columns = [c._replace(name=short[c.name]) for c in columns]
    fields = [{"name": c.name, "field": c.field, "from": c.origin, "type": c.kind, "unit": c.unit} for c in columns]
    geoms = [_multipolygon(g) for g in geometries]
    polygonal = all(g is None or g.geom_type == "MultiPolygon" for g in geoms)
    schema = {"geometry": "MultiPolygon" if polygonal else "Unknown",
              "properties": {c.name: c.schema for c in columns}}
    document = json_safe({**metadata, "fields": fields})
    sidecar = driver in ("ESRI Shapefile", "FlatGeobuf")
    where = _WHERE[driver].format(name=os.path.basename(metadata_path(path)))
    text = _description(description, {c.field: c.unit for c in columns if c.origin == "results"},
                        metadata.get("units"), metadata.get("job"), where)
    options: dict = {"crs": FionaCRS.from_wkt(crs.to_wkt())}
    staging: dict = {}
    if driver == "GPKG":
        options.update(layer=layer, DESCRIPTION=text)
    elif driver == "GeoJSON":
        options.update(layer=layer, DESCRIPTION=text, RFC7946="YES",
                       FOREIGN_MEMBERS_COLLECTION=json.dumps({METADATA_KEY: document}))
    elif driver == "FlatGeobuf":
        options.update(layer=layer, TITLE=layer, DESCRIPTION=text, SPATIAL_INDEX="NO")
    else:
        options.update(encoding="utf-8")
        staging.update(parts=SHAPEFILE_WRITTEN, stale=SHAPEFILE_STALE)
    suffix = os.path.splitext(path)[1]
    if staged and driver != "GPKG":
        raise ValueError("staged: only a GeoPackage holds several layers")
    with nullcontext(batch) if batch is not None else OutputBatch() as files:
        with nullcontext(path) if staged else files.staging(path, suffix, create=False, **staging) as tmp:
            try:
                with fiona.open(tmp, "w", driver=driver, schema=schema, **options) as dst:
                    for n, geom in enumerate(geoms):
                        props = {c.name: _coerce(c.values[n], c.schema) for c in columns}
                        dst.write({"geometry": None if geom is None else shapely.geometry.mapping(geom),
                                   "properties": props})
                    if driver == "GPKG":
                        dst.update_tags({METADATA_KEY: json.dumps(document)})
            except (CPLE_BaseError, DriverError, DataIOError) as err:
                raise cannot_write(err, path) from err
            except RuntimeError as err:  # fiona's "GDAL Error: Cannot write feature" (a full disk, for GeoJSON)
                if not str(err).startswith("GDAL Error"):
                    raise
                raise cannot_write(err, path) from err
        if sidecar:
            write_json({"url": os.path.basename(path), **document}, metadata_path(path), batch=files, owner=path)
