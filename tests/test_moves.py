"""Decision-time moves and costs/QALYs of a state under an action, by hand, and their errors.

The model (invented for the test): well -> sick; in sick, "start" moves the cohort to
sick_tx when it is taken, then sick_tx's row applies in the same cycle; a drug is paid while
in sick_tx under "continue" ([under_action]). Arithmetic is written out beside each check.
"""

from __future__ import annotations

import numpy as np
import pytest

from caredecide.compile import compile_model
from caredecide.errors import ModelError
from caredecide.evaluate import evaluate_policy
from caredecide.modelfile import dumps_model, loads_model
from caredecide.objective import Objective
from tests.conftest import load_dict


def _model(**changes) -> dict:
    data = {
        "format": 2,
        "title": "Synthetic test model with a decision-time move",
        "settings": {
            "cycle_years": 1.0,
            "horizon_cycles": 2,
            "start": "sick",
            "objective": "qalys",
            "within_cycle": "start",
        },
        "states": [
            {"id": "sick", "qaly_weight": 0.5, "cost": 100.0},
            {"id": "sick_tx", "qaly_weight": 0.6, "cost": 100.0},
            {"id": "dead", "absorbing": True},
        ],
        "actions": [
            {"id": "wait", "allowed_in": ["sick"]},
            {"id": "start", "allowed_in": ["sick"], "oneoff_cost": 50.0},
            {"id": "continue", "allowed_in": ["sick_tx"]},
        ],
        "transitions": {
            "wait": {"sick": {"dead": 0.4, "sick": "rest"}},
            "continue": {"sick_tx": {"dead": 0.2, "sick_tx": "rest"}},
        },
        "moves": {"start": {"sick": {"sick_tx": 1.0}}},
        "under_action": {"continue": {"sick_tx": {"cost": "when(cycle < 1, 1000, 0)"}}},
        "parameters": {},
    }
    for path, value in changes.items():
        where = data
        keys = path.split(".")
        for key in keys[:-1]:
            where = where.setdefault(key, {})
        if value is None:
            where.pop(keys[-1], None)
        else:
            where[keys[-1]] = value
    return data


def test_move_then_the_destination_row_by_hand():
    compiled = compile_model(load_dict(_model()))
    # "start" in sick: move to sick_tx, then sick_tx's row (continue): 0.8 stay, 0.2 die.
    np.testing.assert_allclose(compiled.transition[0, 0, 1, 0], [0.0, 0.8, 0.2])
    np.testing.assert_allclose(compiled.move[0, 0, 1, 0], [0.0, 1.0, 0.0])
    # Policy: start at cycle 0, then continue (the only action in sick_tx).
    outcome = evaluate_policy(compiled, np.array([[[1, 2, 0], [1, 2, 0]]]), Objective("qalys"))
    # Start-of-cycle counts, no discount:
    #   cycle 0: one-off 50 on the cohort in sick (1.0); occupancy counted after the move, in
    #            sick_tx: 100 (the drug is paid under "continue"; this cohort took "start");
    #   cycle 1: 0.8 in sick_tx under continue: 0.8 x (100 + 0) = 80 (drug only in cycle 0).
    # costs = 50 + 100 + 80 = 230; QALYs = 0.6 + 0.8 x 0.6 = 1.08.
    assert outcome.costs[0] == pytest.approx(230.0)
    assert outcome.qalys[0] == pytest.approx(1.08)
    np.testing.assert_allclose(outcome.trace[0, 1], [0.0, 0.8, 0.2])


def test_state_under_action_cost_follows_the_within_cycle_method_by_hand():
    # Start in sick_tx (continue is the only action); drug 1000 in cycle 0 only.
    data = _model(**{"settings.start": "sick_tx", "settings.within_cycle": "trapezoid"})
    compiled = compile_model(load_dict(data))
    policy = np.array([[[0, 2, 0]]])  # wait in sick (empty), continue in sick_tx
    outcome = evaluate_policy(compiled, policy, Objective("qalys"))
    # Trapezoid, no discount: cycle 0 counts 0.5 x 1.0 + 0.5 x 0.8 of (100 + 1000) = 990;
    # cycle 1 counts 0.5 x 0.8 + 0.5 x 0.64 of 100 = 72 -> 1062.
    assert outcome.costs[0] == pytest.approx(1062.0)
    # End of cycle: 0.8 x 1100 + 0.64 x 100 = 944.
    data["settings"]["within_cycle"] = "end"
    outcome = evaluate_policy(compile_model(load_dict(data)), policy, Objective("qalys"))
    assert outcome.costs[0] == pytest.approx(944.0)


def test_a_share_moves_and_the_rest_stays():
    data = _model(**{"moves.start.sick": {"sick_tx": 0.25, "sick": "rest"}})
    data["transitions"]["start"] = {"sick": {"dead": 0.4, "sick": "rest"}}
    compiled = compile_model(load_dict(data))
    # 0.25 x (0.8 stay, 0.2 die in sick_tx) + 0.75 x (0.6 stay, 0.4 die in sick).
    np.testing.assert_allclose(compiled.transition[0, 0, 1, 0], [0.45, 0.2, 0.35])


def test_moves_and_under_action_round_trip():
    model = load_dict(_model())
    assert loads_model(dumps_model(model), file="again.toml") == model


@pytest.mark.parametrize(
    ("changes", "where", "message"),
    [
        (
            {"moves.start.sick": {"nowhere": 1.0}},
            "moves.start.sick.nowhere",
            "unknown state",
        ),
        ({"moves.stop": {"sick": {"sick_tx": 1.0}}}, "moves.stop", "unknown action"),
        (
            {"moves.start.sick_tx": {"sick": 1.0}},
            "moves.start.sick_tx",
            "'start' is not allowed in 'sick_tx'",
        ),
        (
            {"moves.start.sick": {"sick_tx": 1.0, "dead": "rest", "sick": "rest"}},
            "moves.start.sick",
            "at most one may",
        ),
        (
            {"under_action.continue.sick_tx": {"price": 3.0}},
            "under_action.continue.sick_tx.price",
            "unknown field 'price'",
        ),
        (
            {"under_action.continue.nowhere": {"cost": 3.0}},
            "under_action.continue.nowhere",
            "unknown state",
        ),
    ],
)
def test_structural_errors_name_the_place(changes, where, message):
    with pytest.raises(ModelError) as error:
        load_dict(_model(**changes))
    text = str(error.value)
    assert where in text and message in text


def test_destination_without_rows_for_the_cycle_is_refused():
    # sick_tx allows two actions, neither of them "start": whose rows apply after the move?
    data = _model()
    data["actions"].append({"id": "stop", "allowed_in": ["sick_tx"]})
    data["transitions"]["stop"] = {"sick_tx": {"dead": 0.2, "sick_tx": "rest"}}
    with pytest.raises(ModelError, match=r"moves\.start\.sick\.sick_tx.*single action there"):
        load_dict(data)


def test_shares_must_sum_to_one():
    with pytest.raises(ModelError, match=r"moves\.start\.sick.*shares sum to 0\.5.*expected 1"):
        load_dict(_model(**{"moves.start.sick": {"sick_tx": 0.5}}))


def test_share_outside_zero_one_is_refused():
    data = _model(**{"moves.start.sick": {"sick_tx": 1.5, "sick": "rest"}})
    data["transitions"]["start"] = {"sick": {"dead": 0.4, "sick": "rest"}}  # a share stays
    with pytest.raises(ModelError, match=r"moves\.start\.sick\.sick_tx.*share in \[0, 1\]"):
        load_dict(data)


def test_negative_cost_under_an_action_is_refused():
    with pytest.raises(ModelError, match=r"under_action\.continue\.sick_tx\.cost.*cost >= 0"):
        load_dict(_model(**{"under_action.continue.sick_tx": {"cost": -5.0}}))


def test_a_chained_move_is_refused():
    data = _model()
    data["actions"][1]["allowed_in"] = ["sick", "sick_tx"]
    data["moves"]["start"]["sick_tx"] = {"dead": 1.0}
    with pytest.raises(ModelError, match=r"moves\.start\.sick\.sick_tx.*itself moved"):
        load_dict(data)


def test_a_format_one_cost_by_cycle_warns_what_cycle_means_now():
    from caredecide.modelfile import validate_model

    # A format-1 file: costs were read at boundaries then, so the meaning may be misread.
    data = _model(**{"settings.within_cycle": "end", "format": 1})
    warnings = validate_model(load_dict(data))
    where = [w.where for w in warnings]
    assert "under_action.continue.sick_tx.cost" in where
    text = next(w.message for w in warnings if w.where == "under_action.continue.sick_tx.cost")
    assert "'cycle < 2' means the first two cycles" in text and "'end'" in text
    # Start-of-cycle counting: the value and the count fall on the same boundary; no warning.
    warnings = validate_model(load_dict(_model(format=1)))
    assert "under_action.continue.sick_tx.cost" not in [w.where for w in warnings]
    # A format-2 file is written for the one meaning documented now; no warning.
    warnings = validate_model(load_dict(_model(**{"settings.within_cycle": "end"})))
    assert "under_action.continue.sick_tx.cost" not in [w.where for w in warnings]


def _moves_by_the_formula(P, M, allowed, absorbing):
    """Plain reference: every row of ``P`` replaced by ``sum_j M[a, s, j] P[rows[a, j], j]``
    (the definition of a decision-time move; rows without a move have M = identity)."""
    from caredecide.compile import rows_after_move

    rows = rows_after_move(allowed, absorbing)
    n_actions, n_states = allowed.shape[1], allowed.shape[0]
    M = np.broadcast_to(M, P.shape)
    out = np.empty_like(P)
    for a in range(n_actions):
        for s in range(n_states):
            out[:, :, a, s] = sum(
                M[:, :, a, s, j, None] * P[:, :, rows[a, j], j] for j in range(n_states)
            )
    return out


@pytest.mark.parametrize("in_place", [False, True])
@pytest.mark.parametrize("chained", [False, True])
def test_apply_moves_matches_the_formula_in_place_or_not(in_place, chained):
    # Random rows and shares (invented); with ``chained`` a moved row is also a
    # destination of another move, so it must be read before it is replaced.
    from caredecide.compile import apply_moves

    rng = np.random.default_rng(5)
    n_draws, tp, n_actions, n_states = 3, 4, 2, 4
    P = rng.dirichlet(np.ones(n_states), size=(n_draws, tp, n_actions, n_states))
    M = np.broadcast_to(np.eye(n_states), (n_draws, 1, n_actions, n_states, n_states)).copy()
    M[:, 0, 1, 0] = rng.dirichlet(np.ones(2), size=n_draws) @ np.eye(n_states)[[1, 2]]
    if chained:  # action 1 moves state 1 (a destination above) to state 0 (moved too)
        M[:, 0, 1, 1] = np.eye(n_states)[0]
    allowed = np.ones((n_states, n_actions), dtype=bool)
    absorbing = np.zeros(n_states, dtype=bool)
    expected = _moves_by_the_formula(P, M, allowed, absorbing)
    given = P.copy()
    out = apply_moves(given, M, allowed, absorbing, in_place=in_place)
    np.testing.assert_allclose(out, expected, rtol=0.0, atol=1e-15)
    if in_place:
        assert out is given
    else:
        np.testing.assert_array_equal(given, P)  # the input is left as it was
