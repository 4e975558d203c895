"""The convergence view in AppTest: the figures on the page are the library's, and the
textbook figures are on the page too."""

from __future__ import annotations

import pytest
from streamlit.testing.v1 import AppTest

from caredecide.analysis import analyse_convergence, analyse_method_race
from caredecide.modelfile import loads_model
from synthetic_cohort import MODELS_DIR, demo_model_path
from ui import working_model
from ui.templates import TEMPLATES


def _metrics(at: AppTest) -> dict[str, str]:
    return {m.label: m.value for m in at.metric}


def _open_view(app: AppTest, source: str = "working") -> AppTest:
    app.switch_page("views/convergence.py").run()
    assert not app.exception, app.exception
    app.radio(key="convergence_source").set_value(source).run()
    assert not app.exception, app.exception
    return app


def test_value_iteration_on_the_two_state_example_shows_162_sweeps(app):
    # Puterman 1994, Markov Decision Processes, section 6.3: value iteration on the
    # two-state example of section 3.1 from v0 = 0 with eps = 0.01 and gamma = 0.95
    # stops after 162 iterations (from memory).
    _open_view(app, "textbook")
    app.radio(key="convergence_method").set_value("value_iteration").run()
    app.number_input(key="convergence_gamma_textbook").set_value(0.95).run()
    app.number_input(key="convergence_epsilon_textbook").set_value(0.01).run()
    assert not app.exception, app.exception
    shown = _metrics(app)
    assert shown["Sweeps"] == "162"
    assert analyse_convergence(None, "value_iteration", epsilon=0.01, gamma=0.95).sweeps == 162
    # eps (1 - gamma) / (2 gamma) = 0.01 * 0.05 / 1.9 (Puterman 1994, section 6.3).
    assert shown["Stopping bound ε(1−γ)/2γ"] == f"{0.01 * 0.05 / 1.9:.4g}"
    assert shown["ε"] == "0.01"
    assert shown["γ per cycle"] == "0.9500"


def test_stepping_shows_the_action_values_and_the_changed_cell(app):
    # Hand-derived from the rewards and moves of Puterman 1994, section 3.1 (v0 = 0):
    # sweep 1: Q(s1, a11) = 5, Q(s1, a12) = 10 -> a12, gap 5;
    # sweep 2: Q(a11) = 5 + 0.95 (0.5 * 10 + 0.5 * -1) = 9.275, Q(a12) = 10 + 0.95 * -1
    # = 9.05 -> a11, gap 0.225: the choice in s1 changes at sweep 2.
    _open_view(app, "textbook")
    app.radio(key="convergence_method").set_value("value_iteration").run()
    app.slider(key="convergence_sweep").set_value(1).run()
    shown = _metrics(app)
    assert shown["Cells changed at this sweep"] == "— (first sweep)"
    assert shown["Action gap"] == "5"
    q = app.dataframe[1].value
    assert q["value"].tolist() == pytest.approx([5.0, 10.0])
    assert q["chosen"].tolist() == ["", "◀ chosen"]

    app.button(key="convergence_forward").click().run()
    assert app.session_state["convergence_sweep"] == 2
    shown = _metrics(app)
    assert shown["Cells changed at this sweep"] == "1"
    assert shown["Action gap"] == f"{0.225:.4g}"
    q = app.dataframe[1].value
    assert q["value"].tolist() == pytest.approx([9.275, 9.05])
    assert q["chosen"].tolist() == ["◀ chosen", ""]
    choices = app.dataframe[0].value
    assert choices["changed at this sweep"].tolist() == ["changed"]

    app.button(key="convergence_back").click().run()
    app.button(key="convergence_back").click().run()  # stays at sweep 1
    assert app.session_state["convergence_sweep"] == 1


def test_the_three_methods_side_by_side_reach_the_same_policy(app):
    _open_view(app, "textbook")
    race = app.dataframe[2].value
    library = analyse_method_race(None, epsilon=0.01, gamma=0.95).to_frame()
    assert race["sweeps"].tolist() == library["sweeps"].tolist()
    # Policy iteration: a12 first (greedy on the rewards), then a11, then no change
    # (hand-derived from section 3.1 at gamma = 0.95: v(s1) = -8.571 under a11 > -9 under a12).
    assert race["sweeps"].tolist()[:2] == [162, 2]
    assert any("same policy" in s.value for s in app.success)


@pytest.mark.parametrize("method", ["policy_iteration", "modified_policy_iteration"])
def test_policy_iteration_shows_no_stopping_bound_where_none_is_used(app, method):
    _open_view(app, "teaching")
    app.radio(key="convergence_method").set_value(method).run()
    assert not app.exception, app.exception
    model = loads_model(
        (MODELS_DIR / "teaching_stationary.toml").read_text(encoding="utf-8"),
        file="teaching_stationary.toml",
        base_dir=str(MODELS_DIR),
    )
    trace = analyse_convergence(model, method, epsilon=0.01)
    shown = _metrics(app)
    assert shown["Sweeps"] == str(trace.sweeps)
    if method == "policy_iteration":
        assert "Stopping bound ε(1−γ)/2γ" not in shown and "ε" not in shown
    else:
        assert shown["Stopping bound ε(1−γ)/2γ"] == f"{trace.bound:.4g}"


def test_changing_gamma_moves_the_sweep_count_and_leaves_the_model_alone(app):
    _open_view(app, "teaching")
    app.radio(key="convergence_method").set_value("value_iteration").run()
    before = int(_metrics(app)["Sweeps"])
    text = app.session_state[working_model.TEXT_KEY]
    app.number_input(key="convergence_gamma_teaching").set_value(0.9).run()
    assert not app.exception, app.exception
    after = int(_metrics(app)["Sweeps"])
    model = loads_model(
        (MODELS_DIR / "teaching_stationary.toml").read_text(encoding="utf-8"),
        file="teaching_stationary.toml",
        base_dir=str(MODELS_DIR),
    )
    assert after == analyse_convergence(model, "value_iteration", gamma=0.9).sweeps
    assert after < before  # a smaller gamma contracts faster (common practice)
    assert app.session_state[working_model.TEXT_KEY] == text


def test_the_teacher_can_write_the_rate_into_the_working_model(app):
    app.selectbox(key="open_template_choice").set_value("infinite-horizon")
    app.button(key="open_template_button").click().run()
    _open_view(app, "working")
    assert "discount_outcomes = 0.05" in app.session_state[working_model.TEXT_KEY]
    app.number_input(key="convergence_gamma_working").set_value(1 / 1.04).run()
    app.button(key="convergence_keep_gamma").click().run()
    assert not app.exception, app.exception
    model = loads_model(app.session_state[working_model.TEXT_KEY], file="t.toml", base_dir=".")
    assert model.settings.discount_outcomes == pytest.approx(0.04, abs=1e-6)
    assert model.settings.discount_costs == pytest.approx(0.04, abs=1e-6)
    assert TEMPLATES["infinite-horizon"] != app.session_state[working_model.TEXT_KEY]


def test_backward_induction_shows_no_residual_and_no_bound(app):
    _open_view(app, "working")
    model = loads_model(
        demo_model_path().read_text(encoding="utf-8"),
        file="d.toml",
        base_dir=str(demo_model_path().parent),
    )
    trace = analyse_convergence(model, "backward_induction")
    shown = _metrics(app)
    assert shown["Sweeps"] == str(trace.sweeps) == str(model.n_cycles())
    assert not any("esidual" in label or "bound" in label for label in shown), shown
    assert not any(" 0" == value or value == "0" for value in shown.values()), shown
    assert any("backward induction" in m.value for m in app.markdown)
    assert not any(r.label == "Method" for r in app.radio)


def test_the_residual_chart_and_the_chosen_sweep_hold_the_library_figures(app):
    from streamlit.dataframe_util import convert_arrow_bytes_to_pandas_df

    app.selectbox(key="open_template_choice").set_value("infinite-horizon")
    app.button(key="open_template_button").click().run()
    _open_view(app, "working")
    app.radio(key="convergence_method").set_value("value_iteration").run()
    app.slider(key="convergence_sweep").set_value(3).run()
    assert not app.exception, app.exception
    model = loads_model(TEMPLATES["infinite-horizon"], file="t.toml", base_dir=".")
    trace = analyse_convergence(model, "value_iteration", epsilon=0.01)
    shown = _metrics(app)
    assert shown["Sweeps"] == str(trace.sweeps)
    assert shown["Residual ‖vₙ − vₙ₋₁‖"] == f"{trace.residual[2]:.4g}"
    chart = app.get("vega_lite_chart")[0].proto
    data = [convert_arrow_bytes_to_pandas_df(d.data.data) for d in chart.datasets]
    lines = next(d for d in data if "series" in d.columns and len(d) > 1)
    assert lines["amount"].tolist() == [r for r in trace.residual if r > 0]
    cursor = next(d for d in data if "note" in d.columns and "sweep" in d.columns)
    assert cursor["sweep"].tolist() == [3]
