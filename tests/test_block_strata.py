"""Blocks counted whole: the "stratified-importance" method of weighted totals and population shares.

A block wholly inside a region, and held whole by every zone that meets it, adds its count
exactly; only the other blocks are drawn by their counts.  References: areal weighting
computed here with shapely over every block (Goodchild & Lam 1980, Geo-Processing 1:297-312),
and shapely's overlay of the zones for the covered share; interval coverage judged with a
binomial band from scipy.stats.binom (common practice).  Geometries are invented test inputs
in plane metres.
"""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from scipy import stats
from shapely.geometry import Point, box

from areamc.coverage import estimate_coverage
from areamc.density import BlockDensity
from areamc.integrate import integrate_density
from areamc.load import layer_from_geometries
from areamc.project import project_layers
from areamc.stopping import StopRule
from areamc.weighted import IMPORTANCE, STRATA

from conftest import overlay_total

PLANE = "+proj=laea +lat_0=47 +lon_0=10 +datum=WGS84 +units=m +no_defs"
KM = 1000.0


@pytest.fixture(scope="module")
def scene():
    """A 1 km grid of 144 blocks, a wobbly district that cuts some, and 5 zones (some hold whole blocks)."""
    rng = np.random.default_rng(12)
    cells = [box(i * KM, j * KM, (i + 1) * KM, (j + 1) * KM) for i in range(12) for j in range(12)]
    counts = rng.poisson(400, len(cells)).astype(float)
    t = np.linspace(0, 2 * np.pi, 300, endpoint=False)
    r = 4.6 * KM * (1 + 0.12 * np.sin(4 * t))
    district = shapely.Polygon(np.column_stack([6 * KM + r * np.cos(t), 6 * KM + r * np.sin(t)]))
    zones = [Point(4.1 * KM, 4.3 * KM).buffer(2.6 * KM, quad_segs=32), box(6 * KM, 2 * KM, 10 * KM, 6 * KM),
             Point(7.5 * KM, 8 * KM).buffer(1.8 * KM, quad_segs=32), box(2 * KM, 7 * KM, 5 * KM, 10 * KM),
             box(5 * KM, 3 * KM, 8 * KM, 5 * KM)]
    layers = [layer_from_geometries([district], PLANE, ids=["district"]), layer_from_geometries(zones, PLANE),
              layer_from_geometries(cells, PLANE)]
    regions, pzones, blocks = project_layers(layers, crs=PLANE, densify_m=1e9)
    return regions, pzones, blocks, counts


def covered_truth(scene, k: int) -> tuple[float, float]:
    """(region total, population covered by at least k zones), by shapely areal weighting."""
    from itertools import combinations

    regions, zones, blocks, counts = scene
    region = regions.planar[0]
    z = list(zones.planar)
    covered = shapely.union_all(z) if k == 1 else shapely.union_all([a & b for a, b in combinations(z, 2)])
    return (overlay_total(blocks.planar, counts, region),
            overlay_total(blocks.planar, counts, shapely.intersection(region, covered)))


def test_split_counts_whole_blocks_exactly(scene):
    regions, zones, blocks, counts = scene
    view = BlockDensity(blocks, counts).for_region(regions.planar[0])
    proposal, known = view.split(zones.planar, (1, 2))
    region = regions.planar[0]
    inside = shapely.within(blocks.planar, region)
    holding = np.array([[shapely.contains(z, b) for z in zones.planar] for b in blocks.planar])
    meeting = np.array([[shapely.intersects(z, b) for z in zones.planar] for b in blocks.planar])
    whole = inside & (holding == meeting).all(axis=1)
    depth = holding.sum(axis=1)
    assert known[0] == pytest.approx(counts[whole].sum())
    assert known[1] == pytest.approx(counts[whole & (depth >= 1)].sum())
    assert known[2] == pytest.approx(counts[whole & (depth >= 2)].sum())
    assert 0 < known[0] and known[2] > 0  # the scene really has whole blocks, covered twice too
    # the sampler draws the rest: the blocks that meet the region and are not counted whole
    near = shapely.intersects(blocks.planar, region) & ~shapely.touches(blocks.planar, region)
    assert proposal.total == pytest.approx(counts[near & ~whole].sum())


def test_coverage_population_shares_cover_at_nominal_rate(scene):
    regions, zones, blocks, counts = scene
    truth = {k: covered_truth(scene, k) for k in (1, 2)}
    source = BlockDensity(blocks, counts)
    reps, misses = 150, {1: 0, 2: 0}
    for seed in range(reps):
        report = estimate_coverage(regions, zones, ks=(1, 2), stop=StopRule(points=3_000), seed=seed,
                                   density=source, exact=False)
        for row in report.rows:
            people = row.population
            assert people.method == STRATA
            total, covered = truth[row.k]
            misses[row.k] += not (people.ci_low <= covered / total <= people.ci_high)
    lo, hi = stats.binom.interval(0.999, reps, 0.05)
    assert all(lo <= m <= hi for m in misses.values()), misses


def test_integrate_total_is_unbiased_and_exact_when_all_blocks_inside(scene):
    regions, _, blocks, counts = scene
    source = BlockDensity(blocks, counts)
    exact = overlay_total(blocks.planar, counts, regions.planar[0])
    estimates = [integrate_density(regions, source, stop=StopRule(points=2_000), seed=s, exact=False).rows[0]
                 for s in range(60)]
    assert {r.method for r in estimates} == {STRATA}
    values = np.array([r.estimate for r in estimates])
    assert abs(values.mean() - exact) < 4 * values.std(ddof=1) / np.sqrt(len(values))
    assert np.mean([r.ci_low <= exact <= r.ci_high for r in estimates]) >= 0.85
    # a region holding every block whole: the sum of the counts, with no point drawn
    big = project_layers([layer_from_geometries([box(-KM, -KM, 13 * KM, 13 * KM)], PLANE, ids=["all"])],
                         crs=PLANE, densify_m=1e9)[0]
    row = integrate_density(big, source, stop=StopRule(points=2_000), seed=1).rows[0]
    assert (row.method, row.points, row.std_error, row.stop_reason) == (STRATA, 0, 0.0, "none")
    assert row.estimate == pytest.approx(counts.sum(), rel=1e-12) and row.z == 0.0


def test_claims_and_regions_without_whole_blocks_keep_plain_importance(scene):
    regions, zones, blocks, counts = scene
    source = BlockDensity(blocks, counts)
    report = estimate_coverage(regions, zones, stop=StopRule(points=2_000), seed=2, density=source, claim=0.5,
                               exact=False)
    assert report.rows[0].population.method == IMPORTANCE  # a confidence sequence needs plain hit counts
    thin = project_layers([layer_from_geometries([box(0.5 * KM, 0.5 * KM, 3.5 * KM, 0.9 * KM)], PLANE, ids=["s"])],
                          crs=PLANE, densify_m=1e9)[0]
    row = integrate_density(thin, source, stop=StopRule(points=2_000), seed=1).rows[0]
    assert row.method == IMPORTANCE  # no block lies wholly inside: nothing to count whole


def test_share_interval_keeps_its_width_when_no_sampled_point_is_covered():
    """A district of whole blocks, one of which a zone clips by 2%: only that block is drawn, every point
    lands in the district, and at 300 points the sample often holds no covered point; the plain delta
    method then gives a zero-width interval, which must not happen (Agresti & Coull 1998 adjustment);
    its misses over 200 seeds stay within the binomial band of the nominal 5% (scipy.stats.binom)."""
    cells = [box(i * KM, j * KM, (i + 1) * KM, (j + 1) * KM) for i in range(4) for j in range(4)]
    counts = np.full(len(cells), 100.0)
    district = box(0, 0, 4 * KM, 4 * KM)  # every block inside; only the one the second zone clips is drawn
    zones = [box(-KM, -KM, 2 * KM, 2 * KM), box(3.98 * KM, 3.0 * KM, 5 * KM, 3.2 * KM)]
    layers = [layer_from_geometries([district], PLANE, ids=["d"]), layer_from_geometries(zones, PLANE),
              layer_from_geometries(cells, PLANE)]
    regions, pzones, blocks = project_layers(layers, crs=PLANE, densify_m=1e9)
    source = BlockDensity(blocks, counts)
    region = regions.planar[0]
    covered = shapely.intersection(region, shapely.union_all(pzones.planar))
    truth = overlay_total(blocks.planar, counts, covered) / overlay_total(blocks.planar, counts, region)
    misses, widths = 0, []
    for seed in range(200):
        people = estimate_coverage(regions, pzones, stop=StopRule(points=300), seed=seed, density=source,
                                   exact=False).rows[0].population
        assert people.method == STRATA
        widths.append(people.ci_high - people.ci_low)
        misses += not (people.ci_low <= truth <= people.ci_high)
    assert min(widths) > 0
    assert misses <= stats.binom.interval(0.999, 200, 0.05)[1], misses
