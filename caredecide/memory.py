"""Peak working memory of compiling, solving and evaluating a model: one estimate.

Every guard and every chunk size uses :func:`pipeline_peak_bytes`, so a run refused
here would have failed, and a run let through stays within its budget. The estimate
counts the arrays the compiler (:mod:`caredecide.compile`), the solvers
(:mod:`caredecide.solvers`) and policy evaluation (:mod:`caredecide.evaluate`) hold at
their peaks, temporaries included, in bytes of float64 (8), intp (8) and bool (1):

* compile: the compiled arrays plus the largest temporary: the expression stacks, a
  block of row sums in the final check, one moved row, or for rate rows the generators and the
  exponential's work arrays (``RATE_WORK_COPIES`` copies of the generator stack with the
  compiled loop, ``RATE_WORK_COPIES_NUMPY`` without; at most ``EXPONENTIAL_BLOCK``
  matrices at once, and the rate rows of every (draw, cycle): the worst case, when no two
  columns of rates are equal and no common exit is factored out);
* solve: the compiled arrays held, plus the results: values (D, T+1, S), Q-values
  (D, T, S, A), policy, gap, next-best action (intp) and ties (bool) per (D, T, S); an
  infinite horizon holds (D, S, S) systems and (D, S, A) sweeps instead (CSR rows of every
  draw in the sparse form, :func:`stationary_sparse`);
* evaluate: the cohort trace (D, T+1, S) (up to ``DISPLAY_CAP + 1`` rows for an infinite
  horizon) and the (D, S, S) linear systems of the totals (copies of the policy's CSR
  rows in the sparse form).

Transitions compiled in sparse rows (``PipelineShape.sparse_entries`` > 0; the form
:func:`caredecide.compile.choose_transition_form` picks) count their values (D, Tp, nnz)
instead of the dense array, the row sums checked before solving and evaluating, the
pattern's keys and, for rate rows, the dense block of the states in play.

The pipeline peak is the largest of the three stages. The coefficients were measured with
:mod:`tracemalloc` (``tests/test_memory.py`` checks the estimate against the measured peak
within 25% over a grid of shapes).
"""

from __future__ import annotations

from dataclasses import dataclass

from caredecide.compiled import CHECK_BLOCK_ROWS
from caredecide.errors import ModelTooLargeError
from caredecide.limits import DISPLAY_CAP, SPARSE_MAX_DENSITY, SPARSE_MAX_DRAWS, SPARSE_MIN_STATES
from caredecide.rate_rows import EXPONENTIAL_BLOCK

FLOAT = 8
RATE_WORK_COPIES = 3.2
"""Generator-stack copies alive at the peak of the rate rows' matrix exponential with the
compiled loop (one matrix at a time): the generators, their contiguous block, the result
and the selected rows; measured 3.1-3.5."""
RATE_WORK_COPIES_NUMPY = 9.3
"""The same for the batched numpy path (``CAREDECIDE_KERNELS=numpy``): Pade powers,
numerator, denominator and squaring buffers for every matrix at once; measured 9.2-9.4
on the test grid (lower when the norms split the stack into groups of different
degrees)."""
STACK_COPIES = 2
"""Copies of an expression stack (n_entries, D, T) alive at once (values, check masks,
the moved copy scattered into the arrays)."""
ROW_SUM_BYTES = FLOAT + 3
"""Bytes per transition row while the compiled model's check sums a block of rows (the
sum and three masks)."""
MOVE_ROW_COPIES = 2
"""(D, Tp, S) arrays alive while a moved row is built (the row, one product)."""
SPARSE_ROW_SUM_BYTES = 3 * FLOAT
"""Bytes per transition row while sparse rows are summed (the sums, their distance from
1, the mask)."""
SPARSE_STACK_COPIES = 1.25
"""Copies of an expression stack alive while sparse rows are filled (the values go
straight into their slots; the check masks)."""
SPARSE_KEY_COPIES = 4
"""int64 copies of the sparse pattern's keys alive while it is built (the parts, their
sorted copy, the columns and the rows' positions)."""
ENTRY_OBJECT_BYTES = 1250
"""Python objects of one parsed expression and its bookkeeping (measured about 1.5 KB),
alive while compiling: they matter for models with thousands of entries."""
BASE_BYTES = 128 * 1024
"""Fixed working memory of a pass (variables, small arrays, messages)."""
INFINITE_SYSTEM_COPIES = 3
"""(D, S, S) matrices a policy-iteration step or an infinite-horizon total holds at once
(policy transitions, the system matrix, its factorisation)."""
CSR_ENTRY_BYTES = FLOAT + 8
"""Bytes of one non-zero of a CSR matrix (its value and int64 column)."""
SPARSE_CHAIN_COPIES = 4
"""Copies of the policy's CSR rows an infinite-horizon evaluation in sparse form holds
(the rows, the transposed block matrix, the system and its sparse LU)."""


@dataclass(frozen=True)
class PipelineShape:
    """Sizes that decide the memory of one compile -> solve -> evaluate pass.

    Attributes
    ----------
    n_draws, n_states, n_actions : int
        ``D``, ``S`` (flat states, after expansion), ``A``.
    transition_cycles, occupancy_cycles, decision_cycles : int
        ``Tp``, ``Tq``, ``Td``: time-axis lengths of the compiled arrays (1 = stationary).
    n_cycles : int or None
        Horizon in cycles (None = infinite).
    n_entries : int
        Expressions filling the transition arrays (probabilities, remainders, rates).
    rate_actions, rate_states : int
        Actions with rate rows and states entering their generators (0 without rates).
    rate_rows : int
        Rows given by rates.
    move_rows : int
        (action, state) rows with a decision-time move (0 without moves).
    state_action_cycles : int
        Time-axis length of the costs and QALYs of a state under an action (0: none).
    sparse_entries : int
        Slots of the sparse rows (:class:`caredecide.compiled.SparseTransitions`: cells of
        the pattern, every action) when the transitions are compiled in sparse form; 0:
        the dense (D, Tp, A, S, S) array.
    """

    n_draws: int
    n_states: int
    n_actions: int
    transition_cycles: int
    occupancy_cycles: int
    decision_cycles: int
    n_cycles: int | None
    n_entries: int
    rate_actions: int = 0
    rate_states: int = 0
    rate_rows: int = 0
    move_rows: int = 0
    state_action_cycles: int = 0
    sparse_entries: int = 0

    def with_draws(self, n_draws: int) -> PipelineShape:
        """The same shape for ``n_draws`` parameter sets."""
        from dataclasses import replace

        return replace(self, n_draws=int(n_draws))


def compiled_bytes(shape: PipelineShape) -> int:
    """Bytes of the compiled arrays (held from compile to the end of the pass)."""
    D, S, A = shape.n_draws, shape.n_states, shape.n_actions
    tq, td = shape.occupancy_cycles, shape.decision_cycles
    held = FLOAT * D * (2 * tq * S + 2 * td * S * A) + transition_bytes(shape)
    if shape.move_rows:  # the moves, kept for one cycle when no cycle differs (the usual case)
        held += FLOAT * D * A * S * S
    return held + FLOAT * D * 2 * shape.state_action_cycles * S * A


def transition_bytes(shape: PipelineShape) -> int:
    """Bytes of the compiled transitions: the dense (D, Tp, A, S, S) array, or the sparse
    rows' values (D, Tp, nnz), column indices (nnz,) and row pointers (A S + 1,)."""
    D, S, A, tp = shape.n_draws, shape.n_states, shape.n_actions, shape.transition_cycles
    if shape.sparse_entries:
        nnz = shape.sparse_entries
        return FLOAT * (D * tp * nnz + nnz + A * S + 1)
    return FLOAT * D * tp * A * S * S


def compile_peak_bytes(shape: PipelineShape) -> int:
    """Peak bytes while compiling: the arrays plus the largest of the compiler's
    temporaries (expression stacks, the row sums of the final check, the rate rows'
    exponentials, one moved row at a time)."""
    D, S, A, tp = shape.n_draws, shape.n_states, shape.n_actions, shape.transition_cycles
    per_cycle = max(STACK_COPIES * shape.n_entries, MOVE_ROW_COPIES * S if shape.move_rows else 0)
    row_sums = ROW_SUM_BYTES * min(D * tp * A * S, CHECK_BLOCK_ROWS)  # a block at a time
    if shape.sparse_entries:
        # Sparse rows: all row sums at once (the check and the compiler's), the values
        # before the moves beside those after them, the pattern's keys being sorted.
        row_sums = SPARSE_ROW_SUM_BYTES * D * tp * A * S
        per_cycle = max(
            int(SPARSE_STACK_COPIES * shape.n_entries),
            MOVE_ROW_COPIES * S if shape.move_rows else 0,
        )
        if shape.move_rows:
            per_cycle = max(per_cycle, shape.sparse_entries)
        per_cycle = max(per_cycle, SPARSE_KEY_COPIES * shape.sparse_entries // max(D * tp, 1))
    temporaries = max(FLOAT * D * tp * per_cycle, row_sums)
    if shape.rate_actions:
        # Worst case: no two (draw, cycle) columns of rates alike and no common exit;
        # generators are exponentiated EXPONENTIAL_BLOCK at a time, the rate rows of
        # every column kept.
        K = shape.rate_states
        columns = D * tp
        at_once = min(columns, EXPONENTIAL_BLOCK)
        from caredecide import jit

        copies = RATE_WORK_COPIES if jit.available() else RATE_WORK_COPIES_NUMPY
        generators = FLOAT * at_once * shape.rate_actions * K * K
        kept_rows = FLOAT * (columns - at_once) * shape.rate_rows * K
        # Sparse rows: the rate rows are exponentiated into a dense block of the states
        # in play, (D, Tp, A, K, K), then copied into their slots.
        block = FLOAT * columns * A * K * K if shape.sparse_entries else 0
        temporaries = max(temporaries, int(copies * generators) + kept_rows + block)
    objects = ENTRY_OBJECT_BYTES * (shape.n_entries + 2 * S + 3 * A)
    return compiled_bytes(shape) + temporaries + objects


def results_bytes(shape: PipelineShape) -> int:
    """Bytes of the solver's results (values, Q-values, policy, gaps, ties)."""
    D, S, A = shape.n_draws, shape.n_states, shape.n_actions
    if shape.n_cycles is None:
        return FLOAT * D * S * (A + 5)
    T = shape.n_cycles
    return FLOAT * D * (T + 1) * S + D * T * S * (FLOAT * A + 3 * FLOAT + 1)


def stationary_sparse(shape: PipelineShape) -> bool:
    """An infinite horizon that policy and value iteration and the evaluation hold in CSR
    rows: the "auto" choice of :func:`caredecide.solvers.sparse.choose_form` (large, few
    draws, transitions constant over the cycles, few non-zeros), the density estimated
    from the transition entries (:func:`_nonzeros`)."""
    S, A = shape.n_states, shape.n_actions
    return (
        shape.n_cycles is None
        and S >= SPARSE_MIN_STATES
        and shape.n_draws <= SPARSE_MAX_DRAWS
        and shape.transition_cycles == 1
        and _nonzeros(shape) <= SPARSE_MAX_DENSITY * A * S * S
    )


def _nonzeros(shape: PipelineShape) -> int:
    """Non-zero transitions of one draw, at most: one per entry and a remainder per row,
    and a row given by rates (a matrix exponential) may reach every state of its
    generator (the dense side: the estimate then keeps the dense form)."""
    S, A = shape.n_states, shape.n_actions
    rates = shape.rate_rows * shape.rate_states
    return min(shape.n_entries + A * S + rates, A * S * S)


def solve_work_bytes(shape: PipelineShape) -> int:
    """Bytes the solver holds besides its results (infinite horizon: linear systems, or
    the CSR rows of every draw in the sparse form)."""
    D, S, A = shape.n_draws, shape.n_states, shape.n_actions
    if shape.n_cycles is None and stationary_sparse(shape):
        return D * (CSR_ENTRY_BYTES * _nonzeros(shape) + FLOAT * 4 * S * A)
    if shape.n_cycles is None:
        return FLOAT * D * (INFINITE_SYSTEM_COPIES * S * S + 4 * S * A)
    return FLOAT * D * S * (A + 2) + sparse_check_bytes(shape)  # a cycle's expectation, choice


def sparse_check_bytes(shape: PipelineShape) -> int:
    """Bytes of the row sums the sparse paths check before solving or evaluating (0 for
    dense transitions, whose loops check the rows as they read them)."""
    if not shape.sparse_entries:
        return 0
    return (
        SPARSE_ROW_SUM_BYTES
        * shape.n_draws
        * shape.transition_cycles
        * shape.n_actions
        * (shape.n_states)
    )


def evaluate_bytes(shape: PipelineShape) -> int:
    """Bytes of one policy evaluation: cohort trace, flows and (infinite) linear systems."""
    D, S = shape.n_draws, shape.n_states
    if shape.n_cycles is None:
        # The display trace grows row by row until the cohort is absorbed or the cap is
        # reached (the worst case counted), then is stacked: two copies at the peak.
        rows = DISPLAY_CAP + 1
        if stationary_sparse(shape):  # the rows read, copies of the policy's rows
            read = CSR_ENTRY_BYTES * _nonzeros(shape)
            chain = SPARSE_CHAIN_COPIES * read // shape.n_actions
            return FLOAT * D * rows * (2 * S + 6) + D * (read + chain)
        return FLOAT * D * (rows * (2 * S + 6) + INFINITE_SYSTEM_COPIES * S * S)
    # The trace, six flow series and the policy as int32 (the compiled loop's copy).
    trace = FLOAT * D * (shape.n_cycles + 1) * (S + 6) + 4 * D * shape.n_cycles * S
    return trace + sparse_check_bytes(shape)


def pipeline_peak_bytes(shape: PipelineShape) -> int:
    """Peak bytes of compile -> solve -> evaluate: the largest stage (see module doc)."""
    held = compiled_bytes(shape)
    return BASE_BYTES + max(
        compile_peak_bytes(shape),
        held + results_bytes(shape) + solve_work_bytes(shape),
        held + results_bytes(shape) + evaluate_bytes(shape),
    )


def shape_of(
    model, n_draws: int = 1, *, transition_form: str = "auto", limit: int | None = None
) -> PipelineShape:
    """The :class:`PipelineShape` of a (validated) model for ``n_draws`` parameter sets.

    Reads the structure only (expressions are parsed, never evaluated). The transitions
    count in the form :func:`caredecide.compile.compile_model` would pick for
    ``transition_form`` and a memory budget of ``limit`` bytes (default: the default
    budget), so the estimate is that of the pass compile would run.
    """
    import numpy as np

    from caredecide.compile import _allowed_matrix, choose_transition_form, parse_model_expressions
    from caredecide.expand import expand_model
    from caredecide.limits import default_memory_limit

    flat = expand_model(model)
    parsed = parse_model_expressions(flat)
    absorbing = np.array([s.absorbing for s in flat.states], dtype=bool)
    shape, _ = choose_transition_form(
        flat,
        parsed,
        n_draws,
        _allowed_matrix(flat, absorbing),
        absorbing,
        default_memory_limit() if limit is None else int(limit),
        transition_form,
    )
    return shape


def shape_from_parsed(flat_model, parsed, n_draws: int) -> PipelineShape:
    """The shape of an expanded model whose expressions are parsed
    (:func:`caredecide.compile.parse_model_expressions`)."""
    from caredecide.compile import _time_lengths

    tp, tq, td = _time_lengths(flat_model, parsed)
    rate_actions = {e.action for e in parsed.rates}
    rate_states = {e.state for e in parsed.rates} | {e.target for e in parsed.rates}
    return PipelineShape(
        n_draws=int(n_draws),
        n_states=len(flat_model.states),
        n_actions=len(flat_model.actions),
        transition_cycles=tp,
        occupancy_cycles=tq,
        decision_cycles=td,
        n_cycles=flat_model.n_cycles(),
        n_entries=len(parsed.transitions) + len(parsed.rests) + len(parsed.rates),
        rate_actions=len(rate_actions),
        rate_states=len(rate_states),
        rate_rows=len({(e.action, e.state) for e in parsed.rates}),
        move_rows=len({(e.action, e.state) for e in [*parsed.moves, *parsed.move_rests]}),
        state_action_cycles=(
            0
            if not (parsed.under_cost or parsed.under_qaly)
            else (flat_model.n_cycles() or 1)
            if parsed.under_action_uses_time
            else 1
        ),
    )


def draw_bytes(shape: PipelineShape) -> int:
    """Peak bytes one more draw adds to a pass (the estimate is linear in ``D`` beyond
    a fixed part: expression objects and small working arrays, counted once)."""
    # Counted beyond SPARSE_MAX_DRAWS, where every form is dense: a chunk of many draws
    # never gets the sparse form's smaller per-draw memory.
    one = pipeline_peak_bytes(shape.with_draws(SPARSE_MAX_DRAWS + 1))
    return max(pipeline_peak_bytes(shape.with_draws(SPARSE_MAX_DRAWS + 2)) - one, 1)


def gib(n_bytes: float) -> str:
    """Bytes as GiB (or MiB below 1 GiB) with one decimal, for messages."""
    if n_bytes >= 1024**3:
        return f"{n_bytes / 1024**3:,.1f} GiB"
    return f"{n_bytes / 1024**2:,.1f} MiB"


def check_fits(shape: PipelineShape, limit: int, *, file: str, advice: str = "") -> int:
    """Refuse (``ModelTooLargeError``) a pass whose peak estimate exceeds ``limit`` bytes.

    Returns the estimate. The message names the file, the estimate, the budget, the
    sizes behind them and what to change.
    """
    needed = pipeline_peak_bytes(shape)
    if needed > limit:
        horizon = "an infinite horizon" if shape.n_cycles is None else f"{shape.n_cycles:,} cycles"
        if not advice:
            one = pipeline_peak_bytes(shape.with_draws(1))
            per_draw = draw_bytes(shape)
            if shape.n_draws > 1 and one <= limit:
                fitting = max(1, (limit - (one - per_draw)) // per_draw)
                advice = f"Use at most {fitting:,} parameter sets at once."
            elif shape.n_cycles is not None and shape.n_cycles > 1:
                advice = (
                    "Even one parameter set does not fit: shorten the horizon "
                    "(settings.horizon_cycles or settings.until_age), lengthen "
                    "settings.cycle_years, or use fewer states."
                )
            else:
                advice = "Even one parameter set does not fit: use fewer states or actions."
        raise ModelTooLargeError(
            f"{file}: {shape.n_draws:,} parameter set(s) of {shape.n_states:,} states, "
            f"{shape.n_actions} actions and {horizon} need an estimated {gib(needed)} "
            f"({needed:,} bytes) of memory at the peak (compile, solve, evaluate); the "
            f"budget is {gib(limit)} ({limit:,} bytes). {advice}"
        )
    return needed
