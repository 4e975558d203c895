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


def test_the_diagram_groups_copies_by_the_attribute_chosen(app):
    app.selectbox(key="open_bundled_choice").set_value("demo_years_since_progression.toml")
    app.button(key="open_bundled_button").click().run()
    assert not app.exception, app.exception
    assert 'cluster_progressed"' in app.get("graphviz_chart")[0].proto.spec
    app.radio(key="diagram_group_by").set_value("drug").run()
    assert not app.exception, app.exception
    spec = app.get("graphviz_chart")[0].proto.spec
    assert 'cluster_drug: on_drug"' in spec and 'cluster_drug: off_drug"' in spec
