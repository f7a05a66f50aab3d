"""Alembic driven from Python: upgrade, current revision, model/migration agreement."""

from __future__ import annotations

from pathlib import Path

from alembic import command
from alembic.autogenerate import compare_metadata
from alembic.config import Config
from alembic.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy.engine import Engine

from fleetdb.errors import SchemaOutOfDate

MIGRATIONS_DIR = Path(__file__).resolve().parent.parent / "migrations"


def alembic_config(url: str) -> Config:
    """An Alembic config pointing at fleetdb's migrations and the given database.

    :param url: SQLAlchemy URL of the database to migrate.
    """
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS_DIR))
    cfg.attributes["fleetdb_url"] = url
    return cfg


def head_revision() -> str:
    """The newest revision in migrations/versions."""
    script = ScriptDirectory.from_config(alembic_config("sqlite://"))
    return script.get_current_head()


def current_revision(engine: Engine) -> str | None:
    """The revision the database is at, or None for an empty database."""
    with engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


def upgrade(url: str, revision: str = "head") -> None:
    """Bring the database at ``url`` up to ``revision`` (creating it if empty)."""
    command.upgrade(alembic_config(url), revision)


def downgrade(url: str, revision: str) -> None:
    """Step the database at ``url`` down to ``revision``."""
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
    import fleetdb.models as models

    with engine.connect() as conn:
        ctx = MigrationContext.configure(conn, opts={"compare_type": True})
        return compare_metadata(ctx, models.metadata)
