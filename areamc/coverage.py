"""The coverage job: share of each region covered by at least k zones, and claim checks.

Points are thrown into each region's bounding box in the equal-area plane;
those inside the region are a uniform sample of it, and each one's
multiplicity is counted by a :class:`~areamc.classify.GridIndex` built over
only the zones that meet the region.  The share covered by at least k zones
is then a binomial proportion over the in-region points, with a Wilson
interval, or, when a claim is checked, the time-uniform confidence sequence
of :mod:`areamc.sequential` (valid under the early stop that claim checks
allow).  With a density, a second, density-weighted run per region gives
the covered share of the population (:mod:`areamc.weighted`).
"""

from __future__ import annotations

import math
import time
from dataclasses import asdict, dataclass

import numpy as np
import shapely

from .checks import binomial_deviation, flagged
from .classify import region_classifier
from .density import DensitySource, DensityView, warn_nodata
from .engine import DEFAULT_CHUNK, MIN_REPLICATES, HitOrMissRun, hit_or_miss
from .errors import OptionError
from .estimate import replicate_precision, share_precision
from .exact import at_least, covered_area, multiplicity_areas, planar_area
from .intervals import check_confidence, wilson_interval
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
from .samplers import Box, SamplerFactory, draws_replicates, make_sampler, sampler_name
from .seeds import child_seed, job_root, make_seed
from .sequential import FALLS_SHORT, UNDECIDED, check_claim, claim_decided, confidence_sequence, verdict
from .stopping import StopRule, Stopper
from .weighted import (
    IMPORTANCE,
    NONE,
    SHARES,
    Concentration,
    WeightedRun,
    check_weighted_rule,
    concentration,
    concentration_warning,
    effective_points,
    weighted_run,
)

__all__ = ["CoverageRow", "PopulationShare", "CoverageReport", "estimate_coverage", "AREA_FIELDS"]

#: Exact-share status tokens, per region.
COMPUTED = "computed"
NOT_COMPUTED = "not-computed"
TIMED_OUT = "k2-timed-out"
#: Interval method tokens.
WILSON = "wilson"
SEQUENCE = "confidence-sequence"
#: Student-t interval from the spread of replicates (``--sampler sobol`` or ``stratified``).
STUDENT_T = "student-t"

_AREA_STREAM = 0
_POPULATION_STREAM = 1


@dataclass(frozen=True)
class PopulationShare:
    """The population part of a coverage row: how much of a region's density the covered set holds.

    Attributes
    ----------
    total : float
        The region's population (exact where the source has one, else estimated), in the source's count unit.
    covered : float
        ``share x total``.
    share, std_error, ci_low, ci_high : float or None
        Covered share of the population (0..1), Wilson interval for
        importance sampling over units (the confidence sequence with a claim), normal
        (delta method) for grid and uniform sampling; None with no density near the region.
    points : int
    method : str
        "importance" (over blocks or cells), "grid-importance" (from a pilot grid of density values),
        "uniform" or "none".
    exact_share : float or None
        Exact covered share at k = 1 (areal weighting or cell fractions).
    verdict : str or None
        Claim verdict on the population share (importance sampling only).
    effective_points : float
        Kish's effective number of points of the population run
        (:attr:`~areamc.weighted.WeightedRun.effective_points`); a warning
        names regions below :data:`~areamc.weighted.MIN_EFFECTIVE_POINTS`.
    largest_weight_share : float
        The largest share of the run's in-region total carried by one point
        (:attr:`~areamc.weighted.WeightedRun.largest_weight_share`); a warning
        names regions above :data:`~areamc.weighted.MAX_WEIGHT_SHARE`.
    """

    total: float
    covered: float
    share: float | None
    std_error: float | None
    ci_low: float | None
    ci_high: float | None
    points: int
    method: str
    exact_share: float | None
    verdict: str | None
    effective_points: float = 0.0
    largest_weight_share: float = 0.0

    def to_dict(self) -> dict:
        """Fields under the names rows carry them (``population_share``, ...)."""
        return {
            "population_total": self.total,
            "population_covered": self.covered,
            "population_share": self.share,
            "population_share_std_error": self.std_error,
            "population_share_ci_low": self.ci_low,
            "population_share_ci_high": self.ci_high,
            "population_points": self.points,
            "population_method": self.method,
            "population_exact_share": self.exact_share,
            "population_verdict": self.verdict,
            "population_effective_points": self.effective_points,
            "population_largest_weight_share": self.largest_weight_share,
        }


@dataclass(frozen=True)
class CoverageRow:
    """Coverage of region `id` by at least `k` zones.

    Attributes
    ----------
    id : str
    feature_index : int
        Position of the region in its layer as read (0-based; ``Layer.indices``).
    k : int
        The multiplicity: the share covered by at least `k` zones.
    share, std_error, ci_low, ci_high : float
        Covered share of the region's area (0..1), its standard error and
        interval (Wilson, or the confidence sequence when a claim is checked,
        or with a replicate sampler the covered area's Student-t interval
        over the region's exact area; see `interval`).
    region_points, hits : int
        Sample points that fell in the region (of those thrown into its box), and those covered
        by at least k zones.
    region_area : float
        Exact planar area of the region, m² of the equal-area plane.
    covered_area, area_below_k, area_below_k_ci_low, area_below_k_ci_high : float
        ``share x region_area`` and ``(1 − share) x region_area`` (the area covered by fewer than k
        zones: at k = 1 the uncovered area) with its interval, m².
    exact_share : float or None
        shapely's ``area(region ∩ covered set) / area(region)``; None when not
        computed (time limit, or ``exact=False``).
    z : float or None
        Deviation of the covered count from the exact share (binomial mid-p
        score over the in-region points, :mod:`areamc.checks`; for replicate
        samplers the t score turned into a normal score).
    flagged : bool
    claim, verdict : float or None, str or None
        The claimed share and "meets", "falls-short" or "undecided".
    interval : str
        "wilson", "confidence-sequence" or "student-t".
    stop_reason : str
        Why the region's sampling stopped ("budget", "target", "decided", "time").
    pilot_points : int
        Box points of the pilot stage of a precision target, not in the estimate.
    population : PopulationShare or None
        With a density.
    """

    id: str
    feature_index: int
    k: int
    share: float
    std_error: float
    ci_low: float
    ci_high: float
    region_points: int
    hits: int
    region_area: float
    covered_area: float
    area_below_k: float
    area_below_k_ci_low: float
    area_below_k_ci_high: float
    exact_share: float | None
    z: float | None
    flagged: bool
    claim: float | None
    verdict: str | None
    interval: str
    stop_reason: str
    pilot_points: int = 0
    population: PopulationShare | None = None

    def to_dict(self, population: bool = True) -> dict:
        """Fields as a flat dict; with `population`, the population part's fields follow."""
        out = {k: v for k, v in asdict(self).items() if k != "population"}
        if population and self.population is not None:
            out.update(self.population.to_dict())
        return out


#: The fields of :class:`CoverageRow` holding an area (m² of the plane): those an output unit applies to
#: (shares and population counts have none).  The command line and :mod:`areamc.frames` read this list.
AREA_FIELDS = ("region_area", "covered_area", "area_below_k", "area_below_k_ci_low", "area_below_k_ci_high")


@dataclass(frozen=True)
class CoverageReport:
    """Rows (one per region and k) and what produced them."""

    rows: tuple[CoverageRow, ...]
    run: RunInfo
    ks: tuple[int, ...]
    claim: float | None
    exact_status: dict

    def metadata(self) -> dict:
        run = self.run.to_dict()
        if self.claim is not None:  # claims stop on the verdicts, with no pilot and final batch
            run["stop"] = {**run["stop"], "two_stage": False, "pilot_slack": None}
        return {
            **run,
            "k": list(self.ks),
            "claim": self.claim,
            "claim_method": None if self.claim is None else
            "beta-binomial mixture confidence sequence (Howard et al. 2021), valid under optional stopping",
            "exact_status": self.exact_status,
        }

    def to_dataframe(self, units: str = "km2"):
        """The rows (with a density, their ``population_*`` fields too) as a pandas DataFrame, areas in
        `units` (m2, ha, km2, acre, mi2) of the plane; see :func:`areamc.frames.to_dataframe`."""
        from .frames import to_dataframe

        return to_dataframe(self, units)

    def _verdicts(self):
        for row in self.rows:
            yield row.verdict
            if row.population is not None:
                yield row.population.verdict

    @property
    def shortfall(self) -> bool:
        """True when any region falls short of the claim, by area or (with a density) by population."""
        return FALLS_SHORT in set(self._verdicts())

    @property
    def undecided(self) -> bool:
        """True when any verdict, by area or by population, is still undecided at the end of the budget."""
        return UNDECIDED in set(self._verdicts())


def _check_ks(ks) -> tuple[int, ...]:
    out = []
    for k in ks:
        if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1:
            raise OptionError(f"{{param}}: k must be a whole number of at least 1, got {k!r}", param="ks")
        out.append(int(k))
    if not out:
        raise OptionError("{param}: give at least one k", param="ks")
    return tuple(sorted(set(out)))


def estimate_coverage(
    regions: ProjectedLayer,
    zones: ProjectedLayer,
    *,
    ks=(1,),
    stop: StopRule | None = None,
    confidence: float = 0.95,
    claim: float | None = None,
    seed: int | np.random.SeedSequence | None = None,
    sampler: str | SamplerFactory = "uniform",
    chunk: int = DEFAULT_CHUNK,
    exact: bool = True,
    exact_time_limit_s: float = 10.0,
    density: DensitySource | None = None,
    importance: bool = True,
    workers: int | None = 1,
    progress: JobProgress | None = None,
) -> CoverageReport:
    """Estimate, per region, the share covered by at least k zones for each k in `ks`.

    Parameters
    ----------
    regions, zones : ProjectedLayer
        On one equal-area plane (metres); see :func:`~areamc.project.project_layers`.
    ks : iterable of int
        Multiplicities to report (k ≥ 1).
    stop : StopRule
        Points thrown into each region's box (the budget), or a precision
        target on the shares: every share's half-width at most
        ``stop.absolute`` (a share, 0..1) or ``stop.relative`` times the share.
    confidence : float
        Level of intervals and of claim decisions.
    claim : float, optional
        Claimed share in (0, 1]; each row gets a sequential verdict, and a
        region stops early once all its verdicts are decided.
    seed : int or SeedSequence, optional
        Region ``r`` samples areas from the stream keyed ``("coverage", r, 0)``
        and population from ``("coverage", r, 1)``.
    sampler : str or sampler class
        See :func:`~areamc.samplers.make_sampler`.
    exact : bool
        Compute exact shares (k = 1 always; k ≥ 2 within `exact_time_limit_s` per region).
    density : DensitySource, optional
        Also estimate covered population, from ``density.for_region(region)``.
    importance : bool
        Sample the density by importance: over blocks or cells where the source has them, else from a
        pilot grid of density values (expressions); False samples uniformly in each region's box.
    workers : int or None
        Worker processes regions are shared among (None: every usable core); the rows are
        identical, bit for bit, for any number (:func:`~areamc.parallel.map_ordered`).
    progress : callable, optional
        ``progress(done, total, unit, note)`` (:data:`~areamc.parallel.JobProgress`): regions
        (``"region"``) counted as each finishes, in region order, noted with its id; when the
        regions run in this process (one worker, or one region), also the points drawn so far
        (``"r3: 65,536 pt"``) and the step running (``"r3: exact shares"``, ``"r3: population"``),
        with the count unchanged.  It never changes a result.

    Returns
    -------
    CoverageReport
    """
    stop = stop or StopRule()
    confidence = check_confidence(confidence)
    replicates = draws_replicates(sampler)
    if replicates and claim is not None:
        raise OptionError(f"{{param}}: claim verdicts need a sampler of single points such as 'uniform' (a "
                          f"confidence sequence over points); {sampler_name(sampler)!r} draws replicates",
                          param="sampler")
    ks = _check_ks(ks)
    workers = check_workers(workers)
    if claim is not None:
        claim = check_claim(claim)
    if density is not None:
        check_weighted_rule(stop)
    if stop.absolute is not None and not stop.absolute < 1:
        raise OptionError(f"{{param}}: a share tolerance must lie in (0, 1), got {stop.absolute!r}", param="tolerance")
    root = make_seed(seed)
    streams = job_root(root, "coverage")
    shapely.prepare(regions.planar)
    shapely.prepare(zones.planar)
    tree = shapely.STRtree(zones.planar)
    region_areas = planar_area(regions.planar)
    handle = source_handle(density)
    meter = JobMeter(progress, len(regions), "region")
    meter(0)
    workers = workers_for_source(workers, handle, len(regions))
    job = _CoverageJob(regions, zones.planar, tree, region_areas, ks, stop, confidence, claim, streams, sampler, chunk,
                       exact, exact_time_limit_s, handle, importance, meter.here(workers, len(regions)))
    results = map_ordered(_coverage_region, range(len(regions)), workers, shared=job,
                          done=meter.items(lambda r: regions.ids[r]))
    rows: list[CoverageRow] = [row for result in results for row in result.rows]
    status: dict = {}
    for rid, result in zip(regions.ids, results):
        status[rid] = result.status
    if density is not None:
        warn_nodata(density, results)
        concentration_warning("coverage", [result.concentrated for result in results if result.concentrated])
    info = RunInfo("coverage", regions.plane, confidence, int(root.entropy), sampler_name(sampler), stop,
                   regions.densify_m)
    return CoverageReport(tuple(rows), info, ks, claim, status)


@dataclass(frozen=True)
class _CoverageJob:
    """What every region's work shares (sent once to each worker process; plane metres)."""

    regions: ProjectedLayer
    zones: np.ndarray
    tree: shapely.STRtree
    region_areas: np.ndarray
    ks: tuple[int, ...]
    stop: StopRule
    confidence: float
    claim: float | None
    streams: np.random.SeedSequence
    sampler: str | SamplerFactory
    chunk: int
    exact: bool
    exact_time_limit_s: float
    density: SourceHandle
    importance: bool
    #: Reports the steps of a region run in the calling process (None in worker processes).
    meter: JobMeter | None = None


@dataclass(frozen=True)
class _RegionResult:
    """One region's rows (one per k), exact-share status, the nodata cells its view met, and its concentration note."""

    rows: tuple[CoverageRow, ...]
    status: str
    nodata_cells: np.ndarray
    concentrated: Concentration | None


_NO_CELLS = np.zeros(0, dtype=np.int64)


def _coverage_region(job: _CoverageJob, r: int) -> _RegionResult:
    """Sample region `r` (its area stream, then its population stream) and build its rows; runs in any process."""
    ks, stop, confidence, claim, sampler, chunk = job.ks, job.stop, job.confidence, job.claim, job.sampler, job.chunk
    streams, exact, importance, regions = job.streams, job.exact, job.importance, job.regions
    density = job.density.get()
    rid, region = regions.ids[r], regions.planar[r]
    decided = claim_decided(claim, confidence) if claim is not None else None
    near = job.zones[np.sort(job.tree.query(region, predicate="intersects"))]
    box = Box.of(region.bounds)
    classify = region_classifier(region, near, ks, stop.points)
    area = float(job.region_areas[r])
    replicates = draws_replicates(sampler)
    meter = job.meter
    run = hit_or_miss(
        make_sampler(sampler, child_seed(streams, r, _AREA_STREAM), box),
        classify,
        Stopper(stop, precision=share_precision(confidence), decided=decided),
        chunk=chunk,
        progress=None if meter is None else lambda drawn, _est: meter(r, f"{rid}: {drawn:,} pt"),
        confidence=confidence,
        # replicate samplers: the shares' half-widths, areas over the region's exact area
        replicate_target=lambda s: replicate_precision(s.known, s.span, confidence, MIN_REPLICATES,
                                                       columns=range(1, 1 + len(ks)), scale=area),
    )
    if meter is not None and exact:
        meter(r, f"{rid}: exact shares")
    exact_shares, status = _exact_shares(region, near, ks, exact, job.exact_time_limit_s)
    people, note, nodata = None, None, _NO_CELLS
    if density is not None:
        if meter is not None:
            meter(r, f"{rid}: population")
        view = density.for_region(region)
        nodata = view.nodata_cells
        # the population part takes single points: by importance, or uniform when the area part draws replicates
        people, weighted, effective = _population(view, near, classify, child_seed(streams, r, _POPULATION_STREAM),
                                                  stop, claim, confidence, "uniform" if replicates else sampler,
                                                  chunk, importance, exact)
        note = concentration(rid, weighted, effective)
    n_in = run.hits[0]
    rows = []
    for c, k in enumerate(ks):
        part = None if people is None else people(c + 1, k)
        if replicates:
            rows.append(_replicate_row(rid, regions.source.indices[r], k, c + 1, run, area, exact_shares.get(k),
                                       confidence, part))
        else:
            rows.append(_row(rid, regions.source.indices[r], k, run.hits[c + 1], n_in, area,
                             exact_shares.get(k), claim, confidence, run, part))
    return _RegionResult(tuple(rows), status, nodata, note)


def _exact_shares(region, near, ks, exact, limit_s) -> tuple[dict, str]:
    if not exact:
        return {}, NOT_COMPUTED
    area = region.area
    shares = {1: covered_area(region, near) / area}
    if max(ks) == 1:
        return shares, COMPUTED
    counts = multiplicity_areas(near, clip=region, deadline=time.monotonic() + limit_s)
    if counts is None:
        return shares, TIMED_OUT
    for k in ks:
        shares[k] = at_least(counts, k) / area
    return shares, COMPUTED


def _row(rid, index, k, hits, n, region_area, exact_share, claim, confidence, run, people) -> CoverageRow:
    share = hits / n if n else math.nan
    std_error = math.sqrt(share * (1 - share) / n) if n else math.nan
    if claim is not None:
        low, high = confidence_sequence(hits, n, confidence)
        method = SEQUENCE
    elif n:
        low, high = (float(v) for v in wilson_interval(hits, n, confidence))
        method = WILSON
    else:
        low, high, method = math.nan, math.nan, WILSON
    z = binomial_deviation(hits, n, exact_share) if exact_share is not None and n else None
    return CoverageRow(
        id=rid, feature_index=index, k=k, share=share, std_error=std_error, ci_low=low, ci_high=high, region_points=n, hits=hits,
        region_area=region_area, covered_area=share * region_area, area_below_k=(1 - share) * region_area,
        area_below_k_ci_low=(1 - high) * region_area, area_below_k_ci_high=(1 - low) * region_area,
        exact_share=exact_share, z=z, flagged=flagged(z),
        claim=claim, verdict=None if claim is None else verdict(hits, n, claim, confidence), interval=method,
        stop_reason=run.reason, pilot_points=run.pilot_points, population=people,
    )


def _replicate_row(rid, index, k, column, run: HitOrMissRun, region_area, exact_share, confidence,
                   people) -> CoverageRow:
    """A row from replicate estimates: the covered area (m²) over the region's exact area, with a t interval."""
    est = run.estimate(column, confidence)
    share = est.estimate / region_area
    low, high = max(0.0, est.ci_low / region_area), min(1.0, est.ci_high / region_area)
    z = est.deviation(exact_share * region_area) if exact_share is not None else None
    return CoverageRow(
        id=rid, feature_index=index, k=k, share=share, std_error=est.std_error / region_area, ci_low=low, ci_high=high,
        region_points=run.hits[0], hits=run.hits[column], region_area=region_area, covered_area=est.estimate,
        area_below_k=region_area - est.estimate, area_below_k_ci_low=(1 - high) * region_area,
        area_below_k_ci_high=(1 - low) * region_area, exact_share=exact_share, z=z, flagged=flagged(z),
        claim=None, verdict=None, interval=STUDENT_T, stop_reason=run.reason, pilot_points=run.pilot_points,
        population=people,
    )


def _population(view: DensityView, near, classify, seed, stop, claim, confidence, sampler, chunk, importance, exact):
    """Run the density-weighted sample of one region; return a function giving each k's population part, and the run."""
    # blocks answered exactly (wholly in the region, and in each meeting zone whole) are counted, not sampled
    split = view.split(near, classify.ks) if importance and claim is None and hasattr(view, "split") else None
    run = weighted_run(view, classify, seed, stop=stop, confidence=confidence, target=SHARES, claim=claim,
                       sampler=sampler, chunk=chunk, importance=importance, split=split)
    truth = view.exact_total() if exact else None
    covered_truth = None
    if truth:  # sources with an exact total (blocks, rasters) give the exact covered share at k = 1
        covered_truth = view.exact_total(shapely.union_all(near)) / truth if len(near) else 0.0

    effective = effective_points(run, view, truth) if run is not None else 0.0

    def part(column: int, k: int) -> PopulationShare:
        if run is None:
            return PopulationShare(0.0 if truth is None else truth, 0.0, None, None, None, None, 0, NONE, None, None)
        return _population_share(run, column, k, truth, covered_truth, claim, confidence, effective)

    return part, run, effective


def _population_share(run: WeightedRun, column, k, truth, covered_truth, claim, confidence,
                      effective) -> PopulationShare:
    total = truth if truth is not None else run.total(confidence).estimate
    share, se, low, high = run.share(column, confidence)
    decides = claim is not None and run.method == IMPORTANCE
    if decides:
        low, high = confidence_sequence(int(run.sums[column]), int(run.sums[0]), confidence)
    return PopulationShare(
        total=total,
        covered=share * total,
        share=share,
        std_error=se,
        ci_low=low,
        ci_high=high,
        points=run.points,
        method=run.method,
        exact_share=covered_truth if k == 1 else None,
        verdict=verdict(int(run.sums[column]), int(run.sums[0]), claim, confidence) if decides else None,
        effective_points=effective,
        largest_weight_share=run.largest_weight_share,
    )
