"""Tests of ``areamc.output``: number formatting, unit conversion, table/CSV/JSON rendering and
atomic file writing.

Expected values come from outside areamc:

* unit factors from NIST Handbook 44, Appendix C (1 ft = 0.3048 m exactly, acre = 43 560 ft²,
  mile = 5280 ft): 1 acre = 4046.856 422 4 m², 1 mi² = 2 589 988.110 336 m²; 1 ha = 10⁴ m²
  (NIST SP 811);
* CSV is read back with Python's ``csv`` module (its default 'excel' dialect) and JSON with Python's
  ``json`` module, with NaN/Infinity literals refused (RFC 8259 has no non-finite numbers);
* thousands separators as in Python's format mini-language (PEP 378, comma grouping);
* file modes: a new file gets 0o666 & ~umask (POSIX open(2)/creat, common practice).
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import stat

import pytest

from areamc.errors import OptionError
from areamc.output import Column, check_output_path, convert_rows, format_number, render, render_fields, write_text

NIST_ACRE_M2 = 4046.8564224  # NIST Handbook 44, Appendix C
NIST_SQUARE_MILE_M2 = 2_589_988.110336  # NIST Handbook 44, Appendix C
HECTARE_M2 = 10_000.0  # NIST SP 811
NIST_FACTORS = {"m2": 1.0, "ha": HECTARE_M2, "km2": 1e6, "acre": NIST_ACRE_M2, "mi2": NIST_SQUARE_MILE_M2}


def strict_json(text: str):
    """json.loads that fails on the NaN / Infinity extensions (not JSON per RFC 8259)."""

    def refuse(token):
        raise ValueError(f"non-standard JSON constant {token}")

    return json.loads(text, parse_constant=refuse)


def leftovers(folder) -> list[str]:
    return sorted(name for name in os.listdir(folder) if name.startswith(".areamc-"))


# --- format_number -------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "value, text",
    [
        (None, "-"),
        (True, "yes"),
        (False, ""),
        (0, "0"),
        (7, "7"),
        (1_234_567, "1,234,567"),  # whole numbers in full with comma grouping (PEP 378)
        (-20_000, "-20,000"),
        (0.0, "0"),
        (float("nan"), "nan"),
        (float("inf"), "inf"),
        (float("-inf"), "-inf"),
        (5415.8137, "5,415.814"),
        (922.62654, "922.6265"),
        (-1234.56789, "-1,234.568"),
        (2_125_847_264.4, "2,125,847,264"),
        (0.5, "0.5"),
        (0.0630101, "0.0630101"),
        (1.198562e-4, "1.198562e-04"),
        (1e15, "1.000000e+15"),
        ("R01", "R01"),
    ],
)
def test_format_number__cases(value, text):
    assert format_number(value) == text


@pytest.mark.parametrize(
    "value",
    [1.0, 3.14159265358979, 12.3456789, 999.99949, 65_432.198765, 1_234_567.89, 98_765_432.1, 7.654321e13, 0.0012345678, 0.98765432],
)
def test_format_number__round_trip_within_7_significant_digits(value):
    # Parse the text back (commas removed): the error is at most half a unit of the 7th
    # significant digit (6th for values below 1, which use Python's 'g' format with 6 digits).
    parsed = float(format_number(value).replace(",", ""))
    digits = 7 if abs(value) >= 1 else 6
    unit = 10.0 ** (math.floor(math.log10(abs(value))) + 1 - digits)
    assert abs(parsed - value) <= 0.5 * unit * (1 + 1e-9)


def test_format_number__grouping_parses_with_locale_free_rule():
    # Every group after the first has exactly 3 digits (PEP 378).
    text = format_number(123_456_789.0)
    integer = text.split(".")[0]
    groups = integer.split(",")
    assert all(len(g) == 3 for g in groups[1:]) and 1 <= len(groups[0]) <= 3
    assert int("".join(groups)) == 123_456_789


# --- Column --------------------------------------------------------------------------------------


def test_column__defaults():
    column = Column("estimate")
    assert column.heading == "estimate" and not column.area and not column.per_area and column.spec is None
    assert Column("at_least", "k").heading == "k"


def test_column__spec_applies_to_finite_floats_only():
    share = Column("share", spec=".4f")
    assert share.text(0.517349) == "0.5173"
    assert share.text(float("nan")) == "nan"
    assert share.text(None) == "-"
    assert share.text(3) == "3"  # ints are not floats: plain formatting
    assert Column("x").text(0.517349) == "0.517349"


# --- convert_rows --------------------------------------------------------------------------------

COLUMNS = [
    Column("id"),
    Column("estimate", area=True),
    Column("ci_low", area=True),
    Column("mean_density", per_area=True),
    Column("share"),
    Column("flagged"),
]


@pytest.mark.parametrize("unit", sorted(NIST_FACTORS))
def test_convert_rows__area_divided_per_area_multiplied(unit):
    factor = NIST_FACTORS[unit]
    rows = [{"id": "a", "estimate": 5_000_000.0, "ci_low": 4_900_000, "mean_density": 2.5e-4, "share": 0.25, "flagged": True}]
    (out,) = convert_rows(rows, COLUMNS, unit)
    assert out["estimate"] == pytest.approx(5_000_000.0 / factor, rel=1e-14)
    assert out["ci_low"] == pytest.approx(4_900_000 / factor, rel=1e-14)
    assert out["mean_density"] == pytest.approx(2.5e-4 * factor, rel=1e-14)
    # A count is unit-free: density × area is the same before and after conversion.
    assert out["estimate"] * out["mean_density"] == pytest.approx(5_000_000.0 * 2.5e-4, rel=1e-14)
    # Not area columns, booleans and strings are left alone.
    assert out["share"] == 0.25 and out["flagged"] is True and out["id"] == "a"


def test_convert_rows__one_acre_in_m2_is_one_acre():
    (out,) = convert_rows([{"estimate": NIST_ACRE_M2, "mean_density": 1 / NIST_ACRE_M2}], COLUMNS, "acre")
    assert out["estimate"] == pytest.approx(1.0, rel=1e-15)
    assert out["mean_density"] == pytest.approx(1.0, rel=1e-15)


def test_convert_rows__aliases_and_missing_values():
    rows = [{"estimate": 2 * NIST_SQUARE_MILE_M2, "ci_low": None}, {"id": "b"}]
    out = convert_rows(rows, COLUMNS, "sqmi")
    assert out[0]["estimate"] == pytest.approx(2.0, rel=1e-15)
    assert out[0]["ci_low"] is None
    assert out[1] == {"id": "b"}


def test_convert_rows__booleans_in_area_column_not_scaled():
    (out,) = convert_rows([{"estimate": True}], COLUMNS, "ha")
    assert out["estimate"] is True


def test_convert_rows__input_rows_unchanged():
    rows = [{"estimate": 10_000.0}]
    out = convert_rows(rows, COLUMNS, "ha")
    assert rows == [{"estimate": 10_000.0}] and out == [{"estimate": 1.0}]
    assert out[0] is not rows[0]


def test_convert_rows__unknown_unit__option_error():
    with pytest.raises(OptionError):
        convert_rows([{"estimate": 1.0}], COLUMNS, "furlong2")


# --- render: table -------------------------------------------------------------------------------

TABLE_COLUMNS = [Column("id"), Column("estimate", area=True), Column("points"), Column("flagged", "flag")]
TABLE_ROWS = [
    {"id": "R01", "estimate": 54_158_137.0, "points": 20_000, "flagged": False, "hits": 3},
    {"id": "LONGER_ID", "estimate": 9_226_265.4, "points": 5, "flagged": True, "hits": 4},
    {"id": "R3", "estimate": None, "points": 1_000_000, "flagged": False, "hits": 5},
]


def spans(dash_line: str) -> list[tuple[int, int]]:
    """Column spans (start, end) read off the dash line under the headings."""
    out, start = [], None
    for i, ch in enumerate(dash_line + " "):
        if ch == "-" and start is None:
            start = i
        elif ch != "-" and start is not None:
            out.append((start, i))
            start = None
    return out


def test_render_table__heading_dashes_alignment_and_units():
    text = render(TABLE_ROWS, TABLE_COLUMNS, fmt="table", units="ha", metadata={}, header=["top line"], footer=["", "note"])
    assert text.endswith("\n")
    lines = text.rstrip("\n").split("\n")
    assert lines[0] == "top line" and lines[-2:] == ["", "note"]
    heading, dashes, *body = lines[1:-2]
    # Dash line: one run of dashes per column, two spaces apart, as wide as the widest cell.
    assert set(dashes) <= {"-", " "} and "   " not in dashes
    columns = spans(dashes)
    assert len(columns) == 4 and all(b2 - a1 == 2 for (_, a1), (b2, _) in zip(columns, columns[1:]))
    expected = [
        ["R01", "5,415.814 ", "20,000", ""],  # 54 158 137 m² = 5415.8137 ha (NIST SP 811)
        ["LONGER_ID", "  922.6265", "5", "yes"],  # decimal points aligned
        ["R3", "    -     ", "1,000,000", ""],
    ]
    headings = ["id", "estimate", "points", "flag"]
    for (a, b), cells in zip(columns, zip(headings, *expected)):
        assert b - a == max(len(c) for c in cells)
    for line, cells in zip([heading] + body, [headings] + expected):
        padded = line.ljust(columns[-1][1])
        for i, ((a, b), cell) in enumerate(zip(columns, cells)):
            field = padded[a:b]
            if i in (0, 3):
                assert field == cell.ljust(b - a)  # text columns (ids, yes/blank) left-aligned
            else:
                assert field == cell.rjust(b - a)  # numbers right-aligned, decimal points lined up
            if a > 0:
                assert padded[a - 2 : a] == "  "
        assert line == line.rstrip()  # no trailing blanks
    assert len(body) == 3
    assert "hits" not in text  # the table shows only its columns


def test_render_table__no_rows_has_heading_and_dashes():
    text = render([], [Column("id"), Column("estimate")], fmt="table", units="m2", metadata={})
    assert text == "id  estimate\n--  --------\n"


# --- render: csv -----------------------------------------------------------------------------


def test_render_csv__parsed_by_csv_module():
    rows = [
        {"id": "a, \"quoted\"", "estimate": 12_345.678901234567, "mean_density": 1e-4, "z": float("inf"), "flagged": True, "exact": None},
        {"id": "b", "estimate": 1.0, "mean_density": 0.0, "z": float("nan"), "flagged": False, "exact": 2.0},
    ]
    columns = [Column("id"), Column("estimate", area=True), Column("mean_density", per_area=True)]
    text = render(rows, columns, fmt="csv", units="acre", metadata={"ignored": 1})
    assert text.endswith("\n") and "\r" not in text
    parsed = list(csv.DictReader(io.StringIO(text)))
    assert list(parsed[0]) == ["id", "estimate", "mean_density", "z", "flagged", "exact"]  # every field, in row order
    assert len(parsed) == 2
    assert parsed[0]["id"] == 'a, "quoted"'  # quoting survives the round trip
    # Full precision: areas divided by the NIST acre, densities multiplied.
    assert float(parsed[0]["estimate"]) == pytest.approx(12_345.678901234567 / NIST_ACRE_M2, rel=1e-15)
    assert float(parsed[0]["estimate"]) == convert_rows(rows, columns, "acre")[0]["estimate"]  # repr round trip
    assert float(parsed[0]["mean_density"]) == pytest.approx(1e-4 * NIST_ACRE_M2, rel=1e-15)
    assert parsed[0]["z"] == "inf" and math.isnan(float(parsed[1]["z"]))
    assert parsed[0]["flagged"] == "True" and parsed[1]["flagged"] == "False"
    assert parsed[0]["exact"] == "" and float(parsed[1]["exact"]) == 2.0  # exact is not an area column here


def test_render_csv__no_rows__header_of_the_columns():
    text = render([], [Column("id"), Column("estimate", area=True)], fmt="csv", units="ha", metadata={})
    assert list(csv.reader(io.StringIO(text))) == [["id", "estimate"]]


# --- render: json ----------------------------------------------------------------------------


def test_render_json__parsed_by_json_module():
    rows = [
        {"id": "a", "estimate": 2 * NIST_SQUARE_MILE_M2, "z": float("nan"), "hi": float("inf"), "lo": float("-inf"), "flagged": False, "exact": None},
    ]
    metadata = {"tool": "areamc", "stop": {"points": None, "tolerance_abs_m2": float("nan")}, "seeds": [1, float("inf")]}
    text = render(rows, [Column("id"), Column("estimate", area=True)], fmt="json", units="mi2", metadata=metadata)
    document = strict_json(text)  # no NaN/Infinity literals
    assert list(document) == ["tool", "stop", "seeds", "units", "results"]
    assert document["units"] == "mi2"
    (row,) = document["results"]
    assert row["estimate"] == pytest.approx(2.0, rel=1e-15)  # NIST Handbook 44 square mile
    assert row["z"] is None and row["hi"] == "inf" and row["lo"] == "-inf"
    assert row["flagged"] is False and row["exact"] is None and row["id"] == "a"
    # nested metadata is made safe too, and is not unit-converted
    assert document["stop"] == {"points": None, "tolerance_abs_m2": None}
    assert document["seeds"] == [1, "inf"]
    assert metadata["stop"]["tolerance_abs_m2"] != metadata["stop"]["tolerance_abs_m2"]  # input untouched (NaN)


def test_render_json__empty_results():
    document = strict_json(render([], [Column("id")], fmt="json", units="ha", metadata={"tool": "areamc"}))
    assert document == {"tool": "areamc", "units": "ha", "results": []}


def test_render__unknown_format__option_error():
    with pytest.raises(OptionError):
        render([], [Column("id")], fmt="xml", units="m2", metadata={})


# --- render_fields ---------------------------------------------------------------------------

LABELS = {"path": "file", "layers": "layers in file", "features": "features", "total": "total exact planar area", "types": "geometry types", "crs": "CRS"}


def test_render_fields__aligned_labels_and_values():
    record = {"path": "x.gpkg", "layers": ["a", "b"], "features": 8, "total": 2_125_847_264.0, "types": {"Polygon": 7, "MultiPolygon": 1}, "crs": None}
    text = render_fields(record, LABELS, ["total"], "m2")
    lines = text.rstrip("\n").split("\n")
    assert len(lines) == len(LABELS) and text.endswith("\n")
    width = max(len(label) for label in LABELS.values()) + 1  # "label:" padded to the longest
    for line, label in zip(lines, LABELS.values()):
        assert line.startswith(label + ":")
        assert line[width] == " " and line[width + 1] != " "  # every value starts in the same column
    values = {label: line[width + 1 :] for line, label in zip(lines, LABELS.values())}
    assert values["file"] == "x.gpkg"
    assert values["layers in file"] == "a, b"
    assert values["features"] == "8"
    assert values["total exact planar area"] == "2,125,847,264 m2"
    assert values["geometry types"] == "Polygon 7, MultiPolygon 1"
    assert values["CRS"] == "-"


@pytest.mark.parametrize("unit", ["ha", "km2", "acre", "mi2"])
def test_render_fields__area_field_converted(unit):
    record = {"total": 2_125_847_264.0}
    line = render_fields(record, {"total": "total"}, ["total"], unit).rstrip("\n")
    number, shown_unit = line.split(": ", 1)[1].rsplit(" ", 1)
    assert shown_unit == unit
    # parsed back and multiplied by the NIST factor: the area to 7 significant digits
    assert float(number.replace(",", "")) * NIST_FACTORS[unit] == pytest.approx(2_125_847_264.0, rel=5e-7)


def test_render_fields__empty_list_and_dict_are_dashes():
    text = render_fields({"a": [], "b": {}}, {"a": "a", "b": "b"}, [], "m2")
    assert text == "a: -\nb: -\n"


# --- check_output_path -----------------------------------------------------------------------


def test_check_output_path__none_and_existing_folder_accepted(tmp_path):
    assert check_output_path(None, [str(tmp_path / "in.gpkg")]) is None
    (tmp_path / "in.gpkg").write_bytes(b"x")
    assert check_output_path(str(tmp_path / "out.csv"), [str(tmp_path / "in.gpkg")]) is None


def test_check_output_path__missing_folder__option_error(tmp_path):
    with pytest.raises(OptionError):
        check_output_path(str(tmp_path / "no_such_folder" / "out.csv"))


def test_check_output_path__equal_to_input__option_error(tmp_path):
    source = tmp_path / "in.gpkg"
    source.write_bytes(b"x")
    with pytest.raises(OptionError):
        check_output_path(str(source), ["other.gpkg", str(source)])


def test_check_output_path__same_file_spelled_differently__option_error(tmp_path, monkeypatch):
    source = tmp_path.resolve() / "data" / "in.gpkg"  # resolved: os.getcwd() returns real paths
    source.parent.mkdir()
    source.write_bytes(b"x")
    monkeypatch.chdir(tmp_path)
    with pytest.raises(OptionError):
        check_output_path("data/../data/./in.gpkg", [str(source)])
    with pytest.raises(OptionError):
        check_output_path(str(source), ["data/in.gpkg"])


@pytest.mark.parametrize("alias", ["linked_file", "linked_folder"])
def test_check_output_path__input_through_symlink__option_error(tmp_path, alias):
    real = tmp_path / "real"
    real.mkdir()
    target = real / "in.gpkg"
    target.write_bytes(b"input data")
    if alias == "linked_file":
        (tmp_path / "link.gpkg").symlink_to(target)
        source = tmp_path / "link.gpkg"
    else:
        (tmp_path / "link").symlink_to(real, target_is_directory=True)
        source = tmp_path / "link" / "in.gpkg"
    assert os.path.samefile(source, target)  # the same file (os.path.samefile, independent check)
    with pytest.raises(OptionError):
        check_output_path(str(target), [str(source)])


# --- write_text ------------------------------------------------------------------------------


def test_write_text__exact_content_and_overwrite(tmp_path):
    path = tmp_path / "out.csv"
    path.write_text("old content that is longer than the new one\n")
    text = "id,area\r\na,1.5\nm² ü\n"
    write_text(text, str(path))
    assert path.read_bytes() == text.encode("utf-8")  # newlines untouched, UTF-8
    assert leftovers(tmp_path) == []


@pytest.mark.parametrize("umask", [0o022, 0o077, 0o002])
def test_write_text__mode_follows_umask(tmp_path, umask):
    path = tmp_path / "out.json"
    old = os.umask(umask)
    try:
        write_text("{}\n", str(path))
    finally:
        os.umask(old)
    assert stat.S_IMODE(path.stat().st_mode) == 0o666 & ~umask


def test_write_text__encoding_error__no_temp_file_and_old_file_kept(tmp_path):
    path = tmp_path / "out.csv"
    path.write_text("previous\n")
    with pytest.raises(UnicodeEncodeError):
        write_text("ok so far\n" + "\ud800", str(path))  # a lone surrogate cannot be UTF-8 encoded
    assert leftovers(tmp_path) == []
    assert path.read_text() == "previous\n"


def test_write_text__new_file_failure__nothing_created(tmp_path):
    path = tmp_path / "new.csv"
    with pytest.raises(UnicodeEncodeError):
        write_text("\udfff", str(path))
    assert os.listdir(tmp_path) == []


def test_write_text__rename_fails__no_temp_file(tmp_path):
    target = tmp_path / "out.csv"
    target.mkdir()
    (target / "keep").write_text("x")  # a non-empty folder cannot be replaced by a file
    with pytest.raises(OSError):
        write_text("a,b\n", str(target))
    assert leftovers(tmp_path) == []
    assert (target / "keep").read_text() == "x"


def test_write_text__interrupted__no_temp_file(tmp_path, monkeypatch):
    def interrupted(src, dst):
        raise KeyboardInterrupt

    monkeypatch.setattr(os, "replace", interrupted)
    with pytest.raises(KeyboardInterrupt):
        write_text("a,b\n", str(tmp_path / "out.csv"))
    monkeypatch.undo()
    assert os.listdir(tmp_path) == []


def test_write_text__missing_folder__error_and_nothing_written(tmp_path):
    with pytest.raises(FileNotFoundError):
        write_text("x", str(tmp_path / "missing" / "out.csv"))
    assert os.listdir(tmp_path) == []
