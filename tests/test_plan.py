"""Audit plans (areamc/plan.py): the sample plan, each job's command line, job seeds, the line
scanner and every kind of plan error with its line.

Plans and their inputs are written by each test in its tmp_path, except the sample plan
(sample_data/vale_audit.toml), which is itself under test.  Expected lines are found by
markers in the plan text (a ``# <-`` comment on the line at fault), not by areamc.
"""

from __future__ import annotations

import hashlib
import json
import os
import pathlib
import re
import shlex
import shutil
import tomllib

import numpy as np
import pytest
from conftest import assert_refused, run_cli

from areamc.cli import COMMANDS, build_parser
from areamc.errors import InputError
from areamc.plan import KINDS, PlanError, check_plan, job_seed, read_plan, scan_lines

ROOT = pathlib.Path(__file__).resolve().parent.parent
SAMPLE = ROOT / "sample_data"
SAMPLE_PLAN = SAMPLE / "vale_audit.toml"


def _audit_registered() -> bool:
    return any(getattr(module, "__name__", "").endswith(".audit") for module in COMMANDS)


needs_audit = pytest.mark.skipif(not _audit_registered(),
                                 reason="areamc audit is not registered yet (areamc/cli/audit.py)")


# ------------------------------------------------------------------------------ the sample plan


def _namespace(argv) -> dict:
    args = vars(build_parser().parse_args([str(a) for a in argv]))
    args.pop("run", None)
    return args


def _readme_command(heading: str) -> list[str]:
    """The command shown under a README heading, as argv words without the leading ``areamc``."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    part = text[text.index(heading):]
    block = part[part.index("$ areamc ") + 2:]
    lines = []
    for line in block.splitlines():
        lines.append(line.rstrip("\\").strip())
        if not line.endswith("\\"):
            break
    return shlex.split(" ".join(lines))[1:]


def test_read_plan__sample_plan__every_kind_and_header_lines():
    plan = read_plan(SAMPLE_PLAN)
    text = SAMPLE_PLAN.read_text(encoding="utf-8")
    headers = [n for n, line in enumerate(text.splitlines(), 1) if line.strip() == "[[jobs]]"]
    assert [job.line for job in plan.jobs] == headers
    assert {job.kind for job in plan.jobs} == set(KINDS)
    assert len({job.name for job in plan.jobs}) == len(plan.jobs)
    assert plan.sha256 == hashlib.sha256(SAMPLE_PLAN.read_bytes()).hexdigest()
    assert plan.folder == str(SAMPLE)
    assert plan.inputs["districts"]["path"] == str(SAMPLE / "vale_county.gpkg")
    assert plan.inputs["population-raster"]["path"] == str(SAMPLE / "vale_population.tif")
    by_name = {job.name: job for job in plan.jobs}
    assert by_name["clinic-population"].inputs == ("districts", "clinics", "blocks")
    for job in plan.jobs:  # no output option reaches a job
        assert not {"--output", "--format", "--trace", "--quiet"} & set(job.argv)
    assert check_plan(SAMPLE_PLAN) == plan  # the sample's layers and fields are there


def test_job_argv__sample_plan__equals_the_single_commands():
    """Each job's command line means what the single command for it would: the README's commands
    where it shows one, else written out here; settings spelt out, seed from job_seed."""
    plan = read_plan(SAMPLE_PLAN)
    gpkg, tif = str(SAMPLE / "vale_county.gpkg"), str(SAMPLE / "vale_population.tif")
    shared = ["--confidence", "0.95", "--sampler", "uniform", "--points", "100000", "--units", "km2"]
    regions = [gpkg, "--regions-layer", "districts", "--regions-id-field", "district_id"]
    expected = {
        "district-areas": ["area", gpkg, "--layer", "districts", "--id-field", "district_id"],
        "zone-overlap": ["overlap", gpkg, "--zones-layer", "service_zones", "--zones-id-field", "zone_id",
                         "--min-share", "0.05"],
        "zone-coverage": ["coverage", *regions, gpkg, "--zones-layer", "service_zones", "--zones-id-field",
                          "zone_id", "--density", tif, "--claim", "0.5"],
        "people-from-blocks": ["integrate", *regions, "--density", gpkg, "--density-layer", "blocks",
                               "--count-field", "population"],
        "people-from-raster": ["integrate", *regions, "--density", tif],
    }
    # the README's two coverage commands, with the sample's relative paths made absolute
    for name, heading in (("clinic-reach", "### Coverage of districts, with a radius"),
                          ("clinic-population", "### Population inside the zones")):
        words = [str(ROOT / w) if w.startswith("sample_data/") else w for w in _readme_command(heading)]
        cut = words.index("--seed")
        del words[cut:cut + 2]
        if "--regions-layer" not in words:  # the README leans on the first layer being districts
            words += ["--regions-layer", "districts"]
        expected[name] = words
    assert set(expected) == {job.name for job in plan.jobs}
    for job in plan.jobs:
        want = [*expected[job.name], *shared, "--seed", str(job_seed(2026, job.name))]
        assert _namespace(job.argv) == _namespace(want), job.name


def test_job_argv__runs_like_the_single_command(capsys, monkeypatch):
    """clinic-population through areamc.cli.main, once from the plan's argv and once as the README
    writes it (run from the repository root, seed given explicitly): identical rows."""
    plan = read_plan(SAMPLE_PLAN)
    job = next(j for j in plan.jobs if j.name == "clinic-population")
    monkeypatch.chdir(ROOT)
    words = _readme_command("### Population inside the zones")
    cut = words.index("--seed")
    words[cut + 1] = str(job_seed(2026, job.name))
    docs = []
    for argv in (list(job.argv), words):
        rc, out, err = run_cli(capsys, [*argv, "--format", "json", "--quiet"])
        assert rc == 0, err
        docs.append(json.loads(out))
    planned, single = docs
    assert planned["results"] == single["results"]
    assert planned["seed"] == single["seed"] == str(job_seed(2026, job.name))
    assert planned["plane"] == single["plane"]


# ------------------------------------------------------------------------------------ job seeds


def test_job_seed__numpy_seed_sequence_formula():
    """job_seed follows its documented derivation: SeedSequence(root, spawn_key = the first two
    big-endian 32-bit words of SHA-256(name)).generate_state(1, uint64)[0] (numpy documentation,
    "Parallel Random Number Generation"; SHA-256 is FIPS 180-4), computed here with numpy and
    hashlib directly."""
    for root, name in ((2026, "clinic-reach"), (0, "a"), (2**100 + 7, "zone-overlap"), (5, "naïve-ünïcode")):
        digest = hashlib.sha256(name.encode("utf-8")).digest()
        key = (int.from_bytes(digest[:4], "big"), int.from_bytes(digest[4:8], "big"))
        want = int(np.random.SeedSequence(root, spawn_key=key).generate_state(1, np.uint64)[0])
        assert job_seed(root, name) == want
    assert job_seed(2026, "clinic-reach") != job_seed(2026, "clinic-population")
    assert job_seed(2026, "clinic-reach") != job_seed(2027, "clinic-reach")
    assert 0 <= job_seed(2026, "x") < 2**64


def test_job_seed__refuses_a_negative_root():
    with pytest.raises(InputError, match="seed"):
        job_seed(-1, "x")


def test_read_plan__seeds_follow_names_not_positions(tmp_path):
    (tmp_path / "d.gpkg").write_bytes(b"")
    job = 'name = "{}"\nkind = "area"\nfile = "d"\n'
    head = '[settings]\nseed = 11\n[inputs]\nd = { path = "d.gpkg" }\n'
    a = tmp_path / "a.toml"
    a.write_text(head + "[[jobs]]\n" + job.format("one") + "[[jobs]]\n" + job.format("two"), encoding="utf-8")
    b = tmp_path / "b.toml"
    b.write_text(head + "[[jobs]]\n" + job.format("two"), encoding="utf-8")
    seeds_a = {j.name: j.argv[j.argv.index("--seed") + 1] for j in read_plan(a).jobs}
    seeds_b = {j.name: j.argv[j.argv.index("--seed") + 1] for j in read_plan(b).jobs}
    assert seeds_a["two"] == seeds_b["two"] == str(job_seed(11, "two"))
    assert seeds_a["one"] != seeds_a["two"]


# ---------------------------------------------------------------------------------- line scanner

TRICKY = '''\
# a comment with [[jobs]] and key = 1 inside
title = "a # not a comment [x]"   # @title
"quoted key" = 1                  # @quoted

[settings]                        # @settings
  points = 5                      # @points
'literal.key' = 2                 # @literal
"esc\\"aped" = 3                   # @escaped
[ inputs ]                        # @inputs
a = { path = "x.gpkg", layer = "l", open-option = ["A=1", "B=2"] }  # @a
b.path = "y"                      # @bpath
text = """
[[jobs]]
name = "fake" \\"""
"""
raw = \'\'\'
kind = "fake"
\'\'\'
[[jobs]]                          # @job0

name = "one"                      # @name0
at-least = [                      # @atleast
  1,                              # @atleast0
  # a comment between elements, with ] and ,
  2,                              # @atleast1
]
when = 1979-05-27 07:32:00Z       # @when
after = 1                         # @after

[[ jobs ]]                        # @job1
name = "two"# @name1
[[jobs.claims]]                   # @claims
share = 0.9                       # @share
[[jobs]]                          # @job2
nested = [[1, 2], [3]]            # @nested
site.where = { lon = 1.5, lat = 2 }  # @site
'''


def _markers(text: str) -> dict[str, int]:
    return {m.group(1): n for n, line in enumerate(text.splitlines(), 1) for m in re.finditer(r"# @(\S+)", line)}


@pytest.mark.parametrize("newline", ["\n", "\r\n"])
def test_scan_lines__tricky_layout(newline):
    text = TRICKY.replace("\n", newline)
    doc = tomllib.loads(text)  # the layout is valid TOML, read the standard library's way
    assert doc["inputs"]["text"].startswith("[[jobs]]") and doc["jobs"][1]["claims"] == [{"share": 0.9}]
    at = _markers(TRICKY)
    lines = scan_lines(text)
    want = {
        ("title",): "title", ("quoted key",): "quoted", ("settings",): "settings",
        ("settings", "points"): "points", ("settings", "literal.key"): "literal",
        ("settings", 'esc"aped'): "escaped", ("inputs",): "inputs", ("inputs", "a"): "a",
        ("inputs", "a", "layer"): "a", ("inputs", "a", "open-option", 1): "a",
        ("inputs", "b"): "bpath", ("inputs", "b", "path"): "bpath",
        ("jobs", 0): "job0", ("jobs", 0, "name"): "name0", ("jobs", 0, "at-least"): "atleast",
        ("jobs", 0, "at-least", 0): "atleast0", ("jobs", 0, "at-least", 1): "atleast1",
        ("jobs", 0, "when"): "when", ("jobs", 0, "after"): "after",
        ("jobs", 1): "job1", ("jobs", 1, "name"): "name1", ("jobs", 1, "claims", 0): "claims",
        ("jobs", 1, "claims", 0, "share"): "share", ("jobs", 2): "job2",
        ("jobs", 2, "nested", 1, 0): "nested", ("jobs", 2, "site", "where", "lat"): "site",
    }
    for path, marker in want.items():
        assert lines.get(path) == at[marker], (path, lines.get(path), at[marker])
    # the strings' text is not read as keys or tables
    assert ("inputs", "text", "name") not in lines and ("jobs", 3) not in lines
    assert not any("kind" in path for path in lines)


# ------------------------------------------------------------------------------ broken plans

#: A small vector file the broken plans name: districts (polygons, field code) and sites (points, field reach).
@pytest.fixture(scope="module")
def vector_file(tmp_path_factory) -> pathlib.Path:
    import fiona
    from shapely.geometry import Point, box, mapping

    path = tmp_path_factory.mktemp("plan_inputs") / "county.gpkg"
    schema = {"geometry": "Polygon", "properties": {"code": "str"}}
    with fiona.open(path, "w", driver="GPKG", layer="districts", crs="EPSG:4326", schema=schema) as dst:
        dst.write({"geometry": mapping(box(10.0, 47.0, 10.1, 47.1)), "properties": {"code": "A"}})
        dst.write({"geometry": mapping(box(10.1, 47.0, 10.2, 47.1)), "properties": {"code": "B"}})
    schema = {"geometry": "Point", "properties": {"reach": "float"}}
    with fiona.open(path, "w", driver="GPKG", layer="sites", crs="EPSG:4326", schema=schema) as dst:
        dst.write({"geometry": mapping(Point(10.05, 47.05)), "properties": {"reach": 2000.0}})
    return path


GOOD_HEAD = '''\
[settings]
seed = 7
points = 2000

[inputs]
districts = { path = "county.gpkg", layer = "districts", id-field = "code" }
sites = { path = "county.gpkg", layer = "sites" }
'''
COVER = '''
[[jobs]]
name = "cover"
kind = "coverage"
regions = "districts"
zones = "sites"
radius-field = "reach"
'''

#: (case, plan text, message pattern): the line marked ``# <-`` is the one the error names.
BROKEN = [
    ("unknown-key-did-you-mean", GOOD_HEAD + COVER + "at_least = [1, 2]  # <-\n",
     r"jobs\[1\] \(cover\): unknown key 'at_least'; did you mean 'at-least'\?"),
    ("option-of-another-kind", GOOD_HEAD + '[[jobs]]\nname = "a"\nkind = "area"\nfile = "districts"\n'
     "claim = 0.5  # <-\n", r"'claim' is not an option of area \(it is one of coverage\)"),
    ("job-option-in-settings", GOOD_HEAD.replace("points = 2000", "claim = 0.9  # <-") + COVER,
     r"settings: 'claim' is taken by coverage only; \[settings\] holds only options all four"),
    ("unknown-setting", GOOD_HEAD.replace("points = 2000", "pionts = 2000  # <-") + COVER,
     r"settings: unknown key 'pionts'.*did you mean 'points'\?"),
    ("setting-outside-tables", "confidence = 0.9  # <-\n" + GOOD_HEAD + COVER,
     r"'confidence' is outside any table: shared options belong in \[settings\]"),
    ("unknown-top-level-table", GOOD_HEAD + COVER + "[setings]  # <-\n",
     r"unknown top-level key 'setings'.*did you mean 'settings'\?"),
    ("missing-file", GOOD_HEAD + 'blocks = { path = "nowhere/blocks.gpkg" }  # <-\n' + COVER,
     r"inputs\.blocks: path \"nowhere/blocks\.gpkg\": no such file \(looked for .*nowhere/blocks\.gpkg\)"),
    ("input-without-path", GOOD_HEAD + 'blocks = { layer = "b" }  # <-\n' + COVER, r"inputs\.blocks: no path"),
    ("input-not-a-table", GOOD_HEAD + 'blocks = "county.gpkg"  # <-\n' + COVER,
     r"an input is a table with a path, got text \(write blocks = \{ path = \"county\.gpkg\" \}\)"),
    ("input-unknown-key", GOOD_HEAD + 'blocks = { path = "county.gpkg", layr = "x" }  # <-\n' + COVER,
     r"inputs\.blocks: unknown key 'layr'.*did you mean 'layer'\?"),
    ("input-option-in-input", GOOD_HEAD + 'blocks = { path = "county.gpkg", points = 5 }  # <-\n' + COVER,
     r"'points' is an option, not an input key"),
    ("input-crs-number", GOOD_HEAD + 'blocks = { path = "county.gpkg", input-crs = 4326 }  # <-\n' + COVER,
     r"input-crs = 4326: expected text, got a number \(write \"EPSG:4326\"\)"),
    ("input-name-unknown", GOOD_HEAD + COVER.replace('regions = "districts"', 'regions = "distrcts"  # <-'),
     r"regions = \"distrcts\" names no input of \[inputs\]; did you mean 'districts'\?"),
    ("input-option-in-job", GOOD_HEAD + COVER + 'zones-layer = "sites"  # <-\n',
     r"'zones-layer' comes from the input: set layer in the input's table in \[inputs\]"),
    ("duplicate-name", GOOD_HEAD + COVER + COVER.replace('name = "cover"', 'name = "cover"  # <-'),
     r"jobs\[2\] \(cover\): name 'cover' is already used by jobs\[1\] \(line \d+\)"),
    ("bad-name", GOOD_HEAD + COVER.replace('name = "cover"', 'name = "Cover Job"  # <-'),
     r"name = \"Cover Job\": a job's name is text of a-z, 0-9, _ and -"),
    ("no-name", GOOD_HEAD + COVER.replace('[[jobs]]\nname = "cover"\n', "[[jobs]]  # <-\n"), r"jobs\[1\]: no name"),
    ("no-kind", GOOD_HEAD + COVER.replace('[[jobs]]', "[[jobs]]  # <-").replace('kind = "coverage"\n', ""),
     r"jobs\[1\] \(cover\): no kind"),
    ("unknown-kind", GOOD_HEAD + COVER.replace('kind = "coverage"', 'kind = "coverge"  # <-'),
     r"kind = \"coverge\" is not one of area, overlap, coverage, integrate; did you mean 'coverage'\?"),
    ("inspect-kind", GOOD_HEAD + COVER.replace('kind = "coverage"', 'kind = "inspect"  # <-'),
     r"inspect runs no estimate"),
    ("missing-positional", GOOD_HEAD + COVER.replace("[[jobs]]", "[[jobs]]  # <-").replace('zones = "sites"\n', ""),
     r"jobs\[1\] \(cover\): no zones \(the ZONES input of coverage"),
    ("integrate-without-density", GOOD_HEAD + '[[jobs]]  # <-\nname = "i"\nkind = "integrate"\n'
     'regions = "districts"\n', r"jobs\[1\] \(i\): no density"),
    ("density-path-not-input", GOOD_HEAD + '[[jobs]]\nname = "i"\nkind = "integrate"\nregions = "districts"\n'
     'density = "people.tif"  # <-\n', r"density = \"people\.tif\" names no input of \[inputs\]"),
    ("density-bad-expression", GOOD_HEAD + '[[jobs]]\nname = "i"\nkind = "integrate"\nregions = "districts"\n'
     'density = "2 * popp"  # <-\n', r"neither an input of \[inputs\] nor a valid density expression.*'popp'"),
    ("wrong-type", GOOD_HEAD.replace("points = 2000", 'points = "many"  # <-') + COVER,
     r"settings: points = \"many\": expected a positive whole number, got 'many'"),
    ("out-of-range-setting", GOOD_HEAD.replace("points = 2000", "confidence = 1.5  # <-") + COVER,
     r"settings: confidence = 1\.5: must lie strictly between 0 and 1"),
    ("out-of-range-job", GOOD_HEAD + COVER + "claim = 1.5  # <-\n",
     r"jobs\[1\] \(cover\): claim = 1\.5: expected a share in \(0, 1\], got '1\.5'"),
    ("list-element-out-of-range", GOOD_HEAD + COVER + "at-least = [\n  1,\n  0,  # <-\n]\n",
     r"at-least = \[1, 0\]: expected a whole number of at least 1, got '0'"),
    ("negative-number", GOOD_HEAD + COVER + "circle-vertices = -8  # <-\n",
     r"circle-vertices = -8: expected a positive whole number, got '-8'"),
    ("bool-for-value", GOOD_HEAD + COVER + "chunk = true  # <-\n",
     r"chunk = true: expected a value, not true \(true/false is only for on/off options\)"),
    ("list-for-one-value", GOOD_HEAD + COVER + "claim = [0.5, 0.6]  # <-\n", r"claim = \[0\.5, 0\.6\]: takes one value"),
    ("text-for-on-off", GOOD_HEAD + COVER + 'no-exact = "yes"  # <-\n', r"no-exact = \"yes\": expected true or false"),
    ("invalid-choice", GOOD_HEAD.replace("points = 2000", 'sampler = "random"  # <-') + COVER,
     r"settings: sampler = \"random\": invalid choice: 'random'"),
    ("points-and-tolerance", GOOD_HEAD + COVER + 'points = 500  # <-\ntolerance = "1%"\n',
     r"(points|tolerance) = .*exclude each other"),
    ("bad-tolerance", GOOD_HEAD.replace("points = 2000", 'tolerance = "lots"  # <-') + COVER,
     r"settings: tolerance = \"lots\": expected a number or a percentage"),
    ("replicate-sampler-for-overlap", GOOD_HEAD + '[[jobs]]\nname = "o"\nkind = "overlap"\nzones = "districts"\n'
     'sampler = "sobol"  # <-\n', r"sampler = \"sobol\": the overlap job takes a sampler of single points"),
    ("bad-radius", GOOD_HEAD + COVER.replace('radius-field = "reach"', 'radius = "5 leagues"  # <-'),
     r"radius = \"5 leagues\": unknown distance unit 'leagues'"),
    ("output-in-job", GOOD_HEAD + COVER + 'output = "cover.csv"  # <-\n',
     r"'output' is not set in a plan: the audit writes every result into its results folder"),
    ("gate-in-job", GOOD_HEAD + COVER + "fail-on-shortfall = true  # <-\n",
     r"give --fail-on-shortfall to areamc audit"),
    ("no-seed", GOOD_HEAD.replace("[settings]\nseed = 7", "[settings]  # <-") + COVER,
     r"settings: no seed: give seed = N"),
    ("negative-seed", GOOD_HEAD.replace("seed = 7", "seed = -7  # <-") + COVER,
     r"settings: seed = -7: expected a non-negative whole number"),
    ("settings-not-a-table", GOOD_HEAD.replace("[settings]\nseed = 7\npoints = 2000\n", "settings = 3  # <-\n")
     + COVER, r"settings must be a table"),
    ("no-jobs", "# <-\n" + GOOD_HEAD, r"the plan has no jobs"),
    ("jobs-not-array", GOOD_HEAD + '[jobs]  # <-\nname = "x"\n', r"jobs must be tables: write each job as a \[\[jobs\]\]"),
    ("not-toml", GOOD_HEAD + COVER + "claim = 0.5 0.6  # <-\n", r"not valid TOML"),
    # checks that open the files (check_plan, areamc audit --check)
    ("layer-not-in-file", GOOD_HEAD.replace('layer = "sites" }', 'layer = "site" }  # <-') + COVER,
     r"inputs\.sites: layer 'site' is not in \S*county\.gpkg \(layers: districts, sites\); did you mean 'sites'\?"),
    ("id-field-not-in-layer", GOOD_HEAD.replace('id-field = "code" }', 'id-field = "cod" }  # <-') + COVER,
     r"inputs\.districts: id-field 'cod' is not an attribute of layer 'districts' \(attributes: code\)"),
    ("radius-field-not-in-layer", GOOD_HEAD + COVER.replace('radius-field = "reach"', 'radius-field = "rech"  # <-'),
     r"radius-field 'rech' is not an attribute of input 'sites' \(attributes: reach\); did you mean 'reach'\?"),
]


def _write_plan(folder: pathlib.Path, text: str, vector_file) -> tuple[pathlib.Path, int]:
    shutil.copy(vector_file, folder / "county.gpkg")
    path = folder / "plan.toml"
    path.write_text(text, encoding="utf-8")
    marked = [n for n, line in enumerate(text.splitlines(), 1) if "# <-" in line]
    assert len(marked) == 1, "each broken plan marks one line"
    return path, marked[0]


def test_broken_plans__good_head_is_good(tmp_path, vector_file):
    """The plans below differ from this good one only by what each case breaks."""
    path, _ = _write_plan(tmp_path, GOOD_HEAD + COVER + "# <-\n", vector_file)
    job = check_plan(path).jobs[0]
    assert job.argv[:3] == ("coverage", str(tmp_path / "county.gpkg"), str(tmp_path / "county.gpkg"))
    assert "--radius-field" in job.argv and job.inputs == ("districts", "sites")


@pytest.mark.parametrize("case, text, match", BROKEN, ids=[c[0] for c in BROKEN])
def test_check_plan__broken__one_error_on_its_line(tmp_path, vector_file, case, text, match):
    path, line = _write_plan(tmp_path, text, vector_file)
    with pytest.raises(PlanError) as caught:
        check_plan(path)
    assert len(caught.value.lines) == 1, caught.value.lines
    error = caught.value.lines[0]
    assert error.startswith(f"{path}:{line}: "), error
    assert re.search(match, error), error
    assert caught.value.exit_status == 2


@needs_audit
@pytest.mark.parametrize("case, text, match", BROKEN, ids=[c[0] for c in BROKEN])
def test_audit_check__broken__one_line_exit_2(capsys, tmp_path, vector_file, case, text, match):
    path, line = _write_plan(tmp_path, text, vector_file)
    assert_refused(capsys, ["audit", "--check", path], rf"^areamc: error: {re.escape(str(path))}:{line}: .*{match}",
                   tmp_path)


def test_read_plan__file_checks_only_in_check_plan(tmp_path, vector_file):
    """read_plan opens no input (the audit's readers do, per job); check_plan opens them all."""
    case = dict((c[0], c[1]) for c in BROKEN)["layer-not-in-file"]
    path, _ = _write_plan(tmp_path, case, vector_file)
    assert read_plan(path).jobs[0].name == "cover"
    with pytest.raises(PlanError):
        check_plan(path)


MANY = GOOD_HEAD.replace("points = 2000", "pionts = 2000  # <- 1") + COVER.replace(
    'zones = "sites"', 'zones = "site"  # <- 2') + "claim = 2  # <- 3\n" + COVER.replace(
    'name = "cover"', 'name = "cover"  # <- 4').replace('kind = "coverage"', 'kind = "overlap"').replace(
    'regions = "districts"', 'regions = "districts"  # <- 5') + "at-least = [1]  # <- 6\n"


def _many_lines(text: str) -> list[int]:
    found = {int(m.group(1)): n for n, line in enumerate(text.splitlines(), 1) for m in re.finditer(r"# <- (\d)", line)}
    return [found[k] for k in sorted(found)]


def test_read_plan__every_error_listed_sorted_by_line(tmp_path, vector_file):
    shutil.copy(vector_file, tmp_path / "county.gpkg")
    path = tmp_path / "plan.toml"
    path.write_text(MANY, encoding="utf-8")
    with pytest.raises(PlanError) as caught:
        read_plan(path)
    lines = [int(e.split(":")[1]) for e in caught.value.lines]
    assert lines == _many_lines(MANY), caught.value.lines
    assert str(caught.value) == "\n".join(caught.value.lines)


@needs_audit
def test_audit_check__many_errors__one_line_each(capsys, tmp_path, vector_file):
    shutil.copy(vector_file, tmp_path / "county.gpkg")
    path = tmp_path / "plan.toml"
    path.write_text(MANY, encoding="utf-8")
    before = {p.name for p in tmp_path.iterdir()}
    rc, out, err = run_cli(capsys, ["audit", "--check", str(path)])
    assert rc == 2 and out == "" and "Traceback" not in err
    lines = [line for line in err.splitlines() if line.startswith("areamc: error:")]
    assert [int(line.split(":")[3]) for line in lines] == _many_lines(MANY), err
    assert {p.name for p in tmp_path.iterdir()} == before


@needs_audit
def test_audit_check__sample_plan_passes_and_writes_nothing(capsys):
    before = sorted(os.listdir(SAMPLE))
    rc, out, err = run_cli(capsys, ["audit", "--check", str(SAMPLE_PLAN)])
    assert rc == 0, err
    assert "areamc: error" not in err
    assert sorted(os.listdir(SAMPLE)) == before


def test_read_plan__not_found_and_not_utf8(tmp_path):
    with pytest.raises(PlanError, match=r"plan\.toml: cannot read the plan"):
        read_plan(tmp_path / "plan.toml")
    bad = tmp_path / "latin.toml"
    bad.write_bytes(b"[settings]\nseed = 1\n# caf\xe9\n")
    with pytest.raises(PlanError, match=r"latin\.toml:3: the plan is not UTF-8 text"):
        read_plan(bad)


# ----------------------------------------------------------------------- paths and settings


def test_read_plan__paths_relative_to_the_plan_folder(tmp_path, monkeypatch, vector_file):
    data = tmp_path / "data"
    plans = tmp_path / "plans"
    data.mkdir()
    plans.mkdir()
    shutil.copy(vector_file, data / "county.gpkg")
    (data / "county_shp.zip").write_bytes(b"PK")  # only its path is resolved here
    plan = plans / "p.toml"
    plan.write_text('[settings]\nseed = 1\n[inputs]\n'
                    'd = { path = "../data/county.gpkg", layer = "districts" }\n'
                    'z = { path = "zip://../data/county_shp.zip!county.shp" }\n'
                    'u = { path = "https://example.invalid/zones.gpkg" }\n'
                    'v = { path = "/vsizip/elsewhere.zip/zones.shp" }\n'
                    '[[jobs]]\nname = "a"\nkind = "area"\nfile = "d"\n'
                    '[[jobs]]\nname = "b"\nkind = "overlap"\nzones = "u"\nother = "v"\n', encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    read = read_plan(os.path.relpath(plan))
    assert read.path == str(plan) and read.folder == str(plans)
    assert read.inputs["d"]["path"] == str(data / "county.gpkg")
    assert read.inputs["z"]["path"] == f"zip://{data / 'county_shp.zip'}!county.shp"
    assert read.inputs["u"]["path"] == "https://example.invalid/zones.gpkg"  # left to the reader
    assert read.inputs["v"]["path"] == "/vsizip/elsewhere.zip/zones.shp"
    assert read.jobs[0].argv[1] == str(data / "county.gpkg")
    assert read.jobs[1].argv[1:3] == ("https://example.invalid/zones.gpkg", "/vsizip/elsewhere.zip/zones.shp")
    assert read.jobs[1].inputs == ("u", "v")


def test_read_plan__job_keys_override_settings(tmp_path, vector_file):
    shutil.copy(vector_file, tmp_path / "county.gpkg")
    path = tmp_path / "plan.toml"
    path.write_text('[settings]\nseed = 3\ntolerance = "1%"\nno-exact = true\nconfidence = 0.9\n'
                    '[inputs]\nd = { path = "county.gpkg", layer = "districts", open-option = "LIST_ALL_TABLES=NO" }\n'
                    '[[jobs]]\nname = "plain"\nkind = "area"\nfile = "d"\n'
                    '[[jobs]]\nname = "own"\nkind = "area"\nfile = "d"\npoints = 5000\nno-exact = false\n'
                    'confidence = 0.99\nseed = 12\n', encoding="utf-8")
    plain, own = (_namespace(job.argv) for job in read_plan(path).jobs)
    assert (plain["tolerance"], plain["points"], plain["no_exact"], plain["confidence"]) == ("1%", None, True, 0.9)
    assert (own["tolerance"], own["points"], own["no_exact"], own["confidence"]) == (None, 5000, False, 0.99)
    assert plain["seed"] == job_seed(3, "plain") and own["seed"] == 12
    assert plain["open_option"] == ["LIST_ALL_TABLES=NO"]


def test_read_plan__values_starting_with_a_dash_stay_values(tmp_path, vector_file):
    """A text value that starts with '-' is passed as --flag=VALUE, so argparse cannot take it
    for an option; here a density expression."""
    shutil.copy(vector_file, tmp_path / "county.gpkg")
    path = tmp_path / "plan.toml"
    path.write_text('[settings]\nseed = 3\n[inputs]\nd = { path = "county.gpkg", layer = "districts" }\n'
                    '[[jobs]]\nname = "e"\nkind = "integrate"\nregions = "d"\ndensity = "-1e-4 * lat + 0.01"\n',
                    encoding="utf-8")
    job = read_plan(path).jobs[0]
    assert "--density=-1e-4 * lat + 0.01" in job.argv
    assert _namespace(job.argv)["density"] == "-1e-4 * lat + 0.01"
