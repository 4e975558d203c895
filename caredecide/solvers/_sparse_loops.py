"""The numba loops of the sparse form (imported only through
:func:`caredecide.solvers.kernels.sparse_kernels`): reading dense transitions into
compressed sparse rows, and backward induction over those rows.

``scipy.sparse.csr_array(dense)`` finds the non-zeros with ``numpy.nonzero`` (index arrays
of every non-zero, then a sort); two plain passes over the rows (count, then copy) read the
dense array at memory speed instead, and the first pass checks the row sums on the way.
"""

import numpy as np
from numba import njit

from caredecide.solvers._loops import after_move, choose, combine, cycle_occupancy


@njit(cache=True, nogil=True, fastmath={"reassoc", "contract"})
def csr_from_dense(P, block, checked, tolerance, bad):
    # P (K, S) C-contiguous rows; returns (indptr (K + 1,), indices, data) of its CSR form
    # with the column of row k shifted by (k // block) * S (block > 0: a block-diagonal
    # matrix of K / block blocks of S columns; block = 0: no shift). Rows with checked[k]
    # must sum to 1 within the tolerance (the compiled-model check, done while reading):
    # the first that does not goes in bad[0] (left as is when all do). The row sums may be
    # reassociated (SIMD lanes), so they differ from numpy's in the last bits.
    K, S = P.shape
    indptr = np.empty(K + 1, dtype=np.int64)
    indptr[0] = 0
    for k in range(K):
        count = 0
        total = 0.0
        for j in range(S):
            x = P[k, j]
            total += x
            if x != 0.0:
                count += 1
        if checked[k] and not abs(total - 1.0) <= tolerance and bad[0] < 0:
            bad[0] = k
        indptr[k + 1] = indptr[k] + count
    indices = np.empty(indptr[K], dtype=np.int64)
    data = np.empty(indptr[K])
    for k in range(K):
        shift = (k // block) * S if block > 0 else 0
        i = indptr[k]
        for j in range(S):
            x = P[k, j]
            if x != 0.0:
                indices[i] = j + shift
                data[i] = x
                i += 1
    return indptr, indices, data


@njit(cache=True, nogil=True, error_model="numpy", fastmath={"reassoc", "contract"})
def backward_induction(
    indptr, indices, data,  # CSR rows (D A S, S) of transitions constant over the cycles
    has_move, move, rewards, decision_qaly, decision_cost,  # bellman.kernel_arrays[1:]
    weights,  # (Dw, T, 6): bellman.weight_table
    outcome_weight, cost_weight, allowed, decision_states, tie_absolute, tie_relative,
    value,  # (D, T + 1, S) out; value[:, T] holds the terminal part on entry
    policy, indifferent, q_values, gap, next_best,  # (D, T, S[, A]) out
):  # fmt: skip
    # The recursion and reward arithmetic of _loops.backward_induction (its helpers), the
    # expectation sum_s' P(s'|s, a) (arrival_t(a, s') + V_{t+1}(s')) over the non-zeros
    # of row (d, a, s) only. Row (d A + a) S + s holds P[d, 0, a, s].
    D, T, S = policy.shape
    A = allowed.shape[1]
    ow, cw = outcome_weight, cost_weight
    following = np.empty((A, S))
    u_o, u_c = np.empty((S, A)), np.empty((S, A))
    occupied_o, occupied_c = np.empty((S, A)), np.empty((S, A))
    q = np.empty(A)
    for d in range(D):
        dw = min(d, weights.shape[0] - 1)
        for t in range(T - 1, -1, -1):
            td = min(t, decision_qaly.shape[1] - 1)
            tc = min(t, decision_cost.shape[1] - 1)
            start_o, end_o, now_o = weights[dw, t, 0], weights[dw, t, 1], weights[dw, t, 2]
            start_c, end_c, now_c = weights[dw, t, 3], weights[dw, t, 4], weights[dw, t, 5]
            cycle_occupancy(rewards, d, t, u_o, u_c)
            after_move(has_move, move, d, t, u_o, occupied_o)
            after_move(has_move, move, d, t, u_c, occupied_c)
            for a in range(A):
                for s2 in range(S):
                    arrival = combine(ow, cw, end_o * u_o[s2, a], end_c * u_c[s2, a])
                    following[a, s2] = arrival + value[d, t + 1, s2]
            for s in range(S):
                best = -np.inf
                top = 0
                for a in range(A):
                    if not allowed[s, a]:
                        x = -np.inf
                    else:
                        row = (d * A + a) * S + s
                        expected = 0.0
                        for k in range(indptr[row], indptr[row + 1]):
                            expected += data[k] * following[a, indices[k]]
                        now_q = start_o * occupied_o[s, a] + now_o * decision_qaly[d, td, s, a]
                        now_cost = start_c * occupied_c[s, a] + now_c * decision_cost[d, tc, s, a]
                        x = expected + combine(ow, cw, now_q, now_cost)
                    q[a] = x
                    if x > best:
                        best, top = x, a
                chosen, g, other, tie = choose(
                    q, best, top, decision_states[s], tie_absolute, tie_relative, 0.0
                )
                value[d, t, s] = q[chosen]
                policy[d, t, s] = chosen
                indifferent[d, t, s] = tie
                gap[d, t, s] = g
                next_best[d, t, s] = other
                for a in range(A):
                    q_values[d, t, s, a] = q[a]
