"""Overhaul planning: each worn unit's projected limit becomes a shop week that fits capacity.

The scheduling core (:func:`edd_weeks`, :func:`schedule`) is pure; thin functions read its
inputs from the store (:func:`jobs_from_store`, :func:`current_settings`), store a
committed plan (:func:`commit`) and give the board its bookings (:func:`bookings`).

Rules (domain.md §7; weeks are ISO weeks, Monday first; week 0 is the week of ``as_of``):

* **Jobs**: every unit at level ``act`` or ``plan`` on the board of that week. One overhaul
  takes one slot of one week at the unit's own site.
* **Due week**: the ISO week of the conservative projected limit (``projected_date_early``,
  the one-sided 95 % prediction bound); an ``act`` unit has crossed a limit and is due now
  (week 0); a due week in the past counts as week 0.
* **Lateness** = scheduled week − due week, in weeks; > 0 means the overhaul comes after
  the unit's conservative projected limit, by that many weeks. ``L_max`` is the largest
  lateness of a plan; ``late`` counts the units with lateness > 0.
* **Release week**: parts are ordered now and arrive after the site's lead time (default
  2 weeks), so a new job cannot start before week 0 + lead time.
* **Capacity**: overhauls per week per site (default 1); a closed week has none.
* **Priority** (set by hand, in weeks ≥ 0): moves the unit's *effective* due week that many
  weeks earlier. Jobs are ordered by effective due week, so a raised unit goes ahead of
  those due at the same time or up to that many weeks before it; lateness is still measured
  against the true due week. (b, common practice, no published source: domain.md §7 asks
  that a planner can move a job earlier.)
* **Booked units** (the latest committed plan at or before ``as_of``) keep their booked week
  when it is not past and still has a free slot under the settings in use (bookings placed
  in effective-due order); otherwise they are rebooked like new jobs, their parts counted
  as ordered when they were first booked.
* **Schedule**: per site, week by week, fill the free slots with the released jobs of
  earliest effective due week (Jackson's rule, "EDD among released jobs"); ties go to the
  earlier conservative crossing (the more worn unit), then the fleet number. For unit-length
  jobs under a weekly capacity this minimises the maximum lateness, also with integer
  release weeks and with weeks of different capacity (closed weeks, slots taken by
  bookings): an exchange argument swaps any two jobs out of due order without raising
  L_max. (a) Jackson 1955 for one machine; (c) the parallel-slot and release-date cases,
  domain.md §7 and §10. The tests check it against exhaustive search and an integer
  program.

A committed plan stores who, when, as of which day and the settings used; it is never
deleted. The next plan starts from the latest committed settings (else the defaults).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import heapq
import json
import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import insert, select
from sqlalchemy.engine import Engine

from fleetdb.errors import InvalidValue

__all__ = ["DEFAULT_CAPACITY", "DEFAULT_LEAD_WEEKS", "Plan", "ShopSettings", "bookings",
           "commit", "compare", "current_settings", "edd_weeks", "iso_week", "jobs_from_store",
           "latest_plan", "make_plan", "parse_week", "schedule"]

DEFAULT_CAPACITY = 1  # overhauls per site per week (b, a chosen default)
DEFAULT_LEAD_WEEKS = 2  # parts lead time (b, a chosen default)
ALL_SITES = "*"
JOB_LEVELS = ("act", "plan")
_MAX_IDLE_WEEKS = 520
_WEEK_RE = re.compile(r"^\s*(\d{4})-?W(\d{1,2})\s*$", re.IGNORECASE)


def week_start(day: dt.date) -> dt.date:
    """The Monday of ``day``'s ISO week."""
    return day - dt.timedelta(days=day.weekday())


def iso_week(day: dt.date) -> str:
    """``day``'s ISO 8601 week as ``YYYY-Www`` (2026-12-01 -> ``2026-W49``)."""
    year, week, _ = day.isocalendar()
    return f"{year}-W{week:02d}"


def parse_week(text: str | dt.date) -> dt.date:
    """The Monday of an ISO week given as ``YYYY-Www`` (or any day of it, as a date).

    :param text: ``2026-W49``, ``2026W49``, or a date.
    :raises InvalidValue: text that is not an ISO week.
    """
    if isinstance(text, dt.date):
        return week_start(text)
    match = _WEEK_RE.match(text)
    try:
        if match is None:
            raise ValueError
        return dt.date.fromisocalendar(int(match[1]), int(match[2]), 1)
    except ValueError:
        raise InvalidValue(f"{text!r} is not an ISO week: write YYYY-Www, like 2026-W49") \
            from None


#: The longest closed-week range accepted (ten years), against typing slips like 2062-W01.
MAX_CLOSED_RANGE_WEEKS = 520


def parse_closed_weeks(typed: str | None, where: str = "Closed weeks") -> frozenset[dt.date]:
    """The Mondays of the weeks typed: ``2026-W52, 2026-W53`` or ``2026-W52..2027-W01``.

    The one parser behind ``fleetdb plan --closed`` and the Plan page.

    :param typed: weeks and ranges separated by commas, semicolons or spaces; blank: none.
    :param where: what the text is, for the message (``Closed weeks at Saltgrass Quay``).
    :raises InvalidValue: a week that is not an ISO week, or a range that runs backwards or
        spans more than ``MAX_CLOSED_RANGE_WEEKS``.
    """
    days: set[dt.date] = set()
    for item in re.split(r"[,;\s]+", (typed or "").strip()):
        if not item:
            continue
        first, _, last = item.partition("..")
        try:
            start, end = parse_week(first), parse_week(last or first)
        except InvalidValue as exc:
            raise InvalidValue(f"{where}: {exc}") from None
        span = (end - start).days // 7
        if not 0 <= span <= MAX_CLOSED_RANGE_WEEKS:
            raise InvalidValue(f"{where}: {item!r} must run forwards, at most "
                               f"{MAX_CLOSED_RANGE_WEEKS} weeks")
        days.update(start + dt.timedelta(weeks=n) for n in range(span + 1))
    return frozenset(days)


def parse_whole_number(typed: Any, what: str) -> int:
    """A whole number of 0 or more from text or a number input; InvalidValue otherwise."""
    text = "" if typed is None else str(typed).strip()
    try:
        number = float(text)
    except ValueError:
        number = float("nan")
    if not number.is_integer() or number < 0:
        raise InvalidValue(f"{what}: write a whole number of 0 or more, not {text!r}" if text
                           else f"{what}: write a whole number of 0 or more (it is blank)")
    return int(number)


def parse_priorities(typed: str | Sequence[str] | None) -> dict[str, int]:
    """``LT-902=2, GS-901=1`` (or those items as a list) -> ``{"LT-902": 2, "GS-901": 1}``.

    A raise of 0 removes one. The one parser behind ``fleetdb plan --priority`` and the Plan
    page.

    :raises InvalidValue: an item that is not ``FLEET_NO=WEEKS`` with whole weeks.
    """
    items = typed if isinstance(typed, (list, tuple)) else re.split(r"[,;\n]+", typed or "")
    out: dict[str, int] = {}
    for item in items:
        fleet_no, sep, weeks = item.strip().rpartition("=")
        if not item.strip():
            continue
        if not sep or not fleet_no.strip():
            raise InvalidValue(f"Priority raises: {item.strip()!r}: write FLEET_NO=WEEKS, "
                               "like LT-902=2")
        out[fleet_no.strip()] = parse_whole_number(weeks,
                                                   f"Priority raise of {fleet_no.strip()}")
    return out


def _weeks_between(start: dt.date, day: dt.date) -> int:
    return (week_start(day) - start).days // 7


@dataclass(frozen=True)
class ShopSettings:
    """What the shop can do: capacity, parts lead time, closed weeks, raised priorities.

    :param default_capacity: overhauls per week at a site not named in ``capacity``.
    :param capacity: overhauls per week, by site name.
    :param default_lead_weeks: parts lead time in weeks at a site not named in ``lead_weeks``.
    :param lead_weeks: parts lead time in weeks, by site name.
    :param closed: closed weeks (their Mondays) by site name; ``"*"`` closes every site.
    :param priority: weeks each fleet number's effective due week is moved earlier.
    """

    default_capacity: int = DEFAULT_CAPACITY
    capacity: Mapping[str, int] = field(default_factory=dict)
    default_lead_weeks: int = DEFAULT_LEAD_WEEKS
    lead_weeks: Mapping[str, int] = field(default_factory=dict)
    closed: Mapping[str, frozenset[dt.date]] = field(default_factory=dict)
    priority: Mapping[str, int] = field(default_factory=dict)

    def __post_init__(self) -> None:
        numbers = [("capacity", self.default_capacity), ("lead time", self.default_lead_weeks),
                   *(("capacity", v) for v in self.capacity.values()),
                   *(("lead time", v) for v in self.lead_weeks.values()),
                   *(("priority", v) for v in self.priority.values())]
        for what, value in numbers:
            if not isinstance(value, (int, np.integer)) or value < 0:
                raise InvalidValue(f"{what} must be a whole number of 0 or more, not {value!r}")
        object.__setattr__(self, "closed", {site: frozenset(week_start(d) for d in days)
                                            for site, days in self.closed.items()})

    def capacity_of(self, site: str) -> int:
        """Overhauls per open week at ``site``."""
        return int(self.capacity.get(site, self.default_capacity))

    def lead_of(self, site: str) -> int:
        """Parts lead time at ``site``, weeks."""
        return int(self.lead_weeks.get(site, self.default_lead_weeks))

    def closed_of(self, site: str) -> frozenset[dt.date]:
        """The Mondays of the weeks ``site`` is closed (its own and every site's)."""
        return self.closed.get(site, frozenset()) | self.closed.get(ALL_SITES, frozenset())

    def updated(self, **changes: Any) -> ShopSettings:
        """A copy with some settings changed; mappings are merged key by key (a what-if).

        ``closed`` replaces the closed weeks; a priority of 0 removes that unit's priority.
        """
        merged: dict[str, Any] = {}
        for key, value in changes.items():
            if value is None:
                continue
            if key in ("capacity", "lead_weeks", "priority"):
                value = {**getattr(self, key), **value}
                if key == "priority":
                    value = {k: v for k, v in value.items() if v}
            merged[key] = value
        return dataclasses.replace(self, **merged)

    def to_json(self) -> dict[str, Any]:
        """A JSON-ready dict (weeks as ``YYYY-Www``); :meth:`from_json` reads it back."""
        return {"default_capacity": self.default_capacity, "capacity": dict(self.capacity),
                "default_lead_weeks": self.default_lead_weeks,
                "lead_weeks": dict(self.lead_weeks),
                "closed": {s: sorted(iso_week(d) for d in days)
                           for s, days in sorted(self.closed.items()) if days},
                "priority": dict(self.priority)}

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> ShopSettings:
        """Settings from :meth:`to_json`'s dict."""
        return cls(default_capacity=int(data.get("default_capacity", DEFAULT_CAPACITY)),
                   capacity={k: int(v) for k, v in data.get("capacity", {}).items()},
                   default_lead_weeks=int(data.get("default_lead_weeks", DEFAULT_LEAD_WEEKS)),
                   lead_weeks={k: int(v) for k, v in data.get("lead_weeks", {}).items()},
                   closed={k: frozenset(parse_week(w) for w in v)
                           for k, v in data.get("closed", {}).items()},
                   priority={k: int(v) for k, v in data.get("priority", {}).items()})


def edd_weeks(due: Sequence[int], release: Sequence[int], capacity: Callable[[int], int], *,
              start: int = 0) -> np.ndarray:
    """Earliest due date among released jobs, week by week, for unit-length jobs.

    Each week, the free slots go to the released jobs of earliest due week (ties: input
    order). Minimises the maximum lateness (module docstring).

    :param due: each job's due week (integer index).
    :param release: each job's first possible week.
    :param capacity: free slots in a week, by week index (0 for a closed week).
    :param start: the first week that may be used.
    :returns: each job's week, in input order.
    :raises InvalidValue: no free slot within ten years of waiting.
    """
    due_ = np.asarray(due, dtype=np.int64)
    release_ = np.maximum(np.asarray(release, dtype=np.int64), start)
    weeks = np.full(len(due_), -1, dtype=np.int64)
    order = np.argsort(release_, kind="stable")
    waiting: list[tuple[int, int]] = []
    nxt, week, idle = 0, start, 0
    while nxt < len(order) or waiting:
        if not waiting:
            week = max(week, int(release_[order[nxt]]))
        while nxt < len(order) and release_[order[nxt]] <= week:
            job = int(order[nxt])
            heapq.heappush(waiting, (int(due_[job]), job))
            nxt += 1
        free = max(int(capacity(week)), 0)
        idle = 0 if free else idle + 1
        if idle > _MAX_IDLE_WEEKS:
            raise InvalidValue("no free overhaul slot within ten years: check the capacity "
                               "and the closed weeks")
        for _ in range(min(free, len(waiting))):
            weeks[heapq.heappop(waiting)[1]] = week
        week += 1
    return weeks


JOB_COLUMNS = ["unit_id", "fleet_no", "site", "engine_family", "level", "reason",
               "projected_date", "projected_date_early", "due_week", "due_week_start",
               "release_week_start", "week", "week_start", "lateness_weeks", "late",
               "priority", "status", "booked_week_start"]
#: Week numbers counted from week 0 (the week of ``as_of``), kept beside the labels.
INDEX_COLUMNS = ["week_index", "due_index", "effective_due"]


@dataclass
class Plan:
    """A schedule: one row per job (``jobs``) and slots used per site and week (``load``)."""

    as_of: dt.date
    week_start: dt.date
    weeks: int
    settings: ShopSettings
    jobs: pd.DataFrame
    load: pd.DataFrame
    notes: list[str] = field(default_factory=list)
    based_on: int | None = None  # the committed plan whose bookings were honoured
    committed: dict[str, Any] | None = None  # {plan_id, created_by, created_at} once stored

    @property
    def l_max(self) -> int | None:
        """The largest lateness in weeks (None without jobs)."""
        return None if self.jobs.empty else int(self.jobs["lateness_weeks"].max())

    @property
    def late_count(self) -> int:
        """Units whose overhaul comes after their conservative projected limit."""
        return int(self.jobs["late"].sum()) if not self.jobs.empty else 0

    def to_dict(self) -> dict[str, Any]:
        """The JSON shape of ``fleetdb plan --json`` (README, "JSON output")."""
        def cell(value: Any) -> Any:
            if value is None or (not isinstance(value, str) and pd.isna(value)):
                return None
            if isinstance(value, (dt.date, pd.Timestamp)):
                return pd.Timestamp(value).date().isoformat()
            if isinstance(value, (np.integer, np.bool_)):
                return value.item()
            return value
        records = [{k: cell(v) for k, v in r.items()}
                   for r in self.jobs[JOB_COLUMNS].to_dict("records")]
        load = [{k: cell(v) for k, v in r.items()} for r in self.load.to_dict("records")]
        return {"as_of": self.as_of.isoformat(), "week_start": self.week_start.isoformat(),
                "week": iso_week(self.week_start), "weeks": self.weeks,
                "settings": self.settings.to_json(), "l_max": self.l_max,
                "late": self.late_count, "jobs": records, "load": load, "notes": self.notes,
                "based_on": self.based_on, "committed": self.committed}


def schedule(jobs: pd.DataFrame, settings: ShopSettings, as_of: dt.date, *, weeks: int = 13,
             sites: Sequence[str] = ()) -> Plan:
    """Schedule the jobs under the settings (pure; rules in the module docstring).

    :param jobs: one row per unit: ``unit_id, fleet_no, site, due_week_start`` (a date in
        the due week) and optionally ``booked_week_start``, ``booked_release_week_start``
        (an earlier booking and when its parts arrive), ``engine_family, level, reason,
        projected_date, projected_date_early`` (carried through).
    :param settings: capacity, lead time, closed weeks and priorities.
    :param as_of: the planning day; its week is week 0.
    :param weeks: the planning window shown in ``load`` (jobs may fall beyond it).
    :param sites: sites to show in ``load`` even without jobs.
    """
    if weeks < 1:
        raise InvalidValue(f"weeks must be 1 or more, not {weeks}")
    week0 = week_start(as_of)
    frame = jobs.copy().reset_index(drop=True)
    for col in ("engine_family", "level", "reason", "projected_date", "projected_date_early",
                "booked_week_start", "booked_release_week_start"):
        if col not in frame:
            frame[col] = None
    frame["due_index"] = np.maximum(
        [_weeks_between(week0, pd.Timestamp(d).date()) for d in frame["due_week_start"]], 0
    ).astype(np.int64) if len(frame) else np.zeros(0, np.int64)
    frame["priority"] = [int(settings.priority.get(f, 0)) for f in frame["fleet_no"]]
    frame["effective_due"] = frame["due_index"] - frame["priority"]
    # Ties: the earlier conservative crossing first (the more worn), then the fleet number.
    frame["_crossing"] = pd.to_datetime(frame["projected_date_early"], errors="coerce")
    frame = frame.sort_values(["effective_due", "due_index", "_crossing", "fleet_no"],
                              kind="stable", na_position="last").reset_index(drop=True)
    week_idx = np.full(len(frame), -1, dtype=np.int64)
    release_idx = np.zeros(len(frame), dtype=np.int64)
    status = np.array(["new"] * len(frame), dtype=object)
    notes: list[str] = []
    used_by_site: dict[str, dict[int, int]] = {}
    for site, rows in frame.groupby("site", sort=True).groups.items():
        rows = np.asarray(rows)
        cap, closed = settings.capacity_of(site), settings.closed_of(site)

        def open_slots(w: int, cap: int = cap, closed: frozenset = closed) -> int:
            return 0 if week0 + dt.timedelta(weeks=w) in closed else cap
        used: dict[int, int] = {}
        booked = frame.loc[rows, "booked_week_start"]
        for row, when in zip(rows, booked, strict=True):  # bookings, in effective-due order
            if when is None or pd.isna(when):
                continue
            w = _weeks_between(week0, pd.Timestamp(when).date())
            if w >= 0 and used.get(w, 0) < open_slots(w):
                used[w] = used.get(w, 0) + 1
                week_idx[row], status[row] = w, "booked"
            else:
                status[row] = "rebooked"
                why = "has passed" if w < 0 else "has no free slot now"
                notes.append(f"{frame.at[row, 'fleet_no']}: its booked week "
                             f"{iso_week(pd.Timestamp(when).date())} {why}; rebooked.")
        free = rows[week_idx[rows] < 0]
        lead = settings.lead_of(site)
        for row in free:
            arrives = frame.at[row, "booked_release_week_start"]
            release_idx[row] = lead if arrives is None or pd.isna(arrives) else max(
                _weeks_between(week0, pd.Timestamp(arrives).date()), 0)
        week_idx[free] = edd_weeks(frame.loc[free, "effective_due"].to_numpy(),
                                   release_idx[free],
                                   lambda w, used=used, slots=open_slots: slots(w) - used.get(
                                       w, 0))
        used_by_site[site] = {int(w): int(n) for w, n in
                              zip(*np.unique(week_idx[rows], return_counts=True), strict=True)}
    frame["week_index"] = week_idx
    frame["week_start"] = [week0 + dt.timedelta(weeks=int(w)) for w in week_idx]
    frame["due_week_start"] = [week0 + dt.timedelta(weeks=int(w)) for w in frame["due_index"]]
    frame["week"] = [iso_week(d) for d in frame["week_start"]]
    frame["due_week"] = [iso_week(d) for d in frame["due_week_start"]]
    frame["release_week_start"] = [None if s == "booked" else week0 + dt.timedelta(weeks=int(r))
                                   for s, r in zip(status, release_idx, strict=True)]
    frame["lateness_weeks"] = (frame["week_index"] - frame["due_index"]).astype(np.int64)
    frame["late"] = frame["lateness_weeks"] > 0
    frame["status"] = status
    frame = frame.sort_values(["week_index", "site", "effective_due", "fleet_no"],
                              kind="stable")
    frame = frame.reset_index(drop=True)
    for fleet_no, priority in settings.priority.items():
        if priority and fleet_no not in set(frame["fleet_no"]):
            notes.append(f"{fleet_no} is not at act or plan: its priority changes nothing.")
    late = frame[frame["late"]]
    if len(late):
        notes.append(f"{len(late)} unit(s) run past their conservative projected limit: "
                     + ", ".join(f"{r.fleet_no} by {r.lateness_weeks} week(s)"
                                 for r in late.itertuples()) + ".")
    load = _load(used_by_site, settings, week0, weeks, sorted(set(sites) | set(used_by_site)))
    return Plan(as_of=as_of, week_start=week0, weeks=weeks, settings=settings,
                jobs=frame[JOB_COLUMNS + INDEX_COLUMNS], load=load, notes=notes)


def _load(used_by_site: dict[str, dict[int, int]], settings: ShopSettings, week0: dt.date,
          weeks: int, sites: list[str]) -> pd.DataFrame:
    """Slots used per site and week, over the window and any later week with a job."""
    rows = []
    for site in sites:
        used = used_by_site.get(site, {})
        last = max([weeks - 1, *used])
        closed = settings.closed_of(site)
        for w in range(last + 1):
            day = week0 + dt.timedelta(weeks=w)
            shut = day in closed
            rows.append({"site": site, "week": iso_week(day), "week_start": day,
                         "capacity": 0 if shut else settings.capacity_of(site),
                         "used": used.get(w, 0), "closed": shut})
    return pd.DataFrame(rows, columns=["site", "week", "week_start", "capacity", "used",
                                       "closed"])


def compare(before: Plan, after: Plan) -> dict[str, Any]:
    """What a change of settings does: L_max, late units and the units that move.

    :param before: the plan under the current settings.
    :param after: the plan under the changed settings (the what-if).
    """
    old = before.jobs.set_index("fleet_no")["week_start"]
    new = after.jobs.set_index("fleet_no")["week_start"]
    moved = [{"fleet_no": f, "before": iso_week(old[f]), "after": iso_week(new[f]),
              "weeks": (new[f] - old[f]).days // 7}
             for f in sorted(set(old.index) & set(new.index)) if old[f] != new[f]]
    return {"l_max": {"before": before.l_max, "after": after.l_max},
            "late": {"before": before.late_count, "after": after.late_count},
            "moved": moved}


# -- the store ---------------------------------------------------------------------------------

def _tables() -> tuple[Any, Any]:
    from fleetdb.models import OverhaulBooking, OverhaulPlan

    return OverhaulPlan.__table__, OverhaulBooking.__table__


def latest_plan(engine: Engine, as_of: dt.date | None = None) -> dict[str, Any] | None:
    """The newest committed plan (at or before ``as_of`` when given), or None.

    :param engine: the store.
    :param as_of: only plans made as of this day or earlier.
    :returns: ``{plan_id, created_by, created_at, as_of, week_start, weeks, settings,
        l_max, late, jobs}`` with ``settings`` a :class:`ShopSettings`.
    """
    plans, _ = _tables()
    query = select(plans).order_by(plans.c.id.desc()).limit(1)
    if as_of is not None:
        query = query.where(plans.c.as_of <= as_of)
    with engine.connect() as conn:
        row = conn.execute(query).mappings().first()
    if row is None:
        return None
    return {"plan_id": row["id"], "created_by": row["created_by"],
            "created_at": row["created_at"].isoformat(timespec="seconds"),
            "as_of": row["as_of"], "week_start": row["week_start"], "weeks": row["weeks"],
            "settings": ShopSettings.from_json(json.loads(row["settings_json"])),
            "l_max": row["l_max"], "late": row["late_count"], "jobs": row["job_count"]}


def current_settings(engine: Engine, as_of: dt.date | None = None) -> ShopSettings:
    """The settings of the latest committed plan, else the defaults (1 per week, 2 weeks).

    :param engine: the store.
    :param as_of: only plans made as of this day or earlier.
    """
    latest = latest_plan(engine, as_of)
    return latest["settings"] if latest else ShopSettings()


def _booked_rows(engine: Engine, plan_id: int) -> pd.DataFrame:
    _, booked = _tables()
    from fleetdb.models import Site

    sites = Site.__table__
    with engine.connect() as conn:
        rows = conn.execute(select(booked.c.unit_id, booked.c.week_start, sites.c.name)
                            .join(sites, sites.c.id == booked.c.site_id)
                            .where(booked.c.plan_id == plan_id)).all()
    return pd.DataFrame(rows, columns=["unit_id", "week_start", "site"])


def bookings(engine: Engine, as_of: dt.date | None = None) -> dict[int, dt.date]:
    """Booked overhaul weeks by unit id, from the latest committed plan (for the board).

    A unit with an ``overhaul`` event dated on or after that plan's ``as_of`` (and not after
    ``as_of``) is done and left out.

    :param engine: the store.
    :param as_of: read the plan in force on this day (default: the newest).
    :returns: ``{unit_id: Monday of the booked week}``.
    """
    latest = latest_plan(engine, as_of)
    if latest is None:
        return {}
    from fleetdb.models import ServiceEvent

    events = ServiceEvent.__table__
    query = select(events.c.unit_id).where(events.c.kind == "overhaul",
                                           events.c.date >= latest["as_of"])
    if as_of is not None:
        query = query.where(events.c.date <= as_of)
    with engine.connect() as conn:
        done = {int(u) for u in conn.execute(query).scalars()}
    rows = _booked_rows(engine, latest["plan_id"])
    return {int(u): w for u, w in zip(rows["unit_id"], rows["week_start"], strict=True)
            if int(u) not in done}


def _check_names(engine: Engine, settings: ShopSettings) -> list[str]:
    """Refuse unknown sites and fleet numbers in the settings; list the site names."""
    from fleetdb.models import Site, Unit

    with engine.connect() as conn:
        sites = sorted(conn.execute(select(Site.__table__.c.name)).scalars())
        units = set(conn.execute(select(Unit.__table__.c.fleet_no)).scalars())
    named = {*settings.capacity, *settings.lead_weeks, *settings.closed} - {ALL_SITES}
    unknown = sorted(named - set(sites))
    if unknown:
        raise InvalidValue(f"no site named {', '.join(map(repr, unknown))}; sites: "
                           f"{', '.join(sites) or '(none)'}")
    strangers = sorted(set(settings.priority) - units)
    if strangers:
        raise InvalidValue(f"no unit with fleet number {', '.join(map(repr, strangers))}")
    return sites


def jobs_from_store(engine: Engine, as_of: dt.date | None = None) -> tuple[pd.DataFrame,
                                                                            int | None]:
    """The units at act or plan on the board of ``as_of``'s week, with earlier bookings.

    :param engine: the store.
    :param as_of: the planning day (default today).
    :returns: the jobs frame :func:`schedule` takes, and the id of the committed plan whose
        bookings it carries (None without one).
    """
    from fleetdb import health

    day = as_of or dt.date.today()
    rows = [r for r in health.board(engine, day)["rows"] if r["level"] in JOB_LEVELS]
    latest = latest_plan(engine, day)
    booked = pd.DataFrame(columns=["unit_id", "week_start", "site"])
    if latest is not None:
        booked = _booked_rows(engine, latest["plan_id"])
    by_unit = booked.set_index("unit_id")
    jobs = []
    for r in rows:
        early = r["projected_date_early"] or r["projected_date"]
        due = day if r["level"] == "act" or early is None else dt.date.fromisoformat(early[:10])
        when = arrives = None
        if r["unit_id"] in by_unit.index:
            when = by_unit.at[r["unit_id"], "week_start"]
            lead = latest["settings"].lead_of(by_unit.at[r["unit_id"], "site"])
            arrives = latest["week_start"] + dt.timedelta(weeks=lead)
        jobs.append({"unit_id": r["unit_id"], "fleet_no": r["fleet_no"], "site": r["site"],
                     "engine_family": r["engine_family"], "level": r["level"],
                     "reason": r["main_text"], "projected_date": r["projected_date"],
                     "projected_date_early": r["projected_date_early"],
                     "due_week_start": week_start(due), "booked_week_start": when,
                     "booked_release_week_start": arrives})
    frame = pd.DataFrame(jobs, columns=["unit_id", "fleet_no", "site", "engine_family", "level",
                                        "reason", "projected_date", "projected_date_early",
                                        "due_week_start", "booked_week_start",
                                        "booked_release_week_start"])
    return frame, (latest["plan_id"] if latest else None)


def make_plan(engine: Engine, as_of: dt.date | None = None,
              settings: ShopSettings | None = None, *, weeks: int = 13) -> Plan:
    """Plan the overhauls of the units at act and plan from the store.

    :param engine: the store.
    :param as_of: the planning day (default today); its week is week 0.
    :param settings: shop settings (default: :func:`current_settings`).
    :param weeks: the planning window shown (jobs may fall beyond it).
    :raises InvalidValue: a site or fleet number in the settings that the store lacks.
    """
    day = as_of or dt.date.today()
    settings = settings if settings is not None else current_settings(engine, day)
    sites = _check_names(engine, settings)
    jobs, based_on = jobs_from_store(engine, day)
    plan = schedule(jobs, settings, day, weeks=weeks, sites=sites)
    plan.based_on = based_on
    return plan


def commit(engine: Engine, plan: Plan, by: str | None = None) -> int:
    """Store a plan and its bookings; earlier plans stay (the newest is in force).

    :param engine: the store.
    :param plan: the plan to commit (from :func:`make_plan`).
    :param by: who commits it (default: the operating-system user).
    :returns: the new plan's id.
    """
    from fleetdb import access, audit
    from fleetdb.models import Unit

    access.require("plan", "commit overhaul plans")
    plans, booked = _tables()
    who = access.author(by)[:80]
    now = dt.datetime.now(dt.UTC).replace(microsecond=0)
    ids = [int(u) for u in plan.jobs["unit_id"]]
    with engine.begin() as conn:
        plan_id = conn.execute(insert(plans).values(
            created_at=now, created_by=who, as_of=plan.as_of, week_start=plan.week_start,
            weeks=plan.weeks, settings_json=json.dumps(plan.settings.to_json(), sort_keys=True),
            l_max=plan.l_max, late_count=plan.late_count, job_count=len(ids),
        )).inserted_primary_key[0]
        units = Unit.__table__
        site_of = dict(conn.execute(select(units.c.id, units.c.site_id)
                                    .where(units.c.id.in_(ids))).all()) if ids else {}
        rows = [{"plan_id": plan_id, "unit_id": int(j.unit_id), "site_id": site_of[j.unit_id],
                 "week_start": j.week_start, "due_week_start": j.due_week_start,
                 "lateness_weeks": int(j.lateness_weeks), "priority": int(j.priority),
                 "status": j.status} for j in plan.jobs.itertuples()]
        if rows:
            conn.execute(insert(booked), rows)
        audit.record(conn, "plan.commit", f"committed overhaul plan {plan_id} as of "
                     f"{plan.as_of}: {len(ids)} jobs, {plan.late_count} late",
                     unit_ids=ids, detail={"plan_id": int(plan_id), "jobs": {
                         str(j.unit_id): {"week_start": str(j.week_start), "status": j.status}
                         for j in plan.jobs.itertuples()}}, by=who)
    plan.committed = {"plan_id": int(plan_id), "created_by": who,
                      "created_at": now.isoformat(timespec="seconds")}
    return int(plan_id)
