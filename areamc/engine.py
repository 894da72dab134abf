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

import math

import numpy as np

from .errors import OptionError
from .estimate import AreaEstimate, replicate_precision
from .samplers import Sampler, is_replicate, sampler_name
from .stopping import BUDGET, TIME, Stopper

__all__ = ["DEFAULT_CHUNK", "TracePoint", "Sums", "HitOrMissRun", "accumulate", "hit_or_miss", "MIN_REPLICATES"]

#: Points per chunk by default: memory is O(chunk).
DEFAULT_CHUNK = 1 << 16

Draw = Callable[[int], tuple[np.ndarray, np.ndarray]]
Evaluate = Callable[[np.ndarray, np.ndarray], np.ndarray]
#: ``progress(drawn, points, sums, sumsq)``: points drawn so far in the run (pilot included), and the current
#: stage's points, sums and sums of squares.
Progress = Callable[[int, int, np.ndarray, np.ndarray], None]
#: ``progress(drawn, estimate)`` of :func:`hit_or_miss`: points drawn so far, and column 0's running estimate.
EstimateProgress = Callable[[int, AreaEstimate], None]


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
    on_final: Callable[[int], int] | None = None,
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
    on_final : callable, optional
        ``on_final(size) -> size`` between the pilot and the final batch of
        a precision target: lets a sampler change how it draws (for example
        reallocate strata) and resize the batch to match.

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
    if on_final is not None:
        size = on_final(size)
    second = _stage(draw, evaluate, size, lambda *_: TIME if stop.out_of_time() else None,
                    chunk, trace_every, progress, first.points)
    if second.reason == TIME:
        reason = TIME
    return Sums(second.points, second.sums, second.sumsq, second.trace, reason, first.points)


def score_columns(scores) -> np.ndarray:
    """Scores as an ``(n, m)`` array: a single column made two-dimensional, bools as int64 hit counts."""
    scores = np.asarray(scores)
    if scores.ndim == 1:
        scores = scores[:, None]
    return scores.astype(np.int64) if scores.dtype == bool else scores


def _stage(draw, evaluate, budget, check, chunk, trace_every, progress, drawn_before) -> Sums:
    points = 0
    totals: _OrderedSums | None = None
    sums = sumsq = None
    trace: list[TracePoint] = []
    reason = None
    while points < budget:
        n = min(chunk, budget - points)
        x, y = draw(n)
        scores = score_columns(evaluate(x, y))
        if totals is None:
            totals = _OrderedSums(scores.shape[1], scores.dtype)
        if trace_every:
            _extend_trace(trace, scores, points, totals.current()[0], trace_every)
        totals.add(scores)
        points += n
        sums, sumsq = totals.current()
        if progress is not None:
            progress(drawn_before + points, points, sums, sumsq)
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
    """Counts from :func:`hit_or_miss`: points behind the counts, hits per column, the box, the trace.

    For a replicate sampler (:class:`~areamc.samplers.ReplicateSampler`)
    `replicates` is their number, `sums` and `sumsq` the sums of the
    replicate estimates per column (m²), `known` the exactly known part
    added to each and `span` the sampled part's area; the estimate comes
    from their spread.
    """

    points: int
    hits: tuple[int, ...]
    box_area: float
    trace: tuple[TracePoint, ...]
    reason: str
    pilot_points: int = 0
    replicates: int = 0
    sums: tuple[float, ...] = ()
    sumsq: tuple[float, ...] = ()
    known: tuple[float, ...] = ()
    span: float = 0.0

    def estimate(self, column: int = 0, confidence: float = 0.95) -> AreaEstimate:
        """The area estimate (m²) of one column, from the merged counts (or replicate sums)."""
        if self.replicates:
            return AreaEstimate.from_replicates(
                self.sums[column], self.sumsq[column], self.replicates, known=self.known[column], span=self.span,
                points=self.points, hits=self.hits[column], box_area=self.box_area, confidence=confidence)
        return AreaEstimate.from_counts(self.hits[column], self.points, self.box_area, confidence)


Classify = Callable[[np.ndarray, np.ndarray], np.ndarray]


def hit_or_miss(
    sampler: Sampler,
    classify: Classify,
    stop: Stopper,
    *,
    chunk: int = DEFAULT_CHUNK,
    trace_every: int | None = None,
    progress: EstimateProgress | None = None,
    confidence: float = 0.95,
    replicate_target: Callable[[Sampler], Callable] | None = None,
    workers: int = 1,
) -> HitOrMissRun:
    """Throw the sampler's points into its box and count hits (see :func:`accumulate` for the options).

    Parameters
    ----------
    sampler : Sampler
        Points of a :class:`~areamc.samplers.Box` domain, plane metres.  A
        :class:`~areamc.samplers.ReplicateSampler` is drawn whole replicates
        at a time and judged by their spread (:func:`_replicate_run`).
    classify : callable
        ``classify(x, y)`` returns a bool array of shape ``(n,)`` (one set) or
        ``(n, m)`` (m sets counted on the same points).
    stop : Stopper
    progress : callable, optional
        ``progress(drawn, estimate)`` after each chunk: points drawn so far
        (pilot included) and column 0's running :class:`AreaEstimate` (m²).
    confidence : float
        Of the running estimates, and of the precision measure of replicate
        samplers (plain runs are judged by the stopper's own).
    replicate_target : callable, optional
        ``replicate_target(sampler)`` gives the precision measure a replicate
        sampler's run is judged by, once the sampler is bound and planned
        (default: every column's t half-width in m²,
        :func:`~areamc.estimate.replicate_precision`).
    workers : int
        With more than one, a fixed-count run of a plain sampler (no trace,
        progress, time budget or claim) is cut into spans of the stream that
        worker processes count (:func:`~areamc.parallel.fixed_count_sums`);
        the counts are the same as on one worker.

    Returns
    -------
    HitOrMissRun
    """
    if is_replicate(sampler):
        return _replicate_run(sampler, classify, stop, chunk, trace_every, progress, confidence, replicate_target)
    box_area = sampler.domain.area
    if workers > 1 and _splittable(stop, trace_every, progress):
        from .parallel import fixed_count_sums

        run = fixed_count_sums(sampler, lambda x, y: np.asarray(classify(x, y), dtype=bool), stop.rule.points,
                               workers, chunk=chunk)
        return HitOrMissRun(run.points, tuple(int(h) for h in run.sums), box_area, (), run.reason)

    def report(drawn: int, points: int, sums, _sumsq) -> None:
        progress(drawn, AreaEstimate.from_counts(int(sums[0]), points, box_area, confidence))

    run = accumulate(
        sampler.random,
        lambda x, y: np.asarray(classify(x, y), dtype=bool),
        stop,
        chunk=chunk,
        trace_every=trace_every,
        progress=None if progress is None else report,
    )
    return HitOrMissRun(run.points, tuple(int(h) for h in run.sums), sampler.domain.area, run.trace,
                        run.reason, run.pilot_points)


def _splittable(stop: Stopper, trace_every, progress) -> bool:
    """True for a run whose points are fixed in advance, so that workers can count spans of its stream."""
    rule = stop.rule
    return (not rule.adaptive and rule.time_s is None and not stop.decides and trace_every is None
            and progress is None)


#: Fewest replicates a replicate sampler's run may have (and a pilot waits for).
MIN_REPLICATES = 16


def _replicate_run(sampler, classify, stop: Stopper, chunk, trace_every, progress, confidence,
                   target=None) -> HitOrMissRun:
    """Hit-or-miss by whole replicates: the engine sums each replicate's estimate, the spread gives the interval.

    The sampler is bound to the classifier (a stratified sampler takes its
    strata from the classifier's cell grid) and planned for the run's
    budget, then each step of :func:`accumulate` is one replicate; chunks
    are whole replicates, so fixed-count results do not depend on `chunk`.
    """
    if trace_every is not None:
        raise OptionError(f"{{param}}: running estimates are recorded for the uniform sampler, "
                          f"not {sampler_name(type(sampler))!r}", param="trace_every")
    _check_positive(chunk, "chunk")
    if hasattr(sampler, "bind"):
        sampler.bind(classify)
    if hasattr(sampler, "plan"):
        sampler.plan(stop.rule.points)  # None for a precision target
    size = sampler.replicate_size
    if stop.rule.point_budget // size < MIN_REPLICATES:
        raise OptionError(f"{{param}}: the {sampler_name(type(sampler))!r} sampler needs at least "
                          f"{MIN_REPLICATES * size:,} points here ({MIN_REPLICATES} replicates of {size:,})",
                          param="points")
    measure = (target(sampler) if target is not None
               else replicate_precision(sampler.known, sampler.span, confidence, MIN_REPLICATES))
    stopper = stop.per_replicate(size, measure)
    drawn = [0]  # points drawn so far, pilot included
    pilot = [0]
    hits: list[np.ndarray] = []  # hit counts of the current stage, per chunk

    def draw(k: int):
        drawn[0] += k * sampler.replicate_size
        return sampler.random(k * sampler.replicate_size)

    def evaluate(x, y):
        scores = np.asarray(classify(x, y), dtype=bool)
        scores = scores[:, None] if scores.ndim == 1 else scores
        hits.append(np.count_nonzero(scores, axis=0))
        return sampler.totals(scores)

    def on_final(steps: int) -> int:
        pilot[0] = drawn[0]
        hits.clear()
        before = sampler.replicate_size
        sampler.next_stage()
        after = sampler.replicate_size
        room = (stop.rule.point_budget - pilot[0]) // after
        return int(max(1, min(max(math.ceil(steps * before / after), MIN_REPLICATES), room)))

    def report(_drawn: int, steps: int, sums, sumsq) -> None:
        if steps >= 2:
            progress(drawn[0], AreaEstimate.from_replicates(
                float(sums[0]), float(sumsq[0]), steps, known=float(np.ravel(sampler.known)[0]), span=sampler.span,
                points=steps * sampler.replicate_size, hits=0, box_area=sampler.domain.area, confidence=confidence))

    # a pilot is judged every MIN_REPLICATES replicates at most, so small replicates do not overshoot it
    steps = max(1, chunk // size)
    if stopper.two_stage:
        steps = min(steps, MIN_REPLICATES)
    run = accumulate(draw, evaluate, stopper, chunk=steps, progress=None if progress is None else report,
                     on_final=on_final)
    total_hits = np.sum(hits, axis=0)
    return HitOrMissRun(run.points * sampler.replicate_size, tuple(int(h) for h in total_hits),
                        sampler.domain.area, (), run.reason, pilot[0], run.points,
                        tuple(float(v) for v in run.sums), tuple(float(v) for v in run.sumsq),
                        tuple(float(v) for v in np.broadcast_to(np.asarray(sampler.known, float), (len(run.sums),))),
                        float(sampler.span))

