"""``caredecide app``: the command it runs, the model it passes, its refusals."""

from __future__ import annotations

import subprocess
import sys

from typer.testing import CliRunner

from caredecide.cautions import CAUTION_SHORT
from caredecide.cli import app as root
from caredecide.cli.app import MAX_MODEL_BYTES, MODEL_ENV, app_script, streamlit_command
from synthetic_cohort import demo_model_path

runner = CliRunner()


def test_root_keeps_the_typer_application_after_loading_the_app_command():
    import typer

    assert isinstance(root, typer.Typer)


def test_command_runs_streamlit_on_loopback_with_the_model_in_the_environment(tmp_path):
    model = tmp_path / "m.toml"
    model.write_text("format = 1\n")
    command, env = streamlit_command(model, 8765, headless=True)
    assert command[:5] == [sys.executable, "-m", "streamlit", "run", str(app_script())]
    assert "--server.address=127.0.0.1" in command
    assert "--server.port=8765" in command
    assert "--server.headless=true" in command
    assert "--browser.gatherUsageStats=false" in command
    assert env[MODEL_ENV] == str(model.resolve())
    assert app_script().name == "app.py" and app_script().exists()


class _FakeServer:
    """Stands in for the streamlit process: records how it was started, exits with a code."""

    def __init__(self, calls: list, code: int = 0):
        self.calls, self.code = calls, code

    def __call__(self, command, env):
        self.calls.append((command, env))
        return self

    def wait(self) -> int:
        return self.code


def test_app_defaults_to_the_demo_model_and_prints_the_caution(monkeypatch):
    calls = []
    monkeypatch.setattr(subprocess, "Popen", _FakeServer(calls))
    result = runner.invoke(root, ["app", "--port", "9123", "--headless"])
    assert result.exit_code == 0, result.output
    (cmd, env), = calls
    assert env[MODEL_ENV] == str(demo_model_path().resolve())
    assert "--server.port=9123" in cmd
    assert CAUTION_SHORT in result.stderr


def test_app_passes_the_exit_code_of_streamlit_through(monkeypatch):
    monkeypatch.setattr(subprocess, "Popen", _FakeServer([], code=3))
    assert runner.invoke(root, ["app", "--quiet"]).exit_code == 3


def test_missing_model_file_is_refused_naming_it(tmp_path):
    result = runner.invoke(root, ["app", str(tmp_path / "nope.toml")])
    assert result.exit_code == 2
    assert "nope.toml" in result.output


def test_oversized_model_file_is_refused_with_its_size(tmp_path, monkeypatch):
    calls = []
    monkeypatch.setattr(subprocess, "Popen", _FakeServer(calls))
    big = tmp_path / "big.toml"
    big.write_bytes(b"#" * (MAX_MODEL_BYTES + 1))
    result = runner.invoke(root, ["app", str(big)])
    assert result.exit_code == 2
    assert f"{MAX_MODEL_BYTES + 1} bytes; expected at most {MAX_MODEL_BYTES}" in result.stderr
    assert calls == []  # the server was never started


def test_port_outside_the_allowed_range_is_refused():
    result = runner.invoke(root, ["app", "--port", "80"])
    assert result.exit_code == 2
    assert "greater than or equal to 1024" in result.output
