"""Scenarios view: the base case and the model's named scenarios side by side.

The table is the library's (:func:`caredecide.analysis.analyse_scenarios`), the same the
command line (``caredecide scenarios``) and the report show.
"""

from __future__ import annotations

import streamlit as st

from caredecide.errors import CaredecideError
from caredecide.modelfile import loads_model
from ui import working_model


@st.cache_data(max_entries=8, show_spinner=False)
def run_scenarios(text: str, file: str, base_dir: str):
    """The scenario table of the model text (cached on the text)."""
    from caredecide.analysis.scenarios import analyse_scenarios

    return analyse_scenarios(loads_model(text, file=file, base_dir=base_dir)).to_frame()


model = working_model.valid_model_or_stop()
st.title("Scenarios")
st.caption(
    "Each scenario changes the listed values of the model file ([scenarios.NAME] tables). "
    "The ICER compares, under the scenario's assumptions, its optimal policy with the "
    "base-case policy kept unchanged."
)
if not model.scenarios:
    st.info(
        "This model names no scenarios. Add a table such as\n\n"
        "    [scenarios.costs_at_six]\n"
        '    label = "Costs discounted at 6% a year"\n'
        "    settings.discount_costs = 0.06\n\n"
        "to the model file (Model view).",
        icon=":material/info:",
    )
try:
    with st.spinner("Solving the base case and each scenario..."):
        frame = run_scenarios(
            working_model.working_text(), working_model.file_label(), working_model.base_folder()
        )
    st.dataframe(frame, hide_index=True, key="scenarios_table")
except CaredecideError as error:
    st.error(str(error), icon=":material/error:")
