"""The state-transition (bubble) diagram of the working model, one action at a time.

Built by :func:`caredecide.diagram.transition_diagram` and drawn with ``st.graphviz_chart``
(the Graphviz renderer bundled with Streamlit: no outside request). Choosing a move names
the cell of the model file that defines it, with its full expression and base-case value.
"""

from __future__ import annotations

import pandas as pd
import streamlit as st

from caredecide.diagram import TransitionDiagram, transition_diagram
from caredecide.modelfile import loads_model


@st.cache_data(max_entries=16, show_spinner=False)
def _diagram(text: str, file: str, base_dir: str, action: str, by: str) -> TransitionDiagram:
    return transition_diagram(loads_model(text, file=file, base_dir=base_dir), action, group_by=by)


@st.cache_data(max_entries=16, show_spinner=False)
def _groupings(text: str, file: str, base_dir: str) -> list[str]:
    model = loads_model(text, file=file, base_dir=base_dir)
    return ["state", *model.attributes, *model.tunnels]


def show_diagram(text: str, file: str, base_dir: str, actions: dict[str, str]) -> None:
    """Diagram of the chosen action, the chooser of a move and the list of every move.

    ``actions`` maps action ids to labels; the model text must be valid.
    """
    st.subheader("State-transition diagram")
    action = st.selectbox("Action", list(actions), format_func=actions.get, key="diagram_action")
    groupings = _groupings(text, file, base_dir)
    by = "state"
    if len(groupings) > 1:
        by = st.radio(
            "Boxes group the states by",
            groupings,
            format_func=lambda g: "declared state" if g == "state" else g,
            horizontal=True,
            key="diagram_group_by",
        )
    diagram = _diagram(text, file, base_dir, action, by)
    st.caption(
        "Bubbles are states (double ring: absorbing); an arrow is a move within one cycle "
        "labelled with its cell's expression and base-case probability per cycle (cycle 0; "
        "rate rows converted). Dashed arrows: moves made at the decision, before the cycle. "
        "States of one declared state with attributes or tunnels share a box."
    )
    st.graphviz_chart(diagram.to_dot(), use_container_width=True)
    names = diagram.edge_names()
    if not names:
        st.info("This action moves no one.")
        return
    chosen = st.selectbox("Move", names, key="diagram_edge")
    edge = diagram.edges.iloc[names.index(chosen)]
    table, _, rest = str(edge["cell"]).partition(".")
    st.markdown(
        f"**{chosen}** is defined by the cell `{edge['cell']}` "
        + (
            f"(*Transitions* tab, table `{table}.{rest.split('.')[0]}`, row "
            f"`{rest.split('.')[1]}`, column `{rest.split('.')[2]}`)"
            if table in ("transitions", "rates", "moves") and rest.count(".") >= 2
            else "(the state's settings in the *States* tab)"
        )
        + f"; base-case probability per cycle {edge['probability']:.6g}."
    )
    st.code(str(edge["expression"]), language=None, wrap_lines=True)
    with st.expander("Every move of this action, expressions in full"):
        st.dataframe(
            pd.DataFrame(diagram.edges), hide_index=True, key="diagram_edges", width="stretch"
        )


def show_cells_in_full(frame: pd.DataFrame, name: str) -> None:
    """Every non-empty cell of a transition grid with its full text (grids may cut it)."""
    long = frame.stack().reset_index()
    long.columns = ["from", "to", "cell"]
    long = long[long["cell"].astype(str).str.strip() != ""]
    long = long[long["cell"].notna()]
    if long.empty:
        return
    with st.expander(f"Cells of {name} in full"):
        for row in long.itertuples(index=False):
            st.markdown(f"`{row[0]}` → `{row[1]}`: `{row[2]}`")
