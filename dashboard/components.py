"""Reusable layout pieces: level badges, labelled fields, problem lists, the safety panel.

Levels are never told by colour alone. Each level has a word and a shape marker, and the
colour only repeats what the word says (for readers who cannot tell the colours apart,
and for printouts in black and white):

=======  ======  ==================================================================
level    marker  meaning
=======  ======  ==================================================================
act      ■       a limit is crossed on a valid test (filled square: the heaviest mark)
plan     ▲       projected to cross a limit within the planning horizon (triangle: ahead)
retest   ◆       the latest test is not trustworthy, or a test is overdue (diamond)
watch    ●       wearing faster than its family, a sudden drop, close to a limit (dot)
sound    ○       nothing to report (open circle: the lightest mark)
=======  ======  ==================================================================
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any
from urllib.parse import urlencode

from dash import html

from fleetdb.units import from_kpa

#: Health levels, worst first, with the marker shown before the word.
LEVEL_MARKERS: dict[str, str] = {
    "act": "■",
    "plan": "▲",
    "retest": "◆",
    "watch": "●",
    "sound": "○",
}
LEVELS: tuple[str, ...] = tuple(LEVEL_MARKERS)

#: Finding severities (fleetdb.checks.SEVERITIES) as short words for the reader.
SEVERITY_WORDS: dict[str, str] = {
    "limit": "limit crossed",
    "artefact": "test problem",
    "pattern": "pattern",
    "note": "note",
}


def level_badge(level: str | None) -> html.Span:
    """A level as marker and word, e.g. ``■ act``; an unknown or missing level as ``– none``.

    :param level: one of :data:`LEVELS`, or None.
    """
    if level not in LEVEL_MARKERS:
        return html.Span(["–", " none"], className="level level-none",
                         title="no level recorded")
    return html.Span([html.Span(LEVEL_MARKERS[level], className="level-marker", **{
        "aria-hidden": "true"}), f" {level}"], className=f"level level-{level}",
        title=f"level: {level}")


def level_change(previous: str | None, current: str | None) -> html.Span:
    """``previous -> current`` as two badges; no earlier level reads as such in words."""
    if previous is None:
        return html.Span([html.Span("no earlier level", className="hint"),
                          html.Span(" → ", className="arrow"), level_badge(current)],
                         className="level-change")
    return html.Span([level_badge(previous), html.Span(" → ", className="arrow"),
                      level_badge(current)], className="level-change")


def severity_tag(severity: str) -> html.Span:
    """A finding's severity as a word in a small frame."""
    return html.Span(SEVERITY_WORDS.get(severity, severity),
                     className=f"severity severity-{severity}")


def field(label: str, control: Any, *, hint: str | None = None,
          class_name: str = "field") -> html.Div:
    """A labelled form control, with an optional hint under it.

    :param label: the label text.
    :param control: the input component (its ``id`` is linked to the label).
    :param hint: a short help line.
    """
    control_id = getattr(control, "id", None)
    parts: list[Any] = [html.Label(label, htmlFor=control_id if isinstance(control_id, str)
                                   else None), control]
    if hint:
        parts.append(html.Small(hint, className="hint"))
    return html.Div(parts, className=class_name)


def problem_list(title: str, problems: Iterable[tuple[str, str]]) -> html.Div | None:
    """Problems as an alert: each ``(where, message)`` on its own line; None when empty.

    :param title: what the list is about ("Not saved", "Check before saving").
    :param problems: pairs of a place in the form and the message.
    """
    items = [html.Li([html.Strong(f"{where}: "), message]) for where, message in problems]
    if not items:
        return None
    return html.Div([html.P(title, className="alert-title"), html.Ul(items)],
                    className="alert alert-problem", role="alert")


def pressure_text(value_kpa: float | None, unit: str) -> str:
    """A pressure in kPa shown in ``unit`` with one decimal, or ``–`` when missing.

    :param value_kpa: the pressure in kPa (fleetdb's unit inside).
    :param unit: psi, kPa or bar.
    """
    return "–" if value_kpa is None else f"{from_kpa(value_kpa, unit):.1f} {unit}"


def verdict_panel(verdict: dict[str, Any], unit: str, panel_id: str,
                  figure: Any = None) -> html.Section:
    """fleetdb's verdict on one test (``health.test_verdict``); pressures in ``unit``.

    :param verdict: the mapping documented in DEVELOPERS.md, "The health API"; its
        pressures are sea-level equivalents in kPa.
    :param unit: the pressure unit to show.
    :param panel_id: the page-prefixed id of the panel.
    :param figure: a graph of the test to show under the words, if any.
    """
    trust = ("✓ yes" if verdict["trustworthy"]
             else "✗ no: its readings are not counted as wear")
    ratio = "–" if verdict.get("ratio") is None else f"{verdict['ratio']:.2f}"
    findings = [html.Li([severity_tag(f["severity"]), " ", f["text"]])
                for f in verdict["findings"]] or [html.Li("No findings.")]
    return html.Section([
        html.H2(f"Verdict on test {verdict['test_id']} ({verdict['fleet_no']})"),
        html.P(["Level: ", level_change(verdict.get("previous_level"), verdict.get("level"))]),
        html.P(f"Trustworthy: {trust}", className="trust"),
        html.P(f"Spread (sea-level equivalent): lowest "
               f"{pressure_text(verdict.get('lowest_kpa'), unit)}, highest "
               f"{pressure_text(verdict.get('highest_kpa'), unit)}, lowest/highest {ratio}",
               className="spread"),
        html.H3("Findings on this test"),
        html.Ul(findings, className="findings"),
        *_limits_line(verdict.get("limits")),
        *_reasons(verdict.get("reasons") or [], verdict.get("level")),
        *([] if figure is None else [figure]),
    ], className="panel panel-verdict", id=panel_id)


def _limits_line(limits: dict[str, Any] | None) -> list[Any]:
    """Which version of the engine family's limits the test was judged by (if known)."""
    if not limits:
        return []
    return [html.P(f"Judged by the engine family's limits version {limits['version']} "
                   f"(set {limits['set_at']} UTC by {limits['set_by'] or 'unknown'}: "
                   f"{limits['reason']})", className="limits-version")]


def _reasons(reasons: list[dict[str, Any]], level: str | None) -> list[Any]:
    """Why the unit stands at its level (the verdict's optional ``reasons``)."""
    if not reasons:
        return []
    return [html.H3(["Why the unit is at ", level_badge(level)]),
            html.Ul([html.Li([level_badge(r.get("level")), " ", r["text"]]) for r in reasons],
                    className="findings")]


SAFETY_POINTS: tuple[tuple[str, str], ...] = (
    ("Before cranking",
     "disable ignition and fuel as the service data says; use a remote starter where the "
     "maker calls for one."),
    ("Fuel and vapour",
     "no sparks or flames; LPG is heavier than air and gathers in pits: close the cylinder "
     "valve, check for leaks, ventilate."),
    ("Heat",
     "engines, exhausts and oil burn; let the engine cool as the procedure says before "
     "removing plugs; never open a hot pressurised cooling system."),
    ("Moving parts",
     "keep hands, hair, clothing and tools clear of fans and belts; wear safety glasses."),
    ("Leak-down",
     "air off top dead centre can turn the crankshaft suddenly: hold the crank, use the "
     "specified supply pressure."),
    ("Running tests",
     "exhaust carries carbon monoxide: ventilate or extract; neutral or park, brake set, "
     "wheels blocked."),
    ("The machine",
     "forks and implements lowered, controls neutral, brakes set, wheels chocked; never "
     "under a raised mast or load; generator sets isolated from auto-start and transfer."),
    ("Batteries and starters",
     "hydrogen: no sparks at the battery; rated remote-starter leads; let the starter cool."),
    ("Diesels",
     "a gauge rated for diesel pressures (1,000 psi / 7 MPa or more); never add oil to a "
     "diesel cylinder; injection sprays pierce skin."),
)


def safety_panel(panel_id: str) -> html.Aside:
    """The safety cautions, deferring to the maker's data, regulations and licensed practice.

    :param panel_id: the page-prefixed id of the panel.
    """
    return html.Aside([
        html.H2("Safety first"),
        html.P(["Testing is hazardous work. Follow the engine and machine maker's service "
                "data, your site's procedures, local regulations (lockout/tagout, powered "
                "industrial trucks, or your national equivalent) and licensed practice. ",
                html.Strong("fleetdb advises; it does not certify.")]),
        html.Ul([html.Li([html.Strong(f"{head}: "), text]) for head, text in SAFETY_POINTS]),
        html.P("A verdict or a projected date is a planning aid, never a safety "
               "certification.", className="hint"),
    ], id=panel_id, className="panel panel-safety", **{"aria-label": "Safety cautions"})


# -- Health board -----------------------------------------------------------------------------

#: How the board names a change since last week.
CHANGE_WORDS = {"new": "new this week", "same": "same", "worse": "worse", "better": "better"}


def level_text(level: str | None) -> str:
    """A level as plain text with its marker (``■ act``), for table cells and options."""
    return f"{LEVEL_MARKERS[level]} {level}" if level in LEVEL_MARKERS else "– none"


def level_options() -> list[dict[str, str]]:
    """The levels as dropdown options, worst first, each with its marker."""
    return [{"label": level_text(level), "value": level} for level in LEVELS]


def level_counts(counts: dict[str, int]) -> html.Ul:
    """One badge and number per level, worst first (``■ act 3``).

    :param counts: units per level (``board()["counts"]``).
    """
    return html.Ul([html.Li([level_badge(level), html.Span(f"{counts.get(level, 0):,}",
                                                           className="count-number")],
                            className="count", title=f"{counts.get(level, 0)} units at "
                                                     f"level {level}")
                    for level in LEVELS], className="level-counts")


def site_level_table(counts_by_site: dict[str, dict[str, int]]) -> html.Table:
    """Sites down, levels across, units in each cell; a total per site.

    :param counts_by_site: ``board()["counts_by_site"]``.
    """
    head = html.Tr([html.Th("Site", scope="col"),
                    *[html.Th(level_badge(level), scope="col") for level in LEVELS],
                    html.Th("units", scope="col")])
    body = [html.Tr([html.Th(site, scope="row"),
                     *[html.Td(f"{levels.get(level, 0):,}" if levels.get(level) else "·",
                               className="num") for level in LEVELS],
                     html.Td(f"{sum(levels.values()):,}", className="num")])
            for site, levels in sorted(counts_by_site.items())]
    return html.Table([html.Thead(head), html.Tbody(body)], className="site-levels")


def unit_href(fleet_no: str, as_of: str | None = None) -> str:
    """The unit page's address for a fleet number (and the day shown, when given)."""
    query = {"fleet_no": fleet_no, **({"as_of": as_of} if as_of else {})}
    return "/unit?" + urlencode(query)


def _change_text(row: dict[str, Any]) -> str:
    change = row.get("change")
    if change is None:
        return "– no snapshot last week"
    words = CHANGE_WORDS.get(change, change)
    if change in ("worse", "better"):
        return f"{words}, was {level_text(row.get('previous_level'))}"
    return words


def _markdown_text(value: str) -> str:
    """Text safe inside a markdown cell: markdown's own characters escaped."""
    return "".join("\\" + ch if ch in "\\`*_{}[]()#+-.!<>|" else ch for ch in value)


def board_table_rows(rows: list[dict[str, Any]], as_of: str | None) -> list[dict[str, Any]]:
    """Board rows (``fleetdb.health.board``) as the cells of the board's table.

    :param rows: one page of board rows.
    :param as_of: the day shown, carried into each unit link.
    """
    out = []
    for row in rows:
        early, best = row.get("projected_date_early"), row.get("projected_date")
        hours = row.get("hours_to_limit")
        out.append({
            "id": row["fleet_no"],
            "fleet_no": f"[{_markdown_text(row['fleet_no'])}]"
                        f"({unit_href(row['fleet_no'], as_of)})",
            "site": row["site"], "engine_family": row["engine_family"],
            "level": level_text(row["level"]),
            "reason": row.get("main_text") or "Nothing found: every check passes.",
            "limit_date": "–" if early is None else (
                early[:10] + ("" if best is None or best[:10] == early[:10]
                              else f" (best estimate {best[:10]})")),
            "hours_to_limit": "–" if hours is None else f"{hours:,.0f} h",
            "last_test": (row.get("last_tested_at") or "never")[:10],
            "change": _change_text(row),
        })
    return out


# -- Unit history ---------------------------------------------------------------------------

def unit_header(report: dict[str, Any], unit: str) -> html.Section:
    """Who the unit is, its level, each reason in words and its projected crossing.

    :param report: ``fleetdb.health.unit_report``.
    :param unit: the pressure unit for the minimum.
    """
    u = report["unit"]
    last = ("never tested" if not u.get("last_tested_at") else
            f"last test {u['last_tested_at'][:10]} at {u.get('last_hours') or 0:,.0f} h")
    ratio = "" if u.get("min_ratio") is None else f", minimum ratio {u['min_ratio']:.2f}"
    reasons = [html.Li([level_badge(r["level"]), " ", r["text"]]) for r in report["reasons"]]
    early, best = report.get("projected_date_early"), report.get("projected_date")
    projection = ("No limit crossing projected from the current wear lines." if early is None
                  else f"Projected to reach a limit around {early[:10]} (conservative, 95 %)"
                       f"; best estimate {(best or early)[:10]}, at about "
                       f"{report.get('projected_hours') or 0:,.0f} h. A planning aid, not a "
                       "certification.")
    return html.Section([
        html.H2([f"{u['fleet_no']} ", level_badge(report["level"])], className="unit-title"),
        html.P(f"{u['engine_family']} · {u['fuel']} · {u['cylinders']} cylinders "
               f"({u['banks']}) · {u['site']} ({u['site_elevation_m']:,.0f} m) · family "
               f"minimum {pressure_text(u['min_compression_kpa'], unit)}{ratio} · {last} · "
               f"as of {report['as_of']}",
               className="hint"),
        html.H3("Why this level"),
        html.Ul(reasons or [html.Li([level_badge("sound"), " Nothing found: every check "
                                     "passes and no limit is near."])], className="findings"),
        html.P(projection, className="projection"),
    ], className="panel panel-unit")


def _number(value: Any, digits: int = 0, suffix: str = "") -> str:
    return "–" if value is None else f"{value:,.{digits}f}{suffix}"


def tests_table(report: dict[str, Any], unit: str) -> html.Table:
    """Every test of the unit, newest first, with its conditions, spread and findings.

    :param report: ``fleetdb.health.unit_report``.
    :param unit: the pressure unit for lowest and highest.
    """
    head = html.Tr([html.Th(h, scope="col") for h in (
        "Test", "Date", "Hours", "Standing", "Battery", "Cranking", "Engine",
        "Lowest (sea level)", "Highest (sea level)", "Ratio", "Findings")])
    body = []
    for t in reversed(report["tests"]):
        standing = ("✗ voided: " + (t.get("void_reason") or "no reason given")
                    if t["voided"] else "✓ trustworthy" if t["trustworthy"]
                    else "◌ not trustworthy")
        findings = [html.Li([severity_tag(f["severity"]), " ", f["text"]])
                    for f in t["findings"]]
        body.append(html.Tr([
            html.Td(str(t["test_id"])), html.Td(t["tested_at"][:16]),
            html.Td(_number(t["hours"]), className="num"),
            html.Td(standing, className="standing-voided" if t["voided"] else
                    ("" if t["trustworthy"] else "standing-untrusted")),
            html.Td(_number(t.get("battery_v"), 1, " V"), className="num"),
            html.Td(_number(t.get("crank_rpm"), 0, " rpm"), className="num"),
            html.Td(_number(t.get("engine_temp_c"), 0, " °C"), className="num"),
            html.Td(pressure_text(t.get("lowest_kpa"), unit), className="num"),
            html.Td(pressure_text(t.get("highest_kpa"), unit), className="num"),
            html.Td(_number(t.get("ratio"), 2), className="num"),
            html.Td(html.Ul(findings, className="findings") if findings else "none"),
        ], className="test-voided" if t["voided"] else None))
    return html.Table([html.Thead(head), html.Tbody(body)], className="tests-table")
