"""Plain-language summary of a policy's structure (threshold rules), detected, not assumed.

For states with a clinical order (``CompiledModel.ordered_states``) a policy is a
*threshold rule* when two actions ``a`` and ``b`` suffice, at every cycle the ordered
decision states read ``a ... a b ... b`` (one switch along the order), and each state
switches action at most once over age. Such a policy is said in words, e.g.
"treat from stage_2 onward", "treat from age 63 onward in stage_1", "wait in every
state"; anything else is "no simple threshold structure", with the (state, ages) where
each action is chosen. Only decision states count (absorbing states and states with one
allowed action make no choice).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

if TYPE_CHECKING:
    from caredecide.solvers.result import PolicyResult

UNIFORM = "uniform"
THRESHOLD = "threshold"
PER_STATE = "per_state"
NO_STRUCTURE = "none"


@dataclass
class PolicyStructure:
    """What a policy looks like, in words.

    Attributes
    ----------
    kind : {"uniform", "threshold", "per_state", "none"}
        ``uniform``: one action in every decision state and cycle; ``threshold``: a
        threshold rule over ordered states (see the module docstring); ``per_state``: no
        clinical order given, but each state switches at most once over age; ``none``:
        no simple threshold structure.
    text : str
        The summary sentence(s).
    rules : list of str
        The clauses joined in ``text``.
    bands : dict of str to list of (str, str)
        For each action, the (state, ages) where it is chosen, ages as merged bands
        (e.g. ``"55-87"``; ``"all ages"``).
    """

    kind: str
    text: str
    rules: list[str] = field(default_factory=list)
    bands: dict[str, list[tuple[str, str]]] = field(default_factory=dict)

    def __str__(self) -> str:
        return self.text


def age_bands(actions: np.ndarray, ages: np.ndarray | None) -> list[tuple[int, str]]:
    """Merge consecutive cycles with the same action into age bands.

    Parameters
    ----------
    actions : (Tpi,) int
        Action per cycle in one state.
    ages : (Tpi + 1,) float or None
        Age at each boundary (None for an infinite horizon).

    Returns
    -------
    list of (action, band)
        Band text ``"55-61"`` (ages at the start of the first and last cycle of the run),
        ``"62"`` for a single cycle, or ``"all ages"``.
    """
    if ages is None:
        return [(int(actions[0]), "all ages")]
    change = np.flatnonzero(np.diff(actions)) + 1
    starts = np.concatenate([[0], change])
    ends = np.concatenate([change, [len(actions)]]) - 1
    if len(starts) == 1:
        return [(int(actions[0]), "all ages")]
    bands = []
    for first, last in zip(starts, ends, strict=True):
        text = f"{ages[first]:g}" if first == last else f"{ages[first]:g}-{ages[last]:g}"
        bands.append((int(actions[first]), text))
    return bands


def _switches(actions: np.ndarray) -> int:
    return int(np.count_nonzero(np.diff(actions)))


def summarize_policy(result: PolicyResult, draw: int = 0) -> PolicyStructure:
    """Describe the policy of one draw in words (see the module docstring).

    Parameters
    ----------
    result : PolicyResult
    draw : int

    Returns
    -------
    PolicyStructure
    """
    policy = result.policy[draw]  # (Tpi, S)
    ages = result.ages
    names = result.action_ids
    index = {s: i for i, s in enumerate(result.state_ids)}
    decision = [i for i in range(len(result.state_ids)) if result.decision_states[i]]
    ordered = [index[s] for s in result.ordered_states if s in index and index[s] in decision]
    bands: dict[str, list[tuple[str, str]]] = {name: [] for name in names}
    for s in decision:
        for action, band in age_bands(policy[:, s], ages):
            bands[names[action]].append((result.state_ids[s], band))
    bands = {name: rows for name, rows in bands.items() if rows}
    if not decision:
        return PolicyStructure(NO_STRUCTURE, "no state allows a choice", [], bands)
    used = np.unique(policy[:, decision])
    if used.size == 1:
        rule = f"{names[used[0]]} in every state"
        return PolicyStructure(UNIFORM, rule, [rule], bands)
    if not ordered:
        return _per_state(result, policy, decision, bands, draw)
    rules = _threshold_rules(result, policy, ordered, decision)
    if rules is None:
        return _no_structure(bands, result, draw)
    return PolicyStructure(THRESHOLD, "; ".join(rules), rules, bands)


def _threshold_rules(result, policy, ordered, decision) -> list[str] | None:
    """Clauses of a threshold rule, or None when the policy is not one."""
    unordered = [s for s in decision if s not in ordered]
    used = np.unique(policy[:, decision])
    if used.size != 2 or any(_switches(policy[:, s]) for s in unordered):
        return None
    if any(_switches(policy[:, s]) > 1 for s in ordered):
        return None
    first = policy[0, ordered[0]]
    orientations = [(used[0], used[1]), (used[1], used[0])]
    orientations.sort(key=lambda pair: pair[0] != first)  # prefer a = first state's action
    for a, b in orientations:
        is_b = policy[:, ordered] == b  # (Tpi, n_ordered)
        # At each cycle the ordered states read a...a b...b: never a after b along the order.
        if not np.any(is_b[:, :-1] & ~is_b[:, 1:]):
            return _threshold_clauses(result, policy, ordered, unordered, a, b, is_b)
    return None


def _threshold_clauses(result, policy, ordered, unordered, a, b, is_b) -> list[str]:
    names, states, ages = result.action_ids, result.state_ids, result.ages
    always_b = is_b.all(axis=0)
    rules = []
    # The longest suffix of ordered states choosing b in every cycle (monotone: a suffix).
    k = len(ordered)
    while k > 0 and always_b[k - 1]:
        k -= 1
    if k < len(ordered):
        rules.append(f"{names[b]} from {states[ordered[k]]} onward")
    for s in ordered[:k]:
        column = policy[:, s]
        if _switches(column):
            t = int(np.flatnonzero(np.diff(column))[0]) + 1
            if column[t] == b:
                rules.append(f"{names[b]} from age {ages[t]:g} onward in {states[s]}")
            else:
                rules.append(
                    f"{names[b]} in {states[s]} before age {ages[t]:g}, "
                    f"{names[a]} from age {ages[t]:g} onward"
                )
    rules.extend(f"{names[b]} in {states[s]}" for s in unordered if policy[0, s] == b)
    rules.append(f"{names[a]} otherwise")
    return rules


def _per_state(result, policy, decision, bands, draw: int = 0) -> PolicyStructure:
    names, states, ages = result.action_ids, result.state_ids, result.ages
    if any(_switches(policy[:, s]) > 1 for s in decision):
        return _no_structure(bands, result, draw)
    rules = []
    for s in decision:
        column = policy[:, s]
        if _switches(column):
            t = int(np.flatnonzero(np.diff(column))[0]) + 1
            rules.append(
                f"{names[column[0]]} in {states[s]} before age {ages[t]:g}, "
                f"{names[column[t]]} from age {ages[t]:g} onward"
            )
        else:
            rules.append(f"{names[column[0]]} in {states[s]}")
    text = "states have no clinical order; " + "; ".join(rules)
    return PolicyStructure(PER_STATE, text, rules, bands)


def _no_structure(bands, result=None, draw: int = 0) -> PolicyStructure:
    rules = [f"{action} in " + ", ".join(_state_bands(rows)) for action, rows in bands.items()]
    text = "no simple threshold structure: " + "; ".join(rules)
    by_band = _band_descriptions(result, draw) if result is not None else []
    if len(by_band) > 1:
        text += ". By age band: " + "; ".join(by_band)
    return PolicyStructure(NO_STRUCTURE, text, rules, bands)


def _age_words(band: str) -> str:
    """``"ages 55-61"`` for a band of several ages, ``"age 62"`` for one."""
    return f"ages {band}" if "-" in band else f"age {band}"


def _state_bands(rows: list[tuple[str, str]]) -> list[str]:
    """One entry per state with its age bands together: ``"early (ages 60-62, 94-99)"``."""
    grouped: dict[str, list[str]] = {}
    for state, band in rows:
        grouped.setdefault(state, []).append(band)
    out = []
    for state, state_bands in grouped.items():
        if state_bands == ["all ages"]:
            out.append(state)
        else:
            word = "ages" if len(state_bands) > 1 or "-" in state_bands[0] else "age"
            out.append(f"{state} ({word} {', '.join(state_bands)})")
    return out


def _band_descriptions(result: PolicyResult, draw: int) -> list[str]:
    """One clause per age band of :func:`band_table`, e.g. ``"ages 55-83: treat from stage_2
    onward"``; states are listed in clinical order when one is given."""
    table = band_table(result, draw)
    order = [s for s in result.ordered_states if s in table.index]
    order += [s for s in table.index if s not in order]
    ranked = set(result.ordered_states)
    clauses = []
    for band in table.columns:
        column = table.loc[order, band]
        actions = list(dict.fromkeys(column))
        if len(actions) == 1:
            clauses.append(f"{_age_words(band)}: {actions[0]} in every state")
            continue
        first, later = column.iloc[0], [a for a in actions if a != column.iloc[0]]
        switch = int(np.argmax(column.to_numpy() != first))
        monotone = (
            len(later) == 1
            and (column.iloc[switch:] == later[0]).all()
            and all(s in ranked for s in order)
        )
        if monotone:
            clauses.append(
                f"{_age_words(band)}: {later[0]} from {order[switch]} onward, {first} before"
            )
        else:
            parts = [f"{a} in " + ", ".join(column.index[column == a]) for a in actions]
            clauses.append(f"{_age_words(band)}: " + "; ".join(parts))
    return clauses


def band_table(result: PolicyResult, draw: int = 0) -> pd.DataFrame:
    """The policy of one draw as decision states x age bands.

    Consecutive cycles where no decision state changes action are merged into one band,
    so every column is an age band (``"55-83"``; ``"all ages"`` when nothing changes or
    the horizon is infinite) and every cell an action id.

    Returns
    -------
    pandas.DataFrame
        Index: decision state ids; columns: age bands.
    """
    policy = result.policy[draw][:, result.decision_states]  # (Tpi, decision states)
    states = [s for s, d in zip(result.state_ids, result.decision_states, strict=True) if d]
    changes = np.flatnonzero(np.any(np.diff(policy, axis=0) != 0, axis=1)) + 1
    starts = np.concatenate([[0], changes]).astype(int)
    ends = np.concatenate([changes, [policy.shape[0]]]).astype(int) - 1
    ages = result.ages
    if ages is None or len(starts) == 1:
        labels = ["all ages"]
    else:
        labels = [
            f"{ages[a]:g}" if a == b else f"{ages[a]:g}-{ages[b]:g}"
            for a, b in zip(starts, ends, strict=True)
        ]
    names = np.asarray(result.action_ids, dtype=object)
    return pd.DataFrame(
        names[policy[starts].T], index=pd.Index(states, name="state"), columns=labels
    )
