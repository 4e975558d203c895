"""Plain batched numpy versions of the solvers, the yardstick of the speed benchmarks.

Written the obvious way (one batched matmul per sweep, no blocking, no fusing), from the
same compiled arrays, with the same stopping rules, so the benchmarks can check that the
project gives the same policies and values and print how much faster it is. Not used by
the package.

Letters as in :mod:`caredecide.compiled`: ``D`` draws, ``T`` cycles, ``A`` actions,
``S`` states. Rewards are in present value at the model start, objective units
(``wtp * QALYs - costs``).
"""

from __future__ import annotations

import numpy as np

from caredecide.compiled import CompiledModel, cycle_weights, stationary_cycle_weights


def _at(array: np.ndarray, t: int) -> np.ndarray:
    return array[:, min(t, array.shape[1] - 1)]


def _occupancy(model: CompiledModel, t: int, wtp: float, w_o, w_c) -> np.ndarray:
    """(D, S, A) objective reward per cycle in s under a, weighted w_o (QALYs) and w_c (costs)."""
    q = _at(model.state_qaly, t)[..., None]
    c = _at(model.state_cost, t)[..., None]
    if model.state_action_qaly is not None:
        q = q + _at(model.state_action_qaly, t)
    if model.state_action_cost is not None:
        c = c + _at(model.state_action_cost, t)
    return np.broadcast_to(
        wtp * w_o * q - w_c * c, (model.n_draws, model.n_states, model.n_actions)
    )


def _now_and_arrival(model: CompiledModel, t: int, wtp: float, start, end, d_o, d_c, power: int):
    """Reward at the decision (D, S, A) and on arrival (D, A, S) of cycle t."""
    u_start = _occupancy(model, t, wtp, start[0], start[1])
    if model.move is not None:  # start occupancy counted after the decision-time move
        u_start = np.einsum("dasj,dja->dsa", _at(model.move, t), u_start)
    decision = wtp * d_o**power * _at(model.decision_qaly, t) - d_c**power * _at(
        model.decision_cost, t
    )
    return decision + u_start, _occupancy(model, t, wtp, end[0], end[1]).transpose(0, 2, 1)


def plain_backward_induction(model: CompiledModel, wtp: float) -> tuple[np.ndarray, np.ndarray]:
    """Backward induction (Puterman 1994, section 4.5): policy (D, T, S), value (D, T + 1, S)."""
    T, D, S = model.n_cycles, model.n_draws, model.n_states
    d_o, d_c = model.per_cycle_discount()
    start_o, end_o = cycle_weights(model.within_cycle, T, d_o)
    start_c, end_c = cycle_weights(model.within_cycle, T, d_c)
    value = np.zeros((D, T + 1, S))
    policy = np.empty((D, T, S), dtype=np.intp)
    for t in range(T - 1, -1, -1):
        now, arrival = _now_and_arrival(
            model, t, wtp, (start_o[t], start_c[t]), (end_o[t], end_c[t]), d_o, d_c, t
        )
        rhs = (arrival + value[:, t + 1, None, :])[..., None]
        expected = (_at(model.transition, t) @ rhs)[..., 0]  # (D, A, S)
        Q = expected.transpose(0, 2, 1) + now
        Q[:, ~model.allowed] = -np.inf
        policy[:, t] = Q.argmax(axis=-1)
        value[:, t] = Q.max(axis=-1)
    return policy, value


def _stationary(model: CompiledModel, wtp: float):
    D, S, A = model.n_draws, model.n_states, model.n_actions
    gamma = model.per_cycle_discount()[0]
    start, end = stationary_cycle_weights(model.within_cycle, gamma)
    now, arrival = _now_and_arrival(model, 0, wtp, (start, start), (end, end), gamma, gamma, 0)
    P = model.transition[:, 0]
    R = now + (P @ arrival[..., None])[..., 0].transpose(0, 2, 1)  # (D, S, A)
    R[:, ~model.allowed] = -np.inf
    return gamma, R.transpose(0, 2, 1), P.reshape(D, A * S, S), (D, A, S)


def plain_value_iteration(model: CompiledModel, wtp: float, tolerance: float):
    """Value iteration from 0, stopping when ``||v' - v|| < eps (1 - g) / (2 g)`` for every draw
    (eps relative to max |v| of the draw); returns policy (D, S), value (D, S), sweeps."""
    gamma, R, P, shape = _stationary(model, wtp)
    v = np.zeros((shape[0], shape[2]))
    for sweep in range(1, 100_001):  # noqa: B007 (returned)
        Q = R + gamma * (P @ v[..., None]).reshape(shape)
        v_new = Q.max(axis=1)
        residual = np.abs(v_new - v).max(axis=1)
        v = v_new
        threshold = tolerance * np.abs(v).max(axis=1) * (1 - gamma) / (2 * gamma)
        if np.all((residual < threshold) | (residual == 0)):
            break
    Q = R + gamma * (P @ v[..., None]).reshape(shape)
    return Q.argmax(axis=1), Q.max(axis=1), sweep


def plain_policy_iteration(model: CompiledModel, wtp: float):
    """Policy iteration (Puterman 1994, section 6.4), exact evaluation by a batched solve;
    keeps the current action unless another is better; returns policy (D, S), value (D, S)."""
    gamma, R, P, (D, A, S) = _stationary(model, wtp)
    policy = R.argmax(axis=1)
    for _ in range(10_000):
        rows = policy * S + np.arange(S)
        P_pi = np.take_along_axis(P, rows[..., None], axis=1)
        r_pi = np.take_along_axis(R.reshape(D, A * S), rows, axis=1)
        v = np.linalg.solve(np.eye(S) - gamma * P_pi, r_pi[..., None])[..., 0]
        Q = R + gamma * (P @ v[..., None]).reshape(D, A, S)
        best = Q.max(axis=1)
        current = np.take_along_axis(Q, policy[:, None], axis=1)[:, 0]
        keep = current >= best - 1e-12 * np.maximum(np.abs(best), 1.0)
        improved = np.where(keep, policy, Q.argmax(axis=1))
        if np.array_equal(improved, policy):
            return policy, v
        policy = improved
    return policy, v


def plain_cohort_trace(model: CompiledModel, policy: np.ndarray) -> np.ndarray:
    """Finite-horizon cohort trace (D, T + 1, S) of a policy (D, T, S)."""
    T, D, S = model.n_cycles, model.n_draws, model.n_states
    trace = np.empty((D, T + 1, S))
    trace[:, 0] = model.start_distribution
    for t in range(T):
        chosen = np.take_along_axis(_at(model.transition, t), policy[:, t, None, :, None], axis=1)
        trace[:, t + 1] = (trace[:, t, None, :] @ chosen[:, 0])[:, 0]
    return trace


def blocked(function, model: CompiledModel, block: int, *args):
    """Run a plain solver on blocks of ``block`` draws and stack its array outputs."""
    parts = [
        function(model.take_draws(slice(i, i + block)), *args)
        for i in range(0, model.n_draws, block)
    ]
    return tuple(
        np.concatenate([p[k] for p in parts])
        if isinstance(parts[0][k], np.ndarray)
        else parts[-1][k]
        for k in range(len(parts[0]))
    )
