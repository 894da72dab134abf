"""``areamc area FILE``: estimate each feature's area with an interval and exact checks."""

from __future__ import annotations

import argparse

from .. import __version__
from ..area import estimate_areas
from ..estimate import DEFAULT_CHUNK, DEFAULT_MAX_POINTS, DEFAULT_POINTS, AreaEstimate, StopRule
from ..exact import FLAG_Z
from ..load import read_layer
from ..output import Column, render, write_text
from ..project import project_layer
from .common import (
    add_layer_options,
    add_output_options,
    add_plane_options,
    check_outputs,
    confidence_level,
    emit,
    output_format,
    non_negative_int,
    parse_tolerance,
    positive_int,
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


def add_sampling_options(parser: argparse.ArgumentParser) -> None:
    """Point budget, precision target, confidence, seed and chunking (shared by estimating commands)."""
    parser.add_argument("--points", "-n", type=positive_int, metavar="N",
                        help=f"points per estimate (default {DEFAULT_POINTS:,})")
    parser.add_argument("--tolerance", "-t", metavar="TOL",
                        help="stop at the first chunk whose interval half-width is at most TOL "
                        "(an area in --units, or a percentage of the estimate such as 0.5%%)")
    parser.add_argument("--max-points", type=positive_int, default=DEFAULT_MAX_POINTS, metavar="N",
                        help=f"cap on points per estimate with --tolerance (default {DEFAULT_MAX_POINTS:,})")
    parser.add_argument("--confidence", "-c", type=confidence_level, default=0.95, metavar="LEVEL",
                        help="confidence level of the intervals, in (0, 1) (default 0.95)")
    parser.add_argument("--seed", "-s", type=non_negative_int, metavar="INT",
                        help="seed for reproducible runs (default: fresh, recorded in the output)")
    parser.add_argument("--chunk", type=positive_int, default=DEFAULT_CHUNK, metavar="N",
                        help=f"points per chunk, bounds memory; results do not depend on it (default {DEFAULT_CHUNK})")


def stop_rule(args) -> StopRule:
    """Build the stop rule from ``--points`` / ``--tolerance`` / ``--max-points``."""
    if args.tolerance is None:
        return StopRule(points=args.points or DEFAULT_POINTS, max_points=args.max_points)
    if args.points is not None:
        return StopRule(points=args.points, absolute=1.0)  # raises: the two exclude each other
    absolute, relative = parse_tolerance(args.tolerance, args.units)
    return StopRule(points=None, absolute=absolute, relative=relative, max_points=args.max_points)


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
        "tool": "areamc",
        "version": __version__,
        "command": " ".join(args.argv),
        "input": {"path": layer.path, "layer": layer.layer, "crs": layer.crs.to_string(), "features": len(layer)},
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
    emit(args, rows, COLUMNS if output_format(args) == "table" else ALL_AREA_FIELDS, metadata, header, footer)
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
