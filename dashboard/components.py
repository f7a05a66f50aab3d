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
        *_reasons(verdict.get("reasons") or [], verdict.get("level")),
        *([] if figure is None else [figure]),
    ], className="panel panel-verdict", id=panel_id)


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
