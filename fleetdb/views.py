"""Read-side views of the store for the CLI and the dashboard: plain dicts, JSON-ready."""

from __future__ import annotations

from typing import Any

import pandas as pd
from sqlalchemy import text
from sqlalchemy.engine import Engine

from fleetdb import frames as frames_mod
from fleetdb.errors import UnitNotFound
from fleetdb.units import from_kpa

PRESSURE_KINDS = ("compression", "wet")


def _iso(value: Any) -> str | None:
    if value is None or (not isinstance(value, str) and pd.isna(value)):
        return None
    if isinstance(value, pd.Timestamp):
        return value.isoformat(sep=" ", timespec="minutes") if (value.hour or value.minute) \
            else value.date().isoformat()
    return value.isoformat() if hasattr(value, "isoformat") else str(value)


def _text(value: Any) -> str | None:
    return None if value is None or (not isinstance(value, str) and pd.isna(value)) else str(value)


def _num(value: Any, digits: int = 1) -> float | None:
    return None if value is None or pd.isna(value) else round(float(value), digits)


def fleet_listing(engine: Engine) -> list[dict[str, Any]]:
    """Every unit with its site, family and the date and hours of its last test."""
    with engine.connect() as conn:
        rows = conn.execute(text(
            "SELECT u.fleet_no, s.name, f.name, f.fuel, f.cylinders, u.in_service, "
            "u.hours_per_week, COUNT(t.id), MAX(t.tested_at), MAX(t.hours) "
            "FROM unit u JOIN site s ON s.id = u.site_id "
            "JOIN engine_family f ON f.id = u.family_id "
            "LEFT JOIN test t ON t.unit_id = u.id GROUP BY u.id, u.fleet_no, s.name, f.name, "
            "f.fuel, f.cylinders, u.in_service, u.hours_per_week ORDER BY u.fleet_no")).all()
    return [{"fleet_no": r[0], "site": r[1], "engine_family": r[2], "fuel": r[3],
             "cylinders": r[4], "in_service": _iso(r[5]), "hours_per_week": _num(r[6]),
             "tests": r[7], "last_tested_at": _iso(pd.Timestamp(r[8]) if r[8] else None),
             "last_hours": _num(r[9])} for r in rows]


def unit_id_for(engine: Engine, fleet_no: str) -> int:
    """The unit id of a fleet number, or :class:`UnitNotFound`."""
    with engine.connect() as conn:
        uid = conn.execute(text("SELECT id FROM unit WHERE fleet_no = :f"),
                           {"f": fleet_no}).scalar()
    if uid is None:
        raise UnitNotFound(f"no unit with fleet number {fleet_no!r}; 'fleetdb units' lists them")
    return int(uid)


def unit_tests(engine: Engine, fleet_no: str, units: str = "psi") -> dict[str, Any]:
    """A unit and every test of it, with readings in ``units`` (vacuum always in inHg and kPa).

    :param fleet_no: the unit's fleet number.
    :param units: psi, kPa or bar for compression values.
    """
    uid = unit_id_for(engine, fleet_no)
    fr = frames_mod.load(engine, [uid])
    unit = fr.units.loc[uid]
    fam = fr.families.loc[unit["family_id"]]
    tests = []
    for test_id, t in fr.tests.iterrows():
        rd = fr.readings[fr.readings["test_id"] == test_id]
        values: dict[str, Any] = {}
        for kind, group in rd.groupby("kind"):
            if kind in PRESSURE_KINDS:
                values[kind] = {str(int(c)): _num(from_kpa(v, units))
                                for c, v in zip(group["cylinder"], group["value"], strict=True)}
            elif kind in ("leakdown", "relative"):
                values[kind] = {str(int(c)): _num(v)
                                for c, v in zip(group["cylinder"], group["value"], strict=True)}
            else:
                values[kind] = {"inHg": _num(from_kpa(group["value"].iloc[0], "inHg")),
                                "kPa": _num(group["value"].iloc[0])}
        tests.append({
            "test_id": int(test_id), "tested_at": _iso(t["tested_at"]), "hours": _num(t["hours"]),
            "battery_v": _num(t["battery_v"]), "crank_rpm": _num(t["crank_rpm"], 0),
            "engine_temp_c": _num(t["engine_temp_c"]), "baro_kpa": _num(t["baro_kpa"]),
            "baro_measured": bool(t["baro_measured"]),
            "throttle_open": None if pd.isna(t["throttle_open"]) else bool(t["throttle_open"]),
            "technician": _text(t["technician"]), "note": _text(t["note"]), "source": t["source"],
            "voided": bool(t["voided"]), "void_reason": _text(t["void_reason"]),
            "readings": values})
    return {
        "fleet_no": fleet_no, "site": unit["site"], "site_elevation_m": _num(unit["elevation_m"]),
        "engine_family": unit["family"], "fuel": fam["fuel"], "cylinders": int(fam["cylinders"]),
        "banks": fam["banks"], "units": units,
        "min_compression": _num(from_kpa(fam["min_compression_kpa"], units)),
        "events": [{"date": _iso(e["date"]), "hours": _num(e["hours"]), "kind": e["kind"],
                    "cylinders": list(e["cylinders"]), "note": _text(e["note"])}
                   for _, e in fr.events.iterrows()],
        "tests": tests,
    }



def health_summary(report: dict[str, Any], units: str = "psi") -> dict[str, Any]:
    """The health part of ``fleetdb unit --json``, from :func:`fleetdb.health.unit_report`.

    :param report: a unit report (kPa inside).
    :param units: psi, kPa or bar for wear rates.
    """
    wear = []
    for f in report["fits"]:
        if not f["current"] or f["cylinder"] == "spread":
            continue
        slope = f["slope_used"]
        wear.append({
            "cylinder": f["cylinder"], "n": f["n"], "method": f["method"],
            "wear_per_1000h": None if slope is None else _num(from_kpa(-slope * 1000, units), 2),
            "wear_ols_per_1000h": None if f["slope_ols"] is None
            else _num(from_kpa(-f["slope_ols"] * 1000, units), 2),
            "wear_theil_sen_per_1000h": None if f["slope_theil_sen"] is None
            else _num(from_kpa(-f["slope_theil_sen"] * 1000, units), 2),
            "faster_than_family": f["faster_than_family"],
            "projected_hours": _num(f["projected_hours"], 0),
            "projected_hours_early": _num(f["projected_hours_early"], 0)})
    return {
        "level": report["level"], "main_code": report["main_code"],
        "reasons": report["reasons"], "projected_date": report["projected_date"],
        "projected_date_early": report["projected_date_early"],
        "projected_hours": _num(report["projected_hours"], 0),
        "projected_hours_early": _num(report["projected_hours_early"], 0),
        "hours_per_week": _num(report["unit"]["hours_per_week"]), "units": units,
        "wear": wear, "trust": {str(t["test_id"]): t["trustworthy"] for t in report["tests"]},
        "limits": report.get("limits"),
    }


def unit_engine(engine: Engine, fleet_no: str) -> dict[str, Any]:
    """A unit's engine family and site, without its tests (for forms).

    :param fleet_no: the unit's fleet number.
    """
    with engine.connect() as conn:
        row = conn.execute(text(
            "SELECT u.id, u.fleet_no, s.name, s.elevation_m, f.name, f.fuel, f.cylinders, "
            "f.banks, f.min_compression_kpa, f.min_ratio FROM unit u "
            "JOIN site s ON s.id = u.site_id JOIN engine_family f ON f.id = u.family_id "
            "WHERE u.fleet_no = :f"), {"f": fleet_no}).first()
    if row is None:
        raise UnitNotFound(f"no unit with fleet number {fleet_no!r}; 'fleetdb units' lists them")
    return {"unit_id": int(row[0]), "fleet_no": row[1], "site": row[2],
            "site_elevation_m": float(row[3]), "engine_family": row[4], "fuel": row[5],
            "cylinders": int(row[6]), "banks": row[7], "min_compression_kpa": float(row[8]),
            "min_ratio": float(row[9])}


def find_units(engine: Engine, search: str | None = None, limit: int = 50) -> list[dict[str, Any]]:
    """Fleet numbers containing ``search`` (case-insensitive), for type-ahead pickers.

    :param search: text to look for; None or blank lists the first units.
    :param limit: at most this many.
    """
    where, params = "", {"n": int(limit)}
    if search and search.strip():
        where = " WHERE LOWER(u.fleet_no) LIKE :s"
        params["s"] = f"%{search.strip().lower()}%"
    with engine.connect() as conn:
        rows = conn.execute(text(
            "SELECT u.fleet_no, s.name, f.name FROM unit u JOIN site s ON s.id = u.site_id "
            "JOIN engine_family f ON f.id = u.family_id" + where
            + " ORDER BY u.fleet_no LIMIT :n"), params).all()
    return [{"fleet_no": r[0], "site": r[1], "engine_family": r[2]} for r in rows]
