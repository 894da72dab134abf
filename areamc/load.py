"""Read vector layers with fiona into plain shapely geometries.

This is the first step of every command: it validates the file, the layer and
the id field, reads the CRS, repairs invalid polygons and sets empty ones
aside, and returns a frozen :class:`Layer`.  A truncated or damaged file
(Shapefile index against its .shp, SQLite's check of a GeoPackage, errors
GDAL reports while reading), text that does not decode, malformed geometries
and repeated ids are refused, each naming the file and the feature.  Geometries stay in the layer's
own CRS; projection is :mod:`areamc.project`'s job.
"""

from __future__ import annotations

import codecs
import logging
import os
import sqlite3
import struct
import sys
import urllib.parse
import warnings
from collections import Counter
from dataclasses import dataclass, field

import fiona
import fiona.errors
import numpy as np
import pyproj
import shapely
from shapely.geometry import shape

from .errors import AreamcNotice, AreamcWarning, CRSError, LayerError, OptionError
from . import globe

__all__ = ["Layer", "read_layer", "list_layers", "parse_crs", "layer_from_geometries", "MAX_PLANE_COORDINATE_M"]

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
        empty for a layer built in memory.
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


def list_layers(path: str) -> list[str]:
    """Return the layer names of a vector file, or raise :class:`LayerError`.

    A GeoPackage (any SQLite database) must first pass SQLite's own
    integrity check (:func:`_check_sqlite`).
    """
    _check_exists(path)
    _check_sqlite(path)
    try:
        return list(fiona.listlayers(path))
    except (fiona.errors.FionaError, OSError, ValueError) as err:
        raise LayerError(f"{path}: not a readable vector file, or a truncated or damaged one ({_short(err)})") from err


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
    path: str | os.PathLike,
    *,
    layer: str | None = None,
    id_field: str | None = None,
    input_crs: str | pyproj.CRS | None = None,
    kind: str = "polygon",
    encoding: str | None = None,
    allow_duplicate_ids: bool = False,
    describing: bool = False,
) -> Layer:
    """Read a polygon (or point) layer.

    Parameters
    ----------
    path : str or path-like
        Any vector file fiona opens (Shapefile, GeoPackage, GeoJSON, ...).
    layer : str, optional
        Layer name, for files with several layers; default the first layer,
        with an :class:`~areamc.errors.AreamcWarning` naming it and the others.
    id_field : str, optional
        Attribute used to label features; default the feature id.
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

    Returns
    -------
    Layer
        Geometries in the layer's CRS (units of that CRS: degrees for
        geographic CRSs, usually metres for projected ones).

    Raises
    ------
    LayerError
        Missing, unreadable, truncated or damaged file; unknown layer or id
        field; text that does not decode; malformed geometries (a ring of
        fewer than 3 points, coordinates that are not finite or lie beyond
        ±360°/±90° or :data:`MAX_PLANE_COORDINATE_M`); duplicate ids; no
        usable features.
    CRSError
        No CRS in the file and none given, an unknown ``input_crs``, or a CRS
        not tied to the Earth (an engineering ``LOCAL_CS``).
    """
    path = os.fspath(path)
    names = list_layers(path)
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
    if encoding is not None:
        _check_encoding(encoding)
    _check_shapefile_index(path, layer)
    watch = _ReadWatch()
    try:
        with watch, fiona.open(path, layer=layer, encoding=encoding) as src:
            crs = _layer_crs(src, path, input_crs)
            schema = tuple((str(k), str(v)) for k, v in src.schema.get("properties", {}).items())
            fields = [name for name, _ in schema]
            if id_field is not None and id_field not in fields:
                raise LayerError(
                    f"{path}: {{param}} {id_field!r} is not a field of layer {layer!r}; "
                    f"fields: {', '.join(fields) or '(none)'}", param="id_field"
                )
            declared = _feature_count(src)
            records = []
            for feat in src:
                records.append((feat.id, feat.geometry, dict(feat.properties)))
                watch.read(feat.id)
    except (fiona.errors.FionaError, OSError, ValueError, LookupError) as err:
        raise LayerError(f"{path}: cannot read layer {layer!r} ({_short(err)})") from err
    watch.check(path, len(records), declared, encoding)
    return _build_layer(path, layer, crs, records, id_field, kind, allow_duplicate_ids, fields=schema,
                        describing=describing)


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


def _check_shapefile_index(path: str, layer: str) -> None:
    """Refuse a Shapefile whose .shp is shorter than its .shx index says (a truncated or damaged file).

    Each .shx record gives the offset and length (16-bit words) of one
    feature in the .shp (ESRI Shapefile Technical Description, 1998, p. 23);
    a feature that would end past the .shp's last byte was cut off.  GDAL
    reads such a feature as having no geometry, which must not pass for an
    empty feature.
    """
    if os.path.isdir(path):
        shp = os.path.join(path, layer + ".shp")
    elif path.lower().endswith(".shp"):
        shp = path
    else:
        return
    stem = shp[:-4]
    shx = next((stem + ext for ext in (".shx", ".SHX") if os.path.exists(stem + ext)), None)
    if shx is None or not os.path.exists(shp):
        return
    try:
        size = os.path.getsize(shp)
        with open(shx, "rb") as f:
            index = f.read()
    except OSError:
        return  # fiona reports unreadable files
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
                 describing=False) -> Layer:
    """Turn records into a :class:`Layer`: geometries made and checked for the whole layer at once.

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
    if geometry is None:
        return None, None
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
    if input_crs is not None:
        given = input_crs if isinstance(input_crs, pyproj.CRS) else parse_crs(input_crs, "input_crs")
        _check_earth_crs(given, "{param}", "input_crs")
        if declared is not None and not declared.equals(given, ignore_axis_order=True):
            warnings.warn(
                AreamcWarning(f"{path}: {{param}} {given.name!r} overrides the file's CRS {declared.name!r}",
                              param="input_crs"),
                stacklevel=4,
            )
        return given
    if declared is None:
        raise CRSError(f"{path}: the file declares no CRS; state it with {{param}} (e.g. EPSG:4326)", param="input_crs")
    _check_earth_crs(declared, f"{path}: the file's CRS", "input_crs")
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
    allow_duplicate_ids: bool = True,
) -> Layer:
    """Build a :class:`Layer` from shapely geometries already in memory.

    Geometries are given in `crs` (EPSG code, PROJ string, WKT or CRS); they
    get the same checks, repair and empty-geometry handling as a file would.
    `ids` are the caller's own labels, so repeats are kept (rows tell them
    apart by ``feature_index``); ``allow_duplicate_ids=False`` refuses them
    as :func:`read_layer` does by default.
    """
    geoms = list(geometries)
    if ids is None:
        ids = [str(i) for i in range(len(geoms))]
    ids = [str(i) for i in ids]
    if len(ids) != len(geoms):
        raise LayerError(f"{name}: {len(ids)} ids for {len(geoms)} geometries")
    crs = crs if isinstance(crs, pyproj.CRS) else parse_crs(str(crs), "crs")
    _check_earth_crs(crs, "{param}", "crs")
    records = [
        (i, None if g is None else shapely.geometry.mapping(g), {}) for i, g in zip(ids, geoms)
    ]
    return _build_layer(name, "memory", crs, records, None, kind, allow_duplicate_ids)
