"""Figures of a capture: pure functions from fleetdb's numbers to plotly figures.

They draw what fleetdb derived when the capture was logged (or previewed): compression
events, their heights, each cycle's intake depression and cranking speed, the current humps
with their cylinders. Nothing is detected or computed here; the channels come in already
thinned for display (:func:`dashboard.capture_data.traces`).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import plotly.graph_objects as go
from plotly.subplots import make_subplots

from dashboard.figures import CYLINDER_COLOURS, message_figure
from fleetdb.defaults import DEFAULTS
from fleetdb.units import from_kpa

_GRID = "#e3e7ea"
_INK = "#1d2329"
_MUTED = "#5b6670"
_VACUUM = "#4d6f8c"
_CURRENT = "#6b4c9a"
_LIMIT = "#8a1c1c"
#: Rows of the waveform, top to bottom, by channel kind.
_ROWS = (("pressure",), ("vacuum_cranking", "vacuum_idle"), ("current",))


def vacuum_unit_for(unit: str) -> str:
    """The unit depressions and vacuum are drawn in beside a pressure unit (inHg beside psi)."""
    return "inHg" if unit == "psi" else "kPa"


def _colour(cylinder: int | None) -> str:
    return CYLINDER_COLOURS[(int(cylinder or 1) - 1) % len(CYLINDER_COLOURS)]


def _summaries(derived: dict[str, Any], kind: str) -> list[dict[str, Any]]:
    return [c for c in derived.get("channels", []) if c["kind"] == kind]


def _row_titles(kinds: list[tuple[str, ...]], unit: str) -> list[str]:
    vac = vacuum_unit_for(unit)
    words = {"pressure": f"in-cylinder pressure, {unit} gauge",
             "vacuum_cranking": f"manifold vacuum, {vac} below ambient",
             "current": "starter current, A"}
    return [words[k[0] if k[0] != "vacuum_idle" else "vacuum_cranking"] for k in kinds]


def scaled(kind: str, values: np.ndarray, unit: str) -> np.ndarray:
    """A channel in SI drawn in the page's units (pressure in ``unit``, vacuum beside it)."""
    if kind == "pressure":
        return np.asarray(from_kpa(values, unit), dtype=float)
    if kind.startswith("vacuum"):
        return np.asarray(from_kpa(values, vacuum_unit_for(unit)), dtype=float)
    return np.asarray(values, dtype=float)


def channel_name(trace: Any) -> str:
    """A channel's legend name: what it is and its column."""
    what = {"pressure": f"cyl {trace.cylinder} pressure", "vacuum_cranking": "cranking vacuum",
            "vacuum_idle": "idle vacuum", "current": "starter current"}[trace.kind]
    return f"{what} ({trace.column})"


def waveform(traces: Sequence[Any], derived: dict[str, Any], unit: str, *,
             revision: Any = None, title: str = "Waveform") -> go.Figure:
    """The capture against time: a row per kind of channel, sharing the time axis.

    The first ``len(traces)`` traces of the figure are the channels, in order (the zoom
    callback replaces their points); then the compression events (each marked at its
    derived height), the intake depression of each pressure channel (a dotted line at its
    level below ambient) and the current humps named by cylinder.

    :param traces: the channels thinned for display (``capture_data.traces``).
    :param derived: what fleetdb derived (``StoredCapture.derived``).
    :param unit: pressure unit (psi, kPa, bar); vacuum in inHg beside psi, else kPa.
    :param revision: kept as ``uirevision``, so a zoom survives the points being replaced.
    """
    kinds = [k for k in _ROWS if any(t.kind in k for t in traces)]
    if not kinds:
        return message_figure("This capture has no mapped channel.", title)
    row_of = {kind: i + 1 for i, group in enumerate(kinds) for kind in group}
    heights = {"pressure": 0.5, "vacuum_cranking": 0.25, "vacuum_idle": 0.25, "current": 0.25}
    fig = make_subplots(rows=len(kinds), cols=1, shared_xaxes=True, vertical_spacing=0.07,
                        row_heights=[heights[k[0]] for k in kinds],
                        subplot_titles=_row_titles(kinds, unit))
    for t in traces:
        colour = (_colour(t.cylinder) if t.kind == "pressure"
                  else _CURRENT if t.kind == "current" else _VACUUM)
        fig.add_trace(go.Scattergl(
            x=t.time_s, y=scaled(t.kind, t.values, unit), mode="lines", name=channel_name(t),
            line={"color": colour, "width": 1},
            hovertemplate="%{x:.4f} s: %{y:.1f}<extra>" + channel_name(t) + "</extra>"),
            row=row_of[t.kind], col=1)
    for s in _summaries(derived, "pressure"):
        row = row_of["pressure"]
        peaks = scaled("pressure", np.asarray(s.get("peaks_kpa", []), float), unit)
        fig.add_trace(go.Scatter(
            x=s.get("peak_times_s", []), y=peaks, mode="markers+text",
            name=f"cyl {s['cylinder']} compression events",
            text=[str(i) for i in range(1, peaks.size + 1)], textposition="top center",
            textfont={"size": 10, "color": _MUTED},
            marker={"symbol": "triangle-down", "size": 9, "color": _colour(s["cylinder"]),
                    "line": {"color": _INK, "width": 1}},
            hovertemplate="event %{text}: %{y:.1f} " + unit + " at %{x:.4f} s<extra></extra>"),
            row=row, col=1)
        depth = s.get("intake_depression_kpa")
        if depth is not None:
            level = float(scaled("pressure", np.array([-depth]), unit)[0])
            fig.add_hline(y=level, line={"color": _colour(s["cylinder"]), "dash": "dot",
                                         "width": 1.5}, row=row, col=1,
                          annotation_text=f"cyl {s['cylinder']} intake depression "
                          f"{from_kpa(depth, vacuum_unit_for(unit)):.1f} "
                          f"{vacuum_unit_for(unit)}",
                          annotation_position="bottom left",
                          annotation={"font": {"size": 11, "color": _INK},
                                      "bgcolor": "rgba(255,255,255,0.85)"})
    current = next((t for t in traces if t.kind == "current"), None)
    for s in _summaries(derived, "current"):
        times = np.asarray(s.get("hump_times_s", []), float)
        if current is None or times.size == 0:
            continue
        used = np.isfinite(np.asarray(s.get("hump_heights_a", []), float))
        top = float(np.max(current.values)) if current.values.size else 0.0
        cyl = np.asarray(s.get("hump_cylinders", []), int)
        fig.add_trace(go.Scatter(
            x=times[used], y=np.full(int(used.sum()), top), mode="text",
            text=[f"{c}" for c in cyl[used]], textfont={"size": 11, "color": _CURRENT},
            name="cylinder of each current hump",
            hovertemplate="hump of cylinder %{text} at %{x:.4f} s<extra></extra>"),
            row=row_of["current"], col=1)
    fig.update_xaxes(showline=True, linecolor=_INK, gridcolor=_GRID)
    fig.update_yaxes(showline=True, linecolor=_INK, gridcolor=_GRID)
    fig.update_xaxes(title_text="time, s", row=len(kinds), col=1)
    fig.update_annotations(font_size=12, selector={"xref": "paper"})
    fig.update_layout(
        title={"text": title, "x": 0.01, "font": {"size": 15}}, uirevision=revision,
        height=220 + 170 * len(kinds), margin={"l": 60, "r": 20, "t": 60, "b": 40},
        plot_bgcolor="#ffffff", paper_bgcolor="#ffffff", font={"size": 13},
        legend={"orientation": "h", "y": -0.12, "x": 0}, hovermode="closest",
        dragmode="zoom")
    return fig


def events(derived: dict[str, Any], unit: str) -> go.Figure:
    """Per compression event, per pressure channel: the peak build-up, each cycle's intake
    depression, and the cranking speed (from the current humps when no pressure channel).

    :param derived: what fleetdb derived (``StoredCapture.derived``).
    :param unit: pressure unit (psi, kPa, bar).
    """
    pressure = _summaries(derived, "pressure")
    current = _summaries(derived, "current")
    if not pressure and not current:
        return message_figure("No cylinder pressure or starter current in this capture: "
                              "nothing to show per compression event.", "Events")
    vac = vacuum_unit_for(unit)
    fig = make_subplots(rows=1, cols=3, horizontal_spacing=0.09, subplot_titles=[
        f"Build-up: peak per event, {unit}", f"Intake depression per cycle, {vac}",
        "Cranking speed, rpm"])
    for s in pressure:
        colour, name = _colour(s["cylinder"]), f"cyl {s['cylinder']}"
        peaks = scaled("pressure", np.asarray(s.get("peaks_kpa", []), float), unit)
        number = np.arange(1, peaks.size + 1)
        fig.add_trace(go.Scatter(
            x=number, y=peaks, mode="lines+markers", name=f"{name} peaks",
            line={"color": colour}, marker={"size": 7},
            hovertemplate="event %{x}: %{y:.1f} " + unit + "<extra>" + name + "</extra>"),
            row=1, col=1)
        settled = s.get("settled_kpa")
        if settled is not None:
            level = float(from_kpa(settled, unit))
            fig.add_hline(y=level, line={"color": colour, "dash": "dash", "width": 1},
                          row=1, col=1, annotation_text=f"{name} settled {level:.0f}",
                          annotation_position="bottom right",
                          annotation={"font": {"size": 11}, "bgcolor": "rgba(255,255,255,0.85)"})
        depth = np.asarray(s.get("depression_by_cycle_kpa", []), float)
        if depth.size:
            fig.add_trace(go.Bar(
                x=np.arange(1, depth.size + 1), y=from_kpa(depth, vac), name=f"{name} depression",
                marker={"color": colour},
                hovertemplate="cycle after event %{x}: %{y:.2f} " + vac + "<extra>" + name
                + "</extra>"), row=1, col=2)
        rpm = np.asarray(s.get("rpm_by_cycle", []), float)
        if rpm.size:
            mid = 0.5 * (np.asarray(s["peak_times_s"][1:], float)
                         + np.asarray(s["peak_times_s"][:-1], float))
            fig.add_trace(go.Scatter(
                x=mid, y=rpm, mode="lines+markers", name=f"{name} speed",
                line={"color": colour}, marker={"symbol": "square", "size": 6},
                hovertemplate="%{x:.2f} s: %{y:.0f} rpm<extra>" + name + "</extra>"),
                row=1, col=3)
    limit = DEFAULTS["cranking_vacuum_max_throttle_open"]
    if pressure:
        fig.add_hline(y=float(from_kpa(limit.kpa, vac)), line={"color": _LIMIT, "dash": "dash"},
                      row=1, col=2, annotation_text=f"{limit.value:g} {limit.unit}, throttle "
                      "open (default)", annotation_position="top left",
                      annotation={"font": {"size": 11, "color": _LIMIT},
                                  "bgcolor": "rgba(255,255,255,0.85)"})
    else:
        fig.add_annotation(text="no pressure channel", showarrow=False, row=1, col=2,
                           x=0.5, y=0.5, xref="x2 domain", yref="y2 domain",
                           font={"color": _MUTED})
    for s in current if not pressure else []:
        rpm = np.asarray(s.get("rpm_by_hump", []), float)
        times = np.asarray(s.get("hump_times_s", []), float)
        if rpm.size:
            fig.add_trace(go.Scatter(
                x=0.5 * (times[1:] + times[:-1]), y=rpm, mode="lines+markers",
                name="speed from current humps", line={"color": _CURRENT},
                hovertemplate="%{x:.2f} s: %{y:.0f} rpm<extra></extra>"), row=1, col=3)
    if derived.get("crank_rpm") is not None:
        fig.add_hline(y=derived["crank_rpm"], line={"color": _INK, "dash": "dash", "width": 1},
                      row=1, col=3, annotation_text=f"median {derived['crank_rpm']:.0f} rpm",
                      annotation_position="bottom right",
                      annotation={"font": {"size": 11}, "bgcolor": "rgba(255,255,255,0.85)"})
    fig.update_xaxes(title_text="compression event", row=1, col=1)
    fig.update_xaxes(title_text="cycle", row=1, col=2)
    fig.update_xaxes(title_text="time, s", row=1, col=3)
    fig.update_yaxes(rangemode="tozero", row=1, col=1)
    fig.update_xaxes(showline=True, linecolor=_INK, gridcolor=_GRID)
    fig.update_yaxes(showline=True, linecolor=_INK, gridcolor=_GRID)
    fig.update_annotations(font_size=12, selector={"xref": "paper"})
    fig.update_layout(height=340, margin={"l": 55, "r": 20, "t": 50, "b": 45},
                      plot_bgcolor="#ffffff", paper_bgcolor="#ffffff", font={"size": 13},
                      legend={"orientation": "h", "y": -0.25, "x": 0}, barmode="group")
    return fig
