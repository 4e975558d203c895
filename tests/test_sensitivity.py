"""One-way analysis, decision thresholds and two-way analysis on hand-checkable models.

The models here are synthetic (invented for the tests); the expected thresholds are
derived by hand in the comments.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.compile import compile_model
from caredecide.errors import ModelError
from caredecide.model import Action, DirichletGroup, Model, Parameter, Settings, State
from caredecide.objective import Objective
from caredecide.sensitivity import (
    NO_SWITCH,
    compiled_over_discount_rate,
    compiled_over_willingness_to_pay,
    one_way,
    parameter_ranges,
    parameter_sets,
    parameter_thresholds,
    setting_thresholds,
    summarise_thresholds,
    two_way,
)
from caredecide.solvers import solve

SYNTHETIC = "Synthetic: invented for a hand-checkable test"


def hand_model(objective: str = "qalys", discount: float = 0.0, treat_cost: float = 0.0) -> Model:
    """Two cycles, one sick state and death; one decision at cycle 0 that matters.

    Start-of-cycle counting (weights w = 1, 1, 0), QALY weight 1 per year, 1-year cycles,
    outcome discount factor d = 1 / (1 + r). ``wait``: death probability p per cycle;
    ``treat``: death probability p * hr, a one-off QALY loss ``loss`` and cost C.
    Cycle 1 (last decision): V_1(sick) = 1 + max(0 - 0, -loss) * d = d (for loss >= 0,
    C >= 0: waiting is best, nothing follows), V_1(dead) = 0. At cycle 0, in present
    value at the model start:
        Q_0(wait)  = 1 + (1 - p) d
        Q_0(treat) = 1 - loss + (1 - p hr) d            (QALYs)
        gap = Q_0(wait) - Q_0(treat) = loss - d p (1 - hr)
    so treating is best when p (1 - hr) d > loss. With net benefit at lambda per QALY:
        gap = lambda (loss - d p (1 - hr)) + C.
    """
    return Model(
        title="Synthetic: hand-checkable threshold model",
        description=SYNTHETIC,
        settings=Settings(
            cycle_years=1.0,
            horizon_cycles=2,
            start="sick",
            discount_outcomes=discount,
            discount_costs=discount,
            objective=objective,
            willingness_to_pay=30000.0 if objective == "net_benefit" else 0.0,
            within_cycle="start",
        ),
        states=(
            State(id="sick", qaly_weight=1.0),
            State(id="dead", absorbing=True, alive=False),
        ),
        actions=(
            Action(id="wait"),
            Action(id="treat", oneoff_qaly_loss="loss", oneoff_cost=treat_cost),
        ),
        transitions={
            "wait": {"sick": {"dead": "p", "sick": "rest"}},
            "treat": {"sick": {"dead": "p * hr", "sick": "rest"}},
        },
        parameters={
            "p": Parameter("p", 0.1, SYNTHETIC, kind="probability", low=0.01, high=0.2),
            "hr": Parameter("hr", 0.4, SYNTHETIC, kind="hazard_ratio", low=0.2, high=0.9),
            "loss": Parameter("loss", 0.05, SYNTHETIC, kind="other", low=0.0, high=0.1),
            # enters no expression: must move nothing
            "unused": Parameter("unused", 3.0, SYNTHETIC, kind="other", low=1.0, high=5.0),
        },
    )


def group_model() -> Model:
    """A 'sick' row given by a Dirichlet group (stay / better / dead) plus a treat row
    whose death entry uses a group member and keeps a 'rest' entry."""
    return Model(
        title="Synthetic: Dirichlet group model",
        description=SYNTHETIC,
        settings=Settings(
            cycle_years=1.0, horizon_cycles=3, start="sick", objective="qalys", within_cycle="start"
        ),
        states=(
            State(id="well", qaly_weight=1.0),
            State(id="sick", qaly_weight=0.6),
            State(id="dead", absorbing=True, alive=False),
        ),
        actions=(
            Action(id="wait"),
            Action(id="treat", allowed_in=("sick",), oneoff_qaly_loss="loss"),
        ),
        transitions={
            "wait": {
                "sick": {"sick": "g_stay", "well": "g_better", "dead": "g_dead"},
                "well": {"well": "rest", "dead": 0.01},
            },
            "treat": {"sick": {"dead": "g_dead * hr", "well": "g_better", "sick": "rest"}},
        },
        parameters={
            "hr": Parameter("hr", 0.5, SYNTHETIC, kind="hazard_ratio", low=0.3, high=0.9),
            "loss": Parameter("loss", 0.02, SYNTHETIC, low=0.0, high=0.2),
        },
        groups={
            "sick_exits": DirichletGroup(
                "sick_exits", ("g_stay", "g_better", "g_dead"), (70.0, 20.0, 10.0), SYNTHETIC
            )
        },
    )


def _solve_sets(model: Model, changes: dict, objective: Objective | None = None):
    frame = parameter_sets(model, changes)
    compiled = compile_model(model, frame)
    objective = objective or Objective(model.settings.objective, model.settings.willingness_to_pay)
    return compiled, solve(compiled, objective)


# ----------------------------------------------------------------------------- thresholds


def test_parameter_thresholds_match_the_hand_algebra():
    # gap = loss - d p (1 - hr) with d = 1 (no discounting); base p = 0.1, hr = 0.4, loss = 0.05.
    # Source: derivation in hand_model's docstring (Bellman equation, Puterman 1994 ch. 4).
    table = parameter_thresholds(hand_model(), grid=7).set_index("parameter")
    assert table.at["p", "threshold"] == pytest.approx(0.05 / 0.6, abs=1e-8)  # p* = loss/(1-hr)
    assert table.at["hr", "threshold"] == pytest.approx(1 - 0.05 / 0.1, abs=1e-8)  # 1 - loss/p
    assert table.at["loss", "threshold"] == pytest.approx(0.1 * 0.6, abs=1e-8)  # p (1 - hr)
    assert (table.loc[["p", "hr", "loss"], "action_below"] == ["wait", "treat", "treat"]).all()
    assert (table.loc[["p", "hr", "loss"], "action_above"] == ["treat", "wait", "wait"]).all()
    assert table.at["p", "state"] == "sick" and table.at["p", "cycle"] == 0
    assert table.at["unused", "status"] == NO_SWITCH
    assert np.isnan(table.at["unused", "threshold"])


def test_discount_rate_threshold_matches_the_hand_algebra():
    # gap = loss - d p (1 - hr) = 0  ->  d* = 0.05 / 0.06  ->  r* = 0.06 / 0.05 - 1 = 0.2.
    table = setting_thresholds(hand_model(), "discount_outcomes", 0.0, 0.5, grid=9)
    assert list(table["status"]) == ["switch"]
    assert table.at[0, "threshold"] == pytest.approx(0.2, abs=1e-8)
    assert (table.at[0, "action_below"], table.at[0, "action_above"]) == ("treat", "wait")
    both = setting_thresholds(hand_model(), "discount_rate", 0.0, 0.5, grid=9)
    assert both.at[0, "threshold"] == pytest.approx(0.2, abs=1e-8)  # costs are zero here


def test_willingness_to_pay_threshold_matches_the_hand_algebra():
    # Net benefit, C = 200, d = 1: gap = lambda (0.05 - 0.06) + 200 = 0 -> lambda* = 20000.
    model = hand_model("net_benefit", treat_cost=200.0)
    table = setting_thresholds(model, "willingness_to_pay", 0.0, 50000.0, grid=6)
    assert table.at[0, "threshold"] == pytest.approx(20000.0, abs=1e-8)
    assert (table.at[0, "action_below"], table.at[0, "action_above"]) == ("wait", "treat")
    assert table.at[0, "base"] == 30000.0


def _assert_switch_at(model: Model, table: pd.DataFrame, step: float = 1e-6) -> None:
    """At each threshold the gap is ~0 and the action differs just below and above.

    All points (threshold -/+ step x range, per switch) are solved in one batch.
    """
    switches = table[table["status"] == "switch"].reset_index(drop=True)
    assert len(switches) > 0
    h = step * (switches["high"] - switches["low"]).to_numpy()
    x = switches["threshold"].to_numpy()
    frame = pd.concat(
        [
            parameter_sets(model, {row.parameter: np.array([x[k] - h[k], x[k] + h[k]])})
            for k, row in enumerate(switches.itertuples())
        ],
        ignore_index=True,
    )
    compiled = compile_model(model, frame)
    result = solve(compiled, Objective.from_settings(model.settings))
    cycle = switches["cycle"].astype(int).to_numpy()
    state = switches["state"].map(list(compiled.state_ids).index).to_numpy()
    actions = np.asarray(compiled.action_ids)
    below = actions[result.policy[0::2][np.arange(len(switches)), cycle, state]]
    above = actions[result.policy[1::2][np.arange(len(switches)), cycle, state]]
    np.testing.assert_array_equal(below, switches["action_below"].to_numpy())
    np.testing.assert_array_equal(above, switches["action_above"].to_numpy())
    scale = max(1.0, float(np.abs(result.value).max()))
    assert (np.abs(switches["gap_at_threshold"].to_numpy(dtype=float)) <= 1e-9 * scale).all()
    assert switches["converged"].all()


def test_every_reported_threshold_is_a_switch_hand_model():
    model = hand_model()
    _assert_switch_at(model, parameter_thresholds(model, grid=5))


def test_every_reported_threshold_is_a_switch_group_model():
    model = group_model()
    table = parameter_thresholds(model, grid=9)
    _assert_switch_at(model, table)


def test_every_reported_threshold_is_a_switch_demo_model():
    from caredecide.modelfile import load_model
    from synthetic_cohort import demo_model_path

    model = load_model(demo_model_path())
    table = parameter_thresholds(model, grid=11)
    assert (table["status"] == "switch").sum() > 10  # the demo's decision is sensitive
    _assert_switch_at(model, table, step=1e-5)


def three_action_model() -> Model:
    """One decision among a, b, c with one-off QALY losses x, 1 - x and 0.45 (x in [0, 1]).

    Q_a = 1 - x, Q_b = x, Q_c = 0.55 (QALY weight 1, one cycle, start-of-cycle counting):
    a is best for x < 0.45, c for 0.45 < x < 0.55, b for x > 0.55.
    """
    return Model(
        title="Synthetic: three actions",
        description=SYNTHETIC,
        settings=Settings(horizon_cycles=1, start="sick", objective="qalys", within_cycle="start"),
        states=(State(id="sick", qaly_weight=1.0), State(id="dead", absorbing=True, alive=False)),
        actions=(
            Action(id="a", oneoff_qaly_loss="x"),
            Action(id="b", oneoff_qaly_loss="1 - x"),
            Action(id="c", oneoff_qaly_loss=0.45),
        ),
        transitions={k: {"sick": {"dead": 0.0, "sick": "rest"}} for k in ("a", "b", "c")},
        parameters={"x": Parameter("x", 0.5, SYNTHETIC, low=0.0, high=1.0)},
    )


def test_switch_through_a_third_action_is_flagged():
    # grid 2 (x = 0, 1) sees only a -> b; Q_a = Q_b at x = 0.5 where c (0.55) is better.
    coarse = parameter_thresholds(three_action_model(), grid=2)
    assert coarse.at[0, "threshold"] == pytest.approx(0.5, abs=1e-10)
    assert bool(coarse.at[0, "third_action_better"])
    # grid 3 (x = 0, 0.5, 1) brackets both switches: a -> c at 0.45, c -> b at 0.55.
    fine = parameter_thresholds(three_action_model(), grid=3)
    assert list(fine["threshold"]) == pytest.approx([0.45, 0.55], abs=1e-10)
    assert list(zip(fine["action_below"], fine["action_above"], strict=True)) == [
        ("a", "c"),
        ("c", "b"),
    ]
    assert not fine["third_action_better"].any()


def test_infinite_horizon_thresholds_are_reported_by_cycle_not_age():
    # Stationary, discount 3% (needed for an infinite horizon): same structure as hand_model.
    model = hand_model(discount=0.03)
    # Treating pays for ever after here, so widen the toxicity loss range to see a switch.
    parameters = dict(model.parameters)
    parameters["loss"] = replace(parameters["loss"], high=1.0)
    model = replace(
        model,
        settings=replace(model.settings, horizon_cycles=None, infinite_horizon=True),
        parameters=parameters,
    )
    table = parameter_thresholds(model, ["loss"], grid=9)
    _assert_switch_at(model, table)
    bands = summarise_thresholds(table)
    assert bands.at[0, "ages"] == "cycles 0"
    with pytest.raises(ModelError, match="finite horizon"):
        setting_thresholds(model, "discount_rate", 0.01, 0.2)


# ----------------------------------------------------------------------------- one-way


def test_one_way_equals_solving_each_end_alone():
    for model in (hand_model(), group_model()):
        result = one_way(model)
        for _, row in result.table.iterrows():
            for end in ("low", "high"):
                compiled, alone = _solve_sets(model, {row["parameter"]: np.array([row[end]])})
                expected = alone.value[0, 0] @ compiled.start_distribution
                assert row[f"value_{end}"] == pytest.approx(expected, rel=1e-12, abs=1e-12)
        compiled, base = _solve_sets(model, {})
        assert result.base_value == pytest.approx(base.value[0, 0] @ compiled.start_distribution)


def test_one_way_ranks_by_swing_and_lists_policy_changes():
    result = one_way(hand_model())
    table = result.table
    assert list(table["rank"]) == [1, 2, 3, 4]
    assert (np.diff(table["swing"].to_numpy()) <= 0).all()
    # base: p (1 - hr) = 0.06 > loss = 0.05, treat. p low 0.01 -> 0.006 < 0.05: wait.
    p_row = table.set_index("parameter").loc["p"]
    assert p_row["switches_low"] == 1 and p_row["switches_high"] == 0
    assert "low: sick treat->wait" in p_row["policy_changes"]
    switches = result.switches
    assert set(switches["parameter"]) == {"p", "hr", "loss"}
    assert (switches["base_action"] == "treat").all() and (switches["action"] == "wait").all()


def test_parameter_that_enters_no_expression_changes_nothing():
    result = one_way(hand_model())
    row = result.table.set_index("parameter").loc["unused"]
    assert row["change_low"] == 0.0 and row["change_high"] == 0.0 and row["swing"] == 0.0
    assert row["policy_changes"] == "none"
    assert row["rule"] == "moved alone"
    thresholds = parameter_thresholds(hand_model(), ["unused"], grid=4)
    assert list(thresholds["status"]) == [NO_SWITCH]


def test_one_way_on_a_subset_states_the_rules():
    result = one_way(group_model(), ["g_dead", "hr"])
    rules = result.table.set_index("parameter")["rule"]
    assert "Dirichlet group 'sick_exits'" in rules["g_dead"]
    assert "transitions.treat.sick" in rules["g_dead"]  # the treat row has a 'rest' entry
    assert "transitions.treat.sick" in rules["hr"]
    ranges = parameter_ranges(group_model(), ["g_dead"])
    assert ranges.at[0, "range_from"] == "Dirichlet marginal 2.5%/97.5%"


# ----------------------------------------------------------------------------- consistency


@given(st.floats(0.0, 1.0), st.sampled_from(["g_stay", "g_better", "g_dead"]))
@settings(max_examples=40, deadline=None)
def test_dirichlet_rule_keeps_group_sum_and_rows_sum_to_one(value, member):
    model = group_model()
    frame = parameter_sets(model, {member: np.array([value])})
    members = ["g_stay", "g_better", "g_dead"]
    assert frame[members].sum(axis=1).to_numpy() == pytest.approx([1.0], abs=1e-12)
    assert frame.at[0, member] == value
    base = model.base_parameter_values()
    others = [m for m in members if m != member]
    # proportional rescaling keeps the other members' ratio (cross-multiplied: no 0/0)
    assert frame.at[0, others[0]] * base[others[1]] == pytest.approx(
        frame.at[0, others[1]] * base[others[0]], abs=1e-15
    )
    compiled = compile_model(model, frame)  # compile checks every row too
    sums = compiled.transition.sum(axis=-1)
    np.testing.assert_allclose(sums, 1.0, atol=1e-12)


def test_dirichlet_move_beyond_the_group_total_is_refused():
    with pytest.raises(ModelError, match=r"groups\.sick_exits.*g_dead = 1\.2"):
        parameter_sets(group_model(), {"g_dead": np.array([0.5, 1.2])})


def test_unknown_parameter_is_refused_with_its_name():
    with pytest.raises(ModelError, match=r"parameters\.nope.*unknown parameter 'nope'"):
        one_way(hand_model(), ["nope"])


def test_willingness_to_pay_threshold_needs_net_benefit():
    with pytest.raises(ModelError, match=r"settings\.objective.*'qalys'"):
        setting_thresholds(hand_model(), "willingness_to_pay", 0.0, 1.0)


def test_unknown_setting_is_refused():
    with pytest.raises(ModelError, match=r"setting 'cycle_years' is unknown"):
        setting_thresholds(hand_model(), "cycle_years", 0.5, 1.0)


def test_setting_range_must_be_ordered():
    with pytest.raises(ModelError, match=r"range \[0\.3, 0\.1\] is not allowed"):
        setting_thresholds(hand_model(), "discount_costs", 0.3, 0.1)


def test_discount_rate_outside_zero_one_is_refused():
    compiled = compile_model(hand_model())
    with pytest.raises(ModelError, match=r"settings\.discount_costs.*1\.5.*\[0, 1\)"):
        compiled_over_discount_rate(compiled, discount_costs=np.array([0.1, 1.5]))


def test_discount_threshold_needs_a_finite_horizon():
    compiled = replace(compile_model(hand_model()), n_cycles=None)
    with pytest.raises(ModelError, match=r"settings\.horizon.*finite horizon"):
        compiled_over_discount_rate(compiled, discount_outcomes=np.array([0.03]))


# ----------------------------------------------------------------------------- settings batches


@given(st.lists(st.floats(0.0, 1e5), min_size=1, max_size=4))
@settings(max_examples=25, deadline=None)
def test_willingness_to_pay_batch_equals_solving_at_each_value(wtps):
    model = hand_model("net_benefit", treat_cost=200.0)
    compiled = compile_model(model)
    batch = solve(
        compiled_over_willingness_to_pay(compiled, np.array(wtps)), Objective("net_benefit", 1.0)
    )
    for k, wtp in enumerate(wtps):
        alone = solve(compiled, Objective("net_benefit", wtp))
        np.testing.assert_allclose(batch.value[k], alone.value[0], rtol=1e-12, atol=1e-9)


@given(st.floats(0.0, 0.9), st.floats(0.0, 0.9))
@settings(max_examples=25, deadline=None)
def test_discount_batch_equals_recompiling_with_the_rates(r_out, r_cost):
    model = hand_model("net_benefit", treat_cost=200.0)
    compiled = compile_model(model)
    objective = Objective("net_benefit", 30000.0)
    batch = solve(
        compiled_over_discount_rate(compiled, np.array([r_out]), np.array([r_cost])), objective
    )
    recompiled = compile_model(
        replace(
            model, settings=replace(model.settings, discount_outcomes=r_out, discount_costs=r_cost)
        )
    )
    alone = solve(recompiled, objective)
    np.testing.assert_allclose(batch.value[0], alone.value[0], rtol=1e-12, atol=1e-9)
    np.testing.assert_array_equal(batch.policy[0], alone.policy[0])


# ----------------------------------------------------------------------------- two-way


def test_two_way_grid_follows_the_hand_threshold():
    # treat iff p (1 - hr) > loss = 0.05 (d = 1)
    frame = two_way(hand_model(), "p", "hr", grid=5)
    assert len(frame) == 25
    expected = np.where(frame["x_value"] * (1 - frame["y_value"]) > 0.05, "treat", "wait")
    assert (frame["action_at_start"].to_numpy() == expected).all()
    assert frame["structure"].map(lambda s: isinstance(s, str) and len(s) > 0).all()


def test_two_way_needs_two_parameters():
    with pytest.raises(
        ModelError, match=r"sensitivity\.two_way.*two different parameters, got 'p'"
    ):
        two_way(hand_model(), "p", "p")


def test_grid_of_fewer_than_two_values_is_refused():
    with pytest.raises(ModelError, match=r"sensitivity\.grid.*grid = 1 is not allowed"):
        parameter_thresholds(hand_model(), grid=1)
    with pytest.raises(ModelError, match=r"sensitivity\.two_way\.grid.*grid = 0"):
        two_way(hand_model(), "p", "hr", grid=0)


def test_threshold_progress_counts_brackets_up_to_the_total():
    calls: list[tuple[int, int]] = []
    table = parameter_thresholds(group_model(), grid=9, progress=lambda d, n: calls.append((d, n)))
    n_switches = int((table["status"] == "switch").sum())
    assert calls[0] == (0, n_switches) and calls[-1] == (n_switches, n_switches)
    done = [d for d, _ in calls]
    assert done == sorted(done)


def test_fixed_parameter_without_range_reports_no_range():
    model = hand_model()
    parameters = dict(model.parameters)
    parameters["fixed"] = Parameter("fixed", 2.0, SYNTHETIC)  # no low/high, no distribution
    model = replace(model, parameters=parameters)
    ranges = parameter_ranges(model, ["fixed"])
    assert ranges.at[0, "range_from"] == "fixed (no range)" and not ranges.at[0, "varies"]
    table = parameter_thresholds(model, ["fixed", "p"], grid=5).set_index("parameter")
    assert table.at["fixed", "status"] == "no range (low = high)"
    assert table.at["p", "status"] == "switch"
    row = one_way(model, ["fixed"]).table.iloc[0]
    assert row["swing"] == 0.0 and row["policy_changes"] == "none"


@given(
    st.floats(0.05, 0.3),  # loss
    st.floats(0.1, 0.8),  # hr
)
@settings(max_examples=15, deadline=None)
def test_threshold_in_p_follows_the_closed_form(loss, hr):
    # gap = loss - p (1 - hr) (hand_model's docstring) -> p* = loss / (1 - hr)
    model = hand_model()
    parameters = dict(model.parameters)
    parameters["loss"] = replace(parameters["loss"], value=loss)
    parameters["hr"] = replace(parameters["hr"], value=hr)
    parameters["p"] = replace(parameters["p"], low=0.0, high=1.0)
    model = replace(model, parameters=parameters)
    table = parameter_thresholds(model, ["p"], grid=4)
    expected = loss / (1 - hr)
    if expected < 1.0:
        assert list(table["status"]) == ["switch"]
        assert table.at[0, "threshold"] == pytest.approx(expected, abs=1e-8)
    else:
        assert list(table["status"]) == [NO_SWITCH]


def test_one_way_on_the_demo_equals_solving_each_end_alone():
    from caredecide.modelfile import load_model
    from synthetic_cohort import demo_model_path

    model = load_model(demo_model_path())
    table = one_way(model).table
    for row in table.itertuples():
        for end in ("low", "high"):
            compiled, alone = _solve_sets(model, {row.parameter: np.array([getattr(row, end)])})
            expected = alone.value[0, 0] @ compiled.start_distribution
            assert getattr(row, f"value_{end}") == pytest.approx(expected, rel=1e-12)


def test_model_without_parameters_is_refused_with_a_clear_message():
    from pathlib import Path

    from caredecide.modelfile import load_model
    from caredecide.sensitivity import one_way

    path = Path(__file__).parent / "data" / "no_parameters.toml"
    with pytest.raises(
        ModelError,
        match=r"no_parameters.toml: parameters: the model has no "
        r"parameters to vary",
    ):
        one_way(load_model(path))


def test_setting_threshold_copies_are_solved_in_chunks_within_the_budget(monkeypatch):
    # The search solves its willingness-to-pay values as copies of the base case: within a
    # budget of three copies (their arrays, twice while solved) it solves three at a time,
    # and finds the same thresholds as in one batch (chunks never change a figure, common
    # practice for batched work); a budget below one copy is refused by name (a 687-state
    # model once asked for 23.4 GiB and stopped with a MemoryError traceback).
    import caredecide.chunks as chunks
    import caredecide.solvers as solvers
    from caredecide.compile import compile_model
    from caredecide.errors import ModelTooLargeError
    from caredecide.modelfile import load_model
    from caredecide.sensitivity import thresholds
    from synthetic_cohort import demo_model_path

    model = load_model(demo_model_path())
    whole = thresholds.setting_thresholds(model, "willingness_to_pay", 0.0, 100_000.0)
    one = compile_model(model)
    arrays = (one.transition, one.state_qaly, one.state_cost, one.decision_qaly)
    arrays += (one.decision_cost, one.move, one.state_action_qaly, one.state_action_cost)
    copy = thresholds.COPY_WORKING_FACTOR * sum(a.nbytes for a in arrays if a is not None)
    sizes: list[int] = []
    original = solvers.solve

    def counted(batch, objective, **options):
        sizes.append(batch.n_draws)
        return original(batch, objective, **options)

    monkeypatch.setattr(solvers, "solve", counted)
    monkeypatch.setattr(chunks, "memory_budget", lambda limit=None: 3 * copy + 1)
    chunked = thresholds.setting_thresholds(model, "willingness_to_pay", 0.0, 100_000.0)
    assert sizes and max(sizes) == 3 and len(sizes) > 2
    pd.testing.assert_frame_equal(chunked, whole)
    monkeypatch.setattr(chunks, "memory_budget", lambda limit=None: 10_000)
    with pytest.raises(ModelTooLargeError) as info:
        thresholds.setting_thresholds(model, "willingness_to_pay", 0.0, 100_000.0)
    message = str(info.value)
    assert demo_model_path().name in message
    assert "the threshold search over willingness_to_pay solves copies" in message
    assert f"one copy alone needs an estimated {copy / 2**20:.1f} MiB ({copy:,} bytes)" in message
    assert "the budget is 0.0 MiB (10,000 bytes)" in message
