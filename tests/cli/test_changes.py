"""``caredecide what-would-change`` on the hand-checkable model of test_sensitivity."""

from __future__ import annotations

import pandas as pd
import pytest
from typer.testing import CliRunner

from caredecide.cli import app
from tests.cli.test_sensitivity import HAND_MODEL

runner = CliRunner()


@pytest.fixture
def model_file(tmp_path):
    path = tmp_path / "hand.toml"
    path.write_text(HAND_MODEL)
    return path


def test_prints_the_recommendation_and_the_flips(model_file, tmp_path):
    # Heavier toxicity (loss 0.1 > p (1 - hr) = 0.06): waiting becomes best at cycle 0.
    other = tmp_path / "heavier.toml"
    other.write_text(HAND_MODEL.replace("value = 0.05", "value = 0.1"))
    out = tmp_path / "out"
    result = runner.invoke(
        app,
        ["what-would-change", str(model_file), "--grid", "5", "--scenario", str(other),
         "--out", str(out)],
    )  # fmt: skip
    assert result.exit_code == 0, result.output
    assert "RESEARCH USE ONLY" in result.stderr
    assert "sick: recommended treat at age 0; wait at age 1" in result.stdout
    # Threshold p* = loss / (1 - hr) = 0.05 / 0.6 = 0.0833333 (hand algebra).
    assert "If p falls below 0.0833333" in result.stdout
    assert "Scenario 'heavier' changes it" in result.stdout
    flips = pd.read_csv(out / "flips.csv").set_index("parameter")
    assert flips.at["p", "threshold"] == pytest.approx(0.05 / 0.6, abs=1e-8)
    assert (out / "what_would_change.txt").read_text().startswith("What would change")


def test_unreadable_scenario_is_a_clear_error(model_file, tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("format = 2\ntitle = 3\n")
    result = runner.invoke(app, ["what-would-change", str(model_file), "--scenario", str(bad)])
    assert result.exit_code == 2
    assert "bad.toml" in result.stderr
