"""The overlap job: pairwise overlaps of zones and the layer's multiplicity profile.

Candidate pairs come from a shapely ``STRtree`` on the zones' bounding boxes;
pairs whose boxes do not meet are never sampled, and a pair is sampled only
inside the intersection of its two boxes.  The multiplicity profile (area
covered by exactly k and by at least k zones) is sampled in the bounding box
of all zones, with each point's count taken from a :class:`~areamc.classify.ZoneIndex`.
All areas are m² of the equal-area plane.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass

import numpy as np
import shapely

from .classify import ZoneIndex
from .estimate import DEFAULT_CHUNK, AreaEstimate, StopRule, area_target, check_confidence, hit_or_miss
from .exact import FLAG_Z, at_least, deviation, intersection_areas, multiplicity_areas, planar_area
from .project import EqualAreaPlane, ProjectedLayer
from .sampling import Box, UniformSampler, child_seed, make_seed

__all__ = ["OverlapRow", "MultiplicityRow", "OverlapReport", "candidate_pairs", "estimate_overlaps"]

_PAIR_STREAM = 0
_PROFILE_STREAM = 1


@dataclass(frozen=True)
class OverlapRow:
    """Overlap of zone `id_a` (first layer) and zone `id_b` (second layer, or the same one).

    Areas in m² of the equal-area plane.  `share_a` and `share_b` are the
    estimate divided by the exact planar area of each zone; `exact_planar` is
    shapely's intersection area and `z` the estimate's deviation from it in
    standard errors.
    """

    id_a: str
    id_b: str
    estimate: float
    stderr: float
    ci_low: float
    ci_high: float
    share_a: float
    share_b: float
    points: int
    hits: int
    box_area: float
    exact_planar: float | None
    z: float | None
    flagged: bool

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class MultiplicityRow:
    """Area (m²) covered by exactly `k` zones and by at least `k` zones, with intervals."""

    k: int
    exactly: float
    exactly_ci_low: float
    exactly_ci_high: float
    at_least: float
    at_least_stderr: float
    at_least_ci_low: float
    at_least_ci_high: float
    exact_exactly: float | None
    exact_at_least: float | None
    z: float | None

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class OverlapReport:
    """Pairs, the multiplicity profile, and what produced them."""

    rows: tuple[OverlapRow, ...]
    pairs: tuple[tuple[int, int], ...]
    multiplicity: tuple[MultiplicityRow, ...]
    candidates: int
    plane: EqualAreaPlane
    confidence: float
    seed_entropy: int
    exact_profile: str

    def metadata(self) -> dict:
        return {
            "equal_area_crs": self.plane.to_dict(),
            "confidence": self.confidence,
            "seed": self.seed_entropy,
            "candidate_pairs": self.candidates,
            "exact_multiplicity": self.exact_profile,
        }


def candidate_pairs(a: ProjectedLayer, b: ProjectedLayer | None = None) -> np.ndarray:
    """Index pairs ``(i, j)`` whose zones intersect: shape ``(2, k)``, sorted.

    With one layer only ``i < j`` pairs are returned.  The STRtree prunes by
    bounding box; the intersects predicate then drops pairs that cannot
    overlap, and pairs that only touch (shared edges or points) are dropped too.
    """
    other = a if b is None else b
    tree = shapely.STRtree(other.planar)
    i_other, j_self = tree.query(a.planar, predicate="intersects")  # (input idx, tree idx)
    pairs = np.vstack([i_other, j_self])
    if b is None:
        pairs = pairs[:, pairs[0] < pairs[1]]
    # zones that only share boundary (neighbours in a partition) have no overlap to sample
    pairs = pairs[:, ~shapely.touches(a.planar[pairs[0]], other.planar[pairs[1]])]
    order = np.lexsort((pairs[1], pairs[0]))
    return pairs[:, order]


def estimate_overlaps(
    a: ProjectedLayer,
    b: ProjectedLayer | None = None,
    *,
    stop: StopRule | None = None,
    confidence: float = 0.95,
    seed: int | np.random.SeedSequence | None = None,
    chunk: int = DEFAULT_CHUNK,
    min_share: float = 0.0,
    exact: bool = True,
    profile: bool = True,
    exact_budget_s: float = 10.0,
) -> OverlapReport:
    """Estimate every pairwise overlap and (for one layer) the multiplicity profile.

    Parameters
    ----------
    a, b : ProjectedLayer
        Zones in one equal-area plane (metres); with `b` only cross pairs.
    stop : StopRule
        Points per pair (and for the profile), or a precision target.
    min_share : float
        Omit pairs whose estimated overlap is below this share of both zones.
    exact : bool
        Compute shapely's exact intersection areas (and the exact profile).
    profile : bool
        Estimate the area covered by exactly / at least k zones.
    exact_budget_s : float
        Seconds allowed for the exact profile; beyond, it is "not computed".

    Returns
    -------
    OverlapReport
        Areas in m² of the plane ``a.plane``.
    """
    stop = stop or StopRule()
    confidence = check_confidence(confidence)
    root = make_seed(seed)
    other = a if b is None else b
    pairs = candidate_pairs(a, b)
    area_a = planar_area(a.planar)
    area_b = planar_area(other.planar)
    exact_pairs = intersection_areas(a.planar[pairs[0]], other.planar[pairs[1]]) if exact and pairs.size else None
    shapely.prepare(a.planar)
    shapely.prepare(other.planar)
    rows = []
    kept = []
    for n, (i, j) in enumerate(pairs.T):
        ga, gb = a.planar[i], other.planar[j]
        box = Box.of(ga.bounds).intersection(Box.of(gb.bounds))
        if box is None:
            continue
        run = hit_or_miss(
            box,
            lambda x, y, ga=ga, gb=gb: shapely.contains_xy(ga, x, y) & shapely.contains_xy(gb, x, y),
            UniformSampler(child_seed(root, _PAIR_STREAM, int(i), int(j))),
            budget=stop.budget,
            done=area_target(stop, box.area, confidence),
            chunk=chunk,
        )
        est = run.estimate(0, confidence)
        share_a, share_b = float(est.estimate / area_a[i]), float(est.estimate / area_b[j])
        if max(share_a, share_b) < min_share:
            continue
        planar = float(exact_pairs[n]) if exact_pairs is not None else None
        z = deviation(est.estimate, planar, est.check_scale) if planar is not None else None
        rows.append(
            OverlapRow(
                id_a=a.ids[i], id_b=other.ids[j], estimate=est.estimate, stderr=est.stderr,
                ci_low=est.ci_low, ci_high=est.ci_high, share_a=share_a, share_b=share_b,
                points=est.points, hits=est.hits, box_area=est.box_area, exact_planar=planar,
                z=z, flagged=bool(z is not None and abs(z) > FLAG_Z),
            )
        )
        kept.append((int(i), int(j)))
    multiplicity: tuple[MultiplicityRow, ...] = ()
    exact_profile = "not asked"
    if profile and b is None:
        multiplicity, exact_profile = _profile(a, stop, confidence, root, chunk, exact, exact_budget_s)
    return OverlapReport(tuple(rows), tuple(kept), multiplicity, int(pairs.shape[1]), a.plane, confidence, int(root.entropy), exact_profile)


def _profile(layer, stop, confidence, root, chunk, exact, budget_s):
    """Area covered by exactly / at least k zones, sampled in the layer's bounding box."""
    box = Box.of(shapely.total_bounds(layer.planar))
    index = ZoneIndex(layer.planar, box)
    top = max(index.max_count, 1)
    ks = np.arange(1, top + 1)
    run = hit_or_miss(
        box,
        lambda x, y: index.counts(x, y)[:, None] >= ks[None, :],
        UniformSampler(child_seed(root, _PROFILE_STREAM)),
        budget=stop.budget,
        done=area_target(stop, box.area, confidence),
        chunk=chunk,
    )
    exact_k, status = None, "not asked"
    if exact:
        exact_k = multiplicity_areas(layer.planar, deadline=time.monotonic() + budget_s)
        status = "computed" if exact_k is not None else f"not computed (over {budget_s:g} s)"
    hits = list(run.hits) + [0]
    rows = []
    for n, k in enumerate(ks):
        if hits[n] == 0 and k > 1:
            break
        least = run.estimate(n, confidence)
        only = AreaEstimate.from_counts(hits[n] - hits[n + 1], run.points, box.area, confidence)
        exact_least = at_least(exact_k, int(k)) if exact_k is not None else None
        rows.append(
            MultiplicityRow(
                k=int(k), exactly=only.estimate, exactly_ci_low=only.ci_low, exactly_ci_high=only.ci_high,
                at_least=least.estimate, at_least_stderr=least.stderr, at_least_ci_low=least.ci_low,
                at_least_ci_high=least.ci_high,
                exact_exactly=exact_k.get(int(k), 0.0) if exact_k is not None else None,
                exact_at_least=exact_least,
                z=deviation(least.estimate, exact_least, least.check_scale) if exact_least is not None else None,
            )
        )
    return tuple(rows), status
