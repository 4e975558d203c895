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
