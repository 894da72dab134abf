"""Tests of areamc.estimate: Wilson intervals, standard errors, stopping rules and traces."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from areamc.errors import OptionError
from areamc.estimate import AreaEstimate, StopRule, area_target, hit_or_miss, wilson_interval, z_for
from areamc.sampling import Box, UniformSampler, child_seed, make_seed, scale_to_box

# A disk well inside the unit square (REFERENCES.md §5 uses the same set): area pi r^2.
DISK_X, DISK_Y, DISK_R = 0.45, 0.55, 0.35
DISK_AREA = math.pi * DISK_R**2
UNIT = Box(0.0, 0.0, 1.0, 1.0)


def disk(x, y):
    return (x - DISK_X) ** 2 + (y - DISK_Y) ** 2 < DISK_R**2


def run_rule(box, classify, sampler, stop, *, confidence=0.95, **kwargs):
    """Drive hit_or_miss with a StopRule the way areamc.area does (budget + area_target)."""
    return hit_or_miss(
        box, classify, sampler, budget=stop.budget, done=area_target(stop, box.area, confidence), **kwargs
    )


def wilson_by_quadratic(k, n, z):
    """Wilson (1927): the interval is the set of p with (p_hat - p)^2 <= z^2 p (1 - p) / n.

    Solved here as the quadratic (1 + z²/n) p² - (2 p_hat + z²/n) p + p_hat² = 0, a different
    route from the closed form areamc uses.
    """
    p_hat = k / n
    a = 1 + z * z / n
    b = -(2 * p_hat + z * z / n)
    c = p_hat * p_hat
    disc = math.sqrt(b * b - 4 * a * c)
    return (-b - disc) / (2 * a), (-b + disc) / (2 * a)


# --------------------------------------------------------------------------------------------
# Wilson interval
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "hits, n, low, high",
    [
        # Newcombe (1998), Statistics in Medicine 17:857-872, method 3 examples
        # [memory; reproduced by the formula, see REFERENCES.md §4]. Tolerance 5e-5 absolute.
        (81, 263, 0.2553, 0.3662),
        (15, 148, 0.0624, 0.1605),
        (0, 20, 0.0000, 0.1611),
        (1, 29, 0.0061, 0.1718),
    ],
)
def test_wilson_interval__newcombe_1998_examples(hits, n, low, high):
    lo, hi = wilson_interval(hits, n, 0.95)
    assert float(lo) == pytest.approx(low, abs=5e-5)
    assert float(hi) == pytest.approx(high, abs=5e-5)


@pytest.mark.parametrize("confidence", [0.8, 0.9, 0.95, 0.99, 0.999])
@pytest.mark.parametrize("hits, n", [(0, 7), (1, 7), (3, 7), (7, 7), (81, 263), (500, 1000), (2, 10**6)])
def test_wilson_interval__formula_rederived(hits, n, confidence):
    # Wilson (1927), JASA 22:209-212, solved as a quadratic in p; z from scipy.stats.norm.
    z = stats.norm.ppf(0.5 + confidence / 2)
    low, high = wilson_by_quadratic(hits, n, z)
    lo, hi = wilson_interval(hits, n, confidence)
    assert float(lo) == pytest.approx(max(low, 0.0), rel=1e-9, abs=1e-12)
    assert float(hi) == pytest.approx(min(high, 1.0), rel=1e-9, abs=1e-12)


@pytest.mark.parametrize("confidence", [0.9, 0.95, 0.99])
@pytest.mark.parametrize("hits, n", [(0, 50), (1, 50), (17, 50), (50, 50), (123, 4567)])
def test_wilson_interval__scipy_binomtest(hits, n, confidence):
    # Reference library: scipy.stats.binomtest(...).proportion_ci(method="wilson").
    ref = stats.binomtest(hits, n).proportion_ci(confidence_level=confidence, method="wilson")
    lo, hi = wilson_interval(hits, n, confidence)
    assert float(lo) == pytest.approx(ref.low, abs=1e-12)
    assert float(hi) == pytest.approx(ref.high, abs=1e-12)


def test_wilson_interval__vectorised():
    hits = np.array([0, 15, 81, 148])
    n = np.array([20, 148, 263, 148])
    lo, hi = wilson_interval(hits, n, 0.95)
    assert lo.shape == hi.shape == (4,)
    for i in range(4):
        ref = stats.binomtest(int(hits[i]), int(n[i])).proportion_ci(method="wilson")
        assert lo[i] == pytest.approx(ref.low, abs=1e-12)
        assert hi[i] == pytest.approx(ref.high, abs=1e-12)
    assert lo[0] == 0.0 and hi[3] == 1.0


@pytest.mark.parametrize("confidence", [0.9, 0.95, 0.99])
def test_z_for__normal_quantile(confidence):
    # Reference library: scipy.stats.norm.ppf.
    assert z_for(confidence) == pytest.approx(stats.norm.ppf(0.5 + confidence / 2), rel=1e-12)


@pytest.mark.parametrize("confidence", [0, 1, 1.5, -0.1, float("nan"), "high"])
def test_wilson_interval__bad_confidence(confidence):
    with pytest.raises(OptionError):
        wilson_interval(3, 10, confidence)


def test_area_estimate__from_counts():
    # Hit-or-miss estimator B h / n, standard error B sqrt(p(1-p)/n) (binomial variance; fact of
    # the trade), interval = Wilson interval scaled by B (scipy reference).
    est = AreaEstimate.from_counts(81, 263, 2.5e6, 0.95)
    ref = stats.binomtest(81, 263).proportion_ci(method="wilson")
    p = 81 / 263
    assert est.estimate == pytest.approx(2.5e6 * p, rel=1e-15)
    assert est.stderr == pytest.approx(2.5e6 * math.sqrt(p * (1 - p) / 263), rel=1e-15)
    assert est.ci_low == pytest.approx(2.5e6 * ref.low, rel=1e-12)
    assert est.ci_high == pytest.approx(2.5e6 * ref.high, rel=1e-12)
    assert est.half_width == pytest.approx(2.5e6 * (ref.high - ref.low) / 2, rel=1e-12)
    with pytest.raises(ValueError):
        AreaEstimate.from_counts(0, 0, 1.0, 0.95)


# --------------------------------------------------------------------------------------------
# Statistical behaviour (fixed seeds)
# --------------------------------------------------------------------------------------------


def test_hit_or_miss__coverage__wilson_95():
    # Empirical coverage over R = 1000 seeds of the 95% interval at n = 400 points.
    # Band (common practice, REFERENCES.md §4): fail if fewer than binom.ppf(1e-3, R, 0.95) = 927
    # intervals cover; also fail if more than binom.isf(1e-3, R, c) cover, c being the exact
    # coverage of the Wilson interval at this (n, p), summed over the binomial pmf with scipy.
    R, n = 1000, 400
    root = make_seed(20240601)
    covered = 0
    for r in range(R):
        run = hit_or_miss(UNIT, disk, UniformSampler(child_seed(root, r)), budget=n, chunk=n)
        est = run.estimate(0, 0.95)
        covered += est.ci_low <= DISK_AREA <= est.ci_high
    z = stats.norm.ppf(0.975)
    k = np.arange(n + 1)
    bounds = np.array([wilson_by_quadratic(int(i), n, z) for i in k])
    inside = (bounds[:, 0] <= DISK_AREA) & (DISK_AREA <= bounds[:, 1])
    exact_coverage = stats.binom.pmf(k, n, DISK_AREA)[inside].sum()
    assert stats.binom.ppf(1e-3, R, 0.95) == 927
    assert covered >= stats.binom.ppf(1e-3, R, 0.95), covered
    assert covered <= stats.binom.isf(1e-3, R, exact_coverage), covered


def test_hit_or_miss__stderr__inverse_square_root():
    # The Monte Carlo standard error falls as 1/sqrt(n) (central limit theorem; fact of the
    # trade, REFERENCES.md §5 measures RMSE slopes -0.50 to -0.51 for plain random points).
    # R replicates, counts read from the trace at n = 256, 1024, 4096, 16384.
    R, marks = 300, np.array([256, 1024, 4096, 16384])
    root = make_seed(77)
    fractions = np.empty((R, len(marks)))
    for r in range(R):
        run = hit_or_miss(
            UNIT, disk, UniformSampler(child_seed(root, r)), budget=int(marks[-1]), chunk=int(marks[-1]), trace_every=256
        )
        by_n = {t.points: t.hits[0] for t in run.trace}
        fractions[r] = [by_n[int(m)] / m for m in marks]
    rmse = np.sqrt(((fractions - DISK_AREA) ** 2).mean(axis=0))
    slope = np.polyfit(np.log(marks), np.log(rmse), 1)[0]
    assert slope == pytest.approx(-0.5, abs=0.05)
    # The reported standard error matches the spread actually seen (relative SE of an RMSE
    # from R = 300 replicates is about 1/sqrt(2R) = 4%, so 15% is close to 4 SE).
    reported = np.array(
        [
            np.mean([AreaEstimate.from_counts(round(f * m), int(m), 1.0, 0.95).stderr for f in fractions[:, j]])
            for j, m in enumerate(marks)
        ]
    )
    np.testing.assert_allclose(reported / rmse, 1.0, rtol=0.15)


# --------------------------------------------------------------------------------------------
# Stopping rules
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "kwargs",
    [
        {"points": 0},
        {"points": -5},
        {"points": 1.5},
        {"points": "100"},
        {"points": 1000, "absolute": 1.0},
        {"points": 1000, "relative": 0.01},
        {"points": None},
        {"points": None, "absolute": 0.0},
        {"points": None, "absolute": -1.0},
        {"points": None, "relative": float("nan")},
        {"points": None, "relative": float("inf")},
        {"points": None, "relative": 0.01, "max_points": 0},
        {"points": None, "relative": 0.01, "max_points": 2.5},
    ],
)
def test_stop_rule__invalid(kwargs):
    with pytest.raises(OptionError):
        StopRule(**kwargs)


def test_stop_rule__valid():
    fixed = StopRule(points=1234)
    assert fixed.budget == 1234 and not fixed.adaptive
    assert not fixed.met(0.0, 1.0)
    rel = StopRule(points=None, relative=0.01, max_points=5000)
    assert rel.adaptive and rel.budget == 5000
    assert rel.met(0.5, 100.0) and not rel.met(1.5, 100.0) and not rel.met(0.0, 0.0)
    absolute = StopRule(points=None, absolute=2.0)
    assert absolute.met(2.0, 1.0) and not absolute.met(2.01, 1e9)


def _half_width(hits, n, box_area):
    return AreaEstimate.from_counts(hits, n, box_area, 0.95).half_width


@pytest.mark.parametrize(
    "rule",
    [
        StopRule(points=None, relative=0.01, max_points=2_000_000),
        StopRule(points=None, absolute=0.01, max_points=2_000_000),
    ],
    ids=["relative", "absolute"],
)
def test_hit_or_miss__adaptive__stops_at_first_chunk_meeting_target(rule):
    box = Box(0.0, 0.0, 2.0, 1.0)  # area 2, hit share about 0.19
    chunk = 2000
    run = run_rule(box, disk, UniformSampler(make_seed(5)), rule, chunk=chunk, trace_every=chunk)
    est = run.estimate(0, 0.95)
    target = rule.absolute if rule.absolute is not None else rule.relative * est.estimate
    assert run.stopped_early
    assert est.points < rule.max_points and est.points % chunk == 0
    assert est.half_width <= target
    # ...and not one chunk later than needed: at every earlier chunk end the target was missed.
    assert [t.points for t in run.trace] == list(range(chunk, est.points + 1, chunk))
    for t in run.trace[:-1]:
        prev = AreaEstimate.from_counts(t.hits[0], t.points, box.area, 0.95)
        assert not rule.met(prev.half_width, prev.estimate)
    assert run.trace[-1].hits[0] == est.hits
    # The true area (pi r^2) lies in the final interval for this seed.
    assert est.ci_low <= DISK_AREA <= est.ci_high


def test_hit_or_miss__adaptive__cap_reached():
    rule = StopRule(points=None, relative=1e-4, max_points=5000)
    run = run_rule(UNIT, disk, UniformSampler(make_seed(5)), rule, chunk=1024)
    est = run.estimate(0, 0.95)
    assert not run.stopped_early
    assert est.points == 5000
    assert est.half_width > 1e-4 * est.estimate


def test_hit_or_miss__adaptive__empty_set_never_meets_relative_target():
    rule = StopRule(points=None, relative=0.1, max_points=3000)
    run = run_rule(Box(2.0, 2.0, 3.0, 3.0), disk, UniformSampler(make_seed(1)), rule, chunk=1000)
    assert run.hits == (0,) and run.points == 3000
    assert not run.stopped_early


# --------------------------------------------------------------------------------------------
# Trace, chunking and several columns
# --------------------------------------------------------------------------------------------


def _direct_hits(seed, n, classify, box):
    u = UniformSampler(make_seed(seed)).random(n)
    return classify(*scale_to_box(u, box))


@pytest.mark.parametrize("chunk", [1, 333, 700, 4096, 65536])
def test_hit_or_miss__trace__every_k_points_independent_of_chunk(chunk):
    K, n, seed = 700, 5000, 11
    run = hit_or_miss(UNIT, disk, UniformSampler(make_seed(seed)), budget=n, chunk=chunk, trace_every=K)
    cumulative = np.cumsum(_direct_hits(seed, n, disk, UNIT))
    # every K points, plus the final state since 5000 is not a multiple of 700
    marks = list(range(K, n + 1, K)) + [n]
    assert [t.points for t in run.trace] == marks
    assert [t.hits[0] for t in run.trace] == [int(cumulative[m - 1]) for m in marks]
    assert run.hits == (int(cumulative[-1]),)
    assert run.points == n and not run.stopped_early


def test_hit_or_miss__several_columns():
    def two(x, y):
        return np.column_stack([disk(x, y), x < 0.25])

    n, seed = 10_000, 3
    run = hit_or_miss(UNIT, two, UniformSampler(make_seed(seed)), budget=n, chunk=4096)
    u = UniformSampler(make_seed(seed)).random(n)
    assert run.hits == (int(disk(u[:, 0], u[:, 1]).sum()), int((u[:, 0] < 0.25).sum()))
    assert run.estimate(1, 0.95).estimate == pytest.approx(run.hits[1] / n, rel=1e-15)


@pytest.mark.parametrize("kwargs", [{"chunk": 0}, {"chunk": -1}, {"trace_every": 0}, {"trace_every": -3}])
def test_hit_or_miss__invalid_options(kwargs):
    with pytest.raises(OptionError):
        hit_or_miss(UNIT, disk, UniformSampler(make_seed(1)), budget=10, **kwargs)


def test_area_target__fixed_count_has_no_test():
    assert area_target(StopRule(points=100), 1.0, 0.95) is None
    done = area_target(StopRule(points=None, relative=0.1), 1.0, 0.95)
    # Wilson half-width at 500/1000 is about 0.031 (scipy reference) <= 0.1 * 0.5; at 5/10 it is not.
    # done(sums, sums of squares, points); for hit counts the squares equal the sums
    assert done(np.array([500]), np.array([500]), 1000) and not done(np.array([5]), np.array([5]), 10)
    assert not done(np.array([500, 0]), np.array([500, 0]), 1000)  # every column must meet the target
