"""A large invented fleet for the benchmarks: fleet.csv and tests.csv, deterministic.

``write_fleet(folder, 20_000, seed)`` writes 20,000 units with 40 tests each (800,000
tests) and about 6 readings per test (about 4.8 million reading rows): 4-, 6- and
8-cylinder families, spark-ignition and diesel, compression on every cylinder, cranking and
idle vacuum on some spark-ignition tests, the test conditions on the first row of each test.
The files follow the import formats of the README; every value passes fleetdb's checks.

Everything here is invented (names, numbers, levels); the levels are plausible, no more.
Rows are generated and written a block of units at a time, so memory stays small whatever
the fleet size. The same (n_units, seed) always gives byte-identical files.

Run as a script to write a fleet by hand::

    python -m tests.bench.synth /tmp/fleet --units 2000
"""

from __future__ import annotations

import argparse
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from fleetdb import atmosphere
from fleetdb.units import KPA_PER_UNIT

TESTS_PER_UNIT = 40
UNITS_PER_BLOCK = 1000
FORMAT_VERSION = 1  # bump when the generated content changes (invalidates cached files)
TESTS_COLUMNS = ("fleet_no", "tested_at", "hours", "kind", "cylinder", "value", "units",
                 "battery_v", "crank_rpm", "engine_temp_c", "baro_kpa", "throttle_open",
                 "technician", "note")
FLEET_COLUMNS = ("fleet_no", "site", "engine_family", "in_service", "hours_per_week",
                 "site_elevation_m", "fuel", "cylinders", "banks", "compression_ratio",
                 "min_compression", "compression_units", "min_ratio")


@dataclass(frozen=True)
class SynthFamily:
    """An invented engine family and how common it is in the synthetic fleet."""

    name: str
    fuel: str
    cylinders: int
    banks: str
    compression_ratio: float
    min_psi: float  # limit, typed in psi in the fleet file
    new_psi: float  # healthy level of a new engine at sea level
    wear_psi_per_hour: float  # mean loss per engine hour
    share: float  # fraction of the fleet

    @property
    def spark_ignition(self) -> bool:
        """Whether the engine has a throttle (and so a meaningful manifold vacuum)."""
        return self.fuel != "diesel"


#: Cylinder shares 40 % four, 40 % six, 20 % eight: 5.6 compression readings per test on
#: average; 70 % spark-ignition tests with 0.57 vacuum readings each bring the mean to 6.0.
FAMILIES: tuple[SynthFamily, ...] = (
    SynthFamily("Synth L4 LPG", "lpg", 4, "1-2-3-4", 9.2, 120, 165, 0.0025, 0.30),
    SynthFamily("Synth L4 Diesel", "diesel", 4, "1-2-3-4", 17.5, 300, 400, 0.0040, 0.10),
    SynthFamily("Synth V6 Gasoline", "gasoline", 6, "1-3-5/2-4-6", 9.4, 125, 170, 0.0035, 0.20),
    SynthFamily("Synth L6 Diesel", "diesel", 6, "1-2-3-4-5-6", 17.0, 300, 430, 0.0050, 0.20),
    SynthFamily("Synth V8 Gasoline", "gasoline", 8, "1-3-5-7/2-4-6-8", 9.0, 130, 175, 0.0030,
                0.15),
    SynthFamily("Synth V8 CNG", "cng", 8, "1-3-5-7/2-4-6-8", 10.5, 140, 185, 0.0022, 0.05),
)
P_VACUUM_CRANKING = 0.45  # share of spark-ignition tests with a cranking-vacuum reading
P_VACUUM_IDLE = 0.12  # share of spark-ignition tests with an idle-vacuum reading
P_BARO_MEASURED = 0.5  # share of tests with a measured barometer
#: Sites: elevation (m), unit typed for spark-ignition compression, for diesel
#: compression, for vacuum.
SITES: tuple[tuple[str, float, str, str, str], ...] = tuple(
    (f"Synth Yard {i + 1:02d}", elevation, si_unit, diesel_unit, vac_unit)
    for i, (elevation, si_unit, diesel_unit, vac_unit) in enumerate([
        (5, "psi", "psi", "inHg"), (40, "kPa", "kPa", "kPa"), (120, "psi", "bar", "inHg"),
        (250, "bar", "bar", "mmHg"), (400, "psi", "psi", "inHg"), (600, "kPa", "kPa", "kPa"),
        (850, "psi", "bar", "inHg"), (1000, "bar", "bar", "mmHg"), (1200, "psi", "psi", "inHg"),
        (1450, "kPa", "bar", "kPa"), (1700, "psi", "psi", "inHg"), (1850, "kPa", "kPa", "mmHg"),
    ]))
#: Decimals typed per unit (psi, kPa, mmHg whole numbers; bar, inHg one decimal).
_DECIMALS = {"psi": 0, "kPa": 0, "bar": 1, "inHg": 1, "mmHg": 0}
_TECHNICIANS = ("AV", "BK", "CL", "DM", "EN", "FO", "GP", "HR")
_NOTES = ("cold morning", "battery charged first", "retest requested", "gauge hose replaced")
_FIRST_IN_SERVICE = np.datetime64("2008-01-01")
_IN_SERVICE_SPAN_DAYS = 4 * 365
_INTERVAL_DAYS = (55, 95)  # 40 tests x 95 days from 2012 at the latest ends before 2023


def write_fleet(folder: Path, n_units: int = 20_000, seed: int = 1) -> dict[str, Path]:
    """Write ``fleet.csv`` and ``tests.csv`` for an invented fleet of ``n_units`` units.

    Files already there from the same (n_units, seed, format version) are reused: a
    ``synth.json`` beside them records what they hold.

    :param folder: where to write (created if needed).
    :param n_units: how many units; each gets 40 tests.
    :param seed: numpy seed; the same seed gives the same bytes.
    :returns: ``{"fleet": path, "tests": path}``.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    paths = {"fleet": folder / "fleet.csv", "tests": folder / "tests.csv"}
    manifest = folder / "synth.json"
    wanted = {"n_units": n_units, "seed": seed, "format_version": FORMAT_VERSION}
    if manifest.exists() and all(p.exists() for p in paths.values()):
        recorded = json.loads(manifest.read_text())
        if {k: recorded.get(k) for k in wanted} == wanted:
            return paths
    manifest.unlink(missing_ok=True)
    units = _unit_table(n_units, seed)
    _fleet_frame(units).to_csv(paths["fleet"], index=False)
    counts = _write_tests(paths["tests"], units, seed)
    manifest.write_text(json.dumps({**wanted, **counts}, indent=2) + "\n")
    return paths


def read_manifest(folder: Path) -> dict[str, int]:
    """What a folder written by :func:`write_fleet` holds (units, tests, readings).

    :param folder: the folder given to :func:`write_fleet`.
    """
    return json.loads((Path(folder) / "synth.json").read_text())


def _unit_table(n_units: int, seed: int) -> pd.DataFrame:
    """One row per unit: fleet number, site, family, in-service date, usage."""
    rng = np.random.default_rng([seed, 0])
    shares = np.array([f.share for f in FAMILIES])
    return pd.DataFrame({
        "fleet_no": [f"SY-{i:06d}" for i in range(1, n_units + 1)],
        "site": rng.integers(0, len(SITES), n_units),
        "family": rng.choice(len(FAMILIES), n_units, p=shares / shares.sum()),
        "in_service": _FIRST_IN_SERVICE
        + rng.integers(0, _IN_SERVICE_SPAN_DAYS, n_units).astype("timedelta64[D]"),
        "hours_per_week": np.round(rng.uniform(8.0, 45.0, n_units), 1),
    })


def _fleet_frame(units: pd.DataFrame) -> pd.DataFrame:
    """The fleet file: site and family attributes on the first row naming each."""
    out = pd.DataFrame({
        "fleet_no": units["fleet_no"],
        "site": [SITES[s][0] for s in units["site"]],
        "engine_family": [FAMILIES[f].name for f in units["family"]],
        "in_service": pd.to_datetime(units["in_service"]).dt.strftime("%Y-%m-%d"),
        "hours_per_week": units["hours_per_week"],
    })
    first_site = ~units["site"].duplicated()
    first_family = ~units["family"].duplicated()
    blank = pd.Series("", index=units.index, dtype=object)
    out["site_elevation_m"] = blank.mask(
        first_site, units["site"].map(lambda s: f"{SITES[s][1]:g}"))
    family_attrs = {
        "fuel": lambda f: f.fuel, "cylinders": lambda f: str(f.cylinders),
        "banks": lambda f: f.banks, "compression_ratio": lambda f: f"{f.compression_ratio:g}",
        "min_compression": lambda f: f"{f.min_psi:g}", "compression_units": lambda f: "psi",
        "min_ratio": lambda f: "0.75",
    }
    for col, attr in family_attrs.items():
        out[col] = blank.mask(first_family, units["family"].map(lambda i, a=attr: a(FAMILIES[i])))
    return out[list(FLEET_COLUMNS)]


def _write_tests(path: Path, units: pd.DataFrame, seed: int) -> dict[str, int]:
    """Write the tests file a block of units at a time; return the counts written."""
    n_tests = n_readings = 0
    with open(path, "w", newline="", encoding="utf-8") as out:
        out.write(",".join(TESTS_COLUMNS) + "\n")
        for block, start in enumerate(range(0, len(units), UNITS_PER_BLOCK)):
            rng = np.random.default_rng([seed, 1, block])
            rows, tests = _block_rows(units.iloc[start:start + UNITS_PER_BLOCK], rng)
            rows.to_csv(out, header=False, index=False, na_rep="", float_format="%g",
                        lineterminator="\n")
            n_tests += tests
            n_readings += len(rows)
    return {"units": len(units), "tests": n_tests, "readings": n_readings}


def _block_rows(units: pd.DataFrame, rng: np.random.Generator) -> tuple[pd.DataFrame, int]:
    """The tests-file rows of a block of units (vectorised) and its number of tests."""
    n_units = len(units)
    fam = [FAMILIES[i] for i in units["family"]]
    cylinders = np.array([f.cylinders for f in fam])
    spark = np.array([f.spark_ignition for f in fam])
    site_elev = np.array([SITES[s][1] for s in units["site"]])
    site_baro = np.asarray(atmosphere.pressure_kpa(site_elev), dtype=float)

    # Tests: unit-major, 40 per unit, dates and hour meters strictly increasing.
    t_unit = np.repeat(np.arange(n_units), TESTS_PER_UNIT)
    gaps = rng.integers(*_INTERVAL_DAYS, size=(n_units, TESTS_PER_UNIT))
    gaps[:, 0] = rng.integers(30, 200, n_units)
    days = np.cumsum(gaps, axis=1).ravel()
    weekly = units["hours_per_week"].to_numpy()[:, None] * rng.uniform(0.7, 1.3, gaps.shape)
    run_hours = np.cumsum(gaps / 7.0 * weekly, axis=1).ravel()
    hours = np.round(run_hours + 1.0, 1)
    minutes = rng.integers(7 * 60, 17 * 60, t_unit.size)
    tested_at = (units["in_service"].to_numpy()[t_unit].astype("datetime64[m]")
                 + days.astype("timedelta64[D]") + minutes.astype("timedelta64[m]"))
    n_tests = t_unit.size
    t_spark = spark[t_unit]
    n_vac_crank = t_spark & (rng.random(n_tests) < P_VACUUM_CRANKING)
    n_vac_idle = t_spark & (rng.random(n_tests) < P_VACUUM_IDLE)
    throttle_open = np.where(t_spark, np.where(rng.random(n_tests) < 0.85, "yes", "no"), "")
    baro_measured = rng.random(n_tests) < P_BARO_MEASURED
    baro = np.round(site_baro[t_unit] + rng.normal(0.0, 0.8, n_tests), 1)
    warm = rng.random(n_tests) < 0.75
    conditions = {
        "battery_v": np.round(np.clip(rng.normal(10.4, 0.5, n_tests), 7.5, 12.8), 1),
        "crank_rpm": np.round(np.clip(rng.normal(240.0, 25.0, n_tests), 90, 400)),
        "engine_temp_c": np.where(warm, rng.integers(65, 92, n_tests),
                                  rng.integers(-5, 30, n_tests)).astype(float),
        "baro_kpa": np.where(baro_measured, baro, np.nan),
    }

    # Compression rows: one per cylinder of each test.
    per_cyl = cylinders[t_unit]
    c_test = np.repeat(np.arange(n_tests), per_cyl)
    first_of_test = np.repeat(np.cumsum(per_cyl) - per_cyl, per_cyl)
    c_cyl = np.arange(c_test.size) - first_of_test + 1
    max_cyl = cylinders.max()
    new_psi = np.array([f.new_psi for f in fam])[:, None] * rng.normal(1.0, 0.03,
                                                                        (n_units, max_cyl))
    wear = np.array([f.wear_psi_per_hour for f in fam])[:, None] * rng.lognormal(
        0.0, 0.5, (n_units, max_cyl))
    cu = t_unit[c_test]
    altitude_factor = site_baro[cu] / atmosphere.P0_KPA
    psi = ((new_psi[cu, c_cyl - 1] - wear[cu, c_cyl - 1] * hours[c_test])
           * altitude_factor * rng.normal(1.0, 0.02, c_test.size))
    psi = np.maximum(psi, 0.25 * new_psi[cu, c_cyl - 1])
    site_of = units["site"].to_numpy()
    diesel = ~spark
    c_unit_name = np.where(diesel[cu], np.array([SITES[s][3] for s in site_of])[cu],
                           np.array([SITES[s][2] for s in site_of])[cu])
    c_value = psi * KPA_PER_UNIT["psi"] / _factor(c_unit_name)

    # Vacuum rows: cranking (near zero with the throttle open) and warm idle.
    v_crank = np.flatnonzero(n_vac_crank)
    v_idle = np.flatnonzero(n_vac_idle)
    crank_kpa = np.where(throttle_open[v_crank] == "yes", rng.uniform(0.0, 3.0, v_crank.size),
                         rng.uniform(8.0, 17.0, v_crank.size))
    idle_kpa = rng.uniform(57.0, 70.0, v_idle.size) * site_baro[t_unit[v_idle]] / 101.325
    v_test = np.concatenate([v_crank, v_idle])
    v_unit_name = np.array([SITES[s][4] for s in site_of])[t_unit[v_test]]
    v_value = np.concatenate([crank_kpa, idle_kpa]) / _factor(v_unit_name)

    # All rows, each test's rows together: compression by cylinder, then the vacuums.
    test_of = np.concatenate([c_test, v_test])
    order_in_test = np.concatenate([c_cyl, np.full(v_crank.size, 100),
                                    np.full(v_idle.size, 101)])
    order = np.lexsort((order_in_test, test_of))
    test_of = test_of[order]
    kind = np.concatenate([np.full(c_test.size, "compression", dtype=object),
                           np.full(v_crank.size, "vacuum_cranking", dtype=object),
                           np.full(v_idle.size, "vacuum_idle", dtype=object)])[order]
    cylinder = pd.array(np.concatenate([c_cyl, np.zeros(v_test.size, dtype=int)])[order],
                        dtype="Int64")
    cylinder[kind != "compression"] = pd.NA
    unit_name = np.concatenate([c_unit_name, v_unit_name])[order]
    value = _typed_round(np.concatenate([c_value, v_value])[order], unit_name)
    first_row = np.r_[True, test_of[1:] != test_of[:-1]]

    stamp = pd.Series(tested_at).dt.strftime("%Y-%m-%d %H:%M").to_numpy()
    rows = pd.DataFrame({
        "fleet_no": units["fleet_no"].to_numpy()[t_unit][test_of],
        "tested_at": stamp[test_of],
        "hours": hours[test_of],
        "kind": kind,
        "cylinder": cylinder,
        "value": value,
        "units": unit_name,
    })
    for col, values in conditions.items():
        rows[col] = np.where(first_row, values[test_of], np.nan)
    rows["throttle_open"] = np.where(first_row, throttle_open[test_of], "")
    technician = np.array(_TECHNICIANS, dtype=object)[rng.integers(0, len(_TECHNICIANS),
                                                                   n_tests)]
    rows["technician"] = np.where(first_row, technician[test_of], "")
    note = np.where(rng.random(n_tests) < 0.02,
                    np.array(_NOTES, dtype=object)[rng.integers(0, len(_NOTES), n_tests)], "")
    rows["note"] = np.where(first_row, note[test_of], "")
    return rows, n_tests


def _factor(unit_names: np.ndarray) -> np.ndarray:
    """kPa per unit for an array of unit names."""
    return pd.Series(unit_names).map(KPA_PER_UNIT).to_numpy(dtype=float)


def _typed_round(values: np.ndarray, unit_names: np.ndarray) -> np.ndarray:
    """Round each value to the decimals a technician types in its unit."""
    decimals = pd.Series(unit_names).map(_DECIMALS).to_numpy()
    return np.where(decimals == 0, np.round(values), np.round(values, 1))


def main() -> None:
    """Write a synthetic fleet from the command line."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("folder", type=Path)
    parser.add_argument("--units", type=int, default=20_000)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    paths = write_fleet(args.folder, args.units, args.seed)
    files = {f"{kind}_csv": str(path) for kind, path in paths.items()}
    print(json.dumps({**files, **read_manifest(args.folder)}, indent=2))


if __name__ == "__main__":
    main()
