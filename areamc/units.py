"""Area and distance units.

areamc computes in square metres on an equal-area plane and in metres for
distances; this module converts at the edges (parsing options, formatting
output) and nowhere else.
"""

from __future__ import annotations

import re

from .errors import OptionError

__all__ = ["AREA_UNITS", "DISTANCE_UNITS", "area_factor", "distance_factor", "parse_distance"]

#: Square metres per unit.  The acre and the square mile are the international
#: (1959) definitions: 1 ft = 0.3048 m, 1 acre = 43 560 ft², 1 mi = 5280 ft
#: (NIST Handbook 44, Appendix C).
AREA_UNITS: dict[str, float] = {
    "m2": 1.0,
    "ha": 1.0e4,
    "km2": 1.0e6,
    "acre": 43560 * 0.3048**2,
    "mi2": (5280 * 0.3048) ** 2,
}

#: Metres per unit (international mile, NIST Handbook 44).
DISTANCE_UNITS: dict[str, float] = {"m": 1.0, "km": 1000.0, "mi": 5280 * 0.3048}

_ALIASES = {"acres": "acre", "sqmi": "mi2", "m²": "m2", "km²": "km2", "mi²": "mi2"}


def area_factor(unit: str) -> float:
    """Return the number of square metres in one `unit` (m2, ha, km2, acre, mi2)."""
    key = _ALIASES.get(unit, unit)
    try:
        return AREA_UNITS[key]
    except KeyError:
        raise OptionError(
            f"{{param}}: unknown area unit {unit!r}; choose one of {', '.join(AREA_UNITS)}", param="units"
        ) from None


def distance_factor(unit: str, param: str = "radius_unit") -> float:
    """Return the number of metres in one `unit` (m, km, mi); `param` names the option at fault."""
    try:
        return DISTANCE_UNITS[unit.lower()]
    except (KeyError, AttributeError):
        raise OptionError(
            f"{{param}}: unknown distance unit {unit!r}; choose one of {', '.join(DISTANCE_UNITS)}", param=param
        ) from None


_DISTANCE_RE = re.compile(r"^\s*([-+0-9.eE]+)\s*([a-zA-Z]*)\s*$")


def parse_distance(text: str, param: str = "radius_m") -> float:
    """Parse a distance such as ``"5km"``, ``"2.5 mi"`` or ``"800m"`` into metres.

    A bare number is read as metres.  Raises :class:`OptionError` for a
    malformed, unknown-unit or non-positive distance.
    """
    match = _DISTANCE_RE.match(str(text))
    if not match:
        raise OptionError(f"{{param}}: cannot read distance {text!r}; write e.g. 5km, 800m or 3mi", param=param)
    number, unit = match.groups()
    factor = distance_factor(unit or "m", param=param)
    try:
        value = float(number)
    except ValueError:
        raise OptionError(f"{{param}}: cannot read distance {text!r}", param=param) from None
    if not value > 0 or value == float("inf"):
        raise OptionError(f"{{param}}: distance must be positive and finite, got {text!r}", param=param)
    return value * factor
