"""Scale one transition cell of a compiled model by a factor, keeping every row a distribution.

A *cell* is one entry ``(action, from-state, to-state)`` of a transition table. Cells that
carry an estimate are *movable*; the others are *fixed*: a ``rest`` entry (it follows from
the row), a cell that is zero in every cycle, a row of an absorbing state (never in the
tables) or a row with nothing else that could absorb a change.

Moving cell ``j`` of row ``(a, s)`` by a factor ``k`` (the same ``k`` in every cycle, so an
age-dependent cell keeps its shape over age and is scaled along its whole path):

* **the row has a remainder** (a ``rest`` entry at ``r``): ``p_j -> k p_j`` and
  ``p_r -> p_r + (1 - k) p_j``. This is exactly what compiling the model with the cell's
  expression multiplied by ``k`` gives, since the compiler sets ``p_r`` to one minus the
  rest of the row. Feasible while ``k p_j <= p_j + p_r`` in every cycle:
  ``k <= min_t (p_j + p_r) / p_j``.
* **the row has no remainder**: ``p_j -> k p_j`` and every other entry of the row is
  rescaled by ``(1 - k p_j) / (1 - p_j)``, so the other exits keep their ratios (the rule
  the one-way analysis applies to Dirichlet groups). Feasible while ``k <= min_t 1 / p_j``.
* **a rate row** (``[rates]``): the cell's rate per year is multiplied by ``k`` and the
  action's generator is exponentiated again by the compiler's own routine, so the result is
  what compiling the model with the rate's expression multiplied by ``k`` gives, competing
  exits included. Every ``k >= 0`` is feasible.

Probability rows are transformed in the compiled arrays (cheap, exact); rate rows need the
rates themselves, which are evaluated once here with the compiler's evaluator.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any

import numpy as np

# The compiler's own evaluator and rate-row exponential: a rate cell is then exponentiated
# exactly as compile_model would (tests/test_sensitivity_cells.py compares the two).
from caredecide.compile import (
    _RATE_ROWS,
    _Evaluator,
    _fill_rate_rows,
    apply_moves,
    compile_model,
    parameter_batch,
    parse_model_expressions,
    transitions_before_moves,
)
from caredecide.compiled import CompiledModel, SparseTransitions, sparse_stand_in
from caredecide.errors import ModelError, Problem
from caredecide.expand import apply_rate_row_clock

REMAINDER_ABSORBS = "the row's remainder absorbs the change"
EXITS_RESCALED = "the other entries of the row are rescaled in proportion"
RATE_SCALED = "the rate is scaled and the row exponentiated again"

FIXED_REMAINDER = "remainder of the row (follows from the other entries)"
FIXED_ZERO = "zero in every cycle"
FIXED_NO_ROOM = "nothing else in the row can absorb a change"

FEASIBLE_SLACK = 1e-12
"""Probabilities below zero by at most this much after a move are rounding and set to 0."""


@dataclass(frozen=True)
class TransitionCell:
    """One movable cell of a transition table.

    Attributes
    ----------
    path : str
        Table path, e.g. ``"transitions.wait.stage_1.stage_2"`` or ``"rates.wait.stage_2.dead"``.
    action, source, target : int
        Indices of the action, the from-state and the to-state.
    action_id, from_id, to_id : str
    rule : str
        How the row follows a move (:data:`REMAINDER_ABSORBS`, :data:`EXITS_RESCALED` or
        :data:`RATE_SCALED`).
    expression : str
        The cell's text in the model file.
    varies_with_age : bool
        The cell changes from cycle to cycle; one factor scales its whole path.
    base_low, base_high : float
        Smallest and largest base value over the cycles: a probability per cycle, or a
        rate per year for a rate cell.
    feasible_max : float
        Largest factor that keeps every probability of the row in [0, 1] in every cycle
        (``inf`` for a rate cell).
    remainder : int
        Index of the row's ``rest`` target, -1 when there is none.
    rate_entry : int
        Position of the cell among the model's rate entries, -1 for a probability cell.
    """

    path: str
    action: int
    source: int
    target: int
    action_id: str
    from_id: str
    to_id: str
    rule: str
    expression: str
    varies_with_age: bool
    base_low: float
    base_high: float
    feasible_max: float
    remainder: int = -1
    rate_entry: int = -1


@dataclass(frozen=True)
class FixedCell:
    """A cell of a transition table that is not moved, and why."""

    path: str
    action_id: str
    from_id: str
    to_id: str
    reason: str


class CellScaler:
    """Builds batches of a model in which each draw scales one transition cell.

    Parameters
    ----------
    model : caredecide.model.Model
        A valid model; it is compiled once, at the base case. A model with attributes or
        tunnel states is expanded first: the cells are those of its flat states.

    Attributes
    ----------
    base : CompiledModel
        The base case (one draw).
    cells : list of TransitionCell
        The movable cells, in table order.
    fixed : list of FixedCell
        The cells left alone, with the reason.
    """

    def __init__(self, model: Any, transition_form: str = "auto"):
        from caredecide.expand import expand_model

        model = expand_model(model)  # attributes and tunnels: the cells of the flat states
        parsed = parse_model_expressions(model)
        if parsed.problems:
            raise ModelError(parsed.problems, file=model.file_label)
        self.model = model
        self.transition_form = scaling_form(model, transition_form)
        # Cells are scaled in the rows before the decision-time moves, which are applied
        # again afterwards (a moved row follows the rows of its destinations).
        self._sparse: _SparseRows | None = None
        if self.transition_form == "sparse":  # the form compile picks for a large model
            self.base = compile_model(model, transition_form="sparse")
            self._sparse = _SparseRows.of(model, parsed)
            self._before = self.base.transition  # the NaN stand-in: never read
        else:
            # Dense rows: a model too large for them is refused (ModelTooLargeError).
            self.base = compile_model(model, transition_form="dense")
            self._before = (
                self.base.transition if self.base.move is None else transitions_before_moves(model)
            )
        # The base case with one time slice of transitions: copied per draw of a batch
        # (take_draws) before the batch's own transitions replace it.
        held = self.base.sparse_transition
        self._light = (
            replace(self.base, transition=self.base.transition[:, :1])
            if held is None
            else replace(
                self.base,
                transition=sparse_stand_in((1, 1, *held.shape[2:])),
                sparse_transition=replace(held, values=held.values[:, :1]),
            )
        )
        self._rate_entries = parsed.rates
        tp = self.base.transition.shape[1]
        if parsed.rates:
            values, _ = parameter_batch(model)
            self._rates = _Evaluator(model, values, 1).stack(parsed.rates, tp)  # (n, 1, Tp)
        else:
            self._rates = np.zeros((0, 1, tp))
        self.cells, self.fixed = self._find_cells(parsed)

    def _find_cells(self, parsed: Any) -> tuple[list[TransitionCell], list[FixedCell]]:
        cell = self._base_cell  # (Tp,) base value of a cell before the moves
        state_ids, action_ids = self.base.state_ids, self.base.action_ids
        rests = {(e.action, e.state): e.target for e in parsed.rests}
        cells: list[TransitionCell] = []
        fixed: list[FixedCell] = []

        def names(entry: Any) -> dict[str, str]:
            return {
                "path": entry.where,
                "action_id": action_ids[entry.action],
                "from_id": state_ids[entry.state],
                "to_id": state_ids[entry.target],
            }

        for entry in parsed.rests:
            fixed.append(FixedCell(**names(entry), reason=FIXED_REMAINDER))
        for entry in parsed.transitions:
            a, s, j = entry.action, entry.state, entry.target
            p = cell(a, s, j)
            if not (p > 0).any():
                fixed.append(FixedCell(**names(entry), reason=FIXED_ZERO))
                continue
            r = rests.get((a, s), -1)
            moving = p > 0
            if r >= 0:
                rule = REMAINDER_ABSORBS
                cap = float(np.min((p[moving] + cell(a, s, r)[moving]) / p[moving]))
            else:
                others = 1.0 - p
                if (others <= FEASIBLE_SLACK).any():
                    fixed.append(FixedCell(**names(entry), reason=FIXED_NO_ROOM))
                    continue
                rule = EXITS_RESCALED
                cap = float(np.min(1.0 / p[moving]))
            cells.append(self._cell(entry, rule, p, cap, remainder=r))
        for k, entry in enumerate(parsed.rates):
            rate = self._rates[k, 0]
            if not (rate > 0).any():
                fixed.append(FixedCell(**names(entry), reason=FIXED_ZERO))
                continue
            cells.append(self._cell(entry, RATE_SCALED, rate, np.inf, rate_entry=k))
        order = {(a, s): i for i, (a, s) in enumerate(_row_order(self.base))}
        cells.sort(key=lambda c: (order[(c.action, c.source)], c.target))
        return cells, fixed

    def _base_cell(self, a: int, s: int, j: int) -> np.ndarray:
        """(Tp,) base-case probability of cell (a, s, j) before the moves, either form."""
        if self._sparse is None:
            return np.asarray(self._before[0, :, a, s, j])
        return self._sparse.cell(a, s, j)

    def _cell(self, entry: Any, rule: str, base: np.ndarray, cap: float, **index: int):
        return TransitionCell(
            path=entry.where,
            action=entry.action,
            source=entry.state,
            target=entry.target,
            action_id=self.base.action_ids[entry.action],
            from_id=self.base.state_ids[entry.state],
            to_id=self.base.state_ids[entry.target],
            rule=rule,
            expression=entry.expression.source,
            varies_with_age=bool(entry.uses_time) and base.size > 1,
            base_low=float(base.min()),
            base_high=float(base.max()),
            feasible_max=cap,
            **index,
        )

    def scaled(self, which: np.ndarray, factors: np.ndarray) -> CompiledModel:
        """A batch whose draw ``n`` scales cell ``cells[which[n]]`` by ``factors[n]``.

        Parameters
        ----------
        which : (N,) int
            Index into :attr:`cells` per draw.
        factors : (N,) float
            Factor per draw, in ``[0, cells[which[n]].feasible_max]``.

        Returns
        -------
        CompiledModel
            N draws: transitions (N, Tp, A, S, S) moved as in the module docstring, every
            other array as in the base case.

        Raises
        ------
        ModelError
            A factor outside its cell's feasible range (naming the cell and the factor).
        """
        which = np.asarray(which, dtype=int).reshape(-1)
        factors = np.asarray(factors, dtype=float).reshape(-1)
        if which.shape != factors.shape:
            raise ValueError(f"which {which.shape} and factors {factors.shape} differ in shape")
        self._check_factors(which, factors)
        if self._sparse is not None:
            return self._scaled_sparse(which, factors)
        batch = self._light.take_draws(np.zeros(which.size, dtype=int))
        P = np.repeat(self._before, which.size, axis=0)  # (N, Tp, A, S, S), a copy
        P0 = self._before[0]
        rate_rows = []
        for c in np.unique(which):
            cell = self.cells[c]
            rows = np.flatnonzero(which == c)
            k = factors[rows][:, None]  # (n, 1): one factor for the whole path
            a, s, j = cell.action, cell.source, cell.target
            p = P0[:, a, s, j][None, :]  # (1, Tp)
            if cell.rule == REMAINDER_ABSORBS:
                r = cell.remainder
                P[rows, :, a, s, j] = k * p
                rest = P0[:, a, s, r][None, :] + (1.0 - k) * p
                P[rows, :, a, s, r] = np.where(rest < 0, 0.0, rest)  # -1e-17 at the cap
            elif cell.rule == EXITS_RESCALED:
                scale = (1.0 - k * p) / (1.0 - p)  # (n, Tp)
                row = P0[None, :, a, s, :] * np.where(scale < 0, 0.0, scale)[..., None]
                row[..., j] = k * p
                P[rows[:, None], np.arange(P.shape[1])[None, :], a, s, :] = row
            else:
                rate_rows.append(rows)
        if rate_rows:
            rows = np.concatenate(rate_rows)
            rates = np.repeat(self._rates, rows.size, axis=1)  # (n_entries, n, Tp)
            entry = np.array([self.cells[c].rate_entry for c in which[rows]])
            rates[entry, np.arange(rows.size), :] *= factors[rows][:, None]
            block = P[rows]
            _fill_rate_rows(
                block, self._rate_entries, rates, self.model.settings.cycle_years, **_RATE_ROWS
            )
            apply_rate_row_clock(block, self.model)  # rate rows inside tunnels
            P[rows] = block
        if batch.move is not None:
            P = apply_moves(P, batch.move, batch.allowed, batch.absorbing, in_place=True)
        return replace(batch, transition=P)

    def _scaled_sparse(self, which: np.ndarray, factors: np.ndarray) -> CompiledModel:
        """:meth:`scaled` in sparse rows: the moved rows' slots, then the moves again."""
        from caredecide.sparse_compile import apply_sparse_moves

        rows_of = self._sparse
        assert rows_of is not None
        before = rows_of.before
        V0 = before.values[0]  # (Tp, n)
        V = np.repeat(before.values, which.size, axis=0)  # (N, Tp, n), a copy
        for c in np.unique(which):
            cell = self.cells[c]
            rows = np.flatnonzero(which == c)
            k = factors[rows][:, None]  # (n, 1): one factor for the whole path
            a, s, j = cell.action, cell.source, cell.target
            slot_j = rows_of.slot(a, s, j)
            p = V0[:, slot_j][None, :]  # (1, Tp)
            if cell.rule == REMAINDER_ABSORBS:
                slot_r = rows_of.slot(a, s, cell.remainder)
                V[rows, :, slot_j] = k * p
                rest = V0[:, slot_r][None, :] + (1.0 - k) * p
                V[rows, :, slot_r] = np.where(rest < 0, 0.0, rest)  # -1e-17 at the cap
            else:  # EXITS_RESCALED (rate cells keep the dense form: scaling_form)
                span = np.arange(before.indptr[a * self.base.n_states + s],
                                 before.indptr[a * self.base.n_states + s + 1])  # fmt: skip
                scale = (1.0 - k * p) / (1.0 - p)  # (n, Tp)
                row = V0[None, :, span] * np.where(scale < 0, 0.0, scale)[..., None]
                row[..., np.flatnonzero(span == slot_j)[0]] = k * p
                V[rows[:, None, None], np.arange(V.shape[1])[None, :, None], span] = row
        moved = SparseTransitions(before.indptr, before.indices, V, before.n_states)
        batch = self._light.take_draws(np.zeros(which.size, dtype=int))
        if batch.move is not None:
            moved = apply_sparse_moves(
                moved, rows_of.pattern, batch.move, batch.allowed, batch.absorbing
            )
        return replace(batch, transition=sparse_stand_in(moved.shape), sparse_transition=moved)

    def _check_factors(self, which: np.ndarray, factors: np.ndarray) -> None:
        if which.size and (which.min() < 0 or which.max() >= len(self.cells)):
            raise ValueError(f"cell index out of range 0..{len(self.cells) - 1}")
        caps = np.array([self.cells[c].feasible_max for c in which], dtype=float)
        bad = np.flatnonzero(~np.isfinite(factors) | (factors < 0) | (factors > caps))
        if bad.size:
            n = int(bad[0])
            cell = self.cells[which[n]]
            raise ModelError(
                Problem(
                    cell.path,
                    f"factor {float(factors[n])!r} is not allowed; expected a factor in "
                    f"[0, {cell.feasible_max:.6g}] (beyond it a probability of the row "
                    "would leave [0, 1])",
                ),
                file=self.model.file_label,
            )


def scaling_form(model: Any, requested: str = "auto") -> str:
    """The form cells are scaled in: "sparse" when compile picks sparse rows for the base
    case (:func:`caredecide.compile.compile_model`, "auto") and no row is given by rates
    (a rate cell is exponentiated again in dense rows), else "dense"; ``requested``
    "dense" forces the dense rows, "sparse" the sparse rows when there are no rates."""
    from caredecide import memory

    if requested == "dense" or model.rates:
        return "dense"
    if requested == "sparse":
        return "sparse"
    return "sparse" if memory.shape_of(model).sparse_entries else "dense"


@dataclass(frozen=True)
class _SparseRows:
    """The base case's rows before the moves in sparse form, and their pattern."""

    pattern: Any  # caredecide.sparse_compile.SparsePattern
    before: SparseTransitions  # values (1, Tp, n) over pattern.before_moves

    @classmethod
    def of(cls, model: Any, parsed: Any) -> _SparseRows:
        from caredecide.compile import _allowed_matrix, _moved_away, _time_lengths
        from caredecide.sparse_compile import sparse_pattern, sparse_transitions

        values, n_draws = parameter_batch(model)
        evaluator = _Evaluator(model, values, n_draws)
        absorbing = np.array([s.absorbing for s in model.states], dtype=bool)
        allowed = _allowed_matrix(model, absorbing)
        defined_rows = (allowed & ~absorbing[:, None]).T
        for a, s in _moved_away(model):
            defined_rows[a, s] = False
        pattern = sparse_pattern(model, parsed, allowed, absorbing)
        problems: list[Problem] = []
        tp = _time_lengths(model, parsed)[0]
        before = sparse_transitions(model, parsed, evaluator, pattern, defined_rows, tp, problems)
        if problems:
            raise ModelError(problems, file=model.file_label)
        return cls(pattern, before)

    def slot(self, a: int, s: int, j: int) -> int:
        """Slot of cell (a, s, j) in :attr:`before` (-1 when not in the pattern)."""
        S = self.before.n_states
        keys = self.pattern.before_moves
        key = (a * S + s) * S + j
        i = int(np.searchsorted(keys, key))
        return i if i < keys.size and keys[i] == key else -1

    def cell(self, a: int, s: int, j: int) -> np.ndarray:
        """(Tp,) base value of cell (a, s, j) (zeros outside the pattern)."""
        i = self.slot(a, s, j)
        tp = self.before.values.shape[1]
        return np.zeros(tp) if i < 0 else self.before.values[0, :, i]


def _row_order(compiled: CompiledModel) -> list[tuple[int, int]]:
    """(action, state) pairs in table order: actions, then states, as in the model."""
    return [(a, s) for a in range(compiled.n_actions) for s in range(compiled.n_states)]
