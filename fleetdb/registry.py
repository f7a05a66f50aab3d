"""Sites, engine families and units: the fleet file's import and look-ups by fleet number."""

from __future__ import annotations

import math
from typing import Any

import pandas as pd
from sqlalchemy import text
from sqlalchemy.engine import Connection

from fleetdb import validate
from fleetdb.csvfiles import CsvFile
from fleetdb.ingest import ImportReport, Progress, bulk_insert, none_for_na, raise_if, stamp
from fleetdb.models import FUELS, SPREAD_RULES
from fleetdb.units import _ALIASES, KPA_PER_UNIT

_FAMILY_COLUMNS = (
    "name", "fuel", "cylinders", "banks", "compression_ratio", "min_compression_kpa",
    "min_compression_typed", "min_compression_unit", "expected_kpa", "spread_rule", "min_ratio",
    "max_diff_kpa", "min_crank_rpm", "warm_test", "system_volts", "test_interval_days",
)


def _first_values(frame: pd.DataFrame, group_col: str, cols: tuple[str, ...],
                  problems: validate.Problems, what: str) -> dict[str, dict[str, tuple[int, str]]]:
    """For each group, the first non-blank text of each column and its line; flag conflicts."""
    out: dict[str, dict[str, tuple[int, str]]] = {}
    for line, row in frame.iterrows():
        name = row[group_col]
        if not name:
            continue
        seen = out.setdefault(name, {})
        for col in cols:
            value = row.get(col, "")
            if not value:
                continue
            if col in seen and not _same(seen[col][1], value):
                problems.one(int(line), col, f"{value!r} conflicts with {seen[col][1]!r} given "
                             f"for {what} {name!r} on line {seen[col][0]}")
            seen.setdefault(col, (int(line), value))
    return out


def _same(a: str, b: str) -> bool:
    try:
        return math.isclose(float(a), float(b), rel_tol=1e-12)
    except ValueError:
        return a.strip().lower() == b.strip().lower()


def _family_record(name: str, given: dict[str, tuple[int, str]], problems: validate.Problems,
                   first_line: int) -> dict[str, Any] | None:
    """Turn a family's typed attributes into a row of engine_family (SI), or record problems."""
    missing = [c for c in validate.FAMILY_FIELDS if c not in given]
    if missing:
        problems.one(first_line, missing[0], f"new engine family {name!r} needs "
                     f"{', '.join(missing)} on its first line")
        return None
    n_before = len(problems.items)

    def num(col: str, lo: float, hi: float, default: float | None = None) -> float | None:
        if col not in given:
            return default
        line, value = given[col]
        try:
            x = float(value)
        except ValueError:
            problems.one(line, col, f"{value!r} is not a number")
            return None
        if not (lo <= x <= hi) or not math.isfinite(x):
            problems.one(line, col, f"{value} is outside the plausible range {lo:g} to {hi:g}")
            return None
        return x

    fuel_line, fuel = given["fuel"]
    if fuel.lower() not in FUELS:
        problems.one(fuel_line, "fuel", f"{fuel!r} is not one of {', '.join(FUELS)}")
    cylinders = num("cylinders", 1, 24)
    if cylinders is not None and cylinders != int(cylinders):
        problems.one(given["cylinders"][0], "cylinders", "a whole number of cylinders, please")
    banks_line, banks = given["banks"]
    if cylinders is not None:
        try:
            validate.parse_banks(banks, int(cylinders))
        except ValueError as exc:
            problems.one(banks_line, "banks", str(exc))
    unit_line, unit_text = given["compression_units"]
    unit = _ALIASES.get(unit_text.lower())
    if unit not in ("psi", "kPa", "bar", "MPa"):
        problems.one(unit_line, "compression_units", f"{unit_text!r}: use psi, kPa, bar or MPa")
        unit = None
    factor = KPA_PER_UNIT[unit] if unit else math.nan
    minimum = num("min_compression", 1, 1100 if unit == "psi" else 7000 / factor)
    expected = num("expected_compression", 1, 7000 / factor if unit else math.inf)
    max_diff = num("max_difference", 0, 7000 / factor if unit else math.inf)
    rule = given.get("spread_rule", (first_line, "ratio"))
    if rule[1].lower() not in SPREAD_RULES:
        problems.one(rule[0], "spread_rule", f"{rule[1]!r} is not one of {', '.join(SPREAD_RULES)}")
    if rule[1].lower() == "diff" and max_diff is None:
        problems.one(rule[0], "max_difference", "the diff spread rule needs max_difference")
    warm = given.get("warm_test", (first_line, "yes"))
    if warm[1].lower() not in ("yes", "no"):
        problems.one(warm[0], "warm_test", f"{warm[1]!r}: write yes or no")
    volts = num("system_volts", 12, 24, 12)
    if volts not in (12, 24, None):
        problems.one(given["system_volts"][0], "system_volts", "12 or 24")
    record = {
        "name": name, "fuel": fuel.lower(), "cylinders": int(cylinders or 0), "banks": banks,
        "compression_ratio": num("compression_ratio", 1.5, 30),
        "min_compression_kpa": minimum * factor if minimum is not None else None,
        "min_compression_typed": given["min_compression"][1], "min_compression_unit": unit,
        "expected_kpa": expected * factor if expected is not None else None,
        "spread_rule": rule[1].lower(), "min_ratio": num("min_ratio", 0.01, 1.0, 0.75),
        "max_diff_kpa": max_diff * factor if max_diff is not None else None,
        "min_crank_rpm": num("min_crank_rpm", 1, 3000),
        "warm_test": warm[1].lower() == "yes", "system_volts": int(volts or 12),
        "test_interval_days": int(num("test_interval_days", 1, 3650, 365) or 365),
    }
    return record if len(problems.items) == n_before else None


def import_fleet(conn: Connection, csv: CsvFile, report: ImportReport, *, batch_id: int | None,
                 by: str, progress: Progress | None, source: str) -> None:
    """Write the new sites, engine families and units of a fleet file."""
    problems = validate.Problems(csv.name)
    rows = validate.fleet_rows(csv.frame, problems)
    frame = csv.frame
    sites_db = {name: (sid, elev) for sid, name, elev in
                conn.execute(text("SELECT id, name, elevation_m FROM site"))}
    fams_db = pd.read_sql_query(text("SELECT * FROM engine_family"), conn).set_index("name")

    site_given = _first_values(frame, "site", ("site_elevation_m",), problems, "site")
    new_sites = []
    for name, given in site_given.items():
        first = int(frame.index[frame["site"] == name][0])
        elev = given.get("site_elevation_m")
        if name in sites_db:
            if elev and not math.isclose(float(elev[1]), sites_db[name][1], abs_tol=1e-9):
                problems.one(elev[0], "site_elevation_m", f"{elev[1]} differs from the stored "
                             f"elevation of {name!r} ({sites_db[name][1]:g} m)")
        elif elev is None:
            problems.one(first, "site_elevation_m",
                         f"new site {name!r} needs its elevation in metres on its first line")
        elif not pd.isna(rows.at[elev[0], "site_elevation_m"]):
            new_sites.append((name, float(elev[1])))

    fam_cols = validate.FAMILY_FIELDS + validate.FAMILY_EXTRAS
    fam_given = _first_values(frame, "engine_family", fam_cols, problems, "engine family")
    new_families = []
    for name, given in fam_given.items():
        first = int(frame.index[frame["engine_family"] == name][0])
        if name in fams_db.index:
            stored = fams_db.loc[name]
            if "cylinders" in given and int(float(given["cylinders"][1])) != stored["cylinders"]:
                problems.one(given["cylinders"][0], "cylinders", f"differs from the stored "
                             f"{stored['cylinders']} cylinders of {name!r}; an import does not "
                             "change an existing engine family")
            continue
        record = _family_record(name, given, problems, first)
        if record:
            new_families.append(record)
    raise_if(problems)

    at = stamp(conn)
    bulk_insert(conn, "site", ["name", "elevation_m", "created_at"],
                [(n, e, at) for n, e in new_sites])
    bulk_insert(conn, "engine_family", [*_FAMILY_COLUMNS, "created_at"],
                [tuple(r[c] for c in _FAMILY_COLUMNS) + (at,) for r in new_families])
    site_ids = dict(conn.execute(text("SELECT name, id FROM site")).all())
    fam_ids = dict(conn.execute(text("SELECT name, id FROM engine_family")).all())
    units_db = {fn: (sid, fid) for fn, sid, fid in
                conn.execute(text("SELECT fleet_no, site_id, family_id FROM unit"))}
    new_units = []
    present = 0
    for line, row in rows.iterrows():
        known = units_db.get(row["fleet_no"])
        sid, fid = site_ids[row["site"]], fam_ids[row["engine_family"]]
        if known is None:
            new_units.append((row["fleet_no"], sid, fid, row["in_service"], row["hours_per_week"]))
        elif known != (sid, fid):
            problems.one(int(line), "site", f"unit {row['fleet_no']!r} is already in the store "
                         "with another site or engine family; an import does not move units")
        else:
            present += 1
    raise_if(problems)
    dates = [None if pd.isna(d) else d.date() for d in (u[3] for u in new_units)]
    if conn.dialect.name == "sqlite":
        dates = [d.isoformat() if d else None for d in dates]
    bulk_insert(conn, "unit", ["fleet_no", "site_id", "family_id", "in_service",
                               "hours_per_week", "created_at", "created_by"],
                [(u[0], u[1], u[2], d, none_for_na(pd.Series([u[4]]))[0], at, by)
                 for u, d in zip(new_units, dates, strict=True)])
    report.written = {"sites": len(new_sites), "engine families": len(new_families),
                      "units": len(new_units)}
    report.present = present
