"""The state-transition diagram of the working model, one action at a time.

Built by :func:`caredecide.diagram.transition_diagram`, placed by
:func:`caredecide.diagram_layout.layout_diagram` and drawn as an Altair chart
(:func:`caredecide.diagram_charts.make_diagram_chart`, Vega-Lite bundled with Streamlit: no
outside request). Clicking the dot of a move selects it (``st.altair_chart`` with
``on_select``): the chooser below follows the click, and the cell of the model file that
defines the move is shown with its full expression and base-case value, in a one-cell
editor whose edit goes to the working model.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace
from functools import partial

import pandas as pd
import streamlit as st

from caredecide.diagram import TransitionDiagram, transition_diagram
from caredecide.diagram_charts import EDGE_SELECTION, make_diagram_chart
from caredecide.diagram_layout import MAX_DRAWN_STATES, DiagramLayout, layout_diagram
from caredecide.model import Model
from caredecide.modelfile import loads_model
from ui import working_model
from ui.tables import cell_expression

EDITABLE_TABLES = ("transitions", "rates", "moves")
"""Tables whose cells the one-cell editor writes (path table.action.row.column)."""


@st.cache_data(max_entries=16, show_spinner=False)
def _diagram(text: str, file: str, base_dir: str, action: str, by: str) -> TransitionDiagram:
    return transition_diagram(loads_model(text, file=file, base_dir=base_dir), action, group_by=by)


@st.cache_data(max_entries=16, show_spinner=False)
def _layout(text: str, file: str, base_dir: str, action: str, by: str) -> DiagramLayout:
    return layout_diagram(_diagram(text, file, base_dir, action, by))


@st.cache_data(max_entries=16, show_spinner=False)
def _groupings(text: str, file: str, base_dir: str) -> list[str]:
    model = loads_model(text, file=file, base_dir=base_dir)
    return ["state", *model.attributes, *model.tunnels]


def chosen_edge(selection: object) -> int | None:
    """The ``edge`` number of the move a click chose, from ``st.altair_chart``'s state."""
    if not isinstance(selection, dict):
        return None
    points = (selection.get("selection") or {}).get(EDGE_SELECTION) or []
    if points and isinstance(points[0], dict) and "edge" in points[0]:
        return int(points[0]["edge"])
    return None


def _picked(names: list[str]) -> None:
    """Callback of a click on the diagram: the chooser follows the chosen move."""
    edge = chosen_edge(st.session_state.get("diagram_pick"))
    if edge is not None and 0 <= edge < len(names):
        st.session_state["diagram_edge"] = names[edge]


def with_cell(model: Model, path: str, text: str) -> Model:
    """``model`` with the cell at ``path`` (``table.action.row.column``) set to ``text``.

    Raises
    ------
    ValueError
        The path is not a cell of a transitions, rates or moves table, or ``text`` is empty.
    """
    table, _, rest = path.partition(".")
    parts = rest.split(".")
    if table not in EDITABLE_TABLES or len(parts) != 3:
        raise ValueError(f"{path!r} is not a cell of the tables {', '.join(EDITABLE_TABLES)}")
    value = cell_expression(text)
    if value is None:
        raise ValueError(f"{path}: empty; expected a number, an expression or 'rest'")
    action, row, column = parts
    rows = {a: {r: dict(c) for r, c in by.items()} for a, by in getattr(model, table).items()}
    rows.setdefault(action, {}).setdefault(row, {})[column] = value
    return replace(model, **{table: rows})


def _write_cell(
    text: str, file: str, base_dir: str, path: str, key: str, write_model: Callable[[Model], None]
) -> None:
    """Callback of the one-cell editor's button: the new cell text into the working model."""
    model = loads_model(text, file=file, base_dir=base_dir)
    try:
        new_model = with_cell(model, path, st.session_state.get(key, ""))
    except ValueError as error:
        st.session_state["diagram_cell_error"] = str(error)
        return
    st.session_state.pop("diagram_cell_error", None)
    write_model(new_model)


def show_diagram(
    text: str,
    file: str,
    base_dir: str,
    actions: dict[str, str],
    write_model: Callable[[Model], None] | None = None,
) -> None:
    """Diagram of the chosen action; a click (or the chooser) opens the cell of a move.

    ``actions`` maps action ids to labels; the model text must be valid. ``write_model``
    (when given) takes the model with an edited cell and makes it the working model.
    """
    st.subheader("State-transition diagram")
    action = st.selectbox("Action", list(actions), format_func=actions.get, key="diagram_action")
    groupings = _groupings(text, file, base_dir)
    by = "state"
    if len(groupings) > 1:
        by = st.radio(
            "Colour the states by",
            groupings,
            format_func=lambda g: "declared state" if g == "state" else g,
            horizontal=True,
            key="diagram_group_by",
        )
    diagram = _diagram(text, file, base_dir, action, by)
    names = diagram.edge_names()
    if not names:
        st.info("This action moves no one.")
        return
    st.caption(
        "Bubbles are states (double ring: absorbing), filled by group. An arrow is a move "
        "within one cycle, wider the likelier; the number on the dot at its middle is its "
        "base-case probability per cycle (cycle 0; rate rows converted). Dashed arrows are "
        "moves made at the decision, before the cycle; a loop is the share that stays. "
        "**Click a dot** (or choose the move below) to open the cell that defines it."
    )
    if len(diagram.states) > MAX_DRAWN_STATES:
        st.info(
            f"{len(diagram.states)} states are too many to draw readably (at most "
            f"{MAX_DRAWN_STATES}); choose a move below to open its cell."
        )
    else:
        layout = _layout(text, file, base_dir, action, by)
        current = st.session_state.get("diagram_edge")
        chart = make_diagram_chart(
            layout.nodes,
            layout.paths,
            layout.marks,
            layout.width,
            layout.height,
            group_title="declared state" if by == "state" else by,
            chosen=names.index(current) if current in names else None,
        )
        st.altair_chart(
            chart,
            key="diagram_pick",
            on_select=partial(_picked, names),
            selection_mode=EDGE_SELECTION,
            width="content",
        )
    chosen = st.selectbox("Move", names, key="diagram_edge")
    edge = diagram.edges.iloc[names.index(chosen)]
    _show_cell(text, file, base_dir, chosen, edge, write_model)
    with st.expander("Every move of this action, expressions in full"):
        st.dataframe(
            pd.DataFrame(diagram.edges), hide_index=True, key="diagram_edges", width="stretch"
        )
    st.download_button(
        "Download the diagram as Graphviz DOT text",
        diagram.to_dot(),
        file_name=f"diagram_{action}.gv",
        mime="text/vnd.graphviz",
        key="diagram_dot",
    )


def _show_cell(
    text: str,
    file: str,
    base_dir: str,
    chosen: str,
    edge: pd.Series,
    write_model: Callable[[Model], None] | None,
) -> None:
    """The cell behind the chosen move: its path, full expression, value and an editor."""
    path = str(edge["cell"])
    table, _, rest = path.partition(".")
    parts = rest.split(".")
    editable = table in EDITABLE_TABLES and len(parts) == 3
    if editable:
        where = (
            f"(*Transitions* tab, table `{table}.{parts[0]}`, row `{parts[1]}`, "
            f"column `{parts[2]}`)"
        )
    elif table == "rates":
        where = "(what the row's exit rates leave)"
    else:
        where = "(the state's settings in the *States* tab)"
    st.markdown(
        f"**{chosen}** is defined by the cell `{path}` {where}; "
        f"base-case probability per cycle {edge['probability']:.6g}."
    )
    st.code(str(edge["expression"]), language=None, wrap_lines=True)
    if not editable or write_model is None:
        return
    key = working_model.widget_key(f"diagram_cell_{path}")
    st.text_input(f"Edit the cell {path}", value=str(edge["expression"]), key=key)
    st.button(
        "Write to the model",
        key=working_model.widget_key("diagram_cell_write"),
        on_click=_write_cell,
        args=(text, file, base_dir, path, key, write_model),
    )
    if st.session_state.get("diagram_cell_error"):
        st.error(st.session_state["diagram_cell_error"])


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
