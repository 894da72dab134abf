"""Reprojecting a layer: one PROJ call per feature against one call for the whole layer.

Run:  .venv/bin/python benchmarks/transform_layer.py

For two layers, the sample blocks (sample_data/vale_county.gpkg, layer "blocks") and
an invented layer of 20,000 small lon/lat polygons, this times side by side in one
run what ``project_layers`` does to every layer: densify it every 1,000 m, transform it
to WGS84 lon/lat and to the equal-area plane.  Two ways:

* **per feature**: a Python loop calling ``shapely.transform`` with its own pyproj
  call for each feature (the code as it was before, kept here verbatim as the
  baseline);
* **one call**: ``areamc.project.transform_geometries``, one ``shapely.transform``
  whose function gets every coordinate of the layer at once.

It prints the best of REPEATS times of each, their ratio, and whether both give the
same coordinates bit for bit (``shapely.equals_exact`` with tolerance 0 on every
feature, and equal coordinate arrays).  The plane is the one areamc chooses for the
layer, resolved once before timing.  For scale it also prints the time of a whole
``project_layer`` call (plane choice, normalising lon/lat copies and all).
"""

from __future__ import annotations

import sys
import time
from functools import partial
from pathlib import Path

import numpy as np
import shapely

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from areamc.errors import CRSError  # noqa: E402
from areamc.load import layer_from_geometries, read_layer  # noqa: E402
from areamc.project import (  # noqa: E402
    DEFAULT_DENSIFY_M,
    LONLAT,
    densify,
    project_layer,
    transform_geometries,
    transformer,
)

REPEATS = 5
N_SMALL = 20_000


def per_feature(geoms, trans, layer):
    """The baseline: one shapely.transform and one pyproj call per feature (the code before)."""

    def transform_geometry(geom, label):
        def apply(coords):
            x, y = trans.transform(coords[:, 0], coords[:, 1])
            out = np.column_stack([np.asarray(x, float), np.asarray(y, float)])
            if not np.isfinite(out).all():
                raise CRSError(f"{label}: coordinates cannot be projected to {trans.target_crs.name}")
            return out

        return shapely.transform(geom, apply)

    out = np.empty(len(geoms), dtype=object)
    for i, geom in enumerate(geoms):
        out[i] = transform_geometry(geom, f"{layer.path}: feature {layer.ids[i]}")
    return out


def one_call(geoms, trans, layer):
    return transform_geometries(geoms, trans, lambda i: f"{layer.path}: feature {layer.ids[i]}")


def small_polygons(n: int, seed: int = 20261202):
    """`n` invented star-shaped 10-gons, 0.4 to 5 km across (some edges over 1 km), round 10.6E 47.25N (lon/lat degrees)."""
    rng = np.random.default_rng(seed)
    lon0 = rng.uniform(10.1, 11.1, n)
    lat0 = rng.uniform(46.95, 47.55, n)
    radius_m = rng.uniform(200.0, 2500.0, n)
    t = np.linspace(0.0, 2 * np.pi, 10, endpoint=False)
    wobble = 1.0 + 0.3 * rng.uniform(-1.0, 1.0, (n, 10))
    dlat = radius_m[:, None] * wobble * np.sin(t) / 111_320.0
    dlon = radius_m[:, None] * wobble * np.cos(t) / (111_320.0 * np.cos(np.radians(lat0))[:, None])
    rings = np.stack([lon0[:, None] + dlon, lat0[:, None] + dlat], axis=-1)
    return layer_from_geometries(list(shapely.polygons(rings)), "EPSG:4326", name="invented")


def run(layer, method, to_lonlat, to_plane):
    dense = densify(layer.geometries, layer.crs, DEFAULT_DENSIFY_M)
    return method(dense, to_lonlat, layer), method(dense, to_plane, layer)


def best(fn) -> tuple[float, object]:
    times, result = [], None
    for _ in range(REPEATS):
        start = time.perf_counter()
        result = fn()
        times.append(time.perf_counter() - start)
    return min(times), result


def identical(a, b) -> bool:
    return all(
        len(x) == len(y) and bool(np.all(shapely.equals_exact(x, y, tolerance=0)))
        and np.array_equal(shapely.get_coordinates(x), shapely.get_coordinates(y))
        for x, y in zip(a, b)
    )


def main() -> None:
    layers = [
        ("sample blocks", read_layer(ROOT / "sample_data" / "vale_county.gpkg", layer="blocks")),
        (f"{N_SMALL:,} invented polygons", small_polygons(N_SMALL)),
    ]
    print(f"densify every {DEFAULT_DENSIFY_M:g} m, then transform to lon/lat and to the plane; best of {REPEATS}")
    print(f"{'layer':<26} {'features':>8} {'vertices':>9} {'per feature s':>14} {'one call s':>11} {'ratio':>6}  identical")
    for name, layer in layers:
        plane = project_layer(layer).plane
        to_lonlat, to_plane = transformer(layer.crs, LONLAT), transformer(layer.crs, plane.crs)
        t_loop, loop = best(partial(run, layer, per_feature, to_lonlat, to_plane))
        t_one, one = best(partial(run, layer, one_call, to_lonlat, to_plane))
        vertices = int(shapely.get_num_coordinates(loop[1]).sum())
        print(f"{name:<26} {len(layer):>8,} {vertices:>9,} {t_loop:>14.4f} {t_one:>11.4f} "
              f"{t_loop / t_one:>6.2f}  {identical(loop, one)}")
    for name, layer in layers:
        t_all, _ = best(partial(project_layer, layer))
        print(f"whole project_layer, {name}: {t_all:.4f} s")


if __name__ == "__main__":
    main()
