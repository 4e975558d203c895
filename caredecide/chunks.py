"""The one chunk driver: split a batch into chunks that fit one memory budget, map them.

Every batch of parameter sets (one-way, thresholds, two-way, scenarios, probabilistic
draws) is cut into ``[(start, stop), ...]`` ranges by :func:`chunk_ranges`, with a size
from :func:`chunk_size_for` (one memory rule: :func:`memory_budget` and
:func:`draw_bytes`), and each range is handed to a *chunk job* — a picklable callable
``job(start, stop) -> result`` that compiles, solves and reduces its draws through the
one core path. A *chunk map* runs the job over the ranges and yields results in range
order: :func:`serial_map` in this process, or :func:`dask_map` on a Dask cluster. A job is
a pure function of its range, so results do not depend on the chunk size or the map.

:func:`thread_map` runs jobs on threads of this process: the compiled loops (numba,
``nogil``) and large numpy operations release the interpreter lock, and threads share the
imported modules and the job's arrays, where worker processes would import everything
again and receive copies. :func:`usable_threads` starts no more threads than there are
idle cores (watched for a tenth of a second), so asking for workers on a busy machine
costs nothing.
"""

from __future__ import annotations

import os
import time
from collections import deque
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass, replace
from typing import Any, Protocol

import numpy as np
import pandas as pd

from caredecide.compile import compile_model
from caredecide.compiled import CompiledModel, SparseTransitions, sparse_stand_in
from caredecide.errors import CompiledModelError
from caredecide.evaluate import DISPLAY_CAP
from caredecide.limits import CHUNK_MEMORY_BYTES, SPARSE_MAX_DRAWS, default_memory_limit
from caredecide.objective import Objective
from caredecide.options import check_scalar
from caredecide.solvers import PolicyResult, solve

__all__ = [
    "ChunkJob",
    "ChunkMap",
    "chunk_ranges",
    "chunk_size_for",
    "dask_map",
    "draw_bytes",
    "memory_budget",
    "run_chunks",
    "serial_map",
    "solve_in_chunks",
    "thread_map",
    "usable_threads",
]


class ChunkJob(Protocol):
    """Work on the draws ``start:stop`` of a batch; a pure function of the range."""

    def __call__(self, start: int, stop: int) -> Any: ...


ChunkMap = Callable[[ChunkJob, Sequence[tuple[int, int]]], Iterable[Any]]
"""Runs a job over ranges and yields the results in range order."""


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
    """Working memory of one draw in a chunk (bytes).

    The peak of one compile -> solve -> evaluate pass per draw
    (:func:`caredecide.memory.draw_bytes`, temporaries included, checked against
    tracemalloc) plus :func:`draw_working_bytes` for what a chunk keeps beside it (kept
    fields, the evaluations of other candidates).
    """
    from caredecide import memory

    return _draw_bytes(model, memory.shape_of(model))


def _draw_bytes(model, shape) -> int:
    """:func:`draw_bytes` for a model whose :class:`caredecide.memory.PipelineShape` is
    known (the structure parsed once)."""
    from caredecide import memory

    return memory.draw_bytes(shape) + draw_working_bytes(model)


def memory_budget(memory_limit_bytes: int | None = None) -> int:
    """Working-memory budget of one chunk, in bytes: the one rule every batch uses.

    ``None``: :data:`caredecide.limits.CHUNK_MEMORY_BYTES` (1 GiB) or half the currently
    available memory if that is less. A given budget must be a whole number >= 1.

    Raises
    ------
    RunOptionError
        A budget that is not a whole number >= 1.
    """
    if memory_limit_bytes is None:
        return min(CHUNK_MEMORY_BYTES, default_memory_limit())
    return check_scalar(memory_limit_bytes, "memory_limit_bytes", int, min_val=1)


def chunk_size_for(
    model,
    n_draws: int,
    memory_limit_bytes: int | None = None,
    *,
    block: int = 1,
    evaluations: bool = True,
    transition_form: str = "auto",
) -> int:
    """Draws per chunk so that a chunk's working memory fits the budget.

    Working memory per draw is :func:`draw_bytes` (compile peak plus solver results).
    An infinite-horizon model the solver keeps in sparse rows when a chunk has at most
    :data:`~caredecide.limits.SPARSE_MAX_DRAWS` draws (large, few moves per state:
    :func:`caredecide.memory.stationary_sparse`) gets chunks of at most that many draws,
    sized by the sparse form's estimate (:func:`sparse_chunk_size`), so that every chunk
    is solved in sparse form; ``evaluations=False`` (a batch that only compiles and
    solves, :func:`solve_in_chunks`) leaves out the evaluations' kept traces
    (:func:`draw_working_bytes`) there. The size is at least 1 and at most ``n_draws``;
    when it is at least ``block`` it is rounded down to a multiple of ``block`` (the
    random-number blocks of a probabilistic run). ``transition_form`` is the form the
    chunks are compiled in (:func:`caredecide.compile.compile_model`; "dense" for a job
    that needs the dense array, such as the cell scaling of
    :mod:`caredecide.sensitivity.cells`).
    """
    from caredecide import memory

    budget = memory_budget(memory_limit_bytes)
    shape = memory.shape_of(model, transition_form=transition_form)
    size = sparse_chunk_size(model, shape, n_draws, budget, evaluations=evaluations)
    if size is None:
        per_draw = _draw_bytes(model, shape)
        size = int(max(1, min(n_draws, budget // max(per_draw, 1))))
    return max(size // block, 1) * block if size >= block else size


def sparse_chunk_size(model, shape, n_draws: int, budget: int, *, evaluations: bool = True):
    """Draws per chunk of a model solved in sparse form, or None for the dense rule.

    ``shape`` is the model's :class:`caredecide.memory.PipelineShape`
    (:func:`caredecide.memory.shape_of`).

    The largest ``k <= min(n_draws, SPARSE_MAX_DRAWS)`` whose peak
    (:func:`caredecide.memory.pipeline_peak_bytes` of ``k`` draws in sparse form, plus
    ``k`` :func:`draw_working_bytes` when ``evaluations``) fits ``budget``; None when
    ``model`` is not an infinite horizon kept sparse at that many draws, or when even one
    draw does not fit (the dense rule then gives 1 and the guard speaks).
    """
    from caredecide import memory

    cap = max(1, min(int(n_draws), SPARSE_MAX_DRAWS))
    if not memory.stationary_sparse(shape.with_draws(cap)):
        return None
    working = draw_working_bytes(model) if evaluations else 0
    for size in range(cap, 0, -1):
        if memory.pipeline_peak_bytes(shape.with_draws(size)) + size * working <= budget:
            return size
    return None


def chunk_ranges(n_draws: int, chunk_size: int) -> list[tuple[int, int]]:
    """``[(start, stop), ...]`` covering ``0:n_draws`` in chunks of ``chunk_size``."""
    chunk_size = check_scalar(chunk_size, "chunk_size", int, min_val=1)
    return [(s, min(s + chunk_size, n_draws)) for s in range(0, n_draws, chunk_size)]


def serial_map(job: ChunkJob, ranges: Sequence[tuple[int, int]]) -> Iterator[Any]:
    """Run ``job`` over ``ranges`` one after another in this process, in order."""
    for start, stop in ranges:
        yield job(start, stop)


def _in_order(submit: Callable, ranges: Sequence[tuple[int, int]], window: int) -> Iterator[Any]:
    """Results of ``submit(start, stop)`` futures in range order, at most ``window`` of
    them submitted and not yet collected (memory stays bounded by the window)."""
    pending: deque = deque()
    todo = iter(ranges)
    for start, stop in todo:
        pending.append(submit(start, stop))
        if len(pending) >= window:
            break
    while pending:
        future = pending.popleft()
        result = future.result()
        if hasattr(future, "release"):  # a Dask future: let the cluster forget it
            future.release()
        for start, stop in todo:
            pending.append(submit(start, stop))
            break
        yield result


def thread_map(threads: int) -> ChunkMap:
    """A chunk map that runs jobs on ``threads`` threads of this process, results in order.

    At most ``threads`` chunks run at once (so ``threads`` chunks' working memory), and at
    most twice that many are submitted but not yet collected. One thread runs the jobs in
    this thread, one after another (:func:`serial_map`).
    """
    threads = check_scalar(threads, "threads", int, min_val=1)
    if threads == 1:
        return serial_map

    def run(job: ChunkJob, ranges: Sequence[tuple[int, int]]) -> Iterator[Any]:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(threads, thread_name_prefix="caredecide-chunk") as pool:

            def submit(start: int, stop: int) -> Any:
                return pool.submit(job, start, stop)

            yield from _in_order(submit, ranges, 2 * threads)

    return run


IDLE_WINDOW_SECONDS = 0.1
"""Shortest watch of the processor counters by :class:`IdleWatch` (10 clock ticks of each
processor at the usual 100 per second)."""


def _own_ticks() -> float:
    """Clock ticks this process has used (all threads, user and system time)."""
    times = os.times()
    return (times.user + times.system) * float(os.sysconf("SC_CLK_TCK"))


def _processor_ticks() -> tuple[float, float] | None:
    """(idle, total) clock ticks of all processors since boot (Linux ``/proc/stat``), or
    None where they cannot be read."""
    try:
        with open("/proc/stat", encoding="ascii") as file:
            fields = file.readline().split()
    except OSError:
        return None
    if len(fields) < 5 or fields[0] != "cpu":
        return None
    ticks = [float(value) for value in fields[1:9]]  # user nice system idle iowait irq ...
    return ticks[3] + ticks[4], sum(ticks)


class IdleWatch:
    """Watches the processors from its creation: how many cores have been idle since.

    Parameters
    ----------
    own_work_idle : bool
        Count the clock ticks this process used meanwhile as idle too, so only other
        work counts: the cores this process could use were it waiting. Its own work can
        then go on while it is watched (no sleeping).
    """

    def __init__(self, own_work_idle: bool = False) -> None:
        self.own_work_idle = own_work_idle
        self._started = time.monotonic()
        self._before = _processor_ticks()
        self._own_before = _own_ticks()

    def idle_cores(self, window: float = IDLE_WINDOW_SECONDS) -> float:
        """Cores not busy since the watch began, of those this process may use.

        The idle share of all processors' clock ticks since the watch began (waiting
        first, when less than ``window`` seconds have passed) times the processors. Where
        the ticks cannot be read, the cores less the 1-minute load average (which also
        counts work that has just ended).
        """
        if hasattr(os, "sched_getaffinity"):
            cores = float(len(os.sched_getaffinity(0)))
        else:
            cores = float(os.cpu_count() or 1)
        if self._before is not None:
            time.sleep(max(window - (time.monotonic() - self._started), 0.0))
            after = _processor_ticks()
            own = _own_ticks() - self._own_before if self.own_work_idle else 0.0
            if after is not None and after[1] > self._before[1]:
                total = after[1] - self._before[1]
                idle = min(after[0] - self._before[0] + max(own, 0.0), total)
                return min(cores, idle / total * float(os.cpu_count() or cores))
        try:
            load = os.getloadavg()[0]
        except OSError:
            load = 0.0
        return max(cores - load, 0.0)


def idle_cores(window: float = IDLE_WINDOW_SECONDS, own_work_idle: bool = False) -> float:
    """Cores not busy right now, of those this process may use: an :class:`IdleWatch`
    read after ``window`` seconds (the calling thread sleeping meanwhile)."""
    return IdleWatch(own_work_idle).idle_cores(window)


def usable_threads(requested: int, watch: IdleWatch | None = None) -> int:
    """Threads worth starting for ``requested`` workers: at most the idle cores (rounded to
    the nearest whole core), at least 1. On a machine whose cores are all busy a second
    thread only takes turns with the first, so the run stays serial (never slower).

    The cores are those idle since ``watch`` began (started earlier, with this process's
    own work counted as idle, so that work went on meanwhile); without one, over the
    next :data:`IDLE_WINDOW_SECONDS`.
    """
    requested = check_scalar(requested, "workers", int, min_val=1)
    if requested == 1:
        return 1
    if watch is None:
        watch = IdleWatch(own_work_idle=True)
    return max(1, min(requested, round(watch.idle_cores())))


def _call(job: ChunkJob, start: int, stop: int) -> Any:
    return job(start, stop)


def dask_map(client, *, max_in_flight: int | None = None) -> ChunkMap:
    """A chunk map that runs jobs on a Dask ``distributed.Client``, results in order.

    The job is scattered to every worker once; at most ``max_in_flight`` chunks (default:
    twice the worker threads) are submitted but not yet collected, so memory stays
    bounded however many chunks there are. Dask itself is not imported here: only the
    client's methods are used.
    """

    def run(job: ChunkJob, ranges: Sequence[tuple[int, int]]) -> Iterator[Any]:
        threads = sum(client.nthreads().values()) or 1
        window = max_in_flight or 2 * threads
        shared = client.scatter(job, broadcast=True)

        def submit(start: int, stop: int) -> Any:
            # Distinct keys per chunk: pure=False, so equal arguments never merge.
            return client.submit(_call, shared, start, stop, pure=False)

        yield from _in_order(submit, ranges, window)

    return run


def run_chunks(
    job: ChunkJob,
    ranges: Sequence[tuple[int, int]],
    *,
    map_chunks: ChunkMap | None = None,
    progress: Callable[[int, int], None] | None = None,
    total: int | None = None,
) -> Iterator[Any]:
    """Run ``job`` over ``ranges`` with ``map_chunks`` (default serial), in range order.

    ``progress(done, total)`` is called after each chunk with the ``stop`` of that chunk
    (``total`` defaults to the last stop).
    """
    runner = serial_map if map_chunks is None else map_chunks
    end = total if total is not None else (ranges[-1][1] if ranges else 0)
    results = iter(runner(job, ranges))
    for _, stop in ranges:  # (not zip: it holds the last result while the next one runs)
        result = next(results, _MISSING)
        if result is _MISSING:
            raise ValueError(f"the chunk map returned fewer results than {len(ranges)} ranges")
        if progress is not None:
            progress(stop, end)
        yield result
        del result  # not held while the next chunk runs (the caller may drop it)
    if next(results, _MISSING) is not _MISSING:
        raise ValueError(f"the chunk map returned more results than {len(ranges)} ranges")


_MISSING = object()


# ------------------------------------------------------------ batches of given parameter sets
_COMPILED_DRAW_FIELDS = (
    "transition",
    "state_qaly",
    "state_cost",
    "decision_qaly",
    "decision_cost",
    "move",
    "state_action_qaly",
    "state_action_cost",
)
"""Per-draw arrays of a compiled model (the last three may be None: no move, no reward)."""
_RESULT_DRAW_FIELDS = (
    "policy",
    "value",
    "q_values",
    "action_gap",
    "next_best_action",
    "indifferent",
    "error_bound",
)


def join_compiled(pieces: Sequence[CompiledModel]) -> CompiledModel:
    """One compiled model holding the draws of ``pieces`` in order (same model, same shapes)."""
    if len(pieces) == 1:
        return pieces[0]
    held = pieces[0].sparse_transition
    joined: dict[str, Any] = {
        f: np.concatenate([getattr(p, f) for p in pieces])
        for f in _COMPILED_DRAW_FIELDS
        if getattr(pieces[0], f) is not None and not (f == "transition" and held is not None)
    }
    if held is not None:  # sparse rows: one pattern, the values joined (no dense array)
        joined["sparse_transition"] = join_sparse([p.sparse_transition for p in pieces])
        joined["transition"] = sparse_stand_in(joined["sparse_transition"].shape)
    for rate in ("discount_outcomes", "discount_costs"):  # per-draw rates (threshold batches)
        if np.ndim(getattr(pieces[0], rate)):
            joined[rate] = np.concatenate([getattr(p, rate) for p in pieces])
    return replace(pieces[0], **joined)


def join_sparse(pieces: Sequence[SparseTransitions | None]) -> SparseTransitions:
    """Sparse rows of one pattern holding the draws of ``pieces`` in order.

    Raises
    ------
    CompiledModelError
        A piece without sparse rows, or with another pattern.
    """
    first = pieces[0]
    if first is None or any(
        p is None
        or not np.array_equal(p.indptr, first.indptr)
        or not np.array_equal(p.indices, first.indices)
        for p in pieces
    ):
        raise CompiledModelError(
            "compiled pieces to join hold their transitions in different forms or sparse "
            "patterns; expected pieces of one model compiled in one form"
        )
    values = np.concatenate([p.values for p in pieces if p is not None])
    return replace(first, values=values)


def join_results(pieces: Sequence[PolicyResult]) -> PolicyResult:
    """One solver result holding the draws of ``pieces`` in order.

    Per-draw arrays are concatenated; ``iterations`` is the largest of the chunks,
    ``success`` holds only if every chunk succeeded, and the message is the first failing
    chunk's (else the first chunk's). Sweep histories are not joined, nor the sparse
    rows a chunk's solver read (``transition_rows``: None, they fit that chunk only).
    """
    if len(pieces) == 1:
        return pieces[0]
    failing = [p for p in pieces if not p.success]
    joined: dict[str, Any] = {
        f: np.concatenate([getattr(p, f) for p in pieces])
        for f in _RESULT_DRAW_FIELDS
        if getattr(pieces[0], f) is not None  # None: solved with action_values=False
    }
    return replace(
        pieces[0],
        **joined,
        iterations=max(p.iterations for p in pieces),
        success=not failing,
        message=(failing or pieces)[0].message,
        history=None,
        transition_rows=None,
    )


@dataclass(frozen=True)
class SolveSetsJob:
    """Compile and solve the rows ``start:stop`` of a table of parameter sets."""

    model: Any
    parameter_sets: pd.DataFrame
    objective: Objective
    memory_limit_bytes: int | None = None

    def __call__(self, start: int, stop: int) -> tuple[CompiledModel, PolicyResult]:
        compiled = compile_model(
            self.model,
            self.parameter_sets.iloc[start:stop],
            memory_limit_bytes=self.memory_limit_bytes,
        )
        return compiled, solve(compiled, self.objective)


def solve_in_chunks(
    model,
    parameter_sets: pd.DataFrame,
    objective: Objective,
    *,
    chunk_size: int | None = None,
    memory_limit_bytes: int | None = None,
    map_chunks: ChunkMap | None = None,
    keep_compiled: bool = True,
) -> tuple[CompiledModel, PolicyResult]:
    """Compile and solve a table of parameter sets chunk by chunk; join the chunks.

    The compile peak (several copies of a chunk's arrays) stays within the budget; the
    joined arrays hold every draw. Used by the sensitivity batches (one-way, thresholds,
    decision tornado), which need every draw's policy and values at once.

    Parameters
    ----------
    parameter_sets : pandas.DataFrame
        (D rows) parameter sets, columns = parameter names.
    chunk_size : int, optional
        Rows per chunk; default from the memory budget (:func:`chunk_size_for`).
    keep_compiled : bool
        False: the returned compiled model holds the first parameter set only, and each
        chunk's compiled arrays are dropped once it is solved (for callers that read only
        the model's structure from it: ids, ages, start distribution). A large model then
        holds one chunk's transitions at a time, not every set's.

    Returns
    -------
    (CompiledModel, PolicyResult)
        For the D draws (the compiled model: the first when ``keep_compiled`` is False),
        in row order; identical whatever the chunk size or map.
    """
    n = len(parameter_sets)
    if chunk_size is None:  # no evaluation here: the kept traces are not counted
        chunk_size = chunk_size_for(model, n, memory_limit_bytes, evaluations=False)
    job = SolveSetsJob(model, parameter_sets, objective, memory_limit_bytes)
    compiled: list[CompiledModel] = []
    results: list[PolicyResult] = []
    for piece, result in run_chunks(job, chunk_ranges(n, chunk_size), map_chunks=map_chunks):
        if keep_compiled:
            compiled.append(piece)
        elif not compiled:
            compiled.append(piece.take_draws(np.arange(1)))  # a copy, not a view
        results.append(result if keep_compiled else replace(result, transition_rows=None))
        del piece, result  # not alive while the next chunk compiles
    return join_compiled(compiled), join_results(results)
