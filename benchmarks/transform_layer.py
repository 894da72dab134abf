"""Reprojecting a layer: one PROJ call per feature against one call for the whole layer.

Run:  .venv/bin/python benchmarks/transform_layer.py [--quick]

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

import time
from functools import partial

import numpy as np
import shapely

from common import ROOT, fmt_s, main_for, record
from areamc.errors import CRSError
from areamc.load import layer_from_geometries, read_layer
from areamc.project import (
    DEFAULT_DENSIFY_M,
    LONLAT,
    densify,
    project_layer,
    transform_geometries,
    transformer,
)

REPEATS = 3
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


def run_layer(layer, method, to_lonlat, to_plane):
    dense = densify(layer.geometries, layer.crs, DEFAULT_DENSIFY_M)
    return method(dense, to_lonlat, layer), method(dense, to_plane, layer)


def best(fn, repeats: int = REPEATS) -> tuple[float, object]:
    times, result = [], None
    for _ in range(repeats):
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


def run(quick: bool = False) -> dict:
    """Time both ways on the two layers, print a line per layer, and return the record of the invented layer."""
    n_small = 5_000 if quick else N_SMALL
    repeats = 3 if quick else REPEATS
    layers = [
        ("sample blocks", read_layer(ROOT / "sample_data" / "vale_county.gpkg", layer="blocks")),
        (f"{n_small:,} invented polygons", small_polygons(n_small)),
    ]
    print(f"densify every {DEFAULT_DENSIFY_M:g} m, then transform to lon/lat and to the plane; best of {repeats}")
    print(f"{'layer':<26} {'features':>8} {'vertices':>9} {'per feature s':>14} {'one call s':>11} {'ratio':>6}  identical")
    last = None
    for name, layer in layers:
        plane = project_layer(layer).plane
        to_lonlat, to_plane = transformer(layer.crs, LONLAT), transformer(layer.crs, plane.crs)
        t_loop, loop = best(partial(run_layer, layer, per_feature, to_lonlat, to_plane), repeats)
        t_one, one = best(partial(run_layer, layer, one_call, to_lonlat, to_plane), repeats)
        vertices = int(shapely.get_num_coordinates(loop[1]).sum())
        same = identical(loop, one)
        print(f"{name:<26} {len(layer):>8,} {vertices:>9,} {t_loop:>14.4f} {t_one:>11.4f} "
              f"{t_loop / t_one:>6.2f}  {same}")
        last = (name, len(layer), t_loop, t_one, same)
    for name, layer in layers:
        t_all, _ = best(partial(project_layer, layer), repeats)
        print(f"whole project_layer, {name}: {t_all:.4f} s")
    name, count, t_loop, t_one, same = last
    return record(
        "reprojection", f"reproject {count:,} invented polygons: one call against a loop per feature",
        ".venv/bin/python benchmarks/transform_layer.py" + (" --quick" if quick else ""),
        areamc_s=t_one, baseline_s=t_loop, ratio=t_loop / t_one, ratio_of="per-feature time / one-call time",
        target="identical coordinates", met=same,
        areamc_text=f"one shapely.transform call: {fmt_s(t_one)}; bit-identical: {same}",
        baseline_text=f"per-feature loop (areamc's earlier code): {fmt_s(t_loop)}",
        notes=["the baseline here is areamc's own earlier code, not an exact method"],
    )


if __name__ == "__main__":
    main_for(run)
