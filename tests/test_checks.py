"""Tests for fleetdb.checks: validity and pattern diagnosis of single tests.

Every check value names its source beside it, with the marks of shared/domain.md:
(a) a citation, (b) "common practice, no published source", (c) "from memory, unverified".
"domain §9 #n" is item n of the guide's check-value table; "Dn" a row of its defaults table.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from fluids.atmosphere import ATMOSPHERE_1976
from hypothesis import given, settings
from hypothesis import strategies as st

from fleetdb import checks
from fleetdb.atmosphere import P0_KPA, polytropic_gauge_kpa
from fleetdb.errors import InvalidValue
from fleetdb.units import KPA_PER_UNIT

PSI = KPA_PER_UNIT["psi"]
INHG = KPA_PER_UNIT["inHg"]
BARO_5000_FT = ATMOSPHERE_1976(1524.0).P / 1000  # kPa; reference library fluids (USSA 1976)


def family(**overrides: object) -> dict:
    """An invented spark-ignition inline four (demo values, not a real engine)."""
    base = dict(name="demo-four", fuel="gasoline", cylinders=4, banks="1-2-3-4",
                compression_ratio=9.0, min_compression_kpa=125 * PSI, spread_rule="ratio",
                min_ratio=0.75, max_diff_kpa=np.nan, min_crank_rpm=np.nan, warm_test=True,
                system_volts=12, test_interval_days=365)
    return base | overrides


def conditions(**overrides: object) -> dict:
    """A test taken in good conditions at sea level."""
    base = dict(unit_id=1, tested_at=pd.Timestamp("2024-05-01"), hours=1000.0, battery_v=10.5,
                crank_rpm=220.0, engine_temp_c=85.0, baro_kpa=P0_KPA, baro_measured=True,
                throttle_open=True, voided=False)
    return base | overrides


def dry(*values: float, unit: str = "psi", kind: str = "compression") -> list[dict]:
    return [{"kind": kind, "cylinder": i, "value": v * KPA_PER_UNIT.get(unit, 1.0)}
            for i, v in enumerate(values, start=1)]


def engine(kind: str, value_kpa: float) -> list[dict]:
    return [{"kind": kind, "cylinder": None, "value": value_kpa}]


def run(fam: dict, test: dict, readings: list[dict]) -> checks.CheckResult:
    return checks.check_one(fam, test, readings, test_id=7)


def codes(result: checks.CheckResult) -> list[str]:
    return result.findings["code"].tolist()


def finding(result: checks.CheckResult, code: str) -> pd.Series:
    rows = result.findings[result.findings["code"] == code]
    assert len(rows) == 1, result.findings[["code", "message"]]
    return rows.iloc[0]


# ------------------------------------------------------------------ defaults table

@pytest.mark.parametrize("name, value, unit, mark, source", [
    ("spread_min_ratio", 0.75, "ratio", "a", "D1: several manufacturers' service procedures"),
    ("min_crank_rpm_spark", 150, "rpm", "c", "D2 (c)"),
    ("min_crank_rpm_diesel", 140, "rpm", "c", "D3: (a) one diesel procedure, (c) as a default"),
    ("battery_min_v_at_21c", 9.6, "V", "a", "D4 table: a manufacturer's battery load-test table"),
    ("battery_min_v_at_minus_18c", 8.5, "V", "a", "D4 table"),
    ("battery_24v_factor", 2.0, "x", "c", "D4: 24 V (c)"),
    ("leakdown_fair_pct", 10, "%", "c", "D5: edges (c)"),
    ("leakdown_fail_pct", 30, "%", "c", "D5: edges (c)"),
    ("leakdown_median_excess_pct", 10, "%", "c", "D5: median flag (c)"),
    ("leakdown_supply_aviation", 80, "psi", "a", "D6: FAA AC 43.13-1B"),
    ("idle_vacuum_min", 17, "inHg", "b", "D7: the 17-21 band (b)"),
    ("cranking_vacuum_max", 6, "inHg", "b", "D8 (b)"),
    ("cranking_vacuum_max_throttle_open", 3, "inHg", "c", "D8 (b/c) takes the weaker wording"),
    ("wet_rise_rings_fraction", 0.10, "fraction of dry", "c", "D9 (c)"),
    ("wet_rise_valves_fraction", 0.05, "fraction of dry", "c", "D9 (c)"),
    ("relative_min_pct", 85, "%", "c", "D10 (c)"),
    ("test_interval_days", 365, "days", "c", "D13 (b/c)"),
])
def test_defaults_match_domain_table(name, value, unit, mark, source):
    threshold = checks.DEFAULTS[name]
    assert (threshold.value, threshold.unit, threshold.mark) == (value, unit, mark)


def test_source_text_follows_the_marks():
    # domain.md "How to use this guide": (b) and (c) wordings exactly; (a) carries a citation
    for threshold in checks.DEFAULTS.values():
        if threshold.mark == "b":
            assert threshold.source == "common practice, no published source"
        elif threshold.mark == "c":
            assert threshold.source == "from memory, unverified"
        else:
            assert threshold.mark == "a" and threshold.source not in (checks.SOURCE_B,
                                                                     checks.SOURCE_C)
    refs = {t.ref for t in checks.DEFAULTS.values()}
    assert {f"D{i}" for i in range(1, 14)} <= refs  # every row D1-D13 is declared
    table = checks.defaults_table()
    assert list(table.columns) == ["value", "unit", "mark", "source", "ref", "note"]
    assert len(table) == len(checks.DEFAULTS)


# ------------------------------------------------------------------ normalisation

def test_compression_normalised_to_sea_level():
    # domain §9 #11: 124.8 psi at 5000 ft ISA -> 149.98 psi (computed; model (a))
    tests = pd.DataFrame([conditions(baro_kpa=BARO_5000_FT)], index=pd.Index([1], name="test_id"))
    readings = pd.DataFrame([{"test_id": 1, "kind": "compression", "cylinder": 1,
                              "value": 124.8 * PSI},
                             {"test_id": 1, "kind": "vacuum_idle", "cylinder": None,
                              "value": 11.98 * INHG},
                             {"test_id": 1, "kind": "leakdown", "cylinder": 1, "value": 12.0},
                             {"test_id": 1, "kind": "relative", "cylinder": 1, "value": 93.0}])
    out = checks.normalise_readings(readings, tests)["value_sl"].to_numpy()
    assert out[0] / PSI == pytest.approx(149.98, abs=0.01)
    # domain §9 #9: 17 inHg at sea level reads 11.98 inHg at 5000 ft (computed)
    assert out[1] / INHG == pytest.approx(17.0, abs=0.01)
    assert out[2:].tolist() == [12.0, 93.0]  # leak-down and relative are unchanged


# ------------------------------------------------------------------ spread rules

SPREAD = (150, 148, 145, 120)  # domain §9 #14


@pytest.mark.parametrize("rule, fails, source", [
    (dict(spread_rule="ratio", min_ratio=0.75), False, "S1 (a) manufacturers' procedures"),
    (dict(spread_rule="ratio", min_ratio=0.70, min_compression_kpa=100 * PSI), False, "S2 (a)"),
    (dict(spread_rule="ratio", min_ratio=0.80), False, "S3 (a) light 4x4 diesel, inclusive"),
    (dict(spread_rule="ratio", min_ratio=0.90), True, "S8 (b) 10 % of highest == ratio 0.90"),
    (dict(spread_rule="diff", max_diff_kpa=196.1), True, "S5 (a) 196.1 kPa"),
    (dict(spread_rule="diff", max_diff_kpa=100.0), True, "S4 (a) 100 kPa"),
    (dict(spread_rule="diff", max_diff_kpa=10 * PSI), True, "S6 (a) US Army TM 10-3930-618-20"),
])
def test_spread_rules_on_domain_example(rule, fails, source):
    result = run(family(min_compression_kpa=100 * PSI) | rule, conditions(), dry(*SPREAD))
    assert ("spread_over_limit" in codes(result)) is fails, source
    assert "below_minimum" not in codes(result)
    summary = result.tests.iloc[0]
    assert summary["dry_ratio"] == pytest.approx(0.800, abs=1e-12)  # domain §9 #14
    assert summary["dry_spread_kpa"] / PSI == pytest.approx(30.0)
    assert summary["lowest_cylinder"] == 4
    if fails:
        assert finding(result, "spread_over_limit")["severity"] == "limit"


@pytest.mark.parametrize("min_ratio, source_text", [
    (np.nan, "fleetdb default, several manufacturers' service procedures"),  # D1 (a)
    (0.80, "the family's service data"),  # domain "How to use": family data overrides (b)
])
def test_messages_name_the_limit_and_its_source(min_ratio, source_text):
    result = run(family(min_ratio=min_ratio), conditions(), dry(150, 150, 150, 100))
    message = finding(result, "spread_over_limit")["message"]
    assert source_text in message
    assert f"{0.75 if np.isnan(min_ratio) else min_ratio:.2f} allowed" in message
    # kPa and psi side by side; 100 psi = 689.476 kPa (NIST SP 811 factor, domain §1.1)
    assert "689 kPa (100 psi)" in message and "1034 kPa (150 psi)" in message


def test_spread_ratio_against_mean():
    # ratio_mean rule: each cylinder >= min_ratio x mean (§4.1 "compare with the average" (c))
    fam = family(spread_rule="ratio_mean", min_ratio=0.86, min_compression_kpa=100 * PSI)
    result = run(fam, conditions(), dry(*SPREAD))
    numbers = finding(result, "spread_over_limit")["numbers"]
    assert numbers["mean_ratio"] == pytest.approx(120 / 140.75)  # mean of §9 #14 readings
    fam["min_ratio"] = 0.85
    assert "spread_over_limit" not in codes(run(fam, conditions(), dry(*SPREAD)))


def test_relative_compression_rebased_to_strongest():
    # domain §9 #14: relative [100, 98.67, 96.67, 80.0] %; D10 flag < 85 % (c)
    result = run(family(), conditions(), dry(*SPREAD, unit="%", kind="relative"))
    row = finding(result, "relative_low")
    assert row["cylinders"] == (4,)
    assert row["numbers"]["relative_pct"] == pytest.approx(80.0)
    assert "relative_low" not in codes(run(family(), conditions(),
                                           dry(100, 90, 85, 100, unit="%", kind="relative")))


# ------------------------------------------------------------------ leak-down

@pytest.mark.parametrize("percent, band", [
    (7, "good"), (10, "fair"), (12, "fair"), (20, "worn"), (25, "worn"), (30, "fail"), (35, "fail"),
])
def test_leakdown_bands(percent, band):
    # domain §9 #15 / D5: bands (b), edges (c); a boundary goes to the worse band
    assert checks.leakdown_band(percent) == band
    result = run(family(), conditions(), dry(percent, unit="%", kind="leakdown"))
    expected = [] if band == "good" else [f"leakdown_{band}"]
    assert codes(result) == expected


@pytest.mark.parametrize("values, flagged", [
    ((5, 6, 7, 18), (4,)),  # median 6.5; 18 is 11.5 points above: flagged (D5, (c))
    ((5, 6, 7, 16.5), ()),  # exactly 10 points above: not "more than 10" (D5, (c))
])
def test_leakdown_above_median(values, flagged):
    result = run(family(), conditions(), dry(*values, unit="%", kind="leakdown"))
    rows = result.findings[result.findings["code"] == "leakdown_above_median"]
    assert tuple(c for (c,) in rows["cylinders"]) == flagged


# ------------------------------------------------------------------ battery and cranking

@pytest.mark.parametrize("volts, temp_c, passes, source", [
    (9.4, 10.0, True, "domain §9 #16 (a): minimum 9.4 V at 10 degC"),
    (9.4, 21.0, False, "domain §9 #16 (a): minimum 9.6 V at 21 degC"),
    (9.0, -7.0, True, "domain §9 #16 (a): minimum 8.9 V at -7 degC"),
])
def test_battery_temperature_table(volts, temp_c, passes, source):
    assert bool(volts >= checks.battery_minimum_v(temp_c)) is passes, source
    result = run(family(warm_test=False),  # a room-temperature test: only the battery counts
                 conditions(battery_v=volts, engine_temp_c=temp_c, crank_rpm=np.nan),
                 dry(150, 150, 150, 150))
    assert ("weak_battery" in codes(result)) is not passes
    assert bool(result.tests["trustworthy"].iloc[0]) is passes  # no rpm: voltage decides


@pytest.mark.parametrize("temp_c, volts, minimum, source", [
    (13.0, 12, 9.45, "our rule: linear between the 10 and 16 degC rows"),
    (30.0, 12, 9.6, "our rule: clamped above 21 degC to the D4 top row (a)"),
    (-25.0, 12, 8.5, "our rule: clamped below -18 degC to the D4 bottom row (a)"),
    (float("nan"), 12, 9.6, "our rule: no temperature uses the 21 degC row"),
    (21.0, 24, 19.2, "D4: 24 V systems 2 x 9.6 V = 19.2 V (c)"),
])
def test_battery_minimum_between_rows(temp_c, volts, minimum, source):
    assert checks.battery_minimum_v(temp_c, volts) == pytest.approx(minimum), source


def test_weak_battery_with_normal_rpm_is_a_note():
    # D4: rpm is the primary gate, voltage secondary (b)
    result = run(family(warm_test=False),
                 conditions(battery_v=9.0, engine_temp_c=21.0, crank_rpm=220.0),
                 dry(150, 150, 150, 150))
    assert finding(result, "weak_battery")["severity"] == "note"
    assert bool(result.tests["trustworthy"].iloc[0])


@pytest.mark.parametrize("fam, rpm, slow, source", [
    (dict(fuel="diesel"), 130.0, True, "domain §9 #17 (a): below 140 rpm invalid"),
    (dict(fuel="diesel"), 150.0, False, "domain §9 #17 (a): 150 rpm valid"),
    (dict(fuel="gasoline"), 149.0, True, "D2 (c): 150 rpm spark-ignition default"),
    (dict(fuel="lpg"), 150.0, False, "D2 (c): boundary 150 rpm passes"),
    (dict(fuel="gasoline", min_crank_rpm=250.0), 220.0, True, "§3.3: specs quoted at 250 rpm (a)"),
])
def test_slow_cranking(fam, rpm, slow, source):
    result = run(family(**fam), conditions(crank_rpm=rpm), dry(150, 150, 150, 150))
    assert ("slow_cranking" in codes(result)) is slow, source
    assert bool(result.tests["trustworthy"].iloc[0]) is not slow
    if "min_crank_rpm" in fam:
        row = finding(result, "slow_cranking")
        assert row["numbers"]["limit_source"] == "family"
        assert "the family's service data" in row["message"]


def test_diesel_minimum_from_service_procedure():
    # domain §9 #17 (a): 2100/2069/2000 kPa against a 2069 kPa minimum -> 2000 fails
    fam = family(fuel="diesel", cylinders=3, banks="1-2-3", min_compression_kpa=2069.0)
    readings = dry(2100, 2069, 2000, unit="kPa")
    valid = run(fam, conditions(crank_rpm=150.0), readings)
    row = finding(valid, "below_minimum")
    assert (row["cylinders"], row["severity"]) == ((3,), "limit")
    assert "2000 kPa (290 psi)" in row["message"] and "2069 kPa (300 psi)" in row["message"]
    assert "the family's service data" in row["message"]
    slow = run(fam, conditions(crank_rpm=130.0), readings)  # invalid test: not counted as wear
    assert finding(slow, "below_minimum")["severity"] == "note"
    assert "all_low_artefact" in codes(slow)


@pytest.mark.parametrize("fam, temp_c, cold, source", [
    (dict(warm_test=True), 40.0, True, "our 60 degC threshold (b)"),
    (dict(warm_test=True), 60.0, False, "our 60 degC threshold (b), boundary passes"),
    (dict(warm_test=False), 20.0, False, "§3.3 item 5 (a): some families test at room temp"),
    (dict(warm_test=True), float("nan"), False, "no temperature recorded: not judged"),
])
def test_cold_engine(fam, temp_c, cold, source):
    result = run(family(**fam), conditions(engine_temp_c=temp_c), dry(150, 150, 150, 150))
    assert ("cold_engine" in codes(result)) is cold, source


# ------------------------------------------------------------------ intake restriction

WIDE_OPEN_PSI = 240.99  # domain §9 #10: CR 9, n = 1.3, sea level, wide open (computed)


@pytest.mark.parametrize("vacuum_inhg, reading_psi, share", [
    (5.0, 198.27, 0.8227),  # domain §9 #12 (computed; physics (a))
    (15.0, 112.81, 0.468),  # domain §9 #12
])
def test_polytropic_restriction_share(vacuum_inhg, reading_psi, share):
    restricted = polytropic_gauge_kpa(9.0, P0_KPA, 1.3, vacuum_inhg * INHG)
    assert restricted / PSI == pytest.approx(reading_psi, abs=0.01)
    assert restricted / polytropic_gauge_kpa(9.0) == pytest.approx(share, abs=5e-4)


@pytest.mark.parametrize("fam, vacuum_inhg, throttle_open, expected, source", [
    (dict(expected_kpa=WIDE_OPEN_PSI * PSI), 5.0, True, "all_low_restriction", "§9 #12, D8"),
    (dict(), 5.0, True, "all_low_restriction", "expected = minimum / 0.75 (our rule (b))"),
    (dict(expected_kpa=WIDE_OPEN_PSI * PSI), 0.0, True, "all_low_wear", "§5.1 (b)"),
    (dict(expected_kpa=WIDE_OPEN_PSI * PSI), 5.0, False, "all_low_wear", "D8: 5 <= 6 inHg"),
    (dict(expected_kpa=WIDE_OPEN_PSI * PSI, fuel="diesel"), 15.0, True, "all_low_wear",
     "§5.4: no vacuum rule on a diesel"),
])
def test_all_low_with_intake_restriction(fam, vacuum_inhg, throttle_open, expected, source):
    # readings 82.27 % of wide open (§9 #12) are below 0.85 x expected: every cylinder low
    fam = family(min_compression_kpa=0.75 * WIDE_OPEN_PSI * PSI) | fam
    readings = dry(198.27, 198.27, 198.27, 198.27) + engine("vacuum_cranking", vacuum_inhg * INHG)
    result = run(fam, conditions(throttle_open=throttle_open), readings)
    found = [c for c in codes(result) if c.startswith("all_low")]
    assert found == [expected], source
    restricted = expected == "all_low_restriction"
    assert bool(result.tests["intake_restriction"].iloc[0]) is restricted
    assert bool(result.tests["trustworthy"].iloc[0]) is not restricted
    assert finding(result, expected)["cylinders"] == (1, 2, 3, 4)


def test_low_readings_behind_a_restriction_are_not_wear():
    # domain §9 #12: 15 inHg -> 112.81 psi; D8: every reading of that test is suspect (b)
    fam = family(min_compression_kpa=120 * PSI, expected_kpa=WIDE_OPEN_PSI * PSI)
    readings = dry(112.81, 112.81, 112.81, 112.81) + engine("vacuum_cranking", 15 * INHG)
    result = run(fam, conditions(), readings)
    below = result.findings[result.findings["code"] == "below_minimum"]
    assert len(below) == 4 and set(below["severity"]) == {"note"}
    assert "not counted as wear" in below["message"].iloc[0]
    assert "all_low_restriction" in codes(result)


# ------------------------------------------------------------------ cylinder patterns

@pytest.mark.parametrize("banks, low, expected, source", [
    ("1-2-3-4", (2, 3), "adjacent_pair_low", "§5.1 (a): adjacent pair -> head gasket"),
    ("1-2-3-4", (1, 3), "non_adjacent_pair_low", "inline four: 1 and 3 are not neighbours"),
    ("1-3-5/2-4-6", (1, 3), "adjacent_pair_low", "V6 numbered 1-3-5/2-4-6: same bank"),
    ("1-3-5/2-4-6", (1, 2), "non_adjacent_pair_low", "V6: 1 and 2 sit in different banks"),
    (None, (1, 2), "pair_low", "layout unknown: adjacency not judged"),
])
def test_pair_patterns_follow_bank_layout(banks, low, expected, source):
    cylinders = 6 if banks and "/" in banks else 4
    values = [100.0 if c in low else 150.0 for c in range(1, cylinders + 1)]
    result = run(family(banks=banks, cylinders=cylinders, min_compression_kpa=90 * PSI),
                 conditions(), dry(*values))
    row = finding(result, expected)
    assert row["cylinders"] == low, source
    assert not {"single_low", "all_low_wear"} & set(codes(result))


@pytest.mark.parametrize("banks, pairs", [
    ("1-2-3-4", {(1, 2), (2, 3), (3, 4)}),  # design.md banks format, inline four
    ("1-3-5/2-4-6", {(1, 3), (3, 5), (2, 4), (4, 6)}),  # design.md example V6
])
def test_adjacent_pairs(banks, pairs):
    assert checks.adjacent_pairs(banks) == pairs


def test_bad_bank_layout_is_rejected():
    with pytest.raises(InvalidValue):
        checks.parse_banks("1,2,3")


@pytest.mark.parametrize("values, minimum, single, limit_psi", [
    ((150, 150, 150, 100), 90, (4,), 112.5),  # 100 < 0.75 x 150 (D1 (a)); §5.1 (a)
    ((150, 150, 150, 115), 90, None, None),  # 115 >= 112.5: within the D1 spread rule
    ((128, 128, 128, 124), 125, (4,), 125.0),  # in spread, under the family minimum
])
def test_single_low(values, minimum, single, limit_psi):
    # expected 130 psi: 0.85 x 130 < 125, so "all low" means under the minimum here (our rule)
    fam = family(min_compression_kpa=minimum * PSI, expected_kpa=130 * PSI)
    result = run(fam, conditions(), dry(*values))
    rows = result.findings[result.findings["code"] == "single_low"]
    assert (rows["cylinders"].iloc[0] if len(rows) else None) == single
    if single:
        numbers = rows["numbers"].iloc[0]
        assert numbers["limit_kpa"] / PSI == pytest.approx(limit_psi)
        assert numbers["others_kpa"] / PSI == pytest.approx(values[0])
        assert "n/a" not in rows["message"].iloc[0]


# ------------------------------------------------------------------ wet test

@pytest.mark.parametrize("wet_psi, expected, source", [
    (132.0, "rings_suspected", "D9 (c): +10 % of dry"),
    (130.0, "rings_suspected", "D9 (c): +10 psi, 8.3 % of dry"),
    (129.0, None, "D9 (c): 5-10 % and under 10 psi: no call"),
    (126.0, None, "D9 (c): exactly 5 %: no call"),
    (125.9, "valves_suspected", "D9 (c): under 5 %"),
])
def test_wet_test_calls(wet_psi, expected, source):
    readings = dry(180, 180, 180, 120) + [{"kind": "wet", "cylinder": 4, "value": wet_psi * PSI},
                                          {"kind": "wet", "cylinder": 1, "value": 181 * PSI}]
    result = run(family(min_compression_kpa=100 * PSI), conditions(), readings)
    calls = [c for c in codes(result) if c in ("rings_suspected", "valves_suspected")]
    assert calls == ([expected] if expected else []), source  # healthy cylinder 1: no call


def test_wet_reading_on_diesel_is_a_finding_and_not_judged():
    # §5.2 (a): a medium-duty truck diesel procedure forbids oil in the cylinders
    readings = dry(2400, 2400, 2400, 1800, unit="kPa") + [
        {"kind": "wet", "cylinder": 4, "value": 2300.0}]
    result = run(family(fuel="diesel", min_compression_kpa=2069.0), conditions(), readings)
    assert finding(result, "wet_test_on_diesel")["cylinders"] == (4,)
    assert not {"rings_suspected", "valves_suspected"} & set(codes(result))


# ------------------------------------------------------------------ idle vacuum

@pytest.mark.parametrize("fuel, baro, vacuum_inhg, low, source", [
    ("gasoline", P0_KPA, 16.9, True, "D7 (b): below 17 inHg at sea level"),
    ("gasoline", P0_KPA, 17.0, False, "D7 (b): 17 inHg is in the band"),
    ("gasoline", BARO_5000_FT, 12.1, False, "§9 #9: 11.98 inHg at 5000 ft is 17 at sea level"),
    ("cng", BARO_5000_FT, 11.9, True, "§9 #9: under 11.98 inHg at 5000 ft"),
    ("diesel", P0_KPA, 5.0, False, "D7: never on diesels"),
])
def test_idle_vacuum(fuel, baro, vacuum_inhg, low, source):
    result = run(family(fuel=fuel), conditions(baro_kpa=baro),
                 engine("vacuum_idle", vacuum_inhg * INHG))
    assert ("idle_vacuum_low" in codes(result)) is low, source


@settings(max_examples=60, deadline=None)
@given(cranking=st.lists(st.floats(0, 80), max_size=3), idle=st.lists(st.floats(0, 80), max_size=3),
       throttle=st.sampled_from([True, False, None]), baro=st.floats(60, 105),
       compression=st.lists(st.floats(500, 4000), min_size=0, max_size=6))
def test_no_vacuum_finding_on_a_diesel(cranking, idle, throttle, baro, compression):
    # D7, D8, §5.4: diesels are not throttled; no vacuum rule applies (a)
    readings = ([{"kind": "vacuum_cranking", "cylinder": None, "value": v} for v in cranking]
                + [{"kind": "vacuum_idle", "cylinder": None, "value": v} for v in idle]
                + dry(*compression, unit="kPa"))
    fam = family(fuel="diesel", cylinders=6, banks="1-2-3-4-5-6", min_compression_kpa=2069.0)
    result = run(fam, conditions(throttle_open=throttle, baro_kpa=baro), readings)
    assert not {"intake_restriction", "idle_vacuum_low", "all_low_restriction"} & set(codes(result))
    assert not result.tests["intake_restriction"].iloc[0]


# ------------------------------------------------------------------ vectorised == one by one

def demo_fleet(seed: int = 42) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """Invented families and tests with every kind of reading (demo data only)."""
    rng = np.random.default_rng(seed)
    families = pd.DataFrame([
        family(), family(name="demo-v6", cylinders=6, banks="1-3-5/2-4-6", min_crank_rpm=200.0),
        family(name="demo-diesel", fuel="diesel", min_compression_kpa=2069.0, spread_rule="diff",
               max_diff_kpa=345.0, system_volts=24),
        family(name="demo-lpg", fuel="lpg", banks=None, spread_rule="ratio_mean", min_ratio=0.8,
               expected_kpa=160 * PSI, warm_test=False),
    ], index=pd.Index([3, 5, 8, 9], name="family_id"))
    n = 80
    fam_ids = rng.choice(families.index, n)
    tests = pd.DataFrame({
        "unit_id": rng.integers(1, 20, n), "family_id": fam_ids,
        "battery_v": np.where(rng.random(n) < 0.1, np.nan, rng.normal(10, 0.8, n)
                              * np.where(families.loc[fam_ids, "system_volts"] == 24, 2, 1)),
        "crank_rpm": np.where(rng.random(n) < 0.2, np.nan, rng.normal(200, 40, n)),
        "engine_temp_c": np.where(rng.random(n) < 0.1, np.nan, rng.normal(70, 20, n)),
        "baro_kpa": rng.uniform(80, 102, n),
        "throttle_open": pd.array(rng.choice([True, False, None], n), dtype="boolean"),
    }, index=pd.Index(rng.permutation(np.arange(100, 100 + n)), name="test_id"))
    rows = []
    for test_id, fam_id in zip(tests.index, fam_ids, strict=True):
        fam = families.loc[fam_id]
        level = fam["min_compression_kpa"] / 0.75 * rng.uniform(0.7, 1.05)
        for cyl in range(1, int(fam["cylinders"]) + 1):
            value = level * rng.choice([1.0, 1.0, 0.97, 0.7, 0.55])
            rows.append((test_id, "compression", cyl, value))
            if rng.random() < 0.3:
                rows.append((test_id, "wet", cyl, value * rng.uniform(1.0, 1.2)))
            rows.append((test_id, "leakdown", cyl, rng.uniform(2, 40)))
            rows.append((test_id, "relative", cyl, rng.uniform(75, 100)))
        rows.append((test_id, "vacuum_cranking", None, rng.uniform(0, 25)))
        rows.append((test_id, "vacuum_idle", None, rng.uniform(35, 70)))
    readings = pd.DataFrame(rows, columns=["test_id", "kind", "cylinder", "value"])
    readings["cylinder"] = readings["cylinder"].astype("Int64")
    return families, tests, readings.sample(frac=1.0, random_state=1)


def _comparable(findings: pd.DataFrame) -> list[tuple]:
    def clean(numbers: dict) -> tuple:
        return tuple((k, None if isinstance(v, float) and math.isnan(v) else v)
                     for k, v in numbers.items())
    return [(r.test_id, r.code, r.severity, r.cylinders, r.message, clean(r.numbers))
            for r in findings.itertuples()]


def test_vectorised_equals_one_test_at_a_time():
    families, tests, readings = demo_fleet()
    together = checks.check_tests(families, tests, readings)
    alone = [checks.check_one(families.loc[t["family_id"]], t, readings[readings.test_id == i],
                              test_id=i) for i, t in tests.iterrows()]
    pd.testing.assert_frame_equal(together.tests, pd.concat([r.tests for r in alone]),
                                  check_index_type=False)
    one_by_one = pd.concat([r.findings for r in alone]).sort_values("test_id", kind="stable")
    assert _comparable(together.findings) == _comparable(one_by_one)
    assert set(together.findings["code"]) <= set(checks.CODES)
    assert set(together.findings["severity"]) <= set(checks.SEVERITIES)
    assert len(set(together.findings["code"])) >= 15  # the demo exercises most rules


def test_median_of_others_matches_brute_force():
    # reference: numpy.median of each row with the cell removed
    rng = np.random.default_rng(3)
    mat = rng.normal(100, 20, (200, 7))
    mat[rng.random(mat.shape) < 0.3] = np.nan
    fast = checks._median_of_others(mat)
    for i, j in np.ndindex(*mat.shape):
        others = np.delete(mat[i], j)
        others = others[~np.isnan(others)]
        expected = np.median(others) if len(others) and not np.isnan(mat[i, j]) else np.nan
        assert fast[i, j] == pytest.approx(expected, nan_ok=True)


def test_empty_and_unknown_inputs():
    families, tests, readings = demo_fleet()
    result = checks.check_tests(families, tests, readings.iloc[0:0])
    assert list(result.findings.columns) == checks.FINDING_COLUMNS and result.findings.empty
    # no readings: nothing cranked, nothing to distrust, no compression summary
    assert result.tests["trustworthy"].all() and result.tests["dry_min_kpa"].isna().all()
    assert result.tests["lowest_cylinder"].isna().all()
    with pytest.raises(InvalidValue):
        checks.check_tests(families.drop(index=3), tests, readings)


def test_summary_of_a_test_does_not_depend_on_the_other_engines_checked_with_it():
    # Self-consistency (the split refresh assesses engine families in separate processes):
    # a four's mean, judged beside an eight, is the same float as judged alone. These
    # invented readings sum to 3966.4 left to right, but to 3966.3999999999996 when numpy
    # sums a row padded to eight cylinders (it groups the additions by the row's width).
    four = [953.5, 1085.1, 843.2, 1084.6]
    families = pd.DataFrame([family(), family(name="demo-eight", cylinders=8,
                                              banks="1-3-5-7/2-4-6-8")],
                            index=pd.Index([1, 2], name="family_id"))
    tests = pd.DataFrame([{**conditions(), "family_id": 1}, {**conditions(), "family_id": 2}],
                         index=pd.Index([10, 20], name="test_id"))
    readings = pd.DataFrame([{**r, "test_id": 10} for r in dry(*four, unit="kPa")]
                            + [{**r, "test_id": 20} for r in dry(*[1000.0] * 8, unit="kPa")])
    both = checks.check_tests(families, tests, readings).tests
    alone = checks.check_tests(families, tests.loc[[10]], readings[readings["test_id"] == 10]).tests
    assert both.loc[10, "dry_mean_kpa"] == alone.loc[10, "dry_mean_kpa"] == (
        ((four[0] + four[1]) + four[2]) + four[3]) / 4
