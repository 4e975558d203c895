"""Sparse transitions for large state spaces with few moves per state (scipy.sparse).

Progressive models and tunnel states give transition rows with a handful of non-zeros
among thousands of states. For the base case and one-way analyses (a few draws) the
solvers then store ``P`` in compressed sparse rows (CSR) and:

* policy iteration solves ``(I - gamma P_pi) v = r_pi`` by back substitution when the
  policy moves only to the same or later states (progressive models), with a sparse LU
  (``scipy.sparse.linalg.spsolve``) otherwise, ``P_pi`` being the policy's rows of the
  CSR matrix;
* value iteration sweeps ``v <- max_a r + gamma P v`` with a sparse product;
* backward induction (finite horizon) computes each cycle's expectations
  ``sum_s' P_t(s'|s, a) (arrival_t(a, s') + V_{t+1}(s'))`` of every draw, action and state
  with one sparse product; transitions that do not vary with the cycle (time axis of
  length 1) are converted once, so a 60-cycle model holds one sparse copy, not 60;
  a model compiled in sparse rows (``CompiledModel.sparse_transition``: transitions that
  vary with the cycle, one pattern for every draw and cycle, never a dense array) is
  solved on those rows by the same compiled loop, each cycle reading its own values;
* the cohort trace and per-cycle flows of a finite-horizon policy
  (:func:`sparse_trace_and_flows`) move the cohort with the same sparse rows.

Stopping rules, the keep-the-current-action rule, the rewards
(:func:`caredecide.solvers.bellman.cycle_rewards`), the tie rule and the results are those
of :mod:`caredecide.solvers.stationary` and :mod:`caredecide.solvers.finite`.
:func:`choose_form` picks the form from the size and the density; the result's
``transition_form`` says which one was used.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from caredecide.compiled import ROW_SUM_TOLERANCE, CompiledModel, dense_transition
from caredecide.limits import SPARSE_MAX_DENSITY, SPARSE_MAX_DRAWS, SPARSE_MIN_STATES
from caredecide.objective import Objective
from caredecide.solvers import kernels
from caredecide.solvers.bellman import (
    SolverError,
    check_compiled,
    cycle_parts,
    cycle_rewards,
    decision_state_mask,
    greedy_choice,
    raise_bad_row,
    reward_arrays,
    weight_table,
)
from caredecide.solvers.finite import induction_outputs, induction_result
from caredecide.solvers.result import PolicyResult

TRANSITION_FORMS = ("auto", "dense", "sparse")
DENSITY_SAMPLE_ROWS = 256
"""Rows of the first draw whose non-zeros estimate the density (a full count would read
every transition once more just to choose the form)."""


def choose_form(transition: np.ndarray, requested: str) -> str:
    """``"dense"`` or ``"sparse"`` for transitions (D, Tp, A, S, S) and a requested form.

    ``"auto"``: sparse when there are at least :data:`SPARSE_MIN_STATES` states, at most
    :data:`SPARSE_MAX_DRAWS` draws, transitions that do not vary with the cycle
    (``Tp = 1``; converting one sparse copy per cycle costs as much as the dense solve)
    and a share of non-zeros of at most :data:`SPARSE_MAX_DENSITY` (counted on about
    :data:`DENSITY_SAMPLE_ROWS` evenly spread rows of the first draw).
    """
    if requested not in TRANSITION_FORMS:
        raise SolverError(
            f"transition_form = {requested!r} is not allowed; expected one of {TRANSITION_FORMS}"
        )
    if requested != "auto":
        return requested
    D, S = transition.shape[0], transition.shape[-1]
    if S < SPARSE_MIN_STATES or D > SPARSE_MAX_DRAWS or transition.shape[1] > 1:
        return "dense"
    rows = transition[0].reshape(-1, S)
    sample = rows[:: max(1, rows.shape[0] // DENSITY_SAMPLE_ROWS)]  # evenly spread rows
    density = np.count_nonzero(sample) / sample.size
    return "sparse" if density <= SPARSE_MAX_DENSITY else "dense"


def compiled_form(compiled: CompiledModel, requested: str) -> str:
    """:func:`choose_form` for a compiled model: ``"sparse"`` whenever the model was
    compiled in sparse rows (``compiled.sparse_transition``; "dense" is then refused).

    Raises
    ------
    SolverError
        ``requested`` unknown, or "dense" for a model compiled in sparse rows.
    """
    if compiled.sparse_transition is None:
        return choose_form(compiled.transition, requested)
    if requested not in TRANSITION_FORMS:
        return choose_form(compiled.transition, requested)  # raises, naming the choices
    if requested == "dense":
        raise SolverError(
            "transition_form = 'dense' is not available: the model was compiled in sparse "
            "rows (compile_model(..., transition_form='dense') builds the dense array); "
            "expected 'auto' or 'sparse'"
        )
    return "sparse"


def _held_or_given(compiled: CompiledModel, rows: Any) -> tuple[bool, Any]:
    """``(True, None)`` for a model compiled in sparse rows (their sums checked here),
    else ``(False, given_rows(compiled, rows))``."""
    if compiled.sparse_transition is not None:
        check_compiled(compiled)  # the rows' sums, over the sparse values
        return True, None
    return False, given_rows(compiled, rows)


def _kernel_rows(compiled: CompiledModel, rows: Any) -> tuple[Any, ...]:
    """``(indptr, indices, values (Dv, Tv, nnz), shared)`` for the sparse compiled loops:
    the compiled model's own sparse rows (one pattern for every draw and cycle), or the
    CSR rows (D A S, S) read from dense transitions constant over the cycles."""
    held = compiled.sparse_transition
    if held is not None:
        return held.indptr, held.indices, np.ascontiguousarray(held.values), True
    return rows.indptr, rows.indices, rows.data.reshape(1, 1, -1), False


def _checked_rows(compiled: CompiledModel, draws: slice | int, tp: int, block: bool):
    """CSR rows of the transitions of ``draws`` at time slice ``tp``, rows checked.

    ``block=False`` (one draw ``draws``): (A S, S), row ``a S + s``. ``block=True``:
    every draw and action of ``draws`` as a block-diagonal (K S, K S) matrix, K = draws x
    A (:func:`_block_rows`). Each row of an allowed (state, action) pair must sum to 1
    (the compiled-model check, done as the dense rows are read).

    Raises
    ------
    SolverError
        Naming the first row that does not.
    """
    P = dense_transition(compiled, "reading dense transitions into CSR")[draws, tp]
    S, A = compiled.n_states, compiled.n_actions
    rows = P.reshape(-1, S)
    checked = np.tile(np.asarray(compiled.allowed, dtype=bool).T.ravel(), rows.shape[0] // (A * S))
    bad = np.full(1, -1, dtype=np.int64)
    matrix = _csr(rows, S if block else 0, checked, bad)
    if bad[0] >= 0:
        first = (draws.start or 0) if isinstance(draws, slice) else draws
        d, a, s = np.unravel_index(int(bad[0]), (rows.shape[0] // (A * S), A, S))
        raise_bad_row(compiled, np.array([first + d, tp, a, s]))
    return matrix


def transition_rows(compiled: CompiledModel):
    """The checked CSR rows of transitions constant over the cycles, for a hand-off.

    Every draw's dense (A, S, S) transitions read once into compressed sparse rows
    (D A S, S), row ``(d A + a) S + s``, each allowed row checked to sum to 1 as it is
    read. The sparse backward induction returns them in ``PolicyResult.transition_rows``
    so that :func:`caredecide.evaluate.evaluate_policy` traces the optimal policy with
    the same rows instead of reading the dense arrays again (:func:`caredecide.batch.
    solve_and_evaluate` hands them over explicitly; nothing is cached).

    Raises
    ------
    SolverError
        Transitions that vary with the cycle (time axis longer than 1), or a row that
        does not sum to 1.
    """
    if compiled.transition.shape[1] != 1:
        raise SolverError(
            "sparse transition rows are read once only for transitions constant over the "
            f"cycles; the time axis has length {compiled.transition.shape[1]}"
        )
    return _checked_rows(compiled, slice(None), 0, block=False)


def given_rows(compiled: CompiledModel, rows: Any):
    """``rows`` (from :func:`transition_rows`) checked to fit ``compiled``; None passes.

    Raises
    ------
    SolverError
        Rows of another shape (another model or number of draws), or transitions that
        vary with the cycle.
    """
    if rows is None:
        return None
    D, S, A = compiled.n_draws, compiled.n_states, compiled.n_actions
    if compiled.transition.shape[1] != 1 or tuple(rows.shape) != (D * A * S, S):
        raise SolverError(
            f"transition_rows has shape {tuple(rows.shape)}; expected ({D * A * S}, {S}) "
            "(draws x actions x states, states) of transitions constant over the cycles, "
            "as read by solvers.sparse.transition_rows for this compiled model"
        )
    return rows


def _csr(rows: np.ndarray, block: int, checked=None, bad=None):
    """CSR form of dense rows (K, S); ``block > 0``: row ``k`` moved to the columns of
    block ``k // block`` (a block-diagonal matrix (K, K / block * S)). With ``checked``
    (K,) bool, the first checked row not summing to 1 goes in ``bad[0]``."""
    from scipy import sparse

    K, S = rows.shape
    width = S if block == 0 else (K // block) * S
    if checked is None:
        checked = np.zeros(K, dtype=bool)
    if bad is None:
        bad = np.full(1, -1, dtype=np.int64)
    if kernels.available():
        indptr, indices, data = kernels.sparse_kernels().csr_from_dense(
            np.ascontiguousarray(rows, dtype=float), block, checked, ROW_SUM_TOLERANCE, bad
        )
        return sparse.csr_array((data, indices, indptr), shape=(K, width))
    off = checked & ~(np.abs(rows.sum(axis=-1) - 1.0) <= ROW_SUM_TOLERANCE)
    if off.any():
        bad[0] = int(np.flatnonzero(off)[0])
    matrix = sparse.csr_array(rows)
    return matrix if block == 0 else _in_blocks(matrix, block)


def _in_blocks(matrix, block: int):
    """CSR rows (K, S) as the block-diagonal (K, K / block * S) matrix of :func:`_csr`."""
    from scipy import sparse

    K, S = matrix.shape
    per_block = np.add.reduceat(np.diff(matrix.indptr), np.arange(0, K, block))
    shift = np.repeat(np.arange(K // block, dtype=matrix.indices.dtype) * S, per_block)
    return sparse.csr_array(
        (matrix.data, matrix.indices + shift, matrix.indptr), shape=(K, (K // block) * S)
    )


def sparse_iterate(
    compiled: CompiledModel,
    objective: Objective,
    gamma: float,
    method: str,
    tolerance: float,
    relative: bool,
    max_iterations: int,
) -> tuple[int, np.ndarray, bool, np.ndarray, Any]:
    """Policy or value iteration with sparse transitions, draw by draw.

    The dense transitions are read once into checked CSR rows (:func:`transition_rows`,
    returned for the evaluation's hand-off); each draw's rewards per cycle
    ``R[a, s] = now[s, a] + sum_s' P[a, s, s'] arrival[a, s']``
    (:func:`caredecide.solvers.bellman.cycle_rewards`), its iterations and the action
    values of its final values all use the sparse rows.

    Parameters
    ----------
    compiled : CompiledModel
        Infinite horizon, stationary arrays.
    objective : Objective
    gamma, method, tolerance, relative, max_iterations
        As in :func:`caredecide.solvers.stationary.solve_stationary`.

    Returns
    -------
    iterations (largest over draws), residual (D,), converged (all draws), Q (D, S, A)
    the action values of the final values (``-inf`` where not allowed), and the CSR rows
    (D A S, S) read.
    """
    D, S, A = compiled.n_draws, compiled.n_states, compiled.n_actions
    now, arrival = cycle_rewards(compiled, objective, 0)  # (D, S, A), (D, A, S)
    not_allowed = ~np.asarray(compiled.allowed, dtype=bool).T  # (A, S)
    Q = np.empty((D, S, A))
    residual = np.empty(D)
    sweeps = np.zeros(D, dtype=int)
    done = np.zeros(D, dtype=bool)
    read = transition_rows(compiled)  # (D A S, S), every row checked as it is read
    for d in range(D):
        rows = read[d * A * S : (d + 1) * A * S]
        R = now[d].T.copy()
        if arrival[d].any():  # rewards on arrival: each action's rows times its own vector
            for a in range(A):
                R[a] += rows[a * S : (a + 1) * S] @ arrival[d, a]
        R[not_allowed] = -np.inf
        if method == "policy_iteration":
            v, sweeps[d], residual[d], done[d] = _policy_iteration(rows, R, gamma, max_iterations)
        else:
            v, sweeps[d], residual[d], done[d] = _value_iteration(
                rows, R, gamma, tolerance, relative, max_iterations
            )
        Q[d] = (R + gamma * (rows @ v).reshape(A, S)).T
    return int(sweeps.max(initial=0)), residual, bool(done.all()), Q, read


def _policy_values(rows, R: np.ndarray, gamma: float, policy: np.ndarray) -> np.ndarray:
    """Exact values (S,) of ``policy`` (S,): ``(I - gamma P_pi) v = r_pi``. Back
    substitution over the CSR rows when every move of the policy goes to the same or a
    later state (progressive models; compiled loops), a sparse LU otherwise."""
    from scipy import sparse
    from scipy.sparse.linalg import spsolve

    S = R.shape[1]
    chosen = policy * S + np.arange(S)
    target = R[policy, np.arange(S)]
    if kernels.available():
        v = np.empty(S)
        if kernels.sparse_kernels().upper_substitution(
            rows.indptr, rows.indices, rows.data, chosen, target, float(gamma), v
        ):
            return v
    system = sparse.eye_array(S, format="csc") - gamma * rows[chosen].tocsc()
    return np.asarray(spsolve(system, target), dtype=float)


def _policy_iteration(rows, R, gamma, max_iterations):
    A, S = R.shape
    policy = R.argmax(axis=0)
    for n in range(1, max_iterations + 1):
        v = _policy_values(rows, R, gamma, policy)
        Q = R + gamma * (rows @ v).reshape(A, S)
        best = Q.max(axis=0)
        current = Q[policy, np.arange(S)]
        slack = 1e-12 * np.maximum(np.abs(best), 1.0)
        improved = np.where(current >= best - slack, policy, Q.argmax(axis=0))
        if np.array_equal(improved, policy):
            return v, n, float(np.abs(best - v).max()), True
        policy = improved
    v = _policy_values(rows, R, gamma, policy)
    best = (R + gamma * (rows @ v).reshape(A, S)).max(axis=0)
    return v, max_iterations, float(np.abs(best - v).max()), False


def _value_iteration(rows, R, gamma, tolerance, relative, max_iterations):
    A, S = R.shape
    v = np.zeros(S)
    change = np.inf
    for n in range(1, max_iterations + 1):
        following = (R + gamma * (rows @ v).reshape(A, S)).max(axis=0)
        change = float(np.abs(following - v).max())
        v = following
        eps = tolerance * float(np.abs(v).max()) if relative else tolerance
        if change < eps * (1.0 - gamma) / (2.0 * gamma) or change == 0.0:
            return v, n, change, True
    return v, max_iterations, change, False


def _block_rows(P: np.ndarray):
    """CSR (K S, K S) holding the rows of ``K`` dense (S, S) matrices ``P`` (K, S, S).

    Row ``k S + s`` holds ``P[k, s]`` in the columns of block ``k`` (a block-diagonal
    matrix), so one product with the stacked vectors ``x`` (K S,) gives every
    ``P[k] @ x[k]``.
    """
    K, S = P.shape[0], P.shape[1]
    return _csr(P.reshape(K * S, S), block=S)


def sparse_backward_induction(
    compiled: CompiledModel,
    objective: Objective,
    terminal: np.ndarray,
    *,
    tie_absolute: float,
    tie_relative: float,
    rows: Any = None,
) -> PolicyResult:
    """Backward induction with the transitions in CSR form (Puterman 1994, section 4.5).

    Same recursion as :func:`caredecide.solvers.finite.backward_induction`::

        Q_t(s, a) = now_t(s, a) + sum_s' P_t(s'|s, a) (arrival_t(a, s') + V_{t+1}(s'))

    with transitions constant over the cycles: one compiled pass over each draw's cycles
    (the reward arithmetic of the dense loop, the expectation over each row's non-zeros);
    otherwise (or without the compiled loops) the expectations of all draws, actions and
    states of a cycle in one sparse product (:func:`_block_rows`), the sparse copy of a
    time slice of ``P`` made once and reused by every cycle it covers.

    Parameters
    ----------
    compiled : CompiledModel
        Finite horizon (``n_cycles`` = T).
    objective : Objective
    terminal : (D, S) float
        Terminal value in present value at the model start
        (:func:`caredecide.solvers.finite.terminal_present_value`).
    tie_absolute, tie_relative : float
        Tie tolerance on action gaps.
    rows : CSR (D A S, S), optional
        The transitions already read by :func:`transition_rows` (not read again); by
        default read here when they are constant over the cycles.

    Returns
    -------
    PolicyResult
        As backward induction's: ``policy`` (D, T, S), ``value`` (D, T + 1, S);
        ``transition_form = "sparse"``; ``transition_rows`` the CSR rows it read (None
        for transitions that vary with the cycle).
    """
    T = compiled.n_cycles
    if T is None:
        raise SolverError("backward induction needs a finite number of cycles (n_cycles)")
    D, S, A = compiled.n_draws, compiled.n_states, compiled.n_actions
    decision_states = decision_state_mask(compiled)
    outputs = induction_outputs(D, T, S, A)
    value, q_values, policy, gap, next_best, indifferent = outputs
    value[:, T] = terminal
    Tp = compiled.transition.shape[1]
    held, rows = _held_or_given(compiled, rows)
    if not held and rows is None and Tp == 1:
        rows = transition_rows(compiled)  # (D A S, S), read once for every cycle
    if (held or rows is not None) and kernels.available():  # one pass over each draw's cycles
        kernels.sparse_kernels().backward_induction(
            *_kernel_rows(compiled, rows), *reward_arrays(compiled),
            weight_table(compiled), float(objective.outcome_weight),
            float(objective.cost_weight), np.ascontiguousarray(compiled.allowed, dtype=bool),
            decision_states, float(tie_absolute), float(tie_relative),
            value, policy, indifferent, q_values, gap, next_best,
        )  # fmt: skip
    else:  # numpy: one sparse product per cycle for every draw and action
        not_allowed = ~np.asarray(compiled.allowed, dtype=bool)
        blocks: dict[int, Any] = {}  # time slice -> CSR of every draw and action
        for t in range(T - 1, -1, -1):
            tp = min(t, Tp - 1)
            if tp not in blocks:
                blocks = {tp: _block_slice(compiled, rows, tp)}
            now, arrival = cycle_rewards(compiled, objective, t)  # (D, S, A), (D, A, S)
            following = (arrival + value[:, t + 1, None, :]).reshape(D * A * S)
            expected = (blocks[tp] @ following).reshape(D, A, S)
            Q = q_values[:, t]
            np.add(now, expected.transpose(0, 2, 1), out=Q)
            Q[:, not_allowed] = -np.inf
            choice = greedy_choice(Q, decision_states, tie_absolute, tie_relative)
            policy[:, t], value[:, t], gap[:, t], next_best[:, t], indifferent[:, t] = choice
    return induction_result(
        compiled,
        objective,
        outputs,
        decision_states,
        history=None,
        form="sparse transitions",
        transition_form="sparse",
        transition_rows=rows,
    )


def _block_slice(compiled: CompiledModel, rows: Any, tp: int):
    """Block-diagonal CSR of every draw and action at time slice ``tp`` (:func:`_block_rows`
    layout): from the compiled model's sparse rows, from the rows already read when
    given, else read (and checked) here."""
    held = compiled.sparse_transition
    if held is not None:
        from scipy import sparse

        D, S, A = compiled.n_draws, compiled.n_states, compiled.n_actions
        nnz = held.indices.size
        counts = np.diff(held.indptr)  # (A S,)
        action = np.repeat(np.arange(A * S), counts) // S  # (nnz,) action of each slot
        columns = held.indices + action * S  # action a's rows in block a
        shift = np.repeat(np.arange(D) * A * S, nnz)  # draw d's blocks after the others
        indptr = np.concatenate([[0], np.cumsum(np.tile(counts, D))])
        return sparse.csr_array(
            (held.values[:, tp].ravel(), np.tile(columns, D) + shift, indptr),
            shape=(D * A * S, D * A * S),
        )
    if rows is None:
        return _checked_rows(compiled, slice(None), tp, block=True)
    return _in_blocks(rows, compiled.n_states)


def sparse_trace_and_flows(
    compiled: CompiledModel, policy: np.ndarray, quantities: tuple[str, ...], rows: Any = None
) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Cohort trace and per-cycle flows of a finite-horizon policy, transitions in CSR.

    The same quantities as the dense evaluation in :mod:`caredecide.evaluate`:
    ``m_{t+1} = m_t P_t[policy_t]`` and ``flow_t = sum_s m_t(s) (at_decision_t(s, a) +
    sum_s' P_t(s'|s, a) on_arrival_t(a, s'))`` with ``a = policy_t(s)`` and the parts of
    :func:`caredecide.solvers.bellman.cycle_parts`. The cohort moves by one product with
    the transposed sparse matrix of every draw and action (the mass of ``s`` placed in the
    row of its chosen action); the expected arrival rewards of every action by one sparse
    product per cycle. With transitions constant over the cycles (and the quantities of
    :mod:`caredecide.evaluate`), one compiled pass over each draw's cycles instead.

    Parameters
    ----------
    compiled : CompiledModel
        Finite horizon (``n_cycles`` = T).
    policy : (D, Tpi, S) int
        Tpi = T, or 1 (the same every cycle).
    quantities : tuple of str
        Keys of ``cycle_parts(..., life_years=True)`` to total, e.g. ("life_years",
        "qalys", "costs").
    rows : CSR (D A S, S), optional
        The transitions already read by :func:`transition_rows` (e.g. the solver's
        ``PolicyResult.transition_rows``): used as they are, not read again.

    Returns
    -------
    trace : (D, T + 1, S) float
        Share of the cohort in each state at each boundary.
    flows : dict of str to (D, T + 1) float
        For each quantity, discounted (key ``name``) and undiscounted (``name +
        "_undiscounted"``) per cycle; the last entry 0.
    """
    T = compiled.n_cycles
    if T is None:
        raise SolverError("the sparse cohort trace is for a finite horizon (n_cycles)")
    D, S, A = compiled.n_draws, compiled.n_states, compiled.n_actions
    names = [f"{n}{suffix}" for suffix in ("", "_undiscounted") for n in quantities]
    held, rows = _held_or_given(compiled, rows)
    if (
        (held or compiled.transition.shape[1] == 1)
        and kernels.available()
        and tuple(quantities) == ("life_years", "qalys", "costs")
    ):  # one compiled pass over each draw's cycles, the chosen rows' non-zeros only
        if rows is None and not held:
            rows = transition_rows(compiled)  # (D A S, S)
        weights = np.concatenate(
            np.broadcast_arrays(weight_table(compiled), weight_table(compiled, discount=False)),
            axis=-1,
        )
        trace = np.empty((D, T + 1, S))
        flow = np.zeros((6, D, T + 1))
        kernels.sparse_kernels().trace_and_flows(
            *_kernel_rows(compiled, rows), *reward_arrays(compiled),
            np.ascontiguousarray(compiled.life_years, dtype=float), np.ascontiguousarray(weights),
            np.ascontiguousarray(policy, dtype=np.intp),
            np.ascontiguousarray(compiled.start_distribution, dtype=float), trace, flow,
        )  # fmt: skip
        return trace, dict(zip(names, flow, strict=True))
    flows = {name: np.zeros((D, T + 1)) for name in names}
    trace = np.empty((D, T + 1, S))
    trace[:, 0] = compiled.start_distribution
    Tp, Tpi = compiled.transition.shape[1], policy.shape[1]
    blocks: dict[int, tuple[Any, Any]] = {}  # time slice -> (CSR, its transpose)
    draw, state = np.arange(D)[:, None], np.arange(S)[None, :]
    placed = np.zeros((D, A, S))
    for t in range(T):
        tp = min(t, Tp - 1)
        if tp not in blocks:
            block = _block_slice(compiled, rows, tp)
            blocks = {tp: (block, block.T.tocsr())}
        block, moved = blocks[tp]
        chosen = policy[:, min(t, Tpi - 1)]  # (D, S)
        m = trace[:, t]
        both = [cycle_parts(compiled, t, discount, life_years=True) for discount in (True, False)]
        parts = [by_name[name] for by_name in both for name in quantities]
        arrival = np.stack([p[1].reshape(D * A * S) for p in parts], axis=1)  # (D A S, K)
        expected = (block @ arrival).reshape(D, A, S, len(parts))[draw, chosen, state]
        for k, name in enumerate(names):
            at_decision = np.broadcast_to(parts[k][0], (D, S, A))[draw, state, chosen]
            flows[name][:, t] = np.einsum("ds,ds->d", m, at_decision + expected[..., k])
        placed[:] = 0.0
        placed[draw, chosen, state] = m
        trace[:, t + 1] = (moved @ placed.reshape(D * A * S)).reshape(D, A, S).sum(axis=1)
    return trace, flows
