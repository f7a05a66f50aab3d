"""A large import killed with SIGKILL leaves a consistent store, and running it again completes it.

The import is a real child process on a real SQLite file and on the real PostgreSQL
server; the file is tests/bench/synth.py's invented fleet (a few thousand tests, tens of
thousands of readings). Two kinds of kill:

* **before the commit**, deterministically: the child imports with a progress hook that,
  once every reading row has been sent, says so and waits; it is killed there, with the
  whole batch written but not committed: the worst moment.
* **at seeded random moments** of the ``fleetdb import`` command: one uninterrupted run
  is timed first, then one kill falls in each band of it (start-up, reading and checks;
  writing and commit; the health refresh after it).

After each kill: SQLite's ``PRAGMA integrity_check`` and ``foreign_key_check`` pass
(PostgreSQL: ``amcheck``'s ``bt_index_check`` with ``heapallindexed`` on every index of
the store, PostgreSQL documentation F.2), the batch is there whole or not at all, no
import is left marked in progress; then the same import runs again and the store holds
exactly the file's content (counts, and the sum of the SI values against one computed
here from the CSV text).
"""

from __future__ import annotations

import csv
import math
import os
import random
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text

from fleetdb import db, ingest, migrate
from fleetdb.units import KPA_PER_UNIT
from tests.bench import synth

REPO = Path(__file__).resolve().parents[1]
UNITS = 150
SEED = 11
#: Where the kills fall, as fractions of an uninterrupted run, one drawn in each band: here
#: the writing starts near 0.43 and commits near 0.5 of ``fleetdb import``, the health
#: refresh takes the rest (measured by polling the file, common practice, no published source).
KILL_BANDS = ((0.1, 0.4), (0.4, 0.55), (0.55, 0.95))

#: The child for the deterministic kill: waits, inside the open transaction, once every
#: reading has been sent to the store (the last progress call comes before the commit).
HOLD_BEFORE_COMMIT = """
import sys
from pathlib import Path
from fleetdb import db, ingest

def progress(done, total):
    if done == total:
        print("written", flush=True)
        sys.stdin.read()

ingest.import_files(db.get_engine(sys.argv[1]), [Path(sys.argv[2])], progress=progress)
print("committed", flush=True)
"""


@dataclass(frozen=True)
class Expected:
    """What the tests file holds, computed here from its text."""

    path: Path
    fleet: Path
    tests: int
    readings: int
    si_sum: float


@pytest.fixture(scope="module")
def expected(tmp_path_factory: pytest.TempPathFactory) -> Expected:
    folder = tmp_path_factory.mktemp("synth")
    paths = synth.write_fleet(folder, UNITS, SEED)
    keys, values = set(), []
    with paths["tests"].open(newline="", encoding="utf-8") as handle:
        for row in csv.DictReader(handle):
            keys.add((row["fleet_no"], row["tested_at"], row["hours"]))
            factor = 1.0 if row["units"] == "%" else KPA_PER_UNIT[row["units"]]
            values.append(float(row["value"]) * factor)
    return Expected(paths["tests"], paths["fleet"], len(keys), len(values), math.fsum(values))


@pytest.fixture(scope="module")
def sqlite_template(expected: Expected, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A SQLite store at the newest schema holding the fleet file, closed (no -wal)."""
    path = tmp_path_factory.mktemp("template") / "template.sqlite"
    url = f"sqlite:///{path}"
    migrate.upgrade(url)
    engine = db.make_engine(url)
    ingest.import_files(engine, [expected.fleet], by="test")
    engine.dispose()
    return path


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def store(request: pytest.FixtureRequest, sqlite_template: Path, expected: Expected,
          tmp_path: Path) -> Iterator[str]:
    """A store holding the fleet file and no test: a copy of the template, or PostgreSQL."""
    if request.param == "sqlite":
        path = tmp_path / "fleet.sqlite"
        shutil.copy(sqlite_template, path)
        yield f"sqlite:///{path}"
        return
    yield _reset(request.getfixturevalue("pg_server_url"), expected, tmp_path)


def integrity_problems(url: str) -> list[str]:
    """What the engine's own checker finds wrong with the store ([] = sound)."""
    if url.startswith("sqlite"):
        conn = sqlite3.connect(url.removeprefix("sqlite:///"))
        try:
            found = [r[0] for r in conn.execute("PRAGMA integrity_check")]
            orphans = conn.execute("PRAGMA foreign_key_check").fetchall()
        finally:
            conn.close()
        return ([] if found == ["ok"] else found) + [f"orphan row {r}" for r in orphans]
    engine = create_engine(url, isolation_level="AUTOCOMMIT")
    try:
        with engine.connect() as conn:
            conn.execute(text("CREATE EXTENSION IF NOT EXISTS amcheck"))
            indexes = conn.execute(text(
                "SELECT c.relname FROM pg_index i JOIN pg_class c ON c.oid = i.indexrelid "
                "JOIN pg_namespace n ON n.oid = c.relnamespace JOIN pg_am a ON a.oid = c.relam "
                "WHERE n.nspname = 'public' AND a.amname = 'btree'")).scalars().all()
            for name in indexes:  # raises on any corruption it finds
                conn.execute(text("SELECT bt_index_check(index => CAST(:i AS regclass), "
                                  "heapallindexed => true)"), {"i": name})
    finally:
        engine.dispose()
    assert len(indexes) >= 10  # every table's primary key and more were checked
    return []


def stored(url: str) -> dict[str, float]:
    """Counts and sums that tell a whole batch from a partial one."""
    engine = create_engine(url)
    try:
        with engine.connect() as conn:
            row = conn.execute(text(
                "SELECT (SELECT COUNT(*) FROM test), (SELECT COUNT(*) FROM reading), "
                "(SELECT COALESCE(SUM(value_si), 0) FROM reading), "
                "(SELECT COUNT(*) FROM test t WHERE NOT EXISTS "
                " (SELECT 1 FROM reading r WHERE r.test_id = t.id)), "
                "(SELECT COUNT(*) FROM import_batch WHERE file_kind = 'tests'), "
                "(SELECT COUNT(*) FROM import_batch WHERE outcome <> 'imported')")).one()
    finally:
        engine.dispose()
    return {"tests": row[0], "readings": row[1], "si_sum": float(row[2]),
            "tests_without_readings": row[3], "test_batches": row[4], "unfinished": row[5]}


def assert_whole_or_nothing(url: str, expected: Expected) -> str:
    """The store is sound and holds the batch entirely or not at all; which one."""
    assert integrity_problems(url) == []
    state = stored(url)
    assert state["unfinished"] == 0 and state["tests_without_readings"] == 0
    if state["tests"] == 0:
        assert state["readings"] == 0 and state["test_batches"] == 0
        return "nothing"
    assert state["test_batches"] == 1
    assert (state["tests"], state["readings"]) == (expected.tests, expected.readings)
    assert state["si_sum"] == pytest.approx(expected.si_sum, rel=1e-12)
    return "whole"


def rerun_completes(url: str, expected: Expected) -> None:
    """The same import again finishes the job: the store holds exactly the file."""
    engine = db.make_engine(url)
    try:
        report = ingest.import_files(engine, [expected.path], by="test")[0]
    finally:
        engine.dispose()
    assert report.outcome in ("imported", "already_imported")
    assert assert_whole_or_nothing(url, expected) == "whole"


def _child_env() -> dict[str, str]:
    return {**os.environ, "PYTHONPATH": str(REPO)}


def test_kill_before_commit_leaves_nothing(store: str, expected: Expected) -> None:
    child = subprocess.Popen([sys.executable, "-c", HOLD_BEFORE_COMMIT, store,
                              str(expected.path)], stdin=subprocess.PIPE,
                             stdout=subprocess.PIPE, text=True, cwd=REPO, env=_child_env())
    try:
        assert child.stdout is not None
        assert child.stdout.readline().strip() == "written"
    finally:
        child.send_signal(signal.SIGKILL)
        child.wait(timeout=30)
    assert child.returncode == -signal.SIGKILL
    assert assert_whole_or_nothing(store, expected) == "nothing"
    rerun_completes(store, expected)


def import_command(url: str, expected: Expected) -> list[str]:
    return [sys.executable, "-m", "fleetdb", "import", "--db", url, str(expected.path)]


def test_kill_at_random_moments_then_rerun(store: str, expected: Expected,
                                           tmp_path: Path) -> None:
    # How long the whole command takes here and now (start-up, reading, checks, writing,
    # commit, the health refresh); the kills are spread over that span, at seeded fractions.
    start = time.monotonic()
    subprocess.run(import_command(store, expected), check=True, capture_output=True,
                   cwd=REPO, env=_child_env())
    duration = time.monotonic() - start
    assert assert_whole_or_nothing(store, expected) == "whole"
    store = _reset(store, expected, tmp_path / "fresh.sqlite")
    rng = random.Random(SEED)
    fractions = [rng.uniform(*band) for band in KILL_BANDS]
    outcomes = []
    for fraction in fractions:
        child = subprocess.Popen(import_command(store, expected), stdout=subprocess.DEVNULL,
                                 stderr=subprocess.PIPE, cwd=REPO, env=_child_env())
        time.sleep(fraction * duration)
        child.send_signal(signal.SIGKILL)
        _, err = child.communicate(timeout=60)
        assert b"Traceback" not in err, err.decode()
        outcomes.append((round(fraction, 2), child.returncode,
                         assert_whole_or_nothing(store, expected)))
        if outcomes[-1][2] == "whole":
            # Already complete: start the next kill from a store without the batch again.
            store = _reset(store, expected, tmp_path / f"again{len(outcomes)}.sqlite")
    rerun_completes(store, expected)
    print(f"import alone {duration:.1f} s; kills (fraction of it, exit code, what the store "
          f"held): {outcomes}")


def _reset(url: str, expected: Expected, fresh_path: Path) -> str:
    """A store holding only the fleet again (a fresh SQLite file; PostgreSQL emptied)."""
    if url.startswith("sqlite"):
        fresh = f"sqlite:///{fresh_path}"
    else:
        fresh = url
        engine = create_engine(url, isolation_level="AUTOCOMMIT")
        with engine.connect() as conn:
            conn.execute(text("DROP SCHEMA public CASCADE"))
            conn.execute(text("CREATE SCHEMA public"))
        engine.dispose()
    migrate.upgrade(fresh)
    engine = db.make_engine(fresh)
    ingest.import_files(engine, [expected.fleet], by="test")
    engine.dispose()
    return fresh
