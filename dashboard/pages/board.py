"""Health board: the fleet manager's weekly review, worst first, paged on the server.

Every page of the table is one ``fleetdb.health.board(..., offset=, limit=)`` call on the
stored weekly snapshot; the browser only ever holds the rows it shows.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import dash
from dash import Input, Output, State, callback, ctx, dash_table, dcc, html, no_update

from dashboard import components, data, ids
from fleetdb import access

dash.register_page(__name__, path="/", name="Health board", title="Health board · fleetdb",
                   order=0)

COLUMNS: list[dict[str, Any]] = [
    {"id": "fleet_no", "name": "Fleet no.", "presentation": "markdown"},
    {"id": "site", "name": "Site"},
    {"id": "engine_family", "name": "Engine family"},
    {"id": "level", "name": "Level"},
    {"id": "reason", "name": "Main reason"},
    {"id": "limit_date", "name": "Limit reached around"},
    {"id": "hours_to_limit", "name": "Hours to limit"},
    {"id": "last_test", "name": "Last test"},
    {"id": "change", "name": "Since last week"},
]
_LEVEL_STYLES = [{"if": {"filter_query": f'{{level}} = "{components.level_text(level)}"',
                         "column_id": "level"}, "color": colour, "fontWeight": 700}
                 for level, colour in (("act", "#8a1c1c"), ("plan", "#8a5200"),
                                       ("retest", "#5c3a8a"), ("watch", "#6b6200"),
                                       ("sound", "#1d6b3a"))]


def _filter(label: str, control: Any) -> html.Div:
    return components.field(label, control, class_name="field filter")


def layout(as_of: str | None = None, site: str | None = None, family: str | None = None,
           level: str | None = None, search: str | None = None, **_query: Any) -> html.Div:
    """The page; cheap: the counts and rows are filled by one callback.

    The query string may preset the day and the filters (``/?as_of=2026-12-01&level=act``).
    """
    day = data.parse_day(as_of) or dt.date.today()
    return html.Div([
        dcc.Location(id=ids.BOARD_GO, refresh="callback-nav"),
        html.Div([
            html.H1("Health board"),
            components.field("As of", dcc.DatePickerSingle(
                id=ids.BOARD_AS_OF, date=day.isoformat(), display_format="YYYY-MM-DD",
                first_day_of_week=1, clearable=False), class_name="field as-of"),
        ], className="page-head"),
        html.P(id=ids.BOARD_WEEK, className="hint"),
        html.Div([
            html.Section([html.H2("Units per level"), html.Div(id=ids.BOARD_COUNTS)],
                         className="panel"),
            html.Section([html.H2("Per site"), html.Div(id=ids.BOARD_SITES)],
                         className="panel"),
        ], className="board-summary"),
        html.Section([
            html.Div([
                _filter("Site", dcc.Dropdown(id=ids.BOARD_SITE, value=site,
                                             placeholder="every site")),
                _filter("Engine family", dcc.Dropdown(id=ids.BOARD_FAMILY, value=family,
                                                      placeholder="every family")),
                _filter("Level", dcc.Dropdown(id=ids.BOARD_LEVEL, value=level,
                                              options=components.level_options(),
                                              placeholder="every level")),
                _filter("Fleet number contains", dcc.Input(
                    id=ids.BOARD_SEARCH, type="search", value=search or "", debounce=0.4,
                    autoComplete="off", placeholder="e.g. LT-9")),
                html.Button("Export CSV", id=ids.BOARD_EXPORT, n_clicks=0,
                            className="button-secondary",
                            title="Every row of the filtered board, as a CSV file",
                            hidden=not access.current().may("export")),
            ], className="filters"),
            html.P(id=ids.BOARD_SHOWING, className="hint", **{"aria-live": "polite"}),
            dash_table.DataTable(
                id=ids.BOARD_TABLE, columns=COLUMNS, data=[], page_action="custom",
                page_current=0, page_size=data.BOARD_PAGE_SIZE, page_count=1,
                sort_action="none", filter_action="none", cell_selectable=True,
                markdown_options={"link_target": "_self"}, style_as_list_view=True,
                css=[{"selector": ".dash-spreadsheet td", "rule": "cursor: pointer;"}],
                style_header={"fontWeight": 700, "backgroundColor": "#f3f5f7",
                              "whiteSpace": "normal"},
                style_cell={"textAlign": "left", "whiteSpace": "normal", "height": "auto",
                            "fontFamily": 'system-ui, -apple-system, "Segoe UI", Roboto, '
                                          '"Noto Sans", sans-serif', "fontSize": "0.92rem",
                            "padding": "0.35rem 0.5rem", "maxWidth": "22rem"},
                style_cell_conditional=[
                    {"if": {"column_id": "reason"}, "minWidth": "18rem"},
                    {"if": {"column_id": ["level", "last_test", "hours_to_limit"]},
                     "whiteSpace": "nowrap"}],
                style_data_conditional=_LEVEL_STYLES),
            dcc.Download(id=ids.BOARD_DOWNLOAD),
        ], className="panel"),
    ])


def _filters(as_of: str | None, site: str | None, family: str | None, level: str | None,
             search: str | None) -> data.BoardFilters:
    return data.BoardFilters(as_of=data.parse_day(as_of), site=site, family=family,
                             level=level, search=search)


def week_text(board: dict[str, Any]) -> str:
    """Which week is shown and which week the changes are against."""
    against = (f"changes are against the week of {board['previous_week_start']}"
               if board.get("previous_week_start")
               else "no snapshot of the week before, so no changes are shown")
    return (f"Week of {board['week_start']} (as of {board['as_of']}); {against}. "
            "Worst first; click a row to open the unit.")


def showing_text(board: dict[str, Any], page: int) -> str:
    """``Showing 26–50 of 1,204 units`` (or that none match)."""
    total = board["total"]
    if not total:
        return "No unit matches these filters."
    first = page * data.BOARD_PAGE_SIZE + 1
    return f"Showing {first:,}–{first + len(board['rows']) - 1:,} of {total:,} units"


# -- callbacks --------------------------------------------------------------------------------

_FILTER_INPUTS = {"as_of": Input(ids.BOARD_AS_OF, "date"), "site": Input(ids.BOARD_SITE, "value"),
                  "family": Input(ids.BOARD_FAMILY, "value"),
                  "level": Input(ids.BOARD_LEVEL, "value"),
                  "search": Input(ids.BOARD_SEARCH, "value")}


@callback(Output(ids.BOARD_SITE, "options"), Output(ids.BOARD_FAMILY, "options"),
          Input(ids.BOARD_AS_OF, "date"))
def _filter_options(_day: str | None) -> tuple[list[str], list[str]]:
    return data.sites_and_families(data.current_url())


@callback(output={"counts": Output(ids.BOARD_COUNTS, "children"),
                  "sites": Output(ids.BOARD_SITES, "children"),
                  "week": Output(ids.BOARD_WEEK, "children"),
                  "rows": Output(ids.BOARD_TABLE, "data"),
                  "pages": Output(ids.BOARD_TABLE, "page_count"),
                  "page": Output(ids.BOARD_TABLE, "page_current"),
                  "showing": Output(ids.BOARD_SHOWING, "children")},
          inputs={**_FILTER_INPUTS, "page": Input(ids.BOARD_TABLE, "page_current")})
def _show_board(as_of: str | None, site: str | None, family: str | None, level: str | None,
                search: str | None, page: int | None) -> dict[str, Any]:
    # A new filter starts again at the first page; only the pager keeps its page (and
    # leaves the counts above the table as they are: they do not depend on the page).
    paging = ctx.triggered_id == ids.BOARD_TABLE
    page = (page or 0) if paging else 0
    board = data.board(data.current_url(), _filters(as_of, site, family, level, search),
                       offset=page * data.BOARD_PAGE_SIZE)
    return {"counts": no_update if paging else components.level_counts(board["counts"]),
            "sites": no_update if paging else components.site_level_table(
                board["counts_by_site"]),
            "week": no_update if paging else week_text(board),
            "rows": components.board_table_rows(board["rows"], board["as_of"]),
            "pages": max(1, -(-board["total"] // data.BOARD_PAGE_SIZE)), "page": page,
            "showing": showing_text(board, page)}


@callback(Output(ids.BOARD_GO, "href"), Input(ids.BOARD_TABLE, "active_cell"),
          State(ids.BOARD_AS_OF, "date"), prevent_initial_call=True)
def _open_unit(cell: dict[str, Any] | None, as_of: str | None) -> Any:
    if not cell or not cell.get("row_id"):
        return no_update
    return components.unit_href(cell["row_id"], as_of)


@callback(Output(ids.BOARD_DOWNLOAD, "data"),
          inputs={"_clicks": Input(ids.BOARD_EXPORT, "n_clicks")},
          state={"as_of": State(ids.BOARD_AS_OF, "date"), "site": State(ids.BOARD_SITE, "value"),
                 "family": State(ids.BOARD_FAMILY, "value"),
                 "level": State(ids.BOARD_LEVEL, "value"),
                 "search": State(ids.BOARD_SEARCH, "value")},
          prevent_initial_call=True)
def _export(_clicks: int, as_of: str | None, site: str | None, family: str | None,
            level: str | None, search: str | None) -> dict[str, Any]:
    filters = _filters(as_of, site, family, level, search)
    day = (filters.as_of or dt.date.today()).isoformat()
    return dcc.send_string(data.board_csv(data.current_url(), filters),
                           f"health-board-{day}.csv")
