"""Policy view: the best action per state and age, how close each choice is, values,
the cohort trace and totals under that policy (all computed by caredecide)."""

from __future__ import annotations

import streamlit as st

from caredecide import charts
from caredecide.errors import CaredecideError
from caredecide.expand import expand_model
from caredecide.grouping import trace_by_group
from caredecide.model import OBJECTIVES
from ui import working_model

OBJECTIVE_NAMES = {"net_benefit": "Net monetary benefit", "qalys": "QALYs"}

model = working_model.valid_model_or_stop()
settings = model.settings
st.title("Policy")

left, right, _ = st.columns([1, 1, 2])
kind = left.selectbox(
    "Objective",
    list(OBJECTIVES),
    index=list(OBJECTIVES).index(settings.objective),
    format_func=OBJECTIVE_NAMES.get,
    key="policy_objective",
)
willingness_to_pay = float(settings.willingness_to_pay)
if kind == "net_benefit":
    willingness_to_pay = right.number_input(
        f"Willingness to pay ({settings.currency or 'money'} per QALY)",
        min_value=0.0,
        value=willingness_to_pay,
        step=1000.0,
        key="policy_wtp",
    )

try:
    with st.spinner("Solving the model..."):
        solved = working_model.solve_model(
            working_model.working_text(),
            working_model.file_label(),
            working_model.base_folder(),
            kind,
            float(willingness_to_pay),
            _model=model,
        )
except CaredecideError as error:
    st.error(str(error), icon=":material/error:")
    st.stop()
result = solved.result
unit = "QALYs" if kind == "qalys" else (settings.currency or "money")
if not result.success:
    st.warning(result.message)

# -- totals -------------------------------------------------------------------------------
totals = solved.totals.iloc[0]
st.subheader("Totals per person under the best policy (discounted)")
cols = st.columns(4)
cols[0].metric("Life-years", f"{totals['life_years']:,.4f}")
cols[1].metric("QALYs", f"{totals['qalys']:,.4f}")
if totals["costs_undiscounted"] == 0:  # a model without costs: no figure to show
    cols[2].metric(f"Costs ({settings.currency or 'money'})", "none in this model")
else:
    cols[2].metric(f"Costs ({settings.currency or 'money'})", f"{totals['costs']:,.2f}")
if kind == "qalys" and totals["costs_undiscounted"] == 0:
    cols[3].metric("Net monetary benefit", "not used (QALYs only, no costs)")
else:
    cols[3].metric(
        f"Net monetary benefit at {willingness_to_pay:,.0f}",
        f"{totals['net_monetary_benefit']:,.2f}",
    )

# -- structure ---------------------------------------------------------------------------
st.subheader("What the policy says")
structure = working_model.policy_structure(
    working_model.working_text(),
    working_model.file_label(),
    working_model.base_folder(),
    kind,
    float(willingness_to_pay),
)
st.markdown(structure.text)
labels = {a.id: a.label or a.id for a in model.actions}
st.markdown(
    "\n".join(
        f"- **{labels.get(action, action)}**: "
        + "; ".join(f"{state} ({age})" for state, age in bands)
        for action, bands in structure.bands.items()
        if bands
    )
)

# -- heat maps ---------------------------------------------------------------------------
flat_states = expand_model(model).states  # one per copy when the model has attributes
state_labels = {s.id: s.label or s.id for s in flat_states}
frame = result.to_frame()
decision_ids = [s for s, d in zip(result.state_ids, result.decision_states, strict=True) if d]
if result.finite_horizon:
    frame["age"] = frame["age"].round(2)
else:
    frame["age"] = "any age"
choices = frame[frame["state"].isin(decision_ids)]
# Write the action where a run of equal choices starts in a row (cells are narrow).
starts = choices["action"] != choices.groupby("state")["action"].shift()
choices = choices.assign(
    label=choices["action"].where(starts, ""), action=choices["action"].map(labels)
)
st.altair_chart(
    charts.make_policy_chart(
        choices, action_order=[labels[a] for a in result.action_ids], state_order=decision_ids
    ),
    key="policy_chart",
)
legend = "; ".join(f"{a} = {labels[a]}" for a in result.action_ids)
st.caption(f"The action is written where a run of equal choices starts ({legend}).")

st.subheader("Where the choice is close")
threshold = st.number_input(
    f"Call a choice close when the action gap is below ({unit})",
    min_value=0.0,
    value=0.01 if kind == "qalys" else 100.0,
    key="policy_close_threshold",
)
gaps = choices.assign(close=choices["indifferent"] | (choices["action_gap"] <= threshold))
st.altair_chart(
    charts.make_action_gap_chart(gaps, state_order=decision_ids, unit=unit), key="gap_chart"
)
st.caption(
    "Action gap: how much the best action beats the runner-up for one person in that "
    "state at that age, in present value at the model start (discounted), so gaps at "
    "older ages look smaller. The ten closest choices:"
)
closest = gaps.nsmallest(10, "action_gap")[
    ["age", "state", "action", "next_best_action", "action_gap", "indifferent"]
]
closest = closest.assign(  # labels, as in the "action" column ("" where there is no choice)
    next_best_action=closest["next_best_action"].map(lambda a: labels.get(a, a))
)
st.dataframe(closest, hide_index=True, key="closest_table")

# -- values and trace --------------------------------------------------------------------
st.subheader("Value per state")
try:  # "from this age on, valued at that age": needs one discount rate for the objective
    at_start = result.value_at_cycle_start()[0, : result.policy.shape[1]]  # (Tpi, S)
    values = frame[["state", "age"]].assign(value=at_start.ravel())
    value_note = "valued at that age (discounted to the start of that cycle)"
except ValueError:
    values = frame[["state", "age", "value"]]
    value_note = "in present value at the model start (outcomes and costs use different rates)"
if result.finite_horizon:
    values = values.assign(age=frame["age"].astype(float))
else:
    values = values.assign(age=0.0)
alive = [s.id for s in flat_states if s.alive]
st.altair_chart(
    charts.make_value_chart(values[values["state"].isin(alive)], state_order=alive, unit=unit),
    key="value_chart",
)
st.caption(
    f"Expected discounted {OBJECTIVE_NAMES[kind].lower()} from that state and age on, {value_note}."
)

st.subheader("Cohort trace")
trace, trace_order = solved.trace, list(result.state_ids)
groupings = [c for c in solved.groups.columns if c not in ("state_id", "label")]
if groupings != ["state"]:  # the model has attributes or tunnels
    by = st.selectbox(
        "Show the trace by",
        ["each state", *groupings],
        format_func=lambda name: "declared state" if name == "state" else name,
        key="policy_trace_grouping",
        help="Add up the states generated from attributes and tunnels.",
    )
    if by != "each state":
        trace = trace_by_group(solved.trace, solved.groups, by)
        trace_order = list(dict.fromkeys(trace["state"]))
if result.finite_horizon:
    trace_chart = charts.make_trace_chart(trace, state_order=trace_order)
else:  # no age on an infinite horizon: cycles, shown until the cohort has left
    live = [s.id for s in flat_states if s.alive and not s.absorbing]
    trace = charts.trace_until_absorbed(trace, live)
    trace_chart = charts.make_trace_chart(trace, state_order=trace_order, time="cycle")
    st.caption(
        f"An infinite horizon has no age axis: cycles from the start, shown until less than "
        f"0.1% of the cohort is alive (cycle {int(trace['cycle'].max())})."
    )
st.altair_chart(trace_chart, key="trace_chart")
with st.expander("Tables"):
    st.dataframe(
        frame.assign(state_label=frame["state"].map(state_labels)),
        hide_index=True,
        key="policy_table",
    )
    st.dataframe(solved.totals, hide_index=True, key="totals_table")
