"""The weekly report: one self-contained HTML file a fleet manager can mail or print.

Sections: the board summary (units per level, per site), the units needing attention,
what changed since last week, the overhaul plan for the coming weeks, and a wear chart
per unit at ``act`` and ``plan``. Everything is inline: the CSS, and plotly.js embedded
once with the first chart (no CDN, no network needed to open it). Levels are shown by word
and shape (■ act, ▲ plan, ◆ retest, ● watch, ○ sound), never by colour alone; the charts
tell cylinders apart by marker shape as well as colour.

The week: a past week is reported as of its Sunday, the current week as of today. The
board reads that week's stored snapshot (computing it if missing); the plan is made under
the settings in force (the last committed plan's, else the defaults) and keeps bookings.
"""

from __future__ import annotations

import datetime as dt
import html
from typing import Any

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import plotly.io as pio
from sqlalchemy.engine import Engine

from fleetdb import __version__
from fleetdb.errors import InvalidValue
from fleetdb.plan import iso_week, week_start
from fleetdb.units import from_kpa

__all__ = ["CAUTION", "LEVEL_SHAPES", "SERVICE_DATA_NOTE", "render", "report_as_of",
           "unit_chart", "weekly_report"]

LEVEL_SHAPES = {"act": "■", "plan": "▲", "retest": "◆", "watch": "●", "sound": "○"}
LEVEL_WORDS = {"act": "act: a limit is crossed", "plan": "plan: projected to cross soon",
               "retest": "retest: latest test not trustworthy or overdue",
               "watch": "watch: worth following", "sound": "sound"}
CAUTION = "fleetdb advises; it does not certify: projected crossings are planning aids."
SERVICE_DATA_NOTE = (
    "Limits are the engine family's service data where it was recorded, otherwise fleetdb's "
    "defaults ('fleetdb defaults' lists each with its source). The engine and machine "
    "maker's service data and local regulations govern; defer to them.")
#: Marker shapes per cylinder (the colour repeats what the shape and the legend say).
_SYMBOLS = ("circle", "square", "diamond", "triangle-up", "triangle-down", "pentagon",
            "hexagon", "star")
_COLOURS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000",
            "#8C510A")
_LIMIT = "#8a1c1c"

_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; color: #1d2329;
       margin: 1.5rem auto; max-width: 64rem; padding: 0 1rem; line-height: 1.4; }
h1 { font-size: 1.5rem; margin-bottom: 0.2rem; } h2 { font-size: 1.2rem; margin-top: 2rem;
border-bottom: 2px solid #1d2329; } h3 { font-size: 1rem; margin: 1.2rem 0 0.3rem; }
table { border-collapse: collapse; margin: 0.5rem 0 1rem; font-size: 0.9rem; }
th, td { border: 1px solid #9aa4ad; padding: 0.25rem 0.5rem; text-align: left;
         vertical-align: top; }
th { background: #e9edf0; } td.num { text-align: right; }
.caution { border: 2px solid #8a1c1c; padding: 0.6rem 0.8rem; margin: 1rem 0;
           background: #fbf3f3; }
.muted { color: #5b6670; } .level { white-space: nowrap; font-weight: 600; }
.level-act { color: #8a1c1c; } .level-plan { color: #8a5a00; }
.level-retest { color: #3d4f8a; } .level-watch { color: #3b5d3b; }
.chart { break-inside: avoid; page-break-inside: avoid; margin-bottom: 1rem; }
@media print { body { margin: 0; max-width: none; } h2 { break-after: avoid; }
  table, .chart { break-inside: avoid; } a { color: inherit; text-decoration: none; } }
"""


def _e(value: Any) -> str:
    return "" if value is None else html.escape(str(value))


def _level(level: str) -> str:
    return (f'<span class="level level-{_e(level)}">{LEVEL_SHAPES[level]} {_e(level)}'
            "</span>")


def _table(headings: list[str], rows: list[list[str]], numeric: set[int] = frozenset()) -> str:
    """An HTML table; cells are already escaped HTML."""
    head = "".join(f"<th>{h}</th>" for h in headings)
    body = "".join("<tr>" + "".join(
        f'<td class="num">{c}</td>' if i in numeric else f"<td>{c}</td>"
        for i, c in enumerate(row)) + "</tr>" for row in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def report_as_of(monday: dt.date | None, today: dt.date | None = None) -> dt.date:
    """The day a week is reported as of: its Sunday, or today for the current week.

    :param monday: any day of the week (default: this week).
    :param today: the current day (default: the system date).
    :raises InvalidValue: a week that has not started.
    """
    today = today or dt.date.today()
    start = week_start(monday or today)
    if start > today:
        raise InvalidValue(f"the week {iso_week(start)} has not started yet")
    return min(start + dt.timedelta(days=6), today)


def unit_chart(report: dict[str, Any], unit: str = "psi") -> go.Figure:
    """Dry compression per cylinder (sea-level equivalent) against engine hours.

    Readings in the wear fit are filled markers, readings left out (untrustworthy, voided)
    hollow, sudden drops ringed (a new fit starts there); the current wear lines are solid
    over their data and dotted to the projected crossing; the family minimum is a dashed
    line named in words.

    :param report: :func:`fleetdb.health.unit_report`'s dict (kPa inside).
    :param unit: psi, kPa or bar.
    """
    fleet_no = report["unit"]["fleet_no"]
    readings = pd.DataFrame(report["readings"])
    fig = go.Figure()
    dry = readings[readings["kind"] == "compression"] if len(readings) else readings
    minimum = float(from_kpa(report["unit"]["min_compression_kpa"], unit))
    last = float(dry["hours"].max()) if len(dry) else 0.0
    cap = last
    for cylinder in sorted(dry["cylinder"].dropna().astype(int).unique()) if len(dry) else []:
        rows = dry[dry["cylinder"] == cylinder]
        symbol = _SYMBOLS[(cylinder - 1) % len(_SYMBOLS)]
        colour = _COLOURS[(cylinder - 1) % len(_COLOURS)]
        kept = rows["in_fit"].astype(bool).to_numpy()
        y = np.asarray(from_kpa(rows["value_sl_kpa"].to_numpy(float), unit))
        for mask, suffix, name in ((kept, "", f"Cyl {cylinder}"),
                                   (~kept, "-open", f"Cyl {cylinder}, left out of the fit")):
            if mask.any():
                fig.add_trace(go.Scatter(
                    x=rows["hours"].to_numpy()[mask], y=y[mask], mode="markers", name=name,
                    legendgroup=f"c{cylinder}",
                    marker={"symbol": symbol + suffix, "size": 8, "color": colour}))
        for fit in report["fits"]:
            if fit["cylinder"] != cylinder or not fit.get("current") or \
                    fit.get("slope_used") is None or fit.get("intercept_used") is None:
                continue
            start, end = float(fit["start_hours"]), float(fit["end_hours"])
            reach = fit.get("projected_hours")
            ends = [end] + ([float(reach)] if reach is not None and reach > end
                            and reach < end + 2 * max(end - start, 1000.0) else [])
            for a, b, dash in zip([start, end], ends, ["solid", "dot"], strict=False):
                xs = np.array([a, b])
                ys = np.asarray(from_kpa(fit["intercept_used"] + fit["slope_used"] * xs, unit))
                fig.add_trace(go.Scatter(x=xs, y=ys, mode="lines", showlegend=False,
                                         legendgroup=f"c{cylinder}", hoverinfo="skip",
                                         line={"color": colour, "width": 2, "dash": dash}))
            cap = max(cap, ends[-1])
    steps = dry[dry["step"].astype(bool)] if len(dry) else dry
    if len(steps):
        fig.add_trace(go.Scatter(
            x=steps["hours"], y=np.asarray(from_kpa(steps["value_sl_kpa"].to_numpy(float), unit)),
            mode="markers", name="sudden drop: a new wear fit starts here",
            marker={"symbol": "circle-open", "size": 17, "color": "#1d2329",
                    "line": {"width": 2}}))
    if not len(dry):
        fig.add_annotation(text="No dry compression readings.", showarrow=False,
                           xref="paper", yref="paper", x=0.5, y=0.5)
    fig.add_hline(y=minimum, line={"color": _LIMIT, "dash": "dash", "width": 2},
                  annotation_text=f"family minimum {minimum:.0f} {unit} (sea-level equivalent)",
                  annotation_position="bottom left")
    fig.update_layout(
        title={"text": f"{fleet_no}: compression per cylinder", "x": 0.01}, height=380,
        margin={"l": 60, "r": 20, "t": 50, "b": 50}, plot_bgcolor="#ffffff",
        paper_bgcolor="#ffffff", legend={"orientation": "h", "y": -0.25})
    fig.update_xaxes(title_text="engine hours (h)", gridcolor="#e3e7ea", showline=True,
                     linecolor="#1d2329", range=None if not len(dry) else
                     [float(dry["hours"].min()) - 0.03 * (cap - dry["hours"].min() + 1),
                      cap * 1.02 + 1])
    fig.update_yaxes(title_text=f"compression ({unit}, sea-level equivalent)",
                     gridcolor="#e3e7ea", showline=True, linecolor="#1d2329")
    return fig


def _board_section(board: dict[str, Any], booked: dict[int, dt.date]) -> str:
    counts = [[_level(lvl), LEVEL_WORDS[lvl].split(": ", 1)[-1], str(n)]
              for lvl, n in board["counts"].items()]
    sites = board["counts_by_site"]
    levels = list(board["counts"])
    per_site = [[_e(site)] + [str(c.get(lvl, 0)) for lvl in levels]
                + [str(sum(c.values()))] for site, c in sites.items()]
    attention = [r for r in board["rows"] if r["level"] in ("act", "plan", "retest")]
    rows = [[_e(r["fleet_no"]), _e(r["site"]), _e(r["engine_family"]), _level(r["level"]),
             _e(r["main_text"]), _e(r["projected_date_early"]), _e(r["hours_to_limit"]),
             _e(iso_week(booked[r["unit_id"]]) if r["unit_id"] in booked else "")]
            for r in attention]
    return ("<section><h2>Board summary</h2>"
            f"<p>{board['total']} units on the board of the week of {_e(board['week_start'])}."
            "</p>" + _table(["level", "meaning", "units"], counts, {2})
            + "<h3>Per site</h3>"
            + _table(["site"] + [_level(lvl) for lvl in levels] + ["total"], per_site,
                     set(range(1, len(levels) + 2)))
            + "<h3>Needing attention</h3>"
            + (_table(["fleet no", "site", "engine family", "level", "main reason",
                       "limit by (conservative)", "hours left", "booked week"], rows, {6})
               if rows else "<p>No unit at act, plan or retest.</p>")
            + "</section>")


def _changes_section(board: dict[str, Any]) -> str:
    if board["previous_week_start"] is None:
        return ("<section><h2>Changes since last week</h2><p class=\"muted\">No stored "
                "snapshot of last week: nothing to compare this week with.</p></section>")
    changed = [r for r in board["rows"] if r["change"] in ("worse", "better", "new")]
    rows = [[_e(r["fleet_no"]), _e(r["site"]), _e(r["change"]),
             _level(r["previous_level"]) if r["previous_level"] else "(not on last week's "
             "board)", _level(r["level"]), _e(r["main_text"])] for r in changed]
    body = (_table(["fleet no", "site", "change", "last week", "this week", "main reason"],
                   rows) if rows else "<p>No unit changed level.</p>")
    return (f"<section><h2>Changes since last week</h2><p>Compared with the week of "
            f"{_e(board['previous_week_start'])}.</p>{body}</section>")


def _plan_section(plan: dict[str, Any], weeks: int) -> str:
    horizon = dt.date.fromisoformat(plan["week_start"]) + dt.timedelta(weeks=weeks)
    jobs = plan["jobs"]
    rows = [[_e(j["week"]), _e(j["site"]), _e(j["fleet_no"]), _level(j["level"]),
             _e(j["due_week"]),
             _e(f"{j['lateness_weeks']} week(s)" if j["late"] else "no"), _e(j["status"])]
            for j in jobs]
    later = sum(dt.date.fromisoformat(j["week_start"]) >= horizon for j in jobs)
    slots = [s for s in plan["load"] if dt.date.fromisoformat(s["week_start"]) < horizon]
    sites = sorted({s["site"] for s in slots})
    by_week: dict[str, dict[str, str]] = {}
    for s in slots:
        by_week.setdefault(s["week"], {})[s["site"]] = (
            "closed" if s["closed"] else f"{s['used']} / {s['capacity']}")
    load = [[_e(w)] + [_e(cells.get(site, "")) for site in sites] for w, cells in
            by_week.items()]
    committed = plan.get("based_on")
    l_max = "none" if plan["l_max"] is None else f"{plan['l_max']} week(s)"
    return ("<section><h2>Overhaul plan</h2>"
            f"<p>From {_e(plan['week'])}: {len(jobs)} unit(s) at act or plan; worst lateness "
            f"(L_max) {_e(l_max)}; {plan['late']} unit(s) run past their conservative "
            "projected limit. Due week: the week of the conservative projected limit; units "
            "at act are due now. "
            + (f"Bookings of committed plan {committed} are kept." if committed else
               "No plan is committed yet: this is a draft.") + "</p>"
            + (_table(["week", "site", "fleet no", "level", "due week", "past its limit by",
                       "status"], rows) if rows else "<p>Nothing to schedule.</p>")
            + (f"<p>{later} of them fall after the {weeks} weeks shown below.</p>"
               if later else "")
            + "".join(f"<p class=\"muted\">{_e(n)}</p>" for n in plan["notes"])
            + f"<h3>Slots used / capacity, next {weeks} weeks</h3>"
            + _table(["week"] + [_e(s) for s in sites], load) + "</section>")


def render(board: dict[str, Any], plan: dict[str, Any],
           charts: list[tuple[dict[str, Any], go.Figure]], *, as_of: dt.date,
           booked: dict[int, dt.date] | None = None, weeks: int = 8) -> str:
    """The report as one HTML document (pure: no database).

    :param board: :func:`fleetdb.health.board` of the week.
    :param plan: :meth:`fleetdb.plan.Plan.to_dict` of the plan.
    :param charts: (board row, figure) per unit charted.
    :param as_of: the day the report is as of.
    :param booked: booked weeks by unit id (:func:`fleetdb.plan.bookings`).
    :param weeks: weeks of the plan shown.
    """
    monday = dt.date.fromisoformat(board["week_start"])
    label = iso_week(monday)
    figures = []
    for n, (row, fig) in enumerate(charts):
        div = pio.to_html(fig, full_html=False, include_plotlyjs=(n == 0),
                          config={"displaylogo": False, "responsive": True},
                          div_id=f"chart-{row['unit_id']}")
        figures.append(f'<div class="chart"><h3>{_e(row["fleet_no"])} · {_level(row["level"])}'
                       f' · {_e(row["site"])}</h3><p>{_e(row["main_text"])}</p>{div}</div>')
    charts_html = ("<section><h2>Wear of the units at act and plan</h2>"
                   "<p>Dry compression per cylinder, sea-level equivalent, against engine "
                   "hours: filled markers are in the wear fit, hollow ones left out, ringed ones "
                   "sudden drops that start a new fit; solid "
                   "lines are the wear fits, dotted lines their projections to the limit."
                   "</p>" + ("".join(figures) or "<p>No unit at act or plan.</p>")
                   + "</section>")
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        f"<title>Engine health report {label}</title>"
        f"<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
        f"<style>{_CSS}</style></head><body>"
        f"<h1>Engine health report, week {label}</h1>"
        f"<p class=\"muted\">{monday:%d %b %Y} to {monday + dt.timedelta(days=6):%d %b %Y}; "
        f"as of {as_of.isoformat()}. Levels: "
        + ", ".join(f"{LEVEL_SHAPES[k]} {_e(v)}" for k, v in LEVEL_WORDS.items()) + ".</p>"
        f"<div class=\"caution\"><strong>{_e(CAUTION)}</strong><br>{_e(SERVICE_DATA_NOTE)}"
        "</div>"
        + _board_section(board, booked or {}) + _changes_section(board)
        + _plan_section(plan, weeks) + charts_html
        + f"<p class=\"muted\">Made by fleetdb {_e(__version__)}. {_e(CAUTION)}</p>"
        "</body></html>\n")


def weekly_report(engine: Engine, week: dt.date | None = None, *, unit: str = "psi",
                  weeks: int = 8, today: dt.date | None = None) -> str:
    """The weekly report of the store as one self-contained HTML document.

    :param engine: the store.
    :param week: any day of the week to report on (default: this week).
    :param unit: pressure unit of the charts (psi, kPa, bar).
    :param weeks: weeks of the overhaul plan shown.
    :param today: the current day (default: the system date); sets the as-of day.
    """
    from fleetdb import health
    from fleetdb import plan as plan_mod

    as_of = report_as_of(week, today)
    board = health.board(engine, as_of)
    plan = plan_mod.make_plan(engine, as_of, weeks=weeks)
    booked = plan_mod.bookings(engine, as_of)
    charts = [(row, unit_chart(health.unit_report(engine, row["fleet_no"], as_of), unit))
              for row in board["rows"] if row["level"] in ("act", "plan")]
    return render(board, plan.to_dict(), charts, as_of=as_of, booked=booked, weeks=weeks)
