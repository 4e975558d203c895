"""Transition cells view: the transition sensitivity matrix, one per action, laid out like
the transition editor (rows: from-state, columns: to-state); a cell's colour says how close
to 1 the factor is at which the decision changes. All computed by
caredecide.sensitivity.cell_sensitivity; this view only displays."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from caredecide import charts
from caredecide.errors import CaredecideError
from caredecide.modelfile import loads_model
from caredecide.sensitivity import cell_sensitivity
from caredecide.sensitivity.cells import DEFAULT_LOSS_FACTORS, DEFAULT_SEARCH_MAX
from ui import working_model

DETAIL_KEY = "cells_detail"


@st.cache_data(max_entries=8, show_spinner=False)
def run_cells(text: str, file: str, base_dir: str, low: float, high: float, search_max: float):
    model = loads_model(text, file=file, base_dir=base_dir)
    return cell_sensitivity(model, loss_factors=(low, high), search_max=search_max)


def _pick_from_chart(chart_key: str) -> None:
    """A click on a matrix cell chooses it in the detail box (callback: before the rerun)."""
    event = st.session_state.get(chart_key)
    points = (event or {}).get("selection", {}).get("cell_pick") or []
    if points and "cell" in points[0]:
        st.session_state[DETAIL_KEY] = points[0]["cell"]


def _show_detail(frame: pd.DataFrame, fixed: pd.DataFrame, cell: str, unit: str) -> None:
    if cell in set(fixed["cell"]):
        row = fixed.set_index("cell").loc[cell]
        st.info(f"**{cell}** is not moved: {row['reason']}.")
        return
    row = frame.set_index("cell").loc[cell]

    def factor(value: float) -> str:
        return "none in the search range" if pd.isna(value) else f"{value:.6g}"

    st.markdown(
        f"**{cell}** (`{row['expression']}`)  \n"
        f"Base value: {row['base_low']:.6g}"
        + (f" to {row['base_high']:.6g} over the ages" if row["varies_with_age"] else "")
        + f"; {row['rule']}.  \n"
        f"Switch below 1: **{factor(row['factor_below'])}**"
        f" (searched down to {row['search_below']:g}); "
        f"switch above 1: **{factor(row['factor_above'])}**"
        f" (searched up to {row['search_above']:.4g}).  \n"
        f"Just past the switch below: {row['changes_below']}.  \n"
        f"Just past the switch above: {row['changes_above']}.  \n"
        f"Value lost by keeping the base-case policy at {row['loss_factor_below']:g}x: "
        f"{row['value_lost_below']:,.6g} {unit}; at {row['loss_factor_above']:g}x: "
        f"{row['value_lost_above']:,.6g} {unit}."
        + (f"  \nNote: {row['note']}." if row["note"] else "")
    )


model = working_model.valid_model_or_stop()
settings = model.settings
unit = "QALYs" if settings.objective == "qalys" else (settings.currency or "money")
st.title("Transition sensitivity matrix")
st.caption(
    "Each transition cell is multiplied by a factor (a rate cell: its rate, before the matrix "
    "exponential) while its row's remainder absorbs the change, or the other entries of the "
    "row are rescaled in proportion when there is none. A cell that changes with age is "
    "multiplied by the same factor at every age. Each cell shows the factor below 1 and above "
    "1 at which the best policy first changes in some state or age ('-': none in the search "
    "range); the darker the cell, the nearer that factor is to 1. Click a cell, or choose it "
    "below, to see its detail."
)
a, b, c = st.columns(3)
low = a.number_input(
    "Value lost reported at factor (below 1)", min_value=0.01, max_value=0.99,
    value=DEFAULT_LOSS_FACTORS[0], step=0.05, key="cells_loss_low",
)  # fmt: skip
high = b.number_input(
    "... and at factor (above 1)", min_value=1.01, max_value=100.0,
    value=DEFAULT_LOSS_FACTORS[1], step=0.25, key="cells_loss_high",
)  # fmt: skip
search_max = c.number_input(
    "Search factors above 1 up to", min_value=1.01, max_value=1000.0,
    value=DEFAULT_SEARCH_MAX, step=1.0, key="cells_search_max",
)  # fmt: skip
key = (working_model.working_text(), working_model.file_label(), working_model.base_folder())
try:
    with st.spinner("Scaling every transition cell (batches through the solver)..."):
        result = run_cells(*key, float(low), float(high), float(search_max))
except CaredecideError as error:
    st.error(str(error), icon=":material/error:")
    st.stop()

frame, fixed, matrix = result.to_frame(), result.fixed_frame(), result.matrix_frame()
if frame.empty:
    st.info("The model has no transition cell that can be moved (only remainders and zeros).")
    st.stop()
st.session_state.setdefault(DETAIL_KEY, frame["cell"].iloc[0])
actions = [action for action in result.action_ids if (matrix["action"] == action).any()]
for tab, action in zip(st.tabs(actions), actions, strict=True):
    with tab:
        chart_key = f"cells_matrix_{action}"
        st.altair_chart(
            charts.make_cell_matrix_chart(matrix, action, state_order=result.state_ids),
            key=chart_key,
            on_select=lambda k=chart_key: _pick_from_chart(k),
            selection_mode="cell_pick",
        )

st.subheader("Cell detail")
choices = list(frame["cell"]) + list(fixed["cell"])
if st.session_state[DETAIL_KEY] not in choices:
    st.session_state[DETAIL_KEY] = choices[0]
chosen = st.selectbox("Cell", choices, key=DETAIL_KEY)
_show_detail(frame, fixed, chosen, unit)

st.subheader("Every cell, nearest switch first")
st.dataframe(result.summary_table(), hide_index=True, key="cells_table")
if result.tied_cells:
    st.caption(
        f"{result.tied_cells} state-age cell(s) tied in the base case are left out of the "
        "search (any move would switch them)."
    )
