"""``caredecide estimate VISITS.csv``: transition estimates from patient records."""

from __future__ import annotations

from contextlib import nullcontext
from enum import StrEnum
from pathlib import Path
from typing import Annotated

import numpy as np
import pandas as pd
import typer
from rich.table import Table

from caredecide.cli.console import plain, print_caution, stderr, stdout, user_errors


class Method(StrEnum):
    counts = "counts"
    panel = "panel"


class Structure(StrEnum):
    progressive = "progressive"
    forward = "forward"
    any = "any"


def _rich_table(title: str, frame: pd.DataFrame) -> Table:
    table = Table(title=title)
    for column in frame.columns:
        table.add_column(str(column))
    for row in frame.itertuples(index=False):
        table.add_row(*(f"{v:.4g}" if isinstance(v, float) else str(v) for v in row))
    return table


def _probability_frame(matrix: np.ndarray, state_ids: tuple[str, ...]) -> pd.DataFrame:
    frame = pd.DataFrame(matrix[:-1], columns=list(state_ids))
    frame.insert(0, "from", list(state_ids[:-1]))
    return frame


def register(app: typer.Typer) -> None:
    """Add the ``estimate`` sub-command to ``app``."""

    @app.command("estimate", no_args_is_help=True)
    def estimate(
        visits: Annotated[
            Path,
            typer.Argument(
                metavar="VISITS.csv",
                help="Visits: patient_id, years_since_entry, stage[, treated].",
            ),
        ],
        patients: Annotated[
            Path | None,
            typer.Option(
                "--patients",
                metavar="PATIENTS.csv",
                help="Patients: patient_id, death_years, censor_years (exact deaths, censoring).",
            ),
        ] = None,
        method: Annotated[
            Method,
            typer.Option(
                help="counts: one-cycle transitions (regular visits); panel: continuous-time "
                "maximum likelihood (any visit times)."
            ),
        ] = Method.panel,
        cycle_years: Annotated[
            float, typer.Option(min=1e-6, help="Model cycle length in years.")
        ] = 1.0,
        states: Annotated[
            str | None,
            typer.Option(
                help="Alive states in clinical order, comma-separated (default: as seen)."
            ),
        ] = None,
        death_state: Annotated[str, typer.Option(help="Name of the death state.")] = "dead",
        transitions: Annotated[
            Structure, typer.Option(help="Allowed transitions for the panel method.")
        ] = Structure.progressive,
        treatment_effect: Annotated[
            bool,
            typer.Option(
                help="Panel: estimate a hazard ratio on stage-to-stage rates for treated "
                "intervals (when any); --no-treatment-effect pools them."
            ),
        ] = True,
        prior: Annotated[
            float, typer.Option(min=0.0, help="Counts: Dirichlet pseudo-count per entry.")
        ] = 0.0,
        tolerance: Annotated[
            float,
            typer.Option(min=0.0, max=0.99, help="Counts: accepted gap deviation (fraction)."),
        ] = 0.1,
        prefix: Annotated[
            str,
            typer.Option(
                help="Prefix for parameter and group names (letters, digits and _, not "
                "starting with a digit)."
            ),
        ] = "",
        model: Annotated[
            Path | None,
            typer.Option(help="Model file to merge the estimates into (saved at --out)."),
        ] = None,
        out: Annotated[
            Path | None,
            typer.Option(
                help="Write the estimates: into a model file (existing, or --model) or as "
                "parameter and group tables to paste into one."
            ),
        ] = None,
        csv: Annotated[bool, typer.Option("--csv", help="Print the table as CSV.")] = False,
        quiet: Annotated[
            bool, typer.Option("--quiet", "-q", help="No notes or progress (the caution stays).")
        ] = False,
    ) -> None:
        """Estimate transition probabilities or rates from patient records (research use only)."""
        from caredecide.estimation import (
            CountEstimate,
            PanelEstimate,
            estimate_counts,
            estimate_panel,
            load_records,
        )
        from caredecide.estimation.records import require_deaths
        from caredecide.estimation.to_model import (
            check_prefix,
            estimates_to_parameters,
            write_estimates,
        )

        print_caution(visits)
        if model is not None and out is None:
            stderr.print("[bold red]error:[/] --model needs --out (where to save the result)")
            raise typer.Exit(code=2)
        if out is not None and not out.parent.is_dir():
            stderr.print(
                f"[bold red]error:[/] --out {plain(str(out))}: folder {plain(str(out.parent))} "
                "does not exist; expected a file in an existing folder"
            )
            raise typer.Exit(code=2)
        state_list = [s.strip() for s in states.split(",")] if states else None
        with user_errors():
            check_prefix(prefix)  # before the fit, which can take a while
            records = load_records(visits, patients, states=state_list, death_state=death_state)
            require_deaths(records, patients_given=patients is not None)
            if method is Method.counts:
                counts = estimate_counts(records, cycle_years, prior=prior, tolerance=tolerance)
                results: list[CountEstimate | PanelEstimate] = list(counts)
                frame = pd.concat([r.table() for r in counts], ignore_index=True)
                skipped = sum(r.n_skipped for r in counts)
                if skipped and not quiet:
                    stderr.print(
                        f"[yellow]note:[/] {skipped} of {records.n_intervals} intervals are "
                        f"not one cycle ({cycle_years:g} years +/- {tolerance:.0%}) long and "
                        "were left out; use --method panel for irregular visits"
                    )
            else:
                status = (
                    nullcontext()
                    if quiet
                    else stderr.status("fitting rates by maximum likelihood", spinner="dots")
                )
                with status:
                    panel = estimate_panel(
                        records,
                        structure=transitions.value,
                        treatment_effect=None if treatment_effect else False,
                    )
                results = [panel]
                frame = panel.table()
                if not panel.converged:
                    stderr.print(f"[yellow]warning:[/] optimiser: {panel.message}")
            estimated = estimates_to_parameters(results, prefix=prefix)
            if out is not None:
                written = write_estimates(estimated, out, model=model)
        if csv:
            typer.echo(frame.to_csv(index=False), nl=False)
        else:
            stdout.print(
                f"{records.n_patients} patients, {records.n_intervals} observation intervals "
                f"({records.source})"
            )
            if method is Method.counts:
                stdout.print(_rich_table("Transition probabilities per cycle (counts)", frame))
            else:
                result = panel
                stdout.print(_rich_table("Rates per year (se on the log scale)", frame))
                for treated in (False, True)[: 1 + result.treatment_effect]:
                    label = "treated" if treated else "untreated"
                    matrix = result.transition_matrix(cycle_years, treated=treated)
                    stdout.print(
                        _rich_table(
                            f"Probabilities per {cycle_years:g}-year cycle ({label})",
                            _probability_frame(matrix, result.state_ids),
                        )
                    )
        if not quiet:
            for note in estimated.notes:
                stderr.print(f"[yellow]note:[/] {note}")
            if out is not None:
                stderr.print(f"wrote {written}")
