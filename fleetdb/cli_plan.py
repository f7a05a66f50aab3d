"""The ``fleetdb plan`` and ``fleetdb report`` commands (registered in :mod:`fleetdb.cli`).

Thin over :mod:`fleetdb.plan`, :mod:`fleetdb.exports` and :mod:`fleetdb.report`: parse the
options, make one or two library calls, format the output.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

import click

from fleetdb.cli import (
    _engine,
    as_of_option,
    db_option,
    friendly_errors,
    json_option,
    print_json,
    print_table,
)
from fleetdb.errors import InvalidValue

__all__ = ["plan", "report"]

CAUTION = "fleetdb advises; it does not certify: projected crossings are planning aids."
LEVEL_MARK = {"act": "■ act", "plan": "▲ plan", "retest": "◆ retest", "watch": "● watch",
              "sound": "○ sound"}


def _whole(text: str, what: str) -> int:
    try:
        value = int(text.strip())
    except ValueError:
        raise click.BadParameter(f"{text!r}: {what} must be a whole number") from None
    if value < 0:
        raise click.BadParameter(f"{text!r}: {what} must be 0 or more")
    return value


def _per_site(items: tuple[str, ...], what: str) -> tuple[int | None, dict[str, int]]:
    """``N`` (every site) or ``SITE=N`` items -> (default, {site: n})."""
    default, by_site = None, {}
    for item in items:
        site, sep, number = item.rpartition("=")
        if sep and site.strip():
            by_site[site.strip()] = _whole(number, what)
        else:
            default = _whole(number, what)
    return default, by_site


def _closed(items: tuple[str, ...]) -> dict[str, frozenset[dt.date]] | None:
    """``[SITE=]YYYY-Www[..YYYY-Www]`` items -> {site or "*": Mondays}."""
    from fleetdb.plan import ALL_SITES, parse_closed_weeks

    if not items:
        return None
    out: dict[str, frozenset[dt.date]] = {}
    for item in items:
        site, sep, weeks = item.rpartition("=")
        key = site.strip() if sep and site.strip() else ALL_SITES
        try:
            days = parse_closed_weeks(weeks, "--closed")
        except InvalidValue as exc:
            raise click.BadParameter(str(exc).removeprefix("--closed: "),
                                     param_hint="--closed") from exc
        out[key] = out.get(key, frozenset()) | days
    return out


def _priorities(items: tuple[str, ...]) -> dict[str, int] | None:
    """``FLEET_NO=WEEKS`` items -> {fleet_no: weeks}."""
    from fleetdb.plan import parse_priorities

    try:
        return parse_priorities(items) or None
    except InvalidValue as exc:
        raise click.BadParameter(str(exc), param_hint="--priority") from exc


def _settings_summary(settings: dict[str, Any]) -> str:
    def per(default: int, by_site: dict[str, int], unit: str) -> str:
        extra = ", ".join(f"{s} {n}" for s, n in sorted(by_site.items()))
        return f"{default}{unit}" + (f" ({extra})" if extra else "")
    closed = "; ".join(f"{'all sites' if s == '*' else s} {', '.join(w)}"
                       for s, w in settings["closed"].items()) or "none"
    raised = ", ".join(f"{f} +{n} wk" for f, n in sorted(settings["priority"].items()))
    return (f"capacity {per(settings['default_capacity'], settings['capacity'], '/week')}; "
            f"parts lead time {per(settings['default_lead_weeks'], settings['lead_weeks'], ' wk')}"
            f"; closed: {closed}" + (f"; priority: {raised}" if raised else ""))


def _print_plan(data: dict[str, Any]) -> None:
    l_max = "none" if data["l_max"] is None else f"{data['l_max']} week(s)"
    click.echo(f"Overhaul plan from {data['week']} (as of {data['as_of']}): "
               f"{len(data['jobs'])} unit(s), L_max {l_max}, {data['late']} late.")
    click.echo(f"Settings: {_settings_summary(data['settings'])}")
    click.echo("")
    rows = [{**j, "level": LEVEL_MARK[j["level"]],
             "late_by": f"{j['lateness_weeks']} wk" if j["late"] else "",
             "reason": (j["reason"] or "")[:60] + ("..." if len(j["reason"] or "") > 60 else "")}
            for j in data["jobs"]]
    print_table(rows, [("week", "week"), ("week_start", "from"), ("site", "site"),
                       ("fleet_no", "fleet no"), ("level", "level"), ("due_week", "due week"),
                       ("late_by", "past limit by"), ("status", "status"),
                       ("reason", "reason")])
    window = {}
    for slot in data["load"]:
        row = window.setdefault(slot["week"], {"week": slot["week"]})
        row[slot["site"]] = "closed" if slot["closed"] else f"{slot['used']}/{slot['capacity']}"
    sites = sorted({slot["site"] for slot in data["load"]})
    if window:
        click.echo("\nSlots used / capacity per week:")
        print_table(list(window.values())[:data["weeks"]],
                    [("week", "week")] + [(s, s) for s in sites])
    for note in data["notes"]:
        click.echo(f"Note: {note}")


@click.command()
@click.option("--weeks", default=13, show_default=True, type=click.IntRange(1, 104),
              help="Weeks of the planning window shown.")
@click.option("--capacity", multiple=True, metavar="[SITE=]N",
              help="Overhauls per week: N for every site, SITE=N for one (repeatable).")
@click.option("--lead-time", multiple=True, metavar="[SITE=]WEEKS",
              help="Parts lead time in weeks, for every site or one (repeatable).")
@click.option("--closed", multiple=True, metavar="[SITE=]YYYY-Www[..YYYY-Www]",
              help="Weeks the shop is closed, every site or one (repeatable); replaces the "
                   "closed weeks in force.")
@click.option("--priority", multiple=True, metavar="FLEET_NO=WEEKS",
              help="Raise a unit: its effective due week moves WEEKS earlier (0 removes it).")
@click.option("--commit", "do_commit", is_flag=True,
              help="Store this plan; the board shows its units as booked.")
@click.option("--by", default=None, help="Who commits [default: your login name].")
@click.option("--csv", "csv_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Also write the plan as CSV to this file.")
@click.option("--ics", "ics_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Also write the plan as an iCalendar file to import into a calendar.")
@as_of_option
@json_option
@db_option
@friendly_errors
def plan(weeks: int, capacity: tuple[str, ...], lead_time: tuple[str, ...],
         closed: tuple[str, ...], priority: tuple[str, ...], do_commit: bool, by: str | None,
         csv_path: Path | None, ics_path: Path | None, as_of: Any, as_json: bool,
         db: str | None) -> None:
    """Schedule the overhauls of units at act and plan within shop capacity.

    Each overhaul gets a week at or before its due week (the week of the conservative
    projected limit; act units are due now) once parts can arrive, where capacity allows;
    otherwise the worst lateness is as small as it can be, and the plan says which units
    run past their limit and by how much. Options change the settings in force (the last
    committed plan's, else 1 per site per week and 2 weeks' lead time) for a what-if;
    --commit stores the plan with its settings.

    \b
    Example:
        fleetdb plan --capacity "Saltgrass Quay=2" --lead-time 1 --closed 2026-W53
        fleetdb plan --priority LT-902=2 --commit --ics overhauls.ics
    """
    from fleetdb import exports
    from fleetdb import plan as plan_mod

    engine = _engine(db)
    day = None if as_of is None else as_of.date()
    base = plan_mod.current_settings(engine, day)
    cap_default, cap_sites = _per_site(capacity, "a capacity")
    lead_default, lead_sites = _per_site(lead_time, "a lead time")
    settings = base.updated(default_capacity=cap_default, capacity=cap_sites or None,
                            default_lead_weeks=lead_default, lead_weeks=lead_sites or None,
                            closed=_closed(closed), priority=_priorities(priority))
    result = plan_mod.make_plan(engine, day, settings, weeks=weeks)
    data = result.to_dict()
    if settings != base:
        before = plan_mod.make_plan(engine, day, base, weeks=weeks)
        data["compared_to_current"] = plan_mod.compare(before, result)
    if do_commit:
        plan_mod.commit(engine, result, by)
        data["committed"] = result.committed
    if as_json:
        print_json(data)
    else:
        _print_plan(data)
        whatif = data.get("compared_to_current")
        if whatif:
            moved = ", ".join(f"{m['fleet_no']} {m['before']} -> {m['after']}"
                              for m in whatif["moved"]) or "none"
            click.echo(f"What-if against the settings in force: L_max "
                       f"{whatif['l_max']['before']} -> {whatif['l_max']['after']} week(s), "
                       f"late {whatif['late']['before']} -> {whatif['late']['after']}; "
                       f"moved: {moved}.")
        click.echo(CAUTION)
    if result.committed:
        c = result.committed
        click.echo(f"Committed plan {c['plan_id']} by {c['created_by']} at {c['created_at']}: "
                   f"{len(data['jobs'])} unit(s) booked.", err=as_json)
    for path, text in ((csv_path, exports.plan_csv(data) if csv_path else ""),
                       (ics_path, exports.plan_ics(data) if ics_path else "")):
        if path is not None:
            path.write_bytes(text.encode("utf-8"))
            click.echo(f"Wrote {path}", err=as_json)


@click.command()
@click.option("--week", metavar="YYYY-Www", default=None,
              help="The ISO week to report on [default: this week].")
@click.option("--out", "out", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="The HTML file to write [default: fleetdb-report-YYYY-Www.html].")
@click.option("--units", "unit", default="psi", show_default=True,
              type=click.Choice(["psi", "kPa", "bar"]), help="Unit of the charts.")
@click.option("--weeks", default=8, show_default=True, type=click.IntRange(1, 52),
              help="Weeks of the overhaul plan shown.")
@db_option
@friendly_errors
def report(week: str | None, out: Path | None, unit: str, weeks: int, db: str | None) -> None:
    """Write the weekly report: one self-contained HTML file to mail or print.

    The board summary, what changed since last week, the overhaul plan for the coming
    weeks and the wear charts of the units at act and plan. It opens without a network.

    \b
    Example:
        fleetdb report --week 2026-W49 --out weekly-2026-W49.html
    """
    from fleetdb import report as report_mod
    from fleetdb.plan import iso_week, parse_week

    monday = parse_week(week) if week else None
    label = iso_week(monday or dt.date.today())
    path = out or Path(f"fleetdb-report-{label}.html")
    html = report_mod.weekly_report(_engine(db), monday, unit=unit, weeks=weeks)
    path.write_text(html, encoding="utf-8")
    click.echo(f"Wrote the report for {label} to {path} ({len(html.encode()) // 1024} KiB).")
