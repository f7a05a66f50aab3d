"""The three import CSV kinds: their columns, recognising them, reading them as typed text."""

from __future__ import annotations

import csv
import hashlib
import io
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from fleetdb.errors import InvalidInput, Problem

FLEET_REQUIRED = ("fleet_no", "site", "engine_family")
FLEET_OPTIONAL = (
    "in_service", "hours_per_week", "site_elevation_m", "fuel", "cylinders", "banks",
    "compression_ratio", "min_compression", "compression_units", "min_ratio",
    "expected_compression", "spread_rule", "max_difference", "min_crank_rpm", "warm_test",
    "system_volts", "test_interval_days", "limits_reason",
)
TESTS_REQUIRED = ("fleet_no", "tested_at", "hours", "kind", "cylinder", "value", "units")
TESTS_OPTIONAL = (
    "battery_v", "crank_rpm", "engine_temp_c", "baro_kpa", "throttle_open", "technician", "note",
)
EVENTS_REQUIRED = ("fleet_no", "date", "hours", "kind", "cylinders")
EVENTS_OPTIONAL = ("note",)

COLUMNS: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {
    "fleet": (FLEET_REQUIRED, FLEET_OPTIONAL),
    "tests": (TESTS_REQUIRED, TESTS_OPTIONAL),
    "events": (EVENTS_REQUIRED, EVENTS_OPTIONAL),
}
#: Import order when several files come at once: units before what refers to them, and
#: hour-meter events before the tests they explain.
KIND_ORDER = ("fleet", "events", "tests")


@dataclass
class CsvFile:
    """A CSV read as text, every cell exactly as typed (stripped of outer spaces)."""

    name: str
    kind: str
    frame: pd.DataFrame  # all columns str; blank cells are ""
    sha256: str


def detect_kind(header: list[str], source: str) -> str:
    """Recognise a file kind from its header, or explain what is missing.

    :param header: the column names, lower-cased and stripped.
    :param source: the file name, for the message.
    """
    cols = set(header)
    if {"kind", "cylinder", "value", "units"} <= cols or "tested_at" in cols:
        kind = "tests"
    elif "engine_family" in cols or "site" in cols:
        kind = "fleet"
    elif "cylinders" in cols or "date" in cols:
        kind = "events"
    else:
        raise InvalidInput([Problem(source, 1, None,
            "header matches no known file: a fleet file needs fleet_no, site, engine_family; "
            "a tests file fleet_no, tested_at, hours, kind, cylinder, value, units; "
            "an events file fleet_no, date, hours, kind, cylinders")])
    required, optional = COLUMNS[kind]
    problems = [Problem(source, 1, col, f"required column missing from this {kind} file")
                for col in required if col not in cols]
    allowed = set(required) | set(optional)
    known = ", ".join(required + optional)
    problems += [Problem(source, 1, col, f"unknown column; a {kind} file has {known}")
                 for col in header if col not in allowed]
    dupes = {c for c in header if header.count(c) > 1}
    problems += [Problem(source, 1, col, "column appears twice") for col in sorted(dupes)]
    if problems:
        raise InvalidInput(problems)
    return kind


def read_csv(path: Path) -> CsvFile:
    """Read an import file as text and recognise its kind.

    :param path: the CSV file (UTF-8, optionally with a byte-order mark).
    """
    name = str(path)
    try:
        raw = Path(path).read_bytes()
    except OSError as exc:
        problem = Problem(name, None, None, f"cannot read file: {exc.strerror}")
        raise InvalidInput([problem]) from exc
    return parse_csv_bytes(raw, name)


def parse_csv_bytes(raw: bytes, name: str) -> CsvFile:
    """Parse the bytes of an import file (see :func:`read_csv`)."""
    digest = hashlib.sha256(raw).hexdigest()
    try:
        raw.decode("utf-8-sig")  # validate only; the parser reads the bytes
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InvalidInput([Problem(name, line, None,
            "not UTF-8 text; save the sheet as 'CSV UTF-8'")]) from exc
    if b"\x00" in raw:
        raise InvalidInput([Problem(name, None, None, "holds NUL bytes: not a CSV text file")])
    if not raw.strip() or raw.strip() == b"\xef\xbb\xbf":
        raise InvalidInput([Problem(name, None, None, "file is empty")])
    try:
        frame = pd.read_csv(io.BytesIO(raw), dtype=str, keep_default_na=False,
                            skipinitialspace=True, skip_blank_lines=False, engine="c",
                            encoding="utf-8-sig")
    except (pd.errors.ParserError, ValueError) as exc:
        raise InvalidInput([Problem(name, None, None, f"not a readable CSV: {exc}")]) from exc
    if not isinstance(frame.index, pd.RangeIndex):
        # pandas takes the leading cells of rows longer than the header as an index: the
        # columns would shift, or a cell without a column would be lost.
        raise InvalidInput([Problem(name, _first_long_line(raw, frame.shape[1]), None,
            f"more cells than the header's {frame.shape[1]} columns (a comma too many at "
            "the end of the line?)")])
    frame.columns = [str(c).strip().lower() for c in frame.columns]
    kind = detect_kind(list(frame.columns), name)
    for col in frame.columns:
        values = frame[col].astype(str)
        if values.str.endswith((" ", "\t")).any():
            values = values.str.strip()
        frame[col] = values
    frame.index = pd.RangeIndex(2, 2 + len(frame))  # index = line number in the file
    blank = (frame == "").all(axis=1)
    if blank.any():
        frame = frame[~blank]
    return CsvFile(name=name, kind=kind, frame=frame, sha256=digest)


def _first_long_line(raw: bytes, columns: int) -> int | None:
    """The line number of the first record with more cells than ``columns``."""
    text = raw.decode("utf-8-sig")
    reader = csv.reader(io.StringIO(text, newline=""), skipinitialspace=True)
    try:
        next(reader, None)
        for record in reader:
            if len(record) > columns:
                return reader.line_num
    except csv.Error:
        return None
    return None
