"""Our own layout of the state-transition diagram and its clickable chart.

Layered left-to-right placement of a directed graph (ranks along the moves, absorbing
states last) is common practice for drawing state-transition diagrams; the figures
below follow from the rules in caredecide/diagram_layout.py, checked by hand.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.diagram import EDGE_COLUMNS, TransitionDiagram, transition_diagram
from caredecide.diagram_charts import EDGE_SELECTION, make_diagram_chart
from caredecide.diagram_layout import (
    COLUMN_GAP,
    MARGIN,
    MAX_DRAWN_STATES,
    NODE_RADIUS,
    ROW_GAP,
    columns_and_rows,
    layout_diagram,
)
from caredecide.modelfile import load_model
from synthetic_cohort import MODELS_DIR


def _diagram(name: str, action: str) -> TransitionDiagram:
    return transition_diagram(load_model(MODELS_DIR / name), action)


def _place(diagram: TransitionDiagram) -> dict[str, tuple[int, int]]:
    column, row = columns_and_rows(diagram)
    return dict(zip(diagram.states, zip(column, row, strict=True), strict=True))


def test_a_progressive_model_reads_left_to_right_by_severity_with_twins_below():
    # demo_progressive: severity stage_1 < stage_2 < stage_3; the treated states follow
    # their own chain (stage_1_tx -> stage_2_tx -> stage_3_tx) one row down; dead last.
    for action in ("wait", "treat"):
        place = _place(_diagram("demo_progressive.toml", action))
        assert place == {
            "stage_1": (0, 0),
            "stage_2": (1, 0),
            "stage_3": (2, 0),
            "stage_1_tx": (0, 1),
            "stage_2_tx": (1, 1),
            "stage_3_tx": (2, 1),
            "dead": (3, 0),
        }, action


def test_tunnel_steps_take_neighbouring_columns_in_one_row_per_value():
    place = _place(_diagram("demo_years_since_progression.toml", "wait"))
    steps = [f"progressed__off_drug__years_progressed_{k}" for k in ("0", "1", "2plus")]
    assert [place[s] for s in steps] == [(1, 0), (2, 0), (3, 0)]
    on = [s.replace("off_drug", "on_drug") for s in steps]
    assert [place[s] for s in on] == [(1, 1), (2, 1), (3, 1)]
    assert place["stable__off_drug"] == (0, 0) and place["stable__on_drug"] == (0, 1)
    assert place["dead"] == (4, 0)


def test_the_layout_is_deterministic_and_in_pixels():
    diagram = _diagram("demo_progressive.toml", "wait")
    first, second = layout_diagram(diagram), layout_diagram(diagram)
    pd.testing.assert_frame_equal(first.nodes, second.nodes)
    pd.testing.assert_frame_equal(first.paths, second.paths)
    pd.testing.assert_frame_equal(first.marks, second.marks)
    # Columns 0..3 and rows 0..1: 80 + 3 * 190 = 650 wide plus margins.
    assert first.width == 2 * MARGIN + 3 * COLUMN_GAP == 730.0
    assert first.height == 2 * MARGIN + ROW_GAP
    stage_3 = first.nodes.set_index("state").loc["stage_3"]
    assert (stage_3["x"], stage_3["y"]) == (MARGIN + 2 * COLUMN_GAP, MARGIN)


def test_every_edge_has_one_selectable_mark_in_the_chart():
    diagram = _diagram("demo_progressive.toml", "treat")
    layout = layout_diagram(diagram)
    assert layout.marks["edge"].tolist() == list(range(len(diagram.edges)))
    assert layout.marks["name"].tolist() == diagram.edge_names()
    spec = make_diagram_chart(
        layout.nodes, layout.paths, layout.marks, layout.width, layout.height, chosen=2
    ).to_dict()
    (param,) = spec["params"]
    selectable = [layer for layer in spec["layer"] if layer.get("name") in param["views"]]
    assert len(selectable) == 1 and selectable[0]["mark"]["type"] == "circle"
    assert param["name"] == EDGE_SELECTION
    assert param["select"]["type"] == "point" and param["select"]["fields"] == ["edge"]
    rows = spec["datasets"][selectable[0]["data"]["name"]]
    assert sorted(r["edge"] for r in rows) == list(range(len(diagram.edges)))
    assert [r["chosen"] for r in rows].count(True) == 1
    # Each mark carries its cell and full expression for the tooltip.
    assert {r["cell"] for r in rows} >= {"moves.treat.stage_2.stage_2_tx"}


def test_curves_run_from_bubble_edge_to_bubble_edge_and_a_move_and_its_reverse_differ():
    states = ("a", "b")
    edges = pd.DataFrame(
        [
            {"source": "a", "target": "b", "kind": "cycle", "cell": "x", "expression": "0.1"},
            {"source": "b", "target": "a", "kind": "cycle", "cell": "y", "expression": "0.2"},
        ]
    ).assign(probability=[0.1, 0.2])[list(EDGE_COLUMNS)]
    diagram = TransitionDiagram("go", states, states, states, (False, False), edges)
    layout = layout_diagram(diagram)
    there, back = layout.marks.iloc[0], layout.marks.iloc[1]
    # Same span, bent apart: the middles share x and lie apart in y; the first bends to
    # the left of rightwards, which is up (y grows downwards): MARGIN - 0.16 * 190 / 2.
    assert there["x"] == pytest.approx(back["x"])
    assert there["y"] == pytest.approx(MARGIN - 0.16 * COLUMN_GAP / 2)
    assert abs(there["y"] - back["y"]) >= 10
    b = layout.nodes.set_index("state").loc["b"]
    tip = math.hypot(there["head_x"] - b["x"], there["head_y"] - b["y"])
    assert NODE_RADIUS <= tip <= NODE_RADIUS + 4


@st.composite
def _graphs(draw):
    n = draw(st.integers(2, 7))
    states = tuple(f"s{i}" for i in range(n))
    absorbing = tuple(draw(st.lists(st.booleans(), min_size=n, max_size=n)))
    pairs = draw(
        st.lists(
            st.tuples(st.integers(0, n - 1), st.integers(0, n - 1)),
            min_size=1,
            max_size=3 * n,
            unique=True,
        )
    )
    rows = [
        {
            "source": states[s],
            "target": states[t],
            "kind": draw(st.sampled_from(["cycle", "move"])),
            "cell": f"transitions.go.{states[s]}.{states[t]}",
            "expression": "0.1",
            "probability": draw(st.floats(0.0, 1.0)),
        }
        for s, t in pairs
    ]
    severity = tuple(draw(st.permutations(states))[: draw(st.integers(0, n))])
    return TransitionDiagram(
        "go", states, states, states, absorbing, pd.DataFrame(rows), severity=severity
    )


@settings(max_examples=60, deadline=None)
@given(_graphs())
def test_any_graph_gets_distinct_places_and_a_finite_mark_per_edge(diagram):
    layout = layout_diagram(diagram)
    xy = layout.nodes[["x", "y"]].to_numpy()
    gaps = np.hypot(*(xy[:, None, :] - xy[None, :, :]).transpose(2, 0, 1))
    np.fill_diagonal(gaps, np.inf)
    assert gaps.min() >= min(COLUMN_GAP, ROW_GAP)  # bubbles never overlap
    assert len(layout.marks) == len(diagram.edges)
    assert np.isfinite(layout.marks[["x", "y", "head_x", "head_y", "angle"]].to_numpy()).all()
    assert set(layout.paths["edge"]) == set(range(len(diagram.edges)))
    columns = layout.nodes["column"]
    living = columns[~layout.nodes["absorbing"]]
    if layout.nodes["absorbing"].any() and len(living):
        assert columns[layout.nodes["absorbing"]].min() > living.max()
    assert layout_diagram(diagram).marks.equals(layout.marks)


def test_a_diagram_too_large_to_read_is_refused_by_name():
    n = MAX_DRAWN_STATES + 1
    states = tuple(f"s{i}" for i in range(n))
    edges = pd.DataFrame([], columns=list(EDGE_COLUMNS))
    diagram = TransitionDiagram("go", states, states, states, (False,) * n, edges)
    with pytest.raises(ValueError, match=f"'go' has {n} states, more than {MAX_DRAWN_STATES}"):
        layout_diagram(diagram)
