"""Sparse transitions (scipy.sparse) for large models with few moves per state.

Checked against the dense solvers and evaluation, and against quantecon's DiscreteDP in
its state-action-pair form with a sparse transition matrix (a general-purpose reference
library): policy iteration, and backward induction for a finite horizon.
"""

from __future__ import annotations

import warnings
from dataclasses import replace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from quantecon.markov import DiscreteDP
from quantecon.markov import backward_induction as quantecon_backward_induction

from caredecide import evaluate
from caredecide.errors import RunOptionError
from caredecide.evaluate import _QUANTITIES, evaluate_policy
from caredecide.objective import Objective
from caredecide.solvers import SolverError, solve
from caredecide.solvers.sparse import (
    SPARSE_MIN_STATES,
    _block_rows,
    choose_form,
    sparse_trace_and_flows,
)
from tests.test_solvers_models import make_compiled

QALYS = Objective("qalys")


def _sparse_model(S: int, A: int = 2, seed: int = 3, n_cycles=None):
    """Each state moves to itself, the next two states or the last (absorbing) one."""
    rng = np.random.default_rng(seed)
    P = np.zeros((A, S, S))
    for a in range(A):
        for s in range(S - 1):
            targets = [s, min(s + 1, S - 2), min(s + 2, S - 2), S - 1]
            P[a, s, targets] += rng.uniform(0.05, 1.0, 4) * [1.0, 0.5 / (a + 1), 0.2, 0.05]
    P[:, S - 1, S - 1] = 1.0
    P /= P.sum(-1, keepdims=True)
    u = np.linspace(1.0, 0.2, S)
    u[-1] = 0.0
    g = np.zeros((S, A))
    g[:, 1:] = -rng.uniform(0.0, 0.3, (S, A - 1))
    g[-1] = 0.0
    return make_compiled(
        P,
        state_qaly=u,
        decision_qaly=g,
        discount_outcomes=0.04,
        discount_costs=0.04,
        n_cycles=n_cycles,
    )


@pytest.mark.parametrize("method", ["policy_iteration", "value_iteration"])
def test_sparse_matches_dense_and_quantecon(method):
    S, A = SPARSE_MIN_STATES + 20, 2
    compiled = _sparse_model(S, A)
    sparse = solve(compiled, QALYS, method=method, tolerance=1e-10)
    dense = solve(compiled, QALYS, method=method, tolerance=1e-10, transition_form="dense")
    assert sparse.transition_form == "sparse" and dense.transition_form == "dense"
    assert "sparse transitions" in sparse.message
    decided = ~sparse.indifferent & ~dense.indifferent & sparse.decision_states
    np.testing.assert_array_equal(sparse.policy[decided], dense.policy[decided])
    np.testing.assert_allclose(sparse.value, dense.value, rtol=1e-8, atol=1e-8)

    # Reference: quantecon DiscreteDP, state-action pairs with a scipy.sparse Q.
    from scipy import sparse as sp

    P = compiled.transition[0, 0]  # (A, S, S)
    s_idx = np.repeat(np.arange(S), A)
    a_idx = np.tile(np.arange(A), S)
    Q = sp.csr_array(P[a_idx, s_idx])
    R = compiled.state_qaly[0, 0][s_idx] + compiled.decision_qaly[0, 0][s_idx, a_idx]
    reference = DiscreteDP(R, Q, 1 / 1.04, s_idx, a_idx).solve("policy_iteration")
    np.testing.assert_allclose(sparse.value[0, 0], reference.v, rtol=1e-8, atol=1e-8)
    assert (sparse.policy[0, 0][decided[0, 0]] == reference.sigma[decided[0, 0]]).all()


@pytest.mark.parametrize("method", ["policy_iteration", "value_iteration"])
def test_sparse_iterations_with_rewards_on_arrival_equal_dense(method):
    # Trapezoid weights put half of each cycle's occupancy on arrival, so the reward per
    # cycle holds an expectation over the sparse rows too (common practice: the storage
    # form never changes the answer beyond the stopping tolerance); two draws, a masked
    # action, net benefit with costs.
    compiled = replace(
        _finite_sparse_model(SPARSE_MIN_STATES + 15, 4, D=2),
        n_cycles=None,
        discount_costs=0.015,
    )
    objective = Objective("net_benefit", 25_000.0)
    sparse = solve(compiled, objective, method=method, tolerance=1e-12)
    dense = solve(compiled, objective, method=method, tolerance=1e-12, transition_form="dense")
    assert sparse.transition_form == "sparse" and sparse.success
    decided = ~sparse.indifferent & ~dense.indifferent & sparse.decision_states
    np.testing.assert_array_equal(sparse.policy[decided], dense.policy[decided])
    scale = np.abs(dense.value).max()
    np.testing.assert_allclose(sparse.value, dense.value, rtol=0, atol=1e-9 * scale)
    finite = np.isfinite(dense.q_values)
    np.testing.assert_array_equal(finite, np.isfinite(sparse.q_values))
    np.testing.assert_allclose(
        sparse.q_values[finite], dense.q_values[finite], rtol=0, atol=1e-9 * scale
    )


def test_auto_picks_the_form_from_size_density_and_draws():
    small = _sparse_model(12).transition
    large = _sparse_model(SPARSE_MIN_STATES).transition
    assert choose_form(small, "auto") == "dense"  # too few states
    assert choose_form(large, "auto") == "sparse"
    assert choose_form(np.repeat(large, 20, axis=0), "auto") == "dense"  # many draws
    full = np.full_like(large, 1.0 / large.shape[-1])
    assert choose_form(full, "auto") == "dense"  # every entry non-zero
    assert choose_form(small, "sparse") == "sparse"  # asked for


def test_unknown_transition_form_is_refused():
    with pytest.raises(RunOptionError, match="transition_form"):
        solve(_sparse_model(12), QALYS, transition_form="packed")


def test_sparse_form_with_modified_policy_iteration_is_refused():
    with pytest.raises(SolverError, match="modified_policy_iteration"):
        solve(
            _sparse_model(12),
            QALYS,
            method="modified_policy_iteration",
            transition_form="sparse",
        )


def _finite_sparse_model(S, T, *, D=1, A=2, time_varying=False, seed=4, moves=False):
    """A progressive model with 4 non-zeros per row, rewards of every kind, trapezoid
    within-cycle weights (rewards on arrival too) and different discount rates; ``moves``:
    the last action also moves the cohort one state on at the decision (and carries a
    cost per cycle under it)."""
    rng = np.random.default_rng(seed)
    Tp = T if time_varying else 1
    P = np.zeros((D, Tp, A, S, S))
    live = np.arange(S - 1)
    for step, weight in enumerate([1.0, 0.5, 0.2]):
        P[..., live, np.minimum(live + step, S - 2)] += weight * rng.uniform(
            0.05, 1.0, (D, Tp, A, S - 1)
        )
    P[..., live, S - 1] += 0.05 * rng.uniform(0.5, 1.0, (D, Tp, A, S - 1))
    P[..., S - 1, S - 1] = 1.0
    P /= P.sum(-1, keepdims=True)
    allowed = np.ones((S, A), dtype=bool)
    allowed[: S // 3, A - 1] = False  # the last action only from a third of the way on
    u = rng.uniform(0.3, 1.0, (D, 1, S))
    u[..., -1] = 0.0
    extra = {}
    if moves:
        M = np.broadcast_to(np.eye(S), (D, 1, A, S, S)).copy()
        M[:, :, A - 1, live, :] = 0.0
        M[:, :, A - 1, live, np.minimum(live + 1, S - 2)] = 1.0
        P[:, :, A - 1] = M[:, :1, A - 1] @ P[:, :, A - 1]  # the move, then the cycle
        extra = {"move": M, "state_action_cost": rng.uniform(0, 300, (D, 1, S, A))}
    return make_compiled(
        P,
        **extra,
        state_qaly=u,
        state_cost=rng.uniform(0, 500, (D, 1, S)),
        decision_cost=np.concatenate(
            [np.zeros((D, 1, S, 1)), rng.uniform(0, 2000, (D, 1, S, A - 1))], axis=-1
        ),
        decision_qaly=rng.uniform(-0.05, 0.0, (D, 1, S, A)),
        allowed=allowed,
        n_cycles=T,
        start_distribution=np.eye(S)[0],
        discount_outcomes=0.015,
        discount_costs=0.035,
        within_cycle="trapezoid",
    )


@pytest.mark.parametrize("kernels_on", [True, False])
@pytest.mark.parametrize(("time_varying", "moves"), [(False, False), (True, False), (False, True)])
def test_sparse_backward_induction_equals_dense(time_varying, moves, kernels_on):
    # Same recursion, two storage forms (common practice: a storage change never changes
    # the answer beyond rounding): identical policies, values to 1e-10 relative; with and
    # without the compiled loops, decision-time moves and costs under an action.
    from tests.test_kernels import _numpy_path

    compiled = _finite_sparse_model(
        SPARSE_MIN_STATES + 30, 12, D=2, time_varying=time_varying, moves=moves
    )
    objective = Objective("net_benefit", 25_000.0)
    call = solve if kernels_on else lambda *a, **k: _numpy_path(solve, *a, **k)
    sparse = call(compiled, objective, transition_form="sparse", terminal_value=0.0)
    dense = solve(compiled, objective, transition_form="dense")
    assert sparse.transition_form == "sparse" and dense.transition_form == "dense"
    assert "sparse transitions" in sparse.message
    np.testing.assert_array_equal(sparse.policy, dense.policy)
    np.testing.assert_array_equal(sparse.indifferent, dense.indifferent)
    np.testing.assert_array_equal(sparse.next_best_action, dense.next_best_action)
    scale = np.abs(dense.value).max()
    np.testing.assert_allclose(sparse.value, dense.value, rtol=0, atol=1e-10 * scale)
    finite = np.isfinite(dense.q_values)
    np.testing.assert_array_equal(finite, np.isfinite(sparse.q_values))
    np.testing.assert_allclose(
        sparse.q_values[finite], dense.q_values[finite], rtol=0, atol=1e-10 * scale
    )
    assert len(set(sparse.policy[0].ravel().tolist())) > 1  # a real choice was made


def test_sparse_backward_induction_matches_quantecon():
    # Reference: quantecon.markov.backward_induction on DiscreteDP in state-action-pair
    # form with a scipy.sparse transition matrix (no discounting, rewards at the start of
    # each cycle, so its values are ours; beta = 1 only disables its infinite methods).
    from scipy import sparse as sp

    S, A, T = SPARSE_MIN_STATES + 5, 2, 15
    compiled = replace(
        _sparse_model(S, A, seed=9, n_cycles=T), discount_outcomes=0.0, discount_costs=0.0
    )
    result = solve(compiled, QALYS)
    assert result.transition_form == "sparse"  # auto: large, sparse, constant over cycles
    P = compiled.transition[0, 0]
    s_idx, a_idx = np.repeat(np.arange(S), A), np.tile(np.arange(A), S)
    R = compiled.state_qaly[0, 0][s_idx] + compiled.decision_qaly[0, 0][s_idx, a_idx]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        ddp = DiscreteDP(R, sp.csr_array(P[a_idx, s_idx]), 1.0, s_idx, a_idx)
    v, sigma = quantecon_backward_induction(ddp, T)
    np.testing.assert_allclose(result.value[0], v, rtol=1e-12, atol=1e-12)
    decided = ~result.indifferent[0]
    np.testing.assert_array_equal(result.policy[0][decided], sigma[decided])


@pytest.mark.parametrize("kernels_on", [True, False])
@pytest.mark.parametrize(("time_varying", "moves"), [(True, False), (False, True)])
def test_sparse_trace_and_flows_equal_the_dense_evaluation(time_varying, moves, kernels_on):
    # The cohort trace and every flow of the optimal policy, sparse against dense
    # (common practice: same quantities, another storage form); transitions constant over
    # cycles go through the compiled loop, with moves and costs under an action.
    from tests.test_kernels import _numpy_path

    compiled = _finite_sparse_model(
        SPARSE_MIN_STATES + 10, 9, D=2, time_varying=time_varying, moves=moves
    )
    objective = Objective("net_benefit", 25_000.0)
    policy = solve(compiled, objective, transition_form="dense").policy
    dense = evaluate._kernel_outcomes(compiled, [policy], objective, None)[0]
    if kernels_on:
        trace, flows = sparse_trace_and_flows(compiled, policy, _QUANTITIES)
    else:
        trace, flows = _numpy_path(sparse_trace_and_flows, compiled, policy, _QUANTITIES)
    np.testing.assert_allclose(trace, dense.trace, rtol=0, atol=1e-13)
    np.testing.assert_allclose(trace.sum(-1), 1.0, atol=1e-12)  # the cohort is kept
    assert set(flows) == set(dense.flows) | {f"{n}_undiscounted" for n in _QUANTITIES}
    for name, flow in dense.flows.items():
        np.testing.assert_allclose(flows[name], flow, rtol=1e-12, atol=1e-12, err_msg=name)
    np.testing.assert_allclose(flows["qalys"].sum(1), dense.qalys, rtol=1e-12)
    np.testing.assert_allclose(flows["costs_undiscounted"].sum(1), dense.costs_undiscounted)


@pytest.mark.parametrize("compiled_loop", [True, False])
def test_block_rows_put_each_matrix_in_its_own_columns(compiled_loop):
    # One product with the block matrix equals one dense product per block (common
    # practice), whether the compiled loop or scipy reads the dense rows.
    from tests.test_kernels import _numpy_path

    rng = np.random.default_rng(2)
    P = rng.uniform(0, 1, (3, 5, 5)) * (rng.random((3, 5, 5)) < 0.4)
    x = rng.normal(size=(3, 5))
    block = _block_rows(P) if compiled_loop else _numpy_path(_block_rows, P)
    assert block.shape == (15, 15) and block.nnz == np.count_nonzero(P)
    np.testing.assert_allclose(block @ x.ravel(), np.einsum("kij,kj->ki", P, x).ravel())


def test_auto_keeps_dense_for_transitions_that_vary_by_cycle():
    constant = _finite_sparse_model(SPARSE_MIN_STATES, 3)
    varying = _finite_sparse_model(SPARSE_MIN_STATES, 3, time_varying=True)
    assert choose_form(constant.transition, "auto") == "sparse"
    assert choose_form(varying.transition, "auto") == "dense"
    assert solve(varying, QALYS).transition_form == "dense"
    assert solve(constant, QALYS).transition_form == "sparse"


def test_sparse_backward_induction_keeps_no_history():
    compiled = _finite_sparse_model(SPARSE_MIN_STATES, 3)
    with pytest.raises(SolverError, match="record_history"):
        solve(compiled, QALYS, transition_form="sparse", record_history=True)
    kept = solve(compiled, QALYS, record_history=True)  # auto falls back to dense
    assert kept.transition_form == "dense" and len(kept.history) == 3


def test_evaluation_of_a_large_sparse_model_uses_sparse_rows_with_the_same_totals(
    monkeypatch,
):
    # evaluate_policy routes a large, sparse, constant-over-cycles model to the sparse
    # trace; its totals equal the dense fused evaluation and, for the optimal policy, the
    # solver's value of the start distribution (common practice: the value of the optimal
    # policy is the expected total of its cohort).
    compiled = _finite_sparse_model(SPARSE_MIN_STATES + 20, 10, D=2)
    objective = Objective("net_benefit", 25_000.0)
    result = solve(compiled, objective)
    assert result.transition_form == "sparse"
    calls = []
    traced = evaluate.sparse_trace_and_flows
    monkeypatch.setattr(
        evaluate, "sparse_trace_and_flows", lambda *args: calls.append(1) or traced(*args)
    )
    outcome = evaluate_policy(compiled, result.policy, objective)
    assert calls == [1]  # the sparse rows were used
    dense = evaluate._kernel_outcomes(compiled, [result.policy], objective, None)[0]
    np.testing.assert_allclose(outcome.trace, dense.trace, rtol=0, atol=1e-13)
    for name in ("qalys", "costs", "life_years", "value", "costs_undiscounted"):
        np.testing.assert_allclose(getattr(outcome, name), getattr(dense, name), rtol=1e-12)
    np.testing.assert_allclose(
        outcome.value, result.expected_value(compiled.start_distribution), rtol=1e-10
    )


@pytest.mark.parametrize("kernels_on", [True, False])
@pytest.mark.parametrize(
    ("n_cycles", "method"),
    [(None, "policy_iteration"), (None, "value_iteration"), (6, "backward_induction")],
)
def test_a_bad_row_is_caught_as_the_sparse_rows_are_read(kernels_on, n_cycles, method):
    # The rows are checked while the dense arrays are read into sparse form (no separate
    # pass): the message of the compiled-model check, naming state, action, draw, cycle.
    from tests.test_kernels import _numpy_path

    compiled = replace(
        _finite_sparse_model(SPARSE_MIN_STATES, 6, D=2), n_cycles=n_cycles, discount_costs=0.015
    )
    compiled.transition[1, 0, 0, 7, 7] += 0.5  # arrays stay writable: solve checks again
    pattern = (
        r"transition row of state 's7' under action 'a0' \(draw 1, cycle 0\) sums to 1\.(5|49999)"
    )
    call = solve if kernels_on else lambda *a, **k: _numpy_path(solve, *a, **k)
    with pytest.raises(SolverError, match=pattern):
        call(compiled, QALYS, method=method, transition_form="sparse")
    if n_cycles is not None:  # the evaluation of a policy reads the same sparse rows
        with pytest.raises(SolverError, match=pattern):
            evaluate_policy(compiled, 0, QALYS)


@pytest.mark.parametrize("kernels_on", [True, False])
def test_the_base_case_reads_the_dense_transitions_into_sparse_rows_once(kernels_on, monkeypatch):
    # solve_and_evaluate hands the solver's checked sparse rows to the evaluation (an
    # explicit hand-off): the dense transitions are read into CSR once per base case, and
    # the answers are those of the dense form (common practice: a storage change never
    # changes the answer beyond rounding): identical policies, values and totals to 1e-10.
    from caredecide import batch
    from caredecide.solvers import sparse
    from tests.test_kernels import _numpy_path

    compiled = _finite_sparse_model(SPARSE_MIN_STATES + 20, 10, D=2, moves=True)
    objective = Objective("net_benefit", 25_000.0)
    reads = []
    read = sparse._csr
    monkeypatch.setattr(sparse, "_csr", lambda *a, **k: reads.append(1) or read(*a, **k))
    run = batch.solve_and_evaluate
    done = (
        run(None, objective, compiled=compiled)
        if kernels_on
        else _numpy_path(run, None, objective, compiled=compiled)
    )
    assert len(reads) == 1
    assert done.solution.transition_form == "sparse"
    assert done.solution.transition_rows.shape == (2 * 2 * compiled.n_states, compiled.n_states)
    dense = solve(compiled, objective, transition_form="dense")
    dense_outcome = evaluate._kernel_outcomes(compiled, [dense.policy], objective, None)[0]
    np.testing.assert_array_equal(done.solution.policy, dense.policy)
    scale = np.abs(dense.value).max()
    np.testing.assert_allclose(done.solution.value, dense.value, rtol=0, atol=1e-10 * scale)
    np.testing.assert_allclose(done.outcome.trace, dense_outcome.trace, rtol=0, atol=1e-13)
    for name in ("qalys", "costs", "life_years", "value", "costs_undiscounted"):
        expected = getattr(dense_outcome, name)
        np.testing.assert_allclose(
            getattr(done.outcome, name), expected, rtol=0, atol=1e-10 * np.abs(expected).max()
        )
    reads.clear()  # without the hand-off the evaluation reads the rows a second time
    evaluate_policy(compiled, done.solution.policy, objective)
    assert len(reads) == 1


def test_a_dense_base_case_reads_no_sparse_rows(monkeypatch):
    # transition_form="dense" holds for the whole base case: the evaluation follows the
    # solver's form (and reads no CSR), with the totals of the sparse base case.
    from caredecide import batch
    from caredecide.solvers import sparse

    compiled = _finite_sparse_model(SPARSE_MIN_STATES, 4)
    assert solve(compiled, QALYS).transition_rows is not None  # auto: sparse
    auto = batch.solve_and_evaluate(None, QALYS, compiled=compiled)
    reads = []
    read = sparse._csr
    monkeypatch.setattr(sparse, "_csr", lambda *a, **k: reads.append(1) or read(*a, **k))
    done = batch.solve_and_evaluate(None, QALYS, compiled=compiled, transition_form="dense")
    assert reads == [] and done.solution.transition_rows is None
    np.testing.assert_allclose(done.outcome.qalys, auto.outcome.qalys, rtol=1e-12)
    np.testing.assert_allclose(done.outcome.trace, auto.outcome.trace, rtol=0, atol=1e-13)


def test_transition_rows_of_another_shape_are_refused():
    # One error test per validation rule: rows read from another model (or draws).
    from caredecide.solvers.sparse import transition_rows

    compiled = _finite_sparse_model(SPARSE_MIN_STATES, 4, D=2)
    other = transition_rows(_finite_sparse_model(SPARSE_MIN_STATES, 4, D=1))
    with pytest.raises(SolverError, match=r"transition_rows has shape \(600, 300\); expected"):
        evaluate_policy(compiled, 0, QALYS, transition_rows=other)


def test_transition_rows_need_transitions_constant_over_cycles():
    from caredecide.solvers.sparse import transition_rows

    varying = _finite_sparse_model(SPARSE_MIN_STATES, 3, time_varying=True)
    with pytest.raises(SolverError, match="constant over the cycles; the time axis has length 3"):
        transition_rows(varying)


@pytest.mark.parametrize("step_back", [False, True])
def test_policy_values_by_back_substitution_equal_a_dense_solve(step_back):
    # Progressive rows (moves to the same or later states): exact values by back
    # substitution over the CSR rows; with a step back the sparse LU instead. Both against
    # numpy.linalg.solve of (I - gamma P_pi) v = r_pi on the dense rows (common practice).
    from caredecide.solvers.sparse import _csr, _policy_values
    from tests.test_kernels import _numpy_path

    S, A, gamma = 40, 2, 0.97
    rng = np.random.default_rng(5)
    P = np.triu(rng.uniform(0, 1, (A, S, S)) * (rng.random((A, S, S)) < 0.2))
    P[:, np.arange(S), np.arange(S)] += 0.5
    if step_back:
        P[1, 10, 9] = 0.3  # action 1 moves state 10 back to state 9
    P /= P.sum(-1, keepdims=True)
    R = rng.normal(size=(A, S))
    policy = np.ones(S, dtype=np.intp)
    rows = _csr(P.reshape(A * S, S), 0)
    chosen = P[policy, np.arange(S)]
    expected = np.linalg.solve(np.eye(S) - gamma * chosen, R[policy, np.arange(S)])
    np.testing.assert_allclose(_policy_values(rows, R, gamma, policy), expected, rtol=1e-12)
    np.testing.assert_allclose(
        _numpy_path(_policy_values, rows, R, gamma, policy), expected, rtol=1e-12
    )
    from caredecide.solvers import kernels

    v = np.empty(S)
    upper = kernels.sparse_kernels().upper_substitution(
        rows.indptr, rows.indices, rows.data, policy * S + np.arange(S),
        R[policy, np.arange(S)], gamma, v,
    )  # fmt: skip
    assert upper is (not step_back)  # substitution only for rows without a move back


def test_infinite_horizon_evaluation_with_sparse_rows_equals_the_dense_one(monkeypatch):
    # A large model with few moves per state: the display trace, the linear solves of the
    # totals (discounted, and undiscounted on the transient states) and the classes of
    # states go by the policy's CSR rows, no dense (S, S) matrix built; same trace and
    # totals as the dense arrays (common practice: a storage change never changes the
    # answer beyond rounding), and the discounted value equals the solver's value of the
    # start state.
    compiled = _sparse_model(SPARSE_MIN_STATES + 30, seed=6)
    result = solve(compiled, QALYS)
    assert result.transition_form == "sparse"
    used = []
    dense_rows = evaluate._policy_transition
    monkeypatch.setattr(evaluate, "_policy_transition", lambda *a: used.append(1) or dense_rows(*a))
    outcome = evaluate_policy(compiled, result.policy, QALYS)
    assert used == []  # no dense policy matrix
    dense = evaluate_policy(compiled, result.policy, QALYS, transition_form="dense")
    assert used == [1]  # the dense reference built one
    np.testing.assert_allclose(outcome.trace, dense.trace, rtol=0, atol=1e-13)
    for name in ("qalys", "life_years", "qalys_undiscounted", "life_years_undiscounted"):
        np.testing.assert_allclose(getattr(outcome, name), getattr(dense, name), rtol=1e-10)
    assert np.isfinite(outcome.qalys_undiscounted).all() and outcome.qalys_undiscounted[0] > 0
    np.testing.assert_allclose(
        outcome.value, result.expected_value(compiled.start_distribution), rtol=1e-9
    )


@settings(max_examples=60, deadline=None)
@given(
    rows=st.integers(1, 40),
    width=st.integers(1, 70),
    density=st.floats(0.0, 1.0),
    block=st.integers(0, 3),
    seed=st.integers(0, 2**16),
)
def test_dense_rows_read_into_the_same_csr_as_scipy(rows, width, density, block, seed):
    # Reference: scipy.sparse.csr_array of the same dense rows (a general-purpose
    # library): the same row pointers, columns and values, in order; with block > 0 row k
    # moves to the columns of block k // block. Widths below, at and past the 16-entry
    # scan and densities up to full rows (the output grows past its first guess).
    from scipy import sparse

    from caredecide.solvers import kernels
    from caredecide.solvers.sparse import ROW_SUM_TOLERANCE

    if not kernels.available():
        pytest.skip("compiled loops not installed")
    if block:
        rows -= rows % block
        if not rows:
            rows = block
    rng = np.random.default_rng(seed)
    P = np.where(rng.random((rows, width)) < density, rng.random((rows, width)), 0.0)
    sums = P.sum(axis=1)
    P[sums > 0] /= sums[sums > 0, None]  # rows of zeros stay: they do not sum to 1
    checked = rng.random(rows) < 0.5
    bad = np.full(1, -1, dtype=np.int64)
    indptr, indices, data = kernels.sparse_kernels().csr_from_dense(
        P, block, checked, ROW_SUM_TOLERANCE, bad
    )
    expected = sparse.csr_array(P)
    np.testing.assert_array_equal(indptr, expected.indptr)
    shift = (np.arange(rows) // block * width if block else np.zeros(rows, int)).repeat(
        np.diff(expected.indptr)
    )
    np.testing.assert_array_equal(indices, expected.indices + shift)
    np.testing.assert_array_equal(data, expected.data)
    off = np.flatnonzero(checked & (np.abs(P.sum(axis=1) - 1.0) > ROW_SUM_TOLERANCE))
    assert bad[0] == (off[0] if off.size else -1)
