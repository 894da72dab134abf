"""Render result rows as a table, CSV or JSON, describe their fields, and write files atomically.

This module only formats: it receives rows as dicts with areas in m² and
converts the columns it is told hold areas into the chosen unit.  Files are
written to a temporary name beside the target and renamed into place, so a
failed run never leaves a partial file; an :class:`OutputBatch` renames
several files only once all are written.  :func:`check_output_path` refuses,
before any work, an output path that would replace an input or one of its
sidecar files, or that cannot be written; :func:`check_output_paths` does so for
every file a run writes (a CSV's metadata sidecar, a Shapefile's parts).

Fields are described by :func:`record_types` (their type, from the row records'
annotations, whatever values a run happens to give) and :func:`field_units`; a
CSV file gets a sidecar ``NAME.csv-metadata.json`` in the W3C "CSV on the Web"
form (:func:`csv_metadata`).
"""

from __future__ import annotations

import csv
import dataclasses
import io
import json
import math
import numbers
import os
import shutil
import tempfile
from contextlib import contextmanager, nullcontext
from typing import Iterable, Mapping, Sequence

from .errors import OptionError
from .units import area_factor

__all__ = [
    "FORMATS",
    "Column",
    "convert_rows",
    "render",
    "render_fields",
    "table",
    "write_text",
    "check_output_path",
    "dataset_files",
    "OutputBatch",
    "cannot_write",
    "format_number",
    "decimals_for",
    "legend",
    "wrap",
    "WIDTH",
    "SHAPEFILE_PARTS",
    "SQLITE_SIDECARS",
    "TEXT_EXTENSIONS",
    "FEATURE_EXTENSIONS",
    "record_types",
    "value_type",
    "is_boolean",
    "field_units",
    "csv_metadata",
    "metadata_path",
    "output_files",
    "check_output_paths",
    "write_json",
    "json_safe",
]

FORMATS = ("table", "csv", "json")
#: Extensions of the text outputs and the format each holds (None: the one ``--format`` names, a
#: table by default).
TEXT_EXTENSIONS = {".csv": "csv", ".json": "json", ".txt": None, "": None}
#: Extensions of the feature outputs (:mod:`areamc.vector` writes them).
FEATURE_EXTENSIONS = (".gpkg", ".geojson", ".shp", ".fgb")


class Column:
    """A column of a result table: field name, heading, unit handling and rounding.

    `heading` is the field name, or (in a table with a prefix, see :func:`table`) the field
    name without that prefix.  `area` marks a field holding an area (m², converted to
    ``--units``), `per_area` one holding a density per m² (converted to per ``--units``).
    `error` names the field holding the standard error of this column's value, in the same
    unit, or is a callable of the (converted) row giving it: the value is then rounded to
    the error's two leading digits (:func:`decimals_for`).  `spec` is a fixed format used
    when there is no error to round to.
    """

    __slots__ = ("field", "heading", "area", "per_area", "spec", "error")

    def __init__(
        self, field: str, heading: str | None = None, *, area: bool = False, per_area: bool = False,
        spec: str | None = None, error=None,
    ) -> None:
        self.field = field
        self.heading = heading or field
        self.area = area
        self.per_area = per_area
        self.spec = spec
        self.error = error

    def error_of(self, row: dict) -> float | None:
        """The standard error that rounds this column's value in `row`, or None."""
        if self.error is None:
            return None
        value = self.error(row) if callable(self.error) else row.get(self.error)
        if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value) and value > 0:
            return float(value)
        return None

    def text(self, value, decimals: int | None = None) -> str:
        """The table cell for `value`: with `decimals` (from the error, see :meth:`cells`), that many."""
        if isinstance(value, float) and math.isfinite(value):
            if decimals is not None:
                return _no_negative_zero(f"{value:,.{decimals}f}")
            if self.spec:
                return _no_negative_zero(format(value, self.spec))
        return format_number(value)

    def cells(self, rows: Sequence[dict]) -> list[str]:
        """The column's cells for `rows`, each rounded to its row's error; a row whose error is zero
        or missing (an exact or empty row) gets the column's fixed format, or else the fewest
        decimals any other row of the column got."""
        if self.error is None:
            return [self.text(row.get(self.field)) for row in rows]
        errors = [self.error_of(row) for row in rows]
        decimals = [None if e is None else decimals_for(e) for e in errors]
        known = [d for d in decimals if d is not None]
        if not known and not self.spec:  # no row has an error (all exact): no trailing zeros
            return [_trim(self.text(row.get(self.field))) for row in rows]
        fallback = None if self.spec else min(known)
        return [self.text(row.get(self.field), fallback if d is None else d) for row, d in zip(rows, decimals)]


#: Significant digits of a standard error kept in tables: two (common practice in reporting
#: measurements, e.g. Taylor & Kuyatt 1994, NIST Technical Note 1297, §7).
ERROR_DIGITS = 2


def decimals_for(error: float) -> int:
    """Decimals that keep the first :data:`ERROR_DIGITS` significant digits of `error` (> 0).

    >>> decimals_for(0.62), decimals_for(0.0022), decimals_for(37.0), decimals_for(1234.0)
    (2, 4, 0, 0)
    """
    return max(0, ERROR_DIGITS - 1 - int(math.floor(math.log10(error))))


def _trim(text: str) -> str:
    """``5,122.000`` becomes ``5,122`` and ``0.2500`` becomes ``0.25``: no trailing zeros after a decimal point."""
    if "." in text and "e" not in text and text[-1:].isdigit():
        text = text.rstrip("0").rstrip(".")
    return text


def _no_negative_zero(text: str) -> str:
    """``-0.00`` becomes ``0.00``: a value that rounds to zero carries no sign."""
    if text.startswith("-") and not any(ch in "123456789" for ch in text):
        return text[1:]
    return text


def convert_rows(rows: Iterable[dict], columns: Sequence[Column], units: str) -> list[dict]:
    """Return copies of `rows` with area columns divided by the unit's m² and
    per-area columns (densities per m²) multiplied by it (see :mod:`areamc.units`)."""
    factor = area_factor(units)
    scale = {c.field: 1 / factor for c in columns if c.area}
    scale.update({c.field: factor for c in columns if c.per_area})
    out = []
    for row in rows:
        new = dict(row)
        for key, s in scale.items():
            value = new.get(key)
            if isinstance(value, (int, float)) and not isinstance(value, bool):
                new[key] = value * s
        out.append(new)
    return out


def format_number(value) -> str:
    """Format a value for the table: 7 significant digits (whole numbers in full), ``-`` for None."""
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else ""
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        if value == 0:
            return "0"
        if abs(value) >= 1e15 or abs(value) < 1e-3:
            return f"{value:.6e}"
        digits = int(math.floor(math.log10(abs(value)))) + 1
        return f"{value:,.{max(0, 7 - digits)}f}" if digits > 0 else f"{value:.6g}"
    return str(value)


def table(rows: Sequence[dict], columns: Sequence[Column], units: str, *, prefix: str = "",
          fields: Sequence[Column] = ()) -> str:
    """Render rows (areas in m²) as an aligned text table with areas in `units`.

    With a `prefix`, a heading may be its field's name without the prefix; a legend line under
    the table spells those fields out.  `fields` are further columns to convert (those that
    the columns' errors use).
    """
    converted = convert_rows(rows, tuple(columns) + tuple(fields), units)
    return _table(converted, columns, (), legend(columns, prefix))


def legend(columns: Sequence[Column], prefix: str = "") -> list[str]:
    """The legend lines of a table: the fields whose headings drop `prefix` (none when every
    heading is its field's name).  Raises ValueError for any other kind of heading."""
    short = []
    for column in columns:
        if column.heading == column.field:
            continue
        if not prefix or prefix + column.heading != column.field:
            raise ValueError(f"heading {column.heading!r} is neither field {column.field!r} nor it without {prefix!r}")
        short.append(column.heading)
    if not short:
        return []
    return wrap(f"({', '.join(short)}: the fields {prefix}<heading>)")


#: Label columns: always left-aligned text, even when every label looks like a number.
ID_FIELDS = ("id", "id_a", "id_b")

#: Width that every default table, header and footer line keeps to (a terminal of 100 columns).
WIDTH = 100


def wrap(text: str, indent: str = "") -> list[str]:
    """`text` broken into lines of at most :data:`WIDTH` characters (continuations indented)."""
    import textwrap

    return textwrap.wrap(text, WIDTH, subsequent_indent=indent or "  ", break_on_hyphens=False) or [""]


def _numeric(cell: str) -> bool:
    body = cell.replace(",", "").lstrip("-")
    return body.replace(".", "", 1).isdigit() or body in ("inf", "nan") or "e" in body and _is_float(body)


def _is_float(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _align(cells: list[str], heading: str) -> tuple[list[str], bool]:
    """Cells of one column, padded so that decimal points line up, and whether it is numeric
    (right-aligned); a column holding any text that is not a number (ids, tokens) is not."""
    filled = [c for c in cells if c not in ("", "-")]
    if not filled:  # every value missing: the column keeps a number column's right alignment
        return cells, True
    if not all(_numeric(c) for c in filled):
        return cells, False
    lefts = [c.split(".", 1)[0] for c in cells]
    rights = ["." + c.split(".", 1)[1] if "." in c else "" for c in cells]
    wl = max(len(x) for x in lefts)
    wr = max(len(x) for x in rights)
    body = [left.rjust(wl) + right.ljust(wr) for left, right in zip(lefts, rights)]
    return body, True


def _table(rows: list[dict], columns: Sequence[Column], header: Sequence[str], footer: Sequence[str]) -> str:
    body = [c.cells(rows) for c in columns]
    aligned, numeric = zip(*(_align(cells, c.heading) if c.field not in ID_FIELDS else (cells, False)
                             for cells, c in zip(body, columns))) if columns else ((), ())
    widths = [max(len(c.heading), *(len(x) for x in col)) if col else len(c.heading)
              for col, c in zip(aligned, columns)]
    lines = list(header)
    head = [c.heading.rjust(w) if num else c.heading.ljust(w) for c, w, num in zip(columns, widths, numeric)]
    lines.append("  ".join(head).rstrip())
    lines.append("  ".join("-" * w for w in widths))
    for n in range(len(rows)):
        lines.append("  ".join(col[n].rjust(w) if num else col[n].ljust(w)
                               for col, w, num in zip(aligned, widths, numeric)).rstrip())
    lines += list(footer)
    return "\n".join(lines) + "\n"


def json_safe(value):
    """`value` with NaN as None and infinities as the strings ``"inf"``/``"-inf"`` (JSON has neither),
    in nested dicts and lists too."""
    if isinstance(value, float) and not math.isfinite(value):
        return None if math.isnan(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, dict):
        return {k: json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    return value


# --- what each field holds ---------------------------------------------------------------------

#: The field types of result files: text, whole number, real number, boolean.
FIELD_TYPES = ("str", "int", "float", "bool")


def _annotation_text(annotation) -> str:
    """An annotation as text: ``float | None`` (a string under postponed evaluation, PEP 563) as is,
    a class by its name."""
    if isinstance(annotation, str):
        return annotation
    return annotation.__name__ if isinstance(annotation, type) else str(annotation)


def _annotation_type(annotation) -> str | None:
    """``"float | None"`` -> ``"float"``; None for an annotation that is no plain field type."""
    names = [part.strip() for part in _annotation_text(annotation).split("|") if part.strip() != "None"]
    return names[0] if len(names) == 1 and names[0] in FIELD_TYPES else None


def record_types(*classes) -> dict[str, str]:
    """The type of every field the row records `classes` write, from their annotations.

    Each class is a dataclass whose ``to_dict()`` names its fields (as :class:`~areamc.area.AreaRow`
    does); a field annotated ``float | None`` is ``"float"`` whether or not a run fills it, so a
    column's type never depends on the options or on missing values.  The names come from
    ``to_dict()`` itself, called on a probe record whose every plain field holds its annotation
    (fields of other types, such as a nested record, hold None), so renamed fields
    (``population_share``) are found too.  Later classes add to and override earlier ones.

    >>> from dataclasses import dataclass, asdict
    >>> @dataclass(frozen=True)
    ... class Row:
    ...     id: str
    ...     z: float | None
    ...     flagged: bool
    ...     def to_dict(self):
    ...         return asdict(self)
    >>> record_types(Row)
    {'id': 'str', 'z': 'float', 'flagged': 'bool'}
    """
    out: dict[str, str] = {}
    for cls in classes:
        probe = cls(**{f.name: (_annotation_text(f.type) if _annotation_type(f.type) else None)
                       for f in dataclasses.fields(cls)})
        for name, value in probe.to_dict().items():
            kind = _annotation_type(value) if isinstance(value, str) else None
            if kind is not None:
                out[name] = kind
    return out


def is_boolean(value) -> bool:
    """Whether `value` is a Python or numpy boolean."""
    return isinstance(value, bool) or type(value).__name__ in ("bool", "bool_")


def value_type(values: Iterable) -> str:
    """The type of a field no record declares, from its values: ``"bool"`` when every value present
    is a boolean, ``"int"`` when every one is a whole number (or boolean), ``"float"`` when every
    one is a number, else ``"str"``; a field with no value present is ``"float"``.

    >>> value_type([True, None]), value_type([1, False]), value_type([1, 2.5]), value_type(["a", 3]), value_type([])
    ('bool', 'int', 'float', 'str', 'float')
    """
    kinds = set()
    for v in values:
        if v is None:
            continue
        if is_boolean(v):
            kinds.add("bool")
        elif isinstance(v, numbers.Integral):
            kinds.add("int")
        elif isinstance(v, numbers.Real):
            kinds.add("float")
        else:
            kinds.add("str")
    if "str" in kinds:
        return "str"
    if "float" in kinds or not kinds:
        return "float"
    return "bool" if kinds == {"bool"} else "int"


#: Units of the fields that hold no area and mean the same in every job (docs/output.md, the
#: "unit" column of each command's row table).
PLAIN_UNITS = {
    "z": "standard errors",
    **dict.fromkeys(("share", "share_a", "share_b", "exact_share", "claim", "largest_weight_share",
                     "population_share", "population_share_std_error", "population_share_ci_low",
                     "population_share_ci_high", "population_exact_share", "population_largest_weight_share"),
                    "fraction"),
    **dict.fromkeys(("points", "hits", "region_points", "pilot_points", "replicates", "population_points",
                     "effective_points", "population_effective_points", "k", "population_total",
                     "population_covered"), "count"),
}
#: Fields whose unit depends on the job, where they hold no area: a coverage row's interval is a
#: share, an integrate row's estimate a count (e.g. persons).
JOB_UNITS = {
    "coverage": dict.fromkeys(("std_error", "ci_low", "ci_high"), "fraction"),
    "integrate": dict.fromkeys(("estimate", "std_error", "ci_low", "ci_high", "exact"), "count"),
}


def field_units(names: Iterable[str], columns: Sequence[Column], units: str, job: str | None = None) -> dict:
    """The unit of each field in `names` as written: `units` for an area column of `columns`
    (areas are converted to ``--units`` on output), ``"count per UNITS"`` for a per-area column,
    else :data:`JOB_UNITS` of `job` or :data:`PLAIN_UNITS`; None for ids, tokens and flags.

    >>> field_units(["id", "estimate", "z"], [Column("estimate", area=True)], "km2")
    {'id': None, 'estimate': 'km2', 'z': 'standard errors'}
    """
    area = {c.field for c in columns if c.area}
    per_area = {c.field for c in columns if c.per_area}
    by_job = JOB_UNITS.get(job or "", {})
    out = {}
    for name in names:
        if name in area:
            out[name] = units
        elif name in per_area:
            out[name] = f"count per {units}"
        else:
            out[name] = by_job.get(name, PLAIN_UNITS.get(name))
    return out


#: CSVW datatypes of the field types (W3C, "Metadata Vocabulary for Tabular Data", 2015, §5.11.2
#: built-in datatypes; a boolean's ``format`` "True|False" gives its two spellings, §6.4.1) [memory].
_CSVW_TYPES = {"str": "string", "int": "integer", "float": "double",
               "bool": {"base": "boolean", "format": "True|False"}}
#: The JSON-LD context of a CSVW metadata document (W3C 2015, §5.2).
CSVW_CONTEXT = "http://www.w3.org/ns/csvw"


def metadata_path(path: str) -> str:
    """The metadata sidecar of a CSV, Shapefile or FlatGeobuf output: ``NAME.EXT-metadata.json``, the
    file name CSVW processors look for first beside a CSV file (W3C, "Model for Tabular Data and
    Metadata on the Web", 2015, §5.2 "Locating metadata": ``{+url}-metadata.json``) [memory]."""
    return path + "-metadata.json"


def csv_metadata(path: str, names: Sequence[str], types: Mapping[str, str], units_of: Mapping[str, str | None],
                 metadata: Mapping) -> dict:
    """The CSVW metadata document of the CSV file `path` (W3C Recommendation 2015, "Metadata
    Vocabulary for Tabular Data").

    ``url`` names the CSV file (relative to the sidecar beside it); ``tableSchema.columns`` lists
    each column's ``name`` (the CSV heading), ``datatype`` and unit (``schema:unitText``, a common
    property from schema.org, omitted for ids, tokens and flags); the run's metadata (the JSON
    output's keys without ``results``) is the table's one note (``notes``, §5.3).  Areas are in the
    ``--units`` the metadata's ``units`` names.
    """
    columns = []
    for name in names:
        column = {"name": name, "titles": name, "datatype": _CSVW_TYPES[types.get(name, "str")]}
        if units_of.get(name):
            column["schema:unitText"] = units_of[name]
        columns.append(column)
    document = {
        "@context": CSVW_CONTEXT,
        "url": os.path.basename(path),
        "dc:creator": f"areamc {metadata.get('version', '')}".strip(),
        "tableSchema": {"columns": columns},
        "notes": [dict(metadata)],
    }
    if metadata.get("finished"):
        document["dc:created"] = metadata["finished"]
    return json_safe(document)


def write_json(document, path: str, *, batch: "OutputBatch | None" = None, owner: str | None = None) -> None:
    """Write `document` as indented JSON (NaN as null, infinities as strings) to `path`, atomically.

    With `owner` (the output `path` is the metadata sidecar of), a failure while writing raises an
    OSError naming `owner`, with the sidecar's name in its reason.
    """
    try:
        write_text(json.dumps(json_safe(document), indent=2) + "\n", path, batch=batch)
    except OSError as err:
        if owner is None or err.filename != path:
            raise
        raise OSError(err.errno, f"{err.strerror} (its metadata file {os.path.basename(path)})", owner) from err


def render_fields(record: dict, labels: dict[str, str], area_fields: Sequence[str], units: str) -> str:
    """Render one record as aligned ``label: value`` lines; areas converted to `units`."""
    factor = area_factor(units)
    width = max(len(label) for label in labels.values())
    lines = []
    for key, label in labels.items():
        value = record.get(key)
        if key in area_fields and isinstance(value, (int, float)):
            text = f"{format_number(value / factor)} {units}"
        elif isinstance(value, (list, tuple)):
            text = ", ".join(format_number(v) for v in value) or "-"
        elif isinstance(value, dict):
            text = ", ".join(f"{k} {format_number(v)}" for k, v in value.items()) or "-"
        else:
            text = format_number(value)
        lines.append(f"{label + ':':<{width + 1}} {text}")
    return "\n".join(lines) + "\n"


def render(
    rows: Sequence[dict],
    columns: Sequence[Column],
    *,
    fmt: str,
    units: str,
    metadata: dict,
    header: Sequence[str] = (),
    footer: Sequence[str] = (),
    fields: Sequence[Column] = (),
) -> str:
    """Render rows (areas in m²) in `fmt` with areas converted to `units`.

    `fields` are further columns to convert (every area field of the rows, for CSV and JSON,
    and those that the table's rounding errors use).

    ``table`` shows `columns` with `header` and `footer` lines; ``csv`` has
    every field of the rows; ``json`` is ``{**metadata, "units": ..., "results": rows}``.
    """
    converted = convert_rows(rows, tuple(columns) + tuple(fields), units)
    if fmt == "table":
        return _table(converted, columns, header, footer)
    if fmt == "csv":
        buffer = io.StringIO()
        fields = list(converted[0]) if converted else [c.field for c in columns]
        writer = csv.DictWriter(buffer, fieldnames=fields, lineterminator="\n")
        writer.writeheader()
        for row in converted:
            writer.writerow({k: ("" if v is None else v) for k, v in row.items()})
        return buffer.getvalue()
    if fmt == "json":
        document = dict(metadata)
        document["units"] = units
        document["results"] = converted
        return json.dumps(json_safe(document), indent=2) + "\n"
    raise OptionError(f"{{param}}: unknown format {fmt!r}; choose one of {', '.join(FORMATS)}", param="fmt")


#: The files of a Shapefile, beside its ``.shp``: ``.shx`` index and ``.dbf`` attributes (ESRI 1998,
#: Shapefile Technical Description, p. 2), ``.prj`` CRS, ``.cpg`` code page, ``.qix``/``.sbn``/``.sbx``
#: spatial indexes (common practice).
SHAPEFILE_PARTS = (".shp", ".shx", ".dbf", ".prj", ".cpg", ".qix", ".sbn", ".sbx")
#: Files SQLite keeps beside an open database (a GeoPackage): rollback journal, write-ahead log and its
#: shared-memory index (sqlite.org, "Temporary Files Used By SQLite").  A stray journal beside a
#: database is taken for a hot journal and rolled back into it, so it must never be written by areamc.
SQLITE_SIDECARS = ("-journal", "-wal", "-shm")
_SQLITE_EXT = (".gpkg", ".sqlite", ".db")
#: GDAL's sidecars of a raster (auxiliary metadata, overviews, masks) and its world file (common practice).
_RASTER_EXT = (".tif", ".tiff")
_RASTER_SIDECARS = (".aux.xml", ".ovr", ".msk")


def dataset_files(path: str) -> list[str]:
    """The files that make up the dataset at `path`: the path itself, then every sidecar a reader may open.

    A Shapefile ``x.shp`` brings ``x.shx``, ``x.dbf``, ... (:data:`SHAPEFILE_PARTS`, in lower and
    upper case, and ``x.shp.xml``); a GeoPackage (or other SQLite file) its :data:`SQLITE_SIDECARS`;
    a GeoTIFF its ``.aux.xml``, ``.ovr``, ``.msk`` and ``.tfw`` files.  The names are listed
    whether or not the files exist, spelt beside `path` as given (readers look for sidecars
    there; :func:`check_output_path` also looks beside a symlink's target).  Paths only: no CRS
    or units involved.
    """
    root, ext = os.path.splitext(path)
    lower = ext.lower()
    files = [path]
    if lower == ".shp":
        files += [root + part for part in SHAPEFILE_PARTS if part != ext]
        files += [root + part.upper() for part in SHAPEFILE_PARTS if part.upper() != ext]
        files.append(path + ".xml")
    elif lower in _SQLITE_EXT:
        files += [path + side for side in SQLITE_SIDECARS]
    elif lower in _RASTER_EXT:
        files += [path + side for side in _RASTER_SIDECARS] + [root + ".tfw"]
    return files


def _same_file(a: str, b: str) -> bool:
    """Whether `a` and `b` are one file: the same real path (symlinks and ``..`` resolved), or,
    where both exist, the same inode (hard links, case-insensitive file systems)."""
    if os.path.realpath(a) == os.path.realpath(b):
        return True
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False


def _clash(path: str, dataset: str) -> str | None:
    """The file of `dataset` (itself or a sidecar) that writing `path` would replace, or None.

    Sidecars are looked for beside `dataset` as spelt and, if it is a symlink, beside its target too.
    """
    spellings = [dataset]
    real = os.path.realpath(dataset)
    if real != os.path.abspath(dataset):
        spellings.append(real)
    for spelling in spellings:
        for name in dataset_files(spelling):
            if _same_file(path, name):
                return name
    # Shapefile parts are found whatever the case of their extension; a folder input holds Shapefiles.
    out_folder = os.path.realpath(os.path.dirname(os.path.abspath(path)))
    out_stem, out_ext = os.path.splitext(os.path.basename(path))
    if out_ext.lower() not in SHAPEFILE_PARTS:
        return None
    if os.path.isdir(dataset) and out_folder == real:
        return dataset
    for spelling in spellings:
        stem, ext = os.path.splitext(os.path.basename(spelling))
        folder = os.path.dirname(os.path.abspath(spelling))
        if ext.lower() == ".shp" and out_stem == stem and out_folder == os.path.realpath(folder):
            return os.path.join(folder, os.path.basename(path))
    return None


def _writable(path: str, mode: int = os.W_OK) -> bool:
    """Whether this process may write `path`, and its mode grants write to someone: a file or folder
    made read-only (``chmod a-w``) is refused even to root, whom :func:`os.access` always allows."""
    return os.access(path, mode) and bool(os.stat(path).st_mode & 0o222)


def check_output_path(
    path: str | None,
    inputs: Iterable[str | None] = (),
    *,
    param: str = "output",
    outputs: Mapping[str, str | None] | None = None,
) -> None:
    """Refuse, before any work, an output path that would replace an input or cannot be written.

    Parameters
    ----------
    path : str or None
        The output file (None or empty: nothing to check).
    inputs : iterable of str
        Input datasets; `path` may be none of them nor any of their sidecars
        (:func:`dataset_files`), compared by real path (:func:`os.path.realpath`) and, where both
        exist, by :func:`os.path.samefile`.  None entries are skipped.
    param : str
        The parameter that gave `path`, named in the error.
    outputs : mapping of parameter name to path, optional
        The run's other outputs: `path` may not be one of them (or a sidecar of one).

    Raises
    ------
    OptionError
        When `path` is an input or an input's sidecar, another output, an existing folder or a
        special file, an existing read-only file, or lies in a folder that is missing or not writable
        (read-only means no write permission for this process, or no write bit at all).
        (A full disk shows only while writing: see :func:`write_text`.)
    """
    if not path:
        return
    for source in inputs:
        if not source:
            continue
        hit = _clash(path, source)
        if hit is not None:
            if os.path.isdir(source):
                raise OptionError(f"{{param}} {path}: would add a Shapefile part to the input folder {source}",
                                  param=param)
            if _same_file(hit, source):
                same = "" if os.path.abspath(path) == os.path.abspath(source) else " (the same file)"
                raise OptionError(f"{{param}} {path}: would overwrite the input {source}{same}", param=param)
            raise OptionError(f"{{param}} {path}: would overwrite {hit}, a sidecar file of the input {source}",
                              param=param)
    for other_param, other in (outputs or {}).items():
        if other and (_clash(path, other) is not None or _clash(other, path) is not None):
            what = "the same file as" if _same_file(path, other) else "a sidecar file of"
            raise OptionError(f"{{{param}}} {path}: {what} {{{other_param}}} {other}; give each output its own path",
                              params=(param, other_param))
    target = os.path.abspath(path)
    folder = os.path.dirname(target)
    if os.path.isdir(path):
        raise OptionError(f"{{param}} {path}: is a folder; give a file name", param=param)
    if not os.path.isdir(folder):
        missing = "is not a folder" if os.path.exists(folder) else "does not exist"
        raise OptionError(f"{{param}} {path}: folder {folder} {missing}", param=param)
    if os.path.exists(path):
        if not os.path.isfile(path):
            raise OptionError(f"{{param}} {path}: not a regular file (areamc replaces its output files whole)",
                              param=param)
        if not _writable(path):
            raise OptionError(f"{{param}} {path}: the file is read-only; areamc will not replace it", param=param)
    if not _writable(folder, os.W_OK | os.X_OK):
        raise OptionError(f"{{param}} {path}: folder {folder} is not writable", param=param)


#: The parts GDAL writes beside a Shapefile's ``.shp`` (fiona's "ESRI Shapefile" driver, with a CRS and
#: an encoding), and the spatial indexes an older dataset of that name may have left (common practice).
SHAPEFILE_WRITTEN = (".shx", ".dbf", ".prj", ".cpg")
SHAPEFILE_STALE = (".shx", ".dbf", ".prj", ".cpg", ".qix", ".sbn", ".sbx")
#: Outputs that get a metadata sidecar (:func:`metadata_path`): CSV (its CSVW description), and the
#: feature formats with no room for it (a Shapefile's .dbf holds no layer metadata; GDAL writes no
#: free metadata into a FlatGeobuf header).
SIDECAR_EXTENSIONS = (".csv", ".shp", ".fgb")


def output_files(path: str) -> list[str]:
    """Every file writing the output `path` makes: `path`, a Shapefile's other parts
    (:data:`SHAPEFILE_WRITTEN`), and the metadata sidecar of a CSV, Shapefile or FlatGeobuf
    (:func:`metadata_path`).  Paths only, spelt beside `path`.

    >>> output_files("out/areas.shp")
    ['out/areas.shp', 'out/areas.shx', 'out/areas.dbf', 'out/areas.prj', 'out/areas.cpg', 'out/areas.shp-metadata.json']
    """
    root, ext = os.path.splitext(path)
    files = [path]
    if ext.lower() == ".shp":
        files += [root + part for part in SHAPEFILE_WRITTEN]
    if ext.lower() in SIDECAR_EXTENSIONS:
        files.append(metadata_path(path))
    return files


def check_output_paths(outputs: Mapping[str, str | None], inputs: Iterable[str | None] = ()) -> None:
    """Refuse, before any work, output paths (parameter name to path, None skipped) that
    :func:`check_output_path` refuses, for each output and every further file it makes
    (:func:`output_files`), or two outputs that would write one file.

    Raises
    ------
    OptionError
        Naming the parameter and the path at fault (the sidecar or Shapefile part, where that is
        the file that clashes).
    """
    inputs = [i for i in inputs if i]
    seen: dict[str, str] = {}
    for param, path in outputs.items():
        if not path:
            continue
        check_output_path(path, inputs, param=param, outputs=seen)
        mine = output_files(path)
        for companion in mine[1:]:
            check_output_path(companion, inputs, param=param)
        for other_param, other in seen.items():
            for theirs in output_files(other):
                for file in mine:
                    if _clash(file, theirs) is not None or _clash(theirs, file) is not None:
                        raise OptionError(f"{{{param}}} {path}: writes {file}, which {{{other_param}}} {other} "
                                          "also writes; give each output its own path", params=(param, other_param))
        seen[param] = path


def cannot_write(err: BaseException, path: str) -> OSError:
    """An OSError naming the target `path` (not the temporary file) for a failure while writing it.

    `err` is an OSError (its errno and reason are kept) or a GDAL error reported by fiona (its
    first sentence is kept).  When the disk holding `path` has less than 1 MiB free, the reason
    says so.
    """
    if isinstance(err, OSError):
        reason = err.strerror or str(err)
        code = err.errno
    else:  # a GDAL error reported by fiona: keep its first sentence
        reason = " ".join(str(err).split()).split(". Failed to write record")[0][:200]
        code = None
    try:
        free = shutil.disk_usage(os.path.dirname(os.path.abspath(path))).free
    except OSError:
        free = None
    if free is not None and free < 1 << 20 and "space" not in reason.lower():
        reason += f" ({free:,} bytes free on the disk)"
    return OSError(code, f"cannot write: {reason}", path)


def _discard(tmp: str, parts: Sequence[str] = ()) -> None:
    root = os.path.splitext(tmp)[0]
    spelt = [root + p for part in parts for p in dict.fromkeys((part.lower(), part.upper()))]
    for leftover in (tmp, *(tmp + side for side in SQLITE_SIDECARS), *spelt):
        try:
            if os.path.lexists(leftover):
                os.unlink(leftover)
        except OSError:
            pass


def _rename_parts(tmp: str, path: str, parts: Sequence[str]) -> set[str]:
    """Rename the files beside `tmp` with extensions `parts` to the same names beside `path`; the
    extensions renamed (lower case)."""
    tmp_root, root = os.path.splitext(tmp)[0], os.path.splitext(path)[0]
    written = set()
    for part in parts:
        for spelling in dict.fromkeys((part.lower(), part.upper())):
            if os.path.lexists(tmp_root + spelling):
                os.replace(tmp_root + spelling, root + spelling)
                written.add(part.lower())
    return written


def _remove_stale(path: str, stale: Sequence[str], written: set[str]) -> None:
    """Remove the files beside `path` with extensions `stale` (in either case) not in `written`."""
    root = os.path.splitext(path)[0]
    for part in stale:
        if part.lower() in written:
            continue
        for spelling in {part.lower(), part.upper()}:
            if os.path.isfile(root + spelling):
                os.unlink(root + spelling)


class OutputBatch:
    """Output files written as one: each is written under a temporary name beside its target,
    and all are renamed into place only when the batch closes without an error.

    Use it as a context manager.  On any exception (including ``KeyboardInterrupt`` and the
    exception the command line raises on SIGTERM) every temporary file, with any SQLite journal,
    is removed and no target is touched.  The renames at the end are in the order the files were
    staged; they fail only if a folder changes meanwhile, since :func:`check_output_path` checked
    each target before any work.

    >>> import os, tempfile
    >>> folder = tempfile.mkdtemp()
    >>> with OutputBatch() as batch:
    ...     write_text("a", os.path.join(folder, "one.csv"), batch=batch)
    ...     write_text("b", os.path.join(folder, "two.csv"), batch=batch)
    ...     sorted(os.listdir(folder)) == ["one.csv", "two.csv"]
    False
    >>> sorted(os.listdir(folder))
    ['one.csv', 'two.csv']
    >>> import shutil; shutil.rmtree(folder)
    """

    def __init__(self) -> None:
        self._staged: list[tuple[str, str, tuple[str, ...], tuple[str, ...]]] = []

    @contextmanager
    def staging(self, path: str, suffix: str = "", *, create: bool = True, parts: Sequence[str] = (),
                stale: Sequence[str] = ()):
        """Yield a temporary name beside `path` to write (created empty, or absent if not `create`).

        An OSError inside is raised again naming `path`; the temporary file is removed when the
        batch fails.  It is renamed to `path` when the batch commits.  `parts` are the extensions of
        further files the writer makes beside the temporary name (a Shapefile's ``.shx``, ``.dbf``,
        ...): each that exists is renamed beside `path` first, and removed if the batch fails.
        `stale` are extensions of files beside `path` that belong to the dataset it replaces (a
        Shapefile's spatial indexes): those the new dataset did not write are removed at commit.
        """
        folder = os.path.dirname(os.path.abspath(path))
        try:
            fd, tmp = tempfile.mkstemp(prefix=".areamc-", suffix=suffix, dir=folder)
            self._staged.append((tmp, path, tuple(parts), tuple(stale)))
            os.close(fd)
            if create:
                umask = os.umask(0)
                os.umask(umask)
                os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; give the file the usual mode
            else:
                os.unlink(tmp)
            yield tmp
        except OSError as err:
            if err.filename == path:  # already names the target (see cannot_write)
                raise
            raise cannot_write(err, path) from err

    def commit(self) -> None:
        """Rename every staged file into place (an OSError names the target)."""
        staged, self._staged = self._staged, []
        try:
            while staged:
                tmp, path, parts, stale = staged[0]
                try:
                    written = _rename_parts(tmp, path, parts)
                    os.replace(tmp, path)
                    _remove_stale(path, stale, written)
                except OSError as err:
                    raise cannot_write(err, path) from err
                staged.pop(0)
        finally:
            for tmp, _, parts, _ in staged:
                _discard(tmp, parts)

    def discard(self) -> None:
        """Remove every staged temporary file; no target is touched."""
        staged, self._staged = self._staged, []
        for tmp, _, parts, _ in staged:
            _discard(tmp, parts)

    def __enter__(self) -> "OutputBatch":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.commit()
        else:
            self.discard()


def write_text(text: str, path: str, *, batch: OutputBatch | None = None) -> None:
    """Write `text` (UTF-8) to `path` atomically: a temporary file in the same folder, then a rename.

    With `batch`, the rename waits until the batch commits.  A failure while writing (a full
    disk, a folder made read-only) raises an OSError naming `path` and leaves no file.
    """
    with nullcontext(batch) if batch is not None else OutputBatch() as files:
        with files.staging(path) as tmp:
            with open(tmp, "w", encoding="utf-8", newline="") as handle:
                handle.write(text)
