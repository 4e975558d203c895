"""Decision thresholds: the value of an estimate (or setting) at which the action switches.

Method (for each varied quantity ``x`` with plausible range [low, high]):

1. **Bracket.** Solve the model on a grid of ``G`` values of ``x`` for every quantity at
   once (ONE batch of ``P * G`` parameter sets). Wherever the optimal action in a
   decision cell (cycle ``t``, state ``s``) differs between neighbouring grid values
   ``x_i < x_{i+1}`` (``a`` at ``x_i``, ``b`` at ``x_{i+1}``), the action gap
   ``f(x) = Q_t(s, a; x) - Q_t(s, b; x)`` has ``f(x_i) >= 0 >= f(x_{i+1})``: a bracket.
   ``f`` is continuous in ``x`` when the model's arrays are (``V`` is a maximum of
   continuous functions).
2. **Root.** Brent's method (Brent 1973, *Algorithms for Minimization Without
   Derivatives*, ch. 4) run on all brackets at once (:func:`.brent.brent_roots`, the
   step rules of ``scipy.optimize.brentq``). Every step evaluates ``f`` at all unfinished
   brackets in ONE batch compiled and solved by the common core; the gaps at the bracket
   ends come from the grid and are not recomputed.
3. **Report** per bracket the threshold, the action below and above it, the gap at the
   threshold, and whether some third action is better there (then the switch passes
   through that action). A quantity with no bracket reports "no switch within the
   plausible range".

The grid can miss two switches that fall between the same neighbouring grid values (a
switch and a switch back); a finer ``grid`` finds them.

Settings that are not parameters (willingness to pay, discount rates) are varied by
building draws that differ in that setting only (:mod:`.variation`) and solving them
through the same solver.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd

from caredecide.errors import ModelError, Problem
from caredecide.objective import Objective
from caredecide.sensitivity.brent import RTOL_MIN, brent_roots
from caredecide.sensitivity.variation import (
    check_grid,
    compiled_over_discount_rate,
    compiled_over_willingness_to_pay,
    default_objective,
    parameter_ranges,
    parameter_sets,
    policy_ages,
    require_parameters,
    solve_parameter_sets,
    source_file,
)

NO_SWITCH = "no switch within the plausible range"
NO_RANGE = "no range (low = high)"
SWITCH = "switch"

DEFAULT_GRID = 11
Progress = Callable[[int, int], None]
"""``progress(done, total)``: brackets whose threshold is found, out of all brackets."""
SolveAt = Callable[[np.ndarray, np.ndarray], tuple[Any, Any]]
"""``solve_at(x (n,), which (n,) int) -> (compiled, PolicyResult)``: quantity ``which[k]``
set to ``x[k]`` in draw ``k``, everything else at base."""


def _locate_thresholds(
    solve_at: SolveAt,
    labels: Sequence[str],
    lows: np.ndarray,
    highs: np.ndarray,
    *,
    grid: int = DEFAULT_GRID,
    xtol: float = 1e-12,
    maxiter: int = 200,
    progress: Progress | None = None,
) -> pd.DataFrame:
    """The engine shared by parameters and settings (see the module docstring)."""
    check_grid(grid, "sensitivity.grid")
    labels = list(labels)
    lows = np.asarray(lows, dtype=float)
    highs = np.asarray(highs, dtype=float)
    P = len(labels)
    varies = highs > lows
    rows: list[pd.DataFrame] = []
    if not varies.any():
        return _finish(rows, labels, lows, highs, varies)
    fraction = np.linspace(0.0, 1.0, grid)
    values = lows[:, None] + (highs - lows)[:, None] * fraction[None, :]  # (P, G)
    values[:, -1] = highs  # exact ends
    which = np.repeat(np.arange(P), grid)
    compiled, result = solve_at(values.reshape(-1), which)
    policy = np.asarray(result.policy).reshape(P, grid, *np.shape(result.policy)[1:])
    q = np.asarray(result.q_values).reshape(P, grid, *np.shape(result.q_values)[1:])
    cells = (
        np.asarray(result.decision_states, dtype=bool)[None, None, None, :]
        & varies[:, None, None, None]
    )
    change = (policy[:, 1:] != policy[:, :-1]) & cells  # (P, G-1, Tpi, S)
    p, i, t, s = np.nonzero(change)
    if p.size:
        a_below = policy[p, i, t, s]
        a_above = policy[p, i + 1, t, s]
        x_lo, x_hi = values[p, i], values[p, i + 1]
        f_lo = q[p, i, t, s, a_below] - q[p, i, t, s, a_above]
        f_hi = q[p, i + 1, t, s, a_below] - q[p, i + 1, t, s, a_above]
        if progress is not None:
            progress(0, p.size)
        x, f_x, converged, nit = _roots(
            solve_at, p, t, s, a_below, a_above, x_lo, x_hi, f_lo, f_hi, xtol, maxiter, progress
        )
        if progress is not None:
            progress(p.size, p.size)
        third_better = np.zeros(p.size, dtype=bool)
        if q.shape[-1] > 2:  # is a third action better at the threshold? One more batch.
            _, at_root = solve_at(x, p)
            q_root = np.asarray(at_root.q_values)[np.arange(p.size), t, s]  # (n, A)
            best = q_root.max(axis=1)
            n = np.arange(p.size)
            third = best - np.maximum(q_root[n, a_below], q_root[n, a_above])
            third_better = third > 1e-9 * np.maximum(1.0, np.abs(best))
        action_ids = np.asarray(compiled.action_ids, dtype=object)
        ages = policy_ages(compiled, policy.shape[2])
        rows.append(
            pd.DataFrame(
                {
                    "quantity": np.asarray(labels, dtype=object)[p],
                    "status": SWITCH,
                    "state": np.asarray(compiled.state_ids, dtype=object)[s],
                    "cycle": t,
                    "age": ages[t],
                    "action_below": action_ids[a_below],
                    "action_above": action_ids[a_above],
                    "threshold": x,
                    "gap_at_threshold": f_x,
                    "bracket_low": x_lo,
                    "bracket_high": x_hi,
                    "converged": converged,
                    "iterations": nit,
                    "third_action_better": third_better,
                }
            )
        )
    return _finish(rows, labels, lows, highs, varies)


def _roots(
    solve_at: SolveAt,
    p: np.ndarray,
    t: np.ndarray,
    s: np.ndarray,
    a_below: np.ndarray,
    a_above: np.ndarray,
    x_lo: np.ndarray,
    x_hi: np.ndarray,
    f_lo: np.ndarray,
    f_hi: np.ndarray,
    xtol: float,
    maxiter: int,
    progress: Progress | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Brent's method on the action gap of every bracket at once (see :mod:`.brent`).

    The bracket ends were solved on the grid already: their gaps are passed in, so each
    Brent step costs one batch with one parameter set per unfinished bracket.
    """

    def gap(xv: np.ndarray, k: np.ndarray) -> np.ndarray:
        _, res = solve_at(xv, p[k])
        qv = np.asarray(res.q_values)
        n = np.arange(k.size)
        return qv[n, t[k], s[k], a_below[k]] - qv[n, t[k], s[k], a_above[k]]

    # The solver breaks near-ties (within its tie tolerance) towards the lower action
    # index, so a grid value may show action a although Q(a) < Q(b) by a rounding-level
    # amount: both gaps then have the same sign. The switch is at that tied grid value.
    tied = (f_lo != 0) & (f_hi != 0) & (np.signbit(f_lo) == np.signbit(f_hi))
    at_low = np.abs(f_lo) <= np.abs(f_hi)
    x = np.where(at_low, x_lo, x_hi)
    f_x = np.where(at_low, f_lo, f_hi)
    converged = np.ones(p.size, dtype=bool)
    nit = np.zeros(p.size, dtype=int)
    open_ = np.flatnonzero(~tied)
    if open_.size:

        def report(done: int, total: int) -> None:
            if progress is not None:
                progress(done + p.size - total, p.size)

        found = brent_roots(
            lambda xv, k: gap(xv, open_[k]),
            x_lo[open_], x_hi[open_], f_lo[open_], f_hi[open_],
            xtol=xtol, rtol=RTOL_MIN, maxiter=maxiter,
            callback=None if progress is None else report,
        )  # fmt: skip
        x[open_] = found.root
        f_x[open_] = found.f_root
        converged[open_] = found.converged
        nit[open_] = found.iterations
    return x, f_x, converged, nit


def _finish(
    rows: list[pd.DataFrame],
    labels: list[str],
    lows: np.ndarray,
    highs: np.ndarray,
    varies: np.ndarray,
) -> pd.DataFrame:
    found = pd.concat(rows, ignore_index=True) if rows else pd.DataFrame(columns=_COLUMNS)
    with_switch = set(found["quantity"])
    missing = pd.DataFrame(
        {
            "quantity": [q for q in labels if q not in with_switch],
            "status": [
                NO_SWITCH if v else NO_RANGE
                for q, v in zip(labels, varies, strict=True)
                if q not in with_switch
            ],
        }
    )
    frame = pd.concat([df for df in (found, missing) if len(df)], ignore_index=True)
    frame = frame.reindex(columns=_COLUMNS)
    # Integer columns stay integers (missing where there is no switch).
    frame = frame.astype({"cycle": "Int64", "iterations": "Int64"})
    ends = dict(zip(labels, zip(lows, highs, strict=True), strict=True))
    frame["low"] = frame["quantity"].map(lambda q: ends[q][0])
    frame["high"] = frame["quantity"].map(lambda q: ends[q][1])
    order = {q: i for i, q in enumerate(labels)}
    frame["_order"] = frame["quantity"].map(order)
    frame = frame.sort_values(["_order", "state", "cycle"], kind="stable", na_position="first")
    return frame.drop(columns="_order").reset_index(drop=True)


_COLUMNS = [
    "quantity", "status", "state", "cycle", "age", "action_below", "action_above", "threshold",
    "gap_at_threshold", "bracket_low", "bracket_high", "converged", "iterations",
    "third_action_better",
]  # fmt: skip


def parameter_thresholds(
    model: Any,
    parameters: Sequence[str] | None = None,
    *,
    objective: Objective | None = None,
    grid: int = DEFAULT_GRID,
    xtol: float = 1e-12,
    progress: Progress | None = None,
) -> pd.DataFrame:
    """Parameter values at which the optimal action switches, per decision cell.

    Parameters
    ----------
    model : caredecide.model.Model
    parameters : sequence of str, optional
        Default: every parameter.
    objective : Objective, optional
        Default: the model file's objective.
    grid : int
        Grid values per parameter used to bracket switches (>= 2).
    xtol : float
        Absolute tolerance on the threshold (parameter units).
    progress : callable(done, total), optional
        Called as brackets converge (thresholds found out of brackets).

    Returns
    -------
    pandas.DataFrame
        One row per switch: ``parameter, status ("switch"), state, cycle, age,
        action_below, action_above, threshold, gap_at_threshold, bracket_low,
        bracket_high, converged, iterations, third_action_better, low, high, base``;
        a parameter without any switch has one row with status
        ``"no switch within the plausible range"`` (or ``"no range (low = high)"``).
    """
    objective = default_objective(model) if objective is None else objective
    require_parameters(model)
    ranges = parameter_ranges(model, parameters)
    names = list(ranges["parameter"])

    def solve_at(x: np.ndarray, which: np.ndarray) -> tuple[Any, Any]:
        frame = _sets_moving_one_each(model, names, x, which)
        return solve_parameter_sets(model, frame, objective)

    table = _locate_thresholds(
        solve_at,
        names,
        ranges["low"].to_numpy(),
        ranges["high"].to_numpy(),
        grid=grid,
        xtol=xtol,
        progress=progress,
    )
    table["base"] = table["quantity"].map(dict(zip(names, ranges["base"], strict=True)))
    return table.rename(columns={"quantity": "parameter"})


def _sets_moving_one_each(
    model: Any, names: Sequence[str], x: np.ndarray, which: np.ndarray
) -> pd.DataFrame:
    """(n rows) row ``k`` moves parameter ``names[which[k]]`` to ``x[k]``, in input order."""
    x = np.asarray(x, dtype=float)
    which = np.asarray(which, dtype=int)
    pieces = []
    for j in np.unique(which):  # one vectorised batch per distinct parameter
        rows = np.flatnonzero(which == j)
        pieces.append(parameter_sets(model, {names[j]: x[rows]}).set_index(pd.Index(rows)))
    return pd.concat(pieces).sort_index().reset_index(drop=True)


def setting_thresholds(
    model: Any,
    setting: str,
    low: float,
    high: float,
    *,
    objective: Objective | None = None,
    grid: int = 21,
    xtol: float = 1e-10,
    progress: Progress | None = None,
) -> pd.DataFrame:
    """Values of a setting at which the optimal action switches.

    Parameters
    ----------
    model : caredecide.model.Model
    setting : {"willingness_to_pay", "discount_outcomes", "discount_costs", "discount_rate"}
        ``discount_rate`` moves the outcome and cost rates together. Willingness to pay
        needs the net-benefit objective; discount rates need a finite horizon.
    low, high : float
        Range searched (money per QALY, or annual rate in [0, 1)).
    objective : Objective, optional
        Default: the model file's objective.
    grid, xtol, progress
        As in :func:`parameter_thresholds`.

    Returns
    -------
    pandas.DataFrame
        Same columns as :func:`parameter_thresholds`, with ``setting`` instead of
        ``parameter`` and ``base`` the model's setting.
    """
    from caredecide.compile import compile_model

    objective = default_objective(model) if objective is None else objective
    compiled = compile_model(model)
    settings = model.settings
    if setting == "willingness_to_pay":
        if objective.kind != "net_benefit":
            raise ModelError(
                Problem(
                    where="settings.objective",
                    message=(
                        f"a willingness-to-pay threshold needs objective = 'net_benefit', "
                        f"got {objective.kind!r}"
                    ),
                ),
                file=source_file(model),
            )
        base = objective.willingness_to_pay
        unit_objective = replace(objective, willingness_to_pay=1.0)

        def solve_at(x: np.ndarray, which: np.ndarray) -> tuple[Any, Any]:
            return compiled, _solve_copies(
                model, compiled, x, setting, compiled_over_willingness_to_pay, unit_objective
            )

    elif setting in ("discount_outcomes", "discount_costs", "discount_rate"):
        base = (
            settings.discount_costs if setting == "discount_costs" else settings.discount_outcomes
        )

        def discounted(one: Any, x: np.ndarray) -> Any:
            return compiled_over_discount_rate(
                one,
                discount_outcomes=None if setting == "discount_costs" else x,
                discount_costs=None if setting == "discount_outcomes" else x,
            )

        def solve_at(x: np.ndarray, which: np.ndarray) -> tuple[Any, Any]:
            return compiled, _solve_copies(model, compiled, x, setting, discounted, objective)

    else:
        raise ModelError(
            Problem(
                where="sensitivity.setting",
                message=f"setting {setting!r} is unknown; expected one of "
                "('willingness_to_pay', 'discount_outcomes', 'discount_costs', 'discount_rate')",
            ),
            file=source_file(model),
        )
    if not (np.isfinite(low) and np.isfinite(high) and low <= high):
        raise ModelError(
            Problem(
                where=f"sensitivity.{setting}",
                message=f"range [{low!r}, {high!r}] is not allowed; expected finite low <= high",
            ),
            file=source_file(model),
        )
    table = _locate_thresholds(
        solve_at,
        [setting],
        np.array([low]),
        np.array([high]),
        grid=grid,
        xtol=xtol,
        progress=progress,
    )
    table["base"] = float(base)
    return table.rename(columns={"quantity": "setting"})


COPY_WORKING_FACTOR = 2
"""Bytes a copy of the base case takes while its chunk is built and solved, in multiples
of its arrays (the tiled copy and the rescaled reward arrays; the solver's own arrays are
of the size of one set of values)."""


def _solve_copies(
    model: Any,
    compiled: Any,
    x: np.ndarray,
    setting: str,
    copies: Callable[[Any, np.ndarray], Any],
    objective: Objective,
) -> Any:
    """Solve ``copies(compiled, x[chunk])`` (copies of the one-draw base case, one per value
    of ``setting``) chunk by chunk within the memory budget; the results joined in order.

    Raises ``ModelTooLargeError`` (naming the model, the setting, the estimate and the
    budget) when even one copy does not fit, instead of failing to allocate it.
    """
    from caredecide.chunks import chunk_ranges, join_results, memory_budget, run_chunks
    from caredecide.errors import ModelTooLargeError
    from caredecide.memory import gib
    from caredecide.solvers import solve

    held = compiled.sparse_transition
    arrays = [
        compiled.transition if held is None else held.values,
        compiled.state_qaly, compiled.state_cost, compiled.decision_qaly,
        compiled.decision_cost, compiled.move, compiled.state_action_qaly,
        compiled.state_action_cost,
    ]  # fmt: skip
    per_copy = COPY_WORKING_FACTOR * sum(int(np.asarray(a).nbytes) for a in arrays if a is not None)
    budget = memory_budget()
    if per_copy > budget:
        raise ModelTooLargeError(
            f"{source_file(model)}: the threshold search over {setting} solves copies of "
            f"the base case, and one copy alone needs an estimated {gib(per_copy)} "
            f"({per_copy:,} bytes) of memory while it is solved; the budget is {gib(budget)} "
            f"({budget:,} bytes). Use fewer states or a shorter horizon for this search."
        )

    def solve_chunk(start: int, stop: int) -> Any:
        return solve(copies(compiled, x[start:stop]), objective)

    ranges = chunk_ranges(x.size, max(1, budget // per_copy))
    return join_results(list(run_chunks(solve_chunk, ranges)))


def summarise_thresholds(table: pd.DataFrame) -> pd.DataFrame:
    """Merge consecutive cycles with the same switch into age bands.

    Parameters
    ----------
    table : pandas.DataFrame
        Output of :func:`parameter_thresholds` (or :func:`setting_thresholds`).

    Returns
    -------
    pandas.DataFrame
        One row per (quantity, state, action_below, action_above, band of consecutive
        cycles): ``quantity, state, ages`` (e.g. "84-89"; cycles for an infinite
        horizon), ``action_below, action_above, threshold_min, threshold_max``; rows
        without a switch keep their status text in ``ages``.
    """
    key = "parameter" if "parameter" in table.columns else "setting"
    switches = table[table["status"] == SWITCH].copy()
    rest = table[table["status"] != SWITCH]
    group_keys = [key, "state", "action_below", "action_above"]
    if len(switches):
        switches = switches.sort_values([*group_keys, "cycle"], kind="stable")
        cycle = switches["cycle"].astype(int).to_numpy()
        same_group = (switches[group_keys].shift() == switches[group_keys]).all(axis=1).to_numpy()
        new_band = ~same_group | (np.diff(cycle, prepend=cycle[0] - 2) != 1)
        switches["band"] = np.cumsum(new_band)
        bands = switches.groupby("band", sort=False).agg(
            **{k: (k, "first") for k in group_keys},
            first_age=("age", "first"),
            last_age=("age", "last"),
            first_cycle=("cycle", "first"),
            last_cycle=("cycle", "last"),
            threshold_min=("threshold", "min"),
            threshold_max=("threshold", "max"),
        )
        finite = bands["first_age"].notna()
        lo = bands["first_age"].where(finite, bands["first_cycle"].astype(float))
        hi = bands["last_age"].where(finite, bands["last_cycle"].astype(float))
        prefix = np.where(finite, "", "cycles ")
        bands["ages"] = [
            f"{p}{a:g}" if a == b else f"{p}{a:g}-{b:g}"
            for p, a, b in zip(prefix, lo, hi, strict=True)
        ]
        bands = bands.reset_index(drop=True)
    else:
        bands = pd.DataFrame(columns=[*group_keys, "ages", "threshold_min", "threshold_max"])
    others = pd.DataFrame({key: rest[key], "ages": rest["status"]})
    columns = [
        key,
        "state",
        "ages",
        "action_below",
        "action_above",
        "threshold_min",
        "threshold_max",
    ]
    frames = [f for f in (bands, others) if len(f)]
    if not frames:
        return pd.DataFrame(columns=columns)
    merged = pd.concat(frames, ignore_index=True).reindex(columns=columns)
    order = {q: i for i, q in enumerate(dict.fromkeys(table[key]))}
    merged = merged.sort_values(key, key=lambda c: c.map(order), kind="stable")
    return merged.reset_index(drop=True)
