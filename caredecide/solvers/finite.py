"""Finite horizon: backward induction over cycles (Puterman 1994, section 4.5).

Working in present value at the model start keeps outcomes and costs at their own
per-cycle discount factors ``d_o``, ``d_c``::

    V_T(s)   = terminal(s)
    Q_t(s,a) = now_t(s,a) + sum_s' P_t(s'|s,a) (arrival_t(a,s') + V_{t+1}(s'))
    V_t(s)   = Q_t(s, policy_t(s)),  policy_t(s) = argmax over allowed a of Q_t(s, a)

with ``now_t`` the one-off charges plus the start occupancy of cycle ``t`` (after the
decision-time move) and ``arrival_t`` its end occupancy, each weighted by the within-cycle
method (:func:`caredecide.solvers.bellman.cycle_rewards`). The compiled kernel
(:mod:`caredecide.solvers.kernels`) walks each draw through its cycles with the rewards
(the arithmetic of ``cycle_rewards``, from the compact per-draw arrays), the expectation
and the greedy choice fused; without numba, one batched matmul per cycle covers every
draw, action and state.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from caredecide.compiled import ROW_SUM_TOLERANCE, CompiledModel
from caredecide.objective import Objective
from caredecide.solvers import kernels
from caredecide.solvers.bellman import (
    SolverError,
    check_compiled,
    cycle_rewards,
    decision_state_mask,
    greedy_choice,
    kernel_arrays,
    raise_bad_row,
    transition_at,
    weight_table,
)
from caredecide.solvers.result import PolicyResult, SweepRecord, build_result


def terminal_present_value(
    compiled: CompiledModel, objective: Objective, terminal_value: np.ndarray | float | None
) -> np.ndarray:
    """(D, S) terminal value discounted from the end of the horizon to the model start.

    ``terminal_value`` is given as at the end of the horizon (objective units), shape
    broadcastable to (D, S). It is discounted by ``d^T``, which needs one factor for the
    whole objective (QALYs, or equal rates).
    """
    D, S, T = compiled.n_draws, compiled.n_states, compiled.n_cycles
    assert T is not None, "backward induction needs a finite horizon"
    if terminal_value is None:
        return np.zeros((D, S))
    terminal = np.asarray(terminal_value, dtype=float)
    try:
        terminal = np.broadcast_to(terminal, (D, S))
    except ValueError:
        raise SolverError(
            f"terminal_value has shape {terminal.shape}; expected a shape broadcastable to "
            f"(draws, states) = ({D}, {S})"
        ) from None
    if not np.isfinite(terminal).all():
        raise SolverError("terminal_value holds a non-finite value; expected finite numbers")
    d_o, d_c = compiled.per_cycle_discount()
    if objective.kind == "net_benefit" and np.any(d_o != d_c) and np.any(terminal != 0):
        raise SolverError(
            "a non-zero terminal_value needs one discount rate for outcomes and costs; got "
            f"discount_outcomes = {compiled.discount_outcomes}, discount_costs = "
            f"{compiled.discount_costs}"
        )
    return terminal * np.reshape(d_o**T, (-1, 1))


def backward_induction(
    compiled: CompiledModel,
    objective: Objective,
    *,
    terminal_value: np.ndarray | float | None = None,
    tie_absolute: float,
    tie_relative: float,
    record_history: bool = False,
    action_values: bool = True,
) -> PolicyResult:
    """Solve a finite-horizon model exactly by backward induction.

    Checks the transition rows (the kernel as it reads them); the caller checks the rest
    of the contract (:func:`caredecide.solvers.bellman.check_compiled` with ``rows=False``).

    Parameters
    ----------
    compiled : CompiledModel
        ``n_cycles`` = T must be set; arrays may vary with the cycle.
    objective : Objective
    terminal_value : float or array broadcastable to (D, S), optional
        Value of each state at the end of the horizon (objective units, as at the end of
        the horizon); default 0.
    tie_absolute, tie_relative : float
        Tie tolerance on action gaps.
    record_history : bool
        Keep a :class:`SweepRecord` per cycle (values, policy, change) in ``history``.
    action_values : bool
        False: keep only the policy, its values and the ties (``indifferent``);
        ``q_values``, ``action_gap`` and ``next_best_action`` are None. For analyses that
        read no other action's value (a probabilistic analysis of many draws): it saves
        the (D, T, S, A) action values and two (D, T, S) arrays.

    Returns
    -------
    PolicyResult
        ``policy`` (D, T, S); ``value`` (D, T + 1, S) in present value at the model start.
    """
    T = compiled.n_cycles
    if T is None:
        raise SolverError("backward induction needs a finite number of cycles (n_cycles)")
    D, S, A = compiled.n_draws, compiled.n_states, compiled.n_actions
    decision_states = decision_state_mask(compiled)
    keep = action_values or record_history

    value, q_values, policy, gap, next_best, indifferent = induction_outputs(
        D, T, S, A, action_values=keep
    )
    history: list[SweepRecord] | None = [] if record_history else None

    value[:, T] = terminal_present_value(compiled, objective, terminal_value)
    if kernels.available():
        # Rewards, expectation and the tie rule fused per draw and cycle (_loops).
        placeholder = np.empty((1, 1, 1))
        bad = np.full(4, -1, dtype=np.int64)
        kernels.kernels().backward_induction(
            *kernel_arrays(compiled),
            weight_table(compiled),
            float(objective.outcome_weight),
            float(objective.cost_weight),
            np.ascontiguousarray(compiled.allowed, dtype=bool),
            decision_states,
            float(tie_absolute),
            float(tie_relative),
            ROW_SUM_TOLERANCE,
            bad,
            value,
            policy,
            indifferent,
            keep,
            np.empty((1, 1, 1, 1)) if q_values is None else q_values,
            placeholder if gap is None else gap,
            placeholder.astype(np.intp) if next_best is None else next_best,
        )
        raise_bad_row(compiled, bad)  # the rows checked as they were read
        if history is not None:
            assert q_values is not None
            for t in range(T - 1, -1, -1):
                _record(history, T, t, value, policy, q_values)
    else:
        check_compiled(compiled)
        _numpy_backward_induction(
            compiled, objective, decision_states,
            (value, q_values, policy, gap, next_best, indifferent),
            tie_absolute, tie_relative, history,
        )  # fmt: skip

    if not action_values:  # computed for the history only: not kept in the result
        q_values = gap = next_best = None
    return induction_result(
        compiled,
        objective,
        (value, q_values, policy, gap, next_best, indifferent),
        decision_states,
        history=history,
    )


def induction_outputs(D: int, T: int, S: int, A: int, *, action_values: bool = True) -> tuple:
    """Empty outputs of backward induction over ``D`` draws and ``T`` cycles.

    Returns ``(value (D, T + 1, S), q_values (D, T, S, A), policy (D, T, S) int, gap
    (D, T, S), next_best (D, T, S) int, indifferent (D, T, S) bool)``; ``q_values``,
    ``gap`` and ``next_best`` are None when ``action_values`` is False.
    """
    return (
        np.empty((D, T + 1, S)),
        np.empty((D, T, S, A)) if action_values else None,
        np.empty((D, T, S), dtype=np.intp),
        np.empty((D, T, S)) if action_values else None,
        np.empty((D, T, S), dtype=np.intp) if action_values else None,
        np.empty((D, T, S), dtype=bool),
    )


def induction_result(
    compiled: CompiledModel,
    objective: Objective,
    outputs: tuple,
    decision_states: np.ndarray,
    *,
    history: list[SweepRecord] | None,
    form: str = "",
    **extra: Any,
) -> PolicyResult:
    """The :class:`PolicyResult` of a backward induction (dense or sparse) from its outputs.

    ``outputs`` as :func:`induction_outputs` gives them, filled; ``form`` is added to the
    message (e.g. ``"sparse transitions"``); ``extra`` goes to
    :func:`caredecide.solvers.result.build_result` (``transition_form``, ...).
    """
    value, q_values, policy, gap, next_best, indifferent = outputs
    T = policy.shape[1]
    detail = "exact" if not form else f"exact; {form}"
    return build_result(
        compiled,
        objective,
        (policy, gap, next_best, indifferent),
        value=value,
        q_values=q_values,
        decision_states=decision_states,
        ages=compiled.ages(),
        history=history,
        method="backward_induction",
        iterations=T,
        tolerance=0.0,
        relative=False,
        error_bound=np.zeros(policy.shape[0]),
        success=True,
        message=f"backward induction over {T} cycles ({detail})",
        **extra,
    )


def _record(history: list[SweepRecord], T: int, t: int, value, policy, q_values) -> None:
    history.append(
        SweepRecord(
            sweep=T - t,
            cycle=t,
            value=value[:, t].copy(),
            policy=policy[:, t].copy(),
            residual=np.abs(value[:, t] - value[:, t + 1]).max(axis=-1),
            error_bound=np.zeros(value.shape[0]),
            q_values=q_values[:, t].copy(),
        )
    )


def _numpy_backward_induction(
    compiled, objective, decision_states, out, tie_absolute, tie_relative, history,
) -> None:  # fmt: skip
    """The numpy path (no compiled kernels): one batched matmul per cycle over all draws."""
    value, q_values, policy, gap, next_best, indifferent = out
    T = compiled.n_cycles
    D, S, A = compiled.n_draws, compiled.n_states, compiled.n_actions
    not_allowed = ~compiled.allowed
    expected_next = np.empty((D, A, S, 1))
    Q = np.empty((D, S, A))
    for t in range(T - 1, -1, -1):
        now, arrival = cycle_rewards(compiled, objective, t)
        # Expected end-of-cycle value for every (draw, action, state): one matmul.
        rhs = (arrival + value[:, t + 1, None, :])[..., None]
        np.matmul(transition_at(compiled, t), rhs, out=expected_next)
        if q_values is not None:
            Q = q_values[:, t]
        Q[...] = expected_next[..., 0].transpose(0, 2, 1)
        Q += now
        Q[:, not_allowed] = -np.inf
        choice = greedy_choice(Q, decision_states, tie_absolute, tie_relative)
        policy[:, t], value[:, t], indifferent[:, t] = choice[0], choice[1], choice[4]
        if q_values is not None:
            gap[:, t], next_best[:, t] = choice[2], choice[3]
        if history is not None:
            _record(history, T, t, value, policy, q_values)
