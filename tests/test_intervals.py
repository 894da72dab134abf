"""Tests of ``areamc.intervals``: the Wilson score interval, normal quantiles and normal intervals.

References: Wilson (1927), JASA 22:209-212 (solved here as a quadratic, a different route from
areamc's closed form); Newcombe (1998), Statistics in Medicine 17:857-872, method 3 worked
examples [memory]; scipy.stats (``binomtest(...).proportion_ci(method="wilson")``,
``norm.ppf``, ``norm.interval``) as reference library.
"""

from __future__ import annotations


import numpy as np
import pytest
from scipy import stats

from areamc.errors import OptionError
from areamc.intervals import check_confidence, normal_interval, wilson_interval, z_for
from conftest import wilson_by_quadratic


@pytest.mark.parametrize(
    "hits, n, low, high",
    [
        # Newcombe (1998), Statistics in Medicine 17:857-872, method 3 examples
        # [memory; reproduced by the Wilson 1927 formula, JASA 22:209-212, written out in
        # wilson_by_quadratic above]. Tolerance 5e-5 absolute.
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


@pytest.mark.parametrize("confidence", [0, 1, 1.5, -0.1, float("nan"), "high", None])
def test_wilson_interval__bad_confidence(confidence):
    with pytest.raises(OptionError, match=r"^confidence: ") as info:
        wilson_interval(3, 10, confidence)
    assert info.value.param == "confidence"
    with pytest.raises(OptionError):
        z_for(confidence)


@pytest.mark.parametrize("good", [0.5, 0.95, "0.99", 1e-9])
def test_check_confidence__returns_a_float(good):
    assert check_confidence(good) == float(good) and isinstance(check_confidence(good), float)


@pytest.mark.parametrize("confidence", [0.8, 0.95, 0.999])
def test_normal_interval__scipy_norm_interval(confidence):
    # Reference library: scipy.stats.norm.interval(confidence, loc, scale).
    low, high = normal_interval(1234.5, 6.7, confidence)
    ref_low, ref_high = stats.norm.interval(confidence, loc=1234.5, scale=6.7)
    assert low == pytest.approx(ref_low, rel=1e-12)
    assert high == pytest.approx(ref_high, rel=1e-12)


def test_wilson_interval__one_count_gives_the_same_digits_as_an_array():
    """The scalar path (plain floats, for speed) and the numpy path agree to the last bit, 0 and n included."""
    import numpy as np

    from areamc.intervals import wilson_interval

    rng = np.random.default_rng(2026)
    n = rng.integers(1, 10**8, 3000)
    hits = np.where(rng.random(3000) < 0.1, np.where(rng.random(3000) < 0.5, 0, n), rng.integers(0, n + 1))
    for confidence in (0.9, 0.95, 0.999):
        low, high = wilson_interval(hits, n, confidence)
        for h, m, lo, hi in zip(hits.tolist(), n.tolist(), low.tolist(), high.tolist()):
            assert wilson_interval(h, m, confidence) == (lo, hi)
