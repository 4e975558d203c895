"""Policy-region maps: for whom, and where in the space of one or two estimates, the
recommendation changes.

* :func:`policy_region_map` - one estimate: the best action per (estimate value, age) in
  every decision state. The estimate's range is cut into a grid; the policy solved at
  each grid value is shown from the midpoint with its left neighbour to the midpoint
  with its right one (the map is exact at the grid values; a switch between two grid
  values is drawn at their midpoint: a finer ``grid``, or the threshold table, places it
  exactly).
* :func:`threshold_age_map` - two estimates: per decision state, the **threshold age**
  (the first age from which the state's action no longer changes up to the horizon)
  over a grid of the two estimates.

Both batches go through the common compile -> solve path in one call
(:func:`.variation.solve_parameter_sets`), every other estimate at base.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from caredecide.errors import ModelError, Problem
from caredecide.frontier_view import policy_regions
from caredecide.objective import Objective
from caredecide.sensitivity.variation import (
    check_grid,
    default_objective,
    parameter_ranges,
    parameter_sets,
    solve_parameter_sets,
    source_file,
)

DEFAULT_REGION_GRID = 41
DEFAULT_AGE_GRID = 11


@dataclass(frozen=True)
class RegionMap:
    """Result of :func:`policy_region_map`.

    Attributes
    ----------
    frame : pandas.DataFrame
        Rectangles of :func:`caredecide.frontier_view.policy_regions` with ``x`` the
        estimate's value: ``state, state_label, x_from, x_to, age_from, age_to, action,
        action_label``.
    parameter : str
    base : float
        The estimate's base value (the map's base point).
    low, high : float
    grid : (G,) float
        Values solved.
    action_labels : tuple of str
        Every action label in model order (for colours that never move).
    """

    frame: pd.DataFrame
    parameter: str
    base: float
    low: float
    high: float
    grid: np.ndarray
    action_labels: tuple[str, ...]

    def to_frame(self) -> pd.DataFrame:
        return self.frame.copy()


@dataclass(frozen=True)
class ThresholdAgeMap:
    """Result of :func:`threshold_age_map`.

    Attributes
    ----------
    frame : pandas.DataFrame
        One row per (grid point, decision state): ``state, state_label, x_value,
        y_value, threshold_age`` (years; NaN when one action holds at every age),
        ``action_after`` (label of the action from the threshold age onward),
        ``action_before`` (label of the action just before it; empty when none).
    base : pandas.DataFrame
        The same columns at the base values of both estimates.
    x_parameter, y_parameter : str
    """

    frame: pd.DataFrame
    base: pd.DataFrame
    x_parameter: str
    y_parameter: str

    def to_frame(self) -> pd.DataFrame:
        return self.frame.copy()


def _axis(model: Any, name: str, grid: int) -> tuple[float, float, float, np.ndarray]:
    ranges = parameter_ranges(model, [name]).iloc[0]
    low, high, base = float(ranges["low"]), float(ranges["high"]), float(ranges["base"])
    if not high > low:
        raise ModelError(
            Problem(
                where=f"parameters.{name}",
                message=f"range [{low!r}, {high!r}] has no width; a policy-region map needs "
                "low < high (give low/high or a distribution)",
            ),
            file=source_file(model),
        )
    values = np.linspace(low, high, grid)
    values[-1] = high
    return base, low, high, values


def policy_region_map(
    model: Any,
    parameter: str,
    *,
    grid: int = DEFAULT_REGION_GRID,
    objective: Objective | None = None,
) -> RegionMap:
    """Best action per (estimate value, age) in every decision state.

    Parameters
    ----------
    model : caredecide.model.Model
    parameter : str
    grid : int
        Values over the plausible range (>= 2).
    objective : Objective, optional

    Returns
    -------
    RegionMap
    """
    check_grid(grid, "sensitivity.region_map.grid")
    objective = default_objective(model) if objective is None else objective
    base, low, high, values = _axis(model, parameter, grid)
    compiled, result = solve_parameter_sets(
        model, parameter_sets(model, {parameter: values}), objective
    )
    edges = np.concatenate([[low], (values[1:] + values[:-1]) / 2, [high]])
    frame = policy_regions(compiled, list(np.asarray(result.policy)), edges[:-1], edges[1:])
    labels = tuple(compiled.action_labels or compiled.action_ids)
    return RegionMap(frame, parameter, base, low, high, values, labels)


def threshold_age(actions: np.ndarray, ages: np.ndarray | None) -> tuple[float, int, int]:
    """(age, action after, action before) of the last switch of one state's policy.

    ``actions`` is (Tpi,) action indices; ``ages`` the boundary ages (Tpi + 1,). With one
    action at every age (or no ages) the age is NaN and the action before is -1.
    """
    change = np.flatnonzero(np.diff(actions))
    if change.size == 0 or ages is None:
        return float("nan"), int(actions[-1]), -1
    last = int(change[-1]) + 1
    return float(ages[last]), int(actions[last]), int(actions[last - 1])


def threshold_age_map(
    model: Any,
    x_parameter: str,
    y_parameter: str,
    *,
    grid: int = DEFAULT_AGE_GRID,
    objective: Objective | None = None,
) -> ThresholdAgeMap:
    """Threshold age per decision state over a grid of two estimates (and at base).

    Parameters
    ----------
    model : caredecide.model.Model
    x_parameter, y_parameter : str
        Two different parameters with a range.
    grid : int
        Values per axis (>= 2).
    objective : Objective, optional

    Returns
    -------
    ThresholdAgeMap
    """
    if x_parameter == y_parameter:
        raise ModelError(
            Problem(
                where="sensitivity.threshold_age_map",
                message=f"needs two different parameters, got {x_parameter!r} twice",
            ),
            file=source_file(model),
        )
    check_grid(grid, "sensitivity.threshold_age_map.grid")
    objective = default_objective(model) if objective is None else objective
    x_base, _, _, xs = _axis(model, x_parameter, grid)
    y_base, _, _, ys = _axis(model, y_parameter, grid)
    X, Y = np.meshgrid(xs, ys, indexing="xy")
    x_all = np.append(X.ravel(), x_base)  # the last set is the base point
    y_all = np.append(Y.ravel(), y_base)
    frame = parameter_sets(model, {x_parameter: x_all, y_parameter: y_all})
    compiled, result = solve_parameter_sets(model, frame, objective)
    policy = np.asarray(result.policy)
    ages = compiled.ages() if compiled.n_cycles is not None else None
    decision = np.flatnonzero(np.asarray(result.decision_states, dtype=bool))
    state_labels = compiled.state_labels or compiled.state_ids
    action_labels = compiled.action_labels or compiled.action_ids
    rows = []
    for d in range(policy.shape[0]):
        for s in decision:
            age, after, before = threshold_age(policy[d, :, s], ages)
            rows.append(
                {
                    "state": compiled.state_ids[s],
                    "state_label": state_labels[s] or compiled.state_ids[s],
                    "x_value": float(x_all[d]),
                    "y_value": float(y_all[d]),
                    "threshold_age": age,
                    "action_after": action_labels[after] or compiled.action_ids[after],
                    "action_before": (action_labels[before] or compiled.action_ids[before])
                    if before >= 0
                    else "",
                }
            )
    table = pd.DataFrame(rows)
    n_base = len(decision)
    return ThresholdAgeMap(
        frame=table.iloc[:-n_base].reset_index(drop=True),
        base=table.iloc[-n_base:].reset_index(drop=True),
        x_parameter=x_parameter,
        y_parameter=y_parameter,
    )


def estimates_by_decision_loss(model: Any, objective: Objective | None = None) -> list[str]:
    """Estimates with a range, most decisive first (the decision tornado's ranking).

    A map of an estimate that changes no decision is one colour; front ends offer the
    estimates in this order so that the first map shown is the most informative.
    """
    from caredecide.sensitivity.decision import decision_tornado

    ranges = parameter_ranges(model)
    varying = list(ranges.loc[ranges["varies"], "parameter"])
    if not varying:
        return []
    table = decision_tornado(model, varying, objective=objective, grid=5).table
    return list(table["parameter"])
