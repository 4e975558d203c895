"""The transition sensitivity matrix chart: layout like the transition editor, our palette."""

from __future__ import annotations

from caredecide.charts import CLOSENESS_COLOURS, make_cell_matrix_chart
from caredecide.sensitivity.cells import (
    CLOSENESS_BANDS,
    FIXED_BAND,
    NO_SWITCH_BAND,
    cell_sensitivity,
)
from tests.test_sensitivity_cells import two_state_model


def test_every_band_has_a_colour_and_lightness_orders_them():
    bands = [label for _, label in CLOSENESS_BANDS] + [NO_SWITCH_BAND, FIXED_BAND]
    assert list(CLOSENESS_COLOURS) == bands

    def lightness(colour: str) -> float:  # relative luminance, common practice (sRGB weights)
        r, g, b = (int(colour[i : i + 2], 16) / 255 for i in (1, 3, 5))
        return 0.2126 * r + 0.7152 * g + 0.0722 * b

    ramp = [lightness(CLOSENESS_COLOURS[label]) for _, label in CLOSENESS_BANDS]
    assert ramp == sorted(ramp)  # the nearer to 1, the darker


def test_matrix_rows_are_from_states_and_columns_to_states():
    result = cell_sensitivity(two_state_model())
    frame = result.matrix_frame()
    spec = make_cell_matrix_chart(frame, "wait", state_order=result.state_ids).to_dict()
    rect, text = spec["layer"]
    assert rect["encoding"]["x"]["field"] == "to_state"
    assert rect["encoding"]["y"]["field"] == "from_state"
    assert rect["encoding"]["x"]["sort"] == ["sick", "dead"]
    assert rect["encoding"]["color"]["scale"]["range"] == list(CLOSENESS_COLOURS.values())
    assert text["encoding"]["text"]["field"] == "label"
    wait = frame[frame["action"] == "wait"].set_index("to_state")
    # Source: two_state_model's docstring: the wait cell switches at 0.5, nothing above.
    assert wait.at["dead", "label"] == "0.5 / -"
    assert wait.at["dead", "closeness"] == "within 2x"
    assert wait.at["sick", "label"] == "rest"
