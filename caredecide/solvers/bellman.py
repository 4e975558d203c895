"""Pieces shared by every solver and by policy evaluation: checks, rewards, greedy choice.

Rewards are built here once so the solvers and :mod:`caredecide.evaluate` use the same
arithmetic (one core). Letters as in :mod:`caredecide.compiled`.
"""

from __future__ import annotations

import numpy as np

from caredecide.compiled import CompiledModel
from caredecide.errors import CaredecideError
from caredecide.objective import Objective
from caredecide.solvers import kernels


class SolverError(CaredecideError, ValueError):
    """A model cannot be solved as asked (wrong horizon, discounting, method or option)."""


DEFAULT_TIE_ABSOLUTE = 1e-9
"""Action gaps below ``tie_absolute + tie_relative * |value|`` are ties (objective units)."""
DEFAULT_TIE_RELATIVE = 1e-9


def check_compiled(compiled: CompiledModel) -> None:
    """Check array shapes agree and every state allows an action; raise SolverError."""
    S, A = compiled.n_states, compiled.n_actions
    D = compiled.transition.shape[0] if compiled.transition.ndim == 5 else -1
    problems = []
    if compiled.transition.ndim != 5 or compiled.transition.shape[2:] != (A, S, S):
        problems.append(
            f"transition has shape {compiled.transition.shape}; expected (D, Tp, {A}, "
            f"{S}, {S}) for {A} actions and {S} states"
        )
    for name in ("state_qaly", "state_cost"):
        arr = getattr(compiled, name)
        if arr.ndim != 3 or arr.shape[0] != D or arr.shape[2] != S:
            problems.append(f"{name} has shape {arr.shape}; expected ({D}, Tq, {S})")
    for name in ("decision_qaly", "decision_cost"):
        arr = getattr(compiled, name)
        if arr.ndim != 4 or arr.shape[0] != D or arr.shape[2:] != (S, A):
            problems.append(f"{name} has shape {arr.shape}; expected ({D}, Td, {S}, {A})")
    if compiled.allowed.shape != (S, A):
        problems.append(f"allowed has shape {compiled.allowed.shape}; expected ({S}, {A})")
    elif not compiled.allowed.any(axis=1).all():
        state = compiled.state_ids[int(np.flatnonzero(~compiled.allowed.any(axis=1))[0])]
        problems.append(f"state {state!r} allows no action; expected at least one allowed action")
    if problems:
        raise SolverError("compiled model is inconsistent: " + "; ".join(problems))


def decision_state_mask(compiled: CompiledModel) -> np.ndarray:
    """(S,) bool: states where a choice is made (not absorbing, two or more allowed actions)."""
    absorbing = np.asarray(compiled.absorbing, dtype=bool)
    if absorbing.shape != (compiled.n_states,):
        absorbing = np.zeros(compiled.n_states, dtype=bool)
    return ~absorbing & (compiled.allowed.sum(axis=1) > 1)


def occupancy_parts(
    compiled: CompiledModel, t: int, weight: float, discount: bool = True
) -> tuple[np.ndarray, np.ndarray]:
    """(D, S) QALYs and (D, S) costs of occupying each state at boundary ``t``.

    ``weight * d_o**t * q_t`` and ``weight * d_c**t * c_t``: present value at the model
    start, each at its own per-cycle factor (no blended rate). ``discount=False`` gives
    undiscounted values.
    """
    d_o, d_c = compiled.per_cycle_discount() if discount else (1.0, 1.0)
    q = compiled.state_qaly[:, min(t, compiled.state_qaly.shape[1] - 1)]
    c = compiled.state_cost[:, min(t, compiled.state_cost.shape[1] - 1)]
    return (weight * d_o**t) * q, (weight * d_c**t) * c


def decision_parts(
    compiled: CompiledModel, t: int, discount: bool = True
) -> tuple[np.ndarray, np.ndarray]:
    """(D, S, A) QALYs and (D, S, A) costs charged at the decision at the start of cycle ``t``."""
    d_o, d_c = compiled.per_cycle_discount() if discount else (1.0, 1.0)
    dq = compiled.decision_qaly[:, min(t, compiled.decision_qaly.shape[1] - 1)]
    dc = compiled.decision_cost[:, min(t, compiled.decision_cost.shape[1] - 1)]
    return d_o**t * dq, d_c**t * dc


def combine(objective: Objective, qalys: np.ndarray, costs: np.ndarray) -> np.ndarray:
    """Objective value of QALYs and costs: ``lambda * qalys - costs`` (or ``qalys``)."""
    outcome_part = objective.outcome_weight * qalys if objective.outcome_weight else 0.0 * costs
    if objective.cost_weight:
        return outcome_part - objective.cost_weight * costs
    return outcome_part


def occupancy_reward(
    compiled: CompiledModel, objective: Objective, t: int, weight: float
) -> np.ndarray:
    """(D, S) objective reward of occupying each state at boundary ``t`` (present value)."""
    return combine(objective, *occupancy_parts(compiled, t, weight))


def decision_reward(compiled: CompiledModel, objective: Objective, t: int) -> np.ndarray:
    """(D, S, A) objective reward of each action at the start of cycle ``t`` (present value)."""
    return combine(objective, *decision_parts(compiled, t))


def transition_at(compiled: CompiledModel, t: int) -> np.ndarray:
    """(D, A, S, S) transition probabilities of cycle ``t`` (a view)."""
    return compiled.transition[:, min(t, compiled.transition.shape[1] - 1)]


def stationary_discount(compiled: CompiledModel, objective: Objective) -> float:
    """The single per-cycle discount factor of an infinite-horizon problem.

    Raises
    ------
    SolverError
        If the rates differ (net benefit) or the relevant rate is not > 0.
    """
    d_o = compiled.per_cycle_discount()[0]
    if objective.kind == "net_benefit" and compiled.discount_outcomes != compiled.discount_costs:
        raise SolverError(
            "an infinite horizon needs one discount rate for outcomes and costs when the "
            f"objective is net benefit; got discount_outcomes = {compiled.discount_outcomes} and "
            f"discount_costs = {compiled.discount_costs} (use a finite horizon for differential "
            "discounting, or the QALY objective)"
        )
    if not compiled.discount_outcomes > 0:
        raise SolverError(
            f"an infinite horizon needs a discount rate > 0; got discount_outcomes = "
            f"{compiled.discount_outcomes} (set a rate, or give a finite number of cycles)"
        )
    return float(d_o)


def greedy_choice(
    Q: np.ndarray,
    decision_states: np.ndarray,
    tie_absolute: float,
    tie_relative: float,
    uncertainty: np.ndarray | float = 0.0,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Pick an action per state from action values, reporting gaps and ties.

    Parameters
    ----------
    Q : (..., S, A) float
        Action values; ``-inf`` where an action is not allowed.
    decision_states : (S,) bool
        States where a choice is made; elsewhere the gap is ``inf`` and no tie is reported.
    tie_absolute, tie_relative : float
        Gaps ``<= tie_absolute + tie_relative * |best|`` are ties.
    uncertainty : float or (...,) float
        Extra tolerance on the gap (twice the value error bound of iterative solvers,
        broadcast over the leading axes), since smaller gaps are not resolved.

    Returns
    -------
    policy : (..., S) int
        The lowest-index action whose value is within the tie tolerance of the best
        (the documented tie rule), so the pick never depends on rounding.
    value : (..., S) float
        ``Q`` of the chosen action.
    action_gap : (..., S) float
        Best minus second-best allowed value (>= 0); ``inf`` with one allowed action.
    next_best_action : (..., S) int
        Best allowed action other than the chosen one; -1 when there is none.
    indifferent : (..., S) bool
        True where the gap is within the tie tolerance.
    """
    if kernels.available() and Q.ndim >= 2 and Q.shape[-1] > 0:
        return _greedy_kernel(Q, decision_states, tie_absolute, tie_relative, uncertainty)
    best = Q.max(axis=-1)
    tolerance = tie_absolute + tie_relative * np.abs(best)
    tolerance = tolerance + np.asarray(uncertainty)[..., None]
    near = Q >= (best - tolerance)[..., None]
    policy = near.argmax(axis=-1)  # argmax of a bool array = first True = lowest index
    value = np.take_along_axis(Q, policy[..., None], axis=-1)[..., 0]
    others = Q.copy()
    np.put_along_axis(others, policy[..., None], -np.inf, axis=-1)
    next_best = others.argmax(axis=-1)
    top_index = Q.argmax(axis=-1)
    np.put_along_axis(Q_second := Q.copy(), top_index[..., None], -np.inf, axis=-1)
    second = Q_second.max(axis=-1)
    with np.errstate(invalid="ignore"):
        gap = best - second
    single = ~np.isfinite(second)
    gap[single] = np.inf
    next_best[single] = -1
    indifferent = (gap <= tolerance) & ~single
    gap[..., ~decision_states] = np.inf
    next_best[..., ~decision_states] = -1
    indifferent[..., ~decision_states] = False
    return policy, value, gap, next_best, indifferent


def _greedy_kernel(Q, decision_states, tie_absolute, tie_relative, uncertainty):
    """:func:`greedy_choice` by the compiled loop (same rule, one pass, no copies of Q)."""
    lead, (S, A) = Q.shape[:-2], Q.shape[-2:]
    n = int(np.prod(lead, dtype=np.int64))
    flat = np.ascontiguousarray(Q, dtype=float).reshape(n, 1, S, A)
    extra = np.ascontiguousarray(np.broadcast_to(np.asarray(uncertainty, dtype=float), lead))
    out = (
        np.empty((n, 1, S)),
        np.empty((n, 1, S), dtype=np.intp),
        np.empty((n, 1, S)),
        np.empty((n, 1, S), dtype=np.intp),
        np.empty((n, 1, S), dtype=bool),
    )
    kernels.kernels().greedy(
        flat, np.ascontiguousarray(decision_states, dtype=bool), float(tie_absolute),
        float(tie_relative), extra.reshape(n), *out,
    )  # fmt: skip
    value, policy, gap, next_best, indifferent = (x.reshape(*lead, S) for x in out)
    return policy, value, gap, next_best, indifferent
