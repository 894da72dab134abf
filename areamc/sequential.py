"""Claim checks that stay valid when sampling stops as soon as the answer is clear.

A time-uniform confidence sequence for a binomial proportion from the
beta-binomial mixture martingale (Howard, Ramdas, McAuliffe & Sekhon 2021,
"Time-uniform, nonparametric, nonasymptotic confidence sequences", Ann.
Statist. 49:1055-1080, §3; Robbins 1970 for the mixture idea).  For a prior
Beta(a, b) and S hits in n points,

    M_n(p) = [B(a + S, b + n − S) / B(a, b)] / [p^S (1 − p)^(n − S)]

is a nonnegative martingale with mean 1 under the true p, so by Ville's
inequality P(sup_n M_n(p) ≥ 1/α) ≤ α.  The set {p : M_n(p) < 1/α} therefore
covers the true share at every n simultaneously with probability ≥ 1 − α,
and any stopping rule, including "stop when the claim is decided", keeps
that guarantee.  A fixed-sample interval re-checked after every chunk does
not (its error rate grows with the number of looks).
"""

from __future__ import annotations

import math

import numpy as np

from .errors import OptionError

__all__ = [
    "MEETS",
    "FALLS_SHORT",
    "UNDECIDED",
    "log_mixture",
    "confidence_sequence",
    "verdict",
    "check_claim",
    "claim_decided",
]

MEETS = "meets"
FALLS_SHORT = "falls-short"
UNDECIDED = "undecided"

#: Jeffreys prior Beta(1/2, 1/2) for the mixture: fixed before any data, as validity requires.
PRIOR = (0.5, 0.5)


def check_claim(claim: float) -> float:
    """Return `claim` if it lies in (0, 1]."""
    try:
        value = float(claim)
    except (TypeError, ValueError):
        raise OptionError(f"{{param}}: expected a share in (0, 1], got {claim!r}", param="claim") from None
    if not 0.0 < value <= 1.0:
        raise OptionError(f"{{param}}: must lie in (0, 1], got {claim!r}", param="claim")
    return value


def log_mixture(hits, n, p, prior: tuple[float, float] = PRIOR):
    """log M_n(p) of the beta-binomial mixture martingale (vectorised over `p`)."""
    a, b = prior
    hits = float(hits)
    n = float(n)
    p = np.asarray(p, float)
    log_beta = (
        math.lgamma(a + hits) + math.lgamma(b + n - hits) - math.lgamma(a + b + n)
        - (math.lgamma(a) + math.lgamma(b) - math.lgamma(a + b))
    )
    with np.errstate(divide="ignore", invalid="ignore"):
        log_lik = np.where(hits > 0, hits * np.log(p), 0.0) + np.where(n - hits > 0, (n - hits) * np.log1p(-p), 0.0)
    return log_beta - log_lik


def confidence_sequence(hits: int, n: int, confidence: float, prior: tuple[float, float] = PRIOR) -> tuple[float, float]:
    """Bounds (low, high) of the time-uniform confidence sequence after `hits` in `n`.

    ``log M_n(p)`` is convex in p with its minimum near the hit fraction, so
    each bound is found by bisection on its side.
    """
    if n <= 0:
        return 0.0, 1.0
    level = math.log(1.0 / (1.0 - confidence))
    phat = min(max(hits / n, 1e-15), 1 - 1e-15)

    def outside(p: float) -> bool:
        return float(log_mixture(hits, n, p, prior)) >= level

    low = 0.0
    if hits > 0:  # log M_n(p) -> inf as p -> 0, so the lower bound is positive
        lo, hi = 0.0, phat
        for _ in range(60):
            mid = (lo + hi) / 2
            lo, hi = (mid, hi) if outside(mid) else (lo, mid)
        low = lo
    high = 1.0
    if hits < n:
        lo, hi = phat, 1.0
        for _ in range(60):
            mid = (lo + hi) / 2
            lo, hi = (lo, mid) if outside(mid) else (mid, hi)
        high = hi
    return low, high


def verdict(hits: int, n: int, claim: float, confidence: float, prior: tuple[float, float] = PRIOR) -> str:
    """Decide "share ≥ claim" from counts, valid at any stopping time.

    "meets" when the claimed share lies below the whole confidence sequence,
    "falls-short" when it lies above it, "undecided" while it lies inside.
    The probability of ever answering "meets" when the true share is below
    the claim (or "falls-short" when it is at or above) is at most
    ``1 − confidence``.
    """
    if n <= 0:
        return UNDECIDED
    level = math.log(1.0 / (1.0 - confidence))
    if claim >= 1.0:
        # p = 1 is excluded only by a miss; "meets" is impossible to prove by sampling
        return FALLS_SHORT if hits < n else UNDECIDED
    if float(log_mixture(hits, n, claim, prior)) < level:
        return UNDECIDED
    return MEETS if hits / n > claim else FALLS_SHORT


def claim_decided(claim: float, confidence: float):
    """Stop test for claim checks: column 0 counts the points in a region, columns 1.. those also covered.

    True once every column's verdict on "share ≥ claim" is decided; valid at
    that stopping time by the confidence sequence's construction.
    """

    def decided(sums: np.ndarray, _sumsq: np.ndarray, _points: int) -> bool:
        n = int(sums[0])
        if n == 0:
            return False
        return all(verdict(int(h), n, claim, confidence) != UNDECIDED for h in sums[1:])

    return decided
