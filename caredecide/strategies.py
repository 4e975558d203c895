"""Fixed strategies: policies chosen in advance, evaluated exactly like the optimal policy.

A strategy says which action to take in every state and cycle, as a policy array
``(Tpi, S)`` of action indices (``Tpi`` = number of cycles, or 1 for an infinite
horizon). It is evaluated by :func:`caredecide.evaluate.evaluate_policy`, the same code
that evaluates the optimal policy, so the totals are comparable to the last digit.

Built-in families (``X`` is an action of the model):

``never(X)``
    X is never taken; every state takes its *alternative* action.
``at_once(X)``
    X in every state where it is allowed, at every age.
``from_state(X, s)``
    X in the ordered states (``settings.severity_order``) at or beyond ``s``; the
    alternative in earlier states and in states outside the order.
``from_age(X, a)``
    X in every state where it is allowed once the age at the start of the cycle is
    ``>= a`` (finite horizon only); the alternative before.

The *alternative* action of a state is ``otherwise`` when given and allowed there,
else the first allowed action (model order) other than X, else X itself (the only
allowed action). Where a strategy asks for an action that is not allowed in a state,
the state falls back to its first allowed action (model order); every fallback in a
non-absorbing state is reported in :attr:`StrategyPolicy.notes`, never silent.

User strategies come from a CSV table (:func:`load_strategy_table`), e.g. beside the
model as ``<model>.strategies.csv``::

    strategy,state,age_from,age_to,action
    treat stage 2 before 75,stage_2,,75,treat

Columns ``state`` and ``action`` are required; ``strategy`` (default: the file name
without ``.strategies.csv``), ``age_from`` (inclusive) and ``age_to`` (exclusive) are
optional (blank = no bound; ages are at the start of a cycle, in years). ``state`` may
be ``all`` (every non-absorbing state). Cells no row covers take the first allowed
action (reported). Two rows of one strategy that give one cell different actions are
an error.
"""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from caredecide.compiled import CompiledModel
from caredecide.errors import ModelError, Problem
from caredecide.evaluate import PolicyOutcome, evaluate_policy
from caredecide.grouping import states_named
from caredecide.guarded import read_limited_text
from caredecide.limits import MAX_STRATEGY_TABLE_BYTES
from caredecide.objective import Objective

KINDS = ("never", "at_once", "from_state", "from_age", "table", "computed")
ALL_STATES = "all"
"""``state`` value in a strategy table meaning every non-absorbing state."""
TABLE_SUFFIX = ".strategies.csv"
"""A strategy table beside ``model.toml`` is named ``model.strategies.csv``."""
MAX_TABLE_BYTES = MAX_STRATEGY_TABLE_BYTES
REQUIRED_COLUMNS = ("state", "action")
OPTIONAL_COLUMNS = ("strategy", "age_from", "age_to", "note")


@dataclass(frozen=True)
class TableRule:
    """One row of a strategy table (validated against a model)."""

    row: int
    """1-based data row (the header is line 1, so the row sits on line ``row + 1``)."""
    state: str
    action: str
    age_from: float | None = None
    age_to: float | None = None


@dataclass(frozen=True)
class Strategy:
    """A fixed strategy, to be turned into a policy array for a compiled model.

    Build one with :func:`never`, :func:`at_once`, :func:`from_state`,
    :func:`from_age`, :func:`computed` or :func:`load_strategy_table`.
    """

    name: str
    kind: str
    action: str | None = None
    otherwise: str | None = None
    state: str | None = None
    age: float | None = None
    rules: tuple[TableRule, ...] = ()
    policy: np.ndarray | None = field(default=None, compare=False, repr=False)
    """(Tpi, S) action indices, for ``kind == "computed"`` (e.g. an optimal policy)."""
    source: str = ""
    """The file a table strategy came from."""
    description: str = ""


@dataclass
class StrategyPolicy:
    """A strategy resolved against a compiled model.

    Attributes
    ----------
    strategy : Strategy
    policy : (Tpi, S) int
        Action index per cycle and state (every action allowed where it is chosen).
    notes : tuple of str
        Fallbacks made (an action not allowed in a state, cells a table does not cover).
    """

    strategy: Strategy
    policy: np.ndarray
    notes: tuple[str, ...] = ()


# ----------------------------------------------------------------------------- families


def never(action: str, *, otherwise: str | None = None, name: str | None = None) -> Strategy:
    """Never take ``action``: every state takes its alternative action."""
    return Strategy(
        name or f"never {action}",
        "never",
        action=action,
        otherwise=otherwise,
        description=f"'{action}' is never taken",
    )


def at_once(action: str, *, otherwise: str | None = None, name: str | None = None) -> Strategy:
    """Take ``action`` at once, in every state and cycle where it is allowed."""
    return Strategy(
        name or f"{action} at once",
        "at_once",
        action=action,
        otherwise=otherwise,
        description=f"'{action}' in every state where it is allowed, at every age",
    )


def from_state(
    action: str, state: str, *, otherwise: str | None = None, name: str | None = None
) -> Strategy:
    """Take ``action`` in the ordered states at or beyond ``state`` (severity order)."""
    return Strategy(
        name or f"{action} from {state}",
        "from_state",
        action=action,
        otherwise=otherwise,
        state=state,
        description=f"'{action}' once the state is {state} or beyond (severity order)",
    )


def from_age(
    action: str, age: float, *, otherwise: str | None = None, name: str | None = None
) -> Strategy:
    """Take ``action`` wherever allowed from age ``age`` (years, start of cycle) on."""
    return Strategy(
        name or f"{action} from age {age:g}",
        "from_age",
        action=action,
        otherwise=otherwise,
        age=float(age),
        description=f"'{action}' wherever allowed from age {age:g} on",
    )


def computed(name: str, policy: np.ndarray, description: str = "") -> Strategy:
    """A policy computed elsewhere (e.g. the optimal policy), (Tpi, S) action indices."""
    return Strategy(name, "computed", policy=np.asarray(policy), description=description)


def default_strategies(compiled: CompiledModel) -> list[Strategy]:
    """The built-in strategies for a model, without duplicates.

    The first action (model order) is taken as the baseline (e.g. monitoring). For
    every other action ``X``: never ``X``, ``X`` at once, and ``X`` from each ordered
    state after the first. Strategies whose policy equals an earlier one's are dropped.
    With a single action: that action at once.
    """
    actions = compiled.action_ids
    if len(actions) == 1:
        return [at_once(actions[0])]
    candidates: list[Strategy] = []
    for action in actions[1:]:
        candidates.append(never(action))
        candidates.append(at_once(action))
        candidates += [from_state(action, s) for s in compiled.ordered_states[1:]]
    kept: list = []
    seen: list = []
    for strategy in candidates:
        policy = resolve_strategy(compiled, strategy).policy
        if not any(np.array_equal(policy, other) for other in seen):
            kept.append(strategy)
            seen.append(policy)
    return kept


# ----------------------------------------------------------------------------- resolving


def _model_error(message: str, where: str, file: str | None = None) -> ModelError:
    return ModelError(Problem(where=where, message=message, file=file))


def _action_index(compiled: CompiledModel, action: str, where: str) -> int:
    if action not in compiled.action_ids:
        raise _model_error(
            f"unknown action {action!r}; expected one of {list(compiled.action_ids)}", where
        )
    return compiled.action_ids.index(action)


def cycle_ages(compiled: CompiledModel) -> np.ndarray | None:
    """(T,) age at the start of each cycle (years); None for an infinite horizon."""
    if compiled.n_cycles is None:
        return None
    return compiled.ages()[:-1]


def _n_policy_cycles(compiled: CompiledModel) -> int:
    return compiled.n_cycles if compiled.n_cycles is not None else 1


def _first_allowed(compiled: CompiledModel) -> np.ndarray:
    """(S,) first allowed action index of each state (model order)."""
    return compiled.allowed.argmax(axis=1)


def _alternative(compiled: CompiledModel, x: int, otherwise: int | None) -> np.ndarray:
    """(S,) the alternative action of each state (see the module docstring)."""
    allowed = compiled.allowed
    others = allowed.copy()
    others[:, x] = False
    alternative = np.where(others.any(axis=1), others.argmax(axis=1), x)
    if otherwise is not None:
        alternative = np.where(allowed[:, otherwise], otherwise, alternative)
    return alternative


def _absorbing(compiled: CompiledModel) -> np.ndarray:
    absorbing = np.asarray(compiled.absorbing, dtype=bool)
    return (
        absorbing
        if absorbing.shape == (compiled.n_states,)
        else np.zeros(compiled.n_states, dtype=bool)
    )


def _describe_cells(compiled: CompiledModel, mask: np.ndarray) -> list[str]:
    """'state (ages a-b)' for each state with a True cell in ``mask`` (Tpi, S)."""
    ages = cycle_ages(compiled)
    out = []
    for s in np.flatnonzero(mask.any(axis=0)):  # builds words for the notes, no arithmetic
        state = compiled.state_ids[s]
        if ages is None or mask[:, s].all():
            out.append(state)
        else:
            chosen = ages[mask[:, s]]
            out.append(f"{state} (ages {chosen.min():g}-{chosen.max():g})")
    return out


def resolve_strategy(compiled: CompiledModel, strategy: Strategy) -> StrategyPolicy:
    """Turn a strategy into a (Tpi, S) policy of allowed actions, noting every fallback.

    Parameters
    ----------
    compiled : CompiledModel
    strategy : Strategy

    Returns
    -------
    StrategyPolicy

    Raises
    ------
    ModelError
        Unknown action or state, a state outside the severity order, an age for an
        infinite horizon, a computed policy of the wrong shape.
    """
    n_t, S = _n_policy_cycles(compiled), compiled.n_states
    where = f"strategies.{strategy.name}"
    if strategy.kind == "computed":
        return _resolve_computed(compiled, strategy, where)
    if strategy.kind == "table":
        return _resolve_table(compiled, strategy)
    if strategy.kind not in KINDS:
        raise _model_error(
            f"unknown strategy kind {strategy.kind!r}; expected one of {KINDS}", where + ".kind"
        )
    assert strategy.action is not None  # every kind but "computed" and "table" names one
    x = _action_index(compiled, strategy.action, where + ".action")
    otherwise = (
        None
        if strategy.otherwise is None
        else _action_index(compiled, strategy.otherwise, where + ".otherwise")
    )
    take_x = np.zeros((n_t, S), dtype=bool)
    if strategy.kind == "at_once":
        take_x[:] = True
    elif strategy.kind == "from_state":
        order = compiled.ordered_states
        if strategy.state not in order:
            raise _model_error(
                f"state {strategy.state!r} is not in the severity order {list(order)}; expected "
                "one of them (settings.severity_order)",
                where + ".state",
            )
        ranks = np.array([order.index(s) if s in order else -1 for s in compiled.state_ids])
        take_x[:] = ranks >= order.index(strategy.state)
    elif strategy.kind == "from_age":
        ages = cycle_ages(compiled)
        if ages is None:
            raise _model_error(
                f"age {strategy.age:g} given, but the model has an infinite horizon (no age "
                "axis); expected a finite horizon",
                where + ".age",
            )
        take_x[:] = (ages >= strategy.age)[:, None]
    alternative = _alternative(compiled, x, otherwise)
    allowed_x = compiled.allowed[:, x]
    policy = np.where(take_x & allowed_x, x, alternative[None, :])
    live = ~_absorbing(compiled)
    notes = []
    blocked = take_x & ~allowed_x & live
    if blocked.any():
        notes.append(
            f"'{strategy.action}' is not allowed in "
            f"{', '.join(_describe_cells(compiled, blocked))}: the alternative action "
            "is taken there"
        )
    forced = ~take_x & (alternative == x)[None, :] & live
    if forced.any():
        notes.append(
            f"'{strategy.action}' is the only allowed action in "
            f"{', '.join(_describe_cells(compiled, forced))}: taken there"
        )
    if otherwise is not None:
        refused = ~take_x & ~compiled.allowed[:, otherwise][None, :] & live
        if refused.any():
            notes.append(
                f"'{strategy.otherwise}' is not allowed in "
                f"{', '.join(_describe_cells(compiled, refused))}: the first allowed "
                "action other than "
                f"'{strategy.action}' is taken there"
            )
    return StrategyPolicy(strategy, policy.astype(np.intp), tuple(notes))


def _resolve_computed(compiled: CompiledModel, strategy: Strategy, where: str) -> StrategyPolicy:
    n_t, S = _n_policy_cycles(compiled), compiled.n_states
    policy = np.asarray(strategy.policy)
    if policy.shape != (n_t, S) or not np.issubdtype(policy.dtype, np.integer):
        raise _model_error(
            f"policy has shape {policy.shape} and dtype {policy.dtype}; expected "
            f"integer action indices of shape (cycles, states) = ({n_t}, {S})",
            where + ".policy",
        )
    return StrategyPolicy(strategy, policy.astype(np.intp), ())


def _resolve_table(compiled: CompiledModel, strategy: Strategy) -> StrategyPolicy:
    n_t, S = _n_policy_cycles(compiled), compiled.n_states
    rules = strategy.rules
    file = strategy.source or None
    live = ~_absorbing(compiled)
    problems = _rule_problems(compiled, rules, file)
    if problems:
        raise ModelError(problems, file=file)
    ages = cycle_ages(compiled)
    # (R, S) rows covering each state, (R, Tpi) rows covering each cycle.
    states = np.array([r.state for r in rules], dtype=object)
    # A declared state or a value (a model with attributes) covers every copy it names.
    named = np.array(
        [states_named(compiled, r.state) if r.state != ALL_STATES else live for r in rules]
    )
    covers_state = named | ((states == ALL_STATES)[:, None] & live[None, :])
    lower = np.array([-math.inf if r.age_from is None else r.age_from for r in rules])
    upper = np.array([math.inf if r.age_to is None else r.age_to for r in rules])
    if ages is None:
        covers_cycle = np.ones((len(rules), n_t), dtype=bool)
    else:
        covers_cycle = (ages[None, :] >= lower[:, None]) & (ages[None, :] < upper[:, None])
    covers = covers_cycle[:, :, None] & covers_state[:, None, :]  # (R, Tpi, S)
    action = np.array([compiled.action_ids.index(r.action) for r in rules])
    wanted = np.where(covers, action[:, None, None], -1)
    low = np.where(covers, action[:, None, None], compiled.n_actions).min(axis=0)
    high = wanted.max(axis=0)
    clash = (high >= 0) & (low != high)
    if clash.any():
        t, s = np.argwhere(clash)[0]
        rows = [r.row for r, c in zip(rules, covers[:, t, s], strict=True) if c]
        age = "" if ages is None else f" at age {ages[t]:g}"
        raise ModelError(
            Problem(
                where=f"rows {', '.join(map(str, rows))}",
                message=(
                    f"strategy {strategy.name!r}: these rows give state "
                    f"{compiled.state_ids[s]!r}{age} different actions "
                    f"({', '.join(repr(compiled.action_ids[a]) for a in np.unique(action[covers[:, t, s]]))}); "  # noqa: E501
                    "expected one action per state and age"
                ),
                file=file,
            )
        )
    first = _first_allowed(compiled)
    covered = high >= 0
    chosen = np.where(covered, high, first[None, :])
    allowed = compiled.allowed[np.arange(S)[None, :], chosen]
    policy = np.where(allowed, chosen, first[None, :])
    notes = []
    not_allowed = covered & ~allowed & live[None, :]
    for a in np.unique(chosen[not_allowed]):
        cells = not_allowed & (chosen == a)
        notes.append(
            f"'{compiled.action_ids[a]}' is not allowed in "
            f"{', '.join(_describe_cells(compiled, cells))}: the first allowed action "
            "is taken there"
        )
    # Only states with a choice: where one action is allowed there is nothing to cover.
    uncovered = ~covered & (live & (compiled.allowed.sum(axis=1) > 1))[None, :]
    if uncovered.any():
        notes.append(
            f"no row covers {', '.join(_describe_cells(compiled, uncovered))}: the "
            "first allowed action is taken there"
        )
    return StrategyPolicy(strategy, policy.astype(np.intp), tuple(notes))


def _rule_problems(
    compiled: CompiledModel, rules: Sequence[TableRule], file: str | None
) -> list[Problem]:
    problems = []
    finite = compiled.n_cycles is not None
    for rule in rules:  # one message per offending row of the user's table
        line = rule.row + 1
        if rule.state != ALL_STATES and states_named(compiled, rule.state) is None:
            problems.append(
                Problem(
                    f"row {rule.row}.state",
                    f"unknown state {rule.state!r}; expected one of {list(compiled.state_ids)} or "
                    f"{ALL_STATES!r}",
                    file,
                    line,
                )
            )
        if rule.action not in compiled.action_ids:
            problems.append(
                Problem(
                    f"row {rule.row}.action",
                    f"unknown action {rule.action!r}; expected one of {list(compiled.action_ids)}",
                    file,
                    line,
                )
            )
        if not finite and (rule.age_from is not None or rule.age_to is not None):
            problems.append(
                Problem(
                    f"row {rule.row}.age_from",
                    f"ages ({rule.age_from}, {rule.age_to}) given, but the model has an infinite "
                    "horizon (no age axis); expected blank ages",
                    file,
                    line,
                )
            )
    return problems


# ----------------------------------------------------------------------------- tables


def sibling_table(model_path: Path | str | None) -> Path | None:
    """``<model>.strategies.csv`` beside a model file, when it exists."""
    if model_path is None:
        return None
    path = Path(model_path)
    candidate = path.with_name(path.name.removesuffix(path.suffix) + TABLE_SUFFIX)
    return candidate if candidate.is_file() else None


def _parse_age(text: str, row: int, column: str, file: str) -> tuple[float | None, Problem | None]:
    text = text.strip()
    if text == "":
        return None, None
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not math.isfinite(value) or value < 0:
        return None, Problem(
            f"row {row}.{column}",
            f"value {text!r} is not an age; expected a finite number of years >= 0, or blank",
            file,
            row + 1,
        )
    return value, None


def read_strategy_table(path: Path | str, *, text: str | None = None) -> list[Strategy]:
    """Read a strategy table (CSV) into table strategies, checking its form.

    Rows are checked against a model later, by :func:`resolve_strategy` (unknown
    states and actions are reported with the file, row and value then).

    Parameters
    ----------
    path : path
        The CSV file (named in every message).
    text : str, optional
        The file's content, when it was read already (e.g. an upload).

    Returns
    -------
    list of Strategy
        One per distinct ``strategy`` name, in order of first appearance.

    Raises
    ------
    ModelError
        Missing or too large file, not UTF-8, missing or unknown columns, no rows,
        a blank state, action or strategy name, an age that is not a number >= 0, or
        ``age_from >= age_to`` — each naming the file, row and value.
    """
    file = str(path)
    if text is None:
        text = read_limited_text(path, MAX_STRATEGY_TABLE_BYTES, what="a strategy table (CSV)")
    elif len(text.encode("utf-8")) > MAX_TABLE_BYTES:
        raise _model_error(
            f"table is larger than {MAX_TABLE_BYTES} bytes; expected a smaller strategy table",
            "",
            file,
        )
    try:
        rows = list(csv.reader(io.StringIO(text)))
    except csv.Error as error:
        raise _model_error(f"not a readable CSV table ({error})", "", file) from None
    rows = [r for r in rows if any(cell.strip() for cell in r)]
    if not rows:
        raise _model_error(
            "the table is empty; expected a header row "
            f"({', '.join(REQUIRED_COLUMNS + OPTIONAL_COLUMNS)}) and rows",
            "",
            file,
        )
    header = [h.strip() for h in rows[0]]
    problems = []
    missing = [c for c in REQUIRED_COLUMNS if c not in header]
    if missing:
        problems.append(
            Problem(
                "header",
                f"missing column(s) {missing}; expected columns "
                f"{list(REQUIRED_COLUMNS)} and optionally "
                f"{list(OPTIONAL_COLUMNS)}, got {header}",
                file,
                1,
            )
        )
    unknown = [c for c in header if c not in REQUIRED_COLUMNS + OPTIONAL_COLUMNS]
    if unknown:
        problems.append(
            Problem(
                "header",
                f"unknown column(s) {unknown}; expected only "
                f"{list(REQUIRED_COLUMNS + OPTIONAL_COLUMNS)}",
                file,
                1,
            )
        )
    if problems:
        raise ModelError(problems, file=file)
    if len(rows) == 1:
        raise _model_error(
            "the table has a header but no rows; expected at least one row", "", file
        )
    default_name = Path(file).name.removesuffix(TABLE_SUFFIX).removesuffix(".csv")
    by_name: dict[str, list[TableRule]] = {}
    for number, cells in enumerate(rows[1:], start=1):  # user rows, each checked on its own
        record = dict(zip(header, [c.strip() for c in cells], strict=False))
        if len(cells) > len(header):
            problems.append(
                Problem(
                    f"row {number}",
                    f"{len(cells)} cells; expected at most {len(header)} (one per header column)",
                    file,
                    number + 1,
                )
            )
            continue
        name = record.get("strategy", default_name) if "strategy" in header else default_name
        for column in REQUIRED_COLUMNS + (("strategy",) if "strategy" in header else ()):
            if not record.get(column, ""):
                problems.append(
                    Problem(
                        f"row {number}.{column}",
                        f"blank {column}; expected a "
                        f"{'strategy name' if column == 'strategy' else column + ' id'}",
                        file,
                        number + 1,
                    )
                )
        low, problem_low = _parse_age(record.get("age_from", ""), number, "age_from", file)
        high, problem_high = _parse_age(record.get("age_to", ""), number, "age_to", file)
        problems += [p for p in (problem_low, problem_high) if p is not None]
        if low is not None and high is not None and low >= high:
            problems.append(
                Problem(
                    f"row {number}.age_to",
                    f"age_to {high:g} is not above age_from {low:g}; expected age_from < age_to",
                    file,
                    number + 1,
                )
            )
        by_name.setdefault(name, []).append(
            TableRule(number, record.get("state", ""), record.get("action", ""), low, high)
        )
    if problems:
        raise ModelError(problems, file=file)
    return [
        Strategy(
            name,
            "table",
            rules=tuple(rules),
            source=file,
            description=f"table {Path(file).name}, {len(rules)} row(s)",
        )
        for name, rules in by_name.items()
    ]


def load_strategy_table(compiled: CompiledModel, path: Path | str) -> list[StrategyPolicy]:
    """Read a strategy table and resolve each of its strategies against ``compiled``."""
    return [resolve_strategy(compiled, s) for s in read_strategy_table(path)]


# ----------------------------------------------------------------------------- evaluation


def evaluate_policies(
    compiled: CompiledModel, policies: np.ndarray, objective: Objective
) -> tuple[PolicyOutcome, np.ndarray]:
    """Evaluate K policies of a one-draw model in one call of :func:`evaluate_policy`.

    Identical policies are evaluated once, so they get identical totals to the last bit.

    Parameters
    ----------
    compiled : CompiledModel
        One draw (D = 1).
    policies : (K, Tpi, S) int
    objective : Objective

    Returns
    -------
    outcome : PolicyOutcome
        For the U distinct policies (draw axis of length U).
    index : (K,) int
        Row of ``outcome`` for each input policy.
    """
    if compiled.n_draws != 1:
        raise ValueError(f"expected a compiled model with one draw, got {compiled.n_draws}")
    policies = np.asarray(policies)
    flat = policies.reshape(policies.shape[0], -1)
    _, first, index = np.unique(flat, axis=0, return_index=True, return_inverse=True)
    order = np.argsort(first)  # keep first-appearance order
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    distinct = policies[first[order]]
    tiled = compiled.take_draws(np.zeros(len(distinct), dtype=int))
    return evaluate_policy(tiled, distinct, objective), rank[np.ravel(index)]


def strategy_totals(
    compiled: CompiledModel, resolved: Sequence[StrategyPolicy], objective: Objective
) -> tuple[pd.DataFrame, PolicyOutcome, np.ndarray]:
    """Totals of resolved strategies (one row each), evaluated in one batch.

    Returns
    -------
    frame : pandas.DataFrame
        Columns strategy, kind, description, cost, qalys, life_years (discounted to the
        model start), cost_undiscounted, qalys_undiscounted, life_years_undiscounted,
        notes.
    outcome : PolicyOutcome
        Of the distinct policies.
    index : (K,) int
        Row of ``outcome`` for each strategy.
    """
    policies = np.stack([r.policy for r in resolved])
    outcome, index = evaluate_policies(compiled, policies, objective)
    frame = pd.DataFrame(
        {
            "strategy": [r.strategy.name for r in resolved],
            "kind": [r.strategy.kind for r in resolved],
            "description": [r.strategy.description for r in resolved],
            "cost": outcome.costs[index],
            "qalys": outcome.qalys[index],
            "life_years": outcome.life_years[index],
            "cost_undiscounted": outcome.costs_undiscounted[index],
            "qalys_undiscounted": outcome.qalys_undiscounted[index],
            "life_years_undiscounted": outcome.life_years_undiscounted[index],
            "notes": ["; ".join(r.notes) for r in resolved],
        }
    )
    return frame, outcome, index


def renamed(strategy: Strategy, name: str) -> Strategy:
    """A copy of ``strategy`` under another name."""
    return replace(strategy, name=name)
