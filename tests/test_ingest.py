"""Import: validation messages name file, line and column; imports are atomic and idempotent."""

from __future__ import annotations

import csv
import io
from pathlib import Path

import pytest
from sqlalchemy import text
from sqlalchemy.engine import Engine

from fleetdb import csvfiles, ingest, logbook
from fleetdb.errors import FleetDBError, InvalidInput
from fleetdb.units import KPA_PER_UNIT
from tests.conftest import DATA, write

HEADER = ("fleet_no,tested_at,hours,kind,cylinder,value,units,battery_v,crank_rpm,"
          "engine_temp_c,baro_kpa,throttle_open,technician,note")


def counts(engine: Engine) -> dict[str, int]:
    with engine.connect() as conn:
        return {t: conn.execute(text(f"SELECT COUNT(*) FROM {t}")).scalar_one()
                for t in ("site", "engine_family", "unit", "test", "reading", "service_event",
                          "import_batch")}


@pytest.fixture
def fleet(engine: Engine) -> Engine:
    ingest.import_files(engine, [DATA / "fleet.csv"])
    return engine


def test_import_all_three_kinds(engine: Engine) -> None:
    reports = ingest.import_files(engine, [DATA / "tests.csv", DATA / "events.csv",
                                           DATA / "fleet.csv"])
    assert [r.kind for r in reports] == ["fleet", "events", "tests"]
    assert reports[0].written == {"sites": 2, "engine families": 3, "units": 4}
    assert reports[2].written == {"tests": 2, "readings": 11}
    assert counts(engine) == {"site": 2, "engine_family": 3, "unit": 4, "test": 2,
                              "reading": 11, "service_event": 2, "import_batch": 3}


def test_values_kept_as_typed_beside_si(fleet: Engine) -> None:
    ingest.import_files(fleet, [DATA / "tests.csv"])
    with fleet.connect() as conn:
        rows = conn.execute(text("SELECT kind, cylinder, value_si, typed_value, typed_unit "
                                 "FROM reading ORDER BY id")).all()
    assert rows[0][2:] == (pytest.approx(150 * KPA_PER_UNIT["psi"], rel=1e-12), "150", "psi")
    assert rows[4][:2] == ("vacuum_cranking", None)
    assert rows[4][2] == pytest.approx(KPA_PER_UNIT["inHg"], rel=1e-12)
    assert rows[6][2:] == (pytest.approx(2069.0, rel=1e-12), "20.69", "bar")


def test_same_file_twice_is_a_no_op(fleet: Engine) -> None:
    first = ingest.import_files(fleet, [DATA / "tests.csv"])[0]
    again = ingest.import_files(fleet, [DATA / "tests.csv"])[0]
    assert again.outcome == "already_imported"
    assert again.batch_id == first.batch_id
    assert "already imported" in again.summary()
    assert counts(fleet)["reading"] == 11


def test_overlapping_file_counts_present_tests(fleet: Engine, tmp_path: Path) -> None:
    ingest.import_files(fleet, [DATA / "tests.csv"])
    body = (DATA / "tests.csv").read_text() + "T-102,2024-05-01,900,compression,1,151,psi,,,,,,,\n"
    report = ingest.import_files(fleet, [write(tmp_path / "more.csv", body)])[0]
    assert report.present == 2
    assert report.written == {"tests": 1, "readings": 1}


def test_dry_run_writes_nothing(fleet: Engine) -> None:
    before = counts(fleet)
    report = ingest.import_files(fleet, [DATA / "tests.csv"], dry_run=True)[0]
    assert report.outcome == "dry_run"
    assert report.written == {"tests": 2, "readings": 11}
    assert counts(fleet) == before


BAD_ROWS = [
    ("T-101,2024-03-01,1200,compression,7,150,psi,,,,,,,", 2, "cylinder",
     "cylinder 7 on a 4-cylinder engine"),
    ("T-101,2024-03-01,1200,compression,1,150,furlongs,,,,,,,", 2, "units", "unknown unit"),
    ("T-101,2024-03-01,1200,compression,1,-5,psi,,,,,,,", 2, "value", "is negative"),
    ("T-101,2024-03-01,1200,compression,1,5000,psi,,,,,,,", 2, "value",
     "beyond any cranking compression"),
    ("T-999,2024-03-01,1200,compression,1,150,psi,,,,,,,", 2, "fleet_no", "unknown fleet number"),
    ("T-101,2024-13-45,1200,compression,1,150,psi,,,,,,,", 2, "tested_at", "is not a date"),
    ("T-101,2024-03-01,lots,compression,1,150,psi,,,,,,,", 2, "hours", "is not engine hours"),
    ("T-101,2024-03-01,1200,squeeze,1,150,psi,,,,,,,", 2, "kind", "is not one of"),
    ("T-101,2024-03-01,1200,compression,1,150,inHg,,,,,,,", 2, "units", "does not fit"),
    ("T-101,2024-03-01,1200,vacuum_idle,2,18,inHg,,,,,,,", 2, "cylinder", "leave the cylinder"),
    ("T-101,2024-03-01,1200,vacuum_idle,,35,inHg,,,,,,,", 2, "value", "more than"),
    ("T-101,2024-03-01,1200,leakdown,1,140,%,,,,,,,", 2, "value", "over 100 %"),
    ("T-101,2024-03-01,1200,compression,1,nan,psi,,,,,,,", 2, "value", "is not a measured value"),
    ("T-101,2024-03-01,1200,compression,1,inf,psi,,,,,,,", 2, "value", "is not a measured value"),
    ("T-101,2024-03-01,1200,compression,1,150,psi,99,,,,,,", 2, "battery_v", "outside"),
    ("T-101,2024-03-01,1200,compression,1,150,psi,,,,,maybe,,", 2, "throttle_open",
     "write yes or no"),
    ("T-101,2099-03-01,1200,compression,1,150,psi,,,,,,,", 2, "tested_at", "in the future"),
]


@pytest.mark.parametrize(("row", "line", "column", "message"), BAD_ROWS)
def test_bad_row_is_named_and_nothing_written(fleet: Engine, tmp_path: Path, row: str,
                                              line: int, column: str, message: str) -> None:
    good = "T-102,2024-05-01,900,compression,1,151,psi,,,,,,,"
    path = write(tmp_path / "bad.csv", f"{HEADER}\n{row}\n{good}")
    before = counts(fleet)
    with pytest.raises(InvalidInput) as err:
        ingest.import_files(fleet, [path])
    problem = err.value.problems[0]
    assert (problem.source, problem.line, problem.field) == (str(path), line, column)
    assert message in problem.message
    assert f"bad.csv, line {line}, column {column}:" in str(err.value)
    assert counts(fleet) == before


def test_conflicting_conditions_within_one_test(fleet: Engine, tmp_path: Path) -> None:
    path = write(tmp_path / "c.csv", f"""{HEADER}
        T-101,2024-03-01,1200,compression,1,150,psi,10.1,,,,,,
        T-101,2024-03-01,1200,compression,2,150,psi,9.1,,,,,,""")
    with pytest.raises(InvalidInput, match="line 3, column battery_v: differs"):
        ingest.import_files(fleet, [path])


def test_duplicate_reading(fleet: Engine, tmp_path: Path) -> None:
    path = write(tmp_path / "d.csv", f"""{HEADER}
        T-101,2024-03-01,1200,compression,1,150,psi,,,,,,,
        T-101,2024-03-01,1200,compression,1,151,psi,,,,,,,""")
    with pytest.raises(InvalidInput, match="line 3, column cylinder: a second compression"):
        ingest.import_files(fleet, [path])


@pytest.mark.parametrize("read_by_index", [True, False], ids=["units-of-file", "all-units"])
def test_hours_going_backwards(fleet: Engine, tmp_path: Path, read_by_index: bool,
                               monkeypatch: pytest.MonkeyPatch) -> None:
    # A file of a few units reads the stored tests, events and units of those units only;
    # a large one reads them whole. Both give the same messages and writes.
    monkeypatch.setattr(ingest, "UNITS_READ_BY_INDEX", 500 if read_by_index else 0)
    ingest.import_files(fleet, [DATA / "tests.csv"])
    path = write(tmp_path / "h.csv", f"""{HEADER}
        T-101,2024-06-01,1100,compression,1,150,psi,,,,,,,""")
    with pytest.raises(InvalidInput, match="line 2, column hours: 1100 h on 2024-06-01 is less "
                                           "than 1200 h on 2024-03-01"):
        ingest.import_files(fleet, [path])
    # A recorded hour-meter replacement makes the lower reading legitimate.
    events = write(tmp_path / "e.csv", """fleet_no,date,hours,kind,cylinders,note
        T-101,2024-05-15,0,hour_meter,,new meter fitted""")
    ingest.import_files(fleet, [events])
    assert ingest.import_files(fleet, [path])[0].written == {"tests": 1, "readings": 1}


def test_bad_files(fleet: Engine, tmp_path: Path) -> None:
    cases = {
        "empty.csv": (b"", "file is empty"),
        "latin1.csv": (f"{HEADER}\nT-101,2024-03-01,1200,compression,1,150,psi,,,,,,J\xf6rn,\n"
                       .encode("latin-1"), "line 2: not UTF-8"),
        "what.csv": (b"a,b,c\n1,2,3\n", "header matches no known file"),
        "extra.csv": ((HEADER + ",colour\n").encode(), "column colour: unknown column"),
        "short.csv": (b"fleet_no,tested_at,hours,kind,value,units\n", "column cylinder: required"),
    }
    for name, (body, message) in cases.items():
        path = tmp_path / name
        path.write_bytes(body)
        with pytest.raises(InvalidInput, match=message):
            ingest.import_files(fleet, [path])


def test_byte_order_mark_and_blank_lines(fleet: Engine, tmp_path: Path) -> None:
    body = "\ufeff" + HEADER + "\n\nT-101,2024-03-01,1200,compression,9,150,psi,,,,,,,\n"
    path = tmp_path / "bom.csv"
    path.write_text(body, encoding="utf-8")
    with pytest.raises(InvalidInput, match="line 3, column cylinder"):
        ingest.import_files(fleet, [path])


def test_fleet_file_problems(engine: Engine, tmp_path: Path) -> None:
    head = ("fleet_no,site,engine_family,site_elevation_m,fuel,cylinders,banks,"
            "compression_ratio,min_compression,compression_units")
    cases = [
        (f"{head}\nA-1,New Site,F4,,lpg,4,1-2-3-4,9.5,120,psi", "line 2, column site_elevation_m: "
         "new site 'New Site' needs"),
        (f"{head}\nA-1,S,F4,10,lpg,4,1-2-3,9.5,120,psi", "column banks: '1-2-3' must name each"),
        (f"{head}\nA-1,S,F4,10,petrol,4,1-2-3-4,9.5,120,psi", "column fuel: 'petrol' is not"),
        (f"{head}\nA-1,S,F4,10,lpg,4,1-2-3-4,9.5,120,psi\nA-1,S,F4,,,,,,,", "line 3, column "
         "fleet_no: fleet number 'A-1' appears on an earlier line"),
        (f"{head}\nA-1,S,F4,10,lpg,4,1-2-3-4,9.5,120,psi\nA-2,S,F4,20,,,,,,", "line 3, column "
         "site_elevation_m: '20' conflicts with '10'"),
        (f"{head}\nA-1,S,F4,10,lpg,4,,9.5,120,psi", "new engine family 'F4' needs banks"),
    ]
    for i, (body, message) in enumerate(cases):
        with pytest.raises(InvalidInput, match=message):
            ingest.import_files(engine, [write(tmp_path / f"f{i}.csv", body)])
    assert counts(engine)["unit"] == 0


def test_log_and_void(fleet: Engine) -> None:
    readings = [logbook.TypedReading("compression", c, v, "psi")
                for c, v in enumerate(["152", "149", "151", "118"], start=1)]
    readings.append(logbook.TypedReading("vacuum_cranking", None, "0.5", "inHg"))
    test_id = logbook.log_test(fleet, "T-101", "2025-01-10 09:00", 2000, readings,
                               conditions={"battery_v": "10.4", "throttle_open": "yes"}, by="kim")
    with fleet.connect() as conn:
        row = conn.execute(text("SELECT source, created_by, battery_v, throttle_open FROM test "
                                "WHERE id = :i"), {"i": test_id}).one()
    assert tuple(row) == ("cli", "kim", 10.4, True)
    with pytest.raises(InvalidInput, match="already has a test"):
        logbook.log_test(fleet, "T-101", "2025-01-10 09:00", 2000, readings, by="kim")
    with pytest.raises(InvalidInput, match="cylinder 5 on a 4-cylinder engine"):
        logbook.log_test(fleet, "T-101", "2025-02-10", 2100,
                         [logbook.TypedReading("compression", 5, "150", "psi")])
    logbook.void_test(fleet, test_id, "gauge hose leaked", by="lee")
    with pytest.raises(FleetDBError, match="already voided"):
        logbook.void_test(fleet, test_id, "again", by="lee")
    with pytest.raises(FleetDBError, match="say why"):
        logbook.void_test(fleet, test_id, " ")
    assert counts(fleet)["test"] == 1  # voided, never deleted


_PLAIN_HEAD = b"fleet_no,tested_at,hours,kind,cylinder,value,units\n"
_PLAIN_ROW = b"T-101,2024-03-01,1200,compression,1,150,psi"


@pytest.mark.parametrize("raw", [
    _PLAIN_HEAD + (_PLAIN_ROW + b"\n") * 3,
    b"\xef\xbb\xbf" + _PLAIN_HEAD + b"\n\n" + _PLAIN_ROW + b"\n\n\n" + _PLAIN_ROW + b"\n\n",
    (_PLAIN_HEAD + _PLAIN_ROW + b"\n\n" + _PLAIN_ROW + b"\n").replace(b"\n", b"\r\n"),
    _PLAIN_HEAD + b"T-101,  2024-03-01 , 1200,compression ,1,150,psi\t\n,,,,,,\n" + _PLAIN_ROW,
], ids=["plain", "bom-and-blank-lines", "crlf-with-blank-line", "spaces-and-empty-row"])
def test_plain_reader_cells_and_lines_match_the_csv_module(raw: bytes) -> None:
    """The pyarrow reader of plain files against Python's csv module (the reference):
    same cells (outer spaces stripped) and the same line number for every data row."""
    assert csvfiles._parse_plain(raw) is not None  # the fast reader takes these files
    parsed = csvfiles.parse_csv_bytes(raw, "plain.csv")
    reader = csv.reader(io.StringIO(raw.decode("utf-8-sig"), newline=""),
                        skipinitialspace=True)
    next(reader)
    expected: dict[int, list[str]] = {}
    for record in reader:
        if any(cell.strip() for cell in record):
            expected[reader.line_num] = [cell.strip() for cell in record]
    assert list(parsed.frame.index) == list(expected)
    assert parsed.frame.to_numpy().tolist() == list(expected.values())
