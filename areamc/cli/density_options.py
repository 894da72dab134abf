"""``--density`` and its companions, shared by ``integrate`` and ``coverage``."""

from __future__ import annotations

import argparse
import warnings

from ..density import RASTER_VALUES, DensitySpec, parse_origin, read_density
from ..errors import AreamcWarning
from .common import flags

__all__ = ["add_density_options", "read_density_option", "density_metadata"]


def add_density_options(parser: argparse.ArgumentParser, *, required: bool) -> None:
    parser.add_argument("--density", required=required, metavar="SOURCE",
                        help="a block layer with --count-field, a raster (GeoTIFF), or an expression giving "
                        "a density per m2 in lon, lat (WGS84 degrees), east, north (metres east and north of "
                        "--origin) or x, y (metres on the computation plane from its origin, which moves with the "
                        "data unless --plane-crs names the plane)")
    parser.add_argument("--density-kind", choices=("auto", "blocks", "raster", "expression"), default="auto",
                        help="how to read SOURCE (default: a raster by extension, a vector file, else an expression)")
    parser.add_argument("--origin", metavar="LON,LAT",
                        help="the point (WGS84 degrees) an expression's east, north are measured from, in metres "
                        "on an equal-area plane centred there")
    parser.add_argument("--density-layer", metavar="NAME", help="layer of the block file")
    parser.add_argument("--density-input-crs", metavar="CRS",
                        help="CRS to read the block file's coordinates in (EPSG code, PROJ string or WKT): needed "
                        "when it declares none; one that differs from a declared CRS overrides it, with a warning")
    parser.add_argument("--density-open-option", action="append", metavar="KEY=VALUE",
                        help="a GDAL open option of the block file's driver, repeated for several (such as "
                        "X_POSSIBLE_NAMES=lon for a CSV)")
    parser.add_argument("--count-field", metavar="FIELD", help="attribute of each block holding its count (e.g. population)")
    parser.add_argument("--raster-values", choices=list(RASTER_VALUES), default="count",
                        help="what raster cells hold: a count per cell, or a density per m2, ha or km2 (default count)")
    parser.add_argument("--band", type=int, default=1, metavar="N", help="raster band (default 1)")
    parser.add_argument("--no-importance", action="store_true",
                        help="sample uniformly even where the density allows importance sampling")


def read_density_option(args) -> DensitySpec | None:
    """Read the density source named by ``--density`` (blocks are loaded here, to be projected)."""
    if args.density is None:
        if args.origin is not None:
            parse_origin(args.origin)  # strict even when unused
            warnings.warn(AreamcWarning("{param} is not used: no density was named (it is the point a density "
                                        "expression's east, north are measured from)", param="origin"), stacklevel=2)
        return None
    with flags(layer="--density-layer", input_crs="--density-input-crs",
               open_options="--density-open-option"):
        return read_density(args.density, kind=args.density_kind, layer=args.density_layer,
                            count_field=args.count_field, values=args.raster_values, band=args.band,
                            origin=args.origin, open_options=args.density_open_option,
                            input_crs=args.density_input_crs)


def density_metadata(args, spec: DensitySpec | None) -> dict | None:
    """What the density source was, for result metadata."""
    if spec is None:
        return None
    return {**spec.to_dict(), "importance": not args.no_importance}
