"""The numba loops of the infinite-horizon solvers (imported only through
:func:`caredecide.solvers.kernels.stationary_kernels`).

Each loop walks one draw at a time: it checks the draw's transition rows as it reads them
(``_loops.read_rows``), builds the draw's reward per cycle
``R[a, s] = now[s, a] + sum_s' P[a, s, s'] arrival[a, s']`` from the compact arrays by the
arithmetic of :func:`caredecide.solvers.bellman.cycle_rewards` (the helpers of the
finite-horizon loops, at ``t = 0`` with the stationary weights), iterates until the draw's
own stopping rule holds while its arrays sit in cache, and makes the greedy choice on the
action values of its final values with the tie rule of
:func:`caredecide.solvers.bellman.greedy_choice` (gaps within twice the error bound are
ties).

Exact policy evaluation solves ``(I - gamma P_pi) v = r_pi``. When the policy's moves
between distinct states form no cycle (progressive models: states never return to an
earlier stage), the system is triangular in a topological order of the states and is
solved by substitution in ``O(S^2)`` (sinks first); otherwise by an LU factorisation
(LAPACK ``gesv``) in ``O(S^3)``.
"""

import numpy as np
from numba import njit

from caredecide.solvers._intrinsics import borrowed
from caredecide.solvers._loops import (
    UNRANKED,
    after_move,
    choose,
    combine,
    cycle_occupancy,
    expectation,
    rank,
    read_rows,
)

jit = njit(cache=True, nogil=True, error_model="numpy")
inline = njit(cache=True, nogil=True, error_model="numpy", inline="always")

BLAS_STATES = 48
"""From this many states a sweep's expectations go to BLAS (dgemv), faster on long rows."""


@inline
def expect_all(P, d, v, out):
    # out[a * S + s] = sum_s' P[d, 0, a, s, s'] v[s'] for every action and state of draw d.
    A, S = P.shape[2], P.shape[3]
    if S >= BLAS_STATES:
        np.dot(P[d, 0].reshape((A * S, S)), v, out)
    else:
        k = 0
        for a in range(A):
            for s in range(S):
                out[k] = expectation(P[d, 0, a, s], v)
                k += 1


@inline
def draw_rewards(P, model, weights, ow, cw, allowed, d, R, work):
    # R (A, S): reward per cycle of taking a in s for draw d (present value at the cycle's
    # start); -inf where not allowed. model = (has_move, move, rewards, decision_qaly,
    # decision_cost) of bellman.kernel_arrays; weights (6,) = bellman.stationary_weights.
    has_move, move, rewards, decision_qaly, decision_cost = model
    u_o, u_c, occupied_o, occupied_c, arrival = work
    A, S = R.shape
    start_o, end_o, now_o = weights[0], weights[1], weights[2]
    start_c, end_c, now_c = weights[3], weights[4], weights[5]
    cycle_occupancy(rewards, d, 0, u_o, u_c)
    after_move(has_move, move, d, 0, u_o, occupied_o)
    after_move(has_move, move, d, 0, u_c, occupied_c)
    on_arrival = end_o != 0.0 or end_c != 0.0
    if on_arrival:
        for a in range(A):
            for s2 in range(S):
                arrival[a, s2] = combine(ow, cw, end_o * u_o[s2, a], end_c * u_c[s2, a])
    for a in range(A):
        for s in range(S):
            if not allowed[s, a]:
                R[a, s] = -np.inf
                continue
            now_q = start_o * occupied_o[s, a] + now_o * decision_qaly[d, 0, s, a]
            now_cost = start_c * occupied_c[s, a] + now_c * decision_cost[d, 0, s, a]
            x = combine(ow, cw, now_q, now_cost)
            if on_arrival:
                x += expectation(P[d, 0, a, s], arrival[a])
            R[a, s] = x


@inline
def greedy_step(Q, d, decision_states, tie_absolute, tie_relative, extra, out):
    # The tie rule on the draw's final action values Q[d] (S, A), with extra tolerance
    # (twice the error bound); out = (value, policy, gap, next_best, indifferent) (D, S).
    value, policy, gap, next_best, indifferent = out
    S, A = Q.shape[1], Q.shape[2]
    for s in range(S):
        ranked = UNRANKED
        for a in range(A):
            ranked = rank(Q[d, s, a], a, ranked)
        chosen, g, other, tie = choose(
            Q[d, s], ranked, decision_states[s], tie_absolute, tie_relative, extra
        )
        value[d, s] = Q[d, s, chosen]
        policy[d, s] = chosen
        gap[d, s] = g
        next_best[d, s] = other
        indifferent[d, s] = tie


@inline
def workspace(S, A):
    return (np.empty((S, A)), np.empty((S, A)), np.empty((S, A)), np.empty((S, A)),
            np.empty((A, S)))  # fmt: skip


@jit
def value_iteration(
    P, model, weights, ow, cw, allowed, decision_states, gamma, tolerance, relative,
    max_iterations, tie_absolute, tie_relative, row_tolerance, bad,
    residual, sweeps, done, Q, out,
):  # fmt: skip
    # Arguments as value_sweeps, whose work arrays are made here (so they outlive the
    # borrowed views it takes of them).
    A, S = P.shape[2], P.shape[3]
    scratch = (np.empty((A, S)), workspace(S, A), np.empty(S), np.empty(S), np.empty(A * S))
    value_sweeps(
        P, model, weights, ow, cw, allowed, decision_states, gamma, tolerance, relative,
        max_iterations, tie_absolute, tie_relative, row_tolerance, bad,
        residual, sweeps, done, Q, out, scratch,
    )  # fmt: skip


@jit
def value_sweeps(
    P, model, weights, ow, cw, allowed, decision_states, gamma, tolerance, relative,
    max_iterations, tie_absolute, tie_relative, row_tolerance, bad,
    residual, sweeps, done, Q, out, scratch,
):  # fmt: skip
    # Per draw: v <- max_a R + gamma P v from v = 0 until ||v' - v|| < eps (1 - g) / (2 g),
    # eps = tolerance (x max |v| when relative); each draw stops on its own. Then Q of the
    # final v and the greedy choice with the bound gamma ||v' - v|| / (1 - gamma).
    # P (D, 1, A, S, S); out residual, sweeps, done (D,), Q (D, S, A), out (5 x (D, S));
    # scratch = (R (A, S), workspace, current, following (S,), expected (A S,)). Every
    # array is borrowed (_intrinsics), as in _loops.induction_pass.
    P, model, weights, allowed, decision_states, bad = borrowed(
        (P, model, weights, allowed, decision_states, bad)
    )
    residual, sweeps, done, Q, out = borrowed((residual, sweeps, done, Q, out))
    R, work, current, following, expected = borrowed(scratch)
    D, A, S = P.shape[0], P.shape[2], P.shape[3]
    for d in range(D):
        read_rows(P, d, allowed, row_tolerance, bad)
        if bad[0] >= 0:
            return  # the caller raises for the row
        draw_rewards(P, model, weights, ow, cw, allowed, d, R, work)
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
        residual[d] = change
        sweeps[d] = n
        expect_all(P, d, current, expected)
        for s in range(S):
            for a in range(A):
                Q[d, s, a] = gamma * expected[a * S + s] + R[a, s]
        bound = gamma * change / (1.0 - gamma)
        greedy_step(Q, d, decision_states, tie_absolute, tie_relative, 2.0 * bound, out)


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
            system[s, s2] = P[d, 0, a, s, s2]
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
    P, model, weights, ow, cw, allowed, decision_states, gamma, max_iterations,
    tie_absolute, tie_relative, row_tolerance, bad, residual, sweeps, done, Q, out,
):  # fmt: skip
    # Arguments as policy_steps, whose work arrays are made here (as value_iteration).
    A, S = P.shape[2], P.shape[3]
    scratch = (
        np.empty((A, S)), workspace(S, A), np.empty(S, dtype=np.intp),
        np.empty(S, dtype=np.intp), np.empty(S), np.empty(A * S), np.empty((S, S)),
        np.empty(S), np.empty(S, dtype=np.intp), np.empty(S, dtype=np.intp),
    )  # fmt: skip
    policy_steps(
        P, model, weights, ow, cw, allowed, decision_states, gamma, max_iterations,
        tie_absolute, tie_relative, row_tolerance, bad, residual, sweeps, done, Q, out,
        scratch,
    )  # fmt: skip


@jit
def policy_steps(
    P, model, weights, ow, cw, allowed, decision_states, gamma, max_iterations,
    tie_absolute, tie_relative, row_tolerance, bad, residual, sweeps, done, Q, out, scratch,
):  # fmt: skip
    # Per draw: start greedy for v = 0; evaluate exactly; improve, keeping the current
    # action unless another is better beyond rounding; stop when the policy is unchanged.
    # Then the greedy choice on Q of the last evaluated policy with the bound
    # ||T v - v|| / (1 - gamma). Arguments as value_sweeps; scratch = (R, workspace,
    # policy, improved, current, expected, system, reward, successors, stack).
    P, model, weights, allowed, decision_states, bad = borrowed(
        (P, model, weights, allowed, decision_states, bad)
    )
    residual, sweeps, done, Q, out = borrowed((residual, sweeps, done, Q, out))
    R, work, policy, improved, current, expected, system, reward, successors, stack = borrowed(
        scratch
    )
    D, A, S = P.shape[0], P.shape[2], P.shape[3]
    for d in range(D):
        read_rows(P, d, allowed, row_tolerance, bad)
        if bad[0] >= 0:
            return  # the caller raises for the row
        draw_rewards(P, model, weights, ow, cw, allowed, d, R, work)
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
            expect_all(P, d, current, expected)
            for s in range(S):
                best = -np.inf
                for a in range(A):
                    q = gamma * expected[a * S + s] + R[a, s]
                    Q[d, s, a] = q
                    best = max(best, q)
                change = max(change, abs(best - current[s]))
        residual[d] = change
        sweeps[d] = n
        bound = change / (1.0 - gamma)
        greedy_step(Q, d, decision_states, tie_absolute, tie_relative, 2.0 * bound, out)
