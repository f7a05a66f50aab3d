"""Where the database is: ``--db`` flag, then ``FLEETDB_DATABASE_URL``, then a SQLite file.

A bare path (``shop.sqlite``) means a SQLite file; anything with ``://`` is a SQLAlchemy
URL (``postgresql+psycopg://user@host/db``). ``postgresql://`` is read as psycopg 3.
"""

from __future__ import annotations

import os
from pathlib import Path

from platformdirs import user_data_dir

ENV_VAR = "FLEETDB_DATABASE_URL"

#: Session limits (settings of ``fleetdb serve``): minutes without a request, and hours
#: since the login. Here, not in fleetdb.users, so the command's options need no models.
SESSION_SETTINGS: tuple[tuple[str, int, str], ...] = (
    ("session_idle_minutes", 30, "a session ends after this many minutes without a request"),
    ("session_max_hours", 12, "a session ends this many hours after the login, used or not"),
)


def default_sqlite_path() -> Path:
    """The SQLite file used when nothing else is configured."""
    return Path(user_data_dir("fleetdb", appauthor=False)) / "fleetdb.sqlite"


def normalise_url(value: str) -> str:
    """Turn a user's ``--db`` value into a SQLAlchemy URL.

    :param value: a URL or a file path.
    """
    value = value.strip()
    if "://" not in value:
        path = Path(value).expanduser().resolve()
        return f"sqlite:///{path}"
    if value.startswith("postgresql://") or value.startswith("postgres://"):
        return "postgresql+psycopg://" + value.split("://", 1)[1]
    return value


def database_url(flag: str | None = None) -> str:
    """Resolve the database URL: flag > environment > default SQLite file.

    :param flag: the ``--db`` value, if given.
    """
    if flag:
        return normalise_url(flag)
    env = os.environ.get(ENV_VAR)
    if env:
        return normalise_url(env)
    return normalise_url(str(default_sqlite_path()))


def redact(url: str) -> str:
    """The URL with any password hidden, for printing."""
    from sqlalchemy.engine import make_url

    return make_url(url).render_as_string(hide_password=True)
