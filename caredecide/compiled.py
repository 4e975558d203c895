"""The one array representation every solver and analysis uses.

A model plus a batch of ``D`` parameter sets compiles (``caredecide.compile``) to a
:class:`CompiledModel`. Shapes use these letters:

``D``  draws (parameter sets) in the batch;
``T``  cycles in the horizon (``n_cycles``); a time axis of length 1 means "the same
       every cycle" and is broadcast;
``A``  actions; ``S`` health states.

Arrays
------
transition : (D, Tp, A, S, S) float64, Tp in {1, T}
    ``transition[d, t, a, s, s2]`` = probability of being in ``s2`` at the end of cycle
    ``t`` when action ``a`` is taken in ``s`` at the start of cycle ``t``: the decision-time
    move (``move``) and the cycle's transitions together. Rows of actions not allowed in
    ``s`` hold a self-loop (they are masked out by ``allowed``).
sparse_transition : SparseTransitions or None
    The alternative form of ``transition`` for large finite-horizon models (compiled with
    ``transition_form="sparse"``, or chosen by "auto"): the same probabilities in
    compressed sparse rows, one pattern of non-zeros per action shared by every draw and
    cycle, values (D, Tp, nnz). ``transition`` is then a read-only stand-in of the full
    shape that holds no memory (every entry NaN): code that needs the dense array calls
    :func:`dense_transition`, which refuses the sparse form with a clear error. ``None``:
    ``transition`` is the dense array.
move : (D, Tm, A, S, S) float64 or None, Tm in {1, T}
    Decision-time moves: ``move[d, t, a, s, s1]`` = share of the cohort that taking ``a``
    in ``s`` at the start of cycle ``t`` puts in ``s1`` before the cycle's transitions
    (identity rows where the action moves no one). ``None``: no action moves anyone.
    Occupancy rewards of the start of the cycle are counted in ``s1`` (after the move).
allowed : (S, A) bool
    Whether action ``a`` may be chosen in state ``s``. Absorbing states allow every
    action with identical outcomes (no decision is made there).
state_qaly : (D, Tq, S) float64, Tq in {1, T}
    QALYs accrued per cycle spent in ``s`` (utility weight x cycle length in years) during
    cycle ``t`` = 0..T-1 (expressions see ``cycle = t``). Subject to the within-cycle method.
state_cost : (D, Tq, S) float64
    Costs per cycle spent in ``s`` during cycle ``t``; subject to the within-cycle method.
state_action_qaly : (D, Tr, S, A) float64 or None, Tr in {1, T}
    QALYs per cycle spent in ``s`` by the cohort that took action ``a`` at the start of
    cycle ``t`` (added to ``state_qaly``; counted by occupancy and subject to the
    within-cycle method: in the state reached by the move at the start of the cycle, in
    the state reached at its end). ``None``: zero.
state_action_cost : (D, Tr, S, A) float64 or None
    Costs per cycle in ``s`` under action ``a`` (e.g. a drug paid while treated), like
    ``state_action_qaly``. ``None``: zero.
decision_qaly : (D, Td, S, A) float64, Td in {1, T}
    QALYs gained (negative: lost) when action ``a`` is taken in ``s`` at cycle ``t``
    (one-off QALY loss). Charged at the decision, not corrected within cycle.
decision_cost : (D, Td, S, A) float64
    One-off cost of taking ``a`` plus the action's per-cycle cost, charged at the
    decision (start of cycle ``t``).
life_years : (S,) float64
    Life-years per cycle in ``s`` (cycle length for alive states, 0 for dead ones).
start_distribution : (S,) float64
    Cohort proportions at cycle 0; sums to 1.

Discounting and within-cycle weights are *not* folded into these arrays: the solver
applies them (see :func:`cycle_weights`), so outcomes and costs are discounted exactly at
their own rates.

Timeline of cycle ``t`` (boundaries ``t`` and ``t + 1``, age ``start_age + t x cycle_length``
at its start):

1. at boundary ``t`` the cohort ``m_t`` is in its states; the decision is made and the
   one-off charges (``decision_qaly``, ``decision_cost``) fall on ``m_t`` at ``d^t``;
2. the decision-time move puts the cohort in ``m_t^+ = m_t M_t`` (``m_t^+ = m_t`` without
   moves);
3. the cycle's transitions give ``m_{t+1}``;
4. the occupancy rewards of cycle ``t`` (state rewards plus state-action rewards of the
   action taken) count ``start_t x m_t^+ + end_t x m_{t+1}``, with present-value weights
   ``(start_t, end_t)`` from :func:`cycle_weights` (within-cycle method and discount).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from caredecide.errors import CompiledModelError

WITHIN_CYCLE_METHODS = ("start", "end", "trapezoid", "simpson", "half_cycle")
STATIONARY_METHODS = ("start", "end", "trapezoid", "half_cycle")
"""Within-cycle methods whose weights are the same every cycle (infinite horizon)."""
ROW_SUM_TOLERANCE = 1e-8
"""A transition row or the start distribution must sum to 1 within this (absolute)."""
CHECK_BLOCK_ROWS = 1 << 20
"""Transition rows summed at once by the contract check (8 MiB of sums)."""


@dataclass(frozen=True, eq=False)
class SparseTransitions:
    """Transition probabilities in compressed sparse rows, one pattern for every draw and
    cycle (the alternative form of ``CompiledModel.transition``).

    Row ``a S + s`` (action ``a``, state ``s``) holds its non-zeros in the slots
    ``indptr[a S + s]`` to ``indptr[a S + s + 1]``: the columns (states entered) in
    ``indices``, sorted, and the probabilities of draw ``d`` in cycle ``t`` in
    ``values[d, t, slot]``. The pattern is the union of the cells any expression, rate row
    or move of the model can make non-zero, plus the diagonal, so a slot may hold 0 in
    some draws or cycles.

    Attributes
    ----------
    indptr : numpy.ndarray, shape (A S + 1,), int64
    indices : numpy.ndarray, shape (nnz,), int64
    values : numpy.ndarray, shape (D, Tp, nnz), float64
        Tp in {1, T}, as the dense array's time axis.
    n_states : int
    """

    indptr: np.ndarray
    indices: np.ndarray
    values: np.ndarray
    n_states: int

    @property
    def shape(self) -> tuple[int, int, int, int, int]:
        """(D, Tp, A, S, S): the shape of the dense array it stands for."""
        S = self.n_states
        A = (len(self.indptr) - 1) // max(S, 1)
        return (self.values.shape[0], self.values.shape[1], A, S, S)

    @property
    def nbytes(self) -> int:
        return int(self.indptr.nbytes + self.indices.nbytes + self.values.nbytes)

    def take_draws(self, index: slice | np.ndarray) -> SparseTransitions:
        """The same rows for the selected draws (the pattern is shared)."""
        from dataclasses import replace

        return replace(self, values=self.values[index])

    def row_sums(self) -> np.ndarray:
        """(D, Tp, A, S) sum of each row."""
        D, Tp, A, S, _ = self.shape
        starts = self.indptr[:-1]
        empty = starts == self.indptr[1:]
        if self.values.shape[-1] == 0:
            return np.zeros((D, Tp, A, S))
        sums = np.add.reduceat(self.values, np.minimum(starts, self.values.shape[-1] - 1), axis=-1)
        sums[..., empty] = 0.0  # reduceat gives the next entry for an empty row
        return sums.reshape(D, Tp, A, S)

    def dense_rows(self, d: int, t: int) -> np.ndarray:
        """(A, S, S) dense transitions of draw ``d`` in time slice ``t`` (one slice)."""
        _, _, A, S, _ = self.shape
        out = np.zeros((A * S, S))
        row = np.repeat(np.arange(A * S), np.diff(self.indptr))
        out[row, self.indices] = self.values[d, t]
        return out.reshape(A, S, S)

    def value_range(self) -> tuple[float, float]:
        """(smallest, largest) entry of the dense array it stands for (cells outside the
        pattern are 0)."""
        _, _, A, S, _ = self.shape
        low, high = float(self.values.min(initial=0.0)), float(self.values.max(initial=0.0))
        if self.indices.size == A * S * S:  # every cell in the pattern
            low, high = float(self.values.min()), float(self.values.max())
        return low, high

    def to_dense(self) -> np.ndarray:
        """(D, Tp, A, S, S) dense array (for checks on models small enough)."""
        D, Tp = self.values.shape[:2]
        return np.stack([np.stack([self.dense_rows(d, t) for t in range(Tp)]) for d in range(D)])


def sparse_stand_in(shape: tuple[int, ...]) -> np.ndarray:
    """A read-only (D, Tp, A, S, S) array of NaN holding no memory: ``transition`` of a
    compiled model whose transitions are in :class:`SparseTransitions`."""
    return np.broadcast_to(np.float64(np.nan), shape)


def transition_row(compiled: CompiledModel, d: int, t: int, a: int, s: int) -> np.ndarray:
    """(S,) transition row of state ``s`` under action ``a``, draw ``d``, time slice ``t``,
    in either form."""
    held = compiled.sparse_transition
    if held is None:
        return np.asarray(compiled.transition[d, t, a, s])
    row = np.zeros(compiled.n_states)
    span = slice(held.indptr[a * compiled.n_states + s], held.indptr[a * compiled.n_states + s + 1])
    row[held.indices[span]] = held.values[d, t, span]
    return row


def transition_diagonal(compiled: CompiledModel, d: int) -> np.ndarray:
    """(Tp, A, S) probability of staying in each state, draw ``d``, in either form."""
    held = compiled.sparse_transition
    if held is None:
        return np.diagonal(compiled.transition[d], axis1=-2, axis2=-1)
    _, Tp, A, S, _ = held.shape
    rows = np.repeat(np.arange(A * S), np.diff(held.indptr))
    on_diagonal = held.indices == rows % S  # one slot per row: the pattern holds the diagonal
    out = np.zeros((Tp, A * S))
    out[:, rows[on_diagonal]] = held.values[d][:, on_diagonal]
    return out.reshape(Tp, A, S)


def dense_transition(compiled: CompiledModel, purpose: str) -> np.ndarray:
    """``compiled.transition``, refusing a model compiled in sparse rows.

    Parameters
    ----------
    purpose : str
        What needs the dense array, as the subject of the message ("the dense solver").

    Raises
    ------
    CompiledModelError
        The transitions are in sparse rows (``compiled.sparse_transition``).
    """
    if compiled.sparse_transition is not None:
        D, Tp, A, S, _ = compiled.sparse_transition.shape
        raise CompiledModelError(
            f"{purpose} needs the dense transition array (D, Tp, A, S, S) = "
            f"({D}, {Tp}, {A}, {S}, {S}), but the compiled model holds its transitions in "
            "sparse rows (compile_model(..., transition_form='sparse'), or 'auto' for a "
            "large sparse model); compile with transition_form='dense' if it fits in memory"
        )
    return compiled.transition


@dataclass(frozen=True)
class CompiledModel:
    """Arrays of a model for a batch of parameter sets (see the module docstring)."""

    state_ids: tuple[str, ...]
    action_ids: tuple[str, ...]
    transition: np.ndarray
    allowed: np.ndarray
    state_qaly: np.ndarray
    state_cost: np.ndarray
    decision_qaly: np.ndarray
    decision_cost: np.ndarray
    life_years: np.ndarray
    start_distribution: np.ndarray
    n_cycles: int | None
    """Number of cycles; ``None`` means an infinite horizon (stationary model)."""
    cycle_length: float = 1.0
    """Years per cycle."""
    start_age: float = 0.0
    discount_outcomes: float | np.ndarray = 0.0
    """Annual discount rate for QALYs and life-years; a (D,) array gives each draw its own
    rate (finite horizon only; e.g. a threshold search over the rate)."""
    discount_costs: float | np.ndarray = 0.0
    """Annual discount rate for costs (float or (D,) array, as ``discount_outcomes``)."""
    within_cycle: str = "start"
    move: np.ndarray | None = None
    """(D, Tm, A, S, S) decision-time moves, or None (see the module docstring)."""
    state_action_qaly: np.ndarray | None = None
    """(D, Tr, S, A) QALYs per cycle in a state under an action, or None (zero)."""
    state_action_cost: np.ndarray | None = None
    """(D, Tr, S, A) costs per cycle in a state under an action, or None (zero)."""
    state_labels: tuple[str, ...] = ()
    action_labels: tuple[str, ...] = ()
    absorbing: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))
    """(S,) bool: states the cohort never leaves."""
    ordered_states: tuple[str, ...] = ()
    """States in their clinical order (e.g. stages), for structure summaries; may be empty."""
    state_groups: Mapping[str, tuple[str, ...]] = field(default_factory=dict)
    """Where each state comes from when the model declares attributes or tunnels
    (:mod:`caredecide.expand`): ``"state"`` -> declared state id, attribute name -> value
    name, tunnel name -> step (``"0"``, ``"1"``, ``"2+"``); each tuple has S entries, ``""``
    where a state does not carry the attribute or tunnel. Empty for a flat model."""
    sparse_transition: SparseTransitions | None = None
    """The transitions in sparse rows (finite horizon only), or None (see the module
    docstring): ``transition`` is then a stand-in holding no memory."""

    def __post_init__(self) -> None:
        self.check()

    def check(self, rows: bool = True) -> None:
        """Check the contract of the module docstring; raise listing every finding.

        Shapes agree with ``S`` states and ``A`` actions (time axes of length 1 or the
        horizon), every state allows at least one action, the start distribution and
        every transition row sum to 1 (within :data:`ROW_SUM_TOLERANCE`). ``rows=False``
        leaves out the transition rows (a solver that checks them as it reads them).

        Raises
        ------
        CompiledModelError
        """
        problems = _shape_problems(self)
        if not problems:
            problems = _value_problems(self, rows)
        if problems:
            raise CompiledModelError("compiled model is inconsistent: " + "; ".join(problems))

    @property
    def n_draws(self) -> int:
        return int(self.transition.shape[0])

    @property
    def n_states(self) -> int:
        return len(self.state_ids)

    @property
    def n_actions(self) -> int:
        return len(self.action_ids)

    @property
    def transition_form(self) -> str:
        """``"sparse"`` when the transitions are held in sparse rows
        (``sparse_transition``), else ``"dense"``."""
        return "dense" if self.sparse_transition is None else "sparse"

    @property
    def is_stationary(self) -> bool:
        """True when no array varies with the cycle."""
        return (
            self.transition.shape[1] == 1
            and self.state_qaly.shape[1] == 1
            and self.state_cost.shape[1] == 1
            and self.decision_qaly.shape[1] == 1
            and self.decision_cost.shape[1] == 1
            and all(
                array is None or array.shape[1] == 1
                for array in (self.move, self.state_action_qaly, self.state_action_cost)
            )
        )

    def ages(self) -> np.ndarray:
        """(T + 1,) age at each cycle boundary (finite horizon only)."""
        if self.n_cycles is None:
            raise ValueError("an infinite-horizon model has no age axis")
        return self.start_age + self.cycle_length * np.arange(self.n_cycles + 1)

    def per_cycle_discount(self) -> tuple[float | np.ndarray, float | np.ndarray]:
        """Per-cycle discount factors (outcomes, costs): ``(1 + r) ** -cycle_length``.

        Floats, or (D,) arrays when the rates are given per draw.
        """
        return (
            (1.0 + self.discount_outcomes) ** -self.cycle_length,
            (1.0 + self.discount_costs) ** -self.cycle_length,
        )

    def take_draws(self, index: slice | np.ndarray) -> CompiledModel:
        """A compiled model holding only the selected draws (views where possible)."""
        from dataclasses import replace

        def per_draw(rate: float | np.ndarray) -> float | np.ndarray:
            return np.asarray(rate)[index] if np.ndim(rate) else rate

        sparse = (
            None if self.sparse_transition is None else self.sparse_transition.take_draws(index)
        )
        return replace(
            self,
            transition=self.transition[index] if sparse is None else sparse_stand_in(sparse.shape),
            sparse_transition=sparse,
            state_qaly=self.state_qaly[index],
            state_cost=self.state_cost[index],
            decision_qaly=self.decision_qaly[index],
            decision_cost=self.decision_cost[index],
            discount_outcomes=per_draw(self.discount_outcomes),
            discount_costs=per_draw(self.discount_costs),
            move=None if self.move is None else self.move[index],
            state_action_qaly=(
                None if self.state_action_qaly is None else self.state_action_qaly[index]
            ),
            state_action_cost=(
                None if self.state_action_cost is None else self.state_action_cost[index]
            ),
        )


def _shape_problems(c: CompiledModel) -> list[str]:
    """Shapes that disagree with S states, A actions, D draws and the horizon."""
    S, A = len(c.state_ids), len(c.action_ids)
    problems = []
    P = c.transition
    if P.ndim != 5 or P.shape[2:] != (A, S, S):
        return [
            f"transition has shape {P.shape}; expected (D, Tp, {A}, {S}, {S}) for {A} actions "
            f"and {S} states"
        ]
    D = P.shape[0]
    T = c.n_cycles if c.n_cycles is not None else 1
    sparse = c.sparse_transition
    if sparse is not None:
        if c.n_cycles is None:
            problems.append("sparse_transition is for a finite horizon; n_cycles is None")
        if (
            sparse.values.ndim != 3
            or sparse.indptr.shape != (A * S + 1,)
            or sparse.indices.shape != sparse.values.shape[-1:]
            or sparse.shape != P.shape
        ):
            problems.append(
                f"sparse_transition has indptr {sparse.indptr.shape}, indices "
                f"{sparse.indices.shape} and values {sparse.values.shape}; expected "
                f"({A * S + 1},), (nnz,) and {P.shape[:2]} + (nnz,) for transition {P.shape}"
            )
    if c.n_cycles is None and P.shape[1] != 1:
        problems.append(
            f"transition has {P.shape[1]} cycles; an infinite horizon needs stationary arrays "
            "(1 cycle)"
        )
    elif P.shape[1] not in (1, T):
        problems.append(f"transition has {P.shape[1]} cycles; expected 1 or {T}")
    for name in ("state_qaly", "state_cost"):
        arr = getattr(c, name)
        if arr.ndim != 3 or arr.shape[0] != D or arr.shape[2] != S:
            problems.append(f"{name} has shape {arr.shape}; expected ({D}, Tq, {S})")
    for name in ("decision_qaly", "decision_cost", "state_action_qaly", "state_action_cost"):
        arr = getattr(c, name)
        if arr is not None and (arr.ndim != 4 or arr.shape[0] != D or arr.shape[2:] != (S, A)):
            problems.append(f"{name} has shape {arr.shape}; expected ({D}, Td, {S}, {A})")
    move = c.move
    if move is not None and (move.ndim != 5 or move.shape[0] != D or move.shape[2:] != (A, S, S)):
        problems.append(f"move has shape {move.shape}; expected ({D}, Tm, {A}, {S}, {S})")
    if np.shape(c.allowed) != (S, A):
        problems.append(f"allowed has shape {np.shape(c.allowed)}; expected ({S}, {A})")
    for name in ("life_years", "start_distribution"):
        if np.shape(getattr(c, name)) != (S,):
            problems.append(f"{name} has shape {np.shape(getattr(c, name))}; expected ({S},)")
    if np.shape(c.absorbing) not in ((0,), (S,)):
        problems.append(f"absorbing has shape {np.shape(c.absorbing)}; expected ({S},)")
    return problems


def _value_problems(c: CompiledModel, rows: bool = True) -> list[str]:
    """Rows that do not sum to 1, states with no allowed action."""
    problems = []
    allowed = np.asarray(c.allowed, dtype=bool)
    if not allowed.any(axis=1).all():
        state = c.state_ids[int(np.flatnonzero(~allowed.any(axis=1))[0])]
        problems.append(f"state {state!r} allows no action; expected at least one allowed action")
    start = np.asarray(c.start_distribution, dtype=float)
    if not abs(start.sum() - 1.0) <= ROW_SUM_TOLERANCE or (start < 0).any():
        problems.append(
            f"start_distribution sums to {float(start.sum())!r}; expected shares >= 0 summing to 1"
        )
    if not rows:
        return problems
    # Rows of allowed (state, action) pairs sum to 1, a block of draws at a time (the sums
    # stay small beside the transitions); einsum sums the short last axis several times
    # faster than ndarray.sum.
    if c.sparse_transition is not None:
        gap = np.abs(c.sparse_transition.row_sums() - 1.0)
        bad = ~(gap <= ROW_SUM_TOLERANCE) & allowed.T[None, None]
        if bad.any():
            d, t, a, s = (int(i) for i in np.argwhere(bad)[0])
            problems.append(row_problem(c, d, t, a, s))
        return problems
    P = c.transition
    rows_per_draw = max(1, P[:1].size // max(P.shape[-1], 1))
    step = max(1, CHECK_BLOCK_ROWS // rows_per_draw)
    for first in range(0, P.shape[0], step):
        gap = np.einsum("...k->...", P[first : first + step])  # (d, Tp, A, S) row sums
        gap -= 1.0
        np.abs(gap, out=gap)
        bad = ~(gap <= ROW_SUM_TOLERANCE) & allowed.T[None, None]
        if bad.any():
            d, t, a, s = (int(i) for i in np.argwhere(bad)[0])
            problems.append(row_problem(c, first + d, t, a, s))
            break
    return problems


def row_problem(c: CompiledModel, d: int, t: int, a: int, s: int) -> str:
    """The finding for the transition row ``(d, t, a, s)`` that does not sum to 1."""
    if c.sparse_transition is not None:
        total = float(c.sparse_transition.row_sums()[d, t, a, s])
    else:
        total = float(c.transition[d, t, a, s].sum())
    return (
        f"transition row of state {c.state_ids[s]!r} under action {c.action_ids[a]!r} "
        f"(draw {d}, cycle {t}) sums to {1.0 + (total - 1.0)!r}; expected 1"
    )


def cycle_weights(
    method: str, n_cycles: int, discount: float = 1.0
) -> tuple[np.ndarray, np.ndarray]:
    """Present-value weights of the start and end occupancy of each cycle.

    The occupancy reward of cycle ``t`` is ``start[t] m_t^+ . u_t + end[t] m_{t+1} . u_t``
    (``m_t^+`` the cohort after the decision-time move at the start of the cycle,
    ``m_{t+1}`` at its end, ``u_t`` the reward per cycle), in present value at the model
    start.

    Parameters
    ----------
    method : str
        One of :data:`WITHIN_CYCLE_METHODS`:

        ``"start"``      start occupancy, discounted at the start: ``(d^t, 0)``;
        ``"end"``        end occupancy, discounted at the end: ``(0, d^{t+1})``;
        ``"trapezoid"``  each boundary at its own time, ``(d^t / 2, d^{t+1} / 2)``
                         (Elbasha & Chhatwal 2016, Med Decis Making 36(1):115-131);
        ``"half_cycle"`` the cycle-average occupancy ``(m_t + m_{t+1}) / 2`` discounted
                         once, at the end of the cycle: ``(d^{t+1} / 2, d^{t+1} / 2)``
                         (the textbook half-cycle correction; Sonnenberg & Beck 1993,
                         Med Decis Making 13(4):322-338; Siebert et al. 2012, Value
                         Health 15(6):812-820);
        ``"simpson"``    Simpson's 1/3 rule over pairs of cycles (3/8 rule on the last
                         three for an odd count), each boundary discounted at its own
                         time; a panel's inner boundary is split equally between the two
                         cycles it joins (Elbasha & Chhatwal 2016).
    n_cycles : int
        Number of cycles ``T`` (>= 1).
    discount : float
        Per-cycle discount factor ``d`` in (0, 1].

    Returns
    -------
    start, end : numpy.ndarray
        (T,) each. Without moves and with rewards constant over time, the sum of the two
        weights meeting at each boundary is the classic boundary weight (``"start"``:
        1, ..., 1, 0; ``"trapezoid"``: 1/2, 1, ..., 1, 1/2; Simpson: 1/3, 4/3, 2/3, ...).
    """
    if method not in WITHIN_CYCLE_METHODS:
        raise ValueError(
            f"within-cycle method {method!r} is unknown; expected one of {WITHIN_CYCLE_METHODS}"
        )
    if n_cycles < 1:
        raise ValueError(f"n_cycles must be >= 1, got {n_cycles}")
    at_start = discount ** np.arange(n_cycles, dtype=float)
    at_end = at_start * discount
    if method == "start":
        return at_start, np.zeros(n_cycles)
    if method == "end":
        return np.zeros(n_cycles), at_end
    if method == "trapezoid":
        return 0.5 * at_start, 0.5 * at_end
    if method == "half_cycle":
        return 0.5 * at_end, 0.5 * at_end
    start, end = _simpson_split(n_cycles)
    return start * at_start, end * at_end


def stationary_cycle_weights(method: str, discount: float) -> tuple[float, float]:
    """``(start, end)`` weights of cycle ``t`` divided by ``d^t`` (the same every cycle).

    For an infinite horizon: ``"start"`` (1, 0), ``"end"`` (0, d), ``"trapezoid"``
    (1/2, d/2), ``"half_cycle"`` (d/2, d/2) (see :func:`cycle_weights`). Simpson's rule
    pairs cycles, so it has no stationary form.
    """
    if method not in STATIONARY_METHODS:
        raise ValueError(
            f"within-cycle method {method!r} needs a finite horizon; expected one of "
            f"{STATIONARY_METHODS} for an infinite horizon"
        )
    start, end = cycle_weights(method, 1, discount)
    return float(start[0]), float(end[0])


def boundary_weights(method: str, n_cycles: int) -> np.ndarray:
    """(T + 1,) undiscounted weight of the occupancy at each boundary 0..T (no moves).

    The start weight of cycle ``t`` plus the end weight of cycle ``t - 1``: a summary of
    :func:`cycle_weights` for documentation and checks.
    """
    start, end = cycle_weights(method, n_cycles, 1.0)
    weights = np.zeros(n_cycles + 1)
    weights[:-1] += start
    weights[1:] += end
    return weights


def _simpson_split(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Undiscounted (start, end) weights per cycle of the composite Simpson rule."""
    start, end = np.zeros(n), np.zeros(n)
    if n == 1:  # a single interval: Simpson's rule is undefined, use the trapezoid
        return np.array([0.5]), np.array([0.5])
    even = n if n % 2 == 0 else n - 3
    for k in range(0, even, 2):  # 1/3 rule on cycles k, k + 1: boundary weights 1/3, 4/3, 1/3
        start[k], end[k] = 1.0 / 3.0, 2.0 / 3.0
        start[k + 1], end[k + 1] = 2.0 / 3.0, 1.0 / 3.0
    if n % 2 == 1:  # 3/8 rule on the last three cycles: 3/8, 9/8, 9/8, 3/8
        e = even
        start[e], end[e] = 3.0 / 8.0, 9.0 / 16.0
        start[e + 1], end[e + 1] = 9.0 / 16.0, 9.0 / 16.0
        start[e + 2], end[e + 2] = 9.0 / 16.0, 3.0 / 8.0
    return start, end
