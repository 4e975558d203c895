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
