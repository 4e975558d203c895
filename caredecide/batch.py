"""The batch driver every analysis uses: compile a chunk of parameter sets, solve, repeat.

``solve_batch`` splits ``D`` parameter sets into chunks sized from a memory budget, runs
``compile_model -> solve -> evaluate_policy`` on each (the one core path) and either
concatenates the kept fields or hands each chunk to a reducing callback, so peak memory
stays bounded however many draws there are.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from caredecide.compile import compile_model, estimate_compiled_bytes
from caredecide.evaluate import DISPLAY_CAP, PolicyOutcome, evaluate_policy
from caredecide.limits import default_memory_limit
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

COMPILE_MEMORY_FACTOR = 6
"""Peak working memory of compiling a chunk, in copies of its compiled arrays. Measured
(peak resident memory of a fresh process, ``python benchmarks/bench_psa.py --memory``):
5.3 for demo_progressive and 5.9 for lesion_surveillance, whose rate rows go through
the batched matrix exponential, and 2.0 for demo_counts_table (no rate rows). A factor of 3,
used before, let a chunk overrun its budget by two thirds."""
RESULT_ARRAYS_PER_CELL = 14
"""Float64 values per (cycle, state) that one draw's solver results and policy
evaluations hold at once (values, Q-values per action, gaps, policy, trace, flows and
intermediates) beyond the compiled arrays - measured with benchmarks/bench_psa.py."""


def draw_working_bytes(model) -> int:
    """Bytes of working memory one draw needs in a chunk beyond compiling it.

    The solver's per-cycle results and the cohort traces of the policy evaluations
    grow with the horizon even when the compiled arrays do not (a model without age
    dependence). An infinite horizon has no cycles to count, but its evaluation keeps
    a display trace of up to ``DISPLAY_CAP + 1`` cycles (:mod:`caredecide.evaluate`),
    so that length is counted.
    """
    from caredecide.expand import expand_model

    cycles = model.n_cycles()
    n_t = (DISPLAY_CAP if cycles is None else cycles) + 1
    cells = n_t * len(expand_model(model).states) * (len(model.actions) + RESULT_ARRAYS_PER_CELL)
    return 8 * cells


def draw_bytes(model) -> int:
    """Working memory of one draw in a chunk (bytes): compile peak plus results.

    ``COMPILE_MEMORY_FACTOR`` copies of the compiled arrays (the compile peak, which the
    solver's buffers stay below) plus :func:`draw_working_bytes`; the sum errs on the
    safe side, as the compile intermediates are freed before the solver runs.
    """
    return COMPILE_MEMORY_FACTOR * estimate_compiled_bytes(model, 1) + draw_working_bytes(model)


ChunkReducer = Callable[[int, int, PolicyResult, PolicyOutcome | None], object]


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


def slice_parameter_sets(parameter_sets: object, start: int, stop: int) -> object:
    """Parameter sets ``start:stop`` in the same form (None stays None)."""
    if parameter_sets is None:
        return None
    if isinstance(parameter_sets, pd.DataFrame):
        return parameter_sets.iloc[start:stop]
    return {k: np.atleast_1d(np.asarray(v))[start:stop] for k, v in parameter_sets.items()}


def chunk_size_for(model, n_draws: int, memory_limit_bytes: int | None) -> int:
    """Draws per chunk so that a chunk's working memory fits ``memory_limit_bytes``.

    Working memory per draw is :func:`draw_bytes` (compile peak plus solver results).
    """
    budget = default_memory_limit() if memory_limit_bytes is None else int(memory_limit_bytes)
    per_draw = draw_bytes(model)
    return int(max(1, min(n_draws, budget // max(per_draw, 1))))


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
        Budget for one chunk's working memory (default: half the available memory).
    progress : callable(done, total), optional
        Called after each chunk with draws done and the total.
    keep : sequence of str
        Fields to concatenate: any of :data:`RESULT_FIELDS` and :data:`OUTCOME_FIELDS`.
    reduce : callable(start, stop, result, outcome), optional
        Called per chunk (``outcome`` None unless "totals" or "trace" is kept); its
        return values are collected in ``reductions``. Use with ``keep=()`` for huge runs.
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
    if objective is None:
        objective = Objective.from_settings(model.settings)
    n_draws = count_parameter_sets(parameter_sets)
    if chunk_size is None:
        chunk_size = chunk_size_for(model, n_draws, memory_limit_bytes)
    else:
        chunk_size = check_scalar(chunk_size, "chunk_size", int, min_val=1)
    needs_outcome = any(k in OUTCOME_FIELDS for k in keep)

    pieces: dict[str, list[np.ndarray]] = {k: [] for k in keep if k != "totals"}
    totals, reductions, iterations, messages, bounds = [], [], [], [], []
    success, result = True, None
    for start in range(0, n_draws, chunk_size):
        stop = min(start + chunk_size, n_draws)
        compiled = compile_model(
            model,
            slice_parameter_sets(parameter_sets, start, stop),
            memory_limit_bytes=memory_limit_bytes,
        )
        result = solve(compiled, objective, **solve_options)
        outcome = evaluate_policy(compiled, result.policy, objective) if needs_outcome else None
        del compiled
        for name in pieces:
            pieces[name].append(outcome.trace if name == "trace" else getattr(result, name))
        if "totals" in keep:
            frame = outcome.totals_frame()
            frame["draw"] += start
            totals.append(frame)
        if reduce is not None:
            reductions.append(reduce(start, stop, result, outcome))
        iterations.append(result.iterations)
        messages.append(result.message)
        bounds.append(float(result.error_bound.max()))
        success = success and result.success
        if progress is not None:
            progress(stop, n_draws)
    return BatchResult(
        fields={name: np.concatenate(arrays) for name, arrays in pieces.items()},
        totals=pd.concat(totals, ignore_index=True) if totals else None,
        reductions=reductions,
        n_draws=n_draws,
        chunk_size=chunk_size,
        iterations=iterations,
        success=success,
        messages=messages,
        method=result.method,
        objective=objective,
        state_ids=result.state_ids,
        action_ids=result.action_ids,
        ages=result.ages,
        error_bound=max(bounds),
    )
