"""The state-transition (bubble) diagram generated from a model (caredecide.diagram)."""

from __future__ import annotations

import pytest

from caredecide.diagram import transition_diagram
from caredecide.errors import RunOptionError
from caredecide.modelfile import load_model
from synthetic_cohort import MODELS_DIR


def _edge(diagram, source, target):
    edges = diagram.edges
    return edges[(edges["source"] == source) & (edges["target"] == target)].iloc[0]


def test_edges_carry_their_cell_expression_and_base_case_probability():
    model = load_model(MODELS_DIR / "teaching_stationary.toml")
    diagram = transition_diagram(model, "intensive")
    relapse = _edge(diagram, "remission", "flare")
    assert relapse["cell"] == "transitions.intensive.remission.flare"
    assert relapse["expression"] == "with_rr(p_relapse, rr_intensive)"
    # A relative risk on the rate scale: 1 - (1 - 0.2)^0.6 (hand-derived; the rate-scale
    # relation p = 1 - exp(-r t) is common practice).
    assert relapse["probability"] == pytest.approx(1 - 0.8**0.6)
    stay = _edge(diagram, "remission", "remission")
    assert stay["expression"] == "rest"
    assert stay["probability"] == pytest.approx(1 - (1 - 0.8**0.6) - 0.02)
    # Every living state's moves sum to 1; the absorbing state keeps everyone.
    totals = diagram.edges.groupby("source")["probability"].sum()
    assert totals.to_numpy() == pytest.approx(1.0)
    assert _edge(diagram, "dead", "dead")["cell"] == "states.dead.absorbing"
    dot = diagram.to_dot()
    assert dot.startswith("digraph") and '"remission" -> "flare"' in dot
    assert "shape=doublecircle" in dot  # the absorbing state


def test_decision_time_moves_are_dashed_and_the_cycle_runs_on_the_destination_rows():
    model = load_model(MODELS_DIR / "demo_progressive.toml")
    diagram = transition_diagram(model, "treat")
    move = _edge(diagram, "stage_1", "stage_1_tx")
    assert move["kind"] == "move" and move["cell"] == "moves.treat.stage_1.stage_1_tx"
    assert move["probability"] == pytest.approx(1.0)
    # The treated state's own rows are those of 'wait', the one action allowed there.
    onward = _edge(diagram, "stage_1_tx", "stage_2_tx")
    assert onward["cell"] == "transitions.wait.stage_1_tx.stage_2_tx"
    assert "style=dashed" in diagram.to_dot()


def test_expanded_states_are_grouped_by_declared_state_and_name_the_written_cell():
    model = load_model(MODELS_DIR / "demo_years_since_progression.toml")
    diagram = transition_diagram(model, "wait")
    assert 'subgraph "cluster_progressed"' in diagram.to_dot()
    by_drug = transition_diagram(model, "wait", group_by="drug").to_dot()
    assert 'subgraph "cluster_drug: on_drug"' in by_drug
    assert 'subgraph "cluster_drug: off_drug"' in by_drug
    cells = set(diagram.edges["cell"])
    # Cells are named as written in the file (declared rows), not by generated copies.
    assert all("years_progressed_" not in c.split(".")[2] for c in cells), cells


def test_an_unknown_action_is_refused_naming_it():
    model = load_model(MODELS_DIR / "teaching_stationary.toml")
    with pytest.raises(RunOptionError, match="action"):
        transition_diagram(model, "surgery")
    with pytest.raises(RunOptionError, match="group_by"):
        transition_diagram(model, "usual", group_by="colour")
