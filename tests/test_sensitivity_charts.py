"""Chart builders for the tornado diagram and the two-way map (checked via to_dict)."""

from __future__ import annotations

import pandas as pd
import pytest

from caredecide.charts import make_tornado_chart, make_two_way_chart


def _one_way_table() -> pd.DataFrame:
    # Synthetic numbers shaped like caredecide.sensitivity.one_way(...).table
    return pd.DataFrame(
        {
            "rank": [1, 2],
            "parameter": ["p", "cost"],
            "low": [0.01, 100.0],
            "high": [0.2, 300.0],
            "value_low": [1990.0, 1920.0],
            "value_base": [1910.0, 1910.0],
            "value_high": [1870.0, 1900.0],
            "switches_low": [1, 0],
            "switches_high": [0, 0],
        }
    )


def _layers(spec: dict) -> list[dict]:
    return spec["layer"]


def test_tornado_orders_by_rank_and_marks_policy_changing_parameters():
    spec = make_tornado_chart(_one_way_table(), unit="(money)").to_dict()
    bar, rule, text = _layers(spec)
    assert bar["encoding"]["y"]["sort"] == ["p", "cost"]
    datasets = spec["datasets"]
    text_rows = datasets[text["data"]["name"]]
    marks = {row["parameter"]: row["mark"] for row in text_rows}
    assert marks == {"p": "changes the policy", "cost": ""}
    bar_rows = datasets[bar["data"]["name"]]
    assert len(bar_rows) == 4  # two ends per parameter
    assert {row["value"] for row in bar_rows} == {1990.0, 1870.0, 1920.0, 1900.0}
    assert rule["mark"]["type"] == "rule"


def test_two_way_writes_actions_in_cells_and_stars_changed_policies():
    frame = pd.DataFrame(
        {
            "x_parameter": "p",
            "x_value": [0.1, 0.2, 0.1, 0.2],
            "y_parameter": "hr",
            "y_value": [0.2, 0.2, 0.9, 0.9],
            "action_at_start": ["treat", "treat", "wait", "treat"],
            "same_as_base": [True, True, False, True],
        }
    )
    spec = make_two_way_chart(frame).to_dict()
    cells, text = _layers(spec)
    assert text["mark"]["type"] == "text"
    rows = spec["datasets"][spec["data"]["name"]]  # shared data of the layers
    assert [r["label"] for r in rows] == ["treat", "treat", "wait*", "treat"]
    assert cells["encoding"]["x"]["title"] == "p" and cells["encoding"]["y"]["title"] == "hr"
    assert cells["encoding"]["color"]["scale"]["domain"] == ["treat", "wait"]


@pytest.mark.parametrize("builder", [make_tornado_chart, make_two_way_chart])
def test_chart_builders_name_missing_columns(builder):
    with pytest.raises(ValueError, match="lacks column"):
        builder(pd.DataFrame({"parameter": ["p"]}))


def test_two_way_uses_letters_for_long_labels():
    frame = pd.DataFrame(
        {
            "x_parameter": "p",
            "x_value": [0.1, 0.2],
            "y_parameter": "hr",
            "y_value": [0.2, 0.2],
            "action_at_start": ["s1: wait; s2: treat", "s1: treat; s2: treat"],
            "same_as_base": [True, False],
        }
    )
    spec = make_two_way_chart(frame).to_dict()
    rows = spec["datasets"][spec["data"]["name"]]
    assert [r["label"] for r in rows] == ["A", "B*"]
    cells = spec["layer"][0]
    assert cells["encoding"]["color"]["scale"]["domain"] == [
        "A = s1: wait; s2: treat",
        "B = s1: treat; s2: treat",
    ]


def test_two_way_axes_follow_the_numbers_not_the_text():
    # Text order would put "970.7" above "2143" and "10" before "9" (common practice:
    # a map's axes run in numeric order, y rising upwards).
    xs, ys = [9.0, 10.0, 11.0], [970.721, 1556.66, 2142.61]
    frame = pd.DataFrame(
        {
            "x_parameter": "n",
            "x_value": [x for _ in ys for x in xs],
            "y_parameter": "c_start",
            "y_value": [y for y in ys for _ in xs],
            "action_at_start": "wait",
            "same_as_base": True,
        }
    )
    cells = make_two_way_chart(frame).to_dict()["layer"][0]
    assert cells["encoding"]["x"]["sort"] == ["9", "10", "11"]
    assert cells["encoding"]["y"]["sort"] == ["2143", "1557", "970.7"]


def test_two_way_axis_labels_stay_distinct_on_a_narrow_range():
    ys = [3000.0, 3000.25, 3000.5]  # all "3000" at 4 significant digits; apart at 5
    frame = pd.DataFrame(
        {
            "x_parameter": "p",
            "x_value": [0.1, 0.1, 0.1],
            "y_parameter": "c",
            "y_value": ys,
            "action_at_start": ["wait", "treat", "treat"],
            "same_as_base": True,
        }
    )
    spec = make_two_way_chart(frame).to_dict()
    rows = spec["datasets"][spec["data"]["name"]]
    assert [r["y"] for r in rows] == ["3000", "3000.2", "3000.5"]
    assert spec["layer"][0]["encoding"]["y"]["sort"] == ["3000.5", "3000.2", "3000"]
