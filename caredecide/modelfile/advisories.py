"""Checks that catch common modelling slips: distributions that do not fit their
parameter, unused parameters, and one-off charges that can repeat cycle after cycle.

* :func:`distribution_problems` (errors, before any sampling): a distribution whose
  draws can leave the range of its parameter's kind, such as a normal on a probability
  or a gamma on a QALY weight. Found by ``check`` rather than by a failed draw
  thousands of samples into an analysis.
* :func:`unused_parameter_warnings`: an estimate no expression reads still takes part
  in one-way, threshold and probabilistic runs, and usually means a typo elsewhere.
* :func:`repeated_charge_warnings`: an action's one-off cost or QALY loss is charged
  each time the action is taken. If taking it leaves part of the cohort in the same
  state, where the action is allowed again, the "one-off" charge can be paid again in
  the next cycle, and the next. That is how a "start treatment" action written as an
  ordinary row of the untreated state charges the start-up cost every year while the
  cohort never reaches the treated state.
"""

from __future__ import annotations

import math

import numpy as np

from caredecide.compiled import transition_diagonal
from caredecide.errors import DistributionError, ModelWarningRecord, Problem
from caredecide.model import Model

__all__ = [
    "KIND_RANGES",
    "bound_problems",
    "distribution_problems",
    "repeated_charge_warnings",
    "unused_derived_warnings",
    "unused_parameter_warnings",
]

KIND_RANGES: dict[str, tuple[float, float, str]] = {
    "probability": (0.0, 1.0, "a probability lies in [0, 1]"),
    "rate": (0.0, math.inf, "a rate is >= 0"),
    "relative_risk": (0.0, math.inf, "a relative risk is >= 0"),
    "hazard_ratio": (0.0, math.inf, "a hazard ratio is >= 0"),
    "odds_ratio": (0.0, math.inf, "an odds ratio is >= 0"),
    "count": (0.0, math.inf, "a count is >= 0"),
    "qaly_weight": (-math.inf, 1.0, "a QALY weight is at most 1 (full health)"),
}
"""Values each parameter kind can take (kinds absent here, cost and other, are free)."""

# Families a modeller would pick instead, by kind (common practice; Briggs, Claxton &
# Sculpher 2006, Decision Modelling for Health Economic Evaluation, chapter 4, from memory).
_FITTING = {
    "probability": "beta",
    "rate": "gamma or lognormal",
    "relative_risk": "lognormal",
    "hazard_ratio": "lognormal",
    "odds_ratio": "lognormal",
    "count": "gamma",
    "qaly_weight": "beta (or a gamma/lognormal on the decrement 1 - weight)",
}


def _interval(low: float, high: float) -> str:
    left = "(" if math.isinf(low) else "["
    right = ")" if math.isinf(high) else "]"
    return f"{left}{low:g}, {high:g}{right}"


def distribution_problems(model: Model) -> list[Problem]:
    """A problem per parameter whose distribution can draw outside its kind's range.

    Returns
    -------
    list of Problem
        Each at ``parameters.<name>.distribution``, naming the family, its range of
        draws, the kind's range and a family that fits. Distributions that cannot be
        built are left to the structural checks (they report them).
    """
    from caredecide.distributions import distribution_from_spec

    problems: list[Problem] = []
    for name, parameter in model.parameters.items():
        if parameter.distribution is None or parameter.kind not in KIND_RANGES:
            continue
        where = f"parameters.{name}.distribution"
        try:
            distribution = distribution_from_spec(parameter.distribution, where=where)
        except DistributionError:
            continue  # reported by the structural checks
        low, high, rule = KIND_RANGES[parameter.kind]
        draw_low, draw_high = distribution.support()
        if draw_low >= low and draw_high <= high:
            continue
        problems.append(
            Problem(
                where,
                f"a {distribution.kind} distribution draws values in "
                f"{_interval(draw_low, draw_high)}, but {name!r} is a {parameter.kind} and "
                f"{rule}; expected a distribution within {_interval(low, high)}, such as "
                f"{_FITTING[parameter.kind]}",
            )
        )
    return problems


def bound_problems(model: Model) -> list[Problem]:
    """A problem per ``low``/``high`` bound outside the range of its parameter's kind.

    One-way and threshold analyses move a parameter to its bounds: a bound of 1.5 on a
    probability would otherwise fail deep inside an analysis, at a cell, without the
    parameter's name.
    """
    problems: list[Problem] = []
    for name, parameter in model.parameters.items():
        if parameter.kind not in KIND_RANGES:
            continue
        low, high, rule = KIND_RANGES[parameter.kind]
        for key in ("low", "high"):
            bound = getattr(parameter, key)
            if bound is None or not math.isfinite(bound) or low <= bound <= high:
                continue
            problems.append(
                Problem(
                    f"parameters.{name}.{key}",
                    f"{bound!r} is outside the range of a {parameter.kind} "
                    f"({rule}); expected a bound within {_interval(low, high)}",
                )
            )
    return problems


def unused_parameter_warnings(model: Model, used_names: set[str]) -> list[ModelWarningRecord]:
    """A warning per parameter (or Dirichlet group member) no expression uses.

    Parameters
    ----------
    model : Model
    used_names : set of str
        Every name referenced by the model's expressions.
    """
    from caredecide.expressions import did_you_mean

    records: list[ModelWarningRecord] = []
    declared = [(name, f"parameters.{name}") for name in model.parameters]
    # A Dirichlet group often leaves one member unread (its row ends in "rest"): only a
    # group none of whose members is used is reported, by its first member.
    declared += [
        (group.members[0], f"groups.{group.name}.members")
        for group in model.groups.values()
        if group.members and not set(group.members) & used_names
    ]
    for name, where in declared:
        if name in used_names:
            continue
        # A name used but not declared is already an error; here, a close declared name
        # that is used hints at a near-duplicate (p_progress and p_progres).
        hint = did_you_mean(name, used_names & set(model.parameter_names()))
        records.append(
            ModelWarningRecord(
                where,
                f"{name!r} is not used by any expression; it still takes part in "
                f"sensitivity and uncertainty runs{hint}. Use it, or remove it",
                {"rule": "unused_parameter", "parameter": name},
            )
        )
    return records


def _one_off_values(model: Model) -> dict[tuple[str, str], tuple[str, float | None]]:
    """``(action, "cost" | "QALY loss") -> (text, base-case value or None)`` for every
    one-off charge that is not the number 0; None when it varies with time."""
    from caredecide.compile import setting_values
    from caredecide.derived import resolve_derived
    from caredecide.expressions import parse_expression

    base = model.base_parameter_values() | setting_values(model.settings)
    definitions, _ = resolve_derived(model.derived, model.parameter_names())
    values: dict[tuple[str, str], tuple[str, float | None]] = {}
    for action in model.actions:
        for attribute, what in (("oneoff_cost", "cost"), ("oneoff_qaly_loss", "QALY loss")):
            expression = parse_expression(getattr(action, attribute))
            expression = expression.with_definitions(definitions)
            value = None
            if expression.names <= set(base):
                value = float(expression.evaluate(base))
                if value == 0.0:
                    continue
            values[(action.id, what)] = (expression.source, value)
    return values


def unused_derived_warnings(model: Model, used_by_cells: set[str]) -> list[ModelWarningRecord]:
    """A warning per ``[derived]`` name that no cell uses, directly or through another."""
    from caredecide.errors import ExpressionError
    from caredecide.expressions import parse_expression

    refers: dict[str, set[str]] = {}
    for name, text in model.derived.items():
        try:
            refers[name] = set(parse_expression(text).names) & model.derived.keys()
        except ExpressionError:
            refers[name] = set()
    used, frontier = set(), set(used_by_cells)
    while frontier:
        name = frontier.pop()
        if name not in used:
            used.add(name)
            frontier |= refers.get(name, set())
    return [
        ModelWarningRecord(
            f"derived.{name}",
            f"{name!r} is not used by any cell of the model; use it, or remove it",
            {"rule": "unused_derived", "name": name},
        )
        for name in model.derived
        if name not in used
    ]


def repeated_charge_warnings(model: Model, compiled) -> list[ModelWarningRecord]:
    """A warning per (action, state) whose one-off charge can be paid in consecutive cycles.

    The pattern: the action has a one-off cost or QALY loss (not the number 0), and its
    transition row in a state where it is allowed (base case, any cycle) keeps part of
    the cohort in that state, where the action is allowed again.

    Parameters
    ----------
    model : Model
        The (expanded, validated) model ``compiled`` came from.
    compiled : CompiledModel
        Its base case: ``transition`` (1, Tp, A, S, S), ``allowed`` (S, A) and
        ``absorbing`` (S,).
    """
    records: list[ModelWarningRecord] = []
    charges = _one_off_values(model)
    stay = transition_diagonal(compiled, 0).max(axis=0)  # (A, S)
    pattern = compiled.allowed & (stay.T > 0) & ~compiled.absorbing[:, None]  # (S, A)
    for s, a in np.argwhere(pattern):
        action, state = model.action_ids[a], model.state_ids[s]
        parts = []
        for what in ("cost", "QALY loss"):
            if (action, what) in charges:
                text, value = charges[(action, what)]
                shown = f"{value:g}" if value is not None else repr(text)
                parts.append(f"one-off {what} {shown}")
        if not parts:
            continue
        records.append(
            ModelWarningRecord(
                f"actions.{action}",
                f"{' and '.join(parts)} is charged each cycle {action!r} is taken in "
                f"{state!r}, and its row keeps up to {stay[a, s]:.3g} of the cohort in "
                f"{state!r}, where {action!r} is allowed again: the one-off charge can be paid "
                "in consecutive cycles. If the action starts something once, move the cohort "
                f"to a state that records it (for example {state}_on_treatment); if the "
                "charge recurs by design, use cost_per_cycle or ignore this warning",
                {"rule": "repeated_one_off", "action": action, "state": state},
            )
        )
    return records
