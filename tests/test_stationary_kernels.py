"""Compiled loops of the infinite-horizon solvers against the numpy path and quantecon.

The loops (:mod:`caredecide.solvers._stationary_loops`) build each draw's rewards, iterate
and write the final action values; exact policy evaluation goes by substitution when the
policy's moves form no cycle and by an LU factorisation otherwise.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from quantecon.markov import DiscreteDP

from caredecide.objective import Objective
from caredecide.solvers import SolverError, kernels, solve
from tests.test_kernels import _numpy_path
from tests.test_solvers_models import make_compiled

pytestmark = pytest.mark.skipif(not kernels.available(), reason="numba is not installed")

QALYS = Objective("qalys")


def _model(rng, D, S, A, *, progressive: bool, within: str, order=None):
    """Random stationary model; ``progressive``: moves only to later states of ``order``."""
    P = rng.uniform(0, 1, (D, 1, A, S, S)) * (rng.random((D, 1, A, S, S)) < 0.6)
    if progressive:
        P = np.triu(P)  # s -> s' >= s only (in the order before the permutation)
    P[..., np.arange(S), np.arange(S)] += 0.05
    P /= P.sum(-1, keepdims=True)
    if order is not None:  # relabel the states: the system is triangular only once reordered
        P = P[..., order, :][..., order]
    allowed = rng.random((S, A)) < 0.7
    allowed[np.arange(S), rng.integers(0, A, S)] = True
    return make_compiled(
        P,
        state_qaly=rng.uniform(0, 1, (D, 1, S)),
        state_cost=rng.uniform(0, 100, (D, 1, S)),
        decision_qaly=rng.uniform(-0.2, 0, (D, 1, S, A)),
        decision_cost=rng.uniform(0, 50, (D, 1, S, A)),
        allowed=allowed,
        discount_outcomes=0.04,
        discount_costs=0.04,
        within_cycle=within,
    )


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    D=st.integers(1, 3),
    S=st.integers(1, 60),
    A=st.integers(1, 3),
    progressive=st.booleans(),
    shuffled=st.booleans(),
    within=st.sampled_from(["start", "end", "trapezoid", "half_cycle"]),
    method=st.sampled_from(["policy_iteration", "value_iteration"]),
)
def test_stationary_kernels_match_numpy_path(seed, D, S, A, progressive, shuffled, within, method):
    # Same algorithm, two implementations (common practice: a compiled loop checked against
    # the vectorised version it replaces). S up to 60 crosses the BLAS switch (48 states);
    # "end"/"trapezoid"/"half_cycle" give end-of-cycle rewards (the reward's expectation).
    rng = np.random.default_rng(seed)
    order = rng.permutation(S) if shuffled else None
    compiled = _model(rng, D, S, A, progressive=progressive, within=within, order=order)
    objective = Objective("net_benefit", 1000.0)
    fast = solve(compiled, objective, method=method, tolerance=1e-11)
    plain = _numpy_path(solve, compiled, objective, method=method, tolerance=1e-11)
    assert fast.success and plain.success
    decided = ~fast.indifferent & ~plain.indifferent & fast.decision_states
    np.testing.assert_array_equal(fast.policy[decided], plain.policy[decided])
    scale = np.abs(plain.value).max()
    np.testing.assert_allclose(fast.value, plain.value, rtol=0, atol=1e-9 * scale)
    allowed = np.broadcast_to(compiled.allowed, fast.q_values.shape)
    np.testing.assert_allclose(
        fast.q_values[allowed], plain.q_values[allowed], rtol=0, atol=1e-9 * scale
    )
    assert np.isneginf(fast.q_values[~allowed]).all()


@pytest.mark.parametrize("cyclic", [False, True])
def test_policy_values_by_substitution_or_lu_match_quantecon(cyclic):
    # Reference: quantecon.markov.DiscreteDP policy iteration (exact evaluation by a dense
    # linear solve). A progressive chain with its states listed out of order is triangular
    # only after reordering (substitution path); one move back to the first state makes a
    # cycle (LU path).
    rng = np.random.default_rng(5)
    S, A = 80, 2
    P = np.triu(rng.uniform(0, 1, (A, S, S)) * (rng.random((A, S, S)) < 0.1))
    P[:, np.arange(S), np.arange(S)] += 0.5
    if cyclic:
        P[:, S - 1, 0] += 0.2
    P /= P.sum(-1, keepdims=True)
    order = rng.permutation(S)
    P = P[:, order][:, :, order]
    u = rng.uniform(0, 1, S)
    g = np.zeros((S, A))
    g[:, 1] = rng.uniform(-0.2, 0.1, S)
    compiled = make_compiled(
        P, state_qaly=u, decision_qaly=g, discount_outcomes=0.03, discount_costs=0.03
    )
    result = solve(compiled, QALYS, method="policy_iteration")
    reference = DiscreteDP(u[:, None] + g, P.transpose(1, 0, 2), 1 / 1.03).solve("policy_iteration")
    np.testing.assert_allclose(result.value[0, 0], reference.v, rtol=1e-12, atol=1e-12)
    decided = ~result.indifferent[0, 0]
    np.testing.assert_array_equal(result.policy[0, 0][decided], reference.sigma[decided])


def test_substitution_refuses_a_cycle_and_solves_a_chain():
    # v = r + gamma P v on a 3-state chain 0 -> 1 -> 2 (2 absorbing) by hand (common
    # practice: back substitution from the absorbing state): v2 = 1 / (1 - 0.9) = 10,
    # v1 = (1 + 0.9 (0.5 v1' ...)) written out below; a move 2 -> 0 makes a cycle.
    loops = kernels.stationary_kernels()
    gamma = 0.9
    system = np.array([[0.5, 0.5, 0.0], [0.0, 0.5, 0.5], [0.0, 0.0, 1.0]])
    reward = np.array([1.0, 2.0, 1.0])
    v = np.full(3, np.nan)  # states not yet solved must not be read (0 * nan = nan)
    work = np.empty(3, dtype=np.intp), np.empty(3, dtype=np.intp)
    assert loops.by_substitution(system, reward, gamma, *work, v)
    v2 = 1.0 / (1 - gamma)
    v1 = (2.0 + gamma * 0.5 * v2) / (1 - gamma * 0.5)
    v0 = (1.0 + gamma * 0.5 * v1) / (1 - gamma * 0.5)
    np.testing.assert_allclose(v, [v0, v1, v2], rtol=1e-15)
    np.testing.assert_allclose(v, np.linalg.solve(np.eye(3) - gamma * system, reward))
    system[2] = [0.3, 0.0, 0.7]
    assert not loops.by_substitution(system, reward, gamma, *work, v)


@pytest.mark.parametrize("method", ["policy_iteration", "value_iteration"])
@pytest.mark.parametrize("kernels_on", [True, False])
def test_a_row_changed_in_place_is_caught_on_every_infinite_horizon_path(method, kernels_on):
    # The compiled loops check the rows as they read them (the numpy path checks them
    # before): the same message either way, naming state, action, draw and the sum.
    rng = np.random.default_rng(1)
    compiled = _model(rng, 3, 5, 2, progressive=False, within="start")
    compiled.transition[2, 0, 1, 3, 0] += 0.25  # arrays stay writable: solve checks again
    pattern = r"transition row of state 's3' under action 'a1' \(draw 2, cycle 0\) sums to 1\.25"
    call = solve if kernels_on else lambda *a, **k: _numpy_path(solve, *a, **k)
    with pytest.raises(SolverError, match=pattern):
        call(compiled, QALYS, method=method)
