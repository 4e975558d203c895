"""Pure chart builders: a tidy ``pandas.DataFrame`` in, an ``altair.Chart`` out.

No Streamlit and no maths here: the views compute with :mod:`caredecide` and pass
frames; tests check the builders through ``chart.to_dict()``.

Colours: a palette of our own chosen for colour-vision deficiency (blue and amber differ
in lightness as well as hue; the rest add lightness steps), and every categorical
encoding also carries a text label or a legend with words, never colour alone.
"""

from __future__ import annotations

from collections.abc import Sequence

import altair as alt
import pandas as pd

ACTION_PALETTE: tuple[str, ...] = (
    "#1D5A8C",  # deep blue
    "#EBA83A",  # amber
    "#8CC5B8",  # pale teal
    "#7A3B63",  # plum
    "#B9B9B9",  # light grey
    "#3F3F3F",  # charcoal
)
"""Categorical colours for actions, in the model's action order."""

STATE_PALETTE: tuple[str, ...] = (
    "#9CC3E4",
    "#1D5A8C",
    "#EBA83A",
    "#A8612A",
    "#8CC5B8",
    "#2F7566",
    "#C79AB9",
    "#7A3B63",
    "#D6D6D6",
    "#555555",
)
"""Categorical colours for health states in a cohort trace (light/dark pairs)."""

_DARK_FILLS = {"#1D5A8C", "#7A3B63", "#3F3F3F"}


def _require(frame: pd.DataFrame, columns: Sequence[str], chart: str) -> None:
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise ValueError(
            f"{chart}: frame lacks column(s) {missing}; expected columns {list(columns)}, "
            f"got {list(frame.columns)}"
        )


def _ordered(frame: pd.DataFrame, column: str, order: Sequence[str] | None) -> list[str]:
    return list(order) if order is not None else list(dict.fromkeys(frame[column].astype(str)))


def _cycle(palette: Sequence[str], n: int) -> list[str]:
    return [palette[i % len(palette)] for i in range(n)]


def _state_age_grid(data: pd.DataFrame, states: list[str]) -> alt.Chart:
    """Base of a heat map: age columns (in frame order), state rows (in ``states`` order)."""
    return alt.Chart(data).encode(
        x=alt.X("age:O", title="Age at start of cycle (years)", sort=None),
        y=alt.Y("state:N", title="Health state", sort=states),
    )


def make_policy_chart(
    frame: pd.DataFrame,
    *,
    action_order: Sequence[str] | None = None,
    state_order: Sequence[str] | None = None,
) -> alt.LayerChart:
    """Heat map of the chosen action per state (rows) and age (columns), with text labels.

    Parameters
    ----------
    frame : DataFrame
        One row per (state, age): ``state`` (str), ``age`` (years at the start of the
        cycle, or a label such as "any age" for a stationary policy), ``action``
        (action label) and ``label`` (short text written in the cell).
    action_order, state_order : sequence of str, optional
        Legend and row order (default: order of first appearance).
    """
    _require(frame, ["state", "age", "action", "label"], "policy chart")
    actions = _ordered(frame, "action", action_order)
    states = _ordered(frame, "state", state_order)
    colours = _cycle(ACTION_PALETTE, len(actions))
    dark = [a for a, c in zip(actions, colours, strict=True) if c in _DARK_FILLS]
    base = _state_age_grid(frame, states)
    cells = base.mark_rect(stroke="white", strokeWidth=0.5).encode(
        color=alt.Color(
            "action:N",
            title="Best action",
            scale=alt.Scale(domain=actions, range=colours),
        ),
        tooltip=["state:N", "age:O", "action:N"],
    )
    text = base.mark_text(fontSize=10, align="left", dx=-5).encode(
        text="label:N",
        color=alt.condition(
            alt.FieldOneOfPredicate(field="action", oneOf=dark or ["\u0000"]),
            alt.value("white"),
            alt.value("black"),
        ),
    )
    return alt.layer(cells, text).properties(
        title="Best action by state and age", height=alt.Step(28)
    )


def make_action_gap_chart(
    frame: pd.DataFrame, *, state_order: Sequence[str] | None = None, unit: str = ""
) -> alt.LayerChart:
    """Heat map of the action gap: how much better the best action is than the runner-up.

    Parameters
    ----------
    frame : DataFrame
        ``state``, ``age`` as in :func:`make_policy_chart`, ``action_gap`` (float, in the
        objective's unit, discounted to the model start; 0 where only one action is
        allowed is shown as missing) and ``close`` (bool: the choice is close).
    unit : str
        Unit shown in the legend title (e.g. "QALYs" or "net monetary benefit").
    """
    _require(frame, ["state", "age", "action_gap", "close"], "action gap chart")
    states = _ordered(frame, "state", state_order)
    data = frame.assign(mark=frame["close"].map({True: "\u25cf", False: ""}))  # a dot
    base = _state_age_grid(data, states)
    cells = base.mark_rect(stroke="white", strokeWidth=0.5).encode(
        color=alt.Color(
            "action_gap:Q",
            title=f"Action gap {unit}".strip(),
            scale=alt.Scale(scheme="greys", reverse=True, type="symlog"),
        ),
        tooltip=["state:N", "age:O", alt.Tooltip("action_gap:Q", format=".4g")],
    )
    text = base.mark_text(fontSize=9, color="#EBA83A").encode(text="mark:N")
    return alt.layer(cells, text).properties(
        title="Action gap (dark = small gap; a dot marks a close call)", height=alt.Step(22)
    )


def make_value_chart(
    frame: pd.DataFrame, *, state_order: Sequence[str] | None = None, unit: str = ""
) -> alt.Chart:
    """Value of the optimal policy per state: lines over age, or bars when there is one age.

    Parameters
    ----------
    frame : DataFrame
        ``state``, ``age`` (numeric years) and ``value`` (expected discounted objective from
        that state and age onward, in ``unit``).
    """
    _require(frame, ["state", "age", "value"], "value chart")
    states = _ordered(frame, "state", state_order)
    colour = alt.Color(
        "state:N", title="Health state",
        scale=alt.Scale(domain=states, range=_cycle(STATE_PALETTE, len(states))),
    )
    y = alt.Y("value:Q", title=f"Value {unit}".strip())
    if frame["age"].nunique() <= 1:
        return (
            alt.Chart(frame)
            .mark_bar()
            .encode(x=alt.X("state:N", sort=states, title="Health state"), y=y, color=colour,
                    tooltip=["state:N", alt.Tooltip("value:Q", format=".4g")])
            .properties(title="Value of the best policy per state")
        )
    return (
        alt.Chart(frame)
        .mark_line(point=True)
        .encode(
            x=alt.X("age:Q", title="Age (years)"),
            y=y,
            color=colour,
            strokeDash=alt.StrokeDash("state:N", scale=alt.Scale(domain=states),
                                      title="Health state"),
            tooltip=["state:N", "age:Q", alt.Tooltip("value:Q", format=".4g")],
        )
        .properties(title="Value of the best policy per state and age")
    )


def make_trace_chart(
    frame: pd.DataFrame, *, state_order: Sequence[str] | None = None
) -> alt.Chart:
    """Cohort trace as a stacked area: share of the cohort in each state over age.

    Parameters
    ----------
    frame : DataFrame
        ``age`` (years at the cycle boundary), ``state`` and ``proportion`` (0..1; the
        proportions at one age sum to 1).
    """
    _require(frame, ["age", "state", "proportion"], "cohort trace chart")
    states = _ordered(frame, "state", state_order)
    order = {s: i for i, s in enumerate(states)}
    data = frame.assign(stack_order=frame["state"].map(order))
    return (
        alt.Chart(data)
        .mark_area()
        .encode(
            x=alt.X("age:Q", title="Age (years)"),
            y=alt.Y("proportion:Q", stack="zero", title="Share of the cohort",
                    scale=alt.Scale(domain=[0, 1])),
            color=alt.Color(
                "state:N", title="Health state",
                scale=alt.Scale(domain=states, range=_cycle(STATE_PALETTE, len(states))),
            ),
            order=alt.Order("stack_order:Q"),
            tooltip=["state:N", "age:Q", alt.Tooltip("proportion:Q", format=".3f")],
        )
        .properties(title="Cohort trace under the best policy")
    )


def make_convergence_chart(frame: pd.DataFrame) -> alt.Chart | alt.LayerChart:
    """Residual per sweep beside the theoretical error bound, on a log scale.

    Parameters
    ----------
    frame : DataFrame
        Long form: ``sweep`` (int, 1-based), ``quantity`` (e.g. "residual",
        "error bound") and ``amount`` (> 0; zeros are dropped because a log scale
        cannot show them). Optional ``policy_stable_from`` (int) draws a rule where
        the policy stops changing.
    """
    _require(frame, ["sweep", "quantity", "amount"], "convergence chart")
    data = frame[frame["amount"] > 0]
    lines = (
        alt.Chart(data)
        .mark_line(point=True)
        .encode(
            x=alt.X("sweep:Q", title="Sweep", axis=alt.Axis(tickMinStep=1)),
            y=alt.Y("amount:Q", title="Size (sup norm)", scale=alt.Scale(type="log")),
            # Colour and dash carry the same field: one legend, lines told apart without colour.
            color=alt.Color("quantity:N", title="Quantity",
                            scale=alt.Scale(range=list(ACTION_PALETTE[:4]))),
            strokeDash=alt.StrokeDash("quantity:N", title="Quantity"),
            tooltip=["sweep:Q", "quantity:N", alt.Tooltip("amount:Q", format=".3e")],
        )
    )
    if "policy_stable_from" in frame.columns and frame["policy_stable_from"].notna().any():
        stable = int(frame["policy_stable_from"].dropna().iloc[0])
        rule_data = pd.DataFrame({"sweep": [stable], "note": ["policy stops changing"]})
        rule = alt.Chart(rule_data).mark_rule(color="#7A3B63", strokeDash=[4, 3]).encode(
            x=alt.X("sweep:Q", axis=alt.Axis(tickMinStep=1)), tooltip=["note:N", "sweep:Q"]
        )
        label = alt.Chart(rule_data).mark_text(
            align="left", dx=4, dy=-6, color="#7A3B63", baseline="top"
        ).encode(x="sweep:Q", y=alt.value(0), text="note:N")
        return alt.layer(lines, rule, label).properties(title="Convergence per sweep")
    return lines.properties(title="Convergence per sweep")


def make_tornado_chart(frame: pd.DataFrame, *, unit: str = "") -> alt.LayerChart:
    """Tornado diagram of a one-way analysis, widest swing at the top.

    Parameters
    ----------
    frame : DataFrame
        The ranked table of :func:`caredecide.sensitivity.one_way`: ``parameter``,
        ``low``, ``high`` (parameter values), ``value_low``, ``value_base``,
        ``value_high`` (objective at the model start) and ``switches_low``,
        ``switches_high`` (number of cells whose best action changes; > 0 marks the
        parameter as policy-changing, written beside its bar).
    unit : str
        Unit of the objective for the axis title (e.g. "QALYs", "net monetary benefit").
    """
    needed = ["parameter", "low", "high", "value_low", "value_base", "value_high"]
    _require(frame, [*needed, "switches_low", "switches_high"], "tornado chart")
    order = list(frame["parameter"].astype(str))
    changes = (frame["switches_low"] + frame["switches_high"]) > 0
    bars = pd.concat(
        [
            pd.DataFrame(
                {
                    "parameter": frame["parameter"].astype(str),
                    "end": f"parameter at its {end} value",
                    "parameter_value": frame[end],
                    "value": frame[f"value_{end}"],
                    "base": frame["value_base"],
                }
            )
            for end in ("low", "high")
        ],
        ignore_index=True,
    )
    marks = frame.assign(
        parameter=frame["parameter"].astype(str),
        mark=changes.map({True: "changes the policy", False: ""}),
        edge=frame[["value_low", "value_high"]].max(axis=1),
    )
    y = alt.Y("parameter:N", sort=order, title="Parameter (widest swing first)")
    bar = (
        alt.Chart(bars)
        .mark_bar(opacity=0.9)
        .encode(
            y=y,
            x=alt.X(
                "base:Q",
                title=f"Objective at the model start {unit}".strip(),
                scale=alt.Scale(zero=False),
            ),
            x2="value:Q",
            color=alt.Color(
                "end:N",
                title="Bar",
                legend=alt.Legend(orient="bottom"),
                scale=alt.Scale(
                    domain=["parameter at its low value", "parameter at its high value"],
                    range=list(ACTION_PALETTE[:2]),
                ),
            ),
            tooltip=[
                "parameter:N",
                "end:N",
                alt.Tooltip("parameter_value:Q", format=".4g"),
                alt.Tooltip("value:Q", format=",.4g"),
            ],
        )
    )
    base_rule = (
        alt.Chart(frame.head(1))
        .mark_rule(color="black", strokeDash=[4, 3])
        .encode(x="value_base:Q")
    )
    text = (
        alt.Chart(marks)
        .mark_text(align="left", dx=4, fontSize=10, fontWeight="bold")
        .encode(y=y, x="edge:Q", text="mark:N")
    )
    return alt.layer(bar, base_rule, text).properties(
        title="One-way sensitivity (dashed line: base case)", width=420
    )


def make_two_way_chart(
    frame: pd.DataFrame, *, action_order: Sequence[str] | None = None
) -> alt.LayerChart:
    """Map of the best action at the start over a grid of two parameters.

    Parameters
    ----------
    frame : DataFrame
        The grid of :func:`caredecide.sensitivity.two_way`: ``x_parameter``,
        ``x_value``, ``y_parameter``, ``y_value``, ``action_at_start`` (words, also
        written in each cell) and ``same_as_base`` (False cells, where the whole policy
        differs from the base case, are outlined and marked "*").
    action_order : sequence of str, optional
        Legend order (default: order of first appearance).
    """
    _require(
        frame,
        ["x_parameter", "x_value", "y_parameter", "y_value", "action_at_start", "same_as_base"],
        "two-way chart",
    )
    actions = _ordered(frame, "action_at_start", action_order)
    colours = _cycle(ACTION_PALETTE, len(actions))
    dark = [a for a, c in zip(actions, colours, strict=True) if c in _DARK_FILLS]
    data = frame.assign(
        x=frame["x_value"].map(lambda v: f"{v:.4g}"),
        y=frame["y_value"].map(lambda v: f"{v:.4g}"),
        label=frame["action_at_start"].astype(str)
        + frame["same_as_base"].map({True: "", False: "*"}),
    )
    x_name, y_name = str(frame["x_parameter"].iloc[0]), str(frame["y_parameter"].iloc[0])
    base = alt.Chart(data).encode(
        x=alt.X("x:O", title=x_name, sort=None),
        y=alt.Y("y:O", title=y_name, sort="descending"),
    )
    cells = base.mark_rect(stroke="white", strokeWidth=0.5).encode(
        color=alt.Color(
            "action_at_start:N",
            title="Best action at the start",
            scale=alt.Scale(domain=actions, range=colours),
        ),
        tooltip=["x:O", "y:O", "action_at_start:N", "same_as_base:N"],
    )
    text = base.mark_text(fontSize=8).encode(
        text="label:N",
        color=alt.condition(
            alt.FieldOneOfPredicate(field="action_at_start", oneOf=dark or ["\u0000"]),
            alt.value("white"),
            alt.value("black"),
        ),
    )
    return alt.layer(cells, text).properties(
        title=f"Best action at the start over {x_name} and {y_name} (* policy differs from base)"
    )
