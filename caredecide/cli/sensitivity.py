"""``caredecide sensitivity MODEL``: one-way ranking, decision thresholds, two-way map."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Annotated

import pandas as pd
import typer
from rich.console import Console
from rich.table import Table

from caredecide.cli.cell_table import cell_notes, cell_table, save_cell_matrices
from caredecide.cli.console import (
    QuietOption,
    plain,
    prepare_output_folder,
    print_caution,
    progress,
    save_chart,
    stderr,
    stdout,
    user_errors,
    writing_to,
)
from caredecide.cli.model_warnings import SetOption, StrictOption, load_and_warn
from caredecide.errors import ModelError, Problem

TABLE_WIDTH = 150
"""Tables are printed at least this wide (characters): a pipe defaults to 80, which would
cut parameter names short."""
MAP_MAX = 25
"""A two-way map is printed as text up to this many values per axis (else: the CSV)."""


def _print(renderable: object) -> None:
    """Print a table on stdout at least :data:`TABLE_WIDTH` wide."""
    Console(width=max(stdout.width, TABLE_WIDTH), highlight=False).print(renderable)


def _number(value: float) -> str:
    return (
        "" if value is None or (isinstance(value, float) and math.isnan(value)) else f"{value:,.6g}"
    )


def _one_way_table(table: pd.DataFrame, unit: str) -> Table:
    out = Table(title=f"One-way sensitivity, ranked by swing (objective at the start, {unit})")
    for column in ("rank", "parameter", "low", "high", "at low", "base", "at high", "swing"):
        out.add_column(column, justify="left" if column == "parameter" else "right", no_wrap=True)
    out.add_column("cells that switch (low / high)", justify="right")
    for row in table.itertuples():
        changes = row.policy_changes
        out.add_row(
            str(row.rank),
            plain(row.parameter) + (" *" if changes != "none" else ""),
            _number(row.low),
            _number(row.high),
            _number(row.value_low),
            _number(row.value_base),
            _number(row.value_high),
            _number(row.swing),
            f"{row.switches_low} / {row.switches_high}",
        )
    return out


def _decision_table(table: pd.DataFrame, unit: str) -> Table:
    """The decision tornado: value lost by keeping the base-case policy, ranked."""
    from caredecide.sensitivity.decision import LOSS_SOURCE

    out = Table(
        title=f"Decision tornado: value lost by keeping the base-case policy ({unit} per "
        f"person), ranked by the mean at the two ends ({LOSS_SOURCE})"
    )
    for column in ("rank", "parameter", "low end", "high end", "mean", "cells",
                   "threshold", "distance", "value rank"):  # fmt: skip
        out.add_column(column, justify="left" if column == "parameter" else "right", no_wrap=True)
    for row in table.itertuples():
        out.add_row(
            str(row.rank),
            plain(row.parameter),
            _number(row.loss_low),
            _number(row.loss_high),
            _number(row.loss_at_bounds),
            f"{row.share_cells_changed:.0%}",
            _number(row.nearest_threshold),
            "" if math.isnan(row.distance_share) else f"{row.distance_share:.1%}",
            str(row.value_rank),
        )
    return out


def _context_table(context: pd.DataFrame) -> Table:
    """Decision thresholds beside the base value, range and probability beyond."""
    out = Table(
        title="Decision thresholds (parameter value where the best action switches), with the "
        "base value, the distance as a share of the range and the probability of a value "
        "beyond under the distribution"
    )
    for column in ("parameter", "state", "ages", "below", "above", "base", "threshold",
                   "distance", "P(beyond)"):  # fmt: skip
        out.add_column(column, no_wrap=column not in ("ages", "below", "above"))
    for row in context.itertuples():
        out.add_row(
            plain(row.parameter),
            "" if pd.isna(row.state) else plain(row.state),
            str(row.ages),
            "" if pd.isna(row.label_below) else plain(row.label_below),
            "" if pd.isna(row.label_above) else plain(row.label_above),
            _number(row.base),
            _number(row.threshold),
            "" if pd.isna(row.distance_share) else f"{row.distance_share:.1%}",
            "" if pd.isna(row.probability_beyond) else f"{row.probability_beyond:.1%}",
        )
    return out


def _policy_changes(table: pd.DataFrame) -> list[str]:
    """One line per parameter whose range changes the policy: where and how."""
    return [
        f"  {plain(row.parameter)}: {plain(row.policy_changes)}"
        for row in table.itertuples()
        if row.policy_changes != "none"
    ]


def _two_way_map(frame: pd.DataFrame) -> tuple[Table, list[str]]:
    """The best action at the start on the grid as letters (rows: y, high values first)."""
    actions = list(dict.fromkeys(frame["action_at_start"]))
    letter = {a: chr(ord("A") + i) if i < 26 else str(i) for i, a in enumerate(actions)}
    x_name, y_name = frame["x_parameter"].iloc[0], frame["y_parameter"].iloc[0]
    xs = sorted(frame["x_value"].unique())
    ys = sorted(frame["y_value"].unique(), reverse=True)
    cells = frame.set_index(["y_value", "x_value"])
    out = Table(
        title=f"Best action at the start over {plain(x_name)} (columns) and {plain(y_name)} "
        "(rows, base values included); * the policy differs from the base case somewhere; "
        "B the base case",
        show_lines=False,
    )
    out.add_column(f"{plain(y_name)} \\ {plain(x_name)}", justify="right", no_wrap=True)
    for x in xs:
        out.add_column(_number(x), justify="center", no_wrap=True)
    for y in ys:
        row = [_number(y)]
        for x in xs:
            cell = cells.loc[(y, x)]
            mark = "" if cell["same_as_base"] else "*"
            row.append(letter[cell["action_at_start"]] + mark + (" B" if cell["is_base"] else ""))
        out.add_row(*row)
    legend = [f"  {letter[a]} = {plain(a)}" for a in actions]
    return out, legend


def _ignoring_step(update):
    """A suite progress callback (step, done, total) that updates one bar."""
    return lambda _step, done, total: update(done, total)


def _threshold_table(summary: pd.DataFrame, title: str) -> Table:
    key = "parameter" if "parameter" in summary.columns else "setting"
    out = Table(title=title)
    for column in (key, "state", "ages", "below", "above", "threshold from", "to"):
        out.add_column(column, no_wrap=column != "ages")
    for row in summary.itertuples():
        out.add_row(
            plain(getattr(row, key)),
            "" if pd.isna(row.state) else plain(row.state),
            str(row.ages),
            "" if pd.isna(row.action_below) else plain(row.action_below),
            "" if pd.isna(row.action_above) else plain(row.action_above),
            _number(row.threshold_min),
            _number(row.threshold_max),
        )
    return out


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
    region_map: Annotated[
        str | None,
        typer.Option(
            "--region-map",
            help="A parameter: map the best action per (its value, age) in every state "
            "(region_map.csv and chart with --out).",
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
            "--wtp-max",
            min=0.0,
            help="Search the willingness-to-pay threshold in [0, X] (net-benefit models; "
            "default: 2 x the model's).",
        ),
    ] = None,
    discount_max: Annotated[
        float,
        typer.Option(
            "--discount-max",
            min=0.0,
            max=0.99,
            help="Search the discount-rate threshold (outcomes and costs together) in [0, X] "
            "(finite-horizon models).",
        ),
    ] = 0.10,
    transition_cells: Annotated[
        bool,
        typer.Option(
            "--transition-cells",
            help="Also scale each transition cell by a factor and find the factor below and "
            "above 1 at which the optimal policy first changes (the transition sensitivity "
            "matrix).",
        ),
    ] = False,
    cell_loss_factors: Annotated[
        tuple[float, float],
        typer.Option(
            "--cell-loss-factors",
            help="With --transition-cells: the two factors (one below 1, one above) at which "
            "the value lost by keeping the base-case policy is reported.",
        ),
    ] = (0.5, 2.0),
    cell_search_max: Annotated[
        float,
        typer.Option(
            "--cell-search-max",
            help="With --transition-cells: the largest factor searched above 1.",
        ),
    ] = 10.0,
    out: Annotated[
        Path | None,
        typer.Option("--out", help="Folder for CSV files and charts (SVG, PNG)."),
    ] = None,
    quiet: QuietOption = False,
    strict: StrictOption = False,
    sets: SetOption = None,
) -> None:
    """Rank the estimates by how much they move the decision; find decision thresholds.

    Parameters in a Dirichlet group move with the other members rescaled proportionally
    (the group sum stays fixed); rows with a 'rest' entry absorb changes automatically.
    """
    print_caution(model)
    with user_errors():
        from caredecide.analysis.sensitivity import analyse_sensitivity
        from caredecide.sensitivity import cell_sensitivity, summarise_thresholds, two_way
        from caredecide.sensitivity.cells import check_cell_options
        from caredecide.sensitivity.context import threshold_context
        from caredecide.sensitivity.decision import decision_tornado
        from caredecide.sensitivity.regions import policy_region_map
        from caredecide.sensitivity.variation import default_objective

        if out is not None:  # before the run: a folder that cannot be made fails at once
            prepare_output_folder(out)
        # load_model refuses oversized files (caredecide.modelfile.MAX_MODEL_BYTES).
        loaded = load_and_warn(model, strict=strict, sets=sets)
        if two_way_pair:  # check the pair before the long one-way and threshold runs
            _check_pair(loaded, two_way_pair, str(model))
        if region_map:  # an unknown name: an error naming parameters.<name>, before the runs
            from caredecide.sensitivity import parameter_ranges

            parameter_ranges(loaded, [region_map])
        if transition_cells:
            check_cell_options(
                cell_loss_factors, cell_search_max,
                names={"loss_factors": "--cell-loss-factors", "search_max": "--cell-search-max"},
            )  # fmt: skip
        objective = default_objective(loaded)
        names = [n.strip() for p in parameters or [] for n in p.split(",") if n.strip()] or None
        if wtp_max is not None and objective.kind != "net_benefit" and not quiet:
            stderr.print(
                f"note: {plain(model)} maximises QALYs; --wtp-max is used only with "
                "objective = 'net_benefit' (no willingness-to-pay threshold searched)"
            )
        steps = ["one-way and thresholds"]
        if two_way_pair:
            steps.append("two-way map")
        if region_map:
            steps.append("region map")
        region_meta = None
        if transition_cells:
            steps.append("transition cells")
        results: dict[str, pd.DataFrame] = {}
        with progress("{task.description}", total=len(steps), quiet=quiet) as bar:
            tasks = {step: bar.add_task(step, total=None) for step in steps}

            def report(step: str):
                return lambda done, total: bar.update(tasks[step], completed=done, total=total)

            for step in steps:
                if step == "one-way and thresholds":
                    # The suite holds every rule: what is searched, over which range, and
                    # what is skipped and why (shown below as notes).
                    suite = analyse_sensitivity(
                        loaded, names, objective=objective, grid=grid, wtp_max=wtp_max,
                        discount_max=discount_max,
                        progress=_ignoring_step(report(step)),
                    )  # fmt: skip
                    results.update(suite.tables())
                    results["thresholds_context"] = threshold_context(loaded, suite.thresholds)
                    results["decision_tornado"] = decision_tornado(
                        loaded, names, objective=objective, grid=grid,
                        thresholds=suite.thresholds,
                    ).table  # fmt: skip
                    if not quiet:
                        for text in suite.notes:
                            stderr.print(f"note: {plain(model)}: {plain(text)}")
                elif step == "region map":
                    assert region_map is not None  # the step is listed only with a name
                    regions = policy_region_map(loaded, region_map, objective=objective)
                    results["region_map"] = regions.frame
                    region_meta = (regions.parameter, regions.base, regions.action_labels)
                elif step == "transition cells":
                    cells = cell_sensitivity(
                        loaded, objective=objective, loss_factors=cell_loss_factors,
                        search_max=cell_search_max, progress=report(step),
                    )  # fmt: skip
                    results["transition_cells"] = cells.to_frame()
                else:
                    assert two_way_pair is not None  # the step is listed only with a pair
                    x, y = two_way_pair
                    results["twoway"] = two_way(
                        loaded, x, y, grid=grid, objective=objective, progress=report(step),
                        include_base=True,
                    )  # fmt: skip
                finished = next(t for t in bar.tasks if t.id == tasks[step])
                total = finished.total or 1
                bar.update(tasks[step], completed=total, total=total)

    for key in ("thresholds", "threshold_willingness_to_pay", "threshold_discount_rate"):
        frame = results.get(key)
        if frame is not None and (frame["status"] == "switch").any():
            open_ = frame[(frame["status"] == "switch") & ~frame["converged"].astype(bool)]
            if len(open_):  # never silent: the threshold is only the last iterate
                stderr.print(
                    f"[bold yellow]warning:[/] {len(open_)} threshold(s) in {key}.csv did not "
                    "converge (the value shown is the last iterate of Brent's method)"
                )
    stdout.print(f"Objective: {plain(objective.describe())}; model: {plain(loaded.title)}")
    _print(_decision_table(results["decision_tornado"], objective.unit))
    _print(_one_way_table(results["oneway"], objective.unit))
    changes = _policy_changes(results["oneway"])
    if changes:
        stdout.print(
            "* the optimal policy changes within this parameter's plausible range "
            "(end of the range: state, base action -> new action, ages):"
        )
        for line in changes:
            stdout.print(line)
    rules = results["oneway"][["parameter", "rule"]]
    moved = rules[rules["rule"] != "moved alone"]
    if len(moved):
        stdout.print("How the other estimates follow a move:")
    for row in moved.itertuples():
        stdout.print(f"  {plain(row.parameter)}: {plain(row.rule)}")
    _print(_context_table(results["thresholds_context"]))
    for key, label in (
        ("threshold_willingness_to_pay", "willingness to pay"),
        ("threshold_discount_rate", "discount rate (outcomes and costs together)"),
    ):
        if key in results:
            _print(_threshold_table(summarise_thresholds(results[key]), f"Threshold: {label}"))
    if "twoway" in results:
        frame = results["twoway"]
        if grid <= MAP_MAX:
            table, legend = _two_way_map(frame)
            _print(table)
            for line in legend:
                stdout.print(line)
        else:
            counts = frame["action_at_start"].value_counts()
            stdout.print(
                "Two-way map, best action at the start: "
                + ", ".join(f"[{plain(a)}] at {n} grid points" for a, n in counts.items())
                + " (every point in twoway.csv with --out)"
            )

    if transition_cells:
        table, lines = cell_table(cells.summary_table(), objective.unit)
        _print(table)
        stdout.print("Policy changes just past each switch (state, base action -> new, ages):")
        for line in lines + cell_notes(cells):
            stdout.print(line)

    if out is not None:
        with user_errors():
            _write_outputs(out, results, objective.unit, quiet, region_meta)
            if transition_cells:
                written = save_cell_matrices(cells, out)
                if not quiet:
                    stderr.print("Wrote " + ", ".join(str(out / p.name) for p in written))


def _check_pair(model, pair: tuple[str, str], file: str) -> None:
    """Refuse a ``--two-way`` pair of one name twice or of unknown names."""
    from caredecide.sensitivity import parameter_ranges

    if pair[0] == pair[1]:
        raise ModelError(
            Problem(
                where="--two-way",
                message=f"needs two different parameters, got {pair[0]!r} twice",
            ),
            file=file,
        )
    parameter_ranges(model, list(pair))  # unknown names: an error naming parameters.<name>


def _write_outputs(
    out: Path, results: dict[str, pd.DataFrame], unit: str, quiet: bool, region_meta=None
) -> None:
    from caredecide.charts import make_tornado_chart, make_two_way_chart
    from caredecide.decision_charts import make_decision_tornado_chart, make_region_map_chart

    written = []
    with writing_to(out) as folder:
        for name, frame in results.items():
            path = folder / f"{name}.csv"
            frame.to_csv(path, index=False)
            written.append(path)
        tornado = make_tornado_chart(results["oneway"], unit=f"({unit})")
        written += save_chart(tornado, folder, "tornado")
        decision = make_decision_tornado_chart(results["decision_tornado"], unit=unit)
        written += save_chart(decision, folder, "decision_tornado")
        if region_meta is not None:
            name, base, labels = region_meta
            chart = make_region_map_chart(
                results["region_map"], x_title=name, action_labels=labels, base=base
            )
            written += save_chart(chart, folder, "region_map")
        if "twoway" in results:
            written += save_chart(make_two_way_chart(results["twoway"]), folder, "twoway")
    if not quiet:
        stderr.print("Wrote " + ", ".join(str(out / p.name) for p in written))


def register(app: typer.Typer) -> None:
    """Add the ``sensitivity`` command to the root CLI."""
    app.command("sensitivity", no_args_is_help=True)(run_sensitivity)
