"""``areamc coverage REGIONS ZONES``: share of each region covered by at least k zones."""

from __future__ import annotations

import argparse

from ..coverage import COMPUTED, estimate_coverage
from ..density import build_density
from ..errors import OptionError
from ..output import Column
from ..load import read_layer
from ..samplers import interval_method
from ..project import project_layers
from ..sequential import FALLS_SHORT, MEETS, UNDECIDED, check_claim
from .density_options import add_density_options, density_metadata, read_density_option
from .common import (
    Screen,
    add_layer_options,
    add_output_options,
    add_plane_options,
    add_sampling_options,
    add_worker_options,
    add_zone_options,
    check_outputs,
    density_file,
    flag_line,
    flags,
    layer_options,
    positive_float,
    run_metadata,
    show,
    stop_rule,
    whole_number,
    zone_layer,
)

COLUMNS = (
    Column("id"),
    Column("k"),
    Column("share", spec=".4f"),
    Column("stderr", spec=".4f"),
    Column("ci_low", spec=".4f"),
    Column("ci_high", spec=".4f"),
    Column("uncovered", area=True),
    Column("points"),
    Column("exact_share", spec=".4f"),
    Column("z", spec=".2f"),
    Column("flagged", "flag"),
)
POPULATION_COLUMNS = (
    Column("population", spec=",.0f"),
    Column("covered_population", "covered_pop", spec=",.0f"),
    Column("population_share", "pop_share", spec=".4f"),
    Column("population_share_ci_low", "ci_low", spec=".4f"),
    Column("population_share_ci_high", "ci_high", spec=".4f"),
    Column("exact_population_share", "exact", spec=".4f"),
)
CLAIM_COLUMNS = (Column("claim", spec=".4g"), Column("verdict"))
ALL_FIELDS = COLUMNS + (
    Column("region_area", area=True),
    Column("covered", area=True),
    Column("uncovered_ci_low", area=True),
    Column("uncovered_ci_high", area=True),
)  # with the table's columns: every field that holds an area, for unit conversion


#: Exit status of ``--fail-on-shortfall`` when no row falls short but some verdict is undecided.
EXIT_UNDECIDED = 3


def _claim(text: str) -> float:
    try:
        return check_claim(float(text))
    except (ValueError, OptionError):
        raise argparse.ArgumentTypeError(f"expected a share in (0, 1], got {text!r}") from None


def add_parser(sub) -> None:
    p = sub.add_parser("coverage", help="estimate the share of each region covered by zones", description=__doc__)
    p.add_argument("regions", metavar="REGIONS", help="polygon layer of regions (districts)")
    p.add_argument("zones", metavar="ZONES", help="zone layer (polygons, or points with --radius)")
    add_layer_options(p, what="REGIONS")
    add_layer_options(p, prefix="zones-", what="ZONES")
    add_zone_options(p)
    add_plane_options(p)
    add_sampling_options(p, tolerance="share")
    add_worker_options(p)
    p.add_argument("--at-least", type=whole_number(1), action="append", metavar="K",
                   help="report the share covered by at least K zones; repeat for several (default 1)")
    p.add_argument("--claim", type=_claim, metavar="SHARE",
                   help="check the claim that each share is at least SHARE, in (0, 1]")
    p.add_argument("--fail-on-shortfall", action="store_true",
                   help=f"exit status 1 when any row falls short of --claim, or {EXIT_UNDECIDED} when none falls short but "
                   "some verdict is still undecided when the points run out (raise --max-points or --points)")
    add_density_options(p, required=False)
    p.add_argument("--no-exact", action="store_true", help="skip shapely's exact shares")
    p.add_argument("--exact-budget", type=positive_float, default=10.0, metavar="SECONDS",
                   help="time allowed per region for exact shares at k >= 2 (default 10)")
    add_output_options(p)
    p.set_defaults(run=run)


def _tally(what: str, verdicts, claim: float, confidence: float) -> str:
    decided = [v for v in verdicts if v is not None]
    if not decided:
        return f"{what} >= {claim:g}: no verdict (needs importance sampling)"
    counts = {v: decided.count(v) for v in (MEETS, FALLS_SHORT, UNDECIDED)}
    return (f"{what} >= {claim:g}: {counts[MEETS]} meet, {counts[FALLS_SHORT]} fall short, "
            f"{counts[UNDECIDED]} undecided at confidence {confidence:g}")


def _header(args, report, inputs) -> list[str]:
    regions, zones, spec = inputs
    run = report.run
    method = ("confidence sequences (valid under early stopping)" if args.claim is not None
              else interval_method(run.sampler))
    if spec is not None:
        method += f"; population from {spec.kind} {args.density}"
    return [
        f"areamc coverage: {regions.path} ({regions.layer}, {len(regions)} regions) by {zones.path} ({zones.layer}, {len(zones)} zones)",
        f"equal-area plane: {run.plane.label}; {run.confidence:.4g} {method}; seed {run.seed_entropy}; units {args.units}",
        "",
    ]


def _footer(args, report, rows) -> list[str]:
    footer = [""]
    if args.claim is not None:
        footer.append(_tally("claim: area share", [r.verdict for r in report.rows], args.claim, report.run.confidence))
        if args.density is not None:
            footer.append(_tally("claim: population share",
                                 [r.population.verdict if r.population else None for r in report.rows],
                                 args.claim, report.run.confidence))
    if not args.no_exact:
        footer.append(flag_line(report.rows, "share"))
    not_done = sorted({rid for rid, s in report.exact_status.items() if s != COMPUTED})
    if not_done and not args.no_exact:
        footer.append(f"exact shares for k >= 2 not computed within --exact-budget for: {', '.join(not_done)}")
    return footer


SCREEN = Screen(COLUMNS, ALL_FIELDS + CLAIM_COLUMNS + POPULATION_COLUMNS, _header, _footer)


def run(args) -> int:
    if args.fail_on_shortfall and args.claim is None:
        raise OptionError("--fail-on-shortfall needs --claim")
    stop = stop_rule(args, scale=1.0, below=1.0)  # an absolute tolerance is a share
    check_outputs(args, [args.regions, args.zones, density_file(args)])
    regions = read_layer(args.regions, **layer_options(args))
    with flags(layer="--zones-layer", id_field="--zones-id-field", input_crs="--zones-input-crs",
               encoding="--zones-input-encoding"):
        zones = zone_layer(args, args.zones, args.zones_layer, args.zones_id_field, args.zones_input_crs,
                           encoding=args.zones_input_encoding)
    spec = read_density_option(args)
    layers = [regions, zones] + ([spec.blocks] if spec is not None and spec.blocks is not None else [])
    projected = project_layers(layers, crs=args.crs, densify_m=args.densify)
    density = None
    if spec is not None:
        density = build_density(spec, projected[0].plane, projected[2] if len(projected) > 2 else None, projected[0])
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
        )
    finally:
        if hasattr(density, "close"):
            density.close()
    rows = [r.to_dict(population=density is not None) for r in report.rows]
    metadata = {
        **run_metadata(args, inputs=[regions, zones]),
        **report.metadata(),
        "density": density_metadata(args, spec),
    }
    columns = COLUMNS + (CLAIM_COLUMNS if args.claim is not None else ())
    if density is not None:
        # a narrower area part, so the population columns fit beside it
        columns = tuple(c for c in COLUMNS if c.field in ("id", "k", "share", "ci_low", "ci_high", "exact_share"))
        columns += ((Column("verdict"),) if args.claim is not None else ()) + POPULATION_COLUMNS
        columns += (Column("population_verdict", "pop_verdict"),) if args.claim is not None else ()
    geoms = [g for g in regions.geometries for _ in report.ks] if args.output else None  # rows: region by region, k by k
    show(args, SCREEN, report, rows, metadata, inputs=(regions, zones, spec), columns=columns,
         features=(geoms, regions.crs, "coverage"))
    if args.fail_on_shortfall:
        if report.shortfall:
            return 1
        if report.undecided:
            return EXIT_UNDECIDED
    return 0
