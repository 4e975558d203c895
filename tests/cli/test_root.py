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


def test_one_blas_thread_unless_the_user_chose_otherwise():
    # The command line sets the BLAS thread count before numpy loads (a fresh process);
    # a value the user exported is kept.
    import os
    import subprocess
    import sys

    code = (
        "import sys, caredecide.cli, os; "
        "print(os.environ['OPENBLAS_NUM_THREADS'], os.environ['OMP_NUM_THREADS'])"
    )
    env = {k: v for k, v in os.environ.items() if not k.endswith("_NUM_THREADS")}
    unset = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True)
    chosen = subprocess.run(
        [sys.executable, "-c", code],
        env={**env, "OPENBLAS_NUM_THREADS": "3"},
        capture_output=True,
        text=True,
    )
    assert unset.stdout.split() == ["1", "1"], unset.stderr
    assert chosen.stdout.split() == ["3", "1"], chosen.stderr
