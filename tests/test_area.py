"""Tests of areamc.area: per-feature estimates against exact planar (shapely) and geodesic
(pyproj.Geod) areas, reproducibility and stopping.

The deviation ``z`` of a hit-or-miss row is checked against the two-sided mid-p binomial tail
(Lancaster 1961, JASA 56:223-234) written out in this file with scipy.stats.binom.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from shapely.geometry import Polygon

from areamc.area import estimate_areas
from areamc.errors import AreamcWarning
from areamc.stopping import StopRule

from conftest import CONCAVE, HOLED, MULTI, mid_p_z

IDS = ["concave", "holed", "multi"]
SOURCES = dict(zip(IDS, [CONCAVE, HOLED, MULTI]))


def wilson_half_width(hits: int, n: int, confidence: float) -> float:
    """Half-width of the Wilson (1927) interval of hits / n, by scipy.stats.binomtest."""
    ci = stats.binomtest(hits, n).proportion_ci(confidence_level=confidence, method="wilson")
    return (ci.high - ci.low) / 2


def shapely_area(projected, fid):
    """Reference: shapely's own area of the feature in the plane (GEOS), outside areamc."""
    return projected.planar[projected.ids.index(fid)].area


def test_estimate_areas__within_interval_of_exact(small_features, reference_geodesic_area):
    report = estimate_areas(small_features, stop=StopRule(points=200_000), seed=2024)
    assert [r.id for r in report.rows] == IDS
    for row in report.rows:
        exact = shapely_area(small_features, row.id)
        assert row.exact_planar == pytest.approx(exact, rel=1e-12)
        # The 95% interval holds the exact area for this fixed seed, and the deviation is within
        # 4 standard errors (tolerance tied to the reported standard error, common practice).
        assert row.ci_low <= exact <= row.ci_high, row
        assert abs(row.estimate - exact) <= 4 * row.std_error
        assert math.isfinite(row.z) and not row.flagged
        # z: the mid-p binomial score of the hit count at p0 = exact / box (Lancaster 1961).
        assert row.z == pytest.approx(mid_p_z(row.hits, row.points, exact / row.box_area), rel=1e-9, abs=1e-12)
        # it has the sign of the deviation and, in the normal range, is close to it in standard errors
        assert np.sign(row.z) == np.sign(row.estimate - exact)
        assert row.z == pytest.approx((row.estimate - exact) / row.std_error, abs=0.05)
        # Bookkeeping: box = the feature's bounding box in the plane; estimate = box * h / n.
        minx, miny, maxx, maxy = small_features.planar[small_features.ids.index(row.id)].bounds
        assert row.box_area == pytest.approx((maxx - minx) * (maxy - miny), rel=1e-12)
        assert row.points == 200_000 and row.stop_reason == "budget" and row.pilot_points == 0
        assert row.estimate == pytest.approx(row.box_area * row.hits / row.points, rel=1e-12)
        # Geodesic check column: pyproj.Geod (Karney 2013) on the source polygon densified by the
        # test itself, rel 1e-6; holes count negative whatever their orientation in the input.
        assert row.geodesic == pytest.approx(reference_geodesic_area(SOURCES[row.id], 1000), rel=1e-6)
        assert row.exact_planar == pytest.approx(row.geodesic, rel=1e-6)


def test_estimate_areas__holes_are_excluded(small_features):
    # The exact area of the holed polygon is its shell's area minus its holes' (shapely).
    holed = small_features.planar[1]
    shell = Polygon(holed.exterior).area
    holes = sum(Polygon(r).area for r in holed.interiors)
    report = estimate_areas(small_features, stop=StopRule(points=100_000), seed=7)
    row = report.rows[1]
    assert row.exact_planar == pytest.approx(shell - holes, rel=1e-12)
    assert row.ci_high < shell - 0.5 * holes  # the holes are clearly missed by the points


def test_estimate_areas__coverage__concave_polygon(project):
    # End-to-end coverage of the 95% interval over R = 1000 seeds at n = 1000 points on the
    # concave polygon against shapely's exact area. Fail below binom.ppf(1e-3, R, 0.95) = 927
    # (binomial band on the coverage count, common practice).
    projected = project([CONCAVE])
    exact = projected.planar[0].area
    R = 1000
    covered = 0
    for seed in range(R):
        row = estimate_areas(projected, stop=StopRule(points=1000), seed=seed, exact=False).rows[0]
        covered += row.ci_low <= exact <= row.ci_high
    assert covered >= stats.binom.ppf(1e-3, R, 0.95), covered
    assert covered <= stats.binom.isf(1e-3, R, 0.95), covered


def test_estimate_areas__chunk_size_does_not_change_results(small_features):
    # 150 001 points is not a multiple of any chunk size (nor of the sampler's block).
    reports = [
        estimate_areas(small_features, stop=StopRule(points=150_001), seed=99, chunk=chunk)
        for chunk in (1000, 65536, 100_000)
    ]
    first = [r.to_dict() for r in reports[0].rows]
    for other in reports[1:]:
        assert [r.to_dict() for r in other.rows] == first
    assert all(r["points"] == 150_001 for r in first)


def test_estimate_areas__seeds(small_features, project):
    stop = StopRule(points=20_000)
    a = estimate_areas(small_features, stop=stop, seed=5)
    b = estimate_areas(small_features, stop=stop, seed=5)
    c = estimate_areas(small_features, stop=stop, seed=6)
    assert a.rows == b.rows
    assert [r.hits for r in a.rows] != [r.hits for r in c.rows]
    assert a.run.seed_entropy == 5
    # Feature i samples from the stream keyed ("area", i) of the seed: a feature's result does not
    # depend on the features after it (on the same plane: a lone feature would get a plane of its own).
    alone = estimate_areas(project([CONCAVE], ids=["concave"], plane=small_features.plane), stop=stop, seed=5)
    assert alone.rows[0] == a.rows[0]
    # ... and a feature's stream is its index, not its geometry: the same feature at index 1 differs
    swapped = estimate_areas(project([HOLED, CONCAVE], ids=["holed", "concave"], plane=small_features.plane),
                             stop=stop, seed=5)
    assert swapped.rows[1].exact_planar == a.rows[0].exact_planar
    assert swapped.rows[1].hits != a.rows[0].hits
    # A run without a seed records entropy that replays it.
    fresh = estimate_areas(small_features, stop=stop, seed=None)
    assert estimate_areas(small_features, stop=stop, seed=fresh.run.seed_entropy).rows == fresh.rows


def test_estimate_areas__exact_false__no_checks(small_features):
    stop = StopRule(points=10_000)
    without = estimate_areas(small_features, stop=stop, seed=3, exact=False)
    with_checks = estimate_areas(small_features, stop=stop, seed=3, exact=True)
    for row, full in zip(without.rows, with_checks.rows):
        assert row.exact_planar is None and row.geodesic is None and row.z is None
        assert row.flagged is False
        assert (row.estimate, row.hits, row.ci_low, row.ci_high) == (full.estimate, full.hits, full.ci_low, full.ci_high)


@pytest.mark.parametrize(
    "stop",
    [StopRule(points=None, relative=0.005, max_points=2_000_000), StopRule(points=None, absolute=1e7, max_points=2_000_000)],
    ids=["relative", "absolute_m2"],
)
def test_estimate_areas__tolerance__two_stage_meets_target(small_features, stop):
    """A precision target runs a pilot, then a fresh final batch sized from the pilot.

    The rule re-derived here (two-stage sampling, Stein 1945, Ann. Math. Statist. 16:243-258): the
    pilot ends at the first chunk whose Wilson half-width is within 2x the target, the final batch
    has max(1000, ceil(pilot x (pilot half-width / target)²)) points (a half-width falls as 1/sqrt(n),
    common practice), and the estimate comes from the final batch alone, drawn from the stream
    positions after the pilot.  The pilot is replayed here by a fixed-count run of the same seed.
    """
    chunk = 8192
    report = estimate_areas(small_features, stop=stop, seed=11, chunk=chunk)
    conf = report.run.confidence
    for row in report.rows:
        assert row.stop_reason == "target"
        assert 0 < row.pilot_points < stop.max_points // 2 and row.pilot_points % chunk == 0
        assert row.pilot_points + row.points <= stop.max_points
        # the final half-width is near the target: random, so it may exceed it by a few percent
        half_width = (row.ci_high - row.ci_low) / 2
        target = stop.absolute if stop.absolute is not None else stop.relative * row.estimate
        assert half_width <= 1.3 * target
        # within 4 standard errors of shapely's area (six 95% intervals would all hold it only 74% of
        # the time; 4 standard errors is the tool's own flag band, common practice)
        assert abs(row.estimate - row.exact_planar) <= 4 * row.std_error and not row.flagged
        # replay the pilot: the first pilot_points points of the feature's stream, same seed
        i = report.rows.index(row)
        pilot = estimate_areas(small_features, stop=StopRule(points=row.pilot_points), seed=11).rows[i]
        pilot_hw = row.box_area * wilson_half_width(pilot.hits, pilot.points, conf)
        pilot_target = stop.absolute if stop.absolute is not None else stop.relative * pilot.estimate
        assert pilot_hw <= 2 * pilot_target
        if row.pilot_points > chunk:  # one chunk earlier the pilot had not met 2x the target
            before = estimate_areas(small_features, stop=StopRule(points=row.pilot_points - chunk), seed=11).rows[i]
            before_target = stop.absolute if stop.absolute is not None else stop.relative * before.estimate
            assert row.box_area * wilson_half_width(before.hits, before.points, conf) > 2 * before_target
        need = math.ceil(row.pilot_points * (pilot_hw / pilot_target) ** 2)
        assert abs(row.points - max(need, 1000)) <= 1
        # the final batch is the stream after the pilot: pilot + final = a fixed run of both
        both = estimate_areas(small_features, stop=StopRule(points=row.pilot_points + row.points), seed=11).rows[i]
        assert both.hits == pilot.hits + row.hits
    assert len({r.pilot_points + r.points for r in report.rows}) > 1  # each feature stops on its own


def test_estimate_areas__interval_is_wilson_of_counts(small_features):
    # Reference: scipy.stats.binomtest(...).proportion_ci(method="wilson"), scaled by the box area.
    for confidence in (0.9, 0.99):
        row = estimate_areas(small_features, stop=StopRule(points=5000), seed=1, confidence=confidence).rows[2]
        ref = stats.binomtest(row.hits, row.points).proportion_ci(confidence_level=confidence, method="wilson")
        assert row.ci_low == pytest.approx(row.box_area * ref.low, rel=1e-12)
        assert row.ci_high == pytest.approx(row.box_area * ref.high, rel=1e-12)


def test_estimate_areas__trace(small_features):
    report = estimate_areas(small_features, stop=StopRule(points=10_000), seed=4, chunk=3000, trace_every=2500)
    assert len(report.traces) == len(report.rows)  # one trace per row, in row order
    for row, trace in zip(report.rows, report.traces):
        assert [t.points for t in trace] == [2500, 5000, 7500, 10_000]
        assert trace[-1].sums == (row.hits,)
        assert all(np.diff([t.sums[0] for t in trace]) >= 0)
    assert estimate_areas(small_features, stop=StopRule(points=1000), seed=4).traces == ()


@pytest.mark.parametrize(
    "stop", [StopRule(points=12_345), StopRule(points=None, relative=0.01, max_points=2_000_000)],
    ids=["points", "tolerance"],
)
def test_trace_rows__end_on_each_rows_estimate_even_with_shared_ids(project, stop):
    # Two features share the id "twin": the trace rows must still follow the rows one by one.
    with pytest.warns(AreamcWarning, match="duplicate ids: 'twin'"):  # kept, as layer_from_geometries allows
        layer = project([CONCAVE, HOLED, MULTI], ids=["twin", "twin", "multi"])
    report = estimate_areas(layer, stop=stop, seed=8, chunk=4096, trace_every=3000)
    trace_rows = report.trace_rows()
    assert len(trace_rows) == sum(len(t) for t in report.traces)
    start = 0
    for row, trace in zip(report.rows, report.traces):
        mine = trace_rows[start:start + len(trace)]
        start += len(trace)
        assert {t.id for t in mine} == {row.id}
        assert [t.points for t in mine] == [t.points for t in trace]
        assert [t.hits for t in mine] == [t.sums[0] for t in trace]
        last = mine[-1]
        assert (last.points, last.hits) == (row.points, row.hits)
        assert (last.estimate, last.std_error) == (row.estimate, row.std_error)
        assert (last.ci_low, last.ci_high) == (row.ci_low, row.ci_high)
        for t in mine:
            # hit-or-miss estimate B h / n (common practice) and its Wilson interval, by scipy.stats.binomtest
            assert t.estimate == pytest.approx(row.box_area * t.hits / t.points, rel=1e-12)
            ref = stats.binomtest(t.hits, t.points).proportion_ci(confidence_level=report.run.confidence,
                                                                  method="wilson")
            assert t.ci_low == pytest.approx(row.box_area * ref.low, rel=1e-9)
            assert t.ci_high == pytest.approx(row.box_area * ref.high, rel=1e-9)
    # the twins are different features: their traces differ
    assert report.rows[0].exact_planar != report.rows[1].exact_planar
    assert [t.hits for t in trace_rows if t.id == "twin"][-1] == report.rows[1].hits
