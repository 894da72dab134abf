"""The area job: per-feature hit-or-miss estimates with exact checks.

Data flow: :class:`~areamc.project.ProjectedLayer` -> one sampler per feature
(from :func:`~areamc.samplers.make_sampler`, stream keyed by job and feature
index) -> :func:`~areamc.engine.hit_or_miss` inside the feature's bounding
box -> exact planar and geodesic areas (:mod:`areamc.exact`) -> frozen
:class:`AreaRow` records.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from functools import partial
from typing import Callable

import numpy as np

from .checks import flagged
from .classify import inside
from .engine import DEFAULT_CHUNK, HitOrMissRun, hit_or_miss
from .estimate import AreaEstimate, area_precision
from .exact import geodesic_area, planar_area
from .intervals import check_confidence
from .project import ProjectedLayer
from .runinfo import RunInfo
from .samplers import Box, SamplerFactory, make_sampler, sampler_name
from .seeds import child_seed, job_root, make_seed
from .stopping import StopRule, Stopper

__all__ = ["AreaRow", "AreaReport", "TraceRow", "estimate_areas"]


@dataclass(frozen=True)
class AreaRow:
    """One feature's area estimate and its checks; areas in m² of the equal-area plane.

    Attributes
    ----------
    id : str
    feature_index : int
        Position of the feature in its layer as read (0-based; ``Layer.indices``).
    estimate, stderr, ci_low, ci_high : float
        Estimate, standard error and Wilson interval (m²).
    points, hits : int
        Points behind the estimate and those inside the feature.
    box_area : float
        Area of the sampling box (the feature's bounding box in the plane), m².
    exact_planar : float or None
        shapely area of the same geometry in the same plane (None with ``exact=False``).
    geodesic : float or None
        Area on the WGS84 ellipsoid of the densified geometry (pyproj.Geod).
    z : float or None
        Deviation of the hit count from the exact planar area, as a normal
        score of the binomial mid-p tail (:func:`~areamc.checks.binomial_deviation`).
    flagged : bool
        ``|z| > 4``: the estimate and the exact area disagree beyond chance.
    stop_reason : str
        Why sampling stopped ("budget", "target", "time").
    pilot_points : int
        Points of the pilot stage of a precision target, not in the estimate.
    replicates : int
        0 for a binomial count (Wilson interval, uniform sampler); else the
        independent replicates (Sobol scramblings, rounds of strata) whose
        spread gave the standard error and a Student-t interval.
    """

    id: str
    feature_index: int
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
    stop_reason: str
    pilot_points: int
    replicates: int = 0

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class TraceRow:
    """The running estimate of one feature (`feature_index`: its position in the layer) after `points` points; areas in m²."""

    id: str
    feature_index: int
    points: int
    hits: int
    estimate: float
    stderr: float
    ci_low: float
    ci_high: float

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class AreaReport:
    """Rows of an area job and what produced them.

    Attributes
    ----------
    rows : tuple of AreaRow
    run : RunInfo
    traces : tuple of tuple of TracePoint
        Running counts per row, in row order (empty unless tracing was asked for).
    """

    rows: tuple[AreaRow, ...]
    run: RunInfo
    traces: tuple = ()

    def metadata(self) -> dict:
        return self.run.to_dict()

    def trace_rows(self) -> list[TraceRow]:
        """The running estimates of every feature, in row order (areas in m²)."""
        out = []
        for row, trace in zip(self.rows, self.traces):
            for point in trace:
                est = AreaEstimate.from_counts(point.sums[0], point.points, row.box_area, self.run.confidence)
                out.append(TraceRow(row.id, row.feature_index, point.points, point.sums[0], est.estimate, est.stderr,
                                    est.ci_low, est.ci_high))
        return out


#: ``progress(feature_id, points_drawn, estimate)`` after each chunk.
Progress = Callable[[str, int, AreaEstimate], None]


def estimate_areas(
    layer: ProjectedLayer,
    *,
    stop: StopRule | None = None,
    confidence: float = 0.95,
    seed: int | np.random.SeedSequence | None = None,
    sampler: str | SamplerFactory = "uniform",
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
        Root seed; feature ``i`` samples from the stream keyed ``("area", i)``.
        None draws fresh entropy, recorded in the report.
    sampler : str or sampler class
        A name registered in :mod:`areamc.samplers`, or a class built as ``cls(seed, box)``.
    chunk : int
        Points per chunk (memory bound); does not change fixed-count results.
    exact : bool
        Compute the exact planar and geodesic checks.
    trace_every : int, optional
        Record running counts every this many points.
    progress : callable, optional
        ``progress(feature_id, points_drawn, estimate)`` after each chunk.

    Returns
    -------
    AreaReport
        Areas in m² of the equal-area plane ``layer.plane``.
    """
    stop = stop or StopRule()
    confidence = check_confidence(confidence)
    root = make_seed(seed)
    streams = job_root(root, "area")
    exact_areas = planar_area(layer.planar) if exact else None
    rows: list[AreaRow] = []
    traces = []
    for i, (fid, geom) in enumerate(zip(layer.ids, layer.planar)):
        box = Box.of(geom.bounds)
        run = hit_or_miss(
            make_sampler(sampler, child_seed(streams, i), box),
            inside(geom, box, stop.points),
            Stopper(stop, precision=area_precision(box.area, confidence)),
            chunk=chunk,
            trace_every=trace_every,
            progress=None if progress is None else partial(progress, fid),
            confidence=confidence,
        )
        traces.append(run.trace)
        planar = float(exact_areas[i]) if exact else None
        geodesic = geodesic_area(layer.lonlat[i]) if exact else None
        rows.append(_row(fid, layer.source.indices[i], run, confidence, planar, geodesic))
    info = RunInfo("area", layer.plane, confidence, int(root.entropy), sampler_name(sampler), stop, layer.densify_m)
    return AreaReport(tuple(rows), info, tuple(traces) if trace_every else ())


def _row(fid: str, index: int, run: HitOrMissRun, confidence: float, planar: float | None,
         geodesic: float | None) -> AreaRow:
    est = run.estimate(0, confidence)
    z = est.deviation(planar) if planar is not None else None
    return AreaRow(
        id=fid,
        feature_index=index,
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
        flagged=flagged(z),
        stop_reason=run.reason,
        pilot_points=run.pilot_points,
        replicates=est.replicates,
    )

