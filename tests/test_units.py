"""Unit factors against pint (the reference library) and NIST SP 811 values."""

from __future__ import annotations

import math
from fractions import Fraction

import pint
import pytest

from fleetdb.errors import InvalidValue
from fleetdb.units import KPA_PER_UNIT, PA_PER_UNIT_EXACT, from_kpa, parse_quantity, to_kpa

UREG = pint.UnitRegistry()

# pint's names for our units; pint's definitions are exact except where it says otherwise.
PINT_NAMES = {"kPa": "kilopascal", "MPa": "megapascal", "bar": "bar", "psi": "psi",
              "inHg": "inch_Hg", "mmHg": "millimeter_Hg"}


@pytest.mark.parametrize("unit", sorted(PINT_NAMES))
def test_every_factor_matches_pint(unit: str) -> None:
    # Reference: pint (default_en.txt / constants_en.txt definitions).
    expected = UREG.Quantity(1, PINT_NAMES[unit]).to("kilopascal").magnitude
    assert KPA_PER_UNIT[unit] == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(("unit", "pa", "source"), [
    # NIST SP 811 (2008) App. B.8, exact from the lbf and inch definitions.
    ("psi", Fraction(8_896_443_230_521, 1_290_320_000), "NIST SP 811 B.8 exact"),
    ("bar", Fraction(100_000), "NIST SP 811 B.8 exact"),
])
def test_exact_definitions(unit: str, pa: Fraction, source: str) -> None:
    assert PA_PER_UNIT_EXACT[unit] == pa, source


@pytest.mark.parametrize(("unit", "pa", "rel"), [
    ("psi", 6894.757293168361, 1e-15),  # NIST SP 811 B.8: 6.894 757 E+03
    ("inHg", 3386.388640341, 1e-12),  # NIST SP 811 B.8 conventional: 3.386 389 E+03
    ("mmHg", 133.322387415, 1e-12),  # NIST SP 811: 1.333 224 E+02; WMO-No. 8 Annex 3.A
])
def test_nist_values(unit: str, pa: float, rel: float) -> None:
    assert KPA_PER_UNIT[unit] * 1000 == pytest.approx(pa, rel=rel)


def test_worked_equalities() -> None:
    # 1 atm = 14.695 948 775 513 psi = 29.921 255 58 inHg (NIST SP 811, computed);
    # 1 bar = 14.503 773 773 021 psi; 1 inHg = 25.4 mmHg exactly (conventional definitions).
    assert from_kpa(101.325, "psi") == pytest.approx(14.695948775513, rel=1e-12)
    assert from_kpa(101.325, "inHg") == pytest.approx(29.92125558, rel=1e-9)
    assert from_kpa(100.0, "psi") == pytest.approx(14.503773773021, rel=1e-12)
    assert PA_PER_UNIT_EXACT["inHg"] / PA_PER_UNIT_EXACT["mmHg"] == Fraction("25.4")
    # 2.0 kgf/cm2 (98.0665 kPa each, NIST SP 811) is 28.446 686 6 psi, not 28.
    assert from_kpa(2 * 98.0665, "psi") == pytest.approx(28.4466866, rel=1e-8)


@pytest.mark.parametrize(("text", "default", "expected"), [
    ("120 psi", None, (120.0, "psi")),
    ("8.3bar", None, (8.3, "bar")),
    ("18", "inHg", (18.0, "inHg")),
    ("1500 KPA", None, (1500.0, "kPa")),
    ("450 mmHg", None, (450.0, "mmHg")),
    ("12 %", None, (12.0, "%")),
])
def test_parse_quantity(text: str, default: str | None, expected: tuple[float, str]) -> None:
    assert parse_quantity(text, default) == expected


@pytest.mark.parametrize("text", ["", "abc", "120 furlongs", "nan psi", "12"])
def test_parse_quantity_refuses(text: str) -> None:
    with pytest.raises(InvalidValue):
        parse_quantity(text)


def test_round_trip() -> None:
    for unit in KPA_PER_UNIT:
        assert math.isclose(from_kpa(to_kpa(123.4, unit), unit), 123.4, rel_tol=1e-14)
