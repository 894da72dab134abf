"""The coverage job: share of each region covered by at least k zones, and claim checks.

Points are thrown into each region's bounding box in the equal-area plane;
those inside the region are a uniform sample of it, and each one's
multiplicity is counted by a :class:`~areamc.classify.ZoneIndex` built over
only the zones that meet the region.  The share covered by at least k zones
is then a binomial proportion over the in-region points, with a Wilson
interval, or, when a claim is checked, the time-uniform confidence sequence
of :mod:`areamc.sequential` (valid under the early stop that claim checks
allow).
"""

from __future__ import annotations

import math
import time
from dataclasses import asdict, dataclass, replace

import numpy as np
import shapely

from .classify import ZoneIndex
from .density import DensitySource
from .estimate import DEFAULT_CHUNK, StopRule, check_confidence, check_scale, hit_or_miss, wilson_interval
from .exact import FLAG_Z, at_least, covered_area, deviation, multiplicity_areas, planar_area
from .errors import OptionError
from .project import EqualAreaPlane, ProjectedLayer
from .sampling import Box, UniformSampler, child_seed, make_seed
from .sequential import FALLS_SHORT, UNDECIDED, check_claim, confidence_sequence, verdict
from .weighted import IMPORTANCE, WeightedRun, weighted_run

__all__ = ["CoverageRow", "CoverageReport", "estimate_coverage", "region_classifier", "NOT_COMPUTED"]

NOT_COMPUTED = "not computed"


@dataclass(frozen=True)
class CoverageRow:
    """Coverage of region `id` by at least `at_least` zones.

    Attributes
    ----------
    share, stderr, ci_low, ci_high : float
        Covered share of the region's area (0..1), its standard error and
        interval (Wilson, or the confidence sequence when a claim is checked;
        see `interval`).
    points, hits : int
        In-region sample points, and those covered by at least k zones.
    region_area : float
        Exact planar area of the region, m² of the equal-area plane.
    covered, uncovered, uncovered_ci_low, uncovered_ci_high : float
        ``share x region_area`` and ``(1 − share) x region_area`` with its interval, m².
    exact_share : float or None
        shapely's ``area(region ∩ covered set) / area(region)``; None when not
        computed (time budget, or ``exact=False``).
    z : float or None
        ``(share − exact_share) / scale`` with the standard error as scale,
        floored at the interval half-width over z when all or no points hit.
    claim, verdict : float or None, str or None
        The claimed share and "meets", "falls short" or "undecided".
    """

    id: str
    at_least: int
    share: float
    stderr: float
    ci_low: float
    ci_high: float
    points: int
    hits: int
    region_area: float
    covered: float
    uncovered: float
    uncovered_ci_low: float
    uncovered_ci_high: float
    exact_share: float | None
    z: float | None
    flagged: bool
    claim: float | None
    verdict: str | None
    interval: str
    population: float | None = None
    covered_population: float | None = None
    population_share: float | None = None
    population_share_stderr: float | None = None
    population_share_ci_low: float | None = None
    population_share_ci_high: float | None = None
    population_points: int | None = None
    population_method: str | None = None
    exact_population_share: float | None = None
    population_verdict: str | None = None

    def to_dict(self, population: bool = True) -> dict:
        """Fields as a dict; without `population` the density fields are left out."""
        out = asdict(self)
        if not population:
            for key in [k for k in out if k.startswith(("population", "covered_population", "exact_population"))]:
                del out[key]
        return out


@dataclass(frozen=True)
class CoverageReport:
    """Rows (one per region and k) and what produced them."""

    rows: tuple[CoverageRow, ...]
    plane: EqualAreaPlane
    confidence: float
    seed_entropy: int
    ks: tuple[int, ...]
    claim: float | None
    exact_status: dict

    def metadata(self) -> dict:
        return {
            "equal_area_crs": self.plane.to_dict(),
            "confidence": self.confidence,
            "seed": self.seed_entropy,
            "at_least": list(self.ks),
            "claim": self.claim,
            "claim_method": None if self.claim is None else
            "beta-binomial mixture confidence sequence (Howard et al. 2021), valid under optional stopping",
            "exact_status": self.exact_status,
        }

    @property
    def shortfall(self) -> bool:
        """True when any region falls short of the claim, by area or (with a density) by population."""
        return any(FALLS_SHORT in (row.verdict, row.population_verdict) for row in self.rows)


def _check_ks(ks) -> tuple[int, ...]:
    out = []
    for k in ks:
        if not isinstance(k, (int, np.integer)) or k < 1:
            raise OptionError(f"--at-least: k must be a whole number of at least 1, got {k!r}")
        out.append(int(k))
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
    chunk: int = DEFAULT_CHUNK,
    exact: bool = True,
    exact_budget_s: float = 10.0,
    density: DensitySource | None = None,
    importance: bool = True,
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
        target on the shares: stop a region once every share's half-width is
        at most ``stop.absolute`` (a share, 0..1) or ``stop.relative`` times
        the share.
    confidence : float
        Level of intervals and of claim decisions.
    claim : float, optional
        Claimed share in (0, 1]; each row gets a sequential verdict, and a
        region stops early once all its verdicts are decided.
    exact : bool
        Compute exact shares (k = 1 always; k ≥ 2 within `exact_budget_s` per region).
    density : DensitySource, optional
        Also estimate covered population: a second, density-weighted run per
        region (:func:`~areamc.weighted.weighted_run`).
    importance : bool
        Sample the density by importance where the source allows.

    Returns
    -------
    CoverageReport
    """
    stop = stop or StopRule()
    confidence = check_confidence(confidence)
    ks = _check_ks(ks)
    if claim is not None:
        claim = check_claim(claim)
    if stop.absolute is not None and not stop.absolute < 1:
        raise OptionError(f"--tolerance: a share tolerance must lie in (0, 1), got {stop.absolute!r}")
    root = make_seed(seed)
    shapely.prepare(regions.planar)
    shapely.prepare(zones.planar)
    tree = shapely.STRtree(zones.planar)
    region_areas = planar_area(regions.planar)
    rows: list[CoverageRow] = []
    status: dict = {}
    for r, (rid, region) in enumerate(zip(regions.ids, regions.planar)):
        near = zones.planar[np.sort(tree.query(region, predicate="intersects"))]
        box = Box.of(region.bounds)
        classify = region_classifier(region, near, ks)

        run = hit_or_miss(
            box,
            classify,
            UniformSampler(child_seed(root, r)),
            budget=stop.budget,
            done=_done(stop, claim, confidence),
            chunk=chunk,
        )
        exact_shares, status[rid] = _exact_shares(region, near, ks, exact, exact_budget_s)
        n_in = run.hits[0]
        people = _population(region, near, classify, density, root, r, stop, chunk, importance, ks,
                             claim, confidence, exact) if density is not None else None
        for c, k in enumerate(ks):
            row = _row(rid, k, run.hits[c + 1], n_in, float(region_areas[r]), exact_shares.get(k), claim, confidence)
            if people is not None:
                row = replace(row, **people(c + 1, k))
            rows.append(row)
    if density is not None:
        density.finish()
    return CoverageReport(tuple(rows), regions.plane, confidence, int(root.entropy), ks, claim, status)


def region_classifier(region, zones, ks):
    """``f(x, y)`` giving bools ``(n, 1 + len(ks))``: in `region`, and in it covered by ≥ k of `zones`.

    Points in plane metres.  Multiplicity is counted only for points inside
    the region, by a :class:`~areamc.classify.ZoneIndex` over `zones` laid on
    the region's bounding box.
    """
    karr = np.asarray(ks)
    index = ZoneIndex(zones, Box.of(region.bounds))
    shapely.prepare(region)

    def classify(x, y):
        inside = shapely.contains_xy(region, x, y)
        counts = np.zeros(len(x), dtype=np.int64)
        counts[inside] = index.counts(x[inside], y[inside])
        return np.column_stack([inside, counts[:, None] >= karr[None, :]])

    return classify


def _done(stop, claim, confidence):
    if claim is None and not stop.adaptive:
        return None

    def done(hits: np.ndarray, _sumsq: np.ndarray, points: int) -> bool:
        n = int(hits[0])
        if n == 0:
            return False
        if claim is not None:
            return all(verdict(int(h), n, claim, confidence) != UNDECIDED for h in hits[1:])
        low, high = wilson_interval(hits[1:], n, confidence)
        return all(stop.met((hi - lo) / 2, h / n) for lo, hi, h in zip(low, high, hits[1:]))

    return done


def _exact_shares(region, near, ks, exact, budget_s) -> tuple[dict, str]:
    if not exact:
        return {}, NOT_COMPUTED
    area = region.area
    shares = {1: covered_area(region, near) / area}
    if max(ks) == 1:
        return shares, "computed"
    counts = multiplicity_areas(near, clip=region, deadline=time.monotonic() + budget_s)
    if counts is None:
        return shares, f"k >= 2 {NOT_COMPUTED} (over {budget_s:g} s)"
    for k in ks:
        shares[k] = at_least(counts, k) / area
    return shares, "computed"


def _row(rid, k, hits, n, region_area, exact_share, claim, confidence) -> CoverageRow:
    share = hits / n if n else math.nan
    stderr = math.sqrt(share * (1 - share) / n) if n else math.nan
    if claim is not None:
        low, high = confidence_sequence(hits, n, confidence)
        method = "confidence sequence"
    elif n:
        low, high = (float(v) for v in wilson_interval(hits, n, confidence))
        method = "wilson"
    else:
        low, high, method = math.nan, math.nan, "wilson"
    scale = check_scale(stderr, low, high, confidence) if n else math.nan
    z = deviation(share, exact_share, scale) if exact_share is not None and n else None
    return CoverageRow(
        id=rid, at_least=k, share=share, stderr=stderr, ci_low=low, ci_high=high, points=n, hits=hits,
        region_area=region_area, covered=share * region_area, uncovered=(1 - share) * region_area,
        uncovered_ci_low=(1 - high) * region_area, uncovered_ci_high=(1 - low) * region_area,
        exact_share=exact_share, z=z, flagged=bool(z is not None and abs(z) > FLAG_Z),
        claim=claim, verdict=None if claim is None else verdict(hits, n, claim, confidence), interval=method,
    )


def _population(region, near, classify, density, root, r, stop, chunk, importance, ks, claim, confidence, exact):
    """Run the density-weighted sample of one region; return a function giving each k's fields."""
    density.prepare(region)

    def done(method, scale, sums, sumsq, points) -> bool:
        n = float(sums[0])
        if n <= 0:
            return False
        if claim is not None and method == IMPORTANCE:
            return all(verdict(int(h), int(n), claim, confidence) != UNDECIDED for h in sums[1:])
        if stop.adaptive:
            run = WeightedRun(method, points, scale, sums, sumsq, False)
            shares = [run.share(c, confidence) for c in range(1, len(sums))]
            return all(stop.met((high - low) / 2, share) for share, _, low, high in shares)
        return False

    run = weighted_run(region, classify, density, root, (r, 1), budget=stop.budget, chunk=chunk,
                       importance=importance, done=done if (claim is not None or stop.adaptive) else None)
    truth = density.exact_total(region) if exact else None
    covered_truth = None
    if truth:  # sources with an exact total (blocks, rasters) give the exact covered share at k = 1
        covered = shapely.intersection(region, shapely.union_all(near)) if len(near) else None
        covered_truth = density.exact_total(covered) / truth if covered is not None else 0.0

    def fields(column: int, k: int) -> dict:
        if run is None:
            return {"population": 0.0 if truth is None else truth, "covered_population": 0.0,
                    "population_points": 0, "population_method": "none"}
        total = truth if truth is not None else run.total(confidence).estimate
        share, se, low, high = run.share(column, confidence)
        if claim is not None and run.method == IMPORTANCE:
            low, high = confidence_sequence(int(run.sums[column]), int(run.sums[0]), confidence)
        return {
            "population": total,
            "covered_population": share * total,
            "population_share": share,
            "population_share_stderr": se,
            "population_share_ci_low": low,
            "population_share_ci_high": high,
            "population_points": run.points,
            "population_method": run.method,
            "exact_population_share": covered_truth if k == 1 else None,
            "population_verdict": verdict(int(run.sums[column]), int(run.sums[0]), claim, confidence)
            if claim is not None and run.method == IMPORTANCE else None,
        }

    return fields
