"""Tests of ``areamc.units``: area factors and distance parsing.

Expected values come from outside areamc:

* NIST Handbook 44, Appendix C (General Tables of Units of Measurement) and NIST SP 811
  (Thompson & Taylor 2008, Guide for the Use of the SI), [memory for the section numbers]:
  the international foot (1959) is exactly 0.3048 m, the international mile 5280 ft, the acre
  43 560 ft², the square mile 640 acres, the hectare 1 hm² = 10 000 m².  Hence, exactly,
  1 acre = 4046.856 422 4 m², 1 mi² = 2 589 988.110 336 m², 1 mi = 1609.344 m.
* The U.S. survey foot is 1200/3937 m (NIST Handbook 44, Appendix C [memory]); the survey
  acre differs from the international one by about 4 ppm, so the tests below can tell them apart.

Products such as 43 560 × 0.3048² are not exact in binary floating point; the checks allow a
relative error of 1e-15 (a few units in the last place), far below the 4 ppm survey/international gap.
"""

from __future__ import annotations

import math

import pytest

from areamc.errors import OptionError
from areamc.units import AREA_UNITS, DISTANCE_UNITS, area_factor, parse_distance

FLOAT_REL = 1e-15

# NIST Handbook 44, Appendix C: exact values in m² (decimal expansions of the definitions).
NIST_ACRE_M2 = 4046.8564224
NIST_SQUARE_MILE_M2 = 2_589_988.110336
NIST_MILE_M = 1609.344
SURVEY_FOOT_M = 1200 / 3937  # NIST Handbook 44, Appendix C [memory]


# --- area units ---------------------------------------------------------------------------------


def test_area_units__the_documented_set():
    assert set(AREA_UNITS) == {"m2", "ha", "km2", "acre", "mi2"}


def test_area_factor__square_metre__is_one():
    assert area_factor("m2") == 1.0


def test_area_factor__hectare__nist_sp_811():
    # NIST SP 811: 1 ha = 1 hm² = 10^4 m² (exact).
    assert area_factor("ha") == 10_000.0


def test_area_factor__square_kilometre__si_prefix():
    # (10^3 m)² = 10^6 m² (SI prefix rule, NIST SP 811).
    assert area_factor("km2") == 1_000_000.0


def test_area_factor__acre__nist_handbook_44():
    # 43 560 ft² × (0.3048 m/ft)² = 4046.856 422 4 m² exactly (NIST Handbook 44, Appendix C).
    assert area_factor("acre") == pytest.approx(NIST_ACRE_M2, rel=FLOAT_REL)


def test_area_factor__square_mile__nist_handbook_44():
    # (5280 ft × 0.3048 m/ft)² = 1609.344² m² = 2 589 988.110 336 m² exactly.
    assert area_factor("mi2") == pytest.approx(NIST_SQUARE_MILE_M2, rel=FLOAT_REL)


def test_area_factor__square_mile_is_640_acres__nist_handbook_44():
    # Handbook 44, Appendix C: 1 square mile = 640 acres.
    assert area_factor("mi2") / area_factor("acre") == pytest.approx(640.0, rel=FLOAT_REL)


def test_area_factor__acre__international_not_survey_foot():
    # The survey acre, 43 560 (1200/3937 m)², is about 4046.8726 m²: 4 ppm larger.  A factor
    # built on the wrong foot would fail here (the 1e-15 checks above would also catch it).
    survey_acre = 43_560 * SURVEY_FOOT_M**2
    assert survey_acre == pytest.approx(4046.8726, abs=1e-4)
    assert abs(area_factor("acre") / survey_acre - 1) > 3e-6


@pytest.mark.parametrize(
    "alias, unit",
    [("acres", "acre"), ("sqmi", "mi2"), ("m²", "m2"), ("km²", "km2"), ("mi²", "mi2")],
)
def test_area_factor__aliases__same_factor(alias, unit):
    assert area_factor(alias) == area_factor(unit)


@pytest.mark.parametrize("unit", ["furlong", "", "square feet", "hectare2", "km3"])
def test_area_factor__unknown_unit__option_error(unit):
    with pytest.raises(OptionError) as info:
        area_factor(unit)
    assert repr(unit) in str(info.value)  # the message names the value it refuses


# --- distances ------------------------------------------------------------------------------


def test_distance_units__nist_mile_and_kilometre():
    assert DISTANCE_UNITS["m"] == 1.0
    assert DISTANCE_UNITS["km"] == 1000.0
    assert DISTANCE_UNITS["mi"] == pytest.approx(NIST_MILE_M, rel=FLOAT_REL)


@pytest.mark.parametrize(
    "text, metres",
    [
        ("5km", 5_000.0),
        ("800m", 800.0),
        ("800", 800.0),  # a bare number is metres
        ("2.5 mi", 2.5 * NIST_MILE_M),  # 4023.36 m, NIST Handbook 44 mile
        ("3mi", 3 * NIST_MILE_M),
        ("  7 km  ", 7_000.0),
        ("1e3m", 1_000.0),
        ("1.5E2", 150.0),
        ("0.25km", 250.0),
        ("+4m", 4.0),
    ],
)
def test_parse_distance__values(text, metres):
    assert parse_distance(text) == pytest.approx(metres, rel=FLOAT_REL)


@pytest.mark.parametrize("text", ["5KM", "5Km", "3MI", "800M"])
def test_parse_distance__unit_case_insensitive(text):
    lower = parse_distance(text.lower())
    assert parse_distance(text) == lower


def test_parse_distance__non_string_number__metres():
    assert parse_distance(12.5) == 12.5


@pytest.mark.parametrize(
    "text",
    ["0", "0km", "-5km", "-1", "5 furlong", "5 ft", "abc", "", "km", "inf", "nan", "1e999", "5..5km", "5 k m"],
)
def test_parse_distance__bad_values__option_error(text):
    with pytest.raises(OptionError):
        parse_distance(text)


def test_parse_distance__result_is_finite_float():
    value = parse_distance("1e300km")  # 1e303 m, large but finite
    assert isinstance(value, float) and math.isfinite(value)
