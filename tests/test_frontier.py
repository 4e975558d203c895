"""The policy frontier over willingness to pay: exact switch points, found between grid values."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.compile import compile_model
from caredecide.errors import ModelError
from caredecide.frontier import FOUND_GRID, FOUND_REFINEMENT, policy_frontier
from caredecide.incremental import incremental_analysis
from caredecide.modelfile import load_model
from caredecide.objective import Objective
from caredecide.solvers import solve
from caredecide.strategies import computed, resolve_strategy, strategy_totals
from synthetic_cohort import demo_model_path
from tests.test_solvers_models import make_compiled
from tests.test_strategies import two_state


def test_hand_derived_switch_points_found_from_a_two_point_grid():
    # alive/dead over 2 cycles with the trapezoid weights (1/2, 1, 1/2) (half-cycle
    # correction, Elbasha & Chhatwal 2016). Waiting: survival 0.5 per cycle; treating:
    # 0.75; treatment costs 100 per treated person; 1 QALY per cycle alive.
    #   wait, wait:   QALYs 0.5 + 0.5  + 0.5 x 0.25   = 1.125,   cost 0
    #   treat, wait:  QALYs 0.5 + 0.75 + 0.5 x 0.375  = 1.4375,  cost 100
    #   treat, treat: QALYs 0.5 + 0.75 + 0.5 x 0.5625 = 1.53125, cost 100 + 75 = 175
    # Switch points = ICERs of neighbours (Cantor 1994): 100 / 0.3125 = 320 and
    # 75 / 0.09375 = 800. A grid of just the two ends (0 and 2000) sees only the first
    # and last policy: the middle one must be found by the refinement.
    compiled = two_state("trapezoid")
    frontier = policy_frontier(compiled, (0.0, 2000.0), grid=2)
    table = frontier.table
    assert list(table["policy"]) == ["P1", "P2", "P3"]
    np.testing.assert_allclose(table["wtp_from"], [0.0, 320.0, 800.0], rtol=1e-12)
    np.testing.assert_allclose(table["wtp_to"], [320.0, 800.0, 2000.0], rtol=1e-12)
    np.testing.assert_allclose(table["qalys"], [1.125, 1.4375, 1.53125], rtol=1e-14)
    np.testing.assert_allclose(table["cost"], [0.0, 100.0, 175.0], rtol=1e-14, atol=1e-12)
    assert list(table["found_by"]) == [FOUND_GRID, FOUND_REFINEMENT, FOUND_GRID]
    np.testing.assert_array_equal(frontier.policies["P2"][:, 0], [1, 0])  # treat, then wait
    np.testing.assert_allclose(frontier.switches["wtp"], [320.0, 800.0], rtol=1e-12)
    np.testing.assert_allclose(
        frontier.switches["nmb_from"], frontier.switches["nmb_to"], rtol=1e-12
    )


def test_switch_points_are_the_icers_of_the_incremental_frontier():
    # Cantor 1994: the strategy with the highest NMB at lambda is the frontier strategy
    # with the largest ICER not above lambda, so the WTP switch points must equal the
    # ICERs of the frontier policies in the incremental table.
    compiled = compile_model(load_model(demo_model_path()))
    frontier = policy_frontier(compiled, (0.0, 60000.0))
    resolved = [
        resolve_strategy(compiled, computed(label, policy))
        for label, policy in frontier.policies.items()
    ]
    frame, _, _ = strategy_totals(compiled, resolved, Objective("net_benefit", 0.0))
    table = incremental_analysis(frame)
    assert table["on_frontier"].all()
    np.testing.assert_allclose(table["icer"].to_numpy()[1:], frontier.switches["wtp"], rtol=1e-9)


def test_grid_size_does_not_change_the_frontier():
    compiled = compile_model(load_model(demo_model_path()))
    coarse = policy_frontier(compiled, (0.0, 60000.0), grid=3)
    fine = policy_frontier(compiled, (0.0, 60000.0), grid=41)
    assert len(coarse.table) == len(fine.table)
    np.testing.assert_allclose(coarse.switches["wtp"], fine.switches["wtp"], rtol=1e-9)
    assert (coarse.table["found_by"] == FOUND_REFINEMENT).sum() > (
        fine.table["found_by"] == FOUND_REFINEMENT
    ).sum()


def _random_model(seed: int, n_states: int, n_cycles: int | None):
    rng = np.random.default_rng(seed)
    A = 3
    shape = (n_cycles if n_cycles else 1, A, n_states, n_states)
    P = rng.random(shape) ** 2
    P[:, :, -1] = np.eye(n_states)[-1]
    P /= P.sum(-1, keepdims=True)
    n_q = n_cycles + 1 if n_cycles else 1
    allowed = np.ones((n_states, A), bool)
    allowed[0, 2] = False
    return make_compiled(
        P,
        state_qaly=rng.uniform(0, 1, (n_q, n_states)) * (np.arange(n_states) < n_states - 1),
        state_cost=rng.uniform(0, 1000, (n_q, n_states)),
        decision_cost=rng.uniform(0, 3000, (n_q if n_cycles is None else n_cycles, n_states, A)),
        decision_qaly=rng.uniform(0, 0.2, (n_q if n_cycles is None else n_cycles, n_states, A)),
        allowed=allowed,
        n_cycles=n_cycles,
        start_distribution=np.append(rng.dirichlet(np.ones(n_states - 1)), 0.0),
        discount_outcomes=0.04,
        discount_costs=0.04 if n_cycles is None else 0.06,
        within_cycle="trapezoid" if n_cycles else "start",
        absorbing=np.arange(n_states) == n_states - 1,
    )


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(3, 6),
    n_cycles=st.one_of(st.none(), st.integers(1, 6)),
    grid=st.integers(2, 6),
)
def test_switch_points_equal_nmb_and_nothing_better(seed, n_states, n_cycles, grid):
    compiled = _random_model(seed, n_states, n_cycles)
    high = 50000.0
    frontier = policy_frontier(compiled, (0.0, high), grid=grid)
    table, switches = frontier.table, frontier.switches
    assert frontier.success
    # The intervals tile [0, high] in order, and each switch joins neighbours.
    assert table["wtp_from"].iloc[0] == 0.0 and table["wtp_to"].iloc[-1] == high
    np.testing.assert_array_equal(table["wtp_to"].to_numpy()[:-1], table["wtp_from"].to_numpy()[1:])
    np.testing.assert_array_equal(switches["from_policy"], table["policy"].to_numpy()[:-1])
    np.testing.assert_array_equal(switches["to_policy"], table["policy"].to_numpy()[1:])
    if switches.empty:
        return
    scale = 1e-8 * (1.0 + np.abs(switches[["nmb_from", "nmb_to"]].to_numpy()).max())
    # At each switch point both neighbours have equal NMB...
    np.testing.assert_allclose(switches["nmb_from"], switches["nmb_to"], atol=scale)
    # ...and no policy is better there: the optimum solved afresh at that WTP is no higher.
    for wtp, nmb in zip(switches["wtp"], switches["nmb_from"], strict=True):
        optimal = solve(compiled, Objective("net_benefit", float(wtp)))
        best = optimal.expected_value(compiled.start_distribution)[0]
        assert best <= nmb + scale


@pytest.mark.parametrize(
    ("wtp_range", "pattern"),
    [
        ((100.0, 100.0), r"wtp_range: range \(100, 100\) is not allowed; expected finite 0 <= low"),
        ((-5.0, 100.0), r"range \(-5, 100\) is not allowed"),
        ((0.0, float("inf")), r"range \(0, inf\) is not allowed"),
        (("a", 3), r"value \('a', 3\) is not a pair of numbers"),
    ],
)
def test_bad_wtp_range(wtp_range, pattern):
    with pytest.raises(ModelError, match=pattern):
        policy_frontier(two_state(), wtp_range)


def test_grid_needs_two_values():
    with pytest.raises(ModelError, match=r"grid: value 1 is not allowed; expected an integer >= 2"):
        policy_frontier(two_state(), (0.0, 10.0), grid=1)


def test_single_policy_over_the_whole_range():
    frontier = policy_frontier(two_state("trapezoid"), (0.0, 300.0), grid=5)
    assert list(frontier.table["policy"]) == ["P1"] and frontier.switches.empty
    assert frontier.rounds == 0
