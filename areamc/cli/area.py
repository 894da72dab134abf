"""``areamc area FILE``: estimate each feature's area with an interval and exact checks."""


from __future__ import annotations

from ..area import AreaReport, estimate_areas
from ..frames import table_columns
from ..load import read_layer
from ..output import Column, OutputBatch
from ..project import project_layer
from ..samplers import interval_method
from .common import (
    Attributes,
    add_worker_options,
    Screen,
    add_layer_options,
    add_output_options,
    add_plane_options,
    add_sampling_options,
    check_outputs,
    flag_line,
    header_lines,
    layer_options,
    positive_int,
    emit,
    Outcome,
    add_plot_option,
    report_types,
    run_metadata,
    show_outcome,
    stop_rule,
)
from .progress import ProgressBar

DESCRIPTION = """\
Estimate the area of every polygon in FILE by throwing random points into its bounding box on an
equal-area plane. Each row gives the estimate with its standard error and confidence interval, and,
as a check, the exact planar area (shapely, same plane) and the geodesic area on the WGS84
ellipsoid (pyproj.Geod), with the estimate's deviation z from the exact area in standard errors."""

COLUMNS = (
    Column("id"),
    Column("estimate", area=True, error="std_error"),
    Column("std_error", area=True, error="std_error"),
    Column("ci_low", area=True, error="std_error"),
    Column("ci_high", area=True, error="std_error"),
    Column("points"),
    Column("exact_planar", area=True, error="std_error"),
    Column("geodesic", area=True, error="std_error"),
    Column("z", spec=".2f"),
    Column("flagged"),
)
#: The --trace file's columns: every field of the running estimates, areas marked by the library.
TRACE_COLUMNS = table_columns(AreaReport, "trace")


def _header(args, report, layer) -> list[str]:
    return header_lines("area", f"{layer.path} (layer {layer.layer}, {len(layer)} features)", report.run,
                        interval_method(report.run.sampler), f"areas in {args.units}")


def _footer(args, report, rows) -> list[str]:
    return [] if args.no_exact else ["", flag_line(report.rows, "planar area")]


SCREEN = Screen(COLUMNS, table_columns(AreaReport), _header, _footer)  # fields: every row field, areas marked


def add_parser(sub) -> None:
    p = sub.add_parser("area", help="estimate the area of each feature", description=DESCRIPTION)
    p.add_argument("file", metavar="FILE", help="polygon layer (Shapefile, GeoPackage, GeoJSON, ...)")
    add_layer_options(p)
    add_plane_options(p)
    add_sampling_options(p)
    add_worker_options(p)
    p.add_argument("--no-exact", action="store_true", help="skip the exact planar and geodesic areas")
    p.add_argument("--trace", metavar="FILE.csv",
                   help="also write each feature's running estimate and interval, every --trace-every points, "
                   "to this CSV file (uniform sampler only)")
    p.add_argument("--trace-every", type=positive_int, default=10_000, metavar="K",
                   help="points between rows of the --trace file (default 10,000)")
    add_plot_option(p, "area")
    add_output_options(p, progress=True)
    p.set_defaults(run=run)


def run(args) -> int:
    # --plot draws the running estimates, which only the uniform sampler records
    return show(args, compute(args, trace=bool(args.plot) and args.sampler == "uniform"))


def read_inputs(args) -> tuple:
    """Read the input as the command does: ``(layer, (projected layer,))`` (plane metres)."""
    layer = read_layer(args.file, **layer_options(args))
    return layer, (project_layer(layer, crs=args.crs, densify_m=args.densify),)


def compute(args, *, progress=None, features: bool | None = None, trace: bool = False) -> Outcome:
    """Read, project and estimate, writing nothing: the command's :class:`Outcome` (rows in m²).

    `progress` replaces the terminal bar (an ``estimate_areas`` progress callable); the features'
    geometries are the input's, in its CRS (`features` changes nothing here: they cost nothing).
    With `trace`, the running estimates are kept every ``--trace-every`` points as with ``--trace``
    (uniform sampler only), for the report's convergence pictures.
    """
    stop = stop_rule(args)
    check_outputs(args, [args.file], trace=args.trace, plot=args.plot)
    layer, (projected,) = read_inputs(args)
    total = stop.point_budget * len(projected) if not stop.adaptive else None
    bar = ProgressBar(total, args.units, args.quiet) if progress is None else progress
    try:
        report = estimate_areas(
            projected,
            stop=stop,
            confidence=args.confidence,
            seed=args.seed,
            sampler=args.sampler,
            chunk=args.chunk,
            exact=not args.no_exact,
            trace_every=args.trace_every if args.trace or trace else None,
            progress=bar,
            workers=args.workers,
        )
    finally:
        if progress is None:
            bar.close()
    metadata = {**run_metadata(args, input=layer), **report.metadata()}
    rows = [row.to_dict() for row in report.rows]
    return Outcome(report, rows, metadata, SCREEN, features=(layer.geometries, layer.crs, "areas", [Attributes(layer)]),
                   layers=(projected,), inputs=layer)


def show(args, outcome: Outcome) -> int:
    """Write an :class:`Outcome` of :func:`compute` per the output options (and ``--trace``, ``--plot``); the
    exit status."""
    with OutputBatch() as batch:  # the trace and the results are renamed into place once both are written
        if args.trace:  # CSV with its CSVW sidecar, like --output
            trace = [t.to_dict() for t in outcome.report.trace_rows()]
            emit(args, trace, TRACE_COLUMNS, outcome.metadata, path=args.trace, batch=batch,
                 types=report_types(outcome.report, "trace"))
        show_outcome(args, outcome, batch=batch)
    return outcome.status
