"""The Sensitivity view in Streamlit's AppTest: runs on the synthetic demo, shows the
caution, and its tables equal what caredecide.sensitivity computes."""

from __future__ import annotations

import pytest
from streamlit.testing.v1 import AppTest

from caredecide.cautions import CAUTION_SHORT
from caredecide.modelfile import load_model
from caredecide.sensitivity import decision_tornado, one_way, parameter_thresholds
from caredecide.sensitivity.context import threshold_context
from synthetic_cohort import demo_model_path
from tests.ui.conftest import APP, private_app_state  # noqa: F401  (autouse fixture)

# Tables in page order: decision tornado, one-way, switches, thresholds in context, ...
ORDER = (
    "sensitivity_decision_table",
    "sensitivity_oneway_table",
    "sensitivity_switches",
    "sensitivity_thresholds",
)


def _frame(at: AppTest, key: str):
    return at.dataframe[ORDER.index(key)].value


def test_sensitivity_view_shows_the_library_results():
    at = AppTest.from_file(APP, default_timeout=300)
    at.run()
    at.switch_page("views/sensitivity.py").run()
    assert not at.exception, at.exception
    assert any(CAUTION_SHORT in w.value for w in at.warning)
    model = load_model(demo_model_path())
    expected = one_way(model).table
    shown = _frame(at, "sensitivity_oneway_table")
    assert list(shown["parameter"]) == list(expected["parameter"])
    assert shown["swing"].to_numpy() == pytest.approx(expected["swing"].to_numpy(), rel=1e-12)
    raw = parameter_thresholds(model, grid=11)
    expected_thresholds = threshold_context(model, raw)
    thresholds = _frame(at, "sensitivity_thresholds")
    assert len(thresholds) == len(expected_thresholds)
    assert thresholds["probability_beyond"].to_numpy() == pytest.approx(
        expected_thresholds["probability_beyond"].to_numpy(), nan_ok=True
    )
    decision = _frame(at, "sensitivity_decision_table")
    expected_decision = decision_tornado(model, grid=11, thresholds=raw).table
    assert list(decision["parameter"]) == list(expected_decision["parameter"])
    assert decision["loss_at_bounds"].to_numpy() == pytest.approx(
        expected_decision["loss_at_bounds"].to_numpy(), rel=1e-12
    )
    # choosing a subset reruns the analysis on it
    at.multiselect(key="sensitivity_parameters").set_value(["hr_treatment"]).run()
    assert not at.exception, at.exception
    assert list(_frame(at, "sensitivity_oneway_table")["parameter"]) == ["hr_treatment"]
