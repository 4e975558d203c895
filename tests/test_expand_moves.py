"""Attributes and tunnels with decision-time moves and rewards under an action.

Synthetic models of our own; the figures are derived by hand beside each check.
"""

from __future__ import annotations

import numpy as np
import pytest

from caredecide.compile import compile_model
from caredecide.evaluate import evaluate_policy
from caredecide.expand import expand
from caredecide.modelfile import loads_model
from caredecide.objective import Objective
from tests.test_expand import _tunnel_model

# The tunnel model of tests/test_expand.py, with nobody starting the drug on their own and
# an action that starts it by a decision-time move.
MODEL = (
    _tunnel_model(start="sick__untreated", enter="0", die="0.1")
    + """
[[actions]]
id = "start"
allowed_in = ["sick__untreated"]

[moves.start.sick__untreated]
sick__treated = "rest"
"""
)


def _start_at_once(compiled):
    policy = np.zeros((1, 4, compiled.n_states), dtype=int)
    policy[0, 0, compiled.state_ids.index("sick__untreated")] = compiled.action_ids.index("start")
    return policy


def test_a_move_into_the_tunnel_starts_at_step_zero_and_pays_two_cycles():
    model = loads_model(MODEL)
    flat = expand(model).model
    assert flat.moves["start"] == {"sick__untreated": {"sick__treated__years_on_drug_0": "rest"}}
    compiled = compile_model(model)
    outcome = evaluate_policy(compiled, _start_at_once(compiled), Objective("net_benefit", 2e4))
    # Hand-derived (start-of-cycle counting): the move puts the cohort on the drug at step 0
    # for cycle 0 (1000); 90% survive into cycle 1 at step 1 (900); step 2+ pays nothing.
    assert outcome.costs_undiscounted[0] == pytest.approx(1900.0, rel=1e-12)


def test_a_move_between_copies_of_one_tunnel_keeps_its_step():
    # Common practice: no time passes at a decision, so time in the tunnel is unchanged.
    text = MODEL.replace(
        "[attributes.on_treatment]\nvalues = { untreated = 0, treated = 1 }",
        "[attributes.on_treatment]\nvalues = { untreated = 0, treated = 1 }\n\n"
        "[attributes.dose]\nvalues = { low = 0, high = 1 }",
    ).replace('attributes = ["on_treatment"]', 'attributes = ["on_treatment", "dose"]')
    text = text.replace('start = "sick__untreated"', 'start = "sick__untreated__low"')
    text = text.replace('allowed_in = ["sick__untreated"]', 'allowed_in = ["sick__treated__low"]')
    text = text.replace(
        '[moves.start.sick__untreated]\nsick__treated = "rest"',
        '[moves.start.sick__treated__low]\nsick__high = "rest"',
    )
    moves = expand(loads_model(text, validate=False)).model.moves["start"]
    assert moves["sick__treated__low__years_on_drug_1"] == {
        "sick__treated__high__years_on_drug_1": "rest"
    }
    assert moves["sick__treated__low__years_on_drug_2plus"] == {
        "sick__treated__high__years_on_drug_2plus": "rest"
    }


def test_rewards_under_an_action_are_given_to_every_covered_copy():
    text = MODEL + '\n[under_action.wait.sick]\ncost = "50 * on_treatment + years_on_drug"\n'
    rows = expand(loads_model(text)).model.under_action["wait"]
    assert rows["sick__untreated"] == {"cost": "50 * 0.0 + 0.0"}
    assert rows["sick__treated__years_on_drug_2plus"] == {"cost": "50 * 1.0 + 2.0"}
    assert len(rows) == 4  # every copy where wait is allowed
