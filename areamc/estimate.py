"""Hit-or-miss estimation with confidence intervals and stopping rules.

A point thrown uniformly into a box of area ``B`` lands in a set ``S`` with
probability ``p = |S| / B``; with ``h`` hits in ``n`` points the estimate is
``B h / n`` with standard error ``B sqrt(p̂(1 − p̂)/n)``, and the interval is
the Wilson (1927) score interval for ``p`` scaled by ``B``.  Chunks return
counts (sufficient statistics); estimates are formed only from merged counts,
so chunked and parallel runs agree exactly.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, asdict
from statistics import NormalDist
from typing import Callable

import numpy as np

from .errors import OptionError
from .sampling import Box, UniformSampler, scale_to_box

__all__ = [
    "z_for",
    "wilson_interval",
    "StopRule",
    "AreaEstimate",
    "TracePoint",
    "HitOrMissRun",
    "hit_or_miss",
    "accumulate",
    "Sums",
    "mean_interval",
    "TotalEstimate",
    "area_target",
    "check_confidence",
    "check_scale",
    "DEFAULT_POINTS",
    "DEFAULT_MAX_POINTS",
    "DEFAULT_CHUNK",
]

DEFAULT_POINTS = 100_000
DEFAULT_MAX_POINTS = 20_000_000
DEFAULT_CHUNK = 1 << 16


def check_scale(stderr: float, low: float, high: float, confidence: float) -> float:
    """Scale for deviations from an exact value: the standard error, floored at
    the interval's half-width over z, so that all-hit or no-hit runs (standard
    error 0) are not flagged while the exact value lies in their interval."""
    return max(stderr, (high - low) / 2 / z_for(confidence))


def check_confidence(confidence: float) -> float:
    """Return `confidence` as a float if it lies strictly between 0 and 1."""
    try:
        value = float(confidence)
    except (TypeError, ValueError):
        raise OptionError(f"--confidence: expected a number in (0, 1), got {confidence!r}") from None
    if not 0.0 < value < 1.0:
        raise OptionError(f"--confidence: must lie strictly between 0 and 1, got {confidence!r}")
    return value


def z_for(confidence: float) -> float:
    """Two-sided standard normal quantile for a confidence level in (0, 1)."""
    return NormalDist().inv_cdf(0.5 + check_confidence(confidence) / 2)


def wilson_interval(hits, n, confidence: float = 0.95):
    """Wilson score interval for a binomial proportion.

    ``[p̂ + z²/2n ± z sqrt(p̂(1−p̂)/n + z²/4n²)] / (1 + z²/n)``
    (Wilson 1927, JASA 22:209-212; Newcombe 1998, Statistics in Medicine
    17:857-872, method 3).  Vectorised over `hits` and `n`; returns
    ``(low, high)`` as fractions in [0, 1].

    Examples
    --------
    >>> lo, hi = wilson_interval(81, 263)
    >>> round(float(lo), 4), round(float(hi), 4)
    (0.2553, 0.3662)
    """
    z = z_for(confidence)
    hits = np.asarray(hits, dtype=float)
    n = np.asarray(n, dtype=float)
    p = hits / n
    z2 = z * z
    centre = p + z2 / (2 * n)
    half = z * np.sqrt(p * (1 - p) / n + z2 / (4 * n * n))
    denom = 1 + z2 / n
    low = np.clip((centre - half) / denom, 0.0, 1.0)
    high = np.clip((centre + half) / denom, 0.0, 1.0)
    low = np.where(hits == 0, 0.0, low)
    high = np.where(hits == n, 1.0, high)
    return low, high


@dataclass(frozen=True)
class StopRule:
    """When to stop sampling one estimate.

    Either a fixed number of `points`, or a precision target: stop at the
    first chunk whose interval half-width is at most `absolute` (m²) or at
    most `relative` times the estimate, but never beyond `max_points`.
    """

    points: int | None = DEFAULT_POINTS
    absolute: float | None = None
    relative: float | None = None
    max_points: int = DEFAULT_MAX_POINTS

    def __post_init__(self) -> None:
        if self.points is not None and (self.absolute is not None or self.relative is not None):
            raise OptionError("--points and --tolerance exclude each other; give one")
        for name in ("points", "max_points"):
            value = getattr(self, name)
            if value is not None and (
                isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value <= 0
            ):
                raise OptionError(f"--{name.replace('_', '-')}: must be a positive whole number, got {value!r}")
        for name in ("absolute", "relative"):
            value = getattr(self, name)
            if value is None:
                continue
            if isinstance(value, bool) or not isinstance(value, (int, float, np.number)) or not (
                math.isfinite(value) and value > 0
            ):
                raise OptionError(f"--tolerance: must be a positive number, got {value!r}")
        if self.points is None and self.absolute is None and self.relative is None:
            raise OptionError("give --points or --tolerance")

    @property
    def budget(self) -> int:
        """Most points this rule will ever draw."""
        return int(self.points if self.points is not None else self.max_points)

    @property
    def adaptive(self) -> bool:
        return self.points is None

    def met(self, half_width: float, estimate: float) -> bool:
        """True when a precision target is met (always False for a fixed count)."""
        if self.absolute is not None:
            return half_width <= self.absolute
        if self.relative is not None:
            return estimate > 0 and half_width <= self.relative * estimate
        return False


@dataclass(frozen=True)
class AreaEstimate:
    """A hit-or-miss area estimate; all areas in m² of the equal-area plane.

    Attributes
    ----------
    estimate : float
        ``box_area * hits / points``.
    stderr : float
        ``box_area * sqrt(p̂ (1 − p̂) / points)``.
    ci_low, ci_high : float
        Wilson score interval at `confidence`, scaled by `box_area`.
    points, hits : int
    box_area : float
    confidence : float
    """

    estimate: float
    stderr: float
    ci_low: float
    ci_high: float
    points: int
    hits: int
    box_area: float
    confidence: float

    @classmethod
    def from_counts(cls, hits: int, points: int, box_area: float, confidence: float) -> "AreaEstimate":
        """Form the estimate, standard error and Wilson interval from counts."""
        if points <= 0:
            raise ValueError("an estimate needs at least one point")
        p = hits / points
        low, high = wilson_interval(hits, points, confidence)
        return cls(
            estimate=box_area * p,
            stderr=box_area * math.sqrt(p * (1 - p) / points),
            ci_low=box_area * float(low),
            ci_high=box_area * float(high),
            points=int(points),
            hits=int(hits),
            box_area=float(box_area),
            confidence=float(confidence),
        )

    @property
    def fraction(self) -> float:
        """Hit fraction ``hits / points``."""
        return self.hits / self.points

    @property
    def half_width(self) -> float:
        """Half the interval's width, m²."""
        return (self.ci_high - self.ci_low) / 2

    @property
    def check_scale(self) -> float:
        """Scale for deviations from an exact value (see :func:`check_scale`)."""
        return check_scale(self.stderr, self.ci_low, self.ci_high, self.confidence)

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class TracePoint:
    """Running counts (or sums) after `points` points, one entry per column."""

    points: int
    hits: tuple[int, ...]


@dataclass(frozen=True)
class HitOrMissRun:
    """Counts from :func:`hit_or_miss`: points thrown, hits per column, and the trace."""

    points: int
    hits: tuple[int, ...]
    box_area: float
    trace: tuple[TracePoint, ...]
    stopped_early: bool

    def estimate(self, column: int = 0, confidence: float = 0.95) -> AreaEstimate:
        """The area estimate (m²) of one column, from the merged counts."""
        return AreaEstimate.from_counts(self.hits[column], self.points, self.box_area, confidence)


Classify = Callable[[np.ndarray, np.ndarray], np.ndarray]
Done = Callable[[np.ndarray, np.ndarray, int], bool]
Progress = Callable[[int, np.ndarray], None]


def area_target(stop: StopRule, box_area: float, confidence: float) -> Done | None:
    """The early-stopping test of `stop` for area columns in a box of `box_area` m².

    Every column's Wilson half-width must meet the precision target.
    """
    if not stop.adaptive:
        return None

    def done(hits: np.ndarray, _sumsq: np.ndarray, points: int) -> bool:
        return all(
            stop.met(e.half_width, e.estimate)
            for e in (AreaEstimate.from_counts(int(h), points, box_area, confidence) for h in hits)
        )

    return done


@dataclass(frozen=True)
class Sums:
    """Sufficient statistics of a sampling run: per column, the sum and sum of squares of the scores."""

    points: int
    sums: np.ndarray
    sumsq: np.ndarray
    trace: tuple[TracePoint, ...]
    stopped_early: bool


Draw = Callable[[int], tuple[np.ndarray, np.ndarray]]
Evaluate = Callable[[np.ndarray, np.ndarray], np.ndarray]


def accumulate(
    draw: Draw,
    evaluate: Evaluate,
    *,
    budget: int,
    done: Done | None = None,
    chunk: int = DEFAULT_CHUNK,
    trace_every: int | None = None,
    progress: Progress | None = None,
) -> Sums:
    """Draw points chunk by chunk, score them, and merge the sums in order.

    Parameters
    ----------
    draw : callable
        ``draw(n)`` returns the next `n` points ``(x, y)`` in plane metres; it
        must depend only on its stream position (see :mod:`areamc.sampling`),
        so the sums do not depend on `chunk`.
    evaluate : callable
        ``evaluate(x, y)`` returns scores, shape ``(n,)`` or ``(n, m)``: bools
        for hit-or-miss, floats for weighted totals.
    budget : int
        Most points to draw.
    done : callable, optional
        ``done(sums, sumsq, points)`` checked at the end of each chunk; True stops
        (a precision target met, or a sequential decision reached).
    chunk : int
        Points per chunk; memory is ``O(chunk)``.
    trace_every : int, optional
        Record running sums every this many points (exactly, across chunks),
        and once more at the end if the last point is off that grid.
    progress : callable, optional
        Called after each chunk with (points so far, sums so far).
    """
    if chunk <= 0:
        raise OptionError(f"--chunk: must be a positive whole number, got {chunk!r}")
    if trace_every is not None and trace_every <= 0:
        raise OptionError(f"--trace-every: must be a positive whole number, got {trace_every!r}")
    points = 0
    sums: np.ndarray | None = None
    sumsq: np.ndarray | None = None
    trace: list[TracePoint] = []
    stopped_early = False
    while points < budget:
        n = min(chunk, budget - points)
        x, y = draw(n)
        scores = np.asarray(evaluate(x, y))
        if scores.ndim == 1:
            scores = scores[:, None]
        if scores.dtype == bool:
            scores = scores.astype(np.int64)
        if sums is None:
            sums = np.zeros(scores.shape[1], dtype=scores.dtype)
            sumsq = np.zeros(scores.shape[1], dtype=scores.dtype)
        if trace_every:
            _extend_trace(trace, scores, points, sums, trace_every)
        sums = sums + scores.sum(axis=0)
        sumsq = sumsq + (scores * scores).sum(axis=0)
        points += n
        if progress is not None:
            progress(points, sums)
        if done is not None and done(sums, sumsq, points):
            stopped_early = points < budget
            break
    if trace_every and points % trace_every:
        trace.append(TracePoint(points, tuple(v.item() for v in sums)))  # the final state, off the K grid
    return Sums(points, sums, sumsq, tuple(trace), stopped_early)


def hit_or_miss(
    box: Box,
    classify: Classify,
    sampler: UniformSampler,
    *,
    budget: int,
    done: Done | None = None,
    chunk: int = DEFAULT_CHUNK,
    trace_every: int | None = None,
    progress: Progress | None = None,
) -> HitOrMissRun:
    """Throw uniform points into `box` and count hits (see :func:`accumulate` for the options).

    Parameters
    ----------
    box : Box
        Sampling box in plane metres.
    classify : callable
        ``classify(x, y)`` returns a bool array of shape ``(n,)`` (one set) or
        ``(n, m)`` (m sets counted on the same points).
    sampler : UniformSampler
        Source of points in [0, 1)²; its stream position decides the points,
        so the counts do not depend on `chunk`.

    Returns
    -------
    HitOrMissRun
    """
    run = accumulate(
        lambda n: scale_to_box(sampler.random(n), box),
        lambda x, y: np.asarray(classify(x, y), dtype=bool),
        budget=budget,
        done=done,
        chunk=chunk,
        trace_every=trace_every,
        progress=progress,
    )
    return HitOrMissRun(run.points, tuple(int(h) for h in run.sums), box.area, run.trace, run.stopped_early)


def _extend_trace(trace: list[TracePoint], scores: np.ndarray, start: int, sums: np.ndarray, every: int) -> None:
    """Append running sums at every multiple of `every` that falls in this chunk."""
    n = scores.shape[0]
    first = (start // every + 1) * every
    marks = np.arange(first, start + n + 1, every)
    if marks.size == 0:
        return
    cumulative = np.cumsum(scores, axis=0)
    for mark in marks:
        trace.append(TracePoint(int(mark), tuple(v.item() for v in sums + cumulative[mark - start - 1])))


@dataclass(frozen=True)
class TotalEstimate:
    """A sample-mean estimate of an integral, ``scale x mean(score)``.

    Attributes
    ----------
    estimate, stderr : float
        In the units of ``scale x score`` (for a density in persons per m²
        sampled in a box of m², persons).
    ci_low, ci_high : float
        Normal interval ``estimate ± z stderr`` from the sample variance
        (the central limit theorem; the sample sizes here are thousands of
        points, where Student's t and the normal quantile agree to < 0.1%).
    points : int
    confidence : float
    """

    estimate: float
    stderr: float
    ci_low: float
    ci_high: float
    points: int
    confidence: float

    @property
    def half_width(self) -> float:
        return (self.ci_high - self.ci_low) / 2

    @property
    def check_scale(self) -> float:
        """Scale for deviations from an exact value; for a normal interval, the standard error."""
        return check_scale(self.stderr, self.ci_low, self.ci_high, self.confidence)

    def to_dict(self) -> dict:
        return asdict(self)


def mean_interval(total: float, total_sq: float, n: int, scale: float, confidence: float) -> TotalEstimate:
    """Estimate ``scale x E[score]`` from the sum and sum of squares of `n` scores."""
    if n <= 1:
        raise ValueError("a mean interval needs at least two points")
    mean = total / n
    var = max(total_sq / n - mean * mean, 0.0) * n / (n - 1)
    stderr = scale * math.sqrt(var / n)
    estimate = scale * mean
    z = z_for(confidence)
    return TotalEstimate(estimate, stderr, estimate - z * stderr, estimate + z * stderr, int(n), float(confidence))
