"""Tests of ``areamc.engine``: the chunk loop, hit-or-miss counts, traces, and their statistics.

References:

* a disk of radius r has area π r² (the set thrown at below);
* coverage of the Wilson (1927, JASA 22:209-212) 95% interval, held to a binomial band over
  replicates (``scipy.stats.binom``; common practice), with the exact coverage at (n, p)
  summed over the binomial pmf;
* the Monte Carlo standard error falls as 1/sqrt(n) (central limit theorem; common practice);
* sums over a stream computed with numpy directly on the same points.

Statistical tests use fixed seeds.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from areamc.engine import DEFAULT_CHUNK, HitOrMissRun, Sums, TracePoint, accumulate, hit_or_miss
from areamc.errors import OptionError
from areamc.estimate import AreaEstimate
from areamc.samplers import Box, UniformSampler
from areamc.seeds import child_seed, make_seed
from areamc.stopping import BUDGET, StopRule, Stopper
from conftest import wilson_by_quadratic

# A disk well inside the unit square (the set of the RMSE-slope check below): area pi r^2.
DISK_X, DISK_Y, DISK_R = 0.45, 0.55, 0.35
DISK_AREA = math.pi * DISK_R**2
UNIT = Box(0.0, 0.0, 1.0, 1.0)


def disk(x, y):
    return (x - DISK_X) ** 2 + (y - DISK_Y) ** 2 < DISK_R**2


def fixed(n: int) -> Stopper:
    return Stopper(StopRule(points=n))


# --------------------------------------------------------------------------------------------
# Statistical behaviour (fixed seeds)
# --------------------------------------------------------------------------------------------


def test_hit_or_miss__coverage__wilson_95():
    # Empirical coverage over R = 1000 seeds of the 95% interval at n = 400 points.
    # Binomial band (common practice): fail if fewer than binom.ppf(1e-3, R, 0.95) = 927
    # intervals cover; also fail if more than binom.isf(1e-3, R, c) cover, c being the exact
    # coverage of the Wilson interval at this (n, p), summed over the binomial pmf with scipy.
    R, n = 1000, 400
    root = make_seed(20240601)
    covered = 0
    for r in range(R):
        run = hit_or_miss(UniformSampler(child_seed(root, r), UNIT), disk, fixed(n), chunk=n)
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
    # The Monte Carlo standard error falls as 1/sqrt(n) (central limit theorem): the RMSE of
    # plain random points has slope -1/2 against n on log-log axes (common practice).
    # R replicates, counts read from the trace at n = 256, 1024, 4096, 16384.
    R, marks = 300, np.array([256, 1024, 4096, 16384])
    root = make_seed(77)
    fractions = np.empty((R, len(marks)))
    for r in range(R):
        run = hit_or_miss(
            UniformSampler(child_seed(root, r), UNIT), disk, fixed(int(marks[-1])), chunk=int(marks[-1]), trace_every=256
        )
        by_n = {t.points: t.sums[0] for t in run.trace}
        fractions[r] = [by_n[int(m)] / m for m in marks]
    rmse = np.sqrt(((fractions - DISK_AREA) ** 2).mean(axis=0))
    slope = np.polyfit(np.log(marks), np.log(rmse), 1)[0]
    assert slope == pytest.approx(-0.5, abs=0.05)
    # The reported standard error matches the spread actually seen (relative SE of an RMSE
    # from R = 300 replicates is about 1/sqrt(2R) = 4%, so 15% is close to 4 SE).
    reported = np.array(
        [
            np.mean([AreaEstimate.from_counts(round(f * m), int(m), 1.0, 0.95).std_error for f in fractions[:, j]])
            for j, m in enumerate(marks)
        ]
    )
    np.testing.assert_allclose(reported / rmse, 1.0, rtol=0.15)


# --------------------------------------------------------------------------------------------
# Trace, chunking and several columns
# --------------------------------------------------------------------------------------------


def _direct_hits(seed, n, classify, box):
    x, y = UniformSampler(make_seed(seed), box).random(n)
    return classify(x, y)


@pytest.mark.parametrize("chunk", [1, 333, 700, 4096, 65536])
def test_hit_or_miss__trace__every_k_points_independent_of_chunk(chunk):
    K, n, seed = 700, 5000, 11
    run = hit_or_miss(UniformSampler(make_seed(seed), UNIT), disk, fixed(n), chunk=chunk, trace_every=K)
    cumulative = np.cumsum(_direct_hits(seed, n, disk, UNIT))
    # every K points, plus the final state since 5000 is not a multiple of 700
    marks = list(range(K, n + 1, K)) + [n]
    assert [t.points for t in run.trace] == marks
    assert all(isinstance(t, TracePoint) for t in run.trace)
    assert [t.sums[0] for t in run.trace] == [int(cumulative[m - 1]) for m in marks]
    assert run.hits == (int(cumulative[-1]),)
    assert run.points == n and run.reason == BUDGET and run.pilot_points == 0
    assert run.box_area == UNIT.area


def test_hit_or_miss__several_columns():
    def two(x, y):
        return np.column_stack([disk(x, y), x < 0.25])

    n, seed = 10_000, 3
    run = hit_or_miss(UniformSampler(make_seed(seed), UNIT), two, fixed(n), chunk=4096)
    assert isinstance(run, HitOrMissRun)
    x, y = UniformSampler(make_seed(seed), UNIT).random(n)
    assert run.hits == (int(disk(x, y).sum()), int((x < 0.25).sum()))
    assert run.estimate(1, 0.95).estimate == pytest.approx(run.hits[1] / n, rel=1e-15)


def test_hit_or_miss__box_area_scales_the_estimate():
    box = Box(10.0, 20.0, 13.0, 22.0)  # area 6
    n = 20_000
    run = hit_or_miss(UniformSampler(make_seed(8), box), lambda x, y: x < 11.0, fixed(n), chunk=3000)
    x, _ = UniformSampler(make_seed(8), box).random(n)
    est = run.estimate()
    assert est.hits == int((x < 11.0).sum()) and est.box_area == 6.0
    assert est.estimate == pytest.approx(6.0 * est.hits / n, rel=1e-15)


@pytest.mark.parametrize(
    "kwargs, param",
    [({"chunk": 0}, "chunk"), ({"chunk": -1}, "chunk"), ({"chunk": 2.5}, "chunk"),
     ({"trace_every": 0}, "trace_every"), ({"trace_every": -3}, "trace_every")],
)
def test_hit_or_miss__invalid_options(kwargs, param):
    with pytest.raises(OptionError, match=rf"^{param}: must be a positive whole number") as info:
        hit_or_miss(UniformSampler(make_seed(1), UNIT), disk, fixed(10), **kwargs)
    assert info.value.param == param


# --------------------------------------------------------------------------------------------
# accumulate: real-valued scores, sums of squares, progress
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("chunk", [1000, 4097, DEFAULT_CHUNK])
def test_accumulate__float_scores_sums_and_squares_match_numpy(chunk):
    n = 30_000

    def score(x, y):
        return np.column_stack([np.exp(-x), x * y])

    seen = []
    run = accumulate(UniformSampler(make_seed(21), UNIT).random, score, fixed(n), chunk=chunk,
                     progress=lambda drawn, points, sums, _sq: seen.append((drawn, points, sums.copy())))
    assert isinstance(run, Sums)
    x, y = UniformSampler(make_seed(21), UNIT).random(n)
    ref = score(x, y)
    np.testing.assert_allclose(run.sums, ref.sum(axis=0), rtol=1e-12)
    np.testing.assert_allclose(run.sumsq, (ref**2).sum(axis=0), rtol=1e-12)
    assert run.points == run.drawn == n and run.pilot_points == 0 and run.reason == BUDGET
    # progress after every chunk: points drawn so far, and the running sums
    ends = list(range(chunk, n, chunk)) + [n]
    assert [s[0] for s in seen] == [s[1] for s in seen] == ends
    for drawn, _, sums in seen:
        np.testing.assert_allclose(sums, ref[:drawn].sum(axis=0), rtol=1e-12)


def test_accumulate__one_column_scores_and_integer_sums():
    run = accumulate(UniformSampler(make_seed(2), UNIT).random, lambda x, y: x < 0.5, fixed(5000), chunk=999)
    x, _ = UniformSampler(make_seed(2), UNIT).random(5000)
    assert run.sums.dtype == np.int64 and run.sums.tolist() == [int((x < 0.5).sum())]
    assert run.sumsq.tolist() == run.sums.tolist()  # 0/1 scores: squares equal the scores


@pytest.mark.parametrize("total", [100_003, 4096, 4095, 1])
def test_accumulate__float_scores__same_digits_for_every_chunk_and_close_to_fsum(total):
    """Real-valued sums depend only on the points, not on the chunk size (the brief: results for a seed
    do not depend on --chunk), and agree with math.fsum's correctly rounded sum (Shewchuk 1997's exact
    summation, in Python's standard library) to 1e-12 relative."""
    import math

    from areamc.stopping import StopRule, Stopper

    values = np.random.default_rng(11).random((total, 2)) * np.array([1e-3, 7.0])

    def draw_from_zero():
        at = {"i": 0}

        def draw(n):
            i = at["i"]
            at["i"] += n
            return values[i:i + n, 0], values[i:i + n, 1]

        return draw

    runs = [accumulate(draw_from_zero(), lambda x, y: np.column_stack([x * y, y]),
                       Stopper(StopRule(points=total)), chunk=chunk)
            for chunk in (65536, 1000, 777, 4096, 13, total)]
    first = runs[0]
    for run in runs[1:]:
        assert run.sums.tolist() == first.sums.tolist()
        assert run.sumsq.tolist() == first.sumsq.tolist()
    products = values[:, 0] * values[:, 1]
    assert first.sums[0] == pytest.approx(math.fsum(products.tolist()), rel=1e-12)
    assert first.sumsq[1] == pytest.approx(math.fsum((values[:, 1] ** 2).tolist()), rel=1e-12)
