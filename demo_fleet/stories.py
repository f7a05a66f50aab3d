"""The planted stories: what each planted unit's history holds and what analysis must find.

See README.md for the table. Fleet numbers are fixed; dates move with ``as_of``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from demo_fleet.catalogue import FAMILIES, PLANTED, WORN_BEFORE_OVERHAUL_PSI
from fleetdb.units import KPA_PER_UNIT

PSI_KPA = KPA_PER_UNIT["psi"]
#: Volts under crank of the weak-battery tests (stories 5a, 5b).
WEAK_BATTERY_V = {"5a": 8.4, "5b": 8.7}
#: Cranking vacuum of the shut-intake test (story 4), inHg, throttle recorded open.
SHUT_INTAKE_VAC_INHG = 13.5
#: Share of the reading left by a planted fault, per story and cylinder.
DEFECTS = {"2": {3: 0.55}, "3a": {3: 0.675, 5: 0.695}}
#: Leak-down of the faulty cylinders, percent.
LEAKDOWN = {"2": {3: 48.0}, "3a": {3: 34.0, 5: 37.0}}
#: Wet tests on the suspect cylinders: story -> {cylinder: oil can seal the leak (rings) or
#: not (valve)}.
WET = {"2": {3: False}, "3b": {1: True, 2: True}}
#: Story 3b: the two ring-worn cylinders copy story 3a's two gasket cylinders.
TWIN_CYLINDERS = {1: 3, 2: 5}
NOTES = {
    ("2", "latest"): "rough idle; 3 low, little change with oil; leak-down 3: air at exhaust",
    ("3a", "latest"): "3 and 5 low; leak-down: air out of the next plug hole, coolant bubbles",
    ("3b", "latest"): "1 and 2 low; both come up well with oil",
    ("4", "restriction"): "hard start, all cylinders low; throttle held open",
    ("4", "latest"): "retest after throttle repair",
    ("5a", "latest"): "slow crank, battery 4 years old",
    ("5b", "weak"): "slow crank; battery swapped next day",
    ("6", "after_overhaul"): "first test after overhaul",
    ("7", "idle"): "idle vacuum: no throttle plate, reads near zero",
}


@dataclass(frozen=True)
class Story:
    """What the analysis must find for one planted unit.

    ``level`` is the exact health level expected at ``as_of``; every code in ``codes`` must be
    among the unit's reasons and none of ``absent``; ``level == "sound"`` means no reason at
    all. Where ``test_at`` is set, that one test must carry ``test_codes``.
    """

    fleet_no: str
    story: str
    level: str
    codes: tuple[str, ...]
    absent: tuple[str, ...]
    description: str
    test_at: pd.Timestamp | None = None
    test_codes: tuple[str, ...] = ()


def story_of(tests: pd.DataFrame, units: pd.DataFrame) -> np.ndarray:
    """Story id of each test's unit.

    :param tests: the test table.
    :param units: the unit table.
    """
    return units["story"].reindex(tests["fleet_no"]).to_numpy()


def mark_roles(tests: pd.DataFrame, units: pd.DataFrame) -> None:
    """Name the planted tests (``role``) and split story 6's history at its overhaul.

    :param tests: the test table (modified in place).
    :param units: the unit table.
    """
    story = story_of(tests, units)
    seq, n = tests["seq"].to_numpy(), tests["n_tests"].to_numpy()
    tests.loc[tests["is_latest"] & (story != "10"), "role"] = "latest"
    tests.loc[(story == "4") & (seq == n - 2), "role"] = "restriction"
    tests.loc[(story == "5b") & (seq == n // 2), "role"] = "weak"
    tests.loc[(story == "6") & (seq == n - 4), "role"] = "after_overhaul"
    tests.loc[(story == "6") & (seq >= n - 4), "segment"] = 1
    tests.loc[(story == "7") & (seq % 2 == 1), "role"] = "idle"


def overhaul_offset(tests: pd.DataFrame) -> int:
    """Story 6: days before as_of of the overhaul (a month before its next test).

    :param tests: the test table with roles.
    """
    return int(tests.loc[tests["role"] == "after_overhaul", "offset"].iloc[0]) + 30


def hours_at(tests: pd.DataFrame, fleet_no: str, offset: int) -> float:
    """Hour meter of a unit on a day between two of its tests, by linear interpolation.

    :param tests: the test table with hours.
    :param fleet_no: the unit.
    :param offset: days before as_of.
    """
    own = tests[tests["fleet_no"] == fleet_no].sort_values("offset")
    return float(np.round(np.interp(offset, own["offset"], own["hours"])))


def apply_conditions(tests: pd.DataFrame, units: pd.DataFrame, rng: np.random.Generator) -> None:
    """Set the planted test conditions: weak battery, shut intake, diesel idle vacuum, notes.

    :param tests: the test table (modified in place).
    :param units: the unit table.
    :param rng: the demo's random generator.
    """
    story = story_of(tests, units)
    role = tests["role"].to_numpy()
    for key, volts in WEAK_BATTERY_V.items():
        weak = (story == key) & (role == ("latest" if key == "5a" else "weak"))
        tests.loc[weak, "battery_v"] = volts
    shut = role == "restriction"
    tests.loc[shut, "vac_true_inhg"] = SHUT_INTAKE_VAC_INHG
    tests.loc[shut, "idle_recorded"] = False  # it would not idle properly with the blade shut
    si = tests["spark_ignition"].to_numpy()
    tests.loc[si & (role != ""), ["vac_recorded", "throttle_open"]] = [True, "yes"]
    tests.loc[(story == "2") & (role == "latest"), ["idle_recorded", "leakdown_recorded"]] = True
    tests.loc[(story == "2") & (role == "latest"), "idle_inhg"] = 15.5
    tests.loc[(story == "3a") & (role == "latest"), "leakdown_recorded"] = True
    idle = role == "idle"
    tests.loc[idle, "idle_recorded"] = True
    tests.loc[idle, "idle_inhg"] = rng.uniform(0.5, 1.5, int(idle.sum()))
    for (key, which), note in NOTES.items():
        tests.loc[(story == key) & (role == which), "note"] = note


def fit_wear(cylinders: pd.DataFrame, tests: pd.DataFrame, units: pd.DataFrame,
             overhaul_hours: float) -> None:
    """Give each planted unit the wear rate that brings it to its target at its latest test.

    Story 6 also gets its pre-overhaul life (worn to WORN_BEFORE_OVERHAUL_PSI); in story 3b
    the rings of cylinders 1 and 2 start wearing fast a year or so before the latest test,
    down to the level of story 3a's two gasket cylinders.

    :param cylinders: from ``history.draw_cylinders`` (modified in place).
    :param tests: the test table with hours.
    :param units: the unit table.
    :param overhaul_hours: story 6's hour meter at its overhaul.
    """
    latest_hours = tests[tests["is_latest"]].set_index("fleet_no")["hours"]
    by_no = {p.fleet_no: p for p in PLANTED}
    for fleet_no, planted in by_no.items():
        last_seg = 1 if planted.story == "6" else 0
        targets = [(last_seg, planted.target_psi,
                    latest_hours[fleet_no] - (overhaul_hours if last_seg else 0.0))]
        if planted.story == "6":
            targets.append((0, WORN_BEFORE_OVERHAUL_PSI, overhaul_hours))
        for segment, target_psi, life_hours in targets:
            rows = (cylinders["fleet_no"] == fleet_no) & (cylinders["segment"] == segment)
            mean_new = cylinders.loc[rows, "new_kpa"].mean()
            rate = (mean_new - target_psi * PSI_KPA) / life_hours
            cylinders.loc[rows, "wear_kpa_per_h"] = rate * cylinders.loc[rows, "rate_jitter"]
    # Story 3b: rings of cylinders 1 and 2 start wearing fast two tests before the latest.
    gasket = by_no[planted_no("3a")]
    twin = planted_no("3b")
    own = tests[tests["fleet_no"] == twin]
    onset = float(own.loc[own["seq"] == own["n_tests"] - 3, "hours"].iloc[0])
    for cyl, gasket_cyl in TWIN_CYLINDERS.items():
        rows = (cylinders["fleet_no"] == twin) & (cylinders["segment"] == 0) \
            & (cylinders["cylinder"] == cyl)
        target = gasket.target_psi * DEFECTS["3a"][gasket_cyl] * PSI_KPA
        ordinary = cylinders.loc[rows, "new_kpa"] \
            - cylinders.loc[rows, "wear_kpa_per_h"] * latest_hours[twin]
        cylinders.loc[rows, "onset_hours"] = onset
        cylinders.loc[rows, "extra_kpa_per_h"] = (ordinary - target) / (latest_hours[twin] - onset)


def planted_no(story: str) -> str:
    """Fleet number of the planted unit telling ``story``.

    :param story: story id, e.g. ``"3a"``.
    """
    return next(p.fleet_no for p in PLANTED if p.story == story)


def defects(tests: pd.DataFrame, units: pd.DataFrame) -> pd.DataFrame:
    """Planted faults as rows ``test_id, cylinder, factor``.

    :param tests: the test table with roles.
    :param units: the unit table.
    """
    story = story_of(tests, units)
    rows = []
    for key, cyls in DEFECTS.items():
        test_id = tests.index[(story == key) & (tests["role"] == "latest").to_numpy()][0]
        rows += [(test_id, cyl, factor) for cyl, factor in cyls.items()]
    return pd.DataFrame(rows, columns=["test_id", "cylinder", "factor"])


def copy_twin_values(dry: pd.DataFrame, tests: pd.DataFrame) -> None:
    """Story 3b's latest readings on cylinders 1 and 2 equal story 3a's on 3 and 5.

    :param dry: dry readings (``value`` modified in place).
    :param tests: the test table with roles.
    """
    latest = tests[tests["role"] == "latest"]
    source = latest.index[latest["fleet_no"] == planted_no("3a")][0]
    target = latest.index[latest["fleet_no"] == planted_no("3b")][0]
    for cyl, gasket_cyl in TWIN_CYLINDERS.items():
        value = dry.loc[(dry["test_id"] == source) & (dry["cylinder"] == gasket_cyl), "value"]
        dry.loc[(dry["test_id"] == target) & (dry["cylinder"] == cyl), "value"] = value.iloc[0]


def events(tests: pd.DataFrame, units: pd.DataFrame, overhaul: tuple[int, float]) -> pd.DataFrame:
    """Service events of the planted units: ``fleet_no, offset, hours, kind, cylinders, note``.

    :param tests: the test table with roles and hours.
    :param units: the unit table.
    :param overhaul: story 6's overhaul (days before as_of, hour meter).
    """
    story = story_of(tests, units)
    shut = tests[tests["role"] == "restriction"].iloc[0]
    weak = tests[(story == "5b") & (tests["role"] == "weak").to_numpy()].iloc[0]
    rows = [
        (shut["fleet_no"], int(shut["offset"]) - 2, "throttle", "",
         "throttle body replaced: blade stayed shut with ignition off"),
        (weak["fleet_no"], int(weak["offset"]) - 1, "other", "", "battery replaced"),
        (planted_no("6"), overhaul[0], "overhaul", "",
         "engine overhauled: rings, bearings, valve job"),
    ]
    frame = pd.DataFrame(rows, columns=["fleet_no", "offset", "kind", "cylinders", "note"])
    frame["hours"] = [overhaul[1] if kind == "overhaul" else hours_at(tests, no, off)
                      for no, off, kind in zip(frame["fleet_no"], frame["offset"], frame["kind"],
                                               strict=True)]
    return frame


def records(tests: pd.DataFrame, units: pd.DataFrame) -> list[Story]:
    """The story list: one record per planted unit, then one per plainly sound unit.

    :param tests: the test table with roles.
    :param units: the unit table.
    """
    def at(role: str, story: str) -> pd.Timestamp:
        mask = (story_of(tests, units) == story) & (tests["role"] == role).to_numpy()
        return pd.Timestamp(tests.loc[mask, "tested_at"].iloc[0])

    no = planted_no
    fam = FAMILIES
    out = [
        Story(no("1"), "1", "plan", ("projected_limit",), ("below_minimum", "sudden_drop"),
              f"prime-power set, steady ring wear on all six cylinders toward "
              f"{fam['Quillan 6G'].min_compression:g} psi; crossing projected a few months on"),
        Story(no("2"), "2", "act",
              ("below_minimum", "single_low", "sudden_drop", "spread_over_limit",
               "valves_suspected"), ("adjacent_pair_low",),
              "burnt valve: cylinder 3 drops on the latest test; wet test shows little rise"),
        Story(no("3a"), "3a", "act",
              ("below_minimum", "adjacent_pair_low", "sudden_drop", "spread_over_limit"),
              ("single_low",), "head gasket: adjacent cylinders 3 and 5 (bank 1-3-5) low together"),
        Story(no("3b"), "3b", "act", ("below_minimum", "spread_over_limit", "rings_suspected"),
              ("adjacent_pair_low",),
              "same two values as 3a on cylinders 1 and 2 (opposite banks), rings worn over the "
              "last year: not a gasket"),
        Story(no("4"), "4", "sound", (), ("below_minimum", "sudden_drop", "all_low_restriction"),
              "intake stayed shut on one test (13.5 inHg, throttle recorded open); normal on the "
              "retest a week later after the throttle repair",
              at("restriction", "4"), ("all_low_restriction",)),
        Story(no("5a"), "5a", "retest", ("weak_battery", "slow_cranking"),
              ("below_minimum", "sudden_drop"),
              "latest test taken on a weak battery at about 100 rpm: all low, not wear"),
        Story(no("5b"), "5b", "sound", (), ("below_minimum", "sudden_drop", "projected_limit"),
              "one weak-battery test in the middle of the history; battery replaced next day",
              at("weak", "5b"), ("weak_battery", "slow_cranking")),
        Story(no("6"), "6", "sound", (), ("below_minimum", "projected_limit", "sudden_drop"),
              "worn to the limit, overhauled; compression back to new after the overhaul"),
        Story(no("7"), "7", "sound", (), ("all_low_restriction",),
              "diesel: no throttle, idle vacuum near zero; nothing to flag"),
        Story(no("8"), "8", "retest", ("test_overdue",), ("below_minimum", "projected_limit"),
              "lightly used sweeper not tested for about two years; healthy then"),
        Story(no("9"), "9", "sound", (), ("below_minimum", "projected_limit"),
              "1,705 m site: raw readings under the minimum, healthy at sea-level equivalent"),
    ]
    out += [Story(str(f), "10", "sound", (), (), "plainly sound")
            for f in units.index[units["story"] == "10"]]
    return out
