"""``--density`` and its companions, shared by ``integrate`` and ``coverage``."""

from __future__ import annotations

import argparse
import os

from ..density import RASTER_VALUES, BlockDensity, ExpressionDensity, RasterDensity, block_counts
from ..errors import LayerError, OptionError
from ..expression import parse_expression
from ..load import read_layer

__all__ = ["add_density_options", "DensityInput", "read_density", "build_density", "density_metadata"]

_RASTER_EXT = (".tif", ".tiff", ".vrt", ".img", ".asc")


def add_density_options(parser: argparse.ArgumentParser, *, required: bool) -> None:
    parser.add_argument("--density", required=required, metavar="SOURCE",
                        help="a block layer with --count-field, a raster (GeoTIFF), or an expression in "
                        "x, y (plane metres) or lon, lat (degrees) giving a density per m²")
    parser.add_argument("--density-kind", choices=("auto", "blocks", "raster", "expression"), default="auto",
                        help="how to read SOURCE (default: a raster by extension, a vector file, else an expression)")
    parser.add_argument("--density-layer", metavar="NAME", help="layer of the block file")
    parser.add_argument("--count-field", metavar="FIELD", help="attribute of each block holding its count (e.g. population)")
    parser.add_argument("--raster-values", choices=list(RASTER_VALUES), default="count",
                        help="what raster cells hold: a count per cell, or a density per m2, ha or km2 (default count)")
    parser.add_argument("--band", type=int, default=1, metavar="N", help="raster band (default 1)")
    parser.add_argument("--no-importance", action="store_true",
                        help="sample uniformly even where the density allows importance sampling")


class DensityInput:
    """What ``--density`` names, read but not yet on a plane."""

    def __init__(self, kind: str, spec: str, blocks=None, expression=None) -> None:
        self.kind = kind
        self.spec = spec
        self.blocks = blocks
        self.expression = expression


def read_density(args) -> DensityInput | None:
    """Read the density source named on the command line (blocks are loaded here, to be projected)."""
    spec = args.density
    if spec is None:
        return None
    kind = args.density_kind
    if kind == "auto":
        if os.path.exists(spec):
            kind = "raster" if spec.lower().endswith(_RASTER_EXT) else "blocks"
        elif spec.lower().endswith(_RASTER_EXT + (".gpkg", ".shp", ".geojson")):
            raise LayerError(f"{spec}: no such file")
        else:
            kind = "expression"
    if kind == "blocks":
        if not args.count_field:
            raise OptionError(f"--density {spec}: a block layer needs --count-field FIELD")
        blocks = read_layer(spec, layer=args.density_layer)
        block_counts(blocks, args.count_field)  # validate before any work
        return DensityInput(kind, spec, blocks=blocks)
    if kind == "expression":
        return DensityInput(kind, spec, expression=parse_expression(spec))
    return DensityInput(kind, spec)


def build_density(args, source: DensityInput, plane, projected_blocks=None, regions=None):
    """Make the density source on `plane` (blocks already projected onto it)."""
    if source.kind == "blocks":
        return BlockDensity(projected_blocks, block_counts(source.blocks, args.count_field))
    if source.kind == "expression":
        return ExpressionDensity(source.expression, plane)
    raster = RasterDensity(source.spec, plane, values=args.raster_values, band=args.band)
    if regions is not None and not any(raster.overlaps(g) for g in regions.planar):
        raise LayerError(f"{source.spec}: the raster does not overlap the regions")
    return raster


def density_metadata(args, source: DensityInput | None) -> dict | None:
    """What the density source was, for result metadata."""
    if source is None:
        return None
    return {"source": args.density, "kind": source.kind, "count_field": args.count_field,
            "raster_values": args.raster_values if source.kind == "raster" else None,
            "importance": not args.no_importance}
