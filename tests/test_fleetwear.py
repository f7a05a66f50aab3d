"""The Fleet wear frames, and keeping them current after a write without a fleet-wide
assessment: an update must give what a fresh computation gives (self-consistency; the fits
themselves are checked against outside sources in test_trend.py and test_health.py)."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sqlalchemy.engine import Engine

from fleetdb import db, fleetwear, logbook, registry, units, views
from tests.conftest import DEMO_AS_OF, copy_store

DAY = DEMO_AS_OF


@pytest.fixture
def demo(demo_file: Path, tmp_path: Path) -> Engine:
    """A private copy of the demo store, free to change."""
    engine = db.make_engine(copy_store(demo_file, tmp_path))
    yield engine
    engine.dispose()


@pytest.fixture
def known(demo: Engine) -> fleetwear.FleetWear:
    return fleetwear.fleet_wear(demo, DAY)


def _log(engine: Engine, fleet_no: str, known: fleetwear.FleetWear,
         psi: list[str]) -> int:
    """A trustworthy dry test an hour after the unit's latest, 10 hours on."""
    last = known.latest.set_index("fleet_no").loc[fleet_no]
    when = pd.Timestamp(last["tested_at"]) + pd.Timedelta(hours=1)
    readings = [logbook.TypedReading("compression", c, v, "psi")
                for c, v in enumerate(psi, start=1)]
    return logbook.log_test(engine, fleet_no, when.isoformat(sep=" "), float(last["hours"]) + 10,
                            readings, conditions={"crank_rpm": "240", "battery_v": "10.5",
                                                  "engine_temp_c": "80", "throttle_open": "yes"})


def _same_as_fresh(engine: Engine, updated: fleetwear.FleetWear, day: dt.date = DAY) -> None:
    fresh = fleetwear.fleet_wear(engine, day)
    pd.testing.assert_frame_equal(updated.tests, fresh.tests)
    pd.testing.assert_frame_equal(updated.latest, fresh.latest)
    assert updated.mark == fresh.mark


def test_frames_describe_the_fleet(known: fleetwear.FleetWear) -> None:
    tests, latest = known.tests, known.latest
    assert list(tests.columns) == ["fleet_no", "family", "site", "elevation_m", "tested_at",
                                   "hours", "lowest_kpa", "lowest_sl_kpa", "mean_kpa",
                                   "mean_sl_kpa"]
    by_unit = tests.reset_index().sort_values(["unit_id", "tested_at"], ignore_index=True)
    assert tests.reset_index().equals(by_unit)
    assert latest.index.is_unique and latest.index.is_monotonic_increasing
    assert latest["fleet_no"].is_unique and set(latest["fleet_no"]) == set(tests["fleet_no"])
    last = tests.reset_index().groupby("unit_id").tail(1).set_index("unit_id")
    pd.testing.assert_frame_equal(latest, last)
    assert (tests["lowest_kpa"] <= tests["mean_kpa"]).all()
    # One test, one barometer: every cylinder is scaled by the same 101.325 / baro factor.
    factor = tests["lowest_sl_kpa"] / tests["lowest_kpa"]
    assert np.allclose(factor, tests["mean_sl_kpa"] / tests["mean_kpa"])
    assert factor.between(0.95, 1.5).all()  # sea level to about 3,500 m
    assert known.wear.index.is_unique and known.wear.index.is_monotonic_increasing
    assert set(known.wear["family"]) <= set(known.families.index)
    assert (known.families["minimum_kpa"] > 0).all()


def test_nothing_written_keeps_the_result(demo: Engine, known: fleetwear.FleetWear) -> None:
    assert fleetwear.bring_up_to_date(demo, known) is known


def test_a_logged_test_updates_its_unit_alone(demo: Engine,
                                              known: fleetwear.FleetWear) -> None:
    _log(demo, "LT-101", known, ["150", "151", "80", "149"])
    assert fleetwear.units_written_since(demo, known.mark) == [
        int(known.wear.index[known.wear["fleet_no"] == "LT-101"][0])]
    updated = fleetwear.bring_up_to_date(demo, known)
    row = updated.latest.set_index("fleet_no").loc["LT-101"]
    # 80 psi typed: 551.6 kPa (1 psi = 6.894757 kPa, NIST SP 811).
    assert row["lowest_kpa"] == pytest.approx(units.to_kpa(80, "psi"))
    assert len(updated.tests) == len(known.tests) + 1
    others = updated.wear["fleet_no"] != "LT-101"
    pd.testing.assert_frame_equal(updated.wear[others], known.wear[known.wear["fleet_no"]
                                                                   != "LT-101"])
    _same_as_fresh(demo, updated)


def test_a_void_takes_the_test_out(demo: Engine) -> None:
    # A void counts from the moment it is recorded: assess as of today to see it.
    known = fleetwear.fleet_wear(demo, dt.date.today())
    test_id = _log(demo, "LT-101", known, ["150", "151", "80", "149"])
    logged = fleetwear.bring_up_to_date(demo, known)
    assert len(logged.tests) == len(known.tests) + 1
    logbook.void_test(demo, test_id, "gauge hose leaked", by="test")
    voided = fleetwear.bring_up_to_date(demo, logged)
    pd.testing.assert_frame_equal(voided.tests, known.tests)
    pd.testing.assert_frame_equal(voided.latest, known.latest)
    _same_as_fresh(demo, voided, voided.as_of)


def test_new_limits_or_many_units_assess_the_fleet_again(
        demo: Engine, known: fleetwear.FleetWear, monkeypatch: pytest.MonkeyPatch) -> None:
    family = known.latest.set_index("fleet_no").loc["LT-101", "family"]
    registry.set_limits(demo, family, {"min_compression": "95 psi"}, reason="revision",
                        by="test")
    updated = fleetwear.bring_up_to_date(demo, known)
    assert updated.families.loc[family, "minimum_kpa"] == pytest.approx(
        units.to_kpa(95, "psi"))
    _log(demo, "LT-101", updated, ["150", "151", "80", "149"])
    monkeypatch.setattr(fleetwear, "MAX_UNITS_TO_UPDATE", 0)
    again = fleetwear.bring_up_to_date(demo, updated)
    _same_as_fresh(demo, again)
    pd.testing.assert_frame_equal(again.wear, fleetwear.fleet_wear(demo, DAY).wear)


def test_first_middle_and_last_units_are_spliced_in_place(
        demo: Engine, known: fleetwear.FleetWear) -> None:
    fleet_nos = known.latest["fleet_no"].tolist()
    for fleet_no in (fleet_nos[0], fleet_nos[len(fleet_nos) // 2], fleet_nos[-1]):
        cylinders = views.unit_tests(demo, fleet_no)["cylinders"]
        _log(demo, fleet_no, known, ["140"] * cylinders)
    _same_as_fresh(demo, fleetwear.bring_up_to_date(demo, known))
