"""The verification battery: every check passes on the synthetic demos and fails on a model
(or, where a model file cannot break it, a documented monkeypatch of the code path)
built to violate it. Check rules follow Büyükkaramikli et al. 2019 (TECH-VER,
PharmacoEconomics 37:1391) and Vemer et al. 2016 (AdViSHE, PharmacoEconomics 34:349);
see docs/verification.md."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide import verify
from caredecide.errors import CaredecideError
from caredecide.modelfile import load_model
from caredecide.objective import Objective
from synthetic_cohort import MODELS_DIR

BROKEN = Path(__file__).parent / "data" / "broken_models"
DEMOS = sorted(MODELS_DIR.glob("*.toml"))


@pytest.fixture(scope="module")
def base_small():
    return load_model(BROKEN / "base_small.toml")


@pytest.fixture(scope="module")
def stationary():
    return load_model(BROKEN / "stationary.toml")


def _status(model, check: str) -> verify.CheckResult:
    report = verify.verify_model(model, checks=[check])
    assert [c.check for c in report.checks] == [check]
    return report.checks[0]


# ----------------------------------------------------------------------------- passing
@pytest.mark.parametrize("path", DEMOS, ids=lambda p: p.stem)
def test_every_check_passes_on_the_demo_scenarios(path):
    report = verify.verify_model(load_model(path))
    frame = report.to_frame()
    assert list(frame["check"]) == list(verify.CHECK_IDS)
    assert report.passed, frame[frame["status"] == verify.FAIL].to_string()
    # Finite horizons skip the solver comparison; infinite ones zero discounting.
    skipped = "solvers_agree" if report.checks and load_model(path).n_cycles() else "zero_discount"
    assert set(frame.loc[frame["status"] == verify.NOT_APPLICABLE, "check"]) == {skipped}


def test_every_check_passes_on_the_base_test_model(base_small):
    report = verify.verify_model(base_small)
    assert report.passed, report.to_frame().to_string()


def test_stationary_model_runs_the_solver_comparison(stationary):
    report = verify.verify_model(stationary)
    frame = report.to_frame().set_index("check")
    assert report.passed, frame.to_string()
    assert frame.loc["solvers_agree", "status"] == verify.PASS
    # Zero discounting has no meaning over an infinite horizon.
    assert frame.loc["zero_discount", "status"] == verify.NOT_APPLICABLE


def test_a_model_with_one_action_and_no_parameters_passes_or_does_not_apply():
    report = verify.verify_model(load_model(BROKEN / "one_action_no_parameters.toml"))
    frame = report.to_frame().set_index("check")
    assert report.passed, frame.to_string()
    assert set(frame.index[frame["status"] == verify.NOT_APPLICABLE]) == {
        "no_effect_ties",
        "solvers_agree",
    }
    # With no parameter to vary the base case is the only parameter set checked.
    assert frame.loc["probabilities_in_range", "figures"].startswith("1 parameter sets")


def test_unknown_check_is_refused(base_small):
    with pytest.raises(CaredecideError, match=r"unknown verification check.*'no_such_check'"):
        verify.verify_model(base_small, checks=["no_such_check"])


# ----------------------------------------------------------------------------- broken model files
@pytest.mark.parametrize(
    ("file", "check", "figure"),
    [
        # The dead state earns QALY weight 0.3: QALYs exceed life-years.
        ("qaly_weights_one.toml", "qaly_weights_one", "vs life-years"),
        # 4 x p_die_sick = 1.2 at p_die_sick's high value 0.3.
        ("probabilities_in_range.toml", "probabilities_in_range", "p_die_sick * 4"),
        # 90% of a non-alive state returns to 'well': the dead share falls.
        ("closed_cohort.toml", "closed_cohort", "largest fall of the dead share = 0.4"),
        # A typed-out row summing to 1 + 9e-10 (inside the loader's 1e-9) adds 9e-10 x the
        # 'sick' share every cycle: under 'wait' the trace ends 9e-10 x (sum over the 40
        # cycles of the sick share, 4.45) = 4.01e-9 above 1 (arithmetic; common practice).
        ("trace_sums_to_one.toml", "trace_sums_to_one", "largest |sum - 1| = 4.01e-09"),
    ],
)
def test_check_fails_on_its_broken_model(file, check, figure):
    model = load_model(BROKEN / file)
    result = _status(model, check)
    assert result.status == verify.FAIL
    assert figure in result.figures
    # ...and the same check passes on the unbroken base model.
    assert _status(load_model(BROKEN / "base_small.toml"), check).status == verify.PASS


# ------------------------------------------------------------------ documented monkeypatches
# These checks compare figures that a model file cannot make disagree (the transformation
# removes whatever the file says); each is broken by patching one step of the code path.


def test_trace_check_fails_when_the_cohort_leaks(base_small, monkeypatch):
    import caredecide.evaluate as evaluate

    original = evaluate.transition_at
    calls = []

    def leaking(compiled, t):
        calls.append(t)
        return 0.99 * original(compiled, t)

    # Patch: 1% of the cohort vanishes every cycle in policy evaluation. The compiled
    # cohort-trace loop reads the transition array directly, so the fault is injected on
    # the numpy path (the loop equals it to rounding: tests/test_kernels.py).
    monkeypatch.setenv("CAREDECIDE_KERNELS", "numpy")
    monkeypatch.setattr(evaluate, "transition_at", leaking)
    result = _status(base_small, "trace_sums_to_one")
    assert calls, "the patched transition was never read: the fault was not injected"
    assert result.status == verify.FAIL
    assert "largest |sum - 1|" in result.figures


def test_zero_discount_check_fails_when_discounting_ignores_the_rates(base_small, monkeypatch):
    from caredecide.compiled import CompiledModel

    # Patch: a fixed per-cycle factor whatever the model's rates say.
    monkeypatch.setattr(CompiledModel, "per_cycle_discount", lambda self: (0.97, 0.97))
    assert _status(base_small, "zero_discount").status == verify.FAIL


def _cost_leak(monkeypatch):
    import caredecide.evaluate as evaluate

    original = evaluate.cycle_parts

    def leaky(compiled, t, discount=True, **options):
        parts = original(compiled, t, discount, **options)
        now, arrival = parts["costs"]
        parts["costs"] = (now + 1.0, arrival)  # Patch: one unit of cost at every decision.
        return parts

    # The compiled evaluation loop builds the rewards itself (equal to cycle_parts to
    # rounding: tests/test_kernels.py), so the fault is injected on the numpy path.
    monkeypatch.setenv("CAREDECIDE_KERNELS", "numpy")
    monkeypatch.setattr(evaluate, "cycle_parts", leaky)


def test_zero_costs_check_fails_when_a_cost_is_added(base_small, monkeypatch):
    _cost_leak(monkeypatch)
    result = _status(base_small, "zero_costs")
    assert result.status == verify.FAIL


def test_cost_doubling_check_fails_when_a_fixed_cost_is_added(base_small, monkeypatch):
    _cost_leak(monkeypatch)
    assert _status(base_small, "costs_double").status == verify.FAIL


def _scale_occupancy_qalys(monkeypatch, module, factor: float) -> None:
    original = module.cycle_parts

    def scaled(compiled, t, discount=True, **options):
        parts = original(compiled, t, discount, **options)
        now, arrival = parts["qalys"]
        parts["qalys"] = (factor * now, factor * arrival)
        return parts

    # The compiled loops build the rewards themselves (equal to cycle_parts to rounding:
    # tests/test_kernels.py), so the fault is injected on the numpy path.
    monkeypatch.setenv("CAREDECIDE_KERNELS", "numpy")
    monkeypatch.setattr(module, "cycle_parts", scaled)


def test_monotonicity_check_fails_when_the_solver_flips_the_qaly_sign(base_small, monkeypatch):
    import caredecide.solvers.bellman as common

    # Patch: the solvers' rewards (which look cycle_parts up in
    # caredecide.solvers.bellman) count QALYs with the wrong sign.
    _scale_occupancy_qalys(monkeypatch, common, -1.0)
    assert _status(base_small, "qaly_weight_monotone").status == verify.FAIL


def test_monotonicity_check_gives_the_same_figures_one_parameter_set_per_chunk(monkeypatch):
    # Common practice: the 1 + S bumped parameter sets are solved chunk by chunk within the
    # memory budget (a 687-state model's single batch peaked at 7.8 GB); how they are split
    # changes nothing.
    import caredecide.chunks as chunks

    model = load_model(MODELS_DIR / "demo_years_since_progression.toml")
    whole = _status(model, "qaly_weight_monotone")
    sizes = []
    original = chunks.chunk_ranges

    def one_each(n, size):
        sizes.append(size)
        return original(n, 1)

    monkeypatch.setattr(chunks, "chunk_ranges", one_each)
    split = _status(model, "qaly_weight_monotone")
    assert sizes and split.status == whole.status == verify.PASS
    assert split.figures == whole.figures


def test_no_effect_check_fails_when_compile_charges_the_twin_action(base_small, monkeypatch):
    import caredecide.compile as compile_module

    original = compile_module.compile_model

    def charged(model, parameter_sets=None, **options):
        compiled = original(model, parameter_sets, **options)
        extra = np.zeros(compiled.n_actions)
        extra[1:] = 100.0  # Patch: every action but the first costs 100 more.
        return replace(compiled, decision_cost=compiled.decision_cost + extra)

    monkeypatch.setattr(compile_module, "compile_model", charged)
    result = _status(base_small, "no_effect_ties")
    assert result.status == verify.FAIL
    assert "all reported indifferent: no" in result.figures


def _worst_policy_solver(monkeypatch):
    import caredecide.solvers as solvers

    original = solvers.solve

    def worst(compiled, objective, **options):
        result = original(compiled, objective, **options)
        q = np.where(np.isfinite(result.q_values), result.q_values, np.inf)
        # Patch: the solver returns the worst allowed action instead of the best.
        return replace(result, policy=q.argmin(axis=-1))

    monkeypatch.setattr(solvers, "solve", worst)


def test_optimality_check_fails_on_a_solver_returning_the_worst_action(base_small, monkeypatch):
    _worst_policy_solver(monkeypatch)
    assert _status(base_small, "optimal_beats_fixed").status == verify.FAIL


def test_zero_wtp_check_fails_on_a_solver_returning_the_worst_action(base_small, monkeypatch):
    _worst_policy_solver(monkeypatch)
    assert _status(base_small, "zero_wtp_cheapest").status == verify.FAIL


def test_value_check_fails_when_evaluation_weighs_qalys_differently(base_small, monkeypatch):
    import caredecide.evaluate as evaluate

    _scale_occupancy_qalys(monkeypatch, evaluate, 1.01)  # Patch: evaluation adds 1% to QALYs.
    assert _status(base_small, "value_matches_evaluation").status == verify.FAIL


def test_solver_agreement_fails_when_value_iteration_is_off(stationary, monkeypatch):
    import caredecide.solvers as solvers

    original = solvers.solve_stationary

    def shifted(compiled, objective, *, method, **options):
        result = original(compiled, objective, method=method, **options)
        if method == "value_iteration":  # Patch: value iteration reports values 1 too high.
            result = replace(result, value=result.value + 1.0)
        return result

    monkeypatch.setattr(solvers, "solve_stationary", shifted)
    result = _status(stationary, "solvers_agree")
    assert result.status == verify.FAIL


def test_a_check_that_raises_is_a_failure_with_the_message(base_small, monkeypatch):
    import caredecide.solvers as solvers

    def refuse(*args, **kwargs):
        raise solvers.SolverError("refused for the test")

    monkeypatch.setattr(solvers, "solve", refuse)
    result = _status(base_small, "value_matches_evaluation")
    assert result.status == verify.FAIL
    assert "refused for the test" in result.figures


# ----------------------------------------------------------------------------- transforms
@settings(max_examples=8, deadline=None)
@given(factor=st.floats(min_value=0.1, max_value=10.0))
def test_scaling_every_cost_scales_total_costs(factor):
    # Linearity of expected costs in the cost inputs (common practice; TECH-VER's doubling
    # test generalised to any factor).
    from caredecide.compile import compile_model
    from caredecide.evaluate import evaluate_policy

    model = load_model(BROKEN / "base_small.toml")
    objective = Objective("net_benefit", 20000.0)
    base = evaluate_policy(compile_model(model), 0, objective)
    scaled = evaluate_policy(compile_model(verify.with_costs_scaled(model, factor)), 0, objective)
    np.testing.assert_allclose(scaled.costs, factor * base.costs, rtol=1e-12)
    np.testing.assert_allclose(scaled.qalys, base.qalys, rtol=0, atol=0)


def test_no_effect_twin_copies_the_reference_rows(base_small):
    twin = verify.with_no_effect(base_small, "treat", "wait")
    assert twin.transitions["treat"]["sick"] == base_small.transitions["wait"]["sick"]
    treat = next(a for a in twin.actions if a.id == "treat")
    assert (treat.oneoff_cost, treat.oneoff_qaly_loss, treat.cost_per_cycle) == (0.0, 0.0, 0.0)
