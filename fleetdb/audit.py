"""The audit trail: every write, when, by whom, from where, and which units it touched.

Write functions call :func:`record` inside their own transaction, so a write and its audit
row commit or roll back together. Rows are only ever added. A unit's trail is every event
linked to it plus the events on its engine family (limit changes).

Actions: ``import`` (a fleet, tests or events file), ``test.log`` (a test from the form,
the command line or a capture), ``test.void``, ``plan.commit``, ``user.add``,
``user.disable``, ``user.enable``, ``user.password``, ``login.failed``, and ``limits.change``
for changes to an engine family's limits.
"""

from __future__ import annotations

import json
from collections.abc import Iterable
from datetime import UTC, datetime
from typing import Any

from sqlalchemy import func, insert, or_, select
from sqlalchemy.engine import Connection, Engine

from fleetdb import access
from fleetdb.errors import UnitNotFound
from fleetdb.models import AuditEvent, AuditUnit, Unit

_events = AuditEvent.__table__
_links = AuditUnit.__table__
_units = Unit.__table__


def record(conn: Connection, action: str, summary: str, *, unit_ids: Iterable[int] = (),
           family_id: int | None = None, detail: dict[str, Any] | None = None,
           by: str | None = None) -> int:
    """Add one audit event for the current actor, in ``conn``'s transaction.

    :param action: what kind of write (see the module docstring).
    :param summary: one plain sentence.
    :param unit_ids: the units it touched (linked for their trails).
    :param family_id: the engine family it changed, if any.
    :param detail: what exactly, as JSON-ready data.
    :param by: the author the write itself records (:func:`fleetdb.access.author`); the
        origin always shows the real login.
    :returns: the event's id.
    """
    actor = access.current()
    user = access.author(by)
    event_id = conn.execute(insert(_events).values(
        at=datetime.now(UTC).replace(microsecond=0), user_name=user[:80],
        origin=actor.origin[:200], action=action[:40], summary=summary[:500],
        detail_json=json.dumps(detail or {}, sort_keys=True, default=str),
        family_id=family_id)).inserted_primary_key[0]
    units = sorted({int(u) for u in unit_ids})
    if units:
        from fleetdb.ingest import bulk_insert

        bulk_insert(conn, "audit_unit", ["event_id", "unit_id"],
                    [(event_id, u) for u in units])
    return int(event_id)


def count_actions(conn: Connection, action: str, user: str, since: datetime) -> int:
    """How many ``action`` events name ``user`` in their detail since ``since``."""
    rows = conn.execute(select(_events.c.detail_json).where(
        _events.c.action == action, _events.c.at >= since)).scalars()
    return sum(1 for d in rows if json.loads(d).get("user") == user)


def unit_trail(engine: Engine, fleet_no: str) -> list[dict[str, Any]]:
    """Every write that touched a unit (and its engine family's limit changes), oldest first.

    :returns: ``[{event_id, at, user, origin, action, summary, detail}]``; ``at`` in UTC,
        ISO 8601.
    :raises UnitNotFound: no unit has this fleet number.
    """
    with engine.connect() as conn:
        unit = conn.execute(select(_units.c.id, _units.c.family_id)
                            .where(_units.c.fleet_no == fleet_no)).first()
        if unit is None:
            raise UnitNotFound(f"no unit with fleet number {fleet_no!r}")
        linked = select(_links.c.event_id).where(_links.c.unit_id == unit.id)
        rows = conn.execute(select(_events).where(or_(
            _events.c.id.in_(linked), _events.c.family_id == unit.family_id))
            .order_by(_events.c.at, _events.c.id)).all()
    return [{"event_id": r.id, "at": r.at.astimezone(UTC).isoformat(timespec="seconds"),
             "user": r.user_name, "origin": r.origin, "action": r.action, "summary": r.summary,
             "detail": json.loads(r.detail_json)} for r in rows]


def event_count(engine: Engine) -> int:
    """How many audit events the store holds."""
    with engine.connect() as conn:
        return conn.execute(select(func.count()).select_from(_events)).scalar_one()
