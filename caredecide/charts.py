"""Pure chart builders: a tidy ``pandas.DataFrame`` in, an ``altair.Chart`` out.

No Streamlit and no maths here: the views compute with :mod:`caredecide` and pass
frames; tests check the builders through ``chart.to_dict()``.

Colours: one palette per kind of meaning (:mod:`caredecide.palettes`: actions, states,
low/high ends, series), chosen for colour-vision deficiency (blue and amber differ in
lightness as well as hue), and every categorical encoding also carries a text label or a
legend with words, never colour alone.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TypeVar

import altair as alt
import pandas as pd

from caredecide.palettes import (
    ACTION_PALETTE,
    DARK_FILLS,
    LOW_HIGH_PALETTE,
    SERIES_PALETTE,
    STATE_PALETTE,
)

ChartLike = alt.Chart | alt.LayerChart | alt.FacetChart
"""What a builder returns: altair types a layered chart with properties as either."""
_T = TypeVar("_T")

# One palette per kind of meaning (caredecide.palettes): actions, states, low/high, series.
_DARK_FILLS = DARK_FILLS

GAP_RAMP: tuple[str, str] = ("#2B2B2B", "#F4F4F4")
"""Action-gap ramp, smallest gap first: dark = close call. One hue, lightness only, so it
reads the same under any colour-vision deficiency and in greyscale print."""

MAX_SWEEPS_WITH_POINTS = 60
"""Above this many sweeps the convergence lines carry no point marks (they would hide the
dash pattern that tells the lines apart without colour)."""


def _require(frame: pd.DataFrame, columns: Sequence[str], chart: str) -> None:
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise ValueError(
            f"{chart}: frame lacks column(s) {missing}; expected columns {list(columns)}, "
            f"got {list(frame.columns)}"
        )


def _ordered(frame: pd.DataFrame, column: str, order: Sequence[str] | None) -> list[str]:
    return list(order) if order is not None else list(dict.fromkeys(frame[column].astype(str)))


def _cycle(palette: Sequence[_T], n: int) -> list[_T]:
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
) -> ChartLike:
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
            legend=alt.Legend(labelLimit=360),  # action labels are sentences: show them whole
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
) -> ChartLike:
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
            scale=alt.Scale(range=list(GAP_RAMP), type="symlog"),
        ),
        tooltip=["state:N", "age:O", alt.Tooltip("action_gap:Q", format=".4g")],
    )
    # Amber dot with a dark outline: visible on the darkest and the lightest cell alike.
    text = base.mark_text(fontSize=11, color="#FFFFFF", stroke="#1A1A1A", strokeWidth=0.6).encode(
        text="mark:N"
    )
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
        "state:N",
        title="Health state",
        scale=alt.Scale(domain=states, range=_cycle(STATE_PALETTE, len(states))),
    )
    y = alt.Y("value:Q", title=f"Value {unit}".strip())
    if frame["age"].nunique() <= 1:
        return (
            alt.Chart(frame)
            .mark_bar()
            .encode(
                x=alt.X("state:N", sort=states, title="Health state"),
                y=y,
                color=colour,
                tooltip=["state:N", alt.Tooltip("value:Q", format=".4g")],
            )
            .properties(title="Value of the best policy per state")
        )
    return (
        alt.Chart(frame)
        .mark_line(point=True)
        .encode(
            x=alt.X("age:Q", title="Age (years)"),
            y=y,
            color=colour,
            strokeDash=alt.StrokeDash(
                "state:N", scale=alt.Scale(domain=states), title="Health state"
            ),
            tooltip=["state:N", "age:Q", alt.Tooltip("value:Q", format=".4g")],
        )
        .properties(title="Value of the best policy per state and age")
    )


def trace_until_absorbed(
    frame: pd.DataFrame, live_states: Sequence[str], *, left: float = 1e-3
) -> pd.DataFrame:
    """The trace up to the first cycle where less than ``left`` of the cohort is alive.

    For an infinite horizon the trace runs to a display cap; past the point where the
    cohort has left the live states there is nothing to see. ``frame`` has ``cycle``,
    ``state`` and ``proportion``.
    """
    _require(frame, ["cycle", "state", "proportion"], "cohort trace")
    alive = frame[frame["state"].isin(live_states)].groupby("cycle")["proportion"].sum()
    gone = alive.index[alive.to_numpy() < left]
    if len(gone) == 0:
        return frame
    return frame[frame["cycle"] <= gone[0]]


def make_trace_chart(
    frame: pd.DataFrame, *, state_order: Sequence[str] | None = None, time: str = "age"
) -> alt.Chart:
    """Cohort trace as a stacked area: share of the cohort in each state over age.

    Parameters
    ----------
    frame : DataFrame
        ``age`` (years at the cycle boundary) or ``cycle``, ``state`` and ``proportion``
        (0..1; the proportions at one boundary sum to 1).
    time : {"age", "cycle"}
        The horizontal axis: age for a finite horizon, cycles for an infinite horizon
        (a stationary model has no age).
    """
    _require(frame, [time, "state", "proportion"], "cohort trace chart")
    states = _ordered(frame, "state", state_order)
    order = {s: i for i, s in enumerate(states)}
    data = frame.assign(stack_order=frame["state"].map(order))
    return (
        alt.Chart(data)
        .mark_area()
        .encode(
            x=alt.X(f"{time}:Q", title="Age (years)" if time == "age" else "Cycles from the start"),
            y=alt.Y(
                "proportion:Q",
                stack="zero",
                title="Share of the cohort",
                scale=alt.Scale(domain=[0, 1]),
            ),
            color=alt.Color(
                "state:N",
                title="Health state",
                scale=alt.Scale(domain=states, range=_cycle(STATE_PALETTE, len(states))),
            ),
            order=alt.Order("stack_order:Q"),
            tooltip=["state:N", f"{time}:Q", alt.Tooltip("proportion:Q", format=".3f")],
        )
        .properties(title="Cohort trace under the best policy")
    )


def make_convergence_chart(frame: pd.DataFrame) -> ChartLike:
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
        .mark_line(point=bool(data["sweep"].nunique() <= MAX_SWEEPS_WITH_POINTS), strokeWidth=2)
        .encode(
            x=alt.X("sweep:Q", title="Sweep", axis=alt.Axis(tickMinStep=1)),
            y=alt.Y("amount:Q", title="Size (sup norm)", scale=alt.Scale(type="log")),
            # Colour and dash carry the same field: one legend, lines told apart without colour.
            color=alt.Color(
                "quantity:N", title="Quantity", scale=alt.Scale(range=list(SERIES_PALETTE[:4]))
            ),
            strokeDash=alt.StrokeDash("quantity:N", title="Quantity"),
            tooltip=["sweep:Q", "quantity:N", alt.Tooltip("amount:Q", format=".3e")],
        )
    )
    if "policy_stable_from" in frame.columns and frame["policy_stable_from"].notna().any():
        stable = int(frame["policy_stable_from"].dropna().iloc[0])
        rule_data = pd.DataFrame({"sweep": [stable], "note": ["policy stops changing"]})
        rule = (
            alt.Chart(rule_data)
            .mark_rule(color="#111111", strokeDash=[4, 3])
            .encode(x=alt.X("sweep:Q", axis=alt.Axis(tickMinStep=1)), tooltip=["note:N", "sweep:Q"])
        )
        label = (
            alt.Chart(rule_data)
            .mark_text(align="left", dx=4, dy=-6, color="#111111", baseline="top")
            .encode(x="sweep:Q", y=alt.value(0), text="note:N")
        )
        return alt.layer(lines, rule, label).properties(title="Convergence per sweep")
    return lines.properties(title="Convergence per sweep")


def make_tornado_chart(frame: pd.DataFrame, *, unit: str = "") -> ChartLike:
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
                    range=list(LOW_HIGH_PALETTE),
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
) -> ChartLike:
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
    # Long labels (several start states) become letters, explained in the legend.
    if max(len(a) for a in actions) <= 8:
        short = {a: a for a in actions}
    else:
        short = {a: chr(ord("A") + i) for i, a in enumerate(actions)}
        frame = frame.assign(
            action_at_start=frame["action_at_start"].map(lambda a: f"{short[a]} = {a}")
        )
        dark = [f"{short[a]} = {a}" for a in dark]
        actions = [f"{short[a]} = {a}" for a in actions]
        short = {a: a.split(" = ", 1)[0] for a in actions}

    def axis_labels(values: pd.Series) -> dict[float, str]:
        # 4 significant digits, more when neighbours would share a label (<= 12).
        distinct = sorted(values.unique())
        for digits in range(4, 13):
            labels = [f"{v:.{digits}g}" for v in distinct]
            if len(set(labels)) == len(labels):
                break
        return dict(zip(distinct, labels, strict=True))

    x_labels, y_labels = axis_labels(frame["x_value"]), axis_labels(frame["y_value"])
    data = frame.assign(
        x=frame["x_value"].map(x_labels),
        y=frame["y_value"].map(y_labels),
        label=frame["action_at_start"].astype(str).map(short)
        + frame["same_as_base"].map({True: "", False: "*"})
        + (frame["is_base"].map({True: " (base)", False: ""}) if "is_base" in frame else ""),
    )
    x_name, y_name = str(frame["x_parameter"].iloc[0]), str(frame["y_parameter"].iloc[0])
    # Explicit numeric orders: sorting the text labels would put "970.7" above "2143".
    base = alt.Chart(data).encode(
        x=alt.X("x:O", title=x_name, sort=list(x_labels.values())),
        y=alt.Y("y:O", title=y_name, sort=list(y_labels.values())[::-1]),
    )
    cells = base.mark_rect(stroke="white", strokeWidth=0.5).encode(
        color=alt.Color(
            "action_at_start:N",
            title="Best action at the start",
            scale=alt.Scale(domain=actions, range=colours),
            # Long action labels: below the map, whole (a legend is never cut).
            legend=alt.Legend(orient="bottom", direction="vertical", labelLimit=0),
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


def make_ce_plane_chart(frame: pd.DataFrame, *, currency: str = "") -> ChartLike:
    """Cost-effectiveness plane: strategies by QALYs (x) and cost (y), frontier joined.

    Parameters
    ----------
    frame : DataFrame
        The incremental table of :func:`caredecide.compare.compare_strategies`:
        ``strategy``, ``cost``, ``qalys`` (discounted, per person), ``status`` and
        ``on_frontier``; an optional ``label`` column is written beside each point
        (default: the strategy name). Status is shown by shape *and* colour, and named
        in the legend.
    currency : str
        Currency label for the cost axis.
    """
    _require(frame, ["strategy", "cost", "qalys", "status", "on_frontier"], "CE plane chart")
    data = frame.assign(
        label=frame["label"] if "label" in frame.columns else frame["strategy"],
        group=frame["status"]
        .astype(str)
        .str.extract(r"^(on frontier|dominated|extendedly dominated|identical)", expand=False)
        .fillna("other"),
        # Frontier points are drawn last, so a strategy identical to one on the frontier
        # never hides it.
        draw_order=frame["on_frontier"].astype(int),
    )
    groups = ["on frontier", "dominated", "extendedly dominated", "identical"]
    base = alt.Chart(data).encode(
        x=alt.X("qalys:Q", title="QALYs per person (discounted)", scale=alt.Scale(zero=False)),
        y=alt.Y(
            "cost:Q",
            title=f"Cost per person (discounted) {currency}".strip(),
            scale=alt.Scale(zero=False),
        ),
    )
    line = (
        alt.Chart(data[data["on_frontier"]].sort_values("cost"))
        .mark_line(color="#3F3F3F", strokeDash=[5, 3])
        .encode(x="qalys:Q", y="cost:Q", order="cost:Q")
    )
    points = base.mark_point(size=70, filled=True, opacity=0.9).encode(
        shape=alt.Shape(
            "group:N",
            title="Status",
            legend=alt.Legend(orient="bottom"),
            scale=alt.Scale(domain=groups, range=["circle", "cross", "triangle-up", "square"]),
        ),
        color=alt.Color(
            "group:N",
            title="Status",
            legend=alt.Legend(orient="bottom"),
            scale=alt.Scale(domain=groups, range=list(SERIES_PALETTE[:4])),
        ),
        order=alt.Order("draw_order:Q"),
        tooltip=[
            "strategy:N",
            "status:N",
            alt.Tooltip("cost:Q", format=",.2f"),
            alt.Tooltip("qalys:Q", format=".4f"),
        ],
    )
    text = base.mark_text(align="left", dx=6, dy=-4, fontSize=9).encode(text="label:N")
    return alt.layer(line, points, text).properties(
        title="Cost-effectiveness plane (dashed: the efficient frontier)", width=520, height=360
    )


def make_frontier_chart(frame: pd.DataFrame, *, currency: str = "") -> alt.Chart:
    """Which policy is optimal over which willingness-to-pay interval (one bar per policy).

    Parameters
    ----------
    frame : DataFrame
        The frontier table of :func:`caredecide.frontier.policy_frontier`: ``policy``
        (label, one row per interval, in increasing WTP), ``wtp_from``, ``wtp_to``
        (money per QALY) and optionally ``structure`` (the policy in words, in the
        tooltip).
    currency : str
        Currency label for the axis.
    """
    _require(frame, ["policy", "wtp_from", "wtp_to"], "frontier chart")
    tooltip = [
        "policy:N",
        alt.Tooltip("wtp_from:Q", format=",.2f"),
        alt.Tooltip("wtp_to:Q", format=",.2f"),
    ]
    if "structure" in frame.columns:
        tooltip.append("structure:N")
    return (
        alt.Chart(frame)
        .mark_bar(color=SERIES_PALETTE[1], height={"band": 0.8})
        .encode(
            x=alt.X("wtp_from:Q", title=f"Willingness to pay per QALY {currency}".strip()),
            x2="wtp_to:Q",
            y=alt.Y(
                "policy:N",
                sort=list(dict.fromkeys(frame["policy"].astype(str))),
                title="Optimal policy",
            ),
            tooltip=tooltip,
        )
        .properties(title="Optimal policy by willingness to pay", width=520)
    )


# --- probabilistic analysis (PSA) charts ---------------------------------------------------


def make_policy_acceptability_chart(
    frame: pd.DataFrame, *, action: str, state_order: Sequence[str] | None = None
) -> ChartLike:
    """Heat map: share of draws whose optimal policy takes ``action``, by state and age band.

    Parameters
    ----------
    frame : DataFrame
        :meth:`caredecide.uncertainty.psa.PSAResult.acceptability_by_age_band`: ``state``,
        ``age_from``, ``age_to`` (years; NaN for an infinite horizon), ``action``,
        ``share`` (0..1) and ``mc_se``.
    action : str
        The action whose share is shown (e.g. the treatment).
    state_order : sequence of str, optional
        Row order (default: order of first appearance).
    """
    _require(
        frame,
        ["state", "age_from", "age_to", "action", "share", "mc_se"],
        "policy acceptability chart",
    )
    data = frame[frame["action"] == action].copy()
    data["band"] = [
        "any age" if pd.isna(a) else f"{a:g}-{b:g}"
        for a, b in zip(data["age_from"], data["age_to"], strict=True)
    ]
    data["label"] = [f"{s:.0%}" for s in data["share"]]
    states = _ordered(data, "state", state_order)
    base = alt.Chart(data).encode(
        x=alt.X(
            "band:O",
            title="Age band (years at the start of the cycle)",
            sort=None,
            axis=alt.Axis(labelAngle=0),
        ),
        y=alt.Y("state:N", title="Health state", sort=states),
    )
    cells = base.mark_rect(stroke="white", strokeWidth=0.5).encode(
        color=alt.Color(
            "share:Q",
            title=f"Share of draws: {action}",
            scale=alt.Scale(domain=[0, 1], scheme="blues"),
        ),
        tooltip=[
            "state:N",
            "band:O",
            alt.Tooltip("share:Q", format=".1%"),
            alt.Tooltip("mc_se:Q", title="Monte Carlo error", format=".1%"),
        ],
    )
    text = base.mark_text(fontSize=10).encode(
        text="label:N",
        color=alt.condition(alt.datum.share > 0.6, alt.value("white"), alt.value("black")),
    )
    return alt.layer(cells, text).properties(
        title=f"How often '{action}' is optimal across the parameter draws",
        height=alt.Step(28),
        width=alt.Step(52),
    )


def make_acceptability_curves_chart(
    curves: pd.DataFrame, frontier: pd.DataFrame | None = None, *, currency: str = ""
) -> ChartLike:
    """Acceptability curves of candidate policies, optionally with the frontier marked.

    Parameters
    ----------
    curves : DataFrame
        ``wtp``, ``strategy``, ``probability_cost_effective`` (one row per WTP and
        candidate; :func:`caredecide.uncertainty.acceptability.acceptability_curve`).
    frontier : DataFrame, optional
        ``wtp``, ``strategy``, ``probability_cost_effective`` of the candidate with the
        highest expected net benefit at each WTP (drawn as black dots).
    currency : str
        Currency label for the axis.
    """
    _require(
        curves, ["wtp", "strategy", "probability_cost_effective"], "acceptability curves chart"
    )
    names = _ordered(curves, "strategy", None)
    dashes = [[1, 0], [6, 3], [2, 2], [8, 3, 2, 3]]
    x = alt.X("wtp:Q", title=f"Willingness to pay per QALY {currency}".strip())
    y = alt.Y(
        "probability_cost_effective:Q",
        title="Probability cost effective",
        scale=alt.Scale(domain=[0, 1]),
    )
    lines = (
        alt.Chart(curves)
        .mark_line(strokeWidth=2)
        .encode(
            x=x,
            y=y,
            color=alt.Color(
                "strategy:N",
                title="Candidate policy",
                sort=names,
                scale=alt.Scale(domain=names, range=_cycle(SERIES_PALETTE, len(names))),
                legend=alt.Legend(orient="right", labelLimit=260),
            ),
            strokeDash=alt.StrokeDash(
                "strategy:N",
                sort=names,
                legend=None,
                scale=alt.Scale(domain=names, range=_cycle(dashes, len(names))),
            ),
            tooltip=[
                "strategy:N",
                alt.Tooltip("wtp:Q", format=",.0f"),
                alt.Tooltip("probability_cost_effective:Q", format=".1%"),
            ],
        )
    )
    layers = [lines]
    if frontier is not None:
        _require(
            frontier, ["wtp", "strategy", "probability_cost_effective"], "acceptability frontier"
        )
        layers.append(
            alt.Chart(frontier)
            .mark_point(filled=True, color="black", size=25)
            .encode(x=x, y=y, tooltip=["strategy:N", alt.Tooltip("wtp:Q", format=",.0f")])
        )
    return alt.layer(*layers).properties(
        title="Acceptability curves (dots: highest expected net benefit)", width=520, height=300
    )


def make_evppi_chart(frame: pd.DataFrame, *, unit: str = "") -> ChartLike:
    """EVPPI per parameter (or Dirichlet group), largest first, with +-1.96 s.e. whiskers.

    Parameters
    ----------
    frame : DataFrame
        :meth:`caredecide.uncertainty.psa.PSAResult.evppi`: ``parameter``, ``evppi`` and
        ``mc_se`` (objective units per person).
    unit : str
        Unit label for the axis, e.g. ``"(money per person)"``.
    """
    _require(frame, ["parameter", "evppi", "mc_se"], "EVPPI chart")
    data = frame.dropna(subset=["evppi"]).assign(
        low=lambda f: f["evppi"] - 1.96 * f["mc_se"], high=lambda f: f["evppi"] + 1.96 * f["mc_se"]
    )
    order = list(data.sort_values("evppi", ascending=False)["parameter"])
    y = alt.Y("parameter:N", sort=order, title="Parameter or group")
    bars = (
        alt.Chart(data)
        .mark_bar(color=SERIES_PALETTE[1])
        .encode(
            x=alt.X("evppi:Q", title=f"EVPPI per person {unit}".strip()),
            y=y,
            tooltip=[
                "parameter:N",
                alt.Tooltip("evppi:Q", format=",.2f"),
                alt.Tooltip("mc_se:Q", format=",.2f"),
            ],
        )
    )
    whiskers = alt.Chart(data).mark_rule(color="#3F3F3F").encode(x="low:Q", x2="high:Q", y=y)
    return alt.layer(bars, whiskers).properties(
        title="Expected value of partial perfect information", width=480, height=alt.Step(22)
    )


def make_psa_convergence_chart(frame: pd.DataFrame) -> alt.FacetChart:
    """Running mean with a 95% band against the number of draws, one panel per quantity.

    Parameters
    ----------
    frame : DataFrame
        :meth:`caredecide.uncertainty.psa.PSAResult.convergence`: ``quantity``, ``n``,
        ``mean``, ``se``.
    """
    _require(frame, ["quantity", "n", "mean", "se"], "PSA convergence chart")
    data = frame.assign(
        low=frame["mean"] - 1.96 * frame["se"], high=frame["mean"] + 1.96 * frame["se"]
    )
    x = alt.X("n:Q", title="Draws", scale=alt.Scale(type="log"))
    band = (
        alt.Chart()
        .mark_area(opacity=0.3, color=SERIES_PALETTE[2])
        .encode(
            x=x, y=alt.Y("low:Q", title="Running mean", scale=alt.Scale(zero=False)), y2="high:Q"
        )
    )
    line = alt.Chart().mark_line(color=SERIES_PALETTE[0]).encode(x=x, y="mean:Q")
    return (
        alt.layer(band, line, data=data)
        .properties(width=480, height=160)
        .facet(row=alt.Row("quantity:N", title=None))
        .resolve_scale(y="independent")
        .properties(title="Convergence of the running means (band: 95% Monte Carlo interval)")
    )


CLOSENESS_COLOURS: dict[str, str] = {
    "within 1.1x": "#5B1A2E",  # darkest: the decision hangs on this cell
    "within 1.25x": "#9C3B3B",
    "within 1.5x": "#D0743C",
    "within 2x": "#EDB567",
    "further than 2x": "#F6E3BD",
    "no switch in the search range": "#FFFFFF",
    "not moved": "#CFCFCF",
}
"""Transition sensitivity matrix: one warm hue darkening as the switching factor nears 1
(lightness carries the order, so it reads in greyscale too); the factors are also written
in every cell. Keys are the bands of :data:`caredecide.sensitivity.cells.CLOSENESS_BANDS`."""


def make_cell_matrix_chart(
    frame: pd.DataFrame, action: str, *, state_order: Sequence[str] | None = None
) -> alt.LayerChart:
    """One action's transition sensitivity matrix, laid out like the transition editor.

    Parameters
    ----------
    frame : DataFrame
        :meth:`caredecide.sensitivity.CellSensitivityResult.matrix_frame`: ``action,
        from_state, to_state, cell, status, closeness, label, detail``.
    action : str
        The action whose matrix is drawn (rows: from-state, columns: to-state).
    state_order : sequence of str, optional
        Row and column order (default: order of first appearance).

    Clicking a cell selects it (point selection ``cell_pick`` on the ``cell`` field), so a
    front end can show that cell's detail.
    """
    _require(
        frame,
        ["action", "from_state", "to_state", "cell", "status", "closeness", "label", "detail"],
        "cell matrix chart",
    )
    data = frame[frame["action"] == action]
    states = (
        list(state_order)
        if state_order
        else list(dict.fromkeys([*data["from_state"], *data["to_state"]]))
    )
    bands = list(CLOSENESS_COLOURS)
    base = alt.Chart(data).encode(
        x=alt.X("to_state:N", title="to", sort=states, scale=alt.Scale(domain=states),
                axis=alt.Axis(orient="top", labelAngle=0)),
        y=alt.Y("from_state:N", title="from", sort=states, scale=alt.Scale(domain=states)),
    )  # fmt: skip
    picked = alt.selection_point(fields=["cell"], name="cell_pick", on="click")
    cells = (
        base.mark_rect(stroke="#7A7A7A", strokeWidth=0.6)
        .add_params(picked)
        .encode(
            color=alt.Color(
                "closeness:N",
                title="Switching factor",
                scale=alt.Scale(domain=bands, range=[CLOSENESS_COLOURS[b] for b in bands]),
            ),
            tooltip=[
                alt.Tooltip("cell:N", title="cell"),
                alt.Tooltip("closeness:N", title="nearest switch"),
                alt.Tooltip("detail:N", title="detail"),
            ],
        )
    )
    text = base.mark_text(fontSize=10).encode(
        text="label:N",
        color=alt.condition(
            alt.FieldOneOfPredicate(field="closeness", oneOf=bands[:2]),
            alt.value("white"),
            alt.value("black"),
        ),
    )
    layered = alt.layer(
        cells,
        text,
        title=f"Action: {action} (factor below 1 / above 1 at which the policy changes)",
        width=max(90 * len(states), 240),
        height=max(50 * len(states), 260),  # room for the whole legend
    )
    # altair types a layer holding a selection as possibly faceted; no facet is set here.
    assert isinstance(layered, alt.LayerChart)
    return layered
