"""The numba loops behind :mod:`caredecide.solvers.kernels` (imported only through it).

Compiled on first use and cached on disk (``cache=True``). Letters as in
:mod:`caredecide.compiled`. Every kernel loops over draws outermost, so one draw's arrays
are read in order while they sit in cache.
"""

import numpy as np
from numba import njit

jit = njit(cache=True, nogil=True, error_model="numpy")
inline = njit(cache=True, nogil=True, error_model="numpy", inline="always")


@inline
def combine(ow, cw, q, c):
    # Objective value as in bellman.combine: ow * q - cw * c (zero weights skipped).
    part = ow * q if ow != 0.0 else 0.0 * c
    if cw != 0.0:
        return part - cw * c
    return part


@inline
def choose_greedy(
    Q, best, top, deciding, tie_absolute, tie_relative, extra, d, t, s,
    value, policy, gap, next_best, indifferent,
):  # fmt: skip
    # The tie rule of bellman.greedy_choice for one (draw, state): lowest index within
    # the tolerance of the best; gap to the best other action; next-best action.
    A = Q.shape[3]
    tolerance = tie_absolute + tie_relative * abs(best)
    tolerance = tolerance + extra
    floor = best - tolerance
    chosen = -1
    second = -np.inf  # best value among actions other than the first best one (top)
    runner_up = -1
    for a in range(A):
        x = Q[d, t, s, a]
        if chosen < 0 and x >= floor:
            chosen = a
        if a != top and x > second:
            second, runner_up = x, a
    # next best = best action other than the chosen one: top itself unless chosen is top
    other = runner_up if chosen == top else top
    value[d, t, s] = Q[d, t, s, chosen]
    policy[d, t, s] = chosen
    single = not (second > -np.inf)
    if single or not deciding:
        gap[d, t, s] = np.inf
        next_best[d, t, s] = -1
        indifferent[d, t, s] = False
    else:
        gap[d, t, s] = best - second
        next_best[d, t, s] = other
        indifferent[d, t, s] = best - second <= tolerance


@njit(cache=True, nogil=True, inline="always", fastmath={"reassoc", "contract"})
def expectation(row, following):
    # sum_s' P(s'|s, a) V(s'): reassociation lets the short sum use SIMD lanes (rounding
    # differs from numpy's matmul in the last bits, as BLAS kernels differ among themselves).
    total = 0.0
    for s2 in range(row.shape[0]):
        total += row[s2] * following[s2]
    return total


@jit
def backward_induction(
    P,  # (D, Tp, A, S, S)
    arrival,  # (D, T, A, S) objective reward on arriving in s' at the end of cycle t under a
    allowed,  # (S, A) bool
    decision_states,  # (S,) bool
    tie_absolute,
    tie_relative,
    value,  # (D, T + 1, S) out; value[:, T] holds the terminal part on entry
    q_values,  # (D, T, S, A) in: the reward at the decision (bellman.cycle_rewards); out: Q
    policy,  # (D, T, S) out
    gap,  # (D, T, S) out
    next_best,  # (D, T, S) out
    indifferent,  # (D, T, S) out
):
    # Q_t(s, a) = now_t(s, a) + sum_s' P_t(s'|s, a) (arrival_t(a, s') + V_{t+1}(s')).
    D, Tp, A, S = P.shape[0], P.shape[1], P.shape[2], P.shape[3]
    T = q_values.shape[1]
    following = np.empty((A, S))  # arrival_t(a) + V_{t+1} of the draw, kept local
    for d in range(D):
        for t in range(T - 1, -1, -1):
            tp = min(t, Tp - 1)
            for a in range(A):
                for s2 in range(S):
                    following[a, s2] = arrival[d, t, a, s2] + value[d, t + 1, s2]
            for s in range(S):
                best = -np.inf
                top = 0
                for a in range(A):
                    if not allowed[s, a]:
                        q = -np.inf
                    else:
                        q = q_values[d, t, s, a] + expectation(P[d, tp, a, s], following[a])
                    q_values[d, t, s, a] = q
                    if q > best:
                        best, top = q, a
                choose_greedy(
                    q_values,
                    best,
                    top,
                    decision_states[s],
                    tie_absolute,
                    tie_relative,
                    0.0,
                    d,
                    t,
                    s,
                    value,
                    policy,
                    gap,
                    next_best,
                    indifferent,
                )


@jit
def cohort_trace(P, policy, start, trace):
    # trace[d, t + 1] = trace[d, t] P_t[policy_t] by gathering the chosen rows.
    D, Tp, S = P.shape[0], P.shape[1], P.shape[3]
    Tpi = policy.shape[1]
    for d in range(D):
        for s in range(S):
            trace[d, 0, s] = start[s]
        for t in range(trace.shape[1] - 1):
            tp, ti = min(t, Tp - 1), min(t, Tpi - 1)
            for s2 in range(S):
                trace[d, t + 1, s2] = 0.0
            for s in range(S):
                mass = trace[d, t, s]
                if mass != 0.0:
                    a = policy[d, ti, s]
                    for s2 in range(S):
                        trace[d, t + 1, s2] += mass * P[d, tp, a, s, s2]


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


@jit
def value_iteration(P, R, gamma, tolerance, relative, max_iterations, v, residual, sweeps, done):
    # Per draw: v <- max_a R + gamma P v from v = 0 until ||v' - v|| < eps (1 - g) / (2 g),
    # eps = tolerance (x max |v| when relative); each draw stops on its own.
    # P (D, A, S, S), R (D, A, S); out v (D, S), residual (D,), sweeps (D,), done (D,).
    D, A, S = R.shape[0], R.shape[1], R.shape[2]
    current = np.empty(S)
    following = np.empty(S)
    expected = np.empty(A * S)
    for d in range(D):
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
                    q = gamma * expected[a * S + s] + R[d, a, s]
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


@jit
def policy_values(P, R, gamma, d, policy, v):
    # Exact value of a policy for draw d: solve (I - gamma P_pi) v = r_pi, gathering the
    # chosen rows of P into one draw's S x S system (in cache).
    S = R.shape[2]
    system = np.empty((S, S))
    reward = np.empty(S)
    for s in range(S):
        a = policy[s]
        for s2 in range(S):
            system[s, s2] = -gamma * P[d, a, s, s2]
        system[s, s] += 1.0
        reward[s] = R[d, a, s]
    v[:] = np.linalg.solve(system, reward)


@jit
def policy_iteration(P, R, gamma, max_iterations, v, residual, sweeps, done):
    # Per draw: start greedy for v = 0; evaluate exactly; improve, keeping the current
    # action unless another is better beyond rounding; stop when the policy is unchanged.
    D, A, S = R.shape[0], R.shape[1], R.shape[2]
    policy = np.empty(S, dtype=np.intp)
    improved = np.empty(S, dtype=np.intp)
    current = np.empty(S)
    expected = np.empty(A * S)
    for d in range(D):
        for s in range(S):
            policy[s] = 0
            for a in range(1, A):
                if R[d, a, s] > R[d, policy[s], s]:
                    policy[s] = a
        done[d] = False
        n = 0
        change = np.inf
        while n < max_iterations:
            n += 1
            policy_values(P, R, gamma, d, policy, current)
            change = 0.0
            same = True
            expect_all(P, d, current, expected)
            for s in range(S):
                best = -np.inf
                top = 0
                kept = -np.inf
                for a in range(A):
                    q = gamma * expected[a * S + s] + R[d, a, s]
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
            policy_values(P, R, gamma, d, policy, current)
            change = 0.0
            expect_all(P, d, current, expected)
            for s in range(S):
                best = -np.inf
                for a in range(A):
                    best = max(best, gamma * expected[a * S + s] + R[d, a, s])
                change = max(change, abs(best - current[s]))
        v[d] = current
        residual[d] = change
        sweeps[d] = n


@jit
def greedy(Q, decision_states, tie_absolute, tie_relative, extra, value, policy, gap, next_best,
           indifferent):  # fmt: skip
    # The tie rule over Q (N, T, S, A) with extra tolerance (N,); outputs (N, T, S).
    N, T, S, A = Q.shape
    for d in range(N):
        for t in range(T):
            for s in range(S):
                best = -np.inf
                top = 0
                for a in range(A):
                    if Q[d, t, s, a] > best:
                        best, top = Q[d, t, s, a], a
                choose_greedy(
                    Q, best, top, decision_states[s], tie_absolute, tie_relative, extra[d],
                    d, t, s, value, policy, gap, next_best, indifferent,
                )  # fmt: skip


@jit
def cycle_flows(P, tp, policy, ti, trace, t, at_decision, on_arrival, out):
    # out[k, d] = sum_s m_t(s) (at_decision[k, d, s, a] + sum_s' P_t(s'|s, a)
    # on_arrival[k, d, a, s']) with a = policy[d, ti, s]: the cycle-t reward of the cohort
    # for K quantities, gathering the chosen rows of P (no policy matrix is built).
    K, D, S = at_decision.shape[0], at_decision.shape[1], trace.shape[2]
    totals = np.empty(K)
    for d in range(D):
        totals[:] = 0.0
        for s in range(S):
            m = trace[d, t, s]
            a = policy[d, ti, s]
            for k in range(K):
                e = 0.0
                for s2 in range(S):
                    e += P[d, tp, a, s, s2] * on_arrival[k, d, a, s2]
                totals[k] += m * (at_decision[k, d, s, a] + e)
        for k in range(K):
            out[k, d] = totals[k]
