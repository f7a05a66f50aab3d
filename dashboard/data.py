"""Thin adapters between the pages and fleetdb: plain values in, plain values out.

The dashboard computes no analysis of its own. Every function takes the database URL
(kept in ``app.server.config``, see :func:`current_url`) and calls fleetdb: ``views`` to
read, ``logbook`` to check and write a test, ``health`` for levels, verdicts, the board
and the unit report, ``plan`` and ``exports`` for the overhaul schedule and its files.
The Fleet wear page's frames come from ``fleetwear``, kept per day and brought up to date
after each write (:func:`fleet_wear`).
"""

from __future__ import annotations

import csv
import datetime as dt
import importlib
import io
import threading
from collections import OrderedDict
from dataclasses import dataclass, field
from functools import lru_cache
from types import ModuleType
from typing import Any

import pandas as pd
from flask import current_app
from sqlalchemy import text
from sqlalchemy.engine import Engine
from sqlalchemy.exc import IntegrityError

from fleetdb import access, db, exports, fleetwear, health, logbook, plan, views
from fleetdb.errors import InvalidInput, InvalidValue, Problem
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
    """Units whose fleet number contains ``search``, for the type-ahead pickers.

    Asks the store for at most :data:`UNIT_OPTION_LIMIT` matches (never the whole fleet).

    :param search: what the user typed so far (None or blank: the first units).
    :param selected: the unit already picked; always kept among the options.
    """
    engine = engine_for(url)
    hits = views.find_units(engine, search, limit=UNIT_OPTION_LIMIT)
    if selected and all(r["fleet_no"] != selected for r in hits):
        hits += [r for r in views.find_units(engine, selected, limit=UNIT_OPTION_LIMIT)
                 if r["fleet_no"] == selected]
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


# -- shared: days and names -----------------------------------------------------------------

def parse_day(value: str | None) -> dt.date | None:
    """An ISO day (``2026-12-01``, or the start of a longer ISO text); None if blank or bad.

    :param value: what a date picker or a query string holds.
    """
    try:
        return dt.date.fromisoformat(str(value).strip()[:10]) if value else None
    except ValueError:
        return None


def sites_and_families(url: str) -> tuple[list[str], list[str]]:
    """Every site name and every engine family name, sorted, for the filters.

    (A listing the lead may move into fleetdb.views; see the dashboard's notes.)
    """
    with engine_for(url).connect() as conn:
        sites = conn.execute(text("SELECT name FROM site ORDER BY name")).scalars().all()
        families = conn.execute(text("SELECT name FROM engine_family ORDER BY name")
                                ).scalars().all()
    return list(sites), list(families)


# -- Health board ---------------------------------------------------------------------------

#: Rows per page of the board.
BOARD_PAGE_SIZE = 25


@dataclass(frozen=True)
class BoardFilters:
    """What the board is narrowed to; None or blank means no narrowing."""

    as_of: dt.date | None = None
    site: str | None = None
    family: str | None = None
    level: str | None = None
    search: str | None = None


def board(url: str, filters: BoardFilters, *, offset: int = 0,
          limit: int | None = BOARD_PAGE_SIZE) -> dict[str, Any]:
    """One page of the week's board (``fleetdb.health.board``), read from the snapshot.

    :param filters: site, family, level, fleet-number search and the day.
    :param offset: rows to skip.
    :param limit: rows to return (None: every row of the filtered board).
    """
    return health.board(engine_for(url), filters.as_of, site=filters.site or None,
                        family=filters.family or None, level=filters.level or None,
                        search=(filters.search or "").strip() or None, offset=offset,
                        limit=limit)


#: The columns of the board's CSV export: (key in a board row, header).
BOARD_CSV_COLUMNS: tuple[tuple[str, str], ...] = (
    ("fleet_no", "fleet_no"), ("site", "site"), ("engine_family", "engine_family"),
    ("level", "level"), ("main_code", "main_reason_code"), ("main_text", "main_reason"),
    ("projected_date_early", "limit_date_conservative"), ("projected_date", "limit_date_best"),
    ("projected_hours_early", "limit_hours_conservative"), ("projected_hours", "limit_hours_best"),
    ("hours_to_limit", "hours_to_limit"), ("last_tested_at", "last_tested_at"),
    ("last_hours", "last_hours"), ("previous_level", "previous_level"), ("change", "change"),
)
#: First characters that make a spreadsheet read a cell as a formula (OWASP, "CSV Injection").
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def csv_safe(value: Any) -> Any:
    """A cell for a CSV a spreadsheet will open: text that could start a formula gets ``'``.

    Numbers stay numbers (a negative number is not a formula); only text is guarded.

    :param value: the cell's value.
    """
    if isinstance(value, str) and value.startswith(FORMULA_STARTS):
        return "'" + value
    return "" if value is None else value


def board_csv(url: str, filters: BoardFilters) -> str:
    """The whole filtered board as CSV text, one row per unit, worst first.

    :param filters: the filters the board shows now (every page is exported).
    """
    rows = board(url, filters, limit=None)["rows"]
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow([header for _, header in BOARD_CSV_COLUMNS])
    for row in rows:
        writer.writerow([csv_safe(row.get(key)) for key, _ in BOARD_CSV_COLUMNS])
    return out.getvalue()


# -- Unit history ---------------------------------------------------------------------------

@lru_cache(maxsize=32)
def _unit_report(url: str, fleet_no: str, as_of: dt.date | None,
                 mark: fleetwear.StoreMark) -> dict[str, Any]:
    return health.unit_report(engine_for(url), fleet_no, as_of)


def unit_report(url: str, fleet_no: str, as_of: dt.date | None) -> dict[str, Any]:
    """``fleetdb.health.unit_report``, shared by the unit page's callbacks.

    Cached by (url, unit, day, ``fleetwear.store_mark``): a new test, void, service event
    or family limits version is seen at once. Raises
    :class:`fleetdb.errors.UnitNotFound` for an unknown fleet number.
    """
    return _unit_report(url, fleet_no, as_of, fleetwear.store_mark(engine_for(url)))


# -- Fleet wear -----------------------------------------------------------------------------

#: Fleet wear results kept, newest last: one per (url, day); the oldest goes first.
_WEAR: OrderedDict[tuple[str, dt.date], fleetwear.FleetWear] = OrderedDict()
_WEAR_KEPT = 2
_WEAR_LOCK = threading.Lock()


def fleet_wear(url: str, as_of: dt.date | None) -> fleetwear.FleetWear:
    """The fleet's current wear rates and compression history, as of a day
    (``fleetdb.fleetwear``).

    The first view of a day assesses the whole fleet; later views bring that result up to
    date, re-assessing only the units written to since (one query when nothing was).
    One request at a time computes, so two page callbacks do not assess the fleet twice.

    :param as_of: the day (None: today).
    """
    key = (url, as_of or dt.date.today())
    engine = engine_for(url)
    with _WEAR_LOCK:
        known = _WEAR.get(key)
        result = (fleetwear.fleet_wear(engine, key[1]) if known is None
                  else fleetwear.bring_up_to_date(engine, known))
        _WEAR[key] = result
        _WEAR.move_to_end(key)
        while len(_WEAR) > _WEAR_KEPT:
            _WEAR.popitem(last=False)
    return result


# -- Overhaul plan --------------------------------------------------------------------------

#: Weeks of the planning window shown (the health board's planning horizon).
PLAN_WEEKS = 13
#: The key of closed weeks that apply to every site (``fleetdb.plan.ALL_SITES``).
EVERY_SITE = plan.ALL_SITES


@dataclass(frozen=True)
class PlanForm:
    """The what-if settings as typed on the Plan page; every value is what the input holds.

    ``capacity`` and ``lead_weeks``: site -> number (None when blank). ``closed``: site (or
    ``fleetdb.plan.ALL_SITES`` for every site) -> weeks like ``2026-W52, 2026-W53`` or a range
    ``2026-W52..2027-W01``. ``priority``: ``FLEET_NO=WEEKS`` items, comma separated.
    """

    capacity: dict[str, Any] = field(default_factory=dict)
    lead_weeks: dict[str, Any] = field(default_factory=dict)
    closed: dict[str, str | None] = field(default_factory=dict)
    priority: str | None = None


def settings_from_form(form: PlanForm, base: plan.ShopSettings) -> plan.ShopSettings:
    """The shop settings the form describes, on top of ``base`` (the settings in force).

    A site's value equal to the default is not stored per site; a site missing from the
    form keeps its value from ``base``. Closed weeks and priorities are replaced.

    :raises InvalidValue: a blank, negative or fractional number, a bad week, a bad raise.
    """
    def per_site(typed: dict[str, Any], kept: Any, default: int, what: str) -> dict[str, int]:
        values = {**kept, **{site: plan.parse_whole_number(v, f"{what} at {site}")
                             for site, v in typed.items()}}
        return {site: n for site, n in values.items() if n != default}

    closed = {site: plan.parse_closed_weeks(text_, "Closed weeks at every site"
                                       if site == plan.ALL_SITES else f"Closed weeks at {site}")
              for site, text_ in form.closed.items()}
    return plan.ShopSettings(
        default_capacity=base.default_capacity,
        capacity=per_site(form.capacity, base.capacity, base.default_capacity, "Capacity"),
        default_lead_weeks=base.default_lead_weeks,
        lead_weeks=per_site(form.lead_weeks, base.lead_weeks, base.default_lead_weeks,
                            "Parts lead time"),
        closed={site: days for site, days in closed.items() if days},
        priority={f: n for f, n in plan.parse_priorities(form.priority).items() if n})


def plan_settings_in_force(url: str, as_of: dt.date | None) -> plan.ShopSettings:
    """The settings of the latest committed plan as of the day, else fleetdb's defaults."""
    return plan.current_settings(engine_for(url), as_of or dt.date.today())


@dataclass
class PlanOutcome:
    """A plan to show and how it came about.

    ``kind``: ``in_force`` (the plan under the settings in force; stored or not),
    ``what_if`` (under the form's settings, not stored) or ``committed`` (just stored).
    ``in_force``: ``fleetdb.plan.latest_plan`` as of the day after the action (None: none yet).
    ``comparison``: ``fleetdb.plan.compare`` of the plan in force (before the action) with
    this one, for a what-if or a commit.
    """

    kind: str
    plan: plan.Plan
    in_force: dict[str, Any] | None
    comparison: dict[str, Any] | None = None

    @property
    def is_stored(self) -> bool:
        """Whether this schedule is the committed plan in force: every job kept its booking."""
        if self.plan.committed:
            return True
        return (self.in_force is not None and self.plan.based_on == self.in_force["plan_id"]
                and bool((self.plan.jobs["status"] == "booked").all()))

    def key(self) -> dict[str, Any]:
        """What the page keeps in the browser to export the same plan again (no frames)."""
        committed = self.plan.committed
        if committed is None and self.is_stored and self.in_force is not None:
            committed = {k: self.in_force[k] for k in ("plan_id", "created_by", "created_at")}
        return {"as_of": self.plan.as_of.isoformat(), "settings": self.plan.settings.to_json(),
                "kind": self.kind, "committed": committed}


def plan_in_force(url: str, as_of: dt.date | None) -> PlanOutcome:
    """The schedule under the settings in force (bookings of the committed plan kept)."""
    engine, day = engine_for(url), as_of or dt.date.today()
    return PlanOutcome("in_force", plan.make_plan(engine, day, weeks=PLAN_WEEKS),
                       plan.latest_plan(engine, day))


def _compared(url: str, day: dt.date, form: PlanForm) -> tuple[plan.Plan, dict[str, Any]]:
    engine = engine_for(url)
    base = plan.current_settings(engine, day)
    changed = plan.make_plan(engine, day, settings_from_form(form, base), weeks=PLAN_WEEKS)
    current = plan.make_plan(engine, day, base, weeks=PLAN_WEEKS)
    return changed, plan.compare(current, changed)


def try_plan(url: str, as_of: dt.date | None, form: PlanForm) -> PlanOutcome:
    """The schedule under the form's settings and what changes against the plan in force.

    Nothing is stored. Raises :class:`InvalidValue` for a bad input, an unknown site or
    fleet number (fleetdb's own message).
    """
    day = as_of or dt.date.today()
    changed, comparison = _compared(url, day, form)
    return PlanOutcome("what_if", changed, plan.latest_plan(engine_for(url), day), comparison)


def commit_plan(url: str, as_of: dt.date | None, form: PlanForm, who: str | None) -> PlanOutcome:
    """Store the schedule under the form's settings (``fleetdb.plan.commit``) and return it.

    :param who: who commits (required: a web server's login name says nothing).
    :raises InvalidValue: no name, or a bad input (then nothing is stored).
    """
    actor = access.current()
    name = actor.name if actor.role is not None else _text(who)  # a logged-in user is known
    if not name:
        raise InvalidValue("Committed by: write your name before committing.")
    day = as_of or dt.date.today()
    changed, comparison = _compared(url, day, form)
    plan.commit(engine_for(url), changed, name)
    return PlanOutcome("committed", changed, plan.latest_plan(engine_for(url), day), comparison)


def plan_export(url: str, key: dict[str, Any], kind: str) -> tuple[str, str]:
    """The plan a page shows as CSV or iCalendar text, and a file name for it.

    The schedule is made again from ``key`` (:meth:`PlanOutcome.key`: day and settings), so
    the browser never holds it; a committed plan is exported as such (confirmed events).

    :param key: what the page keeps of the plan it shows.
    :param kind: ``csv`` or ``ics``.
    """
    day = dt.date.fromisoformat(key["as_of"])
    made = plan.make_plan(engine_for(url), day, plan.ShopSettings.from_json(key["settings"]),
                          weeks=PLAN_WEEKS)
    committed = key.get("committed")
    shape = made.to_dict()
    shape["committed"] = committed
    name = f"overhaul-plan-{shape['week']}" + (
        f"-plan{committed['plan_id']}" if committed else "-draft")
    if kind == "ics":
        return exports.plan_ics(shape), name + ".ics"
    return exports.plan_csv(shape), name + ".csv"
