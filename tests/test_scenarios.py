"""The synthetic demo scenarios in synthetic_cohort/models: valid, synthetic, non-trivial.

Every ``*.toml`` in the folder passes ``caredecide check``, is marked synthetic, solves,
and has an optimal policy that is not one action everywhere. The expected structure of the
lesion-surveillance and teaching scenarios is read from the solver's result (never a
hard-coded policy table).
"""

from __future__ import annotations

import numpy as np
import pytest
import quantecon
from typer.testing import CliRunner

from caredecide.cli import app
from caredecide.compile import compile_model
from caredecide.modelfile import load_model
from caredecide.objective import Objective
from caredecide.solvers import solve
from synthetic_cohort import MODELS_DIR

runner = CliRunner()
SCENARIOS = sorted(MODELS_DIR.glob("*.toml"))
LESION = MODELS_DIR / "lesion_surveillance.toml"
TEACHING = MODELS_DIR / "teaching_stationary.toml"


def _solve(path, **options):
    model = load_model(path)
    compiled = compile_model(model)
    result = solve(compiled, Objective.from_settings(model.settings), **options)
    return model, compiled, result


@pytest.fixture(scope="module")
def solved():
    """Base-case solutions of every scenario, keyed by file name."""
    return {path.name: _solve(path) for path in SCENARIOS}


def test_the_bundled_scenarios_are_all_found():
    names = {path.name for path in SCENARIOS}
    assert {
        "demo_progressive.toml",
        "lesion_surveillance.toml",
        "teaching_stationary.toml",
    } <= names


@pytest.mark.parametrize("name", ["demo_progressive", "lesion_surveillance", "teaching_stationary"])
def test_each_required_scenario_has_a_short_readme(name):
    readme = MODELS_DIR / f"{name}.README.md"
    text = readme.read_text(encoding="utf-8")
    assert text.startswith("# Synthetic"), readme.name
    assert f"`{name}.toml`" in text
    assert f"caredecide solve synthetic_cohort/models/{name}.toml" in text
    # The caution of caredecide/cautions.py, in the README's own sentence.
    assert (
        "research use only: not a substitute for clinical judgment, local guidelines or "
        "licensed practice" in " ".join(text.split()).lower()
    )
    assert f"`{name}.README.md`" in (MODELS_DIR / "README.md").read_text(encoding="utf-8")


@pytest.mark.parametrize("path", SCENARIOS, ids=lambda p: p.name)
def test_scenario_passes_caredecide_check(path):
    run = runner.invoke(app, ["check", str(path)])
    assert run.exit_code == 0, run.output
    assert "OK" in run.stdout and "is valid" in run.stdout
    assert "RESEARCH USE ONLY" in run.stderr


@pytest.mark.parametrize("path", SCENARIOS, ids=lambda p: p.name)
def test_scenario_says_synthetic_in_its_title_description_and_header(path):
    # Parameter and group sources are checked in tests/test_model_demo.py.
    model = load_model(path)
    assert "synthetic" in model.title.lower(), model.title
    assert "synthetic" in model.description.lower()
    assert path.read_text(encoding="utf-8").startswith("# SYNTHETIC")


@pytest.mark.parametrize("path", SCENARIOS, ids=lambda p: p.name)
def test_scenario_has_a_non_trivial_policy(path, solved):
    _, compiled, result = solved[path.name]
    assert result.success, result.message
    decision = result.decision_states
    assert decision.any()
    # Only choices the solver is sure of count: cells within the tie tolerance do not.
    chosen = result.policy[0][:, decision]
    sure = ~result.indifferent[0][:, decision]
    actions = np.unique(chosen[sure])
    assert actions.size >= 2, f"{path.name}: one action everywhere ({actions})"
    assert result.structure().kind != "uniform"
    if compiled.n_cycles is None:  # no age axis: the action must differ between states
        assert np.unique(chosen[0]).size >= 2


# --- lesion surveillance: intervene from a size class, below an age ------------------


def _lesion_policy(solved):
    _, compiled, result = solved[LESION.name]
    sizes = [compiled.state_ids.index(s) for s in ("small", "medium", "large")]
    intervene = result.policy[0][:, sizes] == compiled.action_ids.index("intervene")
    return result, intervene  # (T, 3) bool, sizes in clinical order


def test_lesion_intervention_is_a_threshold_in_size_at_every_age(solved):
    result, intervene = _lesion_policy(solved)
    # Monotone in size: once intervention pays in a class it pays in every larger class.
    assert np.all(np.diff(intervene.astype(int), axis=1) >= 0)
    # ... and the threshold is real: at some age small and large lesions are handled apart.
    assert np.any(intervene[:, -1] & ~intervene[:, 0])
    assert result.structure().kind == "threshold"


def test_lesion_intervention_stops_beyond_an_age_and_never_resumes(solved):
    result, intervene = _lesion_policy(solved)
    # Per size class, the policy switches at most once over age, from intervene to watch.
    assert np.all(np.diff(intervene.astype(int), axis=0) <= 0)
    assert np.any(intervene[:-1] & ~intervene[1:]), "the action changes with age in no size class"
    # The procedural risk grows with age, so large lesions keep the intervention longest.
    last_age = [result.ages[np.flatnonzero(intervene[:, k])].max(initial=-np.inf) for k in range(3)]
    assert last_age[2] >= last_age[1] >= last_age[0]


def test_lesion_procedure_row_combines_procedural_and_background_death(solved):
    # Source: Bowers et al. 1997, Actuarial Mathematics (Gompertz-Makeham constants from
    # memory): q_x = 1 - exp(-A - B c^x (c - 1) / ln c) for one year from age x.
    model, compiled, _ = solved[LESION.name]
    a, b, c = model.mortality.gompertz_makeham
    t = 10  # cycle 10 starts at age 70, where procedural mortality is p_op_death_70
    age = compiled.ages()[t]
    assert age == 70.0
    q70 = 1 - np.exp(-a - b * c**age * (c - 1) / np.log(c))
    p_op = model.parameters["p_op_death_70"].value
    expected = 1 - (1 - q70) * (1 - p_op)  # survive both causes (independent risks)
    s = compiled.state_ids.index("large")
    p = compiled.transition[0, t, compiled.action_ids.index("intervene"), s]
    assert p[compiled.state_ids.index("dead")] == pytest.approx(expected, rel=1e-12)
    assert p[compiled.state_ids.index("treated")] == pytest.approx(1 - expected, rel=1e-12)


# --- teaching model: the infinite-horizon solvers agree --------------------------------


def _rewards(compiled, objective):
    """(S, A) reward and (S, A, S) transition of the stationary teaching model (draw 0)."""
    lam, k = objective.outcome_weight, objective.cost_weight
    occupancy = lam * compiled.state_qaly[0, 0] - k * compiled.state_cost[0, 0]
    decision = lam * compiled.decision_qaly[0, 0] - k * compiled.decision_cost[0, 0]
    R = occupancy[:, None] + decision
    Q = np.moveaxis(compiled.transition[0, 0], 0, 1)  # (A, S, S) -> (S, A, S)
    return R, Q


@pytest.fixture(scope="module")
def teaching():
    model = load_model(TEACHING)
    compiled = compile_model(model)
    objective = Objective.from_settings(model.settings)
    runs = {
        method: solve(
            compiled,
            objective,
            method=method,
            tolerance=1e-12,
            record_history=(method == "value_iteration"),
        )
        for method in ("value_iteration", "policy_iteration", "modified_policy_iteration")
    }
    return compiled, objective, runs


def test_teaching_model_is_stationary_with_one_discount_factor(teaching):
    compiled, _, _ = teaching
    assert compiled.n_cycles is None and compiled.is_stationary
    assert 3 <= compiled.n_states <= 5
    assert compiled.n_actions == 2
    d_o, d_c = compiled.per_cycle_discount()
    assert d_o == d_c == pytest.approx(1 / 1.035)


def test_teaching_solvers_agree_with_quantecon(teaching):
    # Source: quantecon.markov.DiscreteDP (reference library) on the same arrays; with the
    # "start" within-cycle method the recursion is v = max_a r(s,a) + gamma P_a v exactly
    # (Puterman 1994, chapter 6).
    compiled, objective, runs = teaching
    assert compiled.within_cycle == "start"
    R, Q = _rewards(compiled, objective)
    gamma = compiled.per_cycle_discount()[0]
    reference = quantecon.markov.DiscreteDP(R, Q, gamma).solve(
        method="policy_iteration", max_iter=1000
    )
    scale = np.abs(reference.v).max()
    for method, result in runs.items():
        assert result.success, (method, result.message)
        np.testing.assert_array_equal(result.policy[0, 0], reference.sigma, err_msg=method)
        # Relative tolerance 1e-12 of the largest value: the error bound is ~1e-12 * scale.
        np.testing.assert_allclose(
            result.value[0, 0], reference.v, rtol=0, atol=1e-9 * scale, err_msg=method
        )
    # The policy differs between states: it is worth teaching.
    assert np.unique(reference.sigma[~compiled.absorbing]).size == 2


def test_teaching_value_iteration_residual_contracts_by_gamma(teaching):
    # Source: Puterman 1994, Theorem 6.2.3 (from memory): the Bellman operator is a
    # gamma-contraction in the sup norm, so ||v_{n+1} - v_n|| <= gamma ||v_n - v_{n-1}||.
    compiled, _, runs = teaching
    gamma = compiled.per_cycle_discount()[0]
    residual = np.array([record.residual[0] for record in runs["value_iteration"].history])
    assert residual.size > 10
    ratio = residual[1:] / residual[:-1]
    assert np.all(ratio <= gamma * (1 + 1e-9))
    # The last sweep meets the stopping rule's bound: gamma r / (1 - gamma).
    last = runs["value_iteration"].history[-1]
    assert last.error_bound[0] == pytest.approx(gamma * last.residual[0] / (1 - gamma))
