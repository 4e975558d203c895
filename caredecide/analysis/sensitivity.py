"""The sensitivity suite: one-way ranking, parameter thresholds and setting thresholds.

One set of rules for every front end:

- Parameters: every declared parameter unless some are named; a model with none is
  refused (:func:`caredecide.sensitivity.variation.require_parameters`).
- Willingness-to-pay threshold: searched only for the net-benefit objective, over
  ``[0, H]`` with ``H`` the given maximum, else twice the model's willingness to pay, else
  (a model whose willingness to pay is 0) :data:`caredecide.limits.WTP_SEARCH_MAX_WHEN_ZERO`
  — the same upper end as the acceptability curves. A QALY model is not searched (a note
  says why).
- Discount-rate threshold: searched only for a finite horizon (for an infinite one the
  rate is the contraction factor of the recursion), over ``[0, discount_max]``.
- Setting searches use at least :data:`caredecide.limits.SETTING_THRESHOLD_GRID` grid
  values.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

from caredecide.limits import (
    DISCOUNT_SEARCH_MAX,
    SETTING_THRESHOLD_GRID,
    WTP_SEARCH_MAX_WHEN_ZERO,
)
from caredecide.model import Model
from caredecide.objective import Objective
from caredecide.options import check_scalar
from caredecide.sensitivity import (
    one_way,
    parameter_thresholds,
    setting_thresholds,
    summarise_thresholds,
)
from caredecide.sensitivity.oneway import OneWayResult
from caredecide.sensitivity.thresholds import DEFAULT_GRID

Progress = Callable[[str, int, int], None]
"""``progress(step, done, total)``: brackets found within one step of the suite."""


def willingness_to_pay_search(
    objective: Objective, wtp_max: float | None = None
) -> tuple[float, float] | None:
    """The willingness-to-pay range a threshold search covers, or None when not searched.

    ``None`` for the QALY objective; else ``(0, wtp_max)`` when given, else
    ``(0, 2 x the model's willingness to pay)``, else (willingness to pay 0)
    ``(0, WTP_SEARCH_MAX_WHEN_ZERO)``.
    """
    if objective.kind != "net_benefit":
        return None
    if wtp_max is not None:
        high = check_scalar(wtp_max, "wtp_max", float, min_val=0.0, include_boundaries="neither")
    else:
        high = 2.0 * objective.willingness_to_pay or WTP_SEARCH_MAX_WHEN_ZERO
    return (0.0, float(high))


def setting_threshold(
    model: Model,
    setting: str,
    high: float,
    *,
    objective: Objective | None = None,
    grid: int = DEFAULT_GRID,
    progress: Callable[[int, int], None] | None = None,
) -> pd.DataFrame:
    """Threshold table of one setting searched over ``[0, high]`` (the suite's grid rule).

    The grid has at least :data:`~caredecide.limits.SETTING_THRESHOLD_GRID` values.
    """
    return setting_thresholds(
        model, setting, 0.0, high, objective=objective,
        grid=max(grid, SETTING_THRESHOLD_GRID), progress=progress,
    )  # fmt: skip


@dataclass
class SensitivitySuite:
    """Everything the sensitivity suite found.

    Attributes
    ----------
    objective : Objective
    one_way : OneWayResult
        Ranking of the estimates (tornado) and the policy switches at each end.
    thresholds : pandas.DataFrame
        Parameter values at which the optimal action switches (one row per switch).
    setting_thresholds : dict of str to pandas.DataFrame
        ``"willingness_to_pay"`` and ``"discount_rate"`` threshold tables, when searched.
    searched : dict of str to (low, high)
        The range each setting search covered.
    notes : list of str
        What was not searched, and why.
    """

    objective: Objective
    one_way: OneWayResult
    thresholds: pd.DataFrame
    setting_thresholds: dict[str, pd.DataFrame] = field(default_factory=dict)
    searched: dict[str, tuple[float, float]] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)

    def threshold_summary(self, name: str = "parameters") -> pd.DataFrame:
        """Thresholds merged into age bands: ``"parameters"`` or a setting's name."""
        table = self.thresholds if name == "parameters" else self.setting_thresholds[name]
        return summarise_thresholds(table)

    def to_frame(self) -> pd.DataFrame:
        """The one-way ranking (one row per estimate, largest swing first)."""
        return self.one_way.table

    def tables(self) -> dict[str, pd.DataFrame]:
        """Every table by the file stem the front ends save it under."""
        out = {
            "oneway": self.one_way.table,
            "policy_switches": self.one_way.switches,
            "thresholds": self.thresholds,
        }
        for name, table in self.setting_thresholds.items():
            out[f"threshold_{name}"] = table
        return out

    def to_dict(self) -> dict[str, Any]:
        """The ranking, thresholds and searched ranges as plain lists and numbers."""
        return {
            "objective": self.objective.describe(),
            "tables": {k: v.to_dict(orient="records") for k, v in self.tables().items()},
            "searched": {k: list(v) for k, v in self.searched.items()},
            "notes": list(self.notes),
        }


def analyse_sensitivity(
    model: Model,
    parameters: Sequence[str] | None = None,
    *,
    objective: Objective | None = None,
    grid: int = DEFAULT_GRID,
    wtp_max: float | None = None,
    discount_max: float = DISCOUNT_SEARCH_MAX,
    progress: Progress | None = None,
) -> SensitivitySuite:
    """Run the sensitivity suite under the rules of this module's docstring.

    Parameters
    ----------
    model : Model
    parameters : sequence of str, optional
        Estimates to vary (default: all).
    objective : Objective, optional
        Default: the model's.
    grid : int
        Grid values per parameter (thresholds); setting searches use at least
        :data:`~caredecide.limits.SETTING_THRESHOLD_GRID`.
    wtp_max : float, optional
        Upper end of the willingness-to-pay search (see :func:`willingness_to_pay_search`).
    discount_max : float
        Upper end of the discount-rate search (annual rate).
    progress : callable(step, done, total), optional

    Returns
    -------
    SensitivitySuite
    """
    objective = Objective.from_settings(model.settings) if objective is None else objective
    names = list(parameters) if parameters else None

    def step(name: str):
        return None if progress is None else (lambda done, total: progress(name, done, total))

    one = one_way(model, names, objective=objective)
    thresholds = parameter_thresholds(
        model, names, objective=objective, grid=grid, progress=step("parameter thresholds")
    )
    suite = SensitivitySuite(objective, one, thresholds)
    wtp_range = willingness_to_pay_search(objective, wtp_max)
    if wtp_range is None:
        suite.notes.append(
            "the model maximises QALYs: no willingness-to-pay threshold is searched "
            "(it does not change the policy)"
        )
    else:
        suite.searched["willingness_to_pay"] = wtp_range
        suite.setting_thresholds["willingness_to_pay"] = setting_threshold(
            model, "willingness_to_pay", wtp_range[1], objective=objective,
            grid=grid, progress=step("willingness-to-pay threshold"),
        )  # fmt: skip
    if model.n_cycles() is None:
        suite.notes.append(
            "the model has an infinite horizon: no discount-rate threshold is searched "
            "(the rate is the contraction factor of the recursion)"
        )
    else:
        suite.searched["discount_rate"] = (0.0, float(discount_max))
        suite.setting_thresholds["discount_rate"] = setting_threshold(
            model, "discount_rate", discount_max, objective=objective,
            grid=grid, progress=step("discount-rate threshold"),
        )  # fmt: skip
    return suite
