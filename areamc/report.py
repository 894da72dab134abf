"""The audit report: one self-contained HTML file, and the pictures of a job's results.

This module only formats.  It receives each job's rows as the commands hand them to their
writers (dicts, areas in m² of the job's equal-area plane, counts in the density's unit) and
turns them into

- pictures (:class:`Picture`, PNG bytes from :mod:`areamc.plots`), one set per kind of job:
  :func:`area_picture` (convergence traces, or estimates against exact areas when the job kept
  no trace), :func:`integrate_picture` (totals against exact totals), :func:`multiplicity_picture`
  (area covered by exactly k zones) and, for coverage, :func:`map_picture` and
  :func:`bar_pictures`.  The command line's ``--plot FILE.png`` draws the same pictures.
- :func:`render_report` / :func:`write_report`: the HTML page.  Its pictures are ``data:`` URIs
  (PNG, base64), its style sheet is inline, and it refers to no other file, font, script or
  address, so it reads the same offline and after the results folder is moved.  Every text
  that comes from an input file or the plan (ids, names, attribute values, paths, messages) is
  escaped with :func:`html.escape`, also inside ``<title>`` and ``alt``.

Table cells are rounded as the commands' tables are: through the commands' own
:class:`~areamc.output.Column` lists (each value to two significant digits of its standard
error, :func:`~areamc.output.decimals_for`), after the same unit conversion
(:func:`~areamc.output.convert_rows`).
"""

from __future__ import annotations

import base64
import html
from dataclasses import dataclass, field
from typing import Iterable, Mapping, Sequence

from . import plots
from .output import ID_FIELDS, Column, convert_rows, legend, write_text

__all__ = [
    "CAUTION",
    "REACH_NOTE",
    "JOINT_NOTE",
    "Picture",
    "JobView",
    "area_picture",
    "integrate_picture",
    "multiplicity_picture",
    "map_picture",
    "bar_pictures",
    "render_report",
    "write_report",
    "outcome_view",
    "command_picture",
    "write_png",
]

#: The README's caution paragraph (README.md, "Caution"), word for word; a test holds the two together.
CAUTION = ("areamc's estimates support analysis. They do not replace surveys, regulatory coverage "
           "determinations or licensed professional practice. Where decisions affect safety (emergency "
           "response coverage, for instance), local codes and the responsible professionals decide.")
#: What a zone drawn round a facility point means.
REACH_NOTE = ("Reach circles are straight-line distances: each facility point's zone is a geodesic circle "
              "of its reach on the WGS84 ellipsoid, not a travel route or a travel time.")
#: How to read the verdicts: row by row, not jointly.
JOINT_NOTE = ("Each verdict is a result for its own row at confidence {confidence:g}, not jointly for all "
              "rows: each row on its own has a chance of at most {miss:g} of a wrong verdict, so among many "
              "rows a few wrong verdicts can be expected.")

#: At most this many ids are named in a claims summary cell (the rest are counted).
MAX_NAMED = 20


@dataclass(frozen=True)
class Picture:
    """A picture of a job's results: PNG bytes, a title and a caption (plain text, escaped when rendered)."""

    png: bytes
    title: str
    caption: str


def _unit_of_areas(rows: Sequence[dict], fields: Sequence[str], units: str) -> list[dict]:
    """Copies of `rows` with the area `fields` in `units` instead of m² (:func:`~areamc.output.convert_rows`)."""
    return convert_rows(rows, [Column(f, area=True) for f in fields], units)


def _by_feature(rows: Sequence[dict]) -> dict:
    out: dict = {}
    for row in rows:
        out.setdefault(row.get("feature_index"), []).append(row)
    return out


def _left_out(shown: int, total: int, what: str) -> str:
    return f" The first {shown} of {total} {what} are drawn." if total > shown else ""


def area_picture(rows: Sequence[dict], trace: Sequence[dict] = (), *, units: str, confidence: float) -> Picture:
    """The area job's picture: each feature's running estimate with its interval and its exact planar
    area (from the trace rows, areas m²), or, without a trace, the final estimates against the exact
    areas.  `units`: the area unit shown (m2, ha, km2, acre, mi2)."""
    rows = _unit_of_areas(rows, ("estimate", "ci_low", "ci_high", "exact_planar"), units)
    if trace:
        trace = _unit_of_areas(trace, ("estimate", "ci_low", "ci_high"), units)
        runs = _by_feature(trace)
        traces = []
        for r in rows:
            run = runs.get(r.get("feature_index"))
            if run:
                traces.append(plots.Trace(str(r["id"]), [t["points"] for t in run], [t["estimate"] for t in run],
                                          [t["ci_low"] for t in run], [t["ci_high"] for t in run],
                                          r.get("exact_planar")))
        png = plots.convergence(traces, unit=units)
        return Picture(png, "Convergence of each feature's area",
                       f"The running estimate of each feature's area in {units} against the points drawn, "
                       f"with its {confidence:g} interval as a band and the exact planar area (shapely, same "
                       "plane) as a dashed line." + _left_out(min(len(traces), plots.MAX_PANELS), len(traces),
                                                              "features"))
    png = plots.estimates_vs_exact([str(r["id"]) for r in rows], [r["estimate"] for r in rows],
                                   [r["ci_low"] for r in rows], [r["ci_high"] for r in rows],
                                   [r.get("exact_planar") for r in rows], unit=units)
    return Picture(png, "Estimates against exact areas",
                   f"This job kept no running trace, so instead of convergence traces each feature's final "
                   f"estimate and its {confidence:g} interval are shown against its exact planar area (shapely, "
                   "same plane): as a deviation in % of the exact area, or as areas where an exact area is "
                   "missing." + _left_out(min(len(rows), plots.MAX_BARS), len(rows), "features"))


def integrate_picture(rows: Sequence[dict], *, confidence: float) -> Picture:
    """The integrate job's picture: each region's total with its interval against the exact total
    (areal weighting or cell fractions) where there is one.  Totals are counts (e.g. persons)."""
    png = plots.estimates_vs_exact([str(r["id"]) for r in rows], [r["estimate"] for r in rows],
                                   [r["ci_low"] for r in rows], [r["ci_high"] for r in rows],
                                   [r.get("exact") for r in rows], unit="count")
    return Picture(png, "Totals against exact totals",
                   f"Each region's estimated total with its {confidence:g} interval against the exact total of "
                   "the density source (areal weighting of blocks, cell fractions of a raster): as a deviation "
                   "in % of the exact total, or as counts where an exact total is missing. The integrate job "
                   "keeps no running trace, so final estimates are shown." +
                   _left_out(min(len(rows), plots.MAX_BARS), len(rows), "regions"))


def multiplicity_picture(profile: Sequence[dict], *, units: str, confidence: float) -> Picture:
    """The overlap job's picture: area covered by exactly k zones for each k, with interval whiskers and
    exact areas (the shapely arrangement) where computed.  `profile`: the multiplicity rows, areas m²."""
    profile = _unit_of_areas(profile, ("area_exactly", "area_exactly_ci_low", "area_exactly_ci_high",
                                       "area_exactly_exact"), units)
    png = plots.multiplicity_histogram([p["k"] for p in profile], [p["area_exactly"] for p in profile],
                                       [p.get("area_exactly_ci_low") for p in profile],
                                       [p.get("area_exactly_ci_high") for p in profile],
                                       [p.get("area_exactly_exact") for p in profile], unit=units)
    return Picture(png, "Multiplicity: area covered by exactly k zones",
                   f"For each k, the area in {units} covered by exactly k zones, with its {confidence:g} interval "
                   "as whiskers and, as diamonds, the exact area from shapely's arrangement of the zones where "
                   "it was computed.")


def map_picture(rows: Sequence[dict], regions: Sequence[tuple[int, object]], zones: Sequence = (), *,
                lonlat: bool = False) -> Picture:
    """The coverage map: regions (``(feature_index, geometry)`` pairs) shaded by the share covered by
    at least the smallest k of `rows`, zones outlined over them.  Geometries in plane metres, or
    lon/lat degrees with `lonlat`."""
    ks = sorted({r["k"] for r in rows})
    k = ks[0] if ks else 1
    share = {r.get("feature_index"): r.get("share") for r in rows if r["k"] == k}
    ident = {r.get("feature_index"): str(r["id"]) for r in rows if r["k"] == k}
    zone_word = "zone" if k == 1 else "zones"
    png = plots.coverage_map([g for _, g in regions], [share.get(i) for i, _ in regions], zones,
                             ids=[ident.get(i, "") for i, _ in regions], lonlat=lonlat,
                             legend=f"share covered by at least {k} {zone_word}")
    where = "longitude and latitude (degrees)" if lonlat else "the job's equal-area plane (metres)"
    return Picture(png, f"Map: share of each region covered by at least {k} {zone_word}",
                   f"Each region is shaded by its estimated share covered by at least {k} {zone_word} (darker "
                   f"is more), the zones are outlined in orange, and regions are labelled by id; drawn in "
                   f"{where}.")


def bar_pictures(rows: Sequence[dict], *, claim: float | None, confidence: float) -> list[Picture]:
    """The coverage bars, one picture per k: each region's covered share of area and (with a density)
    of population, with interval whiskers, and the claim as a line."""
    out = []
    population = any(r.get("population_share") is not None for r in rows)
    for k in sorted({r["k"] for r in rows}):
        at_k = [r for r in rows if r["k"] == k]
        series = [plots.ShareSeries("area share", [r.get("share") for r in at_k], [r.get("ci_low") for r in at_k],
                                    [r.get("ci_high") for r in at_k])]
        if population:
            series.append(plots.ShareSeries("population share", [r.get("population_share") for r in at_k],
                                            [r.get("population_share_ci_low") for r in at_k],
                                            [r.get("population_share_ci_high") for r in at_k],
                                            plots.POPULATION_BAR))
        png = plots.share_bars([str(r["id"]) for r in at_k], series, claim=claim,
                               ylabel=f"share covered by at least {k}")
        what = "area and population" if population else "area"
        line = f" The red line is the claim, {claim:g}." if claim is not None else ""
        out.append(Picture(png, f"Covered share per region, at least {k} zone{'s' if k > 1 else ''}",
                           f"Each region's covered share of {what} with its {confidence:g} interval as "
                           f"whiskers.{line}" + _left_out(min(len(at_k), plots.MAX_BARS), len(at_k), "regions")))
    return out


# --- the page -----------------------------------------------------------------------------------

@dataclass(frozen=True)
class JobView:
    """What the report shows of one job.

    `rows` as the command hands them to its writers (areas m²; coverage rows with their
    ``population_*`` fields), `profile` overlap's multiplicity rows (areas m²), `trace` area's
    running estimates (areas m², empty when not kept), `columns`/`fields` the command's table
    columns and every field to convert (:class:`~areamc.output.Column`), `units` the area unit
    shown, `map_layers` for coverage ``(regions, zones)``: ``(feature_index, geometry)`` pairs and
    zone geometries, in plane metres (or lon/lat degrees with `lonlat`), `message` a failed job's
    one-line error, `notes` sentences shown under the job's facts (a map left out, and why).
    """

    name: str
    kind: str
    status: str
    seconds: float | None = None
    rows: tuple = ()
    metadata: Mapping = field(default_factory=dict)
    units: str = "km2"
    columns: tuple = ()
    fields: tuple = ()
    profile: tuple = ()
    trace: tuple = ()
    map_layers: tuple | None = None
    lonlat: bool = False
    message: str | None = None
    notes: tuple = ()


def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _png_uri(png: bytes) -> str:
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def _figure(picture: Picture, job: str) -> str:
    width, height = plots.png_size(picture.png)
    return (f'<figure><img src="{_png_uri(picture.png)}" width="{width}" height="{height}" '
            f'alt="{_e(job)}: {_e(picture.title)}"><figcaption><strong>{_e(picture.title)}.</strong> '
            f"{_e(picture.caption)}</figcaption></figure>")


def _is_number_column(cells: Iterable[str], name: str) -> bool:
    if name in ID_FIELDS:
        return False
    filled = [c for c in cells if c not in ("", "-")]
    return bool(filled) and all(c.replace(",", "").replace(".", "", 1).lstrip("-").isdigit()
                                or c in ("inf", "-inf", "nan") for c in filled)


def table_html(rows: Sequence[dict], columns: Sequence[Column], units: str, *, fields: Sequence[Column] = (),
               prefix: str = "", caption: str | None = None) -> str:
    """Rows (areas m²) as an HTML table of `columns`, areas in `units`, each cell rounded as the
    command's text table rounds it (:meth:`Column.cells`); with `prefix`, the legend of the
    shortened headings (:func:`~areamc.output.legend`) follows."""
    converted = convert_rows(rows, tuple(columns) + tuple(fields), units)
    body = [c.cells(converted) for c in columns]
    numeric = [_is_number_column(cells, c.field) for cells, c in zip(body, columns)]
    out = ["<table>"]
    if caption:
        out.append(f"<caption>{_e(caption)}</caption>")
    out.append("<thead><tr>" + "".join(f'<th{" class=num" if num else ""}>{_e(c.heading)}</th>'
                                       for c, num in zip(columns, numeric)) + "</tr></thead><tbody>")
    for n in range(len(rows)):
        out.append("<tr>" + "".join(f'<td{" class=num" if num else ""}>{_e(cells[n])}</td>'
                                    for cells, num in zip(body, numeric)) + "</tr>")
    out.append("</tbody></table>")
    note = legend(columns, prefix) if prefix else []
    if note:
        out.append(f'<p class="note">{_e(" ".join(line.strip() for line in note))}</p>')
    return "\n".join(out)


STYLE = """
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif;
       color: #1d2733; background: #ffffff; margin: 0; line-height: 1.45; }
main { max-width: 980px; margin: 0 auto; padding: 24px 28px 48px; }
h1 { font-size: 1.7em; margin: 0.2em 0 0.1em; }
h2 { font-size: 1.3em; margin-top: 2em; padding-bottom: 4px; border-bottom: 2px solid #c9d6e3; }
h3 { font-size: 1.05em; margin-top: 1.5em; }
.lede { color: #4a5866; margin-top: 0; }
.caution { border-left: 5px solid #b8860b; background: #fbf6e9; padding: 10px 16px; margin: 18px 0; }
.caution p { margin: 0.3em 0; }
dl.facts { display: grid; grid-template-columns: max-content 1fr; gap: 2px 16px; margin: 0; }
dl.facts dt { color: #4a5866; }
dl.facts dd { margin: 0; overflow-wrap: anywhere; }
table { border-collapse: collapse; margin: 10px 0 6px; font-size: 0.88em; }
caption { text-align: left; font-weight: 600; padding-bottom: 4px; }
th, td { padding: 3px 9px; border-bottom: 1px solid #e3e8ee; text-align: left; white-space: nowrap; }
th { background: #eef3f8; }
.num { text-align: right; font-variant-numeric: tabular-nums; }
td.ids { white-space: normal; min-width: 16em; }
td.short { color: #a11d27; font-weight: 600; }
td.undecided { color: #7a5b00; font-weight: 600; }
.tablewrap { overflow-x: auto; }
figure { margin: 16px 0; }
figure img { max-width: 100%; height: auto; border: 1px solid #e3e8ee; }
figcaption { font-size: 0.9em; color: #33414f; max-width: 860px; }
.note { font-size: 0.88em; color: #4a5866; }
.failed { color: #a11d27; font-weight: 600; }
"""


#: How each claim measure (``ClaimSummary.measure`` of :mod:`areamc.audit`) is named in the summary.
MEASURES = {"share": "area share", "population_share": "population share"}


def _claims_section(claims: Sequence) -> str:
    """The claims summary: one line per job, measure and k (``ClaimSummary`` records of :mod:`areamc.audit`)."""
    out = ['<section id="claims"><h2>Claims at a glance</h2>']
    if not claims:
        out.append("<p>The plan states no claims, so there are no verdicts to summarise.</p></section>")
        return "\n".join(out)
    for confidence in sorted({c.confidence for c in claims}):
        out.append("<p>" + _e(JOINT_NOTE.format(confidence=confidence, miss=round(1 - confidence, 10))) + "</p>")
    heads = "".join(f"<th class=num>{_e(h)}</th>" for h in ("met", "short", "undecided"))
    out.append('<div class="tablewrap"><table><thead><tr><th>job</th><th>measure</th><th class=num>k</th>'
               f"<th class=num>claim</th><th class=num>confidence</th>{heads}<th>rows short or undecided</th>"
               "</tr></thead><tbody>")
    for c in claims:
        counts = (f"<td class=num>{c.met}</td>"
                  f'<td class="num{" short" if c.short else ""}">{c.short}</td>'
                  f'<td class="num{" undecided" if c.undecided else ""}">{c.undecided}</td>')
        named = [*c.short_ids, *(f"{i} (undecided)" for i in c.undecided_ids)]
        text = ", ".join(named[:MAX_NAMED]) + (f" and {len(named) - MAX_NAMED} more" if len(named) > MAX_NAMED else "")
        out.append(f'<tr><td><a href="#{_anchor(c.job)}">{_e(c.job)}</a></td>'
                   f"<td>{_e(MEASURES.get(c.measure, c.measure))}</td><td class=num>{c.k}</td>"
                   f"<td class=num>{c.claim:g}</td><td class=num>{c.confidence:g}</td>{counts}"
                   f"<td class=ids>{_e(text or 'none')}</td></tr>")
    out.append("</tbody></table></div>")
    out.append('<p class="note">met: the row\'s confidence sequence lies wholly at or above the claim; short: it '
               "lies wholly below; undecided: it still straddles the claim when the points ran out. A share "
               "covered by at least k zones is judged for each k on its own line.</p>")
    out.append("</section>")
    return "\n".join(out)


def _anchor(name: str) -> str:
    """The in-page anchor of a job's section (a fragment, not a file)."""
    return "job-" + "".join(ch if ch.isascii() and (ch.isalnum() or ch in "-_") else "-" for ch in str(name))


def job_pictures(job: JobView) -> list[Picture]:
    """The pictures of one job, by kind (none for a job that did not finish)."""
    if job.status != "done" or not (job.rows or job.profile):
        return []
    confidence = job.metadata.get("confidence", 0.95)
    if job.kind == "area":
        return [area_picture(job.rows, job.trace, units=job.units, confidence=confidence)]
    if job.kind == "integrate":
        return [integrate_picture(job.rows, confidence=confidence)]
    if job.kind == "overlap":
        return [multiplicity_picture(job.profile, units=job.units, confidence=confidence)] if job.profile else []
    if job.kind == "coverage":
        out = []
        if job.map_layers is not None:
            out.append(map_picture(job.rows, job.map_layers[0], job.map_layers[1], lonlat=job.lonlat))
        claim = next((r.get("claim") for r in job.rows if r.get("claim") is not None), None)
        return out + bar_pictures(job.rows, claim=claim, confidence=confidence)
    return []


def _job_tables(job: JobView) -> list[str]:
    if not job.columns:
        return []
    out = [f'<div class="tablewrap">{table_html(job.rows, job.columns, job.units, fields=job.fields)}</div>']
    if job.kind == "coverage" and any(r.get("population_share") is not None for r in job.rows):
        from .cli.coverage import POPULATION_COLUMNS, POPULATION_PREFIX

        columns = POPULATION_COLUMNS
        if any(r.get("population_verdict") is not None for r in job.rows):
            columns = tuple(c for c in columns if c.field != "population_share_std_error")
            columns += (Column("population_verdict", "verdict"),)
        out.append('<div class="tablewrap">' + table_html(
            job.rows, columns, job.units, prefix=POPULATION_PREFIX,
            caption="Population (or other count) of each region and the share of it covered") + "</div>")
    if job.kind == "overlap" and job.profile:
        from .cli.overlap import PROFILE_COLUMNS, PROFILE_PREFIX

        out.append('<div class="tablewrap">' + table_html(
            job.profile, PROFILE_COLUMNS, job.units, prefix=PROFILE_PREFIX,
            caption=f"Multiplicity profile: area covered by exactly k and by at least k zones, in {job.units}") +
            "</div>")
    return out


def _job_section(job: JobView) -> str:
    out = [f'<section id="{_anchor(job.name)}"><h2>Job {_e(job.name)} <small>({_e(job.kind)})</small></h2>']
    facts = [("status", job.status)]
    if job.seconds is not None:
        facts.append(("time", f"{job.seconds:.1f} s"))
    command = job.metadata.get("command")
    if command:
        facts.append(("command", command))
    if job.metadata.get("confidence") is not None:
        facts.append(("confidence", f"{job.metadata['confidence']:g}"))
    if job.kind == "integrate":
        facts.append(("units", f"totals are counts; mean_density per {job.units}"))
    else:
        facts.append(("units", f"areas in {job.units}"))
    out.append('<dl class="facts">' + "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>" for k, v in facts) + "</dl>")
    if job.status != "done":
        out.append(f'<p class="failed">This job did not finish: {_e(job.message or job.status)}</p></section>')
        return "\n".join(out)
    caveat = job.metadata.get("caveat")
    if caveat:
        out.append(f'<p class="note">{_e(caveat)}</p>')
    out += [f'<p class="note">{_e(note)}</p>' for note in job.notes]
    out += [_figure(p, job.name) for p in job_pictures(job)]
    out += _job_tables(job)
    out.append("</section>")
    return "\n".join(out)


def render_report(title: str, jobs: Sequence[JobView], *, claims: Sequence = (),
                  facts: Sequence[tuple[str, str]] = ()) -> str:
    """The HTML page of an audit: the run's facts, the caution, the claims summary, then each job's
    pictures and tables.  Every argument's text is escaped; the page refers to no other file."""
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">',
           f"<title>{_e(title)}</title>", f"<style>{STYLE}</style></head><body><main>",
           f"<h1>{_e(title)}</h1>",
           '<p class="lede">Monte Carlo estimates on an equal-area plane, each with its confidence interval '
           "and checked against exact areas where they can be computed.</p>"]
    if facts:
        out.append('<dl class="facts">' + "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>" for k, v in facts) + "</dl>")
    out.append(f'<div class="caution" role="note"><p><strong>Caution.</strong> {_e(CAUTION)}</p>'
               f"<p>{_e(REACH_NOTE)}</p></div>")
    out.append(_claims_section(claims))
    out.append('<nav><h2>Jobs</h2><ul>' + "".join(
        f'<li><a href="#{_anchor(j.name)}">{_e(j.name)}</a> ({_e(j.kind)}): {_e(j.status)}</li>' for j in jobs)
        + "</ul></nav>")
    out += [_job_section(job) for job in jobs]
    out.append("</main></body></html>")
    return "\n".join(out) + "\n"


def outcome_view(name: str, kind: str, outcome, *, units: str, status: str = "done", seconds: float | None = None,
                 message: str | None = None) -> JobView:
    """The :class:`JobView` of a command's :class:`~areamc.cli.common.Outcome` (rows in m²): its rows,
    table columns, overlap's profile, area's trace (when kept) and, for coverage, the regions and zones
    on the job's plane for the map.  `units`: the area unit the job's tables use."""
    report = outcome.report
    profile = tuple(m.to_dict() for m in getattr(report, "multiplicity", ()))
    trace = tuple(t.to_dict() for t in report.trace_rows()) if getattr(report, "traces", ()) else ()
    map_layers = None
    if kind == "coverage" and len(outcome.layers) >= 2:
        regions, zones = outcome.layers[0], outcome.layers[1]
        map_layers = (tuple(zip(regions.source.indices, regions.planar)), tuple(zones.planar))
    return JobView(name, kind, status, seconds, tuple(outcome.rows), dict(outcome.metadata), units,
                   tuple(outcome.columns or outcome.screen.columns), tuple(outcome.screen.fields), profile, trace,
                   map_layers, False, message)


def command_picture(kind: str, outcome, *, units: str) -> Picture:
    """The picture a command's ``--plot FILE.png`` draws from its :class:`~areamc.cli.common.Outcome`:
    area: convergence traces (estimates against exact areas without a trace); integrate: totals
    against exact totals; coverage: the map; overlap: the multiplicity histogram."""
    view = outcome_view(kind, kind, outcome, units=units)
    confidence = view.metadata.get("confidence", 0.95)
    if kind == "area":
        return area_picture(view.rows, view.trace, units=units, confidence=confidence)
    if kind == "integrate":
        return integrate_picture(view.rows, confidence=confidence)
    if kind == "overlap":
        return multiplicity_picture(view.profile, units=units, confidence=confidence)
    if kind == "coverage":
        return map_picture(view.rows, *view.map_layers)
    raise ValueError(f"no picture for {kind!r}")


def write_png(png: bytes, path: str, *, batch=None) -> None:
    """Write PNG bytes to `path` atomically (a temporary file beside it, then a rename; with `batch`,
    when the batch commits)."""
    from contextlib import nullcontext

    from .output import OutputBatch

    with nullcontext(batch) if batch is not None else OutputBatch() as files:
        with files.staging(path) as tmp:
            with open(tmp, "wb") as handle:
                handle.write(png)


def write_report(path: str, audit, *, batch=None) -> None:
    """Write the report of an audit (an ``AuditResult`` of :mod:`areamc.audit`) to `path`, atomically
    (with `batch`, renamed into place when the batch commits)."""
    title, jobs, facts = audit_views(audit)
    write_text(render_report(title, jobs, claims=audit.claims, facts=facts), path, batch=batch)


def audit_views(audit) -> tuple[str, list[JobView], list[tuple[str, str]]]:
    """The title, the job views and the facts of an ``AuditResult`` (see :func:`write_report`).

    A coverage job's map needs its regions and zones: they are read again as the job read them
    (``areamc.audit.job_layers``, plane metres); if that fails (an input moved since), the map is
    left out and the section says why.
    """
    import os
    import warnings

    from . import __version__
    from .audit import job_columns, job_layers
    from .errors import AreamcError

    jobs = []
    for job in audit.jobs:
        done = job.status == "done"
        columns, fields = job_columns(job) if done else ((), ())
        map_layers, notes = None, ()
        if done and job.kind == "coverage":
            try:
                with warnings.catch_warnings():  # the job has shown the inputs' notes and warnings already
                    warnings.simplefilter("ignore")
                    layers = job_layers(job)
                map_layers = (tuple(zip(layers[0].source.indices, layers[0].planar)), tuple(layers[1].planar))
            except AreamcError as err:
                notes = (f"The map is left out: the job's inputs could not be read again ({err}).",)
        jobs.append(JobView(job.name, job.kind, job.status, job.seconds, tuple(job.rows), dict(job.metadata),
                            job.units, tuple(columns), tuple(fields), tuple(job.profile), tuple(job.trace),
                            map_layers, False, job.message, notes=notes))
    plan = audit.plan
    facts = [("plan", plan.path), ("plan SHA-256", plan.sha256), ("results folder", audit.out_dir),
             ("seed", str(plan.settings.get("seed", "fresh (see manifest.json)"))),
             ("started", audit.started), ("finished", audit.finished),
             ("ran on", audit.scheduler or "a local process pool"),
             ("claims", {"met": "every claim met", "short": "some row falls short", "undecided":
                         "none falls short, some undecided", "none": "the plan states no claim"}.get(
                             audit.gate, audit.gate)),
             ("areamc", __version__)]
    return f"areamc audit: {os.path.basename(plan.path)}", jobs, facts
