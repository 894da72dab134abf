"""Tests of ``areamc.stopping``: stop rules, and the Stopper driving the engine's chunk loop.

References:

* an interval half-width falls as 1/sqrt(n) (central limit theorem; common practice), so a
  half-width h at n points reaches a target t at n (h/t)² points; checked against the Wilson
  (1927, JASA 22:209-212) half-width from ``scipy.stats.binomtest``;
* the two-stage procedure (Stein 1945, Ann. Math. Statist. 16:243-258, for the two-stage idea;
  common practice): a pilot sizes a fresh final batch, which alone gives the estimate, so the
  estimate is unbiased; checked by the mean over seeds, held to 3 standard errors of that mean
  (common practice);
* a disk of radius r has area π r²;
* sums over stream positions computed here directly on a deterministic toy stream.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from areamc.engine import accumulate, hit_or_miss
from areamc.errors import OptionError
from areamc.estimate import AreaEstimate, area_precision
from areamc.intervals import wilson_interval
from areamc.samplers import Box, UniformSampler
from areamc.seeds import child_seed, make_seed
from areamc.stopping import (
    BUDGET,
    DECIDED,
    DEFAULT_MAX_POINTS,
    DEFAULT_POINTS,
    MIN_FINAL_POINTS,
    PILOT_SLACK,
    TARGET,
    TIME,
    StopRule,
    Stopper,
)

DISK_X, DISK_Y, DISK_R = 0.45, 0.55, 0.35
DISK_AREA = math.pi * DISK_R**2
UNIT = Box(0.0, 0.0, 1.0, 1.0)
#: The final half-width of a two-stage run is close to the target, not bounded by it (the batch
#: is sized from the pilot's noisy half-width); allowance for that noise (common practice).
TWO_STAGE_SLACK = 1.3


def disk(x, y):
    return (x - DISK_X) ** 2 + (y - DISK_Y) ** 2 < DISK_R**2


# --------------------------------------------------------------------------------------------
# StopRule
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "kwargs, param",
    [
        ({"points": 0}, "points"),
        ({"points": -5}, "points"),
        ({"points": 1.5}, "points"),
        ({"points": "100"}, "points"),
        ({"points": True}, "points"),
        ({"points": 1000, "absolute": 1.0}, "tolerance"),
        ({"points": 1000, "relative": 0.01}, "tolerance"),
        ({"points": None}, "points"),
        ({"points": None, "absolute": 0.0}, "tolerance"),
        ({"points": None, "absolute": -1.0}, "tolerance"),
        ({"points": None, "relative": float("nan")}, "tolerance"),
        ({"points": None, "relative": float("inf")}, "tolerance"),
        ({"points": None, "relative": "0.1"}, "tolerance"),
        ({"points": None, "relative": 0.01, "max_points": 0}, "max_points"),
        ({"points": None, "relative": 0.01, "max_points": 2.5}, "max_points"),
        ({"points": 1000, "time_s": 0.0}, "time_s"),
        ({"points": 1000, "time_s": -1.0}, "time_s"),
        ({"points": 1000, "time_s": float("nan")}, "time_s"),
        ({"points": 1000, "time_s": "5"}, "time_s"),
    ],
)
def test_stop_rule__invalid(kwargs, param):
    # library messages name the Python parameter ("points: ..."), not a command-line flag
    with pytest.raises(OptionError, match=rf"^{param}: ") as info:
        StopRule(**kwargs)
    assert info.value.param == param


def test_stop_rule__valid():
    default = StopRule()
    assert default.points == DEFAULT_POINTS and default.max_points == DEFAULT_MAX_POINTS and not default.adaptive
    fixed = StopRule(points=1234)
    assert fixed.point_budget == 1234 and not fixed.adaptive
    assert not fixed.met(0.0, 1.0) and fixed.target(5.0) == math.inf
    rel = StopRule(points=None, relative=0.01, max_points=5000)
    assert rel.adaptive and rel.point_budget == 5000
    assert rel.target(-200.0) == pytest.approx(2.0)
    assert rel.met(0.5, 100.0) and not rel.met(1.5, 100.0) and not rel.met(0.0, 0.0)
    assert rel.met(1.5, 100.0, slack=PILOT_SLACK) and not rel.met(2.5, 100.0, slack=PILOT_SLACK)
    absolute = StopRule(points=None, absolute=2.0)
    assert absolute.met(2.0, 1.0) and not absolute.met(2.01, 1e9)
    assert StopRule(points=10, time_s=0.5).time_s == 0.5
    meta = rel.to_dict()
    assert meta["two_stage"] is True and meta["pilot_slack"] == PILOT_SLACK and meta["tolerance_relative"] == 0.01
    assert fixed.to_dict()["two_stage"] is False and fixed.to_dict()["pilot_slack"] is None


@pytest.mark.parametrize("half_width, target, n", [(2.0, 1.0, 1000), (1.0, 1.0, 777), (0.3, 0.1, 5000), (5.0, 0.01, 10)])
def test_stop_rule__points_for__inverse_square_root(half_width, target, n):
    # half-width h at n points, target t: n (h/t)² points (1/sqrt(n) law, common practice)
    # (rounded up to whole points; one more when n (h/t)² is a whole number lost to rounding)
    exact = n * (half_width / target) ** 2
    rule = StopRule(points=None, absolute=target)
    need = rule.points_for(half_width, 123.0, n)
    assert isinstance(need, int) and exact * (1 - 1e-12) <= need <= exact + 1
    relative = StopRule(points=None, relative=0.05)  # the same target as 5% of an estimate of t / 0.05
    need = relative.points_for(half_width, target / 0.05, n)
    assert exact * (1 - 1e-12) <= need <= exact + 1


@pytest.mark.parametrize("hits, n, relative", [(200, 1000, 0.05), (30, 5000, 0.2), (4000, 10_000, 0.01)])
def test_stop_rule__points_for__reaches_the_wilson_target(hits, n, relative):
    # The points a pilot asks for give, at the same hit fraction, a Wilson half-width (scipy
    # binomtest) at the target to within a few percent (the 1/sqrt(n) law is asymptotic).
    pilot = stats.binomtest(hits, n).proportion_ci(method="wilson")
    p = hits / n
    rule = StopRule(points=None, relative=relative)
    need = rule.points_for((pilot.high - pilot.low) / 2, p, n)
    final = stats.binomtest(round(p * need), need).proportion_ci(method="wilson")
    assert (final.high - final.low) / 2 == pytest.approx(relative * p, rel=0.05)


def test_stop_rule__points_for__no_usable_half_width_asks_for_the_budget():
    rule = StopRule(points=None, relative=0.1, max_points=7000)
    assert rule.points_for(math.inf, 1.0, 100) == 7000
    assert rule.points_for(0.5, 0.0, 100) == 7000  # a relative target of an estimate of 0 is 0


# --------------------------------------------------------------------------------------------
# Stopper on a deterministic toy stream
# --------------------------------------------------------------------------------------------


class Stream:
    """Points at stream positions 0, 1, 2, ...: x = position; optionally ticks a fake clock per chunk."""

    def __init__(self, clock=None):
        self.position = 0
        self.clock = clock

    def draw(self, n):
        x = np.arange(self.position, self.position + n, dtype=float)
        self.position += n
        if self.clock is not None:
            self.clock.now += 1.0
        return x, np.zeros(n)


def score(x, _y):
    """Integer scores of stream positions (two columns), so sums are exact."""
    i = x.astype(np.int64)
    return np.column_stack([(i * 7919) % 101, i % 3 == 0]).astype(np.int64)


def sums_at(start, stop):
    s = score(np.arange(start, stop, dtype=float), None)
    return s.sum(axis=0).tolist(), (s * s).sum(axis=0).tolist()


def toy_precision(c):
    """A half-width of c / sqrt(points) (the 1/sqrt(n) law) for one column, estimate 1."""
    return lambda _sums, _sumsq, points: [(c / math.sqrt(points), 1.0)]


class Clock:
    def __init__(self):
        self.now = 0.0

    def __call__(self):
        return self.now


def test_stopper__two_stage__final_batch_is_fresh_and_sized_by_the_pilot():
    c, target, chunk = 100.0, 0.5, 3000
    rule = StopRule(points=None, absolute=target, max_points=10**6)
    stopper = Stopper(rule, precision=toy_precision(c))
    assert stopper.two_stage and stopper.budget == 10**6 // 2
    seen = []
    run = accumulate(Stream().draw, score, stopper, chunk=chunk,
                     progress=lambda drawn, points, sums, _sq: seen.append((drawn, points)))
    # Pilot: stops at the first chunk end with c/sqrt(n) <= PILOT_SLACK * target, i.e. n >= 10 000.
    pilot = run.pilot_points
    assert pilot == 12_000
    assert c / math.sqrt(pilot) <= PILOT_SLACK * target < c / math.sqrt(pilot - chunk)
    # Final batch: the points the pilot says the target needs, n (h/t)² = c²/t² = 40 000.
    final = rule.points_for(c / math.sqrt(pilot), 1.0, pilot)
    assert abs(final - (c / target) ** 2) <= 1
    assert run.points == final and run.drawn == pilot + final
    assert run.reason == TARGET
    # ...drawn fresh from the stream positions after the pilot: [pilot, pilot + final)
    expected_sums, expected_sumsq = sums_at(pilot, pilot + final)
    assert run.sums.tolist() == expected_sums and run.sumsq.tolist() == expected_sumsq
    assert run.sums.tolist() != sums_at(0, final)[0]
    # progress: pilot chunks, then the final batch's chunks (drawn counts the pilot too)
    pilot_ends = list(range(chunk, pilot + 1, chunk))
    final_ends = list(range(chunk, final, chunk)) + [final]
    assert seen == [(e, e) for e in pilot_ends] + [(pilot + e, e) for e in final_ends]


def test_stopper__two_stage__final_batch_at_least_the_minimum():
    # A pilot far better than its slack asks for few points; the final batch is still MIN_FINAL_POINTS.
    rule = StopRule(points=None, absolute=1.0, max_points=10**6)
    run = accumulate(Stream().draw, score, Stopper(rule, precision=toy_precision(5.0)), chunk=100)
    assert run.pilot_points == 100 and rule.points_for(0.5, 1.0, 100) == 25
    assert run.points == MIN_FINAL_POINTS == 1000
    assert run.sums.tolist() == sums_at(100, 1100)[0]


def test_stopper__two_stage__pilot_capped_at_half_and_final_at_the_rest():
    # The target is never met: the pilot stops at half the cap, the final batch takes the rest.
    rule = StopRule(points=None, absolute=1e-6, max_points=20_001)
    run = accumulate(Stream().draw, score, Stopper(rule, precision=toy_precision(100.0)), chunk=3000)
    assert run.pilot_points == 10_000 and run.points == 10_001 and run.drawn == rule.max_points
    assert run.reason == BUDGET
    assert run.sums.tolist() == sums_at(10_000, 20_001)[0]


def test_stopper__claim_decided_stops_with_no_second_stage():
    # A claim test stops the run as soon as it is decided, with a precision target or a fixed count.
    for rule in (StopRule(points=None, relative=0.01, max_points=10**6), StopRule(points=10**6)):
        stopper = Stopper(rule, precision=toy_precision(1e6), decided=lambda _s, _q, points: points >= 5000)
        assert not stopper.two_stage and stopper.budget == rule.point_budget
        run = accumulate(Stream().draw, score, stopper, chunk=2000)
        assert run.reason == DECIDED and run.points == 6000 and run.pilot_points == 0
        assert run.sums.tolist() == sums_at(0, 6000)[0]


def test_stopper__claim_never_decided_uses_the_whole_cap():
    rule = StopRule(points=None, relative=0.01, max_points=9000)
    stopper = Stopper(rule, precision=toy_precision(1e-9), decided=lambda *_: False)
    run = accumulate(Stream().draw, score, stopper, chunk=2000)
    # no pilot stop although the "precision" is met at once: a claim run has no precision stage
    assert run.reason == BUDGET and run.points == 9000 and run.pilot_points == 0


def test_stopper__fixed_count_has_no_precision_test():
    stopper = Stopper(StopRule(points=100))
    assert not stopper.two_stage and stopper.budget == 100
    assert stopper.reason(np.array([50]), np.array([50]), 100) is None
    assert stopper.final_batch(np.array([50]), np.array([50]), 100, BUDGET) is None


def test_stopper__precision_target_needs_a_measure():
    with pytest.raises(ValueError):
        Stopper(StopRule(points=None, relative=0.1))


def test_stopper__every_column_must_meet_the_target():
    # Wilson half-width at 500/1000 is about 0.031 (scipy reference) <= 2 x 0.1 x 0.5; at 5/10 it
    # is not; with a second column of 0 hits the relative target is never met.
    stopper = Stopper(StopRule(points=None, relative=0.1), precision=area_precision(1.0, 0.95))
    lo, hi = wilson_interval(500, 1000, 0.95)
    assert (hi - lo) / 2 <= PILOT_SLACK * 0.1 * 0.5
    assert stopper.reason(np.array([500]), np.array([500]), 1000) == TARGET
    assert stopper.reason(np.array([5]), np.array([5]), 10) is None
    assert stopper.reason(np.array([500, 0]), np.array([500, 0]), 1000) is None


def test_stopper__time_budget_stops_at_the_first_chunk_end_past_it():
    clock = Clock()
    stream = Stream(clock)  # one fake second per chunk
    stopper = Stopper(StopRule(points=10**6, time_s=5.5), clock=clock)
    run = accumulate(stream.draw, score, stopper, chunk=1000)
    # chunk ends at t = 1, 2, ...; t = 5 is within 5.5 s, t = 6 is the first past it
    assert run.reason == TIME and run.points == 6000 and clock.now == 6.0
    assert run.sums.tolist() == sums_at(0, 6000)[0]


def test_stopper__time_budget_in_the_pilot_skips_the_final_batch():
    clock = Clock()
    rule = StopRule(points=None, absolute=1e-6, max_points=10**6, time_s=3.5)
    run = accumulate(Stream(clock).draw, score, Stopper(rule, precision=toy_precision(100.0), clock=clock), chunk=1000)
    assert run.reason == TIME and run.points == 4000 and run.pilot_points == 0


def test_stopper__time_budget_in_the_final_batch():
    clock = Clock()
    rule = StopRule(points=None, absolute=0.5, max_points=10**6, time_s=6.5)
    run = accumulate(Stream(clock).draw, score, Stopper(rule, precision=toy_precision(100.0), clock=clock), chunk=3000)
    # pilot of 4 chunks (12 000 points, t = 4), then the final batch is cut at t = 7 > 6.5
    assert run.reason == TIME and run.pilot_points == 12_000 and run.points == 9000
    assert run.sums.tolist() == sums_at(12_000, 21_000)[0]


# --------------------------------------------------------------------------------------------
# Precision targets on hit-or-miss runs
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "rule",
    [
        StopRule(points=None, relative=0.01, max_points=2_000_000),
        StopRule(points=None, absolute=0.01, max_points=2_000_000),
    ],
    ids=["relative", "absolute"],
)
def test_hit_or_miss__adaptive__pilot_stops_at_first_chunk_meeting_target(rule):
    box = Box(0.0, 0.0, 2.0, 1.0)  # area 2, hit share about 0.19
    chunk = 2000
    seen = []  # (drawn, points, hits) after every chunk
    run = hit_or_miss(
        UniformSampler(make_seed(5), box), disk, Stopper(rule, precision=area_precision(box.area, 0.95)),
        chunk=chunk, trace_every=chunk, progress=lambda d, est: seen.append((d, est.points, est.hits)),
    )
    est = run.estimate(0, 0.95)
    pilot = run.pilot_points
    assert run.reason == TARGET
    assert 0 < pilot < rule.max_points // 2 and pilot % chunk == 0
    # The pilot stops at the first chunk end within PILOT_SLACK x the target, not one chunk later.
    pilot_chunks = [s for s in seen if s[0] <= pilot]
    assert [d for d, _, _ in pilot_chunks] == list(range(chunk, pilot + 1, chunk))
    for i, (_, points, hits) in enumerate(pilot_chunks):
        prev = AreaEstimate.from_counts(hits, points, box.area, 0.95)
        assert rule.met(prev.half_width, prev.estimate, PILOT_SLACK) == (i == len(pilot_chunks) - 1)
    last = AreaEstimate.from_counts(pilot_chunks[-1][2], pilot, box.area, 0.95)
    # The final batch is the size the pilot asked for, and its half-width is near the target.
    assert est.points == run.points == max(MIN_FINAL_POINTS, rule.points_for(last.half_width, last.estimate, pilot))
    target = rule.target(est.estimate)
    assert 0.7 * target <= est.half_width <= TWO_STAGE_SLACK * target
    # The final batch is fresh: its hits are those of stream positions [pilot, pilot + points).
    sampler = UniformSampler(make_seed(5), box)
    sampler.fast_forward(pilot)
    assert est.hits == int(disk(*sampler.random(est.points)).sum())
    # The trace is the final batch's, every chunk points.
    assert [t.points for t in run.trace] == list(range(chunk, est.points + 1, chunk)) + (
        [est.points] if est.points % chunk else [])
    assert run.trace[-1].sums[0] == est.hits
    # The true area (pi r^2) lies in the final interval for this seed.
    assert est.ci_low <= DISK_AREA <= est.ci_high


def test_hit_or_miss__adaptive__cap_reached():
    rule = StopRule(points=None, relative=1e-4, max_points=5000)
    run = hit_or_miss(UniformSampler(make_seed(5), UNIT), disk, Stopper(rule, precision=area_precision(1.0, 0.95)),
                      chunk=1024)
    est = run.estimate(0, 0.95)
    assert run.reason == BUDGET
    assert run.pilot_points == 2500 and est.points == 2500  # half the cap each
    assert est.half_width > 1e-4 * est.estimate


def test_hit_or_miss__adaptive__final_batch_cut_by_the_cap_is_not_reported_as_target():
    # Disk fill 0.385, 0.5% relative target: the pilot meets 2x the target at about 62 000 points
    # and asks for about 245 000 more (the 1/sqrt(n) law); the cap of 150 000 leaves 88 000.
    rule = StopRule(points=None, relative=0.005, max_points=150_000)
    run = hit_or_miss(UniformSampler(make_seed(5), UNIT), disk, Stopper(rule, precision=area_precision(1.0, 0.95)),
                      chunk=2000)
    est = run.estimate()
    assert run.pilot_points + run.points == rule.max_points  # the cap was used up
    assert est.half_width > TWO_STAGE_SLACK * rule.target(est.estimate)  # the target was missed
    assert run.reason == BUDGET


def test_hit_or_miss__adaptive__empty_set_never_meets_relative_target():
    rule = StopRule(points=None, relative=0.1, max_points=3000)
    run = hit_or_miss(UniformSampler(make_seed(1), Box(2.0, 2.0, 3.0, 3.0)), disk,
                      Stopper(rule, precision=area_precision(1.0, 0.95)), chunk=1000)
    assert run.hits == (0,) and run.points + run.pilot_points == 3000
    assert run.reason == BUDGET


# --------------------------------------------------------------------------------------------
# Unbiasedness of the two-stage target
# --------------------------------------------------------------------------------------------

STRIP_FILL = 1e-3
STRIP_SEEDS = 1500
STRIP_CHUNK = 4096
STRIP_RELATIVE = 0.2


def strip(x, _y):
    return x < STRIP_FILL


def test_two_stage_target__unbiased_at_low_fill():
    """Hit-or-miss on a strip of known fill p = 0.001 of the unit box, relative target 20%: the
    mean estimate over 1500 seeds lies within 3 standard errors (of that mean) of p (Stein 1945
    two-stage idea; 3-SE band common practice).  Stopping at the first chunk that meets the target
    is biased by about +1% here (see the next test), which this band detects."""
    rule = StopRule(points=None, relative=STRIP_RELATIVE)
    root = make_seed(20240917)
    estimates = np.empty(STRIP_SEEDS)
    for r in range(STRIP_SEEDS):
        run = hit_or_miss(UniformSampler(child_seed(root, r), UNIT), strip,
                          Stopper(rule, precision=area_precision(UNIT.area, 0.95)), chunk=STRIP_CHUNK)
        assert run.reason == TARGET
        estimates[r] = run.hits[0] / run.points
    se = estimates.std(ddof=1) / math.sqrt(STRIP_SEEDS)
    assert abs(estimates.mean() - STRIP_FILL) <= 3 * se, (estimates.mean(), se)


def test_two_stage_target__one_stage_bias_is_detectable():
    """Guard for the test above: the one-stage rule (estimate from the run that stopped at the
    first chunk end meeting the target), simulated here with numpy binomial chunk counts
    (fixed seed, 20 000 runs) and the Wilson interval, is biased by more than the test's band of
    3 standard errors of a 1500-seed mean (measured: bias +0.96% ± 0.07% of p, band 0.78%), so
    the test above would catch that rule about three times in four (normal approximation)."""
    rng = np.random.default_rng(11)
    runs, chunks = 20_000, 200
    hits = np.cumsum(rng.binomial(STRIP_CHUNK, STRIP_FILL, size=(runs, chunks)), axis=1)
    n = STRIP_CHUNK * np.arange(1, chunks + 1)
    low, high = wilson_interval(hits, n[None, :], 0.95)
    met = (high - low) / 2 <= STRIP_RELATIVE * hits / n
    assert met.any(axis=1).all()
    first = np.argmax(met, axis=1)
    one_stage = hits[np.arange(runs), first] / n[first]
    bias = one_stage.mean() - STRIP_FILL
    band = 3 * one_stage.std(ddof=1) / math.sqrt(STRIP_SEEDS)
    assert bias > band, (bias, band)
