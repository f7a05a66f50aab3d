"""Capture files: the channel map and reading a capture CSV in chunks.

A capture file is a plain CSV, UTF-8, header on the first line: a time column and one or
more channels, one sample per line, decimals with a point. Columns not mapped to a channel
are ignored (and not stored). The technician maps the columns (:class:`Channel`):

* ``COLUMN=pressure:CYL[:UNIT]`` in-cylinder pressure of cylinder CYL (gauge; default kPa);
* ``COLUMN=vacuum_cranking[:UNIT]`` / ``COLUMN=vacuum_idle[:UNIT]`` manifold vacuum below
  ambient while cranking / at warm idle (default kPa);
* ``COLUMN=current[:A]`` starter current.

UNIT is psi, kPa, bar or MPa (and inHg, mmHg for vacuum); ``-abs`` after a pressure unit
(``kPa-abs``) marks an absolute transducer or MAP sensor, converted with the test's
barometer. A scale turns a raw column (volts) into the unit: value = slope · raw + offset.
"""

from __future__ import annotations

import csv
import hashlib
import io
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from fleetdb.errors import InvalidInput, InvalidValue, Problem
from fleetdb.units import canonical_unit

Progress = Callable[[int, int], None]  # (bytes read, bytes in the file)

CHUNK_ROWS = 1_000_000
TIME_UNITS = {"s": 1.0, "ms": 1e-3, "us": 1e-6}
_KIND_ALIASES = {"pressure": "pressure", "vacuum_cranking": "vacuum_cranking",
                 "vacuum-cranking": "vacuum_cranking", "vacuum_idle": "vacuum_idle",
                 "vacuum-idle": "vacuum_idle", "current": "current"}
_DEFAULT_UNIT = {"pressure": "kPa", "vacuum_cranking": "kPa", "vacuum_idle": "kPa",
                 "current": "A"}
_UNITS_BY_KIND = {"pressure": ("psi", "kPa", "bar", "MPa"),
                  "vacuum_cranking": ("inHg", "mmHg", "kPa"),
                  "vacuum_idle": ("inHg", "mmHg", "kPa"), "current": ("A",)}
_ABS_UNITS = ("psi", "kPa", "bar", "MPa")


@dataclass(frozen=True)
class Channel:
    """What one column of a capture holds."""

    column: str
    kind: str  # pressure | vacuum_cranking | vacuum_idle | current
    cylinder: int | None = None
    unit: str = "kPa"
    absolute: bool = False
    slope: float = 1.0
    offset: float = 0.0

    def describe(self) -> str:
        """``ch1: pressure of cylinder 3, kPa gauge, value = 250 x raw - 125``."""
        what = {"pressure": f"pressure of cylinder {self.cylinder}",
                "vacuum_cranking": "manifold vacuum while cranking",
                "vacuum_idle": "manifold vacuum at idle", "current": "starter current"}[self.kind]
        unit = self.unit + (" absolute" if self.absolute else
                            " gauge" if self.kind == "pressure" else "")
        scale = ("" if (self.slope, self.offset) == (1.0, 0.0)
                 else f", value = {self.slope:g} x raw {'+' if self.offset >= 0 else '-'} "
                      f"{abs(self.offset):g}")
        return f"{self.column}: {what}, {unit}{scale}"


def parse_channel(spec: str) -> Channel:
    """Parse ``COLUMN=KIND[:CYLINDER][:UNIT]`` (see the module docstring).

    :param spec: e.g. ``p3=pressure:3:psi``, ``map=vacuum_idle:kPa-abs``, ``amps=current``.
    :raises InvalidValue: with what to write instead.
    """
    column, sep, rest = spec.rpartition("=")
    column = column.strip()
    if not sep or not column:
        raise InvalidValue(f"{spec!r}: write COLUMN=KIND, like p3=pressure:3:kPa or "
                           "amps=current")
    parts = [p.strip() for p in rest.split(":")]
    kind = _KIND_ALIASES.get(parts[0].lower())
    if kind is None:
        raise InvalidValue(f"{spec!r}: {parts[0]!r} is not a channel kind; use pressure, "
                           "vacuum_cranking, vacuum_idle or current")
    cylinder = None
    if kind == "pressure":
        if len(parts) < 2 or not parts[1].isdigit() or int(parts[1]) < 1:
            raise InvalidValue(f"{spec!r}: say which cylinder, like {column}=pressure:3:kPa")
        cylinder = int(parts[1])
        parts = parts[1:]
    if len(parts) > 2:
        raise InvalidValue(f"{spec!r}: too many ':' parts")
    unit_text = parts[1] if len(parts) == 2 and parts[1] else _DEFAULT_UNIT[kind]
    absolute = unit_text.lower().endswith("-abs")
    if absolute:
        unit_text = unit_text[:-4]
    if kind == "current":
        if unit_text.upper() != "A" or absolute:
            raise InvalidValue(f"{spec!r}: a current channel is in A (use --scale for a "
                               "clamp's volts or millivolts per ampere)")
        return Channel(column, kind, None, "A")
    try:
        unit = canonical_unit(unit_text)
    except InvalidValue:
        unit = ""
    allowed = _ABS_UNITS if absolute else _UNITS_BY_KIND[kind]
    if unit not in allowed:
        suffix = "-abs" if absolute else ""
        raise InvalidValue(f"{spec!r}: {unit_text + suffix!r} does not fit a {kind} channel; use "
                           + ", ".join(allowed) + (" (add -abs for an absolute transducer)"
                                                   if not absolute else " with -abs"))
    return Channel(column, kind, cylinder, unit, absolute)


def parse_scale(spec: str) -> tuple[str, float, float]:
    """Parse ``COLUMN=SLOPE,OFFSET`` (value = slope · raw + offset); OFFSET may be left out.

    :raises InvalidValue: with what to write instead.
    """
    column, sep, rest = spec.rpartition("=")
    numbers = [p.strip() for p in rest.split(",")]
    try:
        if not sep or not column.strip() or not 1 <= len(numbers) <= 2:
            raise ValueError
        slope = float(numbers[0])
        offset = float(numbers[1]) if len(numbers) == 2 else 0.0
    except ValueError:
        raise InvalidValue(f"{spec!r}: write COLUMN=SLOPE,OFFSET, like ch1=250,-125 "
                           "(value = slope x raw + offset)") from None
    if not np.isfinite([slope, offset]).all() or slope == 0:
        raise InvalidValue(f"{spec!r}: the slope must be a non-zero number")
    return column.strip(), slope, offset


def with_scales(channels: Sequence[Channel], scales: Sequence[tuple[str, float, float]]
                ) -> list[Channel]:
    """Attach each scale to its channel.

    :raises InvalidValue: a scale for a column that is not a channel.
    """
    by_column = {c.column: c for c in channels}
    out = dict(by_column)
    for column, slope, offset in scales:
        if column not in by_column:
            raise InvalidValue(f"--scale for {column!r}, which is not a mapped channel "
                               f"({', '.join(by_column) or 'none'})")
        out[column] = replace(by_column[column], slope=slope, offset=offset)
    return list(out.values())


def parse_firing_order(text_: str, cylinders: int | None = None) -> tuple[int, ...]:
    """Parse ``1-3-4-2`` (or ``1,3,4,2``): each cylinder 1..cylinders exactly once.

    :raises InvalidValue: with what is wrong.
    """
    parts = [p.strip() for p in text_.replace(",", "-").split("-")]
    if not parts or not all(p.isdigit() for p in parts):
        raise InvalidValue(f"{text_!r}: write the firing order as cylinder numbers, like "
                           "1-3-4-2")
    order = tuple(int(p) for p in parts)
    count = cylinders or len(order)
    if sorted(order) != list(range(1, count + 1)):
        raise InvalidValue(f"{text_!r} must name each cylinder 1 to {count} exactly once")
    return order


# -- reading the file -------------------------------------------------------------------------

@dataclass
class CaptureData:
    """The mapped columns of a capture file, as read."""

    name: str
    sha256: str
    file_bytes: int
    time_column: str
    time_unit: str
    time_s: np.ndarray
    raw: dict[str, np.ndarray]  # column -> float64 values as read
    ignored: list[str] = field(default_factory=list)


class _CountingReader(io.RawIOBase):
    """A binary file that hashes what it gives out and reports progress."""

    def __init__(self, path: Path, progress: Progress | None):
        self._file = open(path, "rb")  # noqa: SIM115 - closed by close()
        self.total = path.stat().st_size
        self.done = 0
        self.sha = hashlib.sha256()
        self._progress = progress

    def readable(self) -> bool:
        return True

    def readinto(self, buffer: Any) -> int:
        n = self._file.readinto(buffer)
        if n:
            self.sha.update(memoryview(buffer)[:n])
            self.done += n
            if self._progress:
                self._progress(self.done, self.total)
        return n or 0

    def finish(self) -> None:
        """Hash what the parser left unread (pandas closes this reader when it is done)."""
        buffer = bytearray(1 << 20)
        while n := self._file.readinto(buffer):
            self.sha.update(memoryview(buffer)[:n])
            self.done += n
        self._file.close()


def problem(name: str, column: str | None, message: str, line: int | None = None) -> InvalidInput:
    """One located problem with a capture file, as the error to raise."""
    return InvalidInput([Problem(name, line, column, message)])


def columns_of(path: Path | str, name: str | None = None) -> list[str]:
    """The column names of a capture file's header line, as the technician will map them.

    :param path: the capture file.
    :param name: what messages call the file (default: its path).
    :raises InvalidInput: not UTF-8, NUL bytes, an empty first line, a repeated column.
    """
    path = Path(path)
    name = name or str(path)
    header = _header(path, name)
    dupes = sorted({h for h in header if header.count(h) > 1})
    if dupes:
        raise problem(name, dupes[0], "column appears twice in the header", 1)
    return header


def _header(path: Path, name: str) -> list[str]:
    try:
        with open(path, encoding="utf-8-sig", newline="") as fh:
            first = fh.readline()
    except UnicodeDecodeError as exc:
        raise problem(name, None, "not UTF-8 text: export the capture as a plain CSV",
                       1) from exc
    except OSError as exc:
        raise problem(name, None, f"cannot read file: {exc.strerror}") from exc
    if "\x00" in first:
        raise problem(name, None, "holds NUL bytes: not a CSV text file", 1)
    if not first.strip():
        raise problem(name, None, "file is empty, or its first line is blank; the first "
                       "line must be the header (time column and channel names)", 1)
    return [h.strip() for h in next(csv.reader([first]))]


def read_capture(path: Path | str, time_column: str, columns: Sequence[str], *,
                 time_unit: str = "s", chunk_rows: int = CHUNK_ROWS,
                 progress: Progress | None = None, name: str | None = None) -> CaptureData:
    """Read the time column and the mapped columns of a capture CSV, chunk by chunk.

    :param path: the capture file.
    :param time_column: the name of the time column.
    :param columns: the mapped channel columns.
    :param time_unit: ``s``, ``ms`` or ``us``.
    :param chunk_rows: rows per chunk.
    :param progress: called with (bytes read, file size) as the file is read.
    :param name: what messages call the file (default: its path), e.g. the name of a file
        uploaded through the dashboard rather than where the server keeps it.
    :raises InvalidInput: naming the file, line and column of the first problem.
    """
    chunks = CaptureChunks(path, time_column, columns, time_unit=time_unit,
                           chunk_rows=chunk_rows, progress=progress, name=name)
    times: list[np.ndarray] = []
    parts: dict[str, list[np.ndarray]] = {c: [] for c in columns}
    for _, time_s, raw in chunks:
        times.append(time_s)
        for col in columns:
            parts[col].append(raw[col])
    return CaptureData(name=chunks.name, sha256=chunks.sha256, file_bytes=chunks.file_bytes,
                       time_column=time_column, time_unit=time_unit,
                       time_s=np.concatenate(times),
                       raw={c: np.concatenate(parts.pop(c)) for c in columns},
                       ignored=chunks.ignored)


class CaptureChunks:
    """The samples of a capture CSV, one checked chunk at a time (see :func:`read_capture`).

    Iterating yields ``(first sample index, time in s, {column: values})`` per chunk; blank
    lines at the end of the file are dropped, a blank cell anywhere else is an error. After
    the last chunk, ``sha256`` (of the whole file) and ``samples`` are set.
    """

    def __init__(self, path: Path | str, time_column: str, columns: Sequence[str], *,
                 time_unit: str = "s", chunk_rows: int = CHUNK_ROWS,
                 progress: Progress | None = None, name: str | None = None):
        self.path = Path(path)
        self.name = name = name or str(path)
        header = _header(self.path, name)
        dupes = sorted({h for h in header if header.count(h) > 1})
        if dupes:
            raise problem(name, dupes[0], "column appears twice in the header", 1)
        self.wanted = wanted = [time_column, *columns]
        missing = [c for c in wanted if c not in header]
        if missing:
            what = "time column" if missing[0] == time_column else "channel column"
            hint = " (name it with --time-column)" if missing[0] == time_column else ""
            raise problem(name, missing[0], f"{what} not in the file{hint}; its columns are "
                           f"{', '.join(header)}", 1)
        if time_unit not in TIME_UNITS:
            raise InvalidValue(f"time unit {time_unit!r}: use s, ms or us")
        self.positions = [header.index(c) for c in wanted]
        self.ignored = [h for h in header if h not in wanted]
        self.time_column, self.columns = time_column, list(columns)
        self.scale = TIME_UNITS[time_unit]
        self.chunk_rows = chunk_rows
        self.progress = progress
        self.file_bytes = self.path.stat().st_size
        self.sha256 = ""
        self.samples = 0

    def __iter__(self) -> Iterator[tuple[int, np.ndarray, dict[str, np.ndarray]]]:
        name, wanted = self.name, self.wanted
        reader = _CountingReader(self.path, self.progress)
        rows = 0  # rows read so far (data lines)
        blank_from: int | None = None  # first row of a run of blank lines not yet followed
        try:
            chunks = pd.read_csv(io.BufferedReader(reader, 1 << 20), usecols=self.positions,
                                 header=0, chunksize=self.chunk_rows, engine="c",
                                 skip_blank_lines=False, skipinitialspace=True,
                                 encoding="utf-8-sig")
            for chunk in chunks:
                chunk.columns = [str(c).strip() for c in chunk.columns]
                data = {col: _numbers(chunk[col], name, col, rows) for col in wanted}
                del chunk
                present = np.column_stack([~np.isnan(v) for v in data.values()])
                filled = np.flatnonzero(present.any(axis=1))
                end = int(filled[-1]) + 1 if filled.size else 0
                if blank_from is not None and end:
                    raise problem(name, wanted[0], "blank cell: every line needs the time and "
                                  "every mapped channel", blank_from + 2)
                holes = np.flatnonzero(~present[:end].all(axis=1))
                if holes.size:
                    i = int(holes[0])
                    col = wanted[int(np.argmin(present[i]))]
                    raise problem(name, col, "blank cell: every line needs the time and every "
                                  "mapped channel", rows + i + 2)
                if end < present.shape[0] and blank_from is None:
                    blank_from = rows + end
                first = rows
                rows += present.shape[0]
                if end:
                    self.samples = first + end
                    yield (first, data[self.time_column][:end] * self.scale,
                           {c: data[c][:end] for c in self.columns})
        except UnicodeDecodeError as exc:
            raise problem(name, None, "not UTF-8 text past its header: export the capture as "
                          "a plain CSV") from exc
        except pd.errors.ParserError as exc:
            raise problem(name, None, f"not a readable CSV: {exc}") from exc
        finally:
            reader.finish()
        self.sha256 = reader.sha.hexdigest()
        if self.samples == 0:
            raise problem(name, None, "holds no samples under its header")


def _numbers(values: pd.Series, name: str, column: str, first_row: int) -> np.ndarray:
    if pd.api.types.is_numeric_dtype(values.dtype):
        return values.to_numpy(dtype=float)
    parsed = pd.to_numeric(values, errors="coerce")
    bad = np.flatnonzero((parsed.isna() & values.notna()
                          & (values.astype(str).str.strip() != "")).to_numpy())
    if not bad.size:  # only blank cells: reported with their line after reading
        return parsed.to_numpy(dtype=float)
    i = int(bad[0])
    raise problem(name, column, f"{values.iloc[i]!r} is not a number (decimals are written "
                   "with a point)", first_row + i + 2)
