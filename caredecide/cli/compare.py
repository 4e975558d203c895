"""``caredecide compare MODEL``: the optimal policy against fixed strategies (Cantor table)."""

from __future__ import annotations

import re
from contextlib import nullcontext
from pathlib import Path
from typing import Annotated, Literal

import pandas as pd
import typer
from rich.console import Console
from rich.table import Table

from caredecide.cli.console import (
    plain,
    print_caution,
    save_chart,
    stderr,
    stdout,
    user_errors,
    writing_to,
)
from caredecide.cli.model_warnings import SetOption, StrictOption, load_and_warn

TABLE_FILE = "strategies.csv"
FRONTIER_FILE = "frontier.csv"
FRONTIER_FULL_FILE = "frontier_full.csv"
SWITCHES_FILE = "switch_points.csv"
STATE_SWITCHES_FILE = "switch_points_by_state.csv"
MAX_FRONTIER_ROWS = 12
"""A longer frontier is not printed: the switch points per state say it shorter."""
SHOWN_PER_STATE = 6
"""Switch points printed per state (the first and last halves; every one is in the CSV)."""
TRACES_FOLDER = "traces"
TABLE_WIDTH = 150
"""Tables are printed at least this wide (characters), so names and statuses stay on one line
when stdout is a narrow pipe."""


def trace_file_name(index: int, strategy: str) -> str:
    """File name of a strategy's trace: ``01_never-treat.csv`` (row order, safe characters)."""
    slug = re.sub(r"[^A-Za-z0-9]+", "-", strategy).strip("-").lower()[:60] or "strategy"
    return f"{index + 1:02d}_{slug}.csv"


def _wide() -> Console:
    """A stdout console at least :data:`TABLE_WIDTH` wide (a pipe defaults to 80)."""
    return Console(width=max(stdout.width, TABLE_WIDTH), highlight=False)


def _money(value: float) -> str:
    """Whole currency units; a small nonzero increment keeps two decimals (never a bare 0)."""
    if value != value:  # NaN -> blank
        return ""
    return f"{value:,.2f}" if 0 < abs(value) < 10 else f"{value:,.0f}"


def _qalys(value: float) -> str:
    """Four decimals; a nonzero increment below 0.0001 in scientific notation (never 0.0000)."""
    if value != value:  # NaN -> blank
        return ""
    return f"{value:.2e}" if 0 < abs(value) < 5e-5 else f"{value:.4f}"


def _print_table(result, currency: str) -> None:
    table = Table(
        title=f"Strategies at {result.willingness_to_pay:,.0f} {currency} per QALY "
        "(discounted, per person; sorted by cost)".replace("  ", " ")
    )
    effect = result.effect_label
    columns: list[tuple[str, Literal["left", "right"]]] = [
        ("strategy", "left"),
        ("cost", "right"),
        (effect, "right"),
        ("incr. cost", "right"),
        (f"incr. {effect}", "right"),
        ("ICER", "right"),
        ("NMB", "right"),
        ("status", "left"),
    ]
    if result.reference is not None:
        columns.insert(-1, (f"ICER vs {result.reference}", "right"))
    for column, justify in columns:
        table.add_column(column, justify=justify)
    for _, row in result.table.iterrows():  # display rows
        best = " (best)" if row["best_at_wtp"] else ""
        cells = [
            f"{row['strategy']}{best}",
            f"{row['cost']:,.0f}",
            f"{row['qalys']:.4f}",
            _money(row["incremental_cost"]),
            _qalys(row["incremental_qalys"]),
            _money(row["icer"]),
            f"{row['net_monetary_benefit']:,.0f}",
            str(row["status"]),
        ]
        if result.reference is not None:
            cells.insert(-1, _money(row["icer_vs_reference"]))
        table.add_row(*cells)
    _wide().print(table)
    per = f"{currency} per QALY".strip()
    stdout.print(f"Best at {result.willingness_to_pay:,.0f} {per}: {plain(result.best_strategy)}")


def _print_frontier(result) -> None:
    collapsed = result.frontier_collapsed
    effect = result.effect_label
    table = Table(
        title="Optimal policy over the willingness-to-pay range (near-identical policies "
        "shown as one)"
    )
    for column in ("policies", "WTP from", "WTP to", "cost", effect):
        table.add_column(column)
    for _, row in collapsed.iterrows():  # display rows
        table.add_row(
            row["policies"],
            f"{row['wtp_from']:,.2f}",
            f"{row['wtp_to']:,.2f}",
            f"{row['cost']:,.0f}",
            f"{row['qalys']:.4f}",
        )
    if len(collapsed) <= MAX_FRONTIER_ROWS:
        _wide().print(table)
    frontier = result.frontier_result
    stdout.print(
        f"{len(result.frontier)} optimal policies in {len(collapsed)} runs "
        f"({plain(collapsed['tolerance'].iloc[0])}); {frontier.n_solves} WTP values solved. "
        f"Runs: {FRONTIER_FILE}; every policy: {FRONTIER_FULL_FILE} (--out)."
    )
    switches = result.state_switches
    stdout.print("Where each state's recommendation changes as the willingness to pay rises:")
    for state, rows in switches.groupby("state_label", sort=False):
        stdout.print(f"  {plain(state)}: {len(rows)} switch point(s)")
        half = SHOWN_PER_STATE // 2
        shown = rows if len(rows) <= SHOWN_PER_STATE else pd.concat([rows[:half], rows[-half:]])
        for i, row in enumerate(shown.itertuples()):
            if len(rows) > SHOWN_PER_STATE and i == half:
                stdout.print(f"    ... {len(rows) - SHOWN_PER_STATE} more in {STATE_SWITCHES_FILE}")
            stdout.print(f"    at {row.wtp:,.0f}: {plain(row.after)}")


def write_outputs(out: Path, result, currency: str = "") -> list[Path]:
    """CSV files (table, frontier, switch points, one trace per strategy) and charts."""
    from caredecide.charts import make_ce_plane_chart, make_frontier_chart

    out.mkdir(parents=True, exist_ok=True)
    written = [out / TABLE_FILE]
    result.table.to_csv(written[0], index=False)
    if result.frontier is not None:
        result.frontier_collapsed.to_csv(out / FRONTIER_FILE, index=False)
        result.frontier.to_csv(out / FRONTIER_FULL_FILE, index=False)
        result.switches.to_csv(out / SWITCHES_FILE, index=False)
        result.state_switches.to_csv(out / STATE_SWITCHES_FILE, index=False)
        written += [out / n for n in (FRONTIER_FILE, FRONTIER_FULL_FILE, SWITCHES_FILE,
                                      STATE_SWITCHES_FILE)]  # fmt: skip
    folder = out / TRACES_FOLDER
    folder.mkdir(exist_ok=True)
    for index, (name, trace) in enumerate(result.traces.groupby("strategy", sort=False)):
        path = folder / trace_file_name(index, str(name))
        trace.drop(columns="strategy").to_csv(path, index=False)
        written.append(path)
    unit = f"({currency})" if currency else ""  # axis titles as in the app: "... (EUR)"
    written += save_chart(make_ce_plane_chart(result.table, currency=unit), out, "ce_plane")
    if result.frontier is not None:
        written += save_chart(make_frontier_chart(result.frontier, currency=unit), out, "frontier")
        from caredecide.decision_charts import make_region_map_chart

        chart = make_region_map_chart(
            result.regions,
            x_title=f"Willingness to pay per QALY {unit}".strip(),
            action_labels=list(result.action_labels),
            base=result.willingness_to_pay,
            title="Switch points per state: best action by age as the willingness to pay rises",
        )
        written += save_chart(chart, out, "switch_points_by_state")
    return written


def compare_command(
    model: Annotated[Path, typer.Argument(help="Model file (TOML).", dir_okay=False)],
    strategies: Annotated[
        Path | None,
        typer.Option(
            "--strategies",
            dir_okay=False,
            help="Strategy table (CSV: strategy, state, age_from, age_to, action); "
            "default: <model>.strategies.csv beside the model, if any.",
        ),
    ] = None,
    wtp: Annotated[
        float | None,
        typer.Option("--wtp", min=0.0, help="Willingness to pay per QALY (default: the model's)."),
    ] = None,
    wtp_range: Annotated[
        tuple[float, float] | None,
        typer.Option(
            "--wtp-range",
            help="Also find the optimal policy for every WTP in "
            "[LO, HI], with exact switch points.",
        ),
    ] = None,
    from_age: Annotated[
        list[float] | None,
        typer.Option(
            "--from-age",
            min=0.0,
            help="Also compare 'X from age AGE' for every action X after the "
            "first (repeat for several ages; finite horizons only).",
        ),
    ] = None,
    grid: Annotated[
        int, typer.Option("--grid", min=2, max=1001, help="WTP grid values solved first.")
    ] = 21,
    no_optimal: Annotated[
        bool,
        typer.Option(
            "--no-optimal", help="Compare the described strategies alone (no optimal policy row)."
        ),
    ] = False,
    reference: Annotated[
        str | None,
        typer.Option(
            "--reference", help="Strategy every other is also compared with (ICER vs it)."
        ),
    ] = None,
    qaly_tolerance: Annotated[
        float,
        typer.Option(
            "--qaly-tolerance",
            min=0.0,
            help="Frontier policies within this many QALYs (and as much in money at the WTP) "
            "are shown as one.",
        ),
    ] = 1e-3,
    out: Annotated[
        Path | None,
        typer.Option(
            "--out",
            file_okay=False,
            help="Folder for CSV files (table, frontier, traces) and CE-plane charts.",
        ),
    ] = None,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress or notes on stderr.")] = False,
    strict: StrictOption = False,
    sets: SetOption = None,
) -> None:
    """Compare the optimal policy with fixed strategies (research use only)."""
    from caredecide.analysis import analyse_strategies

    print_caution(model)
    with user_errors():
        with (
            stderr.status("Solving and evaluating...", spinner="dots")
            if not quiet
            else nullcontext() as status
        ):
            loaded = load_and_warn(model, strict=strict, sets=sets)

            def progress(round_number: int, brackets: int) -> None:
                if status is not None:
                    status.update(
                        f"Refining switch points: round {round_number}, {brackets} interval(s) left"
                    )

            # The frontier is searched only over a range given with --wtp-range.
            result = analyse_strategies(
                loaded,
                strategies,
                frontier=False,
                wtp=wtp,
                wtp_range=(wtp_range[0], wtp_range[1]) if wtp_range is not None else None,
                grid=grid,
                from_ages=tuple(from_age or ()),
                progress=progress,
                include_optimal=not no_optimal,
                reference=reference,
                qaly_tolerance=qaly_tolerance,
            )
        currency = loaded.settings.currency
        _print_table(result, currency)
        if result.frontier is not None:
            _print_frontier(result)
        if not quiet:
            for note in result.notes:
                stderr.print(f"note: {plain(note)}")
            for item in result.resolved:
                for note in item.notes:
                    stderr.print(f"note ({plain(item.strategy.name)}): {plain(note)}")
        if out is not None:
            with writing_to(out) as folder:  # all files, or none
                written = write_outputs(folder, result, currency)
            if not quiet:
                stderr.print(f"Wrote {len(written)} files to {out}")


def register(app: typer.Typer) -> None:
    """Add the ``compare`` command to the root CLI."""
    app.command("compare", no_args_is_help=True)(compare_command)
