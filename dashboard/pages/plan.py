"""Overhaul plan: the planner's screen. The schedule per site and week, what-if, commit.

The page shows the plan under the settings in force on load; "Try" shows the schedule
under the settings typed and what changes (nothing stored); "Commit" stores it with who
committed it, and it becomes the plan in force. Every schedule comes from
``fleetdb.plan`` through :mod:`dashboard.data`; the browser keeps only the day and the
settings of the plan shown (for the downloads), never the schedule itself.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import dash
from dash import ALL, Input, Output, State, callback, ctx, dcc, html, no_update

from dashboard import components, data, figures, ids
from fleetdb import access
from fleetdb import plan as plan_mod
from fleetdb.errors import FleetDBError
from fleetdb.exports import CAUTION

dash.register_page(__name__, path="/plan", name="Overhaul plan", title="Overhaul plan · fleetdb",
                   order=4)

_GRAPH_CONFIG = {"displaylogo": False,
                 "modeBarButtonsToRemove": ["select2d", "lasso2d", "autoScale2d"]}
STATUS_WORDS = {"new": "new", "booked": "kept its booking", "rebooked": "rebooked"}


def layout(as_of: str | None = None, **_query: Any) -> html.Div:
    """The page; cheap: the settings, the schedule and the table are filled by callbacks."""
    day = data.parse_day(as_of) or dt.date.today()
    actor = access.current()  # pages hide what the role cannot do; the server checks again
    return html.Div([
        html.Div([
            html.H1("Overhaul plan"),
            components.field("As of", dcc.DatePickerSingle(
                id=ids.PLAN_AS_OF, date=day.isoformat(), display_format="YYYY-MM-DD",
                first_day_of_week=1, clearable=False), class_name="field as-of"),
        ], className="page-head"),
        html.Div(id=ids.PLAN_STATE, className="plan-state", **{"aria-live": "polite"}),
        html.Div(id=ids.PLAN_MESSAGE, **{"aria-live": "assertive"}),
        html.Div([
            html.Section([
                html.H2("Shop settings"),
                html.P("Change any setting and press Try: the schedule below is made again "
                       "and compared with the plan in force. Nothing is stored until you "
                       "commit.", className="hint"),
                html.Div(id=ids.PLAN_SITES),
                components.field("Closed weeks at every site", dcc.Input(
                    id=ids.PLAN_CLOSED_ALL, type="text", autoComplete="off",
                    placeholder="e.g. 2026-W52, 2026-W53"),
                    hint="ISO weeks, comma separated; a range as 2026-W52..2027-W01"),
                components.field("Priority raises", dcc.Input(
                    id=ids.PLAN_PRIORITY, type="text", autoComplete="off",
                    placeholder="e.g. LT-902=2, GS-901=1"),
                    hint="FLEET_NO=WEEKS: the unit is treated as due that many weeks "
                         "earlier; 0 removes a raise"),
                html.Button("Try these settings", id=ids.PLAN_TRY, n_clicks=0,
                            className="button-secondary"),
                html.Div([
                    html.Div(components.field("Committed by", dcc.Input(
                        id=ids.PLAN_WHO, type="text", autoComplete="off",
                        placeholder="your name")), hidden=actor.role is not None),
                    html.Button("Commit this plan", id=ids.PLAN_COMMIT, n_clicks=0,
                                className="button-primary",
                                title="Store the plan under these settings; the board shows "
                                      "its units as booked"),
                ], className="plan-commit", hidden=not actor.may("plan")),
            ], className="panel plan-settings"),
            html.Div([
                html.Section([html.H2("This plan"), html.Div(id=ids.PLAN_SUMMARY),
                              html.Div([
                                  html.Button("Download CSV", id=ids.PLAN_CSV, n_clicks=0,
                                              className="button-secondary"),
                                  html.Button("Download calendar (.ics)", id=ids.PLAN_ICS,
                                              n_clicks=0, className="button-secondary"),
                              ], className="plan-downloads",
                                  hidden=not actor.may("export"))], className="panel"),
                html.Section([html.H2("What changed"), html.Div(id=ids.PLAN_CHANGES)],
                             className="panel"),
            ]),
        ], className="plan-grid"),
        html.Section([
            html.H2("Week by week"),
            dcc.Graph(id=ids.PLAN_TIMELINE, config=_GRAPH_CONFIG),
            html.P(["Rows are sites, columns ISO weeks. Each week shows its overhaul slots "
                    "used over its capacity (bold when full). ",
                    html.Strong("● a dot"), ": an overhaul in or before its due week; ",
                    html.Strong("✕ a cross"), " labelled “late by N wk”: after the unit's "
                    "conservative projected limit, with a dotted line back to its due week."],
                   className="hint"),
        ], className="panel"),
        html.Section([html.H2("Overhauls"), html.Div(id=ids.PLAN_JOBS),
                      html.Div(id=ids.PLAN_NOTES)], className="panel"),
        dcc.Store(id=ids.PLAN_SHOWN),
        dcc.Download(id=ids.PLAN_DOWNLOAD),
    ])


def site_settings(sites: list[str], settings: plan_mod.ShopSettings) -> html.Table:
    """One row per site: overhauls per week, parts lead time and closed weeks, as in force.

    :param sites: every site of the store.
    :param settings: the settings in force (their values fill the inputs).
    """
    def labelled(label: str, control: dcc.Input) -> html.Label:
        # The column head says it to the eye; the hidden words name each input to a reader.
        return html.Label([html.Span(label, className="visually-hidden"), control])

    def number(component_id: dict[str, Any], value: int, label: str) -> html.Label:
        return labelled(label, dcc.Input(id=component_id, type="number", min=0, step=1,
                                         value=value, className="plan-number"))

    rows = [html.Tr([
        html.Th(site, scope="row"),
        html.Td(number(ids.plan_capacity(site), settings.capacity_of(site),
                       f"Capacity at {site}")),
        html.Td(number(ids.plan_lead(site), settings.lead_of(site),
                       f"Parts lead time at {site}")),
        html.Td(labelled(f"Closed weeks at {site}", dcc.Input(
            id=ids.plan_closed(site), type="text", autoComplete="off",
            value=week_list(settings.closed.get(site, frozenset())), placeholder="none",
            className="plan-weeks"))),
    ]) for site in sites]
    head = html.Tr([html.Th(h, scope="col") for h in (
        "Site", "Overhauls per week", "Parts lead time (weeks)", "Closed weeks")])
    return html.Table([html.Thead(head), html.Tbody(rows)], className="plan-site-table")


def week_list(days: frozenset[dt.date]) -> str:
    """Mondays as ``2026-W52, 2026-W53`` (the text the closed-weeks inputs take)."""
    return ", ".join(plan_mod.iso_week(d) for d in sorted(days))


# -- what the page shows of a plan ------------------------------------------------------------

def _when(stamp: str) -> str:
    """A stored UTC time as ``2026-12-01 10:22 UTC``."""
    return stamp[:16].replace("T", " ") + " UTC"


def _committed_words(info: dict[str, Any]) -> str:
    return (f"committed plan {info['plan_id']} by {info['created_by']} at "
            f"{_when(info['created_at'])}")


def state_line(outcome: data.PlanOutcome) -> html.P:
    """Which plan is shown: the stored one in force, a draft, a what-if, one just committed."""
    plan, latest = outcome.plan, outcome.in_force
    if outcome.kind == "committed":
        return html.P(f"✓ Stored: {_committed_words(plan.committed)}, {len(plan.jobs)} unit(s) "
                      "booked. This is now the plan in force.",
                      className="plan-state-stored ok")
    if outcome.kind == "what_if":
        return html.P("What-if under the settings typed: not stored. Commit to store it.",
                      className="plan-state-draft")
    if outcome.is_stored:
        return html.P(f"Plan in force: {_committed_words(latest)}.",
                      className="plan-state-stored")
    if latest is None:
        return html.P("No plan committed yet: this draft uses fleetdb's default settings. "
                      "Nothing is stored until you commit.", className="plan-state-draft")
    return html.P(f"Draft under the settings of the plan in force ({_committed_words(latest)}"
                  "): some units are new or rebooked since. Commit to store it.",
                  className="plan-state-draft")


def settings_items(settings: plan_mod.ShopSettings, sites: list[str]) -> list[html.Li]:
    """The settings in words, one line each: capacity, lead time, closed weeks, raises."""
    def per_site(value_of: Any, unit: str) -> str:
        return "; ".join(f"{site} {value_of(site)}{unit}" for site in sites) or "no site"

    closed = "; ".join(f"{'every site' if site == data.EVERY_SITE else site}: "
                       f"{week_list(days)}" for site, days in sorted(settings.closed.items())
                       if days) or "none"
    raised = ", ".join(f"{f} +{n} wk" for f, n in sorted(settings.priority.items())) or "none"
    return [html.Li(f"Overhauls per week: {per_site(settings.capacity_of, '')}"),
            html.Li(f"Parts lead time: {per_site(settings.lead_of, ' wk')}"),
            html.Li(f"Closed weeks: {closed}"), html.Li(f"Priority raises: {raised}")]


def summary(plan: plan_mod.Plan) -> list[Any]:
    """L_max, the late units and the settings of a plan."""
    late = plan.jobs[plan.jobs["late"]]
    late_words = (", ".join(f"{r.fleet_no} by {r.lateness_weeks} wk" for r in late.itertuples())
                  if len(late) else "none")
    l_max = ("– (nothing to schedule)" if plan.l_max is None else
             f"{plan.l_max} wk" if plan.l_max > 0 else f"{plan.l_max} wk (none late)")
    sites = sorted(plan.load["site"].unique())
    return [html.Dl([
        html.Dt("Overhauls"), html.Dd(f"{len(plan.jobs)} unit(s) at act or plan, from "
                                      f"{plan_mod.iso_week(plan.week_start)}"),
        html.Dt("L_max (worst lateness)"), html.Dd(l_max, className="plan-lmax"),
        html.Dt("Late units"), html.Dd(f"{len(late)}: {late_words}" if len(late) else "0",
                                       className="plan-late"),
    ], className="plan-facts"),
        html.H3("Settings"), html.Ul(settings_items(plan.settings, sites), className="plan-set"),
        html.P(CAUTION, className="hint")]


def changes(outcome: data.PlanOutcome) -> list[Any]:
    """What the settings typed change against the plan in force (``fleetdb.plan.compare``)."""
    found = outcome.comparison
    if found is None:
        return [html.P("Change a setting and press Try to see what it does against the plan "
                       "in force.", className="hint")]
    moved = [html.Tr([html.Td(m["fleet_no"]), html.Td(m["before"]), html.Td(m["after"]),
                      html.Td(f"{abs(m['weeks'])} wk " + ("earlier" if m["weeks"] < 0
                                                           else "later"))])
             for m in found["moved"]]

    def arrow(key: str, unit: str = "") -> str:
        before, after = ("–" if v is None else f"{v}{unit}" for v in (
            found[key]["before"], found[key]["after"]))
        return f"{before} → {after}"

    against = ("Against the plan in force before this commit." if outcome.kind == "committed"
               else "Against the plan in force; nothing stored.")
    return [html.P(against, className="hint"),
            html.Dl([html.Dt("L_max"), html.Dd(arrow("l_max", " wk"),
                                               className="plan-lmax-change"),
                     html.Dt("Late units"), html.Dd(arrow("late"),
                                                    className="plan-late-change")],
                    className="plan-facts"),
            html.Table([html.Thead(html.Tr([html.Th(h, scope="col") for h in (
                "Fleet no.", "Before", "After", "Moves")])), html.Tbody(moved)],
                className="plan-moved") if moved else html.P("No unit moves.")]


def lateness_cell(weeks: int) -> html.Td:
    """Lateness in words with its shape: ``✕ late by 2 wk``, ``● in its due week``."""
    if weeks > 0:
        return html.Td([html.Span("✕", **{"aria-hidden": "true"}), f" late by {weeks} wk"],
                       className="plan-late-cell")
    words = "in its due week" if weeks == 0 else f"{-weeks} wk before its due week"
    return html.Td([html.Span("●", **{"aria-hidden": "true"}), f" {words}"],
                   className="plan-on-time-cell")


def jobs_table(plan: plan_mod.Plan) -> html.Table | html.P:
    """One row per overhaul, in week order: the unit, its level, due and booked weeks, why."""
    if plan.jobs.empty:
        return html.P("No unit is at act or plan: nothing to schedule.", className="hint")
    as_of = plan.as_of.isoformat()
    head = html.Tr([html.Th(h, scope="col") for h in (
        "Fleet no.", "Site", "Level", "Due week", "Scheduled week", "Lateness", "Status",
        "Reason")])
    body = [html.Tr([
        html.Td(dcc.Link(j.fleet_no, href=components.unit_href(j.fleet_no, as_of))),
        html.Td(j.site), html.Td(components.level_badge(j.level)), html.Td(j.due_week),
        html.Td(j.week), lateness_cell(int(j.lateness_weeks)),
        html.Td(STATUS_WORDS.get(j.status, j.status) + (f"; raised +{j.priority} wk"
                                                          if j.priority else "")),
        html.Td(j.reason or f"level {j.level}", className="plan-reason"),
    ], className="plan-job-late" if j.late else "plan-job") for j in plan.jobs.itertuples()]
    return html.Table([html.Thead(head), html.Tbody(body)], className="plan-jobs")


def notes(plan: plan_mod.Plan) -> html.Ul | None:
    """fleetdb's notes on the plan (rebooked units, raises that change nothing, late units)."""
    return html.Ul([html.Li(n) for n in plan.notes], className="plan-notes") \
        if plan.notes else None


def shown(outcome: data.PlanOutcome) -> dict[str, Any]:
    """Every output of :func:`_show_plan` for one plan."""
    plan = outcome.plan
    return {"state": state_line(outcome), "message": None, "summary": summary(plan),
            "changes": changes(outcome), "timeline": figures.plan_timeline(plan.jobs, plan.load),
            "jobs": jobs_table(plan), "notes": notes(plan), "kept": outcome.key()}


# -- callbacks --------------------------------------------------------------------------------

_SHOWN = {"state": Output(ids.PLAN_STATE, "children"),
          "message": Output(ids.PLAN_MESSAGE, "children"),
          "summary": Output(ids.PLAN_SUMMARY, "children"),
          "changes": Output(ids.PLAN_CHANGES, "children"),
          "timeline": Output(ids.PLAN_TIMELINE, "figure"),
          "jobs": Output(ids.PLAN_JOBS, "children"), "notes": Output(ids.PLAN_NOTES, "children"),
          "kept": Output(ids.PLAN_SHOWN, "data")}
_FORM = {"capacity": State(ids.plan_capacity(ALL), "value"),
         "capacity_ids": State(ids.plan_capacity(ALL), "id"),
         "lead": State(ids.plan_lead(ALL), "value"), "lead_ids": State(ids.plan_lead(ALL), "id"),
         "closed": State(ids.plan_closed(ALL), "value"),
         "closed_ids": State(ids.plan_closed(ALL), "id"),
         "closed_all": State(ids.PLAN_CLOSED_ALL, "value"),
         "priority": State(ids.PLAN_PRIORITY, "value")}


def plan_form(form: dict[str, Any]) -> data.PlanForm:
    """The settings inputs' values (as :data:`_FORM` gathers them) as a :class:`data.PlanForm`."""
    def by_site(kind: str) -> dict[str, Any]:
        return {cid["index"]: value for cid, value in zip(form[f"{kind}_ids"], form[kind],
                                                          strict=True)}
    return data.PlanForm(capacity=by_site("capacity"), lead_weeks=by_site("lead"),
                         closed={**by_site("closed"), data.EVERY_SITE: form["closed_all"]},
                         priority=form["priority"])


@callback(Output(ids.PLAN_SITES, "children"), Output(ids.PLAN_CLOSED_ALL, "value"),
          Output(ids.PLAN_PRIORITY, "value"), Input(ids.PLAN_AS_OF, "date"))
def _fill_settings(as_of: str | None) -> tuple[Any, str, str]:
    url = data.current_url()
    settings = data.plan_settings_in_force(url, data.parse_day(as_of))
    sites, _ = data.sites_and_families(url)
    raised = ", ".join(f"{f}={n}" for f, n in sorted(settings.priority.items()))
    return (site_settings(sites, settings),
            week_list(settings.closed.get(data.EVERY_SITE, frozenset())), raised)


@callback(output=_SHOWN, inputs={"as_of": Input(ids.PLAN_AS_OF, "date"),
                                 "_tried": Input(ids.PLAN_TRY, "n_clicks"),
                                 "_committed": Input(ids.PLAN_COMMIT, "n_clicks")},
          state={"form": _FORM, "who": State(ids.PLAN_WHO, "value")},
          running=[(Output(ids.PLAN_TRY, "disabled"), True, False),
                   (Output(ids.PLAN_COMMIT, "disabled"), True, False)])
def _show_plan(as_of: str | None, _tried: int, _committed: int, form: dict[str, Any],
               who: str | None) -> dict[str, Any]:
    url, day, action = data.current_url(), data.parse_day(as_of), ctx.triggered_id
    try:
        if action == ids.PLAN_TRY:
            return shown(data.try_plan(url, day, plan_form(form)))
        if action == ids.PLAN_COMMIT:
            return shown(data.commit_plan(url, day, plan_form(form), who))
        return shown(data.plan_in_force(url, day))
    except FleetDBError as exc:  # a user's mistake: say it, change nothing, store nothing
        where = {ids.PLAN_TRY: "Try", ids.PLAN_COMMIT: "Commit"}.get(action, "Plan")
        return {**{key: no_update for key in _SHOWN}, "message": components.problem_list(
            "Nothing changed and nothing was stored", [(where, str(exc))])}


@callback(Output(ids.PLAN_DOWNLOAD, "data"), Input(ids.PLAN_CSV, "n_clicks"),
          Input(ids.PLAN_ICS, "n_clicks"), State(ids.PLAN_SHOWN, "data"),
          prevent_initial_call=True)
def _download(_csv: int, _ics: int, kept: dict[str, Any] | None) -> Any:
    if not kept:
        return no_update
    kind = "ics" if ctx.triggered_id == ids.PLAN_ICS else "csv"
    text, name = data.plan_export(data.current_url(), kept, kind)
    return dcc.send_string(text, name, type="text/calendar" if kind == "ics" else "text/csv")
