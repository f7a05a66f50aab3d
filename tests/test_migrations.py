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


def test_revisions_read_without_alembic_are_alembics_own(db_url: str) -> None:
    # Reference: Alembic's ScriptDirectory (the head) and MigrationContext (the revision a
    # database is at); fleetdb reads both without importing Alembic.
    from alembic.migration import MigrationContext
    from alembic.script import ScriptDirectory

    script = ScriptDirectory.from_config(migrate.alembic_config("sqlite://"))
    assert migrate.head_revision() == script.get_current_head()
    engine = db_mod.make_engine(db_url)

    def alembics() -> str | None:
        with engine.connect() as conn:
            return MigrationContext.configure(conn).get_current_revision()

    assert migrate.current_revision(engine) is None and alembics() is None  # empty
    for revision in [r.revision for r in script.walk_revisions()][::-1]:  # oldest first
        migrate.upgrade(db_url, revision)
        assert migrate.current_revision(engine) == alembics() == revision
    migrate.downgrade(db_url, "base")
    assert migrate.current_revision(engine) is None and alembics() is None
    engine.dispose()
