"""compare_strategies: the optimal policy against fixed strategies on the demo model, through
the same compile -> solve -> evaluate path; chart builders for the CE plane and the frontier."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from caredecide.charts import make_ce_plane_chart, make_frontier_chart
from caredecide.compare import KIND_FRONTIER, KIND_OPTIMAL, compare_strategies
from caredecide.compile import compile_model
from caredecide.errors import ModelError
from caredecide.evaluate import evaluate_policy
from caredecide.modelfile import load_model
from caredecide.objective import Objective
from caredecide.solvers import solve
from caredecide.strategies import at_once, never
from synthetic_cohort import demo_model_path


@pytest.fixture(scope="module")
def demo():
    return load_model(demo_model_path())


@pytest.fixture(scope="module")
def with_range(demo):
    return compare_strategies(demo, wtp=30000.0, wtp_range=(0.0, 60000.0))


def test_optimal_row_equals_the_solver_and_is_best(demo, with_range):
    compiled = compile_model(demo)
    objective = Objective("net_benefit", 30000.0)
    result = solve(compiled, objective)
    outcome = evaluate_policy(compiled, result.policy, objective)
    row = with_range.table.set_index("strategy").loc[with_range.optimal_strategy]
    assert row["kind"] == KIND_OPTIMAL
    assert row["cost"] == outcome.costs[0] and row["qalys"] == outcome.qalys[0]
    assert row["net_monetary_benefit"] == pytest.approx(
        result.expected_value(compiled.start_distribution)[0], rel=1e-12
    )
    # The optimal policy has the highest NMB of every row (Puterman 1994, Theorem 4.5.1).
    nmb = with_range.table["net_monetary_benefit"]
    assert row["net_monetary_benefit"] >= nmb.max() - 1e-9 * abs(nmb.max())
    assert with_range.best_strategy == with_range.optimal_strategy


def test_table_holds_builtins_the_sibling_table_and_frontier_policies(with_range):
    names = set(with_range.table["strategy"])
    assert {
        "never treat",
        "treat at once",
        "treat from stage_2",
        "treat from stage_3",
        "treat stage 2-3 before 80",
        "treat stage 3 before 75",
    } <= names
    assert any("found beside the model" in n for n in with_range.notes)
    # The incremental table holds the described strategies plus ONE optimal policy; the
    # frontier's policies stay in their own table.
    assert (with_range.table["kind"] == KIND_OPTIMAL).sum() == 1
    assert not (with_range.table["kind"] == KIND_FRONTIER).any()
    assert len(with_range.table) == len({r.strategy.name for r in with_range.resolved})
    assert with_range.optimal_strategy in names
    inside = with_range.frontier[
        (with_range.frontier["wtp_from"] <= 30000) & (with_range.frontier["wtp_to"] >= 30000)
    ]
    assert list(inside["strategy"]) == [with_range.optimal_strategy]


def test_fixed_strategies_never_beat_the_frontier_anywhere_in_the_range(with_range):
    # Each fixed strategy's NMB line lies below the upper envelope of the frontier policies
    # at every WTP of the range (checked at the switch points and ends, where the envelope
    # bends: between them both are straight lines).
    points = np.unique(np.r_[with_range.frontier["wtp_from"], with_range.frontier["wtp_to"]])
    frontier = with_range.frontier
    envelope = (points[:, None] * frontier["qalys"].to_numpy() - frontier["cost"].to_numpy()).max(1)
    fixed = with_range.table[~with_range.table["kind"].isin([KIND_OPTIMAL, KIND_FRONTIER])]
    lines = points[:, None] * fixed["qalys"].to_numpy() - fixed["cost"].to_numpy()
    assert (lines <= envelope[:, None] + 1e-6).all()


def test_incremental_status_and_best_strategy(with_range):
    table = with_range.table
    assert (
        table["status"]
        .str.match(
            r"^(on frontier|dominated by .+|extendedly dominated by .+ and .+|identical to .+)$"
        )
        .all()
    )
    assert table["best_at_wtp"].sum() == 1
    # Statuses name only strategies the table describes (never an undescribed "optimal P5").
    status = table.set_index("strategy")["status"]
    for text in status:
        for name in set(table["strategy"]) - {text}:
            text = text.replace(name, "")
        assert "optimal P" not in text


def test_traces_start_from_the_cohort_and_sum_to_one(with_range, demo):
    traces = with_range.traces
    assert set(traces["strategy"]) == set(with_range.table["strategy"])
    sums = traces.groupby(["strategy", "cycle"])["proportion"].sum()
    np.testing.assert_allclose(sums, 1.0, atol=1e-12)
    start = traces[(traces["cycle"] == 0) & (traces["strategy"] == "never treat")]
    assert dict(zip(start["state"], start["proportion"], strict=True))["stage_2"] == 0.3


def test_explicit_strategy_list_and_notes(demo):
    result = compare_strategies(demo, [never("treat"), at_once("treat")], wtp=10000.0)
    assert list(result.table["strategy"].sort_values()) == sorted(
        ["never treat", "treat at once", "optimal policy at WTP 10,000"]
    )
    assert result.frontier is None and result.switches is None
    at_once_notes = result.table.set_index("strategy").loc["treat at once", "notes"]
    assert "'treat' is not allowed in stage_1_tx, stage_2_tx, stage_3_tx" in at_once_notes


def test_strategy_table_path_adds_to_the_builtins(demo, tmp_path):
    path = tmp_path / "mine.csv"
    path.write_text("state,action\nstage_2,treat\nstage_3,treat\n", encoding="utf-8")
    result = compare_strategies(demo, path)
    names = list(result.table["strategy"])
    assert "mine" in names and "never treat" in names
    # same policy as 'treat from stage_2': identical totals, marked identical
    rows = result.table.set_index("strategy")
    assert rows.loc["mine", "cost"] == rows.loc["treat from stage_2", "cost"]
    assert "identical to" in rows.loc["mine", "status"] + rows.loc["treat from stage_2", "status"]


def test_duplicate_strategy_names_are_refused(demo, tmp_path):
    path = tmp_path / "x.csv"
    path.write_text("strategy,state,action\nnever treat,stage_1,wait\n", encoding="utf-8")
    with pytest.raises(
        ModelError,
        match=r"strategy name 'never treat' is used twice "
        r"\(built-in; .*x\.csv\)",
    ):
        compare_strategies(demo, path)


@pytest.mark.parametrize("wtp", [-1.0, float("nan")])
def test_bad_wtp(demo, wtp):
    with pytest.raises(ModelError, match=r"willingness_to_pay: value .* is not allowed"):
        compare_strategies(demo, wtp=wtp)


def test_model_path_is_loaded():
    result = compare_strategies(str(demo_model_path()), [never("treat")])
    assert len(result.table) == 2


# --- a model with one action: the optimal policy *is* the fixed strategy ------------------

ONE_ACTION_MODEL = """# SYNTHETIC test model: every number is invented.
format = 2
title = "Synthetic one-action model"
description = "Synthetic: a single action, so there is nothing to decide."

[settings]
cycle_years = 1.0
{horizon}
start = "well"
discount_outcomes = 0.035
discount_costs = 0.035
objective = "net_benefit"
willingness_to_pay = 20000.0
within_cycle = "start"
currency = "EUR"

[[states]]
id = "well"
qaly_weight = 0.9
cost = 500.0

[[states]]
id = "sick"
qaly_weight = 0.6
cost = 3000.0

[[states]]
id = "dead"
qaly_weight = 0.0
cost = 0.0
absorbing = true

[[actions]]
id = "monitor"
allowed_in = "all"
cost_per_cycle = 100.0

[transitions.monitor.well]
sick = 0.1
dead = 0.02
well = "rest"

[transitions.monitor.sick]
well = 0.05
dead = 0.15
sick = "rest"
"""
ONE_ACTION_P = np.array([[0.88, 0.1, 0.02], [0.05, 0.8, 0.15], [0.0, 0.0, 1.0]])


@pytest.mark.parametrize("horizon", ['horizon = "infinite"', "horizon_cycles = 3"])
def test_one_action_model_reproduces_the_fixed_strategy_totals_exactly(tmp_path, horizon):
    path = tmp_path / "one.toml"
    path.write_text(ONE_ACTION_MODEL.format(horizon=horizon), encoding="utf-8")
    result = compare_strategies(path)
    table = result.table.set_index("strategy")
    assert len(table) == 2
    optimal, fixed = table.loc[result.optimal_strategy], table.loc["monitor at once"]
    # Same policy, same evaluation code: the totals agree to the last bit.
    for column in (
        "cost",
        "qalys",
        "life_years",
        "cost_undiscounted",
        "qalys_undiscounted",
        "net_monetary_benefit",
    ):
        assert optimal[column] == fixed[column], column
    assert {optimal["status"], fixed["status"]} == {"on frontier", "identical to monitor at once"}
    # Reference totals, start-of-cycle weights (Elbasha & Chhatwal 2016: left Riemann sum),
    # per-cycle discount d = 1/1.035; the action's 100 per cycle is charged in the live
    # states only. Infinite horizon: sum_t d^t m0 P^t = m0 (I - d P)^-1, by a scipy linear
    # solve (policy evaluation, Puterman 1994, section 6.1, from memory). Three cycles: the
    # sum over t = 0, 1, 2 of d^t m0 P^t, written out.
    import scipy.linalg

    d, start = 1.0 / 1.035, np.array([1.0, 0.0, 0.0])
    if "infinite" in horizon:
        occupancy = scipy.linalg.solve(np.eye(3) - d * ONE_ACTION_P.T, start)
    else:
        occupancy = sum(d**t * start @ np.linalg.matrix_power(ONE_ACTION_P, t) for t in range(3))
    assert fixed["qalys"] == pytest.approx(occupancy @ [0.9, 0.6, 0.0], rel=1e-12)
    assert fixed["cost"] == pytest.approx(occupancy @ [600.0, 3100.0, 0.0], rel=1e-12)
    assert fixed["life_years"] == pytest.approx(occupancy @ [1.0, 1.0, 0.0], rel=1e-12)
    if "infinite" not in horizon:
        # Three cycles by hand: m0 = (1, 0, 0), m1 = (0.88, 0.1, 0.02),
        # m2 = (0.88 x 0.88 + 0.1 x 0.05, 0.88 x 0.1 + 0.1 x 0.8, ...) = (0.7794, 0.168, ...).
        # QALYs = 0.9 + d (0.792 + 0.06) + d^2 (0.70146 + 0.1008).
        expected = 0.9 + d * (0.88 * 0.9 + 0.1 * 0.6) + d**2 * (0.7794 * 0.9 + 0.168 * 0.6)
        assert fixed["qalys"] == pytest.approx(expected, rel=1e-12)


def test_a_policy_optimal_on_two_intervals_is_one_row(demo, monkeypatch):
    # Within the solver's tie tolerance a line could come back after another one; the
    # frontier then lists its label twice, and the comparison must hold one row for it
    # (not stop on a "name used twice" error).
    import caredecide.compare as compare_module
    from caredecide.frontier import policy_frontier as real_frontier

    def repeated(compiled, wtp_range, **options):
        frontier = real_frontier(compiled, wtp_range, **options)
        again = frontier.table.iloc[[0]].assign(wtp_from=wtp_range[1], wtp_to=wtp_range[1])
        frontier.table = pd.concat([frontier.table, again], ignore_index=True)
        return frontier

    monkeypatch.setattr(compare_module, "policy_frontier", repeated)
    result = compare_strategies(demo, wtp=30000.0, wtp_range=(0.0, 20000.0))
    assert result.table["strategy"].is_unique
    assert result.frontier["strategy"].iloc[0] == result.frontier["strategy"].iloc[-1]


# --- chart builders ---------------------------------------------------------------------


def test_ce_plane_chart_marks_status_by_shape_and_joins_the_frontier(with_range):
    spec = make_ce_plane_chart(with_range.table, currency="EUR").to_dict()
    line, points, text = spec["layer"]
    assert line["mark"]["type"] == "line"
    assert points["encoding"]["shape"]["field"] == "group"
    assert points["encoding"]["color"]["field"] == "group"
    assert points["encoding"]["y"]["title"] == "Cost per person (discounted) EUR"
    assert text["encoding"]["text"]["field"] == "label"
    # Frontier points are drawn last (order 1), so an identical strategy never hides one.
    assert points["encoding"]["order"]["field"] == "draw_order"
    drawn = spec["datasets"][points["data"]["name"]]
    assert [r["draw_order"] for r in drawn] == [int(v) for v in with_range.table["on_frontier"]]
    # The dashed line joins the frontier strategies only, in order of cost.
    line_data = spec["datasets"][line["data"]["name"]]
    assert len(line_data) == int(with_range.table["on_frontier"].sum())
    assert [r["cost"] for r in line_data] == sorted(r["cost"] for r in line_data)


def test_frontier_chart_has_one_bar_per_interval(with_range):
    spec = make_frontier_chart(with_range.frontier).to_dict()
    assert spec["mark"]["type"] == "bar"
    assert spec["encoding"]["x"]["field"] == "wtp_from" and spec["encoding"]["x2"]["field"] == (
        "wtp_to"
    )
    data = next(iter(spec["datasets"].values()))
    assert len(data) == len(with_range.frontier)


def test_chart_builders_name_missing_columns():
    with pytest.raises(ValueError, match=r"CE plane chart: frame lacks column\(s\) \['status'"):
        make_ce_plane_chart(pd.DataFrame({"strategy": ["a"], "cost": [1], "qalys": [1]}))
    with pytest.raises(ValueError, match=r"frontier chart: frame lacks column\(s\) \['wtp_to'\]"):
        make_frontier_chart(pd.DataFrame({"policy": ["P1"], "wtp_from": [0.0]}))


# --- the app's Strategies view (Streamlit AppTest) -----------------------------------------


@pytest.fixture
def app_test(tmp_path, monkeypatch):
    import streamlit
    from streamlit.testing.v1 import AppTest

    from tests.ui.conftest import APP

    monkeypatch.setenv("CAREDECIDE_HOME", str(tmp_path / "home"))
    monkeypatch.setenv("CAREDECIDE_MODEL", str(demo_model_path()))
    streamlit.cache_data.clear()
    at = AppTest.from_file(APP, default_timeout=180)
    at.run()
    yield at.switch_page("views/strategies.py").run()
    streamlit.cache_data.clear()


def test_strategies_view_shows_the_library_table_and_frontier(app_test, demo):
    from caredecide.cautions import CAUTION_SHORT

    at = app_test
    assert not at.exception, at.exception
    assert any(CAUTION_SHORT in w.value for w in at.warning)
    expected = compare_strategies(demo, wtp=30000.0, wtp_range=(0.0, 60000.0))
    # Data frames in page order: the table, the fallbacks (expander), the frontier.
    shown = at.dataframe[0].value
    assert list(shown["strategy"]) == list(expected.table["strategy"])
    np.testing.assert_array_equal(shown["cost"], expected.table["cost"])
    frontier = at.dataframe[-1].value
    np.testing.assert_array_equal(frontier["wtp_to"], expected.frontier["wtp_to"])
    assert f"Best at 30,000 EUR per QALY: {expected.best_strategy}" in [
        s.value for s in at.subheader
    ]


def test_strategies_view_without_a_range_and_with_a_bad_range(app_test):
    at = app_test
    at.number_input(key="strategies_high").set_value(0.0).run()
    assert not at.exception, at.exception
    assert len(at.dataframe) == 2  # the table and the fallbacks: no frontier
    assert "Optimal policy over the willingness-to-pay range" not in [s.value for s in at.subheader]
    at.number_input(key="strategies_low").set_value(5000.0).run()
    assert any("'to' must be above 'from'" in e.value for e in at.error)


def test_from_ages_add_the_age_family(demo):
    # "treat from age 65": treat wherever allowed in cycles starting at 65 or later (the
    # demo starts at 55 with one-year cycles), the alternative (wait) before.
    compiled = compile_model(demo)
    result = compare_strategies(demo, [never("treat")], wtp=30000.0, from_ages=(65.0,))
    row = result.resolved[-1]
    assert row.strategy.name == "treat from age 65"
    treat = compiled.action_ids.index("treat")
    untreated = [compiled.state_ids.index(s) for s in ("stage_1", "stage_2", "stage_3")]
    np.testing.assert_array_equal(compiled.ages()[[9, 10]], [64.0, 65.0])
    assert (row.policy[:10, untreated] != treat).all()  # ages 55-64
    assert (row.policy[10:, untreated] == treat).all()  # ages 65 on
    assert "treat from age 65" in set(result.table["strategy"])


def test_from_ages_need_a_finite_horizon():
    stationary = demo_model_path().with_name("teaching_stationary.toml")
    with pytest.raises(
        ModelError,
        match=r"strategies\.intensive from age 65\.age: age 65 "
        r"given, but the model has an infinite horizon",
    ):
        compare_strategies(stationary, from_ages=(65.0,))


# --- a readable frontier (issue: committee) ------------------------------------------------


def test_described_strategies_alone_with_a_reference(demo):
    result = compare_strategies(
        demo, [never("treat"), at_once("treat")], wtp=30000.0, include_optimal=False,
        reference="never treat",
    )  # fmt: skip
    assert sorted(result.table["strategy"]) == ["never treat", "treat at once"]
    row = result.table.set_index("strategy").loc["treat at once"]
    ref = result.table.set_index("strategy").loc["never treat"]
    # ICER against the reference: difference in cost over difference in QALYs (Cantor
    # 1994, Med Decis Making 14(3):259-265).
    expected = (row["cost"] - ref["cost"]) / (row["qalys"] - ref["qalys"])
    assert row["icer_vs_reference"] == pytest.approx(expected, rel=1e-12)
    assert np.isnan(ref["icer_vs_reference"])


def test_no_optimal_needs_two_strategies(demo):
    with pytest.raises(ModelError, match="at least two"):
        compare_strategies(demo, [never("treat")], include_optimal=False)


def test_collapsed_frontier_merges_within_the_stated_tolerance(with_range):
    full = with_range.frontier.set_index("policy")
    collapsed = with_range.frontier_collapsed
    tolerance = 1e-3  # the default, QALYs per person; cost: 1e-3 x 30,000 = 30
    covered = [p for text in collapsed["policies"] for p in text.split(", ")]
    assert covered == list(dict.fromkeys(with_range.frontier["policy"]))
    for row in collapsed.itertuples():
        members = row.policies.split(", ")
        first = full.loc[members[0]]
        for name in members[1:]:
            assert abs(full.loc[name, "qalys"] - first["qalys"]) <= tolerance
            assert abs(full.loc[name, "cost"] - first["cost"]) <= tolerance * 30000
    # Runs tile the WTP range without gaps.
    np.testing.assert_allclose(collapsed["wtp_from"].iloc[1:], collapsed["wtp_to"].iloc[:-1])
    # A zero tolerance keeps every distinct policy.
    strict = compare_strategies(
        load_model(demo_model_path()), wtp=30000.0, wtp_range=(0.0, 60000.0), qaly_tolerance=0.0
    )
    assert len(strict.frontier_collapsed) == strict.frontier["policy"].nunique()


def test_switch_points_per_state_follow_the_frontier_policies(with_range):
    frontier = with_range.frontier_result
    switches = with_range.state_switches
    # Every WTP where a state's column of the policy changes is listed, and no other.
    table = frontier.table
    expected = set()
    for i in range(1, len(table)):
        before = frontier.policies[table["policy"].iloc[i - 1]]
        after = frontier.policies[table["policy"].iloc[i]]
        for s, state in enumerate(with_range.traces["state"].unique()):
            if not np.array_equal(before[:, s], after[:, s]):
                expected.add((table["wtp_from"].iloc[i], state))
    assert set(zip(switches["wtp"], switches["state"], strict=True)) == expected
    assert (switches["before"] != switches["after"]).all()
    # Regions tile each state's (WTP, age) rectangle: widths x heights sum to the area.
    regions = with_range.regions
    area = (regions["x_to"] - regions["x_from"]) * (regions["age_to"] - regions["age_from"])
    per_state = area.groupby(regions["state"]).sum()
    ages = compile_model(load_model(demo_model_path())).ages()
    np.testing.assert_allclose(per_state, 60000.0 * (ages[-1] - ages[0]), rtol=1e-12)


def test_effect_label_follows_the_outcome(demo):
    from caredecide.compare import effect_label

    compiled = compile_model(demo)
    assert effect_label(compiled) == "QALYs"
    from dataclasses import replace

    years = np.broadcast_to(compiled.life_years, compiled.state_qaly.shape)
    counting_years = replace(
        compiled, state_qaly=years.copy(), decision_qaly=np.zeros_like(compiled.decision_qaly)
    )
    assert effect_label(counting_years) == "life-years"
