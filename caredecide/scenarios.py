"""Scenario analysis: the base case and named variants, side by side.

A scenario sets values of the model file by path (``settings.discount_costs = 0.06``,
``parameters.hr_treatment.value = 0.6``): the discount rates, the horizon, the
within-cycle method, alternative estimates — standard in health technology assessment.
Each scenario is read and validated as a model file of its own, then every scenario runs
through the one chunk driver (:mod:`caredecide.chunks`), one scenario per chunk, on the
same compile -> solve -> evaluate path as the base case.

The ICER of a scenario compares, under that scenario's assumptions, its optimal policy
with the base-case optimal policy kept unchanged: the cost per QALY of adapting the
decision to the scenario. It is empty when the two policies are the same (nothing to
compare), and when the scenario changes the horizon or cycle length (the base-case
policy has no action for the new cycles).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from caredecide.batch import solve_and_evaluate
from caredecide.chunks import chunk_ranges, run_chunks
from caredecide.evaluate import evaluate_policy
from caredecide.model import Model, Scenario
from caredecide.modelfile.overrides import with_overrides
from caredecide.objective import Objective

BASE_CASE = "base case"
"""Name of the first row of every scenario table."""


@dataclass(frozen=True)
class ScenarioOutcome:
    """One scenario's optimal policy and totals (discounted)."""

    name: str
    label: str
    overrides: Mapping[str, Any]
    policy_text: str
    policy: np.ndarray
    totals: Mapping[str, float]
    base_policy_totals: Mapping[str, float] | None
    note: str = ""


@dataclass(frozen=True)
class ScenarioJob:
    """A chunk job: solve scenarios ``start:stop`` of a list of (name, label, model)."""

    entries: tuple[tuple[str, str, Model], ...]
    objective: Objective | None
    base_policy: np.ndarray | None
    base_shape: tuple[float, int | None] | None

    def __call__(self, start: int, stop: int) -> list[ScenarioOutcome]:
        return [self.one(*self.entries[i]) for i in range(start, stop)]

    def one(self, name: str, label: str, model: Model) -> ScenarioOutcome:
        objective = self.objective or Objective.from_settings(model.settings)
        done = solve_and_evaluate(model, objective)
        compiled, solution, outcome = done.compiled, done.solution, done.outcome
        kept, note = None, ""
        if self.base_policy is not None:
            if (model.settings.cycle_years, model.n_cycles()) != self.base_shape:
                note = "the scenario changes the horizon or cycle: no ICER against the base case"
            else:
                kept = evaluate_policy(compiled, self.base_policy, objective).totals(0)
        return ScenarioOutcome(
            name=name,
            label=label,
            overrides={},
            policy_text=solution.structure().text,
            policy=np.asarray(solution.policy[0]),
            totals=outcome.totals(0),
            base_policy_totals=kept,
            note=note,
        )


def scenario_models(
    model: Model, overrides: Mapping[str, Any] | None = None
) -> list[tuple[Scenario, Model]]:
    """The base case (with ``overrides``) and each named scenario, as validated models.

    ``overrides`` (from ``--set``) apply to the base case and to every scenario; a
    scenario's own values win over them.
    """
    overrides = dict(overrides or {})
    base = Scenario(BASE_CASE, overrides, label="as in the model file")
    out = [(base, with_overrides(model, overrides))]
    for scenario in model.scenarios.values():
        merged = {**overrides, **scenario.overrides}
        out.append((scenario, with_overrides(model, merged)))
    return out


def run_scenarios(
    model: Model,
    *,
    overrides: Mapping[str, Any] | None = None,
    names: Sequence[str] | None = None,
    objective: Objective | None = None,
    map_chunks=None,
    progress=None,
) -> list[ScenarioOutcome]:
    """Solve the base case and the named scenarios; the base case comes first.

    Parameters
    ----------
    model : Model
    overrides : mapping path -> value, optional
        Applied to every scenario (``--set``).
    names : sequence of str, optional
        Only these named scenarios (default: all).
    objective : Objective, optional
        Default: each scenario's own settings (so a scenario may change the willingness
        to pay).
    """
    entries = scenario_models(model, overrides)
    if names is not None:
        unknown = sorted(set(names) - set(model.scenarios))
        if unknown:
            from caredecide.errors import RunOptionError

            raise RunOptionError(
                "scenario", unknown[0], f"one of {sorted(model.scenarios)} (the model's scenarios)"
            )
        entries = [entries[0]] + [e for e in entries[1:] if e[0].name in names]
    base_scenario, base_model = entries[0]
    first = ScenarioJob(((BASE_CASE, base_scenario.label, base_model),), objective, None, None)
    base = first(0, 1)[0]
    job = ScenarioJob(
        tuple((s.name, s.label, m) for s, m in entries[1:]),
        objective,
        base.policy[None],
        (base_model.settings.cycle_years, base_model.n_cycles()),
    )
    rest = [
        o
        for chunk in run_chunks(
            job, chunk_ranges(len(entries) - 1, 1) if len(entries) > 1 else [],
            map_chunks=map_chunks, progress=progress,
        )
        for o in chunk
    ]  # fmt: skip
    outcomes = [base, *rest]
    given = dict(overrides or {})
    return [  # what each row changes: the --set values, then the scenario's own
        ScenarioOutcome(**{**o.__dict__, "overrides": {**given, **s.overrides}})
        for o, (s, _) in zip(outcomes, entries, strict=True)
    ]


def icer(costs: float, qalys: float, base_costs: float, base_qalys: float) -> float:
    """Incremental cost per QALY gained; NaN when the QALYs are equal (no ratio).

    The incremental cost-effectiveness ratio, delta cost / delta QALYs (common practice).
    """
    delta = qalys - base_qalys
    if math.isclose(delta, 0.0, abs_tol=1e-12):
        return math.nan
    return (costs - base_costs) / delta
