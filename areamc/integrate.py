"""The integrate job: totals of a density (for example persons) over regions.

Per region the density source is prepared (a raster window is read), then
:func:`~areamc.weighted.weighted_run` samples it by importance where the
source allows, else uniformly; the exact total (areal weighting for blocks,
cell fractions for rasters) is the check.  Totals are in the source's count
unit; mean densities per m² of the equal-area plane.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
import shapely

from .density import DensitySource
from .estimate import DEFAULT_CHUNK, StopRule, check_confidence
from .exact import FLAG_Z, deviation, planar_area
from .project import EqualAreaPlane, ProjectedLayer
from .sampling import make_seed
from .weighted import WeightedRun, weighted_run

__all__ = ["IntegrateRow", "IntegrateReport", "integrate_density", "total_target"]


@dataclass(frozen=True)
class IntegrateRow:
    """The integral of a density over region `id`.

    Attributes
    ----------
    estimate, stderr, ci_low, ci_high : float
        Total (count unit of the source, e.g. persons), standard error and
        interval (Wilson for importance sampling, normal for uniform).
    mean_density : float
        ``estimate / region_area``: count per m².
    region_area : float
        Exact planar area of the region, m².
    points : int
    method : str
        "importance", "uniform", or "none" (no density near the region).
    exact : float or None
        Exact total from the source (areal weighting, cell fractions), or None.
    z : float or None
        ``(estimate − exact) / stderr``.
    """

    id: str
    estimate: float
    stderr: float
    ci_low: float
    ci_high: float
    mean_density: float
    region_area: float
    points: int
    method: str
    exact: float | None
    z: float | None
    flagged: bool

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class IntegrateReport:
    rows: tuple[IntegrateRow, ...]
    plane: EqualAreaPlane
    confidence: float
    seed_entropy: int
    source: str

    def metadata(self) -> dict:
        return {
            "equal_area_crs": self.plane.to_dict(),
            "confidence": self.confidence,
            "seed": self.seed_entropy,
            "density_source": self.source,
        }


def total_target(stop: StopRule, confidence: float):
    """Early-stopping test of `stop` on the total (column 0) of a weighted run."""
    if not stop.adaptive:
        return None

    def done(method, scale, sums, sumsq, points) -> bool:
        if points < 2 or sums[0] <= 0:
            return False
        est = WeightedRun(method, points, scale, sums, sumsq, False).total(confidence)
        return stop.met(est.half_width, est.estimate)

    return done


def integrate_density(
    regions: ProjectedLayer,
    source: DensitySource,
    *,
    stop: StopRule | None = None,
    confidence: float = 0.95,
    seed: int | np.random.SeedSequence | None = None,
    chunk: int = DEFAULT_CHUNK,
    importance: bool = True,
    exact: bool = True,
) -> IntegrateReport:
    """Integrate a density over each region.

    Parameters
    ----------
    regions : ProjectedLayer
        Regions in the equal-area plane (metres).
    source : DensitySource
        Density per m² at plane points (blocks, raster or expression).
    stop : StopRule
        Points per region, or a precision target on the total (absolute in
        the count unit, or relative).
    importance : bool
        Sample by importance where the source allows (blocks, rasters).
    exact : bool
        Compute the source's exact total as a check.

    Returns
    -------
    IntegrateReport
    """
    stop = stop or StopRule()
    confidence = check_confidence(confidence)
    root = make_seed(seed)
    shapely.prepare(regions.planar)
    areas = planar_area(regions.planar)
    rows = []
    for r, (rid, region) in enumerate(zip(regions.ids, regions.planar)):
        source.prepare(region)
        run = weighted_run(
            region,
            lambda x, y, region=region: shapely.contains_xy(region, x, y)[:, None],
            source,
            root,
            (r,),
            budget=stop.budget,
            chunk=chunk,
            importance=importance,
            done=total_target(stop, confidence),
        )
        truth = source.exact_total(region) if exact else None
        if run is None:
            rows.append(IntegrateRow(rid, 0.0, 0.0, 0.0, 0.0, 0.0, float(areas[r]), 0, "none", truth,
                                     deviation(0.0, truth, 0.0) if truth is not None else None, False))
            continue
        est = run.total(confidence)
        z = deviation(est.estimate, truth, est.check_scale) if truth is not None else None
        rows.append(
            IntegrateRow(
                id=rid, estimate=est.estimate, stderr=est.stderr, ci_low=est.ci_low, ci_high=est.ci_high,
                mean_density=float(est.estimate / areas[r]) if areas[r] > 0 else math.nan, region_area=float(areas[r]),
                points=run.points, method=run.method, exact=truth, z=z,
                flagged=bool(z is not None and abs(z) > FLAG_Z),
            )
        )
    source.finish()
    return IntegrateReport(tuple(rows), regions.plane, confidence, int(root.entropy), source.label)
