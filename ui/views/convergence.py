"""Convergence view (teaching): how each method reaches its policy, one sweep at a time.

Everything shown comes from :func:`caredecide.analysis.analyse_convergence` and
:func:`caredecide.analysis.analyse_method_race` (values, choices, action values, residual,
stopping bound, cells changed); this view only displays them. One word throughout:
*sweep*.
"""

from __future__ import annotations

import math

import pandas as pd
import streamlit as st

from caredecide.analysis import analyse_convergence, analyse_method_race
from caredecide.convergence import METHOD_NAMES, MethodRace, SweepTrace
from caredecide.errors import CaredecideError
from caredecide.model import Model
from caredecide.modelfile import dumps_model, loads_model
from caredecide.modelfile.overrides import with_overrides
from caredecide.sweep_charts import make_changes_chart, make_sweep_lines
from synthetic_cohort import MODELS_DIR
from ui import working_model

TEACHING_MODEL = MODELS_DIR / "teaching_stationary.toml"
SOURCES = {
    "working": "The working model",
    "teaching": "Bundled teaching model (stationary, synthetic)",
    "textbook": "Two-state example (Puterman 1994, section 3.1)",
}
ITERATIVE = ("value_iteration", "policy_iteration", "modified_policy_iteration")
SWEEP_KEY = "convergence_sweep"


@st.cache_data(max_entries=8, show_spinner=False)
def _trace(
    text: str, file: str, base_dir: str, method: str, epsilon: float, gamma: float | None
) -> SweepTrace:
    model = loads_model(text, file=file, base_dir=base_dir) if text else None
    return analyse_convergence(model, method, epsilon=epsilon, gamma=gamma)


@st.cache_data(max_entries=8, show_spinner=False)
def _race(text: str, file: str, base_dir: str, epsilon: float, gamma: float | None) -> MethodRace:
    model = loads_model(text, file=file, base_dir=base_dir) if text else None
    return analyse_method_race(model, epsilon=epsilon, gamma=gamma)


def _step(delta: int, last: int) -> None:
    """Move the chosen sweep by ``delta`` within 1..last (button callback, before the rerun)."""
    current = int(st.session_state.get(SWEEP_KEY, 1))
    st.session_state[SWEEP_KEY] = min(max(current + delta, 1), last)


def _keep_gamma(model: Model, rate: float) -> None:
    """Write the yearly rate of the chosen discount factor into the working model text."""
    changed = with_overrides(
        model, {"settings.discount_outcomes": rate, "settings.discount_costs": rate}
    )
    working_model.edit_model_text(dumps_model(changed))


def _open_teaching_model() -> None:
    text = working_model.read_model_file(TEACHING_MODEL)
    working_model.open_model(str(TEACHING_MODEL.resolve()), text)


def _figure(value: float | None, fmt: str = ".4g", none: str = "not used") -> str:
    return (
        none
        if value is None or (isinstance(value, float) and math.isnan(value))
        else f"{value:{fmt}}"
    )


working = working_model.valid_model_or_stop()
st.title("Convergence")
source = st.radio(
    "Model to watch",
    list(SOURCES),
    format_func=SOURCES.get,
    horizontal=True,
    key="convergence_source",
)

# --- the model at hand: its text (cache key), horizon and discount factor -------------
if source == "working":
    text, file, base_dir = (
        working_model.working_text(),
        working_model.file_label(),
        working_model.base_folder(),
    )
    model: Model | None = working
elif source == "teaching":
    text = working_model.read_model_file(TEACHING_MODEL)
    file, base_dir = TEACHING_MODEL.name, str(TEACHING_MODEL.parent)
    model = loads_model(text, file=file, base_dir=base_dir)
    st.button(
        "Open the teaching model in the editor",
        key="convergence_open_teaching",
        on_click=_open_teaching_model,
        help="Makes it the working model of every view (your current model stays in its draft).",
    )
else:
    text, file, base_dir, model = "", "two-state example", ".", None
    st.markdown(
        "Puterman 1994, section 3.1: in state **s1** action **a11** earns 5 and stays in s1 or "
        "moves to s2 with probability 0.5 each; action **a12** earns 10 and moves to s2. In "
        "**s2** the only action (a21) earns -1 and stays. Rewards are counted at each "
        "decision; the horizon is infinite."
    )

finite = model is not None and model.n_cycles() is not None
if model is None:
    model_gamma, cycle_years = 0.95, 1.0
else:
    cycle_years = model.settings.cycle_years
    model_gamma = (1.0 + model.settings.discount_outcomes) ** -cycle_years

# --- method and the teacher's controls ------------------------------------------------
if finite:
    method = "backward_induction"
    st.markdown(
        "This model has a finite horizon, so it is solved **exactly by backward induction**: "
        "sweep 1 computes the last cycle, and each further sweep the cycle before it, from "
        "the values of the cycle after (Bellman equation). Nothing is approximated, so there "
        "is no residual and no stopping rule."
    )
else:
    method = st.radio(
        "Method",
        list(ITERATIVE),
        format_func=METHOD_NAMES.get,
        horizontal=True,
        key="convergence_method",
    )
controls = st.columns(2)
gamma_key = f"convergence_gamma_{source}"
gamma_in = controls[0].number_input(
    "Discount factor γ per cycle",
    min_value=0.5,
    max_value=1.0 if finite else 0.9999,
    value=float(round(model_gamma, 6)),
    step=0.005,
    format="%.4f",
    key=gamma_key,
    help=f"γ = 1 / (1 + yearly rate)^{cycle_years:g}. Used here only; the model is not changed.",
)
gamma = None if abs(gamma_in - round(model_gamma, 6)) < 1e-12 else float(gamma_in)
epsilon = 0.01
if not finite:
    epsilon = float(
        controls[1].number_input(
            "ε of the stopping rule (value units; value and modified policy iteration)",
            min_value=1e-8,
            value=0.01,
            format="%g",
            key=f"convergence_epsilon_{source}",
            help="Value iteration stops once the residual is below ε(1−γ)/2γ: the policy is "
            "then ε-optimal (Puterman 1994, section 6.3).",
        )
    )

try:
    with st.spinner("Solving and keeping every sweep..."):
        trace = _trace(text, file, base_dir, method, epsilon, gamma)
except CaredecideError as error:
    st.error(str(error), icon=":material/error:")
    st.stop()

if gamma is not None and source == "working" and model is not None:
    rate = (1.0 / gamma) ** (1.0 / cycle_years) - 1.0
    st.caption(
        f"γ = {gamma:.4f} is used on this view only (yearly discount rate {rate:.4%} for outcomes "
        "and costs); the model is unchanged."
    )
    st.button(
        f"Write the rate {rate:.4%} into the working model",
        key="convergence_keep_gamma",
        on_click=_keep_gamma,
        args=(model, rate),
    )

# --- headline figures -------------------------------------------------------------------
top = st.columns(4)
top[0].metric("Sweeps", trace.sweeps)
top[1].metric("γ per cycle", f"{trace.gamma:.4f}")
if trace.bound is not None:
    top[2].metric("ε", f"{trace.epsilon:g}")
    top[3].metric("Stopping bound ε(1−γ)/2γ", f"{trace.bound:.4g}")
if method == "value_iteration":
    rule = (
        f"Value iteration from v₀ = 0 stopped after **{trace.sweeps} sweeps**, the first whose "
        f"residual ‖vₙ − vₙ₋₁‖ fell below the stopping bound {trace.bound:.4g}."
    )
elif method == "policy_iteration":
    rule = (
        f"Policy iteration evaluates each policy exactly and stopped after **{trace.sweeps} "
        "sweeps**, when an improvement step changed no choice (no ε is used)."
    )
elif method == "modified_policy_iteration":
    rule = (
        f"Modified policy iteration (each sweep: one improvement, then 20 partial evaluation "
        f"passes) stopped after **{trace.sweeps} sweeps**, when the residual fell below "
        f"{trace.bound:.4g}."
    )
else:
    rule = (
        f"Backward induction: **{trace.sweeps} sweeps**, one per cycle, from the last cycle back."
    )
if not trace.converged:
    rule += " It did **not** meet its stopping rule within the sweep cap."
st.markdown(rule + f" No choice changes after sweep {trace.stable_from()}.")

# --- the chosen sweep: cursor, step buttons, slider ---------------------------------------
last = trace.sweeps
if int(st.session_state.get(SWEEP_KEY, 1)) > last:
    st.session_state[SWEEP_KEY] = last
steps = st.columns([1.3, 1.3, 3])
steps[0].button("◀ Previous sweep", key="convergence_back", on_click=_step, args=(-1, last))
steps[1].button("Next sweep ▶", key="convergence_forward", on_click=_step, args=(1, last))
if last > 1:
    k = int(steps[2].slider("Chosen sweep", min_value=1, max_value=last, key=SWEEP_KEY))
else:
    k = 1
    steps[2].markdown("One sweep only.")

per_sweep = trace.to_frame()
values = trace.values_frame().rename(columns={"state": "series", "value": "amount"})
unit = (
    "QALYs"
    if model is None or model.settings.objective == "qalys"
    else (model.settings.currency or "money")
)
charts = st.columns(2)
if trace.residual is not None:
    residual = per_sweep.assign(series="residual").rename(columns={"residual": "amount"})
    charts[0].altair_chart(
        make_sweep_lines(
            residual[["sweep", "series", "amount"]],
            cursor=k,
            title="Residual per sweep" + (" against the stopping bound" if trace.bound else ""),
            y_title="Residual (sup norm, log scale)",
            log=True,
            bound=trace.bound,
        ),
        key="convergence_residual_chart",
    )
else:
    charts[0].altair_chart(
        make_changes_chart(per_sweep, cursor=k, title="Cells whose choice changed, per sweep"),
        key="convergence_changes_chart",
    )
if method in ("policy_iteration", "modified_policy_iteration"):
    charts[1].altair_chart(
        make_changes_chart(per_sweep, cursor=k, title="Cells whose choice changed, per sweep"),
        key="convergence_changes_chart",
    )
else:
    charts[1].altair_chart(
        make_sweep_lines(
            values,
            cursor=k,
            title="Value of each state after each sweep",
            y_title=f"Value ({unit})",
            series_title="State",
        ),
        key="convergence_value_chart",
    )

row = per_sweep.iloc[k - 1]
where = f" (computes cycle {int(row['cycle'])})" if "cycle" in per_sweep else ""
st.subheader(f"After sweep {k} of {last}{where}")
figures = st.columns(3)
changed_cells = row["cells_changed"]
figures[0].metric(
    "Cells changed at this sweep",
    "— (first sweep)" if pd.isna(changed_cells) else int(changed_cells),
)
if trace.residual is not None:
    label = "Bellman residual ‖Tv − v‖" if method == "policy_iteration" else "Residual ‖vₙ − vₙ₋₁‖"
    figures[1].metric(label, f"{float(row['residual']):.4g}")
if trace.bound is not None:
    below = float(row["residual"]) < trace.bound
    figures[2].metric("Below the stopping bound?", "yes" if below else "not yet")

choices = trace.choices(k)
choices["changed at this sweep"] = choices.pop("changed").map({True: "changed", False: ""})


def _highlight(frame: pd.DataFrame) -> pd.DataFrame:
    marked = frame["changed at this sweep"] == "changed"
    style = "background-color: #FDEBD0; font-weight: bold"
    return pd.DataFrame({c: marked.map({True: style, False: ""}) for c in frame.columns})


st.markdown("**Choice in each state** (cells whose choice changed at this sweep are marked)")
st.dataframe(choices.style.apply(_highlight, axis=None), hide_index=True, key="convergence_choices")

decision_ids = list(choices["state"])
if decision_ids:
    state = st.selectbox(
        "Values per action (Q-values) of the state", decision_ids, key="convergence_state"
    )
    q = trace.action_values(k, state)
    q["chosen"] = q["chosen"].map({True: "◀ chosen", False: ""})
    gap = trace.action_gap(k, state)
    cols = st.columns([3, 1])
    cols[0].dataframe(q, hide_index=True, key="convergence_q_values")
    cols[1].metric(
        "Action gap",
        _figure(gap, none="no choice"),
        help="Chosen action's value minus the next best's.",
    )

# --- all three methods on a stationary model ------------------------------------------------
if not finite:
    st.subheader("The three methods side by side")
    with st.spinner("Solving with every method..."):
        race = _race(text, file, base_dir, epsilon, gamma)
    st.dataframe(
        race.to_frame().rename(
            columns={"stable_from": "no change after sweep", "policy": "final choice per state"}
        ),
        hide_index=True,
        key="convergence_race",
    )
    if race.same_policy:
        st.success("All three methods reach the same policy.", icon=":material/check_circle:")
    else:
        st.warning(
            "The methods end with different choices: a near-tie within the stopping tolerance "
            "(make ε smaller).",
            icon=":material/warning:",
        )
