"""Write result rows as features (GeoPackage or GeoJSON) with fiona, atomically.

The geometries are given in the CRS they should be written in (the input
layer's CRS); rows become attributes, with areas converted to the output unit
by :func:`areamc.output.convert_rows` before they arrive here.
"""

from __future__ import annotations

import numbers
import os
from contextlib import nullcontext

import numpy as np

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
from .output import OutputBatch, cannot_write

__all__ = ["VECTOR_DRIVERS", "vector_driver", "write_features"]

VECTOR_DRIVERS = {".gpkg": "GPKG", ".geojson": "GeoJSON"}


def vector_driver(path: str | None) -> str | None:
    """The fiona driver for an output path's extension, or None for a text output."""
    if not path:
        return None
    return VECTOR_DRIVERS.get(os.path.splitext(path)[1].lower())


def _kind(value) -> str:
    if isinstance(value, (bool, np.bool_)):
        return "bool"
    if isinstance(value, numbers.Integral):
        return "int"
    if isinstance(value, numbers.Real):
        return "float"
    return "str"


def _field_type(values) -> str:
    kinds = {_kind(v) for v in values if v is not None}
    if not kinds:
        return "float"
    if kinds <= {"bool", "int"}:
        return "int"
    if kinds <= {"bool", "int", "float"}:
        return "float"
    return "str"


def _value(v, field_type: str):
    """`v` as the field's type holds it: a field that mixes text and numbers stores every value as text."""
    if v is None:
        return None
    if field_type == "str":
        return v if isinstance(v, str) else str(v)
    kind = _kind(v)
    if kind in ("bool", "int"):
        return int(v)
    if kind == "float":
        return float(v)
    return v


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
