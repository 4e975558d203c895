"""``caredecide scenarios MODEL``: the base case and the model's named scenarios side by side."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Annotated

import typer
from rich.table import Table

from caredecide.cli.console import plain, print_caution, stderr, stdout, user_errors
from caredecide.cli.model_warnings import SetOption, StrictOption, load_and_warn, parse_sets
from caredecide.cli.solve import OutputFormat


def _cell(value: object) -> str:
    if isinstance(value, float):
        return (
            "" if math.isnan(value) else f"{value:,.4g}" if abs(value) < 1000 else f"{value:,.0f}"
        )
    return str(value)


def scenarios_command(
    model: Annotated[Path, typer.Argument(help="Model file (TOML).", dir_okay=False)],
    only: Annotated[
        list[str] | None,
        typer.Option("--only", help="Run only this named scenario (repeatable)."),
    ] = None,
    output_format: Annotated[
        OutputFormat, typer.Option("--format", help="Output on stdout.")
    ] = OutputFormat.table,
    csv: Annotated[
        Path | None, typer.Option("--csv", help="Also write the table as CSV.", dir_okay=False)
    ] = None,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress or notes on stderr.")] = False,
    strict: StrictOption = False,
    sets: SetOption = None,
) -> None:
    """Run the base case and every [scenarios] entry of a model; compare them side by side.

    --set values apply to the base case and to every scenario (a scenario's own values
    win). Research use only.
    """
    from caredecide.analysis.scenarios import analyse_scenarios
    from caredecide.exports import table_to_csv

    print_caution(model)
    with user_errors():
        overrides = parse_sets(sets)
        loaded = load_and_warn(model, strict=strict)
        if not loaded.scenarios and not quiet:
            stderr.print(f"note: {plain(model)} names no [scenarios]; showing the base case only")

        def progress(done: int, total: int) -> None:
            if not quiet:
                stderr.print(f"scenario {done} of {total} solved")

        result = analyse_scenarios(loaded, overrides=overrides, names=only, progress=progress)
    frame = result.to_frame()
    if csv is not None:
        csv.write_bytes(table_to_csv(frame))
    if output_format is OutputFormat.csv:
        typer.echo(frame.to_csv(index=False), nl=False)
        return
    if output_format is OutputFormat.json:
        typer.echo(json.dumps(result.to_dict(), indent=2))
        return
    table = Table(title=f"Scenarios of {plain(loaded.title)}")
    columns = ["scenario", "policy", "qalys", "costs", "net_monetary_benefit",
               "icer_vs_base_policy", "note"]  # fmt: skip
    for column in columns:
        table.add_column(column, overflow="fold")
    for row in frame.itertuples(index=False):
        table.add_row(*(plain(_cell(getattr(row, c))) for c in columns))
    stdout.print(table)


def register(app: typer.Typer) -> None:
    """Add ``scenarios`` to the root command."""
    app.command("scenarios", no_args_is_help=True)(scenarios_command)
