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
from tests.conftest import copy_store

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
    app = create_app(store_url, auth=False)
    return app.server.test_client()


def _callback(client: Any, output_id: str, trigger: str | None = None) -> dict[str, Any]:
    """The callback writing ``output_id``; of several (``allow_duplicate``), the one that
    ``trigger`` (``id.property``) is an input of."""
    deps = client.get("/_dash-dependencies").get_json()
    matches = [d for d in deps if output_id in
               [part.rsplit(".", 1)[0] for part in d["output"].strip(".").split("...")]]
    if trigger is not None and len(matches) > 1:
        matches = [d for d in matches
                   if trigger in [f"{i['id']}.{i['property']}" for i in d["inputs"]]]
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


@pytest.mark.parametrize("path", ["/", "/log", "/unit", "/unit?fleet_no=T-101", "/fleet",
                                  "/?as_of=2024-06-01&level=act"])
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


# -- Health board, Unit history, Fleet wear ------------------------------------------------------
#
# The demo fleet (demo_fleet/README.md) as of 2026-12-01: 54 units, more than two pages.
# What the pages must show is fleetdb.health's own answer (board(), unit_report()); the
# dashboard may not reorder, re-level or drop anything.

DEMO_DAY = "2026-12-01"


@pytest.fixture(scope="module")
def demo_url(demo_file: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """A copy of the session's demo store (built and refreshed as of DEMO_DAY)."""
    url = copy_store(demo_file, tmp_path_factory.mktemp("demo"))
    yield url
    db.get_engine(url).dispose()
    data.unit_engine.cache_clear()


@pytest.fixture
def demo_client(demo_url: str) -> Any:
    return create_app(demo_url, auth=False).server.test_client()


def _call(client: Any, output_id: str, values: dict[str, Any], trigger: str) -> dict[str, Any]:
    """POST one callback with ``values`` by ``"id.property"``; ``trigger`` is what changed."""
    dep = _callback(client, output_id)
    outputs = [{"id": part.split(".")[0], "property": part.split(".")[1]}
               for part in dep["output"].strip(".").split("...")]

    def deps(items: list[dict[str, Any]]) -> list[dict[str, Any]]:
        return [{**item, "value": values.get(f"{item['id']}.{item['property']}")}
                for item in items]
    body = {"output": dep["output"], "outputs": outputs if len(outputs) > 1 else outputs[0],
            "inputs": deps(dep["inputs"]), "state": deps(dep["state"]),
            "changedPropIds": [trigger]}
    reply = client.post("/_dash-update-component", json=body)
    assert reply.status_code == 200, reply.data[:500]
    return reply.get_json()["response"]


def _board_values(**filters: Any) -> dict[str, Any]:
    values = {f"{ids.BOARD_AS_OF}.date": DEMO_DAY, f"{ids.BOARD_TABLE}.page_current": 0}
    for name, value in filters.items():
        component = {"site": ids.BOARD_SITE, "family": ids.BOARD_FAMILY,
                     "level": ids.BOARD_LEVEL, "search": ids.BOARD_SEARCH}.get(name)
        values[f"{component}.value" if component else f"{ids.BOARD_TABLE}.{name}"] = value
    return values


def _health_board(url: str, **kwargs: Any) -> dict[str, Any]:
    import datetime as dt

    from fleetdb import health

    return health.board(db.get_engine(url), dt.date.fromisoformat(DEMO_DAY), **kwargs)


def test_board_first_page_is_fleetdb_board_page_one(demo_client: Any, demo_url: str) -> None:
    response = _call(demo_client, ids.BOARD_TABLE, _board_values(),
                     f"{ids.BOARD_AS_OF}.date")
    expected = _health_board(demo_url, limit=data.BOARD_PAGE_SIZE)
    table = response[ids.BOARD_TABLE]
    assert [r["id"] for r in table["data"]] == [r["fleet_no"] for r in expected["rows"]]
    assert [r["level"] for r in table["data"]] == [components.level_text(r["level"])
                                                   for r in expected["rows"]]
    assert table["page_count"] == -(-expected["total"] // data.BOARD_PAGE_SIZE) == 3
    counts = str(response[ids.BOARD_COUNTS]["children"])
    for level, n in expected["counts"].items():
        assert components.LEVEL_MARKERS[level] in counts and f"'{n:,}'" in counts
    assert f"Showing 1–25 of {expected['total']} units" == \
        response[ids.BOARD_SHOWING]["children"]
    first = table["data"][0]
    assert first["fleet_no"].endswith(f"(/unit?fleet_no={first['id']}&as_of={DEMO_DAY})")


def test_board_pager_asks_for_the_next_rows_only(demo_client: Any, demo_url: str) -> None:
    response = _call(demo_client, ids.BOARD_TABLE, _board_values(page_current=2),
                     f"{ids.BOARD_TABLE}.page_current")
    expected = _health_board(demo_url, offset=50, limit=data.BOARD_PAGE_SIZE)
    assert [r["id"] for r in response[ids.BOARD_TABLE]["data"]] == \
        [r["fleet_no"] for r in expected["rows"]]
    assert response[ids.BOARD_TABLE]["page_current"] == 2
    assert response[ids.BOARD_SHOWING]["children"] == "Showing 51–54 of 54 units"


def test_a_new_filter_starts_at_page_one(demo_client: Any, demo_url: str) -> None:
    response = _call(demo_client, ids.BOARD_TABLE, _board_values(level="act", page_current=2),
                     f"{ids.BOARD_LEVEL}.value")
    expected = _health_board(demo_url, level="act")
    assert response[ids.BOARD_TABLE]["page_current"] == 0
    assert [r["id"] for r in response[ids.BOARD_TABLE]["data"]] == \
        [r["fleet_no"] for r in expected["rows"]]
    assert {r["level"] for r in response[ids.BOARD_TABLE]["data"]} == {"■ act"}
    both = _call(demo_client, ids.BOARD_TABLE, _board_values(site="Kettlerock Yard",
                                                             search="lt-9"),
                 f"{ids.BOARD_SEARCH}.value")
    assert [r["id"] for r in both[ids.BOARD_TABLE]["data"]] == [
        r["fleet_no"] for r in _health_board(demo_url, site="Kettlerock Yard",
                                             search="lt-9")["rows"]]
    assert all(r["site"] == "Kettlerock Yard" and "LT-9" in r["id"]
               for r in both[ids.BOARD_TABLE]["data"])


def test_clicking_a_row_opens_its_unit(demo_client: Any) -> None:
    cell = {"row": 2, "column": 1, "column_id": "site", "row_id": "LT-902"}
    response = _call(demo_client, ids.BOARD_GO, {f"{ids.BOARD_TABLE}.active_cell": cell,
                                                 f"{ids.BOARD_AS_OF}.date": DEMO_DAY},
                     f"{ids.BOARD_TABLE}.active_cell")
    assert response[ids.BOARD_GO]["href"] == f"/unit?fleet_no=LT-902&as_of={DEMO_DAY}"


# OWASP "CSV Injection": cells beginning with = + - @ tab or carriage return are read as
# formulas by spreadsheets; prefixing a single quote makes them text.
@pytest.mark.parametrize(("value", "written"), [
    ("=HYPERLINK(\"http://x\",\"y\")", "'=HYPERLINK(\"http://x\",\"y\")"),
    ("+1+2", "'+1+2"), ("-2+3", "'-2+3"), ("@SUM(A1)", "'@SUM(A1)"),
    ("\tcmd", "'\tcmd"), ("\rcmd", "'\rcmd"),
    ("LT-902", "LT-902"), (-120.0, -120.0), (None, ""),
])
def test_csv_cells_cannot_start_a_formula(value: Any, written: Any) -> None:
    assert data.csv_safe(value) == written


def test_export_writes_the_filtered_board_with_formulas_neutralised(
        store_url: str, tmp_path: Path) -> None:
    import csv
    import io

    hostile = tmp_path / "hostile.csv"
    hostile.write_text("fleet_no,site,engine_family\n=cmd|' /C calc'!A0,Low Yard,TEST-L4\n"
                       "@T-999,Low Yard,TEST-L4\n", encoding="utf-8")
    ingest.import_files(db.get_engine(store_url), [hostile], by="test")
    client = create_app(store_url, auth=False).server.test_client()
    values = {f"{ids.BOARD_EXPORT}.n_clicks": 1, f"{ids.BOARD_AS_OF}.date": "2024-06-01",
              f"{ids.BOARD_SITE}.value": "Low Yard"}
    download = _call(client, ids.BOARD_DOWNLOAD, values,
                     f"{ids.BOARD_EXPORT}.n_clicks")[ids.BOARD_DOWNLOAD]["data"]
    assert download["filename"] == "health-board-2024-06-01.csv"
    rows = list(csv.DictReader(io.StringIO(download["content"])))
    assert {r["fleet_no"] for r in rows} == {"T-101", "T-102", "T-301", "'=cmd|' /C calc'!A0",
                                             "'@T-999"}
    assert all(r["site"] == "Low Yard" for r in rows)
    assert list(rows[0]) == [header for _, header in data.BOARD_CSV_COLUMNS]


def test_unit_page_shows_fleetdb_report(demo_client: Any, demo_url: str) -> None:
    import datetime as dt

    from fleetdb import health

    report = health.unit_report(db.get_engine(demo_url), "LT-902",
                                dt.date.fromisoformat(DEMO_DAY))
    values = {f"{ids.UNIT_PICK}.value": "LT-902", f"{ids.UNIT_AS_OF}.date": DEMO_DAY,
              f"{ids.UNIT_PRESSURE_UNIT}.value": "kPa", f"{ids.UNIT_BASIS}.value": "sea_level"}
    described = _call(demo_client, ids.UNIT_SUMMARY, values, f"{ids.UNIT_PICK}.value")
    summary = str(described[ids.UNIT_SUMMARY]["children"])
    assert f"level: {report['level']}" in summary
    assert all(reason["text"] in summary for reason in report["reasons"])
    tests_shown = str(described[ids.UNIT_TESTS]["children"])
    assert all(f"'{t['test_id']}'" in tests_shown for t in report["tests"])
    figure = _call(demo_client, ids.UNIT_COMPRESSION, values,
                   f"{ids.UNIT_PICK}.value")[ids.UNIT_COMPRESSION]["figure"]
    assert figure["layout"]["yaxis"]["title"]["text"] == "compression (kPa, sea-level equivalent)"
    cylinders = {t["name"] for t in figure["data"] if t.get("name", "").startswith("Cyl ")}
    assert cylinders == {f"Cyl {c}" for c in range(1, report["unit"]["cylinders"] + 1)}


def test_unknown_unit_is_an_alert_not_an_error(demo_client: Any) -> None:
    values = {f"{ids.UNIT_PICK}.value": "NO-SUCH", f"{ids.UNIT_AS_OF}.date": DEMO_DAY,
              f"{ids.UNIT_PRESSURE_UNIT}.value": "psi"}
    shown = str(_call(demo_client, ids.UNIT_SUMMARY, values,
                      f"{ids.UNIT_PICK}.value")[ids.UNIT_SUMMARY]["children"])
    assert "Unit not found" in shown and "no unit with fleet number 'NO-SUCH'" in shown


def test_fleet_page_follows_the_highlighted_unit(demo_client: Any) -> None:
    chosen = _call(demo_client, ids.FLEET_FAMILY, {f"{ids.FLEET_AS_OF}.date": DEMO_DAY,
                                                   f"{ids.FLEET_HIGHLIGHT}.value": "LV-903"},
                   f"{ids.FLEET_HIGHLIGHT}.value")[ids.FLEET_FAMILY]
    assert chosen["value"] == "Tavrin 6V"  # LV-903's family (demo_fleet/README.md)
    values = {f"{ids.FLEET_AS_OF}.date": DEMO_DAY, f"{ids.FLEET_FAMILY}.value": "Tavrin 6V",
              f"{ids.FLEET_PRESSURE_UNIT}.value": "bar", f"{ids.FLEET_HIGHLIGHT}.value": "LV-903"}
    drawn = _call(demo_client, ids.FLEET_HOURS, values, f"{ids.FLEET_FAMILY}.value")
    hours = drawn[ids.FLEET_HOURS]["figure"]
    assert hours["layout"]["yaxis"]["title"]["text"] == "lowest cylinder (bar, sea-level " \
                                                        "equivalent)"
    assert "LV-903 (chosen)" in [t.get("name") for t in hours["data"]]
    sites = drawn[ids.FLEET_SITES]["figure"]
    assert sum(t["type"] == "box" for t in sites["data"]) == 2 * len(
        sites["layout"]["xaxis"]["ticktext"])
    assert "apart at sea level" in drawn[ids.FLEET_NOTE]["children"]
    wear = _call(demo_client, ids.FLEET_WEAR, values,
                 f"{ids.FLEET_HIGHLIGHT}.value")[ids.FLEET_WEAR]["figure"]
    assert [t["name"] for t in wear["data"] if t["type"] == "box"] == [
        "Fennick 4L", "Orsel 6D", "Quillan 6G", "Tavrin 6V"]


def test_fleet_page_sees_a_new_test_without_assessing_the_fleet_again(
        demo_file: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import datetime as dt

    import pandas as pd

    from fleetdb import fleetwear

    url = copy_store(demo_file, tmp_path)
    day = dt.date.fromisoformat(DEMO_DAY)
    before = data.fleet_wear(url, day).latest.set_index("fleet_no").loc["LT-101"]
    readings = [logbook.TypedReading("compression", c, v, "psi")
                for c, v in enumerate(["150", "151", "80", "149"], start=1)]
    when = pd.Timestamp(before["tested_at"]) + pd.Timedelta(hours=1)
    logbook.log_test(db.get_engine(url), "LT-101", when.isoformat(sep=" "),
                     float(before["hours"]) + 10, readings,
                     conditions={"crank_rpm": "240", "battery_v": "10.5",
                                 "engine_temp_c": "80", "throttle_open": "yes"})

    def whole_fleet(*_args: Any) -> None:
        raise AssertionError("the whole fleet was assessed again for one test")

    monkeypatch.setattr(fleetwear, "fleet_wear", whole_fleet)
    after = data.fleet_wear(url, day).latest.set_index("fleet_no").loc["LT-101"]
    assert after["tested_at"] == when and after["lowest_kpa"] < before["lowest_kpa"]
    db.get_engine(url).dispose()


@pytest.mark.parametrize(("row", "cells"), [
    ({"change": "worse", "previous_level": "sound", "level": "act", "hours_to_limit": 0.0,
      "projected_date_early": "2026-11-13", "projected_date": "2026-11-13"},
     {"change": "worse, was ○ sound", "level": "■ act", "hours_to_limit": "0 h",
      "limit_date": "2026-11-13"}),
    ({"change": "better", "previous_level": "retest", "level": "watch",
      "hours_to_limit": 1234.0, "projected_date_early": "2027-02-01",
      "projected_date": "2027-06-30"},
     {"change": "better, was ◆ retest", "level": "● watch", "hours_to_limit": "1,234 h",
      "limit_date": "2027-02-01 (best estimate 2027-06-30)"}),
    ({"change": None, "previous_level": None, "level": "sound", "hours_to_limit": None,
      "projected_date_early": None, "projected_date": None},
     {"change": "– no snapshot last week", "level": "○ sound", "hours_to_limit": "–",
      "limit_date": "–"}),
    ({"change": "new", "previous_level": None, "level": "plan"},
     {"change": "new this week", "level": "▲ plan"}),
])
def test_board_cells_say_level_and_change_in_words(row: dict[str, Any],
                                                   cells: dict[str, str]) -> None:
    base = {"fleet_no": "T-1", "site": "S", "engine_family": "F", "main_text": None,
            "last_tested_at": "2026-11-13 09:00"}
    shown = components.board_table_rows([{**base, **row}], "2026-12-01")[0]
    assert {key: shown[key] for key in cells} == cells
    assert shown["last_test"] == "2026-11-13"
    assert shown["reason"] == "Nothing found: every check passes."


def test_unit_links_survive_odd_fleet_numbers() -> None:
    # RFC 3986 percent-encoding in the address; markdown's own characters escaped in the text.
    row = {"fleet_no": "A&B [7]", "site": "S", "engine_family": "F", "level": "sound"}
    cell = components.board_table_rows([row], None)[0]["fleet_no"]
    assert cell == r"[A&B \[7\]](/unit?fleet_no=A%26B+%5B7%5D)"


def test_a_fleet_with_no_tests_yet_answers_on_every_page(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'new.sqlite'}"
    migrate.upgrade(url)
    ingest.import_files(db.get_engine(url), [DATA / "fleet.csv"], by="test")
    client = create_app(url, auth=False).server.test_client()
    day = "2024-06-01"
    board = _call(client, ids.BOARD_TABLE, {f"{ids.BOARD_AS_OF}.date": day},
                  f"{ids.BOARD_AS_OF}.date")
    # design.md: a unit never tested asks for a test (retest, no_test).
    assert {r["level"] for r in board[ids.BOARD_TABLE]["data"]} == {"◆ retest"}
    unit = {f"{ids.UNIT_PICK}.value": "T-201", f"{ids.UNIT_AS_OF}.date": day,
            f"{ids.UNIT_PRESSURE_UNIT}.value": "bar", f"{ids.UNIT_BASIS}.value": "measured"}
    assert "never tested" in str(_call(client, ids.UNIT_SUMMARY, unit, f"{ids.UNIT_PICK}.value"))
    for output in (ids.UNIT_COMPRESSION, ids.UNIT_SPREAD):
        figure = _call(client, output, unit, f"{ids.UNIT_PICK}.value")[output]["figure"]
        assert figure["layout"]["annotations"][0]["text"].startswith("No ")
    fleet = {f"{ids.FLEET_AS_OF}.date": day, f"{ids.FLEET_FAMILY}.value": "TEST-V6",
             f"{ids.FLEET_PRESSURE_UNIT}.value": "psi"}
    wear = _call(client, ids.FLEET_WEAR, fleet, f"{ids.FLEET_AS_OF}.date")[ids.FLEET_WEAR]
    assert wear["figure"]["layout"]["annotations"][0]["text"] == "No fitted wear lines yet."
    drawn = _call(client, ids.FLEET_HOURS, fleet, f"{ids.FLEET_FAMILY}.value")
    assert drawn[ids.FLEET_NOTE]["children"] == "One site only: nothing to compare."
