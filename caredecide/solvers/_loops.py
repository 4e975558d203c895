"""The numba loops behind :mod:`caredecide.solvers.kernels` (imported only through it).

Compiled on first use and cached on disk (``cache=True``). Letters as in
:mod:`caredecide.compiled`. Every kernel loops over draws outermost, so one draw's arrays
are read in order while they sit in cache.
"""

import numpy as np
from numba import njit

from caredecide.solvers._intrinsics import borrowed, prefetch

jit = njit(cache=True, nogil=True, error_model="numpy")
inline = njit(cache=True, nogil=True, error_model="numpy", inline="always")
fused = njit(cache=True, nogil=True, error_model="numpy", fastmath={"reassoc", "contract"})
"""For the fused finite-horizon loops: sums may be reassociated (SIMD lanes) and products
contracted into fused multiply-adds, so results differ from numpy in the last bits (the
helpers inlined into them follow their flags; comparisons with -inf are unaffected)."""

LINE = 8
"""float64 values per 64-byte cache line (the stride of the prefetch hints)."""


@inline
def combine(ow, cw, q, c):
    # Objective value as in bellman.combine: ow * q - cw * c (zero weights skipped).
    part = ow * q if ow != 0.0 else 0.0 * c
    if cw != 0.0:
        return part - cw * c
    return part


UNRANKED = (-np.inf, 0, -np.inf, -1)
"""Where :func:`rank` starts, before any action: (best, top, second, runner_up)."""


@inline
def rank(x, a, ranked):
    # Fold action a's value x into ranked = (best, top, second, runner_up), taken over the
    # actions in index order from UNRANKED: the best value and the first action
    # with it; the best value among the other actions and the first action with that
    # (runner_up matters only once second > -inf).
    best, top, second, _ = ranked
    if x > best:
        return x, a, best, top
    if x > second:
        return best, top, x, a
    return ranked


@inline
def choose(q, ranked, deciding, tie_absolute, tie_relative, extra):
    # The tie rule of bellman.greedy_choice for one (draw, state) with action values q (A,)
    # ranked by rank: the lowest index within the tolerance of the best; the gap to the
    # best other action; the next-best action. Returns (chosen, gap, next best, indifferent).
    best, top, second, runner_up = ranked
    tolerance = tie_absolute + tie_relative * abs(best)
    tolerance = tolerance + extra
    floor = best - tolerance
    chosen = top
    if second >= floor:  # another action is within the tolerance: take the lowest index
        for a in range(q.shape[0]):
            if q[a] >= floor:
                chosen = a
                break
    # next best = best action other than the chosen one: top itself unless chosen is top
    other = runner_up if chosen == top else top
    single = not (second > -np.inf)
    if single or not deciding:
        return chosen, np.inf, -1, False
    return chosen, best - second, other, best - second <= tolerance


@njit(cache=True, nogil=True, inline="always", fastmath={"reassoc", "contract"})
def expectation(row, following):
    # sum_s' P(s'|s, a) V(s'): reassociation lets the short sum use SIMD lanes (rounding
    # differs from numpy's matmul in the last bits, as BLAS kernels differ among themselves).
    total = 0.0
    for s2 in range(row.shape[0]):
        total += row[s2] * following[s2]
    return total


@njit(cache=True, nogil=True, inline="always", fastmath={"reassoc", "contract"})
def read_ahead(block):
    # Sum of a draw's block (its moves), read in memory order to bring it into cache
    # before the backward pass reads it in reverse (see read_rows).
    flat = block.reshape(-1)
    total = 0.0
    for i in range(flat.size):
        total += flat[i]
    return total


@inline
def read_rows(P, d, allowed, tolerance, bad):
    # The row sums of draw d's transitions, read in memory order: the first allowed row
    # off 1 by more than the tolerance goes in bad (d, t, a, s) (the contract check of
    # compiled.CompiledModel.check, done while reading). Reading the draw in order also
    # brings it into cache before the backward pass reads it cycle by cycle in reverse,
    # an order the hardware prefetcher follows badly (about 3x slower from memory in
    # bench_kernels.py's model).
    Tp, A, S = P.shape[1], P.shape[2], P.shape[3]
    for t in range(Tp):
        for a in range(A):
            for s in range(S):
                total = 0.0
                for s2 in range(S):
                    total += P[d, t, a, s, s2]
                if allowed[s, a] and not abs(total - 1.0) <= tolerance and bad[0] < 0:
                    bad[0], bad[1], bad[2], bad[3] = d, t, a, s


@inline
def reward_cycles(rewards, has_move, move):
    # Longest time axis among the occupancy rewards and the moves: 1 means the cycle's
    # occupancy (after the move) is the same every cycle and is built once per draw.
    state_q, state_c, has_q, action_q, has_c, action_c = rewards
    n = max(state_q.shape[1], state_c.shape[1])
    if has_q:
        n = max(n, action_q.shape[1])
    if has_c:
        n = max(n, action_c.shape[1])
    if has_move:
        n = max(n, move.shape[1])
    return n


@inline
def cycle_occupancy(rewards, d, t, u_o, u_c):
    # u_o, u_c (S, A): QALYs and costs per cycle in s under a during cycle t of draw d,
    # the state part plus the state-action part (bellman.cycle_parts: u + sa).
    state_q, state_c, has_q, action_q, has_c, action_c = rewards
    S, A = u_o.shape
    tq = min(t, state_q.shape[1] - 1)
    tc = min(t, state_c.shape[1] - 1)
    for s in range(S):
        x = state_q[d, tq, s]
        y = state_c[d, tc, s]
        for a in range(A):
            u_o[s, a] = x
            u_c[s, a] = y
    if has_q:
        tr = min(t, action_q.shape[1] - 1)
        for s in range(S):
            for a in range(A):
                u_o[s, a] += action_q[d, tr, s, a]
    if has_c:
        tr = min(t, action_c.shape[1] - 1)
        for s in range(S):
            for a in range(A):
                u_c[s, a] += action_c[d, tr, s, a]


@inline
def after_move(has_move, move, d, t, u, out):
    # out (S, A): occupancy counted at the start of the cycle, in the states the
    # decision-time move puts the cohort of s in (einsum "dasj,dja->dsa" of
    # bellman.cycle_parts), or u itself without moves.
    S, A = u.shape
    if not has_move:
        out[:, :] = u
        return
    tm = min(t, move.shape[1] - 1)
    for s in range(S):
        for a in range(A):
            total = 0.0
            for j in range(S):
                total += move[d, tm, a, s, j] * u[j, a]
            out[s, a] = total


@inline
def cycle_work(S, A):
    # (u_o, u_c, occupied_o, occupied_c), each (S, A): occupancy per cycle in s under a,
    # and the same after the decision-time move (prepare_cycle fills them).
    return np.empty((S, A)), np.empty((S, A)), np.empty((S, A)), np.empty((S, A))


@inline
def prepare_cycle(rewards, has_move, move, w, ow, cw, d, t, refresh, next_value, work, following):
    # Occupancy of cycle t of draw d (when refresh: it changes with the cycle) and
    # following[a, s'] = arrival_t(a, s') + V_{t+1}(s'), w = weight_table row of cycle t.
    u_o, u_c, occupied_o, occupied_c = work
    if refresh:
        cycle_occupancy(rewards, d, t, u_o, u_c)
        after_move(has_move, move, d, t, u_o, occupied_o)
        after_move(has_move, move, d, t, u_c, occupied_c)
    end_o, end_c = w[1], w[4]
    A, S = following.shape
    for a in range(A):
        for s2 in range(S):
            arrival = combine(ow, cw, end_o * u_o[s2, a], end_c * u_c[s2, a])
            following[a, s2] = arrival + next_value[s2]


@inline
def choose_cycle(
    expected, work, w, decision_qaly, decision_cost, ow, cw, d, t, allowed, decision_states,
    tie_absolute, tie_relative, q, out,
):  # fmt: skip
    # Q_t(s, a) = now_t(s, a) + expected[a, s] for every state of draw d, then the tie
    # rule; out = (value, policy, indifferent, keep, q_values, gap, next_best).
    value, policy, indifferent, keep, q_values, gap, next_best = out
    _, _, occupied_o, occupied_c = work
    A, S = expected.shape
    start_o, now_o, start_c, now_c = w[0], w[2], w[3], w[5]
    td = min(t, decision_qaly.shape[1] - 1)
    tc = min(t, decision_cost.shape[1] - 1)
    for s in range(S):
        ranked = UNRANKED
        for a in range(A):
            if not allowed[s, a]:
                x = -np.inf
            else:
                now_q = start_o * occupied_o[s, a] + now_o * decision_qaly[d, td, s, a]
                now_cost = start_c * occupied_c[s, a] + now_c * decision_cost[d, tc, s, a]
                x = expected[a, s] + combine(ow, cw, now_q, now_cost)
            q[a] = x
            ranked = rank(x, a, ranked)
        chosen, g, other, tie = choose(
            q, ranked, decision_states[s], tie_absolute, tie_relative, 0.0
        )
        value[d, t, s] = q[chosen]
        policy[d, t, s] = chosen
        indifferent[d, t, s] = tie
        if keep:
            for a in range(A):
                q_values[d, t, s, a] = q[a]
            gap[d, t, s] = g
            next_best[d, t, s] = other


@fused
def backward_induction(
    P, has_move, move, rewards, decision_qaly, decision_cost, weights, outcome_weight,
    cost_weight, allowed, decision_states, tie_absolute, tie_relative, row_tolerance, bad,
    value, policy, indifferent, keep, q_values, gap, next_best,
):  # fmt: skip
    # Arguments as induction_pass; the pass's work arrays are made here, so they outlive
    # the borrowed views the pass takes of them. Returns what induction_pass returns.
    A, S = P.shape[2], P.shape[3]
    scratch = (np.empty((A, S)), np.empty((A, S)), cycle_work(S, A), np.empty(A))
    return induction_pass(
        P, has_move, move, rewards, decision_qaly, decision_cost, weights, outcome_weight,
        cost_weight, allowed, decision_states, tie_absolute, tie_relative, row_tolerance,
        bad, value, policy, indifferent, keep, q_values, gap, next_best, scratch,
    )  # fmt: skip


@fused
def induction_pass(
    P,  # (D, Tp, A, S, S)
    has_move,
    move,  # (D, Tm, A, S, S); read only when has_move
    rewards,  # (state_qaly (D, Tq, S), state_cost, has_sa_qaly, sa_qaly (D, Tr, S, A),
    #            has_sa_cost, sa_cost): bellman.kernel_arrays
    decision_qaly,  # (D, Td, S, A)
    decision_cost,  # (D, Td, S, A)
    weights,  # (Dw, T, 6): start, end, decision factors of outcomes then costs (Dw in {1, D})
    outcome_weight,
    cost_weight,
    allowed,  # (S, A) bool
    decision_states,  # (S,) bool
    tie_absolute,
    tie_relative,
    row_tolerance,  # transition rows of allowed pairs must sum to 1 within this
    bad,  # (4,) int out: (d, t, a, s) of the first row that does not; -1 on entry
    value,  # (D, T + 1, S) out; value[:, T] holds the terminal part on entry
    policy,  # (D, T, S) out
    indifferent,  # (D, T, S) out
    keep,  # also write q_values, gap and next_best (else they are placeholders)
    q_values,  # (D, T, S, A) out
    gap,  # (D, T, S) out
    next_best,  # (D, T, S) out
    scratch,  # work arrays: following, expected (A, S), cycle_work, q (A)
):
    # Q_t(s, a) = now_t(s, a) + sum_s' P_t(s'|s, a) (arrival_t(a, s') + V_{t+1}(s')),
    # with now_t and arrival_t built here per draw and cycle by the arithmetic of
    # bellman.cycle_rewards (one-off charges and start occupancy after the move; end
    # occupancy), weighted by the precomputed within-cycle and discount factors.
    # Returns the sum of the moves read ahead of each draw's pass. Every array is
    # borrowed (_intrinsics): no reference counting as they go into the inlined helpers.
    P, move, rewards, decision_qaly, decision_cost, weights, allowed, decision_states = borrowed(
        (P, move, rewards, decision_qaly, decision_cost, weights, allowed, decision_states)
    )
    bad, value, policy, indifferent, q_values, gap, next_best = borrowed(
        (bad, value, policy, indifferent, q_values, gap, next_best)
    )
    following, expected, work, q = borrowed(scratch)
    D, Tp, A, S = P.shape[0], P.shape[1], P.shape[2], P.shape[3]
    T = policy.shape[1]
    varying = reward_cycles(rewards, has_move, move) > 1
    ow, cw = outcome_weight, cost_weight
    # The next draw's cache lines are asked for while this draw computes, in memory
    # order: one per row of the pass, the rest spread over the cycles (at their start).
    draw_size = Tp * A * S * S
    row_lines = T * A * S
    per_cycle = (max((draw_size + LINE - 1) // LINE - row_lines, 0) + T - 1) // T
    read = 0.0
    for d in range(D):
        read_rows(P, d, allowed, row_tolerance, bad)
        if has_move:
            read += read_ahead(move[d])
        dw = min(d, weights.shape[0] - 1)
        for t in range(T - 1, -1, -1):
            tp = min(t, Tp - 1)
            prepare_cycle(
                rewards, has_move, move, weights[dw, t], ow, cw, d, t, t == T - 1 or varying,
                value[d, t + 1], work, following,
            )  # fmt: skip
            for k in range(per_cycle if d + 1 < D else 0):
                ahead = (row_lines + (T - 1 - t) * per_cycle + k) * LINE
                if ahead < draw_size:
                    prefetch(P, d + 1, ahead)
            for a in range(A):
                for s in range(S):
                    ahead = (((T - 1 - t) * A + a) * S + s) * LINE
                    if d + 1 < D and ahead < draw_size:
                        prefetch(P, d + 1, ahead)
                    expected[a, s] = expectation(P[d, tp, a, s], following[a])
            choose_cycle(
                expected, work, weights[dw, t], decision_qaly, decision_cost, ow, cw, d, t,
                allowed, decision_states, tie_absolute, tie_relative, q,
                (value, policy, indifferent, keep, q_values, gap, next_best),
            )  # fmt: skip
    return read


@inline
def evaluation_work(life_years, A):
    # Work arrays of the evaluation loops: u_l (S, A) the life-years of each state (the
    # same for every action), u_o, u_c (S, A) one cycle's occupancy rewards, occupied
    # (3, S, A) life-years, QALYs, costs after the decision-time move.
    S = life_years.shape[0]
    u_l = np.empty((S, A))
    for s in range(S):
        for a in range(A):
            u_l[s, a] = life_years[s]
    return u_l, np.empty((S, A)), np.empty((S, A)), np.empty((3, S, A))


@inline
def evaluation_occupancy(rewards, has_move, move, d, t, u_l, u_o, u_c, occupied):
    # Occupancy of cycle t of draw d (u_o, u_c; u_l holds the life-years) and the same
    # after the decision-time move: occupied[0..2] = life-years, QALYs, costs (S, A).
    cycle_occupancy(rewards, d, t, u_o, u_c)
    after_move(has_move, move, d, t, u_l, occupied[0])
    after_move(has_move, move, d, t, u_o, occupied[1])
    after_move(has_move, move, d, t, u_c, occupied[2])


@inline
def add_flows(w, out, sums):
    # Add a cycle's flows to out (6,) = life-years, QALYs, costs, then undiscounted, from
    # the cohort sums (at start l, o, c; arrived l, o, c; charged o, c) and the weights
    # w (12,) of weight_table (discounted, then undiscounted): the weights factor out of
    # sum_s m (start u + decision) + sum_s m end (P u).
    at_l, at_o, at_c, arrived_l, arrived_o, arrived_c, charged_o, charged_c = sums
    for j in range(2):  # discounted, then undiscounted
        i = 6 * j
        out[3 * j] += w[i] * at_l + w[i + 1] * arrived_l
        out[3 * j + 1] += w[i] * at_o + w[i + 2] * charged_o + w[i + 1] * arrived_o
        out[3 * j + 2] += w[i + 3] * at_c + w[i + 5] * charged_c + w[i + 4] * arrived_c


@fused
def evaluate_policies(
    P,  # (D, Tp, A, S, S)
    has_move,
    move,  # (D, Tm, A, S, S); read only when has_move
    rewards,  # as backward_induction
    decision_qaly,  # (D, Td, S, A)
    decision_cost,  # (D, Td, S, A)
    life_years,  # (S,)
    weights,  # (Dw, T, 12): start, end, decision factors of outcomes, costs; then undiscounted
    policies,  # (n,) int32: the policies one after another, each (Dk, T, S) in C order
    offsets,  # (K,) where policy k starts in policies
    policy_draws,  # (K,) Dk in {1, D}: a policy shared by every draw is stored once
    start,  # (S,) cohort at boundary 0
    row_tolerance,  # the rows read must sum to 1 within this
    bad,  # (4,) int out: (d, t, a, s) of the first row read that does not; -1 on entry
    keep,  # write the trace and the flow of every cycle (else only totals)
    traces,  # (K, D, T + 1, S) out when keep; else (K, 1, 2, S) work rows
    flows,  # (K, 6, D, T + 1) out when keep, else (K, 6, D, 1) totals; zero on entry:
    #         life-years, QALYs, costs; then undiscounted
    final,  # (K, D, S) out: the cohort at boundary T
):
    # For each draw (its transitions read once while in cache), each cycle and each policy:
    # the cohort m_{t+1} = m_t P_t[pi_t] and the reward of cycle t, sum_s m_t(s) (now_t(s, a) +
    # sum_s' P_t(s'|s, a) arrival_t(a, s')) with a = pi_t(s), for each quantity, gathering
    # the chosen rows (no policy matrix is built); rewards by the arithmetic of
    # bellman.cycle_parts.
    D, Tp, A, S = P.shape[0], P.shape[1], P.shape[2], P.shape[3]
    K, T = final.shape[0], weights.shape[1]
    varying = reward_cycles(rewards, has_move, move) > 1
    u_l, u_o, u_c, occupied = evaluation_work(life_years, A)
    for d in range(D):
        dw = min(d, weights.shape[0] - 1)
        for k in range(K):
            first = traces[k, d, 0] if keep else traces[k, 0, 0]
            for s in range(S):
                first[s] = start[s]
        for t in range(T):
            tp = min(t, Tp - 1)
            td = min(t, decision_qaly.shape[1] - 1)
            tc = min(t, decision_cost.shape[1] - 1)
            # The cycle's rewards once for every policy; the draw's rows stay in cache.
            if t == 0 or varying:
                evaluation_occupancy(rewards, has_move, move, d, t, u_l, u_o, u_c, occupied)
            for k in range(K):
                base = offsets[k] + min(d, policy_draws[k] - 1) * T * S
                now = traces[k, d, t] if keep else traces[k, 0, t % 2]
                after = traces[k, d, t + 1] if keep else traces[k, 0, 1 - t % 2]
                for s2 in range(S):
                    after[s2] = 0.0
                at_start_l = 0.0
                at_start_o = 0.0
                at_start_c = 0.0
                arrived_l = 0.0
                arrived_o = 0.0
                arrived_c = 0.0
                charged_o = 0.0
                charged_c = 0.0
                for s in range(S):
                    m = now[s]
                    if m == 0.0:
                        continue
                    a = policies[base + t * S + s]
                    row = P[d, tp, a, s]
                    e_l = 0.0
                    e_o = 0.0
                    e_c = 0.0
                    total = 0.0
                    for s2 in range(S):
                        p = row[s2]
                        total += p
                        after[s2] += m * p
                        e_l += p * u_l[s2, a]
                        e_o += p * u_o[s2, a]
                        e_c += p * u_c[s2, a]
                    if not abs(total - 1.0) <= row_tolerance and bad[0] < 0:
                        bad[0], bad[1], bad[2], bad[3] = d, tp, a, s
                    at_start_l += m * occupied[0, s, a]
                    at_start_o += m * occupied[1, s, a]
                    at_start_c += m * occupied[2, s, a]
                    arrived_l += m * e_l
                    arrived_o += m * e_o
                    arrived_c += m * e_c
                    charged_o += m * decision_qaly[d, td, s, a]
                    charged_c += m * decision_cost[d, tc, s, a]
                # sum_s m (start u + decision) + sum_s m end (P u): the weights factor out
                tk = t if keep else 0  # one entry per cycle, or the running total
                add_flows(
                    weights[dw, t], flows[k, :, d, tk],
                    (at_start_l, at_start_o, at_start_c, arrived_l, arrived_o, arrived_c,
                     charged_o, charged_c),
                )  # fmt: skip
        for k in range(K):
            last = traces[k, d, T] if keep else traces[k, 0, T % 2]
            for s in range(S):
                final[k, d, s] = last[s]


@jit
def greedy(Q, decision_states, tie_absolute, tie_relative, extra, value, policy, gap, next_best,
           indifferent):  # fmt: skip
    # The tie rule over Q (N, T, S, A) with extra tolerance (N,); outputs (N, T, S).
    N, T, S, A = Q.shape
    for d in range(N):
        for t in range(T):
            for s in range(S):
                q = Q[d, t, s]
                ranked = UNRANKED
                for a in range(A):
                    ranked = rank(q[a], a, ranked)
                chosen, g, other, tie = choose(
                    q, ranked, decision_states[s], tie_absolute, tie_relative, extra[d]
                )
                value[d, t, s] = q[chosen]
                policy[d, t, s] = chosen
                gap[d, t, s] = g
                next_best[d, t, s] = other
                indifferent[d, t, s] = tie
