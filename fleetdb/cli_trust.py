"""The ``fleetdb backup`` and ``fleetdb restore`` commands (registered in :mod:`fleetdb.cli`).

Thin over :mod:`fleetdb.backup`. On a PostgreSQL store both say how to use ``pg_dump`` and
``pg_restore`` instead, and exit 1.
"""

from __future__ import annotations

from pathlib import Path

import click

from fleetdb import config
from fleetdb.cli import db_option, friendly_errors

__all__ = ["backup", "restore"]


@click.command()
@click.argument("file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--force", is_flag=True, help="Replace FILE if it exists.")
@db_option
@friendly_errors
def backup(file: Path, force: bool, db: str | None) -> None:
    """Copy the SQLite store to FILE, safely while the dashboard and others use it.

    Uses SQLite's online backup API (never a plain file copy) and checks the copy's
    integrity before keeping it. For PostgreSQL use pg_dump (the command says how).

    \b
    Example:
        fleetdb backup --db shop.sqlite backups/shop-2026-03-02.sqlite
    """
    from fleetdb import backup as backup_mod

    url = config.database_url(db)
    info = backup_mod.backup(url, file, force=force)
    click.echo(f"Backed up {config.redact(url)} to {info.path}: {info.summary()}; "
               "integrity check ok")


@click.command()
@click.argument("file", type=click.Path(exists=True, dir_okay=False, path_type=Path))
@click.option("--force", is_flag=True,
              help="Replace the store even though it holds data (it is overwritten).")
@db_option
@friendly_errors
def restore(file: Path, force: bool, db: str | None) -> None:
    """Restore a backup made by 'fleetdb backup' into the store given by --db.

    Checks the backup first (integrity, a schema this fleetdb knows) and refuses to
    overwrite a store that holds data unless --force. For PostgreSQL use pg_restore.

    \b
    Example:
        fleetdb restore --db shop.sqlite backups/shop-2026-03-02.sqlite
    """
    from fleetdb import backup as backup_mod
    from fleetdb import migrate

    url = config.database_url(db)
    info = backup_mod.restore(file, url, force=force)
    click.echo(f"Restored {info.path} into {config.redact(url)}: {info.summary()}")
    head = migrate.head_revision()
    if info.revision != head:
        click.echo(f"The backup's schema {info.revision} is older than this fleetdb's {head}: "
                   "run 'fleetdb init' with the same --db to upgrade it.")
