"""Tests of ``areamc.weighted``: density-weighted sampling of one region, shared by integrate and coverage.

The exact covered population share is areal weighting (Goodchild & Lam 1980, Geo-Processing
1:297-312 [memory]) computed here with shapely 2 (GEOS):

    share = Σ c_i |b_i ∩ R ∩ U| / |b_i|  /  Σ c_i |b_i ∩ R| / |b_i|,   U = union of the zones.

Intervals are held to it at confidence 0.999 (common practice).  Standard errors are checked
against the spread of independent replicates with a chi-square band on the variance ratio
((R − 1) s² / σ² ~ χ²(R − 1) for normal estimates; scipy.stats), fixed seeds.  Claim stops use
the confidence sequence of Howard, Ramdas, McAuliffe & Sekhon (2021), Ann. Statist. 49:1055-1080.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import shapely
from scipy import stats
from shapely.geometry import Point, Polygon

from conftest import overlay_total, write_raster

from areamc.classify import region_classifier
from areamc.density import BlockDensity, ExpressionDensity, RasterDensity
from areamc.load import layer_from_geometries
from areamc.project import project_layers
from areamc.samplers import Box, make_sampler
from areamc.seeds import child_seed, make_seed
from areamc.sequential import MEETS, UNDECIDED, verdict
from areamc.stopping import StopRule
from areamc.weighted import GRID, IMPORTANCE, SHARES, STRATA, TOTAL, UNIFORM, weighted_run

PLANE = "+proj=laea +lat_0=47 +lon_0=10 +datum=WGS84 +units=m +no_defs"
CONF = 0.999
CELL = 500.0
N_SIDE = 24
#: A precision target runs in two stages (a pilot, then a fresh final batch sized from the pilot's
#: half-width, after Stein 1945, Ann. Math. Statist. 16:243-258): the final half-width is close to the
#: target, not bounded by it; held to it with this allowance for its own noise (common practice).
TWO_STAGE_SLACK = 1.3


@pytest.fixture(scope="module")
def scene():
    """Blocks with a town in the north-west, a wobbly region, three disk zones (invented, fixed seed)."""
    rng = np.random.default_rng(20240612)
    ix, iy = (a.ravel() for a in np.meshgrid(np.arange(N_SIDE), np.arange(N_SIDE)))
    cells = shapely.box(ix * CELL, iy * CELL, (ix + 1) * CELL, (iy + 1) * CELL)
    centre = shapely.get_coordinates(shapely.centroid(cells))
    counts = rng.poisson(2000 * np.exp(-np.sum((centre - [4000, 7000]) ** 2, 1) / (2 * 2000**2)) + 20).astype(float)
    t = np.linspace(0, 2 * np.pi, 400, endpoint=False)
    r = 4500 * (1 + 0.2 * np.sin(3 * t))
    region = Polygon(np.column_stack([6000 + r * np.cos(t), 6000 + r * np.sin(t)]))
    zones = [Point(4000, 7000).buffer(1500, quad_segs=64), Point(8000, 4000).buffer(2500, quad_segs=64),
             Point(5000, 5000).buffer(1000, quad_segs=64)]
    layers = [layer_from_geometries(g, PLANE) for g in ([region], zones, cells)]
    pregion, pzones, pblocks = project_layers(layers, crs=PLANE, densify_m=1e9)
    region = pregion.planar[0]
    total = overlay_total(pblocks.planar, counts, region)
    covered = overlay_total(pblocks.planar, counts, shapely.intersection(region, shapely.union_all(pzones.planar)))
    return {
        "region": region, "zones": pzones.planar, "blocks": pblocks, "counts": counts,
        "source": BlockDensity(pblocks, counts), "total": total, "share": covered / total,
        "classify": region_classifier(region, pzones.planar, (1,)),
    }


def run(scene, seed, points, importance, stream=(0,), chunk=1 << 14, source=None, stop=None, claim=None,
        target=TOTAL, confidence=0.95):
    """One weighted run over the scene's region; its stream is child `stream` of the root `seed`."""
    view = (source or scene["source"]).for_region(scene["region"])
    return weighted_run(view, scene["classify"], child_seed(make_seed(seed), *stream),
                        stop=stop or StopRule(points=points), confidence=confidence, target=target, claim=claim,
                        chunk=chunk, importance=importance)


def test_scene_is_not_trivial(scene):
    # population concentrates in the covered town: its share differs from the covered area share
    area_share = shapely.intersection(scene["region"], shapely.union_all(scene["zones"])).area / scene["region"].area
    assert 0.2 < scene["share"] < 0.8
    assert abs(scene["share"] - area_share) > 0.05


def test_importance_interval_is_tighter_and_both_hold_the_exact_share(scene):
    budget = 100_000
    imp = run(scene, 7, budget, importance=True)
    uni = run(scene, 7, budget, importance=False)
    assert (imp.method, uni.method) == (IMPORTANCE, UNIFORM)
    assert imp.points == uni.points == budget
    exact = scene["share"]
    widths = {}
    for name, r in (("importance", imp), ("uniform", uni)):
        share, se, low, high = r.share(1, CONF)
        assert low <= exact <= high, (name, share, low, high, exact)
        assert abs(share - exact) <= 4 * se, name
        widths[name] = high - low
        total = r.total(CONF)
        assert total.ci_low <= scene["total"] <= total.ci_high, name
    assert widths["importance"] < widths["uniform"]
    assert widths["importance"] < 0.85 * widths["uniform"]  # a real gain, not a tie


@pytest.mark.parametrize("importance", [True, False])
def test_share_standard_error_matches_replicate_spread(scene, importance):
    # importance: binomial over in-region points; uniform: delta-method ratio variance
    # (Cochran 1977, Sampling Techniques, §6.4) - each checked against 100 independent replicates
    reps = 100
    shares, ses = [], []
    for seed in range(1000, 1000 + reps):
        share, se, _, _ = run(scene, seed, 10_000, importance).share(1, 0.95)
        shares.append(share)
        ses.append(se)
    shares, ses = np.array(shares), np.array(ses)
    ratio = shares.var(ddof=1) / np.mean(ses**2)
    low, high = stats.chi2.ppf([5e-4, 1 - 5e-4], reps - 1) / (reps - 1)
    assert low <= ratio <= high, ratio
    # and the replicate mean is on the exact share (bias of the ratio estimator is O(1/n))
    assert abs(shares.mean() - scene["share"]) <= 4 * shares.std(ddof=1) / math.sqrt(reps)


def test_scales_are_proposal_total_and_box_area(scene):
    imp = run(scene, 3, 5000, importance=True)
    near = shapely.intersects(scene["blocks"].planar, scene["region"]) & ~shapely.touches(scene["blocks"].planar, scene["region"])
    assert imp.scale == pytest.approx(scene["counts"][near].sum(), rel=1e-12)
    uni = run(scene, 3, 5000, importance=False)
    xmin, ymin, xmax, ymax = scene["region"].bounds
    assert uni.scale == pytest.approx((xmax - xmin) * (ymax - ymin), rel=1e-12)
    # importance sums are hit counts: in-region points, of which covered
    assert imp.sums[0] == int(imp.sums[0]) and 0 < imp.sums[1] < imp.sums[0] <= imp.points


def test_chunk_size_and_stream_keys(scene):
    a = run(scene, 5, 20_000, True, chunk=20_000)
    b = run(scene, 5, 20_000, True, chunk=1000)
    np.testing.assert_array_equal(a.sums, b.sums)
    np.testing.assert_array_equal(a.sumsq, b.sumsq)
    other = run(scene, 5, 20_000, True, stream=(1,))
    assert not np.array_equal(a.sums, other.sums)  # another region's stream
    u1 = run(scene, 5, 20_000, False, chunk=20_000)
    u2 = run(scene, 5, 20_000, False, chunk=3000)
    np.testing.assert_allclose(u1.sums, u2.sums, rtol=1e-12)


def test_uniform_run_draws_from_the_streams_child_2(scene):
    # documented stream layout: with plain sampling the points come from child (2,) of the region's
    # stream, uniform in the region's bounding box; the sums are re-derived here from those points,
    # the source's density and shapely's point-in-polygon test
    seed = child_seed(make_seed(17), 0)
    got = run(scene, 17, 30_000, False, chunk=7000)
    x, y = make_sampler("uniform", child_seed(seed, 2), Box.of(scene["region"].bounds)).random(30_000)
    score = scene["source"].for_region(scene["region"]).density(x, y) * shapely.contains_xy(scene["region"], x, y)
    covered = shapely.contains_xy(shapely.union_all(scene["zones"]), x, y)
    np.testing.assert_allclose(got.sums, [score.sum(), (score * covered).sum()], rtol=1e-9)
    np.testing.assert_allclose(got.sumsq, [(score**2).sum(), ((score * covered) ** 2).sum()], rtol=1e-9)


def test_claim_stops_at_the_first_decided_chunk(scene):
    # the covered share is about 0.45 (areal weighting); a claim of 0.38 is decided "meets" quickly by the
    # confidence sequence (Howard et al. 2021), and the run stops at the first chunk end where it is
    claim, chunk = 0.38, 200
    assert scene["share"] > claim + 0.05  # guard on the test design
    r = run(scene, 1, 100_000, True, chunk=chunk, claim=claim)
    assert r.method == IMPORTANCE and r.reason == "decided" and r.pilot_points == 0
    assert r.points < 100_000 and r.points % chunk == 0
    assert verdict(int(r.sums[1]), int(r.sums[0]), claim, 0.95) == MEETS
    # one chunk earlier (the same stream, a fixed count) the verdict was still open
    assert r.points > chunk  # guard on the test design: not decided on the first chunk
    before = run(scene, 1, r.points - chunk, True, chunk=chunk)
    assert verdict(int(before.sums[1]), int(before.sums[0]), claim, 0.95) == UNDECIDED
    # plain sampling cannot decide a claim (its share is a ratio estimate, not a proportion): it uses the budget
    u = run(scene, 1, 5000, False, chunk=chunk, claim=claim)
    assert u.method == UNIFORM and u.points == 5000 and u.reason == "budget"


@pytest.mark.parametrize("importance", [True, False])
def test_share_tolerance_runs_in_two_stages(scene, importance):
    # an absolute half-width of 0.01 on the covered share, at confidence 0.95
    stop = StopRule(points=None, absolute=0.01, max_points=2_000_000)
    r = run(scene, 23, None, importance, stop=stop, target=SHARES, chunk=4096)
    assert r.reason == "target" and r.pilot_points > 0
    share, se, low, high = r.share(1, 0.95)
    assert (high - low) / 2 <= TWO_STAGE_SLACK * 0.01
    assert abs(share - scene["share"]) <= 4 * se
    # the final batch is sized to the target, not to the cap: its half-width is not much below the target
    assert (high - low) / 2 >= 0.01 / TWO_STAGE_SLACK
    assert r.points + r.pilot_points < 2_000_000


def test_zero_density_and_sources_without_proposal(scene):
    zero = BlockDensity(scene["blocks"], np.zeros_like(scene["counts"]))
    assert run(scene, 1, 1000, True, source=zero) is None
    empty = run(scene, 1, 1000, False, source=zero)  # plain sampling sees only zeros
    assert empty.method == UNIFORM and empty.sums[0] == 0
    assert all(math.isnan(v) for v in empty.share(1, 0.95))
    # an expression has no units to draw: importance sampling from a pilot grid of its values
    flat = ExpressionDensity("1e-4", scene["blocks"].plane)
    r = run(scene, 2, 50_000, True, source=flat)
    assert r.method == GRID
    area_share = shapely.intersection(scene["region"], shapely.union_all(scene["zones"])).area / scene["region"].area
    share, se, low, high = r.share(1, CONF)
    assert low <= area_share <= high  # a constant density weights by area alone
    total = r.total(CONF)
    assert total.ci_low <= 1e-4 * scene["region"].area <= total.ci_high


def test_weighted_run__raster_without_importance_sampler_still_counts_its_density(tmp_path):
    # Regression: a raster in a CRS that is not equal-area has no importance sampler over its cells; the
    # run must fall back to the pilot grid of density values, not report a zero density.  Reference:
    # constant density x shapely area (calculus: the integral of a constant).
    # persons per m², UTM 32N cells of 500 m
    path = write_raster(tmp_path / "utm.tif", np.full((20, 20), 1e-4), west=600_000, north=5_240_000, dx=500,
                        crs="EPSG:32632", dtype="float32")
    region_utm = shapely.box(602_000, 5_232_000, 606_000, 5_236_000)
    (region,) = project_layers([layer_from_geometries([region_utm], "EPSG:32632")])
    geom = region.planar[0]
    with RasterDensity(path, region.plane, values="per-m2") as source:
        view = source.for_region(geom)
        assert view.proposal() is None  # UTM is not equal-area: no importance sampler over cells
        run = weighted_run(view, lambda x, y: shapely.contains_xy(geom, x, y)[:, None], make_seed(3),
                           stop=StopRule(points=50_000), confidence=0.95, chunk=10_000)
    assert run is not None and run.method == GRID
    total = run.total(0.95)
    assert abs(total.estimate - 1e-4 * geom.area) <= 4 * total.std_error + 1e-9 * geom.area


# --- concentrated densities: effective points (Kish 1965) ----------------------------------------


def _town_scene():
    """A 60 km x 60 km district (EPSG:6933 metres) whose people are mostly in a 2 km x 2 km town:
    300,000 of 555,300 persons, the rest spread evenly (the scene of the speed issue's measurement)."""
    from shapely.geometry import box

    district = box(0, 0, 60_000, 60_000)
    town = box(10_000, 10_000, 12_000, 12_000)
    rest = shapely.difference(district, town)
    layers = [layer_from_geometries([district], "EPSG:6933", ids=["D"]),
              layer_from_geometries([town, rest], "EPSG:6933", ids=["town", "rest"])]
    regions, blocks = project_layers(layers, crs="EPSG:6933")
    return regions, BlockDensity(blocks, np.array([300_000.0, 255_300.0]))


def test_effective_points__expected_value__kish_formula_by_hand():
    """n T² / (|B| ∫ d²) for the town scene, computed here by hand from the two blocks' densities."""
    from areamc.weighted import expected_effective_points

    regions, source = _town_scene()
    view = source.for_region(regions.planar[0])
    d_town, d_rest = 300_000 / 2_000**2, 255_300 / (60_000**2 - 2_000**2)
    square = d_town**2 * 2_000**2 + d_rest**2 * (60_000**2 - 2_000**2)
    assert view.exact_square_total() == pytest.approx(square, rel=1e-12)
    expected = expected_effective_points(20_000, 60_000.0**2, 555_300.0, view.exact_square_total())
    assert expected == pytest.approx(20_000 * 555_300.0**2 / (60_000.0**2 * square), rel=1e-12)
    # the town (1/900 of the box) carries nearly all of ∫d², so n_eff ≈ (n / 900) (T / town's count)²: the
    # points expected in the town, scaled by how much of the total it holds
    assert expected == pytest.approx(20_000 / 900 * (555_300 / 300_000) ** 2, rel=0.01)


def test_effective_points__sample_value_converges_to_the_expected_one():
    """Kish's (Σb)²/Σb² from a large uniform sample tends to n (E b)² / E b² (law of large numbers)."""
    from areamc.weighted import expected_effective_points

    regions, source = _town_scene()
    region = regions.planar[0]
    view = source.for_region(region)
    run = weighted_run(view, lambda x, y: shapely.contains_xy(region, x, y)[:, None], make_seed(8),
                       stop=StopRule(points=400_000), confidence=0.95, importance=False)
    expected = expected_effective_points(run.points, run.scale, 555_300.0, view.exact_square_total())
    assert run.method == UNIFORM
    assert run.effective_points == pytest.approx(expected, rel=0.15)


def test_integrate__concentrated_density_uniform__warns_with_the_number(recwarn):
    from areamc.errors import AreamcWarning
    from areamc.integrate import integrate_density

    regions, source = _town_scene()
    report = integrate_density(regions, source, stop=StopRule(points=2_000), seed=3, importance=False)
    row = report.rows[0]
    assert row.method == UNIFORM and row.effective_points < 100
    messages = [str(w.message) for w in recwarn if issubclass(w.category, AreamcWarning)]
    assert any("too concentrated" in m and f"{row.effective_points:,.0f} effective of 2,000 points" in m
               for m in messages), messages
    # importance sampling draws where the weight is: no warning, and every point counts
    recwarn.clear()
    report = integrate_density(regions, source, stop=StopRule(points=2_000), seed=3)
    assert report.rows[0].method == STRATA  # the blocks inside the district counted whole, the rest drawn
    assert not [w for w in recwarn if "too concentrated" in str(w.message)]
