"""The base case: compile -> solve -> evaluate, once, for every front end."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import pandas as pd

from caredecide.batch import solve_and_evaluate
from caredecide.compiled import CompiledModel
from caredecide.evaluate import PolicyOutcome
from caredecide.model import Model
from caredecide.objective import Objective
from caredecide.solvers import PolicyResult


@dataclass(frozen=True)
class BaseCaseResult:
    """The optimal policy of the base case and its totals.

    Attributes
    ----------
    model : Model
    objective : Objective
        What was maximised (QALYs, or net monetary benefit at a willingness to pay).
    compiled : CompiledModel
        The base case (one draw).
    solution : PolicyResult
        The solver's result: policy (1, Tpi, S), values, action gaps, ties.
    outcome : PolicyOutcome
        Cohort trace and totals of the optimal policy.
    """

    model: Model
    objective: Objective
    compiled: CompiledModel
    solution: PolicyResult
    outcome: PolicyOutcome

    @property
    def totals(self) -> dict[str, float]:
        """Discounted and undiscounted life-years, QALYs, costs, net benefit and value."""
        return self.outcome.totals(0)

    @property
    def structure(self) -> str:
        """The policy in words (e.g. "treat stage 2 from age 55 to 83")."""
        return self.solution.structure().text

    def to_frame(self) -> pd.DataFrame:
        """One row of totals (discounted and undiscounted), as :attr:`totals`."""
        return pd.DataFrame([self.totals])

    def policy_frame(self) -> pd.DataFrame:
        """The optimal policy, one row per (cycle, state)."""
        return self.solution.to_frame()

    def trace_frame(self) -> pd.DataFrame:
        """The cohort trace of the optimal policy."""
        return self.outcome.trace_frame()

    def grouped_trace_frame(self, by: str | Sequence[str]) -> pd.DataFrame:
        """The cohort trace added up by declared state, attribute or tunnel step.

        ``by`` names one or more of :func:`caredecide.grouping.grouping_names` (``"state"``
        for any model; attribute and tunnel names for a model that declares them).
        Columns: ``cycle``, ``age``, the ``by`` columns, ``proportion``.
        """
        from caredecide.grouping import grouped_trace

        return grouped_trace(self.outcome.trace[0], self.outcome.ages, self.compiled, by)

    def time_in_group_frame(self, by: str | Sequence[str]) -> pd.DataFrame:
        """Expected cycles and years (undiscounted) in each group under the optimal policy."""
        from caredecide.grouping import grouped_time

        return grouped_time(self.outcome.trace[0], self.compiled, by)

    def to_dict(self) -> dict[str, Any]:
        """Totals, the policy in words, the objective and the solver's report (JSON-ready)."""
        solution = self.solution
        return {
            "objective": {
                "kind": self.objective.kind,
                "willingness_to_pay": self.objective.willingness_to_pay,
                "unit": self.objective.unit,
            },
            "totals": self.totals,
            "structure": self.structure,
            "solver": {
                "method": solution.method,
                "sweeps": int(solution.iterations),
                "success": bool(solution.success),
                "message": solution.message,
                "error_bound": float(solution.error_bound.max()),
            },
        }


def analyse_base_case(
    model: Model,
    *,
    objective: Objective | None = None,
    willingness_to_pay: float | None = None,
    compiled: CompiledModel | None = None,
    **solve_options: Any,
) -> BaseCaseResult:
    """Solve the base case of ``model`` and evaluate its optimal policy.

    Parameters
    ----------
    model : Model
        A validated model.
    objective : Objective, optional
        Default: the model's objective, with ``willingness_to_pay`` when given.
    willingness_to_pay : float, optional
        Overrides the model's value (money per QALY).
    compiled : CompiledModel, optional
        The compiled base case when the caller has it already (from
        :func:`caredecide.modelfile.validate_and_compile`): not compiled again.
    **solve_options
        Passed to :func:`caredecide.solvers.solve` (``method``, ``record_history``, ...).

    Returns
    -------
    BaseCaseResult
    """
    if objective is None:
        objective = Objective.from_settings(model.settings, willingness_to_pay)
    done = solve_and_evaluate(model, objective, compiled=compiled, **solve_options)
    return BaseCaseResult(model, objective, done.compiled, done.solution, done.outcome)
