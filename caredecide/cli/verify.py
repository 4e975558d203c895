"""``caredecide verify MODEL``: black-box verification checks of a model (exit 1 on a failure)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer
from rich.table import Table

from caredecide.cli.console import print_caution, stdout, user_errors
from caredecide.cli.model_warnings import SetOption, StrictOption, load_and_warn
from caredecide.cli.report import step_progress


def verify_command(
    model: Annotated[Path, typer.Argument(help="Model file (TOML).", dir_okay=False)],
    csv: Annotated[
        Path | None, typer.Option("--csv", help="Also write the table as CSV.", dir_okay=False)
    ] = None,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress on stderr.")] = False,
    strict: StrictOption = False,
    sets: SetOption = None,
) -> None:
    """Run the verification battery on a model; exit code 1 when a check fails."""
    from caredecide.analysis import analyse_verification
    from caredecide.exports import table_to_csv
    from caredecide.verify import CHECK_IDS, FAIL

    print_caution(model)
    with user_errors():
        loaded = load_and_warn(model, strict=strict, sets=sets)
        with step_progress("verify", len(CHECK_IDS), quiet) as step:
            report = analyse_verification(loaded, progress=step)
    table = Table(title=f"Verification of {loaded.title}")
    for column in ("check", "result", "figures"):
        table.add_column(column, overflow="fold")
    for check in report.checks:
        style = "bold red" if check.status == FAIL else ""
        table.add_row(
            check.title, f"[{style}]{check.status}[/]" if style else check.status, check.figures
        )
    stdout.print(table)
    failed = report.failures
    stdout.print(
        f"{len(failed)} of {len(report.checks)} checks failed"
        if failed
        else "Every check passed or does not apply."
    )
    if csv is not None:
        csv.write_bytes(table_to_csv(report.to_frame()))
    if failed:
        raise typer.Exit(code=1)


def register(app: typer.Typer) -> None:
    """Add ``verify`` to the root command."""
    app.command("verify", no_args_is_help=True)(verify_command)
