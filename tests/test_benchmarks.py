"""The benchmark table's rewriting and the exactness of the fair baselines (benchmarks/), without timing anything.

The baselines must give the exact answer, or the benchmarks compare areamc
with a wrong figure: each is checked against the plain shapely overlay of
every feature (shapely as the reference library).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
import shapely

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

import baselines  # noqa: E402
import common  # noqa: E402
import run_all  # noqa: E402

DOC = f"# Performance\n\nbefore\n{run_all.START}\nold table\n{run_all.END}\nafter\n"


def test_replace_block__keeps_text_outside_markers():
    out = run_all.replace_block(DOC, "| new |")
    assert out == f"# Performance\n\nbefore\n{run_all.START}\n| new |\n{run_all.END}\nafter\n"


@pytest.mark.parametrize("text", [
    "no markers at all",
    f"{run_all.START} only the start",
    f"{run_all.END} before {run_all.START}",
    f"{run_all.START} a {run_all.END} b {run_all.START} c {run_all.END}",
])
def test_replace_block__bad_markers__refused(text):
    with pytest.raises(ValueError, match="marker|comes before"):
        run_all.replace_block(text, "x")


def test_write_doc__replaces_file_and_leaves_no_temporary(tmp_path):
    doc = tmp_path / "performance.md"
    doc.write_text(DOC, encoding="utf-8")
    run_all.write_doc(doc, "| t |")
    assert "| t |" in doc.read_text(encoding="utf-8") and "old table" not in doc.read_text(encoding="utf-8")
    assert [p.name for p in tmp_path.iterdir()] == ["performance.md"]


def test_table__rows_for_ok_and_unavailable_records():
    ok = common.record("population", "covered population", "cmd a", areamc_s=2.0, baseline_s=1.0, ratio=0.5,
                       job_ratio=0.25, half_width=3.0, inside=True, target="≥ 5x", met=False, areamc_text="2 s | x",
                       baseline_text="1 s")
    missing = common.unavailable("multiplicity (sobol)", "share", "cmd b", "sampler 'sobol' is not registered",
                                 target="≥ 10x")
    lines = run_all.table([ok, missing]).splitlines()
    assert lines[0] == "| benchmark | areamc | fair exact baseline | ratio | target | met? | command |"
    assert len(lines) == 4
    assert "2 s \\| x; exact inside the interval: yes" in lines[2] and "0.50 (baseline time / areamc time; " \
        "job only, without loading: 0.25)" in lines[2] and "| **no** |" in lines[2]
    assert "not available: sampler 'sobol' is not registered" in lines[3] and "≥ 10x" in lines[3]


def _with_both(layer, *, sampler="uniform", workers=1):
    return layer


def _with_neither(layer):
    return layer


@pytest.mark.parametrize("func, kwargs, expected, reason", [
    (_with_both, dict(sampler="uniform", workers=2), {"sampler": "uniform", "workers": 2}, None),
    (_with_neither, dict(workers=1), {}, None),  # one worker is what a job without the keyword does
    (_with_neither, dict(workers=2), {}, "takes no workers keyword"),
    (_with_neither, dict(sampler="uniform"), {}, "takes no sampler keyword"),
    (_with_both, dict(sampler="no-such-sampler"), {}, "is not registered"),
])
def test_job_kwargs__detects_keywords_and_samplers(func, kwargs, expected, reason):
    got, why = common.job_kwargs(func, **kwargs)
    assert got == expected
    assert (why is None) if reason is None else (reason in why)


def _disks(n, seed):
    return common.disks(n, np.random.default_rng(seed), cover=1.5, half=3000.0, quad_segs=8)


def test_covered_population__equals_full_overlay():
    """Areal weighting (Goodchild & Lam 1980) against the plain overlay with the union of all zones."""
    region = common.wobbly_district(200, radius=2500.0)
    edges = np.linspace(-3000, 3000, 13)
    ix, iy = np.meshgrid(np.arange(12), np.arange(12))
    blocks = shapely.box(edges[ix.ravel()], edges[iy.ravel()], edges[ix.ravel() + 1], edges[iy.ravel() + 1])
    counts = np.random.default_rng(1).poisson(50, len(blocks)).astype(float)
    zones = _disks(40, 2)
    inter = shapely.intersection(shapely.intersection(blocks, region), shapely.union_all(zones))
    want = float(np.sum(counts * shapely.area(inter) / shapely.area(blocks)))
    assert baselines.population_covered(blocks, counts, zones, region) == pytest.approx(want, rel=1e-12)
    clipped = shapely.intersection(blocks, region)
    keep = shapely.area(clipped) > 0
    for fn in (baselines.population_covered, baselines.covered_population_loop,
               baselines.covered_population_dissolved):
        got = fn(clipped[keep], counts[keep], zones)
        assert got == pytest.approx(float(np.sum(counts[keep] * shapely.area(inter[keep]) /
                                                 shapely.area(clipped[keep]))), rel=1e-12)


@pytest.mark.parametrize("k", [1, 2, 3])
def test_at_least_k_share__equals_union_of_k_wise_intersections(k):
    """The arrangement's depth count against the union of every k-wise intersection (shapely, brute force)."""
    from itertools import combinations

    district = common.wobbly_district(120, radius=2500.0)
    zones = _disks(14, 3)
    parts = [shapely.intersection_all(list(c)) for c in combinations(zones, k)]
    want = shapely.area(shapely.intersection(shapely.union_all(parts), district)) / district.area
    assert baselines.at_least_k_share(district, zones, k) == pytest.approx(want, rel=1e-9, abs=1e-12)
    if k == 2:
        assert baselines.at_least_2_share_pairs_union(district, zones) == pytest.approx(want, rel=1e-9)


@pytest.mark.parametrize("west, north, cell", [(-3000.3, 3000.7, 250.0), (-3100.0, 3100.0, 100.0),
                                               (-2600.0, 2300.0, 333.3)])
def test_raster_total__equals_intersection_of_every_cell(west, north, cell):
    """Cell fractions against shapely's intersection of every cell with the region (a holed district,
    a grid that may cut it off); exact fractions, so the totals agree to rounding."""
    from rasterio.transform import from_origin

    hole = shapely.Point(300.0, -200.0).buffer(700.0, quad_segs=16)
    outline = common.wobbly_district(300, radius=2500.0)
    region = shapely.Polygon(outline.exterior.coords, [hole.exterior.coords[::-1]])
    n = int(6000 / cell)
    counts = np.random.default_rng(4).poisson(7, (n, n)).astype(float)
    transform = from_origin(west, north, cell, cell)
    rows, cols = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    boxes = shapely.box(west + cell * cols.ravel(), north - cell * (rows.ravel() + 1),
                        west + cell * (cols.ravel() + 1), north - cell * rows.ravel())
    want = float(np.sum(counts.ravel() * shapely.area(shapely.intersection(boxes, region)) / cell**2))
    assert baselines.raster_total(region, counts, transform) == pytest.approx(want, rel=1e-12)


def test_zone_counts__equals_contains_per_zone():
    zones = _disks(30, 5)
    rng = np.random.default_rng(6)
    x, y = rng.uniform(-3000, 3000, 5000), rng.uniform(-3000, 3000, 5000)
    region = common.wobbly_district(100, radius=2500.0)
    want = np.sum([shapely.contains_xy(z, x, y) for z in zones], axis=0) * shapely.contains_xy(region, x, y)
    assert np.array_equal(baselines.zone_counts(zones, x, y, region), want)
