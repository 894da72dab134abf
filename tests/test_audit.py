"""``areamc audit``: a plan of every job kind run end to end, its results folder, resume after a kill,
the refusals, and the gate of --fail-on-shortfall.

The inputs are built here (three lon/lat boxes on one row, zones split along meridians, two
facility points, a grid of census blocks), so every expected share below follows from the
geometry: a box split along the meridian through its middle has two halves of equal area on
the ellipsoid (the ellipsoid is symmetric about every meridian, common practice), hence on any
equal-area plane.  Numbers are checked against pyproj.Geod and shapely, or against the command
the job runs when it runs alone (the audit must not change what a command gives).
"""

from __future__ import annotations

import csv
import json
import os
import re
import signal
import sqlite3
import subprocess
import sys
import time

import fiona
import pyproj
import pytest
import shapely
from shapely.geometry import Point, box, mapping

from conftest import assert_refused, checksums, run_cli, run_json

DISTRICTS = {"D1": box(10.0, 47.0, 10.2, 47.1), "D2": box(10.2, 47.0, 10.4, 47.1), "D3": box(10.4, 47.0, 10.6, 47.1)}
#: Z1 covers D1 and the west half of D2; Z2 the east three quarters of D2 and the west half of D3.
ZONES = {"Z1": box(9.9, 46.9, 10.3, 47.2), "Z2": box(10.25, 46.95, 10.5, 47.15)}
#: Exact shares covered by at least one zone (halves along meridians, see the module docstring).
SHARE_K1 = {"D1": 1.0, "D2": 1.0, "D3": 0.5}
HALF_OF_D1 = box(9.9, 46.9, 10.1, 47.2)  # covers exactly the west half of D1
WHOLE = box(9.8, 46.8, 10.8, 47.3)  # covers everything

HEAD = """\
[settings]
seed = 11
points = 2000
units = "km2"
workers = 1

[inputs]
districts = { path = "county.gpkg", layer = "districts", id-field = "code" }
d1 = { path = "county.gpkg", layer = "d1", id-field = "code" }
service = { path = "county.gpkg", layer = "service", id-field = "zone" }
half = { path = "county.gpkg", layer = "half", id-field = "zone" }
whole = { path = "county.gpkg", layer = "whole", id-field = "zone" }
clinics = { path = "county.gpkg", layer = "clinics", id-field = "clinic" }
blocks = { path = "county.gpkg", layer = "blocks" }
"""
EVERY_KIND = HEAD + """
[[jobs]]
name = "areas"
kind = "area"
file = "districts"

[[jobs]]
name = "zone-overlap"
kind = "overlap"
zones = "service"

[[jobs]]
name = "service-cover"
kind = "coverage"
regions = "districts"
zones = "service"
at-least = [1, 2]
claim = 0.9

[[jobs]]
name = "clinic-reach"
kind = "coverage"
regions = "districts"
zones = "clinics"
radius-field = "reach_m"
density = "blocks"
count-field = "population"

[[jobs]]
name = "people"
kind = "integrate"
regions = "districts"
density = "blocks"
count-field = "population"
"""
#: The files every audit writes.
FILES = ("results.csv", "results.json", "results.gpkg", "manifest.json", "report.html", "journal.jsonl")


def _write_layer(path, layer, kind, fields, features):
    schema = {"geometry": kind, "properties": fields}
    with fiona.open(path, "w", driver="GPKG", layer=layer, crs="EPSG:4326", schema=schema) as dst:
        for geom, props in features:
            dst.write({"geometry": mapping(geom), "properties": props})


def make_county(folder) -> str:
    """The test's inputs: one GeoPackage of districts, zones, clinics and blocks (lon/lat, EPSG:4326)."""
    path = os.path.join(folder, "county.gpkg")
    named = {"code": "str", "name": "str"}
    _write_layer(path, "districts", "Polygon", named,
                 [(g, {"code": c, "name": f"District {c}"}) for c, g in DISTRICTS.items()])
    _write_layer(path, "d1", "Polygon", named, [(DISTRICTS["D1"], {"code": "D1", "name": "District D1"})])
    _write_layer(path, "service", "Polygon", {"zone": "str"}, [(g, {"zone": z}) for z, g in ZONES.items()])
    _write_layer(path, "half", "Polygon", {"zone": "str"}, [(HALF_OF_D1, {"zone": "H"})])
    _write_layer(path, "whole", "Polygon", {"zone": "str"}, [(WHOLE, {"zone": "W"})])
    _write_layer(path, "clinics", "Point", {"clinic": "str", "reach_m": "float"},
                 [(Point(10.1, 47.05), {"clinic": "C1", "reach_m": 5000.0}),
                  (Point(10.5, 47.05), {"clinic": "C2", "reach_m": 3000.0})])
    blocks = [(box(10.0 + 0.1 * i, 47.0 + 0.05 * j, 10.1 + 0.1 * i, 47.05 + 0.05 * j),
               {"block": f"B{i}{j}", "population": 100 * (i + 1) + j}) for i in range(6) for j in range(2)]
    _write_layer(path, "blocks", "Polygon", {"block": "str", "population": "int"}, blocks)
    return path


def write_plan(folder, text: str, name: str = "plan.toml") -> str:
    path = os.path.join(folder, name)
    with open(path, "w", encoding="utf-8") as handle:
        handle.write(text)
    return path


def coverage_plan(zones: str, claim: float, regions: str = "districts") -> str:
    return HEAD + f"""
[[jobs]]
name = "gate"
kind = "coverage"
regions = "{regions}"
zones = "{zones}"
claim = {claim}
"""


def read_results(folder) -> dict:
    """Everything the results folder says, times left out: the files' contents, parsed."""
    out = {}
    with open(os.path.join(folder, "results.csv"), newline="", encoding="utf-8") as handle:
        out["csv"] = handle.read()
    with open(os.path.join(folder, "results.json"), encoding="utf-8") as handle:
        document = json.load(handle)
    for job in document["jobs"]:
        for key in ("started", "finished"):
            job["metadata"].pop(key, None)
    out["json"] = document
    with open(os.path.join(folder, "manifest.json"), encoding="utf-8") as handle:
        manifest = json.load(handle)
    for key in ("started", "finished", "command"):
        manifest.pop(key)
    for job in manifest["jobs"]:
        job.pop("seconds")
    out["manifest"] = manifest
    gpkg = os.path.join(folder, "results.gpkg")
    layers = {}
    for layer in fiona.listlayers(gpkg):
        with fiona.open(gpkg, layer=layer) as src:
            tags = json.loads(src.tags()["areamc_metadata"])
            tags.pop("started"), tags.pop("finished")
            layers[layer] = {"schema": src.schema, "crs": src.crs.to_wkt(), "tags": tags,
                             "features": [(shapely.geometry.shape(f["geometry"]).wkb, dict(f["properties"]))
                                          for f in src]}
    with sqlite3.connect(gpkg) as db:
        out["descriptions"] = dict(db.execute("SELECT table_name, description FROM gpkg_contents"))
    out["gpkg"] = layers
    with open(os.path.join(folder, "report.html"), encoding="utf-8") as handle:
        page = handle.read()
    page = re.sub(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d+Z", "TIME", page)  # start and end times
    out["report"] = re.sub(r"\b\d+\.\d s\b", "SECONDS", page)  # each job's time
    return out


@pytest.fixture(scope="module")
def county(tmp_path_factory):
    folder = tmp_path_factory.mktemp("audit_county")
    make_county(str(folder))
    return folder


@pytest.fixture(scope="module")
def full_run(county):
    """One uninterrupted audit of the plan of every kind (in-process), and what it wrote."""
    import contextlib
    import io

    from areamc.cli import main

    plan = write_plan(str(county), EVERY_KIND)
    with contextlib.redirect_stdout(io.StringIO()) as out, contextlib.redirect_stderr(io.StringIO()) as err:
        rc = main(["audit", plan, "--output-dir", str(county / "full")])
    assert rc == 0, err.getvalue()
    return {"plan": plan, "folder": str(county / "full"), "stdout": out.getvalue(), "stderr": err.getvalue(),
            "results": read_results(str(county / "full"))}


def _rows(full_run, job: str) -> list[dict]:
    return [r for r in full_run["results"]["json"]["results"] if r["job"] == job]


# ------------------------------------------------------------------------------ end to end


def test_audit__every_kind__writes_every_file_and_each_parses(full_run):
    folder = full_run["folder"]
    assert sorted(os.listdir(folder)) == sorted(FILES)
    with open(os.path.join(folder, "results.csv"), newline="", encoding="utf-8") as handle:
        table = list(csv.DictReader(handle))
    jobs = ["areas", "zone-overlap", "service-cover", "clinic-reach", "people"]
    assert [r["job"] for r in table] == [r["job"] for r in full_run["results"]["json"]["results"]]
    assert sorted({r["job"] for r in table}, key=jobs.index) == jobs
    assert {r["units"] for r in table} == {"km2"}
    from html.parser import HTMLParser

    class Images(HTMLParser):
        found = 0

        def handle_starttag(self, tag, attrs):
            self.found += tag == "img" and dict(attrs).get("src", "").startswith("data:image/png;base64,")

    parser = Images()
    parser.feed(full_run["results"]["report"])
    assert parser.found >= 5  # a picture per job at least (coverage: map and bars)
    manifest = full_run["results"]["manifest"]
    assert [j["status"] for j in manifest["jobs"]] == ["done"] * 5
    assert manifest["gate"] == "falls-short"  # D3 is half covered, claimed 0.9
    assert "5 of 5 job(s) done" in full_run["stdout"]


def test_audit__rows__are_what_each_command_gives_alone(capsys, full_run):
    """The audit runs each job's command line: its rows are the command's own (same seed), to the bit."""
    from areamc.plan import read_plan

    plan = read_plan(full_run["plan"])
    for job in plan.jobs:
        alone = run_json(capsys, job.argv)["results"]  # --units km2 is in the job's argv
        assert [{"job": job.name, "units": "km2", **row} for row in alone] == _rows(full_run, job.name), job.name


def test_audit__area_rows__agree_with_pyproj_geod(full_run):
    """Each district's estimate lies within 4 standard errors of its geodesic area (pyproj.Geod on WGS84;
    the boxes densified to 100 points an edge, whose planar and geodesic areas agree to far below the error)."""
    geod = pyproj.Geod(ellps="WGS84")
    for row in _rows(full_run, "areas"):
        shape = shapely.segmentize(DISTRICTS[row["id"]], 0.002)
        exact = abs(geod.geometry_area_perimeter(shape)[0]) / 1e6
        assert abs(row["estimate"] - exact) < 4 * row["std_error"], row


def test_audit__coverage_claims__counted_per_row_and_k_against_the_exact_shares(full_run):
    """service-cover at k = 1: D1 and D2 wholly covered (share 1 > 0.9), D3 half (0.5 < 0.9), from the
    geometry (module docstring); at k = 2 only the Z1-Z2 overlap counts: far below 0.9 everywhere."""
    manifest = full_run["results"]["manifest"]
    claims = {(c["job"], c["measure"], c["k"]): c for c in manifest["claims"]}
    k1 = claims[("service-cover", "share", 1)]
    assert (k1["met"], k1["short"], k1["undecided"], k1["short_ids"]) == (2, 1, 0, ["D3"])
    k2 = claims[("service-cover", "share", 2)]
    assert (k2["met"], k2["short"], k2["undecided"]) == (0, 3, 0)
    for row in _rows(full_run, "service-cover"):
        if row["k"] == 1:
            assert row["exact_share"] == pytest.approx(SHARE_K1[row["id"]], abs=1e-9)  # shapely, same plane


def test_audit__gpkg__a_layer_per_job_with_attributes_and_units(full_run):
    layers = full_run["results"]["gpkg"]
    assert list(layers) == ["areas", "zone-overlap", "service-cover", "clinic-reach", "people"]
    areas = layers["areas"]
    assert [f[1]["name"] for f in areas["features"]] == ["District D1", "District D2", "District D3"]
    rows = _rows(full_run, "areas")
    assert [f[1]["estimate"] for f in areas["features"]] == [r["estimate"] for r in rows]  # km2, as the CSV
    for (wkb, _), code in zip(areas["features"], DISTRICTS):
        assert shapely.from_wkb(wkb).equals(DISTRICTS[code])  # the input geometries, input CRS
    assert pyproj.CRS.from_wkt(areas["crs"]).to_epsg() == 4326
    assert [f[1]["zone_a"] for f in layers["zone-overlap"]["features"]] == ["Z1"]
    overlap = shapely.from_wkb(layers["zone-overlap"]["features"][0][0])
    # the intersection (shapely), densified on the plane and brought back to degrees: within 1e-6 degrees
    assert overlap.hausdorff_distance(ZONES["Z1"].intersection(ZONES["Z2"])) < 1e-6
    description = full_run["results"]["descriptions"]
    assert "areas in km2: estimate" in description["areas"]
    assert "densities in count per km2: mean_density" in description["people"]
    assert "reach circles are straight-line" in description["clinic-reach"]


def test_audit__manifest__versions_digests_seed_and_times(full_run, county):
    import hashlib

    manifest = json.loads(open(os.path.join(full_run["folder"], "manifest.json"), encoding="utf-8").read())
    with open(full_run["plan"], "rb") as handle:
        assert manifest["plan"]["sha256"] == hashlib.sha256(handle.read()).hexdigest()  # FIPS 180-4 via hashlib
    with open(county / "county.gpkg", "rb") as handle:
        digest = hashlib.sha256(handle.read()).hexdigest()
    assert {f["sha256"] for i in manifest["inputs"] for f in i["files"]} == {digest}
    assert manifest["seed"] == "11" and isinstance(manifest["seed"], str)
    assert manifest["versions"]["python"] == ".".join(map(str, sys.version_info[:3]))
    assert manifest["started"] <= manifest["finished"]  # ISO 8601 in UTC sorts as time
    from areamc.plan import job_seed

    assert [j["seed"] for j in manifest["jobs"]] == [str(job_seed(11, j["job"])) for j in manifest["jobs"]]
    assert all(isinstance(j["seconds"], float) and j["seconds"] > 0 for j in manifest["jobs"])


# -------------------------------------------------------------------------- kill and resume


def test_audit__killed_then_resumed__ends_identical_to_an_uninterrupted_run(county, full_run):
    """SIGKILL once the journal holds at least one finished job but not all, then --resume: every output
    equals the uninterrupted run's, times left out.  The same folder is reused, so paths agree too."""
    folder = str(county / "killed")
    argv = [sys.executable, "-m", "areamc", "audit", full_run["plan"], "--output-dir", folder, "--quiet"]
    journal = os.path.join(folder, "journal.jsonl")
    total = 1 + 5  # the header and one line per job
    process = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    lines = 0
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and process.poll() is None:
            if os.path.exists(journal):
                with open(journal, "rb") as handle:
                    lines = handle.read().count(b"\n")
                if lines >= 2:
                    break
            time.sleep(0.005)
        process.send_signal(signal.SIGKILL)
    finally:
        process.wait()
    assert 2 <= lines < total, f"journal had {lines} lines when killed"
    assert not os.path.exists(os.path.join(folder, "results.csv"))  # nothing written before the end
    rc, out, err = _run(["audit", full_run["plan"], "--output-dir", folder, "--resume", "--quiet"])
    assert rc == 0, err
    with open(journal, encoding="utf-8") as handle:
        assert sum(1 for _ in handle) == total  # each job journalled once: the finished ones were not run again
    resumed = read_results(folder)
    expected = read_results(full_run["folder"])
    for kind in ("csv", "json", "gpkg", "descriptions", "report"):
        resumed_kind, expected_kind = resumed[kind], expected[kind]
        if kind in ("json", "report"):  # the folder's name appears in them
            resumed_kind = _same_folder(resumed_kind, folder, full_run["folder"])
        assert resumed_kind == expected_kind, kind
    assert resumed["manifest"] == expected["manifest"]


def _same_folder(value, folder: str, other: str):
    return json.loads(json.dumps(value).replace(folder, other)) if not isinstance(value, str) else value.replace(
        folder, other)


def _run(argv):
    import contextlib
    import io

    from areamc.cli import main

    with contextlib.redirect_stdout(io.StringIO()) as out, contextlib.redirect_stderr(io.StringIO()) as err:
        rc = main([str(a) for a in argv])
    return rc, out.getvalue(), err.getvalue()


def test_audit__resume_of_a_finished_audit__runs_nothing_and_rewrites_the_same_results(full_run, county):
    import shutil

    folder = str(county / "again")
    shutil.copytree(full_run["folder"], folder)
    os.unlink(os.path.join(folder, "results.csv"))
    rc, out, err = _run(["audit", full_run["plan"], "--output-dir", folder, "--resume"])
    assert rc == 0, err
    assert "job 1/5" not in err and "done before" not in err  # no job ran: each line would say so
    with open(os.path.join(folder, "results.csv"), encoding="utf-8") as handle:
        assert handle.read() == full_run["results"]["csv"]


# --------------------------------------------------------------------------------- refusals


def test_audit__existing_folder__refused_without_resume_or_overwrite(capsys, full_run, county):
    assert_refused(capsys, ["audit", full_run["plan"], "--output-dir", full_run["folder"]],
                   r"--output-dir .*full: the results folder exists; give --resume .* or --overwrite", county)


@pytest.mark.parametrize("extra, match", [
    (["--resume", "--overwrite"], r"--resume and --overwrite exclude each other"),
    (["--scheduler", "localhost:8786"], r"--scheduler localhost:8786: give the scheduler's address as tcp://HOST:PORT"),
    (["--output-dir", "{county}/no/such/folder"], r"--output-dir .*/no/such/folder: its folder .*/no/such does not exist"),
    (["--output-dir", "{county}/county.gpkg"], r"--output-dir .*county\.gpkg: exists and is not a folder"),
])
def test_audit__bad_options__refused_before_any_work(capsys, county, full_run, extra, match):
    extra = [e.format(county=county) for e in extra]
    assert_refused(capsys, ["audit", full_run["plan"], "--output-dir", str(county / "fresh"), *extra], match, county)


def test_audit__resume_with_a_changed_plan__refused(capsys, tmp_path, full_run):
    import shutil

    folder = tmp_path / "results"
    shutil.copytree(full_run["folder"], folder)
    plan = write_plan(str(tmp_path), EVERY_KIND.replace("seed = 11", "seed = 12"))
    shutil.copy(os.path.join(os.path.dirname(full_run["plan"]), "county.gpkg"), tmp_path / "county.gpkg")
    assert_refused(capsys, ["audit", plan, "--output-dir", folder, "--resume"],
                   r"--resume: .*journal\.jsonl was written for another version of the plan", tmp_path)


def test_audit__overwrite__replaces_the_audits_files_and_keeps_others(tmp_path, county):
    plan = write_plan(str(county), coverage_plan("whole", 0.9), "overwrite.toml")
    folder = tmp_path / "results"
    folder.mkdir()
    (folder / "notes.txt").write_text("mine")
    (folder / "journal.jsonl").write_text("not a journal\n")
    rc, out, err = _run(["audit", plan, "--output-dir", folder, "--overwrite", "--quiet"])
    assert rc == 0, err
    assert (folder / "notes.txt").read_text() == "mine"
    assert sorted(os.listdir(folder)) == sorted((*FILES, "notes.txt"))
    with open(folder / "journal.jsonl", encoding="utf-8") as handle:
        assert json.loads(handle.readline())["plan_sha256"]


def test_audit__check__validates_without_writing(capsys, county, full_run):
    before = checksums(county)
    rc, out, err = run_cli(capsys, ["audit", "--check", full_run["plan"]])
    assert rc == 0, err
    assert "5 job(s) over 7 input(s); no error found" in out
    assert checksums(county) == before


def test_audit__plan_errors__one_line_each_with_its_line_and_status_2(capsys, county):
    text = EVERY_KIND.replace('kind = "overlap"', 'kind = "overlap"\nmin_share = 0.1').replace(
        "claim = 0.9", "claim = 1.5")
    plan = write_plan(str(county), text, "broken.toml")
    before = checksums(county)
    rc, out, err = run_cli(capsys, ["audit", plan])
    lines = err.splitlines()
    assert rc == 2 and out == "" and "Traceback" not in err
    assert len(lines) == 2 and all(line.startswith(f"areamc: error: {plan}:") for line in lines), err
    assert re.search(r"unknown key 'min_share'; did you mean 'min-share'\?", lines[0])
    assert re.search(r":\d+: jobs\[3\] \(service-cover\): .*claim", lines[1])
    assert checksums(county) == before


# ------------------------------------------------------------------------------ the gate


@pytest.mark.parametrize("case, zones, claim, regions, status, gate, counts", [
    # whole covers every district: share 1 against 0.9 -> each of the three rows meets
    ("met", "whole", 0.9, "districts", 0, "meets", (3, 0, 0)),
    # service covers D1 and D2 wholly and half of D3: 1, 1, 0.5 against 0.9 -> two meet, D3 short
    ("short", "service", 0.9, "districts", 1, "falls-short", (2, 1, 0)),
    # half covers exactly half of D1, claimed 0.5: the truth sits on the claim, so a run decides it
    # only wrongly (chance at most 0.05 per row, the confidence sequence's guarantee)
    ("undecided", "half", 0.5, "d1", 3, "undecided", (0, 0, 1)),
])
def test_audit__fail_on_shortfall__exit_status_and_manifest_say_which(county, case, zones, claim, regions, status,
                                                                       gate, counts):
    plan = write_plan(str(county), coverage_plan(zones, claim, regions), f"gate-{case}.toml")
    folder = county / f"gate-{case}"
    rc, out, err = _run(["audit", plan, "--output-dir", folder, "--fail-on-shortfall", "--quiet"])
    assert rc == status, err
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["gate"] == gate
    (summary,) = manifest["claims"]
    assert (summary["met"], summary["short"], summary["undecided"]) == counts
    rc_plain, _, err = _run(["audit", plan, "--output-dir", folder, "--overwrite", "--quiet"])
    assert rc_plain == 0, err  # without the gate, claims do not change the status


def test_audit__progress__one_line_per_job_off_a_terminal_and_none_with_quiet(county, full_run):
    lines = [line for line in full_run["stderr"].splitlines() if line.startswith("areamc: audit: job ")]
    assert [line.split()[3] for line in lines] == ["1/5", "2/5", "3/5", "4/5", "5/5"]
    assert all(re.search(r"\) done in \d+\.\d s$", line) for line in lines), lines
    plan = write_plan(str(county), coverage_plan("whole", 0.9), "quiet.toml")
    rc, out, err = _run(["audit", plan, "--output-dir", county / "quiet", "--quiet"])
    assert rc == 0 and err == ""



def test_audit__job_failing_at_run_time__others_written_and_resume_runs_it_again(tmp_path):
    """A reach of -5 m passes the plan check (the field exists) but the job refuses it when it reads the
    zones: that job is marked failed, the other's results are written, exit status 2; once the input is
    mended, --resume runs only the failed job."""
    make_county(str(tmp_path))
    gpkg = str(tmp_path / "county.gpkg")
    _write_layer(gpkg, "sites", "Point", {"clinic": "str", "reach_m": "float"},
                 [(Point(10.1, 47.05), {"clinic": "C1", "reach_m": -5.0})])
    plan = write_plan(str(tmp_path), HEAD + 'sites = { path = "county.gpkg", layer = "sites", id-field = "clinic" }\n'
                      + '[[jobs]]\nname = "areas"\nkind = "area"\nfile = "d1"\n\n'
                      + '[[jobs]]\nname = "reach"\nkind = "coverage"\nregions = "d1"\nzones = "sites"\n'
                      + 'radius-field = "reach_m"\n')
    folder = tmp_path / "results"
    rc, out, err = _run(["audit", plan, "--output-dir", folder, "--quiet"])
    errors = [line for line in err.splitlines() if line.startswith("areamc: error:")]
    assert rc == 2 and "Traceback" not in err
    assert len(errors) == 1 and re.search(r"job reach \(coverage\) failed: .*feature .*radius.*--radius-field", errors[0])
    manifest = json.loads((folder / "manifest.json").read_text())
    assert [(j["job"], j["status"]) for j in manifest["jobs"]] == [("areas", "done"), ("reach", "failed")]
    assert manifest["jobs"][1]["message"] in errors[0]
    assert fiona.listlayers(folder / "results.gpkg") == ["areas"]
    _write_layer(gpkg, "sites", "Point", {"clinic": "str", "reach_m": "float"},
                 [(Point(10.1, 47.05), {"clinic": "C1", "reach_m": 5000.0})])
    rc, out, err = _run(["audit", plan, "--output-dir", folder, "--resume"])
    assert rc == 0, err
    assert [line.split()[4] for line in err.splitlines() if line.startswith("areamc: audit: job")] == ["reach"]
    manifest = json.loads((folder / "manifest.json").read_text())
    assert [j["status"] for j in manifest["jobs"]] == ["done", "done"]


def test_audit__manifest_and_results_keys__are_in_the_vocabulary(full_run):
    """Every key of manifest.json and results.json (lists of records as ``list.key``; each job's
    metadata is its command's, held to the vocabulary by tests/test_vocabulary.py) is in docs/output.md."""
    from test_vocabulary import VOCABULARY

    def keys(doc: dict, prefix: str = "") -> set[str]:
        out = set()
        for key, value in doc.items():
            out.add(prefix + key)
            if key in ("versions", "metadata", "results"):
                continue
            if isinstance(value, dict):
                out |= keys(value, prefix + key + ".")
            if isinstance(value, list) and value and isinstance(value[0], dict):
                for item in value:  # named after the list alone, as docs/output.md names files.sha256
                    out |= keys(item, key + ".")
        return out

    folder = full_run["folder"]
    for name in ("manifest.json", "results.json"):
        with open(os.path.join(folder, name), encoding="utf-8") as handle:
            found = keys(json.load(handle))
        assert not found - VOCABULARY["fields"], f"{name}: {sorted(found - VOCABULARY['fields'])}"
    with open(os.path.join(folder, "results.json"), encoding="utf-8") as handle:
        rows = json.load(handle)["results"]
    assert not set(_union_keys(rows)) - VOCABULARY["fields"] - {"hits", "points", "method", "region_points"}


def _union_keys(rows):
    return {key for row in rows for key in row}


def test_audit__on_a_terminal__an_overall_bar_counts_the_jobs(full_run, county):
    """stderr on a pseudo-terminal: the overall bar (tqdm) counts jobs out of 5 and names the last one
    done; no per-job log line is printed then."""
    import fcntl
    import pty
    import struct
    import termios

    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 30, 100, 0, 0))  # 30 rows, 100 columns
    argv = [sys.executable, "-m", "areamc", "audit", full_run["plan"], "--output-dir", str(county / "tty")]
    process = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=slave, stdin=subprocess.DEVNULL)
    os.close(slave)
    seen = b""
    while True:
        try:
            chunk = os.read(master, 65536)
        except OSError:  # the child closed its end
            break
        if not chunk:
            break
        seen += chunk
    assert process.wait(timeout=120) == 0
    os.close(master)
    text = seen.decode("utf-8", "replace")
    assert re.search(r"\b[1-5]/5 \[", text), text  # tqdm's "n/total [elapsed...]" with the job count
    assert "job" in text and "areamc: audit: job" not in text
