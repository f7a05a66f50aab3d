"""Engine family limits and their history: a change adds a version, nothing is overwritten.

The limits are what a test is judged against: the minimum compression (as typed, with its
unit, and in kPa), the expected (standard) compression, the spread rule with its ratio or
difference, the minimum cranking speed, whether the test is taken warm, and the test
interval. The family's other attributes (fuel, cylinders, banks, compression ratio, system
volts) describe the engine itself; an import never changes them.

Version 1 of every family is the limits it was created with (or, for a family older than
versioning, the limits it had then). Each later version records who, when, why and from
where (a fleet file's import batch, or ``fleetdb family limits``). The family's own limit
columns always equal its newest version; both are written in one transaction.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from datetime import UTC
from typing import Any

from sqlalchemy import text
from sqlalchemy.engine import Connection, Engine

from fleetdb.errors import FleetDBError
from fleetdb.models import EngineFamily, FamilyLimits

__all__ = ["LIMIT_COLUMNS", "LIMIT_FIELDS", "add_version", "changed_columns", "describe",
           "first_versions", "history"]

#: The limit columns, the same in ``engine_family`` and ``family_limits``.
LIMIT_COLUMNS = (
    "min_compression_kpa", "min_compression_typed", "min_compression_unit", "expected_kpa",
    "spread_rule", "min_ratio", "max_diff_kpa", "min_crank_rpm", "warm_test",
    "test_interval_days",
)
#: The fleet-file columns that carry limits (the rest describe the engine itself).
LIMIT_FIELDS = (
    "min_compression", "compression_units", "expected_compression", "spread_rule",
    "min_ratio", "max_difference", "min_crank_rpm", "warm_test", "test_interval_days",
)
#: Which fleet-file column gives each limit column.
FIELD_OF_COLUMN = {
    "min_compression_kpa": "min_compression", "expected_kpa": "expected_compression",
    "spread_rule": "spread_rule", "min_ratio": "min_ratio", "max_diff_kpa": "max_difference",
    "min_crank_rpm": "min_crank_rpm", "warm_test": "warm_test",
    "test_interval_days": "test_interval_days",
}
#: What decides whether limits changed: the SI values, not how they were typed.
_COMPARED = tuple(FIELD_OF_COLUMN)
REASON_MAX: int = FamilyLimits.__table__.c.reason.type.length
BY_MAX: int = FamilyLimits.__table__.c.created_by.type.length
_FAMILY_NAME_MAX: int = EngineFamily.__table__.c.name.type.length


def _missing(value: Any) -> bool:
    return value is None or (isinstance(value, float) and math.isnan(value))


def _same(a: Any, b: Any) -> bool:
    if _missing(a) or _missing(b):
        return _missing(a) and _missing(b)
    if isinstance(a, str) or isinstance(b, str):
        return str(a) == str(b)
    return math.isclose(float(a), float(b), rel_tol=1e-9, abs_tol=1e-9)


def changed_columns(stored: Mapping[str, Any], new: Mapping[str, Any]) -> list[str]:
    """The limit columns whose value differs between two sets of limits (SI values).

    :param stored: a family's current limits (a row of ``engine_family``).
    :param new: proposed limits with the same column names.
    """
    return [c for c in _COMPARED if not _same(stored[c], new[c])]


def _values(limits: Mapping[str, Any]) -> dict[str, Any]:
    out = {c: (None if _missing(limits[c]) else limits[c]) for c in LIMIT_COLUMNS}
    out["warm_test"] = bool(out["warm_test"])
    out["test_interval_days"] = int(out["test_interval_days"])
    return out


def add_version(conn: Connection, family_id: int, limits: Mapping[str, Any], *, reason: str,
                by: str, source: str, batch_id: int | None, at: Any) -> int:
    """Make ``limits`` the family's current limits as its next version; return the version.

    The family row is updated first, which takes its write lock (row lock on PostgreSQL,
    the database's on SQLite), so two changes at once get consecutive versions.

    :param conn: a connection inside the caller's transaction.
    :param limits: every column of :data:`LIMIT_COLUMNS`.
    :param reason: why the limits changed.
    :param by: who changed them.
    :param source: ``import`` or ``cli``.
    :param batch_id: the import batch, for a change from a fleet file.
    :param at: the time of the write (:func:`fleetdb.ingest.stamp`).
    """
    values = _values(limits)
    version = conn.execute(text(
        "UPDATE engine_family SET limits_version = limits_version + 1, "
        + ", ".join(f"{c} = :{c}" for c in LIMIT_COLUMNS)
        + " WHERE id = :family_id RETURNING limits_version"),
        {**values, "family_id": family_id}).scalar_one()
    conn.execute(text(
        "INSERT INTO family_limits (family_id, version, " + ", ".join(LIMIT_COLUMNS)
        + ", reason, source, batch_id, created_at, created_by) VALUES (:family_id, :version, "
        + ", ".join(f":{c}" for c in LIMIT_COLUMNS)
        + ", :reason, :source, :batch_id, :at, :by)"),
        {**values, "family_id": family_id, "version": version, "reason": reason,
         "source": source, "batch_id": batch_id, "at": at, "by": by})
    return int(version)


def first_versions(conn: Connection, *, reason: str, by: str, batch_id: int | None,
                   at: Any) -> int:
    """Write version 1 of every family that has no version yet (families just created).

    :returns: how many versions were written.
    """
    result = conn.execute(text(
        "INSERT INTO family_limits (family_id, version, " + ", ".join(LIMIT_COLUMNS)
        + ", reason, source, batch_id, created_at, created_by) SELECT f.id, 1, "
        + ", ".join(f"f.{c}" for c in LIMIT_COLUMNS)
        + ", :reason, 'import', :batch_id, :at, :by FROM engine_family f WHERE NOT EXISTS "
        "(SELECT 1 FROM family_limits l WHERE l.family_id = f.id)"),
        {"reason": reason, "batch_id": batch_id, "at": at, "by": by})
    return int(result.rowcount or 0)


def _utc_text(when: Any) -> str | None:
    """A stored UTC time as ``YYYY-MM-DD HH:MM:SS`` (SQLite gives text, PostgreSQL datetimes)."""
    if when is None:
        return None
    if isinstance(when, str):
        return when[:19].replace("T", " ")
    if when.tzinfo is not None:
        when = when.astimezone(UTC).replace(tzinfo=None)
    return when.isoformat(sep=" ", timespec="seconds")


def _row(r: Any) -> dict[str, Any]:
    return {
        "version": int(r.version), "set_at": _utc_text(r.created_at),
        "set_by": r.created_by, "source": r.source, "reason": r.reason,
        "batch_id": r.batch_id,
        "min_compression_kpa": float(r.min_compression_kpa),
        "min_compression_typed": r.min_compression_typed,
        "min_compression_unit": r.min_compression_unit,
        "expected_kpa": None if r.expected_kpa is None else float(r.expected_kpa),
        "spread_rule": r.spread_rule, "min_ratio": float(r.min_ratio),
        "max_diff_kpa": None if r.max_diff_kpa is None else float(r.max_diff_kpa),
        "min_crank_rpm": None if r.min_crank_rpm is None else float(r.min_crank_rpm),
        "warm_test": bool(r.warm_test), "test_interval_days": int(r.test_interval_days),
    }


_SELECT = ("SELECT version, created_at, created_by, source, reason, batch_id, "
           + ", ".join(LIMIT_COLUMNS) + " FROM family_limits ")


def describe(engine: Engine | Connection, family_id: int, version: int | None
             ) -> dict[str, Any] | None:
    """One version of a family's limits: values, who set them, when, why (None if unknown).

    :param family_id: the engine family.
    :param version: its limits version (as recorded with a snapshot or a verdict).
    """
    if version is None or _missing(version):
        return None

    def run(conn: Connection) -> Any:
        return conn.execute(text(_SELECT + "WHERE family_id = :f AND version = :v"),
                            {"f": int(family_id), "v": int(version)}).first()

    if isinstance(engine, Connection):
        row = run(engine)
    else:
        with engine.connect() as conn:
            row = run(conn)
    return None if row is None else _row(row)


def history(engine: Engine, family: str) -> dict[str, Any]:
    """Every version of an engine family's limits, oldest first, and which one is current.

    :param family: the engine family's name.
    :raises FleetDBError: no family of that name.
    """
    with engine.connect() as conn:
        fam = conn.execute(text("SELECT id, name, limits_version FROM engine_family "
                                "WHERE name = :n"), {"n": family}).first()
        if fam is None:
            names = conn.execute(text("SELECT name FROM engine_family ORDER BY name")).scalars()
            raise FleetDBError(f"no engine family named {family[:_FAMILY_NAME_MAX]!r}; the "
                               f"families are: {', '.join(names) or '(none yet)'}")
        rows = conn.execute(text(_SELECT + "WHERE family_id = :f ORDER BY version"),
                            {"f": fam.id}).all()
    return {"engine_family": fam.name, "family_id": int(fam.id),
            "current_version": int(fam.limits_version), "versions": [_row(r) for r in rows]}
