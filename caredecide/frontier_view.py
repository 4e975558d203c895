"""A readable willingness-to-pay frontier: near-identical policies shown as one, and the
best action per state and age as the willingness to pay moves.

The exact frontier (:func:`caredecide.frontier.policy_frontier`) can hold dozens of
policies that differ by one age in one state, with QALY differences of 1e-6 and ICERs
that mean nothing. Two views make it readable:

* :func:`collapse_frontier` - consecutive frontier policies whose discounted QALYs and
  costs differ from the first policy of their run by at most a stated tolerance are
  shown as one row (the first policy of the run; the others are listed beside it);
* :func:`region_frame` / :func:`state_switch_points` - for each decision state, the
  best action per (willingness to pay, age) as rectangles, and the willingness-to-pay
  values at which the state's recommendation changes, said in words.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from caredecide.compiled import CompiledModel
from caredecide.frontier import PolicyFrontier

DEFAULT_QALY_TOLERANCE = 1e-3
"""QALYs per person (about 9 hours in full health) below which policies count as one."""


def collapse_frontier(
    frontier: PolicyFrontier,
    willingness_to_pay: float,
    qaly_tolerance: float = DEFAULT_QALY_TOLERANCE,
) -> pd.DataFrame:
    """Merge runs of frontier policies that differ by less than a stated tolerance.

    Parameters
    ----------
    frontier : PolicyFrontier
    willingness_to_pay : float
        Money per QALY that turns the QALY tolerance into a cost tolerance
        (``qaly_tolerance * willingness_to_pay``).
    qaly_tolerance : float
        Largest QALY difference (discounted, per person) to the first policy of a run.

    Returns
    -------
    pandas.DataFrame
        One row per run, in increasing WTP: the columns of ``frontier.table`` for the
        run's first policy, ``wtp_to`` extended to the run's end, ``policies`` (labels
        merged, e.g. ``"P33, P34"``), ``n_policies`` and ``tolerance`` (text).
    """
    if not (np.isfinite(qaly_tolerance) and qaly_tolerance >= 0):
        raise ValueError(f"qaly_tolerance = {qaly_tolerance!r}; expected a number >= 0")
    cost_tolerance = qaly_tolerance * float(willingness_to_pay)
    rows: list[dict] = []
    members: list[list[str]] = []
    for _, row in frontier.table.iterrows():
        if rows:
            first = rows[-1]
            if (
                abs(row["qalys"] - first["qalys"]) <= qaly_tolerance
                and abs(row["cost"] - first["cost"]) <= cost_tolerance
            ):
                first["wtp_to"] = row["wtp_to"]
                first["net_monetary_benefit_to"] = row["net_monetary_benefit_to"]
                members[-1].append(row["policy"])
                continue
        rows.append(row.to_dict())
        members.append([row["policy"]])
    table = pd.DataFrame(rows)
    table["policies"] = [", ".join(dict.fromkeys(m)) for m in members]
    table["n_policies"] = [len(dict.fromkeys(m)) for m in members]
    table["tolerance"] = (
        f"policies within {qaly_tolerance:g} QALYs and {cost_tolerance:,.2f} in cost of the "
        "first policy of a run are shown as one"
    )
    return table


def _runs(actions: np.ndarray) -> list[tuple[int, int, int]]:
    """(action, first cycle, last cycle) of each run of equal actions."""
    change = np.flatnonzero(np.diff(actions)) + 1
    starts = np.concatenate([[0], change])
    ends = np.concatenate([change, [len(actions)]]) - 1
    return [(int(actions[a]), int(a), int(b)) for a, b in zip(starts, ends, strict=True)]


def policy_regions(
    compiled: CompiledModel,
    policies: Sequence[np.ndarray],
    x_from: Sequence[float] | np.ndarray,
    x_to: Sequence[float] | np.ndarray,
) -> pd.DataFrame:
    """Best action per state as rectangles over (x, age): one per run of equal actions.

    Parameters
    ----------
    compiled : CompiledModel
        For ids, labels, ages and decision states.
    policies : sequence of (Tpi, S) int
        The policy on each x interval.
    x_from, x_to : sequence of float
        The interval of x (willingness to pay, or an estimate's value) of each policy.

    Returns
    -------
    pandas.DataFrame
        ``state, state_label, x_from, x_to, age_from, age_to`` (ages at the start of the
        run's first cycle and at the end of its last: the rectangle's edges; cycles for
        an infinite horizon), ``action, action_label``.
    """
    ages = compiled.ages() if compiled.n_cycles is not None else None
    decision = ~compiled.absorbing & (compiled.allowed.sum(axis=1) >= 2)
    state_labels = compiled.state_labels or compiled.state_ids
    action_labels = compiled.action_labels or compiled.action_ids
    rows = []
    for policy, lo, hi in zip(policies, x_from, x_to, strict=True):
        policy = np.asarray(policy)
        for s in np.flatnonzero(decision):
            for action, first, last in _runs(policy[:, s]):
                rows.append(
                    {
                        "state": compiled.state_ids[s],
                        "state_label": state_labels[s] or compiled.state_ids[s],
                        "x_from": float(lo),
                        "x_to": float(hi),
                        "age_from": float(ages[first]) if ages is not None else float(first),
                        "age_to": float(ages[last + 1]) if ages is not None else float(last + 1),
                        "action": compiled.action_ids[action],
                        "action_label": action_labels[action] or compiled.action_ids[action],
                    }
                )
    return pd.DataFrame(rows)


def region_frame(compiled: CompiledModel, frontier: PolicyFrontier) -> pd.DataFrame:
    """:func:`policy_regions` over the frontier's WTP intervals (x = willingness to pay)."""
    table = frontier.table
    policies = [frontier.policies[label] for label in table["policy"]]
    return policy_regions(compiled, policies, table["wtp_from"], table["wtp_to"])


def state_switch_points(compiled: CompiledModel, frontier: PolicyFrontier) -> pd.DataFrame:
    """The willingness-to-pay values at which each state's recommendation changes.

    Returns
    -------
    pandas.DataFrame
        One row per (switch point, state whose actions change there): ``wtp``,
        ``state``, ``state_label``, ``before``, ``after`` (the state's policy in words on
        either side, action labels by age band).
    """
    from caredecide.structure import age_bands

    ages = compiled.ages() if compiled.n_cycles is not None else None
    decision = ~compiled.absorbing & (compiled.allowed.sum(axis=1) >= 2)
    state_labels = compiled.state_labels or compiled.state_ids
    action_labels = compiled.action_labels or compiled.action_ids

    def words(actions: np.ndarray) -> str:
        parts = []
        for action, band in age_bands(actions, ages):
            label = action_labels[action] or compiled.action_ids[action]
            parts.append(f"{label} at every age" if band == "all ages" else f"{label} at {band}")
        return "; ".join(parts)

    table = frontier.table
    rows = []
    for i in range(1, len(table)):
        before = frontier.policies[table["policy"].iloc[i - 1]]
        after = frontier.policies[table["policy"].iloc[i]]
        for s in np.flatnonzero(decision):
            if not np.array_equal(before[:, s], after[:, s]):
                rows.append(
                    {
                        "wtp": float(table["wtp_from"].iloc[i]),
                        "state": compiled.state_ids[s],
                        "state_label": state_labels[s] or compiled.state_ids[s],
                        "before": words(before[:, s]),
                        "after": words(after[:, s]),
                    }
                )
    return pd.DataFrame(rows, columns=["wtp", "state", "state_label", "before", "after"])
