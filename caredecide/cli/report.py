"""``caredecide report MODEL --out report.html``: one self-contained HTML report, every
result table as CSV plus an XLSX workbook, and a run record for ``caredecide rerun``."""

from __future__ import annotations

import shlex
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Annotated

import typer

from caredecide.cli.console import print_caution, progress, stderr, stdout, user_errors
from caredecide.cli.model_warnings import SetOption, StrictOption, load_and_warn, parse_sets


@contextmanager
def step_progress(name: str, total: int, quiet: bool) -> Iterator[Callable[[int, int, str], None]]:
    """A rich progress bar on stderr and its ``(done, total, step)`` callback."""
    with progress(name, total=total, quiet=quiet) as bar:
        task = bar.add_task(name, total=total)
        yield lambda done, total, step: bar.update(
            task, completed=done, total=total, description=step
        )


def report_command(
    model: Annotated[Path, typer.Argument(help="Model file (TOML).", dir_okay=False)],
    out: Annotated[
        Path,
        typer.Option(
            "--out",
            help="HTML report to write; tables and the run record go beside it.",
            dir_okay=False,
        ),
    ] = Path("report.html"),
    draws: Annotated[
        int | None,
        typer.Option(
            "--draws",
            min=1,
            help="Parameter draws for the probabilistic analysis (left out when not given).",
        ),
    ] = None,
    seed: Annotated[
        int, typer.Option("--seed", min=0, help="Seed of the probabilistic analysis.")
    ] = 1,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress on stderr.")] = False,
    strict: StrictOption = False,
    sets: SetOption = None,
) -> None:
    """Write a report of every analysis of a model (research use only)."""
    from caredecide.report import build_report, record_path_for, tables_dir_for

    # The caution is always shown (stderr), whatever --quiet says.
    print_caution(model)
    with user_errors():
        load_and_warn(model, strict=strict, sets=sets)
        with step_progress("report", 5, quiet) as step:
            record = build_report(
                model,
                out,
                draws=draws,
                seed=seed if draws else None,
                command_line=shlex.join(["caredecide", *sys.argv[1:]]),
                progress=step,
                overrides=parse_sets(sets),
            )
    failed = _failed_checks(tables_dir_for(out))
    if failed:
        # Shown even with --quiet: results of a model that fails verification need care.
        stderr.print(
            f"[bold red]warning:[/] {len(failed)} verification check(s) failed "
            f"({', '.join(failed)}); read the report's verification table before "
            "using the results."
        )
    stdout.print(f"Report: {out}")
    stdout.print(f"Tables: {tables_dir_for(out)} ({len(record.outputs)} files)")
    stdout.print(
        f"Run record: {record_path_for(out)} (re-run with: caredecide rerun {record_path_for(out)})"
    )
    if not quiet:
        stderr.print("Open the report in any browser; it needs no network.")


def _failed_checks(tables_dir: Path) -> list[str]:
    """Identifiers of the failed checks in the written verification table (if any)."""
    import csv

    from caredecide.verify import FAIL

    path = tables_dir / "verification.csv"
    if not path.is_file():
        return []
    with path.open(encoding="utf-8", newline="") as handle:
        return [row["check"] for row in csv.DictReader(handle) if row["status"] == FAIL]


def register(app: typer.Typer) -> None:
    """Add ``report`` to the root command."""
    app.command("report", no_args_is_help=True)(report_command)
