"""The invented demo fleet: determinism, formats, physics and the planted stories.

Outside references used here:
* pint (PyPI) for unit conversions, independent of fleetdb.units;
* ambiance (PyPI, ICAO Standard Atmosphere 1993, Doc 7488/3) for ambient pressure;
* the polytropic relation p_g = (p_baro - v) * CR**n - p_baro (domain.md §3.1 (a)), with
  the worked values of domain.md §9 row 12 (computed);
* OLS prediction intervals, Montgomery, Peck & Vining ch. 2 eq. (2.45) (domain.md §6.1 (a)),
  with Student-t quantiles from scipy.
"""

from __future__ import annotations

import datetime as dt
import itertools
import re
import warnings

import numpy as np
import pandas as pd
import pint
import pytest
from ambiance import Atmosphere
from scipy import stats

import demo_fleet
from demo_fleet import model
from demo_fleet.__main__ import main

AS_OF = dt.date(2025, 6, 30)
UREG = pint.UnitRegistry()
KPA = {u: UREG.Quantity(1.0, u).to("kPa").magnitude for u in ("psi", "kPa", "bar", "inHg")}
P0_KPA = 101.325  # ICAO / ISO 2533 sea-level pressure

# design.md, "Import formats": the columns, in order.
FLEET_COLUMNS = ["fleet_no", "site", "engine_family", "in_service", "hours_per_week",
                 "site_elevation_m", "fuel", "cylinders", "banks", "compression_ratio",
                 "min_compression", "compression_units", "min_ratio"]
TESTS_COLUMNS = ["fleet_no", "tested_at", "hours", "kind", "cylinder", "value", "units",
                 "battery_v", "crank_rpm", "engine_temp_c", "baro_kpa", "throttle_open",
                 "technician", "note"]
EVENTS_COLUMNS = ["fleet_no", "date", "hours", "kind", "cylinders", "note"]
KINDS = {"compression", "wet", "leakdown", "relative", "vacuum_cranking", "vacuum_idle"}
UNITS = {"psi", "kPa", "bar", "inHg", "mmHg", "%"}
EVENT_KINDS = {"overhaul", "head", "valves", "rings", "throttle", "control_module", "other"}
LEVELS = {"act", "plan", "retest", "watch", "sound"}
CODES = {"below_minimum", "spread_over_limit", "single_low", "adjacent_pair_low",
         "all_low_restriction", "weak_battery", "slow_cranking", "cold_engine", "sudden_drop",
         "projected_limit", "wear_faster_than_family", "test_overdue", "rings_suspected",
         "valves_suspected"}


@pytest.fixture(scope="module")
def demo() -> demo_fleet.DemoFleet:
    return demo_fleet.build(as_of=AS_OF, seed=42)


@pytest.fixture(scope="module")
def families(demo) -> pd.DataFrame:
    return _families(demo)


@pytest.fixture(scope="module")
def dry(demo, families) -> pd.DataFrame:
    return _dry(demo, families)


def _families(demo) -> pd.DataFrame:
    """Family attributes, carried on the first row of each family."""
    first = demo.fleet.dropna(subset=["fuel"]).set_index("engine_family")
    first["min_kpa"] = first["min_compression"] * first["compression_units"].map(KPA)
    # the invented family wear rates (README.md), as kPa per hour (negative: a loss)
    first["design_kpa_per_h"] = [-demo_fleet.FAMILIES[f].wear_psi_per_hour * KPA["psi"]
                                 for f in first.index]
    return first


def _dry(demo, families) -> pd.DataFrame:
    """Dry compression readings with sea-level-normalised kPa and validity of their test."""
    sites = demo.fleet.dropna(subset=["site_elevation_m"]).set_index("site")["site_elevation_m"]
    unit = demo.fleet.set_index("fleet_no")
    t = demo.tests
    tests = t[t["kind"] == "compression"].copy()
    tests["family"] = unit.loc[tests["fleet_no"], "engine_family"].to_numpy()
    tests["site"] = unit.loc[tests["fleet_no"], "site"].to_numpy()
    isa = Atmosphere(sites.loc[tests["site"]].to_numpy()).pressure / 1000.0
    tests["baro_used"] = tests["baro_kpa"].fillna(pd.Series(isa, index=tests.index))
    tests["kpa"] = tests["value"] * tests["units"].map(KPA)
    tests["sl_kpa"] = tests["kpa"] * P0_KPA / tests["baro_used"]
    cranking = t[t["kind"] == "vacuum_cranking"].set_index(["fleet_no", "tested_at"])["value"]
    vac = cranking.reindex(pd.MultiIndex.from_frame(tests[["fleet_no", "tested_at"]]))
    diesel = families.loc[tests["family"], "fuel"].to_numpy() == "diesel"
    # Validity gates, domain.md: D4 9.6 V at >= 20 degC (a); D2 150 rpm (c), D3 140 rpm
    # diesel (a); D8 3 inHg with the throttle held open (b/c).
    tests["valid"] = ((tests["battery_v"] >= 9.6)
                      & (tests["crank_rpm"] >= np.where(diesel, 140, 150))
                      & ~(vac.to_numpy() > 3.0))
    tests["min_kpa"] = families.loc[tests["family"], "min_kpa"].to_numpy()
    return tests


def _ols_lower(x: np.ndarray, y: np.ndarray, x0: np.ndarray, two_sided: bool
               ) -> tuple[np.ndarray, float, float]:
    """Lower 95 % prediction bound at x0 (Montgomery et al., eq. 2.45), slope, and Fieller's
    g = t^2 s^2 / (b1^2 Sxx) (domain.md §6.2; g >= 1: slope not significant, no crossing)."""
    fit = stats.linregress(x, y)
    n = len(x)
    s = np.sqrt(np.sum((y - fit.intercept - fit.slope * x) ** 2) / (n - 2))
    sxx = np.sum((x - x.mean()) ** 2)
    t = stats.t.ppf(0.975 if two_sided else 0.95, n - 2)
    half = t * s * np.sqrt(1 + 1 / n + (x0 - x.mean()) ** 2 / sxx)
    g = (t * s) ** 2 / (fit.slope**2 * sxx) if fit.slope != 0 else np.inf
    return fit.intercept + fit.slope * x0 - half, fit.slope, g


def _current_life(dry: pd.DataFrame, demo) -> pd.DataFrame:
    """Valid tests after each unit's last overhaul."""
    overhaul = demo.events[demo.events["kind"] == "overhaul"].groupby("fleet_no")["date"].max()
    since = overhaul.reindex(dry["fleet_no"]).to_numpy()
    keep = pd.isna(since) | (dry["tested_at"].to_numpy() > since)
    return dry[keep & dry["valid"].to_numpy()]


def _story(demo, story_id: str) -> demo_fleet.Story:
    return next(s for s in demo.stories if s.story == story_id)


def _latest(frame: pd.DataFrame, fleet_no: str) -> pd.DataFrame:
    own = frame[frame["fleet_no"] == fleet_no]
    return own[own["tested_at"] == own["tested_at"].max()]


# ---------------------------------------------------------------- determinism, formats


def test_same_seed_and_day_give_identical_bytes(tmp_path, demo):
    with warnings.catch_warnings():
        # the demo curation settled every unit meant to be sound
        warnings.filterwarnings("error", message="demo curation")
        again = demo_fleet.build(as_of=AS_OF, seed=42)
    for name in ("fleet", "tests", "events"):
        pd.testing.assert_frame_equal(getattr(demo, name), getattr(again, name))
    first = demo.write_csv(tmp_path / "a")
    second = again.write_csv(tmp_path / "b")
    assert sorted(first) == ["events", "fleet", "tests"]
    for name in first:
        assert first[name].read_bytes() == second[name].read_bytes()
    other = demo_fleet.build(as_of=AS_OF, seed=7)
    assert not other.tests["value"].equals(demo.tests["value"])


def test_csv_holds_exactly_the_text_frames(tmp_path, demo):
    paths = demo.write_csv(tmp_path)
    for name, frame in demo.text_frames().items():
        back = pd.read_csv(paths[name], dtype=str, keep_default_na=False)
        pd.testing.assert_frame_equal(back, frame.astype(str), check_dtype=False)


def test_columns_are_the_import_formats(demo):
    assert list(demo.fleet.columns) == FLEET_COLUMNS
    assert list(demo.tests.columns) == TESTS_COLUMNS
    assert list(demo.events.columns) == EVENTS_COLUMNS


@pytest.mark.parametrize("as_of", [dt.date(2024, 3, 3), dt.date(2026, 1, 15)])
def test_as_of_is_the_last_day_and_history_spans_three_years(as_of):
    built = demo_fleet.build(as_of=as_of, seed=3)
    days = built.tests["tested_at"].dt.date
    assert days.max() == as_of
    assert days.min() <= as_of - dt.timedelta(days=3 * 365 + 1)
    assert (built.events["date"].dt.date <= as_of).all()
    assert (built.fleet["in_service"].dt.date < days.groupby(built.tests["fleet_no"]).min()
            .reindex(built.fleet["fleet_no"]).to_numpy()).all()


def test_as_of_defaults_to_today():
    built = demo_fleet.build(seed=1)
    assert built.as_of == dt.date.today()
    assert built.tests["tested_at"].dt.date.max() == dt.date.today()


def test_sites_at_sea_level_1000_m_and_1700_m(demo):
    elevations = demo.fleet["site_elevation_m"].dropna().to_numpy()
    assert demo.fleet["site"].nunique() == len(elevations) >= 3
    assert (elevations < 50).any()
    assert ((elevations > 900) & (elevations < 1100)).any()
    assert ((elevations > 1600) & (elevations < 1800)).any()


def test_fleet_size_and_engine_families(demo, families):
    assert 40 <= len(demo.fleet) <= 80
    assert demo.fleet["fleet_no"].is_unique
    assert len(families) == demo.fleet["engine_family"].nunique() >= 3
    by_fuel = families.reset_index().set_index("fuel")
    assert by_fuel.loc["lpg", "cylinders"] == 4 and "/" not in by_fuel.loc["lpg", "banks"]
    assert "/" in by_fuel.loc["gasoline", "banks"]
    assert by_fuel.loc["diesel", "cylinders"] == 6
    for fam in families.itertuples():
        listed = sorted(int(c) for c in re.split("[-/]", fam.banks))
        assert listed == list(range(1, fam.cylinders + 1))
    # attributes only on the first row naming a site or family
    assert demo.fleet["site_elevation_m"].notna().sum() == demo.fleet["site"].nunique()
    assert demo.fleet["fuel"].notna().sum() == demo.fleet["engine_family"].nunique()


def test_values_from_the_allowed_sets_and_typed_like_a_technician(demo, families):
    t = demo.tests
    assert set(t["kind"]) <= KINDS and set(t["units"]) <= UNITS
    assert set(demo.events["kind"]) <= EVENT_KINDS
    assert set(t["throttle_open"].dropna()) <= {"yes", "no"}
    pressure = t["kind"].isin(["compression", "wet"])
    vacuum = t["kind"].str.startswith("vacuum")
    assert set(t.loc[pressure, "units"]) <= {"psi", "kPa", "bar"}
    assert set(t.loc[vacuum, "units"]) == {"inHg"}
    assert set(t.loc[~pressure & ~vacuum, "units"]) == {"%"}
    assert t.loc[vacuum, "cylinder"].isna().all() and t.loc[~vacuum, "cylinder"].notna().all()
    count = families.loc[demo.fleet.set_index("fleet_no").loc[t["fleet_no"], "engine_family"],
                         "cylinders"].to_numpy()
    assert ((t["cylinder"].fillna(1) >= 1) & (t["cylinder"].fillna(1) <= count)).all()
    steps = {"psi": 1.0, "kPa": 1.0, "bar": 0.1, "inHg": 0.5, "%": 1.0}
    for unit, step in steps.items():
        values = t.loc[t["units"] == unit, "value"].to_numpy()
        assert np.allclose(values / step, np.round(values / step)), unit
    assert np.allclose(t["baro_kpa"].dropna() * 10, np.round(t["baro_kpa"].dropna() * 10))
    assert 0.05 < t["baro_kpa"].isna().mean() < 0.4  # measured on most tests, blank on some
    assert t["technician"].str.fullmatch(r"[A-Z][a-z]+|([A-Z]\.)+").all()


def test_each_site_types_its_own_units(demo):
    unit = demo.fleet.set_index("fleet_no")
    comp = demo.tests[demo.tests["kind"] == "compression"]
    per_site = comp.groupby(unit.loc[comp["fleet_no"], "site"].to_numpy())["units"].agg(set)
    assert {"psi"} in per_site.tolist() and {"kPa"} in per_site.tolist()
    assert any("bar" in units for units in per_site)


def test_stories_are_well_formed_and_present(demo):
    fleet = set(demo.fleet["fleet_no"])
    ids = {s.story for s in demo.stories}
    assert {"1", "2", "3a", "3b", "4", "5a", "5b", "6", "7", "8", "9", "10"} <= ids
    assert sum(s.story == "10" for s in demo.stories) >= 12
    for story in demo.stories:
        assert story.fleet_no in fleet
        assert story.level in LEVELS
        assert set(story.codes) | set(story.absent) | set(story.test_codes) <= CODES
        assert not set(story.codes) & set(story.absent)
        assert story.level != "sound" or not story.codes


# ---------------------------------------------------------------- physics


def test_restriction_factor_matches_worked_polytropic_values():
    # domain.md §9 row 12 (computed from the polytropic relation, §3.1 (a)): CR 9, n = 1.3,
    # 101.325 kPa: 5 inHg -> 198.27 / 240.99 psi, 15 inHg -> 112.81 / 240.99 psi.
    vac = np.array([5.0, 15.0]) * KPA["inHg"]
    got = model.intake_restriction_factor(9.0, 101.325, vac)
    np.testing.assert_allclose(got, np.array([198.27, 112.81]) / 240.99, rtol=1e-4)


def test_altitude_scales_readings_by_the_standard_atmosphere(demo):
    """Healthy units' readings over their true sea-level condition, 1,705 m vs 6 m.

    Expected ratio from ambiance (ICAO 1993 standard atmosphere), independent of fleetdb.
    """
    truth = demo.truth
    t = demo.tests[demo.tests["kind"] == "compression"]
    merged = truth.merge(t[["fleet_no", "tested_at", "cylinder", "value", "units"]],
                         on=["fleet_no", "tested_at", "cylinder"])
    sound = {s.fleet_no for s in demo.stories if s.story == "10"}
    merged = merged[merged["fleet_no"].isin(sound) & merged["valid"]]
    site = demo.fleet.set_index("fleet_no")["site"]
    elevation = demo.fleet.dropna(subset=["site_elevation_m"]).set_index("site")[
        "site_elevation_m"]
    merged["elev"] = elevation.loc[site.loc[merged["fleet_no"]]].to_numpy()
    merged["ratio"] = merged["value"] * merged["units"].map(KPA) / merged["sea_level_kpa"]
    low, high = elevation.min(), elevation.max()
    measured = (merged.loc[merged["elev"] == high, "ratio"].mean()
                / merged.loc[merged["elev"] == low, "ratio"].mean())
    expected = Atmosphere(high).pressure[0] / Atmosphere(low).pressure[0]
    assert measured == pytest.approx(expected, rel=0.006)
    # and the barometer typed at each site averages the standard atmosphere (weather noise)
    baro = demo.tests.drop_duplicates(["fleet_no", "tested_at"])
    for name, elev in elevation.items():
        typed = baro.loc[site.loc[baro["fleet_no"]].to_numpy() == name, "baro_kpa"].dropna()
        assert typed.mean() == pytest.approx(Atmosphere(elev).pressure[0] / 1000, abs=0.4)
        assert 0.2 < typed.std() < 1.5  # a few hPa of weather


def test_story4_restriction_follows_the_polytropic_relation(demo, dry, families):
    story = _story(demo, "4")
    own = dry[dry["fleet_no"] == story.fleet_no]
    shut = own[own["tested_at"] == story.test_at]
    retest = _latest(own, story.fleet_no)
    vac = demo.tests[(demo.tests["fleet_no"] == story.fleet_no)
                     & (demo.tests["kind"] == "vacuum_cranking")].set_index("tested_at")["value"]
    assert vac.loc[story.test_at] > 10.0 and vac.loc[retest["tested_at"].iloc[0]] <= 1.0
    assert (shut["sl_kpa"] < shut["min_kpa"]).all()
    assert (retest["sl_kpa"] > 1.1 * retest["min_kpa"]).all()
    shut_rows = demo.tests[(demo.tests["fleet_no"] == story.fleet_no)
                           & (demo.tests["tested_at"] == story.test_at)]
    assert set(shut_rows["throttle_open"]) == {"yes"}
    gap = retest["tested_at"].iloc[0] - story.test_at
    assert dt.timedelta(days=5) <= gap <= dt.timedelta(days=9)
    fix = demo.events[(demo.events["fleet_no"] == story.fleet_no)
                      & (demo.events["kind"] == "throttle")]
    assert ((fix["date"] > story.test_at) & (fix["date"] < retest["tested_at"].iloc[0])).all()
    assert len(fix) == 1
    # polytropic relation, n = 1.3 (domain.md §3.3 item 2), at the typed barometer
    cr = families.loc[shut["family"].iloc[0], "compression_ratio"]
    baro = shut["baro_used"].iloc[0]
    crn = cr ** 1.3
    v = vac.loc[story.test_at] * KPA["inHg"]
    expected = ((baro - v) * crn - baro) / (baro * (crn - 1))
    assert shut["sl_kpa"].mean() / retest["sl_kpa"].mean() == pytest.approx(expected, rel=0.05)


# ---------------------------------------------------------------- the planted stories


def test_story1_every_cylinder_heads_for_its_minimum_within_months(demo, dry):
    """Each cylinder's wear is significant and its straight line crosses the minimum within
    eighteen months; the earliest one-sided 95 % lower prediction bound (domain.md D12)
    crosses within a few months. Hours become weeks through the unit's hours per week."""
    story = _story(demo, "1")
    own = _current_life(dry, demo)
    own = own[own["fleet_no"] == story.fleet_no]
    latest = _latest(own, story.fleet_no)
    assert (latest["sl_kpa"] > latest["min_kpa"]).all()
    per_week = demo.fleet.set_index("fleet_no").loc[story.fleet_no, "hours_per_week"]
    grid = latest["hours"].iloc[0] + np.arange(0, 79) * per_week  # 18 months, week by week
    point_weeks, bound_weeks = [], []
    for _, cyl in own.groupby("cylinder"):
        x, y = cyl["hours"].to_numpy(), cyl["sl_kpa"].to_numpy()
        lower, slope, g = _ols_lower(x, y, grid, two_sided=False)
        assert slope < 0 and g < 1
        fit = stats.linregress(x, y)
        line = fit.intercept + fit.slope * grid
        limit = cyl["min_kpa"].iloc[0]
        assert line[-1] < limit
        point_weeks.append(int(np.argmax(line <= limit)))
        bound_weeks.append(int(np.argmax(lower <= limit)))
    assert 4 <= min(point_weeks) <= 40, point_weeks
    assert min(bound_weeks) <= 20, bound_weeks


def test_story2_burnt_valve_on_the_latest_test(demo, dry):
    story = _story(demo, "2")
    own = dry[dry["fleet_no"] == story.fleet_no]
    latest = _latest(own, story.fleet_no).set_index("cylinder")
    low = latest.index[latest["sl_kpa"] < latest["min_kpa"]]
    assert list(low) == [3]
    assert latest["kpa"].min() / latest["kpa"].max() < 0.75
    before = own[own["tested_at"] < latest["tested_at"].iloc[0]]
    previous = _latest(before, story.fleet_no).set_index("cylinder")
    assert latest.loc[3, "sl_kpa"] < 0.7 * previous.loc[3, "sl_kpa"]
    t = demo.tests
    wet = t[(t["fleet_no"] == story.fleet_no) & (t["kind"] == "wet")
            & (t["tested_at"] == latest["tested_at"].iloc[0])].set_index("cylinder")
    rise = wet.loc[3, "value"] / latest.loc[3, "value"] - 1
    assert 0 <= rise < 0.05  # domain.md D9: < 5 % -> valve or gasket (c)
    assert _valid_count_before(dry, demo, story.fleet_no) >= 3  # D11 needs 3 earlier tests


def _valid_count_before(dry, demo, fleet_no) -> int:
    own = _current_life(dry, demo)
    own = own[own["fleet_no"] == fleet_no]
    return own["tested_at"].nunique() - 1


def _adjacent(banks: str) -> set[frozenset[int]]:
    pairs = set()
    for bank in banks.split("/"):
        cyls = [int(c) for c in bank.split("-")]
        pairs |= {frozenset(p) for p in itertools.pairwise(cyls)}
    return pairs


def test_story3_gasket_pair_adjacent_and_twin_pair_not(demo, dry, families):
    gasket, twin = _story(demo, "3a"), _story(demo, "3b")
    unit = demo.fleet.set_index("fleet_no")
    family = unit.loc[gasket.fleet_no, "engine_family"]
    assert unit.loc[twin.fleet_no, "engine_family"] == family
    adjacency = _adjacent(families.loc[family, "banks"])
    lows = {}
    for story in (gasket, twin):
        latest = _latest(dry, story.fleet_no).set_index("cylinder")
        low = latest[latest["sl_kpa"] < latest["min_kpa"]]
        assert len(low) == 2
        lows[story.story] = low
    assert frozenset(lows["3a"].index) in adjacency
    assert frozenset(lows["3b"].index) not in adjacency
    assert sorted(lows["3a"]["value"]) == sorted(lows["3b"]["value"])
    assert lows["3a"]["units"].iloc[0] == lows["3b"]["units"].iloc[0]
    t = demo.tests
    wet = t[(t["fleet_no"] == twin.fleet_no) & (t["kind"] == "wet")].set_index("cylinder")
    rises = wet.loc[list(lows["3b"].index), "value"] / lows["3b"]["value"] - 1
    assert (rises >= 0.10).all()  # domain.md D9: >= 10 % -> rings (c)


def test_story5_weak_battery_tests(demo, dry):
    latest_weak, middle_weak = _story(demo, "5a"), _story(demo, "5b")
    latest = _latest(dry, latest_weak.fleet_no)
    assert (latest["battery_v"] < 9.6).all() and (latest["crank_rpm"] < 150).all()
    assert (latest["sl_kpa"] < latest["min_kpa"]).all()  # reads low: a trap for naive checks
    own = dry[dry["fleet_no"] == middle_weak.fleet_no]
    weak = own[own["tested_at"] == middle_weak.test_at]
    assert (weak["battery_v"] < 9.6).all() and (weak["crank_rpm"] < 150).all()
    after = own[own["tested_at"] > middle_weak.test_at]
    assert after["tested_at"].nunique() >= 2 and after["valid"].all()
    previous = _latest(own[own["tested_at"] < middle_weak.test_at], middle_weak.fleet_no)
    assert weak["sl_kpa"].mean() < 0.9 * previous["sl_kpa"].mean()


def test_story6_overhaul_resets_the_trend(demo, dry):
    story = _story(demo, "6")
    overhaul = demo.events[(demo.events["fleet_no"] == story.fleet_no)
                           & (demo.events["kind"] == "overhaul")]
    assert len(overhaul) == 1 and overhaul["cylinders"].iloc[0] == ""
    when = overhaul["date"].iloc[0]
    own = dry[dry["fleet_no"] == story.fleet_no]
    before = own[own["tested_at"] < when]
    after = own[own["tested_at"] > when]
    assert after["tested_at"].nunique() >= 4
    last_before = _latest(before, story.fleet_no)
    assert last_before["sl_kpa"].min() < 1.1 * last_before["min_kpa"].iloc[0]
    assert after["sl_kpa"].mean() > 1.25 * last_before["sl_kpa"].mean()
    hours = demo.tests.drop_duplicates(["fleet_no", "tested_at"]).set_index("tested_at")
    hours = hours[hours["fleet_no"] == story.fleet_no]["hours"]
    assert hours[hours.index < when].max() < overhaul["hours"].iloc[0] < hours[
        hours.index > when].min()


def test_story7_diesel_has_no_throttle_and_near_zero_vacuum(demo, families):
    story = _story(demo, "7")
    unit = demo.fleet.set_index("fleet_no")
    assert families.loc[unit.loc[story.fleet_no, "engine_family"], "fuel"] == "diesel"
    own = demo.tests[demo.tests["fleet_no"] == story.fleet_no]
    assert own["throttle_open"].isna().all()
    idle = own[own["kind"] == "vacuum_idle"]
    assert len(idle) >= 2 and (idle["value"] <= 2.0).all()
    assert not (own["kind"] == "wet").any()  # domain.md §5.2: no wet test on a diesel (a)


def test_story8_not_tested_for_about_two_years(demo):
    story = _story(demo, "8")
    last = demo.tests.loc[demo.tests["fleet_no"] == story.fleet_no, "tested_at"].max()
    assert 700 <= (pd.Timestamp(AS_OF) - last).days <= 760


def test_story9_raw_low_but_sound_after_altitude_normalisation(demo, dry):
    story = _story(demo, "9")
    elevation = demo.fleet.dropna(subset=["site_elevation_m"]).set_index("site")[
        "site_elevation_m"]
    site = demo.fleet.set_index("fleet_no").loc[story.fleet_no, "site"]
    assert 1600 <= elevation.loc[site] <= 1800
    latest = _latest(dry, story.fleet_no)
    assert (latest["kpa"] < latest["min_kpa"]).all()  # raw gauge under the minimum
    assert (latest["sl_kpa"] > 1.1 * latest["min_kpa"]).all()


SOUND_STORIES = ("4", "5b", "6", "7", "9", "10")


def test_sound_units_are_unambiguous(demo, dry, families):
    """No limit, spread, drop, projection, fast wear or overdue test on any unit expected
    sound."""
    sound = [s.fleet_no for s in demo.stories if s.level == "sound"]
    assert {s.story for s in demo.stories if s.level == "sound"} == set(SOUND_STORIES)
    life = _current_life(dry, demo)
    per_week = demo.fleet.set_index("fleet_no")["hours_per_week"]
    for fleet_no in sound:
        own = life[life["fleet_no"] == fleet_no]
        latest = _latest(own, fleet_no)
        when = latest["tested_at"].iloc[0]
        assert (pd.Timestamp(AS_OF) - when).days < 300, fleet_no
        assert (latest["sl_kpa"] >= 1.1 * latest["min_kpa"]).all(), fleet_no
        ratio = families.loc[latest["family"].iloc[0], "min_ratio"]
        assert latest["sl_kpa"].min() / latest["sl_kpa"].max() >= ratio + 0.05, fleet_no
        grid = latest["hours"].iloc[0] + per_week.loc[fleet_no] * 365 / 7
        for _, cyl in own.groupby("cylinder"):
            earlier = cyl[cyl["tested_at"] < when]
            if len(earlier) >= 3:  # D11: latest inside the earlier two-sided 95 % PI
                lower, _, _ = _ols_lower(earlier["hours"].to_numpy(),
                                         earlier["sl_kpa"].to_numpy(),
                                         cyl["hours"].to_numpy()[-1:], two_sided=True)
                assert cyl["sl_kpa"].iloc[-1] >= lower[0], (fleet_no, cyl["cylinder"].iloc[0])
            if len(cyl) >= 3:  # D12: no one-sided 95 % crossing within a year
                lower, slope, g = _ols_lower(cyl["hours"].to_numpy(), cyl["sl_kpa"].to_numpy(),
                                             np.array([grid]), two_sided=False)
                crossing = slope < 0 and g < 1 and lower[0] <= cyl["min_kpa"].iloc[0]
                assert not crossing, (fleet_no, cyl["cylinder"].iloc[0])
                # not wearing faster than the family's rate: z > -2.5, about a 95 % bound
                # Bonferroni-corrected over four to six cylinders (choice, common practice)
                fit = stats.linregress(cyl["hours"], cyl["sl_kpa"])
                design = families.loc[cyl["family"].iloc[0], "design_kpa_per_h"]
                z = (fit.slope - design) / fit.stderr
                assert z > -2.5, (fleet_no, cyl["cylinder"].iloc[0])
        vac = demo.tests[(demo.tests["fleet_no"] == fleet_no)
                         & (demo.tests["kind"] == "vacuum_cranking")
                         & (demo.tests["tested_at"] == when)]
        assert (vac["value"] <= 1.0).all()


def test_command_line_writes_the_three_files(tmp_path, capsys):
    assert main([str(tmp_path), "--as-of", "2025-06-30", "--seed", "5"]) == 0
    assert sorted(p.name for p in tmp_path.iterdir()) == ["events.csv", "fleet.csv",
                                                          "tests.csv"]
    header = (tmp_path / "tests.csv").read_text().splitlines()[0]
    assert header.split(",") == TESTS_COLUMNS
    assert "tests.csv" in capsys.readouterr().out
