"""The integrate job: totals of a density (for example persons) over regions.

Per region the density source gives its view of the region (a raster window
is read), then :func:`~areamc.weighted.weighted_run` samples it by importance:
over its blocks or cells, else from a pilot grid of density values (uniformly
only when importance sampling is turned off); the exact total (areal weighting for
blocks, cell fractions for rasters, :mod:`areamc.exact`) is the check.
Totals are in the source's count unit; mean densities per m² of the
equal-area plane.
"""

from __future__ import annotations

import math
import time
from dataclasses import asdict, dataclass, field

import numpy as np
import shapely

from .checks import flagged, normal_deviation
from .classify import inside
from .density import DensitySource, warn_nodata
from .engine import DEFAULT_CHUNK
from .errors import OptionError
from .exact import planar_area
from .intervals import check_confidence
from .parallel import (
    JobMeter,
    JobProgress,
    SourceHandle,
    check_workers,
    map_ordered,
    source_handle,
    workers_for_source,
)
from .project import ProjectedLayer
from .runinfo import RunInfo
from .samplers import Box, SamplerFactory, sampler_name, check_sampler
from .seeds import child_seed, job_root, make_seed
from .stopping import StopRule
from .weighted import (
    NONE,
    TOTAL,
    Concentration,
    check_weighted_rule,
    concentration,
    concentration_warning,
    effective_points,
    weighted_run,
)

__all__ = ["IntegrateRow", "IntegrateReport", "integrate_density", "AREA_FIELDS", "PER_AREA_FIELDS", "COMPUTED",
           "NOT_COMPUTED", "TIMED_OUT"]

#: A region's exact-total status (``IntegrateReport.exact_status``): computed; not computed (not asked,
#: or a source with no exact total: expressions); not done within ``exact_time_limit_s``.
COMPUTED = "computed"
NOT_COMPUTED = "not-computed"
TIMED_OUT = "timed-out"


@dataclass(frozen=True)
class IntegrateRow:
    """The integral of a density over region `id`.

    Attributes
    ----------
    feature_index : int
        Position of the region in its layer as read (0-based; ``Layer.indices``).
    estimate, std_error, ci_low, ci_high : float
        Total (count unit of the source, e.g. persons), standard error and
        interval (Wilson for importance sampling over units, normal for grid and uniform sampling).
    mean_density : float
        ``estimate / region_area``: count per m².
    region_area : float
        Exact planar area of the region, m².
    points : int
    method : str
        "importance" (over blocks or cells), "grid-importance" (from a pilot grid of density values:
        expressions, rasters in a CRS that is not equal-area), "uniform", or "none" (no density near the region).
    exact : float or None
        Exact total from the source (areal weighting, cell fractions), or None (not asked, none for
        this source, or not done within ``exact_time_limit_s``: see ``IntegrateReport.exact_status``).
    z : float or None
        Deviation from the exact total: the binomial mid-p score for
        importance sampling, standard errors for uniform sampling (:mod:`areamc.checks`).
    flagged : bool
    stop_reason : str
        Why sampling stopped ("budget", "target", "time"), or "none" when nothing was sampled.
    pilot_points : int
    effective_points : float
        Kish's effective number of points of the run (:attr:`~areamc.weighted.WeightedRun.effective_points`);
        below :data:`~areamc.weighted.MIN_EFFECTIVE_POINTS` the interval is not to be trusted (a warning says so).
    largest_weight_share : float
        The largest share of the sampled in-region total carried by one point (0..1; ``1/hits`` for
        importance sampling over units, 0 when nothing was met); above
        :data:`~areamc.weighted.MAX_WEIGHT_SHARE` a warning says the interval is not to be trusted.
    """

    id: str
    feature_index: int
    estimate: float
    std_error: float
    ci_low: float
    ci_high: float
    mean_density: float
    region_area: float
    points: int
    method: str
    exact: float | None
    z: float | None
    flagged: bool
    stop_reason: str
    pilot_points: int
    effective_points: float = 0.0
    largest_weight_share: float = 0.0

    def to_dict(self) -> dict:
        return asdict(self)


#: The fields of :class:`IntegrateRow` holding an area (m² of the plane) and a density per m²: those an
#: output unit applies to (totals are counts).  The command line and :mod:`areamc.frames` read these lists.
AREA_FIELDS = ("region_area",)
PER_AREA_FIELDS = ("mean_density",)


@dataclass(frozen=True)
class IntegrateReport:
    """Rows of an integrate job, the run's settings, the density source's label, and each region's exact status.

    `exact_status` maps region id to :data:`COMPUTED`, :data:`NOT_COMPUTED` or :data:`TIMED_OUT`.
    """

    rows: tuple[IntegrateRow, ...]
    run: RunInfo
    source: str
    exact_status: dict = field(default_factory=dict)

    def metadata(self) -> dict:
        return {**self.run.to_dict(), "exact_status": self.exact_status}

    def to_dataframe(self, units: str = "km2"):
        """The rows as a pandas DataFrame, ``region_area`` in `units` (m2, ha, km2, acre, mi2) of the
        plane and ``mean_density`` in counts per `units`; see :func:`areamc.frames.to_dataframe`."""
        from .frames import to_dataframe

        return to_dataframe(self, units)


def integrate_density(
    regions: ProjectedLayer,
    source: DensitySource,
    *,
    stop: StopRule | None = None,
    confidence: float = 0.95,
    seed: int | np.random.SeedSequence | None = None,
    sampler: str | SamplerFactory = "uniform",
    chunk: int = DEFAULT_CHUNK,
    importance: bool = True,
    exact: bool = True,
    exact_time_limit_s: float = 10.0,
    workers: int | None = 1,
    progress: JobProgress | None = None,
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
    seed : int or SeedSequence, optional
        Region ``r`` samples from the stream keyed ``("integrate", r)``.
    sampler : str or sampler class
        See :func:`~areamc.samplers.make_sampler`.
    importance : bool
        Sample by importance: over blocks or cells where the source has them, else from a pilot grid
        of density values (expressions); False samples uniformly in each region's box.
    exact : bool
        Compute the source's exact total as a check.
    exact_time_limit_s : float
        Seconds allowed per region for the exact total (wall clock; > 0, ``math.inf`` for no
        limit).  A region whose exact total is not done in time gets ``exact`` None and the status
        :data:`TIMED_OUT`; the deadline is checked between steps of the computation (raster cell
        fractions: between tiles of cells; block totals are one overlay, not interrupted).
    workers : int or None
        Worker processes regions are shared among (None: every usable core); the rows are
        identical, bit for bit, for any number (:func:`~areamc.parallel.map_ordered`).  A raster
        is reopened by its path in each worker.
    progress : callable, optional
        ``progress(done, total, unit, note)`` (:data:`~areamc.parallel.JobProgress`): regions
        (``"region"``) counted as each finishes, in region order, noted with its id; when the
        regions run in this process (one worker, or one region), also the step running
        (``"r3: sampling"``, ``"r3: exact total"``), with the count unchanged.  It never
        changes a result.

    Returns
    -------
    IntegrateReport
    """
    stop = stop or StopRule()
    check_weighted_rule(stop)
    confidence = check_confidence(confidence)
    check_sampler(sampler, "integrate")
    workers = check_workers(workers)
    if isinstance(exact_time_limit_s, bool) or not (isinstance(exact_time_limit_s, (int, float))
                                                    and exact_time_limit_s > 0):
        raise OptionError(f"{{param}}: give a time in seconds above 0, got {exact_time_limit_s!r}",
                          param="exact_time_limit_s")
    root = make_seed(seed)
    streams = job_root(root, "integrate")
    shapely.prepare(regions.planar)
    areas = planar_area(regions.planar)
    handle = source_handle(source)
    meter = JobMeter(progress, len(regions), "region")
    meter(0)
    workers = workers_for_source(workers, handle, len(regions))
    job = _IntegrateJob(regions, areas, handle, stop, confidence, streams, sampler, chunk, importance, exact,
                        meter.here(workers, len(regions)), exact_time_limit_s=float(exact_time_limit_s))
    results = map_ordered(_integrate_region, range(len(regions)), workers, shared=job,
                          done=meter.items(lambda r: regions.ids[r]))
    rows = [result.row for result in results]
    warn_nodata(source, results)
    concentration_warning("integrate", [result.concentrated for result in results if result.concentrated])
    info = RunInfo("integrate", regions.plane, confidence, int(root.entropy), sampler_name(sampler), stop,
                   regions.densify_m)
    status = {regions.ids[r]: result.exact_status for r, result in enumerate(results)}
    return IntegrateReport(tuple(rows), info, source.label, status)


@dataclass(frozen=True)
class _IntegrateJob:
    """What every region's work shares (sent once to each worker process; plane metres)."""

    regions: ProjectedLayer
    areas: np.ndarray
    source: SourceHandle
    stop: StopRule
    confidence: float
    streams: np.random.SeedSequence
    sampler: str | SamplerFactory
    chunk: int
    importance: bool
    exact: bool
    #: Reports the steps of a region run in the calling process (None in worker processes).
    meter: JobMeter | None = None
    exact_time_limit_s: float = 10.0


@dataclass(frozen=True)
class _RegionTotal:
    """One region's row, the nodata cells its view met, its concentration note and its exact status."""

    row: IntegrateRow
    nodata_cells: np.ndarray
    concentrated: Concentration | None = None
    exact_status: str = NOT_COMPUTED


def _integrate_region(job: _IntegrateJob, r: int) -> _RegionTotal:
    """Sample region `r` from its stream and build its row; runs in any process."""
    regions, areas, confidence = job.regions, job.areas, job.confidence
    rid, region = regions.ids[r], regions.planar[r]
    if job.meter is not None:
        job.meter(r, f"{rid}: sampling")
    view = job.source.get().for_region(region)
    in_region = inside(region, Box.of(region.bounds), job.stop.points)
    run = weighted_run(
        view,
        lambda x, y: in_region(x, y)[:, None],
        child_seed(job.streams, r),
        stop=job.stop,
        confidence=confidence,
        target=TOTAL,
        sampler=job.sampler,
        chunk=job.chunk,
        importance=job.importance,
        # blocks wholly inside the region are counted, not sampled
        split=view.split((), ()) if job.importance and hasattr(view, "split") else None,
    )
    if job.meter is not None and job.exact:
        job.meter(r, f"{rid}: exact total")
    truth, status = _exact_total(view, job.exact, job.exact_time_limit_s)
    if run is None:  # no density near the region: nothing was sampled
        z = normal_deviation(0.0, truth, 0.0) if truth is not None else None
        row = IntegrateRow(rid, regions.source.indices[r], 0.0, 0.0, 0.0, 0.0, 0.0, float(areas[r]), 0,
                           NONE, truth, z, flagged(z), NONE, 0)
        return _RegionTotal(row, view.nodata_cells, exact_status=status)
    est = run.total(confidence)
    z = est.deviation(truth) if truth is not None else None
    effective = effective_points(run, view, truth)
    row = IntegrateRow(
        id=rid, feature_index=regions.source.indices[r], estimate=est.estimate, std_error=est.std_error,
        ci_low=est.ci_low, ci_high=est.ci_high,
        mean_density=float(est.estimate / areas[r]) if areas[r] > 0 else math.nan, region_area=float(areas[r]),
        points=run.points, method=run.method, exact=truth, z=z, flagged=flagged(z),
        stop_reason=run.reason, pilot_points=run.pilot_points, effective_points=effective,
        largest_weight_share=run.largest_weight_share,
    )
    return _RegionTotal(row, view.nodata_cells, concentration(rid, run, effective), status)


def _exact_total(view, exact: bool, limit_s: float) -> tuple[float | None, str]:
    """The view's exact total within `limit_s` seconds, and its status (a None total past the deadline timed out)."""
    if not exact:
        return None, NOT_COMPUTED
    deadline = time.monotonic() + limit_s
    truth = view.exact_total(deadline=deadline)
    if truth is not None:
        return truth, COMPUTED
    return None, TIMED_OUT if time.monotonic() > deadline else NOT_COMPUTED
