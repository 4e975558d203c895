"""Sensitivity of the decision to each transition estimate: a switching factor per cell.

For every movable cell of every transition table (:mod:`.cell_scaling`: not a ``rest``
entry, not zero, not in an absorbing row) the cell is scaled by a factor ``k`` (the row
follows by the cell's rule; one ``k`` for every cycle) and we ask how far ``k`` can move
from 1, downwards and upwards, before the optimal policy changes in any state or age.

Method, for cell ``c`` and one direction:

1. **Margin.** With ``a0`` the base-case policy, the margin of decision cell ``(t, s)`` at
   factor ``k`` is ``Q_t(s, a0; k) - max_{b != a0} Q_t(s, b; k)`` and the cell's margin
   function is ``m(k) = min`` over decision cells not tied in the base case. ``m(1) > 0``;
   the policy changes exactly where some margin turns negative, so the switching factor is
   the first root of ``m`` going away from 1. ``m`` is continuous in ``k`` (a minimum of
   differences of maxima of continuous functions).
2. **Bracket.** ``m`` is evaluated on a grid of factors from 1 to the end of the search
   range (``grid`` values: evenly spaced below 1, geometric above 1) for every cell and both
   directions in ONE batch; the first grid interval where ``m`` turns negative brackets the
   switch.
3. **Root.** Brent's method on all brackets at once (:func:`.brent.brent_roots`), each step
   one batch through the solver.
4. **Report.** The switching factor below and above 1, the states and ages whose action
   changes just past it, and the value lost by keeping the base-case policy when the cell is
   at each of two factors (0.5 and 2 by default): ``V*(k) - V_{a0}(k)`` at the model start.

The search above 1 stops at the smaller of ``search_max`` and the cell's feasible factor
(beyond it a probability of the row would leave [0, 1]); the table says when it did. A
switch and a switch back within one grid interval are missed; a finer ``grid`` looks closer.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from caredecide.errors import RunOptionError
from caredecide.evaluate import evaluate_policy
from caredecide.objective import Objective
from caredecide.options import check_scalar
from caredecide.sensitivity.brent import RTOL_MIN, brent_roots
from caredecide.sensitivity.cell_scaling import (
    FIXED_NO_ROOM,
    FIXED_REMAINDER,
    FIXED_ZERO,
    CellScaler,
    FixedCell,
    TransitionCell,
    scaling_form,
)
from caredecide.sensitivity.oneway import _ages_text
from caredecide.sensitivity.variation import default_objective, policy_ages

DEFAULT_LOSS_FACTORS = (0.5, 2.0)
DEFAULT_SEARCH_MAX = 10.0
DEFAULT_GRID = 6
DEFAULT_XTOL = 1e-9
PAST_STEP = 1e-6
"""Relative step past a switching factor at which the changed states and ages are read."""

SIDES = ("below", "above")
NO_SWITCH = "no switch"
CLOSENESS_BANDS = (
    (1.1, "within 1.1x"),
    (1.25, "within 1.25x"),
    (1.5, "within 1.5x"),
    (2.0, "within 2x"),
    (np.inf, "further than 2x"),
)
"""A switching factor ``f`` falls in the first band with ``max(f, 1/f) <= bound``."""
NO_SWITCH_BAND = "no switch in the search range"
WHOLE_PATH_NOTE = "one factor scales the cell at every age"
FIXED_BAND = "not moved"
"""Closeness label of a fixed cell (a remainder, a zero) in the matrix view."""
FIXED_LABELS = {FIXED_REMAINDER: "rest", FIXED_ZERO: "zero", FIXED_NO_ROOM: "fixed"}

Progress = Callable[[int, int], None]


@dataclass(frozen=True)
class CellSensitivityResult:
    """Switching factors of every movable transition cell (see the module docstring).

    Attributes
    ----------
    cells : list of TransitionCell
    fixed : list of FixedCell
        Cells not moved, with the reason.
    factor_below, factor_above : (C,) float
        First factor below / above 1 at which the optimal policy changes; NaN when none
        within the search range.
    search_below, search_above : (C,) float
        End of the search range in each direction (``search_above`` is capped at the
        cell's feasible factor).
    changes_below, changes_above : list of str
        States and ages whose action changes just past the switch ("none" without one).
    converged : (C, 2) bool
        Brent's method stopped by its tolerance (True where there was nothing to find).
    loss_factors : tuple of float
        The factors (below 1, above 1) at which the value lost is reported.
    value_lost : (C, 2) float
        Value lost at the model start by keeping the base-case policy when the cell is at
        each loss factor (objective units, present value); NaN when the factor is beyond
        the cell's feasible factor.
    base_value : float
        Objective at the model start in the base case.
    objective : Objective
    search_max : float
    tied_cells : int
        Decision cells (cycle, state) tied in the base case, left out of the margins.
    """

    cells: list[TransitionCell]
    fixed: list[FixedCell]
    factor_below: np.ndarray
    factor_above: np.ndarray
    search_below: np.ndarray
    search_above: np.ndarray
    changes_below: list[str]
    changes_above: list[str]
    converged: np.ndarray
    loss_factors: tuple[float, float]
    value_lost: np.ndarray
    base_value: float
    objective: Objective
    search_max: float
    tied_cells: int = 0
    action_ids: tuple[str, ...] = field(default=())
    state_ids: tuple[str, ...] = field(default=())

    def nearest_factor(self) -> np.ndarray:
        """(C,) the switching factor nearer to 1 on a log scale (NaN without a switch)."""
        with np.errstate(divide="ignore"):
            below = np.where(np.isnan(self.factor_below), np.inf, -np.log(self.factor_below))
            above = np.where(np.isnan(self.factor_above), np.inf, np.log(self.factor_above))
        nearest = np.where(below <= above, self.factor_below, self.factor_above)
        return np.where(np.isinf(np.minimum(below, above)), np.nan, nearest)

    def to_frame(self) -> pd.DataFrame:
        """One row per movable cell.

        Columns: ``action, from_state, to_state, cell, rule, expression, base_low,
        base_high, varies_with_age, feasible_max, factor_below, factor_above,
        nearest_factor, closeness, changes_below, changes_above, search_below,
        search_above, loss_factor_below, value_lost_below, loss_factor_above,
        value_lost_above, note``. Factors multiply the cell's base value; values are in
        the objective's unit at the model start.
        """
        nearest = self.nearest_factor()
        rows = []
        for i, cell in enumerate(self.cells):
            rows.append(
                {
                    "action": cell.action_id,
                    "from_state": cell.from_id,
                    "to_state": cell.to_id,
                    "cell": cell.path,
                    "rule": cell.rule,
                    "expression": cell.expression,
                    "base_low": cell.base_low,
                    "base_high": cell.base_high,
                    "varies_with_age": cell.varies_with_age,
                    "feasible_max": cell.feasible_max,
                    "factor_below": self.factor_below[i],
                    "factor_above": self.factor_above[i],
                    "nearest_factor": nearest[i],
                    "closeness": closeness_band(nearest[i]),
                    "changes_below": self.changes_below[i],
                    "changes_above": self.changes_above[i],
                    "search_below": self.search_below[i],
                    "search_above": self.search_above[i],
                    "loss_factor_below": self.loss_factors[0],
                    "value_lost_below": self.value_lost[i, 0],
                    "loss_factor_above": self.loss_factors[1],
                    "value_lost_above": self.value_lost[i, 1],
                    "note": self._note(i),
                }
            )
        return pd.DataFrame(rows, columns=FRAME_COLUMNS)

    def fixed_frame(self) -> pd.DataFrame:
        """One row per fixed cell: ``action, from_state, to_state, cell, reason``."""
        return pd.DataFrame(
            [(f.action_id, f.from_id, f.to_id, f.path, f.reason) for f in self.fixed],
            columns=["action", "from_state", "to_state", "cell", "reason"],
        )

    def summary_table(self) -> pd.DataFrame:
        """The table the CLI, the report and the app show, nearest switch first.

        Columns: ``action, from, to, switch below 1, switch above 1, closeness,
        policy change just past the switch, value lost at <k>x`` (one per loss factor)
        ``, note``. Factors are numbers (NaN: no switch in the search range).
        """
        frame = self.to_frame()
        low, high = self.loss_factors
        table = pd.DataFrame(
            {
                "action": frame["action"],
                "from": frame["from_state"],
                "to": frame["to_state"],
                "switch below 1": frame["factor_below"],
                "switch above 1": frame["factor_above"],
                "closeness": frame["closeness"],
                "policy change just past the switch": [
                    _both(below, above)
                    for below, above in zip(
                        frame["changes_below"], frame["changes_above"], strict=True
                    )
                ],
                f"value lost at {low:g}x": frame["value_lost_below"],
                f"value lost at {high:g}x": frame["value_lost_above"],
                "note": frame["note"],
            }
        )
        with np.errstate(divide="ignore"):
            distance = np.abs(np.log(frame["nearest_factor"].to_numpy(dtype=float)))
        order = np.argsort(np.where(np.isnan(distance), np.inf, distance), kind="stable")
        return table.iloc[order].reset_index(drop=True)

    def matrix_frame(self) -> pd.DataFrame:
        """Every cell with an entry, for the matrix view (one matrix per action).

        Columns: ``action, from_state, to_state, cell, status`` ("moved" or the fixed
        cell's short reason), ``closeness, label`` (text written in the cell: "below /
        above" factors, "-" for none), ``detail`` (one line for a tooltip).
        """
        frame = self.to_frame()
        moved = pd.DataFrame(
            {
                "action": frame["action"],
                "from_state": frame["from_state"],
                "to_state": frame["to_state"],
                "cell": frame["cell"],
                "status": "moved",
                "closeness": frame["closeness"],
                "label": [
                    f"{_factor_text(b)} / {_factor_text(a)}"
                    for b, a in zip(frame["factor_below"], frame["factor_above"], strict=True)
                ],
                "detail": [
                    f"switch below 1: {_factor_text(b)}; above 1: {_factor_text(a)}; "
                    f"{_both(cb, ca)}"
                    for b, a, cb, ca in zip(
                        frame["factor_below"],
                        frame["factor_above"],
                        frame["changes_below"],
                        frame["changes_above"],
                        strict=True,
                    )
                ],
            }
        )
        fixed = pd.DataFrame(
            {
                "action": [f.action_id for f in self.fixed],
                "from_state": [f.from_id for f in self.fixed],
                "to_state": [f.to_id for f in self.fixed],
                "cell": [f.path for f in self.fixed],
                "status": [FIXED_LABELS.get(f.reason, "fixed") for f in self.fixed],
                "closeness": FIXED_BAND,
                "label": [FIXED_LABELS.get(f.reason, "fixed") for f in self.fixed],
                "detail": [f.reason for f in self.fixed],
            }
        )
        return pd.concat([moved, fixed], ignore_index=True)

    def _note(self, i: int) -> str:
        cell = self.cells[i]
        notes = []
        if cell.varies_with_age:
            notes.append(WHOLE_PATH_NOTE)
        if self.search_above[i] < self.search_max:
            if self.search_above[i] <= 1.0:
                notes.append("cannot increase: the row has no room (feasible factor 1)")
            elif np.isnan(self.factor_above[i]):
                notes.append(
                    f"search above stopped at the feasible factor {self.search_above[i]:.4g}"
                )
        if cell.feasible_max < self.loss_factors[1]:
            notes.append(
                f"factor {self.loss_factors[1]:g} is beyond the feasible factor "
                f"{cell.feasible_max:.4g}: no value lost reported there"
            )
        if not self.converged[i].all():
            notes.append("root search did not converge")
        return "; ".join(notes)


FRAME_COLUMNS = [
    "action", "from_state", "to_state", "cell", "rule", "expression", "base_low", "base_high",
    "varies_with_age", "feasible_max", "factor_below", "factor_above", "nearest_factor",
    "closeness", "changes_below", "changes_above", "search_below", "search_above",
    "loss_factor_below", "value_lost_below", "loss_factor_above", "value_lost_above", "note",
]  # fmt: skip


def _factor_text(factor: float) -> str:
    return "-" if factor is None or not np.isfinite(factor) else f"{factor:.4g}"


def _both(below: str, above: str) -> str:
    """``"below: ...; above: ..."`` for the sides with a change (``"none"`` otherwise)."""
    parts = [f"{side}: {text}" for side, text in (("below", below), ("above", above))]
    kept = [p for p, text in zip(parts, (below, above), strict=True) if text != "none"]
    return "; ".join(kept) or "none"


def closeness_band(factor: float) -> str:
    """The label of :data:`CLOSENESS_BANDS` a switching factor falls in."""
    if factor is None or not np.isfinite(factor):
        return NO_SWITCH_BAND
    spread = np.inf if factor <= 0 else max(factor, 1.0 / factor)
    return next(label for bound, label in CLOSENESS_BANDS if spread <= bound)


def cell_sensitivity(
    model: Any,
    *,
    objective: Objective | None = None,
    loss_factors: tuple[float, float] = DEFAULT_LOSS_FACTORS,
    search_max: float = DEFAULT_SEARCH_MAX,
    grid: int = DEFAULT_GRID,
    xtol: float = DEFAULT_XTOL,
    progress: Progress | None = None,
    memory_limit_bytes: int | None = None,
) -> CellSensitivityResult:
    """Switching factor below and above 1 of every movable transition cell.

    Parameters
    ----------
    model : caredecide.model.Model
    objective : Objective, optional
        Default: the model file's objective.
    loss_factors : (float, float)
        Factors (one in (0, 1), one > 1) at which the value lost by keeping the base-case
        policy is reported.
    search_max : float
        Largest factor searched above 1 (> 1); the search below 1 runs down to 0.
    grid : int
        Grid values per direction used to bracket the first switch (>= 2).
    xtol : float
        Absolute tolerance on a switching factor (> 0).
    progress : callable(done, total), optional
        Batches solved out of an estimate of the total.
    memory_limit_bytes : int, optional
        Budget for one chunk of moved draws (default: half the available memory); larger
        batches are solved chunk by chunk, as by the batch driver.

    Returns
    -------
    CellSensitivityResult

    Raises
    ------
    ModelError
        An option out of range (naming it and the value), or a model that does not compile.
    ModelTooLargeError
        Not even one moved parameter set fits the memory budget beside the base case
        (:func:`cell_chunk_size`); checked before anything is compiled.
    """
    from caredecide.solvers import solve

    check_cell_options(loss_factors, search_max, grid, xtol)
    objective = default_objective(model) if objective is None else objective
    _fit(model, 0, memory_limit_bytes, grid)  # refused before compiling when nothing fits
    scaler = CellScaler(model)
    cells = scaler.cells
    C = len(cells)
    base = solve(scaler.base, objective)
    base_policy = base.policy[0]  # (Tpi, S)
    tied = base.indifferent[0] & base.decision_states[None, :]
    mask = base.decision_states[None, :] & ~tied  # (Tpi, S) decision cells with a margin
    base_value = float(base.expected_value(scaler.base.start_distribution)[0])
    caps = np.array([c.feasible_max for c in cells], dtype=float)
    search_above = np.minimum(caps, float(search_max))
    search_below = np.zeros(C)
    steps = [0, 2 + 20]
    report = _progress(progress, steps)

    # 1. The grid (both directions) and the loss factors in one batch.
    fraction = np.arange(1, grid + 1) / grid
    below_grid = 1.0 - fraction[None, :] * (1.0 - search_below[:, None])  # (C, G)
    above_grid = search_above[:, None] ** fraction[None, :]  # (C, G); 1 where no room
    above_grid[:, -1] = search_above
    loss = np.array(loss_factors, dtype=float)
    loss_ok = loss[None, :] <= caps[:, None]  # (C, 2)
    loss_grid = np.where(loss_ok, loss[None, :], 1.0)
    factors = np.concatenate([below_grid, above_grid, loss_grid], axis=1)  # (C, 2G + 2)
    which = np.repeat(np.arange(C), factors.shape[1])
    loss_draws = (np.arange(C)[:, None] * factors.shape[1] + 2 * grid + np.arange(2)).reshape(-1)
    evaluate = np.zeros(which.size, dtype=bool)
    evaluate[loss_draws] = True
    n_total = which.size + 4 * C  # the grid, then at most two ends per bracket
    moved = _solve_moved(
        scaler, which, factors.reshape(-1), objective, base_policy, mask, evaluate=evaluate,
        keep_negative=True, memory_limit_bytes=memory_limit_bytes, n_total=n_total, grid=grid,
    )  # fmt: skip
    margins = moved.margin.reshape(C, factors.shape[1])  # (C, 2G+2)
    loss_best, loss_kept = moved.start_value[loss_draws], moved.kept_value[loss_draws]
    loss_margin = moved.margin[loss_draws]
    report()

    # 2. Brackets: the first grid interval in each direction where the margin turns negative.
    #    The bracket's margin is the smallest over the decision cells whose action differs at
    #    its far end: the first of them to switch is the switch sought, and leaving out the
    #    cells that never switch in the bracket keeps the function smooth for Brent's method.
    base_cells = _cell_margins(base, base_policy, mask)[0]  # (Tpi, S)
    brackets = []  # (cell, side, x_near, x_far, index_near, index_far)
    for side, grid_values, offset in ((0, below_grid, 0), (1, above_grid, grid)):
        searched = grid_values[:, -1] != 1.0
        for c in np.flatnonzero(searched):
            negative = np.flatnonzero(margins[c, offset : offset + grid] < 0)
            if negative.size == 0:
                continue
            i = int(negative[0])
            x_near = 1.0 if i == 0 else grid_values[c, i - 1]
            near = -1 if i == 0 else offset + i - 1  # -1: the near end is the base case
            brackets.append((c, side, x_near, grid_values[c, i], near, offset + i))

    factor = np.full((C, 2), np.nan)
    converged = np.ones((C, 2), dtype=bool)
    changes = [["none", "none"] for _ in range(C)]
    if brackets:
        columns = (np.array(v) for v in zip(*brackets, strict=True))
        cell_of, side_of, x_near, x_far, i_near, i_far = columns
        cell_of, side_of = cell_of.astype(int), side_of.astype(int)
        i_near, i_far = i_near.astype(int), i_far.astype(int)
        n_columns = factors.shape[1]
        # The decision cells whose action differs at the far end (packed bits, (B, bytes)).
        switching = moved.negative[cell_of * n_columns + i_far]
        # Far end: its smallest margin is negative, so it lies on a switching cell.
        m_far = margins[cell_of, i_far]
        m_near = np.empty(len(brackets))
        from_base = i_near < 0
        base_switching = _unpack(switching[from_base], mask)
        m_near[from_base] = np.where(base_switching, base_cells[None], np.inf).min(axis=(1, 2))
        inner = np.flatnonzero(~from_base)
        if inner.size:
            near_draws = cell_of[inner] * n_columns + i_near[inner]
            m_near[inner] = _solve_moved(
                scaler, which[near_draws], factors.reshape(-1)[near_draws], objective,
                base_policy, mask, masks=switching[inner],
                memory_limit_bytes=memory_limit_bytes, n_total=n_total, grid=grid,
            ).margin  # fmt: skip
        del moved

        def margin_at(x: np.ndarray, k: np.ndarray) -> np.ndarray:
            return _solve_moved(
                scaler, cell_of[k], x, objective, base_policy, mask, masks=switching[k],
                memory_limit_bytes=memory_limit_bytes, n_total=n_total, grid=grid,
            ).margin  # fmt: skip

        found = brent_roots(
            margin_at, x_near, x_far, m_near, m_far, xtol=xtol, rtol=RTOL_MIN,
            callback=lambda done, total: report(),
        )  # fmt: skip
        factor[cell_of, side_of] = found.root
        converged[cell_of, side_of] = found.converged
        # 3. The states and ages that change just past each switching factor.
        direction = np.where(side_of == 0, -1.0, 1.0)
        step = PAST_STEP * np.maximum(1.0, found.root)
        past = np.clip(
            found.root + direction * step, np.minimum(x_near, x_far), np.maximum(x_near, x_far)
        )
        texts = _solve_moved(
            scaler, cell_of, past, objective, base_policy, mask, describe=True,
            memory_limit_bytes=memory_limit_bytes, n_total=n_total, grid=grid,
        ).changes  # fmt: skip
        for n, (c, side) in enumerate(zip(cell_of, side_of, strict=True)):
            changes[c][side] = texts[n]
        report()

    # 4. Value lost by keeping the base-case policy at the loss factors.
    best, kept = loss_best, loss_kept
    same = loss_margin >= 0
    # The base-case policy is still optimal: nothing is lost (not a rounding residue).
    lost = best - kept
    same |= np.abs(lost) <= 1e-9 * np.maximum(1.0, np.abs(best))  # rounding, not a loss
    value_lost = np.where(same, 0.0, np.maximum(lost, 0.0)).reshape(C, 2)
    value_lost[~loss_ok] = np.nan

    return CellSensitivityResult(
        cells=cells,
        fixed=scaler.fixed,
        factor_below=factor[:, 0],
        factor_above=factor[:, 1],
        search_below=search_below,
        search_above=search_above,
        changes_below=[c[0] for c in changes],
        changes_above=[c[1] for c in changes],
        converged=converged,
        loss_factors=(float(loss[0]), float(loss[1])),
        value_lost=value_lost,
        base_value=base_value,
        objective=objective,
        search_max=float(search_max),
        tied_cells=int(tied.sum()),
        action_ids=scaler.base.action_ids,
        state_ids=scaler.base.state_ids,
    )


@dataclass(frozen=True)
class _Moved:
    """Per-draw reductions of a batch of moved cells (see :func:`_solve_moved`): no
    (Tpi, S) array per draw is kept beyond a packed bit mask."""

    margin: np.ndarray  # (N,) smallest margin of the base-case action over the draw's mask
    negative: np.ndarray  # (N, B) uint8: packed (Tpi, S) bits, margin < 0 (B = 0: not asked)
    start_value: np.ndarray  # (N,) objective at the model start, optimal policy
    kept_value: np.ndarray  # (N,) the same under the base-case policy (NaN: not evaluated)
    changes: list[str]  # per draw, the states and ages that change ("" when not asked)


@dataclass(frozen=True)
class _MovedJob:
    """Chunk job (:mod:`caredecide.chunks`): move, solve and reduce draws ``start:stop``."""

    scaler: CellScaler
    which: np.ndarray
    factors: np.ndarray
    objective: Objective
    base_policy: np.ndarray
    mask: np.ndarray
    evaluate: np.ndarray | None
    masks: np.ndarray | None = None  # (N, B) packed per-draw masks replacing ``mask``
    keep_negative: bool = False
    describe: bool = False

    def __call__(self, start: int, stop: int) -> _Moved:
        from caredecide.solvers import solve

        compiled = self.scaler.scaled(self.which[start:stop], self.factors[start:stop])
        result = solve(compiled, self.objective)
        kept = np.full(stop - start, np.nan)
        if self.evaluate is not None and self.evaluate[start:stop].any():
            picked = np.flatnonzero(self.evaluate[start:stop])
            base = self.base_policy[None]
            kept[picked] = evaluate_policy(compiled.take_draws(picked), base, self.objective).value
        start_value = result.expected_value(compiled.start_distribution)
        mask = self.mask if self.masks is None else _unpack(self.masks[start:stop], self.mask)
        margins = _cell_margins(result, self.base_policy, mask)  # (n, Tpi, S)
        policy = np.asarray(result.policy)
        del result, compiled
        n = stop - start
        negative = np.packbits((margins < 0).reshape(n, -1), axis=1) if self.keep_negative else None
        changes = (
            _change_texts(self.scaler.base, margins, policy, self.base_policy)
            if self.describe
            else [""] * n
        )
        return _Moved(
            margins.reshape(n, -1).min(axis=1),
            np.zeros((n, 0), dtype=np.uint8) if negative is None else negative,
            start_value,
            kept,
            changes,
        )


def _unpack(packed: np.ndarray, like: np.ndarray) -> np.ndarray:
    """(n, Tpi, S) bool masks from their packed bits ((n, B) uint8; ``like`` (Tpi, S))."""
    bits = np.unpackbits(packed, axis=1, count=like.size)
    return bits.reshape(packed.shape[0], *like.shape).astype(bool)


CELL_MARGIN_COPIES = 4
"""(Tpi, S, A) float arrays per draw the margins of a chunk hold at once beyond the
solver's results (the Q-values' copy, the chosen values, the margin, the mask)."""


def cell_memory(scaler: CellScaler, n_total: int, grid: int = DEFAULT_GRID) -> tuple[int, int]:
    """(fixed, per draw) bytes of a cell sensitivity run moving ``n_total`` draws.

    ``fixed``: the base case compiled and solved, the rows before the moves, and the
    packed masks and values kept per draw (:class:`_Moved`); ``per draw``: one moved
    draw of a chunk (:func:`caredecide.memory.draw_bytes` of the dense form, which the
    cells are scaled in, plus the margins' copies of the Q-values, ``CELL_MARGIN_COPIES``,
    the one time slice each draw copies from the base case, and the copy of the
    transitions of the draws evaluated under the base-case policy: the two loss factors
    of every ``2 grid + 2`` draws).
    """
    return _memory_of(scaler.model, n_total, grid)


def _memory_of(model: Any, n_total: int, grid: int) -> tuple[int, int]:
    """:func:`cell_memory` of a model (read from its structure, nothing compiled)."""
    from caredecide import memory

    shape = memory.shape_of(model, transition_form=scaling_form(model))
    S, A = shape.n_states, shape.n_actions
    T = shape.n_cycles or 1
    one = memory.pipeline_peak_bytes(shape)
    before = memory.transition_bytes(shape) if shape.move_rows else 0
    # Kept per moved draw: packed bits and four numbers, twice while the chunks join.
    kept = 2 * n_total * (-(-T * S // 8) + 4 * memory.FLOAT)
    one_draw = memory.transition_bytes(shape)
    per_draw = (
        _solve_draw_bytes(shape)
        + CELL_MARGIN_COPIES * memory.FLOAT * T * S * A
        + one_draw // shape.transition_cycles
        + 2 * one_draw // (2 * grid + 2)
    )
    return one + before + kept, per_draw


def _solve_draw_bytes(shape: Any) -> int:
    """Bytes one more draw adds to the solve and evaluation stages of a pass (the moved
    draws are not compiled: their arrays are copies of the base case's, moved in place)."""
    from caredecide import memory

    def stages(d: int) -> int:
        s = shape.with_draws(d)
        held = memory.compiled_bytes(s) + memory.results_bytes(s)
        return held + max(memory.solve_work_bytes(s), memory.evaluate_bytes(s))

    return stages(2) - stages(1)


def cell_chunk_size(
    scaler: CellScaler,
    n_total: int,
    memory_limit_bytes: int | None = None,
    grid: int = DEFAULT_GRID,
) -> tuple[int, int]:
    """(draws per chunk, estimated peak bytes) of a run moving ``n_total`` draws.

    Raises
    ------
    ModelTooLargeError
        Not even one moved draw fits the budget beside the fixed part: the message names
        the model file, the estimate and the budget.
    """
    return _fit(scaler.model, n_total, memory_limit_bytes, grid)


def _fit(model: Any, n_total: int, memory_limit_bytes: int | None, grid: int) -> tuple[int, int]:
    """:func:`cell_chunk_size` of a model (``n_total`` 0: before the cells are known, the
    check :func:`cell_sensitivity` makes before compiling anything)."""
    from caredecide import memory
    from caredecide.chunks import memory_budget
    from caredecide.errors import ModelTooLargeError

    budget = memory_budget(memory_limit_bytes)
    fixed, per_draw = _memory_of(model, n_total, grid)
    size = min(max(n_total, 1), (budget - fixed) // per_draw)
    if size < 1:
        needed = fixed + per_draw
        sets = f"{n_total:,} moved parameter sets" if n_total else "moved parameter sets"
        form = scaling_form(model)
        n_states = memory.shape_of(model, transition_form=form).n_states
        raise ModelTooLargeError(
            f"{model.file_label}: the sensitivity of the transition cells "
            f"({sets} of {n_states:,} states in {form} rows) needs an estimated "
            f"{memory.gib(needed)} ({needed:,} bytes) of memory even one parameter set at a "
            f"time; the budget is {memory.gib(budget)} ({budget:,} bytes). Use fewer states "
            "or a shorter horizon, or leave out the transition cells."
        )
    return int(size), int(fixed + size * per_draw)


def _solve_moved(
    scaler: CellScaler,
    which: np.ndarray,
    factors: np.ndarray,
    objective: Objective,
    base_policy: np.ndarray,
    mask: np.ndarray,
    *,
    evaluate: np.ndarray | None = None,
    masks: np.ndarray | None = None,
    keep_negative: bool = False,
    describe: bool = False,
    memory_limit_bytes: int | None = None,
    n_total: int | None = None,
    grid: int = DEFAULT_GRID,
) -> _Moved:
    """Move cell ``which[n]`` by ``factors[n]`` in draw ``n`` and solve, chunk by chunk.

    The one chunk driver (:mod:`caredecide.chunks`) runs the chunks, sized by
    :func:`cell_chunk_size`; only the per-draw reductions are kept. ``evaluate`` (N,) bool
    marks the draws whose value under the base-case policy is wanted; ``masks`` (N, B)
    packed bits give each draw its own decision cells (default ``mask``);
    ``keep_negative`` keeps the packed cells with a negative margin, ``describe`` the
    states and ages that change. ``n_total`` sizes the kept part (default N).
    """
    from caredecide.chunks import chunk_ranges, run_chunks

    n = which.size
    if n == 0:  # no movable cell
        return _Moved(np.empty(0), np.zeros((0, 0), np.uint8), np.empty(0), np.empty(0), [])
    size, _ = cell_chunk_size(scaler, n if n_total is None else n_total, memory_limit_bytes, grid)
    job = _MovedJob(
        scaler, which, factors, objective, base_policy, mask, evaluate, masks, keep_negative,
        describe,
    )  # fmt: skip
    pieces = list(run_chunks(job, chunk_ranges(n, size)))
    return _Moved(
        np.concatenate([p.margin for p in pieces]),
        np.concatenate([p.negative for p in pieces]),
        np.concatenate([p.start_value for p in pieces]),
        np.concatenate([p.kept_value for p in pieces]),
        [text for p in pieces for text in p.changes],
    )


def _cell_margins(result: Any, base_policy: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """(D, Tpi, S) ``Q(a0) - max_{b != a0} Q(b)``; ``inf`` outside ``mask`` ((Tpi, S) or
    (D, Tpi, S))."""
    q = np.asarray(result.q_values)  # (D, Tpi, S, A), -inf where not allowed
    chosen = np.broadcast_to(base_policy[None, :, :, None], (q.shape[0], *base_policy.shape, 1))
    q_base = np.take_along_axis(q, chosen, axis=-1)[..., 0]
    others = q.copy()
    np.put_along_axis(others, chosen, -np.inf, axis=-1)
    margin = q_base - others.max(axis=-1)
    return np.where(mask if mask.ndim == 3 else mask[None], margin, np.inf)


def _change_texts(
    base: Any, margin: np.ndarray, policy: np.ndarray, base_policy: np.ndarray
) -> list[str]:
    """Per draw, the states and ages whose best action differs from the base case
    (``margin``, ``policy`` (D, Tpi, S): the draws' margins and optimal actions)."""
    changed = margin < 0
    # Rounding may leave the switching cell at a tiny positive margin: name the closest.
    lowest = margin.reshape(margin.shape[0], -1).argmin(axis=1)
    none = ~changed.any(axis=(1, 2))
    changed.reshape(changed.shape[0], -1)[np.flatnonzero(none), lowest[none]] = True
    ages = policy_ages(base, base_policy.shape[0])
    states = np.asarray(base.state_ids, dtype=object)
    actions = np.asarray(base.action_ids, dtype=object)
    n_actions = len(base.action_ids)
    texts = []
    for d in range(changed.shape[0]):
        t, s = np.nonzero(changed[d])  # ordered by cycle, then state
        before, after = base_policy[t, s], policy[d, t, s]
        key = (s * n_actions + before) * n_actions + after
        parts = []
        for k in np.unique(key):  # state order, then actions
            band = key == k
            i = int(np.flatnonzero(band)[0])
            cycles = pd.DataFrame({"cycle": t[band], "age": ages[t[band]]})
            # An infinite horizon has one stationary policy: no ages to name.
            when = "in every cycle" if base.n_cycles is None else f"at {_ages_text(cycles)}"
            if before[i] == after[i]:  # the rounding fallback above: a tie, not yet a switch
                parts.append(f"{states[s[i]]} {actions[before[i]]} tied with another {when}")
            else:
                parts.append(f"{states[s[i]]} {actions[before[i]]}->{actions[after[i]]} {when}")
        texts.append("; ".join(parts))
    return texts


def _progress(progress: Progress | None, steps: list[int]) -> Callable[[], None]:
    """A counter that reports ``(done, estimated total)``; the total grows if exceeded."""

    def report() -> None:
        steps[0] += 1
        steps[1] = max(steps[1], steps[0] + 1)
        if progress is not None:
            progress(steps[0], steps[1])

    return report


def check_cell_options(
    loss_factors: Any,
    search_max: float,
    grid: int = DEFAULT_GRID,
    xtol: float = DEFAULT_XTOL,
    *,
    names: dict[str, str] | None = None,
) -> None:
    """Refuse run options out of range, naming each (``names`` maps an option to the label
    a front end uses, e.g. ``{"loss_factors": "--cell-loss-factors"}``).

    Raises
    ------
    RunOptionError
        Naming the first bad option, its value and what was expected.
    """
    names = names or {}

    def name(option: str) -> str:
        return names.get(option, option)

    try:
        low, high = (float(v) for v in loss_factors)
        ok = math.isfinite(low) and math.isfinite(high) and 0 < low < 1 < high
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise RunOptionError(
            name("loss_factors"),
            loss_factors,
            "two factors, one in (0, 1) and one above 1 (e.g. 0.5 and 2)",
        )
    check_scalar(search_max, name("search_max"), float, min_val=1.0, include_boundaries="neither",
                 max_val=math.inf)  # fmt: skip
    check_scalar(grid, name("grid"), int, min_val=2)
    check_scalar(xtol, name("xtol"), float, min_val=0.0, include_boundaries="neither",
                 max_val=math.inf)  # fmt: skip
