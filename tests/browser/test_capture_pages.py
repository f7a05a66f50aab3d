"""Captures in a real browser: a unit's stored capture on Unit history (waveform, events,
zoom), and a capture uploaded, mapped, previewed and saved on Log a test.

The capture is tests/test_capture_store.py's physics-based synthetic recording of T-101
(tests/data/fleet.csv); what the pages must show is fleetdb's own derivation of it
(``capture_store``), not the dashboard's. Screenshots are saved under each test's tmp_path.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import pytest

from fleetdb import capture_store, db
from tests.browser.conftest import pick_unit
from tests.test_capture_store import _channels, _recording, write_capture

pytestmark = pytest.mark.browser

#: Points plotly holds for the first channel of a graph (the thinned or zoomed trace).
FIRST_TRACE_POINTS = ("(document.querySelector('#{id} .js-plotly-plot')?._fullData?.[0]?.x"
                      "?.length ?? 0)")


def test_unit_page_shows_a_capture_and_zooms_in(page: Any, store_url: str,
                                                tmp_path: Path) -> None:
    report = capture_store.capture_test(
        db.get_engine(store_url), write_capture(tmp_path / "crank.csv"), "T-101",
        "2024-07-01 08:30", 1300, _channels(), firing_order=(1, 3, 4, 2),
        conditions={"throttle_open": "yes", "battery_v": "10.4"}, by="browser-test")
    page.goto("/unit?fleet_no=T-101")
    panel = page.locator("#unit-capture-panel")
    panel.wait_for(state="visible")
    page.locator("#unit-capture-waveform .main-svg").first.wait_for()
    page.locator("#unit-capture-events .main-svg").first.wait_for()
    pressure = report.analysis.channels[0]
    summary = page.locator("#unit-capture-summary")
    summary.get_by_text(f"{pressure['events']} compression events").wait_for()
    assert "intake-stroke depression" in summary.inner_text()
    assert "crank.csv" in page.locator("#unit-capture-pick").inner_text()
    panel.scroll_into_view_if_needed()
    page.screenshot(path=str(tmp_path / "unit-capture.png"), full_page=True)

    points = FIRST_TRACE_POINTS.format(id="unit-capture-waveform")
    page.wait_for_function(f"{points} > 0")
    thinned = page.evaluate(points)
    assert thinned < len(_recording())
    # Drag across a narrow stretch of the pressure row: plotly zooms, the page asks for that
    # window again and gets every sample in it (more points than the thinned view there).
    box = page.locator("#unit-capture-waveform .nsewdrag").first.bounding_box()
    y = box["y"] + box["height"] / 2
    page.mouse.move(box["x"] + box["width"] * 0.40, y)
    page.mouse.down()
    page.mouse.move(box["x"] + box["width"] * 0.44, y, steps=8)
    page.mouse.up()
    page.wait_for_function(f"{points} !== {thinned}")
    zoomed = page.evaluate("document.querySelector('#unit-capture-waveform .js-plotly-plot')"
                           ".layout.xaxis.range")
    shown = page.evaluate(points)
    rate = 5_000  # tests/test_capture_store.py RATE
    assert shown == pytest.approx((zoomed[1] - zoomed[0]) * rate, abs=4)
    page.screenshot(path=str(tmp_path / "unit-capture-zoomed.png"), full_page=True)


def _pick(page: Any, locator: Any, option: str) -> None:
    locator.click()
    page.get_by_role("option", name=option, exact=True).click()


def _map_row(page: Any, column: str) -> Any:
    return page.locator(f".map-row[data-column='{column}']")


def _type(page: Any, label: str, value: str) -> None:
    box = page.get_by_label(label, exact=True)
    box.fill(value)
    box.press("Tab")


def test_upload_map_preview_save_and_find_the_test(page: Any, tmp_path: Path,
                                                   count_rows: Any) -> None:
    path = write_capture(tmp_path / "crank-0701.csv")
    page.goto("/log")
    pick_unit(page, "log-unit", "T-101")
    page.locator("#log-source").get_by_text("a capture file", exact=False).click()
    page.locator("#log-capture-part").wait_for(state="visible")
    assert page.locator("#log-readings-panel").is_hidden()
    assert "20 MB" in page.locator("#log-capture-part").inner_text()
    assert page.locator("#log-safety").is_visible()  # the cautions stay in view
    page.locator("#log-capture-upload input[type=file]").set_input_files(str(path))
    _map_row(page, "trigger").wait_for()

    _pick(page, _map_row(page, "p1").locator(".map-role"), "cylinder pressure")
    cylinder = _map_row(page, "p1").locator(".map-cylinder input")
    page.wait_for_function("() => !document.querySelector(\"[data-column='p1'] .map-cylinder "
                           "input\").disabled")
    cylinder.fill("1")
    cylinder.press("Tab")
    for box, value in ((".map-slope input", "250"), (".map-offset input", "-125")):
        _map_row(page, "p1").locator(box).fill(value)
        _map_row(page, "p1").locator(box).press("Tab")
    _pick(page, _map_row(page, "amps").locator(".map-role"), "starter current")
    _pick(page, _map_row(page, "vac").locator(".map-role"), "manifold vacuum, cranking")
    _type(page, "Firing order", "1-3-4-2")
    _type(page, "Date and time", "2024-07-01 08:30")
    _type(page, "Hour meter", "1300")
    _type(page, "Battery volts under crank", "10.4")
    page.locator("#log-throttle").get_by_text("yes", exact=True).click()
    _type(page, "Technician", "QA")
    before = count_rows("test")

    page.get_by_role("button", name="Preview").click()
    preview = page.locator("#log-capture-preview-out")
    preview.get_by_text("Preview: nothing is saved yet").wait_for()
    page.locator("#log-capture-waveform .main-svg").first.wait_for()
    page.locator("#log-capture-events .main-svg").first.wait_for()
    shown = preview.inner_text()
    assert "compression events" in shown and "relative compression" in shown
    assert "intake_depression_deep" in shown  # fleetdb's finding: the restricted intake
    assert count_rows("test") == before  # a preview writes nothing
    page.screenshot(path=str(tmp_path / "log-capture-preview.png"), full_page=True)

    page.get_by_role("button", name="Save capture test").click()
    saved = page.locator("#log-capture-save-result")
    saved.locator(":is(.saved, .alert)").wait_for()
    words = saved.inner_text()
    assert re.search(r"Saved as test \d+ for T-101 with capture \d+", words), words
    assert count_rows("test") == before + 1
    page.screenshot(path=str(tmp_path / "log-capture-saved.png"), full_page=True)

    saved.get_by_role("link", name="See it on the unit's history").click()
    page.locator("#unit-capture-panel").wait_for(state="visible")
    page.locator("#unit-capture-summary").get_by_text("crank-0701.csv").wait_for()
    page.locator("#unit-capture-waveform .main-svg").first.wait_for()
    assert re.search(r"test \d+ · 2024-07-01 08:30 · crank-0701\.csv",
                     page.locator("#unit-capture-pick").inner_text())


def test_bad_map_is_refused_on_the_page(page: Any, tmp_path: Path, count_rows: Any) -> None:
    path = write_capture(tmp_path / "crank.csv")
    page.goto("/log")
    pick_unit(page, "log-unit", "T-101")
    page.locator("#log-source").get_by_text("a capture file", exact=False).click()
    page.locator("#log-capture-upload input[type=file]").set_input_files(str(path))
    _map_row(page, "trigger").wait_for()
    _pick(page, _map_row(page, "p1").locator(".map-role"), "cylinder pressure")
    page.wait_for_function("() => !document.querySelector(\"[data-column='p1'] .map-cylinder "
                           "input\").disabled")
    _map_row(page, "p1").locator(".map-cylinder input").fill("7")
    _map_row(page, "p1").locator(".map-cylinder input").press("Tab")
    _type(page, "Hour meter", "1300")
    before = count_rows("test")
    page.get_by_role("button", name="Save capture test").click()
    refused = page.locator("#log-capture-save-result")
    refused.locator(".alert").wait_for()
    assert "Not saved: nothing was written" in refused.inner_text()
    assert "crank.csv, column p1: cylinder 7 on a 4-cylinder engine" in refused.inner_text()
    assert count_rows("test") == before
    page.screenshot(path=str(tmp_path / "log-capture-refused.png"), full_page=True)
