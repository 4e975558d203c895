"""The notebook API exposed at the package top level (README example, step by step)."""

import numpy as np
import pytest

import caredecide as cd
from synthetic_cohort import demo_model_path


@pytest.fixture(scope="module")
def readme_run():
    # The README's Python API example, line by line (synthetic demo model).
    model = cd.load_model(demo_model_path())
    compiled = cd.compile_model(model)
    result = cd.solve(compiled, cd.Objective.from_settings(model.settings))
    outcome = cd.evaluate_policy(compiled, result.policy, result.objective)
    return model, compiled, result, outcome


def test_readme_example_runs_and_agrees_with_evaluation(readme_run):
    _, compiled, result, outcome = readme_run
    # The optimal value at the start equals the evaluated total of the same policy.
    start_value = float(result.value[0, 0] @ compiled.start_distribution)
    assert outcome.totals_frame()["value"].iloc[0] == pytest.approx(start_value, rel=1e-10)


def test_readme_frames_are_long_one_row_per_cycle_and_state(readme_run):
    model, compiled, result, outcome = readme_run
    T, S = compiled.n_cycles, compiled.n_states
    policy = result.to_frame()
    assert policy.shape[0] == T * S
    assert not policy.duplicated(["cycle", "state"]).any()
    assert set(policy.state) == set(compiled.state_ids)
    assert set(policy.action) <= set(compiled.action_ids)
    # Age = start age + cycle x cycle length (the model's own settings).
    np.testing.assert_allclose(
        policy.age, model.settings.start_age + compiled.cycle_length * policy.cycle
    )
    trace = outcome.trace_frame()
    assert trace.shape[0] == (T + 1) * S
    np.testing.assert_allclose(trace.groupby("cycle").proportion.sum(), 1.0, rtol=1e-12)
    totals = outcome.totals_frame()
    assert totals.shape[0] == 1
    assert totals.net_monetary_benefit.iloc[0] == pytest.approx(
        result.objective.willingness_to_pay * totals.qalys.iloc[0] - totals.costs.iloc[0]
    )
    assert str(result.structure()) == result.structure().text != ""


def test_result_repr_is_a_short_summary(readme_run):
    _, compiled, result, outcome = readme_run
    text = repr(result)
    assert "backward_induction" in text and "success=True" in text
    assert f"policy: (1, {compiled.n_cycles}, {compiled.n_states})" in text
    assert len(text.splitlines()) < 25  # never the whole arrays
    assert "trace: (1, " in repr(outcome) and len(repr(outcome).splitlines()) < 25


def test_unknown_attribute_is_an_attribute_error():
    with pytest.raises(AttributeError, match="no_such_thing"):
        cd.no_such_thing  # noqa: B018
