"""Every default threshold fleetdb ships, declared once with its source.

A family's own service data overrides each of them. Source marks follow the domain guide:
(a) a published source, cited; (b) "common practice, no published source"; (c) "from
memory, unverified"; a mixed mark takes the weaker wording.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import pandas as pd

from fleetdb.units import KPA_PER_UNIT

SOURCE_B = "common practice, no published source"
SOURCE_C = "from memory, unverified"


@dataclass(frozen=True)
class Threshold:
    """One default threshold: value, unit and where it comes from."""

    name: str
    value: float
    unit: str
    mark: str  # domain.md mark "a", "b" or "c"; a mixed mark takes the weaker one
    source: str  # a citation for (a); SOURCE_B or SOURCE_C otherwise
    ref: str  # the domain.md defaults row (D1..D13), or "checks" for a choice made here
    note: str = ""

    @property
    def kpa(self) -> float:
        """The value in kPa (pressure units only)."""
        return self.value * KPA_PER_UNIT[self.unit]


_BATTERY_SRC = ("a manufacturer's battery load-test table (two light-duty manufacturers' "
                "service manuals, 'Load Test': 1/2 CCA for 15 s)")
_BATTERY_ROWS = ((21, 9.6), (16, 9.5), (10, 9.4), (4, 9.3), (-1, 9.1), (-7, 8.9), (-12, 8.7),
                 (-18, 8.5))
_B, _C = SOURCE_B, SOURCE_C


def _battery_name(temp_c: int) -> str:
    return f"battery_min_v_at_{'minus_' if temp_c < 0 else ''}{abs(temp_c)}c"


_TABLE = [
    Threshold("spread_min_ratio", 0.75, "ratio", "a", "several manufacturers' service "
              "procedures (passenger car, light truck, SUV)", "D1", "lowest/highest (S1)"),
    Threshold("min_crank_rpm_spark", 150, "rpm", "c", _C, "D2", "gasoline, LPG, CNG"),
    Threshold("min_crank_rpm_diesel", 140, "rpm", "c", _C, "D3",
              "(a) for a medium-duty truck diesel service procedure; (c) as a default for all"),
    *(Threshold(_battery_name(t), v, "V", "a", _BATTERY_SRC, "D4", f"12 V system at {t} degC")
      for t, v in _BATTERY_ROWS),
    Threshold("battery_24v_factor", 2.0, "x", "c", _C, "D4", "24 V: 2 x the 12 V figure"),
    Threshold("leakdown_fair_pct", 10, "%", "c", _C, "D5", "bands (b), edges (c); boundary: worse"),
    Threshold("leakdown_worn_pct", 20, "%", "c", _C, "D5", "boundary goes to the worse band"),
    Threshold("leakdown_fail_pct", 30, "%", "c", _C, "D5", "boundary goes to the worse band"),
    Threshold("leakdown_median_excess_pct", 10, "%", "c", _C, "D5", "points above engine median"),
    Threshold("leakdown_supply_automotive", 100, "psi", "b", _B, "D6"),
    Threshold("leakdown_supply_aviation", 80, "psi", "a", "FAA AC 43.13-1B, para 8-14", "D6"),
    Threshold("idle_vacuum_min", 17, "inHg", "b", _B, "D7", "warm, sea level, spark-ignition"),
    Threshold("idle_vacuum_max", 21, "inHg", "b", _B, "D7", "upper end of the idle band"),
    Threshold("cranking_vacuum_max", 6, "inHg", "b", _B, "D8", "spark-ignition only"),
    Threshold("cranking_vacuum_max_throttle_open", 3, "inHg", "c", _C, "D8",
              "throttle held wide open; chosen for the domain guide (b/c)"),
    Threshold("wet_rise_rings_fraction", 0.10, "fraction of dry", "c", _C, "D9"),
    Threshold("wet_rise_rings_psi", 10, "psi", "c", _C, "D9", "small-engine maintenance note (b)"),
    Threshold("wet_rise_valves_fraction", 0.05, "fraction of dry", "c", _C, "D9"),
    Threshold("wet_oil_dose_ml", 15, "mL", "a",
              "a light-duty gasoline manufacturer's service procedure", "D9"),
    Threshold("relative_min_pct", 85, "%", "c", _C, "D10", "percent of the strongest cylinder"),
    Threshold("sudden_drop_level", 0.95, "two-sided", "c", _C, "D11", "95 % level (b/c)"),
    Threshold("sudden_drop_min_earlier_tests", 3, "tests", "b", _B, "D11"),
    Threshold("projection_level", 0.95, "one-sided", "b", _B, "D12"),
    Threshold("test_interval_days", 365, "days", "c", _C, "D13", "chosen default (b/c)"),
    Threshold("warm_min_temp_c", 60, "degC", "b", _B, "checks", "below it a warm test is cold"),
    Threshold("all_low_fraction", 0.85, "fraction of expected", "b", _B, "checks",
              "every cylinder under this share of the expected level: all low"),
    Threshold("expected_from_minimum", 0.75, "minimum / expected", "b", _B, "checks",
              "with no expected level, the family minimum is taken as 75 % of it"),
    Threshold("near_minimum_fraction", 1.10, "x minimum", "b", _B, "health",
              "watch when the lowest cylinder is within 10 % above the minimum"),
    Threshold("family_alpha", 0.05, "per test or unit", "c", _C, "health",
              "sudden drop and faster-than-family: Bonferroni over the cylinders (1 - 0.05/k)"),
    Threshold("min_drop_fraction", 0.10, "x minimum", "b", _B, "health",
              "a sudden drop also falls at least 10 % of the minimum below the trend"),
    Threshold("planning_horizon_weeks", 13, "weeks", "b", _B, "health",
              "plan when the conservative crossing falls within this horizon"),
]
#: Every default threshold, declared once. The family's own values override them.
DEFAULTS: dict[str, Threshold] = {t.name: t for t in _TABLE}


def defaults_table() -> pd.DataFrame:
    """All default thresholds as a frame indexed by name (for docs and CLI listings)."""
    return pd.DataFrame([asdict(t) for t in _TABLE]).set_index("name")


def _v(name: str) -> float:
    return float(DEFAULTS[name].value)


def _src(name: str) -> str:
    return f"fleetdb default, {DEFAULTS[name].source}"
