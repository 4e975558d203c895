"""What would change the recommendation: one plain-language answer per health state.

For every decision state this gathers, from analyses the library already runs:

* the **recommended policy** in that state (the base-case optimal action by age band);
* the **estimates that could flip it** inside their plausible ranges: for each estimate
  and side of its base value, the threshold nearest the base value
  (:func:`.thresholds.parameter_thresholds`, put in context by
  :func:`.context.threshold_context`), the ages affected and the action it flips to;
* the **probability of each flip** under that estimate's distribution, every other
  estimate at base (:func:`.context.probability_beyond`);
* optionally, from a probabilistic analysis
  (:func:`caredecide.uncertainty.psa.analyse_uncertainty`), the share of draws whose
  optimal policy differs from the base case in that state when all estimates are
  uncertain together;
* optionally, **scenarios** (alternative models: other assumptions, other settings)
  whose optimal policy differs in that state, and how.

Nothing is recomputed here that another analysis owns: the figures are those of the
threshold table and of the probabilistic analysis (tests/test_recommendation.py checks
that they are equal).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from caredecide.cautions import CAUTION_SHORT
from caredecide.objective import Objective
from caredecide.sensitivity.context import ABOVE, threshold_context
from caredecide.sensitivity.thresholds import DEFAULT_GRID, parameter_thresholds
from caredecide.sensitivity.variation import default_objective
from caredecide.structure import age_bands

FLIP_COLUMNS = [
    "state", "state_label", "parameter", "parameter_label", "direction", "threshold", "base",
    "low", "high", "distance_share", "probability", "threshold_all", "ages", "from_action",
    "to_action", "cells",
]  # fmt: skip


@dataclass(frozen=True)
class RecommendationChanges:
    """Result of :func:`what_would_change`.

    Attributes
    ----------
    recommendations : pandas.DataFrame
        One row per decision state: ``state, state_label, recommended`` (the base-case
        policy in words, action labels by age band), ``flips`` (estimates that can flip
        it), ``psa_share_differs`` (share of probabilistic draws whose optimal policy
        differs in that state; NaN without a probabilistic analysis), ``psa_draws``.
    flips : pandas.DataFrame
        One row per (state, estimate, side of its base value): ``state, state_label,
        parameter, parameter_label, direction`` ("above": the flip happens if the
        estimate rises above ``threshold``; "below": if it falls below), ``threshold``
        (the one nearest the base value), ``base, low, high, distance_share``,
        ``probability`` (of a value beyond the threshold under the estimate's
        distribution), ``threshold_all`` (beyond this value every listed cell has
        flipped), ``ages`` (bands affected), ``from_action, to_action`` (labels),
        ``cells``. Sorted by state, then probability (largest first).
    scenarios : pandas.DataFrame
        One row per (scenario, state) whose optimal policy differs from the base case:
        ``scenario, state, state_label, recommended`` (the scenario's policy in words).
        Empty when no scenario is given or none changes anything.
    scenario_names : list of str
        Scenarios examined.
    objective : Objective
    """

    recommendations: pd.DataFrame
    flips: pd.DataFrame
    scenarios: pd.DataFrame
    scenario_names: list[str]
    objective: Objective

    def to_frame(self) -> pd.DataFrame:
        """The flips table."""
        return self.flips.copy()

    def lines(self) -> list[str]:
        """The answer as plain-language lines (for the CLI and the report)."""
        out = [
            "What would change the recommendation (" + self.objective.describe() + ")",
            CAUTION_SHORT,
        ]
        for row in self.recommendations.itertuples():
            out.append("")
            out.append(f"{row.state_label}: recommended {row.recommended}.")
            flips = self.flips[self.flips["state"] == row.state]
            if flips.empty:
                out.append("  No estimate flips it inside its plausible range.")
            for flip in flips.itertuples():
                out.append("  " + flip_sentence(flip))
            if not np.isnan(row.psa_share_differs):
                out.append(
                    f"  With every estimate uncertain together, {row.psa_share_differs:.1%} of "
                    f"{row.psa_draws:,} probabilistic draws recommend something else here."
                )
            for scenario in self.scenarios[self.scenarios["state"] == row.state].itertuples():
                out.append(f"  Scenario {scenario.scenario!r} changes it: {scenario.recommended}.")
        if self.scenario_names and self.scenarios.empty:
            out.append("")
            out.append(
                "No scenario changes the recommendation (" + ", ".join(self.scenario_names) + ")."
            )
        return out


def flip_sentence(flip: Any) -> str:
    """One flip in words, e.g. ``"If hr_treatment rises above 0.5048 (base 0.5, ...)"``."""
    verb = "rises above" if flip.direction == ABOVE else "falls below"
    ages = f"age{'s' if ('-' in flip.ages or ',' in flip.ages) else ''} {flip.ages}"
    where = (
        f"at {ages}"
        if flip.threshold_all == flip.threshold
        else f"at some of {ages} (at all of them once it {verb} {flip.threshold_all:.6g})"
    )
    chance = (
        "no distribution given"
        if np.isnan(flip.probability)
        else f"probability {flip.probability:.1%} under its distribution"
    )
    return (
        f"If {flip.parameter_label} {verb} {flip.threshold:.6g} (base {flip.base:.6g}, "
        f"range {flip.low:.6g} to {flip.high:.6g}; {flip.distance_share:.0%} of the range "
        f"away): {flip.to_action} instead of {flip.from_action} {where} ({chance})."
    )


def what_would_change(
    model: Any,
    *,
    objective: Objective | None = None,
    grid: int = DEFAULT_GRID,
    thresholds: pd.DataFrame | None = None,
    psa: Any | None = None,
    scenarios: Mapping[str, Any] | None = None,
) -> RecommendationChanges:
    """Per health state: the recommendation, and what would change it.

    Parameters
    ----------
    model : caredecide.model.Model
    objective : Objective, optional
        Default: the model file's objective.
    grid : int
        Grid values per estimate for the threshold search.
    thresholds : pandas.DataFrame, optional
        A table from :func:`.thresholds.parameter_thresholds` (computed when not given).
    psa : caredecide.uncertainty.psa.PSAResult, optional
        A probabilistic analysis of the same model and objective.
    scenarios : mapping of str to Model, optional
        Alternative models (same states and actions) to compare with the base case.
        Default: the model's own named scenarios (``[scenarios.NAME]``), each under its
        label (or name).

    Returns
    -------
    RecommendationChanges
    """
    from caredecide.compile import compile_model
    from caredecide.solvers import solve

    objective = default_objective(model) if objective is None else objective
    if scenarios is None:
        scenarios = model_scenarios(model)
    compiled = compile_model(model)
    base = solve(compiled, objective)
    policy = np.asarray(base.policy[0])  # (Tpi, S)
    decision = np.asarray(base.decision_states, dtype=bool)
    state_label = _labels(model, "states")
    action_label = _labels(model, "actions")
    parameter_label = {
        name: (getattr(p, "label", "") or name) for name, p in model.parameters.items()
    }
    ages = compiled.ages() if compiled.n_cycles is not None else None
    action_ids = list(compiled.action_ids)

    if thresholds is None:
        thresholds = (
            parameter_thresholds(model, objective=objective, grid=grid)
            if model.base_parameter_values()
            else pd.DataFrame(columns=["parameter", "status"])
        )
    flips = _flips(model, thresholds, state_label, action_label, parameter_label)

    shares = share_of_draws_differing(psa, policy, len(compiled.state_ids))
    rows = []
    for s, state in enumerate(compiled.state_ids):
        if not decision[s]:
            continue
        rows.append(
            {
                "state": state,
                "state_label": state_label.get(state, state),
                "recommended": _policy_words(policy[:, s], ages, action_ids, action_label),
                "flips": int((flips["state"] == state).sum()),
                "psa_share_differs": shares[s],
                "psa_draws": int(psa.n_draws) if psa is not None else 0,
            }
        )
    recommendations = pd.DataFrame(rows)

    scenario_rows = []
    for name, alternative in (scenarios or {}).items():
        other = solve(compile_model(alternative), objective).policy[0]
        for s, state in enumerate(compiled.state_ids):
            if decision[s] and not np.array_equal(other[:, s], policy[:, s]):
                scenario_rows.append(
                    {
                        "scenario": name,
                        "state": state,
                        "state_label": state_label.get(state, state),
                        "recommended": _policy_words(other[:, s], ages, action_ids, action_label),
                    }
                )
    scenario_frame = pd.DataFrame(
        scenario_rows, columns=["scenario", "state", "state_label", "recommended"]
    )
    return RecommendationChanges(
        recommendations=recommendations,
        flips=flips,
        scenarios=scenario_frame,
        scenario_names=list(scenarios or {}),
        objective=objective,
    )


def model_scenarios(model: Any) -> dict[str, Any]:
    """The model's named scenarios as ``{label or name: model with its overrides}``."""
    if not getattr(model, "scenarios", None):
        return {}
    from caredecide.scenarios import scenario_models

    return {
        (scenario.label or scenario.name): alternative
        for scenario, alternative in scenario_models(model)[1:]  # [0] is the base case
    }


def _labels(model: Any, kind: str) -> dict[str, str]:
    return {item.id: (getattr(item, "label", "") or item.id) for item in getattr(model, kind)}


def _policy_words(
    actions: np.ndarray,
    ages: np.ndarray | None,
    action_ids: list[str],
    action_label: Mapping[str, str],
) -> str:
    """``"Start treatment at ages 55-84, Monitor at ages 85-99"`` (labels, age bands)."""
    parts = []
    for action, band in age_bands(np.asarray(actions), ages):
        label = action_label.get(action_ids[action], action_ids[action])
        if band == "all ages":
            parts.append(f"{label} at every age")
        else:
            parts.append(f"{label} at age{'s' if '-' in band else ''} {band}")
    return "; ".join(parts)


def _flips(
    model: Any,
    thresholds: pd.DataFrame,
    state_label: Mapping[str, str],
    action_label: Mapping[str, str],
    parameter_label: Mapping[str, str],
) -> pd.DataFrame:
    """Aggregate the threshold context per (state, parameter, side of the base value)."""
    if thresholds.empty or "parameter" not in thresholds.columns:
        return pd.DataFrame(columns=FLIP_COLUMNS)
    context = threshold_context(model, thresholds).dropna(subset=["threshold"])
    rows = []
    keys = ["state", "parameter", "direction"]
    for (state, name, direction), group in context.groupby(keys, sort=False):
        group = group.sort_values("first_cycle", kind="stable")  # bands in age order
        nearest = group.loc[group["distance_share"].idxmin()]
        ends = pd.concat([group["threshold_min"], group["threshold_max"]])
        far = ends.max() if direction == ABOVE else ends.min()
        # Above the base value the base action is the one below the threshold.
        if direction == ABOVE:
            from_ids, to_ids = group["action_below"], group["action_above"]
        else:
            from_ids, to_ids = group["action_above"], group["action_below"]
        rows.append(
            {
                "state": state,
                "state_label": state_label.get(state, state),
                "parameter": name,
                "parameter_label": parameter_label.get(name, name),
                "direction": direction,
                "threshold": nearest["threshold"],
                "base": nearest["base"],
                "low": nearest["low"],
                "high": nearest["high"],
                "distance_share": nearest["distance_share"],
                "probability": nearest["probability_beyond"],
                "threshold_all": far,
                "ages": ", ".join(group["ages"]),
                "from_action": " / ".join(dict.fromkeys(action_label.get(a, a) for a in from_ids)),
                "to_action": " / ".join(dict.fromkeys(action_label.get(a, a) for a in to_ids)),
                "cells": int(group["cells"].sum()),
            }
        )
    frame = pd.DataFrame(rows, columns=FLIP_COLUMNS)
    order = {s: i for i, s in enumerate(dict.fromkeys(context["state"]))}
    frame["_order"] = frame["state"].map(order)
    frame = frame.sort_values(
        ["_order", "probability", "distance_share"],
        ascending=[True, False, True],
        kind="stable",
        na_position="last",
    )
    return frame.drop(columns="_order").reset_index(drop=True)


def share_of_draws_differing(psa: Any | None, policy: np.ndarray, n_states: int) -> np.ndarray:
    """(S,) share of draws whose optimal policy differs from ``policy`` in each state.

    Counted exactly from the distinct per-draw optimal policies of a probabilistic
    analysis and their counts (NaN everywhere without one).
    """
    if psa is None:
        return np.full(n_states, np.nan)
    distinct = np.asarray(psa.distinct_policies)  # (U, Tpi, S)
    counts = np.asarray(psa.distinct_counts, dtype=float)
    differs = (distinct != policy[None]).any(axis=1)  # (U, S)
    return (counts[:, None] * differs).sum(axis=0) / float(psa.n_draws)


__all__ = [
    "RecommendationChanges",
    "flip_sentence",
    "share_of_draws_differing",
    "what_would_change",
]
