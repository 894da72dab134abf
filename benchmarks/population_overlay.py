"""Covered population: areamc against the fair exact areal-weighting overlay, side by side in one run.

Run:  .venv/bin/python benchmarks/population_overlay.py [--quick] [--alternatives]

The scene (synthetic, fixed seed): one 40 km district tiled by 10,407
census-style blocks with Poisson populations around three town centres
(727,959 persons), and 1,000 service zones (disks of 257 vertices, mean
cover 1.0).  It is written to a GeoPackage in WGS84 lon/lat, and each side
starts from that file:

* **areamc**: ``read_layer`` and ``project_layers`` (areamc chooses the
  plane), then ``estimate_coverage(..., density=BlockDensity(...))`` by
  importance sampling, stopped at a 0.5% relative half-width of the covered
  share (so of the covered population), index building included;
* **fair exact overlay** (``baselines.population_covered``): fiona and one
  pyproj call per layer onto a Lambert azimuthal equal-area plane, then
  areal weighting (Goodchild & Lam 1980) with an STRtree query per block
  pair, a shortcut for blocks inside one zone, one vectorised intersection,
  and unions of only the zones meeting a block.

It prints both times (loading, job, total), their ratio, both answers, the
interval and whether the exact value lies in it.  The job times are the best
of 3 (loading once each).  The naive overlay (``union_all`` of all zones,
then every block intersected with the whole union) took 44-69 s on this
scene (issue 9), over the time budget of a benchmark; it is no longer run.
``--alternatives`` times the other exact methods tried for the baseline
(see ``baselines.population_covered``).  ``--quick``: 3,600 cells, 300 zones.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import shapely

from common import (PLANE, WORKERS, best_of, disks, fmt_s, label, main_for, options, record, side_by_side,
                    unavailable, wobbly_district, write_scene)
import baselines
from areamc.coverage import estimate_coverage
from areamc.density import BlockDensity, block_counts
from areamc.load import read_layer
from areamc.project import project_layers
from areamc.stopping import StopRule

NAME = "population"
WHAT = "covered population of {blocks:,} blocks by {zones:,} zones, to 0.5%"
COMMAND = ".venv/bin/python benchmarks/population_overlay.py"
TARGET = 5.0
RELATIVE = 0.005
SEED = 7


def blocks(region, rng, per_side: int = 130):
    """Square cells of the district's 46 km box clipped to it, with Poisson counts around three towns."""
    edges = np.linspace(-23_000, 23_000, per_side + 1)
    ix, iy = np.meshgrid(np.arange(per_side), np.arange(per_side))
    cells = shapely.box(edges[ix.ravel()], edges[iy.ravel()], edges[ix.ravel() + 1], edges[iy.ravel() + 1])
    cells = shapely.intersection(cells, region)
    cells = cells[shapely.area(cells) > 1.0]
    centre = shapely.get_coordinates(shapely.centroid(cells))
    towns = np.array([[-8000, 3000], [6000, -5000], [9000, 9000]])
    dens = sum(4e-3 * np.exp(-np.sum((centre - t) ** 2, axis=1) / (2 * 3000.0**2)) for t in towns) + 5e-5
    counts = rng.poisson(dens * shapely.area(cells)).astype(float)
    return cells, counts


def scene(quick: bool):
    """(district, blocks, counts, zones) in :data:`PLANE`; the full scene is the one of the earlier benchmark."""
    rng = np.random.default_rng(20261201)
    region = wobbly_district()
    cells, counts = blocks(region, rng, 60 if quick else 130)
    zones = disks(300 if quick else 1000, rng, cover=1.0)
    return region, cells, counts, zones


def write(folder: Path, region, cells, counts, zones) -> Path:
    return write_scene(folder / "population.gpkg", {
        "districts": ([region], {}),
        "zones": (zones, {}),
        "blocks": (cells, {"persons": counts}),
    })


def areamc_load(path):
    layers = [read_layer(path, layer=name, id_field="id") for name in ("districts", "zones", "blocks")]
    return project_layers(layers), block_counts(layers[2], "persons")


def areamc_job(projected, counts, kwargs):
    region, zones, blocks_ = projected
    report = estimate_coverage(region, zones, density=BlockDensity(blocks_, counts), exact=False, seed=SEED,
                               stop=StopRule(points=None, relative=RELATIVE, max_points=50_000_000), **kwargs)
    return report.rows[0].population


def baseline_load(path):
    region, _ = baselines.load_plane(path, "districts", PLANE)
    zones, _ = baselines.load_plane(path, "zones", PLANE)
    cells, fields = baselines.load_plane(path, "blocks", PLANE, ("persons",))
    return region[0], zones, cells, fields["persons"]


def run(quick: bool = False, sampler: str | None = None, workers: int | None = WORKERS, repeats: int = 3) -> dict:
    """Time both sides on the scene and return the benchmark record (see ``common.record``)."""
    region, cells, counts, zones = scene(quick)
    what = WHAT.format(blocks=len(cells), zones=len(zones))
    name, command, kwargs, missing = options(estimate_coverage, "coverage", NAME, COMMAND, quick=quick,
                                             sampler=sampler, workers=workers)
    if missing:
        return unavailable(name, what, command, missing, target=f"≥ {TARGET:g}x")
    with tempfile.TemporaryDirectory() as tmp:
        path = write(Path(tmp), region, cells, counts, zones)
        sides = side_by_side(lambda: areamc_load(path), lambda loaded: areamc_job(*loaded, kwargs),
                             lambda: baseline_load(path),
                             lambda loaded: baselines.population_covered(loaded[2], loaded[3], loaded[1], loaded[0]),
                             repeats)
    people, exact = sides.areamc, sides.baseline
    low, high = people.ci_low * people.total, people.ci_high * people.total
    print(f"{len(cells):,} blocks, {int(counts.sum()):,} persons, {len(zones):,} zones; job times best of {repeats}")
    print(f"areamc ({label(sampler, workers)}; {people.method} sampling, to {RELATIVE:.1%}): "
          f"load + project {fmt_s(sides.load_areamc)}, job {fmt_s(sides.job_areamc)}, {people.points:,} points")
    print(f"  covered population {people.covered:,.0f} [{low:,.0f}, {high:,.0f}] "
          f"(relative half-width {(high - low) / 2 / people.covered:.3%})")
    print(f"fair exact overlay (STRtree pairs, local unions, vectorised intersection): "
          f"load + project {fmt_s(sides.load_baseline)}, job {fmt_s(sides.job_baseline)}")
    print(f"  covered population {exact:,.2f}")
    return record(name, what, command, **sides.fields(answer=people.covered, low=low, high=high, exact=exact,
                                                      unit="persons", target=TARGET, fmt=",.0f"))


def alternatives(quick: bool = False) -> None:
    """Time the exact methods tried for the baseline on the in-memory scene (best of 3 each)."""
    _, cells, counts, zones = scene(quick)
    print(f"{len(cells):,} blocks, {len(zones):,} zones; best of 3, one core")
    for name, fn in (("local unions, vectorised (the baseline)", baselines.population_covered),
                     ("local unions, loop over blocks", baselines.covered_population_loop),
                     ("dissolve, then STRtree of the union's parts", baselines.covered_population_dissolved)):
        seconds, value = best_of(lambda fn=fn: fn(cells, counts, zones))
        print(f"  {name:46s} {seconds:7.2f} s  {value:,.2f}")


if __name__ == "__main__":
    main_for(run, alternatives)
