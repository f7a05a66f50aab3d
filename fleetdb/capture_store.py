"""Captures in the store: derive a capture's readings into a test, keep the capture with it.

Derived readings go into a new test through :func:`fleetdb.logbook.log_test` with
``source = "capture"``, so they pass the same validation as an import and the checks,
trends and board use them like typed ones. Absolute channels are converted with the test's
barometer (measured, else the standard atmosphere at the site's elevation). The capture
itself is stored with the test: the mapped columns in blocks, one compressed numpy
archive per chunk as read (``numpy.savez_compressed``; float32 when that keeps every value
within 1e-6 of the channel's range in the chunk, else float64; time as start and step when
every sample lies within 0.1 % of a step of the chunk's uniform grid, else in full; data
format ``npz-blocks-1``, while ``npz-1`` captures, one archive split into 8 MiB blocks, still
read back), beside its channel map and what was derived. The file is read into a spool on
disk (:mod:`fleetdb.capture_stream`), so a long recording is analysed and compressed window
by window in bounded memory; a capture of up to ``capture_stream.CORE_SAMPLES`` samples is
analysed whole. Voiding the test takes its derived readings out of the analysis; nothing
is deleted. The file format and channel map are in :mod:`fleetdb.capture_files`.

The firing order (needed to name the cylinder of each starter-current hump) is a property
of the engine family, kept in the ``firing_order`` table: the latest one given for a family
is in force, and each capture also records the one it used in its channel map.
"""

from __future__ import annotations

import io
import json
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
from sqlalchemy import text
from sqlalchemy.engine import Connection, Engine

from fleetdb import access, atmosphere, audit
from fleetdb import capture as cap
from fleetdb import capture_stream as stream
from fleetdb.capture_files import CaptureData, Channel, Progress, parse_firing_order, problem
from fleetdb.defaults import DEFAULTS
from fleetdb.errors import FleetDBError, InvalidValue, UnitNotFound
from fleetdb.ingest import stamp
from fleetdb.logbook import TypedReading, log_test
from fleetdb.units import from_kpa

DATA_FORMAT = "npz-blocks-1"


# -- deriving readings ------------------------------------------------------------------------

@dataclass
class CaptureAnalysis:
    """What a capture gives: readings for the test, and a summary to keep and show."""

    sampling: cap.Sampling
    readings: list[TypedReading]
    crank_rpm: float | None
    channels: list[dict[str, Any]]
    findings: list[dict[str, Any]]


def _round(value: float | None, digits: int = 1) -> float | None:
    return None if value is None or not np.isfinite(value) else round(float(value), digits)


def analyse(data: CaptureData | stream.SpooledCapture, channels: Sequence[Channel], *,
            cylinders: int, baro_kpa: float, firing_order: tuple[int, ...] | None = None,
            first_hump: int | None = None, idle_rpm: float | None = None) -> CaptureAnalysis:
    """Derive the readings of a capture (see :mod:`fleetdb.capture` for the methods).

    :param data: the capture as read: whole, or spooled (then analysed window by window,
        see :mod:`fleetdb.capture_stream`).
    :param channels: the channel map.
    :param cylinders: the engine's cylinder count.
    :param baro_kpa: ambient absolute pressure, kPa (for absolute channels).
    :param firing_order: needed for a current channel.
    :param first_hump: the cylinder of the first current hump, when no pressure channel syncs.
    :param idle_rpm: approximate idle speed for an idle vacuum channel (optional).
    :raises InvalidInput: naming the file and column at fault.
    """
    _check_map(data.name, channels, cylinders, firing_order, first_hump)
    long = isinstance(data, stream.SpooledCapture)
    try:
        timing = stream.check_time(data) if long else cap.sampling(data.time_s)
    except cap.CaptureError as exc:
        line = None if exc.index is None else exc.index + 2
        raise problem(data.name, data.time_column, str(exc), line) from exc
    readings: list[TypedReading] = []
    summaries: list[dict[str, Any]] = []
    findings: list[dict[str, Any]] = []
    rpms: list[float] = []
    pressure: dict[int, cap.PressureResult] = {}
    ordered = sorted(channels, key=lambda c: ("pressure", "vacuum_cranking", "vacuum_idle",
                                              "current").index(c.kind))
    rate = timing.rate_hz
    for ch in ordered:
        try:
            if isinstance(data, stream.SpooledCapture):
                stream.check_levels(data, ch.column)
                windows = stream.Windows(data, ch, rate, baro_kpa)
            else:
                raw = data.raw[ch.column]
                cap.check_levels(raw)
                si = cap.to_si(raw, ch.kind, ch.unit, slope=ch.slope, offset=ch.offset,
                               absolute=ch.absolute, baro_kpa=baro_kpa)
            summary: dict[str, Any] = {"column": ch.column, "kind": ch.kind,
                                       "cylinder": ch.cylinder}
            if ch.kind == "pressure":
                res = (stream.compression_events(windows, rate) if long
                       else cap.compression_events(data.time_s, si, rate))
                pressure[ch.cylinder] = res
                rpms.append(res.crank_rpm)
                readings.append(TypedReading("compression", ch.cylinder,
                                             f"{res.settled_kpa:.1f}", "kPa"))
                summary.update(_pressure_summary(res))
                findings += _pressure_findings(ch, res)
            elif ch.kind in ("vacuum_cranking", "vacuum_idle"):
                idle = ch.kind == "vacuum_idle"
                res_v = (stream.vacuum_summary(windows, rate, idle=idle, cylinders=cylinders,
                                               idle_rpm=idle_rpm) if long
                         else cap.vacuum_summary(si, rate, idle=idle, cylinders=cylinders,
                                                 idle_rpm=idle_rpm))
                readings.append(TypedReading(ch.kind, None, f"{max(res_v.mean_kpa, 0.0):.2f}",
                                             "kPa"))
                summary.update(_vacuum_summary(res_v))
                findings += _vacuum_findings(ch, res_v)
            else:
                sync = min(pressure) if pressure and first_hump is None else None
                options: dict[str, Any] = {
                    "sync_peak_times": None if sync is None else pressure[sync].peak_times_s,
                    "sync_cylinder": sync, "first_hump": first_hump}
                res_c = (stream.current_humps(windows, rate, cylinders, firing_order or (),
                                              **options) if long
                         else cap.current_humps(data.time_s, si, rate, cylinders,
                                                firing_order or (), **options))
                if not rpms:
                    rpms.append(res_c.crank_rpm)
                readings += [TypedReading("relative", c, f"{pct:.1f}", "%")
                             for c, pct in res_c.relative_pct.items()]
                summary.update(_current_summary(res_c, firing_order or ()))
        except cap.CaptureError as exc:
            raise problem(data.name, ch.column, str(exc)) from exc
        summaries.append(summary)
    _check_values(data.name, readings, channels, baro_kpa)
    return CaptureAnalysis(sampling=timing, readings=readings,
                           crank_rpm=float(np.median(rpms)) if rpms else None,
                           channels=summaries, findings=findings)


def _check_map(name: str, channels: Sequence[Channel], cylinders: int,
               firing_order: tuple[int, ...] | None, first_hump: int | None) -> None:
    if not channels:
        raise problem(name, None, "no channel is mapped: say what a column holds, like "
                       "--channel p1=pressure:1:kPa")
    seen: dict[tuple[str, int | None], str] = {}
    for ch in channels:
        if ch.cylinder is not None and ch.cylinder > cylinders:
            raise problem(name, ch.column, f"cylinder {ch.cylinder} on a {cylinders}-cylinder "
                           "engine")
        key = (ch.kind, ch.cylinder)
        if key in seen:
            what = f"cylinder {ch.cylinder}'s pressure" if ch.cylinder else ch.kind
            raise problem(name, ch.column, f"{what} is also mapped to column {seen[key]}; "
                           "map one column to each")
        seen[key] = ch.column
    current = next((c for c in channels if c.kind == "current"), None)
    if current is None:
        return
    if not firing_order:
        raise problem(name, current.column, "a current channel needs the engine family's "
                       "firing order: give it once, like --firing-order 1-3-4-2 (it is kept "
                       "for the family)")
    if len(firing_order) != cylinders:
        raise problem(name, current.column, f"firing order {'-'.join(map(str, firing_order))}"
                       f" does not name the {cylinders} cylinders of this engine")
    if first_hump is None and not any(c.kind == "pressure" for c in channels):
        raise problem(name, current.column, "the current humps need a sync: a pressure "
                       "channel of a known cylinder in the same capture, or the cylinder of "
                       "the first hump (--first-hump CYL)")
    if first_hump is not None and not 1 <= first_hump <= cylinders:
        raise problem(name, current.column, f"first hump on cylinder {first_hump} of a "
                       f"{cylinders}-cylinder engine")


def _check_values(name: str, readings: list[TypedReading], channels: Sequence[Channel],
                  baro_kpa: float) -> None:
    """Refuse derived values no gauge could show, naming the column (a wrong unit or scale)."""
    from fleetdb.validate import MAX_COMPRESSION_KPA

    column = {(c.kind if c.kind != "pressure" else "compression", c.cylinder): c.column
              for c in channels}
    for r in readings:
        value = float(r.value)
        if r.kind == "compression" and value > MAX_COMPRESSION_KPA:
            raise problem(name, column[(r.kind, r.cylinder)], f"settles at {value:,.0f} kPa, "
                           "beyond any cranking compression: check the unit and --scale")
        if r.kind.startswith("vacuum") and value > baro_kpa:
            raise problem(name, column[(r.kind, None)], f"averages {value:.1f} kPa of vacuum, "
                           f"more than the ambient {baro_kpa:.1f} kPa: check the unit, -abs "
                           "and --scale")


def _pressure_summary(res: cap.PressureResult) -> dict[str, Any]:
    return {"events": int(res.peaks_kpa.size), "first_kpa": _round(res.first_kpa),
            "settled_kpa": _round(res.settled_kpa), "first_pct": _round(res.first_pct),
            "events_to_90pct": res.events_to_90pct, "crank_rpm": _round(res.crank_rpm),
            "intake_depression_kpa": _round(res.intake_depression_kpa, 2),
            "peaks_kpa": [_round(p) for p in res.peaks_kpa],
            "peak_times_s": [_round(t, 4) for t in res.peak_times_s],
            "depression_by_cycle_kpa": [_round(d, 2) for d in res.depression_by_cycle_kpa],
            "rpm_by_cycle": [_round(r) for r in res.rpm_by_cycle]}


def _pressure_findings(ch: Channel, res: cap.PressureResult) -> list[dict[str, Any]]:
    limit = DEFAULTS["cranking_vacuum_max_throttle_open"]
    if res.intake_depression_kpa <= limit.kpa:
        return []
    return [{"code": "intake_depression_deep", "column": ch.column, "cylinder": ch.cylinder,
             "numbers": {"depression_kpa": _round(res.intake_depression_kpa, 2),
                         "limit_kpa": _round(limit.kpa, 2)},
             "text": f"Cylinder {ch.cylinder} falls {res.intake_depression_kpa:.1f} kPa "
                     f"({from_kpa(res.intake_depression_kpa, 'inHg'):.1f} inHg) below ambient "
                     "on its intake strokes: with the throttle held open it should stay near "
                     "0, so the intake is restricted or the throttle stays shut; every reading "
                     f"of this test is then low (limit {limit.value:g} {limit.unit}, fleetdb "
                     f"default, {limit.source})."}]


def _vacuum_summary(res: cap.VacuumResult) -> dict[str, Any]:
    out = {"mean_kpa": _round(res.mean_kpa, 2), "mean_inhg": _round(from_kpa(res.mean_kpa,
                                                                             "inHg"), 2),
           "pulsation_kpa": _round(res.pulsation_kpa, 2)}
    if res.idle:
        out.update({"firing_hz": _round(res.firing_hz, 2), "dip_kpa": _round(res.dip_kpa, 2),
                    "dip_se_kpa": _round(res.dip_se_kpa, 3), "dip_place": res.dip_place,
                    "regular_dip": res.regular_dip, "cycles": res.cycles})
    return out


def _vacuum_findings(ch: Channel, res: cap.VacuumResult) -> list[dict[str, Any]]:
    if not res.regular_dip or res.dip_kpa is None:
        return []
    return [{"code": "idle_vacuum_regular_dip", "column": ch.column, "cylinder": None,
             "numbers": {"dip_kpa": _round(res.dip_kpa, 2), "cycles": res.cycles},
             "text": f"Once every engine cycle the idle vacuum drops {res.dip_kpa:.1f} kPa "
                     f"({from_kpa(res.dip_kpa, 'inHg'):.1f} inHg) lower than at the other "
                     f"firing events ({res.cycles} cycles): one cylinder leaks (often a burnt "
                     "or sticking valve); a compression or leak-down test names it."}]


def _current_summary(res: cap.CurrentResult, order: tuple[int, ...]) -> dict[str, Any]:
    first = next((i for i, h in enumerate(res.hump_heights_a) if np.isfinite(h)), 0)
    return {"firing_order": "-".join(map(str, order)), "sync": res.sync,
            "crank_rpm": _round(res.crank_rpm), "humps_used": res.humps_used,
            "first_hump_s": _round(float(res.hump_times_s[0]), 4),
            "first_used_hump_s": _round(float(res.hump_times_s[first]), 4),
            "hump_height_a": {str(c): _round(h) for c, h in res.height_a.items()},
            "relative_pct": {str(c): _round(p) for c, p in res.relative_pct.items()},
            "hump_times_s": [_round(float(t), 4) for t in res.hump_times_s],
            "hump_cylinders": [int(c) for c in res.hump_cylinders],
            "hump_heights_a": [_round(float(h)) for h in res.hump_heights_a],
            "rpm_by_hump": [_round(float(r)) for r in
                            120.0 / (len(order) * np.diff(res.hump_times_s))] if order else []}


# -- the store --------------------------------------------------------------------------------

@dataclass
class CaptureReport:
    """What :func:`capture_test` did (or, on a dry run, would do)."""

    file: str
    fleet_no: str
    test_id: int | None
    capture_id: int | None
    analysis: CaptureAnalysis
    channels: list[Channel]
    firing_order: tuple[int, ...] | None
    firing_order_saved: bool
    data_bytes: int
    file_bytes: int
    conditions: dict[str, str]

    def as_dict(self) -> dict[str, Any]:
        """The JSON shape of ``fleetdb capture --json``."""
        s = self.analysis.sampling
        return {
            "file": self.file, "fleet_no": self.fleet_no, "test_id": self.test_id,
            "capture_id": self.capture_id, "dry_run": self.test_id is None,
            "samples": s.samples, "sample_rate_hz": _round(s.rate_hz, 3),
            "duration_s": _round(s.duration_s, 4), "file_bytes": self.file_bytes,
            "stored_bytes": self.data_bytes,
            "firing_order": None if not self.firing_order
            else "-".join(map(str, self.firing_order)),
            "firing_order_saved": self.firing_order_saved,
            "crank_rpm": _round(self.analysis.crank_rpm),
            "conditions": self.conditions,
            "readings": [{"kind": r.kind, "cylinder": r.cylinder, "value": float(r.value),
                          "units": r.units} for r in self.analysis.readings],
            "channels": self.analysis.channels, "findings": self.analysis.findings}


def _unit_row(conn: Connection, fleet_no: str) -> dict[str, Any]:
    row = conn.execute(text(
        "SELECT u.id, u.family_id, f.cylinders, s.elevation_m FROM unit u "
        "JOIN engine_family f ON f.id = u.family_id JOIN site s ON s.id = u.site_id "
        "WHERE u.fleet_no = :f"), {"f": fleet_no.strip()}).first()
    if row is None:
        raise UnitNotFound(f"no unit with fleet number {fleet_no!r}; 'fleetdb units' lists them")
    return {"unit_id": int(row[0]), "family_id": int(row[1]), "cylinders": int(row[2]),
            "elevation_m": float(row[3])}


def stored_firing_order(conn: Connection, family_id: int) -> tuple[int, ...] | None:
    """The firing order in force for an engine family (the latest one given), or None."""
    value = conn.execute(text("SELECT firing_order FROM firing_order WHERE family_id = :f "
                              "ORDER BY id DESC LIMIT 1"), {"f": family_id}).scalar()
    return None if value is None else parse_firing_order(value)


def encode_samples(time_s: np.ndarray, raw: dict[str, np.ndarray]) -> bytes:
    """The samples as a compressed numpy archive (see the module docstring for precision)."""
    arrays: dict[str, np.ndarray] = {}
    n = time_s.size
    step = (time_s[-1] - time_s[0]) / (n - 1)
    grid = time_s[0] + step * np.arange(n)
    if np.max(np.abs(time_s - grid)) <= 1e-3 * step:
        arrays["time_start_step"] = np.array([time_s[0], step])
    else:
        arrays["time"] = time_s
    for i, (column, values) in enumerate(raw.items()):
        single = values.astype(np.float32)
        span = float(np.ptp(values)) or 1.0
        exact = np.max(np.abs(single.astype(float) - values)) <= 1e-6 * span
        arrays[f"ch{i}"] = single if exact else values
        arrays[f"name{i}"] = np.array(column)
    buffer = io.BytesIO()
    np.savez_compressed(buffer, **arrays)
    return buffer.getvalue()


def decode_samples(blob: bytes) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Inverse of :func:`encode_samples`: (time in s, {column: values})."""
    with np.load(io.BytesIO(blob), allow_pickle=False) as z:
        names = sorted((k for k in z.files if k.startswith("ch")), key=lambda k: int(k[2:]))
        raw = {str(z[f"name{k[2:]}"]): z[k].astype(float) for k in names}
        if "time" in z.files:
            time_s = z["time"]
        else:
            start, step = z["time_start_step"]
            n = next(iter(raw.values())).size
            time_s = start + step * np.arange(n)
    return time_s, raw


def decode_blocks(blocks: Sequence[bytes], data_format: str = "npz-blocks-1"
                  ) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """A stored capture's samples from its blocks, in order of ``seq``.

    ``npz-blocks-1``: each block is one :func:`encode_samples` archive of a chunk as read;
    ``npz-1`` (captures stored before): one archive split into blocks of 8 MiB.
    """
    if data_format == "npz-1":
        return decode_samples(b"".join(blocks))
    parts = [decode_samples(b) for b in blocks]
    columns = list(parts[0][1])
    return (np.concatenate([t for t, _ in parts]),
            {c: np.concatenate([raw[c] for _, raw in parts]) for c in columns})


def capture_test(engine: Engine, path: Path | str, fleet_no: str, tested_at: datetime | str,
                 hours: float | str, channels: Sequence[Channel], *, time_column: str = "t",
                 time_unit: str = "s", firing_order: tuple[int, ...] | None = None,
                 first_hump: int | None = None, idle_rpm: float | None = None,
                 conditions: dict[str, str] | None = None, by: str | None = None,
                 dry_run: bool = False, progress: Progress | None = None,
                 name: str | None = None) -> CaptureReport:
    """Read a capture, derive its readings into a new test, and store the capture with it.

    :param engine: the store.
    :param path: the capture CSV.
    :param fleet_no: the unit tested.
    :param tested_at: when (shop local time).
    :param hours: the hour meter.
    :param channels: what the columns hold (:func:`parse_channel`, :func:`with_scales`).
    :param time_column: the time column's name.
    :param time_unit: ``s``, ``ms`` or ``us``.
    :param firing_order: the engine family's firing order; kept for the family when it
        differs from the one in force (None: use the one in force).
    :param first_hump: the cylinder of the first current hump (sync without pressure).
    :param idle_rpm: approximate idle speed, for an idle vacuum channel.
    :param conditions: typed test conditions as for :func:`fleetdb.logbook.log_test`; a typed
        ``crank_rpm`` wins over the derived one.
    :param by: who logs it (default: the operating-system user).
    :param dry_run: derive and validate; write nothing.
    :param progress: called with (bytes read, file size) while reading.
    :param name: what messages and the store call the file (default: its path), e.g. the
        name of a file uploaded through the dashboard.
    :raises InvalidInput: naming the file, line and column of what is wrong.
    """
    prep = _prepare(engine, Path(path), fleet_no, tested_at, hours, channels,
                    time_column=time_column, time_unit=time_unit, firing_order=firing_order,
                    first_hump=first_hump, idle_rpm=idle_rpm, conditions=conditions, by=by,
                    progress=progress, name=name)
    try:
        report = prep.report
        if dry_run:
            return report
        test_id = log_test(engine, fleet_no, tested_at, hours, report.analysis.readings,
                           conditions=report.conditions, by=prep.by, source="capture",
                           source_name=prep.source_name)
        assert test_id is not None
        try:
            report.capture_id = _store(engine, test_id, prep.spool, channels, report.analysis,
                                       prep.blocks, prep.by, report.firing_order, prep.baro_kpa,
                                       first_hump)
            if prep.save_order and firing_order is not None:
                with engine.begin() as conn:
                    conn.execute(text("INSERT INTO firing_order (family_id, firing_order, "
                                      "created_at, created_by) VALUES (:f, :o, :at, :by)"),
                                 {"f": prep.family_id, "o": "-".join(map(str, firing_order)),
                                  "at": stamp(conn), "by": prep.by})
                    audit.record(conn, "family.firing_order", "firing order of the engine "
                                 f"family set to {'-'.join(map(str, firing_order))} with "
                                 f"capture {prep.file_name}", family_id=prep.family_id,
                                 detail={"firing_order": list(firing_order)}, by=prep.by)
                report.firing_order_saved = True
        except Exception as exc:
            # Never leave derived readings in the analysis without the capture they came from.
            from fleetdb.logbook import void_test

            void_test(engine, test_id, f"its capture {prep.file_name} could not be stored: "
                      f"{type(exc).__name__}", prep.by)
            raise FleetDBError(f"{prep.file_name}: the capture could not be stored ({exc}); test "
                               f"{test_id} was voided so its readings stay out of the analysis; "
                               "log the capture again") from exc
        report.test_id = test_id
        return report
    finally:
        prep.spool.close()


def preview_capture(engine: Engine, path: Path | str, fleet_no: str,
                    tested_at: datetime | str, hours: float | str,
                    channels: Sequence[Channel], **options: Any
                    ) -> tuple[CaptureReport, StoredCapture]:
    """What :func:`capture_test` would log, and the capture as it would be kept; no writes.

    The same reading, checks and derivations as ``capture_test(..., dry_run=True)``; the
    samples come back too (as :class:`StoredCapture` with no ids), so they can be drawn
    before the technician saves.

    :param options: the keyword options of :func:`capture_test` (not ``dry_run``).
    :raises InvalidInput: naming the file, line and column of what is wrong.
    """
    prep = _prepare(engine, Path(path), fleet_no, tested_at, hours, channels, **options)
    report = prep.report
    try:
        whole = prep.spool.whole()
    finally:
        prep.spool.close()
    shown = StoredCapture(
        capture_id=None, test_id=None, file_name=prep.file_name, time_s=whole.time_s,
        raw=whole.raw,
        channel_map=_channel_map(whole, channels, report.firing_order, prep.baro_kpa,
                                 options.get("first_hump")),
        derived=_derived(report.analysis))
    return report, shown


@dataclass
class _Prepared:
    report: CaptureReport
    spool: stream.SpooledCapture
    blocks: list[int]  # bytes of each compressed block, in the spool's blocks file
    by: str
    baro_kpa: float
    family_id: int
    save_order: bool
    file_name: str
    source_name: str


def _prepare(engine: Engine, path: Path, fleet_no: str, tested_at: datetime | str,
             hours: float | str, channels: Sequence[Channel], *, time_column: str = "t",
             time_unit: str = "s", firing_order: tuple[int, ...] | None = None,
             first_hump: int | None = None, idle_rpm: float | None = None,
             conditions: dict[str, str] | None = None, by: str | None = None,
             progress: Progress | None = None, name: str | None = None) -> _Prepared:
    """Everything of :func:`capture_test` short of writing: read, derive, check, compress."""
    by = access.author(by)
    shown_name = name or str(path)
    file_name = Path(shown_name).name
    conditions = {k: str(v) for k, v in (conditions or {}).items() if v not in (None, "")}
    with engine.connect() as conn:
        unit = _unit_row(conn, fleet_no)
        stored = stored_firing_order(conn, unit["family_id"])
    if firing_order is not None and len(firing_order) != unit["cylinders"]:
        raise InvalidValue(f"firing order {'-'.join(map(str, firing_order))} does not name the "
                           f"{unit['cylinders']} cylinders of {fleet_no}'s engine")
    order = firing_order or stored
    _check_map(shown_name, channels, unit["cylinders"], order, first_hump)
    spool = stream.spool_capture(path, time_column, [c.column for c in channels],
                                 time_unit=time_unit, progress=progress, name=shown_name)
    try:
        return _prepare_spooled(engine, spool, fleet_no, tested_at, hours, channels,
                                unit=unit, stored=stored, order=order, by=by,
                                file_name=file_name, conditions=conditions,
                                firing_order=firing_order, first_hump=first_hump,
                                idle_rpm=idle_rpm)
    except BaseException:
        spool.close()
        raise


def _prepare_spooled(engine: Engine, spool: stream.SpooledCapture, fleet_no: str,
                     tested_at: datetime | str, hours: float | str,
                     channels: Sequence[Channel], *, unit: dict[str, Any],
                     stored: tuple[int, ...] | None, order: tuple[int, ...] | None, by: str,
                     file_name: str, conditions: dict[str, str],
                     firing_order: tuple[int, ...] | None, first_hump: int | None,
                     idle_rpm: float | None) -> _Prepared:
    data: CaptureData | stream.SpooledCapture = spool
    if spool.samples <= spool.core_samples:  # one window: analysed whole, as always
        data = spool.whole()
    with engine.connect() as conn:
        before = conn.execute(text("SELECT id, test_id FROM capture WHERE content_sha256 = :h"),
                              {"h": data.sha256}).first()
    if before is not None:
        raise problem(data.name, None, f"this recording is already stored as capture "
                       f"{before[0]} of test {before[1]}; nothing written")
    try:
        baro = float(conditions["baro_kpa"]) if "baro_kpa" in conditions else \
            float(atmosphere.pressure_kpa(unit["elevation_m"]))
    except ValueError:
        raise InvalidValue(f"barometer {conditions['baro_kpa']!r} is not a number") from None
    analysis = analyse(data, channels, cylinders=unit["cylinders"], baro_kpa=baro,
                       firing_order=order, first_hump=first_hump, idle_rpm=idle_rpm)
    if analysis.crank_rpm is not None and "crank_rpm" not in conditions:
        conditions["crank_rpm"] = f"{analysis.crank_rpm:.0f}"
    uses_order = any(c.kind == "current" for c in channels)
    source_name = f"{file_name} (derived readings)"
    log_test(engine, fleet_no, tested_at, hours, analysis.readings, conditions=conditions,
             by=by, source="capture", source_name=source_name, dry_run=True)
    blocks = _encode_blocks(spool)
    report = CaptureReport(file=data.name, fleet_no=fleet_no, test_id=None, capture_id=None,
                           analysis=analysis, channels=list(channels),
                           firing_order=order if uses_order else None,
                           firing_order_saved=False, data_bytes=sum(blocks),
                           file_bytes=data.file_bytes, conditions=conditions)
    return _Prepared(report=report, spool=spool, blocks=blocks, by=by, baro_kpa=baro,
                     family_id=unit["family_id"],
                     save_order=uses_order and firing_order is not None and firing_order != stored,
                     file_name=file_name, source_name=source_name)


def _channel_map(data: CaptureData | stream.SpooledCapture, channels: Sequence[Channel],
                 order: tuple[int, ...] | None, baro_kpa: float,
                 first_hump: int | None) -> dict[str, Any]:
    return {"channels": [asdict(c) for c in channels],
            "firing_order": None if order is None else "-".join(map(str, order)),
            "first_hump": first_hump, "baro_kpa": round(baro_kpa, 3),
            "ignored_columns": data.ignored}


def _derived(analysis: CaptureAnalysis) -> dict[str, Any]:
    return {"channels": analysis.channels, "findings": analysis.findings,
            "crank_rpm": _round(analysis.crank_rpm),
            "readings": [asdict(r) for r in analysis.readings]}


def _store(engine: Engine, test_id: int, spool: stream.SpooledCapture,
           channels: Sequence[Channel], analysis: CaptureAnalysis, blocks: list[int], by: str,
           order: tuple[int, ...] | None, baro_kpa: float, first_hump: int | None) -> int:
    s = analysis.sampling
    channel_map = _channel_map(spool, channels, order, baro_kpa, first_hump)
    derived = _derived(analysis)
    with engine.begin() as conn:
        capture_id = conn.execute(text(
            "INSERT INTO capture (test_id, file_name, content_sha256, file_bytes, samples, "
            "sample_rate_hz, start_s, duration_s, time_column, time_unit, channel_map_json, "
            "derived_json, data_format, data_bytes, created_at, created_by) VALUES (:test, "
            ":name, :sha, :fb, :n, :rate, :start, :dur, :tc, :tu, :map, :derived, :fmt, :db, "
            ":at, :by) RETURNING id"),
            {"test": test_id, "name": Path(spool.name).name[:255], "sha": spool.sha256,
             "fb": spool.file_bytes, "n": s.samples, "rate": s.rate_hz, "start": s.start_s,
             "dur": s.duration_s, "tc": spool.time_column[:120], "tu": spool.time_unit,
             "map": json.dumps(channel_map), "derived": json.dumps(derived),
             "fmt": DATA_FORMAT, "db": sum(blocks), "at": stamp(conn), "by": by}).scalar_one()
        with open(_blocks_path(spool), "rb") as fh:
            for seq, size in enumerate(blocks):
                conn.execute(text("INSERT INTO capture_block (capture_id, seq, data) VALUES "
                                  "(:c, :s, :d)"), {"c": capture_id, "s": seq,
                                                    "d": fh.read(size)})
    return int(capture_id)


def _blocks_path(spool: stream.SpooledCapture) -> Path:
    return Path(spool.folder.name) / "blocks.npz-seq"


def _encode_blocks(spool: stream.SpooledCapture) -> list[int]:
    """Compress the spool, chunk by chunk as read, into one file of blocks; their sizes."""
    sizes = []
    with open(_blocks_path(spool), "wb") as fh:
        for time_s, raw in spool.blocks():
            if time_s.size < 2:  # a last chunk of one sample joins no grid: keep it in full
                buffer = io.BytesIO()
                arrays = {"time": time_s}
                for i, (column, values) in enumerate(raw.items()):
                    arrays[f"ch{i}"], arrays[f"name{i}"] = values, np.array(column)
                np.savez_compressed(buffer, **arrays)
                blob = buffer.getvalue()
            else:
                blob = encode_samples(time_s, raw)
            fh.write(blob)
            sizes.append(len(blob))
    return sizes


@dataclass
class StoredCapture:
    """A capture read back from the store."""

    capture_id: int | None  # None for a preview, not stored
    test_id: int | None
    file_name: str
    time_s: np.ndarray
    raw: dict[str, np.ndarray]
    channel_map: dict[str, Any]
    derived: dict[str, Any]

    def channel_si(self, column: str, first: int = 0, stop: int | None = None) -> np.ndarray:
        """A channel in fleetdb's SI for its kind (gauge kPa, kPa below ambient, A).

        :param first: the first sample wanted (a window converts only its own samples).
        :param stop: one past the last sample wanted (None: to the end).
        """
        spec = next(c for c in self.channel_map["channels"] if c["column"] == column)
        return cap.to_si(self.raw[column][first:stop], spec["kind"], spec["unit"],
                         slope=spec["slope"],
                         offset=spec["offset"], absolute=spec["absolute"],
                         baro_kpa=self.channel_map["baro_kpa"])


def load_capture(engine: Engine, capture_id: int) -> StoredCapture:
    """Read a stored capture back: samples, channel map and what was derived.

    :param capture_id: the capture.
    """
    with engine.connect() as conn:
        row = conn.execute(text("SELECT test_id, file_name, channel_map_json, derived_json, "
                                "data_format FROM capture WHERE id = :id"),
                           {"id": capture_id}).first()
        if row is None:
            raise FleetDBError(f"no capture with id {capture_id}")
        fmt = row[4]
        blocks = conn.execute(text("SELECT data FROM capture_block WHERE capture_id = :id "
                                   "ORDER BY seq"), {"id": capture_id}).scalars().all()
    time_s, raw = decode_blocks([bytes(b) for b in blocks], fmt)
    return StoredCapture(capture_id=capture_id, test_id=int(row[0]), file_name=row[1],
                         time_s=time_s, raw=raw, channel_map=json.loads(row[2]),
                         derived=json.loads(row[3]))


def captures_of_test(engine: Engine, test_id: int) -> list[dict[str, Any]]:
    """The captures kept with a test (without their samples), oldest first.

    :param test_id: the test.
    """
    with engine.connect() as conn:
        rows = conn.execute(text(
            "SELECT id, file_name, samples, sample_rate_hz, duration_s, data_bytes, "
            "channel_map_json, derived_json FROM capture WHERE test_id = :t ORDER BY id"),
            {"t": test_id}).all()
    return [{"capture_id": int(r[0]), "file_name": r[1], "samples": int(r[2]),
             "sample_rate_hz": float(r[3]), "duration_s": float(r[4]),
             "stored_bytes": int(r[5]), "channel_map": json.loads(r[6]),
             "derived": json.loads(r[7])} for r in rows]


def captures_of_unit(engine: Engine, fleet_no: str) -> list[dict[str, Any]]:
    """The captures kept with a unit's tests (without their samples), newest test first.

    Each: ``capture_id, test_id, tested_at`` (ISO text), ``hours, voided, file_name, samples,
    sample_rate_hz, duration_s, channels`` (``[{column, kind, cylinder}]``).

    :param fleet_no: the unit.
    :raises UnitNotFound: no such unit.
    """
    with engine.connect() as conn:
        _unit_row(conn, fleet_no)
        rows = conn.execute(text(
            "SELECT c.id, c.test_id, t.tested_at, t.hours, v.test_id IS NOT NULL, c.file_name, "
            "c.samples, c.sample_rate_hz, c.duration_s, c.channel_map_json FROM capture c "
            "JOIN test t ON t.id = c.test_id JOIN unit u ON u.id = t.unit_id "
            "LEFT JOIN test_void v ON v.test_id = t.id WHERE u.fleet_no = :f "
            "ORDER BY t.tested_at DESC, c.id DESC"), {"f": fleet_no.strip()}).all()
    out = []
    for r in rows:
        tested = r[2] if isinstance(r[2], str) else r[2].isoformat(sep=" ")
        channels = [{k: c[k] for k in ("column", "kind", "cylinder")}
                    for c in json.loads(r[9])["channels"]]
        out.append({"capture_id": int(r[0]), "test_id": int(r[1]), "tested_at": tested[:19],
                    "hours": float(r[3]), "voided": bool(r[4]), "file_name": r[5],
                    "samples": int(r[6]), "sample_rate_hz": float(r[7]),
                    "duration_s": float(r[8]), "channels": channels})
    return out
