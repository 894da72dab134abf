"""``areamc integrate REGIONS --density SOURCE``: totals of a density (e.g. population) per region."""

from __future__ import annotations

from ..density import build_density
from ..integrate import integrate_density
from ..load import read_layer
from ..output import Column
from ..project import project_layers
from .common import (
    Screen,
    add_layer_options,
    add_output_options,
    add_plane_options,
    add_sampling_options,
    add_worker_options,
    check_outputs,
    density_file,
    flag_line,
    layer_options,
    run_metadata,
    show,
    stop_rule,
)
from .density_options import add_density_options, density_metadata, read_density_option

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
    add_sampling_options(p, tolerance="count")
    add_worker_options(p)
    p.add_argument("--no-exact", action="store_true", help="skip the exact areal-weighting / cell-fraction totals")
    add_output_options(p)
    p.set_defaults(run=run)


def _header(args, report, inputs) -> list[str]:
    regions, spec = inputs
    run = report.run
    return [
        f"areamc integrate: {regions.path} ({regions.layer}, {len(regions)} regions), density {spec.kind} {args.density}",
        f"equal-area plane: {run.plane.label}; {run.confidence:.4g} intervals; seed {run.seed_entropy}; "
        f"mean density per {args.units}",
        "",
    ]


def _footer(args, report, rows) -> list[str]:
    if args.no_exact:
        return ["", "exact totals skipped (--no-exact)"]
    if not any(r.exact is not None for r in report.rows):
        return ["", "no exact total for this density source"]
    return ["", flag_line(report.rows, "total")]


SCREEN = Screen(COLUMNS, ALL_FIELDS, _header, _footer)


def run(args) -> int:
    stop = stop_rule(args, scale=1.0)  # an absolute tolerance is a count (e.g. persons)
    check_outputs(args, [args.regions, density_file(args)])
    regions = read_layer(args.regions, **layer_options(args))
    spec = read_density_option(args)
    layers = [regions] + ([spec.blocks] if spec.blocks is not None else [])
    projected = project_layers(layers, crs=args.crs, densify_m=args.densify)
    source = build_density(spec, projected[0].plane, projected[1] if len(projected) > 1 else None, projected[0])
    try:
        report = integrate_density(projected[0], source, stop=stop, confidence=args.confidence, seed=args.seed,
                                   sampler=args.sampler, chunk=args.chunk, importance=not args.no_importance,
                                   exact=not args.no_exact, workers=args.workers)
    finally:
        if hasattr(source, "close"):
            source.close()
    rows = [r.to_dict() for r in report.rows]
    metadata = {
        **run_metadata(args, input=regions),
        "density": density_metadata(args, spec),
        **report.metadata(),
        "note": "totals are in the density's count unit; mean_density is per unit of --units",
    }
    geoms = list(regions.geometries) if args.output else None
    show(args, SCREEN, report, rows, metadata, inputs=(regions, spec), features=(geoms, regions.crs, "totals"))
    return 0
