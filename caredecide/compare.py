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
from caredecide.frontier_view import (
    DEFAULT_QALY_TOLERANCE,
    collapse_frontier,
    region_frame,
    state_switch_points,
)
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
    frontier_collapsed : pandas.DataFrame or None
        The frontier with runs of near-identical policies shown as one
        (:func:`caredecide.frontier_view.collapse_frontier`).
    state_switches : pandas.DataFrame or None
        WTP values where each state's recommendation changes, in words
        (:func:`caredecide.frontier_view.state_switch_points`).
    regions : pandas.DataFrame or None
        Best action per state over (WTP, age) rectangles, for the switch-point chart.
    effect_label : str
        ``"QALYs"``, or ``"life-years"`` when every QALY weight is 1 in alive states and
        no action carries a QALY change (the effect then counts life-years).
    reference : str or None
        The strategy the ``*_vs_reference`` columns are taken against.
    action_labels : tuple of str
        Every action's label in model order (for colours that never move).
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
    frontier_collapsed: pd.DataFrame | None = None
    state_switches: pd.DataFrame | None = None
    regions: pd.DataFrame | None = None
    effect_label: str = "QALYs"
    reference: str | None = None
    action_labels: tuple[str, ...] = ()

    def to_frame(self) -> pd.DataFrame:
        """The incremental table: one row per strategy."""
        return self.table

    def to_dict(self) -> dict:
        """The table, the frontier (if searched), the best strategy and notes (JSON-ready)."""
        return {
            "willingness_to_pay": self.willingness_to_pay,
            "best_strategy": self.best_strategy,
            "optimal_strategy": self.optimal_strategy,
            "table": self.table.to_dict(orient="records"),
            "frontier": None if self.frontier is None else self.frontier.to_dict(orient="records"),
            "notes": list(self.notes),
        }


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
    include_optimal: bool = True,
    reference: str | None = None,
    qaly_tolerance: float = DEFAULT_QALY_TOLERANCE,
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
        Also find every policy that is optimal for some WTP in ``[low, high]``: the
        frontier, its own table (never rows of the incremental table), collapsed by
        ``qaly_tolerance``, and the switch points per state.
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
    include_optimal : bool
        Add the optimal policy at ``wtp`` to the table (False: compare the described
        strategies with each other alone).
    reference : str, optional
        A strategy of the table: every row gains ``cost_vs_reference``,
        ``qalys_vs_reference`` and ``icer_vs_reference`` against it.
    qaly_tolerance : float
        Frontier policies within this many QALYs (and this many QALYs times ``wtp`` in
        cost) of the first policy of a run are shown as one in ``frontier_collapsed``.

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
            include_optimal=include_optimal,
            reference=reference,
            qaly_tolerance=qaly_tolerance,
        )
    except ModelError as error:
        # A problem with no file of its own (an option, a built-in strategy) concerns this
        # model: name its file rather than a placeholder.
        source = getattr(model, "source_path", None)
        if source is None or all(p.file is not None for p in error.problems):
            raise
        raise ModelError(error.problems, file=str(source)) from None


def _compare_loaded(
    model,
    strategies,
    wtp,
    wtp_range,
    *,
    grid,
    builtins,
    from_ages,
    progress,
    include_optimal=True,
    reference=None,
    qaly_tolerance=DEFAULT_QALY_TOLERANCE,
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
    optimal_resolved = resolve_strategy(compiled, optimal)
    if include_optimal:
        resolved.insert(0, optimal_resolved)
    elif len(resolved) < 2:
        raise ModelError(
            Problem(
                "strategies",
                f"{len(resolved)} described strateg{'y' if len(resolved) == 1 else 'ies'} "
                "without the optimal policy; expected at least two to compare",
            )
        )

    frontier = switches = frontier_result = collapsed = state_switches = regions = None
    if wtp_range is not None:
        check_wtp_range(wtp_range)
        frontier_result = policy_frontier(compiled, wtp_range, grid=grid, progress=progress)
        notes += frontier_result.notes
        names = [
            optimal_name
            if np.array_equal(frontier_result.policies[label], optimal_resolved.policy)
            else f"optimal {label}"  # its WTP interval is in the frontier table
            for label in frontier_result.table["policy"]
        ]
        frontier = frontier_result.table.assign(strategy=names)
        switches = frontier_result.switches
        collapsed = collapse_frontier(frontier_result, wtp, qaly_tolerance)
        state_switches = state_switch_points(compiled, frontier_result)
        regions = region_frame(compiled, frontier_result)
    _check_unique(resolved)

    totals, outcome, index = strategy_totals(compiled, resolved, objective)
    if include_optimal:
        totals.loc[0, "kind"] = KIND_OPTIMAL
    table = incremental_analysis(totals, willingness_to_pay=wtp)
    table["label"] = table["strategy"]
    names_in_table = list(table["strategy"])
    if reference is not None:
        if reference not in names_in_table:
            raise ModelError(
                Problem(
                    "reference",
                    f"strategy {reference!r} is not in the comparison; expected one of "
                    f"{names_in_table}",
                )
            )
        base = table.set_index("strategy").loc[reference]
        table["cost_vs_reference"] = table["cost"] - base["cost"]
        table["qalys_vs_reference"] = table["qalys"] - base["qalys"]
        with np.errstate(divide="ignore", invalid="ignore"):
            icer = table["cost_vs_reference"] / table["qalys_vs_reference"]
        table["icer_vs_reference"] = icer.where(table["qalys_vs_reference"] != 0)
    traces = _traces(outcome, index, [r.strategy.name for r in resolved])
    best = table.attrs["best_strategy"]
    return ComparisonResult(
        table=table,
        frontier=frontier,
        switches=switches,
        traces=traces,
        willingness_to_pay=wtp,
        best_strategy=best,
        optimal_strategy=optimal_name if include_optimal else "",
        notes=notes,
        resolved=resolved,
        frontier_result=frontier_result,
        frontier_collapsed=collapsed,
        state_switches=state_switches,
        regions=regions,
        effect_label=effect_label(compiled),
        reference=reference,
        action_labels=tuple(
            label or a
            for label, a in zip(
                compiled.action_labels or compiled.action_ids, compiled.action_ids, strict=True
            )
        ),
    )


def effect_label(compiled) -> str:
    """``"life-years"`` when the QALY arrays count life-years exactly, else ``"QALYs"``.

    The effect is life-years when every state's QALY weight equals its life-years per
    cycle and no action adds or removes QALYs (a model that gives weight 1 to every
    alive state).
    """
    qaly = np.asarray(compiled.state_qaly)
    years = np.broadcast_to(np.asarray(compiled.life_years), qaly.shape)
    same = np.allclose(qaly, years, rtol=0, atol=1e-12)
    return "life-years" if same and not np.any(compiled.decision_qaly) else "QALYs"


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
