"""Standard atmosphere and barometric normalisation against independent packages."""

from __future__ import annotations

import numpy as np
import pytest
from ambiance import Atmosphere
from fluids.atmosphere import ATMOSPHERE_1976
from hypothesis import given
from hypothesis import strategies as st

from fleetdb import atmosphere as atm
from fleetdb.units import KPA_PER_UNIT

PSI = KPA_PER_UNIT["psi"]
INHG = KPA_PER_UNIT["inHg"]
FT = 0.3048


@pytest.mark.parametrize("h", [0.0, 5.0, 500.0, 1000.0, 1524.0, 1700.0, 3000.0, 6000.0])
def test_against_fluids_and_ambiance(h: float) -> None:
    # fluids.ATMOSPHERE_1976 (USSA 1976) and ambiance (ICAO Doc 7488/3) are independent
    # implementations; ambiance rounds the gas constant, hence 1e-6.
    ours = atm.pressure_kpa(h) * 1000
    assert ours == pytest.approx(ATMOSPHERE_1976(h).P, rel=1e-9)
    assert ours == pytest.approx(float(Atmosphere(h).pressure[0]), rel=1e-6)


def test_check_values() -> None:
    # 1000 m geometric: 89 876.29 Pa (USSA 1976 formula; fluids 89 876.285).
    assert atm.pressure_kpa(1000) * 1000 == pytest.approx(89876.285, abs=0.01)
    # 5000 ft: 84 311.06 Pa = 24.897 inHg = 12.2283 psia; ratio 0.832 085.
    p = atm.pressure_kpa(5000 * FT)
    assert p * 1000 == pytest.approx(84311.06, abs=0.01)
    assert p / INHG == pytest.approx(24.897, abs=0.001)
    assert p / PSI == pytest.approx(12.2283, abs=0.0001)
    assert p / atm.P0_KPA == pytest.approx(0.832085, abs=1e-6)


def test_vacuum_drop_per_1000_ft() -> None:
    # Rule of thumb "about 1 inHg per 1000 ft" (FAA Pilot's Handbook; US Army OD1001):
    # the formula gives 1.0655 (0-1000 ft), 0.9455 (4000-5000 ft), 5.024 over 0-5000 ft.
    def drop(a: float, b: float) -> float:
        return (atm.pressure_kpa(a * FT) - atm.pressure_kpa(b * FT)) / INHG

    assert drop(0, 1000) == pytest.approx(1.0655, abs=1e-4)
    assert drop(4000, 5000) == pytest.approx(0.9455, abs=1e-4)
    assert drop(0, 5000) == pytest.approx(5.024, abs=1e-3)
    # Idle band 17-21 inHg at sea level is 11.98-15.98 inHg at 5000 ft.
    for sea_level, expected in ((17, 11.98), (21, 15.98)):
        at_alt = sea_level * INHG - (atm.P0_KPA - atm.pressure_kpa(5000 * FT))
        assert at_alt / INHG == pytest.approx(expected, abs=0.01)


def test_absolute_from_gauge_at_altitude() -> None:
    # 150 psig at ISA 5000 ft is 162.228 psia = 1 118.52 kPa absolute (p_abs = p_g + p_b).
    p_abs = 150 * PSI + atm.pressure_kpa(5000 * FT)
    assert p_abs / PSI == pytest.approx(162.228, abs=1e-3)
    assert p_abs == pytest.approx(1118.52, abs=0.01)


def test_sea_level_normalisation() -> None:
    # 124.8 psi measured at 5000 ft ISA is 149.98 psi at sea level (factor 1.201 80).
    baro = atm.pressure_kpa(5000 * FT)
    assert atm.compression_to_sea_level(124.8 * PSI, baro) / PSI == pytest.approx(149.98, abs=0.01)
    assert atm.P0_KPA / baro == pytest.approx(1.20180, abs=1e-5)


def test_polytropic_model() -> None:
    # p_g = p_baro (CR^n - 1): CR 9, n 1.3 -> 240.99 psi; at 5000 ft 200.53 psi;
    # n 1.2 -> 190.56 psi; n 1.1 -> 150.07 psi (polytropic relation, any thermodynamics text).
    assert atm.polytropic_gauge_kpa(9) / PSI == pytest.approx(240.99, abs=0.01)
    assert atm.polytropic_gauge_kpa(9, atm.pressure_kpa(5000 * FT)) / PSI == pytest.approx(
        200.53, abs=0.01)
    assert atm.polytropic_gauge_kpa(9, n=1.2) / PSI == pytest.approx(190.56, abs=0.01)
    assert atm.polytropic_gauge_kpa(9, n=1.1) / PSI == pytest.approx(150.07, abs=0.01)
    # Intake restriction: 5 inHg of cranking vacuum -> 198.27 psi (82.27 %); 15 inHg -> 112.81.
    assert atm.polytropic_gauge_kpa(9, intake_vacuum_kpa=5 * INHG) / PSI == pytest.approx(
        198.27, abs=0.01)
    assert atm.polytropic_gauge_kpa(9, intake_vacuum_kpa=15 * INHG) / PSI == pytest.approx(
        112.81, abs=0.01)
    # Dynamic CR example: 7.5^1.3 x 14.7 psia = 201.79 psia -> 187.09 psig with 14.7 psia ambient.
    assert atm.polytropic_gauge_kpa(7.5, 14.7 * PSI) / PSI == pytest.approx(187.09, abs=0.01)


def test_isentropic_ratio_textbook() -> None:
    # With n = gamma = 1.4 the model is the isentropic relation p2/p1 = r^1.4; for r = 8
    # textbook tables give p2/p1 = 18.379 (Otto-cycle worked examples, e.g. air-standard analysis).
    ratio = (atm.polytropic_gauge_kpa(8, n=1.4) + atm.P0_KPA) / atm.P0_KPA
    assert ratio == pytest.approx(8**1.4, rel=1e-12)
    assert ratio == pytest.approx(18.379, abs=1e-3)


@given(st.floats(min_value=-400, max_value=5000), st.floats(min_value=50, max_value=8000))
def test_normalisation_round_trips(h: float, gauge: float) -> None:
    baro = atm.pressure_kpa(h)
    back = atm.compression_from_sea_level(atm.compression_to_sea_level(gauge, baro), baro)
    assert back == pytest.approx(gauge, rel=1e-12)
    assert atm.pressure_altitude_m(baro) == pytest.approx(h, abs=1e-6)


def test_vectorised() -> None:
    h = np.array([0.0, 1000.0, 1700.0])
    assert np.allclose(atm.pressure_kpa(h), [atm.pressure_kpa(x) for x in h], rtol=0, atol=0)
