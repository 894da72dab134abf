"""Every pairwise overlap of 2,000 zones: one shared sample, a sample per pair, and the fair exact overlay, in one run.

Run:  .venv/bin/python benchmarks/overlap_pairs.py [--quick] [--compare]

The scene (synthetic, fixed seed): 2,000 service zones (disks of 257
vertices, radii about 710 m ± 30%, centres uniform over a 46 km square,
mean cover 1.5), written to a GeoPackage in WGS84 lon/lat.  Each side
starts from that file:

* **areamc, shared sample**: ``read_layer`` and ``project_layers``, then
  ``estimate_overlaps(pair_sampling="shared")``: one sample of
  ``PER_PAIR x pairs`` points in the layer's box, every pair counted from
  the grid index's (point, zone) hits (index building included);
* **areamc, per pair**: the same loading, then
  ``estimate_overlaps(pair_sampling="per-pair")`` with ``PER_PAIR`` points
  in each pair's own box, so both methods draw the same total of points;
* **fair exact overlay**: SQL read and one pyproj call
  (``baselines.load_plane``), one ``STRtree`` query of every zone against
  the tree with the ``intersects`` predicate, and one vectorised
  ``shapely.intersection`` and ``shapely.area`` over the pairs found.

Neither areamc run computes exact areas or the multiplicity profile inside
the timing; afterwards each row's deviation ``z`` (binomial mid-p score,
docs/methods.md §7) is taken against shapely's intersection area on
areamc's own plane.  It prints the times (loading, job, total, job times the
best of REPEATS), the ratios, the worst |z| of each method, and the median
relative half-width of the smallest and the largest tenth of the pairs.

``--compare`` measures what docs/methods.md §9 reports: on 300 and 3,000
zones (mean cover 1.5) and 2,000 zones (cover 4), both methods at equal
total points, then on the 300-zone scene an absolute and a relative
``--tolerance``.  One run each (these runs take seconds to minutes).
``--quick``: 500 zones (with ``--compare``, 100 and 500 zones).
"""

from __future__ import annotations

import argparse
import tempfile
from functools import partial
from pathlib import Path

import numpy as np
import shapely

from common import PLANE, best_of, disks, fmt_s, print_record, record, timed, write_scene
import baselines
from areamc.checks import binomial_deviation
from areamc.load import layer_from_geometries, read_layer
from areamc.overlap import candidate_pairs, estimate_overlaps
from areamc.project import project_layers
from areamc.stopping import StopRule

NAME = "overlap pairs"
COMMAND = ".venv/bin/python benchmarks/overlap_pairs.py"
#: Points per pair: the per-pair method's --points, and the shared sample's size over the number of pairs.
PER_PAIR = 1_000
REPEATS = 2
SEED = 17
COVER = 1.5


def scene(n: int, cover: float = COVER) -> np.ndarray:
    """`n` disks in :data:`common.PLANE` (metres), mean cover `cover` of a 46 km square."""
    return disks(n, np.random.default_rng(20261205), cover=cover)


def areamc_load(path):
    (layer,) = project_layers([read_layer(path, layer="zones", id_field="id")])
    return layer


def areamc_job(layer, method: str, stop: StopRule, chunk: int | None = None):
    extra = {} if chunk is None else {"chunk": chunk}
    return estimate_overlaps(layer, stop=stop, seed=SEED, pair_sampling=method, exact=False, profile=False,
                             workers=1, **extra)


def baseline_load(path):
    zones, _ = baselines.load_plane(path, "zones", PLANE)
    return zones


def exact_overlaps(zones) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The fair exact overlay: pairs i < j whose intersection has positive area, and those areas (m²)."""
    tree = shapely.STRtree(zones)
    i, j = tree.query(zones, predicate="intersects")
    keep = i < j
    i, j = i[keep], j[keep]
    area = shapely.area(shapely.intersection(zones[i], zones[j]))
    positive = area > 0
    return i[positive], j[positive], area[positive]


def summary(report, layer) -> dict:
    """Worst |z| against shapely on areamc's plane, and median relative half-widths of the small and large pairs."""
    i, j = (np.array(v) for v in zip(*report.pairs))
    exact = shapely.area(shapely.intersection(layer.planar[i], layer.planar[j]))
    rows = report.rows
    hits = np.array([r.hits for r in rows])
    points = np.array([r.points for r in rows])
    box = np.array([r.box_area for r in rows])
    half = np.array([(r.ci_high - r.ci_low) / 2 for r in rows])
    z = np.asarray(binomial_deviation(hits, points, exact / box))
    order = np.argsort(exact)
    tenth = max(1, len(order) // 10)
    small, large = order[:tenth], order[-tenth:]
    drawn = (int(sum(r.points + r.pilot_points for r in rows)) if report.pair_sampling == "per-pair"
             else rows[0].points + rows[0].pilot_points)
    return dict(worst_z=float(np.max(np.abs(z))), small=float(np.median(half[small] / exact[small])),
                large=float(np.median(half[large] / exact[large])), small_m2=float(np.median(exact[small])),
                large_m2=float(np.median(exact[large])), drawn=drawn, half=half, exact=exact, pairs=len(rows))


def run(quick: bool = False, repeats: int = REPEATS) -> dict:
    """Time the three sides on the scene and return the benchmark record (see ``common.record``)."""
    zones = scene(500 if quick else 2000)
    with tempfile.TemporaryDirectory() as tmp:
        path = write_scene(Path(tmp) / "overlap_pairs.gpkg", {"zones": (zones, {})})
        baseline_load(path)  # both sides then find the file in the operating system's cache
        load_mc, layer = timed(lambda: areamc_load(path))
        n_pairs = candidate_pairs(layer).shape[1]
        job_shared, shared = best_of(lambda: areamc_job(layer, "shared", StopRule(points=PER_PAIR * n_pairs)),
                                     repeats)
        job_each, each = best_of(lambda: areamc_job(layer, "per-pair", StopRule(points=PER_PAIR)), repeats)
        load_ex, loaded = timed(lambda: baseline_load(path))
        job_ex, (ei, ej, earea) = best_of(lambda: exact_overlaps(loaded), max(repeats, 3))
    s, e = summary(shared, layer), summary(each, layer)
    t_shared, t_each, t_exact = load_mc + job_shared, load_mc + job_each, load_ex + job_ex
    print(f"{len(zones):,} zones (257-vertex disks, mean cover {COVER}), {n_pairs:,} candidate pairs; "
          f"job times best of {repeats} (exact: best of {max(repeats, 3)}), one core")
    print(f"smallest tenth of the pairs: median overlap {s['small_m2']:,.0f} m2; largest tenth: {s['large_m2']:,.0f} m2")
    print(f"{'method':<28} {'load':>8} {'job':>8} {'total':>8} {'points':>12} {'worst |z|':>9} "
          f"{'small half-width':>16} {'large half-width':>16}")
    for label, load, job, stats in (("areamc shared sample", load_mc, job_shared, s),
                                    ("areamc per pair", load_mc, job_each, e)):
        print(f"{label:<28} {fmt_s(load):>8} {fmt_s(job):>8} {fmt_s(load + job):>8} {stats['drawn']:>12,} "
              f"{stats['worst_z']:>9.2f} {stats['small']:>16.1%} {stats['large']:>16.2%}")
    print(f"{'fair exact overlay':<28} {fmt_s(load_ex):>8} {fmt_s(job_ex):>8} {fmt_s(t_exact):>8} {'':>12} "
          f"{'exact':>9}")
    print(f"  {len(ei):,} pairs of positive area, total overlap {earea.sum() / 1e6:,.3f} km2 "
          f"(areamc shared: {sum(r.estimate for r in shared.rows) / 1e6:,.3f} km2 over {s['pairs']:,} pairs; "
          f"per pair: {sum(r.estimate for r in each.rows) / 1e6:,.3f} km2)")
    print(f"ratios: per-pair time / shared time {t_each / t_shared:.2f} (jobs only {job_each / job_shared:.2f}); "
          f"exact time / shared time {t_exact / t_shared:.2f} (jobs only {job_ex / job_shared:.2f})")
    return record(
        NAME, f"every pairwise overlap of {len(zones):,} zones ({n_pairs:,} pairs), {PER_PAIR:,} points per pair "
        "in total: one shared sample against a sample per pair", COMMAND + (" --quick" if quick else ""),
        areamc_s=t_shared, baseline_s=t_exact, load_areamc_s=load_mc, load_baseline_s=load_ex,
        ratio=t_exact / t_shared, job_ratio=job_ex / job_shared,
        areamc_text=(f"shared {fmt_s(t_shared)} (load {fmt_s(load_mc)}), worst |z| {s['worst_z']:.2f}; "
                     f"per pair {fmt_s(t_each)}, worst |z| {e['worst_z']:.2f}"),
        baseline_text=f"{fmt_s(t_exact)} (load {fmt_s(load_ex)}); {len(ei):,} pairs, {earea.sum() / 1e6:,.3f} km²",
        notes=[f"per-pair time / shared time: {t_each / t_shared:.2f}",
               f"median relative half-width, smallest tenth of the pairs: shared {s['small']:.1%}, per pair "
               f"{e['small']:.1%}; largest tenth: shared {s['large']:.2%}, per pair {e['large']:.2%}"],
    )


# -- the measurements behind the default (docs/methods.md §9) -------------------------------------------------

def _layer(n: int, cover: float):
    (layer,) = project_layers([layer_from_geometries(list(scene(n, cover)), PLANE)], crs=PLANE, densify_m=1e9)
    return layer


def _line(label: str, seconds: float, stats: dict, extra: str = "") -> None:
    print(f"  {label:<34} {fmt_s(seconds):>8} {stats['drawn']:>13,} pts  worst |z| {stats['worst_z']:5.2f}  "
          f"half-width small {stats['small']:7.1%}  large {stats['large']:6.2%}{extra}")


def compare(quick: bool = False) -> None:
    """Both methods at equal total points on three scenes, then under absolute and relative tolerances."""
    scenes = [(100, 1.5), (500, 1.5)] if quick else [(300, 1.5), (3000, 1.5), (2000, 4.0)]
    per = 2_000
    print(f"equal total points: {per:,} per pair, or {per:,} x pairs in one shared sample; one run each, one core")
    layers = {}
    for n, cover in scenes:
        layer = layers[(n, cover)] = _layer(n, cover)
        n_pairs = candidate_pairs(layer).shape[1]
        print(f"{n:,} zones, mean cover {cover}: {n_pairs:,} pairs")
        for label, method, stop in (("per pair", "per-pair", StopRule(points=per)),
                                    ("shared sample", "shared", StopRule(points=per * n_pairs))):
            seconds, report = timed(partial(areamc_job, layer, method, stop))
            _line(label, seconds, summary(report, layer))
    n, cover = scenes[0]
    layer = layers[(n, cover)]
    absolute = 0.01 * float(np.mean(shapely.area(layer.planar)))
    print(f"{n:,} zones: absolute tolerance {absolute:,.0f} m2 (1% of the mean zone's area)")
    for label, method, chunk in (("per pair (default chunk)", "per-pair", None),
                                 ("per pair (--chunk 4096)", "per-pair", 4096),
                                 ("shared sample (default chunk)", "shared", None)):
        seconds, report = timed(partial(areamc_job, layer, method, StopRule(points=None, absolute=absolute), chunk))
        stats = summary(report, layer)
        _line(label, seconds, stats, f"  widest/target {stats['half'].max() / absolute:.2f}")
    relative = 0.10
    print(f"{n:,} zones: relative tolerance {relative:.0%} (cap 20,000,000 points per estimate)")
    for label, method in (("per pair", "per-pair"), ("shared sample", "shared")):
        seconds, report = timed(partial(areamc_job, layer, method, StopRule(points=None, relative=relative)))
        stats = summary(report, layer)
        met = float(np.mean(stats["half"] <= 1.1 * relative * np.array([r.estimate for r in report.rows])))
        _line(label, seconds, stats, f"  within 1.1 x target: {met:.0%}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke run")
    parser.add_argument("--compare", action="store_true", help="the measurements behind the default (methods §9)")
    args = parser.parse_args()
    if args.compare:
        compare(args.quick)
    else:
        print_record(run(quick=args.quick))


if __name__ == "__main__":
    main()
