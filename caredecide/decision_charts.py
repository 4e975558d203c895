"""Chart builders for a committee: what flips the decision, for whom, and how much it costs.

Pure functions: a tidy ``pandas.DataFrame`` in, an ``altair`` chart out (no Streamlit, no
maths). Colours come from :mod:`caredecide.palettes`, one meaning each: actions keep the
colour of their position in the model's action order, the two ends of a range use the
low/high palette, strategies the series palette. Legends are placed below the plot with
no label limit, so they are never cut.
"""

from __future__ import annotations

from collections.abc import Sequence

import altair as alt
import numpy as np
import pandas as pd

from caredecide.charts import ChartLike
from caredecide.palettes import LOW_HIGH_PALETTE, SERIES_PALETTE, action_colours, cycle

PANEL_WIDTH = 460
PANEL_HEIGHT = 150
LOW_END = "estimate at its low value"
HIGH_END = "estimate at its high value"


def _require(frame: pd.DataFrame, columns: Sequence[str], chart: str) -> None:
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise ValueError(
            f"{chart}: frame lacks column(s) {missing}; expected columns {list(columns)}, "
            f"got {list(frame.columns)}"
        )


def _legend(title: str) -> alt.Legend:
    """A legend below the plot, one entry per line, labels never truncated."""
    return alt.Legend(
        title=title, orient="bottom", direction="vertical", labelLimit=0, titleLimit=0
    )


def make_decision_tornado_chart(table: pd.DataFrame, *, unit: str = "") -> ChartLike:
    """Decision tornado: value lost by keeping the base-case policy, at each end of a range.

    Parameters
    ----------
    table : DataFrame
        :attr:`caredecide.sensitivity.DecisionTornado.table` (ranked): ``parameter,
        loss_low, loss_high, share_cells_changed, distance_share, changes_policy``.
    unit : str
        Unit of the losses for the axis title (e.g. "EUR", "QALYs").
    """
    columns = ["parameter", "loss_low", "loss_high", "share_cells_changed", "distance_share",
               "changes_policy"]  # fmt: skip
    _require(table, columns, "decision tornado chart")
    order = list(table["parameter"].astype(str))
    bars = pd.concat(
        [
            pd.DataFrame(
                {
                    "parameter": table["parameter"].astype(str),
                    "end": LOW_END,
                    "signed": -table["loss_low"].to_numpy(dtype=float),
                    "loss": table["loss_low"].to_numpy(dtype=float),
                }
            ),
            pd.DataFrame(
                {
                    "parameter": table["parameter"].astype(str),
                    "end": HIGH_END,
                    "signed": table["loss_high"].to_numpy(dtype=float),
                    "loss": table["loss_high"].to_numpy(dtype=float),
                }
            ),
        ],
        ignore_index=True,
    )
    notes = []
    for row in table.itertuples():
        if not row.changes_policy:
            notes.append("no change of policy in the range")
        elif np.isnan(row.distance_share):
            notes.append(f"{row.share_cells_changed:.0%} of cells change")
        else:
            notes.append(
                f"{row.share_cells_changed:.0%} of cells change; nearest threshold "
                f"{row.distance_share:.0%} of the range from base"
            )
    text = pd.DataFrame(
        {
            "parameter": table["parameter"].astype(str),
            "note": notes,
            "edge": table["loss_high"].to_numpy(dtype=float),
        }
    )
    y = alt.Y(
        "parameter:N",
        sort=order,
        title="Estimate (most value lost first)",
        axis=alt.Axis(labelLimit=0),
    )
    axis_title = f"Value lost by keeping the base-case policy {f'({unit})' if unit else ''}"
    bar = (
        alt.Chart(bars)
        .mark_bar()
        .encode(
            y=y,
            x=alt.X(
                "signed:Q",
                title=axis_title.strip(),
                axis=alt.Axis(labelExpr="format(abs(datum.value), ',.4~g')"),
            ),
            color=alt.Color(
                "end:N",
                scale=alt.Scale(domain=[LOW_END, HIGH_END], range=list(LOW_HIGH_PALETTE)),
                legend=_legend("Bar (left: low end, right: high end)"),
            ),
            tooltip=["parameter:N", "end:N", alt.Tooltip("loss:Q", format=",.4g")],
        )
    )
    zero = alt.Chart(pd.DataFrame({"x": [0.0]})).mark_rule(color="#111111").encode(x="x:Q")
    label = (
        alt.Chart(text)
        .mark_text(align="left", dx=4, fontSize=10)
        .encode(y=y, x="edge:Q", text="note:N")
    )
    return alt.layer(bar, zero, label).properties(
        title="Decision tornado: value lost by keeping today's policy if the estimate moves",
        width=PANEL_WIDTH,
    )


def _region_panel(
    data: pd.DataFrame,
    state: str,
    colours: dict[str, str],
    x_title: str,
    base: float | None,
) -> ChartLike:
    domain = list(colours)
    rect = (
        alt.Chart(data)
        .mark_rect(stroke="white", strokeWidth=0.3)
        .encode(
            x=alt.X("x_from:Q", title=x_title, scale=alt.Scale(zero=False, nice=False)),
            x2="x_to:Q",
            y=alt.Y("age_from:Q", title="Age (years)", scale=alt.Scale(zero=False, nice=False)),
            y2="age_to:Q",
            color=alt.Color(
                "action_label:N",
                scale=alt.Scale(domain=domain, range=[colours[a] for a in domain]),
                legend=_legend("Best action"),
            ),
            tooltip=[
                "state_label:N",
                "action_label:N",
                alt.Tooltip("x_from:Q", format=",.4g"),
                alt.Tooltip("x_to:Q", format=",.4g"),
                "age_from:Q",
                "age_to:Q",
            ],
        )
    )
    layers = [rect]
    if base is not None:
        marker = pd.DataFrame({"x": [base], "note": ["base value"]})
        layers.append(
            alt.Chart(marker)
            .mark_rule(color="#111111", strokeWidth=2, strokeDash=[6, 3])
            .encode(x="x:Q", tooltip=["note:N", alt.Tooltip("x:Q", format=",.4g")])
        )
        layers.append(
            alt.Chart(marker)
            .mark_text(align="left", dx=4, dy=2, baseline="top", fontWeight="bold")
            .encode(x="x:Q", y=alt.value(0), text="note:N")
        )
    return alt.layer(*layers).properties(title=state, width=PANEL_WIDTH, height=PANEL_HEIGHT)


def make_region_map_chart(
    frame: pd.DataFrame,
    *,
    x_title: str,
    action_labels: Sequence[str],
    base: float | None = None,
    title: str = "",
) -> alt.VConcatChart:
    """Best action per (x, age), one panel per state, base value marked.

    Parameters
    ----------
    frame : DataFrame
        Rectangles of :func:`caredecide.frontier_view.policy_regions`: ``state_label,
        x_from, x_to, age_from, age_to, action_label``.
    x_title : str
        What x is (an estimate's name, or willingness to pay with its unit).
    action_labels : sequence of str
        Every action label of the model in model order (colours never move).
    base : float, optional
        The base value of x: a dashed rule labelled "base value".
    """
    _require(
        frame,
        ["state_label", "x_from", "x_to", "age_from", "age_to", "action_label"],
        "policy-region map",
    )
    colours = action_colours(list(action_labels))
    panels = [
        _region_panel(rows, str(state), colours, x_title, base)
        for state, rows in frame.groupby("state_label", sort=False)
    ]
    return alt.vconcat(*panels).properties(
        title=title or f"Best action by age over {x_title} (one panel per state)"
    )


def make_threshold_age_chart(
    frame: pd.DataFrame,
    base: pd.DataFrame,
    *,
    x_title: str,
    y_title: str,
) -> alt.VConcatChart:
    """Threshold age per state over two estimates: x on the axis, one line per y value.

    Parameters
    ----------
    frame : DataFrame
        :attr:`caredecide.sensitivity.regions.ThresholdAgeMap.frame`: ``state_label,
        x_value, y_value, threshold_age, action_after, action_before``.
    base : DataFrame
        The same columns at the base point (marked by a black diamond).
    """
    columns = ["state_label", "x_value", "y_value", "threshold_age", "action_after"]
    _require(frame, columns, "threshold-age chart")
    _require(base, columns, "threshold-age chart (base)")
    panels = []
    for state, rows in frame.groupby("state_label", sort=False):
        point = base[base["state_label"] == state]
        line = (
            alt.Chart(rows)
            .mark_line(point=True)
            .encode(
                x=alt.X("x_value:Q", title=x_title, scale=alt.Scale(zero=False)),
                y=alt.Y(
                    "threshold_age:Q",
                    title="Threshold age (years)",
                    scale=alt.Scale(zero=False),
                ),
                color=alt.Color(
                    "y_value:Q",
                    scale=alt.Scale(range=list(LOW_HIGH_PALETTE)),
                    legend=alt.Legend(title=y_title, orient="bottom", labelLimit=0, titleLimit=0),
                ),
                detail="y_value:Q",
                tooltip=[
                    alt.Tooltip("x_value:Q", format=",.4g"),
                    alt.Tooltip("y_value:Q", format=",.4g"),
                    "threshold_age:Q",
                    "action_before:N",
                    "action_after:N",
                ],
            )
        )
        marker = (
            alt.Chart(point.assign(note="base"))
            .mark_point(shape="diamond", size=140, filled=True, color="#111111")
            .encode(x="x_value:Q", y="threshold_age:Q", tooltip=["note:N", "threshold_age:Q"])
        )
        layers = [line, marker]
        if rows["threshold_age"].isna().all():
            note = pd.DataFrame({"note": ["one action at every age: no threshold age"]})
            layers.append(
                alt.Chart(note)
                .mark_text(fontSize=12, color="#111111")
                .encode(text="note:N", x=alt.value(PANEL_WIDTH / 2), y=alt.value(PANEL_HEIGHT / 2))
            )
        panels.append(
            alt.layer(*layers).properties(
                title=f"{state}: age from which the last action holds",
                width=PANEL_WIDTH,
                height=PANEL_HEIGHT,
            )
        )
    return alt.vconcat(*panels).properties(
        title=f"Threshold age over {x_title} (axis) and {y_title} (lines)"
    )


def make_draws_plane_chart(
    frame: pd.DataFrame, *, effect: str = "QALYs", currency: str = ""
) -> alt.Chart:
    """Cost-effectiveness plane of probabilistic draws, one colour and shape per strategy.

    Parameters
    ----------
    frame : DataFrame
        :meth:`caredecide.uncertainty.psa.PSAResult.plane_frame`: ``strategy, draw, cost,
        qalys``.
    """
    _require(frame, ["strategy", "cost", "qalys"], "draws plane chart")
    names = list(dict.fromkeys(frame["strategy"].astype(str)))
    shapes = ["circle", "square", "triangle-up", "diamond", "cross", "triangle-down"]
    return (
        alt.Chart(frame)
        # No screen-reader label per point (thousands of draws): the chart's description
        # says what it shows; this halves the SVG and its rendering time.
        .mark_point(opacity=0.45, size=22, filled=True, aria=False)
        .encode(
            x=alt.X(
                "qalys:Q", title=f"{effect} per person (discounted)", scale=alt.Scale(zero=False)
            ),
            y=alt.Y(
                "cost:Q",
                title=f"Cost per person (discounted) {currency}".strip(),
                scale=alt.Scale(zero=False),
            ),
            color=alt.Color(
                "strategy:N",
                scale=alt.Scale(domain=names, range=cycle(SERIES_PALETTE, len(names))),
                legend=_legend("Strategy"),
            ),
            shape=alt.Shape(
                "strategy:N",
                scale=alt.Scale(domain=names, range=cycle(shapes, len(names))),
                legend=_legend("Strategy"),
            ),
            tooltip=[
                "strategy:N",
                alt.Tooltip("cost:Q", format=",.0f"),
                alt.Tooltip("qalys:Q", format=".3f"),
            ],
        )
        .properties(
            title="Cost-effectiveness plane of the probabilistic draws",
            description=f"Scatter plot of the cost (y) and {effect} (x) per person of each "
            "strategy in each probabilistic draw",
            width=PANEL_WIDTH,
        )
    )
