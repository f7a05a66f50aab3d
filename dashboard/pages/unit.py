"""Unit history: one unit's level and reasons, its wear per cylinder, spread, vacuum, tests."""

from __future__ import annotations

import datetime as dt
from typing import Any
from urllib.parse import urlencode

import dash
from dash import Input, Output, Patch, State, callback, ctx, dcc, html

from dashboard import (
    capture_components,
    capture_data,
    capture_figures,
    components,
    data,
    figures,
    ids,
)
from fleetdb.errors import UnitNotFound

dash.register_page(__name__, path="/unit", name="Unit history", title="Unit history · fleetdb",
                   order=1)

_GRAPH_CONFIG = {"displaylogo": False, "modeBarButtonsToRemove": ["select2d", "lasso2d"]}
_NO_UNIT = "Pick a unit to draw its history."


def _radio(component_id: str, options: list[Any], value: str) -> dcc.RadioItems:
    return dcc.RadioItems(id=component_id, options=options, value=value, inline=True,
                          className="radio")


def layout(fleet_no: str | None = None, as_of: str | None = None, capture: str | None = None,
           **_query: Any) -> html.Div:
    """The page; cheap: the unit is read by the callbacks (``/unit?fleet_no=LT-902``,
    ``&capture=ID`` to open one of its captures)."""
    day = data.parse_day(as_of) or dt.date.today()
    return html.Div([
        html.H1("Unit history"),
        html.Div([
            components.field("Unit", dcc.Dropdown(
                id=ids.UNIT_PICK, value=fleet_no, placeholder="Type a fleet number…",
                options=[{"label": fleet_no, "value": fleet_no}] if fleet_no else [],
                clearable=False), class_name="field filter filter-wide"),
            components.field("As of", dcc.DatePickerSingle(
                id=ids.UNIT_AS_OF, date=day.isoformat(), display_format="YYYY-MM-DD",
                first_day_of_week=1, clearable=False), class_name="field filter"),
            components.field("Pressure unit", _radio(ids.UNIT_PRESSURE_UNIT,
                                                     list(data.PRESSURE_UNITS), "psi"),
                             class_name="field filter"),
            components.field("Compression shown", _radio(ids.UNIT_BASIS, [
                {"label": "sea-level equivalent", "value": "sea_level"},
                {"label": "as measured", "value": "measured"}], "sea_level"),
                class_name="field filter"),
        ], className="filters panel"),
        html.Div(id=ids.UNIT_SUMMARY),
        dcc.Link("Audit trail of this unit: who wrote what, from where", id=ids.UNIT_TRAIL_LINK,
                 href=f"/trail?{urlencode({'fleet_no': fleet_no or ''})}", className="trail-link"),
        html.Section([
            dcc.Graph(id=ids.UNIT_COMPRESSION, config=_GRAPH_CONFIG),
            html.P("Solid lines: the current wear line of each cylinder; dotted: its "
                   "projection to the family minimum. Hollow grey markers are tests left out "
                   "of the fits (not trustworthy: hollow circle; voided: ×); a downward "
                   "triangle is a sudden drop. Dotted vertical lines are service work.",
                   className="hint"),
        ], className="panel"),
        html.Div([
            html.Section(dcc.Graph(id=ids.UNIT_SPREAD, config=_GRAPH_CONFIG),
                         className="panel"),
            html.Section(dcc.Graph(id=ids.UNIT_VACUUM, config=_GRAPH_CONFIG),
                         className="panel"),
        ], className="chart-pair"),
        capture_panel(capture),
        html.Section([html.H2("Tests, newest first"), html.Div(id=ids.UNIT_TESTS)],
                     className="panel"),
    ])


def _report(fleet_no: str | None, as_of: str | None) -> dict[str, Any] | str:
    """The unit's report, or the sentence to show instead."""
    if not fleet_no:
        return _NO_UNIT
    try:
        return data.unit_report(data.current_url(), fleet_no, data.parse_day(as_of))
    except UnitNotFound as exc:
        return str(exc)


# -- callbacks --------------------------------------------------------------------------------

@callback(Output(ids.UNIT_PICK, "options"), Input(ids.UNIT_PICK, "search_value"),
          State(ids.UNIT_PICK, "value"))
def _offer_units(search: str | None, selected: str | None) -> list[dict[str, str]]:
    return data.unit_options(data.current_url(), search, selected)


@callback(Output(ids.UNIT_SUMMARY, "children"), Output(ids.UNIT_TESTS, "children"),
          Input(ids.UNIT_PICK, "value"), Input(ids.UNIT_AS_OF, "date"),
          Input(ids.UNIT_PRESSURE_UNIT, "value"))
def _describe_unit(fleet_no: str | None, as_of: str | None, unit: str) -> tuple[Any, Any]:
    report = _report(fleet_no, as_of)
    if isinstance(report, str):
        shown = (html.P(report, className="hint") if report == _NO_UNIT
                 else components.problem_list("Unit not found", [("Fleet number", report)]))
        return shown, None
    return components.unit_header(report, unit), components.tests_table(report, unit)


@callback(Output(ids.UNIT_COMPRESSION, "figure"), Input(ids.UNIT_PICK, "value"),
          Input(ids.UNIT_AS_OF, "date"), Input(ids.UNIT_PRESSURE_UNIT, "value"),
          Input(ids.UNIT_BASIS, "value"))
def _draw_compression(fleet_no: str | None, as_of: str | None, unit: str, basis: str) -> Any:
    report = _report(fleet_no, as_of)
    if isinstance(report, str):
        return figures.message_figure(report, "Compression per cylinder")
    return figures.unit_compression(report, unit, basis=basis)


@callback(Output(ids.UNIT_SPREAD, "figure"), Output(ids.UNIT_VACUUM, "figure"),
          Input(ids.UNIT_PICK, "value"), Input(ids.UNIT_AS_OF, "date"))
def _draw_spread_and_vacuum(fleet_no: str | None, as_of: str | None) -> tuple[Any, Any]:
    report = _report(fleet_no, as_of)
    if isinstance(report, str):
        return (figures.message_figure(report, "Spread"),
                figures.message_figure(report, "Manifold vacuum"))
    return figures.unit_spread(report), figures.unit_vacuum(report)


# -- captures ---------------------------------------------------------------------------------

def capture_panel(capture: str | None) -> html.Section:
    """The recording behind a test: picker, what was derived, waveform, events (hidden until
    the unit has a capture)."""
    picked = int(capture) if capture and str(capture).isdigit() else None
    return html.Section([
        html.H2("Capture of a test"),
        components.field("Capture", dcc.Dropdown(id=ids.UNIT_CAPTURE_PICK, value=picked,
                                                 options=[], clearable=False),
                         class_name="field filter filter-wide"),
        html.Div(id=ids.UNIT_CAPTURE_SUMMARY),
        dcc.Graph(id=ids.UNIT_CAPTURE_WAVEFORM, config=_GRAPH_CONFIG),
        html.P("Drag across the waveform to zoom (the zoomed window is drawn again from every "
               "sample); double-click to see it all. Triangles mark the compression events "
               "fleetdb found, numbered; the dotted line is the intake-stroke depression; "
               "numbers over the starter current name the cylinder of each hump.",
               className="hint"),
        dcc.Graph(id=ids.UNIT_CAPTURE_EVENTS, config=_GRAPH_CONFIG),
    ], id=ids.UNIT_CAPTURE_PANEL, className="panel", hidden=True)


@callback(Output(ids.UNIT_CAPTURE_PICK, "options"), Output(ids.UNIT_CAPTURE_PICK, "value"),
          Output(ids.UNIT_CAPTURE_PANEL, "hidden"), Input(ids.UNIT_PICK, "value"),
          State(ids.UNIT_CAPTURE_PICK, "value"))
def _offer_captures(fleet_no: str | None, picked: int | None) -> tuple[Any, Any, bool]:
    try:
        rows = capture_data.captures_of_unit(data.current_url(), fleet_no) if fleet_no else []
    except UnitNotFound:
        rows = []
    options = [{"label": capture_data.capture_label(r), "value": r["capture_id"]} for r in rows]
    known = [r["capture_id"] for r in rows]
    return options, (picked if picked in known else known[0] if known else None), not rows


@callback(Output(ids.UNIT_CAPTURE_SUMMARY, "children"), Output(ids.UNIT_CAPTURE_EVENTS, "figure"),
          Input(ids.UNIT_CAPTURE_PICK, "value"), Input(ids.UNIT_PRESSURE_UNIT, "value"))
def _describe_capture(capture_id: int | None, unit: str) -> tuple[Any, Any]:
    if capture_id is None:
        return None, figures.message_figure("No capture picked.", "Events")
    shown = capture_data.stored_capture(data.current_url(), int(capture_id))
    described = {c["column"]: capture_data.describe(c) for c in shown.channel_map["channels"]}
    head = capture_data.stored_head(shown)
    summary = capture_components.capture_summary(
        head, shown.derived, described, capture_components.stored_readings(shown.derived), unit,
        ids.UNIT_CAPTURE_SUMMARY + "-body")
    return summary, capture_figures.events(shown.derived, unit)


@callback(Output(ids.UNIT_CAPTURE_WAVEFORM, "figure"), Input(ids.UNIT_CAPTURE_PICK, "value"),
          Input(ids.UNIT_PRESSURE_UNIT, "value"),
          State(ids.UNIT_CAPTURE_WAVEFORM, "relayoutData"))
def _draw_waveform(capture_id: int | None, unit: str, relayout: dict[str, Any] | None) -> Any:
    """The whole waveform of the picked capture (thinned to the graph's width)."""
    if capture_id is None:
        return figures.message_figure("No capture picked.", "Waveform")
    shown = capture_data.stored_capture(data.current_url(), int(capture_id))
    window = capture_data.zoom_window(relayout)
    # A new pressure unit keeps the zoom (uirevision), so draw the zoomed window in full.
    keep = window if ctx.triggered_id == ids.UNIT_PRESSURE_UNIT and window else (None, None)
    return capture_figures.waveform(capture_data.traces(shown, *keep), shown.derived, unit,
                                    revision=capture_id)


# A callback of its own, not an input of the one above: Dash keeps only the newest answer
# of a callback, so a relayout event of the still-empty graph (its first autosize) sent
# while the whole waveform was being drawn would drop that drawing.
@callback(Output(ids.UNIT_CAPTURE_WAVEFORM, "figure", allow_duplicate=True),
          Input(ids.UNIT_CAPTURE_WAVEFORM, "relayoutData"),
          State(ids.UNIT_CAPTURE_PICK, "value"), State(ids.UNIT_PRESSURE_UNIT, "value"),
          prevent_initial_call=True)
def _zoom_waveform(relayout: dict[str, Any] | None, capture_id: int | None, unit: str) -> Any:
    """Every sample of the window the user zoomed to (only the channels' points change;
    uirevision keeps the zoom the user chose)."""
    window = capture_data.zoom_window(relayout)
    if capture_id is None or window is None:
        return dash.no_update
    shown = capture_data.stored_capture(data.current_url(), int(capture_id))
    patch = Patch()
    for i, trace in enumerate(capture_data.traces(shown, *window)):
        patch["data"][i]["x"] = trace.time_s.tolist()
        patch["data"][i]["y"] = capture_figures.scaled(trace.kind, trace.values, unit).tolist()
    return patch


@callback(Output(ids.UNIT_TRAIL_LINK, "href"), Input(ids.UNIT_PICK, "value"))
def _link_trail(fleet_no: str | None) -> str:
    return f"/trail?{urlencode({'fleet_no': fleet_no or ''})}"
