"""``caredecide rerun RECORD``: repeat a recorded run and compare its outputs byte for byte."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from caredecide.cli.console import print_caution, stderr, stdout, user_errors
from caredecide.cli.report import step_progress


def rerun_command(
    record: Annotated[
        Path,
        typer.Argument(help="Run record (JSON) written by 'caredecide report'.", dir_okay=False),
    ],
    model: Annotated[
        Path | None,
        typer.Option(
            "--model",
            help="Model file to use instead of the path in the "
            "record (e.g. a record and model sent together); its hash is "
            "still compared.",
            dir_okay=False,
        ),
    ] = None,
    out: Annotated[
        Path | None,
        typer.Option(
            "--out",
            help="Folder for the re-run's tables (default: a temporary folder).",
            file_okay=False,
        ),
    ] = None,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress on stderr.")] = False,
) -> None:
    """Re-run a recorded analysis; exit code 1 when anything differs from the record."""
    from caredecide.report import rerun

    print_caution(model)
    with user_errors():
        with step_progress("rerun", 5, quiet) as step:
            outcome = rerun(record, model=model, out_dir=out, progress=step)
    for difference in outcome.version_differences:
        stderr.print(f"[yellow]note:[/] {difference}")
    if outcome.output_dir is not None:
        stdout.print(f"Re-run tables: {outcome.output_dir}")
    if outcome.reproduced:
        stdout.print(
            "Reproduced: the model file, its input files and every output match the record."
        )
        return
    if outcome.model_changed:
        stdout.print("The model file has changed since the run was recorded.")
    if outcome.inputs_changed:
        stdout.print(
            "An input file the model reads (life table or strategy table) has "
            "changed, vanished or appeared since the run was recorded."
        )
    for difference in outcome.differences:
        stdout.print(f"DIFFERS - {difference}")
    raise typer.Exit(code=1)


def register(app: typer.Typer) -> None:
    """Add ``rerun`` to the root command."""
    app.command("rerun", no_args_is_help=True)(rerun_command)
