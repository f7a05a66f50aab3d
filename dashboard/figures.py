"""Pure functions from DataFrames to plotly figures; no database, no Dash, testable alone.

Figures take fleetdb's numbers (kPa inside) and only convert and draw them: what is low,
worn or untrustworthy is fleetdb's verdict, shown in words beside the figure.
"""

from __future__ import annotations

from collections.abc import Sequence

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
