"""Fast bulk reads of a SQLite file through Arrow (ADBC), in a separate process.

The ADBC driver carries its own copy of SQLite. Two copies of SQLite in one process must
never open the same file: POSIX locks are per process, so one copy can silently drop the
other's locks (and, as seen here, miss rows still in the write-ahead log). The read
therefore runs in a short-lived child process that uses only ADBC's copy; it hands the
result back as an Arrow IPC file, which the parent maps without copying.
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # pandas and pyarrow are imported when used: starting a read needs neither
    import pandas as pd


def available() -> bool:
    """Whether the Arrow reader can be used here."""
    try:
        import adbc_driver_sqlite.dbapi  # noqa: F401
        import pyarrow  # noqa: F401
    except ImportError:
        return False
    return True


def read_sqlite(path: str, sql: str) -> pd.DataFrame:
    """Run ``sql`` on the SQLite file at ``path`` in a child process and return a DataFrame.

    The query must return no NULLs: ADBC infers each column's type from its first rows.

    :param path: the SQLite database file.
    :param sql: a SELECT statement.
    :raises RuntimeError: when the child fails (its message included).
    """
    return to_pandas(read_sqlite_tables(path, [[sql]])[0])


def to_pandas(table: Any, *, pool: Any = None) -> pd.DataFrame:
    """An Arrow table as a DataFrame, converted in the Arrow memory pool ``pool`` (None:
    Arrow's default)."""
    return table.to_pandas(memory_pool=pool)


def read_sqlite_tables(path: str, frames: list[list[str]], *, narrow: bool = False,
                       timestamps: tuple[str, ...] = ()) -> list[Any]:
    """Read several Arrow tables at once, each the rows of one or more queries.

    Every query runs in a child process of its own, all at the same time (on a machine
    with more than one core the reads overlap): split a long read into queries over
    ranges of ids to spread it. The queries of one table must give the same columns;
    their rows are joined in order. Each child reads in its own transaction: queries
    that must agree with each other under concurrent writers have to bound what they
    read (for example by the highest id at the start).

    The tables are memory-mapped from the children's files (removed at once; the pages
    stay readable while the tables are held), so a process forked afterwards shares them.
    The queries must return no NULLs (see :func:`read_sqlite`); wrap a nullable column
    in ``COALESCE`` beside an ``IS NULL`` flag.

    :param frames: per table, its queries.
    :param narrow: each integer column in the smallest integer type that holds its values
        (chosen per query: the queries of one table may then differ in such types, which
        :func:`pyarrow.concat_tables` is asked to unify).
    :param timestamps: text columns to parse from ISO 8601 into timestamps in the child
        (left as text where a value does not parse).
    :raises RuntimeError: when a child fails (its message included).
    """
    return start_sqlite_tables(path, frames, narrow=narrow, timestamps=timestamps).collect()


@dataclass
class PendingTables:
    """:func:`read_sqlite_tables` started: its children run until :meth:`collect`."""

    path: str
    frames: list[list[str]]
    runs: list[subprocess.Popen]
    outs: list[str]
    base: str

    def collect(self) -> list[Any]:
        """Wait for the children and return the tables (see :func:`read_sqlite_tables`).

        :raises RuntimeError: when a child fails (its message included).
        """
        import pyarrow as pa

        try:
            errors = [err for err, code in ((run.communicate()[1], run.returncode)
                                            for run in self.runs) if code != 0]
            if errors:
                raise RuntimeError(f"Arrow read of {self.path} failed: "
                                   f"{errors[0].strip()[-500:]}")
            result, at = [], 0
            for group in self.frames:
                tables = [pa.ipc.open_file(pa.memory_map(out, "r")).read_all()
                          for out in self.outs[at:at + len(group)]]
                at += len(group)
                result.append(pa.concat_tables(tables, promote_options="permissive")
                              if len(tables) > 1 else tables[0])
            return result
        finally:
            self._remove_files()

    def cancel(self) -> None:
        """Stop the children and remove their files (a read no one will collect)."""
        for run in self.runs:
            if run.poll() is None:
                run.kill()
            run.communicate()
        self._remove_files()

    def _remove_files(self) -> None:
        for leftover in (self.base, *self.outs):
            if os.path.exists(leftover):
                os.unlink(leftover)


def start_sqlite_tables(path: str, frames: list[list[str]], *, narrow: bool = False,
                        timestamps: tuple[str, ...] = ()) -> PendingTables:
    """Start :func:`read_sqlite_tables` (same parameters) and return at once; the tables
    come from the result's :meth:`~PendingTables.collect`. Imports neither pandas nor
    pyarrow, so a command can start a read before its own heavy imports."""
    fd, base = tempfile.mkstemp(prefix="fleetdb-read-", suffix=".arrow")
    os.close(fd)
    queries = [sql for group in frames for sql in group]
    outs = [f"{base}.{i}" for i in range(len(queries))]
    child = [sys.executable, "-m", "fleetdb._arrow_child", path]
    options = (["--narrow"] if narrow else []) + [
        arg for name in timestamps for arg in ("--timestamp", name)]
    pending = PendingTables(path, frames, [], outs, base)
    try:
        for sql, out in zip(queries, outs, strict=True):
            pending.runs.append(subprocess.Popen(
                [*child, out, sql, *options], stdout=subprocess.DEVNULL,
                stderr=subprocess.PIPE, text=True))
    except BaseException:
        pending.cancel()
        raise
    return pending
