"""Sites, engine families and units: the fleet file's import and look-ups by fleet number."""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path
from typing import Any

import pandas as pd
from sqlalchemy import text
from sqlalchemy.engine import Connection, Engine

from fleetdb import limits, validate
from fleetdb.csvfiles import CsvFile
from fleetdb.errors import FleetDBError, InvalidInput
from fleetdb.ingest import ImportReport, Progress, bulk_insert, none_for_na, raise_if, stamp
from fleetdb.models import FUELS, SPREAD_RULES, EngineFamily
from fleetdb.units import _ALIASES, KPA_PER_UNIT

#: Longest text the store keeps for a family's typed attributes.
_TYPED_MAX = {"min_compression": EngineFamily.__table__.c.min_compression_typed.type.length,
              "banks": EngineFamily.__table__.c.banks.type.length}
#: What an import never changes on an existing family (the engine itself, not its limits).
IDENTITY_FIELDS = ("fuel", "cylinders", "banks", "compression_ratio", "system_volts")

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


def _family_record(name: str, given: dict[str, tuple[int | None, str]],
                   problems: validate.Problems, first_line: int | None) -> dict[str, Any] | None:
    """Turn a family's typed attributes into a row of engine_family (SI), or record problems."""
    missing = [c for c in validate.FAMILY_FIELDS if c not in given]
    if missing:
        problems.one(first_line, missing[0], f"new engine family {name!r} needs "
                     f"{', '.join(missing)} on its first line")
        return None
    n_before = len(problems.items)
    for col, longest in _TYPED_MAX.items():
        line, value = given[col]
        if len(value) > longest:
            problems.one(line, col, f"{len(value)} characters; at most {longest} are kept")
    if len(problems.items) > n_before:
        return None

    def num(col: str, lo: float, hi: float, default: float | None = None) -> float | None:
        if col not in given:
            return default
        line, value = given[col]
        try:
            if not value.isascii() or "_" in value:  # float() reads both; the store does not
                raise ValueError(value)
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
    minimum = num("min_compression", 1, 1100 if unit == "psi" else 7000 / factor
                  if unit else math.inf)
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


def _typed_number(x: float) -> str:
    return f"{x:.15g}"


def stored_as_given(stored: pd.Series, given: dict[str, tuple[int | None, str]],
                    line: int | None) -> dict[str, tuple[int | None, str]]:
    """A stored family's attributes as typed text, overlaid with what an input gives.

    Values given in compression units (expected, maximum difference) are re-expressed in the
    unit the input uses, so that a new ``compression_units`` applies to the given values only.

    :param stored: the family's row of ``engine_family``.
    :param given: the input's typed values by fleet-file column, with their lines.
    :param line: the line to name for stored values (the family's first line, or None).
    """
    unit = stored["min_compression_unit"]
    if "compression_units" in given:
        unit = _ALIASES.get(given["compression_units"][1].lower(), unit)
    factor = KPA_PER_UNIT.get(unit, 1.0)
    out: dict[str, tuple[int | None, str]] = {
        "fuel": (line, str(stored["fuel"])), "cylinders": (line, str(int(stored["cylinders"]))),
        "banks": (line, str(stored["banks"])),
        "compression_ratio": (line, _typed_number(float(stored["compression_ratio"]))),
        "min_compression": (line, str(stored["min_compression_typed"])),
        "compression_units": (line, str(stored["min_compression_unit"])),
        "spread_rule": (line, str(stored["spread_rule"])),
        "min_ratio": (line, _typed_number(float(stored["min_ratio"]))),
        "warm_test": (line, "yes" if bool(stored["warm_test"]) else "no"),
        "system_volts": (line, str(int(stored["system_volts"]))),
        "test_interval_days": (line, str(int(stored["test_interval_days"]))),
    }
    for col, kpa_col in (("expected_compression", "expected_kpa"),
                         ("max_difference", "max_diff_kpa")):
        if not pd.isna(stored[kpa_col]):
            out[col] = (line, _typed_number(float(stored[kpa_col]) / factor))
    if not pd.isna(stored["min_crank_rpm"]):
        out["min_crank_rpm"] = (line, _typed_number(float(stored["min_crank_rpm"])))
    return {**out, **given}


def identity_conflicts(name: str, stored: pd.Series, record: dict[str, Any],
                       given: dict[str, tuple[int | None, str]],
                       problems: validate.Problems) -> None:
    """Record a problem for each given attribute of the engine itself that differs from the
    stored family (fuel, cylinders, banks, compression ratio, system volts)."""
    for col in IDENTITY_FIELDS:
        if col not in given:
            continue
        new, old = record[col], stored[col]
        if col == "banks":
            same = (validate.parse_banks(new, int(record["cylinders"]))
                    == validate.parse_banks(old, int(stored["cylinders"]))
                    if int(record["cylinders"]) == int(stored["cylinders"]) else False)
        elif col == "compression_ratio":
            same = math.isclose(float(new), float(old), rel_tol=1e-9)
        elif col == "fuel":
            same = new == old
        else:
            same = int(new) == int(old)
        if not same:
            line, value = given[col]
            problems.one(line, col, f"{value!r} differs from the stored {col.replace('_', ' ')} "
                         f"of engine family {name!r} ({old}); an import does not change an "
                         "existing family's fuel, cylinders, banks, compression ratio or "
                         "system volts")


def _limit_change_line(changed: list[str], given: dict[str, tuple[int | None, str]],
                       first: int) -> int:
    lines = [given[f][0] for c in changed for f in (limits.FIELD_OF_COLUMN[c],
                                                    "compression_units") if f in given]
    return min((ln for ln in lines if ln is not None), default=first)


def _file_name(csv: CsvFile) -> str:
    """The file's name without its folders, as the import batch keeps it."""
    return Path(csv.name).name[:255]


def import_fleet(conn: Connection, csv: CsvFile, report: ImportReport, *, batch_id: int | None,
                 by: str, progress: Progress | None, source: str) -> None:
    """Write the new sites, engine families and units of a fleet file.

    Limits given for an existing engine family that differ from its current ones become
    its next limits version (reason: the file's ``limits_reason``, else file and line).
    """
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
        # The elevation as validated (NaN: not a number or out of range, already reported).
        elev_m = None if elev is None else rows.at[elev[0], "site_elevation_m"]
        if name in sites_db:
            if elev_m is not None and not pd.isna(elev_m) and not math.isclose(
                    float(elev_m), sites_db[name][1], abs_tol=1e-9):
                problems.one(elev[0], "site_elevation_m", f"{elev[1]} differs from the stored "
                             f"elevation of {name!r} ({sites_db[name][1]:g} m)")
        elif elev is None:
            problems.one(first, "site_elevation_m",
                         f"new site {name!r} needs its elevation in metres on its first line")
        elif not pd.isna(elev_m):
            new_sites.append((name, float(elev_m)))

    fam_cols = validate.FAMILY_FIELDS + validate.FAMILY_EXTRAS
    fam_given = _first_values(frame, "engine_family", fam_cols, problems, "engine family")
    reasons = _reasons(frame, problems)
    new_families = []
    limit_changes = []
    for name, given in fam_given.items():
        first = int(frame.index[frame["engine_family"] == name][0])
        if name not in fams_db.index:
            record = _family_record(name, given, problems, first)
            if record:
                new_families.append(record)
            continue
        stored = fams_db.loc[name]
        if "compression_units" in given and "min_compression" not in given:
            problems.one(given["compression_units"][0], "min_compression",
                         f"engine family {name!r} is in the store: give min_compression "
                         "with its compression_units")
            continue
        record = _family_record(name, stored_as_given(stored, given, first), problems, first)
        if record is None:
            continue
        identity_conflicts(name, stored, record, given, problems)
        changed = limits.changed_columns(stored, record)
        if changed:
            line = _limit_change_line(changed, given, first)
            reason = reasons.get(name) or f"fleet file {_file_name(csv)}, line {line}"
            limit_changes.append((int(stored["id"]), record, reason))
    raise_if(problems)

    at = stamp(conn)
    bulk_insert(conn, "site", ["name", "elevation_m", "created_at"],
                [(n, e, at) for n, e in new_sites])
    bulk_insert(conn, "engine_family", [*_FAMILY_COLUMNS, "limits_version", "created_at"],
                [tuple(r[c] for c in _FAMILY_COLUMNS) + (1, at) for r in new_families])
    limits.first_versions(conn, reason=f"engine family created by fleet file "
                          f"{_file_name(csv)}", by=by, batch_id=batch_id, at=at)
    for family_id, record, reason in limit_changes:
        limits.add_version(conn, family_id, record, reason=reason, by=by, source="import",
                           batch_id=batch_id, at=at)
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
    if limit_changes:
        report.written["limit versions"] = len(limit_changes)
    report.present = present


def _reasons(frame: pd.DataFrame, problems: validate.Problems) -> dict[str, str]:
    """Each family's first ``limits_reason`` (why its limits change), checked for length."""
    if "limits_reason" not in frame:
        return {}
    validate.too_long(frame, "limits_reason", limits.REASON_MAX, problems)
    given = frame[frame["limits_reason"] != ""]
    return dict(given.groupby("engine_family", sort=False)["limits_reason"].first())


#: ``fleetdb family limits`` options by fleet-file column, for messages.
OPTION_OF_FIELD = {
    "min_compression": "--min-compression", "compression_units": "--min-compression",
    "expected_compression": "--expected", "spread_rule": "--spread-rule",
    "min_ratio": "--min-ratio", "max_difference": "--max-difference",
    "min_crank_rpm": "--min-crank-rpm", "warm_test": "--warm-test",
    "test_interval_days": "--test-interval-days",
}
#: Typed as one of these, a limit that may be absent is cleared (back to the default).
CLEAR_WORDS = ("none", "default")


def set_limits(engine: Engine, family: str, typed: dict[str, str], *, reason: str,
               by: str | None = None) -> dict[str, Any]:
    """Change an engine family's limits: checked like a fleet file, kept as a new version.

    :param family: the engine family's name.
    :param typed: new values by fleet-file column (:data:`fleetdb.limits.LIMIT_FIELDS`),
        as typed; ``min_compression``, ``expected_compression`` and ``max_difference`` may
        carry their unit (``120psi``); ``none`` clears an optional limit.
    :param reason: why (kept with the version).
    :param by: who (default: the operating-system user).
    :returns: ``{"changed", "version", "limits"}`` where ``limits`` describes the version
        now current (see :func:`fleetdb.limits.describe`).
    :raises InvalidInput: a value that cannot be accepted, named by its option.
    """
    from fleetdb import access, audit
    from fleetdb.units import parse_quantity

    access.require("limits", "change engine family limits")
    by = access.author(by)
    problems = validate.Problems("command line")
    reason = reason.strip()
    if not reason or len(reason) > limits.REASON_MAX or "\x00" in reason:
        problems.one(None, "--reason", f"say why the limits change, in 1 to "
                     f"{limits.REASON_MAX} characters")
    if len(by) > limits.BY_MAX:
        problems.one(None, "--by", f"at most {limits.BY_MAX} characters")
    unknown = sorted(set(typed) - set(limits.LIMIT_FIELDS))
    if unknown:
        raise ValueError(f"not limits: {', '.join(unknown)}")
    with engine.begin() as conn:
        fam = pd.read_sql_query(text("SELECT * FROM engine_family WHERE name = :n"), conn,
                                params={"n": family})
        if fam.empty:
            limits.history(engine, family)  # raises with the list of families
        stored = fam.iloc[0]
        given: dict[str, tuple[int | None, str]] = {}
        unit = str(stored["min_compression_unit"])
        if typed.get("min_compression"):
            try:
                number, unit = parse_quantity(typed["min_compression"], unit)
                given["min_compression"] = (None, f"{number:.15g}")
                given["compression_units"] = (None, unit)
            except FleetDBError as exc:
                problems.one(None, "--min-compression", str(exc))
        cleared = set()
        for col, value in typed.items():
            if col == "min_compression" or value is None:
                continue
            if value.strip().lower() in CLEAR_WORDS and col in (
                    "expected_compression", "max_difference", "min_crank_rpm"):
                cleared.add(col)
            elif col in ("expected_compression", "max_difference"):
                try:
                    number, its_unit = parse_quantity(value, unit)
                    in_unit = number * KPA_PER_UNIT[its_unit] / KPA_PER_UNIT[unit]
                    given[col] = (None, f"{in_unit:.15g}")
                except (FleetDBError, KeyError) as exc:
                    problems.one(None, OPTION_OF_FIELD[col], str(exc))
            else:
                given[col] = (None, value.strip())
        merged = {k: v for k, v in stored_as_given(stored, given, None).items()
                  if k not in cleared}
        record = None if problems else _family_record(family, merged, problems, None)
        if problems or record is None:
            raise InvalidInput([replace(p, field=OPTION_OF_FIELD.get(p.field or "", p.field))
                                for p in problems.sorted()])
        current = int(stored["limits_version"])
        if not limits.changed_columns(stored, record):
            return {"changed": False, "version": current,
                    "limits": limits.describe(conn, int(stored["id"]), current)}
        version = limits.add_version(conn, int(stored["id"]), record, reason=reason, by=by,
                                     source="cli", batch_id=None, at=stamp(conn))
        changed = sorted(limits.changed_columns(stored, record))
        audit.record(conn, "limits.change", f"engine family {family} limits version {version} "
                     f"({', '.join(changed)}): {reason}", family_id=int(stored["id"]),
                     detail={"family": family, "version": version, "changed": changed,
                             "reason": reason}, by=by)
        return {"changed": True, "version": version,
                "limits": limits.describe(conn, int(stored["id"]), version)}
