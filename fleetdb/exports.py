"""The overhaul plan as CSV and as an iCalendar file (RFC 5545) for a planner's calendar.

Both take the plan's JSON shape (:meth:`fleetdb.plan.Plan.to_dict`, as ``fleetdb plan
--json`` prints it), so the dashboard can export the same thing.

CSV (RFC 4180, CRLF line ends): one row per overhaul; a text cell that a spreadsheet would
take for a formula is neutralised by :func:`safe_cell` (OWASP "CSV Injection").

iCalendar: written here, without a third-party library, so it adds no dependency; the tests
parse it with the ``icalendar`` package as an independent reader. One all-day event per
booking spanning its ISO week (DTSTART the Monday, DTEND the next Monday, exclusive), free
time (``TRANSP:TRANSPARENT``), ``STATUS:CONFIRMED`` for a committed plan and
``TENTATIVE`` for a draft. UID = plan key + unit id: the committed plan's id, or for a
draft a digest of its day, settings and weeks, so the same plan exported twice gives the
same UIDs. DTSTAMP is the commit time (a draft: the time of export). Lines are folded at
75 octets without splitting a UTF-8 character, TEXT values escaped (RFC 5545 §3.1, §3.3.11).
"""

from __future__ import annotations

import csv
import datetime as dt
import hashlib
import io
import json
from collections.abc import Mapping
from typing import Any

from fleetdb.plan import Plan

__all__ = ["CSV_COLUMNS", "FORMULA_LEADS", "PRODID", "plan_csv", "plan_ics", "safe_cell"]

#: Leading characters that make a spreadsheet evaluate a cell (OWASP "CSV Injection").
FORMULA_LEADS = ("=", "+", "-", "@", "\t", "\r")
CSV_COLUMNS = ["week", "week_start", "site", "fleet_no", "engine_family", "level", "due_week",
               "lateness_weeks", "late", "status", "priority", "projected_date_early", "reason"]
PRODID = "-//fleetdb//overhaul plan 1.0//EN"
CAUTION = "fleetdb advises; it does not certify: projected crossings are planning aids."


def safe_cell(text: str) -> str:
    """A text cell a spreadsheet will show as text: a formula-like lead gets a ``'`` first.

    :param text: the cell's text.
    :returns: the text, prefixed with a single quote when it begins with ``= + - @``, a tab
        or a carriage return (OWASP "CSV Injection"); otherwise unchanged.
    """
    return "'" + text if text.startswith(FORMULA_LEADS) else text


def _as_dict(plan: Plan | Mapping[str, Any]) -> Mapping[str, Any]:
    return plan.to_dict() if isinstance(plan, Plan) else plan


def plan_csv(plan: Plan | Mapping[str, Any]) -> str:
    """The plan as CSV text, one row per overhaul, in week order.

    :param plan: a :class:`~fleetdb.plan.Plan` or its ``to_dict()`` shape.
    """
    data = _as_dict(plan)
    out = io.StringIO(newline="")
    writer = csv.writer(out, lineterminator="\r\n")
    writer.writerow(CSV_COLUMNS)
    for job in data["jobs"]:
        row = {**job, "late": "yes" if job["late"] else "no"}
        writer.writerow([safe_cell(v) if isinstance(v, str) else ("" if v is None else v)
                         for v in (row.get(c) for c in CSV_COLUMNS)])
    return out.getvalue()


def _escape(text: str) -> str:
    """RFC 5545 §3.3.11 TEXT: backslash, semicolon, comma and newline escaped."""
    return (text.replace("\\", "\\\\").replace(";", "\\;").replace(",", "\\,")
            .replace("\r\n", "\n").replace("\r", "\n").replace("\n", "\\n"))


def _fold(line: str) -> str:
    """RFC 5545 §3.1: lines of at most 75 octets, continued with CRLF and one space."""
    chunks, current, size = [], [], 0
    for char in line:
        width = len(char.encode("utf-8"))
        limit = 75 if not chunks else 74  # a continuation line starts with the space
        if size + width > limit:
            chunks.append("".join(current))
            current, size = [], 0
        current.append(char)
        size += width
    chunks.append("".join(current))
    return "\r\n ".join(chunks)


def _plan_key(data: Mapping[str, Any]) -> str:
    if data.get("committed"):
        return f"plan{data['committed']['plan_id']}"
    content = json.dumps([data["as_of"], data["settings"],
                          [(j["unit_id"], j["week_start"]) for j in data["jobs"]]],
                         sort_keys=True)
    return "draft" + hashlib.sha256(content.encode()).hexdigest()[:12]


def _utc_stamp(moment: dt.datetime) -> str:
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=dt.UTC)
    return moment.astimezone(dt.UTC).strftime("%Y%m%dT%H%M%SZ")


def plan_ics(plan: Plan | Mapping[str, Any], *, now: dt.datetime | None = None) -> str:
    """The plan as an iCalendar object: one week-long all-day event per overhaul.

    :param plan: a :class:`~fleetdb.plan.Plan` or its ``to_dict()`` shape.
    :param now: DTSTAMP of a draft plan (default: the current UTC time); a committed plan
        uses its commit time.
    """
    data = _as_dict(plan)
    key = _plan_key(data)
    committed = data.get("committed")
    stamp = _utc_stamp(dt.datetime.fromisoformat(committed["created_at"]) if committed
                       else (now or dt.datetime.now(dt.UTC)))
    lines = ["BEGIN:VCALENDAR", "VERSION:2.0", f"PRODID:{PRODID}", "CALSCALE:GREGORIAN",
             "METHOD:PUBLISH",
             f"X-WR-CALNAME:{_escape('Overhaul plan from ' + data['week'])}"]
    for job in data["jobs"]:
        start = dt.date.fromisoformat(job["week_start"])
        lateness = int(job["lateness_weeks"])
        timing = (f"runs {lateness} week(s) past its conservative projected limit"
                  if lateness > 0 else "before or in the week of its conservative projected "
                  "limit" if lateness == 0 else f"{-lateness} week(s) ahead of its "
                  "conservative projected limit")
        description = "\n".join([
            f"Reason: {job['reason'] or 'level ' + job['level']}",
            f"Level: {job['level']}. Due week: {job['due_week']} " + (
                "(a limit is crossed: due now)." if job["level"] == "act" else
                f"(conservative projected limit {job['projected_date_early']})."),
            f"Booked for {job['week']}: {timing}.",
            f"Status: {job['status']}; priority +{job['priority']} week(s).",
            CAUTION])
        lines += [
            "BEGIN:VEVENT",
            f"UID:{key}-unit{job['unit_id']}@fleetdb",
            f"DTSTAMP:{stamp}",
            f"DTSTART;VALUE=DATE:{start:%Y%m%d}",
            f"DTEND;VALUE=DATE:{start + dt.timedelta(days=7):%Y%m%d}",
            "SUMMARY:" + _escape(f"{job['fleet_no']} overhaul ({job['site']})"),
            f"LOCATION:{_escape(job['site'])}",
            f"DESCRIPTION:{_escape(description)}",
            "CATEGORIES:overhaul",
            f"STATUS:{'CONFIRMED' if committed else 'TENTATIVE'}",
            "TRANSP:TRANSPARENT",
            "END:VEVENT"]
    lines.append("END:VCALENDAR")
    return "".join(_fold(line) + "\r\n" for line in lines)
