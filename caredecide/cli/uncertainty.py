"""``caredecide uncertainty MODEL``: probabilistic sensitivity analysis and value of information."""

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Callable
from pathlib import Path
from typing import Annotated, Any

import numpy as np
import pandas as pd
import typer
from rich.table import Table

from caredecide.cautions import caution_short
from caredecide.cli.chart_process import ChartJob
from caredecide.cli.console import (
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


def _number(value: float, digits: str = ",.2f") -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    return format(value, digits)


def _loss_table(frame: pd.DataFrame, unit: str) -> Table:
    out = Table(title=f"Candidate policies: expected value and expected loss ({unit} per person)")
    for column in ("candidate", "origin", "expected value", "expected loss", "MC s.e."):
        out.add_column(column, justify="left" if column in ("candidate", "origin") else "right")
    for row in frame.itertuples():
        out.add_row(
            row.candidate,
            row.origin,
            _number(row.expected_value),
            _number(row.expected_loss),
            _number(row.mc_se),
        )
    return out


def _evppi_table(frame: pd.DataFrame, unit: str, n_draws: int) -> Table:
    used = int(frame["draws"].iloc[0])
    sample = f"; the first {used:,} of {n_draws:,} draws" if used < n_draws else ""
    out = Table(title=f"EVPPI by parameter, regression method ({unit} per person{sample})")
    for column in ("parameter", "EVPPI", "MC s.e.", "share of EVPI", "note"):
        out.add_column(column, justify="left" if column in ("parameter", "note") else "right")
    for row in frame.itertuples():
        out.add_row(
            row.parameter,
            _number(row.evppi),
            _number(row.mc_se),
            _number(row.share_of_evpi, ".1%"),
            str(row.message or ""),
        )
    return out


def _acceptability_table(frame: pd.DataFrame, action: str) -> Table:
    """Share of draws choosing ``action``: one row per age band, one column per state.

    Bands run down the rows so that a lifetime horizon (many bands) never squeezes the
    column headers; decision states are few.
    """
    data = frame[frame["action"] == action]
    states = list(dict.fromkeys(data["state"]))
    out = Table(title=f"Share of draws in which '{action}' is optimal, by age band and state")
    out.add_column("age band (years)", no_wrap=True)
    for state in states:
        out.add_column(state, justify="right")
    # A loop over the printed rows (age bands), not over draws.
    for (low, high), rows in data.groupby(["age_from", "age_to"], sort=True, dropna=False):
        share = dict(zip(rows["state"], rows["share"], strict=True))
        label = "any age" if pd.isna(low) else f"{low:g}-{high:g}"
        out.add_row(label, *(f"{share[s]:.0%}" if s in share else "" for s in states))
    return out


def run_uncertainty(
    model: Annotated[
        Path,
        typer.Argument(help="Model file (TOML).", exists=True, dir_okay=False, readable=True),
    ],
    draws: Annotated[int, typer.Option("--draws", min=1, help="Parameter draws.")] = 1000,
    seed: Annotated[int, typer.Option("--seed", min=0, help="Seed: same seed, same draws.")] = 1,
    workers: Annotated[
        int | None,
        typer.Option(
            "--workers",
            min=1,
            help="Run the draws on up to K threads of this process (no more than the idle "
            "cores); same results as a serial run.",
        ),
    ] = None,
    scheduler: Annotated[
        str | None,
        typer.Option("--scheduler", help="Run on the Dask scheduler at ADDRESS (tcp://HOST:PORT)."),
    ] = None,
    connect_timeout: Annotated[
        str,
        typer.Option(
            "--connect-timeout", help="How long to try reaching --scheduler (e.g. 20s, 2m)."
        ),
    ] = "20s",
    chunk_size: Annotated[
        int | None,
        typer.Option("--chunk-size", min=1, help="Draws per chunk (default: from memory)."),
    ] = None,
    strategies: Annotated[
        Path | None,
        typer.Option(
            "--strategies",
            exists=True,
            dir_okay=False,
            readable=True,
            help="Strategy table (CSV) whose strategies join the candidates "
            "(default: MODEL.strategies.csv beside the model, if any).",
        ),
    ] = None,
    rank_correlation: Annotated[
        list[str] | None,
        typer.Option(
            "--rank-correlation",
            metavar="NAME,NAME=R",
            help="Target rank correlation of two uncertain parameters, NAME,NAME=R "
            "with -1 < R < 1 (Iman-Conover); repeat for more pairs.",
        ),
    ] = None,
    wtp_range: Annotated[
        tuple[float, float] | None,
        typer.Option("--wtp-range", help="Willingness-to-pay range LO HI for the curves."),
    ] = None,
    band_years: Annotated[
        float, typer.Option("--band-years", min=0.01, help="Width of the age bands (years).")
    ] = 5.0,
    population_per_year: Annotated[
        float | None,
        typer.Option(
            "--population-per-year",
            min=0.0,
            help="Persons facing the decision each year: adds population EVPI and EVPPI.",
        ),
    ] = None,
    decision_years: Annotated[
        int,
        typer.Option(
            "--decision-years",
            min=1,
            max=200,
            help="Years the decision stays in use (population EVPI/EVPPI; discounted at the "
            "model's outcome rate).",
        ),
    ] = 10,
    reference: Annotated[
        str | None,
        typer.Option(
            "--reference",
            help="Candidate the incremental means are taken against (default: the one with "
            "the lowest mean cost).",
        ),
    ] = None,
    out: Annotated[
        Path | None,
        typer.Option(
            "--out",
            file_okay=False,
            help="Folder for CSV (and Parquet) tables and charts (SVG, PNG); created if missing.",
        ),
    ] = None,
    quiet: Annotated[
        bool,
        typer.Option(
            "--quiet", help="No progress or notes on stderr (the caution is always shown)."
        ),
    ] = False,
    strict: StrictOption = False,
    sets: SetOption = None,
) -> None:
    """Probabilistic sensitivity analysis of the timing policy: acceptability by state and
    age, expected loss of each candidate policy, acceptability curves, EVPI and EVPPI.

    Same seed, same draws and results, for any chunk size, locally or on a Dask cluster.
    """
    print_caution(model)
    if workers is not None and scheduler is not None:
        stderr.print("[bold red]error:[/] give --workers or --scheduler, not both")
        raise typer.Exit(code=2)
    from caredecide.cli.chart_process import ChartRenderer

    # Started now: a second process (when a core is idle) readies the chart renderer
    # while the draws are solved.
    renderer = ChartRenderer(enabled=out is not None)
    try:
        _run(
            renderer,
            model,
            draws,
            seed,
            workers,
            scheduler,
            connect_timeout,
            chunk_size,
            strategies,
            rank_correlation,
            wtp_range,
            band_years,
            population_per_year,
            decision_years,
            reference,
            out,
            quiet,
            strict,
            sets,
        )
    finally:
        renderer.close()


def _run(
    renderer,
    model: Path,
    draws: int,
    seed: int,
    workers: int | None,
    scheduler: str | None,
    connect_timeout: str,
    chunk_size: int | None,
    strategies: Path | None,
    rank_correlation: list[str] | None,
    wtp_range: tuple[float, float] | None,
    band_years: float,
    population_per_year: float | None,
    decision_years: int,
    reference: str | None,
    out: Path | None,
    quiet: bool,
    strict: bool,
    sets: list[str] | None,
) -> None:
    with user_errors():
        correlations = _correlation_pairs(rank_correlation or [])
        if out is not None:  # before the run: a folder that cannot be made fails at once
            prepare_output_folder(out)
        from caredecide.analysis import analyse_uncertainty, candidate_table

        loaded = load_and_warn(model, strict=strict, sets=sets)
        table = candidate_table(loaded, strategies)
        if table is not None and not quiet:
            stderr.print(f"Candidates include the strategies of {table}")
        with progress("solving draws", total=draws, quiet=quiet) as bar:
            task = bar.add_task("solving draws", total=draws)

            def advance(done: int, total: int) -> None:
                bar.update(task, completed=done)

            plane_sent: list[bool] = []

            def plane_ready(frame: pd.DataFrame) -> None:  # the scatter starts at once
                renderer.submit([_plane_job(frame)], lane=0, png_there=True)
                plane_sent.append(True)

            options: dict[str, Any] = dict(
                chunk_size=chunk_size,
                wtp_range=wtp_range,
                table=table,
                rank_correlation=correlations,
                progress=advance,
                plane_ready=plane_ready if out is not None else None,
            )
            if scheduler is None:
                result = analyse_uncertainty(loaded, draws, seed, workers=workers, **options)
            else:
                from caredecide.uncertainty.cluster import dask_client, dask_map

                with dask_client(scheduler, connect_timeout=connect_timeout) as client:
                    result = analyse_uncertainty(
                        loaded, draws, seed, map_chunks=dask_map(client), **options
                    )
        if workers is not None and result.threads < workers and not quiet:
            why = (
                "the other cores were busy (a thread without a free core only slows the others)."
                if result.cores_counted
                else f"each step had one chunk of {result.chunk_size:,} draws to run."
            )
            stderr.print(f"Ran on {result.threads} of the {workers} workers asked for: {why}")
        if out is not None and not plane_sent:
            renderer.submit([_plane_job(result.plane_frame())], lane=0, png_there=True)
        tables = _tables(result, band_years, renderer if out is not None else None)
        tables["strategy_means"] = result.strategy_summary(reference=reference)
        if population_per_year is not None:
            tables["population_value_of_information"] = result.population_value_of_information(
                population_per_year,
                decision_years,
                float(loaded.settings.discount_outcomes),
                evppi=tables["evppi"],
            )
        treat = result.shown_action

    unit = result.objective.unit
    info = result.evpi()
    stdout.print(
        f"Model: {loaded.title}; objective: {result.objective.describe()}; "
        f"{result.n_draws:,} draws, seed {result.seed}"
    )
    stdout.print(_acceptability_table(tables["acceptability_by_age_band"], treat))
    stdout.print(_loss_table(tables["expected_loss"], unit))
    stdout.print(
        f"EVPI of the timing decision: {info['evpi']:,.2f} (MC s.e. {info['mc_se']:,.2f}) "
        f"{unit} per person - an upper bound, as the best policy is sought among the "
        f"candidates only (best: {info['best_candidate']}). Among the candidates alone: "
        f"{info['evpi_among_candidates']:,.2f} (s.e. {info['mc_se_among_candidates']:,.2f})."
    )
    share = result.distinct_counts[0] / result.n_draws
    stdout.print(
        f"{len(result.distinct_counts):,} distinct optimal policies across the draws; "
        f"the most frequent is optimal in {share:.1%} of them."
    )
    if len(tables["evppi"]):
        stdout.print(_evppi_table(tables["evppi"], unit, result.n_draws))
    else:
        stdout.print("EVPPI not computed: it needs at least 200 draws and two candidates.")
    stdout.print(_means_table(tables["strategy_means"]))
    if "population_value_of_information" in tables:
        stdout.print(_population_table(tables["population_value_of_information"], unit))
    fixed = ", ".join(result.fixed_parameters) or "none"
    stdout.print(f"Parameters held fixed at their base value (no distribution): {fixed}.")
    if not result.success:
        stderr.print(
            "[bold yellow]warning:[/] the solver reported a problem: " + "; ".join(result.messages)
        )
    if out is not None:
        with user_errors(), writing_to(out) as folder:
            _write_outputs(folder, result, tables, renderer, model)
        if not quiet:
            stderr.print(f"Wrote the results to {plain(out)}")


def _means_table(frame: pd.DataFrame) -> Table:
    """Probabilistic means with 95% intervals per candidate (the ICER against a reference)."""
    reference = frame["reference"].iloc[0]
    out = Table(
        title=f"Probabilistic means per strategy (95% intervals of the draws; ICER against "
        f"{plain(reference)})"
    )
    for column in ("strategy", "cost", "QALYs", "ICER (money per QALY)", "P(best)"):
        out.add_column(column, justify="left" if column == "strategy" else "right")
    for row in frame.itertuples():
        out.add_row(
            plain(row.strategy),
            f"{row.mean_cost:,.0f} ({row.cost_low:,.0f} to {row.cost_high:,.0f})",
            f"{row.mean_qalys:,.3f} ({row.qalys_low:,.3f} to {row.qalys_high:,.3f})",
            ("" if np.isnan(row.icer) else f"{row.icer:,.0f}")
            + ("" if np.isnan(row.icer_low) else f" ({row.icer_low:,.0f} to {row.icer_high:,.0f})"),
            "" if np.isnan(row.probability_best) else f"{row.probability_best:.1%}",
        )
    return out


def _population_table(frame: pd.DataFrame, unit: str) -> Table:
    """Per-person and population EVPI/EVPPI."""
    first = frame.iloc[0]
    out = Table(
        title=f"Value of information for {first['per_year']:,.0f} persons a year over "
        f"{first['years']} years, discounted at {first['discount_rate']:.1%} "
        f"({first['persons']:,.0f} persons; {unit})"
    )
    for column in ("quantity", "per person", "population", "population MC s.e."):
        out.add_column(column, justify="left" if column == "quantity" else "right")
    for row in frame.itertuples():
        out.add_row(
            plain(row.quantity),
            f"{row.per_person:,.2f}",
            f"{row.population:,.0f}",
            f"{row.population_mc_se:,.0f}",
        )
    return out


def _correlation_pairs(texts: list[str]) -> dict[tuple[str, str], float]:
    """``["a,b=0.6", ...]`` as ``{("a", "b"): 0.6}``; names are checked by the sampler."""
    from caredecide.errors import ModelError, Problem

    pairs, problems = {}, []
    for text in texts:
        names, _, value = text.partition("=")
        first, _, second = names.partition(",")
        try:
            number = float(value)
        except ValueError:
            number = None
        if not (first.strip() and second.strip() and number is not None):
            problems.append(
                Problem(
                    "--rank-correlation",
                    f"{text!r}; expected NAME,NAME=R such as c_stage_2,c_stage_3=0.6",
                )
            )
            continue
        pairs[(first.strip(), second.strip())] = number
    if problems:
        raise ModelError(problems)
    return pairs


def _tables(result, band_years: float, renderer=None) -> dict[str, pd.DataFrame]:
    """The tables written by ``--out``, by file stem, in file order. With a ``renderer``,
    each chart is submitted as soon as its tables are built (:func:`_chart_plan`), so
    that the second processes lay charts out while the other tables are built."""
    makers: dict[str, Callable[[], pd.DataFrame]] = {  # the charts' tables first
        "acceptability_by_age_band": lambda: result.acceptability_by_age_band(band_years),
        "acceptability_curves": result.acceptability_curves,
        "acceptability_frontier": result.acceptability_frontier,
        "convergence": result.convergence,
        "evppi": result.evppi,
        "acceptability_by_cycle": result.acceptability,
        "expected_loss": result.expected_loss,
        "policy_frequencies": result.policy_frequencies,
        "candidates": result.candidates_frame,
        "draws": result.draws_frame,
    }
    plan = _chart_plan(result) if renderer is not None else []
    tables: dict[str, pd.DataFrame] = {}
    for name, make in makers.items():
        tables[name] = make()
        while plan and all(need in tables for need in plan[0][0]):
            _, lane, job = plan.pop(0)
            chart = job(tables)
            if chart is not None:
                renderer.submit([chart], lane=lane)
    return {name: tables[name] for name in _TABLE_ORDER}


_TABLE_ORDER = (
    "acceptability_by_cycle",
    "acceptability_by_age_band",
    "expected_loss",
    "acceptability_curves",
    "acceptability_frontier",
    "evppi",
    "convergence",
    "policy_frequencies",
    "candidates",
    "draws",
)
"""The order the tables are written in."""


def _plane_job(frame: pd.DataFrame) -> ChartJob:
    """The scatter of the draws written by ``--out`` (the first file; lane 0)."""
    return ChartJob("ce_plane_draws", "draws_plane", {"frame": frame})


def _chart_plan(
    result,
) -> list[tuple[tuple[str, ...], int, Callable[[dict[str, pd.DataFrame]], ChartJob | None]]]:
    """The other charts ``--out`` writes, in file order: (tables needed, lane, job builder).

    The lanes balance two second processes by layout time on the demo: the scatter of
    the draws (lane 0, submitted while the draws are solved) takes about as long as two
    of the others.
    """
    unit = f"({result.objective.unit})"
    return [
        (
            ("acceptability_by_age_band",),
            1,
            lambda t: ChartJob(
                "acceptability_by_state",
                "policy_acceptability",
                {"frame": t["acceptability_by_age_band"]},
                {"action": result.shown_action},
            ),
        ),
        (
            ("acceptability_curves", "acceptability_frontier"),
            1,
            lambda t: ChartJob(
                "acceptability_curves",
                "acceptability_curves",
                {"curves": t["acceptability_curves"], "frontier": t["acceptability_frontier"]},
            ),
        ),
        (
            ("convergence",),
            0,
            lambda t: ChartJob("convergence", "psa_convergence", {"frame": t["convergence"]}),
        ),
        (
            ("evppi",),
            1,
            lambda t: (
                ChartJob("evppi", "evppi", {"frame": t["evppi"]}, {"unit": unit})
                if len(t["evppi"])
                else None
            ),
        ),
    ]


FAST_CSV_ROWS = 2000
"""Tables of numbers with at least this many rows (the draws) go through Arrow's writer."""


def _write_csv(frame: pd.DataFrame, path: Path) -> None:
    """``frame.to_csv(path, index=False)``, faster for a long table of numbers only.

    Such a table (``draws.csv``: one row per draw) is written by Arrow's CSV writer,
    several times faster than pandas. Each float is written as the shortest text that
    reads back as the same float64, as pandas writes it (a whole number keeps its
    ``.0``; NaN is an empty field), with one difference of form only: very small or very
    large numbers may be written ``1e-7`` or ``2.5e+15`` where pandas writes ``1e-07``
    or ``2500000000000000.0``. The values read back are the same.
    """
    numeric = all(dtype.kind in "iuf" for dtype in frame.dtypes)
    try:
        import pyarrow as pa
        import pyarrow.compute as pc
        import pyarrow.csv as pa_csv
    except ImportError:
        numeric = False
    if len(frame) < FAST_CSV_ROWS or not numeric:
        frame.to_csv(path, index=False)
        return
    columns = []
    for name in frame.columns:
        values = pa.array(frame[name].to_numpy())
        if frame[name].dtype.kind == "f":
            text = pc.cast(values, pa.string())
            # '55' -> '55.0' (as pandas writes it); '1e-07', 'nan', 'inf' stay as they are.
            whole = pc.invert(pc.match_substring_regex(text, r"[.eni]"))
            text = pc.if_else(whole, pc.binary_join_element_wise(text, ".0", ""), text)
            values = pc.if_else(pc.is_nan(values), pa.scalar(None, pa.string()), text)
        columns.append(values)
    header = io.StringIO()
    csv.writer(header, lineterminator="\n").writerow(frame.columns)
    with path.open("wb") as file:
        file.write(header.getvalue().encode("utf-8"))
        pa_csv.write_csv(
            pa.table(columns, names=[f"c{i}" for i in range(len(columns))]),
            file,
            pa_csv.WriteOptions(include_header=False, quoting_style="none"),
        )


def _write_outputs(
    out: Path,
    result,
    tables: dict[str, pd.DataFrame],
    renderer,
    model: Path | None = None,
) -> list[Path]:
    """Write the tables (CSV, Parquet), summary.json and the submitted charts into ``out``."""
    written = []
    try:
        import pyarrow  # noqa: F401

        parquet = True
    except ImportError:
        parquet = False
    for name, frame in tables.items():
        path = out / f"{name}.csv"
        _write_csv(frame, path)
        written.append(path)
        if parquet:
            frame.to_parquet(out / f"{name}.parquet", index=False)
            written.append(out / f"{name}.parquet")
    summary = out / "summary.json"
    record = {"caution": caution_short(model), **result.summary()}
    summary.write_text(json.dumps(record, indent=2, default=float) + "\n")
    written.append(summary)
    return written + renderer.results(out)


def register(app: typer.Typer) -> None:
    """Add the ``uncertainty`` command to the root CLI."""
    app.command("uncertainty", no_args_is_help=True)(run_uncertainty)
