"""``areamc integrate REGIONS --density SOURCE``: totals of a density (e.g. population) per region."""

from __future__ import annotations

from .. import __version__
from ..errors import OptionError
from ..estimate import StopRule
from ..exact import FLAG_Z
from ..integrate import integrate_density
from ..load import read_layer
from ..output import Column
from ..project import project_layers
from .common import (
    add_layer_options,
    add_output_options,
    add_plane_options,
    add_sampling_options,
    check_outputs,
    emit,
    output_format,
)
from .density_options import add_density_options, build_density, read_density

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


def _stop(args) -> StopRule:
    """``--tolerance``: a percentage of the total, or an absolute count (e.g. persons)."""
    if args.tolerance is None:
        return StopRule(points=args.points or 100_000, max_points=args.max_points)
    if args.points is not None:
        raise OptionError("--points and --tolerance exclude each other; give one")
    text = args.tolerance.strip()
    try:
        value = float(text[:-1]) if text.endswith("%") else float(text)
    except ValueError:
        raise OptionError(f"--tolerance: expected a count or a percentage such as 0.5%, got {args.tolerance!r}") from None
    if not value > 0 or value == float("inf"):
        raise OptionError(f"--tolerance: must be positive, got {args.tolerance!r}")
    if text.endswith("%"):
        return StopRule(points=None, relative=value / 100, max_points=args.max_points)
    return StopRule(points=None, absolute=value, max_points=args.max_points)


def run(args) -> int:
    stop = _stop(args)
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
        "tool": "areamc",
        "version": __version__,
        "command": " ".join(args.argv),
        "input": {"path": regions.path, "layer": regions.layer, "crs": regions.crs.to_string(), "features": len(regions)},
        "density": {"source": args.density, "kind": source_input.kind, "count_field": args.count_field,
                    "raster_values": args.raster_values if source_input.kind == "raster" else None},
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
