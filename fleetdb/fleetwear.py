"""The fleet's wear at a glance: per-unit wear rates and compression history, kept current.

:func:`fleet_wear` assesses the whole fleet as of a day (the same fits the board's
snapshot comes from) and gathers the frames the Fleet wear page draws. A whole-fleet
assessment takes seconds on a large fleet, so :func:`bring_up_to_date` takes an earlier
result and re-assesses only the units written to since (a logged test, a void, a service
event), pooling them with the family statistics of the earlier result, as a one-unit
health refresh pools with the stored ones. New family limits, or more than
:data:`MAX_UNITS_TO_UPDATE` changed units, mean a whole-fleet assessment again.

Nothing is ever deleted from the store, so the highest ids of the written tables only grow:
:class:`StoreMark` is how far a result has seen.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
from sqlalchemy import text
from sqlalchemy.engine import Engine

from fleetdb import assess, frames, health

#: Above this many changed units, the whole fleet is assessed again (the rule of a health
#: refresh after a write).
MAX_UNITS_TO_UPDATE = health.MANY_UNITS

_TEST_COLUMNS = ["fleet_no", "family", "site", "elevation_m", "tested_at", "hours",
                 "lowest_kpa", "lowest_sl_kpa", "mean_kpa", "mean_sl_kpa"]


@dataclass(frozen=True)
class StoreMark:
    """The highest id of each table a fleet assessment depends on (0: none yet)."""

    test: int
    void: int
    event: int
    limits: int


def store_mark(engine: Engine) -> StoreMark:
    """How far the store has been written: one query, four index lookups."""
    with engine.connect() as conn:
        row = conn.execute(text(
            "SELECT (SELECT COALESCE(MAX(id), 0) FROM test), "
            "(SELECT COALESCE(MAX(id), 0) FROM test_void), "
            "(SELECT COALESCE(MAX(id), 0) FROM service_event), "
            "(SELECT COALESCE(MAX(id), 0) FROM family_limits)")).one()
    return StoreMark(*(int(v) for v in row))


@dataclass(frozen=True)
class FleetWear:
    """The fleet-level frames of the Fleet wear page (kPa inside; wear as a loss, >= 0 = wear).

    ``wear``: indexed by unit id, one row per unit with a fitted current cylinder series:
    ``fleet_no, family, site, cylinder`` (its fastest-wearing cylinder),
    ``wear_kpa_per_1000h``, ``method``, ``faster_than_family``.
    ``families``: index family name: ``minimum_kpa``, ``family_wear_kpa_per_1000h``.
    ``tests``: indexed by unit id, one row per trustworthy, non-voided dry compression
    test, by unit then time: ``fleet_no, family, site, elevation_m, tested_at, hours,
    lowest_kpa, lowest_sl_kpa, mean_kpa, mean_sl_kpa``.
    ``latest``: the latest row of ``tests`` per unit (unit ids unique and increasing).
    ``family_params``: the pooled family statistics the fits used (see
    :func:`fleetdb.fleetfit.family_params`); a partial update pools with them.
    ``mark``: how far the store had been written when this was computed.
    ``as_of``: the day assessed (its last second counts).
    """

    wear: pd.DataFrame
    families: pd.DataFrame
    tests: pd.DataFrame
    latest: pd.DataFrame
    family_params: pd.DataFrame
    mark: StoreMark
    as_of: dt.date


def _moment(day: dt.date) -> pd.Timestamp:
    return pd.Timestamp(day) + pd.Timedelta(hours=23, minutes=59, seconds=59)


def _unit_frames(fr: frames.Frames,
                 result: assess.Assessment) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The ``wear`` and ``tests`` rows of the units in ``fr``."""
    units = fr.units[["fleet_no", "family", "site", "elevation_m"]]
    fits = result.fits
    own = fits[fits["current"] & (fits["cylinder"] != assess.SPREAD_CYLINDER)
               & fits["slope"].notna() & (fits["slope_source"] != "pooled_short")]
    fastest = own.loc[own.groupby("unit_id")["slope"].idxmin()]
    unit_ids = fastest["unit_id"].to_numpy(np.int64)
    wear = units.loc[unit_ids, ["fleet_no", "family", "site"]].assign(
        cylinder=fastest["cylinder"].to_numpy(int),
        wear_kpa_per_1000h=-1000.0 * fastest["slope"].to_numpy(float),
        method=fastest["slope_source"].to_numpy(),
        faster_than_family=fastest["faster_than_family"].to_numpy(bool))
    wear.index = pd.Index(unit_ids, name="unit_id")
    pts = result.points
    dry = pts[(pts["cylinder"] != assess.SPREAD_CYLINDER) & pts["in_fit"]]
    per_test = dry.groupby("test_id").agg(
        unit_id=("unit_id", "first"), tested_at=("tested_at", "first"), hours=("hours", "first"),
        lowest_kpa=("value_kpa", "min"), lowest_sl_kpa=("value_sl", "min"),
        mean_kpa=("value_kpa", "mean"), mean_sl_kpa=("value_sl", "mean"))
    test_units = per_test["unit_id"].to_numpy(np.int64)
    tests = units.reindex(test_units).assign(
        **{name: per_test[name].to_numpy() for name in _TEST_COLUMNS[4:]})
    order = np.lexsort((per_test["tested_at"].to_numpy(), test_units))
    tests = tests.iloc[order][_TEST_COLUMNS]
    tests.index.name = "unit_id"
    return wear, tests


def _latest(tests: pd.DataFrame) -> pd.DataFrame:
    """The last row of each unit of ``tests`` (sorted by unit, then time)."""
    ids = tests.index.to_numpy()
    return tests[np.append(ids[1:] != ids[:-1], True)] if len(ids) else tests


def fleet_wear(engine: Engine, day: dt.date) -> FleetWear:
    """Assess the whole fleet as of ``day`` and gather the Fleet wear frames.

    :param engine: the store.
    :param day: the day assessed (tests, events and voids up to its last second).
    """
    mark = store_mark(engine)
    moment = _moment(day)
    fr = frames.load(engine, as_of=moment, details=False)
    result = assess.assess(fr, moment)
    wear, tests = _unit_frames(fr, result)
    names = fr.families["name"]
    params = result.family_params
    family_mu = params["family_mu"].reindex(names.index) if len(params) else np.nan
    families = pd.DataFrame(
        {"minimum_kpa": fr.families["min_compression_kpa"].to_numpy(float),
         "family_wear_kpa_per_1000h": -1000.0 * np.asarray(family_mu, float)},
        index=pd.Index(names.to_numpy(), name="family"))
    return FleetWear(wear=wear, families=families, tests=tests, latest=_latest(tests),
                     family_params=params, mark=mark, as_of=day)


def units_written_since(engine: Engine, mark: StoreMark) -> list[int]:
    """The units that got a test, a void or a service event after ``mark`` (sorted ids)."""
    with engine.connect() as conn:
        ids = conn.execute(text(
            "SELECT unit_id FROM test WHERE id > :test "
            "UNION SELECT t.unit_id FROM test_void v JOIN test t ON t.id = v.test_id "
            "WHERE v.id > :void "
            "UNION SELECT unit_id FROM service_event WHERE id > :event"),
            {"test": mark.test, "void": mark.void, "event": mark.event}).scalars().all()
    return sorted(int(i) for i in ids)


def _splice(old: pd.DataFrame, new: pd.DataFrame, unit_ids: list[int]) -> pd.DataFrame:
    """``old`` (sorted by its unit-id index) with the rows of each unit in ``unit_ids``
    replaced by that unit's rows of ``new`` (also sorted; may hold none).

    Two binary searches per unit instead of a sort of the whole fleet's rows.
    """
    keys = np.sort(np.asarray(unit_ids, dtype=np.int64))
    starts = old.index.searchsorted(keys, side="left")
    ends = old.index.searchsorted(keys, side="right")
    new_starts = new.index.searchsorted(keys, side="left")
    new_ends = new.index.searchsorted(keys, side="right")
    pieces, at = [], 0
    for start, end, new_start, new_end in zip(starts, ends, new_starts, new_ends, strict=True):
        pieces.append(old.iloc[at:start])
        pieces.append(new.iloc[new_start:new_end])
        at = end
    pieces.append(old.iloc[at:])
    return pd.concat([p for p in pieces if len(p)] or [old.iloc[:0]])


def bring_up_to_date(engine: Engine, known: FleetWear) -> FleetWear:
    """``known`` with the units written to since it was computed assessed again.

    Returns ``known`` itself when nothing was written; a whole-fleet assessment when
    family limits changed, a unit of a family ``known`` has not seen was written, or
    more than :data:`MAX_UNITS_TO_UPDATE` units changed.
    """
    mark = store_mark(engine)
    if mark == known.mark:
        return known
    if mark.limits != known.mark.limits:
        return fleet_wear(engine, known.as_of)
    unit_ids = units_written_since(engine, known.mark)
    if len(unit_ids) > MAX_UNITS_TO_UPDATE:
        return fleet_wear(engine, known.as_of)
    moment = _moment(known.as_of)
    fr = frames.load(engine, unit_ids, as_of=moment, details=False)
    if not set(fr.units["family"]) <= set(known.families.index):
        return fleet_wear(engine, known.as_of)
    if not len(fr.units):
        return replace(known, mark=mark)
    result = assess.assess(fr, moment, family_params=known.family_params)
    wear, tests = _unit_frames(fr, result)
    changed = fr.units.index.to_list()
    wear = _splice(known.wear, wear, changed)
    latest = _splice(known.latest, _latest(tests), changed)
    tests = _splice(known.tests, tests, changed)
    return replace(known, wear=wear, tests=tests, latest=latest, mark=mark)
