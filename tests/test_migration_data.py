"""Migrations keep the data: a store built at every earlier revision, with rows in every
table, upgrades to head with nothing lost; the last revision downgrades and upgrades again
without loss. On SQLite and PostgreSQL.

The revisions are read from migrations/versions, so a new revision is covered by itself.
Each table gets its rows from :data:`SEEDS` at the revision that creates it (written with
only the columns that revision has); a revision that adds a table without rows here fails
:func:`test_every_table_has_seed_rows`, which says what to add. A table a migration fills
itself (``family_limits``, from each family's limits) may have no seed rows of its own.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Callable
from typing import Any

import pytest
from alembic.script import ScriptDirectory
from sqlalchemy import MetaData, inspect, select
from sqlalchemy.engine import Engine

from fleetdb import db as db_mod
from fleetdb import migrate

T0 = dt.datetime(2023, 1, 9, 8, 0)


def _revisions() -> list[str]:
    """Every revision, oldest first (a single line of history)."""
    script = ScriptDirectory.from_config(migrate.alembic_config("sqlite://"))
    return [r.revision for r in reversed(list(script.walk_revisions()))]


REVISIONS = _revisions()

# -- seed rows: a small demo-like fleet, then rows for each later table ---------------------

_FAMILIES = [  # name, fuel, cylinders, banks, ratio, minimum kPa, typed, unit, rpm, volts
    ("SEED-L4", "lpg", 4, "1-2-3-4", 9.5, 827.37, "120", "psi", None, 12),
    ("SEED-V6", "gasoline", 6, "1-3-5/2-4-6", 9.2, 861.84, "125", "psi", 200.0, 12),
    ("SEED-D6", "diesel", 6, "1-2-3-4-5-6", 17.5, 2069.0, "2069", "kPa", 140.0, 24),
]
_UNITS = [(1, "SD-101", 1, 1), (2, "SD-102", 1, 1), (3, "SD-201", 2, 2), (4, "SD-202", 3, 2),
          (5, "SD-301", 1, 3), (6, "SD-302", 2, 3)]  # id, fleet_no, site, family


def _tests() -> list[dict[str, Any]]:
    rows = []
    for uid, *_ in _UNITS:
        for k in range(3):
            rows.append({
                "id": uid * 10 + k, "unit_id": uid, "tested_at": T0 + dt.timedelta(days=120 * k),
                "hours": 1000.0 + 450.5 * k + uid, "battery_v": 10.2 - 0.1 * k,
                "crank_rpm": 210.0 + k, "engine_temp_c": 80.0 if k else None,
                "baro_kpa": 101.2 if uid % 2 else None, "throttle_open": bool(k % 2),
                "technician": "QA", "note": "seed, with a comma" if k == 1 else None,
                "source": "csv" if k < 2 else "cli", "batch_id": 1 if k < 2 else None,
                "created_at": T0, "created_by": "seed"})
    return rows


def _readings() -> list[dict[str, Any]]:
    rows, rid = [], 1
    for t in _tests():
        fam = _FAMILIES[_UNITS[t["unit_id"] - 1][3] - 1]
        for cyl in range(1, fam[2] + 1):
            value = fam[5] * 1.25 - 3.5 * cyl - (t["id"] % 10) * 7.25
            rows.append({"id": rid, "test_id": t["id"], "kind": "compression", "cylinder": cyl,
                         "value_si": value, "typed_value": f"{value:.2f}", "typed_unit": "kPa"})
            rid += 1
        if fam[1] != "diesel":
            rows.append({"id": rid, "test_id": t["id"], "kind": "vacuum_cranking",
                         "cylinder": None, "value_si": 3.386388640341, "typed_value": "1",
                         "typed_unit": "inHg"})
            rid += 1
    return rows


SEEDS: dict[str, Callable[[], list[dict[str, Any]]]] = {
    "site": lambda: [
        {"id": i, "name": n, "elevation_m": e, "created_at": T0}
        for i, n, e in ((1, "Seed Harbour", 5.0), (2, "Seed Ridge", 1000.0),
                        (3, "Seed Plateau", 1700.0))],
    "engine_family": lambda: [
        {"id": i, "name": f[0], "fuel": f[1], "cylinders": f[2], "banks": f[3],
         "compression_ratio": f[4], "min_compression_kpa": f[5], "min_compression_typed": f[6],
         "min_compression_unit": f[7], "expected_kpa": f[5] * 1.3 if i == 1 else None,
         "spread_rule": "diff" if i == 3 else "ratio", "min_ratio": 0.75,
         "max_diff_kpa": 300.0 if i == 3 else None, "min_crank_rpm": f[8],
         "warm_test": i != 2, "system_volts": f[9], "test_interval_days": 365 - i,
         "created_at": T0}
        for i, f in enumerate(_FAMILIES, start=1)],
    "unit": lambda: [
        {"id": i, "fleet_no": fn, "site_id": s, "family_id": f,
         "in_service": dt.date(2020, 1, i), "hours_per_week": 20.0 + i if i != 4 else None,
         "created_at": T0, "created_by": "seed"} for i, fn, s, f in _UNITS],
    "import_batch": lambda: [
        {"id": i, "file_name": f"seed-{i}.csv", "content_sha256": f"{i:064x}",
         "file_kind": k, "rows_read": 10 * i, "rows_written": 9 * i, "rows_present": i,
         "outcome": "imported", "created_at": T0, "created_by": "seed"}
        for i, k in ((1, "tests"), (2, "events"))],
    "test": _tests,
    "reading": _readings,
    "service_event": lambda: [
        {"id": 1, "unit_id": 1, "date": dt.date(2023, 6, 1), "hours": 1300.0, "kind": "valves",
         "cylinders": "2;3", "note": "seed", "batch_id": 2, "created_at": T0,
         "created_by": "seed"},
        {"id": 2, "unit_id": 3, "date": dt.date(2023, 7, 1), "hours": None,
         "kind": "overhaul", "cylinders": "", "note": None, "batch_id": None,
         "created_at": T0, "created_by": "seed"}],
    "test_void": lambda: [
        {"id": 1, "test_id": 21, "reason": "gauge hose leaked", "voided_by": "seed",
         "voided_at": T0 + dt.timedelta(days=3)}],
    "health_snapshot": lambda: [
        {"id": uid, "unit_id": uid, "week_start": dt.date(2023, 9, 4),
         "as_of": dt.date(2023, 9, 6), "level": ("act", "plan", "retest", "watch", "sound",
                                                 "sound")[uid - 1],
         "main_code": "below_minimum" if uid == 1 else None, "main_text": "seed text",
         "reasons_json": json.dumps([{"code": "below_minimum", "level": "act"}]),
         "last_test_id": uid * 10 + 2, "last_tested_at": T0 + dt.timedelta(days=240),
         "last_hours": 1901.0 + uid, "projected_hours": 2500.0 if uid == 2 else None,
         "projected_hours_early": 2400.0 if uid == 2 else None,
         "projected_date": dt.date(2024, 2, 1) if uid == 2 else None,
         "projected_date_early": dt.date(2024, 1, 1) if uid == 2 else None,
         "wear_kpa_per_1000h": -12.5, "computed_at": T0} for uid in range(1, 7)],
    "family_wear": lambda: [
        {"id": f, "family_id": f, "week_start": dt.date(2023, 9, 4), "mean_slope": -0.012,
         "mean_slope_se": 0.003, "tau2": 1e-5, "pooled_sd": 12.5, "pooled_df": 8.0,
         "spread_mean_slope": None, "spread_mean_slope_se": None, "spread_tau2": None,
         "spread_pooled_sd": None, "spread_pooled_df": None, "n_series": 4 * f,
         "computed_at": T0} for f in (1, 2, 3)],
    "overhaul_plan": lambda: [
        {"id": 1, "created_at": T0, "created_by": "seed", "as_of": dt.date(2023, 9, 6),
         "week_start": dt.date(2023, 9, 4), "weeks": 13, "settings_json": '{"capacity": 2}',
         "l_max": 0, "late_count": 0, "job_count": 2}],
    "overhaul_booking": lambda: [
        {"id": i, "plan_id": 1, "unit_id": u, "site_id": s, "week_start": dt.date(2023, 9, 11),
         "due_week_start": dt.date(2023, 10, 2), "lateness_weeks": 0, "priority": i - 1,
         "status": "new"} for i, u, s in ((1, 1, 1), (2, 3, 2))],
    "firing_order": lambda: [
        {"id": 1, "family_id": 1, "firing_order": "1-3-4-2", "created_at": T0,
         "created_by": "seed"}],
    "capture": lambda: [
        {"id": 1, "test_id": 12, "file_name": "seed-capture.csv", "content_sha256": "c" * 64,
         "file_bytes": 123456, "samples": 20000, "sample_rate_hz": 5000.0, "start_s": 0.0,
         "duration_s": 4.0, "time_column": "time", "time_unit": "s",
         "channel_map_json": '{"p1": "pressure"}', "derived_json": '{"cylinders": 4}',
         "data_format": "npz-zlib", "data_bytes": 4096, "created_at": T0,
         "created_by": "seed"}],
    "capture_block": lambda: [
        {"id": i, "capture_id": 1, "seq": i - 1, "data": bytes(range(256)) * i}
        for i in (1, 2)],
    # Filled by its own migration (version 1 of every family's limits).
    "family_limits": lambda: [],
    # Users, sessions and the audit trail (its migration may write events of its own: ids
    # from 1001 keep clear of them).
    "app_user": lambda: [
        {"id": i, "name": n, "role": r, "password_hash": f"scrypt$n=16384,r=8,p=1$seed{i}$key",
         "enabled": i != 3, "created_at": T0, "changed_at": T0 + dt.timedelta(days=i)}
        for i, n, r in ((1, "seed-admin", "admin"), (2, "seed-tech", "technician"),
                        (3, "seed-gone", "planner"))],
    "user_session": lambda: [
        {"id": 1, "token_sha256": "a" * 64, "user_id": 2, "remote": "127.0.0.1",
         "created_at": T0, "last_seen_at": T0 + dt.timedelta(minutes=5),
         "ended_at": T0 + dt.timedelta(minutes=30)}],
    "audit_event": lambda: [
        {"id": 1001, "at": T0, "user_name": "seed-tech", "origin": "dashboard:127.0.0.1",
         "action": "test.log", "summary": "logged test 10 for SD-101",
         "detail_json": '{"test_id": 10}', "family_id": None},
        {"id": 1002, "at": T0 + dt.timedelta(hours=1), "user_name": "seed-admin",
         "origin": "cli:seed@host", "action": "limits.change",
         "summary": "minimum of SEED-L4 set to 125 psi", "detail_json": "{}", "family_id": 1}],
    "audit_unit": lambda: [{"id": 1001, "event_id": 1001, "unit_id": 1}],
}


# -- building and reading a store ----------------------------------------------------------

def _tables(engine: Engine) -> MetaData:
    meta = MetaData()
    meta.reflect(engine)
    meta.remove(meta.tables["alembic_version"])
    return meta


def _seed_new_tables(engine: Engine, seeded: set[str]) -> None:
    """Write the seed rows of every table not seeded yet, with the columns it has now."""
    meta = _tables(engine)
    with engine.begin() as conn:
        for table in meta.sorted_tables:
            if table.name in seeded:
                continue
            if table.name not in SEEDS:
                pytest.fail(f"table {table.name} has no seed rows: add them to SEEDS in "
                            f"{__name__}")
            rows = SEEDS[table.name]()
            for col in table.columns:
                required = not col.nullable and col.server_default is None
                if required and rows and col.name not in rows[0]:
                    pytest.fail(f"the seed rows of {table.name} lack column {col.name}")
            if rows:
                conn.execute(table.insert(), [{k: v for k, v in r.items() if k in table.c}
                                              for r in rows])
            seeded.add(table.name)
        if conn.dialect.name == "postgresql":  # explicit ids: move the sequences past them
            for table in meta.sorted_tables:
                if "id" in table.c and table.name in SEEDS and SEEDS[table.name]():
                    conn.exec_driver_sql(
                        f"SELECT setval(pg_get_serial_sequence('{table.name}', 'id'), "
                        f"(SELECT MAX(id) FROM {table.name}))")


def build_at(url: str, revision: str) -> Engine:
    """A store upgraded one revision at a time to ``revision``, seeded on the way."""
    engine = db_mod.make_engine(url)
    seeded: set[str] = set()
    for rev in REVISIONS[:REVISIONS.index(revision) + 1]:
        migrate.upgrade(url, rev)
        _seed_new_tables(engine, seeded)
    return engine


Snapshot = dict[str, dict[tuple, dict[str, Any]]]


def snapshot(engine: Engine) -> Snapshot:
    """Every row of every table, by primary key, with every column."""
    out: Snapshot = {}
    meta = _tables(engine)
    with engine.connect() as conn:
        for table in meta.sorted_tables:
            pk = [c.name for c in table.primary_key.columns]
            out[table.name] = {tuple(r[c] for c in pk): dict(r) for r in
                               conn.execute(select(table)).mappings()}
    return out


def assert_kept(before: Snapshot, after: Snapshot) -> None:
    """Every table, row and value of ``before`` is in ``after`` (new columns may be added)."""
    for name, rows in before.items():
        assert name in after, f"table {name} was dropped"
        assert len(after[name]) == len(rows), f"{name}: {len(rows)} rows became " \
                                              f"{len(after[name])}"
        for key, row in rows.items():
            kept = after[name].get(key)
            assert kept is not None, f"{name} row {key} was lost"
            assert {c: kept[c] for c in row} == row, f"{name} row {key} changed"


def _columns(engine: Engine) -> dict[str, set[str]]:
    insp = inspect(engine)
    return {t: {c["name"] for c in insp.get_columns(t)} for t in insp.get_table_names()
            if t != "alembic_version"}


# -- the tests -------------------------------------------------------------------------------

def test_every_table_has_seed_rows(db_url: str) -> None:
    engine = build_at(db_url, REVISIONS[-1])
    try:
        empty = [name for name, rows in snapshot(engine).items() if not rows]
        assert empty == [], f"no rows in {empty}: add seed rows for them to SEEDS"
    finally:
        engine.dispose()


@pytest.mark.parametrize("revision", REVISIONS[:-1])
def test_upgrade_from_an_earlier_revision_keeps_every_row(db_url: str, revision: str) -> None:
    engine = build_at(db_url, revision)
    try:
        before = snapshot(engine)
        assert sum(len(rows) for rows in before.values()) > 100  # a real store, not a shell
        migrate.upgrade(db_url)
        assert migrate.current_revision(engine) == migrate.head_revision()
        after = snapshot(engine)
        assert_kept(before, after)
        if "family_limits" not in before:  # migration 0006 carried the limits into version 1
            limit_cols = [c for c in after["family_limits"][(1,)] if c in
                          after["engine_family"][(1,)] and c not in ("id", "created_at")]
            versions = sorted(after["family_limits"].values(), key=lambda r: r["family_id"])
            assert [(v["family_id"], v["version"]) for v in versions] == [(1, 1), (2, 1), (3, 1)]
            for v in versions:
                fam = after["engine_family"][(v["family_id"],)]
                assert {c: v[c] for c in limit_cols} == {c: fam[c] for c in limit_cols}
                assert fam["limits_version"] == 1 and v["created_at"] == fam["created_at"]
    finally:
        engine.dispose()


def test_last_revision_downgrades_and_upgrades_without_loss(db_url: str) -> None:
    last, previous = REVISIONS[-1], REVISIONS[-2]
    engine = build_at(db_url, previous)
    try:
        before = snapshot(engine)
        old_columns = _columns(engine)
        migrate.upgrade(db_url, last)
        made = snapshot(engine)  # with the rows the last migration wrote itself
        _seed_new_tables(engine, set(before))
        migrate.downgrade(db_url, previous)
        down = snapshot(engine)
        assert _columns(engine) == old_columns
        assert_kept(before, down)
        assert down == before  # nothing left behind of the last revision's data either
        migrate.upgrade(db_url, last)
        assert_kept(before, snapshot(engine))
        again = snapshot(engine)
        for name in made:  # what the last migration writes, it writes again
            assert len(again[name]) == len(made[name]), name
        assert migrate.schema_differences(engine) == []
    finally:
        engine.dispose()
