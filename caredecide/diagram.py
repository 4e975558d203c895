"""The state-transition (bubble) diagram of one action, generated from the model.

:func:`transition_diagram` lists every move of the base case under an action (states as
the compiler sees them, after attributes and tunnels are expanded), each with the cell of
the model file that defines it, its expression and its base-case probability per cycle
(cycle 0), and writes the diagram as Graphviz DOT text (states of one declared state drawn
together in a box when the model has attributes or tunnels). The app renders the DOT with
the Graphviz renderer Streamlit bundles, so the page makes no outside request.
"""

from __future__ import annotations

import textwrap
from dataclasses import dataclass

import numpy as np
import pandas as pd

from caredecide.compile import compile_model, rows_after_move
from caredecide.compiled import CompiledModel, transition_row
from caredecide.expand import SEPARATOR, expand_model
from caredecide.model import Model
from caredecide.options import check_choice

LABEL_WIDTH = 30
"""Characters per line of an edge label (expressions wrap, never cut)."""


@dataclass(frozen=True)
class TransitionDiagram:
    """The moves of one action in the base case, with their defining cells.

    Attributes
    ----------
    action : str
    states : tuple of str
        Flat state ids (after expansion), in model order.
    labels : tuple of str
        State labels (words), same order.
    groups : tuple of str
        Box of each flat state in the diagram (its declared state, or its value of the
        attribute or tunnel grouped by).
    absorbing : tuple of bool
    edges : DataFrame
        One row per move with probability > 0 at cycle 0: ``source``, ``target`` (flat ids),
        ``cell`` (table path of the defining cell in the model file, e.g.
        ``transitions.wait.stable.progressed``), ``expression`` (full text as written),
        ``probability`` (base case, per cycle, cycle 0).
    """

    action: str
    states: tuple[str, ...]
    labels: tuple[str, ...]
    groups: tuple[str, ...]
    absorbing: tuple[bool, ...]
    edges: pd.DataFrame
    declared: tuple[str, ...] = ()
    """Declared state of each flat state (its own id in a model without copies)."""
    variants: tuple[str, ...] = ()
    """Attribute values of each flat state joined with ``", "`` (``""`` when none)."""
    steps: tuple[tuple[int, ...], ...] = ()
    """Tunnel steps of each flat state, one per tunnel of the model (0 outside it)."""
    severity: tuple[str, ...] = ()
    """Flat state ids in the model's ``severity_order`` (may be empty)."""

    def edge_names(self) -> list[str]:
        """``"source -> target"`` for every edge (for a chooser)."""
        return [
            f"{s} -> {t}" for s, t in zip(self.edges["source"], self.edges["target"], strict=True)
        ]

    def to_dot(self) -> str:
        """Graphviz DOT text of the diagram: bubbles for states, labelled arrows for moves."""
        lines = [
            "digraph transitions {",
            "  rankdir=LR;",
            '  node [shape=ellipse, style=filled, fillcolor="#F2F2F2", fontname="Helvetica"];',
            '  edge [fontname="Helvetica", fontsize=10];',
        ]
        grouped = len(set(self.groups)) < len(self.states)
        for group in dict.fromkeys(self.groups):
            members = [i for i, g in enumerate(self.groups) if g == group]
            indent = "  "
            if grouped and len(members) > 1:
                lines.append(f'  subgraph "cluster_{_escape(group)}" {{')
                lines.append(f'    label="{_escape(group)}"; style=rounded; color="#888888";')
                indent = "    "
            for i in members:
                shape = ', shape=doublecircle, fillcolor="#DDDDDD"' if self.absorbing[i] else ""
                node, label = _escape(self.states[i]), _escape(self.labels[i])
                lines.append(f'{indent}"{node}" [label="{label}"{shape}];')
            if indent == "    ":
                lines.append("  }")
        for row in self.edges.itertuples(index=False):
            text = "\n".join(textwrap.wrap(str(row.expression), LABEL_WIDTH)) or "(generated)"
            if row.kind == "move":
                text = f"at the decision: {text}"
            label = f"{text}\n= {row.probability:.4g}"
            dash = ", style=dashed" if row.kind == "move" else ""
            lines.append(
                f'  "{_escape(row.source)}" -> "{_escape(row.target)}" '
                f'[label="{_escape(label)}", tooltip="{_escape(row.cell)}"{dash}];'
            )
        lines.append("}")
        return "\n".join(lines)


def _escape(text: str) -> str:
    return str(text).replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")


def _declared_key(keys: list[str], flat: str) -> str | None:
    """The key written in the model file that covers the flat state ``flat`` (longest first)."""
    covering = [k for k in keys if flat == k or flat.startswith(k + SEPARATOR)]
    return max(covering, key=len) if covering else None


EDGE_COLUMNS = ("source", "target", "kind", "cell", "expression", "probability")


def _edge(source: str, target: str, cell: str, expression: str, p: float, kind="cycle") -> dict:
    return dict(zip(EDGE_COLUMNS, (source, target, kind, cell, expression, p), strict=True))


def _edges(model, flat, table, action, source, row, states, kind) -> list[dict]:
    """Edges of one row (``row`` (S,) probabilities) with the cells written in the file."""
    written = getattr(model, table).get(action, {})
    row_key = _declared_key(list(written), source)
    cells = written.get(row_key, {}) if row_key else {}
    # A rate row inside a tunnel: where each reached copy is at the cycle end (step on).
    clock = flat.rate_row_clock.get(action, {}).get(source, {}) if table == "rates" else {}
    out = []
    for target, expression in getattr(flat, table).get(action, {}).get(source, {}).items():
        end = clock.get(target, target)
        if end not in states or row[states.index(end)] <= 0:
            continue
        column = _declared_key(list(cells), target)
        if column is None and target == source and "rest" in cells:
            column = "rest"
        text = cells.get(column, expression) if column else expression
        cell = f"{table}.{action}.{row_key or source}.{column or target}"
        out.append(_edge(source, end, cell, str(text), float(row[states.index(end)]), kind))
    seen = {e["target"] for e in out}
    stay = clock.get(source, source)
    if table == "rates" and stay not in seen and row[states.index(stay)] > 0:
        # A rate row keeps the mass that does not exit in its own state (inside a tunnel:
        # in the copy one step on).
        p = float(row[states.index(stay)])
        text = "stays" if stay == source else "stays (one tunnel step on)"
        out.append(_edge(source, stay, f"{table}.{action}.{row_key or source}", text, p, kind))
    return out


def transition_diagram(
    model: Model, action: str, compiled: CompiledModel | None = None, *, group_by: str = "state"
) -> TransitionDiagram:
    """The bubble diagram of ``action``: its moves at cycle 0 with their defining cells.

    Parameters
    ----------
    model : Model
        A validated model.
    action : str
        An action id of the model.
    compiled : CompiledModel, optional
        The compiled base case, when the caller has it (else compiled here).
    group_by : str
        What the boxes group: "state" (the declared state of each copy) or the name of an
        attribute or tunnel (copies with the same value share a box; states without it
        stand alone).

    Raises
    ------
    RunOptionError
        ``action`` is not an action of the model (the message lists the actions).
    """
    check_choice(action, "action", tuple(a.id for a in model.actions))
    flat = expand_model(model)
    compiled = compile_model(model) if compiled is None else compiled
    a = compiled.action_ids.index(action)
    states = tuple(compiled.state_ids)
    declared = tuple(dict(compiled.state_groups).get("state", states))
    check_choice(group_by, "group_by", ("state", *dict(compiled.state_groups)))
    values = dict(compiled.state_groups).get(group_by, states)
    groups = tuple(
        s if not v else (v if group_by == "state" else f"{group_by}: {v}")
        for v, s in zip(values, states, strict=True)
    )
    action_ids = tuple(compiled.action_ids)
    # The rows that apply in each state under this action (another action's where this
    # one is not allowed and one other is), as the compiler fills them.
    row_action = rows_after_move(compiled.allowed, compiled.absorbing)[a]
    moves = None if compiled.move is None else np.asarray(compiled.move[0, 0, a])
    rows: list[dict] = []
    for s, source in enumerate(states):
        if moves is not None and not np.array_equal(moves[s], np.eye(len(states))[s]):
            rows += _edges(model, flat, "moves", action, source, moves[s], states, "move")
            continue
        if compiled.absorbing[s]:
            rows.append(_edge(source, source, f"states.{declared[s]}.absorbing", "absorbing", 1.0))
            continue
        b = action_ids[row_action[s]]
        P = transition_row(compiled, 0, 0, int(row_action[s]), s)
        for table in ("transitions", "rates"):
            if source in getattr(flat, table).get(b, {}):
                rows += _edges(model, flat, table, b, source, P, states, "cycle")
    labels = tuple(compiled.state_labels or states)
    by = dict(compiled.state_groups)
    variants = tuple(
        ", ".join(by[name][i] for name in model.attributes if by[name][i])
        for i in range(len(states))
    )
    steps = tuple(
        tuple(_step_number(by[name][i]) for name in model.tunnels) for i in range(len(states))
    )
    return TransitionDiagram(
        action=action,
        states=states,
        labels=labels,
        groups=groups,
        absorbing=tuple(bool(x) for x in compiled.absorbing),
        edges=pd.DataFrame(rows, columns=[*EDGE_COLUMNS]),
        declared=declared,
        variants=variants,
        steps=steps,
        severity=tuple(compiled.ordered_states),
    )


def _step_number(text: str) -> int:
    """``"2+"`` -> 2, ``"0"`` -> 0, ``""`` (outside the tunnel) -> 0."""
    digits = text.rstrip("+")
    return int(digits) if digits.isdigit() else 0
