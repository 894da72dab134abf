"""Tests of ``areamc.sequential``: claim checks that stay valid under optional stopping.

References:

* the beta-binomial mixture martingale
  M_n(p) = [B(a + S, b + n − S) / B(a, b)] / [p^S (1 − p)^(n − S)] and its confidence
  sequence {p : M_n(p) < 1/α}, valid at every n at once by Ville's inequality (Howard,
  Ramdas, McAuliffe & Sekhon 2021, Ann. Statist. 49:1055-1080); the beta
  function is taken here from ``scipy.special.betaln``, not from areamc;
* the Wilson score interval (Wilson 1927, JASA 22:209-212), written out here with the normal
  quantile from ``statistics.NormalDist``, as the naive re-checked comparison;
* re-checking a fixed-sample 95% interval after every chunk inflates the error rate: for a
  normal mean, about 19% after 10 equally spaced looks and 37% after 100 (Armitage,
  McPherson & Rowe 1969, J. R. Statist. Soc. A 132:235-244 [memory for the paper and its
  values 0.193 and 0.374]; a numpy simulation of the two-sided z test on a Gaussian random
  walk, 400 000 and 100 000 paths, gives 0.193 and 0.371); a valid procedure's error
  rate, simulated with the true share exactly at the claim, must stay at or below
  α + 3 binomial standard errors (common practice).

All simulations use fixed seeds (numpy PCG64 via ``default_rng``).
"""

from __future__ import annotations

import math
from functools import lru_cache
from statistics import NormalDist

import numpy as np
import pytest
from scipy.special import betaln

from areamc.errors import OptionError
from areamc.sequential import FALLS_SHORT, MEETS, PRIOR, UNDECIDED, check_claim, confidence_sequence, log_mixture, verdict


def log_m(hits: int, n: int, p: float, prior=(0.5, 0.5)) -> float:
    """log M_n(p) written out from Howard et al. (2021) with scipy's betaln."""
    a, b = prior
    return betaln(a + hits, b + n - hits) - betaln(a, b) - (hits * math.log(p) if hits else 0.0) \
        - ((n - hits) * math.log1p(-p) if n - hits else 0.0)


def wilson(hits, n, confidence):
    """Wilson (1927) score interval, vectorised; (low, high) as fractions."""
    z = NormalDist().inv_cdf(0.5 + confidence / 2)
    hits = np.asarray(hits, float)
    n = np.asarray(n, float)
    p = hits / n
    centre = p + z * z / (2 * n)
    half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return (centre - half) / (1 + z * z / n), (centre + half) / (1 + z * z / n)


# --- the formula and the interval ----------------------------------------------------------------


def test_prior_is_jeffreys():
    assert PRIOR == (0.5, 0.5)


@pytest.mark.parametrize("hits, n", [(0, 10), (3, 10), (10, 10), (37, 250), (900, 1000), (4321, 10_000)])
def test_log_mixture__matches_the_published_formula(hits, n):
    ps = np.array([1e-6, 0.01, 0.2, 0.5, 0.8, 0.99, 1 - 1e-6])
    expected = [log_m(hits, n, p) for p in ps]
    np.testing.assert_allclose(log_mixture(hits, n, ps), expected, rtol=1e-10, atol=1e-9)


@pytest.mark.parametrize("confidence", [0.9, 0.95, 0.99])
@pytest.mark.parametrize("hits, n", [(1, 10), (5, 10), (9, 10), (37, 250), (500, 1000), (999, 1000), (4321, 10_000)])
def test_confidence_sequence__bounds_solve_m_equals_one_over_alpha(hits, n, confidence):
    low, high = confidence_sequence(hits, n, confidence)
    level = math.log(1 / (1 - confidence))
    assert 0 < low < hits / n < high < 1
    assert log_m(hits, n, low) == pytest.approx(level, abs=1e-6)
    assert log_m(hits, n, high) == pytest.approx(level, abs=1e-6)
    # just inside the bounds M_n < 1/α, just outside M_n ≥ 1/α
    eps = 1e-6 * (high - low)
    assert log_m(hits, n, low + eps) < level < log_m(hits, n, max(low - eps, 1e-300))
    assert log_m(hits, n, high - eps) < level < log_m(hits, n, min(high + eps, 1 - 1e-16))


def test_confidence_sequence__edges():
    assert confidence_sequence(0, 0, 0.95) == (0.0, 1.0)
    low, high = confidence_sequence(0, 50, 0.95)
    assert low == 0.0 and log_m(0, 50, high) == pytest.approx(math.log(20), abs=1e-6)
    low, high = confidence_sequence(50, 50, 0.95)
    assert high == 1.0 and log_m(50, 50, low) == pytest.approx(math.log(20), abs=1e-6)


@pytest.mark.parametrize("n", [100, 1000, 10_000])
@pytest.mark.parametrize("share", [0.1, 0.5, 0.9])
def test_confidence_sequence__wider_than_wilson_by_about_two(n, share):
    """Time-uniform validity costs width: the sequence holds the fixed-n Wilson interval and is
    about twice as wide: 1.67 at n = 100 to 2.02 at n = 10 000, computed from the mixture
    boundary log M_n(p) = ln 20 (``log_m`` above, scipy betaln, roots by scipy brentq) against
    the Wilson (1927) formula."""
    hits = int(round(share * n))
    low, high = confidence_sequence(hits, n, 0.95)
    wl, wh = wilson(hits, n, 0.95)
    assert low < wl and high > wh
    assert 1.3 < (high - low) / (wh - wl) < 3.0


# --- verdicts ------------------------------------------------------------------------------------


@pytest.mark.parametrize("hits, n, claim", [(95, 100, 0.8), (60, 100, 0.8), (79, 100, 0.8), (850, 1000, 0.8),
                                             (0, 30, 0.1), (30, 30, 0.9)])
def test_verdict__claim_outside_or_inside_the_sequence(hits, n, claim):
    low, high = confidence_sequence(hits, n, 0.95)
    got = verdict(hits, n, claim, 0.95)
    if claim < low:
        assert got == MEETS
    elif claim > high:
        assert got == FALLS_SHORT
    else:
        assert got == UNDECIDED


def test_verdict__cases_on_both_sides():
    assert verdict(95, 100, 0.8, 0.95) == MEETS
    assert verdict(60, 100, 0.8, 0.95) == FALLS_SHORT
    assert verdict(79, 100, 0.8, 0.95) == UNDECIDED
    assert verdict(0, 0, 0.8, 0.95) == UNDECIDED


def test_verdict__claim_of_one():
    """A share of 1 is refuted by a single miss and never proved by sampling."""
    assert verdict(10_000, 10_000, 1.0, 0.95) == UNDECIDED
    assert verdict(9_999, 10_000, 1.0, 0.95) == FALLS_SHORT


@pytest.mark.parametrize("good", [1e-9, 0.5, 1, 1.0, "0.25"])
def test_check_claim__accepts_shares_in_zero_one(good):
    assert check_claim(good) == float(good)


@pytest.mark.parametrize("bad", [0, 0.0, -0.2, 1.5, 1.0000001, float("nan"), "abc", None])
def test_check_claim__refuses_the_rest(bad):
    # library messages name the Python parameter ("claim: ..."), not a command-line flag
    with pytest.raises(OptionError, match=r"^claim: ") as info:
        check_claim(bad)
    assert info.value.param == "claim"
    assert "--claim" not in str(info.value)


# --- error rate under optional stopping ----------------------------------------------------------

BATCH = 50
LOOKS = np.arange(BATCH, 3_000 + 1, BATCH)  # 60 looks, every 50 draws up to 3 000
REPLICATES = 2_000


def running_hits(share: float, seed: int, replicates: int = REPLICATES, looks=LOOKS) -> np.ndarray:
    """Cumulative hits at each look, (replicates, looks), for Bernoulli(share) draws."""
    rng = np.random.default_rng(seed)
    batches = np.diff(np.concatenate([[0], looks]))
    return np.cumsum(rng.binomial(batches, share, size=(replicates, len(looks))), axis=1)


def first_decisions(hits: np.ndarray, looks: np.ndarray, claim: float, confidence: float):
    """Stop at the first look where areamc's verdict is not "undecided": (verdicts, points)."""

    @lru_cache(maxsize=None)
    def decide(h: int, n: int) -> str:
        return verdict(h, n, claim, confidence)

    out, stopped = [], []
    for row in hits:
        result, when = UNDECIDED, None
        for h, n in zip(row, looks):
            result = decide(int(h), int(n))
            if result != UNDECIDED:
                when = int(n)
                break
        out.append(result)
        stopped.append(when)
    return np.array(out), np.array(stopped, dtype=object)


def naive_first_decisions(hits: np.ndarray, looks: np.ndarray, claim: float, confidence: float) -> np.ndarray:
    """The same stopping rule with a fixed-sample Wilson interval re-checked at every look."""
    low, high = wilson(hits, looks[None, :], confidence)
    decision = np.where(low > claim, 1, np.where(high < claim, -1, 0))
    decided = decision != 0
    first = np.argmax(decided, axis=1)
    return np.where(decided.any(axis=1), decision[np.arange(len(hits)), first], 0)


@pytest.mark.parametrize("confidence", [0.95, 0.8])
@pytest.mark.parametrize("claim", [0.8, 0.3])
def test_error_rate_at_the_claim_within_alpha_under_optional_stopping(claim, confidence):
    """True share exactly at the claim, 60 looks: the first verdict is wrong ("meets", and also
    any decision at all, since neither is true) at most α + 3 binomial SEs of the time
    (Ville's inequality, Howard et al. 2021; the 3-SE band is common practice).  The naive
    re-checked Wilson interval, on the same draws, errs far more
    often (this shows the simulation has the power to catch an invalid procedure)."""
    alpha = 1 - confidence
    tolerance = alpha + 3 * math.sqrt(alpha * (1 - alpha) / REPLICATES)
    hits = running_hits(claim, seed=int(claim * 1000) + int(confidence * 100))
    verdicts, _ = first_decisions(hits, LOOKS, claim, confidence)
    false_meets = np.mean(verdicts == MEETS)
    any_decision = np.mean(verdicts != UNDECIDED)
    assert false_meets <= tolerance
    assert any_decision <= tolerance
    naive = naive_first_decisions(hits, LOOKS, claim, confidence)
    assert np.mean(naive == 1) > tolerance  # naive false "meets" (measured 0.15 at α = 0.05)
    assert np.mean(naive != 0) > 2 * tolerance  # naive: any decision (measured 0.32 at α = 0.05)


@pytest.mark.parametrize(
    "share, claim, expected",
    [(0.99, 0.8, MEETS), (0.5, 0.9, FALLS_SHORT), (0.2, 0.5, FALLS_SHORT), (0.97, 0.9, MEETS)],
)
def test_decides_within_a_few_hundred_points_when_far_from_the_claim(share, claim, expected):
    """Far from the claim, log M_n(claim) grows like n·KL(share ‖ claim), so a decision needs
    about (ln 20 + ½ ln n)/KL points: ~40 for 0.99 vs 0.8, ~10 for 0.5 vs 0.9, ~400 for 0.97 vs
    0.9 (a computed estimate, hence the generous limits below)."""
    looks = np.arange(10, 3_000 + 1, 10)
    hits = running_hits(share, seed=17, replicates=300, looks=looks)
    verdicts, stopped = first_decisions(hits, looks, claim, 0.95)
    assert np.all(verdicts == expected)
    limit = 1_500 if (share, claim) == (0.97, 0.9) else 300
    assert max(stopped) <= limit
    assert np.median(stopped.astype(float)) <= limit / 2
