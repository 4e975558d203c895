"""Convergence view (teaching): step through the solver sweep by sweep.

Shows the values and the policy after ``k`` sweeps, the residual ``||v_k - v_{k-1}||`` per
sweep on a log scale beside the solver's error bound, and the sweep from which the
policy no longer changes. Everything comes from the solver's recorded history.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import streamlit as st

from caredecide import charts
from caredecide.errors import CaredecideError
from caredecide.expand import expand_model
from ui import working_model

INFINITE_METHODS = {
    "value_iteration": "Value iteration",
    "policy_iteration": "Policy iteration",
    "modified_policy_iteration": "Modified policy iteration",
}
MAX_SWEEPS = 5_000  # cap on recorded sweeps: the history holds values for every sweep

model = working_model.valid_model_or_stop()
settings = model.settings
st.title("Convergence")
finite = model.n_cycles() is not None
if finite:
    method = "backward_induction"
    st.markdown(
        "This model has a finite horizon, so it is solved **exactly by backward induction**: "
        "sweep *k* computes the values of the cycle *k* steps before the end from those of "
        "the cycle after it (Bellman equation). The residual is the change in values from "
        "one cycle to the one before; there is no error bound because nothing is "
        "approximated. Open the *infinite-horizon* template to watch value iteration converge."
    )
else:
    method = st.radio(
        "Method",
        list(INFINITE_METHODS),
        format_func=INFINITE_METHODS.get,
        horizontal=True,
        key="convergence_method",
    )
    st.markdown(
        "Infinite horizon: each sweep applies the Bellman update. Stopping rule: when the "
        "residual falls below eps (1 - gamma) / (2 gamma) the greedy policy is eps-optimal "
        "(Puterman 1994, Theorem 6.3.1); the error bound drawn is gamma x residual / "
        "(1 - gamma)."
    )

try:
    with st.spinner("Solving and recording every sweep..."):
        solved = working_model.solve_model(
            working_model.working_text(),
            working_model.file_label(),
            working_model.base_folder(),
            settings.objective,
            float(settings.willingness_to_pay),
            method=method,
            record_history=True,
            max_iterations=MAX_SWEEPS,
        )
except CaredecideError as error:
    st.error(str(error), icon=":material/error:")
    st.stop()
result = solved.result
history = result.history or []
if not history:
    st.warning("The solver recorded no sweeps for this model.")
    st.stop()
if not result.success:
    st.warning(result.message)

# Per-sweep arrays of the base case (draw 0): (K,) residual and bound, (K, S) policy.
sweeps = np.array([record.sweep for record in history])
residual = np.array([record.residual[0] for record in history])
bound = np.array([record.error_bound[0] for record in history])
policies = np.stack([record.policy[0] for record in history])
decision = np.asarray(result.decision_states, dtype=bool)
changed = np.any(policies[1:, decision] != policies[:-1, decision], axis=1)
stable_from = int(sweeps[np.flatnonzero(changed)[-1] + 1]) if changed.any() else int(sweeps[0])

st.metric("Sweeps", len(history))
st.caption(f"{result.message}. The policy no longer changes from sweep {stable_from} on.")
long = pd.concat(
    [
        pd.DataFrame({"sweep": sweeps, "quantity": "residual", "amount": residual}),
        pd.DataFrame({"sweep": sweeps, "quantity": "error bound", "amount": bound}),
    ]
).assign(policy_stable_from=stable_from)
st.altair_chart(charts.make_convergence_chart(long), key="convergence_chart")

k = st.slider(
    "Show the state after sweep",
    min_value=1,
    max_value=len(history),
    value=len(history),
    key="convergence_sweep",
)
record = history[k - 1]
labels = {a.id: a.label or a.id for a in model.actions}
where = f" (computes cycle {record.cycle})" if record.cycle is not None else ""
st.subheader(f"After sweep {record.sweep}{where}")
cols = st.columns(2)
cols[0].metric("Residual", f"{record.residual[0]:.4g}")
cols[1].metric("Error bound", f"{record.error_bound[0]:.4g}")
state_ids = list(result.state_ids)
values = pd.DataFrame({"state": state_ids, "age": 0.0, "value": record.value[0]})
alive = [s.id for s in expand_model(model).states if s.alive]
unit = "QALYs" if settings.objective == "qalys" else (settings.currency or "money")
st.altair_chart(
    charts.make_value_chart(values[values["state"].isin(alive)], state_order=alive, unit=unit),
    key="sweep_value_chart",
)
chosen = pd.DataFrame(
    {
        "state": [s for s, d in zip(state_ids, decision, strict=True) if d],
        "action": [labels[result.action_ids[a]] for a in record.policy[0][decision]],
        "value": record.value[0][decision],
    }
)
st.dataframe(chosen, hide_index=True, key="sweep_policy_table")
