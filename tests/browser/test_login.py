"""Login, role-shaped pages, the audit trail and logout in a real browser (headless Chromium).

The app is served with login on (``create_app(url, auth=True)``) on tests/data's store with
one technician and one planner.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest

from dashboard import create_app
from fleetdb import db, users
from tests.browser.conftest import opened_tab
from tests.conftest import served

pytestmark = pytest.mark.browser

PASSWORDS = {"tom": "technician pw", "pat": "planner pw"}


@pytest.fixture
def login_server(store_url: str) -> Iterator[str]:
    """The dashboard with login on, served in-process; yields its base URL."""
    engine = db.get_engine(store_url)
    users.add_user(engine, "tom", "technician", PASSWORDS["tom"])
    users.add_user(engine, "pat", "planner", PASSWORDS["pat"])
    with served(create_app(store_url, auth=True), "dash-login") as url:
        yield url


@pytest.fixture
def tab(browser: Any, login_server: str) -> Iterator[Any]:
    with opened_tab(browser, login_server) as page:
        yield page


def _log_in(tab: Any, name: str, password: str) -> None:
    tab.fill("#login-name", name)
    tab.fill("#login-password", password)
    tab.click("#login-submit")


def test_login_trail_and_logout(tab: Any, tmp_path: Any) -> None:
    tab.goto("/trail?fleet_no=T-101")
    assert "/login" in tab.url  # no session: the login page, and back afterwards
    _log_in(tab, "tom", "wrong password")
    tab.wait_for_selector("text=Wrong name or password")
    _log_in(tab, "tom", PASSWORDS["tom"])
    tab.wait_for_selector("text=tom (technician)")
    assert tab.url.endswith("/trail?fleet_no=T-101")
    cookie = next(c for c in tab.context.cookies() if c["name"] == "fleetdb_session")
    assert cookie["httpOnly"] and cookie["sameSite"] == "Lax"
    assert tab.evaluate("document.cookie").find("fleetdb_session") == -1  # not for scripts
    tab.wait_for_selector("table.trail >> text=browser-test")  # the import, and who did it
    nav = tab.inner_text("#app-nav")
    assert "Log a test" in nav and "Audit trail" in nav
    assert tab.is_hidden("#trail-export")  # a technician does not export
    tab.screenshot(path=str(tmp_path / "trail-technician.png"))
    tab.click("#app-logout")
    tab.wait_for_url("**/login")
    tab.goto("/")
    assert "/login" in tab.url  # the session is over


def test_a_planner_sees_commit_and_exports(tab: Any) -> None:
    tab.goto("/plan")
    _log_in(tab, "pat", PASSWORDS["pat"])
    tab.wait_for_selector("text=pat (planner)")
    tab.wait_for_selector("#plan-commit")
    assert tab.is_visible("#plan-commit") and tab.is_visible("#plan-csv")
    assert tab.is_hidden("#plan-who")  # the committer is the logged-in user
