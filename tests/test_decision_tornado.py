"""Decision tornado: value lost by keeping the base-case policy, ranked.

Hand-checked on the two-cycle threshold model of tests/test_sensitivity.py, whose action
gap at cycle 0 is ``gap = loss - d p (1 - hr)`` (derived there; d = 1 without
discounting): treat when the gap is negative.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.compile import compile_model
from caredecide.evaluate import evaluate_policy
from caredecide.modelfile import load_model
from caredecide.objective import Objective
from caredecide.sensitivity import one_way, parameter_sets
from caredecide.sensitivity.decision import decision_tornado
from caredecide.solvers import solve
from synthetic_cohort import MODELS_DIR
from tests.test_sensitivity import group_model, hand_model

DEMO = MODELS_DIR / "demo_progressive.toml"


@pytest.fixture(scope="module")
def hand():
    return decision_tornado(hand_model())


def test_losses_match_the_hand_algebra(hand):
    # Base p = 0.1, hr = 0.4, loss = 0.05: p (1 - hr) = 0.06 > 0.05, treat at cycle 0.
    # Keeping "treat" when the estimate moves costs max(0, loss - p (1 - hr)) QALYs
    # (common practice: the loss of a decision is the gap to the best action there).
    table = hand.table.set_index("parameter")
    # p low 0.01: 0.05 - 0.006 = 0.044; p high 0.2: 0.05 - 0.12 < 0 -> 0.
    assert table.at["p", "loss_low"] == pytest.approx(0.044, abs=1e-12)
    assert table.at["p", "loss_high"] == 0.0
    assert table.at["p", "loss_at_bounds"] == pytest.approx(0.022, abs=1e-12)
    # hr high 0.9: 0.05 - 0.1 * 0.1 = 0.04; hr low 0.2: 0.05 - 0.08 < 0 -> 0.
    assert table.at["hr", "loss_high"] == pytest.approx(0.04, abs=1e-12)
    assert table.at["hr", "loss_low"] == 0.0
    # loss high 0.1: 0.1 - 0.06 = 0.04; loss low 0: 0.
    assert table.at["loss", "loss_high"] == pytest.approx(0.04, abs=1e-12)
    assert table.at["unused", "loss_max"] == 0.0
    # QALY objective: the QALY loss is the loss itself.
    assert table.at["p", "loss_qalys_at_bounds"] == table.at["p", "loss_at_bounds"]


def test_ranked_by_loss_at_the_bounds(hand):
    table = hand.table
    assert list(table["rank"]) == [1, 2, 3, 4]
    assert table["parameter"].iloc[0] == "p"  # 0.022 > 0.02 = hr, loss
    assert table["parameter"].iloc[-1] == "unused"
    assert (np.diff(table["loss_at_bounds"].to_numpy()) <= 0).all()


def test_distance_to_the_nearest_threshold_as_a_share_of_the_range(hand):
    table = hand.table.set_index("parameter")
    # Thresholds from gap = 0: p = 0.05 / 0.6, hr = 1 - 0.05 / 0.1, loss = 0.06.
    assert table.at["p", "nearest_threshold"] == pytest.approx(0.05 / 0.6, abs=1e-9)
    assert table.at["p", "distance_share"] == pytest.approx((0.1 - 0.05 / 0.6) / 0.19, abs=1e-8)
    assert table.at["hr", "distance_share"] == pytest.approx(0.1 / 0.7, abs=1e-8)
    assert table.at["loss", "distance_share"] == pytest.approx(0.01 / 0.1, abs=1e-8)
    assert np.isnan(table.at["unused", "nearest_threshold"])


def test_share_of_cells_changed(hand):
    # Decision cells: sick at cycles 0 and 1 (dead is absorbing); only cycle 0 flips.
    assert hand.decision_cells == 2
    table = hand.table.set_index("parameter")
    assert table.at["p", "cells_changed"] == 1
    assert table.at["p", "share_cells_changed"] == 0.5
    assert not table.at["unused", "changes_policy"]


@pytest.mark.parametrize("model", [hand_model(), group_model()], ids=["hand", "group"])
def test_each_grid_loss_equals_solving_and_evaluating_alone(model):
    result = decision_tornado(model, grid=5)
    objective = Objective(model.settings.objective, model.settings.willingness_to_pay)
    base_compiled = compile_model(model)
    base_policy = solve(base_compiled, objective).policy[:1]
    sample = result.grid.groupby("parameter").head(3)
    for row in sample.itertuples():
        compiled = compile_model(model, parameter_sets(model, {row.parameter: [row.value]}))
        best = solve(compiled, objective)
        optimal = float(best.expected_value(compiled.start_distribution)[0])
        kept = float(evaluate_policy(compiled, base_policy, objective).value[0])
        assert row.optimal_value == pytest.approx(optimal, rel=1e-12, abs=1e-12)
        assert row.loss == pytest.approx(max(optimal - kept, 0.0), abs=1e-9)
    assert (result.grid["loss"] >= 0).all()


def test_base_value_loses_nothing(hand):
    at_base = hand.grid.merge(hand.table[["parameter", "base"]], on="parameter")
    assert (at_base.loc[at_base["value"] == at_base["base"], "loss"] == 0).all()


@pytest.fixture(scope="module")
def demo():
    return load_model(DEMO)


def test_demo_ranks_first_an_estimate_that_changes_the_policy(demo):
    result = decision_tornado(demo)
    first = result.table.iloc[0]
    assert first["changes_policy"] and first["loss_at_bounds"] > 0
    # The value-level tornado's leader is judged by the one-way analysis itself: when it
    # switches no cell, the decision tornado gives it no loss and ranks it below.
    value_table = one_way(demo).table
    leader = value_table.iloc[0]
    row = result.table.set_index("parameter").loc[leader["parameter"]]
    if leader["switches_low"] + leader["switches_high"] == 0:
        assert row["loss_max"] == 0.0 and row["rank"] > 1
    # Net benefit: the QALY loss is the money loss over the willingness to pay.
    wtp = demo.settings.willingness_to_pay
    assert first["loss_qalys_at_bounds"] == pytest.approx(first["loss_at_bounds"] / wtp)
    # Estimates that change no cell lose nothing.
    unchanged = result.table[~result.table["changes_policy"]]
    assert (unchanged["loss_max"] == 0).all()


def test_value_rank_keeps_the_value_level_order(demo):
    result = decision_tornado(demo)
    value_table = one_way(demo).table
    by_value = result.table.sort_values("value_rank")["parameter"].tolist()
    assert by_value == value_table["parameter"].tolist()


@settings(max_examples=15, deadline=None)
@given(
    loss=st.floats(0.0, 0.1, allow_nan=False),
    hr=st.floats(0.2, 0.9, allow_nan=False),
)
def test_loss_is_the_gap_where_the_action_flips(loss, hr):
    # Hand model (QALYs, no discounting): treat at cycle 0 when p (1 - hr) > loss. Keeping
    # the base action when p moves to x loses |x (1 - hr) - loss| where the best action at x
    # differs from the base one, nothing elsewhere (common practice: the regret of a
    # decision is the gap to the best action).
    model = hand_model().with_parameter_values({"loss": loss, "hr": hr})
    result = decision_tornado(model, ["p"], grid=3)
    row = result.table.iloc[0]
    base_treats = 0.1 * (1 - hr) > loss
    for end, x in (("loss_low", 0.01), ("loss_high", 0.2)):
        gap = x * (1 - hr) - loss
        flips = (gap > 0) != base_treats and abs(gap) > 1e-12
        expected = abs(gap) if flips else 0.0
        assert row[end] == pytest.approx(expected, abs=1e-9)
    assert row["loss_low"] >= 0 and row["loss_high"] >= 0
