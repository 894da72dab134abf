"""Sampling a region weighted by a density: the shared step of ``integrate`` and population coverage.

Two estimators, chosen per region:

* **Importance sampling** (when the region's density view offers a
  :class:`~areamc.density.Proposal`): points are drawn with density
  ``d(x)/T`` over the blocks or cells that meet the region, ``T`` their total
  count.  The integral of ``d`` over the region is ``T x P(x in region)`` and
  the share of the region's population in a covered set is
  ``P(covered | in region)``: both binomial proportions, so Wilson intervals
  (and confidence sequences) apply exactly as for areas.
* **Uniform sampling** in the region's bounding box ``B``: scores
  ``b = d(x) 1[x in region]`` and ``a = b 1[covered]``; the integral is
  ``|B| mean(b)`` with a normal interval from the sample variance, and the
  share is the ratio ``Σa / Σb`` with the delta-method variance
  ``(Σa² (1 − 2R) + R² Σb²) / (Σb)²`` (using ``Σab = Σa²`` since the
  covered indicator is 0 or 1; Cochran 1977, *Sampling Techniques*, §6.4).

The uniform estimators' normal intervals rest on the central limit theorem,
which fails when a few points carry most of the weight (a town holding half a
district's people in a few km²).  Each run reports its **effective number of
points**, Kish's (1965, *Survey Sampling*) ``n_eff = (Σb)² / Σb²``: for a
constant density it is the number of points in the region, and it falls
towards the number of points that land where the weight sits as the weight
concentrates.  A sample that missed the concentration entirely cannot show
it, so where the source knows its density exactly (blocks, rasters) the jobs
use the expected value instead, ``n T² / (|B| ∫_R d²)`` with ``T = ∫_R d``
(:func:`expected_effective_points`).  Below :data:`MIN_EFFECTIVE_POINTS` the
jobs warn that the interval cannot be trusted.  Importance sampling draws in
proportion to the weight, so its points are all effective.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Callable

import numpy as np

from .density import DensityView
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
    "concentration_warning",
    "expected_effective_points",
    "effective_points",
    "IMPORTANCE",
    "UNIFORM",
    "NONE",
    "TOTAL",
    "SHARES",
    "MIN_EFFECTIVE_POINTS",
]

IMPORTANCE = "importance"
UNIFORM = "uniform"
#: Method of a region with no density near it.
NONE = "none"
#: Fewest effective points (Kish 1965) for which a uniform run's normal interval is trusted without a warning:
#: about the number of points that must land where most of the weight sits.
MIN_EFFECTIVE_POINTS = 100
#: What a precision target applies to: the total (column 0), or the shares (columns 1..).
TOTAL = "total"
SHARES = "shares"


@dataclass(frozen=True)
class WeightedRun:
    """Sums of a density-weighted run over one region.

    Column 0 is "in the region"; columns 1.. are the covered sets.  With
    ``method == "importance"`` the sums are hit counts and `scale` is the
    proposal's total count ``T``; with ``"uniform"`` they are sums of density
    scores and `scale` is the box area (m²).
    """

    method: str
    points: int
    scale: float
    sums: np.ndarray
    sumsq: np.ndarray
    reason: str = "budget"
    pilot_points: int = 0

    def total(self, confidence: float) -> AreaEstimate | TotalEstimate:
        """The integral of the density over the region (counts, e.g. persons)."""
        if self.method == IMPORTANCE:
            return AreaEstimate.from_counts(int(self.sums[0]), self.points, self.scale, confidence)
        return mean_estimate(float(self.sums[0]), float(self.sumsq[0]), self.points, self.scale, confidence)

    @property
    def effective_points(self) -> float:
        """Kish's effective number of points ``(Σb)² / Σb²`` of the in-region weights (uniform runs).

        For importance runs every point is drawn in proportion to the weight,
        so the in-region hit count is returned.  0 when no weight was met.
        """
        if self.method == IMPORTANCE:
            return float(self.sums[0])
        total, square = float(self.sums[0]), float(self.sumsq[0])
        return total * total / square if square > 0 else 0.0

    def share(self, column: int, confidence: float) -> tuple[float, float, float, float]:
        """(share, stderr, low, high) of the region's weight falling in a covered set."""
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


def _precision(method: str, scale: float, target: str, confidence: float):
    """Precision measure of a weighted run: the total's half-width, or every share's."""

    def measure(sums: np.ndarray, sumsq: np.ndarray, points: int):
        if points < 2 or sums[0] <= 0:
            return [(math.inf, 0.0)]
        run = WeightedRun(method, points, scale, sums, sumsq)
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


def concentration_warning(job: str, concentrated: list[tuple[str, float, int]]) -> None:
    """Warn once about regions whose uniform run had fewer than :data:`MIN_EFFECTIVE_POINTS` effective points.

    `concentrated` holds (region id, effective points, points) for each such region.
    """
    if not concentrated:
        return
    shown = "; ".join(f"{rid}: {eff:,.0f} effective of {n:,} points" for rid, eff, n in concentrated[:3])
    more = f"; and {len(concentrated) - 3} more" if len(concentrated) > 3 else ""
    warnings.warn(AreamcWarning(
        f"{job}: the density's weight is too concentrated for the normal interval to be trusted in "
        f"{len(concentrated)} region(s) ({shown}{more}; fewer than {MIN_EFFECTIVE_POINTS:,} effective points, "
        "Kish 1965); sample by importance (blocks, rasters), or raise {points}", param="points"), stacklevel=3)


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
        This region's stream: the importance sampler draws from it, the
        uniform sampler from its child ``(2,)``.
    stop : StopRule
        Points, or a precision target on the `target` (``"total"`` or ``"shares"``).
    claim : float, optional
        With importance sampling, stop once every share's claim verdict is decided.
    sampler : str or sampler class
        See :func:`~areamc.samplers.make_sampler`.
    importance : bool
        Use the view's importance sampler when it has one.

    Returns
    -------
    WeightedRun, or None when the density is zero on every unit near the region.
    """
    proposal = view.proposal() if importance else None
    if proposal is not None and proposal.total <= 0:
        return None  # the source has no positive count near the region: density 0 here
    if proposal is not None:
        points = make_sampler(sampler, seed, proposal)
        scale, method = proposal.total, IMPORTANCE
        evaluate = classify
    else:
        box = Box.of(view.region.bounds)
        points = make_sampler(sampler, child_seed(seed, 2), box)

        def evaluate(x, y):
            flags = np.asarray(classify(x, y), dtype=bool)
            d = view.density(x, y)
            return flags * d[:, None]

        scale, method = box.area, UNIFORM
    decided = claim_decided(claim, confidence) if claim is not None and method == IMPORTANCE else None
    stopper = Stopper(stop, precision=_precision(method, scale, target, confidence), decided=decided)
    run = accumulate(points.random, evaluate, stopper, chunk=chunk)
    return WeightedRun(method, run.points, scale, run.sums, run.sumsq, run.reason, run.pilot_points)
