"""Pure functions from DataFrames to plotly figures; no database, no Dash, testable alone.

Figures take fleetdb's numbers (kPa inside) and only convert and draw them: what is low,
worn or untrustworthy is fleetdb's verdict, shown in words beside the figure.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from plotly.subplots import make_subplots

from fleetdb.units import from_kpa

_BAR = "#4d6f8c"
_LIMIT = "#8a1c1c"


def cylinder_bars(readings: pd.DataFrame, unit: str, banks: Sequence[Sequence[int]], *,
                  minimum_kpa: float | None = None, title: str = "") -> go.Figure:
    """One bar per cylinder of one test, grouped by bank front to back.

    :param readings: columns ``cylinder`` (int) and ``value_kpa`` (float), one row per
        cylinder read; cylinders not read leave a gap.
    :param unit: the pressure unit to show (psi, kPa, bar).
    :param banks: cylinder numbers per bank, front to back (``[[1, 3, 5], [2, 4, 6]]``).
    :param minimum_kpa: the family minimum, drawn as a dashed line with its value in words.
    :param title: the figure title.
    """
    by_cylinder = readings.set_index("cylinder")["value_kpa"]
    vee = len(banks) > 1
    fig = make_subplots(rows=1, cols=len(banks), shared_yaxes=True, horizontal_spacing=0.06,
                        subplot_titles=[f"bank {n}" for n in range(1, len(banks) + 1)]
                        if vee else None)
    for number, bank in enumerate(banks, start=1):
        values = by_cylinder.reindex(list(bank))
        shown = [None if pd.isna(v) else from_kpa(float(v), unit) for v in values]
        fig.add_trace(go.Bar(
            x=[f"Cyl {c}" for c in bank], y=shown, name=f"bank {number}",
            marker={"color": _BAR, "line": {"color": "#1d2329", "width": 1}},
            text=[None if v is None else f"{v:.0f}" for v in shown], textposition="outside",
            hovertemplate="%{x}: %{y:.1f} " + unit + "<extra></extra>"), row=1, col=number)
        fig.update_xaxes(title_text="front → rear", row=1, col=number)
    # Headroom for the value printed over the tallest bar and for the minimum's label.
    top_kpa = max(by_cylinder.max() if len(by_cylinder) else 0.0, minimum_kpa or 0.0)
    fig.update_yaxes(range=[0, 1.2 * from_kpa(top_kpa, unit) or 1.0])
    if minimum_kpa is not None:
        limit = from_kpa(minimum_kpa, unit)
        fig.add_hline(y=limit, line={"color": _LIMIT, "dash": "dash", "width": 2},
                      annotation_text=f"family minimum {limit:.0f} {unit}",
                      annotation_position="top right",
                      annotation={"bgcolor": "rgba(255,255,255,0.9)",
                                  "font": {"color": _LIMIT}}, row="all", col="all")
    fig.update_yaxes(title_text=unit, row=1, col=1)
    fig.update_layout(
        title=title or None, bargap=0.3, showlegend=False, height=300,
        margin={"l": 50, "r": 20, "t": 50 if (title or vee) else 20, "b": 40},
        plot_bgcolor="#ffffff", paper_bgcolor="#ffffff", font={"size": 13})
    return fig


# -- shared pieces of the history and fleet figures ------------------------------------------

#: Cylinder colours (the Okabe-Ito colour-blind-safe set, yellow replaced by brown); the
#: cylinder is also named in the legend, in every hover and at the end of its wear line.
CYLINDER_COLOURS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9",
                    "#000000", "#8C510A")
_EXCLUDED = "#8a8f94"
_EVENT = "#444b52"
#: How a reading is drawn by its standing: (marker symbol, legend words). Shape and words
#: tell them apart; the colour (grey for readings left out of the fits) only repeats it.
READING_MARKERS: dict[str, tuple[str, str]] = {
    "valid": ("circle", "in the wear fit"),
    "step": ("triangle-down", "sudden drop (starts a new fit)"),
    "untrustworthy": ("circle-open", "test not trustworthy (left out)"),
    "voided": ("x-thin-open", "test voided (left out)"),
}
BASIS_WORDS = {"sea_level": "sea-level equivalent", "measured": "as measured"}


def _colour(cylinder: int) -> str:
    return CYLINDER_COLOURS[(int(cylinder) - 1) % len(CYLINDER_COLOURS)]


def _in_unit(values: pd.Series | np.ndarray | float, unit: str) -> np.ndarray:
    return np.asarray(from_kpa(np.asarray(values, dtype=float), unit), dtype=float)


def _layout(fig: go.Figure, *, title: str, x_title: str, y_title: str,
            height: int = 380) -> go.Figure:
    fig.update_layout(title={"text": title, "x": 0.01, "font": {"size": 15}}, height=height,
                      margin={"l": 60, "r": 20, "t": 50, "b": 50}, plot_bgcolor="#ffffff",
                      paper_bgcolor="#ffffff", font={"size": 13},
                      legend={"orientation": "h", "y": -0.2, "x": 0},
                      hoverlabel={"bgcolor": "#ffffff"})
    fig.update_xaxes(title_text=x_title, showline=True, linecolor="#1d2329", gridcolor="#e3e7ea")
    fig.update_yaxes(title_text=y_title, showline=True, linecolor="#1d2329", gridcolor="#e3e7ea")
    return fig


def _empty(message: str, *, title: str, x_title: str, y_title: str) -> go.Figure:
    fig = go.Figure()
    fig.add_annotation(text=message, showarrow=False, xref="paper", yref="paper", x=0.5,
                       y=0.5, font={"size": 14, "color": "#5b6670"})
    fig.update_xaxes(showticklabels=False)
    fig.update_yaxes(showticklabels=False)
    return _layout(fig, title=title, x_title=x_title, y_title=y_title, height=260)


def message_figure(message: str, title: str = "") -> go.Figure:
    """An empty chart that says why it is empty (no unit picked, nothing recorded).

    :param message: the sentence shown in the middle.
    :param title: the chart's title.
    """
    return _empty(message, title=title, x_title="", y_title="")


def _limit_line(fig: go.Figure, y: float, words: str) -> None:
    fig.add_hline(y=y, line={"color": _LIMIT, "dash": "dash", "width": 2},
                  annotation_text=words, annotation_position="bottom left",
                  annotation={"bgcolor": "rgba(255,255,255,0.85)", "font": {"color": _LIMIT}})


def reading_status(readings: pd.DataFrame, tests: pd.DataFrame) -> np.ndarray:
    """Each reading's standing: ``voided``, ``untrustworthy``, ``step`` or ``valid``.

    :param readings: rows with ``test_id`` (and ``step`` when it is a cylinder reading).
    :param tests: ``test_id``, ``trustworthy``, ``voided`` (unit_report's ``tests``).
    """
    by_test = tests.set_index("test_id")
    voided = by_test["voided"].reindex(readings["test_id"]).fillna(False).to_numpy(bool)
    trusted = by_test["trustworthy"].reindex(readings["test_id"]).fillna(True).to_numpy(bool)
    step = (readings["step"].fillna(False).to_numpy(bool) if "step" in readings
            else np.zeros(len(readings), bool))
    return np.select([voided, ~trusted, step], ["voided", "untrustworthy", "step"], "valid")


def _status_traces(fig: go.Figure, frame: pd.DataFrame, y: np.ndarray, hover: str,
                   custom: np.ndarray) -> None:
    """One trace per excluded standing (grey, hollow) and one for sudden drops."""
    for status in ("step", "untrustworthy", "voided"):
        mask = frame["status"].to_numpy() == status
        if not mask.any():
            continue
        symbol, words = READING_MARKERS[status]
        step = status == "step"
        colours = [_colour(c) for c in frame["cylinder"][mask]] if step and "cylinder" in frame \
            else (_LIMIT if step else _EXCLUDED)
        fig.add_trace(go.Scatter(
            x=frame["hours"].to_numpy()[mask], y=y[mask], mode="markers", name=words,
            customdata=custom[mask], hovertemplate=hover + f"<br>{words}<extra></extra>",
            marker={"symbol": symbol, "size": 14 if step else 10, "color": colours,
                    "line": {"width": 2 if not step else 1.5,
                             "color": "#1d2329" if step else _EXCLUDED}}))


def _event_hours(events: list[dict], tests: pd.DataFrame) -> list[tuple[float, str]]:
    """Service events placed on the hour axis; one without hours is placed by its date."""
    if tests.empty:
        return []
    known = tests.dropna(subset=["hours"]).sort_values("tested_at")
    seconds = pd.to_datetime(known["tested_at"]).to_numpy("datetime64[s]").astype(float)
    out = []
    for event in events:
        hours = event.get("hours")
        if hours is None:
            when = np.datetime64(pd.Timestamp(event["date"]).to_datetime64(), "s")
            hours = float(np.interp(when.astype(float), seconds, known["hours"].to_numpy(float)))
        cylinders = event.get("cylinders") or []
        where = f" (cyl {', '.join(map(str, cylinders))})" if cylinders else ""
        out.append((float(hours), f"{event['kind'].replace('_', ' ')}{where}"))
    return out


def _add_events(fig: go.Figure, events: list[tuple[float, str]]) -> None:
    for hours, words in events:
        fig.add_vline(x=hours, line={"color": _EVENT, "dash": "dot", "width": 1.5},
                      annotation_text=words, annotation_position="top left",
                      annotation={"font": {"size": 11, "color": _EVENT},
                                  "bgcolor": "rgba(255,255,255,0.85)"})


def _hours_cap(hours: pd.Series, report: dict, *, projections: bool = True) -> float:
    """How far right the hour axis reaches: past the last test, and (when projections are
    drawn) to the unit's projected crossing when it is not too far off."""
    last, span = float(hours.max()), float(hours.max() - hours.min())
    cap = last + max(0.5 * span, 500.0)
    projected = report.get("projected_hours")
    if projections and projected is not None and projected > last:
        cap = max(cap, min(projected * 1.03, last + 2 * max(span, 1000.0)))
    return cap


def _wear_lines(fig: go.Figure, fits: list[dict], cap: float, scale: Any, unit_words: str,
                colour_of: Any) -> None:
    """Current fitted lines (solid over their data), projections (dotted) and, at the limit,
    the projected crossing with its conservative interval."""
    crossings = []
    for fit in fits:
        slope, intercept = fit.get("slope_used"), fit.get("intercept_used")
        if slope is None or intercept is None:
            continue
        start, end = float(fit["start_hours"]), float(fit["end_hours"])
        colour, label = colour_of(fit["cylinder"])
        if end > start:
            xs = np.array([start, end])
            fig.add_trace(go.Scatter(x=xs, y=scale(intercept + slope * xs), mode="lines",
                                     line={"color": colour, "width": 2}, showlegend=False,
                                     hovertemplate=f"{label} wear line<extra></extra>"))
        projected, early = fit.get("projected_hours"), fit.get("projected_hours_early")
        if projected is None or projected <= end:
            continue
        reach = min(projected, cap)
        xs = np.array([end, reach])
        fig.add_trace(go.Scatter(x=xs, y=scale(intercept + slope * xs), mode="lines",
                                 line={"color": colour, "width": 2, "dash": "dot"},
                                 showlegend=False,
                                 hovertemplate=f"{label} projection<extra></extra>"))
        if projected <= cap:
            crossings.append((projected, early if early is not None else projected,
                              scale(fit["limit"]), label))
    if crossings:
        x, early, y, labels = (np.array(v) for v in zip(*crossings, strict=True))
        fig.add_trace(go.Scatter(
            x=x, y=y.astype(float), mode="markers", name="projected crossing (bar: to the "
            "conservative 95 % date)", customdata=np.stack([labels, early], axis=-1),
            marker={"symbol": "diamond-tall", "size": 13, "color": _LIMIT},
            error_x={"type": "data", "symmetric": False, "array": np.zeros(len(x)),
                     "arrayminus": x - early.astype(float), "color": _LIMIT, "thickness": 3},
            hovertemplate="%{customdata[0]} reaches the limit at about %{x:,.0f} h; "
                          "conservative %{customdata[1]:,.0f} h<extra></extra>"))


# -- Unit history ---------------------------------------------------------------------------

def unit_compression(report: dict, unit: str, *, basis: str = "sea_level") -> go.Figure:
    """Per-cylinder dry compression against engine hours, with wear lines and projections.

    :param report: ``fleetdb.health.unit_report`` (kPa inside).
    :param unit: psi, kPa or bar.
    :param basis: ``sea_level`` (what the fits and limits use: lines, projections drawn) or
        ``measured`` (the gauge as read; no lines, since they belong to sea-level values).
    """
    title = f"Compression per cylinder, {BASIS_WORDS[basis]}"
    y_title = f"compression ({unit}, {BASIS_WORDS[basis]})"
    readings = pd.DataFrame(report["readings"])
    if readings.empty or not (readings["kind"] == "compression").any():
        return _empty("No dry compression readings for this unit.", title=title,
                      x_title="engine hours (h)", y_title=y_title)
    dry = readings[readings["kind"] == "compression"].copy()
    tests = pd.DataFrame(report["tests"])
    dry["status"] = reading_status(dry, tests)
    y = _in_unit(dry["value_sl_kpa" if basis == "sea_level" else "value_kpa"], unit)
    custom = np.stack([dry["cylinder"].astype(int), dry["test_id"],
                       dry["tested_at"].astype(str).str[:10]], axis=-1)
    hover = ("Cyl %{customdata[0]} · %{x:,.0f} h · %{y:.1f} " + unit
             + "<br>test %{customdata[1]}, %{customdata[2]}")
    fig = go.Figure()
    for cylinder in sorted(dry["cylinder"].astype(int).unique()):
        mask = ((dry["cylinder"] == cylinder) & (dry["status"] == "valid")).to_numpy()
        fig.add_trace(go.Scatter(
            x=dry["hours"].to_numpy()[mask], y=y[mask], mode="markers", name=f"Cyl {cylinder}",
            legendgroup=f"cyl{cylinder}", customdata=custom[mask],
            hovertemplate=hover + "<extra></extra>",
            marker={"symbol": "circle", "size": 8, "color": _colour(cylinder)}))
    _status_traces(fig, dry, y, hover, custom)
    cap = _hours_cap(dry["hours"], report, projections=basis == "sea_level")
    if basis == "sea_level":
        fits = [f for f in report["fits"] if f.get("current") and f["cylinder"] != "spread"]
        _wear_lines(fig, fits, cap, lambda v: _in_unit(v, unit), unit,
                    lambda c: (_colour(c), f"Cyl {c}"))
    minimum = float(from_kpa(report["unit"]["min_compression_kpa"], unit))
    _limit_line(fig, minimum, f"family minimum {minimum:.0f} {unit} (sea-level equivalent)")
    _add_events(fig, _event_hours(report.get("events") or [], tests))
    fig.update_xaxes(range=[float(dry["hours"].min()) - 0.03 * (cap - dry["hours"].min()), cap])
    return _layout(fig, title=title, x_title="engine hours (h)", y_title=y_title, height=440)


def unit_spread(report: dict) -> go.Figure:
    """The lowest/highest cylinder ratio of each test against hours, with its limit and trend.

    :param report: ``fleetdb.health.unit_report``.
    """
    title, y_title = "Spread: lowest ÷ highest cylinder", "lowest ÷ highest (ratio)"
    spread = pd.DataFrame(report.get("spread") or [])
    if spread.empty:
        return _empty("No test with dry compression on every cylinder.", title=title,
                      x_title="engine hours (h)", y_title=y_title)
    spread["status"] = reading_status(spread, spread[["test_id", "trustworthy", "voided"]])
    y = spread["ratio"].to_numpy(float)
    custom = np.stack([spread["test_id"], spread["tested_at"].astype(str).str[:10]], axis=-1)
    hover = "%{x:,.0f} h · ratio %{y:.3f}<br>test %{customdata[0]}, %{customdata[1]}"
    valid = (spread["status"] == "valid").to_numpy()
    fig = go.Figure(go.Scatter(
        x=spread["hours"].to_numpy()[valid], y=y[valid], mode="markers", name="in the fit",
        customdata=custom[valid], hovertemplate=hover + "<extra></extra>",
        marker={"symbol": "circle", "size": 8, "color": _BAR}))
    _status_traces(fig, spread, y, hover, custom)
    cap = _hours_cap(spread["hours"], report)
    fits = [f for f in report["fits"] if f.get("current") and f["cylinder"] == "spread"]
    _wear_lines(fig, fits, cap, lambda v: np.asarray(v, dtype=float), "",
                lambda _: (_BAR, "the spread"))
    min_ratio = report["unit"].get("min_ratio")
    if min_ratio is not None:
        _limit_line(fig, float(min_ratio), f"minimum ratio {min_ratio:.2f}")
    _add_events(fig, _event_hours(report.get("events") or [], pd.DataFrame(report["tests"])))
    fig.update_yaxes(range=[min(0.5, float(np.nanmin(y)) - 0.05), 1.02])
    return _layout(fig, title=title, x_title="engine hours (h)", y_title=y_title)


VACUUM_KINDS = {"vacuum_cranking": ("cranking", "circle", "solid"),
                "vacuum_idle": ("idle", "square", "dash")}


def unit_vacuum(report: dict) -> go.Figure:
    """Cranking and idle manifold vacuum (inHg below ambient, as measured) against hours.

    :param report: ``fleetdb.health.unit_report``.
    """
    title, y_title = "Manifold vacuum", "vacuum below ambient (inHg)"
    readings = pd.DataFrame(report["readings"])
    vac = readings[readings["kind"].isin(VACUUM_KINDS)].copy() if not readings.empty \
        else readings
    if vac.empty:
        return _empty("No vacuum readings for this unit.", title=title,
                      x_title="engine hours (h)", y_title=y_title)
    vac["status"] = reading_status(vac, pd.DataFrame(report["tests"]))
    vac = vac.sort_values("hours")
    fig = go.Figure()
    for kind, (words, symbol, dash) in VACUUM_KINDS.items():
        one = vac[vac["kind"] == kind]
        if one.empty:
            continue
        kept = one["status"].isin(["valid", "step"]).to_numpy()
        y = _in_unit(one["value_kpa"], "inHg")
        custom = np.stack([one["test_id"], one["tested_at"].astype(str).str[:10],
                           one["value_kpa"].round(1)], axis=-1)
        hover = (f"{words} · " + "%{x:,.0f} h · %{y:.1f} inHg (%{customdata[2]} kPa)"
                 "<br>test %{customdata[0]}, %{customdata[1]}")
        fig.add_trace(go.Scatter(
            x=one["hours"].to_numpy()[kept], y=y[kept], mode="lines+markers",
            name=f"{words} vacuum", customdata=custom[kept],
            hovertemplate=hover + "<extra></extra>", line={"color": _BAR, "dash": dash},
            marker={"symbol": symbol, "size": 8, "color": _BAR}))
        if (~kept).any():
            fig.add_trace(go.Scatter(
                x=one["hours"].to_numpy()[~kept], y=y[~kept], mode="markers",
                name=f"{words}: test not trustworthy or voided", customdata=custom[~kept],
                hovertemplate=hover + "<br>left out<extra></extra>",
                marker={"symbol": f"{symbol}-open", "size": 10, "color": _EXCLUDED,
                        "line": {"width": 2, "color": _EXCLUDED}}))
    return _layout(fig, title=title, x_title="engine hours (h)", y_title=y_title)


# -- Fleet wear -----------------------------------------------------------------------------

#: Most unit markers drawn per family or site before sampling (the box still uses them all).
MAX_POINTS = 300
#: Most unit markers drawn per site and panel on the sites chart.
MAX_SITE_POINTS = 60
#: Most units drawn as their own series on the hours chart; the rest are in the band.
MAX_UNIT_SERIES = 30
_HIGHLIGHT = "#1d2329"


def _box_stats(values: pd.Series) -> dict[str, float]:
    """Tukey's box: quartiles and the furthest values within 1.5 IQR of them."""
    q1, median, q3 = (float(values.quantile(q)) for q in (0.25, 0.5, 0.75))
    reach = 1.5 * (q3 - q1)
    inside = values[(values >= q1 - reach) & (values <= q3 + reach)]
    return {"q1": q1, "median": median, "q3": q3, "lowerfence": float(inside.min()),
            "upperfence": float(inside.max())}


def _evenly(frame: pd.DataFrame, n: int) -> pd.DataFrame:
    if len(frame) <= n:
        return frame
    return frame.iloc[np.linspace(0, len(frame) - 1, n).round().astype(int)]


def _sample(frame: pd.DataFrame, n: int, keep: pd.Series | None = None) -> pd.DataFrame:
    """At most ``n`` rows evenly spread over the frame's order, plus rows in ``keep`` (all of
    them up to n / 3, else n / 3 of them, evenly spread too)."""
    if len(frame) <= n:
        return frame
    picked = _evenly(frame, n)
    if keep is None:
        return picked
    return pd.concat([picked, _evenly(frame[keep], n // 3)]).drop_duplicates()


def _jitter(n: int, width: float = 0.28) -> np.ndarray:
    """Fixed spread of n markers across a category (the same drawing every time)."""
    return (np.arange(n) * 0.618034 % 1.0 - 0.5) * 2 * width if n else np.zeros(0)


def family_wear_rates(wear: pd.DataFrame, unit: str, *, highlight: str | None = None) -> go.Figure:
    """Wear rate of each unit's fastest-wearing cylinder, one box per engine family.

    :param wear: ``FleetWear.wear``: ``fleet_no, family, cylinder, wear_kpa_per_1000h,
        faster_than_family``.
    :param unit: psi, kPa or bar (the rate is shown in unit per 1000 h).
    :param highlight: a fleet number to mark (a large star, named in words).
    """
    title = "Wear rate per engine family: each unit's fastest-wearing cylinder"
    y_title = f"compression lost ({unit} per 1000 h)"
    if wear.empty:
        return _empty("No fitted wear lines yet.", title=title, x_title="engine family",
                      y_title=y_title)
    families = sorted(wear["family"].unique())
    fig = go.Figure()
    for family in families:
        one = wear[wear["family"] == family].sort_values("wear_kpa_per_1000h")
        rate = pd.Series(_in_unit(one["wear_kpa_per_1000h"], unit), index=one.index)
        fig.add_trace(go.Box(x=[families.index(family)], name=family, showlegend=False,
                             fillcolor="rgba(77,111,140,0.15)", line={"color": _BAR},
                             hoverinfo="skip", **{k: [v] for k, v in _box_stats(rate).items()}))
        shown = _sample(one, MAX_POINTS, one["faster_than_family"])
        fast = shown["faster_than_family"].to_numpy(bool)
        x = families.index(family) + _jitter(len(shown))
        fig.add_trace(go.Scatter(
            x=x, y=rate[shown.index], mode="markers", showlegend=False,
            customdata=np.stack([shown["fleet_no"], shown["cylinder"],
                                 np.where(fast, "faster than its family", "")], axis=-1),
            hovertemplate="%{customdata[0]} · cyl %{customdata[1]} · %{y:.1f} " + unit
                          + " per 1000 h<br>%{customdata[2]}<extra></extra>",
            marker={"size": 7, "color": _BAR, "opacity": 0.75,
                    "symbol": np.where(fast, "triangle-up", "circle")}))
    fig.add_trace(go.Scatter(x=[None], y=[None], mode="markers", name="unit",
                             marker={"symbol": "circle", "color": _BAR}))
    fig.add_trace(go.Scatter(x=[None], y=[None], mode="markers",
                             name="unit wearing faster than its family",
                             marker={"symbol": "triangle-up", "color": _BAR}))
    _highlight_unit(fig, wear, highlight, lambda row: (
        families.index(row["family"]), float(from_kpa(row["wear_kpa_per_1000h"], unit))))
    fig.update_xaxes(tickvals=list(range(len(families))), ticktext=families)
    return _layout(fig, title=title, x_title="engine family", y_title=y_title, height=420)


def _highlight_unit(fig: go.Figure, frame: pd.DataFrame, fleet_no: str | None,
                    place: Any) -> None:
    """A star and the fleet number in words at the highlighted unit's place."""
    rows = frame[frame["fleet_no"] == fleet_no] if fleet_no else frame.iloc[0:0]
    if rows.empty:
        return
    x, y = place(rows.iloc[0])
    fig.add_trace(go.Scatter(x=[x], y=[y], mode="markers+text", name=f"{fleet_no} (chosen)",
                             text=[fleet_no], textposition="middle right",
                             hovertemplate=f"{fleet_no}<extra></extra>",
                             marker={"symbol": "star", "size": 18, "color": _HIGHLIGHT,
                                     "line": {"color": "#ffffff", "width": 1}}))


def family_compression(tests: pd.DataFrame, unit: str, minimum_kpa: float, family: str, *,
                       highlight: str | None = None) -> go.Figure:
    """Lowest cylinder (sea-level equivalent) of each test against hours for one family.

    The whole family is drawn as a band (10th to 90th percentile and median per hour
    bin); up to :data:`MAX_UNIT_SERIES` units as their own series; the highlighted unit
    in black with stars.

    :param tests: ``FleetWear.tests`` rows of the family.
    :param unit: psi, kPa or bar.
    :param minimum_kpa: the family minimum (sea-level equivalent).
    :param family: the family's name, for the title.
    :param highlight: a fleet number to draw apart.
    """
    title = f"{family}: lowest cylinder of each test against engine hours (sea-level equivalent)"
    y_title = f"lowest cylinder ({unit}, sea-level equivalent)"
    if tests.empty:
        return _empty("No trustworthy dry compression test in this family.", title=title,
                      x_title="engine hours (h)", y_title=y_title)
    fig = go.Figure()
    # Equal-count hour bands: each holds about as many tests as the next, so a band is
    # never drawn from two or three stray tests far out on the hour axis.
    bins = pd.qcut(tests["hours"], q=int(np.clip(len(tests) // 15, 1, 30)), duplicates="drop")
    band = tests.groupby(bins, observed=True)["lowest_sl_kpa"].quantile([0.1, 0.5, 0.9]
                                                                         ).unstack()
    middle = np.array([interval.mid for interval in band.index], dtype=float)
    for quantile, fill, name in ((0.9, None, None), (0.1, "tonexty", "family: 10th to 90th "
                                                     "percentile per hour band")):
        fig.add_trace(go.Scatter(x=middle, y=_in_unit(band[quantile], unit), mode="lines",
                                 line={"width": 0}, fill=fill, fillcolor="rgba(77,111,140,0.18)",
                                 name=name, showlegend=name is not None, hoverinfo="skip"))
    fig.add_trace(go.Scatter(x=middle, y=_in_unit(band[0.5], unit), mode="lines",
                             name="family median", line={"color": _BAR, "width": 2},
                             hovertemplate="median %{y:.1f} " + unit + " at ~%{x:,.0f} h"
                                           "<extra></extra>"))
    units = pd.Series(tests["fleet_no"].unique())
    for fleet_no in _sample(units.to_frame("fleet_no"), MAX_UNIT_SERIES)["fleet_no"]:
        if fleet_no == highlight:
            continue
        one = tests[tests["fleet_no"] == fleet_no]
        fig.add_trace(go.Scatter(
            x=one["hours"], y=_in_unit(one["lowest_sl_kpa"], unit), mode="lines+markers",
            name=fleet_no, showlegend=False, opacity=0.55,
            line={"color": "#8a8f94", "width": 1}, marker={"size": 5, "color": "#5b6670"},
            hovertemplate=f"{fleet_no} · " + "%{x:,.0f} h · %{y:.1f} " + unit
                          + "<extra></extra>"))
    chosen = tests[tests["fleet_no"] == highlight] if highlight else tests.iloc[0:0]
    if not chosen.empty:
        fig.add_trace(go.Scatter(
            x=chosen["hours"], y=_in_unit(chosen["lowest_sl_kpa"], unit), mode="lines+markers",
            name=f"{highlight} (chosen)", line={"color": _HIGHLIGHT, "width": 3},
            marker={"symbol": "star", "size": 12, "color": _HIGHLIGHT},
            hovertemplate=f"{highlight} · " + "%{x:,.0f} h · %{y:.1f} " + unit
                          + "<extra></extra>"))
    shown = units.size if units.size <= MAX_UNIT_SERIES else MAX_UNIT_SERIES
    fig.add_annotation(text=f"{shown} of {units.size} units drawn as lines; the band holds all",
                       xref="paper", yref="paper", x=1, y=1.02, showarrow=False,
                       xanchor="right", font={"size": 11, "color": "#5b6670"})
    minimum = float(from_kpa(minimum_kpa, unit))
    _limit_line(fig, minimum, f"family minimum {minimum:.0f} {unit}")
    return _layout(fig, title=title, x_title="engine hours (h)", y_title=y_title, height=440)


def sites_compared(latest: pd.DataFrame, unit: str, family: str) -> go.Figure:
    """Each unit's latest test, mean of its cylinders, per site: as measured beside sea-level.

    Sites run from the lowest to the highest; at altitude the gauge reads lower (thinner
    air in the cylinder), and the sea-level equivalent takes that offset away.

    :param latest: ``FleetWear.latest`` rows of one family: ``fleet_no, site, elevation_m,
        mean_kpa, mean_sl_kpa``.
    :param unit: psi, kPa or bar.
    :param family: the family's name, for the title.
    """
    title = f"{family}: latest test per unit by site, as measured and at sea level"
    y_title = f"mean of the cylinders ({unit})"
    if latest.empty:
        return _empty("No trustworthy dry compression test in this family.", title=title,
                      x_title="site", y_title=y_title)
    sites = latest.groupby("site")["elevation_m"].first().sort_values()
    fig = make_subplots(rows=1, cols=2, shared_yaxes=True, horizontal_spacing=0.05,
                        subplot_titles=["as measured (gauge)", "sea-level equivalent"])
    for col, column in ((1, "mean_kpa"), (2, "mean_sl_kpa")):
        for place, site in enumerate(sites.index):
            one = latest[latest["site"] == site]
            values = pd.Series(_in_unit(one[column], unit), index=one.index)
            fig.add_trace(go.Box(x=[place], name=site, showlegend=False, boxpoints=False,
                                 width=0.7, fillcolor="rgba(77,111,140,0.15)",
                                 line={"color": _BAR}, hoverinfo="skip",
                                 **{k: [v] for k, v in _box_stats(values).items()}),
                          row=1, col=col)
            shown = _sample(one, MAX_SITE_POINTS)
            fig.add_trace(go.Scatter(
                x=place + _jitter(len(shown)), y=values[shown.index], mode="markers",
                showlegend=False, customdata=np.stack([shown["fleet_no"],
                                                       [site] * len(shown)], axis=-1),
                hovertemplate="%{customdata[0]} · %{customdata[1]} · %{y:.1f} " + unit
                              + "<extra></extra>",
                marker={"size": 6, "color": _BAR, "opacity": 0.6}), row=1, col=col)
    fig.update_xaxes(tickvals=list(range(len(sites))),
                     ticktext=[f"{site}<br>{elevation:,.0f} m" for site, elevation
                               in sites.items()])
    fig.update_xaxes(title_text="site (elevation)")
    fig.update_yaxes(title_text=y_title, row=1, col=1)
    fig = _layout(fig, title=title, x_title="site (elevation)", y_title=y_title, height=420)
    fig.update_yaxes(title_text=None, row=1, col=2)
    return fig


# -- Overhaul plan ------------------------------------------------------------------------------

#: How a booked overhaul is drawn by its timing: (marker symbol, colour, legend words). The
#: shape and the words under each marker tell late from on time; the colour only repeats it.
PLAN_MARKERS: dict[str, tuple[str, str, str]] = {
    "on_time": ("circle", "#1f5d8c", "on time: in or before its due week"),
    "late": ("x", "#8a1c1c", "late: after its conservative projected limit"),
}
_JOB_PX, _SLOT_PX = 46, 24  # height of one stacked overhaul and of the slots line, pixels


def _week_index(days: pd.Series, week0: pd.Timestamp) -> np.ndarray:
    return ((pd.to_datetime(days) - week0).dt.days // 7).to_numpy(int)


def plan_timeline(jobs: pd.DataFrame, load: pd.DataFrame, *, title: str = "") -> go.Figure:
    """The schedule week by week: one row per site, each booked overhaul a labelled marker.

    Each week of a site shows its slots used over its capacity (``1/2``, ``closed``). A late
    overhaul is a cross labelled ``late by N wk`` with a dotted tail back to its due week; an
    overhaul on time is a dot. Traces carry ``meta = {"site", "kind"}`` (kind ``on_time``,
    ``late``, ``late_tail`` or ``slots``).

    :param jobs: ``Plan.jobs``: ``fleet_no, site, level, week, week_start, due_week,
        due_week_start, lateness_weeks, status`` per overhaul.
    :param load: ``Plan.load``: ``site, week, week_start, capacity, used, closed``; its first
        week is week 0 of the plan.
    :param title: the figure title.
    """
    if load.empty:
        return message_figure("No site in the store: nothing to plan.", title)
    week0 = pd.Timestamp(pd.to_datetime(load["week_start"]).min())
    sites = sorted(set(load["site"]) | set(jobs["site"]))
    jobs = jobs.assign(x=_week_index(jobs["week_start"], week0),
                       due_x=_week_index(jobs["due_week_start"], week0)).sort_values(
        ["site", "x", "lateness_weeks", "fleet_no"], ascending=[True, True, False, True])
    jobs["stack"] = jobs.groupby(["site", "x"]).cumcount().to_numpy(int)
    # The y axis counts pixels from the top: each site's row is as tall as its deepest week.
    depth = jobs.groupby("site")["stack"].max().reindex(sites).fillna(0).to_numpy(int) + 1
    bottoms = np.cumsum(_SLOT_PX + _JOB_PX * depth + 8)
    tops = bottoms - (_SLOT_PX + _JOB_PX * depth + 8)
    load_x = _week_index(load["week_start"], week0)
    last = int(max(load_x.max(), jobs["x"].max() if len(jobs) else 0))
    fig = go.Figure()
    legend_shown: set[str] = set()
    for site, top in zip(sites, tops, strict=True):
        site_jobs = jobs[jobs["site"] == site]
        y_jobs = top + _SLOT_PX + 10 + _JOB_PX * site_jobs["stack"].to_numpy()
        late = site_jobs["lateness_weeks"].to_numpy() > 0
        tail = site_jobs[late]
        if len(tail):
            xs = np.column_stack([tail["due_x"], tail["x"], np.full(len(tail), np.nan)])
            ys = np.repeat(y_jobs[late], 3)
            fig.add_trace(go.Scatter(
                x=xs.ravel(), y=ys, mode="lines+markers", hoverinfo="skip",
                line={"color": PLAN_MARKERS["late"][1], "dash": "dot", "width": 1.5},
                marker={"symbol": "line-ns-open", "size": 12, "color": PLAN_MARKERS["late"][1]},
                name="late: from its due week to its booked week", legendgroup="late_tail",
                showlegend="late_tail" not in legend_shown,
                meta={"site": site, "kind": "late_tail"}))
            legend_shown.add("late_tail")
        for kind, mask in (("on_time", ~late), ("late", late)):
            part = site_jobs[mask]
            if part.empty:
                continue
            symbol, colour, words = PLAN_MARKERS[kind]
            labels = [f"{f}<br>late by {n} wk" if kind == "late" else f
                      for f, n in zip(part["fleet_no"], part["lateness_weeks"], strict=True)]
            hover = [f"<b>{r.fleet_no}</b> · {site}<br>level {r.level} · {r.status}<br>due "
                     f"{r.due_week}, booked {r.week}<br>" + (
                         f"late by {r.lateness_weeks} wk" if r.lateness_weeks > 0 else
                         "in its due week" if r.lateness_weeks == 0 else
                         f"{-r.lateness_weeks} wk before its due week")
                     for r in part.itertuples()]
            fig.add_trace(go.Scatter(
                x=part["x"], y=y_jobs[mask], mode="markers+text", text=labels,
                textposition="bottom center", textfont={"size": 11, "color": "#1d2329"},
                hovertext=hover, hovertemplate="%{hovertext}<extra></extra>",
                marker={"symbol": symbol, "size": 11, "color": colour,
                        "line": {"width": 2, "color": colour}},
                name=words, legendgroup=kind, showlegend=kind not in legend_shown,
                meta={"site": site, "kind": kind}))
            legend_shown.add(kind)
        slots = load[load["site"] == site]
        full = slots["used"].to_numpy() >= slots["capacity"].to_numpy()
        words = ["closed" if shut else f"<b>{u}/{c}</b>" if f else f"{u}/{c}"
                 for shut, u, c, f in zip(slots["closed"], slots["used"], slots["capacity"],
                                          full, strict=True)]
        hover = [f"{site}, {w}: closed" if shut else f"{site}, {w}: {u} of {c} slot(s) used"
                 for w, shut, u, c in zip(slots["week"], slots["closed"], slots["used"],
                                          slots["capacity"], strict=True)]
        fig.add_trace(go.Scatter(
            x=load_x[(load["site"] == site).to_numpy()], y=[top + 14] * len(slots),
            mode="text", text=words, textfont={"size": 11, "color": "#5b6670"},
            hovertext=hover, hovertemplate="%{hovertext}<extra></extra>", showlegend=False,
            name=f"{site}: slots used / capacity", meta={"site": site, "kind": "slots"}))
    for bottom in bottoms[:-1]:
        fig.add_hline(y=bottom, line={"color": "#1d2329", "width": 1})
    for week in range(last):
        fig.add_vline(x=week + 0.5, line={"color": "#e3e7ea", "width": 1})
    ticks = [week0 + pd.Timedelta(weeks=n) for n in range(last + 1)]
    fig.update_xaxes(range=[-0.5, last + 0.5], tickvals=list(range(last + 1)), showgrid=False,
                     ticktext=[f"{t.isocalendar().year}-W{t.isocalendar().week:02d}<br>"
                               f"{t:%d %b}" for t in ticks], side="top", zeroline=False)
    fig.update_yaxes(range=[bottoms[-1], 0], tickvals=(tops + bottoms) / 2,
                     ticktext=sites, showgrid=False, zeroline=False)
    if jobs.empty:
        fig.add_annotation(text="No unit at act or plan: nothing to schedule.", showarrow=False,
                           xref="paper", yref="paper", x=0.5, y=0.5,
                           font={"size": 14, "color": "#5b6670"})
    margin = {"l": 130, "r": 20, "t": 70 if title else 50, "b": 40}
    fig.update_layout(title={"text": title or None, "x": 0.01, "font": {"size": 15}},
                      height=margin["t"] + margin["b"] + int(bottoms[-1]), margin=margin,
                      plot_bgcolor="#ffffff", paper_bgcolor="#ffffff", font={"size": 13},
                      hoverlabel={"bgcolor": "#fff"},
                      legend={"orientation": "h", "y": -0.02, "yanchor": "top", "x": 0})
    return fig
