"""Shared fixtures: real SQLite files and a real PostgreSQL server, never mocks.

PostgreSQL: FLEETDB_TEST_PG_URL (default: the local server, database ``test``). Each test
session makes its own scratch database there and drops it afterwards. Without a server the
PostgreSQL tests skip with the reason shown; under CI (CI=true) that skip is a failure.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import logging
import os
import shutil
import threading
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import create_engine, text
from sqlalchemy.engine import Engine, make_url

from fleetdb import db as db_mod
from fleetdb import migrate

PG_URL = os.environ.get("FLEETDB_TEST_PG_URL",
                        "postgresql+psycopg://postgres@127.0.0.1:5432/test")
IN_CI = os.environ.get("CI", "").lower() in ("1", "true", "yes")
DATA = Path(__file__).parent / "data"
#: The day the shared demo store is built and refreshed as of (demo_fleet/README.md).
DEMO_AS_OF = dt.date(2026, 12, 1)


def skip_or_fail(reason: str) -> None:
    """Skip on a laptop; fail under CI, where every part must be present."""
    if IN_CI:
        pytest.fail(f"required in CI: {reason}")
    pytest.skip(reason)


@pytest.fixture(scope="session")
def pg_server_url() -> Iterator[str]:
    """A scratch PostgreSQL database for this test session."""
    admin = create_engine(PG_URL, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            conn.execute(text("SELECT 1"))
    except Exception as exc:  # noqa: BLE001 - any connection failure means no server
        admin.dispose()
        skip_or_fail(f"no PostgreSQL server at {make_url(PG_URL).render_as_string()}: "
                     f"{type(exc).__name__}")
    name = f"fleetdb_t_{uuid.uuid4().hex[:10]}"
    with admin.connect() as conn:
        conn.execute(text(f'CREATE DATABASE "{name}"'))
    url = make_url(PG_URL).set(database=name).render_as_string(hide_password=False)
    yield url
    db_mod.get_engine.cache_clear()
    with admin.connect() as conn:
        conn.execute(text("SELECT pg_terminate_backend(pid) FROM pg_stat_activity "
                          "WHERE datname = :n AND pid <> pg_backend_pid()"), {"n": name})
        conn.execute(text(f'DROP DATABASE IF EXISTS "{name}"'))
    admin.dispose()


def _reset_pg(url: str) -> None:
    """Empty the scratch database between tests (drop and recreate its public schema)."""
    engine = create_engine(url, isolation_level="AUTOCOMMIT")
    with engine.connect() as conn:
        conn.execute(text("DROP SCHEMA public CASCADE"))
        conn.execute(text("CREATE SCHEMA public"))
    engine.dispose()


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def db_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """An empty database URL, once on a SQLite file and once on PostgreSQL."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'fleet.sqlite'}"
        return
    url = request.getfixturevalue("pg_server_url")
    _reset_pg(url)
    db_mod.get_engine.cache_clear()
    yield url
    db_mod.get_engine.cache_clear()


@pytest.fixture
def sqlite_url(tmp_path: Path) -> str:
    """An empty SQLite file URL."""
    return f"sqlite:///{tmp_path / 'fleet.sqlite'}"


@pytest.fixture
def engine(db_url: str) -> Iterator[Engine]:
    """A store at the newest schema, on each engine."""
    migrate.upgrade(db_url)
    eng = db_mod.make_engine(db_url)
    yield eng
    eng.dispose()


def write(path: Path, text_: str) -> Path:
    """Write a small CSV for a test (leading spaces of each line removed)."""
    lines = [line.strip() for line in text_.strip().splitlines()]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.fixture(scope="session")
def demo_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo fleet built once per test session into a SQLite file, refreshed as of
    DEMO_AS_OF. Shared by every test that reads it: never write to it, take
    ``copy_store(demo_file, tmp_path)`` first."""
    from fleetdb import demo, health

    path = tmp_path_factory.mktemp("demo-store") / "demo.sqlite"
    url = f"sqlite:///{path}"
    migrate.upgrade(url)
    engine = db_mod.make_engine(url)
    demo.build_into(engine, DEMO_AS_OF)
    health.refresh_fleet(engine, DEMO_AS_OF)
    engine.dispose()
    return path


def copy_store(store: Path, folder: Path, name: str = "demo.sqlite") -> str:
    """A private copy of a SQLite store in ``folder``, free to change; returns its URL."""
    copy = folder / name
    shutil.copy(store, copy)
    return f"sqlite:///{copy}"


@contextlib.contextmanager
def served(app: Any, name: str) -> Iterator[str]:
    """Serve a Dash app with werkzeug on 127.0.0.1 (a free port) from a daemon thread;
    yields its base URL and shuts the server down after."""
    from werkzeug.serving import make_server

    logging.getLogger("werkzeug").setLevel(logging.WARNING)
    server = make_server("127.0.0.1", 0, app.server, threaded=True)
    thread = threading.Thread(target=server.serve_forever, name=name, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_port}"
    finally:
        server.shutdown()
        thread.join(timeout=10)
