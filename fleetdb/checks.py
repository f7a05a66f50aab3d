"""Judge each test on its own: is it trustworthy, and what pattern do its readings show.

Vectorised over many tests at once (the analysis frames of DEVELOPERS.md); ``check_one``
runs the same code on one-row frames. Every limit is a default from :data:`DEFAULTS`
unless the engine family's own service data gives one; each sentence says which.

Rules chosen here (no source fixes them):

* Battery minimum between rows of the D4 table: linear interpolation, clamped at the
  ends (9.6 V from 21 degC up, 8.5 V from -18 degC down); no temperature -> the 21 degC
  row; a 24 V system uses twice the 12 V figure.
* rpm is the primary gate (D4): slow cranking makes a test untrustworthy. A weak battery
  makes it untrustworthy only when no rpm was recorded; with normal rpm it is a note and
  the readings stand. Battery and rpm are judged only on tests that cranked (compression,
  wet, relative or cranking-vacuum readings).
* Cranking vacuum is judged as read (below local ambient): a restriction lowers the charge
  relative to the local barometer, so the altitude shift must not be added to it.
* A cylinder is "low against the others" when it would fail the family's spread rule
  against the median of the other cylinders (their mean for ``ratio_mean``). Single and
  pair patterns count cylinders low against the others or below the family minimum; on an
  untrustworthy or all-low test only those low against the others.
* "All low": every cylinder of a complete test below max(family minimum, 0.85 x expected
  level); the expected level is the family's ``expected_kpa``, else the minimum / 0.75.
* Wet-test calls only for cylinders low on the dry test (every one when all are low); the
  rings rule wins when both rules hold.
* Boundaries pass inclusively (ratio >= min, difference <= max, reading >= minimum) with a
  1e-9 relative tolerance, so a unit conversion cannot flip a boundary value.
* A family ``min_ratio`` equal to the D1 default is reported as the default: the store fills
  0.75 when none is given, so the two cannot be told apart.
* Leak-down findings do not depend on cranking validity (the starter is not used).
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from itertools import repeat
from typing import Any

import numpy as np
import pandas as pd

from fleetdb.atmosphere import compression_to_sea_level, vacuum_to_sea_level
from fleetdb.defaults import (  # noqa: F401 - re-exported for callers of checks
    _BATTERY_ROWS,
    DEFAULTS,
    SOURCE_B,
    SOURCE_C,
    Threshold,
    _battery_name,
    _src,
    _v,
    defaults_table,
)
from fleetdb.errors import InvalidValue
from fleetdb.ids import positions
from fleetdb.units import KPA_PER_UNIT

OVERRIDE_NOTE = ("Every limit is a default; the engine family's own service data overrides it. "
                 "Local regulations apply. fleetdb advises; it does not certify.")
SPARK_FUELS = ("gasoline", "lpg", "cng")
SPREAD_RULES = ("ratio", "diff", "ratio_mean")
FAMILY = "the family's service data"
_PSI, _INHG = KPA_PER_UNIT["psi"], KPA_PER_UNIT["inHg"]
_EPS = 1e-9  # relative tolerance on inclusive boundaries


#: Stable finding codes and what each means.
CODES: dict[str, str] = {
    "weak_battery": "battery volts under crank below the temperature-corrected minimum",
    "slow_cranking": "cranking speed below the minimum: the test is not trustworthy",
    "cold_engine": "a family tested warm was tested cold: the test is not trustworthy",
    "intake_restriction": "cranking vacuum too high: throttle shut or intake blocked",
    "below_minimum": "a cylinder below the family minimum compression",
    "spread_over_limit": "cylinder spread outside the family's spread rule",
    "single_low": "exactly one cylinder low against the others",
    "adjacent_pair_low": "two low cylinders side by side in one bank: head gasket suspected",
    "non_adjacent_pair_low": "two low cylinders not side by side: not a head-gasket pattern",
    "pair_low": "two low cylinders; bank layout unknown, adjacency not judged",
    "all_low_restriction": "every cylinder low with an intake restriction: not wear",
    "all_low_artefact": "every cylinder low with poor test conditions: not wear",
    "all_low_wear": "every cylinder low on a sound test: uniform wear or cam timing",
    "rings_suspected": "wet test rose a lot: rings or bore leaking",
    "valves_suspected": "wet test barely rose: valve or head gasket leaking",
    "wet_test_on_diesel": "a wet reading on a diesel: never add oil to a diesel cylinder",
    "leakdown_fair": "leak-down in the fair band",
    "leakdown_worn": "leak-down in the worn band: investigate",
    "leakdown_fail": "leak-down in the fail band",
    "leakdown_above_median": "leak-down well above the engine's median",
    "relative_low": "relative compression below the flag level",
    "idle_vacuum_low": "idle manifold vacuum (sea-level equivalent) below the band",
}
#: "limit": a limit crossed on a trustworthy test; "artefact": a validity problem.
SEVERITIES = ("limit", "artefact", "pattern", "note")
FINDING_COLUMNS = ["test_id", "code", "severity", "cylinders", "message", "numbers"]
_UNTRUSTED = "; the test is not trustworthy, so this is not counted as wear"


@dataclass(frozen=True)
class CheckResult:
    """Per-test summary (index test_id) and findings, one row per finding."""

    tests: pd.DataFrame
    findings: pd.DataFrame


# ---------------------------------------------------------------- small public helpers


def battery_minimum_v(temp_c: Any, system_volts: Any = 12) -> np.ndarray:
    """Temperature-corrected minimum volts under crank (D4 table, interpolated, clamped).

    :param temp_c: engine temperature(s), degC; NaN uses the 21 degC row.
    :param system_volts: 12 or 24 (24 doubles the 12 V figure).
    """
    rows = sorted(_BATTERY_ROWS)
    temps = np.array([t for t, _ in rows], dtype=float)
    volts = np.array([_v(_battery_name(t)) for t, _ in rows])
    t = np.asarray(temp_c, dtype=float)
    minimum = np.interp(np.where(np.isnan(t), 21.0, t), temps, volts)
    factor = np.where(np.asarray(system_volts, dtype=float) >= 24, _v("battery_24v_factor"), 1.0)
    return minimum * factor


def leakdown_band(percent: Any) -> np.ndarray:
    """Band (good, fair, worn, fail) per leak-down percent; a boundary goes to the worse band.

    :param percent: leak-down value(s), percent.
    """
    p = np.asarray(percent, dtype=float)
    edges = [_v("leakdown_fail_pct"), _v("leakdown_worn_pct"), _v("leakdown_fair_pct")]
    return np.select([p >= e for e in edges], ["fail", "worn", "fair"], "good")


def parse_banks(banks: str) -> list[list[int]]:
    """Cylinder numbers per bank, front to back, from ``"1-3-5/2-4-6"``.

    :param banks: banks split by ``/``, cylinders split by ``-``.
    """
    text = str(banks).replace(" ", "")
    if not re.fullmatch(r"\d+(-\d+)*(/\d+(-\d+)*)*", text):
        raise InvalidValue(f"bank layout {banks!r} is not like '1-2-3-4' or '1-3-5/2-4-6'")
    return [[int(c) for c in bank.split("-")] for bank in text.split("/")]


def adjacent_pairs(banks: str) -> frozenset[tuple[int, int]]:
    """Pairs (lower, higher) of cylinders side by side in the same bank.

    :param banks: the family's bank layout, e.g. ``"1-2-3-4"``.
    """
    return frozenset((min(a, b), max(a, b)) for bank in parse_banks(banks)
                     for a, b in zip(bank, bank[1:], strict=False))


def _sea_level(value: np.ndarray, baro: np.ndarray, kind: pd.Series) -> np.ndarray:
    out = value.astype(float, copy=True)
    pressure = kind.isin(("compression", "wet")).to_numpy()
    vacuum = kind.isin(("vacuum_cranking", "vacuum_idle")).to_numpy()
    out[pressure] = compression_to_sea_level(value[pressure], baro[pressure])
    out[vacuum] = vacuum_to_sea_level(value[vacuum], baro[vacuum])
    return out


def normalise_readings(readings: pd.DataFrame, tests: pd.DataFrame) -> pd.DataFrame:
    """Copy of ``readings`` with ``value_sl``, the sea-level-normalised value.

    compression and wet: value x p0/baro; vacuums: value + (p0 - baro); leak-down and
    relative: unchanged.

    :param readings: readings frame (test_id, kind, cylinder, value).
    :param tests: tests frame indexed by test_id, with ``baro_kpa``.
    """
    baro = tests["baro_kpa"].reindex(readings["test_id"].to_numpy()).to_numpy(dtype=float)
    return readings.assign(value_sl=_sea_level(readings["value"].to_numpy(dtype=float), baro,
                                               readings["kind"]))


# ---------------------------------------------------------------- findings collection


_FIELD = re.compile(r"\{(\w+)(?::([^}]*))?\}")


def _pressure_text(kpa: np.ndarray, spec: str) -> list[str]:
    """'827 kPa (120 psi)' per value, or with spec 'vac' '16.9 kPa (5.0 inHg)'."""
    if spec == "vac":
        return [f"{v:.1f} kPa ({v / _INHG:.1f} inHg)" for v in kpa.tolist()]
    as_text = [np.round(np.nan_to_num(kpa / f)).astype(np.int64).astype(str) for f in (1, _PSI)]
    text = np.strings.add(np.strings.add(as_text[0], " kPa ("), np.strings.add(as_text[1], " psi)"))
    return np.where(np.isnan(kpa), "n/a", text).tolist()


class _Sink:
    """Collects findings; a message is its template filled from the numbers and text.

    Template fields name keys of ``numbers`` or ``text``; a key ending in ``_kpa`` prints
    as kPa and psi (as kPa and inHg with the spec ``vac``).
    """

    def __init__(self, test_ids: np.ndarray, wanted: np.ndarray | None = None):
        self.test_ids = test_ids
        self.wanted = wanted  # per test row: write its findings (None: every test)
        #: No finding is wanted: only the per-test summary is computed.
        self.silent = wanted is not None and not wanted.any()
        self.parts: dict[str, list[np.ndarray]] = {c: [] for c in FINDING_COLUMNS}

    def add(self, rows: np.ndarray, code: str, severity: Any, cylinders: Any, template: str,
            numbers: dict[str, Any], text: dict[str, Any] | None = None) -> None:
        rows = np.asarray(rows)
        m = len(rows)
        if m and self.wanted is not None:
            keep = np.flatnonzero(self.wanted[rows])
            if len(keep) < m:
                def pick(v: Any) -> Any:
                    return np.broadcast_to(np.asarray(v, dtype=object if isinstance(v, str)
                                                      else None), (m,))[keep]
                rows = rows[keep]
                numbers = {k: pick(v) for k, v in numbers.items()}
                text = {k: pick(v) for k, v in (text or {}).items()}
                severity = pick(severity)
                if isinstance(cylinders, np.ndarray):
                    cylinders = cylinders[keep]
                elif cylinders is not None:
                    cylinders = [cylinders[i] for i in keep]
                m = len(rows)
        if m == 0:
            return
        arrays = {k: np.broadcast_to(np.asarray(v), (m,)) for k, v in numbers.items()}
        columns = {k: a.tolist() for k, a in arrays.items()}
        for key, value in (text or {}).items():
            arrays[key] = np.broadcast_to(np.asarray(value, dtype=object), (m,))
        fields = list(dict.fromkeys(_FIELD.findall(template)))
        shown = [_pressure_text(arrays[k].astype(float), spec) if k.endswith("_kpa")
                 else arrays[k].tolist() for k, spec in fields]

        def to_position(field: re.Match[str]) -> str:
            name, spec = field.groups("")
            keep = ":" + spec if spec and not name.endswith("_kpa") else ""
            return "{" + str(fields.index((name, spec))) + keep + "}"

        positional = _FIELD.sub(to_position, template)
        if cylinders is None:
            cylinders = [()] * m
        elif isinstance(cylinders, np.ndarray):
            cylinders = [(int(c),) for c in cylinders]
        part = {"test_id": self.test_ids[rows], "code": np.full(m, code, dtype=object),
                "severity": np.broadcast_to(np.asarray(severity, dtype=object), (m,)),
                "cylinders": cylinders,
                "message": [positional.format(*vals) for vals in zip(*shown, strict=True)]
                if shown else [template] * m,
                "numbers": list(map(dict, map(zip, repeat(list(columns)),
                                              zip(*columns.values(), strict=True))))}
        for name, values in part.items():
            self.parts[name].append(np.fromiter(values, dtype=object, count=m)
                                    if name != "test_id" else values)

    def frame(self) -> pd.DataFrame:
        empty = [np.empty(0, dtype=object)]
        cols = {c: np.concatenate(v or empty) for c, v in self.parts.items()}
        rank = {c: i for i, c in enumerate(CODES)}
        order = np.lexsort(([rank[c] for c in cols["code"]], cols["test_id"]))
        out = {c: (v[order] if c == "test_id" else pd.Series(v[order], dtype=object))
               for c, v in cols.items()}
        return pd.DataFrame(out, columns=FINDING_COLUMNS)


# ---------------------------------------------------------------- vectorised core


def _wide(rows: np.ndarray, cyl: np.ndarray, values: np.ndarray, n: int, k: int) -> np.ndarray:
    """Tests x cylinders matrix (NaN where not measured); a repeated reading keeps the highest."""
    flat = np.full(n * k, np.nan)
    ok = (cyl >= 1) & (cyl <= k) & ~np.isnan(values)
    at, values = rows[ok] * k + cyl[ok].astype(np.int64) - 1, values[ok]
    flat[at] = values
    repeated = np.bincount(at, minlength=n * k)[at] > 1  # rare: fmax.at only where needed
    flat[at[repeated]] = np.nan
    np.fmax.at(flat, at[repeated], values[repeated])
    return flat.reshape(n, k)


def _per_test(rows: np.ndarray, values: np.ndarray, n: int, how: str) -> np.ndarray:
    """Max or mean of values per test row (NaN where a test has none)."""
    ok = ~np.isnan(values)
    if how == "max":
        out = np.full(n, np.nan)
        np.fmax.at(out, rows[ok], values[ok])
        return out
    count = np.bincount(rows[ok], minlength=n)
    total = np.bincount(rows[ok], weights=values[ok], minlength=n)
    return np.divide(total, count, out=np.full(n, np.nan), where=count > 0)


def _median_of_others(mat: np.ndarray) -> np.ndarray:
    """For each cell, the median of the other measured cells of its row (NaN if none)."""
    n, k = mat.shape
    valid = ~np.isnan(mat)
    others = valid.sum(axis=1) - 1
    order = np.argsort(mat, axis=1)  # NaN sorts last
    ordered = np.take_along_axis(mat, order, axis=1)
    rank = np.empty_like(order)
    np.put_along_axis(rank, order, np.broadcast_to(np.arange(k), (n, k)), axis=1)
    lo, hi = ((others - 1) // 2)[:, None], (others // 2)[:, None]
    # the i-th smallest of the others is the (i + [i >= own rank])-th smallest of the row
    lo_at = np.clip(lo + (lo >= rank), 0, k - 1)
    hi_at = np.clip(hi + (hi >= rank), 0, k - 1)
    med = (np.take_along_axis(ordered, lo_at, 1) + np.take_along_axis(ordered, hi_at, 1)) / 2
    return np.where(valid & (others[:, None] >= 1), med, np.nan)


def _column(frame: pd.DataFrame, name: str) -> np.ndarray:
    if name not in frame:
        return np.full(len(frame), np.nan)
    return frame[name].to_numpy(dtype=float, na_value=np.nan)


def _flag(frame: pd.DataFrame, name: str, default: bool) -> np.ndarray:
    if name not in frame:
        return np.full(len(frame), default)
    return frame[name].astype("boolean").fillna(default).to_numpy(dtype=bool)


def _family_params(tests: pd.DataFrame, families: pd.DataFrame) -> dict[str, np.ndarray]:
    """The family's values for each test, defaults filled, and whether each is the family's."""
    at = families.index.get_indexer(tests["family_id"].to_numpy())
    if (at < 0).any():
        raise InvalidValue("tests refer to unknown engine families: "
                           f"{sorted(set(tests['family_id'].to_numpy()[at < 0].tolist()))[:5]}")
    fuel = families["fuel"].astype(str).str.lower().to_numpy(dtype=object)
    diesel = (fuel == "diesel")[at]
    rule = families["spread_rule"].fillna("ratio").astype(str).map(
        {r: i for i, r in enumerate(SPREAD_RULES)}).fillna(0).to_numpy(dtype=int)
    max_diff = _column(families, "max_diff_kpa")
    rule = np.where((rule == 1) & np.isnan(max_diff), 0, rule)
    ratio, rpm = _column(families, "min_ratio")[at], _column(families, "min_crank_rpm")[at]
    expected = _column(families, "expected_kpa")[at]
    min_kpa = _column(families, "min_compression_kpa")[at]
    volts = _column(families, "system_volts")[at]
    banks = (families["banks"].astype(object).where(families["banks"].notna(), None)
             if "banks" in families else pd.Series([None] * len(families)))
    ratio_family = ~np.isnan(ratio) & (ratio != _v("spread_min_ratio"))
    return {
        "at": at, "banks_by_family": banks.to_numpy(dtype=object), "diesel": diesel,
        "spark": np.isin(fuel, SPARK_FUELS)[at], "rule": rule[at], "max_diff": max_diff[at],
        "cylinders": np.nan_to_num(_column(families, "cylinders"), nan=0.0)[at],
        "min_kpa": min_kpa, "ratio_family": ratio_family,
        "min_ratio": np.where(ratio_family, ratio, _v("spread_min_ratio")),
        "rpm_family": ~np.isnan(rpm),
        "min_rpm": np.where(~np.isnan(rpm), rpm, np.where(
            diesel, _v("min_crank_rpm_diesel"), _v("min_crank_rpm_spark"))),
        "expected_family": ~np.isnan(expected),
        "expected": np.where(np.isnan(expected), min_kpa / _v("expected_from_minimum"), expected),
        "warm_test": _flag(families, "warm_test", True)[at],
        "system_volts": np.where(np.isnan(volts), 12.0, volts),
    }


def check_tests(families: pd.DataFrame, tests: pd.DataFrame,
                readings: pd.DataFrame, *,
                findings_for: np.ndarray | None = None) -> CheckResult:
    """Judge every test on its own: validity, then patterns, all vectorised.

    :param families: engine families indexed by family_id (DEVELOPERS.md "Analysis frames");
        an optional ``expected_kpa`` column gives the expected healthy level.
    :param tests: tests indexed by test_id.
    :param readings: readings with test_id, kind, cylinder, value.
    :param findings_for: boolean per test (in ``tests`` order): write findings only for
        these (a fleet refresh needs sentences for the latest tests only); the per-test
        summary always covers every test.
    :returns: per-test summary (index test_id) and findings, one row per finding.
    """
    fp = _family_params(tests, families)
    n = len(tests)
    rows = positions(tests.index, readings["test_id"].to_numpy())
    known = rows >= 0
    rd = readings[known] if not known.all() else readings
    rows = rows[known]
    raw = rd["value"].to_numpy(dtype=float)
    val = _sea_level(raw, tests["baro_kpa"].to_numpy(dtype=float)[rows], rd["kind"])
    cyl = rd["cylinder"].to_numpy(dtype=float, na_value=np.nan)
    k = max(int(np.nanmax(cyl, initial=0)), 1) if len(cyl) else 1
    of = {name: (rd["kind"] == name).to_numpy() for name in
          ("compression", "wet", "leakdown", "relative", "vacuum_cranking", "vacuum_idle")}
    dry = _wide(rows[of["compression"]], cyl[of["compression"]], val[of["compression"]], n, k)
    wet = _wide(rows[of["wet"]], cyl[of["wet"]], val[of["wet"]], n, k)
    sink = _Sink(tests.index.to_numpy(),
                 None if findings_for is None else np.asarray(findings_for, dtype=bool))

    validity = _validity(tests, fp, rows, raw, of, sink)
    summary = _compression(dry, wet, fp, validity, sink)
    summary.index = tests.index
    if sink.silent:  # the summary alone: no sentences wanted
        return CheckResult(tests=summary, findings=sink.frame())
    _leakdown(rows[of["leakdown"]], cyl[of["leakdown"]], val[of["leakdown"]], sink)
    _relative(rows[of["relative"]], cyl[of["relative"]], val[of["relative"]], n, sink)
    idle_sl = _per_test(rows[of["vacuum_idle"]], val[of["vacuum_idle"]], n, "mean")
    idle_raw = _per_test(rows[of["vacuum_idle"]], raw[of["vacuum_idle"]], n, "mean")
    hit = np.flatnonzero(fp["spark"] & (idle_sl < DEFAULTS["idle_vacuum_min"].kpa))
    sink.add(hit, "idle_vacuum_low", "pattern", None,
             "Idle manifold vacuum is {vacuum_sl_kpa:vac} at sea level ({vacuum_kpa:vac} as read), "
             "below the {limit_kpa:vac} expected of a warm spark-ignition engine ({src}): look for "
             "a vacuum leak, late ignition or valve timing, or worn rings.",
             {"vacuum_sl_kpa": idle_sl[hit], "vacuum_kpa": idle_raw[hit],
              "limit_kpa": DEFAULTS["idle_vacuum_min"].kpa}, {"src": _src("idle_vacuum_min")})
    return CheckResult(tests=summary, findings=sink.frame())


def _validity(tests: pd.DataFrame, fp: dict[str, np.ndarray], rows: np.ndarray, raw: np.ndarray,
              of: dict[str, np.ndarray], sink: _Sink) -> dict[str, np.ndarray]:
    """Battery, cranking speed, engine temperature and intake restriction per test."""
    n = len(tests)
    cranked, any_reading = np.zeros(n, dtype=bool), np.zeros(n, dtype=bool)
    cranked[rows[of["compression"] | of["wet"] | of["relative"] | of["vacuum_cranking"]]] = True
    any_reading[rows] = True
    volts, rpm = _column(tests, "battery_v"), _column(tests, "crank_rpm")
    temp = _column(tests, "engine_temp_c")
    minimum_v = battery_minimum_v(temp, fp["system_volts"])
    rpm_missing = np.isnan(rpm)
    slow = cranked & (rpm < fp["min_rpm"])
    weak = cranked & (volts < minimum_v * (1 - _EPS))
    cold = any_reading & fp["warm_test"] & (temp < _v("warm_min_temp_c"))
    throttle_open = _flag(tests, "throttle_open", False)
    vacuum = _per_test(rows[of["vacuum_cranking"]], raw[of["vacuum_cranking"]], n, "max")
    open_limit = DEFAULTS["cranking_vacuum_max_throttle_open"]
    limit = np.where(throttle_open, open_limit.kpa, DEFAULTS["cranking_vacuum_max"].kpa)
    restricted = fp["spark"] & (vacuum > limit)
    battery_artefact = weak & rpm_missing
    found = {"slow": slow, "weak": weak, "cold": cold, "restricted": restricted,
             "battery_artefact": battery_artefact,
             "trustworthy": ~(slow | cold | restricted | battery_artefact)}
    if sink.silent:
        return found

    hit = np.flatnonzero(weak)
    src = np.where(fp["system_volts"][hit] >= 24, f"{_src(_battery_name(21))}; x2 for 24 V, "
                   f"{SOURCE_C}", _src(_battery_name(21)))
    outcome = np.select(
        [rpm_missing[hit], slow[hit]],
        ["no cranking speed was recorded, so the readings cannot be trusted: charge the battery "
         "and retest, recording rpm", "this explains the slow cranking: charge or replace the "
         "battery and retest"],
        "cranking speed was normal, so the readings stand: charge or load-test the battery")
    sink.add(hit, "weak_battery", np.where((battery_artefact | slow)[hit], "artefact", "note"),
             None, "The battery held {battery_v:.1f} V while cranking, below the {min_v:.1f} V "
             "minimum at {at} ({src}); {outcome}.",
             {"battery_v": volts[hit], "min_v": minimum_v[hit], "engine_temp_c": temp[hit],
              "system_volts": fp["system_volts"][hit], "crank_rpm": rpm[hit]},
             {"src": src, "outcome": outcome, "at": [
                 "21 degC (no engine temperature recorded)" if np.isnan(t) else f"{t:.0f} degC"
                 for t in temp[hit]]})
    hit = np.flatnonzero(slow)
    src = np.where(fp["rpm_family"][hit], FAMILY, np.where(
        fp["diesel"][hit], _src("min_crank_rpm_diesel"), _src("min_crank_rpm_spark")))
    sink.add(hit, "slow_cranking", "artefact", None,
             "The engine cranked at {crank_rpm:.0f} rpm, below the {min_rpm:.0f} rpm minimum "
             "({src}); slow cranking lowers every reading, so repair it (battery, starter) and "
             "retest.", {"crank_rpm": rpm[hit], "min_rpm": fp["min_rpm"][hit],
                         "limit_source": np.where(fp["rpm_family"][hit], "family", "default")},
             {"src": src})
    hit = np.flatnonzero(cold)
    sink.add(hit, "cold_engine", "artefact", None,
             "The engine was at {engine_temp_c:.0f} degC, below {min_temp_c:.0f} degC ({src}), "
             "and this family is tested warm ({family}); a cold engine reads low, so warm it up "
             "and retest.", {"engine_temp_c": temp[hit], "min_temp_c": _v("warm_min_temp_c")},
             {"src": _src("warm_min_temp_c"), "family": FAMILY})
    hit = np.flatnonzero(restricted)
    sink.add(hit, "intake_restriction", "artefact", None,
             "Manifold vacuum while cranking was {vacuum_kpa:vac}, above {limit_kpa:vac} {how} "
             "({src}): the throttle stayed shut or the intake is blocked, so every reading of this "
             "test is suspect; retest with a verified open intake.",
             {"vacuum_kpa": vacuum[hit], "limit_kpa": limit[hit],
              "throttle_open": throttle_open[hit]},
             {"how": np.where(throttle_open[hit], "with the throttle held open", "while cranking"),
              "src": np.where(throttle_open[hit], _src(open_limit.name),
                              _src("cranking_vacuum_max"))})
    return found


def _compression(dry: np.ndarray, wet: np.ndarray, fp: dict[str, np.ndarray],
                 validity: dict[str, np.ndarray], sink: _Sink) -> pd.DataFrame:
    """Dry compression limits and patterns, wet-test calls; returns the per-test summary."""
    valid = ~np.isnan(dry)
    count = valid.sum(axis=1)
    has = count > 0
    as_low = np.where(valid, dry, np.inf)
    low_i = as_low.argmin(axis=1)
    lowest = np.where(has, as_low.min(axis=1), np.nan)
    highest = np.where(has, np.where(valid, dry, -np.inf).max(axis=1), np.nan)
    # Summed column by column, left to right: the same float sum however many cylinders
    # the widest engine in the frame has (numpy's row sum groups its additions by the row's
    # width, so a 4-cylinder test summed beside 8-cylinder ones could differ in the last bit).
    total = np.zeros(len(count))
    for column in np.where(valid, dry, 0.0).T:
        total += column
    mean = np.divide(total, count, out=np.full(len(count), np.nan), where=has)
    ratio = np.divide(lowest, highest, out=np.full(len(count), np.nan), where=has)
    spread = highest - lowest
    trust = validity["trustworthy"]
    level = np.fmax(fp["min_kpa"], _v("all_low_fraction") * fp["expected"])
    all_low = (count >= np.maximum(2, fp["cylinders"])) & (highest < level)
    summary = pd.DataFrame({
        "trustworthy": trust, "weak_battery": validity["weak"], "slow_cranking": validity["slow"],
        "cold_engine": validity["cold"], "intake_restriction": validity["restricted"],
        "cylinders_measured": count, "dry_min_kpa": lowest, "dry_max_kpa": highest,
        "dry_mean_kpa": mean, "dry_ratio": ratio, "dry_spread_kpa": spread,
        "lowest_cylinder": pd.Series(low_i + 1, dtype="Int64").where(has).array,
        "all_low": all_low})
    if sink.silent:
        return summary
    rule, mr, md = fp["rule"], fp["min_ratio"], fp["max_diff"]

    def limit_text(hit: np.ndarray) -> dict[str, Any]:
        return {"untrusted": np.where(trust[hit], "", _UNTRUSTED)}

    min_low = valid & (dry < (fp["min_kpa"] * (1 - _EPS))[:, None])
    r, c = np.nonzero(min_low)
    sink.add(r, "below_minimum", np.where(trust[r], "limit", "note"), c + 1,
             "Cylinder {cylinder} reads {value_kpa} normalised to sea level, below the minimum of "
             "{limit_kpa} from the family's service data{untrusted}.",
             {"cylinder": c + 1, "value_kpa": dry[r, c], "limit_kpa": fp["min_kpa"][r]},
             limit_text(r))

    fail = (count >= 2) & np.select(
        [rule == 1, rule == 2], [spread > md * (1 + _EPS), lowest < mr * mean * (1 - _EPS)],
        ratio < mr * (1 - _EPS))
    templates = (
        "The lowest cylinder, {cylinder}, reads {min_kpa}: {ratio:.2f} of the highest ({max_kpa}),"
        " below the {min_ratio:.2f} allowed ({src}){untrusted}.",
        "The highest ({max_kpa}) and lowest (cylinder {cylinder}, {min_kpa}) differ by "
        "{spread_kpa}, more than the {max_diff_kpa} allowed ({src}){untrusted}.",
        "The lowest cylinder, {cylinder}, reads {min_kpa}: {mean_ratio:.2f} of the engine mean "
        "({mean_kpa}), below the {min_ratio:.2f} allowed ({src}){untrusted}.")
    for code, template in enumerate(templates):
        hit = np.flatnonzero(fail & (rule == code))
        family = fp["ratio_family"][hit] | (code == 1)
        sink.add(hit, "spread_over_limit", np.where(trust[hit], "limit", "note"), low_i[hit] + 1,
                 template, {"rule": SPREAD_RULES[code], "cylinder": low_i[hit] + 1,
                            "min_kpa": lowest[hit], "max_kpa": highest[hit], "mean_kpa": mean[hit],
                            "ratio": ratio[hit], "mean_ratio": lowest[hit] / mean[hit],
                            "spread_kpa": spread[hit], "min_ratio": mr[hit],
                            "max_diff_kpa": md[hit],
                            "limit_source": np.where(family, "family", "default")},
                 {**limit_text(hit), "src": np.where(family, FAMILY, _src("spread_min_ratio"))})

    # which cylinders are low against the others (possible only where lowest and highest are
    # far enough apart, so the reference is computed there only), and is every cylinder low
    maybe = (count >= 2) & (min_low.any(axis=1) | np.where(
        rule == 1, spread > md * (1 + _EPS), lowest < mr * highest * (1 - _EPS)))
    reference = np.full(dry.shape, np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_others = (total[maybe, None] - dry[maybe]) / (count[maybe, None] - 1)
    reference[maybe] = np.where((rule[maybe] == 2)[:, None], mean_others,
                                _median_of_others(dry[maybe]))
    rel_low = valid & np.where((rule == 1)[:, None], reference - dry > (md * (1 + _EPS))[:, None],
                               dry < mr[:, None] * reference * (1 - _EPS))
    rel_limit = np.where((rule == 1)[:, None], reference - md[:, None], mr[:, None] * reference)
    _pairs_and_single(rel_low | (min_low & (trust & ~all_low)[:, None]), rel_low, dry, reference,
                      rel_limit, highest, fp, sink)

    causes = np.full(len(count), "", dtype=object)
    for i in np.flatnonzero(all_low):  # a few tests: name the poor conditions
        causes[i] = "; ".join(name for name, key in (("slow cranking", "slow"), (
            "cold engine", "cold"), ("weak battery", "battery_artefact")) if validity[key][i])
    code = np.select([validity["restricted"], causes != ""],
                     ["all_low_restriction", "all_low_artefact"], "all_low_wear")
    tails = {"all_low_restriction": ("artefact", "and the cranking vacuum shows an intake "
                                     "restriction: this is not wear; retest with a verified open "
                                     "intake."),
             "all_low_artefact": ("artefact", "while the test conditions were poor ({causes}): "
                                  "this is not wear; fix the conditions and retest."),
             "all_low_wear": ("pattern", "on a sound test: uniform ring and bore wear, or retarded "
                              "cam timing; a wet test tells them apart (oil helps worn rings).")}
    for name, (severity, tail) in tails.items():
        hit = np.flatnonzero(all_low & (code == name))
        measured = [tuple((np.flatnonzero(valid[i]) + 1).tolist()) for i in hit]
        sink.add(hit, name, severity, measured,
                 "Every cylinder is low: the highest reads {max_kpa}, under {level_kpa} (the "
                 "larger of the family minimum and {fraction:.2f} x the expected {expected_kpa} "
                 "from {src}) " + tail,
                 {"min_kpa": lowest[hit], "max_kpa": highest[hit], "level_kpa": level[hit],
                  "expected_kpa": fp["expected"][hit], "fraction": _v("all_low_fraction"),
                  "causes": causes[hit]},
                 {"src": np.where(fp["expected_family"][hit], FAMILY,
                                  _src("expected_from_minimum"))})

    _wet(dry, wet, rel_low | min_low | all_low[:, None], fp, sink)
    return summary


def _wet(dry: np.ndarray, wet: np.ndarray, low: np.ndarray, fp: dict[str, np.ndarray],
         sink: _Sink) -> None:
    """Wet test: warn on diesels; else rings or valves on cylinders that were low dry."""
    has_wet = ~np.isnan(wet)
    hit = np.flatnonzero(fp["diesel"] & has_wet.any(axis=1))
    sink.add(hit, "wet_test_on_diesel", "note",
             [tuple((np.flatnonzero(has_wet[i]) + 1).tolist()) for i in hit],
             "A wet (oil-added) reading was recorded on a diesel: never add oil to a diesel "
             "cylinder (a medium-duty truck diesel service procedure warns of extensive engine "
             "damage; hydraulic lock); the wet readings are not used.",
             {"wet_readings": has_wet[hit].sum(axis=1)})
    eligible = has_wet & ~np.isnan(dry) & ~fp["diesel"][:, None] & low
    if not eligible.any():  # most fleets' tests have no wet readings
        return
    rise = wet - dry
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = rise / dry
    rings = eligible & ((frac >= _v("wet_rise_rings_fraction") * (1 - _EPS))
                        | (rise >= DEFAULTS["wet_rise_rings_psi"].kpa * (1 - _EPS)))
    valves = eligible & ~rings & (frac < _v("wet_rise_valves_fraction"))
    tails = {"rings_suspected": (rings, "at least {rings:.0%} of dry or {rings_psi:g} psi ({src}): "
                                 "the rings or bore are likely leaking."),
             "valves_suspected": (valves, "under {valves:.0%} ({src}): a valve or the head gasket "
                                  "is likely leaking (a low neighbour points to the gasket).")}
    for name, (mask, tail) in tails.items():
        r, c = np.nonzero(mask)
        sink.add(r, name, "pattern", c + 1, "Cylinder {cylinder} rose from {dry_kpa} dry to "
                 "{wet_kpa} with oil ({rise_fraction:+.1%}), " + tail,
                 {"cylinder": c + 1, "dry_kpa": dry[r, c], "wet_kpa": wet[r, c],
                  "rise_kpa": rise[r, c], "rise_fraction": frac[r, c]},
                 {"src": _src("wet_rise_rings_fraction"), "rings": _v("wet_rise_rings_fraction"),
                  "valves": _v("wet_rise_valves_fraction"), "rings_psi": _v("wet_rise_rings_psi")})


def _pairs_and_single(low: np.ndarray, rel_low: np.ndarray, dry: np.ndarray,
                      reference: np.ndarray, rel_limit: np.ndarray, highest: np.ndarray,
                      fp: dict[str, np.ndarray], sink: _Sink) -> None:
    """single_low and the pair patterns; adjacency from the family's bank layout."""
    k = low.shape[1]
    n_low = low.sum(axis=1)
    first, last = low.argmax(axis=1), k - 1 - low[:, ::-1].argmax(axis=1)

    def spread_src(rows: np.ndarray) -> np.ndarray:
        return np.where(fp["ratio_family"][rows] | (fp["rule"][rows] == 1), FAMILY,
                        _src("spread_min_ratio"))

    hit = np.flatnonzero(n_low == 1)
    c = first[hit]
    by_spread = rel_low[hit, c]
    sink.add(hit, "single_low", "pattern", c + 1,
             "Only cylinder {cylinder} is low: {value_kpa} against {others_kpa} for the others, "
             "under {limit_kpa} ({basis}, {src}); suspect a valve not sealing or a ring problem: "
             "follow with a wet or leak-down test.",
             {"cylinder": c + 1, "value_kpa": dry[hit, c], "others_kpa": reference[hit, c],
              "limit_kpa": np.where(by_spread, rel_limit[hit, c], fp["min_kpa"][hit])},
             {"basis": np.where(by_spread, "the family's spread rule against the others",
                                "the family minimum"),
              "src": np.where(by_spread, spread_src(hit), FAMILY)})

    # adjacency keys built per family (a handful), not per test
    banks = fp["banks_by_family"]
    keys = [(f * (k + 1) + a) * (k + 1) + b for f, layout in enumerate(banks) if layout is not None
            for a, b in adjacent_pairs(layout)]
    known = np.array([layout is not None for layout in banks], dtype=bool)
    hit = np.flatnonzero(n_low == 2)
    a, b, fam = first[hit] + 1, last[hit] + 1, fp["at"][hit]
    adjacent = np.isin((fam * (k + 1) + a) * (k + 1) + b, keys)
    pair_code = np.where(~known[fam], "pair_low",
                         np.where(adjacent, "adjacent_pair_low", "non_adjacent_pair_low"))
    advice = {"adjacent_pair_low": "sit side by side in the same bank ({banks}): suspect the head "
              "gasket between them (or a distorted head); look for oil in the coolant or coolant "
              "in the oil, and leak-down both.",
              "non_adjacent_pair_low": "are not side by side in the same bank ({banks}), so this "
              "is not a head-gasket pattern: check each cylinder on its own.",
              "pair_low": "may or may not be neighbours: the family's bank layout is not "
              "recorded, so a head-gasket pattern cannot be judged."}
    for name, tail in advice.items():
        sel = pair_code == name
        rows, x, y = hit[sel], a[sel], b[sel]
        sink.add(rows, name, "pattern", list(zip(x.tolist(), y.tolist(), strict=True)),
                 "Cylinders {cylinder_a} and {cylinder_b} are low ({value_a_kpa} and "
                 "{value_b_kpa} against a highest of {max_kpa}; by the spread rule ({src}) or "
                 "the family minimum) and " + tail,
                 {"cylinder_a": x, "cylinder_b": y, "value_a_kpa": dry[rows, x - 1],
                  "value_b_kpa": dry[rows, y - 1], "max_kpa": highest[rows],
                  "banks": banks[fam[sel]]}, {"src": spread_src(rows)})


def _leakdown(rows: np.ndarray, cyl: np.ndarray, pct: np.ndarray, sink: _Sink) -> None:
    """Leak-down bands (D5) and the above-median flag."""
    order = np.lexsort((cyl, rows))
    rows, cyl, pct = rows[order], cyl[order], pct[order]
    band = leakdown_band(pct)
    fair, worn, fail = (_v(f"leakdown_{b}_pct") for b in ("fair", "worn", "fail"))
    bands = {"fair": ("note", f"{fair:g}-{worn:g} %", "acceptable, keep watching"),
             "worn": ("pattern", f"{worn:g}-{fail:g} %", "worn: find where the air escapes"),
             "fail": ("limit", f"{fail:g} % or more", "fail: find where the air escapes before "
                      "the engine goes back to work")}
    for name, (severity, span, advice) in bands.items():
        i = np.flatnonzero(band == name)
        sink.add(rows[i], f"leakdown_{name}", severity, cyl[i].astype(int),
                 "Cylinder {cylinder} leaks {leak_pct:g} %, in the {span} band ({src}; leak-down "
                 "figures depend on the tester): {advice}.",
                 {"cylinder": cyl[i].astype(int), "leak_pct": pct[i], "band": name},
                 {"span": span, "advice": advice, "src": _src("leakdown_fair_pct")})
    median = pd.Series(pct).groupby(rows).transform("median").to_numpy()
    excess = _v("leakdown_median_excess_pct")
    i = np.flatnonzero(pct - median > excess)
    sink.add(rows[i], "leakdown_above_median", "pattern", cyl[i].astype(int),
             "Cylinder {cylinder} leaks {leak_pct:g} %, more than {excess:g} points above this "
             "engine's median of {median_pct:g} % ({src}): it is the odd one out.",
             {"cylinder": cyl[i].astype(int), "leak_pct": pct[i], "median_pct": median[i],
              "excess": excess}, {"src": _src("leakdown_median_excess_pct")})


def _relative(rows: np.ndarray, cyl: np.ndarray, values: np.ndarray, n: int, sink: _Sink) -> None:
    """Relative compression below the flag level (D10), re-based so the strongest is 100 %."""
    order = np.lexsort((cyl, rows))
    rows, cyl, values = rows[order], cyl[order], values[order]
    with np.errstate(invalid="ignore", divide="ignore"):
        rel = 100.0 * values / _per_test(rows, values, n, "max")[rows]
    i = np.flatnonzero(rel < _v("relative_min_pct"))
    sink.add(rows[i], "relative_low", "pattern", cyl[i].astype(int),
             "Cylinder {cylinder} shows {relative_pct:.0f} % relative compression (strongest = "
             "100 %), below {limit_pct:g} % ({src}): confirm with a gauge test.",
             {"cylinder": cyl[i].astype(int), "relative_pct": rel[i],
              "limit_pct": _v("relative_min_pct")}, {"src": _src("relative_min_pct")})


def check_one(family: Mapping[str, Any], test: Mapping[str, Any],
              readings: pd.DataFrame | Iterable[Mapping[str, Any]], *,
              test_id: int = 0) -> CheckResult:
    """Judge one test (log form, CLI): the vectorised path on one-row frames.

    :param family: one families row (a Series or a dict with the frame's columns).
    :param test: one tests row (battery_v, crank_rpm, engine_temp_c, baro_kpa, throttle_open).
    :param readings: that test's readings (kind, cylinder, value), a frame or a list of dicts.
    :param test_id: the id the test carries in the results.
    """
    families = pd.DataFrame([dict(family)], index=pd.Index([0], name="family_id"))
    row = {key: value for key, value in dict(test).items() if key != "test_id"}
    tests = pd.DataFrame([{**row, "family_id": 0}], index=pd.Index([test_id], name="test_id"))
    frame = readings if isinstance(readings, pd.DataFrame) else pd.DataFrame(list(readings))
    frame = frame.reindex(columns=["kind", "cylinder", "value"]).assign(test_id=test_id)
    return check_tests(families, tests, frame)
