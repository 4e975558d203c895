"""Solvers: one entry point, :func:`solve`, for every horizon and method.

* ``backward_induction``: finite horizon, exact (:mod:`caredecide.solvers.finite`);
* ``value_iteration``, ``policy_iteration``, ``modified_policy_iteration``: infinite
  horizon with stationary arrays (:mod:`caredecide.solvers.stationary`).

Every method is vectorized over the draws of the compiled model: one call solves one or
100,000 parameter sets. Ties: an action whose value is within the tie tolerance of the
best is a tie; the lowest action index among tied actions is chosen and the state is
flagged ``indifferent``. Actions not allowed in a state are never chosen.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from caredecide.compiled import CompiledModel
from caredecide.objective import Objective
from caredecide.options import RunOptionError, check_choice, check_scalar
from caredecide.solvers.bellman import (
    DEFAULT_TIE_ABSOLUTE,
    DEFAULT_TIE_RELATIVE,
    SolverError,
    check_compiled,
)
from caredecide.solvers.finite import backward_induction, terminal_present_value
from caredecide.solvers.result import PolicyResult, SweepRecord
from caredecide.solvers.sparse import TRANSITION_FORMS, compiled_form, sparse_backward_induction
from caredecide.solvers.stationary import solve_stationary

METHODS = (
    "auto",
    "backward_induction",
    "value_iteration",
    "policy_iteration",
    "modified_policy_iteration",
)

__all__ = ["METHODS", "PolicyResult", "SolverError", "SweepRecord", "solve"]


def solve(
    compiled: CompiledModel,
    objective: Objective,
    *,
    method: str = "auto",
    tolerance: float = 1e-10,
    relative: bool = True,
    max_iterations: int = 100_000,
    evaluation_sweeps: int = 20,
    terminal_value: np.ndarray | float | None = None,
    tie_tolerance: float = DEFAULT_TIE_ABSOLUTE,
    tie_relative: float = DEFAULT_TIE_RELATIVE,
    record_history: bool = False,
    transition_form: str = "auto",
    action_values: bool = True,
) -> PolicyResult:
    """Find the policy that maximises the objective, for every draw of the model.

    Parameters
    ----------
    compiled : CompiledModel
        Arrays for ``D`` draws (see :mod:`caredecide.compiled`).
    objective : Objective
        QALYs, or net monetary benefit at a willingness to pay.
    method : str
        ``"auto"`` (backward induction for a finite horizon, policy iteration for an
        infinite one), ``"backward_induction"``, ``"value_iteration"``,
        ``"policy_iteration"`` or ``"modified_policy_iteration"``.
    tolerance : float
        ``eps`` of the stopping rule of value iteration and modified policy iteration: the
        returned values are within ``eps / 2`` of optimal (sup norm).
    relative : bool
        Measure ``eps`` relative to the largest |value| of each draw (default), since
        values in money are large.
    max_iterations : int
        Cap on sweeps of the iterative methods; hitting it gives ``success = False``.
    evaluation_sweeps : int
        ``m``, partial evaluation sweeps of modified policy iteration (>= 0).
    terminal_value : float or array broadcastable to (D, S), optional
        Finite horizon only: value of each state at the end of the horizon (default 0).
    tie_tolerance, tie_relative : float
        Action gaps ``<= tie_tolerance + tie_relative * |value|`` are reported as ties
        (``indifferent``); iterative methods add twice their error bound.
    record_history : bool
        Keep per-sweep values, policy, residual and error bound in ``result.history``
        (memory grows with sweeps x draws x states).
    transition_form : {"auto", "dense", "sparse"}
        Solve with sparse transition rows (scipy.sparse CSR) or dense arrays; "auto"
        picks sparse for large, sparse models with few draws whose transitions do not
        vary with the cycle (:func:`caredecide.solvers.sparse.choose_form`).
        ``result.transition_form`` says which was used. Sparse serves backward induction,
        policy and value iteration, without a sweep history.
    action_values : bool
        False: keep only the policy, its values and the ties (``indifferent``); the
        result's ``q_values``, ``action_gap`` and ``next_best_action`` are None. For
        analyses that never look at the other actions (a probabilistic analysis over many
        draws); backward induction then neither computes nor stores them, saving the
        (D, T, S, A) action values and two (D, T, S) arrays.

    Returns
    -------
    PolicyResult

    Raises
    ------
    RunOptionError
        An option out of range or of the wrong type (``max_iterations=True`` included).
    SolverError
        Unknown method, a method that does not fit the horizon, unequal discount rates
        or a zero rate for an infinite horizon.
    """
    if method not in METHODS:
        raise SolverError(f"solver method {method!r} is unknown; expected one of {METHODS}")
    if not isinstance(objective, Objective):
        raise SolverError(f"objective must be an Objective; got {type(objective).__name__}")
    check_scalar(tolerance, "tolerance", float, min_val=0.0, include_boundaries="neither")
    check_scalar(tie_tolerance, "tie_tolerance", float, min_val=0.0)
    check_scalar(tie_relative, "tie_relative", float, min_val=0.0)
    check_scalar(max_iterations, "max_iterations", int, min_val=1)
    check_scalar(evaluation_sweeps, "evaluation_sweeps", int, min_val=0)
    check_choice(transition_form, "transition_form", TRANSITION_FORMS)
    if not isinstance(action_values, bool | np.bool_):
        raise RunOptionError("action_values", action_values, "True or False")
    finite = compiled.n_cycles is not None
    check_compiled(compiled, rows=False)  # the rows: checked by each solver path
    if method == "auto":
        method = "backward_induction" if finite else "policy_iteration"
    if finite and method != "backward_induction":
        raise SolverError(
            f"method {method!r} is for an infinite horizon; the model has n_cycles = "
            f"{compiled.n_cycles} (use 'backward_induction' or 'auto')"
        )
    if finite:
        form = compiled_form(compiled, transition_form)
        if form == "sparse" and record_history:
            if transition_form == "sparse":
                raise SolverError(
                    "sparse transitions keep no sweep history; got record_history = True "
                    "(use transition_form = 'dense' or 'auto')"
                )
            form = "dense"
        if form == "sparse":
            result = sparse_backward_induction(
                compiled,
                objective,
                terminal_present_value(compiled, objective, terminal_value),
                tie_absolute=tie_tolerance,
                tie_relative=tie_relative,
            )
            if not action_values:
                result = replace(result, q_values=None, action_gap=None, next_best_action=None)
            return result
        return backward_induction(
            compiled,
            objective,
            terminal_value=terminal_value,
            tie_absolute=tie_tolerance,
            tie_relative=tie_relative,
            record_history=record_history,
            action_values=bool(action_values),
        )
    if method == "backward_induction":
        raise SolverError(
            "backward induction needs a finite number of cycles; the model has an infinite "
            "horizon (use 'policy_iteration', 'value_iteration' or 'modified_policy_iteration')"
        )
    if terminal_value is not None:
        raise SolverError("terminal_value applies to a finite horizon only; the model has none")
    result = solve_stationary(
        compiled,
        objective,
        method=method,
        tolerance=tolerance,
        relative=relative,
        max_iterations=max_iterations,
        evaluation_sweeps=evaluation_sweeps,
        tie_absolute=tie_tolerance,
        tie_relative=tie_relative,
        record_history=record_history,
        transition_form=transition_form,
    )
    if not action_values:  # computed by the iterations anyway; dropped as asked
        result = replace(result, q_values=None, action_gap=None, next_best_action=None)
    return result
