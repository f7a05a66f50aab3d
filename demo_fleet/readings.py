"""Readings of each test: dry compression from the physics, then what a technician types.

A dry reading is the cylinder's sea-level level (new level minus wear) times the altitude
factor (ambient / 101.325 kPa), the intake-restriction factor, the cranking-speed factor
and any planted defect, plus gauge noise: a part shared by the test (hose, number of
puffs) and a part per cylinder.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from demo_fleet import model
from demo_fleet.catalogue import FAMILIES, SITES
from fleetdb import atmosphere
from fleetdb.units import KPA_PER_UNIT

#: Relative gauge noise: shared by all cylinders of a test, and per cylinder.
TEST_NOISE = 0.006
READING_NOISE = 0.010
#: Rounding step of what a technician types, per unit.
STEP = {"psi": 1.0, "kPa": 1.0, "bar": 0.1, "inHg": 0.5, "mmHg": 1.0, "%": 1.0}
#: Validity gates used to keep artefact tests out of the demo's own consistency check
#: (domain.md D2/D3/D4/D8 defaults).
MIN_BATTERY_V = 9.6
MIN_RPM = {True: 150.0, False: 140.0}
MAX_OPEN_THROTTLE_VAC_INHG = 3.0


def typed(values: np.ndarray, units: np.ndarray) -> np.ndarray:
    """Round values the way a technician types them in each unit.

    :param values: numbers in ``units``.
    :param units: unit of each value (see :data:`STEP`).
    """
    step = np.array([STEP[u] for u in units])
    return np.round(np.round(np.asarray(values, dtype=float) / step) * step, 1)


def compression_unit(sites: pd.Series, families: pd.Series) -> np.ndarray:
    """The unit each site's technicians type compression in for each family.

    :param sites: site name per row.
    :param families: family name per row.
    """
    return np.array([SITES[s].pressure_unit if FAMILIES[f].spark_ignition
                     else SITES[s].diesel_pressure_unit
                     for s, f in zip(sites, families, strict=True)])


def dry_compression(tests: pd.DataFrame, cylinders: pd.DataFrame, units: pd.DataFrame,
                    defects: pd.DataFrame, rng: np.random.Generator) -> pd.DataFrame:
    """One row per (test, cylinder): true sea-level level, conditions, measured and typed value.

    :param tests: the test table (index = test id) with conditions.
    :param cylinders: from ``history.draw_cylinders``, wear rates already set.
    :param units: the unit table.
    :param defects: planted faults: ``test_id, cylinder, factor`` (share of the reading left).
    :param rng: the demo's random generator.
    """
    seg_start = tests["segment_start_hours"]
    rows = tests[["fleet_no", "segment"]].reset_index(names="test_id").merge(
        cylinders, on=["fleet_no", "segment"], how="left")
    rows = rows.merge(defects, on=["test_id", "cylinder"], how="left")
    rows["defect"] = rows["factor"].fillna(1.0)
    t = tests.loc[rows["test_id"]]
    hours_in_life = t["hours"].to_numpy() - seg_start.loc[rows["test_id"]].to_numpy()
    sea_kpa = (rows["new_kpa"].to_numpy() - rows["wear_kpa_per_h"].to_numpy() * hours_in_life
               - rows["extra_kpa_per_h"].to_numpy()
               * np.maximum(hours_in_life - rows["onset_hours"].to_numpy(), 0.0))
    family = units.loc[rows["fleet_no"], "family"]
    cr = np.array([FAMILIES[f].compression_ratio for f in family])
    restriction = model.intake_restriction_factor(
        cr, t["baro_true"].to_numpy(),
        np.nan_to_num(t["vac_true_inhg"].to_numpy()) * KPA_PER_UNIT["inHg"])
    speed = model.cranking_speed_factor(t["crank_rpm"].to_numpy(), t["spark_ignition"].to_numpy())
    condition = model.altitude_factor(t["baro_true"].to_numpy()) * restriction * speed

    # Gauge errors are bounded: no draw beyond 2.5 standard deviations.
    common = np.clip(rng.normal(0.0, TEST_NOISE, len(tests)), -2.5 * TEST_NOISE, 2.5 * TEST_NOISE)
    per = np.clip(rng.normal(0.0, READING_NOISE, len(rows)), -2.5 * READING_NOISE,
                  2.5 * READING_NOISE)
    # A planted unit's latest test carries at most one standard deviation of noise, so that
    # its story reads the same whatever the seed.
    calm = (units["story"] != "10").reindex(tests["fleet_no"]).to_numpy() & tests["is_latest"]
    common = np.where(calm, np.clip(common, -TEST_NOISE, TEST_NOISE), common)
    calm_rows = calm.loc[rows["test_id"]].to_numpy()
    per = np.where(calm_rows, np.clip(per, -READING_NOISE, READING_NOISE), per)
    noise = 1.0 + pd.Series(common, index=tests.index).loc[rows["test_id"]].to_numpy() + per

    measured = sea_kpa * condition * rows["defect"].to_numpy() * noise
    unit = compression_unit(units.loc[rows["fleet_no"], "site"], family)
    factor = np.array([KPA_PER_UNIT[u] for u in unit])
    return pd.DataFrame({
        "test_id": rows["test_id"].to_numpy(),
        "fleet_no": rows["fleet_no"].to_numpy(),
        "cylinder": rows["cylinder"].to_numpy(),
        "sea_level_kpa": sea_kpa,
        "new_kpa": rows["new_kpa"].to_numpy(),
        "ambient_kpa": t["baro_true"].to_numpy(),
        "condition_factor": condition * rows["defect"].to_numpy(),
        "units": unit,
        "value": typed(measured / factor, unit),
    })


def test_valid(tests: pd.DataFrame) -> np.ndarray:
    """Whether each test passes the default validity gates (battery, rpm, open-throttle vacuum).

    :param tests: the test table.
    """
    si = tests["spark_ignition"].to_numpy()
    rpm_ok = tests["crank_rpm"].to_numpy() >= np.where(si, MIN_RPM[True], MIN_RPM[False])
    vac_ok = ~(tests["vac_recorded"].to_numpy()
               & (typed(tests["vac_true_inhg"].fillna(0.0).to_numpy(),
                        np.full(len(tests), "inHg")) > MAX_OPEN_THROTTLE_VAC_INHG))
    return (tests["battery_v"].to_numpy() >= MIN_BATTERY_V) & rpm_ok & vac_ok


def settle_latest(dry: pd.DataFrame, tests: pd.DataFrame, eligible: np.ndarray) -> None:
    """Keep sound units' latest valid readings inside their own trend (demo curation).

    For each eligible (unit, cylinder) series of the current engine life with at least three
    earlier valid tests, a latest reading below the lower bound of the two-sided 95 %
    prediction interval of the earlier straight-line fit (domain.md D11, §6.1) would read as
    a sudden drop. Such a reading is raised to the fitted value (rounded up in its unit).

    :param dry: from :func:`dry_compression` (``value`` modified in place).
    :param tests: the test table (index = test id).
    :param eligible: per test, whether its unit takes part.
    """
    valid = pd.Series(test_valid(tests) & eligible, index=tests.index)
    current = tests["segment"] == tests.groupby("fleet_no")["segment"].transform("max")
    usable = (valid & current)
    last_valid = tests[usable].groupby("fleet_no")["seq"].transform("max")
    is_last = pd.Series(False, index=tests.index)
    is_last.loc[last_valid.index] = tests.loc[last_valid.index, "seq"] == last_valid

    t = tests.loc[dry["test_id"]]
    baro = t["baro_kpa"].fillna(pd.Series(atmosphere.pressure_kpa(
        [SITES[s].elevation_m for s in t["site"]]), index=t.index)).to_numpy()
    factor = np.array([KPA_PER_UNIT[u] for u in dry["units"]])
    frame = pd.DataFrame({
        "key": dry["fleet_no"] + "#" + dry["cylinder"].astype(str),
        "x": t["hours"].to_numpy(),
        "y": dry["value"].to_numpy() * factor * atmosphere.P0_KPA / baro,
        "fit": usable.loc[dry["test_id"]].to_numpy() & ~is_last.loc[dry["test_id"]].to_numpy(),
        "last": is_last.loc[dry["test_id"]].to_numpy(),
    }, index=dry.index)
    fit = frame[frame["fit"]].assign(xx=lambda f: f.x**2, xy=lambda f: f.x * f.y,
                                     yy=lambda f: f.y**2)
    sums = fit.groupby("key")[["x", "y", "xx", "xy", "yy"]].sum()
    n = fit.groupby("key").size()
    sums = sums[n >= 3]
    n = n[n >= 3]
    sxx = sums["xx"] - sums["x"] ** 2 / n
    sxy = sums["xy"] - sums["x"] * sums["y"] / n
    syy = sums["yy"] - sums["y"] ** 2 / n
    slope = sxy / sxx.where(sxx > 0)
    xbar, ybar = sums["x"] / n, sums["y"] / n
    s = np.sqrt(np.maximum(syy - slope * sxy, 0.0) / np.maximum(n - 2, 1))
    last = frame[frame["last"]].join(pd.DataFrame({"slope": slope, "xbar": xbar, "ybar": ybar,
                                                    "s": s, "n": n, "sxx": sxx}), on="key",
                                     how="inner").dropna()
    predicted = last["ybar"] + last["slope"] * (last["x"] - last["xbar"])
    half = stats.t.ppf(0.975, last["n"] - 2) * last["s"] * np.sqrt(
        1.0 + 1.0 / last["n"] + (last["x"] - last["xbar"]) ** 2 / last["sxx"])
    low = last.index[(last["y"] < predicted - half).to_numpy()]
    if len(low) == 0:
        return
    raw = predicted.loc[low] * baro[dry.index.get_indexer(low)] / atmosphere.P0_KPA
    step = np.array([STEP[u] for u in dry.loc[low, "units"]])
    unit_value = raw.to_numpy() / factor[dry.index.get_indexer(low)]
    dry.loc[low, "value"] = np.round(np.ceil(unit_value / step) * step, 1)
