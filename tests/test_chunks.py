"""The one chunk driver: identical results across chunk sizes and serial versus Dask.

A chunk job is a pure function of its range of draws, and the solvers are vectorized over
draws (every draw is solved on its own), so cutting a batch into chunks or running the
chunks on a Dask cluster must not change a single figure (common practice for batched
Monte Carlo work: results do not depend on how the work is split).
"""

from __future__ import annotations

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
