"""Command-line tests: output files never touch inputs, and output failures are one line.

Every case writes its own inputs in tmp_path.  Facts the checks rest on:

* a Shapefile is several files beside its ``.shp`` (``.shx`` index, ``.dbf`` attributes:
  ESRI 1998, Shapefile Technical Description, p. 2; ``.prj``, ``.cpg``, ``.qix``, ``.sbn``,
  ``.sbx``: common practice), and fiona's "ESRI Shapefile" driver writes the first five;
* SQLite keeps ``-journal``, ``-wal`` and ``-shm`` files beside an open database such as a
  GeoPackage, and takes a stray journal for a hot one to roll back (sqlite.org, "Temporary
  Files Used By SQLite"; "File Locking And Concurrency In SQLite Version 3", §4);
* two paths are one file when :func:`os.path.samefile` says so (same device and inode:
  POSIX stat(2)); a symlink is resolved by :func:`os.path.realpath`;
* a full disk makes write(2) fail with ENOSPC, and a folder without write permission makes
  creat(2) fail with EACCES (POSIX); GDAL reports a full disk under a GeoPackage as
  "database or disk is full" (SQLite's SQLITE_FULL message), seen on a 128 KiB tmpfs on this
  machine, 2026-12-01; both are simulated here by monkeypatching the write;
* a process ended by signal N exits 128 + N by shell convention: 130 for SIGINT (2), 143 for
  SIGTERM (15) (common practice; POSIX signal numbers from signal(7)).
"""

from __future__ import annotations

import csv
import errno
import io
import os
import signal
import stat
import subprocess
import sys
import time

import fiona
import pytest
from fiona.crs import CRS
from shapely.geometry import box, mapping

import areamc.cli.area
import areamc.cli.coverage
import areamc.cli.inspect
import areamc.cli.integrate
import areamc.cli.overlap
import areamc.output
from areamc.cli import main

from conftest import assert_refused, checksums, run_cli

FAST = ["-n", "2000", "--seed", "1", "-q"]
POLYGONS = {"id": "str", "population": "int"}


def _write(path, layer, boxes, driver="GPKG"):
    schema = {"geometry": "Polygon", "properties": POLYGONS}
    with fiona.open(path, "w", driver=driver, schema=schema, crs=CRS.from_epsg(4326), layer=layer) as dst:
        for i, bounds in enumerate(boxes):
            dst.write({"geometry": mapping(box(*bounds)), "properties": {"id": f"f{i}", "population": 100 * (i + 1)}})


@pytest.fixture
def files(tmp_path):
    """Inputs in tmp_path/data: GeoPackages with regions, zones and blocks, a Shapefile, links."""
    data = tmp_path / "data"
    data.mkdir()
    regions = [(10.0, 47.0, 10.1, 47.1), (10.1, 47.0, 10.2, 47.1)]
    zones = [(10.05, 47.02, 10.15, 47.08), (10.12, 47.0, 10.2, 47.05)]
    _write(data / "real.gpkg", "regions", regions)
    _write(data / "zones.gpkg", "zones", zones)
    _write(data / "other.gpkg", "zones", [(10.0, 47.0, 10.08, 47.06)])
    _write(data / "blocks.gpkg", "blocks", [(10.0, 47.0, 10.05, 47.1), (10.05, 47.0, 10.2, 47.1)])
    _write(data / "victim.shp", "victim", regions, driver="ESRI Shapefile")
    (data / "link.gpkg").symlink_to(data / "real.gpkg")
    (data / "victim_link.shp").symlink_to(data / "victim.shp")
    (data / "shapes").mkdir()
    _write(data / "shapes" / "parcels.shp", "parcels", regions, driver="ESRI Shapefile")
    (tmp_path / "linked_data").symlink_to(data, target_is_directory=True)
    os.link(data / "real.gpkg", data / "hard.gpkg")
    (data / "existing_folder").mkdir()
    (data / "old.csv").write_text("id,estimate\nold,1\n")
    made = sorted(p.name for p in data.iterdir())
    # fiona wrote the Shapefile's own sidecars (ESRI 1998): the cases below replace real files
    assert {"victim.shp", "victim.shx", "victim.dbf", "victim.prj", "victim.cpg"} <= set(made), made
    return data


@pytest.fixture
def no_work(monkeypatch):
    """Make every input reader of every command fail the test: a refusal must come before any work."""

    def started(*args, **kwargs):
        raise AssertionError("work started before the output paths were checked")

    for module, name in [
        (areamc.cli.area, "read_layer"),
        (areamc.cli.inspect, "read_layer"),
        (areamc.cli.overlap, "zone_layer"),
        (areamc.cli.coverage, "read_layer"),
        (areamc.cli.coverage, "zone_layer"),
        (areamc.cli.coverage, "read_density_option"),
        (areamc.cli.integrate, "read_layer"),
        (areamc.cli.integrate, "read_density_option"),
    ]:
        monkeypatch.setattr(module, name, started)


def area(source, *more):
    return ["area", str(source), *FAST, *map(str, more)]


COVERAGE = ["coverage", "{d}/real.gpkg", "{d}/zones.gpkg", "--density", "{d}/blocks.gpkg",
            "--count-field", "population", *FAST]
INTEGRATE = ["integrate", "{d}/real.gpkg", "--density", "{d}/blocks.gpkg", "--count-field", "population", *FAST]

# (case, argv with {d} for the data folder, message)
REFUSED = [
    ("symlinked input", area("{d}/link.gpkg", "-o", "{d}/real.gpkg"), r"--output .*real\.gpkg: would overwrite the input .*link\.gpkg \(the same file\)"),
    ("output is a symlink to the input", area("{d}/real.gpkg", "-o", "{d}/link.gpkg"), r"--output .*link\.gpkg: would overwrite the input"),
    ("input through a symlinked folder", area("{d}/../linked_data/real.gpkg", "-o", "{d}/real.gpkg"), r"would overwrite the input"),
    ("hard link to the input", area("{d}/real.gpkg", "-o", "{d}/hard.gpkg"), r"--output .*hard\.gpkg: would overwrite the input .*real\.gpkg"),
    ("input spelt with ..", area("{d}/real.gpkg", "-o", "{d}/existing_folder/../real.gpkg"), r"would overwrite the input"),
    ("shapefile .shp itself", area("{d}/victim.shp", "-o", "{d}/victim.shp"), r"would overwrite the input"),
    ("shapefile .dbf", area("{d}/victim.shp", "-o", "{d}/victim.dbf"), r"--output .*victim\.dbf: would overwrite .*victim\.dbf, a sidecar file of the input .*victim\.shp"),
    ("shapefile .shx", area("{d}/victim.shp", "-o", "{d}/victim.shx"), r"victim\.shx, a sidecar file of the input"),
    ("shapefile .prj", area("{d}/victim.shp", "-o", "{d}/victim.prj"), r"victim\.prj, a sidecar file of the input"),
    ("shapefile .cpg", area("{d}/victim.shp", "-o", "{d}/victim.cpg"), r"victim\.cpg, a sidecar file of the input"),
    ("shapefile .qix (absent)", area("{d}/victim.shp", "-o", "{d}/victim.qix"), r"victim\.qix, a sidecar file of the input"),
    ("shapefile .sbn (absent)", area("{d}/victim.shp", "-o", "{d}/victim.sbn"), r"a sidecar file of the input"),
    ("shapefile .sbx (absent)", area("{d}/victim.shp", "-o", "{d}/victim.sbx"), r"a sidecar file of the input"),
    ("sidecar of a symlinked shapefile's target", area("{d}/victim_link.shp", "-o", "{d}/victim.dbf"), r"victim\.dbf, a sidecar file of the input .*victim_link\.shp"),
    ("shapefile in a folder input", area("{d}/shapes", "-o", "{d}/shapes/new.dbf"), r"would add a Shapefile part to the input folder .*shapes"),
    ("shapefile sidecar in upper case", area("{d}/victim.shp", "-o", "{d}/victim.DBF"), r"a sidecar file of the input"),
    ("inspect, shapefile sidecar", ["inspect", "{d}/victim.shp", "-o", "{d}/victim.dbf"], r"a sidecar file of the input"),
    ("geopackage -wal", area("{d}/real.gpkg", "-o", "{d}/real.gpkg-wal"), r"real\.gpkg-wal, a sidecar file of the input"),
    ("geopackage -shm", area("{d}/real.gpkg", "-o", "{d}/real.gpkg-shm"), r"real\.gpkg-shm, a sidecar file of the input"),
    ("geopackage -journal", area("{d}/real.gpkg", "-o", "{d}/real.gpkg-journal"), r"real\.gpkg-journal, a sidecar file of the input"),
    ("coverage, density input", [*COVERAGE, "-o", "{d}/blocks.gpkg"], r"--output .*blocks\.gpkg: would overwrite the input"),
    ("coverage, zones input", [*COVERAGE, "-o", "{d}/zones.gpkg"], r"--output .*zones\.gpkg: would overwrite the input"),
    ("coverage, regions input", [*COVERAGE, "-o", "{d}/real.gpkg"], r"would overwrite the input"),
    ("integrate, density input", [*INTEGRATE, "-o", "{d}/blocks.gpkg"], r"--output .*blocks\.gpkg: would overwrite the input"),
    ("integrate, density sidecar", [*INTEGRATE, "-o", "{d}/blocks.gpkg-journal"], r"a sidecar file of the input .*blocks\.gpkg"),
    ("overlap, OTHER input", ["overlap", "{d}/zones.gpkg", "{d}/other.gpkg", *FAST, "-o", "{d}/other.gpkg"], r"would overwrite the input .*other\.gpkg"),
    ("overlap, ZONES input", ["overlap", "{d}/zones.gpkg", *FAST, "-o", "{d}/zones.gpkg"], r"would overwrite the input .*zones\.gpkg"),
    ("trace = output", area("{d}/real.gpkg", "--trace", "{d}/t.csv", "-o", "{d}/t.csv"), r"--trace .*t\.csv: the same file as --output .*t\.csv"),
    ("trace = output through a link", area("{d}/real.gpkg", "--trace", "{d}/../linked_data/t.csv", "-o", "{d}/t.csv"), r"--trace .*: the same file as --output"),
    ("trace = a sidecar of the output", area("{d}/real.gpkg", "--trace", "{d}/out.gpkg-journal", "-o", "{d}/out.gpkg"), r"--trace .*out\.gpkg-journal: a sidecar file of --output .*out\.gpkg"),
    ("trace = input", area("{d}/real.gpkg", "--trace", "{d}/real.gpkg"), r"--trace .*real\.gpkg: would overwrite the input"),
    ("missing folder", area("{d}/real.gpkg", "-o", "{d}/no_such_folder/out.csv"), r"--output .*out\.csv: folder .*no_such_folder does not exist"),
    ("trace in a missing folder", area("{d}/real.gpkg", "--trace", "{d}/no_such_folder/t.csv"), r"--trace .*: folder .*no_such_folder does not exist"),
    ("folder is a file", area("{d}/real.gpkg", "-o", "{d}/old.csv/out.csv"), r"folder .*old\.csv is not a folder"),
    ("existing folder", area("{d}/real.gpkg", "-o", "{d}/existing_folder"), r"--output .*existing_folder: is a folder"),
    ("existing folder, trailing slash", area("{d}/real.gpkg", "-o", "{d}/existing_folder/"), r"is a folder"),
    ("existing folder as the trace", area("{d}/real.gpkg", "--trace", "{d}/existing_folder"), r"--trace .*existing_folder: is a folder"),
    ("special file", area("{d}/real.gpkg", "-o", os.devnull), r"--output /dev/null: not a regular file"),
]


@pytest.mark.parametrize("case, argv, match", REFUSED, ids=[c[0] for c in REFUSED])
def test_output_path__refused_before_any_work(files, no_work, capsys, case, argv, match):
    argv = [a.replace("{d}", str(files)) for a in argv]
    assert_refused(capsys, argv, match, files.parent)


def _read_only(path, mode):
    """chmod `path` to `mode`; skip when that does not make it read-only to this process's check."""
    os.chmod(path, mode)
    denied = not os.access(path, os.W_OK) or not (os.stat(path).st_mode & 0o222)
    if not denied:  # pragma: no cover - a file system that ignores chmod
        pytest.skip("chmod had no effect on this file system: neither os.access nor the mode bits show read-only")


def test_output_path__read_only_file__refused_and_kept(files, no_work, capsys):
    # Root may write any file (os.access always allows it), but a file with no write bit was made
    # read-only on purpose: areamc refuses it for root too, by its mode bits.
    old = files / "old.csv"
    _read_only(old, 0o444)
    assert_refused(capsys, area(files / "real.gpkg", "-o", old), r"--output .*old\.csv: the file is read-only", files.parent)
    assert stat.S_IMODE(os.stat(old).st_mode) == 0o444


def test_output_path__read_only_folder__refused(files, no_work, capsys):
    locked = files / "existing_folder"
    _read_only(locked, 0o555)
    try:
        assert_refused(capsys, area(files / "real.gpkg", "-o", locked / "out.csv"),
                       r"--output .*out\.csv: folder .*existing_folder is not writable", files.parent)
        assert_refused(capsys, area(files / "real.gpkg", "--trace", locked / "t.csv"),
                       r"--trace .*t\.csv: folder .*existing_folder is not writable", files.parent)
    finally:
        os.chmod(locked, 0o755)  # let pytest remove tmp_path


def test_output_path__not_writable_to_this_process__refused(files, no_work, capsys, monkeypatch):
    # os.access is what the check asks for permission (as root it always allows: simulated here)
    real_access = os.access
    denied = str(files / "old.csv")
    monkeypatch.setattr(os, "access", lambda p, mode, **kw: False if str(p) == denied else real_access(p, mode, **kw))
    assert_refused(capsys, area(files / "real.gpkg", "-o", denied), r"the file is read-only", files.parent)


@pytest.mark.parametrize(
    "argv",
    [
        area("{d}/victim.shp", "-o", "{d}/victim_areas.csv"),  # same stem, not a Shapefile part
        area("{d}/real.gpkg", "-o", "{d}/real.gpkg.csv"),  # the input's name plus an extension
        area("{d}/real.gpkg", "--trace", "{d}/t.csv", "-o", "{d}/out.gpkg"),
        ["integrate", "{d}/real.gpkg", "--density", "2e-4", *FAST, "-o", "2e-4"],  # an expression is no input file
    ],
    ids=["shapefile stem", "input name plus extension", "trace and output", "density expression"],
)
def test_output_path__distinct_paths__accepted(files, capsys, monkeypatch, argv):
    # control: the check refuses only real clashes
    monkeypatch.chdir(files)
    argv = [a.replace("{d}", str(files)) for a in argv]
    before = checksums(files)
    rc, out, err = run_cli(capsys, argv)
    assert rc == 0, err
    after = checksums(files)
    assert {k: v for k, v in after.items() if k in before} == before  # inputs untouched
    assert os.path.getsize(argv[argv.index("-o") + 1]) > 0


# --- failures while writing: one line, exit status 2, no file left ---------------------------------


def _full_disk_text(nth):
    """Text files: the `nth` temporary file opens (1: the trace, staged first; 2: the trace's CSVW
    metadata sidecar; 3: the output; 4: a CSV output's sidecar), then write(2) fails with ENOSPC."""
    return lambda monkeypatch: _install_full_disk_text(monkeypatch, nth)


def _install_full_disk_text(monkeypatch, nth):
    real_open = open
    calls = []

    class Full:
        def __init__(self, handle):
            self.handle = handle

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            self.handle.close()

        def write(self, text):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    def fake_open(*args, **kwargs):
        calls.append(args[0])
        handle = real_open(*args, **kwargs)
        return Full(handle) if len(calls) == nth else handle

    monkeypatch.setattr(areamc.output, "open", fake_open, raising=False)


def _full_disk_vector(exc):
    def install(monkeypatch):
        def write(self, record):
            raise exc

        monkeypatch.setattr(fiona.Collection, "write", write)

    return install


def _folder_denied(nth):
    """The folder stops being writable after the check: creating the `nth` temporary file fails with EACCES
    (1: the trace, 2: its metadata sidecar, 3: the output)."""

    def install(monkeypatch):
        real_mkstemp = areamc.output.tempfile.mkstemp
        calls = []

        def mkstemp(*args, dir=None, **kwargs):
            calls.append(dir)
            if len(calls) == nth:
                raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), os.path.join(dir, ".areamc-x"))
            return real_mkstemp(*args, dir=dir, **kwargs)

        monkeypatch.setattr(areamc.output.tempfile, "mkstemp", mkstemp)

    return install


def _gdal_full():
    from fiona._err import CPLE_AppDefinedError

    return CPLE_AppDefinedError(1, 1, "sqlite3_exec(CREATE TABLE gpkg_extensions ...) failed: database or disk is full")


WRITE_FAILURES = [
    ("csv, ENOSPC", _full_disk_text(3), "out.csv", r"--output .*out\.csv: cannot write: No space left on device"),
    ("trace, ENOSPC", _full_disk_text(1), "out.json", r"--trace .*t\.csv: cannot write: No space left on device"),
    ("gpkg, ENOSPC", _full_disk_vector(OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))), "out.gpkg",
     r"--output .*out\.gpkg: cannot write: No space left on device"),
    ("gpkg, GDAL disk full", _full_disk_vector(_gdal_full()), "out.gpkg", r"--output .*out\.gpkg: cannot write: .*database or disk is full"),
    ("geojson, GDAL write error", _full_disk_vector(RuntimeError("GDAL Error: Cannot write feature. Failed to write record: x")),
     "out.geojson", r"--output .*out\.geojson: cannot write: GDAL Error: Cannot write feature"),
    ("csv, EACCES", _folder_denied(3), "out.csv", r"--output .*out\.csv: cannot write: Permission denied"),
    ("gpkg, EACCES", _folder_denied(3), "out.gpkg", r"--output .*out\.gpkg: cannot write: Permission denied"),
    ("trace, EACCES", _folder_denied(1), "out.gpkg", r"--trace .*t\.csv: cannot write: Permission denied"),
]


@pytest.mark.parametrize("case, install, name, match", WRITE_FAILURES, ids=[c[0] for c in WRITE_FAILURES])
def test_write_failure__one_line_no_file_left(files, capsys, monkeypatch, case, install, name, match):
    # Every run also asks for a trace: a failed run must leave neither the trace nor the output.
    install(monkeypatch)
    argv = area(files / "real.gpkg", "--trace", files / "t.csv", "-o", files / name)
    assert_refused(capsys, argv, match, files.parent)


def test_write_failure__previous_output_kept(files, capsys, monkeypatch):
    _full_disk_text(1)(monkeypatch)
    assert_refused(capsys, area(files / "real.gpkg", "-o", files / "old.csv"), r"cannot write", files.parent)
    assert (files / "old.csv").read_text() == "id,estimate\nold,1\n"


def test_write_failure__verbose_shows_the_os_error(files, capsys, monkeypatch):
    _full_disk_text(1)(monkeypatch)
    with pytest.raises(OSError) as info:
        main(area(files / "real.gpkg", "-o", files / "out.csv", "--verbose"))
    assert info.value.errno == errno.ENOSPC and info.value.filename == str(files / "out.csv")
    assert not [n for n in os.listdir(files) if n.startswith(".areamc-") or n == "out.csv"]


def test_trace_and_output__both_written_on_success(files, capsys):
    rc, out, err = run_cli(capsys, area(files / "real.gpkg", "--id-field", "id", "--trace", files / "t.csv",
                                        "--trace-every", "500", "-o", files / "out.csv"))
    assert rc == 0, err
    trace = list(csv.DictReader(io.StringIO((files / "t.csv").read_text())))
    result = list(csv.DictReader(io.StringIO((files / "out.csv").read_text())))
    assert {"id", "points", "estimate"} <= set(trace[0]) and len(trace) == 2 * 4  # 2 features x 2000 / 500 points
    assert [r["id"] for r in result] == ["f0", "f1"]
    assert not [n for n in os.listdir(files) if n.startswith(".areamc-")]


# --- signals: SIGTERM cleans up as SIGINT does ----------------------------------------------------

DRIVER = '''\
"""Run ``python -m areamc ARGV`` with fiona's feature write made slow: after the first feature is
written to the temporary file, touch MARKER and sleep until a signal arrives."""
import os, runpy, signal, sys, time
import fiona

marker = sys.argv[1]
real_write = fiona.Collection.write

def slow_write(self, record):
    real_write(self, record)
    open(marker, "w").close()
    time.sleep(60)

fiona.Collection.write = slow_write
signal.signal(signal.SIGINT, signal.default_int_handler)  # as in an interactive shell
sys.argv = ["areamc", *sys.argv[2:]]
runpy.run_module("areamc", run_name="__main__", alter_sys=True)
'''


@pytest.mark.parametrize(
    "signum, ext, status, said",
    [(signal.SIGTERM, ".gpkg", 143, "terminated"), (signal.SIGTERM, ".geojson", 143, "terminated"),
     (signal.SIGINT, ".gpkg", 130, "interrupted")],
    ids=["SIGTERM gpkg", "SIGTERM geojson", "SIGINT gpkg"],
)
def test_signal_while_writing__no_temporary_left(files, tmp_path, signum, ext, status, said):
    driver = tmp_path / "driver.py"
    driver.write_text(DRIVER)
    marker = tmp_path / "writing"
    out = files / f"out{ext}"
    before = checksums(files)
    argv = [sys.executable, str(driver), str(marker), *area(files / "real.gpkg", "--trace", files / "t.csv", "-o", out)]
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 60
        while not marker.exists():
            assert proc.poll() is None, proc.communicate()
            assert time.monotonic() < deadline, "the driver never started writing"
            time.sleep(0.05)
        staged = sorted(n for n in os.listdir(files) if n.startswith(".areamc-"))
        assert any(n.endswith(ext) for n in staged), staged  # the temporary output exists mid-write
        proc.send_signal(signum)
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == status, err
    assert f"areamc: {said}" in err and "Traceback" not in err, err
    assert checksums(files) == before  # no temporary, no journal, no trace, no output; inputs untouched


def test_main__restores_the_previous_sigterm_handler(files, capsys):
    def mine(signum, frame):  # pragma: no cover - never called
        pass

    previous = signal.signal(signal.SIGTERM, mine)
    try:
        rc, _, err = run_cli(capsys, ["inspect", str(files / "real.gpkg")])
        assert rc == 0, err
        assert signal.getsignal(signal.SIGTERM) is mine
    finally:
        signal.signal(signal.SIGTERM, previous)
