"""Reading the analysis frames: the Arrow child-process read equals the plain read."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from hypothesis import given, settings
from hypothesis import strategies as st
from sqlalchemy.engine import Engine

from fleetdb import arrowread, frames, ingest, logbook
from fleetdb.ids import member_mask, positions
from tests.conftest import DATA

SQL = ("SELECT r.test_id, r.kind, COALESCE(r.cylinder, 0) AS cylinder, r.value_si AS value "
       "FROM reading r ORDER BY r.id")


def test_arrow_read_sees_committed_rows_still_in_the_wal(sqlite_url: str) -> None:
    from fleetdb import db, migrate

    migrate.upgrade(sqlite_url)
    engine: Engine = db.make_engine(sqlite_url)
    ingest.import_files(engine, [DATA / "fleet.csv", DATA / "tests.csv"])
    # This process keeps its connection open, so the rows may still sit in the WAL file.
    with engine.connect():
        plain = frames._query(engine, SQL)
        arrow = arrowread.read_sqlite(engine.url.database, SQL)
    assert len(plain) == 11
    pd.testing.assert_frame_equal(arrow.astype(plain.dtypes.to_dict()), plain,
                                  check_dtype=False)
    engine.dispose()


def test_load_through_arrow_equals_plain(sqlite_url: str, monkeypatch) -> None:  # noqa: ANN001
    from fleetdb import db, migrate

    migrate.upgrade(sqlite_url)
    engine = db.make_engine(sqlite_url)
    ingest.import_files(engine, [DATA / "fleet.csv", DATA / "tests.csv"])
    # A logged test with a time to the microsecond and no conditions at all, then voided.
    logged = logbook.log_test(engine, "T-101", "2024-06-01 09:15:30.250001", 1450, [
        logbook.TypedReading("compression", c, v, "psi")
        for c, v in ((1, "151"), (2, "149"), (3, "147"), (4, "146"))], by="test")
    logbook.void_test(engine, logged, "gauge hose leaked", by="test")
    plain = frames.load(engine)
    assert plain.tests["voided"].sum() == 1 and plain.tests["throttle_open"].isna().any()
    assert (plain.tests["tested_at"].dt.microsecond == 250001).sum() == 1
    monkeypatch.setattr(frames, "ARROW_READ_MIN_ROWS", 1)
    fast = frames.load(engine)
    pd.testing.assert_frame_equal(fast.readings.reset_index(drop=True),
                                  plain.readings.reset_index(drop=True))
    # The tests come through Arrow too, with NULLs (no barometer, no technician) restored.
    assert plain.tests["baro_measured"].any() and not plain.tests["baro_measured"].all()
    assert plain.tests["note"].isna().any()
    pd.testing.assert_frame_equal(fast.tests, plain.tests)
    # Without the detail columns (what a full refresh reads): the rest is the same.
    lean = frames.load(engine, details=False)
    assert not set(frames.DETAIL_COLUMNS) & set(lean.tests.columns)
    pd.testing.assert_frame_equal(lean.tests, plain.tests.drop(columns=list(frames.DETAIL_COLUMNS)))
    pd.testing.assert_frame_equal(lean.readings, fast.readings)
    # A detail no test has: a column of NULLs either way.
    with engine.begin() as conn:
        conn.exec_driver_sql("UPDATE test SET note = NULL, technician = NULL")
    monkeypatch.setattr(frames, "ARROW_READ_MIN_ROWS", 10**9)
    plain = frames.load(engine)
    monkeypatch.setattr(frames, "ARROW_READ_MIN_ROWS", 1)
    pd.testing.assert_frame_equal(frames.load(engine).tests, plain.tests)
    engine.dispose()


@settings(max_examples=100, deadline=None)
@given(st.lists(st.integers(-3, 60), unique=True, max_size=30),
       st.lists(st.integers(-3, 60), max_size=50), st.booleans())
def test_id_lookups_equal_pandas_and_numpy(keys: list, ids: list, sparse: bool) -> None:
    # References: pandas Index.get_indexer and numpy.isin. Dense ids go through a lookup
    # table, sparse or negative ones through the references themselves.
    scale = 10**7 if sparse else 1
    index = pd.Index(np.array(keys, dtype=np.int64) * scale)
    wanted = np.array(ids, dtype=np.int64) * scale
    np.testing.assert_array_equal(positions(index, wanted), index.get_indexer(wanted))
    np.testing.assert_array_equal(member_mask(wanted, index.to_numpy()),
                                  np.isin(wanted, index.to_numpy()))


def test_a_read_begun_early_is_the_read_frames_would_make(sqlite_url: str, monkeypatch,  # noqa: ANN001
                                                          tmp_path) -> None:  # noqa: ANN001
    from fleetdb import bulkread, db, migrate

    migrate.upgrade(sqlite_url)
    engine = db.make_engine(sqlite_url)
    ingest.import_files(engine, [DATA / "fleet.csv", DATA / "tests.csv"])
    monkeypatch.setattr(frames, "ARROW_READ_MIN_ROWS", 1)
    started_now = frames.load(engine, details=False)
    # Begun before the analysis (as `fleetdb refresh` does), then taken by frames.read.
    monkeypatch.setattr(bulkread, "ARROW_READ_MIN_ROWS", 1)
    assert bulkread.begin(sqlite_url)
    assert not bulkread.begin(sqlite_url)  # one at a time per store
    path = engine.url.database
    assert bulkread.take(path, details=True) is None  # other columns: not this read
    taken = frames.load(engine, details=False)
    assert bulkread.take(path, details=False) is None  # taken once
    pd.testing.assert_frame_equal(taken.tests, started_now.tests)
    pd.testing.assert_frame_equal(taken.readings, started_now.readings)
    # Not begun: another database, a file that is not there (and is not created), a
    # store below the threshold.
    assert not bulkread.begin("postgresql+psycopg://nobody@localhost/none")
    missing = tmp_path / "missing.sqlite"
    assert not bulkread.begin(f"sqlite:///{missing}") and not missing.exists()
    monkeypatch.setattr(bulkread, "ARROW_READ_MIN_ROWS", 10**9)
    assert not bulkread.begin(sqlite_url)
    engine.dispose()


def test_a_read_never_taken_is_stopped_and_its_files_removed(sqlite_url: str,
                                                             monkeypatch) -> None:  # noqa: ANN001
    from fleetdb import bulkread, db, migrate

    migrate.upgrade(sqlite_url)
    engine = db.make_engine(sqlite_url)
    ingest.import_files(engine, [DATA / "fleet.csv", DATA / "tests.csv"])
    monkeypatch.setattr(bulkread, "ARROW_READ_MIN_ROWS", 1)
    assert bulkread.begin(sqlite_url)
    pending = bulkread._begun[engine.url.database].pending
    files = [pending.base, *pending.outs]
    bulkread._cancel_untaken()  # what the process does at exit
    assert not bulkread._begun
    assert all(run.poll() is not None for run in pending.runs)
    assert not any(Path(f).exists() for f in files)
    engine.dispose()
