"""The one chunk driver: identical results across chunk sizes, serial, threads and Dask.

A chunk job is a pure function of its range of draws, and the solvers are vectorized over
draws (every draw is solved on its own), so cutting a batch into chunks or running the
chunks on a Dask cluster must not change a single figure (common practice for batched
Monte Carlo work: results do not depend on how the work is split).
"""

from __future__ import annotations

import os

import numpy as np
import pandas as pd
import pytest

from caredecide.batch import solve_batch
from caredecide.chunks import (
    chunk_ranges,
    chunk_size_for,
    draw_bytes,
    memory_budget,
    run_chunks,
    serial_map,
    solve_in_chunks,
    thread_map,
    usable_threads,
)
from caredecide.compile import compile_model
from caredecide.errors import RunOptionError
from caredecide.limits import CHUNK_MEMORY_BYTES
from caredecide.modelfile import load_model
from caredecide.objective import Objective
from caredecide.solvers import solve
from synthetic_cohort import demo_model_path

OBJECTIVE = Objective("net_benefit", 30000.0)


@pytest.fixture(scope="module")
def model():
    return load_model(demo_model_path())


@pytest.fixture(scope="module")
def sets():
    rng = np.random.default_rng(11)
    return pd.DataFrame(
        {"hr_treatment": rng.uniform(0.3, 0.9, 7), "c_drug_year": rng.uniform(1000, 9000, 7)}
    )


def test_chunk_ranges_cover_every_draw_once():
    assert chunk_ranges(7, 3) == [(0, 3), (3, 6), (6, 7)]
    assert chunk_ranges(6, 6) == [(0, 6)]
    with pytest.raises(RunOptionError, match="chunk_size = 0 is not allowed"):
        chunk_ranges(6, 0)


def test_chunk_size_from_the_one_budget(model):
    per_draw = draw_bytes(model)
    assert chunk_size_for(model, 1000, 7 * per_draw) == 7
    assert chunk_size_for(model, 1000, 700 * per_draw, block=256) == 512  # whole blocks
    assert chunk_size_for(model, 1000, 100 * per_draw, block=256) == 100  # under one block
    assert chunk_size_for(model, 3, 10**12) == 3
    assert memory_budget(None) <= CHUNK_MEMORY_BYTES
    with pytest.raises(RunOptionError, match="memory_limit_bytes = 0 is not allowed"):
        memory_budget(0)


def test_run_chunks_reports_progress_in_order():
    calls = []
    out = list(
        run_chunks(
            lambda a, b: (a, b), chunk_ranges(5, 2), progress=lambda d, t: calls.append((d, t))
        )
    )
    assert out == [(0, 2), (2, 4), (4, 5)]
    assert calls == [(2, 5), (4, 5), (5, 5)]
    assert list(serial_map(lambda a, b: b - a, [(0, 3), (3, 4)])) == [3, 1]


@pytest.mark.parametrize("chunk_size", [1, 3, 7])
def test_sensitivity_batches_identical_across_chunk_sizes(model, sets, chunk_size):
    compiled = compile_model(model, sets)
    whole = solve(compiled, OBJECTIVE)
    joined_compiled, joined = solve_in_chunks(model, sets, OBJECTIVE, chunk_size=chunk_size)
    for name in ("policy", "value", "q_values", "action_gap", "indifferent", "error_bound"):
        np.testing.assert_array_equal(getattr(joined, name), getattr(whole, name), err_msg=name)
    np.testing.assert_array_equal(joined_compiled.transition, compiled.transition)
    np.testing.assert_array_equal(
        joined.expected_value(compiled.start_distribution),
        whole.expected_value(compiled.start_distribution),
    )


def _first_action(start, stop, result, outcome):
    """A picklable per-chunk reducer: the action at the start state of each draw."""
    return np.asarray(result.policy)[:, 0, 0].copy()


@pytest.mark.parametrize("chunk_size", [2, 7])
def test_solve_batch_identical_serial_and_dask(model, sets, chunk_size):
    from caredecide.uncertainty.cluster import dask_client, dask_map

    serial = solve_batch(model, sets, OBJECTIVE, chunk_size=chunk_size, reduce=_first_action)
    one = solve_batch(model, sets, OBJECTIVE, chunk_size=7, reduce=_first_action)
    with dask_client(workers=1, processes=False, threads_per_worker=2) as client:
        remote = solve_batch(
            model,
            sets,
            OBJECTIVE,
            chunk_size=chunk_size,
            reduce=_first_action,
            map_chunks=dask_map(client),
        )
    for batch in (one, remote):
        np.testing.assert_array_equal(batch.fields["policy"], serial.fields["policy"])
        np.testing.assert_array_equal(batch.fields["value"], serial.fields["value"])
        pd.testing.assert_frame_equal(batch.totals, serial.totals)
        np.testing.assert_array_equal(
            np.concatenate(batch.reductions), np.concatenate(serial.reductions)
        )


def test_thread_map_yields_in_range_order_whatever_order_chunks_finish(model, sets):
    import threading
    import time

    finished = []

    def job(start, stop):
        time.sleep(0.02 * (7 - start))  # early chunks finish last
        finished.append(start)
        return start, stop, threading.current_thread().name

    ranges = chunk_ranges(7, 1)
    results = list(thread_map(3)(job, ranges))
    assert [(a, b) for a, b, _ in results] == ranges
    assert finished != sorted(finished)  # they did finish out of order
    assert {name for *_, name in results} <= {f"caredecide-chunk_{i}" for i in range(3)}
    assert thread_map(1) is serial_map
    # The same batch solved on threads and serially: the same figures.
    serial = solve_batch(model, sets, OBJECTIVE, chunk_size=2, reduce=_first_action)
    threads = solve_batch(
        model, sets, OBJECTIVE, chunk_size=3, reduce=_first_action, map_chunks=thread_map(2)
    )
    np.testing.assert_array_equal(threads.fields["policy"], serial.fields["policy"])
    np.testing.assert_array_equal(threads.fields["value"], serial.fields["value"])
    pd.testing.assert_frame_equal(threads.totals, serial.totals)


@pytest.mark.parametrize(
    ("load", "requested", "expected"),
    [(0.1, 2, 2), (0.1, 8, 4), (1.2, 2, 2), (2.6, 2, 1), (3.5, 4, 1), (7.0, 1, 1)],
)
def test_usable_threads_from_the_load_where_no_ticks(monkeypatch, load, requested, expected):
    # 4 cores; idle = 4 - load, rounded to whole cores; at least 1, at most the request.
    import os

    from caredecide import chunks

    monkeypatch.setattr(chunks, "_processor_ticks", lambda: None)
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {0, 1, 2, 3}, raising=False)
    monkeypatch.setattr(os, "getloadavg", lambda: (load, load, load))
    assert usable_threads(requested) == expected
    with pytest.raises(RunOptionError, match="workers = 0 is not allowed"):
        usable_threads(0)


@pytest.mark.parametrize(
    ("idle_ticks", "requested", "expected"),
    [(38, 2, 2), (25, 2, 1), (20, 4, 1), (31, 4, 2), (2, 2, 1), (40, 1, 1)],
)
def test_usable_threads_from_the_idle_processor_ticks(monkeypatch, idle_ticks, requested, expected):
    # 2 processors watched for 20 ticks each (40 in all): idle cores = 2 x idle / 40,
    # rounded (38 -> 1.9 -> 2; 25 -> 1.25 -> 1; 31 -> 1.55 -> 2), at most the request.
    import os

    from caredecide import chunks

    readings = iter([(1000.0, 5000.0), (1000.0 + idle_ticks, 5040.0)])
    monkeypatch.setattr(chunks, "_processor_ticks", lambda: next(readings))
    monkeypatch.setattr(chunks.time, "sleep", lambda seconds: None)
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {0, 1}, raising=False)
    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    monkeypatch.setattr(os, "getloadavg", lambda: (9.0, 9.0, 9.0))  # not used
    assert usable_threads(requested) == expected


def test_processor_ticks_read_where_the_system_has_them():
    from caredecide.chunks import _processor_ticks, idle_cores

    ticks = _processor_ticks()
    if ticks is None:
        pytest.skip("no /proc/stat here")
    idle, total = ticks
    assert 0 <= idle <= total
    assert 0.0 <= idle_cores(0.05) <= len(os.sched_getaffinity(0))


def test_usable_threads_count_this_process_s_own_work_as_idle(monkeypatch):
    # 2 processors watched for 20 ticks each (40 in all), 10 idle; this process used 20
    # of the busy ones meanwhile (its candidates being built while the idle cores are
    # watched): the threads see 2 x (10 + 20) / 40 = 1.5 -> 2 cores; the chart renderer,
    # which looks beside this process's work, sees 2 x 10 / 40 = 0.5 (common practice).
    import os

    from caredecide import chunks

    def watched(own_work_idle: bool) -> float:
        readings = iter([(1000.0, 5000.0), (1010.0, 5040.0)])
        own = iter([500.0, 520.0])
        monkeypatch.setattr(chunks, "_processor_ticks", lambda: next(readings))
        monkeypatch.setattr(chunks, "_own_ticks", lambda: next(own))
        return chunks.idle_cores(own_work_idle=own_work_idle)

    monkeypatch.setattr(chunks.time, "sleep", lambda seconds: None)
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {0, 1}, raising=False)
    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    assert watched(own_work_idle=False) == pytest.approx(0.5)
    assert watched(own_work_idle=True) == pytest.approx(1.5)
    readings = iter([(1000.0, 5000.0), (1010.0, 5040.0)])
    own = iter([500.0, 520.0])
    monkeypatch.setattr(chunks, "_processor_ticks", lambda: next(readings))
    monkeypatch.setattr(chunks, "_own_ticks", lambda: next(own))
    assert usable_threads(2) == 2


def test_idle_watch_counts_from_its_start_and_waits_only_the_rest_of_the_window(monkeypatch):
    # Watch begun at t = 0; read at t = 0.03 s: it waits the remaining 0.07 s of the
    # 0.1 s window, then counts every tick since its start (2 processors, 40 ticks in all,
    # 10 idle, 20 of this process's): 2 x (10 + 20) / 40 = 1.5 cores.
    import os

    from caredecide import chunks

    clock = iter([100.0, 100.03])
    readings = iter([(1000.0, 5000.0), (1010.0, 5040.0)])
    own = iter([500.0, 520.0])
    slept: list[float] = []
    monkeypatch.setattr(chunks.time, "monotonic", lambda: next(clock))
    monkeypatch.setattr(chunks.time, "sleep", slept.append)
    monkeypatch.setattr(chunks, "_processor_ticks", lambda: next(readings))
    monkeypatch.setattr(chunks, "_own_ticks", lambda: next(own))
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {0, 1}, raising=False)
    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    watch = chunks.IdleWatch(own_work_idle=True)
    assert usable_threads(2, watch) == 2
    assert slept == [pytest.approx(0.07)]
    # Read after the window has passed: no wait at all.
    clock = iter([100.0, 100.25])
    readings = iter([(1000.0, 5000.0), (1010.0, 5040.0)])
    own = iter([500.0, 500.0])
    slept.clear()
    assert chunks.IdleWatch(own_work_idle=True).idle_cores() == pytest.approx(0.5)
    assert slept == [0.0]


def test_workers_count_the_threads_only_where_a_step_has_several_chunks(monkeypatch):
    # The demo's 2,000 draws in chunks of 1,000: the pilot (one chunk) runs in this
    # thread without asking; the rest (one chunk) too; 3,000 draws leave two chunks after
    # the pilot: the idle cores are counted then, once.
    from caredecide.uncertainty import psa

    model = load_model(demo_model_path())
    asked: list[int] = []

    def counted(requested, watch=None):
        asked.append(requested)
        return 2

    monkeypatch.setattr(psa, "usable_threads", counted)
    few = psa.analyse_uncertainty(model, 2000, 5, workers=2, chunk_size=1000)
    assert (asked, few.threads) == ([], 1)
    more = psa.analyse_uncertainty(model, 3000, 5, workers=2, chunk_size=1000)
    assert (asked, more.threads) == ([2], 2)
    serial = psa.analyse_uncertainty(model, 3000, 5, chunk_size=1000)
    np.testing.assert_array_equal(more.candidate_values, serial.candidate_values)
