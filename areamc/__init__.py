"""areamc: Monte Carlo areas, overlaps, coverage and weighted totals of polygon layers.

Every estimate carries a confidence interval and is checked against exact
planar (shapely) and geodesic (pyproj.Geod) references.  The steps of the
command line form the public API (docs/api.md): load -> project -> estimate.
Areas are in m² of an equal-area plane; distances in metres.
"""

__version__ = "0.1.0"

from .area import AreaReport, AreaRow, TraceRow, estimate_areas
from .coverage import CoverageReport, CoverageRow, PopulationShare, estimate_coverage
from .density import (
    BlockDensity,
    DensitySpec,
    ExpressionDensity,
    RasterDensity,
    block_counts,
    build_density,
    read_density,
)
from .describe import LayerDescription, describe_layer
from .errors import AreamcError, AreamcWarning, CRSError, InputError, LayerError, NotEqualAreaError, OptionError
from .estimate import AreaEstimate, TotalEstimate
from .integrate import IntegrateReport, IntegrateRow, integrate_density
from .intervals import wilson_interval
from .load import Layer, layer_from_geometries, read_layer
from .overlap import MultiplicityRow, OverlapReport, OverlapRow, estimate_overlaps, overlap_geometries
from .project import EqualAreaPlane, ProjectedLayer, project_layer, project_layers, resolve_plane
from .runinfo import RunInfo
from .samplers import Box, Sampler, UniformSampler, make_sampler, register_sampler
from .sequential import confidence_sequence, verdict
from .stopping import StopRule
from .zones import geodesic_circle, read_zones, zones_from_points

__all__ = [
    "__version__",
    "AreaEstimate",
    "AreaReport",
    "AreaRow",
    "AreamcError",
    "AreamcWarning",
    "BlockDensity",
    "Box",
    "CRSError",
    "CoverageReport",
    "CoverageRow",
    "DensitySpec",
    "EqualAreaPlane",
    "ExpressionDensity",
    "InputError",
    "IntegrateReport",
    "IntegrateRow",
    "Layer",
    "LayerDescription",
    "LayerError",
    "MultiplicityRow",
    "NotEqualAreaError",
    "OptionError",
    "OverlapReport",
    "OverlapRow",
    "PopulationShare",
    "ProjectedLayer",
    "RasterDensity",
    "RunInfo",
    "Sampler",
    "StopRule",
    "TotalEstimate",
    "TraceRow",
    "UniformSampler",
    "block_counts",
    "build_density",
    "confidence_sequence",
    "describe_layer",
    "estimate_areas",
    "estimate_coverage",
    "estimate_overlaps",
    "geodesic_circle",
    "integrate_density",
    "layer_from_geometries",
    "make_sampler",
    "overlap_geometries",
    "project_layer",
    "project_layers",
    "read_density",
    "read_layer",
    "read_zones",
    "register_sampler",
    "resolve_plane",
    "verdict",
    "wilson_interval",
    "zones_from_points",
]
