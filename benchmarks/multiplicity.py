"""Share of a district covered by at least 2 of 5,000 zones: areamc against the fair exact arrangement, in one run.

Run:  .venv/bin/python benchmarks/multiplicity.py [--quick] [--alternatives]

The scene (synthetic, fixed seed): a 40 km district (720 vertices) and 5,000
service zones (disks of 257 vertices, radii about 460 m ± 30%, centres
uniform over the district's 46 km box, mean cover 1.5), written to a
GeoPackage in WGS84 lon/lat.  Each side starts from that file:

* **areamc**: ``read_layer`` and ``project_layers``, then
  ``estimate_coverage(..., ks=(2,))`` stopped at a 0.5% relative
  half-width of the share covered by at least 2 zones (index building
  included);
* **fair exact arrangement** (``baselines.at_least_k_share``): SQL read and
  one pyproj call per layer, then the zones meeting the district noded in
  one ``shapely.node`` call, polygonized, and each face's depth counted by
  one STRtree query of a point on every face.

It prints both times (loading, job, total), their ratio, both answers, the
interval and whether the exact share lies in it; job times are the best of
3.  ``--alternatives`` times the other exact methods tried (union of
pairwise intersections; see ``baselines.at_least_k_share``).  ``--quick``:
1,000 zones.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np

from common import (PLANE, WORKERS, disks, fmt_s, label, main_for, options, record, side_by_side, timed,
                    unavailable, wobbly_district, write_scene)
import baselines
from areamc.coverage import estimate_coverage
from areamc.load import read_layer
from areamc.project import project_layers
from areamc.stopping import StopRule

NAME = "multiplicity"
WHAT = "share of a district covered by ≥ 2 of {zones:,} zones, to 0.5%"
COMMAND = ".venv/bin/python benchmarks/multiplicity.py"
TARGET = 10.0
RELATIVE = 0.005
K = 2
SEED = 11


def scene(quick: bool):
    """(district, zones) in :data:`common.PLANE`."""
    rng = np.random.default_rng(20261203)
    return wobbly_district(), disks(1000 if quick else 5000, rng, cover=1.5)


def areamc_load(path):
    return project_layers([read_layer(path, layer=name, id_field="id") for name in ("districts", "zones")])


def areamc_job(projected, kwargs):
    region, zones = projected
    report = estimate_coverage(region, zones, ks=(K,), exact=False, seed=SEED,
                               stop=StopRule(points=None, relative=RELATIVE, max_points=50_000_000), **kwargs)
    return report.rows[0]


def baseline_load(path):
    district, _ = baselines.load_plane(path, "districts", PLANE)
    zones, _ = baselines.load_plane(path, "zones", PLANE)
    return district[0], zones


def run(quick: bool = False, sampler: str | None = None, workers: int | None = WORKERS, repeats: int = 3) -> dict:
    """Time both sides on the scene and return the benchmark record (see ``common.record``)."""
    district, zones = scene(quick)
    what = WHAT.format(zones=len(zones))
    name, command, kwargs, missing = options(estimate_coverage, "coverage", NAME, COMMAND, quick=quick,
                                             sampler=sampler, workers=workers)
    if missing:
        return unavailable(name, what, command, missing, target=f"≥ {TARGET:g}x")
    with tempfile.TemporaryDirectory() as tmp:
        path = write_scene(Path(tmp) / "multiplicity.gpkg", {"districts": ([district], {}), "zones": (zones, {})})
        sides = side_by_side(lambda: areamc_load(path), lambda loaded: areamc_job(loaded, kwargs),
                             lambda: baseline_load(path), lambda loaded: baselines.at_least_k_share(*loaded, K),
                             repeats)
    row, exact = sides.areamc, sides.baseline
    print(f"district of {len(district.exterior.coords) - 1} vertices, {len(zones):,} zones; job times best of {repeats}")
    print(f"areamc ({label(sampler, workers)}, to {RELATIVE:.1%}): load + project {fmt_s(sides.load_areamc)}, "
          f"job {fmt_s(sides.job_areamc)}, {row.points:,} points in the district")
    print(f"  share covered by >= {K}: {row.share:.5f} [{row.ci_low:.5f}, {row.ci_high:.5f}] "
          f"(relative half-width {(row.ci_high - row.ci_low) / 2 / row.share:.3%})")
    print(f"fair exact arrangement (node, polygonize, STRtree depth count): load + project "
          f"{fmt_s(sides.load_baseline)}, job {fmt_s(sides.job_baseline)}")
    print(f"  share covered by >= {K}: {exact:.5f}")
    return record(name, what, command, **sides.fields(answer=row.share, low=row.ci_low, high=row.ci_high, exact=exact,
                                                      unit="share", target=TARGET, fmt=".4f"))


def alternatives(quick: bool = False) -> None:
    """Time the exact methods tried for the baseline on the in-memory scene (one run each)."""
    district, zones = scene(quick)
    print(f"{len(zones):,} zones, k = {K}; one run each, one core")
    for name, fn in (("arrangement: node, polygonize, depth count (the baseline)",
                      lambda: baselines.at_least_k_share(district, zones, K)),
                     ("union of pairwise intersections", lambda: baselines.at_least_2_share_pairs_union(district, zones))):
        seconds, value = timed(fn)
        print(f"  {name:58s} {seconds:7.2f} s  {value:.12f}")


if __name__ == "__main__":
    main_for(run, alternatives)
