"""The Overhaul plan page in a real browser, on the demo fleet as of 2026-12-01.

The planner opens the page, sees the four worn units of the demo's stories (LT-902, LV-903,
LV-933 at act and GS-901 at plan, all at Saltgrass Quay: demo_fleet/README.md), tries more
capacity and a shorter parts lead time at Saltgrass Quay (nothing stored), then commits.
What the page must show is asked of ``fleetdb.plan`` under the same settings, never typed
in here. A screenshot of each step is saved under the test's tmp_path.
"""

from __future__ import annotations

import datetime as dt
import re
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import text

from dashboard import data
from fleetdb import db, health
from fleetdb import plan as P
from tests.conftest import copy_store

pytestmark = pytest.mark.browser

DAY = dt.date(2026, 12, 1)
SITE = "Saltgrass Quay"


@pytest.fixture(scope="module")
def store_url(demo_file: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """A copy of the session's demo store as of DAY (overrides conftest's store_url)."""
    url = copy_store(demo_file, tmp_path_factory.mktemp("demo"))
    engine = db.get_engine(url)
    yield url
    engine.dispose()
    data.unit_engine.cache_clear()


def plans_stored(url: str) -> int:
    with db.get_engine(url).connect() as conn:
        return int(conn.execute(text("SELECT COUNT(*) FROM overhaul_plan")).scalar_one())


def wait_for_text(page: Any, selector: str, pattern: str) -> None:
    page.wait_for_function(
        "([sel, pat]) => { const el = document.querySelector(sel);"
        " return new RegExp(pat).test(el?.innerText ?? el?.textContent ?? ''); }",
        arg=[selector, pattern])


def job_rows(page: Any) -> dict[str, list[str]]:
    """Fleet number -> the cells of its row in the table of overhauls."""
    rows = page.locator("#plan-jobs table tbody tr")
    cells = [rows.nth(n).locator("td").all_inner_texts() for n in range(rows.count())]
    return {c[0].strip(): [x.strip() for x in c] for c in cells}


def expected(url: str, settings: P.ShopSettings) -> dict[str, tuple[str, int]]:
    """fleetdb's own schedule: fleet number -> (booked ISO week, lateness in weeks)."""
    made = P.make_plan(db.get_engine(url), DAY, settings)
    return {j.fleet_no: (j.week, int(j.lateness_weeks)) for j in made.jobs.itertuples()}


def shown(page: Any) -> dict[str, tuple[str, int]]:
    """The page's schedule in the same shape, read from the table's words."""
    out = {}
    for fleet_no, cells in job_rows(page).items():
        late = re.search(r"late by (\d+) wk", cells[5])
        early = re.search(r"(\d+) wk before", cells[5])
        out[fleet_no] = (cells[4], int(late[1]) if late else -int(early[1]) if early else 0)
    return out


def test_planner_tries_settings_then_commits(page: Any, store_url: str,
                                             tmp_path: Path) -> None:
    page.goto(f"/plan?as_of={DAY}")
    wait_for_text(page, "#plan-jobs", "GS-901")
    page.locator("#plan-timeline .main-svg").first.wait_for()
    wait_for_text(page, "#plan-timeline", "late by")
    page.screenshot(path=str(tmp_path / "plan-in-force.png"), full_page=True)
    defaults = expected(store_url, P.ShopSettings())
    assert set(defaults) == {"LT-902", "LV-903", "LV-933", "GS-901"}
    assert shown(page) == defaults
    assert {r[2].split()[-1] for r in job_rows(page).values()} == {"act", "plan"}
    timeline = page.locator("#plan-timeline").text_content()
    assert all(fleet_no in timeline for fleet_no in defaults)
    late_before = sum(1 for _, lateness in defaults.values() if lateness > 0)
    assert re.search(rf"Late units\s*{late_before}:", page.locator("#plan-summary").inner_text())
    assert plans_stored(store_url) == 0

    # What if Saltgrass Quay took 4 overhauls a week? Shown, compared, not stored.
    page.get_by_label(f"Capacity at {SITE}").fill("4")
    page.get_by_role("button", name="Try these settings").click()
    wait_for_text(page, "#plan-state", "What-if")
    roomier = expected(store_url, P.ShopSettings(capacity={SITE: 4}))
    wait_for_text(page, "#plan-changes", "Moves")
    assert shown(page) == roomier != defaults
    worst = (max(v[1] for v in defaults.values()), max(v[1] for v in roomier.values()))
    assert worst[1] < worst[0]
    assert f"{worst[0]} wk → {worst[1]} wk" in page.locator("#plan-changes").inner_text()
    assert plans_stored(store_url) == 0

    # Parts on the shelf too: fewer units run late.
    page.get_by_label(f"Parts lead time at {SITE}").fill("0")
    page.get_by_role("button", name="Try these settings").click()
    settings = P.ShopSettings(capacity={SITE: 4}, lead_weeks={SITE: 0})
    on_shelf = expected(store_url, settings)
    late_after = sum(1 for _, lateness in on_shelf.values() if lateness > 0)
    assert late_after < late_before
    wait_for_text(page, "#plan-changes", rf"Late units\s*{late_before} → {late_after}")
    assert shown(page) == on_shelf
    page.screenshot(path=str(tmp_path / "plan-what-if.png"), full_page=True)
    assert plans_stored(store_url) == 0

    # Commit: stored, booked, shown as the plan in force.
    page.get_by_label("Committed by").fill("browser planner")
    page.get_by_role("button", name="Commit this plan").click()
    wait_for_text(page, "#plan-state", "Stored: committed plan 1 by browser planner")
    assert plans_stored(store_url) == 1
    engine = db.get_engine(store_url)
    ids = {r["fleet_no"]: r["unit_id"] for r in health.board(engine, DAY)["rows"]}
    booked = P.bookings(engine, DAY)
    assert booked == {ids[f]: P.parse_week(week) for f, (week, _) in on_shelf.items()}
    with page.expect_download() as download:
        page.get_by_role("button", name="Download CSV").click()
    csv_text = Path(download.value.path()).read_text()
    assert download.value.suggested_filename == "overhaul-plan-2026-W49-plan1.csv"
    assert len(csv_text.splitlines()) == 1 + len(on_shelf)
    page.screenshot(path=str(tmp_path / "plan-committed.png"), full_page=True)


def test_bad_week_text_is_refused_in_words(page: Any, store_url: str, tmp_path: Path) -> None:
    page.goto(f"/plan?as_of={DAY}")
    wait_for_text(page, "#plan-jobs", "GS-901")
    before = (plans_stored(store_url), page.locator("#plan-jobs").inner_text())
    page.get_by_label(f"Closed weeks at {SITE}").fill("2026-W60")
    page.get_by_role("button", name="Try these settings").click()
    wait_for_text(page, "#plan-message", "is not an ISO week")
    page.screenshot(path=str(tmp_path / "plan-refused.png"), full_page=True)
    message = page.locator("#plan-message").inner_text()
    assert f"Closed weeks at {SITE}: '2026-W60' is not an ISO week" in message
    assert (plans_stored(store_url), page.locator("#plan-jobs").inner_text()) == before
