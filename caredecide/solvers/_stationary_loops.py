"""The numba loops of the infinite-horizon solvers (imported only through
:func:`caredecide.solvers.kernels.stationary_kernels`).

Each loop walks one draw at a time: the draw's rewards per cycle are assembled from the
arrays of :func:`caredecide.solvers.bellman.cycle_rewards` (``now`` (D, S, A) and
``arrival`` (D, A, S)) as ``R[a, s] = now[s, a] + sum_s' P[a, s, s'] arrival[a, s']``
(the numpy expression of :class:`caredecide.solvers.stationary.StationaryProblem`), the
draw iterates until its own stopping rule holds while its arrays sit in cache, and the
action values of its final values are written out for the greedy choice.

Exact policy evaluation solves ``(I - gamma P_pi) v = r_pi``. When the policy's moves
between distinct states form no cycle (progressive models: states never return to an
earlier stage), the system is triangular in a topological order of the states and is
solved by substitution in ``O(S^2)`` (sinks first); otherwise by an LU factorisation
(LAPACK ``gesv``) in ``O(S^3)``.
"""

import numpy as np
from numba import njit

from caredecide.solvers._loops import expectation

jit = njit(cache=True, nogil=True, error_model="numpy")
inline = njit(cache=True, nogil=True, error_model="numpy", inline="always")

BLAS_STATES = 48
"""From this many states a sweep's expectations go to BLAS (dgemv), faster on long rows."""


@inline
def expect_all(P, d, v, out):
    # out[a * S + s] = sum_s' P[d, a, s, s'] v[s'] for every action and state of draw d.
    A, S = P.shape[1], P.shape[2]
    if S >= BLAS_STATES:
        np.dot(P[d].reshape((A * S, S)), v, out)
    else:
        k = 0
        for a in range(A):
            for s in range(S):
                out[k] = expectation(P[d, a, s], v)
                k += 1


@inline
def draw_rewards(P, now, arrival, has_arrival, allowed, d, R):
    # R (A, S): reward per cycle of taking a in s for draw d; -inf where not allowed.
    A, S = R.shape
    for a in range(A):
        for s in range(S):
            if not allowed[s, a]:
                R[a, s] = -np.inf
            elif has_arrival:
                R[a, s] = now[d, s, a] + expectation(P[d, a, s], arrival[d, a])
            else:
                R[a, s] = now[d, s, a]


@inline
def action_values(P, R, gamma, d, v, expected, Q):
    # Q[d, s, a] = R[a, s] + gamma sum_s' P[d, a, s, s'] v[s'] (the final greedy step).
    A, S = R.shape
    expect_all(P, d, v, expected)
    for s in range(S):
        for a in range(A):
            Q[d, s, a] = gamma * expected[a * S + s] + R[a, s]


@jit
def value_iteration(
    P, now, arrival, has_arrival, allowed, gamma, tolerance, relative, max_iterations,
    v, residual, sweeps, done, Q,
):  # fmt: skip
    # Per draw: v <- max_a R + gamma P v from v = 0 until ||v' - v|| < eps (1 - g) / (2 g),
    # eps = tolerance (x max |v| when relative); each draw stops on its own.
    # P (D, A, S, S); out v (D, S), residual (D,), sweeps (D,), done (D,), Q (D, S, A).
    D, A, S = P.shape[0], P.shape[1], P.shape[2]
    R = np.empty((A, S))
    current = np.empty(S)
    following = np.empty(S)
    expected = np.empty(A * S)
    for d in range(D):
        draw_rewards(P, now, arrival, has_arrival, allowed, d, R)
        current[:] = 0.0
        done[d] = False
        change = np.inf
        n = 0
        while n < max_iterations:
            n += 1
            change = 0.0
            largest = 0.0
            expect_all(P, d, current, expected)
            for s in range(S):
                best = -np.inf
                for a in range(A):
                    q = gamma * expected[a * S + s] + R[a, s]
                    if q > best:
                        best = q
                following[s] = best
                change = max(change, abs(best - current[s]))
                largest = max(largest, abs(best))
            current[:] = following
            eps = tolerance * largest if relative else tolerance
            if change < eps * (1.0 - gamma) / (2.0 * gamma) or change == 0.0:
                done[d] = True
                break
        v[d] = current
        residual[d] = change
        sweeps[d] = n
        action_values(P, R, gamma, d, current, expected, Q)


@inline
def by_substitution(system, reward, gamma, successors, stack, v):
    # Solve v = reward + gamma system v (system = the policy's rows P_pi) when the moves
    # between distinct states form no cycle: each state is solved once all the states it
    # moves to are, v[s] = (r[s] + gamma sum_{s' != s} P[s, s'] v[s']) / (1 - gamma P[s, s])
    # (Kahn's topological order, sinks first). Returns False, leaving v partly written,
    # when a cycle remains.
    S = reward.shape[0]
    top = 0
    for s in range(S):
        count = 0
        for s2 in range(S):
            if s2 != s and system[s, s2] != 0.0:
                count += 1
        successors[s] = count
        if count == 0:
            stack[top] = s
            top += 1
    solved = 0
    while top > 0:
        top -= 1
        s = stack[top]
        total = 0.0
        for s2 in range(S):
            if s2 != s and system[s, s2] != 0.0:  # v[s2] of the others is not written yet
                total += system[s, s2] * v[s2]
        v[s] = (reward[s] + gamma * total) / (1.0 - gamma * system[s, s])
        solved += 1
        for p in range(S):  # the states moving into s have one successor fewer to wait for
            if p != s and system[p, s] != 0.0:
                successors[p] -= 1
                if successors[p] == 0:
                    stack[top] = p
                    top += 1
    return solved == S


@inline
def policy_values(P, R, gamma, d, policy, system, reward, successors, stack, v):
    # Exact value of a policy for draw d: (I - gamma P_pi) v = r_pi, the chosen rows of P
    # gathered into one S x S system (in cache); by substitution when acyclic, else LU.
    S = R.shape[1]
    for s in range(S):
        a = policy[s]
        for s2 in range(S):
            system[s, s2] = P[d, a, s, s2]
        reward[s] = R[a, s]
    if by_substitution(system, reward, gamma, successors, stack, v):
        return
    for s in range(S):
        for s2 in range(S):
            system[s, s2] = -gamma * system[s, s2]
        system[s, s] += 1.0
    v[:] = np.linalg.solve(system, reward)


@jit
def policy_iteration(
    P, now, arrival, has_arrival, allowed, gamma, max_iterations, v, residual, sweeps, done, Q
):
    # Per draw: start greedy for v = 0; evaluate exactly; improve, keeping the current
    # action unless another is better beyond rounding; stop when the policy is unchanged.
    D, A, S = P.shape[0], P.shape[1], P.shape[2]
    R = np.empty((A, S))
    policy = np.empty(S, dtype=np.intp)
    improved = np.empty(S, dtype=np.intp)
    current = np.empty(S)
    expected = np.empty(A * S)
    system = np.empty((S, S))
    reward = np.empty(S)
    successors = np.empty(S, dtype=np.intp)
    stack = np.empty(S, dtype=np.intp)
    for d in range(D):
        draw_rewards(P, now, arrival, has_arrival, allowed, d, R)
        for s in range(S):
            policy[s] = 0
            for a in range(1, A):
                if R[a, s] > R[policy[s], s]:
                    policy[s] = a
        done[d] = False
        n = 0
        change = np.inf
        while n < max_iterations:
            n += 1
            policy_values(P, R, gamma, d, policy, system, reward, successors, stack, current)
            change = 0.0
            same = True
            expect_all(P, d, current, expected)
            for s in range(S):
                best = -np.inf
                top = 0
                kept = -np.inf
                for a in range(A):
                    q = gamma * expected[a * S + s] + R[a, s]
                    Q[d, s, a] = q
                    if q > best:
                        best, top = q, a
                    if a == policy[s]:
                        kept = q
                change = max(change, abs(best - current[s]))
                slack = 1e-12 * max(abs(best), 1.0)
                improved[s] = policy[s] if kept >= best - slack else top
                same = same and improved[s] == policy[s]
            if same:
                done[d] = True
                break
            policy[:] = improved
        if not done[d]:
            policy_values(P, R, gamma, d, policy, system, reward, successors, stack, current)
            change = 0.0
            action_values(P, R, gamma, d, current, expected, Q)
            for s in range(S):
                best = -np.inf
                for a in range(A):
                    best = max(best, Q[d, s, a])
                change = max(change, abs(best - current[s]))
        v[d] = current
        residual[d] = change
        sweeps[d] = n
