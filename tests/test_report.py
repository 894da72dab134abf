"""The audit report (areamc.report) and the pictures (areamc.plots), and each command's --plot.

The report is checked as a reader of the file would check it, with outside tools: the HTML is
parsed with the standard library's html.parser, every picture is decoded from its data: URI and
read back with matplotlib's PNG reader (and its size from the PNG header, W3C PNG specification,
2nd ed. 2003, §5.2 signature and §11.2.2 IHDR), and the table cells are compared with the
command's own text table for the same run.  Test data are written by the tests, in tmp_path.
"""

from __future__ import annotations

import base64
import io
import re
from dataclasses import dataclass, replace
from html.parser import HTMLParser
from pathlib import Path

import fiona
import numpy as np
import pytest
from shapely.geometry import box, mapping

from areamc import plots, report
from areamc.cli import area as area_cli
from areamc.cli import build_parser
from areamc.cli import coverage as coverage_cli
from areamc.cli import integrate as integrate_cli
from areamc.cli import overlap as overlap_cli
from conftest import assert_refused, run_cli

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # W3C PNG specification (2003), §5.2
HOSTILE = "<script>alert(1)</script>"
README = Path(__file__).resolve().parents[1] / "README.md"


# --- test data --------------------------------------------------------------------------------

def write_county(folder: Path) -> Path:
    """A GeoPackage of 3 districts (one named with markup), 2 zones and 6 census-style blocks, in lon/lat."""
    path = folder / "county.gpkg"
    districts = [(HOSTILE, box(10.0, 47.0, 10.1, 47.1)), ("Ost & West", box(10.1, 47.0, 10.2, 47.1)),
                 ("Süd", box(10.0, 46.9, 10.2, 47.0))]
    zones = [("Z1", box(10.02, 46.95, 10.12, 47.08)), ("Z2", box(10.08, 46.92, 10.19, 47.05))]
    schema = {"geometry": "Polygon", "properties": {"name": "str"}}
    with fiona.open(path, "w", driver="GPKG", layer="districts", crs="EPSG:4326", schema=schema) as dst:
        dst.writerecords({"geometry": mapping(g), "properties": {"name": n}} for n, g in districts)
    with fiona.open(path, "w", driver="GPKG", layer="zones", crs="EPSG:4326", schema=schema) as dst:
        dst.writerecords({"geometry": mapping(g), "properties": {"name": n}} for n, g in zones)
    blocks = {"geometry": "Polygon", "properties": {"population": "int"}}
    with fiona.open(path, "w", driver="GPKG", layer="blocks", crs="EPSG:4326", schema=blocks) as dst:
        for n, (x, y) in enumerate([(10.0, 47.0), (10.1, 47.0), (10.0, 46.9), (10.1, 46.9), (10.05, 47.05),
                                    (10.15, 46.95)]):
            dst.write({"geometry": mapping(box(x, y, x + 0.05, y + 0.05)), "properties": {"population": 100 * (n + 1)}})
    return path


def job_argv(kind: str, gpkg: Path) -> list[str]:
    g = str(gpkg)
    common = ["--points", "4000", "--seed", "7", "--workers", "1", "--quiet"]
    regions = ["--regions-layer", "districts", "--regions-id-field", "name"]
    density = ["--density", g, "--density-layer", "blocks", "--count-field", "population"]
    return {
        "area": ["area", g, "--layer", "districts", "--id-field", "name", "--trace-every", "1000"],
        "overlap": ["overlap", g, "--zones-layer", "zones", "--zones-id-field", "name"],
        "coverage": ["coverage", g, g, *regions, "--zones-layer", "zones", "--zones-id-field", "name",
                     "--at-least", "1", "--at-least", "2", *density, "--claim", "0.3"],
        "integrate": ["integrate", g, *regions, *density],
    }[kind] + common


@dataclass(frozen=True)
class Claim:
    """The fields of areamc.audit's ClaimSummary (/tmp/audit_result_api.md), counted here from the rows."""

    job: str
    measure: str
    k: int
    claim: float
    confidence: float
    met: int
    short: int
    undecided: int
    short_ids: tuple
    undecided_ids: tuple


def count_claims(job: str, rows, confidence: float) -> list[Claim]:
    out = []
    for measure, key in (("share", "verdict"), ("population_share", "population_verdict")):
        for k in sorted({r["k"] for r in rows}):
            at_k = [r for r in rows if r["k"] == k and r.get(key)]
            if not at_k:
                continue
            ids = {v: tuple(r["id"] for r in at_k if r[key] == v) for v in ("meets", "falls-short", "undecided")}
            out.append(Claim(job, measure, k, at_k[0]["claim"], confidence, len(ids["meets"]),
                             len(ids["falls-short"]), len(ids["undecided"]), ids["falls-short"], ids["undecided"]))
    return out


def build_views(gpkg: Path):
    """Each kind of job run through its command's compute, as report.JobView, and the claims."""
    views, claims = [], []
    for kind, module in (("coverage", coverage_cli), ("area", area_cli), ("overlap", overlap_cli),
                         ("integrate", integrate_cli)):
        argv = job_argv(kind, gpkg)
        args = build_parser().parse_args(argv)
        args.argv = ["areamc", *argv]
        outcome = module.compute(args, trace=True) if kind == "area" else module.compute(args)
        name = f"{kind}-job"
        views.append(report.outcome_view(name, kind, outcome, units=args.units, seconds=0.5))
        if kind == "coverage":
            claims = count_claims(name, outcome.rows, args.confidence)
    return views, claims


class Page(HTMLParser):
    """Tags, attributes and text of an HTML page (standard library parser; entities decoded)."""

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.tags, self.text, self.title, self.tables, self._in = [], [], "", [], []
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs), len(" ".join(self.text))))
        self._in.append(tag)
        if tag == "table":
            self.tables.append([])
        elif tag == "tr" and self.tables:
            self.tables[-1].append([])
        elif tag in ("td", "th") and self.tables:
            self.tables[-1][-1].append("")

    def handle_endtag(self, tag):
        if self._in and self._in[-1] == tag:
            self._in.pop()

    def handle_data(self, data):
        if "title" in self._in:
            self.title += data
        if ("td" in self._in or "th" in self._in) and self.tables:  # a cell's text, links in it too
            self.tables[-1][-1][-1] += data
        self.text.append(data)

    def plain(self) -> str:
        return " ".join(" ".join(self.text).split())


@pytest.fixture(scope="module")
def county(tmp_path_factory) -> Path:
    return write_county(tmp_path_factory.mktemp("county"))


@pytest.fixture(scope="module")
def built(county):
    return build_views(county)


@pytest.fixture(scope="module")
def page(built):
    views, claims = built
    text = report.render_report(f"audit of {HOSTILE}", views, claims=claims, facts=[("plan", f"/x/{HOSTILE}.toml")])
    return text, Page(text), views, claims


def decode_png(uri: str) -> bytes:
    assert uri.startswith("data:image/png;base64,"), uri[:40]
    return base64.b64decode(uri.split(",", 1)[1], validate=True)


def read_png(png: bytes) -> np.ndarray:
    """Pixels by matplotlib's PNG reader (an outside reader of what plots wrote)."""
    from matplotlib.image import imread

    return imread(io.BytesIO(png), format="png")


# --- the page ---------------------------------------------------------------------------------

def test_report__every_picture__is_an_embedded_png_of_its_stated_size(page):
    text, parsed, views, _ = page
    images = [attrs for tag, attrs, _ in parsed.tags if tag == "img"]
    # coverage: map and one bar chart per k (2); area: convergence; overlap: histogram; integrate: totals
    assert len(images) == 6
    for attrs in images:
        png = decode_png(attrs["src"])
        assert png[:8] == PNG_SIGNATURE and png[12:16] == b"IHDR"
        pixels = read_png(png)
        assert (pixels.shape[1], pixels.shape[0]) == (int(attrs["width"]), int(attrs["height"]))
        assert pixels[..., :3].std() > 0.05  # a picture, not a blank
        assert attrs["alt"]


def test_report__refers_to_no_other_file_or_address(page):
    text, parsed, _, _ = page
    for tag, attrs, _ in parsed.tags:
        assert tag not in ("script", "link", "iframe", "object", "embed", "base"), tag
        for key in ("src", "href", "srcset", "action", "poster", "data"):
            value = attrs.get(key)
            if value is not None:
                assert value.startswith("data:image/png;base64,") or value.startswith("#"), (tag, key, value[:60])
    style = "".join(re.findall(r"<style>(.*?)</style>", text, re.S))
    assert "url(" not in style and "@import" not in style and "@font-face" not in style
    assert "http://" not in text and "https://" not in text


def test_report__in_page_links__name_sections_that_exist(page):
    _, parsed, _, _ = page
    ids = {attrs["id"] for _, attrs, _ in parsed.tags if "id" in attrs}
    links = [attrs["href"][1:] for _, attrs, _ in parsed.tags if attrs.get("href", "").startswith("#")]
    assert links and set(links) <= ids


def test_report__hostile_district_name__appears_only_escaped(page):
    text, parsed, _, _ = page
    assert HOSTILE not in text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text
    assert not [tag for tag, _, _ in parsed.tags if tag == "script"]
    assert parsed.title == f"audit of {HOSTILE}"  # the parser decodes the escaped title back
    cells = {cell for table in parsed.tables for row in table for cell in row}
    assert HOSTILE in cells and "Ost & West" in cells and "Süd" in cells


def test_report__hostile_job_name__is_escaped_in_alt_text_and_anchors(built):
    views = [replace(v, name=f'x"><img src=x onerror=alert(1)>{HOSTILE}') for v in built[0] if v.kind == "integrate"]
    text = report.render_report("t", views)
    parsed = Page(text)
    assert HOSTILE not in text and "<img src=x" not in text
    assert not [attrs for _, attrs, _ in parsed.tags if "onerror" in attrs]  # no attribute broke out of its quotes
    alts = [attrs["alt"] for tag, attrs, _ in parsed.tags if tag == "img"]
    assert len(alts) == 1  # no picture added by the name
    assert alts[0].startswith(f'x"><img src=x onerror=alert(1)>{HOSTILE}: ')  # the integrate job's, decoded


def test_report__claims_summary__comes_first_and_says_per_row_not_jointly(page):
    _, parsed, _, claims = page
    text = parsed.plain()
    claims_at = text.index("Claims at a glance")
    first_job_table = next(at for tag, attrs, at in parsed.tags if tag == "table" and at > claims_at + 20)
    summary = text[claims_at:first_job_table]
    assert "not jointly" in summary and "for its own row at confidence 0.95" in summary
    assert claims_at < text.index("Job area-job") and claims_at < text.index("Job coverage-job")
    summary_table = parsed.tables[0]
    assert summary_table[0][:4] == ["job", "measure", "k", "claim"]
    # one line per measure and k, with the counts of the rows counted in this test
    assert len(summary_table) - 1 == len(claims) == 4
    for line, claim in zip(summary_table[1:], claims):
        assert line[2] == str(claim.k) and line[5:8] == [str(claim.met), str(claim.short), str(claim.undecided)]
        assert claim.met + claim.short + claim.undecided == 3  # every district judged


def test_report__no_claims__says_so(built):
    views = [v for v in built[0] if v.kind == "overlap"]
    text = Page(report.render_report("t", views)).plain()
    assert "The plan states no claims" in text


def test_report__carries_the_readme_caution_and_the_reach_sentence(page):
    readme = " ".join(README.read_text(encoding="utf-8").split())
    caution = re.search(r"\*\*Caution\.\*\* (.*?) ?(?:#|$)", readme).group(1)
    caution = caution.split(" ## ")[0].strip()
    text = page[1].plain()
    assert caution in text, caution
    assert "Reach circles are straight-line distances" in text


def text_table(stdout: str) -> list[list[str]]:
    """The rows of a command's text table: the lines after the dashes, up to the first blank line."""
    lines = stdout.splitlines()
    start = next(n for n, line in enumerate(lines) if line.startswith("---"))
    rows = []
    for line in lines[start + 1:]:
        if not line.strip():
            break
        rows.append(re.split(r" {2,}", line.strip()))
    return rows


@pytest.mark.parametrize("kind", ["area", "integrate"])
def test_report__job_table__rounds_as_the_command_table(capsys, county, page, kind):
    """The report's cells are the command's text table's cells, for the same run (same seed)."""
    views = page[2]
    rc, out, _ = run_cli(capsys, job_argv(kind, county))
    assert rc == 0
    expected = text_table(out)
    alone = Page(report.render_report("t", [v for v in views if v.kind == kind]))
    job_table = alone.tables[0]  # no claims, so no summary table: the job's own table comes first
    assert job_table[0][:2] == ["id", "estimate"]
    assert [[c for c in row if c] for row in job_table[1:]] == expected
    assert len(expected) == 3


def test_report__failed_job__shows_its_message_escaped():
    view = report.JobView("broken", "area", "failed", 0.1, message=f"layer {HOSTILE}: not found")
    text = report.render_report("t", [view])
    assert HOSTILE not in text
    assert f"did not finish: layer {HOSTILE}: not found" in Page(text).plain()


def test_write_report__is_atomic_and_reads_back(tmp_path, built, monkeypatch):
    views = [v for v in built[0] if v.kind == "overlap"]
    monkeypatch.setattr(report, "audit_views", lambda audit: ("t", views, []))

    class Audit:
        claims = ()

    path = tmp_path / "report.html"
    report.write_report(str(path), Audit())
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.html"]  # no temporary file left
    assert Page(path.read_text(encoding="utf-8")).title == "t"


# --- the pictures -----------------------------------------------------------------------------

def squares():
    regions = [box(0, 0, 1000, 1000), box(1000, 0, 2000, 1000).difference(box(1300, 300, 1600, 600))]
    zones = [box(500, 200, 1500, 900)]
    return regions, zones


PICTURES = {
    "coverage_map": (lambda: plots.coverage_map(*squares()[:1], [1.0, 0.25], squares()[1], ids=["A", "$B$"]),
                     plots.MAP_SIZE),
    "share_bars": (lambda: plots.share_bars(["A", "B"], [plots.ShareSeries("area", [0.5, 0.9], [0.4, 0.8], [0.6, 1.0]),
                                                         plots.ShareSeries("people", [0.7, None], [0.6, None],
                                                                           [0.8, None])], claim=0.6),
                   plots.BAR_SIZE),
    "convergence": (lambda: plots.convergence([plots.Trace("A", [100, 200, 300], [1.0, 1.2, 1.1], [0.8, 1.0, 1.0],
                                                           [1.2, 1.4, 1.2], 1.05)] * 5, unit="km2"),
                    plots.CONVERGENCE_SIZE),
    "estimates_vs_exact": (lambda: plots.estimates_vs_exact(["A", "B"], [10.0, 20.0], [9.0, 19.0], [11.0, 21.0],
                                                            [10.2, None], unit="km2"), plots.ESTIMATES_SIZE),
    "multiplicity_histogram": (lambda: plots.multiplicity_histogram([1, 2, 3], [50.0, 10.0, 1.0], [48.0, 9.0, 0.5],
                                                                    [52.0, 11.0, 1.5], [50.5, None, 1.1], unit="ha"),
                               plots.HISTOGRAM_SIZE),
}


@pytest.mark.parametrize("name", sorted(PICTURES))
def test_plot__small_data__gives_a_png_of_the_stated_size(name):
    draw, size = PICTURES[name]
    png = draw()
    assert png[:8] == PNG_SIGNATURE
    pixels = read_png(png)
    assert (pixels.shape[1], pixels.shape[0]) == plots.png_size(png) == (round(size[0] * plots.DPI),
                                                                         round(size[1] * plots.DPI))
    assert b"Software" not in png and b"matplotlib" not in png  # no tool text, so bytes are reproducible


def test_plot__same_data__same_bytes():
    draw, _ = PICTURES["coverage_map"]
    assert draw() == draw()


def colour_present(pixels: np.ndarray, rgb, tol: float = 2.5) -> bool:
    """Whether some pixel has colour `rgb` (0..255) within `tol` in each channel."""
    target = np.array(rgb, dtype=float) / 255
    return bool((np.abs(pixels[..., :3] - target) <= tol / 255).all(axis=-1).any())


def test_plot__darkest_blue__is_matplotlibs_blues_at_one():
    from matplotlib import colormaps

    assert plots.DARKEST_BLUE == tuple(round(255 * c) for c in colormaps["Blues"](1.0)[:3])


def test_plot__map_and_bars__show_their_distinctive_colours():
    pixels = read_png(PICTURES["coverage_map"][0]())
    assert colour_present(pixels, plots.DARKEST_BLUE)  # the region covered wholly, share 1
    assert colour_present(pixels, plots.ZONE_COLOUR)
    assert not colour_present(pixels, plots.CLAIM_COLOUR)
    bars = read_png(PICTURES["share_bars"][0]())
    assert colour_present(bars, plots.CLAIM_COLOUR) and colour_present(bars, plots.AREA_BAR)


# --- --plot FILE.png --------------------------------------------------------------------------

PLOT_SIZES = {"area": plots.CONVERGENCE_SIZE, "overlap": plots.HISTOGRAM_SIZE, "coverage": plots.MAP_SIZE,
              "integrate": plots.ESTIMATES_SIZE}


@pytest.mark.parametrize("kind", sorted(PLOT_SIZES))
def test_plot_option__each_command__writes_its_png(capsys, tmp_path, county, kind):
    out = tmp_path / f"{kind}.png"
    rc, stdout, err = run_cli(capsys, [*job_argv(kind, county), "--plot", str(out)])
    assert rc == 0, err
    png = out.read_bytes()
    w, h = PLOT_SIZES[kind]
    assert png[:8] == PNG_SIGNATURE and plots.png_size(png) == (round(w * plots.DPI), round(h * plots.DPI))
    assert read_png(png)[..., :3].std() > 0.05
    assert stdout.startswith(f"areamc {kind}:")  # the table is still shown


def test_plot_option__area_with_stratified_sampler__plots_estimates_against_exact(capsys, tmp_path, county):
    out = tmp_path / "area.png"
    argv = [*job_argv("area", county), "--sampler", "stratified", "--plot", str(out)]
    rc, _, err = run_cli(capsys, argv)
    assert rc == 0, err
    w, h = plots.ESTIMATES_SIZE
    assert plots.png_size(out.read_bytes()) == (round(w * plots.DPI), round(h * plots.DPI))


REFUSALS = [
    ("area", "shot.jpg", r"--plot .*shot\.jpg: the picture is PNG; give a path ending in \.png"),
    ("coverage", "shot", r"--plot .*shot: the picture is PNG"),
    ("overlap", "missing/shot.png", r"--plot .*missing.*does not exist"),
    ("integrate", "county.gpkg", r"--plot .*county\.gpkg: would overwrite the input"),
]


@pytest.mark.parametrize("kind,target,match", REFUSALS, ids=[f"{k}-{t}" for k, t, _ in REFUSALS])
def test_plot_option__bad_path__is_refused_before_any_work(capsys, tmp_path, kind, target, match):
    gpkg = write_county(tmp_path)
    assert_refused(capsys, [*job_argv(kind, gpkg), "--plot", str(tmp_path / target)], match, tmp_path)


def test_plot_option__same_path_as_output__is_refused(capsys, tmp_path):
    gpkg = write_county(tmp_path)
    same = str(tmp_path / "x.png")
    assert_refused(capsys, [*job_argv("area", gpkg), "--plot", same, "--output", same], r"--plot .*the same file as --output",
                   tmp_path)


# --- the report of a real audit ---------------------------------------------------------------

PLAN = """\
[settings]
seed = 7
points = 4000
workers = 1

[inputs]
districts = { path = "county.gpkg", layer = "districts", id-field = "name" }
zones = { path = "county.gpkg", layer = "zones", id-field = "name" }
blocks = { path = "county.gpkg", layer = "blocks" }

[[jobs]]
name = "cover"
kind = "coverage"
regions = "districts"
zones = "zones"
density = "blocks"
count-field = "population"
claim = 0.3

[[jobs]]
name = "sizes"
kind = "area"
file = "districts"
"""


@pytest.fixture(scope="module")
def audited(tmp_path_factory):
    from areamc.audit import run_audit
    from areamc.plan import read_plan

    folder = tmp_path_factory.mktemp("audit")
    write_county(folder)
    (folder / "plan.toml").write_text(PLAN, encoding="utf-8")
    audit = run_audit(read_plan(str(folder / "plan.toml")), str(folder / "out"), quiet=True)
    return folder, audit


def test_write_report__of_an_audit__holds_map_bars_trace_and_the_audits_claims(audited):
    folder, audit = audited
    text = (folder / "out" / "report.html").read_text(encoding="utf-8")
    parsed = Page(text)
    assert HOSTILE not in text and not [t for t, _, _ in parsed.tags if t == "script"]
    alts = [attrs["alt"] for tag, attrs, _ in parsed.tags if tag == "img"]
    assert [a.split(": ", 1)[1].split(":")[0] for a in alts] == [
        "Map", "Covered share per region, at least 1 zone", "Convergence of each feature's area"]
    for _, attrs, _ in parsed.tags:
        if "src" in attrs:
            assert decode_png(attrs["src"])[:8] == PNG_SIGNATURE
    summary = parsed.tables[0]
    assert [line[:3] for line in summary[1:]] == [["cover", "area share", "1"], ["cover", "population share", "1"]]
    for line, claim in zip(summary[1:], audit.claims):  # the audit's own claim records, one line each
        assert line[5:8] == [str(claim.met), str(claim.short), str(claim.undecided)]
    assert parsed.title == "areamc audit: plan.toml"


def test_write_report__inputs_gone__leaves_the_map_out_and_says_why(audited, tmp_path):
    import shutil

    folder, audit = audited
    moved = tmp_path / "county.gpkg"
    shutil.move(folder / "county.gpkg", moved)
    try:
        report.write_report(str(tmp_path / "report.html"), audit)
    finally:
        shutil.move(moved, folder / "county.gpkg")
    parsed = Page((tmp_path / "report.html").read_text(encoding="utf-8"))
    assert "The map is left out: the job's inputs could not be read again" in parsed.plain()
    assert [tag for tag, _, _ in parsed.tags].count("img") == 2  # the bars and the convergence remain
