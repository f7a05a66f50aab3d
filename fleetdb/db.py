"""Engine and sessions. SQLite gets WAL, foreign keys and a busy timeout."""

from __future__ import annotations

import weakref
from datetime import UTC, datetime
from functools import lru_cache
from pathlib import Path
from typing import TYPE_CHECKING

# SQLAlchemy's own create_engine (sqlmodel re-exports it): importing sqlmodel and the
# models is left to the commands that use them, so that the others start sooner.
from sqlalchemy import create_engine, event
from sqlalchemy.engine import Connection, Engine, make_url

if TYPE_CHECKING:
    from sqlmodel import Session

SQLITE_BUSY_TIMEOUT_MS = 30_000


def _sqlite_pragmas(dbapi_connection, _record) -> None:  # noqa: ANN001 - DBAPI objects
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA foreign_keys=ON")
    cursor.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_MS}")
    cursor.execute("PRAGMA synchronous=NORMAL")
    cursor.close()


def ensure_sqlite_folder(url: str) -> None:
    """Create the folder of a SQLite file URL if it is missing (a fresh machine has no data
    folder yet); other URLs are left alone."""
    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite" and parsed.database not in (None, "", ":memory:"):
        Path(parsed.database).parent.mkdir(parents=True, exist_ok=True)


#: Every engine this process made (and still holds), for :func:`close_all`.
_ENGINES: weakref.WeakSet[Engine] = weakref.WeakSet()


def make_engine(url: str) -> Engine:
    """A new engine for ``url``; SQLite files and their folder are created on demand.

    :param url: a SQLAlchemy URL (see :func:`fleetdb.config.database_url`).
    """
    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite":
        ensure_sqlite_folder(url)
        engine = create_engine(url, connect_args={"timeout": SQLITE_BUSY_TIMEOUT_MS / 1000})
        event.listen(engine, "connect", _sqlite_pragmas)
    else:
        engine = create_engine(url, pool_pre_ping=True)
    _ENGINES.add(engine)
    return engine


def close_all() -> None:
    """Close the pooled connections of every engine made here (each engine stays usable).

    A process about to exit calls it: SQLite's last connection to a file, on closing,
    moves the write-ahead log into the file and removes it, so that a copy of the file
    alone holds every committed write.
    """
    for engine in list(_ENGINES):
        engine.dispose()


@lru_cache(maxsize=8)
def get_engine(url: str) -> Engine:
    """One engine per URL per process."""
    return make_engine(url)


def session(url: str) -> Session:
    """A new session on the process-wide engine for ``url``."""
    from sqlmodel import Session

    return Session(get_engine(url))


def is_sqlite(engine: Engine) -> bool:
    """Whether the engine talks to SQLite."""
    return engine.dialect.name == "sqlite"


def utc_now() -> datetime:
    """Now, in UTC, to the second."""
    return datetime.now(UTC).replace(microsecond=0)


def stamp(conn: Connection | Engine) -> datetime | str:
    """The time of a write, as this driver stores SQLAlchemy's UTC date-times."""
    now = utc_now()
    if conn.dialect.name == "sqlite":
        return now.strftime("%Y-%m-%d %H:%M:%S.%f")
    return now
