"""From checks and trends to one health level per unit, with the reasons behind it. Pure.

Levels, worst first (design.md): ``act`` a limit is crossed on a trustworthy test;
``plan`` projected to cross within the planning horizon; ``retest`` the latest test is not
trustworthy, or a test is overdue; ``watch`` wearing faster than its family, a sudden drop,
close to a limit, or a pattern worth following; ``sound``.

Rules chosen here (b, common practice, no published source):

* The judged test is the latest trustworthy, non-voided test since the last overhaul-type
  event; its limit findings make ``act``. A later untrustworthy test asks for a retest but
  never clears or raises ``act`` on its own.
* Wear series: one per unit, cylinder and event segment; an ``overhaul`` restarts every
  cylinder, ``head``/``valves``/``rings`` the cylinders they name (all when none named).
  Only trustworthy, non-voided dry tests enter a fit.
* The spread is projected like a cylinder: the lowest/highest ratio per test against hours,
  limit = the family's ``min_ratio`` (for the ``ratio`` rule).
* A unit's projected crossing is the earliest over its current cylinder series and spread;
  ``plan`` when the conservative (one-sided 95 % prediction) crossing falls within the
  horizon. Hours become dates with the unit's own hours per week (last year of tests), else
  the fleet file's figure.
* ``near_minimum``: the judged test's lowest cylinder within 10 % above the minimum.
* Many cylinders, many chances: a sudden drop uses D11's 95 % level for the whole test
  (Bonferroni over its k cylinders: 1 - 0.05/k per cylinder) and must also fall at least
  10 % of the family minimum below the line (0.05 for the ratio), so that test noise on
  one of six cylinders is not called a step; "faster than the family" likewise needs one
  cylinder beyond the one-sided 1 - 0.05/k level.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import special

from fleetdb import checks, fleetfit
from fleetdb.defaults import DEFAULTS
from fleetdb.frames import Frames, in_unit_time_order
from fleetdb.ids import member_mask, positions
from fleetdb.units import KPA_PER_UNIT

LEVELS = ("act", "plan", "retest", "watch", "sound")
LEVEL_RANK = {lvl: i for i, lvl in enumerate(LEVELS)}
RESET_KINDS = ("overhaul", "head", "valves", "rings")
NEAR_MINIMUM_FRACTION = DEFAULTS["near_minimum_fraction"].value
FAMILY_ALPHA = DEFAULTS["family_alpha"].value
MIN_DROP_FRACTION = DEFAULTS["min_drop_fraction"].value
MIN_DROP_RATIO = 0.05  # (b) the least sudden fall of the lowest/highest ratio
HORIZON_WEEKS = int(DEFAULTS["planning_horizon_weeks"].value)
ARTEFACT_CODES = ("weak_battery", "slow_cranking", "cold_engine", "intake_restriction",
                  "all_low_restriction", "all_low_artefact")
WATCH_PATTERNS = ("single_low", "adjacent_pair_low", "non_adjacent_pair_low", "pair_low",
                  "all_low_wear", "rings_suspected", "valves_suspected", "leakdown_worn",
                  "leakdown_fail", "leakdown_above_median", "relative_low", "idle_vacuum_low",
                  "wet_test_on_diesel")
#: Up to this many tests, one pass writes every sentence (cheaper than picking the tests
#: health reads; the extra sentences are never read by a refresh).
ONE_PASS_TESTS = 2_000
#: From this many readings the fits run one pooling group at a time (bounds memory).
FIT_BY_GROUP_ROWS = 500_000
SERIES_STRIDE = 100_000  # series key = unit * stride + cylinder * 1000 + event segment
SPREAD_CYLINDER = 99  # pseudo-cylinder of the spread series

#: Reason codes health adds to those of :mod:`fleetdb.checks`.
HEALTH_CODES = {
    "sudden_drop": "a reading fell far below the cylinder's own trend: confirm by retest",
    "projected_limit": "the wear trend reaches a limit within the planning horizon",
    "wear_faster_than_family": "wearing significantly faster than its engine family",
    "near_minimum": "the lowest cylinder is within 10 % of the minimum",
    "test_overdue": "no test within the family's test interval",
    "no_test": "the unit has never been tested",
    "retest_untrustworthy": "the latest test is not trustworthy: retest",
}

#: Reasons of one level are listed in this order: checks' codes, then health's.
CODE_ORDER = {code: i for i, code in enumerate([*checks.CODES, *HEALTH_CODES])}


@dataclass
class Assessment:
    """Everything health computed for a set of units as of one moment."""

    as_of: pd.Timestamp
    units: pd.DataFrame  # index unit_id: level, main_code, main_text, projections...
    reasons: pd.DataFrame  # unit_id, code, level, text, numbers, test_id
    checks: checks.CheckResult
    points: pd.DataFrame  # dry readings with series, in_fit, step, value_sl
    fits: pd.DataFrame  # per series (trend.fit_fleet) plus unit_id, cylinder, segment
    family_params: pd.DataFrame  # per family: pooled wear statistics


def _psi(kpa: float) -> str:
    return f"{kpa:.0f} kPa ({kpa / KPA_PER_UNIT['psi']:.0f} psi)"


def _event_segments(points: pd.DataFrame, events: pd.DataFrame,
                    cylinders: pd.Series) -> np.ndarray:
    """Per reading, how many condition-resetting events touched its cylinder before it."""
    ev = events[events["kind"].isin(RESET_KINDS)]
    if ev.empty or points.empty:
        return np.zeros(len(points), dtype=int)
    rows = []
    for unit_id, day, kind, cyls in zip(ev["unit_id"], ev["date"], ev["kind"], ev["cylinders"],
                                        strict=True):
        count = int(cylinders.get(unit_id, 0))
        touched = range(1, count + 1) if kind == "overhaul" or not cyls else cyls
        rows += [(unit_id, c, day) for c in touched]
        rows.append((unit_id, SPREAD_CYLINDER, day))
    table = pd.DataFrame(rows, columns=["unit_id", "cylinder", "date"]).sort_values("date")
    table["n_events"] = table.groupby(["unit_id", "cylinder"]).cumcount() + 1
    left = points[["unit_id", "cylinder", "tested_at"]].assign(_row=np.arange(len(points)))
    left["cylinder"] = left["cylinder"].astype(int)
    table["cylinder"] = table["cylinder"].astype(int)
    merged = pd.merge_asof(left.sort_values("tested_at"), table, left_on="tested_at",
                           right_on="date", by=["unit_id", "cylinder"], direction="backward")
    out = np.zeros(len(points), dtype=int)
    out[merged["_row"].to_numpy()] = merged["n_events"].fillna(0).to_numpy(dtype=int)
    return out


def _hours_per_week(fr: Frames, as_of: pd.Timestamp) -> pd.Series:
    """Each unit's recent utilisation: hours per week over its last year of tests."""
    # Plain numpy per unit (min/max by unit through ufunc.at): a groupby's overhead is most
    # of the time when one unit is refreshed. Hours are never missing (NOT NULL).
    tested_at = fr.tests["tested_at"].to_numpy(dtype="datetime64[us]")
    keep = ~fr.tests["voided"].to_numpy(dtype=bool) & (
        tested_at >= np.datetime64((as_of - pd.Timedelta(days=400)).as_unit("us")))
    row = fr.units.index.get_indexer(fr.tests["unit_id"].to_numpy()[keep])
    found = row >= 0
    row, hours = row[found], fr.tests["hours"].to_numpy(dtype=float)[keep][found]
    at = tested_at[keep][found].astype(np.int64)
    n = len(fr.units)
    h0, h1 = np.full(n, np.inf), np.full(n, -np.inf)
    t0, t1 = np.full(n, np.iinfo(np.int64).max), np.full(n, np.iinfo(np.int64).min)
    np.minimum.at(h0, row, hours)
    np.maximum.at(h1, row, hours)
    np.minimum.at(t0, row, at)
    np.maximum.at(t1, row, at)
    seen = np.zeros(n, dtype=bool)
    seen[row] = True
    with np.errstate(invalid="ignore", divide="ignore"):
        weeks = np.where(seen, (t1 - t0) / 1e6, np.nan) / (7 * 86400)
        own = np.where(seen & (weeks >= 8), (h1 - h0) / weeks, np.nan)
    declared = fr.units["hours_per_week"].astype(float)
    return pd.Series(own, index=fr.units.index).fillna(declared).where(lambda s: s > 0)


_PLAIN = (str, int, bool, type(None))


def _jsonable(value: Any) -> Any:
    kind = type(value)  # the common exact types first: this runs per number of every reason
    if kind is float or kind is np.float64:
        return round(float(value), 4) if math.isfinite(value) else None
    if kind in _PLAIN:
        return value
    if kind is dict:  # a reason's numbers: plain values inline, no call per value
        out = {}
        for k, v in value.items():
            vk = type(v)
            if vk is float or vk is np.float64:
                out[k] = round(float(v), 4) if math.isfinite(v) else None
            elif vk in _PLAIN:
                out[k] = v
            else:
                out[k] = _jsonable(v)
        return out
    if isinstance(value, dict):
        return {k: _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [_jsonable(v) for v in value]
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return None if not np.isfinite(value) else round(float(value), 4)
    if isinstance(value, (np.bool_,)):
        return bool(value)
    if isinstance(value, pd.Timestamp):
        return value.isoformat()
    return value


def _series_points(fr: Frames, res: checks.CheckResult, as_of: pd.Timestamp) -> pd.DataFrame:
    """Dry compression readings and per-test spread, keyed into wear series."""
    tests, fams = fr.tests, fr.families
    rd = fr.readings[(fr.readings["kind"] == "compression").to_numpy()]
    at = positions(tests.index, rd["test_id"].to_numpy())
    if (at < 0).any():  # readings of tests not given (frames.load never has them)
        rd, at = rd[at >= 0], at[at >= 0]

    def of_test(col: str, dtype: Any = None) -> np.ndarray:
        return tests[col].to_numpy(dtype=dtype)[at]

    value = rd["value"].to_numpy()
    trusted = res.tests["trustworthy"].reindex(tests.index).fillna(False).to_numpy(dtype=bool)
    # The spread series' points: the lowest/highest ratio of each test (ratio families).
    ratio_fams = fams.index[fams["spread_rule"] == "ratio"]
    ratio = res.tests["dry_ratio"].reindex(tests.index).to_numpy(dtype=float)
    spread = np.flatnonzero(~np.isnan(ratio)
                            & tests["family_id"].isin(ratio_fams).to_numpy())
    # One frame built from whole columns (readings first, then the spread points).
    both = np.concatenate([at, spread])

    def col(name: str, dtype: Any = None) -> np.ndarray:
        return tests[name].to_numpy(dtype=dtype)[both]

    # Every column is made as an array first and the frame built once at the end: each
    # column set on a frame of millions of rows makes pandas copy its blocks again.
    unit_id, family_id, tested_at = col("unit_id"), col("family_id"), col("tested_at")
    cylinder = np.concatenate([rd["cylinder"].to_numpy(dtype=float, na_value=np.nan),
                               np.full(len(spread), float(SPREAD_CYLINDER))]).astype(int)
    voided, trustworthy = col("voided", bool), trusted[both]
    cyl_count = fams["cylinders"].reindex(fr.units["family_id"]).set_axis(fr.units.index)
    event_seg = _event_segments(pd.DataFrame({"unit_id": unit_id, "cylinder": cylinder,
                                              "tested_at": tested_at}), fr.events, cyl_count)
    # Which event segment is current for each unit and cylinder as of now.
    pair_codes, pair_keys = pd.factorize(unit_id.astype(np.int64) * 1000 + cylinder)
    now = pd.DataFrame({"unit_id": pair_keys // 1000, "cylinder": pair_keys % 1000,
                        "tested_at": as_of})
    current_seg = _event_segments(now, fr.events, cyl_count)[pair_codes]
    # Millions of rows are held to the end of a refresh: each key column in the smallest
    # integer type that holds its values exactly (the series key stays 64-bit).
    pts = pd.DataFrame({
        "test_id": _narrow(tests.index.to_numpy()[both]), "unit_id": _narrow(unit_id),
        "family_id": _narrow(family_id), "tested_at": tested_at, "hours": col("hours"),
        "cylinder": _narrow(cylinder),
        "value_kpa": np.concatenate([value, np.full(len(spread), np.nan)]),
        "value_sl": np.concatenate([value * (101.325 / of_test("baro_kpa")), ratio[spread]]),
        "voided": voided, "trustworthy": trustworthy, "in_fit": trustworthy & ~voided,
        "event_seg": _narrow(event_seg),
        "series": unit_id.astype(np.int64) * SERIES_STRIDE + cylinder * 1000 + event_seg,
        # The pooling group of a spread series is its own (negative) group per family.
        "group": _narrow(np.where(cylinder == SPREAD_CYLINDER, -1 - family_id, family_id)),
        "current": event_seg == current_seg}, copy=False)  # fresh arrays: no block copies
    return pts


def _narrow(values: np.ndarray) -> np.ndarray:
    """Integers in the smallest type that holds every value exactly."""
    if values.size == 0:
        return values
    low, high = values.min(), values.max()
    for kind in (np.int8, np.int16, np.int32):
        info = np.iinfo(kind)
        if info.min <= low and high <= info.max:
            return values.astype(kind)
    return values


def _fit_frame(pts: pd.DataFrame, rows: np.ndarray, fams: pd.DataFrame) -> pd.DataFrame:
    """The fit's input for some points: series, pooling group, hours, value, the limit and
    each reading's step level and least drop (derived here, not held for every point).

    A cylinder's limit is the family minimum and its step level Bonferroni over the
    family's cylinders; the spread's limit is the family's ``min_ratio``.
    """
    at = np.flatnonzero(rows)

    def col(name: str, dtype: Any = None) -> np.ndarray:
        return pts[name].to_numpy(dtype=dtype)[at]

    fam_row = fams.index.get_indexer(col("family_id"))

    def of_family(name: str) -> np.ndarray:  # NaN for a family not in the frame
        return np.where(fam_row >= 0, fams[name].to_numpy(float)[fam_row], np.nan)

    is_spread = col("cylinder") == SPREAD_CYLINDER
    limit = np.where(is_spread, of_family("min_ratio"), of_family("min_compression_kpa"))
    k = of_family("cylinders")
    return pd.DataFrame({
        "series": col("series", np.int64), "group": col("group", np.int64),
        "hours": col("hours"), "value_sl": col("value_sl"), "limit": limit,
        "step_level": np.where(is_spread, 1 - FAMILY_ALPHA, 1 - FAMILY_ALPHA / k),
        "min_drop": np.where(is_spread, MIN_DROP_RATIO, MIN_DROP_FRACTION * limit)},
        copy=False)


def _fit_by_group(pts: pd.DataFrame, in_fit: np.ndarray, fams: pd.DataFrame,
                  family_params: pd.DataFrame | None) -> tuple[pd.DataFrame, dict]:
    """``fleetfit.fit_fleet`` of the points in the fits, one pooling group (family, or a
    family's spread) at a time on a large fleet.

    Every step of the fit works within a series or a group, so this gives the same result
    as one call over the fleet while holding only one group's working arrays at a time.
    :returns: the fits and, per point (every row of ``pts``), its step judgement: step
        (False out of the fits), expected and lower_bound (NaN out of the fits).
    """
    marks = {"step": np.zeros(len(pts), dtype=bool), "expected": np.full(len(pts), np.nan),
             "lower_bound": np.full(len(pts), np.nan)}

    def fit(rows: np.ndarray) -> pd.DataFrame:
        fits, steps = fleetfit.fit_fleet(
            _fit_frame(pts, rows, fams), series="series", group="group", x="hours",
            y="value_sl", limit="limit", step_confidence="step_level", min_drop="min_drop",
            family_params=family_params, return_points=True)
        at = np.flatnonzero(rows)
        marks["step"][at] = steps["step"].eq(True).to_numpy()  # a row the fit left out: no
        marks["expected"][at] = steps["expected"].to_numpy(dtype=float)
        marks["lower_bound"][at] = steps["lower_bound"].to_numpy(dtype=float)
        return fits

    groups = pts["group"].to_numpy()
    keys = np.unique(groups[in_fit])
    if in_fit.sum() < FIT_BY_GROUP_ROWS or len(keys) < 2:
        return fit(in_fit), marks
    return pd.concat([fit(in_fit & (groups == key)) for key in keys]).sort_index(), marks


def assess(fr: Frames, as_of: pd.Timestamp, *, horizon_weeks: int = HORIZON_WEEKS,
           family_params: pd.DataFrame | None = None,
           all_findings: bool = False) -> Assessment:
    """Judge every unit in ``fr`` as of ``as_of``.

    :param fr: analysis frames (already cut at ``as_of`` by :func:`fleetdb.frames.load`).
    :param as_of: the moment of the assessment.
    :param horizon_weeks: planning horizon for ``plan``.
    :param family_params: stored family wear statistics (a one-unit refresh pools with
        them instead of recomputing the family); None: pool over the units given.
    :param all_findings: write the sentences of every test (a unit report), not only of
        the latest and the judged test of each unit (a fleet refresh).
    """
    res = _check(fr, all_findings)
    pts = _series_points(fr, res, as_of)
    in_fit = pts["in_fit"].to_numpy(dtype=bool)
    fits, marks = _fit_by_group(pts, in_fit, fr.families, family_params)
    pts = pts.assign(**marks)
    keys = fits.index.to_numpy(dtype=np.int64)
    fits = fits.assign(unit_id=keys // SERIES_STRIDE, cylinder=(keys % SERIES_STRIDE) // 1000,
                       event_seg=keys % 1000)
    current = pts.loc[pts["current"], "series"].unique()
    fits["current"] = fits.index.isin(current)
    params = fleetfit.family_params(fits) if family_params is None else family_params
    units = _unit_table(fr, as_of, fits)
    reasons = _reasons(fr, res, pts, fits, units, as_of, horizon_weeks)
    units = _levels(units, reasons)
    return Assessment(as_of=as_of, units=units, reasons=reasons, checks=res, points=pts,
                      fits=fits, family_params=params)


def _latest(tests: pd.DataFrame, keep: np.ndarray) -> pd.DataFrame:
    """Of the tests where ``keep`` holds, each unit's latest (rows of ``tests``).

    ``frames.load`` gives the tests in unit and time order, so the latest of a unit is
    the last kept row of its run: found without sorting (a unit has one test a moment).
    """
    if not in_unit_time_order(tests):
        return tests[keep].sort_values("tested_at").groupby("unit_id").tail(1)
    rows = np.flatnonzero(keep)
    kept_unit = tests["unit_id"].to_numpy()[rows]
    return tests.iloc[rows[np.r_[kept_unit[1:] != kept_unit[:-1], True]] if len(rows) else rows]


def _not_before(cross: pd.Series, last_x: pd.Series) -> np.ndarray:
    """Crossing hours, moved up to the last test where the trend is already past the limit."""
    c = cross.to_numpy(float)
    return np.where(np.isnan(c), np.nan, np.maximum(c, last_x.to_numpy(float)))


def _unit_table(fr: Frames, as_of: pd.Timestamp, fits: pd.DataFrame) -> pd.DataFrame:
    """Per unit: last test, utilisation and the earliest projected crossing (hours, date)."""
    units = fr.units[["fleet_no", "site", "family", "family_id"]].copy()
    last = _latest(fr.tests, ~fr.tests["voided"].to_numpy(bool))
    units["last_test_id"] = pd.Series(last.index, index=last["unit_id"]).reindex(units.index)
    units["last_tested_at"] = last.set_index("unit_id")["tested_at"].reindex(units.index)
    units["last_hours"] = last.set_index("unit_id")["hours"].reindex(units.index)
    units["hours_per_week"] = _hours_per_week(fr, as_of)
    weeks_since = (as_of - units["last_tested_at"]).dt.total_seconds() / (7 * 86400)
    units["hours_now"] = units["last_hours"] + units["hours_per_week"].fillna(0) * weeks_since
    cur = fits[fits["current"]].copy()
    for col, out in (("cross_point", "projected_hours"), ("cross_planning",
                                                          "projected_hours_early")):
        # A crossing before the last test means the trend is already at the limit then.
        cur[col] = _not_before(cur[col], cur["last_x"])
        units[out] = cur.groupby("unit_id")[col].min().reindex(units.index)

    def to_date(hours: pd.Series) -> pd.Series:
        weeks = (hours - units["hours_now"]) / units["hours_per_week"]
        # Beyond a century either way a date means nothing (and overflows timestamps).
        weeks = weeks.where(weeks.abs() < 52 * 100)
        return (as_of + pd.to_timedelta(weeks * 7, unit="D")).dt.normalize()

    units["projected_date"] = to_date(units["projected_hours"])
    units["projected_date_early"] = to_date(units["projected_hours_early"])
    wear = fits[fits["current"] & (fits["cylinder"] != SPREAD_CYLINDER)]
    units["wear_kpa_per_1000h"] = wear.groupby("unit_id")["slope"].min().reindex(
        units.index) * 1000
    units["interval_days"] = fr.families["test_interval_days"].reindex(
        units["family_id"]).to_numpy()
    # Which version of its family's limits each unit is judged by (frames built by hand
    # may leave it out).
    versions = fr.families.get("limits_version")
    units["limits_version"] = (np.nan if versions is None
                               else versions.reindex(units["family_id"]).to_numpy(float))
    return units


def _reason_rows(unit_ids: Any, code: str, level: str, texts: Any, numbers: Any,
                 test_ids: Any) -> pd.DataFrame:
    unit_ids = np.atleast_1d(np.asarray(unit_ids))
    n = len(unit_ids)

    def many(v: Any) -> list:
        return list(v) if isinstance(v, (list, np.ndarray, pd.Series)) else [v] * n

    def text(v: Any) -> pd.Series:  # plain Python strings: no Arrow string column to build
        return pd.Series(many(v), dtype=object)  # (and take apart again for the snapshot)
    return pd.DataFrame({"unit_id": unit_ids, "code": text(code), "level": text(level),
                         "text": text(texts), "numbers": many(numbers),
                         "test_id": many(test_ids)})


def _fmt_dates(values: pd.Series) -> list[str]:
    """Each day as YYYY-MM-DD, ``unknown`` where missing."""
    days = pd.to_datetime(values)
    return days.dt.strftime("%Y-%m-%d").where(days.notna(), "unknown").tolist()


def _judged_tests(fr: Frames, summ: pd.DataFrame) -> pd.Series:
    """Per unit (index), its judged test: the latest trustworthy, non-voided dry test since
    the last condition-resetting event."""
    tests = fr.tests
    ev = fr.events[fr.events["kind"].isin(RESET_KINDS)]
    last_reset = ev.groupby("unit_id")["date"].max().reindex(tests["unit_id"]).to_numpy()
    judgeable = (summ["trustworthy"].reindex(tests.index).fillna(False).to_numpy(bool)
                 & ~tests["voided"].to_numpy(bool)
                 & summ["dry_min_kpa"].reindex(tests.index).notna().to_numpy()
                 & ~(tests["tested_at"].to_numpy() < last_reset))
    judged = _latest(tests, judgeable)
    return pd.Series(judged.index, index=judged["unit_id"])


def _check(fr: Frames, all_findings: bool) -> checks.CheckResult:
    """Judge every test; write sentences for all, or only for the tests health reads."""
    if all_findings or len(fr.tests) <= ONE_PASS_TESTS:
        return checks.check_tests(fr.families, fr.tests, fr.readings)
    quiet = checks.check_tests(fr.families, fr.tests, fr.readings,
                               findings_for=np.zeros(len(fr.tests), dtype=bool))
    wanted = np.union1d(_judged_tests(fr, quiet.tests).to_numpy(),
                        _latest(fr.tests, ~fr.tests["voided"].to_numpy(bool)).index.to_numpy())
    some = checks.check_tests(fr.families, fr.tests.iloc[positions(fr.tests.index, wanted)],
                              fr.readings[member_mask(fr.readings["test_id"], wanted)])
    return checks.CheckResult(tests=quiet.tests, findings=some.findings)


def _reasons(fr: Frames, res: checks.CheckResult, pts: pd.DataFrame, fits: pd.DataFrame,
             units: pd.DataFrame, as_of: pd.Timestamp, horizon_weeks: int) -> pd.DataFrame:
    tests, summ, findings = fr.tests, res.tests, res.findings
    parts: list[pd.DataFrame] = []
    judged_id = _judged_tests(fr, summ)

    # 1. Limits and patterns of the judged test.
    f = findings[findings["test_id"].isin(judged_id.to_numpy())]
    f_unit = tests["unit_id"].reindex(f["test_id"]).to_numpy()
    for mask, level in ((f["severity"] == "limit", "act"),
                        (f["code"].isin(WATCH_PATTERNS) & (f["severity"] != "limit"), "watch")):
        sel = f[mask.to_numpy()]
        for code, grp in sel.groupby("code", sort=False):
            parts.append(_reason_rows(f_unit[mask.to_numpy()][sel["code"].to_numpy() == code],
                                      code, level, grp["message"].to_numpy(),
                                      grp["numbers"].to_numpy(), grp["test_id"].to_numpy()))

    # 2. The latest test is not trustworthy: a retest, with the reasons why.
    last_id = units["last_test_id"].dropna().astype(int)
    untrusted = last_id[~summ["trustworthy"].reindex(last_id.to_numpy()).fillna(True)
                        .to_numpy(bool)]
    art = findings[findings["test_id"].isin(untrusted.to_numpy())
                   & (findings["severity"].eq("artefact")
                      | findings["code"].isin(ARTEFACT_CODES))]
    art_unit = tests["unit_id"].reindex(art["test_id"]).to_numpy()
    for code in art["code"].unique():
        m = (art["code"] == code).to_numpy()
        parts.append(_reason_rows(art_unit[m], code, "retest", art["message"].to_numpy()[m],
                                  art["numbers"].to_numpy()[m], art["test_id"].to_numpy()[m]))
    silent = untrusted[~untrusted.isin(art["test_id"])]
    if len(silent):
        parts.append(_reason_rows(silent.index.to_numpy(), "retest_untrustworthy", "retest",
                                  "The latest test is not trustworthy; retest.", {},
                                  silent.to_numpy()))

    # 3. Overdue or never tested.
    age = (as_of - units["last_tested_at"]).dt.days
    overdue = units[age > units["interval_days"]]
    if len(overdue):
        parts.append(_reason_rows(
            overdue.index.to_numpy(), "test_overdue", "retest",
            [f"Last tested {t}, {d} days ago; the family's interval is {i} days."
             for t, d, i in zip(_fmt_dates(overdue["last_tested_at"]), age[overdue.index],
                                overdue["interval_days"], strict=True)],
            [{"days_since_test": int(d), "interval_days": int(i)}
             for d, i in zip(age[overdue.index], overdue["interval_days"], strict=True)],
            overdue["last_test_id"].to_numpy()))
    never = units[units["last_tested_at"].isna()]
    if len(never):
        parts.append(_reason_rows(never.index.to_numpy(), "no_test", "retest",
                                  "No test recorded for this unit yet.", {}, None))

    # 4. Sudden drops on the judged test.
    drops = pts[pts["step"] & pts["current"].astype(bool) & pts["test_id"].isin(judged_id)
                & (pts["cylinder"] != SPREAD_CYLINDER)]
    if len(drops):
        texts = [
            f"Cylinder {c} fell to {_psi(v)}, {_psi(e - v)} below its own trend (lower "
            f"bound {_psi(lb)}): a sudden drop, not gradual wear; confirm with a retest, "
            "leak-down or wet test before re-planning."
            for c, v, e, lb in zip(drops["cylinder"], drops["value_sl"], drops["expected"],
                                   drops["lower_bound"], strict=True)]
        numbers = [{"cylinder": int(c), "value_sl": v, "expected": e, "lower_bound": lb}
                   for c, v, e, lb in zip(drops["cylinder"], drops["value_sl"],
                                          drops["expected"], drops["lower_bound"], strict=True)]
        parts.append(_reason_rows(drops["unit_id"].to_numpy(), "sudden_drop", "watch", texts,
                                  numbers, drops["test_id"].to_numpy()))

    # 5. Projected crossing within the horizon.
    horizon = as_of + pd.Timedelta(weeks=horizon_weeks)
    soon = units[units["projected_date_early"].notna() & (units["projected_date_early"]
                                                          <= horizon)]
    if len(soon):
        cur = fits[fits["current"]]
        cur = cur.assign(raw=cur["cross_planning"],
                         cross_planning=_not_before(cur["cross_planning"], cur["last_x"]))
        # The reason names the series that crosses first; of several already at the limit
        # by the last test, the one whose trend got there first; then the lowest key (fits
        # are sorted by it), whatever the order of the work.
        first = (cur[cur["cross_planning"].notna()].sort_values(["cross_planning", "raw"],
                                                                 kind="stable")
                 .groupby("unit_id").head(1).set_index("unit_id").reindex(soon.index))
        # Python floats (tolist), not numpy scalars: the reasons' numbers are made plain
        # JSON values one by one afterwards, and plain floats take the quick way there.
        first_cyl = first["cylinder"].to_numpy(dtype=float).tolist()
        first_slope = first["slope"].to_numpy(dtype=float).tolist()
        first_source = first["slope_source"].to_numpy(dtype=object).tolist()
        early_h = soon["projected_hours_early"].to_numpy(dtype=float).tolist()
        point_h = soon["projected_hours"].to_numpy(dtype=float).tolist()
        last_h = soon["last_hours"].to_numpy(dtype=float).tolist()
        per_week = soon["hours_per_week"].to_numpy(dtype=float).tolist()
        early_d = _fmt_dates(soon["projected_date_early"])
        point_d = _fmt_dates(soon["projected_date"])
        texts, numbers = [], []
        for i in range(len(soon)):
            cyl = int(first_cyl[i])
            what = ("the lowest/highest ratio" if cyl == SPREAD_CYLINDER
                    else f"cylinder {cyl}")
            if early_h[i] <= last_h[i]:
                texts.append(f"The wear trend of {what} is already at its limit by the last "
                             f"test ({last_h[i]:.0f} h). A planning aid, not a "
                             "certification.")
            else:
                texts.append(
                    f"The wear trend of {what} reaches its limit at about "
                    f"{early_h[i]:.0f} h (conservative, 95 %), around "
                    f"{early_d[i]}; best estimate "
                    f"{point_d[i]}. A planning aid, not a "
                    "certification.")
            numbers.append({"cylinder": cyl,
                            "projected_hours": point_h[i],
                            "projected_hours_early": early_h[i],
                            "slope_kpa_per_h": first_slope[i],
                            "slope_source": first_source[i],
                            "hours_per_week": per_week[i]})
        parts.append(_reason_rows(soon.index.to_numpy(), "projected_limit", "plan", texts,
                                  numbers, soon["last_test_id"].to_numpy()))

    # 6. Wearing faster than the family.
    cyl_fits = fits[fits["current"] & (fits["cylinder"] != SPREAD_CYLINDER)]
    k = cyl_fits.groupby("unit_id")["cylinder"].transform("size").to_numpy(float)
    fast = cyl_fits[cyl_fits["family_z"].to_numpy(float)
                    < -special.ndtri(1 - FAMILY_ALPHA / k)]
    if len(fast):
        g = fast.groupby("unit_id").agg(cyls=("cylinder", list), slope=("slope", "min"),
                                        mu=("family_mu", "first"))
        parts.append(_reason_rows(
            g.index.to_numpy(), "wear_faster_than_family", "watch",
            [f"Cylinder(s) {', '.join(map(str, c))} lose {-s * 1000:.1f} kPa per 1000 h, "
             f"significantly faster than the family's {-m * 1000:.1f} kPa per 1000 h."
             for c, s, m in zip(g["cyls"], g["slope"], g["mu"], strict=True)],
            [{"cylinders": c, "slope_kpa_per_h": s, "family_slope_kpa_per_h": m}
             for c, s, m in zip(g["cyls"], g["slope"], g["mu"], strict=True)],
            units["last_test_id"].reindex(g.index).to_numpy()))

    # 7. Close to the minimum on the judged test.
    jmin = summ["dry_min_kpa"].reindex(judged_id.to_numpy()).to_numpy()
    fmin = fr.families["min_compression_kpa"].reindex(
        units["family_id"].reindex(judged_id.index)).to_numpy()
    near = (jmin >= fmin) & (jmin < fmin * NEAR_MINIMUM_FRACTION)
    if near.any():
        parts.append(_reason_rows(
            judged_id.index.to_numpy()[near], "near_minimum", "watch",
            [f"The lowest cylinder reads {_psi(v)} (sea-level equivalent), within 10 % of the "
             f"minimum {_psi(m)}." for v, m in zip(jmin[near], fmin[near], strict=True)],
            [{"lowest_kpa": v, "minimum_kpa": m} for v, m in zip(jmin[near].tolist(),
                                                                 fmin[near].tolist(),
                                                                 strict=True)],
            judged_id.to_numpy()[near]))

    if not parts:
        return pd.DataFrame(columns=["unit_id", "code", "level", "text", "numbers", "test_id"])
    out = pd.concat(parts, ignore_index=True)
    out["numbers"] = [_jsonable(n) for n in out["numbers"]]
    out["rank"] = out["level"].map(LEVEL_RANK)
    out["order"] = out["code"].map(CODE_ORDER).fillna(len(CODE_ORDER))
    return (out.sort_values(["unit_id", "rank", "order"], kind="stable")
            .drop(columns=["rank", "order"]).reset_index(drop=True))


def _levels(units: pd.DataFrame, reasons: pd.DataFrame) -> pd.DataFrame:
    """Each unit's level: the worst of its reasons (``sound`` when it has none)."""
    units = units.copy()
    if reasons.empty:
        units["level"], units["main_code"], units["main_text"] = "sound", None, None
        return units
    first = reasons.groupby("unit_id").head(1).set_index("unit_id")
    units["level"] = first["level"].reindex(units.index).fillna("sound")
    units["main_code"] = first["code"].reindex(units.index)
    units["main_text"] = first["text"].reindex(units.index)
    return units
