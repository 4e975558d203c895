"""Compile a model plus a batch of parameter sets into a :class:`CompiledModel`.

Every expression of the model is parsed once and evaluated once over all ``D`` draws
and all cycles (numpy broadcasting: parameters are (D, 1), time variables (1, T)); the
results are scattered into the arrays of :mod:`caredecide.compiled` with index arrays.
A time axis has length 1 unless an expression of that array uses ``age``, ``cycle``,
``years`` or ``background``.

Rows given by ``[rates]`` form one generator per action (rates per year, diagonal =
minus the total exit rate) and are converted per cycle with the matrix exponential,
so competing exits are handled exactly (Welton & Ades 2005; Gidwani & Russell 2020).

Numerical checks (probabilities in [0, 1], rows summing to 1, no NaN, costs >= 0) are
made here, on every draw and cycle, so a bad draw is reported by its index.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from caredecide.compiled import CompiledModel, sparse_stand_in
from caredecide.errors import ModelError, Problem
from caredecide.limits import default_memory_limit
from caredecide.memory import PipelineShape, check_fits, shape_from_parsed
from caredecide.model import Model
from caredecide.per_object import PerObjectCache
from caredecide.sparse_compile import (
    SparsePattern,
    apply_sparse_moves,
    sparse_pattern,
    sparse_transitions,
)

if TYPE_CHECKING:
    from caredecide.expressions import Expression

TIME_NAMES = frozenset({"age", "cycle", "years", "background"})
"""Expression variables that change from cycle to cycle."""
ROW_TOLERANCE = 1e-9
"""A transition row must sum to 1 within this (absolute) tolerance."""
MAX_PROBLEMS_PER_RULE = 20
_RATE_ROWS: dict[str, Any] = {"deduplicate": True, "method": "pade", "factor": True}
"""How rate rows are exponentiated (:func:`caredecide.rate_rows.fill_rate_rows`); the
benchmarks switch to ``{"factor": False}`` (one exponential per distinct (draw, cycle)
column) and ``{"deduplicate": False, "method": "uniformization", "factor": False}`` (the
first path: whole matrices, every draw and cycle) for comparison."""


@dataclass
class Entry:
    """One expression of the model and where it sits."""

    where: str
    expression: Expression
    action: int = -1
    state: int = -1
    target: int = -1

    @property
    def uses_time(self) -> bool:
        return bool(self.expression.names & TIME_NAMES)


@dataclass
class ParsedModel:
    """Every expression of a model, parsed, grouped by the array it fills."""

    state_qaly: list[Entry] = field(default_factory=list)
    state_cost: list[Entry] = field(default_factory=list)
    oneoff_cost: list[Entry] = field(default_factory=list)
    oneoff_qaly_loss: list[Entry] = field(default_factory=list)
    cost_per_cycle: list[Entry] = field(default_factory=list)
    transitions: list[Entry] = field(default_factory=list)
    """Probability entries (remainder entries excluded)."""
    rests: list[Entry] = field(default_factory=list)
    """Remainder entries ("rest"): one per row at most."""
    rates: list[Entry] = field(default_factory=list)
    moves: list[Entry] = field(default_factory=list)
    """Decision-time move shares (``[moves]``), remainder entries excluded."""
    move_rests: list[Entry] = field(default_factory=list)
    under_cost: list[Entry] = field(default_factory=list)
    """Costs per cycle of a state under an action (``[under_action]``)."""
    under_qaly: list[Entry] = field(default_factory=list)
    """QALY weight changes (per year) of a state under an action."""
    problems: list[Problem] = field(default_factory=list)
    derived_used: set[str] = field(default_factory=set)
    """``[derived]`` names written in the model's cells (before expansion)."""

    def all_entries(self) -> list[Entry]:
        return [
            *self.state_qaly,
            *self.state_cost,
            *self.oneoff_cost,
            *self.oneoff_qaly_loss,
            *self.cost_per_cycle,
            *self.transitions,
            *self.rests,
            *self.rates,
            *self.moves,
            *self.move_rests,
            *self.under_cost,
            *self.under_qaly,
        ]

    @property
    def transitions_use_time(self) -> bool:
        return any(e.uses_time for e in (*self.transitions, *self.rates, *self.moves))

    @property
    def under_action_uses_time(self) -> bool:
        return any(e.uses_time for e in (*self.under_cost, *self.under_qaly))

    @property
    def states_use_time(self) -> bool:
        return any(e.uses_time for e in (*self.state_qaly, *self.state_cost))

    @property
    def decisions_use_time(self) -> bool:
        return any(
            e.uses_time for e in (*self.oneoff_cost, *self.oneoff_qaly_loss, *self.cost_per_cycle)
        )


def parse_model_expressions(model: Model) -> ParsedModel:
    """Parse every expression of ``model``; unknown names become problems.

    Unknown state or action ids in transition tables are skipped here (validation in
    :mod:`caredecide.modelfile` reports them). The result is kept while the (flat)
    model object lives and shared by every caller (:mod:`caredecide.per_object`): read
    it, never change it.
    """
    from caredecide.expand import expand_model

    flat = expand_model(model)  # attributes and tunnels -> flat states
    return _PARSED.get(flat, lambda: _parse_flat(flat))


_PARSED: PerObjectCache[ParsedModel] = PerObjectCache(size=8)
"""The parsed expressions of each live flat model object (they never refer to it)."""


def _parse_flat(model: Model) -> ParsedModel:
    """:func:`parse_model_expressions` of a flat model, parsed afresh."""
    from caredecide.derived import resolve_derived
    from caredecide.errors import ExpressionError
    from caredecide.expressions import REST_KEYWORD, parse_expression

    parsed = ParsedModel()
    parameter_names = model.parameter_names()
    definitions, parsed.problems = resolve_derived(model.derived, parameter_names)
    known = (*parameter_names, *model.derived)
    state_index = {s: i for i, s in enumerate(model.state_ids)}
    action_index = {a: i for i, a in enumerate(model.action_ids)}
    absorbing = {s.id for s in model.states if s.absorbing}
    defined = {
        (action.id, s)
        for action in model.actions
        for s in model.allowed_states(action)
        if s in state_index and s not in absorbing
    }

    def parse(value: Any, where: str, allow_rest: bool = False, **index: int) -> Entry | None:
        try:
            expression = parse_expression(value, where=where, allow_rest=allow_rest)
            expression.check_names(known, where=where)
            parsed.derived_used |= expression.names & model.derived.keys()
            expression = expression.with_definitions(definitions)
        except ExpressionError as error:
            message = str(error)
            if message.startswith(f"{where}: "):  # Problem shows `where` itself
                message = message[len(where) + 2 :]
            parsed.problems.append(Problem(where, message))
            return None
        return Entry(where, expression, **index)

    for i, state in enumerate(model.states):
        for attr, bucket in (("qaly_weight", parsed.state_qaly), ("cost", parsed.state_cost)):
            entry = parse(getattr(state, attr), f"states.{state.id}.{attr}", state=i)
            if entry is not None:
                bucket.append(entry)
    for a, action in enumerate(model.actions):
        for attr in ("oneoff_cost", "oneoff_qaly_loss", "cost_per_cycle"):
            entry = parse(getattr(action, attr), f"actions.{action.id}.{attr}", action=a)
            if entry is not None:
                getattr(parsed, attr).append(entry)
    for table_name, table in (("transitions", model.transitions), ("rates", model.rates)):
        for action_id, rows in table.items():
            for from_id, row in rows.items():
                for to_id, value in row.items():
                    if (action_id, from_id) not in defined or to_id not in state_index:
                        continue  # reported by validation; never filled into the arrays
                    if table_name == "rates" and to_id == from_id:
                        continue  # a rate has no self-loop (reported by validation)
                    where = f"{table_name}.{action_id}.{from_id}.{to_id}"
                    entry = parse(
                        value,
                        where,
                        allow_rest=True,
                        action=action_index[action_id],
                        state=state_index[from_id],
                        target=state_index[to_id],
                    )
                    if entry is None:
                        continue
                    if entry.expression.is_rest:
                        if table_name == "rates":
                            parsed.problems.append(
                                Problem(
                                    where,
                                    f"{REST_KEYWORD!r} is only allowed in [transitions] rows; "
                                    "a rate row's stay probability follows from its exit rates",
                                )
                            )
                        else:
                            parsed.rests.append(entry)
                    elif table_name == "rates":
                        parsed.rates.append(entry)
                    else:
                        parsed.transitions.append(entry)
    for action_id, rows in model.moves.items():
        for from_id, row in rows.items():
            for to_id, value in row.items():
                if (action_id, from_id) not in defined or to_id not in state_index:
                    continue  # reported by validation
                entry = parse(
                    value,
                    f"moves.{action_id}.{from_id}.{to_id}",
                    allow_rest=True,
                    action=action_index[action_id],
                    state=state_index[from_id],
                    target=state_index[to_id],
                )
                if entry is not None:
                    (parsed.move_rests if entry.expression.is_rest else parsed.moves).append(entry)
    under: dict[str, list[Entry]] = {
        "cost": parsed.under_cost,
        "qaly_weight_change": parsed.under_qaly,
    }
    for action_id, rows in model.under_action.items():
        for state_id, fields in rows.items():
            for key, value in fields.items():
                if action_id not in action_index or state_id not in state_index or key not in under:
                    continue  # reported by validation
                entry = parse(
                    value,
                    f"under_action.{action_id}.{state_id}.{key}",
                    action=action_index[action_id],
                    state=state_index[state_id],
                )
                if entry is not None:
                    under[key].append(entry)
    return parsed


# -- parameter batches ------------------------------------------------------------------
def parameter_batch(model: Model, parameter_sets: Any = None) -> tuple[dict[str, np.ndarray], int]:
    """Parameter values for a batch: ``{name: (D, 1) array}`` and ``D``.

    Parameters
    ----------
    parameter_sets : None, mapping of name -> (D,) array, or pandas.DataFrame
        None gives the base case (D = 1). Names left out take their base value.
    """
    base = model.base_parameter_values()
    where_file = model.file_label
    if parameter_sets is None:
        columns: dict[str, np.ndarray] = {}
    elif hasattr(parameter_sets, "columns") and hasattr(parameter_sets, "to_numpy"):
        columns = {
            str(c): np.asarray(parameter_sets[c].to_numpy(), dtype=float)
            for c in parameter_sets.columns
        }
    elif isinstance(parameter_sets, Mapping):
        columns = {
            str(k): np.atleast_1d(np.asarray(v, dtype=float)) for k, v in parameter_sets.items()
        }
    else:
        raise TypeError(
            f"parameter_sets must be None, a mapping or a DataFrame, got {type(parameter_sets)}"
        )
    problems = [
        Problem(
            f"parameters.{name}",
            f"parameter set names unknown parameter {name!r}; expected one of {sorted(base)}",
        )
        for name in columns
        if name not in base
    ]
    lengths = {name: values.shape for name, values in columns.items()}
    sizes = {shape[0] for shape in lengths.values() if len(shape) == 1}
    if any(len(shape) != 1 for shape in lengths.values()) or len(sizes) > 1:
        problems.append(
            Problem("parameters", f"parameter sets must be 1-D arrays of one length; got {lengths}")
        )
    for name, values in columns.items():
        bad = ~np.isfinite(values)
        if bad.any():
            d = int(np.flatnonzero(bad)[0])
            problems.append(
                Problem(
                    f"parameters.{name}", f"draw {d} is {values[d]!r}; expected a finite number"
                )
            )
    if problems:
        raise ModelError(problems, file=where_file)
    n_draws = sizes.pop() if sizes else 1
    batch = {name: np.full((n_draws, 1), value) for name, value in base.items()}
    batch.update({name: v.reshape(n_draws, 1) for name, v in columns.items()})
    return batch, n_draws


# -- sizes ---------------------------------------------------------------------------
def _time_lengths(model: Model, parsed: ParsedModel) -> tuple[int, int, int]:
    """(Tp, Tq, Td): lengths of the transition, occupancy and decision time axes."""
    n = model.n_cycles()
    if n is None:
        return 1, 1, 1
    return (
        n if parsed.transitions_use_time else 1,
        n if parsed.states_use_time else 1,
        n if parsed.decisions_use_time else 1,
    )


def _array_bytes(n_draws: int, lengths: tuple[int, int, int], n_states: int, n_actions: int) -> int:
    tp, tq, td = lengths
    floats = n_draws * (
        tp * n_actions * n_states * n_states + 2 * tq * n_states + 2 * td * n_states * n_actions
    )
    return 8 * floats


def estimate_compiled_bytes(model: Model, n_draws: int) -> int:
    """Bytes the compiled arrays of ``n_draws`` parameter sets will take (float64)."""
    from caredecide.expand import expand_model

    model = expand_model(model)
    parsed = parse_model_expressions(model)
    return _array_bytes(
        n_draws, _time_lengths(model, parsed), len(model.states), len(model.actions)
    )


# -- compile ---------------------------------------------------------------------------
def compile_model(
    model: Model,
    parameter_sets: object = None,
    *,
    memory_limit_bytes: int | None = None,
    transition_form: str = "auto",
) -> CompiledModel:
    """Arrays of ``model`` for a batch of parameter sets (see :mod:`caredecide.compiled`).

    Parameters
    ----------
    model : Model
        A structurally valid model (:func:`caredecide.modelfile.validate_model`).
    parameter_sets : None, mapping name -> (D,) array, or pandas.DataFrame
        None = base case (D = 1); missing names take base values; unknown names raise.
    memory_limit_bytes : int, optional
        Refuse (``ModelTooLargeError``) when the estimated peak of compiling, solving and
        evaluating (:func:`caredecide.memory.pipeline_peak_bytes`) would be larger;
        default: half of the available memory.
    transition_form : {"auto", "dense", "sparse"}
        How the transitions are held: the dense (D, Tp, A, S, S) array, or sparse rows
        (:class:`caredecide.compiled.SparseTransitions`, finite horizon only: one pattern
        of non-zeros per action for every draw and cycle, never the dense array). "auto"
        picks sparse for a finite horizon when the dense array would not fit
        ``memory_limit_bytes`` but the sparse rows do, or when the model is large and
        sparse (:func:`choose_transition_form`). ``CompiledModel.transition_form`` says
        which form was used.

    Returns
    -------
    CompiledModel
        Transitions (D, Tp, A, S, S), occupancy rewards (D, Tq, S), decision rewards
        (D, Td, S, A); discounting is left to the solver.

    Raises
    ------
    ModelError
        Listing every problem: unparsable expressions, probabilities outside [0, 1],
        rows not summing to 1, NaN/inf, negative costs (naming draw and cycle/age).
    """
    from caredecide.expand import expand

    expansion = expand(model)  # attributes and tunnels -> flat states (caredecide.expand)
    model = expansion.model
    parsed = parse_model_expressions(model)
    if parsed.problems:
        raise ModelError(parsed.problems, file=model.file_label)
    values, n_draws = parameter_batch(model, parameter_sets)
    settings = model.settings
    lengths = _time_lengths(model, parsed)
    limit = default_memory_limit() if memory_limit_bytes is None else int(memory_limit_bytes)
    absorbing = np.array([s.absorbing for s in model.states], dtype=bool)
    allowed = _allowed_matrix(model, absorbing)
    shape, pattern = choose_transition_form(
        model, parsed, n_draws, allowed, absorbing, limit, transition_form
    )
    # The whole pass (compile, solve, evaluate), temporaries included, before any array.
    check_fits(shape, limit, file=model.file_label)
    tp, tq, td = lengths
    evaluator = _Evaluator(model, values, n_draws)
    problems: list[Problem] = []
    defined_rows = (allowed & ~absorbing[:, None]).T  # (A, S): rows the model must give
    for a, s in _moved_away(model):  # wholly moved: the destination's rows apply instead
        defined_rows[a, s] = False

    # Occupancy rewards of cycles 0..T-1 (`cycle`, `age` as in the transitions).
    qaly_weight = evaluator.stack(parsed.state_qaly, tq)  # (S, D, Tq)
    state_cost = evaluator.stack(parsed.state_cost, tq)
    problems += evaluator.check_finite(parsed.state_qaly, qaly_weight)
    problems += evaluator.check_finite(parsed.state_cost, state_cost)
    may_be_negative = np.array([s.negative_cost_allowed for s in model.states], dtype=bool)
    problems += evaluator.check_range(
        [e for e in parsed.state_cost if not may_be_negative[e.state]],
        state_cost[~may_be_negative],
        low=0.0,
        high=np.inf,
        what="cost",
        expected="a cost >= 0 (set negative_cost_allowed = true for a saving)",
    )

    # Decision rewards at cycle starts 0..T-1.
    oneoff_cost = evaluator.stack(parsed.oneoff_cost, td)  # (A, D, Td)
    qaly_loss = evaluator.stack(parsed.oneoff_qaly_loss, td)
    per_cycle = evaluator.stack(parsed.cost_per_cycle, td)
    for entries, array in (
        (parsed.oneoff_cost, oneoff_cost),
        (parsed.oneoff_qaly_loss, qaly_loss),
        (parsed.cost_per_cycle, per_cycle),
    ):
        problems += evaluator.check_finite(entries, array)
    for entries, array in ((parsed.oneoff_cost, oneoff_cost), (parsed.cost_per_cycle, per_cycle)):
        problems += evaluator.check_range(
            entries, array, low=0.0, high=np.inf, what="cost", expected="a cost >= 0"
        )

    sparse = None
    if pattern is None:
        transition = _transitions(model, parsed, evaluator, defined_rows, tp, problems)
    else:
        sparse = sparse_transitions(model, parsed, evaluator, pattern, defined_rows, tp, problems)
        transition = sparse_stand_in(sparse.shape)
    # Moves get a time axis only when a share changes with the cycle.
    tm = tp if any(e.uses_time for e in (*parsed.moves, *parsed.move_rests)) else 1
    move = _moves(model, parsed, evaluator, allowed, tm, problems)
    if move is not None and not problems:
        move = _one_slice_when_constant(move)
        if sparse is None:
            transition = apply_moves(transition, move, allowed, absorbing, in_place=True)
        else:
            assert pattern is not None
            sparse = apply_sparse_moves(sparse, pattern, move, allowed, absorbing)
    n = model.n_cycles()
    tr = n if (n is not None and parsed.under_action_uses_time) else 1
    under_cost = _under_action(model, parsed.under_cost, evaluator, tr, problems, cost=True)
    under_qaly = _under_action(model, parsed.under_qaly, evaluator, tr, problems, cost=False)
    if problems:
        raise ModelError(problems[: MAX_PROBLEMS_PER_RULE * 4], file=model.file_label)

    # (X, D, T) -> (D, T, X): the stacks hold one row per state / action.
    decision_mask = (allowed & ~absorbing[:, None]).astype(float)  # (S, A)
    decision_cost = np.moveaxis(oneoff_cost + per_cycle, 0, -1)[:, :, None, :] * decision_mask
    decision_qaly = -np.moveaxis(qaly_loss, 0, -1)[:, :, None, :] * decision_mask
    start = model.start_distribution()
    start_distribution = np.array([start.get(s, 0.0) for s in model.state_ids], dtype=float)
    return CompiledModel(
        state_ids=model.state_ids,
        action_ids=model.action_ids,
        transition=transition,
        allowed=allowed,
        state_qaly=np.moveaxis(qaly_weight, 0, -1) * settings.cycle_years,
        state_cost=np.moveaxis(state_cost, 0, -1),
        decision_qaly=decision_qaly + 0.0,  # + 0.0 turns -0.0 into 0.0
        decision_cost=decision_cost,
        life_years=np.array([settings.cycle_years if s.alive else 0.0 for s in model.states]),
        start_distribution=start_distribution,
        n_cycles=model.n_cycles(),
        cycle_length=float(settings.cycle_years),
        start_age=float(settings.start_age),
        discount_outcomes=float(settings.discount_outcomes),
        discount_costs=float(settings.discount_costs),
        within_cycle=settings.within_cycle,
        state_labels=tuple(s.label or s.id for s in model.states),
        action_labels=tuple(a.label or a.id for a in model.actions),
        absorbing=absorbing,
        ordered_states=tuple(settings.severity_order),
        state_groups=expansion.groups,
        move=move,
        state_action_qaly=None if under_qaly is None else under_qaly * settings.cycle_years,
        state_action_cost=under_cost,
        sparse_transition=sparse,
    )


def choose_transition_form(
    model: Model,
    parsed: ParsedModel,
    n_draws: int,
    allowed: np.ndarray,
    absorbing: np.ndarray,
    limit: int,
    requested: str,
) -> tuple[PipelineShape, SparsePattern | None]:
    """The pipeline shape to check against the memory budget, and the sparse pattern
    when the transitions are compiled in sparse rows (None: dense).

    "auto" picks sparse rows for a finite horizon (without rate rows inside tunnels) when
    the dense pass would not fit ``limit`` bytes, or when the model has at least
    :data:`~caredecide.limits.SPARSE_MIN_STATES` states, transitions that vary with the
    cycle (transitions constant over the cycles are read into sparse rows by the solver
    itself) and a pattern of at most :data:`~caredecide.limits.SPARSE_MAX_DENSITY` of
    the cells.

    Raises
    ------
    RunOptionError
        ``requested`` is not one of "auto", "dense", "sparse".
    ModelError
        "sparse" for a model that cannot be compiled so (infinite horizon, rate rows
        inside tunnels).
    """
    from dataclasses import replace

    from caredecide.limits import SPARSE_MAX_DENSITY, SPARSE_MIN_STATES
    from caredecide.memory import pipeline_peak_bytes
    from caredecide.options import check_choice

    check_choice(requested, "transition_form", ("auto", "dense", "sparse"))
    shape = shape_from_parsed(model, parsed, n_draws)
    if requested == "dense":
        return shape, None
    finite = model.n_cycles() is not None
    if not finite or model.rate_row_clock:
        if requested == "sparse":
            why = "an infinite horizon" if not finite else "rate rows inside tunnels"
            raise ModelError(
                [
                    Problem(
                        "settings",
                        f"transition_form = 'sparse' is not available for {why}; expected "
                        "'dense' or 'auto' (sparse rows serve finite horizons without rate "
                        "rows inside tunnels)",
                    )
                ],
                file=model.file_label,
            )
        return shape, None
    S = shape.n_states
    too_large = pipeline_peak_bytes(shape) > limit
    if requested == "auto" and not too_large and S < SPARSE_MIN_STATES:
        return shape, None
    pattern = sparse_pattern(model, parsed, allowed, absorbing)
    sparse_shape = replace(shape, sparse_entries=int(pattern.keys.size))
    if requested == "sparse":
        return sparse_shape, pattern
    fits_sparse = pipeline_peak_bytes(sparse_shape) <= limit
    # Any number of draws: the sparse loops go draw by draw, as the dense ones (and the
    # chunks of one model then share one form).
    worth = shape.transition_cycles > 1 and pattern.density <= SPARSE_MAX_DENSITY
    if (too_large and fits_sparse) or (worth and not too_large):
        return sparse_shape, pattern
    return shape, None


def _moved_away(model: Model) -> list[tuple[int, int]]:
    """(action, state) indices whose move sends the whole cohort elsewhere (no own row)."""
    from caredecide.modelfile.validator import moves_everyone

    actions = {a: i for i, a in enumerate(model.action_ids)}
    states = {s: i for i, s in enumerate(model.state_ids)}
    return [
        (actions[a], states[s])
        for a, rows in model.moves.items()
        for s in rows
        if a in actions and s in states and moves_everyone(model, a, s)
    ]


def _moves(
    model: Model,
    parsed: ParsedModel,
    evaluator: _Evaluator,
    allowed: np.ndarray,
    tm: int,
    problems: list[Problem],
) -> np.ndarray | None:
    """(D, Tm, A, S, S) decision-time moves (identity rows where none), or None.

    ``tm`` is 1 when no share uses the time variables (one slice serves every cycle).
    """
    if not parsed.moves and not parsed.move_rests:
        return None
    n_states, n_actions = len(model.states), len(model.actions)
    M = np.zeros((evaluator.n_draws, tm, n_actions, n_states, n_states))
    M[..., np.arange(n_states), np.arange(n_states)] = 1.0
    a, s, _ = _indices([*parsed.moves, *parsed.move_rests])
    M[:, :, a, s, :] = 0.0  # rows the model gives start empty
    if parsed.moves:
        shares = evaluator.stack(parsed.moves, tm)  # (n, D, Tm)
        problems += evaluator.check_finite(parsed.moves, shares)
        problems += evaluator.check_range(
            parsed.moves, shares, low=0.0, high=1.0, what="share", expected="a share in [0, 1]"
        )
        a, s, to = _indices(parsed.moves)
        M[:, :, a, s, to] = np.moveaxis(shares, 0, -1)
    if parsed.move_rests:
        a, s, to = _indices(parsed.move_rests)
        remainder = 1.0 - M.sum(axis=-1)[:, :, a, s]
        M[:, :, a, s, to] = remainder_values(
            parsed.move_rests, evaluator, remainder, problems, "the other shares of the move"
        )
    row_sums = M.sum(axis=-1)
    off = np.abs(row_sums - 1.0) > ROW_TOLERANCE
    if off.any() and not problems:
        for a, s in np.argwhere(off.any(axis=(0, 1)))[:MAX_PROBLEMS_PER_RULE]:
            d, t = np.argwhere(off[:, :, a, s])[0]
            problems.append(
                Problem(
                    f"moves.{model.action_ids[a]}.{model.state_ids[s]}",
                    f"shares sum to {float(row_sums[d, t, a, s]):.12g} "
                    f"{evaluator.place(int(d), int(t), length=tm)}; expected 1 "
                    f'(within {ROW_TOLERANCE:g}; use "rest" for the share that stays)',
                )
            )
    return M


def _one_slice_when_constant(array: np.ndarray) -> np.ndarray:
    """``array`` (D, T, ...) with its time axis cut to length 1 when every cycle is the same.

    Moves rarely vary with the cycle; keeping one slice saves a transition-sized array
    per draw (the contract broadcasts a time axis of length 1).
    """
    if array.shape[1] > 1 and (array == array[:, :1]).all():
        return array[:, :1].copy()
    return array


def rows_after_move(allowed: np.ndarray, absorbing: np.ndarray) -> np.ndarray:
    """(A, S) int: the action whose rows apply in state ``s`` after a move under ``a``.

    The same action where it is allowed; otherwise the one action allowed there (the
    validator refuses a destination with several and not this one). Absorbing states keep
    the cohort under every action.
    """
    n_states, n_actions = allowed.shape
    rows = np.tile(np.arange(n_actions)[:, None], (1, n_states))
    for s in range(n_states):
        choices = np.flatnonzero(allowed[s])
        if not absorbing[s] and choices.size == 1:
            rows[~allowed[s], s] = choices[0]
    return rows


def apply_moves(
    P: np.ndarray,
    M: np.ndarray,
    allowed: np.ndarray,
    absorbing: np.ndarray,
    *,
    in_place: bool = False,
) -> np.ndarray:
    """Transitions with each moved row replaced by ``move row @ rows of the destinations``.

    ``P`` (D, Tp, A, S, S) holds the rows before the moves (a wholly moved row a self-loop
    placeholder), ``M`` (D, Tm, A, S, S) the moves (Tm = 1 applies to every cycle); rows
    where ``M`` is the identity are left as they are. ``in_place`` writes into ``P``
    (the compiler's own array) instead of a copy. Each moved row is the sum over the
    destinations ``j`` some draw moves to of ``M[..., j] * P[row of j]``, written into
    its place (one (D, Tp, S) temporary per further destination). Also used by
    :mod:`caredecide.sensitivity.cell_scaling`.
    """
    n_states = P.shape[-1]
    away = (M != np.eye(n_states)).any(axis=(0, 1))  # (A, S, S): moved rows, per column
    moved = np.argwhere(away.any(axis=-1))  # (n, 2) (action, state)
    if moved.size == 0:
        return P
    rows = rows_after_move(allowed, absorbing)  # (A, S)
    shares = (M != 0).any(axis=(0, 1))  # (A, S, S): destinations some draw moves to
    sources = {(int(rows[a, j]), int(j)) for a, s in moved for j in np.flatnonzero(shares[a, s])}
    out = P if in_place else P.copy()
    # A moved row read as a destination is read before it is replaced.
    deferred = in_place and any((int(a), int(s)) in sources for a, s in moved)
    new_rows = []
    for a, s in moved:
        # Written straight into the row unless a later moved row still reads it.
        row = np.empty((*P.shape[:2], n_states)) if deferred else out[:, :, a, s, :]
        targets = np.flatnonzero(shares[a, s])
        if targets.size == 0:
            row[...] = 0.0
        for n, j in enumerate(targets):
            source = P[:, :, rows[a, j], j, :]  # (D, Tp, S)
            if n == 0:
                np.multiply(M[:, :, a, s, j, None], source, out=row)
            else:
                row += M[:, :, a, s, j, None] * source
        if deferred:
            new_rows.append(row)
    for (a, s), row in zip(moved, new_rows, strict=False):
        out[:, :, a, s, :] = row
    return out


def transitions_before_moves(model: Model) -> np.ndarray:
    """(1, Tp, A, S, S) base-case transitions of an expanded model before the moves apply."""
    parsed = parse_model_expressions(model)
    values, n_draws = parameter_batch(model)
    evaluator = _Evaluator(model, values, n_draws)
    absorbing = np.array([s.absorbing for s in model.states], dtype=bool)
    defined_rows = (_allowed_matrix(model, absorbing) & ~absorbing[:, None]).T
    for a, s in _moved_away(model):
        defined_rows[a, s] = False
    problems: list[Problem] = []
    P = _transitions(
        model, parsed, evaluator, defined_rows, _time_lengths(model, parsed)[0], problems
    )
    if problems:
        raise ModelError(problems, file=model.file_label)
    return P


def _under_action(
    model: Model,
    entries: list[Entry],
    evaluator: _Evaluator,
    length: int,
    problems: list[Problem],
    *,
    cost: bool,
) -> np.ndarray | None:
    """(D, Tr, S, A) costs (or QALY weight changes per year) of a state under an action."""
    if not entries:
        return None
    values = evaluator.stack(entries, length)  # (n, D, Tr)
    problems += evaluator.check_finite(entries, values)
    if cost:
        may_be_negative = np.array([model.states[e.state].negative_cost_allowed for e in entries])
        problems += evaluator.check_range(
            [e for e, neg in zip(entries, may_be_negative, strict=True) if not neg],
            values[~may_be_negative],
            low=0.0,
            high=np.inf,
            what="cost",
            expected="a cost >= 0 (set negative_cost_allowed = true on the state for a saving)",
        )
    out = np.zeros((evaluator.n_draws, length, len(model.states), len(model.actions)))
    a, s, _ = _indices(entries)
    out[:, :, s, a] = np.moveaxis(values, 0, -1)
    return out


def _allowed_matrix(model: Model, absorbing: np.ndarray) -> np.ndarray:
    """(S, A) bool: allowed actions; absorbing states allow every action."""
    state_index = {s: i for i, s in enumerate(model.state_ids)}
    allowed = np.zeros((len(model.states), len(model.actions)), dtype=bool)
    for a, action in enumerate(model.actions):
        rows = [state_index[s] for s in model.allowed_states(action) if s in state_index]
        allowed[rows, a] = True
    allowed[absorbing, :] = True
    return allowed


def _transitions(
    model: Model,
    parsed: ParsedModel,
    evaluator: _Evaluator,
    defined_rows: np.ndarray,
    tp: int,
    problems: list[Problem],
) -> np.ndarray:
    """(D, Tp, A, S, S) transition probabilities per cycle; appends problems found."""
    from caredecide.expand import apply_rate_row_clock

    n_states, n_actions = len(model.states), len(model.actions)
    n_draws = evaluator.n_draws
    P = np.zeros((n_draws, tp, n_actions, n_states, n_states))
    # Rows the model does not give (absorbing, or action not allowed): a self-loop.
    self_a, self_s = np.nonzero(~defined_rows)
    P[:, :, self_a, self_s, self_s] = 1.0

    probabilities = given_probabilities(parsed, evaluator, tp, problems)
    if probabilities is not None:
        a, s, to = _indices(parsed.transitions)
        P[:, :, a, s, to] = np.moveaxis(probabilities, 0, -1)
        del probabilities  # not held while the rate rows are built

    rates = given_rates(parsed, evaluator, tp, problems)
    if rates is not None and not problems:
        _fill_rate_rows(P, parsed.rates, rates, model.settings.cycle_years, **_RATE_ROWS)
        apply_rate_row_clock(P, model)  # rate rows inside tunnels: steps one on
    del rates

    if parsed.rests:
        a, s, to = _indices(parsed.rests)
        # One rest row at a time: indexing P[:, :, a, s, :] at once would copy every rest
        # row, and summing every row of P costs a pass over all of it.
        remainder = np.stack(
            [1.0 - P[:, :, ai, si, :].sum(axis=-1) for ai, si in zip(a, s, strict=True)],
            axis=-1,
        )  # (D, Tp, n): rest cells still hold 0
        P[:, :, a, s, to] = remainder_values(parsed.rests, evaluator, remainder, problems)

    checked = rows_to_check(parsed, defined_rows)
    if problems or not checked.any():
        return P
    if checked.sum() > checked.size // 2:  # one pass over P beats many strided ones
        all_sums = np.einsum("dtask->dtas", P)
        sums = {(int(i), int(j)): all_sums[:, :, i, j] for i, j in np.argwhere(checked)}
    else:
        sums = {
            (int(i), int(j)): np.einsum("dtk->dt", P[:, :, i, j, :])
            for i, j in np.argwhere(checked)
        }
    problems += row_sum_problems(model, evaluator, sums, tp)
    return P


def given_probabilities(
    parsed: ParsedModel, evaluator: _Evaluator, tp: int, problems: list[Problem]
) -> np.ndarray | None:
    """(n, D, Tp) checked values of the probability entries, or None without any."""
    return _checked_stack(
        parsed.transitions, evaluator, tp, problems, 1.0, "probability", "a probability in [0, 1]"
    )


def given_rates(
    parsed: ParsedModel, evaluator: _Evaluator, tp: int, problems: list[Problem]
) -> np.ndarray | None:
    """(n, D, Tp) checked rates per year of the rate entries, or None without any."""
    return _checked_stack(
        parsed.rates, evaluator, tp, problems, np.inf, "rate", "a rate >= 0 per year"
    )


def _checked_stack(
    entries: list[Entry],
    evaluator: _Evaluator,
    tp: int,
    problems: list[Problem],
    high: float,
    what: str,
    expected: str,
) -> np.ndarray | None:
    """(n, D, Tp) values of ``entries``, checked finite and in [0, high]; None if empty."""
    if not entries:
        return None
    values = evaluator.stack(entries, tp)
    problems += evaluator.check_finite(entries, values)
    problems += evaluator.check_range(
        entries, values, low=0.0, high=high, what=what, expected=expected
    )
    return values


def remainder_values(
    entries: list[Entry],
    evaluator: _Evaluator,
    remainder: np.ndarray,
    problems: list[Problem],
    others: str = "the other entries of the row",
) -> np.ndarray:
    """The rest cells' values (D, Tp, n) from ``remainder`` = one minus the rest of each
    rest row of ``entries``, checked >= 0 (within the tolerance) and clipped to [0, 1]."""
    problems += evaluator.check_range(
        entries,
        np.moveaxis(remainder, -1, 0),
        low=-ROW_TOLERANCE,
        high=np.inf,
        what="remainder",
        expected=f"{others} to sum to at most 1 (remainder >= 0)",
    )
    return np.clip(remainder, 0.0, 1.0)


def rows_to_check(parsed: ParsedModel, defined_rows: np.ndarray) -> np.ndarray:
    """(A, S) bool: rows whose sum must be checked.

    Only rows of given probabilities without a remainder can miss 1: a rest row sums to 1
    by construction (its remainder is checked), a rate row is a row of a generator's
    exponential, the other rows are self-loops.
    """
    checked = np.array(defined_rows, dtype=bool)  # (A, S)
    for e in (*parsed.rests, *parsed.rates):
        checked[e.action, e.state] = False
    return checked


def row_sum_problems(
    model: Model, evaluator: _Evaluator, sums: dict[tuple[int, int], np.ndarray], tp: int
) -> list[Problem]:
    """Problems for rows ``{(action, state): (D, Tp) sums}`` that do not sum to 1."""
    problems: list[Problem] = []
    for (row_action, row_state), row_sums in sums.items():  # (D, Tp) each
        off = np.abs(row_sums - 1.0) > ROW_TOLERANCE
        if off.any():
            d, t = np.argwhere(off)[0]
            problems.append(
                Problem(
                    f"transitions.{model.action_ids[row_action]}.{model.state_ids[row_state]}",
                    f"row sums to {float(row_sums[d, t]):.12g} "
                    f"{evaluator.place(int(d), int(t), length=tp)}; expected 1 "
                    f'(within {ROW_TOLERANCE:g}; use "rest" for the remainder)',
                )
            )
            if len(problems) >= MAX_PROBLEMS_PER_RULE:
                break
    return problems


def _indices(entries: list[Entry]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return (
        np.array([e.action for e in entries], dtype=int),
        np.array([e.state for e in entries], dtype=int),
        np.array([e.target for e in entries], dtype=int),
    )


def _fill_rate_rows(
    P: np.ndarray,
    entries: list[Entry],
    rates: np.ndarray,
    cycle_years: float,
    **options: Any,
) -> None:
    """Replace rows given by rates with ``expm(cycle_years G)`` of their action's generator.

    ``rates`` is (n_entries, D, Tp); ``options`` are those of
    :func:`caredecide.rate_rows.fill_rate_rows` (``deduplicate``, ``method``, ``factor``;
    :data:`_RATE_ROWS` by default in the compiler).
    """
    from caredecide.rate_rows import fill_rate_rows

    a, s, to = _indices(entries)
    fill_rate_rows(P, a, s, to, rates, cycle_years, **options)


def setting_values(settings) -> dict[str, float]:
    """The settings expressions may read (:data:`caredecide.expressions.SETTING_NAMES`)."""
    return {
        "cycle_years": settings.cycle_years,
        "start_age": settings.start_age,
        "discount_costs": settings.discount_costs,
        "discount_outcomes": settings.discount_outcomes,
        "willingness_to_pay": settings.willingness_to_pay,
    }


class _Evaluator:
    """Evaluates expressions over (D, T) and reports failures by draw and cycle/age."""

    def __init__(self, model: Model, values: dict[str, np.ndarray], n_draws: int):
        from caredecide.mortality import background_probability

        self.model = model
        self.n_draws = n_draws
        self._parameters = values
        settings = model.settings
        n = model.n_cycles()
        self.n_cycles = 1 if n is None else n
        self._variables: dict[bool, dict[str, np.ndarray | float]] = {}
        for boundaries in (False, True):
            cycle = np.arange(self.n_cycles + (1 if boundaries else 0), dtype=float)[None, :]
            years = cycle * settings.cycle_years
            age = settings.start_age + years
            variables: dict[str, np.ndarray | float] = dict(values)
            variables.update(age=age, cycle=cycle, years=years, cycle_years=settings.cycle_years)
            variables.update(setting_values(settings))
            if model.mortality is not None:
                variables["background"] = background_probability(
                    model.mortality, age, settings.cycle_years
                )
            else:
                variables["background"] = np.zeros_like(age)
            self._variables[boundaries] = variables

    def stack(self, entries: list[Entry], length: int, *, boundaries: bool = False) -> np.ndarray:
        """(n_entries, D, length) values of the entries' expressions."""
        out = np.empty((len(entries), self.n_draws, length))
        variables = self._variables[boundaries]
        if length == 1:  # no entry uses time: evaluate once, at the first cycle
            variables = {
                k: (v[:, :1] if isinstance(v, np.ndarray) and v.shape[0] == 1 else v)
                for k, v in variables.items()
            }
        with np.errstate(all="ignore"):  # NaN/inf are reported by check_finite
            for i, entry in enumerate(entries):
                value = np.asarray(entry.expression.evaluate(variables), dtype=np.float64)
                out[i] = np.broadcast_to(value, (self.n_draws, length))
        return out

    def place(self, draw: int, t: int, *, boundaries: bool = False, length: int = 2) -> str:
        """Words for draw ``draw`` at time index ``t``."""
        settings = self.model.settings
        if length == 1 or self.model.n_cycles() is None:
            when = "in every cycle"
        else:
            age = settings.start_age + t * settings.cycle_years
            when = f"{'at boundary' if boundaries else 'in cycle'} {t} (age {age:g})"
        return f"for draw {draw} {when}"

    def check_finite(
        self, entries: list[Entry], values: np.ndarray, *, boundaries: bool = False
    ) -> list[Problem]:
        bad = ~np.isfinite(values)
        return self._report(entries, values, bad, "is not a finite number", boundaries)

    def check_range(
        self,
        entries: list[Entry],
        values: np.ndarray,
        *,
        low: float,
        high: float,
        what: str,
        expected: str,
        boundaries: bool = False,
    ) -> list[Problem]:
        bad = np.isfinite(values) & ((values < low) | (values > high))
        return self._report(entries, values, bad, f"{what}; expected {expected}", boundaries)

    def _report(
        self,
        entries: list[Entry],
        values: np.ndarray,
        bad: np.ndarray,
        message: str,
        boundaries: bool,
    ) -> list[Problem]:
        problems: list[Problem] = []
        if not bad.any():
            return problems
        for i in np.flatnonzero(bad.any(axis=(1, 2)))[:MAX_PROBLEMS_PER_RULE]:
            d, t = np.argwhere(bad[i])[0]
            # 12 significant digits: -0.2 rather than -0.19999999999999998.
            value = float(f"{float(values[i, d, t]):.12g}")
            place = self.place(int(d), int(t), boundaries=boundaries, length=values.shape[2])
            source = str(entries[i].expression.source).strip()
            if source in self._parameters:
                # The entry is one parameter: the value to fix is under [parameters], so
                # the problem is reported there (the app lists it under that tab).
                problems.append(
                    Problem(
                        f"parameters.{source}",
                        f"value {value!r} {place}, used by {entries[i].where}: {message}",
                    )
                )
                continue
            problems.append(
                Problem(
                    entries[i].where,
                    f"{entries[i].expression.source!r} gives {value!r} {place}"
                    f"{self._parameters_at(entries[i], int(d))}: {message}",
                )
            )
        return problems

    def _parameters_at(self, entry: Entry, draw: int) -> str:
        """`` (with p_sick = 0.3, ...)``: the parameters the entry uses, at ``draw``."""
        names = sorted(entry.expression.names & self._parameters.keys())
        if not names:
            return ""
        shown = []
        for name in names:
            column = self._parameters[name]
            value = float(column[draw if column.shape[0] > 1 else 0, 0])
            shown.append(f"{name} = {value:.6g}")
        return f" (with {', '.join(shown)})"
