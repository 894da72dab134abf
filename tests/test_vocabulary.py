"""One vocabulary: every command's options, JSON keys and table headings against docs/output.md.

The vocabulary table of docs/output.md ("Vocabulary") lists every concept once with its options,
its fields and its table headings.  These tests hold the program to it: an option, a JSON key or
a table heading that the table does not list fails, and so does a help line that names an option
its command does not have, or a default table wider than 100 columns (a terminal's width, common
practice).  The commands run on the invented sample county with few points: only names and widths
are checked here, not figures.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from areamc.cli import build_parser
from areamc.cli import area, coverage, integrate, overlap
from areamc.output import WIDTH, legend
from conftest import run_cli

ROOT = Path(__file__).resolve().parent.parent
GPKG = str(ROOT / "sample_data" / "vale_county.gpkg")
RASTER = str(ROOT / "sample_data" / "vale_population.tif")
FAST = ["-n", "2000", "--seed", "7"]
BLOCKS = ["--density", GPKG, "--density-layer", "blocks", "--count-field", "population"]
CLINICS = ["--zones-layer", "clinics", "--zones-id-field", "clinic_id", "--radius-field", "reach_m"]

#: Every command with the options that bring out its every table and field.
RUNS = {
    "area": ["area", GPKG, "--layer", "districts", "--id-field", "district_id", *FAST],
    "overlap": ["overlap", GPKG, "--zones-layer", "service_zones", "--zones-id-field", "zone_id", *FAST],
    "coverage": ["coverage", GPKG, GPKG, "--regions-layer", "districts", "--regions-id-field", "district_id",
                 *CLINICS, "--at-least", "1", "--at-least", "2", *FAST],
    "coverage-claim": ["coverage", GPKG, GPKG, "--regions-layer", "districts", "--regions-id-field", "district_id",
                       *CLINICS, *BLOCKS, "--claim", "0.6", *FAST],
    "integrate": ["integrate", GPKG, "--regions-layer", "districts", "--regions-id-field", "district_id", *BLOCKS,
                  *FAST],
    "integrate-raster": ["integrate", GPKG, "--regions-layer", "districts", "--density", RASTER, *FAST],
    "inspect": ["inspect", GPKG, "--layer", "districts"],
}


def _vocabulary() -> dict[str, set[str]]:
    """The options, fields and headings columns of the vocabulary table, as sets of names."""
    text = (ROOT / "docs" / "output.md").read_text(encoding="utf-8")
    section = text.split("## Vocabulary", 1)[1].split("\n## ", 1)[0]
    table = section.split("| concept | options | fields | headings |", 1)[1].split("\n\n", 1)[0]
    out = {"options": set(), "fields": set(), "headings": set()}
    for line in table.strip().splitlines()[1:]:
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        assert len(cells) == 4, line
        for key, cell in zip(("options", "fields", "headings"), cells[1:]):
            out[key] |= set(re.findall(r"`([^`]+)`", cell))
    return out


VOCABULARY = _vocabulary()


def _parsers() -> dict:
    parser = build_parser()
    sub = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    return dict(sub.choices)


PARSERS = _parsers()


def _flatten(doc: dict, prefix: str = "") -> set[str]:
    """Every key of a JSON result: top-level and nested keys as ``a.b``, row keys plainly."""
    keys = set()
    for key, value in doc.items():
        if key in ("results", "multiplicity"):
            keys.add(key)
            for row in value:
                keys |= set(row)
                for name, item in row.items():  # inspect's fields: a list of records
                    if isinstance(item, list) and item and isinstance(item[0], dict):
                        keys |= {f"{name}.{k}" for record in item for k in record}
            continue
        keys.add(prefix + key)
        if key in ("versions", "exact_status"):  # library names, and region ids
            continue
        if isinstance(value, dict):
            keys |= _flatten(value, prefix + key + ".")
        if isinstance(value, list) and value and isinstance(value[0], dict) and key in ("inputs",):
            for item in value:
                keys |= {f"{key}.{k}" for k in item}
    return keys


@pytest.fixture(scope="module")
def outputs(tmp_path_factory):
    """The table and the JSON document of every run, from one in-process run each."""
    import io
    from contextlib import redirect_stderr, redirect_stdout

    from areamc.cli import main

    results = {}
    for name, argv in RUNS.items():
        texts = []
        for extra in ([], ["--format", "json"]):
            out = io.StringIO()
            with redirect_stdout(out), redirect_stderr(io.StringIO()):
                assert main([*argv, *extra]) == 0, name
            texts.append(out.getvalue())
        results[name] = (texts[0], json.loads(texts[1]))
    return results


def test_every_option__is_in_the_vocabulary_and_every_listed_option_exists():
    seen = set()
    for name, parser in PARSERS.items():
        for action in parser._actions:
            for flag in action.option_strings:
                if flag.startswith("--"):
                    seen.add(flag)
                    assert flag in VOCABULARY["options"], f"{name} {flag} is not in docs/output.md's vocabulary"
    assert VOCABULARY["options"] <= seen, f"listed but no command has: {VOCABULARY['options'] - seen}"


@pytest.mark.parametrize("command", sorted(PARSERS))
def test_help__names_only_options_the_command_has(command):
    parser = PARSERS[command]
    own = {flag for action in parser._actions for flag in action.option_strings}
    texts = [parser.description or ""] + [action.help or "" for action in parser._actions]
    for text in texts:
        for flag in re.findall(r"(?<![\w-])--[a-z][a-z0-9-]*", text):
            assert flag in own, f"areamc {command} help mentions {flag}, which it does not have: {text!r}"


@pytest.mark.parametrize("command", sorted(PARSERS))
def test_help__plain_words_without_markup(command):
    parser = PARSERS[command]
    for text in [parser.description or ""] + [action.help or "" for action in parser._actions]:
        assert "``" not in text and ":func:" not in text and ":class:" not in text, text


@pytest.mark.parametrize("name", sorted(RUNS))
def test_json_keys__are_all_in_the_vocabulary(outputs, name):
    keys = _flatten(outputs[name][1])
    missing = keys - VOCABULARY["fields"] - {"units"}
    assert not missing, f"{name}: JSON keys not in docs/output.md's vocabulary: {sorted(missing)}"


#: Table columns the command modules define (every table a command prints).
TABLES = [
    (area.COLUMNS, ""), (area.TRACE_COLUMNS, ""), (overlap.COLUMNS, ""),
    (overlap.PROFILE_COLUMNS, overlap.PROFILE_PREFIX), (coverage.COLUMNS + coverage.WIDE_COLUMNS, ""),
    (coverage.POPULATION_COLUMNS, coverage.POPULATION_PREFIX), (integrate.COLUMNS + integrate.WIDE_COLUMNS, ""),
]


@pytest.mark.parametrize("columns, prefix", TABLES)
def test_table_headings__are_fields_or_fields_without_the_stated_prefix(columns, prefix):
    legend(columns, prefix)  # raises for any other kind of heading
    headings = [c.heading for c in columns]
    assert len(set(headings)) == len(headings), f"a heading repeats in one table: {headings}"
    for column in columns:
        assert column.field in VOCABULARY["fields"] | {"id"}, column.field
        assert column.heading in VOCABULARY["headings"] | {"hits", "points", "method", "region_points"}, column.heading


def _tables(text: str) -> list[list[str]]:
    """The heading row of every table in a command's output (the line above each dash line)."""
    lines = text.splitlines()
    return [lines[n - 1].split() for n, line in enumerate(lines) if line and set(line) <= {"-", " "} and n > 0]


@pytest.mark.parametrize("name", sorted(RUNS))
def test_printed_headings__are_in_the_vocabulary(outputs, name):
    tables = _tables(outputs[name][0])
    assert tables, outputs[name][0]
    for headings in tables:
        assert len(set(headings)) == len(headings), headings
        for heading in headings:
            assert heading in VOCABULARY["headings"], f"{name}: heading {heading!r} not in the vocabulary"


@pytest.mark.parametrize("name", sorted(RUNS))
def test_default_screen__fits_100_columns_but_for_the_plane_line(outputs, name):
    text = outputs[name][0]
    for line in text.splitlines():
        if line.startswith("  +proj"):  # the plane's PROJ string stands on a line of its own, whatever its length
            continue
        assert len(line) <= WIDTH, f"{name}: {len(line)} columns: {line!r}"


def test_units__default_km2_in_every_command(outputs):
    for name in ("area", "overlap", "coverage", "integrate"):
        assert outputs[name][1]["units"] == "km2", name


@pytest.mark.parametrize("name", ["coverage", "coverage-claim", "overlap"])
def test_caveat__in_json_and_the_footer_where_reach_or_claims(outputs, name):
    text, doc = outputs[name]
    reach = name != "overlap"  # the service zones are polygons; the clinic runs draw reach circles
    if reach:
        assert "straight-line" in doc["caveat"] and "local codes apply" in doc["caveat"]
        assert "caution: reach circles are straight-line" in text
    else:
        assert doc["caveat"] is None and "caution" not in text
    if name == "coverage-claim":
        assert "not a compliance determination" in doc["caveat"]
        assert "not jointly" in text and "at k = 1:" in text


def test_caveat__feature_file_carries_it_as_its_layer_description(tmp_path, capsys):
    import sqlite3

    out = tmp_path / "cov.gpkg"
    rc, _, err = run_cli(capsys, [*RUNS["coverage"], "--output", str(out)])
    assert rc == 0, err
    (description,) = sqlite3.connect(out).execute("select description from gpkg_contents").fetchone()
    assert description.startswith("caution: reach circles are straight-line")


def test_status_fields__are_short_tokens(outputs):
    doc = outputs["coverage-claim"][1]
    tokens = {r[k] for r in doc["results"] for k in ("verdict", "population_verdict", "interval", "stop_reason",
                                                     "population_method")}
    assert tokens and all(isinstance(t, str) and " " not in t for t in tokens), tokens


def test_numbers__rounded_to_two_digits_of_their_standard_error(outputs):
    """204.8743 with a standard error of 0.62 is shown as 204.87 (two significant digits of the error,
    Taylor & Kuyatt 1994, NIST TN 1297 §7 practice), and decimal points line up."""
    text, doc = outputs["area"]
    lines = text.splitlines()
    dash = next(n for n, line in enumerate(lines) if line.startswith("---"))
    heading = lines[dash - 1].split()
    rows = {r["id"]: r for r in doc["results"]}
    for line in lines[dash + 1: dash + 1 + len(rows)]:
        cells = dict(zip(heading, line.split()))
        row = rows[cells["id"]]
        se = row["std_error"]
        decimals = len(cells["estimate"].split(".")[1]) if "." in cells["estimate"] else 0
        first = -int(__import__("math").floor(__import__("math").log10(se)))
        assert decimals == max(0, first + 1), (cells, se)
        assert float(cells["estimate"].replace(",", "")) == pytest.approx(row["estimate"], abs=0.5 * 10 ** -decimals)
    column = [line.index(".") for line in lines[dash + 1: dash + 1 + len(rows)] if "." in line]
    assert len(set(column)) == 1  # the first decimal point of every row at the same place
    assert "-0.00" not in text


@pytest.mark.parametrize("argv, instead", [
    (["coverage", GPKG, GPKG, "--layer", "districts"], "--regions-layer or --zones-layer"),
    (["overlap", GPKG, "--id-field", "zone_id"], "--other-id-field or --zones-id-field"),
    (["integrate", GPKG, "--density", RASTER, "--input-crs", "EPSG:4326"], "--regions-input-crs"),
])
def test_plain_layer_options__in_a_command_with_several_inputs__name_the_ones_it_has(capsys, tmp_path, argv,
                                                                                   instead):
    from conftest import assert_refused

    assert_refused(capsys, argv, re.escape(instead), tmp_path)
