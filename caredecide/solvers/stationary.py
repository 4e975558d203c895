"""Infinite horizon, stationary arrays: value, policy and modified policy iteration.

With one per-cycle discount factor ``gamma`` (the QALY objective, or equal rates for
outcomes and costs) the Bellman operator is (Puterman 1994, chapter 6)::

    (T v)(s) = max over allowed a of r(s, a) + gamma sum_s' P(s'|s, a) v(s')
    r(s, a)  = now(s, a) + sum_s' P(s'|s, a) arrival(a, s')

* value iteration stops when ``||v_{n+1} - v_n|| < eps (1 - gamma) / (2 gamma)``; then the
  greedy policy is eps-optimal and ``||v_{n+1} - v*|| <= gamma ||v_{n+1} - v_n|| / (1 - gamma)
  < eps / 2`` (Theorem 6.3.1, from memory);
* policy iteration evaluates each policy exactly by a batched linear solve of
  ``(I - gamma P_pi) v = r_pi`` (``numpy.linalg.solve`` on (D, S, S); the compiled loops
  solve each draw by substitution when the policy's moves form no cycle, else by LU)
  and stops when the policy no longer changes (Theorem 6.4.2);
* modified policy iteration replaces the exact evaluation by ``m`` sweeps of
  ``v <- r_pi + gamma P_pi v`` (section 6.5; ``m = 0`` is value iteration), starting from
  ``v_0 = min r / (1 - gamma)`` so that ``T v_0 >= v_0``, with the same stopping rule.

``eps`` is ``tolerance`` times the largest |value| of each draw when ``relative`` (values
in money are large), else ``tolerance``. Iteration continues until every draw meets it.

Rewards per cycle (:func:`caredecide.solvers.bellman.cycle_rewards` at ``t = 0``): one-off
charges and the start occupancy after the decision-time move (``now``), plus the end
occupancy (``arrival``) weighted by the within-cycle method's stationary weights
(:func:`caredecide.compiled.stationary_cycle_weights`). Simpson's rule pairs cycles and
needs a finite horizon.
"""

from __future__ import annotations

import numpy as np

from caredecide.compiled import ROW_SUM_TOLERANCE, STATIONARY_METHODS, CompiledModel
from caredecide.objective import Objective
from caredecide.solvers import kernels
from caredecide.solvers.bellman import (
    SolverError,
    check_compiled,
    cycle_rewards,
    decision_state_mask,
    greedy_choice,
    kernel_arrays,
    raise_bad_row,
    stationary_discount,
    stationary_weights,
)
from caredecide.solvers.result import PolicyResult, SweepRecord, build_result
from caredecide.solvers.sparse import choose_form, sparse_iterate


def check_stationary(compiled: CompiledModel) -> None:
    """Refuse a model the infinite-horizon solvers cannot take.

    Raises
    ------
    SolverError
        A finite horizon, arrays that vary with the cycle, or a within-cycle method
        without a stationary form.
    """
    if compiled.n_cycles is not None:
        raise SolverError(
            f"this solver is for an infinite horizon; the model has n_cycles = "
            f"{compiled.n_cycles} (use backward induction)"
        )
    if not compiled.is_stationary:
        raise SolverError(
            "an infinite horizon needs stationary arrays (time axis of length 1); "
            "the compiled arrays vary with the cycle"
        )
    if compiled.within_cycle not in STATIONARY_METHODS:
        raise SolverError(
            f"within-cycle method {compiled.within_cycle!r} needs a finite horizon; "
            f"expected one of {STATIONARY_METHODS} for an infinite horizon"
        )


class StationaryProblem:
    """Arrays of an infinite-horizon problem laid out for fast Bellman sweeps.

    Attributes
    ----------
    gamma : float
        Per-cycle discount factor.
    P : (D, A * S, S) float
        Transition rows stacked by (action, state).
    R : (D, A, S) float
        Reward per cycle of taking ``a`` in ``s`` (present value at the cycle's start);
        ``-inf`` where not allowed.
    """

    def __init__(self, compiled: CompiledModel, objective: Objective):
        check_stationary(compiled)
        self.gamma = stationary_discount(compiled, objective)
        D, S, A = compiled.n_draws, compiled.n_states, compiled.n_actions
        self.shape = (D, A, S)
        # Rewards of one cycle at its start: present values are d^t times these.
        now, arrival = cycle_rewards(compiled, objective, 0)
        P = compiled.transition[:, 0]  # (D, A, S, S)
        R = now.transpose(0, 2, 1) + (P @ arrival[..., None])[..., 0]
        R[:, ~compiled.allowed.T] = -np.inf
        self.R = np.ascontiguousarray(R)
        self.P = np.ascontiguousarray(P).reshape(D, A * S, S)
        self._buffer = np.empty((D, A * S, 1))

    def action_values(self, v: np.ndarray) -> np.ndarray:
        """(D, A, S) ``r + gamma P v`` for values ``v`` (D, S). Reuses an internal buffer."""
        np.matmul(self.P, v[..., None], out=self._buffer)
        Q = self._buffer.reshape(self.shape)
        Q *= self.gamma
        Q += self.R
        return Q

    def policy_arrays(self, policy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(D, S, S) transition matrix and (D, S) reward of a policy (D, S)."""
        D, A, S = self.shape
        rows = policy * S + np.arange(S)  # row index of (action, state) in P
        P_pi = np.take_along_axis(self.P, rows[..., None], axis=1)
        r_pi = np.take_along_axis(self.R.reshape(D, A * S), rows, axis=1)
        return P_pi, r_pi

    def evaluate(self, policy: np.ndarray) -> np.ndarray:
        """(D, S) exact value of a policy by a batched linear solve."""
        P_pi, r_pi = self.policy_arrays(policy)
        system = np.eye(P_pi.shape[-1]) - self.gamma * P_pi
        return np.linalg.solve(system, r_pi[..., None])[..., 0]

    def bound(self, residual: np.ndarray) -> np.ndarray:
        """(D,) bound ``gamma * residual / (1 - gamma)`` on the distance from ``v*``."""
        return self.gamma * residual / (1.0 - self.gamma)

    def threshold(self, v: np.ndarray, tolerance: float, relative: bool) -> np.ndarray:
        """(D,) stopping threshold on ``||v_{n+1} - v_n||``: ``eps (1 - gamma) / (2 gamma)``."""
        eps = tolerance * np.abs(v).max(axis=-1) if relative else np.full(v.shape[0], tolerance)
        return eps * (1.0 - self.gamma) / (2.0 * self.gamma)


def _converged(residual: np.ndarray, threshold: np.ndarray) -> bool:
    # residual == 0 stops too (a zero threshold when every value is 0 with a relative tolerance)
    return bool(np.all((residual < threshold) | (residual == 0.0)))


def _record(history, sweep, v, Q, residual, bound) -> None:
    if history is not None:
        history.append(
            SweepRecord(
                sweep=sweep,
                cycle=None,
                value=v.copy(),
                policy=Q.argmax(axis=1),
                residual=residual.copy(),
                error_bound=bound.copy(),
                q_values=Q.transpose(0, 2, 1).copy(),
            )
        )


def value_iteration(
    problem: StationaryProblem,
    *,
    tolerance: float,
    relative: bool,
    max_iterations: int,
    history: list | None,
) -> tuple[np.ndarray, int, np.ndarray, bool]:
    """Value iteration from ``v_0 = 0``; returns (v, iterations, residual (D,), converged)."""
    D, _, S = problem.shape
    return _improve_and_evaluate(
        problem,
        np.zeros((D, S)),
        tolerance=tolerance,
        relative=relative,
        max_iterations=max_iterations,
        evaluation_sweeps=0,
        history=history,
    )


def modified_policy_iteration(
    problem: StationaryProblem,
    *,
    tolerance: float,
    relative: bool,
    max_iterations: int,
    evaluation_sweeps: int,
    history: list | None,
) -> tuple[np.ndarray, int, np.ndarray, bool]:
    """Modified policy iteration from ``v_0 = min r / (1 - gamma)`` (so ``T v_0 >= v_0``)."""
    D, _, S = problem.shape
    finite_R = np.where(np.isfinite(problem.R), problem.R, np.inf)
    v0 = np.broadcast_to(finite_R.min(axis=(1, 2))[:, None] / (1.0 - problem.gamma), (D, S))
    return _improve_and_evaluate(
        problem,
        v0.copy(),
        tolerance=tolerance,
        relative=relative,
        max_iterations=max_iterations,
        evaluation_sweeps=evaluation_sweeps,
        history=history,
    )


def _improve_and_evaluate(
    problem: StationaryProblem,
    v: np.ndarray,
    *,
    tolerance: float,
    relative: bool,
    max_iterations: int,
    evaluation_sweeps: int,
    history: list | None,
) -> tuple[np.ndarray, int, np.ndarray, bool]:
    """Bellman update then ``evaluation_sweeps`` partial evaluation sweeps, until the stop rule.

    ``evaluation_sweeps = 0`` is value iteration (Puterman 1994, section 6.5).
    Returns (v, iterations, residual (D,), converged).
    """
    residual = np.full(v.shape[0], np.inf)
    for n in range(1, max_iterations + 1):
        Q = problem.action_values(v)
        v_new = Q.max(axis=1)
        residual = np.abs(v_new - v).max(axis=-1)
        v = v_new
        _record(history, n, v, Q, residual, problem.bound(residual))
        if _converged(residual, problem.threshold(v, tolerance, relative)):
            return v, n, residual, True
        if evaluation_sweeps:
            P_pi, r_pi = problem.policy_arrays(Q.argmax(axis=1))
            for _ in range(evaluation_sweeps):  # partial evaluation: v <- r_pi + gamma P_pi v
                v = r_pi + problem.gamma * (P_pi @ v[..., None])[..., 0]
    return v, max_iterations, residual, False


def policy_iteration(
    problem: StationaryProblem,
    *,
    max_iterations: int,
    history: list | None,
) -> tuple[np.ndarray, int, np.ndarray, bool]:
    """Policy iteration with exact evaluation; returns (v, iterations, residual, converged).

    The residual is the Bellman residual ``||T v - v||`` of the last policy's value.
    """
    policy = problem.R.argmax(axis=1)  # greedy for v = 0
    for n in range(1, max_iterations + 1):
        v = problem.evaluate(policy)
        Q = problem.action_values(v)
        best = Q.max(axis=1)
        residual = np.abs(best - v).max(axis=-1)
        _record(history, n, v, Q, residual, residual / (1.0 - problem.gamma))
        # Keep the current action unless another is better beyond rounding: prevents
        # cycling between tied actions (Puterman 1994, section 6.4.1).
        current = np.take_along_axis(Q, policy[:, None], axis=1)[:, 0]
        slack = 1e-12 * np.maximum(np.abs(best), 1.0)
        improved = np.where(current >= best - slack, policy, Q.argmax(axis=1))
        if np.array_equal(improved, policy):
            return v, n, residual, True
        policy = improved
    v = problem.evaluate(policy)
    residual = np.abs(problem.action_values(v).max(axis=1) - v).max(axis=-1)
    return v, max_iterations, residual, False


BLOCK_BYTES = 1024**2
"""Transitions per block of draws on the numpy path: about half a core's L2 cache."""


def draw_block(n_states: int, n_actions: int) -> int:
    """Draws per block whose transitions (A S S float64) fill about :data:`BLOCK_BYTES`."""
    return max(1, BLOCK_BYTES // (n_actions * n_states * n_states * 8))


def _in_blocks(compiled, objective, problem, history, run):
    """Run an iterative method on blocks of draws sized to the cache (numpy path).

    Each block iterates until its own draws meet the stopping rule, and its arrays stay
    in cache across sweeps. With a sweep history the draws run as one batch (the history
    is per sweep over all draws).
    """
    D, A, S = problem.shape
    block = draw_block(S, A)
    if history is not None or D <= block:
        return run(problem)
    parts = [
        run(StationaryProblem(compiled.take_draws(slice(i, i + block)), objective))
        for i in range(0, D, block)
    ]
    return (
        np.concatenate([p[0] for p in parts]),
        max(p[1] for p in parts),
        np.concatenate([p[2] for p in parts]),
        all(p[3] for p in parts),
    )


def _per_draw(
    compiled: CompiledModel,
    objective: Objective,
    method: str,
    options: dict,
    gamma: float,
    decision_states: np.ndarray,
) -> tuple[int, np.ndarray, bool, np.ndarray, tuple[np.ndarray, ...]]:
    """Value or policy iteration and the greedy choice by the compiled loops, per draw.

    Each draw's transition rows are checked as they are read, its rewards built from the
    compact arrays (:func:`caredecide.solvers.bellman.kernel_arrays`, the arithmetic of
    :func:`cycle_rewards`), and it stops when its own stopping rule holds (its arrays
    stay in cache for all its sweeps), so its error bound holds as in the batched method;
    ``iterations`` is the largest number of sweeps any draw needed.

    Returns
    -------
    iterations, residual (D,) of the last sweep, converged (every draw), Q (D, S, A) the
    action values of the final values (``-inf`` where not allowed), and the greedy choice
    ``(policy, value, gap, next_best, indifferent)``, each (D, S).

    Raises
    ------
    SolverError
        A transition row of an allowed pair that does not sum to 1.
    """
    P, *model = kernel_arrays(compiled)
    D, A, S = P.shape[0], P.shape[2], P.shape[3]
    residual, Q = np.empty(D), np.empty((D, S, A))
    sweeps, done = np.empty(D, dtype=np.intp), np.empty(D, dtype=bool)
    value, gap = np.empty((D, S)), np.empty((D, S))
    policy, next_best = np.empty((D, S), dtype=np.intp), np.empty((D, S), dtype=np.intp)
    indifferent = np.empty((D, S), dtype=bool)
    bad = np.full(4, -1, dtype=np.int64)
    common = (
        P, tuple(model), stationary_weights(compiled), float(objective.outcome_weight),
        float(objective.cost_weight), np.ascontiguousarray(compiled.allowed, dtype=bool),
        decision_states, gamma,
    )  # fmt: skip
    checks = (
        float(options["tie_absolute"]), float(options["tie_relative"]), ROW_SUM_TOLERANCE, bad,
        residual, sweeps, done, Q, (value, policy, gap, next_best, indifferent),
    )  # fmt: skip
    loops = kernels.stationary_kernels()
    if method == "value_iteration":
        loops.value_iteration(
            *common, float(options["tolerance"]), bool(options["relative"]),
            int(options["max_iterations"]), *checks,
        )  # fmt: skip
    else:
        loops.policy_iteration(*common, int(options["max_iterations"]), *checks)
    raise_bad_row(compiled, bad)  # the rows checked as they were read
    choice = (policy, value, gap, next_best, indifferent)
    return int(sweeps.max(initial=0)), residual, bool(done.all()), Q, choice


def solve_stationary(
    compiled: CompiledModel,
    objective: Objective,
    *,
    method: str,
    tolerance: float,
    relative: bool,
    max_iterations: int,
    evaluation_sweeps: int,
    tie_absolute: float,
    tie_relative: float,
    record_history: bool = False,
    transition_form: str = "auto",
) -> PolicyResult:
    """Solve an infinite-horizon model with one of the iterative methods.

    ``transition_form`` is "auto", "dense" or "sparse" (:mod:`caredecide.solvers.sparse`:
    policy and value iteration of large models with few moves per state); the result's
    ``transition_form`` says which was used. Policy and value iteration without a sweep
    history run in the compiled loops when they are available (:func:`_per_draw`), else
    on the numpy path in cache-sized blocks of draws.

    Returns
    -------
    PolicyResult
        ``policy`` (D, 1, S); ``value`` (D, 1, S);
        ``error_bound`` (D,) bounds ``||value - v*||`` in the sup norm.
    """
    check_stationary(compiled)
    history: list[SweepRecord] | None = [] if record_history else None
    form = choose_form(compiled.transition, transition_form)
    if form == "sparse" and (record_history or method == "modified_policy_iteration"):
        if transition_form == "sparse":
            raise SolverError(
                "sparse transitions serve policy and value iteration without a sweep history; "
                f"got method = {method!r}, record_history = {record_history}"
            )
        form = "dense"
    gamma = stationary_discount(compiled, objective)
    decision_states = decision_state_mask(compiled)
    rows = None  # the sparse form's checked CSR rows, handed to the evaluation
    fused = (
        form == "dense"
        and method in ("value_iteration", "policy_iteration")
        and not record_history
        and kernels.available()
    )
    if not fused and form == "dense":
        check_compiled(compiled)  # the rows (the loops and the sparse form check them as read)
    if fused:
        options = {
            "tolerance": tolerance, "relative": relative, "max_iterations": max_iterations,
            "tie_absolute": tie_absolute, "tie_relative": tie_relative,
        }  # fmt: skip
        iterations, residual, converged, Q, choice = _per_draw(
            compiled, objective, method, options, gamma, decision_states
        )
        policy, value, gap, next_best, indifferent = choice
        bound = _error_bound(method, residual, gamma)
    else:
        if form == "sparse":
            iterations, residual, converged, Q, rows = sparse_iterate(
                compiled, objective, gamma, method, tolerance, relative, max_iterations
            )
        else:
            iterations, residual, converged, Q = _batched(
                compiled, objective, method, history,
                tolerance=tolerance, relative=relative, max_iterations=max_iterations,
                evaluation_sweeps=evaluation_sweeps,
            )  # fmt: skip
        bound = _error_bound(method, residual, gamma)
        # Greedy step on the final values: Q errors are at most gamma * bound, so gaps
        # below twice the bound are reported as ties rather than resolved by rounding.
        policy, value, gap, next_best, indifferent = greedy_choice(
            Q, decision_states, tie_absolute, tie_relative, uncertainty=2.0 * bound
        )
    if converged:
        message = f"{method.replace('_', ' ')} converged in {iterations} sweeps"
        if form == "sparse":
            message += " (sparse transitions)"
    else:
        message = (
            f"{method.replace('_', ' ')} stopped at max_iterations = {max_iterations} before "
            f"reaching the tolerance (largest error bound {bound.max():.3g})"
        )
    return build_result(
        compiled,
        objective,
        (policy[:, None], gap[:, None], next_best[:, None], indifferent[:, None]),
        value=value[:, None],
        q_values=Q[:, None],
        decision_states=decision_states,
        ages=None,
        history=history,
        method=method,
        iterations=iterations,
        tolerance=tolerance,
        relative=relative,
        error_bound=bound,
        success=converged,
        message=message,
        transition_form=form,
        transition_rows=rows,
    )


def _batched(
    compiled: CompiledModel,
    objective: Objective,
    method: str,
    history: list[SweepRecord] | None,
    **options,
) -> tuple[int, np.ndarray, bool, np.ndarray]:
    """The numpy path in cache-sized blocks of draws; returns as :func:`_per_draw`."""
    tolerance, relative = options["tolerance"], options["relative"]
    max_iterations = options["max_iterations"]
    problem = StationaryProblem(compiled, objective)
    if method == "value_iteration":
        v, iterations, residual, converged = _in_blocks(
            compiled, objective, problem, history,
            lambda part: value_iteration(
                part, tolerance=tolerance, relative=relative, max_iterations=max_iterations,
                history=history,
            ),
        )  # fmt: skip
    elif method == "modified_policy_iteration":
        v, iterations, residual, converged = _in_blocks(
            compiled, objective, problem, history,
            lambda part: modified_policy_iteration(
                part, tolerance=tolerance, relative=relative, max_iterations=max_iterations,
                evaluation_sweeps=options["evaluation_sweeps"], history=history,
            ),
        )  # fmt: skip
    elif method == "policy_iteration":
        v, iterations, residual, converged = _in_blocks(
            compiled, objective, problem, history,
            lambda part: policy_iteration(part, max_iterations=max_iterations, history=history),
        )  # fmt: skip
    else:  # pragma: no cover - solve() checks the method
        raise SolverError(f"unknown stationary method {method!r}")
    Q = problem.action_values(v).transpose(0, 2, 1).copy()  # (D, S, A)
    return iterations, residual, converged, Q


def _error_bound(method: str, residual: np.ndarray, gamma: float) -> np.ndarray:
    """(D,) bound on ``||v - v*||`` (sup norm) from the last sweep's ``residual`` (D,).

    Policy iteration, whose residual is the Bellman residual ``||T v - v||`` of the
    evaluated policy: ``residual / (1 - gamma)``; value and modified policy iteration:
    ``gamma * residual / (1 - gamma)`` (Puterman 1994, Theorem 6.3.1).
    """
    if method == "policy_iteration":
        return residual / (1.0 - gamma)
    return gamma * residual / (1.0 - gamma)
