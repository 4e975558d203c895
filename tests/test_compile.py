"""Compilation: model + parameter sets -> CompiledModel arrays."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.compile import compile_model, estimate_compiled_bytes
from caredecide.errors import ModelError
from caredecide.modelfile import load_model
from caredecide.mortality import gompertz_makeham_q
from tests.conftest import load_dict, small_model_dict


@pytest.fixture(scope="module")
def demo():
    from synthetic_cohort import demo_model_path

    return load_model(demo_model_path())


def test_small_model_arrays_by_hand(small_model):
    c = compile_model(small_model)
    well, sick, dead = 0, 1, 2
    wait, treat = 0, 1
    assert c.transition.shape == (1, 1, 2, 3, 3)
    np.testing.assert_allclose(c.transition[0, 0, wait, well], [0.89, 0.1, 0.01])
    np.testing.assert_allclose(c.transition[0, 0, wait, sick], [0.0, 0.8, 0.2])
    # A relative risk acts on the rate: 1 - (1 - 0.2)^0.5 (Fleurence & Hollenbeak 2007).
    p_die = 1 - 0.8**0.5
    np.testing.assert_allclose(c.transition[0, 0, treat, sick], [0.0, 1 - p_die, p_die])
    # treat is not allowed in well: a self-loop that `allowed` masks out.
    np.testing.assert_array_equal(c.transition[0, 0, treat, well], [1.0, 0.0, 0.0])
    np.testing.assert_array_equal(c.transition[0, 0, :, dead], [[0, 0, 1], [0, 0, 1]])
    np.testing.assert_array_equal(c.allowed, [[True, False], [True, True], [True, True]])
    np.testing.assert_allclose(c.state_qaly[0, 0], [0.9, 0.6, 0.0])
    np.testing.assert_allclose(c.state_cost[0, 0], [100.0, 2000.0, 0.0])
    # One-off 500 plus the per-cycle drug cost 1000, only where treat is a real choice.
    np.testing.assert_allclose(c.decision_cost[0, 0], [[0, 0], [0, 1500.0], [0, 0]])
    np.testing.assert_allclose(c.decision_qaly[0, 0], [[0, 0], [0, -0.01], [0, 0]])
    np.testing.assert_array_equal(c.life_years, [1.0, 1.0, 0.0])
    np.testing.assert_array_equal(c.start_distribution, [1.0, 0.0, 0.0])
    np.testing.assert_array_equal(c.absorbing, [False, False, True])
    assert (c.n_cycles, c.start_age, c.discount_costs, c.within_cycle) == (10, 60.0, 0.03, "start")


def test_relative_risk_value_from_references():
    data = small_model_dict()
    data["parameters"]["p_die_sick"]["value"] = 0.3
    c = compile_model(load_dict(data))
    # Source: Fleurence & Hollenbeak 2007: p = 0.3, RR = 0.5 -> 0.1633400 (not 0.15).
    assert c.transition[0, 0, 1, 1, 2] == pytest.approx(0.1633400, abs=5e-8)


def test_competing_exits_from_rates_match_closed_form():
    data = small_model_dict()
    del data["transitions"]["wait"]["sick"]
    data["states"].insert(2, {"id": "cured", "qaly_weight": 1.0, "cost": 0.0})
    data["transitions"]["wait"]["cured"] = {"cured": 1.0}
    data["rates"] = {"wait": {"sick": {"cured": 0.1, "dead": 0.05}}}
    c = compile_model(load_dict(data))
    # Source: Welton & Ades 2005 closed form P_j = r_j/(a+b)(1 - e^{-(a+b)t}):
    # stay e^-0.15 = 0.860708, exit-a 0.092861, exit-b 0.046431 (Med Decis Making
    # 25(6):633-645; worked from the closed form).
    np.testing.assert_allclose(
        c.transition[0, 0, 0, 1], [0.0, 0.860708, 0.092861, 0.046431], atol=5e-7
    )


def test_rate_rows_of_one_action_share_one_generator():
    data = small_model_dict()
    data["transitions"]["wait"] = {}
    data["rates"] = {"wait": {"well": {"sick": 0.1, "dead": 0.05}, "sick": {"dead": 0.2}}}
    c = compile_model(load_dict(data))
    # Source: Jones, Epstein & Garcia-Mochon 2017, Value in Health (closed form of
    # a progressive model, from memory; worked by hand): progressive 1->2->3 with
    # l12 = 0.1, l13 = 0.05, l23 = 0.2: row 1 = 0.860708 / 0.083954 / 0.055338;
    # row 2 = 0.818731 / 0.181269.
    np.testing.assert_allclose(c.transition[0, 0, 0, 0], [0.860708, 0.083954, 0.055338], atol=5e-7)
    np.testing.assert_allclose(c.transition[0, 0, 0, 1], [0.0, 0.818731, 0.181269], atol=5e-7)


def test_cycle_length_scales_qalys_and_life_years():
    data = small_model_dict()
    data["settings"]["cycle_years"] = 0.5
    c = compile_model(load_dict(data))
    np.testing.assert_allclose(c.state_qaly[0, 0], [0.45, 0.3, 0.0])
    np.testing.assert_array_equal(c.life_years, [0.5, 0.5, 0.0])
    assert c.cycle_length == 0.5


def test_time_axes_follow_what_depends_on_time():
    data = small_model_dict()
    data["actions"][1]["cost_per_cycle"] = "when(cycle < 2, c_drug, 0)"
    c = compile_model(load_dict(data))
    assert c.transition.shape[1] == 1 and c.state_cost.shape[1] == 1
    assert c.decision_cost.shape == (1, 10, 3, 2)
    np.testing.assert_allclose(c.decision_cost[0, :, 1, 1], [1500, 1500] + [500] * 8)


def test_occupancy_time_axis_has_cycles_zero_to_t_minus_one():
    # One meaning of `cycle`/`years`: the cycle index 0..T-1, as in the transitions.
    data = small_model_dict()
    data["states"][0]["cost"] = "100 * years"
    c = compile_model(load_dict(data))
    assert c.state_cost.shape == (1, 10, 3)
    np.testing.assert_allclose(c.state_cost[0, :, 0], 100.0 * np.arange(10))


def test_background_mortality_enters_by_age():
    data = small_model_dict()
    data["mortality"] = {"gompertz_makeham": {"a": 0.0007, "b": 5e-5, "c": 10**0.04}}
    data["transitions"]["wait"]["well"]["dead"] = "background"
    c = compile_model(load_dict(data))
    assert c.transition.shape == (1, 10, 2, 3, 3)
    expected = gompertz_makeham_q(0.0007, 5e-5, 10**0.04, 60.0 + np.arange(10))
    np.testing.assert_allclose(c.transition[0, :, 0, 0, 2], expected, rtol=1e-12)
    # Source: Bowers et al. 1997 (from memory): q60 = 0.0137604.
    assert c.transition[0, 0, 0, 0, 2] == pytest.approx(0.0137604, abs=5e-8)


def test_dirichlet_group_members_take_count_shares():
    data = small_model_dict()
    data["groups"] = {
        "from_well": {
            "members": ["g_sick", "g_dead", "g_stay"],
            "counts": [10, 2, 88],
            "source": "Synthetic: test counts",
        }
    }
    data["transitions"]["wait"]["well"] = {"sick": "g_sick", "dead": "g_dead", "well": "g_stay"}
    model = load_dict(data)
    c = compile_model(model)
    # Dirichlet mean n_i / N (Briggs, Ades & Price 2003).
    np.testing.assert_allclose(c.transition[0, 0, 0, 0], [0.88, 0.10, 0.02])
    low, high = model.parameter_range("g_sick")
    from scipy import stats

    # Marginal of Dirichlet(10, 2, 88) for the first member is Beta(10, 90).
    assert (low, high) == pytest.approx(tuple(stats.beta(10, 90).ppf([0.025, 0.975])))


def test_a_batch_gives_the_same_arrays_as_each_set_alone(demo):
    sets = pd.DataFrame(
        {
            "p_progress_1": [0.05, 0.06, 0.09],
            "hr_treatment": [0.4, 0.5, 0.9],
            "c_stage_3": [1.0, 2.0, 3.0],
        }
    )
    batch = compile_model(demo, sets)
    for d in range(3):
        alone = compile_model(demo, sets.iloc[[d]])
        for name in ("transition", "state_qaly", "state_cost", "decision_qaly", "decision_cost"):
            np.testing.assert_allclose(
                getattr(batch, name)[d], getattr(alone, name)[0], rtol=1e-13, atol=1e-15
            )


def test_demo_shapes_and_estimate(demo):
    c = compile_model(demo)
    # Background mortality depends on age, so transitions have one slice per cycle (45).
    assert c.transition.shape == (1, 45, 2, 7, 7)
    assert c.state_qaly.shape == (1, 1, 7) and c.decision_cost.shape == (1, 1, 7, 2)
    arrays = (c.transition, c.state_qaly, c.state_cost, c.decision_qaly, c.decision_cost)
    assert estimate_compiled_bytes(demo, 1) == sum(a.nbytes for a in arrays)


_draw = st.fixed_dictionaries(
    {
        # The demo adds stage-1 progression (raised by the hazard ratio on treatment) to
        # background mortality (0.38 per year at age 99): keep their sum below 1.
        "p_progress_1": st.floats(0.0, 0.45),
        "p_progress_2": st.floats(0.0, 0.99),
        "r_stage_3_excess_death": st.floats(0.0, 3.0),
        "hr_treatment": st.floats(0.0, 1.5),
    }
)


@settings(max_examples=15, deadline=None)
@given(st.lists(_draw, min_size=1, max_size=4))
def test_rows_sum_to_one_for_every_draw_cycle_and_action(demo, draws):
    c = compile_model(demo, pd.DataFrame(draws))
    # Invariant of any transition matrix (common practice): rows are probability vectors.
    np.testing.assert_allclose(c.transition.sum(axis=-1), 1.0, atol=1e-9)
    assert (c.transition >= 0).all()


def test_unknown_parameter_in_a_batch_is_named(demo):
    with pytest.raises(ModelError, match="unknown parameter 'p_progress_9'"):
        compile_model(demo, {"p_progress_9": np.array([0.1])})


def test_parameter_sets_of_unequal_length_are_refused(demo):
    with pytest.raises(ModelError, match="one length"):
        compile_model(demo, {"p_progress_1": np.ones(2) * 0.1, "p_progress_2": np.ones(3) * 0.1})


def test_mapping_and_dataframe_give_the_same_batch(demo):
    values = {"u_stage_1": np.array([0.8, 0.9])}
    a = compile_model(demo, values)
    b = compile_model(demo, pd.DataFrame(values))
    np.testing.assert_array_equal(a.state_qaly, b.state_qaly)
    assert a.state_qaly.shape == (2, 1, 7)


def test_infinite_horizon_compiles_stationary_arrays():
    data = small_model_dict()
    del data["settings"]["horizon_cycles"]
    data["settings"]["horizon"] = "infinite"
    c = compile_model(load_dict(data))
    assert c.n_cycles is None and c.is_stationary
    assert c.transition.shape == (1, 1, 2, 3, 3)


def _one_way_like_sets(demo) -> pd.DataFrame:
    """Each parameter moved over three values, one at a time: many repeated rate columns."""
    from caredecide.sensitivity import parameter_ranges, parameter_sets

    ranges = parameter_ranges(demo)
    frames = [
        parameter_sets(demo, {row.parameter: np.linspace(row.low, row.high, 3)})
        for row in ranges.itertuples()
    ]
    return pd.concat(frames, ignore_index=True)


@pytest.mark.parametrize("factor", [True, False])
def test_deduplicated_rate_rows_equal_the_plain_result_exactly(demo, monkeypatch, factor):
    # Each distinct (draw, cycle) column of rates is exponentiated once; the result must
    # be bit for bit the one without de-duplication (with and without the common exit
    # factored out).
    import caredecide.compile as compile_module

    monkeypatch.setitem(compile_module._RATE_ROWS, "factor", factor)
    sets = _one_way_like_sets(demo)
    deduplicated = compile_model(demo, sets)
    monkeypatch.setitem(compile_module._RATE_ROWS, "deduplicate", False)
    plain = compile_model(demo, sets)
    np.testing.assert_array_equal(deduplicated.transition, plain.transition)


def test_rate_rows_agree_with_the_former_uniformization_path(demo, monkeypatch):
    # The former path (uniformization of whole matrices, every draw and cycle, no common
    # exit factored out) is the reference: same arrays within round-off, probability
    # rows untouched.
    import caredecide.compile as compile_module

    sets = _one_way_like_sets(demo).iloc[::3]
    current = compile_model(demo, sets)
    monkeypatch.setitem(compile_module._RATE_ROWS, "deduplicate", False)
    monkeypatch.setitem(compile_module._RATE_ROWS, "method", "uniformization")
    monkeypatch.setitem(compile_module._RATE_ROWS, "factor", False)
    former = compile_model(demo, sets)
    np.testing.assert_allclose(current.transition, former.transition, rtol=0.0, atol=1e-12)
    stage_1 = demo.state_ids.index("stage_1")  # a [transitions] row: no exponential at all
    np.testing.assert_array_equal(
        current.transition[:, :, :, stage_1], former.transition[:, :, :, stage_1]
    )


def test_rate_rows_match_scipy_expm_of_the_whole_generator(demo):
    # Reference library: scipy.linalg.expm of each action's full 7 x 7 generator (every
    # state present), for one draw at three ages; only the rate rows are compared.
    import scipy.linalg

    from caredecide.compile import _indices, parse_model_expressions
    from caredecide.mortality import background_probability

    c = compile_model(demo)
    parsed = parse_model_expressions(demo)
    a, s, _ = _indices(parsed.rates)
    rates = {(e.action, e.state, e.target): e.expression for e in parsed.rates}
    assert len(rates) == len(a)
    for t in (0, 20, 44):
        age = demo.settings.start_age + t
        values = dict(demo.base_parameter_values())
        values.update(
            background=float(background_probability(demo.mortality, np.array([age]), 1.0)[0]),
            age=age,
            cycle=float(t),
            years=float(t),
            cycle_years=1.0,
        )
        G = np.zeros((len(demo.action_ids), 7, 7))
        for (action, state, target), expression in rates.items():
            G[action, state, target] = float(np.asarray(expression.evaluate(values)))
        G[:, np.arange(7), np.arange(7)] = -G.sum(axis=-1)
        for action, state in set(zip(a.tolist(), s.tolist(), strict=True)):
            np.testing.assert_allclose(
                c.transition[0, t, action, state],
                scipy.linalg.expm(G[action])[state],
                rtol=0.0,
                atol=1e-15,
            )
