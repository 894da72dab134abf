"""``areamc overlap ZONES [OTHER]``: pairwise overlaps and the multiplicity profile."""

from __future__ import annotations

import numpy as np

from ..exact import FLAG_Z
from ..errors import OptionError
from ..output import Column, convert_rows, table
from ..overlap import estimate_overlaps
from ..project import project_layers, transform_geometry, transformer
from .common import (
    run_metadata,
    add_layer_options,
    add_output_options,
    add_plane_options,
    add_sampling_options,
    add_zone_options,
    check_outputs,
    emit,
    output_format,
    positive_float,
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
ALL_FIELDS = COLUMNS + (Column("box_area", area=True),)
PROFILE_COLUMNS = (
    Column("k"),
    Column("exactly", area=True),
    Column("exactly_ci_low", "ci_low", area=True),
    Column("exactly_ci_high", "ci_high", area=True),
    Column("exact_exactly", "exact", area=True),
    Column("at_least", "at_least", area=True),
    Column("at_least_ci_low", "ci_low", area=True),
    Column("at_least_ci_high", "ci_high", area=True),
    Column("exact_at_least", "exact", area=True),
    Column("z", spec=".2f"),
)
PROFILE_FIELDS = PROFILE_COLUMNS + (Column("at_least_stderr", area=True),)


def add_parser(sub) -> None:
    p = sub.add_parser("overlap", help="estimate how much zones overlap", description=__doc__)
    p.add_argument("zones", metavar="ZONES", help="zone layer (polygons, or points with --radius)")
    p.add_argument("other", metavar="OTHER", nargs="?", help="second zone layer: only cross pairs are reported")
    add_layer_options(p, what="ZONES")
    add_layer_options(p, prefix="other-", what="OTHER")
    add_zone_options(p)
    add_plane_options(p)
    add_sampling_options(p)
    p.add_argument("--min-share", type=float, default=0.0, metavar="SHARE",
                   help="omit pairs whose overlap is below this share of both zones (default 0)")
    p.add_argument("--no-exact", action="store_true", help="skip shapely's exact intersection areas")
    p.add_argument("--no-profile", action="store_true", help="skip the multiplicity profile")
    p.add_argument("--exact-budget", type=positive_float, default=10.0, metavar="SECONDS",
                   help="time allowed for the exact multiplicity profile (default 10)")
    add_output_options(p)
    p.set_defaults(run=run)


def run(args) -> int:
    stop = stop_rule(args)
    if not 0.0 <= args.min_share <= 1.0:
        raise OptionError(f"--min-share: must lie in [0, 1], got {args.min_share!r}")
    inputs = [args.zones] + ([args.other] if args.other else [])
    check_outputs(args, inputs)
    layers = [zone_layer(args, args.zones, args.layer, args.id_field, args.input_crs)]
    if args.other:
        layers.append(zone_layer(args, args.other, args.other_layer, args.other_id_field, args.other_input_crs))
    projected = project_layers(layers, crs=args.crs, densify_m=args.densify)
    report = estimate_overlaps(
        projected[0],
        projected[1] if args.other else None,
        stop=stop,
        confidence=args.confidence,
        seed=args.seed,
        chunk=args.chunk,
        min_share=args.min_share,
        exact=not args.no_exact,
        profile=not args.no_profile,
        exact_budget_s=args.exact_budget,
    )
    rows = [r.to_dict() for r in report.rows]
    profile = [m.to_dict() for m in report.multiplicity]
    metadata = {
        **run_metadata(args, inputs=layers),
        **report.metadata(),
        "multiplicity": _convert(profile, args.units),
    }
    what = "cross pairs" if args.other else "pairs"
    header = [
        f"areamc overlap: {' x '.join(f'{l.path} ({l.layer}, {len(l)} zones)' for l in layers)}",
        f"equal-area plane: {report.plane.label}; {report.confidence:.4g} Wilson intervals; seed {report.seed_entropy}; "
        f"units {args.units}",
        f"{len(rows)} overlapping {what} of {report.candidates} whose geometries meet",
        "",
    ]
    footer = []
    if not rows:
        footer.append("no overlapping pairs: the zones do not overlap" + (" above --min-share" if args.min_share else ""))
    flagged = sum(r.flagged for r in report.rows)
    if flagged:
        footer.append(f"{flagged} row(s) flagged: more than {FLAG_Z:g} standard errors from the exact area")
    if profile and output_format(args) == "table":
        footer += ["", f"multiplicity profile (area covered by exactly k / at least k zones; exact: {report.exact_profile})"]
        footer.append(table(profile, PROFILE_COLUMNS, args.units).rstrip("\n"))
    geoms = _pair_geometries(report, projected, layers[0]) if args.output else None
    emit(args, rows, COLUMNS, metadata, header, footer, fields=ALL_FIELDS,
         features=(geoms, layers[0].crs, "overlaps"))
    return 0


def _convert(profile, units):
    return convert_rows(profile, PROFILE_FIELDS, units)


def _pair_geometries(report, projected, first_layer):
    """Intersection geometries of the reported pairs, back in the first layer's CRS."""
    a = projected[0]
    b = projected[-1]
    back = transformer(a.plane.crs, first_layer.crs)
    out = []
    for row, (i, j) in zip(report.rows, report.pairs):
        inter = a.planar[i].intersection(b.planar[j])
        out.append(transform_geometry(inter, back, f"overlap {row.id_a} x {row.id_b}"))
    return np.array(out, dtype=object)
