"""Progress of the jobs over pairs and regions (areamc.parallel.JobProgress) and the bars on stderr.

What is checked here:

* each job (overlap per pair and with the shared sample, coverage, integrate) reports counts that
  start at 0, never fall and end at the total, on one worker and on two, and names the finished
  items in item order;
* a progress callback, or a bar on a terminal, never changes a result: every field is compared
  to the last bit (floats by their binary64 values) with and without one, and for 1 and 2 workers;
* the bar writes nothing when stderr is not a terminal or with ``--quiet``, and draws on a
  terminal (a pseudo-terminal, ``pty.openpty``, running the installed script).

The expected totals and the sanity of the rows come from shapely 2 (GEOS), a reference library:
the pairs of zones whose overlap has positive area, exact intersection areas, exact covered shares
and areal weighting (Goodchild & Lam 1980), each estimate within 4 standard errors of them (common
practice).  The scene (invented districts, zones and blocks near 10°E 47°N) is written by the tests
into their tmp_path.
"""

from __future__ import annotations

import fcntl
import io
import json
import os
import pty
import select
import shutil
import struct
import subprocess
import sys
import termios
import time
from dataclasses import asdict, is_dataclass

import fiona
import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import box, mapping

import areamc.cli.progress as bar_module
from areamc.coverage import estimate_coverage
from areamc.density import build_density, read_density
from areamc.integrate import integrate_density
from areamc.load import read_layer
from areamc.overlap import estimate_overlaps
from areamc.project import project_layers
from areamc.stopping import StopRule

from conftest import overlay_total, run_cli

STOP = StopRule(points=20_000)
#: Shared-sample points: four spans of 65,536 stream positions on two workers, the last one short.
SHARED_POINTS = 200_000


def _write(path, geoms, props, schema_props) -> str:
    schema = {"geometry": "Polygon", "properties": schema_props}
    with fiona.open(path, "w", driver="GPKG", schema=schema, crs_wkt=pyproj.CRS("EPSG:4326").to_wkt()) as dst:
        for g, p in zip(geoms, props):
            dst.write({"geometry": mapping(g), "properties": p})
    return str(path)


@pytest.fixture(scope="module")
def scene(tmp_path_factory):
    """Three districts in a row, four overlapping circular zones and twelve census blocks, one file each."""
    folder = tmp_path_factory.mktemp("progress")
    districts = [box(10.0 + 0.1 * c, 47.0, 10.1 + 0.1 * c, 47.1) for c in range(3)]
    regions_path = _write(folder / "districts.gpkg", districts, [{"name": f"R{i}"} for i in range(3)],
                          {"name": "str"})
    centres = [(10.05, 47.05), (10.11, 47.06), (10.17, 47.04), (10.24, 47.06)]
    zones = [shapely.Point(x, y).buffer(0.04, quad_segs=16) for x, y in centres]
    zones_path = _write(folder / "zones.gpkg", zones, [{"name": f"Z{i}"} for i in range(4)], {"name": "str"})
    blocks = [box(10.0 + 0.05 * c, 47.0 + 0.05 * r, 10.05 + 0.05 * c, 47.05 + 0.05 * r)
              for r in range(2) for c in range(6)]
    counts = [float(100 + 37 * i) for i in range(12)]
    blocks_path = _write(folder / "blocks.gpkg", blocks, [{"pop": c} for c in counts], {"pop": "float"})
    regions = read_layer(regions_path, id_field="name")
    zone_layer = read_layer(zones_path, id_field="name")
    spec = read_density(blocks_path, count_field="pop")
    projected = project_layers([regions, zone_layer, spec.blocks])
    return {
        "folder": folder, "regions_path": regions_path, "zones_path": zones_path, "blocks_path": blocks_path,
        "regions": projected[0], "zones": projected[1], "blocks": projected[2], "counts": counts,
        "density": build_density(spec, projected[0].plane, projected[2], projected[0]),
    }


def _jobs(scene):
    """Each job as ``run(progress, workers) -> report``, with the unit it counts and its total (from shapely)."""
    zones, regions = scene["zones"].planar, scene["regions"]
    n = len(zones)
    # pairs of zones whose overlap has positive area, by shapely (GEOS): what overlap must count
    overlapping = sum(1 for i in range(n) for j in range(i + 1, n) if shapely.intersection(zones[i], zones[j]).area > 0)
    cross = sum(1 for r in regions.planar for z in zones if shapely.intersection(r, z).area > 0)
    return {
        "overlap-per-pair": (lambda p, w: estimate_overlaps(scene["zones"], stop=STOP, seed=5, pair_sampling="per-pair",
                                                            workers=w, progress=p), "pair", overlapping),
        "overlap-two-layers": (lambda p, w: estimate_overlaps(regions, scene["zones"], stop=STOP, seed=5,
                                                              workers=w, progress=p), "pair", cross),
        "overlap-shared": (lambda p, w: estimate_overlaps(scene["zones"], stop=StopRule(points=SHARED_POINTS), seed=5,
                                                          pair_sampling="shared", workers=w, progress=p),
                           "pt", SHARED_POINTS),
        "coverage": (lambda p, w: estimate_coverage(regions, scene["zones"], ks=(1, 2), stop=STOP, seed=5, workers=w,
                                                    progress=p), "region", len(regions)),
        "integrate": (lambda p, w: integrate_density(regions, scene["density"], stop=STOP, seed=5, workers=w,
                                                     progress=p), "region", len(regions)),
    }


JOBS = ["overlap-per-pair", "overlap-two-layers", "overlap-shared", "coverage", "integrate"]


def exactly(obj):
    """A structure equal for two objects exactly when every field is: floats by their binary64 value
    (``float.hex``, so NaN matches NaN and -0.0 differs from 0.0), records by their fields."""
    if is_dataclass(obj) and not isinstance(obj, type):
        return type(obj).__name__, exactly(asdict(obj))
    if isinstance(obj, dict):
        return tuple((k, exactly(v)) for k, v in obj.items())
    if isinstance(obj, (list, tuple, np.ndarray)):
        return tuple(exactly(v) for v in obj)
    if isinstance(obj, (float, np.floating)):
        return "f", float(obj).hex()
    return type(obj).__name__, obj


def everything(report):
    """Every field of a report and its metadata (see :func:`exactly`)."""
    fields = {k: getattr(report, k) for k in ("rows", "multiplicity", "pairs", "candidates", "exact_status",
                                              "exact_profile", "source") if hasattr(report, k)}
    return exactly((fields, report.metadata()))


def finished_items(report) -> list[str]:
    """The notes a job gives its finished items, in item order, from its rows."""
    if hasattr(report, "pairs"):
        return [f"{row.id_a} x {row.id_b}" for row in report.rows]
    return list(dict.fromkeys(row.id for row in report.rows))


def check_against_shapely(name, report, scene) -> None:
    """The rows are right, not merely repeatable: within 4 standard errors of shapely's exact values."""
    zones, regions = scene["zones"].planar, scene["regions"].planar
    if name.startswith("overlap"):
        first = regions if name == "overlap-two-layers" else zones
        for (i, j), row in zip(report.pairs, report.rows):
            exact = shapely.area(shapely.intersection(first[i], zones[j]))
            assert abs(row.estimate - exact) <= 4 * row.std_error + 1e-6
    elif name == "coverage":
        union = shapely.union_all(zones)
        for row in (r for r in report.rows if r.k == 1):
            region = regions[row.feature_index]
            exact = shapely.area(shapely.intersection(region, union)) / shapely.area(region)
            assert abs(row.share - exact) <= 4 * row.std_error + 1e-12
    else:  # areal weighting over the blocks (Goodchild & Lam 1980), by shapely here
        for row in report.rows:
            exact = overlay_total(scene["blocks"].planar, scene["counts"], regions[row.feature_index])
            assert row.exact == pytest.approx(exact, rel=1e-9)
            assert abs(row.estimate - exact) <= 4 * row.std_error + 1e-9


# --- the library: counts, notes and identical results ------------------------------------------------


@pytest.mark.parametrize("name", JOBS)
def test_job_progress__counts_rise_to_the_total__results_unchanged(scene, name):
    run, unit, total = _jobs(scene)[name]
    plain = run(None, 1)
    check_against_shapely(name, plain, scene)
    assert total > 0, "the scene must give the job something to count"
    for workers in (1, 2):
        calls = []
        report = run(lambda *args, calls=calls: calls.append(args), workers)
        assert everything(report) == everything(plain), f"a progress callback changed a result ({workers} workers)"
        done = [c[0] for c in calls]
        assert done[0] == 0 and done[-1] == total
        assert all(a <= b for a, b in zip(done, done[1:])), "counts must never fall"
        assert {(c[1], c[2]) for c in calls} == {(total, unit)}
        notes = [c[3] for c in calls]
        if unit == "pt":
            # per chunk on one worker, per span on two; then the exact profile, the count at its total
            assert calls[-1] == (total, total, "pt", "exact profile")
            if workers == 2:
                assert sorted(set(done)) == [0, 65_536, 131_072, 196_608, SHARED_POINTS]
            continue
        # each finished item once, in item order, with its id
        rising = [note for prev, (d, _, _, note) in zip([0] + done, calls) if d > prev]
        assert rising == finished_items(report)
        steps = [note for note in notes if ": exact" in note or note == "exact profile"]
        if workers == 1 and name != "overlap-two-layers":  # steps inside an item are seen on one worker only
            assert steps, "one worker must report the exact step inside its items"
        if workers == 2:
            assert not steps, "a worker process cannot report to the caller"


def test_job_progress__coverage__one_worker_notes_points_and_exact_shares(scene):
    calls = []
    estimate_coverage(scene["regions"], scene["zones"], ks=(1, 2), stop=StopRule(points=150_000), seed=5,
                      chunk=65_536, workers=1, progress=lambda *args: calls.append(args))
    notes = [c[3] for c in calls if c[0] == 0]  # while the first region runs
    # chunks of 65,536 points: 65,536, 131,072 and the last, short one at 150,000 (engine: a chunk per draw)
    assert notes[1:] == ["R0: 65,536 pt", "R0: 131,072 pt", "R0: 150,000 pt", "R0: exact shares"]


def test_job_progress__overlap_without_pairs__one_report_at_zero(scene):
    apart = project_layers([read_layer(scene["regions_path"], id_field="name")])[0]  # districts only touch
    calls = []
    report = estimate_overlaps(apart, stop=STOP, seed=1, profile=False, progress=lambda *args: calls.append(args))
    assert report.candidates == 0
    assert calls == [(0, 0, "pair", "")]


# --- the bar ------------------------------------------------------------------------------------------


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def as_terminal(monkeypatch) -> _Terminal:
    """stderr as a terminal that keeps what is written, and bars drawn at once and at every update.
    Called in the test itself: pytest sets its own stderr back between a fixture and the test."""
    screen = _Terminal()
    monkeypatch.setattr(sys, "stderr", screen)
    monkeypatch.setattr(bar_module, "DELAY", 0.0)
    monkeypatch.setattr(bar_module, "MININTERVAL", 0.0)
    return screen


def _feed(bar) -> None:
    bar(0, 3, "region", "")
    bar(0, 3, "region", "R0: exact shares")
    for k in range(3):
        bar(k + 1, 3, "region", f"R{k}")
    bar(0, 200_000, "pt", "shared sample")
    bar(200_000, 200_000, "pt", "exact profile")
    bar.close()


def test_job_bar__not_a_terminal__writes_nothing(capsys):
    _feed(bar_module.JobBar(quiet=False))
    area = bar_module.ProgressBar(100, "km2", quiet=False)
    area.close()
    assert capsys.readouterr() == ("", "")


def test_job_bar__terminal__counts_units_and_notes(monkeypatch):
    terminal = as_terminal(monkeypatch)
    _feed(bar_module.JobBar(quiet=False))
    text = terminal.getvalue()
    for shown in ("3/3", "region", "R0: exact shares", "R2", "200k/200k", "exact profile"):
        assert shown in text, shown
    assert text.endswith("\r"), "a finished bar clears its line"


def test_job_bar__terminal_and_quiet__writes_nothing(monkeypatch):
    terminal = as_terminal(monkeypatch)
    _feed(bar_module.JobBar(quiet=True))
    bar_module.ProgressBar(100, "km2", quiet=True).close()
    assert terminal.getvalue() == ""


# --- the commands ---------------------------------------------------------------------------------------


#: Metadata of the wall clock (when a run began and ended), which two runs never share.
WALL_CLOCK = ("started", "finished")


def _commands(scene):
    regions, zones, blocks = scene["regions_path"], scene["zones_path"], scene["blocks_path"]
    common = ["--seed", "5", "--points", "20000", "--format", "json", "--units", "m2"]
    return {
        "overlap": ["overlap", zones, *common],
        "coverage": ["coverage", regions, zones, "--at-least", "2", *common],
        "integrate": ["integrate", regions, "--density", blocks, "--count-field", "pop", *common],
    }


@pytest.mark.parametrize("command", ["overlap", "coverage", "integrate"])
@pytest.mark.parametrize("workers", ["1", "2"])
def test_cli__bar_on_a_terminal__json_identical_to_none(scene, capsys, monkeypatch, command, workers):
    argv = [*_commands(scene)[command], "--workers", workers]
    rc, plain, err = run_cli(capsys, argv)
    assert rc == 0 and err == "", "off a terminal: no bar, and this scene gives no warning"
    screen = as_terminal(monkeypatch)
    from areamc.cli import main

    assert main(argv) == 0
    shown, _ = capsys.readouterr()
    doc, with_bar = json.loads(plain), json.loads(shown)
    for run in (doc, with_bar):  # when the run began and ended is the one thing allowed to differ
        for key in WALL_CLOCK:
            run.pop(key, None)
    assert with_bar == doc, "the bar changed the output"
    unit = "pair" if command == "overlap" else "region"
    assert unit in screen.getvalue()
    assert doc["results"] and not any(row["flagged"] for row in doc["results"])


# --- the installed script on a pseudo-terminal ------------------------------------------------------------

_script = shutil.which("areamc", path=os.path.dirname(sys.executable)) or shutil.which("areamc")
AREAMC = [_script] if _script else [sys.executable, "-c", "import sys; from areamc.cli import main; sys.exit(main())"]


def _on_ptys(*argvs) -> list[tuple[int, str, bytes]]:
    """Run the script once per argv, side by side, each with stderr on a pseudo-terminal 100 columns wide;
    per run (exit status, stdout, what its terminal got)."""
    runs = []
    for argv in argvs:
        master, slave = pty.openpty()
        fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 100, 0, 0))  # tqdm draws nothing 0 wide
        proc = subprocess.Popen([*AREAMC, *map(str, argv)], stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                                stderr=slave)
        os.close(slave)
        runs.append([proc, master, b""])
    open_masters, deadline = {run[1]: run for run in runs}, time.monotonic() + 60
    while open_masters and time.monotonic() < deadline:
        ready, _, _ = select.select(list(open_masters), [], [], 0.2)
        for master in ready:
            try:
                chunk = os.read(master, 65536)
            except OSError:  # EIO: the script closed its terminal's last writer
                chunk = b""
            if chunk:
                open_masters[master][2] += chunk
            else:
                del open_masters[master]
        for master, run in list(open_masters.items()):
            if not ready and run[0].poll() is not None:
                del open_masters[master]
    out = []
    for proc, master, got in runs:
        stdout, _ = proc.communicate(timeout=60)
        os.close(master)
        out.append((proc.returncode, stdout.decode(), got))
    return out


def test_script__pty__bar_drawn_unless_quiet(scene):
    """Three regions sampled for 0.3 s each (--time-limit), on one worker: about a second, past the bar's
    0.5 s delay whatever the machine's speed (the two runs go side by side, one per core)."""
    argv = ["coverage", scene["regions_path"], scene["zones_path"], "--seed", "5", "--points", "100000000",
            "--time-limit", "0.3", "--workers", "1", "--format", "json"]
    (rc, out, got), (rc_quiet, out_quiet, got_quiet) = _on_ptys(argv, [*argv, "--quiet"])
    assert rc == 0
    assert b"region" in got and b"/3" in got, got[-300:]
    assert rc_quiet == 0 and got_quiet == b""
    for doc in (json.loads(out), json.loads(out_quiet)):  # both ran their full time: the quiet one had time to draw
        assert [row["stop_reason"] for row in doc["results"]] == ["time"] * 3
