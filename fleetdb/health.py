"""Unit health, stored weekly: refresh the fleet or a few units, serve the board from it.

The analysis itself is :func:`fleetdb.assess.assess`; this module feeds it from the store
and keeps its results: one ``health_snapshot`` row per unit and week (the board reads
only these, never recomputing per request) and one ``family_wear`` row per family and
week (so that refreshing one unit after a logged test pools with its family's stored
statistics instead of re-reading the whole family).
"""

from __future__ import annotations

import datetime as dt
import gc
import json
import multiprocessing as mp
import multiprocessing.connection as mp_connection
import os
import queue
import sys
import threading
import traceback
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import text
from sqlalchemy.engine import Connection, Engine

from fleetdb import assess as assess_mod
from fleetdb import fleetfit, frames, malloc
from fleetdb.assess import LEVEL_RANK, LEVELS, Assessment
from fleetdb.db import stamp
from fleetdb.views import unit_id_for

__all__ = ["LEVELS", "board", "refresh_fleet", "refresh_units", "test_verdict", "unit_report",
           "week_start"]


def week_start(day: dt.date) -> dt.date:
    """The Monday of ``day``'s ISO week."""
    return day - dt.timedelta(days=day.weekday())


def _as_of(day: dt.date | None) -> tuple[dt.date, pd.Timestamp]:
    day = day or dt.date.today()
    return day, pd.Timestamp(day) + pd.Timedelta(hours=23, minutes=59, seconds=59)


def _date(value: Any) -> dt.date | None:
    return None if value is None or pd.isna(value) else pd.Timestamp(value).date()


def _float(value: Any) -> float | None:
    return None if value is None or pd.isna(value) else float(value)


def _int(value: Any) -> int | None:
    return None if value is None or pd.isna(value) else int(value)


def _stored_family_params(conn: Connection, week: dt.date) -> pd.DataFrame | None:
    """The latest stored family statistics at or before ``week``, keyed like assess groups."""
    rows = conn.execute(text(
        "SELECT w.family_id, w.mean_slope, w.tau2, w.pooled_sd, w.n_series, w.mean_slope_se, "
        "w.pooled_df, w.spread_mean_slope, w.spread_tau2, w.spread_pooled_sd, "
        "w.spread_mean_slope_se, w.spread_pooled_df FROM family_wear w WHERE w.week_start = "
        "(SELECT MAX(week_start) FROM family_wear WHERE week_start <= :w)"),
        {"w": week}).all()
    if not rows:
        return None
    out = []
    for r in rows:
        out.append((r[0], r[1], r[5], r[2], r[3], r[6], r[4]))
        out.append((-1 - r[0], r[7], r[10], r[8], r[9], r[11], r[4]))
    frame = pd.DataFrame(out, columns=["group", "family_mu", "family_mu_se", "family_tau2",
                                       "family_noise_sd", "family_noise_df", "n_series"])
    frame = frame.set_index("group")[fleetfit.FAMILY_PARAM_COLUMNS]
    return frame.astype(float)


#: Columns of a snapshot row, in the order :func:`_snapshot_rows` gives them.
_SNAPSHOT_COLUMNS = ("unit_id", "week_start", "as_of", "level", "main_code", "main_text",
                     "reasons_json", "last_test_id", "last_tested_at", "last_hours",
                     "projected_hours", "projected_hours_early", "projected_date",
                     "projected_date_early", "wear_kpa_per_1000h", "computed_at",
                     "limits_version")


def _json_encoders() -> tuple[Callable[[str], str], Callable[[Any], str]]:
    """JSON text of a string and of any value, as ``json.dumps(..., ensure_ascii=False)``
    writes them: json's own C encoders called directly where this Python has them, without
    the per-call set-up that is most of the time for 100,000 small objects."""
    plain = json.JSONEncoder(ensure_ascii=False)
    try:
        encoder = json.encoder.c_make_encoder(
            None, plain.default, json.encoder.encode_basestring, None, ": ", ", ", False,
            False, True)
    except (TypeError, AttributeError):  # no C encoder, or another signature
        return plain.encode, plain.encode
    return json.encoder.encode_basestring, lambda value: "".join(encoder(value, 0))


def _reasons_json(rr: pd.DataFrame) -> dict[int, str]:
    """Each unit's reasons as the JSON array stored in its snapshot row.

    Built from whole columns, one reason a string, then joined per unit: the same text as
    ``json.dumps`` of the list of reason objects (keys code, level, text, numbers, test_id).
    """
    if rr.empty:
        return {}
    text, numbers = _json_encoders()
    test_ids = ["null" if v is pd.NA else str(int(v))
                for v in pd.array(rr["test_id"].to_numpy(dtype=object), dtype="Int64").tolist()]
    # Codes and levels are plain identifiers (checks.CODES, LEVELS): no escaping to do.
    items = [f'{{"code": "{c}", "level": "{lv}", "text": {text(t)}, '
             f'"numbers": {numbers(n)}, "test_id": {i}}}'
             for c, lv, t, n, i in zip(rr["code"].tolist(), rr["level"].tolist(),
                                       rr["text"].tolist(), rr["numbers"].tolist(), test_ids,
                                       strict=True)]
    unit = rr["unit_id"].to_numpy(np.int64)
    order = np.argsort(unit, kind="stable")  # a unit's reasons keep their order
    unit = unit[order]
    starts = np.flatnonzero(np.r_[True, unit[1:] != unit[:-1]])
    ends = np.r_[starts[1:], len(unit)]
    ordered = [items[i] for i in order.tolist()]
    return {int(unit[a]): "[" + ", ".join(ordered[a:b]) + "]"
            for a, b in zip(starts.tolist(), ends.tolist(), strict=True)}


def _snapshot_rows(units: pd.DataFrame, rr: pd.DataFrame, week: dt.date, day: dt.date,
                   at: Any) -> list[tuple]:
    """One ``health_snapshot`` row per unit (``_SNAPSHOT_COLUMNS``), plain Python values."""
    reasons = _reasons_json(rr)

    def floats(col: str) -> list[float | None]:
        return [None if v != v else v for v in units[col].to_numpy(dtype=float).tolist()]

    def moments(col: str, unit: str) -> list[Any]:
        # numpy makes the datetime.date (unit "D") or datetime.datetime ("us") objects
        # itself, None for NaT: no Timestamp a value.
        return pd.to_datetime(units[col]).to_numpy(f"datetime64[{unit}]").astype(object).tolist()

    def texts(col: str, width: int | None = None) -> list[str | None]:
        return [(v[:width] if width else v) if isinstance(v, str) else None
                for v in units[col].to_numpy(dtype=object)]

    unit_ids = [int(u) for u in units.index]
    last_ids = [None if v != v else int(v)
                for v in units["last_test_id"].to_numpy(dtype=float).tolist()]
    versions = ([_int(v) for v in units["limits_version"]] if "limits_version" in units
                else [None] * len(units))
    n = len(units)
    return list(zip(
        unit_ids, [week] * n, [day] * n, units["level"].tolist(), texts("main_code"),
        texts("main_text", 500), [reasons.get(u, "[]") for u in unit_ids], last_ids,
        moments("last_tested_at", "us"),
        floats("last_hours"), floats("projected_hours"), floats("projected_hours_early"),
        moments("projected_date", "D"), moments("projected_date_early", "D"),
        floats("wear_kpa_per_1000h"),
        [at] * n, versions, strict=True))


def _write_snapshot(conn: Connection, rows: list[tuple]) -> None:
    """Upsert snapshot rows through the driver (this week's row of a unit is replaced;
    two refreshes at once both succeed)."""
    if not rows:
        return
    mark = "?" if conn.dialect.name == "sqlite" else "%s"
    conn.exec_driver_sql(
        f"INSERT INTO health_snapshot ({', '.join(_SNAPSHOT_COLUMNS)}) VALUES "
        f"({', '.join([mark] * len(_SNAPSHOT_COLUMNS))}) ON CONFLICT (unit_id, week_start) "
        "DO UPDATE SET " + ", ".join(f"{c} = excluded.{c}" for c in _SNAPSHOT_COLUMNS[2:]),
        rows)


def _store(conn: Connection, units: pd.DataFrame, rr: pd.DataFrame, week: dt.date,
           day: dt.date) -> None:
    """Write the snapshot rows of some units (upserting this week's rows).

    Snapshot rows are derived data, recomputed at will; tests and readings are never
    deleted.
    """
    _write_snapshot(conn, _snapshot_rows(units, rr, week, day, stamp(conn)))


def _store_family_params(conn: Connection, params: pd.DataFrame, week: dt.date,
                         at: Any) -> None:
    conn.execute(text("DELETE FROM family_wear WHERE week_start = :w"), {"w": week})
    fams = sorted({int(g) if g >= 0 else int(-1 - g) for g in params.index})
    rows = []
    for fid in fams:
        wear = params.loc[fid] if fid in params.index else None
        spread = params.loc[-1 - fid] if (-1 - fid) in params.index else None

        def val(row: pd.Series | None, col: str) -> float | None:
            return None if row is None else _float(row[col])
        rows.append({
            "f": fid, "w": week, "mu": val(wear, "family_mu"), "tau2": val(wear, "family_tau2"),
            "sd": val(wear, "family_noise_sd"), "n": int(val(wear, "n_series") or 0),
            "mu_se": val(wear, "family_mu_se"), "df": val(wear, "family_noise_df"),
            "smu": val(spread, "family_mu"), "stau2": val(spread, "family_tau2"),
            "ssd": val(spread, "family_noise_sd"), "smu_se": val(spread, "family_mu_se"),
            "sdf": val(spread, "family_noise_df"), "at": at})
    if rows:
        conn.execute(text(
            "INSERT INTO family_wear (family_id, week_start, mean_slope, tau2, pooled_sd, "
            "n_series, mean_slope_se, pooled_df, spread_mean_slope, spread_tau2, "
            "spread_pooled_sd, spread_mean_slope_se, spread_pooled_df, computed_at) VALUES "
            "(:f, :w, :mu, :tau2, :sd, :n, :mu_se, :df, :smu, :stau2, :ssd, :smu_se, :sdf, "
            ":at)"), rows)


#: From this many readings a full refresh splits the fleet by engine family over the
#: machine's cores (see :func:`_assess_split`).
PARALLEL_MIN_READINGS = 300_000
#: A unit's own work (its reasons, sentences, snapshot row, series) as many readings'
#: (measured at 20,000 units: about 0.1 ms a unit beside 1.6 us a reading).
UNIT_WORK = 60
#: Heap mapped ahead of an assessment, per reading (it grows by about 275 B a reading at
#: 20,000 units; see fleetdb.malloc.prefault).
HEAP_PER_READING = 300


def _cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def _family_work(raw: frames.RawFleet, per_unit: float = UNIT_WORK) -> dict[int, float]:
    """Per engine family with units, its work in readings: its tests times its cylinders
    (about its readings), plus ``per_unit`` for each of its units."""
    tests = pd.Series(raw.test_families()).value_counts()
    units = raw.units["family_id"].value_counts()
    cylinders = raw.families["cylinders"].astype(float)
    return {int(f): float(tests.get(f, 0)) * float(cylinders.get(f, 1.0)) + per_unit * float(n)
            for f, n in units.items()}


@dataclass
class _Part:
    """What assessing some families gives a full refresh: snapshot rows to write, each
    unit's level, and the families' pooled statistics."""

    rows: list[tuple]
    levels: pd.Series
    family_params: pd.DataFrame
    processes: int = 1


def _assess_part(raw: list[frames.RawFleet], families: list[int] | None,
                 moment: pd.Timestamp, stamps: tuple, *, last: bool = True,
                 readings: float | None = None) -> _Part:
    """Shape the frames of some families (None: all) from the rows in ``raw`` (taken out
    of it on the ``last`` part), assess them and build their snapshot rows (``stamps``:
    week, day, time). ``readings``: about how many readings those families have (None:
    counted here).

    Only what the snapshot needs outlives the assessment: the frames, checks and wear
    points are freed before the rows are built.
    """
    if readings is None:
        readings = sum(w for f, w in _family_work(raw[0], per_unit=0).items()
                       if families is None or f in families)
    # The frames and the assessment's working arrays take about this much heap (a later
    # part of the same worker finds most of it mapped already).
    malloc.prefault(int(HEAP_PER_READING * readings))
    result = assess_mod.assess(frames.shape(raw.pop() if last else raw[0], families), moment)
    units, reasons, params = result.units, result.reasons, result.family_params
    del result
    return _Part(rows=_snapshot_rows(units, reasons, *stamps), levels=units["level"],
                 family_params=params)


def _worker(send: Any, holder: list[frames.RawFleet], order: list[int], taken: Any,
            readings: dict[int, float], moment: pd.Timestamp, stamps: tuple) -> None:
    """A forked worker: take the next engine family of ``order`` not yet taken by any
    worker (``taken``: a shared counter), assess it from the inherited rows, send its
    result, and so on until none is left; then send ``("done", None)``.

    Taking families one at a time as workers come free, heaviest first, evens out the
    workers' finishing times whatever the estimate of each family's work. A thread sends,
    in order, while the next family is assessed: a pipe holds little, so a send waits
    until the parent reads, and the parent may be writing another part then.
    """
    outbox: queue.SimpleQueue = queue.SimpleQueue()

    def sender() -> None:
        while (message := outbox.get()) is not None:
            send.send(message)

    def take() -> int | None:
        with taken.get_lock():
            at = taken.value
            taken.value = at + 1
        return order[at] if at < len(order) else None

    thread = threading.Thread(target=sender, daemon=True)
    thread.start()
    family = None
    try:
        while (family := take()) is not None:
            outbox.put(("ok", _assess_part(holder, [family], moment, stamps, last=False,
                                           readings=readings[family])))
        outbox.put(("done", None))
    except BaseException:  # the parent re-raises it with the worker's traceback
        outbox.put(("error", f"engine family {family}:\n{traceback.format_exc()}"))
    finally:
        holder.clear()
        outbox.put(None)
        thread.join()
        send.close()


def _assess_split(holder: list[frames.RawFleet], moment: pd.Timestamp, stamps: tuple,
                  workers: int | None, write: Callable[[list[tuple]], None]) -> _Part:
    """Assess the fleet read into ``holder`` (taken out of it, so its memory can be freed),
    handing the snapshot rows to ``write`` as they come.

    A large fleet is split by engine family over the machine's cores: every statistic
    the analysis pools is pooled within a family, so the parts give exactly the
    whole-fleet result. The read happens once, before the split; each worker is a fork
    that inherits the rows read without copying them and assesses one family at a time,
    the heaviest first, taking the next one left when it is done (:func:`_worker`), and
    sends back each family's snapshot rows; the parent writes each part as it arrives,
    while the workers go on. A fork is only taken from a single-threaded process (the
    command line), never inside the dashboard's server; there, and on a small fleet, the
    assessment runs in-process.
    """
    # No local name holds the frames while forking: a fork copies this stack, and a
    # worker could then never free the whole fleet's frames once it has its own part.
    if workers is None:
        big = holder[0].reading_count >= PARALLEL_MIN_READINGS
        workers = _cores() if big else 1
    # Linux only (numpy's and Arrow's thread pools are made anew in a forked child there;
    # on macOS a fork after the system's frameworks are loaded is not safe).
    can_fork = sys.platform == "linux" and threading.active_count() == 1
    weight = _family_work(holder[0]) if workers > 1 and can_fork else {}
    if len(weight) < 2:
        part = _assess_part(holder, None, moment, stamps)
        write(part.rows)
        part.rows = []
        return part
    ctx = mp.get_context("fork")
    order = sorted(weight, key=lambda f: (-weight[f], f))  # heaviest first
    units = holder[0].units["family_id"].value_counts()  # the weight less its units' part
    readings = {f: w - UNIT_WORK * float(units[f]) for f, w in weight.items()}
    taken = ctx.Value("i", 0)
    running: dict[Any, Any] = {}
    parts: list[_Part] = []
    gc.freeze()  # the workers' collections then never write into the pages they share
    try:
        for _ in range(min(workers, len(order))):
            receive, send = ctx.Pipe(duplex=False)
            proc = ctx.Process(target=_worker, daemon=True,
                               args=(send, holder, order, taken, readings, moment, stamps))
            proc.start()
            send.close()
            running[receive] = proc
        holder.clear()  # the workers have their own; the parent only writes from here
        left = set(running)
        while left:
            for receive in mp_connection.wait(list(left)):
                proc = running[receive]
                try:
                    status, payload = receive.recv()
                except EOFError:  # it died without a word (killed, out of memory)
                    proc.join()
                    status, payload = "error", f"the worker ended with exit code {proc.exitcode}"
                if status == "done":
                    left.discard(receive)
                    proc.join()
                    continue
                if status != "ok":
                    raise RuntimeError(f"assessing engine families failed: {payload}")
                write(payload.rows)
                payload.rows = []
                parts.append(payload)
    finally:  # whatever failed, no worker is left behind, waiting to send
        gc.unfreeze()
        for receive, proc in running.items():
            if proc.is_alive():
                proc.terminate()
            proc.join()
            receive.close()
    return _Part(rows=[], levels=pd.concat([p.levels for p in parts]).sort_index(),
                 family_params=pd.concat([p.family_params for p in parts]).sort_index(),
                 processes=len(running))


class _SnapshotWriter:
    """One transaction for a full refresh's snapshot, begun at its first write (after the
    workers are forked: no connection is open across a fork)."""

    def __init__(self, engine: Engine) -> None:
        self.engine, self.conn, self.transaction = engine, None, None

    def _connection(self) -> Connection:
        if self.conn is None:
            self.conn = self.engine.connect()
            self.transaction = self.conn.begin()
        return self.conn

    def write(self, rows: list[tuple]) -> None:
        _write_snapshot(self._connection(), rows)

    def commit(self, family_params: pd.DataFrame, week: dt.date, at: Any) -> None:
        _store_family_params(self._connection(), family_params, week, at)
        self.transaction.commit()
        self.conn.close()

    def rollback(self) -> None:
        if self.conn is not None:
            self.transaction.rollback()
            self.conn.close()


def refresh_fleet(engine: Engine, as_of: dt.date | None = None, *,
                  workers: int | None = None) -> dict[str, Any]:
    """Recompute every unit as of a day and store that week's snapshot.

    :param engine: the store.
    :param as_of: the day (default today); tests, events and voids after it are ignored.
    :param workers: processes to assess in (None: one per core on a large fleet, else
        one; see :func:`_assess_split`). The result is the same for any number.
    :returns: counts per level, the week and the number of processes that assessed.
    """
    day, moment = _as_of(as_of)
    week = week_start(day)
    with engine.connect() as conn:
        at = stamp(conn)
    writer = _SnapshotWriter(engine)
    with malloc.roomy():  # many large temporary arrays: see fleetdb.malloc
        try:
            part = _assess_split([frames.read(engine, as_of=moment, details=False)], moment,
                                 (week, day, at), workers, writer.write)
            writer.commit(part.family_params, week, at)
        except BaseException:
            writer.rollback()
            raise
    counts = part.levels.value_counts()
    return {"week_start": week.isoformat(), "units": len(part.levels),
            "counts": {lvl: int(counts.get(lvl, 0)) for lvl in LEVELS},
            "processes": part.processes}


def assess_units(engine: Engine, unit_ids: list[int], as_of: dt.date | None = None, *,
                 all_findings: bool = False) -> Assessment:
    """Assess some units, pooling with their families' stored statistics when there are any.

    :param all_findings: sentences for every test, not only the latest and judged ones.
    """
    day, moment = _as_of(as_of)
    with engine.connect() as conn:
        params = _stored_family_params(conn, week_start(day))
    return assess_mod.assess(frames.load(engine, unit_ids, as_of=moment), moment,
                             family_params=params, all_findings=all_findings)


#: Above this many units written at once, a partial refresh gives way to a whole-fleet one
#: (the Fleet wear page's update, ``fleetwear.bring_up_to_date``, follows the same rule).
MANY_UNITS = 2000


def refresh_units(engine: Engine, unit_ids: list[int], as_of: dt.date | None = None) -> None:
    """Recompute a few units (after a logged test or an import) and update this week's rows.

    They pool with the families' latest stored statistics. A week with no snapshot yet
    keeps just these rows; the board completes the week with a full refresh the first
    time it is read, so it is never partial. Many units at once: a full refresh.
    """
    day, _ = _as_of(as_of)
    week = week_start(day)
    if len(unit_ids) > MANY_UNITS:
        refresh_fleet(engine, day)
        return
    result = assess_units(engine, unit_ids, day)
    with engine.begin() as conn:
        _store(conn, result.units, result.reasons, week, day)


_LEVEL_ORDER = "CASE s.level " + " ".join(
    f"WHEN '{lvl}' THEN {i}" for i, lvl in enumerate(LEVELS)) + " END"


def _ensure_week(engine: Engine, day: dt.date) -> dt.date:
    week = week_start(day)
    with engine.connect() as conn:
        have = conn.execute(text("SELECT COUNT(*) FROM health_snapshot WHERE week_start = :w"),
                            {"w": week}).scalar_one()
        units = conn.execute(text("SELECT COUNT(*) FROM unit")).scalar_one()
    if have < units:
        refresh_fleet(engine, day)
    return week


def board(engine: Engine, as_of: dt.date | None = None, *, site: str | None = None,
          family: str | None = None, level: str | None = None, search: str | None = None,
          offset: int = 0, limit: int | None = None) -> dict[str, Any]:
    """The weekly health board from the stored snapshot, worst first, filtered and paged.

    :param as_of: the day whose week is shown (default today).
    :param site: only this site.
    :param family: only this engine family.
    :param level: only this level.
    :param search: fleet numbers containing this text (case-insensitive).
    :param offset: rows to skip (paging).
    :param limit: rows to return (None: all).
    """
    day, _ = _as_of(as_of)
    week = _ensure_week(engine, day)
    previous = week - dt.timedelta(days=7)
    where = ["s.week_start = :w"]
    params: dict[str, Any] = {"w": week, "p": previous}
    if site:
        where.append("st.name = :site")
        params["site"] = site
    if family:
        where.append("f.name = :family")
        params["family"] = family
    if search:
        where.append("LOWER(u.fleet_no) LIKE :search")
        params["search"] = f"%{search.strip().lower()}%"
    base = ("FROM health_snapshot s JOIN unit u ON u.id = s.unit_id "
            "JOIN site st ON st.id = u.site_id JOIN engine_family f ON f.id = u.family_id "
            "LEFT JOIN health_snapshot p ON p.unit_id = s.unit_id AND p.week_start = :p ")
    level_where = where + (["s.level = :level"] if level else [])
    if level:
        params["level"] = level
    page = f" LIMIT {int(limit)} OFFSET {int(offset)}" if limit is not None else ""
    with engine.connect() as conn:
        # Sort and page on the keys alone, then fetch the wide columns of one page.
        # By unit: a refresh in between replaces snapshot rows (new ids), never units.
        ids = [r[0] for r in conn.execute(text(
            "SELECT s.unit_id " + base + "WHERE " + " AND ".join(level_where)
            + f" ORDER BY {_LEVEL_ORDER}, (s.projected_date_early IS NULL), "
            "s.projected_date_early, u.fleet_no" + page), params)]
        wide = conn.execute(text(
            "SELECT s.unit_id, s.unit_id, u.fleet_no, st.name, f.name, s.level, s.main_code, "
            "s.main_text, s.reasons_json, s.projected_date, s.projected_date_early, "
            "s.projected_hours, s.projected_hours_early, s.last_tested_at, s.last_hours, p.level, "
            "s.limits_version "
            + base + "WHERE s.week_start = :w AND s.unit_id IN ("
            + (",".join(str(int(i)) for i in ids) or "NULL") + ")"),
            {"p": previous, "w": week}).all()
        by_id = {r[0]: r[1:] for r in wide}
        rows = [by_id[i] for i in ids if i in by_id]
        total = conn.execute(text("SELECT COUNT(*) " + base + "WHERE "
                                  + " AND ".join(level_where)), params).scalar_one()
        counts = dict(conn.execute(text("SELECT s.level, COUNT(*) " + base + "WHERE "
                                        + " AND ".join(where) + " GROUP BY s.level"),
                                   params).all())
        by_site = conn.execute(text(
            "SELECT st.name, s.level, COUNT(*) FROM health_snapshot s JOIN unit u ON "
            "u.id = s.unit_id JOIN site st ON st.id = u.site_id WHERE s.week_start = :w "
            "GROUP BY st.name, s.level ORDER BY st.name"), {"w": week}).all()
        had_previous = conn.execute(text(
            "SELECT COUNT(*) FROM health_snapshot WHERE week_start = :p"),
            {"p": previous}).scalar_one() > 0
    from fleetdb.plan import bookings, iso_week

    booked = bookings(engine, day)
    counts_by_site: dict[str, dict[str, int]] = {}
    for name, lvl, n in by_site:
        counts_by_site.setdefault(name, {x: 0 for x in LEVELS})[lvl] = int(n)
    return {
        "week_start": week.isoformat(), "as_of": day.isoformat(),
        "previous_week_start": previous.isoformat() if had_previous else None,
        "total": int(total), "counts": {lvl: int(counts.get(lvl, 0)) for lvl in LEVELS},
        "counts_by_site": counts_by_site,
        "rows": [{**_board_row(r, day, had_previous),
                  "booked_week": iso_week(booked[r[0]]) if r[0] in booked else None}
                 for r in rows],
    }


def _change(level: str, previous: str | None, had_previous: bool) -> str | None:
    if not had_previous:
        return None
    if previous is None:
        return "new"
    diff = LEVEL_RANK[level] - LEVEL_RANK[previous]
    return "same" if diff == 0 else ("worse" if diff < 0 else "better")


def _iso(value: Any) -> str | None:
    if value is None:
        return None
    return (value if isinstance(value, str) else value.isoformat())[:16].replace("T", " ")


def _board_row(r: Any, day: dt.date, had_previous: bool) -> dict[str, Any]:
    reasons = json.loads(r[7]) if r[7] else []
    hours_to_limit = None
    if r[11] is not None and r[13] is not None:
        hours_to_limit = round(float(r[11]) - float(r[13]), 0)
    return {
        "unit_id": int(r[0]), "fleet_no": r[1], "site": r[2], "engine_family": r[3],
        "level": r[4], "main_code": r[5], "main_text": r[6],
        "reasons": list(dict.fromkeys(x["code"] for x in reasons)),
        "projected_date": _iso(r[8]), "projected_date_early": _iso(r[9]),
        "projected_hours": _float(r[10]), "projected_hours_early": _float(r[11]),
        "hours_to_limit": hours_to_limit, "last_tested_at": _iso(r[12]),
        "last_hours": _float(r[13]), "previous_level": r[14],
        "change": _change(r[4], r[14], had_previous), "limits_version": r[15],
    }


def _clean(value: Any) -> Any:
    """JSON-ready: numpy scalars to Python, NaN/NaT to None, timestamps to text."""
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if isinstance(value, (pd.Timestamp, dt.datetime)):
        return None if pd.isna(value) else _iso(value)
    if isinstance(value, dt.date):
        return value.isoformat()
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return None if not np.isfinite(value) else float(value)
    if value is pd.NA or value is pd.NaT:
        return None
    return value


def unit_report(engine: Engine, fleet_no: str, as_of: dt.date | None = None) -> dict[str, Any]:
    """Everything about one unit's health: level, reasons, tests, readings, fits (kPa).

    The shape is documented in DEVELOPERS.md ("The health API") and in the README.
    """
    from fleetdb import limits  # its models are not needed to refresh

    uid = unit_id_for(engine, fleet_no)
    day, moment = _as_of(as_of)
    with engine.connect() as conn:
        params = _stored_family_params(conn, week_start(day))
    fr = frames.load(engine, [uid], as_of=moment)  # read once: a write may come in between
    result = assess_mod.assess(fr, moment, family_params=params, all_findings=True)
    u = result.units.loc[uid]
    fam = fr.families.loc[u["family_id"]]
    unit_row = fr.units.loc[uid]
    findings = result.checks.findings
    tests = []
    for test_id, t in fr.tests.iterrows():
        summ = result.checks.tests.loc[test_id]
        f = findings[findings["test_id"] == test_id]
        tests.append(_clean({
            "test_id": test_id, "tested_at": t["tested_at"], "hours": t["hours"],
            "trustworthy": bool(summ["trustworthy"]), "voided": bool(t["voided"]),
            "void_reason": t["void_reason"] if isinstance(t["void_reason"], str) else None,
            "battery_v": t["battery_v"], "crank_rpm": t["crank_rpm"],
            "engine_temp_c": t["engine_temp_c"], "baro_kpa": t["baro_kpa"],
            "baro_measured": bool(t["baro_measured"]),
            "throttle_open": None if pd.isna(t["throttle_open"]) else bool(t["throttle_open"]),
            "technician": t["technician"] if isinstance(t["technician"], str) else None,
            "source": t["source"], "lowest_kpa": summ["dry_min_kpa"],
            "highest_kpa": summ["dry_max_kpa"], "ratio": summ["dry_ratio"],
            "findings": [{"code": c, "severity": s, "text": m}
                         for c, s, m in zip(f["code"], f["severity"], f["message"],
                                            strict=True)]}))
    pts = result.points
    readings = fr.readings.merge(fr.tests[["tested_at", "hours", "baro_kpa"]],
                                 left_on="test_id", right_index=True)
    dry_flags = pts[pts["cylinder"] != assess_mod.SPREAD_CYLINDER].set_index(
        ["test_id", "cylinder"])[["in_fit", "step"]]
    out_readings = []
    for r in readings.itertuples(index=False):
        sl = r.value * (101.325 / r.baro_kpa) if r.kind in ("compression", "wet") else (
            r.value + (101.325 - r.baro_kpa) if r.kind.startswith("vacuum") else r.value)
        key = (r.test_id, int(r.cylinder)) if not pd.isna(r.cylinder) else None
        flags = dry_flags.loc[key] if (r.kind == "compression" and key in dry_flags.index) \
            else None
        out_readings.append(_clean({
            "test_id": r.test_id, "tested_at": r.tested_at, "hours": r.hours, "kind": r.kind,
            "cylinder": None if pd.isna(r.cylinder) else int(r.cylinder), "value_kpa": r.value,
            "value_sl_kpa": sl, "in_fit": bool(flags["in_fit"]) if flags is not None else False,
            "step": bool(flags["step"]) if flags is not None else False}))
    fits = []
    for key, f in result.fits.iterrows():
        seg_pts = pts[(pts["series"] == key) & pts["in_fit"]]
        intercept_used = (f["ts_intercept"] if f["slope_source"] == "theil_sen_outlier"
                          else f["ols_intercept"])
        if f["slope_source"] in ("pooled_short", "ols_faster_than_family"):
            intercept_used = (seg_pts["value_sl"].mean() - f["slope"] * seg_pts["hours"].mean()
                              if f["slope_source"] == "pooled_short" else f["ols_intercept"])
        start = f["last_step_x"] if np.isfinite(f["last_step_x"]) else seg_pts["hours"].min()
        fits.append(_clean({
            "cylinder": "spread" if f["cylinder"] == assess_mod.SPREAD_CYLINDER
            else int(f["cylinder"]), "segment": int(f["event_seg"]), "current": bool(f["current"]),
            "start_hours": start, "end_hours": f["last_x"], "n": int(f["n"]),
            "limit": f["limit"], "slope_ols": f["ols_slope"], "intercept_ols": f["ols_intercept"],
            "slope_theil_sen": f["ts_slope"], "slope_pooled": f["pooled_slope"],
            "slope_used": f["slope"], "slope_se": f["slope_se"], "intercept_used": intercept_used,
            "method": f["slope_source"], "faster_than_family": bool(f["faster_than_family"]),
            "family_slope": f["family_mu"], "resid_sd": f["resid_sd"],
            "projected_hours": f["cross_point"], "projected_hours_early": f["cross_planning"]}))
    spread = result.checks.tests.join(fr.tests[["tested_at", "hours", "voided"]])
    return _clean({
        "unit": {"unit_id": uid, "fleet_no": fleet_no, "site": unit_row["site"],
                 "site_elevation_m": unit_row["elevation_m"], "engine_family": unit_row["family"],
                 "fuel": fam["fuel"], "cylinders": int(fam["cylinders"]), "banks": fam["banks"],
                 "min_compression_kpa": fam["min_compression_kpa"], "min_ratio": fam["min_ratio"],
                 "hours_per_week": u["hours_per_week"], "last_tested_at": u["last_tested_at"],
                 "last_hours": u["last_hours"]},
        "as_of": result.as_of.date(), "level": u["level"], "main_code": u["main_code"]
        if isinstance(u["main_code"], str) else None,
        "projected_hours": u["projected_hours"],
        "projected_hours_early": u["projected_hours_early"],
        "projected_date": u["projected_date"], "projected_date_early": u["projected_date_early"],
        "reasons": result.reasons[result.reasons["unit_id"] == uid][
            ["code", "level", "text", "numbers", "test_id"]].to_dict("records"),
        "limits": limits.describe(engine, int(u["family_id"]), fam.get("limits_version")),
        "tests": tests, "readings": out_readings, "fits": fits,
        "spread": [{"test_id": i, "tested_at": s["tested_at"], "hours": s["hours"],
                    "ratio": s["dry_ratio"], "voided": bool(s["voided"]),
                    "trustworthy": bool(s["trustworthy"])}
                   for i, s in spread.iterrows() if not pd.isna(s["dry_ratio"])],
        "events": [{"date": e["date"], "hours": e["hours"], "kind": e["kind"],
                    "cylinders": list(e["cylinders"]),
                    "note": e["note"] if isinstance(e["note"], str) else None}
                   for _, e in fr.events.iterrows()],
    })


def test_verdict(engine: Engine, test_id: int) -> dict[str, Any]:
    """The verdict on one test just logged: its checks and the unit's level before and after.

    Refreshes the unit's health (this week's snapshot) on the way.
    """
    from fleetdb import limits  # its models are not needed to refresh

    with engine.connect() as conn:
        row = conn.execute(text("SELECT t.unit_id, u.fleet_no, t.tested_at FROM test t JOIN "
                                "unit u ON u.id = t.unit_id WHERE t.id = :t"),
                           {"t": test_id}).first()
        if row is None:
            from fleetdb.errors import FleetDBError
            raise FleetDBError(f"no test with id {test_id}")
        week = week_start(dt.date.today())
        previous = conn.execute(text(
            "SELECT level FROM health_snapshot WHERE unit_id = :u AND week_start <= :w "
            "ORDER BY week_start DESC LIMIT 1"), {"u": row[0], "w": week}).scalar()
    refresh_units(engine, [int(row[0])])
    result = assess_units(engine, [int(row[0])], all_findings=True)
    summ = result.checks.tests.loc[test_id]
    f = result.checks.findings
    f = f[f["test_id"] == test_id]
    return _clean({
        "test_id": test_id, "fleet_no": row[1], "trustworthy": bool(summ["trustworthy"]),
        "findings": [{"code": c, "severity": s, "text": m}
                     for c, s, m in zip(f["code"], f["severity"], f["message"], strict=True)],
        "lowest_kpa": summ["dry_min_kpa"], "highest_kpa": summ["dry_max_kpa"],
        "ratio": summ["dry_ratio"], "level": result.units.loc[row[0], "level"],
        "previous_level": previous,
        "limits": limits.describe(engine, int(result.units.loc[row[0], "family_id"]),
                                  result.units.loc[row[0], "limits_version"]),
        "reasons": result.reasons[result.reasons["unit_id"] == row[0]][
            ["code", "level", "text"]].to_dict("records"),
    })
