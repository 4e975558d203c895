"""Charts of a solver's sweeps: fixed axes and a cursor on the chosen sweep.

Pure builders (a tidy frame in, an altair chart out), like :mod:`caredecide.charts`. The
axes span every sweep of the run, so stepping the cursor never rescales them and the
eye can compare sweeps.
"""

from __future__ import annotations

import altair as alt
import numpy as np
import pandas as pd

from caredecide.charts import ChartLike, _require
from caredecide.palettes import SERIES_PALETTE, STATE_PALETTE

CURSOR_COLOUR = "#C0392B"
"""Colour of the chosen-sweep cursor (also drawn dashed and labelled, never colour alone)."""


def _check(frame: pd.DataFrame, columns: list[str], chart: str) -> None:
    _require(frame, columns, chart)
    if frame.empty:
        raise ValueError(f"{chart}: the frame has no rows; expected one row per sweep at least")


def _cursor(sweep: int, x_scale: alt.Scale) -> list[alt.Chart]:
    data = pd.DataFrame({"sweep": [sweep], "note": [f"sweep {sweep}"]})
    rule = (
        alt.Chart(data)
        .mark_rule(color=CURSOR_COLOUR, strokeWidth=2, strokeDash=[6, 3])
        .encode(x=alt.X("sweep:Q", scale=x_scale), tooltip=["note:N"])
    )
    label = (
        alt.Chart(data)
        .mark_text(align="left", dx=4, baseline="top", color=CURSOR_COLOUR, fontWeight="bold")
        .encode(x=alt.X("sweep:Q", scale=x_scale), y=alt.value(2), text="note:N")
    )
    return [rule, label]


def make_sweep_lines(
    frame: pd.DataFrame,
    *,
    cursor: int,
    title: str,
    y_title: str,
    log: bool = False,
    bound: float | None = None,
    series_title: str = "Quantity",
) -> ChartLike:
    """One line per series over the sweeps, a cursor at ``cursor`` and an optional bound.

    Parameters
    ----------
    frame : DataFrame
        Long form: ``sweep`` (int, 1-based), ``series`` (str), ``amount`` (float).
        On a log scale amounts <= 0 are left out (a log axis cannot show them).
    cursor : int
        The chosen sweep (dashed, labelled rule).
    log : bool
        Log scale on the y axis.
    bound : float, optional
        A horizontal rule (e.g. the stopping bound), labelled "stopping bound".

    The x axis spans sweep 1 to the last sweep; the y axis spans every amount of every
    sweep (and the bound): neither changes with ``cursor``.
    """
    _check(frame, ["sweep", "series", "amount"], "sweep chart")
    data = frame[frame["amount"] > 0] if log else frame
    data = data[np.isfinite(data["amount"])]
    x_scale = alt.Scale(domain=[1, max(int(frame["sweep"].max()), 2)], nice=False)
    amounts = data["amount"].to_numpy(dtype=float)
    if bound is not None:
        amounts = np.append(amounts, bound)
    low, high = (float(amounts.min()), float(amounts.max())) if amounts.size else (0.0, 1.0)
    if high == low:
        low, high = (low / 2, high * 2) if log else (low - 1.0, high + 1.0)
    y_scale = alt.Scale(domain=[low, high], type="log" if log else "linear", nice=False)
    series = list(dict.fromkeys(data["series"].astype(str)))
    palette = STATE_PALETTE if len(series) > 4 else SERIES_PALETTE
    lines = (
        alt.Chart(data)
        .mark_line(point=bool(data["sweep"].nunique() <= 60), strokeWidth=2)
        .encode(
            x=alt.X("sweep:Q", title="Sweep", scale=x_scale, axis=alt.Axis(tickMinStep=1)),
            y=alt.Y("amount:Q", title=y_title, scale=y_scale),
            color=alt.Color(
                "series:N",
                title=series_title,
                sort=series,
                scale=alt.Scale(
                    domain=series, range=[palette[i % len(palette)] for i in range(len(series))]
                ),
            ),
            strokeDash=alt.StrokeDash("series:N", title=series_title, sort=series),
            tooltip=["sweep:Q", "series:N", alt.Tooltip("amount:Q", format=".4g")],
        )
    )
    layers: list[alt.Chart] = [lines]
    if bound is not None:
        bound_data = pd.DataFrame({"amount": [bound], "note": [f"stopping bound {bound:.3g}"]})
        layers.append(
            alt.Chart(bound_data)
            .mark_rule(color="#111111", strokeDash=[2, 2])
            .encode(y=alt.Y("amount:Q", scale=y_scale), tooltip=["note:N"])
        )
        layers.append(
            alt.Chart(bound_data)
            .mark_text(align="right", dy=-6, color="#111111")
            .encode(y=alt.Y("amount:Q", scale=y_scale), x=alt.value(400), text="note:N")
        )
    layers.extend(_cursor(cursor, x_scale))
    return alt.layer(*layers).properties(title=title)


def make_changes_chart(frame: pd.DataFrame, *, cursor: int, title: str) -> ChartLike:
    """Bars of the cells whose choice changed at each sweep, with a cursor.

    Parameters
    ----------
    frame : DataFrame
        ``sweep`` (int) and ``cells_changed`` (int; missing at sweep 1, which has no
        sweep before it and draws no bar).
    """
    _check(frame, ["sweep", "cells_changed"], "changes chart")
    data = frame[["sweep", "cells_changed"]].dropna().astype({"cells_changed": int})
    x_scale = alt.Scale(domain=[0.5, max(int(frame["sweep"].max()), 2) + 0.5], nice=False)
    top = max(int(data["cells_changed"].max()) if len(data) else 0, 1)
    bars = (
        alt.Chart(data)
        .mark_bar(color=SERIES_PALETTE[0], size=8)
        .encode(
            x=alt.X("sweep:Q", title="Sweep", scale=x_scale, axis=alt.Axis(tickMinStep=1)),
            y=alt.Y(
                "cells_changed:Q",
                title="Cells whose choice changed",
                scale=alt.Scale(domain=[0, top]),
                axis=alt.Axis(tickMinStep=1),
            ),
            tooltip=["sweep:Q", "cells_changed:Q"],
        )
    )
    return alt.layer(bars, *_cursor(cursor, x_scale)).properties(title=title)
