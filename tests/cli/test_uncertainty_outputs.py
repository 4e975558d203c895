"""``caredecide uncertainty``: probabilistic means, population value of information,
parameters held fixed, per-strategy costs and QALYs in draws.csv."""

from __future__ import annotations

import pandas as pd
import pytest
from typer.testing import CliRunner

from caredecide.cli import app
from caredecide.uncertainty.voi import discounted_population
from synthetic_cohort import MODELS_DIR

runner = CliRunner()
DEMO = MODELS_DIR / "demo_progressive.toml"


def test_population_and_means_are_printed_and_written(tmp_path):
    out = tmp_path / "out"
    result = runner.invoke(
        app,
        ["uncertainty", str(DEMO), "--draws", "40", "--seed", "2", "--population-per-year",
         "1000", "--decision-years", "3", "--quiet", "--out", str(out)],
    )  # fmt: skip
    assert result.exit_code == 0, result.output
    assert "RESEARCH USE ONLY" in result.stderr
    assert "Probabilistic means per strategy" in result.stdout
    assert "Parameters held fixed at their base value" in result.stdout
    assert "q_toxicity" in result.stdout.split("held fixed")[1]
    population = pd.read_csv(out / "population_value_of_information.csv")
    # Demo outcome discount 3.5%: 1000 (1 + 1/1.035 + 1/1.035^2) persons (see
    # tests/test_psa_outputs.py for the hand arithmetic).
    assert population["persons"].iloc[0] == pytest.approx(discounted_population(1000, 3, 0.035))
    assert (out / "ce_plane_draws.svg").read_text().lstrip().startswith("<svg")
    draws = pd.read_csv(out / "draws.csv")
    means = pd.read_csv(out / "strategy_means.csv")
    for name in means["strategy"].iloc[:-1]:
        assert draws[f"cost: {name}"].mean() == pytest.approx(
            means.set_index("strategy").at[name, "mean_cost"], rel=1e-9
        )


def test_unknown_reference_is_a_clear_error():
    result = runner.invoke(
        app, ["uncertainty", str(DEMO), "--draws", "5", "--reference", "nope", "--quiet"]
    )
    assert result.exit_code == 2
    assert "reference" in result.stderr and "nope" in result.stderr
