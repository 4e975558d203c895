"""The state-transition diagram as an Altair chart whose moves can be clicked.

A pure builder like :mod:`caredecide.charts`: the frames of
:class:`caredecide.diagram_layout.DiagramLayout` in, one layered chart out. States are
bubbles (a double ring when absorbing) filled by their group; a move is a curve with an
arrowhead, wider the likelier it is, dashed when made at the decision; the dot at its
middle carries the base-case probability and is the mark a click selects (point
selection :data:`EDGE_SELECTION` on the field ``edge``). Pixel scales: the picture keeps
its shape whatever the page width.
"""

from __future__ import annotations

import altair as alt
import pandas as pd

from caredecide.charts import ChartLike, _require
from caredecide.palettes import STATE_PALETTE, cycle

EDGE_SELECTION = "edge_pick"
"""Name of the point selection on the move marks (Streamlit reports it under this name)."""
MOVE_COLOUR = "#5D6D7E"
"""Curves, arrowheads and dots of the moves (slate)."""
CHOSEN_COLOUR = "#D35400"
"""The chosen move (burnt orange), also drawn wider and opaque: never colour alone."""
NODE_STROKE = "#34495E"


def _scales(width: float, height: float) -> tuple[alt.Scale, alt.Scale]:
    """Pixel scales (y downwards) shared by every layer."""
    return (
        alt.Scale(domain=[0, width], nice=False, zero=False),
        alt.Scale(domain=[0, height], nice=False, zero=False, reverse=True),
    )


def make_diagram_chart(
    nodes: pd.DataFrame,
    paths: pd.DataFrame,
    marks: pd.DataFrame,
    width: float,
    height: float,
    *,
    group_title: str = "declared state",
    chosen: int | None = None,
) -> ChartLike:
    """Layered chart of a state-transition diagram with clickable moves.

    Parameters
    ----------
    nodes, paths, marks : DataFrame
        As in :class:`caredecide.diagram_layout.DiagramLayout` (pixels, y downwards).
    width, height : float
        Size of the drawing, pixels.
    group_title : str
        Legend title of the bubble fill (what the groups are).
    chosen : int, optional
        ``edge`` number of the move to draw highlighted (the one whose cell is shown).
    """
    _require(nodes, ["state", "label", "group", "absorbing", "x", "y"], "diagram")
    _require(paths, ["edge", "order", "x", "y", "kind", "probability"], "diagram")
    _require(marks, ["edge", "name", "cell", "expression", "probability", "x", "y"], "diagram")
    x_scale, y_scale = _scales(width, height)
    x = alt.X("x:Q", scale=x_scale, axis=None)
    y = alt.Y("y:Q", scale=y_scale, axis=None)
    groups = list(dict.fromkeys(nodes["group"]))
    fill = alt.Color(
        "group:N",
        title=group_title,
        scale=alt.Scale(domain=groups, range=cycle(STATE_PALETTE, len(groups))),
        legend=alt.Legend(orient="bottom", direction="horizontal"),
    )
    paths = paths.assign(
        chosen=paths["edge"] == chosen,
        width=1.0 + 4.0 * paths["probability"].clip(0, 1),
        dashed=(paths["kind"] == "move").map({True: "at the decision", False: "within a cycle"}),
    )
    marks = marks.assign(
        chosen=marks["edge"] == chosen,
        shown=marks["probability"].map(lambda p: f"{p:.3g}"),
    )
    colour = alt.condition(alt.datum.chosen, alt.value(CHOSEN_COLOUR), alt.value(MOVE_COLOUR))
    curves = (
        alt.Chart(paths)
        .mark_line(interpolate="basis", opacity=0.85)
        .encode(
            x=x,
            y=y,
            detail="edge:N",
            order="order:Q",
            color=colour,
            strokeWidth=alt.StrokeWidth("width:Q", scale=None),
            strokeDash=alt.StrokeDash(
                "dashed:N",
                title="move",
                scale=alt.Scale(
                    domain=["within a cycle", "at the decision"], range=[[1, 0], [6, 4]]
                ),
                legend=alt.Legend(orient="bottom"),
            ),
        )
    )
    heads = (
        alt.Chart(marks)
        .mark_point(shape="triangle", filled=True, size=110, opacity=1)
        .encode(
            x=alt.X("head_x:Q", scale=x_scale, axis=None),
            y=alt.Y("head_y:Q", scale=y_scale, axis=None),
            angle=alt.Angle("angle:Q", scale=None),
            color=colour,
        )
    )
    pick = alt.selection_point(name=EDGE_SELECTION, fields=["edge"], on="click", clear=False)
    dots = (
        alt.Chart(marks)
        .mark_circle(size=260, opacity=1, stroke="white", strokeWidth=1.5, cursor="pointer")
        .encode(
            x=x,
            y=y,
            color=colour,
            tooltip=[
                alt.Tooltip("name:N", title="move"),
                alt.Tooltip("cell:N", title="cell"),
                alt.Tooltip("expression:N", title="expression"),
                alt.Tooltip("probability:Q", title="base case per cycle", format=".6g"),
            ],
        )
        .add_params(pick)
    )
    values = (
        alt.Chart(marks)
        .mark_text(dy=-13, fontSize=11, fontWeight="bold")
        .encode(x=x, y=y, text="shown:N", color=colour)
    )
    rings = (
        alt.Chart(nodes[nodes["absorbing"]])
        .mark_circle(size=2900, fill="white", stroke=NODE_STROKE, strokeWidth=1.5)
        .encode(x=x, y=y)
    )
    bubbles = (
        alt.Chart(nodes)
        .mark_circle(size=1810, opacity=1, stroke=NODE_STROKE, strokeWidth=1.5)
        .encode(
            x=x,
            y=y,
            fill=fill,
            tooltip=[alt.Tooltip("state:N", title="state"), alt.Tooltip("group:N", title="group")],
        )
    )
    names = (
        alt.Chart(nodes)
        .mark_text(baseline="top", dy=30, fontSize=11, lineBreak="\n", color="#1B2631")
        .encode(x=x, y=y, text="label:N")
    )
    # "pad": the drawing keeps its pixel size and grows around marks beyond it (loops,
    # names, the legend) instead of being squeezed to fit a given box.
    return (
        alt.layer(curves, heads, rings, bubbles, names, dots, values)
        .properties(
            width=width, height=height, autosize=alt.AutoSizeParams(type="pad", contains="padding")
        )
        .configure_view(stroke=None)
    )
