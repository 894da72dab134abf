"""The overlap job: pairwise overlaps of zones and the layer's multiplicity profile.

Candidate pairs come from a shapely ``STRtree`` on the zones' bounding boxes;
pairs whose boxes do not meet are never sampled, and a pair is sampled only
inside the intersection of its two boxes.  The multiplicity profile (area
covered by exactly k and by at least k zones) is sampled in the bounding box
of all zones, with each point's count taken from a :class:`~areamc.classify.GridIndex`.
All areas are m² of the equal-area plane.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass

import numpy as np
import shapely

from .checks import flagged
from .classify import GridIndex
from .engine import DEFAULT_CHUNK, hit_or_miss
from .estimate import AreaEstimate, area_precision
from .exact import at_least, intersection_areas, multiplicity_areas, planar_area
from .intervals import check_confidence
from .parallel import check_workers, map_ordered
from .project import ProjectedLayer, transform_geometries, transformer
from .errors import OptionError
from .runinfo import RunInfo
from .samplers import Box, SamplerFactory, make_sampler, sampler_name, check_sampler
from .seeds import child_seed, job_root, make_seed
from .stopping import StopRule, Stopper

__all__ = ["OverlapRow", "MultiplicityRow", "OverlapReport", "candidate_pairs", "estimate_overlaps", "overlap_geometries"]

#: Exact profile status tokens.
COMPUTED = "computed"
NOT_ASKED = "not-asked"
TIMED_OUT = "timed-out"

_PAIR_STREAM = 0
_PROFILE_STREAM = 1


@dataclass(frozen=True)
class OverlapRow:
    """Overlap of zone `id_a` (first layer) and zone `id_b` (second layer, or the same one).

    `feature_index_a` and `feature_index_b` are the zones' positions in their
    layers as read (0-based; ``Layer.indices``).  Areas in m² of the equal-area
    plane.  `share_a` and `share_b` are the estimate divided by the exact planar
    area of each zone; `exact_planar` is shapely's intersection area and `z` the estimate's deviation from it in
    standard errors (binomial mid-p score, :mod:`areamc.checks`).
    """

    id_a: str
    id_b: str
    feature_index_a: int
    feature_index_b: int
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
    stop_reason: str
    pilot_points: int

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class MultiplicityRow:
    """Area (m² of the plane) covered by exactly `k` zones and by at least `k` zones, with intervals.

    `z` is the deviation of the at-least-k area from its exact value
    (binomial mid-p score); `flagged` is ``|z| > 4``.
    """

    k: int
    area_exactly: float
    area_exactly_ci_low: float
    area_exactly_ci_high: float
    area_at_least: float
    area_at_least_stderr: float
    area_at_least_ci_low: float
    area_at_least_ci_high: float
    exact_area_exactly: float | None
    exact_area_at_least: float | None
    z: float | None
    flagged: bool

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class OverlapReport:
    """Pairs, the multiplicity profile, and what produced them."""

    rows: tuple[OverlapRow, ...]
    pairs: tuple[tuple[int, int], ...]
    multiplicity: tuple[MultiplicityRow, ...]
    candidates: int
    run: RunInfo
    exact_profile: str

    def metadata(self) -> dict:
        return {**self.run.to_dict(), "candidate_pairs": self.candidates, "exact_multiplicity": self.exact_profile}


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
    sampler: str | SamplerFactory = "uniform",
    chunk: int = DEFAULT_CHUNK,
    min_share: float = 0.0,
    exact: bool = True,
    profile: bool = True,
    exact_time_limit_s: float = 10.0,
    workers: int | None = 1,
) -> OverlapReport:
    """Estimate every pairwise overlap and (for one layer) the multiplicity profile.

    Parameters
    ----------
    a, b : ProjectedLayer
        Zones in one equal-area plane (metres); with `b` only cross pairs.
    stop : StopRule
        Points per pair (and for the profile), or a precision target.
    seed : int or SeedSequence, optional
        Root seed; pair ``(i, j)`` samples from the stream keyed
        ``("overlap", 0, i, j)``, the profile from ``("overlap", 1)``.
    sampler : str or sampler class
        See :func:`~areamc.samplers.make_sampler`.
    min_share : float
        Omit pairs whose estimated overlap is below this share of both zones (0..1).
    exact : bool
        Compute shapely's exact intersection areas (and the exact profile).
    profile : bool
        Estimate the area covered by exactly / at least k zones.
    exact_time_limit_s : float
        Seconds allowed for the exact profile; beyond, its status is "timed-out".
    workers : int or None
        Worker processes pairs (and the profile) are shared among (None: every usable core); the
        rows are identical, bit for bit, for any number (:func:`~areamc.parallel.map_ordered`).

    Returns
    -------
    OverlapReport
        Areas in m² of the plane ``a.plane``.
    """
    stop = stop or StopRule()
    confidence = check_confidence(confidence)
    check_sampler(sampler, "overlap")
    if not 0.0 <= min_share <= 1.0:
        raise OptionError(f"{{param}}: must lie in [0, 1], got {min_share!r}", param="min_share")
    workers = check_workers(workers)
    root = make_seed(seed)
    streams = job_root(root, "overlap")
    other = a if b is None else b
    pairs = candidate_pairs(a, b)
    area_a = planar_area(a.planar)
    area_b = planar_area(other.planar)
    exact_pairs = intersection_areas(a.planar[pairs[0]], other.planar[pairs[1]]) if exact and pairs.size else None
    shapely.prepare(a.planar)
    shapely.prepare(other.planar)
    job = _OverlapJob(a, other, pairs, area_a, area_b, exact_pairs, stop, confidence, streams, sampler, chunk,
                      min_share, exact, exact_time_limit_s)
    with_profile = profile and b is None
    # the profile, one estimate over every zone, goes first so that it does not run alone at the end
    items = ([_PROFILE_ITEM] if with_profile else []) + list(range(pairs.shape[1]))
    results = map_ordered(_overlap_item, items, workers, shared=job)
    multiplicity: tuple[MultiplicityRow, ...] = ()
    exact_profile = NOT_ASKED
    if with_profile:
        (multiplicity, exact_profile), results = results[0], results[1:]
    kept_pairs = [result for result in results if result is not None]
    rows = [row for row, _ in kept_pairs]
    kept = [pair for _, pair in kept_pairs]
    info = RunInfo("overlap", a.plane, confidence, int(root.entropy), sampler_name(sampler), stop, a.densify_m)
    return OverlapReport(tuple(rows), tuple(kept), multiplicity, int(pairs.shape[1]), info, exact_profile)


#: The item of :func:`_overlap_item` that stands for the multiplicity profile (pairs are 0, 1, ...).
_PROFILE_ITEM = -1


@dataclass(frozen=True)
class _OverlapJob:
    """What every pair's work shares (sent once to each worker process; plane metres)."""

    a: ProjectedLayer
    other: ProjectedLayer
    pairs: np.ndarray
    area_a: np.ndarray
    area_b: np.ndarray
    exact_pairs: np.ndarray | None
    stop: StopRule
    confidence: float
    streams: np.random.SeedSequence
    sampler: str | SamplerFactory
    chunk: int
    min_share: float
    exact: bool
    exact_time_limit_s: float


def _overlap_item(job: _OverlapJob, n: int):
    """Pair `n`: its row and ``(i, j)``, or None when it is not reported; or, for :data:`_PROFILE_ITEM`,
    the multiplicity profile and its exact status.  Runs in any process."""
    if n == _PROFILE_ITEM:
        return _profile(job.a, job.stop, job.confidence, job.streams, job.sampler, job.chunk, job.exact,
                        job.exact_time_limit_s)
    a, other, confidence = job.a, job.other, job.confidence
    i, j = (int(v) for v in job.pairs[:, n])
    ga, gb = a.planar[i], other.planar[j]
    box = Box.of(ga.bounds).intersection(Box.of(gb.bounds))
    if box is None:
        return None
    run = hit_or_miss(
        make_sampler(job.sampler, child_seed(job.streams, _PAIR_STREAM, i, j), box),
        lambda x, y, ga=ga, gb=gb: shapely.contains_xy(ga, x, y) & shapely.contains_xy(gb, x, y),
        Stopper(job.stop, precision=area_precision(box.area, confidence)),
        chunk=job.chunk,
    )
    est = run.estimate(0, confidence)
    share_a, share_b = float(est.estimate / job.area_a[i]), float(est.estimate / job.area_b[j])
    if max(share_a, share_b) < job.min_share:
        return None
    planar = float(job.exact_pairs[n]) if job.exact_pairs is not None else None
    z = est.deviation(planar) if planar is not None else None
    row = OverlapRow(
        id_a=a.ids[i], id_b=other.ids[j], feature_index_a=a.source.indices[i],
        feature_index_b=other.source.indices[j], estimate=est.estimate, stderr=est.stderr,
        ci_low=est.ci_low, ci_high=est.ci_high, share_a=share_a, share_b=share_b,
        points=est.points, hits=est.hits, box_area=est.box_area, exact_planar=planar,
        z=z, flagged=flagged(z), stop_reason=run.reason, pilot_points=run.pilot_points,
    )
    return row, (i, j)


def _profile(layer, stop, confidence, streams, sampler, chunk, exact, limit_s):
    """Area covered by exactly / at least k zones, sampled in the layer's bounding box."""
    box = Box.of(shapely.total_bounds(layer.planar))
    index = GridIndex(layer.planar, box)
    top = max(index.max_count, 1)
    ks = np.arange(1, top + 1)
    run = hit_or_miss(
        make_sampler(sampler, child_seed(streams, _PROFILE_STREAM), box),
        lambda x, y: index.counts(x, y)[:, None] >= ks[None, :],
        Stopper(stop, precision=area_precision(box.area, confidence)),
        chunk=chunk,
    )
    exact_k, status = None, NOT_ASKED
    if exact:
        exact_k = multiplicity_areas(layer.planar, deadline=time.monotonic() + limit_s)
        status = COMPUTED if exact_k is not None else TIMED_OUT
    hits = list(run.hits) + [0]
    rows = []
    for n, k in enumerate(ks):
        if hits[n] == 0 and k > 1:
            break
        least = run.estimate(n, confidence)
        only = AreaEstimate.from_counts(hits[n] - hits[n + 1], run.points, box.area, confidence)
        exact_least = at_least(exact_k, int(k)) if exact_k is not None else None
        z = least.deviation(exact_least) if exact_least is not None else None
        rows.append(
            MultiplicityRow(
                k=int(k), area_exactly=only.estimate, area_exactly_ci_low=only.ci_low,
                area_exactly_ci_high=only.ci_high, area_at_least=least.estimate,
                area_at_least_stderr=least.stderr, area_at_least_ci_low=least.ci_low,
                area_at_least_ci_high=least.ci_high,
                exact_area_exactly=exact_k.get(int(k), 0.0) if exact_k is not None else None,
                exact_area_at_least=exact_least, z=z, flagged=flagged(z),
            )
        )
    return tuple(rows), status


def overlap_geometries(report: OverlapReport, a: ProjectedLayer, b: ProjectedLayer | None = None,
                       crs=None) -> np.ndarray:
    """Intersection geometries of the reported pairs, in `crs` (default: the first layer's own CRS).

    `a` and `b` are the projected layers the report was made from (plane
    metres); the intersections are formed in the plane and transformed back.
    """
    other = a if b is None else b
    target = a.source.crs if crs is None else crs
    back = transformer(a.plane.crs, target)
    if not report.pairs:
        return np.array([], dtype=object)
    i, j = (np.array(k) for k in zip(*report.pairs))
    inter = shapely.intersection(a.planar[i], other.planar[j])
    return transform_geometries(inter, back, lambda n: f"overlap {report.rows[n].id_a} x {report.rows[n].id_b}")
