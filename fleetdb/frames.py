"""Load the analysis frames (see DEVELOPERS.md, "Analysis frames") from the store.

This is the only place the analysis reads the database. Large reads go through the
driver cursor (or, for SQLite files, the Arrow-based ADBC driver when installed), not
the ORM.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import text
from sqlalchemy.engine import Engine

from fleetdb import arrowread, atmosphere, bulkread, trend
from fleetdb.ids import member_mask


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


#: Above this many readings a SQLite file is read through Arrow in child processes.
ARROW_READ_MIN_ROWS = bulkread.ARROW_READ_MIN_ROWS
KINDS, DETAIL_COLUMNS = bulkread.KINDS, bulkread.DETAIL_COLUMNS
NULL_MEASUREMENT = bulkread.NULL_MEASUREMENT
_MEASURED, _TEXTS = bulkread.MEASURED, bulkread.TEXTS


def _arrow_source(engine: Engine, whole_fleet: bool,
                  details: bool) -> bulkread.FleetRead | None:
    """The Arrow read of the whole fleet (:class:`fleetdb.bulkread.FleetRead`): the one
    begun for this store before the analysis was imported (:func:`fleetdb.bulkread.begin`),
    or one started now; None where the plain read serves (not a SQLite file, some units
    only, a small store, no Arrow driver).
    """
    path = _sqlite_file(engine)
    if path is None or not whole_fleet:
        return None
    begun = bulkread.take(path, details)
    if begun is not None:
        return begun
    if arrowread.available():
        with engine.connect() as conn:
            last_reading, last_test = conn.execute(text(bulkread.BOUNDS_SQL)).one()
        if last_reading >= ARROW_READ_MIN_ROWS:
            return bulkread.start(path, int(last_test), int(last_reading), details=details)
    return None


_TESTS_FROM = " FROM test t LEFT JOIN test_void v ON v.test_id = t.id"


def _tests_sql(details: bool = True) -> str:
    """The tests query with their voids (``details``: with ``DETAIL_COLUMNS``)."""
    columns = ["t.id AS test_id", "t.unit_id", "t.tested_at", "t.hours",
               *(f"t.{name}" for name in _MEASURED), "t.throttle_open"]
    if details:
        columns += [*(f"t.{name}" for name in _TEXTS), "t.source"]
    columns += ["v.reason AS void_reason", "v.voided_at"]
    return "SELECT " + ", ".join(columns) + _TESTS_FROM


def _restore_nulls(tests: pd.DataFrame, voids: pd.DataFrame) -> pd.DataFrame:
    """Undo :func:`fleetdb.bulkread.tests_sql`'s stand-ins, widen its narrowed integer ids
    and add the voids: the columns and types of the plain read."""
    for name in _MEASURED:
        column = tests[name].to_numpy(dtype=float)
        tests[name] = np.where(column == NULL_MEASUREMENT, np.nan, column)
    throttle = tests["throttle_open"].to_numpy()
    tests["throttle_open"] = pd.arrays.BooleanArray(throttle == 1, throttle < 0)
    for name in _TEXTS:
        if name in tests:
            null = tests.pop(f"{name}__null").to_numpy(dtype=bool)
            tests[name] = (pd.Series([None] * len(tests), index=tests.index, dtype=object)
                           if null.all()  # as the plain read gives a column of NULLs only
                           else tests[name].where(~null))
    for name in ("test_id", "unit_id"):
        tests[name] = tests[name].astype(np.int64)
    at = pd.Index(tests["test_id"]).get_indexer(voids["test_id"].to_numpy())
    voids = voids[at >= 0]
    at = at[at >= 0]
    for name in ("void_reason", "voided_at"):
        column = np.full(len(tests), None, dtype=object)
        column[at] = voids[name].to_numpy(dtype=object)
        tests[name] = column
    return tests


def in_unit_time_order(tests: pd.DataFrame) -> bool:
    """Whether the tests are already sorted by unit, then time (as a store usually gives
    them), so that sorting can be skipped."""
    return trend.in_series_order(tests["unit_id"].to_numpy(), tests["tested_at"].to_numpy())


def _unit_filter(unit_ids: list[int] | None, column: str) -> str:
    if unit_ids is None:
        return ""
    ids = ",".join(str(int(u)) for u in unit_ids) or "NULL"
    return f" WHERE {column} IN ({ids})"


@dataclass
class RawFleet:
    """The store's rows for the analysis as read, before :func:`shape` makes the frames.

    ``tests`` and ``readings`` are Arrow tables after an Arrow read (memory-mapped, so a
    forked process shares them), DataFrames otherwise; the small frames are final.
    """

    families: pd.DataFrame
    units: pd.DataFrame
    events: pd.DataFrame
    tests: Any
    readings: Any
    as_of: pd.Timestamp | None
    voids: pd.DataFrame | None = None  # test_id, void_reason, voided_at (Arrow read only)

    @property
    def reading_count(self) -> int:
        return len(self.readings)

    def test_families(self) -> np.ndarray:
        """The engine family of each test row (unknown units: -1)."""
        unit = np.asarray(self.tests["unit_id"])
        family = self.units["family_id"].reindex(unit)
        return family.fillna(-1).to_numpy(dtype=np.int64)


def load(engine: Engine, unit_ids: list[int] | None = None,
         as_of: pd.Timestamp | None = None, *, details: bool = True) -> Frames:
    """Read the frames for the whole fleet, or for some units.

    :param engine: the store.
    :param unit_ids: restrict to these units (None: all).
    :param as_of: ignore tests, events and voids after this moment (reproduce a past week).
    :param details: the tests' ``DETAIL_COLUMNS`` too (False: left out, for the analysis
        alone; a full refresh reads less).
    """
    return shape(read(engine, unit_ids, as_of, details=details))


def read(engine: Engine, unit_ids: list[int] | None = None,
         as_of: pd.Timestamp | None = None, *, details: bool = True) -> RawFleet:
    """The first half of :func:`load` (same parameters): the reading."""
    families = _query(engine, "SELECT * FROM engine_family").rename(columns={"id": "family_id"})
    families = families.set_index("family_id").drop(columns=["created_at"])
    families["warm_test"] = families["warm_test"].astype(bool)
    units = _query(engine, "SELECT u.id AS unit_id, u.fleet_no, u.site_id, s.name AS site, "
                   "s.elevation_m, u.family_id, f.name AS family, u.in_service, "
                   "u.hours_per_week FROM unit u JOIN site s ON s.id = u.site_id "
                   "JOIN engine_family f ON f.id = u.family_id"
                   + _unit_filter(unit_ids, "u.id")).set_index("unit_id")
    units["site_baro_kpa"] = atmosphere.pressure_kpa(units["elevation_m"].astype(float))

    arrow = _arrow_source(engine, unit_ids is None, details)
    voids = None
    if arrow is not None:
        tests, readings = arrow.collect()
        voids = _query(engine, "SELECT test_id, reason AS void_reason, voided_at FROM test_void "
                       f"WHERE test_id <= {arrow.last_test}")
    else:
        readings_sql = bulkread.readings_sql() + (
            " JOIN test t ON t.id = r.test_id" + _unit_filter(unit_ids, "t.unit_id")
            if unit_ids is not None else "")
        tests = _query(engine, _tests_sql(details) + _unit_filter(unit_ids, "t.unit_id"))
        readings = _query(engine, readings_sql)

    events = _query(engine, "SELECT id AS event_id, unit_id, date, hours, kind, cylinders, note "
                    "FROM service_event" + _unit_filter(unit_ids, "unit_id"))
    events["date"] = pd.to_datetime(events["date"]).astype("datetime64[us]")
    if as_of is not None:
        events = events[events["date"] <= as_of]
    events["cylinders"] = [tuple(int(c) for c in s.split(";") if c) for s in events["cylinders"]]
    events["hours"] = events["hours"].astype(float)
    return RawFleet(families=families, units=units, events=events.reset_index(drop=True),
                    tests=tests, readings=readings, as_of=as_of, voids=voids)


def shape(raw: RawFleet, family_ids: list[int] | None = None) -> Frames:
    """The second half of :func:`load`: the analysis frames from what :func:`read` read,
    for every unit or for the units of some engine families (every family row is kept).

    Everything the analysis computes for a unit depends only on its own family's units,
    so the frames of a family subset assessed alone give that subset's whole-fleet result.
    """
    units, tests, readings, events = raw.units, raw.tests, raw.readings, raw.events
    if family_ids is not None:
        units = units[units["family_id"].isin(family_ids).to_numpy()]
        events = events[events["unit_id"].isin(units.index).to_numpy()].reset_index(drop=True)
    arrow = not isinstance(tests, pd.DataFrame)
    if arrow:
        import pyarrow as pa
        import pyarrow.compute as pc

        # The frames live in the C heap (malloc), like every array made after them, so
        # memory freed by either serves the other (see fleetdb.malloc).
        pool = pa.system_memory_pool()
        if family_ids is not None:
            tests = pc.filter(tests, member_mask(tests["unit_id"], units.index.to_numpy()),
                              memory_pool=pool)
            readings = pc.filter(readings, member_mask(readings["test_id"], tests["test_id"]),
                                 memory_pool=pool)
        tests = _restore_nulls(arrowread.to_pandas(tests, pool=pool), raw.voids)
        readings = arrowread.to_pandas(readings, pool=pool)
        readings["test_id"] = readings["test_id"].astype(np.int64)
        readings["kind"] = pd.Categorical.from_codes(readings["kind"].to_numpy(), KINDS)
        # Arrow's allocator keeps what the filters and conversions freed (about 200 MB
        # a worker at 20,000 units) unless asked to give it back.
        pa.default_memory_pool().release_unused()
    elif family_ids is not None:  # the readings follow in _shape_readings
        tests = tests[member_mask(tests["unit_id"], units.index)]
    else:
        tests = tests.copy(deep=False)  # shaping sets columns: the rows read stay as read
    tests = _shape_tests(tests, units, raw.as_of)
    return Frames(families=raw.families, units=units, tests=tests,
                  readings=_shape_readings(readings, tests), events=events)


def _shape_readings(readings: pd.DataFrame, tests: pd.DataFrame) -> pd.DataFrame:
    """Readings of the tests kept (an ``as_of`` cut), in their analysis types."""
    readings = readings[member_mask(readings["test_id"], tests.index)]
    kinds = readings["kind"]
    if not isinstance(kinds.dtype, pd.CategoricalDtype):
        kinds = kinds.astype("category")
    # The same categories however it was read: every kind, then any other found, sorted.
    extra = sorted(set(kinds.cat.categories) - set(KINDS))
    readings["kind"] = kinds.cat.set_categories([*KINDS, *extra])
    readings["cylinder"] = readings["cylinder"].astype("Int64").replace(0, pd.NA)
    readings["value"] = readings["value"].astype(float)
    return readings


def _shape_tests(tests: pd.DataFrame, units: pd.DataFrame,
                 as_of: pd.Timestamp | None) -> pd.DataFrame:
    tests["tested_at"] = pd.to_datetime(tests["tested_at"], format="ISO8601").astype(
        "datetime64[us]")
    if as_of is not None:
        tests = tests[tests["tested_at"] <= as_of]
        voided = tests["voided_at"].notna().to_numpy()  # few tests are voided: parse those
        voided_at = pd.to_datetime(tests["voided_at"][voided], utc=True).dt.tz_convert(None)
        tests.loc[voided_at.index[(voided_at > as_of).to_numpy()], "void_reason"] = None
    tests = tests.set_index("test_id")
    if not in_unit_time_order(tests):
        tests = tests.sort_values(["unit_id", "tested_at"])
    tests["family_id"] = units["family_id"].reindex(tests["unit_id"]).to_numpy()
    tests["baro_measured"] = tests["baro_kpa"].notna()
    tests["baro_kpa"] = tests["baro_kpa"].astype(float).fillna(
        pd.Series(units["site_baro_kpa"].reindex(tests["unit_id"]).to_numpy(), index=tests.index))
    tests["throttle_open"] = tests["throttle_open"].astype("boolean")
    tests["voided"] = tests["void_reason"].notna()
    for col in ("hours", "battery_v", "crank_rpm", "engine_temp_c"):
        tests[col] = tests[col].astype(float)
    return tests
