"""Policy evaluation: trace, totals, and agreement with the solver and a direct solve."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.evaluate import evaluate_policy
from caredecide.objective import Objective
from caredecide.solvers import SolverError, solve
from tests.test_solvers_models import make_compiled, random_mdp

QALYS = Objective("qalys")


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(2, 8),
    n_actions=st.integers(1, 3),
    rate=st.sampled_from([0.01, 0.035, 0.2]),
)
def test_stationary_evaluation_equals_direct_linear_solve(seed, n_states, n_actions, rate):
    # Reference: scipy.linalg.solve of (I - gamma P_pi) v = r_pi (Puterman 1994, Theorem
    # 6.1.1: the value of a stationary policy solves this system).
    rng = np.random.default_rng(seed)
    P, u, g = random_mdp(rng, n_states, n_actions, 1)
    start = rng.dirichlet(np.ones(n_states))
    compiled = make_compiled(
        P[:, None],
        state_qaly=u[:, None],
        decision_qaly=g[:, None],
        discount_outcomes=rate,
        start_distribution=start,
    )
    policy = rng.integers(0, n_actions, n_states)
    gamma = 1 / (1 + rate)
    P_pi = P[0][policy, np.arange(n_states)]
    r_pi = u[0] + g[0][np.arange(n_states), policy]
    v = scipy.linalg.solve(np.eye(n_states) - gamma * P_pi, r_pi)
    outcome = evaluate_policy(compiled, policy[None, None], QALYS)
    assert outcome.value[0] == pytest.approx(start @ v, rel=1e-10, abs=1e-12)
    assert outcome.qalys[0] == pytest.approx(start @ v, rel=1e-10, abs=1e-12)


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(2, 6),
    n_cycles=st.integers(1, 7),
    within=st.sampled_from(["start", "end", "trapezoid", "simpson", "half_cycle"]),
    rates=st.sampled_from([(0.0, 0.0), (0.03, 0.03), (0.015, 0.04)]),
    moves=st.booleans(),
)
def test_optimal_policy_outcome_equals_solver_value(seed, n_states, n_cycles, within, rates, moves):
    # The same rewards and weights as the recursion: outcome.value = result.value[:, 0] @ start,
    # with or without decision-time moves and state-action occupancy rewards.
    rng = np.random.default_rng(seed)
    D, A = 3, 2
    P = rng.random((D, n_cycles, A, n_states, n_states))
    P /= P.sum(-1, keepdims=True)
    move = None
    if moves:
        move = rng.random((D, 1, A, n_states, n_states)) ** 4
        move /= move.sum(-1, keepdims=True)
        P = move @ P  # the compiled transition holds the move and the cycle's rows together
    compiled = make_compiled(
        P,
        move=move,
        state_action_qaly=rng.uniform(-0.1, 0.1, (D, n_cycles, n_states, A)) if moves else None,
        state_action_cost=rng.uniform(0, 300, (D, 1, n_states, A)) if moves else None,
        state_qaly=rng.uniform(0, 1, (D, n_cycles, n_states)),
        state_cost=rng.uniform(0, 1000, (D, 1, n_states)),
        decision_qaly=rng.uniform(-0.1, 0.1, (D, n_cycles, n_states, A)),
        decision_cost=rng.uniform(0, 500, (D, 1, n_states, A)),
        n_cycles=n_cycles,
        within_cycle=within,
        discount_outcomes=rates[0],
        discount_costs=rates[1],
        start_distribution=rng.dirichlet(np.ones(n_states)),
    )
    objective = Objective("net_benefit", 20_000.0)
    terminal = rng.uniform(0, 100, n_states) if rates[0] == rates[1] else None
    result = solve(compiled, objective, terminal_value=terminal)
    outcome = evaluate_policy(compiled, result.policy, objective, terminal_value=terminal)
    expected = result.value[:, 0] @ compiled.start_distribution
    np.testing.assert_allclose(outcome.value, expected, rtol=1e-11, atol=1e-8)
    np.testing.assert_allclose(outcome.trace.sum(-1), 1.0, rtol=1e-12)
    if terminal is None:
        np.testing.assert_allclose(outcome.net_monetary_benefit, expected, rtol=1e-11, atol=1e-8)


def test_stationary_optimal_policy_outcome_equals_policy_iteration_value():
    rng = np.random.default_rng(11)
    P, u, g = random_mdp(rng, 6, 3, 1, n_draws=4)
    compiled = make_compiled(
        P[:, None],
        state_qaly=u[:, None],
        decision_qaly=g[:, None],
        discount_outcomes=0.04,
        within_cycle="trapezoid",
        start_distribution=np.full(6, 1 / 6),
    )
    result = solve(compiled, QALYS)
    outcome = evaluate_policy(compiled, result.policy, QALYS)
    np.testing.assert_allclose(
        outcome.value, result.value[:, 0] @ compiled.start_distribution, rtol=1e-10
    )


def _one_state(n_cycles, within, discount=0.0):
    p = 1 - np.exp(-0.1)
    return make_compiled(
        np.array([[[1 - p, p], [0.0, 1.0]]]),
        state_qaly=[1.0, 0.0],
        n_cycles=n_cycles,
        within_cycle=within,
        absorbing=[False, True],
        discount_outcomes=discount,
        discount_costs=discount,
    )


@pytest.mark.parametrize(
    ("within", "ten_cycles", "lifetime"),
    [
        ("start", 6.6425327, 10.508332),
        ("end", 6.0104121, 9.508332),
        ("trapezoid", 6.3264724, 10.008332),
    ],
)
def test_life_expectancy_within_cycle_table(within, ten_cycles, lifetime):
    # Source: Elbasha & Chhatwal 2016, Med Decis Making 36(1):115-131 (within-cycle formulas;
    # values are geometric sums worked from them, e.g. start-of-cycle, 10 cycles:
    # (1 - e^-1) / (1 - e^-0.1) = 6.6425327): one alive state, mu = 0.1/yr, 1-year cycles.
    # life_years = 1 per cycle alive.
    finite = evaluate_policy(_one_state(10, within), 0, QALYS)
    assert finite.life_years[0] == pytest.approx(ten_cycles, abs=5e-7)
    assert finite.qalys_undiscounted[0] == pytest.approx(ten_cycles, abs=5e-7)
    # Infinite horizon, undiscounted: transient linear solve (lifetime row of the table).
    infinite = evaluate_policy(_one_state(None, within), 0, QALYS)
    assert infinite.life_years_undiscounted[0] == pytest.approx(lifetime, abs=5e-7)
    assert infinite.life_years[0] == pytest.approx(lifetime, abs=5e-7)  # rate 0
    # Display trace runs until 99.9% are dead: survival e^-0.1t < 0.001 -> t = 70.
    assert infinite.trace.shape[1] == 71
    assert infinite.trace[0, -1, 0] < 1e-3 <= infinite.trace[0, -2, 0]


def test_simpson_life_expectancy_ten_cycles():
    # Source: Elbasha & Chhatwal 2016, Med Decis Making 36(1):115-131: Simpson 1/3 rule over
    # 10 one-year cycles of e^(-0.1 t) -> 6.3212091 (worked from their formula).
    outcome = evaluate_policy(_one_state(10, "simpson"), 0, QALYS)
    assert outcome.life_years[0] == pytest.approx(6.3212091, abs=5e-7)


def test_costs_and_net_benefit_by_hand():
    # Hand-computed: one state kept for 2 cycles, start-of-cycle sums, q = 0.8, c = 100,
    # one-off cost 50 of "treat" at each decision, costs at 100% (d_c = 0.5), outcomes 0%.
    #   QALYs = 0.8 + 0.8 = 1.6; costs = (100 + 50) + 0.5 (100 + 50) = 225
    #   NMB at 1000/QALY = 1600 - 225 = 1375
    compiled = make_compiled(
        np.ones((2, 1, 1)),
        state_qaly=[0.8],
        state_cost=[100.0],
        decision_cost=[[0.0, 50.0]],
        n_cycles=2,
        discount_costs=1.0,
        absorbing=[False],
    )
    outcome = evaluate_policy(compiled, 1, Objective("net_benefit", 1000.0))
    assert outcome.qalys[0] == pytest.approx(1.6)
    assert outcome.costs[0] == pytest.approx(225.0)
    assert outcome.costs_undiscounted[0] == pytest.approx(300.0)
    assert outcome.net_monetary_benefit[0] == pytest.approx(1375.0)
    np.testing.assert_allclose(outcome.flows["costs"][0], [150.0, 75.0, 0.0])


@pytest.mark.parametrize("form", ["dense", "sparse"])  # both chains
def test_undiscounted_total_is_infinite_when_an_absorbing_state_keeps_earning(form):
    compiled = make_compiled(
        np.array([[[0.5, 0.5], [0.0, 1.0]]]), state_qaly=[1.0, 1.0], absorbing=[False, True]
    )
    outcome = evaluate_policy(compiled, 0, QALYS, transition_form=form)
    assert outcome.qalys_undiscounted[0] == np.inf


# Infinite horizon, undiscounted (issue 14 item 4). Expected cycles in a transient state
# left with probability p per cycle: 1 / p (the fundamental matrix (I - Q)^-1; Kemeny &
# Snell 1960, Finite Markov Chains, ch. 3, from memory). A reached closed class that keeps
# earning adds +inf or -inf by the sign of its reward; all-zero rewards add nothing.
LEAVE_HALF = np.array([[[0.5, 0.5], [0.0, 1.0]]])


@pytest.mark.parametrize(
    ("dead_cost", "expected"), [(0.0, 2.0 * 10.0), (3.0, np.inf), (-3.0, -np.inf)]
)
@pytest.mark.parametrize("form", ["dense", "sparse"])  # both chains
def test_undiscounted_infinite_total_is_signed(dead_cost, expected, form):
    compiled = make_compiled(LEAVE_HALF, state_cost=[10.0, dead_cost], absorbing=[False, True])
    assert (
        evaluate_policy(compiled, 0, QALYS, transition_form=form).costs_undiscounted[0] == expected
    )


@pytest.mark.parametrize("form", ["dense", "sparse"])  # both chains
def test_undiscounted_total_of_a_cohort_never_absorbed(form):
    # Two states swapping forever, no absorbing state: zero costs total 0 (formerly +inf),
    # QALYs of 1 per cycle total +inf, QALYs of -1 per cycle total -inf.
    swap = np.array([[[0.0, 1.0], [1.0, 0.0]]])
    zero = make_compiled(swap, state_qaly=[1.0, 1.0], absorbing=[False, False])
    outcome = evaluate_policy(zero, 0, QALYS, transition_form=form)
    assert outcome.costs_undiscounted[0] == 0.0
    assert outcome.qalys_undiscounted[0] == np.inf
    losing = make_compiled(swap, state_qaly=[-1.0, -1.0], absorbing=[False, False])
    assert evaluate_policy(losing, 0, QALYS, transition_form=form).qalys_undiscounted[0] == -np.inf


@pytest.mark.parametrize("form", ["dense", "sparse"])  # both chains
def test_undiscounted_total_without_a_sum_is_nan(form):
    # Opposite signs in two reached absorbing states, or +1/-1 alternating: no total.
    split = np.array([[[0.0, 0.5, 0.5], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]])
    compiled = make_compiled(split, state_cost=[0.0, 1.0, -1.0], absorbing=[False, True, True])
    assert np.isnan(evaluate_policy(compiled, 0, QALYS, transition_form=form).costs_undiscounted[0])
    swap = np.array([[[0.0, 1.0], [1.0, 0.0]]])
    alternating = make_compiled(swap, state_qaly=[1.0, -1.0], absorbing=[False, False])
    assert np.isnan(
        evaluate_policy(alternating, 0, QALYS, transition_form=form).qalys_undiscounted[0]
    )


@pytest.mark.parametrize("form", ["dense", "sparse"])  # both chains
def test_unreached_earning_state_adds_nothing(form):
    # State 2 earns but is never reached from the start: the total stays finite (2 * 10).
    P = np.array([[[0.5, 0.5, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]])
    compiled = make_compiled(P, state_cost=[10.0, 0.0, 5.0], absorbing=[False, True, True])
    assert evaluate_policy(compiled, 0, QALYS, transition_form=form).costs_undiscounted[
        0
    ] == pytest.approx(20.0)


def test_frames():
    outcome = evaluate_policy(_one_state(3, "start"), 0, QALYS)
    trace = outcome.trace_frame()
    assert list(trace.columns) == ["cycle", "age", "state", "proportion"]
    assert trace.shape[0] == 4 * 2
    assert trace.groupby("cycle").proportion.sum().round(12).eq(1.0).all()
    totals = outcome.totals_frame()
    assert {"life_years", "qalys_undiscounted", "net_monetary_benefit", "value"} <= set(totals)
    flows = outcome.flow_frame()
    assert flows.qalys.sum() == pytest.approx(outcome.qalys[0])
    assert outcome.totals()["life_years"] == pytest.approx(outcome.life_years[0])


def test_policy_errors():
    compiled = make_compiled(
        np.array([[[1.0, 0], [0, 1]]] * 2), allowed=[[True, False], [True, True]], n_cycles=2
    )
    with pytest.raises(SolverError, match=r"action index 5 in state 's0' \(cycle 0\)"):
        evaluate_policy(compiled, 5, QALYS)
    with pytest.raises(SolverError, match=r"action 'a1' in state 's0' .* not allowed"):
        evaluate_policy(compiled, 1, QALYS)
    with pytest.raises(SolverError, match=r"policy has shape \(3,\)"):
        evaluate_policy(compiled, np.zeros(3, int), QALYS)
    with pytest.raises(SolverError, match="integer action indices"):
        evaluate_policy(compiled, np.zeros(2), QALYS)


def test_infinite_horizon_simpson_evaluation_error():
    with pytest.raises(SolverError, match="'simpson' needs a finite horizon"):
        evaluate_policy(_one_state(None, "simpson"), 0, QALYS)


@settings(max_examples=40)
@given(st.integers(0, 2**32 - 1), st.integers(1, 12))
def test_reachable_states_are_those_of_the_transitive_closure(seed, S):
    # Reachability from the start states by breadth-first search equals the non-zero
    # pattern of (I + G)^S applied to the starts (common practice: S - 1 steps reach
    # every reachable state of an S-state graph).
    from caredecide.stationary_totals import reachable

    rng = np.random.default_rng(seed)
    graph = rng.random((S, S)) < 0.2
    starts = rng.random(S) < 0.3
    step = (np.eye(S, dtype=int) + graph.astype(int)) > 0
    closure = starts.copy()
    for _ in range(S):
        closure = (closure.astype(int) @ step.astype(int)) > 0
    np.testing.assert_array_equal(reachable(graph, starts), closure)
