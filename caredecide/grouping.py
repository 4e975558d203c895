"""Cohort traces and time in state, grouped by attribute or tunnel step.

A model with attributes or tunnels is compiled to one flat state per copy
(:mod:`caredecide.expand`); ``CompiledModel.state_groups`` says where each copy comes
from. These helpers add the copies back up: the share of the cohort on treatment at
each cycle, or the years spent in each tunnel step. For a flat model the only grouping
is ``"state"`` (each state by itself).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from caredecide.compiled import CompiledModel, boundary_weights


def grouping_names(compiled: CompiledModel) -> tuple[str, ...]:
    """Names a trace can be grouped by: ``"state"``, then attributes and tunnels."""
    return tuple(compiled.state_groups) or ("state",)


def state_group_frame(compiled: CompiledModel) -> pd.DataFrame:
    """One row per flat state: ``state_id``, ``label`` and one column per grouping.

    Returns
    -------
    pandas.DataFrame
        (S rows) columns ``state_id``, ``label``, then :func:`grouping_names`; ``""`` in
        a grouping column where the state does not carry that attribute or tunnel.
    """
    groups = dict(compiled.state_groups) or {"state": compiled.state_ids}
    labels = compiled.state_labels or compiled.state_ids
    frame = pd.DataFrame({"state_id": list(compiled.state_ids), "label": list(labels)})
    for name, values in groups.items():
        frame[name] = list(values)
    return frame


def _by(compiled: CompiledModel, by: str | Sequence[str]) -> list[str]:
    names = [by] if isinstance(by, str) else list(by)
    known = grouping_names(compiled)
    unknown = [n for n in names if n not in known]
    if unknown or not names:
        raise ValueError(
            f"cannot group by {unknown or names!r}; expected one or more of {list(known)}"
        )
    return names


def grouped_trace(
    trace: np.ndarray, ages: np.ndarray, compiled: CompiledModel, by: str | Sequence[str]
) -> pd.DataFrame:
    """Cohort trace with the states of each group added up.

    Parameters
    ----------
    trace : (T + 1, S) float
        Share of the cohort in each flat state at each boundary (one draw of
        ``PolicyOutcome.trace``).
    ages : (T + 1,) float
        Age at each boundary.
    compiled : CompiledModel
        The model the trace belongs to (for ``state_groups``).
    by : str or sequence of str
        Grouping names (:func:`grouping_names`), e.g. ``"on_treatment"`` or
        ``["state", "on_treatment"]``.

    Returns
    -------
    pandas.DataFrame
        Long frame: ``cycle``, ``age``, one column per ``by`` name, ``proportion``;
        proportions of one cycle sum to the trace's (1 for a whole cohort).
    """
    names = _by(compiled, by)
    trace = np.asarray(trace, dtype=float)
    n_t, n_s = trace.shape
    if n_s != compiled.n_states:
        raise ValueError(f"trace has {n_s} states; the model has {compiled.n_states}")
    frame = pd.DataFrame(
        {
            "cycle": np.repeat(np.arange(n_t), n_s),
            "age": np.repeat(np.asarray(ages, dtype=float), n_s),
            "state": np.tile(np.asarray(compiled.state_ids, dtype=object), n_t),
            "proportion": trace.ravel(),
        }
    )
    return group_trace_frame(frame, state_group_frame(compiled), names)


def group_trace_frame(
    frame: pd.DataFrame, groups: pd.DataFrame, by: str | Sequence[str]
) -> pd.DataFrame:
    """A long trace frame (``PolicyOutcome.trace_frame``) added up by group.

    Parameters
    ----------
    frame : pandas.DataFrame
        Columns ``cycle``, ``age``, ``state`` (flat state id) and ``proportion``.
    groups : pandas.DataFrame
        :func:`state_group_frame` of the same model.
    by : str or sequence of str
        Columns of ``groups`` to add up by.

    Returns
    -------
    pandas.DataFrame
        ``cycle``, ``age``, the ``by`` columns and ``proportion``, in trace order.
    """
    names = [by] if isinstance(by, str) else list(by)
    missing = [n for n in names if n not in groups.columns or n in ("state_id", "label")]
    if missing or not names:
        raise ValueError(
            f"cannot group by {missing or names!r}; expected one or more of "
            f"{[c for c in groups.columns if c not in ('state_id', 'label')]}"
        )
    lookup = groups.set_index("state_id")[names]
    flat = frame[["cycle", "age", "state", "proportion"]].rename(columns={"state": "state_id"})
    joined = flat.join(lookup, on="state_id")
    summed = joined.groupby(["cycle", "age", *names], sort=False, as_index=False)["proportion"]
    return summed.sum()[["cycle", "age", *names, "proportion"]]


def grouped_time(
    trace: np.ndarray, compiled: CompiledModel, by: str | Sequence[str]
) -> pd.DataFrame:
    """Expected time spent in each group, undiscounted, with the model's within-cycle method.

    The occupancy at each boundary is weighted by :func:`caredecide.compiled.boundary_weights`;
    in a model with decision-time moves the boundary counts the cohort before the move.

    Parameters
    ----------
    trace : (T + 1, S) float
        One draw of a finite-horizon ``PolicyOutcome.trace``.
    compiled : CompiledModel
    by : str or sequence of str

    Returns
    -------
    pandas.DataFrame
        One row per group: the ``by`` columns, ``cycles`` (expected cycles spent there,
        ``sum_t w_t m_t``) and ``years`` (``cycles`` x cycle length).
    """
    names = _by(compiled, by)
    trace = np.asarray(trace, dtype=float)
    weights = boundary_weights(compiled.within_cycle, trace.shape[0] - 1)
    per_state = weights @ trace  # (S,) expected cycles in each flat state
    groups = state_group_frame(compiled)
    frame = groups[names].copy()
    frame["cycles"] = per_state
    out = frame.groupby(names, sort=False, as_index=False)["cycles"].sum()
    out["years"] = out["cycles"] * compiled.cycle_length
    return out


def with_group_columns(frame: pd.DataFrame, compiled: CompiledModel) -> pd.DataFrame:
    """``frame`` (a ``state`` column of flat state ids) with where each state comes from.

    Adds ``declared_state`` and one column per attribute and tunnel (value name or step,
    ``""`` where the state does not carry it), so a trace or policy table written to CSV
    can be added up by group elsewhere. A flat model's frame is returned unchanged; a
    grouping whose name is already a column is left out.
    """
    if not compiled.state_groups:
        return frame
    groups = state_group_frame(compiled).rename(columns={"state": "declared_state"})
    names = [c for c in groups.columns if c not in ("state_id", "label", *frame.columns)]
    return frame.join(groups.set_index("state_id")[names], on="state")


def states_named(compiled: CompiledModel, name: str) -> np.ndarray | None:
    """(S,) bool: the states ``name`` stands for, or None when it names none.

    ``name`` is a state id of the compiled model, or, for a model with attributes and
    tunnels, a declared state (``"sick"``: every copy) or a declared state with values
    joined by ``__`` (``"sick__treated"``: the copies with that value, at every tunnel
    step), as in the model file.
    """
    ids = np.asarray(compiled.state_ids, dtype=object)
    if name in compiled.state_ids:
        return ids == name
    groups = compiled.state_groups
    if not groups:
        return None
    from caredecide.expand import SEPARATOR

    base, *values = name.split(SEPARATOR)
    mask = np.asarray(groups["state"], dtype=object) == base
    others = [np.asarray(v, dtype=object) for k, v in groups.items() if k != "state"]
    for value in values:
        mask &= np.any([column == value for column in others], axis=0) if others else False
    return mask if mask.any() else None


def trace_by_group(frame: pd.DataFrame, groups: pd.DataFrame, by: str) -> pd.DataFrame:
    """A long trace frame added up by one grouping, shaped for a cohort trace chart.

    The ``state`` column holds the group (value name, tunnel step or declared state);
    states that do not carry the attribute or tunnel are shown as ``"(no <by>)"``.
    """
    shown = group_trace_frame(frame, groups, by)
    shown[by] = shown[by].replace("", f"(no {by})")
    return shown.rename(columns={by: "state"})
