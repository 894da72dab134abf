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
never.  The deviation ``z`` of a row is checked against the two-sided mid-p binomial tail
(Lancaster 1961, JASA 56:223-234), written out here with scipy.stats.binom.  Test geometries
are drawn in lon/lat near 45°N and projected with ``areamc.project.project_layers``.
"""

from __future__ import annotations

import itertools
import math
from statistics import NormalDist

import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import Point, Polygon, box

from scipy import stats

from areamc.engine import DEFAULT_CHUNK
from areamc.errors import OptionError
from areamc.samplers import Box, make_sampler
from areamc.seeds import child_seed, job_root, make_seed
from areamc.stopping import StopRule
from areamc.exact import multiplicity_areas
from areamc.load import layer_from_geometries
from areamc.overlap import (AUTO, PER_PAIR, SHARED, candidate_pairs, estimate_overlaps, overlap_geometries,
                            pair_sampling_for, zone_pairs)
from areamc.project import project_layers
from areamc.zones import geodesic_circle, zones_from_points
from conftest import mid_p_z

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


@pytest.fixture(scope="module", params=[SHARED, PER_PAIR])
def mixed_report(request, mixed):
    """The mixed layer's report, from one shared sample (40,000 points) and from 40,000 points per pair."""
    return estimate_overlaps(mixed, stop=StopRule(points=40_000), confidence=CONF, seed=20260315,
                             pair_sampling=request.param)


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


def within(estimate, low, high, exact, std_error):
    return low <= exact <= high and abs(estimate - exact) <= 4 * std_error


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
        assert within(row.estimate, row.ci_low, row.ci_high, exact, row.std_error), row
        assert row.exact_planar == pytest.approx(exact, rel=1e-9)
        assert row.share_a == pytest.approx(row.estimate / areas[row.id_a], rel=1e-12)
        assert row.share_b == pytest.approx(row.estimate / areas[row.id_b], rel=1e-12)
        # z: the mid-p binomial score of the hits at p0 = shapely's area / box (Lancaster 1961)
        assert row.z == pytest.approx(mid_p_z(row.hits, row.points, exact / row.box_area), rel=1e-9, abs=1e-12)
        diff = row.estimate - exact
        assert diff == 0 or np.sign(row.z) == np.sign(diff)
        assert not row.flagged
        assert row.points == 40_000


def test_overlaps__nested_and_identical_zones(mixed, mixed_report):
    rows = {(r.id_a, r.id_b): r for r in mixed_report.rows}
    area = dict(zip(mixed.ids, shapely.area(mixed.planar)))
    # nested: the overlap is the inner zone, its share of the inner zone is 1 within error
    nested = rows[("big", "nested")]
    assert within(nested.estimate, nested.ci_low, nested.ci_high, area["nested"], nested.std_error)
    assert abs(nested.share_b - 1) <= 4 * nested.std_error / area["nested"]
    # identical: the overlap is the whole zone; both shares are 1 within error
    same = rows[("big", "big_copy")]
    assert within(same.estimate, same.ci_low, same.ci_high, area["big"], same.std_error)
    assert abs(same.share_a - 1) <= 4 * same.std_error / area["big"]


def test_overlaps__holed_zone_overlap_excludes_the_hole(mixed, mixed_report):
    row = next(r for r in mixed_report.rows if (r.id_a, r.id_b) == ("big", "holed"))
    i, j = mixed.ids.index("big"), mixed.ids.index("holed")
    exact = shapely.intersection(mixed.planar[i], mixed.planar[j]).area
    shell_only = shapely.intersection(mixed.planar[i], Polygon(mixed.planar[j].exterior)).area
    assert shell_only - exact > 10 * row.std_error  # the hole matters at this precision ...
    assert within(row.estimate, row.ci_low, row.ci_high, exact, row.std_error)  # ... and is left out


def test_overlaps__disjoint_zones_give_no_pairs():
    (layer,) = project((["a", "b", "c"], [BIG, FAR, box(12.0, 45.0, 12.1, 45.1)]))
    report = estimate_overlaps(layer, stop=StopRule(points=20_000), confidence=CONF, seed=1)
    assert report.rows == () and report.pairs == () and report.candidates == 0
    # the profile is then the union only: k = 1 and nothing covered twice
    assert [m.k for m in report.multiplicity] == [1]
    (k1,) = report.multiplicity
    union = shapely.union_all(layer.planar).area
    assert within(k1.area_at_least, k1.area_at_least_ci_low, k1.area_at_least_ci_high, union, k1.area_at_least_std_error)
    assert k1.area_at_least_exact == pytest.approx(union, rel=1e-9)


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
        assert within(row.estimate, row.ci_low, row.ci_high, exact, row.std_error)
        assert row.share_a == pytest.approx(row.estimate / area_a[row.id_a], rel=1e-12)
        assert row.share_b == pytest.approx(row.estimate / area_b[row.id_b], rel=1e-12)
    assert report.multiplicity == ()  # no profile across two layers


def test_overlaps__min_share_drops_small_pairs_only(mixed, mixed_report):
    threshold = 0.3
    kept = estimate_overlaps(mixed, stop=StopRule(points=40_000), confidence=CONF, seed=20260315,
                             min_share=threshold, profile=False, pair_sampling=mixed_report.pair_sampling)
    expected = [r for r in mixed_report.rows if max(r.share_a, r.share_b) >= threshold]
    assert 0 < len(expected) < len(mixed_report.rows)  # the threshold really splits the rows
    assert kept.rows == tuple(expected)  # same streams with or without the profile: same points, same numbers


def test_overlaps__chunk_size_does_not_change_results(mixed, mixed_report):
    small = estimate_overlaps(mixed, stop=StopRule(points=40_000), confidence=CONF, seed=20260315, chunk=3_000,
                              pair_sampling=mixed_report.pair_sampling)
    assert small.rows == mixed_report.rows
    assert small.multiplicity == mixed_report.multiplicity


def test_overlaps__precision_target_met_before_the_cap(mixed):
    stop = StopRule(points=None, relative=0.03, max_points=2_000_000)
    report = estimate_overlaps(mixed, stop=stop, seed=4, chunk=4_096, profile=False)
    expected = exact_pairs(mixed)
    for row in report.rows:
        assert row.points < stop.max_points
        # two-stage target: the final half-width is near the target, random, and may exceed it by a
        # few percent (the pilot meets 2x the target, the final batch is sized to meet it)
        assert (row.ci_high - row.ci_low) / 2 <= 1.3 * 0.03 * row.estimate
        assert abs(row.estimate - expected[(row.id_a, row.id_b)]) <= 4 * row.std_error
    # the final batches are sized from the pilots: at fills of 0.4 to 1 a 3% target needs about
    # 4300 (1 - p) / p points at 95% (the normal approximation, common practice), far below the
    # fixed default of 100 000; a nearly full box still gets the 1000-point floor of a final batch
    assert max(r.points for r in report.rows) < 100_000
    assert min(r.points for r in report.rows) >= 1000


def test_overlaps__rows_record_why_they_stopped_and_the_pilot(mixed):
    chunk = 4_096
    stop = StopRule(points=None, relative=0.03, max_points=2_000_000)
    report = estimate_overlaps(mixed, stop=stop, seed=4, chunk=chunk, profile=False)
    assert report.rows
    for row in report.rows:
        fields = row.to_dict()
        assert fields["stop_reason"] == "target"
        assert fields["pilot_points"] > 0 and fields["pilot_points"] % chunk == 0  # the pilot ends at a chunk end


def test_overlaps__no_exact_leaves_references_empty(mixed):
    report = estimate_overlaps(mixed, stop=StopRule(points=2_000), seed=5, exact=False)
    assert all(r.exact_planar is None and r.z is None for r in report.rows)
    assert all(m.area_exactly_exact is None and m.area_at_least_exact is None for m in report.multiplicity)
    assert report.exact_profile == "not-asked"


# --- multiplicity profile ----------------------------------------------------------------------


def three_disks():
    """Three 15 km geodesic circles whose centres are about 19.5 km apart: every pair and the
    triple overlap (centroid about 11 km from each centre)."""
    return [geodesic_circle(lon, lat, 15_000.0) for lon, lat in ((10.0, 45.0), (10.25, 45.0), (10.125, 45.15))]


@pytest.mark.parametrize("pair_sampling", [SHARED, PER_PAIR])
def test_multiplicity__three_disks_against_inclusion_exclusion(pair_sampling):
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

    report = estimate_overlaps(layer, stop=StopRule(points=400_000), confidence=CONF, seed=99,
                               pair_sampling=pair_sampling)
    assert [m.k for m in report.multiplicity] == [1, 2, 3]
    assert report.exact_profile == "computed"
    for m in report.multiplicity:
        se_exactly = math.sqrt(m.area_exactly * (report_box_area(layer) - m.area_exactly) / 400_000)
        assert m.area_exactly_ci_low <= exact[m.k] <= m.area_exactly_ci_high, m
        assert abs(m.area_exactly - exact[m.k]) <= 4 * se_exactly
        assert within(m.area_at_least, m.area_at_least_ci_low, m.area_at_least_ci_high, at_least[m.k],
                      m.area_at_least_std_error), m
        assert m.area_exactly_exact == pytest.approx(exact[m.k], rel=1e-7)
        assert m.area_at_least_exact == pytest.approx(at_least[m.k], rel=1e-7)
        # z of the at-least-k area: the mid-p binomial score at p0 = exact / box (Lancaster 1961)
        box_area = report_box_area(layer)
        hits = round(m.area_at_least / box_area * 400_000)
        assert m.z == pytest.approx(mid_p_z(hits, 400_000, m.area_at_least_exact / box_area), rel=1e-6, abs=1e-9)
        assert not m.flagged


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
        assert within(m.area_at_least, m.area_at_least_ci_low, m.area_at_least_ci_high, least,
                      m.area_at_least_std_error), m
        assert m.area_exactly_ci_low <= exact[k] <= m.area_exactly_ci_high, m
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


# --- intersection geometries ---------------------------------------------------------------------


def to_plane_with_pyproj(geoms, src_crs, plane_crs):
    """Transform geometries with pyproj directly (always_xy), no new vertices."""
    trans = pyproj.Transformer.from_crs(src_crs, plane_crs, always_xy=True)
    return [shapely.transform(g, lambda xy: np.column_stack(trans.transform(xy[:, 0], xy[:, 1]))) for g in geoms]


def test_overlap_geometries__are_shapely_intersections_back_in_the_layer_crs(mixed, mixed_report):
    geoms = overlap_geometries(mixed_report, mixed)
    assert len(geoms) == len(mixed_report.rows) == len(mixed_report.pairs)
    # written in the layer's own CRS (lon/lat here): back on the plane with pyproj, each is shapely's
    # intersection of the two projected zones, area within 1e-9 relative
    back = to_plane_with_pyproj(geoms, pyproj.CRS("EPSG:4326"), mixed.plane.crs)
    for row, (i, j), geom in zip(mixed_report.rows, mixed_report.pairs, back):
        assert (mixed.ids[i], mixed.ids[j]) == (row.id_a, row.id_b)
        expected = shapely.intersection(mixed.planar[i], mixed.planar[j])
        assert geom.area == pytest.approx(expected.area, rel=1e-9)
        assert geom.area == pytest.approx(row.exact_planar, rel=1e-9)
        # and vertex for vertex the same shape: the PROJ round trip plane -> lon/lat -> plane moves
        # points by about 0.5 mm here (measured with pyproj 3.x; the ellipsoidal LAEA inverse), under 1 mm
        assert shapely.hausdorff_distance(geom, expected) < 1e-3
    # in lon/lat the pieces sit where the zones overlap: the nested pair is the nested box itself
    nested = next(g for r, g in zip(mixed_report.rows, geoms) if (r.id_a, r.id_b) == ("big", "nested"))
    assert nested.bounds == pytest.approx(NESTED.bounds, abs=1e-7)  # 1e-7 degree: about 1 cm


def test_overlap_geometries__two_layers_and_a_chosen_crs():
    a, b = project((["big", "nested"], [BIG, NESTED]),
                   (["holed", "k1", "k2", "far"], [HOLED, *circles(FACILITIES, 10_000.0), FAR]))
    report = estimate_overlaps(a, b, stop=StopRule(points=2_000), seed=3)
    assert report.rows  # big x holed, big x k1
    in_plane = overlap_geometries(report, a, b, crs=a.plane.crs)
    in_lonlat = overlap_geometries(report, a, b)
    back = to_plane_with_pyproj(in_lonlat, pyproj.CRS("EPSG:4326"), a.plane.crs)
    for row, (i, j), plane_geom, lonlat_geom in zip(report.rows, report.pairs, in_plane, back):
        assert (a.ids[i], b.ids[j]) == (row.id_a, row.id_b)
        expected = shapely.intersection(a.planar[i], b.planar[j]).area
        assert plane_geom.area == pytest.approx(expected, rel=1e-9)
        assert lonlat_geom.area == pytest.approx(expected, rel=1e-9)


# --- the shared sample: every pair counted from one sample over the layer's box ---------------------------------
#
# The points are the stream keyed ("overlap", 2) of docs/methods.md §4, drawn again here; each zone is tested
# with shapely.contains_xy and pair counts are formed by numpy (a product of 0/1 matrices), independently of
# areamc's grid index and pair emission.  Interval coverage over seeds is held to a binomial band from
# scipy.stats.binom (common practice).


def crowd_zones(n: int = 40, seed: int = 5, width: float = 0.4, height: float = 0.3):
    """`n` lon/lat ellipses (radii 0.015 to 0.05 degrees) scattered over `width` x `height` degrees near 45N."""
    rng = np.random.default_rng(seed)
    centres = np.column_stack([rng.uniform(10.0, 10.0 + width, n), rng.uniform(45.0, 45.0 + height, n)])
    radii = rng.uniform(0.015, 0.05, n)
    return [Point(x, y).buffer(r, quad_segs=16) for (x, y), r in zip(centres, radii)]


@pytest.fixture(scope="module")
def crowd():
    (layer,) = project(([f"c{i}" for i in range(40)], crowd_zones()))
    return layer


def shared_points(seed: int, n: int, box_bounds):
    """The shared sample's `n` points, drawn again from its documented stream (methods §4: key (2, 2))."""
    sampler = make_sampler("uniform", child_seed(job_root(make_seed(seed), "overlap"), 2), Box.of(box_bounds))
    return sampler.random(n)


def inside_matrix(zones, x, y) -> np.ndarray:
    """0/1 matrix (zones x points) of shapely.contains_xy, zone by zone."""
    return np.array([shapely.contains_xy(z, x, y) for z in zones], dtype=np.int64)


def test_zone_pairs__every_pair_of_zones_holding_a_point():
    # point 0 in zones {4, 1, 7}, point 1 in {2}, point 3 in {5, 0}: pairs written out by hand
    point = np.array([0, 3, 0, 1, 3, 0])
    zone = np.array([4, 5, 1, 2, 0, 7])
    lo, hi = zone_pairs(point, zone, 4)
    assert sorted(zip(lo.tolist(), hi.tolist())) == [(0, 5), (1, 4), (1, 7), (4, 7)]
    empty = zone_pairs(np.array([0, 1]), np.array([3, 3]), 2)
    assert empty[0].size == 0 and empty[1].size == 0


def test_shared__pair_counts_equal_a_brute_force_count_on_the_same_points(crowd):
    n, seed = 30_000, 11
    report = estimate_overlaps(crowd, stop=StopRule(points=n), seed=seed, pair_sampling=SHARED)
    assert report.pair_sampling == SHARED and report.metadata()["pair_sampling"] == SHARED
    bounds = shapely.total_bounds(crowd.planar)
    box_area = (bounds[2] - bounds[0]) * (bounds[3] - bounds[1])
    x, y = shared_points(seed, n, bounds)
    inside = inside_matrix(crowd.planar, x, y)
    together = inside @ inside.T  # points in both zones i and j
    assert len(report.rows) > 30  # the crowd overlaps in many places
    for row, (i, j) in zip(report.rows, report.pairs):
        assert row.hits == together[i, j], (row.id_a, row.id_b)
        assert row.points == n and row.box_area == pytest.approx(box_area, rel=1e-12)
        # z: the mid-p binomial score at p0 = shapely's intersection / the layer's box (Lancaster 1961)
        assert row.z == pytest.approx(mid_p_z(row.hits, n, row.exact_planar / box_area), rel=1e-9, abs=1e-12)
    # every pair of zones sharing a point is a candidate and is reported (min_share 0)
    upper = np.triu(together, 1)
    assert {tuple(map(int, p)) for p in np.argwhere(upper > 0)} <= set(report.pairs)
    # the profile comes from the same points: at least k zones over each point (common practice)
    depth = inside.sum(axis=0)
    assert report.multiplicity
    for m in report.multiplicity:
        assert m.area_at_least == pytest.approx(box_area * np.count_nonzero(depth >= m.k) / n, rel=1e-12)
        assert m.area_exactly == pytest.approx(box_area * np.count_nonzero(depth == m.k) / n, rel=1e-12, abs=1e-9)


def test_shared__cross_pairs_counted_in_the_intersection_of_the_two_layers_boxes():
    zones = crowd_zones()
    a, b = project(([f"a{i}" for i in range(20)], zones[:20]), ([f"b{i}" for i in range(20)], zones[20:]))
    n, seed = 20_000, 12
    report = estimate_overlaps(a, b, stop=StopRule(points=n), seed=seed, pair_sampling=SHARED)
    ba, bb = shapely.total_bounds(a.planar), shapely.total_bounds(b.planar)
    bounds = (max(ba[0], bb[0]), max(ba[1], bb[1]), min(ba[2], bb[2]), min(ba[3], bb[3]))
    x, y = shared_points(seed, n, bounds)
    together = inside_matrix(a.planar, x, y) @ inside_matrix(b.planar, x, y).T
    assert report.rows and report.multiplicity == ()
    assert set(report.pairs) == set(exact_pairs_index(a, b))  # every cross pair of positive area, by shapely
    for row, (i, j) in zip(report.rows, report.pairs):
        assert row.hits == together[i, j]
        assert row.box_area == pytest.approx((bounds[2] - bounds[0]) * (bounds[3] - bounds[1]), rel=1e-12)


def exact_pairs_index(a, b):
    return [(i, j) for i in range(len(a)) for j in range(len(b))
            if shapely.intersection(a.planar[i], b.planar[j]).area > 0]


def test_shared__intervals_cover_shapely_areas_at_the_nominal_rate():
    """200 seeds, 90% Wilson intervals: each pair's misses lie in the 0.998 band of Binomial(200, 0.1)."""
    geoms = crowd_zones(8, seed=4, width=0.15, height=0.1)  # 17 overlapping pairs, 47 to 600 expected hits each
    (layer,) = project(([f"z{i}" for i in range(8)], geoms))
    runs, confidence = 200, 0.90
    misses: dict[tuple[int, int], int] = {}
    for seed in range(runs):
        report = estimate_overlaps(layer, stop=StopRule(points=4_000), confidence=confidence, seed=1000 + seed,
                                   pair_sampling=SHARED, profile=False)
        for row, pair in zip(report.rows, report.pairs):
            misses[pair] = misses.get(pair, 0) + (not row.ci_low <= row.exact_planar <= row.ci_high)
    assert len(misses) >= 15
    low, high = stats.binom.ppf(0.001, runs, 1 - confidence), stats.binom.isf(0.001, runs, 1 - confidence)
    for pair, count in misses.items():
        assert low <= count <= high, (pair, count, low, high)
    # and pooled over pairs, the miss rate is near nominal (pairs share points, so only a loose check)
    assert abs(sum(misses.values()) / (runs * len(misses)) - (1 - confidence)) < 0.03


def test_shared__rows_do_not_depend_on_chunk_or_workers(crowd):
    stop = StopRule(points=150_000)  # more than two spans of 65,536 stream positions
    one = estimate_overlaps(crowd, stop=stop, seed=13, pair_sampling=SHARED, exact=False)
    for chunk, workers in ((7_777, 1), (DEFAULT_CHUNK, 2), (3_000, 2)):
        other = estimate_overlaps(crowd, stop=stop, seed=13, pair_sampling=SHARED, exact=False, chunk=chunk,
                                  workers=workers)
        assert other.rows == one.rows and other.multiplicity == one.multiplicity, (chunk, workers)
    target = StopRule(points=None, absolute=2e6)
    alone = estimate_overlaps(crowd, stop=target, seed=14, pair_sampling=SHARED, exact=False, chunk=8_192)
    pooled = estimate_overlaps(crowd, stop=target, seed=14, pair_sampling=SHARED, exact=False, chunk=8_192, workers=2)
    assert pooled.rows == alone.rows and pooled.multiplicity == alone.multiplicity


def test_shared__absolute_tolerance_met_by_every_pair_and_the_profile(crowd):
    target = 2e6  # m², an interval half-width of 2 km² on overlaps of up to about 40 km²
    report = estimate_overlaps(crowd, stop=StopRule(points=None, absolute=target), seed=15, pair_sampling=SHARED,
                               chunk=8_192)
    assert report.rows
    points = {r.points for r in report.rows}
    assert len(points) == 1  # one sample for all the pairs
    for row in report.rows:
        assert row.stop_reason == "target" and row.pilot_points > 0 and row.pilot_points % 8_192 == 0
        # two-stage target (methods §3): the final half-width lands near the target, may exceed it a little
        assert (row.ci_high - row.ci_low) / 2 <= 1.3 * target
        assert abs(row.estimate - row.exact_planar) <= 4 * max(row.std_error, target / 4)
    for m in report.multiplicity:
        assert (m.area_at_least_ci_high - m.area_at_least_ci_low) / 2 <= 1.3 * target


def test_shared__no_pairs_and_no_profile_draws_nothing():
    (layer,) = project((["a", "b"], [BIG, FAR]))
    report = estimate_overlaps(layer, stop=StopRule(points=5_000), seed=1, pair_sampling=SHARED, profile=False)
    assert report.rows == () and report.multiplicity == () and report.exact_profile == "not-asked"
    with_profile = estimate_overlaps(layer, stop=StopRule(points=20_000), seed=1, pair_sampling=SHARED)
    (k1,) = with_profile.multiplicity
    union = shapely.union_all(layer.planar).area
    assert within(k1.area_at_least, k1.area_at_least_ci_low, k1.area_at_least_ci_high, union, k1.area_at_least_std_error)


@pytest.mark.parametrize("stop, expected", [
    (StopRule(points=1_000), PER_PAIR),
    (StopRule(points=None, absolute=1e4), SHARED),
    (StopRule(points=None, relative=0.01), PER_PAIR),
])
def test_pair_sampling_for__auto_follows_the_stop_rule(stop, expected):
    assert pair_sampling_for(AUTO, stop) == expected
    assert pair_sampling_for(SHARED, stop) == SHARED and pair_sampling_for(PER_PAIR, stop) == PER_PAIR


def test_pair_sampling__unknown_name_is_refused_by_parameter(mixed):
    with pytest.raises(OptionError) as err:
        estimate_overlaps(mixed, stop=StopRule(points=1_000), seed=1, pair_sampling="each")
    assert err.value.param == "pair_sampling" and "shared" in str(err.value)
