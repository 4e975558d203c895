"""``caredecide app``: the command it runs, the model it passes, its refusals."""

from __future__ import annotations

import subprocess
import sys

from typer.testing import CliRunner

from caredecide.cautions import CAUTION_SHORT
from caredecide.cli import app as root
from caredecide.cli.app import MAX_MODEL_BYTES, MODEL_ENV, app_script, streamlit_command
from synthetic_cohort import demo_model_path

# The package attribute ``caredecide.cli.app`` is the Typer application; the module is here.
app_module = sys.modules["caredecide.cli.app"]
runner = CliRunner()


def test_root_keeps_the_typer_application_after_loading_the_app_command():
    import typer

    assert isinstance(root, typer.Typer)


def test_command_runs_streamlit_on_loopback_with_the_model_in_the_environment(tmp_path):
    model = tmp_path / "m.toml"
    model.write_text("format = 1\n")
    command, env = streamlit_command(model, 8765)
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
    ((cmd, env),) = calls
    assert env[MODEL_ENV] == str(demo_model_path().resolve())
    assert "--server.port=9123" in cmd
    assert CAUTION_SHORT in result.stderr
    # The bundled model opens by default: the caution names the synthetic demo data.
    assert "Demo data are synthetic" in result.stderr


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
    assert f"larger than the limit of {MAX_MODEL_BYTES:,} bytes" in result.stderr
    assert calls == []  # the server was never started


def test_port_outside_the_allowed_range_is_refused():
    result = runner.invoke(root, ["app", "--port", "80"])
    assert result.exit_code == 2
    assert "greater than or equal to 1024" in result.output


def test_open_browser_mode_keeps_the_server_headless_and_opens_the_page(monkeypatch):
    # A non-headless streamlit stops at an interactive first-run prompt: the server is
    # always headless and the page is opened by us once the health check answers.
    calls, opened = [], []
    monkeypatch.setattr(subprocess, "Popen", _FakeServer(calls))
    monkeypatch.setattr(app_module, "open_browser_when_ready", opened.append)
    result = runner.invoke(root, ["app", "--port", "9124", "--open-browser"])
    assert result.exit_code == 0, result.output
    ((cmd, _env),) = calls
    assert "--server.headless=true" in cmd
    assert opened == ["http://127.0.0.1:9124"]


def test_browser_opens_once_the_health_check_answers(monkeypatch):
    class Healthy:
        status = 200

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            return False

    answers = iter([OSError("refused"), Healthy()])

    def fake_urlopen(url, timeout):
        answer = next(answers)
        if isinstance(answer, Exception):
            raise answer
        return answer

    opened = []
    monkeypatch.setattr(app_module.urllib.request, "urlopen", fake_urlopen)
    monkeypatch.setattr(app_module.webbrowser, "open", opened.append)
    monkeypatch.setattr(app_module.time, "sleep", lambda _s: None)
    app_module.open_browser_when_ready("http://127.0.0.1:9125", timeout_seconds=5).join(5)
    assert opened == ["http://127.0.0.1:9125"]
