"""Load the analysis frames (see DEVELOPERS.md, "Analysis frames") from the store.

This is the only place the analysis reads the database. Large reads go through the
driver cursor (or, for SQLite files, the Arrow-based ADBC driver when installed), not
the ORM.
"""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd
from sqlalchemy import text
from sqlalchemy.engine import Engine

from fleetdb import arrowread, atmosphere


@dataclass
class Frames:
    """Everything the analysis needs, as plain DataFrames."""

    families: pd.DataFrame
    units: pd.DataFrame
    tests: pd.DataFrame
    readings: pd.DataFrame
    events: pd.DataFrame


def _query(engine: Engine, sql: str, params: dict | None = None) -> pd.DataFrame:
    """Run a query through the driver's own cursor (SQLAlchemy rows are slow to unpack)."""
    with engine.connect() as conn:
        if params:
            result = conn.execute(text(sql), params)
            return pd.DataFrame(result.fetchall(), columns=list(result.keys()))
        cursor = conn.connection.driver_connection.cursor()
        cursor.execute(sql)
        columns = [d[0] for d in cursor.description]
        rows = cursor.fetchall()
        cursor.close()
        return pd.DataFrame(rows, columns=columns)


def _sqlite_file(engine: Engine) -> str | None:
    url = engine.url
    if url.get_backend_name() == "sqlite" and url.database not in (None, "", ":memory:"):
        return url.database
    return None


#: Above this many readings a SQLite file is read through Arrow in a child process.
ARROW_READ_MIN_ROWS = 1_000_000


def _readings_query(engine: Engine, sql: str, whole_fleet: bool) -> pd.DataFrame:
    """The big read: a large SQLite read goes through Arrow (see :mod:`fleetdb.arrowread`).

    The query must return no NULLs: ADBC infers column types from the first rows.
    """
    path = _sqlite_file(engine)
    if path is not None and whole_fleet and arrowread.available():
        with engine.connect() as conn:
            rows = conn.execute(text("SELECT COALESCE(MAX(id), 0) FROM reading")).scalar_one()
        if rows >= ARROW_READ_MIN_ROWS:
            return arrowread.read_sqlite(path, sql)
    return _query(engine, sql)


def _unit_filter(unit_ids: list[int] | None, column: str) -> str:
    if unit_ids is None:
        return ""
    ids = ",".join(str(int(u)) for u in unit_ids) or "NULL"
    return f" WHERE {column} IN ({ids})"


def load(engine: Engine, unit_ids: list[int] | None = None,
         as_of: pd.Timestamp | None = None) -> Frames:
    """Read the frames for the whole fleet, or for some units.

    :param engine: the store.
    :param unit_ids: restrict to these units (None: all).
    :param as_of: ignore tests, events and voids after this moment (reproduce a past week).
    """
    families = _query(engine, "SELECT * FROM engine_family").rename(columns={"id": "family_id"})
    families = families.set_index("family_id").drop(columns=["created_at"])
    families["warm_test"] = families["warm_test"].astype(bool)
    units = _query(engine, "SELECT u.id AS unit_id, u.fleet_no, u.site_id, s.name AS site, "
                   "s.elevation_m, u.family_id, f.name AS family, u.in_service, "
                   "u.hours_per_week FROM unit u JOIN site s ON s.id = u.site_id "
                   "JOIN engine_family f ON f.id = u.family_id"
                   + _unit_filter(unit_ids, "u.id")).set_index("unit_id")
    units["site_baro_kpa"] = atmosphere.pressure_kpa(units["elevation_m"].astype(float))

    tests = _query(engine, "SELECT t.id AS test_id, t.unit_id, t.tested_at, t.hours, "
                   "t.battery_v, t.crank_rpm, t.engine_temp_c, t.baro_kpa, t.throttle_open, "
                   "t.technician, t.note, t.source, v.reason AS void_reason, "
                   "v.voided_at FROM test t LEFT JOIN test_void v ON v.test_id = t.id"
                   + _unit_filter(unit_ids, "t.unit_id"))
    tests["tested_at"] = pd.to_datetime(tests["tested_at"]).astype("datetime64[us]")
    if as_of is not None:
        tests = tests[tests["tested_at"] <= as_of]
        voided_at = pd.to_datetime(tests["voided_at"], utc=True).dt.tz_convert(None)
        tests.loc[voided_at > as_of, "void_reason"] = None
    tests = tests.set_index("test_id").sort_values(["unit_id", "tested_at"])
    tests["family_id"] = units["family_id"].reindex(tests["unit_id"]).to_numpy()
    tests["baro_measured"] = tests["baro_kpa"].notna()
    tests["baro_kpa"] = tests["baro_kpa"].astype(float).fillna(
        pd.Series(units["site_baro_kpa"].reindex(tests["unit_id"]).to_numpy(), index=tests.index))
    tests["throttle_open"] = tests["throttle_open"].astype("boolean")
    tests["voided"] = tests["void_reason"].notna()
    for col in ("hours", "battery_v", "crank_rpm", "engine_temp_c"):
        tests[col] = tests[col].astype(float)

    readings = _readings_query(
        engine, "SELECT r.test_id, r.kind, COALESCE(r.cylinder, 0) AS cylinder, "
        "r.value_si AS value FROM reading r"
        + (" JOIN test t ON t.id = r.test_id" + _unit_filter(unit_ids, "t.unit_id")
           if unit_ids is not None else ""), whole_fleet=unit_ids is None)
    readings = readings[readings["test_id"].isin(tests.index)]
    readings["kind"] = readings["kind"].astype("category")
    readings["cylinder"] = readings["cylinder"].astype("Int64").replace(0, pd.NA)
    readings["value"] = readings["value"].astype(float)

    events = _query(engine, "SELECT id AS event_id, unit_id, date, hours, kind, cylinders, note "
                    "FROM service_event" + _unit_filter(unit_ids, "unit_id"))
    events["date"] = pd.to_datetime(events["date"]).astype("datetime64[us]")
    if as_of is not None:
        events = events[events["date"] <= as_of]
    events["cylinders"] = [tuple(int(c) for c in s.split(";") if c) for s in events["cylinders"]]
    events["hours"] = events["hours"].astype(float)
    return Frames(families=families, units=units, tests=tests, readings=readings,
                  events=events.reset_index(drop=True))

