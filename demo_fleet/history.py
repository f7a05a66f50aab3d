"""Units, test dates, hour meters, test conditions and cylinder wear of the demo fleet.

Every random draw comes from one ``numpy.random.Generator`` in a fixed order, so the
same seed and ``as_of`` give the same fleet.
"""

from __future__ import annotations

from datetime import date

import numpy as np
import pandas as pd

from demo_fleet import model
from demo_fleet.catalogue import BACKGROUND, FAMILIES, KINDS, PLANTED, SITES
from fleetdb import atmosphere
from fleetdb.units import KPA_PER_UNIT

PSI_KPA = KPA_PER_UNIT["psi"]
INHG_KPA = KPA_PER_UNIT["inHg"]

#: Days of logged tests before as_of (four years; the company's log starts then).
WINDOW_DAYS = 1461
#: Sound background units stay this far from their minimum (sea-level equivalent).
SOUND_MARGIN = 1.2
#: ... and at least this many years of wear (family rate, own hours) above it.
SOUND_YEARS_LEFT = 2.5
#: Youngest background unit, days (enough for four or five half-yearly tests).
MIN_AGE_DAYS = 800
#: Weather: day-to-day spread of the barometer around the standard atmosphere, kPa.
WEATHER_SD_KPA = 0.5
#: Share of tests where the technician typed the barometer.
BARO_RECORDED_SHARE = 0.85


def draw_units(rng: np.random.Generator) -> pd.DataFrame:
    """One row per unit, indexed by fleet number: planted units first, then background.

    :param rng: the demo's random generator.
    """
    planted = pd.DataFrame({
        "story": [p.story for p in PLANTED],
        "site": [p.site for p in PLANTED],
        "family": [p.family for p in PLANTED],
        "hours_per_week": [p.hours_per_week for p in PLANTED],
        "age_days": [p.age_days for p in PLANTED],
        "last_offset": [p.last_offset_days for p in PLANTED],
        "interval": [p.interval_days for p in PLANTED],
        "target_psi": [p.target_psi for p in PLANTED],
        "utilisation": 1.0,
        "level_factor": 1.0,
        "wear_multiplier": np.nan,
    }, index=pd.Index([p.fleet_no for p in PLANTED], name="fleet_no"))

    spec = [(site, prefix, fam) for site, prefix, fam, count in BACKGROUND for _ in range(count)]
    n = len(spec)
    prefixes = [p for _, p, _ in spec]
    counters: dict[str, int] = {}
    numbers = []
    for prefix in prefixes:
        counters[prefix] = counters.get(prefix, 0) + 1
        base = {"LT": 100, "YT": 200, "SW": 300, "LV": 400, "GS": 500}[prefix]
        numbers.append(f"{prefix}-{base + counters[prefix]}")
    fams = [FAMILIES[f] for _, _, f in spec]
    lo = np.array([KINDS[p][1][0] for p in prefixes])
    hi = np.array([KINDS[p][1][1] for p in prefixes])
    hpw = np.round(rng.uniform(lo, hi))
    age_days = rng.uniform(2.2, 11.0, n) * 365.25
    level_factor = np.clip(rng.normal(1.0, 0.02, n), 0.96, 1.04)
    mult = rng.uniform(0.97, 1.03, n)
    util = rng.uniform(0.92, 1.08, n)
    last_offset = rng.integers(0, 200, n)
    shrink = rng.uniform(0.5, 0.95, n)
    youngest = rng.uniform(MIN_AGE_DAYS, MIN_AGE_DAYS + 400, n)

    std = np.array([f.standard_psi for f in fams]) * level_factor
    min_psi = np.array([f.min_kpa for f in fams]) / PSI_KPA
    rate = np.array([f.wear_psi_per_hour for f in fams]) * mult
    # Wear budget of a sound unit: stay above SOUND_MARGIN x minimum, with SOUND_YEARS_LEFT
    # years of its own wear still in hand. A unit that would have worn more is younger, or
    # (not to have too short a history) works fewer hours a week.
    per_year = hpw * util * 52.18
    max_hours = np.minimum((std - SOUND_MARGIN * min_psi) / rate,
                           (std - min_psi) / rate - SOUND_YEARS_LEFT * per_year)
    max_hours = np.maximum(max_hours, 0.25 * (std - min_psi) / rate)
    hours = age_days / 7.0 * hpw * util
    worn = hours > max_hours
    age_days = np.where(worn, np.maximum(max_hours * shrink / (hpw * util / 7.0), youngest),
                        age_days)
    hpw = np.where(worn, np.minimum(hpw, np.round(max_hours * shrink / (age_days / 7.0 * util))),
                   hpw)
    last_offset[0] = 0  # one unit is tested on the build day itself

    background = pd.DataFrame({
        "story": "10",
        "site": [s for s, _, _ in spec],
        "family": [f.name for f in fams],
        "hours_per_week": hpw,
        "age_days": np.round(age_days).astype(int),
        "last_offset": last_offset,
        "interval": [KINDS[p][2] for p in prefixes],
        "target_psi": np.nan,
        "utilisation": util,
        "level_factor": level_factor,
        "wear_multiplier": mult,
    }, index=pd.Index(numbers, name="fleet_no"))
    return pd.concat([planted, background])


def draw_schedule(units: pd.DataFrame, as_of: date, rng: np.random.Generator) -> pd.DataFrame:
    """Test dates of every unit, stepping back from its latest test.

    Units that came into service inside the window get an acceptance test soon after.
    Dates falling on a weekend move to the Friday before (the build-day test excepted).

    :param units: from :func:`draw_units`.
    :param as_of: the build day; no test after it.
    :param rng: the demo's random generator.
    """
    rows: list[tuple[str, int]] = []
    for fleet_no, unit in units.iterrows():
        offsets = [int(unit["last_offset"])]
        horizon = min(int(unit["age_days"]) - 20, WINDOW_DAYS)
        while True:
            step = round(float(unit["interval"]) * rng.uniform(0.88, 1.12))
            if offsets[-1] + step > horizon:
                break
            offsets.append(offsets[-1] + step)
        if unit["age_days"] <= WINDOW_DAYS:
            acceptance = int(unit["age_days"]) - int(rng.integers(5, 16))
            if acceptance - offsets[-1] < 45:
                offsets.pop()
            offsets.append(acceptance)
        if unit["story"] == "4":  # the restriction test, a week before the latest one
            offsets.insert(1, offsets[0] + 7)
        rows += [(str(fleet_no), o) for o in offsets]
    tests = pd.DataFrame(rows, columns=["fleet_no", "offset"])
    day = pd.Timestamp(as_of) - pd.to_timedelta(tests["offset"], unit="D")
    weekend = np.maximum(day.dt.day_of_week.to_numpy() - 4, 0) * (tests["offset"].to_numpy() > 0)
    tests["offset"] = tests["offset"] + weekend
    minutes = 7 * 60 + 5 * rng.integers(0, 109, len(tests))
    tests["tested_at"] = (pd.Timestamp(as_of) - pd.to_timedelta(tests["offset"], unit="D")
                          + pd.to_timedelta(minutes, unit="min")).astype("datetime64[s]")
    tests = tests.sort_values(["fleet_no", "tested_at"], kind="stable").reset_index(drop=True)
    tests["seq"] = tests.groupby("fleet_no").cumcount()
    tests["n_tests"] = tests.groupby("fleet_no")["seq"].transform("size")
    tests["is_latest"] = tests["seq"] == tests["n_tests"] - 1
    tests["role"] = ""
    tests["segment"] = 0
    return tests


def draw_hours(tests: pd.DataFrame, units: pd.DataFrame, rng: np.random.Generator) -> None:
    """Hour meter at each test: hours per week x utilisation, with week-to-week noise.

    :param tests: from :func:`draw_schedule` (modified in place).
    :param units: from :func:`draw_units`.
    :param rng: the demo's random generator.
    """
    unit = units.loc[tests["fleet_no"]]
    age_at_test = unit["age_days"].to_numpy() - tests["offset"].to_numpy()
    previous = tests.groupby("fleet_no")["offset"].shift(1)
    days = np.where(previous.isna(), age_at_test, previous.to_numpy() - tests["offset"].to_numpy())
    per_day = unit["hours_per_week"].to_numpy() * unit["utilisation"].to_numpy() / 7.0
    steps = np.maximum(days * per_day * rng.lognormal(0.0, 0.10, len(tests)), 1.0)
    tests["hours"] = np.round(pd.Series(steps).groupby(tests["fleet_no"].to_numpy()).cumsum()
                              .to_numpy())


def draw_conditions(tests: pd.DataFrame, units: pd.DataFrame, rng: np.random.Generator) -> None:
    """Battery, cranking speed, temperature, barometer, throttle, vacuum, technician.

    :param tests: from :func:`draw_schedule` (modified in place).
    :param units: from :func:`draw_units`.
    :param rng: the demo's random generator.
    """
    n = len(tests)
    unit = units.loc[tests["fleet_no"]]
    fams = [FAMILIES[f] for f in unit["family"]]
    si = np.array([f.spark_ignition for f in fams])
    sites = [SITES[s] for s in unit["site"]]
    tests["spark_ignition"] = si
    tests["battery_v"] = np.round(np.clip(rng.normal(model.NOMINAL_CRANK_VOLTS, 0.2, n),
                                          9.9, 10.95), 1)
    speed_noise = rng.normal(1.0, 0.03, n)
    tests["engine_temp_c"] = np.round(np.clip(rng.normal(82.0, 5.0, n), 68.0, 96.0))
    isa = atmosphere.pressure_kpa(np.array([s.elevation_m for s in sites]))
    weather = np.clip(rng.normal(0.0, WEATHER_SD_KPA, n), -1.5, 1.5)
    # A planted unit's latest test sees ordinary weather (within one standard deviation).
    calm = tests["is_latest"].to_numpy() & (unit["story"].to_numpy() != "10")
    weather = np.where(calm, np.clip(weather, -WEATHER_SD_KPA, WEATHER_SD_KPA), weather)
    tests["baro_true"] = isa + weather
    recorded = rng.random(n) < BARO_RECORDED_SHARE
    reading_error = rng.normal(0.0, 0.05, n)
    tests["baro_kpa"] = np.where(recorded, np.round(tests["baro_true"] + reading_error, 1), np.nan)
    vac = np.minimum(np.abs(rng.normal(0.0, 0.12, n)), 0.4)  # inHg, throttle wide open
    tests["vac_true_inhg"] = np.where(si, vac, np.nan)
    tests["vac_recorded"] = si & (rng.random(n) < 0.85)
    throttle_known = rng.random(n) < 0.95
    tests["throttle_open"] = np.where(si & throttle_known, "yes", None)
    sea_idle = rng.uniform(18.0, 20.5, n)
    drop_inhg = (atmosphere.P0_KPA - tests["baro_true"].to_numpy()) / INHG_KPA
    tests["idle_inhg"] = np.where(si, sea_idle - drop_inhg, np.nan)
    tests["idle_recorded"] = si & (rng.random(n) < 0.2)
    tests["leakdown_recorded"] = si & (rng.random(n) < 0.04)
    tests["relative_recorded"] = ~si & (rng.random(n) < 0.15)
    pick = rng.integers(0, 3, n)
    tests["technician"] = [s.technicians[i] for s, i in zip(sites, pick, strict=True)]
    tests["note"] = ""
    tests["nominal_rpm"] = [f.crank_rpm_nominal for f in fams]
    tests["speed_noise"] = speed_noise
    set_cranking(tests)


def set_cranking(tests: pd.DataFrame) -> None:
    """Cranking speed from the battery (demo model), rounded to 5 rpm as read off a tach.

    :param tests: with ``battery_v``, ``nominal_rpm`` and ``speed_noise`` (modified in place).
    """
    rpm = model.cranking_rpm(tests["battery_v"], tests["nominal_rpm"]) * tests["speed_noise"]
    tests["crank_rpm"] = np.round(rpm / 5.0) * 5.0


def draw_cylinders(units: pd.DataFrame, rng: np.random.Generator, segments: int = 2
                   ) -> pd.DataFrame:
    """Per unit, segment (before/after an overhaul) and cylinder: new level and wear rates.

    :param units: from :func:`draw_units`.
    :param rng: the demo's random generator.
    :param segments: how many engine lives to draw for each unit.
    """
    fams = [FAMILIES[f] for f in units["family"]]
    counts = np.array([f.cylinders for f in fams])
    reps = counts * segments
    fleet_no = np.repeat(units.index.to_numpy(), reps)
    segment = np.concatenate([np.repeat(np.arange(segments), c) for c in counts])
    cylinder = np.concatenate([np.tile(np.arange(1, c + 1), segments) for c in counts])
    n = len(fleet_no)
    unit = units.loc[fleet_no]
    # Planted units have even cylinders (0.4 x the spread) so their stories read cleanly.
    spread = np.where(unit["story"].to_numpy() == "10", 1.0, 0.4)
    cyl_factor = 1.0 + np.clip(rng.normal(0.0, 0.012, n), -0.025, 0.025) * spread
    cyl_rate = rng.uniform(0.98, 1.02, n)
    std_kpa = np.array([FAMILIES[f].standard_kpa for f in unit["family"]])
    fam_rate_kpa = np.array([FAMILIES[f].wear_psi_per_hour for f in unit["family"]]) * PSI_KPA
    return pd.DataFrame({
        "fleet_no": fleet_no,
        "segment": segment,
        "cylinder": cylinder,
        "new_kpa": std_kpa * unit["level_factor"].to_numpy() * cyl_factor,
        "wear_kpa_per_h": fam_rate_kpa * unit["wear_multiplier"].to_numpy() * cyl_rate,
        "rate_jitter": cyl_rate,
        "onset_hours": 0.0,  # extra wear (a planted ring fault) from this hour of the life on
        "extra_kpa_per_h": 0.0,
    })
