"""Pieces shared by every solver and by policy evaluation: checks, rewards, greedy choice.

Rewards are built here once so the solvers and :mod:`caredecide.evaluate` use the same
arithmetic (one core). Letters as in :mod:`caredecide.compiled`.
"""

from __future__ import annotations

import functools
from typing import Any, overload

import numpy as np

from caredecide.compiled import (
    CompiledModel,
    cycle_weights,
    dense_transition,
    row_problem,
    stationary_cycle_weights,
)
from caredecide.errors import CaredecideError, CompiledModelError
from caredecide.objective import Objective
from caredecide.solvers import kernels


class SolverError(CaredecideError, ValueError):
    """A model cannot be solved as asked (wrong horizon, discounting, method or option)."""


DEFAULT_TIE_ABSOLUTE = 1e-9
"""Action gaps below ``tie_absolute + tie_relative * |value|`` are ties (objective units)."""
DEFAULT_TIE_RELATIVE = 1e-9


def check_compiled(compiled: CompiledModel, rows: bool = True) -> None:
    """Check the compiled model's contract again (its arrays may have been changed in place).

    ``rows=False`` leaves the transition rows to the caller (the finite-horizon kernels
    check them as they read them: :func:`raise_bad_row`).

    Raises
    ------
    SolverError
        With the findings of :meth:`CompiledModel.check`.
    """
    try:
        compiled.check(rows)
    except CompiledModelError as error:
        raise SolverError(str(error)) from None


def raise_bad_row(compiled: CompiledModel, bad: np.ndarray) -> None:
    """Raise for the row ``bad = (d, t, a, s)`` a kernel found off 1 (nothing when ``d < 0``).

    Raises
    ------
    SolverError
        The message of :meth:`CompiledModel.check` for that row.
    """
    if bad[0] >= 0:
        d, t, a, s = (int(i) for i in bad)
        raise SolverError("compiled model is inconsistent: " + row_problem(compiled, d, t, a, s))


def decision_state_mask(compiled: CompiledModel) -> np.ndarray:
    """(S,) bool: states where a choice is made (not absorbing, two or more allowed actions)."""
    absorbing = np.asarray(compiled.absorbing, dtype=bool)
    if absorbing.shape != (compiled.n_states,):
        absorbing = np.zeros(compiled.n_states, dtype=bool)
    return ~absorbing & (compiled.allowed.sum(axis=1) > 1)


@functools.lru_cache(maxsize=64)
def _undiscounted_weights(method: str, n_cycles: int) -> tuple[np.ndarray, np.ndarray]:
    return cycle_weights(method, n_cycles, 1.0)


def _discount_power(d: float | np.ndarray, power: int) -> float | np.ndarray:
    """``d ** power``; a per-draw (D,) factor becomes (D, 1, 1) to broadcast over (D, S, A)."""
    d = np.asarray(d, dtype=float)
    return float(d**power) if d.ndim == 0 else (d**power)[:, None, None]


def _weights_at(compiled: CompiledModel, t: int, d: float | np.ndarray) -> tuple:
    """Present-value (start, end) weights of cycle ``t`` at per-cycle factor ``d``.

    Finite horizon: :func:`caredecide.compiled.cycle_weights`; infinite horizon: the
    stationary weights (:func:`caredecide.compiled.stationary_cycle_weights`, ``t = 0``).
    ``d`` may be per draw (D,) (e.g. a batch over discount rates).
    """
    method = compiled.within_cycle
    if compiled.n_cycles is None:
        stationary_cycle_weights(method, 1.0)  # refuses a method without a stationary form
        start, end = _undiscounted_weights(method, 1)
        t = 0
    else:
        start, end = _undiscounted_weights(method, compiled.n_cycles)
    shift = 1 if method == "half_cycle" else 0  # the cycle average is discounted at its end
    return start[t] * _discount_power(d, t + shift), end[t] * _discount_power(d, t + 1)


def weight_table(compiled: CompiledModel, discount: bool = True) -> np.ndarray:
    """(Dw, T, 6) present-value factors of every cycle of a finite horizon, for the kernels.

    Columns: start weight, end weight and decision factor ``d^t`` of outcomes (at
    ``d_o``), then of costs (at ``d_c``): the factors :func:`cycle_parts` applies to
    cycle ``t`` (:func:`_weights_at`, :func:`_discount_power`), computed for every cycle
    at once. ``Dw`` is the number of draws when a rate is given per draw, else 1;
    ``discount=False`` gives the undiscounted weights.
    """
    T = compiled.n_cycles
    assert T is not None, "the weight table is for a finite horizon"
    method = compiled.within_cycle
    start, end = _undiscounted_weights(method, T)
    shift = 1 if method == "half_cycle" else 0
    t = np.arange(T)
    columns = []
    for d in compiled.per_cycle_discount() if discount else (1.0, 1.0):
        d = np.atleast_1d(np.asarray(d, dtype=float))[:, None]  # (Dw, 1)
        columns += [start * d ** (t + shift), end * d ** (t + 1), d**t]
    return np.ascontiguousarray(np.stack(np.broadcast_arrays(*columns), axis=-1))


def stationary_weights(compiled: CompiledModel) -> np.ndarray:
    """(6,) the factors :func:`cycle_parts` applies in an infinite horizon (``t = 0``).

    Start weight, end weight and decision factor (1) of outcomes, then of costs, as the
    columns of :func:`weight_table`, for the stationary kernels.
    """
    columns: list[float] = []
    for d in compiled.per_cycle_discount():
        start, end = _weights_at(compiled, 0, d)
        columns += [float(start), float(end), float(_discount_power(d, 0))]
    return np.array(columns)


_ABSENT = np.zeros((1, 1, 1, 1))
"""Stands in for an absent optional array in a kernel call (never read: its flag is False)."""
_NO_MOVE = np.zeros((1, 1, 1, 1, 1))


def _contiguous(array: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(array, dtype=float)


def kernel_arrays(compiled: CompiledModel) -> tuple[Any, ...]:
    """The arrays of a finite-horizon model as the compiled loops take them.

    ``(P, has_move, move, rewards, decision_qaly, decision_cost)`` with ``rewards`` =
    ``(state_qaly, state_cost, has_state_action_qaly, state_action_qaly,
    has_state_action_cost, state_action_cost)``, every array C-contiguous float64 with its
    compact time axis (an absent optional array is a placeholder whose flag is False).
    ``P`` is the dense transition array (refused for a model compiled in sparse rows:
    :func:`reward_arrays` gives the rest).
    """
    P = dense_transition(compiled, "the dense compiled loop")
    return (_contiguous(P), *reward_arrays(compiled))


def reward_arrays(compiled: CompiledModel) -> tuple[Any, ...]:
    """``kernel_arrays(compiled)[1:]`` without touching the transitions (the sparse loops)."""
    move, sa_q, sa_c = compiled.move, compiled.state_action_qaly, compiled.state_action_cost
    rewards = (
        _contiguous(compiled.state_qaly),
        _contiguous(compiled.state_cost),
        sa_q is not None,
        _ABSENT if sa_q is None else _contiguous(sa_q),
        sa_c is not None,
        _ABSENT if sa_c is None else _contiguous(sa_c),
    )
    return (
        move is not None,
        _NO_MOVE if move is None else _contiguous(move),
        rewards,
        _contiguous(compiled.decision_qaly),
        _contiguous(compiled.decision_cost),
    )


@overload
def _at(array: np.ndarray, t: int) -> np.ndarray: ...
@overload
def _at(array: None, t: int) -> None: ...
def _at(array: np.ndarray | None, t: int) -> np.ndarray | None:
    return None if array is None else array[:, min(t, array.shape[1] - 1)]


def cycle_parts(
    compiled: CompiledModel, t: int, discount: bool = True, *, life_years: bool = False
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """QALYs, costs (and life-years) of cycle ``t`` for each decision, in present value.

    Follows the timeline of :mod:`caredecide.compiled`: one-off charges and the start
    occupancy (after the decision-time move) are known at the decision; the end occupancy
    depends on the state reached at the end of the cycle.

    Parameters
    ----------
    compiled : CompiledModel
    t : int
        Cycle index (0 for an infinite horizon: the stationary weights, without ``d^t``).
    discount : bool
        False gives undiscounted values.
    life_years : bool
        Also return ``"life_years"`` (no decision or state-action part).

    Returns
    -------
    dict of str to (at_decision, on_arrival)
        ``at_decision`` (D, S, A): charged to the cohort in ``s`` taking ``a`` at the
        start of cycle ``t``; ``on_arrival`` (D, A, S): counted for the cohort that took
        ``a`` and is in ``s`` at the end of cycle ``t``. Keys ``"qalys"``, ``"costs"``
        (and ``"life_years"``).
    """
    d_o, d_c = compiled.per_cycle_discount() if discount else (1.0, 1.0)
    T = compiled.n_cycles
    power = 0 if T is None else t
    move = _at(compiled.move, t)  # (D, A, S, S) or None
    D, S, A = compiled.n_draws, compiled.n_states, compiled.n_actions
    sources: dict[str, tuple[Any, Any, Any, Any]] = {
        "qalys": (compiled.state_qaly, compiled.state_action_qaly, compiled.decision_qaly, d_o),
        "costs": (compiled.state_cost, compiled.state_action_cost, compiled.decision_cost, d_c),
    }
    if life_years:
        ly = np.broadcast_to(np.asarray(compiled.life_years, float)[None, :, None], (D, S, 1))
        sources["life_years"] = (ly, None, None, d_o)
    parts = {}
    for name, (state, state_action, decision, d) in sources.items():
        start_w, end_w = _weights_at(compiled, t, d)
        u = _at(state, t) if name != "life_years" else state  # (D, S) or (D, S, 1)
        u = u[..., None] if u.ndim == 2 else u
        sa = _at(state_action, t)
        u = np.broadcast_to(u if sa is None else u + sa, (D, S, A))  # reward per cycle in s under a
        occupied = u if move is None else np.einsum("dasj,dja->dsa", move, u)
        at_decision = start_w * occupied
        if decision is not None:
            at_decision = at_decision + _discount_power(d, power) * _at(decision, t)
        parts[name] = (at_decision, end_w * u.transpose(0, 2, 1))  # end_w (D, 1, 1) or scalar
    return parts


def cycle_rewards(
    compiled: CompiledModel, objective: Objective, t: int
) -> tuple[np.ndarray, np.ndarray]:
    """Objective rewards of cycle ``t`` (present value): ``(at_decision, on_arrival)``.

    ``at_decision`` (D, S, A) and ``on_arrival`` (D, A, S) as in :func:`cycle_parts`;
    the action value is ``at_decision[s, a] + sum_s' P_t[a, s, s'] (on_arrival[a, s'] +
    V_{t+1}[s'])``.
    """
    parts = cycle_parts(compiled, t)
    (q_now, q_end), (c_now, c_end) = parts["qalys"], parts["costs"]
    return combine(objective, q_now, c_now), combine(objective, q_end, c_end)


def combine(objective: Objective, qalys: np.ndarray, costs: np.ndarray) -> np.ndarray:
    """Objective value of QALYs and costs: ``lambda * qalys - costs`` (or ``qalys``)."""
    outcome_part = objective.outcome_weight * qalys if objective.outcome_weight else 0.0 * costs
    if objective.cost_weight:
        return outcome_part - objective.cost_weight * costs
    return outcome_part


def transition_at(compiled: CompiledModel, t: int) -> np.ndarray:
    """(D, A, S, S) transition probabilities of cycle ``t`` (a view; dense form only)."""
    P = dense_transition(compiled, "reading one cycle's transitions")
    return P[:, min(t, P.shape[1] - 1)]


def stationary_discount(compiled: CompiledModel, objective: Objective) -> float:
    """The single per-cycle discount factor of an infinite-horizon problem.

    Raises
    ------
    SolverError
        If the rates differ (net benefit) or the relevant rate is not > 0.
    """
    d_o = compiled.per_cycle_discount()[0]
    if objective.kind == "net_benefit" and np.any(
        np.asarray(compiled.discount_outcomes) != np.asarray(compiled.discount_costs)
    ):
        raise SolverError(
            "an infinite horizon needs one discount rate for outcomes and costs when the "
            f"objective is net benefit; got discount_outcomes = {compiled.discount_outcomes} and "
            f"discount_costs = {compiled.discount_costs} (use a finite horizon for differential "
            "discounting, or the QALY objective)"
        )
    if np.ndim(compiled.discount_outcomes) or np.ndim(compiled.discount_costs):
        raise SolverError("an infinite horizon needs one discount rate for every draw")
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
