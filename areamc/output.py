"""Render result rows as a table, CSV or JSON, and write files atomically.

This module only formats: it receives rows as dicts with areas in m² and
converts the columns it is told hold areas into the chosen unit.  Files are
written to a temporary name beside the target and renamed into place, so a
failed run never leaves a partial file.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import tempfile
from typing import Iterable, Sequence

from .errors import OptionError
from .units import area_factor

__all__ = ["FORMATS", "Column", "convert_rows", "render", "render_fields", "table", "write_text", "check_output_path", "format_number"]

FORMATS = ("table", "csv", "json")


class Column:
    """A column of a result table: field name, heading, and whether it holds an area."""

    __slots__ = ("field", "heading", "area", "per_area", "spec")

    def __init__(
        self, field: str, heading: str | None = None, *, area: bool = False, per_area: bool = False, spec: str | None = None
    ) -> None:
        self.field = field
        self.heading = heading or field
        self.area = area
        self.per_area = per_area
        self.spec = spec

    def text(self, value) -> str:
        """The table cell for `value`."""
        if self.spec and isinstance(value, float) and math.isfinite(value):
            return format(value, self.spec)
        return format_number(value)


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
    """Format a value for the table: 6 significant digits, blanks for None."""
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


def table(rows: Sequence[dict], columns: Sequence[Column], units: str) -> str:
    """Render rows (areas in m²) as an aligned text table with areas in `units`."""
    return _table(convert_rows(rows, columns, units), columns, (), ())


def _table(rows: list[dict], columns: Sequence[Column], header: Sequence[str], footer: Sequence[str]) -> str:
    cells = [[c.heading for c in columns]]
    cells += [[c.text(row.get(c.field)) for c in columns] for row in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(columns))]
    lines = list(header)
    for n, r in enumerate(cells):
        lines.append("  ".join(v.ljust(w) if i == 0 else v.rjust(w) for i, (v, w) in enumerate(zip(r, widths))).rstrip())
        if n == 0:
            lines.append("  ".join("-" * w for w in widths))
    lines += list(footer)
    return "\n".join(lines) + "\n"


def _json_safe(value):
    if isinstance(value, float) and not math.isfinite(value):
        return None if math.isnan(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, dict):
        return {k: _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    return value


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
) -> str:
    """Render rows (areas in m²) in `fmt` with areas converted to `units`.

    ``table`` shows `columns` with `header` and `footer` lines; ``csv`` has
    every field of the rows; ``json`` is ``{**metadata, "units": ..., "results": rows}``.
    """
    converted = convert_rows(rows, columns, units)
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
        return json.dumps(_json_safe(document), indent=2) + "\n"
    raise OptionError(f"{{param}}: unknown format {fmt!r}; choose one of {', '.join(FORMATS)}", param="fmt")


def check_output_path(path: str | None, inputs: Iterable[str] = ()) -> None:
    """Refuse an output path whose folder is missing or that would overwrite an input."""
    if path is None:
        return
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise OptionError(f"{{param}} {path}: folder {folder} does not exist", param="output")
    target = os.path.abspath(path)
    for source in inputs:
        if os.path.exists(source) and os.path.abspath(source) == target:
            raise OptionError(f"{{param}} {path}: would overwrite the input file", param="output")


def write_text(text: str, path: str) -> None:
    """Write `text` to `path` atomically (temporary file in the same folder, then rename)."""
    folder = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".areamc-", dir=folder)
    try:
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; give the file the usual mode
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as handle:
            handle.write(text)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
