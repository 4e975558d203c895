"""Solvers: backward induction, value iteration, policy iteration, modified PI.

Checked against Puterman 1994 (worked example, stopping rule), quantecon's DiscreteDP,
the within-cycle table of Elbasha & Chhatwal 2016 and the DEALE of Beck et al. 1982.
"""

from __future__ import annotations

import warnings
from dataclasses import replace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from quantecon.markov import DiscreteDP, backward_induction

from caredecide.errors import CompiledModelError, ModelError, RunOptionError
from caredecide.evaluate import evaluate_policy
from caredecide.objective import Objective
from caredecide.solvers import SolverError, solve
from tests.test_solvers_models import make_compiled, puterman_two_state, random_mdp

QALYS = Objective("qalys")


# --- Puterman 1994, section 3.1 two-state example -----------------------------------


def test_puterman_two_state_finite_horizon_values_and_policy():
    # Source: Puterman 1994, Markov Decision Processes, section 3.1 two-state example
    # (worked values from memory, re-derived by hand): with n steps left V(s1) = 10, 9.5, 8.75,
    # 7.875, 6.9375 and V(s2) = -n; a12 with one step left, a11 otherwise.
    result = solve(puterman_two_state(5), QALYS)
    assert result.method == "backward_induction" and result.success
    np.testing.assert_allclose(
        result.value[0, :, 0], [6.9375, 7.875, 8.75, 9.5, 10.0, 0.0], rtol=0, atol=1e-12
    )
    np.testing.assert_allclose(result.value[0, :, 1], [-5, -4, -3, -2, -1, 0], atol=1e-12)
    assert result.policy[0, :, 0].tolist() == [0, 0, 0, 0, 1]
    # Two steps left: Q(a11) = 9.5 > Q(a12) = 9 (same source).
    np.testing.assert_allclose(result.q_values[0, 3, 0], [9.5, 9.0], atol=1e-12)
    np.testing.assert_allclose(result.action_gap[0, 3, 0], 0.5, atol=1e-12)
    assert result.next_best_action[0, 3, 0] == 1
    # s2 allows one action: no choice there.
    assert np.isinf(result.action_gap[0, :, 1]).all()
    assert (result.next_best_action[0, :, 1] == -1).all()
    assert result.q_values[0, 0, 1, 1] == -np.inf


@pytest.mark.parametrize(
    "method", ["policy_iteration", "value_iteration", "modified_policy_iteration"]
)
def test_puterman_two_state_infinite_horizon_by_hand(method):
    # Rewards and moves of Puterman 1994 section 3.1, discounted at gamma = 1/1.05.
    # By hand: v(s2) = -1 / (1 - gamma) = -21.
    # a11: v1 = 5 + gamma (v1 + v2) / 2  ->  v1 = (5 - 0.5 * 21 gamma) / (1 - 0.5 gamma)
    #                                           = (5 - 10) / (1 - 0.476190) = -9.5454545
    # a12: v1 = 10 + gamma v2 = 10 - 20 = -10 < -9.5454545, so a11 is optimal.
    result = solve(puterman_two_state(None, discount=0.05), QALYS, method=method)
    assert result.success and result.method == method
    assert result.policy[0, 0, 0] == 0
    # (5 - 10) / (1 - 0.5 / 1.05) = -5 * 2.1 / 1.1 = -105 / 11 = -9.5454545
    np.testing.assert_allclose(result.value[0, 0], [-105 / 11, -21.0], rtol=1e-9)
    assert np.all(np.abs(result.value[0, 0] - [-105 / 11, -21.0]) <= result.error_bound[0] + 1e-9)


def test_auto_picks_backward_induction_and_policy_iteration():
    assert solve(puterman_two_state(3), QALYS).method == "backward_induction"
    assert solve(puterman_two_state(None, 0.05), QALYS).method == "policy_iteration"


# --- random MDPs against quantecon ---------------------------------------------------


def _stationary_model(P, u, g, allowed, rate):
    return make_compiled(
        P[:, None],
        state_qaly=u[:, None],
        decision_qaly=g[:, None],
        allowed=allowed,
        discount_outcomes=rate,
        discount_costs=rate,
    )


def _random_allowed(rng, S, A, n_absorbing):
    allowed = rng.random((S, A)) < 0.7
    allowed[np.arange(S), rng.integers(0, A, S)] = True  # at least one action per state
    allowed[S - n_absorbing :] = True
    return allowed


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(2, 9),
    n_actions=st.integers(1, 4),
    n_absorbing=st.integers(0, 2),
    rate=st.sampled_from([0.03, 0.1, 0.5]),
)
def test_iterative_methods_agree_with_quantecon(seed, n_states, n_actions, n_absorbing, rate):
    # Reference: quantecon.markov.DiscreteDP (policy and value iteration); Puterman 1994
    # Theorem 6.3.1 (from memory) bounds value iteration's distance from v*.
    rng = np.random.default_rng(seed)
    n_absorbing = min(n_absorbing, n_states - 1)
    P, u, g = random_mdp(rng, n_states, n_actions, n_absorbing)
    allowed = _random_allowed(rng, n_states, n_actions, n_absorbing)
    compiled = _stationary_model(P, u, g, allowed, rate)
    gamma = 1 / (1 + rate)

    R = u[0][:, None] + g[0]
    R = np.where(allowed, R, -np.inf)
    ddp = DiscreteDP(R, P[0].transpose(1, 0, 2), gamma)
    reference = ddp.solve("policy_iteration", max_iter=10_000)
    reference_vi = ddp.solve("value_iteration", epsilon=1e-8, max_iter=100_000)

    results = {
        method: solve(compiled, QALYS, method=method, tolerance=1e-9, relative=False)
        for method in ("policy_iteration", "value_iteration", "modified_policy_iteration")
    }
    for method, result in results.items():
        assert result.success, method
        value = result.value[0, 0]
        np.testing.assert_allclose(value, reference.v, atol=result.error_bound[0] + 1e-9)
        assert result.error_bound[0] <= 1e-9 / 2 + 1e-12  # eps / 2 with eps = tolerance
        decided = ~result.indifferent[0, 0] & result.decision_states
        assert (result.policy[0, 0][decided] == reference.sigma[decided]).all(), method
        assert allowed[np.arange(n_states), result.policy[0, 0]].all()
    np.testing.assert_allclose(results["value_iteration"].value[0, 0], reference_vi.v, atol=1e-7)


@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n_states=st.integers(2, 7), n_cycles=st.integers(1, 6))
def test_optimal_value_beats_every_fixed_policy_in_every_state(seed, n_states, n_cycles):
    # Optimality of backward induction (Puterman 1994, Theorem 4.5.1): V* >= V_pi for every
    # policy pi, in every state. Checked against every constant policy and random ones.
    rng = np.random.default_rng(seed)
    A = 3
    P = rng.random((n_cycles, A, n_states, n_states)) ** 2
    P /= P.sum(-1, keepdims=True)
    q = rng.uniform(0, 1, (n_cycles + 1, n_states))
    c = rng.uniform(0, 100, (n_cycles + 1, n_states))
    dc = rng.uniform(0, 50, (n_cycles, n_states, A))
    allowed = _random_allowed(rng, n_states, A, 0)
    base = dict(
        state_qaly=q,
        state_cost=c,
        decision_cost=dc,
        allowed=allowed,
        n_cycles=n_cycles,
        discount_outcomes=0.03,
        discount_costs=0.05,
        within_cycle="trapezoid",
    )
    objective = Objective("net_benefit", 200.0)
    optimal = solve(make_compiled(P, **base), objective)
    candidates = [np.where(allowed[:, a], a, allowed.argmax(1)) for a in range(A)]
    candidates += [
        np.array([rng.choice(np.flatnonzero(allowed[s])) for s in range(n_states)])
        for _ in range(3)
    ]
    for s in range(n_states):
        compiled = make_compiled(P, start_distribution=np.eye(n_states)[s], **base)
        for fixed in candidates:
            outcome = evaluate_policy(compiled, fixed[None, None, :], objective)
            assert optimal.value[0, 0, s] >= outcome.value[0] - 1e-9


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(2, 7),
    n_actions=st.integers(1, 3),
    n_cycles=st.integers(1, 8),
    n_absorbing=st.integers(0, 2),
    rate=st.sampled_from([0.0, 0.035, 0.5]),
)
def test_backward_induction_agrees_with_quantecon(
    seed, n_states, n_actions, n_cycles, n_absorbing, rate
):
    # Reference library: quantecon.markov.backward_induction solves the same stationary
    # finite-horizon problem; its values are as at the start of each period, ours in present
    # value at the model start, converted by value_at_cycle_start(). The terminal value is
    # given as at the end of the horizon in both.
    rng = np.random.default_rng(seed)
    n_absorbing = min(n_absorbing, n_states - 1)
    P, u, g = random_mdp(rng, n_states, n_actions, n_absorbing)
    allowed = _random_allowed(rng, n_states, n_actions, n_absorbing)
    terminal = rng.uniform(-2, 2, n_states)
    compiled = make_compiled(
        P[:, None],
        state_qaly=u[:, None],
        decision_qaly=g[:, None],
        allowed=allowed,
        n_cycles=n_cycles,
        discount_outcomes=rate,
        discount_costs=rate,
    )
    result = solve(compiled, QALYS, terminal_value=terminal)

    R = np.where(allowed, u[0][:, None] + g[0], -np.inf)
    with warnings.catch_warnings():  # quantecon warns that beta = 1 has no infinite horizon
        warnings.simplefilter("ignore", UserWarning)
        ddp = DiscreteDP(R, P[0].transpose(1, 0, 2), 1 / (1 + rate))
    values, sigmas = backward_induction(ddp, n_cycles, v_term=terminal)
    np.testing.assert_allclose(result.value_at_cycle_start()[0], values, rtol=1e-10, atol=1e-10)
    decided = ~result.indifferent[0] & result.decision_states
    assert (result.policy[0][decided] == sigmas[decided]).all()


def _every_policy(n_cycles: int, n_states: int, n_actions: int) -> np.ndarray:
    """(A^(T S), T, S) every deterministic Markov policy of a small problem."""
    grids = np.meshgrid(*[np.arange(n_actions)] * (n_cycles * n_states), indexing="ij")
    return np.stack([g.ravel() for g in grids], axis=-1).reshape(-1, n_cycles, n_states)


def _best_value_from_each_state(compiled, policies, objective) -> np.ndarray:
    """(S,) the largest evaluated value over ``policies`` (K, Tpi, S) from each start state."""
    best = []
    for s in range(compiled.n_states):
        start = replace(compiled, start_distribution=np.eye(compiled.n_states)[s])
        tiled = start.take_draws(np.zeros(len(policies), dtype=int))
        best.append(evaluate_policy(tiled, policies, objective).value.max())
    return np.array(best)


@settings(max_examples=15, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_cycles=st.integers(1, 3),
    within=st.sampled_from(["start", "end", "trapezoid", "simpson"]),
    rates=st.sampled_from([(0.0, 0.0), (0.03, 0.03), (0.015, 0.06)]),
)
def test_backward_induction_equals_the_best_of_every_policy(seed, n_cycles, within, rates):
    # Optimality of backward induction (Puterman 1994, section 4.5): with time-varying
    # transitions and rewards, one-off charges, a within-cycle method and differential
    # discounting, the solver's value from each start state equals the largest value over
    # all A^(T S) deterministic Markov policies, enumerated and evaluated one by one.
    rng = np.random.default_rng(seed)
    S, A, T = 3, 2, n_cycles
    P = rng.random((T, A, S, S)) ** 2
    P /= P.sum(-1, keepdims=True)
    base = make_compiled(
        P,
        state_qaly=rng.uniform(0, 1, (T + 1, S)),
        state_cost=rng.uniform(0, 500, (T + 1, S)),
        decision_qaly=rng.uniform(-0.2, 0.2, (T, S, A)),
        decision_cost=rng.uniform(0, 300, (T, S, A)),
        n_cycles=T,
        within_cycle=within,
        discount_outcomes=rates[0],
        discount_costs=rates[1],
        absorbing=[False] * S,
    )
    objective = Objective("net_benefit", 1000.0)
    optimal = solve(base, objective)
    best = _best_value_from_each_state(base, _every_policy(T, S, A), objective)
    np.testing.assert_allclose(optimal.value[0, 0], best, rtol=1e-12, atol=1e-9)


@settings(max_examples=20, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1), n_states=st.integers(2, 5), rate=st.sampled_from([0.03, 0.2])
)
def test_stationary_optimum_is_the_best_stationary_policy(seed, n_states, rate):
    # Infinite horizon: a deterministic stationary policy is optimal (Puterman 1994,
    # chapter 6), so policy iteration's value in every state is the largest over all A^S
    # such policies (each evaluated exactly), within its error bound.
    rng = np.random.default_rng(seed)
    A = 2
    P, u, g = random_mdp(rng, n_states, A, 1)
    compiled = _stationary_model(P, u, g, np.ones((n_states, A), bool), rate)
    optimal = solve(compiled, QALYS, method="policy_iteration")
    best = _best_value_from_each_state(compiled, _every_policy(1, n_states, A), QALYS)
    np.testing.assert_allclose(
        optimal.value[0, 0], best, rtol=1e-10, atol=optimal.error_bound[0] + 1e-9
    )


# --- within-cycle methods and life expectancy -----------------------------------------


def _one_state(n_cycles, within_cycle, rate=0.1, cycle_length=1.0, discount=0.0):
    p = 1 - np.exp(-rate * cycle_length)
    P = np.array([[[1 - p, p], [0.0, 1.0]]])
    return make_compiled(
        P,
        state_qaly=[cycle_length, 0.0],
        n_cycles=n_cycles,
        within_cycle=within_cycle,
        cycle_length=cycle_length,
        discount_outcomes=discount,
        discount_costs=discount,
        absorbing=[False, True],
    )


@pytest.mark.parametrize(
    ("within_cycle", "expected"),
    [("start", 6.6425327), ("end", 6.0104121), ("trapezoid", 6.3264724), ("simpson", 6.3212091)],
)
def test_within_cycle_methods_ten_cycles(within_cycle, expected):
    # Source: Elbasha & Chhatwal 2016, Med Decis Making 36(1):115-131 (within-cycle formulas;
    # values are geometric sums worked from them): one alive state, mu = 0.1/yr, 1-year
    # cycles, 10 cycles.
    result = solve(_one_state(10, within_cycle), QALYS)
    assert result.value[0, 0, 0] == pytest.approx(expected, abs=5e-7)


@pytest.mark.parametrize(
    ("within_cycle", "expected"),
    [("start", 10.508332), ("end", 9.508332), ("trapezoid", 10.008332), ("simpson", 10.000006)],
)
def test_within_cycle_methods_lifetime(within_cycle, expected):
    # Source: Elbasha & Chhatwal 2016, Med Decis Making 36(1):115-131 (lifetime sums worked
    # from their formulas, e.g. start-of-cycle 1 / (1 - e^-0.1) = 10.508332); 600 cycles leave
    # e^-60 of the cohort alive, far below the checked digits.
    result = solve(_one_state(600, within_cycle), QALYS)
    assert result.value[0, 0, 0] == pytest.approx(expected, abs=5e-6)


@pytest.mark.parametrize(
    ("within_cycle", "expected"),
    [("start", 10.508332), ("end", 9.508332), ("trapezoid", 10.008332)],
)
def test_within_cycle_infinite_horizon_correction(within_cycle, expected):
    # Same lifetime row (Elbasha & Chhatwal 2016). The infinite horizon needs a discount
    # rate, so compare the discounted solver value with the same sum done by hand:
    # start = sum_t (d e^-0.1)^t = 1 / (1 - d e^-0.1); end = start - 1; trapezoid = start - 1/2.
    d = 1 / 1.000001
    result = solve(_one_state(None, within_cycle, discount=1e-6), QALYS)
    start = 1 / (1 - d * np.exp(-0.1))
    by_hand = {"start": start, "end": start - 1, "trapezoid": start - 0.5}[within_cycle]
    assert result.value[0, 0, 0] == pytest.approx(by_hand, rel=1e-9)
    assert result.value[0, 0, 0] == pytest.approx(expected, abs=2e-4)  # rate 1e-6 moves digits


def test_deale_life_expectancy_within_discretisation_error():
    # Source: Beck, Kassirer & Pauker 1982, Am J Med 73(6):883-888 (DEALE): rates add and
    # LE = 1 / mu; population LE 17 y plus an excess rate 0.1/yr -> 6.296296 y.
    # Monthly cycles with the trapezoid rule give (h/2) coth(mu h / 2) = 1/mu + mu h^2/12
    # - O(h^4) (Euler-Maclaurin), so the error is below mu h^2 / 12.
    mu = 1 / 17 + 0.1
    h = 1 / 12
    result = solve(_one_state(12 * 250, "trapezoid", rate=mu, cycle_length=h), QALYS)
    life_expectancy = result.value[0, 0, 0]
    assert 1 / mu == pytest.approx(6.296296, abs=1e-6)
    error = life_expectancy - 1 / mu
    assert 0 < error <= mu * h**2 / 12
    assert life_expectancy == pytest.approx(h / 2 / np.tanh(mu * h / 2), rel=1e-9)


# --- differential discounting ----------------------------------------------------------


def test_differential_discounting_by_hand():
    # Hand-computed case (arithmetic below). One alive state that never changes, 2 cycles,
    # start-of-cycle sums, q = 1 QALY and c = 100 per cycle, WTP 1000.
    # Outcome rate 100% (d_o = 0.5), costs undiscounted (d_c = 1).
    # "treat" costs 60 and adds 0.1 QALY at the decision:
    #   gain at t = 0: 1000 * 0.1 * 1   - 60 * 1 = +40 -> treat
    #   gain at t = 1: 1000 * 0.1 * 0.5 - 60 * 1 = -10 -> wait
    #   V_2 = 0 (start-of-cycle weights: w_2 = 0)
    #   V_1 = 1000 * 1 * 0.5 - 100 * 1 + 0         = 400
    #   V_0 = 1000 * 1 * 1   - 100 * 1 + 40 + 400  = 1340
    # One blended factor would treat in both or neither cycle.
    compiled = make_compiled(
        np.ones((2, 1, 1)),
        state_qaly=[1.0],
        state_cost=[100.0],
        decision_qaly=[[0.0, 0.1]],
        decision_cost=[[0.0, 60.0]],
        n_cycles=2,
        discount_outcomes=1.0,
        discount_costs=0.0,
        absorbing=[False],
        action_ids=("wait", "treat"),
    )
    result = solve(compiled, Objective("net_benefit", 1000.0))
    assert result.policy[0, :, 0].tolist() == [1, 0]
    np.testing.assert_allclose(result.value[0, :, 0], [1340.0, 400.0, 0.0], atol=1e-9)
    np.testing.assert_allclose(result.action_gap[0, :, 0], [40.0, 10.0], atol=1e-9)
    with pytest.raises(ValueError, match="differential discounting"):
        result.value_at_cycle_start()


def test_value_at_cycle_start_with_equal_rates():
    # One state earning 1 per cycle for 3 cycles at 10%: as at the start of cycle t the
    # remaining value is sum_{k<3-t} 1.1^-k (common practice: present value of an annuity).
    compiled = make_compiled(
        np.ones((1, 1, 1)),
        state_qaly=[1.0],
        n_cycles=3,
        discount_outcomes=0.1,
        discount_costs=0.1,
        absorbing=[False],
    )
    result = solve(compiled, Objective("net_benefit", 1.0))
    at_start = result.value_at_cycle_start()[0, :, 0]
    np.testing.assert_allclose(at_start, [1 + 1 / 1.1 + 1 / 1.21, 1 + 1 / 1.1, 1.0, 0.0])
    np.testing.assert_allclose(result.value[0, :, 0], at_start * 1.1 ** -np.arange(4))


def test_terminal_value_shifts_every_value_without_discounting():
    # Rows of P sum to 1, so a terminal value c in every state adds c to every value
    # (common practice: expectation of a constant).
    base = solve(puterman_two_state(4), QALYS)
    shifted = solve(puterman_two_state(4), QALYS, terminal_value=7.0)
    np.testing.assert_allclose(shifted.value, base.value + 7.0)
    np.testing.assert_array_equal(shifted.policy, base.policy)


# --- batches, ties, masks ------------------------------------------------------------


@pytest.mark.parametrize("n_cycles", [None, 6])
def test_batched_solve_equals_single_solves(n_cycles):
    rng = np.random.default_rng(3)
    N, S, A = 7, 6, 3
    P, u, g = random_mdp(rng, S, A, 1, n_draws=N)
    compiled = make_compiled(
        P[:, None],
        state_qaly=u[:, None],
        decision_qaly=g[:, None],
        n_cycles=n_cycles,
        discount_outcomes=0.05,
    )
    for method in (
        ["backward_induction"]
        if n_cycles
        else ["policy_iteration", "value_iteration", "modified_policy_iteration"]
    ):
        batch = solve(compiled, QALYS, method=method)
        for d in range(N):
            single = solve(compiled.take_draws(slice(d, d + 1)), QALYS, method=method)
            np.testing.assert_array_equal(batch.policy[d], single.policy[0])
            np.testing.assert_allclose(
                batch.value[d], single.value[0], rtol=1e-9, atol=2 * batch.error_bound.max()
            )


def test_exact_ties_are_reported_and_lowest_index_chosen():
    # Two actions with identical consequences: a tie in every cycle; the documented rule
    # picks action index 0. A third action is worse by 1.
    P = np.array([[[0.9, 0.1], [0, 1]]] * 3)
    compiled = make_compiled(
        P, state_qaly=[1.0, 0.0], decision_qaly=[[0.0, 0.0, -1.0], [0, 0, 0]], n_cycles=4
    )
    result = solve(compiled, QALYS)
    assert result.indifferent[0, :, 0].all()
    assert (result.policy[0, :, 0] == 0).all()
    assert (result.next_best_action[0, :, 0] == 1).all()
    assert (result.action_gap[0, :, 0] == 0).all()
    assert not result.indifferent[0, :, 1].any()  # absorbing: no decision, no tie


def test_near_tie_within_tolerance_is_reported_not_resolved():
    P = np.array([[[0.9, 0.1], [0, 1]]] * 2)
    compiled = make_compiled(
        P, state_qaly=[1.0, 0.0], decision_qaly=[[0.0, 1e-12], [0, 0]], n_cycles=2
    )
    result = solve(compiled, QALYS)
    assert result.indifferent[0, :, 0].all() and (result.policy[0, :, 0] == 0).all()
    clear = solve(compiled, QALYS, tie_tolerance=0.0, tie_relative=0.0)
    assert not clear.indifferent[0, :, 0].any() and (clear.policy[0, :, 0] == 1).all()


@pytest.mark.parametrize("n_cycles", [None, 5])
def test_not_allowed_actions_are_never_chosen(n_cycles):
    # Action 1 pays a huge reward but is not allowed in state 0.
    P = np.array([[[0.8, 0.2], [0, 1]]] * 2)
    compiled = make_compiled(
        P,
        state_qaly=[1.0, 0.0],
        decision_qaly=[[0.0, 1e6], [0, 0]],
        allowed=[[True, False], [True, True]],
        n_cycles=n_cycles,
        discount_outcomes=0.05,
    )
    result = solve(compiled, QALYS)
    assert (result.policy[..., 0] == 0).all()
    assert np.isneginf(result.q_values[..., 0, 1]).all()
    assert np.isinf(result.action_gap[..., 0]).all()  # one allowed action: no choice


# --- history, results, failures --------------------------------------------------------


@pytest.mark.parametrize(
    "method",
    ["value_iteration", "modified_policy_iteration", "policy_iteration", "backward_induction"],
)
def test_history_records_each_sweep(method):
    horizon = 5 if method == "backward_induction" else None
    result = solve(puterman_two_state(horizon, 0.05), QALYS, method=method, record_history=True)
    assert len(result.history) == result.iterations
    last = result.history[-1]
    assert last.value.shape == (1, 2) and last.policy.shape == (1, 2)
    if method == "value_iteration":
        residuals = np.array([h.residual[0] for h in result.history])
        assert (np.diff(residuals) <= 1e-12).all()  # contraction: changes shrink
        gamma = 1 / 1.05
        np.testing.assert_allclose(last.error_bound, gamma * last.residual / (1 - gamma))
        np.testing.assert_allclose(result.error_bound, last.error_bound)
    if method == "backward_induction":
        assert [h.cycle for h in result.history] == [4, 3, 2, 1, 0]
        np.testing.assert_allclose(last.value, result.value[:, 0])
    assert solve(puterman_two_state(horizon, 0.05), QALYS, method=method).history is None


def test_max_iterations_reached_is_not_success():
    result = solve(
        puterman_two_state(None, 0.01), QALYS, method="value_iteration", max_iterations=3
    )
    assert not result.success
    assert "max_iterations = 3" in result.message
    assert result.iterations == 3 and result.error_bound[0] > 0


def test_to_frame_lists_each_cycle_and_state():
    result = solve(puterman_two_state(2), QALYS)
    frame = result.to_frame()
    assert list(frame.columns) == [
        "cycle",
        "age",
        "state",
        "action",
        "value",
        "next_best_action",
        "action_gap",
        "indifferent",
    ]
    assert frame.shape[0] == 4
    row = frame[(frame.cycle == 0) & (frame.state == "s1")].iloc[0]
    assert row.action == "a1" and row.next_best_action == "a2" and row.value == 9.5
    assert frame[frame.state == "s2"].next_best_action.eq("").all()


def test_relative_tolerance_scales_with_values():
    # Money-sized values: a relative tolerance of 1e-6 stops far sooner than an absolute one.
    compiled = make_compiled(
        np.array([[[0.9, 0.1], [0, 1]]] * 2),
        state_cost=[-1e6, 0.0],
        discount_outcomes=0.05,
        discount_costs=0.05,
    )
    objective = Objective("net_benefit", 0.0)
    rel = solve(compiled, objective, method="value_iteration", tolerance=1e-6)
    absolute = solve(compiled, objective, method="value_iteration", tolerance=1e-6, relative=False)
    assert rel.iterations < absolute.iterations
    assert rel.error_bound[0] <= 1e-6 * np.abs(rel.value).max() / 2 * 1.0001


# --- one error test per rule -----------------------------------------------------------


@pytest.mark.parametrize(
    ("model", "kwargs", "match"),
    [
        (lambda: puterman_two_state(3), {"method": "newton"}, "method 'newton' is unknown"),
        (lambda: puterman_two_state(3), {"method": "value_iteration"}, "infinite horizon"),
        (
            lambda: puterman_two_state(None, 0.05),
            {"method": "backward_induction"},
            "finite number of cycles",
        ),
        (lambda: puterman_two_state(None, 0.0), {}, "discount rate > 0"),
        (
            lambda: puterman_two_state(3),
            {"terminal_value": [1.0, 2.0, 3.0]},
            r"terminal_value has shape \(3,\)",
        ),
        (lambda: puterman_two_state(3), {"terminal_value": np.inf}, "non-finite"),
        (lambda: puterman_two_state(None, 0.05), {"terminal_value": 1.0}, "finite horizon only"),
    ],
)
def test_solver_option_errors(model, kwargs, match):
    with pytest.raises(SolverError, match=match):
        solve(model(), QALYS, **kwargs)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"tolerance": 0.0}, r"tolerance = 0\.0 is not allowed; expected a finite number > 0"),
        ({"tie_tolerance": -1.0}, r"tie_tolerance = -1\.0 .* expected a finite number >= 0"),
        ({"tie_relative": float("nan")}, "tie_relative = nan"),
        ({"max_iterations": 0}, "max_iterations = 0 is not allowed; expected a whole number >= 1"),
        ({"max_iterations": True}, "max_iterations = True is not allowed"),
        ({"max_iterations": 2.5}, "max_iterations = 2.5"),
        ({"evaluation_sweeps": -1}, "evaluation_sweeps = -1"),
        ({"tolerance": "1e-6"}, "tolerance = '1e-6'"),
    ],
)
def test_solver_run_option_errors_are_run_option_errors(kwargs, match):
    # Bad run options are the caller's, not the model file's: one error type names them.
    with pytest.raises(RunOptionError, match=match) as info:
        solve(puterman_two_state(3), QALYS, **kwargs)
    assert not isinstance(info.value, ModelError)
    assert info.value.name == next(iter(kwargs))


def _two_rates(n_cycles=None, within="start", stationary=True):
    P = np.array([[[0.9, 0.1], [0, 1]]] * 2)
    if not stationary:
        P = np.stack([P, P])
    return make_compiled(
        P,
        state_qaly=[1.0, 0.0],
        discount_outcomes=0.03,
        discount_costs=0.05 if within == "start" else 0.03,
        within_cycle=within,
        n_cycles=n_cycles,
    )


def test_infinite_horizon_unequal_rates_error():
    with pytest.raises(SolverError, match=r"discount_outcomes = 0\.03 and discount_costs = 0\.05"):
        solve(_two_rates(), Objective("net_benefit", 100.0))
    # The QALY objective ignores costs, so unequal rates are fine there.
    assert solve(_two_rates(), QALYS).success


def test_infinite_horizon_simpson_error():
    with pytest.raises(SolverError, match="'simpson' needs a finite horizon"):
        solve(_two_rates(within="simpson"), QALYS)


def test_infinite_horizon_time_varying_error():
    # The compiled model refuses it on construction (its own contract).
    with pytest.raises(CompiledModelError, match="infinite horizon needs stationary arrays"):
        _two_rates(stationary=False)


def test_nonzero_terminal_with_differential_rates_error():
    with pytest.raises(SolverError, match="non-zero terminal_value"):
        solve(_two_rates(n_cycles=2), Objective("net_benefit", 1.0), terminal_value=1.0)


def test_state_without_allowed_action_error():
    with pytest.raises(CompiledModelError, match="state 's1' allows no action"):
        make_compiled(np.array([[[1.0, 0], [0, 1]]]), allowed=[[True], [False]], n_cycles=2)


def test_inconsistent_shapes_error():
    with pytest.raises(CompiledModelError, match=r"state_qaly has shape \(1, 1, 3\)"):
        replace(puterman_two_state(2), state_qaly=np.zeros((1, 1, 3)))


def test_a_row_changed_in_place_is_caught_by_the_solver():
    compiled = puterman_two_state(2)
    compiled.transition[0, 0, 0, 0, 0] += 0.5  # arrays stay writable: solve checks again
    with pytest.raises(
        SolverError, match=r"transition row of state 's1' under action 'a1' .* sums to 1\.5"
    ):
        solve(compiled, QALYS)


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"start_distribution": np.array([0.5, 0.4])}, "start_distribution sums to 0.9"),
        ({"life_years": np.ones(3)}, r"life_years has shape \(3,\); expected \(2,\)"),
        ({"allowed": np.ones((2, 3), dtype=bool)}, r"allowed has shape \(2, 3\)"),
        ({"transition": np.full((1, 1, 2, 2, 2), 0.4)}, r"sums to 0\.8.*expected 1"),
    ],
)
def test_compiled_model_checks_its_contract(change, message):
    # One error per rule of the array contract (caredecide/compiled.py).
    with pytest.raises(CompiledModelError, match=message):
        replace(puterman_two_state(2), **change)


def test_objective_errors():
    from caredecide.objective import ObjectiveError

    with pytest.raises(ObjectiveError, match="objective kind 'dollars' is unknown"):
        Objective("dollars")
    with pytest.raises(ObjectiveError, match="willingness_to_pay = -5"):
        Objective("net_benefit", -5)
    with pytest.raises(SolverError, match="objective must be an Objective"):
        solve(puterman_two_state(2), "qalys")
