"""Several processes writing one store at once: every test ends up there exactly once.

Real processes (multiprocessing, spawn) against a real SQLite file (WAL, busy timeout) and
the real PostgreSQL server. Each writer logs single tests through ``fleetdb.logbook`` and
imports CSV files through ``fleetdb.ingest`` (what ``fleetdb log`` and ``fleetdb import``
call), interleaved, released together by a barrier. The files overlap on purpose:

* every writer imports the same shared file (identical content: one writes it, the others
  are told it was imported);
* writer w's own file shares tests with writer w+1's file (a test already present is
  counted, never doubled);
* writers w and w+1 log the same "contested" tests, each under its own name (one wins,
  the other is told the unit already has that test).

Afterwards every test that anyone wrote is there once, with all its readings, no import is
left half-done, and every refusal was one of the two sentences above. Throughput is
measured in tests/bench/bench_load.py, never asserted here.
"""

from __future__ import annotations

import csv
import multiprocessing
import queue
import traceback
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import text

from fleetdb import db, ingest, migrate
from tests.conftest import DATA

#: tests/data/fleet.csv: fleet number and cylinder count.
UNITS = (("T-101", 4), ("T-102", 4), ("T-201", 6), ("T-301", 6))
HEADER = ["fleet_no", "tested_at", "hours", "kind", "cylinder", "value", "units"]
WRITERS = 4
LOGS_PER_WRITER = 6
TESTS_PER_FILE = 30
OVERLAP = 10


def key_of(n: int) -> tuple[str, str, float]:
    """Test number ``n``: its unit, time and hour meter. Within a unit, later tests have
    higher numbers and more hours, whatever order the writers store them in."""
    fleet_no = UNITS[n % len(UNITS)][0]
    day, minute = divmod(n, 24 * 60)
    return fleet_no, f"2024-{1 + day // 28:02d}-{1 + day % 28:02d} {minute // 60:02d}:" \
                     f"{minute % 60:02d}", 1000.0 + n


def _cylinders(fleet_no: str) -> int:
    return dict(UNITS)[fleet_no]


def _value(n: int, cylinder: int) -> str:
    return f"{140 + (n * 7 + cylinder) % 20}"


def write_tests_file(path: Path, numbers: list[int]) -> Path:
    """A tests CSV with tests ``numbers``: dry compression on every cylinder, psi."""
    with path.open("w", newline="", encoding="utf-8") as handle:
        out = csv.writer(handle)
        out.writerow(HEADER)
        for n in numbers:
            fleet_no, at, hours = key_of(n)
            for cyl in range(1, _cylinders(fleet_no) + 1):
                out.writerow([fleet_no, at, f"{hours:g}", "compression", cyl, _value(n, cyl),
                              "psi"])
    return path


def plan(tmp_path: Path) -> list[dict[str, Any]]:
    """What each writer does: its logs, contested logs and files, in one interleaved list."""
    shared = write_tests_file(tmp_path / "shared.csv", list(range(0, TESTS_PER_FILE)))
    jobs = []
    for w in range(WRITERS):
        first = 100 + w * (TESTS_PER_FILE - OVERLAP)
        own = write_tests_file(tmp_path / f"writer{w}.csv",
                               list(range(first, first + TESTS_PER_FILE)))
        logs = [1000 + w + WRITERS * i for i in range(LOGS_PER_WRITER)]
        contested = [2000 + w, 2000 + (w + 1) % WRITERS]  # also logged by a neighbour
        steps: list[tuple[str, Any]] = [("log", n) for n in logs[:2]]
        steps += [("import", str(shared)), ("log", contested[0])]
        steps += [("log", n) for n in logs[2:4]] + [("import", str(own)), ("log", contested[1])]
        steps += [("log", n) for n in logs[4:]]
        jobs.append({"writer": w, "steps": steps})
    return jobs


def writer(url: str, job: dict[str, Any], barrier: Any, results: Any) -> None:
    """One writer process: wait for the others, then do its steps; report every outcome."""
    from fleetdb import logbook
    from fleetdb.errors import InvalidInput

    engine = db.make_engine(url)
    outcomes = []
    barrier.wait(timeout=60)
    for step, arg in job["steps"]:
        try:
            if step == "log":
                fleet_no, at, hours = key_of(arg)
                readings = [logbook.TypedReading("compression", c, _value(arg, c), "psi")
                            for c in range(1, _cylinders(fleet_no) + 1)]
                test_id = logbook.log_test(engine, fleet_no, at, hours, readings,
                                           by=f"writer{job['writer']}")
                outcomes.append((step, arg, "written", test_id))
            else:
                report = ingest.import_files(engine, [Path(arg)], by=f"writer{job['writer']}")[0]
                outcomes.append((step, Path(arg).name, report.outcome, report.written.get(
                    "tests", 0)))
        except InvalidInput as exc:
            outcomes.append((step, arg, "refused", str(exc.problems[0].message)))
        except Exception:  # noqa: BLE001 - any other failure is what the test looks for
            outcomes.append((step, arg, "error", traceback.format_exc()))
    engine.dispose()
    results.put((job["writer"], outcomes))


def run_writers(url: str, jobs: list[dict[str, Any]]) -> dict[int, list[tuple]]:
    """Start one spawned process per job, release them together, collect their outcomes."""
    ctx = multiprocessing.get_context("spawn")
    barrier = ctx.Barrier(len(jobs))
    results = ctx.Queue()
    procs = [ctx.Process(target=writer, args=(url, job, barrier, results)) for job in jobs]
    for proc in procs:
        proc.start()
    collected: dict[int, list[tuple]] = {}
    try:
        for _ in procs:
            w, outcomes = results.get(timeout=120)
            collected[w] = outcomes
    except queue.Empty:
        pytest.fail(f"writers did not finish: got {sorted(collected)}")
    finally:
        for proc in procs:
            proc.join(timeout=30)
            if proc.is_alive():
                proc.kill()
    assert all(proc.exitcode == 0 for proc in procs), [proc.exitcode for proc in procs]
    return collected


def test_concurrent_writers_store_every_test_exactly_once(db_url: str, tmp_path: Path) -> None:
    migrate.upgrade(db_url)
    engine = db.make_engine(db_url)
    ingest.import_files(engine, [DATA / "fleet.csv"], by="test")
    jobs = plan(tmp_path)
    outcomes = run_writers(db_url, jobs)

    every = [o for w in sorted(outcomes) for o in outcomes[w]]
    errors = [o for o in every if o[2] == "error"]
    assert not errors, errors[0][3]
    # Who wrote what: each log was written once or refused because the test was there.
    refused = [o for o in every if o[2] == "refused"]
    assert all(o[0] == "log" and "already has a test" in o[3] for o in refused), refused
    written_logs = [o[1] for o in every if o[0] == "log" and o[2] == "written"]
    assert len(written_logs) == len(set(written_logs))
    contested = {2000 + w for w in range(WRITERS)}
    assert set(written_logs) >= contested
    assert len(refused) == len(contested)  # each contested test: one winner, one refusal
    shared = [o for o in every if o[1] == "shared.csv"]
    assert sorted(o[2] for o in shared) == ["already_imported"] * (WRITERS - 1) + ["imported"]
    assert sum(o[3] for o in shared) == TESTS_PER_FILE

    expected: set[int] = set(range(TESTS_PER_FILE)) | set(written_logs)
    for w in range(WRITERS):
        first = 100 + w * (TESTS_PER_FILE - OVERLAP)
        expected |= set(range(first, first + TESTS_PER_FILE))
    imported_total = sum(o[3] for o in every if o[0] == "import")
    assert imported_total + len(written_logs) == len(expected)  # overlaps counted, not doubled

    with engine.connect() as conn:
        rows = conn.execute(text(
            "SELECT u.fleet_no, t.tested_at, t.hours, COUNT(r.id), "
            "SUM(CASE WHEN r.kind = 'compression' THEN 1 ELSE 0 END) FROM test t "
            "JOIN unit u ON u.id = t.unit_id JOIN reading r ON r.test_id = t.id "
            "GROUP BY t.id, u.fleet_no, t.tested_at, t.hours")).all()
        unfinished = conn.execute(text(
            "SELECT COUNT(*) FROM import_batch WHERE outcome <> 'imported'")).scalar_one()
        tests_total = conn.execute(text("SELECT COUNT(*) FROM test")).scalar_one()
    engine.dispose()
    stored = [(fleet_no, str(at)[:16], float(hours)) for fleet_no, at, hours, _, _ in rows]
    assert len(stored) == len(set(stored)) == tests_total  # exactly once, each with readings
    assert set(stored) == {key_of(n) for n in expected}
    assert all(n == cyl == _cylinders(fleet_no) for fleet_no, _, _, n, cyl in rows)
    assert unfinished == 0


def test_two_health_refreshes_of_one_unit_at_once(db_url: str,
                                                  request: pytest.FixtureRequest) -> None:
    # What two `fleetdb log` runs for the same unit do after their tests are stored: each
    # replaces the unit's snapshot row of the week (DELETE, then INSERT). One refresh is
    # held open here by hand; the other must wait for it and then succeed.
    import datetime as dt
    import threading

    from fleetdb import health

    migrate.upgrade(db_url)
    engine = db.make_engine(db_url)
    ingest.import_files(engine, [DATA / "fleet.csv", DATA / "tests.csv"], by="test")
    day = dt.date(2024, 6, 3)
    health.refresh_fleet(engine, day)
    where = {"u": 1, "w": health.week_start(day)}
    failures: list[BaseException] = []

    def second_refresh() -> None:
        try:
            health.refresh_units(engine, [1], day)
        except BaseException as exc:  # noqa: BLE001 - handed to the main thread
            failures.append(exc)

    with engine.connect() as held:
        held.execute(text("CREATE TEMP TABLE kept AS SELECT * FROM health_snapshot "
                          "WHERE unit_id = :u AND week_start = :w"), where)
        held.execute(text("DELETE FROM health_snapshot WHERE unit_id = :u AND week_start = :w"),
                     where)
        held.execute(text("INSERT INTO health_snapshot SELECT * FROM kept"))
        other = threading.Thread(target=second_refresh)
        other.start()
        _wait_until_blocked(engine, other)
        held.commit()
    other.join(timeout=60)
    with engine.connect() as conn:
        rows = conn.execute(text("SELECT COUNT(*) FROM health_snapshot WHERE unit_id = :u "
                                 "AND week_start = :w"), where).scalar_one()
    engine.dispose()
    if failures:
        raise failures[0]
    assert rows == 1


def _wait_until_blocked(engine: Any, thread: Any) -> None:
    """Until the other refresh waits for the held transaction's lock (PostgreSQL: seen in
    pg_stat_activity; SQLite: its busy handler waits, so a short pause is enough)."""
    import time

    if engine.dialect.name != "postgresql":
        time.sleep(1.0)
        return
    deadline = time.monotonic() + 60
    with engine.connect() as probe:
        while time.monotonic() < deadline and thread.is_alive():
            waiting = probe.execute(text(
                "SELECT COUNT(*) FROM pg_stat_activity WHERE datname = current_database() "
                "AND wait_event_type = 'Lock'")).scalar_one()
            probe.rollback()
            if waiting:
                return
            time.sleep(0.05)
    pytest.fail("the second refresh never waited for the first")
