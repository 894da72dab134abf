"""Persons in a district from a population raster: areamc against the exact vectorised cell fractions, in one run.

Run:  .venv/bin/python benchmarks/raster_total.py [--quick]

The scene (synthetic, fixed seed): a count raster of 100 m cells on the
European LAEA grid (EPSG:3035), 480 x 480 cells with Poisson counts around
three towns, written as a GeoTIFF, and the 40 km district of the other
benchmarks (720 vertices) in a GeoPackage in WGS84 lon/lat.  Each side
starts from the two files and works on EPSG:3035:

* **areamc**: ``read_layer``, ``project_layers(crs="EPSG:3035")``,
  ``RasterDensity`` and ``integrate_density`` by importance sampling (a
  cell drawn by its count, a point uniform in it), to a 0.5% relative
  half-width of the total;
* **exact** (``baselines.raster_total``): the SQL read and one pyproj call,
  the raster band read with rasterio, then the share of each cell inside the
  district: cells the outline crosses found from its edges' grid-line
  crossings and clipped exactly, every other cell decided by its centre,
  with no polygon for an interior cell.

Prints both times, both answers, the interval and whether the exact total
lies in it; job times are the best of 3.  ``--quick``: 200 m cells.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import pyproj

from common import (PLANE, WORKERS, best_of, fmt_s, label, main_for, options, record, unavailable,
                    wobbly_district, write_scene)
import baselines
from areamc.density import RasterDensity
from areamc.integrate import integrate_density
from areamc.load import read_layer
from areamc.project import project_layers
from areamc.stopping import StopRule

GRID = "EPSG:3035"
RELATIVE = 0.005
COMMAND = ".venv/bin/python benchmarks/raster_total.py"
SEED = 17


def write_raster(path: Path, cell: float) -> Path:
    """A count raster on EPSG:3035 round the scene's centre (10E 47N), 48 km square."""
    import rasterio
    from rasterio.transform import from_origin

    x0, y0 = pyproj.Transformer.from_crs(PLANE, GRID, always_xy=True).transform(0.0, 0.0)
    n = int(round(48_000 / cell))
    west, north = np.floor((x0 - 24_000) / 1000) * 1000, np.ceil((y0 + 24_000) / 1000) * 1000
    cx = west + cell * (np.arange(n) + 0.5)
    cy = north - cell * (np.arange(n) + 0.5)
    gx, gy = np.meshgrid(cx - x0, cy - y0)
    towns = np.array([[-8000, 3000], [6000, -5000], [9000, 9000]])
    dens = sum(4e-3 * np.exp(-((gx - tx) ** 2 + (gy - ty) ** 2) / (2 * 3000.0**2)) for tx, ty in towns) + 5e-5
    counts = np.random.default_rng(20261205).poisson(dens * cell * cell).astype("float32")
    profile = dict(driver="GTiff", height=n, width=n, count=1, dtype="float32", crs=GRID,
                   transform=from_origin(west, north, cell, cell))
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(counts, 1)
    return path


def areamc_job(vector: Path, raster: Path, kwargs):
    (region,) = project_layers([read_layer(vector, layer="districts", id_field="id")], crs=GRID)
    with RasterDensity(str(raster), region.plane, values="count") as source:
        report = integrate_density(region, source, stop=StopRule(points=None, relative=RELATIVE,
                                                                 max_points=50_000_000),
                                   seed=SEED, exact=False, **kwargs)
    return report.rows[0]


def baseline_job(vector: Path, raster: Path) -> float:
    import rasterio

    (region,), _ = baselines.load_plane(vector, "districts", GRID)
    with rasterio.open(raster) as src:
        counts = src.read(1).astype(float)
        transform = src.transform
    return baselines.raster_total(region, counts, transform)


def run(quick: bool = False, sampler: str | None = None, workers: int | None = WORKERS, repeats: int = 3) -> dict:
    """Time both sides on the scene and return the benchmark record (see ``common.record``)."""
    cell = 200.0 if quick else 100.0
    n = int(round(48_000 / cell))
    what = f"persons in a district from a {n} x {n} count raster ({cell:g} m cells), to 0.5%"
    name, command, kwargs, missing = options(integrate_density, None, "raster total", COMMAND, quick=quick,
                                             sampler=sampler, workers=workers)
    if missing:
        return unavailable(name, what, command, missing)
    with tempfile.TemporaryDirectory() as tmp:
        vector = write_scene(Path(tmp) / "district.gpkg", {"districts": ([wobbly_district()], {})})
        raster = write_raster(Path(tmp) / "persons.tif", cell)
        baseline_job(vector, raster)  # warm the file cache for both sides
        t_mc, row = best_of(lambda: areamc_job(vector, raster, kwargs), repeats)
        t_ex, exact = best_of(lambda: baseline_job(vector, raster), repeats)
    half = (row.ci_high - row.ci_low) / 2
    print(f"{n} x {n} cells of {cell:g} m on {GRID}; load and job together, best of {repeats}")
    print(f"areamc ({label(sampler, workers)}; {row.method} sampling, to {RELATIVE:.1%}): {fmt_s(t_mc)}, "
          f"{row.points:,} points")
    print(f"  persons {row.estimate:,.0f} [{row.ci_low:,.0f}, {row.ci_high:,.0f}] "
          f"(relative half-width {half / row.estimate:.3%})")
    print(f"exact cell fractions (edge crossings, centre tests, clipped crossing cells): {fmt_s(t_ex)}")
    print(f"  persons {exact:,.2f}")
    return record(
        name, what, command, areamc_s=t_mc, baseline_s=t_ex, ratio=t_ex / t_mc, answer=row.estimate,
        half_width=half, exact=exact, unit="persons", inside=bool(row.ci_low <= exact <= row.ci_high),
        areamc_text=f"{fmt_s(t_mc)}; {row.estimate:,.0f} ± {half:,.0f}",
        baseline_text=f"{fmt_s(t_ex)}; {exact:,.0f}, vectorised cell fractions",
        notes=["times include reading both files and projecting the district"],
    )


if __name__ == "__main__":
    main_for(run)
