"""Tests of acceptability curves and frontier, action shares and running means.

Sources: acceptability curve, van Hout et al. 1994, Health Econ 3(5):309-319 (from
memory); acceptability frontier, Fenwick, Claxton & Sculpher 2001, Health Econ
10(8):779-787 (from memory); binomial standard error sqrt(p(1-p)/n), common practice.
Draws are synthetic.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from caredecide.errors import ModelError
from caredecide.uncertainty.acceptability import (
    acceptability_curve,
    acceptability_frontier,
    action_shares,
    evpi_curve,
    running_mean,
)
from caredecide.uncertainty.voi import evpi

# Four synthetic draws of two strategies.
COSTS = np.array([[100.0, 300.0], [200.0, 250.0], [150.0, 500.0], [120.0, 180.0]])
QALYS = np.array([[1.0, 1.01], [1.0, 1.02], [1.0, 1.03], [1.0, 0.99]])


def test_curve_by_hand():
    # Source: van Hout et al. 1994 (from memory): P(k has the highest lambda E - C).
    curve = acceptability_curve(COSTS, QALYS, [0.0, 10_000.0, 20_000.0], strategies=["a", "b"])
    assert list(curve.columns) == ["wtp", "strategy", "probability_cost_effective", "mc_se"]
    p = curve.pivot(index="wtp", columns="strategy", values="probability_cost_effective")
    # lambda = 0: a is cheaper in all 4 draws -> P(a) = 1.
    assert p.loc[0.0, "a"] == 1.0
    # lambda = 10000, NMB b - a per draw: 100-200 = -100, 200-50 = 150, 300-350 = -50,
    # -100-60 = -160 -> b best in 1 of 4 draws: P(a) = 0.75.
    assert p.loc[10_000.0, "a"] == 0.75
    # lambda = 20000: 200-200 = 0 (tie, half each), 400-50 = 350, 600-350 = 250,
    # -200-60 = -260 -> P(a) = (0.5 + 0 + 0 + 1)/4 = 0.375.
    assert p.loc[20_000.0, "a"] == 0.375
    assert p.loc[20_000.0, "b"] == 0.625
    # Binomial SE: sqrt(0.375 * 0.625 / 4) = 0.2420615.
    se = curve.set_index(["wtp", "strategy"]).loc[(20_000.0, "a"), "mc_se"]
    assert se == pytest.approx(np.sqrt(0.375 * 0.625 / 4))


def test_frontier_by_hand():
    # Source: Fenwick, Claxton & Sculpher 2001 (from memory): the strategy with the highest
    # expected NMB. Means: cost a 142.5, b 307.5; QALYs a 1.0, b 1.0125.
    # Expected NMB b - a = 0.0125 lambda - 165: switch at lambda = 13200.
    frontier = acceptability_frontier(
        COSTS, QALYS, [0.0, 13_199.0, 13_201.0, 20_000.0], strategies=["a", "b"]
    )
    assert list(frontier["strategy"]) == ["a", "a", "b", "b"]
    # lambda = 20000: b's expected NMB = 20000 * 1.0125 - 307.5 = 19942.5, P(b) = 0.625.
    last = frontier.iloc[-1]
    assert last["expected_net_benefit"] == pytest.approx(19_942.5)
    assert last["probability_cost_effective"] == 0.625
    assert last["mc_se"] == pytest.approx(np.sqrt(0.625 * 0.375 / 4))


def test_frontier_can_differ_from_most_likely():
    # Skewed draws: b is cost effective in 9 of 10 draws by a little and loses a lot in
    # one; a has the higher expected NMB (Fenwick et al. 2001, from memory).
    qalys = np.zeros((10, 2))
    costs = np.column_stack([np.zeros(10), np.r_[np.full(9, -10.0), 1000.0]])
    curve = acceptability_curve(costs, qalys, [0.0], strategies=["a", "b"])
    frontier = acceptability_frontier(costs, qalys, [0.0], strategies=["a", "b"])
    assert curve["probability_cost_effective"].tolist() == [0.1, 0.9]
    assert frontier["strategy"].tolist() == ["a"]
    assert frontier["probability_cost_effective"].tolist() == [0.1]


_draws = st.integers(1, 30).flatmap(
    lambda d: st.integers(1, 4).flatmap(
        lambda k: st.tuples(
            arrays(np.float64, (d, k), elements=st.integers(0, 20).map(lambda v: 50.0 * v)),
            arrays(np.float64, (d, k), elements=st.integers(0, 20).map(lambda v: 0.1 * v)),
        )
    )
)


@settings(max_examples=150, deadline=None)
@given(_draws, st.lists(st.floats(0.0, 1e5), min_size=1, max_size=5, unique=True))
def test_curve_probabilities_sum_to_one(draws, grid):
    # Common practice: at each lambda exactly one strategy is best per draw (ties split).
    costs, qalys = draws
    curve = acceptability_curve(costs, qalys, grid)
    sums = curve.groupby("wtp", sort=False)["probability_cost_effective"].sum()
    np.testing.assert_allclose(sums.to_numpy(), 1.0)
    assert curve["probability_cost_effective"].between(0.0, 1.0).all()
    p = curve["probability_cost_effective"].to_numpy()
    np.testing.assert_allclose(curve["mc_se"], np.sqrt(p * (1 - p) / costs.shape[0]))


@settings(max_examples=150, deadline=None)
@given(_draws, st.lists(st.integers(0, 40).map(lambda v: 500.0 * v), min_size=1, max_size=5))
def test_curve_equals_a_draw_by_draw_count_with_ties_split(draws, grid):
    # The definition (van Hout et al. 1994; ties split equally, common practice), one draw
    # at a time; the values on grids of 50 and 0.1 tie often.
    costs, qalys = draws
    curve = acceptability_curve(costs, qalys, grid)
    n_draws, n_strategies = costs.shape
    for row, lam in enumerate(grid):
        shares = np.zeros(n_strategies)
        for draw in range(n_draws):
            nmb = [lam * qalys[draw, k] - costs[draw, k] for k in range(n_strategies)]
            best = [k for k in range(n_strategies) if nmb[k] == max(nmb)]
            for k in best:
                shares[k] += 1.0 / len(best) / n_draws
        got = curve["probability_cost_effective"].to_numpy()[
            row * n_strategies : (row + 1) * n_strategies
        ]
        np.testing.assert_allclose(got, shares, rtol=1e-12, atol=1e-15)


@settings(max_examples=100, deadline=None)
@given(_draws, st.floats(0.0, 1e5))
def test_frontier_has_highest_expected_nmb(draws, wtp):
    costs, qalys = draws
    frontier = acceptability_frontier(costs, qalys, [wtp])
    expected = wtp * qalys.mean(axis=0) - costs.mean(axis=0)
    assert frontier["expected_net_benefit"].iloc[0] == pytest.approx(expected.max(), abs=1e-6)


def test_evpi_curve_by_hand():
    # Claxton 1999 (from memory) at lambda = 20000 on the hand example: NMB b - a per draw
    # 0, 350, 250, -260; expected NMB b > a, so the loss is max(0, a - b): 0, 0, 0, 260
    # -> EVPI = 260 / 4 = 65.
    curve = evpi_curve(COSTS, QALYS, [0.0, 20_000.0])
    assert curve["evpi"].tolist() == pytest.approx([0.0, 65.0])
    assert curve["mc_se"].iloc[1] == pytest.approx(np.std([0, 0, 0, 260], ddof=1) / 2)


@settings(max_examples=50, deadline=None)
@given(_draws, st.floats(0.0, 1e5))
def test_evpi_curve_matches_evpi(draws, wtp):
    # One estimator: the curve at lambda equals evpi() of the NMB at lambda.
    costs, qalys = draws
    curve = evpi_curve(costs, qalys, [wtp])
    direct = evpi(wtp * qalys - costs)
    scale = 1.0 + np.abs(wtp * qalys - costs).max()
    assert curve["evpi"].iloc[0] == pytest.approx(float(direct), abs=1e-9 * scale)


# --- action shares ------------------------------------------------------------------


def test_action_shares_by_hand():
    # 3 draws, 1 cycle, 2 states: state 0 takes actions 0, 1, 0 -> shares 2/3, 1/3;
    # state 1 takes 1, 1, 0 -> 1/3, 2/3. SE sqrt((2/3)(1/3)/3) = 0.2721655.
    policies = np.array([[[0, 1]], [[1, 1]], [[0, 0]]])
    result = action_shares(policies, 2)
    np.testing.assert_allclose(result.share, [[[2 / 3, 1 / 3], [1 / 3, 2 / 3]]])
    np.testing.assert_allclose(result.standard_error, np.sqrt(2 / 9 / 3))
    share, se = result  # unpacks like a tuple
    assert share.shape == se.shape == (1, 2, 2)


@settings(max_examples=100, deadline=None)
@given(
    st.integers(1, 3).flatmap(
        lambda a: st.tuples(
            st.just(a),
            arrays(
                np.int64,
                st.tuples(st.integers(1, 20), st.integers(1, 4), st.integers(1, 4)),
                elements=st.integers(0, a - 1),
            ),
        )
    )
)
def test_action_shares_sum_to_one_and_count(args):
    n_actions, policies = args
    result = action_shares(policies, n_actions)
    np.testing.assert_allclose(result.share.sum(axis=2), 1.0)
    # Cross-check one cell against a direct count.
    t, s = policies.shape[1] - 1, policies.shape[2] - 1
    direct = np.array([(policies[:, t, s] == a).mean() for a in range(n_actions)])
    np.testing.assert_allclose(result.share[t, s], direct)


# --- running mean -------------------------------------------------------------------


def test_running_mean_by_hand():
    # 1, 2, 3, 4: means 1, 1.5, 2, 2.5; SE at n = 4: sd = sqrt(5/3) -> 1.2910/2 = 0.6454972.
    frame = running_mean([1.0, 2.0, 3.0, 4.0])
    assert frame["n"].tolist() == [1, 2, 3, 4]
    np.testing.assert_allclose(frame["mean"], [1.0, 1.5, 2.0, 2.5])
    assert np.isnan(frame["se"].iloc[0])
    assert frame["se"].iloc[-1] == pytest.approx(np.sqrt(5.0 / 3.0) / 2.0)


@settings(max_examples=100, deadline=None)
@given(arrays(np.float64, st.integers(2, 60), elements=st.floats(-1e6, 1e6)))
def test_running_mean_matches_prefix_statistics(values):
    frame = running_mean(values)
    for n in (2, len(values) // 2 + 1, len(values)):
        prefix = values[:n]
        scale = 1.0 + np.abs(values).max()
        assert frame["mean"].iloc[n - 1] == pytest.approx(prefix.mean(), abs=1e-9 * scale)
        expected = prefix.std(ddof=1) / np.sqrt(n)
        assert frame["se"].iloc[n - 1] == pytest.approx(expected, abs=1e-6 * scale)


# --- one error test per validation rule ----------------------------------------------


def test_error_costs_not_2d():
    with pytest.raises(ModelError, match=r"costs: expected a non-empty \(draws, strategies\)"):
        acceptability_curve(np.ones(3), np.ones(3), [0.0])


def test_error_costs_not_numeric():
    with pytest.raises(ModelError, match="costs: expected a"):
        acceptability_curve([["x"]], [[1.0]], [0.0])


def test_error_qalys_nan_names_draw():
    qalys = np.ones((3, 2))
    qalys[1, 0] = np.nan
    with pytest.raises(ModelError, match=r"qalys\[draw 1, strategy 0\]: value nan"):
        acceptability_curve(np.ones((3, 2)), qalys, [0.0])


def test_error_shape_mismatch():
    with pytest.raises(ModelError, match=r"qalys: expected the shape of costs \(3, 2\)"):
        acceptability_frontier(np.ones((3, 2)), np.ones((3, 3)), [0.0])


@pytest.mark.parametrize("grid", [[], [-1.0], [np.nan], [[1.0]]])
def test_error_bad_wtp_grid(grid):
    with pytest.raises(ModelError, match="wtp_grid: expected a non-empty 1-D list"):
        acceptability_curve(np.ones((3, 2)), np.ones((3, 2)), grid)


@pytest.mark.parametrize("names", [["a"], ["a", "a"]])
def test_error_strategy_names(names):
    with pytest.raises(ModelError, match="strategies: expected 2 unique names"):
        acceptability_curve(np.ones((3, 2)), np.ones((3, 2)), [0.0], strategies=names)


def test_error_policies_not_3d():
    with pytest.raises(ModelError, match=r"policies: expected a \(draws, cycles, states\)"):
        action_shares(np.zeros((3, 2), dtype=int), 2)


def test_error_policies_not_integer():
    with pytest.raises(ModelError, match="expected integer action indices, got dtype float64"):
        action_shares(np.zeros((3, 2, 2)), 2)


def test_error_policy_action_out_of_range():
    policies = np.zeros((3, 2, 2), dtype=int)
    policies[2, 1, 0] = 5
    with pytest.raises(ModelError, match=r"policies\[draw 2, cycle 1, state 0\]: action index 5"):
        action_shares(policies, 2)


@pytest.mark.parametrize("n_actions", [0, 1.5, True])
def test_error_n_actions(n_actions):
    with pytest.raises(ModelError, match="n_actions: expected an integer >= 1"):
        action_shares(np.zeros((1, 1, 1), dtype=int), n_actions)


def test_error_running_mean_shape():
    with pytest.raises(ModelError, match=r"values: expected a 1-D array .* got shape \(2, 2\)"):
        running_mean(np.ones((2, 2)))


def test_error_running_mean_not_finite():
    with pytest.raises(ModelError, match=r"values\[draw 1\]: value inf is not finite"):
        running_mean([1.0, np.inf])
