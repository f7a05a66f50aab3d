"""The app factory: ``create_app(database_url)`` builds one Dash Pages app per call."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import dash
from dash import Dash, Input, Output, callback, dcc, html

from dashboard import auth as auth_mod
from dashboard import data, ids
from fleetdb import access, config, db, migrate, users

PACKAGE_DIR = Path(__file__).resolve().parent


def create_app(database_url: str, *, auth: bool = True,
               session_limits: users.SessionLimits | None = None) -> Dash:
    """A new dashboard app on the store at ``database_url``.

    The URL is kept in ``app.server.config`` (every worker process reads it there; no
    callback changes it). The store must be at the newest schema (``fleetdb init``).

    :param database_url: a SQLAlchemy URL or a SQLite file path.
    :param auth: ask for a login and check each request's role on the server
        (:mod:`dashboard.auth`); ``False`` only for a server on this computer (``--no-auth``)
        and for tests that are not about users.
    :param session_limits: idle and absolute session limits (default 30 min, 12 h).
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
    auth_mod.install(app.server, enabled=auth, limits=session_limits or users.SessionLimits())
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
            _who(),
        ], className="top"),
        html.Main(dash.page_container, className="page"),
    ], className="shell")


def _who() -> html.Div:
    """Who is logged in, with the logout button; or that nobody needs to."""
    user = auth_mod.current_user_line()
    if user is None:
        return html.Div("No login: this computer only", id=ids.APP_USER, className="who")
    return html.Div([
        html.Span(f"{user[0]} ({user[1]})", className="who-name"),
        html.Form(html.Button("Log out", type="submit", id=ids.APP_LOGOUT,
                              className="button-secondary"),
                  method="POST", action="/logout", className="logout"),
    ], id=ids.APP_USER, className="who")


def nav_links(pathname: str | None) -> list[Any]:
    """One link per registered page the user may use, in page order; the current one marked.

    :param pathname: the path shown now (None before the browser reports it).
    """
    actor = access.current()
    pages = sorted((p for p in dash.page_registry.values()
                    if actor.may(auth_mod.PAGE_RIGHTS.get(p["path"], "read"))
                    and not p.get("hidden_in_nav")),
                   key=lambda p: (p.get("order") or 0, p["path"]))
    return [dcc.Link(p["name"], href=p["relative_path"],
                     className="nav-link current" if p["path"] == pathname else "nav-link")
            for p in pages]


def _register_shell_callbacks() -> None:
    # Registered per app: dash hands the global callback list to the first app that serves.
    @callback(Output(ids.NAV, "children"), Input(ids.APP_URL, "pathname"))
    def _mark_current_page(pathname: str | None) -> list[Any]:
        return nav_links(pathname)
