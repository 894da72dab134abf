"""Tests of the replicate samplers: scrambled Sobol (``sobol``) and stratified cells (``stratified``).

References: the exact area is shapely's ``area`` of the same polygon in the same plane (a
reference library); interval coverage is judged with a binomial band from scipy.stats.binom
(common practice: the number of misses of a 95% interval over R independent runs is
Binomial(R, 0.05)); Student's t quantile t(0.975, 15) = 2.1314 is from any t table (e.g.
Abramowitz & Stegun 1964, table 26.10).  Polygons are random test inputs in plane metres.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import shapely
from scipy import stats
from shapely.geometry import Point, Polygon

from areamc.cells import CellClassifier
from areamc.classify import inside
from areamc.engine import MIN_REPLICATES, hit_or_miss
from areamc.errors import OptionError
from areamc.estimate import area_precision
from areamc.samplers import Box, SobolSampler, make_sampler
from areamc.seeds import child_seed, make_seed
from areamc.stopping import StopRule, Stopper
from areamc.strata import StratifiedSampler

from conftest import assert_refused, run_json

X0, Y0 = 600_000.0, 5_100_000.0


def district(vertices: int = 600):
    """A wiggly district of about 8 km radius with a lake (hole), plane metres."""
    t = np.linspace(0, 2 * np.pi, vertices, endpoint=False)
    r = 8_000 * (1 + 0.2 * np.sin(5 * t) + 0.07 * np.cos(17 * t))
    outer = Polygon(np.column_stack([X0 + r * np.cos(t), Y0 + r * np.sin(t)]))
    return outer.difference(Point(X0 + 1_000, Y0 - 500).buffer(1_800, quad_segs=8))


GEOM = district()
BOX = Box.of(GEOM.bounds)
EXACT = GEOM.area  # shapely, the reference


def run(kind, seed, points=None, rule=None, chunk=1 << 16):
    rule = rule or StopRule(points=points)
    sampler = make_sampler(kind, child_seed(make_seed(seed), 0), BOX)
    return hit_or_miss(sampler, inside(GEOM, BOX, rule.points), Stopper(rule, precision=area_precision(BOX.area, 0.95)),
                       chunk=chunk)


def miss_band(replicates: int, level: float = 0.999) -> tuple[int, int]:
    """Central `level` band of the number of misses of 95% intervals in `replicates` runs."""
    lo, hi = stats.binom.interval(level, replicates, 0.05)
    return int(lo), int(hi)


@pytest.mark.parametrize("kind", ["sobol", "stratified"])
def test_interval_covers_at_nominal_rate_and_is_unbiased(kind):
    reps = 300
    estimates, misses = [], 0
    for seed in range(reps):
        est = run(kind, seed, points=4_096).estimate(0, 0.95)
        assert est.replicates >= MIN_REPLICATES
        estimates.append(est.estimate)
        misses += not (est.ci_low <= EXACT <= est.ci_high)
    lo, hi = miss_band(reps)
    assert lo <= misses <= hi, f"{misses} misses of {reps}"
    estimates = np.array(estimates)
    se = estimates.std(ddof=1) / np.sqrt(reps)
    assert abs(estimates.mean() - EXACT) < 4 * se


@pytest.mark.parametrize("kind", ["sobol", "stratified"])
def test_fixed_count_results_do_not_depend_on_chunk(kind):
    a = run(kind, 11, points=50_000, chunk=1_000)
    b = run(kind, 11, points=50_000, chunk=1 << 16)
    assert a == b


def test_replicate_samplers_beat_uniform_at_equal_points():
    """At 65,536 points the spread of 40 runs is smaller than the binomial standard error of plain sampling."""
    p = EXACT / BOX.area
    uniform_se = BOX.area * np.sqrt(p * (1 - p) / 65_536)
    for kind, factor in (("sobol", 3.0), ("stratified", 10.0)):
        spread = np.std([run(kind, s, points=65_536).estimate(0).estimate for s in range(40)], ddof=1)
        assert spread * factor < uniform_se, (kind, spread, uniform_se)


def test_stratified_known_part_is_exact_inside_cells():
    sampler = make_sampler("stratified", make_seed(1), BOX)
    classify = CellClassifier(GEOM, BOX, 100_000)
    sampler.bind(classify)
    grid = classify.grid
    assert sampler.known == grid.inside_area <= EXACT <= sampler.known + sampler.span
    x, y = sampler.random(sampler.replicate_size * 2)
    # every point lies in a crossing cell: none wasted where the answer is known
    from areamc.cells import CROSSING
    assert (grid.state[grid.lookup(x, y)] == CROSSING).all()


def test_stratified_neyman_allocation_follows_pilot():
    """After the pilot, strata that were all hits or all misses get the floor of one point, mixed ones more."""
    sampler = StratifiedSampler(make_seed(2), BOX)
    sampler.bind(CellClassifier(GEOM, BOX, 20_000))
    size = sampler.replicate_size
    assert size == sampler.strata  # pilot: one point per stratum per round
    rounds = np.zeros((16, size), dtype=bool)
    rounds[::2, : size // 2] = True  # the first half of the strata hit in every other round: p = 1/2
    sampler.totals(rounds.reshape(-1, 1))
    sampler.next_stage()
    r = sampler._r
    # Neyman: r_h = round(T A_h S_h / sum A S), T = 2 x strata, with S_h = sqrt(p_h (1 - p_h)) and p smoothed
    # to (hits + 1/2) / (n + 1): mixed strata S = 1/2, never-hit strata S = sqrt(0.029 x 0.971) = 0.168
    area = sampler._area
    p = np.where(np.arange(size) < size // 2, 8.5 / 17, 0.5 / 17)
    s = area * np.sqrt(p * (1 - p))
    want = np.clip(np.rint(2 * size * s / s.sum()), 1, 8)
    np.testing.assert_array_equal(r, want)
    assert r[0] > r[-2] >= 1 and sampler.replicate_size == r.sum()


def test_precision_target_is_met_by_both():
    rule = StopRule(points=None, relative=0.002, max_points=5_000_000)
    for kind in ("sobol", "stratified"):
        r = run(kind, 5, rule=rule)
        est = r.estimate(0)
        assert r.reason == "target" and r.pilot_points > 0
        # the reported half-width is near the target: a fresh batch can exceed it somewhat, never by 2x
        assert est.half_width < 2 * 0.002 * est.estimate


def test_sobol_error_falls_faster_than_plain_sampling():
    """Root mean square error over 64 scramblings at m = 2^8 ... 2^14: fitted slope against log m.

    Plain sampling's slope is -1/2; scrambled nets on an indicator of a set with a
    rectifiable boundary reach -3/4 (He & Wang 2015, SIAM J. Numer. Anal. 53:2488-2503,
    quoted from memory).  The fitted slope must be clearly steeper than -1/2.
    """
    from scipy.stats import qmc

    ms = [2**k for k in range(8, 15)]
    rmse = []
    for m in ms:
        err = []
        for j in range(64):
            u = qmc.Sobol(d=2, scramble=True, seed=np.random.default_rng([m, j])).random_base2(int(np.log2(m)))
            x, y = BOX.map(u)
            err.append(BOX.area * shapely.contains_xy(GEOM, x, y).mean() - EXACT)
        rmse.append(np.sqrt(np.mean(np.square(err))))
    slope = np.polyfit(np.log(ms), np.log(rmse), 1)[0]
    assert slope < -0.6, slope


def test_sobol_sampler_refuses_partial_replicates_and_densities():
    s = SobolSampler(make_seed(1), BOX)
    s.plan(100_000)
    with pytest.raises(ValueError, match="whole replicates"):
        s.random(s.replicate_size + 1)
    with pytest.raises(OptionError, match="^sampler:"):
        SobolSampler(make_seed(1), object())


def test_too_few_points_for_replicates():
    with pytest.raises(OptionError, match=r"^points: the 'sobol' sampler needs at least 256 points"):
        run("sobol", 1, points=200)


# -- coverage shares ------------------------------------------------------------------------------------

def coverage_scene():
    """A district and 14 overlapping zones (disks and boxes, some reaching past it), plane metres."""
    rng = np.random.default_rng(77)
    zones = [Point(X0 + dx, Y0 + dy).buffer(r, quad_segs=12)
             for dx, dy, r in zip(rng.uniform(-7e3, 7e3, 10), rng.uniform(-7e3, 7e3, 10), rng.uniform(2e3, 5e3, 10))]
    zones += [shapely.box(X0 - 9e3, Y0 - 2e3, X0 - 1e3, Y0 + 1e3), shapely.box(X0 + 2e3, Y0 - 9e3, X0 + 4e3, Y0 + 9e3),
              shapely.box(X0 - 3e3, Y0 + 5e3, X0 + 9e3, Y0 + 7e3), shapely.box(X0 - 12e3, Y0 - 12e3, X0 + 12e3, Y0 - 6e3)]
    return GEOM, zones


def exact_at_least(region, zones, k: int) -> float:
    """Share of `region` covered by at least k zones, from shapely overlays (a reference library):
    the union of all k-wise intersections, for k = 1 or 2."""
    from itertools import combinations

    if k == 1:
        covered = shapely.union_all(zones)
    else:
        covered = shapely.union_all([a.intersection(b) for a, b in combinations(zones, 2)])
    return shapely.intersection(region, covered).area / region.area


def projected_scene():
    from areamc.load import layer_from_geometries
    from areamc.project import project_layers

    region, zones = coverage_scene()
    crs = "EPSG:32632"
    layers = [layer_from_geometries([region], crs, ids=["D"]), layer_from_geometries(zones, crs)]
    return project_layers(layers, crs="+proj=laea +lat_0=46 +lon_0=10.3 +datum=WGS84 +units=m +no_defs", densify_m=1e9)


@pytest.mark.parametrize("kind", ["sobol", "stratified"])
def test_coverage_shares_cover_at_nominal_rate(kind):
    from areamc.coverage import estimate_coverage

    regions, zones = projected_scene()
    exact = {k: exact_at_least(regions.planar[0], list(zones.planar), k) for k in (1, 2)}
    reps, misses = 120, {1: 0, 2: 0}
    for seed in range(reps):
        report = estimate_coverage(regions, zones, ks=(1, 2), stop=StopRule(points=8_192), seed=seed, sampler=kind,
                                   exact=seed == 0)
        for row in report.rows:
            assert row.interval == "student-t"
            misses[row.k] += not (row.ci_low <= exact[row.k] <= row.ci_high)
            if seed == 0:  # the tool's own exact check agrees with the overlay here
                assert row.exact_share == pytest.approx(exact[row.k], rel=1e-9)
    lo, hi = miss_band(reps)
    assert all(lo <= m <= hi for m in misses.values()), misses


def test_coverage_stratified_known_cells_are_exact():
    """The strata's known areas: region cells with one covering count all over them, checked by shapely."""
    from areamc.classify import RegionClassifier

    region, zones = coverage_scene()
    classify = RegionClassifier(region, zones, (1, 2), points=40_000)
    strata = classify.strata()
    sampled = np.zeros(strata.nx * strata.ny, dtype=bool)
    sampled[strata.cells] = True
    x0, y0 = strata.cell_corners(np.flatnonzero(~sampled))
    cells = shapely.box(x0, y0, x0 + strata.dx, y0 + strata.dy)
    inside_region = shapely.within(cells, region)
    assert strata.known[0] == pytest.approx(inside_region.sum() * strata.cell_area, rel=1e-12)
    depth = np.sum([shapely.within(cells, z) for z in zones], axis=0)
    touched = np.sum([shapely.intersects(cells, z) for z in zones], axis=0)
    # a known cell in the region is covered by the same zones all over it: every zone holds it or misses it
    assert (depth[inside_region] == touched[inside_region]).all()
    for c, k in enumerate((1, 2), start=1):
        assert strata.known[c] == pytest.approx((inside_region & (depth >= k)).sum() * strata.cell_area, rel=1e-12)


# -- through the command line ------------------------------------------------------------------------------


def write_district(folder):
    import fiona

    path = folder / "d.gpkg"
    schema = {"geometry": "Polygon", "properties": {"name": "str"}}
    with fiona.open(path, "w", driver="GPKG", schema=schema, crs="EPSG:32632") as dst:
        dst.write({"geometry": shapely.geometry.mapping(GEOM), "properties": {"name": "lake district"}})
    return path


@pytest.mark.parametrize("kind", ["sobol", "stratified"])
def test_cli_area_with_replicate_sampler(tmp_path, capsys, kind):
    path = write_district(tmp_path)
    doc = run_json(capsys, ["area", str(path), "--sampler", kind, "--seed", "3", "-n", "65536"])
    row = doc["results"][0]
    assert row["replicates"] >= MIN_REPLICATES
    assert row["ci_low"] <= row["exact_planar"] <= row["ci_high"] or abs(row["z"]) < 4
    assert doc["sampler"] == kind


@pytest.mark.parametrize(
    "argv, match",
    [
        (["area", "{f}", "--sampler", "stratified", "--trace", "{d}/t.csv"], r"--trace-every|--trace"),
        (["coverage", "{f}", "{f}", "--sampler", "sobol", "--claim", "0.9"], r"--sampler: claim verdicts need a sampler"),
        (["integrate", "{f}", "--density", "1e-4", "--sampler", "sobol"], r"--sampler: the integrate job takes a sampler"),
        (["overlap", "{f}", "--sampler", "stratified"], r"--sampler: the overlap job takes a sampler of single points"),
        (["area", "{f}", "--sampler", "sobol", "-n", "100"], r"--points|-n"),
    ],
)
def test_cli_refuses_what_a_sampler_cannot_do(tmp_path, capsys, argv, match):
    path = write_district(tmp_path)
    argv = [a.format(f=path, d=tmp_path) for a in argv]
    assert_refused(capsys, argv, match, tmp_path)


def test_json_seed_of_replicate_run_replays(tmp_path, capsys):
    path = write_district(tmp_path)
    argv = ["area", str(path), "--sampler", "stratified", "--seed", "8", "-n", "20000"]
    a = run_json(capsys, argv)
    b = run_json(capsys, argv)
    assert json.dumps(a["results"]) == json.dumps(b["results"])
