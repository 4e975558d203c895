"""The ``caredecide`` command line.

Each sub-command lives in its own module of this package and exposes
``register(app)``; :data:`COMMAND_MODULES` lists them in help order. Results go to
stdout, progress and warnings to stderr (see :mod:`caredecide.cli.console`).
"""

from __future__ import annotations

import importlib
from typing import Annotated

import typer

from caredecide import __version__
from caredecide.cautions import CAUTION_SHORT

# Add a sub-command: write caredecide/cli/<name>.py with register(app), then list it here.
COMMAND_MODULES: tuple[str, ...] = (
    "check",
    "solve",
    "sensitivity",
    "scenarios",
    "changes",
    "uncertainty",
    "best_schedule",
    "compare",
    "estimate",
    "report",
    "verify",
    "rerun",
    "app",
)

app = typer.Typer(
    name="caredecide",
    no_args_is_help=True,
    add_completion=False,
    help=(
        "When to start a treatment: solve a health-state model as a Markov decision process.\n\n"
        + CAUTION_SHORT
    ),
    epilog=CAUTION_SHORT,
)


def _show_version(value: bool) -> None:
    if value:
        typer.echo(f"caredecide {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: Annotated[
        bool,
        typer.Option(
            "--version", callback=_show_version, is_eager=True, help="Print the version and exit."
        ),
    ] = False,
) -> None:
    """When to start a treatment (research use only)."""


_root_app = app
for _name in COMMAND_MODULES:
    importlib.import_module(f"caredecide.cli.{_name}").register(_root_app)
# Importing the sub-command module caredecide.cli.app rebinds the package attribute ``app``
# to that module; put the Typer application back.
app = _root_app


def main() -> None:
    """Entry point of the ``caredecide`` console script."""
    app()
