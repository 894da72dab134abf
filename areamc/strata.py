"""Stratified sampling with exact interior cells: points go only where an edge passes.

The strata are the crossing cells of the classifier's
:class:`~areamc.cells.CellGrid`: cells wholly inside the set add their exact
area (:attr:`~areamc.cells.CellGrid.inside_area`), cells wholly outside add
nothing, and only cells that an edge crosses get points.  When there are
more crossing cells than the point budget can visit a few times, runs of
consecutive crossing cells (row-major, so neighbours) are pooled into one
stratum, inside which a point picks its cell uniformly.

Points come in *rounds*: one round gives stratum ``h`` exactly ``r_h``
points, so a round is a stratified sample whose estimate
``known + Σ_h A_h hits_h / r_h`` is unbiased, and rounds are independent.
The engine treats rounds as replicates (:class:`~areamc.samplers.ReplicateSampler`):
the interval comes from the spread of the round estimates, which estimates
the stratified variance ``Σ_h A_h² p_h (1 − p_h) / r_h`` (Cochran 1977,
*Sampling Techniques*, 3rd ed., eq. 5.6) without needing two points per stratum.

The pilot of a precision target gives every stratum one point per round;
before the final batch the points are re-allocated by Neyman's rule,
``r_h ∝ A_h S_h`` with ``S_h = sqrt(p_h (1 − p_h))`` from the pilot
(Neyman 1934, J. R. Statist. Soc. 97:558-625; Cochran 1977 §5.5), with a
floor of one point per stratum so that every stratum keeps being sampled
and the estimate stays unbiased.
"""

from __future__ import annotations

import math

import numpy as np

from .cells import Strata
from .errors import OptionError
from .samplers import Domain, UniformSampler, require_box

__all__ = ["StratifiedSampler", "ROUNDS_PER_BUDGET", "MAX_POINTS_PER_STRATUM"]

#: A fixed-count run aims for at least this many rounds (replicates), so its t interval has 15 degrees of freedom.
ROUNDS_PER_BUDGET = 16
#: Most strata under a precision target: a round (one point each) stays small next to the points a target needs.
TARGET_STRATA = 512
#: Points per stratum a round after Neyman re-allocation, on average (before the floor of one).
NEYMAN_ROUND = 2
#: Most points a stratum gets per round under Neyman allocation.
MAX_POINTS_PER_STRATUM = 8


class _Unit3:
    """Three uniforms per point: one picks the cell within a stratum, two place the point in it."""

    dims = 3
    area = 1.0

    def map(self, u):  # pragma: no cover - the stratified sampler maps uniforms itself
        return u[:, 0], u[:, 1]


class StratifiedSampler:
    """Stratified points in the crossing cells of a set's cell grid; a :class:`~areamc.samplers.ReplicateSampler`.

    Built as ``StratifiedSampler(seed, box)`` like every sampler; the
    engine then binds it to the classifier (:meth:`bind`), whose cell grid
    gives the strata, and plans it for the run's point budget
    (:meth:`plan`).  Points are in plane metres, areas in m².

    Parameters
    ----------
    seed : numpy.random.SeedSequence
        Uniforms come from a :class:`~areamc.samplers.UniformSampler` on
        this seed, by stream position, so chunking never changes them.
    domain : Box
        The sampling box (the classifier's grid must cover the same box).
    """

    name = "stratified"
    replicate = True

    def __init__(self, seed: np.random.SeedSequence, domain: Domain) -> None:
        self.domain = require_box(domain, "stratified")
        self._uniforms = UniformSampler(seed, _Unit3())
        self._grid: Strata | None = None
        self.known = 0.0
        self.span = 0.0
        self.replicate_size = 1
        self._pilot_hits: np.ndarray | None = None
        self._pilot_points: np.ndarray | None = None

    # -- set-up ---------------------------------------------------------------------------------------------
    def bind(self, classify) -> None:
        """Take the strata from `classify` (its ``strata()``: a :class:`~areamc.cells.Strata` over this box)."""
        strata = classify.strata() if hasattr(classify, "strata") else None
        if not isinstance(strata, Strata):
            raise OptionError("{param}: the stratified sampler needs a set answered from a cell grid; "
                              "this job takes 'uniform' or 'sobol'", param="sampler")
        if strata.box != self.domain:
            raise ValueError("the classifier's strata cover another box than the sampler")
        self._grid = strata
        self.known = strata.known
        self._cells = strata.cells
        self.span = len(self._cells) * strata.cell_area
        self._group(1)

    def plan(self, points: int | None) -> None:
        """Pool crossing cells so that `points` points give at least :data:`ROUNDS_PER_BUDGET` rounds.

        For a precision target (`points` None) pool to at most
        :data:`TARGET_STRATA` strata, so that the pilot's rounds are small.
        """
        if points is None:
            per = max(1, math.ceil(len(self._cells) / TARGET_STRATA))
        else:
            per = max(1, math.ceil(len(self._cells) * ROUNDS_PER_BUDGET / max(int(points), 1)))
        self._group(per)

    def _group(self, per: int) -> None:
        """Strata of `per` consecutive crossing cells each (the last may hold fewer); one point per round each."""
        k = len(self._cells)
        self._per = per
        self._start = np.arange(0, k, per, dtype=np.int64)
        self._size = np.minimum(per, k - self._start)
        self._area = self._size * self._grid.cell_area
        self._allocate(np.ones(len(self._start), dtype=np.int64))
        self._pilot_hits = np.zeros(len(self._start))
        self._pilot_points = np.zeros(len(self._start))

    def _allocate(self, r: np.ndarray) -> None:
        self._r = r
        self._slot = np.repeat(np.arange(len(r)), r)  # stratum of each position in a round
        self._weight = (self._area / r)[self._slot]  # m² per hit at each position
        if not len(r):  # no crossing cell: one point per round (off the plane), weighing nothing
            self._slot, self._weight = np.zeros(1, dtype=np.int64), np.zeros(1)
        self.replicate_size = len(self._slot)

    # -- the sampler protocol -------------------------------------------------------------------------------
    def reset(self) -> None:
        self._uniforms.reset()

    def fast_forward(self, n: int) -> None:
        self._uniforms.fast_forward(n)

    @property
    def generated(self) -> int:
        return self._uniforms.generated

    @property
    def strata(self) -> int:
        """Number of strata (pooled crossing cells)."""
        return len(self._start)

    def random(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        """The next `n` points (whole rounds) as ``(x, y)`` in plane metres, in the crossing cells only."""
        size = self.replicate_size
        if n % size:
            raise ValueError(f"a stratified sampler draws whole rounds of {size} points")
        u = self._uniforms.unit(n)
        if not len(self._cells):  # nothing to sample: the grid answered the whole set exactly
            return np.full(n, np.nan), np.full(n, np.nan)
        stratum = np.tile(self._slot, n // size)
        pick = np.minimum((u[:, 0] * self._size[stratum]).astype(np.int64), self._size[stratum] - 1)
        x0, y0 = self._grid.cell_corners(self._cells[self._start[stratum] + pick])
        return x0 + u[:, 1] * self._grid.dx, y0 + u[:, 2] * self._grid.dy

    def totals(self, scores: np.ndarray) -> np.ndarray:
        """Each round's estimate of the crossing cells' share of the set (m²), summed left to right."""
        size = self.replicate_size
        rows = scores.reshape(-1, size, scores.shape[1])
        if self._pilot_hits is not None and self.strata:
            self._pilot_hits += np.bincount(self._slot, weights=rows[:, :, 0].sum(axis=0), minlength=self.strata)
            self._pilot_points += self._r * rows.shape[0]
        return np.cumsum(rows * self._weight[None, :, None], axis=1)[:, -1, :]

    def next_stage(self) -> None:
        """Re-allocate by Neyman's rule from the pilot's hits: about :data:`NEYMAN_ROUND` points per stratum a round.

        ``r_h = max(1, round(T A_h S_h / Σ A_k S_k))`` with ``T = NEYMAN_ROUND x strata``,
        capped at :data:`MAX_POINTS_PER_STRATUM`; the floor of one keeps every
        stratum sampled, so the estimate stays unbiased.
        """
        hits, seen = self._pilot_hits, self._pilot_points
        self._pilot_hits = self._pilot_points = None
        if hits is None or not len(hits):
            return
        p = (hits + 0.5) / (seen + 1.0)  # kept off 0 and 1, so a stratum never loses its points
        s = self._area * np.sqrt(p * (1 - p))
        r = np.rint(NEYMAN_ROUND * len(s) * s / s.sum())
        self._allocate(np.clip(r, 1, MAX_POINTS_PER_STRATUM).astype(np.int64))
