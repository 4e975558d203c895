"""``caredecide solve MODEL``: the optimal policy, its totals and the solver's report."""

from __future__ import annotations

import json
import math
from contextlib import nullcontext
from enum import StrEnum
from pathlib import Path
from typing import Annotated

import typer
from rich.table import Table

from caredecide import __version__
from caredecide.cautions import caution_short
from caredecide.cli.console import (
    plain,
    print_caution,
    stderr,
    stdout,
    user_errors,
    writing_to,
)
from caredecide.cli.model_warnings import SetOption, StrictOption, load_checked

POLICY_COLUMNS = ["cycle", "age", "state", "action", "value", "next_best_action", "action_gap"]


class Method(StrEnum):
    auto = "auto"
    backward_induction = "backward_induction"
    value_iteration = "value_iteration"
    policy_iteration = "policy_iteration"
    modified_policy_iteration = "modified_policy_iteration"


class OutputFormat(StrEnum):
    table = "table"
    csv = "csv"
    json = "json"


def file_sha256(path: Path) -> str:
    """Hex SHA-256 of a file's bytes (identifies the exact model that was solved)."""
    from caredecide.runrecord import sha256_file

    return sha256_file(path)


def _finite_or_none(value: float) -> float | str | None:
    """A total for JSON: the number, "+inf" or "-inf" (signed), None when undefined."""
    if math.isnan(value):
        return None
    return float(value) if math.isfinite(value) else ("+inf" if value > 0 else "-inf")


def build_summary(path: Path, compiled, result, outcome) -> dict:
    """The ``summary.json`` content: objective, totals, solver, model file and version."""
    return {
        "caution": caution_short(path),
        "model_file": str(path),
        "model_sha256": file_sha256(path),
        "package_version": __version__,
        "objective": {
            **result.objective.to_dict(),
            "description": result.objective.describe(),
            "unit": result.objective.unit,
        },
        "horizon_cycles": compiled.n_cycles,
        "cycle_years": compiled.cycle_length,
        "totals": {k: _finite_or_none(v) for k, v in outcome.totals(0).items()},
        "solver": {
            "method": result.method,
            "sweeps": int(result.iterations),
            "tolerance": result.tolerance,
            "relative_tolerance": result.relative,
            "error_bound": float(result.error_bound.max()),
            "success": bool(result.success),
            "message": result.message,
        },
        "structure": result.structure().text,
    }


def _policy_frame(result):
    return result.to_frame()[POLICY_COLUMNS]


def _print_table(compiled, result, outcome, summary: dict) -> None:
    from caredecide.structure import band_table

    bands = band_table(result)
    policy = Table(title="Optimal policy (decision states x age bands)")
    policy.add_column("state")
    for label in bands.columns:
        policy.add_column(str(label))
    for state, row in bands.iterrows():
        policy.add_row(str(state), *[str(v) for v in row])
    stdout.print(policy)
    stdout.print(f"Structure: {plain(summary['structure'])}")
    ties = result.indifferent[0] & result.decision_states
    if ties.any():
        stdout.print(
            f"Indifferent (action gap within tolerance) in {int(ties.sum())} "
            "state-cycle(s); the lowest action index was chosen."
        )
    description = summary["objective"]["description"]
    totals = Table(title=f"Totals per person under the optimal policy ({description})")
    totals.add_column("quantity")
    totals.add_column("discounted", justify="right")
    totals.add_column("undiscounted", justify="right")
    for name in ("life_years", "qalys", "costs"):
        totals.add_row(
            name.replace("_", " "),
            f"{getattr(outcome, name)[0]:,.4f}",
            f"{getattr(outcome, name + '_undiscounted')[0]:,.4f}",
        )
    totals.add_row("net monetary benefit", f"{outcome.net_monetary_benefit[0]:,.2f}", "")
    stdout.print(totals)
    solver = summary["solver"]
    if result.method == "backward_induction":  # exact: no error bound to report
        stdout.print(f"Solver: {solver['message']}.")
    else:
        stdout.print(
            f"Solver: {solver['message']}; error bound {solver['error_bound']:.3g} "
            f"({summary['objective']['unit']})."
        )


def solve_command(
    model: Annotated[Path, typer.Argument(help="Model file (TOML).", dir_okay=False)],
    out: Annotated[
        Path | None,
        typer.Option(
            "--out", help="Folder to write policy.csv, trace.csv and summary.json.", file_okay=False
        ),
    ] = None,
    wtp: Annotated[
        float | None,
        typer.Option("--wtp", min=0.0, help="Willingness to pay per QALY (overrides the model)."),
    ] = None,
    method: Annotated[Method, typer.Option("--method", help="Solver method.")] = Method.auto,
    output_format: Annotated[
        OutputFormat, typer.Option("--format", help="Output on stdout.")
    ] = OutputFormat.table,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress or notes on stderr.")] = False,
    strict: StrictOption = False,
    sets: SetOption = None,
) -> None:
    """Solve a model: when to start treatment, with totals (research use only)."""
    from caredecide.analysis import analyse_base_case
    from caredecide.grouping import with_group_columns
    from caredecide.objective import Objective, ObjectiveError
    from caredecide.solvers import SolverError

    # The caution is always shown (stderr), whatever --quiet says.
    print_caution(model)
    with user_errors():
        with stderr.status("Solving...", spinner="dots") if not quiet else nullcontext():
            loaded, compiled = load_checked(model, strict=strict, sets=sets)
            try:
                objective = Objective.from_settings(loaded.settings, wtp)
            except ObjectiveError as error:  # name the option, not only the value
                raise ObjectiveError(f"--wtp: {error}" if wtp is not None else error) from None
            try:
                base = analyse_base_case(
                    loaded, objective=objective, compiled=compiled, method=method.value
                )
            except SolverError as error:  # name the file the problem concerns
                raise SolverError(f"{model}: {error}") from None
            result, outcome = base.solution, base.outcome
        summary = build_summary(model, compiled, result, outcome)
        if not result.success:
            stderr.print(f"[bold yellow]warning:[/] {plain(result.message)}")
        if wtp is not None and objective.kind == "qalys" and not quiet:
            stderr.print(
                f"note: {plain(model)} maximises QALYs; --wtp {wtp:g} sets only the "
                "reported net monetary benefit, not the policy"
            )
        if out is not None:
            with writing_to(out) as folder:
                # Models with attributes or tunnels: where each generated state comes from.
                policy = with_group_columns(_policy_frame(result), compiled)
                policy.to_csv(folder / "policy.csv", index=False)
                trace = with_group_columns(outcome.trace_frame(), compiled)
                trace.to_csv(folder / "trace.csv", index=False)
                (folder / "summary.json").write_text(
                    json.dumps(summary, indent=2) + "\n", encoding="utf-8"
                )
            if not quiet:
                stderr.print(f"Wrote policy.csv, trace.csv and summary.json to {plain(out)}")
        if output_format is OutputFormat.csv:
            typer.echo(_policy_frame(result).to_csv(index=False), nl=False)
        elif output_format is OutputFormat.json:
            typer.echo(json.dumps(summary, indent=2))
        else:
            _print_table(compiled, result, outcome, summary)


def register(app: typer.Typer) -> None:
    """Add ``solve`` to the root command."""
    app.command("solve", no_args_is_help=True)(solve_command)
