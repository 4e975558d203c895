"""Every command shows the model's warnings on stderr; ``--strict`` makes them errors."""

from __future__ import annotations

import subprocess

import pytest
import tomli_w
from typer.testing import CliRunner

from caredecide.cli import app
from tests.conftest import small_model_dict

runner = CliRunner()

# A QALY weight of 75 per year is not a utility (full health is 1): a typing slip that a
# modeller would want flagged on every command, not only `check` (common practice).
QALY_SLIP = "QALY weight 75 is above 1"


@pytest.fixture
def slip_model(tmp_path):
    data = small_model_dict()
    data["states"][0]["qaly_weight"] = 75.0
    path = tmp_path / "slip.toml"
    path.write_text(tomli_w.dumps(data), encoding="utf-8")
    return path


COMMANDS = {
    "check": ["check", "{m}", "--quiet"],
    "solve": ["solve", "{m}", "--quiet"],
    "compare": ["compare", "{m}", "--quiet"],
    "sensitivity": ["sensitivity", "{m}", "--quiet", "--parameters", "p_sick"],
    "uncertainty": ["uncertainty", "{m}", "--quiet", "--draws", "20"],
    "verify": ["verify", "{m}", "--quiet"],
    "report": ["report", "{m}", "--quiet", "--out", "{out}/report.html"],
    "what-would-change": ["what-would-change", "{m}", "--quiet"],
}


def _args(name: str, model, tmp_path) -> list[str]:
    return [a.format(m=model, out=tmp_path) for a in COMMANDS[name]]


@pytest.mark.parametrize("name", ["solve", "check", "verify"])
def test_warnings_shown_by_quick_commands(name, slip_model, tmp_path):
    run = runner.invoke(app, _args(name, slip_model, tmp_path))
    assert QALY_SLIP in run.stderr
    assert "states.well.qaly_weight" in run.stderr
    assert str(slip_model) in run.stderr


@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_strict_stops_every_command_before_the_analysis(name, slip_model, tmp_path):
    run = runner.invoke(app, [*_args(name, slip_model, tmp_path), "--strict"])
    assert run.exit_code == 2, run.output
    assert "--strict" in run.stderr
    assert QALY_SLIP in run.stderr
    assert "RESEARCH USE ONLY" in run.stderr
    assert not (tmp_path / "report.html").exists()


def test_strict_passes_a_model_without_warnings(tmp_path):
    data = small_model_dict()
    # The small model's treat action keeps part of the cohort in `sick` (the repeat-charge
    # pattern); a model with no one-off charge has no warning at all.
    data["actions"][1]["oneoff_cost"] = 0.0
    data["actions"][1]["oneoff_qaly_loss"] = 0.0
    path = tmp_path / "clean.toml"
    path.write_text(tomli_w.dumps(data), encoding="utf-8")
    run = runner.invoke(app, ["solve", str(path), "--quiet", "--strict"])
    assert run.exit_code == 0, run.stderr
    assert "warning" not in run.stderr


def test_app_prints_warnings_and_strict_refuses_to_start(slip_model, monkeypatch):
    started = []
    monkeypatch.setattr(subprocess, "Popen", lambda *a, **k: started.append(a))
    run = runner.invoke(app, ["app", str(slip_model), "--headless", "--strict"])
    assert run.exit_code == 2
    assert QALY_SLIP in run.stderr
    assert started == []


def test_an_unknown_parameter_on_the_command_line_gets_a_suggestion(slip_model):
    run = runner.invoke(app, ["sensitivity", str(slip_model), "--parameters", "p_sik"])
    assert run.exit_code == 2
    assert "unknown parameter 'p_sik' (did you mean p_sick" in run.stderr
