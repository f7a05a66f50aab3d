"""Real-browser harness: Playwright driving Debian's Chromium against the app in-process.

One browser per test session, one browser context per test. The app under test is served
by werkzeug on 127.0.0.1 (port 0: a free port) from a daemon thread and shut down after
the test. Without /usr/bin/chromium or the playwright package the tests skip and say
why; when the environment variable CI is "true" that skip is a failure instead.
Never run ``playwright install``: it downloads a browser; we use the system's.
"""

from __future__ import annotations

import contextlib
import os
import re
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import text

from dashboard import create_app, data
from fleetdb import db, ingest, migrate
from tests.conftest import served

CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_FLAGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    # No outside DNS at all; the EXCLUDEs keep the local server reachable.
    "--host-resolver-rules=MAP * ~NOTFOUND , EXCLUDE localhost , EXCLUDE 127.0.0.1",
]
DATA = Path(__file__).resolve().parent.parent / "data"
#: Longest wait for one thing to appear on the page (ms); a hang fails instead of stalling.
WAIT_MS = 15_000


def skip_or_fail(reason: str) -> None:
    """Skip with ``reason``; under CI (CI=true) every browser test must run, so fail."""
    if os.environ.get("CI", "").strip().lower() == "true":
        pytest.fail(f"browser tests are required in CI: {reason}")
    pytest.skip(reason)


@pytest.fixture(scope="session")
def browser() -> Iterator[Any]:
    """One headless Chromium for the whole session."""
    if not CHROMIUM.exists():
        skip_or_fail(f"{CHROMIUM} is missing (apt-get install chromium)")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        skip_or_fail("the playwright package is missing (pip install -e '.[test]')")
    with sync_playwright() as pw:
        chromium = pw.chromium.launch(executable_path=str(CHROMIUM), headless=True,
                                      args=CHROMIUM_FLAGS)
        yield chromium
        chromium.close()


@pytest.fixture
def store_url(tmp_path: Path) -> Iterator[str]:
    """A SQLite store at the newest schema holding tests/data's fleet and tests."""
    url = f"sqlite:///{tmp_path / 'fleet.sqlite'}"
    migrate.upgrade(url)
    ingest.import_files(db.get_engine(url), [DATA / "fleet.csv", DATA / "tests.csv"],
                        by="browser-test")
    yield url
    db.get_engine(url).dispose()
    data.unit_engine.cache_clear()


@contextlib.contextmanager
def opened_tab(browser: Any, base_url: str) -> Iterator[Any]:
    """A fresh browser context and page on ``base_url``; fails the test on a JavaScript
    error and closes the context after."""
    context = browser.new_context(base_url=base_url, viewport={"width": 1280, "height": 900})
    context.set_default_timeout(WAIT_MS)
    tab = context.new_page()
    errors: list[str] = []
    tab.on("pageerror", lambda exc: errors.append(str(exc)))
    yield tab
    context.close()
    assert errors == [], f"JavaScript errors on the page: {errors}"


@pytest.fixture
def live_server(store_url: str) -> Iterator[str]:
    """The dashboard on this test's store, served in-process; yields its base URL."""
    with served(create_app(store_url, auth=False), "dash-under-test") as url:
        yield url


@pytest.fixture
def page(browser: Any, live_server: str) -> Iterator[Any]:
    """A fresh browser context and page on the live app; the context is closed after."""
    with opened_tab(browser, live_server) as tab:
        yield tab


@pytest.fixture
def count_rows(store_url: str) -> Any:
    """``count_rows(table)``: how many rows a table of this test's store holds now."""
    def count(table: str) -> int:
        assert table in ("test", "reading", "import_batch")
        with db.get_engine(store_url).connect() as conn:
            return int(conn.execute(text(f"SELECT COUNT(*) FROM {table}")).scalar_one())
    return count


def pick_unit(page: Any, dropdown_id: str, fleet_no: str) -> None:
    """Open a fleet-number type-ahead, search for ``fleet_no`` and choose the unit offered.

    The search box gets the whole text at once (``fill``): keys typed one by one at machine
    speed can be lost while the dropdown's search box is still opening (seen: "T-101"
    arrived as "T101"); a person types far slower.
    """
    page.locator(f"#{dropdown_id}").click()
    search = page.locator("input.dash-dropdown-search")
    search.wait_for(state="visible")
    search.fill(fleet_no)
    page.get_by_role("option", name=re.compile(f"^{re.escape(fleet_no)} ")).click()
