"""The moonshot of issue 9: every district's covered share and covered population on an invented national scene.

Run:  .venv/bin/python benchmarks/moonshot.py [--quick] [--scale X] [--workers N] [--batch N] [--dump FILE.npz]
      [--profile-districts N] [--no-save]

The scene (synthetic, fixed seeds, built by :func:`scene` in the Lambert
azimuthal equal-area plane of ``common.PLANE``, metres):

* a **country** of about 560,000 km² (a wobbly outline of 1,024 vertices)
  with 300 towns whose sizes follow Zipf's rule (50 million persons, three
  quarters of them in towns, each town a Gaussian bump of density);
* **3,000 districts**: the Voronoi cells (``shapely.voronoi_polygons``) of
  random sites, 70% uniform over the country and 30% around the towns (so
  town districts are small), clipped to the outline;
* about **1,000,000 population blocks**: the Voronoi cells of 900,000 sites
  (half uniform, half around the towns), cut along the district lines, each
  with a Poisson count of persons around its expected value;
* **100,000 zones** from 4 operators (25,000 each): disks of 97 vertices,
  half placed where people live (sites drawn in proportion to block
  counts, radii log-normal about 1 km) and half spread over the land
  (radii 1-3 km), in the shares of each operator.

Both sides get the scene in memory, in the plane; neither loads a file
(writing a million blocks to a GeoPackage through fiona is timed on a
sample of blocks and printed, to show why):

* **areamc**: the layers built by ``layer_from_geometries`` and
  ``project_layers`` (plane in, ``densify_m`` huge so the geometries are
  kept; timed and reported as areamc's loading), then the job:
  ``BlockDensity(blocks, counts)`` and one ``estimate_coverage(districts,
  zones, density=..., stop=StopRule(points=None, relative=0.005),
  exact=False, workers=2)``: every district's share covered by at least one
  zone and its covered population, each to a 0.5% relative half-width;
* **fair exact overlay** (``baselines.covered_shares`` and
  ``baselines.covered_population_by``, one core; their docstrings give the
  alternatives measured): per district, the union of only the zones a
  shared STRtree finds meeting it, intersected with the district; for the
  population, per district, its blocks against those zones by the areal
  weighting of ``baselines.population_covered`` (an STRtree query for the
  (block, zone) pairs, blocks inside a zone counted whole, one vectorised
  intersection, local unions per block).  If a timed sample of districts
  says the whole overlay would take more than ``EXACT_LIMIT_S``, it is run
  on that sample only and its time extrapolated by district count (said
  so in the output).

It prints both times and their ratio, both answers per district (the first
few, then sums over the districts), how many intervals hold the exact
values (with a 99% binomial band around the nominal 95%), and where
areamc's time goes: the one-time work timed with ``time.perf_counter`` and a
cProfile of the per-district work on a fixed sample of districts on one
worker, by stage, extrapolated to the whole job.  A full run saves its
record to ``benchmarks/moonshot_last.json`` (date, command, revision), which
``run_all.py`` shows when it is not asked to run the moonshot (``--moonshot``).

``--quick``: a 1/100 scale scene (30 districts, 1,000 zones, 10,000 blocks;
about 20 s); ``--scale X`` any other scale (0.1 takes about 2 minutes).
``--batch N`` runs areamc's job as calls of N districts each, to show its
progress and stop it after the batch that ends past ``AREAMC_LIMIT_S``
(the rest extrapolated, and said so); ``--dump`` writes every district's
answers on both sides to an ``.npz`` file.  The full run takes 12 to 16
minutes here (scene 40 s, fiona sample 3 s, areamc's layers 150-185 s, job
290-555 s depending on what else runs, profile 40 s, exact overlay 120-210 s
with its timed sample) and about 11 GiB of memory in use at its peak (this
process 4.9 GiB; two workers 7.4 GiB each by RSS, about 3 GiB each of it
their own, the rest shared with this process).
"""

from __future__ import annotations

import cProfile
import datetime
import io
import json
import math
import pstats
import resource
import sys
import tempfile
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import shapely

from common import PLANE, ROOT, fmt_s, label, options, print_record, record, timed, unavailable
import baselines
from areamc.coverage import estimate_coverage
from areamc.density import BlockDensity
from areamc.load import layer_from_geometries
from areamc.project import project_layers
from areamc.stopping import StopRule

NAME = "moonshot"
WHAT = ("every district's covered share and covered population, {districts:,} districts, {zones:,} zones, "
        "{blocks:,} blocks, to 0.5%")
COMMAND = ".venv/bin/python benchmarks/moonshot.py"
#: The moonshot: the whole job in under 2 minutes on this machine.
TARGET_S = 120.0
RELATIVE = 0.005
CONFIDENCE = 0.95
#: areamc's worker processes (the machine has 2 cores); the exact overlay runs on one.
WORKERS = 2
SEED_SCENE = 20261209
SEED_JOB = 9
SEED_SAMPLE = 20261210
#: Above this (seconds, extrapolated from a timed sample of districts), the exact overlay is run on the sample only.
EXACT_LIMIT_S = 600.0
#: Share of the districts in the timed sample of the exact overlay (at least 30 districts).
EXACT_SAMPLE_SHARE = 0.1
#: Districts profiled on one worker to show where areamc's time goes.
PROFILE_DISTRICTS = 60
#: Where a full run's record is kept for run_all.py.
SAVED = Path(__file__).resolve().parent / "moonshot_last.json"
#: With ``--batch N`` the job runs as calls of N districts each, so that its progress shows, and stops after the
#: batch that ends past this (seconds); the rest is then extrapolated.  By default it is one call.
AREAMC_LIMIT_S = 1200.0
#: Blocks written to a GeoPackage through fiona to time that path (extrapolated to all the blocks).
WRITE_SAMPLE = 20_000

#: Full-scale sizes; --quick divides them by 100 (the country's area too, so densities stay the same).
FULL = dict(districts=3000, zones=100_000, blocks=1_000_000, towns=300, persons=50e6, radius=420e3)
#: Operators: name and the share of its sites placed where people live (the rest spread over the land).
OPERATORS = (("A", 0.6), ("B", 0.5), ("C", 0.4), ("D", 0.5))
#: Block sites per block wanted: cutting the cells along district lines adds about 10% more blocks.
SITES_PER_BLOCK = 0.9
#: Vertices per zone disk: 4 x QUAD_SEGS + 1.
QUAD_SEGS = 24


@dataclass(frozen=True)
class Scene:
    """The invented country, all in :data:`common.PLANE` (metres; counts in persons)."""

    country: shapely.Polygon
    districts: np.ndarray
    blocks: np.ndarray
    counts: np.ndarray
    owner: np.ndarray  # district index of each block
    zones: np.ndarray
    operator: np.ndarray  # operator name of each zone
    towns: int


def scene(scale: float = 1.0) -> Scene:
    """Build the national scene at `scale` (1: full; 0.01: --quick), from fixed seeds."""
    rng = np.random.default_rng(SEED_SCENE)
    n_districts = max(4, round(FULL["districts"] * scale))
    n_zones = round(FULL["zones"] * scale)
    n_towns = max(3, round(FULL["towns"] * scale))
    persons = FULL["persons"] * scale
    radius = FULL["radius"] * math.sqrt(scale)
    t = np.linspace(0, 2 * np.pi, 1024, endpoint=False)
    r = radius * (1 + 0.10 * np.sin(3 * t + 0.5) + 0.05 * np.cos(7 * t) + 0.02 * np.sin(19 * t))
    country = shapely.Polygon(np.column_stack([r * np.cos(t), r * np.sin(t)]))
    shapely.prepare(country)
    box = 1.2 * radius

    def in_country(n, draw):
        out = np.zeros((0, 2))
        while len(out) < n:
            p = draw(2 * (n - len(out)) + 16)
            out = np.vstack([out, p[shapely.contains_xy(country, p[:, 0], p[:, 1])]])
        return out[:n]

    def uniform(n):
        return in_country(n, lambda m: rng.uniform(-box, box, (m, 2)))

    towns = uniform(n_towns)
    rank = np.arange(1, n_towns + 1)
    town_pop = 0.75 * persons * (1 / rank) / np.sum(1 / rank)  # Zipf's rule
    sigma = 1500.0 * np.sqrt(town_pop / 1e5)  # metres: a town of 100,000 spreads over about 3 km
    rural = 0.25 * persons / country.area  # persons per m²

    def around_towns(n, spread):
        pick = rng.choice(n_towns, size=n, p=town_pop / town_pop.sum())
        return towns[pick] + rng.normal(size=(n, 2)) * (spread * sigma[pick])[:, None]

    def mixture(n, share_uniform, spread):
        k = int(rng.binomial(n, share_uniform))
        return np.vstack([uniform(k), in_country(n - k, lambda m: around_towns(m, spread))])

    def voronoi(sites):
        return shapely.get_parts(shapely.voronoi_polygons(shapely.multipoints(sites), ordered=True))

    districts = shapely.intersection(voronoi(mixture(n_districts, 0.7, 2.0)), country)
    districts = _polygonal(districts)
    cells = voronoi(mixture(round(FULL["blocks"] * scale * SITES_PER_BLOCK), 0.5, 1.0))
    shapely.prepare(districts)
    b, d = shapely.STRtree(districts).query(cells, predicate="intersects")
    whole = shapely.contains_properly(districts[d], cells[b])
    pieces = cells[b]
    pieces[~whole] = shapely.intersection(pieces[~whole], districts[d[~whole]])
    pieces = _polygonal(pieces)
    keep = shapely.area(pieces) > 1.0
    blocks, owner = pieces[keep], d[keep]
    centre = shapely.get_coordinates(shapely.centroid(blocks))
    density = np.full(len(blocks), rural)
    for (tx, ty), pop, s in zip(towns, town_pop, sigma):
        near = (np.abs(centre[:, 0] - tx) < 6 * s) & (np.abs(centre[:, 1] - ty) < 6 * s)
        d2 = (centre[near, 0] - tx) ** 2 + (centre[near, 1] - ty) ** 2
        density[near] += pop / (2 * np.pi * s * s) * np.exp(-d2 / (2 * s * s))
    counts = rng.poisson(density * shapely.area(blocks)).astype(float)
    zones, operator = [], []
    per_operator = n_zones // len(OPERATORS)
    for name, urban in OPERATORS:
        k = int(rng.binomial(per_operator, urban))
        pick = rng.choice(len(blocks), size=k, p=counts / counts.sum())
        at_home = centre[pick] + rng.normal(scale=200.0, size=(k, 2))
        home_r = np.clip(rng.lognormal(np.log(1000.0), 0.4, size=k), 300.0, 3000.0)
        spread = uniform(per_operator - k)
        spread_r = rng.uniform(1000.0, 3000.0, size=per_operator - k)
        zones.append(shapely.buffer(shapely.points(np.vstack([at_home, spread])), np.concatenate([home_r, spread_r]),
                                    quad_segs=QUAD_SEGS))
        operator += [name] * per_operator
    return Scene(country, districts, blocks, counts, owner, np.concatenate(zones), np.array(operator), n_towns)


def _polygonal(geoms: np.ndarray) -> np.ndarray:
    """Overlay results reduced to their polygonal parts (a clip may leave a line or point where outlines touch)."""
    geoms = np.asarray(geoms, dtype=object)
    mixed = np.flatnonzero(shapely.get_type_id(geoms) == 7)  # GeometryCollection
    for i in mixed:
        parts = [p for p in shapely.get_parts(geoms[i]) if p.geom_type == "Polygon"]
        geoms[i] = parts[0] if len(parts) == 1 else shapely.multipolygons(parts)
    return geoms


# -- areamc -----------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Layers:
    """The scene as areamc layers on one plane: the districts in batches (each batch's first district), zones, blocks."""

    batches: list
    starts: list
    zones: object
    blocks: object


def areamc_layers(sc: Scene, batch: int | None = None) -> tuple[float, Layers]:
    """The scene as areamc layers (``layer_from_geometries``, ``project_layers``: plane in, ``densify_m`` huge so
    the geometries are kept), and the seconds it took.  The districts form one layer, or layers of `batch`."""
    n = len(sc.districts)
    size = batch or n
    starts = list(range(0, n, size))

    def build():
        batches = [layer_from_geometries(sc.districts[s:s + size], PLANE, ids=[f"D{i}" for i in range(s, min(s + size, n))])
                   for s in starts]
        zones = layer_from_geometries(sc.zones, PLANE, ids=[f"{o}{i}" for i, o in enumerate(sc.operator)])
        blocks = layer_from_geometries(sc.blocks, PLANE, ids=[f"B{i}" for i in range(len(sc.blocks))])
        out = project_layers([*batches, zones, blocks], crs=PLANE, densify_m=1e9)
        return Layers(out[:-2], starts, out[-2], out[-1])

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return timed(build)


def _triangulate_once(density) -> float | None:
    """Build the block density's triangulation now (seconds), if the library has one; None if it has not."""
    if not hasattr(type(density), "triangulation"):
        return None
    seconds, _ = timed(lambda: density.triangulation)
    return seconds


def areamc_job(layers: Layers, counts, kwargs, limit_s: float = AREAMC_LIMIT_S) -> dict:
    """The job: the block density, then every district's coverage and covered population.

    One ``estimate_coverage`` call with seed ``SEED_JOB``; or, when the districts come in batches, one call
    per batch ``b`` with seed ``SEED_JOB + b`` (so no two districts share a random stream), the block
    triangulation built first in this process (else each call's new workers would build it again; one call's
    workers build it once each, at the same time), and a stop after the batch that ends past `limit_s`.
    """
    start = time.perf_counter()
    density = BlockDensity(layers.blocks, counts)
    built = time.perf_counter()
    batched = len(layers.batches) > 1
    t_tri = _triangulate_once(density) if batched else None
    rows, caught = [], []
    total = sum(len(b) for b in layers.batches)
    for b, batch in enumerate(layers.batches):
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            report = estimate_coverage(batch, layers.zones, density=density, exact=False, seed=SEED_JOB + b,
                                       stop=StopRule(points=None, relative=RELATIVE), confidence=CONFIDENCE, **kwargs)
        rows.extend(report.rows)
        caught += [str(w.message) for w in seen]
        elapsed = time.perf_counter() - start
        if batched:
            print(f"  batch {b + 1}/{len(layers.batches)}: {len(rows):,} of {total:,} districts done, "
                  f"{fmt_s(elapsed)} so far", flush=True)
        if batched and elapsed > limit_s and b + 1 < len(layers.batches):
            break
    done = time.perf_counter()
    return dict(rows=rows, t_density=built - start, t_coverage=done - built, t_triangulation=t_tri, caught=caught,
                stopped=len(rows) < total)


def profile(sc: Scene, layers: Layers, kwargs, n: int) -> dict:
    """cProfile of the same job on `n` districts (fixed sample) on one worker.

    Its block density is built anew and its triangulation built before the profile starts, both timed
    with ``time.perf_counter``, so that the profile holds only the per-district work.
    """
    pick = np.sort(np.random.default_rng(SEED_SAMPLE + 1).choice(len(sc.districts), size=min(n, len(sc.districts)),
                                                                 replace=False))
    (sub,) = project_layers([layer_from_geometries(sc.districts[pick], PLANE, ids=[f"D{i}" for i in pick])],
                            plane=layers.zones.plane, densify_m=1e9)
    one = {**kwargs, "workers": 1}
    t_density, density = timed(lambda: BlockDensity(layers.blocks, sc.counts))
    t_tri = _triangulate_once(density)
    prof = cProfile.Profile()
    start = time.perf_counter()
    prof.enable()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        estimate_coverage(sub, layers.zones, density=density, exact=False, seed=SEED_JOB,
                          stop=StopRule(points=None, relative=RELATIVE), confidence=CONFIDENCE, **one)
    prof.disable()
    wall = time.perf_counter() - start
    return dict(districts=len(pick), wall=wall, stats=pstats.Stats(prof), t_density=t_density, t_triangulation=t_tri)


def _key(stats: pstats.Stats, module: str, function: str, line: int | None = None) -> list:
    """cProfile's keys of the functions named `function` in files ending with `module` (at `line`, if given)."""
    return [key for key in stats.stats if key[2] == function and key[0].replace("\\", "/").endswith(module)
            and (line is None or key[1] == line)]


def _line(module: str, qualname: str) -> int | None:
    """First line of an areamc function or method (``"BlockDensity.__init__"``), to tell same-named ones apart;
    None when the library has no such function (it is being changed)."""
    import importlib
    import inspect

    obj = importlib.import_module(module.replace("/", ".").removesuffix(".py"))
    for part in qualname.split("."):
        obj = getattr(obj, part, None)
        if obj is None:
            return None
    obj = getattr(obj, "func", None) or getattr(obj, "fget", None) or obj  # cached_property, property
    try:
        return inspect.getsourcelines(inspect.unwrap(obj))[1]
    except (TypeError, OSError):
        return None


def _keys(stats: pstats.Stats, module: str, function: str) -> list:
    """cProfile's keys of `function` (a name, or ``"Class.method"``) in `module`.

    ``"a | b"`` stands for both functions; ``"a ? b"`` for the first of them that ran (the library is being
    changed, and a stage may move from one function to another).
    """
    if " ? " in function:
        for name in function.split(" ? "):
            found = _keys(stats, module, name)
            if found:
                return found
        return []
    out = []
    for name in function.split(" | "):
        line = _line(module, name) if "." in name else None
        if "." in name and line is None:
            continue
        out += _key(stats, module, name.split(".")[-1], line)
    return out


def _cumulative(stats: pstats.Stats, module: str, function: str, caller=None) -> tuple[float, int]:
    """(cumulative seconds, calls) of `function` in `module` (see :func:`_keys`).

    With `caller` (module, function), only the time spent under calls from that function.
    """
    keys = _keys(stats, module, function)
    if caller is None:
        return sum(stats.stats[k][3] for k in keys), sum(stats.stats[k][1] for k in keys)
    ckeys = set(_keys(stats, *caller))
    seconds, calls = 0.0, 0
    for k in keys:
        for ck, (_cc, nc, _tt, ct) in stats.stats[k][4].items():
            if ck in ckeys:
                seconds += ct
                calls += nc
    return seconds, calls


#: Per-district stages of areamc's job: (label, module, function, caller); cumulative times, each stage's time
#: including the stages indented under it.  The one-time work (BlockDensity, triangulation) is timed apart.
STAGES = (
    ("per district, all of it (coverage._coverage_region)", "areamc/coverage.py", "_coverage_region", None),
    ("  the district's zones (STRtree query)", "shapely/strtree.py", "query",
     ("areamc/coverage.py", "_coverage_region")),
    ("  classifier build: cell grid of the district, grid index of its zones", "areamc/classify.py",
     "region_classifier", None),
    ("  area sampling (engine.hit_or_miss: draw + classify)", "areamc/engine.py", "hit_or_miss", None),
    ("  population (coverage._population)", "areamc/coverage.py", "_population", None),
    ("    blocks answered exactly, if the library does that (BlockView.split)", "areamc/density.py",
     "BlockView.split", None),
    ("    blocks near the district (BlockDensity.near, from the proposal or split)", "areamc/density.py",
     "BlockDensity.near", ("areamc/density.py", "BlockView._proposal | BlockView.split")),
    ("    proposal over the district's blocks (BlockView._proposal_of)", "areamc/density.py",
     "BlockView._proposal_of ? BlockView._proposal", None),
    ("    weighted run (weighted.weighted_run)", "areamc/weighted.py", "weighted_run", None),
    ("      sampling (engine.accumulate: draw in blocks + classify)", "areamc/engine.py", "accumulate",
     ("areamc/weighted.py", "weighted_run | _split_run")),
    ("  classify calls of both runs (point in district, then zone counts)", "areamc/classify.py",
     "classify | RegionClassifier.__call__", None),
    ("    point in district (CellClassifier.__call__)", "areamc/cells.py", "CellClassifier.__call__", None),
    ("    zone counts (GridIndex.counts)", "areamc/classify.py", "GridIndex.counts", None),
    ("  draws of both runs (UniformSampler.random: box points, points in blocks)", "areamc/samplers.py",
     "UniformSampler.random", None),
)
_PROPOSAL = "BlockView._proposal_of ? BlockView._proposal"


def print_profile(prof: dict, n_districts: int, workers: int) -> tuple[list[str], str, float]:
    """Print the stage table of a profile and cProfile's top entries.

    Returns the lines, a one-line summary for the record, and the extrapolated seconds of the whole job on
    `workers` workers (one-time work, then the per-district work shared among the workers).
    """
    stats, k = prof["stats"], prof["districts"]
    tri = prof["t_triangulation"]
    lines = [f"where areamc's time goes, measured on {k} districts (fixed sample) on one worker:",
             f"  once per process (time.perf_counter): BlockDensity() {fmt_s(prof['t_density'])}; triangulation of "
             f"every block {'(none in this library)' if tri is None else fmt_s(tri)} (in a one-call run each "
             f"worker builds it, at its first district)",
             f"  per district (cProfile, {fmt_s(prof['wall'])} wall; profiling adds a little):",
             f"  {'stage':78s} {'seconds':>8s} {'calls':>7s} {'ms/district':>11s}"]
    seconds_of = {}
    for name, module, function, caller in STAGES:
        seconds, calls = _cumulative(stats, module, function, caller)
        seconds_of[function] = seconds
        lines.append(f"  {name:78s} {seconds:8.2f} {calls:7d} {seconds / k * 1e3:11.1f}")
    region = seconds_of["_coverage_region"] / k
    whole = prof["t_density"] + (tri or 0.0) + region * n_districts / workers
    lines.append(f"  extrapolated to all {n_districts:,} districts: per-district work {region * n_districts:.0f} s on "
                 f"one core; the job on {workers} workers about {whole:.0f} s (one-time work + per-district work / "
                 f"{workers})")
    text = io.StringIO()
    stats.stream = text
    stats.sort_stats("tottime").print_stats(15)
    stats.stream = sys.stdout
    top = [line for line in text.getvalue().splitlines() if line.strip()]
    start = next((i for i, line in enumerate(top) if line.lstrip().startswith("ncalls")), 0)
    for line in lines:
        print(line)
    print("  cProfile's top 15 by own time (per-district work):")
    for line in top[start:start + 16]:
        print("    " + line.replace(str(ROOT) + "/", ""))
    ms = {f: seconds_of[f] / k * 1e3 for f in seconds_of}
    summary = (f"profile of {k} districts on one worker: per district {ms['_coverage_region']:.0f} ms (classifier "
               f"build {ms['region_classifier']:.0f}, area sampling {ms['hit_or_miss']:.0f}, population "
               f"{ms['_population']:.0f} of which blocks answered exactly {ms['BlockView.split']:.0f} and the "
               f"block proposal {ms[_PROPOSAL]:.0f}); once per process: BlockDensity {fmt_s(prof['t_density'])}, "
               f"triangulation {'—' if tri is None else fmt_s(tri)}; extrapolated job on {workers} workers "
               f"{whole:.0f} s")
    print()
    return lines, summary, whole


# -- the exact overlay ------------------------------------------------------------------------------------

def exact_overlay(sc: Scene, pick: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, float, float]:
    """Exact covered shares, covered population and population of the districts `pick` (one core).

    Returns (shares, covered persons, persons, seconds for the shares, seconds for the population).
    """
    t_share, shares = timed(lambda: baselines.covered_shares(sc.districts[pick], sc.zones))
    where = np.full(len(sc.districts), -1)
    where[pick] = np.arange(len(pick))
    sel = np.flatnonzero(where[sc.owner] >= 0)
    t_pop, covered = timed(lambda: baselines.covered_population_by(sc.blocks[sel], sc.counts[sel], sc.zones,
                                                                    where[sc.owner[sel]], sc.districts[pick]))
    persons = np.bincount(where[sc.owner[sel]], weights=sc.counts[sel], minlength=len(pick))
    return shares, covered, persons, t_share, t_pop


def write_rate(sc: Scene) -> float:
    """Seconds per block of writing blocks to a GeoPackage through fiona (WGS84 lon/lat), on a sample of blocks."""
    from common import write_scene

    n = min(WRITE_SAMPLE, len(sc.blocks))
    with tempfile.TemporaryDirectory() as tmp:
        seconds, _ = timed(lambda: write_scene(Path(tmp) / "blocks.gpkg",
                                               {"blocks": (sc.blocks[:n], {"persons": sc.counts[:n]})}))
    return seconds / n


# -- comparing the answers --------------------------------------------------------------------------------

def binomial_band(n: int, p: float = CONFIDENCE, level: float = 0.99) -> tuple[int, int]:
    """Counts of intervals holding the exact value, out of `n`, between the (1 ± level)/2 quantiles of Binomial(n, p)."""
    from scipy.stats import binom

    return int(binom.ppf((1 - level) / 2, n, p)), int(binom.ppf((1 + level) / 2, n, p))


def _quantiles(values: np.ndarray) -> str:
    q = np.quantile(values, [0.0, 0.1, 0.5, 0.9, 1.0])
    return " / ".join(f"{v:.3f}" for v in q)


# -- the benchmark ----------------------------------------------------------------------------------------

def run(quick: bool = False, sampler: str | None = None, workers: int | None = WORKERS, save: bool = True,
        profile_districts: int = PROFILE_DISTRICTS, scale: float | None = None, batch: int | None = None,
        dump: str | None = None) -> dict:
    """Build the scene, time both sides, compare the answers, profile areamc; returns the record (``common.record``).

    `scale` (default 1, or 0.01 with `quick`) sizes the scene: districts, zones, blocks, towns, persons and
    the country's area all scale with it.  Only a full-scale run is saved.  `batch` runs areamc's job as
    calls of that many districts (see :func:`areamc_job`).  `dump` names an ``.npz`` file for every
    district's answers on both sides.
    """
    scale = scale if scale is not None else 0.01 if quick else 1.0
    sizes = {k: round(FULL[k] * scale) for k in ("districts", "zones", "blocks")}
    name, command, kwargs, missing = options(estimate_coverage, "coverage", NAME, COMMAND, quick=quick,
                                             sampler=sampler, workers=workers)
    if scale not in (1.0, 0.01 if quick else 1.0):
        command = f"{COMMAND} --scale {scale:g}"
    if batch:
        command += f" --batch {batch}"
    target = f"≤ {TARGET_S:.0f} s for the job, every district to 0.5%"
    if missing:
        return unavailable(name, WHAT.format(**sizes), command, missing, target=target)
    workers = kwargs.get("workers", 1)
    t_scene, sc = timed(lambda: scene(scale))
    what = WHAT.format(districts=len(sc.districts), zones=len(sc.zones), blocks=len(sc.blocks))
    n = len(sc.districts)
    print(f"scene (built in {fmt_s(t_scene)}, not timed below): a country of {sc.country.area / 1e6:,.0f} km², "
          f"{sc.towns} towns, {int(sc.counts.sum()):,} persons; {n:,} districts (median "
          f"{np.median(shapely.area(sc.districts)) / 1e6:,.0f} km²), {len(sc.blocks):,} blocks, "
          f"{len(sc.zones):,} zones of {4 * QUAD_SEGS + 1} vertices from {len(OPERATORS)} operators", flush=True)
    per_block = write_rate(sc)
    print(f"writing blocks to a GeoPackage through fiona: {per_block * 1e6:.0f} µs a block (timed on "
          f"{min(WRITE_SAMPLE, len(sc.blocks)):,}), so about {fmt_s(per_block * len(sc.blocks))} for all "
          f"{len(sc.blocks):,}: both sides take the scene in memory instead, and neither loads a file", flush=True)

    # -- areamc: its layers, then the job, then a profile of it
    how = f"batches of {batch:,} districts, one call each" if batch and batch < n else "one estimate_coverage call"
    print(f"\nareamc ({label(sampler, workers)}; to {RELATIVE:.1%} at {CONFIDENCE:.0%}; {how}):", flush=True)
    t_layers, layers = areamc_layers(sc, batch)
    print(f"  layers (layer_from_geometries + project_layers, plane in, not densified): {fmt_s(t_layers)}", flush=True)
    job = areamc_job(layers, sc.counts, kwargs)
    t_density, t_coverage, rows = job["t_density"], job["t_coverage"], job["rows"]
    done = len(rows)
    t_job = t_density + t_coverage
    peak_self = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20
    peak_child = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 2**20
    share = np.array([r.share for r in rows])
    s_low, s_high = np.array([r.ci_low for r in rows]), np.array([r.ci_high for r in rows])
    pop = [r.population for r in rows]

    def field(attr):
        return np.array([getattr(p, attr) if p is not None and getattr(p, attr) is not None else np.nan for p in pop])

    p_share, p_low, p_high, p_total, p_covered = (field(a) for a in ("share", "ci_low", "ci_high", "total", "covered"))
    area_points = np.array([r.points for r in rows])
    box_points = np.array([r.pilot_points for r in rows])
    pop_points = np.nan_to_num(field("points")).astype(np.int64)
    with np.errstate(divide="ignore", invalid="ignore"):
        s_rel = (s_high - s_low) / 2 / share
        p_rel = (p_high - p_low) / 2 / p_share
    slack = 1.05  # the final batch is sized from the pilot, so a half-width may exceed the target by a few percent
    met_area = int(np.sum(s_rel <= RELATIVE * slack))
    met_pop = int(np.sum(p_rel <= RELATIVE * slack))
    reasons = {r: sum(1 for row in rows if row.stop_reason == r) for r in sorted({row.stop_reason for row in rows})}
    t_full = t_density + t_coverage * n / done
    if job["stopped"]:
        print(f"  STOPPED after {fmt_s(t_coverage)} (over the {AREAMC_LIMIT_S:.0f} s limit) with {done:,} of {n:,} "
              f"districts done; linear in district count the whole job would take about {fmt_s(t_full)}")
    tri = job["t_triangulation"]
    print(f"  job {fmt_s(t_job)}: BlockDensity {fmt_s(t_density)}, estimate_coverage {fmt_s(t_coverage)}"
          f"{'' if not job['stopped'] else f' for {done:,} districts'}"
          f"{'' if tri is None else f' (of which the triangulation, built first in this process, {fmt_s(tri)})'}")
    print(f"  points: in-district area points {area_points.sum():,} (median {np.median(area_points):,.0f}), pilot box "
          f"points {box_points.sum():,}, population final-batch points {pop_points.sum():,} (median "
          f"{np.median(pop_points):,.0f}); stop reasons {reasons}")
    print(f"  covered share, quantiles 0/10/50/90/100%: {_quantiles(share)}; population share: "
          f"{_quantiles(p_share[np.isfinite(p_share)])}")
    print(f"  districts whose half-width met 0.5% (within {slack - 1:.0%}): area {met_area:,} of {done:,}, "
          f"population {met_pop:,} of {done:,}; largest relative half-width: area {np.nanmax(s_rel):.3%}, "
          f"population {np.nanmax(p_rel):.3%}")
    print(f"  peak memory (max RSS): this process {peak_self:.2f} GiB, largest worker {peak_child:.2f} GiB "
          "(a forked worker's RSS counts the pages it shares with this process)")
    if job["caught"]:
        print(f"  {len(job['caught'])} warning(s), the first: {job['caught'][0][:300]}")
    print(flush=True)
    prof = profile(sc, layers, kwargs, profile_districts)
    _, profile_summary, t_predicted = print_profile(prof, n, workers)
    print(f"the job took {fmt_s(t_full)}{' (extrapolated)' if job['stopped'] else ''} against {t_predicted:.0f} s "
          "predicted by the profile" + ("; the rest is the worker pool (start, forking a large process, results) "
                                        "and other work on this machine" if t_full > 1.1 * t_predicted else ""))
    del layers, prof

    # -- the exact overlay: a timed sample of the districts areamc answered, then all of them if that fits the limit
    answered = np.arange(done)
    rng = np.random.default_rng(SEED_SAMPLE)
    sample = np.sort(rng.choice(answered, size=min(done, max(30, round(EXACT_SAMPLE_SHARE * done))), replace=False))
    ex = exact_overlay(sc, sample)
    estimate_full = (ex[3] + ex[4]) * n / len(sample)
    print("\nfair exact overlay (one core; baselines.covered_shares + covered_population_by):")
    print(f"  timed sample of {len(sample):,} districts (seed {SEED_SAMPLE}): shares {fmt_s(ex[3])}, population "
          f"{fmt_s(ex[4])}; linear in district count that is {fmt_s(estimate_full)} for all {n:,}", flush=True)
    extrapolated = len(sample) < n
    if extrapolated and estimate_full <= EXACT_LIMIT_S:
        sample = answered
        ex = exact_overlay(sc, sample)
        extrapolated = len(sample) < n
        print(f"  the {len(sample):,} districts areamc answered: shares {fmt_s(ex[3])}, population {fmt_s(ex[4])}")
    if extrapolated:
        print(f"  the exact overlay's time for all {n:,} districts below is an EXTRAPOLATION from "
              f"{len(sample):,} districts (linear in district count); answers are compared on those districts")
    e_share, e_covered, e_persons, t_es, t_ep = ex
    baseline_s = (t_es + t_ep) * n / len(sample)

    # -- the answers, on the districts both sides gave
    m = len(sample)
    tol = 1e-9  # an exact share of a wholly covered district can come out a rounding error above 1
    with np.errstate(divide="ignore", invalid="ignore"):
        e_pshare = np.where(e_persons > 0, e_covered / e_persons, np.nan)
    in_area = (s_low[sample] - tol <= e_share) & (e_share <= s_high[sample] + tol)
    ok = np.isfinite(e_pshare) & np.isfinite(p_low[sample])
    in_pop = (p_low[sample] - tol <= e_pshare) & (e_pshare <= p_high[sample] + tol)
    lo_a, hi_a = binomial_band(m)
    lo_p, hi_p = binomial_band(int(ok.sum()))
    print(f"\nanswers on {m:,} districts ({'a sample' if m < done else 'all that areamc answered'}):")
    for i in range(min(5, m)):
        j = sample[i]
        print(f"  D{j}: share {share[j]:.4f} [{s_low[j]:.4f}, {s_high[j]:.4f}] exact {e_share[i]:.4f}; covered "
              f"persons {p_covered[j]:,.0f} [{p_low[j] * p_total[j]:,.0f}, {p_high[j] * p_total[j]:,.0f}] exact "
              f"{e_covered[i]:,.0f} of {e_persons[i]:,.0f}")
    print(f"  intervals holding the exact share: {int(in_area.sum()):,} of {m:,} (nominal {CONFIDENCE:.0%}; "
          f"99% binomial band {lo_a:,}-{hi_a:,}); the exact population share: {int(in_pop[ok].sum()):,} of "
          f"{int(ok.sum()):,} (band {lo_p:,}-{hi_p:,})")
    mc_cov = float(np.nansum(p_covered[sample]))
    ex_cov = float(e_covered.sum())
    half = float(np.sqrt(np.nansum(((p_high - p_low) / 2 * p_total)[sample] ** 2)))
    total_error = np.nanmax(np.abs(p_total[sample] / e_persons - 1))
    print(f"  covered persons, sum over these districts: areamc {mc_cov:,.0f} ± {half:,.0f} (the share intervals "
          f"times areamc's totals, independent districts), exact {ex_cov:,.0f}; covered area: areamc "
          f"{np.sum(share[sample] * shapely.area(sc.districts[sample])) / 1e6:,.1f} km², exact "
          f"{np.sum(e_share * shapely.area(sc.districts[sample])) / 1e6:,.1f} km²")
    print(f"  areamc's district populations are estimated (exact=False): largest relative difference from the exact "
          f"population {total_error:.2%}, which the covered-persons intervals above do not include")
    in_persons = (p_low[sample] * p_total[sample] <= e_covered) & (e_covered <= p_high[sample] * p_total[sample])
    print(f"  covered-persons intervals (population-share interval x areamc's total) holding the exact covered "
          f"persons: {int(in_persons[ok].sum()):,} of {int(ok.sum()):,}")
    narrow = ok & ((p_high[sample] - p_low[sample]) / 2 < 1e-4)
    print(f"  population-share intervals narrower than ±0.0001: {int(narrow.sum()):,}, of which "
          f"{int((narrow & ~in_pop).sum()):,} miss the exact share; the other intervals hold it in "
          f"{int((in_pop & ok & ~narrow).sum()):,} of {int((ok & ~narrow).sum()):,}")

    if dump:
        np.savez_compressed(dump, district=sample, share=share[sample], share_low=s_low[sample],
                            share_high=s_high[sample], exact_share=e_share, population_share=p_share[sample],
                            population_low=p_low[sample], population_high=p_high[sample],
                            population_exact_share=e_pshare, population=p_total[sample], exact_population=e_persons,
                            covered=p_covered[sample], exact_covered=e_covered, area_points=area_points[sample],
                            population_points=pop_points[sample],
                            population_method=np.array([pop[j].method if pop[j] else "" for j in sample]))
        print(f"  wrote every district's answers to {dump}")

    areamc_s = t_layers + t_full
    ratio = baseline_s / areamc_s
    job_ratio = baseline_s / t_full
    every = met_area == n and met_pop == n
    notes = [
        "both sides take the scene in memory, in the plane: neither loads a file (writing the blocks to a "
        f"GeoPackage through fiona alone would take about {fmt_s(per_block * len(sc.blocks))}); areamc's 'load' "
        "is building its layers (layer_from_geometries + project_layers)",
        f"areamc on {workers} worker processes, the exact overlay on one core (a 2-process overlay would at best "
        f"halve its time: ratio {ratio / 2:.2f}, job only {job_ratio / 2:.2f})",
        f"areamc job {fmt_s(t_job)} (BlockDensity {fmt_s(t_density)}, estimate_coverage {fmt_s(t_coverage)}, "
        f"{how}; the profile predicted {t_predicted:.0f} s); half-widths within 0.5% (+{slack - 1:.0%}): area "
        f"{met_area:,}/{n:,}, population {met_pop:,}/{n:,}",
        f"exact share inside the interval in {int(in_area.sum()):,} of {m:,} districts (99% band {lo_a:,}-{hi_a:,}), "
        f"exact population share in {int(in_pop[ok].sum()):,} of {int(ok.sum()):,} (band {lo_p:,}-{hi_p:,}); "
        f"areamc's district totals (estimated, exact=False) off by up to {total_error:.2%}, so the covered-persons "
        f"intervals (share interval x estimated total) hold the exact covered persons in only "
        f"{int(in_persons[ok].sum()):,} of {int(ok.sum()):,}; {int(narrow.sum()):,} population-share intervals are "
        f"narrower than ±0.0001 and {int((narrow & ~in_pop).sum()):,} of them miss",
        f"peak memory {peak_self:.2f} GiB (parent), {peak_child:.2f} GiB (largest worker, shared pages included)",
        profile_summary,
    ]
    if job["stopped"]:
        notes.append(f"areamc was STOPPED past {AREAMC_LIMIT_S:.0f} s with {done:,} of {n:,} districts done; its "
                     f"time is EXTRAPOLATED linearly by district count")
    if extrapolated:
        notes.append(f"the exact overlay's time is an EXTRAPOLATION: measured on {m:,} of {n:,} districts "
                     f"(seed {SEED_SAMPLE}) and scaled by district count; answers compared on those districts")
    mark = lambda flag: " EXTRAPOLATED" if flag else ""  # noqa: E731
    rec = record(
        name, what, command, areamc_s=areamc_s, baseline_s=baseline_s, load_areamc_s=t_layers, load_baseline_s=0.0,
        ratio=ratio, job_ratio=job_ratio, answer=mc_cov, half_width=half, exact=ex_cov, unit="persons (sum)",
        inside=bool(abs(mc_cov - ex_cov) <= half), target=target, target_value=TARGET_S,
        met=bool(t_full <= TARGET_S and every and not job["stopped"]),
        areamc_text=(f"{fmt_s(areamc_s)}{mark(job['stopped'])} (layers {fmt_s(t_layers)}, job {fmt_s(t_full)} on "
                     f"{workers} workers); covered persons summed over the districts {mc_cov:,.0f} ± {half:,.0f}; "
                     f"to 0.5%: {met_area:,}/{n:,} "
                     f"shares, {met_pop:,}/{n:,} population shares; intervals holding the exact share "
                     f"{int(in_area.sum()):,}/{m:,}, population share {int(in_pop[ok].sum()):,}/{int(ok.sum()):,}, "
                     f"covered persons {int(in_persons[ok].sum()):,}/{int(ok.sum()):,}"),
        baseline_text=(f"{fmt_s(baseline_s)}{mark(extrapolated)} (shares {fmt_s(t_es)}, population {fmt_s(t_ep)} "
                       f"for {m:,} districts, one core); {ex_cov:,.0f}"),
        notes=notes,
    )
    if save and scale == 1.0 and not job["stopped"]:
        _save(rec)
    return rec


def _save(rec: dict) -> None:
    """Keep a full run's record for run_all.py, with its date, command and revision."""
    from run_all import _revision

    saved = {"measured": datetime.date.today().isoformat(), "command": COMMAND, "revision": _revision(),
             "record": rec}
    SAVED.write_text(json.dumps(saved, indent=1, default=str) + "\n", encoding="utf-8")
    print(f"\nsaved the record to {SAVED.relative_to(ROOT)}")


def saved_record() -> dict:
    """The record of the last full moonshot run (from :data:`SAVED`), labelled with its date and command.

    When no run was saved, a "not available" record saying how to run it.
    ``run_all.py`` shows this row unless asked to run the moonshot.
    """
    how = f"{COMMAND}  (or run_all.py --moonshot; tens of minutes)"
    what = WHAT.format(**{k: FULL[k] for k in ("districts", "zones", "blocks")})
    target = f"≤ {TARGET_S:.0f} s for the job, every district to 0.5%"
    if not SAVED.exists():
        return unavailable(NAME, what, COMMAND, f"not run here; run {how}", target=target)
    saved = json.loads(SAVED.read_text(encoding="utf-8"))
    rec = dict(saved["record"])
    rec["name"] = f"{NAME} (saved {saved['measured']}, not re-run)"
    rec["notes"] = [f"figures of the last full run, {saved['measured']}, by `{saved['command']}` "
                    f"({saved['revision']}); not measured in this run: run {how}"] + list(rec.get("notes", []))
    return rec


def main(argv=None) -> int:
    import argparse

    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="a 1/100 scale scene, for a smoke run")
    parser.add_argument("--workers", type=int, default=WORKERS, help=f"areamc's worker processes ({WORKERS})")
    parser.add_argument("--sampler", default=None, help="areamc's sampler (default: the job's own)")
    parser.add_argument("--no-save", action="store_true", help=f"do not write {SAVED.name}")
    parser.add_argument("--profile-districts", type=int, default=PROFILE_DISTRICTS,
                        help=f"districts profiled on one worker ({PROFILE_DISTRICTS})")
    parser.add_argument("--scale", type=float, default=None,
                        help="scene scale (1: full; --quick is 0.01); only a full-scale run is saved")
    parser.add_argument("--batch", type=int, default=None, metavar="N",
                        help=f"run areamc's job as calls of N districts, showing progress and stopping after the "
                             f"batch that ends past {AREAMC_LIMIT_S:.0f} s (default: one call)")
    parser.add_argument("--dump", metavar="FILE.npz", help="write every district's answers, both sides, to FILE.npz")
    args = parser.parse_args(argv)
    start = time.perf_counter()
    rec = run(quick=args.quick, sampler=args.sampler, workers=args.workers, save=not args.no_save,
              profile_districts=args.profile_districts, scale=args.scale, batch=args.batch, dump=args.dump)
    print_record(rec)
    print(f"  (whole script {fmt_s(time.perf_counter() - start)})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
