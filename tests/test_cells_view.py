"""The Transition cells view in Streamlit's AppTest: runs on the synthetic demo, shows the
caution, its table equals caredecide.sensitivity.cell_sensitivity and choosing a cell shows
its detail."""

from __future__ import annotations

import numpy as np
from streamlit.testing.v1 import AppTest

from caredecide.cautions import CAUTION_SHORT
from caredecide.modelfile import load_model
from caredecide.sensitivity import cell_sensitivity
from synthetic_cohort import demo_model_path
from tests.ui.conftest import APP, private_app_state  # noqa: F401  (autouse fixture)


def test_cells_view_shows_the_library_table_and_a_cell_detail():
    at = AppTest.from_file(APP, default_timeout=300)
    at.run()
    at.switch_page("views/cells.py").run()
    assert not at.exception, at.exception
    assert any(CAUTION_SHORT in w.value for w in at.warning)
    expected = cell_sensitivity(load_model(demo_model_path())).summary_table()
    shown = at.dataframe[0].value
    assert list(shown["from"]) == list(expected["from"])
    np.testing.assert_allclose(
        shown["switch below 1"].to_numpy(dtype=float),
        expected["switch below 1"].to_numpy(dtype=float),
    )
    expected_cells = cell_sensitivity(load_model(demo_model_path())).to_frame()["cell"]
    cell = str(expected_cells.iloc[-1])
    at.selectbox(key="cells_detail").set_value(cell).run()
    assert not at.exception, at.exception
    detail = " ".join(m.value for m in at.markdown)
    assert f"**{cell}**" in detail and "Switch below 1" in detail
    # A remainder cell is explained, not moved.
    fixed = cell_sensitivity(load_model(demo_model_path())).fixed_frame()["cell"]
    at.selectbox(key="cells_detail").set_value(str(fixed.iloc[0])).run()
    assert any("is not moved" in i.value for i in at.info)
