"""Unit health on the demo fleet: every planted story found, no false alarm, and the rules
that keep levels honest (one-unit refresh = full refresh, voided tests stay out of fits)."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import pandas as pd
import pytest
from sqlalchemy.engine import Engine

import demo_fleet
from fleetdb import assess, db, frames, health, ingest, logbook
from tests.conftest import DEMO_AS_OF, copy_store

AS_OF = DEMO_AS_OF
STORIES = demo_fleet.build(as_of=AS_OF).stories


@pytest.fixture
def demo(demo_file: Path, tmp_path: Path) -> Engine:
    """A private copy of the demo store, free to change."""
    engine = db.make_engine(copy_store(demo_file, tmp_path))
    yield engine
    engine.dispose()


@pytest.fixture(scope="session")
def demo_board(demo_file: Path) -> dict:
    engine = db.make_engine(f"sqlite:///{demo_file}")
    board = health.board(engine, AS_OF)
    engine.dispose()
    return {r["fleet_no"]: r for r in board["rows"]}


@pytest.mark.parametrize("story", STORIES, ids=lambda s: f"{s.story}-{s.fleet_no}")
def test_planted_story_is_found(story: demo_fleet.Story, demo_board: dict) -> None:
    # The invented demo's stories (demo_fleet/README.md); levels per design.md.
    row = demo_board[story.fleet_no]
    assert row["level"] == story.level, row["main_text"]
    assert set(story.codes) <= set(row["reasons"])
    assert not set(story.absent) & set(row["reasons"])


def test_story_test_codes(demo: Engine) -> None:
    # Stories about one test in the middle of a history name that test's codes.
    for story in STORIES:
        if story.test_at is None:
            continue
        report = health.unit_report(demo, story.fleet_no, AS_OF)
        test = next(t for t in report["tests"]
                    if t["tested_at"] == story.test_at.isoformat(sep=" ")[:16])
        assert set(story.test_codes) <= {f["code"] for f in test["findings"]}
        assert not test["trustworthy"]


def test_board_counts_filters_and_paging(demo: Engine) -> None:
    full = health.board(demo, AS_OF)
    assert full["total"] == sum(full["counts"].values()) == len(full["rows"])
    ranks = [assess.LEVEL_RANK[r["level"]] for r in full["rows"]]
    assert ranks == sorted(ranks)
    site = full["rows"][0]["site"]
    only = health.board(demo, AS_OF, site=site)
    assert {r["site"] for r in only["rows"]} == {site}
    assert only["total"] == sum(full["counts_by_site"][site].values())
    page = health.board(demo, AS_OF, offset=5, limit=5)
    assert [r["fleet_no"] for r in page["rows"]] == [r["fleet_no"] for r in full["rows"][5:10]]
    assert health.board(demo, AS_OF, level="act")["total"] == full["counts"]["act"]
    hit = health.board(demo, AS_OF, search=full["rows"][0]["fleet_no"].lower())
    assert full["rows"][0]["fleet_no"] in [r["fleet_no"] for r in hit["rows"]]


def test_change_since_last_week(demo: Engine) -> None:
    week_before = AS_OF - dt.timedelta(days=7)
    health.refresh_fleet(demo, week_before)
    board = health.board(demo, AS_OF)
    assert board["previous_week_start"] == health.week_start(week_before).isoformat()
    changes = {r["fleet_no"]: (r["change"], r["previous_level"]) for r in board["rows"]}
    # LT-902's valve burnt on its latest test (2026-11-26), after the week before.
    assert changes["LT-902"][0] == "worse"
    assert all(c in ("same", "worse", "better", "new") for c, _ in changes.values())


def test_one_unit_refresh_equals_full_refresh(demo: Engine) -> None:
    # Self-consistency: a unit refreshed alone, pooling with the stored family statistics,
    # gets exactly the level and reasons the full refresh gave it.
    full = {r["fleet_no"]: r for r in health.board(demo, AS_OF)["rows"]}
    for fleet_no in ("GS-901", "LT-902", "LV-903", "LT-905", "LT-105", "YT-201"):
        uid = full[fleet_no]["unit_id"]
        alone = health.assess_units(demo, [uid], AS_OF)
        assert alone.units.loc[uid, "level"] == full[fleet_no]["level"]
        assert list(dict.fromkeys(alone.reasons["code"])) == full[fleet_no]["reasons"]


def test_voided_test_never_enters_a_fit(demo: Engine) -> None:
    # Voiding a test must give the same fits as if its readings had never been taken.
    uid = health.board(demo, AS_OF, search="LT-101")["rows"][0]["unit_id"]
    # As of today: a void counts from the moment it is recorded (a past week replays without).
    fr = frames.load(demo, [uid])
    victim = int(fr.tests.index[len(fr.tests) // 2])
    logbook.void_test(demo, victim, "gauge hose leaked", by="test")
    voided = health.assess_units(demo, [uid])
    fr.tests = fr.tests.drop(index=victim)
    fr.readings = fr.readings[fr.readings["test_id"] != victim]
    with demo.connect() as conn:
        params = health._stored_family_params(conn, health.week_start(dt.date.today()))
    without = assess.assess(fr, voided.as_of, family_params=params)
    cols = ["n", "slope", "slope_se", "cross_point", "cross_planning"]
    pd.testing.assert_frame_equal(voided.fits[cols], without.fits[cols])


def test_logging_a_test_refreshes_the_unit(demo: Engine) -> None:
    uid = health.board(demo, AS_OF, search="LT-101")["rows"][0]["unit_id"]
    assert health.board(demo, AS_OF, search="LT-101")["rows"][0]["level"] == "sound"
    report = health.unit_report(demo, "LT-101", AS_OF)
    hours = report["unit"]["last_hours"] + 10
    readings = [logbook.TypedReading("compression", c, v, "psi")
                for c, v in enumerate(["150", "151", "80", "149"], start=1)]
    when = pd.Timestamp(report["unit"]["last_tested_at"]) + pd.Timedelta(hours=1)
    test_id = logbook.log_test(demo, "LT-101", when.isoformat(sep=" "), hours, readings,
                               conditions={"crank_rpm": "240", "battery_v": "10.5",
                                           "engine_temp_c": "80", "throttle_open": "yes"})
    day = when.date()
    health.refresh_units(demo, [uid], day)
    row = health.board(demo, day, search="LT-101")["rows"][0]
    assert row["level"] == "act" and "below_minimum" in row["reasons"]
    verdict = health.test_verdict(demo, test_id)
    assert verdict["trustworthy"] and verdict["ratio"] < 0.75
    assert {"below_minimum", "single_low"} <= {f["code"] for f in verdict["findings"]}


def test_large_fleet_paths_give_the_same_assessment(demo: Engine, monkeypatch) -> None:  # noqa: ANN001
    # Self-consistency: the paths a large fleet takes to bound memory (fits one pooling
    # group at a time, steps judged a slice of whole series at a time, sentences only for
    # the tests health reads) give exactly the assessment of the direct path.
    from fleetdb import trend

    moment = pd.Timestamp(AS_OF) + pd.Timedelta(hours=23, minutes=59, seconds=59)
    fr = frames.load(demo, as_of=moment)
    monkeypatch.setattr(assess, "ONE_PASS_TESTS", 10**9)
    direct = assess.assess(fr, moment)
    monkeypatch.setattr(assess, "FIT_BY_GROUP_ROWS", 0)
    monkeypatch.setattr(assess, "ONE_PASS_TESTS", 0)
    monkeypatch.setattr(trend, "_JUDGE_CHUNK", 7)
    large = assess.assess(fr, moment)
    assert direct.fits["family"].nunique() > 2 and direct.points["step"].any()
    pd.testing.assert_frame_equal(large.fits, direct.fits)
    pd.testing.assert_frame_equal(large.points, direct.points)
    pd.testing.assert_frame_equal(large.units, direct.units)
    pd.testing.assert_frame_equal(large.reasons, direct.reasons)


_SNAPSHOT_SQL = ("SELECT unit_id, week_start, as_of, level, main_code, main_text, reasons_json, "
                 "last_test_id, last_tested_at, last_hours, projected_hours, "
                 "projected_hours_early, projected_date, projected_date_early, "
                 "wear_kpa_per_1000h, limits_version FROM health_snapshot ORDER BY unit_id")
_FAMILY_WEAR_SQL = ("SELECT family_id, mean_slope, tau2, pooled_sd, n_series, mean_slope_se, "
                    "pooled_df, spread_mean_slope, spread_tau2, spread_pooled_sd, "
                    "spread_mean_slope_se, spread_pooled_df FROM family_wear ORDER BY family_id")


def _stored(engine: Engine) -> tuple[list, list]:
    from sqlalchemy import text

    with engine.connect() as conn:
        return (conn.execute(text(_SNAPSHOT_SQL)).all(),
                conn.execute(text(_FAMILY_WEAR_SQL)).all())


@pytest.mark.parametrize("arrow", [False, True], ids=["plain-read", "arrow-read"])
def test_fleet_split_by_family_gives_the_same_snapshot(demo_file: Path, tmp_path: Path,
                                                        monkeypatch, arrow: bool) -> None:  # noqa: ANN001
    # Self-consistency: every statistic is pooled within an engine family, so assessing
    # the families in separate worker processes must store exactly what one process does,
    # whether the rows came through the plain read or the Arrow read (shared by the
    # workers as memory-mapped tables). (A fork is refused while other threads run, as
    # in the dashboard's server; here the test says there are none.)
    monkeypatch.setattr(health.threading, "active_count", lambda: 1)
    if arrow:
        monkeypatch.setattr(frames, "ARROW_READ_MIN_ROWS", 1)
    one = db.make_engine(copy_store(demo_file, tmp_path, "one.sqlite"))
    split = db.make_engine(copy_store(demo_file, tmp_path, "split.sqlite"))
    next_week = AS_OF + dt.timedelta(days=7)  # a week with nothing stored yet
    assert _stored(one) == _stored(split)
    before = len(_stored(one)[0])
    result_one = health.refresh_fleet(one, next_week, workers=1)
    result_split = health.refresh_fleet(split, next_week, workers=3)
    assert result_one["processes"] == 1 and result_split["processes"] == 3
    assert result_one["counts"] == result_split["counts"]
    stored_one, stored_split = _stored(one), _stored(split)
    assert len(stored_one[0]) == before + result_one["units"] and len(stored_one[1]) >= 3
    assert stored_split == stored_one


def test_family_work_and_subsets(demo: Engine) -> None:
    # A family's work is its readings (tests times cylinders) plus UNIT_WORK per unit; the
    # frames of a family subset hold that subset's units and their rows only.
    raw = frames.read(demo)
    fr = frames.shape(raw)
    tests = fr.tests["family_id"].value_counts()
    weight = (tests * fr.families["cylinders"].reindex(tests.index)
              + health.UNIT_WORK * fr.units["family_id"].value_counts().reindex(tests.index))
    work = health._family_work(raw)
    assert sorted(work) == sorted(int(f) for f in fr.units["family_id"].unique())
    assert work == pytest.approx({int(f): float(w) for f, w in weight.items()})
    some = sorted(work)[::2]
    split = frames.shape(raw, some)
    assert set(split.units["family_id"]) == set(some)
    assert set(split.tests["unit_id"]) <= set(split.units.index)
    assert set(split.readings["test_id"]) == set(split.tests.index) & set(fr.readings["test_id"])
    assert set(split.events["unit_id"]) <= set(split.units.index)


def test_split_refresh_on_each_engine(engine: Engine, monkeypatch) -> None:  # noqa: ANN001
    # The same on SQLite and PostgreSQL: the workers never touch the store (the parent
    # reads before forking and writes after), so the rows stored are the same.
    from tests.conftest import DATA

    monkeypatch.setattr(health.threading, "active_count", lambda: 1)
    ingest.import_files(engine, [DATA / "fleet.csv", DATA / "tests.csv"], by="test")
    day = dt.date(2024, 6, 3)
    alone = health.refresh_fleet(engine, day, workers=1)
    stored = _stored(engine)
    split = health.refresh_fleet(engine, day, workers=2)
    assert alone["processes"] == 1 and split["processes"] == 2
    assert split["counts"] == alone["counts"] and _stored(engine) == stored
    assert len(stored[0]) == alone["units"] == 4


@pytest.mark.parametrize(("failure", "error", "match"), [
    ("a worker raises", RuntimeError, r"(?s)assessing engine families.*planted failure"),
    ("a worker dies", RuntimeError, "the worker ended with exit code 9"),
    ("the parent fails to write", ValueError, "planted failure in the parent"),
])
def test_a_failed_part_fails_the_refresh_writes_nothing_and_leaves_no_worker(
        demo_file: Path, tmp_path: Path, monkeypatch, failure: str, error: type,  # noqa: ANN001
        match: str) -> None:
    # A worker's exception comes back with its traceback; a worker killed outright (out of
    # memory, say) sends nothing, and its exit code is reported; when the parent fails to
    # write the first part that came back, the workers still running are stopped, not left
    # waiting to send. In every case nothing is written (one transaction).
    import multiprocessing
    import os
    import time

    monkeypatch.setattr(health.threading, "active_count", lambda: 1)
    engine = db.make_engine(copy_store(demo_file, tmp_path))
    before = _stored(engine)
    real, parent = assess.assess, os.getpid()

    def planted(fr: frames.Frames, *args, **kwargs):  # noqa: ANN002, ANN003, ANN202
        in_worker = os.getpid() != parent
        if failure == "a worker raises" and in_worker:
            raise ValueError("planted failure")
        if failure == "a worker dies" and in_worker:
            os._exit(9)
        if failure == "the parent fails to write" and 1 not in set(fr.units["family_id"]):
            time.sleep(120)  # workers still busy when the parent gives up
        return real(fr, *args, **kwargs)

    def planted_write(conn, rows) -> None:  # noqa: ANN001
        raise ValueError("planted failure in the parent")

    monkeypatch.setattr(assess, "assess", planted)
    if failure == "the parent fails to write":
        monkeypatch.setattr(health, "_write_snapshot", planted_write)
    with pytest.raises(error, match=match):
        health.refresh_fleet(engine, AS_OF + dt.timedelta(days=7), workers=3)
    assert multiprocessing.active_children() == []
    assert _stored(engine) == before


def test_reasons_json_is_what_json_dumps_writes() -> None:
    # Reference: the standard library's json.dumps(..., ensure_ascii=False), byte for byte,
    # on text that needs escaping, non-ASCII text, nested numbers and a missing test.
    rr = pd.DataFrame({
        "unit_id": [7, 3, 7],
        "code": ["below_minimum", "test_overdue", "wear_faster_than_family"],
        "level": ["act", "retest", "watch"],
        "text": ['Cylinder 2 reads "low": 455 kPa — \\ retest', "No test yet.\nRetest.",
                 "Ölwanne ≤ 5 %"],
        "numbers": [{"cylinder": 2, "value_kpa": 455.3238, "limit_kpa": None},
                    {}, {"cylinders": [1, 4], "slope_kpa_per_h": -0.0123, "ok": True}],
        "test_id": pd.array([11, None, 12], dtype="Int64")})
    stored = health._reasons_json(rr)
    for unit in (3, 7):
        rows = rr[rr["unit_id"] == unit]
        expected = json.dumps([{"code": c, "level": lv, "text": t, "numbers": n,
                                "test_id": None if pd.isna(i) else int(i)}
                               for c, lv, t, n, i in zip(rows["code"], rows["level"],
                                                         rows["text"], rows["numbers"],
                                                         rows["test_id"], strict=True)],
                              ensure_ascii=False)
        assert stored[unit] == expected
