"""A sampler added in this file alone runs through all four jobs (areamc.samplers' factory).

The toy sampler below draws iid uniforms from its own numpy Generator (not
areamc's block streams) and maps them with the domain it is given, so it
serves boxes and importance proposals alike.  Each job's results are checked
against exact references computed here with shapely (planar areas,
intersections, unions; areal weighting, Goodchild & Lam 1980, Geo-Processing
1:297-312), within 4.5 reported standard errors (common practice for a
fixed-seed check of an unbiased estimator).
"""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from shapely.geometry import Point, box

from conftest import overlay_total
from areamc.area import estimate_areas
from areamc.coverage import estimate_coverage
from areamc.density import BlockDensity, ExpressionDensity
from areamc.integrate import integrate_density
from areamc.overlap import estimate_overlaps
from areamc.project import project_layers
from areamc.load import layer_from_geometries
from areamc.samplers import SAMPLERS, Box, make_sampler, register_sampler
from areamc.stopping import StopRule

TOLERANCE_SE = 4.5


class ToySampler:
    """Plain iid uniforms from ``numpy.random.default_rng(seed)``, mapped by the domain."""

    name = "toy"
    draws = 0  # points drawn by every instance, to show the jobs really used it

    def __init__(self, seed, domain):
        self.domain = domain
        self._seed = seed
        self.reset()

    def reset(self):
        self._rng = np.random.default_rng(self._seed)
        self._position = 0

    def fast_forward(self, n):
        self._rng.random((n, self.domain.dims))
        self._position += n

    @property
    def generated(self):
        return self._position

    def random(self, n):
        u = self._rng.random((n, self.domain.dims))
        self._position += n
        ToySampler.draws += n
        return self.domain.map(u)


@pytest.fixture(scope="module")
def scene():
    """Two districts, three overlapping zones and four blocks with counts, in lon/lat near 47 N."""
    districts = [box(10.0, 47.0, 10.3, 47.2), box(10.3, 47.0, 10.6, 47.2)]
    zones = [Point(10.15, 47.1).buffer(0.08), Point(10.3, 47.1).buffer(0.1), box(10.25, 47.05, 10.5, 47.15)]
    blocks = [box(10.0 + 0.15 * i, 47.0, 10.15 + 0.15 * i, 47.2) for i in range(4)]
    counts = np.array([1200.0, 300.0, 4500.0, 800.0])
    layers = [layer_from_geometries(g, "EPSG:4326", ids=[f"{p}{i}" for i in range(len(g))])
              for g, p in ((districts, "D"), (zones, "Z"), (blocks, "B"))]
    regions, zone_layer, block_layer = project_layers(layers)
    return regions, zone_layer, block_layer, counts


@pytest.fixture(params=["class", "name"])
def toy(request):
    """The toy sampler given as a class, or registered and given by name."""
    if request.param == "class":
        yield ToySampler
        return
    register_sampler("toy", ToySampler)
    try:
        yield "toy"
    finally:
        SAMPLERS.pop("toy", None)


def test_make_sampler__toy_kind__builds_the_toy(toy):
    sampler = make_sampler(toy, np.random.SeedSequence(1), Box(0.0, 0.0, 2.0, 1.0))
    x, y = sampler.random(10)
    assert isinstance(sampler, ToySampler)
    assert ((0 <= x) & (x < 2) & (0 <= y) & (y < 1)).all()


def test_area_job__toy_sampler__holds_the_exact_areas(scene, toy):
    regions = scene[0]
    before = ToySampler.draws
    report = estimate_areas(regions, stop=StopRule(points=40_000), seed=3, sampler=toy)
    assert ToySampler.draws - before == 40_000 * len(regions)
    assert report.run.sampler == "toy"
    for row, geom in zip(report.rows, regions.planar):
        assert abs(row.estimate - shapely.area(geom)) <= TOLERANCE_SE * row.std_error


def test_overlap_job__toy_sampler__holds_shapely_intersections(scene, toy):
    zones = scene[1]
    before = ToySampler.draws
    report = estimate_overlaps(zones, stop=StopRule(points=40_000), seed=4, sampler=toy, exact=False)
    assert ToySampler.draws > before
    assert report.rows
    for row, (i, j) in zip(report.rows, report.pairs):
        exact = shapely.area(shapely.intersection(zones.planar[i], zones.planar[j]))
        assert abs(row.estimate - exact) <= TOLERANCE_SE * row.std_error
    union = shapely.area(shapely.union_all(zones.planar))
    at_least_1 = report.multiplicity[0]
    assert abs(at_least_1.area_at_least - union) <= TOLERANCE_SE * at_least_1.area_at_least_std_error


def test_coverage_job__toy_sampler__holds_exact_area_and_population_shares(scene, toy):
    regions, zones, blocks, counts = scene
    density = BlockDensity(blocks, counts)
    before = ToySampler.draws
    report = estimate_coverage(regions, zones, stop=StopRule(points=40_000), seed=5, sampler=toy,
                               density=density, exact=False)
    assert ToySampler.draws > before
    union = shapely.union_all(zones.planar)
    for row, region in zip(report.rows, regions.planar):
        covered = shapely.intersection(region, union)
        exact_share = shapely.area(covered) / shapely.area(region)
        assert abs(row.share - exact_share) <= TOLERANCE_SE * row.std_error
        people = row.population
        assert people.method == "importance"  # the toy sampler served the proposal domain too
        exact_pop = overlay_total(blocks.planar, counts, covered) / overlay_total(blocks.planar, counts, region)
        assert abs(people.share - exact_pop) <= TOLERANCE_SE * people.std_error


@pytest.mark.parametrize("kind", ["blocks", "expression"])
def test_integrate_job__toy_sampler__holds_the_exact_totals(scene, toy, kind):
    regions, _, blocks, counts = scene
    if kind == "blocks":
        source = BlockDensity(blocks, counts)
    else:  # a plane-linear density, integrated exactly by the centroid rule: ∫ (a + b x) dA = |R| (a + b x̄)
        source = ExpressionDensity("1e-4 + 1e-10 * (x + 40000)", regions.plane)
    report = integrate_density(regions, source, stop=StopRule(points=40_000), seed=6, sampler=toy, exact=False)
    for row, region in zip(report.rows, regions.planar):
        if kind == "blocks":
            exact = overlay_total(blocks.planar, counts, region)
        else:
            exact = shapely.area(region) * (1e-4 + 1e-10 * (shapely.centroid(region).x + 40000))
        # blocks wholly inside a district give every importance point a hit (standard error 0): exact then
        assert abs(row.estimate - exact) <= TOLERANCE_SE * row.std_error + 1e-9 * exact
        # blocks: those wholly in the region counted whole, the rest drawn; expressions: a pilot grid
        assert row.method in (("importance", "stratified-importance") if kind == "blocks" else ("grid-importance",))
