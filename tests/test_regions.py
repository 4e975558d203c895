"""Policy-region maps (one estimate x age) and threshold-age maps (two estimates), and
their charts: one panel per state, base point marked, legends below and never cut."""

from __future__ import annotations

import numpy as np
import pytest

from caredecide import decision_charts
from caredecide.errors import ModelError
from caredecide.modelfile import load_model
from caredecide.palettes import ACTION_PALETTE, LOW_HIGH_PALETTE
from caredecide.sensitivity.decision import decision_tornado
from caredecide.sensitivity.regions import policy_region_map, threshold_age_map
from synthetic_cohort import MODELS_DIR
from tests.test_sensitivity import hand_model

DEMO = MODELS_DIR / "demo_progressive.toml"


def test_region_map_places_the_switch_at_the_hand_threshold():
    # Hand model (tests/test_sensitivity.py): treat at cycle 0 (age 0) when
    # p (1 - hr) > loss, i.e. p > 0.05 / 0.6 = 0.08333; at cycle 1 always wait.
    result = policy_region_map(hand_model(), "p", grid=20)
    frame = result.frame
    assert set(frame["state"]) == {"sick"}
    waiting_throughout = frame[(frame["action"] == "wait") & (frame["age_from"] == 0)]
    treating = frame[frame["action"] == "treat"]
    edge = waiting_throughout["x_to"].max()
    spacing = (0.2 - 0.01) / 19
    assert abs(edge - 0.05 / 0.6) <= spacing / 2 + 1e-12
    assert treating["x_from"].min() == edge
    assert (treating["age_from"] == 0).all() and (treating["age_to"] == 1).all()
    # The rectangles tile the (p, age) plane: area = range width x 2 years.
    area = ((frame["x_to"] - frame["x_from"]) * (frame["age_to"] - frame["age_from"])).sum()
    assert area == pytest.approx(0.19 * 2, rel=1e-12)
    assert result.base == 0.1


def test_threshold_age_follows_the_hand_algebra():
    result = threshold_age_map(hand_model(), "p", "hr", grid=5)
    for row in result.frame.itertuples():
        treats_first = row.x_value * (1 - row.y_value) > 0.05
        if treats_first:  # treat at age 0, wait from age 1: threshold age 1
            assert row.threshold_age == 1.0
            assert (row.action_before, row.action_after) == ("treat", "wait")
        else:  # wait at every age
            assert np.isnan(row.threshold_age) and row.action_after == "wait"
    base = result.base.iloc[0]  # p = 0.1, hr = 0.4: 0.06 > 0.05, treat first
    assert base["threshold_age"] == 1.0 and (base["x_value"], base["y_value"]) == (0.1, 0.4)


def test_maps_refuse_bad_requests():
    with pytest.raises(ModelError, match="two different parameters"):
        threshold_age_map(hand_model(), "p", "p")
    with pytest.raises(ModelError, match=r"parameters\.nope"):
        policy_region_map(hand_model(), "nope")
    with pytest.raises(ModelError, match="grid"):
        policy_region_map(hand_model(), "p", grid=1)


@pytest.fixture(scope="module")
def demo():
    return load_model(DEMO)


def test_region_chart_has_one_panel_per_state_a_base_point_and_a_whole_legend(demo):
    result = policy_region_map(demo, "hr_treatment", grid=9)
    chart = decision_charts.make_region_map_chart(
        result.frame, x_title="hr_treatment", action_labels=result.action_labels, base=result.base
    )
    spec = chart.to_dict()
    panels = spec["vconcat"]
    assert len(panels) == result.frame["state"].nunique() == 3
    for panel in panels:
        rect, rule, _text = panel["layer"]
        legend = rect["encoding"]["color"]["legend"]
        assert legend["orient"] == "bottom" and legend["labelLimit"] == 0
        scale = rect["encoding"]["color"]["scale"]
        # Colours by the model's action order, whatever the panel shows.
        assert scale["domain"] == list(result.action_labels)
        assert scale["range"] == list(ACTION_PALETTE[: len(result.action_labels)])
        assert rule["mark"]["type"] == "rule"
    datasets = spec["datasets"].values()
    assert any(rows and rows[0].get("x") == result.base for rows in datasets)


def test_threshold_age_chart_marks_the_base_point(demo):
    result = threshold_age_map(demo, "hr_treatment", "c_drug_year", grid=3)
    spec = decision_charts.make_threshold_age_chart(
        result.frame, result.base, x_title="hr_treatment", y_title="c_drug_year"
    ).to_dict()
    assert len(spec["vconcat"]) == 3
    line, marker = spec["vconcat"][1]["layer"][:2]
    assert marker["mark"]["shape"] == "diamond"
    assert line["encoding"]["color"]["scale"]["range"] == list(LOW_HIGH_PALETTE)


def test_decision_tornado_chart_shows_both_ends_in_rank_order(demo):
    result = decision_tornado(demo, grid=5)
    spec = decision_charts.make_decision_tornado_chart(result.table, unit="EUR").to_dict()
    bar = spec["layer"][0]
    assert bar["encoding"]["y"]["sort"] == list(result.table["parameter"])
    assert bar["encoding"]["color"]["scale"]["range"] == list(LOW_HIGH_PALETTE)
    assert bar["encoding"]["color"]["legend"]["labelLimit"] == 0


def test_chart_builders_name_missing_columns():
    import pandas as pd

    with pytest.raises(ValueError, match="policy-region map: frame lacks column"):
        decision_charts.make_region_map_chart(pd.DataFrame({"x": [1]}), x_title="x",
                                              action_labels=["a"])  # fmt: skip


def test_estimates_are_offered_most_decisive_first(demo):
    from caredecide.sensitivity.regions import estimates_by_decision_loss

    ranked = estimates_by_decision_loss(demo)
    table = decision_tornado(demo, ranked, grid=5).table
    assert ranked == list(table["parameter"])
    assert table["changes_policy"].iloc[0]


def test_no_legend_title_or_axis_label_is_cut(demo):
    from caredecide import charts
    from caredecide.sensitivity import two_way

    result = decision_tornado(demo, grid=3)
    bar = decision_charts.make_decision_tornado_chart(result.table).to_dict()["layer"][0]
    assert bar["encoding"]["color"]["legend"]["titleLimit"] == 0
    assert bar["encoding"]["y"]["axis"]["labelLimit"] == 0
    grid = two_way(demo, "hr_treatment", "c_drug_year", grid=2)
    cells = charts.make_two_way_chart(grid).to_dict()["layer"][0]
    assert cells["encoding"]["color"]["legend"]["labelLimit"] == 0


def test_two_way_map_can_hold_the_base_case_as_a_cell():
    from caredecide import charts
    from caredecide.sensitivity import two_way

    # Hand model: p base 0.1 and hr base 0.4 are not on a 5-value grid of their ranges.
    frame = two_way(hand_model(), "p", "hr", grid=5, include_base=True)
    assert len(frame) == 6 * 6
    base = frame[frame["is_base"]]
    assert len(base) == 1 and base["same_as_base"].all()
    assert (base["x_value"].iloc[0], base["y_value"].iloc[0]) == (0.1, 0.4)
    # treat iff p (1 - hr) > loss = 0.05 (d = 1), also on the added rows and columns.
    expected = np.where(frame["x_value"] * (1 - frame["y_value"]) > 0.05, "treat", "wait")
    assert (frame["action_at_start"].to_numpy() == expected).all()
    spec = charts.make_two_way_chart(frame).to_dict()
    rows = spec["datasets"][spec["data"]["name"]]
    assert [r["label"] for r in rows if r["is_base"]] == ["treat (base)"]
