"""``caredecide verify``: the table, exit codes, CSV output, errors."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
from typer.testing import CliRunner

from caredecide.cli import app
from caredecide.verify import CHECK_IDS

runner = CliRunner()
BROKEN = Path(__file__).parents[1] / "data" / "broken_models"


def test_passing_model_exits_zero_and_writes_the_table(tmp_path):
    run = runner.invoke(
        app,
        ["verify", str(BROKEN / "base_small.toml"), "--csv", str(tmp_path / "v.csv"), "--quiet"],
    )
    assert run.exit_code == 0, run.output
    assert "RESEARCH USE ONLY" in run.stderr
    assert "Every check passed or does not apply." in run.stdout
    table = pd.read_csv(tmp_path / "v.csv")
    assert list(table["check"]) == list(CHECK_IDS)
    assert set(table["status"]) == {"pass", "not applicable"}


def test_failing_check_exits_one():
    run = runner.invoke(app, ["verify", str(BROKEN / "closed_cohort.toml"), "--quiet"])
    assert run.exit_code == 1, run.output
    assert "1 of 13 checks failed" in run.stdout


def test_missing_model_file_is_a_clear_error(tmp_path):
    run = runner.invoke(app, ["verify", str(tmp_path / "absent.toml")])
    assert run.exit_code == 2
    assert "absent.toml" in run.stderr
