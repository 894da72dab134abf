"""Tests of ``areamc.checks``: deviations from exact references and when a row is flagged.

References:

* the two-sided mid-p binomial tail (Lancaster 1961, JASA 56:223-234 [memory]):
  P = min(1, 2 min(P(X < h) + ½P(X = h), P(X > h) + ½P(X = h))), X ~ Binomial(n, p0), reported
  as the normal score with the same two-sided tail; computed here in exact rational arithmetic
  (``math.comb``, ``fractions.Fraction``) with the quantile from ``statistics.NormalDist``;
* the promised false-flag rate 2(1 − Φ(4)) = erfc(4/√2) = 6.334e-5 (standard normal tail;
  common practice), from ``math.erfc``;
* the false-flag rate of a rule, summed over the exact binomial law with
  ``scipy.stats.binom.pmf`` over every count 0..n;
* the normal interval's quantile from ``scipy.stats.norm.ppf``.
"""

from __future__ import annotations

import math
from fractions import Fraction
from statistics import NormalDist

import numpy as np
import pytest
from scipy import stats

from areamc.checks import FLAG_P, FLAG_Z, binomial_deviation, deviation_scale, flagged, normal_deviation

#: (fill, points) at which the false-flag rate is held to FLAG_P.
RATE_CASES = [(0.5, 100_000), (1e-3, 20_000), (1e-3, 100_000), (1e-4, 100_000)]


def mid_p_scores(n: int, p0: float) -> tuple[np.ndarray, np.ndarray]:
    """|z| for every count 0..n, and whether its sign is fixed (count off the mean n p0).

    Exact arithmetic on the law at the float p0 (the law the library is asked about):
    pmf(h) = C(n, h) p0^h (1 − p0)^(n − h) as Fractions, the two mid-p tails, then
    |z| = −Φ⁻¹(P/2) (statistics.NormalDist), infinite when P = 0.
    """
    p = Fraction(p0)
    pmf = [math.comb(n, h) * p**h * (1 - p) ** (n - h) for h in range(n + 1)]
    below = Fraction(0)
    magnitude, off_mean = [], []
    total = sum(pmf)
    assert total == 1
    for h in range(n + 1):
        low = below + pmf[h] / 2
        high = (1 - below - pmf[h]) + pmf[h] / 2
        two_sided = min(Fraction(1), 2 * min(low, high))
        if two_sided == 0:
            magnitude.append(math.inf)
        elif two_sided == 1:
            magnitude.append(0.0)
        else:
            magnitude.append(-NormalDist().inv_cdf(float(two_sided) / 2))
        # at (or within rounding of) the mean the sign is a convention; checked only off it
        off_mean.append(abs(h - n * p) > Fraction(1, 10**9))
        below += pmf[h]
    return np.array(magnitude), np.array(off_mean)


@pytest.mark.parametrize("p0", [0.5, 0.25, 0.1, 1 / 3, 0.9, 0.03, 0.0, 1.0])
@pytest.mark.parametrize("n", [1, 2, 5, 10, 17, 30, 60])
def test_binomial_deviation__exact_mid_p_for_small_n(n, p0):
    magnitude, off_mean = mid_p_scores(n, p0)
    hits = np.arange(n + 1)
    z = binomial_deviation(hits, n, p0)
    assert z.shape == (n + 1,)
    finite = np.isfinite(magnitude)
    np.testing.assert_allclose(np.abs(z[finite]), magnitude[finite], rtol=1e-8, atol=1e-10)
    assert np.all(np.isinf(z[~finite]))
    # sign: positive above the mean n p0, negative below
    sign = np.where(hits > n * p0, 1.0, -1.0)
    checked = off_mean & (magnitude > 0)
    np.testing.assert_array_equal(np.sign(z[checked]), sign[checked])


def test_binomial_deviation__scalars_and_edges():
    assert isinstance(binomial_deviation(3, 10, 0.5), float)
    assert binomial_deviation(50, 100, 0.5) == 0.0  # the symmetric mode: P = 1
    assert binomial_deviation(99, 100, 1.0) == -math.inf  # a miss is impossible at p0 = 1
    assert binomial_deviation(1, 100, 0.0) == math.inf
    assert binomial_deviation(0, 100, 0.0) == 0.0 and binomial_deviation(100, 100, 1.0) == 0.0
    # p0 is clipped to [0, 1]
    assert binomial_deviation(1, 100, -1e-12) == math.inf


def test_flag_p__is_the_two_sided_normal_tail_beyond_flag_z():
    # 2 (1 − Φ(4)) = erfc(4 / √2) (standard normal identity; common practice) = 6.334e-5.
    assert FLAG_Z == 4.0
    assert FLAG_P == pytest.approx(math.erfc(FLAG_Z / math.sqrt(2)), rel=1e-12)
    assert FLAG_P == pytest.approx(6.334e-5, rel=1e-3)


def flag_rate(flag_of_counts, fill: float, n: int) -> float:
    """P(flag) under X ~ Binomial(n, fill): the pmf (scipy.stats.binom) summed over flagged counts."""
    k = np.arange(n + 1)
    return float(stats.binom.pmf(k, n, fill)[flag_of_counts(k, n, fill)].sum())


@pytest.mark.parametrize("fill, n", RATE_CASES)
def test_binomial_deviation__false_flag_rate_near_flag_p(fill, n):
    # A row whose estimate is exactly as likely as the binomial law says is flagged with
    # probability within a factor 2 of FLAG_P (exact sum over all counts, scipy.stats.binom).
    rate = flag_rate(lambda k, n, p: np.abs(binomial_deviation(k, n, p)) > FLAG_Z, fill, n)
    assert FLAG_P / 2 <= rate <= 2 * FLAG_P, rate / FLAG_P


def old_rule(k, n, p):
    """The replaced rule: |p̂ − p0| / sqrt(p̂ (1 − p̂) / n) > 4, the standard error taken at the estimate."""
    p_hat = k / n
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.abs(p_hat - p) / np.sqrt(p_hat * (1 - p_hat) / n)
    return z > FLAG_Z


def test_old_rule__over_flags_at_low_fill():
    # Regression of the old bug (the reason for the change): at fill 1e-4 with 100 000 points the
    # old rule flags more than 10 x FLAG_P of correct rows (exact binomial sum, scipy), while
    # binomial_deviation stays within a factor 2.
    old = flag_rate(old_rule, 1e-4, 100_000)
    new = flag_rate(lambda k, n, p: np.abs(binomial_deviation(k, n, p)) > FLAG_Z, 1e-4, 100_000)
    assert old > 10 * FLAG_P, old / FLAG_P
    assert new < 2 * FLAG_P
    # not only the no-hit count (whose standard error is 0): the low side of the law too
    without_zero = flag_rate(lambda k, n, p: old_rule(k, n, p) & (k > 0), 1e-4, 100_000)
    assert without_zero > 10 * FLAG_P
    # as areamc applied it before, the standard error floored at the 95% Wilson half-width over z
    # (the Wilson 1927 interval, written out in old_rule_floored): still > 10 x
    floored = flag_rate(old_rule_floored, 1e-4, 100_000)
    assert floored > 10 * FLAG_P, floored / FLAG_P


def old_rule_floored(k, n, p):
    """The replaced rule with its floor: |p̂ − p0| / max(sqrt(p̂(1 − p̂)/n), Wilson half-width / z) > 4."""
    z = stats.norm.ppf(0.975)
    p_hat = k / n
    centre = (p_hat + z * z / (2 * n)) / (1 + z * z / n)
    half = z * np.sqrt(p_hat * (1 - p_hat) / n + z * z / (4 * n * n)) / (1 + z * z / n)
    # Wilson (1927): centre ± half, clipped to [0, 1]
    low, high = np.clip(centre - half, 0, 1), np.clip(centre + half, 0, 1)
    scale = np.maximum(np.sqrt(p_hat * (1 - p_hat) / n), (high - low) / 2 / z)
    return np.abs(p_hat - p) / scale > FLAG_Z


def test_deviation_scale__stderr_floored_at_half_width_over_z():
    z = stats.norm.ppf(0.975)
    assert deviation_scale(3.0, 90.0, 110.0, 0.95) == pytest.approx(max(3.0, 10.0 / z), rel=1e-12)
    assert deviation_scale(7.0, 90.0, 110.0, 0.95) == 7.0
    assert deviation_scale(0.0, 0.0, 2.0, 0.99) == pytest.approx(1.0 / stats.norm.ppf(0.995), rel=1e-12)


def test_normal_deviation__difference_over_scale():
    assert normal_deviation(105.0, 100.0, 2.0) == 2.5
    assert normal_deviation(95.0, 100.0, 2.0) == -2.5
    assert normal_deviation(100.0, 100.0 * (1 + 1e-12), 0.0) == 0.0  # agree to 1e-9 relative
    assert normal_deviation(101.0, 100.0, 0.0) == math.inf
    assert normal_deviation(99.0, 100.0, 0.0) == -math.inf


@pytest.mark.parametrize("z, expected", [(None, False), (math.nan, False), (0.0, False), (4.0, False),
                                         (-4.0, False), (4.0001, True), (-4.5, True), (math.inf, True)])
def test_flagged__beyond_flag_z(z, expected):
    assert flagged(z) is expected
