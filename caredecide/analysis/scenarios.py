"""Scenario analysis entry point: a side-by-side table from one result object."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from caredecide.model import Model
from caredecide.objective import Objective
from caredecide.scenarios import BASE_CASE, ScenarioOutcome, icer, run_scenarios

COLUMNS = (
    "scenario",
    "label",
    "changes",
    "policy",
    "policy_changed",
    "life_years",
    "qalys",
    "costs",
    "net_monetary_benefit",
    "icer_vs_base_policy",
    "note",
)


@dataclass(frozen=True)
class ScenarioResult:
    """The base case and its scenarios side by side.

    Attributes
    ----------
    outcomes : list of ScenarioOutcome
        The base case first, then the named scenarios in file order.
    """

    outcomes: list[ScenarioOutcome]

    @property
    def base(self) -> ScenarioOutcome:
        return self.outcomes[0]

    def to_frame(self) -> pd.DataFrame:
        """One row per scenario: what it changes, the policy in words, totals, ICER.

        ``icer_vs_base_policy``: under the scenario's assumptions, the scenario's optimal
        policy against the base-case policy kept unchanged (cost per QALY gained); empty
        when the policy is unchanged or cannot be compared (see ``note``).
        """
        rows = []
        for o in self.outcomes:
            changed = o.name != BASE_CASE and not np.array_equal(o.policy, self.base.policy)
            ratio, note = math.nan, o.note
            if o.name != BASE_CASE and changed and o.base_policy_totals is not None:
                kept = o.base_policy_totals
                ratio = icer(o.totals["costs"], o.totals["qalys"], kept["costs"], kept["qalys"])
            elif o.name != BASE_CASE and not changed and not note:
                note = "same policy as the base case"
            rows.append(
                {
                    "scenario": o.name,
                    "label": o.label,
                    "changes": "; ".join(f"{k} = {v}" for k, v in o.overrides.items()),
                    "policy": o.policy_text,
                    "policy_changed": bool(changed),
                    "life_years": o.totals["life_years"],
                    "qalys": o.totals["qalys"],
                    "costs": o.totals["costs"],
                    "net_monetary_benefit": o.totals["net_monetary_benefit"],
                    "icer_vs_base_policy": ratio,
                    "note": note,
                }
            )
        return pd.DataFrame(rows, columns=list(COLUMNS))

    def to_dict(self) -> dict[str, Any]:
        """The table as a list of records (NaN as None), JSON-ready."""
        frame = self.to_frame().astype(object).where(self.to_frame().notna(), None)
        return {"scenarios": frame.to_dict(orient="records")}


def analyse_scenarios(
    model: Model,
    *,
    overrides: Mapping[str, Any] | None = None,
    names: Sequence[str] | None = None,
    objective: Objective | None = None,
    **options: Any,
) -> ScenarioResult:
    """Run the base case and the model's named scenarios (see :mod:`caredecide.scenarios`)."""
    return ScenarioResult(
        run_scenarios(model, overrides=overrides, names=names, objective=objective, **options)
    )
