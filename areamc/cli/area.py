"""``areamc area FILE``: estimate each feature's area with an interval and exact checks."""

from __future__ import annotations


from ..area import estimate_areas
from ..estimate import AreaEstimate
from ..exact import FLAG_Z
from ..load import read_layer
from ..output import Column, render, write_text
from ..project import project_layer
from .common import (
    run_metadata,
    add_layer_options,
    add_output_options,
    add_plane_options,
    add_sampling_options,
    check_outputs,
    emit,
    positive_int,
    stop_rule,
)
from .progress import ProgressBar

COLUMNS = (
    Column("id"),
    Column("estimate", area=True),
    Column("stderr", area=True),
    Column("ci_low", area=True),
    Column("ci_high", area=True),
    Column("points"),
    Column("exact_planar", area=True),
    Column("geodesic", area=True),
    Column("z", spec=".2f"),
    Column("flagged", "flag"),
)
ALL_AREA_FIELDS = COLUMNS + (Column("box_area", area=True),)
TRACE_COLUMNS = (
    Column("id"),
    Column("points"),
    Column("hits"),
    Column("estimate", area=True),
    Column("stderr", area=True),
    Column("ci_low", area=True),
    Column("ci_high", area=True),
)


def add_parser(sub) -> None:
    p = sub.add_parser("area", help="estimate the area of each feature", description=__doc__)
    p.add_argument("file", metavar="FILE", help="polygon layer (Shapefile, GeoPackage, GeoJSON, ...)")
    add_layer_options(p)
    add_plane_options(p)
    add_sampling_options(p)
    p.add_argument("--no-exact", action="store_true", help="skip the exact planar and geodesic checks")
    p.add_argument("--trace", metavar="FILE.csv", help="write the running estimate and interval to this CSV")
    p.add_argument("--trace-every", type=positive_int, default=10_000, metavar="K",
                   help="points between trace rows (default 10,000)")
    add_output_options(p)
    p.set_defaults(run=run)


def run(args) -> int:
    stop = stop_rule(args)
    check_outputs(args, [args.file], args.trace)
    layer = read_layer(args.file, layer=args.layer, id_field=args.id_field, input_crs=args.input_crs)
    projected = project_layer(layer, crs=args.crs, densify_m=args.densify)
    total = stop.budget * len(projected) if not stop.adaptive else None
    bar = ProgressBar(total, args.units, args.quiet)
    try:
        report = estimate_areas(
            projected,
            stop=stop,
            confidence=args.confidence,
            seed=args.seed,
            chunk=args.chunk,
            exact=not args.no_exact,
            trace_every=args.trace_every if args.trace else None,
            progress=bar,
        )
    finally:
        bar.close()
    metadata = {
        **run_metadata(args, input=layer),
        **report.metadata(),
    }
    rows = [row.to_dict() for row in report.rows]
    flagged = sum(row.flagged for row in report.rows)
    header = [
        f"areamc area: {layer.path} (layer {layer.layer}, {len(layer)} features)",
        f"equal-area plane: {report.plane.label} ({'chosen from the data' if report.plane.chosen else 'as given'}; "
        f"measured area distortion {report.plane.distortion:.1g})",
        f"{report.confidence:.4g} Wilson intervals; seed {report.seed_entropy}; units {args.units}",
        "",
    ]
    footer = []
    if not args.no_exact:
        footer.append("")
        footer.append(
            f"{flagged} row(s) flagged: estimate more than {FLAG_Z:g} standard errors from the exact planar area"
            if flagged
            else f"all estimates within {FLAG_Z:g} standard errors of the exact planar area"
        )
    if args.trace:
        write_text(_trace_csv(report, args.units), args.trace)
    emit(args, rows, COLUMNS, metadata, header, footer, fields=ALL_AREA_FIELDS,
         features=(layer.geometries, layer.crs, "areas"))
    return 0


def _trace_csv(report, units: str) -> str:
    rows = []
    for fid, trace in report.traces.items():
        box = next(r.box_area for r in report.rows if r.id == fid)
        for point in trace:
            est = AreaEstimate.from_counts(point.hits[0], point.points, box, report.confidence)
            rows.append({"id": fid, "points": point.points, "hits": point.hits[0], "estimate": est.estimate,
                         "stderr": est.stderr, "ci_low": est.ci_low, "ci_high": est.ci_high})
    return render(rows, TRACE_COLUMNS, fmt="csv", units=units, metadata={})
