"""dashboard.figures as plain functions: what is drawn, where, in which unit.

Unit conversions are checked against pint (its psi and bar follow NIST SP 811 App. B);
the engine layouts are those of tests/data/fleet.csv.
"""

from __future__ import annotations

import pandas as pd
import pint
import pytest

from dashboard.figures import cylinder_bars

UREG = pint.UnitRegistry()


def _pint(value_kpa: float, unit: str) -> float:
    return UREG.Quantity(value_kpa, "kPa").to(unit).magnitude


@pytest.mark.parametrize("unit", ["psi", "bar", "kPa"])
def test_v_engine_bars_follow_the_banks_in_the_chosen_unit(unit: str) -> None:
    values = {1: 1030.0, 2: 1020.0, 3: 700.0, 4: 1010.0, 5: 1035.0, 6: 1000.0}
    readings = pd.DataFrame({"cylinder": list(values), "value_kpa": list(values.values())})
    fig = cylinder_bars(readings, unit, [[1, 3, 5], [2, 4, 6]])
    assert [list(trace.x) for trace in fig.data] == [["Cyl 1", "Cyl 3", "Cyl 5"],
                                                     ["Cyl 2", "Cyl 4", "Cyl 6"]]
    assert [trace.xaxis for trace in fig.data] == ["x", "x2"]  # one panel per bank
    for trace, bank in zip(fig.data, [[1, 3, 5], [2, 4, 6]], strict=True):
        assert list(trace.y) == pytest.approx([_pint(values[c], unit) for c in bank],
                                              rel=1e-12)


def test_inline_engine_is_one_row_and_a_missing_cylinder_is_a_gap() -> None:
    readings = pd.DataFrame({"cylinder": [1, 2, 4], "value_kpa": [1000.0, 990.0, 1010.0]})
    fig = cylinder_bars(readings, "psi", [[1, 2, 3, 4]])
    assert len(fig.data) == 1
    assert list(fig.data[0].x) == ["Cyl 1", "Cyl 2", "Cyl 3", "Cyl 4"]
    assert fig.data[0].y[2] is None
    assert fig.layout.showlegend is False


def test_family_minimum_is_a_labelled_line_in_every_bank() -> None:
    readings = pd.DataFrame({"cylinder": [1, 2, 3, 4, 5, 6], "value_kpa": [900.0] * 6})
    # 125 psi is TEST-V6's minimum in tests/data/fleet.csv; pint gives it in kPa.
    minimum_kpa = UREG.Quantity(125, "psi").to("kPa").magnitude
    fig = cylinder_bars(readings, "psi", [[1, 3, 5], [2, 4, 6]], minimum_kpa=minimum_kpa)
    lines = [(shape.yref, shape.y0) for shape in fig.layout.shapes]
    assert [ref for ref, _ in lines] == ["y", "y2"]
    assert [y for _, y in lines] == pytest.approx([125.0, 125.0], rel=1e-12)
    assert all(a.text == "family minimum 125 psi" for a in fig.layout.annotations
               if "minimum" in a.text)


def test_value_axis_starts_at_zero_and_leaves_room_above_the_tallest() -> None:
    readings = pd.DataFrame({"cylinder": [1, 2], "value_kpa": [1000.0, 800.0]})
    fig = cylinder_bars(readings, "kPa", [[1, 2]], minimum_kpa=1100.0)
    low, high = fig.layout.yaxis.range
    assert low == 0 and high > 1100.0
