"""The model editor draws the state-transition diagram of the working model (AppTest)."""

from __future__ import annotations


def test_the_model_editor_draws_the_diagram_and_names_the_cell_of_a_move(app):
    # The model view (default page) with the demo model: Transitions tab, bubble diagram.
    assert not app.exception, app.exception
    assert len(app.get("graphviz_chart")) == 1
    app.selectbox(key="diagram_action").set_value("wait").run()
    app.selectbox(key="diagram_edge").set_value("stage_1 -> stage_2").run()
    assert not app.exception, app.exception
    assert any("transitions.wait.stage_1.stage_2" in m.value for m in app.markdown)
    assert any("per_cycle(p_progress_1, 1)" in c.value for c in app.code)
