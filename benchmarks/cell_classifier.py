"""Target (a): the cell-classified point-in-polygon test against shapely's prepared ``contains_xy``, side by side.

Run:  .venv/bin/python benchmarks/cell_classifier.py [--quick]

A 10,000-vertex district (plane metres) and the same uniform points in its
box; three timings in one run, best of 3 each:

* drawing the points alone (numpy PCG64, two doubles a point): the floor;
* shapely 2's ``contains_xy`` on the prepared polygon: the best a skilled
  user writes with shapely alone (one vectorised call, prepared geometry);
* ``areamc.cells.CellClassifier``: building its grid for that many points
  plus classifying them.

Both classifiers must give the same answer for every point; the script
checks it.  Targets: at least 10 times the prepared ``contains_xy``, and
within 3 times the cost of drawing the points.
"""

from __future__ import annotations

import numpy as np
import shapely

from common import best_of, main_for, met, record, wobbly_district

from areamc.cells import CellClassifier
from areamc.samplers import Box


def run(quick: bool = False) -> dict:
    n = 1_000_000 if quick else 4_000_000
    geom = wobbly_district(10_000, ripple=0.02)
    shapely.prepare(geom)
    box = Box.of(geom.bounds)
    rng = np.random.default_rng(20261202)

    def draw():
        u = rng.random((n, 2))
        return box.xmin + u[:, 0] * (box.xmax - box.xmin), box.ymin + u[:, 1] * (box.ymax - box.ymin)

    t_draw, (x, y) = best_of(draw)
    t_shapely, want = best_of(lambda: shapely.contains_xy(geom, x, y))
    t_cells, got = best_of(lambda: CellClassifier(geom, box, n)(x, y))
    t_build, classifier = best_of(lambda: CellClassifier(geom, box, n))
    same = bool((got == want).all())
    ratio = t_shapely / t_cells
    over_draw = t_cells / t_draw
    g = classifier.grid
    print(f"{n:,} points in the box of a {len(geom.exterior.coords) - 1:,}-vertex district; best of 3")
    print(f"  draw the points (numpy):           {t_draw:7.3f} s")
    print(f"  shapely prepared contains_xy:      {t_shapely:7.3f} s  ({n / t_shapely / 1e6:6.1f} M points/s)")
    print(f"  areamc cell classifier (+ build):  {t_cells:7.3f} s  ({n / t_cells / 1e6:6.1f} M points/s), "
          f"grid {g.nx} x {g.ny} built in {t_build:.3f} s")
    print(f"  identical answers: {same}")
    return record(
        "cell_classifier", "point in a 10,000-vertex polygon: cell grid vs prepared contains_xy",
        ".venv/bin/python benchmarks/cell_classifier.py",
        areamc_s=t_cells, baseline_s=t_shapely, ratio=ratio, answer=int(got.sum()), exact=int(want.sum()),
        unit="points inside", inside=same, target=">= 10x prepared contains_xy, <= 3x the cost of drawing",
        target_value=10.0, met=bool(met(ratio, 10.0) and over_draw <= 3.0 and same),
        areamc_text=f"{t_cells:.3f} s ({n / t_cells / 1e6:.1f} M pts/s, {over_draw:.1f}x drawing)",
        baseline_text=f"{t_shapely:.3f} s ({n / t_shapely / 1e6:.1f} M pts/s)",
        notes=[f"classifier cost / drawing cost: {over_draw:.2f} (target <= 3)",
               f"answers identical point for point: {same}"])


if __name__ == "__main__":
    main_for(run)
