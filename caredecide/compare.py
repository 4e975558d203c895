"""Compare the optimal policy with fixed strategies: the Python API behind ``caredecide compare``.

One path for everything: the model is compiled once (:func:`caredecide.compile.compile_model`),
solved (:func:`caredecide.solvers.solve`) at the willingness to pay, the fixed strategies
(:mod:`caredecide.strategies`) and the optimal policies are evaluated in one batch by
:func:`caredecide.evaluate.evaluate_policy`, and the totals go through Cantor's
incremental analysis (:func:`caredecide.incremental.incremental_analysis`). With a WTP
range, the policy frontier (:func:`caredecide.frontier.policy_frontier`) adds every policy
that is optimal somewhere in the range.

The comparison is always in money: net monetary benefit at the chosen WTP (the model's
``willingness_to_pay`` unless one is given), whatever the model's own objective.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from caredecide.errors import ModelError, Problem
from caredecide.frontier import DEFAULT_GRID, PolicyFrontier, check_wtp_range, policy_frontier
from caredecide.incremental import incremental_analysis
from caredecide.objective import Objective
from caredecide.strategies import (
    Strategy,
    StrategyPolicy,
    computed,
    default_strategies,
    from_age,
    read_strategy_table,
    resolve_strategy,
    sibling_table,
    strategy_totals,
)

KIND_OPTIMAL = "optimal"
KIND_FRONTIER = "optimal over a WTP range"

StrategySpec = Strategy | str | Path


@dataclass
class ComparisonResult:
    """What :func:`compare_strategies` returns.

    Attributes
    ----------
    table : pandas.DataFrame
        The incremental table (Cantor 1994), one row per strategy, sorted by cost:
        strategy, kind, description, cost, qalys, life_years (discounted to the model
        start, per person), their ``*_undiscounted`` twins, notes (fallbacks made),
        status, reference, incremental_cost, incremental_qalys, icer, on_frontier,
        net_monetary_benefit, best_at_wtp, label (for charts: blank for the policies of
        a WTP range).
    frontier : pandas.DataFrame or None
        The policy frontier over the WTP range (:class:`caredecide.frontier.PolicyFrontier`
        ``.table`` plus ``strategy``, the row name in ``table``); None without a range.
    switches : pandas.DataFrame or None
        Switch points of the frontier (wtp, from_policy, to_policy, nmb_from, nmb_to).
    traces : pandas.DataFrame
        Long cohort traces: strategy, cycle, age, state, proportion.
    willingness_to_pay : float
        Money per QALY used for net monetary benefit.
    best_strategy : str
        Highest net monetary benefit at ``willingness_to_pay``.
    optimal_strategy : str
        Name of the optimal policy's row.
    notes : list of str
        What was assumed or fallen back on (say it, never silently).
    resolved : list of StrategyPolicy
        The policy array behind each row.
    frontier_result : PolicyFrontier or None
    """

    table: pd.DataFrame
    frontier: pd.DataFrame | None
    switches: pd.DataFrame | None
    traces: pd.DataFrame
    willingness_to_pay: float
    best_strategy: str
    optimal_strategy: str
    notes: list[str] = field(default_factory=list)
    resolved: list[StrategyPolicy] = field(default_factory=list)
    frontier_result: PolicyFrontier | None = None


def _load(model):
    from caredecide.modelfile import load_model

    if isinstance(model, str | Path):
        return load_model(model)
    return model


def _strategy_list(compiled, model, strategies, builtins, notes: list[str]) -> list[Strategy]:
    """Built-ins and/or tables, as described in :func:`compare_strategies`."""
    single = strategies is None or isinstance(strategies, str | Path)
    if builtins is None:
        builtins = single
    chosen: list[Strategy] = default_strategies(compiled) if builtins else []
    if strategies is None:
        table = sibling_table(getattr(model, "source_path", None))
        if table is not None:
            notes.append(
                f"strategy table {table} found beside the model: its strategies are included"
            )
            chosen += read_strategy_table(table)
        return chosen
    for item in [strategies] if single else strategies:
        chosen += read_strategy_table(item) if isinstance(item, str | Path) else [item]
    return chosen


def _check_unique(resolved: Sequence[StrategyPolicy]) -> None:
    seen: dict[str, StrategyPolicy] = {}
    problems = []
    for item in resolved:  # names only: a message per clash
        name = item.strategy.name
        if name in seen:
            where = [x.strategy.source or "built-in" for x in (seen[name], item)]
            problems.append(
                Problem(
                    f"strategies.{name}",
                    f"strategy name {name!r} is used "
                    f"twice ({where[0]}; {where[1]}); expected unique names",
                    item.strategy.source or None,
                )
            )
        seen[name] = item
    if problems:
        raise ModelError(problems)


def compare_strategies(
    model,
    strategies: StrategySpec | Sequence[StrategySpec] | None = None,
    wtp: float | None = None,
    wtp_range: tuple[float, float] | None = None,
    *,
    grid: int = DEFAULT_GRID,
    builtins: bool | None = None,
    from_ages: Sequence[float] = (),
    progress: Callable[[int, int], None] | None = None,
) -> ComparisonResult:
    """Compare the optimal policy with fixed strategies at a willingness to pay.

    Parameters
    ----------
    model : caredecide.model.Model or path
        A validated model, or a model file to load.
    strategies : None, path, or sequence of Strategy / path
        ``None``: the built-in strategies (:func:`caredecide.strategies.default_strategies`)
        plus a ``<model>.strategies.csv`` table beside the model file when one exists;
        a path: the built-ins plus that table; a sequence: exactly those strategies
        (paths are read as tables). The optimal policy is always added.
    wtp : float, optional
        Willingness to pay (money per QALY, >= 0); default: the model's.
    wtp_range : (float, float), optional
        Also find every policy that is optimal for some WTP in ``[low, high]``; each
        joins the table.
    grid : int
        Grid values of the WTP solved first in the frontier search.
    builtins : bool, optional
        Include the built-in strategies; default: yes unless ``strategies`` is a sequence.
    from_ages : sequence of float
        Ages (years, start of a cycle): for each, add "X from age a"
        (:func:`caredecide.strategies.from_age`) for every action X after the first
        (model order). Finite horizons only.
    progress : callable(round, brackets), optional
        Frontier refinement progress.

    Returns
    -------
    ComparisonResult

    Raises
    ------
    ModelError
        Bad strategy tables (file, row, value), unknown actions or states, duplicate
        strategy names, a bad WTP or range.
    """
    model = _load(model)
    try:
        return _compare_loaded(
            model,
            strategies,
            wtp,
            wtp_range,
            grid=grid,
            builtins=builtins,
            from_ages=from_ages,
            progress=progress,
        )
    except ModelError as error:
        # A problem with no file of its own (an option, a built-in strategy) concerns this
        # model: name its file rather than a placeholder.
        source = getattr(model, "source_path", None)
        if source is None or all(p.file is not None for p in error.problems):
            raise
        raise ModelError(error.problems, file=str(source)) from None


def _compare_loaded(
    model, strategies, wtp, wtp_range, *, grid, builtins, from_ages, progress
) -> ComparisonResult:
    """:func:`compare_strategies` for a loaded model."""
    from caredecide.compile import compile_model
    from caredecide.solvers import solve

    notes: list[str] = []
    if wtp is None:
        wtp = float(model.settings.willingness_to_pay)
    if not (np.isfinite(wtp) and wtp >= 0):
        raise ModelError(
            Problem(
                "willingness_to_pay",
                f"value {wtp!r} is not allowed; expected a finite number >= 0 (money per QALY)",
            )
        )
    wtp = float(wtp)
    if model.settings.objective != "net_benefit":
        notes.append(
            f"the model's objective is {model.settings.objective!r}; the comparison "
            f"uses net monetary benefit at {wtp:,.0f} per QALY"
        )
    objective = Objective("net_benefit", wtp)
    compiled = compile_model(model)
    result = solve(compiled, objective)
    optimal_name = f"optimal policy at WTP {wtp:,.0f}"
    optimal = computed(
        optimal_name,
        result.policy[0],
        description=f"optimal at {wtp:,.0f} per QALY: {result.structure(0).text}",
    )
    chosen = _strategy_list(compiled, model, strategies, builtins, notes)
    chosen += [from_age(action, age) for age in from_ages for action in compiled.action_ids[1:]]
    resolved = [resolve_strategy(compiled, s) for s in chosen]
    resolved.insert(0, resolve_strategy(compiled, optimal))

    frontier = switches = frontier_result = None
    if wtp_range is not None:
        check_wtp_range(wtp_range)
        frontier_result = policy_frontier(compiled, wtp_range, grid=grid, progress=progress)
        notes += frontier_result.notes
        names = []
        added: set[str] = set()
        for _, row in frontier_result.table.iterrows():  # one row per frontier interval
            policy = frontier_result.policies[row["policy"]]
            if np.array_equal(policy, resolved[0].policy):
                names.append(optimal_name)
                continue
            name = f"optimal {row['policy']}"  # its WTP interval is in the frontier table
            names.append(name)
            # A policy optimal on two intervals (possible only within the solver's tie
            # tolerance) is one strategy: one row in the table, not a duplicate name.
            if name in added:
                continue
            added.add(name)
            resolved.append(
                StrategyPolicy(
                    Strategy(
                        name,
                        "computed",
                        policy=policy,
                        description=(
                            f"{KIND_FRONTIER}: optimal for WTP {row['wtp_from']:,.2f} to "
                            f"{row['wtp_to']:,.2f}: {row['structure']}"
                        ),
                    ),
                    policy,
                )
            )
        frontier = frontier_result.table.assign(strategy=names)
        switches = frontier_result.switches
    _check_unique(resolved)

    totals, outcome, index = strategy_totals(compiled, resolved, objective)
    totals.loc[0, "kind"] = KIND_OPTIMAL
    totals.loc[totals["description"].str.startswith(KIND_FRONTIER), "kind"] = KIND_FRONTIER
    table = incremental_analysis(totals, willingness_to_pay=wtp)
    # Chart label: fixed strategies and the optimal policy by name; the many policies of a
    # WTP range stay unlabelled on a plane (they are listed in the frontier table).
    table["label"] = table["strategy"].where(table["kind"] != KIND_FRONTIER, "")
    traces = _traces(outcome, index, [r.strategy.name for r in resolved])
    return ComparisonResult(
        table=table,
        frontier=frontier,
        switches=switches,
        traces=traces,
        willingness_to_pay=wtp,
        best_strategy=table.attrs["best_strategy"],
        optimal_strategy=optimal_name,
        notes=notes,
        resolved=resolved,
        frontier_result=frontier_result,
    )


def _traces(outcome, index: np.ndarray, names: list[str]) -> pd.DataFrame:
    """Long traces (strategy, cycle, age, state, proportion) of every strategy."""
    trace = outcome.trace[index]  # (K, T + 1, S)
    K, n_t, S = trace.shape
    return pd.DataFrame(
        {
            "strategy": np.repeat(np.asarray(names, dtype=object), n_t * S),
            "cycle": np.tile(np.repeat(np.arange(n_t), S), K),
            "age": np.tile(np.repeat(outcome.ages, S), K),
            "state": np.tile(np.asarray(outcome.state_ids, dtype=object), K * n_t),
            "proportion": trace.ravel(),
        }
    )
