"""``areamc integrate REGIONS --density SOURCE``: totals of a density (e.g. population) per region."""

from __future__ import annotations

from ..exact import FLAG_Z
from ..integrate import integrate_density
from ..load import read_layer
from ..output import Column
from ..project import project_layers
from .common import (
    run_metadata,
    add_layer_options,
    add_output_options,
    add_plane_options,
    add_sampling_options,
    check_outputs,
    emit,
    stop_rule,
)
from .density_options import add_density_options, build_density, density_metadata, read_density

COLUMNS = (
    Column("id"),
    Column("estimate", "total"),
    Column("stderr"),
    Column("ci_low"),
    Column("ci_high"),
    Column("mean_density", "mean_density", per_area=True),
    Column("points"),
    Column("method"),
    Column("exact"),
    Column("z", spec=".2f"),
    Column("flagged", "flag"),
)
ALL_FIELDS = COLUMNS + (Column("region_area", area=True),)


def add_parser(sub) -> None:
    p = sub.add_parser("integrate", help="integrate a density (e.g. population) over each region", description=__doc__)
    p.add_argument("regions", metavar="REGIONS", help="polygon layer of regions")
    add_layer_options(p, what="REGIONS")
    add_density_options(p, required=True)
    add_plane_options(p)
    add_sampling_options(p)
    p.add_argument("--no-exact", action="store_true", help="skip the exact areal-weighting / cell-fraction totals")
    add_output_options(p)
    p.set_defaults(run=run)


def run(args) -> int:
    stop = stop_rule(args, scale=1.0)  # an absolute tolerance is a count (e.g. persons)
    check_outputs(args, [args.regions, args.density])
    regions = read_layer(args.regions, layer=args.layer, id_field=args.id_field, input_crs=args.input_crs)
    source_input = read_density(args)
    layers = [regions] + ([source_input.blocks] if source_input.blocks is not None else [])
    projected = project_layers(layers, crs=args.crs, densify_m=args.densify)
    source = build_density(args, source_input, projected[0].plane, projected[1] if len(projected) > 1 else None,
                           projected[0])
    report = integrate_density(projected[0], source, stop=stop, confidence=args.confidence, seed=args.seed,
                               chunk=args.chunk, importance=not args.no_importance, exact=not args.no_exact)
    rows = [r.to_dict() for r in report.rows]
    metadata = {
        **run_metadata(args, input=regions),
        "density": density_metadata(args, source_input),
        **report.metadata(),
        "note": "totals are in the density's count unit; mean_density is per unit of --units",
    }
    header = [
        f"areamc integrate: {regions.path} ({regions.layer}, {len(regions)} regions), density {source_input.kind} {args.density}",
        f"equal-area plane: {report.plane.label}; {report.confidence:.4g} intervals; seed {report.seed_entropy}; "
        f"mean density per {args.units}",
        "",
    ]
    flagged = sum(r.flagged for r in report.rows)
    footer = ["", f"{flagged} row(s) flagged: more than {FLAG_Z:g} standard errors from the exact total" if flagged
              else f"all totals within {FLAG_Z:g} standard errors of the exact total" if not args.no_exact and
              any(r.exact is not None for r in report.rows) else
              "exact totals skipped (--no-exact)" if args.no_exact else "no exact total for this density source"]
    geoms = list(regions.geometries) if args.output else None
    emit(args, rows, COLUMNS, metadata, header, footer, fields=ALL_FIELDS,
         features=(geoms, regions.crs, "totals"))
    return 0
