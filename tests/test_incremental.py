"""Tests of the incremental cost-effectiveness analysis (Cantor 1994 rules).

The worked example is a synthetic scenario of our own; the arithmetic is shown beside
each expected value. Rules: Cantor 1994, Med Decis Making 14(3):259-265.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from caredecide.errors import ModelError
from caredecide.incremental import best_at_wtp, incremental_analysis, net_monetary_benefit

# Synthetic strategies (demo numbers, not from any study).
EXAMPLE = pd.DataFrame(
    {
        "strategy": ["A", "B", "C", "D", "E", "F", "G"],
        "cost": [1000.0, 3000.0, 4000.0, 6000.0, 7000.0, 3000.0, 1000.0],
        "qalys": [5.0, 5.5, 5.4, 5.6, 6.0, 5.5, 4.8],
        "label": ["a", "b", "c", "d", "e", "f", "g"],
    }
)


def _row(result: pd.DataFrame, name: str) -> pd.Series:
    return result.set_index("strategy").loc[name]


def test_worked_example_statuses_and_icers():
    # Source: Cantor 1994, Med Decis Making 14(3):259-265 (rules); numbers our own.
    result = incremental_analysis(EXAMPLE.iloc[::-1])
    # Sorted by cost, ties by more QALYs first, then name: A(1000, 5.0) before G(1000, 4.8),
    # B before F (identical), then C, D, E.
    assert list(result["strategy"]) == ["A", "G", "B", "F", "C", "D", "E"]
    assert list(result["label"]) == ["a", "g", "b", "f", "c", "d", "e"]  # extra column kept
    expected_status = {
        "A": "on frontier",
        "G": "dominated by A",  # same cost 1000, 4.8 < 5.0 QALYs
        "B": "on frontier",
        "F": "identical to B",  # 3000 and 5.5 like B; B comes first by name
        "C": "dominated by B",  # 4000 > 3000 and 5.4 < 5.5: negative incremental effect
        # D vs B: (6000-3000)/(5.6-5.5) = 30000 > E vs D: (7000-6000)/(6.0-5.6) = 2500
        "D": "extendedly dominated by B and E",
        "E": "on frontier",
    }
    assert dict(zip(result["strategy"], result["status"], strict=True)) == expected_status
    assert list(result.loc[result["on_frontier"], "strategy"]) == ["A", "B", "E"]
    # B vs A: (3000-1000)/(5.5-5.0) = 2000/0.5 = 4000 per QALY.
    b = _row(result, "B")
    assert b["reference"] == "A"
    assert b["incremental_cost"] == pytest.approx(2000.0)
    assert b["incremental_qalys"] == pytest.approx(0.5)
    assert b["icer"] == pytest.approx(4000.0)
    # E vs B after D leaves: (7000-3000)/(6.0-5.5) = 4000/0.5 = 8000 per QALY.
    e = _row(result, "E")
    assert e["reference"] == "B"
    assert e["icer"] == pytest.approx(8000.0)
    # D reported against B: (6000-3000)/(5.6-5.5) = 30000 per QALY.
    assert _row(result, "D")["icer"] == pytest.approx(30000.0)
    a = _row(result, "A")
    assert a["reference"] is None and np.isnan(a["icer"])
    # Dominated rows show their increments against the dominator but no ICER.
    c = _row(result, "C")
    assert c["reference"] == "B"
    assert c["incremental_cost"] == pytest.approx(1000.0)
    assert c["incremental_qalys"] == pytest.approx(-0.1)
    assert np.isnan(c["icer"])
    g = _row(result, "G")
    assert g["incremental_cost"] == 0.0 and g["incremental_qalys"] == pytest.approx(-0.2)
    assert np.isnan(_row(result, "F")["icer"])


@pytest.mark.parametrize(
    ("wtp", "best", "nmb_best"),
    [
        (0.0, "A", -1000.0),  # cheapest wins at lambda = 0
        (3999.0, "A", 3999.0 * 5.0 - 1000.0),  # below B's ICER of 4000
        (4000.0, "A", 19000.0),  # at the ICER: A 4000*5-1000 = 19000 = B 4000*5.5-3000; cheaper
        (6000.0, "B", 30000.0),  # A 29000, B 6000*5.5-3000 = 30000, E 6000*6-7000 = 29000
        (10000.0, "E", 53000.0),  # A 49000, B 52000, E 10000*6-7000 = 53000
    ],
)
def test_best_at_wtp_in_worked_example(wtp, best, nmb_best):
    # Source: NMB = lambda E - C, common practice; ICER thresholds from the worked example.
    result = incremental_analysis(EXAMPLE, willingness_to_pay=wtp)
    assert result.attrs["best_strategy"] == best
    assert list(result.loc[result["best_at_wtp"], "strategy"]) == [best]
    assert _row(result, best)["net_monetary_benefit"] == pytest.approx(nmb_best)


def test_net_monetary_benefit_broadcasts():
    # Common practice: NMB = lambda * QALYs - cost. 20000 * 1.5 - 1000 = 29000.
    assert net_monetary_benefit(1000.0, 1.5, 20000.0) == pytest.approx(29000.0)
    nmb = net_monetary_benefit(
        np.array([1000.0, 3000.0]), np.array([1.0, 1.2]), np.array([[0.0], [10000.0]])
    )
    np.testing.assert_allclose(nmb, [[-1000.0, -3000.0], [9000.0, 9000.0]])


def test_best_at_wtp_vector_and_tie_rule():
    # 9000 = 10000*1.0 - 1000 = 10000*1.2 - 3000: tie goes to the cheaper "x".
    chosen = best_at_wtp(["y", "x"], [3000.0, 1000.0], [1.2, 1.0], [0.0, 10000.0, 20000.0])
    assert list(chosen) == ["x", "x", "y"]
    # lambda = 0 and equal cost: NMB ties, the more effective (non-dominated) "q" wins.
    assert best_at_wtp(["p", "q"], [5.0, 5.0], [1.0, 2.0], 0.0) == "q"
    # Equal cost and QALYs: the first name alphabetically.
    assert best_at_wtp(["b", "a"], [5.0, 5.0], [1.0, 1.0], 100.0) == "a"


def test_single_strategy_is_frontier():
    result = incremental_analysis(
        pd.DataFrame({"strategy": ["only"], "cost": [10.0], "qalys": [1.0]}),
        willingness_to_pay=0.0,
    )
    assert list(result["status"]) == ["on frontier"]
    assert bool(result["best_at_wtp"].iloc[0])


def test_cost_saving_strategy_dominates():
    # "new" costs less and gives more: the other is dominated, no negative ICER anywhere.
    frame = pd.DataFrame({"strategy": ["old", "new"], "cost": [500.0, 200.0], "qalys": [2.0, 2.5]})
    result = incremental_analysis(frame)
    assert dict(zip(result["strategy"], result["status"], strict=True)) == {
        "new": "on frontier",
        "old": "dominated by new",
    }
    assert _row(result, "old")["incremental_cost"] == pytest.approx(300.0)
    assert _row(result, "old")["incremental_qalys"] == pytest.approx(-0.5)


def test_equal_effect_higher_cost_is_dominated():
    frame = pd.DataFrame({"strategy": ["p", "q"], "cost": [100.0, 150.0], "qalys": [3.0, 3.0]})
    assert _row(incremental_analysis(frame), "q")["status"] == "dominated by p"


def test_dominator_named_is_non_dominated():
    # z dominates y, y dominates x: x is reported as dominated by z (the one on the frontier).
    frame = pd.DataFrame(
        {"strategy": ["x", "y", "z"], "cost": [30.0, 20.0, 10.0], "qalys": [1.0, 2.0, 3.0]}
    )
    result = incremental_analysis(frame)
    assert _row(result, "x")["status"] == "dominated by z"
    assert _row(result, "y")["status"] == "dominated by z"


def test_extended_dominance_is_iterated():
    # Points (QALYs, cost): a(0,0), b(1,10), c(1.5,20), d(2,21). ICERs b|a 10, c|b 20,
    # d|c 2: c goes first; then d|b = 11/1 = 11 > b|a = 10, frontier a, b, d.
    # Next example: b(1, 10), c(2, 30), d(3, 40): c|b 20 > d|c 10 -> c out; d|b 15 > b|a 10.
    frame = pd.DataFrame(
        {"strategy": list("abcd"), "cost": [0.0, 10.0, 20.0, 21.0], "qalys": [0.0, 1.0, 1.5, 2.0]}
    )
    result = incremental_analysis(frame)
    assert list(result.loc[result["on_frontier"], "strategy"]) == ["a", "b", "d"]
    assert _row(result, "c")["status"] == "extendedly dominated by b and d"
    assert _row(result, "d")["icer"] == pytest.approx(11.0)
    # Two rounds: b(1, 10) is pushed out after c leaves: a(0,0), b(1,10), c(2,15), d(3,16).
    # ICERs 10, 5, 1: b out first (10 > 5); then c|a = 7.5 > d|c = 1 -> c out; d|a = 16/3.
    frame = pd.DataFrame(
        {"strategy": list("abcd"), "cost": [0.0, 10.0, 15.0, 16.0], "qalys": [0.0, 1.0, 2.0, 3.0]}
    )
    result = incremental_analysis(frame)
    assert list(result.loc[result["on_frontier"], "strategy"]) == ["a", "d"]
    assert _row(result, "b")["status"] == "extendedly dominated by a and d"
    assert _row(result, "c")["status"] == "extendedly dominated by a and d"
    assert _row(result, "d")["icer"] == pytest.approx(16.0 / 3.0)


def test_collinear_strategies_stay_on_frontier():
    # Common practice: equal ICERs (10 and 10) are not extended dominance.
    frame = pd.DataFrame(
        {"strategy": list("abc"), "cost": [0.0, 10.0, 20.0], "qalys": [0.0, 1.0, 2.0]}
    )
    assert incremental_analysis(frame)["on_frontier"].all()


def test_identical_block_of_three():
    frame = pd.DataFrame(
        {"strategy": ["m", "k", "l"], "cost": [1.0, 1.0, 1.0], "qalys": [2.0, 2.0, 2.0]}
    )
    result = incremental_analysis(frame)
    assert list(result["status"]) == ["on frontier", "identical to k", "identical to k"]


# --- properties -------------------------------------------------------------------------

_values = st.lists(
    st.tuples(
        st.integers(min_value=0, max_value=40).map(lambda v: v * 250.0),
        st.integers(min_value=0, max_value=40).map(lambda v: v * 0.05),
    ),
    min_size=1,
    max_size=9,
)


def _frame(values: list[tuple[float, float]]) -> pd.DataFrame:
    return pd.DataFrame(
        {
            "strategy": [f"s{i}" for i in range(len(values))],
            "cost": [v[0] for v in values],
            "qalys": [v[1] for v in values],
        }
    )


@settings(max_examples=150, deadline=None)
@given(_values)
def test_frontier_is_increasing_with_increasing_icers(values):
    # Cantor 1994: along the frontier cost and effect rise and ICERs do not fall.
    result = incremental_analysis(_frame(values))
    front = result[result["on_frontier"]]
    assert (np.diff(front["cost"]) > 0).all()
    assert (np.diff(front["qalys"]) > 0).all()
    icers = front["icer"].to_numpy()[1:]
    assert (np.diff(icers) >= -1e-9 * np.abs(icers[1:])).all()
    assert (result["status"] == "on frontier").sum() == len(front)


@settings(max_examples=150, deadline=None)
@given(_values, st.floats(min_value=0.0, max_value=1e6, allow_nan=False))
def test_best_strategy_is_on_frontier_and_has_max_nmb(values, wtp):
    # Common practice: the NMB-maximising strategy at any lambda >= 0 lies on the frontier.
    result = incremental_analysis(_frame(values), willingness_to_pay=wtp)
    nmb = result["net_monetary_benefit"].to_numpy()
    front_max = nmb[result["on_frontier"].to_numpy()].max()
    assert front_max >= nmb.max() - 1e-9 * max(1.0, abs(nmb.max()))
    best = result[result["best_at_wtp"]]
    assert len(best) == 1 and bool(best["on_frontier"].iloc[0])


@settings(max_examples=100, deadline=None)
@given(_values)
@example([(250.0, 0.9), (1000.0, 1.1), (1750.0, 1.3)])  # collinear, ICERs 1 ulp apart
def test_each_frontier_strategy_is_best_for_some_wtp(values):
    # Between consecutive frontier ICERs the frontier strategy has the highest NMB.
    result = incremental_analysis(_frame(values))
    front = result[result["on_frontier"]]
    icers = np.append(front["icer"].to_numpy()[1:], np.inf)
    lower = np.append(0.0, icers[:-1])
    probe = np.where(np.isinf(icers), lower + 1e6, (lower + icers) / 2)
    # Each frontier strategy attains the highest NMB at its probe. With collinear frontier
    # points (equal ICERs) the probe is the common ICER, where the neighbours tie with it,
    # so the property is "attains the maximum", not "is the unique best".
    nmb_all = probe[:, None] * result["qalys"].to_numpy() - result["cost"].to_numpy()
    nmb_front = probe * front["qalys"].to_numpy() - front["cost"].to_numpy()
    np.testing.assert_allclose(nmb_front, nmb_all.max(axis=1), rtol=1e-12, atol=1e-9)
    # An interval of a few ulps (collinear points whose ICERs differ only by rounding, e.g.
    # 750 / 0.2 against 750 / 0.2000000000000002) is degenerate too: all tie inside it.
    strict = icers - lower > 1e-9 * np.maximum(1.0, np.abs(lower))
    chosen = best_at_wtp(result["strategy"], result["cost"], result["qalys"], probe[strict])
    # Where the interval is not degenerate the best is unique up to identical strategies.
    chosen_rows = result.set_index("strategy").loc[list(chosen), ["cost", "qalys"]]
    np.testing.assert_array_equal(
        chosen_rows.to_numpy(), front[["cost", "qalys"]].to_numpy()[strict]
    )


@settings(max_examples=100, deadline=None)
@given(_values, st.randoms(use_true_random=False))
def test_result_does_not_depend_on_row_order(values, rnd):
    frame = _frame(values)
    order = list(range(len(frame)))
    rnd.shuffle(order)
    pd.testing.assert_frame_equal(
        incremental_analysis(frame), incremental_analysis(frame.iloc[order])
    )


# --- one error test per validation rule ----------------------------------------------


def test_error_not_a_frame():
    with pytest.raises(ModelError, match="expected a pandas DataFrame, got dict"):
        incremental_analysis({"strategy": ["a"], "cost": [1.0], "qalys": [1.0]})


def test_error_missing_column():
    with pytest.raises(ModelError, match=r"missing column\(s\) \['qalys'\]"):
        incremental_analysis(pd.DataFrame({"strategy": ["a"], "cost": [1.0]}))


def test_error_empty_table():
    with pytest.raises(ModelError, match="no strategies"):
        incremental_analysis(pd.DataFrame({"strategy": [], "cost": [], "qalys": []}))


def test_error_nan_cost_names_strategy():
    frame = pd.DataFrame({"strategy": ["a", "b"], "cost": [1.0, np.nan], "qalys": [1.0, 2.0]})
    with pytest.raises(ModelError, match=r"strategies\[b\]\.cost: value nan is not a finite"):
        incremental_analysis(frame)


def test_error_infinite_qalys_names_strategy():
    frame = pd.DataFrame({"strategy": ["a", "b"], "cost": [1.0, 2.0], "qalys": [np.inf, 2.0]})
    with pytest.raises(ModelError, match=r"strategies\[a\]\.qalys: value inf"):
        incremental_analysis(frame)


def test_error_non_numeric_cost():
    frame = pd.DataFrame({"strategy": ["a"], "cost": ["cheap"], "qalys": [1.0]})
    with pytest.raises(ModelError, match=r"strategies\[a\]\.cost: value 'cheap'"):
        incremental_analysis(frame)


def test_error_duplicate_names():
    frame = pd.DataFrame({"strategy": ["a", "a"], "cost": [1.0, 2.0], "qalys": [1.0, 2.0]})
    with pytest.raises(ModelError, match="'a' appears more than once"):
        incremental_analysis(frame)


def test_error_empty_name():
    frame = pd.DataFrame({"strategy": ["a", " "], "cost": [1.0, 2.0], "qalys": [1.0, 2.0]})
    with pytest.raises(ModelError, match=r"strategies\[row 1\]\.strategy: empty strategy name"):
        incremental_analysis(frame)


@pytest.mark.parametrize("wtp", [-1.0, float("nan"), float("inf")])
def test_error_bad_willingness_to_pay(wtp):
    with pytest.raises(ModelError, match="willingness_to_pay: expected a finite number >= 0"):
        incremental_analysis(EXAMPLE, willingness_to_pay=wtp)


def test_error_best_at_wtp_shape_mismatch():
    with pytest.raises(ModelError, match="cost: expected 2 finite numbers"):
        best_at_wtp(["a", "b"], [1.0], [1.0, 2.0], 10.0)


def test_error_best_at_wtp_bad_wtp():
    with pytest.raises(ModelError, match="willingness_to_pay: expected a finite number"):
        best_at_wtp(["a"], [1.0], [1.0], np.nan)
