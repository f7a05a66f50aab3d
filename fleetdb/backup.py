"""Backups of a SQLite store while it is in use, and their restore.

Both directions go through SQLite's online backup API (``sqlite3.Connection.backup``),
never a file copy: a copy of a live WAL database can miss the pages still in its ``-wal``
file, and replacing a file under open connections corrupts it (SQLite, "How To Corrupt An
SQLite Database File", sections 1.2 and 2). The backup reads one consistent snapshot in a
single step; in WAL mode the dashboard and other writers go on meanwhile. It is written
to a temporary file beside the target, checked (``PRAGMA integrity_check``), switched to
a self-contained rollback-journal file and only then renamed into place, so a failed
backup never leaves a half-written FILE.

A restore checks the backup first (a SQLite file, integrity check, a fleetdb schema
revision this fleetdb knows), refuses to overwrite a store that holds data unless told to,
and writes the backup into the target as one transaction of the backup API: a reader of
the target sees the old store or the restored one, never a mixture.

PostgreSQL stores are backed up with PostgreSQL's own tools (``pg_dump`` and
``pg_restore``); :func:`postgres_advice` says how, and both functions raise it.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import sqlite3
from dataclasses import dataclass
from pathlib import Path

from sqlalchemy.engine import make_url

from fleetdb.errors import FleetDBError

__all__ = ["BackupError", "BackupInfo", "backup", "inspect_backup", "postgres_advice",
           "restore", "sqlite_path"]

#: The first 16 bytes of every SQLite 3 database file (SQLite file format, section 1.3).
SQLITE_HEADER = b"SQLite format 3\x00"
#: How long a backup or restore waits for a lock held by another writer, seconds.
LOCK_WAIT_S = 30.0
#: Tables whose counts a backup reports.
COUNTED = ("unit", "test", "reading")


class BackupError(FleetDBError):
    """A backup or restore that cannot be done; nothing was changed."""


@dataclass(frozen=True)
class BackupInfo:
    """What a backup file holds."""

    path: Path
    revision: str | None  # the fleetdb schema revision (Alembic), None if not a fleetdb store
    counts: dict[str, int]  # rows of unit, test, reading
    size_bytes: int
    sha256: str

    def summary(self) -> str:
        """One line for the terminal."""
        counts = ", ".join(f"{n:,} {table}s" for table, n in self.counts.items())
        return (f"schema {self.revision}, {counts}, {self.size_bytes / 1e6:.1f} MB, "
                f"sha256 {self.sha256[:16]}")


def postgres_advice(url: str) -> str:
    """How to back up and restore a PostgreSQL store with PostgreSQL's own tools.

    :param url: the store's URL (its password is not repeated).
    """
    target = make_url(url).set(drivername="postgresql").render_as_string(hide_password=True)
    return ("a PostgreSQL store is backed up with PostgreSQL's tools, not with fleetdb: "
            f"pg_dump --format=custom --file FILE '{target}'; restore it into an empty "
            f"database with pg_restore --no-owner --dbname '{target}' FILE (README, Backups)")


def sqlite_path(url: str) -> Path:
    """The file of a SQLite store.

    :param url: a SQLAlchemy URL (see :func:`fleetdb.config.database_url`).
    :raises BackupError: for PostgreSQL (with :func:`postgres_advice`) or an in-memory store.
    """
    parsed = make_url(url)
    backend = parsed.get_backend_name()
    if backend == "postgresql":
        raise BackupError(postgres_advice(url))
    if backend != "sqlite":
        raise BackupError(f"backups are made for SQLite files only, not {backend}")
    if not parsed.database or parsed.database == ":memory:" or parsed.database.startswith(
            "file:"):
        raise BackupError("an in-memory database has no file to back up")
    return Path(parsed.database).expanduser().resolve()


def _connect(path: Path, *, read_only: bool) -> sqlite3.Connection:
    """A plain sqlite3 connection that never creates the file it opens."""
    mode = "ro" if read_only else "rw"
    conn = sqlite3.connect(f"{path.as_uri()}?mode={mode}", uri=True, timeout=LOCK_WAIT_S,
                           isolation_level=None)
    conn.execute(f"PRAGMA busy_timeout={int(LOCK_WAIT_S * 1000)}")
    return conn


def _integrity(conn: sqlite3.Connection) -> list[str]:
    """Problems that ``PRAGMA integrity_check`` and ``foreign_key_check`` find ([] = sound)."""
    found = [r[0] for r in conn.execute("PRAGMA integrity_check").fetchall()]
    problems = [] if found == ["ok"] else found
    orphans = conn.execute("PRAGMA foreign_key_check").fetchall()
    problems += [f"row {r[1]} of {r[0]} refers to a missing row of {r[2]}" for r in orphans[:10]]
    return problems


def _tables(conn: sqlite3.Connection) -> set[str]:
    return {r[0] for r in conn.execute(
        "SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%'")}


def _revision(conn: sqlite3.Connection, tables: set[str]) -> str | None:
    if "alembic_version" not in tables:
        return None
    row = conn.execute("SELECT version_num FROM alembic_version").fetchone()
    return None if row is None else str(row[0])


def _counts(conn: sqlite3.Connection, tables: set[str]) -> dict[str, int]:
    return {t: int(conn.execute(f"SELECT COUNT(*) FROM {t}").fetchone()[0])
            for t in COUNTED if t in tables}


def _sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _fsync(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _known_revisions() -> tuple[set[str], str]:
    from alembic.script import ScriptDirectory

    from fleetdb.migrate import alembic_config

    script = ScriptDirectory.from_config(alembic_config("sqlite://"))
    return {rev.revision for rev in script.walk_revisions()}, script.get_current_head()


def backup(url: str, target: Path, *, force: bool = False) -> BackupInfo:
    """Copy a SQLite store to ``target`` with the online backup API, safe while it is in use.

    :param url: the store's SQLAlchemy URL.
    :param target: the backup file to write (a self-contained SQLite file).
    :param force: replace ``target`` if it exists.
    :returns: what the backup holds.
    :raises BackupError: PostgreSQL, no such store, ``target`` exists, or the copy fails its
        integrity check; ``target`` is then left as it was.
    """
    source = sqlite_path(url)
    target = Path(target).expanduser().resolve()
    if not source.is_file():
        raise BackupError(f"no database file at {source}")
    if target == source:
        raise BackupError("the backup file must not be the database itself")
    if target.is_dir():
        raise BackupError(f"{target} is a folder; name the backup file")
    if target.exists() and not force:
        raise BackupError(f"{target} exists; use --force to replace it")
    partial = target.with_name(f".{target.name}.partial-{os.getpid()}")
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        partial.unlink(missing_ok=True)
        src = _connect(source, read_only=False)
        try:
            dst = sqlite3.connect(partial, isolation_level=None)
            try:
                # One step: one read transaction, so one consistent snapshot; WAL writers
                # carry on meanwhile (a stepwise copy would restart on every write).
                src.backup(dst, pages=-1)
                dst.execute("PRAGMA journal_mode=DELETE")  # one self-contained file
                problems = _integrity(dst)
                tables = _tables(dst)
                revision, counts = _revision(dst, tables), _counts(dst, tables)
            finally:
                dst.close()
        finally:
            src.close()
        if problems:
            raise BackupError("the copy failed its integrity check, nothing kept: "
                              + "; ".join(problems[:5]))
        _fsync(partial)
        os.replace(partial, target)
        _fsync(target.parent)
    except (sqlite3.Error, OSError) as exc:
        raise BackupError(f"backup of {source} failed: {exc}") from exc
    finally:
        with contextlib.suppress(OSError):
            partial.unlink(missing_ok=True)
    return BackupInfo(target, revision, counts, target.stat().st_size, _sha256(target))


def inspect_backup(path: Path) -> BackupInfo:
    """Check a backup file: SQLite, sound, and a fleetdb schema this fleetdb knows.

    :param path: the backup file.
    :raises BackupError: saying what is wrong with it.
    """
    path = Path(path).expanduser().resolve()
    if not path.is_file():
        raise BackupError(f"no backup file at {path}")
    try:
        with path.open("rb") as handle:
            head = handle.read(len(SQLITE_HEADER))
    except OSError as exc:
        raise BackupError(f"cannot read {path}: {exc.strerror}") from exc
    if head != SQLITE_HEADER:
        raise BackupError(f"{path} is not a SQLite database file")
    try:
        conn = _connect(path, read_only=True)
        try:
            problems = _integrity(conn)
            tables = _tables(conn)
            revision = _revision(conn, tables)
            counts = _counts(conn, tables) if not problems else {}
        finally:
            conn.close()
    except sqlite3.Error as exc:
        raise BackupError(f"{path} fails the integrity check: {exc}") from exc
    if problems:
        raise BackupError(f"{path} fails the integrity check: " + "; ".join(problems[:5]))
    if revision is None:
        raise BackupError(f"{path} is not a fleetdb store (no schema revision in it)")
    known, head = _known_revisions()
    if revision not in known:
        raise BackupError(f"{path} is at schema {revision}, which this fleetdb does not know "
                          f"(it knows up to {head}): restore it with a newer fleetdb")
    return BackupInfo(path, revision, counts, path.stat().st_size, _sha256(path))


def _holds_data(conn: sqlite3.Connection) -> bool:
    """Whether any table but the schema revision has a row."""
    return any(conn.execute(f'SELECT EXISTS (SELECT 1 FROM "{t}")').fetchone()[0]
               for t in _tables(conn) if t != "alembic_version")


def restore(backup_file: Path, url: str, *, force: bool = False) -> BackupInfo:
    """Write a checked backup into the SQLite store at ``url`` (created if missing).

    The target is written as one transaction through the backup API: other connections
    wait for it and then see the restored store. A target that holds data is refused
    unless ``force``.

    :param backup_file: a file made by :func:`backup`.
    :param url: the store to restore into.
    :param force: replace a store that holds data.
    :returns: what was restored (the backup's description).
    :raises BackupError: the backup fails a check, or the target holds data; nothing changed.
    """
    target = sqlite_path(url)
    info = inspect_backup(backup_file)
    if info.path == target:
        raise BackupError("the backup file is the database itself")
    if target.is_dir():
        raise BackupError(f"{target} is a folder, not a database file")
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        if target.exists():
            with target.open("rb") as handle:
                head = handle.read(len(SQLITE_HEADER))
            if head and head != SQLITE_HEADER:
                raise BackupError(f"{target} is not a SQLite database; not overwritten")
            dst = _connect(target, read_only=False)
        else:
            dst = sqlite3.connect(target, timeout=LOCK_WAIT_S, isolation_level=None)
        try:
            if _holds_data(dst) and not force:
                raise BackupError(f"{target} already holds data; use --force to replace it "
                                  "with the backup")
            src = _connect(info.path, read_only=True)
            try:
                src.backup(dst, pages=-1)
            finally:
                src.close()
            dst.execute("PRAGMA journal_mode=WAL")  # as fleetdb.db opens it
            problems = _integrity(dst)
            tables = _tables(dst)
            counts, revision = _counts(dst, tables), _revision(dst, tables)
        finally:
            dst.close()
    except (sqlite3.Error, OSError) as exc:
        raise BackupError(f"restore into {target} failed: {exc}") from exc
    if problems or counts != info.counts or revision != info.revision:
        raise BackupError(f"{target} after the restore does not match the backup: "
                          + "; ".join(problems[:5] or [f"{counts} vs {info.counts}"]))
    return info
