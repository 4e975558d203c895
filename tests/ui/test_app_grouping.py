"""The policy view adds up the states generated from attributes and tunnels (AppTest)."""

from __future__ import annotations

import pandas as pd
from streamlit.dataframe_util import convert_arrow_bytes_to_pandas_df
from streamlit.testing.v1 import AppTest

from caredecide.compile import compile_model
from caredecide.evaluate import evaluate_policy
from caredecide.grouping import grouped_trace
from caredecide.modelfile import loads_model
from caredecide.objective import Objective
from caredecide.solvers import solve
from tests.test_expand import _tunnel_model
from tests.ui.conftest import APP

TEXT = _tunnel_model(start="sick__untreated", enter="0.5", die="0.1")


def _trace_chart(at: AppTest) -> pd.DataFrame:
    for chart in at.get("vega_lite_chart"):
        data = convert_arrow_bytes_to_pandas_df(chart.proto.datasets[0].data.data)
        if "proportion" in data.columns:
            return data
    raise AssertionError("no cohort trace chart on the page")


def test_policy_view_shows_the_trace_by_attribute(tmp_path, monkeypatch):
    path = tmp_path / "tunnel.toml"
    path.write_text(TEXT, encoding="utf-8")
    monkeypatch.setenv("CAREDECIDE_MODEL", str(path))
    at = AppTest.from_file(APP, default_timeout=120)
    at.run()
    at.switch_page("views/policy.py").run()
    assert not at.exception, at.exception
    assert len(set(_trace_chart(at)["state"])) == 5  # every generated state by itself
    at.selectbox(key="policy_trace_grouping").set_value("on_treatment").run()
    assert not at.exception, at.exception
    shown = _trace_chart(at)
    model = loads_model(TEXT)
    compiled = compile_model(model)
    objective = Objective("net_benefit", 20000.0)
    outcome = evaluate_policy(compiled, solve(compiled, objective).policy, objective)
    expected = grouped_trace(outcome.trace[0], outcome.ages, compiled, "on_treatment")
    assert set(shown["state"]) == {"untreated", "treated", "(no on_treatment)"}
    for value, label in (("treated", "treated"), ("", "(no on_treatment)")):
        assert (
            shown[shown["state"] == label]["proportion"].tolist()
            == expected[expected["on_treatment"] == value]["proportion"].tolist()
        )


def test_the_states_table_keeps_attributes_and_tunnels():
    from ui.tables import model_to_tables, model_with_table

    model = loads_model(TEXT)
    states = model_to_tables(model)["states"]
    assert states["attributes"].tolist() == ["on_treatment", ""]
    assert states["tunnels"].tolist() == ["years_on_drug", ""]
    assert model_with_table(model, "states", states) == model
