"""Readings of each test: dry compression from the physics, then what a technician types.

A dry reading is the cylinder's sea-level level (new level minus wear) times the altitude
factor (ambient / 101.325 kPa), the intake-restriction factor, the cranking-speed factor
and any planted defect, plus gauge noise: a part shared by the test (hose, number of
puffs) and a part per cylinder.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from demo_fleet import model
from demo_fleet.catalogue import FAMILIES, SITES
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

    unit = compression_unit(units.loc[rows["fleet_no"], "site"], family)
    dry = pd.DataFrame({
        "test_id": rows["test_id"].to_numpy(),
        "fleet_no": rows["fleet_no"].to_numpy(),
        "cylinder": rows["cylinder"].to_numpy(),
        "sea_level_kpa": sea_kpa,
        "new_kpa": rows["new_kpa"].to_numpy(),
        "ambient_kpa": t["baro_true"].to_numpy(),
        "condition_factor": condition * rows["defect"].to_numpy(),
        "units": unit,
        "kpa_per_unit": np.array([KPA_PER_UNIT[u] for u in unit]),
    })
    dry["noise"] = draw_noise(dry, tests, rng)
    set_values(dry)
    return dry


def draw_noise(dry: pd.DataFrame, tests: pd.DataFrame, rng: np.random.Generator) -> np.ndarray:
    """Relative gauge error of each reading: a part per test plus a part per reading.

    Gauge errors are bounded: no draw beyond 2.5 standard deviations. Tests marked ``calm``
    (a planted unit's latest test) carry at most one standard deviation, so that the story
    reads the same whatever the seed.

    :param dry: the readings to draw for (their tests must all be in ``tests``).
    :param tests: the tests to draw for, with ``calm``.
    :param rng: the demo's random generator.
    """
    calm = tests["calm"].to_numpy()
    common = np.clip(rng.normal(0.0, TEST_NOISE, len(tests)),
                     -np.where(calm, 1.0, 2.5) * TEST_NOISE, np.where(calm, 1.0, 2.5) * TEST_NOISE)
    calm_rows = tests["calm"].loc[dry["test_id"]].to_numpy()
    bound = np.where(calm_rows, 1.0, 2.5) * READING_NOISE
    per = np.clip(rng.normal(0.0, READING_NOISE, len(dry)), -bound, bound)
    return pd.Series(common, index=tests.index).loc[dry["test_id"]].to_numpy() + per


def set_values(dry: pd.DataFrame, rows: np.ndarray | None = None) -> None:
    """Typed value = true reading x (1 + noise), in the site's unit, rounded as typed.

    :param dry: readings with ``sea_level_kpa``, ``condition_factor``, ``noise`` (modified).
    :param rows: boolean mask of the rows to set (None: all).
    """
    rows = np.ones(len(dry), bool) if rows is None else rows
    part = dry[rows]
    measured = part["sea_level_kpa"] * part["condition_factor"] * (1.0 + part["noise"])
    dry.loc[rows, "value"] = typed((measured / part["kpa_per_unit"]).to_numpy(),
                                   part["units"].to_numpy())


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
