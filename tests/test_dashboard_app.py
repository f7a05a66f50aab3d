"""The dashboard in-process: Flask's test client against a real SQLite store.

The Dash endpoints (/_dash-layout, /_dash-dependencies, /_dash-update-component) are
driven as the browser drives them (plotly/dash tests/integration/callbacks do the same).
The engine layouts expected below come from tests/data/fleet.csv (banks column).
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pint
import pytest

from dashboard import components, create_app, data, ids
from fleetdb import db, ingest, logbook, migrate
from fleetdb.errors import InvalidInput, SchemaOutOfDate

DATA = Path(__file__).parent / "data"


@pytest.fixture
def store_url(tmp_path: Path) -> Iterator[str]:
    """A SQLite store holding tests/data's fleet and tests."""
    url = f"sqlite:///{tmp_path / 'fleet.sqlite'}"
    migrate.upgrade(url)
    ingest.import_files(db.get_engine(url), [DATA / "fleet.csv", DATA / "tests.csv"], by="test")
    yield url
    db.get_engine(url).dispose()
    data.unit_engine.cache_clear()


@pytest.fixture
def client(store_url: str) -> Any:
    app = create_app(store_url)
    return app.server.test_client()


def _callback(client: Any, output_id: str) -> dict[str, Any]:
    deps = client.get("/_dash-dependencies").get_json()
    matches = [d for d in deps if f"{output_id}." in d["output"]]
    assert len(matches) == 1, [d["output"] for d in deps]
    return matches[0]


def _update(client: Any, output_id: str, inputs: list[dict[str, Any]],
            state: list[dict[str, Any]] | None = None) -> dict[str, Any]:
    """POST one callback as the renderer does and return its ``response`` mapping."""
    dep = _callback(client, output_id)
    outputs = [{"id": part.split(".")[0], "property": part.split(".")[1]}
               for part in dep["output"].strip(".").split("...")]
    body = {"output": dep["output"], "outputs": outputs if len(outputs) > 1 else outputs[0],
            "inputs": inputs, "state": state or [],
            "changedPropIds": [f"{inputs[0]['id']}.{inputs[0]['property']}"]}
    reply = client.post("/_dash-update-component", json=body)
    assert reply.status_code == 200, reply.data[:500]
    return reply.get_json()["response"]


def _walk(node: Any) -> Iterator[dict[str, Any]]:
    """Every serialised component under ``node``."""
    if isinstance(node, list):
        for item in node:
            yield from _walk(item)
    elif isinstance(node, dict) and "props" in node:
        yield node
        yield from _walk(node["props"].get("children"))


def _cylinder_rows(block: list[Any]) -> list[list[int]]:
    """The cylinder numbers of each bank row of a laid-out engine block."""
    return [[c["props"]["id"]["index"] for c in _walk(row) if ids.is_log_cylinder(
        c["props"].get("id"))] for row in block]


@pytest.mark.parametrize("path", ["/", "/log"])
def test_pages_are_served(client: Any, path: str) -> None:
    reply = client.get(path)
    assert reply.status_code == 200
    assert b"_dash-config" in reply.data


def test_layout_and_dependencies_respond(client: Any) -> None:
    layout = client.get("/_dash-layout")
    assert layout.status_code == 200
    assert ids.NAV in layout.get_data(as_text=True)
    deps = client.get("/_dash-dependencies")
    assert deps.status_code == 200
    outputs = " ".join(d["output"] for d in deps.get_json())
    for component_id in (ids.LOG_BLOCK, ids.LOG_CHECK, ids.LOG_SAVE_RESULT, ids.LOG_VERDICT):
        assert component_id in outputs


def test_nav_lists_registered_pages(client: Any) -> None:
    response = _update(client, ids.NAV, [{"id": ids.APP_URL, "property": "pathname",
                                          "value": "/log"}])
    links = list(_walk(response[ids.NAV]["children"]))
    assert [(link["props"]["children"], link["props"]["className"]) for link in links
            if link["props"]["href"] == "/log"] == [("Log a test", "nav-link current")]


@pytest.mark.parametrize(("fleet_no", "rows", "words"), [
    ("T-101", [[1, 2, 3, 4]], ["TEST-L4", "lpg", "4 cylinders", "inline"]),
    ("T-201", [[1, 3, 5], [2, 4, 6]], ["TEST-V6", "gasoline", "6 cylinders", "1-3-5/2-4-6"]),
])
def test_engine_block_follows_the_family_banks(client: Any, fleet_no: str,
                                               rows: list[list[int]], words: list[str]) -> None:
    response = _update(client, ids.LOG_BLOCK, [{"id": ids.LOG_UNIT, "property": "value",
                                                "value": fleet_no}])
    assert _cylinder_rows(response[ids.LOG_BLOCK]["children"]) == rows
    summary = str(response[ids.LOG_UNIT_SUMMARY]["children"])
    assert all(word in summary for word in words)


def test_no_wet_test_offered_on_a_diesel(client: Any) -> None:
    # README "Safety": never add oil to a diesel cylinder.
    response = _update(client, ids.LOG_BLOCK, [{"id": ids.LOG_UNIT, "property": "value",
                                                "value": "T-301"}])
    disabled = {o["value"]: o["disabled"] for o in response[ids.LOG_KIND]["options"]}
    assert disabled == {"compression": False, "wet": True, "leakdown": False, "relative": False}


def test_type_ahead_filters_fleet_numbers(client: Any) -> None:
    response = _update(client, ids.LOG_UNIT, [{"id": ids.LOG_UNIT, "property": "search_value",
                                               "value": "t-2"}],
                       [{"id": ids.LOG_UNIT, "property": "value", "value": "T-101"}])
    assert [o["value"] for o in response[ids.LOG_UNIT]["options"]] == ["T-201", "T-101"]


def _entry(**changes: Any) -> data.FormEntry:
    values: dict[str, Any] = {
        "fleet_no": "T-102", "tested_at": "2024-06-01 09:00", "hours": "800",
        "kind": "compression", "pressure_unit": "psi",
        "cylinders": {1: "150", 2: "148", 3: "151", 4: "149"},
        "conditions": {"battery_v": "10.4", "crank_rpm": "210", "engine_temp_c": "80",
                       "throttle_open": "yes", "technician": "QA"}}
    values.update(changes)
    return data.FormEntry(**values)


def _cli_messages(url: str, entry: data.FormEntry) -> list[str]:
    """What fleetdb.logbook says to the CLI about the same values (dry run)."""
    readings = data.typed_readings(entry, complete=True)
    with pytest.raises(InvalidInput) as caught:
        logbook.log_test(db.get_engine(url), entry.fleet_no or "", entry.tested_at or "",
                         entry.hours or "", readings, conditions={
                             k: v for k, v in entry.conditions.items() if v},
                         dry_run=True)
    return [p.message for p in caught.value.problems]


@pytest.mark.parametrize(("changes", "where"), [
    ({"cylinders": {1: "150", 2: "5000", 3: "151", 4: "149"}}, "Cylinder 2 (dry compression)"),
    ({"cylinders": {1: "150", 2: "148", 3: "", 4: "149"}}, "Cylinder 3 (dry compression)"),
    ({"hours": "lots"}, "Hour meter"),
    ({"conditions": {"battery_v": "99"}}, "Battery volts under crank"),
])
def test_form_problems_are_the_cli_problems(store_url: str, changes: dict[str, Any],
                                            where: str) -> None:
    entry = _entry(**changes)
    result = data.save_entry(store_url, entry)
    assert result.test_id is None
    assert [p.message for p in result.problems] == _cli_messages(store_url, entry)
    assert where in [p.where for p in result.problems]


def test_saving_without_readings_names_the_readings(store_url: str) -> None:
    result = data.save_entry(store_url, _entry(fleet_no=None, cylinders={}))
    assert [(p.where, p.message) for p in result.problems] == [
        ("Readings", "a test needs at least one reading")]  # fleetdb.logbook's own words


def test_live_check_skips_blank_cylinders_and_save_reports_them(store_url: str) -> None:
    entry = _entry(cylinders={1: "150", 2: None, 3: "", 4: "149"})
    assert data.check_entry(store_url, entry) == []
    problems = data.save_entry(store_url, entry).problems
    assert {p.cylinder for p in problems} == {2, 3}


def test_save_writes_one_test_with_what_was_typed(store_url: str) -> None:
    from sqlalchemy import text

    entry = _entry(vacuum={"vacuum_cranking": "0.8"}, vacuum_unit="inHg")
    result = data.save_entry(store_url, entry)
    assert result.test_id is not None and result.problems == ()
    with db.get_engine(store_url).connect() as conn:
        typed = conn.execute(text("SELECT kind, cylinder, typed_value, typed_unit FROM reading "
                                  "WHERE test_id = :t ORDER BY id"),
                             {"t": result.test_id}).all()
        source = conn.execute(text("SELECT source, created_by FROM test WHERE id = :t"),
                              {"t": result.test_id}).one()
    assert [tuple(r) for r in typed] == [("compression", 1, "150", "psi"),
                                         ("compression", 2, "148", "psi"),
                                         ("compression", 3, "151", "psi"),
                                         ("compression", 4, "149", "psi"),
                                         ("vacuum_cranking", None, "0.8", "inHg")]
    assert tuple(source) == ("form", "QA")
    assert result.verdict["test_id"] == result.test_id
    assert result.verdict["level"] in components.LEVELS
    again = data.save_entry(store_url, entry)
    assert again.test_id is None and "already has a test" in again.problems[0].message


def test_two_saves_of_one_test_at_once_write_it_once(store_url: str) -> None:
    # A double click, or a check running while the save commits: the same content twice at
    # once. Whichever order the store sees them in, one test is written and the other is
    # told it exists (the CLI's message), never a server error.
    import threading

    from sqlalchemy import text

    entry = _entry(hours="900")
    barrier = threading.Barrier(2)
    results: list[data.SaveResult] = []

    def save() -> None:
        barrier.wait()
        results.append(data.save_entry(store_url, entry))

    threads = [threading.Thread(target=save) for _ in range(2)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    saved = [r for r in results if r.test_id is not None]
    refused = [r for r in results if r.test_id is None]
    assert len(saved) == 1 and len(refused) == 1
    assert "already has a test" in refused[0].problems[0].message
    with db.get_engine(store_url).connect() as conn:
        assert conn.execute(text("SELECT COUNT(*) FROM test t JOIN unit u ON u.id = t.unit_id "
                                 "WHERE u.fleet_no = 'T-102'")).scalar_one() == 1


def test_verdict_reads_the_level_from_before_the_test(store_url: str) -> None:
    # design.md: "act" = a limit crossed on a valid test. 95 psi is under TEST-L4's 120 psi
    # minimum (tests/data/fleet.csv) on a test with sound conditions.
    from fleetdb import health

    engine = db.get_engine(store_url)
    health.refresh_fleet(engine)
    before = {r["fleet_no"]: r["level"] for r in health.board(engine)["rows"]}["T-102"]
    result = data.save_entry(store_url, _entry(cylinders={1: "150", 2: "149", 3: "151",
                                                          4: "95"}))
    assert (result.verdict["previous_level"], result.verdict["level"]) == (before, "act")
    assert "below_minimum" in [f["code"] for f in result.verdict["findings"]]
    dry, minimum = data.dry_compression_of(store_url, "T-102", result.test_id)
    assert list(dry["cylinder"]) == [1, 2, 3, 4]
    assert minimum == pytest.approx(pint.UnitRegistry().Quantity(120, "psi").to("kPa").m)


def test_save_through_the_callback_reports_problems(client: Any) -> None:
    form = {ids.LOG_UNIT: "T-101", ids.LOG_TESTED_AT: "2024-06-01 09:00", ids.LOG_HOURS: "1300",
            ids.LOG_KIND: "compression", ids.LOG_PRESSURE_UNIT: "psi",
            ids.LOG_VACUUM_UNIT: "inHg", ids.LOG_THROTTLE: ""}
    dep = _callback(client, ids.LOG_SAVE_RESULT)
    state = []
    for item in dep["state"]:
        cid = item["id"]
        if cid.startswith("{"):  # the cylinders, by ALL
            cyl = [{"id": ids.log_cylinder(n), "property": item["property"],
                    "value": ids.log_cylinder(n) if item["property"] == "id" else v}
                   for n, v in ((1, "150"), (2, "5000"), (3, "151"), (4, "149"))]
            state.append(cyl)
        else:
            state.append({"id": cid, "property": item["property"], "value": form.get(cid)})
    response = _update(client, ids.LOG_SAVE_RESULT,
                       [{"id": ids.LOG_SAVE, "property": "n_clicks", "value": 1}], state)
    shown = str(response[ids.LOG_SAVE_RESULT]["children"])
    assert "Cylinder 2 (dry compression)" in shown
    assert "is beyond any cranking compression" in shown
    assert response[ids.LOG_VERDICT]["children"] is None


def test_verdict_panel_shows_every_part_in_the_chosen_unit() -> None:
    # The shape is DEVELOPERS.md's test_verdict(); the psi figures are pint's conversion
    # (pint defines psi from the pound-force and inch, as NIST SP 811 App. B does).
    ureg = pint.UnitRegistry()
    verdict = {"test_id": 7, "fleet_no": "T-101", "trustworthy": False,
               "findings": [{"code": "slow_cranking", "severity": "artefact",
                             "text": "Cranking at 120 rpm is below 150 rpm."}],
               "lowest_kpa": 827.4, "highest_kpa": 1034.2, "ratio": 0.8,
               "level": "retest", "previous_level": "sound"}
    panel = str(components.verdict_panel(verdict, "psi", "x"))
    low = ureg.Quantity(827.4, "kPa").to("psi").magnitude
    high = ureg.Quantity(1034.2, "kPa").to("psi").magnitude
    assert f"lowest {low:.1f} psi, highest {high:.1f} psi, lowest/highest 0.80" in panel
    assert "Cranking at 120 rpm is below 150 rpm." in panel and "test problem" in panel
    assert "✗ no" in panel
    assert panel.index("○") < panel.index("→") < panel.index("◆")  # sound -> retest


def test_create_app_refuses_an_old_schema(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'empty.sqlite'}"
    with pytest.raises(SchemaOutOfDate):
        create_app(url)


def test_level_badges_carry_word_and_marker() -> None:
    texts = {level: "".join(str(part) if isinstance(part, str) else part.children
                            for part in components.level_badge(level).children)
             for level in components.LEVELS}
    assert texts == {"act": "■ act", "plan": "▲ plan", "retest": "◆ retest",
                     "watch": "● watch", "sound": "○ sound"}
    assert len(set(components.LEVEL_MARKERS.values())) == len(components.LEVELS)
