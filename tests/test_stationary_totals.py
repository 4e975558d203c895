"""Infinite-horizon totals of a stationary policy, dense arrays and CSR rows.

The sparse chain (the policy's rows gathered from the CSR rows, sparse LU, classes of
states by ``scipy.sparse.csgraph``) against the dense chain on random sparse models, and
both against independent references computed here from the compiled arrays:

* discounted totals: ``numpy.linalg.solve`` of ``(I - gamma P_pi) v = r_pi`` (the policy
  evaluation equation; common practice, Puterman 1994, Markov Decision Processes, Theorem
  6.1.1);
* undiscounted totals of an absorbing chain: the fundamental matrix ``N = (I - Q)^-1``
  gives the expected cycles in each transient state, ``N r`` the expected total (Kemeny &
  Snell 1960, Finite Markov Chains, ch. 3; Grinstead & Snell 1997, Introduction to
  Probability, ch. 11).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide import batch, evaluate
from caredecide.evaluate import evaluate_policy
from caredecide.objective import Objective
from caredecide.solvers.sparse import SPARSE_MIN_STATES, transition_rows
from caredecide.stationary_totals import SparseChain, chain_classes
from tests.test_solvers_models import make_compiled

QALYS = Objective("qalys")
TOTALS = (*evaluate._FLOW_NAMES, "net_monetary_benefit", "value")


def _random_sparse(rng, S, A, D, per_row, closed_loop):
    """(D, A, S, S) transitions with at most ``per_row`` non-zeros per row; the last state
    absorbing; with ``closed_loop`` two states that swap forever (a closed class that is
    not one absorbing state)."""
    P = np.zeros((D, A, S, S))
    for d in range(D):
        for a in range(A):
            for s in range(S - 1):
                targets = rng.choice(S, size=min(per_row, S), replace=False)
                P[d, a, s, targets] = rng.uniform(0.05, 1.0, targets.size)
    P[:, :, S - 1, S - 1] = 1.0
    if closed_loop and S >= 4:
        P[:, :, 0] = 0.0
        P[:, :, 1] = 0.0
        P[:, :, 0, 1] = 1.0
        P[:, :, 1, 0] = 1.0
    return P / P.sum(-1, keepdims=True)


def _compiled(P, rng, rate, start, signed):
    D, A, S = P.shape[0], P.shape[1], P.shape[-1]
    u = rng.uniform(-1.0 if signed else 0.0, 1.0, (D, 1, S))
    c = rng.uniform(0.0, 100.0, (D, 1, S))
    g = rng.uniform(-0.5, 0.5, (D, 1, S, A))
    u[..., -1] = c[..., -1] = g[..., -1, :] = 0.0
    return make_compiled(
        P[:, None],
        state_qaly=u,
        state_cost=c,
        decision_qaly=g,
        discount_outcomes=rate,
        discount_costs=rate,
        start_distribution=start,
        absorbing=np.arange(S) == S - 1,
    )


@pytest.mark.filterwarnings("ignore:invalid value encountered:RuntimeWarning")  # inf - inf
@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    S=st.integers(2, 30),
    A=st.integers(1, 3),
    D=st.integers(1, 3),
    per_row=st.integers(1, 4),
    rate=st.sampled_from([0.0, 0.035, 0.3]),
    closed_loop=st.booleans(),
    signed=st.booleans(),
)
def test_sparse_and_dense_infinite_horizon_evaluations_agree(
    seed, S, A, D, per_row, rate, closed_loop, signed
):
    # Invariant (common practice: a storage change never changes the answer beyond
    # rounding): the same display trace and every total, +inf/-inf/NaN included (closed
    # classes that keep earning, opposite signs), from CSR rows as from dense arrays.
    rng = np.random.default_rng(seed)
    P = _random_sparse(rng, S, A, D, per_row, closed_loop)
    start = rng.dirichlet(np.ones(S))
    compiled = _compiled(P, rng, rate, start, signed)
    policy = rng.integers(0, A, (D, 1, S))
    objective = Objective("net_benefit", 1000.0)
    sparse = evaluate_policy(compiled, policy, objective, transition_form="sparse")
    dense = evaluate_policy(compiled, policy, objective, transition_form="dense")
    np.testing.assert_allclose(sparse.trace, dense.trace, rtol=0, atol=1e-13)
    for name in TOTALS:
        got, expected = getattr(sparse, name), getattr(dense, name)
        np.testing.assert_array_equal(np.isnan(got), np.isnan(expected), err_msg=name)
        np.testing.assert_array_equal(np.isinf(got), np.isinf(expected), err_msg=name)
        infinite, finite = np.isinf(expected), np.isfinite(expected)
        np.testing.assert_array_equal(got[infinite], expected[infinite], err_msg=name)
        np.testing.assert_allclose(
            got[finite], expected[finite], rtol=1e-10, atol=1e-10, err_msg=name
        )
    for name in sparse.flows:
        np.testing.assert_allclose(sparse.flows[name], dense.flows[name], rtol=1e-10, atol=1e-12)


@settings(max_examples=30, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    S=st.integers(2, 25),
    A=st.integers(1, 3),
    per_row=st.integers(1, 4),
    rate=st.sampled_from([0.01, 0.035, 0.3]),
)
def test_both_forms_equal_a_direct_solve_and_the_fundamental_matrix(seed, S, A, per_row, rate):
    # Discounted totals = start . solve(I - gamma P_pi, r_pi) (numpy.linalg.solve; Puterman
    # 1994, Theorem 6.1.1). Undiscounted totals of the absorbing chain (every state can
    # reach the absorbing last state, which earns nothing) = start . N r on the transient
    # states, N = (I - Q)^-1 the fundamental matrix (Kemeny & Snell 1960, ch. 3).
    rng = np.random.default_rng(seed)
    P = _random_sparse(rng, S, A, 1, per_row, closed_loop=False)
    P[..., :-1, -1] += 0.02  # every transient state leaves for the absorbing state
    P /= P.sum(-1, keepdims=True)
    start = rng.dirichlet(np.ones(S))
    compiled = _compiled(P, rng, rate, start, signed=True)
    policy = rng.integers(0, A, S)
    P_pi = P[0, policy, np.arange(S)]  # (S, S)
    u, c = compiled.state_qaly[0, 0], compiled.state_cost[0, 0]
    q = u + compiled.decision_qaly[0, 0][np.arange(S), policy]  # start-of-cycle counting
    gamma = 1.0 / (1.0 + rate)
    discounted = start @ np.linalg.solve(np.eye(S) - gamma * P_pi, q)
    costs = start @ np.linalg.solve(np.eye(S) - gamma * P_pi, c)
    N = np.linalg.inv(np.eye(S - 1) - P_pi[:-1, :-1])  # transient states: all but the last
    undiscounted = start[:-1] @ N @ q[:-1]
    life_years = start[:-1] @ N @ np.ones(S - 1)
    for form in ("dense", "sparse"):
        outcome = evaluate_policy(compiled, policy, QALYS, transition_form=form)
        assert outcome.qalys[0] == pytest.approx(discounted, rel=1e-10, abs=1e-12)
        assert outcome.costs[0] == pytest.approx(costs, rel=1e-10, abs=1e-12)
        assert outcome.qalys_undiscounted[0] == pytest.approx(undiscounted, rel=1e-9, abs=1e-10)
        assert outcome.life_years_undiscounted[0] == pytest.approx(life_years, rel=1e-10)


@pytest.mark.parametrize("form", ["dense", "sparse"])
def test_times_to_absorption_of_a_symmetric_walk(form):
    # A walk on 0..4 moving one step left or right with probability 1/2, absorbed at 0
    # and 4: expected steps before absorption t = N 1 = (3, 4, 3) from states 1, 2, 3
    # (Grinstead & Snell 1997, Introduction to Probability, ch. 11, from memory: the absorbing-chain
    # example of a random walk with absorbing ends; the closed form i (4 - i)).
    P = np.zeros((1, 5, 5))
    P[0, 0, 0] = P[0, 4, 4] = 1.0
    for i in (1, 2, 3):
        P[0, i, i - 1] = P[0, i, i + 1] = 0.5
    for first, expected in ((1, 3.0), (2, 4.0), (3, 3.0)):
        compiled = make_compiled(
            P,
            start_distribution=np.eye(5)[first],
            absorbing=[True, False, False, False, True],
        )
        outcome = evaluate_policy(compiled, 0, QALYS, transition_form=form)
        assert outcome.life_years_undiscounted[0] == pytest.approx(expected, rel=1e-12)


def test_classes_of_states_from_csr_rows():
    # Hand-worked: 0 -> 1 -> 2 <-> 3 (a closed pair), 4 absorbing and never reached,
    # 5 -> 4. Strong components {0}, {1}, {2, 3}, {4}, {5}; closed: {2, 3} and {4}.
    from scipy import sparse

    edges = [(0, 1), (1, 2), (2, 3), (3, 2), (4, 4), (5, 4), (0, 0)]
    graph = sparse.csr_array(
        (np.ones(len(edges)), ([e[0] for e in edges], [e[1] for e in edges])), shape=(6, 6)
    )
    label, closed, reach = chain_classes(graph, np.eye(6, dtype=bool)[0])
    assert label[2] == label[3] and len(set(label.tolist())) == 5
    closed_sets = {frozenset(np.flatnonzero(label == k).tolist()) for k in np.flatnonzero(closed)}
    assert closed_sets == {frozenset({2, 3}), frozenset({4})}
    np.testing.assert_array_equal(reach, [True, True, True, True, False, False])


def test_sparse_chain_gathers_the_policy_rows_of_each_draw():
    # The rows of draw d and action pi(s) for state s, no dense matrix: equal to the dense
    # rows P[d, pi(s), s] (common practice: a gather of rows).
    rng = np.random.default_rng(4)
    P = _random_sparse(rng, 7, 3, 2, 3, closed_loop=False)
    compiled = _compiled(P, rng, 0.035, np.eye(7)[0], signed=False)
    policy = rng.integers(0, 3, (2, 7))
    chain = SparseChain(transition_rows(compiled), policy, 3)
    for d in range(2):
        np.testing.assert_array_equal(chain.P[d].toarray(), P[d, policy[d], np.arange(7)])


@pytest.mark.parametrize("method", ["policy_iteration", "value_iteration"])
def test_the_infinite_horizon_base_case_reads_the_rows_once(method, monkeypatch):
    # The sparse solve hands its checked CSR rows to the evaluation
    # (PolicyResult.transition_rows): the dense transitions are read into CSR once per
    # base case and no dense policy matrix is built; the answers equal the dense base
    # case (common practice: a storage change never changes the answer beyond rounding).
    from caredecide.solvers import sparse as sparse_module
    from tests.test_sparse_solver import _sparse_model

    compiled = _sparse_model(SPARSE_MIN_STATES + 10, seed=8)
    objective = QALYS
    dense = batch.solve_and_evaluate(
        None, objective, compiled=compiled, method=method, transition_form="dense"
    )
    reads, gathers = [], []
    read, gather = sparse_module._csr, evaluate._policy_transition
    monkeypatch.setattr(sparse_module, "_csr", lambda *a, **k: reads.append(1) or read(*a, **k))
    monkeypatch.setattr(evaluate, "_policy_transition", lambda *a: gathers.append(1) or gather(*a))
    done = batch.solve_and_evaluate(None, objective, compiled=compiled, method=method)
    assert done.solution.transition_form == "sparse"
    assert done.solution.transition_rows.shape == (2 * compiled.n_states, compiled.n_states)
    assert len(reads) == 1 and gathers == []
    decided = ~done.solution.indifferent & ~dense.solution.indifferent
    np.testing.assert_array_equal(done.solution.policy[decided], dense.solution.policy[decided])
    np.testing.assert_allclose(done.outcome.trace, dense.outcome.trace, rtol=0, atol=1e-12)
    for name in TOTALS:
        np.testing.assert_allclose(
            getattr(done.outcome, name), getattr(dense.outcome, name), rtol=1e-9
        )


@pytest.mark.parametrize("n_cycles", [None, 5])
def test_several_policies_read_the_rows_once(n_cycles, monkeypatch):
    # evaluate_policies of a model kept sparse reads the dense transitions into CSR once
    # for all the policies, with the outcomes of one call per policy (common practice:
    # the same rows give the same answers).
    from dataclasses import replace

    from caredecide.evaluate import evaluate_policies
    from caredecide.solvers import sparse as sparse_module
    from tests.test_sparse_solver import _sparse_model

    compiled = replace(_sparse_model(SPARSE_MIN_STATES + 5, seed=9), n_cycles=n_cycles)
    policies = [0, 1, np.arange(compiled.n_states) % 2]
    alone = [evaluate_policy(compiled, p, QALYS) for p in policies]
    reads = []
    read = sparse_module._csr
    monkeypatch.setattr(sparse_module, "_csr", lambda *a, **k: reads.append(1) or read(*a, **k))
    together = evaluate_policies(compiled, policies, QALYS)
    assert len(reads) == 1
    for one, joint in zip(alone, together, strict=True):
        np.testing.assert_array_equal(joint.trace, one.trace)
        for name in TOTALS:
            np.testing.assert_array_equal(getattr(joint, name), getattr(one, name))
