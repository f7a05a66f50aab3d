"""The whole fleet's bulk read of a SQLite store: its queries, and its start, which a
command can make before it imports the analysis.

A full refresh of a large SQLite store reads every test and reading through Arrow, in
child processes (:mod:`fleetdb.arrowread`). The children need only the file and the
queries, so this module uses the standard library alone: ``fleetdb refresh`` calls
:func:`begin` first, the children read while the parent imports pandas, scipy and
SQLAlchemy (most of a second of one core), and :func:`fleetdb.frames.read` takes the
started read (:func:`take`) instead of starting its own. A read begun and never taken is
stopped and its files removed when the process exits.
"""

from __future__ import annotations

import atexit
import importlib.util
import sqlite3
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import quote

from fleetdb import arrowread

#: Above this many readings a SQLite file is read through Arrow in child processes.
ARROW_READ_MIN_ROWS = 200_000

#: The kinds of reading (models.READING_KINDS, sorted; the analysis need not import the
#: models): the Arrow read gives each reading's kind as its position here.
KINDS = ("compression", "leakdown", "relative", "vacuum_cranking", "vacuum_idle", "wet")

#: Columns of the tests frame that only the unit pages show (the analysis never reads them).
DETAIL_COLUMNS = ("technician", "note", "source")
MEASURED = ("battery_v", "crank_rpm", "engine_temp_c", "baro_kpa")  # nullable REAL columns
TEXTS = ("technician", "note")  # nullable text details

#: Stands in for NULL in the Arrow read's measurement columns: far outside any value the
#: store accepts (validation bounds every measurement), and exact in a REAL.
NULL_MEASUREMENT = -1e300

#: The highest reading and test ids: the read stops there (see :class:`FleetRead`).
BOUNDS_SQL = ("SELECT (SELECT COALESCE(MAX(id), 0) FROM reading), "
              "(SELECT COALESCE(MAX(id), 0) FROM test)")


def tests_sql(details: bool = True) -> str:
    """The tests query of the Arrow read (``details``: with ``DETAIL_COLUMNS``): no NULLs,
    no voids (read apart: few).

    ADBC infers a column's type from its first rows and fails on a later value of another
    type, so the Arrow read never returns NULL: a measurement reads ``NULL_MEASUREMENT``,
    the throttle flag -1, a text detail '' beside an ``IS NULL`` flag.
    :func:`fleetdb.frames._restore_nulls` puts the NULLs back.
    """
    columns = ["t.id AS test_id", "t.unit_id", "t.tested_at", "t.hours",
               *(f"COALESCE(t.{name}, {NULL_MEASUREMENT!r}) AS {name}" for name in MEASURED),
               "COALESCE(t.throttle_open, -1) AS throttle_open"]
    if details:
        columns += [part for name in TEXTS for part in (
            f"COALESCE(t.{name}, '') AS {name}", f"(t.{name} IS NULL) AS {name}__null")]
        columns.append("t.source")
    return "SELECT " + ", ".join(columns) + " FROM test t"


def readings_sql(coded: bool = False) -> str:
    """The readings query (``coded``: each kind as its position in ``KINDS``)."""
    kind = ("CASE r.kind " + " ".join(f"WHEN '{k}' THEN {i}" for i, k in enumerate(KINDS))
            + " ELSE -1 END AS kind") if coded else "r.kind"
    return (f"SELECT r.test_id, {kind}, COALESCE(r.cylinder, 0) AS cylinder, "
            "r.value_si AS value FROM reading r")


@dataclass
class FleetRead:
    """A started Arrow read of the whole fleet: the tests, and the readings in two halves
    by id, each in a child process of its own.

    Every child stops at the highest test id when the read began, so a test logged
    meanwhile is left out whole (a test and its readings are written in one
    transaction); the voids are read apart, bounded alike.
    """

    path: str
    last_test: int
    last_reading: int
    details: bool
    pending: arrowread.PendingTables

    def collect(self) -> tuple[object, object]:
        """The tests and readings as Arrow tables (waits for the children)."""
        tests, readings = self.pending.collect()
        return tests, readings


def start(path: str, last_test: int, last_reading: int, *, details: bool) -> FleetRead:
    """Start the Arrow read of the whole fleet in ``path``, bounded by those ids."""
    half, coded = last_reading // 2, readings_sql(coded=True)
    pending = arrowread.start_sqlite_tables(path, [
        [f"{tests_sql(details)} WHERE t.id <= {last_test}"],
        [f"{coded} WHERE r.id <= {half} AND r.test_id <= {last_test}",
         f"{coded} WHERE r.id > {half} AND r.test_id <= {last_test}"]],
        narrow=True, timestamps=("tested_at",))
    return FleetRead(path, last_test, last_reading, details, pending)


_begun: dict[str, FleetRead] = {}


def begin(url: str, *, details: bool = False) -> bool:
    """Start the whole fleet's Arrow read of the store at ``url`` (a SQLAlchemy URL) for a
    later :func:`take`, when it is a SQLite file large enough to be read that way and the
    Arrow driver is installed. Returns whether a read was started; anything else (another
    database, a missing or empty file, a small store) is left to the usual read.
    """
    prefix = "sqlite:///"
    if not url.startswith(prefix) or len(url) == len(prefix):
        return False
    path = url[len(prefix):]
    if path in _begun or path == ":memory:" or "?" in path or not Path(path).is_file():
        return False
    if any(importlib.util.find_spec(name) is None
           for name in ("pyarrow", "adbc_driver_sqlite", "adbc_driver_manager")):
        return False
    try:  # read-only: never creates the file; the same SQLite as SQLAlchemy's driver
        with sqlite3.connect(f"file:{quote(path)}?mode=ro", uri=True) as conn:
            last_reading, last_test = conn.execute(BOUNDS_SQL).fetchone()
        conn.close()
    except sqlite3.Error:  # not a store (yet): the command says so itself
        return False
    if last_reading < ARROW_READ_MIN_ROWS:
        return False
    _begun[path] = start(path, int(last_test), int(last_reading), details=details)
    return True


def take(path: str, details: bool) -> FleetRead | None:
    """The read begun for ``path`` with those columns, if any (then no longer held here)."""
    read = _begun.get(path)
    if read is None or read.details != details:
        return None
    return _begun.pop(path)


@atexit.register
def _cancel_untaken() -> None:
    while _begun:
        _begun.popitem()[1].pending.cancel()
