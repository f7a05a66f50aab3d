"""Build the demo fleet: the three import tables, the stories and the hidden truth."""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd

from demo_fleet import curation, history, model, readings, stories
from demo_fleet.catalogue import FAMILIES, SITES
from demo_fleet.stories import Story

FLEET_COLUMNS = ("fleet_no", "site", "engine_family", "in_service", "hours_per_week",
                 "site_elevation_m", "fuel", "cylinders", "banks", "compression_ratio",
                 "min_compression", "compression_units", "min_ratio")
TESTS_COLUMNS = ("fleet_no", "tested_at", "hours", "kind", "cylinder", "value", "units",
                 "battery_v", "crank_rpm", "engine_temp_c", "baro_kpa", "throttle_open",
                 "technician", "note")
EVENTS_COLUMNS = ("fleet_no", "date", "hours", "kind", "cylinders", "note")
KIND_ORDER = ("compression", "wet", "leakdown", "relative", "vacuum_cranking", "vacuum_idle")


@dataclass
class DemoFleet:
    """The demo fleet as the three import tables plus the stories planted in them.

    ``truth`` is not part of any import: one row per dry compression reading with the
    cylinder's true sea-level level, the true ambient pressure and the product of the
    condition factors (altitude, intake, cranking speed, planted fault).
    """

    fleet: pd.DataFrame
    tests: pd.DataFrame
    events: pd.DataFrame
    stories: list[Story]
    as_of: date
    seed: int
    truth: pd.DataFrame = field(repr=False)

    def text_frames(self) -> dict[str, pd.DataFrame]:
        """The three tables as text, each cell as written to the CSV files ("" when blank)."""
        return {
            "fleet": _as_text(self.fleet, "%Y-%m-%d"),
            "tests": _as_text(self.tests, "%Y-%m-%d %H:%M"),
            "events": _as_text(self.events, "%Y-%m-%d"),
        }

    def write_csv(self, folder: Path) -> dict[str, Path]:
        """Write fleet.csv, tests.csv and events.csv (UTF-8, LF line ends) into ``folder``.

        :param folder: created if missing.
        :returns: the path of each file, keyed ``fleet``, ``tests``, ``events``.
        """
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        paths = {}
        for name, frame in self.text_frames().items():
            path = folder / f"{name}.csv"
            path.write_bytes(frame.to_csv(index=False, lineterminator="\n").encode("utf-8"))
            paths[name] = path
        return paths


def _as_text(frame: pd.DataFrame, date_format: str) -> pd.DataFrame:
    out = {}
    for col in frame.columns:
        series = frame[col]
        if pd.api.types.is_datetime64_any_dtype(series):
            out[col] = series.dt.strftime(date_format).fillna("")
        elif pd.api.types.is_float_dtype(series):
            out[col] = [np.format_float_positional(v, trim="-") if np.isfinite(v) else ""
                        for v in series.to_numpy()]
        else:
            out[col] = series.astype(object).where(series.notna(), "").astype(str)
    return pd.DataFrame(out, columns=frame.columns)


def build(as_of: date | None = None, seed: int = 42) -> DemoFleet:
    """Generate the demo fleet's history, ending on ``as_of``.

    :param as_of: the build day: the last test is on it (default: today).
    :param seed: seed of the random generator; the same seed and as_of give identical output.
    """
    as_of = as_of or date.today()
    rng = np.random.default_rng(seed)
    units = history.draw_units(rng)
    tests = history.draw_schedule(units, as_of, rng)
    stories.mark_roles(tests, units)
    history.draw_hours(tests, units, rng)
    history.draw_conditions(tests, units, rng)
    stories.apply_conditions(tests, units, rng)
    history.set_cranking(tests)
    tests["site"] = units.loc[tests["fleet_no"], "site"].to_numpy()
    tests["family"] = units.loc[tests["fleet_no"], "family"].to_numpy()
    tests["calm"] = tests["is_latest"] & (units["story"].reindex(tests["fleet_no"]) != "10"
                                          ).to_numpy()

    overhaul_offset = stories.overhaul_offset(tests)
    overhaul_no = tests.loc[tests["role"] == "after_overhaul", "fleet_no"].iloc[0]
    overhaul_hours = stories.hours_at(tests, overhaul_no, overhaul_offset)
    tests["segment_start_hours"] = np.where(tests["segment"] == 1, overhaul_hours, 0.0)

    cylinders = history.draw_cylinders(units, rng)
    stories.fit_wear(cylinders, tests, units, overhaul_hours)
    dry = readings.dry_compression(tests, cylinders, units, stories.defects(tests, units), rng)
    story = units["story"].reindex(tests["fleet_no"])
    faulty = story.isin(["2", "3a", "3b"]).to_numpy()
    curation.steady_sound_units(dry, tests, units, ~faulty & (story != "1").to_numpy(), ~faulty,
                                rng)
    curation.settle_latest(dry, tests, ~faulty)
    stories.copy_twin_values(dry, tests)
    extra = _extra_readings(tests, dry, rng)
    events = stories.events(tests, units, (overhaul_offset, overhaul_hours))

    return DemoFleet(
        fleet=_fleet_frame(units, as_of),
        tests=_tests_frame(tests, dry, extra),
        events=_events_frame(events, as_of),
        stories=stories.records(tests, units),
        as_of=as_of,
        seed=seed,
        truth=_truth_frame(tests, dry),
    )


def _extra_readings(tests: pd.DataFrame, dry: pd.DataFrame,
                    rng: np.random.Generator) -> pd.DataFrame:
    """Wet, leak-down, relative and vacuum rows: ``test_id, kind, cylinder, value, units``."""
    parts = []
    ring_loss = 1.0 - dry["sea_level_kpa"] / dry["new_kpa"]
    story_rows = tests.loc[dry["test_id"], "role"].to_numpy() == "latest"
    dry_fleet = tests.loc[dry["test_id"], "fleet_no"].to_numpy()
    for key, cyls in stories.WET.items():
        fleet_no = stories.planted_no(key)
        for cyl, ring_path in cyls.items():
            row = dry.index[story_rows & (dry_fleet == fleet_no) & (dry["cylinder"] == cyl)][0]
            rise = model.wet_rise_fraction(ring_loss.loc[row], ring_path)
            value = readings.typed(np.array([dry.loc[row, "value"] * (1.0 + rise)]),
                                   np.array([dry.loc[row, "units"]]))[0]
            parts.append((dry.loc[row, "test_id"], "wet", cyl, value, dry.loc[row, "units"]))

    leak_tests = tests.index[tests["leakdown_recorded"].to_numpy()]
    leak = dry[dry["test_id"].isin(leak_tests)]
    base = np.clip(3.0 + 25.0 * ring_loss.loc[leak.index] + rng.normal(0.0, 1.0, len(leak)),
                   2.0, 9.0)
    for key, cyls in stories.LEAKDOWN.items():
        fleet_no = stories.planted_no(key)
        for cyl, pct in cyls.items():
            hit = (tests.loc[leak["test_id"], "fleet_no"].to_numpy() == fleet_no) \
                & (tests.loc[leak["test_id"], "role"].to_numpy() == "latest") \
                & (leak["cylinder"].to_numpy() == cyl)
            base = np.where(hit, pct, base)
    parts += list(zip(leak["test_id"], ["leakdown"] * len(leak), leak["cylinder"],
                      np.round(base), ["%"] * len(leak), strict=True))

    rel_tests = tests.index[tests["relative_recorded"].to_numpy()]
    rel = dry[dry["test_id"].isin(rel_tests)]
    strongest = rel.groupby("test_id")["value"].transform("max")
    parts += list(zip(rel["test_id"], ["relative"] * len(rel), rel["cylinder"],
                      np.round(100.0 * rel["value"] / strongest), ["%"] * len(rel), strict=True))

    for kind, flag, col in (("vacuum_cranking", "vac_recorded", "vac_true_inhg"),
                            ("vacuum_idle", "idle_recorded", "idle_inhg")):
        chosen = tests[tests[flag].to_numpy()]
        values = readings.typed(chosen[col].to_numpy(), np.full(len(chosen), "inHg"))
        parts += list(zip(chosen.index, [kind] * len(chosen), [None] * len(chosen), values,
                          ["inHg"] * len(chosen), strict=True))
    return pd.DataFrame(parts, columns=["test_id", "kind", "cylinder", "value", "units"])


def _tests_frame(tests: pd.DataFrame, dry: pd.DataFrame, extra: pd.DataFrame) -> pd.DataFrame:
    rows = pd.concat([dry[["test_id", "cylinder", "value", "units"]].assign(kind="compression"),
                      extra], ignore_index=True)
    rows["cylinder"] = rows["cylinder"].astype("Int64")
    rows["kind_order"] = rows["kind"].map({k: i for i, k in enumerate(KIND_ORDER)})
    t = tests.loc[rows["test_id"]].reset_index(drop=True)
    out = pd.DataFrame({
        "fleet_no": t["fleet_no"].astype(str),
        "tested_at": t["tested_at"],
        "hours": t["hours"].astype(float),
        "kind": rows["kind"].astype(str),
        "cylinder": rows["cylinder"],
        "value": rows["value"].astype(float),
        "units": rows["units"].astype(str),
        "battery_v": t["battery_v"].astype(float),
        "crank_rpm": t["crank_rpm"].astype(float),
        "engine_temp_c": t["engine_temp_c"].astype(float),
        "baro_kpa": t["baro_kpa"].astype(float),
        "throttle_open": t["throttle_open"].astype(object),
        "technician": t["technician"].astype(str),
        "note": t["note"].astype(str),
    })
    order = np.lexsort((rows["cylinder"].fillna(0).to_numpy(), rows["kind_order"].to_numpy(),
                        out["fleet_no"].to_numpy(), out["tested_at"].to_numpy()))
    return out.iloc[order].reset_index(drop=True)


def _fleet_frame(units: pd.DataFrame, as_of: date) -> pd.DataFrame:
    site_order = {name: i for i, name in enumerate(SITES)}
    ordered = units.assign(site_rank=units["site"].map(site_order)).sort_values(
        ["site_rank", "family", "fleet_no"]).drop(columns="site_rank")
    in_service = pd.Timestamp(as_of) - pd.to_timedelta(ordered["age_days"], unit="D")
    first_site = ~ordered["site"].duplicated()
    first_family = ~ordered["family"].duplicated()
    fams = [FAMILIES[f] for f in ordered["family"]]

    def family_attr(name: str) -> list:
        return [getattr(f, name) if first else None
                for f, first in zip(fams, first_family, strict=True)]

    frame = pd.DataFrame({
        "fleet_no": ordered.index.astype(str),
        "site": ordered["site"].astype(str).to_numpy(),
        "engine_family": ordered["family"].astype(str).to_numpy(),
        "in_service": in_service.dt.normalize().astype("datetime64[s]").to_numpy(),
        "hours_per_week": ordered["hours_per_week"].astype(float).to_numpy(),
        "site_elevation_m": np.where(first_site, [SITES[s].elevation_m for s in ordered["site"]],
                                     np.nan),
        "fuel": family_attr("fuel"),
        "cylinders": pd.array(family_attr("cylinders"), dtype="Int64"),
        "banks": family_attr("banks"),
        "compression_ratio": pd.array(family_attr("compression_ratio"), dtype="Float64"),
        "min_compression": pd.array(family_attr("min_compression"), dtype="Float64"),
        "compression_units": family_attr("compression_units"),
        "min_ratio": pd.array(family_attr("min_ratio"), dtype="Float64"),
    })
    for col in ("compression_ratio", "min_compression", "min_ratio"):
        frame[col] = frame[col].astype(float)
    return frame.reset_index(drop=True)


def _events_frame(events: pd.DataFrame, as_of: date) -> pd.DataFrame:
    frame = pd.DataFrame({
        "fleet_no": events["fleet_no"].astype(str),
        "date": (pd.Timestamp(as_of) - pd.to_timedelta(events["offset"], unit="D"))
        .astype("datetime64[s]"),
        "hours": events["hours"].astype(float),
        "kind": events["kind"].astype(str),
        "cylinders": events["cylinders"].astype(str),
        "note": events["note"].astype(str),
    })
    return frame.sort_values(["date", "fleet_no"]).reset_index(drop=True)


def _truth_frame(tests: pd.DataFrame, dry: pd.DataFrame) -> pd.DataFrame:
    t = tests.loc[dry["test_id"]]
    return pd.DataFrame({
        "fleet_no": t["fleet_no"].to_numpy(),
        "tested_at": t["tested_at"].to_numpy(),
        "cylinder": dry["cylinder"].to_numpy(),
        "sea_level_kpa": dry["sea_level_kpa"].to_numpy(),
        "new_kpa": dry["new_kpa"].to_numpy(),
        "ambient_kpa": dry["ambient_kpa"].to_numpy(),
        "condition_factor": dry["condition_factor"].to_numpy(),
        "valid": readings.test_valid(t),
    })
