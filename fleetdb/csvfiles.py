"""The three import CSV kinds: their columns, recognising them, reading them as typed text."""

from __future__ import annotations

import csv
import hashlib
import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np
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
    if _is_blank(raw):
        raise InvalidInput([Problem(name, None, None, "file is empty")])
    frame = _parse_plain(raw)
    if frame is not None:
        kind = detect_kind(list(frame.columns), name)
        return CsvFile(name=name, kind=kind, frame=frame, sha256=digest)
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


_BOM = b"\xef\xbb\xbf"


def _is_blank(raw: bytes) -> bool:
    """Whether the file holds nothing but white space (and perhaps a byte-order mark)."""
    if len(raw) > 4096 and raw[:4096].strip().removeprefix(_BOM).strip() != b"":
        return False  # a large file with text at its start: no need to copy it whole
    stripped = raw.strip()
    return not stripped or stripped == _BOM


def _parse_plain(raw: bytes) -> pd.DataFrame | None:
    """Parse a plain file with pyarrow's multi-threaded reader; None when it is not plain.

    Plain: no quote character, no lone carriage return, a header of distinct non-blank names,
    and every non-blank line holding exactly the header's number of cells. Such a file has
    one record per line, so the cells and line numbers come out exactly as the pandas reader
    gives them (leading spaces skipped, a column with a trailing space or tab stripped, blank
    lines dropped but counted). Anything else goes to the pandas reader and its messages.
    """
    try:
        import pyarrow as pa
        import pyarrow.compute as pc
        import pyarrow.csv as pacsv
    except ImportError:  # pragma: no cover - pyarrow is a dependency of pandas 3 here
        return None
    if b'"' in raw or raw.count(b"\r") != raw.count(b"\r\n"):
        return None
    start = len(_BOM) if raw.startswith(_BOM) else 0
    end = raw.find(b"\n", start)
    header_end = len(raw) if end < 0 else end
    names = raw[start:header_end].decode("utf-8").removesuffix("\r").split(",")
    cleaned = [n.strip().lower() for n in names]
    if len(set(names)) != len(names) or len(set(cleaned)) != len(cleaned) or "" in cleaned:
        return None
    body = memoryview(raw)[header_end + 1:] if end >= 0 else memoryview(b"")
    try:
        table = pacsv.read_csv(
            pa.BufferReader(pa.py_buffer(body)),
            read_options=pacsv.ReadOptions(column_names=names, use_threads=True),
            parse_options=pacsv.ParseOptions(quote_char=False, ignore_empty_lines=True,
                                              newlines_in_values=False),
            convert_options=pacsv.ConvertOptions(
                column_types=dict.fromkeys(names, pa.string()), null_values=[],
                strings_can_be_null=False, quoted_strings_can_be_null=False))
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return None
    lines = _data_line_numbers(body, table.num_rows, first=2)
    if lines is None:
        return None
    cells_of = table.columns
    del table  # each column's parsed cells are freed once converted
    columns = {}
    for name in cleaned:
        cells = cells_of.pop(0)
        if pc.any(pc.starts_with(cells, " ")).as_py():
            cells = pc.utf8_ltrim(cells, characters=" ")
        values = pd.Series(cells.to_pandas(), copy=False)
        del cells
        if values.str.endswith((" ", "\t")).any():
            values = values.str.strip()
        columns[name] = values
    frame = pd.DataFrame(columns, copy=False)
    frame.index = lines
    first = frame.iloc[:, 0]
    maybe_blank = first == ""
    if maybe_blank.any():
        blank = maybe_blank.copy()
        blank[maybe_blank] = (frame[maybe_blank] == "").all(axis=1)
        if blank.any():
            frame = frame[~blank]
    return frame


def _data_line_numbers(body: memoryview, records: int, first: int) -> pd.Index | None:
    """The line number of each non-blank line of ``body`` (which starts on line ``first``).

    None when their count is not ``records`` (then lines and records do not match).
    """
    data = np.frombuffer(body, dtype=np.uint8)
    ends = np.flatnonzero(data == ord("\n"))
    n_lines = len(ends) + (1 if len(data) and data[-1] != ord("\n") else 0)
    if n_lines == records:
        return pd.RangeIndex(first, first + records)
    starts = np.concatenate(([0], ends + 1))[:n_lines]
    stops = np.append(ends, len(data))[:n_lines]
    width = stops - starts
    last = data[np.maximum(stops - 1, 0)] if len(data) else np.zeros(0, dtype=np.uint8)
    blank = (width == 0) | ((width == 1) & (last == ord("\r")))
    numbers = np.flatnonzero(~blank) + first
    if len(numbers) != records:
        return None
    return pd.Index(numbers)


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
