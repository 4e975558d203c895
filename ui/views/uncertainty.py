"""Uncertainty view: how often each action is optimal across parameter draws, the expected
loss of candidate policies, acceptability curves, EVPI and EVPPI (all computed by
caredecide.uncertainty.psa)."""

from __future__ import annotations

from pathlib import Path

import streamlit as st

from caredecide import charts, decision_charts
from caredecide.analysis import analyse_best_schedule, analyse_uncertainty
from caredecide.errors import CaredecideError
from caredecide.limits import MAX_APP_DRAWS
from caredecide.modelfile import loads_model
from caredecide.strategies import read_strategy_table
from ui import working_model


@st.cache_data(max_entries=8, show_spinner=False)
def run_analysis(
    text: str, file: str, base_dir: str, draws: int, seed: int, table: tuple[str, str] | None = None
):
    """PSA of the working model; ``table`` (file name, CSV text) adds its strategies."""
    model = loads_model(text, file=file, base_dir=base_dir)
    strategies = read_strategy_table(table[0], text=table[1]) if table else []
    return analyse_uncertainty(model, draws, seed, strategies=strategies)


@st.cache_data(max_entries=4, show_spinner=False)
def run_best_schedule(
    text: str, file: str, base_dir: str, draws: int, seed: int, criterion: str, percentile: float
):
    """The one schedule best over the same draws (caredecide.uncertainty.policy_search)."""
    model = loads_model(text, file=file, base_dir=base_dir)
    return analyse_best_schedule(model, draws, seed, criterion=criterion, percentile=percentile)


model = working_model.valid_model_or_stop()
settings = model.settings
key = (working_model.working_text(), working_model.file_label(), working_model.base_folder())
unit = "QALYs" if settings.objective == "qalys" else (settings.currency or "money")
st.title("Uncertainty")
st.caption(
    "Every parameter with a distribution is drawn at random (Dirichlet groups jointly); each "
    "draw is solved for its own optimal policy, and the candidate policies one could adopt "
    "today are valued on every draw. The same seed gives the same draws."
)
left, right = st.columns(2)
draws = left.number_input(
    "Draws", min_value=10, max_value=MAX_APP_DRAWS, value=300, step=100, key="uncertainty_draws"
)
seed = right.number_input("Seed", min_value=0, value=1, step=1, key="uncertainty_seed")

# The strategy table beside the model joins the candidates, as in the CLI and the report.
table = working_model.beside_table()
if table is not None:
    st.caption(f"Candidates include the strategies of {Path(table[0]).name}")

try:
    with st.spinner(f"Solving {int(draws):,} draws (compile -> solve -> evaluate, in chunks)..."):
        result = run_analysis(*key, int(draws), int(seed), table)
except CaredecideError as error:
    st.error(str(error), icon=":material/error:")
    st.stop()

info = result.evpi()
first, second, third = st.columns(3)
first.metric(
    f"EVPI of the timing decision ({unit} per person)",
    f"{info['evpi']:,.2f}",
    help="An upper bound: the best policy is sought among the candidates only.",
)
second.metric("Monte Carlo standard error", f"{info['mc_se']:,.2f}")
third.metric("Best candidate policy", info["best_candidate"])
if not result.success:
    st.warning("The solver reported a problem: " + "; ".join(result.messages))

st.subheader("How often each action is optimal")
actions = list(result.action_ids)
shown = st.selectbox(
    "Action", actions, index=actions.index(result.shown_action), key="uncertainty_action"
)
band = st.slider("Age band (years)", 1, 20, 5, key="uncertainty_band")
bands = result.acceptability_by_age_band(float(band))
st.altair_chart(
    charts.make_policy_acceptability_chart(bands, action=shown),
    key="uncertainty_acceptability_chart",
)
with st.expander("Shares per cycle with Monte Carlo errors"):
    st.dataframe(result.acceptability(), hide_index=True, key="uncertainty_acceptability_table")

st.subheader("Probabilistic means per strategy")
names = result.candidate_names
reference = st.selectbox(
    "Reference for the incremental figures",
    names,
    index=names.index(result.strategy_summary()["reference"].iloc[0]),
    key="uncertainty_reference",
)
st.dataframe(
    result.strategy_summary(reference=reference), hide_index=True, key="uncertainty_means_table"
)
st.caption(
    "Means over the draws with 95% percentile intervals; ICER = ratio of the mean differences "
    "against the reference. Held fixed at their base value (no distribution): "
    + (", ".join(result.fixed_parameters) or "none")
    + "."
)
st.altair_chart(
    decision_charts.make_draws_plane_chart(
        result.plane_frame(), currency=f"({settings.currency})" if settings.currency else ""
    ),
    key="uncertainty_plane",
)

st.subheader("Candidate policies: expected loss")
st.dataframe(result.expected_loss(), hide_index=True, key="uncertainty_loss_table")

st.subheader("Acceptability curves")
st.altair_chart(
    charts.make_acceptability_curves_chart(
        result.acceptability_curves(),
        result.acceptability_frontier(),
        currency=settings.currency or "",
    ),
    key="uncertainty_curves_chart",
)

st.subheader("Expected value of partial perfect information")
evppi = result.evppi()
if len(evppi):
    st.altair_chart(charts.make_evppi_chart(evppi, unit=f"({unit})"), key="uncertainty_evppi")
    st.dataframe(evppi, hide_index=True, key="uncertainty_evppi_table")
else:
    st.info("EVPPI needs at least 200 draws and two distinct candidate policies.")

st.subheader("Value of information for the population")
a, b, c = st.columns(3)
per_year = a.number_input(
    "Persons facing the decision each year", min_value=0.0, value=1000.0, step=100.0,
    key="uncertainty_population",
)  # fmt: skip
years = b.number_input(
    "Years the decision stays in use", min_value=1, max_value=200, value=10, step=1,
    key="uncertainty_years",
)  # fmt: skip
rate = c.number_input(
    "Annual discount rate", min_value=0.0, max_value=0.99,
    value=float(settings.discount_outcomes), step=0.005, format="%.3f",
    key="uncertainty_population_rate",
)  # fmt: skip
try:
    population = result.population_value_of_information(
        float(per_year), int(years), float(rate), evppi=evppi if len(evppi) else None
    )
except CaredecideError as error:
    st.error(str(error), icon=":material/error:")
else:
    st.dataframe(population, hide_index=True, key="uncertainty_population_table")
    st.caption(
        f"{population['persons'].iloc[0]:,.0f} persons once discounted: each year's persons "
        "discounted to today, the first year undiscounted."
    )

st.subheader("The best schedule given what is not known")
st.caption(
    "The schedule recommended above is optimal at the base-case estimates. The one schedule "
    "with the best expected value over these same draws can differ: it is searched by exact "
    "improvement passes from several starts (finite-horizon models). Cells marked * differ "
    "from the base-case schedule."
)
criteria = {
    "expected": "Expected value over the draws",
    "lower_percentile": "A low percentile of the objective (robust; a different criterion)",
    "regret_percentile": "A high percentile of regret, minimised (robust; a different criterion)",
}
left, right = st.columns(2)
criterion = left.selectbox(
    "Criterion", list(criteria), format_func=criteria.get, key="best_schedule_criterion"
)
percentile = right.number_input(
    "Percentile (robust criteria)", min_value=0.5, max_value=49.5, value=5.0, step=0.5,
    key="best_schedule_percentile", disabled=criterion == "expected",
)  # fmt: skip
if st.toggle("Search the best schedule over these draws", key="best_schedule_run"):
    try:
        with st.spinner("Searching the best schedule over the draws..."):
            best = run_best_schedule(*key, int(draws), int(seed), str(criterion), float(percentile))
    except CaredecideError as error:
        st.error(str(error), icon=":material/error:")
    else:
        first, second, third = st.columns(3)
        first.metric(
            f"Value of the stochastic solution ({unit} per person)",
            f"{best.value_of_stochastic_solution:,.2f}",
            help=f"Monte Carlo standard error {best.vss_standard_error:,.2f}",
        )
        second.metric(
            f"EVPI against the best schedule ({unit} per person)",
            f"{best.evpi_best:,.2f}",
            help=f"Against the candidate policies: {best.evpi_candidates:,.2f}",
        )
        third.metric("Draws where it is optimal", f"{best.acceptability:.1%}")
        st.markdown("\n".join(f"- {line.strip()}" for line in best.lines()[5:]))
        st.altair_chart(charts.make_policy_chart(best.map_frame()), key="best_schedule_map")
        st.dataframe(best.to_frame(), hide_index=True, key="best_schedule_starts")

st.subheader("Convergence")
st.altair_chart(
    charts.make_psa_convergence_chart(result.convergence()), key="uncertainty_convergence"
)
