"""Alembic owns the schema: migrations build it, and they agree with the models."""

from __future__ import annotations

from sqlalchemy import inspect

from fleetdb import db as db_mod
from fleetdb import migrate


def test_upgrade_empty_database_and_models_agree(db_url: str) -> None:
    # Like `alembic check`: autogenerate finds nothing to change after upgrade head.
    migrate.upgrade(db_url)
    engine = db_mod.make_engine(db_url)
    assert migrate.current_revision(engine) == migrate.head_revision()
    assert migrate.schema_differences(engine) == []
    migrate.ensure_current(engine)
    engine.dispose()


def test_downgrade_to_base_and_up_again(db_url: str) -> None:
    migrate.upgrade(db_url)
    migrate.downgrade(db_url, "base")
    engine = db_mod.make_engine(db_url)
    assert set(inspect(engine).get_table_names()) <= {"alembic_version"}
    migrate.upgrade(db_url)
    assert migrate.schema_differences(engine) == []
    engine.dispose()
