"""Sparse transitions (scipy.sparse) for large models with few moves per state.

Checked against the dense solvers and against quantecon's DiscreteDP in its
state-action-pair form with a sparse transition matrix (a general-purpose reference
library).
"""

from __future__ import annotations

import numpy as np
import pytest
from quantecon.markov import DiscreteDP

from caredecide.errors import RunOptionError
from caredecide.objective import Objective
from caredecide.solvers import SolverError, solve
from caredecide.solvers.sparse import SPARSE_MIN_STATES, choose_form
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


def test_sparse_form_for_a_finite_horizon_is_refused():
    with pytest.raises(SolverError, match="infinite horizon"):
        solve(_sparse_model(12, n_cycles=5), QALYS, transition_form="sparse")


def test_sparse_form_with_modified_policy_iteration_is_refused():
    with pytest.raises(SolverError, match="modified_policy_iteration"):
        solve(
            _sparse_model(12),
            QALYS,
            method="modified_policy_iteration",
            transition_form="sparse",
        )
