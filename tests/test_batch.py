"""Batch driver: chunked compile -> solve -> evaluate equals one big batch."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from caredecide.batch import chunk_size_for, draw_bytes, draw_working_bytes, solve_batch
from caredecide.compile import compile_model, estimate_compiled_bytes
from caredecide.errors import RunOptionError
from caredecide.evaluate import evaluate_policy
from caredecide.modelfile import load_model
from caredecide.objective import Objective
from caredecide.solvers import SolverError, solve
from synthetic_cohort import demo_model_path


@pytest.fixture(scope="module")
def model():
    return load_model(demo_model_path())


@pytest.fixture(scope="module")
def draws():
    rng = np.random.default_rng(5)
    return pd.DataFrame(
        {"hr_treatment": rng.uniform(0.3, 0.9, 7), "c_drug_year": rng.uniform(1000, 9000, 7)}
    )


def test_chunked_batch_equals_one_batch(model, draws):
    objective = Objective("net_benefit", 30000.0)
    calls = []
    batch = solve_batch(
        model,
        draws,
        objective,
        chunk_size=3,
        progress=lambda done, total: calls.append((done, total)),
    )
    compiled = compile_model(model, draws)
    whole = solve(compiled, objective)
    outcome = evaluate_policy(compiled, whole.policy, objective)
    np.testing.assert_array_equal(batch.fields["policy"], whole.policy)
    np.testing.assert_allclose(batch.fields["value"], whole.value, rtol=1e-12)
    np.testing.assert_allclose(
        batch.totals["net_monetary_benefit"], outcome.net_monetary_benefit, rtol=1e-12
    )
    assert batch.totals["draw"].tolist() == list(range(7))
    assert calls == [(3, 7), (6, 7), (7, 7)]
    assert batch.iterations == [compiled.n_cycles] * 3 and batch.success
    assert batch.chunk_size == 3 and batch.n_draws == 7


def test_reduce_callback_and_keep_nothing(model, draws):
    batch = solve_batch(
        model,
        draws.to_dict("list"),
        chunk_size=4,
        keep=(),
        reduce=lambda start, stop, result, outcome: (start, stop, result.policy.shape[0]),
    )
    assert batch.fields == {} and batch.totals is None
    assert batch.reductions == [(0, 4, 4), (4, 7, 3)]


def test_base_case_uses_the_model_objective(model):
    batch = solve_batch(model, None)
    assert batch.n_draws == 1
    assert batch.objective == Objective.from_settings(model.settings)
    assert batch.objective.willingness_to_pay == model.settings.willingness_to_pay


def test_chunk_size_follows_the_memory_budget(model):
    # One estimate for every batch: the pass's peak per draw (caredecide.memory, checked
    # against tracemalloc in tests/test_memory.py) plus what a chunk keeps beside it.
    from caredecide import memory

    per_draw = draw_bytes(model)
    assert per_draw == memory.draw_bytes(memory.shape_of(model)) + draw_working_bytes(model)
    assert per_draw > estimate_compiled_bytes(model, 1)
    assert chunk_size_for(model, 10_000, 10 * per_draw) == 10
    assert chunk_size_for(model, 10_000, 10 * per_draw - 1) == 9
    assert chunk_size_for(model, 10_000, 1) == 1  # never below one draw
    assert chunk_size_for(model, 5, 10**12) == 5  # never above the number of draws


def test_lean_batch_keeps_policy_and_value(model, draws):
    lean = solve_batch(model, draws, keep=("policy", "value", "totals"), action_values=False)
    full = solve_batch(model, draws, keep=("policy", "value", "totals"))
    np.testing.assert_array_equal(lean.fields["policy"], full.fields["policy"])
    np.testing.assert_allclose(lean.fields["value"], full.fields["value"], rtol=1e-12)


def test_batch_errors(model, draws):
    with pytest.raises(SolverError, match=r"keep names unknown field\(s\) \['policies'\]"):
        solve_batch(model, draws, keep=("policies",))
    with pytest.raises(SolverError, match=r"keep names \['action_gap'\], which a solve with"):
        solve_batch(model, draws, action_values=False)  # the default keep has action_gap
    with pytest.raises(RunOptionError, match="chunk_size = 0 is not allowed"):
        solve_batch(model, draws, chunk_size=0)
    with pytest.raises(SolverError, match="parameter_sets must be None"):
        solve_batch(model, [1, 2, 3])
    with pytest.raises(SolverError, match=r"different lengths \[2, 3\]"):
        solve_batch(model, {"hr_treatment": [0.5, 0.6], "c_drug_year": [1.0, 2.0, 3.0]})
