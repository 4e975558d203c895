"""Structure summary: threshold rules are detected from the policy, never assumed."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from caredecide.objective import Objective
from caredecide.solvers import solve
from caredecide.structure import (
    NO_STRUCTURE,
    PER_STATE,
    THRESHOLD,
    UNIFORM,
    age_bands,
    band_table,
)
from tests.test_solvers_models import make_compiled

STATES = ("stage_1", "stage_2", "stage_3", "dead")


def _staged_model(n_cycles=5, ordered=STATES[:3], gain=(0.2, 1.5, 3.0)):
    """Three stages and death; treating costs 1 and gains ``gain`` QALYs per stage.

    Both actions move the cohort alike, so only the immediate gain minus the cost decides
    (common practice: a myopic choice is optimal when actions do not change transitions).
    """
    P = np.array(
        [[0.8, 0.1, 0.0, 0.1], [0.0, 0.8, 0.1, 0.1], [0.0, 0.0, 0.9, 0.1], [0.0, 0.0, 0.0, 1.0]]
    )
    decision_qaly = np.zeros((4, 2))
    decision_qaly[:3, 1] = gain
    decision_cost = np.zeros((4, 2))
    decision_cost[:3, 1] = 1.0
    return make_compiled(
        np.stack([P, P]),
        state_qaly=[1, 1, 1, 0],
        decision_qaly=decision_qaly,
        decision_cost=decision_cost,
        n_cycles=n_cycles,
        start_age=60,
        ordered_states=ordered,
        state_ids=STATES,
        action_ids=("wait", "treat"),
        discount_outcomes=0.03,
        discount_costs=0.03,
    )


def _with_policy(policy_by_state: dict[str, list[int]], n_cycles=5, ordered=STATES[:3]):
    result = solve(_staged_model(n_cycles, ordered), Objective("net_benefit", 1.0))
    policy = np.zeros_like(result.policy)
    for state, actions in policy_by_state.items():
        policy[0, :, STATES.index(state)] = actions
    return replace(result, policy=policy)


def test_solved_policy_is_a_stage_threshold():
    # treat gains 0.2 / 1.5 / 3 QALYs at a cost of 1 (WTP 1): net -0.8, +0.5, +2.
    result = solve(_staged_model(), Objective("net_benefit", 1.0))
    summary = result.structure()
    assert summary.kind == THRESHOLD
    assert summary.text == "treat from stage_2 onward; wait otherwise"
    assert summary.bands == {
        "wait": [("stage_1", "all ages")],
        "treat": [("stage_2", "all ages"), ("stage_3", "all ages")],
    }


def test_uniform_policy():
    result = solve(_staged_model(gain=(0, 0, 0.5)), Objective("net_benefit", 1.0))
    assert result.structure().kind == UNIFORM
    assert result.structure().text == "wait in every state"


def test_age_threshold_within_a_stage():
    summary = _with_policy(
        {"stage_1": [0, 0, 0, 1, 1], "stage_2": [1] * 5, "stage_3": [1] * 5},
    ).structure()
    assert summary.kind == THRESHOLD
    # Ages 60..65 at boundaries: the switch happens at the start of cycle 3 (age 63).
    assert summary.rules == [
        "treat from stage_2 onward",
        "treat from age 63 onward in stage_1",
        "wait otherwise",
    ]


def test_stop_treating_at_older_ages_is_a_threshold():
    summary = _with_policy(
        {"stage_1": [0] * 5, "stage_2": [1, 1, 1, 0, 0], "stage_3": [1, 1, 1, 1, 0]}
    ).structure()
    assert summary.kind == THRESHOLD
    assert summary.rules == [
        "treat in stage_2 before age 63, wait from age 63 onward",
        "treat in stage_3 before age 64, wait from age 64 onward",
        "wait otherwise",
    ]


def test_non_monotone_policy_has_no_simple_structure():
    # Treat in stage_1 and stage_3 but not stage_2: not a threshold along the order.
    summary = _with_policy({"stage_1": [1] * 5, "stage_2": [0] * 5, "stage_3": [1] * 5}).structure()
    assert summary.kind == NO_STRUCTURE
    assert summary.text.startswith("no simple threshold structure")
    assert summary.bands["treat"] == [("stage_1", "all ages"), ("stage_3", "all ages")]


def test_two_switches_over_age_has_no_simple_structure():
    summary = _with_policy(
        {"stage_1": [0] * 5, "stage_2": [1, 0, 1, 1, 1], "stage_3": [1] * 5}
    ).structure()
    assert summary.kind == NO_STRUCTURE
    assert ("stage_2", "60") in summary.bands["treat"]
    assert ("stage_2", "62-64") in summary.bands["treat"]
    assert ("stage_2", "61") in summary.bands["wait"]


def test_without_clinical_order_no_stage_threshold_is_claimed():
    summary = _with_policy(
        {"stage_1": [0] * 5, "stage_2": [1] * 5, "stage_3": [1] * 5}, ordered=()
    ).structure()
    assert summary.kind == PER_STATE
    assert summary.text == (
        "states have no clinical order; wait in stage_1; treat in stage_2; treat in stage_3"
    )


def test_infinite_horizon_threshold():
    result = solve(_staged_model(n_cycles=None), Objective("net_benefit", 1.0))
    assert result.structure().text == "treat from stage_2 onward; wait otherwise"


@pytest.mark.parametrize(
    ("actions", "expected"),
    [
        ([1, 1, 1], [(1, "all ages")]),
        ([0, 0, 1], [(0, "60-61"), (1, "62")]),
        ([0, 1, 0], [(0, "60"), (1, "61"), (0, "62")]),
    ],
)
def test_age_bands_merge_consecutive_cycles(actions, expected):
    assert age_bands(np.array(actions), np.arange(60.0, 64.0)) == expected


def test_band_table_merges_cycles_where_no_state_changes():
    result = _with_policy(
        {"stage_1": [0, 0, 0, 1, 1], "stage_2": [1, 1, 0, 0, 0], "stage_3": [1] * 5}
    )
    table = band_table(result)
    # Changes at the start of cycles 2 (age 62) and 3 (age 63): bands 60-61, 62, 63-64.
    assert list(table.columns) == ["60-61", "62", "63-64"]
    assert list(table.index) == ["stage_1", "stage_2", "stage_3"]  # dead is no decision state
    assert table.loc["stage_1"].tolist() == ["wait", "wait", "treat"]
    assert table.loc["stage_2"].tolist() == ["treat", "wait", "wait"]
    infinite = band_table(solve(_staged_model(n_cycles=None), Objective("net_benefit", 1.0)))
    assert list(infinite.columns) == ["all ages"]


def test_no_structure_is_described_band_by_band():
    # Ages 60..64 at the cycle starts. Treat stage_2 until 63 and stage_3 until 61: within
    # each age band the rule is readable even though no single threshold rule exists.
    summary = _with_policy(
        {"stage_1": [0] * 5, "stage_2": [1, 1, 1, 1, 0], "stage_3": [1, 1, 0, 0, 0]}
    ).structure()
    assert summary.kind == NO_STRUCTURE
    assert summary.text.endswith(
        "By age band: ages 60-61: treat from stage_2 onward, wait before; "
        "ages 62-63: wait in stage_1, stage_3; treat in stage_2; "
        "age 64: wait in every state"
    )


def test_no_structure_lists_each_state_once_with_its_age_bands():
    # One decision state that waits, treats, then waits again: two switches over age.
    summary = _with_policy(
        {"stage_1": [0, 1, 1, 0, 0], "stage_2": [1] * 5, "stage_3": [1] * 5}
    ).structure()
    assert summary.kind == NO_STRUCTURE
    assert summary.rules == [
        "wait in stage_1 (ages 60, 63-64)",
        "treat in stage_1 (ages 61-62), stage_2, stage_3",
    ]
