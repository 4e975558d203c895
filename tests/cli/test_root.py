"""The root command: help, version and the caution line."""

from typer.testing import CliRunner

from caredecide import __version__
from caredecide.cli import app

runner = CliRunner()


def test_version_prints_package_version():
    result = runner.invoke(app, ["--version"])
    assert result.exit_code == 0
    assert result.stdout.strip() == f"caredecide {__version__}"


def test_help_carries_the_caution():
    result = runner.invoke(app, ["--help"])
    assert result.exit_code == 0
    assert "RESEARCH USE ONLY" in result.stdout
