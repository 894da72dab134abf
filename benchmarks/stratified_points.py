"""Target (b): points to a 0.1% relative half-width on a 10,000-vertex district, by sampler, side by side.

Run:  .venv/bin/python benchmarks/stratified_points.py [--quick]

The area of one 10,000-vertex district (plane metres) with
``--tolerance 0.1%``, seed fixed, by the uniform, Sobol and stratified
samplers through ``areamc.area.estimate_areas``; points count the pilot and
the final batch.  The exact area is shapely's.  Target: stratified needs at
least 100 times fewer points than uniform.  Times are printed too (they
include building the cell grid), and the fair exact method, ``shapely.area``,
takes microseconds: for one polygon's area Monte Carlo is a check of the
engine, not a rival to exact geometry.
"""

from __future__ import annotations

from common import PLANE, best_of, main_for, met, record, wobbly_district

from areamc.area import estimate_areas
from areamc.load import layer_from_geometries
from areamc.project import project_layers
from areamc.stopping import StopRule


def run(quick: bool = False) -> dict:
    geom = wobbly_district(10_000, ripple=0.02)
    (layer,) = project_layers([layer_from_geometries([geom], PLANE, ids=["district"])], crs=PLANE, densify_m=1e9)
    rule = StopRule(points=None, relative=0.002 if quick else 0.001, max_points=50_000_000)
    out = {}
    for kind in ("uniform", "sobol", "stratified"):
        seconds, report = best_of(lambda kind=kind: estimate_areas(layer, stop=rule, seed=20261202, sampler=kind),
                                  1 if quick else 3)
        row = report.rows[0]
        out[kind] = (seconds, row)
        drawn = row.points + row.pilot_points
        rel = (row.ci_high - row.ci_low) / 2 / row.estimate
        print(f"  {kind:10s} {drawn:>11,} points ({row.pilot_points:,} pilot)  {seconds:6.3f} s  "
              f"{row.estimate / 1e6:.4f} km² ± {rel:.3%}  exact {row.exact_planar / 1e6:.4f}  z {row.z:+.2f}")
    (tu, ru), (ts, rs) = out["uniform"], out["stratified"]
    ratio = (ru.points + ru.pilot_points) / (rs.points + rs.pilot_points)
    inside = rs.ci_low <= rs.exact_planar <= rs.ci_high
    return record(
        "stratified_points", f"points to a {rule.relative:.1%} half-width, 10,000-vertex district: stratified vs uniform",
        ".venv/bin/python benchmarks/stratified_points.py",
        areamc_s=ts, baseline_s=tu, ratio=ratio, ratio_of="uniform points / stratified points",
        answer=rs.estimate / 1e6, half_width=(rs.ci_high - rs.ci_low) / 2e6, exact=rs.exact_planar / 1e6,
        unit="km²", inside=inside, target=">= 100x fewer points than uniform", target_value=100.0,
        met=met(ratio, 100.0),
        areamc_text=f"stratified {rs.points + rs.pilot_points:,} points, {ts:.3f} s",
        baseline_text=f"uniform {ru.points + ru.pilot_points:,} points, {tu:.3f} s",
        notes=[f"sobol: {out['sobol'][1].points + out['sobol'][1].pilot_points:,} points, {out['sobol'][0]:.3f} s",
               "the fair exact method for one polygon's area is shapely.area, which takes microseconds"])


if __name__ == "__main__":
    main_for(run)
