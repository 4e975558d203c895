"""The one schedule that is best over the parameter draws (finite horizon).

Probabilistic analysis solves each draw on its own: every draw has its own optimal policy.
A committee recommends *one* schedule. The policy that maximises the expected objective
over the draws (the weighted value problem of a multi-model Markov decision process;
Steimle, Kaufman & Denton 2021, "Multi-model Markov decision processes", IISE
Transactions 53(10)) is generally neither the base-case optimum nor the optimum at the
mean parameters, because values are not linear in the estimates.

Exact gain of a change at one decision time
--------------------------------------------
For a deterministic policy ``pi`` (one action per cycle and state, shared by all draws)
write ``m_t^d(s)`` for the cohort share in ``s`` at the start of cycle ``t`` in draw ``d``
and ``Q_t^d(s, a)`` for the present value (at the model start) of taking ``a`` in ``s`` at
``t`` and following ``pi`` afterwards. Changing the decisions at one cycle ``t`` only
leaves the occupancy up to ``t`` and the values after ``t`` untouched, so the change in
the expected value is exactly::

    sum_s mean_d m_t^d(s) (Q_t^d(s, a'_s) - Q_t^d(s, pi_t(s)))

and the best change at ``t`` picks, in each state, the action with the largest
occupancy-weighted action value. One backward pass that does this at every cycle, with
``Q`` rebuilt from the already improved later cycles, never lowers the expected value;
repeating it reaches a policy that no change at one decision time can improve (a local
optimum, here called *stable*). The per-draw gain ``m_t^d(s) (Q_t^d(s,a') -
Q_t^d(s,a))`` is also exact, which lets the robust criteria (a lower percentile of the
objective, or a percentile of regret; Delage & Mannor 2010, "Percentile optimization for
Markov decision processes with parameter uncertainty", Operations Research 58(1)) be
improved one cell at a time without re-solving.

Starts: the base-case optimum, the optimum at the mean parameters, the action most often
optimal per cell over the draws, and the weight-select-update pass of Steimle et al.
(backward, choosing per cell the action with the largest draw-averaged value).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from caredecide.compiled import CompiledModel
from caredecide.errors import CaredecideError
from caredecide.objective import Objective
from caredecide.options import check_choice, check_scalar
from caredecide.solvers.bellman import cycle_rewards, decision_state_mask, transition_at

__all__ = [
    "CRITERIA",
    "PolicySearchError",
    "PolicySearchResult",
    "evaluate_shared_policy",
    "search_shared_policy",
]

CRITERIA = ("expected", "lower_percentile", "regret_percentile")
"""What the search maximises: the mean over the draws; a lower percentile of the
objective; or (minimises) a percentile of the regret against each draw's own optimum."""


class PolicySearchError(CaredecideError, ValueError):
    """The search cannot run on this model or policy (the message says why)."""


MAX_PASSES = 200
"""Improvement passes at most per start (each pass costs about one policy evaluation)."""


@dataclass(frozen=True)
class SharedPolicyValues:
    """One policy evaluated on every draw (finite horizon).

    Attributes
    ----------
    per_draw : (D,) float
        Objective from the start distribution, present value at the model start.
    occupancy : (D, T, S) float
        Cohort share at the start of each cycle (before the decision).
    action_values : (D, T, S, A) float
        Value of each action at each cycle, following the policy afterwards
        (``-inf`` where an action is not allowed).
    """

    per_draw: np.ndarray
    occupancy: np.ndarray
    action_values: np.ndarray


class _Rewards:
    """Cycle rewards of compiled chunks of draws, built once (they do not depend on the
    policy). Every operation runs chunk by chunk, so the draws never need one array."""

    def __init__(self, chunks: Sequence[CompiledModel], objective: Objective) -> None:
        first = chunks[0]
        if first.n_cycles is None:
            raise PolicySearchError(
                "the best shared policy over draws is searched on finite-horizon models "
                "only; this model has an infinite horizon"
            )
        self.chunks = list(chunks)
        self.first = first
        self.T = int(first.n_cycles)
        self.parts = [[cycle_rewards(c, objective, t) for t in range(self.T)] for c in self.chunks]
        self.not_allowed = ~np.asarray(first.allowed, dtype=bool)
        self.n_draws = sum(c.n_draws for c in self.chunks)

    def action_values(self, k: int, t: int, next_value: np.ndarray) -> np.ndarray:
        """(Dk, S, A) action values of chunk ``k`` at cycle ``t`` given its (Dk, S)
        values of cycle t + 1."""
        now, arrival = self.parts[k][t]
        rhs = arrival + next_value[:, None, :]  # (Dk, A, S)
        expected = _expected_next(self.chunks[k], t, rhs)  # (Dk, A, S)
        Q = now + expected.transpose(0, 2, 1)
        Q[:, self.not_allowed] = -np.inf
        return Q


def _expected_next(compiled: CompiledModel, t: int, rhs: np.ndarray) -> np.ndarray:
    """(D, A, S) ``sum_j P_t[a, s, j] rhs[a, j]`` for ``rhs`` (D, A, S), in either form of
    the transitions (dense, or the sparse rows of ``compiled.sparse_transition``)."""
    held = compiled.sparse_transition
    if held is None:
        return np.matmul(transition_at(compiled, t), rhs[..., None])[..., 0]
    D, Tp, A, S, _ = held.shape
    rows = _slot_rows(held)  # (nnz,) row a S + s of each slot
    products = held.values[:, min(t, Tp - 1)] * rhs[:, rows // S, held.indices]  # (D, nnz)
    return _sum_by(rows, products, A * S).reshape(D, A, S)


def _slot_rows(held: Any) -> np.ndarray:
    """(nnz,) the row ``a S + s`` each slot of sparse rows belongs to."""
    return np.repeat(np.arange(len(held.indptr) - 1), np.diff(held.indptr))


def _sum_by(groups: np.ndarray, values: np.ndarray, n_groups: int) -> np.ndarray:
    """(D, n_groups) sums of ``values`` (D, n) over the columns of each group (n,)."""
    from scipy import sparse

    ones = np.ones(groups.size)
    gather = sparse.csr_matrix((ones, (groups, np.arange(groups.size))), (n_groups, groups.size))
    return np.asarray(gather @ values.T).T


def _occupancy(compiled: CompiledModel, policy: np.ndarray) -> np.ndarray:
    """(D, T, S) start-of-cycle occupancy of one chunk under ``policy`` (T, S)."""
    D, S, T = compiled.n_draws, compiled.n_states, int(compiled.n_cycles or 0)
    m = np.empty((D, T, S))
    m[:, 0] = compiled.start_distribution
    states = np.arange(S)
    held = compiled.sparse_transition
    for t in range(T - 1):
        if held is None:
            rows = transition_at(compiled, t)[:, policy[t], states, :]  # (D, S, S) chosen rows
            m[:, t + 1] = np.einsum("ds,dsj->dj", m[:, t], rows)
            continue
        # The slots of each state's chosen row: the cohort in s spreads over their columns.
        chosen = policy[t] * S + states  # (S,) row of each state
        lengths = held.indptr[chosen + 1] - held.indptr[chosen]
        slots = np.repeat(held.indptr[chosen] - np.cumsum(lengths) + lengths, lengths)
        slots += np.arange(slots.size)
        source = np.repeat(states, lengths)
        flow = m[:, t, source] * held.values[:, min(t, held.values.shape[1] - 1), slots]
        m[:, t + 1] = _sum_by(held.indices[slots], flow, S)
    return m


def _evaluate(rewards: _Rewards, policy: np.ndarray, full: bool = True) -> SharedPolicyValues:
    """Values of ``policy`` on every draw; with ``full`` also occupancy and action values
    (else those two are empty arrays: the expected-value search needs neither)."""
    per_draw, occupancy, action_values = [], [], []
    states = np.arange(rewards.first.n_states)
    for k, compiled in enumerate(rewards.chunks):
        D, S, A, T = compiled.n_draws, compiled.n_states, compiled.n_actions, rewards.T
        Q = np.empty((D, T, S, A)) if full else None
        value = np.zeros((D, S))
        for t in range(T - 1, -1, -1):
            Qt = rewards.action_values(k, t, value)
            if Q is not None:
                Q[:, t] = Qt
            value = Qt[:, states, policy[t]]
        per_draw.append(value @ compiled.start_distribution)
        if Q is not None:
            occupancy.append(_occupancy(compiled, policy))
            action_values.append(Q)
    if not full:
        return SharedPolicyValues(np.concatenate(per_draw), np.empty(0), np.empty(0))
    return SharedPolicyValues(
        np.concatenate(per_draw), np.concatenate(occupancy), np.concatenate(action_values)
    )


def evaluate_shared_policy(
    compiled: CompiledModel | Sequence[CompiledModel], objective: Objective, policy: np.ndarray
) -> SharedPolicyValues:
    """Evaluate one policy ``(T, S)`` on every draw of ``compiled`` (finite horizon).

    ``compiled`` may be a sequence of chunks of draws of one model. The values equal
    :func:`caredecide.evaluate.evaluate_policy` (same rewards, same recursion as backward
    induction; test).
    """
    chunks = [compiled] if isinstance(compiled, CompiledModel) else list(compiled)
    return _evaluate(_Rewards(chunks, objective), _check_policy(chunks[0], policy))


def _check_policy(compiled: CompiledModel, policy: np.ndarray) -> np.ndarray:
    T, S = int(compiled.n_cycles or 0), compiled.n_states
    policy = np.asarray(policy)
    if policy.shape != (T, S):
        raise PolicySearchError(
            f"a shared policy has shape (cycles, states) = ({T}, {S}); got {policy.shape}"
        )
    policy = policy.astype(np.intp)
    if not compiled.allowed[np.arange(S)[None, :], policy].all():
        raise PolicySearchError("the policy chooses an action not allowed in some state")
    return policy


def _sweep(
    rewards: _Rewards, policy: np.ndarray, weights: list[np.ndarray] | None, tol: float
) -> int:
    """One backward pass of exact per-cycle improvements; returns the cells changed.

    ``weights`` (per chunk, (Dk, T, S)) is the occupancy under ``policy`` (the exact rule);
    ``None`` weighs every draw equally (the weight-select-update pass).
    """
    first = rewards.first
    S = first.n_states
    deciding = np.flatnonzero(decision_state_mask(first))
    states = np.arange(S)
    values = [np.zeros((c.n_draws, S)) for c in rewards.chunks]
    changed = 0
    for t in range(rewards.T - 1, -1, -1):
        # Action values with later cycles already improved, chunk by chunk.
        Qs = [rewards.action_values(k, t, values[k]) for k in range(len(rewards.chunks))]
        score = np.zeros((S, first.n_actions))
        for k, Q in enumerate(Qs):
            w = np.ones(Q.shape[:2]) if weights is None else weights[k][:, t]
            score += np.einsum("ds,dsa->sa", w, np.where(np.isfinite(Q), Q, 0.0))
        score /= rewards.n_draws
        score[rewards.not_allowed] = -np.inf
        for s in deciding:
            current = policy[t, s]
            best = int(np.argmax(score[s]))
            scale = max(1.0, abs(score[s, current]))
            if score[s, best] > score[s, current] + tol * scale:
                policy[t, s] = best
                changed += 1
        values = [Q[:, states, policy[t]] for Q in Qs]
    return changed


def _criterion_value(
    per_draw: np.ndarray, criterion: str, percentile: float, best: np.ndarray
) -> float:
    if criterion == "expected":
        return float(per_draw.mean())
    if criterion == "lower_percentile":
        return float(np.percentile(per_draw, percentile))
    return -float(np.percentile(best - per_draw, 100.0 - percentile))


def _improve_expected(rewards: _Rewards, policy: np.ndarray, tol: float) -> tuple[np.ndarray, int]:
    """Improvement passes until no change of one cycle's decisions improves the schedule."""
    policy = policy.copy()
    for passes in range(1, MAX_PASSES + 1):
        weights = [_occupancy(c, policy) for c in rewards.chunks]
        if _sweep(rewards, policy, weights, tol) == 0:
            return policy, passes
    return policy, MAX_PASSES


def _polish_with_thresholds(
    rewards: _Rewards, policy: np.ndarray, tol: float
) -> tuple[np.ndarray, int]:
    """Threshold moves then improvement passes, alternated until neither improves.

    Returns the schedule and the number of threshold rounds taken.
    """
    policy = policy.copy()
    rounds = 0
    while rounds < MAX_PASSES and _threshold_move(rewards, policy, tol):
        rounds += 1
        policy, _ = _improve_expected(rewards, policy, tol)
    return policy, rounds


def _threshold_schedules(column: np.ndarray, first: int, second: int) -> list[np.ndarray]:
    """Every one-switch schedule of one state over T cycles: ``first`` before cycle k and
    ``second`` from k on, or the reverse (k = 0..T)."""
    T = column.size
    out = []
    for k in range(T + 1):
        early = np.arange(T) < k
        out.append(np.where(early, first, second))
        out.append(np.where(early, second, first))
    return out


def _threshold_move(rewards: _Rewards, policy: np.ndarray, tol: float) -> bool:
    """Try every threshold age in each two-action state, the other states kept; take the
    best improving one (exact: each candidate evaluated on every draw). True if taken."""
    first = rewards.first
    current = float(_evaluate(rewards, policy, full=False).per_draw.mean())
    best_value, best = current + tol * max(1.0, abs(current)), None
    for s in np.flatnonzero(decision_state_mask(first)):
        actions = np.flatnonzero(first.allowed[s])
        if actions.size != 2:
            continue
        for column in _threshold_schedules(policy[:, s], int(actions[0]), int(actions[1])):
            if np.array_equal(column, policy[:, s]):
                continue
            trial = policy.copy()
            trial[:, s] = column
            value = float(_evaluate(rewards, trial, full=False).per_draw.mean())
            if value > best_value:
                best_value, best = value, (s, column)
    if best is None:
        return False
    policy[:, best[0]] = best[1]
    return True


def _improve_percentile(
    rewards: _Rewards,
    policy: np.ndarray,
    criterion: str,
    percentile: float,
    best: np.ndarray,
    tol: float,
) -> tuple[np.ndarray, int]:
    """Greedy single-cell changes, each judged exactly on every draw's new value."""
    compiled = rewards.first
    deciding = np.flatnonzero(decision_state_mask(compiled))
    policy = policy.copy()
    T, A = rewards.T, compiled.n_actions
    for passes in range(1, MAX_PASSES + 1):
        values = _evaluate(rewards, policy)
        current = _criterion_value(values.per_draw, criterion, percentile, best)
        chosen = None
        top = current + tol * max(1.0, abs(current))
        for t in range(T):
            for s in deciding:
                a0 = policy[t, s]
                for a in range(A):
                    if a == a0 or not compiled.allowed[s, a]:
                        continue
                    gain = values.occupancy[:, t, s] * (
                        values.action_values[:, t, s, a] - values.action_values[:, t, s, a0]
                    )
                    score = _criterion_value(values.per_draw + gain, criterion, percentile, best)
                    if score > top:
                        top, chosen = score, (t, s, a)
        if chosen is None:
            return policy, passes
        t, s, a = chosen
        policy[t, s] = a
    return policy, MAX_PASSES


def _most_frequent(policies: np.ndarray, allowed: np.ndarray) -> np.ndarray:
    """(T, S) the action most often optimal per cell over (D, T, S) policies (lowest on ties)."""
    A = allowed.shape[1]
    counts = np.stack([(policies == a).sum(axis=0) for a in range(A)], axis=-1)
    return np.argmax(counts, axis=-1).astype(np.intp)


@dataclass(frozen=True)
class PolicySearchResult:
    """The schedule best over the draws, against the base-case schedule.

    Attributes
    ----------
    criterion : str
        One of :data:`CRITERIA`; ``percentile`` applies to the two percentile criteria.
    policy : (T, S) int
        The best shared policy found (action index per cycle and state).
    base_policy : (T, S) int
        The base-case optimum, the schedule recommended today.
    per_draw_best, per_draw_base, per_draw_optimal : (D,) float
        Objective of the best found policy, of the base-case policy and of each draw's own
        optimum (present value at the model start, per person).
    starts : pandas.DataFrame
        One row per start: its name, expected value before and after the search, passes.
    value_of_stochastic_solution, vss_standard_error : float
        Mean of ``per_draw_best - per_draw_base`` (Birge 1982) and its Monte Carlo error.
    evpi_candidates, evpi_best : float
        Expected value of perfect information against the best of the candidate policies
        (the starts given by the caller and the most-often-optimal policy: the
        probabilistic analysis's kind of candidate set) and against the best policy found;
        ``0 <= evpi_best <= evpi_candidates``.
    acceptability : float
        Share of draws for which the best found policy is optimal (regret within the tie
        tolerance).
    differing_cells : pandas.DataFrame
        Cells (cycle, age, state) where the best found policy differs from the base case.
    """

    criterion: str
    percentile: float
    unit: str
    policy: np.ndarray
    base_policy: np.ndarray
    per_draw_best: np.ndarray
    per_draw_base: np.ndarray
    per_draw_optimal: np.ndarray
    starts: pd.DataFrame
    state_ids: tuple[str, ...]
    action_labels: tuple[str, ...]
    ages: np.ndarray
    acceptability: float
    notes: tuple[str, ...] = field(default_factory=tuple)
    deciding_states: tuple[str, ...] = ()
    """States where a choice is made (two or more allowed actions, not absorbing)."""

    @property
    def n_draws(self) -> int:
        return int(self.per_draw_best.size)

    @property
    def value_of_stochastic_solution(self) -> float:
        return float(np.mean(self.per_draw_best - self.per_draw_base))

    @property
    def vss_standard_error(self) -> float:
        diff = self.per_draw_best - self.per_draw_base
        return float(diff.std(ddof=1) / np.sqrt(diff.size)) if diff.size > 1 else float("nan")

    @property
    def evpi_best(self) -> float:
        return float(np.mean(self.per_draw_optimal) - np.mean(self.per_draw_best))

    @property
    def evpi_candidates(self) -> float:
        candidates = self.starts.loc[self.starts["candidate"], "expected_before"]
        return float(np.mean(self.per_draw_optimal) - candidates.max())

    @property
    def differing_cells(self) -> pd.DataFrame:
        t, s = np.nonzero(self.policy != self.base_policy)
        return pd.DataFrame(
            {
                "cycle": t,
                "age": self.ages[t],
                "state": [self.state_ids[i] for i in s],
                "base_case": [
                    self.action_labels[self.base_policy[a, b]] for a, b in zip(t, s, strict=True)
                ],
                "best_over_draws": [
                    self.action_labels[self.policy[a, b]] for a, b in zip(t, s, strict=True)
                ],
            }
        )

    def lines(self) -> list[str]:
        """The result in plain words, for the CLI and the report."""
        label = {
            "expected": "expected value over the draws",
            "lower_percentile": f"{self.percentile:g}th percentile of the objective",
            "regret_percentile": f"{100 - self.percentile:g}th percentile of regret (minimised)",
        }[self.criterion]
        best = self.per_draw_best.mean()
        base = self.per_draw_base.mean()
        differing = self.differing_cells
        out = [
            f"Best shared schedule over {self.n_draws:,} draws (criterion: {label}).",
            f"Expected value: best schedule {best:,.2f}, base-case schedule {base:,.2f} "
            f"({self.unit} per person).",
            f"Value of the stochastic solution: {self.value_of_stochastic_solution:,.2f} "
            f"(Monte Carlo s.e. {self.vss_standard_error:,.2f}).",
            f"EVPI against the best schedule found: {self.evpi_best:,.2f}; against the "
            f"candidate policies: {self.evpi_candidates:,.2f} (per person).",
            f"The best schedule is optimal in {self.acceptability:.1%} of the draws.",
        ]
        if differing.empty:
            out.append("It is the base-case schedule in every state and cycle.")
        else:
            out.append(f"It differs from the base-case schedule in {len(differing)} cell(s):")
            for state, rows in differing.groupby("state", sort=False):
                ages = ", ".join(f"{age:g}" for age in rows["age"])
                first = rows.iloc[0]
                out.append(
                    f"  {state}: {first['best_over_draws']} instead of {first['base_case']} "
                    f"at ages {ages}"
                )
        for row in self.starts.itertuples():
            out.append(
                f"  start '{row.start}': {row.expected_before:,.2f} -> {row.expected_after:,.2f} "
                f"in {row.passes} pass(es) ({row.cells_changed} cell(s) changed)"
            )
        out.extend(self.notes)
        return out

    def policy_frame(self) -> pd.DataFrame:
        """One row per cycle and state: age, best-over-draws action, base-case action."""
        T, S = self.policy.shape
        t, s = np.divmod(np.arange(T * S), S)
        return pd.DataFrame(
            {
                "cycle": t,
                "age": self.ages[t],
                "state": [self.state_ids[i] for i in s],
                "best_over_draws": [self.action_labels[a] for a in self.policy.ravel()],
                "base_case": [self.action_labels[a] for a in self.base_policy.ravel()],
            }
        )

    def map_frame(self) -> pd.DataFrame:
        """The best schedule for a policy map: one row per (state, age) where a choice is
        made; ``label`` marks with ``*`` the cells that differ from the base-case schedule
        (columns state, age, action, label; see :func:`caredecide.charts.make_policy_chart`)."""
        frame = self.policy_frame()
        frame = frame[frame["state"].isin(self.deciding_states)]
        return pd.DataFrame(
            {
                "state": frame["state"].to_numpy(),
                "age": frame["age"].to_numpy(),
                "action": frame["best_over_draws"].to_numpy(),
                "label": np.where(frame["best_over_draws"] != frame["base_case"], "*", ""),
            }
        )

    def to_frame(self) -> pd.DataFrame:
        """The starts table (one row per start)."""
        return self.starts.copy()

    def to_dict(self) -> dict[str, Any]:
        return {
            "criterion": self.criterion,
            "percentile": self.percentile if self.criterion != "expected" else None,
            "unit": self.unit,
            "draws": self.n_draws,
            "expected_best": float(self.per_draw_best.mean()),
            "expected_base_case": float(self.per_draw_base.mean()),
            "value_of_stochastic_solution": self.value_of_stochastic_solution,
            "vss_standard_error": self.vss_standard_error,
            "evpi_candidates": self.evpi_candidates,
            "evpi_best": self.evpi_best,
            "acceptability": self.acceptability,
            "cells_differing_from_base_case": int((self.policy != self.base_policy).sum()),
            "starts": self.starts.to_dict(orient="records"),
            "notes": list(self.notes),
        }


def search_shared_policy(
    compiled: CompiledModel | Sequence[CompiledModel],
    objective: Objective,
    starts: Mapping[str, np.ndarray],
    *,
    base_policy: np.ndarray,
    per_draw_optimal: np.ndarray,
    per_draw_policies: np.ndarray | None = None,
    criterion: str = "expected",
    percentile: float = 5.0,
    tolerance: float = 1e-12,
    ages: np.ndarray | None = None,
    progress: Callable[[int, int], None] | None = None,
    threshold_moves: bool = True,
) -> PolicySearchResult:
    """Search the one policy best over every draw of ``compiled``.

    Parameters
    ----------
    compiled : CompiledModel or sequence of CompiledModel
        D draws, finite horizon T; or chunks of the draws of one model (in order), so the
        draws never need one array.
    objective : Objective
    starts : mapping name -> (T, S) int
        Start policies (e.g. the base-case optimum, the optimum at mean parameters). The
        most-often-optimal policy (from ``per_draw_policies``) and the weight-select-update
        pass are added.
    base_policy : (T, S) int
        The schedule recommended today (the base-case optimum).
    per_draw_optimal : (D,) float
        Each draw's optimal value (for regret and EVPI).
    per_draw_policies : (D, T, S) int, optional
        Each draw's optimal policy (for the most-often-optimal start and acceptability).
    criterion : {"expected", "lower_percentile", "regret_percentile"}
    percentile : float
        0 < percentile < 100; the lower percentile of the objective, or the upper
        percentile (100 - percentile) of regret.
    tolerance : float
        Relative gain below which a change is not taken.
    threshold_moves : bool
        Expected criterion: from the best schedule found, also try every threshold age
        (one switch between the two actions, either way round) in each two-action state with
        the other states kept, each evaluated exactly on every draw; take the best
        improving one, re-run the passes, repeat until neither improves.

    Returns
    -------
    PolicySearchResult
    """
    criterion = check_choice(criterion, "criterion", CRITERIA)
    percentile = check_scalar(
        percentile, "percentile", float, min_val=0.0, max_val=100.0, include_boundaries="neither"
    )
    chunks = [compiled] if isinstance(compiled, CompiledModel) else list(compiled)
    rewards = _Rewards(chunks, objective)
    compiled = chunks[0]
    best_per_draw = np.asarray(per_draw_optimal, dtype=float)
    named = {name: _check_policy(compiled, p) for name, p in starts.items()}
    if per_draw_policies is not None:
        named["most often optimal per cell"] = _most_frequent(
            np.asarray(per_draw_policies), compiled.allowed
        )
    candidates = set(named)
    wsu = _check_policy(compiled, base_policy).copy()
    _sweep(rewards, wsu, None, tolerance)
    named["weight-select-update pass"] = wsu

    rows = []
    best_policy, best_score = None, -np.inf
    for i, (name, start) in enumerate(named.items()):
        before = _evaluate(rewards, start, full=False).per_draw
        if criterion == "expected":
            found, passes = _improve_expected(rewards, start, tolerance)
        else:
            found, passes = _improve_percentile(
                rewards, start, criterion, percentile, best_per_draw, tolerance
            )
        after = _evaluate(rewards, found, full=False).per_draw
        score = _criterion_value(after, criterion, percentile, best_per_draw)
        rows.append(
            {
                "start": name,
                "candidate": name in candidates,
                "expected_before": float(before.mean()),
                "expected_after": float(after.mean()),
                "criterion_after": score,
                "passes": passes,
                "cells_changed": int((found != start).sum()),
            }
        )
        if best_policy is None or score > best_score + tolerance * max(1.0, abs(best_score)):
            best_policy, best_score = found, score
        if progress is not None:
            progress(i + 1, len(named))
    assert best_policy is not None
    if criterion == "expected" and threshold_moves:
        before = _evaluate(rewards, best_policy, full=False).per_draw
        polished, rounds = _polish_with_thresholds(rewards, best_policy, tolerance)
        after = _evaluate(rewards, polished, full=False).per_draw
        rows.append(
            {
                "start": "threshold moves on the best found",
                "candidate": False,
                "expected_before": float(before.mean()),
                "expected_after": float(after.mean()),
                "criterion_after": float(after.mean()),
                "passes": rounds,
                "cells_changed": int((polished != best_policy).sum()),
            }
        )
        best_policy = polished
    base = _check_policy(compiled, base_policy)
    per_best = _evaluate(rewards, best_policy, full=False).per_draw
    per_base = _evaluate(rewards, base, full=False).per_draw
    scale = np.maximum(1.0, np.abs(best_per_draw))
    accept = float(np.mean(best_per_draw - per_best <= 1e-9 * scale))
    notes = []
    if criterion != "expected":
        notes.append(
            f"criterion: {criterion.replace('_', ' ')} at {percentile:g}% - a different "
            "criterion from the expected value; the VSS and EVPI figures still use means"
        )
    return PolicySearchResult(
        criterion=criterion,
        percentile=percentile,
        unit=objective.unit,
        policy=best_policy,
        base_policy=base,
        per_draw_best=per_best,
        per_draw_base=per_base,
        per_draw_optimal=best_per_draw,
        starts=pd.DataFrame(rows),
        state_ids=compiled.state_ids,
        action_labels=compiled.action_labels or compiled.action_ids,
        ages=compiled.ages() if ages is None else ages,
        acceptability=accept,
        notes=tuple(notes),
        deciding_states=tuple(
            compiled.state_ids[i] for i in np.flatnonzero(decision_state_mask(compiled))
        ),
    )


def best_policy_over_draws(
    model: Any,
    n_draws: int,
    seed: int,
    *,
    objective: Objective | None = None,
    criterion: str = "expected",
    percentile: float = 5.0,
    memory_limit_bytes: int | None = None,
    progress: Callable[[int, int], None] | None = None,
    extra_starts: Sequence[tuple[str, np.ndarray]] = (),
    map_chunks: Any = None,
) -> PolicySearchResult:
    """Draw ``n_draws`` parameter sets and search the best shared policy over them.

    The draws are the probabilistic analysis's own (same sampler, same seed gives the same
    draws). They are compiled and solved chunk by chunk through the one chunk driver
    (:mod:`caredecide.chunks`; ``map_chunks`` serial by default, or
    :func:`~caredecide.chunks.dask_map`); the compiled chunks are kept for the search.
    """
    from caredecide.chunks import chunk_ranges, chunk_size_for, memory_budget, run_chunks
    from caredecide.compile import compile_model
    from caredecide.solvers import solve
    from caredecide.uncertainty.sampling import ParameterSampler, check_draw_count, check_seed

    n_draws = check_draw_count(n_draws)
    seed = check_seed(seed)
    if objective is None:
        objective = Objective.from_settings(model.settings)
    sampler = ParameterSampler.from_model(model)
    base = compile_model(model, memory_limit_bytes=memory_limit_bytes)
    if base.n_cycles is None:
        raise PolicySearchError(
            "the best shared policy over draws is searched on finite-horizon models only"
        )
    base_policy = solve(base, objective).policy[0]
    at_mean = compile_model(model, {k: np.array([v]) for k, v in sampler.means().items()} or None)
    mean_policy = solve(at_mean, objective).policy[0]
    limit = memory_budget(memory_limit_bytes)
    job = _SolveDrawsJob(model, objective, sampler, seed, limit)
    # An eighth of the budget per chunk: the compiled chunks are kept for the search.
    ranges = chunk_ranges(n_draws, chunk_size_for(model, n_draws, limit // 8))
    pieces = list(run_chunks(job, ranges, map_chunks=map_chunks))
    chunks = [piece[0] for piece in pieces]
    per_draw_optimal = np.concatenate([piece[1] for piece in pieces])
    per_draw_policies = np.concatenate([piece[2] for piece in pieces])
    starts = {
        "base-case optimum": base_policy,
        "optimum at mean parameters": mean_policy,
        **dict(extra_starts),
    }
    return search_shared_policy(
        chunks,
        objective,
        starts,
        base_policy=base_policy,
        per_draw_optimal=per_draw_optimal,
        per_draw_policies=per_draw_policies,
        criterion=criterion,
        percentile=percentile,
        progress=progress,
    )


@dataclass(frozen=True)
class _SolveDrawsJob:
    """Chunk job: compile and solve draws ``start:stop``; keep the compiled chunk, each
    draw's optimal value and policy (int8)."""

    model: Any
    objective: Objective
    sampler: Any
    seed: int
    memory_limit_bytes: int

    def __call__(self, start: int, stop: int) -> tuple[CompiledModel, np.ndarray, np.ndarray]:
        from caredecide.compile import compile_model
        from caredecide.solvers import solve

        values = self.sampler.draw(self.seed, start, stop)
        sets = {name: values[:, j] for j, name in enumerate(self.sampler.names)}
        compiled = compile_model(
            self.model, sets or None, memory_limit_bytes=self.memory_limit_bytes
        )
        if not sets:
            compiled = compiled.take_draws(np.zeros(stop - start, dtype=int))
        solved = solve(compiled, self.objective, action_values=False)  # policy, value only
        optimal = solved.value[:, 0] @ compiled.start_distribution
        return compiled, optimal, solved.policy.astype(np.int8)
