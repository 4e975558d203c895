"""The numba loops of the sparse form (imported only through
:func:`caredecide.solvers.kernels.sparse_kernels`): reading dense transitions into
compressed sparse rows, backward induction over those rows, a policy's cohort trace
and flows over them, and the exact values of a progressive policy by back substitution.

``scipy.sparse.csr_array(dense)`` finds the non-zeros with ``numpy.nonzero`` (index arrays
of every non-zero, then a sort); one pass over the rows, a block of entries at a time,
reads the dense array near memory speed instead and checks the row sums on the way.
"""

import numpy as np
from numba import njit

from caredecide.solvers._loops import (
    add_flows,
    choose_cycle,
    cycle_work,
    evaluation_occupancy,
    evaluation_work,
    prepare_cycle,
    reward_cycles,
)

SCAN_WIDTH = 16
"""Entries of a dense row tested at once for a non-zero (one vector comparison and sum):
a block of zeros, the common case in a sparse row, costs no branch per entry."""


@njit(cache=True, nogil=True, inline="always")
def _grown(array, capacity, used):
    # A longer copy of array holding its first used entries.
    out = np.empty(capacity, dtype=array.dtype)
    out[:used] = array[:used]
    return out


@njit(cache=True, nogil=True, fastmath={"reassoc", "contract"})
def csr_from_dense(P, block, checked, tolerance, bad):
    # P (K, S) C-contiguous rows; returns (indptr (K + 1,), indices, data) of its CSR form
    # with the column of row k shifted by (k // block) * S (block > 0: a block-diagonal
    # matrix of K / block blocks of S columns; block = 0: no shift). Rows with checked[k]
    # must sum to 1 within the tolerance (the compiled-model check, done while reading):
    # the first that does not goes in bad[0] (left as is when all do). The row sums may be
    # reassociated (SIMD lanes), so they differ from numpy's in the last bits.
    # One pass: each block of SCAN_WIDTH entries is summed and its non-zeros counted at
    # once, and only a block with a non-zero is copied entry by entry. The output grows
    # (doubling) when a full row might not fit; it is trimmed when much is left over.
    K, S = P.shape
    W = SCAN_WIDTH
    full = S - S % W
    indptr = np.empty(K + 1, dtype=np.int64)
    indptr[0] = 0
    capacity = max(K * min(S, W), 1)
    indices = np.empty(capacity, dtype=np.int64)
    data = np.empty(capacity)
    i = 0
    for k in range(K):
        if i + S > capacity:
            capacity = max(2 * capacity, i + S)
            indices = _grown(indices, capacity, i)
            data = _grown(data, capacity, i)
        shift = (k // block) * S if block > 0 else 0
        row = P[k]
        total = 0.0
        for j0 in range(0, full, W):
            part = 0.0
            nonzero = 0
            for q in range(W):
                x = row[j0 + q]
                part += x
                nonzero += x != 0.0
            total += part
            if nonzero:
                for q in range(W):
                    x = row[j0 + q]
                    if x != 0.0:
                        indices[i] = j0 + q + shift
                        data[i] = x
                        i += 1
        for j in range(full, S):
            x = row[j]
            total += x
            if x != 0.0:
                indices[i] = j + shift
                data[i] = x
                i += 1
        if checked[k] and not abs(total - 1.0) <= tolerance and bad[0] < 0:
            bad[0] = k
        indptr[k + 1] = i
    if 4 * i < 3 * capacity:  # more than a quarter unused: keep only what is used
        return indptr, indices[:i].copy(), data[:i].copy()
    return indptr, indices[:i], data[:i]


@njit(cache=True, nogil=True, error_model="numpy", fastmath={"reassoc", "contract"})
def backward_induction(
    indptr, indices, data,  # CSR rows and their values (Dv, Tv, nnz): see below
    shared,  # True: rows (A S, S), one pattern for every draw and cycle
    has_move, move, rewards, decision_qaly, decision_cost,  # bellman.kernel_arrays[1:]
    weights,  # (Dw, T, 6): bellman.weight_table
    outcome_weight, cost_weight, allowed, decision_states, tie_absolute, tie_relative,
    value,  # (D, T + 1, S) out; value[:, T] holds the terminal part on entry
    policy, indifferent, q_values, gap, next_best,  # (D, T, S[, A]) out
):  # fmt: skip
    # The recursion of _loops.backward_induction (its cycle helpers), the expectation
    # sum_s' P(s'|s, a) (arrival_t(a, s') + V_{t+1}(s')) over the non-zeros of row
    # (d, a, s) only. shared = False (transitions constant over the cycles read into
    # CSR, data (1, 1, nnz)): row (d A + a) S + s holds P[d, 0, a, s]. shared = True
    # (compiled.SparseTransitions): row a S + s, values data[d, t] (Tv in {1, T}).
    D, T, S = policy.shape
    A = allowed.shape[1]
    following = np.empty((A, S))
    expected = np.empty((A, S))
    work = cycle_work(S, A)
    q = np.empty(A)
    out = (value, policy, indifferent, True, q_values, gap, next_best)
    varying = reward_cycles(rewards, has_move, move) > 1  # occupancy changes with the cycle
    for d in range(D):
        dw = min(d, weights.shape[0] - 1)
        first = 0 if shared else d * A * S
        for t in range(T - 1, -1, -1):
            values = data[min(d, data.shape[0] - 1), min(t, data.shape[1] - 1)]
            prepare_cycle(
                rewards, has_move, move, weights[dw, t], outcome_weight, cost_weight, d, t,
                t == T - 1 or varying, value[d, t + 1], work, following,
            )  # fmt: skip
            for a in range(A):
                for s in range(S):
                    row = first + a * S + s
                    total = 0.0
                    for k in range(indptr[row], indptr[row + 1]):
                        total += values[k] * following[a, indices[k]]
                    expected[a, s] = total
            choose_cycle(
                expected, work, weights[dw, t], decision_qaly, decision_cost, outcome_weight,
                cost_weight, d, t, allowed, decision_states, tie_absolute, tie_relative, q, out,
            )  # fmt: skip


@njit(cache=True, nogil=True, error_model="numpy", fastmath={"reassoc", "contract"})
def trace_and_flows(
    indptr, indices, data,  # CSR rows and their values (Dv, Tv, nnz), as backward_induction
    shared,  # True: rows (A S, S), one pattern for every draw and cycle
    has_move, move, rewards, decision_qaly, decision_cost,  # bellman.kernel_arrays[1:]
    life_years,  # (S,)
    weights,  # (Dw, T, 12): bellman.weight_table, discounted then undiscounted
    policy,  # (Dk, Tpi, S) int, Dk in {1, D}, Tpi in {1, T}
    start,  # (S,) cohort at boundary 0
    trace,  # (D, T + 1, S) out
    flows,  # (6, D, T + 1) out, zero on entry: life-years, QALYs, costs; then undiscounted
):  # fmt: skip
    # The cohort m_{t+1} = m_t P[pi_t] and the reward of cycle t, sum_s m_t(s) (now_t(s, a)
    # + sum_s' P(s'|s, a) arrival_t(a, s')) with a = pi_t(s), over each chosen row's
    # non-zeros only: the arithmetic of _loops.evaluate_policies (bellman.cycle_parts).
    D, T, S = trace.shape[0], trace.shape[1] - 1, trace.shape[2]
    A = decision_qaly.shape[3]
    varying = reward_cycles(rewards, has_move, move) > 1
    u_l, u_o, u_c, occupied = evaluation_work(life_years, A)
    for d in range(D):
        dw = min(d, weights.shape[0] - 1)
        dk = min(d, policy.shape[0] - 1)
        first = 0 if shared else d * A * S
        for s in range(S):
            trace[d, 0, s] = start[s]
        for t in range(T):
            td = min(t, decision_qaly.shape[1] - 1)
            tc = min(t, decision_cost.shape[1] - 1)
            if t == 0 or varying:
                evaluation_occupancy(rewards, has_move, move, d, t, u_l, u_o, u_c, occupied)
            values = data[min(d, data.shape[0] - 1), min(t, data.shape[1] - 1)]
            now, after = trace[d, t], trace[d, t + 1]
            for s2 in range(S):
                after[s2] = 0.0
            at_l = at_o = at_c = arrived_l = arrived_o = arrived_c = charged_o = charged_c = 0.0
            for s in range(S):
                m = now[s]
                if m == 0.0:
                    continue
                a = policy[dk, min(t, policy.shape[1] - 1), s]
                row = first + a * S + s
                e_l = 0.0
                e_o = 0.0
                e_c = 0.0
                for k in range(indptr[row], indptr[row + 1]):
                    p, s2 = values[k], indices[k]
                    after[s2] += m * p
                    e_l += p * u_l[s2, a]
                    e_o += p * u_o[s2, a]
                    e_c += p * u_c[s2, a]
                at_l += m * occupied[0, s, a]
                at_o += m * occupied[1, s, a]
                at_c += m * occupied[2, s, a]
                arrived_l += m * e_l
                arrived_o += m * e_o
                arrived_c += m * e_c
                charged_o += m * decision_qaly[d, td, s, a]
                charged_c += m * decision_cost[d, tc, s, a]
            add_flows(
                weights[dw, t], flows[:, d, t],
                (at_l, at_o, at_c, arrived_l, arrived_o, arrived_c, charged_o, charged_c),
            )  # fmt: skip


@njit(cache=True, nogil=True)
def upper_substitution(indptr, indices, data, chosen, reward, gamma, v):
    # v = (I - gamma P_pi)^-1 r by back substitution when the policy's rows (row
    # chosen[s] of the CSR holds P_pi[s]) move only to their own or later states (upper
    # triangular: progressive models): from the last state back,
    # v[s] = (r[s] + gamma sum_{j > s} P_pi[s, j] v[j]) / (1 - gamma P_pi[s, s]).
    # Returns False (v partly written) at the first row with a move back.
    S = v.shape[0]
    for s in range(S - 1, -1, -1):
        k = chosen[s]
        total = reward[s]
        stay = 0.0
        for i in range(indptr[k], indptr[k + 1]):
            j = indices[i]
            if j < s:
                return False
            if j == s:
                stay += data[i]
            else:
                total += gamma * data[i] * v[j]
        v[s] = total / (1.0 - gamma * stay)
    return True
