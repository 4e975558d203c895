"""Decision tornado: which estimate, over its plausible range, costs most if ignored.

A value-level tornado ranks estimates by how much they move the expected outcome. An
estimate that moves every policy's outcome by the same amount tops that chart although it
can change no decision. A committee asks another question: *what would we lose by keeping
today's recommendation if the estimate were at another value of its range?*

For each estimate ``x`` with plausible range ``[low, high]`` and base value ``x0``, the
model is solved on a grid of ``G`` values of ``x`` (every other estimate at base,
Dirichlet group mates rescaled, ``rest`` rows recomputed, see :mod:`.variation`), all
estimates in ONE batch through the common compile -> solve path. At each value:

* ``V*(x)``: the objective at the model start under the policy optimal at ``x``;
* ``V_0(x)``: the objective of the base-case policy (optimal at ``x0``) evaluated at ``x``;
* the **loss** ``L(x) = V*(x) - V_0(x) >= 0``: the value lost by keeping the base-case
  policy when the estimate is in fact ``x`` (the conditional value of perfect information
  about ``x`` at that value). It is exactly 0 where the optimal policy is the base policy.

Reported per estimate: the loss at the low and high ends, the loss at the bounds
``(L(low) + L(high)) / 2`` - the expected value of perfect information about ``x`` alone
when it is equally likely to lie at either bound and the base policy is kept otherwise
(EVPI one parameter at a time; Felli & Hazen 1998, Med Decis Making 18(1):95-109,
"Sensitivity analysis and the expected value of perfect information", from memory) -
and the largest loss on the grid. The table is **ranked by the loss at the bounds**
(largest first; ties by the largest loss on the grid, then by the share of cells
changed, then by the swing of the value-level tornado).

Losses are in the objective's unit: money for net monetary benefit (with the QALY
equivalent ``loss / lambda``, the net health benefit lost; Stinnett & Mullahy 1998, Med
Decis Making 18(2 Suppl):S68-S80), QALYs for a QALY objective (no money figure).

Also per estimate: the share of decision cells (state, age) whose best action differs
from the base case somewhere on the grid, and the distance from the base value to the
nearest decision threshold (:func:`.thresholds.parameter_thresholds`) as a share of the
range ``|t - x0| / (high - low)`` (small: a small move of the estimate flips a decision).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from caredecide.evaluate import evaluate_policy
from caredecide.objective import Objective
from caredecide.sensitivity.thresholds import DEFAULT_GRID, SWITCH, parameter_thresholds
from caredecide.sensitivity.variation import (
    check_grid,
    default_objective,
    one_at_a_time_sets,
    parameter_ranges,
    parameter_sets,
    require_parameters,
    solve_parameter_sets,
    start_values,
)

LOSS_SOURCE = (
    "expected value of perfect information one parameter at a time at its bounds "
    "(Felli & Hazen 1998, Med Decis Making 18(1):95-109)"
)
"""The published basis of the ranking, for captions and reports."""

LOSS_RELATIVE_TOLERANCE = 1e-9
"""Losses below this share of the objective (at least 1 unit x 1e-9) count as zero."""

RANK_COLUMNS = [
    "rank", "parameter", "base", "low", "high", "loss_low", "loss_high", "loss_at_bounds",
    "loss_max", "value_at_loss_max", "loss_qalys_at_bounds", "loss_qalys_max", "cells_changed",
    "share_cells_changed", "nearest_threshold", "distance_share", "changes_policy", "swing",
    "value_rank", "range_from",
]  # fmt: skip


@dataclass(frozen=True)
class DecisionTornado:
    """Result of :func:`decision_tornado`.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per estimate, ranked (see the module docstring): ``rank, parameter,
        base, low, high, loss_low, loss_high, loss_at_bounds, loss_max,
        value_at_loss_max`` (losses in :attr:`unit`, per person, discounted to the model
        start), ``loss_qalys_at_bounds, loss_qalys_max`` (QALYs: net health benefit lost),
        ``cells_changed`` (decision cells whose best action differs from base somewhere
        on the grid), ``share_cells_changed`` (of :attr:`decision_cells`),
        ``nearest_threshold`` (NaN: none in the range), ``distance_share``
        (``|t - base| / (high - low)``), ``changes_policy`` (bool), ``swing`` and
        ``value_rank`` (rank in the value-level tornado), ``range_from``.
    grid : pandas.DataFrame
        One row per (estimate, grid value): ``parameter, value, optimal_value,
        base_policy_value, loss, loss_qalys, cells_changed`` (for charts).
    base_value : float
        Objective at the model start in the base case.
    decision_cells : int
        Decision cells (decision states x decision cycles) counted in the shares.
    objective : Objective
    thresholds : pandas.DataFrame
        The threshold table the distances come from.
    """

    table: pd.DataFrame
    grid: pd.DataFrame
    base_value: float
    decision_cells: int
    objective: Objective
    thresholds: pd.DataFrame

    @property
    def unit(self) -> str:
        """Unit of the losses: ``"money"`` or ``"QALYs"``."""
        return self.objective.unit

    @property
    def source(self) -> str:
        """The published basis of the ranking."""
        return LOSS_SOURCE

    def to_frame(self) -> pd.DataFrame:
        """The ranked table."""
        return self.table.copy()


def decision_tornado(
    model: Any,
    parameters: Sequence[str] | None = None,
    *,
    objective: Objective | None = None,
    grid: int = DEFAULT_GRID,
    thresholds: pd.DataFrame | None = None,
) -> DecisionTornado:
    """Rank estimates by the value lost when the base-case policy is kept.

    Parameters
    ----------
    model : caredecide.model.Model
    parameters : sequence of str, optional
        Default: every parameter (Dirichlet members included).
    objective : Objective, optional
        Default: the model file's objective and willingness to pay.
    grid : int
        Values per estimate, evenly spaced over its range (>= 2; the base value is added).
    thresholds : pandas.DataFrame, optional
        A table from :func:`.thresholds.parameter_thresholds` for the same model and
        objective (computed when not given).

    Returns
    -------
    DecisionTornado
    """
    objective = default_objective(model) if objective is None else objective
    require_parameters(model)
    check_grid(grid, "sensitivity.grid")
    ranges = parameter_ranges(model, parameters)
    names = list(ranges["parameter"])
    base = ranges["base"].to_numpy()
    low, high = ranges["low"].to_numpy(), ranges["high"].to_numpy()
    fraction = np.linspace(0.0, 1.0, grid)
    values = low[:, None] + (high - low)[:, None] * fraction[None, :]
    values[:, -1] = high
    values = np.concatenate([values, base[:, None]], axis=1)  # (P, G + 1): base last
    frame = pd.concat(
        [parameter_sets(model, {}), one_at_a_time_sets(model, names, values)], ignore_index=True
    )
    compiled, result = solve_parameter_sets(model, frame, objective)
    policy = np.asarray(result.policy)  # (1 + P (G + 1), Tpi, S)
    optimal = start_values(compiled, result)
    kept = evaluate_policy(compiled, policy[:1], objective)
    same = (policy == policy[:1]).all(axis=(1, 2))
    loss = optimal - np.asarray(kept.value)
    # Exactly zero where the base policy is optimal, and where the two policies differ
    # only in cells the cohort never reaches or by ties within the solver's tolerance.
    tolerance = LOSS_RELATIVE_TOLERANCE * np.maximum(1.0, np.abs(optimal))
    loss = np.where(same | (loss <= tolerance), 0.0, loss)
    decision = np.asarray(result.decision_states, dtype=bool)
    changed_cells = (policy != policy[:1]) & decision[None, None, :]
    n_cells = int(decision.sum() * policy.shape[1])

    P, G1 = values.shape
    by_value = loss[1:].reshape(P, G1)
    changed = changed_cells[1:].reshape(P, G1, *changed_cells.shape[1:])
    union = changed.any(axis=1).sum(axis=(1, 2))  # (P,)
    qaly_factor = _qaly_factor(objective)
    table = ranges[["parameter", "base", "low", "high", "range_from"]].copy()
    table["loss_low"] = by_value[:, 0]
    table["loss_high"] = by_value[:, grid - 1]
    table["loss_at_bounds"] = (table["loss_low"] + table["loss_high"]) / 2
    worst = np.argmax(by_value, axis=1)
    table["loss_max"] = by_value[np.arange(P), worst]
    table["value_at_loss_max"] = np.where(
        table["loss_max"] > 0, values[np.arange(P), worst], np.nan
    )
    table["loss_qalys_at_bounds"] = table["loss_at_bounds"] * qaly_factor
    table["loss_qalys_max"] = table["loss_max"] * qaly_factor
    table["cells_changed"] = union.astype(int)
    table["share_cells_changed"] = union / n_cells if n_cells else 0.0
    table["changes_policy"] = union > 0
    opt = optimal[1:].reshape(P, G1)
    table["swing"] = np.abs(opt[:, grid - 1] - opt[:, 0])
    table["value_rank"] = table["swing"].rank(ascending=False, method="first").astype(int)

    if thresholds is None:
        thresholds = parameter_thresholds(model, names, objective=objective, grid=grid)
    table["nearest_threshold"], table["distance_share"] = _nearest(thresholds, table)
    table = table.sort_values(
        ["loss_at_bounds", "loss_max", "share_cells_changed", "swing"],
        ascending=False,
        kind="stable",
    ).reset_index(drop=True)
    table.insert(0, "rank", np.arange(1, len(table) + 1))

    kept_value = np.asarray(kept.value)[1:].reshape(P, G1)
    grid_frame = pd.DataFrame(
        {
            "parameter": np.repeat(np.asarray(names, dtype=object), G1),
            "value": values.ravel(),
            "optimal_value": opt.ravel(),
            "base_policy_value": kept_value.ravel(),
            "loss": by_value.ravel(),
            "loss_qalys": by_value.ravel() * qaly_factor,
            "cells_changed": changed.sum(axis=(2, 3)).ravel(),
        }
    ).sort_values(["parameter", "value"], kind="stable")
    grid_frame = grid_frame.drop_duplicates(["parameter", "value"]).reset_index(drop=True)
    return DecisionTornado(
        table=table[RANK_COLUMNS],
        grid=grid_frame,
        base_value=float(optimal[0]),
        decision_cells=n_cells,
        objective=objective,
        thresholds=thresholds,
    )


def _qaly_factor(objective: Objective) -> float:
    """QALYs per unit of the objective: 1 / lambda for net benefit, 1 for QALYs."""
    if objective.kind == "qalys":
        return 1.0
    wtp = float(objective.willingness_to_pay)
    return 1.0 / wtp if wtp > 0 else float("nan")


def _nearest(thresholds: pd.DataFrame, table: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Nearest threshold to the base value, and its distance as a share of the range."""
    nearest = np.full(len(table), np.nan)
    share = np.full(len(table), np.nan)
    key = "parameter" if "parameter" in thresholds.columns else "quantity"
    switches = thresholds[thresholds["status"] == SWITCH]
    for i, row in enumerate(table.itertuples()):
        found = switches.loc[switches[key] == row.parameter, "threshold"].to_numpy(dtype=float)
        if found.size == 0 or not row.high > row.low:
            continue
        k = int(np.argmin(np.abs(found - row.base)))
        nearest[i] = found[k]
        share[i] = abs(found[k] - row.base) / (row.high - row.low)
    return nearest, share
