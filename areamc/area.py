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
from .parallel import check_workers, map_ordered
from .project import ProjectedLayer
from .runinfo import RunInfo
from .samplers import Box, SamplerFactory, make_sampler, sampler_name
from .seeds import child_seed, job_root, make_seed
from .stopping import StopRule, Stopper

__all__ = ["AreaRow", "AreaReport", "TraceRow", "estimate_areas", "AREA_FIELDS"]


@dataclass(frozen=True)
class AreaRow:
    """One feature's area estimate and its checks; areas in m² of the equal-area plane.

    Attributes
    ----------
    id : str
    feature_index : int
        Position of the feature in its layer as read (0-based; ``Layer.indices``).
    estimate, std_error, ci_low, ci_high : float
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
    std_error: float
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
    std_error: float
    ci_low: float
    ci_high: float

    def to_dict(self) -> dict:
        return asdict(self)


#: The fields of :class:`AreaRow` and :class:`TraceRow` holding an area (m² of the plane; ``geodesic``
#: m² on WGS84): those an output unit applies to.  The command line and :mod:`areamc.frames` read this list.
AREA_FIELDS = ("estimate", "std_error", "ci_low", "ci_high", "box_area", "exact_planar", "geodesic")


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

    def to_dataframe(self, units: str = "km2", which: str = "rows"):
        """The rows (or, with ``which="trace"``, the running estimates) as a pandas DataFrame, areas
        in `units` (m2, ha, km2, acre, mi2) of the plane; see :func:`areamc.frames.to_dataframe`."""
        from .frames import to_dataframe

        return to_dataframe(self, units, which=which)

    def trace_rows(self) -> list[TraceRow]:
        """The running estimates of every feature, in row order (areas in m²)."""
        out = []
        for row, trace in zip(self.rows, self.traces):
            for point in trace:
                est = AreaEstimate.from_counts(point.sums[0], point.points, row.box_area, self.run.confidence)
                out.append(TraceRow(row.id, row.feature_index, point.points, point.sums[0], est.estimate, est.std_error,
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
    workers: int | None = 1,
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
        ``progress(feature_id, points_drawn, estimate)`` after each chunk; with
        several workers, once per feature as it finishes.
    workers : int or None
        Worker processes the features are shared among (None: every usable
        core; :func:`~areamc.parallel.check_workers`).  Results are the same
        to the last bit for any number: each feature has its own stream.
        With fewer features than workers, each feature's fixed-count run is
        cut into spans of its stream instead (no progress per chunk then).

    Returns
    -------
    AreaReport
        Areas in m² of the equal-area plane ``layer.plane``.
    """
    stop = stop or StopRule()
    confidence = check_confidence(confidence)
    workers = check_workers(workers)
    root = make_seed(seed)
    # fewer features than workers: each feature's run is cut into spans of its stream instead
    split = workers if workers > len(layer) else 1
    job = _AreaJob(layer.planar, job_root(root, "area"), stop, confidence, sampler, chunk, trace_every,
                   progress if workers == 1 or split > 1 else None, tuple(layer.ids), split)
    if workers == 1 or split > 1:
        runs = [_area_feature(job, i) for i in range(len(layer))]
    else:
        # with several workers progress comes per finished feature: its id and its final estimate
        def done(i: int, run: HitOrMissRun) -> None:
            if progress is not None:
                progress(layer.ids[i], run.points + run.pilot_points, run.estimate(0, confidence))

        runs = map_ordered(_area_feature, range(len(layer)), workers, shared=job, done=done)
    exact_areas = planar_area(layer.planar) if exact else None
    rows = []
    for i, (fid, run) in enumerate(zip(layer.ids, runs)):
        planar = float(exact_areas[i]) if exact else None
        geodesic = geodesic_area(layer.lonlat[i]) if exact else None
        rows.append(_row(fid, layer.source.indices[i], run, confidence, planar, geodesic))
    info = RunInfo("area", layer.plane, confidence, int(root.entropy), sampler_name(sampler), stop, layer.densify_m)
    return AreaReport(tuple(rows), info, tuple(run.trace for run in runs) if trace_every else ())


@dataclass(frozen=True)
class _AreaJob:
    """What every feature's estimate needs, sent once to each worker (plane metres)."""

    planar: np.ndarray
    streams: np.random.SeedSequence
    stop: StopRule
    confidence: float
    sampler: object
    chunk: int
    trace_every: int | None
    progress: Progress | None
    ids: tuple[str, ...]
    span_workers: int = 1


def _area_feature(job: _AreaJob, i: int) -> HitOrMissRun:
    """Sample feature `i` in its bounding box, from the stream keyed ("area", i)."""
    geom = job.planar[i]
    box = Box.of(geom.bounds)
    return hit_or_miss(
        make_sampler(job.sampler, child_seed(job.streams, i), box),
        inside(geom, box, job.stop.points),
        Stopper(job.stop, precision=area_precision(box.area, job.confidence)),
        chunk=job.chunk,
        trace_every=job.trace_every,
        progress=None if job.progress is None or job.span_workers > 1 else partial(job.progress, job.ids[i]),
        confidence=job.confidence,
        workers=job.span_workers,
    )


def _row(fid: str, index: int, run: HitOrMissRun, confidence: float, planar: float | None,
         geodesic: float | None) -> AreaRow:
    est = run.estimate(0, confidence)
    z = est.deviation(planar) if planar is not None else None
    return AreaRow(
        id=fid,
        feature_index=index,
        estimate=est.estimate,
        std_error=est.std_error,
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

