"""Cost of small draws: lazy blocks (areamc's uniform sampler) against whole 65,536-point blocks.

Run:  .venv/bin/python benchmarks/small_draws.py

2,000 small squares (a 40 x 50 grid of 0.01-degree cells), 1,000 points
each.  The uniform sampler draws only the rows of a block that are asked
for; the baseline, defined here through the sampler interface, generates a
whole block of 65,536 rows for every 1,000 it hands out, as areamc did
before.  Both give the same points (checked: the reports are identical), so
the ratio is the cost of the unused rows.  Both include the classification,
so the ratio is for the whole ``estimate_areas`` call.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np
from shapely.geometry import box

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from areamc.area import estimate_areas  # noqa: E402
from areamc.load import layer_from_geometries  # noqa: E402
from areamc.project import project_layer  # noqa: E402
from areamc.samplers import BLOCK  # noqa: E402
from areamc.seeds import child_seed  # noqa: E402
from areamc.stopping import StopRule  # noqa: E402


class WholeBlocks:
    """The earlier uniform sampler: every block generated in full on first use."""

    name = "whole-blocks"

    def __init__(self, seed, domain):
        self.domain, self._seed, self._position, self._k, self._block = domain, seed, 0, -1, None

    def random(self, n):
        out = np.empty((n, 2))
        filled = 0
        while filled < n:
            k, offset = divmod(self._position, BLOCK)
            if k != self._k:
                self._block = np.random.Generator(np.random.PCG64(child_seed(self._seed, k))).random((BLOCK, 2))
                self._k = k
            take = min(n - filled, BLOCK - offset)
            out[filled:filled + take] = self._block[offset:offset + take]
            filled += take
            self._position += take
        return self.domain.map(out)


def main() -> None:
    cells = [box(10 + 0.01 * i, 47 + 0.01 * j, 10.01 + 0.01 * i, 47.01 + 0.01 * j) for i in range(40) for j in range(50)]
    layer = project_layer(layer_from_geometries(cells, "EPSG:4326"))
    stop = StopRule(points=1000)
    times = {}
    reports = {}
    for name, kind in (("lazy blocks", "uniform"), ("whole blocks", WholeBlocks)):
        best = np.inf
        for _ in range(3):
            start = time.perf_counter()
            reports[name] = estimate_areas(layer, stop=stop, seed=7, sampler=kind, exact=False)
            best = min(best, time.perf_counter() - start)
        times[name] = best
    same = [r.hits for r in reports["lazy blocks"].rows] == [r.hits for r in reports["whole blocks"].rows]
    print(f"{len(cells):,} features x {stop.points:,} points; best of 3")
    for name, t in times.items():
        print(f"  {name:13s} {t:6.2f} s")
    print(f"whole blocks / lazy blocks: {times['whole blocks'] / times['lazy blocks']:.2f}x; identical hits: {same}")


if __name__ == "__main__":
    main()
