"""Sparse transitions for large state spaces with few moves per state (scipy.sparse).

Progressive models and tunnel states give transition rows with a handful of non-zeros
among thousands of states. For the base case and one-way analyses (a few draws) the
iterative solvers then store each draw's ``P`` (A S, S) in compressed sparse rows and:

* policy iteration solves ``(I - gamma P_pi) v = r_pi`` with a sparse LU
  (``scipy.sparse.linalg.spsolve``), ``P_pi`` being the policy's rows of the CSR matrix;
* value iteration sweeps ``v <- max_a r + gamma P v`` with a sparse product.

Stopping rules, the keep-the-current-action rule and the results are those of
:mod:`caredecide.solvers.stationary`. :func:`choose_form` picks the form from the size and
the density; the result's ``transition_form`` says which one was used.
"""

from __future__ import annotations

import numpy as np

from caredecide.solvers.bellman import SolverError

TRANSITION_FORMS = ("auto", "dense", "sparse")
SPARSE_MIN_STATES = 300
"""Below this many states dense arrays (and the compiled loops) are faster."""
SPARSE_MAX_DENSITY = 0.05
"""Largest share of non-zero transition entries for the sparse form."""
SPARSE_MAX_DRAWS = 16
"""Sparse factorisations go draw by draw: for many draws the dense batches win."""


def choose_form(transition: np.ndarray, requested: str) -> str:
    """``"dense"`` or ``"sparse"`` for transitions (D, Tp, A, S, S) and a requested form.

    ``"auto"``: sparse when there are at least :data:`SPARSE_MIN_STATES` states, at most
    :data:`SPARSE_MAX_DRAWS` draws and a share of non-zeros of at most
    :data:`SPARSE_MAX_DENSITY` (counted on the first draw).
    """
    if requested not in TRANSITION_FORMS:
        raise SolverError(
            f"transition_form = {requested!r} is not allowed; expected one of {TRANSITION_FORMS}"
        )
    if requested != "auto":
        return requested
    D, S = transition.shape[0], transition.shape[-1]
    if S < SPARSE_MIN_STATES or D > SPARSE_MAX_DRAWS:
        return "dense"
    density = np.count_nonzero(transition[0]) / transition[0].size
    return "sparse" if density <= SPARSE_MAX_DENSITY else "dense"


def _rows(P: np.ndarray):
    """CSR matrix (A S, S) of one draw's stationary transitions (A, S, S)."""
    from scipy import sparse

    A, S = P.shape[0], P.shape[1]
    return sparse.csr_array(P.reshape(A * S, S))


def sparse_iterate(
    P: np.ndarray,
    R: np.ndarray,
    gamma: float,
    method: str,
    tolerance: float,
    relative: bool,
    max_iterations: int,
) -> tuple[np.ndarray, int, np.ndarray, bool]:
    """Policy or value iteration with sparse transitions, draw by draw.

    Parameters
    ----------
    P : (D, A, S, S) float
        Dense transitions (read once per draw into CSR).
    R : (D, A, S) float
        Rewards per cycle, ``-inf`` where not allowed.
    gamma, method, tolerance, relative, max_iterations
        As in :func:`caredecide.solvers.stationary.solve_stationary`.

    Returns
    -------
    v (D, S), iterations (largest over draws), residual (D,), converged (all draws)
    """
    D, S = R.shape[0], R.shape[2]
    v = np.empty((D, S))
    residual = np.empty(D)
    sweeps = np.zeros(D, dtype=int)
    done = np.zeros(D, dtype=bool)
    for d in range(D):
        rows = _rows(P[d])
        if method == "policy_iteration":
            v[d], sweeps[d], residual[d], done[d] = _policy_iteration(
                rows, R[d], gamma, max_iterations
            )
        else:
            v[d], sweeps[d], residual[d], done[d] = _value_iteration(
                rows, R[d], gamma, tolerance, relative, max_iterations
            )
    return v, int(sweeps.max(initial=0)), residual, bool(done.all())


def _policy_values(rows, R: np.ndarray, gamma: float, policy: np.ndarray) -> np.ndarray:
    from scipy import sparse
    from scipy.sparse.linalg import spsolve

    S = R.shape[1]
    chosen = policy * S + np.arange(S)
    system = sparse.eye_array(S, format="csc") - gamma * rows[chosen].tocsc()
    return np.asarray(spsolve(system, R[policy, np.arange(S)]), dtype=float)


def _policy_iteration(rows, R, gamma, max_iterations):
    A, S = R.shape
    policy = R.argmax(axis=0)
    for n in range(1, max_iterations + 1):
        v = _policy_values(rows, R, gamma, policy)
        Q = R + gamma * (rows @ v).reshape(A, S)
        best = Q.max(axis=0)
        current = Q[policy, np.arange(S)]
        slack = 1e-12 * np.maximum(np.abs(best), 1.0)
        improved = np.where(current >= best - slack, policy, Q.argmax(axis=0))
        if np.array_equal(improved, policy):
            return v, n, float(np.abs(best - v).max()), True
        policy = improved
    v = _policy_values(rows, R, gamma, policy)
    best = (R + gamma * (rows @ v).reshape(A, S)).max(axis=0)
    return v, max_iterations, float(np.abs(best - v).max()), False


def _value_iteration(rows, R, gamma, tolerance, relative, max_iterations):
    A, S = R.shape
    v = np.zeros(S)
    change = np.inf
    for n in range(1, max_iterations + 1):
        following = (R + gamma * (rows @ v).reshape(A, S)).max(axis=0)
        change = float(np.abs(following - v).max())
        v = following
        eps = tolerance * float(np.abs(v).max()) if relative else tolerance
        if change < eps * (1.0 - gamma) / (2.0 * gamma) or change == 0.0:
            return v, n, change, True
    return v, max_iterations, change, False
