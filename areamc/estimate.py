"""Estimates formed from merged sums, as frozen records, and the precision measures of stop rules.

A point thrown uniformly into a box of area ``B`` lands in a set ``S`` with
probability ``p = |S| / B``; with ``h`` hits in ``n`` points the estimate is
``B h / n`` with standard error ``B sqrt(p̂(1 − p̂)/n)`` and the Wilson
(1927) score interval for ``p`` scaled by ``B`` (:class:`AreaEstimate`).  A
mean of real-valued scores gives ``scale x mean`` with a normal interval from
the sample variance (:class:`TotalEstimate`).  Estimates are formed only
from merged counts and sums, so chunked runs agree exactly.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np

from scipy import stats

from .checks import binomial_deviation, deviation_scale, normal_deviation, t_deviation
from .intervals import normal_interval, wilson_interval

__all__ = [
    "AreaEstimate",
    "TotalEstimate",
    "mean_estimate",
    "area_precision",
    "share_precision",
    "replicate_precision",
]


@dataclass(frozen=True)
class AreaEstimate:
    """A hit-or-miss estimate ``scale x hits / points``; for areas, m² of the equal-area plane.

    Attributes
    ----------
    estimate : float
        ``box_area * hits / points``.
    std_error : float
        ``box_area * sqrt(p̂ (1 − p̂) / points)``.
    ci_low, ci_high : float
        Wilson score interval at `confidence`, scaled by `box_area`.
    points, hits : int
    box_area : float
        The scale: the sampling box's area (m²), or a proposal's total count.
    confidence : float
    known : float
        A part known exactly and added to the count's estimate (strata
        counted whole, :meth:`from_counts`); 0 otherwise.
    replicates : int
        0 for a binomial count (Wilson interval); otherwise the number of
        independent replicates (scramblings, rounds of strata) whose spread
        gave the standard error and a Student-t interval with
        ``replicates - 1`` degrees of freedom (:meth:`from_replicates`).
    """

    estimate: float
    std_error: float
    ci_low: float
    ci_high: float
    points: int
    hits: int
    box_area: float
    confidence: float
    replicates: int = 0
    known: float = 0.0

    @classmethod
    def from_counts(cls, hits: int, points: int, box_area: float, confidence: float,
                    known: float = 0.0) -> "AreaEstimate":
        """Form the estimate, standard error and Wilson interval from counts, plus an exactly `known` part.

        With ``box_area == 0`` (nothing left to sample) the estimate is
        `known` itself, with no spread.
        """
        if box_area == 0:
            return cls(float(known), 0.0, float(known), float(known), int(points), int(hits), 0.0,
                       float(confidence), known=float(known))
        if points <= 0:
            raise ValueError("an estimate needs at least one point")
        p = hits / points
        low, high = wilson_interval(hits, points, confidence)
        return cls(
            estimate=known + box_area * p,
            std_error=box_area * math.sqrt(p * (1 - p) / points),
            ci_low=known + box_area * float(low),
            ci_high=known + box_area * float(high),
            points=int(points),
            hits=int(hits),
            box_area=float(box_area),
            confidence=float(confidence),
            known=float(known),
        )

    @classmethod
    def from_replicates(cls, total: float, total_sq: float, replicates: int, *, known: float, span: float,
                        points: int, hits: int, box_area: float, confidence: float) -> "AreaEstimate":
        """Form the estimate from `replicates` independent replicate estimates (their sum and sum of squares).

        ``estimate = known + mean``, standard error ``s / sqrt(R)`` from the
        sample standard deviation ``s`` of the replicates, and the Student-t
        interval with ``R - 1`` degrees of freedom, clipped to
        ``[known, known + span]`` (what the set's area can be).  Areas in m².
        """
        if replicates < 2:
            raise ValueError("a replicate interval needs at least two replicates")
        mean = total / replicates
        var = max(total_sq / replicates - mean * mean, 0.0) * replicates / (replicates - 1)
        std_error = math.sqrt(var / replicates)
        half = float(stats.t.isf((1 - confidence) / 2, replicates - 1)) * std_error
        estimate = known + mean
        return cls(
            estimate=estimate,
            std_error=std_error,
            ci_low=max(known, estimate - half),
            ci_high=min(known + span, estimate + half),
            points=int(points),
            hits=int(hits),
            box_area=float(box_area),
            confidence=float(confidence),
            replicates=int(replicates),
        )

    @property
    def fraction(self) -> float:
        """Hit fraction ``hits / points``."""
        return self.hits / self.points

    @property
    def half_width(self) -> float:
        """Half the interval's width, in the estimate's unit."""
        return (self.ci_high - self.ci_low) / 2

    def deviation(self, exact: float) -> float:
        """Deviation from an exact value as a normal score (:mod:`areamc.checks`).

        From the binomial law at ``exact / box_area`` for counts; for
        replicates, Student's t with ``replicates - 1`` degrees of freedom
        (floored standard error) turned into the normal score of the same tail.
        """
        if self.replicates:
            scale = deviation_scale(self.std_error, self.ci_low, self.ci_high, self.confidence)
            return t_deviation(normal_deviation(self.estimate, exact, scale), self.replicates - 1)
        if self.box_area == 0:
            return normal_deviation(self.estimate, exact, 0.0)
        return binomial_deviation(self.hits, self.points, (exact - self.known) / self.box_area)

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class TotalEstimate:
    """A sample-mean estimate of an integral, ``scale x mean(score)``.

    Attributes
    ----------
    estimate, std_error : float
        In the units of ``scale x score`` (for a density in persons per m²
        sampled in a box of m², persons).
    ci_low, ci_high : float
        Normal interval ``estimate ± z std_error`` from the sample variance
        (the central limit theorem; the sample sizes here are thousands of
        points, where Student's t and the normal quantile agree to < 0.1%).
    points : int
    confidence : float
    """

    estimate: float
    std_error: float
    ci_low: float
    ci_high: float
    points: int
    confidence: float

    @property
    def half_width(self) -> float:
        return (self.ci_high - self.ci_low) / 2

    def deviation(self, exact: float) -> float:
        """Deviation from an exact value in standard errors (floored; see :func:`~areamc.checks.deviation_scale`)."""
        scale = deviation_scale(self.std_error, self.ci_low, self.ci_high, self.confidence)
        return normal_deviation(self.estimate, exact, scale)

    def to_dict(self) -> dict:
        return asdict(self)


def mean_estimate(total: float, total_sq: float, n: int, scale: float, confidence: float) -> TotalEstimate:
    """Estimate ``scale x E[score]`` from the sum and sum of squares of `n` scores."""
    if n <= 1:
        raise ValueError("a mean interval needs at least two points")
    mean = total / n
    var = max(total_sq / n - mean * mean, 0.0) * n / (n - 1)
    std_error = scale * math.sqrt(var / n)
    estimate = scale * mean
    low, high = normal_interval(estimate, std_error, confidence)
    return TotalEstimate(estimate, std_error, low, high, int(n), float(confidence))


def area_precision(box_area: float, confidence: float):
    """Precision measure for hit counts in a box of `box_area` m²: every column's Wilson half-width."""

    def measure(sums: np.ndarray, _sumsq: np.ndarray, points: int):
        out = []
        for h in sums:
            est = AreaEstimate.from_counts(int(h), points, box_area, confidence)
            out.append((est.half_width, est.estimate))
        return out

    return measure


def share_precision(confidence: float):
    """Precision measure for shares: column 0 counts the points in a region, columns 1.. those also covered.

    Each share is ``hits / in-region points`` with its Wilson half-width; a
    run with no point in the region yet has infinite half-widths.
    """

    def measure(sums: np.ndarray, _sumsq: np.ndarray, _points: int):
        n = int(sums[0])
        if n == 0:
            return [(math.inf, 0.0)] * max(len(sums) - 1, 1)
        low, high = wilson_interval(sums[1:], n, confidence)
        return [((float(hi) - float(lo)) / 2, float(h) / n) for lo, hi, h in zip(low, high, sums[1:])]

    return measure


def replicate_precision(known, span: float, confidence: float, minimum: int = 2, *, columns=None,
                        scale: float = 1.0):
    """Precision measure for replicate estimates (rows are replicates): the t half-width of columns.

    `known` is the exactly known part (m²), one value or one per column;
    `columns` selects the columns that must meet the target (default all)
    and `scale` divides half-widths and estimates (a region's area turns
    areas into shares).  Fewer than `minimum` replicates give an infinite
    half-width.
    """

    def measure(sums: np.ndarray, sumsq: np.ndarray, replicates: int):
        chosen = range(len(sums)) if columns is None else columns
        if replicates < max(minimum, 2):
            return [(math.inf, 0.0)] * len(chosen)
        base = np.broadcast_to(np.asarray(known, dtype=float), (len(sums),))
        out = []
        for c in chosen:
            est = AreaEstimate.from_replicates(float(sums[c]), float(sumsq[c]), replicates, known=float(base[c]),
                                               span=span, points=replicates, hits=0, box_area=span,
                                               confidence=confidence)
            out.append((est.half_width / scale, est.estimate / scale))
        return out

    return measure
