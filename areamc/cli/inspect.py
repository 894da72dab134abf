"""``areamc inspect FILE``: what a layer holds and the plane areamc would compute in."""

from __future__ import annotations

import sys

from ..describe import describe_layer
from ..errors import OptionError
from ..load import read_layer
from ..output import Column, render, render_fields, write_text
from ..vector import vector_driver
from .common import (
    add_layer_options,
    add_output_options,
    add_plane_options,
    check_outputs,
    layer_options,
    output_format,
    run_metadata,
)

LABELS = {
    "path": "file",
    "layers": "layers in file",
    "layer": "layer",
    "kind": "holds",
    "features": "features",
    "geometry_types": "geometry types",
    "crs": "CRS",
    "crs_name": "CRS name",
    "extent": "extent (layer CRS)",
    "extent_lonlat": "extent (lon/lat)",
    "invalid": "invalid geometries (repaired)",
    "empty": "empty geometries (skipped)",
    "equal_area_crs": "equal-area plane",
    "area_distortion": "measured area distortion",
    "exact_planar_total": "total exact planar area",
    "geodesic_total": "total geodesic area",
}
AREA_FIELDS = ("exact_planar_total", "geodesic_total")


def add_parser(sub) -> None:
    p = sub.add_parser("inspect", help="describe a layer and the equal-area plane it would use", description=__doc__)
    p.add_argument("file", metavar="FILE", help="vector layer (polygons or points)")
    add_layer_options(p)
    add_plane_options(p)
    add_output_options(p)
    p.set_defaults(run=run)


def run(args) -> int:
    if vector_driver(args.output):
        raise OptionError(f"--output {args.output}: inspect writes text; use .csv, .json or a text file")
    check_outputs(args, [args.file])
    layer = read_layer(args.file, **layer_options(args), kind="any")
    info = describe_layer(layer, crs=args.crs, densify_m=args.densify).to_dict()
    fmt = output_format(args)
    if fmt == "table":
        text = render_fields(info, LABELS, AREA_FIELDS, args.units)
    else:
        flat = dict(info)
        if fmt == "csv":
            flat = {k: (" ".join(map(str, v)) if isinstance(v, list) else
                        ";".join(f"{a}={b}" for a, b in v.items()) if isinstance(v, dict) else v)
                    for k, v in info.items()}
        columns = [Column(k, area=k in AREA_FIELDS) for k in LABELS]
        text = render([flat], columns, fmt=fmt, units=args.units, metadata=run_metadata(args))
    if args.output:
        write_text(text, args.output)
    else:
        sys.stdout.write(text)
    return 0
