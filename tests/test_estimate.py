"""Tests of ``areamc.estimate``: the estimate records and the precision measures of stop rules.

References: the hit-or-miss estimator B h / n with binomial standard error B sqrt(p̂(1 − p̂)/n)
(common practice); the Wilson (1927, JASA 22:209-212) interval from
``scipy.stats.binomtest(...).proportion_ci(method="wilson")``; the sample mean with the
standard error s/sqrt(n) (s with n − 1 degrees of freedom, ``scipy.stats.sem``) and the
normal interval ``scipy.stats.norm.interval`` (central limit theorem, common practice); the
two-sided mid-p binomial tail (Lancaster 1961, JASA 56:223-234 [memory]) from
``scipy.stats.binom``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from areamc.estimate import AreaEstimate, TotalEstimate, area_precision, mean_estimate, share_precision
from conftest import mid_p_z


def test_area_estimate__from_counts():
    # Hit-or-miss estimator B h / n, standard error B sqrt(p(1-p)/n) (binomial variance; common
    # practice), interval = Wilson interval scaled by B (scipy reference).
    est = AreaEstimate.from_counts(81, 263, 2.5e6, 0.95)
    ref = stats.binomtest(81, 263).proportion_ci(method="wilson")
    p = 81 / 263
    assert est.estimate == pytest.approx(2.5e6 * p, rel=1e-15)
    assert est.std_error == pytest.approx(2.5e6 * math.sqrt(p * (1 - p) / 263), rel=1e-15)
    assert est.ci_low == pytest.approx(2.5e6 * ref.low, rel=1e-12)
    assert est.ci_high == pytest.approx(2.5e6 * ref.high, rel=1e-12)
    assert est.half_width == pytest.approx(2.5e6 * (ref.high - ref.low) / 2, rel=1e-12)
    assert est.fraction == 81 / 263 and est.points == 263 and est.hits == 81
    assert est.to_dict()["box_area"] == 2.5e6
    with pytest.raises(ValueError):
        AreaEstimate.from_counts(0, 0, 1.0, 0.95)


@pytest.mark.parametrize("hits, n, exact", [(81, 263, 0.8e6), (81, 263, 0.4e6), (0, 5000, 30.0), (2, 10**5, 0.5)])
def test_area_estimate__deviation_is_the_mid_p_score_at_exact_over_box(hits, n, exact):
    # z of a hit-or-miss row: the binomial law at p0 = exact / box (Lancaster 1961 mid-p).
    box = 2.5e6 if exact > 1 else 1.0
    est = AreaEstimate.from_counts(hits, n, box, 0.95)
    assert est.deviation(exact) == pytest.approx(mid_p_z(hits, n, exact / box), rel=1e-9)


def test_mean_estimate__sample_mean_and_standard_error():
    # Reference: numpy mean, scipy.stats.sem (ddof = 1) and scipy.stats.norm.interval.
    rng = np.random.default_rng(5)
    scores = rng.gamma(2.0, 3.0, 5000)
    scale = 1.7e4
    est = mean_estimate(scores.sum(), (scores**2).sum(), len(scores), scale, 0.9)
    assert isinstance(est, TotalEstimate)
    assert est.estimate == pytest.approx(scale * scores.mean(), rel=1e-12)
    assert est.std_error == pytest.approx(scale * stats.sem(scores), rel=1e-9)
    low, high = stats.norm.interval(0.9, loc=scale * scores.mean(), scale=scale * stats.sem(scores))
    assert (est.ci_low, est.ci_high) == (pytest.approx(low, rel=1e-9), pytest.approx(high, rel=1e-9))
    assert est.half_width == pytest.approx((high - low) / 2, rel=1e-9)
    assert est.points == 5000 and est.confidence == 0.9
    with pytest.raises(ValueError):
        mean_estimate(1.0, 1.0, 1, 1.0, 0.95)


def test_mean_estimate__constant_scores_have_zero_stderr():
    est = mean_estimate(30.0, 90.0, 10, 2.0, 0.95)  # ten scores of 3
    assert est.estimate == 6.0 and est.std_error == 0.0 and est.ci_low == est.ci_high == 6.0


def test_total_estimate__deviation_is_difference_over_stderr():
    # (estimate − exact) / std_error, std_error floored at the half-width over z (scipy norm.ppf).
    est = TotalEstimate(estimate=105.0, std_error=2.0, ci_low=102.0, ci_high=108.0, points=1000, confidence=0.95)
    assert est.deviation(100.0) == pytest.approx(2.5, rel=1e-12)
    floored = TotalEstimate(estimate=105.0, std_error=0.0, ci_low=104.0, ci_high=106.0, points=1000, confidence=0.95)
    assert floored.deviation(100.0) == pytest.approx(5.0 / (1.0 / stats.norm.ppf(0.975)), rel=1e-12)


@pytest.mark.parametrize("hits, points", [([81], 263), ([0, 40, 263], 263), ([5000], 10**5)])
def test_area_precision__wilson_half_width_per_column(hits, points):
    # Each column: (Wilson half-width, estimate), both scaled by the box (scipy reference).
    box = 3.0e6
    got = area_precision(box, 0.99)(np.array(hits), np.array(hits), points)
    assert len(got) == len(hits)
    for (hw, est), h in zip(got, hits):
        ref = stats.binomtest(h, points).proportion_ci(confidence_level=0.99, method="wilson")
        assert hw == pytest.approx(box * (ref.high - ref.low) / 2, rel=1e-12)
        assert est == pytest.approx(box * h / points, rel=1e-15)


def test_share_precision__shares_of_the_points_in_the_region():
    # Column 0 counts the points in the region; each share is hits / in-region points with its
    # Wilson half-width (scipy reference), whatever the total number of points.
    sums = np.array([400, 100, 399])
    got = share_precision(0.95)(sums, sums, 10_000)
    assert len(got) == 2
    for (hw, share), h in zip(got, (100, 399)):
        ref = stats.binomtest(h, 400).proportion_ci(method="wilson")
        assert hw == pytest.approx((ref.high - ref.low) / 2, rel=1e-12)
        assert share == h / 400
    # no point in the region yet: infinite half-widths
    assert share_precision(0.95)(np.array([0, 0, 0]), np.array([0, 0, 0]), 500) == [(math.inf, 0.0)] * 2
