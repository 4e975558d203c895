"""The model editor draws the state-transition diagram of the working model (AppTest).

A click on a move's dot is simulated by sending the chart's selection state, as the
browser does (``st.altair_chart(..., on_select=...)`` reports ``{"selection":
{"edge_pick": [{"edge": n}]}}``); tests/browser/test_diagram_browser.py clicks for real.
"""

from __future__ import annotations

import json

import pytest

from caredecide.diagram_charts import EDGE_SELECTION
from ui.diagram_panel import chosen_edge, with_cell
from ui.working_model import TEXT_KEY


def _chart(app):
    charts = [n for n in app._tree if getattr(n, "type", None) == "vega_lite_chart"]
    (chart,) = [c for c in charts if c.proto.id.endswith("diagram_pick")]
    return chart


def _frames(app) -> list:
    """The data sets of the diagram chart (Streamlit sends them as Arrow tables)."""
    from streamlit.dataframe_util import convert_arrow_bytes_to_pandas_df

    return [convert_arrow_bytes_to_pandas_df(d.data.data) for d in _chart(app).proto.datasets]


def _click(app, edge: int):
    """Run the app as after a click on the dot of move ``edge``."""
    states = app._tree.get_widget_states()
    state = states.widgets.add()
    state.id = _chart(app).proto.id
    state.string_value = json.dumps({"selection": {EDGE_SELECTION: [{"edge": edge}]}})
    app._run(states)
    assert not app.exception, app.exception
    return app


def test_a_click_on_a_move_opens_its_cell(app):
    assert not app.exception, app.exception
    assert not app.get("graphviz_chart")  # drawn by our own layout now
    spec = json.loads(_chart(app).proto.spec)
    assert any(p["name"] == EDGE_SELECTION for p in spec["params"])
    app.selectbox(key="diagram_action").set_value("wait").run()
    names = app.selectbox(key="diagram_edge").options
    edge = names.index("stage_2 -> stage_3")
    _click(app, edge)
    # The chooser follows the click; the cell, its full expression and value are shown.
    assert app.selectbox(key="diagram_edge").value == "stage_2 -> stage_3"
    shown = " ".join(m.value for m in app.markdown)
    assert "`rates.wait.stage_2.stage_3`" in shown
    assert "row `stage_2`, column `stage_3`" in shown
    assert any("rate_behind" in c.value or "p_progress_2" in c.value for c in app.code)
    # The chosen move is drawn highlighted.
    marks = next(f for f in _frames(app) if "cell" in f.columns)
    assert marks.loc[marks["chosen"], "edge"].tolist() == [edge]


def test_the_chooser_still_names_the_cell_of_a_move(app):
    app.selectbox(key="diagram_action").set_value("wait").run()
    app.selectbox(key="diagram_edge").set_value("stage_1 -> stage_2").run()
    assert not app.exception, app.exception
    assert any("transitions.wait.stage_1.stage_2" in m.value for m in app.markdown)
    assert any("per_cycle(p_progress_1, 1)" in c.value for c in app.code)


def test_the_one_cell_editor_writes_to_the_working_model(app):
    app.selectbox(key="diagram_action").set_value("wait").run()
    names = app.selectbox(key="diagram_edge").options
    _click(app, names.index("stage_1 -> stage_2"))
    (box,) = [t for t in app.text_input if t.label.startswith("Edit the cell")]
    assert box.value == "per_cycle(p_progress_1, 1)"
    box.set_value("per_cycle(p_progress_1, 2)").run()
    (button,) = [b for b in app.button if b.label == "Write to the model"]
    button.click().run()
    assert not app.exception, app.exception
    text = app.session_state[TEXT_KEY]
    assert 'stage_2 = "per_cycle(p_progress_1, 2)"' in text
    assert "per_cycle(p_progress_1, 1)" not in text.split("[transitions.wait.stage_1]")[1][:200]
    # The new expression is what the diagram now shows for that move.
    app.selectbox(key="diagram_edge").set_value("stage_1 -> stage_2").run()
    assert any("per_cycle(p_progress_1, 2)" in c.value for c in app.code)


def test_the_diagram_colours_copies_by_the_attribute_chosen(app):
    app.selectbox(key="open_bundled_choice").set_value("demo_years_since_progression.toml")
    app.button(key="open_bundled_button").click().run()
    assert not app.exception, app.exception
    app.radio(key="diagram_group_by").set_value("drug").run()
    assert not app.exception, app.exception
    nodes = max((f for f in _frames(app) if "group" in f.columns), key=len)  # not the rings
    assert set(nodes["group"]) >= {"drug: on_drug", "drug: off_drug"}


def test_selection_state_and_cell_edits_are_read_strictly():
    assert chosen_edge({"selection": {EDGE_SELECTION: [{"edge": 4}]}}) == 4
    assert chosen_edge({"selection": {EDGE_SELECTION: []}}) is None
    assert chosen_edge(None) is None
    from caredecide.modelfile import load_model
    from synthetic_cohort import demo_model_path

    model = load_model(demo_model_path())
    changed = with_cell(model, "transitions.wait.stage_1.stage_2", "0.07")
    assert changed.transitions["wait"]["stage_1"]["stage_2"] == 0.07
    assert model.transitions["wait"]["stage_1"]["stage_2"] == "per_cycle(p_progress_1, 1)"
    with pytest.raises(ValueError, match=r"states\.dead\.absorbing"):
        with_cell(model, "states.dead.absorbing", "1")
    with pytest.raises(ValueError, match="empty"):
        with_cell(model, "transitions.wait.stage_1.stage_2", "  ")
