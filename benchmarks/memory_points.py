"""Peak memory of an area estimate from 10^6 to 10^8 points: it should follow the chunk size, not the point count.

Run:  .venv/bin/python benchmarks/memory_points.py [--quick]

Target (d) of issue 9: peak memory within 1.2 times from 10^6 to 10^8
points.  ``estimate_areas`` on one 10,000-vertex district (in the plane, in
memory) with a fixed number of points, under ``tracemalloc`` (which sees
numpy's buffers); the peak counts only what the estimate allocates, since
tracing starts after the layer is built.  ``--quick`` compares 10^6 with
10^7 points.  Run alone, one estimate at a time.
"""

from __future__ import annotations

import tracemalloc

from common import (PLANE, WORKERS, fmt_s, options, main_for, met, record, timed, unavailable,
                    wobbly_district)
from areamc.area import estimate_areas
from areamc.load import layer_from_geometries
from areamc.project import project_layers
from areamc.stopping import StopRule

TARGET = 1.2
COMMAND = ".venv/bin/python benchmarks/memory_points.py"


def peak(layer, points: int, kwargs) -> tuple[float, float, object]:
    """(peak traced MiB, seconds, row) of one fixed-count estimate."""
    tracemalloc.start()
    try:
        seconds, report = timed(lambda: estimate_areas(layer, stop=StopRule(points=points), seed=5, exact=False,
                                                       **kwargs))
        _, top = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return top / 2**20, seconds, report.rows[0]


def run(quick: bool = False, sampler: str | None = None, workers: int | None = WORKERS) -> dict:
    """Peak traced memory at 10^6 and 10^8 (quick: 10^7) points; returns the record."""
    small, large = 1_000_000, (10_000_000 if quick else 100_000_000)
    what = f"peak memory of an area estimate, {small:.0e} to {large:.0e} points"
    name, command, kwargs, missing = options(estimate_areas, "area", "memory", COMMAND, quick=quick, sampler=sampler,
                                             workers=workers)
    if missing:
        return unavailable(name, what, command, missing, target=f"≤ {TARGET:g}x")
    geom = wobbly_district(10_000, ripple=0.01)
    (layer,) = project_layers([layer_from_geometries([geom], PLANE, ids=["district"])], crs=PLANE, densify_m=1e9)
    peak(layer, 10_000, kwargs)  # first-call allocations (imports, caches) outside the comparison
    rows = [(n, *peak(layer, n, kwargs)) for n in (small, large)]
    print("estimate_areas on a 10,000-vertex district, fixed point counts; peak traced memory")
    for n, mib, seconds, row in rows:
        print(f"  {n:>12,} points: {mib:7.1f} MiB  ({fmt_s(seconds)}; {row.estimate / 1e6:,.3f} km²)")
    ratio = rows[1][1] / rows[0][1]
    print(f"ratio {large:.0e} / {small:.0e}: {ratio:.2f}")
    return record(
        name, what, command, areamc_s=rows[1][2], baseline_s=rows[0][2], ratio=ratio,
        ratio_of=f"peak at {large:.0e} / peak at {small:.0e} points", target=f"≤ {TARGET:g}x", target_value=TARGET,
        met=met(ratio, TARGET, at_most=True),
        areamc_text=f"{rows[1][1]:.1f} MiB at {large:,} points ({fmt_s(rows[1][2])})",
        baseline_text=f"{rows[0][1]:.1f} MiB at {small:,} points (same job)",
    )


if __name__ == "__main__":
    main_for(run)
