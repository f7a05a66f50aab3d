"""Audit trail: every write that touched one unit, who made it and from where; voids."""

from __future__ import annotations

import json
from typing import Any

import dash
from dash import Input, Output, State, callback, dcc, html, no_update

from dashboard import components, data, ids
from fleetdb import access, audit, health, logbook, views
from fleetdb.errors import FleetDBError, UnitNotFound

dash.register_page(__name__, path="/trail", name="Audit trail", title="Audit trail · fleetdb",
                   order=5)


def layout(fleet_no: str | None = None, **_query: Any) -> html.Div:
    """The page (``/trail?fleet_no=LT-902``); what the role cannot do is not shown."""
    actor = access.current()
    return html.Div([
        html.H1("Audit trail"),
        html.P("Every write that touched the unit, oldest first: imports, logged tests, voids, "
               "committed plans and changes to its engine family. Nothing is ever deleted.",
               className="hint"),
        html.Div([
            components.field("Unit", dcc.Dropdown(
                id=ids.TRAIL_PICK, value=fleet_no, placeholder="Type a fleet number…",
                options=[{"label": fleet_no, "value": fleet_no}] if fleet_no else [],
                clearable=False), class_name="field filter filter-wide"),
            html.Button("Download JSON", id=ids.TRAIL_EXPORT, n_clicks=0,
                        className="button-secondary", hidden=not actor.may("export")),
            dcc.Download(id=ids.TRAIL_DOWNLOAD),
        ], className="filters panel"),
        html.Section(html.Div(id=ids.TRAIL_TABLE), className="panel"),
        html.Section([
            html.H2("Void a test"),
            html.P("A voided test stays in the record and leaves the analysis. Say why. "
                   + ("" if actor.may("void_any") else "Only the tests you logged are listed."),
                   className="hint"),
            components.field("Test", dcc.Dropdown(id=ids.TRAIL_VOID_TEST, options=[],
                                                  placeholder="a test of this unit")),
            components.field("Reason", dcc.Input(id=ids.TRAIL_VOID_REASON, type="text",
                                                 autoComplete="off", maxLength=500)),
            html.Button("Void this test", id=ids.TRAIL_VOID, n_clicks=0,
                        className="button-primary"),
            html.Div(id=ids.TRAIL_VOID_RESULT, **{"aria-live": "polite"}),
        ], id=ids.TRAIL_VOID_SECTION, className="panel",
            hidden=not actor.may("void_own")),
    ])


def trail_table(events: list[dict[str, Any]]) -> html.Table | html.P:
    """The events as a table, oldest first."""
    if not events:
        return html.P("Nothing recorded for this unit yet.", className="hint")
    head = html.Tr([html.Th(h) for h in ("When (UTC)", "Who", "From", "Action", "What")])
    rows = [html.Tr([html.Td(e["at"].replace("T", " ")[:19]), html.Td(e["user"]),
                     html.Td(e["origin"]), html.Td(e["action"]), html.Td(e["summary"])])
            for e in events]
    return html.Table([html.Thead(head), html.Tbody(rows)], className="trail")


# -- callbacks --------------------------------------------------------------------------------

@callback(Output(ids.TRAIL_PICK, "options"), Input(ids.TRAIL_PICK, "search_value"),
          State(ids.TRAIL_PICK, "value"))
def _offer_units(search: str | None, selected: str | None) -> list[dict[str, str]]:
    return data.unit_options(data.current_url(), search, selected)


@callback(Output(ids.TRAIL_TABLE, "children"), Output(ids.TRAIL_VOID_TEST, "options"),
          Input(ids.TRAIL_PICK, "value"), Input(ids.TRAIL_VOID_RESULT, "children"))
def _show_trail(fleet_no: str | None, _voided: Any) -> tuple[Any, list[dict[str, Any]]]:
    if not fleet_no:
        return html.P("Pick a unit to see its trail.", className="hint"), []
    engine = data.engine_for(data.current_url())
    try:
        events = audit.unit_trail(engine, fleet_no)
    except UnitNotFound as exc:
        return components.problem_list("Unit not found", [("Fleet number", str(exc))]), []
    tests = [{"label": f"test {t['test_id']}: {t['tested_at']}, {t['hours']:g} h "
                       f"(logged by {t['logged_by']})", "value": t["test_id"]}
             for t in logbook.voidable_tests(engine, fleet_no)]
    return trail_table(events), tests


@callback(Output(ids.TRAIL_VOID_RESULT, "children"), Input(ids.TRAIL_VOID, "n_clicks"),
          State(ids.TRAIL_VOID_TEST, "value"), State(ids.TRAIL_VOID_REASON, "value"),
          State(ids.TRAIL_PICK, "value"), prevent_initial_call=True)
def _void(_clicks: int, test_id: int | None, reason: str | None, fleet_no: str | None) -> Any:
    if test_id is None or not fleet_no:
        return components.problem_list("Nothing voided", [("Test", "pick a test first")])
    engine = data.engine_for(data.current_url())
    try:
        logbook.void_test(engine, int(test_id), reason or "")
    except FleetDBError as exc:
        return components.problem_list("Nothing voided", [("Void", str(exc))])
    health.refresh_units(engine, [views.unit_id_for(engine, fleet_no)])
    return html.P(f"✓ Voided test {test_id}: {reason.strip()}", className="ok")


@callback(Output(ids.TRAIL_DOWNLOAD, "data"), Input(ids.TRAIL_EXPORT, "n_clicks"),
          State(ids.TRAIL_PICK, "value"), prevent_initial_call=True)
def _download(_clicks: int, fleet_no: str | None) -> Any:
    if not fleet_no:
        return no_update
    events = audit.unit_trail(data.engine_for(data.current_url()), fleet_no)
    text = json.dumps({"fleet_no": fleet_no, "events": events}, indent=2, ensure_ascii=False)
    return dcc.send_string(text, f"trail-{fleet_no}.json", type="application/json")
