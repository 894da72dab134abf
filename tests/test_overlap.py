"""Tests of ``areamc.overlap``: pairwise overlaps and the multiplicity profile.

Every expected area is computed in this file with shapely 2 (GEOS) on the projected
``.planar`` geometries (m² of the equal-area plane areamc reports):

* pair overlaps: ``shapely.intersection(a, b).area``;
* the area covered by exactly k zones: from the areas S_j of all j-fold intersections by
  inclusion-exclusion, E_k = Σ_{j≥k} (−1)^(j−k) C(j, k) S_j (Jordan's formula; Feller 1968,
  *An Introduction to Probability Theory and Its Applications*, vol. 1, ch. IV §3 [memory]),
  and for three disks written out: E_3 = S_123, E_2 = ΣS_ij − 3 S_123,
  E_1 = ΣS_i − 2 ΣS_ij + 3 S_123;
* the union (at least one zone): ``shapely.union_all``.

Estimates are held to their Wilson intervals (Wilson 1927, JASA 22:209-212) at confidence
0.999 and to 4 standard errors (STYLE.md guideline 14; common practice), so that the
dozen-odd checks of one test fail by chance with probability of order 1%, at a fixed seed
never.  Test geometries are drawn in lon/lat near 45°N and projected with
``areamc.project.project_layers``.
"""

from __future__ import annotations

import itertools
import math
from statistics import NormalDist

import numpy as np
import pytest
import shapely
from shapely.geometry import Point, Polygon, box

from areamc.estimate import StopRule
from areamc.exact import multiplicity_areas
from areamc.load import layer_from_geometries
from areamc.overlap import candidate_pairs, estimate_overlaps
from areamc.project import project_layers
from areamc.zones import geodesic_circle, zones_from_points

CONF = 0.999

# --- test zones near 45 N (lon/lat degrees) -------------------------------------------------
BIG = box(10.00, 45.00, 10.40, 45.30)
NESTED = box(10.10, 45.10, 10.20, 45.20)  # inside BIG
#: A zone with a hole, overlapping BIG's east side; the hole is partly inside BIG.
HOLED = box(10.30, 45.05, 10.60, 45.25).difference(box(10.35, 45.10, 10.45, 45.20))
FAR = box(11.00, 45.00, 11.10, 45.10)  # disjoint from everything
#: Facility points that become geodesic circles of 10 km (zones from points with radii).
FACILITIES = [Point(10.50, 45.30), Point(10.62, 45.30)]


def circles(points, radius_m: float):
    layer = layer_from_geometries(points, "EPSG:4326", kind="point")
    return list(zones_from_points(layer, radius_m=radius_m).geometries)


def project(*groups):
    """Project groups of (ids, lon/lat geoms) onto one plane; returns ProjectedLayers."""
    layers = [layer_from_geometries(geoms, "EPSG:4326", ids=ids, name=f"g{n}") for n, (ids, geoms) in enumerate(groups)]
    return project_layers(layers)


@pytest.fixture(scope="module")
def mixed():
    """Nested, identical, holed, disjoint zones and circles from points, in one layer."""
    ids = ["big", "big_copy", "nested", "holed", "far", "k1", "k2"]
    geoms = [BIG, BIG, NESTED, HOLED, FAR, *circles(FACILITIES, 10_000.0)]
    (layer,) = project((ids, geoms))
    return layer


@pytest.fixture(scope="module")
def mixed_report(mixed):
    return estimate_overlaps(mixed, stop=StopRule(points=40_000), confidence=CONF, seed=20260315)


def exact_pairs(a, b=None) -> dict[tuple[str, str], float]:
    """Every pair with an overlap of positive area, and that area, by shapely."""
    out = {}
    if b is None:
        for i, j in itertools.combinations(range(len(a)), 2):
            area = shapely.intersection(a.planar[i], a.planar[j]).area
            if area > 0:
                out[(a.ids[i], a.ids[j])] = area
    else:
        for i in range(len(a)):
            for j in range(len(b)):
                area = shapely.intersection(a.planar[i], b.planar[j]).area
                if area > 0:
                    out[(a.ids[i], b.ids[j])] = area
    return out


def exactly_k_by_inclusion_exclusion(zones) -> dict[int, float]:
    """E_k = Σ_{j≥k} (−1)^(j−k) C(j,k) S_j, S_j the summed areas of all j-fold intersections."""
    n = len(zones)
    s = [0.0] * (n + 1)
    for j in range(1, n + 1):
        for subset in itertools.combinations(zones, j):
            s[j] += shapely.intersection_all(list(subset)).area
    return {k: sum((-1) ** (j - k) * math.comb(j, k) * s[j] for j in range(k, n + 1)) for k in range(1, n + 1)}


def within(estimate, low, high, exact, stderr):
    return low <= exact <= high and abs(estimate - exact) <= 4 * stderr


# --- pairs -----------------------------------------------------------------------------------


def test_candidate_pairs__sorted_index_pairs_of_meeting_zones(mixed):
    pairs = candidate_pairs(mixed)
    assert pairs.shape[0] == 2
    assert np.all(pairs[0] < pairs[1])
    assert [tuple(p) for p in pairs.T] == sorted(tuple(p) for p in pairs.T)
    expected = {(i, j) for i, j in itertools.combinations(range(len(mixed)), 2)
                if shapely.intersects(mixed.planar[i], mixed.planar[j])
                and not shapely.touches(mixed.planar[i], mixed.planar[j])}
    assert {tuple(map(int, p)) for p in pairs.T} == expected


def test_overlaps__pairs_are_exactly_those_shapely_finds(mixed, mixed_report):
    expected = exact_pairs(mixed)
    assert {(r.id_a, r.id_b) for r in mixed_report.rows} == set(expected)
    assert ("big", "nested") in expected and ("big", "big_copy") in expected and ("holed", "k1") in expected
    assert not any("far" in pair for pair in expected)  # the disjoint zone pairs with nothing


def test_overlaps__estimates_within_intervals_of_shapely_intersections(mixed, mixed_report):
    expected = exact_pairs(mixed)
    areas = dict(zip(mixed.ids, shapely.area(mixed.planar)))
    for row in mixed_report.rows:
        exact = expected[(row.id_a, row.id_b)]
        assert within(row.estimate, row.ci_low, row.ci_high, exact, row.stderr), row
        assert row.exact_planar == pytest.approx(exact, rel=1e-9)
        assert row.share_a == pytest.approx(row.estimate / areas[row.id_a], rel=1e-12)
        assert row.share_b == pytest.approx(row.estimate / areas[row.id_b], rel=1e-12)
        # z: the deviation from shapely's area in units of (at least) the standard error
        diff = row.estimate - exact
        assert np.sign(row.z) == np.sign(diff) and abs(row.z) <= abs(diff) / row.stderr + 1e-9
        assert not row.flagged
        assert row.points == 40_000


def test_overlaps__nested_and_identical_zones(mixed, mixed_report):
    rows = {(r.id_a, r.id_b): r for r in mixed_report.rows}
    area = dict(zip(mixed.ids, shapely.area(mixed.planar)))
    # nested: the overlap is the inner zone, its share of the inner zone is 1 within error
    nested = rows[("big", "nested")]
    assert within(nested.estimate, nested.ci_low, nested.ci_high, area["nested"], nested.stderr)
    assert abs(nested.share_b - 1) <= 4 * nested.stderr / area["nested"]
    # identical: the overlap is the whole zone; both shares are 1 within error
    same = rows[("big", "big_copy")]
    assert within(same.estimate, same.ci_low, same.ci_high, area["big"], same.stderr)
    assert abs(same.share_a - 1) <= 4 * same.stderr / area["big"]


def test_overlaps__holed_zone_overlap_excludes_the_hole(mixed, mixed_report):
    row = next(r for r in mixed_report.rows if (r.id_a, r.id_b) == ("big", "holed"))
    i, j = mixed.ids.index("big"), mixed.ids.index("holed")
    exact = shapely.intersection(mixed.planar[i], mixed.planar[j]).area
    shell_only = shapely.intersection(mixed.planar[i], Polygon(mixed.planar[j].exterior)).area
    assert shell_only - exact > 10 * row.stderr  # the hole matters at this precision ...
    assert within(row.estimate, row.ci_low, row.ci_high, exact, row.stderr)  # ... and is left out


def test_overlaps__disjoint_zones_give_no_pairs():
    (layer,) = project((["a", "b", "c"], [BIG, FAR, box(12.0, 45.0, 12.1, 45.1)]))
    report = estimate_overlaps(layer, stop=StopRule(points=20_000), confidence=CONF, seed=1)
    assert report.rows == () and report.pairs == () and report.candidates == 0
    # the profile is then the union only: k = 1 and nothing covered twice
    assert [m.k for m in report.multiplicity] == [1]
    (k1,) = report.multiplicity
    union = shapely.union_all(layer.planar).area
    assert within(k1.at_least, k1.at_least_ci_low, k1.at_least_ci_high, union, k1.at_least_stderr)
    assert k1.exact_at_least == pytest.approx(union, rel=1e-9)


def test_overlaps__zones_that_only_touch_are_not_overlapping_pairs():
    """Edge-sharing boxes and corner-touching diamonds: shapely's intersection area is 0.

    (The diamonds are dropped already, because their bounding boxes only touch; the shared
    edge of the boxes is curved in the plane, so their bounding boxes overlap in a sliver.)
    """
    west, east = box(10.0, 45.0, 10.1, 45.1), box(10.1, 45.0, 10.2, 45.1)
    d1 = Polygon([(10.3, 45.0), (10.4, 45.1), (10.5, 45.0), (10.4, 44.9)])
    d2 = Polygon([(10.5, 45.0), (10.6, 45.1), (10.7, 45.0), (10.6, 44.9)])
    (layer,) = project((["w", "e", "d1", "d2"], [west, east, d1, d2]))
    assert exact_pairs(layer) == {}  # shapely: no pair overlaps in a region of positive area
    report = estimate_overlaps(layer, stop=StopRule(points=5_000), seed=2, profile=False)
    assert report.rows == ()


def test_overlaps__two_layers_give_cross_pairs_only():
    a, b = project((["big", "nested"], [BIG, NESTED]),
                   (["holed", "k1", "k2", "far"], [HOLED, *circles(FACILITIES, 10_000.0), FAR]))
    report = estimate_overlaps(a, b, stop=StopRule(points=40_000), confidence=CONF, seed=7)
    expected = exact_pairs(a, b)
    assert {(r.id_a, r.id_b) for r in report.rows} == set(expected) == {("big", "holed"), ("big", "k1")}
    area_a = dict(zip(a.ids, shapely.area(a.planar)))
    area_b = dict(zip(b.ids, shapely.area(b.planar)))
    for row in report.rows:
        exact = expected[(row.id_a, row.id_b)]
        assert within(row.estimate, row.ci_low, row.ci_high, exact, row.stderr)
        assert row.share_a == pytest.approx(row.estimate / area_a[row.id_a], rel=1e-12)
        assert row.share_b == pytest.approx(row.estimate / area_b[row.id_b], rel=1e-12)
    assert report.multiplicity == ()  # no profile across two layers


def test_overlaps__min_share_drops_small_pairs_only(mixed, mixed_report):
    threshold = 0.3
    kept = estimate_overlaps(mixed, stop=StopRule(points=40_000), confidence=CONF, seed=20260315,
                             min_share=threshold, profile=False)
    expected = [r for r in mixed_report.rows if max(r.share_a, r.share_b) >= threshold]
    assert 0 < len(expected) < len(mixed_report.rows)  # the threshold really splits the rows
    assert kept.rows == tuple(expected)  # per-pair streams: same points, same numbers


def test_overlaps__chunk_size_does_not_change_results(mixed, mixed_report):
    small = estimate_overlaps(mixed, stop=StopRule(points=40_000), confidence=CONF, seed=20260315, chunk=3_000)
    assert small.rows == mixed_report.rows
    assert small.multiplicity == mixed_report.multiplicity


def test_overlaps__precision_target_met_before_the_cap(mixed):
    stop = StopRule(points=None, relative=0.03, max_points=2_000_000)
    report = estimate_overlaps(mixed, stop=stop, seed=4, chunk=4_096, profile=False)
    expected = exact_pairs(mixed)
    for row in report.rows:
        assert row.points < stop.max_points
        assert (row.ci_high - row.ci_low) / 2 <= 0.03 * row.estimate
        assert abs(row.estimate - expected[(row.id_a, row.id_b)]) <= 4 * row.stderr


def test_overlaps__no_exact_leaves_references_empty(mixed):
    report = estimate_overlaps(mixed, stop=StopRule(points=2_000), seed=5, exact=False)
    assert all(r.exact_planar is None and r.z is None for r in report.rows)
    assert all(m.exact_exactly is None and m.exact_at_least is None for m in report.multiplicity)
    assert report.exact_profile == "not asked"


# --- multiplicity profile ----------------------------------------------------------------------


def three_disks():
    """Three 15 km geodesic circles whose centres are about 19.5 km apart: every pair and the
    triple overlap (centroid about 11 km from each centre)."""
    return [geodesic_circle(lon, lat, 15_000.0) for lon, lat in ((10.0, 45.0), (10.25, 45.0), (10.125, 45.15))]


def test_multiplicity__three_disks_against_inclusion_exclusion():
    (layer,) = project((["d1", "d2", "d3"], three_disks()))
    d = list(layer.planar)
    s1 = sum(z.area for z in d)
    s2 = sum(shapely.intersection(a, b).area for a, b in itertools.combinations(d, 2))
    s3 = shapely.intersection_all(d).area
    assert s3 > 0.05 * s1 / 3  # a real triple overlap
    exact = {3: s3, 2: s2 - 3 * s3, 1: s1 - 2 * s2 + 3 * s3}
    at_least = {1: exact[1] + exact[2] + exact[3], 2: exact[2] + exact[3], 3: exact[3]}
    assert at_least[1] == pytest.approx(shapely.union_all(d).area, rel=1e-9)  # sanity of the formula

    # areamc's exact arrangement agrees with inclusion-exclusion
    arrangement = multiplicity_areas(layer.planar)
    assert set(arrangement) == {1, 2, 3}
    for k in (1, 2, 3):
        assert arrangement[k] == pytest.approx(exact[k], rel=1e-7)

    report = estimate_overlaps(layer, stop=StopRule(points=400_000), confidence=CONF, seed=99)
    assert [m.k for m in report.multiplicity] == [1, 2, 3]
    assert report.exact_profile == "computed"
    for m in report.multiplicity:
        se_exactly = math.sqrt(m.exactly * (report_box_area(layer) - m.exactly) / 400_000)
        assert m.exactly_ci_low <= exact[m.k] <= m.exactly_ci_high, m
        assert abs(m.exactly - exact[m.k]) <= 4 * se_exactly
        assert within(m.at_least, m.at_least_ci_low, m.at_least_ci_high, at_least[m.k], m.at_least_stderr), m
        assert m.exact_exactly == pytest.approx(exact[m.k], rel=1e-7)
        assert m.exact_at_least == pytest.approx(at_least[m.k], rel=1e-7)


def report_box_area(layer) -> float:
    """Area of the bounding box of all zones (the profile's sampling box), m²."""
    x0, y0, x1, y1 = shapely.total_bounds(layer.planar)
    return (x1 - x0) * (y1 - y0)


def test_multiplicity__mixed_zones_against_inclusion_exclusion(mixed, mixed_report):
    exact = exactly_k_by_inclusion_exclusion(list(mixed.planar))
    top = max(k for k, v in exact.items() if v > 1e-6 * exact[1])
    assert top == 4  # big, big_copy, holed and k1 meet in one corner
    arrangement = multiplicity_areas(mixed.planar)
    for k in range(1, top + 1):
        assert arrangement.get(k, 0.0) == pytest.approx(exact[k], rel=1e-7, abs=1e-3)
    profile = {m.k: m for m in mixed_report.multiplicity}
    # rows run from k = 1 up to the last k that got a hit; 40 000 points in a 1.1 x 0.5 degree box
    # give about one expected hit on the 0.15 km² covered four times, so k = 4 may be missing
    assert set(range(1, 4)) <= set(profile) <= set(range(1, top + 1))
    for k, m in profile.items():
        least = sum(v for j, v in exact.items() if j >= k)
        assert within(m.at_least, m.at_least_ci_low, m.at_least_ci_high, least, m.at_least_stderr), m
        assert m.exactly_ci_low <= exact[k] <= m.exactly_ci_high, m
    # a k without rows had no hits: its area must fit under the 0-hit Wilson upper bound
    # z²/(n + z²) of the box (Wilson 1927)
    z = NormalDist().inv_cdf(0.5 + CONF / 2)
    for k in set(range(1, top + 1)) - set(profile):
        assert exact[k] <= report_box_area(mixed) * z * z / (40_000 + z * z)


def test_multiplicity_areas__clip_keeps_only_the_inside():
    """Clipped to a box: each exactly-k area equals the unclipped one of the zones cut by the box."""
    (layer,) = project((["d1", "d2", "d3", "clip"], [*three_disks(), box(10.05, 44.95, 10.2, 45.2)]))
    zones, clip = list(layer.planar[:3]), layer.planar[3]
    expected = exactly_k_by_inclusion_exclusion([shapely.intersection(z, clip) for z in zones])
    got = multiplicity_areas(zones, clip=clip)
    for k in (1, 2, 3):
        assert got[k] == pytest.approx(expected[k], rel=1e-7)


def test_multiplicity_areas__nested_identical_and_holed():
    (layer,) = project((["big", "copy", "nested", "holed"], [BIG, BIG, NESTED, HOLED]))
    expected = exactly_k_by_inclusion_exclusion(list(layer.planar))
    got = multiplicity_areas(layer.planar)
    assert set(got) == {k for k, v in expected.items() if v > 1e-3}
    for k, v in got.items():
        assert v == pytest.approx(expected[k], rel=1e-7)
