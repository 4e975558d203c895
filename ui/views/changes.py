"""What would change the recommendation: per state, the recommended policy, the estimates
that could flip it (at which values, how likely) and the scenarios that change it. All
figures come from caredecide.sensitivity.recommendation; this view only shows them."""

from __future__ import annotations

import streamlit as st

from caredecide.errors import CaredecideError
from caredecide.modelfile import loads_model
from caredecide.sensitivity.recommendation import flip_sentence, what_would_change
from ui import working_model


@st.cache_data(max_entries=8, show_spinner=False)
def run_changes(text: str, file: str, base_dir: str, grid: int):
    model = loads_model(text, file=file, base_dir=base_dir)
    result = what_would_change(model, grid=grid)
    return result.recommendations, result.flips, result.lines(), result.scenarios


model = working_model.valid_model_or_stop()
key = (working_model.working_text(), working_model.file_label(), working_model.base_folder())
st.title("What would change the recommendation")
st.caption(
    "For each health state: what the model recommends today, which estimates could flip it "
    "inside their plausible ranges and at which values, and how likely a value beyond that "
    "point is under the estimate's own distribution (every other estimate at its base "
    "value). A short distance and a high probability mean the recommendation is fragile."
)
grid = st.slider("Grid values per estimate", 5, 41, 11, key="changes_grid")
try:
    with st.spinner("Searching the values that flip each decision..."):
        recommendations, flips, lines, scenarios = run_changes(*key, int(grid))
except CaredecideError as error:
    st.error(str(error), icon=":material/error:")
    st.stop()

for row in recommendations.itertuples():
    st.subheader(row.state_label)
    st.markdown(f"**Recommended:** {row.recommended}.")
    state_flips = flips[flips["state"] == row.state]
    if state_flips.empty:
        st.markdown("No estimate flips it inside its plausible range.")
    for flip in state_flips.itertuples():
        st.markdown(f"- {flip_sentence(flip)}")
    for scenario in scenarios[scenarios["state"] == row.state].itertuples():
        st.markdown(f"- Scenario **{scenario.scenario}** changes it: {scenario.recommended}.")
with st.expander("The figures as a table"):
    st.dataframe(flips, hide_index=True, key="changes_flips_table")
st.download_button(
    "Download this page as text",
    "\n".join(lines) + "\n",
    file_name="what_would_change.txt",
    key="changes_download",
)
