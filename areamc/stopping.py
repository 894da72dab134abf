"""When sampling is done: every stopping rule of every job, in one place.

A :class:`StopRule` says what the user asked for: a fixed number of points,
a precision target (an absolute or relative interval half-width) with a cap
on points, and optionally a wall-clock budget.  A :class:`Stopper` applies
it to one run of the engine (:func:`areamc.engine.accumulate`), given the
job's measure of precision and, for claim checks, its decision test.

Precision targets without bias
------------------------------
Stopping at the first chunk whose half-width meets a target biases the
estimate: at low fills, runs that happen to hit often meet a relative
target sooner (+1.2% at fill 0.001 with a 20% target, measured in
docs/methods.md).  areamc therefore samples in two stages (Stein 1945, Ann.
Math. Statist. 16:243-258, for the two-stage idea):

1. a *pilot* runs until its half-width meets :data:`PILOT_SLACK` times the
   target (about a quarter of the points the target needs), or until half
   of the point cap;
2. from the pilot's half-width, the points the target needs are worked
   out (a half-width falls as 1/√n), and a fresh batch of that many
   points, drawn from the stream positions after the pilot, gives the
   estimate and its interval.

The batch size depends only on the pilot, and the batch is independent of
it, so the estimate is unbiased and its interval is an ordinary fixed-size
interval.  The cost is the pilot: about a quarter more points when the target
needs several chunks, and never less than one chunk.  The
reported half-width is close to the target but, being random, can exceed
it by a few percent.

Claim decisions stop as soon as every verdict is decided, with no second
stage: the confidence sequence behind the verdicts is valid at any stopping
time (:mod:`areamc.sequential`).  A time budget stops at the first chunk end
past it; the run is then not reproducible from its seed alone, which the
result records.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from .errors import OptionError

__all__ = [
    "StopRule",
    "Stopper",
    "Precision",
    "Decided",
    "DEFAULT_POINTS",
    "DEFAULT_MAX_POINTS",
    "PILOT_SLACK",
    "BUDGET",
    "TARGET",
    "DECIDED",
    "TIME",
]

DEFAULT_POINTS = 100_000
DEFAULT_MAX_POINTS = 20_000_000
#: Most points one estimate may draw unless the cap is raised on purpose: about half a minute of
#: area sampling at 7 million points a second, and a day of work at 10^12 points is refused.
POINT_CAP = 200_000_000
#: The pilot stops once its half-width is within this factor of the target.
PILOT_SLACK = 2.0
#: Fewest points in the final batch of a precision target.
MIN_FINAL_POINTS = 1_000
#: Fewest replicates in the pilot and in the final batch of a replicate sampler's precision target.
MIN_FINAL_REPLICATES = 16

#: Why a run stopped: the point budget (fixed count, or the cap) was used up;
BUDGET = "budget"
#: the precision target's pilot was met and the final batch drawn;
TARGET = "target"
#: every claim verdict was decided;
DECIDED = "decided"
#: the time budget ran out.
TIME = "time"

#: ``precision(sums, sumsq, points)`` -> one ``(half_width, estimate)`` per column that must meet the target.
Precision = Callable[[np.ndarray, np.ndarray, int], Sequence[tuple[float, float]]]
#: ``decided(sums, sumsq, points)`` -> True once every claim verdict is decided.
Decided = Callable[[np.ndarray, np.ndarray, int], bool]


def _whole(value, param: str) -> None:
    if value is not None and (isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value <= 0):
        raise OptionError(f"{{param}}: must be a positive whole number, got {value!r}", param=param)


def _positive(value, param: str) -> None:
    if value is None:
        return
    if isinstance(value, bool) or not isinstance(value, (int, float, np.number)) or not (math.isfinite(value) and value > 0):
        raise OptionError(f"{{param}}: must be a positive number, got {value!r}", param=param)


@dataclass(frozen=True)
class StopRule:
    """When to stop sampling one estimate.

    Attributes
    ----------
    points : int or None
        A fixed number of points (default 100,000); None with a precision target.
    absolute : float or None
        Target interval half-width in the estimate's own unit (m² for
        areas, a share for coverage, a count for totals).
    relative : float or None
        Target half-width as a fraction of the estimate (0.005 for 0.5%).
    max_points : int
        Cap on points with a precision target, pilot and final batch together.
    time_s : float or None
        Wall-clock budget in seconds per estimate; stops at the first chunk end past it.
    point_cap : int
        Largest `points` or `max_points` accepted (:data:`POINT_CAP`); raise it knowingly.

    Raises
    ------
    OptionError
        When `points` is given with a target, neither is given, or a value
        is out of range (parameters ``points``, ``tolerance``, ``max_points``,
        ``time_s``, ``point_cap``).
    """

    points: int | None = DEFAULT_POINTS
    absolute: float | None = None
    relative: float | None = None
    max_points: int = DEFAULT_MAX_POINTS
    time_s: float | None = None
    point_cap: int = POINT_CAP

    def __post_init__(self) -> None:
        if self.points is not None and (self.absolute is not None or self.relative is not None):
            raise OptionError("{param}: a fixed number of points and a tolerance exclude each other; give one",
                              param="tolerance")
        _whole(self.points, "points")
        _whole(self.max_points, "max_points")
        _positive(self.absolute, "tolerance")
        _positive(self.relative, "tolerance")
        _positive(self.time_s, "time_s")
        _whole(self.point_cap, "point_cap")
        for name in ("points", "max_points"):
            value = getattr(self, name)
            if value is not None and value > self.point_cap:
                raise OptionError(
                    f"{{{name}}}: {value:,} points per estimate is over the cap of {self.point_cap:,} "
                    f"(about {value / 7e6 / 60:,.0f} minutes per estimate at 7 million points a second); "
                    "raise {point_cap} if you mean it", params=(name, "point_cap"))
        if self.points is None and self.absolute is None and self.relative is None:
            raise OptionError("{param}: give a number of points or a tolerance", param="points")

    @property
    def point_budget(self) -> int:
        """Most points this rule will ever draw for one estimate."""
        return int(self.points if self.points is not None else self.max_points)

    @property
    def adaptive(self) -> bool:
        """True for a precision target (points decided by the data)."""
        return self.points is None

    def target(self, estimate: float) -> float:
        """The target half-width for an estimate: the absolute one, or relative x |estimate|."""
        if self.absolute is not None:
            return float(self.absolute)
        if self.relative is not None:
            return float(self.relative) * abs(estimate)
        return math.inf

    def met(self, half_width: float, estimate: float, slack: float = 1.0) -> bool:
        """True when `half_width` is within `slack` times the target (always False for a fixed count)."""
        if not self.adaptive:
            return False
        goal = self.target(estimate)
        return goal > 0 and half_width <= slack * goal

    def points_for(self, half_width: float, estimate: float, points: int) -> int:
        """Points a target needs, from a pilot of `points` with `half_width` (half-widths fall as 1/√n)."""
        goal = self.target(estimate)
        if not goal > 0 or not math.isfinite(half_width):
            return self.point_budget
        return int(math.ceil(points * (half_width / goal) ** 2))

    def to_dict(self) -> dict:
        return {"points": self.points, "tolerance_absolute": self.absolute, "tolerance_relative": self.relative,
                "max_points": self.max_points, "time_s": self.time_s,
                "two_stage": self.adaptive, "pilot_slack": PILOT_SLACK if self.adaptive else None}


class Stopper:
    """A stop rule applied to one run: decides at each chunk end, and sizes the final batch.

    Parameters
    ----------
    rule : StopRule
    precision : callable, optional
        The job's precision measure (see :data:`Precision`); needed for a
        precision target.
    decided : callable, optional
        The job's claim test (see :data:`Decided`); when given, the run stops
        as soon as it is True and a precision target is not used.
    clock : callable
        Seconds, for the time budget (``time.monotonic``).
    unit : int
        Points per step the engine counts in: 1, or a replicate's size for
        replicate samplers (:meth:`per_replicate`); budgets are in steps.
    """

    def __init__(self, rule: StopRule, *, precision: Precision | None = None, decided: Decided | None = None,
                 clock: Callable[[], float] = time.monotonic, unit: int = 1) -> None:
        if rule.adaptive and decided is None and precision is None:
            raise ValueError("a precision target needs the job's precision measure")
        self.rule = rule
        self._precision = precision
        self._decided = decided
        self._clock = clock
        self._start = clock()
        self.unit = int(unit)

    def per_replicate(self, size: int, precision: Precision) -> "Stopper":
        """The same rule, counted in replicates of `size` points and judged by `precision`; the clock runs on."""
        other = Stopper(self.rule, precision=precision, decided=self._decided, clock=self._clock, unit=size)
        other._start = self._start
        return other

    @property
    def steps(self) -> int:
        """The whole point budget in steps (points, or whole replicates)."""
        return self.rule.point_budget // self.unit

    @property
    def decides(self) -> bool:
        """True when a claim test may stop the run early."""
        return self._decided is not None

    @property
    def two_stage(self) -> bool:
        """True when a pilot is followed by a final batch (a precision target, no claim)."""
        return self.rule.adaptive and self._decided is None

    @property
    def budget(self) -> int:
        """Points the first stage may draw: the whole budget, or half the cap for a pilot."""
        return max(self.steps // 2, 1) if self.two_stage else self.steps

    def reason(self, sums: np.ndarray, sumsq: np.ndarray, points: int) -> str | None:
        """Why to stop after this chunk, or None to go on."""
        if self._decided is not None and self._decided(sums, sumsq, points):
            return DECIDED
        if self.two_stage and all(
            self.rule.met(hw, est, PILOT_SLACK) for hw, est in self._precision(sums, sumsq, points)
        ):
            return TARGET
        if self.out_of_time():
            return TIME
        return None

    def out_of_time(self) -> bool:
        """True when the time budget has run out."""
        return self.rule.time_s is not None and self._clock() - self._start > self.rule.time_s

    def final_batch(self, sums: np.ndarray, sumsq: np.ndarray, points: int, reason: str | None) -> tuple[int, str] | None:
        """Size of the final batch after a pilot of `points`, and the run's stop reason; None when there is none.

        The size is the largest need over the columns, at least
        :data:`MIN_FINAL_POINTS` and at most what the cap leaves.  The reason
        is :data:`TARGET` when the pilot met its slackened target and the cap
        leaves room for the whole need, else :data:`BUDGET` (the cap decided).
        """
        if not self.two_stage or reason == TIME:
            return None
        room = self.steps - points
        need = max((self.rule.points_for(hw, est, points) for hw, est in self._precision(sums, sumsq, points)),
                   default=room)
        least = MIN_FINAL_POINTS if self.unit == 1 else MIN_FINAL_REPLICATES
        size = int(max(1, min(max(need, least), room)))
        return size, TARGET if reason == TARGET and need <= room else BUDGET
