"""The transition-cell table of ``caredecide sensitivity --transition-cells`` (rich, stdout).

The rows and columns are :meth:`caredecide.sensitivity.CellSensitivityResult.summary_table`,
the same table the report and the app show; this module only formats it.
"""

from __future__ import annotations

import math
from pathlib import Path

import pandas as pd
from rich.table import Table

from caredecide.cli.console import plain, save_chart


def _number(value: float, digits: int = 4) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    return f"{value:,.{digits}g}"


TEXT_COLUMNS = ("policy change just past the switch", "note")
"""Columns listed under the table, one line per cell (too wide for a terminal column)."""


def cell_table(summary: pd.DataFrame, unit: str) -> tuple[Table, list[str]]:
    """A rich table of ``summary_table()`` ("-": no switch or no value) and, as lines
    under it, the table's text columns for the cells that have any."""
    out = Table(
        title="Transition cells: the factor on each cell at which the optimal policy first "
        f"changes (nearest to 1 first; values lost in {unit})"
    )
    numbers = [c for c in summary.columns if c not in TEXT_COLUMNS]
    for column in numbers:
        out.add_column(plain(column), justify="right")
    lines = []
    for row in summary.to_dict("records"):
        out.add_row(
            *[
                _number(row[c], 4 if c.startswith("switch") else 6)
                if isinstance(row[c], float)
                else plain(row[c])
                for c in numbers
            ]
        )
        text = "; ".join(str(row[c]) for c in TEXT_COLUMNS if row[c] and row[c] != "none")
        if text:
            lines.append(f"  {plain(row['action'])} {plain(row['from'])} -> "
                         f"{plain(row['to'])}: {plain(text)}")  # fmt: skip
    return out, lines


def cell_notes(result) -> list[str]:
    """Plain lines under the table: what a factor means and which cells stay fixed."""
    lines = [
        "A factor multiplies the cell's probability (a rate cell: its rate, before the matrix "
        "exponential); the row's remainder absorbs the change, or its other entries are "
        "rescaled in proportion when it has none. An age-dependent cell is scaled by the "
        f"same factor at every age. Search range: 0 to {result.search_max:g} (or the "
        "feasible factor, where a probability would leave [0, 1])."
    ]
    if result.tied_cells:
        lines.append(
            f"{result.tied_cells} state-age cell(s) tied in the base case are left out of "
            "the search (any move would switch them)."
        )
    fixed = result.fixed_frame()
    if len(fixed):
        lines.append(
            "Not moved: "
            + "; ".join(f"{plain(r.cell)} ({plain(r.reason)})" for r in fixed.itertuples())
        )
    return lines


def save_cell_matrices(result, out: Path) -> list[Path]:
    """One matrix chart per action: ``transition_cells_<action>.svg/png``."""
    from caredecide.charts import make_cell_matrix_chart

    frame = result.matrix_frame()
    written = []
    for action in result.action_ids:
        if (frame["action"] == action).any():
            chart = make_cell_matrix_chart(frame, action, state_order=result.state_ids)
            written += save_chart(chart, out, f"transition_cells_{action}")
    return written
