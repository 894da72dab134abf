"""Sampling a region weighted by a density: the shared step of ``integrate`` and population coverage.

Three estimators, chosen per region:

* **Importance sampling over units** (when the region's density view offers
  a :class:`~areamc.density.Proposal` of blocks or cells): points are drawn
  with density ``d(x)/T`` over the blocks or cells that meet the region,
  ``T`` their total count.  The integral of ``d`` over the region is
  ``T x P(x in region)`` and the share of the region's population in a
  covered set is ``P(covered | in region)``: both binomial proportions, so
  Wilson intervals (and confidence sequences) apply exactly as for areas.
* **Importance sampling from a pilot grid** (``"grid-importance"``; sources
  with no units to draw, such as expressions:
  :func:`~areamc.density.grid_proposal`): points are drawn with density
  ``q̃(x)/T̂``, a defensive mixture of the density's values on a grid over the
  region's box and their mean (Hesterberg 1995, *Technometrics*
  37:185-194), and score ``w = d/q̃``.  With ``b = w 1[x in region]`` and
  ``a = b 1[covered]``, the integral is ``T̂ mean(b)`` and the share
  ``Σa / Σb``, with the same variances as uniform sampling below.
* **Uniform sampling** in the region's bounding box ``B`` (``importance``
  False): scores ``b = d(x) 1[x in region]`` and ``a = b 1[covered]``; the
  integral is ``|B| mean(b)`` with a normal interval from the sample
  variance, and the share is the ratio ``Σa / Σb`` with the delta-method
  variance ``(Σa² (1 − 2R) + R² Σb²) / (Σb)²`` (using ``Σab = Σa²`` since
  the covered indicator is 0 or 1; Cochran 1977, *Sampling Techniques*, §6.4).

The scored (uniform and grid) estimators' normal intervals rest on the
central limit theorem, which fails when a few points carry most of the weight
(a town holding half a district's people in a few km²).  Each run reports
its **effective number of points**, Kish's (1965, *Survey Sampling*)
``n_eff = (Σb)² / Σb²``: for a constant score it is the number of points in
the region, and it falls towards the number of points that land where the
weight sits as the weight concentrates; and the **largest weight share**
``max b / Σb``, the share of the total one point carries (the diagnostic of
Chatterjee & Diaconis 2018, *Ann. Appl. Probab.* 28:1099-1135 [memory]).
A uniform sample that missed the concentration entirely cannot show it, so
where the source knows its density exactly (blocks, rasters) the jobs use
the expected value instead, ``n T² / (|B| ∫_R d²)`` with ``T = ∫_R d``
(:func:`expected_effective_points`).  Below :data:`MIN_EFFECTIVE_POINTS`, or
with one point above :data:`MAX_WEIGHT_SHARE` of the total, the jobs warn
that the interval cannot be trusted (:func:`concentration`).  Importance
sampling over units draws in proportion to the weight, so its points are
all effective; a pilot grid draws nearly so where the grid resolves the density.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Callable

import numpy as np

from .density import DensityView, grid_proposal
from .engine import DEFAULT_CHUNK, accumulate
from .errors import AreamcWarning, OptionError
from .estimate import AreaEstimate, TotalEstimate, mean_estimate
from .intervals import wilson_interval, z_for
from .samplers import Box, SamplerFactory, make_sampler
from .seeds import child_seed
from .sequential import claim_decided
from .stopping import StopRule, Stopper

__all__ = [
    "WeightedRun",
    "weighted_run",
    "check_weighted_rule",
    "Concentration",
    "concentration",
    "concentration_warning",
    "expected_effective_points",
    "effective_points",
    "IMPORTANCE",
    "GRID",
    "UNIFORM",
    "NONE",
    "TOTAL",
    "SHARES",
    "MIN_EFFECTIVE_POINTS",
    "MAX_WEIGHT_SHARE",
]

IMPORTANCE = "importance"
#: Importance sampling from a pilot grid of density values (:func:`~areamc.density.grid_proposal`).
GRID = "grid-importance"
UNIFORM = "uniform"
#: Importance sampling of only the blocks whose answers are not known exactly; the others counted whole.
STRATA = "stratified-importance"
#: Method of a region with no density near it.
NONE = "none"
#: Fewest effective points (Kish 1965) for which a scored (uniform or grid) run's normal interval is
#: trusted without a warning: about the number of points that must land where most of the weight sits.
MIN_EFFECTIVE_POINTS = 100
#: Largest share of a scored run's in-region total one point may carry without a warning.  Since
#: ``n_eff ≤ (Σb / max b)²``, a share above ``1/√100`` implies fewer than 100 effective points in the
#: sample; for uniform runs judged by the expected ``n_eff`` it also catches a sample that met the weight.
MAX_WEIGHT_SHARE = 0.1
#: What a precision target applies to: the total (column 0), or the shares (columns 1..).
TOTAL = "total"
SHARES = "shares"


@dataclass(frozen=True)
class WeightedRun:
    """Sums of a density-weighted run over one region.

    Column 0 is "in the region"; columns 1.. are the covered sets.  With
    ``method == "importance"`` the sums are hit counts and `scale` is the
    proposal's total count ``T``; with ``"grid-importance"`` they are sums of
    scores ``d/q̃`` and `scale` is the pilot grid's total ``T̂`` (counts); with
    ``"uniform"`` they are sums of density scores and `scale` is the box area (m²).
    `largest_weight_share` is the largest in-region score over their sum
    (``1/hits`` for hit counts; 0 when no weight was met), over the points behind the sums.
    With ``"stratified-importance"`` the sums are hit counts over the blocks
    left to sample (total `scale`), and `known` holds, per column, the counts
    of the blocks answered exactly, which every estimate adds.
    """

    method: str
    points: int
    scale: float
    sums: np.ndarray
    sumsq: np.ndarray
    reason: str = "budget"
    pilot_points: int = 0
    largest_weight_share: float = 0.0
    known: tuple[float, ...] = ()

    def total(self, confidence: float) -> AreaEstimate | TotalEstimate:
        """The integral of the density over the region (counts, e.g. persons)."""
        if self.method == IMPORTANCE:
            return AreaEstimate.from_counts(int(self.sums[0]), self.points, self.scale, confidence)
        if self.method == STRATA:
            return AreaEstimate.from_counts(int(self.sums[0]), self.points, self.scale, confidence, self.known[0])
        return mean_estimate(float(self.sums[0]), float(self.sumsq[0]), self.points, self.scale, confidence)

    @property
    def effective_points(self) -> float:
        """Kish's effective number of points ``(Σb)² / Σb²`` of the in-region weights (uniform and grid runs).

        For importance runs every point is drawn in proportion to the weight,
        so the in-region hit count is returned.  0 when no weight was met.
        """
        if self.method in (IMPORTANCE, STRATA):
            return float(self.sums[0])
        total, square = float(self.sums[0]), float(self.sumsq[0])
        return total * total / square if square > 0 else 0.0

    def share(self, column: int, confidence: float) -> tuple[float, float, float, float]:
        """(share, std_error, low, high) of the region's weight falling in a covered set."""
        if self.method == STRATA:
            return self._strata_share(column, confidence)
        b = float(self.sums[0])
        if b <= 0:
            return math.nan, math.nan, math.nan, math.nan
        a = float(self.sums[column])
        r = a / b
        if self.method == IMPORTANCE:
            n = b
            low, high = wilson_interval(a, n, confidence)
            return r, math.sqrt(r * (1 - r) / n), float(low), float(high)
        var = max(float(self.sumsq[column]) * (1 - 2 * r) + r * r * float(self.sumsq[0]), 0.0) / (b * b)
        se = math.sqrt(var)
        z = z_for(confidence)
        return r, se, max(0.0, r - z * se), min(1.0, r + z * se)


    def _strata_share(self, column: int, confidence: float) -> tuple[float, float, float, float]:
        """The share ``(K_k + T a) / (K_0 + T b)`` with ``a, b`` the hit fractions, by the delta method.

        ``a`` (covered) and ``b`` (in the region) are fractions of the same
        `points` draws with ``a ⊂ b``, so ``Cov(a, b) = a (1 − b) / n``
        (multinomial counts; Cochran 1977, §6.4 for the ratio's variance).
        The variance is evaluated at proportions adjusted by ``z²/2`` hits in
        ``z²`` more points (Agresti & Coull 1998, Amer. Statist. 52:119-126),
        which keeps it above zero when no sampled point, or every one, is covered.
        """
        known_k, known_0, t, n = self.known[column], self.known[0], self.scale, self.points
        a = float(self.sums[column]) / n if n else 0.0
        b = float(self.sums[0]) / n if n else 0.0
        top, bottom = known_k + t * a, known_0 + t * b
        if bottom <= 0:
            return math.nan, math.nan, math.nan, math.nan
        r = top / bottom
        z = z_for(confidence)
        var = 0.0
        if n:
            # the variance from proportions pulled off 0 and 1 as Agresti & Coull (1998) do, so that a
            # sample with no covered point (or all covered) does not claim a zero-width interval
            a_, b_ = ((float(self.sums[c]) + z * z / 2) / (n + z * z) for c in (column, 0))
            r_ = (known_k + t * a_) / (known_0 + t * b_)
            var = (t / bottom) ** 2 * (a_ * (1 - a_) - 2 * r_ * a_ * (1 - b_) + r_ * r_ * b_ * (1 - b_)) / n
        se = math.sqrt(max(var, 0.0))
        return r, se, max(0.0, r - z * se), min(1.0, r + z * se)


def _precision(method: str, scale: float, target: str, confidence: float, known: tuple = ()):
    """Precision measure of a weighted run: the total's half-width, or every share's."""

    def measure(sums: np.ndarray, sumsq: np.ndarray, points: int):
        if points < 2 or sums[0] <= 0:
            return [(math.inf, 0.0)]
        run = WeightedRun(method, points, scale, sums, sumsq, known=known)
        if target == TOTAL:
            est = run.total(confidence)
            return [(est.half_width, est.estimate)]
        return [((high - low) / 2, share) for share, _, low, high in
                (run.share(c, confidence) for c in range(1, len(sums)))]

    return measure


Classify = Callable[[np.ndarray, np.ndarray], np.ndarray]


def expected_effective_points(points: int, box_area: float, total: float, square_total: float) -> float:
    """Expected Kish effective points of `points` uniform points in a box of `box_area` m².

    For scores ``b = d 1_R``: ``n (E b)² / E b² = n T² / (|B| S)`` with
    ``T = ∫_R d`` and ``S = ∫_R d²`` (counts and count² per m²).
    """
    if not square_total > 0 or not box_area > 0:
        return float(points)
    return float(points) * total * total / (box_area * square_total)


def effective_points(run: "WeightedRun", view: DensityView, total: float | None) -> float:
    """A run's effective points: expected from the exact moments where the view knows them, else the sample's.

    `total` is the region's exact total (None when not computed).
    """
    if run.method == UNIFORM and total is not None:
        square = view.exact_square_total()
        if square is not None:
            return expected_effective_points(run.points, run.scale, total, square)
    return run.effective_points


@dataclass(frozen=True)
class Concentration:
    """A region whose scored run is too concentrated for its normal interval (see :func:`concentration`).

    Attributes
    ----------
    region : str
        The region's id.
    method : str
        "uniform" or "grid-importance".
    effective_points : float
        Kish's effective points (expected for uniform runs of blocks and rasters).
    points : int
    largest_weight_share : float
        The largest share of the region's total carried by one point (0..1).
    """

    region: str
    method: str
    effective_points: float
    points: int
    largest_weight_share: float


def concentration(region: str, run: "WeightedRun | None", effective: float) -> Concentration | None:
    """The record of a region whose interval cannot be trusted, or None.

    A scored run (uniform or grid) is flagged with fewer than
    :data:`MIN_EFFECTIVE_POINTS` effective points (`effective`, from
    :func:`effective_points`), or when one point carries more than
    :data:`MAX_WEIGHT_SHARE` of the in-region total.  Hit-count importance
    runs (stratified too) are never flagged: their intervals rest on counts.
    """
    if run is None or run.method in (IMPORTANCE, STRATA):
        return None
    if effective < MIN_EFFECTIVE_POINTS or run.largest_weight_share > MAX_WEIGHT_SHARE:
        return Concentration(region, run.method, float(effective), int(run.points), float(run.largest_weight_share))
    return None


def concentration_warning(job: str, concentrated: list[Concentration]) -> None:
    """Warn once about the regions whose weighted interval cannot be trusted (each from :func:`concentration`).

    The text names up to 3 regions with their effective points and largest
    weight share, and says what to do: importance sampling where plain
    sampling was asked for, more points (which also refine the pilot grid).
    """
    if not concentrated:
        return
    shown = "; ".join(f"{c.region}: {c.effective_points:,.0f} effective of {c.points:,} points, "
                      f"one point carrying {c.largest_weight_share:.1%} of the total" for c in concentrated[:3])
    more = f"; and {len(concentrated) - 3} more" if len(concentrated) > 3 else ""
    uniform = any(c.method == UNIFORM for c in concentrated)
    remedy = ("sample by importance (the default; plain sampling was asked for) or raise {points}" if uniform
              else "raise {points} (a larger budget also refines the pilot grid)")
    warnings.warn(AreamcWarning(
        f"{job}: the density's weight is too concentrated for the normal interval to be trusted in "
        f"{len(concentrated)} region(s) ({shown}{more}; the interval needs at least {MIN_EFFECTIVE_POINTS:,} "
        f"effective points, Kish 1965, and no point above {MAX_WEIGHT_SHARE:.0%} of the total); {remedy}",
        param="points"), stacklevel=3)


def check_weighted_rule(stop: StopRule) -> None:
    """Refuse a fixed count below 2 points per region: a weighted total's variance needs two (parameter ``points``)."""
    if stop.points is not None and stop.points < 2:
        raise OptionError(f"{{param}}: a density-weighted run needs at least 2 points per region, got {stop.points}",
                          param="points")


def weighted_run(
    view: DensityView,
    classify: Classify,
    seed: np.random.SeedSequence,
    *,
    stop: StopRule,
    confidence: float,
    target: str = TOTAL,
    claim: float | None = None,
    sampler: str | SamplerFactory = "uniform",
    chunk: int = DEFAULT_CHUNK,
    importance: bool = True,
    split: tuple | None = None,
) -> WeightedRun | None:
    """Sample the region of `view` weighted by its density.

    Parameters
    ----------
    view : DensityView
        The density source's view of the region (plane metres; per m²).
    classify : callable
        ``classify(x, y)`` returns bools ``(n, m)``: column 0 "in the region",
        the rest covered sets.
    seed : SeedSequence
        This region's stream: the importance samplers (units or pilot grid)
        draw from it, the uniform sampler from its child ``(2,)``.  The pilot
        grid draws no random numbers.
    stop : StopRule
        Points, or a precision target on the `target` (``"total"`` or ``"shares"``).
    claim : float, optional
        With importance sampling, stop once every share's claim verdict is decided.
    sampler : str or sampler class
        See :func:`~areamc.samplers.make_sampler`.
    importance : bool
        Sample by importance: over the view's units (blocks, cells) where it
        offers them, else from a pilot grid of its density values
        (:func:`~areamc.density.grid_proposal`, sized by ``stop.point_budget``).
        False: plain uniform sampling in the region's bounding box.
    split : (Proposal, known counts), optional
        From the view's ``split(zones, ks)`` (blocks): draw only the blocks
        whose answers are not known exactly and add the known counts per
        column (method ``"stratified-importance"``).  Used with importance,
        without a claim (whose verdicts need plain hit counts), and when some
        block is known; otherwise the run is plain importance sampling.

    Returns
    -------
    WeightedRun, or None when the density is zero on every unit near the region.
    """
    if split is not None and importance and claim is None and split[1][0] > 0:
        return _split_run(split, classify, seed, stop, confidence, target, sampler, chunk)
    proposal = view.proposal() if importance else None
    if importance and proposal is None:
        proposal = grid_proposal(view, stop.point_budget)  # no units to draw: a pilot grid of density values
    if proposal is not None and proposal.weight is None and proposal.total <= 0:
        return None  # the source has no positive count near the region: density 0 here
    largest = _Largest()
    if proposal is not None and proposal.weight is None:
        points = make_sampler(sampler, seed, proposal)
        scale, method = proposal.total, IMPORTANCE
        evaluate = classify
    else:
        if proposal is not None:
            points = make_sampler(sampler, seed, proposal)
            score, scale, method = proposal.weight, proposal.total, GRID
        else:
            box = Box.of(view.region.bounds)
            points = make_sampler(sampler, child_seed(seed, 2), box)
            score, scale, method = view.density, box.area, UNIFORM

        def evaluate(x, y):
            flags = np.asarray(classify(x, y), dtype=bool)
            return largest.see(flags * np.asarray(score(x, y), float)[:, None])

    decided = claim_decided(claim, confidence) if claim is not None and method == IMPORTANCE else None
    stopper = Stopper(stop, precision=_precision(method, scale, target, confidence), decided=decided)
    run = accumulate(points.random, evaluate, stopper, chunk=chunk)
    in_region = float(run.sums[0])
    if method == IMPORTANCE:
        share = 1.0 / in_region if in_region > 0 else 0.0
    else:
        share = largest.since(run.pilot_points) / in_region if in_region > 0 else 0.0
    return WeightedRun(method, run.points, scale, run.sums, run.sumsq, run.reason, run.pilot_points, share)


def _split_run(split, classify, seed, stop, confidence, target, sampler, chunk) -> WeightedRun:
    """Importance sampling of the blocks left after the known ones, which every estimate adds (:data:`STRATA`)."""
    proposal, known_counts = split
    known = tuple(float(v) for v in known_counts)
    if proposal.total <= 0:  # every block near the region is answered exactly: nothing to sample
        zeros = np.zeros(len(known), dtype=np.int64)
        return WeightedRun(STRATA, 0, 0.0, zeros, zeros, NONE, 0, 0.0, known)
    stopper = Stopper(stop, precision=_precision(STRATA, proposal.total, target, confidence, known))
    run = accumulate(make_sampler(sampler, seed, proposal).random, classify, stopper, chunk=chunk)
    in_region = float(run.sums[0])
    return WeightedRun(STRATA, run.points, proposal.total, run.sums, run.sumsq, run.reason, run.pilot_points,
                       1.0 / in_region if in_region > 0 else 0.0, known)


class _Largest:
    """The largest in-region score of each evaluated chunk, by stream position (a maximum: chunking cannot change it)."""

    def __init__(self) -> None:
        self.seen = 0
        self.chunks: list[tuple[int, float]] = []

    def see(self, scores: np.ndarray) -> np.ndarray:
        if len(scores):
            self.chunks.append((self.seen, float(scores[:, 0].max())))
        self.seen += len(scores)
        return scores

    def since(self, start: int) -> float:
        """The largest score among points at or after evaluation position `start` (the final batch after a pilot)."""
        return max((m for pos, m in self.chunks if pos >= start), default=0.0)
