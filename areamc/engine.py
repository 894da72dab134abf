"""The one chunk loop under every job: draw, score, merge sums in order, stop by a :class:`~areamc.stopping.Stopper`.

A job hands the engine a sampler (points in plane metres), a scoring
function and a stopper; the engine returns the merged sufficient statistics
(counts, or sums and sums of squares) and never forms an estimate itself.
Because chunks are merged in stream order and the sampler's points depend
only on their stream position, a fixed-count run gives the same sums for
any chunk size.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from .errors import OptionError
from .estimate import AreaEstimate
from .samplers import Sampler
from .stopping import BUDGET, TIME, Stopper

__all__ = ["DEFAULT_CHUNK", "TracePoint", "Sums", "HitOrMissRun", "accumulate", "hit_or_miss"]

#: Points per chunk by default: memory is O(chunk).
DEFAULT_CHUNK = 1 << 16

Draw = Callable[[int], tuple[np.ndarray, np.ndarray]]
Evaluate = Callable[[np.ndarray, np.ndarray], np.ndarray]
#: ``progress(drawn, points, sums)``: points drawn so far in the run (pilot included), and the current stage's points and sums.
Progress = Callable[[int, int, np.ndarray], None]


@dataclass(frozen=True)
class TracePoint:
    """Running sums (hit counts for hit-or-miss) after `points` points, one entry per column."""

    points: int
    sums: tuple


@dataclass(frozen=True)
class Sums:
    """Sufficient statistics of a run: per column, the sum and sum of squares of the scores.

    Attributes
    ----------
    points : int
        Points behind the sums (the final batch's, after a pilot).
    sums, sumsq : numpy.ndarray
        Per column; int64 for hit counts, float for weighted scores.
    trace : tuple of TracePoint
        Running sums of the stage that gave the estimate.
    reason : str
        Why the run stopped (:data:`~areamc.stopping.BUDGET`, ``TARGET``, ``DECIDED``, ``TIME``).
    pilot_points : int
        Points of the pilot stage of a precision target (0 otherwise); not in the sums.
    """

    points: int
    sums: np.ndarray
    sumsq: np.ndarray
    trace: tuple[TracePoint, ...]
    reason: str
    pilot_points: int = 0

    @property
    def drawn(self) -> int:
        """All points drawn: pilot and final batch."""
        return self.points + self.pilot_points


def _check_positive(value, param: str) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value <= 0:
        raise OptionError(f"{{param}}: must be a positive whole number, got {value!r}", param=param)


def accumulate(
    draw: Draw,
    evaluate: Evaluate,
    stop: Stopper,
    *,
    chunk: int = DEFAULT_CHUNK,
    trace_every: int | None = None,
    progress: Progress | None = None,
) -> Sums:
    """Draw points chunk by chunk, score them, and merge the sums in order until `stop` says so.

    Parameters
    ----------
    draw : callable
        ``draw(n)`` returns the next `n` points ``(x, y)`` in plane metres; it
        must depend only on its stream position, so the sums do not depend on `chunk`.
    evaluate : callable
        ``evaluate(x, y)`` returns scores, shape ``(n,)`` or ``(n, m)``: bools
        for hit-or-miss, floats for weighted totals.
    stop : Stopper
        Checked at the end of each chunk; with a precision target it also
        sizes the final batch that follows the pilot.
    chunk : int
        Points per chunk (parameter ``chunk``); memory is ``O(chunk)``.
    trace_every : int, optional
        Record running sums every this many points (exactly, across chunks),
        and once more at the end if the last point is off that grid.
    progress : callable, optional
        Called after each chunk (see :data:`Progress`).

    Returns
    -------
    Sums
    """
    _check_positive(chunk, "chunk")
    if trace_every is not None:
        _check_positive(trace_every, "trace_every")
    first = _stage(draw, evaluate, stop.budget, stop.reason, chunk, trace_every, progress, 0)
    final = stop.final_batch(first.sums, first.sumsq, first.points, first.reason)
    if final is None:
        return first
    size, reason = final
    second = _stage(draw, evaluate, size, lambda *_: TIME if stop.out_of_time() else None,
                    chunk, trace_every, progress, first.points)
    if second.reason == TIME:
        reason = TIME
    return Sums(second.points, second.sums, second.sumsq, second.trace, reason, first.points)


def _stage(draw, evaluate, budget, check, chunk, trace_every, progress, drawn_before) -> Sums:
    points = 0
    totals: _OrderedSums | None = None
    sums = sumsq = None
    trace: list[TracePoint] = []
    reason = None
    while points < budget:
        n = min(chunk, budget - points)
        x, y = draw(n)
        scores = np.asarray(evaluate(x, y))
        if scores.ndim == 1:
            scores = scores[:, None]
        if scores.dtype == bool:
            scores = scores.astype(np.int64)
        if totals is None:
            totals = _OrderedSums(scores.shape[1], scores.dtype)
        if trace_every:
            _extend_trace(trace, scores, points, totals.current()[0], trace_every)
        totals.add(scores)
        points += n
        sums, sumsq = totals.current()
        if progress is not None:
            progress(drawn_before + points, points, sums)
        reason = check(sums, sumsq, points)
        if reason is not None:
            break
    if trace_every and points % trace_every:
        trace.append(TracePoint(points, tuple(v.item() for v in sums)))  # the final state, off the grid
    return Sums(points, sums, sumsq, tuple(trace), reason or BUDGET)


#: Stream positions per block of the fixed summation order of real-valued scores.
SUM_BLOCK = 4096


class _OrderedSums:
    """Running sums and sums of squares whose value does not depend on how the stream was chunked.

    Integer scores (hit counts) add exactly.  Real-valued scores are summed
    in a fixed order: each block of :data:`SUM_BLOCK` consecutive stream
    positions by a left-to-right running sum (``numpy.cumsum``, strictly
    sequential, unlike the pairwise ``sum``), then the block totals left to
    right; a block cut by a chunk end waits for the next chunk.  So the same
    points give the same digits for any chunk size.
    """

    def __init__(self, columns: int, dtype) -> None:
        self.exact = np.issubdtype(dtype, np.integer)
        self.dtype = np.int64 if self.exact else np.float64
        self.sums = np.zeros(columns, dtype=self.dtype)
        self.sumsq = np.zeros(columns, dtype=self.dtype)
        self._pending = np.zeros((0, columns), dtype=self.dtype)

    def add(self, scores: np.ndarray) -> None:
        if self.exact:
            self.sums = self.sums + scores.sum(axis=0)
            self.sumsq = self.sumsq + (scores * scores).sum(axis=0)
            return
        rows = scores.astype(np.float64, copy=False)
        if len(self._pending):
            rows = np.concatenate([self._pending, rows])
        full = len(rows) - len(rows) % SUM_BLOCK
        if full:
            blocks = rows[:full].reshape(-1, SUM_BLOCK, rows.shape[1])
            self.sums = _fold(self.sums, np.cumsum(blocks, axis=1)[:, -1, :])
            self.sumsq = _fold(self.sumsq, np.cumsum(blocks * blocks, axis=1)[:, -1, :])
        self._pending = rows[full:]

    def current(self) -> tuple[np.ndarray, np.ndarray]:
        """The sums so far, the waiting partial block included (in the same fixed order)."""
        if self.exact or not len(self._pending):
            return self.sums, self.sumsq
        rest = self._pending
        return (_fold(self.sums, np.cumsum(rest, axis=0)[-1:]),
                _fold(self.sumsq, np.cumsum(rest * rest, axis=0)[-1:]))


def _fold(total: np.ndarray, parts: np.ndarray) -> np.ndarray:
    """``total + parts[0] + parts[1] + ...`` added left to right."""
    return np.cumsum(np.vstack([total[None, :], parts]), axis=0)[-1]


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
class HitOrMissRun:
    """Counts from :func:`hit_or_miss`: points behind the counts, hits per column, the box, the trace."""

    points: int
    hits: tuple[int, ...]
    box_area: float
    trace: tuple[TracePoint, ...]
    reason: str
    pilot_points: int = 0

    def estimate(self, column: int = 0, confidence: float = 0.95) -> AreaEstimate:
        """The area estimate (m²) of one column, from the merged counts."""
        return AreaEstimate.from_counts(self.hits[column], self.points, self.box_area, confidence)


Classify = Callable[[np.ndarray, np.ndarray], np.ndarray]


def hit_or_miss(
    sampler: Sampler,
    classify: Classify,
    stop: Stopper,
    *,
    chunk: int = DEFAULT_CHUNK,
    trace_every: int | None = None,
    progress: Progress | None = None,
) -> HitOrMissRun:
    """Throw the sampler's points into its box and count hits (see :func:`accumulate` for the options).

    Parameters
    ----------
    sampler : Sampler
        Points of a :class:`~areamc.samplers.Box` domain, plane metres.
    classify : callable
        ``classify(x, y)`` returns a bool array of shape ``(n,)`` (one set) or
        ``(n, m)`` (m sets counted on the same points).
    stop : Stopper

    Returns
    -------
    HitOrMissRun
    """
    run = accumulate(
        sampler.random,
        lambda x, y: np.asarray(classify(x, y), dtype=bool),
        stop,
        chunk=chunk,
        trace_every=trace_every,
        progress=progress,
    )
    return HitOrMissRun(run.points, tuple(int(h) for h in run.sums), sampler.domain.area, run.trace,
                        run.reason, run.pilot_points)
