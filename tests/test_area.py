"""Tests of areamc.area: per-feature estimates against exact planar (shapely) and geodesic
(pyproj.Geod) areas, reproducibility and stopping."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from shapely.geometry import Polygon

from areamc.area import estimate_areas
from areamc.estimate import StopRule

from conftest import CONCAVE, HOLED, MULTI

IDS = ["concave", "holed", "multi"]
SOURCES = dict(zip(IDS, [CONCAVE, HOLED, MULTI]))


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
        assert abs(row.estimate - exact) <= 4 * row.stderr
        assert math.isfinite(row.z) and not row.flagged
        assert row.z == pytest.approx((row.estimate - exact) / row.stderr, rel=1e-12)
        # Bookkeeping: box = the feature's bounding box in the plane; estimate = box * h / n.
        minx, miny, maxx, maxy = small_features.planar[small_features.ids.index(row.id)].bounds
        assert row.box_area == pytest.approx((maxx - minx) * (maxy - miny), rel=1e-12)
        assert row.points == 200_000 and not row.stopped_early
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
    # (REFERENCES.md §4, common practice).
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
    assert a.seed_entropy == 5
    # Feature i samples from child (i,) of the seed: a feature's result does not depend on the
    # features after it (on the same plane: a lone feature would get a plane of its own).
    alone = estimate_areas(project([CONCAVE], ids=["concave"], plane=small_features.plane), stop=stop, seed=5)
    assert alone.rows[0] == a.rows[0]
    # A run without a seed records entropy that replays it.
    fresh = estimate_areas(small_features, stop=stop, seed=None)
    assert estimate_areas(small_features, stop=stop, seed=fresh.seed_entropy).rows == fresh.rows


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
def test_estimate_areas__tolerance__stops_early_and_meets_target(small_features, stop):
    report = estimate_areas(small_features, stop=stop, seed=11, chunk=8192)
    for row in report.rows:
        half_width = (row.ci_high - row.ci_low) / 2
        target = stop.absolute if stop.absolute is not None else stop.relative * row.estimate
        assert row.stopped_early
        assert row.points < stop.max_points and row.points % 8192 == 0
        assert half_width <= target
        assert row.ci_low <= row.exact_planar <= row.ci_high and not row.flagged
    assert len({r.points for r in report.rows}) > 1  # each feature stops on its own


def test_estimate_areas__interval_is_wilson_of_counts(small_features):
    # Reference: scipy.stats.binomtest(...).proportion_ci(method="wilson"), scaled by the box area.
    for confidence in (0.9, 0.99):
        row = estimate_areas(small_features, stop=StopRule(points=5000), seed=1, confidence=confidence).rows[2]
        ref = stats.binomtest(row.hits, row.points).proportion_ci(confidence_level=confidence, method="wilson")
        assert row.ci_low == pytest.approx(row.box_area * ref.low, rel=1e-12)
        assert row.ci_high == pytest.approx(row.box_area * ref.high, rel=1e-12)


def test_estimate_areas__trace(small_features):
    report = estimate_areas(small_features, stop=StopRule(points=10_000), seed=4, chunk=3000, trace_every=2500)
    assert set(report.traces) == set(IDS)
    for row in report.rows:
        trace = report.traces[row.id]
        assert [t.points for t in trace] == [2500, 5000, 7500, 10_000]
        assert trace[-1].hits == (row.hits,)
        assert all(np.diff([t.hits[0] for t in trace]) >= 0)
    assert estimate_areas(small_features, stop=StopRule(points=1000), seed=4).traces == {}
