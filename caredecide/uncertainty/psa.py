"""Probabilistic sensitivity analysis of the timing decision.

RESEARCH USE ONLY: not a substitute for clinical judgment, local guidelines or
licensed practice.

``D`` parameter sets are drawn (:mod:`caredecide.uncertainty.sampling`), compiled and
solved chunk by chunk through the one core path (``compile_model -> solve ->
evaluate_policy``). For every draw ``d`` this keeps:

* ``V*_d``: the value of the policy that is optimal *for that draw* (and its costs and
  QALYs);
* ``V_k,d``: the value of each *candidate* policy ``k`` evaluated on that draw's arrays.
  Candidates are policies a decision maker could adopt today: the base-case optimal
  policy, the policy optimal at the mean parameters, the model's fixed strategies
  (:func:`caredecide.strategies.default_strategies`, plus any given) and the policies
  most often optimal in a pilot of the first :data:`~caredecide.uncertainty.sampling.BLOCK_SIZE`
  draws;
* the sampled parameters (for EVPPI) and, per chunk, counts of the optimal action per
  (cycle, state) and of each distinct optimal policy (so the per-draw policies need not
  be kept: 1,000,000 draws fit in bounded memory).

Outputs
-------
Acceptability of the policy by state and age: share ``p`` of draws whose optimal
policy takes each action, with binomial Monte Carlo error ``sqrt(p (1 - p) / D)``
(common practice). Over an age band the share is the mean over its cycles and the
error shown is the mean of the per-cycle errors, an upper bound on the error of the
mean (Minkowski's inequality).

Expected loss (regret) of candidate ``k``: ``E[V* - V_k]``, with the standard error of
the mean.

EVPI of the timing decision::

    EVPI = E[V*] - max_k E[V_k] = min_k E[V* - V_k]

(Claxton 1999, J Health Econ 18:341-364; from memory). The maximum runs over the
candidate set only. The policy with the highest expected value over the parameter
distribution is itself hard to find (a policy must be chosen before theta is known, and
``E[V_pi]`` is not the value at the mean parameters), and it is at least as good as the
best candidate, so **this EVPI is an upper bound on the true EVPI**. It is also at least
the EVPI of the choice among the candidates alone (``voi.evpi`` on ``V_k``), reported
beside it.

Acceptability curves and frontier over a willingness-to-pay range, EVPPI by regression
(Strong, Oakley & Brennan 2014) per parameter and per Dirichlet group, and running
means come from :mod:`caredecide.uncertainty.acceptability` and
:mod:`caredecide.uncertainty.voi`.

Chunks carry their draw range, and draws depend only on the seed and the draw number,
so results are identical whatever the chunk size and whether chunks run serially or on
a Dask cluster (:mod:`caredecide.uncertainty.cluster`).
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd

from caredecide import jit
from caredecide.batch import (  # noqa: F401  (the one memory estimate, re-exported)
    RESULT_ARRAYS_PER_CELL,
    draw_bytes,
    draw_working_bytes,
)
from caredecide.chunks import (
    ChunkMap,
    IdleWatch,
    chunk_ranges,
    chunk_size_for,
    memory_budget,
    run_chunks,
    serial_map,
    thread_map,
    usable_threads,
)
from caredecide.compile import compile_model
from caredecide.compiled import CompiledModel
from caredecide.errors import ModelError, ModelTooLargeError, Problem, RunOptionError
from caredecide.evaluate import policy_totals
from caredecide.limits import (
    CHUNK_MEMORY_BYTES,
    PSA_CHUNK_BYTES,
    WTP_SEARCH_MAX_WHEN_ZERO,
    default_memory_limit,
)
from caredecide.model import Model
from caredecide.objective import Objective
from caredecide.options import check_scalar
from caredecide.solvers import PolicyResult, solve
from caredecide.uncertainty.acceptability import (
    acceptability_curve,
    acceptability_frontier,
    action_shares,
    running_mean,
)
from caredecide.uncertainty.sampling import (
    BLOCK_SIZE,
    ParameterSampler,
    check_draw_count,
    check_seed,
)
from caredecide.uncertainty.voi import discounted_population, evpi, evppi_regression

DEFAULT_MEMORY_LIMIT = CHUNK_MEMORY_BYTES
EVALUATION_GROUP = 4
"""Policies evaluated together on a chunk (their traces are held at once)."""
DEFAULT_FREQUENT = 3
"""Most frequent per-draw optimal policies (from the pilot) added as candidates."""
DEFAULT_WTP_POINTS = 41
CONVERGENCE_POINTS = 200
"""Rows of the thinned running-mean table (geometrically spaced draw counts)."""
EVPPI_MAX_DRAWS = 100_000
"""EVPPI regressions use at most this many (the first) draws: memory and time bounded."""
MIN_EVPPI_DRAWS = 200
"""Fewer draws than this give no EVPPI (the regression smoother needs ~10 per coefficient)."""
PLANE_DRAWS = 1000
"""Draws shown per candidate on the cost-effectiveness plane (the first ones)."""

ORIGIN_BASE = "base-case optimal"
ORIGIN_MEAN = "optimal at mean parameters"
ORIGIN_STRATEGY = "fixed strategy"
ORIGIN_FREQUENT = "frequent per-draw optimum"

__all__ = [
    "Candidate",
    "ChunkResult",
    "PSAContext",
    "PSAResult",
    "analyse_uncertainty",
    "serial_map",
    "solve_chunk",
]


@dataclass(frozen=True)
class Candidate:
    """A policy that could be adopted before the uncertainty is resolved.

    Attributes
    ----------
    name : str
    origin : str
        Why it is a candidate (:data:`ORIGIN_BASE`, ...).
    policy : (Tpi, S) int8
        Action index per cycle and state.
    also : tuple of str
        Other candidates with the same policy (merged into this one).
    """

    name: str
    origin: str
    policy: np.ndarray = field(repr=False)
    also: tuple[str, ...] = ()


@dataclass(frozen=True)
class PSAContext:
    """What every chunk needs (picklable: sent once to each Dask worker).

    Attributes
    ----------
    model : caredecide.model.Model
    objective : Objective
    sampler : ParameterSampler
    seed : int
    candidate_policies : (K, Tpi, S) int8
    keep_policies : bool
        Return the per-draw optimal policies (large for big runs).
    memory_limit_bytes : int
    solve_options : tuple of (name, value)
        Passed to :func:`caredecide.solvers.solve`.
    """

    model: Model
    objective: Objective
    sampler: ParameterSampler
    seed: int
    candidate_policies: np.ndarray
    keep_policies: bool = False
    memory_limit_bytes: int = DEFAULT_MEMORY_LIMIT
    solve_options: tuple[tuple[str, Any], ...] = ()


@dataclass
class ChunkResult:
    """Results of draws ``start:stop`` (see :func:`solve_chunk`).

    Attributes
    ----------
    start, stop : int
    parameters : (n, P) float
        Sampled parameters (columns ``sampler.names``).
    optimal : (n, 3) float
        Cost, QALYs and value of each draw's own optimal policy (discounted).
    candidates : (3, n, K) float
        Cost, QALYs and value of each candidate on each draw.
    action_counts : (Tpi, S, A) int
        Draws whose optimal policy takes action ``a`` in ``s`` at cycle ``t``.
    distinct_policies : (U, Tpi, S) int8
    distinct_counts : (U,) int
    policies : (n, Tpi, S) int8 or None
    iterations : int
    success : bool
    message : str
    """

    start: int
    stop: int
    parameters: np.ndarray
    optimal: np.ndarray
    candidates: np.ndarray
    action_counts: np.ndarray
    distinct_policies: np.ndarray
    distinct_counts: np.ndarray
    policies: np.ndarray | None
    iterations: int
    success: bool
    message: str


def _totals(outcome) -> np.ndarray:
    """(n, 3) cost, QALYs, value of a :class:`~caredecide.evaluate.PolicyTotals`."""
    return np.column_stack([outcome.costs, outcome.qalys, outcome.value])


def _totals_only(compiled: CompiledModel) -> bool:
    """Whether :func:`~caredecide.evaluate.policy_totals` keeps no cohort traces here (a
    finite horizon with the compiled loops): then every policy goes in one pass."""
    return compiled.n_cycles is not None and jit.available()


def solve_chunk(context: PSAContext, start: int, stop: int) -> ChunkResult:
    """Draw, compile, solve and evaluate draws ``start:stop`` (one core path).

    Pure function of its arguments: the same range gives the same result anywhere.
    """
    values, compiled, result = _solve_draws(context, start, stop)
    return _evaluate_chunk(context, values, compiled, result, start, stop)


def _solve_draws(
    context: PSAContext, start: int, stop: int
) -> tuple[np.ndarray, CompiledModel, PolicyResult]:
    """(values (n, P), compiled, PolicyResult) of draws ``start:stop``."""
    sampler = context.sampler
    values = sampler.draw(context.seed, start, stop)
    parameter_sets = {name: values[:, j] for j, name in enumerate(sampler.names)}
    compiled = compile_model(
        context.model, parameter_sets or None, memory_limit_bytes=context.memory_limit_bytes
    )
    if not parameter_sets:  # nothing uncertain: the base case, repeated
        compiled = compiled.take_draws(np.zeros(stop - start, dtype=int))
    # The analysis reads each draw's policy and value only: no action values are kept.
    options = {"action_values": False, **dict(context.solve_options)}
    return values, compiled, solve(compiled, context.objective, **options)


def _evaluate_chunk(
    context: PSAContext, values: np.ndarray, compiled, result, start: int, stop: int
) -> ChunkResult:
    """Evaluate the optimal and candidate policies of solved draws and count the policies."""
    # The optimal and the candidate policies (a handful), each on every draw at once, in
    # one pass over each draw's transitions; only their totals are kept (no traces).
    # Groups of EVALUATION_GROUP policies bound the traces held at once where the
    # evaluation keeps them (an infinite horizon, or no compiled loops).
    policies = [result.policy, *(policy[None] for policy in context.candidate_policies)]
    group = len(policies) if _totals_only(compiled) else EVALUATION_GROUP
    totals = [
        _totals(outcome)
        for i in range(0, len(policies), group)
        for outcome in policy_totals(compiled, policies[i : i + group], context.objective)
    ]
    optimal = totals[0]
    candidates = (
        np.stack([total.T for total in totals[1:]], axis=-1)
        if len(context.candidate_policies)
        else np.empty((3, stop - start, 0))
    )
    policy = result.policy.astype(np.int8)
    shares = action_shares(policy, compiled.n_actions).share
    distinct, _, counts = distinct_rows(policy.reshape(len(policy), -1))
    return ChunkResult(
        start=start,
        stop=stop,
        parameters=values,
        optimal=optimal,
        candidates=candidates,
        action_counts=np.rint(shares * len(policy)).astype(np.int64),
        distinct_policies=distinct.reshape(len(distinct), *policy.shape[1:]),
        distinct_counts=counts,
        policies=policy if context.keep_policies else None,
        iterations=int(result.iterations),
        success=bool(result.success),
        message=str(result.message),
    )


def distinct_rows(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Distinct rows of an (n, m) int8 table of action indices, sorted, with counts.

    Returns ``(unique (U, m), inverse (n,), counts (U,))`` exactly as
    ``numpy.unique(rows, axis=0, return_inverse=True, return_counts=True)`` would for
    indices >= 0, but each row is compared as one m-byte string, which is some 30 times
    faster than numpy's row-wise path for policies of a few hundred cells.
    """
    rows = np.ascontiguousarray(rows, dtype=np.int8)
    keys = rows.view(np.dtype((np.void, rows.shape[1])))[:, 0]
    unique, inverse, counts = np.unique(keys, return_inverse=True, return_counts=True)
    return unique.view(np.int8).reshape(len(unique), rows.shape[1]), inverse, counts


@dataclass(frozen=True)
class PSAJob:
    """The chunk job of a probabilistic run (:mod:`caredecide.chunks`): :func:`solve_chunk`."""

    context: PSAContext

    def __call__(self, start: int, stop: int) -> ChunkResult:
        return solve_chunk(self.context, start, stop)


@dataclass(frozen=True)
class SolveDrawsJob:
    """Draw, compile and solve draws ``start:stop``: ``(values, compiled, PolicyResult)``
    (the pilot, before the candidates are known)."""

    context: PSAContext

    def __call__(self, start: int, stop: int) -> tuple[np.ndarray, CompiledModel, PolicyResult]:
        return _solve_draws(self.context, start, stop)


@dataclass(frozen=True)
class EvaluateSolvedJob:
    """Evaluate draws already solved (kept pilot pieces, by range); each piece is let go
    once evaluated."""

    context: PSAContext
    solved: dict[tuple[int, int], tuple[np.ndarray, CompiledModel, PolicyResult]]

    def __call__(self, start: int, stop: int) -> ChunkResult:
        return _evaluate_chunk(self.context, *self.solved.pop((start, stop)), start, stop)


def default_chunk_size(
    model, n_draws: int, memory_limit_bytes: int | None, threads: int = 1
) -> int:
    """Draws per chunk: the fastest size (:data:`~caredecide.limits.PSA_CHUNK_BYTES`) or
    the memory budget shared by ``threads`` chunks running at once, if that is less.

    From one random-number block (BLOCK_SIZE) up it is a multiple of the block; under
    one block it is the largest divisor of the block that fits, so chunks never straddle
    blocks (each chunk draws one block's numbers at most).
    """
    budget = min(memory_budget(memory_limit_bytes) // max(threads, 1), PSA_CHUNK_BYTES)
    size = chunk_size_for(model, n_draws, max(budget, 1), block=BLOCK_SIZE)
    if size < min(BLOCK_SIZE, n_draws):
        while BLOCK_SIZE % size:
            size -= 1
    return size


def kept_bytes(n_draws: int, n_parameters: int, n_candidates: int, policy_cells: int = 0) -> int:
    """Bytes the per-draw results of a run hold at the end (twice: pieces and joined).

    Per draw: the sampled parameters, cost/QALYs/value of the own optimum and of each
    candidate (float64), and ``policy_cells`` int8 values when policies are kept.
    """
    return 2 * n_draws * (8 * (n_parameters + 3 + 3 * n_candidates) + policy_cells)


# --------------------------------------------------------------------------- the result
@dataclass
class PSAResult:
    """Everything a probabilistic analysis produced; outputs are computed on request.

    Attributes
    ----------
    n_draws, seed : int
    objective : Objective
    state_ids, action_ids : tuple of str
    decision_states : (S,) bool
        States where a choice is made (not absorbing, two or more allowed actions).
    allowed : (S, A) bool
        Actions allowed in each state.
    ages : (Tpi,) float or None
        Age at the start of each policy cycle (None: infinite horizon, Tpi = 1).
    candidates : list of Candidate
    parameter_names : tuple of str
    group_members : dict of str to tuple of str
    parameters : (D, P) float
    optimal : (D, 3) float
        Cost, QALYs, value of each draw's own optimal policy.
    candidate_totals : (3, D, K) float
        Cost, QALYs, value of each candidate in each draw.
    action_counts : (Tpi, S, A) int
    distinct_policies : (U, Tpi, S) int8, distinct_counts : (U,) int
        Every distinct per-draw optimal policy and how many draws chose it (most first).
    policies : (D, Tpi, S) int8 or None
    chunk_size : int
    iterations : list of int
    success : bool
    messages : list of str
    wtp_grid : (W,) float
    fixed_parameters : tuple of str
        Parameters held at their base value in every draw (no distribution).
    threads : int
        Threads of this process that ran the chunks (1: serial).
    cores_counted : bool
        Whether the idle cores were counted for ``workers`` (not when every step of the
        run had one chunk of draws: one chunk runs in the calling thread).
    """

    n_draws: int
    seed: int
    objective: Objective
    state_ids: tuple[str, ...]
    action_ids: tuple[str, ...]
    decision_states: np.ndarray
    allowed: np.ndarray
    ages: np.ndarray | None
    candidates: list[Candidate]
    parameter_names: tuple[str, ...]
    group_members: dict[str, tuple[str, ...]]
    parameters: np.ndarray
    optimal: np.ndarray
    candidate_totals: np.ndarray
    action_counts: np.ndarray
    distinct_policies: np.ndarray
    distinct_counts: np.ndarray
    policies: np.ndarray | None
    chunk_size: int
    iterations: list[int]
    success: bool
    messages: list[str]
    wtp_grid: np.ndarray
    fixed_parameters: tuple[str, ...] = ()
    threads: int = 1
    cores_counted: bool = False

    # -- basic arrays -------------------------------------------------------------------
    @property
    def candidate_names(self) -> list[str]:
        return [c.name for c in self.candidates]

    @property
    def candidate_values(self) -> np.ndarray:
        """(D, K) value (objective units) of each candidate in each draw."""
        return self.candidate_totals[2]

    @property
    def regret(self) -> np.ndarray:
        """(D, K) loss ``V*_d - V_k,d`` (>= 0 up to solver tolerance)."""
        return self.optimal[:, 2:3] - self.candidate_values

    # -- acceptability of the policy ------------------------------------------------------
    def acceptability(self) -> pd.DataFrame:
        """Share of draws whose optimal policy takes each action, per cycle and state.

        Returns
        -------
        pandas.DataFrame
            Columns cycle, age (years at the cycle start; NaN for an infinite horizon),
            state, action, share, mc_se; decision states and their allowed actions
            only. Shares sum to 1 over actions for each (cycle, state).
        """
        share = self.action_counts / self.n_draws
        n_t, n_s, n_a = share.shape
        ages = self.ages if self.ages is not None else np.full(n_t, np.nan)
        frame = pd.DataFrame(
            {
                "cycle": np.repeat(np.arange(n_t), n_s * n_a),
                "age": np.repeat(ages, n_s * n_a),
                "state": np.tile(np.repeat(np.asarray(self.state_ids, dtype=object), n_a), n_t),
                "action": np.tile(np.asarray(self.action_ids, dtype=object), n_t * n_s),
                "share": share.ravel(),
                "mc_se": np.sqrt(share * (1.0 - share) / self.n_draws).ravel(),
            }
        )
        shown = (self.decision_states[:, None] & self.allowed)[None].repeat(n_t, axis=0)
        return frame[shown.ravel()].reset_index(drop=True)

    def acceptability_by_age_band(self, band_years: float = 5.0) -> pd.DataFrame:
        """Acceptability averaged over age bands of ``band_years`` (from the start age).

        Returns
        -------
        pandas.DataFrame
            Columns state, age_from, age_to (years; the band holds cycles starting in
            [age_from, age_to)), action, share (mean over the band's cycles) and mc_se
            (mean of the per-cycle errors: an upper bound). Infinite horizon: one band
            with NaN ages.
        """
        if not (
            isinstance(band_years, int | float) and math.isfinite(band_years) and band_years > 0
        ):
            raise ModelError(Problem("band_years", f"{band_years!r}; expected a number > 0"))
        frame = self.acceptability()
        if self.ages is None:
            frame["age_from"] = frame["age_to"] = np.nan
        else:
            start = float(self.ages[0])
            band = np.floor((frame["age"] - start) / band_years + 1e-9)
            frame["age_from"] = start + band * band_years
            frame["age_to"] = frame["age_from"] + band_years
        grouped = frame.groupby(["state", "age_from", "age_to", "action"], sort=False, dropna=False)
        out = grouped.agg(share=("share", "mean"), mc_se=("mc_se", "mean")).reset_index()
        return out[["state", "age_from", "age_to", "action", "share", "mc_se"]]

    def policy_frequencies(self, top: int = 10) -> pd.DataFrame:
        """The ``top`` most frequent per-draw optimal policies: rank, draws, share, candidate."""
        n = min(top, len(self.distinct_counts))
        names = []
        for policy in self.distinct_policies[:n]:
            match = [c.name for c in self.candidates if np.array_equal(c.policy, policy)]
            names.append(match[0] if match else "")
        share = self.distinct_counts[:n] / self.n_draws
        return pd.DataFrame(
            {
                "rank": np.arange(1, n + 1),
                "draws": self.distinct_counts[:n],
                "share": share,
                "mc_se": np.sqrt(share * (1 - share) / self.n_draws),
                "candidate": names,
            }
        )

    # -- losses and EVPI ---------------------------------------------------------------
    def expected_loss(self) -> pd.DataFrame:
        """Expected value and expected loss (regret) of every candidate.

        Returns
        -------
        pandas.DataFrame
            Columns candidate, origin, expected_cost, expected_qalys, expected_value,
            expected_loss (``E[V* - V_k]``, objective units), mc_se; one row per
            candidate in candidate order.
        """
        regret = self.regret
        n = self.n_draws
        se = regret.std(axis=0, ddof=1) / np.sqrt(n) if n > 1 else np.full(regret.shape[1], np.nan)
        return pd.DataFrame(
            {
                "candidate": self.candidate_names,
                "origin": [c.origin for c in self.candidates],
                "expected_cost": self.candidate_totals[0].mean(axis=0),
                "expected_qalys": self.candidate_totals[1].mean(axis=0),
                "expected_value": self.candidate_values.mean(axis=0),
                "expected_loss": regret.mean(axis=0),
                "mc_se": se,
            }
        )

    @property
    def shown_action(self) -> str:
        """The action whose acceptability every front end shows first: the first action
        other than the model's first (the one that is not the default), else the only one."""
        return self.action_ids[1] if len(self.action_ids) > 1 else self.action_ids[0]

    def evpi(self) -> dict[str, float | str]:
        """EVPI of the timing decision (an upper bound; see the module docstring).

        Returns
        -------
        dict
            ``evpi`` and ``mc_se`` (objective units per person), ``best_candidate`` (the
            candidate with the highest expected value), ``expected_optimal_value``
            (``E[V*]``) and ``evpi_among_candidates`` with its ``mc_se_among_candidates``
            (``voi.evpi`` on the candidates' values: a lower figure).
        """
        loss = self.expected_loss()
        best = int(np.argmax(loss["expected_value"].to_numpy()))
        among = evpi(self.candidate_values)
        return {
            "evpi": float(loss["expected_loss"].iloc[best]),
            "mc_se": float(loss["mc_se"].iloc[best]),
            "best_candidate": self.candidate_names[best],
            "expected_optimal_value": float(self.optimal[:, 2].mean()),
            "evpi_among_candidates": float(among),
            "mc_se_among_candidates": float(among.standard_error),
        }

    # -- cost-effectiveness acceptability --------------------------------------------------
    def acceptability_curves(self, wtp_grid: Sequence[float] | None = None) -> pd.DataFrame:
        """Probability each candidate has the highest net monetary benefit, per WTP.

        Columns wtp, strategy, probability_cost_effective, mc_se
        (:func:`caredecide.uncertainty.acceptability.acceptability_curve`).
        """
        grid = self.wtp_grid if wtp_grid is None else np.asarray(wtp_grid, dtype=float)
        return acceptability_curve(
            self.candidate_totals[0],
            self.candidate_totals[1],
            grid,
            strategies=self.candidate_names,
        )

    def acceptability_frontier(self, wtp_grid: Sequence[float] | None = None) -> pd.DataFrame:
        """The candidate with the highest expected NMB at each WTP, and its probability."""
        grid = self.wtp_grid if wtp_grid is None else np.asarray(wtp_grid, dtype=float)
        return acceptability_frontier(
            self.candidate_totals[0],
            self.candidate_totals[1],
            grid,
            strategies=self.candidate_names,
        )

    # -- EVPPI ---------------------------------------------------------------------------
    def evppi(
        self, *, method: str = "auto", max_draws: int | None = EVPPI_MAX_DRAWS
    ) -> pd.DataFrame:
        """EVPPI of each sampled parameter and each Dirichlet group, ranked.

        Regression method of Strong, Oakley & Brennan 2014 (:func:`~caredecide.
        uncertainty.voi.evppi_regression`) on the candidates' values; a Dirichlet group
        of ``k`` members is regressed on its first ``k - 1`` members (the last is
        determined by them).

        Parameters
        ----------
        method : str
            The smoother (see :mod:`caredecide.uncertainty.voi`).
        max_draws : int or None
            Regress on the first ``max_draws`` draws only (default
            :data:`EVPPI_MAX_DRAWS`; None: all). The draws are independent, so the first
            ones are a random sample; the cap bounds the regressions' memory (a
            tensor-product fit holds several (D, 64) or (D, 125) arrays) and time.

        Returns
        -------
        pandas.DataFrame
            Columns parameter, members, evppi, mc_se, share_of_evpi (EVPPI / EVPI among
            candidates on the same draws), method, edf (largest effective degrees of
            freedom), draws (used in the regression), message; sorted by EVPPI, largest
            first. Empty with a note when the draws or candidates are too few.
        """
        columns = [
            "parameter",
            "members",
            "evppi",
            "mc_se",
            "share_of_evpi",
            "method",
            "edf",
            "draws",
            "message",
        ]
        check_scalar(max_draws, "max_draws", int, min_val=MIN_EVPPI_DRAWS, allow_none=True)
        used = self.n_draws if max_draws is None else min(self.n_draws, max_draws)
        values = self.candidate_values[:used]
        if values.shape[1] < 2 or used < MIN_EVPPI_DRAWS or not self.parameter_names:
            return pd.DataFrame(columns=columns)
        total = float(evpi(values))
        grouped = {m for members in self.group_members.values() for m in members}
        targets: list[tuple[str, tuple[str, ...]]] = [
            (n, (n,)) for n in self.parameter_names if n not in grouped
        ]
        targets += [(g, members[:-1]) for g, members in self.group_members.items()]
        rows = []
        for name, members in targets:  # a loop over parameters, each fit vectorized
            index = [self.parameter_names.index(m) for m in members]
            try:
                fit = evppi_regression(values, self.parameters[:used, index], method=method)
            except ModelError as error:
                rows.append(
                    (name, ",".join(members), np.nan, np.nan, np.nan, "", np.nan, used, str(error))
                )
                continue
            rows.append(
                (
                    name,
                    ",".join(members),
                    fit.value,
                    fit.standard_error,
                    fit.value / total if total > 0 else np.nan,
                    fit.method,
                    float(np.nanmax(fit.effective_degrees_of_freedom)),
                    used,
                    fit.message,
                )
            )
        frame = pd.DataFrame(rows, columns=columns)
        return frame.sort_values(
            "evppi", ascending=False, na_position="last", kind="stable"
        ).reset_index(drop=True)

    # -- convergence -----------------------------------------------------------------------
    def convergence(self, points: int = CONVERGENCE_POINTS) -> pd.DataFrame:
        """Running means and errors against the number of draws (thinned for plots).

        Quantities: ``expected optimal value`` (``V*``) and ``EVPI`` (the regret of the
        candidate best over all draws, i.e. the running EVPI estimator with the final
        choice of candidate).

        Returns
        -------
        pandas.DataFrame
            Columns quantity, n, mean, se; at most ``points`` draw counts per quantity,
            geometrically spaced, always including the last.
        """
        best = int(np.argmax(self.candidate_values.mean(axis=0)))
        rows = (
            np.unique(np.geomspace(1, self.n_draws, num=min(points, self.n_draws)).astype(int)) - 1
        )
        frames = []
        for quantity, values in (
            ("expected optimal value", self.optimal[:, 2]),
            ("EVPI", self.regret[:, best]),
        ):
            running = running_mean(values).iloc[rows]
            frames.append(running.assign(quantity=quantity))
        return pd.concat(frames, ignore_index=True)[["quantity", "n", "mean", "se"]]

    # -- probabilistic means per strategy -------------------------------------------------
    def to_frame(self) -> pd.DataFrame:
        """Mean cost, effect and ICER of every candidate (:meth:`strategy_summary`)."""
        return self.strategy_summary()

    def to_dict(self) -> dict:
        """The run's summary (draws, seed, EVPI, candidates) as plain values (:meth:`summary`)."""
        return self.summary()

    def strategy_summary(self, reference: str | None = None, level: float = 0.95) -> pd.DataFrame:
        """Probabilistic mean cost, effect and ICER of every candidate, with intervals.

        Means over the draws; intervals are the percentile intervals of the draws
        (central ``level``; common practice for probabilistic results, e.g. Briggs,
        Claxton & Sculpher 2006, ch. 4, from memory). Incremental figures are per-draw
        differences against ``reference``; the ICER is the ratio of the mean
        differences (a ratio of means, never a mean of ratios). The last row is each
        draw's own optimal policy: the outcome with perfect information, not a policy
        one can adopt today.

        Parameters
        ----------
        reference : str, optional
            Candidate name (default: the candidate with the lowest mean cost).
        level : float
            Interval coverage in (0, 1).

        Returns
        -------
        pandas.DataFrame
            Columns strategy, origin, mean_cost, cost_low, cost_high, mean_qalys,
            qalys_low, qalys_high, incremental_cost, incremental_cost_low,
            incremental_cost_high, incremental_qalys, incremental_qalys_low,
            incremental_qalys_high, icer (money per QALY; NaN for the reference or a
            zero QALY difference), icer_low, icer_high (bootstrap percentile interval of
            the ratio of mean differences; NaN where the interval of the mean QALY
            difference contains 0, as the ratio then has no interval), mean_value,
            value_low, value_high (objective units),
            probability_best (share of draws where it has the highest value among the
            candidates), reference. Costs discounted, per person.
        """
        if not (isinstance(level, int | float) and 0 < level < 1):
            raise ModelError(Problem("level", f"value {level!r}; expected a number in (0, 1)"))
        names = self.candidate_names
        if reference is None:
            reference = names[int(np.argmin(self.candidate_totals[0].mean(axis=0)))]
        if reference not in names:
            raise ModelError(
                Problem("reference", f"unknown strategy {reference!r}; expected one of {names}")
            )
        ref = names.index(reference)
        cost = np.column_stack([self.candidate_totals[0], self.optimal[:, 0]])  # (D, K + 1)
        qalys = np.column_stack([self.candidate_totals[1], self.optimal[:, 1]])
        value = np.column_stack([self.candidate_totals[2], self.optimal[:, 2]])
        tails = [50 * (1 - level), 100 - 50 * (1 - level)]

        def interval(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
            low, high = np.percentile(x, tails, axis=0)
            return low, high

        d_cost = cost - cost[:, ref : ref + 1]
        d_qalys = qalys - qalys[:, ref : ref + 1]
        best = np.argmax(self.candidate_values, axis=1)
        probability = np.bincount(best, minlength=len(names)) / self.n_draws
        mean_dc, mean_dq = d_cost.mean(axis=0), d_qalys.mean(axis=0)
        with np.errstate(divide="ignore", invalid="ignore"):
            icer = np.where(mean_dq != 0, mean_dc / mean_dq, np.nan)
        icer[ref] = np.nan
        columns = {
            "strategy": [*names, "each draw's own optimal policy (perfect information)"],
            "origin": [c.origin for c in self.candidates] + ["perfect information"],
            "mean_cost": cost.mean(axis=0),
        }
        columns["cost_low"], columns["cost_high"] = interval(cost)
        columns["mean_qalys"] = qalys.mean(axis=0)
        columns["qalys_low"], columns["qalys_high"] = interval(qalys)
        columns["incremental_cost"] = mean_dc
        columns["incremental_cost_low"], columns["incremental_cost_high"] = interval(d_cost)
        columns["incremental_qalys"] = mean_dq
        columns["incremental_qalys_low"], columns["incremental_qalys_high"] = interval(d_qalys)
        columns["icer"] = icer
        columns["icer_low"], columns["icer_high"] = _icer_interval(
            d_cost, d_qalys, ref, level, self.seed
        )
        columns["mean_value"] = value.mean(axis=0)
        columns["value_low"], columns["value_high"] = interval(value)
        columns["probability_best"] = np.append(probability, np.nan)
        columns["reference"] = reference
        return pd.DataFrame(columns)

    def plane_frame(self, max_draws: int = PLANE_DRAWS) -> pd.DataFrame:
        """Draws for a cost-effectiveness plane: strategy, draw, cost, qalys (long form).

        At most the first ``max_draws`` draws per candidate (independent draws, so the
        first ones are a random sample), for a readable scatter.
        """
        return plane_table(self.candidate_names, self.candidate_totals, max_draws)

    def population_value_of_information(
        self,
        per_year: float,
        years: int,
        discount_rate: float,
        evppi: pd.DataFrame | None = None,
    ) -> pd.DataFrame:
        """EVPI (and EVPPI) per person and for the population the decision concerns.

        The population is :func:`caredecide.uncertainty.voi.discounted_population`
        (``per_year`` persons a year over ``years`` years, discounted at
        ``discount_rate``).

        Returns
        -------
        pandas.DataFrame
            Columns quantity, per_person, mc_se, population, population_mc_se, persons
            (the discounted population), per_year, years, discount_rate; rows: the
            timing decision's EVPI (upper bound), the EVPI among candidates, then one
            row per EVPPI entry of ``evppi`` (:meth:`evppi`) when given.
        """
        persons = discounted_population(per_year, years, discount_rate)
        info = self.evpi()
        rows = [
            ("EVPI: timing decision (upper bound)", info["evpi"], info["mc_se"]),
            ("EVPI: choice among candidates", info["evpi_among_candidates"],
             info["mc_se_among_candidates"]),
        ]  # fmt: skip
        if evppi is not None:
            rows += [
                (f"EVPPI: {row.parameter}", row.evppi, row.mc_se) for row in evppi.itertuples()
            ]
        frame = pd.DataFrame(rows, columns=["quantity", "per_person", "mc_se"])
        frame["population"] = frame["per_person"] * persons
        frame["population_mc_se"] = frame["mc_se"] * persons
        frame["persons"] = persons
        frame["per_year"] = float(per_year)
        frame["years"] = int(years)
        frame["discount_rate"] = float(discount_rate)
        return frame

    # -- tables for export -------------------------------------------------------------------
    def draws_frame(self) -> pd.DataFrame:
        """One row per draw: parameters, the optimal policy's totals and each candidate's
        cost, QALYs and value (discounted, per person)."""
        frame = pd.DataFrame(self.parameters, columns=list(self.parameter_names))
        frame.insert(0, "draw", np.arange(self.n_draws))
        for j, column in enumerate(("optimal_cost", "optimal_qalys", "optimal_value")):
            frame[column] = self.optimal[:, j]
        for k, name in enumerate(self.candidate_names):
            frame[f"cost: {name}"] = self.candidate_totals[0, :, k]
            frame[f"qalys: {name}"] = self.candidate_totals[1, :, k]
            frame[f"value: {name}"] = self.candidate_values[:, k]
        return frame

    def candidates_frame(self) -> pd.DataFrame:
        """Candidates as a long table: candidate, origin, also, cycle, age, state, action."""
        rows = []
        n_t = self.action_counts.shape[0]
        ages = self.ages if self.ages is not None else np.full(n_t, np.nan)
        for c in self.candidates:
            frame = pd.DataFrame(
                {
                    "candidate": c.name,
                    "origin": c.origin,
                    "also": "; ".join(c.also),
                    "cycle": np.repeat(np.arange(n_t), len(self.state_ids)),
                    "age": np.repeat(ages, len(self.state_ids)),
                    "state": np.tile(np.asarray(self.state_ids, dtype=object), n_t),
                    "action": np.asarray(self.action_ids, dtype=object)[c.policy.ravel()],
                }
            )
            rows.append(frame)
        return pd.concat(rows, ignore_index=True)

    def summary(self) -> dict:
        """Headline figures (plain Python values, for JSON)."""
        info = self.evpi()
        return {
            "draws": self.n_draws,
            "seed": self.seed,
            "objective": self.objective.to_dict(),
            "chunk_size": self.chunk_size,
            "solver_success": self.success,
            **info,
            "candidates": self.candidate_names,
            "distinct_optimal_policies": len(self.distinct_counts),
            "share_most_frequent_policy": float(self.distinct_counts[0] / self.n_draws),
            "parameters_held_fixed": list(self.fixed_parameters),
        }


# --------------------------------------------------------------------------- the driver
def analyse_uncertainty(
    model,
    n_draws: int,
    seed: int,
    *,
    objective: Objective | None = None,
    wtp_range: tuple[float, float] | None = None,
    wtp_points: int = DEFAULT_WTP_POINTS,
    chunk_size: int | None = None,
    memory_limit_bytes: int | None = None,
    rank_correlation: Mapping[tuple[str, str], float] | None = None,
    strategies: Sequence | None = None,
    n_frequent: int = DEFAULT_FREQUENT,
    keep_policies: bool = False,
    map_chunks: ChunkMap | None = None,
    workers: int | None = None,
    progress: Callable[[int, int], None] | None = None,
    plane_ready: Callable[[pd.DataFrame], None] | None = None,
    **solve_options,
) -> PSAResult:
    """Probabilistic sensitivity analysis of the optimal timing policy.

    Parameters
    ----------
    model : caredecide.model.Model
        A validated model.
    n_draws : int
        Number of parameter draws ``D`` (>= 1).
    seed : int
        >= 0; fixes every draw (independent of chunking and of where chunks run).
    objective : Objective, optional
        Default: the model's own objective and willingness to pay.
    wtp_range : (low, high), optional
        Willingness to pay per QALY for the acceptability curves (default: 0 to twice
        the objective's WTP, or 0 to 100,000 when that is 0).
    wtp_points : int
        Points of the WTP grid (>= 2).
    chunk_size : int, optional
        Draws per chunk (default from ``memory_limit_bytes``, a multiple of
        ``BLOCK_SIZE``). Results do not depend on it.
    memory_limit_bytes : int, optional
        Working-memory budget of one chunk (default
        :func:`caredecide.chunks.memory_budget`).
    rank_correlation : mapping, optional
        Rank correlations between parameters (Iman-Conover; see sampling).
    strategies : sequence of caredecide.strategies.Strategy, optional
        Extra fixed strategies to add as candidates (e.g. from a strategy table); the
        model's default strategies are always included.
    n_frequent : int
        Most frequent per-draw optimal policies in the pilot added as candidates.
    keep_policies : bool
        Keep every draw's optimal policy ((D, Tpi, S) int8).
    map_chunks : callable(job, ranges) -> iterable of ChunkResult, optional
        How chunks run (the one chunk driver, :mod:`caredecide.chunks`):
        :func:`~caredecide.chunks.serial_map` (default) or
        :func:`~caredecide.chunks.dask_map`. Must yield results in order.
    workers : int, optional
        Run the chunks (the pilot's too) on up to this many threads of this process
        (:func:`~caredecide.chunks.thread_map`), as many as there are idle cores
        (:func:`~caredecide.chunks.usable_threads`, watched from the start of the run
        while it works; counted when a step first has more than one chunk: a single chunk
        runs in this thread); not with ``map_chunks``. Default: serial. The results are
        the same.
    progress : callable(done, total), optional
        Called after each chunk with draws done and ``n_draws``.
    plane_ready : callable(frame), optional
        Called once, as soon as the first :data:`PLANE_DRAWS` draws (all of them when
        fewer) are evaluated, with the table the result's ``plane_frame()`` will return:
        a front end can start drawing the scatter while the other draws are solved.
    **solve_options
        Passed to :func:`caredecide.solvers.solve`.

    Returns
    -------
    PSAResult
    """
    from caredecide.strategies import default_strategies, resolve_strategy

    n_draws = check_draw_count(n_draws)
    seed = check_seed(seed)
    if objective is None:
        objective = Objective.from_settings(model.settings)
    wtp_grid = _wtp_grid(objective, wtp_range, wtp_points)
    check_scalar(n_frequent, "n_frequent", int, min_val=0)
    limit = memory_budget(memory_limit_bytes)
    watch = None
    requested = 1
    if workers is not None:
        if map_chunks is not None:
            raise RunOptionError("workers", workers, "None when map_chunks is given")
        requested = check_scalar(workers, "workers", int, min_val=1)
        # The idle cores are watched from now while this process works on; the threads
        # are counted when a step first has more than one chunk to run (no wait).
        watch = IdleWatch(own_work_idle=True)
    decided: list[int] = []

    def local_map(n_chunks: int) -> ChunkMap:
        """Where this process's own chunks run: ``n_chunks`` of them."""
        if watch is None or (not decided and n_chunks <= 1):
            return serial_map
        if not decided:
            decided.append(usable_threads(requested, watch))
        return thread_map(decided[0])

    if chunk_size is None:  # shared memory budget: as many chunks at once as may run
        chunk_size = default_chunk_size(model, n_draws, limit, min(requested, os.cpu_count() or 1))
    else:
        chunk_size = check_scalar(chunk_size, "chunk_size", int, min_val=1)
    sampler = ParameterSampler.from_model(model, rank_correlation=rank_correlation)
    context = PSAContext(
        model=model,
        objective=objective,
        sampler=sampler,
        seed=seed,
        candidate_policies=np.empty((0, 0, 0), dtype=np.int8),
        keep_policies=keep_policies,
        memory_limit_bytes=limit,
        solve_options=tuple(sorted(solve_options.items())),
    )

    # Candidates: base case, mean parameters, fixed strategies, pilot favourites.
    base = compile_model(model, memory_limit_bytes=limit)
    named: list[tuple[str, str, np.ndarray]] = [
        ("base-case optimal policy", ORIGIN_BASE, solve(base, objective, **solve_options).policy[0])
    ]
    at_mean = compile_model(
        model,
        {k: np.array([v]) for k, v in sampler.means().items()} or None,
        memory_limit_bytes=limit,
    )
    named.append(
        (
            "optimal at mean parameters",
            ORIGIN_MEAN,
            solve(at_mean, objective, **solve_options).policy[0],
        )
    )
    for strategy in [*default_strategies(base), *(strategies or ())]:
        named.append((strategy.name, ORIGIN_STRATEGY, resolve_strategy(base, strategy).policy))
    # The pilot (first block) picks the frequent optima, solved chunk by chunk in this
    # process. When it fits the memory budget (or one chunk) its solved chunks are kept and
    # evaluated once the candidate set is known; otherwise only their policies are kept
    # and its draws run again below.
    pilot_stop = min(n_draws, BLOCK_SIZE) if n_frequent else 0
    pilot: dict[tuple[int, int], tuple[np.ndarray, CompiledModel, PolicyResult]] = {}
    keep_pilot = chunk_size >= pilot_stop or pilot_stop * draw_bytes(model) <= limit
    if pilot_stop:
        pilot_ranges = chunk_ranges(pilot_stop, chunk_size)
        pieces = []
        for (a, b), solved in zip(
            pilot_ranges,
            run_chunks(
                SolveDrawsJob(context), pilot_ranges, map_chunks=local_map(len(pilot_ranges))
            ),
            strict=True,
        ):
            pieces.append(solved[2].policy.astype(np.int8))
            if keep_pilot:
                pilot[(a, b)] = solved
            del solved
        pilot_policies = np.concatenate(pieces)
        policies = pilot_policies.reshape(pilot_stop, -1)
        distinct, _, counts = distinct_rows(policies)
        order = np.argsort(-counts, kind="stable")[:n_frequent]
        for rank, u in enumerate(order, start=1):
            policy = distinct[u].reshape(pilot_policies.shape[1:])
            named.append(
                (
                    f"frequent optimum {rank} ({counts[u] / pilot_stop:.0%} of pilot draws)",
                    ORIGIN_FREQUENT,
                    policy,
                )
            )
        del pilot_policies, policies, pieces
    candidates = _merge_candidates(named)
    context = replace(context, candidate_policies=np.stack([c.policy for c in candidates]))
    # The per-draw results grow with the draws (the chunks do not): refuse at once a run
    # whose results cannot fit, rather than after hours of work.
    cells = candidates[0].policy.size if keep_policies else 0
    needed = kept_bytes(n_draws, sampler.n_parameters, len(candidates), cells)
    available = default_memory_limit()
    if needed > available:
        raise ModelTooLargeError(
            f"draws = {n_draws:,}: the per-draw results would need about "
            f"{needed / 2**30:.1f} GiB ({sampler.n_parameters} parameters and "
            f"{len(candidates)} candidate policies per draw"
            f"{', policies kept' if keep_policies else ''}); expected at most "
            f"{available / 2**30:.1f} GiB (half the available memory). Use fewer draws"
            f"{' or keep_policies=False' if keep_policies else ''}"
        )

    chunks: list[ChunkResult] = []
    names = [c.name for c in candidates]
    plane_stop = min(n_draws, PLANE_DRAWS) if plane_ready is not None else None

    def collect(results: Iterable[ChunkResult]) -> None:
        nonlocal plane_stop
        for chunk in results:
            chunks.append(chunk)
            if plane_stop is not None and chunk.stop >= plane_stop:
                totals = np.concatenate([c.candidates for c in chunks], axis=1)
                plane_stop = None
                assert plane_ready is not None
                plane_ready(plane_table(names, totals, PLANE_DRAWS))

    done = 0
    if pilot:
        collect(
            run_chunks(
                EvaluateSolvedJob(context, pilot),
                list(pilot),
                map_chunks=local_map(len(pilot)),
                progress=progress,
                total=n_draws,
            )
        )
        done = pilot_stop
    ranges = [(a + done, b + done) for a, b in chunk_ranges(n_draws - done, chunk_size)]
    collect(
        run_chunks(
            PSAJob(context),
            ranges,
            map_chunks=map_chunks or local_map(len(ranges)),
            progress=progress,
            total=n_draws,
        )
    )
    result = _combine(chunks, context, candidates, base, wtp_grid, chunk_size)
    result.threads = decided[0] if decided else 1
    result.cores_counted = bool(decided)
    return result


ICER_BOOTSTRAP = 1000
"""Resamples of the draws for the ICER interval."""


def plane_table(names: Sequence[str], totals: np.ndarray, max_draws: int) -> pd.DataFrame:
    """Long-form scatter of the first ``max_draws`` draws: strategy, draw, cost, qalys.

    ``totals`` is (2 or more, D, K): cost and QALYs of each candidate in each draw.
    """
    n = min(totals.shape[1], int(max_draws))
    K = len(names)
    return pd.DataFrame(
        {
            "strategy": np.tile(np.asarray(names, dtype=object), n),
            "draw": np.repeat(np.arange(n), K),
            "cost": totals[0, :n].ravel(),
            "qalys": totals[1, :n].ravel(),
        }
    )


BOOTSTRAP_BLOCK = 100
"""Resamples built at once (a (BOOTSTRAP_BLOCK, D) table of weights)."""


def _icer_interval(
    d_cost: np.ndarray, d_qalys: np.ndarray, reference: int, level: float, seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """Percentile interval of the ICER by the non-parametric bootstrap of the draws.

    Resample the ``D`` draws with replacement :data:`ICER_BOOTSTRAP` times; in each
    resample the ICER is the ratio of the mean differences (Briggs, Wonderling & Mooney
    1997, Health Econ 6:327-340, from memory). Where the interval of the mean QALY
    difference contains zero the ratio is unbounded there: NaN. ``d_cost``, ``d_qalys``
    are (D, K) differences against the reference column.
    """
    D, K = d_cost.shape
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 1997]))
    tails = [50 * (1 - level), 100 - 50 * (1 - level)]
    low = np.full(K, np.nan)
    high = np.full(K, np.nan)
    if D < 2:
        return low, high
    # Each resample as the share of each draw in it, (n, D), counted from D indices drawn
    # with replacement: the multinomial law, at a fraction of the cost of sampling a
    # multinomial of D categories. Blocks of resamples bound the memory.
    mean_dc = np.empty((ICER_BOOTSTRAP, K))
    mean_dq = np.empty((ICER_BOOTSTRAP, K))
    for first in range(0, ICER_BOOTSTRAP, BOOTSTRAP_BLOCK):
        n = min(BOOTSTRAP_BLOCK, ICER_BOOTSTRAP - first)
        index = rng.integers(0, D, size=(n, D)) + (np.arange(n) * D)[:, None]
        weights = np.bincount(index.ravel(), minlength=n * D).reshape(n, D) / D
        mean_dc[first : first + n] = weights @ d_cost  # (n, K)
        mean_dq[first : first + n] = weights @ d_qalys
    q_low, q_high = np.percentile(mean_dq, tails, axis=0)
    bounded = (q_low > 0) | (q_high < 0)
    bounded[reference] = False
    with np.errstate(divide="ignore", invalid="ignore"):
        ratios = mean_dc / mean_dq
    if bounded.any():
        low[bounded], high[bounded] = np.percentile(ratios[:, bounded], tails, axis=0)
    return low, high


def _merge_candidates(named: list[tuple[str, str, np.ndarray]]) -> list[Candidate]:
    """Candidates with distinct policies; later duplicates become ``also`` names."""
    kept: list[Candidate] = []
    for name, origin, policy in named:
        policy = np.asarray(policy, dtype=np.int8)
        for i, c in enumerate(kept):
            if np.array_equal(c.policy, policy):
                kept[i] = replace(c, also=(*c.also, name))
                break
        else:
            kept.append(Candidate(name=name, origin=origin, policy=policy))
    return kept


def _wtp_grid(objective: Objective, wtp_range, points: int) -> np.ndarray:
    check_scalar(points, "wtp_points", int, min_val=2)
    if wtp_range is None:
        high = 2 * objective.willingness_to_pay or WTP_SEARCH_MAX_WHEN_ZERO  # the one rule
        return np.linspace(0.0, high, points)
    try:
        low, high = (float(x) for x in wtp_range)
    except (TypeError, ValueError):
        raise ModelError(
            Problem("wtp_range", f"{wtp_range!r}; expected two numbers LOW HIGH")
        ) from None
    if not (math.isfinite(low) and math.isfinite(high) and 0 <= low < high):
        raise ModelError(
            Problem(
                "wtp_range", f"({low!r}, {high!r}); expected 0 <= LOW < HIGH (currency per QALY)"
            )
        )
    return np.linspace(low, high, points)


def _combine(
    chunks: list[ChunkResult],
    context: PSAContext,
    candidates: list[Candidate],
    base,
    wtp_grid: np.ndarray,
    chunk_size: int,
) -> PSAResult:
    """Reduce the chunk results (in draw order) into one :class:`PSAResult`."""
    starts = [c.start for c in chunks]
    if starts != sorted(starts) or chunks[0].start != 0:
        raise RuntimeError("chunk results arrived out of order; the runner must keep order")
    n_draws = chunks[-1].stop
    distinct = np.concatenate([c.distinct_policies for c in chunks])
    counts = np.concatenate([c.distinct_counts for c in chunks])
    flat = distinct.reshape(len(distinct), -1)
    unique, inverse, _ = distinct_rows(flat)
    totals = np.bincount(np.ravel(inverse), weights=counts, minlength=len(unique)).astype(np.int64)
    order = np.lexsort((np.arange(len(unique)), -totals))  # most frequent first, then by policy
    n_t = base.n_cycles if base.n_cycles is not None else 1
    ages = base.ages()[:n_t] if base.n_cycles is not None else None
    return PSAResult(
        n_draws=n_draws,
        seed=context.seed,
        objective=context.objective,
        state_ids=base.state_ids,
        action_ids=base.action_ids,
        decision_states=~base.absorbing & (base.allowed.sum(axis=1) >= 2),
        allowed=base.allowed.copy(),
        ages=ages,
        candidates=candidates,
        parameter_names=context.sampler.names,
        group_members=context.sampler.group_members,
        parameters=np.concatenate([c.parameters for c in chunks]),
        optimal=np.concatenate([c.optimal for c in chunks]),
        candidate_totals=np.concatenate([c.candidates for c in chunks], axis=1),
        action_counts=np.sum([c.action_counts for c in chunks], axis=0),
        distinct_policies=unique[order].reshape(len(unique), *distinct.shape[1:]),
        distinct_counts=totals[order],
        policies=(np.concatenate([c.policies for c in chunks]) if context.keep_policies else None),
        chunk_size=chunk_size,
        iterations=[c.iterations for c in chunks],
        success=all(c.success for c in chunks),
        messages=[c.message for c in chunks if c.message],
        wtp_grid=wtp_grid,
        fixed_parameters=tuple(
            n for n in context.model.parameter_names() if n not in context.sampler.names
        ),
    )
