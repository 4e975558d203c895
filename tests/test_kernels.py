"""Compiled kernels against the numpy path and quantecon: same policies, values, ties.

The kernels (:mod:`caredecide.solvers.kernels`) and the numpy path implement the same
arithmetic; policies, gaps, next-best actions and ties must be identical and values agree
to rounding. quantecon's ``backward_induction`` (a general-purpose reference library) is
the outside check on the finite-horizon values.
"""

from __future__ import annotations

import os
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from quantecon.markov import DiscreteDP
from quantecon.markov import backward_induction as quantecon_backward_induction

from caredecide.evaluate import evaluate_policy
from caredecide.objective import Objective
from caredecide.solvers import kernels, solve
from tests.test_solvers_models import make_compiled

pytestmark = pytest.mark.skipif(not kernels.available(), reason="numba is not installed")


def _numpy_path(function, *args, **kwargs):
    """Call ``function`` with the compiled kernels switched off."""
    before = os.environ.get("CAREDECIDE_KERNELS")
    os.environ["CAREDECIDE_KERNELS"] = "numpy"
    try:
        assert not kernels.available()
        return function(*args, **kwargs)
    finally:
        if before is None:
            del os.environ["CAREDECIDE_KERNELS"]
        else:
            os.environ["CAREDECIDE_KERNELS"] = before


def _random_finite(rng, D, T, S, A, tie: bool):
    P = rng.uniform(0, 1, (D, T, A, S, S)) * (rng.random((D, T, A, S, S)) < 0.6)
    P[..., np.arange(S), np.arange(S)] += 0.1
    P /= P.sum(-1, keepdims=True)
    allowed = rng.random((S, A)) < 0.7
    allowed[np.arange(S), rng.integers(0, A, S)] = True
    dc = rng.uniform(0, 50, (D, T, S, A))
    dq = rng.uniform(-0.1, 0, (D, 1, S, A))
    if tie and A > 1:  # two identical actions: every state with both allowed is a tie
        P[:, :, 1] = P[:, :, 0]
        dc[..., 1] = dc[..., 0]
        dq[..., 1] = dq[..., 0]
    return make_compiled(
        P,
        state_qaly=rng.uniform(0, 1, (D, T + 1, S)),
        state_cost=rng.uniform(0, 100, (D, 1, S)),
        decision_qaly=dq,
        decision_cost=dc,
        allowed=allowed,
        n_cycles=T,
        start_distribution=rng.dirichlet(np.ones(S)),
        discount_outcomes=0.03,
        discount_costs=0.05,
        within_cycle="trapezoid",
    )


@settings(max_examples=30, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    D=st.integers(1, 4),
    T=st.integers(1, 6),
    S=st.integers(1, 6),
    A=st.integers(1, 4),
    tie=st.booleans(),
    kind=st.sampled_from(["qalys", "net_benefit"]),
)
def test_backward_induction_kernel_matches_numpy_path(seed, D, T, S, A, tie, kind):
    # Same arithmetic, two implementations (common practice: a compiled loop checked
    # against the vectorised version it replaces).
    compiled = _random_finite(np.random.default_rng(seed), D, T, S, A, tie)
    objective = Objective(kind, 1000.0) if kind == "net_benefit" else Objective("qalys")
    fast = solve(compiled, objective)
    plain = _numpy_path(solve, compiled, objective)
    for name in ("policy", "next_best_action", "indifferent"):
        np.testing.assert_array_equal(getattr(fast, name), getattr(plain, name), err_msg=name)
    np.testing.assert_allclose(fast.value, plain.value, rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(fast.q_values, plain.q_values, rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(fast.action_gap, plain.action_gap, rtol=1e-9, atol=1e-6)
    if tie and A > 1:
        # where action 0 is chosen, its identical twin 1 is as good: a reported tie
        both = compiled.allowed[:, 0] & compiled.allowed[:, 1] & fast.decision_states
        chosen_first = (fast.policy == 0) & both
        assert fast.indifferent[chosen_first].all()
        assert (fast.action_gap[chosen_first] == 0).all()


@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), T=st.integers(1, 8), S=st.integers(2, 6))
def test_cohort_trace_kernel_matches_numpy_path(seed, T, S):
    rng = np.random.default_rng(seed)
    compiled = _random_finite(rng, 3, T, S, 3, tie=False)
    policy = np.array(
        [[[rng.choice(np.flatnonzero(compiled.allowed[s])) for s in range(S)] for _ in range(T)]]
    )
    objective = Objective("net_benefit", 500.0)
    fast = evaluate_policy(compiled, policy, objective)
    plain = _numpy_path(evaluate_policy, compiled, policy, objective)
    np.testing.assert_allclose(fast.trace, plain.trace, rtol=0, atol=1e-14)
    np.testing.assert_allclose(fast.trace.sum(-1), 1.0, atol=1e-12)  # mass is conserved
    for name in ("qalys", "costs", "life_years", "value", "net_monetary_benefit"):
        np.testing.assert_allclose(getattr(fast, name), getattr(plain, name), rtol=1e-12)
    for name in ("qalys", "costs", "life_years"):
        np.testing.assert_allclose(
            getattr(fast, f"{name}_undiscounted"),
            getattr(plain, f"{name}_undiscounted"),
            rtol=1e-12,
        )
        np.testing.assert_allclose(fast.flows[name], plain.flows[name], rtol=1e-12, atol=1e-12)


def test_backward_induction_kernel_matches_quantecon():
    # Reference: quantecon.markov.backward_induction on the same rewards and moves
    # (QALY objective, no discounting, start-of-cycle rewards, one draw).
    rng = np.random.default_rng(7)
    S, A, T = 5, 3, 12
    P = rng.dirichlet(np.ones(S), size=(A, S))
    u = rng.uniform(0, 1, S)
    g = rng.uniform(-0.3, 0, (S, A))
    compiled = make_compiled(P, state_qaly=u, decision_qaly=g, n_cycles=T)
    result = solve(compiled, Objective("qalys"))
    with warnings.catch_warnings():  # beta = 1 disables only quantecon's infinite methods
        warnings.simplefilter("ignore", UserWarning)
        ddp = DiscreteDP(u[:, None] + g, P.transpose(1, 0, 2), 1.0)
    v, sigma = quantecon_backward_induction(ddp, T)
    np.testing.assert_allclose(result.value[0], v, rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(result.policy[0], sigma)


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    shape=st.sampled_from([(1, 3), (4, 2), (2, 3, 5), (3, 1, 2)]),
    A=st.integers(1, 4),
    ties=st.booleans(),
)
def test_greedy_kernel_matches_numpy_greedy_choice(seed, shape, A, ties):
    # The documented tie rule (lowest index within the tolerance; gap to the best other
    # action; next-best action), compiled and vectorised, on values with exact ties,
    # near-ties inside the tolerance and actions not allowed (-inf).
    from caredecide.solvers.bellman import greedy_choice

    rng = np.random.default_rng(seed)
    *lead, S = shape
    Q = np.round(rng.normal(0, 3, (*lead, S, A)), 0 if ties else 6)
    Q[..., 1:] += rng.choice([0.0, 1e-10, 1.0], Q[..., 1:].shape)
    Q[rng.random(Q.shape) < 0.25] = -np.inf
    Q[..., 0] = np.where(np.isinf(Q).all(axis=-1), 1.0, Q[..., 0])  # one allowed action
    decision_states = rng.random(S) < 0.8
    uncertainty = rng.choice([0.0, 0.5], tuple(lead))
    fast = greedy_choice(Q.copy(), decision_states, 1e-9, 1e-9, uncertainty)
    plain = _numpy_path(greedy_choice, Q.copy(), decision_states, 1e-9, 1e-9, uncertainty)
    for name, a, b in zip(("policy", "value", "gap", "next", "tie"), fast, plain, strict=True):
        np.testing.assert_array_equal(a, b, err_msg=name)


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    S=st.integers(2, 7),
    scale=st.sampled_from([0.01, 0.5, 3.0, 40.0, 900.0]),
)
def test_compiled_pade_exponential_matches_numpy_path_and_scipy(seed, S, scale):
    # Reference: scipy.linalg.expm (Higham 2005 scaling and squaring, the same algorithm);
    # large scales exercise degree 13 with squarings.
    from scipy.linalg import expm

    from caredecide.conversions import _closure, _pade_exponential

    rng = np.random.default_rng(seed)
    G = rng.uniform(0, 1, (6, S, S)) * (rng.random((6, S, S)) < 0.6)
    G[:, -1] = 0.0  # an absorbing state
    G[:, np.arange(S), np.arange(S)] = 0.0
    G[:, np.arange(S), np.arange(S)] = -G.sum(-1)
    G *= scale * rng.uniform(0.5, 1.0, (6, 1, 1))
    pattern = (G != 0) & ~np.eye(S, dtype=bool)
    unreachable = ~_closure(pattern)
    fast = _pade_exponential(G, unreachable)
    plain = _numpy_path(_pade_exponential, G, unreachable)
    np.testing.assert_allclose(fast, plain, rtol=0, atol=1e-12)
    np.testing.assert_allclose(fast, np.clip([expm(g) for g in G], 0, 1), rtol=0, atol=1e-11)
    assert (fast >= 0).all() and np.allclose(fast.sum(-1), 1.0, atol=1e-12)
    assert (fast[unreachable] == 0).all()


@pytest.mark.parametrize("method", ["policy_iteration", "value_iteration"])
def test_numpy_path_in_cache_sized_blocks_matches_kernels(method):
    # More draws than one block: the numpy path runs block by block (common practice:
    # blocking changes the layout, never the answer beyond the stopping tolerance).
    from caredecide.solvers.stationary import draw_block

    rng = np.random.default_rng(3)
    S, A = 12, 2
    D = draw_block(S, A) + 7
    P = rng.dirichlet(np.ones(S), size=(D, 1, A, S))
    compiled = make_compiled(
        P,
        state_qaly=rng.uniform(0, 1, (D, 1, S)),
        decision_qaly=rng.uniform(-0.2, 0, (D, 1, S, A)),
        discount_outcomes=0.05,
        discount_costs=0.05,
    )
    fast = solve(compiled, Objective("qalys"), method=method, tolerance=1e-10)
    plain = _numpy_path(solve, compiled, Objective("qalys"), method=method, tolerance=1e-10)
    decided = ~fast.indifferent & ~plain.indifferent & fast.decision_states
    np.testing.assert_array_equal(fast.policy[decided], plain.policy[decided])
    np.testing.assert_allclose(fast.value, plain.value, rtol=1e-8)
    assert fast.success and plain.success


def test_several_policies_at_once_equal_one_at_a_time():
    # evaluate_policies shares each cycle's rewards among the policies; the outcomes must
    # be those of one evaluate_policy call per policy.
    from caredecide.evaluate import evaluate_policies

    rng = np.random.default_rng(11)
    compiled = _random_finite(rng, 4, 6, 5, 3, tie=False)
    allowed = compiled.allowed
    policies = [
        np.array([[[rng.choice(np.flatnonzero(allowed[s])) for s in range(5)]] * 6]),
        np.argmax(allowed, axis=1)[None, None, :],
    ]
    objective = Objective("qalys")  # a terminal value needs one discount rate for both
    together = evaluate_policies(compiled, policies, objective, terminal_value=2.0)
    for policy, outcome in zip(policies, together, strict=True):
        alone = evaluate_policy(compiled, policy, objective, terminal_value=2.0)
        np.testing.assert_array_equal(outcome.trace, alone.trace)
        for name in ("qalys", "costs", "life_years", "value", "costs_undiscounted"):
            np.testing.assert_array_equal(getattr(outcome, name), getattr(alone, name))


def _every_term(rng, D, T, S, A, method, time_axis, per_draw_rates):
    """A finite model using every reward term: decision-time moves, state-action rewards,
    one-off charges, state rewards, with time axes of length 1 or T and per-draw rates."""
    Tt = T if time_axis == "T" else 1
    P = rng.dirichlet(np.ones(S), size=(D, Tt, A, S))
    move = rng.dirichlet(np.ones(S) * 0.3, size=(D, Tt, A, S))
    move[:, :, 0] = np.eye(S)  # the first action moves no one
    transition = np.einsum("dtasj,dtajk->dtask", move, P)
    compiled = make_compiled(
        transition,
        move=move,
        state_qaly=rng.uniform(0, 1, (D, Tt, S)),
        state_cost=rng.uniform(0, 100, (D, Tt, S)),
        state_action_qaly=rng.uniform(-0.2, 0.1, (D, Tt, S, A)),
        state_action_cost=rng.uniform(0, 80, (D, Tt, S, A)),
        decision_qaly=rng.uniform(-0.1, 0, (D, Tt, S, A)),
        decision_cost=rng.uniform(0, 50, (D, Tt, S, A)),
        n_cycles=T,
        start_distribution=rng.dirichlet(np.ones(S)),
        discount_outcomes=0.03,
        discount_costs=0.05,
        within_cycle=method,
        absorbing=np.zeros(S, bool),
    )
    if per_draw_rates:
        from dataclasses import replace

        compiled = replace(
            compiled,
            discount_outcomes=rng.uniform(0, 0.06, D),
            discount_costs=rng.uniform(0, 0.06, D),
        )
    return compiled


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    D=st.integers(1, 3),
    T=st.integers(1, 7),
    S=st.integers(1, 5),
    A=st.integers(1, 3),
    method=st.sampled_from(["start", "end", "trapezoid", "simpson", "half_cycle"]),
    time_axis=st.sampled_from(["1", "T"]),
    per_draw_rates=st.booleans(),
    kind=st.sampled_from(["qalys", "net_benefit"]),
)
def test_fused_rewards_equal_the_numpy_cycle_parts(
    seed, D, T, S, A, method, time_axis, per_draw_rates, kind
):
    # The kernels build each cycle's rewards inside the loop; bellman.cycle_parts (numpy)
    # is the reference arithmetic (common practice: a compiled loop checked against the
    # vectorised version it replaces). Every term is present: moves, state-action and
    # decision rewards, each within-cycle method, per-draw discount rates.
    compiled = _every_term(np.random.default_rng(seed), D, T, S, A, method, time_axis,
                           per_draw_rates)  # fmt: skip
    objective = Objective(kind, 1000.0) if kind == "net_benefit" else Objective("qalys")
    fast = solve(compiled, objective)
    plain = _numpy_path(solve, compiled, objective)
    decided = ~fast.indifferent & ~plain.indifferent & fast.decision_states
    np.testing.assert_array_equal(fast.policy[decided], plain.policy[decided])
    np.testing.assert_allclose(fast.value, plain.value, rtol=1e-12, atol=1e-10)
    np.testing.assert_allclose(fast.q_values, plain.q_values, rtol=1e-12, atol=1e-10)
    lean = solve(compiled, objective, action_values=False)
    np.testing.assert_array_equal(lean.policy, fast.policy)
    np.testing.assert_array_equal(lean.value, fast.value)
    np.testing.assert_array_equal(lean.indifferent, fast.indifferent)

    fast_out = evaluate_policy(compiled, fast.policy, objective)
    plain_out = _numpy_path(evaluate_policy, compiled, fast.policy, objective)
    np.testing.assert_allclose(fast_out.trace, plain_out.trace, rtol=0, atol=1e-14)
    for name in ("qalys", "costs", "life_years"):
        for suffix in ("", "_undiscounted"):
            np.testing.assert_allclose(
                getattr(fast_out, name + suffix), getattr(plain_out, name + suffix),
                rtol=1e-12, atol=1e-10, err_msg=name + suffix,
            )  # fmt: skip
        np.testing.assert_allclose(fast_out.flows[name], plain_out.flows[name], rtol=1e-12,
                                   atol=1e-10)  # fmt: skip
    # The policy's own totals are the solver's value of the cohort (Puterman 1994,
    # section 4.2: the value of a policy is its expected total reward).
    np.testing.assert_allclose(
        fast_out.value, fast.value[:, 0] @ compiled.start_distribution, rtol=1e-11
    )


def test_weight_table_holds_the_factors_of_cycle_parts():
    # One definition of the within-cycle and discount factors: the table the kernels read
    # equals, cycle by cycle, what bellman.cycle_parts applies (common practice).
    from caredecide.solvers.bellman import _discount_power, _weights_at, weight_table

    rng = np.random.default_rng(5)
    for method in ("start", "end", "trapezoid", "simpson", "half_cycle"):
        for rates in ((0.03, 0.05), (rng.uniform(0, 0.1, 3), 0.04)):
            compiled = _every_term(rng, 3, 7, 3, 2, method, "1", False)
            from dataclasses import replace

            compiled = replace(compiled, discount_outcomes=rates[0], discount_costs=rates[1])
            table = weight_table(compiled)
            for t in range(7):
                for j, d in enumerate(compiled.per_cycle_discount()):
                    start_w, end_w = _weights_at(compiled, t, d)
                    expected = np.broadcast_to(
                        np.stack(
                            [np.ravel(x) for x in (start_w, end_w, _discount_power(d, t))],
                            axis=-1,
                        ),
                        (table.shape[0], 3),
                    )
                    np.testing.assert_allclose(
                        table[:, t, 3 * j : 3 * j + 3], expected, rtol=1e-15, atol=0
                    )


def test_lean_solve_keeps_no_action_values_on_either_path():
    compiled = _random_finite(np.random.default_rng(2), 3, 5, 4, 3, tie=True)
    objective = Objective("net_benefit", 1000.0)
    full = solve(compiled, objective)
    for lean in (
        solve(compiled, objective, action_values=False),
        _numpy_path(solve, compiled, objective, action_values=False),
    ):
        assert lean.q_values is None and lean.action_gap is None
        assert lean.next_best_action is None
        np.testing.assert_array_equal(lean.policy, full.policy)
        np.testing.assert_allclose(lean.value, full.value, rtol=1e-12)
        np.testing.assert_array_equal(lean.indifferent, full.indifferent)
        frame = lean.to_frame()
        assert frame["action_gap"].isna().all() and (frame["next_best_action"] == "").all()
    with_history = solve(compiled, objective, action_values=False, record_history=True)
    assert with_history.q_values is None and with_history.history is not None
    np.testing.assert_allclose(with_history.history[0].q_values, full.q_values[:, -1])


def test_lean_solve_option_must_be_true_or_false():
    from caredecide.errors import RunOptionError

    compiled = _random_finite(np.random.default_rng(2), 1, 2, 2, 2, tie=False)
    with pytest.raises(RunOptionError, match="action_values"):
        solve(compiled, Objective("qalys"), action_values="no")


def test_a_row_changed_in_place_is_caught_by_the_fused_evaluation():
    # The fused loops check the rows they read (CompiledModel.check's rule).
    from caredecide.solvers import SolverError

    compiled = _random_finite(np.random.default_rng(4), 2, 3, 3, 2, tie=False)
    policy = np.argmax(compiled.allowed, axis=1)[None, None, :]
    compiled.transition[1, 2, policy[0, 0, 0], 0, 0] += 0.25
    with pytest.raises(SolverError, match=r"transition row of state 's0' .*draw 1, cycle 2"):
        evaluate_policy(compiled, policy, Objective("qalys"))
    with pytest.raises(SolverError, match=r"transition row of state 's0' .*draw 1, cycle 2"):
        solve(compiled, Objective("qalys"))


@settings(max_examples=15, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    T=st.integers(1, 6),
    S=st.integers(2, 5),
    method=st.sampled_from(["start", "end", "trapezoid", "simpson", "half_cycle"]),
    per_draw_rates=st.booleans(),
)
def test_totals_only_equal_the_totals_of_the_full_evaluation(seed, T, S, method, per_draw_rates):
    # policy_totals keeps no trace or flows; its totals must be those of evaluate_policy
    # for each policy (common practice: the same sums accumulated as they are made).
    from caredecide.evaluate import policy_totals

    rng = np.random.default_rng(seed)
    compiled = _every_term(rng, 3, T, S, 2, method, "T", per_draw_rates)
    policies = [
        rng.integers(0, 2, (3, T, S)),  # a policy per draw
        rng.integers(0, 2, (1, T, S)),  # one policy shared by every draw
        1,
    ]
    objective = Objective("net_benefit", 700.0)
    names = ("life_years", "qalys", "costs", "life_years_undiscounted", "qalys_undiscounted",
             "costs_undiscounted", "net_monetary_benefit", "value")  # fmt: skip
    totals = policy_totals(compiled, policies, objective)
    numpy_totals = _numpy_path(policy_totals, compiled, policies, objective)
    for policy, fast, plain in zip(policies, totals, numpy_totals, strict=True):
        alone = evaluate_policy(compiled, policy, objective)
        for name in names:
            np.testing.assert_allclose(getattr(fast, name), getattr(alone, name), rtol=1e-12,
                                       atol=1e-10, err_msg=name)  # fmt: skip
            np.testing.assert_allclose(getattr(plain, name), getattr(alone, name), rtol=1e-12,
                                       atol=1e-10, err_msg=name)  # fmt: skip
