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
    assert "RESEARCH USE ONLY" in result.stderr  # the caution is never hidden


def test_missing_file_is_a_clear_error(tmp_path):
    result = runner.invoke(app, ["check", str(tmp_path / "nothing.toml")])
    assert result.exit_code == 2
    assert "nothing.toml" in result.stderr


def test_bracketed_table_paths_and_labels_are_printed_literally(tmp_path):
    # A missing row names the TOML table to add, "[transitions.wait.sick]": rich must not
    # read it as markup and swallow it.
    data = small_model_dict()
    del data["transitions"]["wait"]["sick"]
    path = tmp_path / "row.toml"
    path.write_text(tomli_w.dumps(data))
    result = runner.invoke(app, ["check", str(path)])
    assert result.exit_code == 2
    assert "expected [transitions.wait.sick] (or [rates.wait.sick])" in result.stderr

    data = small_model_dict()
    data["states"][0]["label"] = "Well [stable]"
    data["parameters"]["p_sick"]["source"] = "Synthetic [table 2]"
    path = tmp_path / "labels.toml"
    path.write_text(tomli_w.dumps(data))
    result = runner.invoke(app, ["check", str(path)], env={"COLUMNS": "200"})
    assert result.exit_code == 0, result.output
    assert "Well [stable]" in result.stdout and "Synthetic [table 2]" in result.stdout


def test_a_folder_is_a_clear_error(tmp_path):
    result = runner.invoke(app, ["check", str(tmp_path)])
    assert result.exit_code == 2
    assert f"{tmp_path}: is a folder; expected a model file" in result.stderr
    assert "Traceback" not in result.output


def test_horizon_reads_in_whole_words(tmp_path):
    data = small_model_dict()
    data["settings"]["horizon_cycles"] = 1
    data["settings"]["cycle_years"] = 0.5
    path = tmp_path / "one.toml"
    path.write_text(tomli_w.dumps(data))
    result = runner.invoke(app, ["check", str(path)])
    assert "horizon: 1 cycle of 0.5 years from age 60" in result.stdout
