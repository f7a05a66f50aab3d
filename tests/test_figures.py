"""dashboard.figures as plain functions: what is drawn, where, in which unit.

Unit conversions are checked against pint (its psi and bar follow NIST SP 811 App. B);
the engine layouts are those of tests/data/fleet.csv.
"""

from __future__ import annotations

import pandas as pd
import pint
import pytest

from dashboard.figures import cylinder_bars

UREG = pint.UnitRegistry()


def _pint(value_kpa: float, unit: str) -> float:
    return UREG.Quantity(value_kpa, "kPa").to(unit).magnitude


@pytest.mark.parametrize("unit", ["psi", "bar", "kPa"])
def test_v_engine_bars_follow_the_banks_in_the_chosen_unit(unit: str) -> None:
    values = {1: 1030.0, 2: 1020.0, 3: 700.0, 4: 1010.0, 5: 1035.0, 6: 1000.0}
    readings = pd.DataFrame({"cylinder": list(values), "value_kpa": list(values.values())})
    fig = cylinder_bars(readings, unit, [[1, 3, 5], [2, 4, 6]])
    assert [list(trace.x) for trace in fig.data] == [["Cyl 1", "Cyl 3", "Cyl 5"],
                                                     ["Cyl 2", "Cyl 4", "Cyl 6"]]
    assert [trace.xaxis for trace in fig.data] == ["x", "x2"]  # one panel per bank
    for trace, bank in zip(fig.data, [[1, 3, 5], [2, 4, 6]], strict=True):
        assert list(trace.y) == pytest.approx([_pint(values[c], unit) for c in bank],
                                              rel=1e-12)


def test_inline_engine_is_one_row_and_a_missing_cylinder_is_a_gap() -> None:
    readings = pd.DataFrame({"cylinder": [1, 2, 4], "value_kpa": [1000.0, 990.0, 1010.0]})
    fig = cylinder_bars(readings, "psi", [[1, 2, 3, 4]])
    assert len(fig.data) == 1
    assert list(fig.data[0].x) == ["Cyl 1", "Cyl 2", "Cyl 3", "Cyl 4"]
    assert fig.data[0].y[2] is None
    assert fig.layout.showlegend is False


def test_family_minimum_is_a_labelled_line_in_every_bank() -> None:
    readings = pd.DataFrame({"cylinder": [1, 2, 3, 4, 5, 6], "value_kpa": [900.0] * 6})
    # 125 psi is TEST-V6's minimum in tests/data/fleet.csv; pint gives it in kPa.
    minimum_kpa = UREG.Quantity(125, "psi").to("kPa").magnitude
    fig = cylinder_bars(readings, "psi", [[1, 3, 5], [2, 4, 6]], minimum_kpa=minimum_kpa)
    lines = [(shape.yref, shape.y0) for shape in fig.layout.shapes]
    assert [ref for ref, _ in lines] == ["y", "y2"]
    assert [y for _, y in lines] == pytest.approx([125.0, 125.0], rel=1e-12)
    assert all(a.text == "family minimum 125 psi" for a in fig.layout.annotations
               if "minimum" in a.text)


def test_value_axis_starts_at_zero_and_leaves_room_above_the_tallest() -> None:
    readings = pd.DataFrame({"cylinder": [1, 2], "value_kpa": [1000.0, 800.0]})
    fig = cylinder_bars(readings, "kPa", [[1, 2]], minimum_kpa=1100.0)
    low, high = fig.layout.yaxis.range
    assert low == 0 and high > 1100.0


# -- Unit history and Fleet wear figures -------------------------------------------------------
#
# The reports below are plain data in the shape of fleetdb.health.unit_report (DEVELOPERS.md,
# "The health API"): two cylinders on a straight wear line 1000 - 0.02 h kPa (sea level),
# limit 900 kPa, so the line meets the limit at (1000 - 900) / 0.02 = 5000 h (arithmetic).

import numpy as np  # noqa: E402

from dashboard import figures  # noqa: E402

HOURS = [1000.0, 2000.0, 3000.0]


def _report(**changes: object) -> dict:
    """A unit report by hand: test 1 sound, test 2 not trustworthy, test 3 voided, test 4 a
    sudden drop on cylinder 2; cylinder readings at sea level 2 % above the gauge."""
    tests = [{"test_id": 1, "tested_at": "2024-01-10 09:00", "hours": 1000.0,
              "trustworthy": True, "voided": False, "findings": []},
             {"test_id": 2, "tested_at": "2024-06-10 09:00", "hours": 2000.0,
              "trustworthy": False, "voided": False, "findings": []},
             {"test_id": 3, "tested_at": "2024-12-10 09:00", "hours": 3000.0,
              "trustworthy": True, "voided": True, "findings": []},
             {"test_id": 4, "tested_at": "2025-03-10 09:00", "hours": 3500.0,
              "trustworthy": True, "voided": False, "findings": []}]
    readings = []
    for test in tests:
        for cylinder in (1, 2):
            sl = 1000.0 - 0.02 * test["hours"]
            step = test["test_id"] == 4 and cylinder == 2
            sl = sl - 150.0 if step else sl
            readings.append({"test_id": test["test_id"], "tested_at": test["tested_at"],
                             "hours": test["hours"], "kind": "compression",
                             "cylinder": cylinder, "value_kpa": sl / 1.02, "value_sl_kpa": sl,
                             "in_fit": test["test_id"] in (1, 4) and not step, "step": step})
        readings.append({"test_id": test["test_id"], "tested_at": test["tested_at"],
                         "hours": test["hours"], "kind": "vacuum_cranking", "cylinder": None,
                         "value_kpa": 3.386388640341 * 2, "value_sl_kpa": 7.0,
                         "in_fit": False, "step": False})
    fit = {"current": True, "start_hours": 1000.0, "end_hours": 3500.0, "n": 2,
           "limit": 900.0, "slope_used": -0.02, "intercept_used": 1000.0,
           "projected_hours": 5000.0, "projected_hours_early": 4500.0}
    report = {
        "unit": {"fleet_no": "X-1", "min_compression_kpa": 900.0, "min_ratio": 0.75},
        "level": "watch", "reasons": [], "projected_hours": 5000.0,
        "projected_hours_early": 4500.0, "tests": tests, "readings": readings,
        "fits": [{**fit, "cylinder": 1}, {**fit, "cylinder": "spread", "limit": 0.75,
                                          "slope_used": -1e-5, "intercept_used": 1.0,
                                          "projected_hours": 25000.0,
                                          "projected_hours_early": 20000.0}],
        "spread": [{"test_id": t["test_id"], "tested_at": t["tested_at"], "hours": t["hours"],
                    "ratio": 0.98, "voided": t["voided"], "trustworthy": t["trustworthy"]}
                   for t in tests],
        "events": [{"date": "2024-09-10", "hours": None, "kind": "valves", "cylinders": [2],
                    "note": None}],
    }
    report.update(changes)
    return report


def _trace(fig: object, name: str) -> object:
    matches = [t for t in fig.data if t.name == name]
    assert len(matches) == 1, [t.name for t in fig.data]
    return matches[0]


@pytest.mark.parametrize("unit", ["psi", "bar", "kPa"])
def test_unit_compression_draws_each_standing_apart_in_the_chosen_unit(unit: str) -> None:
    fig = figures.unit_compression(_report(), unit)
    assert fig.layout.yaxis.title.text == f"compression ({unit}, sea-level equivalent)"
    assert fig.layout.xaxis.title.text == "engine hours (h)"
    cyl1 = _trace(fig, "Cyl 1")
    assert list(cyl1.x) == [1000.0, 3500.0]  # tests 2 (untrustworthy) and 3 (voided) apart
    assert list(cyl1.y) == pytest.approx([_pint(1000 - 0.02 * h, unit) for h in (1000, 3500)])
    symbols = {figures.READING_MARKERS[s][1]: figures.READING_MARKERS[s][0]
               for s in ("step", "untrustworthy", "voided")}
    for words, symbol in symbols.items():
        assert _trace(fig, words).marker.symbol == symbol
    assert len(set(symbols.values()) | {cyl1.marker.symbol}) == 4  # four shapes, not colours
    assert list(_trace(fig, "sudden drop (starts a new fit)").x) == [3500.0]
    assert list(_trace(fig, "test not trustworthy (left out)").x) == [2000.0, 2000.0]
    assert list(_trace(fig, "test voided (left out)").x) == [3000.0, 3000.0]


def test_unit_compression_draws_the_wear_line_its_projection_and_the_limit() -> None:
    fig = figures.unit_compression(_report(), "psi")
    lines = [t for t in fig.data if t.mode == "lines"]
    solid = [t for t in lines if t.line.dash is None]
    dotted = [t for t in lines if t.line.dash == "dot"]
    assert [list(t.x) for t in solid] == [[1000.0, 3500.0]]
    assert list(solid[0].y) == pytest.approx([_pint(980.0, "psi"), _pint(930.0, "psi")])
    assert [list(t.x) for t in dotted] == [[3500.0, 5000.0]]  # reaches the limit at 5000 h
    assert dotted[0].y[-1] == pytest.approx(_pint(900.0, "psi"))
    crossing = _trace(fig, "projected crossing (bar: to the conservative 95 % date)")
    assert list(crossing.x) == [5000.0] and list(crossing.error_x.arrayminus) == [500.0]
    limit = [s for s in fig.layout.shapes if s.type == "line" and s.y0 == s.y1]
    assert [s.y0 for s in limit] == pytest.approx([_pint(900.0, "psi")])
    assert any(a.text == f"family minimum {_pint(900.0, 'psi'):.0f} psi (sea-level equivalent)"
               for a in fig.layout.annotations)


def test_unit_compression_as_measured_shows_the_gauge_and_no_sea_level_lines() -> None:
    fig = figures.unit_compression(_report(), "kPa", basis="measured")
    assert list(_trace(fig, "Cyl 2").y) == pytest.approx([980.0 / 1.02])
    assert [t for t in fig.data if t.mode == "lines"] == []
    assert fig.layout.yaxis.title.text == "compression (kPa, as measured)"


def test_service_event_without_hours_is_placed_by_its_date() -> None:
    # 2024-09-10 00:00 lies 92 days less 9 hours into the 183 days from 2024-06-10 09:00
    # (2000 h) to 2024-12-10 09:00 (3000 h): linear interpolation (arithmetic).
    fig = figures.unit_compression(_report(), "psi")
    events = [s for s in fig.layout.shapes if s.type == "line" and s.x0 == s.x1]
    assert [s.x0 for s in events] == pytest.approx([2000 + 1000 * (92 * 24 - 9) / (183 * 24)])
    assert any(a.text == "valves (cyl 2)" for a in fig.layout.annotations)


def test_unit_spread_has_its_limit_and_the_excluded_tests_apart() -> None:
    fig = figures.unit_spread(_report())
    assert fig.layout.yaxis.title.text == "lowest ÷ highest (ratio)"
    assert list(_trace(fig, "in the fit").x) == [1000.0, 3500.0]
    assert _trace(fig, "test voided (left out)").marker.symbol == "x-thin-open"
    assert [s.y0 for s in fig.layout.shapes if s.y0 == s.y1] == [0.75]
    solid = [t for t in fig.data if t.mode == "lines" and t.line.dash is None]
    assert list(solid[0].y) == pytest.approx([1.0 - 1e-5 * 1000, 1.0 - 1e-5 * 3500])


def test_unit_vacuum_is_in_inches_of_mercury() -> None:
    # pint: 1 inHg = 3.386388640341 kPa (conventional mercury, as fleetdb.units).
    fig = figures.unit_vacuum(_report())
    assert fig.layout.yaxis.title.text == "vacuum below ambient (inHg)"
    kept = _trace(fig, "cranking vacuum")
    assert list(kept.x) == [1000.0, 3500.0]
    assert list(kept.y) == pytest.approx([UREG.Quantity(3.386388640341 * 2, "kPa")
                                          .to("inHg").magnitude] * 2)
    assert _trace(fig, "cranking: test not trustworthy or voided").marker.symbol == "circle-open"


def test_empty_report_says_so() -> None:
    report = _report(readings=[], spread=[])
    for fig in (figures.unit_compression(report, "psi"), figures.unit_spread(report),
                figures.unit_vacuum(report)):
        assert fig.data == ()
        assert fig.layout.annotations[0].text.startswith("No ")


def _wear_frame(n: int) -> pd.DataFrame:
    rng = np.random.default_rng(3)
    return pd.DataFrame({"fleet_no": [f"U-{i:05d}" for i in range(n)],
                         "family": np.where(np.arange(n) % 3 == 0, "F-B", "F-A"),
                         "site": "S", "cylinder": 1,
                         "wear_kpa_per_1000h": rng.normal(20, 4, n),
                         "faster_than_family": np.arange(n) % 97 == 0})


def test_family_wear_rates_box_per_family_and_the_highlighted_unit() -> None:
    wear = _wear_frame(90)
    fig = figures.family_wear_rates(wear, "psi", highlight="U-00004")
    boxes = [t for t in fig.data if t.type == "box"]
    assert [b.name for b in boxes] == ["F-A", "F-B"]
    f_a = wear[wear["family"] == "F-A"]["wear_kpa_per_1000h"]
    assert boxes[0].median[0] == pytest.approx(_pint(f_a.median(), "psi"))
    chosen = _trace(fig, "U-00004 (chosen)")
    assert chosen.marker.symbol == "star" and list(chosen.text) == ["U-00004"]
    assert chosen.y[0] == pytest.approx(_pint(wear.at[4, "wear_kpa_per_1000h"], "psi"))
    assert fig.layout.yaxis.title.text == "compression lost (psi per 1000 h)"
    hovered = {row[0] for t in fig.data if t.type == "scatter" and t.customdata is not None
               for row in t.customdata}
    assert hovered == set(wear["fleet_no"])  # small families: every unit is placed


def test_family_wear_rates_samples_large_families_but_keeps_the_fast_ones() -> None:
    wear = _wear_frame(3000)  # 31 fast units: fewer than a third of the sample, all kept
    fig = figures.family_wear_rates(wear, "kPa")
    placed = [t for t in fig.data if t.type == "scatter" and t.customdata is not None]
    assert all(len(t.x) <= figures.MAX_POINTS + figures.MAX_POINTS // 3 for t in placed)
    shown = {row[0] for t in placed for row in t.customdata}
    assert set(wear.loc[wear["faster_than_family"], "fleet_no"]) <= shown
    many_fast = wear.assign(faster_than_family=True)
    placed = [t for t in figures.family_wear_rates(many_fast, "kPa").data
              if t.type == "scatter" and t.customdata is not None]
    assert all(len(t.x) <= figures.MAX_POINTS + figures.MAX_POINTS // 3 for t in placed)


def _tests_frame() -> pd.DataFrame:
    rows = []
    for u in range(40):
        for k in range(5):
            hours = 500.0 * k + 37 * u
            rows.append({"fleet_no": f"U-{u:02d}", "family": "F-A", "site": "S",
                         "elevation_m": 0.0, "tested_at": pd.Timestamp("2024-01-01"),
                         "hours": hours, "lowest_kpa": 1000 - 0.02 * hours,
                         "lowest_sl_kpa": 1000 - 0.02 * hours, "mean_kpa": 1010.0,
                         "mean_sl_kpa": 1010.0})
    return pd.DataFrame(rows)


def test_family_compression_draws_a_band_a_sample_and_the_limit() -> None:
    fig = figures.family_compression(_tests_frame(), "bar", 900.0, "F-A", highlight="U-07")
    unit_lines = [t for t in fig.data if t.name and t.name.startswith("U-")]
    assert len(unit_lines) == figures.MAX_UNIT_SERIES  # 29 sampled + the chosen one
    chosen = _trace(fig, "U-07 (chosen)")
    assert chosen.marker.symbol == "star"
    assert list(chosen.y) == pytest.approx([_pint(1000 - 0.02 * (500 * k + 259), "bar")
                                            for k in range(5)])
    assert [s.y0 for s in fig.layout.shapes] == pytest.approx([_pint(900.0, "bar")])
    assert fig.layout.yaxis.title.text == "lowest cylinder (bar, sea-level equivalent)"


def test_sites_compared_puts_raw_and_sea_level_side_by_side() -> None:
    # Two sites, the same engines: at 1700 m the gauge reads lower by the barometer ratio
    # (the barometer from the 1976 standard atmosphere of the ambiance package); the
    # sea-level equivalents (gauge x 101.325 / barometer) agree again.
    from ambiance import Atmosphere

    baro = float(Atmosphere(1700.0).pressure[0]) / 1000.0
    sea = np.array([1000.0, 1010.0, 1002.0, 1012.0])
    high = np.array([False, False, True, True])
    gauge = np.where(high, sea * baro / 101.325, sea)
    latest = pd.DataFrame({"fleet_no": ["A", "B", "C", "D"],
                           "site": np.where(high, "High", "Low"),
                           "elevation_m": np.where(high, 1700.0, 0.0), "mean_kpa": gauge,
                           "mean_sl_kpa": gauge * 101.325 / np.where(high, baro, 101.325)})
    fig = figures.sites_compared(latest, "kPa", "F-A")
    boxes = [t for t in fig.data if t.type == "box"]
    assert [(b.name, b.xaxis) for b in boxes] == [("Low", "x"), ("High", "x"), ("Low", "x2"),
                                                  ("High", "x2")]
    assert boxes[0].median[0] - boxes[1].median[0] == pytest.approx(1005 - 1007 * baro
                                                                    / 101.325)
    assert boxes[2].median[0] - boxes[3].median[0] == pytest.approx(-2.0)
    assert list(fig.layout.xaxis.ticktext) == ["Low<br>0 m", "High<br>1,700 m"]
    assert fig.layout.yaxis.title.text == "mean of the cylinders (kPa)"


def test_reading_status_precedence() -> None:
    readings = pd.DataFrame({"test_id": [1, 2, 3, 3], "step": [True, True, True, False]})
    tests = pd.DataFrame({"test_id": [1, 2, 3], "trustworthy": [True, False, False],
                          "voided": [False, False, True]})
    assert list(figures.reading_status(readings, tests)) == ["step", "untrustworthy",
                                                             "voided", "voided"]
