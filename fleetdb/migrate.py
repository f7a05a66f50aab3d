"""Alembic driven from Python: upgrade, current revision, model/migration agreement."""

from __future__ import annotations

import re
from functools import cache
from pathlib import Path
from typing import TYPE_CHECKING

from sqlalchemy import inspect, text
from sqlalchemy.engine import Engine

from fleetdb.errors import SchemaOutOfDate

if TYPE_CHECKING:  # alembic is imported where it works (upgrades, comparisons): a third
    from alembic.config import Config  # of a second that checking the revision need not pay

MIGRATIONS_DIR = Path(__file__).resolve().parent.parent / "migrations"
_REVISION_LINE = re.compile(r"^(revision|down_revision)\b[^=]*=\s*(?:[\"']([^\"']*)[\"']|None)",
                            re.MULTILINE)


def alembic_config(url: str) -> Config:
    """An Alembic config pointing at fleetdb's migrations and the given database.

    :param url: SQLAlchemy URL of the database to migrate.
    """
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS_DIR))
    cfg.attributes["fleetdb_url"] = url
    return cfg


@cache
def head_revision() -> str:
    """The newest revision in migrations/versions: the one no other revision revises.

    Read from the ``revision`` and ``down_revision`` lines of the migration files, as
    Alembic writes them (the same answer as Alembic's ``ScriptDirectory``, checked in
    tests/test_migrations.py, without importing Alembic and every migration).
    """
    revisions, revised = set(), set()
    for path in (MIGRATIONS_DIR / "versions").glob("*.py"):
        for name, value in _REVISION_LINE.findall(path.read_text(encoding="utf-8")):
            (revisions if name == "revision" else revised).add(value)
    heads = revisions - revised - {""}
    if len(heads) != 1:
        raise RuntimeError(f"migrations/versions must have one head, found {sorted(heads)}")
    return heads.pop()


def current_revision(engine: Engine) -> str | None:
    """The revision the database is at, or None for an empty database (Alembic's version
    table, read directly)."""
    with engine.connect() as conn:
        if not inspect(conn).has_table("alembic_version"):
            return None
        rows = conn.execute(text("SELECT version_num FROM alembic_version")).scalars().all()
    return ",".join(sorted(rows)) or None


def upgrade(url: str, revision: str = "head") -> None:
    """Bring the database at ``url`` up to ``revision`` (creating it if empty)."""
    from alembic import command

    command.upgrade(alembic_config(url), revision)


def downgrade(url: str, revision: str) -> None:
    """Step the database at ``url`` down to ``revision``."""
    from alembic import command

    command.downgrade(alembic_config(url), revision)


def ensure_current(engine: Engine) -> None:
    """Raise :class:`SchemaOutOfDate` unless the database is at head."""
    current = current_revision(engine)
    if current != head_revision():
        raise SchemaOutOfDate(
            f"database schema is at {current or 'nothing (empty database)'}, "
            f"fleetdb needs {head_revision()}: run 'fleetdb init'"
        )


def schema_differences(engine: Engine) -> list:
    """What autogenerate would change to make the database match the models ([] = agree)."""
    from alembic.autogenerate import compare_metadata
    from alembic.migration import MigrationContext

    import fleetdb.models as models

    with engine.connect() as conn:
        ctx = MigrationContext.configure(conn, opts={"compare_type": True})
        return compare_metadata(ctx, models.metadata)
