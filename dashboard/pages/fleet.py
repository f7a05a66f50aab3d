"""Fleet wear: wear rates per engine family, a family's compression against hours, sites.

The fleet-level frames come from :func:`dashboard.data.fleet_wear` (the same fits as the
board): the whole fleet assessed on the first view of a day, then only the units written to
since; this module only draws them.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import dash
from dash import Input, Output, State, callback, dcc, html

from dashboard import components, data, figures, ids
from fleetdb.errors import UnitNotFound

dash.register_page(__name__, path="/fleet", name="Fleet wear", title="Fleet wear · fleetdb",
                   order=3)

_GRAPH_CONFIG = {"displaylogo": False, "modeBarButtonsToRemove": ["select2d", "lasso2d"]}


def layout(family: str | None = None, fleet_no: str | None = None, as_of: str | None = None,
           **_query: Any) -> html.Div:
    """The page; cheap: the figures are drawn by callbacks (``/fleet?family=...``)."""
    day = data.parse_day(as_of) or dt.date.today()
    return html.Div([
        html.H1("Fleet wear"),
        html.Div([
            components.field("Engine family", dcc.Dropdown(
                id=ids.FLEET_FAMILY, value=family, clearable=False,
                placeholder="Pick an engine family"), class_name="field filter filter-wide"),
            components.field("Highlight a unit", dcc.Dropdown(
                id=ids.FLEET_HIGHLIGHT, value=fleet_no, placeholder="Type a fleet number…",
                options=[{"label": fleet_no, "value": fleet_no}] if fleet_no else []),
                class_name="field filter filter-wide"),
            components.field("As of", dcc.DatePickerSingle(
                id=ids.FLEET_AS_OF, date=day.isoformat(), display_format="YYYY-MM-DD",
                first_day_of_week=1, clearable=False), class_name="field filter"),
            components.field("Pressure unit", dcc.RadioItems(
                id=ids.FLEET_PRESSURE_UNIT, options=list(data.PRESSURE_UNITS), value="psi",
                inline=True, className="radio"), class_name="field filter"),
        ], className="filters panel"),
        html.Section([
            dcc.Graph(id=ids.FLEET_WEAR, config=_GRAPH_CONFIG),
            html.P("Each marker is a unit placed at the wear rate of its fastest-wearing "
                   "cylinder (current wear line, since its last overhaul or valve, ring or "
                   "head work); triangles wear significantly faster than their family. Units "
                   "with too few tests for a line of their own are left out. The box holds "
                   "every unit; large families show a sample of markers.", className="hint"),
        ], className="panel"),
        html.Section([
            dcc.Graph(id=ids.FLEET_HOURS, config=_GRAPH_CONFIG),
            html.P("Trustworthy, non-voided tests only. The band and median cover every unit "
                   "of the family; a sample of units is drawn as grey lines.",
                   className="hint"),
        ], className="panel"),
        html.Section([
            dcc.Graph(id=ids.FLEET_SITES, config=_GRAPH_CONFIG),
            html.P(id=ids.FLEET_NOTE, className="hint"),
        ], className="panel"),
    ])


# -- callbacks --------------------------------------------------------------------------------

@callback(Output(ids.FLEET_FAMILY, "options"), Output(ids.FLEET_FAMILY, "value"),
          Input(ids.FLEET_AS_OF, "date"), Input(ids.FLEET_HIGHLIGHT, "value"),
          State(ids.FLEET_FAMILY, "value"))
def _choose_family(_day: str | None, fleet_no: str | None,
                   current: str | None) -> tuple[list[str], str | None]:
    # Highlighting a unit shows its own family; otherwise keep the choice (or the first).
    url = data.current_url()
    _, families = data.sites_and_families(url)
    if fleet_no:
        try:
            return families, data.unit_engine(url, fleet_no).engine_family
        except UnitNotFound:
            pass  # a fleet number from an old link: keep the family shown
    return families, current if current in families else (families[0] if families else None)


@callback(Output(ids.FLEET_HIGHLIGHT, "options"), Input(ids.FLEET_HIGHLIGHT, "search_value"),
          State(ids.FLEET_HIGHLIGHT, "value"))
def _offer_units(search: str | None, selected: str | None) -> list[dict[str, str]]:
    return data.unit_options(data.current_url(), search, selected)


@callback(Output(ids.FLEET_WEAR, "figure"), Input(ids.FLEET_AS_OF, "date"),
          Input(ids.FLEET_PRESSURE_UNIT, "value"), Input(ids.FLEET_HIGHLIGHT, "value"))
def _draw_wear(as_of: str | None, unit: str, fleet_no: str | None) -> Any:
    wear = data.fleet_wear(data.current_url(), data.parse_day(as_of)).wear
    return figures.family_wear_rates(wear, unit, highlight=fleet_no)


@callback(Output(ids.FLEET_HOURS, "figure"), Output(ids.FLEET_SITES, "figure"),
          Output(ids.FLEET_NOTE, "children"), Input(ids.FLEET_AS_OF, "date"),
          Input(ids.FLEET_FAMILY, "value"), Input(ids.FLEET_PRESSURE_UNIT, "value"),
          Input(ids.FLEET_HIGHLIGHT, "value"))
def _draw_family(as_of: str | None, family: str | None, unit: str,
                 fleet_no: str | None) -> tuple[Any, Any, str]:
    fleet = data.fleet_wear(data.current_url(), data.parse_day(as_of))
    if not family or family not in fleet.families.index:
        message = figures.message_figure("Pick an engine family.")
        return message, message, ""
    minimum = float(fleet.families.loc[family, "minimum_kpa"])
    tests = fleet.tests[fleet.tests["family"] == family]
    latest = fleet.latest[fleet.latest["family"] == family]
    return (figures.family_compression(tests, unit, minimum, family, highlight=fleet_no),
            figures.sites_compared(latest, unit, family), site_note(latest))


def site_note(latest: Any) -> str:
    """How far apart the sites' medians sit, as measured and at sea level, in words."""
    by_site = latest.groupby("site")[["mean_kpa", "mean_sl_kpa"]].median()
    if len(by_site) < 2:
        return "One site only: nothing to compare."
    raw, sea = (float(by_site[c].max() - by_site[c].min()) for c in ("mean_kpa", "mean_sl_kpa"))
    return (f"The sites' medians lie {raw:.0f} kPa apart as measured and {sea:.0f} kPa apart "
            "at sea level: the gauge reads lower where the air is thinner, and the sea-level "
            "equivalent (gauge × 101.325 kPa ÷ barometer) takes that part away; what remains "
            "is the engines' own difference (age, hours, wear).")
