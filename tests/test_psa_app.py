"""The Uncertainty view (AppTest) shows the library's PSA figures; PSA chart builders."""

from __future__ import annotations

import altair as alt
import pytest
from streamlit.testing.v1 import AppTest

from caredecide import charts
from caredecide.cautions import CAUTION_SHORT
from caredecide.modelfile import load_model
from caredecide.strategies import read_strategy_table, sibling_table
from caredecide.uncertainty.psa import analyse_uncertainty
from synthetic_cohort import demo_model_path
from tests.conftest import load_dict
from tests.test_psa import uncertain_model_dict
from tests.ui.conftest import APP, private_app_state  # noqa: F401  (autouse fixture)


@pytest.fixture(scope="module")
def small_result():
    return analyse_uncertainty(load_dict(uncertain_model_dict()), 250, seed=5)


def test_uncertainty_view_shows_the_library_evpi():
    at = AppTest.from_file(APP, default_timeout=300).run()
    at.switch_page("views/uncertainty.py").run()
    assert not at.exception, at.exception
    assert any(CAUTION_SHORT in w.value for w in at.warning)
    at.number_input(key="uncertainty_draws").set_value(60).run()
    assert not at.exception, at.exception
    # The strategy table beside the demo model joins the candidates, as in the CLI.
    beside = sibling_table(demo_model_path())
    assert any(beside.name in c.value for c in at.caption)
    expected = analyse_uncertainty(
        load_model(demo_model_path()), 60, 1, strategies=read_strategy_table(beside)
    ).evpi()
    metrics = {m.label: m.value for m in at.metric}
    label = next(k for k in metrics if k.startswith("EVPI of the timing decision"))
    assert metrics[label] == f"{expected['evpi']:,.2f}"
    assert metrics["Best candidate policy"] == expected["best_candidate"]
    assert any("EVPPI needs at least 200 draws" in i.value for i in at.info)


def test_policy_acceptability_chart_shows_the_shares_of_one_action(small_result):
    frame = small_result.acceptability_by_age_band(3.0)
    spec = charts.make_policy_acceptability_chart(frame, action="treat").to_dict()
    rows = next(iter(spec["datasets"].values()))
    assert {r["action"] for r in rows} == {"treat"}
    assert [r["label"] for r in rows] == [
        f"{s:.0%}" for s in frame[frame["action"] == "treat"]["share"]
    ]


def test_acceptability_curves_chart_has_one_line_per_candidate(small_result):
    chart = charts.make_acceptability_curves_chart(
        small_result.acceptability_curves(), small_result.acceptability_frontier()
    )
    assert isinstance(chart, alt.LayerChart)
    spec = chart.to_dict()
    assert spec["layer"][0]["encoding"]["color"]["scale"]["domain"] == small_result.candidate_names
    assert len(spec["layer"]) == 2  # curves and frontier dots


def test_evppi_chart_ranks_parameters_largest_first(small_result):
    frame = small_result.evppi()
    spec = charts.make_evppi_chart(frame).to_dict()
    assert spec["layer"][0]["encoding"]["y"]["sort"] == list(frame["parameter"])


def test_psa_convergence_chart_has_one_panel_per_quantity(small_result):
    spec = charts.make_psa_convergence_chart(small_result.convergence()).to_dict()
    assert spec["facet"]["row"]["field"] == "quantity"


def test_chart_builders_name_missing_columns(small_result):
    with pytest.raises(ValueError, match=r"EVPPI chart: frame lacks column\(s\) \['mc_se'\]"):
        charts.make_evppi_chart(small_result.evppi().drop(columns="mc_se"))


def test_uncertainty_view_shows_the_library_best_schedule():
    # Common practice: the app displays the analysis layer's figures unchanged.
    from caredecide.analysis import analyse_best_schedule

    at = AppTest.from_file(APP, default_timeout=300).run()
    at.switch_page("views/uncertainty.py").run()
    at.number_input(key="uncertainty_draws").set_value(40).run()
    at.toggle(key="best_schedule_run").set_value(True).run()
    assert not at.exception, at.exception
    expected = analyse_best_schedule(load_model(demo_model_path()), 40, 1)
    metrics = {m.label: m.value for m in at.metric}
    vss = next(k for k in metrics if k.startswith("Value of the stochastic solution"))
    assert metrics[vss] == f"{expected.value_of_stochastic_solution:,.2f}"
    evpi = next(k for k in metrics if k.startswith("EVPI against the best schedule"))
    assert metrics[evpi] == f"{expected.evpi_best:,.2f}"
    assert metrics["Draws where it is optimal"] == f"{expected.acceptability:.1%}"
