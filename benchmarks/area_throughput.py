"""Points per second of ``areamc area`` on the sample districts, and the cost of the exact checks.

Run:  .venv/bin/python benchmarks/area_throughput.py

Times, in one run: loading and projecting the layer, sampling 1,000,000
points per district (the classification of points against the prepared
polygon and the counting), and the exact planar and geodesic checks.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from areamc.area import estimate_areas  # noqa: E402
from areamc.stopping import StopRule  # noqa: E402
from areamc.load import read_layer  # noqa: E402
from areamc.project import project_layer  # noqa: E402

POINTS = 1_000_000


def main() -> None:
    path = ROOT / "sample_data" / "vale_county.gpkg"
    start = time.perf_counter()
    layer = read_layer(path, layer="districts", id_field="district_id")
    projected = project_layer(layer)
    load = time.perf_counter() - start
    start = time.perf_counter()
    estimate_areas(projected, stop=StopRule(points=POINTS), seed=1, exact=False)
    sample = time.perf_counter() - start
    start = time.perf_counter()
    report = estimate_areas(projected, stop=StopRule(points=1000), seed=1, exact=True)
    checks = time.perf_counter() - start
    total = POINTS * len(projected)
    print(f"{len(projected)} districts, {POINTS:,} points each")
    print(f"load + densify + project: {load:6.2f} s")
    print(f"sampling:                 {sample:6.2f} s  ({total / sample / 1e6:.2f} million points/s)")
    print(f"exact checks (+1,000 pts): {checks:5.2f} s")
    worst = max(abs(r.exact_planar / r.geodesic - 1) for r in report.rows)
    print(f"largest |planar/geodesic - 1|: {worst:.2e}")


if __name__ == "__main__":
    main()
