"""``areamc integrate REGIONS --density SOURCE``: totals of a density (e.g. population) per region."""

from __future__ import annotations


from ..density import build_density
from ..frames import table_columns
from ..integrate import TIMED_OUT, IntegrateReport, integrate_density
from ..load import read_layer
from ..output import Column, wrap
from ..project import project_layers
from .common import (
    Attributes,
    Screen,
    add_layer_options,
    add_output_options,
    add_plane_options,
    add_sampling_options,
    add_worker_options,
    check_outputs,
    density_file,
    positive_float,
    flag_line,
    header_lines,
    input_flags,
    layer_options,
    Outcome,
    add_plot_option,
    run_metadata,
    show_outcome,
    stop_rule,
)
from .density_options import add_density_options, density_metadata, read_density_option
from .progress import JobBar

DESCRIPTION = """\
Estimate, for every region in REGIONS, the total of a density over its area: a population from
census blocks (--density BLOCKS --count-field FIELD), from a raster of counts or densities, or
from an expression in lon, lat (degrees) or in metres east and north of a named --origin. Each row
gives the total with its standard error and confidence interval and, where the source allows, the
exact total as a check (areal weighting for blocks, cell fractions for rasters)."""

def _density_error(row: dict):
    """Standard error of ``mean_density``: the total's over the region's area (same unit)."""
    if row.get("std_error") is None or not row.get("region_area"):
        return None
    return row["std_error"] / row["region_area"]


COLUMNS = (
    Column("id"),
    Column("estimate", error="std_error"),
    Column("std_error", error="std_error"),
    Column("ci_low", error="std_error"),
    Column("ci_high", error="std_error"),
    Column("mean_density", per_area=True, error=_density_error),
    Column("exact", error="std_error"),
    Column("z", spec=".2f"),
    Column("flagged"),
)
#: Columns shown only with ``--wide``.
WIDE_COLUMNS = (Column("points"), Column("method"))
#: Every field of the rows, areas and per-area densities marked by the library: for unit conversion.
ALL_FIELDS = table_columns(IntegrateReport)


def add_parser(sub) -> None:
    p = sub.add_parser("integrate", help="integrate a density (e.g. population) over each region",
                       description=DESCRIPTION)
    p.add_argument("regions", metavar="REGIONS", help="polygon layer of regions")
    add_layer_options(p, prefix="regions-", what="REGIONS")
    add_density_options(p, required=True)
    add_plane_options(p)
    add_sampling_options(p, tolerance="count", samplers="uniform")
    add_worker_options(p)
    p.add_argument("--no-exact", action="store_true", help="skip the exact totals (areal weighting, cell fractions)")
    p.add_argument("--exact-budget", type=positive_float, default=10.0, metavar="SECONDS",
                   help="time allowed per region for the exact total (default 10)")
    p.add_argument("--wide", action="store_true",
                   help="also show each row's points and sampling method")
    add_plot_option(p, "integrate")
    add_output_options(p, units="density", progress=True)
    p.set_defaults(run=run)


def _header(args, report, inputs) -> list[str]:
    regions, spec = inputs
    sources = f"{regions.path} (layer {regions.layer}, {len(regions)} regions); density from {spec.kind} {args.density}"
    lines = header_lines("integrate", sources, report.run, "confidence intervals", f"mean_density per {args.units}")
    methods = sorted({r.method for r in report.rows})
    if methods and not args.wide:
        lines.insert(-1, f"sampling method: {', '.join(methods)} (docs/methods.md; --wide shows it per row)")
    return lines


def _footer(args, report, rows) -> list[str]:
    if args.no_exact:
        return ["", "exact totals skipped (--no-exact)"]
    late = sorted({rid for rid, status in report.exact_status.items() if status == TIMED_OUT})
    note = wrap(f"exact totals not computed within --exact-budget for: {', '.join(late)}") if late else []
    if not any(r.exact is not None for r in report.rows):
        return ["", *(note or ["no exact total for this density source"])]
    return ["", flag_line(report.rows, "total"), *note]


SCREEN = Screen(COLUMNS, ALL_FIELDS, _header, _footer)


def run(args) -> int:
    return show(args, compute(args))


def read_inputs(args) -> tuple:
    """Read the inputs as the command does: ``(regions, density spec, projected layers)``, the
    projected ones (plane metres) the regions and the blocks if the density has them."""
    with input_flags("regions_"):
        regions = read_layer(args.regions, **layer_options(args, "regions_"))
    spec = read_density_option(args)
    layers = [regions] + ([spec.blocks] if spec.blocks is not None else [])
    return regions, spec, tuple(project_layers(layers, crs=args.crs, densify_m=args.densify))


def compute(args, *, progress=None, features: bool | None = None) -> Outcome:
    """Read, project and integrate, writing nothing: the command's :class:`Outcome` (rows in m²).

    `progress` replaces the terminal bar (a :data:`~areamc.parallel.JobProgress`); the features'
    geometries (the regions', input CRS) are given when `features` is true (default: when
    ``--output`` is given).
    """
    stop = stop_rule(args, scale=1.0)  # an absolute tolerance is a count (e.g. persons)
    check_outputs(args, [args.regions, density_file(args)], plot=args.plot)
    regions, spec, projected = read_inputs(args)
    source = build_density(spec, projected[0].plane, projected[1] if len(projected) > 1 else None, projected[0])
    bar = JobBar(args.quiet) if progress is None else progress
    try:
        report = integrate_density(projected[0], source, stop=stop, confidence=args.confidence, seed=args.seed,
                                   sampler=args.sampler, chunk=args.chunk, importance=not args.no_importance,
                                   exact=not args.no_exact, exact_time_limit_s=args.exact_budget,
                                   workers=args.workers, progress=bar)
    finally:
        if progress is None:
            bar.close()
        if hasattr(source, "close"):
            source.close()
    rows = [r.to_dict() for r in report.rows]
    columns = COLUMNS + (WIDE_COLUMNS if args.wide else ())
    metadata = {
        **run_metadata(args, input=regions),
        "density": density_metadata(args, spec),
        **report.metadata(),
        "mean_density_unit": f"count per {args.units}",
    }
    if features is None:
        features = bool(args.output)
    geoms = list(regions.geometries) if features else None
    return Outcome(report, rows, metadata, SCREEN, columns=columns,
                   features=(geoms, regions.crs, "totals", [Attributes(regions)]), layers=tuple(projected),
                   inputs=(regions, spec))


def show(args, outcome: Outcome) -> int:
    """Write an :class:`Outcome` of :func:`compute` per the output options; the exit status."""
    show_outcome(args, outcome)
    return outcome.status
