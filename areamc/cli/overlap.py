"""``areamc overlap ZONES [OTHER]``: pairwise overlaps and the multiplicity profile."""

from __future__ import annotations

from ..output import Column, convert_rows, table
from ..overlap import AUTO, PAIR_SAMPLINGS, SHARED, estimate_overlaps, overlap_geometries
from ..project import project_layers
from .common import (
    Screen,
    add_layer_options,
    add_output_options,
    add_plane_options,
    add_sampling_options,
    add_worker_options,
    add_zone_options,
    check_outputs,
    flag_line,
    flags,
    output_format,
    positive_float,
    run_metadata,
    show,
    stop_rule,
    zone_layer,
)

COLUMNS = (
    Column("id_a"),
    Column("id_b"),
    Column("estimate", area=True),
    Column("stderr", area=True),
    Column("ci_low", area=True),
    Column("ci_high", area=True),
    Column("share_a", spec=".4f"),
    Column("share_b", spec=".4f"),
    Column("exact_planar", area=True),
    Column("z", spec=".2f"),
    Column("flagged", "flag"),
)
PROFILE_COLUMNS = (
    Column("k"),
    Column("area_exactly", "exactly", area=True),
    Column("area_exactly_ci_low", "ci_low", area=True),
    Column("area_exactly_ci_high", "ci_high", area=True),
    Column("exact_area_exactly", "exact", area=True),
    Column("area_at_least", "at_least", area=True),
    Column("area_at_least_ci_low", "ci_low", area=True),
    Column("area_at_least_ci_high", "ci_high", area=True),
    Column("exact_area_at_least", "exact", area=True),
    Column("z", spec=".2f"),
)
PROFILE_FIELDS = PROFILE_COLUMNS + (Column("area_at_least_stderr", area=True),)


def _header(args, report, layers) -> list[str]:
    what = "cross pairs" if args.other else "pairs"
    run = report.run
    return [
        f"areamc overlap: {' x '.join(f'{lay.path} ({lay.layer}, {len(lay)} zones)' for lay in layers)}",
        f"equal-area plane: {run.plane.label}; {run.confidence:.4g} Wilson intervals; seed {run.seed_entropy}; "
        f"units {args.units}",
        f"{len(report.rows)} overlapping {what} of {report.candidates} whose geometries meet"
        + (f"; counted in one shared sample of {report.rows[0].points:,} points over "
           + ("the two layers' common box" if args.other else "the layer's box")
           if report.pair_sampling == SHARED and report.rows else ""),
        "",
    ]


def _footer(args, report, rows) -> list[str]:
    footer = []
    if not report.rows:
        footer.append("no overlapping pairs: the zones do not overlap" + (" above --min-share" if args.min_share else ""))
    elif not args.no_exact:
        footer += ["", flag_line(report.rows, "intersection area")]
    if report.multiplicity and output_format(args) == "table":
        profile = [m.to_dict() for m in report.multiplicity]
        footer += ["", f"multiplicity profile (area covered by exactly k / at least k zones; exact: {report.exact_profile})"]
        footer.append(table(profile, PROFILE_COLUMNS, args.units).rstrip("\n"))
    return footer


SCREEN = Screen(COLUMNS, COLUMNS + (Column("box_area", area=True),), _header, _footer)


def add_parser(sub) -> None:
    p = sub.add_parser("overlap", help="estimate how much zones overlap", description=__doc__)
    p.add_argument("zones", metavar="ZONES", help="zone layer (polygons, or points with --radius)")
    p.add_argument("other", metavar="OTHER", nargs="?", help="second zone layer: only cross pairs are reported")
    add_layer_options(p, what="ZONES")
    add_layer_options(p, prefix="other-", what="OTHER")
    add_zone_options(p)
    add_plane_options(p)
    add_sampling_options(p)
    add_worker_options(p)
    p.add_argument("--min-share", type=float, default=0.0, metavar="SHARE",
                   help="omit pairs whose overlap is below this share of both zones (default 0)")
    p.add_argument("--no-exact", action="store_true", help="skip shapely's exact intersection areas")
    p.add_argument("--no-profile", action="store_true", help="skip the multiplicity profile")
    p.add_argument("--exact-budget", type=positive_float, default=10.0, metavar="SECONDS",
                   help="time allowed for the exact multiplicity profile (default 10)")
    p.add_argument("--pair-sampling", choices=PAIR_SAMPLINGS, default=AUTO,
                   help="shared: one sample over the layer's box counts every pair and the profile (--points is "
                   "that sample's size; pays off where zones overlap densely); per-pair: each pair sampled in its "
                   "own box (--points per pair; best for small overlaps); auto (default): shared for an absolute "
                   "--tolerance, per-pair otherwise")
    add_output_options(p)
    p.set_defaults(run=run)


def run(args) -> int:
    stop = stop_rule(args)
    inputs = [args.zones] + ([args.other] if args.other else [])
    check_outputs(args, inputs)
    layers = [zone_layer(args, args.zones, args.layer, args.id_field, args.input_crs, encoding=args.input_encoding)]
    if args.other:
        with flags(layer="--other-layer", id_field="--other-id-field", input_crs="--other-input-crs",
                   encoding="--other-input-encoding"):
            layers.append(zone_layer(args, args.other, args.other_layer, args.other_id_field, args.other_input_crs,
                                     encoding=args.other_input_encoding))
    projected = project_layers(layers, crs=args.crs, densify_m=args.densify)
    report = estimate_overlaps(
        projected[0],
        projected[1] if args.other else None,
        stop=stop,
        confidence=args.confidence,
        seed=args.seed,
        sampler=args.sampler,
        chunk=args.chunk,
        min_share=args.min_share,
        exact=not args.no_exact,
        profile=not args.no_profile,
        exact_time_limit_s=args.exact_budget,
        workers=args.workers,
        pair_sampling=args.pair_sampling,
    )
    rows = [r.to_dict() for r in report.rows]
    profile = [m.to_dict() for m in report.multiplicity]
    metadata = {
        **run_metadata(args, inputs=layers),
        **report.metadata(),
        "multiplicity": convert_rows(profile, PROFILE_FIELDS, args.units),
    }
    geoms = overlap_geometries(report, projected[0], projected[1] if args.other else None) if args.output else None
    show(args, SCREEN, report, rows, metadata, inputs=layers, features=(geoms, layers[0].crs, "overlaps"))
    return 0
