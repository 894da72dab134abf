"""Sampling a region weighted by a density: the shared step of ``integrate`` and population coverage.

Two estimators, chosen per region:

* **Importance sampling** (when the source offers a :class:`~areamc.density.Proposal`):
  points are drawn with density ``d(x)/T`` over the blocks or cells that meet
  the region, ``T`` their total count.  The integral of ``d`` over the region
  is ``T x P(x in region)`` and the share of the region's population in a
  covered set is ``P(covered | in region)``: both binomial proportions, so
  Wilson intervals (and confidence sequences) apply exactly as for areas.
* **Uniform sampling** in the region's bounding box ``B``: scores
  ``b = d(x) 1[x in region]`` and ``a = b 1[covered]``; the integral is
  ``|B| mean(b)`` with a normal interval from the sample variance, and the
  share is the ratio ``Σa / Σb`` with the delta-method variance
  ``(Σa² (1 − 2R) + R² Σb²) / (Σb)²`` (using ``Σab = Σa²`` since the
  covered indicator is 0 or 1; Cochran 1977, *Sampling Techniques*, §6.4).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from .density import DensitySource
from .estimate import AreaEstimate, TotalEstimate, accumulate, mean_interval, wilson_interval, z_for
from .sampling import Box, UniformSampler, child_seed, scale_to_box

__all__ = ["WeightedRun", "weighted_run", "IMPORTANCE", "UNIFORM"]

IMPORTANCE = "importance"
UNIFORM = "uniform"


@dataclass(frozen=True)
class WeightedRun:
    """Sums of a density-weighted run over one region.

    Column 0 is "in the region"; columns 1.. are the covered sets.  With
    ``method == "importance"`` the sums are hit counts and `scale` is the
    proposal's total count ``T``; with ``"uniform"`` they are sums of density
    scores and `scale` is the box area (m²).
    """

    method: str
    points: int
    scale: float
    sums: np.ndarray
    sumsq: np.ndarray
    stopped_early: bool

    def total(self, confidence: float) -> AreaEstimate | TotalEstimate:
        """The integral of the density over the region (counts, e.g. persons)."""
        if self.method == IMPORTANCE:
            return AreaEstimate.from_counts(int(self.sums[0]), self.points, self.scale, confidence)
        return mean_interval(float(self.sums[0]), float(self.sumsq[0]), self.points, self.scale, confidence)

    def share(self, column: int, confidence: float) -> tuple[float, float, float, float]:
        """(share, stderr, low, high) of the region's weight falling in a covered set."""
        b = float(self.sums[0])
        if b <= 0:
            return math.nan, math.nan, math.nan, math.nan
        a = float(self.sums[column])
        r = a / b
        if self.method == IMPORTANCE:
            n = b
            low, high = wilson_interval(a, n, confidence)
            return r, math.sqrt(r * (1 - r) / n), float(low), float(high)
        var = max(float(self.sumsq[column]) * (1 - 2 * r) + r * r * float(self.sumsq[0]), 0.0) / (b * b)
        se = math.sqrt(var)
        z = z_for(confidence)
        return r, se, max(0.0, r - z * se), min(1.0, r + z * se)


Classify = Callable[[np.ndarray, np.ndarray], np.ndarray]


def weighted_run(
    region,
    classify: Classify,
    source: DensitySource,
    root: np.random.SeedSequence,
    key: tuple[int, ...],
    *,
    budget: int,
    chunk: int,
    importance: bool = True,
    done: Callable[[str, float, np.ndarray, np.ndarray, int], bool] | None = None,
) -> WeightedRun | None:
    """Sample `region` weighted by `source`'s density.

    Parameters
    ----------
    region : shapely geometry
        In the equal-area plane (metres); ``source.prepare(region)`` must have been called.
    classify : callable
        ``classify(x, y)`` returns bools ``(n, m)``: column 0 "in the region",
        the rest covered sets.
    root, key
        Seed root and the stream key of this region; the proposal uses the
        children ``key + (0,)`` and ``key + (1,)``, the uniform path ``key + (2,)``.
    importance : bool
        Use the source's importance sampler when it has one.
    done : callable, optional
        ``done(method, scale, sums, sumsq, points)`` to stop early.

    Returns
    -------
    WeightedRun, or None when the density is zero on every unit near the region.
    """
    proposal = source.proposal(region) if importance else None
    if proposal is not None and proposal.total <= 0:
        return None  # the source has no positive count near the region: density 0 here
    if proposal is not None:
        first = UniformSampler(child_seed(root, *key, 0))
        second = UniformSampler(child_seed(root, *key, 1))

        def draw(n):
            return proposal.draw(np.hstack([first.random(n), second.random(n)]))

        scale, method = proposal.total, IMPORTANCE
        evaluate = classify
    else:
        box = Box.of(region.bounds)
        sampler = UniformSampler(child_seed(root, *key, 2))

        def draw(n):
            return scale_to_box(sampler.random(n), box)

        def evaluate(x, y):
            flags = np.asarray(classify(x, y), dtype=bool)
            d = source.density(x, y)
            return flags * d[:, None]

        scale, method = box.area, UNIFORM
    run = accumulate(
        draw,
        evaluate,
        budget=budget,
        chunk=chunk,
        done=None if done is None else (lambda sums, sumsq, n: done(method, scale, sums, sumsq, n)),
    )
    return WeightedRun(method, run.points, scale, run.sums, run.sumsq, run.stopped_early)
