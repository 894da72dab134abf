"""The area job: per-feature hit-or-miss estimates with exact checks.

Data flow: :class:`~areamc.project.ProjectedLayer` -> one sampler per feature
(seed child keyed by feature index) -> :func:`~areamc.estimate.hit_or_miss`
inside the feature's bounding box -> exact planar and geodesic areas
(:mod:`areamc.exact`) -> frozen :class:`AreaRow` records.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Callable

import numpy as np

from .classify import inside
from .estimate import DEFAULT_CHUNK, AreaEstimate, StopRule, area_target, check_confidence, hit_or_miss
from .exact import FLAG_Z, deviation, geodesic_area, planar_area
from .project import EqualAreaPlane, ProjectedLayer
from .sampling import Box, UniformSampler, child_seed, make_seed

__all__ = ["AreaRow", "AreaReport", "estimate_areas"]


@dataclass(frozen=True)
class AreaRow:
    """One feature's area estimate and its checks; areas in m² of the equal-area plane.

    Attributes
    ----------
    id : str
    estimate, stderr, ci_low, ci_high : float
        Estimate, standard error and Wilson interval (m²).
    points, hits : int
    box_area : float
        Area of the sampling box (the feature's bounding box in the plane), m².
    exact_planar : float or None
        shapely area of the same geometry in the same plane (None with ``exact=False``).
    geodesic : float or None
        Area on the WGS84 ellipsoid of the densified geometry (pyproj.Geod).
    z : float or None
        ``(estimate - exact_planar) / stderr``, the standard error floored at
        the Wilson half-width over z when all or no points hit
        (:attr:`~areamc.estimate.AreaEstimate.check_scale`).
    flagged : bool
        ``|z| > 4``: the estimate and the exact area disagree beyond chance.
    stopped_early : bool
        A precision target was met before the point cap.
    """

    id: str
    estimate: float
    stderr: float
    ci_low: float
    ci_high: float
    points: int
    hits: int
    box_area: float
    exact_planar: float | None
    geodesic: float | None
    z: float | None
    flagged: bool
    stopped_early: bool

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class AreaReport:
    """Rows of an area job and what produced them.

    Attributes
    ----------
    rows : tuple of AreaRow
    plane : EqualAreaPlane
    confidence : float
    seed_entropy : int
        Root seed entropy; ``--seed <seed_entropy>`` replays the run.
    stop : StopRule
    densify_m : float
    traces : dict of str to tuple of TracePoint
        Running counts per feature id (empty unless tracing was asked for).
    """

    rows: tuple[AreaRow, ...]
    plane: EqualAreaPlane
    confidence: float
    seed_entropy: int
    stop: StopRule
    densify_m: float
    traces: dict

    def metadata(self) -> dict:
        return {
            "equal_area_crs": self.plane.to_dict(),
            "confidence": self.confidence,
            "seed": self.seed_entropy,
            "densify_m": self.densify_m,
            "stop": {
                "points": self.stop.points,
                "tolerance_abs_m2": self.stop.absolute,
                "tolerance_rel": self.stop.relative,
                "max_points": self.stop.max_points,
            },
        }


Progress = Callable[[str, int, AreaEstimate], None]


def estimate_areas(
    layer: ProjectedLayer,
    *,
    stop: StopRule | None = None,
    confidence: float = 0.95,
    seed: int | np.random.SeedSequence | None = None,
    chunk: int = DEFAULT_CHUNK,
    exact: bool = True,
    trace_every: int | None = None,
    progress: Progress | None = None,
) -> AreaReport:
    """Estimate the area of every feature of a projected layer.

    Parameters
    ----------
    layer : ProjectedLayer
        Geometries in an equal-area plane (metres).
    stop : StopRule, optional
        Default: a fixed 100 000 points per feature.
    confidence : float
        Interval level in (0, 1).
    seed : int or SeedSequence, optional
        Root seed; feature ``i`` samples from child ``(i,)``.  None draws fresh
        entropy, recorded in the report.
    chunk : int
        Points per chunk (memory bound); does not change results.
    exact : bool
        Compute the exact planar and geodesic checks.
    trace_every : int, optional
        Record running counts every this many points.
    progress : callable, optional
        ``progress(feature_id, points_so_far, estimate)`` after each chunk.

    Returns
    -------
    AreaReport
        Areas in m² of the equal-area plane ``layer.plane``.
    """
    stop = stop or StopRule()
    confidence = check_confidence(confidence)
    root = make_seed(seed)
    exact_areas = planar_area(layer.planar) if exact else None
    rows: list[AreaRow] = []
    traces: dict = {}
    for i, (fid, geom) in enumerate(zip(layer.ids, layer.planar)):
        box = Box.of(geom.bounds)
        run = hit_or_miss(
            box,
            inside(geom),
            UniformSampler(child_seed(root, i)),
            budget=stop.budget,
            done=area_target(stop, box.area, confidence),
            chunk=chunk,
            trace_every=trace_every,
            progress=None if progress is None else _report(progress, fid, box.area, confidence),
        )
        est = run.estimate(0, confidence)
        if trace_every:
            traces[fid] = run.trace
        planar = float(exact_areas[i]) if exact else None
        geodesic = geodesic_area(layer.lonlat[i]) if exact else None
        z = deviation(est.estimate, planar, est.check_scale) if exact else None
        rows.append(
            AreaRow(
                id=fid,
                estimate=est.estimate,
                stderr=est.stderr,
                ci_low=est.ci_low,
                ci_high=est.ci_high,
                points=est.points,
                hits=est.hits,
                box_area=est.box_area,
                exact_planar=planar,
                geodesic=geodesic,
                z=z,
                flagged=bool(z is not None and abs(z) > FLAG_Z),
                stopped_early=run.stopped_early,
            )
        )
    return AreaReport(tuple(rows), layer.plane, confidence, int(root.entropy), stop, layer.densify_m, traces)


def _report(progress: Progress, fid: str, box_area: float, confidence: float):
    def call(points: int, hits) -> None:
        progress(fid, points, AreaEstimate.from_counts(int(hits[0]), points, box_area, confidence))

    return call
