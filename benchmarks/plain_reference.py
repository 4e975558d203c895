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

from caredecide.compiled import CompiledModel, occupancy_weights


def _at(array: np.ndarray, t: int) -> np.ndarray:
    return array[:, min(t, array.shape[1] - 1)]


def plain_backward_induction(model: CompiledModel, wtp: float) -> tuple[np.ndarray, np.ndarray]:
    """Backward induction (Puterman 1994, section 4.5): policy (D, T, S), value (D, T + 1, S)."""
    T, D, S = model.n_cycles, model.n_draws, model.n_states
    w = occupancy_weights(model.within_cycle, T)
    d_o, d_c = model.per_cycle_discount()
    value = np.empty((D, T + 1, S))
    policy = np.empty((D, T, S), dtype=np.intp)
    value[:, T] = w[T] * (
        wtp * d_o**T * _at(model.state_qaly, T) - d_c**T * _at(model.state_cost, T)
    )
    for t in range(T - 1, -1, -1):
        occupancy = w[t] * (
            wtp * d_o**t * _at(model.state_qaly, t) - d_c**t * _at(model.state_cost, t)
        )
        decision = wtp * d_o**t * _at(model.decision_qaly, t) - d_c**t * _at(model.decision_cost, t)
        expected = (_at(model.transition, t) @ value[:, t + 1, None, :, None])[..., 0]  # (D, A, S)
        Q = expected.transpose(0, 2, 1) + decision + occupancy[..., None]
        Q[:, ~model.allowed] = -np.inf
        policy[:, t] = Q.argmax(axis=-1)
        value[:, t] = Q.max(axis=-1)
    return policy, value


def _stationary(model: CompiledModel, wtp: float):
    D, S, A = model.n_draws, model.n_states, model.n_actions
    gamma = model.per_cycle_discount()[0]
    R = wtp * model.state_qaly[:, 0, :, None] - model.state_cost[:, 0, :, None]
    R = R + wtp * model.decision_qaly[:, 0] - model.decision_cost[:, 0]  # (D, S, A)
    R[:, ~model.allowed] = -np.inf
    P = model.transition[:, 0].reshape(D, A * S, S)
    return gamma, R.transpose(0, 2, 1), P, (D, A, S)


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
