"""Target (e) for one large region: a fixed-count area estimate on 2 workers against 1, side by side.

Run:  .venv/bin/python benchmarks/workers_one_region.py [--quick]

One 10,000-vertex district (plane metres) and 40,000,000 points (quick:
8,000,000) with ``estimate_areas(..., workers=1)`` and ``workers=2``: with
fewer features than workers the run is cut into spans of its stream that
the workers count (``areamc.parallel.fixed_count_sums``).  Best of 2 each,
alternated; the hit counts must be identical.  The fair exact answer is
``shapely.area``, printed for the check, not timed against.
"""

from __future__ import annotations

from common import PLANE, best_of, main_for, met, record, wobbly_district

from areamc.area import estimate_areas
from areamc.load import layer_from_geometries
from areamc.project import project_layers
from areamc.stopping import StopRule


def run(quick: bool = False) -> dict:
    points = 8_000_000 if quick else 40_000_000
    geom = wobbly_district(10_000, ripple=0.02)
    (layer,) = project_layers([layer_from_geometries([geom], PLANE, ids=["district"])], crs=PLANE, densify_m=1e9)
    stop = StopRule(points=points)
    t1, one = best_of(lambda: estimate_areas(layer, stop=stop, seed=3, workers=1, exact=True), 2)
    t2, two = best_of(lambda: estimate_areas(layer, stop=stop, seed=3, workers=2, exact=True), 2)
    same = one.rows == two.rows
    ratio = t1 / t2
    row = two.rows[0]
    print(f"one district, {points:,} points; best of 2")
    print(f"  1 worker:  {t1:.2f} s   2 workers: {t2:.2f} s   identical rows: {same}")
    print(f"  estimate {row.estimate / 1e6:.4f} km² ± {(row.ci_high - row.ci_low) / 2e6:.4f}, exact {row.exact_planar / 1e6:.4f}")
    return record(
        "workers_one_region", f"one district, {points:,} points: 2 workers against 1 (stream cut into spans)",
        ".venv/bin/python benchmarks/workers_one_region.py", areamc_s=t2, baseline_s=t1, ratio=ratio,
        ratio_of="1-worker time / 2-worker time", answer=row.estimate / 1e6, half_width=(row.ci_high - row.ci_low) / 2e6,
        exact=row.exact_planar / 1e6, unit="km²", inside=row.ci_low <= row.exact_planar <= row.ci_high,
        target="≥ 1.7x, identical", target_value=1.7, met=bool(met(ratio, 1.7) and same),
        areamc_text=f"2 workers {t2:.2f} s; identical: {same}", baseline_text=f"1 worker {t1:.2f} s (areamc itself)")


if __name__ == "__main__":
    main_for(run)
