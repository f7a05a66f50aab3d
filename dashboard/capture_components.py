"""Layout pieces of captures, shared by Unit history and Log a test (what fleetdb derived)."""

from __future__ import annotations

from typing import Any

from dash import dcc, html

from dashboard import capture_data, components, ids
from dashboard.capture_figures import vacuum_unit_for
from dashboard.components import pressure_text
from fleetdb.units import from_kpa


def _kpa(value: float | None, unit: str) -> str:
    return pressure_text(value, unit)


def _depth(value: float | None, unit: str) -> str:
    if value is None:
        return "–"
    vac = vacuum_unit_for(unit)
    return f"{from_kpa(value, vac):.1f} {vac}"


def channel_lines(channel: dict[str, Any], unit: str) -> list[str]:
    """What fleetdb derived from one channel, in sentences (as ``fleetdb capture`` prints)."""
    if channel["kind"] == "pressure":
        return [f"{channel['events']} compression events at {channel['crank_rpm']:.0f} rpm; "
                f"first {_kpa(channel['first_kpa'], unit)} = {channel['first_pct']:.0f} % of "
                f"settled {_kpa(channel['settled_kpa'], unit)}; 90 % reached at event "
                f"{channel['events_to_90pct']}",
                f"intake-stroke depression {_depth(channel['intake_depression_kpa'], unit)} "
                "below ambient"]
    if channel["kind"] == "current":
        rel = ", ".join(f"cyl {c}: {p:.0f} %" for c, p in channel["relative_pct"].items())
        return [f"firing order {channel['firing_order']}, sync by {channel['sync']}, "
                f"{channel['humps_used']} humps, {channel['crank_rpm']:.0f} rpm",
                f"relative compression (strongest = 100 %): {rel}"]
    line = (f"mean {_depth(channel['mean_kpa'], unit)} below ambient, pulsation "
            f"{_depth(channel['pulsation_kpa'], unit)}")
    if channel.get("dip_kpa") is not None:
        line += (f"; one place of the cycle {_depth(channel['dip_kpa'], unit)} lower over "
                 f"{channel['cycles']} cycles")
    return [line]


def capture_summary(head: str, derived: dict[str, Any], described: dict[str, str],
                    readings: list[dict[str, Any]], unit: str, panel_id: str) -> html.Div:
    """Channels with what each gave, the readings the test gets, and fleetdb's findings.

    :param head: the first line (file, samples, rate; the test it belongs to).
    :param derived: ``StoredCapture.derived`` or the ``channels``/``findings`` of a report.
    :param described: column -> ``Channel.describe()``.
    :param readings: ``[{kind, cylinder, value, units}]`` as logged.
    :param unit: the pressure unit shown.
    :param panel_id: the id of the summary.
    """
    channels = [html.Li([html.Strong(described.get(c["column"], c["column"])),
                         html.Ul([html.Li(line) for line in channel_lines(c, unit)])])
                for c in derived.get("channels", [])]
    shown = "; ".join(
        f"{r['kind'].replace('_', ' ')}{'' if r['cylinder'] is None else ' ' + str(r['cylinder'])}"
        f" {float(r['value']):g} {r['units']}" for r in readings)
    findings = [html.Li([html.Strong(f"{f['code']}: "), f["text"]])
                for f in derived.get("findings", [])]
    return html.Div([
        html.P(head, className="capture-head"),
        html.Ul(channels, className="capture-channels"),
        html.P([html.Strong("Readings of the test: "), shown or "none"]),
        html.Div([html.Strong("Findings of the capture: "),
                  html.Ul(findings, className="findings") if findings else "none"]),
    ], id=panel_id, className="capture-summary")


def stored_readings(derived: dict[str, Any]) -> list[dict[str, Any]]:
    """The readings a stored capture gave (``derived["readings"]``: TypedReading fields)."""
    return [{"kind": r["kind"], "cylinder": r["cylinder"], "value": r["value"],
             "units": r["units"]} for r in derived.get("readings", [])]


# -- Log a test: upload, channel map, preview -------------------------------------------------

def capture_part() -> html.Section:
    """The upload and the channel map (hidden while readings are typed)."""
    limit = capture_data.MAX_UPLOAD_BYTES / 1e6
    return html.Section([
        html.H2("Capture file"),
        html.P(["A plain CSV of samples: a header line, a time column and one or more channel "
                "columns, one sample per line, decimals with a point. ",
                html.Strong(f"Uploads here take up to {limit:.0f} MB"), "; for a larger "
                "recording use the command line, which reads any size in chunks: ",
                html.Code("fleetdb capture FILE --unit FLEET_NO --channel ..."),
                " (README, Captures)."],
               className="hint"),
        dcc.Upload(id=ids.LOG_CAPTURE_UPLOAD, max_size=capture_data.MAX_UPLOAD_BYTES,
                   accept=".csv,text/csv,text/plain", className="upload",
                   className_reject="upload upload-reject",
                   children=html.Div(["Drop a capture CSV here, or ",
                                      html.Span("choose a file", className="upload-link")])),
        html.Div(id=ids.LOG_CAPTURE_FILE, **{"aria-live": "polite"}),
        dcc.Store(id=ids.LOG_CAPTURE_KEY),
        html.Div(id=ids.LOG_CAPTURE_MAP),
        html.Div([
            components.field("Firing order", dcc.Input(
                id=ids.LOG_CAPTURE_FIRING, type="text", debounce=True, autoComplete="off"),
                hint="like 1-3-4-2; needed once for a starter-current channel (kept for the "
                     "engine family)"),
            components.field("Cylinder of the first hump", dcc.Input(
                id=ids.LOG_CAPTURE_FIRST_HUMP, type="text", debounce=True, autoComplete="off"),
                hint="only when no pressure channel of a known cylinder syncs the humps"),
        ], className="field-grid"),
    ], id=ids.LOG_CAPTURE_PART, className="panel", hidden=True)


def capture_actions() -> html.Div:
    """Preview and save of the capture's test (hidden while readings are typed)."""
    return html.Div([
        html.Button("Preview", id=ids.LOG_CAPTURE_PREVIEW, n_clicks=0,
                    className="button-secondary"),
        html.Div(id=ids.LOG_CAPTURE_PREVIEW_OUT, **{"aria-live": "polite"}),
        html.Button("Save capture test", id=ids.LOG_CAPTURE_SAVE, n_clicks=0,
                    className="button-primary"),
        html.Div(id=ids.LOG_CAPTURE_SAVE_RESULT, **{"aria-live": "polite"}),
        html.Div(id=ids.LOG_CAPTURE_VERDICT),
    ], id=ids.LOG_CAPTURE_ACTIONS, hidden=True)


def _cell(name: str, words: str, control: Any) -> html.Td:
    """A cell of the map whose control is labelled for screen readers (and tests)."""
    return html.Td(html.Label([html.Span(words, className="visually-hidden"), control]),
                   className=f"map-{name}")


def map_table(upload: dict[str, Any]) -> html.Table:
    """One row per column of the uploaded file: its role, cylinder, unit and scale."""
    head = html.Tr([html.Th(h, scope="col") for h in (
        "Column", "What it holds", "Cylinder", "Unit", "Scale: slope", "offset")])
    rows = []
    for i, (column, start) in enumerate(zip(upload["columns"],
                                            capture_data.default_roles(upload["columns"]),
                                            strict=True)):
        role = start["role"]
        rows.append(html.Tr([
            html.Th(column, scope="row", className="map-column"),
            _cell("role", f"What {column} holds", dcc.Dropdown(
                id=ids.log_capture_field("role", i), value=role, clearable=False,
                searchable=False, options=[{"label": w, "value": r}
                                           for r, w in capture_data.ROLES.items()])),
            _cell("cylinder", f"Cylinder of {column}", dcc.Input(
                id=ids.log_capture_field("cylinder", i), type="text", debounce=True,
                autoComplete="off", disabled=True, className="cyl-input")),
            _cell("unit", f"Unit of {column}", dcc.Dropdown(
                id=ids.log_capture_field("unit", i), value=start["unit"], clearable=False,
                searchable=False, options=unit_options(role))),
            _cell("slope", f"Scale slope of {column}", dcc.Input(
                id=ids.log_capture_field("slope", i), type="text", debounce=True,
                autoComplete="off", placeholder="1", className="scale-input")),
            _cell("offset", f"Scale offset of {column}", dcc.Input(
                id=ids.log_capture_field("offset", i), type="text", debounce=True,
                autoComplete="off", placeholder="0", className="scale-input")),
        ], className="map-row", **{"data-column": column}))
    return html.Table([html.Caption("Channel map: what each column holds. A scale turns the "
                                    "recorded volts into the unit: value = slope × raw + "
                                    "offset."), html.Thead(head), html.Tbody(rows)],
                      className="capture-map")


def unit_options(role: str) -> list[dict[str, str]]:
    """The units a role takes, as dropdown options (``-abs``: an absolute transducer)."""
    words = {"us": "µs", "A": "A"}
    return [{"label": words.get(u, u.replace("-abs", " absolute")), "value": u}
            for u in capture_data.ROLE_UNITS[role]]


def upload_text(upload: dict[str, Any]) -> html.P:
    """What arrived: the file's name, size and columns."""
    return html.P([f"✓ {upload['name']}: {upload['size'] / 1e6:.2f} MB, columns ",
                   ", ".join(upload["columns"]), ". Map the columns, then Preview."],
                  className="ok")
