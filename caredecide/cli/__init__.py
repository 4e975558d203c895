"""The ``caredecide`` command line.

Each sub-command lives in its own module of this package and exposes
``register(app)``; :data:`COMMAND_MODULES` lists them in help order. Results go to
stdout, progress and warnings to stderr (see :mod:`caredecide.cli.console`).
"""

from __future__ import annotations

import importlib
import os
from typing import Annotated

# One BLAS thread unless the user chose otherwise (set before numpy loads its BLAS): the
# matrices of a command are small (a model's states, a spline basis), where BLAS threads
# cost more in waiting than they save - on a busy machine ten times the work of a
# value-of-information fit - and the chunk threads of --workers would multiply them.
for _variable in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_variable, "1")

import typer  # noqa: E402

from caredecide import __version__  # noqa: E402
from caredecide.cautions import CAUTION_SHORT  # noqa: E402

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
