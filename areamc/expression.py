"""Safe arithmetic expressions over coordinate arrays, for density functions.

The text is parsed with :mod:`ast` and only a fixed set of node types is
evaluated, directly over numpy arrays: numbers, the coordinates of
:data:`VARIABLES` (``lon``, ``lat`` in degrees; ``east``, ``north`` in metres
from a named origin; ``x``, ``y`` in metres of the computation plane; see
:class:`areamc.density.ExpressionDensity` for how each is computed), ``pi``
and ``e``; the operators
``+ - * / ** %``, unary ``-`` and ``+``, comparisons (giving 1.0 or 0.0); and
calls of the functions in :data:`FUNCTIONS` with positional arguments.
Anything else (other names, attribute access, subscripts, lambdas, keyword
arguments, strings, comprehensions) is refused with a message pointing at
the offending part.  User text never reaches Python's ``eval`` or ``exec``.
"""

from __future__ import annotations

import ast
import operator
from dataclasses import dataclass
from typing import Callable

import numpy as np

from .errors import OptionError

__all__ = ["FUNCTIONS", "ARITY", "VARIABLES", "LONLAT_NAMES", "ORIGIN_NAMES", "PLANE_NAMES", "MAX_LENGTH", "MAX_DEPTH",
           "Expression", "parse_expression"]

FUNCTIONS: dict[str, Callable] = {
    "exp": np.exp,
    "log": np.log,
    "log10": np.log10,
    "sqrt": np.sqrt,
    "sin": np.sin,
    "cos": np.cos,
    "tan": np.tan,
    "arctan2": np.arctan2,
    "hypot": np.hypot,
    "abs": np.abs,
    "where": np.where,
    "minimum": np.minimum,
    "maximum": np.maximum,
    "clip": np.clip,
    "floor": np.floor,
    "ceil": np.ceil,
    "radians": np.radians,
    "degrees": np.degrees,
}
#: Positional arguments each function takes: (fewest, most).
ARITY: dict[str, tuple[int, int]] = {
    "exp": (1, 1), "log": (1, 1), "log10": (1, 1), "sqrt": (1, 1), "sin": (1, 1), "cos": (1, 1),
    "tan": (1, 1), "arctan2": (2, 2), "hypot": (2, 2), "abs": (1, 1), "where": (3, 3),
    "minimum": (2, 2), "maximum": (2, 2), "clip": (3, 3), "floor": (1, 1), "ceil": (1, 1),
    "radians": (1, 1), "degrees": (1, 1),
}
#: Longest expression text accepted, in characters, and deepest nesting of operations.
MAX_LENGTH = 2_000
MAX_DEPTH = 100
#: The coordinates an expression may use: ``lon``, ``lat`` (WGS84 degrees); ``east``, ``north``
#: (metres east and north of a named origin, on the Lambert azimuthal equal-area plane centred
#: there); ``x``, ``y`` (metres of the computation plane, from its own origin).
VARIABLES = ("lon", "lat", "east", "north", "x", "y")
#: The same, by kind.
LONLAT_NAMES = frozenset({"lon", "lat"})
ORIGIN_NAMES = frozenset({"east", "north"})
PLANE_NAMES = frozenset({"x", "y"})
CONSTANTS = {"pi": np.pi, "e": np.e}

_BINARY = {
    ast.Add: operator.add,
    ast.Sub: operator.sub,
    ast.Mult: operator.mul,
    ast.Div: operator.truediv,
    ast.Pow: operator.pow,
    ast.Mod: operator.mod,
}
_UNARY = {ast.USub: operator.neg, ast.UAdd: operator.pos}
_COMPARE = {
    ast.Lt: operator.lt,
    ast.LtE: operator.le,
    ast.Gt: operator.gt,
    ast.GtE: operator.ge,
    ast.Eq: operator.eq,
    ast.NotEq: operator.ne,
}
_DESCRIBE = {
    ast.Attribute: "attribute access",
    ast.Subscript: "subscripts",
    ast.Lambda: "lambdas",
    ast.Constant: "non-numeric constants",
    ast.ListComp: "comprehensions",
    ast.GeneratorExp: "comprehensions",
    ast.DictComp: "comprehensions",
    ast.SetComp: "comprehensions",
    ast.BoolOp: "'and'/'or' (use where() or multiplication of comparisons)",
    ast.IfExp: "'if ... else' (use where())",
    ast.NamedExpr: "assignment",
    ast.Starred: "starred arguments",
}


@dataclass(frozen=True)
class Expression:
    """A checked expression; call :meth:`evaluate` with coordinate arrays."""

    text: str
    tree: ast.Expression
    names: frozenset

    def evaluate(self, **variables: np.ndarray) -> np.ndarray:
        """Evaluate over coordinate arrays named as in :data:`VARIABLES` (those the expression uses, same shape)."""
        try:
            with np.errstate(all="ignore"):
                value = _eval(self.tree.body, variables)
        except (ArithmeticError, ValueError, TypeError, MemoryError) as err:  # numpy scalars rarely raise; be sure
            raise OptionError(f"{{param}}: expression {self.text!r} cannot be evaluated ({type(err).__name__}: "
                              f"{' '.join(str(err).split())[:120]})", param="density") from None
        shape = np.shape(next(iter(variables.values()))) if variables else ()
        return np.broadcast_to(np.asarray(value, dtype=float), shape).copy()

    @property
    def uses_lonlat(self) -> bool:
        """True when the expression uses ``lon`` or ``lat`` (degrees)."""
        return bool(self.names & LONLAT_NAMES)

    @property
    def uses_origin(self) -> bool:
        """True when the expression uses ``east`` or ``north`` (metres from a named origin)."""
        return bool(self.names & ORIGIN_NAMES)

    @property
    def uses_plane(self) -> bool:
        """True when the expression uses ``x`` or ``y`` (metres of the computation plane)."""
        return bool(self.names & PLANE_NAMES)


def _fail(text: str, node: ast.AST, what: str, verdict: str = "not allowed"):
    start = getattr(node, "col_offset", 0)
    end = getattr(node, "end_col_offset", start + 1) or start + 1
    part = text[start:end]
    raise OptionError(f"{{param}}: {what} {verdict} in expression {text!r}, at column {start + 1}: {part!r}", param="density")


def parse_expression(text: str) -> Expression:
    """Parse and check a density expression, or raise :class:`OptionError` naming the offending part."""
    text = " ".join(str(text).split())  # one line, so column offsets point into the quoted text
    if len(text) > MAX_LENGTH:
        raise OptionError(f"{{param}}: the expression is {len(text):,} characters long; at most {MAX_LENGTH:,} "
                          f"are accepted (it starts {text[:40]!r})", param="density")
    try:
        tree = ast.parse(text, mode="eval")
    except SyntaxError as err:
        col = (err.offset or 1)
        raise OptionError(f"{{param}}: syntax error in expression {text!r} at column {col}: {err.msg}", param="density") from None
    except (RecursionError, MemoryError):
        raise OptionError(f"{{param}}: the expression {text[:40]!r}... nests too deeply to read", param="density") from None
    depth = _depth(tree)
    if depth > MAX_DEPTH:
        raise OptionError(f"{{param}}: the expression {text[:40]!r}... nests {depth} operations deep; at most "
                          f"{MAX_DEPTH} (write long sums with fewer terms, or as a product)", param="density")
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, (ast.Expression, ast.Load)) or type(node) in _BINARY or type(node) in _UNARY or type(node) in _COMPARE:
            continue
        if isinstance(node, (ast.BinOp, ast.UnaryOp, ast.Compare)):
            op = node.op if not isinstance(node, ast.Compare) else None
            if op is not None and type(op) not in (_BINARY if isinstance(node, ast.BinOp) else _UNARY):
                _fail(text, node, f"operator {type(op).__name__}")
            continue
        if isinstance(node, ast.Constant):
            if isinstance(node.value, bool) or not isinstance(node.value, (int, float)):
                _fail(text, node, "non-numeric constants")
            continue
        if isinstance(node, ast.Name):
            if node.id in VARIABLES:
                names.add(node.id)
            elif node.id not in CONSTANTS and node.id not in FUNCTIONS:
                _fail(text, node, f"name {node.id!r}", f"unknown (allowed: {', '.join(VARIABLES)}, pi, e, functions)")
            continue
        if isinstance(node, ast.Call):
            if not isinstance(node.func, ast.Name) or node.func.id not in FUNCTIONS:
                _fail(text, node.func, "this call", f"not allowed (functions: {', '.join(FUNCTIONS)})")
            if node.keywords:
                _fail(text, node, "keyword arguments")
            fewest, most = ARITY[node.func.id]
            if not fewest <= len(node.args) <= most:
                wanted = f"{fewest}" if fewest == most else f"{fewest} to {most}"
                _fail(text, node, f"{node.func.id}() with {len(node.args)} argument(s)", f"refused ({wanted} expected)")
            continue
        _fail(text, node, _DESCRIBE.get(type(node), type(node).__name__))
    for node in ast.walk(tree):
        if isinstance(node, ast.Name) and node.id in FUNCTIONS and not _is_called(tree, node):
            _fail(text, node, f"function {node.id!r} used as a value")
    return Expression(text, tree, frozenset(names))


def _depth(tree: ast.AST) -> int:
    """Deepest nesting of nodes, walked without recursion."""
    deepest, stack = 0, [(tree, 1)]
    while stack:
        node, level = stack.pop()
        deepest = max(deepest, level)
        stack.extend((child, level + 1) for child in ast.iter_child_nodes(node))
    return deepest


def _is_called(tree: ast.AST, name: ast.Name) -> bool:
    return any(isinstance(n, ast.Call) and n.func is name for n in ast.walk(tree))


def _eval(node: ast.AST, env: dict):
    if isinstance(node, ast.Constant):
        return np.asarray(float(node.value))  # 0-d arrays: 1/0 and e**e**e**e give inf, not exceptions
    if isinstance(node, ast.Name):
        if node.id in env:
            return env[node.id]
        return np.asarray(CONSTANTS[node.id])
    if isinstance(node, ast.BinOp):
        return _BINARY[type(node.op)](_eval(node.left, env), _eval(node.right, env))
    if isinstance(node, ast.UnaryOp):
        return _UNARY[type(node.op)](_eval(node.operand, env))
    if isinstance(node, ast.Compare):
        left = _eval(node.left, env)
        result = True
        for op, comparator in zip(node.ops, node.comparators):
            right = _eval(comparator, env)
            result = np.logical_and(result, _COMPARE[type(op)](left, right))
            left = right
        return np.asarray(result, dtype=float)
    if isinstance(node, ast.Call):
        return FUNCTIONS[node.func.id](*[_eval(arg, env) for arg in node.args])
    raise OptionError(f"{{param}}: cannot evaluate {type(node).__name__}", param="density")  # unreachable after parse
