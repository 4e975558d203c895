"""The "What would change it" and "Policy regions" views in Streamlit's AppTest: they run,
show the caution, and show exactly what the library computes."""

from __future__ import annotations

import pytest
from streamlit.testing.v1 import AppTest

from caredecide.cautions import CAUTION_SHORT
from caredecide.modelfile import load_model
from caredecide.sensitivity.recommendation import flip_sentence, what_would_change
from caredecide.sensitivity.regions import threshold_age_map
from synthetic_cohort import demo_model_path
from tests.ui.conftest import APP


@pytest.fixture(scope="module")
def demo():
    return load_model(demo_model_path())


def test_changes_view_shows_the_library_sentences(demo):
    at = AppTest.from_file(APP, default_timeout=300)
    at.run()
    at.switch_page("views/changes.py").run()
    assert not at.exception, at.exception
    assert any(CAUTION_SHORT in w.value for w in at.warning)
    expected = what_would_change(demo, grid=11)
    shown = [m.value for m in at.markdown]
    for flip in expected.flips.itertuples():
        assert f"- {flip_sentence(flip)}" in shown
    for row in expected.recommendations.itertuples():
        assert f"**Recommended:** {row.recommended}." in shown
    table = at.dataframe[0].value
    assert list(table["threshold"]) == list(expected.flips["threshold"])


def test_regions_view_shows_both_maps(demo):
    at = AppTest.from_file(APP, default_timeout=300)
    at.run()
    at.switch_page("views/regions.py").run()
    assert not at.exception, at.exception
    assert any(CAUTION_SHORT in w.value for w in at.warning)
    assert len(at.get("vega_lite_chart")) == 2
    x, y = at.selectbox(key="regions_x").value, at.selectbox(key="regions_y").value
    expected = threshold_age_map(demo, x, y, grid=7).frame
    shown = at.dataframe[0].value
    assert shown["threshold_age"].to_numpy() == pytest.approx(
        expected["threshold_age"].to_numpy(), nan_ok=True
    )


def test_uncertainty_view_shows_means_plane_and_population_value(demo):
    from caredecide.strategies import read_strategy_table, sibling_table
    from caredecide.uncertainty.psa import analyse_uncertainty

    at = AppTest.from_file(APP, default_timeout=300).run()
    at.switch_page("views/uncertainty.py").run()
    at.number_input(key="uncertainty_draws").set_value(40).run()
    assert not at.exception, at.exception
    expected = analyse_uncertainty(
        demo, 40, 1, strategies=read_strategy_table(sibling_table(demo_model_path()))
    )
    means = next(d.value for d in at.dataframe if "mean_cost" in d.value.columns)
    assert means["mean_cost"].to_numpy() == pytest.approx(
        expected.strategy_summary()["mean_cost"].to_numpy(), rel=1e-12
    )
    population = next(d.value for d in at.dataframe if "population" in d.value.columns)
    table = expected.population_value_of_information(1000.0, 10, demo.settings.discount_outcomes)
    assert population["population"].iloc[0] == pytest.approx(table["population"].iloc[0])
    assert any("Held fixed at their base value" in c.value for c in at.caption)


def test_strategies_view_without_the_optimal_policy_and_with_a_reference():
    at = AppTest.from_file(APP, default_timeout=300).run()
    at.switch_page("views/strategies.py").run()
    assert not at.exception, at.exception
    at.checkbox(key="strategies_include_optimal").uncheck().run()
    at.selectbox(key="strategies_reference").set_value("never treat").run()
    assert not at.exception, at.exception
    shown = at.dataframe[0].value
    assert not shown["strategy"].str.startswith("optimal policy").any()
    assert "icer_vs_reference" in shown.columns
    switches = next(d.value for d in at.dataframe if "before" in d.value.columns)
    assert len(switches) > 0
