"""areamc: Monte Carlo areas, overlaps, coverage and weighted totals of polygon layers.

Every estimate carries a confidence interval and is checked against exact
planar (shapely) and geodesic (pyproj.Geod) references.  The steps of the
command line form the public API (docs/api.md): load -> project -> estimate.
Areas are in m² of an equal-area plane; distances in metres.
"""

__version__ = "0.1.0"

from .area import AreaReport, AreaRow, estimate_areas
from .coverage import CoverageReport, CoverageRow, estimate_coverage
from .density import BlockDensity, ExpressionDensity, RasterDensity, block_counts
from .errors import AreamcError, CRSError, InputError, LayerError, NotEqualAreaError, OptionError
from .estimate import AreaEstimate, StopRule, wilson_interval
from .integrate import IntegrateReport, IntegrateRow, integrate_density
from .load import AreamcWarning, Layer, layer_from_geometries, read_layer
from .overlap import MultiplicityRow, OverlapReport, OverlapRow, estimate_overlaps
from .project import EqualAreaPlane, ProjectedLayer, project_layer, project_layers, resolve_plane
from .sequential import confidence_sequence, verdict
from .zones import geodesic_circle, read_zones, zones_from_points

__all__ = [
    "__version__",
    "AreaEstimate",
    "AreaReport",
    "AreaRow",
    "AreamcError",
    "AreamcWarning",
    "BlockDensity",
    "CRSError",
    "CoverageReport",
    "CoverageRow",
    "EqualAreaPlane",
    "ExpressionDensity",
    "InputError",
    "IntegrateReport",
    "IntegrateRow",
    "Layer",
    "LayerError",
    "MultiplicityRow",
    "NotEqualAreaError",
    "OptionError",
    "OverlapReport",
    "OverlapRow",
    "ProjectedLayer",
    "RasterDensity",
    "StopRule",
    "block_counts",
    "confidence_sequence",
    "estimate_areas",
    "estimate_coverage",
    "estimate_overlaps",
    "geodesic_circle",
    "integrate_density",
    "layer_from_geometries",
    "project_layer",
    "project_layers",
    "read_layer",
    "read_zones",
    "resolve_plane",
    "verdict",
    "wilson_interval",
    "zones_from_points",
]
