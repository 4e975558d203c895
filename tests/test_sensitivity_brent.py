"""Brent's method over many brackets, checked against scipy.optimize.brentq.

Reference: scipy.optimize.brentq, scipy's implementation of Brent's method (Brent 1973,
Algorithms for Minimization Without Derivatives, Prentice-Hall, ch. 4). The models are
synthetic (invented for the tests; see tests/test_sensitivity.py).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.optimize import brentq

from caredecide.compile import compile_model
from caredecide.model import Action, Model, Parameter, Settings, State
from caredecide.objective import Objective
from caredecide.sensitivity import (
    compiled_over_discount_rate,
    one_way,
    parameter_sets,
    parameter_thresholds,
    setting_thresholds,
)
from caredecide.sensitivity.brent import RTOL_MIN, brent_roots
from caredecide.solvers import solve
from tests.test_sensitivity import SYNTHETIC, group_model, hand_model

# ----------------------------------------------------------------------------- the method


def _family(c: np.ndarray, x: np.ndarray) -> np.ndarray:
    """f_k(x) = c0 + c1 x + c2 x^3 + c3 / (1 + x^2): only + - * /, which IEEE 754 rounds
    correctly, so one value per call and a whole array give identical bits."""
    return c[..., 0] + c[..., 1] * x + c[..., 2] * x * x * x + c[..., 3] / (1.0 + x * x)


coefficients = st.lists(st.floats(-3.0, 3.0), min_size=4, max_size=4)


@given(st.lists(coefficients, min_size=1, max_size=12), st.sampled_from([1e-12, 1e-6, 2e-3]))
@settings(max_examples=60, deadline=None)
def test_brent_roots_equal_brentq_root_by_root(rows, xtol):
    # Source: scipy.optimize.brentq with the same bracket, xtol and rtol.
    c = np.asarray(rows, dtype=float)
    lo, hi = np.full(len(c), -2.0), np.full(len(c), 2.5)
    f_lo, f_hi = _family(c, lo), _family(c, hi)
    keep = (f_lo * f_hi) < 0
    if not keep.any():
        return
    c, lo, hi, f_lo, f_hi = c[keep], lo[keep], hi[keep], f_lo[keep], f_hi[keep]
    found = brent_roots(lambda x, k: _family(c[k], x), lo, hi, f_lo, f_hi, xtol=xtol, maxiter=100)
    for k in range(len(c)):
        root, info = brentq(
            lambda x, k=k: float(_family(c[k], np.float64(x))),
            lo[k], hi[k], xtol=xtol, rtol=RTOL_MIN, maxiter=100, full_output=True, disp=False,
        )  # fmt: skip
        assert found.root[k] == pytest.approx(root, abs=1e-8)
        # The same steps: same count of iterations and of function values.
        assert found.iterations[k] == info.iterations
        assert found.function_calls[k] == info.function_calls
        # Even a slow case (f = x^3 with xtol = 1e-12 runs out of steps) behaves the same.
        assert found.converged[k] == info.converged
        assert found.f_root[k] == float(_family(c[k], np.float64(found.root[k])))


def test_brent_roots_evaluate_every_open_bracket_in_one_call():
    c = np.array([[-0.5, 1.0, 0.0, 0.0], [1.0, -2.0, 0.1, 0.0], [0.2, 0.3, 1.0, -1.0]])
    calls = []

    def f(x, k):
        calls.append(k.copy())
        return _family(c[k], x)

    lo, hi = np.full(3, -2.0), np.full(3, 2.0)
    found = brent_roots(f, lo, hi, _family(c, lo), _family(c, hi))
    assert len(calls) == found.iterations.max() - 1  # one call per step, ends not re-evaluated
    assert list(calls[0]) == [0, 1, 2]
    assert (np.abs(_family(c, found.root)) < 1e-10).all()


def test_brent_roots_exact_zero_at_an_end_is_the_root():
    found = brent_roots(
        lambda x, k: x, np.array([0.0, -1.0]), np.array([1.0, 0.0]),
        np.array([0.0, -1.0]), np.array([1.0, 0.0]),
    )  # fmt: skip
    np.testing.assert_array_equal(found.root, [0.0, 0.0])
    np.testing.assert_array_equal(found.iterations, [0, 0])
    assert found.converged.all()


def test_brent_roots_stops_at_maxiter_like_brentq():
    # Source: scipy.optimize.brentq(..., maxiter=3, disp=False) returns its last iterate.
    def f(x):
        return x**3 - 2.0

    root, info = brentq(f, 0.0, 2.0, maxiter=3, full_output=True, disp=False)
    found = brent_roots(
        lambda x, k: f(x), np.array([0.0]), np.array([2.0]), np.array([f(0.0)]),
        np.array([f(2.0)]), maxiter=3,
    )  # fmt: skip
    assert not info.converged and not found.converged[0]
    assert found.root[0] == root and found.iterations[0] == info.iterations == 3


def test_brent_roots_refuses_a_bracket_without_a_sign_change():
    with pytest.raises(ValueError, match=r"bracket 1 \[0\.0, 1\.0\] has f = 2\.0 and 3\.0"):
        brent_roots(
            lambda x, k: x, np.zeros(2), np.ones(2), np.array([-1.0, 2.0]), np.array([1.0, 3.0])
        )


def test_brent_roots_refuses_bad_tolerances_and_shapes():
    one = np.ones(1)
    with pytest.raises(ValueError, match=r"xtol = 0\.0 is not allowed"):
        brent_roots(lambda x, k: x, -one, one, -one, one, xtol=0.0)
    with pytest.raises(ValueError, match=r"rtol = 1e-17 is not allowed"):
        brent_roots(lambda x, k: x, -one, one, -one, one, rtol=1e-17)
    with pytest.raises(ValueError, match=r"same length, got 1, 2"):
        brent_roots(lambda x, k: x, -one, np.ones(2), -one, one)


# ----------------------------------------------------------------------------- on models


def _brentq_thresholds(model: Model, table: pd.DataFrame) -> np.ndarray:
    """Each reported threshold recomputed by scipy.optimize.brentq on its own bracket,
    every evaluation compiling and solving ONE parameter set."""
    objective = Objective.from_settings(model.settings)
    compiled0 = compile_model(model)
    states, actions = list(compiled0.state_ids), list(compiled0.action_ids)
    roots = []
    for row in table.itertuples():
        t, s = int(row.cycle), states.index(row.state)
        a, b = actions.index(row.action_below), actions.index(row.action_above)

        def gap(x, name=row.parameter, t=t, s=s, a=a, b=b):
            compiled = compile_model(model, parameter_sets(model, {name: np.array([x])}))
            q = solve(compiled, objective).q_values[0, t, s]
            return q[a] - q[b]

        roots.append(brentq(gap, row.bracket_low, row.bracket_high, xtol=1e-12))
    return np.asarray(roots)


@pytest.mark.parametrize("make_model", [hand_model, group_model])
def test_model_thresholds_equal_brentq_on_each_bracket(make_model):
    # Source: scipy.optimize.brentq, one bracket and one parameter set at a time.
    model = make_model()
    table = parameter_thresholds(model, grid=6)
    switches = table[table["status"] == "switch"]
    assert len(switches) >= 3
    np.testing.assert_allclose(
        switches["threshold"].to_numpy(), _brentq_thresholds(model, switches), rtol=0, atol=1e-8
    )


def test_demo_thresholds_equal_brentq_on_each_bracket():
    from caredecide.modelfile import load_model
    from synthetic_cohort import demo_model_path

    model = load_model(demo_model_path())
    table = parameter_thresholds(model, ["hr_treatment", "c_start"], grid=6)
    switches = table[table["status"] == "switch"].groupby("parameter").head(4)
    assert len(switches) == 6  # stage 2 only since starting treatment moves the cohort
    np.testing.assert_allclose(
        switches["threshold"].to_numpy(), _brentq_thresholds(model, switches), rtol=0, atol=1e-8
    )


def test_discount_threshold_equals_brentq():
    # The gap is non-linear in the rate r: loss - p (1 - hr) / (1 + r) (hand_model's docstring).
    model = hand_model()
    table = setting_thresholds(model, "discount_outcomes", 0.0, 0.5, grid=4)
    compiled = compile_model(model)
    objective = Objective.from_settings(model.settings)

    def gap(r):
        q = solve(compiled_over_discount_rate(compiled, np.array([r])), objective).q_values
        return q[0, 0, 0, 0] - q[0, 0, 0, 1]  # treat (index 1) below, wait above: sign only

    root = brentq(gap, table.at[0, "bracket_low"], table.at[0, "bracket_high"], xtol=1e-12)
    assert table.at[0, "threshold"] == pytest.approx(root, abs=1e-8)
    assert table.at[0, "threshold"] == pytest.approx(0.2, abs=1e-8)  # 0.06 / 0.05 - 1


def rate_model() -> Model:
    """hand_model with the death probability written from a rate: p = 1 - exp(-mu).

    gap = Q_0(wait) - Q_0(treat) = loss - (1 - exp(-mu)) (1 - hr) (hand_model's algebra
    with p = 1 - exp(-mu)), so the threshold is mu* = -ln(1 - loss / (1 - hr)).
    With loss = 0.05, hr = 0.4: mu* = -ln(11/12) = 0.0870113769896297.
    """
    model = hand_model()
    parameters = {k: v for k, v in model.parameters.items() if k != "p"}
    parameters["mu"] = Parameter("mu", 0.1, SYNTHETIC, kind="rate", low=0.01, high=0.3)
    return replace(
        model,
        transitions={
            "wait": {"sick": {"dead": "1 - exp(-mu)", "sick": "rest"}},
            "treat": {"sick": {"dead": "(1 - exp(-mu)) * hr", "sick": "rest"}},
        },
        parameters=parameters,
    )


def test_threshold_in_a_rate_matches_the_non_linear_closed_form():
    # Source: p = 1 - exp(-r t) (Fleurence & Hollenbeak 2007) in hand_model's algebra.
    table = parameter_thresholds(rate_model(), ["mu"], grid=5)
    assert list(table["status"]) == ["switch"]
    assert table.at[0, "threshold"] == pytest.approx(-np.log(1 - 0.05 / 0.6), abs=1e-8)
    assert table.at[0, "threshold"] == pytest.approx(0.0870113769896297, abs=1e-12)
    assert (table.at[0, "action_below"], table.at[0, "action_above"]) == ("wait", "treat")
    assert table.at[0, "iterations"] > 1  # a real search, not a single secant step


def tie_model(low: float) -> Model:
    """One decision between a (QALY loss x) and b (loss 0.3): gap = Q_a - Q_b = 0.3 - x."""
    return Model(
        title="Synthetic: near-tie at a grid value",
        description=SYNTHETIC,
        settings=Settings(horizon_cycles=1, start="sick", objective="qalys", within_cycle="start"),
        states=(State(id="sick", qaly_weight=1.0), State(id="dead", absorbing=True, alive=False)),
        actions=(Action(id="a", oneoff_qaly_loss="x"), Action(id="b", oneoff_qaly_loss=0.3)),
        transitions={k: {"sick": {"dead": 0.0, "sick": "rest"}} for k in ("a", "b")},
        parameters={"x": Parameter("x", 0.5, SYNTHETIC, low=low, high=1.0)},
    )


def test_switch_at_a_grid_value_inside_the_tie_tolerance():
    # At x = 0.3 + 5e-10 the gap is -5e-10, inside the solver's tie tolerance (1e-9 +
    # 1e-9 |value|): it reports a tie and picks a (lowest index), although b is better by
    # 5e-10. Both bracket gaps are then negative; the switch is that grid value.
    table = parameter_thresholds(tie_model(0.3 + 5e-10), grid=3)
    assert list(table["status"]) == ["switch"]
    assert table.at[0, "threshold"] == 0.3 + 5e-10
    assert table.at[0, "gap_at_threshold"] == pytest.approx(-5e-10, abs=1e-15)
    assert (table.at[0, "action_below"], table.at[0, "action_above"]) == ("a", "b")


def test_one_way_range_defaults_to_the_distribution_quantiles():
    # Source: scipy.stats.beta quantiles of the beta fitted by the method of moments,
    # alpha = m (m (1 - m) / s^2 - 1), beta = alpha (1 - m) / m (Briggs, Claxton & Sculpher
    # 2006, ch. 4, from memory): m = 0.1, s = 0.02 -> Beta(22.4, 201.6).
    model = hand_model()
    parameters = dict(model.parameters)
    parameters["p"] = replace(
        parameters["p"], low=None, high=None, distribution={"type": "beta", "mean": 0.1, "se": 0.02}
    )
    model = replace(model, parameters=parameters)
    row = one_way(model, ["p"]).table.iloc[0]
    assert row["range_from"] == "distribution 2.5%/97.5%"
    assert row["low"] == pytest.approx(stats.beta(22.4, 201.6).ppf(0.025), rel=1e-9)
    assert row["high"] == pytest.approx(stats.beta(22.4, 201.6).ppf(0.975), rel=1e-9)
