"""``caredecide best-schedule``: shows the library result, writes it, refuses bad input."""

from __future__ import annotations

import json

import pytest
from typer.testing import CliRunner

from caredecide.analysis import analyse_best_schedule
from caredecide.cli import app
from caredecide.modelfile import load_model
from synthetic_cohort import demo_model_path

runner = CliRunner()


def test_best_schedule_prints_and_writes_the_library_figures(tmp_path):
    # Common practice: the front end displays the analysis layer's numbers unchanged.
    out = tmp_path / "best"
    result = runner.invoke(
        app,
        ["best-schedule", str(demo_model_path()), "--draws", "60", "--seed", "3",
         "--out", str(out), "--quiet"],
    )  # fmt: skip
    assert result.exit_code == 0, result.output
    library = analyse_best_schedule(load_model(demo_model_path()), 60, 3)
    assert "research use only" in result.output.lower()
    assert f"{library.value_of_stochastic_solution:,.2f}" in result.output
    summary = json.loads((out / "summary.json").read_text())
    assert summary["value_of_stochastic_solution"] == pytest.approx(
        library.value_of_stochastic_solution, rel=1e-12, abs=1e-9
    )
    assert summary["evpi_best"] <= summary["evpi_candidates"] + 1e-9
    assert (out / "best_schedule.csv").read_text().startswith("cycle,age,state")


def test_best_schedule_refuses_a_bad_criterion_naming_it():
    result = runner.invoke(
        app, ["best-schedule", str(demo_model_path()), "--draws", "5", "--criterion", "luck"]
    )
    assert result.exit_code == 2
    assert "criterion" in result.output and "luck" in result.output
    assert "Traceback" not in result.output


def test_best_schedule_refuses_an_infinite_horizon_model():
    from synthetic_cohort import MODELS_DIR

    path = MODELS_DIR / "teaching_stationary.toml"
    result = runner.invoke(app, ["best-schedule", str(path), "--draws", "5"])
    assert result.exit_code == 2
    assert "finite-horizon" in result.output
