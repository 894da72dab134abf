"""Areas of the sample districts: areamc's sampling throughput against the exact planar area, in one run.

Run:  .venv/bin/python benchmarks/area_throughput.py [--quick]

Both sides start from sample_data/vale_county.gpkg (layer "districts", 8
features):

* **areamc**: ``read_layer`` and ``project_layer`` (plane chosen from the
  data), then ``estimate_areas`` with 1,000,000 points per district;
* **exact**: the SQL read and one pyproj call onto the same plane
  (``baselines.load_plane``), then ``shapely.area`` (``baselines.polygon_area``).
  areamc densifies edges to 1 km before projecting and the baseline does
  not; their exact planar areas differ by about 1e-8 relative.

An exact area of a polygon is one vectorised call, so sampling never wins
this comparison on speed; the row is there to show the sampling throughput
(points per second) and what the exact answer costs beside it.  It also
times areamc's own exact checks (planar and geodesic areas).  The sampling
time is the best of 3; ``--quick``: 100,000 points per district.
"""

from __future__ import annotations

import math

import numpy as np

from common import ROOT, WORKERS, best_of, fmt_s, label, main_for, options, record, timed, unavailable
import baselines
from areamc.area import estimate_areas
from areamc.load import read_layer
from areamc.project import project_layer
from areamc.stopping import StopRule

PATH = ROOT / "sample_data" / "vale_county.gpkg"
COMMAND = ".venv/bin/python benchmarks/area_throughput.py"


def run(quick: bool = False, sampler: str | None = None, workers: int | None = WORKERS, repeats: int = 3) -> dict:
    """Time both sides and return the benchmark record (see ``common.record``)."""
    points = 100_000 if quick else 1_000_000
    what = f"areas of the 8 sample districts, {points:,} points each"
    name, command, kwargs, missing = options(estimate_areas, "area", "area", COMMAND, quick=quick, sampler=sampler,
                                             workers=workers)
    if missing:
        return unavailable(name, what, command, missing)
    baselines.load_plane(PATH, "districts", "EPSG:4326")  # warm the file cache for both sides
    load_mc, projected = timed(lambda: project_layer(read_layer(PATH, layer="districts", id_field="district_id")))
    job_mc, report = best_of(lambda: estimate_areas(projected, stop=StopRule(points=points), seed=1, exact=False,
                                                    **kwargs), repeats)
    checks, checked = timed(lambda: estimate_areas(projected, stop=StopRule(points=1000), seed=1, exact=True,
                                                   **kwargs))
    plane = projected.plane.crs
    load_ex, (geoms, _) = timed(lambda: baselines.load_plane(PATH, "districts", plane))
    job_ex, exact = best_of(lambda: baselines.polygon_area(geoms), repeats)
    total = sum(r.estimate for r in report.rows)
    half = 1.959964 * math.sqrt(sum(r.std_error ** 2 for r in report.rows))
    truth = float(np.sum(exact))
    rate = points * len(projected) / job_mc
    worst = max(abs(r.exact_planar / r.geodesic - 1) for r in checked.rows)
    print(f"{len(projected)} districts, {points:,} points each ({label(sampler, workers)}); best of {repeats}")
    print(f"areamc: load + densify + project {fmt_s(load_mc)}; sampling {fmt_s(job_mc)} "
          f"({rate / 1e6:.2f} million points/s); its exact checks (+1,000 points) {fmt_s(checks)}")
    print(f"  total area {total / 1e6:,.3f} km² ± {half / 1e6:,.3f}; largest |planar/geodesic - 1| {worst:.2e}")
    print(f"exact: load + project {fmt_s(load_ex)}; shapely.area {job_ex * 1e6:.1f} µs")
    print(f"  total area {truth / 1e6:,.3f} km²")
    areamc_s, baseline_s = load_mc + job_mc, load_ex + job_ex
    return record(
        name, what, command, areamc_s=areamc_s, baseline_s=baseline_s, load_areamc_s=load_mc, load_baseline_s=load_ex,
        ratio=baseline_s / areamc_s, job_ratio=job_ex / job_mc, answer=total, half_width=half, exact=truth, unit="m²",
        inside=bool(abs(total - truth) <= half),
        areamc_text=f"{fmt_s(areamc_s)} (load {fmt_s(load_mc)}; {rate / 1e6:.1f} M points/s); "
                    f"{total / 1e6:,.2f} ± {half / 1e6:.2f} km²",
        baseline_text=f"{fmt_s(baseline_s)} (load {fmt_s(load_ex)}); {truth / 1e6:,.2f} km², shapely.area",
        notes=["no target: the exact area is one vectorised call; sampling is for what exact geometry cannot do"],
    )


if __name__ == "__main__":
    main_for(run)
