"""``caredecide sensitivity MODEL``: one-way ranking, decision thresholds, two-way map."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Annotated

import pandas as pd
import typer
from rich.table import Table

from caredecide.cli.common import print_caution, progress, stderr, stdout, user_errors


def _number(value: float) -> str:
    return (
        "" if value is None or (isinstance(value, float) and math.isnan(value)) else f"{value:,.6g}"
    )


def _one_way_table(table: pd.DataFrame, unit: str) -> Table:
    out = Table(title=f"One-way sensitivity, ranked by swing (objective at the start, {unit})")
    for column in ("rank", "parameter", "low", "high", "at low", "base", "at high", "swing"):
        out.add_column(column, justify="left" if column == "parameter" else "right")
    out.add_column("policy changes (vs base)")
    for row in table.itertuples():
        changes = row.policy_changes
        out.add_row(
            str(row.rank),
            row.parameter + (" *" if changes != "none" else ""),
            _number(row.low),
            _number(row.high),
            _number(row.value_low),
            _number(row.value_base),
            _number(row.value_high),
            _number(row.swing),
            changes,
        )
    return out


def _threshold_table(summary: pd.DataFrame, title: str) -> Table:
    key = "parameter" if "parameter" in summary.columns else "setting"
    out = Table(title=title)
    for column in (key, "state", "ages", "below", "above", "threshold from", "to"):
        out.add_column(column)
    for row in summary.itertuples():
        out.add_row(
            str(getattr(row, key)),
            "" if pd.isna(row.state) else str(row.state),
            str(row.ages),
            "" if pd.isna(row.action_below) else str(row.action_below),
            "" if pd.isna(row.action_above) else str(row.action_above),
            _number(row.threshold_min),
            _number(row.threshold_max),
        )
    return out


def _save_chart(chart, out: Path, stem: str) -> list[Path]:
    paths = [out / f"{stem}.svg", out / f"{stem}.png"]
    chart.save(str(paths[0]))
    chart.save(str(paths[1]), scale_factor=2)
    return paths


def run_sensitivity(
    model: Annotated[
        Path,
        typer.Argument(help="Model file (TOML).", exists=True, dir_okay=False, readable=True),
    ],
    parameters: Annotated[
        list[str] | None,
        typer.Option(
            "--parameters",
            "-p",
            help="Parameter(s) to vary: repeat the option or separate by commas (default: all).",
        ),
    ] = None,
    two_way_pair: Annotated[
        tuple[str, str] | None,
        typer.Option("--two-way", help="Two parameters for a two-way map."),
    ] = None,
    grid: Annotated[
        int,
        typer.Option("--grid", min=2, max=201, help="Grid values per parameter (thresholds, map)."),
    ] = 11,
    wtp_max: Annotated[
        float | None,
        typer.Option(
            "--wtp-max", min=0.0, help="Search willingness to pay in [0, X] (default: 2 x model's)."
        ),
    ] = None,
    discount_max: Annotated[
        float,
        typer.Option(
            "--discount-max", min=0.0, max=0.99, help="Search the discount rate in [0, X]."
        ),
    ] = 0.10,
    out: Annotated[
        Path | None,
        typer.Option("--out", help="Folder for CSV files and charts (SVG, PNG)."),
    ] = None,
    quiet: Annotated[
        bool, typer.Option("--quiet", help="No caution or progress on stderr.")
    ] = False,
) -> None:
    """Rank the estimates by how much they move the decision; find decision thresholds.

    Parameters in a Dirichlet group move with the other members rescaled proportionally
    (the group sum stays fixed); rows with a 'rest' entry absorb changes automatically.
    """
    print_caution(quiet)
    with user_errors():
        from caredecide.modelfile import load_model
        from caredecide.sensitivity import (
            one_way,
            parameter_thresholds,
            setting_thresholds,
            summarise_thresholds,
            two_way,
        )
        from caredecide.sensitivity.variation import default_objective

        # load_model refuses oversized files (caredecide.modelfile.MAX_MODEL_BYTES).
        loaded = load_model(model)
        objective = default_objective(loaded)
        names = [n.strip() for p in parameters or [] for n in p.split(",") if n.strip()] or None
        finite = loaded.n_cycles() is not None
        steps = ["one-way", "parameter thresholds"]
        if objective.kind == "net_benefit":
            steps.append("willingness-to-pay threshold")
        if finite:
            steps.append("discount-rate threshold")
        if two_way_pair:
            steps.append("two-way map")
        results: dict[str, pd.DataFrame] = {}
        with progress("{task.description}", total=len(steps), quiet=quiet) as bar:
            tasks = {step: bar.add_task(step, total=None) for step in steps}

            def report(step: str):
                return lambda done, total: bar.update(tasks[step], completed=done, total=total)

            for step in steps:
                if step == "one-way":
                    one = one_way(loaded, names, objective=objective)
                    results["oneway"] = one.table
                    results["policy_switches"] = one.switches
                elif step == "parameter thresholds":
                    results["thresholds"] = parameter_thresholds(
                        loaded, names, objective=objective, grid=grid, progress=report(step)
                    )
                elif step.startswith("willingness"):
                    high = wtp_max if wtp_max is not None else 2 * objective.willingness_to_pay
                    results["threshold_willingness_to_pay"] = setting_thresholds(
                        loaded, "willingness_to_pay", 0.0, high, objective=objective,
                        grid=max(grid, 21), progress=report(step),
                    )  # fmt: skip
                elif step.startswith("discount"):
                    results["threshold_discount_rate"] = setting_thresholds(
                        loaded, "discount_rate", 0.0, discount_max, objective=objective,
                        grid=max(grid, 21), progress=report(step),
                    )  # fmt: skip
                else:
                    x, y = two_way_pair
                    results["twoway"] = two_way(
                        loaded, x, y, grid=grid, objective=objective, progress=report(step)
                    )
                finished = next(t for t in bar.tasks if t.id == tasks[step])
                total = finished.total or 1
                bar.update(tasks[step], completed=total, total=total)

    stdout.print(f"Objective: {objective.describe()}; model: {loaded.title}")
    stdout.print(_one_way_table(results["oneway"], objective.unit))
    stdout.print("* the optimal policy changes within this parameter's plausible range")
    rules = results["oneway"][["parameter", "rule"]]
    moved = rules[rules["rule"] != "moved alone"]
    for row in moved.itertuples():
        stdout.print(f"  {row.parameter}: {row.rule}")
    stdout.print(
        _threshold_table(
            summarise_thresholds(results["thresholds"]),
            "Decision thresholds (parameter value where the best action switches)",
        )
    )
    for key, label in (
        ("threshold_willingness_to_pay", "willingness to pay"),
        ("threshold_discount_rate", "discount rate (outcomes and costs together)"),
    ):
        if key in results:
            stdout.print(
                _threshold_table(summarise_thresholds(results[key]), f"Threshold: {label}")
            )
    if "twoway" in results:
        counts = results["twoway"]["action_at_start"].value_counts()
        stdout.print(
            "Two-way map, best action at the start: "
            + ", ".join(f"{a}: {n} grid points" for a, n in counts.items())
        )

    if out is not None:
        with user_errors():
            _write_outputs(out, results, objective.unit, quiet)


def _write_outputs(out: Path, results: dict[str, pd.DataFrame], unit: str, quiet: bool) -> None:
    from ui.charts import make_tornado_chart, make_two_way_chart

    out.mkdir(parents=True, exist_ok=True)
    written = []
    for name, frame in results.items():
        path = out / f"{name}.csv"
        frame.to_csv(path, index=False)
        written.append(path)
    written += _save_chart(make_tornado_chart(results["oneway"], unit=f"({unit})"), out, "tornado")
    if "twoway" in results:
        written += _save_chart(make_two_way_chart(results["twoway"]), out, "twoway")
    if not quiet:
        stderr.print("Wrote " + ", ".join(str(p) for p in written))


def register(app: typer.Typer) -> None:
    """Add the ``sensitivity`` command to the root CLI."""
    app.command("sensitivity", no_args_is_help=True)(run_sensitivity)
