"""Strategies view: the optimal policy against fixed strategies (incremental table, CE plane)
and the optimal policy over a willingness-to-pay range (all computed by caredecide.compare)."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import streamlit as st

from caredecide import charts, decision_charts
from caredecide.analysis import analyse_strategies, willingness_to_pay_search
from caredecide.errors import CaredecideError
from caredecide.modelfile import loads_model
from caredecide.objective import Objective
from caredecide.strategies import MAX_TABLE_BYTES, read_strategy_table
from ui import working_model

TABLE_COLUMNS = [
    "strategy",
    "kind",
    "cost",
    "qalys",
    "life_years",
    "incremental_cost",
    "incremental_qalys",
    "icer",
    "net_monetary_benefit",
    "status",
    "best_at_wtp",
    "notes",
]
FRONTIER_COLUMNS = [
    "policy",
    "strategy",
    "wtp_from",
    "wtp_to",
    "cost",
    "qalys",
    "found_by",
    "structure",
]


@st.cache_data(max_entries=16, show_spinner=False)
def run_comparison(
    text: str,
    file: str,
    base_dir: str,
    tables: tuple[tuple[str, str], ...],
    wtp: float,
    low: float,
    high: float,
    include_optimal: bool = True,
    reference: str | None = None,
):
    """Compare strategies (cached on the model text, the tables' text and the WTP figures)."""
    model = loads_model(text, file=file, base_dir=base_dir)
    strategies = [s for name, content in tables for s in read_strategy_table(name, text=content)]
    result = analyse_strategies(
        model,
        strategies,
        frontier=False,  # searched over the range shown on the page (default: the rule's)
        wtp=wtp,
        wtp_range=(low, high) if high > low else None,
        builtins=True,
        include_optimal=include_optimal,
        reference=reference,
    )
    return (
        result.table,
        result.frontier,
        result.notes,
        [(r.strategy.name, note) for r in result.resolved for note in r.notes],
        {
            "collapsed": result.frontier_collapsed,
            "state_switches": result.state_switches,
            "regions": result.regions,
            "effect": result.effect_label,
            "actions": [a.label or a.id for a in model.actions],
        },
    )


model = working_model.valid_model_or_stop()
settings = model.settings
currency = settings.currency or "money"
st.title("Strategies")
st.caption(
    "The optimal policy against fixed strategies (never treat, treat at once, treat from a "
    "stage, and any strategy table), each evaluated by the same code. Incremental analysis "
    "by strong and extended dominance (Cantor 1994); net monetary benefit at the willingness "
    "to pay."
)

# The frontier range starts at the library's rule (none for the QALY objective).
search = willingness_to_pay_search(Objective.from_settings(settings)) or (0.0, 0.0)
left, middle, right = st.columns(3)
wtp = left.number_input(
    f"Willingness to pay ({currency} per QALY)",
    min_value=0.0,
    value=float(settings.willingness_to_pay),
    step=1000.0,
    key="strategies_wtp",
)
low = middle.number_input(
    "Frontier from (WTP)", min_value=0.0, value=search[0], step=1000.0, key="strategies_low"
)
high = right.number_input(
    "Frontier to (WTP; equal to 'from' = no frontier)",
    min_value=0.0,
    value=search[1],
    step=1000.0,
    key="strategies_high",
)
options_left, options_right = st.columns(2)
include_optimal = options_left.checkbox(
    "Include the optimal policy in the table", value=True, key="strategies_include_optimal"
)
upload = st.file_uploader(
    "Strategy table (CSV: strategy, state, age_from, age_to, action)",
    type=["csv"],
    key="strategies_upload",
)

tables: list[tuple[str, str]] = []
beside = working_model.beside_table()
if beside is not None:
    tables.append(beside)
    st.caption(f"Strategy table beside the model: {Path(beside[0]).name}")
if upload is not None:
    data = upload.getvalue()
    if len(data) > MAX_TABLE_BYTES:
        st.error(
            f"{upload.name}: {len(data)} bytes; expected at most {MAX_TABLE_BYTES} bytes "
            "for a strategy table",
            icon=":material/error:",
        )
        st.stop()
    try:
        tables.append((upload.name, data.decode("utf-8-sig")))
    except UnicodeDecodeError as error:  # the same words as a file read from disk
        st.error(
            f"{upload.name}: not UTF-8 text ({error.reason} at byte {error.start}); "
            "expected a CSV file",
            icon=":material/error:",
        )
        st.stop()

if high < low:
    st.error(
        f"Frontier range ({low:,.0f}, {high:,.0f}): 'to' must be above 'from'",
        icon=":material/error:",
    )
    st.stop()
try:
    with st.spinner("Solving and evaluating every strategy..."):
        arguments = (
            working_model.working_text(),
            working_model.file_label(),
            working_model.base_folder(),
            tuple(tables),
            float(wtp),
            float(low),
            float(high),
            bool(include_optimal),
        )
        table, frontier, notes, fallbacks, extra = run_comparison(*arguments)
        choices = ["(none)", *table["strategy"]]
        reference = options_right.selectbox(
            "Also compare every strategy with", choices, index=0, key="strategies_reference"
        )
        if reference != "(none)":
            table, frontier, notes, fallbacks, extra = run_comparison(*arguments, reference)
except CaredecideError as error:
    st.error(str(error), icon=":material/error:")
    st.stop()

best = table.loc[table["best_at_wtp"], "strategy"].iloc[0]
st.subheader(f"Best at {wtp:,.0f} {currency} per QALY: {best}")
st.altair_chart(
    charts.make_ce_plane_chart(table, currency=f"({currency})"), key="strategies_ce_plane"
)
effect = extra["effect"]
columns = TABLE_COLUMNS + [
    c for c in ("cost_vs_reference", "qalys_vs_reference", "icer_vs_reference") if c in table
]
st.dataframe(
    table[columns].rename(columns={c: c.replace("qalys", effect) for c in columns if "qalys" in c}),
    hide_index=True,
    key="strategies_table",
)
for note in notes:
    st.info(note, icon=":material/info:")
if fallbacks:
    with st.expander(f"Fallbacks made ({len(fallbacks)})"):
        st.dataframe(
            pd.DataFrame(fallbacks, columns=["strategy", "note"]),
            hide_index=True,
            key="strategies_fallbacks",
        )

if frontier is not None:
    st.subheader("Optimal policy over the willingness-to-pay range")
    st.caption(
        "Best action by age in each state as the willingness to pay rises (dashed line: the "
        "chosen WTP). Switch points are where neighbouring policies have equal net monetary "
        "benefit (found by root-finding, not only on a grid)."
    )
    st.altair_chart(
        decision_charts.make_region_map_chart(
            extra["regions"],
            x_title=f"Willingness to pay ({currency} per QALY)",
            action_labels=extra["actions"],
            base=float(wtp),
            title="Switch points per state over the willingness to pay",
        ),
        key="strategies_switch_chart",
    )
    st.dataframe(extra["state_switches"], hide_index=True, key="strategies_state_switches")
    collapsed = extra["collapsed"]
    st.caption(f"Frontier runs: {collapsed['tolerance'].iloc[0]}.")
    st.dataframe(
        collapsed[["policies", "wtp_from", "wtp_to", "cost", "qalys", "structure"]],
        hide_index=True,
        key="strategies_frontier_runs",
    )
    with st.expander(f"Every policy of the frontier ({len(frontier)})"):
        st.altair_chart(
            charts.make_frontier_chart(frontier, currency=f"({currency})"),
            key="strategies_frontier_chart",
        )
        st.dataframe(frontier[FRONTIER_COLUMNS], hide_index=True, key="strategies_frontier")
