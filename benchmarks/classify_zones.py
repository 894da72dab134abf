"""Throughput of point classification against 1,000 zones, side by side with one polygon.

Run:  .venv/bin/python benchmarks/classify_zones.py

Prints, from one run on this machine:
* points per second classifying against the district alone (shapely
  ``contains_xy`` on the prepared polygon, what ``areamc area`` does), and
  against the district plus 1,000 zones (what ``areamc coverage`` does: the
  district test, then each inside point's multiplicity from the grid index),
  and their ratio (target: at least 1/3);
* the same for 100 and 10,000 zones, to show how the per-point cost grows;
* peak traced memory of a full sampling run at three chunk sizes over the same
  number of points (it should follow the chunk size, not the point count).

The scene is synthetic (a wobbly 40 km district, zones as 256-vertex disks
placed uniformly at random) and fixed by a seed.
"""

from __future__ import annotations

import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np
import shapely

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from areamc.classify import inside, region_classifier  # noqa: E402
from areamc.engine import hit_or_miss  # noqa: E402
from areamc.samplers import Box, UniformSampler  # noqa: E402
from areamc.seeds import make_seed  # noqa: E402
from areamc.stopping import StopRule, Stopper  # noqa: E402

N_POINTS = 1 << 20
CHUNK = 1 << 16
REPEATS = 3


def district() -> shapely.Polygon:
    t = np.linspace(0, 2 * np.pi, 720, endpoint=False)
    r = 20_000 * (1 + 0.15 * np.sin(5 * t) + 0.05 * np.cos(11 * t))
    return shapely.Polygon(np.column_stack([r * np.cos(t), r * np.sin(t)]))


def zones(n: int, rng: np.random.Generator, cover: float = 1.5) -> np.ndarray:
    """`n` disks over the district's box, sized so the mean multiplicity is about `cover`."""
    area = 46_000.0 ** 2
    radius = np.sqrt(cover * area / (n * np.pi))
    centres = rng.uniform(-23_000, 23_000, size=(n, 2))
    radii = radius * rng.uniform(0.7, 1.3, size=n)
    return np.array([shapely.Point(c).buffer(r, quad_segs=64) for c, r in zip(centres, radii)], dtype=object)


def throughput(classify, box: Box) -> float:
    """Points per second over N_POINTS in chunks (best of REPEATS)."""
    sampler = UniformSampler(make_seed(1), box)
    chunks = [sampler.random(CHUNK) for _ in range(N_POINTS // CHUNK)]
    best = np.inf
    for _ in range(REPEATS):
        start = time.perf_counter()
        for x, y in chunks:
            classify(x, y)
        best = min(best, time.perf_counter() - start)
    return N_POINTS / best


def peak_memory(classify, box: Box, chunk: int, points: int) -> float:
    """Peak traced memory (MiB) of a hit_or_miss run."""
    tracemalloc.start()
    hit_or_miss(UniformSampler(make_seed(2), box), classify, Stopper(StopRule(points=points)), chunk=chunk)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak / 2**20


def main() -> None:
    rng = np.random.default_rng(20261201)
    region = district()
    box = Box.of(region.bounds)
    single = inside(region)
    base = throughput(single, box)
    print(f"points per run: {N_POINTS:,} in chunks of {CHUNK:,}; best of {REPEATS}")
    print(f"{'zones':>7} {'build s':>8} {'Mpts/s':>8} {'ratio to one polygon':>21}")
    print(f"{'(1)':>7} {0:8.2f} {base / 1e6:8.2f} {1:21.3f}")
    for n in (100, 1000, 10_000):
        z = zones(n, rng)
        start = time.perf_counter()
        multi = region_classifier(region, z, (1, 2))
        build = time.perf_counter() - start
        rate = throughput(multi, box)
        print(f"{n:>7} {build:8.2f} {rate / 1e6:8.2f} {rate / base:21.3f}")
        if n == 1000:
            kept = multi
    print()
    print("peak traced memory of a 4,000,000-point coverage run with 1,000 zones:")
    for chunk in (1 << 14, 1 << 16, 1 << 18):
        print(f"  chunk {chunk:>7,}: {peak_memory(kept, box, chunk, 4_000_000):7.1f} MiB")


if __name__ == "__main__":
    main()
