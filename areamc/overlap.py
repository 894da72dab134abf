"""The overlap job: pairwise overlaps of zones and the layer's multiplicity profile.

Candidate pairs come from a shapely ``STRtree`` on the zones' bounding boxes;
pairs whose boxes do not meet are never sampled.  Two ways of sampling them
(parameter ``pair_sampling``, docs/methods.md §9):

* ``"shared"``: one sample of points thrown uniformly into the layer's
  bounding box (the box the multiplicity profile uses; for two layers, the
  intersection of their boxes).  Each point's zones come from one
  :class:`~areamc.classify.GridIndex`, and every pair of zones holding a
  point gets a hit, so every pair's count and the profile come from one run
  of the engine;
* ``"per-pair"``: each pair sampled on its own inside the intersection of
  its two boxes, and the profile in a run of its own.

``"auto"`` (the default) takes the shared sample for an absolute tolerance
and per-pair boxes otherwise (:func:`pair_sampling_for`).  The multiplicity profile
(area covered by exactly k and by at least k zones) is sampled in the
bounding box of all zones, each point's count taken from a grid index.
All areas are m² of the equal-area plane.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass, replace

import numpy as np
import shapely

from .checks import flagged
from .checks import binomial_deviation
from .classify import GUESS_POINTS, GridIndex
from .engine import DEFAULT_CHUNK, accumulate, hit_or_miss
from .estimate import AreaEstimate, area_precision
from .exact import at_least, intersection_areas, multiplicity_areas, planar_area
from .intervals import check_confidence, wilson_interval
from .parallel import SPAN_UNIT, JobMeter, JobProgress, check_workers, map_ordered
from .project import ProjectedLayer, transform_geometries, transformer
from .errors import OptionError
from .runinfo import RunInfo
from .samplers import Box, SamplerFactory, make_sampler, sampler_name, check_sampler
from .seeds import child_seed, job_root, make_seed
from .stopping import BUDGET, StopRule, Stopper

__all__ = ["OverlapRow", "MultiplicityRow", "OverlapReport", "candidate_pairs", "estimate_overlaps", "overlap_geometries",
           "pair_sampling_for", "zone_pairs", "PAIR_SAMPLINGS", "AUTO", "SHARED", "PER_PAIR", "AREA_FIELDS",
           "PROFILE_AREA_FIELDS"]

#: Exact profile status tokens.
COMPUTED = "computed"
NOT_ASKED = "not-asked"
TIMED_OUT = "timed-out"

_PAIR_STREAM = 0
_PROFILE_STREAM = 1
_SHARED_STREAM = 2

#: How pairs are sampled (parameter ``pair_sampling``): chosen from the stop rule,
AUTO = "auto"
#: one sample over the layer's box for every pair and the profile,
SHARED = "shared"
#: or each pair in its own box (and the profile in a run of its own).
PER_PAIR = "per-pair"
PAIR_SAMPLINGS = (AUTO, SHARED, PER_PAIR)


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
    std_error: float
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
    area_at_least_std_error: float
    area_at_least_ci_low: float
    area_at_least_ci_high: float
    area_exactly_exact: float | None
    area_at_least_exact: float | None
    z: float | None
    flagged: bool

    def to_dict(self) -> dict:
        return asdict(self)


#: The fields of :class:`OverlapRow` and of :class:`MultiplicityRow` holding an area (m² of the plane):
#: those an output unit applies to.  The command line and :mod:`areamc.frames` read these lists.
AREA_FIELDS = ("estimate", "std_error", "ci_low", "ci_high", "box_area", "exact_planar")
PROFILE_AREA_FIELDS = ("area_exactly", "area_exactly_ci_low", "area_exactly_ci_high", "area_at_least",
                       "area_at_least_std_error", "area_at_least_ci_low", "area_at_least_ci_high",
                       "area_exactly_exact", "area_at_least_exact")


@dataclass(frozen=True)
class OverlapReport:
    """Pairs, the multiplicity profile, and what produced them."""

    rows: tuple[OverlapRow, ...]
    pairs: tuple[tuple[int, int], ...]
    multiplicity: tuple[MultiplicityRow, ...]
    candidates: int
    run: RunInfo
    exact_profile: str
    #: How the pairs were sampled: :data:`SHARED` or :data:`PER_PAIR`.
    pair_sampling: str = PER_PAIR

    def metadata(self) -> dict:
        return {**self.run.to_dict(), "candidate_pairs": self.candidates, "exact_multiplicity": self.exact_profile,
                "pair_sampling": self.pair_sampling}

    def to_dataframe(self, units: str = "km2", which: str = "rows"):
        """The pairs (or, with ``which="profile"``, the multiplicity profile) as a pandas DataFrame,
        areas in `units` (m2, ha, km2, acre, mi2) of the plane; see :func:`areamc.frames.to_dataframe`."""
        from .frames import to_dataframe

        return to_dataframe(self, units, which=which)


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


def pair_sampling_for(pair_sampling: str, stop: StopRule) -> str:
    """The way pairs are sampled: :data:`SHARED` or :data:`PER_PAIR`, resolving :data:`AUTO` from `stop`.

    :data:`AUTO` takes the shared sample for an absolute tolerance (m²):
    one pilot serves every pair, where per-pair boxes spend at least a chunk
    of pilot points on each pair.  It takes per-pair boxes for a fixed
    number of points (``points`` per pair, as every other job counts points
    per estimate; at equal total points they are as precise on large
    overlaps and about twice as precise on small ones, unless the zones
    overlap densely) and for a relative tolerance (a small overlap fills a
    tiny part of the layer's box, so the shared sample would need far more
    points to meet it).  docs/methods.md §9 has the figures.

    Raises
    ------
    OptionError
        For anything but the names in :data:`PAIR_SAMPLINGS` (parameter ``pair_sampling``).
    """
    if pair_sampling not in PAIR_SAMPLINGS:
        raise OptionError(f"{{param}}: choose one of {', '.join(PAIR_SAMPLINGS)}, got {pair_sampling!r}",
                          param="pair_sampling")
    if pair_sampling != AUTO:
        return pair_sampling
    return SHARED if stop.absolute is not None else PER_PAIR


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
    pair_sampling: str = AUTO,
    progress: JobProgress | None = None,
) -> OverlapReport:
    """Estimate every pairwise overlap and (for one layer) the multiplicity profile.

    Parameters
    ----------
    a, b : ProjectedLayer
        Zones in one equal-area plane (metres); with `b` only cross pairs.
    stop : StopRule
        With per-pair sampling, points per pair (and for the profile), or a
        precision target each pair meets; with the shared sample, points of
        that one sample, or a precision target every pair (and every profile
        column) meets.
    seed : int or SeedSequence, optional
        Root seed; pair ``(i, j)`` samples from the stream keyed
        ``("overlap", 0, i, j)``, the profile from ``("overlap", 1)``, the
        shared sample from ``("overlap", 2)``.
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
        Worker processes (None: every usable core).  Per-pair sampling shares
        the pairs (and the profile) among them; the shared sample, with a
        fixed number of points and no time limit, is cut into spans of
        stream positions whose integer counts are added.  A shared sample
        under a tolerance or a time limit runs in this process, since its
        stop is decided chunk by chunk, in order.  Rows are identical, bit
        for bit, for any number (:func:`~areamc.parallel.map_ordered`).
    pair_sampling : str
        :data:`SHARED`, :data:`PER_PAIR` or :data:`AUTO` (see :func:`pair_sampling_for`).
    progress : callable, optional
        ``progress(done, total, unit, note)`` (:data:`~areamc.parallel.JobProgress`): per-pair
        sampling counts pairs (``"pair"``) as each finishes, in pair order; the shared sample counts
        its points (``"pt"``) per chunk, or per span with several workers.  The notes name the pair
        just finished (``"A x B"``) or the step running (``"exact intersection areas"``,
        ``"multiplicity profile"``, ``"exact profile"``).  It never changes a result.

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
    method = pair_sampling_for(pair_sampling, stop)
    root = make_seed(seed)
    streams = job_root(root, "overlap")
    other = a if b is None else b
    pairs = candidate_pairs(a, b)
    n_pairs = int(pairs.shape[1])
    with_profile = profile and b is None
    if method == SHARED:  # the bar counts the shared sample's points (none when there is nothing to count)
        total = 0 if not n_pairs and not with_profile else None if stop.adaptive else stop.points
        meter = JobMeter(progress, total, "pt")
    else:
        meter = JobMeter(progress, n_pairs, "pair")
    meter(0)
    area_a = planar_area(a.planar)
    area_b = planar_area(other.planar)
    exact_pairs = _exact_pairs(a.planar, other.planar, pairs, meter) if exact and pairs.size else None
    shapely.prepare(a.planar)
    shapely.prepare(other.planar)
    job = _OverlapJob(a, other, pairs, area_a, area_b, exact_pairs, stop, confidence, streams, sampler, chunk,
                      min_share, exact, exact_time_limit_s)
    info = RunInfo("overlap", a.plane, confidence, int(root.entropy), sampler_name(sampler), stop, a.densify_m)
    if method == SHARED:
        rows, kept, multiplicity, exact_profile = _shared(job, b is None, with_profile, workers, meter)
        return OverlapReport(tuple(rows), tuple(kept), multiplicity, int(pairs.shape[1]), info, exact_profile, SHARED)
    # the profile, one estimate over every zone, goes first so that it does not run alone at the end
    items = ([_PROFILE_ITEM] if with_profile else []) + list(range(pairs.shape[1]))
    if with_profile:
        meter(0, "multiplicity profile")
    job = replace(job, meter=meter.here(workers, len(items)))  # steps inside an item are reported from here only

    def label(k: int) -> str:
        if items[k] == _PROFILE_ITEM:
            return "multiplicity profile"
        i, j = (int(v) for v in pairs[:, items[k]])
        return f"{a.ids[i]} x {other.ids[j]}"

    results = map_ordered(_overlap_item, items, workers, shared=job, done=meter.items(label, int(with_profile)))
    multiplicity: tuple[MultiplicityRow, ...] = ()
    exact_profile = NOT_ASKED
    if with_profile:
        (multiplicity, exact_profile), results = results[0], results[1:]
    kept_pairs = [result for result in results if result is not None]
    rows = [row for row, _ in kept_pairs]
    kept = [pair for _, pair in kept_pairs]
    return OverlapReport(tuple(rows), tuple(kept), multiplicity, int(pairs.shape[1]), info, exact_profile, PER_PAIR)


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
    #: Reports the steps of an item run in the calling process (None in worker processes).
    meter: JobMeter | None = None


#: Pairs per call of :func:`~areamc.exact.intersection_areas`, between two progress notes.
_EXACT_BLOCK = 4096


def _exact_pairs(planar_a, planar_b, pairs, meter: JobMeter) -> np.ndarray:
    """shapely's intersection area (m²) of every candidate pair, a block of pairs at a time (the areas are
    those of one call: each pair's is computed on its own)."""
    n = pairs.shape[1]
    parts = []
    for first in range(0, n, _EXACT_BLOCK):
        meter(0, f"exact intersection areas ({first:,} of {n:,} pairs)")
        block = pairs[:, first:first + _EXACT_BLOCK]
        parts.append(intersection_areas(planar_a[block[0]], planar_b[block[1]]))
    return np.concatenate(parts)


def _overlap_item(job: _OverlapJob, n: int):
    """Pair `n`: its row and ``(i, j)``, or None when it is not reported; or, for :data:`_PROFILE_ITEM`,
    the multiplicity profile and its exact status.  Runs in any process."""
    if n == _PROFILE_ITEM:
        return _profile(job.a, job.stop, job.confidence, job.streams, job.sampler, job.chunk, job.exact,
                        job.exact_time_limit_s, job.meter)
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
        feature_index_b=other.source.indices[j], estimate=est.estimate, std_error=est.std_error,
        ci_low=est.ci_low, ci_high=est.ci_high, share_a=share_a, share_b=share_b,
        points=est.points, hits=est.hits, box_area=est.box_area, exact_planar=planar,
        z=z, flagged=flagged(z), stop_reason=run.reason, pilot_points=run.pilot_points,
    )
    return row, (i, j)


def _profile(layer, stop, confidence, streams, sampler, chunk, exact, limit_s, meter=None):
    """Area covered by exactly / at least k zones, sampled in the layer's bounding box; `meter`, when the
    profile runs in the calling process, hears of its points and of the exact step (no pair done yet)."""
    box = Box.of(shapely.total_bounds(layer.planar))
    index = GridIndex(layer.planar, box)
    top = max(index.max_count, 1)
    ks = np.arange(1, top + 1)
    run = hit_or_miss(
        make_sampler(sampler, child_seed(streams, _PROFILE_STREAM), box),
        lambda x, y: index.counts(x, y)[:, None] >= ks[None, :],
        Stopper(stop, precision=area_precision(box.area, confidence)),
        chunk=chunk,
        progress=None if meter is None else lambda drawn, _est: meter(0, f"multiplicity profile: {drawn:,} pt"),
    )
    if meter is not None and exact:
        meter(0, "exact profile")
    exact_k, status = _exact_profile(layer, exact, limit_s)
    return _profile_rows(run.hits, run.points, box.area, ks, confidence, exact_k), status


def _exact_profile(layer, exact: bool, limit_s: float):
    """The exact exactly-k areas (m²) and their status, within `limit_s` seconds."""
    if not exact:
        return None, NOT_ASKED
    exact_k = multiplicity_areas(layer.planar, deadline=time.monotonic() + limit_s)
    return exact_k, COMPUTED if exact_k is not None else TIMED_OUT


def _profile_rows(column_hits, points: int, box_area: float, ks, confidence: float, exact_k) -> tuple:
    """Multiplicity rows from the hits of the at-least-k columns (`ks`) among `points` points in a box (m²)."""
    hits = [int(h) for h in column_hits] + [0]
    rows = []
    for n, k in enumerate(ks):
        if hits[n] == 0 and k > 1:
            break
        least = AreaEstimate.from_counts(hits[n], points, box_area, confidence)
        only = AreaEstimate.from_counts(hits[n] - hits[n + 1], points, box_area, confidence)
        exact_least = at_least(exact_k, int(k)) if exact_k is not None else None
        z = least.deviation(exact_least) if exact_least is not None else None
        rows.append(
            MultiplicityRow(
                k=int(k), area_exactly=only.estimate, area_exactly_ci_low=only.ci_low,
                area_exactly_ci_high=only.ci_high, area_at_least=least.estimate,
                area_at_least_std_error=least.std_error, area_at_least_ci_low=least.ci_low,
                area_at_least_ci_high=least.ci_high,
                area_exactly_exact=exact_k.get(int(k), 0.0) if exact_k is not None else None,
                area_at_least_exact=exact_least, z=z, flagged=flagged(z),
            )
        )
    return tuple(rows)


# -- the shared sample -------------------------------------------------------------------------------------------

def zone_pairs(point: np.ndarray, zone: np.ndarray, n_points: int,
               per_point: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Every pair of zones that hold one point, from (point, zone) hits: ``(lower, higher)`` zone indices.

    `point` and `zone` are the hits of :meth:`~areamc.classify.GridIndex.pairs`
    (each (point, zone) once); a point in m zones gives its m(m − 1)/2 pairs,
    so a pair appears once per point the two zones share.  Vectorised: the
    hits of points in two zones or more are sorted by (point, zone), and each
    hit is paired with the hits after it in its point's run.  `per_point`,
    the zones holding each point (``bincount(point)``), may be passed when known.
    """
    point = np.asarray(point, dtype=np.int64)
    zone = np.asarray(zone, dtype=np.int64)
    if per_point is None:
        per_point = np.bincount(point, minlength=n_points)
    several = per_point[point] >= 2
    if not several.any():
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty
    width = int(zone.max()) + 1
    key = np.sort(point[several] * width + zone[several])
    pt, zn = np.divmod(key, width)
    size = per_point[pt]
    start = np.flatnonzero(np.concatenate([[True], pt[1:] != pt[:-1]]))  # first hit of each point's run
    rank = np.arange(pt.size) - np.repeat(start, np.diff(np.concatenate([start, [pt.size]])))
    after = size - 1 - rank  # partners later in the run
    first = np.repeat(np.arange(pt.size), after)
    step = np.arange(first.size) - np.repeat(np.cumsum(after) - after, after) + 1
    return zn[first], zn[first + step]


@dataclass(frozen=True)
class _SharedCount:
    """What counting the shared sample needs (sent once to each worker process; plane metres).

    `index` holds the zones counted; `left` and `right` map an index zone to
    its position in the first and in the other layer (-1 where it is not in
    that layer); `codes` are the candidate pairs ``i * n_other + j``, sorted;
    `ks` the at-least-k columns (the profile's, or ``[1]``).  `table`, when
    the index holds at most :data:`_TABLE_ZONES` zones, gives the candidate
    number of each pair of index zones ``lo * len(left) + hi`` (-1 for
    none), which is faster than searching `codes` (2,000 zones of mean
    cover 4, 4 M points: 4.9 s of counting against 6.8 s, by cProfile).
    """

    index: GridIndex
    left: np.ndarray
    right: np.ndarray
    n_other: int
    codes: np.ndarray
    ks: np.ndarray
    table: np.ndarray | None

    @classmethod
    def build(cls, index: GridIndex, left: np.ndarray, right: np.ndarray, n_other: int, codes: np.ndarray,
              ks: np.ndarray) -> "_SharedCount":
        table = None
        n = len(left)
        if n <= _TABLE_ZONES and len(codes):
            # candidate (i, j) back to index zones: positions of i in `left` and of j in `right`
            where_left = np.full(int(left.max()) + 1, -1, dtype=np.int64)
            where_left[left[left >= 0]] = np.flatnonzero(left >= 0)
            where_right = np.full(int(right.max()) + 1, -1, dtype=np.int64)
            where_right[right[right >= 0]] = np.flatnonzero(right >= 0)
            i, j = np.divmod(codes, n_other)
            table = np.full(n * n, -1, dtype=np.int32)
            table[where_left[i] * n + where_right[j]] = np.arange(len(codes), dtype=np.int32)
        return cls(index, left, right, n_other, codes, ks, table)

    def count(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Points (plane metres) in both zones of each candidate pair, and the at-least-k columns of every point."""
        point, zone = self.index.pairs(x, y)
        per_point = np.bincount(point, minlength=len(x))
        columns = per_point[:, None] >= self.ks[None, :]
        counts = np.zeros(len(self.codes), dtype=np.int64)
        lo, hi = zone_pairs(point, zone, len(x), per_point)
        if not lo.size or not len(self.codes):
            return counts, columns
        if self.table is not None:
            at = self.table[lo * len(self.left) + hi]
            at = at[at >= 0]
        else:
            lo, hi = self.left[lo], self.right[hi]
            keep = (lo >= 0) & (hi >= 0)
            code = lo[keep] * self.n_other + hi[keep]
            at = np.searchsorted(self.codes, code)
            found = at < len(self.codes)
            found[found] = self.codes[at[found]] == code[found]
            at = at[found]
        counts += np.bincount(at, minlength=len(self.codes))
        return counts, columns


#: Most zones in a shared sample's index for which pairs are looked up in a table (2,896² int32 entries: 32 MiB).
_TABLE_ZONES = 2896


class _Tally:
    """The engine's scoring function for the shared sample: it returns the at-least-k columns and keeps the
    pair counts (integers, exact in any order) beside them, started afresh for a final batch."""

    def __init__(self, state: _SharedCount) -> None:
        self.state = state
        self.counts = np.zeros(len(state.codes), dtype=np.int64)

    def __call__(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        counts, columns = self.state.count(x, y)
        self.counts += counts
        return columns

    def restart(self, size: int) -> int:
        """Between a pilot and its final batch: the final batch's counts start from zero."""
        self.counts[:] = 0
        return size


def _shared(job: _OverlapJob, one_layer: bool, with_profile: bool, workers: int, meter: JobMeter):
    """Every pair's row and the profile from one sample in the layer's box (for two layers, the
    intersection of their boxes): ``(rows, pairs, multiplicity, exact profile status)``.  `meter`
    counts the sample's points."""
    a, other, pairs, stop, confidence = job.a, job.other, job.pairs, job.stop, job.confidence
    n_pairs = pairs.shape[1]
    if not n_pairs and not with_profile:
        return [], [], (), NOT_ASKED
    box = Box.of(shapely.total_bounds(a.planar))
    if one_layer:
        used = np.arange(len(a.planar)) if with_profile else np.unique(pairs)
        zones, left, right = a.planar[used], used, used
    else:
        box = box.intersection(Box.of(shapely.total_bounds(other.planar)))  # holds every cross pair's overlap
        ua, ub = np.unique(pairs[0]), np.unique(pairs[1])
        zones = np.concatenate([a.planar[ua], other.planar[ub]])
        left = np.concatenate([ua, np.full(ub.size, -1)])
        right = np.concatenate([np.full(ua.size, -1), ub])
    index = GridIndex(zones, box, points=stop.points or GUESS_POINTS)
    ks = np.arange(1, max(index.max_count, 1) + 1) if with_profile else np.array([1])
    n_other = len(other.planar)
    state = _SharedCount.build(index, left.astype(np.int64), right.astype(np.int64), n_other,
                               (pairs[0] * n_other + pairs[1]).astype(np.int64), ks)
    seed = child_seed(job.streams, _SHARED_STREAM)
    if stop.adaptive or stop.time_s is not None or workers == 1:
        points, counts, hits, reason, pilot = _shared_run(state, make_sampler(job.sampler, seed, box), stop,
                                                          confidence, with_profile, job.chunk, meter)
    else:
        size = SPAN_UNIT * max(1, -(-stop.points // (4 * workers * SPAN_UNIT)))
        spans = [(first, min(size, stop.points - first)) for first in range(0, stop.points, size)]
        parts = map_ordered(_shared_span, spans, workers, shared=(state, job.sampler, seed, box, job.chunk, stop),
                            done=None if meter.progress is None else
                            lambda k, _part: meter(spans[k][0] + spans[k][1], "shared sample"))
        points, reason, pilot = stop.points, BUDGET, 0
        counts = np.sum([c for c, _ in parts], axis=0, dtype=np.int64)
        hits = np.sum([h for _, h in parts], axis=0, dtype=np.int64)
    rows, kept = _shared_rows(job, box, points, counts, reason, pilot)
    multiplicity, status = (), NOT_ASKED
    if with_profile:
        if job.exact:
            meter(points + pilot, "exact profile")
        exact_k, status = _exact_profile(a, job.exact, job.exact_time_limit_s)
        multiplicity = _profile_rows(hits, points, box.area, ks, confidence, exact_k)
    return rows, kept, multiplicity, status


def _shared_run(state: _SharedCount, sampler, stop: StopRule, confidence: float, with_profile: bool, chunk: int,
                meter: JobMeter | None = None):
    """One run of the engine over the shared sample: ``(points, pair counts, column hits, stop reason, pilot)``;
    `meter` hears of the points drawn (pilot included) after each chunk.

    A precision target is judged on every candidate pair's Wilson half-width
    (and on every profile column), all in the one box.
    """
    tally = _Tally(state)
    box_area = sampler.domain.area
    columns = area_precision(box_area, confidence)

    def precision(sums, sumsq, points):
        low, high = wilson_interval(tally.counts, points, confidence)
        pairs = zip((box_area * (high - low) / 2).tolist(), (box_area * tally.counts / points).tolist())
        return (columns(sums, sumsq, points) if with_profile else []) + list(pairs)

    report = None if meter is None or meter.progress is None else lambda drawn, *_: meter(drawn, "shared sample")
    run = accumulate(sampler.random, tally, Stopper(stop, precision=precision), chunk=chunk, on_final=tally.restart,
                     progress=report)
    return run.points, tally.counts, run.sums, run.reason, run.pilot_points


def _shared_span(shared, span) -> tuple[np.ndarray, np.ndarray]:
    """Pair counts and column hits of the stream positions ``first .. first + n`` of the shared sample (any process)."""
    state, kind, seed, box, chunk, stop = shared
    first, n = span
    sampler = make_sampler(kind, seed, box)
    sampler.fast_forward(first)
    tally = _Tally(state)
    run = accumulate(sampler.random, tally, Stopper(StopRule(points=n, point_cap=stop.point_cap)), chunk=chunk)
    return tally.counts, run.sums


def _shared_rows(job: _OverlapJob, box: Box, points: int, counts: np.ndarray, reason: str, pilot: int):
    """The rows of the pairs counted in the shared sample, and their ``(i, j)``, after `min_share`."""
    a, other, confidence = job.a, job.other, job.confidence
    z_all = None
    if job.exact_pairs is not None:
        z_all = np.atleast_1d(binomial_deviation(counts, points, job.exact_pairs / box.area))
    # every pair shares the points and the box, so pairs with the same count share their estimate
    estimates = {h: AreaEstimate.from_counts(h, points, box.area, confidence) for h in np.unique(counts).tolist()}
    rows, kept = [], []
    for n, (i, j) in enumerate(job.pairs.T.tolist()):
        est = estimates[int(counts[n])]
        share_a, share_b = float(est.estimate / job.area_a[i]), float(est.estimate / job.area_b[j])
        if max(share_a, share_b) < job.min_share:
            continue
        planar = float(job.exact_pairs[n]) if job.exact_pairs is not None else None
        z = float(z_all[n]) if z_all is not None else None
        rows.append(OverlapRow(
            id_a=a.ids[i], id_b=other.ids[j], feature_index_a=a.source.indices[i],
            feature_index_b=other.source.indices[j], estimate=est.estimate, std_error=est.std_error,
            ci_low=est.ci_low, ci_high=est.ci_high, share_a=share_a, share_b=share_b,
            points=est.points, hits=est.hits, box_area=est.box_area, exact_planar=planar,
            z=z, flagged=flagged(z), stop_reason=reason, pilot_points=pilot,
        ))
        kept.append((i, j))
    return rows, kept


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
