"""Alembic environment: the database comes from fleetdb.config, the tables from fleetdb.models."""

from __future__ import annotations

from alembic import context
from sqlalchemy import create_engine, pool, text

import fleetdb.models as models
from fleetdb.config import database_url
from fleetdb.db import ensure_sqlite_folder

config = context.config
target_metadata = models.metadata


def _url() -> str:
    return config.attributes.get("fleetdb_url") or database_url()


def run_migrations_offline() -> None:
    context.configure(
        url=_url(), target_metadata=target_metadata, literal_binds=True, render_as_batch=True
    )
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    url = _url()
    ensure_sqlite_folder(url)
    engine = create_engine(url, poolclass=pool.NullPool)
    with engine.connect() as connection:
        if connection.dialect.name == "sqlite":
            # Batch mode copies tables; foreign keys must be off while it does.
            connection.execute(text("PRAGMA foreign_keys=OFF"))
            connection.commit()
        context.configure(
            connection=connection,
            target_metadata=target_metadata,
            render_as_batch=True,
            compare_type=True,
        )
        with context.begin_transaction():
            context.run_migrations()
    engine.dispose()


if context.is_offline_mode():
    run_migrations_offline()
else:
    run_migrations_online()
