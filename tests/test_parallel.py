"""Worker processes (areamc/parallel.py): the worker count never changes a result.

The reference for every job is the same job on one worker (issue 9: "results bit-identical to
one worker for the same seed"): every output field is compared to the last bit (floats by
their binary64 value, NaNs included), never approximately.  Each estimate samples its own
stream keyed by job and position (numpy's SeedSequence spawn keys, numpy's "Parallel random
number generation" guide), which is why this can hold.  So that an identity cannot pass by
accident, a run on another seed must differ, and the rows are also held to shapely 2 (GEOS):
exact areas recomputed here and every estimate within 4 standard errors of them (common
practice).

The scene (invented districts, zones, blocks and a raster near 10°E 47°N) is written by the
tests into their tmp_path.  The whole file shares one scene and keeps each run small, since a
pool of processes costs about 0.05 s to start.
"""

from __future__ import annotations

import math
import multiprocessing
import os
import struct
import threading
import warnings
from dataclasses import asdict, is_dataclass

import fiona
import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import box, mapping

from areamc.area import estimate_areas
from areamc.coverage import estimate_coverage
from areamc.density import build_density, read_density
from areamc.engine import accumulate
from areamc.errors import AreamcError, AreamcWarning, InputError, OptionError
from areamc.integrate import integrate_density
from areamc.load import read_layer
from areamc.overlap import estimate_overlaps
from areamc.parallel import (
    MAX_WORKERS,
    check_workers,
    fixed_count_sums,
    map_ordered,
    source_handle,
    usable_cores,
    workers_for_source,
)
from areamc.project import project_layers
from areamc.samplers import Box, make_sampler
from areamc.seeds import make_seed
from areamc.stopping import StopRule, Stopper

from conftest import assert_refused, run_cli, run_json, write_raster

POINTS = 20_000
STOP = StopRule(points=POINTS)
#: Fails in the northern row of districts only (lat > 47.1), so the first failing region is district 3.
BAD_EXPRESSION = "where(lat > 47.1, -1e-6, 1e-6)"


# --- comparing to the last bit -------------------------------------------------------------------


def bits(obj):
    """A structure equal for two objects exactly when every field is equal to the last bit.

    Floats become their IEEE 754 binary64 bytes (so NaN matches NaN and -0.0 differs from 0.0),
    numpy arrays their dtype, shape and bytes, dataclasses their fields.
    """
    if is_dataclass(obj) and not isinstance(obj, type):
        return (type(obj).__name__, bits(asdict(obj)))
    if isinstance(obj, dict):
        return tuple((k, bits(v)) for k, v in obj.items())
    if isinstance(obj, (list, tuple)):
        return tuple(bits(v) for v in obj)
    if isinstance(obj, float):
        return ("f", struct.pack("<d", obj))
    if isinstance(obj, np.ndarray):
        return ("a", obj.dtype.str, obj.shape, obj.tobytes())
    if isinstance(obj, np.generic):
        return ("g", obj.dtype.str, obj.tobytes())
    return (type(obj).__name__, obj)


def report_bits(report):
    """Every field of a report: rows, their sub-records, the run's metadata and any status tables."""
    return bits({k: getattr(report, k) for k in ("rows", "multiplicity", "pairs", "candidates", "exact_status",
                                                  "exact_profile", "source") if hasattr(report, k)}
                ) + bits(report.metadata())


# --- the scene ------------------------------------------------------------------------------------


def _write(path, layer, geoms, props, schema_props):
    schema = {"geometry": "Polygon", "properties": schema_props}
    with fiona.open(path, "w", driver="GPKG", schema=schema, crs_wkt=pyproj.CRS("EPSG:4326").to_wkt(),
                    layer=layer) as dst:
        for g, p in zip(geoms, props):
            dst.write({"geometry": mapping(g), "properties": p})


@pytest.fixture(scope="module")
def scene(tmp_path_factory):
    """Six districts (3 x 2, the southern row first), eight overlapping zones, 35 blocks and a raster."""
    folder = tmp_path_factory.mktemp("parallel")
    gpkg = str(folder / "scene.gpkg")
    districts = [box(10.0 + 0.1 * c, 47.0 + 0.1 * r, 10.1 + 0.1 * c, 47.1 + 0.1 * r) for r in range(2) for c in range(3)]
    _write(gpkg, "districts", districts, [{"name": f"D{i}"} for i in range(6)], {"name": "str"})
    centres = [(10.03, 47.04), (10.08, 47.07), (10.16, 47.12), (10.21, 47.05),
               (10.27, 47.15), (10.12, 47.17), (10.05, 47.14), (10.24, 47.09)]
    zones = [shapely.Point(x, y).buffer(0.045 + 0.005 * (i % 3), quad_segs=16) for i, (x, y) in enumerate(centres)]
    _write(gpkg, "zones", zones, [{"name": f"Z{i}"} for i in range(8)], {"name": "str"})
    blocks = [box(9.975 + 0.05 * c, 46.975 + 0.05 * r, 10.025 + 0.05 * c, 47.025 + 0.05 * r)
              for r in range(5) for c in range(7)]
    counts = [float((37 * i) % 11 * 90 + (2000 if i == 17 else 0)) for i in range(35)]
    _write(gpkg, "blocks", blocks, [{"pop": c} for c in counts], {"pop": "float"})
    data = np.arange(48, dtype=float).reshape(6, 8) * 10.0
    data[2, 3] = -1.0  # one nodata cell inside district 1, so the nodata warning is raised
    tif = write_raster(folder / "pop.tif", data, west=9.95, north=47.25, dx=0.05, nodata=-1.0)
    regions = read_layer(gpkg, layer="districts", id_field="name")
    zone_layer = read_layer(gpkg, layer="zones", id_field="name")
    spec = read_density(gpkg, layer="blocks", count_field="pop")
    projected = project_layers([regions, zone_layer, spec.blocks])
    plane = projected[0].plane
    raster = build_density(read_density(tif), plane, regions=projected[0])
    yield {
        "folder": folder, "gpkg": gpkg, "tif": tif, "regions": projected[0], "zones": projected[1],
        "blocks": build_density(spec, plane, projected[2], projected[0]), "raster": raster,
        "bad": build_density(read_density(BAD_EXPRESSION, kind="expression"), plane),
    }
    raster.close()


def on_workers(job, *args, **kwargs):
    """The job's report on one worker and on two."""
    return job(*args, workers=1, **kwargs), job(*args, workers=2, **kwargs)


# --- every job, one worker against two ------------------------------------------------------------


@pytest.mark.parametrize("sampler", ["uniform", "sobol", "stratified"])
def test_area__two_workers__every_field_identical_to_one(scene, sampler):
    one, two = on_workers(estimate_areas, scene["regions"], stop=StopRule(points=20_000), seed=9, sampler=sampler)
    assert report_bits(one) == report_bits(two)
    other = estimate_areas(scene["regions"], stop=StopRule(points=20_000), seed=10, sampler=sampler, workers=2)
    assert bits(other.rows) != bits(two.rows), "another seed must give other rows, or the identity shows nothing"
    for row in two.rows:  # against shapely's area of the same plane geometry (a reference library)
        assert row.exact_planar == pytest.approx(shapely.area(scene["regions"].planar[row.feature_index]), rel=1e-12)
        assert abs(row.estimate - row.exact_planar) <= 4 * row.std_error


def test_area__one_feature_split_by_stream_spans__identical_to_one_worker(scene, monkeypatch):
    """Fewer features than workers: the feature's fixed-count run is cut into spans that two workers count."""
    from dataclasses import replace as with_

    import areamc.parallel

    calls = []
    real = areamc.parallel.fixed_count_sums
    monkeypatch.setattr(areamc.parallel, "fixed_count_sums", lambda *a, **k: calls.append(a[3]) or real(*a, **k))

    regions = scene["regions"]
    one_feature = with_(regions, ids=regions.ids[:1], planar=regions.planar[:1], lonlat=regions.lonlat[:1])
    stop = StopRule(points=300_000)  # several 65,536-point spans, the last one short
    one, two = on_workers(estimate_areas, one_feature, stop=stop, seed=4)
    assert report_bits(one) == report_bits(two)
    assert calls == [2], "the two-worker run must have been split into spans"
    assert one.rows[0].points == 300_000 and abs(one.rows[0].z) < 4


def test_coverage__two_workers__every_field_identical_to_one(scene):
    one, two = on_workers(estimate_coverage, scene["regions"], scene["zones"], ks=(1, 2), stop=STOP, seed=9)
    assert report_bits(one) == report_bits(two)
    other = estimate_coverage(scene["regions"], scene["zones"], ks=(1, 2), stop=STOP, seed=10, workers=2)
    assert bits(other.rows) != bits(two.rows), "another seed must give other rows, or the identity shows nothing"
    # the k = 1 shares against shapely's exact overlay, recomputed here
    union = shapely.union_all(scene["zones"].planar)
    for row in (r for r in two.rows if r.k == 1):
        region = scene["regions"].planar[row.feature_index]
        exact = shapely.area(shapely.intersection(region, union)) / shapely.area(region)
        assert row.exact_share == pytest.approx(exact, rel=1e-9)
        assert abs(row.share - exact) <= 4 * row.std_error + 1e-12


def test_coverage__blocks_and_a_claim__identical_on_two_workers(scene):
    one, two = on_workers(estimate_coverage, scene["regions"], scene["zones"], stop=StopRule(points=None,
                          absolute=0.02), claim=0.3, seed=4, density=scene["blocks"])
    assert report_bits(one) == report_bits(two)
    assert all(row.population is not None and row.population.points > 0 for row in two.rows)


@pytest.mark.parametrize("source", ["blocks", "raster"])
def test_integrate__two_workers__identical_to_one(scene, source):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        one, two = on_workers(integrate_density, scene["regions"], scene[source], stop=STOP, seed=3)
    assert report_bits(one) == report_bits(two)
    messages = [str(w.message) for w in caught]
    assert messages[: len(messages) // 2] == messages[len(messages) // 2:]  # the same warnings, in the same order
    if source == "raster":
        assert any("1 nodata cell" in m for m in messages), messages
        scene["raster"].for_region(scene["regions"].planar[0])  # the workers left the parent's file open
    for row in two.rows:  # against the exact totals of the rows, each within 4 standard errors
        assert abs(row.estimate - row.exact) <= 4 * row.std_error + 1e-9 * row.exact


def test_integrate__raster_on_spawned_workers__identical_to_one(scene, monkeypatch):
    # where "fork" is not used (not Linux, or threads running), workers are spawned: the job's data are
    # pickled once per worker and the raster travels as its path, to be reopened there
    import areamc.parallel

    monkeypatch.setattr(areamc.parallel, "_start_method", lambda: multiprocessing.get_context("spawn"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AreamcWarning)  # the nodata warning, checked above
        one, two = on_workers(integrate_density, scene["regions"], scene["raster"], stop=STOP, seed=3)
    assert report_bits(one) == report_bits(two)


def test_integrate__expression_uniform__identical_on_two_workers(scene):
    expression = build_density(read_density("(2 + sin(x / 3000)) * 1e-6", kind="expression"),
                               scene["regions"].plane)
    one, two = on_workers(integrate_density, scene["regions"], expression, stop=STOP, seed=5, importance=False)
    assert report_bits(one) == report_bits(two)


def test_integrate__error_in_a_worker__is_the_first_failing_region_s_error(scene):
    errors = []
    for workers in (1, 2):
        with pytest.raises(InputError) as info:
            integrate_density(scene["regions"], scene["bad"], stop=STOP, seed=1, workers=workers)
        errors.append(info.value)
    assert str(errors[0]) == str(errors[1])
    assert errors[1].params == ("density",)
    assert isinstance(errors[1].__cause__, Exception) and "Traceback" in str(errors[1].__cause__)
    assert not multiprocessing.active_children(), "the workers must be stopped after an error"


def test_overlap__pairs_and_profile__identical_on_two_workers(scene):
    one, two = on_workers(estimate_overlaps, scene["zones"], stop=STOP, seed=8)
    assert report_bits(one) == report_bits(two)
    assert two.multiplicity and two.rows
    zones = scene["zones"].planar
    for row in two.rows:  # shapely 2 (GEOS) intersection areas, recomputed here
        exact = shapely.area(shapely.intersection(zones[row.feature_index_a], zones[row.feature_index_b]))
        assert row.exact_planar == pytest.approx(exact, rel=1e-9)
        assert abs(row.estimate - exact) <= 4 * row.std_error + 1e-9 * exact


def test_overlap__cross_pairs__identical_on_two_workers(scene):
    one, two = on_workers(estimate_overlaps, scene["regions"], scene["zones"], stop=STOP, seed=8, min_share=0.05)
    assert report_bits(one) == report_bits(two)
    assert len(two.rows) > 2 and not two.multiplicity


# --- the command line: JSON output ------------------------------------------------------------------


def _cli_pair(capsys, argv):
    one = run_json(capsys, [*argv, "--workers", "1"])
    two = run_json(capsys, [*argv, "--workers", "2"])
    assert one.pop("command").replace("--workers 1", "--workers 2") == two.pop("command")
    for doc in (one, two):  # when the run started and finished is the clock's, not the job's
        assert doc.pop("started") <= doc.pop("finished")
    return one, two


def test_cli__coverage_with_blocks__json_identical(capsys, scene):
    g = scene["gpkg"]
    one, two = _cli_pair(capsys, ["coverage", g, g, "--regions-layer", "districts", "--regions-id-field", "name", "--zones-layer",
                                  "zones", "--zones-id-field", "name", "--at-least", "1", "--at-least", "2",
                                  "--density", g, "--density-layer", "blocks", "--count-field", "pop",
                                  "--points", "20000", "--seed", "2026"])
    assert one == two and len(two["results"]) == 12


def test_cli__integrate_raster_and_overlap__json_identical(capsys, scene):
    g = scene["gpkg"]
    one, two = _cli_pair(capsys, ["integrate", g, "--regions-layer", "districts", "--regions-id-field", "name", "--density",
                                  scene["tif"], "--points", "20000", "--seed", "7"])
    assert one == two and len(two["results"]) == 6
    one, two = _cli_pair(capsys, ["overlap", g, "--zones-layer", "zones", "--zones-id-field", "name", "--points", "20000",
                                  "--seed", "7"])
    assert one == two and two["results"] and two["multiplicity"]
    one, two = _cli_pair(capsys, ["area", g, "--layer", "districts", "--id-field", "name", "--points", "20000",
                                  "--seed", "7", "--sampler", "stratified"])
    assert one == two and len(two["results"]) == 6


@pytest.mark.parametrize(
    "value, match",
    [
        ("0", r"--workers: expected a positive whole number, got '0'"),
        ("-2", r"--workers"),
        ("2.5", r"--workers: expected a positive whole number, got '2.5'"),
        ("many", r"--workers: expected a positive whole number, got 'many'"),
        (str(MAX_WORKERS + 1), rf"--workers: must be a whole number from 1 to {MAX_WORKERS}, got {MAX_WORKERS + 1}"),
    ],
)
def test_cli__bad_workers__refused(capsys, scene, value, match):
    g = scene["gpkg"]
    assert_refused(capsys, ["overlap", g, "--zones-layer", "zones", "--workers", value], match, scene["folder"])


def test_cli__error_in_a_worker__same_line_as_one_worker(capsys, scene):
    g = scene["gpkg"]
    argv = ["integrate", g, "--regions-layer", "districts", "--regions-id-field", "name", "--density", BAD_EXPRESSION,
            "--points", "5000", "--seed", "1"]
    lines = [assert_refused(capsys, [*argv, "--workers", w], r"--density: expression", scene["folder"])
             for w in ("1", "2")]
    assert lines[0] == lines[1]


# --- map_ordered and its helpers --------------------------------------------------------------------


def _times(state, item):
    return state * item


def _warn_and_fail(state, item):
    warnings.warn(AreamcWarning(f"item {item}: raise {{points}}", param="points"), stacklevel=1)
    if item in state:
        raise OptionError(f"{{param}}: item {item} is bad", param="points")
    return item


def _pid(state, item):
    return os.getpid()


def _nested(state, item):
    return map_ordered(_pid, range(3), 2)  # inside a worker: a plain loop, no pool of pools


def _die(state, item):
    if item == 1:
        os._exit(3)
    return item


def _setup_fails(shared):
    raise OptionError("{param}: cannot set up", param="chunk")


def test_map_ordered__results_in_item_order__with_done_in_order():
    seen = []
    out = map_ordered(_times, range(37), 2, shared=3, done=lambda k, r: seen.append((k, r)))
    assert out == [3 * k for k in range(37)]
    assert seen == list(enumerate(out))
    assert map_ordered(_times, [], 2, shared=3) == []


def test_map_ordered__worker_warnings__re_emitted_in_item_order_with_their_parameter():
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        assert map_ordered(_warn_and_fail, range(20), 2, shared=()) == list(range(20))
    assert [str(w.message) for w in caught] == [f"item {k}: raise points" for k in range(20)]
    assert caught[5].message.render({"points": "--points"}) == "item 5: raise --points"


def test_map_ordered__several_items_fail__the_first_one_s_error_after_the_warnings_before_it():
    threads = threading.active_count()
    for workers in (1, 2):
        with warnings.catch_warnings(record=True) as caught, pytest.raises(OptionError, match="item 6 is bad"):
            warnings.simplefilter("always")
            map_ordered(_warn_and_fail, range(30), workers, shared={6, 7, 25})
        assert [str(w.message) for w in caught] == [f"item {k}: raise points" for k in range(7)]
    assert not multiprocessing.active_children()
    assert threading.active_count() == threads  # the pool's thread is gone too, so the next pool may fork


def test_map_ordered__inside_a_worker__runs_as_a_plain_loop():
    nested = map_ordered(_nested, range(2), 2)
    assert all(len(set(pids)) == 1 for pids in nested)
    assert all(pids[0] != os.getpid() for pids in nested)


def test_map_ordered__a_worker_dies__error_names_workers():
    with pytest.raises(AreamcError) as info:
        map_ordered(_die, range(4), 2)
    assert info.value.param == "workers"
    assert not multiprocessing.active_children()


def test_map_ordered__setup_error__raised_as_in_one_worker():
    for workers in (1, 2):
        with pytest.raises(OptionError, match="chunk: cannot set up"):
            map_ordered(_times, range(4), workers, setup=_setup_fails)


@pytest.mark.parametrize("value", [0, -1, 1.5, True, "2", MAX_WORKERS + 1])
def test_check_workers__bad_value__names_workers(value):
    with pytest.raises(OptionError) as info:
        check_workers(value)
    assert info.value.param == "workers"


def test_check_workers__default__every_usable_core():
    # the cores this process may run on: its affinity mask (Python docs, os.sched_getaffinity)
    expected = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    assert usable_cores() == expected
    assert check_workers(None) == min(expected, MAX_WORKERS)
    assert check_workers(np.int64(3)) == 3


class _HoldsALock:
    """A density source that cannot travel: it holds a lock, which does not pickle."""

    label = "locked"

    def __init__(self):
        self.lock = threading.Lock()


def test_workers_for_source__source_that_cannot_travel__one_worker_with_a_warning(scene):
    with pytest.warns(AreamcWarning, match="cannot be sent to worker processes") as caught:
        assert workers_for_source(2, source_handle(_HoldsALock()), 5) == 1
    assert caught[0].message.param == "workers"
    for source in ("blocks", "raster", "bad"):
        assert source_handle(scene[source]).travels


# --- one run split by stream position -----------------------------------------------------------------


@pytest.mark.parametrize("weighted", [False, True], ids=["hit-counts", "real-scores"])
def test_fixed_count_sums__two_workers__same_sums_as_the_engine(weighted):
    disc = shapely.Point(0.0, 0.0).buffer(1000.0, quad_segs=64)
    shapely.prepare(disc)

    def evaluate(x, y):
        inside = shapely.contains_xy(disc, x, y)
        if not weighted:
            return inside
        return np.column_stack([inside * np.exp(x / 700.0), inside * (1.0 + y * y / 1e6)])

    points = 3 * 65_536 + 12_345  # spans that end off the sampler's and the summation blocks
    new = lambda: make_sampler("uniform", make_seed(11), Box(-1000.0, -1000.0, 1000.0, 1000.0))  # noqa: E731
    reference = accumulate(new().random, evaluate, Stopper(StopRule(points=points)), chunk=7_777)
    for workers in (1, 2):
        sampler = new()
        got = fixed_count_sums(sampler, evaluate, points, workers, chunk=10_000)
        assert got.points == reference.points and sampler.generated == points
        assert got.sums.dtype == reference.sums.dtype
        assert bits(got.sums) == bits(reference.sums) and bits(got.sumsq) == bits(reference.sumsq)
    if not weighted:  # the hit fraction against the disc's area, pi r^2 (4 binomial standard errors)
        p = math.pi / 4
        assert abs(reference.sums[0] / points - p) <= 4 * math.sqrt(p * (1 - p) / points)


def test_cli__table_output__identical_text(capsys, scene):
    # the rows as a user sees them, rendered as the table, byte for byte
    g = scene["gpkg"]
    argv = ["coverage", g, g, "--regions-layer", "districts", "--regions-id-field", "name", "--zones-layer", "zones",
            "--zones-id-field", "name", "--points", "5000", "--seed", "3", "-q"]
    outs = [run_cli(capsys, [*argv, "--workers", w]) for w in ("1", "2")]
    assert outs[0][0] == outs[1][0] == 0
    assert outs[0][1] == outs[1][1] and outs[0][1].count("\n") > 8
    assert outs[0][2] == outs[1][2]  # the same warnings and notices
