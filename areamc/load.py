"""Read vector layers (files GDAL opens, GeoParquet, GeoDataFrames) into plain shapely geometries.

This is the first step of every command: it validates the file, the layer and
the id field, reads the CRS, repairs invalid polygons and sets empty ones
aside, and returns a frozen :class:`Layer`.  A truncated or damaged file
(Shapefile index against its .shp, SQLite's check of a GeoPackage, errors
GDAL reports while reading), text that does not decode, malformed geometries
and repeated ids are refused, each naming the file and the feature.  Geometries stay in the layer's
own CRS; projection is :mod:`areamc.project`'s job.

Where a layer can come from (:func:`read_layer`): any path GDAL opens through fiona
(:func:`gdal_path`: a ``.zip`` archive, ``zip://``, every ``/vsi...`` path, an
``http(s)://``, ``s3://`` or ``gs://`` URL), with GDAL open options
(:func:`parse_open_options`); a GeoParquet file (through geopandas and pyarrow, the
``parquet`` extra); or a geopandas GeoDataFrame or GeoSeries already in memory.  Large
layers are read through pyogrio when it is installed (:data:`PYOGRIO_MIN_FEATURES`),
and through fiona whenever pyogrio's reading is not certain to give the same records.
"""

from __future__ import annotations

import codecs
import functools
import logging
import os
import re
import sqlite3
import struct
import sys
import urllib.parse
import warnings
import zipfile
from collections import Counter
from collections.abc import Mapping
from dataclasses import dataclass, field

import fiona
import fiona.errors
import numpy as np
import pyproj
import shapely
from shapely.geometry import shape

from .errors import AreamcNotice, AreamcWarning, CRSError, LayerError, OptionError
from . import globe

__all__ = [
    "Layer",
    "read_layer",
    "list_layers",
    "parse_crs",
    "layer_from_geometries",
    "gdal_path",
    "is_network_path",
    "parse_open_options",
    "MAX_PLANE_COORDINATE_M",
    "PYOGRIO_MIN_FEATURES",
    "READER_VARIABLE",
]

_POLYGONAL = {"Polygon", "MultiPolygon"}
_PUNCTUAL = {"Point", "MultiPoint"}
#: Largest distance from a projected CRS's origin, in metres, that a coordinate may lie at
#: (100,000 km, 2.5 times the Earth's circumference); beyond it a coordinate is refused as corrupt.
MAX_PLANE_COORDINATE_M = 1e8
#: Geographic coordinates beyond these bounds (degrees) are refused: longitudes within ±360
#: (so 0..360 data is accepted), latitudes within ±90.
_MAX_LON_DEG, _MAX_LAT_DEG = 360.0, 90.0
#: Duplicated ids named in a refusal; the rest are counted ("and N more").
_DUPLICATES_NAMED = 3
#: Duplicated ids named in the warning on kept duplicates; the rest are counted.
_DUPLICATES_WARNED = 5


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
    kind : {"polygon", "point", "mixed"}
        What the layer holds; "mixed" (points and polygons, each feature as
        its own type) only from ``read_layer(kind="any")``.
    geometry_types : dict
        Count of each geometry type as read, before repair, over all features.
    repaired : tuple of str
        Ids of invalid polygons that were repaired with ``shapely.make_valid``.
    empty : tuple of str
        Ids of features with an empty or missing geometry; they are not in `ids`.
    skipped : tuple of str
        Ids of features whose geometry type does not fit the layer's kind.
    indices : tuple of int
        Position of each kept feature in the layer as read (0-based, counting
        empty and skipped features): result rows carry it as ``feature_index``,
        which tells features apart when ids repeat.  Default ``0, 1, 2, ...``.
    reach_circles : int
        How many features are geodesic circles drawn round points with a reach
        (:func:`~areamc.zones.read_zones`): their extent is a straight-line distance.
    fields : tuple of (str, str)
        Each attribute field's name and type as the file's schema declares it, in file
        order (fiona's types: ``"str:40"``, ``"int"``, ``"float"``, ``"date"``, ...);
        for a layer built in memory, inferred from its values (a GeoDataFrame's from its dtypes).
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
    indices: tuple[int, ...] = ()
    reach_circles: int = 0
    fields: tuple[tuple[str, str], ...] = ()

    def __post_init__(self) -> None:
        if not self.indices:
            object.__setattr__(self, "indices", tuple(range(len(self.ids))))
        elif len(self.indices) != len(self.ids):
            raise ValueError(f"{self.path}: {len(self.indices)} feature indices for {len(self.ids)} ids")

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


def list_layers(path: str | os.PathLike, *, open_options=None) -> list[str]:
    """Return the layer names of a vector file, or raise :class:`LayerError`.

    `path` takes every form :func:`read_layer` takes (a ``.zip`` archive, ``zip://``, a
    ``/vsi...`` path, a URL); `open_options` as :func:`parse_open_options` reads them.  A
    GeoPackage (any SQLite database) must first pass SQLite's own integrity check
    (:func:`_check_sqlite`).  A GeoParquet file holds one layer, named after the file.
    """
    text = _path_text(path)
    if _is_parquet(text) and not _gdal_has_driver("Parquet"):
        if not is_network_path(text) and not os.path.exists(text):
            raise LayerError(f"{text}: no such file")
        return [_parquet_layer_name(text)]
    return _layer_names(text, gdal_path(text), parse_open_options(open_options))


def _layer_names(text: str, target: str, options: dict[str, str]) -> list[str]:
    """The layers GDAL finds at `target` (the GDAL path of `text`), after SQLite's check of a local
    GeoPackage; a refusal names `text` and what would make it readable (:func:`_unreadable`)."""
    _check_sqlite(text)
    try:
        names = list(fiona.listlayers(target, **options))
    except (fiona.errors.FionaError, OSError, ValueError) as err:
        raise _unreadable(text, target, err) from err
    if not names and os.path.isdir(text):
        raise _unreadable(text, target, None)
    return names


# ------------------------------------------------------------------------- where GDAL finds a layer

#: URL schemes GDAL reads over the network, and the virtual file system each goes through
#: (GDAL documentation, "GDAL Virtual File Systems": /vsicurl/, /vsis3/, /vsigs/, /vsiaz/).
_URL_SCHEMES = {"http": "/vsicurl/", "https": "/vsicurl/", "ftp": "/vsicurl/", "s3": "/vsis3/", "gs": "/vsigs/",
                "az": "/vsiaz/"}
#: GDAL's virtual file systems that reach the network.
_NETWORK_VSI = ("/vsicurl", "/vsis3", "/vsigs", "/vsiaz", "/vsiadls", "/vsioss", "/vsiswift", "/vsiwebhdfs",
                "/vsihdfs")
_SCHEME = re.compile(r"^([A-Za-z][A-Za-z0-9+.-]+)://(.*)$", re.DOTALL)
_ZIP_IN_PATH = re.compile(r"\.zip(?=[/\\])", re.IGNORECASE)


def gdal_path(text: str) -> str:
    """The path GDAL opens for `text`, as fiona and pyogrio take it.

    * ``/vsi...`` paths are GDAL's own and pass unchanged;
    * ``zip://ARCHIVE`` and ``zip://ARCHIVE!MEMBER`` (also ``zip+https://...``) become
      ``/vsizip/ARCHIVE[/MEMBER]``;
    * ``http(s)://`` and ``ftp://`` URLs become ``/vsicurl/URL``; ``s3://``, ``gs://`` and
      ``az://`` become ``/vsis3/``, ``/vsigs/`` and ``/vsiaz/`` paths;
    * a local ``.zip`` file (``districts_shp.zip``), or a path through one
      (``districts_shp.zip/districts.shp``), is opened through ``/vsizip/``;
    * anything else is a local path and passes unchanged.

    >>> gdal_path("zip://data/districts.zip!districts.shp")
    '/vsizip/data/districts.zip/districts.shp'
    >>> gdal_path("https://example.org/zones.gpkg")
    '/vsicurl/https://example.org/zones.gpkg'
    """
    if text.startswith("/vsi"):
        return text
    match = _SCHEME.match(text)
    if match:
        scheme, rest = match.group(1).lower(), match.group(2)
        outer, _, inner = scheme.partition("+")
        if outer == "zip":
            archive, _, member = rest.partition("!")
            base = archive if inner in ("", "file") else gdal_path(f"{inner}://{archive}")
            return "/vsizip/" + base + ("/" + member.lstrip("/") if member else "")
        if outer == "file" and not inner:
            return gdal_path(rest)
        if outer in ("http", "https", "ftp") and not inner:
            return "/vsicurl/" + text
        if outer in _URL_SCHEMES and not inner:
            return _URL_SCHEMES[outer] + rest
        return text
    if text.lower().endswith(".zip") and os.path.isfile(text):
        return "/vsizip/" + text
    if not os.path.exists(text):
        for cut in _ZIP_IN_PATH.finditer(text):
            if os.path.isfile(text[:cut.end()]):
                return "/vsizip/" + text
    return text


def is_network_path(text: str) -> bool:
    """Whether GDAL reads `text` over the network (a URL, or a ``/vsicurl/``, ``/vsis3/``, ... path)."""
    target = gdal_path(text)
    return any(vsi + "/" in target or vsi + "_streaming/" in target for vsi in _NETWORK_VSI)


def _zip_parts(target: str) -> tuple[str, str] | None:
    """``(local archive, member inside it)`` of a ``/vsizip/`` path whose archive is a local file, else None."""
    if not target.startswith("/vsizip/"):
        return None
    rest = target[len("/vsizip/"):]
    if rest.startswith("{"):  # GDAL's /vsizip/{ARCHIVE}/MEMBER form
        archive, _, member = rest[1:].partition("}")
        return (archive, member.lstrip("/")) if os.path.isfile(archive) else None
    for end in [m.start() for m in re.finditer("/", rest) if m.start() > 0] + [len(rest)]:
        if os.path.isfile(rest[:end]):
            return rest[:end], rest[end:].strip("/")
    return None


def _local_part(text: str, target: str) -> str | None:
    """The local file whose absence makes `text` unreadable: the path itself, or the archive of a
    ``/vsizip/`` path; None for network and other virtual paths."""
    if is_network_path(text):
        return None
    if not target.startswith("/vsi"):
        return target
    if target.startswith("/vsizip/"):
        rest = target[len("/vsizip/"):].lstrip("{")
        cut = re.search(r"\.(zip|kmz)(?=[/}]|$)", rest, re.IGNORECASE)
        return rest[:cut.end()] if cut else None
    return None


#: The format GDAL reads by each extension, named in refusals.
_FORMATS = {
    ".gpkg": "GeoPackage", ".shp": "Shapefile", ".geojson": "GeoJSON", ".json": "GeoJSON", ".fgb": "FlatGeobuf",
    ".kml": "KML", ".gml": "GML", ".gpx": "GPX", ".csv": "CSV", ".tab": "MapInfo", ".mif": "MapInfo",
    ".sqlite": "SQLite/SpatiaLite", ".gdb": "File Geodatabase", ".topojson": "TopoJSON", ".geojsonl": "GeoJSONSeq",
    ".geojsons": "GeoJSONSeq", ".zip": "zip archive", ".xlsx": "Excel", ".ods": "OpenDocument spreadsheet",
}
#: What would make a file of each extension readable, where GDAL cannot read it as vectors.
_FORMAT_HINTS = {
    ".parquet": "a GeoParquet file, and neither GDAL here reads Parquet: install areamc[parquet] "
                "(geopandas and pyarrow) to read it",
    ".geoparquet": "a GeoParquet file, and neither GDAL here reads Parquet: install areamc[parquet] "
                   "(geopandas and pyarrow) to read it",
    ".kmz": "a zipped KML: give the KML inside it, /vsizip/FILE/doc.kml",
    ".xls": "an old Excel workbook: save the sheet as CSV and name its coordinate columns with open options",
    ".7z": "an archive GDAL does not open: extract it, or pack it as .zip",
    ".rar": "an archive GDAL does not open: extract it, or pack it as .zip",
    ".shx": "a Shapefile's index: give the .shp beside it",
    ".prj": "a Shapefile's CRS: give the .shp beside it",
    ".cpg": "a Shapefile's encoding: give the .shp beside it",
}
_RASTER_EXTENSIONS = (".tif", ".tiff", ".asc", ".img", ".nc", ".jp2", ".png", ".jpg", ".jpeg", ".dem", ".bil")


def _extension(text: str) -> str:
    return os.path.splitext(text.rstrip("/").split("!")[-1])[1].lower()


def _unreadable(text: str, target: str, err: Exception | None) -> LayerError:
    """The refusal of an input GDAL could not open, tried first: it names the path, the format GDAL
    read it as (by its extension) and what would make it readable."""
    gdal = f" (GDAL: {_short(err)})" if err is not None else ""
    if is_network_path(text):
        vsi = next(v for v in _NETWORK_VSI if v + "/" in gdal_path(text) or v + "_streaming/" in gdal_path(text))
        return LayerError(f"{text}: a network path GDAL could not open through {vsi}/: check the address, that "
                          f"the server answers, and that the file there is in a vector format GDAL reads{gdal}")
    local = _local_part(text, target)
    if local is not None and not os.path.exists(local):
        return LayerError(f"{text}: no such file" + (f" (no archive {local})" if local != text else ""))
    if os.path.isdir(text):
        return LayerError(f"{text}: is a folder, not a vector file (GDAL reads a folder of Shapefiles, "
                          "or a .gdb folder)")
    parts = _zip_parts(target)
    if parts is not None:
        missing = _zip_missing(*parts)
        if missing is not None:
            return LayerError(f"{text}: {missing}")
    ext = _extension(text)
    if ext in _RASTER_EXTENSIONS:
        return LayerError(f"{text}: a raster ({ext}), not a vector layer: polygons and points come from vector "
                          f"formats, and a raster serves only as a density source{gdal}")
    if ext in _FORMAT_HINTS:
        return LayerError(f"{text}: {_FORMAT_HINTS[ext]}{gdal}")
    if ext in _FORMATS:
        return LayerError(f"{text}: GDAL cannot read it as {_FORMATS[ext]}, the format of its extension {ext}: "
                          f"the file may be truncated, damaged or of another format{gdal}")
    what = f"extension {ext}" if ext else "no extension"
    return LayerError(f"{text}: not in a vector format GDAL reads ({what}); convert it to GeoPackage, GeoJSON "
                      f"or Shapefile{gdal}")


def _zip_missing(archive: str, member: str) -> str | None:
    """Why a local zip archive gives no layer: not a zip, no such member, or no vector file in it; else None."""
    try:
        with zipfile.ZipFile(archive) as z:
            names = [n for n in z.namelist() if not n.endswith("/")]
    except (zipfile.BadZipFile, OSError) as err:
        return f"not a readable zip archive, or a truncated or damaged one ({_short(err)})"
    held = ", ".join(names[:5]) + (f" and {len(names) - 5} more" if len(names) > 5 else "") if names else "nothing"
    if member and not any(n == member or n.startswith(member.rstrip("/") + "/") for n in names):
        return f"the archive {archive} holds no {member!r} (it holds: {held})"
    if not member:
        return f"the archive holds no file GDAL reads as vectors (it holds: {held}); name one inside it, " \
               f"/vsizip/{archive}/NAME"
    return None


@functools.lru_cache(maxsize=None)
def _gdal_has_driver(name: str) -> bool:
    """Whether the GDAL fiona reads through has the driver `name` (``"Parquet"``)."""
    try:
        with fiona.Env() as env:
            return name in env.drivers()
    except Exception:  # pragma: no cover - fiona without GDAL's driver list
        return False


# ---------------------------------------------------------------------------------------- open options

_OPTION_KEY = re.compile(r"[A-Za-z][A-Za-z0-9_]*$")


def parse_open_options(options, param: str = "open_options") -> dict[str, str]:
    """GDAL dataset open options as a ``{KEY: value}`` dict of strings, keys in upper case.

    `options` is None, a mapping (``{"X_POSSIBLE_NAMES": "lon"}``; True/False become YES/NO),
    or ``KEY=VALUE`` strings (``["X_POSSIBLE_NAMES=lon", "Y_POSSIBLE_NAMES=lat"]``, as the
    command line gives them).  A malformed entry, or a key given twice with different values, is
    refused naming `param`.  ``ENCODING`` is refused: the text encoding has its own parameter.

    >>> parse_open_options(["x_possible_names=lon", "Y_POSSIBLE_NAMES=lat"])
    {'X_POSSIBLE_NAMES': 'lon', 'Y_POSSIBLE_NAMES': 'lat'}
    """
    if options is None:
        return {}
    if isinstance(options, Mapping):
        items = list(options.items())
    else:
        if isinstance(options, str):
            options = [options]
        items = []
        try:
            entries = list(options)
        except TypeError:
            raise OptionError(f"{{param}}: expected KEY=VALUE texts or a dict, got {type(options).__name__}",
                              param=param) from None
        for entry in entries:
            key, sep, value = entry.partition("=") if isinstance(entry, str) else ("", "", "")
            if not sep:
                raise OptionError(f"{{param}}: expected KEY=VALUE, such as X_POSSIBLE_NAMES=lon, got {entry!r}",
                                  param=param)
            items.append((key, value))
    out: dict[str, str] = {}
    for key, value in items:
        name = key.strip() if isinstance(key, str) else ""
        if not _OPTION_KEY.match(name):
            raise OptionError(f"{{param}}: {key!r} is not an open option name (letters, digits and _, such as "
                              "X_POSSIBLE_NAMES)", param=param)
        if isinstance(value, bool):
            value = "YES" if value else "NO"
        if value is None or not isinstance(value, (str, int, float)):
            raise OptionError(f"{{param}}: {name}: expected a text or number value, got {value!r}", param=param)
        name, value = name.upper(), str(value)
        if name == "ENCODING":
            raise OptionError("{open_options}: ENCODING: give the text encoding with {encoding} instead",
                              params=(param, "encoding") if param == "open_options" else (param,))
        if name in out and out[name] != value:
            raise OptionError(f"{{param}}: {name} given twice ({out[name]!r} and {value!r})", param=param)
        out[name] = value
    return out


def _check_driver_options(options: dict[str, str], driver: str, path: str) -> None:
    """Refuse open options the `driver` does not have (GDAL would only warn and ignore them)."""
    if not options:
        return
    try:
        import fiona.meta

        known = {k.upper() for k, v in fiona.meta.dataset_open_options(driver).items()
                 if "vector" in (v.get("scope") or "vector")}
    except Exception:  # no metadata for this driver: leave the options to GDAL
        return
    unknown = sorted(set(options) - known)
    if unknown:
        listed = ", ".join(sorted(known)) if known else "none"
        raise OptionError(f"{path}: the {driver} driver has no open option {unknown[0]} ({{param}}); its open "
                          f"options: {listed}", param="open_options")


# ------------------------------------------------------------------------------- tables without geometry

#: Column names taken for longitude/x, latitude/y and WKT geometry when a CSV hint names its columns.
_X_NAMES = ("lon", "long", "longitude", "lng", "x", "easting")
_Y_NAMES = ("lat", "latitude", "y", "northing")
_WKT_NAMES = ("wkt", "geom", "geometry", "the_geom", "shape", "wkb_geometry")


def _csv_hint(fields: list[str], input_crs) -> tuple[str, tuple[str, ...]]:
    """How to give a CSV's geometry: open options naming its columns (its own, where their names tell),
    and its CRS; with the parameters the text names."""
    lower = {f.lower(): f for f in fields}
    x = next((lower[n] for n in _X_NAMES if n in lower), None)
    y = next((lower[n] for n in _Y_NAMES if n in lower), None)
    wkt = next((lower[n] for n in _WKT_NAMES if n in lower), None)
    points = (f"{{open_options}} X_POSSIBLE_NAMES={x or '<longitude column>'} "
              f"{{open_options}} Y_POSSIBLE_NAMES={y or '<latitude column>'}")
    text_wkt = f"{{open_options}} GEOM_POSSIBLE_NAMES={wkt or '<WKT column>'}"
    if wkt and not (x and y):
        how = f"give {text_wkt} (a column of WKT), or {points} (columns of coordinates)"
    else:
        how = f"give {points} (columns of coordinates), or {text_wkt} (a column of WKT)"
    params: tuple[str, ...] = ("open_options",)
    if input_crs is None:
        how += ", and its CRS with {input_crs} (such as EPSG:4326)"
        params += ("input_crs",)
    return how, params


def _without_geometry(path: str, layer: str, driver: str, fields: list[str], input_crs) -> LayerError:
    """The refusal of a layer with no geometry column (a CSV, a spreadsheet, a .dbf alone)."""
    if driver == "CSV":
        how, params = _csv_hint(fields, input_crs)
        return LayerError(f"{path}: a CSV file whose rows have no geometry GDAL found; {how}", params=params)
    if path.lower().endswith(".dbf"):
        return LayerError(f"{path}: a Shapefile's attribute table alone, without geometry; give the .shp beside it")
    if driver in ("XLSX", "ODS"):
        return LayerError(f"{path}: a spreadsheet ({driver}) without geometry; save the sheet as CSV and name "
                          "its coordinate columns with {open_options} X_POSSIBLE_NAMES=... Y_POSSIBLE_NAMES=...",
                          param="open_options")
    return LayerError(f"{path}: layer {layer!r} is a table without geometry ({driver} driver)")


#: The first 16 bytes of every SQLite database, so of every GeoPackage (sqlite.org, "Database File Format", 1.3.1).
_SQLITE_MAGIC = b"SQLite format 3\x00"
#: SQLite's result codes for a damaged file: SQLITE_CORRUPT and SQLITE_NOTADB (sqlite.org, "Result and Error Codes").
_SQLITE_DAMAGED = (11, 26)


def _check_sqlite(path: str) -> None:
    """Refuse a GeoPackage whose SQLite file fails ``PRAGMA quick_check``, before GDAL opens it.

    GDAL reads a damaged b-tree page as the end of the table, or fails part
    way, or (measured once in 681 randomly damaged pages, GDAL 3.9.2) crashes;
    SQLite's own check reads every page read-only and names the damage.  A
    database that cannot be opened read-only for another reason (locked,
    write-ahead log without its index) is left to GDAL.
    """
    try:
        with open(path, "rb") as f:
            if f.read(16) != _SQLITE_MAGIC:
                return
    except OSError:
        return
    uri = "file:" + urllib.parse.quote(os.path.abspath(path)) + "?mode=ro"
    try:
        con = sqlite3.connect(uri, uri=True)
        try:
            rows = con.execute("PRAGMA quick_check").fetchall()
        finally:
            con.close()
    except UnicodeDecodeError as err:  # SQLite quoted damaged schema text in its message
        raise LayerError(f"{path}: truncated or damaged file: SQLite finds its schema malformed") from err
    except sqlite3.DatabaseError as err:
        if getattr(err, "sqlite_errorcode", None) in _SQLITE_DAMAGED or "malformed" in str(err):
            raise LayerError(f"{path}: truncated or damaged file: SQLite reports {_short(err)}") from err
        return
    if rows != [("ok",)]:
        found = " ".join(str(r[0]) for r in rows[:2])
        raise LayerError(f"{path}: truncated or damaged file: SQLite's integrity check fails ({_short(Exception(found))})")


def read_layer(
    path,
    *,
    layer: str | None = None,
    id_field: str | None = None,
    input_crs: str | pyproj.CRS | None = None,
    kind: str = "polygon",
    encoding: str | None = None,
    allow_duplicate_ids: bool = False,
    describing: bool = False,
    open_options=None,
) -> Layer:
    """Read a polygon (or point) layer from a file, a URL or a GeoDataFrame.

    Parameters
    ----------
    path : str, path-like, GeoDataFrame or GeoSeries
        Any vector file or path GDAL opens through fiona (Shapefile, GeoPackage,
        GeoJSON, FlatGeobuf, CSV, KML, ...): a ``.zip`` archive (opened through
        ``/vsizip/``), ``zip://ARCHIVE!MEMBER``, any ``/vsi...`` path, an
        ``http(s)://``, ``s3://`` or ``gs://`` URL (:func:`gdal_path`).  A
        ``.parquet`` GeoParquet file is read through geopandas and pyarrow (the
        ``parquet`` extra).  A geopandas GeoDataFrame or GeoSeries is read from
        memory, its attributes kept (:func:`_frame_layer`).
    layer : str, optional
        Layer name, for files with several layers; default the first layer,
        with an :class:`~areamc.errors.AreamcWarning` naming it and the others.
    id_field : str, optional
        Attribute used to label features; default the feature id (a
        GeoDataFrame's index).
    input_crs : str or pyproj.CRS, optional
        CRS to assume when the file declares none (and to override it if it does).
    kind : {"polygon", "point", "any"}
        What the caller needs; features of another type are skipped with a
        warning that counts them by type.  ``"any"`` classifies feature by
        feature: the layer's kind is "polygon", "point" or "mixed".
    encoding : str, optional
        Text encoding of the attributes (a Python codec name such as
        ``"latin-1"``), passed to fiona; default the file's own declaration
        (a Shapefile's ``.cpg``).
    allow_duplicate_ids : bool
        Accept features that share an id (default: refused, naming the
        duplicated values); rows then tell them apart by ``feature_index``,
        and a warning names the repeated values.
    describing : bool
        The layer is only described (``areamc inspect``), never joined back:
        shared ids are kept whatever `allow_duplicate_ids` says, with the
        same warning.
    open_options : dict or list of str, optional
        GDAL dataset open options of the file's driver, such as
        ``{"X_POSSIBLE_NAMES": "lon", "Y_POSSIBLE_NAMES": "lat"}`` for a CSV of
        points (or ``"KEY=VALUE"`` texts, :func:`parse_open_options`); an option
        the driver does not have is refused.

    Returns
    -------
    Layer
        Geometries in the layer's CRS (units of that CRS: degrees for
        geographic CRSs, usually metres for projected ones).

    Raises
    ------
    LayerError
        Missing, unreadable, truncated or damaged file (the message names the
        format and what would make it readable); unknown layer or id field;
        a table without geometry (a CSV without its coordinate columns named);
        text that does not decode; malformed geometries (a ring of fewer than 3
        points, coordinates that are not finite or lie beyond ±360°/±90° or
        :data:`MAX_PLANE_COORDINATE_M`); duplicate ids; no usable features.
    CRSError
        No CRS in the file and none given, an unknown ``input_crs``, or a CRS
        not tied to the Earth (an engineering ``LOCAL_CS``).
    OptionError
        A malformed open option, or one the driver does not have.
    """
    frame = _frame_type(path)
    if frame is not None:
        if frame == "pandas":
            raise OptionError("{param}: a pandas DataFrame holds no geometries; make it a geopandas GeoDataFrame "
                              "(geopandas.GeoDataFrame(frame, geometry=..., crs=...))", param="path")
        for given, param in ((layer, "layer"), (encoding, "encoding"), (open_options, "open_options")):
            if given:
                raise OptionError(f"{{param}}: a {frame} is read from memory and takes no {param}", param=param)
        return _frame_layer(path, frame, "memory", id_field=id_field, input_crs=input_crs, kind=kind,
                            allow_duplicate_ids=allow_duplicate_ids, describing=describing, what=f"the {frame}")
    path = _path_text(path)
    options = parse_open_options(open_options)
    if encoding is not None:
        _check_encoding(encoding)
    if _is_parquet(path) and not _gdal_has_driver("Parquet"):
        return _read_parquet(path, layer=layer, id_field=id_field, input_crs=input_crs, kind=kind, encoding=encoding,
                             allow_duplicate_ids=allow_duplicate_ids, describing=describing, options=options)
    target = gdal_path(path)
    names = _layer_names(path, target, options)
    if layer is None:
        if not names:
            raise LayerError(f"{path}: holds no vector layers")
        layer = names[0]
        if len(names) > 1:
            warnings.warn(AreamcNotice(
                f"{path}: holds {len(names)} layers; using the first, {layer!r} (the others: "
                f"{_some([repr(n) for n in names[1:]])}); choose one with {{param}}", param="layer"), stacklevel=2)
    elif layer not in names:
        raise LayerError(f"{path}: no layer named {layer!r}; layers: {', '.join(names)}")
    _check_shapefile_index(path, target, layer)
    watch = _ReadWatch()
    try:
        with watch, fiona.open(target, layer=layer, encoding=encoding, allow_unsupported_drivers=True,
                               **options) as src:
            driver = src.driver
            _check_driver_options(options, driver, path)
            schema = tuple((str(k), str(v)) for k, v in src.schema.get("properties", {}).items())
            fields = [name for name, _ in schema]
            if str(src.schema.get("geometry")) == "None":
                raise _without_geometry(path, layer, driver, fields, input_crs)
            crs = _layer_crs(src, path, input_crs)
            if id_field is not None and id_field not in fields:
                raise LayerError(
                    f"{path}: {{param}} {id_field!r} is not a field of layer {layer!r}; "
                    f"fields: {', '.join(fields) or '(none)'}", param="id_field"
                )
            declared = _feature_count(src)
            records = _pyogrio_records(target, layer, encoding, options, schema, declared) \
                if _use_pyogrio(declared) else None
            if records is None:
                records = []
                for feat in src:
                    records.append((feat.id, feat.geometry, dict(feat.properties)))
                    watch.read(feat.id)
    except (fiona.errors.FionaError, OSError, ValueError, LookupError) as err:
        raise LayerError(f"{path}: cannot read layer {layer!r} ({_short(err)})") from err
    watch.check(path, len(records), declared, encoding)
    hint = _csv_hint(fields, input_crs) if driver == "CSV" else None
    return _build_layer(path, layer, crs, records, id_field, kind, allow_duplicate_ids, fields=schema,
                        describing=describing, hint=hint)


def _path_text(path) -> str:
    """`path` as text, or a refusal naming the parameter when it is no path."""
    if not isinstance(path, (str, bytes, os.PathLike)):
        raise OptionError(f"{{param}}: expected a file path, a GeoDataFrame or a GeoSeries, got "
                          f"{type(path).__name__}", param="path")
    return os.fsdecode(os.fspath(path))


# ------------------------------------------------------------------------------ reading through pyogrio

#: Layers that declare at least this many features are read through pyogrio when it is installed
#: (the ``pyogrio`` extra).  benchmarks/read_speed.py measured read_layer 3.8 times faster through
#: pyogrio on 100,000 polygons (4.4 s against 16.8 s; the reader alone 8.9 times), saving about
#: 120 µs a feature, while ``import pyogrio.raw`` costs up to 0.74 s (it imports geopandas when
#: that is installed): pyogrio pays from about 6,000 features.
PYOGRIO_MIN_FEATURES = 10_000
#: Environment variable that chooses the reader: ``auto`` (the default: pyogrio for layers of
#: at least :data:`PYOGRIO_MIN_FEATURES` features), ``fiona`` (always), ``pyogrio`` (whenever it
#: is installed, for every layer: the tests run both readers this way).
READER_VARIABLE = "AREAMC_READER"
_READERS = ("auto", "fiona", "pyogrio")
#: fiona's field types whose values pyogrio returns exactly as fiona does (text, whole numbers,
#: double-precision reals); a layer with any other field type (date, bool, binary, float32) is read by fiona.
_PLAIN_FIELD = re.compile(r"(str|int|int16|int32|int64|float)(:[0-9.]+)?$")


def _use_pyogrio(declared: int | None) -> bool:
    """Whether to try pyogrio for a layer that declares `declared` features (:data:`READER_VARIABLE`)."""
    choice = os.environ.get(READER_VARIABLE, "auto").strip().lower() or "auto"
    if choice not in _READERS:
        raise OptionError(f"{READER_VARIABLE}={choice!r}: choose one of {', '.join(_READERS)}")
    if choice == "fiona":
        return False
    if choice == "pyogrio":
        return True
    return declared is not None and declared >= PYOGRIO_MIN_FEATURES


def _pyogrio_records(target, layer, encoding, options, schema, declared) -> list | None:
    """The layer's records read through pyogrio (feature id, shapely geometry, attributes), or None
    when fiona must read them.

    pyogrio reads the whole layer in one call and its geometries as WKB, so a large layer reads
    several times faster (benchmarks/read_speed.py).  It gives the records fiona gives only on a
    clean read, so any doubt hands the layer back to fiona, whose reading names the feature at
    fault: pyogrio not installed; a field type other than text, whole number or double
    (:data:`_PLAIN_FIELD`); any error, warning or log record while reading; other field names
    or another feature count than fiona declares; a null in a number field (pyogrio gives NaN
    where fiona gives None); a geometry shapely cannot decode.
    """
    if any(not _PLAIN_FIELD.match(kind) for _, kind in schema):
        return None
    try:
        import pyogrio.raw
    except ImportError:
        return None
    logged: list = []
    handler = _Collect(lambda record: logged.append(record))
    logger = logging.getLogger("pyogrio")
    logger.addHandler(handler)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            meta, fids, wkb, columns = pyogrio.raw.read(target, layer=layer, encoding=encoding, return_fids=True,
                                                        **options)
            geoms = shapely.from_wkb(wkb)
    except Exception:  # noqa: BLE001 - any failure: fiona reads the layer and names what is wrong
        return None
    finally:
        logger.removeHandler(handler)
    names = [name for name, _ in schema]
    if caught or logged or list(meta["fields"]) != names or (declared is not None and len(fids) != declared):
        return None
    values = []
    for (_, kind), column in zip(schema, columns):
        number = not kind.startswith("str")
        if number and column.dtype.kind not in ("i", "u") and not (
                kind.startswith("float") and column.dtype == np.float64 and not np.isnan(column).any()):
            return None
        if not number and column.dtype != object:
            return None
        values.append(column.tolist())
    props = [dict(zip(names, row)) for row in zip(*values)] if names else [{} for _ in range(len(fids))]
    return list(zip([str(fid) for fid in fids.tolist()], geoms.tolist(), props))


# ------------------------------------------------------------------------- GeoParquet and GeoDataFrames

_PARQUET_EXTENSIONS = (".parquet", ".geoparquet")


def _is_parquet(text: str) -> bool:
    return text.lower().endswith(_PARQUET_EXTENSIONS)


def _parquet_layer_name(text: str) -> str:
    return os.path.splitext(os.path.basename(text.rstrip("/")))[0]


def _read_parquet(path, *, layer, id_field, input_crs, kind, encoding, allow_duplicate_ids, describing,
                  options) -> Layer:
    """A GeoParquet file (GeoParquet 1.0/1.1 metadata, WKB or native encodings) read with
    ``geopandas.read_parquet``; its one layer is named after the file.  The CRS is the file's
    (a file whose metadata names none is OGC:CRS84 by the GeoParquet specification)."""
    name = _parquet_layer_name(path)
    if not is_network_path(path) and not os.path.exists(path):
        raise LayerError(f"{path}: no such file")
    if options:
        raise OptionError("{param}: a GeoParquet file is read by geopandas, not GDAL, and takes no open options",
                          param="open_options")
    if encoding is not None:
        raise OptionError("{param}: a GeoParquet file's text is UTF-8 by its format and takes no encoding",
                          param="encoding")
    if layer is not None and layer != name:
        raise LayerError(f"{path}: no layer named {layer!r}; a GeoParquet file holds one layer, {name!r}")
    try:
        import geopandas
        import pyarrow  # noqa: F401 - geopandas reads Parquet through it
    except ImportError as err:
        raise LayerError(f"{path}: {_FORMAT_HINTS['.parquet']}") from err
    try:
        frame = geopandas.read_parquet(path)
    except Exception as err:  # noqa: BLE001 - pyarrow's and geopandas's errors, wrapped
        if "geo metadata" in str(err).lower():
            raise LayerError(f"{path}: a Parquet file without GeoParquet metadata (no 'geo' key in its schema), "
                             "so no column is known to hold geometries") from err
        raise LayerError(f"{path}: not a readable GeoParquet file, or a truncated or damaged one "
                         f"({_short(err)})") from err
    return _frame_layer(frame, path, name, id_field=id_field, input_crs=input_crs, kind=kind,
                        allow_duplicate_ids=allow_duplicate_ids, describing=describing, what="the file")


def _frame_type(obj) -> str | None:
    """"GeoDataFrame", "GeoSeries", "pandas" (a frame without geometry) or None, without importing geopandas."""
    gpd = sys.modules.get("geopandas")
    if gpd is not None:
        if isinstance(obj, gpd.GeoDataFrame):
            return "GeoDataFrame"
        if isinstance(obj, gpd.GeoSeries):
            return "GeoSeries"
    pd = sys.modules.get("pandas")
    if pd is not None and isinstance(obj, (pd.DataFrame, pd.Series)):
        return "pandas"
    return None


def _frame_layer(frame, path: str, layer: str, *, id_field, input_crs, kind, allow_duplicate_ids, describing,
                 what: str) -> Layer:
    """A :class:`Layer` from a geopandas GeoDataFrame or GeoSeries, in its CRS (``frame.crs``).

    Features are labelled by the index (or `id_field`, a column); every other column becomes
    an attribute, missing values (NaN, None, NaT) as None, numpy scalars as Python numbers,
    timestamps and dates as ISO 8601 text (as fiona gives them).  The geometries get the checks
    and repairs a file's would.
    """
    series = frame if _frame_type(frame) == "GeoSeries" else None
    if series is None:
        try:
            series = frame.geometry
        except AttributeError as err:
            raise LayerError(f"{path}: has no active geometry column; set one with set_geometry") from err
    crs = _choose_crs(series.crs, path, input_crs, what=what)
    columns = [] if series is frame else [c for c in frame.columns if c != series.name]
    labels = [str(c) for c in columns]
    if id_field is not None and id_field not in labels:
        raise LayerError(f"{path}: {{param}} {id_field!r} is not a column; columns: {', '.join(labels) or '(none)'}",
                         param="id_field")
    values = [_column_values(frame[c]) for c in columns]
    n = len(series)
    props = [dict(zip(labels, row)) for row in zip(*values)] if labels else [{} for _ in range(n)]
    geoms = np.asarray(series.values, dtype=object)
    records = list(zip([str(v) for v in frame.index.tolist()], geoms, props))
    fields = tuple((label, _dtype_field(frame[c].dtype)) for label, c in zip(labels, columns))
    return _build_layer(path, layer, crs, records, id_field, kind, allow_duplicate_ids, fields=fields,
                        describing=describing)


def _column_values(column) -> list:
    """A pandas column's values as plain Python values, missing ones as None."""
    missing = column.isna().tolist()
    return [None if gone else _plain(v) for v, gone in zip(column.tolist(), missing)]


def _plain(value):
    """A value as fiona would give it: numpy scalars as Python numbers, dates and times as ISO 8601 text."""
    if isinstance(value, np.generic):
        value = value.item()
    if hasattr(value, "isoformat") and not isinstance(value, str):
        return value.isoformat()
    return value


def _dtype_field(dtype) -> str:
    """A fiona-style field type name for a numpy/pandas dtype."""
    kind = getattr(dtype, "kind", "O")
    return {"b": "bool", "i": "int", "u": "int", "f": "float", "M": "datetime"}.get(kind, "str")


def _memory_fields(properties) -> tuple[tuple[str, str], ...]:
    """Field names (first seen first) and fiona-style types of in-memory attribute records."""
    kinds: dict[str, set] = {}
    for record in properties:
        for name, value in record.items():
            kinds.setdefault(str(name), set())
            if value is not None:
                kinds[str(name)].add("bool" if isinstance(value, bool) else "int" if isinstance(value, int)
                                     else "float" if isinstance(value, float) else "str")
    out = []
    for name, seen in kinds.items():
        out.append((name, seen.pop() if len(seen) == 1 else "float" if seen and seen <= {"int", "float"} else "str"))
    return tuple(out)


def _check_encoding(encoding: str) -> None:
    try:
        codecs.lookup(encoding)
    except (LookupError, TypeError) as err:
        raise OptionError(f"{{param}}: unknown text encoding {encoding!r} (give a name such as utf-8 or latin-1)",
                          param="encoding") from err


def _feature_count(src) -> int | None:
    """The feature count the layer declares, or None when the driver cannot tell without reading."""
    try:
        count = len(src)
    except (TypeError, ValueError, fiona.errors.FionaError):
        return None
    return count if count >= 0 else None


def _check_shapefile_index(path: str, target: str, layer: str) -> None:
    """Refuse a Shapefile whose .shp is shorter than its .shx index says (a truncated or damaged file).

    Each .shx record gives the offset and length (16-bit words) of one
    feature in the .shp (ESRI Shapefile Technical Description, 1998, p. 23);
    a feature that would end past the .shp's last byte was cut off.  GDAL
    reads such a feature as having no geometry, which must not pass for an
    empty feature.  A Shapefile inside a local zip archive (`target` a
    ``/vsizip/`` path) is checked from the archive's member sizes.
    """
    found = _shapefile_index(path, target, layer)
    if found is None:
        return
    shp, size, index = found
    count = max(0, (len(index) - 100) // 8)
    words = struct.unpack(f">{2 * count}i", index[100:100 + 8 * count])
    for i in range(count):
        start, length = 2 * words[2 * i], 2 * words[2 * i + 1]
        end = start + 8 + length
        if start < 100 or length < 0 or end > size:
            raise LayerError(
                f"{shp}: truncated or damaged: its .shx indexes {count} features, but feature {i} "
                f"(bytes {start:,} to {end:,}) does not fit in the .shp's {size:,} bytes"
            )


def _shapefile_index(path: str, target: str, layer: str) -> tuple[str, int, bytes] | None:
    """``(name of the .shp, its size in bytes, the .shx's bytes)`` of a Shapefile layer, local or in a
    local zip archive, or None when there is none to check."""
    parts = _zip_parts(target)
    if parts is not None:
        archive, member = parts
        shp = member if member.lower().endswith(".shp") else "/".join(p for p in (member, layer + ".shp") if p)
        try:
            with zipfile.ZipFile(archive) as z:
                infos = {i.filename.lower(): i for i in z.infolist()}
                shp_info, shx_info = infos.get(shp.lower()), infos.get(shp[:-4].lower() + ".shx")
                if shp_info is None or shx_info is None:
                    return None
                return f"{path} ({shp_info.filename})", shp_info.file_size, z.read(shx_info)
        except (zipfile.BadZipFile, OSError, KeyError):
            return None  # GDAL reports unreadable archives
    if os.path.isdir(path):
        shp = os.path.join(path, layer + ".shp")
    elif path.lower().endswith(".shp"):
        shp = path
    else:
        return None
    stem = shp[:-4]
    shx = next((stem + ext for ext in (".shx", ".SHX") if os.path.exists(stem + ext)), None)
    if shx is None or not os.path.exists(shp):
        return None
    try:
        size = os.path.getsize(shp)
        with open(shx, "rb") as f:
            return shp, size, f.read()
    except OSError:
        return None  # fiona reports unreadable files


class _ReadWatch:
    """What GDAL and fiona report while a layer is read, attributed to the feature being read.

    GDAL errors (CE_Failure and worse) reach Python as ERROR records of the
    ``fiona`` loggers; text fiona cannot decode comes as a WARNING of
    ``fiona.ogrext`` ("Failed to decode ...") with the value set to None; an
    error message GDAL gives in bytes that do not decode reaches
    ``sys.unraisablehook``.  A report made while feature *k* is fetched
    belongs to feature *k*; one after the last feature ends the reading.
    """

    _DECODE = "Failed to decode"

    def __init__(self) -> None:
        self.errors: list[tuple[str | None, str]] = []
        self.undecoded: list[tuple[str | None, str]] = []
        self._pending_errors: list[str] = []
        self._pending_undecoded: list[str] = []
        self._last: str | None = None
        self._handler = _Collect(self._note)
        self._hook = None

    def _note(self, record: logging.LogRecord) -> None:
        message = " ".join(str(record.getMessage()).split())
        if record.levelno >= logging.ERROR:
            self._pending_errors.append(message)
        elif message.startswith(self._DECODE):
            self._pending_undecoded.append(message)

    def _unraisable(self, unraisable) -> None:
        self._pending_errors.append(f"GDAL reported an error in bytes that do not decode ({unraisable.exc_value})")

    def __enter__(self):
        logging.getLogger("fiona").addHandler(self._handler)
        self._hook, sys.unraisablehook = sys.unraisablehook, self._unraisable
        return self

    def __exit__(self, *exc) -> None:
        logging.getLogger("fiona").removeHandler(self._handler)
        sys.unraisablehook = self._hook
        self._flush(None)

    def _flush(self, fid) -> None:
        self.errors += [(fid, m) for m in self._pending_errors]
        self.undecoded += [(fid, m) for m in self._pending_undecoded]
        self._pending_errors, self._pending_undecoded = [], []

    def read(self, fid) -> None:
        """Feature `fid` has just been read: what was reported since the last one is its."""
        self._flush(str(fid))
        self._last = str(fid)

    def check(self, path: str, read: int, declared: int | None, encoding: str | None) -> None:
        """Refuse the file if anything was reported (damage first, then undecodable text)."""
        if self.errors:
            fid, message = self.errors[0]
            where = f"reading feature {fid}" if fid is not None else (
                f"after feature {self._last}" if self._last is not None else "before the first feature")
            more = f" ({len(self.errors)} read errors in all)" if len(self.errors) > 1 else ""
            raise LayerError(f"{path}: truncated or damaged file: GDAL failed {where}: {message}{more}")
        if declared is not None and read != declared:
            raise LayerError(f"{path}: truncated or damaged file: the layer declares {declared} features "
                             f"but only {read} could be read")
        if self.undecoded:
            fid, message = self.undecoded[0]
            codec = f"as {encoding!r}" if encoding else "with the file's declared encoding (a Shapefile's .cpg)"
            raise LayerError(
                f"{path}: feature {fid}: attribute text cannot be decoded {codec} ({message}); "
                f"name the encoding it is in with {{param}}, for example latin-1", param="encoding"
            )


class _Collect(logging.Handler):
    def __init__(self, note) -> None:
        super().__init__(logging.WARNING)
        self._note_record = note

    def emit(self, record: logging.LogRecord) -> None:
        self._note_record(record)


def _build_layer(path, layer, crs, records, id_field, kind, allow_duplicate_ids=False, *, fields=(),
                 describing=False, hint=None) -> Layer:
    """Turn records into a :class:`Layer`: geometries made and checked for the whole layer at once.

    A record's geometry is a GeoJSON-like mapping (fiona's), a shapely geometry or None.
    `hint` (text and the parameters it names) ends the refusal of a layer whose every
    feature is empty: how to give a CSV's geometry.

    Each record becomes a shapely geometry; the checks on coordinates and
    rings (:func:`_layer_problems`), the antimeridian and pole test, the
    validity test and dropping Z run over the layer's arrays, so a layer of
    many features costs little more than reading it.  The first feature at
    fault, in file order, is named.
    """
    source = f"{path} (layer {layer})"
    labels, shaped, props, positions = [], [], [], []
    problems: dict[int, str] = {}
    for position, (fid, geometry, properties) in enumerate(records):
        label = _label(fid, properties, id_field, path)
        geom, problem = _shape(geometry)
        if problem is not None:
            problems.setdefault(len(labels), problem)
        labels.append(label)
        shaped.append(geom)
        props.append(properties)
        positions.append(position)
    geoms = np.array(shaped, dtype=object)
    for n, problem in _layer_problems(geoms, crs).items():
        problems.setdefault(n, problem)
    if problems:
        first = min(problems)
        raise LayerError(f"{source}: feature {labels[first]}: {problems[first]}")
    types: Counter = Counter()
    ids, kept, kept_props, indices = [], [], [], []
    repaired, empty, skipped = [], [], []
    skipped_types: Counter = Counter()
    missing = np.array([g is None for g in geoms], dtype=bool)
    blank = missing.copy()
    blank[~missing] = shapely.is_empty(geoms[~missing])
    type_names = np.full(len(geoms), "(empty)", dtype=object)
    type_names[~blank] = [g.geom_type for g in geoms[~blank]]
    fits = np.array([not b and _fits_type(t, kind) for b, t in zip(blank, type_names)], dtype=bool)
    work = np.flatnonzero(fits)
    flat = shapely.force_2d(geoms[work]) if work.size else geoms[work]
    flat = globe.normalize_many(flat, crs, lambda i: f"{source}: feature {labels[work[i]]}")
    polygonal = np.isin(np.array([g.geom_type for g in flat], dtype=object), list(_POLYGONAL))
    valid = np.ones(len(flat), dtype=bool)
    if polygonal.any():
        valid[polygonal] = shapely.is_valid(flat[polygonal])
    fixed = dict(zip(work, flat))
    invalid = set(work[~valid].tolist())
    for n in range(len(geoms)):
        label = labels[n]
        if blank[n]:
            types["(empty)"] += 1
            empty.append(label)
            continue
        types[type_names[n]] += 1
        if not fits[n]:
            skipped.append(label)
            skipped_types[type_names[n]] += 1
            continue
        geom = fixed[n]
        if n in invalid:
            geom = _repair(geom)
            repaired.append(label)
            if geom.is_empty:
                empty.append(label)
                continue
        ids.append(label)
        kept.append(geom)
        kept_props.append(props[n])
        indices.append(positions[n])
    wanted = {"polygon": "polygons", "point": "points"}.get(kind, "polygons or points")
    if not ids:
        if hint is not None and set(types) <= {"(empty)"}:
            raise LayerError(f"{source}: no {wanted} to work with ({_describe(types)}); {hint[0]}", params=hint[1])
        raise LayerError(f"{source}: no {wanted} to work with ({_describe(types)})")
    _check_duplicates(source, ids, id_field, allow_duplicate_ids, describing)
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
            f"{source}: skipped {len(skipped)} feature(s) that are not {wanted} "
            f"({_counts(skipped_types)}): " + _some(skipped),
            AreamcWarning,
            stacklevel=3,
        )
    out = np.empty(len(kept), dtype=object)
    out[:] = kept
    return Layer(
        path=path,
        layer=layer,
        crs=crs,
        ids=tuple(ids),
        geometries=out,
        properties=tuple(kept_props),
        kind=_kind_of(kind, kept),
        geometry_types=dict(types),
        repaired=tuple(repaired),
        empty=tuple(empty),
        skipped=tuple(skipped),
        indices=tuple(indices),
        fields=tuple(fields),
    )


def _shape(geometry) -> tuple[object, str | None]:
    """A record's shapely geometry (None when it has none), or the reason it cannot be made."""
    if geometry is None or isinstance(geometry, shapely.Geometry):
        return geometry, None
    data = getattr(geometry, "__geo_interface__", geometry)
    try:
        return shape(data), None
    except (ValueError, TypeError, AttributeError, KeyError, shapely.errors.GEOSException) as err:
        short = _short_ring(data)
        if short is not None:
            return None, f"a polygon ring of {short} distinct point(s); a ring needs at least 3"
        return None, f"unreadable geometry ({_short(err)})"


def _layer_problems(geoms: np.ndarray, crs: pyproj.CRS) -> dict[int, str]:
    """The first problem of every feature at fault, by position in `geoms`.

    Bad coordinates (:func:`_coordinate_problems`) come before polygon
    rings of fewer than 3 distinct points (:func:`_short_rings`).
    """
    present = np.flatnonzero([g is not None for g in geoms])
    if not present.size:
        return {}
    sub = geoms[present]
    problems = {int(present[k]): text for k, text in _coordinate_problems(sub, crs).items()}
    for k, short in _short_rings(sub).items():
        problems.setdefault(int(present[k]), f"a polygon ring of {short} distinct point(s); a ring needs at least 3")
    return problems


def _first_per_owner(owner: np.ndarray, mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For each owner with a True in `mask`: (owner, index of its first True)."""
    hit = np.flatnonzero(mask)
    owners, first = np.unique(owner[hit], return_index=True)
    return owners, hit[first]


def _coordinate_problems(geoms: np.ndarray, crs: pyproj.CRS) -> dict[int, str]:
    """Non-finite coordinates, and coordinates no real data in `crs` can have, per feature (its first one).

    Geographic CRSs: longitude within ±360° (0..360 data is accepted),
    latitude within ±90°.  Projected CRSs: within :data:`MAX_PLANE_COORDINATE_M`
    metres of the origin, in the CRS's own unit.
    """
    xy, owner = shapely.get_coordinates(geoms, return_index=True)
    if not xy.size:
        return {}
    problems: dict[int, str] = {}
    finite = np.isfinite(xy).all(axis=1)
    for k, i in zip(*_first_per_owner(owner, ~finite)):
        x, y = xy[i]
        problems[int(k)] = f"coordinate ({x:g}, {y:g}) is not a finite number"
    with np.errstate(invalid="ignore"):
        if crs.is_geographic:
            bad = finite & ((np.abs(xy[:, 0]) > _MAX_LON_DEG) | (np.abs(xy[:, 1]) > _MAX_LAT_DEG))
            text = (f"lies outside longitude ±{_MAX_LON_DEG:g}° / latitude ±{_MAX_LAT_DEG:g}° of {crs.name}")
        else:
            factor = (crs.axis_info[0].unit_conversion_factor if crs.axis_info else 1.0) or 1.0
            bad = finite & (np.abs(xy).max(axis=1) * factor > MAX_PLANE_COORDINATE_M)
            text = f"lies more than {MAX_PLANE_COORDINATE_M / 1000:,.0f} km from the origin of {crs.name}"
    for k, i in zip(*_first_per_owner(owner, bad)):
        x, y = xy[i]
        problems.setdefault(int(k), f"coordinate ({x:g}, {y:g}) {text}")
    return problems


def _short_rings(geoms: np.ndarray) -> dict[int, int]:
    """Features with a polygon ring of 1 or 2 distinct points: {position: distinct points of its first such ring}."""
    parts, part_owner = shapely.get_parts(geoms, return_index=True)
    polygon = shapely.get_type_id(parts) == 3  # 3: Polygon (shapely.GeometryType.POLYGON)
    if not polygon.any():
        return {}
    rings, ring_part = shapely.get_rings(parts[polygon], return_index=True)
    ring_owner = part_owner[polygon][ring_part]
    xy, ring_of = shapely.get_coordinates(rings, return_index=True)
    if not xy.size:
        return {}
    order = np.lexsort((xy[:, 1], xy[:, 0], ring_of))
    r, x, y = ring_of[order], xy[order, 0], xy[order, 1]
    new = np.ones(len(r), dtype=bool)
    new[1:] = (r[1:] != r[:-1]) | (x[1:] != x[:-1]) | (y[1:] != y[:-1])
    distinct = np.bincount(r[new], minlength=len(rings))
    short = np.flatnonzero((distinct > 0) & (distinct < 3))
    out: dict[int, int] = {}
    for ring in short:  # ascending ring order: a feature's first short ring comes first
        out.setdefault(int(ring_owner[ring]), int(distinct[ring]))
    return out


def _fits_type(geom_type: str, kind: str) -> bool:
    if kind == "polygon":
        return geom_type in _POLYGONAL
    if kind == "point":
        return geom_type in _PUNCTUAL
    return geom_type in _POLYGONAL or geom_type in _PUNCTUAL


def _kind_of(kind: str, geoms) -> str:
    """The kind of a layer of kept geometries: as asked, or for "any" decided over every feature."""
    if kind != "any":
        return kind
    points = sum(g.geom_type in _PUNCTUAL for g in geoms)
    if points == len(geoms):
        return "point"
    return "polygon" if points == 0 else "mixed"


def _short_ring(data) -> int | None:
    """Distinct points of the first polygon ring in a GeoJSON-like mapping that has only 1 or 2, else None."""
    data = getattr(data, "__geo_interface__", data)
    try:
        kind = data.get("type")
    except AttributeError:
        return None
    if kind == "GeometryCollection":
        for part in data.get("geometries") or ():
            short = _short_ring(part)
            if short is not None:
                return short
        return None
    polygons = [data.get("coordinates")] if kind == "Polygon" else data.get("coordinates") if kind == "MultiPolygon" else ()
    for rings in polygons or ():
        for ring in rings or ():
            distinct = len({tuple(p)[:2] for p in ring})
            if 0 < distinct < 3:
                return distinct
    return None


def _check_duplicates(source: str, ids: list[str], id_field: str | None, allowed: bool,
                      describing: bool = False) -> None:
    """Refuse ids that label more than one kept feature, naming a few; with `allowed` or
    `describing`, warn instead (:func:`_duplicates_warning`)."""
    counts = Counter(ids)
    repeated = [value for value, n in counts.items() if n > 1]
    if not repeated:
        return
    what = f"{{id_field}} {id_field!r} has duplicate values" if id_field else "duplicate ids"
    params = ("id_field", "allow_duplicate_ids") if id_field else ("allow_duplicate_ids",)
    if not (allowed or describing):
        raise LayerError(f"{source}: {what}: {_repeats(counts, repeated, _DUPLICATES_NAMED)}; ids must tell "
                         "features apart, or pass {allow_duplicate_ids} to keep them (rows then carry "
                         "feature_index)", params=params)
    warnings.warn(_duplicates_warning(source, what, counts, repeated, id_field, describing, params), stacklevel=4)


def _repeats(counts: Counter, repeated: list[str], most: int) -> str:
    """The first `most` repeated values with their feature counts, the rest counted ("and N more")."""
    named = ", ".join(f"{value!r} ({counts[value]} features)" for value in repeated[:most])
    if len(repeated) > most:
        named += f" and {len(repeated) - most} more"
    return named


def _duplicates_warning(source, what, counts, repeated, id_field, describing, params) -> AreamcWarning:
    """The one wording of the warning on kept duplicate ids, for every command.

    It names the field, how many values repeat and up to :data:`_DUPLICATES_WARNED` of them,
    and says that results could not be joined back by that field.  A layer kept by
    ``allow_duplicate_ids`` says its rows are told apart by ``feature_index``; a layer only
    described (``describing``) says that the other jobs refuse the field without that parameter.
    """
    n = len(repeated)
    repeat = f"{n} value repeats" if n == 1 else f"{n} values repeat"
    by = repr(id_field) if id_field else "id"
    named = _repeats(counts, repeated, _DUPLICATES_WARNED)
    joined = f"{repeat}, so results could not be joined back by {by}"
    if describing:
        text = f"{source}: {what}: {named}; {joined}; other jobs refuse it unless given {{allow_duplicate_ids}}"
    else:
        text = f"{source}: {what}: {named}; kept ({{allow_duplicate_ids}}): {joined}; rows tell them apart by feature_index"
    return AreamcWarning(text, params=params)


def _counts(types: Counter) -> str:
    return ", ".join(f"{n} {t}" for t, n in sorted(types.items()))


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
            try:
                declared = pyproj.CRS.from_wkt(wkt)
            except pyproj.exceptions.CRSError as err:
                if input_crs is None:
                    raise CRSError(f"{path}: the file's CRS cannot be read ({_short(err)}); state it with {{param}}",
                                   param="input_crs") from err
    return _choose_crs(declared, path, input_crs)


def _choose_crs(declared: pyproj.CRS | None, path: str, input_crs, what: str = "the file") -> pyproj.CRS:
    """The CRS of a layer: `input_crs` when given (warning when it overrides another declared CRS),
    else the `declared` one, which must exist and be tied to the Earth; `what` names the source."""
    if input_crs is not None:
        given = input_crs if isinstance(input_crs, pyproj.CRS) else parse_crs(input_crs, "input_crs")
        _check_earth_crs(given, "{param}", "input_crs")
        if declared is not None and not declared.equals(given, ignore_axis_order=True):
            warnings.warn(
                AreamcWarning(f"{path}: {{param}} {given.name!r} overrides {what}'s CRS {declared.name!r}",
                              param="input_crs"),
                stacklevel=5,
            )
        return given
    if declared is None:
        raise CRSError(f"{path}: {what} declares no CRS; state it with {{param}} (e.g. EPSG:4326)", param="input_crs")
    _check_earth_crs(declared, f"{path}: {what}'s CRS", "input_crs")
    return declared


def _check_earth_crs(crs: pyproj.CRS, what: str, param: str) -> None:
    """Refuse a CRS that is neither geographic nor projected (an engineering LOCAL_CS, geocentric, vertical).

    Such coordinates cannot be placed on the ellipsoid, so no equal-area plane
    or geodesic area can be computed from them.
    """
    if crs.is_geographic or crs.is_projected:
        return
    kinds = {
        "Engineering CRS": "an engineering (local) CRS, not tied to the Earth",
        "Geocentric CRS": "a geocentric CRS (x, y, z from the Earth's centre)",
        "Vertical CRS": "a vertical CRS (heights only)",
    }
    kind = kinds.get(crs.type_name, f"a {crs.type_name}, neither geographic nor projected")
    raise CRSError(f"{what} {crs.name!r} is {kind}; areamc cannot place it on the ellipsoid; "
                   "state the geographic or projected CRS the coordinates are in with {param}", param=param)


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
    allow_duplicate_ids: bool = True,
    properties=None,
) -> Layer:
    """Build a :class:`Layer` from shapely geometries already in memory.

    Geometries are given in `crs` (EPSG code, PROJ string, WKT or CRS); they
    get the same checks, repair and empty-geometry handling as a file would.
    `ids` are the caller's own labels, so repeats are kept (rows tell them
    apart by ``feature_index``); ``allow_duplicate_ids=False`` refuses them
    as :func:`read_layer` does by default.  `properties`, one mapping per
    geometry, are the features' attributes (a reach in metres for
    :func:`~areamc.zones.zones_from_points`, say); the layer's ``fields`` are
    inferred from their values.  A GeoDataFrame goes to :func:`read_layer`,
    which keeps its CRS and columns.
    """
    geoms = list(geometries)
    if ids is None:
        ids = [str(i) for i in range(len(geoms))]
    ids = [str(i) for i in ids]
    if len(ids) != len(geoms):
        raise LayerError(f"{name}: {len(ids)} ids for {len(geoms)} geometries")
    if properties is None:
        props = [{} for _ in geoms]
    else:
        props = list(properties)
        if len(props) != len(geoms):
            raise OptionError(f"{name}: {{param}} holds {len(props)} records for {len(geoms)} geometries",
                              param="properties")
        for n, record in enumerate(props):
            if not isinstance(record, Mapping):
                raise OptionError(f"{name}: {{param}}[{n}] is a {type(record).__name__}, not a mapping of field "
                                  "names to values", param="properties")
        props = [{str(k): _plain(v) for k, v in record.items()} for record in props]
    crs = crs if isinstance(crs, pyproj.CRS) else parse_crs(str(crs), "crs")
    _check_earth_crs(crs, "{param}", "crs")
    records = list(zip(ids, geoms, props))
    return _build_layer(name, "memory", crs, records, None, kind, allow_duplicate_ids,
                        fields=_memory_fields(props))
