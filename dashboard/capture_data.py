"""Thin adapters between the pages and fleetdb's captures: plain values in, plain values out.

Nothing here analyses a signal: events, peaks, speeds and findings come from
``fleetdb.capture_store`` (what was derived when the capture was logged, or a preview), and
the thinning for display is ``fleetdb.capture.envelope``. The Log page's upload is kept in a
server-side folder (:func:`upload_dir`) under its SHA-256, so the browser holds only a key.
"""

from __future__ import annotations

import base64
import binascii
import hashlib
import re
import shutil
import tempfile
import time
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np

from dashboard import data
from fleetdb import capture, capture_files, capture_store
from fleetdb.errors import FleetDBError, InvalidInput, InvalidValue, Problem

#: Largest capture the browser may upload; larger files go through ``fleetdb capture``.
MAX_UPLOAD_BYTES = 20 * 1000 * 1000
#: Buckets of the display envelope (each gives at most two points per channel).
DISPLAY_BUCKETS = 2000
#: Uploads older than this are removed when a new one arrives.
UPLOAD_KEEP_SECONDS = 24 * 3600
#: What a column can be on the Log page's channel map, with the words shown.
ROLES: dict[str, str] = {
    "ignore": "ignore",
    "time": "time",
    "pressure": "cylinder pressure",
    "vacuum_cranking": "manifold vacuum, cranking",
    "vacuum_idle": "manifold vacuum, idle",
    "current": "starter current",
}
#: The units each role takes (``-abs``: an absolute transducer, converted with the barometer).
ROLE_UNITS: dict[str, tuple[str, ...]] = {
    "ignore": (),
    "time": ("s", "ms", "us"),
    "pressure": ("kPa", "psi", "bar", "MPa", "kPa-abs", "psi-abs", "bar-abs", "MPa-abs"),
    "vacuum_cranking": ("kPa", "inHg", "mmHg", "kPa-abs"),
    "vacuum_idle": ("kPa", "inHg", "mmHg", "kPa-abs"),
    "current": ("A",),
}


# -- stored captures (Unit history) ---------------------------------------------------------

def captures_of_unit(url: str, fleet_no: str) -> list[dict[str, Any]]:
    """``fleetdb.capture_store.captures_of_unit``: the unit's captures, newest test first."""
    return capture_store.captures_of_unit(data.engine_for(url), fleet_no)


def capture_label(row: dict[str, Any]) -> str:
    """How a capture is offered in the picker: test, date, file and channels."""
    kinds = ", ".join(sorted({c["kind"].replace("_", " ") for c in row["channels"]}))
    voided = " (test voided)" if row["voided"] else ""
    return (f"test {row['test_id']} · {row['tested_at'][:16]} · {row['file_name']} · "
            f"{kinds}{voided}")


@lru_cache(maxsize=2)
def stored_capture(url: str, capture_id: int) -> capture_store.StoredCapture:
    """A stored capture, decoded once per process (captures never change once stored).

    Two at most are kept: a 200 MB recording decodes to a few hundred MB of samples.
    """
    return capture_store.load_capture(data.engine_for(url), capture_id)


def describe(spec: dict[str, Any]) -> str:
    """A stored channel map entry in words (``fleetdb.capture_files.Channel.describe``)."""
    return capture_files.Channel(**spec).describe()


def report_head(report: dict[str, Any]) -> str:
    """The first line about a previewed capture (``CaptureReport.as_dict``)."""
    return (f"{Path(report['file']).name}: {report['samples']:,} samples at "
            f"{report['sample_rate_hz']:,.0f} Hz over {report['duration_s']:.2f} s; would be "
            f"kept as {report['stored_bytes'] / 1e6:.1f} MB compressed.")


def stored_head(shown: capture_store.StoredCapture) -> str:
    """The first line about a capture: file, samples, rate, length, and its test."""
    n = shown.time_s.size
    duration = float(shown.time_s[-1] - shown.time_s[0]) if n > 1 else 0.0
    rate = (n - 1) / duration if duration > 0 else 0.0
    test = f"; test {shown.test_id}" if shown.test_id is not None else ""
    return (f"{shown.file_name}: {n:,} samples at {rate:,.0f} Hz over {duration:.2f} s"
            f"{test}.")


@dataclass(frozen=True)
class Trace:
    """One channel thinned for drawing, in fleetdb's SI for its kind."""

    column: str
    kind: str
    cylinder: int | None
    time_s: np.ndarray
    values: np.ndarray


def traces(shown: capture_store.StoredCapture, start_s: float | None = None,
           end_s: float | None = None, buckets: int = DISPLAY_BUCKETS) -> list[Trace]:
    """Every mapped channel of a capture within a time window, as min/max envelopes.

    A window short enough comes back at full resolution (see ``fleetdb.capture.envelope``).

    :param shown: a stored capture or a preview.
    :param start_s: start of the window, seconds (None: the start).
    :param end_s: end of the window (None: the end).
    """
    # Only the window's samples are converted (a zoom into a long recording stays quick);
    # one sample either side is kept so the line reaches the window's edges.
    t = shown.time_s
    first = 0 if start_s is None else max(0, int(np.searchsorted(t, start_s)) - 1)
    stop = t.size if end_s is None else min(t.size, int(np.searchsorted(t, end_s, "right")) + 1)
    out = []
    for spec in shown.channel_map["channels"]:
        times, values = capture.envelope(t[first:stop],
                                         shown.channel_si(spec["column"], first, stop),
                                         buckets=buckets)
        out.append(Trace(spec["column"], spec["kind"], spec["cylinder"], times, values))
    return out


def zoom_window(relayout: dict[str, Any] | None) -> tuple[float | None, float | None] | None:
    """The time window a graph's ``relayoutData`` asks for.

    :returns: (start, end) in seconds; (None, None) to show everything again (autorange);
        None when the event does not change the time axis (a y zoom, a resize).
    """
    if not relayout:
        return None
    for key, value in relayout.items():
        axis = key.split(".")[0]
        if not re.fullmatch(r"xaxis\d*", axis):
            continue
        if key.endswith(".autorange") and value:
            return None, None
        if key.endswith(".range[0]") and f"{axis}.range[1]" in relayout:
            return float(relayout[key]), float(relayout[f"{axis}.range[1]"])
        if key.endswith(".range") and isinstance(value, list) and len(value) == 2:
            return float(value[0]), float(value[1])
    return None


# -- the upload (Log a test) ----------------------------------------------------------------

def upload_dir() -> Path:
    """Where uploaded captures wait for their preview and save (one folder per SHA-256)."""
    folder = Path(tempfile.gettempdir()) / "fleetdb-uploads"
    folder.mkdir(exist_ok=True)
    return folder


@dataclass(frozen=True)
class Upload:
    """An uploaded capture kept on the server: its key, the name it came with, its columns."""

    token: str
    name: str
    size: int
    columns: list[str]

    def to_store(self) -> dict[str, Any]:
        """What the page keeps in the browser (a key, never the samples)."""
        return {"token": self.token, "name": self.name, "size": self.size,
                "columns": self.columns}


def _safe_name(name: str) -> str:
    base = Path(str(name).replace("\\", "/")).name.strip() or "capture.csv"
    return re.sub(r"[^\w.\- ]", "_", base)[:120]


def _path_of(token: str, name: str) -> Path:
    if not re.fullmatch(r"[0-9a-f]{64}", token or ""):
        raise InvalidValue("the uploaded file is no longer known: upload it again")
    path = upload_dir() / token / _safe_name(name)
    if not path.exists():
        raise InvalidValue("the uploaded file is no longer on the server: upload it again")
    return path


def _clean_old_uploads(now: float) -> None:
    for folder in upload_dir().iterdir():
        try:
            if now - folder.stat().st_mtime > UPLOAD_KEEP_SECONDS:
                shutil.rmtree(folder, ignore_errors=True)
        except OSError:
            continue


def receive_upload(contents: str, filename: str) -> Upload:
    """Keep an uploaded capture (``dcc.Upload``'s data URL) and read its header.

    :raises InvalidInput: too large, not base64, or a header fleetdb refuses (its message,
        naming the file as uploaded, line 1).
    """
    name = _safe_name(filename)
    _, _, encoded = (contents or "").partition(",")
    if len(encoded) * 3 // 4 > MAX_UPLOAD_BYTES + 3:
        raise InvalidInput([Problem(name, None, None, _too_large())])
    try:
        raw = base64.b64decode(encoded, validate=True)
    except (binascii.Error, ValueError):
        raise InvalidInput([Problem(name, None, None, "the upload did not arrive whole; "
                                    "upload the file again")]) from None
    if len(raw) > MAX_UPLOAD_BYTES:
        raise InvalidInput([Problem(name, None, None, _too_large())])
    _clean_old_uploads(time.time())
    token = hashlib.sha256(raw).hexdigest()
    path = upload_dir() / token / name
    path.parent.mkdir(exist_ok=True)
    path.write_bytes(raw)
    columns = capture_files.columns_of(path, name=name)
    return Upload(token=token, name=name, size=len(raw), columns=columns)


def _too_large() -> str:
    return (f"larger than the {MAX_UPLOAD_BYTES / 1e6:.0f} MB a browser upload takes; log it "
            "with 'fleetdb capture FILE --unit FLEET_NO ...' (it reads any size in chunks)")


def default_roles(columns: list[str]) -> list[dict[str, Any]]:
    """A starting channel map: the first column (or one named like time) is time, in s."""
    named = [i for i, c in enumerate(columns) if c.strip().lower() in ("t", "time", "time_s")]
    first = named[0] if named else 0
    return [{"role": "time" if i == first else "ignore", "unit": "s" if i == first else None,
             "cylinder": None, "slope": None, "offset": None} for i in range(len(columns))]


# -- channel map, preview, save ---------------------------------------------------------------

@dataclass
class CaptureForm:
    """What the Log page holds for a capture: the upload's key and the map as typed.

    ``rows``: one per column, in header order: ``{role, unit, cylinder, slope, offset}``, each
    the text or value the control holds. ``entry``: the test fields shared with the typed form
    (unit, date, hours, conditions).
    """

    upload: dict[str, Any]
    rows: list[dict[str, Any]]
    entry: data.FormEntry
    firing_order: str | None = None
    first_hump: str | None = None
    problems: list[data.FormProblem] = field(default_factory=list)


def _text(value: Any) -> str:
    return "" if value is None else str(value).strip()


def channel_map(form: CaptureForm) -> tuple[str, str, list[capture_files.Channel], list[
        data.FormProblem]]:
    """The time column, its unit, and the channels, checked as ``fleetdb capture`` checks them.

    Each row is written as the command line's ``--channel`` and ``--scale`` texts and parsed by
    the same fleetdb functions, so the rules and messages are the command's.

    :returns: (time column, time unit, channels, problems placed on their column).
    """
    columns = form.upload.get("columns", [])
    problems: list[data.FormProblem] = []
    times = [i for i, r in enumerate(form.rows) if r.get("role") == "time"]
    if len(times) != 1:
        problems.append(data.FormProblem("Channel map", "mark exactly one column as time "
                                         f"(now {len(times)})"))
    time_column = columns[times[0]] if times else ""
    time_unit = _text(form.rows[times[0]].get("unit")) or "s" if times else "s"
    channels: list[capture_files.Channel] = []
    scales = []
    for column, row in zip(columns, form.rows, strict=True):
        role = row.get("role") or "ignore"
        if role in ("ignore", "time"):
            continue
        where = f"Column {column}"
        parts = [role] + ([_text(row.get("cylinder"))] if role == "pressure" else [])
        parts += [_text(row.get("unit"))] if _text(row.get("unit")) else []
        slope, offset = _text(row.get("slope")), _text(row.get("offset"))
        try:
            channels.append(capture_files.parse_channel(f"{column}={':'.join(parts)}"))
            if slope or offset:
                scales.append(capture_files.parse_scale(f"{column}={slope or 1},{offset or 0}"))
        except InvalidValue as exc:
            problems.append(data.FormProblem(where, str(exc)))
    if not channels and not problems:
        problems.append(data.FormProblem("Channel map", "map at least one column to a channel "
                                         "(cylinder pressure, manifold vacuum or starter "
                                         "current)"))
    try:
        channels = capture_files.with_scales(channels, scales)
    except InvalidValue as exc:
        problems.append(data.FormProblem("Channel map", str(exc)))
    return time_column, time_unit, channels, problems


def problems_of(exc: FleetDBError) -> list[data.FormProblem]:
    """fleetdb's problems placed for the page: a box of the form, else file, line, column."""
    if isinstance(exc, InvalidInput):
        out = []
        for p in exc.problems:
            if p.field in data.FIELD_LABELS and p.field != "value":
                where = data.FIELD_LABELS[p.field]  # a box of the form, not of the file
            else:
                where = p.source + (f", line {p.line}" if p.line is not None else "")
                where += f", column {p.field}" if p.field else ""
            out.append(data.FormProblem(where, p.message))
        return out
    return [data.FormProblem("Capture", str(exc))]


def _call(url: str, form: CaptureForm, function: Any, **extra: Any) -> Any:
    """Map the form, then call a fleetdb capture function; problems raise InvalidInput."""
    time_column, time_unit, channels, problems = channel_map(form)
    entry = form.entry
    if not _text(entry.fleet_no):
        problems.insert(0, data.FormProblem("Unit", "pick the unit tested"))
    order = None
    if _text(form.firing_order):
        try:
            order = capture_files.parse_firing_order(_text(form.firing_order))
        except InvalidValue as exc:
            problems.append(data.FormProblem("Firing order", str(exc)))
    first_hump = None
    if _text(form.first_hump):
        if not _text(form.first_hump).isdigit():
            problems.append(data.FormProblem("First hump", "write a cylinder number"))
        else:
            first_hump = int(_text(form.first_hump))
    if problems:
        raise _FormProblems(problems)
    path = _path_of(form.upload.get("token", ""), form.upload.get("name", ""))
    conditions = {k: _text(entry.conditions.get(k)) for k in data.CONDITION_FIELDS}
    return function(data.engine_for(url), path, _text(entry.fleet_no), _text(entry.tested_at),
                    _text(entry.hours), channels, time_column=time_column, time_unit=time_unit,
                    firing_order=order, first_hump=first_hump, conditions=conditions,
                    by=conditions.get("technician") or None, name=form.upload.get("name"),
                    **extra)


class _FormProblems(Exception):
    def __init__(self, problems: list[data.FormProblem]):
        super().__init__(problems)
        self.problems = problems


@dataclass
class CaptureOutcome:
    """A preview or a save: what fleetdb derived, the capture to draw, or the problems."""

    report: dict[str, Any] | None = None
    shown: capture_store.StoredCapture | None = None
    problems: list[data.FormProblem] = field(default_factory=list)
    verdict: dict[str, Any] | None = None
    described: dict[str, str] = field(default_factory=dict)


def preview(url: str, form: CaptureForm) -> CaptureOutcome:
    """What saving would log (``fleetdb.capture_store.preview_capture``); nothing is written."""
    try:
        report, shown = _call(url, form, capture_store.preview_capture)
    except _FormProblems as exc:
        return CaptureOutcome(problems=exc.problems)
    except FleetDBError as exc:
        return CaptureOutcome(problems=problems_of(exc))
    return CaptureOutcome(report=report.as_dict(), shown=shown,
                          described={c.column: c.describe() for c in report.channels})


def save(url: str, form: CaptureForm) -> CaptureOutcome:
    """Log the capture's test (``fleetdb.capture_store.capture_test``, as ``fleetdb capture``),
    then ask fleetdb for its verdict. Nothing is written when there is a problem."""
    try:
        report = _call(url, form, capture_store.capture_test)
    except _FormProblems as exc:
        return CaptureOutcome(problems=exc.problems)
    except FleetDBError as exc:
        return CaptureOutcome(problems=problems_of(exc))
    health = data.health_module()
    verdict = None if health is None else health.test_verdict(data.engine_for(url),
                                                              report.test_id)
    return CaptureOutcome(report=report.as_dict(), verdict=verdict,
                          described={c.column: c.describe() for c in report.channels})
