"""The app in Streamlit's AppTest: every view runs, shows the caution and the library's figures.

Edits are simulated the way Streamlit's frontend sends them (a data editor's state dict,
set before ``run()``). Expected figures are recomputed here through caredecide itself
(load -> compile -> solve -> evaluate), so the app must show exactly what the library says.
"""

from __future__ import annotations

import re
from pathlib import Path

import pandas as pd
import pytest
from streamlit.dataframe_util import convert_arrow_bytes_to_pandas_df
from streamlit.testing.v1 import AppTest

from caredecide.cautions import CAUTION_SHORT
from caredecide.compile import compile_model
from caredecide.evaluate import evaluate_policy
from caredecide.modelfile import loads_model
from caredecide.objective import Objective
from caredecide.solvers import solve
from synthetic_cohort import MODELS_DIR, demo_model_path
from tests.ui.conftest import APP
from ui import drafts, working_model
from ui.templates import TEMPLATES

# Every page listed in ui/app.py (views added later are covered too).
VIEWS = tuple(re.findall(r'st\.Page\(\s*"(views/\w+\.py)"', Path(APP).read_text("utf-8")))


def _library(text: str, kind: str, wtp: float, base_dir: str, **solve_options):
    model = loads_model(text, file="t.toml", base_dir=base_dir)
    compiled = compile_model(model)
    objective = Objective(kind, wtp)
    result = solve(compiled, objective, **solve_options)
    outcome = evaluate_policy(compiled, result.policy, objective)
    return result, outcome.totals(), outcome


def _demo_dir() -> str:
    return str(demo_model_path().parent)


def _edit(at: AppTest, table: str, edited_rows: dict) -> AppTest:
    key = f"table_{table}_{at.session_state[working_model.REVISION_KEY]}"
    at.session_state[key] = {"edited_rows": edited_rows, "added_rows": [], "deleted_rows": []}
    return at.run()


def _chart_data(at: AppTest, index: int) -> pd.DataFrame:
    proto = at.get("vega_lite_chart")[index].proto
    return convert_arrow_bytes_to_pandas_df(proto.datasets[0].data.data)


def test_the_views_are_found():
    assert {"views/model.py", "views/policy.py", "views/convergence.py"} <= set(VIEWS)


@pytest.mark.parametrize("view", VIEWS)
def test_every_view_runs_and_shows_the_caution(app, view):
    app.switch_page(view).run()
    assert not app.exception, app.exception
    assert any(CAUTION_SHORT in w.value for w in app.warning)


def test_policy_view_shows_the_library_totals_and_policy(app):
    app.switch_page("views/policy.py").run()
    text = demo_model_path().read_text(encoding="utf-8")
    result, totals, outcome = _library(text, "net_benefit", 30000.0, _demo_dir())
    shown = [m.value for m in app.metric]
    assert shown == [
        f"{totals['life_years']:,.4f}",
        f"{totals['qalys']:,.4f}",
        f"{totals['costs']:,.2f}",
        f"{totals['net_monetary_benefit']:,.2f}",
    ]
    assert any(m.value == result.structure().text for m in app.markdown)
    heat_map = _chart_data(app, 0)
    expected = result.to_frame()
    expected = expected[expected["state"].isin(heat_map["state"].unique())]
    labels = {a.id: a.label for a in loads_model(text, file="t", base_dir=_demo_dir()).actions}
    assert list(heat_map["action"]) == [labels[a] for a in expected["action"]]
    # Text labels (not colour alone): the action id where a run of equal choices starts.
    runs = expected["action"] != expected.groupby("state")["action"].shift()
    assert list(heat_map["label"]) == list(expected["action"].where(runs, ""))
    assert set(heat_map["state"]) == {"stage_1", "stage_2", "stage_3"}  # decision states only
    # Value chart: the library's values "from this age on", alive states only.
    n_cycles = result.policy.shape[1]
    values = result.to_frame().assign(value=result.value_at_cycle_start()[0, :n_cycles].ravel())
    values = values[values["state"] != "dead"]
    assert _chart_data(app, 2)["value"].tolist() == values["value"].tolist()
    # Cohort trace: the library's trace under the optimal policy.
    shown_trace = _chart_data(app, 3)
    assert shown_trace["proportion"].tolist() == outcome.trace_frame()["proportion"].tolist()
    # The closest choices: the library's ten smallest gaps, both actions named by label.
    closest = next(d.value for d in app.dataframe if "next_best_action" in d.value.columns)
    gaps = expected.nsmallest(10, "action_gap")
    assert closest["action_gap"].tolist() == gaps["action_gap"].tolist()
    assert closest["next_best_action"].tolist() == [labels[a] for a in gaps["next_best_action"]]
    assert closest["action"].tolist() == [labels[a] for a in gaps["action"]]


def test_wtp_control_changes_the_result_to_the_library_value(app):
    app.switch_page("views/policy.py").run()
    app.number_input(key="policy_wtp").set_value(5000.0).run()
    assert not app.exception
    text = demo_model_path().read_text(encoding="utf-8")
    _, totals, _ = _library(text, "net_benefit", 5000.0, _demo_dir())
    assert app.metric[3].value == f"{totals['net_monetary_benefit']:,.2f}"
    assert app.metric[3].label == "Net monetary benefit at 5,000"


def test_a_table_edit_changes_the_working_model_and_the_result(app):
    before = app.session_state[working_model.TEXT_KEY]
    _edit(app, "parameters", {})  # no-op edit state: nothing changes
    assert app.session_state[working_model.TEXT_KEY] == before
    names = list(loads_model(before, file="t", base_dir=_demo_dir()).parameters)
    row = names.index("c_drug_year")
    _edit(app, "parameters", {row: {"value": 5000.0}})
    assert not app.exception, app.exception
    after = app.session_state[working_model.TEXT_KEY]
    edited = loads_model(after, file="t", base_dir=_demo_dir())
    assert edited.parameters["c_drug_year"].value == 5000.0
    assert after.startswith("# SYNTHETIC DEMO MODEL")  # the header marking survives
    app.switch_page("views/policy.py").run()
    _, totals, _ = _library(after, "net_benefit", 30000.0, _demo_dir())
    _, totals_before, _ = _library(before, "net_benefit", 30000.0, _demo_dir())
    assert totals["costs"] != totals_before["costs"]
    assert app.metric[2].value == f"{totals['costs']:,.2f}"


def test_an_invalid_edit_shows_its_error_beside_the_table_and_is_kept(app, private_app_state):
    _edit(app, "transitions.treat", {0: {"stage_2_tx": "1.5"}})  # row 0 = from stage_1
    assert not app.exception, app.exception
    text = app.session_state[working_model.TEXT_KEY]
    assert "stage_2_tx = 1.5" in text  # kept in the working model...
    source = app.session_state[working_model.SOURCE_KEY]
    assert drafts.load_draft(source).text == text  # ...and autosaved
    errors = [e.value for e in app.error]
    assert any(
        "transitions.treat.stage_1.stage_2_tx" in e
        and "[0, 1]" in e
        and "row stage_1, column stage_2_tx" in e
        for e in errors
    )
    # The summary names the tab to open (the user may be on another one).
    assert any("in the tab(s): Transitions (" in e for e in errors), errors
    # The other views refuse to solve and point back to the model view.
    app.switch_page("views/policy.py").run()
    assert not app.exception
    assert any("fix them in the Model view" in e.value for e in app.error)


def test_the_autosaved_draft_is_restored_in_a_fresh_session(app):
    _edit(app, "settings", {0: {"willingness_to_pay": 45000.0}})
    edited = app.session_state[working_model.TEXT_KEY]
    assert "willingness_to_pay = 45000.0" in edited
    fresh = AppTest.from_file(APP, default_timeout=120).run()
    assert not fresh.exception
    assert fresh.session_state[working_model.TEXT_KEY] == edited
    assert any("Restored your autosaved draft" in i.value for i in fresh.info)
    # Discarding the draft reopens the file as saved.
    fresh.button(key="discard_draft_button").click().run()
    assert fresh.session_state[working_model.TEXT_KEY] == demo_model_path().read_text(
        encoding="utf-8"
    )
    assert drafts.load_draft(fresh.session_state[working_model.SOURCE_KEY]) is None


def test_text_typed_into_a_number_cell_is_kept_and_shown_with_its_error(app):
    # Formerly the number cell dropped the text: the file got "nan" and the grid "None".
    before = app.session_state[working_model.TEXT_KEY]
    _edit(app, "parameters", {0: {"value": "0.3x"}})
    assert not app.exception, app.exception
    assert app.session_state[working_model.TEXT_KEY] == before  # nothing written
    assert "nan" not in app.session_state[working_model.TEXT_KEY]
    errors = [e.value for e in app.error]
    assert any("'0.3x' is not a number" in e and ".value" in e for e in errors), errors
    key = f"table_parameters_{app.session_state[working_model.REVISION_KEY]}"
    assert app.session_state[key]["edited_rows"] == {0: {"value": "0.3x"}}  # still shown


def test_the_draft_notice_shows_the_latest_save_time(app):
    import json

    _edit(app, "settings", {0: {"willingness_to_pay": 45000.0}})
    source = app.session_state[working_model.SOURCE_KEY]
    meta = drafts.load_draft(source).path.with_suffix(".json")
    record = json.loads(meta.read_text(encoding="utf-8"))
    meta.write_text(json.dumps({**record, "saved_at": "2020-01-01T00:00:00+00:00"}))
    fresh = AppTest.from_file(APP, default_timeout=120).run()
    assert any("2020-01-01T00:00:00+00:00" in i.value for i in fresh.info)
    _edit(fresh, "settings", {0: {"willingness_to_pay": 46000.0}})
    latest = drafts.load_draft(source).saved_at
    notices = [i.value for i in fresh.info if "draft" in i.value]
    assert notices and all("2020-01-01" not in n for n in notices)  # formerly kept
    assert any(latest in n for n in notices)


def test_broken_model_text_is_kept_and_its_syntax_error_shown_with_the_line(app):
    key = f"model_text_{app.session_state[working_model.REVISION_KEY]}"
    broken = app.session_state[working_model.TEXT_KEY].replace("[settings]", "[settings", 1)
    app.text_area(key=key).set_value(broken).run()
    assert not app.exception, app.exception
    assert app.session_state[working_model.TEXT_KEY] == broken
    assert any("TOML syntax error" in e.value and "line" in e.value for e in app.error)
    # The pointer names the tab where it can be fixed, and only that tab shows it: no
    # circle between the table tabs and the Model file tab (issue 14).
    assert any("in the tab(s): Model file (1)" in e.value for e in app.error)
    syntax_errors = [e for e in app.error if "TOML syntax error" in e.value]
    assert len(syntax_errors) == 1


def test_starting_from_a_template_opens_it(app):
    app.selectbox(key="open_template_choice").set_value("infinite-horizon")
    app.button(key="open_template_button").click().run()
    assert not app.exception
    assert app.session_state[working_model.SOURCE_KEY] == "template:infinite-horizon"
    assert app.session_state[working_model.TEXT_KEY] == TEMPLATES["infinite-horizon"]
    assert any("is valid" in s.value for s in app.success)


def test_convergence_view_on_a_finite_model_uses_backward_induction(app):
    app.switch_page("views/convergence.py").run()
    assert not app.exception
    result, _, _ = _library(
        demo_model_path().read_text(encoding="utf-8"),
        "net_benefit",
        30000.0,
        _demo_dir(),
        record_history=True,
    )
    assert app.metric[0].value == str(result.iterations)
    assert any("backward induction" in m.value for m in app.markdown)


def test_policy_view_on_an_infinite_horizon_model(app):
    app.selectbox(key="open_template_choice").set_value("infinite-horizon")
    app.button(key="open_template_button").click().run()
    app.switch_page("views/policy.py").run()
    assert not app.exception, app.exception
    _, totals, _ = _library(TEMPLATES["infinite-horizon"], "qalys", 0.0, ".")
    assert set(_chart_data(app, 0)["age"]) == {"any age"}
    assert app.metric[1].value == f"{totals['qalys']:,.4f}"
    assert [n.label for n in app.number_input] == [
        "Call a choice close when the action gap is below (QALYs)"
    ]  # no willingness-to-pay control for the QALY objective


def test_switching_the_objective_to_qalys_shows_the_library_result(app):
    app.switch_page("views/policy.py").run()
    app.selectbox(key="policy_objective").set_value("qalys").run()
    assert not app.exception, app.exception
    text = demo_model_path().read_text(encoding="utf-8")
    result, totals, _ = _library(text, "qalys", 30000.0, _demo_dir())
    assert app.metric[1].value == f"{totals['qalys']:,.4f}"
    heat_map = _chart_data(app, 0)
    labels = {a.id: a.label for a in loads_model(text, file="t", base_dir=_demo_dir()).actions}
    expected = result.to_frame()
    expected = expected[expected["state"].isin(["stage_1", "stage_2", "stage_3"])]
    assert list(heat_map["action"]) == [labels[a] for a in expected["action"]]


def test_adding_a_state_row_keeps_it_and_reports_what_it_lacks(app):
    key = f"table_states_{app.session_state[working_model.REVISION_KEY]}"
    app.session_state[key] = {
        "edited_rows": {},
        "added_rows": [{"id": "stage_4"}],
        "deleted_rows": [],
    }
    app.run()
    assert not app.exception, app.exception
    model = loads_model(
        app.session_state[working_model.TEXT_KEY], file="t", base_dir=_demo_dir(), validate=False
    )
    added = model.state("stage_4")
    assert (added.alive, added.absorbing, added.cost) == (True, False, 0.0)


def test_deleting_a_parameter_row_reports_the_expressions_that_use_it(app):
    text = app.session_state[working_model.TEXT_KEY]
    names = list(loads_model(text, file="t", base_dir=_demo_dir()).parameters)
    key = f"table_parameters_{app.session_state[working_model.REVISION_KEY]}"
    app.session_state[key] = {
        "edited_rows": {},
        "added_rows": [],
        "deleted_rows": [names.index("c_drug_year")],
    }
    app.run()
    assert not app.exception, app.exception
    assert "c_drug_year" not in app.session_state[working_model.TEXT_KEY].split("[parameters", 1)[1]
    assert any("c_drug_year" in e.value for e in app.error)  # states still refer to it


@pytest.mark.parametrize("bundled", sorted(p.name for p in MODELS_DIR.glob("*.toml")))
def test_every_bundled_model_opens_and_solves_in_the_views(app, bundled):
    app.selectbox(key="open_bundled_choice").set_value(bundled)
    app.button(key="open_bundled_button").click().run()
    assert not app.exception, app.exception
    assert app.session_state[working_model.SOURCE_KEY] == str((MODELS_DIR / bundled).resolve())
    assert any("is valid" in s.value for s in app.success), [e.value for e in app.error]
    for view in ("views/policy.py", "views/convergence.py"):
        app.switch_page(view).run()
        assert not app.exception, (view, app.exception)
        assert not app.error, (view, [e.value for e in app.error])


def test_a_draft_of_another_model_is_offered_and_opens_in_a_fresh_session(app):
    app.selectbox(key="open_template_choice").set_value("treat-or-wait")
    app.button(key="open_template_button").click().run()
    _edit(app, "settings", {0: {"willingness_to_pay": 12345.0}})
    edited = app.session_state[working_model.TEXT_KEY]
    assert "willingness_to_pay = 12345.0" in edited

    fresh = AppTest.from_file(APP, default_timeout=120).run()  # opens the demo model...
    assert not fresh.exception, fresh.exception
    demo = demo_model_path().read_text(encoding="utf-8")
    assert fresh.session_state[working_model.TEXT_KEY] == demo  # ...untouched by the other draft
    assert not any("Restored your autosaved draft" in i.value for i in fresh.info)
    offered = fresh.selectbox(key="open_draft_choice")
    saved_at = drafts.load_draft("template:treat-or-wait").saved_at
    assert offered.options == [f"treat-or-wait (template) ({saved_at})"]
    fresh.button(key="open_draft_button").click().run()
    assert not fresh.exception, fresh.exception
    assert fresh.session_state[working_model.SOURCE_KEY] == "template:treat-or-wait"
    assert fresh.session_state[working_model.TEXT_KEY] == edited


@pytest.mark.parametrize("view", VIEWS)
def test_every_view_shows_the_model_warnings(view, tmp_path, monkeypatch):
    # A QALY weight of 75 per year is a slip (full health is 1; common practice): every
    # view says so, not only the model check.
    import tomli_w

    from tests.conftest import small_model_dict

    data = small_model_dict()
    data["states"][0]["qaly_weight"] = 75.0
    path = tmp_path / "slip.toml"
    path.write_text(tomli_w.dumps(data), encoding="utf-8")
    monkeypatch.setenv("CAREDECIDE_MODEL", str(path))
    at = AppTest.from_file(APP, default_timeout=120)
    at.run()
    at.switch_page(view).run()
    assert not at.exception, at.exception
    shown = " ".join(w.value for w in at.warning)
    assert "QALY weight 75 is above 1" in shown
    assert "states.well.qaly_weight" in shown


def test_infinite_horizon_policy_view_has_no_age_axis_and_no_zero_cost_figures(
    tmp_path, monkeypatch
):
    # Common practice: a stationary model has no age; a model without costs shows none.
    import tomli_w

    from caredecide import charts
    from caredecide.analysis import analyse_base_case
    from caredecide.modelfile import load_model
    from tests.conftest import small_model_dict

    data = small_model_dict()
    data["settings"].pop("horizon_cycles")
    data["settings"]["horizon"] = "infinite"
    data["settings"]["objective"] = "qalys"
    data["settings"]["discount_outcomes"] = 0.03
    for state in data["states"]:
        state["cost"] = 0.0
    for action in data["actions"]:
        for key in ("oneoff_cost", "cost_per_cycle"):
            action.pop(key, None)
    data["parameters"].pop("c_drug", None)
    path = tmp_path / "stationary.toml"
    path.write_text(tomli_w.dumps(data), encoding="utf-8")
    monkeypatch.setenv("CAREDECIDE_MODEL", str(path))
    at = AppTest.from_file(APP, default_timeout=120)
    at.run()
    at.switch_page("views/policy.py").run()
    assert not at.exception, at.exception
    metrics = {m.label: m.value for m in at.metric}
    costs = next(k for k in metrics if k.startswith("Costs"))
    assert metrics[costs] == "none in this model"
    assert metrics["Net monetary benefit"] == "not used (QALYs only, no costs)"
    # The trace is drawn over cycles and cut where the cohort has left the live states.
    result = analyse_base_case(load_model(path))
    trace = result.trace_frame()
    shown = charts.trace_until_absorbed(trace, ["well", "sick"])
    alive = shown[shown["state"] != "dead"].groupby("cycle")["proportion"].sum()
    assert alive.iloc[:-1].min() >= 1e-3  # nothing cut while 0.1% or more is alive
    assert alive.iloc[-1] < 1e-3 or shown["cycle"].max() == trace["cycle"].max()
    caption = next(c.value for c in at.caption if "no age axis" in c.value)
    assert f"(cycle {int(shown['cycle'].max())})" in caption
    spec = charts.make_trace_chart(shown, time="cycle").to_dict()
    assert spec["encoding"]["x"]["field"] == "cycle"
