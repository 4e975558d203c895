"""Fixed strategies: built-in families, user tables (errors name file, row and value),
evaluation through the same evaluate_policy as the optimal policy."""

from __future__ import annotations

import re

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.errors import ModelError
from caredecide.evaluate import evaluate_policy
from caredecide.incremental import incremental_analysis
from caredecide.objective import Objective
from caredecide.solvers import solve
from caredecide.strategies import (
    MAX_TABLE_BYTES,
    at_once,
    computed,
    default_strategies,
    evaluate_policies,
    from_age,
    from_state,
    never,
    read_strategy_table,
    resolve_strategy,
    sibling_table,
    strategy_totals,
)
from synthetic_cohort import demo_model_path
from tests.test_solvers_models import make_compiled

WAIT, TREAT = 0, 1


def staged_model(n_cycles: int | None = 4, start_age: float = 60.0):
    """mild, moderate, severe (ordered), on_treatment (wait only), dead (absorbing).

    Treatment is allowed in the three untreated stages only. Numbers are arbitrary:
    these tests check which action each strategy takes, not values.
    """
    S = 5
    P = np.zeros((2, S, S))
    P[WAIT, 0, [0, 1, 4]] = [0.8, 0.15, 0.05]
    P[WAIT, 1, [1, 2, 4]] = [0.7, 0.2, 0.1]
    P[WAIT, 2, [2, 4]] = [0.7, 0.3]
    P[WAIT, 3, [3, 4]] = [0.9, 0.1]
    P[TREAT, :3, 3] = 0.95
    P[TREAT, :3, 4] = 0.05
    P[:, 4, 4] = 1.0
    P[TREAT, 3:] = P[WAIT, 3:]
    allowed = np.ones((S, 2), bool)
    allowed[3:, TREAT] = False
    return make_compiled(
        P,
        state_qaly=[0.9, 0.7, 0.5, 0.8, 0.0],
        state_cost=[100, 300, 900, 1500, 0],
        decision_cost=np.array([[0, 500]] * 3 + [[0, 0]] * 2),
        allowed=allowed,
        n_cycles=n_cycles,
        start_age=start_age,
        state_ids=("mild", "moderate", "severe", "on_treatment", "dead"),
        action_ids=("wait", "treat"),
        ordered_states=("mild", "moderate", "severe"),
        start_distribution=[0.6, 0.3, 0.1, 0.0, 0.0],
        discount_outcomes=0.03,
        discount_costs=0.03,
        within_cycle="trapezoid",
    )


# --- built-in families ------------------------------------------------------------------


def test_never_takes_the_alternative_everywhere():
    resolved = resolve_strategy(staged_model(), never("treat"))
    assert (resolved.policy == WAIT).all()
    assert resolved.policy.shape == (4, 5)
    assert resolved.notes == ()


def test_at_once_treats_where_allowed_and_says_where_it_falls_back():
    resolved = resolve_strategy(staged_model(), at_once("treat"))
    np.testing.assert_array_equal(resolved.policy, [[1, 1, 1, 0, 0]] * 4)
    # The fallback is said, for the live state only (dead is absorbing: no decision).
    assert len(resolved.notes) == 1
    assert "'treat' is not allowed in on_treatment" in resolved.notes[0]
    assert "dead" not in resolved.notes[0]


def test_from_state_follows_the_severity_order():
    resolved = resolve_strategy(staged_model(), from_state("treat", "moderate"))
    np.testing.assert_array_equal(resolved.policy, [[0, 1, 1, 0, 0]] * 4)
    assert resolved.strategy.name == "treat from moderate"


def test_from_age_treats_from_the_cycle_starting_at_that_age():
    # Cycles start at ages 60, 61, 62, 63: from age 62 means cycles 2 and 3.
    resolved = resolve_strategy(staged_model(), from_age("treat", 62))
    np.testing.assert_array_equal(resolved.policy[:, :3], [[0] * 3, [0] * 3, [1] * 3, [1] * 3])
    assert (resolved.policy[:, 3:] == WAIT).all()
    assert "on_treatment (ages 62-63)" in resolved.notes[0]


def test_otherwise_not_allowed_is_reported():
    # 'treat' as the alternative of 'never wait' is not allowed in on_treatment and dead;
    # on_treatment falls back to wait (reported), dead is absorbing (no note).
    resolved = resolve_strategy(staged_model(), never("wait", otherwise="treat"))
    np.testing.assert_array_equal(resolved.policy[0], [1, 1, 1, 0, 0])
    assert any("only allowed action in on_treatment" in n for n in resolved.notes)


def test_default_strategies_drop_duplicates():
    names = [s.name for s in default_strategies(staged_model())]
    # treat from mild would equal treat at once: dropped.
    assert names == ["never treat", "treat at once", "treat from moderate", "treat from severe"]


def test_default_strategies_with_one_action():
    compiled = make_compiled(
        np.array([[[0.9, 0.1], [0.0, 1.0]]]), n_cycles=3, action_ids=("monitor",)
    )
    assert [s.name for s in default_strategies(compiled)] == ["monitor at once"]


@pytest.mark.parametrize(
    ("strategy", "pattern"),
    [
        (at_once("operate"), r"strategies\.operate at once\.action: unknown action 'operate'"),
        (never("treat", otherwise="rest"), r"\.otherwise: unknown action 'rest'"),
        (from_state("treat", "on_treatment"), r"state 'on_treatment' is not in the severity"),
    ],
)
def test_family_errors_name_the_place_and_value(strategy, pattern):
    with pytest.raises(ModelError, match=pattern):
        resolve_strategy(staged_model(), strategy)


def test_from_age_needs_a_finite_horizon():
    compiled = staged_model(n_cycles=None)
    with pytest.raises(ModelError, match=r"age 70 given, but the model has an infinite horizon"):
        resolve_strategy(compiled, from_age("treat", 70))


def test_computed_policy_shape_is_checked():
    with pytest.raises(
        ModelError,
        match=r"policy has shape \(3, 5\).*expected integer action "
        r"indices of shape \(cycles, states\) = \(4, 5\)",
    ):
        resolve_strategy(staged_model(), computed("mine", np.zeros((3, 5), int)))


# --- totals by hand ---------------------------------------------------------------------


def two_state(within_cycle: str = "start"):
    """alive/dead, 2 cycles: death 0.5 per cycle when waiting, 0.25 when treated; treatment
    costs 100 per treated person per cycle; 1 QALY per cycle alive; no discounting."""
    P = np.zeros((2, 2, 2))
    P[0, 0] = [0.5, 0.5]
    P[1, 0] = [0.75, 0.25]
    P[:, 1, 1] = 1.0
    return make_compiled(
        P,
        state_qaly=[1.0, 0.0],
        decision_cost=[[0.0, 100.0], [0.0, 0.0]],
        allowed=[[True, True], [True, True]],
        n_cycles=2,
        within_cycle=within_cycle,
        state_ids=("alive", "dead"),
        action_ids=("wait", "treat"),
    )


def test_totals_by_hand_and_the_optimal_policy_beats_both_fixed_strategies():
    # Start-of-cycle weights (1, 1, 0) (Elbasha & Chhatwal 2016: left Riemann sum).
    # never treat: QALYs = 1 + 0.5 = 1.5, cost 0.
    # treat at once: QALYs = 1 + 0.75 = 1.75, cost = 100 x 1 + 100 x 0.75 = 175.
    # At WTP 1000 the optimal policy treats in cycle 0 only (treating in the last cycle
    # buys no QALY: boundary 2 has weight 0): QALYs 1.75, cost 100.
    compiled = two_state()
    objective = Objective("net_benefit", 1000.0)
    optimal = solve(compiled, objective)
    resolved = [resolve_strategy(compiled, s) for s in (never("treat"), at_once("treat"))]
    resolved.append(resolve_strategy(compiled, computed("optimal", optimal.policy[0])))
    frame, _, _ = strategy_totals(compiled, resolved, objective)
    np.testing.assert_allclose(frame["qalys"], [1.5, 1.75, 1.75], rtol=1e-15)
    np.testing.assert_allclose(frame["cost"], [0.0, 175.0, 100.0], rtol=1e-15)
    np.testing.assert_allclose(frame["life_years"], [1.5, 1.75, 1.75], rtol=1e-15)
    # Cantor 1994: treat at once is dominated by the optimal policy (same QALYs, costs more);
    # ICER of the optimal policy against never treat = 100 / 0.25 = 400 per QALY.
    table = incremental_analysis(frame, willingness_to_pay=1000.0)
    by_name = table.set_index("strategy")
    assert by_name.loc["treat at once", "status"] == "dominated by optimal"
    assert by_name.loc["optimal", "icer"] == pytest.approx(400.0, rel=1e-12)
    assert table.attrs["best_strategy"] == "optimal"


def test_one_action_model_reproduces_the_fixed_strategy_exactly():
    # With one action there is one policy: the optimal policy *is* the fixed strategy, and
    # the same evaluation code must give the same totals to the last bit.
    rng = np.random.default_rng(7)
    P = rng.random((1, 4, 4))
    P[:, 3] = [0, 0, 0, 1]
    P /= P.sum(-1, keepdims=True)
    compiled = make_compiled(
        P,
        state_qaly=rng.random(4),
        state_cost=rng.random(4) * 1000,
        decision_cost=rng.random((4, 1)) * 50,
        n_cycles=12,
        discount_outcomes=0.035,
        discount_costs=0.05,
        within_cycle="simpson",
        action_ids=("monitor",),
    )
    objective = Objective("net_benefit", 25000.0)
    optimal = solve(compiled, objective)
    fixed = resolve_strategy(compiled, at_once("monitor"))
    by_solver = evaluate_policy(compiled, optimal.policy, objective)
    by_strategy = evaluate_policy(compiled, fixed.policy[None], objective)
    for name in ("costs", "qalys", "life_years", "net_monetary_benefit"):
        assert getattr(by_solver, name)[0] == getattr(by_strategy, name)[0]
    # And the optimal value is that same number (the solver's recursion agrees).
    assert optimal.expected_value(compiled.start_distribution)[0] == pytest.approx(
        by_strategy.value[0], rel=1e-12
    )


def test_identical_policies_get_identical_totals_in_first_appearance_order():
    compiled = staged_model()
    policies = np.stack(
        [np.zeros((4, 5), int), np.ones((4, 5), int) * [1, 1, 1, 0, 0], np.zeros((4, 5), int)]
    )
    outcome, index = evaluate_policies(compiled, policies, Objective("net_benefit", 1.0))
    np.testing.assert_array_equal(index, [0, 1, 0])
    assert outcome.costs.shape == (2,)


# --- property: the optimal policy beats every fixed strategy ------------------------------


@settings(max_examples=30, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(3, 6),
    n_cycles=st.integers(1, 6),
    wtp=st.floats(0.0, 1e5),
)
def test_optimal_nmb_is_at_least_every_fixed_strategy(seed, n_states, n_cycles, wtp):
    # Optimality of backward induction (Puterman 1994, Theorem 4.5.1): the optimal value
    # is >= the value of every policy, hence for the cohort's start distribution too.
    rng = np.random.default_rng(seed)
    A = 3
    P = rng.random((n_cycles, A, n_states, n_states)) ** 2
    P[:, :, -1] = np.eye(n_states)[-1]  # last state absorbing
    P /= P.sum(-1, keepdims=True)
    allowed = rng.random((n_states, A)) < 0.7
    allowed[:, 0] |= ~allowed.any(axis=1)
    allowed[-1] = True
    start = rng.dirichlet(np.ones(n_states - 1))
    compiled = make_compiled(
        P,
        state_qaly=rng.uniform(0, 1, (n_cycles + 1, n_states)),
        state_cost=rng.uniform(0, 1000, (n_cycles + 1, n_states)),
        decision_cost=rng.uniform(0, 500, (n_cycles, n_states, A)),
        decision_qaly=rng.uniform(-0.05, 0.05, (n_cycles, n_states, A)),
        allowed=allowed,
        n_cycles=n_cycles,
        start_distribution=np.append(start, 0.0),
        discount_outcomes=0.03,
        discount_costs=0.05,
        within_cycle="trapezoid",
        start_age=50.0,
        ordered_states=tuple(f"s{i}" for i in range(n_states - 1)),
        absorbing=np.arange(n_states) == n_states - 1,
    )
    fixed = [*default_strategies(compiled), from_age("a1", 50 + n_cycles // 2)]
    _assert_optimal_beats(compiled, fixed, rng.integers(0, A, (4, n_cycles, n_states)), wtp)


def _assert_optimal_beats(compiled, fixed, random_actions: np.ndarray, wtp: float) -> None:
    """The solver's policy has the highest NMB among itself, ``fixed`` and random policies.

    ``random_actions`` (K, Tpi, S): an action not allowed in a state becomes the first
    allowed one.
    """
    objective = Objective("net_benefit", wtp)
    optimal = solve(compiled, objective)
    allowed, S = compiled.allowed, compiled.n_states
    resolved = [resolve_strategy(compiled, s) for s in fixed]
    random_policies = [
        np.where(allowed[np.arange(S)[None, :], p], p, allowed.argmax(1)) for p in random_actions
    ]
    resolved += [
        resolve_strategy(compiled, computed(f"random {i}", p))
        for i, p in enumerate(random_policies)
    ]
    resolved.append(resolve_strategy(compiled, computed("optimal", optimal.policy[0])))
    frame, _, _ = strategy_totals(compiled, resolved, objective)
    nmb = wtp * frame["qalys"].to_numpy() - frame["cost"].to_numpy()
    tolerance = 1e-9 * (1.0 + np.abs(nmb).max())
    assert nmb[-1] >= nmb.max() - tolerance


# --- user strategy tables -----------------------------------------------------------------


def write(tmp_path, text: str, name: str = "plan.strategies.csv"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_table_covers_cells_and_reports_fallbacks(tmp_path):
    path = write(
        tmp_path,
        "strategy,state,age_from,age_to,action\n"
        "early,moderate,,62,treat\n"
        "early,severe,,,treat\n"
        "early,on_treatment,,,treat\n",
    )
    (strategy,) = read_strategy_table(path)
    resolved = resolve_strategy(staged_model(), strategy)
    np.testing.assert_array_equal(resolved.policy, [[0, 1, 1, 0, 0]] * 2 + [[0, 0, 1, 0, 0]] * 2)
    notes = " | ".join(resolved.notes)
    assert "'treat' is not allowed in on_treatment: the first allowed action" in notes
    assert "no row covers mild, moderate (ages 62-63)" in notes


def test_table_all_states_and_default_name(tmp_path):
    path = write(tmp_path, "state,action,age_from\nall,treat,61\n", name="late.strategies.csv")
    (strategy,) = read_strategy_table(path)
    assert strategy.name == "late"
    resolved = resolve_strategy(staged_model(), strategy)
    np.testing.assert_array_equal(resolved.policy[1:, :3], 1)
    np.testing.assert_array_equal(resolved.policy[0], 0)


def test_several_strategies_in_one_table_keep_their_order(tmp_path):
    path = write(tmp_path, "strategy,state,action\nB,mild,treat\nA,severe,treat\nB,severe,wait\n")
    assert [s.name for s in read_strategy_table(path)] == ["B", "A"]


def test_sibling_table_is_found_beside_the_demo_model():
    assert sibling_table(demo_model_path()) == demo_model_path().with_name(
        "demo_progressive.strategies.csv"
    )
    assert sibling_table(None) is None


def _error(path_or_call, compiled=None) -> str:
    with pytest.raises(ModelError) as caught:
        strategies = read_strategy_table(path_or_call)
        for strategy in strategies:
            resolve_strategy(compiled or staged_model(), strategy)
    return str(caught.value)


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        # unknown state: file, line, row, column and value
        (
            "state,action\nmild,wait\nsevre,treat\n",
            r"plan\.strategies\.csv, line 3: row 2\.state: unknown state 'sevre'",
        ),
        # unknown action
        (
            "state,action\nmild,operate\n",
            r"plan\.strategies\.csv, line 2: row 1\.action: unknown action 'operate'",
        ),
        # age that is not a number
        (
            "state,action,age_from\nmild,treat,sixty\n",
            r"line 2: row 1\.age_from: value 'sixty' is not an age",
        ),
        # negative age
        ("state,action,age_to\nmild,treat,-3\n", r"row 1\.age_to: value '-3' is not an age"),
        # empty age interval
        (
            "state,action,age_from,age_to\nmild,treat,70,65\n",
            r"row 1\.age_to: age_to 65 is not above age_from 70",
        ),
        # blank state
        ("state,action\n,treat\n", r"row 1\.state: blank state"),
        # blank action
        ("state,action\nmild,\n", r"row 1\.action: blank action"),
        # blank strategy name
        ("strategy,state,action\n,mild,treat\n", r"row 1\.strategy: blank strategy"),
        # missing column
        ("state,age_from\nmild,60\n", r"line 1: header: missing column\(s\) \['action'\]"),
        # unknown column (a typo is not silently ignored)
        ("state,action,age_form\nmild,treat,60\n", r"header: unknown column\(s\) \['age_form'\]"),
        # too many cells
        ("state,action\nmild,treat,extra\n", r"row 1: 3 cells; expected at most 2"),
        # header only
        ("state,action\n", r"has a header but no rows"),
        # empty file
        ("\n", r"the table is empty"),
        # two rows give one cell different actions
        (
            "state,age_from,action\nmoderate,,treat\nmoderate,62,wait\n",
            r"rows 1, 2: strategy 'plan': these rows give state 'moderate' at age 62 different "
            r"actions \('wait', 'treat'\)",
        ),
    ],
)
def test_table_errors_name_file_row_and_value(tmp_path, text, expected):
    assert re.search(expected, _error(write(tmp_path, text))), _error(write(tmp_path, text))


def test_table_ages_in_an_infinite_horizon_model(tmp_path):
    path = write(tmp_path, "state,action,age_from\nmild,treat,60\n")
    message = _error(path, staged_model(n_cycles=None))
    assert (
        "line 2: row 1.age_from: ages (60.0, None) given, but the model has an infinite" in message
    )


def test_table_missing_file(tmp_path):
    assert re.search(r"nowhere\.csv: file not found", _error(tmp_path / "nowhere.csv"))


def test_table_too_large(tmp_path):
    path = write(tmp_path, "state,action\n" + "mild,treat\n" * (MAX_TABLE_BYTES // 10))
    assert re.search(
        r"plan\.strategies\.csv: the file is larger than the limit of 1,000,000 bytes", _error(path)
    )


def test_table_not_utf8(tmp_path):
    path = tmp_path / "bad.csv"
    path.write_bytes(b"state,action\n\xff\xfe,treat\n")
    assert re.search(r"bad\.csv: byte 13 is not UTF-8 text", _error(path))


def test_table_reports_every_problem_at_once(tmp_path):
    path = write(tmp_path, "state,action\nsevre,treat\nmild,operate\n")
    message = _error(path)
    assert "row 1.state" in message and "row 2.action" in message


@settings(max_examples=30, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(3, 6),
    wtp=st.floats(0.0, 1e5),
    rate=st.floats(0.01, 0.2),
)
def test_optimal_nmb_is_at_least_every_fixed_strategy_infinite_horizon(seed, n_states, wtp, rate):
    # Policy iteration gives a policy optimal in every state of a discounted infinite-horizon
    # MDP (Puterman 1994, section 6.4, from memory), so no stationary fixed strategy has a
    # higher expected NMB from the cohort's start distribution.
    rng = np.random.default_rng(seed)
    A = 3
    P = rng.random((A, n_states, n_states)) ** 2
    P[:, -1] = np.eye(n_states)[-1]  # last state absorbing
    P /= P.sum(-1, keepdims=True)
    allowed = rng.random((n_states, A)) < 0.7
    allowed[:, 0] |= ~allowed.any(axis=1)
    allowed[-1] = True
    compiled = make_compiled(
        P,
        state_qaly=rng.uniform(0, 1, n_states) * (np.arange(n_states) < n_states - 1),
        state_cost=rng.uniform(0, 1000, n_states) * (np.arange(n_states) < n_states - 1),
        decision_cost=rng.uniform(0, 500, (n_states, A)),
        decision_qaly=rng.uniform(-0.05, 0.05, (n_states, A)),
        allowed=allowed,
        n_cycles=None,
        start_distribution=np.append(rng.dirichlet(np.ones(n_states - 1)), 0.0),
        discount_outcomes=rate,
        discount_costs=rate,
        ordered_states=tuple(f"s{i}" for i in range(n_states - 1)),
        absorbing=np.arange(n_states) == n_states - 1,
    )
    _assert_optimal_beats(
        compiled, default_strategies(compiled), rng.integers(0, A, (6, 1, n_states)), wtp
    )
