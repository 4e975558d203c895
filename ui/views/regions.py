"""Policy regions: where in the space of one or two estimates the recommendation changes,
and for whom (state and age). Maps computed by caredecide.sensitivity.regions."""

from __future__ import annotations

import streamlit as st

from caredecide import decision_charts
from caredecide.errors import CaredecideError
from caredecide.modelfile import loads_model
from caredecide.sensitivity.regions import (
    estimates_by_decision_loss,
    policy_region_map,
    threshold_age_map,
)
from ui import working_model


@st.cache_data(max_entries=16, show_spinner=False)
def ranked_estimates(text: str, file: str, base_dir: str) -> list[str]:
    return estimates_by_decision_loss(loads_model(text, file=file, base_dir=base_dir))


@st.cache_data(max_entries=16, show_spinner=False)
def run_region_map(text: str, file: str, base_dir: str, name: str, grid: int):
    model = loads_model(text, file=file, base_dir=base_dir)
    result = policy_region_map(model, name, grid=grid)
    return result.frame, result.base, result.action_labels


@st.cache_data(max_entries=16, show_spinner=False)
def run_age_map(text: str, file: str, base_dir: str, x: str, y: str, grid: int):
    model = loads_model(text, file=file, base_dir=base_dir)
    result = threshold_age_map(model, x, y, grid=grid)
    return result.frame, result.base


model = working_model.valid_model_or_stop()
key = (working_model.working_text(), working_model.file_label(), working_model.base_folder())
names = [
    n for n in model.parameter_names() if model.parameter_range(n)[1] > model.parameter_range(n)[0]
]
st.title("Policy regions")
with st.spinner("Ranking the estimates by how much they change the decision..."):
    names = ranked_estimates(*key)
st.caption(
    "Best action by age in each state as one estimate moves over its plausible range "
    "(dashed line: the base value), and the threshold age as two estimates move together "
    "(diamond: the base point). Every other estimate stays at its base value. Estimates "
    "are offered most decisive first (the decision tornado's ranking)."
)
if not names:
    st.info("The model has no estimate with a range to map.")
    st.stop()

st.subheader("One estimate")
left, right = st.columns(2)
one = left.selectbox("Estimate", names, index=0, key="regions_parameter")
grid = right.slider("Grid values", 5, 81, 41, key="regions_grid")
try:
    with st.spinner("Solving the grid (one batch)..."):
        frame, base, actions = run_region_map(*key, one, int(grid))
except CaredecideError as error:
    st.error(str(error), icon=":material/error:")
else:
    st.altair_chart(
        decision_charts.make_region_map_chart(frame, x_title=one, action_labels=actions, base=base),
        key="regions_map",
    )

st.subheader("Two estimates")
a, b, c = st.columns(3)
x_name = a.selectbox("On the axis", names, index=0, key="regions_x")
y_name = b.selectbox("As lines", names, index=min(1, len(names) - 1), key="regions_y")
age_grid = c.slider("Grid values per estimate", 3, 15, 7, key="regions_age_grid")
if x_name == y_name:
    st.info("Choose two different estimates.")
else:
    try:
        with st.spinner("Solving the grid (one batch)..."):
            ages, base_point = run_age_map(*key, x_name, y_name, int(age_grid))
    except CaredecideError as error:
        st.error(str(error), icon=":material/error:")
    else:
        st.altair_chart(
            decision_charts.make_threshold_age_chart(
                ages, base_point, x_title=x_name, y_title=y_name
            ),
            key="regions_age_map",
        )
        with st.expander("Threshold age at each grid point"):
            st.dataframe(ages, hide_index=True, key="regions_age_table")
