"""Thin adapters between the pages and fleetdb: plain values in, plain values out.

The dashboard computes no analysis of its own. Every function takes the database URL
(kept in ``app.server.config``, see :func:`current_url`) and calls fleetdb: ``views`` to
read, ``logbook`` to check and write a test, ``health`` for levels and verdicts.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass, field
from functools import lru_cache
from types import ModuleType
from typing import Any

import pandas as pd
from flask import current_app
from sqlalchemy.engine import Engine
from sqlalchemy.exc import IntegrityError

from fleetdb import db, logbook, views
from fleetdb.errors import InvalidInput, Problem
from fleetdb.validate import parse_banks

#: The key of ``app.server.config`` that holds the database URL.
URL_KEY = "FLEETDB_DATABASE_URL"
#: How many units the type-ahead offers at once.
UNIT_OPTION_LIMIT = 50
#: What the form names itself in problems (the same ``source`` the CLI and imports fill).
FORM_SOURCE = "form"

#: Reading kinds a technician logs per cylinder, with the unit family each takes.
CYLINDER_KINDS: dict[str, str] = {
    "compression": "dry compression",
    "wet": "wet compression",
    "leakdown": "leak-down %",
    "relative": "relative %",
}
PERCENT_KINDS = ("leakdown", "relative")
PRESSURE_UNITS = ("psi", "kPa", "bar")
VACUUM_UNITS = ("inHg", "mmHg", "kPa")
VACUUM_LABELS = {"vacuum_cranking": "Cranking vacuum", "vacuum_idle": "Idle vacuum"}
#: Test-level fields of the form, by their fleetdb name, with the label the form shows.
FIELD_LABELS: dict[str, str] = {
    "fleet_no": "Unit",
    "tested_at": "Date and time",
    "hours": "Hour meter",
    "battery_v": "Battery volts under crank",
    "crank_rpm": "Cranking rpm",
    "engine_temp_c": "Engine temperature",
    "baro_kpa": "Barometer",
    "throttle_open": "Throttle held wide open",
    "technician": "Technician",
    "note": "Note",
    "value": "Readings",
}
CONDITION_FIELDS = ("battery_v", "crank_rpm", "engine_temp_c", "baro_kpa", "throttle_open",
                    "technician", "note")


def current_url() -> str:
    """The database URL of the app serving the current request."""
    return current_app.config[URL_KEY]


def engine_for(url: str) -> Engine:
    """The process-wide engine for ``url`` (one per URL)."""
    return db.get_engine(url)


def health_module() -> ModuleType | None:
    """``fleetdb.health`` if this installation has it, else None."""
    try:
        return importlib.import_module("fleetdb.health")
    except ModuleNotFoundError as exc:
        if exc.name != "fleetdb.health":
            raise
        return None


# -- units ------------------------------------------------------------------------------

def unit_options(url: str, search: str | None, selected: str | None) -> list[dict[str, str]]:
    """Units whose fleet number contains ``search``, for the type-ahead picker.

    :param search: what the user typed so far (None or blank: the first units).
    :param selected: the unit already picked; always kept among the options.
    """
    needle = (search or "").strip().lower()
    rows = views.fleet_listing(engine_for(url))
    hits = [r for r in rows if needle in r["fleet_no"].lower()][:UNIT_OPTION_LIMIT]
    if selected and all(r["fleet_no"] != selected for r in hits):
        hits += [r for r in rows if r["fleet_no"] == selected]
    return [{"label": f"{r['fleet_no']} · {r['engine_family']} · {r['site']}",
             "value": r["fleet_no"]} for r in hits]


@dataclass(frozen=True)
class UnitEngine:
    """What the form needs to lay out one unit's engine."""

    fleet_no: str
    site: str
    engine_family: str
    fuel: str
    cylinders: int
    banks_text: str
    banks: tuple[tuple[int, ...], ...]


@lru_cache(maxsize=256)
def unit_engine(url: str, fleet_no: str) -> UnitEngine:
    """The engine of a unit: family, fuel, cylinder count and banks (front to back).

    Cached by argument: a unit's family and a family's layout never change once stored
    (a conflicting value is an import error).
    """
    unit = views.unit_tests(engine_for(url), fleet_no)
    banks = parse_banks(unit["banks"], unit["cylinders"])
    return UnitEngine(fleet_no=fleet_no, site=unit["site"], engine_family=unit["engine_family"],
                      fuel=unit["fuel"], cylinders=unit["cylinders"], banks_text=unit["banks"],
                      banks=tuple(tuple(bank) for bank in banks))


# -- the form ---------------------------------------------------------------------------

@dataclass
class FormEntry:
    """One test as typed into the Log page; every value is the text typed (or None)."""

    fleet_no: str | None
    tested_at: str | None
    hours: str | None
    kind: str
    pressure_unit: str
    cylinders: dict[int, str | None]
    vacuum_unit: str = "inHg"
    vacuum: dict[str, str | None] = field(default_factory=dict)
    conditions: dict[str, str | None] = field(default_factory=dict)


@dataclass(frozen=True)
class FormProblem:
    """A problem placed in the form: where (a label) and fleetdb's own message."""

    where: str
    message: str
    cylinder: int | None = None


def _text(value: Any) -> str:
    return "" if value is None else str(value).strip()


def _reading_unit(entry: FormEntry) -> str:
    return "%" if entry.kind in PERCENT_KINDS else entry.pressure_unit


def typed_readings(entry: FormEntry, *, complete: bool) -> list[logbook.TypedReading]:
    """The readings of an entry, cylinders in number order, then the vacuums typed.

    :param complete: keep blank cylinders (saving: a blank is an error, as in the CLI);
        otherwise only the values typed so far are checked.
    """
    unit = _reading_unit(entry)
    readings = [logbook.TypedReading(entry.kind, cylinder, _text(value), unit)
                for cylinder, value in sorted(entry.cylinders.items())
                if complete or _text(value)]
    readings += [logbook.TypedReading(kind, None, _text(entry.vacuum.get(kind)), entry.vacuum_unit)
                 for kind in VACUUM_LABELS if _text(entry.vacuum.get(kind))]
    return readings


def _conditions(entry: FormEntry) -> dict[str, str]:
    return {name: _text(entry.conditions.get(name)) for name in CONDITION_FIELDS
            if _text(entry.conditions.get(name))}


def _place(problem: Problem, readings: list[logbook.TypedReading]) -> FormProblem:
    """Name the form control a problem belongs to; the message stays fleetdb's."""
    on_reading = problem.field in ("value", "cylinder", "units", "kind", None)
    if on_reading and problem.line is not None and 1 <= problem.line <= len(readings):
        reading = readings[problem.line - 1]
        if reading.cylinder is not None:
            kind = CYLINDER_KINDS.get(reading.kind, reading.kind)
            return FormProblem(f"Cylinder {reading.cylinder} ({kind})", problem.message,
                               reading.cylinder)
        return FormProblem(VACUUM_LABELS.get(reading.kind, reading.kind), problem.message)
    return FormProblem(FIELD_LABELS.get(problem.field or "", problem.field or "Test"),
                       problem.message)


def _log(url: str, entry: FormEntry, readings: list[logbook.TypedReading],
         dry_run: bool) -> int | None:
    def attempt() -> int | None:
        return logbook.log_test(
            engine_for(url), _text(entry.fleet_no), _text(entry.tested_at), _text(entry.hours),
            readings, conditions=_conditions(entry),
            by=_text(entry.conditions.get("technician")) or None, source="form",
            source_name=FORM_SOURCE, dry_run=dry_run)

    try:
        return attempt()
    except IntegrityError:
        # Two requests with the same content at once (a check while saving, a double
        # click): the loser's batch insert hits the unique file hash. Once more, it sees
        # the winner's batch and reports "already has a test" like the CLI.
        return attempt()


def check_entry(url: str, entry: FormEntry) -> list[FormProblem]:
    """Check what has been typed so far with the CLI's rules; nothing is written.

    Returns no problems while no reading is typed yet (there is nothing to check).
    """
    readings = typed_readings(entry, complete=False)
    if not readings:
        return []
    try:
        _log(url, entry, readings, dry_run=True)
    except InvalidInput as exc:
        return [_place(p, readings) for p in exc.problems]
    return []


@dataclass(frozen=True)
class SaveResult:
    """The outcome of saving: the new test's id and fleetdb's verdict on it, or the problems
    (nothing written)."""

    test_id: int | None
    problems: tuple[FormProblem, ...] = ()
    verdict: dict[str, Any] | None = None


def save_entry(url: str, entry: FormEntry) -> SaveResult:
    """Store the test if every value passes, then ask fleetdb for its verdict.

    Every cylinder of the block must hold a value (a blank one is reported, as the CLI
    reports a blank value). ``health.test_verdict`` refreshes the unit's health itself,
    reading the level before the refresh; refreshing here first would hide the change.
    Without ``fleetdb.health`` the test is saved and the verdict is None.
    """
    readings = typed_readings(entry, complete=True)
    try:
        test_id = _log(url, entry, readings, dry_run=False)
    except InvalidInput as exc:
        return SaveResult(None, tuple(_place(p, readings) for p in exc.problems))
    assert test_id is not None  # not a dry run
    health = health_module()
    verdict = None if health is None else health.test_verdict(engine_for(url), test_id)
    return SaveResult(test_id, (), verdict)


def dry_compression_of(url: str, fleet_no: str,
                       test_id: int) -> tuple[pd.DataFrame, float] | None:
    """One test's dry compression per cylinder at sea level, and the family minimum (kPa).

    :returns: (frame of ``cylinder``, ``value_kpa``; the minimum), or None when the test
        has no dry compression or this installation has no ``fleetdb.health``.
    """
    health = health_module()
    if health is None:
        return None
    report = health.unit_report(engine_for(url), fleet_no)
    rows = [(r["cylinder"], r["value_sl_kpa"]) for r in report["readings"]
            if r["test_id"] == test_id and r["kind"] == "compression"]
    if not rows:
        return None
    frame = pd.DataFrame(rows, columns=["cylinder", "value_kpa"])
    return frame, report["unit"]["min_compression_kpa"]
