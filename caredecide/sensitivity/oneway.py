"""One-way sensitivity analysis: each estimate at its low and high value, ranked.

For every chosen parameter the model is solved with that parameter at the low and at
the high end of its plausible range (every other estimate at its base value, Dirichlet
group mates rescaled, ``rest`` rows recomputed: see :mod:`.variation`). All ``1 + 2P``
parameter sets form ONE batch through the common compile -> solve path.

Reported per parameter: the objective at the model start (start distribution . value
at cycle 0) at low, base and high; the change from base; the swing
``|value(high) - value(low)|`` that ranks the tornado diagram (a common practice
ordering); and whether and where the optimal policy differs from the base-case policy
(states and ages that switch action, from what to what).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from caredecide.objective import Objective
from caredecide.sensitivity.variation import (
    default_objective,
    one_at_a_time_sets,
    parameter_ranges,
    parameter_sets,
    policy_ages,
    require_parameters,
    solve_parameter_sets,
    start_values,
)

ENDS = ("low", "high")


@dataclass(frozen=True)
class OneWayResult:
    """Result of :func:`one_way`.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per parameter, ranked by ``swing`` (largest first): ``rank, parameter,
        base, low, high, range_from, value_low, value_base, value_high, change_low,
        change_high, swing, switches_low, switches_high, policy_changes, rule``. Values
        are the objective at the model start in the objective's unit.
    switches : pandas.DataFrame
        One row per (parameter, end, cycle, state) whose optimal action differs from
        the base case: ``parameter, end, parameter_value, cycle, age, state,
        base_action, action, indifferent`` (``indifferent``: the base or the varied
        solution is a reported tie there).
    base_value : float
        Objective at the model start in the base case.
    objective : Objective
    """

    table: pd.DataFrame
    switches: pd.DataFrame
    base_value: float
    objective: Objective


def one_way(
    model: Any,
    parameters: Sequence[str] | None = None,
    *,
    objective: Objective | None = None,
) -> OneWayResult:
    """One-way analysis of every parameter (or a subset) between its low and high values.

    Parameters
    ----------
    model : caredecide.model.Model
    parameters : sequence of str, optional
        Parameter names (default: every parameter, Dirichlet members included).
    objective : Objective, optional
        Default: the model file's objective and willingness to pay.

    Returns
    -------
    OneWayResult
    """
    objective = default_objective(model) if objective is None else objective
    require_parameters(model)
    ranges = parameter_ranges(model, parameters)
    names = list(ranges["parameter"])
    ends = ranges[["low", "high"]].to_numpy()  # (P, 2)
    frame = pd.concat(
        [parameter_sets(model, {}), one_at_a_time_sets(model, names, ends)], ignore_index=True
    )
    # Only the structure (ids, ages, start) is read from the compiled arrays: those of the
    # base set are kept, not every set's (a large model's transitions are 64 MB a set).
    compiled, result = solve_parameter_sets(model, frame, objective, keep_compiled=False)
    values = start_values(compiled, result)  # (1 + 2P,)
    base_value = float(values[0])
    by_end = values[1:].reshape(len(names), 2)

    switches = _switches(compiled, result, names, ends)
    counts = (
        switches.groupby(["parameter", "end"]).size().unstack(fill_value=0)
        if len(switches)
        else pd.DataFrame()
    )
    table = ranges.assign(
        value_low=by_end[:, 0],
        value_base=base_value,
        value_high=by_end[:, 1],
        change_low=by_end[:, 0] - base_value,
        change_high=by_end[:, 1] - base_value,
        swing=np.abs(by_end[:, 1] - by_end[:, 0]),
    )
    for end in ENDS:
        column = counts[end] if end in counts else pd.Series(dtype=int)
        table[f"switches_{end}"] = table["parameter"].map(column).fillna(0).astype(int).to_numpy()
    table["policy_changes"] = [_describe(switches, name) for name in names]
    table = table.sort_values("swing", ascending=False, kind="stable").reset_index(drop=True)
    table.insert(0, "rank", np.arange(1, len(table) + 1))
    order = [
        "rank", "parameter", "base", "low", "high", "range_from", "value_low", "value_base",
        "value_high", "change_low", "change_high", "swing", "switches_low", "switches_high",
        "policy_changes", "rule",
    ]  # fmt: skip
    return OneWayResult(
        table=table[order], switches=switches, base_value=base_value, objective=objective
    )


def _switches(compiled: Any, result: Any, names: list[str], ends: np.ndarray) -> pd.DataFrame:
    """Cells (cycle, state) whose optimal action differs from the base case (row 0)."""
    policy = np.asarray(result.policy)  # (1 + 2P, Tpi, S)
    indifferent = np.asarray(result.indifferent, dtype=bool)
    changed = (policy[1:] != policy[:1]) & np.asarray(result.decision_states, dtype=bool)[
        None, None, :
    ]
    row, cycle, state = np.nonzero(changed)
    ages = policy_ages(compiled, policy.shape[1])
    state_ids = np.asarray(compiled.state_ids, dtype=object)
    action_ids = np.asarray(compiled.action_ids, dtype=object)
    return pd.DataFrame(
        {
            "parameter": np.asarray(names, dtype=object)[row // 2] if names else [],
            "end": np.asarray(ENDS, dtype=object)[row % 2],
            "parameter_value": ends.reshape(-1)[row] if names else [],
            "cycle": cycle,
            "age": ages[cycle],
            "state": state_ids[state],
            "base_action": action_ids[policy[0, cycle, state]],
            "action": action_ids[policy[1 + row, cycle, state]],
            "indifferent": indifferent[0, cycle, state] | indifferent[1 + row, cycle, state],
        }
    )


def _describe(switches: pd.DataFrame, name: str) -> str:
    """Plain text such as ``"high: stage_1 wait->treat at ages 55-61"``."""
    rows = switches[switches["parameter"] == name]
    if rows.empty:
        return "none"
    parts = []
    for (end, state, before, after), group in rows.groupby(
        ["end", "state", "base_action", "action"], sort=False
    ):
        parts.append(f"{end}: {state} {before}->{after} at {_ages_text(group)}")
    return "; ".join(parts)


def _ages_text(group: pd.DataFrame) -> str:
    """Consecutive cycles merged into bands: ``"ages 55-61, 70"`` (or cycles)."""
    cycles = np.sort(group["cycle"].to_numpy())
    ages = dict(zip(group["cycle"], group["age"], strict=True))
    starts = np.flatnonzero(np.diff(cycles, prepend=cycles[0] - 2) != 1)
    stops = np.append(starts[1:], cycles.size) - 1
    use_age = not np.isnan(group["age"].to_numpy(dtype=float)).any()
    label = "ages" if use_age else "cycles"
    bands = []
    for a, b in zip(cycles[starts], cycles[stops], strict=True):
        lo, hi = (ages[a], ages[b]) if use_age else (a, b)
        bands.append(f"{lo:g}" if a == b else f"{lo:g}-{hi:g}")
    return f"{label} " + ", ".join(bands)
