"""``areamc overlap ZONES [OTHER]``: pairwise overlaps and the multiplicity profile."""

from __future__ import annotations


from ..output import Column, convert_rows, table, wrap
from ..frames import table_columns
from ..overlap import AUTO, PAIR_SAMPLINGS, SHARED, OverlapReport, estimate_overlaps, overlap_geometries
from ..project import project_layers
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
    zone_layer,
)
from .progress import JobBar

DESCRIPTION = """\
Estimate, for every pair of zones in ZONES whose outlines meet, the area they share, with its
standard error and confidence interval and, as a check, the exact intersection area (shapely).
With a second file OTHER, only pairs of one zone from each file are reported. Below the pairs,
the multiplicity profile gives the area covered by exactly k and by at least k zones. Facility
points become zones with --radius or --radius-field."""

def _share_error(side: str):
    """The standard error of ``share_a`` or ``share_b``: the overlap's over the zone's exact area."""
    def error(row: dict):
        estimate, share = row.get("estimate"), row.get(f"share_{side}")
        if not estimate or share is None or row.get("std_error") is None:
            return None
        return row["std_error"] * share / estimate
    return error


COLUMNS = (
    Column("id_a"),
    Column("id_b"),
    Column("estimate", area=True, error="std_error"),
    Column("std_error", area=True, error="std_error"),
    Column("ci_low", area=True, error="std_error"),
    Column("ci_high", area=True, error="std_error"),
    Column("share_a", spec=".4f", error=_share_error("a")),
    Column("share_b", spec=".4f", error=_share_error("b")),
    Column("exact_planar", area=True, error="std_error"),
    Column("z", spec=".2f"),
    Column("flagged"),
)
#: The profile table: headings without the prefix ``area_at_least_`` are that area's fields.
PROFILE_PREFIX = "area_at_least_"
_AT_LEAST = "area_at_least_std_error"
PROFILE_COLUMNS = (
    Column("k"),
    Column("area_exactly", area=True, error=_AT_LEAST),
    Column("area_at_least", area=True, error=_AT_LEAST),
    Column("area_at_least_std_error", "std_error", area=True, error=_AT_LEAST),
    Column("area_at_least_ci_low", "ci_low", area=True, error=_AT_LEAST),
    Column("area_at_least_ci_high", "ci_high", area=True, error=_AT_LEAST),
    Column("area_at_least_exact", "exact", area=True, error=_AT_LEAST),
    Column("z", spec=".2f"),
)
#: Every field of the profile, areas marked by the library (the JSON ``multiplicity`` list is converted with it).
PROFILE_FIELDS = table_columns(OverlapReport, "profile")


def _header(args, report, layers) -> list[str]:
    what = "pairs of one zone from each file" if args.other else "pairs of zones"
    sources = " and ".join(f"{lay.path} (layer {lay.layer}, {len(lay)} zones)" for lay in layers)
    lines = header_lines("overlap", sources, report.run, "Wilson intervals", f"areas in {args.units}")
    listed = f"{len(report.rows)} of them overlap" + (" above --min-share" if args.min_share else "")
    lines.insert(-1, f"{report.candidates} {what} have outlines that meet; {listed} and are listed")
    if report.pair_sampling == SHARED and report.rows:
        box = "the two layers' common box" if args.other else "the layer's box"
        lines.insert(-1, f"every pair counted in one shared sample of {report.rows[0].points:,} points over {box}")
    return lines


def _footer(args, report, rows) -> list[str]:
    footer = []
    if not report.rows:
        footer.append("no overlapping pairs: the zones do not overlap" + (" above --min-share" if args.min_share else ""))
    elif not args.no_exact:
        footer += ["", flag_line(report.rows, "intersection area")]
    if report.multiplicity and output_format(args) == "table":
        profile = [m.to_dict() for m in report.multiplicity]
        footer += ["", *wrap(f"multiplicity profile: area covered by exactly k and by at least k zones, in "
                             f"{args.units} (exact areas: {report.exact_profile}; z compares area_at_least with "
                             "its exact area)")]
        footer.append(table(profile, PROFILE_COLUMNS, args.units, prefix=PROFILE_PREFIX).rstrip("\n"))
    note = caveat(reach=any(lay.reach_circles for lay in report_layers(args)))
    return footer + (["", *wrap(note)] if note else [])


SCREEN = Screen(COLUMNS, table_columns(OverlapReport), _header, _footer)  # fields: every row field, areas marked


def add_parser(sub) -> None:
    p = sub.add_parser("overlap", help="estimate how much zones overlap", description=DESCRIPTION)
    p.add_argument("zones", metavar="ZONES", help="zone layer (polygons, or points with --radius)")
    p.add_argument("other", metavar="OTHER", nargs="?",
                   help="a second zone layer: only pairs of one zone from each file are reported")
    add_layer_options(p, prefix="zones-", what="ZONES")
    add_layer_options(p, prefix="other-", what="OTHER", first=False)
    add_zone_options(p)
    add_plane_options(p)
    add_sampling_options(p, samplers="uniform")
    add_worker_options(p)
    p.add_argument("--min-share", type=float, default=0.0, metavar="SHARE",
                   help="leave out pairs whose overlap is below this share of both zones' areas (default 0)")
    p.add_argument("--no-exact", action="store_true", help="skip shapely's exact intersection areas")
    p.add_argument("--no-profile", action="store_true", help="skip the multiplicity profile")
    p.add_argument("--exact-budget", type=positive_float, default=10.0, metavar="SECONDS",
                   help="time allowed for the exact areas of the multiplicity profile (default 10)")
    p.add_argument("--pair-sampling", choices=PAIR_SAMPLINGS, default=AUTO,
                   help="shared: one sample over the layer's box counts every pair and the profile (--points is "
                   "that sample's size; pays off where zones overlap densely); per-pair: each pair sampled in its "
                   "own box (--points per pair; best for small overlaps); auto (default): shared for an absolute "
                   "--tolerance, per-pair otherwise")
    add_plot_option(p, "overlap")
    add_output_options(p, progress=True)
    p.set_defaults(run=run)


def report_layers(args) -> tuple:
    """The zone layers the run read (set by :func:`run`, for the footer's caution)."""
    return getattr(args, "_layers", ())


def run(args) -> int:
    return show(args, compute(args))


def read_inputs(args) -> tuple:
    """Read the inputs as the command does: ``(zone layers, projected layers)`` (plane metres)."""
    with input_flags("zones_"):
        layers = [zone_layer(args, args.zones, **layer_options(args, "zones_"))]
    if args.other:
        with input_flags("other_"):
            layers.append(zone_layer(args, args.other, **layer_options(args, "other_")))
    args._layers = tuple(layers)
    return layers, tuple(project_layers(layers, crs=args.crs, densify_m=args.densify))


def compute(args, *, progress=None, features: bool | None = None) -> Outcome:
    """Read, project and estimate, writing nothing: the command's :class:`Outcome` (rows in m²).

    `progress` replaces the terminal bar (a :data:`~areamc.parallel.JobProgress`); the overlaps'
    geometries (input CRS) are formed when `features` is true (default: when ``--output`` is given).
    """
    stop = stop_rule(args)
    inputs = [args.zones] + ([args.other] if args.other else [])
    check_outputs(args, inputs, plot=args.plot)
    layers, projected = read_inputs(args)
    bar = JobBar(args.quiet) if progress is None else progress
    try:
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
            progress=bar,
        )
    finally:
        if progress is None:
            bar.close()
    rows = [r.to_dict() for r in report.rows]
    profile = [m.to_dict() for m in report.multiplicity]
    metadata = {
        **run_metadata(args, inputs=layers),
        **report.metadata(),
        "multiplicity": convert_rows(profile, PROFILE_FIELDS, args.units),
        "caveat": caveat(reach=any(lay.reach_circles for lay in layers)),
    }
    if features is None:
        features = bool(args.output)
    geoms = overlap_geometries(report, projected[0], projected[1] if args.other else None) if features else None
    attributes = [Attributes(layers[0], "feature_index_a", "_a"), Attributes(layers[-1], "feature_index_b", "_b")]
    return Outcome(report, rows, metadata, SCREEN, features=(geoms, layers[0].crs, "overlaps", attributes),
                   layers=tuple(projected), inputs=layers)


def show(args, outcome: Outcome) -> int:
    """Write an :class:`Outcome` of :func:`compute` per the output options; the exit status."""
    show_outcome(args, outcome)
    return outcome.status
