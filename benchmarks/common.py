"""Shared pieces of the benchmark scripts: timing, the benchmark record, optional job keywords, synthetic scenes.

Every benchmark module has ``run(quick=False, ...) -> dict`` returning one
record (see :func:`record`), used both by its own ``__main__`` (which prints
it) and by ``run_all.py`` (which tabulates it into docs/performance.md).

Scenes are synthetic, fixed by seeds, and built in :data:`PLANE`, a Lambert
azimuthal equal-area plane at 47N 10E (metres); where loading is part of
the job they are written to a GeoPackage in WGS84 lon/lat, as an analyst's
files would be, and each side reads them with its own loader.
"""

from __future__ import annotations

import inspect
import math
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import shapely

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

#: The plane scenes are built in (metres).
PLANE = "+proj=laea +lat_0=47 +lon_0=10 +x_0=0 +y_0=0 +datum=WGS84 +units=m +no_defs"
#: Worker processes areamc is given when it takes the keyword: one, so that it and the one-core baselines share a core.
WORKERS = 1


# -- timing ----------------------------------------------------------------------------------------------------

def best_of(fn, repeats: int = 3):
    """``(best wall-clock seconds, result of the last call)`` over `repeats` calls of ``fn()``."""
    best, result = math.inf, None
    for _ in range(max(1, repeats)):
        start = time.perf_counter()
        result = fn()
        best = min(best, time.perf_counter() - start)
    return best, result


def timed(fn):
    """``(seconds, result)`` of one call of ``fn()``."""
    start = time.perf_counter()
    result = fn()
    return time.perf_counter() - start, result


@dataclass(frozen=True)
class Sides:
    """Times (seconds) and results of the two sides of a benchmark whose job starts by loading files."""

    load_areamc: float
    job_areamc: float
    areamc: object
    load_baseline: float
    job_baseline: float
    baseline: object

    def fields(self, *, answer: float, low: float, high: float, exact: float, unit: str, target: float | None,
               fmt: str) -> dict:
        """Record fields (``common.record``) for `answer` in [`low`, `high`] against `exact`, each formatted by `fmt`."""
        areamc_s, baseline_s = self.load_areamc + self.job_areamc, self.load_baseline + self.job_baseline
        ratio = baseline_s / areamc_s
        half = (high - low) / 2
        return dict(
            areamc_s=areamc_s, baseline_s=baseline_s, load_areamc_s=self.load_areamc,
            load_baseline_s=self.load_baseline, ratio=ratio, job_ratio=self.job_baseline / self.job_areamc,
            answer=answer, half_width=half, exact=exact, unit=unit, inside=bool(low <= exact <= high),
            target=None if target is None else f"≥ {target:g}x", target_value=target, met=met(ratio, target),
            areamc_text=f"{fmt_s(areamc_s)} (load {fmt_s(self.load_areamc)}); {answer:{fmt}} ± {half:{fmt}}",
            baseline_text=f"{fmt_s(baseline_s)} (load {fmt_s(self.load_baseline)}); {exact:{fmt}}",
        )


def side_by_side(areamc_load, areamc_job, baseline_load, baseline_job, repeats: int = 3) -> Sides:
    """Time both sides: each side's ``load()`` once, then its ``job(loaded)`` best of `repeats`.

    The baseline's loader runs once first, untimed, so both sides find the
    files in the operating system's cache.
    """
    baseline_load()
    load_mc, loaded_mc = timed(areamc_load)
    job_mc, answer_mc = best_of(lambda: areamc_job(loaded_mc), repeats)
    load_ex, loaded_ex = timed(baseline_load)
    job_ex, answer_ex = best_of(lambda: baseline_job(loaded_ex), repeats)
    return Sides(load_mc, job_mc, answer_mc, load_ex, job_ex, answer_ex)


# -- optional keywords of areamc jobs ---------------------------------------------------------------------------

def job_kwargs(func, *, sampler=None, workers=WORKERS, **extra) -> tuple[dict, str | None]:
    """Keywords to pass to an areamc job, and why the run is not possible (None when it is).

    `sampler` (a name) is passed when given; it must be registered in
    ``areamc.samplers.SAMPLERS`` and the job must take a ``sampler`` keyword.
    `workers` is passed only when the job takes it (so the benchmarks run on
    one core until asked otherwise, and keep working before ``workers``
    exists); asking for more than one worker from a job without the keyword
    makes the run unavailable.  Other keywords in `extra` (not None) must be
    in the job's signature.
    """
    params = inspect.signature(func).parameters
    kwargs: dict = {}
    if sampler is not None:
        from areamc import samplers

        if "sampler" not in params:
            return {}, f"{func.__name__} takes no sampler keyword"
        if isinstance(sampler, str) and sampler not in samplers.SAMPLERS:
            return {}, f"sampler {sampler!r} is not registered (areamc.samplers.SAMPLERS: {', '.join(samplers.SAMPLERS)})"
        kwargs["sampler"] = sampler
    if workers is not None:
        if "workers" in params:
            kwargs["workers"] = workers
        elif workers != 1:
            return {}, f"{func.__name__} takes no workers keyword"
    for name, value in extra.items():
        if value is None:
            continue
        if name not in params:
            return {}, f"{func.__name__} takes no {name} keyword"
        kwargs[name] = value
    return kwargs, None


def refusal(job: str, kwargs: dict) -> str | None:
    """Why areamc's `job` ("area" or "coverage") refuses `kwargs` (its OptionError on sampler or workers), else None.

    A tiny probe run (a 1 km square, 1,000 points), so a refused sampler is
    found before a benchmark writes and loads its scene.
    """
    from areamc.errors import OptionError
    from areamc.load import layer_from_geometries
    from areamc.project import project_layers
    from areamc.stopping import StopRule

    square = shapely.box(0, 0, 1000, 1000)
    region, zone = project_layers([layer_from_geometries([square], PLANE),
                                   layer_from_geometries([shapely.box(500, 0, 1500, 1000)], PLANE)],
                                  crs=PLANE, densify_m=1e9)
    try:
        if job == "area":
            from areamc.area import estimate_areas

            estimate_areas(region, stop=StopRule(points=1000), seed=1, exact=False, **kwargs)
        else:
            from areamc.coverage import estimate_coverage

            estimate_coverage(region, zone, stop=StopRule(points=1000), seed=1, exact=False, **kwargs)
    except OptionError as err:
        if err.param in ("sampler", "workers"):
            return str(err)
        raise
    return None


def options(func, job: str | None, name: str, command: str, *, quick: bool, sampler=None,
            workers=WORKERS) -> tuple[str, str, dict, str | None]:
    """A benchmark's row name, command, job keywords and why it cannot run (None when it can).

    The name gets the sampler in brackets and the command ``--quick``;
    keywords come from :func:`job_kwargs`, then a probe run of `job`
    ("area" or "coverage", :func:`refusal`) when there is one.
    """
    kwargs, missing = job_kwargs(func, sampler=sampler, workers=workers)
    if not missing and job is not None:
        missing = refusal(job, kwargs)
    return (name if sampler is None else f"{name} ({sampler})", command + (" --quick" if quick else ""), kwargs,
            missing)


def label(sampler=None, workers=WORKERS) -> str:
    """How areamc was run, for a record: ``"sampler X, 1 worker"``."""
    parts = [f"sampler {sampler}" if sampler else "default sampler"]
    parts.append(f"{workers} worker{'s' if workers != 1 else ''}" if workers else "default workers")
    return ", ".join(parts)


# -- the record --------------------------------------------------------------------------------------------------

def record(name: str, what: str, command: str, **fields) -> dict:
    """One benchmark's result as a small dict (every key present; None where it does not apply).

    Keys: ``name, what, command, status`` ("ok", "not available: ...",
    "failed: ..."), ``areamc_s, baseline_s`` (seconds, loading included
    where it is part of the job), ``load_areamc_s, load_baseline_s``,
    ``ratio`` (how many times better areamc is: baseline time over areamc
    time unless ``ratio_of`` says otherwise), ``ratio_of``, ``job_ratio``
    (the ratio without loading), ``answer, half_width, exact, unit, inside``
    (areamc's answer ± half-width, the baseline's exact answer, whether it
    lies in areamc's interval), ``target`` (text), ``target_value`` and
    ``met``, ``areamc_text, baseline_text`` (table cells) and ``notes``.
    """
    out = dict(name=name, what=what, command=command, status="ok", areamc_s=None, baseline_s=None,
               load_areamc_s=None, load_baseline_s=None, ratio=None, ratio_of="baseline time / areamc time",
               job_ratio=None, answer=None, half_width=None, exact=None, unit=None, inside=None, target=None,
               target_value=None, met=None, areamc_text="", baseline_text="", notes=[])
    unknown = set(fields) - set(out)
    if unknown:
        raise KeyError(f"unknown record fields {sorted(unknown)}")
    out.update(fields)
    return out


def unavailable(name: str, what: str, command: str, reason: str, **fields) -> dict:
    """A record for a row that could not run because a feature is not (yet) in areamc."""
    return record(name, what, command, status=f"not available: {reason}", **fields)


def met(ratio: float | None, target: float | None, at_most: bool = False) -> bool | None:
    """Whether `ratio` meets `target` (at least, or at most with `at_most`)."""
    if ratio is None or target is None or not math.isfinite(ratio):
        return None
    return bool(ratio <= target) if at_most else bool(ratio >= target)


def print_record(rec: dict) -> None:
    """Print a record's summary lines (the scripts print their own details first)."""
    print()
    print(f"[{rec['name']}] {rec['what']}")
    if rec["status"] != "ok":
        print(f"  {rec['status']}")
        return
    print(f"  areamc:   {rec['areamc_text']}")
    print(f"  baseline: {rec['baseline_text']}")
    if rec["ratio"] is not None:
        extra = f" (job only, without loading: {rec['job_ratio']:.2f})" if rec["job_ratio"] is not None else ""
        print(f"  ratio ({rec['ratio_of']}): {rec['ratio']:.2f}{extra}")
    if rec["inside"] is not None:
        print(f"  exact value inside areamc's interval: {rec['inside']}")
    if rec["target"]:
        print(f"  target {rec['target']}: {'met' if rec['met'] else 'not met' if rec['met'] is not None else 'n/a'}")
    for note in rec["notes"]:
        print(f"  note: {note}")


def main_for(run, alternatives=None) -> None:
    """``__main__`` of a benchmark: ``--quick`` for smaller sizes; prints the record.

    With `alternatives` (a function of ``quick``), ``--alternatives`` runs it
    instead: the timings of the exact methods tried for the baseline.
    """
    import argparse

    parser = argparse.ArgumentParser(description=(run.__module__ and sys.modules[run.__module__].__doc__ or "")
                                     .split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke run")
    if alternatives is not None:
        parser.add_argument("--alternatives", action="store_true", help="time the exact methods tried for the baseline")
    args = parser.parse_args()
    if alternatives is not None and args.alternatives:
        alternatives(args.quick)
    else:
        print_record(run(quick=args.quick))


# -- scenes --------------------------------------------------------------------------------------------------

def wobbly_district(vertices: int = 720, radius: float = 20_000.0, ripple: float = 0.0) -> shapely.Polygon:
    """A star-shaped district of `vertices` vertices, radius about `radius` metres, in the plane.

    A fixed wobble (``1 + 0.15 sin 5t + 0.05 cos 11t``, the district of the
    earlier benchmarks); `ripple` adds ``ripple x sin 397t`` for a ragged outline.
    """
    t = np.linspace(0, 2 * np.pi, vertices, endpoint=False)
    r = radius * (1 + 0.15 * np.sin(5 * t) + 0.05 * np.cos(11 * t) + ripple * np.sin(397 * t))
    return shapely.Polygon(np.column_stack([r * np.cos(t), r * np.sin(t)]))


def disks(n: int, rng: np.random.Generator, cover: float, half: float = 23_000.0, quad_segs: int = 64) -> np.ndarray:
    """`n` disks (4 x `quad_segs` + 1 vertices) with centres uniform on a square of half-side `half` metres.

    Radii vary by ±30% about the radius that makes the mean cover of the
    square `cover` (its area over the disks' total area).
    """
    radius = np.sqrt(cover * (2 * half) ** 2 / (n * np.pi))
    centres = rng.uniform(-half, half, size=(n, 2))
    radii = radius * rng.uniform(0.7, 1.3, size=n)
    return shapely.buffer(shapely.points(centres), radii, quad_segs=quad_segs)


def write_scene(path, layers: dict, crs: str = "EPSG:4326") -> Path:
    """Write plane geometries (``{layer: (geoms, {field: values})}``, in :data:`PLANE`) to a GeoPackage in `crs`.

    Each feature gets an ``id`` text field plus the given numeric fields.
    """
    import fiona
    import pyproj

    trans = pyproj.Transformer.from_crs(PLANE, crs, always_xy=True)
    path = Path(path)
    for name, (geoms, fields) in layers.items():
        geoms = np.asarray(geoms, dtype=object)
        out = shapely.transform(geoms, lambda xy: np.column_stack(trans.transform(xy[:, 0], xy[:, 1])))
        schema = {"geometry": "Polygon", "properties": {"id": "str", **{f: "float" for f in fields}}}
        with fiona.open(path, "w", driver="GPKG", layer=name, crs=crs, schema=schema) as dst:
            dst.writerecords(
                {"geometry": shapely.geometry.mapping(g),
                 "properties": {"id": f"{name[0].upper()}{i}", **{f: float(v[i]) for f, v in fields.items()}}}
                for i, g in enumerate(out))
    return path


def fmt_s(seconds: float | None) -> str:
    """Seconds for a table cell: "1.23 s", "45.6 ms" or "7.8 µs"."""
    if seconds is None:
        return "—"
    if seconds >= 0.1:
        return f"{seconds:.2f} s"
    return f"{seconds * 1e3:.1f} ms" if seconds >= 1e-3 else f"{seconds * 1e6:.1f} µs"
