"""Vectorised checks of import rows, with a precise message per problem.

Every function takes a frame of typed text (index = line number in the file) and returns
clean, typed columns plus the problems found. Nothing here touches the database: the
reference data (known units, their families) comes in as frames.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
import pandas as pd

from fleetdb.errors import Problem
from fleetdb.models import (
    CYLINDER_KINDS,
    EVENT_KINDS,
    READING_KINDS,
    VACUUM_KINDS,
    EngineFamily,
    Reading,
    ServiceEvent,
    Site,
    Test,
    Unit,
)
from fleetdb.units import _ALIASES, KPA_PER_UNIT

MAX_LINES_PER_PROBLEM = 20

#: Plausible ranges, SI. A value outside is refused as physically impossible or a typo.
MAX_COMPRESSION_KPA = 7000.0  # about 1015 psi: the top of a diesel compression gauge
MAX_VACUUM_KPA = 110.0  # no vacuum exceeds the ambient pressure
CONDITION_RANGES: dict[str, tuple[float, float, str]] = {
    "battery_v": (0.0, 40.0, "volts under crank"),
    "crank_rpm": (0.0, 3000.0, "cranking rpm"),
    "engine_temp_c": (-60.0, 150.0, "engine temperature in °C"),
    "baro_kpa": (50.0, 110.0, "absolute barometer in kPa"),
}
PRESSURE_UNITS_BY_KIND: dict[str, tuple[str, ...]] = {
    "compression": ("psi", "kPa", "bar", "MPa"),
    "wet": ("psi", "kPa", "bar", "MPa"),
    "vacuum_cranking": ("inHg", "mmHg", "kPa"),
    "vacuum_idle": ("inHg", "mmHg", "kPa"),
    "leakdown": ("%",),
    "relative": ("%",),
}
#: Longest text the store keeps, from the column types in fleetdb.models.
_TYPED_VALUE_MAX = Reading.__table__.c.typed_value.type.length
_TECHNICIAN_MAX = Test.__table__.c.technician.type.length
_NOTE_MAX = Test.__table__.c.note.type.length
_EVENT_NOTE_MAX = ServiceEvent.__table__.c.note.type.length
_NAME_MAX = {"fleet_no": Unit.__table__.c.fleet_no.type.length,
             "site": Site.__table__.c.name.type.length,
             "engine_family": EngineFamily.__table__.c.name.type.length}
#: Earliest date accepted anywhere (tests, events, in-service dates).
EARLIEST_DATE = pd.Timestamp("1900-01-01")
_YES = {"yes", "y", "true", "1", "open", "wot"}
_NO = {"no", "n", "false", "0", "closed", "shut"}


class Problems:
    """Collects problems from boolean masks, a few lines each, in file order."""

    def __init__(self, source: str):
        self.source = source
        self.items: list[Problem] = []

    def add(self, mask: pd.Series, field: str | None,
            message: str | Callable[[int], str]) -> None:
        """Record a problem on every line where ``mask`` is true.

        :param mask: boolean Series indexed by line number.
        :param field: the column at fault.
        :param message: a sentence, or a function of the line number giving one.
        """
        lines = mask.index[mask.to_numpy(dtype=bool, na_value=False)]
        for line in lines[:MAX_LINES_PER_PROBLEM]:
            text = message(line) if callable(message) else message
            self.items.append(Problem(self.source, int(line), field, text))
        if len(lines) > MAX_LINES_PER_PROBLEM:
            extra = len(lines) - MAX_LINES_PER_PROBLEM
            self.items.append(Problem(self.source, None, field,
                                      f"... and {extra} more line(s) with the same problem"))

    def one(self, line: int | None, field: str | None, message: str) -> None:
        """Record a single problem."""
        self.items.append(Problem(self.source, line, field, message))

    def __bool__(self) -> bool:
        return bool(self.items)

    def sorted(self) -> list[Problem]:
        """Problems in file order."""
        return sorted(self.items, key=lambda p: (p.line is None, p.line or 0))


def number(frame: pd.DataFrame, col: str, problems: Problems, *, required: bool,
           lo: float = -math.inf, hi: float = math.inf, what: str = "a number") -> pd.Series:
    """Parse a numeric column; blank gives NaN (an error when required).

    :param frame: text frame.
    :param col: column name; a missing optional column gives all NaN.
    :param problems: where problems go.
    :param required: whether a blank cell is an error.
    :param lo: lowest accepted value (inclusive).
    :param hi: highest accepted value (inclusive).
    :param what: what the column holds, for the message.
    """
    if col not in frame:
        return pd.Series(np.nan, index=frame.index, dtype=float)
    text = frame[col]
    blank = text == ""
    values = _to_float(text, blank)
    bad = ~blank & (values.isna() | ~np.isfinite(values.fillna(0.0)))
    problems.add(bad, col, lambda line: f"{text[line]!r} is not {what}")
    if required:
        problems.add(blank, col, f"blank; expected {what}")
    out_of_range = ~bad & ~blank & ((values < lo) | (values > hi))
    problems.add(out_of_range, col,
                 lambda line: f"{text[line]} is outside the plausible range {lo:g} to {hi:g} "
                              f"for {what}")
    return values.where(~bad & ~out_of_range)


def _to_float(text: pd.Series, blank: pd.Series) -> pd.Series:
    """Text to floats, NaN where blank or not a number; through Arrow's cast when it can.

    Arrow-backed text (what the CSV reader gives) goes to the cast without Python objects.
    """
    try:
        import pyarrow as pa
        import pyarrow.compute as pc

        arr = pa.array(text.array if isinstance(text.dtype, pd.StringDtype) else
                       text.to_numpy(dtype=object, na_value=None))
        if not pa.types.is_string(arr.type) and not pa.types.is_large_string(arr.type):
            arr = arr.cast(pa.string())
        arr = pc.if_else(pa.array(blank.to_numpy(dtype=bool, na_value=True)),
                         pa.scalar(None, arr.type), arr)
        return pd.Series(pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False),
                         index=text.index, dtype=float)
    except (ImportError, ValueError, TypeError, ArithmeticError, KeyError):
        # pyarrow refuses the whole column on one bad cell: parse cell by cell instead.
        return pd.to_numeric(text.where(~blank, None), errors="coerce").astype(float)


def timestamp(frame: pd.DataFrame, col: str, problems: Problems, *, required: bool,
              latest: pd.Timestamp | None = None) -> pd.Series:
    """Parse ISO 8601 dates or date-times (``2025-03-01`` or ``2025-03-01 08:30``)."""
    text = frame[col] if col in frame else pd.Series("", index=frame.index)
    blank = text == ""
    # Many lines share a time (the lines of one test): parse each distinct text once.
    codes, distinct = pd.factorize(text, use_na_sentinel=False)
    # utc=True: times with an offset become UTC, the others stay as typed, and a file that
    # mixes both (or several offsets) parses instead of raising.
    distinct_text = pd.Series(distinct, dtype=object)
    parsed_distinct = pd.to_datetime(distinct_text.where(distinct_text != "", None),
                                     format="ISO8601", errors="coerce", utc=True)
    parsed = pd.Series(parsed_distinct.dt.tz_convert(None).to_numpy()[codes], index=text.index)
    bad = ~blank & parsed.isna()
    problems.add(bad, col, lambda line: f"{text[line]!r} is not a date; write it as "
                                        "YYYY-MM-DD or YYYY-MM-DD HH:MM")
    if required:
        problems.add(blank, col, "blank; expected a date such as 2025-03-01")
    # Before 1900 is a typo for an engine test, and year 0 or earlier ("-0" parses so) is
    # no date Python can hold at all.
    early = parsed < EARLIEST_DATE
    problems.add(early, col, lambda line: f"{text[line]!r} is before "
                                          f"{EARLIEST_DATE:%Y-%m-%d}; check the year")
    if latest is not None:
        future = parsed > latest
        problems.add(future, col, lambda line: f"{text[line]} is in the future")
    parsed = parsed.where(~early)
    return parsed.astype("datetime64[us]")


def choice(frame: pd.DataFrame, col: str, allowed: tuple[str, ...],
           problems: Problems) -> pd.Series:
    """A lower-cased text column whose every value must be one of ``allowed``.

    :returns: the lower-cased values (Python strings), NaN where not allowed.
    """
    # A handful of distinct values: check those, then spread to the lines by code.
    codes, distinct = pd.factorize(frame[col], use_na_sentinel=False)
    lower = pd.Series(distinct, dtype=object).str.lower()
    fits = lower.isin(allowed).to_numpy()
    bad = pd.Series(~fits[codes], index=frame.index)
    problems.add(bad, col, lambda line: f"{frame[col][line]!r} is not one of "
                                        f"{', '.join(allowed)}")
    return pd.Series(lower.where(fits, np.nan).to_numpy(dtype=object)[codes],
                     index=frame.index, dtype=object)


def yes_no(frame: pd.DataFrame, col: str, problems: Problems) -> pd.Series:
    """A yes/no column as a nullable boolean; blank stays unknown."""
    if col not in frame:
        return pd.Series(pd.NA, index=frame.index, dtype="boolean")
    text = frame[col].str.lower()
    out = pd.Series(pd.NA, index=frame.index, dtype="boolean")
    out[text.isin(_YES)] = True
    out[text.isin(_NO)] = False
    bad = (text != "") & ~text.isin(_YES | _NO)
    problems.add(bad, col, lambda line: f"{frame[col][line]!r}: write yes or no")
    return out


def _unit(frame: pd.DataFrame, problems: Problems) -> tuple[pd.Series, np.ndarray]:
    """The canonical unit of each line (NaN when unknown) and its factor to kPa (1 for %)."""
    text = frame["units"]
    # A handful of distinct spellings: map those once.
    codes, typed = pd.factorize(text, use_na_sentinel=False)
    canon_of = pd.Series(typed, dtype=object).str.lower().map(_ALIASES)
    factor_of = canon_of.map({**KPA_PER_UNIT, "%": 1.0}).to_numpy(dtype=float, na_value=np.nan)
    canon = pd.Series(canon_of.to_numpy(dtype=object)[codes], index=text.index, dtype=object)
    bad = canon.isna()
    problems.add(bad, "units", lambda line: f"unknown unit {text[line]!r}; expected one of "
                                            "psi, kPa, bar, inHg, mmHg, %")
    return canon, factor_of[codes]


def tests_rows(frame: pd.DataFrame, units: pd.DataFrame, problems: Problems,
               now: pd.Timestamp, *, consume: bool = False) -> pd.DataFrame:
    """Validate the rows of a tests file and convert each value to SI.

    :param frame: the tests file as text, index = line number.
    :param consume: drop each text column from ``frame`` once it is converted (keeping
        only ``value`` and ``units``), so a large file's text and typed rows do not both
        stay whole in memory.
    :param units: known units, index fleet_no, columns unit_id, cylinders, elevation_baro_kpa.
    :param problems: where problems go.
    :param now: the present; later test times are refused.
    :returns: one typed row per input line: fleet_no, unit_id, site_baro_kpa, tested_at,
        hours, kind, cylinder, value_si, typed_value, typed_unit and the condition columns.
    """
    out = pd.DataFrame(index=frame.index)
    fleet_no = frame["fleet_no"]
    problems.add(fleet_no == "", "fleet_no", "blank; expected the unit's fleet number")
    # Each distinct fleet number is looked up once, then spread to its lines by code.
    codes, distinct = pd.factorize(fleet_no, use_na_sentinel=False)
    ref_of = units.reindex(distinct)
    known = pd.Series(distinct.isin(units.index)[codes], index=frame.index)
    problems.add((fleet_no != "") & ~known, "fleet_no",
                 lambda line: f"unknown fleet number {fleet_no[line]!r}; import the fleet "
                              "file first, or check the number")
    out["fleet_no"] = fleet_no
    ref = pd.DataFrame({c: ref_of[c].to_numpy()[codes]
                        for c in ("unit_id", "cylinders", "site_baro_kpa")}, index=frame.index)
    out["unit_id"] = ref["unit_id"].to_numpy()
    out["site_baro_kpa"] = ref["site_baro_kpa"].to_numpy(dtype=float)
    out["tested_at"] = timestamp(frame, "tested_at", problems, required=True, latest=now)
    out["hours"] = number(frame, "hours", problems, required=True, lo=0, hi=1_000_000,
                          what="engine hours")
    if consume:
        del frame["tested_at"], frame["hours"]
    kind = choice(frame, "kind", READING_KINDS, problems)
    out["kind"] = kind
    unit, factor_values = _unit(frame, problems)

    # Cylinder: required for per-cylinder kinds, blank for the engine-level vacuums.
    cyl_text = frame["cylinder"]
    cyl_num = _to_float(cyl_text, cyl_text == "")
    per_cyl = kind.isin(CYLINDER_KINDS)
    is_vac = kind.isin(VACUUM_KINDS)
    not_int = (cyl_text != "") & (cyl_num.isna() | ~np.isfinite(cyl_num.fillna(0.0))
                                  | (cyl_num != cyl_num.round()))
    problems.add(not_int, "cylinder", lambda line: f"{cyl_text[line]!r} is not a cylinder number")
    problems.add(per_cyl & (cyl_text == ""), "cylinder",
                 lambda line: f"blank; a {kind[line]} reading needs its cylinder number")
    problems.add(is_vac & (cyl_text != ""), "cylinder",
                 "vacuum is measured for the whole engine: leave the cylinder blank")
    count = ref["cylinders"].to_numpy(dtype=float, na_value=np.nan)
    beyond = (per_cyl & ~not_int & cyl_num.notna() & known
              & ((cyl_num < 1) | (cyl_num > count)))
    problems.add(beyond, "cylinder",
                 lambda line: f"cylinder {cyl_text[line]} on a "
                              f"{int(units.at[fleet_no[line], 'cylinders'])}-cylinder engine")
    # Only numbers within the engine's cylinders (an unknown unit has none) become integers.
    in_range = per_cyl & ~not_int & (cyl_num >= 1) & (cyl_num <= count)
    out["cylinder"] = cyl_num.where(in_range).astype("Int64")
    if consume:
        del frame["cylinder"]
        cyl_text = None  # freed (the messages above are written already)

    # Unit must suit the kind.
    wrong_unit = kind.notna() & unit.notna() & ~pd.Series(_unit_fits(kind, unit),
                                                          index=frame.index)
    problems.add(wrong_unit, "units",
                 lambda line: f"{frame['units'][line]!r} does not fit a {kind[line]} reading; "
                              f"use {', '.join(PRESSURE_UNITS_BY_KIND[kind[line]])}")

    value = number(frame, "value", problems, required=True, what="a measured value")
    si = value * factor_values
    negative = si < 0
    problems.add(negative, "value", lambda line: f"{frame['value'][line]} is negative; gauges "
                 "read compression above ambient and vacuum below it as positive numbers")
    pressure = kind.isin(("compression", "wet"))
    problems.add(pressure & (si > MAX_COMPRESSION_KPA), "value",
                 lambda line: f"{frame['value'][line]} {frame['units'][line]} is beyond any "
                              "cranking compression (over 7,000 kPa)")
    problems.add(is_vac & (si > MAX_VACUUM_KPA), "value",
                 lambda line: f"{frame['value'][line]} {frame['units'][line]} of vacuum is more "
                              "than the whole atmosphere")
    problems.add(kind.isin(("leakdown", "relative")) & (si > 100), "value",
                 lambda line: f"{frame['value'][line]} % is over 100 %")
    out["value_si"] = si
    out["typed_value"] = frame["value"]
    out["typed_unit"] = unit

    for col, (lo, hi, what) in CONDITION_RANGES.items():
        out[col] = number(frame, col, problems, required=False, lo=lo, hi=hi, what=what)
        if consume and col in frame:
            del frame[col]
    out["throttle_open"] = yes_no(frame, "throttle_open", problems)
    if consume:
        for col in ("kind", "throttle_open"):
            if col in frame:
                del frame[col]
    for col in ("technician", "note"):
        out[col] = frame[col].where(frame[col] != "", None) if col in frame else None
    for col, limit in (("value", _TYPED_VALUE_MAX), ("technician", _TECHNICIAN_MAX),
                       ("note", _NOTE_MAX)):
        too_long(frame, col, limit, problems)
    return out


def too_long(frame: pd.DataFrame, col: str, limit: int, problems: Problems) -> None:
    """Flag cells of ``col`` longer than the store keeps (``limit`` characters)."""
    if col not in frame:
        return
    lengths = frame[col].str.len()
    problems.add(lengths > limit, col, lambda line: f"{lengths[line]} characters; at most "
                                                    f"{limit} are kept")


def _unit_fits(kind: pd.Series, unit: pd.Series) -> np.ndarray:
    """Vectorised: whether each unit suits its reading kind."""
    fits = np.zeros(len(kind), dtype=bool)
    for k, allowed in PRESSURE_UNITS_BY_KIND.items():
        fits |= (kind == k).to_numpy(dtype=bool, na_value=False) & unit.isin(allowed).to_numpy()
    return fits


def group_conflicts(rows: pd.DataFrame, key: list[str], cols: list[str],
                    problems: Problems, what: str,
                    gid: np.ndarray | None = None) -> dict[str, pd.Series]:
    """Flag lines of one group (e.g. one test) that disagree on a column that the group shares.

    :param rows: typed rows, index = line number.
    :param key: the columns that form a group.
    :param cols: columns every row of a group must agree on (blank agrees with anything).
    :param what: the group's name in the message ("test", "site").
    :param gid: the group number of each row, when the caller has it already (numbered
        0, 1, ... in order of first appearance, as ``groupby(sort=False).ngroup()``).
    :returns: per column, each group's first present value (index = group number; a
        group with none present is missing).
    """
    if rows.empty:
        return {}
    if gid is None:
        gid = rows.groupby(key, sort=False, dropna=False).ngroup().to_numpy()
    firsts_of: dict[str, pd.Series] = {}
    for col in cols:
        values = rows[col]
        present = values.notna().to_numpy()
        if not present.any():
            firsts_of[col] = values.iloc[:0].reset_index(drop=True)
            continue
        kept = values[present]
        groups = gid[present]
        distinct, first_at = np.unique(groups, return_index=True)  # first row of each group
        firsts = kept.iloc[first_at].set_axis(distinct)
        firsts_of[col] = firsts
        spread = firsts.reindex(groups).to_numpy()
        mine = kept.to_numpy()
        differs_kept = mine != spread
        if mine.dtype.kind == "f":  # -0.0 and 0.0 are typed differently
            differs_kept |= np.signbit(mine) != np.signbit(spread)
        differs = np.zeros(len(rows), dtype=bool)
        differs[present] = np.asarray(differs_kept, dtype=bool)
        problems.add(pd.Series(differs, index=rows.index), col,
                     lambda line, c=col: f"differs from an earlier line of the "
                     f"same {what} ({rows[c][line]} vs another value); one {what}, one value")
    return firsts_of


def event_rows(frame: pd.DataFrame, units: pd.DataFrame, problems: Problems,
               now: pd.Timestamp) -> pd.DataFrame:
    """Validate the rows of an events file.

    :param frame: the events file as text, index = line number.
    :param units: known units (see :func:`tests_rows`).
    """
    out = pd.DataFrame(index=frame.index)
    fleet_no = frame["fleet_no"]
    problems.add(fleet_no == "", "fleet_no", "blank; expected the unit's fleet number")
    problems.add((fleet_no != "") & ~fleet_no.isin(units.index), "fleet_no",
                 lambda line: f"unknown fleet number {fleet_no[line]!r}")
    ref = units.reindex(fleet_no)
    out["fleet_no"] = fleet_no
    out["unit_id"] = ref["unit_id"].to_numpy()
    out["date"] = timestamp(frame, "date", problems, required=True, latest=now).dt.normalize()
    out["hours"] = number(frame, "hours", problems, required=False, lo=0, hi=1_000_000,
                          what="engine hours")
    out["kind"] = choice(frame, "kind", EVENT_KINDS, problems)
    cyl_lists: list[str] = []
    for line, text, count in zip(frame.index, frame["cylinders"], ref["cylinders"], strict=True):
        parts = [p.strip() for p in text.replace(",", ";").split(";") if p.strip()]
        if not all(p.isascii() and p.isdigit() for p in parts):
            problems.one(int(line), "cylinders", f"{text!r}: write cylinder numbers like 2;3, "
                                                  "or leave blank for all")
            cyl_lists.append("")
            continue
        nums = sorted({int(p) for p in parts})
        if nums and not pd.isna(count) and (nums[0] < 1 or nums[-1] > count):
            problems.one(int(line), "cylinders",
                         f"{text!r} on a {int(count)}-cylinder engine")
        cyl_lists.append(";".join(str(n) for n in nums))
    out["cylinders"] = cyl_lists
    out["note"] = frame["note"].where(frame["note"] != "", None) if "note" in frame else None
    too_long(frame, "note", _EVENT_NOTE_MAX, problems)
    return out


FAMILY_FIELDS = ("fuel", "cylinders", "banks", "compression_ratio", "min_compression",
                 "compression_units")
FAMILY_EXTRAS = ("min_ratio", "expected_compression", "spread_rule", "max_difference",
                 "min_crank_rpm", "warm_test", "system_volts", "test_interval_days")


def parse_banks(text: str, cylinders: int) -> list[list[int]]:
    """Parse a bank layout such as ``1-2-3-4`` or ``1-3-5/2-4-6``.

    Every cylinder from 1 to ``cylinders`` must appear exactly once.

    :raises ValueError: with a sentence saying what is wrong.
    """
    banks = []
    for part in text.split("/"):
        items = [p.strip() for p in part.split("-")]
        if not items or not all(i.isascii() and i.isdigit() for i in items):
            raise ValueError(f"{text!r}: write the cylinders of each bank front to back, "
                             "like 1-2-3-4, banks split by / like 1-3-5/2-4-6")
        banks.append([int(i) for i in items])
    flat = sorted(n for bank in banks for n in bank)
    if flat != list(range(1, cylinders + 1)):
        raise ValueError(f"{text!r} must name each cylinder 1 to {cylinders} exactly once")
    return banks


def adjacent_pairs(banks: str) -> set[tuple[int, int]]:
    """Pairs of cylinders next to each other in the same bank (lower number first)."""
    pairs = set()
    for part in banks.split("/"):
        nums = [int(p) for p in part.split("-")]
        for a, b in zip(nums, nums[1:], strict=False):
            pairs.add((min(a, b), max(a, b)))
    return pairs


def fleet_rows(frame: pd.DataFrame, problems: Problems) -> pd.DataFrame:
    """Validate the per-unit columns of a fleet file; site and family columns stay as text.

    :param frame: the fleet file as text, index = line number.
    """
    out = pd.DataFrame(index=frame.index)
    for col in ("fleet_no", "site", "engine_family"):
        problems.add(frame[col] == "", col, f"blank; every unit needs its {col}")
        too_long(frame, col, _NAME_MAX[col], problems)
        out[col] = frame[col]
    dup = (frame["fleet_no"] != "") & frame["fleet_no"].duplicated(keep="first")
    problems.add(dup, "fleet_no", lambda line: f"fleet number {frame['fleet_no'][line]!r} "
                                               "appears on an earlier line")
    out["in_service"] = (timestamp(frame, "in_service", problems, required=False)
                         if "in_service" in frame else pd.NaT)
    out["hours_per_week"] = number(frame, "hours_per_week", problems, required=False,
                                   lo=0, hi=168, what="hours per week")
    out["site_elevation_m"] = number(frame, "site_elevation_m", problems, required=False,
                                     lo=-500, hi=6000, what="elevation in metres")
    return out
