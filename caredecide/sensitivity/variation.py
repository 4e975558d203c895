"""Batches of parameter sets and settings for deterministic sensitivity analysis.

Every sensitivity analysis in :mod:`caredecide.sensitivity` is one (or a few) batches
of parameter sets compiled and solved in a single call of the common core
(:func:`caredecide.compile.compile_model` then :func:`caredecide.solvers.solve`). This
module builds those batches and keeps moves consistent:

* **Dirichlet groups** (``[groups.<name>]``: the probabilities of one multinomial row).
  When some members of a group move, the members that are *not* moved are rescaled
  proportionally so the group keeps its base-case sum::

      m_i = b_i * (B - sum_{j moved} x_j) / (sum_{i not moved} b_i)

  with ``b`` the base values and ``B = sum b``. A move that would need a negative
  remainder is refused with a :class:`~caredecide.errors.ModelError` naming the value.
* **Remainder rows**: a transition entry written as ``rest`` absorbs whatever
  probability the other entries of its row leave, so a parameter feeding such a row
  needs no adjustment: the compiler recomputes the remainder for every parameter set.

Settings that are not parameters (willingness to pay, discount rates) are varied by
building a compiled model whose draws differ in that setting only
(:func:`compiled_over_willingness_to_pay`, :func:`compiled_over_discount_rate`); the same
solver then runs on it.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd

from caredecide.compiled import CompiledModel
from caredecide.errors import ModelError, Problem
from caredecide.objective import Objective

RULE_DIRICHLET = (
    "Dirichlet group '{group}': the other members are rescaled proportionally so the "
    "group keeps its base-case sum {total:.6g}"
)
RULE_REST = "a 'rest' entry in {rows} absorbs the change (recomputed for every parameter set)"
RULE_NONE = "moved alone"

SETTINGS = ("willingness_to_pay", "discount_outcomes", "discount_costs", "discount_rate")
"""Settings whose thresholds can be searched (``discount_rate`` moves both rates together)."""


# ----------------------------------------------------------------------------- model access


def _groups(model: Any) -> dict[str, Any]:
    groups = getattr(model, "groups", None) or {}
    if isinstance(groups, Mapping):
        return dict(groups)
    return {getattr(g, "name", str(i)): g for i, g in enumerate(groups)}


def group_of(model: Any, name: str) -> tuple[str, tuple[str, ...]] | None:
    """The Dirichlet group a parameter belongs to, as ``(group name, members)``, or None."""
    for group_name, group in _groups(model).items():
        members = tuple(getattr(group, "members", ()))
        if name in members:
            return group_name, members
    return None


def rest_rows_fed_by(model: Any, name: str) -> list[str]:
    """Table paths of transition rows that use ``name`` and hold a ``rest`` entry."""
    from caredecide.compile import parse_model_expressions

    parsed = parse_model_expressions(model)
    with_rest = {(e.action, e.state) for e in parsed.rests}
    return sorted(
        {
            e.where.rsplit(".", 1)[0]
            for e in parsed.transitions
            if (e.action, e.state) in with_rest and name in e.expression.names
        }
    )


def consistency_rule(model: Any, name: str) -> str:
    """Plain-language statement of how the other estimates follow a move of ``name``."""
    rules = []
    group = group_of(model, name)
    if group is not None:
        base = model.base_parameter_values()
        total = float(sum(base[m] for m in group[1]))
        rules.append(RULE_DIRICHLET.format(group=group[0], total=total))
    rest = rest_rows_fed_by(model, name)
    if rest:
        rules.append(RULE_REST.format(rows=", ".join(rest)))
    return "; ".join(rules) if rules else RULE_NONE


def _check_names(model: Any, names: Iterable[str]) -> None:
    from caredecide.expressions import did_you_mean

    known = model.base_parameter_values()
    problems = [
        Problem(
            where=f"parameters.{name}",
            message=f"unknown parameter {name!r}{did_you_mean(name, known)}; "
            f"expected one of {sorted(known)}",
        )
        for name in names
        if name not in known
    ]
    if problems:
        raise ModelError(problems, file=source_file(model))


def source_file(model: Any) -> str | None:
    """The model file path for error messages (None for a model built in memory)."""
    path = getattr(model, "source_path", None)
    return str(path) if path is not None else None


def require_parameters(model: Any) -> None:
    """Refuse a model with nothing to vary, naming the file (one-way and thresholds)."""
    if not model.base_parameter_values():
        raise ModelError(
            Problem(
                where="parameters",
                message="the model has no parameters to vary; one-way "
                "analysis and parameter thresholds need at least one [parameters.NAME] "
                "entry (the willingness-to-pay and discount-rate thresholds do not)",
            ),
            file=source_file(model),
        )


def parameter_ranges(model: Any, names: Sequence[str] | None = None) -> pd.DataFrame:
    """Base value and plausible range of each parameter.

    Parameters
    ----------
    model : caredecide.model.Model
    names : sequence of str, optional
        Parameters to include (default: every parameter, in model order).

    Returns
    -------
    pandas.DataFrame
        One row per parameter: ``parameter``, ``base``, ``low``, ``high``,
        ``range_from`` ("model file" when ``low``/``high`` are given, else
        "distribution 2.5%/97.5%"), ``varies`` (low < high) and ``rule`` (how the other
        estimates follow, see :func:`consistency_rule`).
    """
    base = model.base_parameter_values()
    names = list(base) if names is None else list(names)
    _check_names(model, names)
    rows = []
    for name in names:
        low, high = (float(v) for v in model.parameter_range(name))
        parameter = (getattr(model, "parameters", None) or {}).get(name)
        if parameter is None:
            range_from = "Dirichlet marginal 2.5%/97.5%"
        elif parameter.low is not None and parameter.high is not None:
            range_from = "model file"
        elif parameter.distribution is not None:
            range_from = "distribution 2.5%/97.5%"
        else:
            range_from = "fixed (no range)"
        rows.append(
            {
                "parameter": name,
                "base": float(base[name]),
                "low": low,
                "high": high,
                "range_from": range_from,
                "varies": bool(high > low),
                "rule": consistency_rule(model, name),
            }
        )
    columns = ["parameter", "base", "low", "high", "range_from", "varies", "rule"]
    return pd.DataFrame(rows, columns=columns)


# ----------------------------------------------------------------------------- batches


def parameter_sets(model: Any, changes: Mapping[str, np.ndarray]) -> pd.DataFrame:
    """A batch of parameter sets in which some parameters move and the rest follow.

    Parameters
    ----------
    model : caredecide.model.Model
    changes : mapping of str to (N,) array
        New values of the moved parameters (broadcast to a common length ``N``).

    Returns
    -------
    pandas.DataFrame
        (N rows, one column per parameter of the model): the moved values, Dirichlet
        group mates rescaled by the rule in the module docstring, every other
        parameter at its base value. Rows feeding a ``rest`` entry need no change
        here: the compiler recomputes the remainder.

    Raises
    ------
    ModelError
        An unknown parameter, or a move of group members beyond the group's sum.
    """
    _check_names(model, changes)
    base = model.base_parameter_values()
    arrays = np.broadcast_arrays(*[np.asarray(v, dtype=float) for v in changes.values()])
    moved: dict[str, np.ndarray] = {
        name: np.atleast_1d(a).astype(float) for name, a in zip(changes, arrays, strict=True)
    }
    n = len(next(iter(moved.values()))) if moved else 1
    columns = {name: np.full(n, float(value)) for name, value in base.items()}
    columns.update(moved)
    problems: list[Problem] = []
    for group_name, group in _groups(model).items():
        members = list(getattr(group, "members", ()))
        moved_members = [m for m in members if m in moved]
        others = [m for m in members if m not in moved]
        if not moved_members or not others:
            continue
        total = sum(float(base[m]) for m in members)
        others_base = sum(float(base[m]) for m in others)
        remainder = total - np.sum([moved[m] for m in moved_members], axis=0)
        bad = np.flatnonzero((remainder < -1e-12) | ((others_base <= 0) & (abs(remainder) > 1e-12)))
        if bad.size:
            k = int(bad[0])
            values = ", ".join(f"{m} = {moved[m][k]:.6g}" for m in moved_members)
            problems.append(
                Problem(
                    where=f"groups.{group_name}",
                    message=(
                        f"moving {values} leaves {remainder[k]:.6g} for the other members "
                        f"{others} (base sum {others_base:.6g}); expected the moved members "
                        f"to sum to at most the group total {total:.6g}"
                    ),
                )
            )
            continue
        scale = np.clip(remainder, 0.0, None) / others_base if others_base > 0 else 0.0 * remainder
        for m in others:
            columns[m] = float(base[m]) * scale
    if problems:
        raise ModelError(problems, file=source_file(model))
    return pd.DataFrame(columns)


def one_at_a_time_sets(model: Any, names: Sequence[str], values: np.ndarray) -> pd.DataFrame:
    """Stack one batch per parameter: row block ``i`` moves ``names[i]`` alone.

    Parameters
    ----------
    model : caredecide.model.Model
    names : sequence of str, length P
    values : (P, G) array
        Values of parameter ``names[i]`` in row block ``i``.

    Returns
    -------
    pandas.DataFrame
        (P * G rows); rows ``i*G .. i*G + G - 1`` move ``names[i]`` (and its group mates).
    """
    values = np.asarray(values, dtype=float)
    frames = [parameter_sets(model, {name: values[i]}) for i, name in enumerate(names)]
    if not frames:
        return pd.DataFrame(columns=list(model.base_parameter_values()))
    return pd.concat(frames, ignore_index=True)


def _tile(compiled: CompiledModel, n: int) -> CompiledModel:
    """Repeat a one-draw compiled model ``n`` times along the draw axis."""
    if compiled.n_draws != 1:
        raise ValueError(f"expected a compiled model with one draw, got {compiled.n_draws}")
    index = np.zeros(n, dtype=int)
    return compiled.take_draws(index)


def compiled_over_willingness_to_pay(
    compiled: CompiledModel, willingness_to_pay: np.ndarray
) -> CompiledModel:
    """Draws that differ only in the willingness to pay (for a net-benefit objective).

    Net benefit is linear in the QALY arrays, ``lambda q - c``, so scaling draw ``d``'s
    QALY arrays by ``lambda_d`` and solving with a willingness to pay of 1 gives the
    net benefit at ``lambda_d`` for every draw in one solve.

    Parameters
    ----------
    compiled : CompiledModel
        One draw (D = 1).
    willingness_to_pay : (N,) array
        Money per QALY, >= 0.

    Returns
    -------
    CompiledModel
        N draws; solve it with ``Objective("net_benefit", willingness_to_pay=1.0)``.
    """
    wtp = np.asarray(willingness_to_pay, dtype=float)
    tiled = _tile(compiled, wtp.size)
    scale = wtp.reshape(-1, 1, 1)
    return replace(
        tiled,
        state_qaly=tiled.state_qaly * scale,
        decision_qaly=tiled.decision_qaly * scale[..., None],
        state_action_qaly=(
            None if tiled.state_action_qaly is None else tiled.state_action_qaly * scale[..., None]
        ),
    )


def compiled_over_discount_rate(
    compiled: CompiledModel,
    discount_outcomes: np.ndarray | None = None,
    discount_costs: np.ndarray | None = None,
) -> CompiledModel:
    """Draws that differ only in the annual discount rate(s) (finite horizon).

    Each draw carries its own rates (``CompiledModel.discount_outcomes`` as a (N,)
    array), which the solvers apply exactly as a single rate (outcomes and costs keep
    their own factors; every within-cycle method).

    Parameters
    ----------
    compiled : CompiledModel
        One draw (D = 1), finite horizon.
    discount_outcomes, discount_costs : (N,) array, optional
        Annual rates in [0, 1); None keeps the model's rate.

    Returns
    -------
    CompiledModel
        N draws sharing the arrays, each with its own discount rates.
    """
    if compiled.n_cycles is None:
        raise ModelError(
            Problem(
                where="settings.horizon",
                message=(
                    "a discount-rate threshold needs a finite horizon (the rate is the "
                    "contraction factor of an infinite-horizon model); got horizon = infinite"
                ),
            )
        )
    rates = [
        np.asarray(default if given is None else given, dtype=float)
        for given, default in (
            (discount_outcomes, compiled.discount_outcomes),
            (discount_costs, compiled.discount_costs),
        )
    ]
    outcomes, costs = (np.array(r) for r in np.broadcast_arrays(*[np.atleast_1d(r) for r in rates]))
    for label, r in (("discount_outcomes", outcomes), ("discount_costs", costs)):
        bad = np.flatnonzero((r < 0) | (r >= 1) | ~np.isfinite(r))
        if bad.size:
            raise ModelError(
                Problem(
                    where=f"settings.{label}",
                    message=f"discount rate {r[bad[0]]!r} is outside [0, 1)",
                )
            )
    return replace(_tile(compiled, outcomes.size), discount_outcomes=outcomes, discount_costs=costs)


# ----------------------------------------------------------------------------- the core path


def default_objective(model: Any) -> Objective:
    """The objective the model file asks for (``[settings] objective``, willingness to pay)."""
    return Objective.from_settings(model.settings)


def solve_parameter_sets(
    model: Any, frame: pd.DataFrame, objective: Objective, *, keep_compiled: bool = True
) -> tuple[CompiledModel, Any]:
    """Compile and solve a batch of parameter sets through the one chunk driver.

    Parameters
    ----------
    model : caredecide.model.Model
    frame : pandas.DataFrame
        (D rows) parameter sets, columns = parameter names.
    objective : Objective
    keep_compiled : bool
        False: return the compiled arrays of the first set only (callers that read the
        model's structure from them; see :func:`caredecide.chunks.solve_in_chunks`).

    Returns
    -------
    (CompiledModel, PolicyResult)
        The compiled batch (D draws, or the first) and its solution (D draws).
    """
    from caredecide.chunks import solve_in_chunks

    # The one chunk driver: chunks within the memory budget, joined in row order.
    return solve_in_chunks(model, frame, objective, keep_compiled=keep_compiled)


def start_values(compiled: CompiledModel, result: Any) -> np.ndarray:
    """(D,) objective at the model start: start distribution . value at cycle 0."""
    return result.expected_value(compiled.start_distribution)


def policy_ages(compiled: CompiledModel, n_policy_cycles: int) -> np.ndarray:
    """(Tpi,) age at the start of each decision cycle (NaN for an infinite horizon)."""
    if compiled.n_cycles is None:
        return np.full(n_policy_cycles, np.nan)
    return compiled.ages()[:n_policy_cycles]


def check_grid(grid: int, where: str) -> None:
    """Refuse a grid of fewer than two values (a ModelError naming ``where``)."""
    if not isinstance(grid, int | np.integer) or grid < 2:
        raise ModelError(
            Problem(
                where=where, message=f"grid = {grid!r} is not allowed; expected an integer >= 2"
            )
        )
