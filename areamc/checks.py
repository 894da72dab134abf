"""Deviations of estimates from exact references, and when a row is flagged.

A row is flagged when its estimate and the exact value disagree beyond
chance: a deviation of more than :data:`FLAG_Z` standard normal units, which
for a normal statistic happens with probability :data:`FLAG_P` = 6.3e-5.

* **Hit-or-miss estimates** (areas, overlaps, shares, importance-sampled
  totals) are binomial counts: with ``hits`` of ``n`` points and the exact
  hit probability ``p0`` (exact value over the sampling scale), the
  deviation comes from the two-sided mid-p binomial tail (Lancaster 1961,
  JASA 56:223-234) ``P = min(1, 2 min(P(X < h) + ½P(X = h), P(X > h) + ½P(X = h)))``
  for ``X ~ Binomial(n, p0)`` and ``h = hits``, reported as the signed normal
  score with the same tail, ``z = ±Φ⁻¹(1 − P/2)``, positive when ``h ≥ n p0``.  Summed
  over the binomial law, its false-flag rate stays within a factor 1.5 of
  :data:`FLAG_P` from fills of 1e-4 to 0.5 (below when the expected count
  is small, as discreteness forces); dividing by the standard error at the
  estimate inflated it 44-fold at fill 1e-4 (docs/methods.md has the table).
* **Mean estimates** (uniform sampling of a density) have no exact law: the
  deviation is the difference over the sample standard error, floored at
  the interval half-width over z (:func:`deviation_scale`).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from .intervals import z_for

__all__ = ["FLAG_Z", "FLAG_P", "binomial_deviation", "normal_deviation", "t_deviation", "deviation_scale", "flagged"]

#: Rows whose deviation exceeds this many standard normal units are flagged.
FLAG_Z = 4.0
#: Two-sided normal tail beyond FLAG_Z: the promised false-flag rate, 2 (1 − Φ(4)) = 6.33e-5.
FLAG_P = float(2 * stats.norm.sf(FLAG_Z))


def binomial_deviation(hits, n, p0):
    """Signed normal score of the two-sided mid-p binomial tail of `hits` in `n` at probability `p0`.

    Vectorised over all three arguments.  ``p0`` is clipped to [0, 1]; a
    count impossible under ``p0`` (a miss when ``p0 = 1``) gives ±inf, and
    a count at the mode of a degenerate law gives 0.

    Examples
    --------
    >>> round(float(binomial_deviation(50, 100, 0.5)), 6)
    0.0
    >>> float(binomial_deviation(99, 100, 1.0))
    -inf
    """
    hits = np.asarray(hits, float)
    n = np.asarray(n, float)
    p0 = np.clip(np.asarray(p0, float), 0.0, 1.0)
    half_mass = 0.5 * stats.binom.pmf(hits, n, p0)
    low_tail = stats.binom.cdf(hits - 1, n, p0) + half_mass
    high_tail = stats.binom.sf(hits, n, p0) + half_mass
    p_two = np.minimum(1.0, 2 * np.minimum(low_tail, high_tail))
    score = stats.norm.isf(p_two / 2)
    z = np.where(hits >= n * p0, score, -score)  # a count at n p0 exactly counts on the upper side
    return z if z.ndim else float(z)


def deviation_scale(std_error: float, low: float, high: float, confidence: float) -> float:
    """Scale for a normal deviation: the standard error, floored at the interval half-width over z.

    The floor keeps rows whose standard error is 0 (all points scored the
    same) from being flagged while the exact value lies in their interval.
    """
    return max(std_error, (high - low) / 2 / z_for(confidence))


def normal_deviation(estimate: float, exact: float, scale: float) -> float:
    """Estimate minus exact value, in units of `scale` (a standard error).

    When the scale is zero the deviation is 0 if the two agree to 1e-9
    relative, and infinite otherwise.
    """
    diff = estimate - exact
    if scale > 0:
        return diff / scale
    if abs(diff) <= 1e-9 * max(abs(exact), abs(estimate), 1.0):
        return 0.0
    return math.copysign(math.inf, diff)


def t_deviation(t: float, df: int) -> float:
    """The normal score with the same two-sided tail as a Student-t statistic `t` with `df` degrees of freedom.

    Replicate estimates (a few dozen scramblings or rounds) have t tails;
    comparing their t statistic with :data:`FLAG_Z` directly would flag 20
    times too often at 15 degrees of freedom.

    Examples
    --------
    >>> round(t_deviation(2.131449545559323, 15), 4)  # t(0.975, 15) -> z(0.975)
    1.96
    """
    if not math.isfinite(t):
        return t
    return float(math.copysign(stats.norm.isf(stats.t.sf(abs(t), df)), t))


def flagged(z: float | None) -> bool:
    """True when a deviation is beyond :data:`FLAG_Z` (None, for no check, is never flagged)."""
    return z is not None and not math.isnan(z) and abs(z) > FLAG_Z
