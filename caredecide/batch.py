"""Batches of given parameter sets through the one chunk driver (:mod:`caredecide.chunks`).

``solve_batch`` splits ``D`` parameter sets into chunks sized from the memory budget, runs
``compile_model -> solve -> evaluate_policy`` on each (the one core path, as a
:class:`BatchJob`) with a serial or Dask map, and either concatenates the kept fields or
hands each chunk to a reducing callback, so peak memory stays bounded however many draws
there are.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from caredecide.chunks import (  # noqa: F401  (the one memory rule, re-exported)
    RESULT_ARRAYS_PER_CELL,
    ChunkMap,
    chunk_ranges,
    chunk_size_for,
    draw_bytes,
    draw_working_bytes,
    run_chunks,
)
from caredecide.compile import compile_model
from caredecide.compiled import CompiledModel
from caredecide.evaluate import PolicyOutcome, evaluate_policy
from caredecide.objective import Objective
from caredecide.options import check_scalar
from caredecide.solvers import PolicyResult, SolverError, solve

RESULT_FIELDS = (
    "policy",
    "value",
    "q_values",
    "action_gap",
    "next_best_action",
    "indifferent",
    "error_bound",
)
"""Fields of :class:`PolicyResult` that ``keep`` may name (concatenated over draws)."""
OUTCOME_FIELDS = ("totals", "trace")
"""``"totals"``: a DataFrame of per-draw totals; ``"trace"``: (D, T + 1, S) cohort trace."""
DEFAULT_KEEP = ("policy", "value", "action_gap", "indifferent", "totals")

ChunkReducer = Callable[[int, int, PolicyResult, PolicyOutcome | None], object]


@dataclass(frozen=True)
class Solved:
    """A compiled batch, its optimal policies and their cohort traces and totals."""

    compiled: CompiledModel
    solution: PolicyResult
    outcome: PolicyOutcome


def solve_and_evaluate(
    model: Any,
    objective: Objective,
    *,
    compiled: CompiledModel | None = None,
    parameter_sets: Any = None,
    **solve_options: Any,
) -> Solved:
    """compile -> solve -> evaluate the optimal policy: the one place the three are chained.

    ``compiled`` is used when given (the base case from validation); otherwise the model
    is compiled for ``parameter_sets`` (None: the base case). The core functions are
    looked up at call time, so the verification battery's self-checks can replace one.
    The evaluation uses the solver's transition form; when the solver read the
    transitions into sparse rows (a large model with few moves per state), it gets those
    rows from the solution
    (``PolicyResult.transition_rows``): the dense transitions are read into CSR (and their
    rows checked) once per base case.
    """
    from caredecide.compile import compile_model
    from caredecide.evaluate import evaluate_policy
    from caredecide.solvers import solve

    if compiled is None:
        compiled = compile_model(model, parameter_sets)
    solution = solve(compiled, objective, **solve_options)
    outcome = evaluate_policy(
        compiled,
        solution.policy,
        objective,
        transition_rows=solution.transition_rows,  # None unless solved with sparse rows
        transition_form=solution.transition_form,  # the cohort moves as the solver read
    )
    return Solved(compiled, solution, outcome)


@dataclass
class ChunkOutput:
    """What :class:`BatchJob` returns for one chunk (small: kept fields and reductions)."""

    fields: dict[str, np.ndarray]
    totals: pd.DataFrame | None
    reduction: object
    iterations: int
    message: str
    error_bound: float
    success: bool
    method: str
    state_ids: tuple[str, ...]
    action_ids: tuple[str, ...]
    ages: np.ndarray | None


@dataclass(frozen=True)
class BatchJob:
    """Compile, solve (and evaluate) the parameter sets ``start:stop`` of a batch.

    A chunk job of :mod:`caredecide.chunks`: a pure function of its range, picklable when
    ``reduce`` is.
    """

    model: Any
    parameter_sets: Any
    objective: Objective
    keep: tuple[str, ...]
    reduce: ChunkReducer | None
    memory_limit_bytes: int | None
    solve_options: tuple[tuple[str, Any], ...]

    def __call__(self, start: int, stop: int) -> ChunkOutput:
        compiled = compile_model(
            self.model,
            slice_parameter_sets(self.parameter_sets, start, stop),
            memory_limit_bytes=self.memory_limit_bytes,
        )
        result = solve(compiled, self.objective, **dict(self.solve_options))
        outcome = None
        if any(k in OUTCOME_FIELDS for k in self.keep):
            outcome = evaluate_policy(compiled, result.policy, self.objective)
        del compiled
        fields = {}
        for name in self.keep:
            if name == "trace":
                assert outcome is not None
                fields[name] = outcome.trace
            elif name != "totals":
                fields[name] = getattr(result, name)
        totals = None
        if outcome is not None and "totals" in self.keep:
            totals = outcome.totals_frame()
            totals["draw"] += start
        reduction = self.reduce(start, stop, result, outcome) if self.reduce else None
        return ChunkOutput(
            fields=fields,
            totals=totals,
            reduction=reduction,
            iterations=int(result.iterations),
            message=str(result.message),
            error_bound=float(np.max(result.error_bound)),
            success=bool(result.success),
            method=result.method,
            state_ids=result.state_ids,
            action_ids=result.action_ids,
            ages=result.ages,
        )


@dataclass
class BatchResult:
    """Results of :func:`solve_batch` for ``D`` parameter sets.

    Attributes
    ----------
    fields : dict of str to numpy.ndarray
        Kept :class:`PolicyResult` fields, concatenated along the draw axis (e.g.
        ``fields["policy"]`` (D, Tpi, S)), and ``"trace"`` when kept.
    totals : pandas.DataFrame or None
        One row per draw (``draw`` is the global index): discounted and undiscounted
        life-years, QALYs, costs, net monetary benefit and value under the optimal policy.
    reductions : list
        What the ``reduce`` callback returned for each chunk, in order.
    n_draws, chunk_size : int
    iterations : list of int
        Solver iterations per chunk.
    success : bool
        Every chunk's solver succeeded.
    messages : list of str
        Solver messages per chunk.
    method : str
    objective : Objective
    state_ids, action_ids : tuple of str
    ages : (Tpi + 1,) float or None
    """

    fields: dict[str, np.ndarray]
    totals: pd.DataFrame | None
    reductions: list
    n_draws: int
    chunk_size: int
    iterations: list[int]
    success: bool
    messages: list[str]
    method: str
    objective: Objective
    state_ids: tuple[str, ...]
    action_ids: tuple[str, ...]
    ages: np.ndarray | None
    error_bound: float = 0.0
    extra: dict = field(default_factory=dict)


def count_parameter_sets(parameter_sets: object) -> int:
    """Number of parameter sets: 1 for None, rows of a DataFrame, length of mapping values."""
    if parameter_sets is None:
        return 1
    if isinstance(parameter_sets, pd.DataFrame):
        return len(parameter_sets)
    if isinstance(parameter_sets, Mapping):
        lengths = {np.atleast_1d(np.asarray(v)).shape[0] for v in parameter_sets.values()}
        if len(lengths) > 1:
            raise SolverError(
                f"parameter sets have different lengths {sorted(lengths)}; "
                "expected one length for every parameter"
            )
        return lengths.pop() if lengths else 1
    raise SolverError(
        f"parameter_sets must be None, a mapping of arrays or a DataFrame; got "
        f"{type(parameter_sets).__name__}"
    )


def slice_parameter_sets(parameter_sets: Any, start: int, stop: int) -> Any:
    """Parameter sets ``start:stop`` in the same form (None stays None)."""
    if parameter_sets is None:
        return None
    if isinstance(parameter_sets, pd.DataFrame):
        return parameter_sets.iloc[start:stop]
    return {k: np.atleast_1d(np.asarray(v))[start:stop] for k, v in parameter_sets.items()}


def solve_batch(
    model,
    parameter_sets: object,
    objective: Objective | None = None,
    *,
    chunk_size: int | None = None,
    memory_limit_bytes: int | None = None,
    progress: Callable[[int, int], None] | None = None,
    keep: Sequence[str] = DEFAULT_KEEP,
    reduce: ChunkReducer | None = None,
    map_chunks: ChunkMap | None = None,
    **solve_options,
) -> BatchResult:
    """Solve ``model`` for many parameter sets, chunk by chunk.

    Parameters
    ----------
    model : caredecide.model.Model
        A validated model (:func:`caredecide.modelfile.load_model`).
    parameter_sets : None, mapping name -> (D,) array, or pandas.DataFrame
        As for :func:`caredecide.compile.compile_model`; None = the base case.
    objective : Objective, optional
        Default: the model's own objective and willingness to pay.
    chunk_size : int, optional
        Draws per chunk; default from ``memory_limit_bytes``.
    memory_limit_bytes : int, optional
        Budget for one chunk's working memory (default:
        :func:`caredecide.chunks.memory_budget`).
    progress : callable(done, total), optional
        Called after each chunk with draws done and the total.
    keep : sequence of str
        Fields to concatenate: any of :data:`RESULT_FIELDS` and :data:`OUTCOME_FIELDS`.
    reduce : callable(start, stop, result, outcome), optional
        Called per chunk (``outcome`` None unless "totals" or "trace" is kept); its
        return values are collected in ``reductions``. Use with ``keep=()`` for huge runs.
        It must be picklable (a module-level function) to run on a Dask cluster.
    map_chunks : callable(job, ranges), optional
        :func:`caredecide.chunks.serial_map` (default) or
        :func:`caredecide.chunks.dask_map`; results are identical either way.
    **solve_options
        Passed to :func:`caredecide.solvers.solve` (method, tolerance, ...).

    Returns
    -------
    BatchResult
    """
    unknown = [k for k in keep if k not in RESULT_FIELDS + OUTCOME_FIELDS]
    if unknown:
        raise SolverError(
            f"keep names unknown field(s) {unknown}; expected any of "
            f"{RESULT_FIELDS + OUTCOME_FIELDS}"
        )
    not_kept = [k for k in keep if k in ("q_values", "action_gap", "next_best_action")]
    if solve_options.get("action_values", True) is False and not_kept:
        raise SolverError(
            f"keep names {not_kept}, which a solve with action_values = False does not keep; "
            "drop them from keep or solve with action_values = True"
        )
    if objective is None:
        objective = Objective.from_settings(model.settings)
    n_draws = count_parameter_sets(parameter_sets)
    if chunk_size is None:
        chunk_size = chunk_size_for(model, n_draws, memory_limit_bytes)
    else:
        chunk_size = check_scalar(chunk_size, "chunk_size", int, min_val=1)

    job = BatchJob(
        model=model,
        parameter_sets=parameter_sets,
        objective=objective,
        keep=tuple(keep),
        reduce=reduce,
        memory_limit_bytes=memory_limit_bytes,
        solve_options=tuple(sorted(solve_options.items())),
    )
    pieces: dict[str, list[np.ndarray]] = {k: [] for k in keep if k != "totals"}
    totals, reductions, iterations, messages, bounds = [], [], [], [], []
    success = True
    chunk: ChunkOutput | None = None
    for chunk in run_chunks(
        job, chunk_ranges(n_draws, chunk_size), map_chunks=map_chunks, progress=progress
    ):
        for name in pieces:
            pieces[name].append(chunk.fields[name])
        if chunk.totals is not None:
            totals.append(chunk.totals)
        if reduce is not None:
            reductions.append(chunk.reduction)
        iterations.append(chunk.iterations)
        messages.append(chunk.message)
        bounds.append(chunk.error_bound)
        success = success and chunk.success
    assert chunk is not None  # at least one parameter set, so at least one chunk
    return BatchResult(
        fields={name: np.concatenate(arrays) for name, arrays in pieces.items()},
        totals=pd.concat(totals, ignore_index=True) if totals else None,
        reductions=reductions,
        n_draws=n_draws,
        chunk_size=chunk_size,
        iterations=iterations,
        success=success,
        messages=messages,
        method=chunk.method,
        objective=objective,
        state_ids=chunk.state_ids,
        action_ids=chunk.action_ids,
        ages=chunk.ages,
        error_bound=max(bounds),
    )
