"""``areamc inspect FILE``: what a layer holds and the plane areamc would compute in."""

from __future__ import annotations

import sys

from ..describe import AREA_FIELDS, describe_layer
from ..load import read_layer
from ..output import WIDTH, Column, render, render_fields, wrap, write_text
from .common import (
    add_layer_options,
    add_output_options,
    add_plane_options,
    check_outputs,
    emit,
    layer_options,
    output_format,
    run_metadata,
)

DESCRIPTION = """\
Describe what FILE holds before estimating anything: its layers, features and geometry types, its
CRS and extent, the invalid geometries areamc repairs and the empty ones it skips, the equal-area
plane areamc would compute in with its measured area distortion, the total exact planar and
geodesic areas (true areas on the WGS84 ellipsoid, the ones areamc reports) and, for a layer in a
projected CRS in metres or feet such as a national grid, its total grid area measured in that CRS,
and its attribute fields (type, distinct and missing values, and whether a field is unique, so
that it can serve as --id-field). Repeated --id-field values are not refused here, only warned
about."""


LABELS = {
    "path": "file",
    "layers": "layers in file",
    "layer": "layer",
    "kind": "holds",
    "features": "features",
    "kept": "features kept",
    "geometry_types": "geometry types",
    "crs": "CRS",
    "crs_name": "CRS name",
    "crs_unit": "CRS unit",
    "extent": "extent (layer CRS)",
    "extent_lonlat": "extent (lon/lat)",
    "invalid": "invalid geometries (repaired)",
    "empty": "empty geometries (skipped)",
    "plane": "plane",
    "area_distortion": "area distortion",
    "exact_planar_total": "total exact planar area",
    "geodesic_total": "total geodesic area",
    "planar_total_in_layer_crs": "total grid area (layer CRS)",
}
#: The line under the totals when the grid area is shown: which area is which (docs/methods.md §5).
WHICH_AREA = "grid area: measured in the layer's CRS; exact planar, geodesic: true WGS84 areas, as areamc reports"
#: Decimals of the extent in the table, by the layer CRS's unit: 6 for degrees (about 0.1 m on the
#: ground), 1 for linear units (a tenth of a metre or foot); JSON and CSV keep the full floats.
EXTENT_DECIMALS = {"degree": 6, "grad": 6, "radian": 8}
LINEAR_DECIMALS = 1
#: Columns of the attribute-field sub-table, by key of each field's record.
FIELD_COLUMNS = (("name", "name"), ("type", "type"), ("distinct", "distinct"), ("missing", "missing"),
                 ("unique", "unique"))
#: Shortest a truncated field name gets in the sub-table.
MIN_NAME_WIDTH = 12


def add_parser(sub) -> None:
    p = sub.add_parser("inspect", help="describe a layer, its attribute fields and the equal-area plane it would use",
                       description=DESCRIPTION)
    p.add_argument("file", metavar="FILE", help="vector layer (polygons or points)")
    add_layer_options(p, first=False)  # inspect never refuses repeated ids: no --allow-duplicate-ids
    add_plane_options(p)
    add_output_options(p, features=False)
    p.set_defaults(run=run)


def extent_text(bounds, unit: str) -> str:
    """``min x, min y .. max x, max y`` in the CRS's unit, without thousands separators.

    >>> extent_text([10.12345678, 47.0, 11.0, 47.5], "degree")
    '10.123457, 47.000000 .. 11.000000, 47.500000'
    >>> extent_text([495000.04, 5295000.0, 505000.0, 5305000.0], "metre")
    '495000.0, 5295000.0 .. 505000.0, 5305000.0'
    """
    decimals = EXTENT_DECIMALS.get(unit, LINEAR_DECIMALS)
    x0, y0, x1, y1 = (f"{float(v):.{decimals}f}" for v in bounds)
    return f"{x0}, {y0} .. {x1}, {y1}"


def plane_text(plane: dict) -> str:
    """The plane's label and how it was chosen."""
    how = "chosen from the data" if plane["chosen_from_data"] else "as given by --plane-crs"
    return f"{plane['crs']} ({how})"


def fields_table(fields: list[dict], kept: int) -> list[str]:
    """The attribute fields as an aligned sub-table of at most :data:`WIDTH` columns.

    Names too long for the width left by the other columns are cut with an ellipsis here
    only (JSON and CSV keep them whole).
    """
    if not fields:
        return ["attribute fields: none"]
    cells = [{"name": f["name"], "type": f["type"] or "-", "distinct": f"{f['distinct']:,}",
              "missing": f"{f['missing']:,}", "unique": "yes" if f["unique"] else "no"} for f in fields]
    others = sum(max(len(heading), *(len(c[key]) for c in cells)) for key, heading in FIELD_COLUMNS[1:])
    room = max(MIN_NAME_WIDTH, WIDTH - others - 2 * (len(FIELD_COLUMNS) - 1))
    for c in cells:
        if len(c["name"]) > room:
            c["name"] = c["name"][:room - 1] + "…"
    title = wrap(f"attribute fields ({len(fields)}; counts over the {kept:,} kept features; unique: can serve "
                 "as --id-field):")
    columns = [Column(key, heading) for key, heading in FIELD_COLUMNS]
    return render(cells, columns, fmt="table", units="m2", metadata={}, header=title).splitlines()


def table_text(info: dict, units: str) -> str:
    """The ``label: value`` lines, wrapped to :data:`WIDTH`, then the attribute-field sub-table."""
    shown = dict(info)
    shown["extent"] = extent_text(info["extent"], info["crs_unit"])
    shown["extent_lonlat"] = extent_text(info["extent_lonlat"], "degree")
    shown["plane"] = plane_text(info["plane"])
    shown["area_distortion"] = f"{info['plane']['area_distortion']:.2g}"
    grid = info.get("planar_total_in_layer_crs") is not None
    labels = {k: v for k, v in LABELS.items() if grid or k != "planar_total_in_layer_crs"}
    indent = " " * (max(len(label) for label in labels.values()) + 2)
    lines = []
    for line in render_fields(shown, labels, AREA_FIELDS, units).splitlines():
        lines += wrap(line, indent) if len(line) > WIDTH else [line]
    note = ["", *wrap(WHICH_AREA)] if grid else []
    return "\n".join([*lines, *note, "", *fields_table(info["fields"], info["kept"])]) + "\n"


def csv_cell(value):
    """One CSV cell: a list of scalars joined by spaces, a mapping as ``key=value;...``, a list of
    mappings (the fields) as such mappings joined by `` | ``."""
    if isinstance(value, dict):
        return ";".join(f"{a}={b}" for a, b in value.items())
    if isinstance(value, list):
        if any(isinstance(v, dict) for v in value):
            return " | ".join(csv_cell(v) for v in value)
        return " ".join(map(str, value))
    return value


def run(args) -> int:
    check_outputs(args, [args.file], features=False)
    layer = read_layer(args.file, **layer_options(args), kind="any", describing=True)
    info = describe_layer(layer, crs=args.crs, densify_m=args.densify).to_dict()
    fmt = output_format(args)
    if fmt == "table":
        text = table_text(info, args.units)
        if args.output:
            write_text(text, args.output)
        else:
            sys.stdout.write(text)
        return 0
    flat = {k: csv_cell(v) for k, v in info.items()} if fmt == "csv" else info
    columns = [Column(k, area=k in AREA_FIELDS) for k in info]
    emit(args, [flat], columns, run_metadata(args, input=layer))  # a CSV file gets its CSVW sidecar
    return 0
