"""Tests of ``areamc.expression``: safe density expressions over coordinate arrays.

Expected values come from numpy evaluating the same formula written out in this file
(numpy is the reference implementation of the functions the expression language exposes).
The refusal cases are the usual ways to escape a restricted evaluator (imports, attribute
and subscript access, lambdas, comprehensions, keyword arguments, builtins such as open,
eval and globals; common practice); each one must be refused with an OptionError whose
message quotes the offending part of the text and its column.
"""

from __future__ import annotations

import ast
import builtins
import re

import numpy as np
import pytest

from areamc.errors import OptionError
from areamc.expression import FUNCTIONS, Expression, parse_expression

RNG = np.random.default_rng(20240611)
X = RNG.uniform(-5.0, 5.0, 257)
Y = RNG.uniform(0.5, 9.0, 257)

#: Where the message says the offending part is: "at column N: '<part>'".
POINTER = re.compile(r"at column (\d+): (.+)$")


def pointed_part(message: str) -> tuple[int, str]:
    """(column, quoted part) from a refusal message."""
    match = POINTER.search(message)
    assert match, message
    return int(match.group(1)), ast.literal_eval(match.group(2))


# --- evaluation ------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "text, reference",
    [
        ("x**2 + 3*y", lambda x, y: x**2 + 3 * y),
        ("(x - 1) / (y + 2) % 3", lambda x, y: (x - 1) / (y + 2) % 3),
        ("-x + +y", lambda x, y: -x + y),
        ("exp(-(x**2 + y**2) / (2 * 3.5**2))", lambda x, y: np.exp(-(x**2 + y**2) / (2 * 3.5**2))),
        ("hypot(x, y) * sqrt(y)", lambda x, y: np.hypot(x, y) * np.sqrt(y)),
        ("arctan2(y, x) + pi", lambda x, y: np.arctan2(y, x) + np.pi),
        ("log(y) + log10(y) * e", lambda x, y: np.log(y) + np.log10(y) * np.e),
        ("where(x > 0, y, 0.5)", lambda x, y: np.where(x > 0, y, 0.5)),
        ("clip(x, -1, 2) + maximum(x, 0) - minimum(y, 3)", lambda x, y: np.clip(x, -1, 2) + np.maximum(x, 0) - np.minimum(y, 3)),
        ("abs(x) + floor(y) + ceil(x)", lambda x, y: np.abs(x) + np.floor(y) + np.ceil(x)),
        ("sin(radians(x)) + cos(y) + tan(x / 10) + degrees(1)", lambda x, y: np.sin(np.radians(x)) + np.cos(y) + np.tan(x / 10) + np.degrees(1)),
    ],
)
def test_evaluate__matches_numpy(text, reference):
    # reference: numpy evaluating the same formula (constructed here)
    expr = parse_expression(text)
    got = expr.evaluate(x=X, y=Y)
    assert got.shape == X.shape
    np.testing.assert_allclose(got, reference(X, Y), rtol=1e-15, atol=0)


def test_evaluate__comparisons_give_one_or_zero_and_chain():
    # a chained comparison a < b < c means (a < b) and (b < c), as in Python (language reference)
    got = parse_expression("0 < x < 2").evaluate(x=X, y=Y)
    np.testing.assert_array_equal(got, ((X > 0) & (X < 2)).astype(float))
    assert set(np.unique(got)) == {0.0, 1.0}
    eq = parse_expression("(x >= 1) * (y != 3) + (x <= -1) * 2 + (x == x)").evaluate(x=X, y=Y)
    np.testing.assert_array_equal(eq, (X >= 1) * (Y != 3) + (X <= -1) * 2.0 + 1.0)


def test_evaluate__constant_expression_broadcasts_to_the_points():
    got = parse_expression("2.5e-4").evaluate(x=X, y=Y)
    assert got.shape == X.shape and np.all(got == 2.5e-4)
    got[0] = -1.0  # a fresh array, not a read-only broadcast view
    assert got[0] == -1.0


def test_parse__names_and_lonlat_use():
    assert parse_expression("x * y").names == frozenset({"x", "y"})
    assert not parse_expression("x * y + pi").uses_lonlat
    assert parse_expression("cos(radians(lat)) + lon * 0").uses_lonlat
    assert parse_expression("  x  ").text == "x"
    assert isinstance(parse_expression("1"), Expression)


def test_evaluate__never_calls_python_eval_or_exec(monkeypatch):
    def forbidden(*_args, **_kwargs):
        raise AssertionError("user text reached eval/exec")

    monkeypatch.setattr(builtins, "eval", forbidden)
    monkeypatch.setattr(builtins, "exec", forbidden)
    got = parse_expression("x**2 + 3*y").evaluate(x=X, y=Y)
    np.testing.assert_allclose(got, X**2 + 3 * Y, rtol=1e-15)


def test_functions_table_is_numpy_only():
    # every callable the language exposes is a numpy ufunc or numpy function, never a builtin
    for name, func in FUNCTIONS.items():
        assert isinstance(func, np.ufunc) or func.__module__.startswith("numpy"), name
        assert func is not getattr(builtins, name, None), name


# --- refusals --------------------------------------------------------------------------------

#: (text, a piece that must lie inside the quoted offending part, what the message names)
HOSTILE = [
    ("__import__('os')", "__import__", "call"),
    ("os.system('x')", "os.system", "call"),
    ("x.real", "x.real", "attribute access"),
    ("x[0]", "x[0]", "subscripts"),
    ("lambda: 1", "lambda", "lambdas"),
    ("(lambda: 1)()", "lambda", "call"),
    ("exp(x, out=y)", "out=y", "keyword arguments"),
    ("[x for x in y]", "for x in y", "comprehensions"),
    ("'a'", "'a'", "non-numeric constants"),
    ("x if y else 1", "if y else", "'if ... else'"),
    ("open('f')", "open", "call"),
    ("eval('1')", "eval", "call"),
    ("globals()", "globals", "call"),
    ("2 * foo + x", "foo", "name 'foo' unknown"),
    ("exp(x).real", ".real", "attribute access"),
    ("x and y", "x and y", "'and'/'or'"),
    ("exp", "exp", "used as a value"),
    ("x // 2", "x // 2", "FloorDiv"),
    ("True + x", "True", "non-numeric constants"),
    ("(y := 2)", "y := 2", "assignment"),
    ("exp(*x)", "*x", "starred"),
    ("{x for x in y}", "for x in y", "comprehensions"),
    ("1j * x", "1j", "non-numeric constants"),
    ("x @ y", "x @ y", "MatMult"),
]


@pytest.mark.parametrize("text, part, what", HOSTILE)
def test_parse__hostile_expression_refused_with_pointer(text, part, what):
    with pytest.raises(OptionError) as info:
        parse_expression(text)
    message = str(info.value)
    # library messages name the Python parameter ("density: ..."), not a command-line flag
    assert message.startswith("density:") and info.value.param == "density"
    assert repr(text) in message  # the whole expression is quoted
    assert what in message
    column, shown = pointed_part(message)
    assert part in shown, (part, shown)
    # the column is where the quoted part starts in the text (1-based)
    assert text[column - 1 : column - 1 + len(shown)] == shown


def test_parse__hostile_call_is_never_executed(tmp_path, monkeypatch):
    # if the refused text ran, it would create this file (constructed here)
    target = tmp_path / "pwned"
    monkeypatch.chdir(tmp_path)
    for text in (f"__import__('os').system('touch {target}')", f"open('{target.name}', 'w')"):
        with pytest.raises(OptionError):
            parse_expression(text).evaluate(x=X, y=Y)
    assert not target.exists()


@pytest.mark.parametrize("text", ["x +* 2", "exp(x", "x y", "x; y", "", "   ", "1 +"])
def test_parse__syntax_error_names_column(text):
    with pytest.raises(OptionError, match=r"^density: syntax error in expression .* at column \d+") as info:
        parse_expression(text)
    assert info.value.param == "density"


def test_parse__unknown_name_lists_allowed_names():
    with pytest.raises(OptionError) as info:
        parse_expression("population * 2")
    message = str(info.value)
    assert "'population'" in message and "unknown" in message
    for allowed in ("x", "y", "lon", "lat", "pi"):
        assert allowed in message


def test_parse__pointer_in_multiline_expression():
    # text over several lines (as a shell may pass it): the pointer must still name the part
    with pytest.raises(OptionError) as info:
        parse_expression("(1 +\n x.real)")
    column, shown = pointed_part(str(info.value))
    assert shown == "x.real"
    assert "(1 + x.real)"[column - 1 : column - 1 + len(shown)] == shown


@pytest.mark.filterwarnings("ignore:Casting complex values")
@pytest.mark.parametrize("text", ["1/0 + x", "5 % 0 + x", "10**400 + x", "(-8)**0.5 + x"])
def test_evaluate__constant_arithmetic_follows_numpy(text):
    # numpy float64 semantics (IEEE 754): 1/0 = inf, 5 % 0 = nan, 10**400 = inf, (-8)**0.5 = nan
    got = parse_expression(text).evaluate(x=X, y=Y)
    assert got.shape == X.shape
    assert not np.isfinite(got).any()
