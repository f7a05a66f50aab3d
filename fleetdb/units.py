"""Pressure and vacuum units: exact factors to SI, parsing of typed values.

Inside fleetdb every pressure is kPa: gauge kPa for compression, kPa below ambient
for vacuum. Leak-down and relative compression are percent. What the user typed is
always stored beside the SI value, so nothing is re-rounded.

Factors (NIST SP 811, App. B.8, exact from the definitions):
1 psi = 0.45359237 kg * 9.80665 m/s^2 / (0.0254 m)^2; 1 inHg and 1 mmHg use the
conventional mercury density 13 595.1 kg/m^3 (ISO 80000-3 basis).
"""

from __future__ import annotations

import math
import re
from fractions import Fraction

from fleetdb.errors import InvalidValue

_G_N = Fraction("9.80665")  # standard gravity, m/s^2, exact
_LB = Fraction("0.45359237")  # kg, exact
_INCH = Fraction("0.0254")  # m, exact
_HG_CONV = Fraction("13595.1")  # kg/m^3, conventional mercury density

#: Pascals per unit, as exact fractions.
PA_PER_UNIT_EXACT: dict[str, Fraction] = {
    "Pa": Fraction(1),
    "kPa": Fraction(1000),
    "MPa": Fraction(1_000_000),
    "bar": Fraction(100_000),
    "psi": _LB * _G_N / _INCH**2,
    "inHg": _INCH * _HG_CONV * _G_N,
    "mmHg": Fraction("0.001") * _HG_CONV * _G_N,
}

#: kPa per unit as floats, the factors used in computation.
KPA_PER_UNIT: dict[str, float] = {u: float(f / 1000) for u, f in PA_PER_UNIT_EXACT.items()}

PRESSURE_UNITS = ("psi", "kPa", "bar", "MPa")
VACUUM_UNITS = ("inHg", "mmHg", "kPa")
PERCENT = "%"
#: Units accepted in import files and forms.
INPUT_UNITS = ("psi", "kPa", "bar", "MPa", "inHg", "mmHg", "%")
#: Units a user may ask output in.
DISPLAY_UNITS = ("psi", "kPa", "bar")

_ALIASES = {
    "psi": "psi", "psig": "psi", "lb/in2": "psi",
    "kpa": "kPa", "mpa": "MPa", "bar": "bar",
    "inhg": "inHg", "in hg": "inHg", '"hg': "inHg",
    "mmhg": "mmHg", "mm hg": "mmHg", "torr": "mmHg",
    "%": "%", "pct": "%", "percent": "%",
}


def canonical_unit(text: str) -> str:
    """Return the canonical spelling of a unit name, or raise InvalidValue.

    :param text: what the user typed, e.g. ``"PSI"`` or ``"inhg"``.
    """
    key = text.strip().lower()
    if key not in _ALIASES:
        raise InvalidValue(f"unknown unit {text!r}; expected one of {', '.join(INPUT_UNITS)}")
    return _ALIASES[key]


def to_kpa(value: float, unit: str) -> float:
    """Convert a pressure or vacuum value in ``unit`` to kPa.

    :param value: the number as typed.
    :param unit: a canonical unit (see :data:`INPUT_UNITS`, except ``%``).
    """
    return value * KPA_PER_UNIT[unit]


def from_kpa(value_kpa: float, unit: str) -> float:
    """Convert kPa to ``unit``.

    :param value_kpa: a pressure in kPa.
    :param unit: a canonical pressure unit.
    """
    return value_kpa / KPA_PER_UNIT[unit]


_VALUE_RE = re.compile(
    r"^\s*([-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?)\s*([A-Za-z%\"/ 2]*)\s*$"
)


def parse_quantity(text: str, default_unit: str | None = None) -> tuple[float, str]:
    """Parse ``"120 psi"``, ``"8.3bar"`` or ``"18"`` (with a default unit).

    :param text: the typed value, with or without its unit.
    :param default_unit: the unit to assume when none is typed.
    :returns: the number and the canonical unit.
    """
    match = _VALUE_RE.match(text or "")
    if not match:
        raise InvalidValue(f"{text!r} is not a number with a unit, e.g. '120 psi'")
    number = float(match.group(1))
    if not math.isfinite(number):
        raise InvalidValue(f"{text!r} is not a finite number")
    unit_text = match.group(2).strip()
    if not unit_text:
        if default_unit is None:
            raise InvalidValue(f"{text!r} has no unit; add one, e.g. '{text.strip()} psi'")
        return number, canonical_unit(default_unit)
    return number, canonical_unit(unit_text)
