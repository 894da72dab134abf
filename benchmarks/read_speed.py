"""Reading vector layers: fiona against pyogrio, on the sample blocks and a large invented layer.

Run:  .venv/bin/python benchmarks/read_speed.py [--quick]

``areamc.load.read_layer`` reads a layer's features through fiona, or through pyogrio (one call
for the whole layer, geometries as WKB) when it is installed and the layer is large
(``PYOGRIO_MIN_FEATURES``).  This times, side by side in one run and best of REPEATS each:

* **the readers alone**: fiona iterating the features into (id, geometry mapping, attributes)
  records, as a skilled user would write it, against ``pyogrio.raw.read`` plus
  ``shapely.from_wkb`` and the same records;
* **the whole read_layer** (the checks, repair and Layer included) with each reader, chosen
  by the ``AREAMC_READER`` variable.

Both sides print what they read: the features, and whether the two Layers are identical (ids,
feature positions, geometries bit for bit, attributes with their Python types, fields, CRS,
geometry-type counts).  The layers are the sample blocks (sample_data/vale_county.gpkg, layer
"blocks", 569 polygons) and N_LARGE invented 10-gons written to a GeoPackage in a temporary
folder.  Last it times ``import pyogrio.raw`` in fresh interpreters (best of 3, with the
interpreter's own start taken off), the fixed cost that sets the threshold.

The machine is shared and timings are noisy: best of 3.
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import time
from contextlib import contextmanager
from functools import partial

import numpy as np
import shapely

from common import ROOT, fmt_s, main_for, record
from areamc.load import PYOGRIO_MIN_FEATURES, READER_VARIABLE, read_layer

REPEATS = 3
N_LARGE = 100_000


def best(fn, repeats: int = REPEATS):
    times, result = [], None
    for _ in range(repeats):
        start = time.perf_counter()
        result = fn()
        times.append(time.perf_counter() - start)
    return min(times), result


@contextmanager
def reader(name: str):
    old = os.environ.get(READER_VARIABLE)
    os.environ[READER_VARIABLE] = name
    try:
        yield
    finally:
        if old is None:
            os.environ.pop(READER_VARIABLE, None)
        else:
            os.environ[READER_VARIABLE] = old


def fiona_records(path: str, layer: str) -> list:
    import fiona

    with fiona.open(path, layer=layer) as src:
        return [(f.id, f.geometry, dict(f.properties)) for f in src]


def pyogrio_records(path: str, layer: str) -> list:
    import pyogrio.raw

    meta, fids, wkb, columns = pyogrio.raw.read(path, layer=layer, return_fids=True)
    names = list(meta["fields"])
    props = [dict(zip(names, row)) for row in zip(*[c.tolist() for c in columns])]
    return list(zip(map(str, fids.tolist()), shapely.from_wkb(wkb).tolist(), props))


def read_with(path: str, layer: str, name: str):
    with reader(name):
        return read_layer(path, layer=layer)


def same_layer(a, b) -> bool:
    """Whether two Layers hold the same features: ids, positions, geometries bit for bit, typed attributes."""
    return (a.ids == b.ids and a.indices == b.indices and a.fields == b.fields and a.crs == b.crs
            and a.geometry_types == b.geometry_types and a.empty == b.empty and a.skipped == b.skipped
            and a.repaired == b.repaired
            and [[(k, type(v), v) for k, v in p.items()] for p in a.properties]
            == [[(k, type(v), v) for k, v in p.items()] for p in b.properties]
            and bool(np.all(shapely.to_wkb(a.geometries) == shapely.to_wkb(b.geometries))))


def invented_layer(folder: str, n: int, seed: int = 20261202) -> str:
    """`n` invented star-shaped 10-gons round 10.6E 47.25N with a text id and a count, in a GeoPackage."""
    import fiona
    from shapely.geometry import mapping

    rng = np.random.default_rng(seed)
    lon0, lat0 = rng.uniform(10.1, 11.1, n), rng.uniform(46.95, 47.55, n)
    radius = rng.uniform(200.0, 2500.0, n)
    t = np.linspace(0.0, 2 * np.pi, 10, endpoint=False)
    wobble = 1.0 + 0.3 * rng.uniform(-1.0, 1.0, (n, 10))
    dlat = radius[:, None] * wobble * np.sin(t) / 111_320.0
    dlon = radius[:, None] * wobble * np.cos(t) / (111_320.0 * np.cos(np.radians(lat0))[:, None])
    polygons = shapely.polygons(np.stack([lon0[:, None] + dlon, lat0[:, None] + dlat], axis=-1))
    counts = rng.integers(0, 2_000, n)
    path = os.path.join(folder, "invented.gpkg")
    schema = {"geometry": "Polygon", "properties": {"block_id": "str", "population": "int"}}
    with fiona.open(path, "w", driver="GPKG", crs="EPSG:4326", schema=schema, layer="blocks") as dst:
        dst.writerecords({"geometry": mapping(g), "properties": {"block_id": f"B{i:06d}", "population": int(c)}}
                         for i, (g, c) in enumerate(zip(polygons, counts)))
    return path


def import_cost() -> float:
    """Seconds ``import pyogrio.raw`` adds to a fresh interpreter that already imported fiona (best of 3)."""
    def once(code: str) -> float:
        start = time.perf_counter()
        subprocess.run([sys.executable, "-c", code], check=True)
        return time.perf_counter() - start

    base = "import fiona, shapely, pyproj, numpy"
    plain = min(once(base) for _ in range(3))
    more = min(once(base + "; import pyogrio.raw") for _ in range(3))
    return max(0.0, more - plain)


def run(quick: bool = False) -> dict:
    """Time both readers on both layers; print a line per layer and the import cost; return the large layer's record."""
    try:
        import pyogrio  # noqa: F401
    except ImportError:
        from common import unavailable
        return unavailable("read speed", "fiona against pyogrio", ".venv/bin/python benchmarks/read_speed.py",
                           "pyogrio is not installed (pip install 'areamc[pyogrio]')")
    n = 20_000 if quick else N_LARGE
    out = None
    with tempfile.TemporaryDirectory() as folder:
        layers = [("sample blocks", str(ROOT / "sample_data" / "vale_county.gpkg"), "blocks"),
                  (f"{n:,} invented 10-gons", invented_layer(folder, n), "blocks")]
        print(f"best of {REPEATS}; read_layer reads through pyogrio from {PYOGRIO_MIN_FEATURES:,} features up")
        print(f"{'layer':<24} {'features':>8} | {'fiona':>9} {'pyogrio':>9} {'ratio':>6} | "
              f"{'read_layer fiona':>16} {'pyogrio':>9} {'ratio':>6} | identical")
        for name, path, layer in layers:
            t_fiona, recs_f = best(partial(fiona_records, path, layer))
            t_ogr, recs_o = best(partial(pyogrio_records, path, layer))
            t_lf, layer_f = best(partial(read_with, path, layer, "fiona"))
            t_lo, layer_o = best(partial(read_with, path, layer, "pyogrio"))
            same = same_layer(layer_f, layer_o) and len(recs_f) == len(recs_o)
            print(f"{name:<24} {len(layer_f):>8,} | {t_fiona:>9.3f} {t_ogr:>9.3f} {t_fiona / t_ogr:>6.2f} | "
                  f"{t_lf:>16.3f} {t_lo:>9.3f} {t_lf / t_lo:>6.2f} | {same}")
            out = (name, len(layer_f), t_fiona, t_ogr, t_lf, t_lo, same)
    cost = import_cost()
    name, count, t_fiona, t_ogr, t_lf, t_lo, same = out
    per_feature = (t_lf - t_lo) / count
    print(f"import pyogrio.raw adds {fmt_s(cost)} to a fresh interpreter; read_layer saves "
          f"{per_feature * 1e6:.1f} µs a feature, so pyogrio pays from about {cost / per_feature:,.0f} features")
    return record(
        "read speed", f"read_layer on {count:,} invented polygons: through pyogrio against through fiona",
        ".venv/bin/python benchmarks/read_speed.py" + (" --quick" if quick else ""),
        areamc_s=t_lo, baseline_s=t_lf, ratio=t_lf / t_lo, ratio_of="fiona time / pyogrio time (whole read_layer)",
        target="identical layers", met=same,
        areamc_text=f"pyogrio: {fmt_s(t_lo)} (reader alone {fmt_s(t_ogr)}); identical: {same}",
        baseline_text=f"fiona: {fmt_s(t_lf)} (reader alone {fmt_s(t_fiona)})",
        notes=[f"import pyogrio.raw: {fmt_s(cost)}; break-even about {cost / per_feature:,.0f} features"],
    )


if __name__ == "__main__":
    main_for(run)
