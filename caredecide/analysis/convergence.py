"""Convergence for teaching: how each method reaches its policy on a model, sweep by sweep.

The rules live in :mod:`caredecide.convergence`; this entry point compiles the model (with
a discount factor of the teacher's choosing, never written to the model file) and returns
its result objects, so front ends only display them.
"""

from __future__ import annotations

from caredecide.compile import compile_model
from caredecide.compiled import CompiledModel
from caredecide.convergence import (
    MethodRace,
    SweepTrace,
    discount_rate_for,
    race_methods,
    trace_sweeps,
    two_state_example,
)
from caredecide.model import Model
from caredecide.modelfile.overrides import with_overrides
from caredecide.objective import Objective


def _problem(model: Model | None, gamma: float | None) -> tuple[CompiledModel, Objective]:
    """Compiled arrays and objective; ``model=None`` is the two-state textbook example."""
    if model is None:
        return two_state_example(0.95 if gamma is None else gamma), Objective("qalys", 0.0)
    if gamma is not None:
        rate = discount_rate_for(gamma, model.settings.cycle_years)
        model = with_overrides(
            model, {"settings.discount_outcomes": rate, "settings.discount_costs": rate}
        )
    return compile_model(model), Objective.from_settings(model.settings)


def analyse_convergence(
    model: Model | None,
    method: str,
    *,
    epsilon: float = 0.01,
    gamma: float | None = None,
    evaluation_sweeps: int = 20,
) -> SweepTrace:
    """Trace ``method`` on ``model`` (None: the two-state example of Puterman 1994, 3.1).

    Parameters
    ----------
    model : Model or None
        A validated model, or None for the textbook example.
    method : str
        One of :data:`caredecide.convergence.TRACED_METHODS` (backward induction for a
        finite horizon, the iterative methods for an infinite one).
    epsilon : float
        ``eps`` of the stopping rule, in value units (absolute).
    gamma : float, optional
        Per-cycle discount factor to use instead of the model's rates (both outcomes and
        costs get the yearly rate giving this factor). The model itself is not changed.
    evaluation_sweeps : int
        Partial evaluation sweeps of modified policy iteration.
    """
    compiled, objective = _problem(model, gamma)
    return trace_sweeps(
        compiled, objective, method, epsilon=epsilon, evaluation_sweeps=evaluation_sweeps
    )


def analyse_method_race(
    model: Model | None,
    *,
    epsilon: float = 0.01,
    gamma: float | None = None,
    evaluation_sweeps: int = 20,
) -> MethodRace:
    """Value, policy and modified policy iteration side by side on a stationary model."""
    compiled, objective = _problem(model, gamma)
    return race_methods(compiled, objective, epsilon=epsilon, evaluation_sweeps=evaluation_sweeps)
