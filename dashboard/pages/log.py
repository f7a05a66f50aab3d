"""Log a test: the technician types one test; it is checked as typed, saved, then judged."""

from __future__ import annotations

from datetime import datetime
from typing import Any

import dash
from dash import ALL, MATCH, Input, Output, State, callback, ctx, dcc, html

from dashboard import (
    capture_components,
    capture_data,
    capture_figures,
    components,
    data,
    figures,
    ids,
)
from dashboard.capture_components import capture_actions, capture_part
from fleetdb.errors import FleetDBError

dash.register_page(__name__, path="/log", name="Log a test", title="Log a test · fleetdb",
                   order=2)

_CONDITION_IDS = {"battery_v": ids.LOG_BATTERY_V, "crank_rpm": ids.LOG_CRANK_RPM,
                  "engine_temp_c": ids.LOG_ENGINE_TEMP_C, "baro_kpa": ids.LOG_BARO_KPA,
                  "throttle_open": ids.LOG_THROTTLE, "technician": ids.LOG_TECHNICIAN,
                  "note": ids.LOG_NOTE}


def _form(dep: type) -> dict[str, Any]:
    """The form's values as a grouping of ``dep`` (Input or State) for flexible callbacks."""
    return {"fleet_no": dep(ids.LOG_UNIT, "value"), "tested_at": dep(ids.LOG_TESTED_AT, "value"),
            "hours": dep(ids.LOG_HOURS, "value"), "kind": dep(ids.LOG_KIND, "value"),
            "pressure_unit": dep(ids.LOG_PRESSURE_UNIT, "value"),
            "vacuum_unit": dep(ids.LOG_VACUUM_UNIT, "value"),
            "vacuum_cranking": dep(ids.LOG_VACUUM_CRANKING, "value"),
            "vacuum_idle": dep(ids.LOG_VACUUM_IDLE, "value"),
            "cylinders": dep(ids.log_cylinder(ALL), "value"),
            "conditions": {name: dep(cid, "value") for name, cid in _CONDITION_IDS.items()}}


def _entry(form: dict[str, Any], cylinder_ids: list[dict[str, Any]]) -> data.FormEntry:
    """The form's values as a :class:`data.FormEntry`."""
    cylinders = {cid["index"]: value for cid, value in zip(cylinder_ids, form["cylinders"],
                                                           strict=True)}
    vacuum = {"vacuum_cranking": form["vacuum_cranking"], "vacuum_idle": form["vacuum_idle"]}
    return data.FormEntry(fleet_no=form["fleet_no"], tested_at=form["tested_at"],
                          hours=form["hours"], kind=form["kind"],
                          pressure_unit=form["pressure_unit"], cylinders=cylinders,
                          vacuum_unit=form["vacuum_unit"], vacuum=vacuum,
                          conditions=form["conditions"])


# -- layout -----------------------------------------------------------------------------

def _text_input(component_id: str, **extra: Any) -> dcc.Input:
    return dcc.Input(id=component_id, type="text", debounce=True, autoComplete="off", **extra)


def _radio(component_id: str, options: list[Any], value: str) -> dcc.RadioItems:
    return dcc.RadioItems(id=component_id, options=options, value=value, inline=True,
                          className="radio")


def layout(**_query: Any) -> html.Div:
    """The page; cheap: the unit list and the engine block are filled by callbacks."""
    kinds = [{"label": label, "value": kind} for kind, label in data.CYLINDER_KINDS.items()]
    return html.Div([
        html.H1("Log a test"),
        html.Div([html.Div([
            html.Section([
                html.H2("Unit"),
                components.field("Fleet number", dcc.Dropdown(
                    id=ids.LOG_UNIT, placeholder="Type a fleet number…", clearable=True)),
                html.Div(id=ids.LOG_UNIT_SUMMARY, className="unit-summary"),
            ], className="panel"),
            html.Section([
                html.H2("Readings come from"),
                _radio(ids.LOG_SOURCE, [
                    {"label": "typed in, value by value", "value": "typed"},
                    {"label": "a capture file (pressure transducer, vacuum transducer or "
                              "starter-current clamp)", "value": "capture"}], "typed"),
            ], className="panel"),
            html.Section([
                html.H2("Readings"),
                components.field("What was measured", _radio(ids.LOG_KIND, kinds, "compression")),
                components.field("Pressure unit", _radio(ids.LOG_PRESSURE_UNIT,
                                                         list(data.PRESSURE_UNITS), "psi")),
                html.Div(id=ids.LOG_BLOCK_CAPTION, className="hint"),
                html.Div(id=ids.LOG_BLOCK, className="engine-block"),
            ], id=ids.LOG_READINGS_PANEL, className="panel"),
            capture_part(),
            html.Section([
                html.H2("When and how"),
                html.Div([
                    components.field("Date and time", _text_input(
                        ids.LOG_TESTED_AT, value=datetime.now().strftime("%Y-%m-%d %H:%M")),
                        hint="YYYY-MM-DD HH:MM, shop local time"),
                    components.field("Hour meter", _text_input(ids.LOG_HOURS),
                                     hint="engine hours"),
                    components.field("Battery volts under crank", _text_input(ids.LOG_BATTERY_V),
                                     hint="V"),
                    components.field("Cranking rpm", _text_input(ids.LOG_CRANK_RPM),
                                     hint="rpm"),
                    components.field("Engine temperature", _text_input(ids.LOG_ENGINE_TEMP_C),
                                     hint="°C"),
                    components.field("Barometer (optional)", _text_input(ids.LOG_BARO_KPA),
                                     hint="kPa absolute; blank: the site's standard atmosphere"),
                ], className="field-grid"),
                components.field("Throttle held wide open", _radio(
                    ids.LOG_THROTTLE, [{"label": "yes", "value": "yes"},
                                       {"label": "no", "value": "no"},
                                       {"label": "unknown", "value": ""}], "")),
            ], className="panel"),
            html.Section([
                html.H2("Vacuum (optional)"),
                html.Div([
                    components.field("Cranking vacuum", _text_input(ids.LOG_VACUUM_CRANKING)),
                    components.field("Idle vacuum", _text_input(ids.LOG_VACUUM_IDLE)),
                ], className="field-grid"),
                components.field("Vacuum unit", _radio(ids.LOG_VACUUM_UNIT,
                                                       list(data.VACUUM_UNITS), "inHg")),
            ], id=ids.LOG_VACUUM_PANEL, className="panel"),
            html.Section([
                html.H2("Who and why"),
                html.Div([components.field("Technician", _text_input(ids.LOG_TECHNICIAN)),
                          components.field("Note", _text_input(ids.LOG_NOTE))],
                         className="field-grid"),
            ], className="panel"),
            html.Div([
                html.Div(id=ids.LOG_CHECK, className="check", **{"aria-live": "polite"}),
                html.Button("Save test", id=ids.LOG_SAVE, n_clicks=0,
                            className="button-primary"),
                html.Div(id=ids.LOG_SAVE_RESULT, **{"aria-live": "polite"}),
                html.Div(id=ids.LOG_VERDICT),
            ], id=ids.LOG_TYPED_ACTIONS),
            capture_actions(),
        ], className="log-form"),
            components.safety_panel(ids.LOG_SAFETY)], className="log-grid"),
    ])


def engine_block(engine: data.UnitEngine) -> list[html.Div]:
    """One input per cylinder laid out as the engine: a row per bank, front on the left."""
    vee = len(engine.banks) > 1
    return [html.Div([html.Span(f"Bank {n}" if vee else "Cylinders", className="bank-label"),
                      *[html.Label([f"Cyl {c}", dcc.Input(
                          id=ids.log_cylinder(c), type="text", debounce=True, autoComplete="off",
                          className="cyl-input")], className="cyl") for c in bank]],
                     className="bank-row")
            for n, bank in enumerate(engine.banks, start=1)]


def unit_summary(engine: data.UnitEngine) -> html.P:
    """Family, fuel and cylinders of the picked unit."""
    shape = f"V, banks {engine.banks_text}" if len(engine.banks) > 1 else "inline"
    return html.P([html.Strong(engine.engine_family), f" · {engine.fuel} · "
                   f"{engine.cylinders} cylinders ({shape}) · {engine.site}"])


def kind_options(fuel: str | None) -> list[dict[str, Any]]:
    """The reading kinds; no wet test on a diesel (oil is never added to its cylinders)."""
    return [{"label": label, "value": kind, "disabled": kind == "wet" and fuel == "diesel"}
            for kind, label in data.CYLINDER_KINDS.items()]


# -- callbacks --------------------------------------------------------------------------

@callback(Output(ids.LOG_UNIT, "options"), Input(ids.LOG_UNIT, "search_value"),
          State(ids.LOG_UNIT, "value"))
def _offer_units(search: str | None, selected: str | None) -> list[dict[str, str]]:
    return data.unit_options(data.current_url(), search, selected)


@callback(Output(ids.LOG_UNIT_SUMMARY, "children"), Output(ids.LOG_BLOCK, "children"),
          Output(ids.LOG_KIND, "options"), Input(ids.LOG_UNIT, "value"))
def _lay_out_engine(fleet_no: str | None) -> tuple[Any, Any, Any]:
    if not fleet_no:
        return html.P("Pick a unit to lay out its cylinders.", className="hint"), [], \
            kind_options(None)
    engine = data.unit_engine(data.current_url(), fleet_no)
    return unit_summary(engine), engine_block(engine), kind_options(engine.fuel)


@callback(Output(ids.LOG_PRESSURE_UNIT, "options"), Output(ids.LOG_BLOCK_CAPTION, "children"),
          Input(ids.LOG_KIND, "value"), Input(ids.LOG_PRESSURE_UNIT, "value"))
def _describe_block(kind: str, unit: str) -> tuple[Any, str]:
    percent = kind in data.PERCENT_KINDS
    options = [{"label": u, "value": u, "disabled": percent} for u in data.PRESSURE_UNITS]
    shown = "%" if percent else unit
    return options, f"{data.CYLINDER_KINDS[kind]} in {shown}, front of the engine on the left"


@callback(Output(ids.LOG_CHECK, "children"), inputs={"form": _form(Input)},
          state={"cylinder_ids": State(ids.log_cylinder(ALL), "id")})
def _check_as_typed(form: dict[str, Any], cylinder_ids: list[dict[str, Any]]) -> Any:
    entry = _entry(form, cylinder_ids)
    if not data.typed_readings(entry, complete=False):
        return html.P("Each value is checked as you leave its box.", className="hint")
    problems = data.check_entry(data.current_url(), entry)
    return components.problem_list("Check before saving", [(p.where, p.message)
                                                           for p in problems]) \
        or html.P("✓ Everything typed so far passes the checks.", className="ok")


@callback(Output(ids.LOG_SAVE_RESULT, "children"), Output(ids.LOG_VERDICT, "children"),
          inputs={"clicks": Input(ids.LOG_SAVE, "n_clicks")},
          state={"form": _form(State), "cylinder_ids": State(ids.log_cylinder(ALL), "id")},
          prevent_initial_call=True)
def _save(clicks: int, form: dict[str, Any], cylinder_ids: list[dict[str, Any]]) -> tuple:
    url = data.current_url()
    result = data.save_entry(url, _entry(form, cylinder_ids))
    if result.test_id is None:
        problems = [(p.where, p.message) for p in result.problems]
        return components.problem_list("Not saved: nothing was written", problems), None
    saved = f"✓ Saved as test {result.test_id} for {form['fleet_no']}."
    return html.P(saved, className="ok saved"), saved_verdict(url, result, form)


def saved_verdict(url: str, result: data.SaveResult, form: dict[str, Any]) -> Any:
    """The verdict panel on a test just saved, with its cylinders drawn when it has any."""
    if result.verdict is None:
        return html.P("No verdict: this installation has no fleetdb.health.", className="hint")
    unit = form["pressure_unit"]
    dry = data.dry_compression_of(url, form["fleet_no"], result.test_id)
    graph = None if dry is None else dcc.Graph(
        id=ids.LOG_VERDICT_GRAPH, config={"displayModeBar": False},
        figure=figures.cylinder_bars(dry[0], unit, data.unit_engine(url, form["fleet_no"]).banks,
                                     minimum_kpa=dry[1],
                                     title="This test, sea-level equivalent"))
    return components.verdict_panel(result.verdict, unit, ids.LOG_VERDICT_PANEL, graph)


# -- a capture instead of typed readings ----------------------------------------------------------

@callback(Output(ids.LOG_READINGS_PANEL, "hidden"), Output(ids.LOG_VACUUM_PANEL, "hidden"),
          Output(ids.LOG_TYPED_ACTIONS, "hidden"), Output(ids.LOG_CAPTURE_PART, "hidden"),
          Output(ids.LOG_CAPTURE_ACTIONS, "hidden"), Input(ids.LOG_SOURCE, "value"))
def _choose_source(source: str) -> tuple[bool, bool, bool, bool, bool]:
    typed = source != "capture"
    return not typed, not typed, not typed, typed, typed


@callback(Output(ids.LOG_CAPTURE_KEY, "data"), Output(ids.LOG_CAPTURE_FILE, "children"),
          Output(ids.LOG_CAPTURE_MAP, "children"), Input(ids.LOG_CAPTURE_UPLOAD, "contents"),
          State(ids.LOG_CAPTURE_UPLOAD, "filename"), prevent_initial_call=True)
def _receive_capture(contents: str | None, filename: str | None) -> tuple[Any, Any, Any]:
    try:
        upload = capture_data.receive_upload(contents or "", filename or "capture.csv")
    except FleetDBError as exc:
        problems = [(p.where, p.message) for p in capture_data.problems_of(exc)]
        return None, components.problem_list("Upload refused: nothing kept", problems), None
    kept = upload.to_store()
    return kept, capture_components.upload_text(kept), capture_components.map_table(kept)


@callback(Output(ids.log_capture_field("unit", MATCH), "options"),
          Output(ids.log_capture_field("unit", MATCH), "value"),
          Output(ids.log_capture_field("cylinder", MATCH), "disabled"),
          Input(ids.log_capture_field("role", MATCH), "value"),
          State(ids.log_capture_field("unit", MATCH), "value"))
def _units_of_role(role: str, unit: str | None) -> tuple[Any, Any, bool]:
    options = capture_components.unit_options(role or "ignore")
    values = [o["value"] for o in options]
    return options, (unit if unit in values else values[0] if values else None), \
        role != "pressure"


def _capture_form(form: dict[str, Any], cylinder_ids: list[dict[str, Any]],
                  upload: dict[str, Any] | None, rows: dict[str, list[Any]],
                  firing: str | None, first_hump: str | None) -> capture_data.CaptureForm:
    """The page's values as a :class:`capture_data.CaptureForm` (rows in header order)."""
    by_index = [dict(zip(ids.CAPTURE_MAP_FIELDS, values, strict=True))
                for values in zip(*(rows[name] for name in ids.CAPTURE_MAP_FIELDS),
                                  strict=True)]
    return capture_data.CaptureForm(upload=upload or {}, rows=by_index,
                                    entry=_entry(form, cylinder_ids), firing_order=firing,
                                    first_hump=first_hump)


def _capture_state() -> dict[str, Any]:
    return {"form": _form(State), "cylinder_ids": State(ids.log_cylinder(ALL), "id"),
            "upload": State(ids.LOG_CAPTURE_KEY, "data"),
            "rows": {name: State(ids.log_capture_field(name, ALL), "value")
                     for name in ids.CAPTURE_MAP_FIELDS},
            "firing": State(ids.LOG_CAPTURE_FIRING, "value"),
            "first_hump": State(ids.LOG_CAPTURE_FIRST_HUMP, "value")}


@callback(Output(ids.LOG_CAPTURE_PREVIEW_OUT, "children"),
          inputs={"clicks": Input(ids.LOG_CAPTURE_PREVIEW, "n_clicks"),
                  "fresh": Input(ids.LOG_CAPTURE_KEY, "data")},
          state=_capture_state(), prevent_initial_call=True)
def _preview_capture(clicks: int, fresh: Any, form: dict[str, Any], cylinder_ids: list[Any],
                     upload: dict[str, Any] | None, rows: dict[str, list[Any]],
                     firing: str | None, first_hump: str | None) -> Any:
    if ctx.triggered_id != ids.LOG_CAPTURE_PREVIEW:
        return None  # a new file: the old preview no longer applies
    if not upload:
        return components.problem_list("No preview", [("Capture file", "upload a capture "
                                                       "CSV first")])
    entry = _capture_form(form, cylinder_ids, upload, rows, firing, first_hump)
    outcome = capture_data.preview(data.current_url(), entry)
    if outcome.report is None:
        return components.problem_list("Cannot derive readings: check the map and the test",
                                       [(p.where, p.message) for p in outcome.problems])
    unit = form["pressure_unit"]
    shown = outcome.shown
    return html.Div([
        html.H3("Preview: nothing is saved yet"),
        capture_components.capture_summary(
            capture_data.report_head(outcome.report), shown.derived, outcome.described,
            outcome.report["readings"], unit, ids.LOG_CAPTURE_SUMMARY),
        dcc.Graph(id=ids.LOG_CAPTURE_WAVEFORM, config={"displaylogo": False},
                  figure=capture_figures.waveform(capture_data.traces(shown), shown.derived,
                                                  unit, title="Waveform (preview)")),
        dcc.Graph(id=ids.LOG_CAPTURE_EVENTS, config={"displaylogo": False},
                  figure=capture_figures.events(shown.derived, unit)),
    ], className="capture-preview")


@callback(Output(ids.LOG_CAPTURE_SAVE_RESULT, "children"),
          Output(ids.LOG_CAPTURE_VERDICT, "children"),
          inputs={"clicks": Input(ids.LOG_CAPTURE_SAVE, "n_clicks")}, state=_capture_state(),
          prevent_initial_call=True)
def _save_capture(clicks: int, form: dict[str, Any], cylinder_ids: list[Any],
                  upload: dict[str, Any] | None, rows: dict[str, list[Any]],
                  firing: str | None, first_hump: str | None) -> tuple[Any, Any]:
    if not upload:
        return components.problem_list("Not saved: nothing was written",
                                       [("Capture file", "upload a capture CSV first")]), None
    entry = _capture_form(form, cylinder_ids, upload, rows, firing, first_hump)
    outcome = capture_data.save(data.current_url(), entry)
    if outcome.report is None:
        return components.problem_list("Not saved: nothing was written",
                                       [(p.where, p.message) for p in outcome.problems]), None
    report = outcome.report
    saved = html.P([f"✓ Saved as test {report['test_id']} for {report['fleet_no']} with "
                    f"capture {report['capture_id']}. ",
                    dcc.Link("See it on the unit's history", href=(
                        f"/unit?fleet_no={report['fleet_no']}&capture={report['capture_id']}"))],
                   className="ok saved")
    verdict = None if outcome.verdict is None else components.verdict_panel(
        outcome.verdict, form["pressure_unit"], ids.LOG_CAPTURE_VERDICT_PANEL)
    return saved, verdict
