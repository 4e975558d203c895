"""Within-cycle methods on one small worked example, derived by hand (docs/model-file.md table).

The example: one alive state and death; half the living die each cycle (m_0 = 1, m_1 = 0.5,
m_2 = 0.25); a cost of 100 per cycle alive; 2 cycles; costs discounted at 10% per cycle
(d = 1/1.1). Each method's total is written out with its arithmetic.
"""

from __future__ import annotations

import numpy as np
import pytest

from caredecide.compiled import (
    STATIONARY_METHODS,
    WITHIN_CYCLE_METHODS,
    boundary_weights,
    cycle_weights,
    stationary_cycle_weights,
)
from caredecide.evaluate import evaluate_policy
from caredecide.objective import Objective
from tests.test_solvers_models import make_compiled

QALYS = Objective("qalys")

# Hand-derived totals (undiscounted boundary occupancies 1, 0.5, 0.25; d = 1/1.1):
WORKED = {
    # start (left sum, Sonnenberg & Beck 1993 count at the start of each cycle):
    #   100 (1 + 0.5 / 1.1) = 145.454545...
    "start": 100 * (1 + 0.5 / 1.1),
    # end (right sum): 100 (0.5 / 1.1 + 0.25 / 1.21) = 66.115702...
    "end": 100 * (0.5 / 1.1 + 0.25 / 1.21),
    # trapezoid, each boundary at its own time (Elbasha & Chhatwal 2016):
    #   cycle 0: 50 (1 + 0.5 / 1.1); cycle 1: 50 (0.5 / 1.1 + 0.25 / 1.21) -> 105.785124...
    "trapezoid": 50 * (1 + 0.5 / 1.1) + 50 * (0.5 / 1.1 + 0.25 / 1.21),
    # half_cycle, the textbook correction: cycle average discounted once at the cycle end
    # (Sonnenberg & Beck 1993; Siebert et al. 2012):
    #   100 (0.75 / 1.1 + 0.375 / 1.21) = 99.173553...
    "half_cycle": 100 * (0.75 / 1.1 + 0.375 / 1.21),
    # Simpson 1/3 over the two cycles (Elbasha & Chhatwal 2016): weights 1/3, 4/3, 1/3
    #   100 (1/3 + 4/3 x 0.5 / 1.1 + 1/3 x 0.25 / 1.21) = 100.826446...
    "simpson": 100 * (1 / 3 + 4 / 3 * 0.5 / 1.1 + 1 / 3 * 0.25 / 1.21),
}


def _halving(method: str, n_cycles: int | None = 2):
    return make_compiled(
        np.array([[[0.5, 0.5], [0.0, 1.0]]]),
        state_cost=[100.0, 0.0],
        n_cycles=n_cycles,
        within_cycle=method,
        absorbing=[False, True],
        discount_costs=0.1,
        discount_outcomes=0.1,
    )


@pytest.mark.parametrize("method", WITHIN_CYCLE_METHODS)
def test_worked_example_by_method(method):
    outcome = evaluate_policy(_halving(method), 0, QALYS)
    assert outcome.costs[0] == pytest.approx(WORKED[method], rel=1e-12)
    # Undiscounted, the cycle average and the trapezoid agree: 50 (1 + 0.5) + 50 (0.5 + 0.25).
    if method in ("trapezoid", "half_cycle"):
        assert outcome.costs_undiscounted[0] == pytest.approx(112.5, rel=1e-12)


def test_worked_figures_as_printed_in_the_docs():
    # The docs table rounds to two decimals; keep the two in step.
    printed = {
        "start": 145.45,
        "end": 66.12,
        "trapezoid": 105.79,
        "half_cycle": 99.17,
        "simpson": 100.83,
    }
    assert {k: round(v, 2) for k, v in WORKED.items()} == printed


@pytest.mark.parametrize("method", STATIONARY_METHODS)
def test_infinite_horizon_weights_agree_with_a_long_finite_horizon(method):
    # The stationary weights are the finite ones without d^t: a 400-cycle horizon (0.5^400 left
    # alive) gives the infinite-horizon total to rounding.
    infinite = evaluate_policy(_halving(method, None), 0, QALYS)
    finite = evaluate_policy(_halving(method, 400), 0, QALYS)
    assert infinite.costs[0] == pytest.approx(finite.costs[0], rel=1e-12)
    # Closed form, start: 100 / (1 - 0.5 d) with d = 1/1.1 -> 100 / (1 - 0.5/1.1) = 183.33...
    if method == "start":
        assert infinite.costs[0] == pytest.approx(100 / (1 - 0.5 / 1.1), rel=1e-12)


def test_boundary_weights_are_the_classic_ones():
    # Common practice: left sum 1..1,0; right sum 0,1..1; trapezoid 1/2,1..1,1/2; Simpson 1/3 rule
    # 1/3, 4/3, 2/3, 4/3, 1/3 (Elbasha & Chhatwal 2016); the cycle average undiscounted = trapezoid.
    np.testing.assert_allclose(boundary_weights("start", 3), [1, 1, 1, 0])
    np.testing.assert_allclose(boundary_weights("end", 3), [0, 1, 1, 1])
    np.testing.assert_allclose(boundary_weights("trapezoid", 3), [0.5, 1, 1, 0.5])
    np.testing.assert_allclose(boundary_weights("half_cycle", 3), [0.5, 1, 1, 0.5])
    np.testing.assert_allclose(boundary_weights("simpson", 4), [1 / 3, 4 / 3, 2 / 3, 4 / 3, 1 / 3])
    # Odd count: 1/3 rule on the first two cycles, 3/8 rule (3/8, 9/8, 9/8, 3/8) on the last three.
    np.testing.assert_allclose(
        boundary_weights("simpson", 5), [1 / 3, 4 / 3, 1 / 3 + 3 / 8, 9 / 8, 9 / 8, 3 / 8]
    )


def test_half_cycle_discounts_both_halves_at_the_cycle_end():
    d = 1 / 1.05
    start, end = cycle_weights("half_cycle", 3, d)
    np.testing.assert_allclose(start, 0.5 * d ** np.arange(1, 4))
    np.testing.assert_allclose(end, 0.5 * d ** np.arange(1, 4))
    trap_start, trap_end = cycle_weights("trapezoid", 3, d)
    np.testing.assert_allclose(trap_start, 0.5 * d ** np.arange(3))
    np.testing.assert_allclose(trap_end, end)
    assert stationary_cycle_weights("half_cycle", d) == pytest.approx((0.5 * d, 0.5 * d))


def test_simpson_has_no_stationary_form():
    with pytest.raises(ValueError, match="'simpson' needs a finite horizon"):
        stationary_cycle_weights("simpson", 0.9)


def test_unknown_method_is_named():
    with pytest.raises(ValueError, match="'midpoint' is unknown"):
        cycle_weights("midpoint", 3)


def test_cycle_in_a_cost_means_the_cycle_as_in_the_transitions():
    # One meaning of `cycle` (docs/model-file.md timeline): a cost written when(cycle < 2, ...)
    # is paid in cycles 0 and 1. End-of-cycle counting, 3 cycles, half dying each cycle, no
    # discount: the cost is counted at the ends of cycles 0 and 1, boundaries 1 and 2:
    #   100 x 0.5 + 100 x 0.25 = 75 (read at boundary indices it would be 100 x 0.5 = 50).
    from caredecide.compile import compile_model
    from tests.conftest import load_dict

    data = {
        "format": 2,
        "title": "Synthetic test model",
        "settings": {
            "cycle_years": 1.0,
            "horizon_cycles": 3,
            "start": "alive",
            "objective": "qalys",
            "within_cycle": "end",
        },
        "states": [
            {"id": "alive", "qaly_weight": 1.0, "cost": "when(cycle < 2, 100, 0)"},
            {"id": "dead", "absorbing": True},
        ],
        "actions": [{"id": "wait"}],
        "transitions": {"wait": {"alive": {"dead": "when(cycle < 2, 0.5, 1)", "alive": "rest"}}},
        "parameters": {},
    }
    outcome = evaluate_policy(compile_model(load_dict(data)), 0, QALYS)
    assert outcome.costs[0] == pytest.approx(75.0, rel=1e-12)
    # The transition used the same cycles: half die in cycles 0 and 1, everyone in cycle 2.
    np.testing.assert_allclose(outcome.trace[0, :, 0], [1.0, 0.5, 0.25, 0.0])
