"""Compile transitions straight into sparse rows (:class:`caredecide.compiled.SparseTransitions`).

A large finite-horizon model whose transitions vary with the cycle (age-dependent
background mortality over tunnel states and attributes) does not fit as the dense
(D, T, A, S, S) array: 2,000 states, 2 actions and 45 cycles take 2.9 GB per draw. Its
rows have a handful of non-zeros, always in the same cells. This module finds those cells
once from the model's structure (the pattern: every cell an expression, a rate row or a
move can make non-zero, plus the diagonal), one pattern per action shared by every draw
and cycle, and writes each value into its slot:

* given probabilities: each expression's (D, Tp) values into its cell's slot;
* rows given by rates: the rows of each action's generator exponential, computed over
  the states in play only (:func:`caredecide.rate_rows.fill_rate_rows` on that block);
* remainders ("rest"): one minus the rest of the row;
* decision-time moves: each moved row is ``sum_j move[a, s, j] x row of j``, the
  arithmetic of :func:`caredecide.compile.apply_moves`, over the slots.

The checks (probabilities in [0, 1], remainders >= 0, rows summing to 1) and their
messages are those of the dense compiler (:mod:`caredecide.compile`).
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

import numpy as np

from caredecide.compiled import SparseTransitions

if TYPE_CHECKING:
    from caredecide.compile import ParsedModel, _Evaluator
    from caredecide.errors import Problem
    from caredecide.model import Model


@dataclass(frozen=True)
class SparsePattern:
    """The cells of the transitions that can be non-zero, before and after the moves.

    Keys are ``(a S + s) S + s2`` (int64, sorted): row ``a S + s``, column ``s2``.
    """

    before_moves: np.ndarray
    """(n,) keys of the rows as the cycle's transitions give them."""
    keys: np.ndarray
    """(nnz,) keys of the compiled rows (moved rows: the union of their destinations' rows)."""
    moved: tuple[tuple[int, int, tuple[int, ...]], ...]
    """(action, state, destinations) of each row with a decision-time move."""
    rate_states: np.ndarray
    """(K,) states in play of the rate rows (ascending; empty without rates)."""
    n_states: int
    n_actions: int

    @property
    def density(self) -> float:
        """Share of the A S S cells in the pattern."""
        return self.keys.size / max(self.n_actions * self.n_states**2, 1)


def sparse_pattern(
    model: Model, parsed: ParsedModel, allowed: np.ndarray, absorbing: np.ndarray
) -> SparsePattern:
    """The cells any expression, rate row or move of ``model`` can make non-zero.

    Parameters
    ----------
    model : Model
        The expanded (flat) model.
    parsed : ParsedModel
        Its parsed expressions (:func:`caredecide.compile.parse_model_expressions`).
    allowed : numpy.ndarray, shape (S, A), bool
    absorbing : numpy.ndarray, shape (S,), bool
    """
    from caredecide.compile import rows_after_move
    from caredecide.conversions import _states_in_play

    S, A = len(model.states), len(model.actions)
    rows = np.arange(A * S, dtype=np.int64)
    parts = [rows * S + rows % S]  # the diagonal of every row (self-loops, stays)
    given = [*parsed.transitions, *parsed.rests]
    if given:
        parts.append(np.array([(e.action * S + e.state) * S + e.target for e in given]))
    rate_states = np.zeros(0, dtype=np.int64)
    if parsed.rates:
        cells = np.zeros((S, S), dtype=bool)
        for e in parsed.rates:
            cells[e.state, e.target] = True
        rate_states = np.flatnonzero(_states_in_play(cells))
        rate_rows = np.unique([e.action * S + e.state for e in parsed.rates])
        parts.append((rate_rows[:, None] * S + rate_states[None, :]).ravel())
    before = np.unique(np.concatenate(parts).astype(np.int64))

    destinations: dict[tuple[int, int], set[int]] = {}
    for e in (*parsed.moves, *parsed.move_rests):
        destinations.setdefault((e.action, e.state), set()).add(e.target)
    moved = tuple(
        (a, s, tuple(sorted(targets))) for (a, s), targets in sorted(destinations.items())
    )
    keys = before
    if moved:
        row_of = rows_after_move(allowed, absorbing)  # (A, S)
        starts = np.searchsorted(before, np.arange(A * S + 1, dtype=np.int64) * S)
        kept = np.ones(before.size, dtype=bool)
        added = []
        for a, s, targets in moved:
            row = a * S + s
            kept[starts[row] : starts[row + 1]] = False
            columns = [np.array([s])]
            for j in targets:
                source = row_of[a, j] * S + j
                columns.append(before[starts[source] : starts[source + 1]] % S)
            added.append(row * S + np.unique(np.concatenate(columns)))
        keys = np.unique(np.concatenate([before[kept], *added]))
    return SparsePattern(before, keys, moved, rate_states, S, A)


def _csr(keys: np.ndarray, n_rows: int, n_states: int) -> tuple[np.ndarray, np.ndarray]:
    """(indptr (n_rows + 1,), indices (nnz,)) of sorted keys."""
    indptr = np.searchsorted(keys, np.arange(n_rows + 1, dtype=np.int64) * n_states)
    return indptr.astype(np.int64), (keys % n_states).astype(np.int64)


def sparse_transitions(
    model: Model,
    parsed: ParsedModel,
    evaluator: _Evaluator,
    pattern: SparsePattern,
    defined_rows: np.ndarray,
    tp: int,
    problems: list[Problem],
) -> SparseTransitions:
    """The transitions of ``model`` before the moves, in the slots of ``pattern``.

    The sparse counterpart of :func:`caredecide.compile._transitions` (same checks, same
    problems appended); values (D, Tp, n) over ``pattern.before_moves``.
    """
    from caredecide.compile import (
        _RATE_ROWS,
        _fill_rate_rows,
        _indices,
        given_probabilities,
        given_rates,
        remainder_values,
        row_sum_problems,
        rows_to_check,
    )

    S, A = pattern.n_states, pattern.n_actions
    keys = pattern.before_moves
    values = np.zeros((evaluator.n_draws, tp, keys.size))

    def slots(a: np.ndarray, s: np.ndarray, to: np.ndarray) -> np.ndarray:
        return np.searchsorted(keys, (np.asarray(a) * S + s) * S + to)

    self_a, self_s = np.nonzero(~defined_rows)  # rows the model does not give: a self-loop
    values[:, :, slots(self_a, self_s, self_s)] = 1.0
    probabilities = given_probabilities(parsed, evaluator, tp, problems)
    if probabilities is not None:
        a, s, to = _indices(parsed.transitions)
        values[:, :, slots(a, s, to)] = np.moveaxis(probabilities, 0, -1)
        del probabilities
    rates = given_rates(parsed, evaluator, tp, problems)
    if rates is not None and not problems:
        if model.rate_row_clock:  # routing keeps such models dense
            raise ValueError("rate rows inside tunnels need the dense transition form")
        K = pattern.rate_states
        local = np.searchsorted(K, np.arange(S))  # block index of a state in play
        block = np.zeros((evaluator.n_draws, tp, A, K.size, K.size))
        a, s, to = _indices(parsed.rates)
        entries = [
            replace(e, state=int(local[e.state]), target=int(local[e.target])) for e in parsed.rates
        ]
        _fill_rate_rows(block, entries, rates, model.settings.cycle_years, **_RATE_ROWS)
        for ra, rs in {(int(i), int(j)) for i, j in zip(a, s, strict=True)}:
            values[:, :, slots(np.full(K.size, ra), np.full(K.size, rs), K)] = block[
                :, :, ra, local[rs], :
            ]
        del block
    indptr, _ = _csr(keys, A * S, S)
    if parsed.rests:
        a, s, to = _indices(parsed.rests)
        # Every row's sum at once (each row holds its diagonal: no empty row); the rest
        # cells still hold 0.
        remainder = 1.0 - np.add.reduceat(values, indptr[:-1], axis=-1)[:, :, a * S + s]
        values[:, :, slots(a, s, to)] = remainder_values(
            parsed.rests, evaluator, remainder, problems
        )
    checked = rows_to_check(parsed, defined_rows)
    if not problems and checked.any():
        sums = np.add.reduceat(values, indptr[:-1], axis=-1)  # every row has its diagonal
        problems += row_sum_problems(
            model,
            evaluator,
            {(int(i), int(j)): sums[:, :, i * S + j] for i, j in np.argwhere(checked)},
            tp,
        )
    indptr, indices = _csr(keys, A * S, S)
    return SparseTransitions(indptr, indices, values, S)


def apply_sparse_moves(
    before: SparseTransitions,
    pattern: SparsePattern,
    M: np.ndarray,
    allowed: np.ndarray,
    absorbing: np.ndarray,
) -> SparseTransitions:
    """The rows after the decision-time moves, in the slots of ``pattern.keys``.

    Each moved row ``(a, s)`` becomes ``sum_j M[..., a, s, j] x (row of j)`` over its
    destinations ``j`` (the row of ``j`` under ``a``, or under the one action allowed
    there), read before any row is replaced: :func:`caredecide.compile.apply_moves` on
    the non-zeros. ``M`` is (D, Tm, A, S, S) with Tm in {1, Tp}.
    """
    from caredecide.compile import rows_after_move

    if not pattern.moved:
        return before
    S, A = pattern.n_states, pattern.n_actions
    old, new = pattern.before_moves, pattern.keys
    D, tp = before.values.shape[:2]
    values = np.zeros((D, tp, new.size))
    moved_rows = np.array([a * S + s for a, s, _ in pattern.moved], dtype=np.int64)
    unmoved = ~np.isin(old // S, moved_rows)
    values[:, :, np.searchsorted(new, old[unmoved])] = before.values[:, :, unmoved]
    row_of = rows_after_move(allowed, absorbing)
    indptr = before.indptr
    for a, s, targets in pattern.moved:
        for j in targets:
            source = int(row_of[a, j]) * S + j
            span = slice(indptr[source], indptr[source + 1])
            into = np.searchsorted(new, (a * S + s) * S + before.indices[span])
            values[:, :, into] += M[:, :, a, s, j, None] * before.values[:, :, span]
    indptr, indices = _csr(new, A * S, S)
    return SparseTransitions(indptr, indices, values, S)
