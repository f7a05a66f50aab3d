"""The app factory: ``create_app(database_url)`` builds one Dash Pages app per call."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import dash
from dash import Dash, Input, Output, callback, dcc, html

from dashboard import data, ids
from fleetdb import config, db, migrate

PACKAGE_DIR = Path(__file__).resolve().parent


def create_app(database_url: str) -> Dash:
    """A new dashboard app on the store at ``database_url``.

    The URL is kept in ``app.server.config`` (every worker process reads it there; no
    callback changes it). The store must be at the newest schema (``fleetdb init``).

    :param database_url: a SQLAlchemy URL or a SQLite file path.
    :raises fleetdb.errors.SchemaOutOfDate: when the store needs ``fleetdb init``.
    """
    url = config.normalise_url(database_url)
    migrate.ensure_current(db.get_engine(url))
    app = Dash(
        "dashboard",
        use_pages=True,
        pages_folder=str(PACKAGE_DIR / "pages"),
        assets_folder=str(PACKAGE_DIR / "assets"),
        title="fleetdb",
        update_title=None,
    )
    app.server.config[data.URL_KEY] = url
    app.layout = _shell
    _register_shell_callbacks()
    return app


def _shell() -> html.Div:
    """The frame around every page: the name, the navigation, the page itself."""
    return html.Div([
        dcc.Location(id=ids.APP_URL),
        html.Header([
            html.Span("fleetdb", className="brand"),
            html.Nav(nav_links(None), id=ids.NAV, **{"aria-label": "Pages"}),
        ], className="top"),
        html.Main(dash.page_container, className="page"),
    ], className="shell")


def nav_links(pathname: str | None) -> list[Any]:
    """One link per registered page, in page order; the current one marked.

    :param pathname: the path shown now (None before the browser reports it).
    """
    pages = sorted(dash.page_registry.values(), key=lambda p: (p.get("order") or 0, p["path"]))
    return [dcc.Link(p["name"], href=p["relative_path"],
                     className="nav-link current" if p["path"] == pathname else "nav-link")
            for p in pages]


def _register_shell_callbacks() -> None:
    # Registered per app: dash hands the global callback list to the first app that serves.
    @callback(Output(ids.NAV, "children"), Input(ids.APP_URL, "pathname"))
    def _mark_current_page(pathname: str | None) -> list[Any]:
        return nav_links(pathname)
