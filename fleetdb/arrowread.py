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
    return read_sqlite_many(path, [sql])[0]


def read_sqlite_many(path: str, queries: list[str], *,
                     concurrent: bool = False) -> list[pd.DataFrame]:
    """Run several queries in one child process (one start-up); a DataFrame each.

    The queries must return no NULLs (see :func:`read_sqlite`); wrap a nullable column
    in ``COALESCE`` beside an ``IS NULL`` flag.

    :param concurrent: one child per query, all running at once (on a machine with more
        than one core, the reads overlap). Each child reads in its own transaction: the
        queries must bound what they read (for example by the highest id at the start)
        when they have to agree with each other under concurrent writers.
    """
    import pyarrow as pa

    fd, out_path = tempfile.mkstemp(prefix="fleetdb-read-", suffix=".arrow")
    os.close(fd)
    outs = [f"{out_path}.{i}" for i in range(len(queries))]
    child = [sys.executable, "-m", "fleetdb._arrow_child", path]
    try:
        if concurrent:
            runs = [subprocess.Popen([*child, out, sql], stdout=subprocess.DEVNULL,
                                     stderr=subprocess.PIPE, text=True)
                    for sql, out in zip(queries, outs, strict=True)]
            failed = [(run.communicate()[1], run.returncode) for run in runs]
            errors = [err for err, code in failed if code != 0]
        else:
            done = subprocess.run([*child, out_path, *queries], capture_output=True, text=True,
                                  check=False)
            errors = [done.stderr] if done.returncode != 0 else []
        if errors:
            raise RuntimeError(f"Arrow read of {path} failed: {errors[0].strip()[-500:]}")
        frames = []
        for out in outs:
            with pa.memory_map(out, "r") as source:
                frames.append(pa.ipc.open_file(source).read_all().to_pandas())
        return frames
    finally:
        for leftover in (out_path, *outs):
            if os.path.exists(leftover):
                os.unlink(leftover)
