"""The notebook API exposed at the package top level (README example)."""

import pytest

import caredecide as cd
from synthetic_cohort import demo_model_path


def test_readme_example_runs_and_agrees_with_evaluation():
    model = cd.load_model(demo_model_path())
    compiled = cd.compile_model(model)
    result = cd.solve(compiled, cd.Objective.from_settings(model.settings))
    outcome = cd.evaluate_policy(compiled, result.policy, result.objective)
    # The optimal value at the start equals the evaluated total of the same policy.
    start_value = float(result.value[0, 0] @ compiled.start_distribution)
    assert outcome.totals_frame()["value"].iloc[0] == pytest.approx(start_value, rel=1e-10)


def test_unknown_attribute_is_an_attribute_error():
    with pytest.raises(AttributeError, match="no_such_thing"):
        cd.no_such_thing  # noqa: B018
