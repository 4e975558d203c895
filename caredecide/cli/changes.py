"""``caredecide what-would-change MODEL``: per state, the recommendation and what flips it."""

from __future__ import annotations

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


def run_what_would_change(
    model: Annotated[
        Path,
        typer.Argument(help="Model file (TOML).", exists=True, dir_okay=False, readable=True),
    ],
    draws: Annotated[
        int,
        typer.Option(
            "--draws",
            min=0,
            max=1_000_000,
            help="Probabilistic draws for the share of draws that recommend something else "
            "per state (0: none).",
        ),
    ] = 0,
    seed: Annotated[int, typer.Option("--seed", min=0, help="Seed of the draws.")] = 1,
    scenario: Annotated[
        list[Path] | None,
        typer.Option(
            "--scenario",
            help="An alternative model file (same states and actions) to compare; repeatable.",
            exists=True,
            dir_okay=False,
            readable=True,
        ),
    ] = None,
    grid: Annotated[
        int, typer.Option("--grid", min=2, max=201, help="Grid values per estimate.")
    ] = 11,
    out: Annotated[
        Path | None,
        typer.Option("--out", help="Folder for flips.csv, recommendations.csv and the text."),
    ] = None,
    quiet: QuietOption = False,
    strict: StrictOption = False,
    sets: SetOption = None,
) -> None:
    """Per health state: the recommended policy, the estimates that could flip it inside
    their plausible ranges (at which values, with what probability), and scenarios that
    change it."""
    print_caution(model)
    with user_errors():
        from caredecide.sensitivity import parameter_thresholds
        from caredecide.sensitivity.recommendation import what_would_change
        from caredecide.sensitivity.variation import default_objective

        if out is not None:
            prepare_output_folder(out)
        loaded = load_and_warn(model, strict=strict, sets=sets)
        from caredecide.sensitivity.recommendation import model_scenarios

        # The model's own [scenarios] always count; --scenario files add to them.
        alternatives = {
            **model_scenarios(loaded),
            **{path.stem: load_and_warn(path, strict=strict) for path in scenario or []},
        }
        objective = default_objective(loaded)
        psa = None
        with progress("{task.description}", total=2, quiet=quiet) as bar:
            task = bar.add_task("decision thresholds", total=None)
            thresholds = (
                parameter_thresholds(
                    loaded,
                    objective=objective,
                    grid=grid,
                    progress=lambda d, t: bar.update(task, completed=d, total=t),
                )
                if loaded.base_parameter_values()
                else None
            )
            if draws:
                from caredecide.analysis import analyse_uncertainty

                task = bar.add_task("probabilistic draws", total=draws)
                psa = analyse_uncertainty(
                    loaded,
                    draws,
                    seed,
                    objective=objective,
                    progress=lambda d, t: bar.update(task, completed=d, total=t),
                )
        result = what_would_change(
            loaded, objective=objective, grid=grid, thresholds=thresholds, psa=psa,
            scenarios=alternatives,
        )  # fmt: skip
    lines = result.lines()
    for line in lines:
        stdout.print(plain(line))
    if out is not None:
        with user_errors(), writing_to(out) as folder:
            result.flips.to_csv(folder / "flips.csv", index=False)
            result.recommendations.to_csv(folder / "recommendations.csv", index=False)
            result.scenarios.to_csv(folder / "scenario_changes.csv", index=False)
            (folder / "what_would_change.txt").write_text("\n".join(lines) + "\n", encoding="utf-8")
        if not quiet:
            stderr.print(f"Wrote flips.csv, recommendations.csv and what_would_change.txt in {out}")


def register(app: typer.Typer) -> None:
    """Add the ``what-would-change`` command to the root CLI."""
    app.command("what-would-change", no_args_is_help=True)(run_what_would_change)
