"""Sensitivity view: which estimates move the decision, by how much, and at which values
the best action switches (all computed by caredecide.sensitivity)."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from caredecide import charts, decision_charts
from caredecide.analysis.sensitivity import setting_threshold, willingness_to_pay_search
from caredecide.errors import CaredecideError
from caredecide.limits import DISCOUNT_SEARCH_MAX
from caredecide.modelfile import loads_model
from caredecide.objective import Objective
from caredecide.sensitivity import (
    one_way,
    parameter_thresholds,
    summarise_thresholds,
    two_way,
)
from caredecide.sensitivity.context import threshold_context
from caredecide.sensitivity.decision import LOSS_SOURCE, decision_tornado
from ui import working_model


@st.cache_data(max_entries=16, show_spinner=False)
def run_one_way(text: str, file: str, base_dir: str, names: tuple[str, ...]):
    model = loads_model(text, file=file, base_dir=base_dir)
    result = one_way(model, list(names) or None)
    return result.table, result.switches


@st.cache_data(max_entries=16, show_spinner=False)
def run_decision(text: str, file: str, base_dir: str, names: tuple[str, ...], grid: int):
    model = loads_model(text, file=file, base_dir=base_dir)
    thresholds = parameter_thresholds(model, list(names) or None, grid=grid)
    result = decision_tornado(model, list(names) or None, grid=grid, thresholds=thresholds)
    return result.table, threshold_context(model, thresholds)


@st.cache_data(max_entries=16, show_spinner=False)
def run_setting(text: str, file: str, base_dir: str, setting: str, high: float):
    model = loads_model(text, file=file, base_dir=base_dir)
    return setting_threshold(model, setting, high)


@st.cache_data(max_entries=16, show_spinner=False)
def run_two_way(text: str, file: str, base_dir: str, x: str, y: str, grid: int):
    model = loads_model(text, file=file, base_dir=base_dir)
    return two_way(model, x, y, grid=grid, include_base=True)


model = working_model.valid_model_or_stop()
settings = model.settings
key = (working_model.working_text(), working_model.file_label(), working_model.base_folder())
names = list(model.parameter_names())
unit = "QALYs" if settings.objective == "qalys" else (settings.currency or "money")
st.title("Sensitivity")
st.caption(
    "Each estimate moves between its low and high value (from the model file, or the 2.5% and "
    "97.5% quantiles of its distribution). Dirichlet group members move with the other members "
    "rescaled proportionally; rows with a 'rest' entry absorb the change."
)

chosen = st.multiselect(
    "Parameters (none chosen = all)", names, default=[], key="sensitivity_parameters"
)
grid = st.slider("Grid values per parameter", 3, 41, 11, key="sensitivity_grid")
selected = tuple(chosen)

try:
    with st.spinner("Decision tornado and thresholds (batches through the solver)..."):
        decision, context = run_decision(*key, selected, int(grid))
    with st.spinner("One-way analysis (one batch through the solver)..."):
        table, switches = run_one_way(*key, selected)
except CaredecideError as error:
    st.error(str(error), icon=":material/error:")
    st.stop()

st.subheader("Decision tornado: which estimate would change the decision")
st.caption(
    "Each bar is the value lost (per person, discounted) by keeping today's policy if the "
    "estimate were at the low (left) or high (right) end of its range, against the policy "
    "that is best there. Ranked by the mean of the two ends: the expected value of perfect "
    f"information about the estimate alone at its bounds ({LOSS_SOURCE})."
)
st.altair_chart(
    decision_charts.make_decision_tornado_chart(decision, unit=unit),
    key="sensitivity_decision_tornado",
)
st.dataframe(
    decision[["rank", "parameter", "base", "low", "high", "loss_low", "loss_high",
              "loss_at_bounds", "loss_qalys_at_bounds", "share_cells_changed",
              "nearest_threshold", "distance_share", "value_rank"]],
    hide_index=True, key="sensitivity_decision_table",
)  # fmt: skip

st.subheader("Value-level tornado (second view)")
st.caption("How far each estimate moves the expected outcome, whether or not the policy changes.")
st.altair_chart(charts.make_tornado_chart(table, unit=f"({unit})"), key="sensitivity_tornado")
shown = table[["rank", "parameter", "low", "high", "value_low", "value_base", "value_high",
               "swing", "policy_changes", "rule"]]  # fmt: skip
st.dataframe(shown, hide_index=True, key="sensitivity_oneway_table")
with st.expander("Every state and age whose best action changes"):
    st.dataframe(switches, hide_index=True, key="sensitivity_switches")

st.subheader("Decision thresholds in context")
st.caption(
    "The value of each estimate at which a best action switches, beside its base value and "
    "range; 'distance_share' is the move from base as a share of the range and "
    "'probability_beyond' the chance of a value past the threshold under the estimate's "
    "distribution."
)
st.dataframe(context, hide_index=True, key="sensitivity_thresholds")

st.subheader("Thresholds of the settings")
left, right = st.columns(2)
frames: list[pd.DataFrame] = []
try:
    if settings.objective == "net_benefit":
        # The library's search range (the same as the command line and the report).
        searched = willingness_to_pay_search(Objective.from_settings(settings))
        assert searched is not None  # net benefit: always searched
        wtp_max = left.number_input(
            f"Search willingness to pay from 0 to ({settings.currency or 'money'} per QALY)",
            min_value=1.0, value=searched[1], step=1000.0, key="sensitivity_wtp_max",
        )  # fmt: skip
        with st.spinner("Willingness-to-pay threshold..."):
            frames.append(run_setting(*key, "willingness_to_pay", float(wtp_max)))
    if model.n_cycles() is not None:
        rate_max = right.number_input(
            "Search the discount rate (outcomes and costs) from 0 to", min_value=0.001,
            max_value=0.99, value=DISCOUNT_SEARCH_MAX, step=0.01, key="sensitivity_rate_max",
        )  # fmt: skip
        with st.spinner("Discount-rate threshold..."):
            frames.append(run_setting(*key, "discount_rate", float(rate_max)))
except CaredecideError as error:
    st.error(str(error), icon=":material/error:")
if frames:
    st.dataframe(
        pd.concat([summarise_thresholds(f) for f in frames], ignore_index=True),
        hide_index=True, key="sensitivity_setting_thresholds",
    )  # fmt: skip

st.subheader("Two-way analysis")
a, b, c = st.columns(3)
x_name = a.selectbox("Horizontal parameter", names, index=0, key="sensitivity_x")
y_name = b.selectbox("Vertical parameter", names, index=min(1, len(names) - 1), key="sensitivity_y")
two_grid = c.slider("Grid values per axis", 3, 21, 7, key="sensitivity_two_way_grid")
if x_name == y_name:
    st.info("Choose two different parameters for the two-way map.")
else:
    try:
        with st.spinner("Two-way grid (one batch through the solver)..."):
            grid_frame = run_two_way(*key, x_name, y_name, int(two_grid))
    except CaredecideError as error:
        st.error(str(error), icon=":material/error:")
    else:
        st.altair_chart(charts.make_two_way_chart(grid_frame), key="sensitivity_two_way")
        with st.expander("Policy structure at each grid point"):
            st.dataframe(grid_frame, hide_index=True, key="sensitivity_two_way_table")
