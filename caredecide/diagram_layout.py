"""Positions for drawing a state-transition diagram ourselves (no layout engine).

:func:`layout_diagram` places the states of a :class:`~caredecide.diagram.TransitionDiagram`
on a grid, left to right by severity, and draws each move as a curve with an arrowhead and
one mark at its middle (the mark a click selects). Everything is in pixels of the chart,
``y`` growing downwards, and depends only on the diagram, so the picture is the same from
run to run.

Columns (left to right): the model's ``severity_order`` when it lists the state; states it
does not list follow their predecessors along this action's moves within a cycle (longest
path, loops ignored); absorbing states come last. A tunnel spreads its steps over
neighbouring columns. Rows: one per declared state and attribute value, in model order.
Curves bend to the left of their direction, so a move and its reverse never overlap; a
state's stay is a loop above it.
"""

from __future__ import annotations

import math
import textwrap
from dataclasses import dataclass

import numpy as np
import pandas as pd

from caredecide.diagram import TransitionDiagram

COLUMN_GAP = 190.0
"""Pixels between neighbouring columns."""
ROW_GAP = 160.0
"""Pixels between neighbouring rows."""
MARGIN = 80.0
"""Pixels around the grid (room for loops above and labels below)."""
NODE_RADIUS = 24.0
"""Radius of a state's bubble, pixels."""
BEND = 0.16
"""Sideways bend of a curve, as a share of the distance it spans."""
LOOP_RADIUS = 15.0
"""Radius of a stay loop, pixels."""
POINTS_PER_CURVE = 24
MAX_DRAWN_STATES = 80
"""More states than this are not drawn (the picture would be unreadable and its curves
slow to route); :func:`layout_diagram` refuses and the moves stay listed."""
LABEL_WIDTH = 20
"""Characters per line of a state's name under its bubble (names wrap, never cut)."""
BENDS = (BEND, 0.3, -0.3, 0.45, -0.45, 0.6, -0.6)
"""Bends tried in turn until a curve clears every other bubble."""
CLEARANCE = NODE_RADIUS + 14.0
"""Pixels a curve keeps from the centre of a bubble it does not join (or its loop)."""


@dataclass(frozen=True)
class DiagramLayout:
    """A diagram's geometry, ready for a chart builder.

    Attributes
    ----------
    nodes : DataFrame
        One row per state: ``state``, ``label`` (lines joined by ``\\n``), ``group``,
        ``absorbing``, ``column``, ``row``, ``x``, ``y`` (pixels, centre of the bubble).
    paths : DataFrame
        The curves: ``edge`` (row number in ``diagram.edges``), ``order`` (0, 1, ... along
        the curve), ``x``, ``y``, ``kind``, ``probability``.
    marks : DataFrame
        One row per edge: ``edge``, ``name`` ("source -> target"), ``source``, ``target``,
        ``kind``, ``cell``, ``expression``, ``probability``, ``x``, ``y`` (middle of the
        curve: the mark to click), ``head_x``, ``head_y`` (arrow tip), ``angle`` (degrees,
        clockwise from pointing up, of the arrowhead).
    width, height : float
        Size of the drawing, pixels.
    """

    nodes: pd.DataFrame
    paths: pd.DataFrame
    marks: pd.DataFrame
    width: float
    height: float


def columns_and_rows(diagram: TransitionDiagram) -> tuple[list[int], list[int]]:
    """Grid column and row of each state (see the module docstring for the rules)."""
    n = len(diagram.states)
    declared = list(diagram.declared or diagram.states)
    variants = list(diagram.variants or [""] * n)
    steps = list(diagram.steps or [()] * n)
    index = {s: i for i, s in enumerate(diagram.states)}
    # Rank of a declared state: its place in the severity order (copies share it).
    ordered = list(dict.fromkeys(declared[index[s]] for s in diagram.severity if s in index))
    rank: list[float | None] = [
        float(ordered.index(declared[i])) if declared[i] in ordered else None for i in range(n)
    ]
    # Unranked living states: longest path from the ranked ones (or from nothing) along the
    # moves within a cycle of this action between different declared states, loops
    # ignored; a decision-time move keeps its twin in the same column.
    edges = [
        (index[s], index[t])
        for s, t, kind in zip(
            diagram.edges["source"], diagram.edges["target"], diagram.edges["kind"], strict=True
        )
        if kind != "move"
        and declared[index[s]] != declared[index[t]]
        and not diagram.absorbing[index[t]]
    ]
    fixed = [r is not None for r in rank]
    level = [r if r is not None else 0.0 for r in rank]
    for s, t in _forward(edges, n):  # in topological order: longest path, loops ignored
        if not fixed[t]:
            level[t] = max(level[t], level[s] + 1)
    living = [i for i in range(n) if not diagram.absorbing[i]]
    last = max((level[i] for i in living), default=-1.0) + 1
    for i in range(n):
        if diagram.absorbing[i]:
            level[i] = last
    # Columns: (level, tunnel steps) in order; rows: (declared state, values) in model order.
    keys = sorted({(level[i], steps[i]) for i in range(n)})
    column = [keys.index((level[i], steps[i])) for i in range(n)]
    rows: dict[tuple[float, str, str], int] = {}
    row = []
    for i in range(n):
        per_level = [k for k in rows if k[0] == level[i]]
        key = (level[i], declared[i], variants[i])
        if key not in rows:
            rows[key] = len(per_level)
        row.append(rows[key])
    return column, row


def _lines(label: str) -> str:
    """A state's label on short lines: one per part ("Stage 1, treated"), each wrapped."""
    parts = [line for part in label.split(", ") for line in textwrap.wrap(part, LABEL_WIDTH)]
    return "\n".join(parts) or label


def _forward(edges: list[tuple[int, int]], n: int) -> list[tuple[int, int]]:
    """The edges that do not close a loop (depth-first from each state in model order),
    sorted so that an edge comes after every edge into its source."""
    after: dict[int, list[int]] = {i: [] for i in range(n)}
    for s, t in edges:
        if s != t and t not in after[s]:
            after[s].append(t)
    state = [0] * n  # 0 unseen, 1 on the path, 2 done
    finished: list[int] = []
    kept: set[tuple[int, int]] = set()

    for root in range(n):  # iterative depth-first search (no recursion limit)
        if state[root]:
            continue
        state[root] = 1
        stack = [(root, iter(after[root]))]
        while stack:
            i, targets = stack[-1]
            t = next(targets, -1)
            if t < 0:
                stack.pop()
                state[i] = 2
                finished.append(i)
            elif state[t] != 1:  # an edge to a state on the path closes a loop: ignored
                kept.add((i, t))
                if state[t] == 0:
                    state[t] = 1
                    stack.append((t, iter(after[t])))
    position = {i: k for k, i in enumerate(reversed(finished))}  # topological order
    return sorted(kept, key=lambda e: (position[e[0]], position[e[1]]))


def _quadratic(p0: np.ndarray, c: np.ndarray, p2: np.ndarray, t: np.ndarray) -> np.ndarray:
    t = t[:, None]
    return (1 - t) ** 2 * p0 + 2 * (1 - t) * t * c + t**2 * p2


def _curve(
    p0: np.ndarray, p2: np.ndarray, others: np.ndarray, *, left_only: bool = False
) -> tuple[np.ndarray, np.ndarray]:
    """Points of the curve from bubble edge to bubble edge, and its middle.

    The curve bends to the left of its direction by :data:`BEND` of its length; when that
    passes over another bubble (or its loop and label), it bends further, then to the
    right, until it clears them all (else the bend keeping furthest from them).
    ``left_only``: a move whose reverse is drawn too keeps to its left, so the two
    never share a side.
    """
    d = p2 - p0
    length = float(np.hypot(*d))
    normal = np.array([d[1], -d[0]]) / length  # left of the direction, y downwards
    t = np.linspace(0.0, 1.0, 200)
    best, best_gap = BENDS[0], -np.inf
    for bend in [b for b in BENDS if b > 0 or not left_only]:
        c = (p0 + p2) / 2 + normal * bend * length
        points = _quadratic(p0, c, p2, t)
        if not len(others):
            best = bend
            break
        middle = points[(t > 0.2) & (t < 0.8)]  # near its ends a curve meets its own label
        gap = float(np.hypot(*(middle[:, None, :] - others[None, :, :]).transpose(2, 0, 1)).min())
        if gap > CLEARANCE:
            best = bend
            break
        if gap > best_gap + 1.0:  # else keep the milder bend
            best, best_gap = bend, gap
    c = (p0 + p2) / 2 + normal * best * length
    points = _quadratic(p0, c, p2, t)
    outside = (np.hypot(*(points - p0).T) >= NODE_RADIUS) & (
        np.hypot(*(points - p2).T) >= NODE_RADIUS + 2
    )
    kept = points[outside]
    pick = np.linspace(0, len(kept) - 1, POINTS_PER_CURVE).round().astype(int)
    return kept[pick], _quadratic(p0, c, p2, np.array([0.5]))[0]


def _loop(centre: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A loop above the bubble, leaving and re-entering it, and its top."""
    middle = centre - np.array([0.0, NODE_RADIUS + LOOP_RADIUS * 0.6])
    angles = np.linspace(math.radians(120), math.radians(-240), POINTS_PER_CURVE + 8)
    points = middle + LOOP_RADIUS * np.stack([np.cos(angles), -np.sin(angles)], axis=1)
    points = points[np.hypot(*(points - centre).T) >= NODE_RADIUS + 1]
    return points, middle - np.array([0.0, LOOP_RADIUS])


def _heading(points: np.ndarray) -> float:
    """Degrees clockwise from pointing up, of the last step of ``points`` (y downwards)."""
    dx, dy = points[-1] - points[-2]
    return math.degrees(math.atan2(dx, -dy)) % 360.0


def layout_diagram(diagram: TransitionDiagram) -> DiagramLayout:
    """Place the states and draw the moves of ``diagram`` (pixels, deterministic).

    Raises
    ------
    ValueError
        The diagram has more than :data:`MAX_DRAWN_STATES` states (the message says how
        many).
    """
    if len(diagram.states) > MAX_DRAWN_STATES:
        raise ValueError(
            f"the diagram of {diagram.action!r} has {len(diagram.states)} states, more than "
            f"{MAX_DRAWN_STATES} that can be drawn readably; expected fewer states (the "
            "moves are listed instead)"
        )
    column, row = columns_and_rows(diagram)
    n_columns = max(column, default=0) + 1
    n_rows = max(row, default=0) + 1
    x = [MARGIN + c * COLUMN_GAP for c in column]
    y = [MARGIN + r * ROW_GAP for r in row]
    nodes = pd.DataFrame(
        {
            "state": diagram.states,
            "label": [_lines(label) for label in diagram.labels],
            "group": diagram.groups,
            "absorbing": diagram.absorbing,
            "column": column,
            "row": row,
            "x": x,
            "y": y,
        }
    )
    index = {s: i for i, s in enumerate(diagram.states)}
    obstacles = np.stack([np.array(x, dtype=float), np.array(y, dtype=float)], axis=1)
    # The top of each stay loop (and its label) is an obstacle too.
    loops = obstacles - np.array([0.0, NODE_RADIUS + 2 * LOOP_RADIUS])
    # The state's name under its bubble (up to three lines) likewise.
    below = [(dx, NODE_RADIUS + dy) for dx in (-40.0, 0.0, 40.0) for dy in (12.0, 34.0)]
    names = np.concatenate([obstacles + np.array(offset) for offset in below])
    ends = list(zip(diagram.edges["source"], diagram.edges["target"], strict=True))
    looped = sorted({index[s] for s, t in ends if s == t})
    pairs = {(index[s], index[t]) for s, t in ends}
    path_rows: list[dict] = []
    mark_rows: list[dict] = []
    for e, edge in enumerate(diagram.edges.itertuples(index=False)):
        s, t = index[edge.source], index[edge.target]
        p0, p2 = np.array([x[s], y[s]]), np.array([x[t], y[t]])
        if s == t:
            points, middle = _loop(p0)
        else:
            apart = [i for i in range(len(obstacles)) if i not in (s, t)]
            others = np.concatenate([obstacles[apart], loops[looped], names])
            points, middle = _curve(p0, p2, others, left_only=(t, s) in pairs)
        path_rows += [
            {
                "edge": e,
                "order": k,
                "x": float(px),
                "y": float(py),
                "kind": edge.kind,
                "probability": float(edge.probability),
            }
            for k, (px, py) in enumerate(points)
        ]
        mark_rows.append(
            {
                "edge": e,
                "name": f"{edge.source} -> {edge.target}",
                "source": edge.source,
                "target": edge.target,
                "kind": edge.kind,
                "cell": edge.cell,
                "expression": edge.expression,
                "probability": float(edge.probability),
                "x": float(middle[0]),
                "y": float(middle[1]),
                "head_x": float(points[-1][0]),
                "head_y": float(points[-1][1]),
                "angle": _heading(points),
            }
        )
    return DiagramLayout(
        nodes=nodes,
        paths=pd.DataFrame(path_rows, columns=["edge", "order", "x", "y", "kind", "probability"]),
        marks=pd.DataFrame(
            mark_rows,
            columns=[
                "edge",
                "name",
                "source",
                "target",
                "kind",
                "cell",
                "expression",
                "probability",
                "x",
                "y",
                "head_x",
                "head_y",
                "angle",
            ],
        ),
        width=2 * MARGIN + (n_columns - 1) * COLUMN_GAP,
        height=2 * MARGIN + (n_rows - 1) * ROW_GAP,
    )
