"""Load the import files and single tests into the store: validated, atomic, idempotent.

Each file is one transaction: either every row of it is written, or none. A file whose
content was imported before is recognised by its SHA-256 and skipped. Rows already in the
store (same unit, time and hour meter for a test) are counted as present, not doubled.
Bulk rows go through the driver's executemany (SQLite) or COPY (PostgreSQL), not one ORM
object per row.
"""

from __future__ import annotations

import getpass
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from sqlalchemy import bindparam, text
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.exc import IntegrityError

from fleetdb import atmosphere, validate
from fleetdb.csvfiles import KIND_ORDER, CsvFile, read_csv
from fleetdb.db import stamp
from fleetdb.errors import InvalidInput, Problem
from fleetdb.models import ImportBatch

Progress = Callable[[int, int], None]  # (done, total)
CHUNK = 50_000
#: PostgreSQL advisory lock that makes imports take turns (any fixed number).
IMPORT_LOCK_KEY = 0x666C6565  # 'flee'
#: Longest author name the store keeps (``created_by``).
BY_MAX: int = ImportBatch.__table__.c.created_by.type.length


@dataclass
class ImportReport:
    """What one import did (or, on a dry run, would do)."""

    source: str
    kind: str
    rows_read: int = 0
    written: dict[str, int] = field(default_factory=dict)
    present: int = 0
    batch_id: int | None = None
    outcome: str = "imported"  # imported | already_imported | dry_run | present (only_new)
    unit_ids: list[int] = field(default_factory=list)
    test_ids: list[int] = field(default_factory=list)

    def summary(self) -> str:
        """One line for the terminal."""
        if self.outcome == "already_imported":
            return (f"{self.source}: already imported as batch {self.batch_id}; "
                    "nothing to do")
        counts = ", ".join(f"{n} {what}" for what, n in self.written.items()) or "nothing new"
        verb = "would write" if self.outcome == "dry_run" else "wrote"
        present = f"; {self.present} already present" if self.present else ""
        return f"{self.source} ({self.kind}, {self.rows_read} rows): {verb} {counts}{present}"


def current_user() -> str:
    """The operating-system user, the default author of a write."""
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return "unknown"


def _placeholders(conn: Connection, n: int) -> str:
    mark = "?" if conn.dialect.name == "sqlite" else "%s"
    return ", ".join([mark] * n)


def bulk_insert(conn: Connection, table: str, columns: list[str], rows: list[tuple],
                 progress: Progress | None = None) -> None:
    """Insert many rows through the driver: COPY on PostgreSQL, executemany on SQLite."""
    if not rows:
        return
    total = len(rows)
    if conn.dialect.name == "postgresql":
        cursor = conn.connection.driver_connection.cursor()
        with cursor.copy(f"COPY {table} ({', '.join(columns)}) FROM STDIN") as copy:
            for start in range(0, total, CHUNK):
                for row in rows[start:start + CHUNK]:
                    copy.write_row(row)
                if progress:
                    progress(min(start + CHUNK, total), total)
        cursor.close()
        return
    sql = f"INSERT INTO {table} ({', '.join(columns)}) VALUES ({_placeholders(conn, len(columns))})"
    cursor = conn.connection.driver_connection.cursor()
    for start in range(0, total, CHUNK):
        cursor.executemany(sql, rows[start:start + CHUNK])
        if progress:
            progress(min(start + CHUNK, total), total)
    cursor.close()


def _python_values(values: object) -> list:
    """A column slice as Python values for the driver, missing values as None."""
    if isinstance(values, pd.Series):
        missing = values.isna()
        if missing.any():
            return values.astype(object).where(~missing, None).tolist()
        values = values.to_numpy()
    if isinstance(values, np.ndarray):
        return values.tolist()
    return list(values)  # type: ignore[call-overload]


def bulk_insert_columns(conn: Connection, table: str, names: list[str], columns: list,
                        progress: Progress | None = None) -> int:
    """Insert column-wise data in chunks, so only one chunk of row tuples exists at a time.

    :param names: column names in the table.
    :param columns: one sequence per name (numpy array, Series, list) or a scalar for all.
    :returns: rows written.
    """
    total = next((len(c) for c in columns if hasattr(c, "__len__") and not isinstance(c, str)),
                 0)
    if not total:
        return 0
    pg = conn.dialect.name == "postgresql"
    cursor = conn.connection.driver_connection.cursor()
    sql = (f"INSERT INTO {table} ({', '.join(names)}) VALUES "
           f"({_placeholders(conn, len(names))})")
    copy_cm = cursor.copy(f"COPY {table} ({', '.join(names)}) FROM STDIN") if pg else None
    copy = copy_cm.__enter__() if copy_cm is not None else None
    try:
        for start in range(0, total, CHUNK):
            stop = min(start + CHUNK, total)
            parts = [[c] * (stop - start) if not hasattr(c, "__len__") or isinstance(c, str)
                     else _python_values(c[start:stop]) for c in columns]
            rows = list(zip(*parts, strict=True))
            if copy is not None:
                for row in rows:
                    copy.write_row(row)
            else:
                cursor.executemany(sql, rows)
            if progress:
                progress(stop, total)
    finally:
        if copy_cm is not None:
            copy_cm.__exit__(None, None, None)
        cursor.close()
    return total


def _db_time(conn: Connection, values: pd.Series) -> list:
    """Datetimes as the driver wants them (SQLite: SQLAlchemy's text format)."""
    if conn.dialect.name == "sqlite":
        return list(values.dt.strftime("%Y-%m-%d %H:%M:%S.%f"))
    return list(values.dt.to_pydatetime())


def none_for_na(values: pd.Series) -> list:
    return [None if pd.isna(v) else v for v in values.astype(object)]


# -- reference data ---------------------------------------------------------------------

def unit_refs(conn: Connection, fleet_nos: Iterable[str] | None = None) -> pd.DataFrame:
    """Known units: index fleet_no; unit_id, cylinders, fuel, site_baro_kpa, site, family.

    :param fleet_nos: only these fleet numbers (those not known are simply absent); None: all.
    """
    sql = ("SELECT u.fleet_no, u.id, f.cylinders, f.fuel, s.elevation_m, s.name, f.name "
           "FROM unit u JOIN engine_family f ON f.id = u.family_id JOIN site s ON s.id = u.site_id")
    if fleet_nos is None:
        rows = conn.execute(text(sql)).all()
    else:
        rows = conn.execute(text(sql + " WHERE u.fleet_no IN :fleet_nos").bindparams(
            bindparam("fleet_nos", expanding=True)), {"fleet_nos": list(fleet_nos)}).all()
    frame = pd.DataFrame(rows, columns=["fleet_no", "unit_id", "cylinders", "fuel",
                                        "elevation_m", "site", "engine_family"])
    frame["site_baro_kpa"] = atmosphere.pressure_kpa(frame["elevation_m"].astype(float))
    return frame.set_index("fleet_no")


# -- the import of one file ---------------------------------------------------------------

def import_files(engine: Engine, paths: Iterable[Path], *, dry_run: bool = False,
                 by: str | None = None, progress: Progress | None = None) -> list[ImportReport]:
    """Import several files, fleet files first, then events, then tests.

    Each file is atomic on its own. Stops at the first file with problems.

    :param engine: the store.
    :param paths: CSV files of the three kinds, recognised by their header.
    :param dry_run: validate and count, then roll back.
    :param by: who imports (default: the operating-system user).
    :param progress: called with (rows done, rows total) while writing.
    """
    files = [read_csv(Path(p)) for p in paths]
    files.sort(key=lambda f: KIND_ORDER.index(f.kind))
    return [import_csv(engine, f, dry_run=dry_run, by=by, progress=progress) for f in files]


def import_csv(engine: Engine, csv: CsvFile, *, dry_run: bool = False, by: str | None = None,
               progress: Progress | None = None, source: str = "csv",
               only_new: bool = False) -> ImportReport:
    """Validate and write one parsed file in one transaction (see :func:`import_files`).

    :param only_new: write nothing at all (not even the batch) when any of its rows is
        already in the store; the report's outcome is then ``present``.
    """
    from fleetdb import access

    if not dry_run:  # a dry run writes nothing: anyone may check a file
        access.require(_RIGHT_TO_IMPORT[csv.kind], f"import a {csv.kind} file")
    by = access.author(by)
    if len(by) > BY_MAX:
        raise InvalidInput([Problem(csv.name, None, "by", f"the author's name has {len(by)} "
                                    f"characters; at most {BY_MAX} are kept")])
    report = ImportReport(source=csv.name, kind=csv.kind, rows_read=len(csv.frame))
    with engine.connect() as conn:  # one transaction; leaving without commit rolls back
        previous = conn.execute(text("SELECT id FROM import_batch WHERE content_sha256 = :h"),
                                {"h": csv.sha256}).scalar()
        if previous is not None:
            report.batch_id, report.outcome = previous, "already_imported"
            return report
        try:
            batch_id = conn.execute(text(
                "INSERT INTO import_batch (file_name, content_sha256, file_kind, rows_read, "
                "rows_written, rows_present, outcome, created_at, created_by) VALUES "
                "(:name, :sha, :kind, :rows, 0, 0, 'importing', :at, :by) RETURNING id"),
                {"name": Path(csv.name).name[:255], "sha": csv.sha256, "kind": csv.kind,
                 "rows": len(csv.frame), "at": stamp(conn), "by": by}).scalar_one()
        except IntegrityError:
            # The same content is being imported at this very moment by another writer.
            conn.rollback()
            report.batch_id = conn.execute(text(
                "SELECT id FROM import_batch WHERE content_sha256 = :h"),
                {"h": csv.sha256}).scalar()
            report.outcome = "already_imported"
            return report
        if conn.dialect.name == "postgresql":
            # Writers take turns, as SQLite's write lock makes them: the rows already in
            # the store are read after this point, and primary keys are reserved in order.
            conn.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": IMPORT_LOCK_KEY})
        from fleetdb.registry import import_fleet

        writer = {"fleet": import_fleet, "tests": _import_tests, "events": _import_events}
        writer[csv.kind](conn, csv, report, batch_id=batch_id, by=by, progress=progress,
                         source=source)
        conn.execute(text("UPDATE import_batch SET rows_written = :w, rows_present = :p, "
                          "outcome = 'imported' WHERE id = :id"),
                     {"w": sum(report.written.values()), "p": report.present, "id": batch_id})
        if dry_run or (only_new and report.present):
            report.outcome = "present" if only_new and report.present else "dry_run"
            conn.rollback()
        else:
            report.batch_id = batch_id
            _audit_import(conn, csv, report, source, by)
            conn.commit()
    return report


#: The right each kind of file needs (see fleetdb.access).
_RIGHT_TO_IMPORT = {"fleet": "fleet", "tests": "log_test", "events": "service_event"}


def _audit_import(conn: Connection, csv: CsvFile, report: ImportReport, source: str,
                  by: str) -> None:
    """Record the write in the audit trail, linked to the units it touched."""
    from fleetdb import audit

    name = Path(csv.name).name
    counts = ", ".join(f"{n} {what}" for what, n in report.written.items()) or "nothing new"
    if source not in ("cli", "form", "capture") or csv.kind != "tests":
        action, summary = "import", f"imported {csv.kind} file {name} ({source}): {counts}"
    else:
        action = "test.log"
        summary = (f"logged test {', '.join(map(str, report.test_ids))} from the {source} "
                   f"({counts})")
    unit_ids = report.unit_ids
    if csv.kind == "fleet":  # the units the file names (new or already present)
        named = set(csv.frame["fleet_no"].str.strip())
        unit_ids = [u for u, f in conn.execute(text("SELECT id, fleet_no FROM unit")) if f in named]
    audit.record(conn, action, summary, unit_ids=unit_ids,
                 detail={"batch_id": report.batch_id, "file": name, "kind": csv.kind,
                         "source": source, "written": report.written,
                         "present": report.present, "test_ids": report.test_ids[:1000]},
                 by=by)


def raise_if(problems: validate.Problems) -> None:
    if problems:
        raise InvalidInput(problems.sorted())


def _import_tests(conn: Connection, csv: CsvFile, report: ImportReport, *, batch_id: int | None,
                  by: str, progress: Progress | None, source: str) -> None:
    problems = validate.Problems(csv.name)
    # A file of a few units (a logged test) reads only those units.
    named = csv.frame["fleet_no"].unique()
    units = unit_refs(conn, None if len(named) > UNITS_READ_BY_INDEX
                      else [f for f in named.tolist() if isinstance(f, str)])
    now = pd.Timestamp.now() + pd.Timedelta(days=1)
    # The text of the columns that messages quote later stays with the file; the rest is
    # handed to tests_rows, which frees each column once converted.
    text_frame = csv.frame
    csv.frame = text_frame[["value", "units"]]
    rows = validate.tests_rows(text_frame, units, problems, now, consume=True)
    del units, text_frame
    _release_arrow_memory()
    raise_if(problems)

    key = ["unit_id", "tested_at", "hours"]
    conds = list(validate.CONDITION_RANGES) + ["throttle_open", "technician", "note"]
    # Group number of each line, numbered in order of first appearance (as ngroup with
    # sort=False); no key is blank once tests_rows has passed.
    gid = rows.groupby(key, sort=False).ngroup().to_numpy()
    n_groups = int(gid.max()) + 1 if len(gid) else 0
    firsts = validate.group_conflicts(rows, key, conds, problems, "test", gid=gid)
    # One integer per (test, kind, cylinder): cylinders are within the engine's count here.
    kind_code = pd.factorize(rows["kind"])[0].astype(np.int64)
    cylinder = rows["cylinder"].to_numpy(dtype=np.int64, na_value=0)
    reading_key = (gid * (int(kind_code.max(initial=0)) + 1) + kind_code) \
        * (int(cylinder.max(initial=0)) + 1) + cylinder
    dup = pd.Series(pd.Series(reading_key).duplicated(keep="first").to_numpy(),
                    index=rows.index)
    problems.add(dup, "cylinder", lambda line: f"a second {rows['kind'][line]} reading for the "
                 "same cylinder of the same test")
    # Vacuum may not exceed the ambient pressure where it was taken.
    baro = rows["baro_kpa"].fillna(rows["site_baro_kpa"])
    over = rows["kind"].isin(("vacuum_cranking", "vacuum_idle")) & (rows["value_si"] > baro)
    problems.add(over, "value", lambda line: f"{csv.frame['value'][line]} "
                 f"{csv.frame['units'][line]} of vacuum is more than the ambient pressure "
                 f"({baro[line]:.1f} kPa)")
    raise_if(problems)
    del over, dup, kind_code, cylinder, reading_key

    # One row per test: its key from its first line, each condition from the first line
    # that gives it.
    first_line = np.flatnonzero(~pd.Series(gid).duplicated().to_numpy())
    tests = pd.DataFrame({c: rows[c].to_numpy()[first_line] for c in key})
    tests["tested_at"] = tests["tested_at"].astype("datetime64[us]")
    for c in conds:
        tests[c] = firsts[c].reindex(pd.RangeIndex(n_groups)).to_numpy() if len(firsts[c]) \
            else rows[c].iloc[:0].reindex(pd.RangeIndex(n_groups)).to_numpy()
    tests["fleet_no"] = rows["fleet_no"].to_numpy()[first_line]
    tests["line"] = rows.index.to_numpy()[first_line]
    del firsts

    file_units = _unit_list(tests["unit_id"])
    existing = pd.DataFrame(conn.execute(text(
        "SELECT unit_id, tested_at, hours FROM test" + _units_where(file_units))).all(),
        columns=key)
    existing["tested_at"] = pd.to_datetime(existing["tested_at"]).astype("datetime64[us]")
    _check_hours_forward(conn, tests, existing, problems, file_units)
    raise_if(problems)

    merged = tests.merge(existing.assign(present=True), on=key, how="left")
    is_present = merged["present"].fillna(False).to_numpy(dtype=bool)
    del merged, existing
    report.present = int(is_present.sum())
    report.unit_ids = sorted(int(u) for u in tests["unit_id"].unique())
    n = int((~is_present).sum())
    ids = _allocate_ids(conn, "test", n)
    # The test id of every line (-1: the test is already in the store), and the lines to
    # write in test order, so tests and their readings go in together, chunk by chunk.
    test_id_of_gid = np.full(n_groups, -1, dtype=np.int64)
    test_id_of_gid[~is_present] = ids
    test_id = test_id_of_gid[gid]
    order = np.flatnonzero(test_id >= 0)
    if len(order) and np.any(np.diff(test_id[order]) < 0):
        order = order[np.argsort(test_id[order], kind="stable")]
    # Columns stay in their compact form (the typed text in Arrow); each chunk becomes
    # Python values only when it is written.
    in_order = len(order) == len(rows) and not np.any(np.diff(order) != 1)
    readings = pd.DataFrame({
        "test_id": test_id[order],
        **{c: (rows[c] if in_order else rows[c].iloc[order]).reset_index(drop=True)
           for c in ("kind", "cylinder", "value_si", "typed_value", "typed_unit")}})
    rows = baro = None  # freed: the lines are in `readings` now
    del gid, test_id, order
    csv.frame = csv.frame.iloc[:0]  # the text is no longer needed: free it before writing
    _release_arrow_memory()
    new_tests = tests[~is_present]
    del tests
    at = stamp(conn)
    test_columns = [np.asarray(ids, dtype=np.int64),
                    new_tests["unit_id"].to_numpy(dtype=np.int64),
                    _db_time(conn, new_tests["tested_at"]),
                    new_tests["hours"].to_numpy(dtype=float),
                    *(new_tests[c] for c in conds), source, batch_id, at, by]
    readings_written = _write_tests_and_readings(
        conn, ["id", "unit_id", "tested_at", "hours", *conds, "source", "batch_id",
               "created_at", "created_by"], test_columns, readings, progress)
    if conn.dialect.name == "postgresql" and n:
        conn.execute(text("SELECT setval(pg_get_serial_sequence('test', 'id'), "
                          "(SELECT MAX(id) FROM test))"))
    report.written = {"tests": n, "readings": readings_written}
    report.test_ids = ids


def _write_tests_and_readings(conn: Connection, test_names: list[str], test_columns: list,
                              readings: pd.DataFrame, progress: Progress | None) -> int:
    """Write tests and their readings together, a chunk of tests then their readings.

    The readings' foreign-key look-ups then find their tests in pages just written (as the
    floor does), instead of in a table written whole before them.

    :param test_columns: columns of the tests in id order (see :func:`bulk_insert_columns`).
    :param readings: test_id (ascending), kind, cylinder, value_si, typed_value, typed_unit.
    :returns: readings written.
    """
    ids = test_columns[0]
    reading_test = readings["test_id"].to_numpy()
    total = len(readings)
    names = list(readings.columns)
    done = test_start = 0
    while test_start < len(ids) or done < total:
        # Enough tests for about CHUNK readings (always at least one test).
        stop_reading = min(done + CHUNK, total)
        if stop_reading < total:
            last_test = reading_test[stop_reading - 1]
            stop_reading = int(np.searchsorted(reading_test, last_test, side="right"))
        test_stop = (len(ids) if stop_reading >= total
                     else max(int(np.searchsorted(ids, reading_test[stop_reading])),
                              test_start + 1))
        bulk_insert_columns(conn, "test", test_names,
                            [_slice(c, test_start, test_stop) for c in test_columns])
        chunk = readings.iloc[done:stop_reading]
        bulk_insert_columns(conn, "reading", names, [chunk[c] for c in names])
        done, test_start = stop_reading, test_stop
        if progress and total:
            progress(done, total)
    return total


def _release_arrow_memory() -> None:
    """Hand memory that Arrow freed back to the system (its pool keeps it otherwise)."""
    try:
        import pyarrow as pa
    except ImportError:  # pragma: no cover - pandas 3 brings pyarrow here
        return
    pa.default_memory_pool().release_unused()


def _slice(column: object, start: int, stop: int) -> object:
    """Rows ``start:stop`` of a column, or the scalar that fills every row."""
    if not hasattr(column, "__len__") or isinstance(column, str):
        return column
    if isinstance(column, pd.Series):
        return column.iloc[start:stop]
    return column[start:stop]  # type: ignore[index]


def _allocate_ids(conn: Connection, table: str, n: int) -> list[int]:
    """Reserve ``n`` primary keys for a bulk insert inside the current write transaction."""
    if n == 0:
        return []
    if conn.dialect.name == "postgresql":
        return [r[0] for r in conn.execute(text(
            f"SELECT nextval(pg_get_serial_sequence('{table}', 'id')) "
            "FROM generate_series(1, :n)"), {"n": n})]
    # SQLite: the import_batch insert already holds the write lock, so MAX(id) is stable.
    start = conn.execute(text(f"SELECT COALESCE(MAX(id), 0) FROM {table}")).scalar_one()
    return list(range(start + 1, start + 1 + n))


#: Up to this many units in a file, the stored tests and events are read for those units
#: only (through the unit's index); a larger file reads them whole, one scan.
UNITS_READ_BY_INDEX = 500


def _unit_list(unit_ids: pd.Series) -> list[int] | None:
    """The distinct units of a file, or None when there are too many to name in a query."""
    distinct = unit_ids.unique()
    return None if len(distinct) > UNITS_READ_BY_INDEX else sorted(int(u) for u in distinct)


def _units_where(unit_ids: list[int] | None, first: bool = True) -> str:
    """``WHERE unit_id IN (...)`` for these units (integers, written inline); '' for all."""
    if unit_ids is None:
        return ""
    return f" {'WHERE' if first else 'AND'} unit_id IN ({','.join(map(str, unit_ids)) or 'NULL'})"


def _check_hours_forward(conn: Connection, tests: pd.DataFrame, existing: pd.DataFrame,
                         problems: validate.Problems, unit_ids: list[int] | None) -> None:
    """Hour meters only go forward in time, except across a recorded meter replacement.

    :param existing: the stored tests of ``unit_ids`` (None: of every unit).
    """
    meters = pd.DataFrame(conn.execute(text(
        "SELECT unit_id, date FROM service_event WHERE kind = 'hour_meter'"
        + _units_where(unit_ids, first=False))).all(), columns=["unit_id", "date"])
    frame = pd.concat([existing.assign(line=np.nan),
                       tests[["unit_id", "tested_at", "hours", "line"]]], ignore_index=True)
    frame = frame.drop_duplicates(["unit_id", "tested_at", "hours"], keep="last")
    frame["unit_id"] = frame["unit_id"].astype(int)
    frame["segment"] = 0
    if not meters.empty:
        meters["date"] = pd.to_datetime(meters["date"]).astype("datetime64[us]")
        meters = meters.sort_values("date")
        meters["segment"] = meters.groupby("unit_id").cumcount() + 1
        frame = pd.merge_asof(frame.sort_values("tested_at").drop(columns="segment"),
                              meters.astype({"unit_id": int}), left_on="tested_at",
                              right_on="date", by="unit_id", direction="backward")
        frame["segment"] = frame["segment"].fillna(0)
    frame = frame.sort_values(["unit_id", "segment", "tested_at", "hours"], kind="stable")
    same = (frame["unit_id"].eq(frame["unit_id"].shift())
            & frame["segment"].eq(frame["segment"].shift()))
    back = same & (frame["hours"] < frame["hours"].shift())
    if not back.any():
        return
    prev = frame.shift()
    for idx in frame.index[back.to_numpy()][: validate.MAX_LINES_PER_PROBLEM]:
        row, before = frame.loc[idx], prev.loc[idx]
        line = row["line"] if not pd.isna(row["line"]) else before["line"]
        problems.one(int(line), "hours",
                     f"{row['hours']:g} h on {row['tested_at']:%Y-%m-%d} is less than "
                     f"{before['hours']:g} h on {before['tested_at']:%Y-%m-%d} for this unit; "
                     "hour meters only go forward (record an hour_meter event if the meter "
                     "was replaced)")


def _import_events(conn: Connection, csv: CsvFile, report: ImportReport, *,
                   batch_id: int | None, by: str, progress: Progress | None,
                   source: str) -> None:
    problems = validate.Problems(csv.name)
    rows = validate.event_rows(csv.frame, unit_refs(conn), problems,
                               pd.Timestamp.now() + pd.Timedelta(days=1))
    raise_if(problems)
    key = ["unit_id", "date", "kind", "cylinders"]
    dup = rows.duplicated(key)
    problems.add(dup, "kind", "the same event appears on an earlier line")
    raise_if(problems)
    existing = pd.DataFrame(conn.execute(text(
        "SELECT unit_id, date, kind, cylinders FROM service_event")).all(), columns=key)
    existing["date"] = pd.to_datetime(existing["date"]).astype("datetime64[us]")
    merged = rows.merge(existing.assign(present=True), on=key, how="left")
    is_present = merged["present"].fillna(False).to_numpy(dtype=bool)
    new = rows[~is_present]
    at = stamp(conn)
    dates = [d.date() for d in new["date"]]
    bulk_insert(conn, "service_event",
                 ["unit_id", "date", "hours", "kind", "cylinders", "note", "batch_id",
                  "created_at", "created_by"],
                 list(zip(new["unit_id"].astype(int).tolist(),
                          [d.isoformat() for d in dates] if conn.dialect.name == "sqlite"
                          else dates,
                          none_for_na(new["hours"]), new["kind"].tolist(),
                          new["cylinders"].tolist(), none_for_na(new["note"]),
                          [batch_id] * len(new), [at] * len(new), [by] * len(new),
                          strict=True)))
    report.present = int(is_present.sum())
    report.written = {"events": len(new)}
    report.unit_ids = sorted(int(u) for u in rows["unit_id"].unique())
