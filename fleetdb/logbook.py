"""One test at a time: log it from typed values, void it. Same validation as the import."""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime

import pandas as pd
from sqlalchemy import text
from sqlalchemy.engine import Engine

from fleetdb.csvfiles import TESTS_OPTIONAL, TESTS_REQUIRED, CsvFile
from fleetdb.errors import FleetDBError, InvalidInput, Problem
from fleetdb.ingest import import_csv, stamp


@dataclass(frozen=True)
class TypedReading:
    """One value as the technician typed it."""

    kind: str
    cylinder: int | None
    value: str
    units: str


def log_test(engine: Engine, fleet_no: str, tested_at: datetime | str, hours: float | str,
             readings: Sequence[TypedReading], *, conditions: dict[str, str] | None = None,
             by: str | None = None, source: str = "cli", source_name: str = "command line",
             dry_run: bool = False) -> int | None:
    """Validate and store one test; return its id (None on a dry run).

    :param engine: the store.
    :param fleet_no: the unit's fleet number.
    :param tested_at: when the test was taken (shop local time).
    :param hours: the hour meter at the test.
    :param readings: the values typed, each with kind, cylinder and unit.
    :param conditions: optional battery_v, crank_rpm, engine_temp_c, baro_kpa,
        throttle_open (yes/no), technician, note, as typed.
    :param by: who logs it (default: the operating-system user).
    :param source: ``cli`` or ``form``.
    :param source_name: how messages name the input.
    :param dry_run: validate only.
    :raises InvalidInput: with every problem found; nothing is written.
    """
    if not readings:
        problem = Problem(source_name, None, "value", "a test needs at least one reading")
        raise InvalidInput([problem])
    conditions = {k: str(v) for k, v in (conditions or {}).items() if v not in (None, "")}
    unknown = set(conditions) - set(TESTS_OPTIONAL)
    if unknown:
        raise InvalidInput([Problem(source_name, None, k, "not a test condition") for k in unknown])
    # PostgreSQL text cannot hold NUL; an import file with one is refused whole (csvfiles).
    texts = [("fleet_no", fleet_no), ("tested_at", tested_at), ("hours", hours), ("by", by),
             *conditions.items(), *(("value", f"{r.kind}{r.value}{r.units}") for r in readings)]
    nul = sorted({name for name, value in texts if "\x00" in str(value or "")})
    if nul:
        raise InvalidInput([Problem(source_name, None, name, "holds a NUL character, which "
                                    "cannot be stored") for name in nul])
    when = tested_at.isoformat(sep=" ") if isinstance(tested_at, datetime) else str(tested_at)
    rows = [{"fleet_no": fleet_no.strip(), "tested_at": when.strip(), "hours": str(hours).strip(),
             "kind": _typed(r.kind), "cylinder": "" if r.cylinder is None else str(r.cylinder),
             "value": _typed(r.value), "units": _typed(r.units), **conditions}
            for r in readings]
    columns = [*TESTS_REQUIRED, *TESTS_OPTIONAL]
    frame = pd.DataFrame([[row.get(c, "") for c in columns] for row in rows], columns=columns)
    frame.index = pd.RangeIndex(1, 1 + len(frame))
    digest = hashlib.sha256(frame.to_csv().encode() + (by or "").encode()).hexdigest()
    csv = CsvFile(name=source_name, kind="tests", frame=frame, sha256=digest)
    report = import_csv(engine, csv, dry_run=dry_run, by=by, source=source, only_new=True)
    if report.outcome == "dry_run":
        return None
    if report.outcome in ("already_imported", "present"):
        raise InvalidInput([Problem(source_name, None, "tested_at",
                                    f"unit {fleet_no} already has a test at {when} with "
                                    f"{hours} h; nothing written")])
    return report.test_ids[0]


def _typed(value: object) -> str:
    """A typed value as stripped text; nothing typed (None) is blank."""
    return "" if value is None else str(value).strip()


def void_test(engine: Engine, test_id: int, reason: str, by: str | None = None) -> None:
    """Take a test out of the analysis. It stays in the store and in every history.

    :param test_id: the test.
    :param reason: why, in words (required).
    :param by: who voids it (default: the operating-system user).
    """
    from fleetdb import access, audit

    actor = access.require("void_own", "void tests")
    if not reason.strip():
        raise FleetDBError("say why the test is voided (--reason)")
    with engine.begin() as conn:
        test = conn.execute(text("SELECT t.unit_id, t.created_by, u.fleet_no FROM test t "
                                 "JOIN unit u ON u.id = t.unit_id WHERE t.id = :id"),
                            {"id": test_id}).first()
        if test is None:
            raise FleetDBError(f"no test with id {test_id}")
        if not actor.may("void_any") and test.created_by != actor.name:
            raise access.NotAllowed(f"{actor.name} ({actor.role}) may void only the tests they "
                                    f"logged; test {test_id} was logged by {test.created_by}")
        already = conn.execute(text("SELECT reason FROM test_void WHERE test_id = :id"),
                               {"id": test_id}).scalar()
        if already is not None:
            raise FleetDBError(f"test {test_id} is already voided ({already})")
        conn.execute(text("INSERT INTO test_void (test_id, reason, voided_by, voided_at) "
                          "VALUES (:id, :reason, :by, :at)"),
                     {"id": test_id, "reason": reason.strip(), "by": access.author(by),
                      "at": stamp(conn)})
        audit.record(conn, "test.void", f"voided test {test_id} of {test.fleet_no}: "
                     f"{reason.strip()}", unit_ids=[test.unit_id],
                     detail={"test_id": test_id, "reason": reason.strip(),
                             "logged_by": test.created_by}, by=by)


def voidable_tests(engine: Engine, fleet_no: str) -> list[dict[str, object]]:
    """The unit's tests the current actor may void (not voided yet), newest first.

    :returns: ``[{test_id, tested_at, hours, logged_by}]``; a user without the right to void
        any test sees only the tests they logged; a user who may not void sees none.
    """
    from fleetdb import access

    actor = access.current()
    if not actor.may("void_own"):
        return []
    rows = _rows(engine, "SELECT t.id, t.tested_at, t.hours, t.created_by FROM test t JOIN unit "
                 "u ON u.id = t.unit_id LEFT JOIN test_void v ON v.test_id = t.id WHERE "
                 "u.fleet_no = :f AND v.id IS NULL ORDER BY t.tested_at DESC, t.id DESC",
                 {"f": fleet_no})
    return [{"test_id": r[0], "tested_at": str(r[1])[:16], "hours": r[2], "logged_by": r[3]}
            for r in rows if actor.may("void_any") or r[3] == actor.name]


def _rows(engine: Engine, sql: str, params: dict[str, object]) -> list[tuple]:
    with engine.connect() as conn:
        return [tuple(r) for r in conn.execute(text(sql), params)]
