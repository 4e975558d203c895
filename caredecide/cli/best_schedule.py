"""``caredecide best-schedule MODEL``: the one schedule best over the probabilistic draws."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated

import typer

from caredecide.cli.console import (
    QuietOption,
    plain,
    prepare_output_folder,
    print_caution,
    progress,
    stderr,
    stdout,
    user_errors,
    writing_to,
)
from caredecide.cli.model_warnings import SetOption, StrictOption, load_and_warn


def run_best_schedule(
    model: Annotated[
        Path,
        typer.Argument(help="Model file (TOML).", exists=True, dir_okay=False, readable=True),
    ],
    draws: Annotated[
        int, typer.Option("--draws", min=1, max=1_000_000, help="Probabilistic draws.")
    ] = 1000,
    seed: Annotated[int, typer.Option("--seed", min=0, help="Seed of the draws.")] = 1,
    criterion: Annotated[
        str,
        typer.Option(
            "--criterion",
            help="What the schedule maximises: 'expected' (mean over the draws), "
            "'lower_percentile' (a low percentile of the objective) or 'regret_percentile' "
            "(minimises a high percentile of the regret against each draw's own optimum).",
        ),
    ] = "expected",
    percentile: Annotated[
        float,
        typer.Option(
            "--percentile", help="Percentile for the two percentile criteria (0 < P < 100)."
        ),
    ] = 5.0,
    out: Annotated[
        Path | None,
        typer.Option("--out", help="Folder for best_schedule.csv, starts.csv and summary.json."),
    ] = None,
    quiet: QuietOption = False,
    strict: StrictOption = False,
    sets: SetOption = None,
) -> None:
    """The single treat-or-wait schedule best over the parameter draws, beside the
    base-case schedule: value of the stochastic solution, EVPI against it, the cells
    where it differs (finite-horizon models)."""
    print_caution(model)
    with user_errors():
        from caredecide.analysis import analyse_best_schedule

        if out is not None:
            prepare_output_folder(out)
        loaded = load_and_warn(model, strict=strict, sets=sets)
        with progress("{task.description}", total=1, quiet=quiet) as bar:
            task = bar.add_task("searching from each start", total=None)
            result = analyse_best_schedule(
                loaded,
                draws,
                seed,
                criterion=criterion,
                percentile=percentile,
                progress=lambda d, t: bar.update(task, completed=d, total=t),
            )
    for line in result.lines():
        stdout.print(plain(line))
    if out is not None:
        with user_errors(), writing_to(out) as folder:
            result.policy_frame().to_csv(folder / "best_schedule.csv", index=False)
            result.to_frame().to_csv(folder / "starts.csv", index=False)
            (folder / "summary.json").write_text(
                json.dumps(result.to_dict(), indent=2, default=float), encoding="utf-8"
            )
        if not quiet:
            stderr.print(f"Wrote best_schedule.csv, starts.csv and summary.json in {out}")


def register(app: typer.Typer) -> None:
    """Add the ``best-schedule`` command to the root CLI."""
    app.command("best-schedule", no_args_is_help=True)(run_best_schedule)
