"""``areamc coverage REGIONS ZONES``: share of each region covered by at least k zones."""

from __future__ import annotations


import argparse

from ..coverage import COMPUTED, CoverageReport, estimate_coverage
from ..frames import table_columns
from ..density import build_density
from ..errors import OptionError
from ..output import Column, table, wrap
from ..load import read_layer
from ..samplers import interval_method
from ..project import project_layers
from ..sequential import FALLS_SHORT, MEETS, UNDECIDED, check_claim
from .density_options import add_density_options, density_metadata, read_density_option
from .progress import JobBar
from .common import (
    Attributes,
    Screen,
    add_layer_options,
    add_output_options,
    add_plane_options,
    add_sampling_options,
    add_worker_options,
    add_zone_options,
    check_outputs,
    density_file,
    caveat,
    flag_line,
    header_lines,
    input_flags,
    layer_options,
    Outcome,
    add_plot_option,
    output_format,
    positive_float,
    run_metadata,
    show_outcome,
    stop_rule,
    whole_number,
    zone_layer,
)

DESCRIPTION = """\
Estimate, for every region in REGIONS, the share of its area covered by at least k zones of ZONES
(k = 1 unless --at-least says otherwise), with a standard error and confidence interval and, as a
check, the exact share (shapely). --claim tests each row against a stated share; --density adds
the share of the region's population (or any count) that lives in the covered area. Facility
points become zones with --radius or --radius-field: circles of a straight-line reach."""

def _below_k_error(row: dict):
    """Standard error of ``area_below_k``: the share's, times the region's area (same unit)."""
    if row.get("std_error") is None or row.get("region_area") is None:
        return None
    return row["std_error"] * row["region_area"]


COLUMNS = (
    Column("id"),
    Column("k"),
    Column("share", spec=".4f", error="std_error"),
    Column("std_error", spec=".4f", error="std_error"),
    Column("ci_low", spec=".4f", error="std_error"),
    Column("ci_high", spec=".4f", error="std_error"),
    Column("area_below_k", area=True, error=_below_k_error),
    Column("exact_share", spec=".4f", error="std_error"),
    Column("z", spec=".2f"),
    Column("flagged"),
)
#: Columns shown only with ``--wide`` (every field is in CSV and JSON anyway).
WIDE_COLUMNS = (Column("region_points"), Column("hits"))
#: The population table: headings without the prefix ``population_`` are its fields.
POPULATION_PREFIX = "population_"
_POP = "population_share_std_error"
POPULATION_COLUMNS = (
    Column("id"),
    Column("k"),
    Column("population_total", "total", spec=",.0f"),
    Column("population_covered", "covered", spec=",.0f"),
    Column("population_share", "share", spec=".4f", error=_POP),
    Column("population_share_std_error", "share_std_error", spec=".4f", error=_POP),
    Column("population_share_ci_low", "share_ci_low", spec=".4f", error=_POP),
    Column("population_share_ci_high", "share_ci_high", spec=".4f", error=_POP),
    Column("population_exact_share", "exact_share", spec=".4f", error=_POP),
)
#: Every field of the rows (the population_* ones too), areas marked by the library: for unit conversion.
ALL_FIELDS = table_columns(CoverageReport)

#: What each verdict token means (the table legend spells them out).
VERDICTS = {
    MEETS: "the confidence sequence lies wholly at or above the claim",
    FALLS_SHORT: "it lies wholly below the claim",
    UNDECIDED: "it still straddles the claim when the points run out",
}


#: Exit status of ``--fail-on-shortfall`` when no row falls short but some verdict is undecided.
EXIT_UNDECIDED = 3


def _claim(text: str) -> float:
    try:
        return check_claim(float(text))
    except (ValueError, OptionError):
        raise argparse.ArgumentTypeError(f"expected a share in (0, 1], got {text!r}") from None


def add_parser(sub) -> None:
    p = sub.add_parser("coverage", help="estimate the share of each region covered by zones",
                       description=DESCRIPTION)
    p.add_argument("regions", metavar="REGIONS", help="polygon layer of regions (districts)")
    p.add_argument("zones", metavar="ZONES", help="zone layer (polygons, or points with --radius)")
    add_layer_options(p, prefix="regions-", what="REGIONS")
    add_layer_options(p, prefix="zones-", what="ZONES", first=False)
    add_zone_options(p)
    add_plane_options(p)
    add_sampling_options(p, tolerance="share", claim=True)
    add_worker_options(p)
    p.add_argument("--at-least", type=whole_number(1), action="append", metavar="K",
                   help="report the share covered by at least K zones; repeat for several (default 1)")
    p.add_argument("--claim", type=_claim, metavar="SHARE",
                   help="test, row by row, the claim that the covered share is at least SHARE, in (0, 1]; "
                   "sampling stops once every row's verdict is clear")
    p.add_argument("--fail-on-shortfall", action="store_true",
                   help=f"exit status 1 when any row falls short of --claim, or {EXIT_UNDECIDED} when none falls short but "
                   "some verdict is still undecided when the points run out (raise --max-points or --points)")
    add_density_options(p, required=False)
    p.add_argument("--no-exact", action="store_true", help="skip shapely's exact shares")
    p.add_argument("--exact-budget", type=positive_float, default=10.0, metavar="SECONDS",
                   help="time allowed per region for the exact shares at k >= 2 (default 10)")
    p.add_argument("--wide", action="store_true",
                   help="also show each row's region_points (points that fell in the region) and hits")
    add_plot_option(p, "coverage")
    add_output_options(p, progress=True)
    p.set_defaults(run=run)


def _tallies(what: str, rows, verdict_of, claim: float, ks) -> list[str]:
    """One tally line per k: how many rows meet the claim, fall short, or are undecided."""
    lines = []
    for k in ks:
        verdicts = [verdict_of(r) for r in rows if r.k == k]
        decided = [v for v in verdicts if v is not None]
        if not decided:
            lines.append(f"claim {what} >= {claim:g} at k = {k}: no verdict (needs importance sampling)")
            continue
        counts = {v: decided.count(v) for v in (MEETS, FALLS_SHORT, UNDECIDED)}
        lines.append(f"claim {what} >= {claim:g} at k = {k}: {counts[MEETS]} meet, {counts[FALLS_SHORT]} fall short, "
                     f"{counts[UNDECIDED]} undecided")
    return lines


def _header(args, report, inputs) -> list[str]:
    regions, zones, spec = inputs
    run = report.run
    method = ("confidence sequences (valid under early stopping)" if args.claim is not None
              else interval_method(run.sampler))
    sources = (f"{regions.path} (layer {regions.layer}, {len(regions)} regions) by {zones.path} "
               f"(layer {zones.layer}, {len(zones)} zones)")
    lines = header_lines("coverage", sources, run, method, f"areas in {args.units}")
    if spec is not None:
        lines.insert(-1, f"population from {spec.kind} {args.density}")
    return lines


def _footer(args, report, rows) -> list[str]:
    footer = []
    if args.claim is not None:
        footer += ["", *wrap("verdict: " + "; ".join(f"{token} = {text}" for token, text in VERDICTS.items()))]
    if args.density is not None and output_format(args) == "table":
        population = [r.to_dict() for r in report.rows]
        columns = POPULATION_COLUMNS
        if args.claim is not None:  # as in the area table, the verdict takes the standard error's place
            columns = tuple(c for c in columns if c.field != "population_share_std_error")
            columns += (Column("population_verdict", "verdict"),)
        footer += ["", "population (or other count) of each region and the share of it covered by at least k zones"]
        footer.append(table(population, columns, args.units, prefix=POPULATION_PREFIX).rstrip("\n"))
    if args.claim is not None:
        footer.append("")
        footer += _tallies("area share", report.rows, lambda r: r.verdict, args.claim, report.ks)
        if args.density is not None:
            footer += _tallies("population share", report.rows,
                               lambda r: r.population.verdict if r.population else None, args.claim, report.ks)
        footer.append(f"(each row is judged on its own at confidence {report.run.confidence:g}, not jointly)")
    if not args.no_exact:
        footer += ["", flag_line(report.rows, "share")]
    not_done = sorted({rid for rid, s in report.exact_status.items() if s != COMPUTED})
    if not_done and not args.no_exact:
        footer += wrap(f"exact shares for k >= 2 not computed within --exact-budget for: {', '.join(not_done)}")
    note = _caveat(args)
    return footer + (["", *wrap(note)] if note else [])


def _caveat(args) -> str | None:
    zones = getattr(args, "_zones", None)
    return caveat(reach=bool(zones is not None and zones.reach_circles), claim=args.claim is not None)


SCREEN = Screen(COLUMNS, ALL_FIELDS, _header, _footer)


def run(args) -> int:
    return show(args, compute(args))


def read_inputs(args) -> tuple:
    """Read the inputs as the command does: ``(regions, zones, density spec or None, projected layers)``,
    the projected ones (plane metres) regions, zones and the blocks if the density has them."""
    with input_flags("regions_"):
        regions = read_layer(args.regions, **layer_options(args, "regions_"))
    with input_flags("zones_"):
        zones = zone_layer(args, args.zones, **layer_options(args, "zones_"))
    args._zones = zones
    spec = read_density_option(args)
    layers = [regions, zones] + ([spec.blocks] if spec is not None and spec.blocks is not None else [])
    return regions, zones, spec, tuple(project_layers(layers, crs=args.crs, densify_m=args.densify))


def compute(args, *, progress=None, features: bool | None = None) -> Outcome:
    """Read, project and estimate, writing nothing: the command's :class:`Outcome` (rows in m²), its
    status that of ``--fail-on-shortfall``.

    `progress` replaces the terminal bar (a :data:`~areamc.parallel.JobProgress`); the features'
    geometries (the regions', input CRS, one per row) are given when `features` is true (default:
    when ``--output`` is given).
    """
    if args.fail_on_shortfall and args.claim is None:
        raise OptionError("--fail-on-shortfall needs --claim")
    stop = stop_rule(args, scale=1.0, below=1.0)  # an absolute tolerance is a share
    check_outputs(args, [args.regions, args.zones, density_file(args)], plot=args.plot)
    regions, zones, spec, projected = read_inputs(args)
    density = None
    if spec is not None:
        density = build_density(spec, projected[0].plane, projected[2] if len(projected) > 2 else None, projected[0])
    bar = JobBar(args.quiet) if progress is None else progress
    try:
        report = estimate_coverage(
            projected[0],
            projected[1],
            ks=args.at_least or (1,),
            stop=stop,
            confidence=args.confidence,
            claim=args.claim,
            seed=args.seed,
            sampler=args.sampler,
            chunk=args.chunk,
            exact=not args.no_exact,
            exact_time_limit_s=args.exact_budget,
            density=density,
            importance=not args.no_importance,
            workers=args.workers,
            progress=bar,
        )
    finally:
        if progress is None:
            bar.close()
        if hasattr(density, "close"):
            density.close()
    rows = [r.to_dict(population=density is not None) for r in report.rows]
    metadata = {
        **run_metadata(args, inputs=[regions, zones]),
        **report.metadata(),
        "density": density_metadata(args, spec),
        "caveat": _caveat(args),
    }
    columns = COLUMNS
    if args.claim is not None:  # the claim itself is in the header and footer; the table keeps to 100 columns
        columns = tuple(c for c in COLUMNS if c.field != "std_error") + (Column("verdict"),)
    if args.wide:
        columns += WIDE_COLUMNS
    if features is None:
        features = bool(args.output)
    geoms = [g for g in regions.geometries for _ in report.ks] if features else None  # rows: region by region, k by k
    status = 0
    if args.fail_on_shortfall:
        status = 1 if report.shortfall else EXIT_UNDECIDED if report.undecided else 0
    return Outcome(report, rows, metadata, SCREEN, columns=columns,
                   features=(geoms, regions.crs, "coverage", [Attributes(regions)]), layers=tuple(projected),
                   inputs=(regions, zones, spec), status=status)


def show(args, outcome: Outcome) -> int:
    """Write an :class:`Outcome` of :func:`compute` per the output options; the exit status."""
    show_outcome(args, outcome)
    return outcome.status
