"""The Overhaul plan page in-process: its figure, its form parsing and its callbacks.

Figures are checked on a schedule worked by hand (earliest due date first under a weekly
capacity, Jackson 1955; domain.md §7) and made by ``fleetdb.plan.schedule``. Week labels
follow ISO 8601 (weeks start on Monday; week 1 holds the year's first Thursday, so 2026,
which starts on a Thursday, has a week 53). The callbacks run through Flask's test client
on a copy of the demo store as of 2026-12-01 (demo_fleet/README.md: LT-902, LV-903, LV-933
at act and GS-901 at plan, all at Saltgrass Quay).
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import icalendar
import pandas as pd
import pytest
from sqlalchemy import text

from dashboard import create_app, data, figures, ids
from fleetdb import db, exports, health
from fleetdb import plan as P
from fleetdb.errors import InvalidValue
from tests.conftest import copy_store

AS_OF = dt.date(2026, 12, 1)  # a Tuesday of ISO week 2026-W49 (Monday 2026-11-30)
WORN = {"LT-902", "LV-903", "LV-933", "GS-901"}
SITES = ["Ferncliff Depot", "Kettlerock Yard", "Saltgrass Quay"]


# -- the figure -----------------------------------------------------------------------------

def hand_plan() -> P.Plan:
    """Worked by hand: site A takes 2 a week, parts on the shelf; three jobs due in week 0
    go two in week 0 and one in week 1 (late by 1). Site B is closed in week 0; its job due
    in week 3 goes in week 1 (2 weeks early)."""
    week0 = P.week_start(AS_OF)
    jobs = pd.DataFrame({
        "unit_id": [1, 2, 3, 4], "fleet_no": ["A-1", "A-2", "A-3", "B-1"],
        "site": ["A", "A", "A", "B"], "level": ["act", "act", "act", "plan"],
        "due_week_start": [week0, week0, week0, week0 + dt.timedelta(weeks=3)],
        "projected_date_early": ["2026-11-01", "2026-11-02", "2026-11-03", "2026-12-22"]})
    settings = P.ShopSettings(capacity={"A": 2}, default_lead_weeks=0,
                              closed={"B": frozenset({week0})})
    return P.schedule(jobs, settings, AS_OF, weeks=4, sites=["A", "B"])


def traces_by(fig: Any) -> dict[tuple[str, str], Any]:
    return {(t.meta["site"], t.meta["kind"]): t for t in fig.data}


def test_hand_plan_is_what_the_figure_is_checked_against() -> None:
    jobs = hand_plan().jobs.set_index("fleet_no")
    assert jobs["week_index"].to_dict() == {"A-1": 0, "A-2": 0, "A-3": 1, "B-1": 1}
    assert jobs["lateness_weeks"].to_dict() == {"A-1": 0, "A-2": 0, "A-3": 1, "B-1": -2}


def test_timeline_has_a_row_of_traces_per_site() -> None:
    plan = hand_plan()
    fig = figures.plan_timeline(plan.jobs, plan.load)
    got = traces_by(fig)
    assert set(got) == {("A", "on_time"), ("A", "late"), ("A", "late_tail"), ("A", "slots"),
                        ("B", "on_time"), ("B", "slots")}
    assert list(fig.layout.yaxis.ticktext) == ["A", "B"]
    # Each marker sits in its booked week (x) and on its site's row: A above B, the y axis
    # running down the page, each week's slots line above its overhauls.
    assert list(got[("A", "on_time")].x) == [0, 0] and list(got[("B", "on_time")].x) == [1]
    row_a = [*got[("A", "on_time")].y, *got[("A", "late")].y]
    assert max(row_a) < min(got[("B", "slots")].y) < min(got[("B", "on_time")].y)
    assert max(got[("A", "slots")].y) < min(row_a)
    assert fig.layout.yaxis.range[0] > fig.layout.yaxis.range[1]
    # Two overhauls in one week are stacked, not drawn on top of each other.
    assert len(set(got[("A", "on_time")].y)) == 2
    # ISO 8601: week 2026-W49 starts on Monday 30 Nov 2026.
    assert fig.layout.xaxis.ticktext[0] == "2026-W49<br>30 Nov"


def test_late_units_differ_by_shape_and_words_not_colour_alone() -> None:
    plan = hand_plan()
    got = traces_by(figures.plan_timeline(plan.jobs, plan.load))
    late, on_time = got[("A", "late")], got[("A", "on_time")]
    assert late.marker.symbol != on_time.marker.symbol
    assert list(late.text) == ["A-3<br>late by 1 wk"]
    assert list(on_time.text) == ["A-1", "A-2"]
    assert "late" in late.name and "on time" in on_time.name
    # The dotted tail runs from the due week (0) to the booked week (1).
    assert list(got[("A", "late_tail")].x)[:2] == [0, 1]


def test_capacity_labels_show_used_over_capacity_and_closed_weeks() -> None:
    plan = hand_plan()
    got = traces_by(figures.plan_timeline(plan.jobs, plan.load))
    assert list(got[("A", "slots")].text) == ["<b>2/2</b>", "1/2", "0/2", "0/2"]
    assert list(got[("B", "slots")].text) == ["closed", "<b>1/1</b>", "0/1", "0/1"]


def test_timeline_without_jobs_says_so() -> None:
    plan = P.schedule(pd.DataFrame(columns=["unit_id", "fleet_no", "site", "due_week_start"]),
                      P.ShopSettings(), AS_OF, weeks=3, sites=["A"])
    fig = figures.plan_timeline(plan.jobs, plan.load)
    assert [t.meta["kind"] for t in fig.data] == ["slots"]
    assert "nothing to schedule" in fig.layout.annotations[0].text


# -- the form -------------------------------------------------------------------------------

@pytest.mark.parametrize(("typed", "mondays"), [
    ("", []),
    ("2026-W52, 2026-W53", ["2026-12-21", "2026-12-28"]),  # ISO 8601: 2026 has a week 53
    ("2026-W53..2027-W01", ["2026-12-28", "2027-01-04"]),
    ("2026W52;2026-w52", ["2026-12-21"]),
])
def test_closed_weeks_text(typed: str, mondays: list[str]) -> None:
    got = P.parse_closed_weeks(typed, "Closed weeks at A")
    assert sorted(d.isoformat() for d in got) == mondays


@pytest.mark.parametrize(("typed", "message"), [
    ("2026-W60", "Closed weeks at A: '2026-W60' is not an ISO week"),
    ("2027-W53", "'2027-W53' is not an ISO week"),  # 2027 starts on a Friday: 52 weeks
    ("next week", "is not an ISO week"),
    ("2027-W02..2026-W52", "must run forwards"),
])
def test_bad_closed_weeks_are_refused(typed: str, message: str) -> None:
    with pytest.raises(InvalidValue, match=message):
        P.parse_closed_weeks(typed, "Closed weeks at A")


def test_form_to_settings_keeps_what_is_unchanged() -> None:
    base = P.ShopSettings(capacity={"A": 2}, lead_weeks={"B": 4}, priority={"X-1": 1})
    same = data.PlanForm(capacity={"A": 2, "B": 1}, lead_weeks={"A": 2, "B": 4},
                         closed={"A": "", data.EVERY_SITE: None}, priority="X-1=1")
    assert data.settings_from_form(same, base) == base
    changed = data.settings_from_form(data.PlanForm(
        capacity={"A": 4.0}, lead_weeks={"B": "0"}, closed={data.EVERY_SITE: "2026-W52"},
        priority="X-1=0, Y-2=3"), base)
    assert changed.capacity == {"A": 4} and changed.lead_weeks == {"B": 0}
    assert changed.closed_of("A") == {dt.date(2026, 12, 21)}
    assert changed.priority == {"Y-2": 3}


@pytest.mark.parametrize(("form", "message"), [
    (data.PlanForm(capacity={"A": None}), "Capacity at A: write a whole number .* blank"),
    (data.PlanForm(capacity={"A": -1}), "Capacity at A: write a whole number of 0 or more"),
    (data.PlanForm(lead_weeks={"A": 1.5}), "Parts lead time at A: write a whole number"),
    (data.PlanForm(priority="LT-902"), "write FLEET_NO=WEEKS"),
    (data.PlanForm(priority="LT-902=soon"), "Priority raise of LT-902: write a whole"),
])
def test_bad_numbers_are_refused(form: data.PlanForm, message: str) -> None:
    with pytest.raises(InvalidValue, match=message):
        data.settings_from_form(form, P.ShopSettings())


# -- the callbacks, on the demo store --------------------------------------------------------

@pytest.fixture
def store_url(demo_file: Path, tmp_path: Path) -> Iterator[str]:
    url = copy_store(demo_file, tmp_path)
    yield url
    db.get_engine(url).dispose()


@pytest.fixture
def client(store_url: str) -> Any:
    return create_app(store_url, auth=False).server.test_client()


def plans_stored(url: str) -> int:
    with db.get_engine(url).connect() as conn:
        return int(conn.execute(text("SELECT COUNT(*) FROM overhaul_plan")).scalar_one())


def post(client: Any, output_id: str, values: dict[tuple[str, str], Any],
         trigger: tuple[str, str]) -> dict[str, Any]:
    """Fire the callback that writes ``output_id`` as the renderer does; its ``response``.

    :param values: ``(component id, property) -> value``; a pattern id is named by its
        ``type`` and takes ``{index: value}``.
    :param trigger: the input that changed.
    """
    deps = client.get("/_dash-dependencies").get_json()
    dep = next(d for d in deps if f"{output_id}." in d["output"])

    def fill(spec: dict[str, Any]) -> Any:
        cid, prop = spec["id"], spec["property"]
        if cid.startswith("{"):
            kind = json.loads(cid)["type"]
            return [{"id": {"type": kind, "index": index}, "property": prop,
                     "value": {"type": kind, "index": index} if prop == "id" else value}
                    for index, value in values.get((kind, "value"), {}).items()]
        return {"id": cid, "property": prop, "value": values.get((cid, prop))}

    outputs = [{"id": part.rsplit(".", 1)[0], "property": part.rsplit(".", 1)[1]}
               for part in dep["output"].strip(".").split("...")]
    body = {"output": dep["output"], "outputs": outputs if len(outputs) > 1 else outputs[0],
            "inputs": [fill(s) for s in dep["inputs"]], "state": [fill(s) for s in dep["state"]],
            "changedPropIds": [".".join(trigger)]}
    reply = client.post("/_dash-update-component", json=body)
    assert reply.status_code == 200, reply.get_data(as_text=True)[:800]
    return reply.get_json()["response"]


def flat_text(node: Any) -> str:
    """Every string inside a serialised component tree, joined by spaces."""
    if isinstance(node, str):
        return node
    if isinstance(node, list):
        return " ".join(flat_text(n) for n in node)
    if isinstance(node, dict):
        return flat_text(node.get("props", {}).get("children"))
    return "" if node is None else str(node)


def form(capacity: dict[str, Any] | None = None,
         changes: dict[tuple[str, str], Any] | None = None) -> dict[tuple[str, str], Any]:
    """The page's inputs as the settings in force fill them, with some changed."""
    values: dict[tuple[str, str], Any] = {
        (ids.PLAN_AS_OF, "date"): AS_OF.isoformat(), (ids.PLAN_TRY, "n_clicks"): 1,
        (ids.PLAN_COMMIT, "n_clicks"): 1, ("plan-capacity", "value"): {s: 1 for s in SITES},
        ("plan-lead", "value"): {s: 2 for s in SITES}, ("plan-closed", "value"):
            {s: "" for s in SITES}, (ids.PLAN_CLOSED_ALL, "value"): "",
        (ids.PLAN_PRIORITY, "value"): "", (ids.PLAN_WHO, "value"): None}
    values[("plan-capacity", "value")].update(capacity or {})
    values.update(changes or {})
    return values


def show(client: Any, trigger: str, capacity: dict[str, Any] | None = None,
         changes: dict[tuple[str, str], Any] | None = None) -> dict[str, Any]:
    prop = "date" if trigger == ids.PLAN_AS_OF else "n_clicks"
    return post(client, ids.PLAN_STATE, form(capacity, changes), (trigger, prop))


def test_page_is_served_and_listed(client: Any) -> None:
    reply = client.get(f"/plan?as_of={AS_OF}")
    assert reply.status_code == 200 and b"_dash-config" in reply.data
    nav = post(client, ids.NAV, {(ids.APP_URL, "pathname"): "/plan"},
               (ids.APP_URL, "pathname"))[ids.NAV]["children"]
    assert "Overhaul plan" in flat_text(nav)


def walk(node: Any) -> Iterator[dict[str, Any]]:
    """Every serialised component under ``node``."""
    if isinstance(node, list):
        for item in node:
            yield from walk(item)
    elif isinstance(node, dict) and "props" in node:
        yield node
        yield from walk(node["props"].get("children"))


def test_settings_inputs_start_from_the_settings_in_force(client: Any) -> None:
    got = post(client, ids.PLAN_SITES, {(ids.PLAN_AS_OF, "date"): AS_OF.isoformat()},
               (ids.PLAN_AS_OF, "date"))
    inputs = {(c["props"]["id"]["type"], c["props"]["id"]["index"]): c["props"].get("value")
              for c in walk(got[ids.PLAN_SITES]["children"])
              if isinstance(c["props"].get("id"), dict)}
    # fleetdb.plan's defaults: 1 overhaul per site per week, 2 weeks' parts lead time.
    assert inputs == {**{("plan-capacity", s): P.DEFAULT_CAPACITY for s in SITES},
                      **{("plan-lead", s): P.DEFAULT_LEAD_WEEKS for s in SITES},
                      **{("plan-closed", s): "" for s in SITES}}
    assert got[ids.PLAN_CLOSED_ALL]["value"] == "" and got[ids.PLAN_PRIORITY]["value"] == ""


def test_plan_in_force_lists_the_worn_units_and_stores_nothing(client: Any,
                                                               store_url: str) -> None:
    got = show(client, ids.PLAN_AS_OF)
    table = flat_text(got[ids.PLAN_JOBS]["children"])
    assert all(f in table for f in WORN)
    assert "No plan committed yet" in flat_text(got[ids.PLAN_STATE]["children"])
    # The defaults make the three act units late (tests/test_plan.py: L_max 4, 3 late).
    assert "4 wk" in flat_text(got[ids.PLAN_SUMMARY]["children"])
    assert got[ids.PLAN_SHOWN]["data"]["committed"] is None
    assert plans_stored(store_url) == 0


def test_try_shows_the_changes_and_stores_nothing(client: Any, store_url: str) -> None:
    got = show(client, ids.PLAN_TRY, capacity={"Saltgrass Quay": 4})
    changed = flat_text(got[ids.PLAN_CHANGES]["children"])
    assert "4 wk → 2 wk" in changed and "LT-902" in changed
    assert "not stored" in flat_text(got[ids.PLAN_STATE]["children"])
    assert got[ids.PLAN_SHOWN]["data"]["settings"]["capacity"] == {"Saltgrass Quay": 4}
    assert plans_stored(store_url) == 0 and P.latest_plan(db.get_engine(store_url)) is None


def test_commit_stores_the_plan_and_books_the_units(client: Any, store_url: str) -> None:
    got = show(client, ids.PLAN_COMMIT, capacity={"Saltgrass Quay": 4},
               changes={(ids.PLAN_WHO, "value"): "  planner A "})
    assert "Stored: committed plan 1 by planner A" in flat_text(got[ids.PLAN_STATE]["children"])
    assert plans_stored(store_url) == 1
    engine = db.get_engine(store_url)
    board = {r["fleet_no"]: r["unit_id"] for r in health.board(engine, AS_OF)["rows"]}
    booked = P.bookings(engine, AS_OF)
    assert set(booked) == {board[f] for f in WORN}
    assert set(booked.values()) == {dt.date(2026, 12, 14)}  # 2026-W51: lead time 2 weeks
    again = show(client, ids.PLAN_AS_OF)  # reloading shows it as the plan in force
    assert "Plan in force: committed plan 1 by planner A" in flat_text(
        again[ids.PLAN_STATE]["children"])
    assert "kept its booking" in flat_text(again[ids.PLAN_JOBS]["children"])


@pytest.mark.parametrize(("trigger", "changes", "message"), [
    (ids.PLAN_TRY, {(ids.PLAN_CLOSED_ALL, "value"): "2026-W60"}, "is not an ISO week"),
    (ids.PLAN_COMMIT, {("plan-closed", "value"): {"Saltgrass Quay": "week 52"},
                       (ids.PLAN_WHO, "value"): "planner"},
     "Closed weeks at Saltgrass Quay: 'week' is not an ISO week"),
    (ids.PLAN_COMMIT, {(ids.PLAN_PRIORITY, "value"): "XX-1=2", (ids.PLAN_WHO, "value"): "p"},
     "no unit with fleet number 'XX-1'"),
    (ids.PLAN_COMMIT, {(ids.PLAN_WHO, "value"): "   "}, "write your name"),
])
def test_bad_input_says_why_and_changes_nothing(client: Any, store_url: str, trigger: str,
                                                changes: dict[Any, Any], message: str) -> None:
    got = show(client, trigger, changes=changes)
    assert set(got) == {ids.PLAN_MESSAGE}  # every other output left as it was
    assert message in flat_text(got[ids.PLAN_MESSAGE]["children"])
    assert plans_stored(store_url) == 0


def test_downloads_export_the_plan_shown(client: Any, store_url: str) -> None:
    kept = show(client, ids.PLAN_COMMIT, changes={(ids.PLAN_WHO, "value"): "planner"})[
        ids.PLAN_SHOWN]["data"]
    values = {(ids.PLAN_SHOWN, "data"): kept, (ids.PLAN_CSV, "n_clicks"): 1,
              (ids.PLAN_ICS, "n_clicks"): 1}
    csv_file = post(client, ids.PLAN_DOWNLOAD, values, (ids.PLAN_CSV, "n_clicks"))[
        ids.PLAN_DOWNLOAD]["data"]
    lines = csv_file["content"].splitlines()
    assert csv_file["filename"] == "overhaul-plan-2026-W49-plan1.csv"
    assert lines[0] == ",".join(exports.CSV_COLUMNS) and len(lines) == 1 + len(WORN)
    ics_file = post(client, ids.PLAN_DOWNLOAD, values, (ids.PLAN_ICS, "n_clicks"))[
        ids.PLAN_DOWNLOAD]["data"]
    # icalendar (PyPI) as an independent reader of RFC 5545.
    events = icalendar.Calendar.from_ical(ics_file["content"]).walk("VEVENT")
    assert {str(e["SUMMARY"]).split()[0] for e in events} == WORN
    assert {str(e["STATUS"]) for e in events} == {"CONFIRMED"}
    assert all(str(e["UID"]).startswith("plan1-unit") for e in events)
    assert plans_stored(store_url) == 1  # exporting stores nothing more
