"""Confidence intervals for proportions and means.

Each function names its method: the Wilson (1927) score interval for a
binomial proportion, and the normal interval from a sample variance for a
mean (the central limit theorem).  Vectorised where it helps; all values are
plain fractions or the caller's units, nothing here knows about planes.
"""

from __future__ import annotations

import math
from statistics import NormalDist

import numpy as np

from .errors import OptionError

__all__ = ["check_confidence", "z_for", "wilson_interval", "normal_interval"]


def check_confidence(confidence: float) -> float:
    """Return `confidence` as a float if it lies strictly between 0 and 1 (parameter ``confidence``)."""
    try:
        value = float(confidence)
    except (TypeError, ValueError):
        raise OptionError(f"{{param}}: expected a number in (0, 1), got {confidence!r}", param="confidence") from None
    if not 0.0 < value < 1.0:
        raise OptionError(f"{{param}}: must lie strictly between 0 and 1, got {confidence!r}", param="confidence")
    return value


def z_for(confidence: float) -> float:
    """Two-sided standard normal quantile for a confidence level in (0, 1): 1.95996... for 0.95."""
    return NormalDist().inv_cdf(0.5 + check_confidence(confidence) / 2)


def wilson_interval(hits, n, confidence: float = 0.95):
    """Wilson score interval for a binomial proportion.

    ``[p̂ + z²/2n ± z sqrt(p̂(1−p̂)/n + z²/4n²)] / (1 + z²/n)``
    (Wilson 1927, JASA 22:209-212; Newcombe 1998, Statistics in Medicine
    17:857-872, method 3).  Vectorised over `hits` and `n`; returns
    ``(low, high)`` as fractions in [0, 1].

    Examples
    --------
    >>> lo, hi = wilson_interval(81, 263)
    >>> round(float(lo), 4), round(float(hi), 4)
    (0.2553, 0.3662)
    """
    z = z_for(confidence)
    if np.ndim(hits) == 0 and np.ndim(n) == 0:
        return _wilson_scalar(float(hits), float(n), z)
    hits = np.asarray(hits, dtype=float)
    n = np.asarray(n, dtype=float)
    p = hits / n
    z2 = z * z
    centre = p + z2 / (2 * n)
    half = z * np.sqrt(p * (1 - p) / n + z2 / (4 * n * n))
    denom = 1 + z2 / n
    low = np.clip((centre - half) / denom, 0.0, 1.0)
    high = np.clip((centre + half) / denom, 0.0, 1.0)
    low = np.where(hits == 0, 0.0, low)
    high = np.where(hits == n, 1.0, high)
    return low, high


def _wilson_scalar(hits: float, n: float, z: float) -> tuple[float, float]:
    """:func:`wilson_interval` for one count, in plain floats: the same operations in the same order
    (so the same digits), without numpy's cost per call on scalars (about 40 µs)."""
    p = hits / n
    z2 = z * z
    centre = p + z2 / (2 * n)
    half = z * math.sqrt(p * (1 - p) / n + z2 / (4 * n * n))
    denom = 1 + z2 / n
    low = min(max((centre - half) / denom, 0.0), 1.0)
    high = min(max((centre + half) / denom, 0.0), 1.0)
    return (0.0 if hits == 0 else low), (1.0 if hits == n else high)


def normal_interval(estimate: float, std_error: float, confidence: float) -> tuple[float, float]:
    """``estimate ± z std_error``, the normal interval of a mean from its sample variance."""
    z = z_for(confidence)
    return estimate - z * std_error, estimate + z * std_error
