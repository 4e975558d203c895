"""Entry file of the caredecide app: ``streamlit run ui/app.py`` (or ``caredecide app``).

Adding a view: write ``ui/views/<name>.py`` (a plain Streamlit script that reads the
working model through :mod:`ui.working_model`) and add one ``st.Page`` line to :data:`VIEWS`.
The cautions and the working model are set up here, so every view gets them.
"""

from __future__ import annotations

from pathlib import Path

import streamlit as st

from ui import working_model

# The page icon is a local file: a named icon would be fetched from an outside font
# server (the app makes no outside request).
ICON = Path(__file__).with_name("icon.png")
st.set_page_config(page_title="caredecide - research use only", page_icon=str(ICON), layout="wide")

VIEWS = [
    st.Page("views/model.py", title="Model", url_path="model", default=True),
    st.Page("views/policy.py", title="Policy", url_path="policy"),
    st.Page(
        "views/convergence.py",
        title="Convergence",
        url_path="convergence",
    ),
    st.Page("views/sensitivity.py", title="Sensitivity", url_path="sensitivity"),
    st.Page("views/scenarios.py", title="Scenarios", url_path="scenarios"),
    st.Page(
        "views/changes.py",
        title="What would change it",
        url_path="what-would-change",
    ),
    st.Page(
        "views/regions.py",
        title="Policy regions",
        url_path="policy-regions",
    ),
    st.Page(
        "views/cells.py",
        title="Transition cells",
        url_path="transition-cells",
    ),
    st.Page(
        "views/uncertainty.py",
        title="Uncertainty",
        url_path="uncertainty",
    ),
    st.Page(
        "views/strategies.py",
        title="Strategies",
        url_path="strategies",
    ),
    st.Page("views/report.py", title="Report", url_path="report"),
]

page = st.navigation(VIEWS)
working_model.ensure_working_model()
working_model.show_cautions()
with st.sidebar:
    st.caption(f"Working model: **{working_model.source_label(working_model.working_source())}**")
page.run()
