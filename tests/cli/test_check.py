"""``caredecide check``: summary of a valid model, every error of a broken one."""

from __future__ import annotations

import tomli_w
from typer.testing import CliRunner

from caredecide.cli import app
from tests.conftest import small_model_dict

runner = CliRunner()


def test_demo_passes_check(demo_model_path):
    result = runner.invoke(app, ["check", str(demo_model_path)])
    assert result.exit_code == 0, result.output
    assert "is valid" in result.stdout
    # Table cells wrap at the terminal width: look for words, not whole sentences.
    for word in ("stage_1_tx", "treat", "hr_treatment", "Synthetic:"):
        assert word in result.stdout
    assert "45 cycles" in result.stdout
    assert "RESEARCH USE ONLY" in result.stderr
    assert "RESEARCH USE ONLY" not in result.stdout


def test_broken_model_lists_every_problem_and_exits_non_zero(tmp_path):
    data = small_model_dict()
    data["settings"]["cycle_years"] = -1.0
    data["parameters"]["p_sick"]["source"] = ""
    path = tmp_path / "broken.toml"
    path.write_text(tomli_w.dumps(data))
    result = runner.invoke(app, ["check", str(path)])
    assert result.exit_code == 2
    assert "settings.cycle_years: -1.0" in result.stderr
    assert "parameters.p_sick.source: missing source" in result.stderr
    assert "broken.toml" in result.stderr


def test_warnings_go_to_stderr(tmp_path):
    data = small_model_dict()
    data["states"][0]["qaly_weight"] = 1.1
    path = tmp_path / "warn.toml"
    path.write_text(tomli_w.dumps(data))
    result = runner.invoke(app, ["check", str(path), "--quiet"])
    assert result.exit_code == 0
    assert "warning:" in result.stderr and "states.well.qaly_weight" in result.stderr
    assert result.stdout == ""


def test_missing_file_is_a_clear_error(tmp_path):
    result = runner.invoke(app, ["check", str(tmp_path / "nothing.toml")])
    assert result.exit_code == 2
    assert "nothing.toml" in result.stderr
